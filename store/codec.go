package store

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"time"

	"driftfit/rolling"
)

// Every stored value starts with a format byte, so an encoding can change
// without a schema bump: a reader refuses a format it does not know.
const (
	specsFormat = 1
	// recordFormat is what appendRecord writes; decodeRecord also reads
	// recordFormat1.
	recordFormat  = 2
	recordFormat1 = 1
)

// maxWindows bounds the window count of a specs value, so a corrupt
// count cannot make the decoder allocate without limit.
const maxWindows = 64

// appendSpecs encodes n window specs: format byte, uvarint count, then
// span and pane in ns as uvarints.
func appendSpecs(dst []byte, n int, spec func(int) rolling.WindowSpec) []byte {
	dst = append(dst, specsFormat)
	dst = binary.AppendUvarint(dst, uint64(n))
	for i := range n {
		ws := spec(i)
		dst = binary.AppendUvarint(dst, uint64(ws.Span))
		dst = binary.AppendUvarint(dst, uint64(ws.Pane))
	}
	return dst
}

// decodeSpecs decodes a value written by appendSpecs.
func decodeSpecs(b []byte) ([]rolling.WindowSpec, error) {
	d := decoder{b: b, what: "window specs"}
	if f := d.byte(); d.err == nil && f != specsFormat {
		return nil, d.fail("format %d", f)
	}
	n := d.uvarint()
	if d.err == nil && (n == 0 || n > maxWindows) {
		return nil, d.fail("window count %d", n)
	}
	var specs []rolling.WindowSpec
	for i := uint64(0); i < n && d.err == nil; i++ {
		span, pane := d.uvarint(), d.uvarint()
		if d.err == nil && (span == 0 || pane == 0 || span > math.MaxInt64 || pane > math.MaxInt64) {
			return nil, d.fail("window %d: span %d, pane %d", i, span, pane)
		}
		specs = append(specs, rolling.WindowSpec{Span: time.Duration(span), Pane: time.Duration(pane)})
	}
	if err := d.end(); err != nil {
		return nil, err
	}
	return specs, nil
}

// Fit error codes. The values are stored: never renumber them.
var errCodes = [...]error{
	0: nil,
	1: rolling.ErrNotEnoughData,
	2: rolling.ErrNoTimeSpread,
	3: rolling.ErrSingular,
	4: rolling.ErrConstant,
	5: rolling.ErrNumeric,
	6: rolling.ErrUnresolved,
}

func errCode(err error) (byte, bool) {
	for c, e := range errCodes {
		if err == e {
			return byte(c), true
		}
	}
	// A wrapped sentinel is stored as the sentinel: its wrapping text is
	// not kept.
	for c, e := range errCodes {
		if e != nil && errors.Is(err, e) {
			return byte(c), true
		}
	}
	return 0, false
}

// Time tags, two bits each in a flags byte.
const (
	tagZero     = 0 // time.Time{}
	tagSame     = 1 // equal (==) to the solution's time of the same name
	tagExplicit = 2 // Unix ns as a zigzag varint follows
)

// fitFloats is the count of float64 slots of a rolling.Fit record:
// Coef[3], SE[3], CI[3][2], Cov[3][3], ResidSD, R2, TCrit, Cond, then R1
// and Pairs (see fitFloatPtrs).
const fitFloats = 3 + 3 + 6 + 9 + 4 + 2

// fitFloatPtrs returns the float64 fields of f in record order and,
// last, a slot for f.Pairs, which the caller copies to and from f (see
// pairsSlot). R1 and Pairs came after the first records of format 1 were
// written: those decode with both zero, a fit whose serial correlation
// is unknown, which is what they are. The corrected standard errors
// (rolling.Fit.SEAdj and the rest) are not stored: decodeRecord rebuilds
// them from R1 and Pairs with rolling.Fit.SetSerial, as Solve made them.
func fitFloatPtrs(f *rolling.Fit) [fitFloats]*float64 {
	return [fitFloats]*float64{
		&f.Coef[0], &f.Coef[1], &f.Coef[2],
		&f.SE[0], &f.SE[1], &f.SE[2],
		&f.CI[0][0], &f.CI[0][1], &f.CI[1][0], &f.CI[1][1], &f.CI[2][0], &f.CI[2][1],
		&f.Cov[0][0], &f.Cov[0][1], &f.Cov[0][2],
		&f.Cov[1][0], &f.Cov[1][1], &f.Cov[1][2],
		&f.Cov[2][0], &f.Cov[2][1], &f.Cov[2][2],
		&f.ResidSD, &f.R2, &f.TCrit, &f.Cond,
		&f.R1, new(float64),
	}
}

