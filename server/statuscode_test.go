package server

import (
	"testing"

	"google.golang.org/grpc/codes"

	"reckon.example/server/convert"
)

// TestStatusCodeNumbers: the numbers convert writes into
// IngestResponse.status_code offline are the gRPC codes the service means.
func TestStatusCodeNumbers(t *testing.T) {
	for _, c := range []struct {
		got  int32
		want codes.Code
	}{
		{convert.CodeOK, codes.OK},
		{convert.CodeInvalidArgument, codes.InvalidArgument},
		{convert.CodeNotFound, codes.NotFound},
		{convert.CodeFailedPrecondition, codes.FailedPrecondition},
		{convert.CodeOutOfRange, codes.OutOfRange},
	} {
		if codes.Code(c.got) != c.want {
			t.Errorf("%v is %d in convert", c.want, c.got)
		}
	}
}
