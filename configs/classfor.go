package configs

import (
	"errors"
	"fmt"
	"strconv"
	"strings"
)

// ClassFor returns the class of a sensor with the sensor's own settings
// merged in: the class it is pinned to, or else the one class whose patterns
// match the id. The result is a fresh copy the caller may keep and modify;
// its canonical values are computed for the merged span and unit, and
// SensorID, AsLeft and Group are filled.
//
// Errors (as *FieldError): ErrNoClass when no class matches, ErrAmbiguous
// when several do, ErrUndefined for a pin to a missing class, ErrOverlap
// when the sensor falls in two peer groups, and any validation error of the
// merged settings. Safe for concurrent use.
func (c *Config) ClassFor(sensorID string) (*Class, error) {
	var s *Sensor
	for i := range c.Sensors {
		if c.Sensors[i].ID == sensorID {
			s = &c.Sensors[i]
			break
		}
	}
	ci, err := c.baseClass(sensorID, s)
	if err != nil {
		return nil, err
	}
	cl := c.merge(ci, s)
	g, err := c.groupFor(sensorID, s)
	if err != nil {
		return nil, err
	}
	cl.Group = g
	cl.SensorID = sensorID
	if s != nil {
		cl.AsLeft, cl.HasAsLeft = s.AsLeft, s.HasAsLeft
	}
	sc := scope{c: c, classPath: classPath(ci)}
	if s != nil {
		sc.sensorPath = sensorPath(sensorID)
	}
	v := &validator{c: c, seen: map[string]bool{}}
	v.class(&cl, sc)
	if len(v.errs) > 0 {
		return nil, fmt.Errorf("configs: class for sensor %s: %w", sensorID, errors.Join(v.errs...))
	}
	return &cl, nil
}

// baseClass finds the index of the class for id: the pinned class if s pins
// one, else the single matching class.
func (c *Config) baseClass(id string, s *Sensor) (int, error) {
	if s != nil && s.Class != "" {
		ci := c.classIndex(s.Class)
		if ci < 0 {
			return -1, &FieldError{File: c.file, Field: sensorPath(id) + ".class", Value: s.Class, Err: ErrUndefined,
				Detail: fmt.Sprintf("no class named %q under classes", s.Class)}
		}
		return ci, nil
	}
	m := c.matchingClasses(id)
	switch len(m) {
	case 0:
		return -1, &FieldError{File: c.file, Field: sensorPath(id), Value: id, Err: ErrNoClass,
			Detail: "add a pattern to a class or pin the sensor with class"}
	case 1:
		return m[0], nil
	}
	return -1, &FieldError{File: c.file, Field: sensorPath(id), Value: id, Err: ErrAmbiguous,
		Detail: fmt.Sprintf("classes %s all match; pin the sensor with class or make the patterns disjoint", c.classNames(m))}
}

// groupFor returns the peer group of id: the one named by the sensor's
// group field and/or the one whose members match id. Two different groups
// are an error.
func (c *Config) groupFor(id string, s *Sensor) (string, error) {
	var found []string
	if s != nil && s.Group != "" {
		found = append(found, s.Group)
	}
	for _, g := range c.Groups {
		for _, m := range g.Members {
			if matchPattern(m, id) {
				if len(found) == 0 || found[0] != g.Name {
					found = append(found, g.Name)
				}
				break
			}
		}
	}
	switch len(found) {
	case 0:
		return "", nil
	case 1:
		return found[0], nil
	}
	q := make([]string, len(found))
	for i, f := range found {
		q[i] = strconv.Quote(f)
	}
	return "", &FieldError{File: c.file, Field: sensorPath(id), Value: id, Err: ErrOverlap,
		Detail: "sensor is in peer groups " + strings.Join(q, ", ") + "; a sensor belongs to one peer group"}
}

// overridable lists the class fields a sensor may set, as written in the
// file below "sensors[<id>]".
var overridable = []string{
	"unit", "span.lower", "span.upper", "tolerance", "windows", "trend_model", "min_readings",
	"min_coverage", "debounce", "clear_fraction", "cooldown",
	"limits.slope", "limits.curvature", "limits.doubling_time", "limits.lead_time",
	"alarm_budget.false_tickets_per_year", "alarm_budget.alerts_per_year",
	"detectors.step", "detectors.flatline", "detectors.spike", "detectors.silent", "detectors.out_of_span",
	"ticket_kinds",
}

// merge returns a deep copy of class ci with the fields written under
// sensor s replacing the class's.
func (c *Config) merge(ci int, s *Sensor) Class {
	cl := c.Classes[ci]
	cl.Match = append([]string(nil), cl.Match...)
	cl.Windows = append([]Window(nil), cl.Windows...)
	if cl.TicketKinds != nil {
		cl.TicketKinds = append([]string{}, cl.TicketKinds...)
	}
	if s == nil {
		return cl
	}
	sp := sensorPath(s.ID) + "."
	o := &s.over
	for _, f := range overridable {
		if !c.written(sp + f) {
			continue
		}
		switch f {
		case "unit":
			cl.Unit = o.Unit
		case "span.lower":
			cl.Span.Lower = o.Span.Lower
		case "span.upper":
			cl.Span.Upper = o.Span.Upper
		case "tolerance":
			cl.Tolerance = o.Tolerance
		case "windows":
			cl.Windows = append([]Window(nil), o.Windows...)
		case "trend_model":
			cl.TrendModel = o.TrendModel
		case "min_readings":
			cl.MinReadings = o.MinReadings
		case "min_coverage":
			cl.MinCoverage = o.MinCoverage
		case "debounce":
			cl.Debounce = o.Debounce
		case "clear_fraction":
			cl.ClearFraction = o.ClearFraction
		case "cooldown":
			cl.Cooldown = o.Cooldown
		case "limits.slope":
			cl.Limits.Slope = o.Limits.Slope
		case "limits.curvature":
			cl.Limits.Curvature = o.Limits.Curvature
		case "limits.doubling_time":
			cl.Limits.DoublingTime = o.Limits.DoublingTime
		case "limits.lead_time":
			cl.Limits.LeadTime = o.Limits.LeadTime
		case "alarm_budget.false_tickets_per_year":
			cl.AlarmBudget.FalseTicketsPerYear = o.AlarmBudget.FalseTicketsPerYear
		case "alarm_budget.alerts_per_year":
			cl.AlarmBudget.AlertsPerYear = o.AlarmBudget.AlertsPerYear
		case "detectors.step":
			cl.Detectors.Step = o.Detectors.Step
		case "detectors.flatline":
			cl.Detectors.Flatline = o.Detectors.Flatline
		case "detectors.spike":
			cl.Detectors.Spike = o.Detectors.Spike
		case "detectors.silent":
			cl.Detectors.Silent = o.Detectors.Silent
		case "detectors.out_of_span":
			cl.Detectors.OutOfSpan = o.Detectors.OutOfSpan
		case "ticket_kinds":
			cl.TicketKinds = append([]string{}, o.TicketKinds...)
			cl.HasTicketKinds = true
		}
	}
	return cl
}
