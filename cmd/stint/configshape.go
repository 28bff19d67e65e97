package main

import (
	"errors"
	"fmt"
	"reflect"
	"regexp"
	"strings"

	"go.yaml.in/yaml/v3"
)

// unmarshalerType is yaml.Unmarshaler, for the config's own value types
// (Duration, ByteSize, Number).
var unmarshalerType = reflect.TypeFor[yaml.Unmarshaler]()

// checkShape walks a YAML config against the Go type it decodes into (t,
// Config) before it is decoded, so a misspelt key or a value of the wrong
// kind is reported by its YAML path (upstreams[0].urll), its line, and
// with the nearest known key, in words of the file rather than of Go's
// types. It reports the first problem in document order; nil when the
// file's shape fits.
func checkShape(n *yaml.Node, t reflect.Type, path []any) error {
	for n != nil && n.Kind == yaml.AliasNode {
		n = n.Alias
	}
	if n == nil || n.Kind == 0 {
		return nil // an empty file
	}
	if n.Kind == yaml.DocumentNode {
		if len(n.Content) == 0 {
			return nil
		}
		return checkShape(n.Content[0], t, path)
	}
	if n.Kind == yaml.ScalarNode && n.Tag == "!!null" {
		return nil // an empty value keeps the default
	}
	bad := func(err error) error { return &ConfigError{Field: fieldPath(path), Line: n.Line, Err: err} }
	if reflect.PointerTo(t).Implements(unmarshalerType) {
		err := reflect.New(t).Interface().(yaml.Unmarshaler).UnmarshalYAML(n)
		if err != nil {
			return bad(errors.New(linePrefix.ReplaceAllString(err.Error(), "")))
		}
		return nil
	}
	switch t.Kind() {
	case reflect.Pointer:
		return checkShape(n, t.Elem(), path)
	case reflect.Struct:
		if n.Kind != yaml.MappingNode {
			return bad(fmt.Errorf("want a mapping (key: value lines, or {key: value}), got %s", nodeKind(n)))
		}
		fields := yamlFields(t)
		for i := 0; i+1 < len(n.Content); i += 2 {
			k, v := n.Content[i], n.Content[i+1]
			f, ok := fields.byName[k.Value]
			if !ok {
				return &ConfigError{Field: fieldPath(append(path, k.Value)), Line: k.Line, Err: unknownKey(k.Value, fields.names)}
			}
			if err := checkShape(v, f.Type, append(path, k.Value)); err != nil {
				return err
			}
		}
		return nil
	case reflect.Map:
		if n.Kind != yaml.MappingNode {
			return bad(fmt.Errorf("want a mapping (name: value lines, or {name: value}), got %s", nodeKind(n)))
		}
		for i := 0; i+1 < len(n.Content); i += 2 {
			if err := checkShape(n.Content[i+1], t.Elem(), append(path, n.Content[i].Value)); err != nil {
				return err
			}
		}
		return nil
	case reflect.Slice:
		if n.Kind != yaml.SequenceNode {
			return bad(fmt.Errorf("want a list (- item lines or [a, b]), got %s", nodeKind(n)))
		}
		for i, item := range n.Content {
			if err := checkShape(item, t.Elem(), append(path, i)); err != nil {
				return err
			}
		}
		return nil
	case reflect.Interface:
		return nil
	}
	// A plain value: YAML's own rules say whether the text fits.
	want := map[reflect.Kind]string{reflect.String: "a string", reflect.Bool: "true or false", reflect.Float64: "a number", reflect.Float32: "a number"}[t.Kind()]
	if want == "" {
		want = "a whole number"
	}
	if n.Kind != yaml.ScalarNode {
		return bad(fmt.Errorf("want %s, got %s", want, nodeKind(n)))
	}
	if err := n.Decode(reflect.New(t).Interface()); err != nil {
		return bad(fmt.Errorf("want %s, got %q", want, n.Value))
	}
	return nil
}

// linePrefix is the "line N: " the config's value types put before their
// errors; ConfigError names the line itself.
var linePrefix = regexp.MustCompile(`^line \d+: `)

// nodeKind names what a YAML node is, in a config writer's words.
func nodeKind(n *yaml.Node) string {
	switch n.Kind {
	case yaml.MappingNode:
		return "a mapping"
	case yaml.SequenceNode:
		return "a list"
	}
	switch n.Tag {
	case "!!int", "!!float":
		return "a number"
	case "!!bool":
		return "true or false"
	}
	return "a string"
}

// structFields are a struct's YAML keys, in declaration order.
type structFields struct {
	names  []string
	byName map[string]reflect.StructField
}

func yamlFields(t reflect.Type) structFields {
	fs := structFields{byName: map[string]reflect.StructField{}}
	for i := range t.NumField() {
		f := t.Field(i)
		if !f.IsExported() {
			continue
		}
		name, _, _ := strings.Cut(f.Tag.Get("yaml"), ",")
		if name == "-" {
			continue
		}
		if name == "" {
			name = strings.ToLower(f.Name)
		}
		fs.names = append(fs.names, name)
		fs.byName[name] = f
	}
	return fs
}

// unknownKey says a key is not one of known, suggesting the nearest when
// it is one or two edits away, else listing them all.
func unknownKey(key string, known []string) error {
	best, bestDist := "", len(key)+1
	for _, k := range known {
		if d := editDistance(key, k); d < bestDist {
			best, bestDist = k, d
		}
	}
	if best != "" && bestDist <= max(1, min(2, len(key)/3)) {
		return fmt.Errorf("unknown key; did you mean %q?", best)
	}
	return fmt.Errorf("unknown key; known keys: %s", strings.Join(known, ", "))
}

// editDistance is the optimal string alignment distance between a and b:
// insertions, deletions, substitutions and swaps of neighbours, one each.
func editDistance(a, b string) int {
	d := make([][]int, len(a)+1)
	for i := range d {
		d[i] = make([]int, len(b)+1)
		d[i][0] = i
	}
	for j := range d[0] {
		d[0][j] = j
	}
	for i := 1; i <= len(a); i++ {
		for j := 1; j <= len(b); j++ {
			cost := 1
			if a[i-1] == b[j-1] {
				cost = 0
			}
			d[i][j] = min(d[i-1][j]+1, d[i][j-1]+1, d[i-1][j-1]+cost)
			if i > 1 && j > 1 && a[i-1] == b[j-2] && a[i-2] == b[j-1] {
				d[i][j] = min(d[i][j], d[i-2][j-2]+1)
			}
		}
	}
	return d[len(a)][len(b)]
}

// yamlErrorText is a YAML decoding error that checkShape did not catch,
// without the Go type names yaml's messages carry ("into
// main.UpstreamConfig").
func yamlErrorText(err error) string {
	s := strings.TrimPrefix(err.Error(), "yaml: ")
	s = strings.ReplaceAll(s, "unmarshal errors:\n  ", "")
	s = goTypeName.ReplaceAllString(s, "")
	return strings.Join(strings.Fields(s), " ")
}

// goTypeName matches " into T", " in type T" and "!!tag" in yaml's
// messages.
var goTypeName = regexp.MustCompile(` (into|in type) [\[\]*]*(main\.)?[A-Za-z0-9_.]+|!!`)
