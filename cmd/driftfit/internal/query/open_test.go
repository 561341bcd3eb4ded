package query_test

import (
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/rs/zerolog"

	"driftfit/cmd/driftfit/internal/query"
	"driftfit/ingest"
	"driftfit/ingest/readapi"
	"driftfit/store"
)

// TestOpen_OnlyTheServiceThatHoldsTheFile holds two state files, each
// by its own "service" (the file open for writing and the read API
// served from it) on an embedded bus that requires authentication, and
// opens each file as the read commands do: a reader with the password
// from its variable reads the file asked for; pointed at the other
// service it is refused, the error naming both files; no message shows
// the password.
func TestOpen_OnlyTheServiceThatHoldsTheFile(t *testing.T) {
	const secret = "reader-2Jd5"
	env := map[string]string{"QM_READER_PASSWORD": secret}
	getenv := func(k string) string { return env[k] }
	type held struct {
		path string
		url  string
	}
	hold := func() held {
		t.Helper()
		dir := t.TempDir()
		path, _ := hourlyFile(t)
		db, err := store.Open(path, store.Options{NoSync: true})
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { db.Close() })
		b, err := ingest.Connect(t.Context(), ingest.BusOptions{Port: -1, StoreDir: filepath.Join(dir, "nats"), Getenv: getenv,
			Users:    []ingest.BusUser{{User: "qm-reader", PasswordEnv: "QM_READER_PASSWORD", Role: ingest.RoleReader}},
			Subjects: ingest.BusSubjects{Readings: "driftfit.in", Rejected: "driftfit.rejected", Alerts: "driftfit.alerts", Tickets: "driftfit.tickets", Calibrations: "driftfit.calibrations", API: readapi.Prefix, Stream: "DRIFTFIT"}})
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { b.Close() })
		stop, err := readapi.Serve(b.Conn(), db, zerolog.Nop())
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(stop)
		return held{path: path, url: b.ClientURL()}
	}
	a, other := hold(), hold()
	reader := func(url string) ingest.BusOptions {
		return ingest.BusOptions{Servers: []string{url}, User: "qm-reader", PasswordEnv: "QM_READER_PASSWORD", Getenv: getenv}
	}

	src, err := query.Open(a.path, reader(a.url), "query test")
	if err != nil {
		t.Fatalf("Open through the service holding the file: %v", err)
	}
	if _, ok := src.(*readapi.Client); !ok {
		t.Errorf("Open of a held file returned %T, want the service's client", src)
	}
	n := 0
	if err := src.HistorySensors(func(string) error { n++; return nil }); err != nil || n != 1 {
		t.Errorf("HistorySensors through the service = %d, %v; want 1 sensor", n, err)
	}
	src.Close()

	_, err = query.Open(a.path, reader(other.url), "query test")
	var me *readapi.MismatchError
	if !errors.Is(err, readapi.ErrOtherService) || !errors.As(err, &me) {
		t.Fatalf("Open through another file's service = %v, want a *MismatchError", err)
	}
	for _, p := range []string{readapi.CanonicalPath(a.path), readapi.CanonicalPath(other.path)} {
		if !strings.Contains(err.Error(), p) {
			t.Errorf("mismatch error does not name %s: %v", p, err)
		}
	}

	// A symbolic link to the file is the same file.
	link := filepath.Join(t.TempDir(), "link.db")
	if err := os.Symlink(a.path, link); err != nil {
		t.Fatal(err)
	}
	if src, err := query.Open(link, reader(a.url), "query test"); err != nil {
		t.Errorf("Open through a symbolic link to the held file: %v", err)
	} else {
		src.Close()
	}

	// A wrong password from the variable, and one in a server URL:
	// refused, and neither shown.
	env["QM_READER_PASSWORD"] = "wrong-" + secret
	inURL := ingest.BusOptions{Servers: []string{strings.Replace(a.url, "nats://", "nats://qm-reader:"+secret+"x@", 1)}}
	for _, o := range []ingest.BusOptions{reader(a.url), inURL} {
		_, err := query.Open(a.path, o, "query test")
		if err == nil {
			t.Errorf("Open with a wrong password (%s) succeeded", ingest.RedactURLs(o.Servers))
		} else if strings.Contains(err.Error(), secret) {
			t.Errorf("error shows the password: %v", err)
		}
	}
}
