package web

import (
	"errors"
	"math"
	"strings"
	"testing"
	"time"
)

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
