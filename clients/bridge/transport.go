package bridge

import (
	"errors"
	"fmt"
	"io"
	"net"
	"sync/atomic"

	"go.bug.st/serial"
)

// OpenSerial opens the serial port name (for instance /dev/ttyACM0) at baud
// bits per second, 8 data bits, no parity, one stop bit, in raw mode (no
// line editing, no echo, no newline translation: every byte reaches the
// decoder as sent). Closing it ends a Read in progress. A Read of a port
// that went away (a USB adapter pulled out: the kernel hangs its terminal
// up) returns ErrPortGone.
func OpenSerial(name string, baud int) (io.ReadCloser, error) {
	p, err := serial.Open(name, &serial.Mode{BaudRate: baud, DataBits: 8, Parity: serial.NoParity, StopBits: serial.OneStopBit})
	if err != nil {
		return nil, fmt.Errorf("serial port %s: %w", name, err)
	}
	return &serialPort{Port: p}, nil
}

// ErrPortGone is the error of a Read of a serial port that went away.
var ErrPortGone = errors.New("the serial port went away (hung up: a USB adapter unplugged, or the device reset)")

// serialPort tells a port hung up from one closed by its reader: the
// serial library reports both as "Port has been closed".
type serialPort struct {
	serial.Port
	closed atomic.Bool
}

func (p *serialPort) Read(b []byte) (int, error) {
	n, err := p.Port.Read(b)
	var pe *serial.PortError
	if err != nil && errors.As(err, &pe) && pe.Code() == serial.PortClosed && !p.closed.Load() {
		err = ErrPortGone
	}
	return n, err
}

func (p *serialPort) Close() error {
	p.closed.Store(true)
	return p.Port.Close()
}

// UDPSource is a listening UDP socket read as a byte stream of frames: each
// datagram holds one or more whole frames, and Read ends each datagram
// with a 0x00 delimiter so that a datagram whose last frame lacks its own
// delimiter cannot run into the next one. Datagrams from any sender are
// taken.
type UDPSource struct {
	conn *net.UDPConn
}

// ListenUDP listens on addr ("host:port"; port 0 picks a free one).
func ListenUDP(addr string) (*UDPSource, error) {
	ua, err := net.ResolveUDPAddr("udp", addr)
	if err != nil {
		return nil, fmt.Errorf("udp address %s: %w", addr, err)
	}
	conn, err := net.ListenUDP("udp", ua)
	if err != nil {
		return nil, err
	}
	return &UDPSource{conn: conn}, nil
}

// Addr returns the address the socket listens on.
func (u *UDPSource) Addr() net.Addr { return u.conn.LocalAddr() }

// Read reads one datagram into p followed by a 0x00 byte. A datagram
// longer than len(p)-1 bytes is cut short (its cut frame is then counted
// as corrupted); Forward reads with a buffer of 64 KiB, the largest UDP
// datagram.
func (u *UDPSource) Read(p []byte) (int, error) {
	if len(p) < 2 {
		return 0, io.ErrShortBuffer
	}
	n, _, err := u.conn.ReadFromUDP(p[:len(p)-1])
	if err != nil {
		return 0, err
	}
	p[n] = 0
	return n + 1, nil
}

// Close closes the socket; a Read in progress returns an error.
func (u *UDPSource) Close() error { return u.conn.Close() }
