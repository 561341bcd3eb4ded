package store

import (
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"sync"
	"time"

	bolt "go.etcd.io/bbolt"
	berrors "go.etcd.io/bbolt/errors"
)

// SchemaVersion is the layout of buckets and keys this build reads and
// writes. Adding a bucket does not change it; changing a key layout does.
// Value encodings carry their own format byte. Version 2 seals every
// value with a checksum (seal.go) and files the time index by day.
const SchemaVersion = 2

// Bucket names (see doc.go). The names "alerts", "tickets" and "outbox"
// are reserved for alert state, tickets and the webhook outbox and are
// not created here.
var (
	bucketMeta     = []byte("meta")
	bucketSensors  = []byte("sensors")
	bucketPanes    = []byte("panes")
	bucketHistory  = []byte("history")
	bucketHistTime = []byte("history-by-time")
	bucketStream   = []byte("stream")
	// bucketRestarts holds, per sensor id, the time its fits last
	// restarted (Batch.SetRestart). Made with its first key, so files
	// written before it existed open as they are.
	bucketRestarts = []byte("restarts")
	// bucketSeqs holds, per sensor id, the stream sequence of the last
	// message its stored state holds (Batch.SetSeq). Made with its first
	// key, like bucketRestarts.
	bucketSeqs = []byte("seqs")
)

var (
	keySchema   = []byte("schema")
	keyPosition = []byte("position")
)

// Options are the knobs of Open. The zero value means the defaults.
type Options struct {
	// LockTimeout bounds how long Open waits for the file lock held by
	// another process. Zero means the default, 2s; negative is an error.
	LockTimeout time.Duration

	// ReadOnly opens the file for reading only, under a shared lock.
	// bbolt takes that shared lock with flock(LOCK_SH), which conflicts
	// with the exclusive lock a writer holds for as long as it has the
	// file open: a read-only Open while the service runs fails with
	// ErrLocked after LockTimeout. Several readers may share the file.
	// To read while the service runs, ask the service for a copy made by
	// DB.Snapshot, and open that. Default false.
	ReadOnly bool

	// NoSync skips fsync on commit: a crash may lose or tear the last
	// commits. For tests and benchmarks only. Default false. Not allowed
	// with ReadOnly.
	NoSync bool
}

// DefaultOptions returns the defaults: a 2s lock timeout, read-write,
// fsync on every commit.
func DefaultOptions() Options {
	return Options{LockTimeout: 2 * time.Second}
}

// DB is an open driftfit database file. It is safe for concurrent use;
// bbolt serialises writers, so commits from several goroutines queue.
type DB struct {
	bolt *bolt.DB
	path string

	mu     sync.Mutex
	closed bool
}

// Open opens the database file at path, creating it with mode 0600 if it
// does not exist (unless ReadOnly). A new file gets the current schema;
// an existing file must carry SchemaVersion. Open returns ErrLocked when
// another user holds the lock past LockTimeout and ErrSchema for a
// foreign file or an unknown version.
func Open(path string, opts Options) (*DB, error) {
	switch {
	case opts.LockTimeout < 0:
		return nil, fmt.Errorf("store: open %s: lock timeout %v is negative", path, opts.LockTimeout)
	case opts.ReadOnly && opts.NoSync:
		return nil, fmt.Errorf("store: open %s: NoSync has no meaning with ReadOnly", path)
	case opts.LockTimeout == 0:
		opts.LockTimeout = DefaultOptions().LockTimeout
	}
	if err := checkFile(path); err != nil {
		return nil, err
	}
	bdb, err := bolt.Open(path, 0o600, &bolt.Options{
		Timeout:  opts.LockTimeout,
		ReadOnly: opts.ReadOnly,
		NoSync:   opts.NoSync,
		// The hashmap freelist stays fast when a large file fragments,
		// which history retention makes likely (bbolt's Options docs).
		FreelistType: bolt.FreelistMapType,
	})
	if errors.Is(err, berrors.ErrTimeout) {
		return nil, fmt.Errorf("store: open %s: %w (waited %v)", path, ErrLocked, opts.LockTimeout)
	}
	if err != nil {
		return nil, fmt.Errorf("store: open %s: %w", path, err)
	}
	db := &DB{bolt: bdb, path: path}
	err = bdb.View(db.checkReady)
	if !opts.ReadOnly && errors.Is(err, errNotReady) {
		// Only a new file (or one missing a bucket) pays for a write
		// transaction and its fsync at open.
		err = bdb.Update(db.initSchema)
	}
	if errors.Is(err, errNotReady) {
		err = fmt.Errorf("%w: %s is not initialised (found 0, this build reads %d); open it for writing once", ErrSchema, path, SchemaVersion)
	}
	if err != nil {
		bdb.Close()
		return nil, err
	}
	return db, nil
}

