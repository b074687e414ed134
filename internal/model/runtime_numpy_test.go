package model

import (
	"encoding/binary"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"testing"
)

// debianPython is the interpreter that sees Debian's numpy 1.24 and scipy
// 1.10 (another python3 may come first on PATH without them).
const debianPython = "/usr/bin/python3"

// requirePython returns the Debian python if it can import the modules;
// otherwise the test fails when CI is set and is skipped when it is not.
func requirePython(t testing.TB, modules ...string) string {
	t.Helper()
	code := "import " + modules[0]
	for _, m := range modules[1:] {
		code += ", " + m
	}
	if out, err := exec.Command(debianPython, "-c", code).CombinedOutput(); err != nil {
		msg := fmt.Sprintf("%s cannot import %v: %v %s", debianPython, modules, err, out)
		if os.Getenv("CI") != "" {
			t.Fatal(msg)
		}
		t.Skip(msg)
	}
	return debianPython
}

func writeRaw(t testing.TB, path string, data any) {
	t.Helper()
	f, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	if err := binary.Write(f, binary.LittleEndian, data); err != nil {
		t.Fatal(err)
	}
	if err := f.Close(); err != nil {
		t.Fatal(err)
	}
}

func readF64(t testing.TB, path string) []float64 {
	t.Helper()
	raw, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	out := make([]float64, len(raw)/8)
	for i := range out {
		out[i] = math.Float64frombits(binary.LittleEndian.Uint64(raw[8*i:]))
	}
	return out
}

type refModel struct {
	Spec    *Spec             `json:"spec"`
	Weights map[string]string `json:"weights"`
}

type refBatch struct {
	Rows    int               `json:"rows"`
	Indptr  string            `json:"indptr"`
	Indices string            `json:"indices"`
	Values  string            `json:"values"`
	Dense   map[string]string `json:"dense"`
}

type refRun struct {
	Model   refModel  `json:"model"`
	Encoder *refModel `json:"encoder,omitempty"`
	Batch   refBatch  `json:"batch"`
	Layers  []string  `json:"layers"`
	ReconAt bool      `json:"recon_at"`
	Out     string    `json:"out"`

	net *Net
	b   *Batch
}

