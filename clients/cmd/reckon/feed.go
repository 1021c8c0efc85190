package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"strings"
	"sync"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"reckon.example/clients/client"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

func runFeed(ctx context.Context, args []string, std stdio) error {
	fs := newFlagSet("feed", "-robot NAME [flags] SAMPLES.jsonl|-", `
Streams a JSON Lines file of samples ("-" for standard input) to a robot in
file order and prints the verdicts by kind, with the reasons for refusals
naming the file and line. By default it sends as fast as the service takes
them; -pace sends them at a multiple of real time by their stamps.
Interrupted, it waits briefly for the verdicts of what it sent, prints the
summary and exits 130.

A sample the service answers "not taken" (status UNAVAILABLE: the robot is
paused, as when its journal's disk is full, or its journal could not be
written) is not in the robot. Feed then stops sending; with -wait it waits
that long for the robot to serve again and sends those samples again, in
order, on the same session (a sample the service took in the meantime is
answered as before, not applied twice), then goes on with the file. Without
-wait, or when the wait runs out, it names the first line not taken and
exits 1: feed again with -from-line at that line. When the service ends the
stream (it stopped), feed names the first line without a verdict and exits
3. Either way it names its session too: fed again with -session and that
id, each sample keeps the client sequence it had (its place among the
file's samples), and one the service took already is answered with its
first verdict instead of taken twice; the summary says how many were.

When the robot is deleted during the feed, feed stops sending at the first
sample answered that the robot is gone, names its line and exits 4; when it
is quarantined (it takes no input until deleted or restored by a restart),
the same with exit 5. The summary keeps the verdicts of the samples sent
before.`)
	fs.SetOutput(std.err)
	cf := addConnFlags(fs)
	robot := fs.String("robot", "", "robot: NAME or robots/NAME (required)")
	create, replace := addCreateFlags(fs, "create", "create the robot first from this YAML configuration; an existing robot must have the same one (or -replace). A file (also one redirected to standard input) is checked to its end first: a malformed line creates nothing. A pipe cannot be read twice: only its first sample is checked, and a malformed later line stops the feed with the robot created and the samples before it sent")
	pace := fs.Float64("pace", 0, "send at this multiple of real time by the samples' stamps: 1 real time, 2 twice as fast, 0 as fast as possible")
	fromLine := fs.Int("from-line", 1, "start at this line of the file (where an earlier feed says its samples were not taken)")
	session := fs.String("session", "", "continue an earlier feed's session (its id, as the earlier feed printed it): a sample of the file it sent is answered with its first verdict, not applied twice")
	wait := fs.Duration("wait", 0, "when samples are not taken (robot paused: journal disk full or not writable), wait up to this long for the robot to serve again and send them again (0: stop and name the line)")
	pos, err := parseArgs(fs, args, std.out, std.err)
	if err != nil {
		return err
	}
	if *robot == "" || len(pos) != 1 {
		return usagef(fs, "needs -robot and one JSON Lines file (- for standard input)")
	}
	if !(*pace >= 0) || math.IsInf(*pace, 0) {
		return usagef(fs, "-pace %v: want 0 (as fast as possible) or a positive factor", *pace)
	}
	if *replace && *create == "" {
		return usagef(fs, "-replace needs -create")
	}
	if *fromLine < 1 {
		return usagef(fs, "-from-line %d: want a line number from 1", *fromLine)
	}
	if *wait < 0 {
		return usagef(fs, "-wait %v: want a duration of 0 or more", *wait)
	}
	if len(*session) > 128 {
		return usagef(fs, "-session: %d bytes, want at most 128 (an id an earlier feed printed)", len(*session))
	}
	name, id, err := robotName(*robot)
	if err != nil {
		return err
	}
	in, label := std.in, "stdin"
	if pos[0] != "-" {
		f, err := os.Open(pos[0])
		if err != nil {
			return err
		}
		defer f.Close()
		in, label = f, pos[0]
	}
	var samples sampleSource = convert.NewSampleReader(in)
	if *create != "" {
		if samples, err = checkSamples(in, label, *fromLine); err != nil {
			return err
		}
	}
	c, err := cf.dial()
	if err != nil {
		return err
	}
	defer c.Close()
	if err := createFirst(ctx, c, id, *create, *replace, std.err); err != nil {
		return err
	}
	sessCtx, stop := sessionContext(ctx)
	defer stop()
	// A robot that does not exist ends the feed before it sends (exit 4,
	// as link and the other commands that name a robot), rather than
	// every sample answered "invalid: does not exist" with exit 0.
	r, err := c.GetRobot(ctx, name)
	if err != nil {
		return err
	}
	var opts []client.IngestOption
	var takenBefore uint64
	if *session != "" {
		opts = append(opts, client.Resume(*session, 0))
		// The samples the robot answers with a sequence up to its input
		// count now were taken by an earlier feed on the session.
		takenBefore = r.GetInputCount()
	}
	sess, err := c.OpenIngest(sessCtx, name, opts...)
	if err != nil {
		return err
	}
	t := newTally(label, sess.ID())
	t.takenBefore = takenBefore
	done := make(chan error, 1)
	go func() { done <- t.collect(sess) }()
	fd := feeder{sess: sess, t: t, label: label, pace: pacer{pace: *pace}, from: *fromLine, wait: *wait, std: std,
		serving: func(ctx context.Context) (bool, error) {
			r, err := c.GetRobot(ctx, name)
			return r.GetState() == pb.RobotState_ROBOT_STATE_SERVING, err
		}}
	sendErr := fd.run(ctx, samples)
	if err := sess.CloseSend(); err != nil && sendErr == nil {
		sendErr = err
	}
	recvErr := <-done
	interrupted := ctx.Err() != nil
	fmt.Fprintf(std.out, "%d samples sent to %s: %s\n", fd.sent, name, verdictLine(t.counts)+t.notTakenPart()+t.againPart()+t.earlierPart())
	for _, r := range t.reasons {
		fmt.Fprintln(std.out, "  "+r)
	}
	switch {
	case interrupted:
		fmt.Fprintf(std.err, "reckon feed: interrupted after %s:%d\n", label, t.lastLine())
		return errInterrupted
	case t.goneLine() > 0 && t.goneCode == codes.FailedPrecondition:
		// Quarantined while feeding (its journal directory removed, say):
		// it takes nothing until deleted or restored by a restart. Before,
		// every later sample was counted invalid and feed exited 0.
		return status.Error(codes.FailedPrecondition, fmt.Sprintf("%s:%d was answered that the robot takes no input (%s); feed stopped there", label, t.goneLine(), t.whyGone))
	case t.goneLine() > 0:
		// Deleted while feeding: the samples after this one would each be
		// answered so too.
		return status.Error(codes.NotFound, fmt.Sprintf("%s:%d was answered that the robot is gone (%s); feed stopped there", label, t.goneLine(), t.whyGone))
	case errors.Is(sendErr, io.EOF) || sendErr == nil && recvErr != nil:
		// The service ended the stream: Send says only io.EOF, the
		// stream's status is what Recv returned.
		return t.unanswered(recvErr)
	case sendErr != nil:
		return sendErr
	}
	if line, why := t.firstNotTaken(); line > 0 {
		return fmt.Errorf("%s:%d and the %d samples after it that were sent were not taken (%s); feed again from there when the robot serves: -from-line %d -session %s",
			label, line, t.notTakenCount()-1, why, line, sess.ID())
	}
	return nil
}

