//go:build !linux

package daemon

import (
	"net"
	"time"
)

// setUserTimeout does nothing where TCP_USER_TIMEOUT is not known (grpc-go
// sets it only on Linux too).
func setUserTimeout(*net.TCPConn, time.Duration) error { return nil }
