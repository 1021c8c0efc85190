package daemon

import (
	"errors"
	"net"
	"os"
	"testing"
	"time"
)

// TestSilentConnectionClosed: a connection that sends nothing, or half of
// HTTP/2's connection preface, is closed once HandshakeTimeout passes, and
// gives its file descriptor back. Before, grpc-go's default kept it
// 120 s, so that a few hundred such connections could take every
// descriptor of a coprocessor's reckond.
func TestSilentConnectionClosed(t *testing.T) {
	srv := start(t, Config{HandshakeTimeout: 200 * time.Millisecond})
	defer srv.stop()
	for name, send := range map[string]string{"nothing": "", "half a preface": "PRI * HTTP/2.0\r\n"} {
		t.Run(name, func(t *testing.T) {
			c, err := net.Dial("tcp", srv.addr)
			if err != nil {
				t.Fatal(err)
			}
			defer c.Close()
			if _, err := c.Write([]byte(send)); err != nil {
				t.Fatal(err)
			}
			// Far beyond HandshakeTimeout, far below grpc-go's 120 s.
			c.SetReadDeadline(time.Now().Add(60 * time.Second))
			b := make([]byte, 256)
			for {
				_, err = c.Read(b)
				if err != nil {
					break
				}
			}
			if errors.Is(err, os.ErrDeadlineExceeded) {
				t.Fatalf("the connection is still open after 60 s")
			}
		})
	}
}
