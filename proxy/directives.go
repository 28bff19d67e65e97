package proxy

import (
	"net/http"
	"strings"
)

// directives are the RFC 9111 §5.2.1 request directives the proxy honours.
type directives struct {
	noCache      bool // §5.2.1.4: do not answer from the cache; fetch and refresh
	noStore      bool // §5.2.1.5: do not store this answer
	onlyIfCached bool // §5.2.1.7: answer from the cache or 504
}

func parseDirectives(h http.Header) directives {
	var d directives
	for _, line := range h["Cache-Control"] {
		for _, part := range strings.Split(line, ",") {
			name, _, _ := strings.Cut(strings.TrimSpace(part), "=")
			switch strings.ToLower(strings.TrimSpace(name)) {
			case "no-cache":
				d.noCache = true
			case "no-store":
				d.noStore = true
			case "only-if-cached":
				d.onlyIfCached = true
			}
		}
	}
	return d
}
