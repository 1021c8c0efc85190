package bridge

import (
	"context"
	"errors"
	"fmt"
	"io"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"reckon.example/clients/client"
	pb "reckon.example/proto/reckon/v1"
)

// Summary is what Forward did.
type Summary struct {
	// Stats are the decoder's counts.
	Stats
	// Sent is the number of samples sent to the service.
	Sent int
	// Verdicts counts the final verdict of every sample sent: a held
	// sample counts as held until its resolution arrives, then under its
	// final verdict.
	Verdicts map[pb.Verdict]int
	// NotTaken counts the samples the service did not take (client.NotTaken:
	// the robot paused, as when its journal's disk is full), apart from
	// Verdicts. A live link does not send them again: cumulative counts
	// lose nothing by a missing sample, the next one carries the travel.
	NotTaken int
	// Reasons holds the reasons the service gave, the first ten.
	Reasons []string
	// Drops holds why frames were dropped as corrupted or invalid, a
	// long run of them as behind (ErrBehind), or a run of bytes that made
	// no good frame (Field "line"): the first of each kind (FrameError's
	// Kind and Field).
	Drops []string
	// Reconnects counts the streams opened again after the service ended
	// one, and Dropped the samples decoded while none was open (Reconnect).
	Reconnects, Dropped int
}

// maxReasons is how many refusal reasons a Summary keeps.
const maxReasons = 10

// sayEvery is how often at most Forward says again on its log that frames
// of one kind are being dropped, or samples refused for one reason.
const sayEvery = time.Minute

// notes says on a log what goes wrong again and again: the first of each
// kind at once, then at most once every sayEvery with how many more there
// were, so that a controller whose clock went back (every frame then
// invalid) or a configuration that does not fit the frames (every sample
// refused) is named while the link runs, not only in its summary.
type notes struct {
	log   io.Writer // nil: none
	what  string    // what "such" counts, plural: "frames", "samples"
	kinds map[string]*noteKind
}

type noteKind struct {
	said  time.Time
	since int // seen since said
}

// note counts one of kind key, says text if it is the first or sayEvery
// has passed since it was last said, and reports whether it is the
// first.
func (n *notes) note(key, text string, now time.Time) (first bool) {
	k, seen := n.kinds[key]
	if !seen {
		if n.kinds == nil {
			n.kinds = map[string]*noteKind{}
		}
		k = &noteKind{}
		n.kinds[key] = k
	}
	k.since++
	if seen && now.Sub(k.said) < sayEvery {
		return false
	}
	if n.log != nil {
		more := ""
		if k.since > 1 {
			more = fmt.Sprintf(" (%d such %s since this was last said)", k.since, n.what)
		}
		fmt.Fprintf(n.log, "%s%s\n", text, more)
	}
	k.said, k.since = now, 0
	return !seen
}

// Reopen opens a new ingest stream that continues session id, whose last
// sample had client sequence last (client.Resume): Forward calls it when
// the service ended the stream (it stopped or restarted), and goes on on
// the stream it returns.
type Reopen func(ctx context.Context, id string, last uint64) (*client.Session, error)

// ForwardOption configures Forward.
type ForwardOption func(*forwardOptions)

type forwardOptions struct {
	reopen Reopen
	log    io.Writer
}

// Reconnect makes Forward outlive the service's restarts: when the service
// ends the stream, Forward says so on log, drops the samples decoded while
// no stream is open (a live link does not keep them: cumulative counts
// lose nothing by a missing sample), and opens the session again with
// reopen at the next frame, waiting 0.1 s after a failed attempt and
// twice as long after each further one, up to 5 s (also after a stream
// that ended before it answered anything). A stream refused for good (the
// token or client certificate no longer accepted: codes Unauthenticated,
// PermissionDenied) ends Forward with that error. It also says on log why
// frames are dropped as corrupted or invalid, and why the service refuses
// samples: the first of each kind at once, then at most once a minute. A
// run start (the controller restarted) decoded while no stream is open,
// or not answered before the stream ended, is not dropped: it is sent on
// the stream opened again before the next sample (with its own client
// sequence if it was sent before, so that it is not taken twice).
func Reconnect(reopen Reopen, log io.Writer) ForwardOption {
	return func(o *forwardOptions) { o.reopen, o.log = reopen, log }
}

// The pauses between attempts to open the session again (Reconnect).
const (
	reopenFirst = 100 * time.Millisecond
	reopenMost  = 5 * time.Second
	reopenWait  = 2 * time.Second // one attempt's bound
)

