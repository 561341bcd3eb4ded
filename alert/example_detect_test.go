package alert_test

import (
	"fmt"
	"time"

	"driftfit/alert"
)

// A level that shifts by two standard deviations after ten quiet
// updates: errors of exactly 0, then 2 (raw error 1.0 in a unit whose
// prediction SE is 0.5). With K 0.5 the upper CUSUM grows by 1.5 an
// update and passes H 4 on the third, dating the step at its first
// update and sizing it at the mean raw error since, 1.0. (It then
// restarts; errors against a fit that has not yet absorbed the step
// would signal again three updates later.)
func ExampleStepDetector() {
	d, err := alert.NewStepDetector(alert.StepSettings{K: 0.5, H: 4})
	if err != nil {
		panic(err)
	}
	start := time.Date(2026, 5, 1, 0, 0, 0, 0, time.UTC)
	for i := range 20 {
		z := 0.0
		if i >= 10 {
			z = 2
		}
		at := start.Add(time.Duration(i) * time.Hour)
		if r := d.Update(at, z, z/2); r.Signal {
			fmt.Printf("step up %v at update %d, since %s, size %.1f over %d updates\n",
				r.Up, i, r.Since.Format("15:04"), r.Size, r.Updates)
			break
		}
	}
	// Output:
	// step up true at update 12, since 10:00, size 1.0 over 3 updates
}

// Three transmitters on one header; the third reads 0.8 kPa high in
// every bucket. The reference is the median of all three, so the two
// healthy members keep deviations near zero and only the third stands
// out; once its deviation fit breaches and theirs do not, Attribute
// names it alone.
func ExampleAttribute() {
	devs, err := alert.PeerDeviations(nil, []float64{100.1, 99.9, 100.8}, []bool{true, true, true}, nil)
	if err != nil {
		panic(err)
	}
	for i, d := range devs {
		fmt.Printf("member %d deviation %+.1f\n", i, d.Value)
	}
	ev := []alert.PeerEvidence{
		{Judged: true, InReference: true},
		{Judged: true, InReference: true},
		{Judged: true, Breach: true, InReference: true},
	}
	fmt.Println(alert.Attribute(nil, ev))
	// Output:
	// member 0 deviation +0.0
	// member 1 deviation -0.2
	// member 2 deviation +0.7
	// [agrees agrees attributed]
}
