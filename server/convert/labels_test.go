package convert

import (
	"strings"
	"testing"

	"google.golang.org/protobuf/reflect/protoreflect"
	"google.golang.org/protobuf/reflect/protoregistry"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
)

// row is a label table row without its Go value.
type row struct {
	name  string
	proto int32
}

func rows[T comparable](table []fusion.Label[T]) []row {
	var out []row
	for _, l := range table {
		out = append(out, row{l.Name, l.Proto})
	}
	return out
}

// TestLabelTablesMatchProto walks every enum of the wire API and every label
// table of package fusion and checks that they agree both ways: each wire
// value but UNSPECIFIED has exactly one row with its number, labelled with
// the value name's lowercase suffix, and each row names a wire value.
func TestLabelTablesMatchProto(t *testing.T) {
	tables := map[protoreflect.FullName][]row{
		pb.Verdict(0).Descriptor().FullName():            rows(fusion.VerdictLabels()),
		pb.EventKind(0).Descriptor().FullName():          rows(fusion.EventKindLabels()),
		pb.DistrustReason(0).Descriptor().FullName():     rows(fusion.TrustReasonLabels()),
		pb.FixKind(0).Descriptor().FullName():            rows(fusion.FixKindLabels()),
		pb.InputKind(0).Descriptor().FullName():          rows(fusion.InputKindLabels()),
		pb.ConsistencyVerdict(0).Descriptor().FullName(): rows(fusion.ConsistencyVerdictLabels()),
		pb.ImuMode(0).Descriptor().FullName():            rows(fusion.IMUModeLabels()),
		pb.RobotState(0).Descriptor().FullName():         rows(RobotStateLabels()),
		pb.Refusal(0).Descriptor().FullName():            rows(RefusalLabels()),
		pb.RobustLoss(0).Descriptor().FullName():         rows(fusion.RobustLossLabels()),
	}
	seen := map[protoreflect.FullName]bool{}
	var walk func(protoreflect.EnumDescriptors)
	walk = func(enums protoreflect.EnumDescriptors) {
		for i := 0; i < enums.Len(); i++ {
			checkEnum(t, enums.Get(i), tables)
			seen[enums.Get(i).FullName()] = true
		}
	}
	var walkMsgs func(protoreflect.MessageDescriptors)
	walkMsgs = func(msgs protoreflect.MessageDescriptors) {
		for i := 0; i < msgs.Len(); i++ {
			walk(msgs.Get(i).Enums())
			walkMsgs(msgs.Get(i).Messages())
		}
	}
	files := 0
	protoregistry.GlobalFiles.RangeFilesByPackage("reckon.v1", func(fd protoreflect.FileDescriptor) bool {
		files++
		walk(fd.Enums())
		walkMsgs(fd.Messages())
		return true
	})
	if files == 0 {
		t.Fatal("no files of package reckon.v1 registered")
	}
	for name := range tables {
		if !seen[name] {
			t.Errorf("label table for %s, which the wire API does not declare", name)
		}
	}
}

func checkEnum(t *testing.T, ed protoreflect.EnumDescriptor, tables map[protoreflect.FullName][]row) {
	t.Helper()
	table, ok := tables[ed.FullName()]
	if !ok {
		t.Errorf("wire enum %s has no label table in package fusion", ed.FullName())
		return
	}
	vals := ed.Values()
	unspec := vals.ByNumber(0)
	if unspec == nil || !strings.HasSuffix(string(unspec.Name()), "_UNSPECIFIED") {
		t.Errorf("%s: value 0 is not *_UNSPECIFIED", ed.FullName())
		return
	}
	prefix := strings.TrimSuffix(string(unspec.Name()), "UNSPECIFIED")
	for i := 0; i < vals.Len(); i++ {
		v := vals.Get(i)
		if v.Number() == 0 {
			continue
		}
		want := strings.ToLower(strings.TrimPrefix(string(v.Name()), prefix))
		var found []row
		for _, r := range table {
			if r.proto == int32(v.Number()) {
				found = append(found, r)
			}
		}
		if len(found) != 1 {
			t.Errorf("%s: %d rows for %s = %d, want 1", ed.FullName(), len(found), v.Name(), v.Number())
			continue
		}
		if found[0].name != want {
			t.Errorf("%s: %s is labelled %q, want %q", ed.FullName(), v.Name(), found[0].name, want)
		}
	}
	labels := map[string]bool{}
	for _, r := range table {
		if r.proto == 0 || vals.ByNumber(protoreflect.EnumNumber(r.proto)) == nil {
			t.Errorf("%s: row %q has wire number %d, which the enum does not declare", ed.FullName(), r.name, r.proto)
		}
		if labels[r.name] {
			t.Errorf("%s: label %q appears twice", ed.FullName(), r.name)
		}
		labels[r.name] = true
	}
}

// TestDistrustToProto maps every single reason and a set through the
// table, not through bit positions.
func TestDistrustToProto(t *testing.T) {
	for _, l := range fusion.TrustReasonLabels() {
		got := DistrustToProto(l.Value)
		if len(got) != 1 || int32(got[0]) != l.Proto || DistrustName(got[0]) != l.Name {
			t.Errorf("%s: got %v", l.Name, got)
		}
	}
	got := DistrustToProto(fusion.TrustNoOdometry | fusion.TrustNumericalFault)
	want := []pb.DistrustReason{pb.DistrustReason_DISTRUST_REASON_NO_ODOMETRY, pb.DistrustReason_DISTRUST_REASON_NUMERICAL_FAULT}
	if len(got) != 2 || got[0] != want[0] || got[1] != want[1] {
		t.Errorf("two reasons: got %v, want %v", got, want)
	}
	if s := (fusion.TrustNoOdometry | fusion.TrustNumericalFault).String(); s != "no_odometry,numerical_fault" {
		t.Errorf("String: %q", s)
	}
}
