package rolling

import "errors"

var (
	// ErrBadSpec is returned by NewSensor for a window whose span or pane
	// width is not positive, or whose span is not a whole multiple of its
	// pane width.
	ErrBadSpec = errors.New("rolling: bad window spec")

	// ErrNonFinite is returned by Sensor.Add for a NaN or infinite value.
	ErrNonFinite = errors.New("rolling: value is not finite")

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

	// ErrNumeric is set in Fit.Err when the fit's numbers are not finite:
	// the sums are beyond float64's range (values near 1e150 or more).
	ErrNumeric = errors.New("rolling: sums out of floating-point range")

	// ErrModel is returned for a Model value the operation does not support.
	ErrModel = errors.New("rolling: unsupported model")
)
