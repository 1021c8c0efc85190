package server

import (
	"context"
	"crypto/subtle"
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"os"
	"strings"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/health"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/keepalive"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/reflection"
	"google.golang.org/grpc/status"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// DaemonConfig configures Serve. Zero fields take the defaults given.
type DaemonConfig struct {
	// Listen is the gRPC address (default 127.0.0.1:7460: loopback only).
	Listen string
	Options
	// TLSCert and TLSKey are PEM files; with them the service speaks TLS.
	TLSCert, TLSKey string
	// TLSClientCA, a PEM file, makes it require client certificates
	// signed by that CA (mutual TLS).
	TLSClientCA string
	// Token, if set, is required as "authorization: Bearer <token>" on every
	// call except health checks.
	Token string
	// MetricsListen serves Prometheus metrics at /metrics ("" = off).
	MetricsListen string
	// MaxMessageBytes bounds one received message (default 64 KiB, at most
	// half of journal.MaxRecordBytes, so that a sample always fits its journal
	// record).
	MaxMessageBytes int
	// ShutdownGrace bounds the graceful stop before a hard stop (5 s).
	ShutdownGrace time.Duration
	// Ready, if set, is called with the bound addresses once serving.
	Ready func(grpcAddr, metricsAddr string)
	// Robots are created at start if the journal did not restore them.
	Robots map[string]*pb.RobotConfig
}

// ServerTLS loads the server's TLS configuration.
func ServerTLS(cert, key, clientCA string) (*tls.Config, error) {
	pair, err := tls.LoadX509KeyPair(cert, key)
	if err != nil {
		return nil, fmt.Errorf("tls-cert/tls-key: %w", err)
	}
	cfg := &tls.Config{Certificates: []tls.Certificate{pair}, MinVersion: tls.VersionTLS12}
	if clientCA != "" {
		pem, err := os.ReadFile(clientCA)
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
		if got, ok := strings.CutPrefix(v, "Bearer "); ok && subtle.ConstantTimeCompare([]byte(got), []byte(token)) == 1 {
			return nil
		}
	}
	return status.Error(codes.Unauthenticated, "authorization: a valid bearer token is required")
}

// Serve runs the service until ctx is done, then stops gracefully (hard after
// ShutdownGrace) and flushes the journals.
func Serve(ctx context.Context, dc DaemonConfig) error {
	if dc.Listen == "" {
		dc.Listen = "127.0.0.1:7460"
	}
	if dc.MaxMessageBytes <= 0 {
		dc.MaxMessageBytes = 64 << 10
	}
	if limit := journal.MaxRecordBytes / 2; dc.MaxMessageBytes > limit {
		// A sample must fit a journal record, or taking it would stop the
		// robot (its input could not be journaled).
		return fmt.Errorf("max message bytes %d exceeds %d, half the journal's record limit", dc.MaxMessageBytes, limit)
	}
	if dc.ShutdownGrace <= 0 {
		dc.ShutdownGrace = 5 * time.Second
	}
	log := dc.Logger
	if log == nil {
		log = slog.Default()
		dc.Logger = log
	}
	opts := []grpc.ServerOption{
		grpc.MaxRecvMsgSize(dc.MaxMessageBytes),
		// Ingest keeps the bytes a sample arrived as for the journal and
		// sends verdicts as the bytes it journaled (codec.go).
		grpc.ForceServerCodecV2(newCodec()),
		grpc.MaxConcurrentStreams(1024),
		grpc.KeepaliveParams(keepalive.ServerParameters{Time: 30 * time.Second, Timeout: 10 * time.Second}),
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
	}
	if dc.TLSCert != "" || dc.TLSKey != "" {
		tc, err := ServerTLS(dc.TLSCert, dc.TLSKey, dc.TLSClientCA)
		if err != nil {
			return err
		}
		opts = append(opts, grpc.Creds(credentials.NewTLS(tc)))
	} else if dc.TLSClientCA != "" {
		return errors.New("tls-client-ca needs tls-cert and tls-key")
	}
	if dc.MetricsListen != "" && dc.Metrics == nil {
		dc.Metrics = NewMetrics()
	}
	srv, err := New(dc.Options)
	if err != nil {
		return err
	}
	reports, err := srv.Restore()
	for _, r := range reports {
		log.Info("restored", "robot", r.Robot, "inputs", r.Inputs, "torn", r.Torn)
	}
	if err != nil {
		srv.Close()
		return err
	}
	for id, cfg := range dc.Robots {
		if _, err := srv.lookup(RobotName(id)); err == nil {
			continue
		}
		if _, err := srv.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: id, Config: cfg}); err != nil {
			srv.Close()
			return fmt.Errorf("robot %s: %w", id, err)
		}
	}
	lis, err := net.Listen("tcp", dc.Listen)
	if err != nil {
		srv.Close()
		return err
	}
	gs := grpc.NewServer(opts...)
	pb.RegisterFusionServiceServer(gs, srv)
	hs := health.NewServer()
	hs.SetServingStatus("", healthpb.HealthCheckResponse_SERVING)
	hs.SetServingStatus(pb.FusionService_ServiceDesc.ServiceName, healthpb.HealthCheckResponse_SERVING)
	healthpb.RegisterHealthServer(gs, hs)
	reflection.Register(gs)

	var metricsAddr string
	var hsrv *http.Server
	if dc.MetricsListen != "" {
		ml, err := net.Listen("tcp", dc.MetricsListen)
		if err != nil {
			lis.Close()
			srv.Close()
			return fmt.Errorf("metrics-listen: %w", err)
		}
		mux := http.NewServeMux()
		mux.Handle("/metrics", dc.Metrics.Handler())
		hsrv = &http.Server{Handler: mux, ReadHeaderTimeout: 5 * time.Second}
		metricsAddr = ml.Addr().String()
		go func() {
			if err := hsrv.Serve(ml); err != nil && !errors.Is(err, http.ErrServerClosed) {
				log.Error("metrics server", "err", err)
			}
		}()
	}
	serveErr := make(chan error, 1)
	go func() { serveErr <- gs.Serve(lis) }()
	log.Info("serving", "listen", lis.Addr().String(), "tls", dc.TLSCert != "", "mtls", dc.TLSClientCA != "", "token", dc.Token != "", "journal", dc.JournalDir, "metrics", metricsAddr)
	if dc.Ready != nil {
		dc.Ready(lis.Addr().String(), metricsAddr)
	}
	select {
	case err = <-serveErr:
	case <-ctx.Done():
		log.Info("shutting down")
		hs.Shutdown()
		srv.EndWatches()
		stopped := make(chan struct{})
		go func() { gs.GracefulStop(); close(stopped) }()
		select {
		case <-stopped:
		case <-time.After(dc.ShutdownGrace):
			log.Warn("graceful stop timed out; stopping")
			gs.Stop()
		}
		err = nil
	}
	if hsrv != nil {
		hsrv.Close()
	}
	if cerr := srv.Close(); err == nil {
		err = cerr
	}
	return err
}
