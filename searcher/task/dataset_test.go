package task

import (
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestReadJSONL(t *testing.T) {
	tests := []struct {
		name, in string
		want     []Example
		err      string
	}{
		{"two rows and a blank", "{\"t\":\"a\",\"l\":\"x\"}\n\n{\"t\":\"b\",\"l\":\"y\",\"extra\":1}\n", []Example{{"a", "x"}, {"b", "y"}}, ""},
		{"no trailing newline", `{"t":"a","l":"x"}`, []Example{{"a", "x"}}, ""},
		{"empty", "", nil, ""},
		{"bad json", "{\"t\":\"a\",\"l\":\"x\"}\n{oops\n", nil, "line 2"},
		{"missing field", `{"t":"a"}`, nil, `line 1: no field "l"`},
		{"not a string", `{"t":"a","l":3}`, nil, `line 1: field "l" is not a string`},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, err := ReadJSONL(strings.NewReader(tt.in), "t", "l")
			check(t, got, err, tt.want, tt.err)
		})
	}
}

func TestReadCSV(t *testing.T) {
	tests := []struct {
		name, in string
		want     []Example
		err      string
	}{
		{"columns in any order", "l,id,t\nx,1,\"a, b\"\ny,2,c\n", []Example{{"a, b", "x"}, {"c", "y"}}, ""},
		{"header only", "t,l\n", nil, ""},
		{"empty", "", nil, ""},
		{"missing column", "text,l\na,x\n", nil, "lacks column"},
		{"ragged row", "t,l\na,x\nb\n", nil, "line 3"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, err := ReadCSV(strings.NewReader(tt.in), "t", "l")
			check(t, got, err, tt.want, tt.err)
		})
	}
}

func check(t *testing.T, got []Example, err error, want []Example, wantErr string) {
	t.Helper()
	if wantErr != "" {
		require.Falsef(t, err == nil || !strings.Contains(err.Error(), wantErr), "err = %v, want one containing %q", err, wantErr)
		return
	}
	require.NoError(t, err)
	require.Len(t, got, len(want), "got %q, want %q", got, want)
	for i := range got {
		assert.Equal(t, want[i], got[i], "row %d = %q, want %q", i, got[i], want[i])
	}
}
