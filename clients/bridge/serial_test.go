package bridge

import (
	"errors"
	"strings"
	"testing"

	"golang.org/x/sys/unix"
)

// TestSerialHangUp: a USB serial adapter pulled out hangs its terminal up,
// and a read returns end of file, which the serial library reports as
// "Port has been closed", as if the link had closed it. A read of the
// port now says it went away. Here the pseudo-terminal is hung up with
// TIOCVHANGUP, as the kernel hangs up the tty of a device removed (it
// needs CAP_SYS_ADMIN; skipped without it). A port the link closed itself
// still reads as closed.
func TestSerialHangUp(t *testing.T) {
	_, tty, p := openPTY(t)
	defer p.Close()
	if err := unix.IoctlSetInt(int(tty.Fd()), unix.TIOCVHANGUP, 0); errors.Is(err, unix.EPERM) {
		t.Skipf("hanging up a terminal needs CAP_SYS_ADMIN: %v", err)
	} else if err != nil {
		t.Fatal(err)
	}
	_, err := p.Read(make([]byte, 64))
	if err == nil || !strings.Contains(err.Error(), "went away") {
		t.Errorf("read of a hung up port: %v; want an error saying the port went away", err)
	}

	q, err := OpenSerial(tty.Name(), 115200)
	if err != nil {
		t.Logf("the hung up port does not open again: %v", err)
	} else {
		q.Close()
		if _, err = q.Read(make([]byte, 64)); err == nil || strings.Contains(err.Error(), "went away") {
			t.Errorf("read of a port closed by its reader: %v; want the port closed", err)
		}
	}
}
