package alert

import (
	"encoding/binary"
	"fmt"
	"math"
	"slices"
	"time"

	"driftfit/rolling"
)

// State encoding, version 3, little endian, fixed width so that every
// state has exactly one encoding (a decoded state re-encodes to the same
// bytes):
//
//	"DFA" 0x03
//	sensor str; asLeft f64; hasAsLeft bool; calibrated time
//	u32 machine count, each: span i64, pane i64, kind u8, state u8,
//	  sev u8, streak u32, crit u32, since time, cleared time
//	hasTicket bool, then the ticket if true
//	(version 2) serial r1 f64, pairs u32, window span i64, pane i64
//
// str is u32 length + bytes; bool is one byte 0 or 1; time is a bool
// (present) + i64 Unix nanoseconds, 0 when absent; f64 is IEEE 754 bits
// and must be finite. The ticket is every field of Ticket in declaration
// order except Caution and the fields added in version 2, FitSummary
// slices as u8 count (2 or 3) + values, the calibration as a bool + its
// three fields; then (version 2) Revision u32, AsOf time, Overdue bool,
// ExitLowerBound time, ExitCI as two times, AsFound.Interval str; then
// (version 3) u32 amendment count, each: action u8 (1 voided, 2
// corrected), at time, the calibration's time, as-found f64 and as-left
// f64, reason str.
//
// Versions 1 and 2, the same without the later fields, still decode: a
// version 1 ticket's estimates were made at Opened (AsOf), with the
// prediction interval, and a later evaluation revises it; a version 2
// ticket has no amendments.
var stateMagic = [4]byte{'D', 'F', 'A', 3}

// amendCodes are the encoded Amendment actions, by code - 1.
var amendCodes = [...]string{AmendVoided, AmendCorrected}

// MarshalBinary encodes the tracker's state (not its rule, which comes
// from configuration): the as-left value, the last calibration, every
// alert's state machine and the open ticket.
func (t *Tracker) MarshalBinary() ([]byte, error) {
	if t.hasTicket {
		for _, a := range t.ticket.Amendments {
			if !slices.Contains(amendCodes[:], a.Action) {
				return nil, fmt.Errorf("alert: sensor %s ticket %s: amendment action %q", t.sensor, t.ticket.ID, a.Action)
			}
		}
	}
	var e enc
	e.b = append(e.b, stateMagic[:]...)
	e.str(t.sensor)
	e.f64(t.asLeft)
	e.bool(t.hasAsLeft)
	e.time(t.calibrated)
	e.u32(uint32(len(t.machines)))
	for _, m := range t.machines {
		e.i64(int64(m.window.Span))
		e.i64(int64(m.window.Pane))
		e.b = append(e.b, byte(m.kind), byte(m.state), byte(m.sev))
		e.u32(m.streak)
		e.u32(m.crit)
		e.time(m.since)
		e.time(m.cleared)
	}
	e.bool(t.hasTicket)
	if t.hasTicket {
		e.ticket(&t.ticket)
	}
	e.f64(t.serialR1)
	e.u32(t.serialPairs)
	e.i64(int64(t.serialWin.Span))
	e.i64(int64(t.serialWin.Pane))
	return e.b, nil
}

