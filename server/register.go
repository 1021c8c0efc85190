package server

import (
	"context"
	"errors"
	"fmt"
	"strconv"
	"unicode/utf8"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/mem"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/reflect/protoreflect"

	pb "reckon.example/proto/reckon/v1"
)

// Register registers s on gs as the FusionService, with every request
// message that is not a valid protobuf encoding of its type (a string that
// is not UTF-8, a field cut short) answered INVALID_ARGUMENT naming the
// field and what is wrong with it, and nothing done; one past the codec's
// size limit is RESOURCE_EXHAUSTED naming its size and the limit. grpc-go
// answers a codec's unmarshal error INTERNAL ("grpc: failed to unmarshal
// the received message", rpc_util.go's recv, in grpc-go 1.85), as though
// the service were at fault. The ingest stream's requests are answered one by one
// (REFUSAL_MALFORMED, REFUSAL_LIMIT; codec.go) and are not touched here.
//
// The mapping needs the service's codec (ServiceOptions): it hands the
// decoding error back beside the message rather than through grpc-go's
// status. Under another codec a malformed request is INTERNAL as before.
func Register(gs grpc.ServiceRegistrar, s pb.FusionServiceServer) {
	gs.RegisterService(checkedServiceDesc(&pb.FusionService_ServiceDesc, false), s)
}

// RegisterChecked registers impl on gs as the service desc describes, each
// request that is not a valid protobuf encoding of its type answered
// INVALID_ARGUMENT naming the field, as Register does, on every rpc and
// on each message of a stream (which then ends with it). reckond registers
// gRPC's health and reflection services so, which grpc-go would answer
// INTERNAL. It needs the service's codec too (ServiceOptions).
func RegisterChecked(gs grpc.ServiceRegistrar, desc *grpc.ServiceDesc, impl any) {
	gs.RegisterService(checkedServiceDesc(desc, true), impl)
}

// checkedServiceDesc is desc with its unary handlers, and the handlers of
// its streams, decoding through checkedDecode: the streams whose client
// sends one request (Watch) only, unless clientStreams (the ingest
// stream's requests are answered one by one, codec.go).
func checkedServiceDesc(desc *grpc.ServiceDesc, clientStreams bool) *grpc.ServiceDesc {
	sd := *desc
	sd.Methods = make([]grpc.MethodDesc, len(desc.Methods))
	for i, md := range desc.Methods {
		md.Handler = checkedHandler(md.Handler, "/"+sd.ServiceName+"/"+md.MethodName)
		sd.Methods[i] = md
	}
	sd.Streams = make([]grpc.StreamDesc, len(desc.Streams))
	for i, d := range desc.Streams {
		if !d.ClientStreams || clientStreams {
			h := d.Handler
			d.Handler = func(srv any, ss grpc.ServerStream) error { return h(srv, checkedStream{ss}) }
		}
		sd.Streams[i] = d
	}
	return &sd
}

// checkedHandler is the unary handler h, of the method named full, whose
// request is decoded by checkedDecode. A malformed request is answered by
// the interceptor too, as h would have it answered (the token check
// first: without a token the call is UNAUTHENTICATED, whatever its bytes),
// but with a handler that refuses the request instead of running the
// method on what part of it decoded.
func checkedHandler(h grpc.MethodHandler, full string) grpc.MethodHandler {
	return func(srv any, ctx context.Context, dec func(any) error, ic grpc.UnaryServerInterceptor) (any, error) {
		var bad error
		resp, err := h(srv, ctx, func(v any) error {
			err := checkedDecode(dec, v)
			if errors.As(err, new(malformedError)) {
				bad = err
			}
			return err
		}, ic)
		if bad == nil || ic == nil {
			return resp, err
		}
		return ic(ctx, nil, &grpc.UnaryServerInfo{Server: srv, FullMethod: full},
			func(context.Context, any) (any, error) { return nil, bad })
	}
}

