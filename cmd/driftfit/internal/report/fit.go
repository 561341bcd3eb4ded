package report

import (
	"math"
	"time"

	"driftfit/cmd/driftfit/internal/chart"
	"driftfit/configs"
	"driftfit/rolling"
)

// Status names the state of a fit in output: "ok" or why there is none
// (see chart.Status).
func Status(err error) string { return chart.Status(err) }

// WindowLabel writes a window as SPAN/PANE in the duration syntax of the
// config file and the --window flags ("30d/1d", "1d/1h").
func WindowLabel(ws rolling.WindowSpec) string {
	return configs.FormatDuration(ws.Span) + "/" + configs.FormatDuration(ws.Pane)
}

// FitJSON is the JSON form of one fit, shared by every command that
// prints fits so their outputs compare field for field.
type FitJSON struct {
	Sensor   string       `json:"sensor"`
	Window   string       `json:"window"`
	Model    string       `json:"model"`
	Status   string       `json:"status"`
	N        int          `json:"n"`
	Excluded int          `json:"excluded,omitempty"`
	First    string       `json:"first,omitempty"`
	Last     string       `json:"last,omitempty"`
	Coef     []float64    `json:"coef,omitempty"`
	SE       []float64    `json:"se,omitempty"`
	CI95     [][2]float64 `json:"ci95,omitempty"`
	ResidSD  *float64     `json:"resid_sd,omitempty"`
	R2       *float64     `json:"r2,omitempty"`
	DF       int          `json:"df,omitempty"`
	Cond     float64      `json:"cond,omitempty"`
	PosDef   bool         `json:"pos_def"`
	// DoublingDays is ln 2/c1 of an exp fit (negative: halving time).
	DoublingDays *float64 `json:"doubling_days,omitempty"`
}

// NewFitJSON returns the JSON form of f, the fit of sensor's window
// labelled window.
func NewFitJSON(sensor, window string, f *rolling.Fit) FitJSON {
	out := FitJSON{Sensor: sensor, Window: window, Model: f.Model.String(), Status: Status(f.Err), N: f.N, Excluded: f.Excluded}
	if f.N > 0 {
		out.First = f.First.UTC().Format(time.RFC3339Nano)
		out.Last = f.Last.UTC().Format(time.RFC3339Nano)
	}
	if !f.OK() {
		return out
	}
	p := f.Model.Coefs()
	out.Coef, out.SE, out.CI95 = f.Coef[:p:p], f.SE[:p:p], f.CI[:p:p]
	out.ResidSD = &f.ResidSD
	if f.Err == nil {
		out.R2 = &f.R2
	}
	out.DF, out.Cond, out.PosDef = f.DF, f.Cond, f.PosDef
	if f.Model == rolling.Exp && f.Coef[1] != 0 {
		d := math.Ln2 / f.Coef[1]
		out.DoublingDays = &d
	}
	return out
}

// illConditioned is the condition number above which the table flags a
// fit: past it a relative error of 1e-16 in the sums can move the
// coefficients by 1e-8 relative, and the readings crowd into a small part
// of the window (common practice for float64 normal equations).
const illConditioned = 1e8
