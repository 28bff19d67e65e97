package redisstore_test

import (
	"testing"

	"go.uber.org/goleak"
)

// TestMain fails the package's tests if any goroutine outlives them: lease
// renewals, waiters' subscriptions and the store's calls all end with the
// store or the call.
func TestMain(m *testing.M) { goleak.VerifyTestMain(m) }
