package ingest_test

import (
	"encoding/json"
	"math/rand/v2"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	dto "github.com/prometheus/client_model/go"

	"driftfit/alert"
	"driftfit/ingest"
	"driftfit/rolling"
)

// collectEvents reads the events published on sub until it is quiet.
func collectEvents(t *testing.T, sub *nats.Subscription) []alert.Event {
	t.Helper()
	var out []alert.Event
	for {
		m, err := sub.NextMsg(300 * time.Millisecond)
		if err != nil {
			return out
		}
		var ev alert.Event
		if err := json.Unmarshal(m.Data, &ev); err != nil {
			t.Fatalf("event %s: %v", m.Data, err)
		}
		out = append(out, ev)
	}
}

// subscribeOwn subscribes on a connection of its own, so what the
// service publishes before it stops is still read after.
func subscribeOwn(t *testing.T, url, subject string) *nats.Subscription {
	t.Helper()
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	sub, err := nc.SubscribeSync(subject)
	if err != nil {
		t.Fatal(err)
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	return sub
}

// publishBatchJS publishes readings of one sensor in one message.
func publishBatchJS(t *testing.T, js nats.JetStreamContext, id string, rs []rolling.Reading) {
	t.Helper()
	if _, err := js.Publish("driftfit.in."+id, ingest.AppendBatch(nil, id, rs)); err != nil {
		t.Fatal(err)
	}
}

// TestService_StepVersusDrift runs two sensors that ramp at 2 kPa/day in
// N(0, 1) noise, read every 5 minutes, one of them stepping up 2 kPa on
// day 15 — the set-up of the alert package's
// TestStepDetector_StepVersusDrift, here through the service, whose step
// detector takes each hourly pane's mean against the 1-day window's line
// fit before it. The step must raise a step alert dated within two
// hours of the change; the ramp alone none. A third sensor with the same
// readings re-baselines after the step (SensorConfig.StepRebaseline): its
// window restarts after the change time.
func TestService_StepVersusDrift(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	rule := ptRule(500, 3)
	rule.Windows = []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}}
	rule.Limits.Slope = alert.RateLimit{Warning: 100} // far beyond the ramp: only the step detector speaks
	rule.Detect.Step.On = true
	// pt-203 has pt-202's readings and re-baselines after a step; the
	// newest pane close of each shows where its window starts.
	t0 := time.Date(2026, 10, 1, 0, 0, 0, 0, time.UTC)
	stepAt := t0.Add(15 * 24 * time.Hour)
	var mu sync.Mutex
	first := map[string]time.Time{}
	h := startAlertService(t, ns.ClientURL(), dir, rule, "", func(o *ingest.Options) {
		sensor := o.Sensor
		o.Sensor = func(id string) (ingest.SensorConfig, error) {
			c, err := sensor(id)
			c.StepRebaseline = id == "qm.u1.steam.pt-203"
			return c, err
		}
		o.OnPaneClose = func(id string, _ int, sol *rolling.Solution) {
			if d := sol.Last.Sub(stepAt); d >= 12*time.Hour && d < 13*time.Hour {
				mu.Lock()
				first[id] = sol.First
				mu.Unlock()
			}
		}
	})
	sub := subscribeOwn(t, ns.ClientURL(), "driftfit.alerts.>")
	js, err := h.nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	const seed = 42
	t.Logf("seed %d", seed)
	n := 0
	for _, c := range []struct {
		id   string
		step float64
	}{{"qm.u1.steam.pt-201", 0}, {"qm.u1.steam.pt-202", 2}, {"qm.u1.steam.pt-203", 2}} {
		rng := rand.New(rand.NewPCG(seed, uint64(c.step)))
		var rs []rolling.Reading
		for now := t0; now.Before(t0.Add(20 * 24 * time.Hour)); now = now.Add(5 * time.Minute) {
			v := 1000 + 2*now.Sub(t0).Hours()/24 + rng.NormFloat64()
			if !now.Before(stepAt) {
				v += c.step
			}
			rs = append(rs, rolling.Reading{UnixNano: now.UnixNano(), Value: v})
			if len(rs) == 12 {
				publishBatchJS(t, js, c.id, rs)
				n += len(rs)
				rs = rs[:0]
			}
		}
	}
	waitFor(t, "every reading applied", func() bool { return h.svc.Stats().Applied == uint64(n) })
	h.stop()
	var steps []alert.Event
	for _, ev := range collectEvents(t, sub) {
		if ev.Kind == alert.Step && ev.Type == alert.Raised {
			steps = append(steps, ev)
		}
	}
	if len(steps) != 2 || steps[0].Sensor == steps[1].Sensor || steps[0].Sensor == "qm.u1.steam.pt-201" || steps[1].Sensor == "qm.u1.steam.pt-201" {
		t.Fatalf("step raises %+v: want one on pt-202 and one on pt-203, none on the ramp pt-201", steps)
	}
	ev := steps[0]
	// Twelve hours after the step the re-baselined window starts after
	// the change time, the other still holds the half day before it.
	mu.Lock()
	f2, f3 := first["qm.u1.steam.pt-202"], first["qm.u1.steam.pt-203"]
	mu.Unlock()
	if !f2.Before(stepAt) || f3.Before(stepAt) {
		t.Errorf("windows 12 h after the step start at %v (pt-202) and %v (pt-203, re-baselined); want before and after %v", f2, f3, stepAt)
	}
	t.Logf("windows 12 h after the step start at %v (pt-202) and %v (pt-203, re-baselined)", f2, f3)
	if ev.At.Before(stepAt) || ev.At.Sub(stepAt) > 24*time.Hour {
		t.Errorf("step raised at %v, want within a day after %v", ev.At, stepAt)
	}
	if dt := ev.First.Sub(stepAt); dt < -2*time.Hour || dt > 2*time.Hour {
		t.Errorf("step dated %v, want within 2 h of %v", ev.First, stepAt)
	}
	// The size is the mean one-step error since the change; the line fit
	// takes the new level in over the hours the CUSUM needs, so the later
	// errors are smaller than the step (hourly pane means, not the
	// alert package's single readings).
	if ev.Value < 1 || ev.Value > 2.5 || ev.Unit != "kPa" || ev.Window != "1d/1h" {
		t.Errorf("step size %.3f %s on %s, want 1 to 2.5 kPa (the step is 2) on 1d/1h", ev.Value, ev.Unit, ev.Window)
	}
	t.Logf("step raised at %v, dated %v, size %.3f %s, limit h %.2f, n %d", ev.At, ev.First, ev.Value, ev.Unit, ev.Limit, ev.N)
}

