package rolling

import (
	"errors"
	"fmt"
)

var (
	// ErrBadSpec is returned by NewSensor for a window whose span or pane
	// width is not positive, or whose span is not a whole multiple of its
	// pane width.
	ErrBadSpec = errors.New("rolling: bad window spec")

	// ErrNonFinite is returned by Sensor.Add for a NaN or infinite value.
	ErrNonFinite = errors.New("rolling: value is not finite")

	// ErrOutOfRange is returned, wrapped in a *RangeError, by Sensor.Add
	// for a value beyond ±MaxValue; nothing was stored.
	ErrOutOfRange = errors.New("rolling: value out of range")

	// ErrTooOld is returned by Sensor.Add when the reading's pane is older
	// than every window of the sensor; nothing was stored.
	ErrTooOld = errors.New("rolling: reading older than every window")

	// ErrPaneFull is returned by Sensor.Add when a pane already holds
	// the maximum count of readings (2³²−1); nothing was stored.
	ErrPaneFull = errors.New("rolling: pane holds too many readings")

	// ErrNotEnoughData is set in Fit.Err when the window holds no more
	// readings than the model has coefficients (for exp: no more positive
	// readings than coefficients).
	ErrNotEnoughData = errors.New("rolling: not enough data")

	// ErrNoTimeSpread is set in Fit.Err when every reading of the window
	// carries the same time, so no rate can be fitted.
	ErrNoTimeSpread = errors.New("rolling: all readings at one instant")

	// ErrSingular is set in Fit.Err when the normal matrix is not
	// positive definite: the readings sit at too few distinct instants
	// for the model (e.g. two instants for a parabola).
	ErrSingular = errors.New("rolling: normal matrix not positive definite")

	// ErrConstant is set in Fit.Err when every value used by the fit is
	// the same. The coefficients are still exact (level = the value, rates
	// zero) and the standard errors zero, but R² is undefined and left 0.
	ErrConstant = errors.New("rolling: all values equal")

	// ErrNumeric is set in Fit.Err when the fit's numbers leave
	// float64's range: a result overflows (values near MaxValue changing
	// within nanoseconds), or the values differ by so little (below about
	// 1e-146, as values near 1e-154 do) that their squared differences
	// fall among the subnormal numbers and lose their digits.
	ErrNumeric = errors.New("rolling: sums out of floating-point range")

	// ErrUnresolved is set in Fit.Err when the residual sum of squares is
	// below the rounding error of the sums it is computed from, so its
	// value is not known, only that it is tiny: readings on an exact
	// curve, or a change across a pane 10⁸ times the noise. The fit stays
	// usable (OK reports true) and its coefficients are as precise as
	// ever, but the residual sum is taken at its rounding bound: ResidSD,
	// SE, CI and Cov are upper bounds and R² a lower bound. It replaces a
	// residual sum clamped to zero, which claimed SE = 0 and R² = 1.
	ErrUnresolved = errors.New("rolling: residuals below rounding resolution")

	// ErrSerialUnknown is set in Fit.SerialErr when the serial correlation
	// of the residuals cannot be estimated: fewer than MinPairs pairs of
	// consecutive readings in time order, or an effective sample size of
	// no more readings than coefficients. SEAdj and CIAdj are then zero.
	ErrSerialUnknown = errors.New("rolling: serial correlation unknown")

	// ErrModel is returned for a Model value the operation does not support.
	ErrModel = errors.New("rolling: unsupported model")
)

// RangeError is the error of Sensor.Add for a value beyond ±MaxValue.
// It unwraps to ErrOutOfRange.
type RangeError struct {
	Value float64
}

func (e *RangeError) Error() string {
	return fmt.Sprintf("rolling: value out of range: %g beyond ±%g", e.Value, MaxValue)
}

func (e *RangeError) Unwrap() error { return ErrOutOfRange }
