package configs

import (
	"errors"
	"fmt"
	"math"
	"sort"
	"strconv"
	"strings"
	"time"

	"github.com/goccy/go-yaml"
	"github.com/goccy/go-yaml/ast"
	"github.com/goccy/go-yaml/parser"
)

// Decoding walks the YAML syntax tree by hand instead of unmarshalling into
// tagged structs: it keeps every value's line and column for later
// validation, reports every unknown key and wrongly typed value in one pass
// (a strict yaml.Unmarshal stops at the first), and records which fields
// were written so that an explicit zero can differ from an absent key.

// maxAliasDepth bounds alias-to-alias chains and nested merge keys, so a
// hostile file cannot recurse without end.
const maxAliasDepth = 16

type decoder struct {
	file    string
	errs    []error
	pos     map[string]position
	bad     map[string]bool // paths whose value failed to decode
	anchors map[string]ast.Node
}

type entry struct {
	key   string
	keyN  ast.Node
	value ast.Node
}

type handler func(n ast.Node, path string)

func decode(name string, data []byte) (*Config, *decoder, error) {
	d := &decoder{file: name, pos: map[string]position{}, bad: map[string]bool{}, anchors: map[string]ast.Node{}}
	f, err := parser.ParseBytes(data, 0)
	if err != nil {
		fe := &FieldError{File: name, Err: ErrSyntax, Detail: err.Error()}
		var ye yaml.Error
		if errors.As(err, &ye) {
			fe.Detail = ye.GetMessage()
			if tk := ye.GetToken(); tk != nil && tk.Position != nil {
				fe.Line, fe.Column = tk.Position.Line, tk.Position.Column
				fe.Value = tk.Value
			}
		}
		return nil, nil, fe
	}
	c := &Config{file: name}
	var body ast.Node
	for i, doc := range f.Docs {
		if doc == nil || doc.Body == nil {
			continue
		}
		if body != nil {
			d.errAt(doc.Body, "", "", ErrSyntax, "more than one YAML document; put the configuration in one (document %d)", i+1)
			break
		}
		body = doc.Body
	}
	if body != nil {
		ast.Walk(anchorCollector(d.anchors), body)
		d.fields(body, "", map[string]handler{
			"bus":   func(n ast.Node, p string) { d.bus(n, p, &c.Bus) },
			"store": func(n ast.Node, p string) { d.store(n, p, &c.Store) },
			"http": func(n ast.Node, p string) {
				d.fields(n, p, map[string]handler{"addr": d.str(&c.HTTP.Addr), "token_env": d.str(&c.HTTP.TokenEnv)})
			},
			"defaults": func(n ast.Node, p string) {
				d.fields(n, p, map[string]handler{"windows": d.windows(&c.Defaults.Windows)})
			},
			"classes": func(n ast.Node, p string) { d.classes(n, p, c) },
			"sensors": func(n ast.Node, p string) { d.sensors(n, p, c) },
			"groups":  func(n ast.Node, p string) { d.groups(n, p, c) },
			"tickets": func(n ast.Node, p string) { d.tickets(n, p, &c.Tickets) },
		})
	}
	c.pos = d.pos
	return c, d, nil
}

type anchorCollector map[string]ast.Node

func (a anchorCollector) Visit(n ast.Node) ast.Visitor {
	if an, ok := n.(*ast.AnchorNode); ok && an.Name != nil && an.Name.GetToken() != nil {
		a[an.Name.GetToken().Value] = an.Value
	}
	return a
}

func nodePos(n ast.Node) position {
	if n == nil {
		return position{}
	}
	tk := n.GetToken()
	if tk == nil || tk.Position == nil {
		return position{}
	}
	return position{tk.Position.Line, tk.Position.Column}
}

func (d *decoder) errAt(n ast.Node, path, value string, sentinel error, format string, args ...any) {
	p := nodePos(n)
	d.errs = append(d.errs, &FieldError{File: d.file, Line: p.line, Column: p.column, Field: path,
		Value: value, Err: sentinel, Detail: fmt.Sprintf(format, args...)})
	if path != "" {
		d.bad[path] = true
	}
}

