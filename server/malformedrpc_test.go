package server

import (
	"context"
	"math/rand/v2"
	"strings"
	"testing"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/reflect/protoreflect"

	pb "reckon.example/proto/reckon/v1"
)

// TestMalformedCallIsInvalidArgument: every rpc that receives one request
// (the unary ones and Watch), sent bytes that are not a valid encoding of
// its request (a string that is not UTF-8, at the top and inside a nested
// message; a field cut short; a tag of field 0), answers INVALID_ARGUMENT
// naming the request's type and the field at fault, and 200 seeded random
// byte strings each are answered by any code but INTERNAL and UNKNOWN (a
// string that happens to decode is an ordinary request). The robot is
// unchanged. Before, grpc-go answered every one of them INTERNAL ("grpc:
// failed to unmarshal the received message"), as though the service were
// at fault.
func TestMalformedCallIsInvalidArgument(t *testing.T) {
	conn, api, samp := serveCartOn(t, 2, 1)
	ctx := context.Background()
	sess, _ := openFeed(ctx, api, "robots/cart")
	applyAll(t, sess, samp)
	sess.close()
	before, err := api.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil {
		t.Fatal(err)
	}

	call := func(method string, stream bool, b []byte) error {
		if !stream {
			var out []byte
			return conn.Invoke(ctx, method, &b, &out, grpc.ForceCodec(rawReplyCodec{}))
		}
		cctx, cancel := context.WithCancel(ctx)
		defer cancel()
		st, err := conn.NewStream(cctx, &grpc.StreamDesc{ServerStreams: true}, method, grpc.ForceCodec(rawReplyCodec{}))
		if err != nil {
			return err
		}
		if err := st.SendMsg(&b); err != nil {
			return err
		}
		st.CloseSend()
		var out []byte
		return st.RecvMsg(&out)
	}
	service := pb.File_reckon_v1_fusion_service_proto.Services().ByName("FusionService")
	rng := rand.New(rand.NewPCG(27, 1))
	checked := 0
	for i := 0; i < service.Methods().Len(); i++ {
		m := service.Methods().Get(i)
		if m.IsStreamingClient() {
			continue // Ingest answers each request (TestMalformedRequestIsItsVerdict)
		}
		method := "/" + string(service.FullName()) + "/" + string(m.Name())
		in := m.Input()
		str, nested := firstString(in), nestedString(in)
		cases := []struct {
			name, want string
			b          []byte
		}{
			{"not UTF-8", string(str.Name()) + ": not valid UTF-8", stringField(str, "r\xff\xfe")},
			{"cut short", string(str.Name()) + ": cut short", stringField(str, "robots/cart")[:4]},
			{"field 0", "a field's tag", []byte{0x00, 0x01}},
		}
		if nested[0] != nil {
			cases = append(cases, struct {
				name, want string
				b          []byte
			}{"nested not UTF-8", string(nested[0].Name()) + "." + string(nested[1].Name()) + ": not valid UTF-8",
				protowire.AppendBytes(protowire.AppendTag(nil, nested[0].Number(), protowire.BytesType), stringField(nested[1], "\xc0"))})
		}
		for _, c := range cases {
			err := call(method, m.IsStreamingServer(), c.b)
			s := status.Convert(err)
			if s.Code() != codes.InvalidArgument || !strings.Contains(s.Message(), "not a valid "+string(in.FullName())) ||
				!strings.Contains(s.Message(), c.want) {
				t.Errorf("%s, %s: %v; want INVALID_ARGUMENT naming %s and %q", m.Name(), c.name, err, in.FullName(), c.want)
			}
			checked++
		}
		for k := 0; k < 200; k++ {
			b := make([]byte, rng.IntN(40))
			for j := range b {
				b[j] = byte(rng.Uint32())
			}
			if err := call(method, m.IsStreamingServer(), b); status.Code(err) == codes.Internal || status.Code(err) == codes.Unknown {
				t.Errorf("%s, random bytes %x: %v", m.Name(), b, err)
			}
			checked++
		}
	}
	t.Logf("%d malformed and random requests", checked)
	after, err := api.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil || after.GetRobot().GetInputCount() != before.GetRobot().GetInputCount() {
		t.Errorf("robot after: %v %v, before %v", after.GetRobot(), err, before.GetRobot())
	}
}

// serveCartOn serves a new service with a journal for the test, creates
// robots/cart on it from cartRun(seed, seconds) and returns a connection,
// a client on it and the run's samples.
func serveCartOn(t *testing.T, seed uint64, seconds float64) (*grpc.ClientConn, pb.FusionServiceClient, []*pb.Sample) {
	t.Helper()
	srv := start(t, testConfig{Options: Options{JournalDir: t.TempDir()}})
	t.Cleanup(srv.stop)
	conn, err := connect(srv.addr)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	api := pb.NewFusionServiceClient(conn)
	samp, cfg := cartRun(seed, seconds)
	if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	return conn, api, samp
}

// rawReplyCodec sends a []byte as it is and keeps the reply's bytes.
type rawReplyCodec struct{}

func (rawReplyCodec) Marshal(v any) ([]byte, error) { return *v.(*[]byte), nil }
func (rawReplyCodec) Unmarshal(data []byte, v any) error {
	*v.(*[]byte) = append([]byte(nil), data...)
	return nil
}
func (rawReplyCodec) Name() string { return "proto" }

// firstString is md's first string field.
func firstString(md protoreflect.MessageDescriptor) protoreflect.FieldDescriptor {
	for i := 0; i < md.Fields().Len(); i++ {
		if fd := md.Fields().Get(i); fd.Kind() == protoreflect.StringKind && !fd.IsList() {
			return fd
		}
	}
	panic("no string field in " + md.FullName())
}

// nestedString is md's first message field with a string field, and
// that field (nil, nil if none).
func nestedString(md protoreflect.MessageDescriptor) [2]protoreflect.FieldDescriptor {
	for i := 0; i < md.Fields().Len(); i++ {
		fd := md.Fields().Get(i)
		if fd.Kind() != protoreflect.MessageKind {
			continue
		}
		sub := fd.Message()
		for j := 0; j < sub.Fields().Len(); j++ {
			if s := sub.Fields().Get(j); s.Kind() == protoreflect.StringKind && !s.IsList() {
				return [2]protoreflect.FieldDescriptor{fd, s}
			}
		}
	}
	return [2]protoreflect.FieldDescriptor{}
}

func stringField(fd protoreflect.FieldDescriptor, v string) []byte {
	return protowire.AppendString(protowire.AppendTag(nil, fd.Number(), protowire.BytesType), v)
}
