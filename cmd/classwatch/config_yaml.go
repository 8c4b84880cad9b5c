package main

import (
	"errors"
	"fmt"
	"regexp"
	"strconv"
	"strings"
	"time"

	"gopkg.in/yaml.v3"

	"github.com/classwatch/classwatch/windows"
)

// duration is a time.Duration in YAML: Go syntax plus "d" for days. A bad
// value is reported with its line and column, which parseConfig turns into
// the key's path.
type duration time.Duration

// UnmarshalYAML parses a duration scalar.
func (d *duration) UnmarshalYAML(n *yaml.Node) error {
	if n.Kind != yaml.ScalarNode {
		return valueError(n, "expected a duration such as 90m, 24h or 7d")
	}
	v, err := windows.ParseDuration(n.Value)
	if err != nil {
		return valueError(n, fmt.Sprintf("%q is not a duration (use Go syntax such as 90m or 1h30m, or days such as 7d)", n.Value))
	}
	*d = duration(v)
	return nil
}

// MarshalYAML prints the duration the way it is read.
func (d duration) MarshalYAML() (any, error) { return windows.FormatDuration(time.Duration(d)), nil }

// byteSize is a size in bytes: an integer, or a number with a unit B, KB,
// MB, GB (powers of 1000) or KiB, MiB, GiB (powers of 1024).
type byteSize int64

// UnmarshalYAML parses a size scalar.
func (b *byteSize) UnmarshalYAML(n *yaml.Node) error {
	v, err := parseByteSize(n.Value)
	if n.Kind != yaml.ScalarNode || err != nil {
		return valueError(n, fmt.Sprintf("%q is not a size (use bytes, or units such as 256KiB or 16MiB)", n.Value))
	}
	*b = byteSize(v)
	return nil
}

func parseByteSize(s string) (int64, error) {
	s = strings.TrimSpace(s)
	i := strings.IndexFunc(s, func(r rune) bool { return (r < '0' || r > '9') && r != '.' })
	num, unit := s, ""
	if i >= 0 {
		num, unit = s[:i], strings.TrimSpace(s[i:])
	}
	mult := map[string]float64{
		"": 1, "B": 1,
		"KB": 1e3, "MB": 1e6, "GB": 1e9,
		"KiB": 1 << 10, "MiB": 1 << 20, "GiB": 1 << 30,
	}[unit]
	v, err := strconv.ParseFloat(num, 64)
	if err != nil || mult == 0 || v < 0 || v*mult > 1<<50 {
		return 0, fmt.Errorf("invalid size %q", s)
	}
	return int64(v * mult), nil
}

// valueError reports a bad scalar in the form indexNodes.describe reads
// back: collected by yaml.v3 together with its other type errors.
func valueError(n *yaml.Node, msg string) error {
	return &yaml.TypeError{Errors: []string{fmt.Sprintf("line %d: column %d: %s", n.Line, n.Column, msg)}}
}

// nodeIndex locates the key paths of a parsed file.
type nodeIndex struct {
	// lines maps a key path to the line of its key (or sequence item).
	lines map[string]int
	// keys lists, per line, the paths of the mapping keys on that line.
	keys map[int][]string
	// values maps "line:column" of a value node to its key path.
	values map[string]string
}

func indexNodes(root *yaml.Node) nodeIndex {
	idx := nodeIndex{lines: map[string]int{}, keys: map[int][]string{}, values: map[string]string{}}
	var walk func(n *yaml.Node, path string)
	walk = func(n *yaml.Node, path string) {
		switch n.Kind {
		case yaml.DocumentNode:
			for _, c := range n.Content {
				walk(c, path)
			}
		case yaml.MappingNode:
			for i := 0; i+1 < len(n.Content); i += 2 {
				k, v := n.Content[i], n.Content[i+1]
				p := k.Value
				if path != "" {
					p = path + "." + k.Value
				}
				idx.lines[p] = k.Line
				idx.keys[k.Line] = append(idx.keys[k.Line], p)
				idx.values[fmt.Sprintf("%d:%d", v.Line, v.Column)] = p
				walk(v, p)
			}
		case yaml.SequenceNode:
			for i, c := range n.Content {
				p := fmt.Sprintf("%s[%d]", path, i)
				idx.lines[p] = c.Line
				idx.values[fmt.Sprintf("%d:%d", c.Line, c.Column)] = p
				walk(c, p)
			}
		}
	}
	walk(root, "")
	return idx
}

// describe rewrites yaml.v3's decoding errors to name the key path.
func (idx nodeIndex) describe(err error) error {
	var te *yaml.TypeError
	if !errors.As(err, &te) {
		return fmt.Errorf("parse config: %w", err)
	}
	msgs := make([]string, 0, len(te.Errors))
	for _, e := range te.Errors {
		msgs = append(msgs, idx.describeOne(e))
	}
	return errors.New(strings.Join(msgs, "\n"))
}

// The forms of yaml.v3's decoding messages, and of valueError's. Compiled
// once; a regexp is safe for concurrent use and never changes.
var (
	unknownFieldRE = regexp.MustCompile(`^line (\d+): field (.+) not found in type \S+$`)
	valueErrorRE   = regexp.MustCompile(`^line (\d+): column (\d+): (.*)$`)
	typeErrorRE    = regexp.MustCompile("^line (\\d+): cannot unmarshal !!(\\w+)(?: `(.*)`)? into (\\S+)$")
)

// describeOne rewrites one yaml.v3 message.
func (idx nodeIndex) describeOne(e string) string {
	if m := unknownFieldRE.FindStringSubmatch(e); m != nil {
		line, _ := strconv.Atoi(m[1])
		key := m[2]
		for _, p := range idx.keys[line] {
			if p == key || strings.HasSuffix(p, "."+key) {
				key = p
				break
			}
		}
		return fmt.Sprintf("line %s: unknown key %q", m[1], key)
	}
	if m := valueErrorRE.FindStringSubmatch(e); m != nil {
		if p, ok := idx.values[m[1]+":"+m[2]]; ok {
			return fmt.Sprintf("line %s: %s: %s", m[1], p, m[3])
		}
		return fmt.Sprintf("line %s: %s", m[1], m[3])
	}
	if m := typeErrorRE.FindStringSubmatch(e); m != nil {
		want := map[string]string{"float64": "a number", "int": "an integer", "bool": "true or false", "string": "a string", "[]string": "a list of strings"}[m[4]]
		if want == "" {
			if strings.HasPrefix(m[4], "[]") {
				want = "a list"
			} else {
				want = "a mapping"
			}
		}
		got := m[3]
		if m[2] == "map" || m[2] == "seq" {
			got = map[string]string{"map": "a mapping", "seq": "a list"}[m[2]]
		} else {
			got = strconv.Quote(got)
		}
		line, _ := strconv.Atoi(m[1])
		return fmt.Sprintf("line %s: %s%s is not %s", m[1], idx.pathOnLine(line), got, want)
	}
	return e
}

// pathOnLine names the key whose value sits on line, when only one does.
func (idx nodeIndex) pathOnLine(line int) string {
	var found []string
	prefix := strconv.Itoa(line) + ":"
	for pos, p := range idx.values {
		if strings.HasPrefix(pos, prefix) {
			found = append(found, p)
		}
	}
	if len(found) == 1 {
		return found[0] + ": "
	}
	return ""
}
