package server

import (
	"log/slog"
	"net"
	"sync"
)

// LimitConnections returns l holding at most Limits.MaxConnections open
// connections: past it, a connection it accepts is closed at once, before
// it can take anything more than the moment of its file descriptor, and
// counted (reckon_connections_refused_total). The log says once that the
// limit is reached and once that a connection closed below it again, with
// how many were refused meanwhile. A connection counts until it is closed.
//
// Each connection holds a file descriptor, which the journals need too;
// ingest streams and watchers are bounded on their own, but without this
// a client could open connections until the process has no descriptor
// left.
func (s *Server) LimitConnections(l net.Listener) net.Listener {
	m := s.opt.Metrics
	return &connLimit{Listener: l, max: s.opt.Limits.MaxConnections, flag: "-max-connections", log: s.opt.Logger,
		count: m.connections, refuse: m.connectionRefused}
}

// LimitHTTPConnections is LimitConnections for an HTTP listener of the
// daemon, server naming it ("metrics" or "view"): at most
// Limits.MaxHTTPConnections open connections, counted apart from the gRPC
// listener's and every other's (reckon_http_connections and
// reckon_http_connections_refused_total, label server), so that a flood
// of one listener takes no place of another's clients.
func (s *Server) LimitHTTPConnections(l net.Listener, server string) net.Listener {
	m := s.opt.Metrics
	return &connLimit{Listener: l, max: s.opt.Limits.MaxHTTPConnections, flag: "-max-http-connections", log: s.opt.Logger.With("server", server),
		count: func(n int) { m.httpConnections(server, n) }, refuse: func() { m.httpConnectionRefused(server) }}
}

// connLimit is the listener of LimitConnections and LimitHTTPConnections.
type connLimit struct {
	net.Listener
	max    int
	flag   string // the reckond flag that sets max
	log    *slog.Logger
	count  func(open int) // called with the open connections on each change
	refuse func()         // called for each connection refused

	mu      sync.Mutex
	open    int // connections accepted and not closed; mu protects it
	refused int // since the limit was last reached; mu protects it
}

// Accept returns the next connection under the limit, closing those past
// it.
func (l *connLimit) Accept() (net.Conn, error) {
	for {
		c, err := l.Listener.Accept()
		if err != nil {
			return nil, err
		}
		if l.admit() {
			return &limitedConn{Conn: c, l: l}, nil
		}
		c.Close()
	}
}

// admit counts a new connection if it is under the limit.
func (l *connLimit) admit() bool {
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.open < l.max {
		l.open++
		l.count(l.open)
		return true
	}
	if l.refused == 0 {
		l.log.Warn("connections at the limit: new ones are closed at once until one closes ("+l.flag+")", "listen", l.Addr().String(), "limit", l.max)
	}
	l.refused++
	l.refuse()
	return false
}

// release uncounts a connection that closed.
func (l *connLimit) release() {
	l.mu.Lock()
	defer l.mu.Unlock()
	l.open--
	l.count(l.open)
	if l.refused > 0 {
		l.log.Info("connections below the limit again", "listen", l.Addr().String(), "limit", l.max, "refused", l.refused)
		l.refused = 0
	}
}

// limitedConn is a connection that connLimit counts until it is closed.
type limitedConn struct {
	net.Conn
	l    *connLimit
	once sync.Once
}

// Close closes the connection; the first call frees its place.
func (c *limitedConn) Close() error {
	err := c.Conn.Close()
	c.once.Do(c.l.release)
	return err
}
