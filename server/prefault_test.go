package server

import (
	"bytes"
	"context"
	"fmt"
	"log/slog"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	pb "reckon.example/proto/reckon/v1"
)

// prefaultingJournal is a robot's journal whose Prefault (journal.Writer's
// readying of the pages ahead) fails as on a kernel without
// MADV_POPULATE_WRITE, and counts its calls.
type prefaultingJournal struct {
	journalWriter
	calls int
}

func (p *prefaultingJournal) Prefault() error {
	p.calls++
	return fmt.Errorf("madvise cart.000000.rjl: %w", syscall.EINVAL)
}

// TestPrefaultAfterEachSync: the periodic sync readies the pages of each
// journal it synced, with one syncfs for two robots and with one robot's
// own fdatasync, and not of a journal with nothing new to sync; a kernel
// that cannot is noted once in the log, and the robots serve on.
func TestPrefaultAfterEachSync(t *testing.T) {
	var logs bytes.Buffer
	var mu sync.Mutex
	js := map[string]*prefaultingJournal{}
	opt := Options{JournalDir: t.TempDir(), SyncInterval: time.Hour, Logger: slog.New(slog.NewTextHandler(&logs, nil))}
	opt.wrapJournal = func(j journalWriter) journalWriter {
		mu.Lock()
		defer mu.Unlock()
		p := &prefaultingJournal{journalWriter: j}
		js[fmt.Sprint(len(js))] = p
		return p
	}
	s, err := New(opt)
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	samp, cfg := cartRun(5, 2)
	for _, id := range []string{"cart-a", "cart-b"} {
		if _, err := s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: id, Config: cfg}); err != nil {
			t.Fatal(err)
		}
	}
	a, b := js["0"], js["1"]
	check := func(when string, wantA, wantB int) {
		t.Helper()
		if a.calls != wantA || b.calls != wantB {
			t.Fatalf("%s: Prefault called %d and %d times, want %d and %d", when, a.calls, b.calls, wantA, wantB)
		}
	}
	feed := func(robot string, from int) {
		t.Helper()
		for k, o := range take(s, requests(robot, "session-"+robot, uint64(from+1), samp[from:from+50])) {
			if o.GetStatusCode() != 0 {
				t.Fatalf("%s, sample %d: %v %s", robot, from+k+1, o.GetStatusCode(), o.GetReason())
			}
		}
	}

	feed("robots/cart-a", 0)
	feed("robots/cart-b", 0)
	s.SyncJournals() // both written: one syncfs where the kernel has it
	check("after a sync of both", 1, 1)
	s.SyncJournals() // nothing new
	check("after a sync with nothing written", 1, 1)
	feed("robots/cart-b", 50)
	s.SyncJournals() // one robot: its own fdatasync
	check("after a sync of one", 1, 2)
	feed("robots/cart-a", 50)
	feed("robots/cart-b", 100)

	if n := strings.Count(logs.String(), "not readied ahead"); n != 1 {
		t.Errorf("the kernel's refusal noted %d times, want once:\n%s", n, logs.String())
	}
	if !strings.Contains(logs.String(), "invalid argument") {
		t.Errorf("the note does not say why:\n%s", logs.String())
	}
}
