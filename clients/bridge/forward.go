package bridge

import (
	"context"
	"errors"
	"fmt"
	"io"
	"sync"

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
}

// maxReasons is how many refusal reasons a Summary keeps.
const maxReasons = 10

// Forward reads src until it ends, fails, or ctx is done, decodes frames
// with dec and sends each sample over sess; it then closes sess for
// sending, waits for the service's verdicts and closes src. Reaching the
// end of src or ctx being done is a normal end (nil error); the Summary is
// filled in either way.
func Forward(ctx context.Context, src io.ReadCloser, dec *Decoder, sess *client.Session) (Summary, error) {
	sum := Summary{Verdicts: map[pb.Verdict]int{}}
	var mu sync.Mutex // protects sum.Verdicts and sum.Reasons
	recvErr := make(chan error, 1)
	go func() {
		for {
			resp, err := sess.Recv()
			if err != nil {
				if errors.Is(err, io.EOF) {
					err = nil
				}
				recvErr <- err
				return
			}
			mu.Lock()
			tally(&sum, resp)
			mu.Unlock()
		}
	}()

	stop := context.AfterFunc(ctx, func() { src.Close() })
	defer stop()
	var readErr error
	buf := make([]byte, 64<<10)
	var samples []*pb.Sample
	for readErr == nil {
		n, err := src.Read(buf)
		samples = dec.Decode(samples[:0], buf[:n])
		for _, s := range samples {
			if _, err := sess.Send(s); err != nil {
				readErr = fmt.Errorf("send: %w", err)
				break
			}
			sum.Sent++
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
	if err := sess.CloseSend(); err != nil && readErr == nil {
		readErr = err
	}
	err := <-recvErr
	sum.Stats = dec.Stats()
	if readErr != nil {
		return sum, readErr
	}
	return sum, err
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
