package web_test

import (
	"context"
	"math"
	"math/rand/v2"
	"path/filepath"
	"sort"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/web"
	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// The plant of these tests is invented: Quillmere Vale, unit 7.
const (
	idWhite  = "qm.u7.press.pt-1" // white noise on a slow drift, every 10 min
	idAR     = "qm.u7.press.pt-2" // AR(1) noise, φ 0.99 per reading, every 10 min
	idHourly = "qm.u7.press.pt-3" // white noise, hourly
	idGrowth = "qm.u7.foul.dp-4"  // exponential growth, judged on its doubling time
)

var serviceWindows = []rolling.WindowSpec{
	{Span: 6 * time.Hour, Pane: time.Hour},
	{Span: 24 * time.Hour, Pane: time.Hour},
	{Span: 10 * 24 * time.Hour, Pane: 24 * time.Hour},
}

func serviceRule(id string) (alert.Rule, bool) {
	r := alert.DefaultRule()
	r.Class, r.Unit, r.Tolerance, r.Windows = "pressure", "kPa", 3, serviceWindows
	r.MinReadings, r.MinCoverage = 20, 0.5
	r.Limits.Slope = alert.RateLimit{Warning: 0.5, Critical: 1}
	if id == idGrowth {
		r.Class, r.Unit, r.Tolerance = "fouling", "kPa", 40
		r.Limits = alert.Limits{Doubling: alert.DurationLimit{Warning: 20 * 24 * time.Hour}}
	}
	return r, true
}

// servicePlant returns the readings of the four sensors over 12 days
// ending an hour before end, at jittered times. The seed is fixed (5).
func servicePlant(end time.Time) map[string][]rolling.Reading {
	rng := rand.New(rand.NewPCG(5, 7))
	start := end.Add(-12*24*time.Hour - time.Hour)
	out := map[string][]rolling.Reading{}
	for _, id := range []string{idWhite, idAR, idHourly, idGrowth} {
		step := 10 * time.Minute
		if id == idHourly {
			step = time.Hour
		}
		e := 0.0
		for at := start; at.Before(end.Add(-time.Hour)); at = at.Add(step) {
			t := at.Add(time.Duration(rng.Int64N(int64(step / 2))))
			d := t.Sub(start).Hours() / 24
			var v float64
			switch id {
			case idAR:
				e = 0.99*e + math.Sqrt(1-0.99*0.99)*rng.NormFloat64()
				v = 500 + 0.4*e
			case idGrowth:
				v = 50 * math.Exp(0.02*d) * (1 + 0.01*rng.NormFloat64())
			default:
				v = 500 + 0.05*d + 0.2*rng.NormFloat64()
			}
			out[id] = append(out[id], rolling.Reading{UnixNano: t.UnixNano(), Value: v})
		}
	}
	return out
}

// runService feeds readings to a real service (an embedded NATS server
// with JetStream, a bbolt file in a temp dir) and stops it once every
// reading is applied and committed. It returns the open file and the
// stopped service, whose judgements stay readable.
func runService(t *testing.T, readings map[string][]rolling.Reading) (*store.DB, *ingest.Service) {
	t.Helper()
	ls := startService(t, nil)
	ls.feed(readings)
	ls.stop()
	return ls.db, ls.svc
}

// liveService is a real service running on an embedded NATS server with
// JetStream over a bbolt file in a temp dir.
type liveService struct {
	t     *testing.T
	db    *store.DB
	svc   *ingest.Service
	js    nats.JetStreamContext
	total int // readings fed
	stop  func()
}

// startService starts a service with the given clock (nil: the wall
// clock); it is stopped at the end of the test, or by stop.
func startService(t *testing.T, now func() time.Time) *liveService {
	t.Helper()
	dir := t.TempDir()
	ns, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: -1, NoLog: true, NoSigs: true,
		JetStream: true, StoreDir: filepath.Join(dir, "nats")})
	if err != nil {
		t.Fatal(err)
	}
	go ns.Start()
	if !ns.ReadyForConnections(10 * time.Second) {
		t.Fatal("NATS server not ready")
	}
	t.Cleanup(ns.Shutdown)
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	db := openDB(t)
	svc, err := ingest.New(ingest.Options{
		Conn: nc, DB: db,
		Sensor: func(id string) (ingest.SensorConfig, error) {
			return ingest.SensorConfig{Windows: serviceWindows, Unit: "kPa"}, nil
		},
		Rule:           serviceRule,
		CommitInterval: 20 * time.Millisecond,
		Now:            now,
	})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- svc.Run(ctx) }()
	stopped := false
	stop := func() {
		if !stopped {
			stopped = true
			cancel()
			if err := <-done; err != nil {
				t.Errorf("service: %v", err)
			}
		}
	}
	t.Cleanup(stop)
	js, err := nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	waitUntil(t, "the stream", func() bool { _, err := js.StreamInfo("DRIFTFIT"); return err == nil })
	return &liveService{t: t, db: db, svc: svc, js: js, stop: stop}
}

