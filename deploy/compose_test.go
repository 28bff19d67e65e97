package deploy

import (
	"bytes"
	"fmt"
	"net/url"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"go.yaml.in/yaml/v3"
)

// composeFile is the subset of the Compose specification compose.yaml
// uses. Decoding is strict: a key outside it (a typo, or a feature these
// tests do not check) is an error.
type composeFile struct {
	Name     string                    `yaml:"name"`
	XStint   composeService            `yaml:"x-stint"` // the settings merged into every stint service
	Services map[string]composeService `yaml:"services"`
	Volumes  map[string]struct{}       `yaml:"volumes"`
}

type composeService struct {
	Image           string                   `yaml:"image"`
	Build           *composeBuild            `yaml:"build"`
	PullPolicy      string                   `yaml:"pull_policy"`
	Restart         string                   `yaml:"restart"`
	User            string                   `yaml:"user"`
	Command         []string                 `yaml:"command"`
	EnvFile         []composeEnvFile         `yaml:"env_file"`
	Environment     map[string]string        `yaml:"environment"`
	Volumes         []string                 `yaml:"volumes"`
	Ports           []string                 `yaml:"ports"`
	DependsOn       map[string]composeDepend `yaml:"depends_on"`
	Healthcheck     *composeHealthcheck      `yaml:"healthcheck"`
	ReadOnly        bool                     `yaml:"read_only"`
	Tmpfs           []string                 `yaml:"tmpfs"`
	CapDrop         []string                 `yaml:"cap_drop"`
	SecurityOpt     []string                 `yaml:"security_opt"`
	StopGracePeriod string                   `yaml:"stop_grace_period"`
	Deploy          *composeDeploy           `yaml:"deploy"`
}

// composeDeploy is a service's deploy section: how many replicas run.
type composeDeploy struct {
	Replicas int `yaml:"replicas"`
}

type composeBuild struct {
	Context    string `yaml:"context"`
	Dockerfile string `yaml:"dockerfile"`
}

type composeEnvFile struct {
	Path     string `yaml:"path"`
	Required *bool  `yaml:"required"`
}

type composeDepend struct {
	Condition string `yaml:"condition"`
}

type composeHealthcheck struct {
	Test        []string `yaml:"test"`
	Interval    string   `yaml:"interval"`
	Timeout     string   `yaml:"timeout"`
	StartPeriod string   `yaml:"start_period"`
	Retries     int      `yaml:"retries"`
}

func decodeCompose(src []byte) (composeFile, error) {
	var c composeFile
	dec := yaml.NewDecoder(bytes.NewReader(src))
	dec.KnownFields(true)
	if err := dec.Decode(&c); err != nil {
		return composeFile{}, fmt.Errorf("compose.yaml: %w", err)
	}
	return c, nil
}

func loadCompose(t *testing.T) composeFile {
	t.Helper()
	c, err := decodeCompose(readFile(t, "compose.yaml"))
	require.NoError(t, err)
	return c
}

// stintServices are the services that run the stint image.
func stintServices(c composeFile) map[string]composeService {
	out := map[string]composeService{}
	for name, s := range c.Services {
		if s.Image == c.XStint.Image {
			out[name] = s
		}
	}
	return out
}

// healthURL returns the URL a stint-probe health check asks.
func healthURL(t *testing.T, name string, s composeService) *url.URL {
	t.Helper()
	h := s.Healthcheck
	require.Falsef(t, h == nil || len(h.Test) != 3 || h.Test[0] != "CMD" || h.Test[1] != "/usr/local/bin/stint-probe", "service %s: health check %v is not [CMD, /usr/local/bin/stint-probe, URL]", name, h)
	u, err := url.Parse(h.Test[2])
	require.NoError(t, err, "service %s", name)
	return u
}

// splitVolume splits a short-syntax volume "SOURCE:TARGET[:MODE]", where
// SOURCE may be a "${VAR:-default}" interpolation holding colons.
func splitVolume(v string) (source, target, mode string) {
	head := ""
	if strings.HasPrefix(v, "${") {
		if end := strings.IndexByte(v, '}'); end > 0 {
			head, v = v[:end+1], v[end+1:]
		}
	}
	parts := strings.SplitN(v, ":", 3)
	source = head + parts[0]
	if len(parts) > 1 {
		target = parts[1]
	}
	if len(parts) > 2 {
		mode = parts[2]
	}
	return source, target, mode
}

// volumeSource returns the source of the volume mounted at target.
func volumeSource(s composeService, target string) (string, bool) {
	for _, v := range s.Volumes {
		if src, tgt, _ := splitVolume(v); tgt == target {
			return src, true
		}
	}
	return "", false
}