// TestRuntimeMatchesNumpy compares every layer of random encoders, scorers
// (encoder by reference and embedded) on batches with empty rows, repeated
// indices, zero values and the unknown bucket against an independent numpy
// implementation (testdata/forward_ref.py, Debian numpy 1.24).
//
// Rule: |go − numpy| ≤ 1e-5 · mag, where mag is the forward error scale the
// script computes — the forward pass on absolute values, after the standard
// dot-product error bound |fl(x·y) − x·y| ≤ γₙ |x|·|y| (Higham, Accuracy and
// Stability of Numerical Algorithms, 2nd ed., §3.1). A plain relative error
// is meaningless for hidden units whose value cancels to near zero.
func TestRuntimeMatchesNumpy(t *testing.T) {
	py := requirePython(t, "numpy")
	dir := t.TempDir()
	var runs []*refRun
	files := 0
	writeModel := func(m *modelBuilder) refModel {
		rm := refModel{Spec: m.spec, Weights: map[string]string{}}
		for name, v := range m.w {
			files++
			f := fmt.Sprintf("t%d.f32", files)
			writeRaw(t, filepath.Join(dir, f), v)
			rm.Weights[name] = f
		}
		return rm
	}
	writeBatch := func(b *Batch) refBatch {
		files++
		rb := refBatch{Rows: b.Rows(), Dense: map[string]string{},
			Indptr: fmt.Sprintf("b%d.indptr", files), Indices: fmt.Sprintf("b%d.indices", files), Values: fmt.Sprintf("b%d.values", files)}
		writeRaw(t, filepath.Join(dir, rb.Indptr), b.Indptr)
		writeRaw(t, filepath.Join(dir, rb.Indices), b.Indices)
		writeRaw(t, filepath.Join(dir, rb.Values), b.Values)
		for k, m := range b.Dense {
			f := fmt.Sprintf("b%d.%s", files, k)
			writeRaw(t, filepath.Join(dir, f), m)
			rb.Dense[k] = f
		}
		return rb
	}
	stats := map[string]int{}
	for i, o := range standardCases() {
		tc := randomCase(uint64(1000+i), o)
		enc, sc, em := allNets(t, tc)
		b := tc.batch
		rb := writeBatch(b)
		for r := 0; r < b.Rows(); r++ {
			n := b.Indptr[r+1] - b.Indptr[r]
			seen := map[int32]bool{}
			for p := b.Indptr[r]; p < b.Indptr[r+1]; p++ {
				if seen[b.Indices[p]] {
					stats["rows with a repeated index"]++
					break
				}
				seen[b.Indices[p]] = true
			}
			if n == 0 {
				stats["empty rows"]++
			}
			if o.unknown == UnknownBucket && seen[int32(o.vocab)] {
				stats["rows with the unknown bucket"]++
			}
		}
		em0 := writeModel(tc.encoder)
		runs = append(runs,
			&refRun{Model: em0, Batch: rb, Layers: enc.Layers(), ReconAt: true, Out: fmt.Sprintf("c%d.encoder", i), net: enc, b: b},
			&refRun{Model: writeModel(tc.scorer), Encoder: &em0, Batch: rb, Layers: sc.Layers(), Out: fmt.Sprintf("c%d.scorer", i), net: sc, b: b},
			&refRun{Model: writeModel(tc.embedded), Batch: rb, Layers: em.Layers(), Out: fmt.Sprintf("c%d.embedded", i), net: em, b: b},
		)
	}
	for _, k := range []string{"empty rows", "rows with a repeated index", "rows with the unknown bucket"} {
		if stats[k] == 0 {
			t.Fatalf("the random batches have no %s", k)
		}
	}
	js, err := json.Marshal(runs)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(dir, "cases.json"), js, 0o644); err != nil {
		t.Fatal(err)
	}
	if out, err := exec.Command(py, filepath.Join("testdata", "forward_ref.py"), dir).CombinedOutput(); err != nil {
		t.Fatalf("forward_ref.py: %v\n%s", err, out)
	}

	worst := 0.0
	compare := func(what string, got []float32, ref, mag []float64) {
		t.Helper()
		if len(got) != len(ref) || len(got) != len(mag) {
			t.Fatalf("%s: %d values, numpy %d (scale %d)", what, len(got), len(ref), len(mag))
		}
		bad := 0
		for i := range got {
			d := math.Abs(float64(got[i]) - ref[i])
			if mag[i] > 0 {
				worst = max(worst, d/mag[i])
			}
			if !(d <= 1e-5*mag[i]) {
				if bad++; bad <= 5 {
					t.Errorf("%s[%d]: go %v, numpy %v (error scale %g)", what, i, got[i], ref[i], mag[i])
				}
			}
		}
	}
	for _, run := range runs {
		r := run.net.NewRunner(2)
		r.SetTileRows(8)
		for k, layer := range run.Layers {
			got, err := r.Run(run.b, layer, nil)
			if err != nil {
				t.Fatalf("%s %s: %v", run.Out, layer, err)
			}
			base := filepath.Join(dir, fmt.Sprintf("%s.%d", run.Out, k))
			compare(run.Out+" "+layer, got, readF64(t, base+".ref.f64"), readF64(t, base+".mag.f64"))
		}
		if run.ReconAt {
			got, err := r.ReconstructionAt(run.b, nil)
			if err != nil {
				t.Fatal(err)
			}
			base := filepath.Join(dir, run.Out+".at")
			compare(run.Out+" reconstruction at nonzeros", got, readF64(t, base+".ref.f64"), readF64(t, base+".mag.f64"))
		}
		r.Close()
	}
	t.Logf("%d runs; largest |go − numpy| / error scale: %.3g (limit 1e-5); batches: %v", len(runs), worst, stats)
}
