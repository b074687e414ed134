package stats

import (
	"bytes"
	"encoding"
	"math"
	"testing"
)

// Accumulators that travel as bytes must merge exactly as the originals.
func TestEncodeRoundTrip(t *testing.T) {
	r := makeScored(31, 5000)
	b, a := NewBinary(), mustPaired(t, 4, 25)
	feed(t, r, 0, 2500, 500, false, b, a)
	b2, a2 := NewBinary(), mustPaired(t, 4, 25)
	feed(t, r, 2500, 5000, 500, false, b2, a2)

	// Ship shard 2 as bytes, decode into zero values, merge.
	var gotB Binary
	var gotA Paired
	roundTrip(t, b2, &gotB)
	roundTrip(t, a2, &gotA)
	viaBytes, viaBytesA := NewBinary(), mustPaired(t, 4, 25)
	viaBytes.Merge(b)
	viaBytes.Merge(&gotB)
	_ = viaBytesA.Merge(a)
	if err := viaBytesA.Merge(&gotA); err != nil {
		t.Fatal(err)
	}
	b.Merge(b2)
	_ = a.Merge(a2)
	auc1, _ := b.AUC()
	auc2, _ := viaBytes.AUC()
	if b.LogLoss() != viaBytes.LogLoss() || b.ECE() != viaBytes.ECE() || auc1 != auc2 || b.Rows() != viaBytes.Rows() {
		t.Error("Binary merged through bytes differs")
	}
	r1, _ := a.NonInferiority(0.001, 0.95)
	r2, _ := viaBytesA.NonInferiority(0.001, 0.95)
	if r1 != r2 {
		t.Errorf("Paired merged through bytes: %+v, want %+v", r2, r1)
	}

	rc, _ := NewRecon(0.3, nil)
	_, _ = rc.AddRow([]float32{.2, .9, .1}, []float32{0, 1, .5})
	var gotR Recon
	roundTrip(t, rc, &gotR)
	if gotR.Reconstruction() != rc.Reconstruction() || gotR.BCENonzero() != rc.BCENonzero() || gotR.Alpha() != 0.3 {
		t.Error("Recon differs after a round trip")
	}
	h, _ := NewHistogram(-1, 1, 7)
	_ = h.AddBatch([]float64{-3, -0.2, 0.4, 0.4, 2}, nil)
	var gotH Histogram
	roundTrip(t, h, &gotH)
	if gotH.Total() != 5 || gotH.Counts[4] != 2 || gotH.Under != 1 {
		t.Errorf("histogram after a round trip: %+v", gotH)
	}
}

type codec interface {
	encoding.BinaryMarshaler
	encoding.BinaryUnmarshaler
}

// roundTrip encodes from, decodes into to, and checks that encoding to
// gives the same bytes.
func roundTrip(t *testing.T, from, to codec) {
	t.Helper()
	data, err := from.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	if err := to.UnmarshalBinary(data); err != nil {
		t.Fatal(err)
	}
	again, _ := to.MarshalBinary()
	if !bytes.Equal(again, data) {
		t.Error("encoding is not canonical")
	}
}

func TestDecodeRefusesDamage(t *testing.T) {
	a := mustPaired(t, 1, 3)
	_ = a.AddBatch([]int64{1, 2, 3}, []float64{0.1, -0.2, 0.05}, nil)
	good, _ := a.MarshalBinary()
	nan := append([]byte(nil), good...)
	copy(nan[len(nan)-8:], []byte{0, 0, 0, 0, 0, 0, 0xf8, 0x7f}) // a NaN in the last sum
	wrongKind := append([]byte(nil), good...)
	wrongKind[len(magic)+1] = 'B'
	wrongVersion := append([]byte(nil), good...)
	wrongVersion[len(magic)] = 9
	for name, data := range map[string][]byte{
		"empty": nil, "truncated": good[:len(good)-1], "trailing": append(append([]byte(nil), good...), 0),
		"NaN": nan, "kind": wrongKind, "version": wrongVersion, "magic": []byte("nonsense-bytes"),
	} {
		before, _ := a.MarshalBinary()
		if err := a.UnmarshalBinary(data); err == nil {
			t.Errorf("%s: accepted", name)
		}
		if after, _ := a.MarshalBinary(); !bytes.Equal(before, after) {
			t.Errorf("%s: a refused decode changed the receiver", name)
		}
	}
	var b Binary
	if err := b.UnmarshalBinary(good); err == nil {
		t.Error("Binary decoded Paired bytes")
	}
	if math.IsNaN(a.Mean()) {
		t.Error("receiver damaged")
	}
}

// FuzzUnmarshal: no input makes a decoder panic, and whatever decodes
// encodes back to the same bytes.
func FuzzUnmarshal(f *testing.F) {
	b := NewBinary()
	_ = b.AddBatch([]float32{0.1, 0.9, 0.5}, []float32{0, 1, 1}, []float32{1, 2, 0.5})
	a, _ := NewPaired(7, 3)
	_ = a.AddBatch([]int64{4, 5}, []float64{0.25, -0.5}, nil)
	r, _ := NewRecon(0.5, nil)
	_, _ = r.AddRow([]float32{0.3, 0.6}, []float32{1, 0})
	h, _ := NewHistogram(0, 1, 3)
	_ = h.Add(0.5, 2)
	for _, c := range []codec{b, a, r, h} {
		data, _ := c.MarshalBinary()
		f.Add(data)
	}
	f.Add([]byte("mgstat\x01B"))
	f.Fuzz(func(t *testing.T, data []byte) {
		for _, c := range []codec{&Binary{}, &Paired{}, &Recon{}, &Histogram{}} {
			if err := c.UnmarshalBinary(data); err != nil {
				continue
			}
			again, err := c.MarshalBinary()
			if err != nil || !bytes.Equal(again, data) {
				t.Fatalf("%T: decoded %d bytes, encodes to %d bytes (%v)", c, len(data), len(again), err)
			}
		}
	})
}
