// Package task reads a prompt-search task file: what to classify (the
// labels and the single-token verbalizer each is read from), the datasets,
// the template a candidate prompt is filled into, which model and endpoint
// score it, and the search's budget and reward settings.
//
// A task file is YAML, decoded strictly: an unknown key is refused with its
// line, and every validation error is a *FieldError naming the field and its
// line. ExampleFile holds a complete, commented task file; Load reads one from
// disk, resolving dataset paths against the file's directory.
//
// Datasets are JSONL (one {"text": ..., "label": ...} object a line, the
// field names configurable) or CSV (a header row, the columns
// configurable).
package task
