// Package daemon runs the service as a process does: the gRPC listener
// with TLS and bearer tokens, health and reflection, the metrics HTTP
// server, the robots restored from the journal or created at start, and a
// graceful stop. The service itself is package server.
package daemon

import (
	"context"
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"log"
	"log/slog"
	"net"
	"net/http"
	"strings"
	"syscall"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/health"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/keepalive"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/reflection"
	reflectionv1 "google.golang.org/grpc/reflection/grpc_reflection_v1"
	reflectionv1alpha "google.golang.org/grpc/reflection/grpc_reflection_v1alpha"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
	"reckon.example/server/convert"
)

// Config configures Serve. Zero fields take the defaults given.
type Config struct {
	// Listen is the gRPC address (default 127.0.0.1:7460: loopback only).
	Listen string
	server.Options
	// TLSCert and TLSKey are PEM files; with them the service speaks TLS.
	TLSCert, TLSKey string
	// TLSClientCA, a PEM file, makes it require client certificates
	// signed by that CA (mutual TLS).
	TLSClientCA string
	// Token, if set, is required as "authorization: Bearer <token>" on every
	// call except health checks.
	Token string
	// MetricsListen serves Prometheus metrics at /metrics ("" = off); an
	// address without a host ("":9464"") binds loopback.
	MetricsListen string
	// ViewListen serves the live view ("" = off): a page at "/" that draws
	// every robot live, fed by server-sent events at "/events" (view.go).
	// An address without a host binds loopback; it speaks TLS when the
	// service does, and needs the Token when one is set.
	ViewListen string
	// Insecure allows serving in plain text on an address that is not
	// loopback (Listen without TLS, MetricsListen, ViewListen without TLS
	// and a token or client certificates); without it Serve refuses to
	// start.
	Insecure bool
	// MaxStreams bounds the concurrent streams of one connection (default
	// 1024).
	MaxStreams uint32
	// MaxMessageBytes bounds one received message (default
	// server.DefaultMaxMessageBytes; see server.ServiceOptions for its limit
	// and how a larger one is refused).
	MaxMessageBytes int
	// ShutdownGrace bounds the graceful stop before a hard stop (5 s).
	ShutdownGrace time.Duration
	// HandshakeTimeout closes a connection that has not finished its
	// TLS and HTTP/2 handshakes in this time (10 s): one that connects and
	// sends nothing holds a file descriptor until then (grpc-go's default
	// was 120 s).
	HandshakeTimeout time.Duration
	// Ready, if set, is called with the bound addresses once serving.
	Ready func(grpcAddr, metricsAddr string)
	// ViewReady, if set, is called with the live view's bound address once
	// serving, before Ready.
	ViewReady func(viewAddr string)
	// Robots are created at start if the journal did not restore them.
	Robots map[string]*pb.RobotConfig
}

