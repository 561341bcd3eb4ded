package ingest_test

import (
	"flag"
	"math/rand/v2"
	"testing"
)

// seedFlag fixes the randomised tests; every such test logs the seed it used
// so a failure can be replayed with -seed.
var seedFlag = flag.Uint64("seed", 20260301, "seed for randomised tests")

func newRand(t testing.TB) *rand.Rand {
	t.Helper()
	t.Logf("seed %d (replay with -seed=%d)", *seedFlag, *seedFlag)
	return rand.New(rand.NewPCG(*seedFlag, 0x6472696674))
}