// feeder sends a file's samples on one session, and sends again those the
// service did not take once the robot serves again (-wait).
type feeder struct {
	sess    *client.Session
	t       *tally
	label   string
	pace    pacer
	from    int
	wait    time.Duration
	std     stdio
	serving func(context.Context) (bool, error)
	sent    int    // samples sent, each counted once
	ordinal uint64 // the file's samples read so far
}

// run sends every sample of sr from the line from on, until the end of
// the input, an error, ctx done (not an error here) or samples not taken
// that the wait does not get taken.
func (fd *feeder) run(ctx context.Context, sr sampleSource) error {
	for ctx.Err() == nil {
		if fd.t.goneLine() > 0 {
			return nil
		}
		if fd.t.stopped() {
			if again, err := fd.resend(ctx); !again {
				return err
			}
			continue
		}
		s, err := sr.Next()
		if errors.Is(err, io.EOF) && fd.from > sr.Line() {
			return fromPastEnd(fd.label, sr.Line(), fd.from)
		}
		if errors.Is(err, io.EOF) {
			// The last samples may still be answered not taken.
			fd.t.drain(ctx)
			if !fd.t.stopped() {
				return nil
			}
			if again, err := fd.resend(ctx); !again {
				return err
			}
			continue
		}
		if err != nil {
			return lineError(fd.label, sr.Line(), err)
		}
		// A sample's client sequence is its place among the file's
		// samples, wherever the feed starts, so that a feed continuing an
		// earlier one's session (-session) sends each sample under the
		// number it had.
		fd.ordinal++
		if sr.Line() < fd.from {
			continue
		}
		if s.GetRunStart() != nil {
			// The next run is on its controller's new clock: pacing
			// starts afresh from its first stamped sample.
			fd.pace.started = false
		} else if !fd.pace.wait(ctx, convert.SampleStamp(s)) {
			break
		}
		// The numbers of the samples before -from-line are given out
		// unsent (on a continued session, an earlier feed gave them to
		// the same samples), so that Send gives this one its ordinal.
		seq := fd.ordinal
		if err := fd.sess.Skip(seq - 1); err != nil {
			return err
		}
		fd.t.sending(sr.Line(), seq, s)
		if _, err := fd.sess.Send(s); err != nil {
			fd.t.unsend(seq)
			return err
		}
		fd.sent++
	}
	return nil
}

