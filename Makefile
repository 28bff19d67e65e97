# stint — build, test and benchmark. `make help` lists the targets.
GO      ?= go
PKGS    := ./...
# Fuzz runs are bounded by executions, not time: a time bound trips a race
# in Go 1.26's fuzz coordinator (go.dev/issue/75804) that fails a clean run
# with "context deadline exceeded". Each count is about 8 s on a 2-core
# machine; FUZZSCALE multiplies them all.
FUZZSCALE ?= 1

# The revision stint version reports when Go's VCS stamping is off
# (-buildvcs=false, or a tree it cannot read as a checkout).
REVISION ?= $(shell git rev-parse HEAD 2>/dev/null)
LDFLAGS  := -X github.com/stintlab/stint/internal/buildinfo.linkedRevision=$(REVISION)

# Fuzz targets run briefly by `make test` (package:target:executions).
FUZZ_TARGETS := \
	./cache/canon:FuzzCanonical:150000 \
	./proxy/sse:FuzzReader:90000 \
	./proxy/localmodel/gguf:FuzzParse:400000 \
	./proxy/localmodel/tokenizer:FuzzRoundTrip:90000 \
	./budget/tokens:FuzzUpperBound:25000 \
	./cache/runs:FuzzImport:60000 \
	./proxy:FuzzRequestLine:60000 \
	./proxy:FuzzPipeline:10000 \
	./proxy/scrub:FuzzReader:150000

.PHONY: help build test vet unit fuzz-short bench bench-shared bench-budgets bench-local bench-go compare clean

help:
	@echo "make build        build ./stint"
	@echo "make test         vet, race-enabled unit tests, short fuzz runs (what CI runs)"
	@echo "make bench        cache-hit and miss-path throughput against a bare Go server (needs wrk)"
	@echo "make bench-shared hit throughput on embedded, Redis and Redis Cluster stores; p99 at half load"
	@echo "make bench-go     Go benchmarks: keys, stores, hot tier, proxy paths, upstream round trip"
	@echo "make bench-budgets hit and miss throughput with spend control on vs off"
	@echo "make bench-local  local model benchmarks (tokens/s, FLOP ceiling)"
	@echo "make compare      the RL search against its baselines on the task suite, 5 seeds, offline (the README's table)"

build:
	$(GO) build -ldflags "$(LDFLAGS)" -o stint ./cmd/stint

test: vet unit fuzz-short

vet:
	@test -z "$$(gofmt -l cmd proxy cache budget searcher deploy)" || { echo "gofmt needed:"; gofmt -l cmd proxy cache budget searcher deploy; exit 1; }
	$(GO) vet $(PKGS)

unit:
	$(GO) test -race -count=1 -timeout 20m $(PKGS)

fuzz-short:
	@for t in $(FUZZ_TARGETS); do \
		pkg=$${t%%:*}; rest=$${t#*:}; name=$${rest%%:*}; n=$$(( $${rest##*:} * $(FUZZSCALE) )); \
		echo "fuzz $$pkg $$name for $$n executions"; \
		$(GO) test -run '^$$' -fuzz "^$$name$$" -fuzztime "$${n}x" $$pkg || exit 1; \
	done

bench: build
	bash proxy/bench/bench.sh

bench-shared:
	bash proxy/bench/shared.sh

bench-budgets:
	bash proxy/bench/budgets.sh

bench-go:
	$(GO) test -run '^$$' -bench . -benchmem -benchtime 2000x ./cache/... ./proxy/ ./proxy/plainhttp/

bench-local:
	$(GO) test -run '^$$' -bench . -benchtime 3x -timeout 30m ./proxy/localmodel/...

compare:
	$(GO) run -ldflags "$(LDFLAGS)" ./cmd/stint search compare --local --out ./stint-compare

clean:
	rm -f stint
