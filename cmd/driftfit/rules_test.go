package main

import (
	"slices"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/configs"
)

// TestRuleFor_Detectors checks that the detectors, the ticket kinds and
// the budget written in configs/testdata/alarms.good.yaml reach the alert
// rule, and that the alert package accepts the rule (its checks are the
// reference: NewTracker refuses a rule with bad detector settings).
func TestRuleFor_Detectors(t *testing.T) {
	cfg, err := configs.Load("../../configs/testdata/alarms.good.yaml")
	if err != nil {
		t.Fatal(err)
	}
	r, ok, err := ruleFor(cfg, "qm.u2.steam.pt-7")
	if err != nil || !ok {
		t.Fatalf("ruleFor = ok %v, %v", ok, err)
	}
	// The values written in alarms.good.yaml, as TestLoad_AlarmSettings
	// reads them.
	want := alert.Detectors{
		Step:      alert.StepSettings{On: true, K: 0.5},
		Flatline:  alert.FlatlineSettings{For: 6 * time.Hour, MinCount: 20, Resolution: 0.1},
		Spike:     alert.SpikeSettings{K: 6, Count: 3, Within: time.Hour},
		Silent:    2 * time.Hour,
		OutOfSpan: true,
	}
	if r.Detect != want {
		t.Errorf("ruleFor Detect = %+v, want %+v", r.Detect, want)
	}
	if !slices.Equal(r.TicketKinds, []alert.Kind{alert.Slope, alert.LeadTime, alert.Step}) {
		t.Errorf("ruleFor TicketKinds = %v, want slope, lead_time, step", r.TicketKinds)
	}
	// detectors.step.rebaseline reaches the sensor's ingest settings.
	if sc, err := sensorConfig(cfg)("qm.u2.steam.pt-7"); err != nil || !sc.StepRebaseline {
		t.Errorf("sensorConfig StepRebaseline = %v (%v), want true as written", sc.StepRebaseline, err)
	}
	tr, err := alert.NewTracker("qm.u2.steam.pt-7", r)
	if err != nil {
		t.Fatalf("NewTracker(ruleFor) = %v", err)
	}
	if s, ok := tr.StepSettings(0); !ok || !(s.H > 0) {
		t.Errorf("StepSettings(0) = %+v, %v: want H from the budget", s, ok)
	}
	// The sensor override replaces the silence time and the ticket kinds.
	r, ok, err = ruleFor(cfg, "qm.u1.steam.pt-101")
	if err != nil || !ok || r.Detect.Silent != 30*time.Minute || r.TicketKinds == nil || len(r.TicketKinds) != 0 {
		t.Errorf("ruleFor(pt-101) = silent %v ticket kinds %v (nil %v), ok %v, %v; want 30m and an empty list",
			r.Detect.Silent, r.TicketKinds, r.TicketKinds == nil, ok, err)
	}
}
