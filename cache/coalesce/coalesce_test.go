package coalesce

import (
	"context"
	"errors"
	"sync"
	"sync/atomic"
	"testing"
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
		if err != nil || shared {
			t.Errorf("leader: got shared=%v err=%v, want false, nil", shared, err)
		}
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
			if err != nil || !shared {
				t.Errorf("waiter: got shared=%v err=%v, want true, nil", shared, err)
			}
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
		if v != 42 {
			t.Errorf("got %d, want 42", v)
		}
	}
	if got := calls.Load(); got != 1 {
		t.Errorf("fn ran %d times, want 1", got)
	}
	if g.InFlight() != 0 {
		t.Errorf("InFlight = %d after all calls, want 0", g.InFlight())
	}
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
	if !shared || !errors.Is(err, context.Canceled) {
		t.Fatalf("got shared=%v err=%v, want true, context.Canceled", shared, err)
	}
	close(release)
	if got := <-leaderDone; got != "answer" {
		t.Fatalf("leader got %q, want %q", got, "answer")
	}
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
	if err := <-waiterErr; err == nil {
		t.Fatal("waiter got nil error after the leader panicked")
	}
}

func TestDistinctKeysRunSeparately(t *testing.T) {
	var g Group[string]
	for _, key := range []string{"a", "b", "c"} {
		v, shared, err := g.Do(context.Background(), key, func() (string, error) { return key, nil })
		if v != key || shared || err != nil {
			t.Errorf("Do(%q) = %q, %v, %v; want %q, false, nil", key, v, shared, err, key)
		}
	}
}
