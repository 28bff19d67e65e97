package deploy

import (
	"fmt"
	"net/url"
	"path"
	"regexp"
	"slices"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	corev1 "k8s.io/api/core/v1"
)

// source is one file's statement of a fact.
type source struct{ from, value string }

// fact is something several deployment files must agree on.
type fact struct {
	name    string
	sources []source
}

// finalStage returns the instructions of the Dockerfile's last stage.
func finalStage(t *testing.T) []instruction {
	t.Helper()
	ins, err := parseDockerfile(readFile(t, "Dockerfile"))
	require.NoError(t, err)
	last := ins[len(ins)-1].Stage
	var out []instruction
	for _, in := range ins {
		if in.Stage == last {
			out = append(out, in)
		}
	}
	return out
}

func instructionArgs(stage []instruction, cmd string) []string {
	var out []string
	for _, in := range stage {
		if in.Cmd == cmd {
			out = append(out, in.Args)
		}
	}
	return out
}

func hostPort(t *testing.T, rawURL string) (host, port string) {
	t.Helper()
	u, err := url.Parse(rawURL)
	require.NoError(t, err)
	return u.Hostname(), u.Port()
}

// publishedTarget returns the container side of "HOST:PORT:CONTAINER".
func publishedTarget(p string) string { return p[strings.LastIndexByte(p, ':')+1:] }

// mounted returns target when the service mounts something there.
func mounted(s composeService, target string) string {
	if _, ok := volumeSource(s, target); ok {
		return target
	}
	return "(nothing mounted at " + target + ")"
}

func mountPath(c corev1.Container, volume string) string {
	for _, m := range c.VolumeMounts {
		if m.Name == volume {
			return m.MountPath
		}
	}
	return ""
}

