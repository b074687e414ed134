package modeldir

import (
	"encoding/binary"
	"math"
	"testing"

	"github.com/x448/float16"
)

// TestFiniteRawMatchesDecoded: the byte-level NaN/Inf scan agrees with
// decoding for every F16 and BF16 bit pattern and for F32 specials.
func TestFiniteRawMatchesDecoded(t *testing.T) {
	for bits := 0; bits < 1<<16; bits++ {
		raw := []byte{byte(bits), byte(bits >> 8)}
		f16 := float16.Frombits(uint16(bits)).Float32()
		if _, bad := firstNonFiniteRaw("F16", raw); bad != (math.IsNaN(float64(f16)) || math.IsInf(float64(f16), 0)) {
			t.Fatalf("F16 %#04x: raw scan says non-finite=%v, value %v", bits, bad, f16)
		}
		bf := math.Float32frombits(uint32(bits) << 16)
		if _, bad := firstNonFiniteRaw("BF16", raw); bad != (math.IsNaN(float64(bf)) || math.IsInf(float64(bf), 0)) {
			t.Fatalf("BF16 %#04x: raw scan says non-finite=%v, value %v", bits, bad, bf)
		}
	}
	for _, v := range []float32{0, 1, -1, math.MaxFloat32, -math.MaxFloat32, math.SmallestNonzeroFloat32, float32(math.Inf(1)), float32(math.Inf(-1)), float32(math.NaN())} {
		raw := make([]byte, 8)
		binary.LittleEndian.PutUint32(raw[4:], math.Float32bits(v))
		i, bad := firstNonFiniteRaw("F32", raw)
		want := math.IsNaN(float64(v)) || math.IsInf(float64(v), 0)
		if bad != want || (bad && i != 1) {
			t.Errorf("F32 %v: raw scan (%d, %v), want non-finite=%v at index 1", v, i, bad, want)
		}
	}
}

// TestVocabularyRefusesBOM: a byte-order mark would silently become part
// of the first id; the model directory refuses it as the holdout reader does.
func TestVocabularyRefusesBOM(t *testing.T) {
	_, probs := ParseVocabulary("vocabulary.txt", []byte("\xef\xbb\xbfshow-1\nshow-2\n"), 2)
	if len(probs) != 1 || probs[0] != "vocabulary.txt:1: starts with a byte-order mark" {
		t.Errorf("problems %q", probs)
	}
	if _, probs := ParseVocabulary("vocabulary.txt", []byte("show-1\nshow-2\n"), 2); len(probs) != 0 {
		t.Errorf("a clean vocabulary: %q", probs)
	}
}
