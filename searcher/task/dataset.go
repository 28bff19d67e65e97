package task

import (
	"bufio"
	"bytes"
	"encoding/csv"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"slices"
)

// Format is a dataset file format.
type Format string

// The dataset formats.
const (
	JSONL Format = "jsonl"
	CSV   Format = "csv"
)

// maxLine bounds one JSONL line.
const maxLine = 1 << 20

// ReadJSONL reads one JSON object a line, taking the strings under
// textField and labelField. Blank lines are skipped; errors name the line.
func ReadJSONL(r io.Reader, textField, labelField string) ([]Example, error) {
	sc := bufio.NewScanner(r)
	sc.Buffer(make([]byte, 0, 64<<10), maxLine)
	var out []Example
	for n := 1; sc.Scan(); n++ {
		line := bytes.TrimSpace(sc.Bytes())
		if len(line) == 0 {
			continue
		}
		var row map[string]json.RawMessage
		if err := json.Unmarshal(line, &row); err != nil {
			return nil, fmt.Errorf("line %d: %w", n, err)
		}
		var ex Example
		for _, f := range []struct {
			name string
			dst  *string
		}{{textField, &ex.Text}, {labelField, &ex.Label}} {
			raw, ok := row[f.name]
			if !ok {
				return nil, fmt.Errorf("line %d: no field %q", n, f.name)
			}
			if err := json.Unmarshal(raw, f.dst); err != nil {
				return nil, fmt.Errorf("line %d: field %q is not a string: %w", n, f.name, err)
			}
		}
		out = append(out, ex)
	}
	if err := sc.Err(); err != nil {
		return nil, fmt.Errorf("reading: %w", err)
	}
	return out, nil
}

// ReadCSV reads a CSV file with a header row, taking the columns named
// textColumn and labelColumn. Errors name the line.
func ReadCSV(r io.Reader, textColumn, labelColumn string) ([]Example, error) {
	cr := csv.NewReader(r)
	header, err := cr.Read()
	if errors.Is(err, io.EOF) {
		return nil, nil
	}
	if err != nil {
		return nil, fmt.Errorf("header: %w", err)
	}
	ti, li := slices.Index(header, textColumn), slices.Index(header, labelColumn)
	if ti < 0 || li < 0 {
		return nil, fmt.Errorf("header %q lacks column %q or %q", header, textColumn, labelColumn)
	}
	var out []Example
	for {
		rec, err := cr.Read()
		if errors.Is(err, io.EOF) {
			return out, nil
		}
		if err != nil {
			return nil, fmt.Errorf("reading: %w", err)
		}
		out = append(out, Example{Text: rec[ti], Label: rec[li]})
	}
}
