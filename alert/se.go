package alert

import "driftfit/rolling"

// seFor returns the standard error of coefficient i of f that every
// evidence gate and prediction-error standardisation uses, and false when
// it cannot be trusted, in which case the window is not judged
// (ReasonSerialUnknown).
//
// This is the one place to switch to a serial-correlation corrected
// standard error once rolling.Fit carries one: readings of a sliding
// window are rarely independent (process cycles, sensor filtering), and
// positive autocorrelation makes the plain least-squares SE too small, so
// gates that trust it raise more often than they promise. Today it
// returns f.SE[i], valid when finite and not negative.
func seFor(f *rolling.Fit, i int) (se float64, ok bool) {
	se = f.SE[i]
	return se, finite(se) && se >= 0
}

// covScale returns the factor by which the corrected standard errors of
// f exceed the plain ones (1 today), applied to the whole covariance of
// the fitted curve, and false when seFor refuses the fit. It is derived
// from seFor of the slope (or the level for a fit with a zero slope SE),
// so seFor stays the only switch.
func covScale(f *rolling.Fit) (float64, bool) {
	i := 1
	if f.SE[1] == 0 {
		i = 0
	}
	se, ok := seFor(f, i)
	if !ok {
		return 0, false
	}
	if f.SE[i] == 0 {
		return 1, true
	}
	return se / f.SE[i], true
}
