package web

import (
	"errors"
	"math"
	"strings"
	"testing"
	"time"
)

func TestPercentile_Type7(t *testing.T) {
	// R: quantile(1:10, c(0.02, 0.5, 0.98)) gives 1.18, 5.5, 9.82
	// (type 7: 1 + p·(n − 1) order statistic, interpolated).
	xs := []float64{10, 9, 8, 7, 6, 5, 4, 3, 2, 1}
	for _, tc := range []struct{ p, want float64 }{{0.02, 1.18}, {0.5, 5.5}, {0.98, 9.82}, {0, 1}, {1, 10}} {
		if got := percentile(xs, tc.p); math.Abs(got-tc.want) > 1e-12 {
			t.Errorf("percentile(1..10, %v) = %v, want %v", tc.p, got, tc.want)
		}
	}
}

func TestRobustRange_IgnoresAFewWildRecords(t *testing.T) {
	// 100 readings 0..99 and one of 1e6: the 98th percentile of the 101
	// values is the 99th order statistic (1 + 0.98·100 = 99), 98, so the
	// axis ends at 98 + 8% of 98 − 2 = 105.68, not near 1e6.
	var xs []float64
	for i := range 100 {
		xs = append(xs, float64(i))
	}
	xs = append(xs, 1e6)
	lo, hi := robustRange(xs, nil)
	if math.Abs(hi-105.68) > 1e-9 || math.Abs(lo-(2-7.68)) > 1e-9 {
		t.Errorf("robustRange = [%v, %v], want [-5.68, 105.68]", lo, hi)
	}
	// An anchor (a tolerance edge) widens the range to hold it.
	if _, hi := robustRange(xs, []float64{200}); math.Abs(hi-(200+0.08*198)) > 1e-9 {
		t.Errorf("with anchor 200: hi = %v, want 215.84", hi)
	}
	// Constant values still give a range.
	if lo, hi := robustRange([]float64{5, 5, 5}, nil); !(lo < 5 && hi > 5) {
		t.Errorf("constant: [%v, %v]", lo, hi)
	}
}

func TestNiceTicks(t *testing.T) {
	got := niceTicks(-0.3, 1.27, 6)
	want := []float64{-0.2, 0, 0.2, 0.4, 0.6, 0.8, 1, 1.2}
	if len(got) != len(want) {
		t.Fatalf("niceTicks = %v, want %v", got, want)
	}
	for i := range want {
		if math.Abs(got[i]-want[i]) > 1e-12 {
			t.Errorf("niceTicks[%d] = %v, want %v", i, got[i], want[i])
		}
	}
}

func TestTimeTicks_Days(t *testing.T) {
	from := time.Date(2026, 11, 1, 5, 0, 0, 0, time.UTC)
	ticks, step := timeTicks(from, from.Add(30*24*time.Hour), time.UTC)
	if step != 7*24*time.Hour || len(ticks) < 4 || len(ticks) > 5 {
		t.Fatalf("step %v, %d ticks %v", step, len(ticks), ticks)
	}
	for _, tk := range ticks {
		if tk.Hour() != 0 || tk.Before(from) {
			t.Errorf("tick %v not at midnight inside the range", tk)
		}
	}
}

func TestCheckID(t *testing.T) {
	tests := []struct {
		id, reason string // reason "" means valid
	}{
		{"qm.u1.steam.pt-101", ""},
		{"a", ""},
		{`qm."<i&'x/y`, ""},
		{"", "empty"},
		{".a", "empty token at byte 0"},
		{"a..b", "empty token at byte 2"},
		{"a.", "trailing dot"},
		{"a b", "space at byte 1"},
		{"a\tb", "control byte 0x09 at byte 1"},
		{"a.*", "wildcard '*' at byte 2"},
		{"a.>", "wildcard '>' at byte 2"},
		{"a?", "wildcard '?' at byte 1"},
		{"a\xffb", "not valid UTF-8"},
		{string(make([]byte, 5000)), "5000 bytes, longer than 4096"},
	}
	for _, tc := range tests {
		err := checkID(tc.id)
		var ie *IDError
		switch {
		case tc.reason == "" && err != nil:
			t.Errorf("checkID(%q) = %v, want nil", tc.id, err)
		case tc.reason != "" && (!errors.As(err, &ie) || !strings.Contains(ie.Reason, tc.reason) || !errors.Is(err, ErrBadID)):
			t.Errorf("checkID(%.20q) = %v, want reason %q", tc.id, err, tc.reason)
		}
	}
}

func TestGlobMatch(t *testing.T) {
	tests := []struct {
		p, s string
		want bool
	}{
		{"", "x", true},
		{"steam", "qm.u1.steam.pt-1", true},
		{"qm.u1.*", "qm.u1.steam.pt-1", true},
		{"qm.u2.*", "qm.u1.steam.pt-1", false},
		{"*.pt-?", "qm.u1.steam.pt-1", true},
		{"*.pt-?", "qm.u1.steam.pt-12", false},
		{"*tt*", "qm.u1.steam.tt-201", true},
	}
	for _, tc := range tests {
		if got := globMatch(tc.p, tc.s); got != tc.want {
			t.Errorf("globMatch(%q, %q) = %v, want %v", tc.p, tc.s, got, tc.want)
		}
	}
}
