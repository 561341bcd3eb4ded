package alert

import "driftfit/rolling"

// seFor returns the standard error of coefficient i of f that every
// evidence gate and prediction-error standardisation uses, and false when
// it cannot be trusted, in which case the window is not judged
// (ReasonSerialUnknown).
//
// Readings of a sliding window are rarely independent (process cycles,
// sensor filtering), and positive autocorrelation makes the plain
// least-squares SE too small, so gates that trust it raise more often than
// they promise: the gates use the serially corrected SE (rolling's SEAdj,
// Santer et al. 2000), and a fit whose correction could not be estimated
// (SerialErr) is not judged. The caller gives a short window the
// estimate of a longer one of the same sensor (rolling.Solution.WithSerial)
// before judging it. A fit that carries no serial information at all
// (Pairs 0: not made by rolling's Solve, such as one written out by hand)
// is judged on its plain SE.
func seFor(f *rolling.Fit, i int) (se float64, ok bool) {
	switch {
	case f.Pairs == 0:
		se = f.SE[i]
	case f.SerialErr != nil:
		return 0, false
	default:
		se = f.SEAdj[i]
	}
	return se, finite(se) && se >= 0
}

// tFor and dfFor are the critical t (97.5%) and the degrees of freedom
// that go with seFor: those of the effective sample size.
func tFor(f *rolling.Fit) float64 {
	if f.Pairs > 0 && f.SerialErr == nil && f.TCritAdj > 0 {
		return f.TCritAdj
	}
	return f.TCrit
}

func dfFor(f *rolling.Fit) int {
	if f.Pairs > 0 && f.SerialErr == nil && f.NEff > 0 {
		return max(1, int(f.NEff)-f.Model.Coefs())
	}
	return f.DF
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
