//go:build !unix

package plainhttp

import "net"

// stillOpen cannot peek on this platform; a connection the server closed
// fails its next request, as with net/http.
func stillOpen(net.Conn) bool { return true }