// wrapAt places an error from a value parser (ParseDuration, parseQuantity)
// at node n and path.
func (d *decoder) wrapAt(n ast.Node, path string, err error) {
	var fe *FieldError
	if !errors.As(err, &fe) {
		fe = &FieldError{Err: ErrType, Detail: err.Error()}
	}
	d.errAt(n, path, fe.Value, fe.Err, "%s", fe.Detail)
}

// resolve strips anchors, tags and aliases from n.
func (d *decoder) resolve(n ast.Node) ast.Node {
	for range maxAliasDepth {
		switch v := n.(type) {
		case *ast.AnchorNode:
			n = v.Value
		case *ast.TagNode:
			n = v.Value
		case *ast.AliasNode:
			if v.Value == nil || v.Value.GetToken() == nil {
				return nil
			}
			a, ok := d.anchors[v.Value.GetToken().Value]
			if !ok {
				return nil
			}
			n = a
		default:
			return n
		}
	}
	return nil
}

func isNull(n ast.Node) bool {
	if n == nil {
		return true
	}
	_, ok := n.(*ast.NullNode)
	return ok
}

func typeName(n ast.Node) string {
	switch n.(type) {
	case *ast.MappingNode, *ast.MappingValueNode:
		return "a mapping"
	case *ast.SequenceNode:
		return "a list"
	case *ast.StringNode, *ast.LiteralNode:
		return "text"
	case *ast.IntegerNode, *ast.FloatNode, *ast.InfinityNode, *ast.NanNode:
		return "a number"
	case *ast.BoolNode:
		return "a boolean"
	case *ast.NullNode:
		return "null"
	}
	return "an unsupported YAML node"
}

// text returns the source text of a scalar for error messages.
func text(n ast.Node) string {
	switch v := n.(type) {
	case *ast.StringNode:
		return v.Value
	case *ast.MappingNode, *ast.MappingValueNode, *ast.SequenceNode:
		return ""
	}
	if n == nil || n.GetToken() == nil {
		return ""
	}
	return n.GetToken().Value
}

// entries returns the key/value pairs of a mapping node, with merge keys
// ("<<: *base") expanded: keys written in the mapping win over merged ones.
func (d *decoder) entries(raw ast.Node, path string, depth int) ([]entry, bool) {
	n := d.resolve(raw)
	var values []*ast.MappingValueNode
	switch v := n.(type) {
	case nil, *ast.NullNode:
		return nil, true
	case *ast.MappingNode:
		values = v.Values
	case *ast.MappingValueNode:
		values = []*ast.MappingValueNode{v}
	default:
		d.errAt(raw, path, text(n), ErrType, "expected a mapping, found %s", typeName(n))
		return nil, false
	}
	var own, merged []entry
	seen := map[string]bool{}
	for _, mv := range values {
		if mv == nil || mv.Key == nil {
			continue
		}
		if mv.Key.IsMergeKey() {
			if depth >= maxAliasDepth {
				d.errAt(mv.Key, path, "", ErrType, "merge keys nested too deeply")
				continue
			}
			src := d.resolve(mv.Value)
			var srcs []ast.Node
			if s, ok := src.(*ast.SequenceNode); ok {
				srcs = s.Values
			} else {
				srcs = []ast.Node{src}
			}
			for _, s := range srcs {
				es, _ := d.entries(s, path, depth+1)
				merged = append(merged, es...)
			}
			continue
		}
		k := d.resolve(mv.Key)
		if mk, ok := k.(*ast.MappingKeyNode); ok {
			k = d.resolve(mk.Value)
		}
		switch k.(type) {
		case *ast.StringNode, *ast.IntegerNode, *ast.FloatNode, *ast.BoolNode:
		default:
			d.errAt(mv.Key, path, "", ErrType, "a key must be plain text, found %s", typeName(k))
			continue
		}
		key := text(k)
		seen[key] = true
		own = append(own, entry{key: key, keyN: mv.Key, value: mv.Value})
	}
	for _, e := range merged {
		if !seen[e.key] {
			seen[e.key] = true
			own = append(own, e)
		}
	}
	return own, true
}

