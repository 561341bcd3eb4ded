package main

import (
	"bytes"
	"os"
	"path/filepath"
	"runtime/debug"
	"strings"
	"testing"
)

// TestRun_ExitCodes: 0 for success and help, 1 for a failure, 2 for a
// usage error, the same in every command; a usage error is one line
// naming the problem and pointing at -h, not the whole help.
func TestRun_ExitCodes(t *testing.T) {
	dir := t.TempDir()
	missing := filepath.Join(dir, "absent")
	type tc struct {
		args []string
		code int
		want string // in stderr ("" for none)
	}
	cases := []tc{
		{[]string{}, 2, "Usage: driftfit <command>"},
		{[]string{"frobnicate"}, 2, `unknown command "frobnicate"`},
		{[]string{"help", "frobnicate"}, 2, `unknown command "frobnicate"`},
		{[]string{"--version"}, 0, ""},
		{[]string{"help"}, 0, ""},
		{[]string{"history", "s", "--db", missing}, 1, "no database file"},
		{[]string{"alerts", "--db", missing}, 1, "no database file"},
		{[]string{"tickets", "--db", missing}, 1, "no database file"},
		{[]string{"replay", missing}, 1, "no such file"},
		{[]string{"check-config", missing}, 1, "no such file"},
		{[]string{"serve", "--config", missing}, 1, "no such file"},
		{[]string{"demo-feed", "--csv", filepath.Join(missing, "x.csv")}, 1, "no such file"},
		{[]string{"calibrated", "s", "--as-found", "1", "--as-left", "0", "--servers", "nats://127.0.0.1:1"}, 1, "connect to the service"},
		{[]string{"calibrated", "s", "--as-found", "1"}, 2, "--as-left: required"},
		{[]string{"calibrated", "s", "--as-found", "NaN", "--as-left", "0"}, 2, `--as-found "NaN": want a finite number`},
		{[]string{"calibrated", "a b", "--as-found", "1", "--as-left", "0"}, 2, `SENSOR "a b": character U+0020 at byte 1 is not printable`},
		{[]string{"calibrated", "s", "--void", "0"}, 2, `--void "0": want the calibration's number, 1 or more`},
		{[]string{"calibrated", "s", "--void", "2", "--as-left", "0"}, 2, "--as-left does not go with --void"},
		{[]string{"calibrated", "s", "--void", "2", "--correct", "2"}, 2, "--void 2 and --correct 2: give one"},
		{[]string{"calibrated", "s", "--correct", "2", "--as-found", "1"}, 2, "--as-left: required"},
		{[]string{"calibrated", "s", "--as-found", "1", "--as-left", "0", "--reason", "typo"}, 2, `--reason "typo": goes with --void or --correct only`},
		{[]string{"calibrated", "s", "--from", "cal.csv"}, 2, "--from takes no SENSOR"},
		{[]string{"calibrated", "--from", "cal.csv", "--at", "1"}, 2, "--at does not go with --from"},
		{[]string{"calibrated", "s", "--as-found", "1", "--as-left", "0", "--at", "2026-13-01"}, 2, `--at "2026-13-01"`},
		{[]string{"calibrated", "s", "--as-found", "1", "--as-left", "0", "--at", "2026-11-30", "--servers", "nats://127.0.0.1:1"}, 1, "connect to the service"},
		{[]string{"calibrated", "--from", "cal.csv", "--parallel", "0"}, 2, "--parallel 0: want 1 to 64"},
		{[]string{"calibrated", "--from", filepath.Join(missing, "cal.csv"), "--servers", "nats://127.0.0.1:1"}, 1, "no such file"},
		{[]string{"calibrations", "--db", missing}, 1, "no database file"},
		{[]string{"calibrations", "--format", "xml"}, 2, `--format "xml": want table, csv or json`},
		{[]string{"bench", "--cpuprofile", filepath.Join(missing, "cpu.out")}, 1, "no such file"},
		{[]string{"history", "s", "--since", "30x"}, 2, `driftfit history: --since "30x": want a duration such as 30d, a date or RFC 3339 time; see driftfit history -h`},
	}
	// Every command: -h and help CMD give its help on stdout, an unknown
	// flag is a usage error naming it.
	for _, c := range commands {
		cases = append(cases,
			tc{[]string{c.name, "-h"}, 0, ""},
			tc{[]string{"help", c.name}, 0, ""},
			tc{[]string{c.name, "--no-such-flag"}, 2, "driftfit " + c.name + ": flag provided but not defined: -no-such-flag; see driftfit " + c.name + " -h"},
		)
	}
	for _, tc := range cases {
		t.Run(strings.Join(tc.args, " "), func(t *testing.T) {
			stdout, stderr, code := runCmd(t, "", tc.args...)
			if code != tc.code {
				t.Fatalf("exit %d, want %d; stderr:\n%s", code, tc.code, stderr)
			}
			if !strings.Contains(stderr, tc.want) {
				t.Errorf("stderr lacks %q:\n%s", tc.want, stderr)
			}
			if tc.code == 2 && len(tc.args) > 0 && find(tc.args[0]) != nil && strings.Count(stderr, "\n") != 1 {
				t.Errorf("a usage error takes one line, got:\n%s", stderr)
			}
			if len(tc.args) == 2 && (tc.args[1] == "-h" || tc.args[0] == "help") && tc.code == 0 {
				name := tc.args[0]
				if name == "help" {
					name = tc.args[1]
				}
				if !strings.Contains(stdout, "Usage: driftfit "+name) || !strings.Contains(stdout, "Flags:") || stderr != "" {
					t.Errorf("help of %s: stdout %q, stderr %q", name, stdout, stderr)
				}
			}
		})
	}
}

