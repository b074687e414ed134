package checks

import (
	"math"
	"math/rand/v2"
	"testing"

	"github.com/modelgate/modelgate/internal/model"
)

// TestReconTargetsMatchMapMerge: reconTargets gives, bit for bit, the
// targets of merging each row's pairs in a map in file order (how they
// were built before), on random rows with repeated indices (the unknown
// bucket among them), zeros and -0, under every duplicates rule and
// transform.
func TestReconTargetsMatchMapMerge(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 8))
	const vocab = 9
	for _, dup := range []string{model.DuplicatesSum, model.DuplicatesMax} {
		for _, tr := range []string{model.TransformIdentity, model.TransformLog1p, model.TransformBinary} {
			in := model.SparseInput{Name: "episodes", VocabularySize: vocab, Unknown: model.UnknownBucket, Transform: tr, Duplicates: dup}
			width := in.Rows()
			b := &model.Batch{Indptr: []int32{0}}
			for range 300 {
				for range rng.IntN(12) {
					b.Indices = append(b.Indices, int32(rng.IntN(width)))
					v := []float32{0, float32(math.Copysign(0, -1)), 0.1, 0.25, 0.7, 1, 2, 3.5}[rng.IntN(8)]
					b.Values = append(b.Values, v)
				}
				b.Indptr = append(b.Indptr, int32(len(b.Indices)))
			}
			got := make([]float32, b.Rows()*width)
			reconTargets(b, in, width, got)
			want := make([]float32, b.Rows()*width)
			for i := 0; i < b.Rows(); i++ {
				merged := map[int32]float64{}
				for p := b.Indptr[i]; p < b.Indptr[i+1]; p++ {
					idx, v := b.Indices[p], float64(b.Values[p])
					if old, ok := merged[idx]; ok && dup == model.DuplicatesMax && idx != int32(vocab) {
						merged[idx] = math.Max(old, v)
					} else {
						merged[idx] = old + v
					}
				}
				for idx, v := range merged {
					switch tr {
					case model.TransformLog1p:
						v = math.Log1p(v)
					case model.TransformBinary:
						if v > 0 {
							v = 1
						}
					}
					want[i*width+int(idx)] = float32(math.Min(v, 1))
				}
			}
			for k := range want {
				if math.Float32bits(got[k]) != math.Float32bits(want[k]) {
					t.Fatalf("%s/%s: row %d index %d: %v, the map merge gives %v", dup, tr, k/width, k%width, got[k], want[k])
				}
			}
		}
	}
}