var (
	stintKeyRE = regexp.MustCompile(`stint-[0-9a-f]{64}`)
	// Values shaped like provider keys, tokens or private keys.
	keyLikeRE = regexp.MustCompile(`\bsk-[A-Za-z0-9_-]{16,}|\bAKIA[0-9A-Z]{16}\b|-----BEGIN [A-Z ]*PRIVATE KEY-----|\bgh[pousr]_[A-Za-z0-9]{30,}|\bxox[baprs]-[A-Za-z0-9-]{10,}`)
)

// composeSecretProblems lists secrets set inline in a compose file.
func composeSecretProblems(c composeFile) []string {
	var p []string
	for name, s := range c.Services {
		for k, v := range s.Environment {
			if secretName(k) {
				p = append(p, fmt.Sprintf("service %s sets %s inline; secrets go in the env file", name, k))
			}
			if stintKeyRE.MatchString(v) || keyLikeRE.MatchString(v) {
				p = append(p, fmt.Sprintf("service %s: %s looks like a key", name, k))
			}
		}
		for _, arg := range s.Command {
			if stintKeyRE.MatchString(arg) || keyLikeRE.MatchString(arg) || arg == "--key" {
				p = append(p, fmt.Sprintf("service %s passes a key on its command line", name))
			}
		}
	}
	return p
}

func TestComposeDecodingIsStrict(t *testing.T) {
	src := string(readFile(t, "compose.yaml"))
	tests := []struct {
		name    string
		src     string
		wantErr string
	}{
		{"as written", src, ""},
		{"typo'd service key", strings.Replace(src, "healthcheck: &proxy-health", "healtcheck: &proxy-health", 1), "field healtcheck not found"},
		{"unknown top-level key", src + "secrets: {}\n", "field secrets not found"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			_, err := decodeCompose([]byte(tc.src))
			require.False(t, tc.wantErr == "" && err != nil)
			require.Falsef(t, tc.wantErr != "" && (err == nil || !strings.Contains(err.Error(), tc.wantErr)), "got %v, want an error containing %q", err, tc.wantErr)
		})
	}
}

func TestComposeSecretChecksCatchInlineKeys(t *testing.T) {
	c := loadCompose(t)
	p := composeSecretProblems(c)
	require.Emptyf(t, p, "compose.yaml: %v", p)
	tests := []struct {
		name    string
		breakIt func(*composeService)
		want    string
	}{
		{"inline upstream key", func(s *composeService) { s.Environment = map[string]string{"STINT_UPSTREAM_KEY": "anything"} }, "sets STINT_UPSTREAM_KEY inline"},
		{"key-shaped value", func(s *composeService) { s.Environment = map[string]string{"EXTRA": "sk-" + strings.Repeat("a1", 12)} }, "looks like a key"},
		{"stint key in a value", func(s *composeService) { s.Environment = map[string]string{"X": "stint-" + strings.Repeat("0f", 32)} }, "looks like a key"},
		{"key flag", func(s *composeService) { s.Command = append(slices.Clone(s.Command), "--key", "k") }, "command line"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			broken := composeFile{Services: map[string]composeService{}}
			s := c.Services["search"]
			tc.breakIt(&s)
			broken.Services["search"] = s
			p := composeSecretProblems(broken)
			assert.Truef(t, slices.ContainsFunc(p, func(s string) bool { return strings.Contains(s, tc.want) }), "problems %v do not mention %q", p, tc.want)
		})
	}
}

