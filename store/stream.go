package store

import (
	"encoding/binary"
	"fmt"
	"time"

	bolt "go.etcd.io/bbolt"
)

// keyStreamID holds, in the stream bucket, the identity of the stream
// the stored position counts in (DB.SetStream): Created as Unix ns
// (uint64 BE, sign flipped like every stored time), then Name; sealed
// like every value (seal.go).
var keyStreamID = []byte("stream-id")

// StreamID identifies one incarnation of a JetStream stream. A stream
// deleted and made again under the same name restarts its sequence at 1,
// so a position is only meaningful with the stream it was taken in; the
// server's creation time tells two incarnations apart.
type StreamID struct {
	Name    string
	Created time.Time
}

// IsZero reports whether id is unset, as in a file that never recorded
// a stream.
func (id StreamID) IsZero() bool { return id.Name == "" && id.Created.IsZero() }

// Equal reports whether a and b name the same incarnation.
func (id StreamID) Equal(o StreamID) bool {
	return id.Name == o.Name && id.Created.Equal(o.Created)
}

func (id StreamID) String() string {
	return fmt.Sprintf("%s (created %s)", id.Name, id.Created.UTC().Format(time.RFC3339Nano))
}

// Stream returns the stream identity set by SetStream; the zero StreamID
// if none was.
func (db *DB) Stream() (StreamID, error) {
	var id StreamID
	err := db.bolt.View(func(tx *bolt.Tx) error {
		b := tx.Bucket(bucketStream)
		if b == nil {
			return nil
		}
		v, err := get(b, bucketStream, keyStreamID)
		if err != nil || v == nil {
			return err
		}
		if len(v) < 8 {
			return fmt.Errorf("%w: stream identity of %d bytes", ErrCorrupt, len(v))
		}
		id = StreamID{Name: string(v[8:]), Created: time.Unix(0, readInt(v[:8])).UTC()}
		return nil
	})
	if err != nil {
		return StreamID{}, fmt.Errorf("store: read stream identity: %w", err)
	}
	return id, nil
}

// SetStream records the stream the position counts in. With
// resetPosition it also sets the position, and every sensor's stream
// sequence (Batch.SetSeq), to 0 in the same transaction, so a file never
// pairs a position with a stream it was not taken in. It
// must not run while a commit does: the service calls it once at start,
// before its first commit.
func (db *DB) SetStream(id StreamID, resetPosition bool) error {
	if id.Name == "" {
		return fmt.Errorf("store: set stream identity: empty stream name")
	}
	v := appendInt(make([]byte, 0, 8+len(id.Name)), unixNano(id.Created))
	v = append(v, id.Name...)
	err := db.bolt.Update(func(tx *bolt.Tx) error {
		b, err := tx.CreateBucketIfNotExists(bucketStream)
		if err != nil {
			return err
		}
		if resetPosition {
			var zero [8]byte
			binary.BigEndian.PutUint64(zero[:], 0)
			if err := b.Put(keyPosition, appendSealed(nil, keyPosition, zero[:])); err != nil {
				return err
			}
			// The sensors' own sequences (Batch.SetSeq) count in the old
			// stream too.
			if tx.Bucket(bucketSeqs) != nil {
				if err := tx.DeleteBucket(bucketSeqs); err != nil {
					return err
				}
			}
		}
		return b.Put(keyStreamID, appendSealed(nil, keyStreamID, v))
	})
	if err != nil {
		return fmt.Errorf("store: set stream identity %s: %w", id, err)
	}
	return nil
}