// pairsSlot is the index in fitFloatPtrs of Pairs, stored as a float64
// (exact for any count below 2⁵³) so that format 1 keeps its layout;
// format 2 stores it as a uvarint.
const pairsSlot = fitFloats - 1

// appendRecord encodes a solution (everything but Window, which the key
// holds) in record format 2:
//
//	format byte
//	flags byte: First tag (bits 0–1), Last tag (bits 2–3), tagZero or tagExplicit
//	varint Panes, Filled, N; [varint First ns]; [varint Last ns]
//	three fits (Line, Parabola, Exp slots), each:
//	  model byte, error code byte,
//	  flags byte: PosDef (bit 0), First tag (bits 1–2), Last tag (bits 3–4),
//	    SE derived (bit 6), CI derived (bit 7)
//	  varint N, Excluded, DF; [varint First ns]; [varint Last ns]
//	  uint32 LE: bits 0–26 the float slots (fitFloatPtrs order) stored;
//	    bit 27: TCrit is the Line fit's, bit 28: Cond is the Line fit's
//	  then the slots stored, each a float's IEEE 754 bits, uint64 LE,
//	  except the covariance's lower half: Cov[j][i] (j > i) as the
//	  uvarint of its bits XOR those of Cov[i][j], stored when that is
//	  not zero; and Pairs, as a uvarint.
//
// A float is stored only when its bits are not zero and it does not
// follow from the others. What follows is what rolling computes
// (rolling/fit.go, finish): SE[i] = √max(Cov[i][i], 0) and CI[i] =
// Coef[i] ∓ TCrit·SE[i]; the covariance is symmetric, up to the last
// bits for a parabola, whose two halves come from different sums; the
// line and exp fits of one window share TCrit and Cond when exp excludes
// no reading. A field is left out only if recomputing it here gives the
// stored bits exactly, so every record reads back bit for bit (including
// −0 and any NaN) whatever rolling did. For a window with all three fits
// this stores 29 of the 75 floats' 600 bytes as about 250 bytes. Format
// 1 stored every non-zero float.
func appendRecord(dst []byte, sol *rolling.Solution) ([]byte, error) {
	sf, err := timeTag(sol.First, time.Time{}, false, "First")
	if err != nil {
		return dst, err
	}
	sl, err := timeTag(sol.Last, time.Time{}, false, "Last")
	if err != nil {
		return dst, err
	}
	dst = append(dst, recordFormat, sf|sl<<2)
	dst = binary.AppendVarint(dst, int64(sol.Panes))
	dst = binary.AppendVarint(dst, int64(sol.Filled))
	dst = binary.AppendVarint(dst, int64(sol.N))
	dst = appendTime(dst, sf, sol.First)
	dst = appendTime(dst, sl, sol.Last)
	for slot, f := range [3]*rolling.Fit{&sol.Line, &sol.Parabola, &sol.Exp} {
		code, ok := errCode(f.Err)
		if !ok {
			return dst, fmt.Errorf("%w: %v fit error %q is not a rolling fit error", ErrRecord, f.Model, f.Err)
		}
		ff, err := timeTag(f.First, sol.First, true, "First")
		if err != nil {
			return dst, err
		}
		fl, err := timeTag(f.Last, sol.Last, true, "Last")
		if err != nil {
			return dst, err
		}
		flags := ff<<1 | fl<<3
		if f.PosDef {
			flags |= 1
		}
		omit := derivable(f)
		flags |= omit
		dst = append(dst, byte(f.Model), code, flags)
		dst = binary.AppendVarint(dst, int64(f.N))
		dst = binary.AppendVarint(dst, int64(f.Excluded))
		dst = binary.AppendVarint(dst, int64(f.DF))
		dst = appendTime(dst, ff, f.First)
		dst = appendTime(dst, fl, f.Last)
		ptrs := fitFloatPtrs(f)
		*ptrs[pairsSlot] = float64(f.Pairs)
		var mask uint32
		for i := range ptrs {
			if storedBits(ptrs, i) != 0 && !omitted(omit, i) {
				mask |= 1 << i
			}
		}
		if slot > 0 {
			for _, c := range [...]struct {
				i   int
				bit uint32
			}{{slotTCrit, lineTCrit}, {slotCond, lineCond}} {
				if bits := math.Float64bits(*ptrs[c.i]); bits != 0 && bits == math.Float64bits(*fitFloatPtrs(&sol.Line)[c.i]) {
					mask = mask&^(1<<c.i) | c.bit
				}
			}
		}
		dst = binary.LittleEndian.AppendUint32(dst, mask)
		for i := range ptrs {
			if mask&(1<<i) == 0 {
				continue
			}
			switch {
			case i == pairsSlot:
				dst = binary.AppendUvarint(dst, uint64(f.Pairs))
			case lowerCov(i):
				dst = binary.AppendUvarint(dst, storedBits(ptrs, i))
			default:
				dst = binary.LittleEndian.AppendUint64(dst, storedBits(ptrs, i))
			}
		}
	}
	return dst, nil
}