// LoadTLS loads the server's TLS configuration: its certificate and key,
// and with clientCA the CA whose client certificates it requires.
func LoadTLS(cert, key, clientCA string) (*tls.Config, error) {
	certPEM, err := ReadFlagFile(cert)
	if err != nil {
		return nil, fmt.Errorf("tls-cert: %w", err)
	}
	keyPEM, err := ReadFlagFile(key)
	if err != nil {
		return nil, fmt.Errorf("tls-key: %w", err)
	}
	pair, err := tls.X509KeyPair(certPEM, keyPEM)
	if err != nil {
		return nil, fmt.Errorf("tls-cert/tls-key: %w", err)
	}
	cfg := &tls.Config{Certificates: []tls.Certificate{pair}, MinVersion: tls.VersionTLS12}
	if clientCA != "" {
		pem, err := ReadFlagFile(clientCA)
		if err != nil {
			return nil, fmt.Errorf("tls-client-ca: %w", err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return nil, fmt.Errorf("tls-client-ca: %s holds no PEM certificate", clientCA)
		}
		cfg.ClientCAs, cfg.ClientAuth = pool, tls.RequireAndVerifyClientCert
	}
	return cfg, nil
}

func checkToken(ctx context.Context, method, token string) error {
	if token == "" || strings.HasPrefix(method, "/grpc.health.v1.Health/") {
		return nil
	}
	md, _ := metadata.FromIncomingContext(ctx)
	for _, v := range md.Get("authorization") {
		if bearerOK(v, token) {
			return nil
		}
	}
	return status.Error(codes.Unauthenticated, "authorization: a valid bearer token is required")
}

// Serve runs the service until ctx is done, then stops gracefully (hard after
// ShutdownGrace) and flushes the journals.
func Serve(ctx context.Context, dc Config) error {
	dc.defaults()
	if err := checkExposure(&dc); err != nil {
		return err
	}
	opts, err := grpcOptions(&dc)
	if err != nil {
		return err
	}
	if dc.MetricsListen != "" && dc.Metrics == nil {
		dc.Metrics = server.NewMetrics()
	}
	// The address first: one that cannot be listened on (taken, or not
	// an address) is said at once, before a restore that may take long.
	lis, err := net.Listen("tcp", dc.Listen)
	if err != nil {
		return err
	}
	srv, err := startService(ctx, &dc)
	if err != nil {
		lis.Close()
		if cerr := ctx.Err(); cerr != nil && errors.Is(err, cerr) {
			// SIGTERM during a long restore: a stop, not a failure.
			dc.Logger.Info("stopped before serving, as asked during the restore; the journals not restored yet are as they were", "why", err.Error())
			return nil
		}
		return err
	}
	gs, hs := newGRPCServer(srv, opts)
	hsrv, metricsAddr, err := startMetrics(&dc, srv)
	if err != nil {
		lis.Close()
		srv.Close()
		return err
	}
	vsrv, viewAddr, err := startView(&dc, srv)
	if err != nil {
		if hsrv != nil {
			hsrv.Close()
		}
		lis.Close()
		srv.Close()
		return err
	}
	serveErr := make(chan error, 1)
	go func() {
		serveErr <- gs.Serve(&acceptLog{Listener: srv.LimitConnections(userTimeout{lis}), log: dc.Logger})
	}()
	dc.Logger.Info("serving", "listen", lis.Addr().String(), "tls", dc.TLSCert != "", "mtls", dc.TLSClientCA != "", "token", dc.Token != "", "journal", dc.JournalDir, "metrics", metricsAddr, "view", viewAddr)
	if dc.ViewReady != nil && vsrv != nil {
		dc.ViewReady(viewAddr)
	}
	if dc.Ready != nil {
		dc.Ready(lis.Addr().String(), metricsAddr)
	}
	// The journal history that restore did not read is read while the
	// robots serve; Close stops it.
	srv.VerifyHistories()
	err = wait(ctx, &dc, serveErr, gs, hs, srv)
	for _, h := range []*http.Server{hsrv, vsrv} {
		if h != nil {
			h.Close()
		}
	}
	cerr := srv.Close()
	if cerr != nil {
		dc.Logger.Error("stopped; closing the journals failed", "err", cerr)
	} else {
		dc.Logger.Info("stopped; the journals are closed")
	}
	if err == nil {
		err = cerr
	}
	return err
}

// defaults fills the zero fields that have defaults.
func (dc *Config) defaults() {
	if dc.Listen == "" {
		dc.Listen = "127.0.0.1:7460"
	}
	if dc.MaxStreams == 0 {
		dc.MaxStreams = 1024
	}
	if dc.ShutdownGrace <= 0 {
		dc.ShutdownGrace = 5 * time.Second
	}
	if dc.HandshakeTimeout <= 0 {
		dc.HandshakeTimeout = 10 * time.Second
	}
	if dc.Logger == nil {
		dc.Logger = slog.Default()
	}
}

// keepaliveTimeout is how long the gRPC server waits for the answer to a
// keepalive ping, and for data it sent to be acknowledged (userTimeout),
// before it closes the connection.
const keepaliveTimeout = 10 * time.Second

// grpcOptions returns the options of the gRPC server: the service's own,
// keepalive, the token check and TLS.
func grpcOptions(dc *Config) ([]grpc.ServerOption, error) {
	opts, err := server.ServiceOptions(dc.MaxMessageBytes)
	if err != nil {
		return nil, err
	}
	opts = append(opts,
		grpc.MaxConcurrentStreams(dc.MaxStreams),
		grpc.ConnectionTimeout(dc.HandshakeTimeout),
		grpc.KeepaliveParams(keepalive.ServerParameters{Time: 30 * time.Second, Timeout: keepaliveTimeout}),
		grpc.KeepaliveEnforcementPolicy(keepalive.EnforcementPolicy{MinTime: 5 * time.Second, PermitWithoutStream: true}),
		grpc.UnaryInterceptor(func(ctx context.Context, req any, info *grpc.UnaryServerInfo, h grpc.UnaryHandler) (any, error) {
			if err := checkToken(ctx, info.FullMethod, dc.Token); err != nil {
				return nil, err
			}
			return h(ctx, req)
		}),
		grpc.StreamInterceptor(func(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, h grpc.StreamHandler) error {
			if err := checkToken(ss.Context(), info.FullMethod, dc.Token); err != nil {
				return err
			}
			return h(srv, ss)
		}),
	)
	if dc.TLSCert != "" || dc.TLSKey != "" {
		tc, err := LoadTLS(dc.TLSCert, dc.TLSKey, dc.TLSClientCA)
		if err != nil {
			return nil, err
		}
		logCertExpiry(dc.Logger, tc, time.Now())
		opts = append(opts, grpc.Creds(credentials.NewTLS(tc)))
	} else if dc.TLSClientCA != "" {
		return nil, errors.New("tls-client-ca needs tls-cert and tls-key")
	}
	return opts, nil
}

// startService makes the server, restores the robots of the journal and
// creates those of dc.Robots that it did not restore.
func startService(ctx context.Context, dc *Config) (*server.Server, error) {
	srv, err := server.New(dc.Options)
	if err != nil {
		return nil, err
	}
	if dc.JournalDir != "" {
		dc.Logger.Info("restoring the robots of the journal directory", "journal", dc.JournalDir)
	}
	reports, err := srv.RestoreContext(ctx)
	for _, r := range reports {
		dc.Logger.Info("restored", "robot", r.Robot, "state", r.State.String(), "inputs", r.Inputs, "torn", r.Torn, "detail", r.Detail)
	}
	if err != nil {
		srv.Close()
		return nil, err
	}
	for id, cfg := range dc.Robots {
		if got, err := srv.GetRobot(ctx, &pb.GetRobotRequest{Name: server.RobotName(id)}); err == nil {
			// The journal's configuration is the robot's; a file edited
			// since (calibrated, say) does not change it in silence.
			if have := got.GetRobot().GetConfig(); !proto.Equal(have, cfg) {
				dc.Logger.Warn("the robot's configuration file differs from its journal's, which it keeps; reckon create -replace changes it",
					"robot", got.GetRobot().GetName(), "differs_in", strings.Join(convert.DifferingFields(have, cfg), ","))
			}
			continue
		}
		if _, err := srv.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: id, Config: cfg}); err != nil {
			srv.Close()
			return nil, fmt.Errorf("robot %s: %w", id, err)
		}
	}
	return srv, nil
}