// sampleSource is where feed reads its samples: a *convert.SampleReader,
// or the readAhead that checkSamples leaves.
type sampleSource interface {
	Next() (*pb.Sample, error)
	Line() int
}

// fromPastEnd refuses a -from-line past the input's end: a mistyped line,
// or another file than the one an earlier feed named.
func fromPastEnd(label string, lines, from int) error {
	return &usageError{err: fmt.Errorf("%s has %d lines: -from-line %d lies past its end; nothing sent", label, lines, from)}
}

// checkSamples reads and checks the samples of in before feed -create
// creates the robot, so that a malformed input or a -from-line past its
// end leaves no new robot behind (nor, with -replace, a replaced one). A
// regular file is read to its end and then again from where it started;
// other input (a pipe, which may be live and never end) cannot be read
// again, and only its first sample is checked. It returns the source to
// send from.
func checkSamples(in io.Reader, label string, from int) (sampleSource, error) {
	f, _ := in.(*os.File)
	var start int64 = -1
	if f != nil {
		if st, err := f.Stat(); err == nil && st.Mode().IsRegular() {
			if start, err = f.Seek(0, io.SeekCurrent); err != nil {
				start = -1
			}
		}
	}
	sr := convert.NewSampleReader(in)
	for {
		s, err := sr.Next()
		eof := errors.Is(err, io.EOF)
		switch {
		case eof && from > sr.Line():
			return nil, fromPastEnd(label, sr.Line(), from)
		case err != nil && !eof:
			return nil, lineError(label, sr.Line(), err)
		case start < 0:
			return &readAhead{SampleReader: sr, s: s, err: err, held: true}, nil
		case eof:
			if _, err := f.Seek(start, io.SeekStart); err != nil {
				return nil, fmt.Errorf("%s: reading it again after checking it: %w", label, err)
			}
			return convert.NewSampleReader(f), nil
		}
	}
}

// readAhead is a SampleReader whose first result (a sample, or io.EOF)
// checkSamples has read already; Line is the reader's, which has read no
// further.
type readAhead struct {
	*convert.SampleReader
	s    *pb.Sample
	err  error
	held bool
}

func (r *readAhead) Next() (*pb.Sample, error) {
	if r.held {
		r.held = false
		return r.s, r.err
	}
	return r.SampleReader.Next()
}

// resend waits for the verdicts of every sample sent, then, with a wait,
// for the robot to serve again, and sends again, in order and with their
// own client sequence numbers, the samples not taken. again is false when
// there is no wait, it ran out or ctx is done (the samples stay not taken)
// or sending failed (err).
func (fd *feeder) resend(ctx context.Context) (again bool, err error) {
	fd.t.drain(ctx)
	if fd.wait <= 0 || ctx.Err() != nil {
		return false, nil
	}
	line, why := fd.t.firstNotTaken()
	fmt.Fprintf(fd.std.err, "reckon feed: %s:%d on not taken (%s); waiting up to %v for the robot to serve\n", fd.label, line, why, fd.wait)
	deadline := time.Now().Add(fd.wait)
	for {
		ok, err := fd.serving(ctx)
		if err == nil && ok {
			break
		}
		d := min(500*time.Millisecond, time.Until(deadline))
		if d <= 0 {
			return false, nil
		}
		select {
		case <-ctx.Done():
			return false, nil
		case <-time.After(d):
		}
	}
	rs := fd.t.takeRetries()
	fmt.Fprintf(fd.std.err, "reckon feed: the robot serves; sending %d samples again from %s:%d\n", len(rs), fd.label, line)
	for _, p := range rs {
		if err := fd.sess.SendAs(p.seq, p.sample); err != nil {
			return false, err
		}
	}
	// Pacing starts afresh from the next sample, instead of sending all
	// that fell due during the wait at once.
	fd.pace.started = false
	return true, nil
}