// Forward reads src until it ends, fails, or ctx is done, decodes frames
// with dec and sends each sample over sess; it then closes sess for
// sending, waits for the service's verdicts and closes src. Reaching the
// end of src or ctx being done is a normal end (nil error); the Summary is
// filled in either way. Without Reconnect, the service ending the stream
// ends Forward with its error.
func Forward(ctx context.Context, src io.ReadCloser, dec *Decoder, sess *client.Session, opts ...ForwardOption) (Summary, error) {
	var o forwardOptions
	for _, f := range opts {
		f(&o)
	}
	sum := Summary{Verdicts: map[pb.Verdict]int{}}
	// The session a reopened stream continues, and the last client
	// sequence given out on it: a reopened stream goes on after it, so that
	// no number goes to two samples, whether or not the service saw the
	// sample that had it (a gap costs nothing).
	id, lastSeq := sess.ID(), sess.Last()
	var mu sync.Mutex // protects sum.Verdicts, sum.Reasons and run
	// run is the last run start decoded until the service answers it: one
	// lost with a stream (decoded while none was open, or sent on one
	// that ended before its verdict came) is sent again before the next
	// sample, or the new boot's odometry would be refused as time going
	// backwards for as long as the link runs.
	var run pendingRun
	refused := notes{log: o.log, what: "samples"} // under mu
	// answered says whether the stream now open has answered anything:
	// one that ends before it did is opened again only after a pause.
	var answered atomic.Bool
	// listen receives s's verdicts until its stream ends, and then sends
	// the stream's error (nil at its normal end) on the channel it returns.
	listen := func(s *client.Session) chan error {
		ended := make(chan error, 1)
		answered.Store(false)
		go func() {
			for {
				resp, err := s.Recv()
				if err != nil {
					if errors.Is(err, io.EOF) {
						err = nil
					}
					switch {
					case err == nil || o.reopen == nil || ctx.Err() != nil:
					case refusedForGood(err):
						fmt.Fprintf(o.log, "the service refused the stream (%v); ending\n", err)
					default:
						fmt.Fprintf(o.log, "the service ended the stream (%v); opening it again at the next frame\n", err)
					}
					ended <- err
					return
				}
				answered.Store(true)
				mu.Lock()
				tally(&sum, resp)
				run.answered(resp)
				if resp.GetReason() != "" && !client.OnlyResolutions(resp) {
					refused.note(fmt.Sprintf("%v/%d", resp.GetVerdict(), resp.GetStatusCode()),
						fmt.Sprintf("the service refused a sample (%s): client sequence %d: %s", verdictName(resp.GetVerdict()), resp.GetClientSequence(), resp.GetReason()), time.Now())
				}
				mu.Unlock()
			}
		}()
		return ended
	}
	ended := listen(sess)
	var retryAt time.Time
	pause := reopenFirst
	var fatal error // the stream refused for good (refusedForGood)
	// connected reports whether a stream is open, opening one again
	// (Reconnect) when the last has ended and its pause is over; it sets
	// fatal instead when the service refused the stream for good.
	connected := func() bool {
		if o.reopen == nil {
			return true
		}
		if sess != nil {
			select {
			case err := <-ended:
				sess = nil
				switch {
				case refusedForGood(err):
					fatal = fmt.Errorf("the service refused the stream: %w", err)
					return false
				case answered.Load():
					retryAt, pause = time.Time{}, reopenFirst
				default: // it ended as soon as it was opened: wait before the next
					retryAt, pause = time.Now().Add(pause), min(2*pause, reopenMost)
				}
			default:
				return true
			}
		}
		if ctx.Err() != nil || time.Now().Before(retryAt) {
			return false
		}
		octx, cancel := context.WithTimeout(ctx, reopenWait)
		defer cancel()
		s, err := o.reopen(octx, id, lastSeq)
		if err != nil {
			retryAt, pause = time.Now().Add(pause), min(2*pause, reopenMost)
			return false
		}
		sess, ended = s, listen(s)
		mu.Lock()
		run.sent = false
		mu.Unlock()
		sum.Reconnects++
		fmt.Fprintf(o.log, "the stream is open again (session %s); %d samples dropped while it was not\n", id, sum.Dropped)
		return true
	}

	stop := context.AfterFunc(ctx, func() { src.Close() })
	defer stop()
	var readErr error
	buf := make([]byte, 64<<10)
	var samples []*pb.Sample
	var drops []Drop
	dropped := notes{log: o.log, what: "frames"}
	for readErr == nil {
		n, err := src.Read(buf)
		samples = dec.Decode(samples[:0], buf[:n])
		drops = dec.Drops(drops[:0])
		for _, d := range drops {
			if dropped.note(d.Err.Kind.Error()+"/"+d.Err.Field, "frame dropped: "+d.Err.Error(), time.Now()) {
				sum.Drops = append(sum.Drops, d.Err.Error())
			}
		}
		for _, s := range samples {
			isRun := s.GetRunStart() != nil
			if isRun {
				mu.Lock()
				run = pendingRun{sample: s}
				mu.Unlock()
			}
			if !connected() {
				if fatal != nil {
					readErr = fatal
					break
				}
				if !isRun {
					sum.Dropped++
				}
				continue
			}
			err := sendRun(&mu, &run, sess, &sum)
			if err == nil && !isRun {
				_, err = sess.Send(s)
			}
			// Sent or not: a run start sent before a sample whose send
			// failed has its number, and a reopened stream must not give
			// it to the next sample (the service would answer that sample
			// with the run start's verdict, and not take it).
			lastSeq = sess.Last()
			if err != nil {
				if o.reopen == nil {
					readErr = fmt.Errorf("send: %w", err)
					break
				}
				// The stream ended; its listener says why.
				if !isRun {
					sum.Dropped++
				}
				continue
			}
			if !isRun {
				sum.Sent++
			}
		}
		switch {
		case err == nil:
		case errors.Is(err, io.EOF) || ctx.Err() != nil:
			readErr = io.EOF
		case readErr == nil:
			readErr = err
		}
	}
	if errors.Is(readErr, io.EOF) {
		readErr = nil
	}
	src.Close()
	var err error
	if sess != nil {
		if cerr := sess.CloseSend(); cerr != nil && readErr == nil && o.reopen == nil {
			readErr = cerr
		}
		err = <-ended
		if o.reopen != nil {
			err = nil // said on log; a live link's end is its source's
		}
	}
	sum.Stats = dec.Stats()
	if readErr != nil {
		return sum, readErr
	}
	return sum, err
}

