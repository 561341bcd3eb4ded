package store

import (
	"encoding/binary"
	"errors"
	"fmt"
	"hash/fnv"
	"io"
	"io/fs"
	"os"
)

// bbolt's file format (go.etcd.io/bbolt internal/common: page.go, meta.go):
// pages 0 and 1 are meta pages, each a 16-byte page header followed by
// the meta: magic, version, page size, flags (uint32 each), the root
// bucket (root page id, sequence), the freelist page id, pgid — the
// high-water mark, the count of pages the file holds — and the txid
// (uint64 each), then an FNV-64a checksum of the meta bytes before it.
// Integers are in the machine's byte order. bbolt trusts the newer valid
// meta page and maps the file; a file shorter than pgid pages then faults
// inside bbolt (SIGSEGV) on the first read past its end.
const (
	boltMagic      = 0xED0CDAED
	boltVersion    = 2
	boltPageHeader = 16
	boltMetaSum    = 56 // bytes of meta the checksum covers
)

type boltMeta struct {
	pageSize   uint32
	pgid, txid uint64
}

// parseMeta reads the meta page at the start of b; ok is false when it
// is not a valid bbolt meta page.
func parseMeta(b []byte) (m boltMeta, ok bool) {
	if len(b) < boltPageHeader+boltMetaSum+8 {
		return m, false
	}
	b = b[boltPageHeader:]
	ne := binary.NativeEndian
	if ne.Uint32(b[0:]) != boltMagic || ne.Uint32(b[4:]) != boltVersion {
		return m, false
	}
	h := fnv.New64a()
	h.Write(b[:boltMetaSum])
	if h.Sum64() != ne.Uint64(b[boltMetaSum:]) {
		return m, false
	}
	m = boltMeta{pageSize: ne.Uint32(b[8:]), pgid: ne.Uint64(b[40:]), txid: ne.Uint64(b[48:])}
	return m, m.pageSize >= 512 && m.pageSize <= 1<<20 && m.pgid >= 2
}

// checkFile refuses, before bbolt maps it, an existing file that cannot
// be whole: an empty one (bbolt would silently start it afresh, losing
// the fact that the state was lost), one with no valid meta page, and
// one shorter than its meta page says. A missing file is fine: Open
// creates it.
func checkFile(path string) error {
	f, err := os.Open(path)
	if errors.Is(err, fs.ErrNotExist) {
		return nil
	}
	if err != nil {
		return fmt.Errorf("store: open %s: %w", path, err)
	}
	defer f.Close()
	fi, err := f.Stat()
	if err != nil {
		return fmt.Errorf("store: open %s: %w", path, err)
	}
	size := fi.Size()
	if size == 0 {
		return fmt.Errorf("%w: %s is empty (0 bytes), which a state file never is once created: its contents were lost "+
			"(an interrupted copy, a full disk); restore it from a backup, or delete it to start with no stored state", ErrFile, path)
	}
	read := func(off int64) []byte {
		b := make([]byte, boltPageHeader+boltMetaSum+8)
		n, err := f.ReadAt(b, off)
		if err != nil && !errors.Is(err, io.EOF) {
			return nil
		}
		return b[:n]
	}
	m0, ok0 := parseMeta(read(0))
	// With page 0 damaged bbolt looks for page 1 one OS page in.
	second := int64(os.Getpagesize())
	if ok0 {
		second = int64(m0.pageSize)
	}
	m1, ok1 := parseMeta(read(second))
	m := m0
	switch {
	case !ok0 && !ok1:
		return fmt.Errorf("%w: %s (%d bytes) has no valid bbolt meta page (magic, version 2 and checksum): "+
			"it is not a state file, or its first pages are damaged; restore it from a backup", ErrFile, path, size)
	case !ok0 || ok1 && m1.txid > m0.txid:
		m = m1
	}
	if need := m.pgid * uint64(m.pageSize); uint64(size) < need {
		return fmt.Errorf("%w: %s is %d bytes, its meta page says %d (%d pages of %d bytes): the file was truncated; "+
			"restore it from a backup", ErrFile, path, size, need, m.pgid, m.pageSize)
	}
	return nil
}
