package convert

import (
	"errors"
	"fmt"
	"regexp"
	"strconv"
	"strings"

	"go.yaml.in/yaml/v3"
	"google.golang.org/protobuf/reflect/protoreflect"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
)

// ErrConfigFile marks an error in a robot configuration file.
var ErrConfigFile = errors.New("robot configuration file")

// ConfigFileError is an error in a robot configuration file: the line of the
// YAML file and the snake_case path of the field (empty for an error of the
// file as a whole, such as broken YAML). It wraps the cause, so errors.Is
// finds ErrConfigFile and, for a value the robot refuses, fusion.ErrConfig.
type ConfigFileError struct {
	Line  int
	Field string
	Err   error
}

// Error renders "robot configuration file: line N: field: what".
func (e *ConfigFileError) Error() string {
	var b strings.Builder
	b.WriteString(ErrConfigFile.Error())
	if e.Line > 0 {
		fmt.Fprintf(&b, ": line %d", e.Line)
	}
	b.WriteString(": ")
	b.WriteString(e.Err.Error())
	return b.String()
}

// Unwrap returns the cause.
func (e *ConfigFileError) Unwrap() error { return e.Err }

// Is makes errors.Is(err, ErrConfigFile) true.
func (e *ConfigFileError) Is(target error) bool { return target == ErrConfigFile }

// tabIndented returns the number (from 1) of the line of data whose
// indentation holds the tab that err, the parser's, stumbled on, or 0 if
// err is not about such a tab. The parser says "found character that
// cannot start any token" at the tab's line, or "found a tab character
// that violates indentation" at the line before it; a tab elsewhere in
// the file (a legal one, in a flow sequence or a block scalar) is not
// what broke it.
func tabIndented(data []byte, err error) int {
	m := yamlTabError.FindStringSubmatch(err.Error())
	if m == nil {
		return 0
	}
	n, _ := strconv.Atoi(m[1])
	lines := strings.Split(string(data), "\n")
	for _, k := range []int{n, n + 1} {
		if k < 1 || k > len(lines) {
			continue
		}
		line := lines[k-1]
		rest := strings.TrimLeft(line, " \t")
		if rest != "" && rest[0] != '#' && strings.Contains(line[:len(line)-len(rest)], "\t") {
			return k
		}
	}
	return 0
}

// yamlTabError matches the parser's errors that a tab can cause.
var yamlTabError = regexp.MustCompile(`line (\d+): found (?:character that cannot start any token|a tab character)`)

// LoadConfigYAML reads a hand-edited YAML robot configuration: the
// RobotConfig message with its proto field names (comments allowed; an enum
// may be written in full, IMU_MODE_ABSOLUTE, or short, absolute). It decodes
// the YAML node tree against the message's schema, so every error, a wrong
// type as much as an unknown field or an out-of-range value, is a
// *ConfigFileError naming the snake_case field and its line in the file.
func LoadConfigYAML(data []byte) (*pb.RobotConfig, fusion.Config, error) {
	var doc yaml.Node
	if err := yaml.Unmarshal(data, &doc); err != nil {
		if n := tabIndented(data, err); n > 0 {
			// The parser's "found character that cannot start any token"
			// does not say that the character is a tab.
			return nil, fusion.Config{}, &ConfigFileError{Line: n, Err: fmt.Errorf("indented with a tab: YAML indents with spaces only (%w)", err)}
		}
		return nil, fusion.Config{}, &ConfigFileError{Err: err}
	}
	if len(doc.Content) == 0 {
		return nil, fusion.Config{}, &ConfigFileError{Err: errors.New("empty")}
	}
	root := doc.Content[0]
	d := yamlDecoder{lines: map[string]int{"": root.Line}}
	c := &pb.RobotConfig{}
	if err := d.message(root, c.ProtoReflect(), ""); err != nil {
		return nil, fusion.Config{}, err
	}
	cfg, err := ConfigFromProto(c)
	if err == nil {
		err = cfg.CheckBounds()
	}
	if err != nil {
		field := fusion.FieldOf(err)
		return nil, cfg, &ConfigFileError{Line: d.lineOf(field), Field: field, Err: err}
	}
	return c, cfg, nil
}

