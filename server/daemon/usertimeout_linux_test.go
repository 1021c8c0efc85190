package daemon

import (
	"net"
	"testing"
	"time"

	"golang.org/x/sys/unix"
)

// TestUserTimeout: the gRPC listener sets TCP_USER_TIMEOUT to
// keepaliveTimeout on the connections it accepts, as grpc-go did on them
// before the connection limit wrapped them (grpc-go sets it only on a
// *net.TCPConn).
func TestUserTimeout(t *testing.T) {
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer lis.Close()
	c, err := net.Dial("tcp", lis.Addr().String())
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	sc, err := userTimeout{lis}.Accept()
	if err != nil {
		t.Fatal(err)
	}
	defer sc.Close()
	raw, err := sc.(*net.TCPConn).SyscallConn()
	if err != nil {
		t.Fatal(err)
	}
	var ms int
	raw.Control(func(fd uintptr) { ms, err = unix.GetsockoptInt(int(fd), unix.IPPROTO_TCP, unix.TCP_USER_TIMEOUT) })
	if err != nil || time.Duration(ms)*time.Millisecond != keepaliveTimeout {
		t.Errorf("TCP_USER_TIMEOUT %d ms (%v), want %v", ms, err, keepaliveTimeout)
	}
}