// fields decodes a mapping with a fixed set of keys. Unknown keys are
// errors naming the allowed keys; null values count as not written.
func (d *decoder) fields(n ast.Node, path string, hs map[string]handler) {
	es, ok := d.entries(n, path, 0)
	if !ok {
		return
	}
	for _, e := range es {
		p := e.key
		if path != "" {
			p = path + "." + e.key
		}
		h, ok := hs[e.key]
		if !ok {
			d.errAt(e.keyN, p, e.key, ErrUnknownField, "allowed here: %s", keyList(hs))
			continue
		}
		v := d.resolve(e.value)
		if isNull(v) {
			continue
		}
		d.pos[p] = nodePos(e.value)
		h(e.value, p)
	}
}

func keyList(hs map[string]handler) string {
	ks := make([]string, 0, len(hs))
	for k := range hs {
		ks = append(ks, k)
	}
	sort.Strings(ks)
	return strings.Join(ks, ", ")
}

func (d *decoder) seq(raw ast.Node, path string) ([]ast.Node, bool) {
	n := d.resolve(raw)
	switch v := n.(type) {
	case nil, *ast.NullNode:
		return nil, true
	case *ast.SequenceNode:
		return v.Values, true
	}
	d.errAt(raw, path, text(n), ErrType, "expected a list, found %s", typeName(n))
	return nil, false
}

// scalarText returns the text of a scalar value; numbers and booleans are
// taken as written, so "unit: 1" is the text "1".
func (d *decoder) scalarText(raw ast.Node, path string) (string, bool) {
	n := d.resolve(raw)
	switch v := n.(type) {
	case *ast.StringNode:
		return v.Value, true
	case *ast.LiteralNode:
		if v.Value != nil {
			return strings.TrimRight(v.Value.Value, "\n"), true
		}
		return "", true
	case *ast.IntegerNode, *ast.FloatNode, *ast.BoolNode, *ast.InfinityNode, *ast.NanNode:
		return text(n), true
	}
	d.errAt(raw, path, text(n), ErrType, "expected text, found %s", typeName(n))
	return "", false
}

func (d *decoder) str(dst *string) handler {
	return func(n ast.Node, p string) {
		if s, ok := d.scalarText(n, p); ok {
			*dst = s
		}
	}
}

func (d *decoder) strList(dst *[]string) handler {
	return func(n ast.Node, p string) {
		items, ok := d.seq(n, p)
		if !ok {
			return
		}
		out := make([]string, 0, len(items))
		for i, it := range items {
			ip := fmt.Sprintf("%s[%d]", p, i)
			if isNull(d.resolve(it)) {
				d.errAt(it, ip, "", ErrType, "empty list item")
				continue
			}
			d.pos[ip] = nodePos(it)
			if s, ok := d.scalarText(it, ip); ok {
				out = append(out, s)
			}
		}
		*dst = out
	}
}

func (d *decoder) float(dst *float64) handler {
	return func(raw ast.Node, p string) {
		switch v := d.resolve(raw).(type) {
		case *ast.FloatNode:
			*dst = v.Value
		case *ast.IntegerNode:
			switch x := v.Value.(type) {
			case int64:
				*dst = float64(x)
			case uint64:
				*dst = float64(x)
			}
		case *ast.InfinityNode, *ast.NanNode:
			d.errAt(raw, p, text(v), ErrRange, "must be a finite number")
		case *ast.StringNode:
			// A quoted number is accepted, since quoting is easy to do by
			// habit; anything else is a type error.
			f, err := strconv.ParseFloat(strings.TrimSpace(v.Value), 64)
			if err != nil || math.IsInf(f, 0) || math.IsNaN(f) {
				d.errAt(raw, p, v.Value, ErrType, "expected a finite number")
				return
			}
			*dst = f
		default:
			d.errAt(raw, p, text(v), ErrType, "expected a number, found %s", typeName(v))
		}
	}
}