// UnmarshalBinary replaces the tracker's state with one encoded by
// MarshalBinary for the same sensor; the rule is kept. Machines of
// windows no longer in the rule are kept but never evaluated. It returns
// an error wrapping ErrBadState, leaving the tracker unchanged, for
// malformed data or the state of another sensor.
func (t *Tracker) UnmarshalBinary(data []byte) error {
	d := dec{b: data}
	if len(data) < len(stateMagic) || [3]byte(data[:3]) != [3]byte(stateMagic[:3]) || data[3] < 1 || data[3] > stateMagic[3] {
		return fmt.Errorf("%w: sensor %s: not a version 1, 2 or 3 state", ErrBadState, t.sensor)
	}
	d.version = data[3]
	d.b = d.b[4:]
	var n Tracker
	n.rule, n.alpha = t.rule, t.alpha
	n.sensor = d.str()
	n.asLeft = d.f64()
	n.hasAsLeft = d.bool()
	n.calibrated = d.time()
	count := d.u32()
	const machineSize = 8 + 8 + 3 + 4 + 4 + 9 + 9
	if d.err == nil && uint64(count)*machineSize > uint64(len(d.b)) {
		d.fail("machine count %d exceeds the data", count)
	}
	if d.err == nil && count > 0 {
		n.machines = make([]machine, count)
	}
	for i := 0; d.err == nil && i < int(count); i++ {
		m := &n.machines[i]
		m.window.Span = time.Duration(d.i64())
		m.window.Pane = time.Duration(d.i64())
		m.kind = Kind(d.u8())
		m.state = State(d.u8())
		m.sev = Severity(d.u8())
		m.streak = d.u32()
		m.crit = d.u32()
		m.since = d.time()
		m.cleared = d.time()
		switch {
		case !m.kind.valid():
			d.fail("machine %d: bad kind %d", i, m.kind)
		case m.kind.PerWindow() && (m.window.Span <= 0 || m.window.Pane <= 0 || m.window.Span%m.window.Pane != 0):
			d.fail("machine %d: bad window %v/%v", i, m.window.Span, m.window.Pane)
		case !m.kind.PerWindow() && m.window != (rolling.WindowSpec{}):
			d.fail("machine %d: kind %v kept per sensor with window %v/%v", i, m.kind, m.window.Span, m.window.Pane)
		case m.state == StateUnknown || m.state > Resolved:
			d.fail("machine %d: bad state %d", i, m.state)
		case m.sev > Critical || (m.state == Firing) != (m.sev != SeverityUnknown):
			d.fail("machine %d: severity %d with state %v", i, m.sev, m.state)
		case m.crit > m.streak:
			d.fail("machine %d: critical run %d longer than run %d", i, m.crit, m.streak)
		}
		for j := range i {
			if n.machines[j].window == m.window && n.machines[j].kind == m.kind {
				d.fail("machine %d repeats machine %d", i, j)
			}
		}
	}
	n.hasTicket = d.bool()
	if n.hasTicket {
		d.ticket(&n.ticket)
	}
	if d.version >= 2 {
		n.serialR1 = d.f64()
		n.serialPairs = d.u32()
		n.serialWin.Span = time.Duration(d.i64())
		n.serialWin.Pane = time.Duration(d.i64())
		if d.err == nil && !(n.serialR1 > -1 && n.serialR1 < 1) {
			d.fail("serial r1 %v outside (-1, 1)", n.serialR1)
		}
		if d.err == nil && (n.serialPairs == 0) != (n.serialWin == rolling.WindowSpec{}) {
			d.fail("serial estimate of %d pairs on window %v/%v", n.serialPairs, n.serialWin.Span, n.serialWin.Pane)
		}
		if d.err == nil && n.serialPairs == 0 && n.serialR1 != 0 {
			d.fail("serial r1 %v without pairs", n.serialR1)
		}
	}
	if d.err == nil && len(d.b) != 0 {
		d.fail("%d bytes after the state", len(d.b))
	}
	if d.err == nil && n.sensor != t.sensor {
		d.fail("state of sensor %q", n.sensor)
	}
	if d.err != nil {
		return fmt.Errorf("%w: sensor %s: %v", ErrBadState, t.sensor, d.err)
	}
	*t = n
	return nil
}

type enc struct{ b []byte }

func (e *enc) u32(v uint32)  { e.b = binary.LittleEndian.AppendUint32(e.b, v) }
func (e *enc) i64(v int64)   { e.b = binary.LittleEndian.AppendUint64(e.b, uint64(v)) }
func (e *enc) f64(v float64) { e.b = binary.LittleEndian.AppendUint64(e.b, math.Float64bits(v)) }
func (e *enc) str(s string)  { e.u32(uint32(len(s))); e.b = append(e.b, s...) }

func (e *enc) bool(v bool) {
	if v {
		e.b = append(e.b, 1)
	} else {
		e.b = append(e.b, 0)
	}
}

func (e *enc) time(t time.Time) {
	e.bool(!t.IsZero())
	if t.IsZero() {
		e.i64(0)
	} else {
		e.i64(t.UnixNano())
	}
}

func (e *enc) floats(v []float64) {
	e.b = append(e.b, byte(len(v)))
	for _, x := range v {
		e.f64(x)
	}
}