// sessionContext returns the context of an ingest session that outlives
// ctx, so that the verdicts of the samples sent before Ctrl-C still arrive,
// for verdictWait at most; stop releases it.
func sessionContext(ctx context.Context) (sessCtx context.Context, stop func()) {
	sessCtx, cancel := context.WithCancel(context.WithoutCancel(ctx))
	stopWait := context.AfterFunc(ctx, func() { time.AfterFunc(verdictWait, cancel) })
	return sessCtx, func() { stopWait(); cancel() }
}

// fileLineError is an error in an input file at a line, "file:line: what".
type fileLineError struct {
	file string
	line int
	err  error
}

func (e *fileLineError) Error() string {
	msg := e.err
	var le *convert.LineError
	if errors.As(e.err, &le) {
		msg = le.Err
	}
	return fmt.Sprintf("%s:%d: %v", e.file, e.line, msg)
}

func (e *fileLineError) Unwrap() error { return e.err }

// lineError places err at file:line; a *convert.LineError knows its line.
func lineError(file string, line int, err error) error {
	var le *convert.LineError
	if errors.As(err, &le) {
		line = le.Line
	}
	return &fileLineError{file: file, line: line, err: err}
}

// pacer holds samples back to a multiple of real time by their stamps,
// counted from the first stamped sample of the file and again after each
// run start; a sample stamped before one already sent (a late fix) goes at
// once.
type pacer struct {
	pace    float64 // 0: no pacing
	started bool
	start   time.Time
	first   int64 // the first sample's stamp, nanoseconds
}

// wait waits until the sample stamped stampNs is due; false if ctx ended
// first.
func (p *pacer) wait(ctx context.Context, stampNs int64) bool {
	if p.pace == 0 {
		return true
	}
	if !p.started {
		p.started, p.start, p.first = true, time.Now(), stampNs
		return true
	}
	d := time.Until(p.start.Add(time.Duration(float64(stampNs-p.first) / p.pace)))
	if d <= 0 {
		return true
	}
	tm := time.NewTimer(d)
	defer tm.Stop()
	select {
	case <-ctx.Done():
		return false
	case <-tm.C:
		return true
	}
}

// tally counts the verdicts of a feed and keeps the first reasons, naming
// the line of the sample each answers. It keeps each sample sent until its
// verdict comes, and those the service did not take for sending again.
type tally struct {
	label string
	mu    sync.Mutex // protects everything below but counts and reasons
	cond  *sync.Cond // signalled as verdicts come and when collect ends
	// session is the ingest session's id; last is the line of the last
	// sample sent (0: none).
	session string
	last    int
	held    map[uint64]int
	// pending holds the samples sent and not yet answered, with their
	// lines, by client sequence; retries those answered not taken, in the
	// order sent. Nothing else is kept of a sample once it is answered,
	// so that a feed's memory does not grow with its file.
	pending map[uint64]pendingSample
	retries []retry
	whyNot  string // the first not-taken reason
	// gone is the line of the first sample answered that the robot does
	// not exist (status NOT_FOUND: deleted during the feed) or takes no
	// input (REFUSAL_QUARANTINED), whyGone its reason and goneCode its
	// status; 0 while the robot is there.
	gone     int
	whyGone  string
	goneCode codes.Code // NOT_FOUND, or FAILED_PRECONDITION: quarantined
	ended    bool       // collect returned
	counts   map[pb.Verdict]int
	reasons  []string
	// unsent is the line of the sample whose send failed (0: none).
	unsent int
	// earlier counts, by final verdict, the samples an earlier feed on the
	// session left held whose resolutions came to this one; they are none
	// of this feed's samples (like counts, collect's alone).
	earlier map[pb.Verdict]int
	// takenBefore is the robot's input count when a feed continuing a
	// session (-session) began; again counts the samples answered with a
	// sequence up to it, taken by an earlier feed (collect's alone).
	takenBefore uint64
	again       int
}

// retry is a sample the service did not take.
type retry struct {
	seq    uint64
	line   int
	sample *pb.Sample
}

func newTally(label, session string) *tally {
	t := &tally{label: label, session: session, held: map[uint64]int{}, pending: map[uint64]pendingSample{}, counts: map[pb.Verdict]int{}}
	t.cond = sync.NewCond(&t.mu)
	return t
}

