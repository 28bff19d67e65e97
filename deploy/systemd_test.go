package deploy

import (
	"fmt"
	"slices"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// unitProblems lists the hardening a stint unit lacks.
func unitProblems(u unit) []string {
	svc := u["Service"]
	var p []string
	one := func(k string) string {
		if v := svc[k]; len(v) > 0 {
			return v[len(v)-1]
		}
		return ""
	}
	for k, want := range map[string][]string{
		"ProtectSystem":           {"strict"},
		"ProtectHome":             {"yes", "read-only", "tmpfs"},
		"PrivateTmp":              {"yes"},
		"PrivateDevices":          {"yes"},
		"NoNewPrivileges":         {"yes"},
		"MemoryDenyWriteExecute":  {"yes"},
		"ProtectKernelTunables":   {"yes"},
		"ProtectKernelModules":    {"yes"},
		"ProtectControlGroups":    {"yes"},
		"RestrictNamespaces":      {"yes"},
		"RestrictSUIDSGID":        {"yes"},
		"LockPersonality":         {"yes"},
		"SystemCallArchitectures": {"native"},
		"CapabilityBoundingSet":   {""},
		"StateDirectory":          {"stint"},
		"Type":                    {"exec", "simple"},
	} {
		if _, set := svc[k]; !set || !slices.Contains(want, one(k)) {
			p = append(p, fmt.Sprintf("%s=%s, want one of %q", k, one(k), want))
		}
	}
	if one("DynamicUser") != "yes" && (one("User") == "" || one("User") == "root") {
		p = append(p, "runs as root: set DynamicUser=yes or a dedicated User=")
	}
	fams := strings.Fields(one("RestrictAddressFamilies"))
	if len(fams) == 0 || slices.ContainsFunc(fams, func(f string) bool { return f != "AF_INET" && f != "AF_INET6" && f != "AF_UNIX" }) {
		p = append(p, fmt.Sprintf("RestrictAddressFamilies=%s, want only AF_INET AF_INET6 AF_UNIX", one("RestrictAddressFamilies")))
	}
	if !slices.Contains(svc["SystemCallFilter"], "@system-service") {
		p = append(p, "SystemCallFilter does not allow-list @system-service")
	}
	if one("EnvironmentFile") == "" {
		p = append(p, "no EnvironmentFile for the secrets")
	}
	for _, e := range svc["Environment"] {
		if name, _, _ := strings.Cut(e, "="); secretName(name) {
			p = append(p, "Environment= sets "+name+"; secrets go in the EnvironmentFile")
		}
	}
	if !strings.Contains(one("ExecStartPre"), "--check-config") {
		p = append(p, "ExecStartPre does not run --check-config")
	}
	return p
}

// TestSystemdUnit checks the unit's hardening and that its stop timeout
// outlasts the config's drain.
func TestSystemdUnit(t *testing.T) {
	src := readFile(t, "systemd/stint.service")
	u, err := parseUnit(src)
	require.NoError(t, err)
	p := unitProblems(u)
	assert.Emptyf(t, p, "systemd/stint.service:\n  %s", strings.Join(p, "\n  "))
	host := parseStintConfig(t, readFile(t, "config/host.yaml"))
	stop := duration(t, u["Service"]["TimeoutStopSec"][0])
	assert.Falsef(t, stop <= duration(t, host.Server.ShutdownTimeout), "TimeoutStopSec %v does not outlast server.shutdown_timeout %s", stop, host.Server.ShutdownTimeout)
	assert.Equal(t, "multi-user.target", u["Install"]["WantedBy"][0], "the unit is not wanted by multi-user.target")

	tests := []struct {
		name, drop, add, want string
	}{
		{"no ProtectSystem", "ProtectSystem=strict", "", "ProtectSystem"},
		{"ProtectSystem only full", "ProtectSystem=strict", "ProtectSystem=full", "ProtectSystem=full"},
		{"no dynamic user", "DynamicUser=yes", "", "runs as root"},
		{"raw sockets allowed", "RestrictAddressFamilies=AF_INET AF_INET6 AF_UNIX", "RestrictAddressFamilies=AF_INET AF_PACKET", "RestrictAddressFamilies"},
		{"inline secret", "", "Environment=STINT_UPSTREAM_KEY=x", "secrets go in the EnvironmentFile"},
		{"no seccomp filter", "SystemCallFilter=@system-service", "", "@system-service"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			s := string(src)
			if tc.drop != "" {
				require.Contains(t, s, "\n"+tc.drop+"\n", "the unit has no line %q", tc.drop)
				s = strings.Replace(s, "\n"+tc.drop+"\n", "\n", 1)
			}
			if tc.add != "" {
				s = strings.Replace(s, "[Service]\n", "[Service]\n"+tc.add+"\n", 1)
			}
			u, err := parseUnit([]byte(s))
			require.NoError(t, err)
			p := unitProblems(u)
			assert.Truef(t, slices.ContainsFunc(p, func(s string) bool { return strings.Contains(s, tc.want) }), "problems %v do not mention %q", p, tc.want)
		})
	}
	_, err = parseUnit([]byte("Description=x\n"))
	assert.Error(t, err, "a key outside any section parsed")
}