func (e *enc) ticket(k *Ticket) {
	e.str(k.ID)
	e.str(k.Sensor)
	e.str(k.Class)
	e.time(k.Opened)
	e.b = append(e.b, byte(k.Reason), byte(k.Severity))
	e.str(k.Window)
	e.str(k.Unit)
	e.f64(k.AsLeft)
	e.f64(k.Tolerance)
	e.f64(k.Span[0])
	e.f64(k.Span[1])
	e.str(k.Crossing)
	e.str(k.Edge)
	e.time(k.Exit)
	e.time(k.EarliestExit)
	e.time(k.Due)
	e.str(k.DueBasis)
	e.f64(k.AsFound.Deviation)
	e.f64(k.AsFound.Low)
	e.f64(k.AsFound.High)
	s := &k.Evidence
	e.str(s.Model)
	e.i64(int64(s.N))
	e.time(s.First)
	e.time(s.Last)
	e.f64(s.Coverage)
	e.floats(s.Coef)
	e.floats(s.SE)
	e.b = append(e.b, byte(len(s.CI)))
	for _, c := range s.CI {
		e.f64(c[0])
		e.f64(c[1])
	}
	e.f64(s.ResidSD)
	e.f64(s.R2)
	e.f64(s.Cond)
	e.bool(k.Calibration != nil)
	if c := k.Calibration; c != nil {
		e.time(c.Time)
		e.f64(c.AsFound)
		e.f64(c.AsLeft)
	}
	e.u32(uint32(k.Revision))
	e.time(k.AsOf)
	e.bool(k.Overdue)
	e.time(k.ExitLowerBound)
	e.time(k.ExitCI[0])
	e.time(k.ExitCI[1])
	e.str(k.AsFound.Interval)
	e.u32(uint32(len(k.Amendments)))
	for _, a := range k.Amendments {
		code := byte(0)
		for i, name := range amendCodes {
			if a.Action == name {
				code = byte(i + 1)
			}
		}
		e.b = append(e.b, code)
		e.time(a.At)
		e.time(a.Calibration.Time)
		e.f64(a.Calibration.AsFound)
		e.f64(a.Calibration.AsLeft)
		e.str(a.Reason)
	}
}

// dec reads the encoding with a sticky error: after the first problem
// every read returns zero values.
type dec struct {
	b       []byte
	err     error
	version byte
}

func (d *dec) fail(format string, args ...any) {
	if d.err == nil {
		d.err = fmt.Errorf(format, args...)
	}
}

func (d *dec) take(n int) []byte {
	if d.err != nil {
		return nil
	}
	if n > len(d.b) {
		d.fail("truncated: need %d bytes, have %d", n, len(d.b))
		return nil
	}
	v := d.b[:n]
	d.b = d.b[n:]
	return v
}

func (d *dec) u8() uint8 {
	if v := d.take(1); v != nil {
		return v[0]
	}
	return 0
}

func (d *dec) u32() uint32 {
	if v := d.take(4); v != nil {
		return binary.LittleEndian.Uint32(v)
	}
	return 0
}

func (d *dec) i64() int64 {
	if v := d.take(8); v != nil {
		return int64(binary.LittleEndian.Uint64(v))
	}
	return 0
}

func (d *dec) f64() float64 {
	v := math.Float64frombits(uint64(d.i64()))
	if d.err == nil && !finite(v) {
		d.fail("non-finite number")
		return 0
	}
	return v
}

func (d *dec) str() string {
	n := d.u32()
	if d.err == nil && uint64(n) > uint64(len(d.b)) {
		d.fail("string length %d exceeds the data", n)
		return ""
	}
	return string(d.take(int(n)))
}

func (d *dec) bool() bool {
	switch v := d.u8(); v {
	case 0:
		return false
	case 1:
		return true
	default:
		d.fail("bool byte %d", v)
	}
	return false
}

func (d *dec) time() time.Time {
	ok := d.bool()
	ns := d.i64()
	if !ok {
		if ns != 0 {
			d.fail("absent time with value %d", ns)
		}
		return time.Time{}
	}
	return time.Unix(0, ns).UTC()
}

