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
// anything else with ErrCorruptArchive, within limits on sizes and member
// counts (ImportOptions) so that a crafted archive cannot exhaust memory,
// and writes nothing until the whole archive has been checked.
//
// Two backends implement Journal with identical behaviour: BoltJournal in a
// bbolt file the proxy shares with its cache and ledger, and RedisJournal on
// Redis or Redis Cluster for proxies that run as several replicas. The
// shared conformance tests run against both.
package runs
