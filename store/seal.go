package store

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"hash/crc32"

	bolt "go.etcd.io/bbolt"
)

// Every value in every bucket is stored sealed: the value's bytes, then
// the CRC-32C (Castagnoli) of key and value, 4 bytes little-endian. bbolt
// checksums only its meta pages, so a flipped bit in a data page would
// otherwise come back as a different number: a pane's sum, a fit's
// coefficient. Covering the key too catches a value read under another
// key. Like any 32-bit CRC it detects every burst of up to 32 flipped
// bits; CRC-32C keeps a Hamming distance of at least 4 (every 1-, 2- and
// 3-bit error detected) for messages far longer than ours (Koopman,
// "32-bit cyclic redundancy codes for Internet applications", DSN 2002;
// from memory), and hash/crc32 computes it with the CPU's CRC
// instructions on amd64 and arm64.
const sealSize = 4

var castagnoli = crc32.MakeTable(crc32.Castagnoli)

func sealSum(key, val []byte) uint32 {
	return crc32.Update(crc32.Update(0, castagnoli, key), castagnoli, val)
}

// appendSealed appends val and its seal for key to dst.
func appendSealed(dst, key, val []byte) []byte {
	dst = append(dst, val...)
	return binary.LittleEndian.AppendUint32(dst, sealSum(key, val))
}

// unseal checks the seal of v, stored under key in bucket, and returns
// the value without it. The result aliases v.
func unseal(bucket, key, v []byte) ([]byte, error) {
	n := len(v) - sealSize
	if n < 0 || binary.LittleEndian.Uint32(v[n:]) != sealSum(key, v[:n]) {
		// The key may live in the mapped file: the error outlives it.
		return nil, &ChecksumError{Bucket: string(bucket), Key: bytes.Clone(key), Size: len(v)}
	}
	return v[:n:n], nil
}

// get reads key from bk (named name) and checks its seal; a missing key
// gives nil, nil.
func get(bk *bolt.Bucket, name, key []byte) ([]byte, error) {
	v := bk.Get(key)
	if v == nil {
		return nil, nil
	}
	return unseal(name, key, v)
}

// sealer seals the values of one write transaction. bbolt keeps
// references to the value slices until the transaction ends, so each
// sealed value gets its own bytes: carved from a block that is replaced,
// never grown in place, when it is full. Blocks double from 4 KiB to
// 1 MiB, so a commit of a few values allocates little and one of many
// values allocates a few times.
type sealer struct{ block []byte }

const (
	sealBlockMin = 4 << 10
	sealBlockMax = 1 << 20
)

func (s *sealer) seal(key, val []byte) []byte {
	n := len(val) + sealSize
	if n > cap(s.block)-len(s.block) {
		size := min(max(2*cap(s.block), sealBlockMin), sealBlockMax)
		s.block = make([]byte, 0, max(size, n))
	}
	start := len(s.block)
	s.block = appendSealed(s.block, key, val)
	return s.block[start:len(s.block):len(s.block)]
}

// put seals val and puts it under key in bk.
func (s *sealer) put(bk *bolt.Bucket, key, val []byte) error {
	return bk.Put(key, s.seal(key, val))
}

// ChecksumError reports a stored value whose seal does not match its
// bytes: the file was damaged after the value was written. It unwraps to
// ErrChecksum (and so matches ErrCorrupt too).
type ChecksumError struct {
	Bucket string
	Key    []byte
	Size   int // bytes stored, seal included
}

func (e *ChecksumError) Error() string {
	return fmt.Sprintf("%v: bucket %s key %x (%d bytes)", ErrChecksum, e.Bucket, e.Key, e.Size)
}

func (e *ChecksumError) Unwrap() error { return ErrChecksum }