// sending records the line of sample s, about to be sent as client
// sequence seq (the next one).
func (t *tally) sending(line int, seq uint64, s *pb.Sample) {
	t.mu.Lock()
	defer t.mu.Unlock()
	t.last = line
	t.pending[seq] = pendingSample{sample: s, line: line}
}

// pendingSample is a sample sent and not yet answered, with its line.
type pendingSample struct {
	sample *pb.Sample
	line   int
}

func (t *tally) lastLine() int {
	t.mu.Lock()
	defer t.mu.Unlock()
	return t.lastLineLocked()
}

func (t *tally) lastLineLocked() int { return t.last }

// goneLine returns the line of the first sample answered that the robot
// is gone (0: none).
func (t *tally) goneLine() int {
	t.mu.Lock()
	defer t.mu.Unlock()
	return t.gone
}

// stopped tells whether samples wait to be sent again.
func (t *tally) stopped() bool {
	t.mu.Lock()
	defer t.mu.Unlock()
	return len(t.retries) > 0
}

// drain waits until every sample sent is answered, the stream ended or
// ctx is done.
func (t *tally) drain(ctx context.Context) {
	stop := context.AfterFunc(ctx, func() {
		t.mu.Lock()
		t.cond.Broadcast()
		t.mu.Unlock()
	})
	defer stop()
	t.mu.Lock()
	defer t.mu.Unlock()
	for len(t.pending) > 0 && !t.ended && ctx.Err() == nil {
		t.cond.Wait()
	}
}

// takeRetries returns the samples not taken, in the order sent, as
// pending again: the caller sends them again.
func (t *tally) takeRetries() []retry {
	t.mu.Lock()
	defer t.mu.Unlock()
	rs := t.retries
	t.retries = nil
	for _, r := range rs {
		t.pending[r.seq] = pendingSample{sample: r.sample, line: r.line}
	}
	return rs
}

// firstNotTaken returns the line of the first sample not taken (0: none)
// and why.
func (t *tally) firstNotTaken() (int, string) {
	t.mu.Lock()
	defer t.mu.Unlock()
	if len(t.retries) == 0 {
		return 0, ""
	}
	return t.retries[0].line, t.whyNot
}

func (t *tally) notTakenCount() int {
	t.mu.Lock()
	defer t.mu.Unlock()
	return len(t.retries)
}

// unanswered returns the error of a stream that the service ended (err
// its status; nil when it ended it without one), naming the first line
// sent that has no verdict, from which to feed again.
func (t *tally) unanswered(err error) error {
	if err == nil {
		err = errors.New("the service ended the stream")
	}
	t.mu.Lock()
	defer t.mu.Unlock()
	var first uint64
	for seq := range t.pending {
		if first == 0 || seq < first {
			first = seq
		}
	}
	if first == 0 && t.unsent == 0 {
		return fmt.Errorf("the stream ended after %s:%d, whose verdict came: %w", t.label, t.lastLineLocked(), err)
	}
	what := fmt.Sprintf("is the first of %d samples sent without a verdict", len(t.pending))
	line := t.pending[first].line
	switch {
	case first == 0:
		what, line = "was not sent", t.unsent
	case t.unsent > 0:
		what += fmt.Sprintf(" (and line %d was not sent)", t.unsent)
	}
	return fmt.Errorf("%s:%d %s: the stream ended (%w); feed again from there, on the same session (what the service took is answered again, not applied twice): -from-line %d -session %s",
		t.label, line, what, err, line, t.session)
}

// unsend takes back the sample of client sequence seq, whose send failed
// (the stream had ended): it is not among the samples without a verdict,
// which were sent, but where a feed again would start if they were none.
func (t *tally) unsend(seq uint64) {
	t.mu.Lock()
	defer t.mu.Unlock()
	t.unsent = t.pending[seq].line
	delete(t.pending, seq)
}

// earlierPart is the summary's count of the samples an earlier feed on the
// session left held and that were decided during this one, when any.
func (t *tally) earlierPart() string {
	n := 0
	for _, c := range t.earlier {
		n += c
	}
	if n == 0 {
		return ""
	}
	return fmt.Sprintf("; and %d held by an earlier feed on the session decided: %s", n, verdictLine(t.earlier))
}

