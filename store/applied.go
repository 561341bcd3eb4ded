package store

import (
	"encoding/binary"
	"fmt"

	bolt "go.etcd.io/bbolt"
)

// keyApplied holds, in the stream bucket, the count of readings applied
// to the stored state (Batch.SetApplied).
var keyApplied = []byte("applied")

// Applied returns the count of readings applied to the stored state, as
// last set by Batch.SetApplied; 0 if never set.
func (db *DB) Applied() (uint64, error) {
	var n uint64
	err := db.bolt.View(func(tx *bolt.Tx) error {
		b := tx.Bucket(bucketStream)
		if b == nil {
			return nil
		}
		v, err := get(b, bucketStream, keyApplied)
		if err != nil || v == nil {
			return err
		}
		if len(v) != 8 {
			return fmt.Errorf("%w: applied count of %d bytes", ErrCorrupt, len(v))
		}
		n = binary.BigEndian.Uint64(v)
		return nil
	})
	if err != nil {
		return 0, fmt.Errorf("store: read applied count: %w", err)
	}
	return n, nil
}