func (db *DB) checkSchema(tx *bolt.Tx) error {
	meta := tx.Bucket(bucketMeta)
	var v []byte
	if meta != nil {
		v = meta.Get(keySchema)
	}
	switch len(v) {
	case 8:
		// Version 1 stored its values without a seal.
		return fmt.Errorf("%w: %s has schema version %d, this build reads %d: keep the file for the build that wrote it "+
			"(its history stays readable there) and give this one a new data directory", ErrSchema, db.path, binary.BigEndian.Uint64(v), SchemaVersion)
	case 8 + sealSize:
	default:
		return fmt.Errorf("%w: %s has no driftfit schema version (found 0, this build reads %d)", ErrSchema, db.path, SchemaVersion)
	}
	v, err := unseal(bucketMeta, keySchema, v)
	if err != nil {
		return fmt.Errorf("%w: %s: schema version: %w", ErrSchema, db.path, err)
	}
	if got := binary.BigEndian.Uint64(v); got != SchemaVersion {
		return fmt.Errorf("%w: %s has schema version %d, this build reads %d", ErrSchema, db.path, got, SchemaVersion)
	}
	return nil
}

// errNotReady says a file needs initSchema: no schema yet, or a bucket
// missing. A read-only open reports it as ErrSchema.
var errNotReady = errors.New("store: file not initialised")

// checkReady checks the schema version and that every bucket exists.
func (db *DB) checkReady(tx *bolt.Tx) error {
	if tx.Bucket(bucketMeta) == nil {
		// A file is ours to initialise only when it is empty.
		k, _ := tx.Cursor().First()
		if k == nil {
			return errNotReady
		}
		return fmt.Errorf("%w: %s holds bucket %q but no driftfit schema version (found 0, this build reads %d)", ErrSchema, db.path, k, SchemaVersion)
	}
	if err := db.checkSchema(tx); err != nil {
		return err
	}
	for _, name := range dataBuckets {
		if tx.Bucket(name) == nil {
			return errNotReady
		}
	}
	return nil
}

var dataBuckets = [][]byte{bucketSensors, bucketPanes, bucketHistory, bucketHistTime, bucketStream}

func (db *DB) initSchema(tx *bolt.Tx) error {
	if tx.Bucket(bucketMeta) == nil {
		if err := db.checkReady(tx); !errors.Is(err, errNotReady) {
			return err
		}
		meta, err := tx.CreateBucket(bucketMeta)
		if err != nil {
			return fmt.Errorf("store: init %s: %w", db.path, err)
		}
		var sl sealer
		if err := sl.put(meta, keySchema, binary.BigEndian.AppendUint64(nil, SchemaVersion)); err != nil {
			return fmt.Errorf("store: init %s: %w", db.path, err)
		}
	}
	if err := db.checkSchema(tx); err != nil {
		return err
	}
	for _, name := range dataBuckets {
		if _, err := tx.CreateBucketIfNotExists(name); err != nil {
			return fmt.Errorf("store: init %s bucket %s: %w", db.path, name, err)
		}
	}
	return nil
}

// Close closes the file and releases its lock. Later calls return nil.
func (db *DB) Close() error {
	db.mu.Lock()
	defer db.mu.Unlock()
	if db.closed {
		return nil
	}
	db.closed = true
	if err := db.bolt.Close(); err != nil {
		return fmt.Errorf("store: close %s: %w", db.path, err)
	}
	return nil
}

// Path returns the file's path as given to Open.
func (db *DB) Path() string { return db.path }

// Position returns the stream position written by the last commit that
// set one, or 0 when none did (stream sequences start at 1).
func (db *DB) Position() (uint64, error) {
	var pos uint64
	err := db.bolt.View(func(tx *bolt.Tx) error {
		b := tx.Bucket(bucketStream)
		if b == nil {
			return nil
		}
		v, err := get(b, bucketStream, keyPosition)
		if err != nil || v == nil {
			return err
		}
		if len(v) != 8 {
			return fmt.Errorf("%w: stream position of %d bytes", ErrCorrupt, len(v))
		}
		pos = binary.BigEndian.Uint64(v)
		return nil
	})
	if err != nil {
		return 0, fmt.Errorf("store: read position: %w", err)
	}
	return pos, nil
}

// Check runs bbolt's consistency check over the whole file (page
// accounting and key order in every bucket) and returns every problem
// found, joined, or nil.
func (db *DB) Check() error {
	return db.bolt.View(func(tx *bolt.Tx) error {
		var errs []error
		for err := range tx.Check() {
			errs = append(errs, err)
		}
		if len(errs) > 0 {
			return fmt.Errorf("store: check %s: %w", db.path, errors.Join(errs...))
		}
		return nil
	})
}

// Snapshot writes a consistent copy of the whole file to w, from one
// read transaction, without blocking commits. The copy opens with Open
// like the original; this is the way to read while the service holds the
// file's lock.
func (db *DB) Snapshot(w io.Writer) (int64, error) {
	var n int64
	err := db.bolt.View(func(tx *bolt.Tx) error {
		var err error
		n, err = tx.WriteTo(w)
		return err
	})
	if err != nil {
		return n, fmt.Errorf("store: snapshot %s: %w", db.path, err)
	}
	return n, nil
}
