package report

import (
	"io"
	"os"
	"path/filepath"
)

// WriteFileAtomic writes what write gives to a temporary file beside
// path and renames it into place, so a failed write leaves no
// half-written file. The file is readable by all (0644): it is for
// sharing.
func WriteFileAtomic(path string, write func(io.Writer) error) (err error) {
	f, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".*")
	if err != nil {
		return err
	}
	defer func() {
		if err != nil {
			f.Close()
			os.Remove(f.Name())
		}
	}()
	// CreateTemp makes the file private (0600); a picture is for sharing.
	if err = f.Chmod(0o644); err != nil {
		return err
	}
	if err = write(f); err != nil {
		return err
	}
	if err = f.Close(); err != nil {
		return err
	}
	return os.Rename(f.Name(), path)
}