// TestRun_Version checks --version against the build information the
// test binary carries (runtime/debug.ReadBuildInfo, read here on its own).
func TestRun_Version(t *testing.T) {
	stdout, _, code := runCmd(t, "", "--version")
	info, ok := debug.ReadBuildInfo()
	if code != 0 || !ok {
		t.Fatalf("exit %d, build info %v", code, ok)
	}
	want := []string{"driftfit " + info.Main.Version, "built with " + info.GoVersion}
	for _, s := range info.Settings {
		if s.Key == "vcs.revision" || s.Key == "vcs.time" {
			want = append(want, s.Value)
		}
	}
	for _, w := range want {
		if !strings.Contains(stdout, w) {
			t.Errorf("--version %q lacks %q", stdout, w)
		}
	}
}

// TestNewLogger_NoColourOffTerminal: the console format writes no ANSI
// escape codes into a file or pipe (ECMA-48 CSI starts with ESC [).
func TestNewLogger_NoColourOffTerminal(t *testing.T) {
	f, err := os.Create(filepath.Join(t.TempDir(), "log"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	var buf bytes.Buffer
	for _, w := range []interface {
		Write([]byte) (int, error)
	}{f, &buf} {
		log, err := newLogger(w, "console", "info")
		if err != nil {
			t.Fatal(err)
		}
		log.Warn().Str("sensor", "qm.u1.steam.pt-101").Msg("bus error")
	}
	data, err := os.ReadFile(f.Name())
	if err != nil {
		t.Fatal(err)
	}
	for name, out := range map[string][]byte{"file": data, "buffer": buf.Bytes()} {
		if bytes.Contains(out, []byte("\x1b[")) || !bytes.Contains(out, []byte("bus error")) {
			t.Errorf("console log to a %s: %q, want the message and no escape codes", name, out)
		}
	}
	if _, err := newLogger(&buf, "xml", "info"); err == nil {
		t.Error("newLogger accepted the format xml")
	}
}

// TestReplay_Historian runs replay on a historian export (semicolons,
// its own column names, wall-clock times in a zone) and checks its JSON
// equals replay of the same readings in the native layout with UTC
// RFC 3339 times, converted here with time.LoadLocation and the UTC
// offsets of Europe/Berlin written out: CET is UTC+1, CEST UTC+2, and
// summer time began on 2026-03-29 at 02:00 local time.
func TestReplay_Historian(t *testing.T) {
	historian := "Tag;Timestamp;Value;Quality\r\n" +
		"\"qm.u1;a\";2026-03-29 00:30:00;1.5;Good\r\n" +
		"\"qm.u1;a\";2026-03-29 01:30:00;1.75;Good\r\n" +
		"\"qm.u1;a\";2026-03-29 03:30:00;2.25;Good\r\n" +
		"\"qm.u1;a\";2026-03-29 04:30:00.5;2.5;Good\r\n"
	native := "sensor,time,value\n" +
		"\"qm.u1;a\",2026-03-28T23:30:00Z,1.5\n" +
		"\"qm.u1;a\",2026-03-29T00:30:00Z,1.75\n" +
		"\"qm.u1;a\",2026-03-29T01:30:00Z,2.25\n" +
		"\"qm.u1;a\",2026-03-29T02:30:00.5Z,2.5\n"
	want, stderr, code := runCmd(t, native, "replay", "--window", "1d/1h", "--format", "json", "-")
	if code != 0 {
		t.Fatalf("native replay: exit %d: %s", code, stderr)
	}
	got, stderr, code := runCmd(t, historian, "replay", "--window", "1d/1h", "--format", "json",
		"--columns", "sensor=Tag,time=Timestamp,value=Value", "--delimiter", ";", "--time-zone", "Europe/Berlin", "-")
	if code != 0 || got != want || !strings.Contains(got, `"n":4`) {
		t.Errorf("historian replay: exit %d, stderr %s\n got %s\nwant %s", code, stderr, got, want)
	}
	for _, bad := range [][]string{
		{"--time-zone", "Mars/Olympus"}, {"--delimiter", `"`}, {"--delimiter", ";;"}, {"--columns", "tag=Tag"}, {"--format", "png"},
	} {
		if _, stderr, code := runCmd(t, historian, append([]string{"replay"}, append(bad, "-")...)...); code != 2 || !strings.Contains(stderr, bad[0]) {
			t.Errorf("replay %v: exit %d, stderr %q; want a usage error naming %s", bad, code, stderr, bad[0])
		}
	}
}