// newGRPCServer registers the service, health and reflection.
func newGRPCServer(srv *server.Server, opts []grpc.ServerOption) (*grpc.Server, *health.Server) {
	gs := grpc.NewServer(opts...)
	server.Register(gs, srv)
	hs := health.NewServer()
	hs.SetServingStatus("", healthpb.HealthCheckResponse_SERVING)
	hs.SetServingStatus(pb.FusionService_ServiceDesc.ServiceName, healthpb.HealthCheckResponse_SERVING)
	// Registered as reflection.Register and healthpb.RegisterHealthServer
	// do, with malformed requests answered INVALID_ARGUMENT rather than
	// grpc-go's INTERNAL.
	server.RegisterChecked(gs, &healthpb.Health_ServiceDesc, hs)
	ro := reflection.ServerOptions{Services: gs}
	server.RegisterChecked(gs, &reflectionv1.ServerReflection_ServiceDesc, reflection.NewServerV1(ro))
	server.RegisterChecked(gs, &reflectionv1alpha.ServerReflection_ServiceDesc, reflection.NewServer(ro))
	return gs, hs
}

// startMetrics serves the metrics over HTTP if dc.MetricsListen is set; it
// returns the HTTP server (nil if off) and its address.
// Its connections are bounded (server.LimitHTTPConnections), and each
// is timed: a request's header must come within 5 s and the whole request
// within 10 s, the answer must be taken within 30 s, and an idle
// connection is closed after a minute; without the idle timeout a
// connection kept alive after a scrape stayed open for as long as its
// client liked.
func startMetrics(dc *Config, srv *server.Server) (*http.Server, string, error) {
	if dc.MetricsListen == "" {
		return nil, "", nil
	}
	ml, err := net.Listen("tcp", dc.MetricsListen)
	if err != nil {
		return nil, "", fmt.Errorf("metrics-listen: %w", err)
	}
	mux := http.NewServeMux()
	mux.Handle("/metrics", dc.Metrics.Handler())
	hsrv := &http.Server{Handler: mux, ReadHeaderTimeout: 5 * time.Second, ReadTimeout: 10 * time.Second, WriteTimeout: 30 * time.Second,
		IdleTimeout: time.Minute, ErrorLog: httpErrorLog(dc.Logger, "metrics")}
	limited := srv.LimitHTTPConnections(ml, "metrics")
	go func() {
		if err := hsrv.Serve(limited); err != nil && !errors.Is(err, http.ErrServerClosed) {
			dc.Logger.Error("metrics server", "err", err)
		}
	}()
	return hsrv, ml.Addr().String(), nil
}

