package task

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"

	"go.yaml.in/yaml/v3"
)

// Load reads the task file at path; dataset paths in it are relative to the
// file's directory. tok checks that every verbalizer is one token of the
// model; nil skips that check (for a model whose tokenizer is not at hand).
func Load(path string, tok Tokenizer) (*Task, error) {
	src, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("task: %w", err)
	}
	return Parse(src, filepath.Dir(path), tok)
}

// Parse decodes and validates a task file. dir is the directory dataset
// paths are relative to; tok is as for Load. Errors are *FieldError values
// (several joined with errors.Join when the file has several problems).
func Parse(src []byte, dir string, tok Tokenizer) (*Task, error) {
	var root yaml.Node
	if err := yaml.Unmarshal(src, &root); err != nil {
		return nil, newLineIndex(nil).yamlErrors(err)
	}
	ix := newLineIndex(&root)
	dec := yaml.NewDecoder(bytes.NewReader(src))
	dec.KnownFields(true)
	var raw rawTask
	if err := dec.Decode(&raw); err != nil {
		if errors.Is(err, io.EOF) {
			return nil, &FieldError{Field: "(file)", Err: fmt.Errorf("%w: the file is empty", ErrMissing)}
		}
		return nil, ix.yamlErrors(err)
	}
	b := builder{ix: ix, dir: dir, tok: tok}
	t := b.build(&raw)
	if err := joinErrors(b.errs); err != nil {
		return nil, err
	}
	return t, nil
}

// joinErrors is errors.Join that returns a lone error unwrapped, so a
// single problem reads plainly and errors.As finds it directly.
func joinErrors(errs []error) error {
	if len(errs) == 1 {
		return errs[0]
	}
	return errors.Join(errs...)
}
