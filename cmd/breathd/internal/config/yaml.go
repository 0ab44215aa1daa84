package config

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"regexp"
	"strconv"
	"strings"

	"go.yaml.in/yaml/v3"
)

// yamlFile is a YAML document with what its error messages need.
type yamlFile struct {
	path string     // the file it came from
	root *yaml.Node // for line numbers
}

// FieldError is a validation error at a key path such as
// devices[0].serial.baud.
type FieldError struct {
	Path []any // string keys and int indices
	Err  error
}

func (e *FieldError) Error() string { return pathString(e.Path) + ": " + e.Err.Error() }

// Unwrap returns the problem.
func (e *FieldError) Unwrap() error { return e.Err }

// maxPathShown is the most levels of a key path an error shows; deeper
// ones are elided.
const maxPathShown = 12

func pathString(path []any) string {
	var b strings.Builder
	if len(path) > maxPathShown {
		path = append(append([]any(nil), path[:maxPathShown/2]...), append([]any{"…"}, path[len(path)-maxPathShown/2:]...)...)
	}
	for _, p := range path {
		switch v := p.(type) {
		case int:
			fmt.Fprintf(&b, "[%d]", v)
		case string:
			if b.Len() > 0 {
				b.WriteByte('.')
			}
			b.WriteString(v)
		}
	}
	return b.String()
}

func field(err error, path ...any) error {
	if err == nil {
		return nil
	}
	return &FieldError{Path: path, Err: err}
}

// decodeStrict decodes YAML into out; an unknown key is an error. Errors
// name the file, the line and the key.
func decodeStrict(path string, data []byte, out any) (*yamlFile, error) {
	f := &yamlFile{path: path, root: new(yaml.Node)}
	if err := yaml.Unmarshal(data, f.root); err != nil {
		return nil, f.yamlError(err)
	}
	dec := yaml.NewDecoder(bytes.NewReader(data))
	dec.KnownFields(true)
	if err := dec.Decode(out); err != nil {
		if errors.Is(err, io.EOF) {
			return nil, fmt.Errorf("%s: the file is empty", path)
		}
		return nil, f.yamlError(err)
	}
	return f, nil
}

// explain adds the file and line to a validation error.
func (f *yamlFile) explain(err error) error {
	if err == nil {
		return nil
	}
	var fe *FieldError
	if errors.As(err, &fe) {
		return fmt.Errorf("%s:%d: %w", f.path, f.line(fe.Path), err)
	}
	return fmt.Errorf("%s: %w", f.path, err)
}

var (
	reUnknown = regexp.MustCompile(`line (\d+): field (\S+) not found in type`)
	reLine    = regexp.MustCompile(`line (\d+): (.*)`)
)

// yamlError rewrites yaml.v3's messages as file:line: key: problem.
func (c *yamlFile) yamlError(err error) error {
	var te *yaml.TypeError
	if errors.As(err, &te) && len(te.Errors) > 0 {
		msg := te.Errors[0]
		if m := reUnknown.FindStringSubmatch(msg); m != nil {
			n, _ := strconv.Atoi(m[1])
			return fmt.Errorf("%s:%s: unknown key %q%s (see configs/breathd.example.yaml for the keys)", c.path, m[1], m[2], c.under(n))
		}
		if m := reLine.FindStringSubmatch(msg); m != nil {
			n, _ := strconv.Atoi(m[1])
			return fmt.Errorf("%s:%s: %s: %s", c.path, m[1], c.keyAt(n), typeProblem(m[2]))
		}
		return fmt.Errorf("%s: %s", c.path, msg)
	}
	msg := strings.TrimPrefix(err.Error(), "yaml: ")
	if m := reLine.FindStringSubmatch(msg); m != nil {
		return fmt.Errorf("%s:%s: %s", c.path, m[1], m[2])
	}
	return fmt.Errorf("%s: %s", c.path, msg)
}

var reType = regexp.MustCompile("cannot unmarshal !!(\\w+) `(.*)` into (\\S+)")

// typeProblem rewrites "cannot unmarshal !!str `fast` into int".
func typeProblem(msg string) string {
	m := reType.FindStringSubmatch(msg)
	if m == nil {
		return msg
	}
	want := map[string]string{"int": "a whole number", "int64": "a whole number", "float64": "a number",
		"bool": "true or false", "time.Duration": "a duration such as 500ms or 5s", "string": "text"}[m[3]]
	if want == "" {
		want = "a " + m[3]
	}
	if m[1] == "map" || m[1] == "seq" {
		return fmt.Sprintf("expected %s here, not a %s", want, map[string]string{"map": "section", "seq": "list"}[m[1]])
	}
	return fmt.Sprintf("%q is not %s", m[2], want)
}

// under names the section an unknown key stands in.
func (c *yamlFile) under(line int) string {
	if k := c.keyAt(line); strings.Contains(k, ".") || strings.Contains(k, "[") {
		if i := strings.LastIndexAny(k, ".["); i > 0 {
			return " in " + k[:i]
		}
	}
	return ""
}

// keyAt returns the key path of the key or value at a line. The walk
// keeps one path and copies it only where the line matches, so that a
// file nested thousands deep costs time and memory in proportion to its
// size.
func (c *yamlFile) keyAt(line int) string {
	var found, path []any
	var walk func(n *yaml.Node)
	walk = func(n *yaml.Node) {
		switch n.Kind {
		case yaml.DocumentNode:
			for _, ch := range n.Content {
				walk(ch)
			}
		case yaml.MappingNode:
			for i := 0; i+1 < len(n.Content); i += 2 {
				k, v := n.Content[i], n.Content[i+1]
				path = append(path, k.Value)
				if k.Line == line || (v.Line == line && v.Kind == yaml.ScalarNode) {
					found = append(found[:0], path...)
				}
				walk(v)
				path = path[:len(path)-1]
			}
		case yaml.SequenceNode:
			for i, ch := range n.Content {
				path = append(path, i)
				if ch.Line == line && ch.Kind == yaml.ScalarNode {
					found = append(found[:0], path...)
				}
				walk(ch)
				path = path[:len(path)-1]
			}
		}
	}
	walk(c.root)
	if found == nil {
		return "value"
	}
	return pathString(found)
}

// line returns the line of a key path, or of its nearest existing parent.
func (c *yamlFile) line(path []any) int {
	n := c.root
	if n.Kind == yaml.DocumentNode && len(n.Content) > 0 {
		n = n.Content[0]
	}
	best := n.Line
	for _, p := range path {
		var next *yaml.Node
		switch v := p.(type) {
		case string:
			if n.Kind == yaml.MappingNode {
				for i := 0; i+1 < len(n.Content); i += 2 {
					if n.Content[i].Value == v {
						best = n.Content[i].Line
						next = n.Content[i+1]
					}
				}
			}
		case int:
			if n.Kind == yaml.SequenceNode && v < len(n.Content) {
				next = n.Content[v]
				best = next.Line
			}
		}
		if next == nil {
			break
		}
		n = next
	}
	return best
}
