package main

import (
	"errors"
	"fmt"
	"os"

	"github.com/rs/zerolog"

	"driftfit/alert"
	"driftfit/configs"
	"driftfit/ingest"
	"driftfit/rolling"
)

// ruleFor maps a sensor's class onto an alert rule; ok is false for a
// sensor with no class, or a class without a tolerance, or with neither
// a limit nor a detector.
func ruleFor(cfg *configs.Config, id string) (alert.Rule, bool, error) {
	c, err := cfg.ClassFor(id)
	if errors.Is(err, configs.ErrNoClass) {
		return alert.Rule{}, false, nil
	}
	if err != nil {
		return alert.Rule{}, false, err
	}
	r := alert.DefaultRule()
	r.Class, r.Unit = c.Name, c.Unit
	r.SpanLower, r.SpanUpper = c.Span.Lower, c.Span.Upper
	r.Tolerance = c.Tolerance.Abs
	r.AsLeft, r.HasAsLeft = c.AsLeft, c.HasAsLeft
	r.Windows = nil
	for _, w := range c.Windows {
		r.Windows = append(r.Windows, rolling.WindowSpec{Span: w.Span, Pane: w.Pane})
	}
	if c.TrendModel == configs.TrendParabola {
		r.TrendModel = rolling.Parabola
	}
	r.MinReadings, r.MinCoverage, r.Debounce = c.MinReadings, c.MinCoverage, c.Debounce
	r.ClearFraction, r.Cooldown = c.ClearFraction, c.Cooldown
	r.Limits = alert.Limits{
		Slope:     alert.RateLimit{Warning: c.Limits.Slope.Warning.Value, Critical: c.Limits.Slope.Critical.Value},
		Curvature: alert.RateLimit{Warning: c.Limits.Curvature.Warning.Value, Critical: c.Limits.Curvature.Critical.Value},
		Doubling:  alert.DurationLimit{Warning: c.Limits.DoublingTime.Warning, Critical: c.Limits.DoublingTime.Critical},
		LeadTime:  alert.DurationLimit{Warning: c.Limits.LeadTime.Warning, Critical: c.Limits.LeadTime.Critical},
	}
	r.Budget = alert.Budget{FalseTicketsPerYear: c.AlarmBudget.FalseTicketsPerYear, AlertsPerYear: c.AlarmBudget.AlertsPerYear}
	if c.HasTicketKinds {
		r.TicketKinds = []alert.Kind{}
		for _, name := range c.TicketKinds {
			k, err := alert.ParseKind(name)
			if err != nil {
				return alert.Rule{}, false, fmt.Errorf("class %s: ticket_kinds: %w", c.Name, err)
			}
			r.TicketKinds = append(r.TicketKinds, k)
		}
	}
	d := c.Detectors
	r.Detect = alert.Detectors{
		Step:      alert.StepSettings{On: d.Step.On, K: d.Step.K, H: d.Step.H},
		Flatline:  alert.FlatlineSettings{For: d.Flatline.For, MinCount: d.Flatline.MinCount, Resolution: d.Flatline.Resolution},
		Spike:     alert.SpikeSettings{K: d.Spike.K, Count: d.Spike.Count, Within: d.Spike.Within},
		Silent:    d.Silent,
		OutOfSpan: d.OutOfSpan,
	}
	on := r.Limits.Slope.On() || r.Limits.Curvature.On() || r.Limits.Doubling.On() || r.Limits.LeadTime.On() ||
		d.Step.On || d.Flatline.For > 0 || d.Spike.K > 0 || d.Silent > 0 || d.OutOfSpan
	return r, on && r.Tolerance > 0, nil
}

// rules returns the rule lookup ingest judges sensors by.
func rules(cfg *configs.Config, log *zerolog.Logger) func(id string) (alert.Rule, bool) {
	return func(id string) (alert.Rule, bool) {
		r, ok, err := ruleFor(cfg, id)
		if err != nil {
			log.Warn().Str("sensor", id).Err(err).Msg("no alert rule")
		}
		return r, ok
	}
}

// webhookFromConfig returns the ticket webhook settings of the
// configuration, reading the Authorization header value from the
// environment variable it names.
func webhookFromConfig(cfg *configs.Config) ingest.Webhook {
	w := cfg.Tickets.Webhook
	o := ingest.Webhook{URL: w.URL, Timeout: w.Timeout, MaxBackoff: w.MaxBackoff}
	if w.HeaderEnv != "" {
		o.Authorization = os.Getenv(w.HeaderEnv)
	}
	return o
}
