package coalesce

import (
	"context"
	"sync"
	"sync/atomic"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestDoMergesConcurrentCalls(t *testing.T) {
	var g Group[int]
	var calls atomic.Int32
	release := make(chan struct{})
	leaderIn := make(chan struct{})
	const waiters = 63

	var wg sync.WaitGroup
	results := make(chan int, waiters+1)
	wg.Add(1)
	go func() {
		defer wg.Done()
		v, shared, err := g.Do(context.Background(), "k", func() (int, error) {
			calls.Add(1)
			close(leaderIn)
			<-release
			return 42, nil
		})
		assert.NoError(t, err, "leader")
		assert.False(t, shared, "leader: shared")
		results <- v
	}()
	<-leaderIn
	for range waiters {
		wg.Add(1)
		go func() {
			defer wg.Done()
			v, shared, err := g.Do(context.Background(), "k", func() (int, error) {
				calls.Add(1)
				return -1, nil
			})
			assert.NoError(t, err, "waiter")
			assert.True(t, shared, "waiter: shared")
			results <- v
		}()
	}
	for g.Waiting("k") < waiters {
		waitABit()
	}
	close(release)
	wg.Wait()
	close(results)
	for v := range results {
		assert.Equal(t, 42, v)
	}
	assert.Equal(t, int32(1), calls.Load(), "fn runs")
	assert.Zero(t, g.InFlight(), "InFlight after all calls")
}

func TestWaiterHonoursItsContext(t *testing.T) {
	var g Group[string]
	release := make(chan struct{})
	leaderIn := make(chan struct{})
	leaderDone := make(chan string)
	go func() {
		v, _, _ := g.Do(context.Background(), "k", func() (string, error) {
			close(leaderIn)
			<-release
			return "answer", nil
		})
		leaderDone <- v
	}()
	<-leaderIn
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	_, shared, err := g.Do(ctx, "k", func() (string, error) { return "", nil })
	require.ErrorIs(t, err, context.Canceled)
	require.True(t, shared, "shared")
	close(release)
	assert.Equal(t, "answer", <-leaderDone, "the leader's answer")
}

func TestPanicReachesWaitersAsError(t *testing.T) {
	var g Group[int]
	leaderIn := make(chan struct{})
	release := make(chan struct{})
	waiterErr := make(chan error)
	go func() {
		defer func() { _ = recover() }()
		_, _, _ = g.Do(context.Background(), "k", func() (int, error) {
			close(leaderIn)
			<-release
			panic("boom")
		})
	}()
	<-leaderIn
	go func() {
		_, _, err := g.Do(context.Background(), "k", func() (int, error) { return 0, nil })
		waiterErr <- err
	}()
	for g.Waiting("k") < 1 {
		waitABit()
	}
	close(release)
	assert.Error(t, <-waiterErr, "the waiter's error after the leader panicked")
}

func TestDistinctKeysRunSeparately(t *testing.T) {
	var g Group[string]
	for _, key := range []string{"a", "b", "c"} {
		v, shared, err := g.Do(context.Background(), key, func() (string, error) { return key, nil })
		require.NoError(t, err, "Do(%q)", key)
		assert.Equal(t, key, v, "Do(%q)", key)
		assert.False(t, shared, "Do(%q): shared", key)
	}
}