// Fit flags of format 2 for fields left out.
const (
	omitSE = 1 << 6
	omitCI = 1 << 7
)

// Mask bits of format 2 beyond the float slots.
const (
	lineTCrit = 1 << 27
	lineCond  = 1 << 28
)

// Float slots of fitFloatPtrs.
const (
	slotSE    = 3  // SE[0..2]
	slotCI    = 6  // CI[0][0], CI[0][1], …, CI[2][1]
	slotCov   = 12 // Cov[0][0], Cov[0][1], …, Cov[2][2]
	slotTCrit = 23
	slotCond  = 24
)

// lowerCov reports whether float slot i is below the covariance's
// diagonal, and mirror gives the slot of its counterpart above it.
func lowerCov(i int) bool {
	return i >= slotCov && i < slotCov+9 && (i-slotCov)%3 < (i-slotCov)/3
}

func mirror(i int) int {
	r, c := (i-slotCov)/3, (i-slotCov)%3
	return slotCov + c*3 + r
}

// storedBits returns what format 2 stores for float slot i of a fit's
// slots ptrs: the float's bits, or for the covariance's lower half their
// XOR with the upper's, zero when the two agree.
func storedBits(ptrs [fitFloats]*float64, i int) uint64 {
	bits := math.Float64bits(*ptrs[i])
	if lowerCov(i) {
		bits ^= math.Float64bits(*ptrs[mirror(i)])
	}
	return bits
}

// omitted reports whether float slot i is left out under the omit flags.
func omitted(omit byte, i int) bool {
	return omit&omitSE != 0 && i >= slotSE && i < slotCI || omit&omitCI != 0 && i >= slotCI && i < slotCov
}

// derive recomputes, in f, the fields the omit flags say follow from
// the others.
func derive(f *rolling.Fit, omit byte) {
	if omit&omitSE != 0 {
		for i := range 3 {
			f.SE[i] = math.Sqrt(max(f.Cov[i][i], 0))
		}
	}
	if omit&omitCI != 0 {
		for i := range 3 {
			// The conversion keeps the product rounded on its own: Go may
			// otherwise fuse it into the sum (FMA) on some CPUs, and the
			// result would depend on where the record is read.
			h := float64(f.TCrit * f.SE[i])
			f.CI[i] = [2]float64{f.Coef[i] - h, f.Coef[i] + h}
		}
	}
}