// yamlDecoder fills a message from a YAML node tree and remembers the line
// of every field path it set, for errors found after decoding.
type yamlDecoder struct {
	lines map[string]int
}

// fail makes the error for a node at a field path.
func (d *yamlDecoder) fail(n *yaml.Node, path, format string, args ...any) error {
	return &ConfigFileError{Line: n.Line, Field: path, Err: fmt.Errorf("%s: %s", orRoot(path), fmt.Sprintf(format, args...))}
}

// message decodes a mapping node into m.
func (d *yamlDecoder) message(n *yaml.Node, m protoreflect.Message, path string) error {
	if n.Kind != yaml.MappingNode {
		return d.fail(n, path, "must be a mapping of field names to values")
	}
	fields := m.Descriptor().Fields()
	for i := 0; i+1 < len(n.Content); i += 2 {
		k, v := n.Content[i], n.Content[i+1]
		fd := fields.ByName(protoreflect.Name(k.Value))
		if fd == nil {
			return &ConfigFileError{Line: k.Line, Field: path, Err: fmt.Errorf("unknown field %q in %s", k.Value, orRoot(path))}
		}
		p := join(path, k.Value)
		if first, ok := d.lines[p]; ok {
			return d.fail(k, p, "given twice (first on line %d)", first)
		}
		d.lines[p] = k.Line
		if v.Tag == "!!null" {
			continue
		}
		if err := d.field(v, m, fd, p); err != nil {
			return err
		}
	}
	return nil
}

// field decodes one field's node: a list, a message or a scalar.
func (d *yamlDecoder) field(v *yaml.Node, m protoreflect.Message, fd protoreflect.FieldDescriptor, path string) error {
	switch {
	case fd.IsList():
		if v.Kind != yaml.SequenceNode {
			return d.fail(v, path, "must be a list")
		}
		list := m.Mutable(fd).List()
		for j, item := range v.Content {
			p := fmt.Sprintf("%s[%d]", path, j)
			d.lines[p] = item.Line
			if fd.Kind() == protoreflect.MessageKind {
				el := list.NewElement()
				if err := d.message(item, el.Message(), p); err != nil {
					return err
				}
				list.Append(el)
				continue
			}
			val, err := d.scalar(item, fd, p)
			if err != nil {
				return err
			}
			list.Append(val)
		}
		return nil
	case fd.IsMap():
		return d.fail(v, path, "maps are not supported")
	case fd.Kind() == protoreflect.MessageKind:
		return d.message(v, m.Mutable(fd).Message(), path)
	}
	val, err := d.scalar(v, fd, path)
	if err != nil {
		return err
	}
	m.Set(fd, val)
	return nil
}

