package web

import (
	"errors"
	"fmt"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
)

// Where a window's verdict comes from.
const (
	// JudgedByService: the running service's latest judgement of the
	// window (Options.Judgements), shown for "as of now".
	JudgedByService = "service"
	// JudgedByStoredFit: the stored fit record judged here by the alert
	// rules' own gates (alert.Judge), for an earlier time or a window the
	// service has not judged since it started.
	JudgedByStoredFit = "stored fit"
)

// verdict is what the pages say of one window of a sensor with a rule:
// judged, or why not.
type verdict struct {
	judged bool
	reason string           // why not, for people; empty when judged
	by     string           // JudgedByService or JudgedByStoredFit; empty when no judgement was made
	j      *alert.Judgement // the numbers behind it, when there is a judgement
}

// serviceJudgements returns the running service's latest judgement of
// every window of the sensors wanted (all when want is nil), by sensor id
// and window name; nil without a service. A peer-group member's
// judgement of its deviation (id~peers) is not the sensor's own and is
// left out.
func (h *handler) serviceJudgements(want func(id string) bool) map[string]map[string]alert.Judgement {
	if h.o.Judgements == nil {
		return nil
	}
	out := map[string]map[string]alert.Judgement{}
	h.o.Judgements(func(id, window string, j alert.Judgement) {
		if want != nil && !want(id) {
			return
		}
		m := out[id]
		if m == nil {
			m = map[string]alert.Judgement{}
			out[id] = m
		}
		m[window] = j
	})
	return out
}

// judgeWindows returns the verdict on each window of recs, the newest fit
// records of one sensor at the time asked for, under its rule r: the
// service's own judgement when one is given (svc, by window name; only
// for "now"), else the record judged by alert.Judge with the serial
// estimate the sensor's windows give (alert.SerialOf), as the service's
// tracker judges it. calibrated is the last calibration at or before the
// time asked for (zero: none): the service does not judge a fit holding
// readings from before it, and neither do the pages.
func judgeWindows(r *alert.Rule, recs map[rolling.WindowSpec]rolling.Solution, svc map[string]alert.Judgement, calibrated time.Time) map[rolling.WindowSpec]verdict {
	serial := serialOf(recs)
	out := make(map[rolling.WindowSpec]verdict, len(recs))
	for w, sol := range recs {
		// A fit from before the calibration is not judged any more, even
		// while the service's latest judgement is still of it.
		if !calibrated.IsZero() && sol.N > 0 && sol.First.Before(calibrated) {
			out[w] = verdict{reason: "no fit since the calibration yet"}
			continue
		}
		if j, ok := svc[alert.WindowName(w)]; ok {
			out[w] = verdictOf(j, JudgedByService)
			continue
		}
		j, err := alert.Judge(*r, &sol, serial)
		switch {
		case errors.Is(err, alert.ErrUnknownWindow):
			out[w] = verdict{reason: "window not in the rule"}
		case err != nil:
			out[w] = verdict{reason: "rule refused: " + err.Error()}
		default:
			out[w] = verdictOf(j, JudgedByStoredFit)
		}
	}
	return out
}

func verdictOf(j alert.Judgement, by string) verdict {
	return verdict{judged: j.OK(), reason: reasonText(j), by: by, j: &j}
}

// reasonText says why a window was not judged, in the pages' words;
// empty when it was.
func reasonText(j alert.Judgement) string {
	switch j.Reason {
	case alert.Judged:
		return ""
	case alert.TooFewReadings:
		return fmt.Sprintf("too few readings %d < %d", j.N, j.MinN)
	case alert.LowCoverage:
		return fmt.Sprintf("coverage %.2f < %.2f", j.Coverage, j.MinCoverage)
	case alert.IllConditioned:
		if j.Cond > 0 {
			return fmt.Sprintf("trend fit not usable (condition number %.3g, largest allowed %.3g)", j.Cond, j.MaxCond)
		}
		return "trend fit not usable"
	case alert.SerialUnknown:
		return "serial correlation of the readings not known"
	case alert.FewEffective:
		return fmt.Sprintf("too few effective readings %.1f < %d (serially correlated)", j.NEff, j.MinN)
	case alert.PeersIncomplete:
		return fmt.Sprintf("peer group incomplete (%d of %d needed)", j.Live, j.Need)
	}
	return j.Reason.String()
}

// lastCalibration returns the time of the newest of cals (in time
// order) that stands at or before asof; zero for none.
func lastCalibration(cals []CalibrationView, asof time.Time) time.Time {
	var t time.Time
	for _, c := range cals {
		if c.Stands() && !c.Time.After(asof) {
			t = c.Time
		}
	}
	return t
}
