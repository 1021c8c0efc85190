package convert

import (
	"encoding/json"
	"errors"
	"fmt"
	"regexp"
	"strconv"
	"strings"

	"go.yaml.in/yaml/v3"
	"google.golang.org/protobuf/encoding/protojson"
	"google.golang.org/protobuf/reflect/protoreflect"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
)

// ErrConfigFile marks an error in a robot configuration file.
var ErrConfigFile = errors.New("robot configuration file")

// LoadConfigYAML reads a hand-edited YAML robot configuration: the
// RobotConfig message with its proto field names (comments allowed; an
// enum may be written in full, IMU_MODE_ABSOLUTE, or short, absolute). It
// checks every key against the schema and validates the result; an unknown
// or out-of-range field is an error naming it and its line.
func LoadConfigYAML(data []byte) (*pb.RobotConfig, fusion.Config, error) {
	var doc yaml.Node
	if err := yaml.Unmarshal(data, &doc); err != nil {
		return nil, fusion.Config{}, fmt.Errorf("%w: %v", ErrConfigFile, err)
	}
	if len(doc.Content) == 0 {
		return nil, fusion.Config{}, fmt.Errorf("%w: empty", ErrConfigFile)
	}
	root := doc.Content[0]
	msg := (&pb.RobotConfig{}).ProtoReflect().Descriptor()
	if err := checkNode(root, msg, ""); err != nil {
		return nil, fusion.Config{}, err
	}
	var v any
	if err := root.Decode(&v); err != nil {
		return nil, fusion.Config{}, fmt.Errorf("%w: %v", ErrConfigFile, err)
	}
	js, err := json.Marshal(v)
	if err != nil {
		return nil, fusion.Config{}, fmt.Errorf("%w: %v", ErrConfigFile, err)
	}
	c := &pb.RobotConfig{}
	if err := protojson.Unmarshal(js, c); err != nil {
		return nil, fusion.Config{}, fmt.Errorf("%w: %v", ErrConfigFile, err)
	}
	cfg, err := ConfigFromProto(c)
	if err != nil {
		if path := configPath(err); path != "" {
			if line := lineOf(root, path); line > 0 {
				return nil, cfg, fmt.Errorf("%w: line %d: %v", ErrConfigFile, line, err)
			}
		}
		return nil, cfg, fmt.Errorf("%w: %v", ErrConfigFile, err)
	}
	return c, cfg, nil
}

// checkNode checks a mapping node's keys against a message descriptor,
// rewrites short enum names to full ones, and recurses.
func checkNode(n *yaml.Node, md protoreflect.MessageDescriptor, path string) error {
	if n.Kind != yaml.MappingNode {
		return fmt.Errorf("%w: line %d: %s must be a mapping", ErrConfigFile, n.Line, orRoot(path))
	}
	for i := 0; i+1 < len(n.Content); i += 2 {
		k, v := n.Content[i], n.Content[i+1]
		fd := md.Fields().ByName(protoreflect.Name(k.Value))
		if fd == nil {
			fd = md.Fields().ByJSONName(k.Value)
		}
		p := join(path, k.Value)
		if fd == nil {
			return fmt.Errorf("%w: line %d: unknown field %q in %s", ErrConfigFile, k.Line, k.Value, orRoot(path))
		}
		if fd.IsList() {
			if v.Kind != yaml.SequenceNode {
				return fmt.Errorf("%w: line %d: %s must be a list", ErrConfigFile, v.Line, p)
			}
			for j, item := range v.Content {
				if err := checkValue(item, fd, fmt.Sprintf("%s[%d]", p, j)); err != nil {
					return err
				}
			}
			continue
		}
		if err := checkValue(v, fd, p); err != nil {
			return err
		}
	}
	return nil
}

func checkValue(v *yaml.Node, fd protoreflect.FieldDescriptor, path string) error {
	switch fd.Kind() {
	case protoreflect.MessageKind:
		return checkNode(v, fd.Message(), path)
	case protoreflect.EnumKind:
		if v.Kind != yaml.ScalarNode {
			return fmt.Errorf("%w: line %d: %s must be a name", ErrConfigFile, v.Line, path)
		}
		ed := fd.Enum()
		if ed.Values().ByName(protoreflect.Name(v.Value)) != nil {
			return nil
		}
		prefix := strings.TrimSuffix(string(ed.Values().Get(0).Name()), "UNSPECIFIED")
		full := prefix + strings.ToUpper(strings.ReplaceAll(v.Value, "-", "_"))
		if ed.Values().ByName(protoreflect.Name(full)) != nil && !strings.HasSuffix(full, "UNSPECIFIED") {
			v.Value, v.Tag = full, "!!str"
			return nil
		}
		var names []string
		for i := 1; i < ed.Values().Len(); i++ {
			names = append(names, strings.ToLower(strings.TrimPrefix(string(ed.Values().Get(i).Name()), prefix)))
		}
		return fmt.Errorf("%w: line %d: %s: %q is not one of %s", ErrConfigFile, v.Line, path, v.Value, strings.Join(names, ", "))
	default:
		if v.Kind != yaml.ScalarNode {
			return fmt.Errorf("%w: line %d: %s must be a single value", ErrConfigFile, v.Line, path)
		}
	}
	return nil
}

func join(path, key string) string {
	if path == "" {
		return key
	}
	return path + "." + key
}

func orRoot(path string) string {
	if path == "" {
		return "the configuration"
	}
	return path
}

var pathInErr = regexp.MustCompile(`invalid configuration: ([a-z0-9_.\[\]]+):`)

func configPath(err error) string {
	m := pathInErr.FindStringSubmatch(err.Error())
	if m == nil {
		return ""
	}
	return m[1]
}

var indexed = regexp.MustCompile(`^([a-z0-9_]+)\[([0-9]+)\]$`)

// lineOf returns the line of the node at a path such as wheels[1].counts_per_m,
// or of its nearest ancestor present in the file.
func lineOf(root *yaml.Node, path string) int {
	n, line := root, root.Line
	for _, part := range strings.Split(path, ".") {
		key, idx := part, -1
		if m := indexed.FindStringSubmatch(part); m != nil {
			key = m[1]
			idx, _ = strconv.Atoi(m[2])
		}
		next := (*yaml.Node)(nil)
		if n.Kind == yaml.MappingNode {
			for i := 0; i+1 < len(n.Content); i += 2 {
				if n.Content[i].Value == key {
					next, line = n.Content[i+1], n.Content[i].Line
				}
			}
		}
		if next == nil {
			return line
		}
		if idx >= 0 {
			if next.Kind != yaml.SequenceNode || idx >= len(next.Content) {
				return line
			}
			next = next.Content[idx]
			line = next.Line
		}
		n = next
	}
	return line
}
