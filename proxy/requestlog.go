package proxy

import (
	"io"
	"strconv"
	"sync"
	"time"
	"unicode/utf8"
)

// requestLog writes the per-request log line as one JSON object without
// going through log/slog: on a cache hit the generic slog JSON handler was
// about a quarter of the handler's time (BenchmarkHitLogged). The line has
// the shape slog's JSON handler gives the same record (time, level, msg,
// then the fields in a fixed order), so log tooling sees no difference.
// Written by hand because the fields are fixed and few; everything else the
// proxy logs still goes through slog.
type requestLog struct {
	w    io.Writer
	bufs sync.Pool // *[]byte line buffers
}

func newRequestLog(w io.Writer) *requestLog {
	return &requestLog{w: w, bufs: sync.Pool{New: func() any { b := make([]byte, 0, 512); return &b }}}
}

// write appends one line for ll, answered in d, at time now.
func (l *requestLog) write(now time.Time, ll *logLine, d time.Duration) {
	bp := l.bufs.Get().(*[]byte)
	b := appendRequestLine((*bp)[:0], now, ll, d)
	_, _ = l.w.Write(b) // a failing log sink must not fail the request
	*bp = b
	l.bufs.Put(bp)
}

// appendRequestLine appends the JSON line for ll to b.
func appendRequestLine(b []byte, now time.Time, ll *logLine, d time.Duration) []byte {
	b = append(b, `{"time":"`...)
	b = now.AppendFormat(b, time.RFC3339Nano)
	b = append(b, `","level":"INFO","msg":"request","team":`...)
	b = appendJSONString(b, ll.team)
	b = append(b, `,"endpoint":`...)
	b = appendJSONString(b, string(ll.endpoint))
	b = append(b, `,"model":`...)
	b = appendJSONString(b, ll.model)
	b = append(b, `,"cache":`...)
	b = appendJSONString(b, ll.outcome)
	b = appendIntField(b, "status", int64(ll.status))
	b = appendIntField(b, "prompts", int64(ll.prompts))
	b = appendIntField(b, "cached_prompts", int64(ll.hits))
	b = appendIntField(b, "prompt_tokens", int64(ll.usage.PromptTokens))
	b = appendIntField(b, "completion_tokens", int64(ll.usage.CompletionTokens))
	b = appendIntField(b, "upstream_us", ll.upstream.Microseconds())
	b = appendIntField(b, "duration_us", d.Microseconds())
	if ll.promptText != "" {
		b = append(b, `,"prompt":`...)
		b = appendJSONString(b, ll.promptText)
	}
	return append(b, "}\n"...)
}

func appendIntField(b []byte, name string, v int64) []byte {
	b = append(b, ',', '"')
	b = append(b, name...)
	b = append(b, '"', ':')
	return strconv.AppendInt(b, v, 10)
}

// appendJSONString appends s as a JSON string (RFC 8259 §7): quote,
// backslash and control characters escaped, invalid UTF-8 replaced by
// U+FFFD, and U+2028/U+2029 escaped as encoding/json does.
func appendJSONString(b []byte, s string) []byte {
	const hex = "0123456789abcdef"
	b = append(b, '"')
	start := 0
	for i := 0; i < len(s); {
		c := s[i]
		if c < utf8.RuneSelf {
			if c >= 0x20 && c != '"' && c != '\\' {
				i++
				continue
			}
			b = append(b, s[start:i]...)
			switch c {
			case '"', '\\':
				b = append(b, '\\', c)
			case '\n':
				b = append(b, '\\', 'n')
			case '\r':
				b = append(b, '\\', 'r')
			case '\t':
				b = append(b, '\\', 't')
			default:
				b = append(b, '\\', 'u', '0', '0', hex[c>>4], hex[c&0xf])
			}
			i++
			start = i
			continue
		}
		r, size := utf8.DecodeRuneInString(s[i:])
		if r == utf8.RuneError && size == 1 {
			b = append(b, s[start:i]...)
			b = append(b, `\ufffd`...)
			i += size
			start = i
			continue
		}
		if r == '\u2028' || r == '\u2029' {
			b = append(b, s[start:i]...)
			b = append(b, '\\', 'u', '2', '0', '2', hex[r&0xf])
			i += size
			start = i
			continue
		}
		i += size
	}
	b = append(b, s[start:]...)
	return append(b, '"')
}