// derivable returns the omit flags under which derive gives back every
// float of f bit for bit.
func derivable(f *rolling.Fit) byte {
	same := func(a, b float64) bool { return math.Float64bits(a) == math.Float64bits(b) }
	g := *f
	derive(&g, omitSE|omitCI)
	if !same(g.SE[0], f.SE[0]) || !same(g.SE[1], f.SE[1]) || !same(g.SE[2], f.SE[2]) {
		return 0
	}
	for i := range 3 {
		if !same(g.CI[i][0], f.CI[i][0]) || !same(g.CI[i][1], f.CI[i][1]) {
			return omitSE
		}
	}
	return omitSE | omitCI
}

// timeTag picks how t is stored. Times are kept as Unix ns and come back
// from time.Unix(0, ns), as rolling makes them; a time that does not
// survive that (outside 1678–2262) is refused rather than altered.
func timeTag(t, same time.Time, sameOK bool, name string) (byte, error) {
	switch {
	case t == time.Time{}:
		return tagZero, nil
	case sameOK && t == same:
		return tagSame, nil
	case !time.Unix(0, t.UnixNano()).Equal(t):
		return 0, fmt.Errorf("%w: %s %v is outside the range of int64 nanoseconds", ErrRecord, name, t)
	}
	return tagExplicit, nil
}

func appendTime(dst []byte, tag byte, t time.Time) []byte {
	if tag != tagExplicit {
		return dst
	}
	return binary.AppendVarint(dst, t.UnixNano())
}

// decodeRecord decodes a value written by appendRecord into sol, leaving
// sol.Window as it is.
func decodeRecord(b []byte, sol *rolling.Solution) error {
	d := decoder{b: b, what: "fit record"}
	format := d.byte()
	if d.err == nil && format != recordFormat && format != recordFormat1 {
		return d.fail("format %d", format)
	}
	flags := d.byte()
	if d.err == nil && flags>>4 != 0 {
		return d.fail("solution flags %#x", flags)
	}
	sol.Panes = d.int()
	sol.Filled = d.int()
	sol.N = d.int()
	sol.First = d.time(flags&3, time.Time{}, false)
	sol.Last = d.time(flags>>2&3, time.Time{}, false)
	for slot, f := range [3]*rolling.Fit{&sol.Line, &sol.Parabola, &sol.Exp} {
		*f = rolling.Fit{}
		f.Model = rolling.Model(d.byte())
		code := d.byte()
		flags := d.byte()
		if d.err != nil {
			break
		}
		if int(code) >= len(errCodes) {
			return d.fail("fit %d: error code %d", slot, code)
		}
		omit := flags &^ 0x1f
		if format == recordFormat1 && omit != 0 || omit&^(omitSE|omitCI) != 0 || omit&omitCI != 0 && omit&omitSE == 0 {
			return d.fail("fit %d: flags %#x", slot, flags)
		}
		f.Err = errCodes[code]
		f.PosDef = flags&1 != 0
		f.N = d.int()
		f.Excluded = d.int()
		f.DF = d.int()
		f.First = d.time(flags>>1&3, sol.First, true)
		f.Last = d.time(flags>>3&3, sol.Last, true)
		mask := d.uint32()
		extra := uint32(0)
		if format != recordFormat1 && slot > 0 {
			extra = lineTCrit | lineCond
		}
		if d.err == nil && mask>>fitFloats&^(extra>>fitFloats) != 0 {
			return d.fail("fit %d: float mask %#x", slot, mask)
		}
		ptrs := fitFloatPtrs(f)
		for i, p := range ptrs {
			if mask&(1<<i) == 0 {
				continue
			}
			if omitted(omit, i) {
				return d.fail("fit %d: float %d stored and left out", slot, i)
			}
			var bits uint64
			switch {
			case format != recordFormat1 && i == pairsSlot:
				n := d.uvarint()
				if d.err == nil && (n == 0 || n >= 1<<53) {
					return d.fail("fit %d: pair count %d", slot, n)
				}
				bits = math.Float64bits(float64(n))
			case format != recordFormat1 && lowerCov(i):
				bits = d.uvarint()
			default:
				bits = d.uint64()
			}
			if d.err == nil && bits == 0 {
				return d.fail("fit %d: float %d stored as zero", slot, i)
			}
			*p = math.Float64frombits(bits)
		}
		if d.err != nil {
			break
		}
		if format != recordFormat1 {
			for i := range ptrs {
				if lowerCov(i) {
					*ptrs[i] = math.Float64frombits(math.Float64bits(*ptrs[i]) ^ math.Float64bits(*ptrs[mirror(i)]))
				}
			}
			line := fitFloatPtrs(&sol.Line)
			for _, c := range [...]struct {
				i   int
				bit uint32
			}{{slotTCrit, lineTCrit}, {slotCond, lineCond}} {
				if mask&c.bit == 0 {
					continue
				}
				if mask&(1<<c.i) != 0 || math.Float64bits(*line[c.i]) == 0 {
					return d.fail("fit %d: float %d both stored and the line fit's", slot, c.i)
				}
				*ptrs[c.i] = *line[c.i]
			}
		}
		derive(f, omit)
		pairs := *ptrs[pairsSlot]
		if !(pairs >= 0 && pairs < 1<<53 && pairs == math.Trunc(pairs)) {
			return d.fail("fit %d: pair count %v", slot, pairs)
		}
		f.Pairs = int(pairs)
		f.SetSerial(f.R1, f.Pairs)
	}
	return d.end()
}

