package localmodel

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"net/http"
	"os"
	"path/filepath"
)

// The default model file and its public source (see MODEL-SOURCE.md in the
// project's shared models folder).
const (
	// ModelFileName is the default model's file name.
	ModelFileName = "stories260K.gguf"
	// ModelSHA256 is the default model file's SHA-256, hex.
	ModelSHA256 = "270cba1bd5109f42d03350f60406024560464db173c0e387d91f0426d3bd256d"
	// ModelURL is the default model's public source, pinned to a revision.
	ModelURL = "https://huggingface.co/ggml-org/models/resolve/499bc8821c6b12b4e53c5bffcb21ec206f212d81/tinyllamas/stories260K.gguf"
	// ModelEnv is the environment variable naming the model file.
	ModelEnv = "STINT_MODEL"
)

// ErrModelNotFound means no model file was given or found.
var ErrModelNotFound = errors.New("localmodel: model file not found")

// ErrChecksum means a downloaded file's SHA-256 did not match.
var ErrChecksum = errors.New("localmodel: checksum mismatch")

// Locate returns the model file to use: flagPath if set, else the file
// named by getenv(ModelEnv), else the cached download (CachePath) if it
// exists. The error wraps ErrModelNotFound and says where it looked.
func Locate(flagPath string, getenv func(string) string) (string, error) {
	if flagPath != "" {
		if _, err := os.Stat(flagPath); err != nil {
			return "", fmt.Errorf("%w: --model %s: %w", ErrModelNotFound, flagPath, err)
		}
		return flagPath, nil
	}
	if p := getenv(ModelEnv); p != "" {
		if _, err := os.Stat(p); err != nil {
			return "", fmt.Errorf("%w: %s=%s: %w", ErrModelNotFound, ModelEnv, p, err)
		}
		return p, nil
	}
	cached, err := CachePath()
	if err != nil {
		return "", fmt.Errorf("%w: no --model, %s unset, and no cache dir: %w", ErrModelNotFound, ModelEnv, err)
	}
	if _, err := os.Stat(cached); err != nil {
		return "", fmt.Errorf("%w: no --model, %s unset, and no download at %s", ErrModelNotFound, ModelEnv, cached)
	}
	return cached, nil
}

// CachePath is where a downloaded default model is kept: stint/models/
// under the user cache directory.
func CachePath() (string, error) {
	dir, err := os.UserCacheDir()
	if err != nil {
		return "", err
	}
	return filepath.Join(dir, "stint", "models", ModelFileName), nil
}

// Fetch downloads url to dst (creating its directory) and keeps it only if
// its SHA-256 is wantSHA256 (hex); the file appears at dst atomically.
func Fetch(ctx context.Context, client *http.Client, url, dst, wantSHA256 string) error {
	if client == nil {
		client = http.DefaultClient
	}
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, url, nil)
	if err != nil {
		return fmt.Errorf("localmodel: download: %w", err)
	}
	resp, err := client.Do(req)
	if err != nil {
		return fmt.Errorf("localmodel: download: %w", err)
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		return fmt.Errorf("localmodel: download %s: status %s", url, resp.Status)
	}
	if err := os.MkdirAll(filepath.Dir(dst), 0o755); err != nil {
		return fmt.Errorf("localmodel: download: %w", err)
	}
	tmp, err := os.CreateTemp(filepath.Dir(dst), ".download-*")
	if err != nil {
		return fmt.Errorf("localmodel: download: %w", err)
	}
	defer os.Remove(tmp.Name())
	h := sha256.New()
	_, err = io.Copy(io.MultiWriter(tmp, h), resp.Body)
	if cerr := tmp.Close(); err == nil {
		err = cerr
	}
	if err != nil {
		return fmt.Errorf("localmodel: download %s: %w", url, err)
	}
	if got := hex.EncodeToString(h.Sum(nil)); got != wantSHA256 {
		return fmt.Errorf("%w: %s has sha256 %s, want %s", ErrChecksum, url, got, wantSHA256)
	}
	if err := os.Rename(tmp.Name(), dst); err != nil {
		return fmt.Errorf("localmodel: download: %w", err)
	}
	return nil
}