// pendingRun is a run start that the service has not yet answered.
type pendingRun struct {
	sample *pb.Sample // nil: none
	seq    uint64     // its client sequence once sent, 0 before
	sent   bool       // sent on the stream now open
	done   bool       // answered (taken, or refused for good)
}

// answered notes resp if it answers the run start: a verdict other than
// not taken (client.NotTaken: the robot paused) settles it.
func (r *pendingRun) answered(resp *pb.IngestResponse) {
	if r.sample == nil || r.seq == 0 || resp.GetClientSequence() != r.seq || client.OnlyResolutions(resp) {
		return
	}
	if client.NotTaken(resp) {
		r.sent = false
		return
	}
	r.done = true
}

// sendRun sends the pending run start on sess if it is not settled and
// not yet sent on this stream: with its own client sequence again if it
// had one (a run start the service took is answered, not taken twice),
// otherwise as a new sample, counted in sum.Sent. Only Forward's sending
// goroutine calls it; mu guards r against the listener.
func sendRun(mu *sync.Mutex, r *pendingRun, sess *client.Session, sum *Summary) error {
	mu.Lock()
	if r.sample == nil || r.done || r.sent {
		mu.Unlock()
		return nil
	}
	again := r.seq != 0
	if !again {
		r.seq = sess.Last() + 1 // what Send gives it: no other goroutine sends
	}
	r.sent = true
	seq, sample := r.seq, r.sample
	mu.Unlock()
	var err error
	if again {
		err = sess.SendAs(seq, sample)
	} else {
		_, err = sess.Send(sample)
	}
	mu.Lock()
	defer mu.Unlock()
	switch {
	case err != nil && !again:
		r.seq, r.sent = 0, false // never sent: sent again, it takes the number then next
	case err != nil:
		r.sent = false
	case !again:
		sum.Sent++
	}
	return err
}

// verdictName is a verdict's short name: "invalid", "too_old", ...
// server/convert.VerdictName gives the same label from fusion's table (the
// lowercase suffix of the wire name, which a test there checks against the
// wire enum); it is derived here from the wire name instead so that the
// link, which runs on the robot, imports neither the server's packages nor
// fusion. The generated package holds generated code only.
func verdictName(v pb.Verdict) string {
	return strings.ToLower(strings.TrimPrefix(v.String(), "VERDICT_"))
}

// refusedForGood tells whether a stream's error will not go away by
// opening it again: the token or the client certificate is refused, and
// this process sends the same ones again.
func refusedForGood(err error) bool {
	c := status.Code(err)
	return c == codes.Unauthenticated || c == codes.PermissionDenied
}

// tally counts one response's verdict and resolutions into sum.
func tally(sum *Summary, resp *pb.IngestResponse) {
	switch {
	case client.NotTaken(resp):
		sum.NotTaken++
	case !client.OnlyResolutions(resp):
		sum.Verdicts[resp.GetVerdict()]++
	}
	for _, r := range resp.GetResolved() {
		sum.Verdicts[r.GetVerdict()]++
		sum.Verdicts[pb.Verdict_VERDICT_HELD]--
	}
	if resp.GetReason() != "" && len(sum.Reasons) < maxReasons {
		sum.Reasons = append(sum.Reasons, fmt.Sprintf("client sequence %d: %s", resp.GetClientSequence(), resp.GetReason()))
	}
}
