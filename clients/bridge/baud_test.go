package bridge

import (
	"bytes"
	"context"
	"io"
	"strings"
	"testing"

	"reckon.example/clients/client"
)

// atWrongRate returns the bytes a UART receiving at rx bits per second
// reads from bytes sent at tx (8N1, idle high, least significant bit
// first): it waits for a start bit's falling edge, samples the eight data
// bits at their middles on its own clock and takes the byte whatever the
// stop bit is (common practice: how a UART receiver frames bytes).
func atWrongRate(sent []byte, tx, rx float64) []byte {
	var level []bool // the line, sampled 16 times per sent bit
	const over = 16
	for _, c := range sent {
		bits := []bool{false}
		for i := range 8 {
			bits = append(bits, c>>i&1 == 1)
		}
		bits = append(bits, true)
		for _, b := range bits {
			for range over {
				level = append(level, b)
			}
		}
	}
	at := func(t float64) bool { // the line at t seconds
		i := int(t * tx * over)
		return i >= len(level) || level[i]
	}
	var out []byte
	end := float64(len(level)) / (tx * over)
	step := 1 / (tx * over)
	for t := 0.0; t < end; t += step {
		if at(t) {
			continue
		}
		var c byte
		for i := range 8 {
			if at(t + (1.5+float64(i))/rx) {
				c |= 1 << i
			}
		}
		out = append(out, c)
		t += 9.5 / rx // past the stop bit, then look for the next start bit
	}
	return out
}

// TestLinkSaysBitRate: a controller sending at 115200 bit/s read at 9600
// and at 57600 (reckon link -baud not the controller's rate) gives only
// corrupted frames. Forward says so once it has seen corruptedHint of them
// and none good, naming the bit rate and the wiring, on its log and in the
// summary. Before, it named only the first frame's bad CRC or length, as
// for a frame damaged by noise now and then. A few corrupted frames before
// the first good one (bytes of a controller starting up) do not make it
// say so.
func TestLinkSaysBitRate(t *testing.T) {
	c := service(t)
	var sent []byte
	for k := range cartFrames {
		f := cartFrame(k)
		sent = AppendFrame(sent, &f, nil)
	}
	for _, rx := range []float64{9600, 57600} {
		got := forwardLogged(t, c, atWrongRate(sent, 115200, rx))
		if !strings.Contains(got, "-baud") {
			t.Errorf("read at %v bit/s: the log does not name the bit rate:\n%s", rx, got)
		}
	}
	start := append([]byte("boot 1.2\r\n\x00\x07\x00\x13\x00"), sent...)
	if got := forwardLogged(t, c, start); strings.Contains(got, "-baud") {
		t.Errorf("bytes at start-up, then good frames: the log names the bit rate:\n%s", got)
	}
}

// forwardLogged forwards b to robots/link with a log and returns the log
// and the summary's drops.
func forwardLogged(t *testing.T, c *client.Client, b []byte) string {
	t.Helper()
	sess, err := c.OpenIngest(context.Background(), "robots/link")
	if err != nil {
		t.Fatal(err)
	}
	reopen := func(ctx context.Context, id string, last uint64) (*client.Session, error) {
		return c.OpenIngest(ctx, "robots/link", client.Resume(id, last))
	}
	var log lockedWriter
	var d Decoder
	sum, err := Forward(context.Background(), io.NopCloser(&chunked{bytes.NewReader(b)}), &d, sess, Reconnect(reopen, &log))
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("stats %+v", sum.Stats)
	return log.text() + "summary:\n" + strings.Join(sum.Drops, "\n")
}

// chunked reads at most 256 bytes at a time, as a serial port's reads
// return what arrived since the last.
type chunked struct{ r io.Reader }

func (c *chunked) Read(p []byte) (int, error) { return c.r.Read(p[:min(len(p), 256)]) }
