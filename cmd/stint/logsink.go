package main

import (
	"bufio"
	"io"
	"sync"
	"time"
)

// logFlushInterval bounds how long a log line waits in the buffer.
const logFlushInterval = 100 * time.Millisecond

// bufferedLog batches request log lines into few writes: one write syscall
// per request cost the proxy half of a cache hit's handling time. Lines wait
// at most logFlushInterval; Close flushes the rest. A process killed with
// SIGKILL loses at most that interval's lines. Writing by hand: the standard
// library's bufio has no timed flush.
type bufferedLog struct {
	mu   sync.Mutex // guards w
	w    *bufio.Writer
	stop chan struct{}
	done chan struct{}
}

func newBufferedLog(out io.Writer) *bufferedLog {
	b := &bufferedLog{w: bufio.NewWriterSize(out, 64<<10), stop: make(chan struct{}), done: make(chan struct{})}
	go b.flushLoop()
	return b
}

// Write buffers one or more complete lines.
func (b *bufferedLog) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.w.Write(p)
}

func (b *bufferedLog) flushLoop() {
	defer close(b.done)
	t := time.NewTicker(logFlushInterval)
	defer t.Stop()
	for {
		select {
		case <-t.C:
			b.flush()
		case <-b.stop:
			b.flush()
			return
		}
	}
}

func (b *bufferedLog) flush() {
	b.mu.Lock()
	defer b.mu.Unlock()
	_ = b.w.Flush()
}

// Close stops the flusher and writes what is buffered.
func (b *bufferedLog) Close() error {
	close(b.stop)
	<-b.done
	return nil
}
