//go:build unix

package plainhttp

import (
	"errors"
	"net"
	"syscall"
)

// stillOpen reports whether an idle connection can carry another request:
// a non-blocking peek finds nothing to read. The server closing it shows as
// end of file, and bytes it sent unasked mean the stream is out of step.
func stillOpen(c net.Conn) bool {
	sc, ok := c.(syscall.Conn)
	if !ok {
		return true
	}
	rc, err := sc.SyscallConn()
	if err != nil {
		return false
	}
	var buf [1]byte
	open := false
	err = rc.Read(func(fd uintptr) bool {
		_, _, rerr := syscall.Recvfrom(int(fd), buf[:], syscall.MSG_PEEK|syscall.MSG_DONTWAIT)
		open = errors.Is(rerr, syscall.EAGAIN)
		return true // never wait: the answer is known either way
	})
	return err == nil && open
}
