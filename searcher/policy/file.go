package policy

import (
	"fmt"
	"io"
	"os"
	"path/filepath"
)

// WriteFileAtomic writes a file that is either entirely old or entirely
// new, even across a crash: write fills a temporary file in path's
// directory, which is synced, closed and renamed over path, and the
// directory is synced so the rename is durable. On error the temporary
// file is removed and path is untouched.
func WriteFileAtomic(path string, write func(io.Writer) error) (err error) {
	dir := filepath.Dir(path)
	f, err := os.CreateTemp(dir, "."+filepath.Base(path)+".tmp-*")
	if err != nil {
		return fmt.Errorf("policy: create temporary file: %w", err)
	}
	defer func() {
		if err != nil {
			f.Close()
			os.Remove(f.Name())
		}
	}()
	if err := write(f); err != nil {
		return err
	}
	if err := f.Sync(); err != nil {
		return fmt.Errorf("policy: sync %s: %w", f.Name(), err)
	}
	if err := f.Close(); err != nil {
		return fmt.Errorf("policy: close %s: %w", f.Name(), err)
	}
	if err := os.Rename(f.Name(), path); err != nil {
		return fmt.Errorf("policy: rename to %s: %w", path, err)
	}
	d, err := os.Open(dir)
	if err != nil {
		return fmt.Errorf("policy: open directory %s: %w", dir, err)
	}
	defer d.Close()
	if err := d.Sync(); err != nil {
		return fmt.Errorf("policy: sync directory %s: %w", dir, err)
	}
	return nil
}

// SaveFile writes the trainer's checkpoint to path atomically (see
// WriteFileAtomic).
func (t *Trainer) SaveFile(path string) error {
	return WriteFileAtomic(path, t.Save)
}

// LoadFile reads a checkpoint file written by SaveFile (see Load).
func LoadFile(path string, b Backbone) (*Trainer, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("policy: open checkpoint: %w", err)
	}
	defer f.Close()
	t, err := Load(f, b)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return t, nil
}