func (d *decoder) integer(dst *int) handler {
	return func(raw ast.Node, p string) {
		v, ok := d.resolve(raw).(*ast.IntegerNode)
		if !ok {
			n := d.resolve(raw)
			d.errAt(raw, p, text(n), ErrType, "expected a whole number, found %s", typeName(n))
			return
		}
		switch x := v.Value.(type) {
		case int64:
			if int64(int(x)) == x {
				*dst = int(x)
				return
			}
		case uint64:
			if x <= math.MaxInt {
				*dst = int(x)
				return
			}
		}
		d.errAt(raw, p, text(v), ErrRange, "whole number too large")
	}
}

func (d *decoder) duration(dst *time.Duration) handler {
	return func(raw ast.Node, p string) {
		s, ok := d.scalarText(raw, p)
		if !ok {
			return
		}
		v, err := ParseDuration(strings.TrimSpace(s))
		if err != nil {
			d.wrapAt(raw, p, err)
			return
		}
		*dst = v
	}
}

func (d *decoder) bus(n ast.Node, path string, b *Bus) {
	d.fields(n, path, map[string]handler{
		"servers":                    d.strList(&b.Servers),
		"subject_prefix":             d.str(&b.SubjectPrefix),
		"rejected_subject":           d.str(&b.RejectedSubject),
		"alert_subject_prefix":       d.str(&b.AlertSubjectPrefix),
		"ticket_subject":             d.str(&b.TicketSubject),
		"calibration_subject_prefix": d.str(&b.CalibrationSubjectPrefix),
		"mode": func(n ast.Node, p string) {
			s, ok := d.scalarText(n, p)
			if !ok {
				return
			}
			switch s {
			case "stream":
				b.Mode = ModeStream
			case "direct":
				b.Mode = ModeDirect
			default:
				d.errAt(n, p, s, ErrRange, "must be stream or direct")
			}
		},
		"stream_name":        d.str(&b.StreamName),
		"max_payload_bytes":  d.integer(&b.MaxPayloadBytes),
		"future_skew":        d.duration(&b.FutureSkew),
		"stream_max_bytes":   d.integer(&b.StreamMaxBytes),
		"stream_max_age":     d.duration(&b.StreamMaxAge),
		"rejected_max_bytes": d.integer(&b.RejectedMaxBytes),
		"rejected_max_age":   d.duration(&b.RejectedMaxAge),
		"max_sensors":        d.integer(&b.MaxSensors),
		"user":               d.str(&b.User),
		"password_env":       d.str(&b.PasswordEnv),
		"token_env":          d.str(&b.TokenEnv),
		"creds_file":         d.str(&b.CredsFile),
		"tls": func(n ast.Node, p string) {
			d.fields(n, p, map[string]handler{
				"ca_file":   d.str(&b.TLS.CAFile),
				"cert_file": d.str(&b.TLS.CertFile),
				"key_file":  d.str(&b.TLS.KeyFile),
			})
		},
		"embedded": func(n ast.Node, p string) {
			d.fields(n, p, map[string]handler{
				"host":  d.str(&b.Embedded.Host),
				"users": func(n ast.Node, p string) { d.busUsers(n, p, &b.Embedded.Users) },
			})
		},
		"mqtt": func(n ast.Node, p string) {
			d.fields(n, p, map[string]handler{"listen": d.str(&b.MQTT.Listen)})
		},
	})
}

func (d *decoder) busUsers(n ast.Node, path string, dst *[]BusUser) {
	items, ok := d.seq(n, path)
	if !ok {
		return
	}
	*dst = make([]BusUser, len(items))
	for i, it := range items {
		u := &(*dst)[i]
		ip := fmt.Sprintf("%s[%d]", path, i)
		d.pos[ip] = nodePos(it)
		d.fields(it, ip, map[string]handler{
			"user":         d.str(&u.User),
			"password_env": d.str(&u.PasswordEnv),
			"role":         d.str(&u.Role),
			"sensors":      d.strList(&u.Sensors),
		})
	}
}

