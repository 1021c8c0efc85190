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
summary and exits 130.`)
	fs.SetOutput(std.err)
	cf := addConnFlags(fs)
	robot := fs.String("robot", "", "robot: NAME or robots/NAME (required)")
	create, replace := addCreateFlags(fs, "create", "create the robot first from this YAML configuration; an existing robot must have the same one (or -replace)")
	pace := fs.Float64("pace", 0, "send at this multiple of real time by the samples' stamps: 1 real time, 2 twice as fast, 0 as fast as possible")
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
	sess, err := c.OpenIngest(sessCtx, name)
	if err != nil {
		return err
	}
	t := newTally(label)
	done := make(chan error, 1)
	go func() { done <- t.collect(sess) }()
	sent, sendErr := sendSamples(ctx, sess, convert.NewSampleReader(in), label, *pace, t)
	if err := sess.CloseSend(); err != nil && sendErr == nil {
		sendErr = err
	}
	recvErr := <-done
	interrupted := ctx.Err() != nil
	fmt.Fprintf(std.out, "%d samples sent to %s: %s\n", sent, name, verdictLine(t.counts))
	for _, r := range t.reasons {
		fmt.Fprintln(std.out, "  "+r)
	}
	switch {
	case interrupted:
		fmt.Fprintf(std.err, "reckon feed: interrupted after %s:%d\n", label, t.lastLine())
		return errInterrupted
	case sendErr != nil:
		return sendErr
	}
	return recvErr
}

// sessionContext returns the context of an ingest session that outlives
// ctx, so that the verdicts of the samples sent before Ctrl-C still arrive,
// for verdictWait at most; stop releases it.
func sessionContext(ctx context.Context) (sessCtx context.Context, stop func()) {
	sessCtx, cancel := context.WithCancel(context.WithoutCancel(ctx))
	stopWait := context.AfterFunc(ctx, func() { time.AfterFunc(verdictWait, cancel) })
	return sessCtx, func() { stopWait(); cancel() }
}

// sendSamples sends every sample of sr, paced, until the end of the input,
// an error or ctx is done (which is not an error here). Errors in the input
// name label and the line.
func sendSamples(ctx context.Context, sess *client.Session, sr *convert.SampleReader, label string, pace float64, t *tally) (int, error) {
	p := pacer{pace: pace}
	sent := 0
	for ctx.Err() == nil {
		s, err := sr.Next()
		if errors.Is(err, io.EOF) {
			return sent, nil
		}
		if err != nil {
			return sent, lineError(label, sr.Line(), err)
		}
		if !p.wait(ctx, convert.SampleStamp(s)) {
			break
		}
		t.sending(sr.Line())
		if _, err := sess.Send(s); err != nil {
			return sent, err
		}
		sent++
	}
	return sent, nil
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
// counted from the first sample; a sample stamped before one already sent
// (a late fix) goes at once.
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
// the line of the sample each answers.
type tally struct {
	label   string
	mu      sync.Mutex     // protects lines and held
	lines   []int          // lines[k-1] is the line of client sequence k
	held    map[uint64]int // the line of each held input, by service sequence
	counts  map[pb.Verdict]int
	reasons []string
}

func newTally(label string) *tally {
	return &tally{label: label, held: map[uint64]int{}, counts: map[pb.Verdict]int{}}
}

// sending records the line of the next sample sent.
func (t *tally) sending(line int) {
	t.mu.Lock()
	t.lines = append(t.lines, line)
	t.mu.Unlock()
}

func (t *tally) lastLine() int {
	t.mu.Lock()
	defer t.mu.Unlock()
	if len(t.lines) == 0 {
		return 0
	}
	return t.lines[len(t.lines)-1]
}

func (t *tally) lineOf(clientSeq uint64) int {
	t.mu.Lock()
	defer t.mu.Unlock()
	if clientSeq == 0 || clientSeq > uint64(len(t.lines)) {
		return 0
	}
	return t.lines[clientSeq-1]
}

func (t *tally) reason(line int, verdict pb.Verdict, why string) {
	if why != "" && len(t.reasons) < 10 {
		t.reasons = append(t.reasons, fmt.Sprintf("%s:%d: %s: %s", t.label, line, convert.VerdictName(verdict), why))
	}
}

// collect receives the verdicts until the stream ends; io.EOF and a
// cancelled session are not errors.
func (t *tally) collect(sess *client.Session) error {
	for {
		resp, err := sess.Recv()
		if err != nil {
			if errors.Is(err, io.EOF) || exitCode(err) == exitInterrupted {
				return nil
			}
			return err
		}
		if !client.OnlyResolutions(resp) {
			line := t.lineOf(resp.GetClientSequence())
			t.counts[resp.GetVerdict()]++
			if resp.GetVerdict() == pb.Verdict_VERDICT_HELD {
				t.mu.Lock()
				t.held[resp.GetSequence()] = line
				t.mu.Unlock()
			}
			t.reason(line, resp.GetVerdict(), resp.GetReason())
		}
		for _, r := range resp.GetResolved() {
			t.counts[r.GetVerdict()]++
			t.counts[pb.Verdict_VERDICT_HELD]--
			t.mu.Lock()
			hl := t.held[r.GetSequence()]
			delete(t.held, r.GetSequence())
			t.mu.Unlock()
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
