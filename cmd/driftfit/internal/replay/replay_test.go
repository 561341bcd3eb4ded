package replay_test

import (
	"errors"
	"testing"

	"driftfit/cmd/driftfit/internal/replay"
	"driftfit/rolling"
)

// TestParseWindows_PaneCap checks the cap on both sides of the boundary:
// span/pane = MaxPanes is a window, one pane more is refused before the
// engine allocates anything, with rolling.ErrBadSpec as the cause.
func TestParseWindows_PaneCap(t *testing.T) {
	cases := []struct {
		name, list string
		wantPanes  int // 0: refused
	}{
		{"at the cap", "100000s/1s", replay.MaxPanes},
		{"one over the cap", "100001s/1s", 0},
		{"1h of 1ns panes", "1h/1ns", 0},
		{"1d of 10ms panes", "1d/10ms", 0},
		{"30d of 1d panes", "30d/1d", 30},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			ws, err := replay.ParseWindows(tc.list, "")
			if tc.wantPanes == 0 {
				var we *replay.WindowError
				if !errors.As(err, &we) || !errors.Is(err, rolling.ErrBadSpec) || we.Value != tc.list {
					t.Fatalf("ParseWindows(%q) error = %v, want a *WindowError naming %q that wraps rolling.ErrBadSpec", tc.list, err, tc.list)
				}
				return
			}
			if err != nil {
				t.Fatalf("ParseWindows(%q): %v", tc.list, err)
			}
			if got := ws[0].Spec.Panes(); got != tc.wantPanes {
				t.Errorf("ParseWindows(%q) panes = %d, want %d", tc.list, got, tc.wantPanes)
			}
		})
	}
}

// TestParseWindows_EngineRefusalWrapped checks that a window the engine
// refuses keeps its cause: 90m is not a whole multiple of 1h.
func TestParseWindows_EngineRefusalWrapped(t *testing.T) {
	_, err := replay.ParseWindows("90m/1h", "")
	if !errors.Is(err, rolling.ErrBadSpec) {
		t.Fatalf("ParseWindows(90m/1h) error = %v, want rolling.ErrBadSpec", err)
	}
	_, err = replay.ParseWindows("1d", "")
	var we *replay.WindowError
	if !errors.As(err, &we) || we.Err != nil {
		t.Fatalf("ParseWindows(1d) error = %v, want a *WindowError without cause (no pane)", err)
	}
}
