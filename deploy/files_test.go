package deploy

import (
	"bufio"
	"bytes"
	"encoding/json"
	"fmt"
	"net"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	"go.yaml.in/yaml/v3"
)

// readFile reads a file under deploy/ (the test's working directory).
func readFile(t *testing.T, path string) []byte {
	t.Helper()
	b, err := os.ReadFile(path)
	require.NoError(t, err)
	return b
}

// stintConfig is the part of a stint config these tests compare with the
// other files. It is read leniently: `stint serve --check-config` is what
// validates a config.
type stintConfig struct {
	Listen    string `yaml:"listen"`
	Data      string `yaml:"data"`
	Upstreams []struct {
		Name    string `yaml:"name"`
		URL     string `yaml:"url"`
		KeyEnv  string `yaml:"key_env"`
		Timeout string `yaml:"timeout"`
	} `yaml:"upstreams"`
	Cache struct {
		MaxBytes string `yaml:"max_bytes"`
		HotBytes string `yaml:"hot_bytes"`
	} `yaml:"cache"`
	Server struct {
		MaxBodyBytes    string `yaml:"max_body_bytes"`
		ShutdownTimeout string `yaml:"shutdown_timeout"`
	} `yaml:"server"`
	Store struct {
		Redis *struct {
			Addrs       []string `yaml:"addrs"`
			PasswordEnv string   `yaml:"password_env"`
		} `yaml:"redis"`
	} `yaml:"store"`
	UI struct {
		SearchSidecar string `yaml:"search_sidecar"`
	} `yaml:"ui"`
}

func parseStintConfig(t *testing.T, src []byte) stintConfig {
	t.Helper()
	var c stintConfig
	require.NoError(t, yaml.Unmarshal(src, &c), "stint config")
	return c
}

// port returns the port of a host:port address.
func port(t *testing.T, addr string) string {
	t.Helper()
	_, p, err := net.SplitHostPort(addr)
	require.NoError(t, err, "address %q", addr)
	return p
}

// byteSize reads sizes as stint and GOMEMLIMIT write them (4MiB, 2GiB,
// 4194304) and nginx's (4m, 512k).
func byteSize(t *testing.T, s string) int64 {
	t.Helper()
	s = strings.TrimSpace(s)
	for _, u := range []struct {
		suffix string
		mult   int64
	}{{"KiB", 1 << 10}, {"MiB", 1 << 20}, {"GiB", 1 << 30}, {"k", 1 << 10}, {"m", 1 << 20}, {"g", 1 << 30}, {"B", 1}} {
		if num, ok := strings.CutSuffix(s, u.suffix); ok {
			n, err := strconv.ParseInt(num, 10, 64)
			require.NoError(t, err, "size %q", s)
			return n * u.mult
		}
	}
	n, err := strconv.ParseInt(s, 10, 64)
	require.NoError(t, err, "size %q", s)
	return n
}

func duration(t *testing.T, s string) time.Duration {
	t.Helper()
	d, err := time.ParseDuration(s)
	require.NoError(t, err, "duration %q", s)
	return d
}

// flagValue returns the value after flag in args ("--listen", "X").
func flagValue(args []string, flag string) string {
	for i, a := range args {
		if a == flag && i+1 < len(args) {
			return args[i+1]
		}
		if v, ok := strings.CutPrefix(a, flag+"="); ok {
			return v
		}
	}
	return ""
}

// instruction is one Dockerfile instruction with continuation lines joined.
type instruction struct {
	Stage int // index of the FROM it belongs to
	Cmd   string
	Args  string
}

// parseDockerfile reads instructions, joining lines ending in a backslash
// and dropping comments.
func parseDockerfile(src []byte) ([]instruction, error) {
	var out []instruction
	stage := -1
	var cur strings.Builder
	sc := bufio.NewScanner(bytes.NewReader(src))
	for sc.Scan() {
		line := strings.TrimSpace(sc.Text())
		if cur.Len() == 0 && (line == "" || strings.HasPrefix(line, "#")) {
			continue
		}
		if cont, ok := strings.CutSuffix(line, "\\"); ok {
			cur.WriteString(cont + " ")
			continue
		}
		cur.WriteString(line)
		full := cur.String()
		cur.Reset()
		cmd, args, _ := strings.Cut(full, " ")
		cmd = strings.ToUpper(cmd)
		if cmd == "FROM" {
			stage++
		}
		out = append(out, instruction{Stage: stage, Cmd: cmd, Args: strings.TrimSpace(args)})
	}
	if cur.Len() > 0 {
		return nil, fmt.Errorf("dockerfile ends inside a continued line")
	}
	return out, sc.Err()
}

// execForm decodes a JSON-array (exec form) argument such as CMD's.
func execForm(t *testing.T, args string) []string {
	t.Helper()
	var v []string
	err := json.Unmarshal([]byte(args), &v)
	require.NoError(t, err, "%q is not an exec-form JSON array: %v", args, err)
	return v
}

// nginxDirectives returns every "name args;" directive of an nginx config,
// in order, with comments removed (blocks are flattened).
func nginxDirectives(src []byte) [][]string {
	var out [][]string
	var cur []string
	sc := bufio.NewScanner(bytes.NewReader(src))
	for sc.Scan() {
		line, _, _ := strings.Cut(sc.Text(), "#")
		for _, f := range strings.Fields(strings.NewReplacer("{", " { ", "}", " } ", ";", " ; ").Replace(line)) {
			switch f {
			case ";", "{", "}":
				if len(cur) > 0 {
					out = append(out, cur)
				}
				cur = nil
			default:
				cur = append(cur, f)
			}
		}
	}
	return out
}

// unit is a systemd unit file: section → key → values in order (keys
// such as SystemCallFilter may repeat).
type unit map[string]map[string][]string

// parseUnit reads a systemd unit's key=value lines by section.
func parseUnit(src []byte) (unit, error) {
	u := unit{}
	section := ""
	sc := bufio.NewScanner(bytes.NewReader(src))
	for n := 1; sc.Scan(); n++ {
		line := strings.TrimSpace(sc.Text())
		switch {
		case line == "" || strings.HasPrefix(line, "#") || strings.HasPrefix(line, ";"):
		case strings.HasPrefix(line, "[") && strings.HasSuffix(line, "]"):
			section = line[1 : len(line)-1]
			if u[section] == nil {
				u[section] = map[string][]string{}
			}
		default:
			k, v, ok := strings.Cut(line, "=")
			if !ok || section == "" {
				return nil, fmt.Errorf("line %d: %q is not key=value inside a section", n, line)
			}
			u[section][strings.TrimSpace(k)] = append(u[section][strings.TrimSpace(k)], strings.TrimSpace(v))
		}
	}
	return u, sc.Err()
}

// deployFiles lists every file under deploy/ except Go sources.
func deployFiles(t *testing.T) []string {
	t.Helper()
	var out []string
	err := filepath.WalkDir(".", func(path string, d os.DirEntry, err error) error {
		if err != nil {
			return err
		}
		if !d.IsDir() && !strings.HasSuffix(path, ".go") {
			out = append(out, path)
		}
		return nil
	})
	require.NoError(t, err)
	return out
}
