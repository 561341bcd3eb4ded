package chart

import (
	"image/color"
	"strconv"
)

// Okabe–Ito colours (Okabe and Ito, "Color Universal Design", 2008),
// distinguishable with the common colour-vision deficiencies, as CSS
// hex strings.
const (
	Black         = "#000000"
	Orange        = "#E69F00"
	SkyBlue       = "#56B4E9"
	BluishGreen   = "#009E73"
	Yellow        = "#F0E442"
	Blue          = "#0072B2"
	Vermillion    = "#D55E00"
	ReddishPurple = "#CC79A7"
)

// The meaning of each colour, the same in every picture.
const (
	WarningColour     = Orange
	CriticalColour    = Vermillion
	ToleranceColour   = BluishGreen
	TicketColour      = Blue
	CalibrationColour = BluishGreen
)

// WindowColours colour the windows of a sensor in order, shortest span
// first.
var WindowColours = []string{Blue, Orange, ReddishPurple, BluishGreen, SkyBlue, Vermillion}

// RGBA returns the opaque colour of a "#RRGGBB" string; black for any
// other string.
func RGBA(hex string) color.RGBA {
	if len(hex) != 7 || hex[0] != '#' {
		return color.RGBA{A: 0xff}
	}
	v, err := strconv.ParseUint(hex[1:], 16, 32)
	if err != nil {
		return color.RGBA{A: 0xff}
	}
	return color.RGBA{R: uint8(v >> 16), G: uint8(v >> 8), B: uint8(v), A: 0xff}
}

// Tint returns hex mixed with white, f of the colour and 1 − f of
// white: an opaque fill that looks the same in PNG and SVG and leaves a
// grid drawn over it visible.
func Tint(hex string, f float64) color.RGBA {
	c := RGBA(hex)
	mix := func(v uint8) uint8 { return uint8(float64(v)*f + 255*(1-f) + 0.5) }
	return color.RGBA{R: mix(c.R), G: mix(c.G), B: mix(c.B), A: 0xff}
}
