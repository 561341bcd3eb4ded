// Package store keeps driftfit's state in one bbolt file: the panes of
// every sensor's windows, the fit history, and the stream position the
// state corresponds to. It is the only package that imports bbolt. It
// makes no decisions: callers say what to write and when.
//
// # Main types
//
// Open returns a DB. A Batch collects one commit's writes (Batch.Sensor,
// Batch.Record, Batch.SetPosition) and DB.Commit writes them in one
// transaction. DB.Restore rebuilds the sensors at start, DB.LoadSensor
// reads one sensor's stored windows for a reader beside the service
// (the pages), DB.Position
// says where to resume the stream, DB.History and DB.HistorySensors read
// the fit history, DB.PruneHistory enforces its retention and
// DB.ThinHistory thins the short windows' old history, both in small
// steps. DB.DropSensor deletes one sensor's state.
//
// # A store that never lies
//
// bbolt checksums only its two meta pages. Every value this package
// stores is sealed with the CRC-32C of its key and bytes (seal.go),
// checked on every read, so damage inside a data page comes back as an
// error, never as a different number. What a damaged value costs is as
// small as can be: Restore sets its sensor aside (Restored.SetAside) and
// goes on with the rest; History and the alert reads skip it and count
// it in a *SkippedError after handing over every good value. A commit
// never writes a pane Restore would refuse (CommitStats.SetAside). Open
// reads the meta pages itself and refuses an empty file, and one
// shorter than its meta page says (ErrFile), before bbolt maps it: a
// truncated file would fault inside bbolt. bbolt's own structures (page
// headers, branch pages, the freelist) are not covered; DB.Check walks
// them.
//
// # Why the position is in the same transaction as the state
//
// A reading must count exactly once whatever crashes. Each commit writes
// the panes the readings changed and the sequence of the last stream
// message those readings came from, atomically: after any crash the file
// holds some commit's state together with the position that produced it.
// On restart the service restores the sensors and resumes the stream
// right after that position, so every message after it is applied once
// and none before it twice. Bus acknowledgements are only flow control:
// an acknowledged message whose commit was lost is read again from the
// stream, and an unacknowledged one before the position is skipped.
// (A high-water mark of acknowledged sequences would not do: the bus
// redelivers unacknowledged messages after newer ones.) Fit records are
// keyed by sensor, window and time, so a replayed record overwrites
// itself instead of doubling.
//
// # Buckets and keys
//
// Keys are built to sort in the order they are read: integers are
// big-endian, signed ones (pane indexes, times in Unix ns) with the sign
// bit flipped so byte order is numeric order. Composite keys start with
// the sensor id and the byte 0x00, which an id may not contain, so one
// sensor's keys form a contiguous range that no other sensor's keys
// enter ("a" < "a"+0x00+… < "a.b").
//
//	meta             "schema" → uint64 SchemaVersion
//	                 "thinned" → interval(u64) and the last day key thinned
//	sensors          id → window specs the panes were written with
//	                 (format 1, uvarint count, uvarint span and pane ns)
//	panes            id 0x00 width(u64) index(i64) → rolling pane bytes
//	                 (exactly (*rolling.Sensor).AppendPane's output)
//	history          id 0x00 span(u64) pane(u64) time(i64) → fit record
//	history-by-time  day(i64) id 0x00 span(u64) pane(u64) → empty: the
//	                 sensor window has records in that UTC day
//	stream           "position" → uint64 stream sequence
//	                 "applied" → uint64 readings applied
//	                 "stream-id" → the stream's name and creation time
//	                 (DB.SetStream), checked against the bus at start
//	restarts         id → time(i64) the sensor's fits last restarted
//	                 (made with its first key)
//	seqs             id → uint64 stream sequence of the last message the
//	                 sensor's stored state holds (made with its first key)
//	alerts, events, tickets, outbox, calibrations: see alerts.go
//	set-aside        id 0x00 bucket 0x00 key → bytes found there, of a
//	                 sensor Restore could not trust (made with its first key)
//
// Every value above is followed by its 4-byte seal, the empty ones too.
//
// Panes of one sensor and width come in increasing index, the order
// rolling.Sensor.LoadPane requires. Panes that left every window are
// deleted by a cursor range delete within their sensor and width. The
// history-by-time index lets retention delete the oldest records first
// without visiting every sensor. A fit record keeps every field of the
// three rolling.Fit values bit for bit (format described at
// appendRecord); only non-zero floats that do not follow from the others
// are written.
//
// # Size
//
// With the default windows (1d/1h and 30d/1d: 25 records a sensor-day)
// history costs about 13 kB of file a sensor-day while all of it is
// kept, and about 2.5 kB over 400 days when the 1d window's records
// older than 30 days are thinned to one a day; schema 1 took about
// 39 kB (BenchmarkHistorySize, 20 sensors over 400 days).
//
// The bucket names "alerts", "tickets" and "outbox" are reserved for
// alert state, tickets and the webhook outbox. Adding a bucket keeps the
// schema version; a reader ignores buckets it does not know.
//
// # Concurrency and locking
//
// A DB is safe for concurrent use; a Batch is not. One process holds the
// file: a writer takes an exclusive flock and a read-only open a shared
// one, and the two conflict. A second Open fails with ErrLocked after
// Options.LockTimeout. Tools that read while the service runs read a copy
// written by DB.Snapshot.
package store
