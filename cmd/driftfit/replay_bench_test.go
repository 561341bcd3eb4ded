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

// BenchmarkReplayFlow times replay --config (the readings through the
// service, configs/demo.yaml) on 40 days of the demo plant (345,600
// hourly readings of 360 sensors, each closing a 1-hour pane) against
// replay without a configuration (the fits alone) on the same file, in
// the same run. It reports the readings a second of the service's
// replay and its time over the fits-only replay's ("x-fits").
//
//	go test ./cmd/driftfit -run '^$' -bench ReplayFlow -benchtime 3x
func BenchmarkReplayFlow(b *testing.B) {
	dir := b.TempDir()
	path := filepath.Join(dir, "readings.csv")
	if code := run(context.Background(), []string{"demo-feed", "--csv", path, "--days", "40d"}, nil, io.Discard, os.Stderr); code != 0 {
		b.Fatalf("demo-feed exit %d", code)
	}
	var flowTotal, fitsTotal time.Duration
	for b.Loop() {
		for _, args := range [][]string{
			{"replay", "--format", "json", path},
			{"replay", "--config", "../../configs/demo.yaml", "--events", filepath.Join(dir, "e"), "--tickets", filepath.Join(dir, "t"), path},
		} {
			t0 := time.Now()
			if code := run(context.Background(), args, nil, io.Discard, io.Discard); code != 0 {
				b.Fatalf("%v: exit %d", args, code)
			}
			if len(args) == 4 {
				fitsTotal += time.Since(t0)
			} else {
				flowTotal += time.Since(t0)
			}
		}
	}
	const readings = 360 * 40 * 24
	b.ReportMetric(float64(readings)*float64(b.N)/flowTotal.Seconds(), "readings/s")
	b.ReportMetric(float64(flowTotal)/float64(fitsTotal), "x-fits")
}
