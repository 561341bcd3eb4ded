package main

import (
	"context"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"testing"
	"time"

	"driftfit/cmd/driftfit/internal/replay"
	"driftfit/cmd/driftfit/internal/report"
)

// BenchmarkReplayVsAwk times driftfit replay on a 2-million-row CSV of
// 1,000 sensors against mawk summing the value column per sensor over the
// same file, in the same run, and reports awk's time over replay's
// ("x-awk" above 1 means replay is faster). It needs mawk on the PATH.
//
//	go test ./cmd/driftfit -run '^$' -bench ReplayVsAwk -benchtime 3x
func BenchmarkReplayVsAwk(b *testing.B) {
	awk, err := exec.LookPath("mawk")
	if err != nil {
		b.Skip("mawk not installed")
	}
	path := filepath.Join(b.TempDir(), "readings.csv")
	var out io.Writer = io.Discard
	if code := run(context.Background(), []string{"demo-feed", "--csv", path, "--sensors", "1000", "--days", "2000h", "--every", "1h"},
		nil, out, os.Stderr); code != 0 {
		b.Fatalf("demo-feed exit %d", code)
	}
	st, err := os.Stat(path)
	if err != nil {
		b.Fatal(err)
	}
	b.SetBytes(st.Size())
	wins, err := replay.ParseWindows("1d/1h,30d/1d", "")
	if err != nil {
		b.Fatal(err)
	}
	var awkTotal, replayTotal time.Duration
	for b.Loop() {
		t0 := time.Now()
		cmd := exec.Command(awk, "-F,", "{s[$1]+=$3}", path)
		if err := cmd.Run(); err != nil {
			b.Fatal(err)
		}
		awkTotal += time.Since(t0)

		t0 = time.Now()
		f, err := os.Open(path)
		if err != nil {
			b.Fatal(err)
		}
		rp, err := replay.Run(context.Background(), f, replay.Options{Windows: wins})
		f.Close()
		if err != nil {
			b.Fatal(err)
		}
		out, _ := report.New("json", report.Fits, io.Discard, report.Options{})
		if err := rp.Write(out); err != nil {
			b.Fatal(err)
		}
		replayTotal += time.Since(t0)
		if rp.Rows != 2_000_000 {
			b.Fatalf("replay read %d rows, want 2,000,000", rp.Rows)
		}
	}
	b.ReportMetric(float64(awkTotal)/float64(replayTotal), "x-awk")
	b.ReportMetric(float64(replayTotal.Nanoseconds())/float64(b.N)/2e6, "ns/row")
}