// TestCompose checks the compose file's services: every one has a health
// check, stint services take secrets only from env files and run
// hardened, health checks and links use the ports the services listen on,
// and mounted files exist.
func TestCompose(t *testing.T) {
	c := loadCompose(t)
	for _, want := range []string{"redis", "proxy-a", "proxy-b", "lb", "local", "search"} {
		_, ok := c.Services[want]
		assert.Truef(t, ok, "no service %s", want)
	}
	build := c.XStint.Build
	assert.Falsef(t, build == nil || filepath.Join(build.Context, build.Dockerfile) != "../deploy/Dockerfile", "stint services build %+v, want context .. and deploy/Dockerfile", build)
	for name, s := range c.Services {
		assert.Falsef(t, s.Healthcheck == nil || len(s.Healthcheck.Test) < 2, "service %s has no health check", name)
		for dep, d := range s.DependsOn {
			assert.Containsf(t, c.Services, dep, "service %s depends on %s, which does not exist", name, dep)
			assert.Equalf(t, "service_healthy", d.Condition, "service %s depends on %s: condition", name, dep)
		}
		assert.Falsef(t, !s.ReadOnly || !slices.Equal(s.CapDrop, []string{"ALL"}) || !slices.Contains(s.SecurityOpt, "no-new-privileges:true"), "service %s: want read_only, cap_drop [ALL] and no-new-privileges", name)
		for _, v := range s.Volumes {
			src, tgt, mode := splitVolume(v)
			assert.Falsef(t, (strings.HasPrefix(src, "./") || strings.HasPrefix(src, "${")) && mode != "ro", "service %s mounts host path %s at %s writable; host files are mounted :ro", name, src, tgt)
			switch {
			case strings.HasPrefix(src, "./"):
				_, err := os.Stat(src)
				assert.NoError(t, err, "service %s mounts %s: %v", name, src, err)
			case strings.HasPrefix(src, "${"):
				// a host path the operator chooses (model, tasks)
			default:
				_, ok := c.Volumes[src]
				assert.Truef(t, ok, "service %s mounts volume %s, not declared under volumes", name, src)
			}
		}
		for _, p := range s.Ports {
			assert.Truef(t, strings.HasPrefix(p, "127.0.0.1:"), "service %s publishes %s on every interface; bind 127.0.0.1 and put TLS in front for more", name, p)
		}
	}
	// The search sidecars: replicas sharing one queue on the Redis of the
	// config they are given.
	if s := c.Services["search"]; assert.False(t, s.Deploy == nil || s.Deploy.Replicas < 2, "service search should run several replicas sharing the job queue") {
		cfg := parseStintConfig(t, readFile(t, mustSource(t, "search", s, flagValue(s.Command, "--config"))))
		assert.NotNil(t, cfg.Store.Redis, "service search's --config has no store.redis: its replicas would not share a queue")
	}
	stint := stintServices(c)
	assert.Len(t, stint, 4, "stint services %v, want proxy-a, proxy-b, local and search", slices.Collect(mapsKeys(stint)))
	for name, s := range stint {
		paths := []string{}
		for _, e := range s.EnvFile {
			paths = append(paths, e.Path)
		}
		assert.Falsef(t, !slices.Equal(paths, []string{"stint.env.example", "stint.env"}) || s.EnvFile[1].Required == nil || *s.EnvFile[1].Required, "service %s env_file %v: want the placeholders, then an optional stint.env", name, paths)
		// Every stint service's health check asks its own --listen port.
		listen := flagValue(s.Command, "--listen")
		if slices.Contains(s.Command, "serve") && s.Command[0] == "serve" {
			listen = parseStintConfig(t, readFile(t, mustSource(t, name, s, flagValue(s.Command, "--config")))).Listen
		}
		u := healthURL(t, name, s)
		assert.Falsef(t, u.Port() != port(t, listen) || u.Hostname() != "127.0.0.1", "service %s health check %s does not ask its listen address %s", name, u, listen)
		if m := flagValue(s.Command, "--model"); m != "" {
			_, ok := volumeSource(s, filepath.Dir(m))
			assert.Truef(t, ok, "service %s reads the model %s from no mounted volume", name, m)
		}
	}
	_, err := os.Stat("stint.env.example")
	assert.NoError(t, err)
	// Each proxy replica has its own data volume: bbolt allows one process
	// per file.
	a, _ := volumeSource(c.Services["proxy-a"], "/var/lib/stint")
	b, _ := volumeSource(c.Services["proxy-b"], "/var/lib/stint")
	assert.Falsef(t, a == "" || a == b, "proxy-a and proxy-b data volumes %q and %q: want one each", a, b)
}

// mustSource returns the host file mounted at target in service s.
func mustSource(t *testing.T, name string, s composeService, target string) string {
	t.Helper()
	src, ok := volumeSource(s, target)
	require.Truef(t, ok, "service %s mounts nothing at %s", name, target)
	return src
}

// TestNoSecretsInDeployFiles scans every deployment file for keys, and
// holds the env file example and the example Secret to placeholders.
func TestNoSecretsInDeployFiles(t *testing.T) {
	for _, f := range deployFiles(t) {
		b := readFile(t, f)
		assert.Nilf(t, stintKeyRE.FindIndex(b), "%s holds a stint client key at these byte offsets; configs hold sha256 hashes only", f)
		assert.Nilf(t, keyLikeRE.Find(b), "%s holds something shaped like a key", f)
	}
	lines := strings.Split(string(readFile(t, "stint.env.example")), "\n")
	n := 0
	for _, line := range lines {
		line = strings.TrimSpace(line)
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		k, v, ok := strings.Cut(line, "=")
		assert.Falsef(t, !ok || !strings.HasPrefix(v, "replace-"), "stint.env.example: %q is not NAME=replace-… (placeholders only)", line)
		assert.Truef(t, strings.HasPrefix(k, "STINT_"), "stint.env.example: %s is not a STINT_ variable", k)
		n++
	}
	assert.False(t, n == 0, "stint.env.example sets nothing")
	assert.Contains(t, string(readFile(t, ".gitignore")), "/stint.env", "deploy/.gitignore does not ignore stint.env")
	assert.Contains(t, string(readFile(t, "../.dockerignore")), "/deploy/stint.env", ".dockerignore does not keep deploy/stint.env out of the build context")
}
