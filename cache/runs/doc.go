// Package runs is the run journal behind record/replay: every call a tuning
// run makes under a client-chosen run id is journaled, in arrival order,
// with the exact bytes its client received, so that the whole run can later
// be replayed bit for bit with zero upstream calls, sampled (non-greedy)
// answers included.
//
// A run belongs to a team, and every operation is scoped by (team, run): a
// team never sees, replays, lists, deletes or exports another team's runs.
//
// The model:
//
//   - Record appends an Entry and its Answer. It assigns the entry's Seq
//     (its 1-based position in the run) and Occurrence (the n-th call of the
//     run with the same request key), both atomically, and stores the answer
//     body once per run under its SHA-256 (the entry's Ref).
//   - Lookup finds the answer of the n-th call with a key; a replay asks for
//     occurrence 1, 2, ... of each key in turn, which Cursor hands out.
//   - Summary, List and Entries read a run back; Delete removes it.
//   - Export writes a run as one self-contained archive and Import reads one
//     back, validating everything before it writes anything (see Export).
//
// # Archives
//
// An archive is one self-contained file holding one run, readable with
// standard tools (zstd -d, then tar): a zstd stream of a tar whose members
// are manifest.json (format "stint-run-archive", version 1, the team and
// run id it came from, its creation time, entry count, summary figures, and
// the name, size and SHA-256 of every other member), then entries (JSON,
// one entry a line, in Seq order), then bodies/<sha256> for each distinct
// answer body. A zstd skippable frame at the end holds the SHA-256 of the
// bytes before it, so any change to the file is detected. Import refuses
// anything else with ErrCorruptArchive, and an archive past a limit on
// sizes, members or entries (ImportOptions) with ErrTooLarge, checked
// against the manifest's declared sizes before any body is inflated and
// against the inflated bytes as they come. It streams: bodies are written
// as they are read (a long one in chunks of 1 MiB), into a staging run no
// reader sees, which becomes the run in one write once the whole archive
// has checked, or is removed. An entry may only hold what a recording of
// the wire format produces (see Answer), so a replay never answers with
// anything else.
//
// # Quotas
//
// Each team's runs, recorded and imported, may hold at most a quota of
// bytes (BoltOptions.QuotaBytes, RedisOptions.QuotaBytes): a Record or an
// Import that would pass it fails with a *QuotaError (ErrQuota) and writes
// nothing. An import reserves its declared size while it runs; Usage tells
// what a team's runs hold.
//
// Two backends implement Journal with identical behaviour: BoltJournal in a
// bbolt file the proxy shares with its cache and ledger, and RedisJournal on
// Redis or Redis Cluster for proxies that run as several replicas. The
// shared conformance tests run against both.
package runs