// scalar decodes a scalar node as the field's kind. It accepts YAML's own
// spellings of numbers and booleans (YAML 1.2 core schema: true and false
// only) and refuses a value of another type, a quoted number included.
func (d *yamlDecoder) scalar(v *yaml.Node, fd protoreflect.FieldDescriptor, path string) (protoreflect.Value, error) {
	if v.Kind != yaml.ScalarNode {
		return protoreflect.Value{}, d.fail(v, path, "must be a single value")
	}
	switch fd.Kind() {
	case protoreflect.BoolKind:
		var b bool
		if v.Tag != "!!bool" || v.Decode(&b) != nil {
			return protoreflect.Value{}, d.fail(v, path, "%q is not true or false", v.Value)
		}
		return protoreflect.ValueOfBool(b), nil
	case protoreflect.DoubleKind, protoreflect.FloatKind:
		var f float64
		if (v.Tag != "!!float" && v.Tag != "!!int") || v.Decode(&f) != nil {
			return protoreflect.Value{}, d.fail(v, path, "%q is not a number (units are in the field's name)", v.Value)
		}
		if fd.Kind() == protoreflect.FloatKind {
			return protoreflect.ValueOfFloat32(float32(f)), nil
		}
		return protoreflect.ValueOfFloat64(f), nil
	case protoreflect.Int32Kind, protoreflect.Sint32Kind, protoreflect.Sfixed32Kind,
		protoreflect.Int64Kind, protoreflect.Sint64Kind, protoreflect.Sfixed64Kind,
		protoreflect.Uint32Kind, protoreflect.Fixed32Kind, protoreflect.Uint64Kind, protoreflect.Fixed64Kind:
		return d.integer(v, fd, path)
	case protoreflect.StringKind:
		if v.Tag != "!!str" {
			return protoreflect.Value{}, d.fail(v, path, "%q is not text (quote it)", v.Value)
		}
		return protoreflect.ValueOfString(v.Value), nil
	case protoreflect.EnumKind:
		return d.enum(v, fd, path)
	}
	return protoreflect.Value{}, d.fail(v, path, "fields of kind %s are not supported", fd.Kind())
}

// integer decodes an integer of the field's width and sign.
func (d *yamlDecoder) integer(v *yaml.Node, fd protoreflect.FieldDescriptor, path string) (protoreflect.Value, error) {
	bad := func() (protoreflect.Value, error) {
		return protoreflect.Value{}, d.fail(v, path, "%q is not a whole number of the field's range", v.Value)
	}
	if v.Tag != "!!int" {
		return bad()
	}
	switch fd.Kind() {
	case protoreflect.Uint32Kind, protoreflect.Fixed32Kind:
		var u uint32
		if v.Decode(&u) != nil {
			return bad()
		}
		return protoreflect.ValueOfUint32(u), nil
	case protoreflect.Uint64Kind, protoreflect.Fixed64Kind:
		var u uint64
		if v.Decode(&u) != nil {
			return bad()
		}
		return protoreflect.ValueOfUint64(u), nil
	case protoreflect.Int32Kind, protoreflect.Sint32Kind, protoreflect.Sfixed32Kind:
		var i int32
		if v.Decode(&i) != nil {
			return bad()
		}
		return protoreflect.ValueOfInt32(i), nil
	}
	var i int64
	if v.Decode(&i) != nil {
		return bad()
	}
	return protoreflect.ValueOfInt64(i), nil
}

// enum decodes an enum value written in full (IMU_MODE_ABSOLUTE) or short
// (absolute, case and - for _ ignored).
func (d *yamlDecoder) enum(v *yaml.Node, fd protoreflect.FieldDescriptor, path string) (protoreflect.Value, error) {
	ed := fd.Enum()
	prefix := strings.TrimSuffix(string(ed.Values().Get(0).Name()), "UNSPECIFIED")
	full := v.Value
	if !strings.HasPrefix(full, prefix) {
		full = prefix + strings.ToUpper(strings.ReplaceAll(v.Value, "-", "_"))
	}
	if ev := ed.Values().ByName(protoreflect.Name(full)); v.Tag == "!!str" && ev != nil && ev.Number() != 0 {
		return protoreflect.ValueOfEnum(ev.Number()), nil
	}
	var names []string
	for i := 1; i < ed.Values().Len(); i++ {
		names = append(names, strings.ToLower(strings.TrimPrefix(string(ed.Values().Get(i).Name()), prefix)))
	}
	return protoreflect.Value{}, d.fail(v, path, "%q is not one of %s", v.Value, strings.Join(names, ", "))
}

// lineOf returns the line of the field at a path such as
// wheels[1].counts_per_m, or of its nearest ancestor in the file.
func (d *yamlDecoder) lineOf(path string) int {
	for {
		if line, ok := d.lines[path]; ok {
			return line
		}
		i := strings.LastIndexAny(path, ".[")
		if i < 0 {
			return d.lines[""]
		}
		path = path[:i]
	}
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
