package coalesce

import "runtime"

// waitABit yields so other goroutines can reach their wait.
func waitABit() { runtime.Gosched() }