func (d *dec) floats(what string) []float64 {
	n := int(d.u8())
	if d.err == nil && n != 2 && n != 3 {
		d.fail("%s: %d coefficients", what, n)
		return nil
	}
	if d.err != nil {
		return nil
	}
	v := make([]float64, n)
	for i := range v {
		v[i] = d.f64()
	}
	return v
}

func (d *dec) ticket(k *Ticket) {
	k.ID = d.str()
	k.Sensor = d.str()
	k.Class = d.str()
	k.Opened = d.time()
	k.Reason = Kind(d.u8())
	k.Severity = Severity(d.u8())
	if d.err == nil && (!k.Reason.valid() || k.Severity == SeverityUnknown || k.Severity > Critical) {
		d.fail("ticket reason %d severity %d", k.Reason, k.Severity)
	}
	k.Window = d.str()
	k.Unit = d.str()
	k.AsLeft = d.f64()
	k.Tolerance = d.f64()
	k.Span[0] = d.f64()
	k.Span[1] = d.f64()
	k.Crossing = d.str()
	k.Edge = d.str()
	k.Exit = d.time()
	k.EarliestExit = d.time()
	k.Due = d.time()
	k.DueBasis = d.str()
	k.AsFound.Deviation = d.f64()
	k.AsFound.Low = d.f64()
	k.AsFound.High = d.f64()
	s := &k.Evidence
	s.Model = d.str()
	m, err := rolling.ParseModel(s.Model)
	if d.err == nil && (err != nil || m == rolling.Exp) {
		d.fail("ticket evidence model %q", s.Model)
	}
	s.N = int(d.i64())
	if d.err == nil && s.N < 0 {
		d.fail("ticket evidence n %d", s.N)
	}
	s.First = d.time()
	s.Last = d.time()
	s.Coverage = d.f64()
	s.Coef = d.floats("coef")
	s.SE = d.floats("se")
	n := int(d.u8())
	if d.err == nil && (n != m.Coefs() || n != len(s.Coef) || n != len(s.SE)) {
		d.fail("ticket evidence: %d intervals for %d coefficients and %d errors", n, len(s.Coef), len(s.SE))
	}
	if d.err == nil {
		s.CI = make([][2]float64, n)
		for i := range s.CI {
			s.CI[i] = [2]float64{d.f64(), d.f64()}
		}
	}
	s.ResidSD = d.f64()
	s.R2 = d.f64()
	s.Cond = d.f64()
	if d.bool() {
		k.Calibration = &Calibration{Time: d.time(), AsFound: d.f64(), AsLeft: d.f64()}
	}
	k.Caution = Caution
	if d.version < 2 {
		k.AsOf, k.AsFound.Interval = k.Opened, PredictionInterval
		return
	}
	rev := d.u32()
	if d.err == nil && rev > math.MaxInt32 {
		d.fail("ticket revision %d", rev)
	}
	k.Revision = int(rev)
	k.AsOf = d.time()
	k.Overdue = d.bool()
	k.ExitLowerBound = d.time()
	k.ExitCI[0] = d.time()
	k.ExitCI[1] = d.time()
	k.AsFound.Interval = d.str()
	if d.version < 3 {
		return
	}
	n = int(d.u32())
	const amendSize = 1 + 9 + 9 + 8 + 8 + 4
	if d.err == nil && uint64(n)*amendSize > uint64(len(d.b)) {
		d.fail("amendment count %d exceeds the data", n)
	}
	if d.err != nil || n == 0 {
		return
	}
	k.Amendments = make([]Amendment, n)
	for i := 0; d.err == nil && i < n; i++ {
		a := &k.Amendments[i]
		code := d.u8()
		if d.err == nil && (code == 0 || int(code) > len(amendCodes)) {
			d.fail("amendment %d: action %d", i, code)
			return
		}
		a.Action = amendCodes[max(code, 1)-1]
		a.At = d.time()
		a.Calibration = Calibration{Time: d.time(), AsFound: d.f64(), AsLeft: d.f64()}
		a.Reason = d.str()
		if d.err == nil && (a.At.IsZero() || a.Calibration.Time.IsZero()) {
			d.fail("amendment %d without a time", i)
		}
	}
}