// TestFilesAgree reads each fact from every file that states it: the
// image, ports, paths, user and sizes must be the same everywhere.
func TestFilesAgree(t *testing.T) {
	final := finalStage(t)
	c := loadCompose(t)
	m := loadManifests(t)
	u, err := parseUnit(readFile(t, "systemd/stint.service"))
	require.NoError(t, err)
	svc := u["Service"]

	composeCfg := parseStintConfig(t, readFile(t, mustSource(t, "proxy-a", c.Services["proxy-a"], flagValue(c.Services["proxy-a"].Command, "--config"))))
	k8sCfg := parseStintConfig(t, k8sProxyConfig(t, m))
	hostCfg := parseStintConfig(t, readFile(t, "config/host.yaml"))
	proxy, search := m.deployments["stint-proxy"].Spec.Template.Spec, m.deployments["stint-search"].Spec.Template.Spec
	pc, sc := proxy.Containers[0], search.Containers[0]
	k8sService, k8sSearchService := m.services["stint"], m.services["stint-search"]

	dockerCmd := execForm(t, instructionArgs(final, "CMD")[0])
	_, dockerHealthPort := hostPort(t, execForm(t, strings.TrimPrefix(instructionArgs(final, "HEALTHCHECK")[0][strings.Index(instructionArgs(final, "HEALTHCHECK")[0], "CMD "):], "CMD "))[1])
	dockerUser, _, _ := strings.Cut(instructionArgs(final, "USER")[0], ":")
	dockerTag := regexp.MustCompile(`docker build -f deploy/Dockerfile -t (\S+) \.`).FindSubmatch(readFile(t, "Dockerfile"))
	require.False(t, dockerTag == nil, "the Dockerfile's header does not show its docker build -t command")
	var chownUID, chownTargets []string
	for _, a := range instructionArgs(final, "COPY") {
		f := strings.Fields(a)
		for _, opt := range f {
			if owner, ok := strings.CutPrefix(opt, "--chown="); ok {
				uid, _, _ := strings.Cut(owner, ":")
				chownUID = append(chownUID, uid)
				chownTargets = append(chownTargets, f[len(f)-1])
			}
		}
	}
	require.Len(t, chownUID, 2, "the final stage copies %d directories with --chown, want the two data directories", len(chownUID))
	var nginxUpstreamPorts []string
	nginxListen, nginxBody := "", ""
	var nginxServers []string
	for _, d := range nginxDirectives(readFile(t, "nginx.conf")) {
		switch d[0] {
		case "server":
			if len(d) > 1 {
				h, p, _ := strings.Cut(d[1], ":")
				nginxServers = append(nginxServers, h)
				nginxUpstreamPorts = append(nginxUpstreamPorts, p)
			}
		case "listen":
			nginxListen = d[1]
		case "client_max_body_size":
			nginxBody = d[1]
		}
	}
	assert.Truef(t, slices.Equal(nginxServers, []string{"proxy-a", "proxy-b"}), "nginx upstream servers %v, want the compose proxies proxy-a and proxy-b", nginxServers)
	localHost, localPort := "", ""
	for _, up := range composeCfg.Upstreams {
		if up.Name == "local" {
			localHost, localPort = hostPort(t, up.URL)
		}
	}
	searchProxyHost, searchProxyPort := hostPort(t, flagValue(c.Services["search"].Command, "--proxy"))
	k8sSearchProxyHost, k8sSearchProxyPort := hostPort(t, flagValue(sc.Args, "--proxy"))
	assert.Falsef(t, searchProxyHost != "lb" || k8sSearchProxyHost != k8sService.Name, "the sidecar's --proxy hosts are %s (compose) and %s (k8s), want lb and %s", searchProxyHost, k8sSearchProxyHost, k8sService.Name)
	// The operator page's sidecar URL: host and port, and nothing that
	// would make the page ask another path than the job API's root.
	sidecarAddr := func(rawURL string) string {
		u, err := url.Parse(rawURL)
		if err != nil || u.Scheme != "http" || strings.Trim(u.Path, "/") != "" {
			return fmt.Sprintf("(not an http:// base URL: %q)", rawURL)
		}
		return u.Host
	}
	var configItem string
	for _, v := range proxy.Volumes {
		if v.Name == "config" && v.ConfigMap != nil && v.ConfigMap.Name == "stint-config" && len(v.ConfigMap.Items) == 1 {
			configItem = path.Join(mountPath(pc, "config"), v.ConfigMap.Items[0].Path)
		}
	}

	facts := []fact{
		{"image", []source{
			{"Dockerfile header (docker build -t)", string(dockerTag[1])},
			{"compose x-stint image", c.XStint.Image},
			{"k8s stint-proxy image", pc.Image},
			{"k8s stint-search image", sc.Image},
		}},
		{"proxy port", []source{
			{"Dockerfile EXPOSE", instructionArgs(final, "EXPOSE")[0]},
			{"Dockerfile HEALTHCHECK", dockerHealthPort},
			{"config/proxy.yaml listen", port(t, composeCfg.Listen)},
			{"compose proxy-a health check", healthURL(t, "proxy-a", c.Services["proxy-a"]).Port()},
			{"compose proxy-b health check", healthURL(t, "proxy-b", c.Services["proxy-b"]).Port()},
			{"nginx upstream server 1", nginxUpstreamPorts[0]},
			{"nginx upstream server 2", nginxUpstreamPorts[1]},
			{"k8s ConfigMap listen", port(t, k8sCfg.Listen)},
			{"k8s containerPort", fmt.Sprint(pc.Ports[0].ContainerPort)},
			{"k8s Service port", fmt.Sprint(k8sService.Spec.Ports[0].Port)},
			{"k8s stint-search --proxy", k8sSearchProxyPort},
			{"config/host.yaml listen", port(t, hostCfg.Listen)},
		}},
		{"load balancer port", []source{
			{"nginx listen", nginxListen},
			{"compose lb published port", publishedTarget(c.Services["lb"].Ports[0])},
			{"compose lb health check", func() string {
				_, p := hostPort(t, c.Services["lb"].Healthcheck.Test[len(c.Services["lb"].Healthcheck.Test)-1])
				return p
			}()},
			{"compose search --proxy", searchProxyPort},
		}},
		{"config path", []source{
			{"Dockerfile CMD --config", flagValue(dockerCmd, "--config")},
			{"compose proxy-a --config", flagValue(c.Services["proxy-a"].Command, "--config")},
			{"compose proxy-b --config", flagValue(c.Services["proxy-b"].Command, "--config")},
			{"compose proxy-b config mount", func() string {
				_, ok := volumeSource(c.Services["proxy-b"], flagValue(dockerCmd, "--config"))
				return map[bool]string{true: flagValue(dockerCmd, "--config")}[ok]
			}()},
			{"k8s --config", flagValue(pc.Args, "--config")},
			{"k8s ConfigMap mount + item", configItem},
			{"systemd ExecStart --config", flagValue(strings.Fields(svc["ExecStart"][0]), "--config")},
			{"systemd ExecStartPre --config", flagValue(strings.Fields(svc["ExecStartPre"][0]), "--config")},
		}},
		{"data dir", []source{
			{"Dockerfile COPY --chown target", chownTargets[0]},
			{"Dockerfile VOLUME", execForm(t, instructionArgs(final, "VOLUME")[0])[0]},
			{"Dockerfile WORKDIR", instructionArgs(final, "WORKDIR")[0]},
			{"config/proxy.yaml data", composeCfg.Data},
			{"compose proxy-a data volume", mounted(c.Services["proxy-a"], composeCfg.Data)},
			{"compose proxy-b data volume", mounted(c.Services["proxy-b"], composeCfg.Data)},
			{"k8s ConfigMap data", k8sCfg.Data},
			{"k8s data mount", mountPath(pc, "data")},
			{"config/host.yaml data", hostCfg.Data},
			{"systemd StateDirectory", "/var/lib/" + svc["StateDirectory"][0]},
			{"systemd WorkingDirectory", svc["WorkingDirectory"][0]},
		}},
		{"non-root uid", []source{
			{"Dockerfile USER", dockerUser},
			{"Dockerfile COPY --chown (1)", chownUID[0]},
			{"Dockerfile COPY --chown (2)", chownUID[1]},
			{"k8s stint-proxy runAsUser", fmt.Sprint(*proxy.SecurityContext.RunAsUser)},
			{"k8s stint-search runAsUser", fmt.Sprint(*search.SecurityContext.RunAsUser)},
		}},
		{"search sidecar port", []source{
			{"compose search --listen", port(t, flagValue(c.Services["search"].Command, "--listen"))},
			{"compose search health check", healthURL(t, "search", c.Services["search"]).Port()},
			{"compose search published port", publishedTarget(c.Services["search"].Ports[0])},
			{"k8s stint-search --listen", port(t, flagValue(sc.Args, "--listen"))},
			{"k8s stint-search containerPort", fmt.Sprint(sc.Ports[0].ContainerPort)},
			{"k8s stint-search Service port", fmt.Sprint(k8sSearchService.Spec.Ports[0].Port)},
		}},
		{"search data dir", []source{
			{"Dockerfile COPY --chown target", chownTargets[1]},
			{"compose search --data", flagValue(c.Services["search"].Command, "--data")},
			{"compose search data volume", mounted(c.Services["search"], flagValue(c.Services["search"].Command, "--data"))},
			{"k8s stint-search --data", flagValue(sc.Args, "--data")},
			{"k8s stint-search data mount", mountPath(sc, "data")},
		}},
		{"local model address", []source{
			{"compose service name and --listen port", "local:" + port(t, flagValue(c.Services["local"].Command, "--listen"))},
			{"compose local health check", "local:" + healthURL(t, "local", c.Services["local"]).Port()},
			{"config/proxy.yaml upstream local", localHost + ":" + localPort},
		}},
		{"compose sidecar address", []source{
			{"compose service search and its --listen port", "search:" + port(t, flagValue(c.Services["search"].Command, "--listen"))},
			{"config/proxy.yaml ui.search_sidecar", sidecarAddr(composeCfg.UI.SearchSidecar)},
		}},
		{"k8s sidecar address", []source{
			{"k8s Service stint-search name and port", k8sSearchService.Name + ":" + fmt.Sprint(k8sSearchService.Spec.Ports[0].Port)},
			{"k8s Service name and stint-search --listen port", k8sSearchService.Name + ":" + port(t, flagValue(sc.Args, "--listen"))},
			{"k8s ConfigMap ui.search_sidecar", sidecarAddr(k8sCfg.UI.SearchSidecar)},
		}},
		{"model file", []source{
			{"compose local --model", flagValue(c.Services["local"].Command, "--model")},
			{"compose search --model", flagValue(c.Services["search"].Command, "--model")},
			{"k8s stint-search --model", flagValue(sc.Args, "--model")},
		}},
		{"max request body (bytes)", []source{
			{"config/proxy.yaml server.max_body_bytes", fmt.Sprint(byteSize(t, composeCfg.Server.MaxBodyBytes))},
			{"nginx client_max_body_size", fmt.Sprint(byteSize(t, nginxBody))},
		}},
		{"compose Redis address", []source{
			{"compose service redis, redis-server's default port", "redis:6379"},
			{"config/proxy.yaml store.redis.addrs", strings.Join(composeCfg.Store.Redis.Addrs, ",")},
		}},
	}
	var table strings.Builder
	for _, f := range facts {
		want := f.sources[0].value
		for _, s := range f.sources {
			fmt.Fprintf(&table, "%-26s %-48s %s\n", f.name, s.from, s.value)
			assert.Falsef(t, s.value != want || s.value == "", "%s: %s says %q, %s says %q", f.name, f.sources[0].from, want, s.from, s.value)
		}
	}
	t.Logf("facts read from the files:\n%s", table.String())
}

