package daemon

import (
	"context"
	"strings"
	"testing"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	reflectionv1 "google.golang.org/grpc/reflection/grpc_reflection_v1"
	reflectionv1alpha "google.golang.org/grpc/reflection/grpc_reflection_v1alpha"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/reflect/protoreflect"

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

// TestMalformedHealthAndReflection: reckond answers a request to gRPC's
// health service (Check, List, Watch) or its reflection service (v1 and
// v1alpha) whose bytes are not a valid encoding of the request (a string
// that is not UTF-8; a tag of field 0) INVALID_ARGUMENT naming the
// request's type and the field (before, INTERNAL, grpc-go's answer to a
// codec's error); well-formed requests are answered as before (health
// SERVING, reflection listing reckon.v1.FusionService).
func TestMalformedHealthAndReflection(t *testing.T) {
	srv := start(t, Config{Options: server.Options{JournalDir: t.TempDir()}})
	defer srv.stop()
	conn, err := grpc.NewClient(srv.addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	ctx := context.Background()
	call := func(method string, md protoreflect.MethodDescriptor, b []byte) ([]byte, error) {
		var out []byte
		if !md.IsStreamingClient() && !md.IsStreamingServer() {
			err := conn.Invoke(ctx, method, &b, &out, grpc.ForceCodec(rawBytes{}))
			return out, err
		}
		cctx, cancel := context.WithCancel(ctx)
		defer cancel()
		st, err := conn.NewStream(cctx, &grpc.StreamDesc{ServerStreams: true, ClientStreams: md.IsStreamingClient()}, method, grpc.ForceCodec(rawBytes{}))
		if err != nil {
			return nil, err
		}
		if err := st.SendMsg(&b); err != nil {
			return nil, err
		}
		st.CloseSend()
		err = st.RecvMsg(&out)
		return out, err
	}
	files := []protoreflect.FileDescriptor{healthpb.File_grpc_health_v1_health_proto,
		reflectionv1.File_grpc_reflection_v1_reflection_proto, reflectionv1alpha.File_grpc_reflection_v1alpha_reflection_proto}
	checked := 0
	for _, f := range files {
		sd := f.Services().Get(0)
		for i := 0; i < sd.Methods().Len(); i++ {
			m := sd.Methods().Get(i)
			method := "/" + string(sd.FullName()) + "/" + string(m.Name())
			in := m.Input()
			cases := [][2]string{{"a field's tag", "\x00\x01"}}
			for j := 0; j < in.Fields().Len(); j++ {
				if fd := in.Fields().Get(j); fd.Kind() == protoreflect.StringKind && !fd.IsList() {
					b := protowire.AppendString(protowire.AppendTag(nil, fd.Number(), protowire.BytesType), "r\xff\xfe")
					cases = append(cases, [2]string{string(fd.Name()) + ": not valid UTF-8", string(b)})
					break
				}
			}
			for _, c := range cases {
				_, err := call(method, m, []byte(c[1]))
				s := status.Convert(err)
				if s.Code() != codes.InvalidArgument || !strings.Contains(s.Message(), "not a valid "+string(in.FullName())+" encoding") ||
					!strings.Contains(s.Message(), c[0]) {
					t.Errorf("%s, bytes %q: %v; want INVALID_ARGUMENT naming %s and %q", method, c[1], err, in.FullName(), c[0])
				}
				checked++
			}
		}
	}
	if checked < 7 {
		t.Fatalf("%d malformed requests checked; the services have more methods", checked)
	}
	// Well-formed requests are served as before.
	hc, err := healthpb.NewHealthClient(conn).Check(ctx, &healthpb.HealthCheckRequest{Service: "reckon.v1.FusionService"})
	if err != nil || hc.GetStatus() != healthpb.HealthCheckResponse_SERVING {
		t.Errorf("health check: %v, %v", hc, err)
	}
	rs, err := reflectionv1.NewServerReflectionClient(conn).ServerReflectionInfo(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if err := rs.Send(&reflectionv1.ServerReflectionRequest{MessageRequest: &reflectionv1.ServerReflectionRequest_ListServices{}}); err != nil {
		t.Fatal(err)
	}
	resp, err := rs.Recv()
	if err != nil || !strings.Contains(resp.GetListServicesResponse().String(), "reckon.v1.FusionService") {
		t.Errorf("reflection lists %v, %v; want reckon.v1.FusionService among them", resp.GetListServicesResponse(), err)
	}
	rs.CloseSend()
}
