package daemon

import (
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"syscall"
	"time"
)

// MaxFlagFileBytes bounds a file that a flag names (a robot's
// configuration, the token, a TLS certificate, key or CA): 1 MiB, far
// above any of them.
const MaxFlagFileBytes = 1 << 20

// ReadFlagFile reads the file at path that a flag names: a regular file,
// or a named pipe (a shell's process substitution, <(...), hands a secret
// over so). Anything else is refused naming what it is, before a byte is
// read: a device such as /dev/zero would never end. A named pipe that no
// process writes to is refused at once, and one whose writer does not
// close it within pipeWait: before, the open waited for a writer for
// ever, and SIGTERM did not end the wait. So is a file past
// MaxFlagFileBytes.
func ReadFlagFile(path string) ([]byte, error) {
	// O_NONBLOCK: the open of a named pipe returns at once, and its reads
	// wait in Go's poller, with a deadline.
	f, err := os.OpenFile(path, os.O_RDONLY|syscall.O_NONBLOCK, 0)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	st, err := f.Stat()
	if err != nil {
		return nil, err
	}
	pipe := st.Mode()&fs.ModeNamedPipe != 0
	switch {
	case pipe:
		if err := f.SetReadDeadline(time.Now().Add(pipeWait)); err != nil {
			return nil, err
		}
	case !st.Mode().IsRegular():
		return nil, fmt.Errorf("%s is %s, not a regular file", path, fileKind(st.Mode()))
	}
	b, err := io.ReadAll(io.LimitReader(f, MaxFlagFileBytes+1))
	switch {
	case errors.Is(err, os.ErrDeadlineExceeded):
		return nil, fmt.Errorf("%s is a named pipe that its writer did not close within %v", path, pipeWait)
	case err != nil:
		return nil, err
	case len(b) > MaxFlagFileBytes:
		return nil, fmt.Errorf("%s is more than %d bytes", path, MaxFlagFileBytes)
	case pipe && len(b) == 0:
		return nil, fmt.Errorf("%s is a named pipe that no process writes to", path)
	}
	return b, nil
}

// pipeWait bounds the wait for a named pipe's writer to finish
// (ReadFlagFile).
const pipeWait = 10 * time.Second

func fileKind(m fs.FileMode) string {
	switch {
	case m.IsDir():
		return "a directory"
	case m&fs.ModeNamedPipe != 0:
		return "a named pipe (FIFO)"
	case m&fs.ModeSocket != 0:
		return "a socket"
	case m&fs.ModeCharDevice != 0:
		return "a character device"
	case m&fs.ModeDevice != 0:
		return "a block device"
	}
	return "not a regular file (" + m.Type().String() + ")"
}