// TestSecretsTheConfigsNameAreProvided checks every environment variable a
// config names for a secret is in the env file example, and that the
// Kubernetes proxy sets the ones its config names from the Secret.
func TestSecretsTheConfigsNameAreProvided(t *testing.T) {
	example := string(readFile(t, "stint.env.example"))
	m := loadManifests(t)
	k8sEnv := map[string]bool{}
	for _, e := range m.deployments["stint-proxy"].Spec.Template.Spec.Containers[0].Env {
		if e.ValueFrom != nil && e.ValueFrom.SecretKeyRef != nil {
			k8sEnv[e.Name] = true
		}
	}
	configs := map[string][]byte{
		"config/proxy.yaml": readFile(t, "config/proxy.yaml"),
		"config/host.yaml":  readFile(t, "config/host.yaml"),
		"k8s ConfigMap":     k8sProxyConfig(t, m),
	}
	for name, src := range configs {
		cfg := parseStintConfig(t, src)
		var env []string
		for _, u := range cfg.Upstreams {
			if u.KeyEnv != "" {
				env = append(env, u.KeyEnv)
			}
		}
		if r := cfg.Store.Redis; r != nil && r.PasswordEnv != "" {
			env = append(env, r.PasswordEnv)
		}
		for _, e := range env {
			assert.Contains(t, example, "\n"+e+"=", "%s names %s, which stint.env.example does not list", name, e)
			assert.Falsef(t, name == "k8s ConfigMap" && !k8sEnv[e], "%s names %s, which the stint-proxy Deployment does not set from a Secret", name, e)
		}
	}
	// The sidecar's key.
	assert.Contains(t, example, "\nSTINT_KEY=", "stint.env.example does not list STINT_KEY for the search sidecar")
}
