package main

import (
	"strconv"
	"strings"

	"go.yaml.in/yaml/v3"
	"google.golang.org/protobuf/reflect/protoreflect"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// configYAML writes a robot configuration as the YAML that
// convert.LoadConfigYAML reads: the fields set, in the order of
// reckon.v1.RobotConfig, enum values short ("absolute"), numbers plain
// (LoadConfigYAML refuses quoted ones, which protojson writes for 64-bit
// integers), and the result checked to load back to the same message.
func configYAML(c *pb.RobotConfig, comment string) ([]byte, error) {
	root := messageNode(c.ProtoReflect())
	root.HeadComment = comment
	var b strings.Builder
	enc := yaml.NewEncoder(&b)
	enc.SetIndent(2)
	if err := enc.Encode(&yaml.Node{Kind: yaml.DocumentNode, Content: []*yaml.Node{root}}); err != nil {
		return nil, err
	}
	if err := enc.Close(); err != nil {
		return nil, err
	}
	if _, _, err := convert.LoadConfigYAML([]byte(b.String())); err != nil {
		return nil, err
	}
	return []byte(b.String()), nil
}

// messageNode is a message as a block mapping of its populated fields;
// sub-messages of at most five fields, all scalars (a wheel, a mount), are
// written in flow style, one line each.
func messageNode(m protoreflect.Message) *yaml.Node {
	n := &yaml.Node{Kind: yaml.MappingNode, Tag: "!!map"}
	flow := true
	fields := m.Descriptor().Fields()
	for i := 0; i < fields.Len(); i++ {
		fd := fields.Get(i)
		if !m.Has(fd) {
			continue
		}
		var v *yaml.Node
		switch {
		case fd.IsList():
			l := m.Get(fd).List()
			v = &yaml.Node{Kind: yaml.SequenceNode, Tag: "!!seq", Style: yaml.FlowStyle}
			for j := 0; j < l.Len(); j++ {
				if fd.Message() != nil {
					v.Style = 0
					v.Content = append(v.Content, messageNode(l.Get(j).Message()))
				} else {
					v.Content = append(v.Content, scalarNode(fd, l.Get(j)))
				}
			}
			flow = false
		case fd.Message() != nil:
			v = messageNode(m.Get(fd).Message())
			flow = false
		default:
			v = scalarNode(fd, m.Get(fd))
		}
		n.Content = append(n.Content, &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!str", Value: string(fd.Name())}, v)
	}
	if flow && len(n.Content) > 0 && len(n.Content) <= 2*5 {
		n.Style = yaml.FlowStyle
	}
	return n
}

// scalarNode is one value of a scalar field, tagged so that the encoder
// writes it unquoted unless it is text.
func scalarNode(fd protoreflect.FieldDescriptor, v protoreflect.Value) *yaml.Node {
	switch fd.Kind() {
	case protoreflect.BoolKind:
		return &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!bool", Value: strconv.FormatBool(v.Bool())}
	case protoreflect.DoubleKind, protoreflect.FloatKind:
		s := strconv.FormatFloat(v.Float(), 'g', -1, 64)
		if !strings.ContainsAny(s, ".eEn") { // 40000 reads back as a number either way; keep it short
			return &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!int", Value: s}
		}
		return &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!float", Value: s}
	case protoreflect.StringKind:
		return &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!str", Value: v.String()}
	case protoreflect.EnumKind:
		ed := fd.Enum()
		prefix := strings.TrimSuffix(string(ed.Values().Get(0).Name()), "UNSPECIFIED")
		name := string(ed.Values().ByNumber(v.Enum()).Name())
		return &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!str", Value: strings.ToLower(strings.TrimPrefix(name, prefix))}
	case protoreflect.Uint32Kind, protoreflect.Fixed32Kind, protoreflect.Uint64Kind, protoreflect.Fixed64Kind:
		return &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!int", Value: strconv.FormatUint(v.Uint(), 10)}
	default:
		return &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!int", Value: strconv.FormatInt(v.Int(), 10)}
	}
}
