package rolling

import "fmt"

// Model names one of the fitted curves.
type Model uint8

const (
	// ModelUnknown is the zero Model.
	ModelUnknown Model = iota
	// Line is y ≈ c0 + c1·τ: c0 the level now, c1 the drift rate per day.
	Line
	// Parabola is y ≈ c0 + c1·τ + c2·τ²: c1 the slope now (per day), c2
	// the curvature per day² (the slope changes by 2·c2 per day).
	Parabola
	// Exp is ln y ≈ c0 + c1·τ over the readings with y > 0: c1 the growth
	// rate per day, ln 2/c1 the doubling (or, for c1 < 0, halving) time.
	Exp
)

// Models lists the fitted models in report order.
var Models = [...]Model{Line, Parabola, Exp}

func (m Model) String() string {
	switch m {
	case Line:
		return "line"
	case Parabola:
		return "parabola"
	case Exp:
		return "exp"
	}
	return "unknown"
}

// Coefs returns the count of coefficients of the model.
func (m Model) Coefs() int {
	if m == Parabola {
		return 3
	}
	return 2
}

// ParseModel parses the name printed by String.
func ParseModel(s string) (Model, error) {
	for _, m := range Models {
		if s == m.String() {
			return m, nil
		}
	}
	return ModelUnknown, fmt.Errorf("%w: %q (want line, parabola or exp)", ErrModel, s)
}
