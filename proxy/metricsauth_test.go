package proxy_test

import (
	"crypto/sha256"
	"io"
	"net/http"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy"
)

func TestMetricsAccess(t *testing.T) {
	const (
		token = "scraper-token-1"
		admin = "admin-key-1"
	)
	tokens := [][sha256.Size]byte{sha256.Sum256([]byte(token))}
	tests := []struct {
		name   string
		access proxy.MetricsAccess
		admins bool // admin keys configured
		key    string
		status int
	}{
		{"open", proxy.MetricsAccess{}, false, "", 200},
		{"token: none sent", proxy.MetricsAccess{TokenHashes: tokens}, true, "", 401},
		{"token: the token", proxy.MetricsAccess{TokenHashes: tokens}, true, token, 200},
		{"token: an admin key is not enough", proxy.MetricsAccess{TokenHashes: tokens}, true, admin, 401},
		{"token: a team key is not enough", proxy.MetricsAccess{TokenHashes: tokens}, true, "lab-key", 401},
		{"admin: an admin key", proxy.MetricsAccess{Admin: true}, true, admin, 200},
		{"admin: the token too", proxy.MetricsAccess{Admin: true, TokenHashes: tokens}, true, token, 200},
		{"admin: a team key is not enough", proxy.MetricsAccess{Admin: true}, true, "lab-key", 401},
		{"admin: no admin keys configured", proxy.MetricsAccess{Admin: true}, false, admin, 403},
		{"off", proxy.MetricsAccess{Off: true}, true, admin, 404},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			r := newRig(t, withTeams(teamWithKey("lab", "lab-key")), func(o *proxy.Options) {
				o.Metrics = tt.access
				if tt.admins {
					o.AdminKeyHashes = [][sha256.Size]byte{sha256.Sum256([]byte(admin))}
				}
			})
			req, err := http.NewRequest(http.MethodGet, r.srv.URL+"/metrics", nil)
			require.NoError(t, err)
			if tt.key != "" {
				req.Header.Set("Authorization", "Bearer "+tt.key)
			}
			resp, err := http.DefaultClient.Do(req)
			require.NoError(t, err)
			b, _ := io.ReadAll(resp.Body)
			resp.Body.Close()
			assert.Equal(t, tt.status, resp.StatusCode, "%s", b)
			named := strings.Contains(string(b), `team="lab"`) || strings.Contains(string(b), "stint_")
			assert.Equal(t, tt.status == 200, named, "metrics shown: %v", named)
		})
	}
}