// feed publishes readings and returns once the service has applied and
// committed every reading fed so far, none refused.
func (ls *liveService) feed(readings map[string][]rolling.Reading) {
	t := ls.t
	t.Helper()
	for id, rs := range readings {
		for i := 0; i < len(rs); i += 400 {
			if _, err := ls.js.Publish("driftfit.in."+id, ingest.AppendBatch(nil, id, rs[i:min(i+400, len(rs))])); err != nil {
				t.Fatal(err)
			}
		}
		ls.total += len(rs)
	}
	waitUntil(t, "every reading committed", func() bool {
		n, err := ls.db.Applied()
		return err == nil && n == uint64(ls.total)
	})
	if st := ls.svc.Stats(); st.Rejected != 0 || st.Applied != uint64(ls.total) {
		t.Fatalf("service applied %d of %d readings, rejected %d", st.Applied, ls.total, st.Rejected)
	}
}

// waitUntil polls cond until it holds or 60 s pass.
func waitUntil(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(60 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// paneJSON is a pane of /api/sensors/{id}.
type paneJSON struct {
	Start   time.Time `json:"start"`
	End     time.Time `json:"end"`
	T       time.Time `json:"t"`
	N       int       `json:"n"`
	Mean    float64   `json:"mean"`
	GeoMean *float64  `json:"geo_mean"`
	NPos    *int      `json:"n_pos"`
	Fit     *float64  `json:"fit"`
	Resid   *float64  `json:"resid"`
	InFit   bool      `json:"in_fit"`
}

type windowJSON struct {
	Window    string           `json:"window"`
	Record    time.Time        `json:"record_time"`
	N         int              `json:"n"`
	Coverage  float64          `json:"coverage"`
	Judged    bool             `json:"judged"`
	Reason    string           `json:"reason"`
	JudgedBy  string           `json:"judged_by"`
	Judgement *alert.Judgement `json:"judgement"`
	Fit       struct {
		Model string    `json:"model"`
		Coef  []float64 `json:"coef"`
		Last  time.Time `json:"last"`
	} `json:"fit"`
	Panes []paneJSON `json:"pane_means"`
	Note  string     `json:"pane_means_note"`
}

type sensorPanesJSON struct {
	State   string       `json:"state"`
	Reason  string       `json:"reason"`
	Windows []windowJSON `json:"windows"`
}

// TestSensor_JudgedAsTheServiceJudges runs a real service over sensors
// whose windows meet every gate: white noise (judged), AR(1) noise of
// φ 0.99 (its 10-day window holds 1,440 readings but about 7 effective
// ones, n(1 − φ)/(1 + φ) (Santer et al. 2000, eq. 6), so too few; its
// short windows, judged with that window's correlation, know none of
// theirs), hourly readings (the 6-hour window too few; the 1-day window
// borrows the 10-day window's estimate). The page's verdict of every
// window, made from the stored records, must be the service's; given
// the service's judgements it must show those.
func TestSensor_JudgedAsTheServiceJudges(t *testing.T) {
	end := time.Now().UTC().Truncate(time.Hour)
	db, svc := runService(t, servicePlant(end))
	want := map[string]alert.Judgement{}
	svc.Judgements(func(id, window string, j alert.Judgement) { want[id+" "+window] = j })
	reasons := map[alert.Reason]int{}
	for _, judgements := range []func(func(id, window string, j alert.Judgement)){nil, svc.Judgements} {
		srv := newServer(t, web.Options{DB: db, Rule: serviceRule, Judgements: judgements})
		wantBy := web.JudgedByStoredFit
		if judgements != nil {
			wantBy = web.JudgedByService
		}
		for _, id := range []string{idWhite, idAR, idHourly, idGrowth} {
			v := getJSON[sensorPanesJSON](t, srv, "/api/sensors/"+id)
			if len(v.Windows) != len(serviceWindows) {
				t.Fatalf("%s: %d windows, want %d", id, len(v.Windows), len(serviceWindows))
			}
			judged := false
			for _, w := range v.Windows {
				j, ok := want[id+" "+w.Window]
				if !ok {
					t.Fatalf("%s %s: the service has no judgement", id, w.Window)
				}
				if w.Judgement == nil || w.Judgement.Reason != j.Reason || w.Judged != j.OK() || w.JudgedBy != wantBy {
					t.Errorf("%s %s: page judged %v (%q, by %q, %+v); the service: %v", id, w.Window, w.Judged, w.Reason, w.JudgedBy, w.Judgement, j)
				}
				judged = judged || j.OK()
				if judgements == nil {
					reasons[j.Reason]++
				}
			}
			if wantState := map[bool]string{true: "judged", false: "not_judged"}[judged]; v.State != wantState {
				t.Errorf("%s: state %q (%s), want %q", id, v.State, v.Reason, wantState)
			}
			if id == idAR {
				// The old page gates (readings, coverage, a usable fit)
				// would have judged the 10-day window.
				w := v.Windows[2]
				if w.N < 20 || w.Coverage < 0.5 || w.Judged || w.Judgement.Reason != alert.FewEffective {
					t.Errorf("%s %s: n %d, coverage %.2f, judged %v (%s); want many readings yet too few effective ones",
						id, w.Window, w.N, w.Coverage, w.Judged, w.Reason)
				}
			}
		}
	}
	// The fleet says the same of each sensor, from the same verdicts.
	for _, judgements := range []func(func(id, window string, j alert.Judgement)){nil, svc.Judgements} {
		srv := newServer(t, web.Options{DB: db, Rule: serviceRule, Judgements: judgements})
		for _, row := range rows(t, getJSON[fleetJSON](t, srv, "/api/fleet")) {
			judged := false
			for _, w := range serviceWindows {
				judged = judged || want[row.ID+" "+alert.WindowName(w)].OK()
			}
			if (row.State == "judged") != judged {
				t.Errorf("fleet: %s %s (%s); the service judged a window: %v", row.ID, row.State, row.Reason, judged)
			}
		}
	}
	t.Logf("service judgements by reason: %v", reasons)
	for _, r := range []alert.Reason{alert.Judged, alert.TooFewReadings, alert.SerialUnknown, alert.FewEffective} {
		if reasons[r] == 0 {
			t.Errorf("no window %s; the comparison does not cover that gate", r)
		}
	}
}

// paneOf is the statistics of the readings of one pane, computed here.
type paneOf struct {
	n, npos                 int
	sum, sumLn, sumT, sumTp float64 // Σy, Σ ln y (y > 0), Σ(t − start), Σ(t − start) over y > 0, in ns
	times                   []float64
}

// TestSensor_PaneMeans checks the pane means the API shows for each
// window of a real service's stored state against the readings fed into
// each pane, computed here: the count, the mean, the mean time, the
// fitted model's mean over the pane's readings (c0 + c1·τ̄ + c2·(τ̄² + σ²)
// on the stored coefficients, τ̄ and σ² the mean and variance of the
// readings' τ; for exp, ln y against c0 + c1·τ̄ over y > 0) and the
// residual. Over a window whose panes are all still kept, the residuals
// weighted by their counts sum to zero, as the residuals of any
// least-squares fit with an intercept do (Draper and Smith, Applied
// Regression Analysis, 3rd ed., section 1.2).
func TestSensor_PaneMeans(t *testing.T) {
	end := time.Now().UTC().Truncate(time.Hour)
	readings := servicePlant(end)
	db, _ := runService(t, readings)
	srv := newServer(t, web.Options{DB: db, Rule: serviceRule})
	for _, id := range []string{idWhite, idHourly, idGrowth} {
		v := getJSON[sensorPanesJSON](t, srv, "/api/sensors/"+id)
		for wi, w := range v.Windows {
			spec := serviceWindows[wi]
			weighted, inFitN := checkPaneMeans(t, id, w, spec, serviceWindows, readings[id])
			c := w.Fit.Coef
			// The window of 6 hourly panes shares its ring with the 1-day
			// window: every pane of its newest record is still kept.
			if spec == serviceWindows[0] {
				if inFitN != float64(w.N) || w.Note != "" {
					t.Errorf("%s %s: in-fit panes hold %v readings, the fit %d (note %q); want all", id, w.Window, inFitN, w.N, w.Note)
				}
				if w.Fit.Model != "exp" && math.Abs(weighted) > 1e-9*inFitN*math.Abs(c[0]) {
					t.Errorf("%s %s: Σ n·residual = %.3g, want 0", id, w.Window, weighted)
				}
			}
			// The 10-day window's oldest pane left the ring when the day
			// after its newest record began.
			if spec == serviceWindows[2] && w.Note == "" {
				t.Errorf("%s %s: no note on the panes that are gone", id, w.Window)
			}
		}
	}
}

// checkPaneMeans checks the pane means of window w (spec, of a sensor
// with windows specs, fed readings) against the readings themselves,
// computed here, and returns the sum of the residuals of the panes in
// the fit weighted by their counts, and those counts' sum.
func checkPaneMeans(t *testing.T, id string, w windowJSON, spec rolling.WindowSpec, specs []rolling.WindowSpec, readings []rolling.Reading) (weighted, inFitN float64) {
	t.Helper()
	pw := int64(spec.Pane)
	panes := map[int64]*paneOf{}
	var newest int64
	for _, r := range readings {
		k := r.UnixNano / pw // times here are after the epoch
		p := panes[k]
		if p == nil {
			p = &paneOf{}
			panes[k] = p
		}
		off := float64(r.UnixNano - k*pw)
		p.n++
		p.sum += r.Value
		p.sumT += off
		p.times = append(p.times, off)
		if r.Value > 0 {
			p.npos++
			p.sumLn += math.Log(r.Value)
			p.sumTp += off
		}
		newest = max(newest, k)
	}
	// From the first pane of the newest record's window to the newest
	// pane, of those the state keeps: the panes of the longest window of
	// the width, ending with the newest.
	first := w.Record.UnixNano()/pw - int64(spec.Panes()) + 1
	kept := 0
	for _, o := range specs {
		if o.Pane == spec.Pane {
			kept = max(kept, o.Panes())
		}
	}
	first = max(first, newest-int64(kept)+1)
	var keys []int64
	for k := range panes {
		if k >= first && k <= newest {
			keys = append(keys, k)
		}
	}
	sort.Slice(keys, func(i, j int) bool { return keys[i] < keys[j] })
	if len(w.Panes) != len(keys) {
		t.Fatalf("%s %s: %d panes, want %d", id, w.Window, len(w.Panes), len(keys))
	}
	c := w.Fit.Coef
	exp := w.Fit.Model == "exp"
	for i, k := range keys {
		got, p := w.Panes[i], panes[k]
		n := float64(p.n)
		where := id + " " + w.Window + " " + got.Start.UTC().Format(time.RFC3339)
		if !got.Start.Equal(time.Unix(0, k*pw)) || !got.End.Equal(time.Unix(0, (k+1)*pw)) || got.N != p.n {
			t.Fatalf("%s: pane %v–%v of %d readings, want %v of %d", where, got.Start, got.End, got.N, time.Unix(0, k*pw), p.n)
		}
		if mean := p.sum / n; math.Abs(got.Mean-mean) > 1e-12*math.Abs(mean) {
			t.Errorf("%s: mean %.15g, want %.15g", where, got.Mean, mean)
		}
		tbar, lnMean := p.sumT/n, 0.0
		if exp {
			tbar, lnMean = p.sumTp/float64(p.npos), p.sumLn/float64(p.npos)
			if got.GeoMean == nil || got.NPos == nil || *got.NPos != p.npos || math.Abs(*got.GeoMean-math.Exp(lnMean)) > 1e-12*math.Exp(lnMean) {
				t.Errorf("%s: geometric mean %v of %v positive readings, want %v of %d", where, got.GeoMean, got.NPos, math.Exp(lnMean), p.npos)
			}
		}
		if d := float64(got.T.UnixNano()-k*pw) - tbar; math.Abs(d) > 10 {
			t.Errorf("%s: mean time off by %.0f ns", where, d)
		}
		tau := (float64(k*pw-w.Fit.Last.UnixNano()) + tbar) / 86400e9
		var fit, resid float64
		tolR := 1e-9 // in ln y for exp
		if exp {
			ln := c[0] + c[1]*tau
			fit, resid = math.Exp(ln), lnMean-ln
		} else {
			var ss float64
			for _, o := range p.times {
				ss += (o - tbar) * (o - tbar)
			}
			varTau := ss / n / (86400e9 * 86400e9)
			fit = c[0] + c[1]*tau
			if len(c) > 2 {
				fit += c[2] * (tau*tau + varTau)
			}
			resid = got.Mean - fit
			tolR = 1e-9 * math.Abs(fit)
		}
		if got.Fit == nil || got.Resid == nil || math.Abs(*got.Fit-fit) > 1e-9*math.Abs(fit) || math.Abs(*got.Resid-resid) > tolR {
			t.Errorf("%s: fitted %v residual %v, want %.12g and %.6g", where, got.Fit, got.Resid, fit, resid)
		}
		if got.InFit {
			weighted += n * *got.Resid
			inFitN += n
		}
	}
	return weighted, inFitN
}
