package daemon

import (
	"fmt"
	"io"
	"io/fs"
	"os"
	"syscall"
)

// MaxFlagFileBytes bounds a file that a flag names (a robot's
// configuration, the token, a TLS certificate, key or CA): 1 MiB, far
// above any of them.
const MaxFlagFileBytes = 1 << 20

// ReadFlagFile reads the file at path that a flag names. Anything but a
// regular file is refused naming what it is, before a byte is read: a
// named pipe with no writer would hold the start for ever (open(2)
// waits for one, and SIGTERM does not end the wait), a device such as
// /dev/zero would never end. So is a file past MaxFlagFileBytes.
func ReadFlagFile(path string) ([]byte, error) {
	// O_NONBLOCK: the open of a named pipe returns at once.
	f, err := os.OpenFile(path, os.O_RDONLY|syscall.O_NONBLOCK, 0)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	st, err := f.Stat()
	if err != nil {
		return nil, err
	}
	if !st.Mode().IsRegular() {
		return nil, fmt.Errorf("%s is %s, not a regular file", path, fileKind(st.Mode()))
	}
	b, err := io.ReadAll(io.LimitReader(f, MaxFlagFileBytes+1))
	if err != nil {
		return nil, err
	}
	if len(b) > MaxFlagFileBytes {
		return nil, fmt.Errorf("%s is more than %d bytes", path, MaxFlagFileBytes)
	}
	return b, nil
}

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