func (d *decoder) store(n ast.Node, path string, s *Store) {
	d.fields(n, path, map[string]handler{
		"dir":                d.str(&s.Dir),
		"commit_interval":    d.duration(&s.CommitInterval),
		"commit_readings":    d.integer(&s.CommitReadings),
		"commit_max_sensors": d.integer(&s.CommitMaxSensors),
		"history_retention":  d.duration(&s.HistoryRetention),
		"history_thin_after": d.duration(&s.HistoryThinAfter),
		"history_thin_to":    d.duration(&s.HistoryThinTo),
	})
}

func (d *decoder) tickets(n ast.Node, path string, t *Tickets) {
	d.fields(n, path, map[string]handler{
		"webhook": func(n ast.Node, p string) {
			w := &t.Webhook
			d.fields(n, p, map[string]handler{
				"url":         d.str(&w.URL),
				"timeout":     d.duration(&w.Timeout),
				"max_backoff": d.duration(&w.MaxBackoff),
				"header_env":  d.str(&w.HeaderEnv),
			})
		},
	})
}

func (d *decoder) windows(dst *[]Window) handler {
	return func(n ast.Node, p string) {
		items, ok := d.seq(n, p)
		if !ok {
			return
		}
		out := make([]Window, len(items))
		for i, it := range items {
			ip := fmt.Sprintf("%s[%d]", p, i)
			d.pos[ip] = nodePos(it)
			d.fields(it, ip, map[string]handler{
				"span": d.duration(&out[i].Span),
				"pane": d.duration(&out[i].Pane),
			})
		}
		*dst = out
	}
}

// classFields are the fields a class defines and a sensor may override.
func (d *decoder) classFields(c *Class) map[string]handler {
	return map[string]handler{
		"unit": d.str(&c.Unit),
		"span": func(n ast.Node, p string) {
			d.fields(n, p, map[string]handler{
				"lower": d.float(&c.Span.Lower),
				"upper": d.float(&c.Span.Upper),
			})
		},
		"tolerance":      d.str(&c.Tolerance.Text),
		"windows":        d.windows(&c.Windows),
		"trend_model":    d.trendModel(&c.TrendModel),
		"min_readings":   d.integer(&c.MinReadings),
		"min_coverage":   d.float(&c.MinCoverage),
		"debounce":       d.integer(&c.Debounce),
		"clear_fraction": d.float(&c.ClearFraction),
		"cooldown":       d.duration(&c.Cooldown),
		"limits": func(n ast.Node, p string) {
			d.fields(n, p, map[string]handler{
				"slope":         d.rateLimit(&c.Limits.Slope),
				"curvature":     d.rateLimit(&c.Limits.Curvature),
				"doubling_time": d.durationLimit(&c.Limits.DoublingTime),
				"lead_time":     d.durationLimit(&c.Limits.LeadTime),
			})
		},
		"alarm_budget": func(n ast.Node, p string) {
			d.fields(n, p, map[string]handler{
				"false_tickets_per_year": d.float(&c.AlarmBudget.FalseTicketsPerYear),
				"alerts_per_year":        d.float(&c.AlarmBudget.AlertsPerYear),
			})
		},
		"detectors": func(n ast.Node, p string) {
			dt := &c.Detectors
			d.fields(n, p, map[string]handler{
				"step": func(n ast.Node, p string) {
					dt.Step.On = true
					d.fields(n, p, map[string]handler{
						"k":          d.float(&dt.Step.K),
						"h":          d.float(&dt.Step.H),
						"rebaseline": d.boolean(&dt.Step.Rebaseline),
					})
				},
				"flatline": func(n ast.Node, p string) {
					d.fields(n, p, map[string]handler{
						"for":        d.duration(&dt.Flatline.For),
						"min_count":  d.integer(&dt.Flatline.MinCount),
						"resolution": d.float(&dt.Flatline.Resolution),
					})
				},
				"spike": func(n ast.Node, p string) {
					d.fields(n, p, map[string]handler{
						"k":      d.float(&dt.Spike.K),
						"count":  d.integer(&dt.Spike.Count),
						"within": d.duration(&dt.Spike.Within),
					})
				},
				"silent":      d.duration(&dt.Silent),
				"out_of_span": d.boolean(&dt.OutOfSpan),
			})
		},
		"ticket_kinds": func(n ast.Node, p string) {
			before := len(d.errs)
			d.strList(&c.TicketKinds)(n, p)
			if len(d.errs) == before {
				c.HasTicketKinds = true
			}
		},
	}
}