// decoder reads a value with a sticky error, so a truncated value turns
// into one ErrCorrupt however many fields follow.
type decoder struct {
	b    []byte
	what string
	err  error
}

func (d *decoder) fail(format string, args ...any) error {
	if d.err == nil {
		d.err = fmt.Errorf("%w: %s: %s", ErrCorrupt, d.what, fmt.Sprintf(format, args...))
	}
	return d.err
}

func (d *decoder) byte() byte {
	if d.err != nil {
		return 0
	}
	if len(d.b) < 1 {
		d.fail("truncated")
		return 0
	}
	v := d.b[0]
	d.b = d.b[1:]
	return v
}

func (d *decoder) uint32() uint32 {
	if d.err != nil {
		return 0
	}
	if len(d.b) < 4 {
		d.fail("truncated")
		return 0
	}
	v := binary.LittleEndian.Uint32(d.b)
	d.b = d.b[4:]
	return v
}

func (d *decoder) uint64() uint64 {
	if d.err != nil {
		return 0
	}
	if len(d.b) < 8 {
		d.fail("truncated")
		return 0
	}
	v := binary.LittleEndian.Uint64(d.b)
	d.b = d.b[8:]
	return v
}

func (d *decoder) uvarint() uint64 {
	if d.err != nil {
		return 0
	}
	v, n := binary.Uvarint(d.b)
	if n <= 0 {
		d.fail("bad uvarint")
		return 0
	}
	d.b = d.b[n:]
	return v
}

func (d *decoder) varint() int64 {
	if d.err != nil {
		return 0
	}
	v, n := binary.Varint(d.b)
	if n <= 0 {
		d.fail("bad varint")
		return 0
	}
	d.b = d.b[n:]
	return v
}

func (d *decoder) int() int {
	v := d.varint()
	if v != int64(int(v)) {
		d.fail("integer %d out of range", v)
		return 0
	}
	return int(v)
}

func (d *decoder) time(tag byte, same time.Time, sameOK bool) time.Time {
	if d.err != nil {
		return time.Time{}
	}
	switch {
	case tag == tagZero:
		return time.Time{}
	case tag == tagSame && sameOK:
		return same
	case tag == tagExplicit:
		return time.Unix(0, d.varint())
	}
	d.fail("time tag %d", tag)
	return time.Time{}
}

// end reports the sticky error, or trailing bytes.
func (d *decoder) end() error {
	if d.err == nil && len(d.b) != 0 {
		d.fail("%d trailing bytes", len(d.b))
	}
	return d.err
}
