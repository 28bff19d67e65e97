package task

import (
	"fmt"
	"regexp"
	"strconv"
	"strings"

	"go.yaml.in/yaml/v3"
)

// lineIndex maps each key of a YAML document to its line: paths are dotted
// ("data.train"), list items indexed ("manual_prompts[1]").
type lineIndex struct {
	byPath map[string]int
	byLine map[int]string // the last key path starting on each line
}

func newLineIndex(root *yaml.Node) lineIndex {
	ix := lineIndex{byPath: map[string]int{}, byLine: map[int]string{}}
	if root != nil && root.Kind == yaml.DocumentNode && len(root.Content) > 0 {
		ix.walk(root.Content[0], "")
	}
	return ix
}

func (ix lineIndex) walk(n *yaml.Node, path string) {
	switch n.Kind {
	case yaml.MappingNode:
		for i := 0; i+1 < len(n.Content); i += 2 {
			k, v := n.Content[i], n.Content[i+1]
			p := k.Value
			if path != "" {
				p = path + "." + k.Value
			}
			ix.byPath[p] = k.Line
			ix.byLine[k.Line] = p
			ix.walk(v, p)
		}
	case yaml.SequenceNode:
		for i, v := range n.Content {
			p := fmt.Sprintf("%s[%d]", path, i)
			ix.byPath[p] = v.Line
			if _, ok := ix.byLine[v.Line]; !ok {
				ix.byLine[v.Line] = p
			}
			ix.walk(v, p)
		}
	}
}

// line returns path's line, or that of its nearest present parent, or 0.
func (ix lineIndex) line(path string) int {
	for p := path; p != ""; {
		if l, ok := ix.byPath[p]; ok {
			return l
		}
		i := strings.LastIndexAny(p, ".[")
		if i < 0 {
			break
		}
		p = p[:i]
	}
	return 0
}

// yamlLine matches the "line N: message" form of yaml.v3's errors.
var yamlLine = regexp.MustCompile(`^(?:yaml: )?line (\d+): (.*)$`)

// unknownField matches yaml.v3's message for a key KnownFields refuses.
var unknownField = regexp.MustCompile(`^field (\S+) not found in type`)

// yamlErrors turns yaml.v3 decoding errors into FieldErrors located by ix.
func (ix lineIndex) yamlErrors(err error) error {
	var msgs []string
	if te, ok := err.(*yaml.TypeError); ok {
		msgs = te.Errors
	} else {
		msgs = []string{err.Error()}
	}
	var out []error
	for _, m := range msgs {
		sub := yamlLine.FindStringSubmatch(m)
		if sub == nil {
			out = append(out, &FieldError{Field: "(file)", Err: fmt.Errorf("%w: %s", ErrInvalid, m)})
			continue
		}
		line, _ := strconv.Atoi(sub[1])
		field := ix.byLine[line]
		if field == "" {
			field = "(file)"
		}
		if u := unknownField.FindStringSubmatch(sub[2]); u != nil {
			out = append(out, &FieldError{Field: field, Line: line, Err: fmt.Errorf("%w %q", ErrUnknownField, u[1])})
			continue
		}
		out = append(out, &FieldError{Field: field, Line: line, Err: fmt.Errorf("%w: %s", ErrInvalid, sub[2])})
	}
	return joinErrors(out)
}
