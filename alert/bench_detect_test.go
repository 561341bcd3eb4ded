package alert_test

import (
	"math/rand/v2"
	"testing"
	"time"

	"driftfit/alert"
)

// BenchmarkDetectors: one update of each per-reading detector, to show
// they are O(1) and allocation-free.
func BenchmarkDetectors(b *testing.B) {
	rng := rand.New(rand.NewPCG(1, 2))
	errs := make([]float64, 1024)
	for i := range errs {
		errs[i] = rng.NormFloat64()
	}
	at := time.Date(2026, 5, 1, 0, 0, 0, 0, time.UTC)
	b.Run("step", func(b *testing.B) {
		d, _ := alert.NewStepDetector(alert.StepSettings{H: 12})
		b.ReportAllocs()
		i := 0
		for b.Loop() {
			d.Update(at, errs[i&1023], errs[i&1023])
			i++
		}
	})
	b.Run("flatline", func(b *testing.B) {
		d, _ := alert.NewFlatlineDetector(alert.FlatlineSettings{For: time.Hour, Resolution: 0.5})
		b.ReportAllocs()
		i := 0
		for b.Loop() {
			d.Update(at.Add(time.Duration(i)*time.Second), errs[i&1023])
			i++
		}
	})
	b.Run("spike", func(b *testing.B) {
		d, _ := alert.NewSpikeDetector(alert.SpikeSettings{K: 6})
		b.ReportAllocs()
		i := 0
		for b.Loop() {
			d.Update(at.Add(time.Duration(i)*time.Second), errs[i&1023])
			i++
		}
	})
}