// httpErrorLog is the ErrorLog of the HTTP server named server: what
// net/http logs (a failed accept, a failed TLS handshake, a handler's
// panic) goes to the service's logger at warning level, with the server's
// name, rather than to the standard logger, which wrote it to standard
// error apart from the service's log.
func httpErrorLog(logger *slog.Logger, server string) *log.Logger {
	return slog.NewLogLogger(logger.With("server", server).Handler(), slog.LevelWarn)
}

// wait returns when the gRPC server fails (its error) or ctx is done (nil,
// after a graceful stop, hard after dc.ShutdownGrace).
//
// Once the journal directory is gone (Server.JournalDirGone), the health
// service says NOT_SERVING for the whole service and FusionService: every
// robot is quarantined and nothing new can be recorded until reckond is
// restarted on a journal directory.
func wait(ctx context.Context, dc *Config, serveErr <-chan error, gs *grpc.Server, hs *health.Server, srv *server.Server) error {
	gone := srv.JournalDirGone()
	for done := false; !done; {
		select {
		case err := <-serveErr:
			return err
		case <-gone:
			gone = nil
			hs.SetServingStatus("", healthpb.HealthCheckResponse_NOT_SERVING)
			hs.SetServingStatus(pb.FusionService_ServiceDesc.ServiceName, healthpb.HealthCheckResponse_NOT_SERVING)
			dc.Logger.Error("health: not serving, the journal directory is gone; restart reckond on a journal directory", "dir", dc.Options.JournalDir)
		case <-ctx.Done():
			done = true
		}
	}
	dc.Logger.Info("shutting down")
	hs.Shutdown()
	srv.EndStreams()
	stopped := make(chan struct{})
	go func() { gs.GracefulStop(); close(stopped) }()
	select {
	case <-stopped:
	case <-time.After(dc.ShutdownGrace):
		dc.Logger.Warn("graceful stop timed out; stopping")
		gs.Stop()
	}
	return nil
}

// acceptLog is the gRPC listener, logging when accepting connections
// starts to fail and when it works again. grpc-go retries a failed accept
// (EMFILE: the process has no file descriptor left) with a backoff and says
// nothing through slog; before, no client could connect and the log was
// silent. Serve calls Accept from one goroutine.
type acceptLog struct {
	net.Listener
	log      *slog.Logger
	failures int // since the last accept that succeeded
}

// Accept accepts a connection as the listener does.
func (l *acceptLog) Accept() (net.Conn, error) {
	c, err := l.Listener.Accept()
	switch {
	case err != nil && errors.Is(err, net.ErrClosed):
	case err != nil:
		if l.failures == 0 {
			msg := "accepting connections fails; no new client can connect until it works"
			if errors.Is(err, syscall.EMFILE) || errors.Is(err, syscall.ENFILE) {
				msg += " (no file descriptor left: raise ulimit -n, or LimitNOFILE= of its unit, or connect fewer clients)"
			}
			l.log.Error(msg, "listen", l.Addr().String(), "err", err)
		}
		l.failures++
	case l.failures > 0:
		l.log.Info("accepting connections works again", "listen", l.Addr().String(), "failures", l.failures)
		l.failures = 0
	}
	return c, err
}

// userTimeout is the gRPC listener under the connection limit: it sets
// TCP_USER_TIMEOUT to keepaliveTimeout on each connection it accepts, as
// grpc-go does with keepalive on, but only on a *net.TCPConn, which the
// limit's connections (server.LimitConnections) are not.
type userTimeout struct{ net.Listener }

// Accept accepts a connection as the listener does.
func (l userTimeout) Accept() (net.Conn, error) {
	c, err := l.Listener.Accept()
	if tc, ok := c.(*net.TCPConn); ok {
		// As grpc-go does, but a connection whose option cannot be set is
		// still served: the keepalive pings find a dead peer too.
		setUserTimeout(tc, keepaliveTimeout)
	}
	return c, err
}
