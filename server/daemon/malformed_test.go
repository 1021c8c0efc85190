package daemon

import (
	"context"
	"strings"
	"testing"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"

	"reckon.example/server"
)

// rawBytes sends a []byte as it is and keeps the reply's bytes.
type rawBytes struct{}

func (rawBytes) Marshal(v any) ([]byte, error) { return *v.(*[]byte), nil }
func (rawBytes) Unmarshal(data []byte, v any) error {
	*v.(*[]byte) = append([]byte(nil), data...)
	return nil
}
func (rawBytes) Name() string { return "proto" }

// TestMalformedCallChecksTokenFirst: reckond answers a CreateRobot whose
// bytes are not a CreateRobotRequest (a robot id that is not UTF-8)
// INVALID_ARGUMENT naming the field when the call carries the token, and
// UNAUTHENTICATED when it does not, as any call without it (before, INTERNAL
// both ways: grpc-go's answer to a codec's error, before the token check).
func TestMalformedCallChecksTokenFirst(t *testing.T) {
	srv := start(t, Config{Token: "greenhouse-7", Options: server.Options{JournalDir: t.TempDir()}})
	defer srv.stop()
	conn, err := grpc.NewClient(srv.addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	bad := []byte{0x0a, 3, 'r', 0xff, 0xfe} // robot_id: "r\xff\xfe"
	for _, c := range []struct {
		token string
		code  codes.Code
		want  string
	}{
		{"greenhouse-7", codes.InvalidArgument, "not a valid reckon.v1.CreateRobotRequest encoding (robot_id: not valid UTF-8"},
		{"", codes.Unauthenticated, ""},
		{"guess", codes.Unauthenticated, ""},
	} {
		var out []byte
		opts := []grpc.CallOption{grpc.ForceCodec(rawBytes{})}
		if c.token != "" {
			opts = append(opts, grpc.PerRPCCredentials(bearer(c.token)))
		}
		err := conn.Invoke(context.Background(), "/reckon.v1.FusionService/CreateRobot", &bad, &out, opts...)
		if s := status.Convert(err); s.Code() != c.code || !strings.Contains(s.Message(), c.want) {
			t.Errorf("token %q: %v, want %v %q", c.token, err, c.code, c.want)
		}
	}
}
