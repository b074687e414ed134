package stats

import "math/rand"

// newTestRand returns a deterministic source for test data.
func newTestRand(seed int64) *rand.Rand { return rand.New(rand.NewSource(seed)) }