// againPart is the summary's count of the samples that an earlier feed on
// the session sent and the robot took, when any: they were answered with
// their first verdicts, which the counts hold, and not applied again.
func (t *tally) againPart() string {
	if t.again == 0 {
		return ""
	}
	return fmt.Sprintf("; %d of them taken by an earlier feed on the session, answered with their first verdicts and not applied again", t.again)
}

// notTakenPart is the summary's count of samples not taken, when any.
func (t *tally) notTakenPart() string {
	if n := t.notTakenCount(); n > 0 {
		return fmt.Sprintf(", not taken %d", n)
	}
	return ""
}

func (t *tally) reason(line int, verdict pb.Verdict, why string) {
	if why != "" && len(t.reasons) < 10 {
		t.reasons = append(t.reasons, fmt.Sprintf("%s:%d: %s: %s", t.label, line, convert.VerdictName(verdict), why))
	}
}

// answered settles a sample's verdict: it is no longer pending, and a
// sample not taken waits to be sent again. It reports whether the verdict
// counts (the sample was taken or refused for good).
func (t *tally) answered(resp *pb.IngestResponse) (line int, counts bool) {
	t.mu.Lock()
	defer t.mu.Unlock()
	defer t.cond.Broadcast()
	seq := resp.GetClientSequence()
	p := t.pending[seq]
	line, s := p.line, p.sample
	delete(t.pending, seq)
	if client.NotTaken(resp) && s != nil {
		if len(t.retries) == 0 {
			t.whyNot = resp.GetReason()
		}
		t.retries = append(t.retries, retry{seq: seq, line: line, sample: s})
		return line, false
	}
	if t.gone == 0 && refusedForItsRobot(resp) {
		t.gone, t.whyGone, t.goneCode = line, resp.GetReason(), codes.Code(resp.GetStatusCode())
	}
	if resp.GetVerdict() == pb.Verdict_VERDICT_HELD {
		t.held[resp.GetSequence()] = line
	}
	return line, true
}

// refusedForItsRobot reports whether resp refuses its sample because of
// the robot rather than the sample: the robot was deleted (NOT_FOUND
// without a refusal of the sample's own) or quarantined. A fix naming a
// sensor or landmark the configuration lacks is NOT_FOUND too, but only
// that sample is refused; before, feed took it for the robot gone and
// stopped with exit 4.
func refusedForItsRobot(resp *pb.IngestResponse) bool {
	if resp.GetVerdict() != pb.Verdict_VERDICT_INVALID {
		return false
	}
	switch resp.GetRefusal() {
	case pb.Refusal_REFUSAL_QUARANTINED:
		return true
	case pb.Refusal_REFUSAL_UNSPECIFIED:
		return codes.Code(resp.GetStatusCode()) == codes.NotFound
	}
	return false
}

// collect receives the verdicts until the stream ends; io.EOF and a
// cancelled session are not errors.
func (t *tally) collect(sess *client.Session) error {
	defer func() {
		t.mu.Lock()
		t.ended = true
		t.cond.Broadcast()
		t.mu.Unlock()
	}()
	for {
		resp, err := sess.Recv()
		if err != nil {
			if errors.Is(err, io.EOF) || exitCode(err) == exitInterrupted {
				return nil
			}
			return err
		}
		if !client.OnlyResolutions(resp) {
			if line, ok := t.answered(resp); ok {
				t.counts[resp.GetVerdict()]++
				if seq := resp.GetSequence(); seq > 0 && seq <= t.takenBefore {
					t.again++
				}
				t.reason(line, resp.GetVerdict(), resp.GetReason())
			}
		}
		for _, r := range resp.GetResolved() {
			t.mu.Lock()
			hl, ours := t.held[r.GetSequence()]
			delete(t.held, r.GetSequence())
			t.mu.Unlock()
			if !ours {
				// Held by an earlier feed on the session: counted apart,
				// or this feed's held count went below zero.
				if t.earlier == nil {
					t.earlier = map[pb.Verdict]int{}
				}
				t.earlier[r.GetVerdict()]++
				continue
			}
			t.counts[r.GetVerdict()]++
			t.counts[pb.Verdict_VERDICT_HELD]--
			t.reason(hl, r.GetVerdict(), r.GetReason())
		}
	}
}

// verdictLine renders verdict counts as "applied N, held N, ...".
func verdictLine(counts map[pb.Verdict]int) string {
	var parts []string
	for _, v := range countedVerdicts {
		parts = append(parts, fmt.Sprintf("%s %d", convert.VerdictName(v), counts[v]))
	}
	return strings.Join(parts, ", ")
}
