package proxy

import (
	"fmt"
	"strconv"
)

func sprintf(format string, args ...any) string {
	if len(args) == 0 {
		return format
	}
	return fmt.Sprintf(format, args...)
}

func itoa(n int) string { return strconv.Itoa(n) }
