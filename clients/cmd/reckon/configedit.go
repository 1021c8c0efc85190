package main

import (
	"fmt"
	"os"
	"path/filepath"
	"strconv"
	"strings"

	"go.yaml.in/yaml/v3"

	"reckon.example/server/convert"
	"reckon.example/server/daemon"
)

// configEdit is one change to a YAML robot configuration: the field's path
// as the configuration's errors name it ("noise.wheel_var_m2_per_m",
// "sensors[0].correlation_time_s", "sensors[0].covariance.values"), its
// new value (a scalar, or with seq a flow sequence of scalars), a line
// comment, and what to call the old value when the file has none (its
// default).
type configEdit struct {
	path    string
	value   string
	seq     []string
	comment string
	absent  string
}

// writeConfigEdits writes the configuration at in with the edits made to
// out, with note(changes) as its first comment line, changes being one
// "path old -> new" per edit; the result must load. It returns changes. The writers of new
// configurations (imu-noise, tune, calibrate) share it; out is never in (the callers
// refuse that).
func writeConfigEdits(in, out string, edits []configEdit, note func(changes []string) string) ([]string, error) {
	data, err := daemon.ReadFlagFile(in)
	if err != nil {
		return nil, err
	}
	return editConfig(in, data, out, edits, note)
}

// editConfig is writeConfigEdits of the configuration data, which in
// names in errors (calibrate's journal case has no file of it).
func editConfig(in string, data []byte, out string, edits []configEdit, note func(changes []string) string) ([]string, error) {
	if _, _, err := convert.LoadConfigYAML(data); err != nil {
		return nil, fmt.Errorf("%s: %w", in, err)
	}
	var doc yaml.Node
	if err := yaml.Unmarshal(data, &doc); err != nil {
		return nil, fmt.Errorf("%s: %w", in, err)
	}
	if len(doc.Content) == 0 || doc.Content[0].Kind != yaml.MappingNode {
		return nil, fmt.Errorf("%s: %w: not a mapping", in, convert.ErrConfigFile)
	}
	root := doc.Content[0]
	var changes []string
	for _, e := range edits {
		old, err := setField(root, e)
		if err != nil {
			return nil, fmt.Errorf("%s: %w", in, err)
		}
		if old == "" {
			old = e.absent
		}
		nv := e.value
		if e.seq != nil {
			nv = "[" + strings.Join(e.seq, ", ") + "]"
		}
		changes = append(changes, fmt.Sprintf("%s %s -> %s", e.path, old, nv))
	}
	root.HeadComment = strings.TrimSpace("# " + note(changes) + "\n" + root.HeadComment)
	var b strings.Builder
	enc := yaml.NewEncoder(&b)
	enc.SetIndent(2)
	if err := enc.Encode(&doc); err != nil {
		return nil, err
	}
	if err := enc.Close(); err != nil {
		return nil, err
	}
	if _, _, err := convert.LoadConfigYAML([]byte(b.String())); err != nil {
		return nil, fmt.Errorf("the new configuration does not load: %w", err)
	}
	if err := writeWhole(out, []byte(b.String())); err != nil {
		return nil, err
	}
	return changes, nil
}

// writeWhole writes data to path through a temporary file beside it that
// replaces path only once written whole: a write that fails part way (a
// full disk) leaves no cut file, and an existing one as it was.
func writeWhole(path string, data []byte) error {
	f, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".*.tmp")
	if err != nil {
		return fmt.Errorf("write %s: %w", path, err)
	}
	_, err = f.Write(data)
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Chmod(f.Name(), 0o644)
	}
	if err == nil {
		err = os.Rename(f.Name(), path)
	}
	if err != nil {
		os.Remove(f.Name())
		return fmt.Errorf("write %s: %w", path, err)
	}
	return nil
}

// setField makes one edit in a configuration's root mapping, adding
// missing mappings and keys on the way (but not sequence elements), and
// returns the old value ("" if there was none; a sequence as "[a, b]").
func setField(root *yaml.Node, e configEdit) (old string, err error) {
	node := root
	parts := strings.Split(e.path, ".")
	for k, part := range parts {
		name, index := part, -1
		if i := strings.IndexByte(part, '['); i > 0 && strings.HasSuffix(part, "]") {
			n, err := strconv.Atoi(part[i+1 : len(part)-1])
			if err != nil {
				return "", fmt.Errorf("%w: bad path %s", convert.ErrConfigFile, e.path)
			}
			name, index = part[:i], n
		}
		if node.Kind != yaml.MappingNode { // "noise:" with nothing
			*node = yaml.Node{Kind: yaml.MappingNode, Tag: "!!map"}
		}
		node.Style = 0 // block style, so that each field carries its comment
		v := mapValue(node, name)
		if v == nil {
			if index >= 0 {
				return "", fmt.Errorf("%w: %s has no %s", convert.ErrConfigFile, e.path, name)
			}
			v = &yaml.Node{Kind: yaml.ScalarNode}
			if k < len(parts)-1 {
				v = &yaml.Node{Kind: yaml.MappingNode, Tag: "!!map"}
			}
			node.Content = append(node.Content, &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!str", Value: name}, v)
		}
		if index >= 0 {
			if v.Kind != yaml.SequenceNode || index >= len(v.Content) {
				return "", fmt.Errorf("%w: %s: no element %d", convert.ErrConfigFile, e.path, index)
			}
			v = v.Content[index]
		}
		node = v
	}
	switch {
	case e.seq != nil:
		if node.Kind == yaml.SequenceNode {
			var vals []string
			for _, c := range node.Content {
				vals = append(vals, c.Value)
			}
			old = "[" + strings.Join(vals, ", ") + "]"
		}
		*node = yaml.Node{Kind: yaml.SequenceNode, Tag: "!!seq", Style: yaml.FlowStyle}
		for _, s := range e.seq {
			node.Content = append(node.Content, &yaml.Node{Kind: yaml.ScalarNode, Value: s}) // plain: 0 stays 0
		}
	default:
		old = node.Value
		tag := "!!float"
		if _, err := strconv.ParseInt(e.value, 10, 64); err == nil {
			tag = "!!int" // an integer field (latency_ns) takes no float; a float field takes either
		} else if e.value == "true" || e.value == "false" {
			tag = "!!bool"
		} else if _, err := strconv.ParseFloat(e.value, 64); err != nil {
			tag = "!!str" // an enumeration's name (robust: student_t)
		}
		*node = yaml.Node{Kind: yaml.ScalarNode, Tag: tag, Value: e.value}
	}
	node.LineComment = "# " + e.comment
	if old != "" {
		node.LineComment += "; was " + old
	}
	return old, nil
}

// mapValue returns the value of key in a mapping node, or nil.
func mapValue(m *yaml.Node, key string) *yaml.Node {
	if m.Kind != yaml.MappingNode {
		return nil
	}
	for i := 0; i+1 < len(m.Content); i += 2 {
		if m.Content[i].Value == key {
			return m.Content[i+1]
		}
	}
	return nil
}
