package daemon

import (
	"context"
	"os"
	"path/filepath"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
)

// TestHealthNotServingWhenJournalDirGone: once the journal directory is
// removed under a running daemon (every robot then quarantined, nothing
// can be recorded), gRPC's health service says NOT_SERVING, for the whole
// service and for FusionService, so that a supervisor or load balancer
// sees it. Before, it said SERVING to the end (the fault probe of session
// 23 noticed it), and only the log said otherwise.
func TestHealthNotServingWhenJournalDirGone(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "journal")
	r := start(t, Config{Options: server.Options{JournalDir: dir, SyncInterval: 5 * time.Millisecond}})
	defer r.stop()
	conn, err := grpc.NewClient(r.addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	hc := healthpb.NewHealthClient(conn)
	ctx := context.Background()
	status := func(service string) healthpb.HealthCheckResponse_ServingStatus {
		resp, err := hc.Check(ctx, &healthpb.HealthCheckRequest{Service: service})
		if err != nil {
			t.Fatalf("health check of %q: %v", service, err)
		}
		return resp.GetStatus()
	}
	services := []string{"", pb.FusionService_ServiceDesc.ServiceName}
	for _, svc := range services {
		if got := status(svc); got != healthpb.HealthCheckResponse_SERVING {
			t.Fatalf("before: %q is %v", svc, got)
		}
	}
	if err := os.RemoveAll(dir); err != nil {
		t.Fatal(err)
	}
	for _, svc := range services {
		got := status(svc)
		for deadline := time.Now().Add(10 * time.Second); got == healthpb.HealthCheckResponse_SERVING && time.Now().Before(deadline); time.Sleep(10 * time.Millisecond) {
			got = status(svc)
		}
		if got != healthpb.HealthCheckResponse_NOT_SERVING {
			t.Errorf("after the journal directory was removed: %q is %v, want NOT_SERVING", svc, got)
		}
	}
}