// checkedStream is a server stream whose requests are decoded through
// checkedDecode.
type checkedStream struct{ grpc.ServerStream }

func (s checkedStream) RecvMsg(m any) error { return checkedDecode(s.ServerStream.RecvMsg, m) }

// unaryRequest carries a request message through the service's codec,
// which decodes into the embedded message and leaves its error in err
// instead of returning it to grpc-go. Through the embedded message it is a
// proto.Message itself, so that another codec decodes it as it would the
// message.
type unaryRequest struct {
	proto.Message
	err error
}

// checkedDecode decodes a request with dec, grpc-go's, through
// unaryRequest, and turns the codec's decoding error into
// INVALID_ARGUMENT. Errors grpc-go finds before the codec (a message past
// the size limit, a compression it cannot undo) keep their own status.
func checkedDecode(dec func(any) error, v any) error {
	m, ok := v.(proto.Message)
	if !ok {
		return dec(v)
	}
	u := unaryRequest{Message: m}
	if err := dec(&u); err != nil {
		return err
	}
	if big, ok := u.err.(tooLargeError); ok {
		return malformedError{status.Newf(codes.ResourceExhausted, "request: a %s of %d bytes exceeds the limit of %d (-max-message-bytes); nothing was done",
			m.ProtoReflect().Descriptor().FullName(), big.size, big.max)}
	}
	if u.err != nil {
		return malformedError{status.Newf(codes.InvalidArgument, "request: not a valid %s encoding (%v); nothing was done",
			m.ProtoReflect().Descriptor().FullName(), u.err)}
	}
	return nil
}

// malformedError is checkedDecode's INVALID_ARGUMENT for a request that is
// not a valid encoding of its type.
type malformedError struct{ st *status.Status }

func (e malformedError) Error() string              { return e.st.Err().Error() }
func (e malformedError) GRPCStatus() *status.Status { return e.st }

// decodeUnary decodes data into u's message; it is codec.Unmarshal's for
// a unaryRequest. An error names the field at fault where wireFault finds
// it, then protobuf-go's own words.
func (c codec) decodeUnary(data mem.BufferSlice, u *unaryRequest) {
	err := c.std.Unmarshal(data, u.Message)
	if err == nil {
		return
	}
	b := data.Materialize()
	if where := wireFault(b, u.Message.ProtoReflect().Descriptor(), ""); where != "" {
		err = fmt.Errorf("%s: %w", where, err)
	}
	u.err = err
}

// wireFault walks the protobuf encoding b of a message of type md and
// names the first field whose encoding is at fault, with what is wrong
// ("config.wheels: field cut short (unexpected EOF)"), or says nothing if
// it finds none (protobuf-go's error then stands alone). path is the
// field path of b itself ("" at the top).
func wireFault(b []byte, md protoreflect.MessageDescriptor, path string) string {
	for len(b) > 0 {
		num, typ, n := protowire.ConsumeTag(b)
		if n < 0 {
			return join(path, "a field's tag") + ": " + protowire.ParseError(n).Error()
		}
		b = b[n:]
		fd := md.Fields().ByNumber(num)
		name := join(path, "field "+strconv.Itoa(int(num)))
		if fd != nil {
			name = join(path, string(fd.Name()))
		}
		n = protowire.ConsumeFieldValue(num, typ, b)
		if n < 0 {
			return name + ": cut short or invalid (" + protowire.ParseError(n).Error() + ")"
		}
		if fd != nil && typ == protowire.BytesType {
			v, _ := protowire.ConsumeBytes(b)
			switch fd.Kind() {
			case protoreflect.StringKind:
				if !utf8.Valid(v) {
					return name + ": not valid UTF-8"
				}
			case protoreflect.MessageKind:
				if where := wireFault(v, fd.Message(), name); where != "" {
					return where
				}
			}
		}
		b = b[n:]
	}
	return ""
}

func join(path, name string) string {
	if path == "" {
		return name
	}
	return path + "." + name
}
