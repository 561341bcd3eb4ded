package store_test

import (
	"errors"
	"path/filepath"
	"testing"
	"time"

	berrors "go.etcd.io/bbolt/errors"

	"driftfit/store"
)

// openDB opens path for writing (fsync off unless sync) and, at cleanup,
// checks the file's consistency and closes it.
func openDB(t testing.TB, path string) *store.DB {
	t.Helper()
	db, err := store.Open(path, store.Options{NoSync: true})
	if err != nil {
		t.Fatalf("Open(%s): %v", path, err)
	}
	t.Cleanup(func() { checkClose(t, db) })
	return db
}

// checkClose runs bbolt's consistency check and closes db. Close is
// idempotent, so a test may have closed db already.
func checkClose(t testing.TB, db *store.DB) {
	t.Helper()
	if err := db.Check(); err != nil && !closedErr(err) {
		t.Errorf("Check(%s): %v", db.Path(), err)
	}
	if err := db.Close(); err != nil {
		t.Errorf("Close(%s): %v", db.Path(), err)
	}
}

func tempPath(t testing.TB) string {
	t.Helper()
	return filepath.Join(t.TempDir(), "state.db")
}

// reopen checks and closes db, then opens its path again.
func reopen(t testing.TB, db *store.DB) *store.DB {
	t.Helper()
	checkClose(t, db)
	return openDB(t, db.Path())
}

var (
	hour = time.Hour
	day  = 24 * time.Hour
)

func closedErr(err error) bool { return errors.Is(err, berrors.ErrDatabaseNotOpen) }
