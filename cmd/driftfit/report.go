package main

import (
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"driftfit/configs"
	"driftfit/rolling"
)

// windowArg is a window as the user wrote it, and its spec.
type windowArg struct {
	label string
	spec  rolling.WindowSpec
}

// parseWindows parses a comma-separated list of window spans, each
// optionally with its own pane width after a slash ("1d,30d/1d"); pane is
// the width for the others.
func parseWindows(list, pane string) ([]windowArg, error) {
	var defPane time.Duration
	if pane != "" {
		d, err := configs.ParseDuration(pane)
		if err != nil {
			return nil, usageError("--pane %q: %v", pane, err)
		}
		defPane = d
	}
	var out []windowArg
	for _, item := range strings.Split(list, ",") {
		item = strings.TrimSpace(item)
		spanText, paneText, hasPane := strings.Cut(item, "/")
		span, err := configs.ParseDuration(spanText)
		if err != nil {
			return nil, usageError("--window %q: %v", item, err)
		}
		p := defPane
		if hasPane {
			if p, err = configs.ParseDuration(paneText); err != nil {
				return nil, usageError("--window %q: pane: %v", item, err)
			}
		}
		if p == 0 {
			return nil, usageError("--window %q: no pane width: give --pane or write span/pane", item)
		}
		spec := rolling.WindowSpec{Span: span, Pane: p}
		if _, err := rolling.NewSensor(spec); err != nil {
			return nil, usageError("--window %q: %v", item, err)
		}
		out = append(out, windowArg{label: item, spec: spec})
	}
	return out, nil
}

// fitStatus names the state of a fit in output: "ok" or why not.
func fitStatus(err error) string {
	switch {
	case err == nil:
		return "ok"
	case errors.Is(err, rolling.ErrNotEnoughData):
		return "not_enough_data"
	case errors.Is(err, rolling.ErrNoTimeSpread):
		return "no_time_spread"
	case errors.Is(err, rolling.ErrSingular):
		return "singular"
	case errors.Is(err, rolling.ErrConstant):
		return "constant"
	case errors.Is(err, rolling.ErrNumeric):
		return "out_of_range"
	}
	return "error"
}

// fitJSON is the JSON form of one fit, shared by every command that prints
// fits so their outputs compare field for field.
type fitJSON struct {
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

func newFitJSON(sensor, window string, f *rolling.Fit) fitJSON {
	out := fitJSON{Sensor: sensor, Window: window, Model: f.Model.String(), Status: fitStatus(f.Err), N: f.N, Excluded: f.Excluded}
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

// writeFitJSON writes one fit as a line of JSON.
func writeFitJSON(w io.Writer, rec fitJSON) error {
	b, err := json.Marshal(rec)
	if err != nil {
		return err
	}
	b = append(b, '\n')
	_, err = w.Write(b)
	return err
}

// illConditioned is the condition number above which the table flags a
// fit: past it a relative error of 1e-16 in the sums can move the
// coefficients by 1e-8 relative, and the readings crowd into a small part
// of the window (common practice for float64 normal equations).
const illConditioned = 1e8

// fitTable prints fits as an aligned table for people.
type fitTable struct {
	tw *tabwriter.Writer
}

func newFitTable(w io.Writer) *fitTable {
	t := &fitTable{tw: tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)}
	fmt.Fprintln(t.tw, "SENSOR\tWINDOW\tMODEL\tN\tLAST READING\tLEVEL\tRATE /day ±95%\tCURVATURE /day² ±95%\tRESID SD\tR²\tNOTE")
	return t
}

func (t *fitTable) add(sensor, window string, f *rolling.Fit) {
	last := "-"
	if f.N > 0 {
		last = f.Last.UTC().Format("2006-01-02 15:04:05")
	}
	if !f.OK() {
		fmt.Fprintf(t.tw, "%s\t%s\t%s\t%d\t%s\t\t\t\t\t\t%s\n", sensor, window, f.Model, f.N, last, strings.ReplaceAll(fitStatus(f.Err), "_", " "))
		return
	}
	g := func(v float64) string { return strconv.FormatFloat(v, 'g', 6, 64) }
	pm := func(j int) string { return g(f.Coef[j]) + " ±" + g(f.TCrit*f.SE[j]) }
	level, curv, r2, note := g(f.Coef[0]), "", g(f.R2), ""
	switch f.Model {
	case rolling.Parabola:
		curv = pm(2)
	case rolling.Exp:
		// Show the level in the sensor's unit: e^c0 is the fitted y now.
		level = g(math.Exp(f.Coef[0]))
		if f.Coef[1] != 0 {
			d := math.Ln2 / f.Coef[1]
			if d > 0 {
				note = "doubling " + g(d) + " d"
			} else {
				note = "halving " + g(-d) + " d"
			}
		}
		if f.Excluded > 0 {
			note = strings.TrimSpace(note + fmt.Sprintf(" (%d readings ≤ 0 left out)", f.Excluded))
		}
	}
	if f.Err != nil {
		r2, note = "-", "constant values"
	}
	if f.Cond > illConditioned {
		note = strings.TrimSpace(note + " ill-conditioned")
	}
	fmt.Fprintf(t.tw, "%s\t%s\t%s\t%d\t%s\t%s\t%s\t%s\t%s\t%s\t%s\n", sensor, window, f.Model, f.N, last, level, pm(1), curv, g(f.ResidSD), r2, note)
}

func (t *fitTable) flush() error { return t.tw.Flush() }