// TestService_DataQuality runs four transmitters on one worker, read
// every 5 minutes for three days in N(1000, 0.3) noise, each with one
// fault: stuck at exactly 1000 for 12 hours, four spikes of +50 kPa
// within an hour, silent after day 2, one reading above the span. Each
// fault must raise its kind on its sensor only, open no ticket
// (ticket_kinds not set: slope and lead time only), and the spikes must
// be kept out of the fits and counted.
func TestService_DataQuality(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	rule := ptRule(50, 2)
	rule.Limits.Slope = alert.RateLimit{Warning: 100}
	rule.Detect = alert.Detectors{
		Flatline:  alert.FlatlineSettings{For: 6 * time.Hour},
		Spike:     alert.SpikeSettings{K: 6},
		Silent:    3 * time.Hour,
		OutOfSpan: true,
	}
	metrics := ingest.NewMetrics()
	h := startAlertService(t, ns.ClientURL(), dir, rule, "", func(o *ingest.Options) {
		o.Workers = 1 // the silent sensor's worker clock runs on the others' readings
		o.Metrics = metrics
	})
	sub := subscribeOwn(t, ns.ClientURL(), "driftfit.alerts.>")
	tickets := subscribeOwn(t, ns.ClientURL(), "driftfit.tickets")
	if err := h.nc.Flush(); err != nil {
		t.Fatal(err)
	}
	js, err := h.nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	const seed = 5
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	t0 := time.Date(2026, 10, 1, 0, 0, 0, 0, time.UTC)
	day := 24 * time.Hour
	stuckFrom, spikeFrom := t0.Add(36*time.Hour), t0.Add(40*time.Hour)
	ids := []string{"qm.u1.steam.pt-301", "qm.u1.steam.pt-302", "qm.u1.steam.pt-303", "qm.u1.steam.pt-304"}
	batches := make([][]rolling.Reading, len(ids))
	n, spikes := 0, 0
	for now := t0; now.Before(t0.Add(3 * day)); now = now.Add(5 * time.Minute) {
		for i, id := range ids {
			v := 1000 + 0.3*rng.NormFloat64()
			switch i {
			case 0:
				if !now.Before(stuckFrom) && now.Before(stuckFrom.Add(12*time.Hour)) {
					v = 1000
				}
			case 1:
				// Every other reading for 35 minutes: no run longer than
				// one, so each is judged a spike.
				if d := now.Sub(spikeFrom); d >= 0 && d < 40*time.Minute && (d/(5*time.Minute))%2 == 0 {
					v += 50
					spikes++
				}
			case 2:
				if !now.Before(t0.Add(2 * day)) {
					continue
				}
			case 3:
				if now.Equal(t0.Add(50 * time.Hour)) {
					v = 2100 // span 0..2000
				}
			}
			batches[i] = append(batches[i], rolling.Reading{UnixNano: now.UnixNano(), Value: v})
			if len(batches[i]) == 12 {
				publishBatchJS(t, js, id, batches[i])
				n += len(batches[i])
				batches[i] = batches[i][:0]
			}
		}
	}
	spikesCounted := func() float64 {
		var out dto.Metric
		if err := metrics.Spikes.Write(&out); err != nil {
			t.Fatal(err)
		}
		return out.GetCounter().GetValue()
	}
	waitFor(t, "every reading applied or kept out", func() bool { return h.svc.Stats().Applied+uint64(spikesCounted()) == uint64(n) })
	h.stop()
	raised := map[string][]alert.Event{}
	for _, ev := range collectEvents(t, sub) {
		if ev.Type == alert.Raised {
			raised[ev.Sensor] = append(raised[ev.Sensor], ev)
		}
	}
	want := map[string]alert.Kind{ids[0]: alert.Flatline, ids[1]: alert.Spike, ids[2]: alert.Silent, ids[3]: alert.OutOfSpan}
	for _, id := range ids {
		evs := raised[id]
		if len(evs) != 1 || evs[0].Kind != want[id] {
			t.Errorf("%s raised %+v, want one %v", id, evs, want[id])
			continue
		}
		t.Logf("%s: %s at %v since %v value %.3g %s limit %.3g", id, evs[0].Kind, evs[0].At, evs[0].First, evs[0].Value, evs[0].Unit, evs[0].Limit)
	}
	if evs := raised[ids[0]]; len(evs) == 1 && (!evs[0].First.Equal(stuckFrom) || evs[0].At.Sub(stuckFrom) != 6*time.Hour) {
		t.Errorf("flatline since %v raised at %v, want since %v raised 6 h later", evs[0].First, evs[0].At, stuckFrom)
	}
	if evs := raised[ids[2]]; len(evs) == 1 {
		last := t0.Add(2*day - 5*time.Minute)
		if !evs[0].First.Equal(last) || evs[0].At.Sub(last) < 3*time.Hour || evs[0].At.Sub(last) > 3*time.Hour+10*time.Minute {
			t.Errorf("silent since %v raised at %v, want since %v, raised 3 h later (checked every 5 min of reading time)", evs[0].First, evs[0].At, last)
		}
	}
	if m, err := tickets.NextMsg(200 * time.Millisecond); err == nil {
		t.Errorf("ticket %s: no data-quality kind opens one unless ticket_kinds says so", m.Data)
	}
	// The reading above the span, 1100 kPa off, is a spike too.
	if got := spikesCounted(); got != float64(spikes+1) {
		t.Errorf("driftfit_readings_spikes_total = %v, want %d: the %d spikes and the reading above the span", got, spikes+1, spikes)
	}
}