func (d *decoder) boolean(dst *bool) handler {
	return func(raw ast.Node, p string) {
		v, ok := d.resolve(raw).(*ast.BoolNode)
		if !ok {
			n := d.resolve(raw)
			d.errAt(raw, p, text(n), ErrType, "expected true or false, found %s", typeName(n))
			return
		}
		*dst = v.Value
	}
}

func (d *decoder) trendModel(dst *TrendModel) handler {
	return func(n ast.Node, p string) {
		s, ok := d.scalarText(n, p)
		if !ok {
			return
		}
		switch s {
		case "line":
			*dst = TrendLine
		case "parabola":
			*dst = TrendParabola
		default:
			d.errAt(n, p, s, ErrRange, "must be line or parabola")
		}
	}
}

// rateLimit accepts "0.2 kPa/day" (critical only) or a mapping with
// warning and/or critical.
func (d *decoder) rateLimit(dst *RateLimit) handler {
	return func(n ast.Node, p string) {
		switch d.resolve(n).(type) {
		case *ast.MappingNode, *ast.MappingValueNode:
			d.fields(n, p, map[string]handler{
				"warning":  d.str(&dst.Warning.Text),
				"critical": d.str(&dst.Critical.Text),
			})
		default:
			d.str(&dst.Critical.Text)(n, p)
		}
	}
}

func (d *decoder) durationLimit(dst *DurationLimit) handler {
	return func(n ast.Node, p string) {
		switch d.resolve(n).(type) {
		case *ast.MappingNode, *ast.MappingValueNode:
			d.fields(n, p, map[string]handler{
				"warning":  d.duration(&dst.Warning),
				"critical": d.duration(&dst.Critical),
			})
		default:
			d.duration(&dst.Critical)(n, p)
		}
	}
}

func (d *decoder) classes(n ast.Node, path string, c *Config) {
	items, ok := d.seq(n, path)
	if !ok {
		return
	}
	c.Classes = make([]Class, len(items))
	for i, it := range items {
		cl := &c.Classes[i]
		ip := fmt.Sprintf("%s[%d]", path, i)
		d.pos[ip] = nodePos(it)
		hs := d.classFields(cl)
		hs["name"] = d.str(&cl.Name)
		hs["match"] = d.strList(&cl.Match)
		d.fields(it, ip, hs)
	}
}

func (d *decoder) sensors(n ast.Node, path string, c *Config) {
	es, ok := d.entries(n, path, 0)
	if !ok {
		return
	}
	for _, e := range es {
		s := Sensor{ID: e.key}
		ip := sensorPath(e.key)
		if _, dup := d.pos[ip]; dup {
			d.errAt(e.keyN, ip, e.key, ErrDuplicate, "sensor listed twice")
			continue
		}
		d.pos[ip] = nodePos(e.keyN)
		c.Sensors = append(c.Sensors, s)
		sp := &c.Sensors[len(c.Sensors)-1]
		hs := d.classFields(&sp.over)
		hs["class"] = d.str(&sp.Class)
		hs["group"] = d.str(&sp.Group)
		hs["as_left"] = func(n ast.Node, p string) {
			var v float64
			before := len(d.errs)
			d.float(&v)(n, p)
			if len(d.errs) == before {
				sp.AsLeft, sp.HasAsLeft = v, true
			}
		}
		d.fields(e.value, ip, hs)
	}
}

func sensorPath(id string) string { return "sensors[" + id + "]" }

func (d *decoder) groups(n ast.Node, path string, c *Config) {
	items, ok := d.seq(n, path)
	if !ok {
		return
	}
	c.Groups = make([]Group, len(items))
	for i, it := range items {
		g := &c.Groups[i]
		ip := fmt.Sprintf("%s[%d]", path, i)
		d.pos[ip] = nodePos(it)
		d.fields(it, ip, map[string]handler{
			"name":    d.str(&g.Name),
			"members": d.strList(&g.Members),
		})
	}
}
