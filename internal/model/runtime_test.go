package model

import (
	"errors"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/errkind"
)

// handModel is small enough to compute by hand. Sparse input: vocabulary 3
// plus the unknown bucket (index 3), so 4 weight rows.
//
//	encoder: code = relu(x·W1 + b1), W1 = [[1,0],[0,1],[1,1],[-1,2]], b1 = [0.5,-1]
//	         recon = code·W1ᵀ + bd, bd = [0,0,0,1]
//	scorer:  joined = concat(encoder/code, f)     (f: one dense feature)
//	         out = joined·[[1],[2],[-1]]          (no bias)
//	         p = sigmoid(2·out − 7)
func handModel(t *testing.T, transform, duplicates string) (*Net, *Net) {
	t.Helper()
	sp := SparseInput{Name: "plays", VocabularySize: 3, Unknown: UnknownBucket, Transform: transform, Duplicates: duplicates, Vocabulary: "v.txt"}
	enc := newModel(KindEncoder, "enc", sp).
		tensor("W1", "encoder", []int{4, 2}, []float32{1, 0, 0, 1, 1, 1, -1, 2}).
		tensor("b1", "encoder", []int{2}, []float32{0.5, -1}).
		tensor("bd", "decoder", []int{4}, []float32{0, 0, 0, 1}).
		layer(Layer{Name: "code", Op: OpSparseDense, Input: "plays", Weight: "W1", Bias: "b1", Activation: ActReLU}).
		layer(Layer{Name: "recon", Op: OpTiedDecoder, Input: "code", TiedTo: "W1", Bias: "bd"})
	enc.spec.Code, enc.spec.Output, enc.spec.Reconstruction = "code", "code", "recon"
	sc := newModel(KindScorer, "sc", sp).dense("f", 1).
		tensor("W2", "head", []int{3, 1}, []float32{1, 2, -1}).
		tensor("W3", "head", []int{1, 1}, []float32{2}).
		tensor("b3", "head", []int{1}, []float32{-7}).
		layer(Layer{Name: "joined", Op: OpConcat, Inputs: []string{"encoder/code", "f"}}).
		layer(Layer{Name: "out", Op: OpDense, Input: "joined", Weight: "W2"}).
		layer(Layer{Name: "p", Op: OpDense, Input: "out", Weight: "W3", Bias: "b3", Activation: ActSigmoid})
	sc.spec.Output = "p"
	sc.spec.Encoder = &EncoderRef{Digest: "sha256:" + strings.Repeat("a", 64), Output: "code"}
	return mustCompile(t, enc.spec, enc.w, nil), mustCompile(t, sc.spec, sc.w, &Encoder{Spec: enc.spec, Weights: enc.w})
}

// handBatch: row 0 has index 0 twice (values 2 and 1) and index 2 once
// (value 1); row 1 is empty; row 2 has the unknown bucket (3) twice, values
// 1 and 0.5. Dense feature f = 1, 2, 0.
func handBatch() *Batch {
	return batchOf([][]pair{{{0, 2}, {2, 1}, {0, 1}}, nil, {{3, 1}, {3, 0.5}}},
		map[string][]float32{"f": {1, 2, 0}})
}

func TestRuntimeHandComputed(t *testing.T) {
	// Worked by hand from handModel and handBatch; sigmoid values are
	// 1/(1+e^-z) at the integer points z = 0, -10, 1, -2, -4, -3.
	cases := []struct {
		transform, duplicates string
		code                  []float32 // rows × 2
		out                   []float64
		p                     []float64 // NaN: not checked
	}{
		// sum: row 0 x = [3,0,1,0] → code relu([3+1+.5, 1-1]) = [4.5, 0],
		// out = 4.5 − 1 = 3.5, p = σ(0). Row 1: code relu(b1) = [.5, 0],
		// out = .5 − 2 = −1.5, p = σ(−10). Row 2: bucket 1.5 → code
		// relu(1.5·[−1,2] + b1) = [0, 2], out = 4, p = σ(1).
		{TransformIdentity, DuplicatesSum, []float32{4.5, 0, 0.5, 0, 0, 2}, []float64{3.5, -1.5, 4},
			[]float64{0.5, 4.5397868702434395e-05, 0.7310585786300049}},
		// max: row 0 x0 = max(2,1) = 2 → code [3.5, 0], out 2.5, p = σ(−2);
		// the bucket is still summed, so row 2 is as above.
		{TransformIdentity, DuplicatesMax, []float32{3.5, 0, 0.5, 0, 0, 2}, []float64{2.5, -1.5, 4},
			[]float64{0.11920292202211755, 4.5397868702434395e-05, 0.7310585786300049}},
		// binary: row 0 x = [1,0,1,0] → code [2.5, 0], out 1.5, p = σ(−4);
		// row 2 bucket 1 → code relu([−.5, 1]) = [0, 1], out 2, p = σ(−3).
		{TransformBinary, DuplicatesSum, []float32{2.5, 0, 0.5, 0, 0, 1}, []float64{1.5, -1.5, 2},
			[]float64{0.01798620996209156, 4.5397868702434395e-05, 0.04742587317756678}},
		// log1p: row 0 x = [ln 4, 0, ln 2, 0] → code [ln 8 + .5, 0],
		// out = ln 8 − .5; row 2 bucket ln 2.5 → code [0, 2 ln 2.5 − 1],
		// out = 4 ln 2.5 − 2.
		{TransformLog1p, DuplicatesSum,
			[]float32{float32(math.Log(8) + 0.5), 0, 0.5, 0, 0, float32(2*math.Log(2.5) - 1)},
			[]float64{math.Log(8) - 0.5, -1.5, 4*math.Log(2.5) - 2}, nil},
	}
	for _, c := range cases {
		t.Run(c.transform+"/"+c.duplicates, func(t *testing.T) {
			enc, sc := handModel(t, c.transform, c.duplicates)
			r := sc.NewRunner(1)
			defer r.Close()
			b := handBatch()
			code, err := r.Run(b, "encoder/code", nil)
			if err != nil {
				t.Fatal(err)
			}
			closeAll(t, "code", code, f64(c.code), 1e-6)
			out, err := r.Run(b, "out", nil)
			if err != nil {
				t.Fatal(err)
			}
			closeAll(t, "out", out, c.out, 1e-6)
			if c.p != nil {
				p, err := r.Run(b, "p", nil)
				if err != nil {
					t.Fatal(err)
				}
				closeAll(t, "p", p, c.p, 1e-6)
			}
			// The encoder alone gives the same code, bit for bit.
			er := enc.NewRunner(1)
			defer er.Close()
			code2, err := er.Run(b, "code", nil)
			if err != nil {
				t.Fatal(err)
			}
			if !slices.Equal(code, code2) {
				t.Errorf("encoder code %v, scorer's encoder/code %v", code2, code)
			}
		})
	}
}

func TestRuntimeReconstructionHand(t *testing.T) {
	// recon_j = code·W1[j] + bd_j (by hand, sum rule):
	// row 0 code [4.5,0] → [4.5, 0, 4.5, −3.5]; row 1 [.5,0] → [.5, 0, .5, .5];
	// row 2 [0,2] → [0, 2, 2, 5].
	enc, _ := handModel(t, TransformIdentity, DuplicatesSum)
	r := enc.NewRunner(2)
	defer r.Close()
	b := handBatch()
	full, err := r.Run(b, "recon", nil)
	if err != nil {
		t.Fatal(err)
	}
	closeAll(t, "recon", full, []float64{4.5, 0, 4.5, -3.5, 0.5, 0, 0.5, 0.5, 0, 2, 2, 5}, 0)
	at, err := r.ReconstructionAt(b, nil)
	if err != nil {
		t.Fatal(err)
	}
	// Stored pairs in CSR order: (0,0) (0,2) (0,0) (2,3) (2,3).
	closeAll(t, "recon at", at, []float64{4.5, 4.5, 4.5, 5, 5}, 0)
}

// closeAll fails unless got[i] is within rel·max(|want[i]|, 1) of want[i].
func closeAll(t *testing.T, what string, got []float32, want []float64, rel float64) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("%s: %d values, want %d", what, len(got), len(want))
	}
	for i := range got {
		if d := math.Abs(float64(got[i]) - want[i]); d > rel*max(math.Abs(want[i]), 1) {
			t.Errorf("%s[%d] = %v, want %v", what, i, got[i], want[i])
		}
	}
}

func f64(v []float32) []float64 {
	out := make([]float64, len(v))
	for i, x := range v {
		out[i] = float64(x)
	}
	return out
}

func TestRuntimeNetInfo(t *testing.T) {
	tc := randomCase(1, standardCases()[0])
	sc := mustCompile(t, tc.scorer.spec, tc.scorer.w, &Encoder{Spec: tc.encoder.spec, Weights: tc.encoder.w})
	want := []string{"encoder/h1", "encoder/code", "encoder/dec_h", "encoder/recon", "wide", "joined", "hidden", "p"}
	if got := sc.Layers(); !slices.Equal(got, want) {
		t.Errorf("Layers() = %v, want %v", got, want)
	}
	o := tc.opts
	for name, w := range map[string]int{"encoder/h1": o.hidden, "encoder/code": o.code, "encoder/recon": o.vocab + 1,
		"joined": o.code + 5 + 4 + 3, "p": 1, "nope": 0} {
		if got := sc.Width(name); got != w {
			t.Errorf("Width(%q) = %d, want %d", name, got, w)
		}
	}
	if d := sc.Dropout(); len(d) != 1 || d[0].Layer != "encoder/code" {
		t.Errorf("Dropout() = %v, want the encoder's dropout on encoder/code", d)
	}
	if sc.Output() != "p" || sc.Reconstruction() != "" {
		t.Errorf("Output %q Reconstruction %q", sc.Output(), sc.Reconstruction())
	}
}

// allNets compiles a case's encoder, scorer (encoder by reference) and
// embedded scorer.
func allNets(t testing.TB, tc *testCase) (enc, sc, em *Net) {
	enc = mustCompile(t, tc.encoder.spec, tc.encoder.w, nil)
	sc = mustCompile(t, tc.scorer.spec, tc.scorer.w, &Encoder{Spec: tc.encoder.spec, Weights: tc.encoder.w})
	em = mustCompile(t, tc.embedded.spec, tc.embedded.w, nil)
	return
}

func run(t testing.TB, r *Runner, b *Batch, layer string) []float32 {
	t.Helper()
	out, err := r.Run(b, layer, nil)
	if err != nil {
		t.Fatalf("run %s: %v", layer, err)
	}
	return out
}

func bitsEqual(a, b []float32) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if math.Float32bits(a[i]) != math.Float32bits(b[i]) {
			return false
		}
	}
	return true
}

func TestRuntimeEmbeddedEqualsReferenced(t *testing.T) {
	for i, o := range standardCases() {
		tc := randomCase(uint64(i), o)
		enc, sc, em := allNets(t, tc)
		b := tc.batch
		p1 := run(t, sc.NewRunner(1), b, "p")
		p2 := run(t, em.NewRunner(1), b, "p")
		if !bitsEqual(p1, p2) {
			t.Errorf("case %d: embedded scorer differs from the scorer with its encoder by reference", i)
		}
		c1 := run(t, sc.NewRunner(1), b, "encoder/code")
		c2 := run(t, enc.NewRunner(1), b, "code")
		if !bitsEqual(c1, c2) {
			t.Errorf("case %d: the scorer's encoder/code differs from the encoder's code", i)
		}
	}
}

func TestRuntimePermutationInvariance(t *testing.T) {
	// Within a row, pairs permuted in lockstep must give bit-identical
	// outputs. Repeated indices with different values make the sum's order
	// matter in floating point, so the runtime must fix the order itself.
	rng := rand.New(rand.NewPCG(7, 7))
	for i, o := range standardCases() {
		tc := randomCase(uint64(100+i), o)
		enc, sc, _ := allNets(t, tc)
		// Add a row whose repeated values do not sum associatively in float32.
		rows, dense := rowsOf(tc.batch)
		if o.duplicates != DuplicatesRefuse {
			rows = append(rows, []pair{{5, 0.1}, {5, 1e7}, {5, 0.3}, {5, 3}, {6, 1}, {5, 0.7}})
		} else if o.unknown == UnknownBucket {
			u := int32(o.vocab)
			rows = append(rows, []pair{{u, 0.1}, {u, 1e7}, {u, 0.3}, {6, 1}, {u, 0.7}})
		}
		flat := map[string][]float32{}
		for k := range dense {
			for _, r := range dense[k] {
				flat[k] = append(flat[k], r...)
			}
			flat[k] = append(flat[k], make([]float32, len(dense[k][0]))...)
		}
		b := batchOf(rows, flat)
		rs, re := sc.NewRunner(1), enc.NewRunner(1)
		wantP, wantR := run(t, rs, b, "p"), run(t, re, b, "recon")
		wantAt, err := re.ReconstructionAt(b, nil)
		if err != nil {
			t.Fatal(err)
		}
		for trial := 0; trial < 5; trial++ {
			perm := make([][]pair, len(rows))
			where := make([][]int, len(rows)) // new position → old position in the row
			for r := range rows {
				perm[r] = slices.Clone(rows[r])
				where[r] = make([]int, len(rows[r]))
				for j := range where[r] {
					where[r][j] = j
				}
				rng.Shuffle(len(perm[r]), func(a, c int) {
					perm[r][a], perm[r][c] = perm[r][c], perm[r][a]
					where[r][a], where[r][c] = where[r][c], where[r][a]
				})
			}
			pb := batchOf(perm, flat)
			if !bitsEqual(run(t, rs, pb, "p"), wantP) {
				t.Fatalf("case %d trial %d: scorer output changed when pairs were permuted", i, trial)
			}
			if !bitsEqual(run(t, re, pb, "recon"), wantR) {
				t.Fatalf("case %d trial %d: reconstruction changed when pairs were permuted", i, trial)
			}
			at, err := re.ReconstructionAt(pb, nil)
			if err != nil {
				t.Fatal(err)
			}
			for r := range perm {
				base := pb.Indptr[r]
				for j, old := range where[r] {
					if math.Float32bits(at[int(base)+j]) != math.Float32bits(wantAt[int(base)+old]) {
						t.Fatalf("case %d: ReconstructionAt of row %d pair %d moved with the permutation wrongly", i, r, j)
					}
				}
			}
		}
	}
}

func TestRuntimeRowAloneAndSplits(t *testing.T) {
	// A row scored alone equals the same row in the batch, at every
	// position, at every split, with any tile size and thread count.
	tc := randomCase(42, standardCases()[0])
	enc, sc, _ := allNets(t, tc)
	b := tc.batch
	n := b.Rows()
	for _, net := range []struct {
		net   *Net
		layer string
	}{{sc, "p"}, {sc, "joined"}, {enc, "recon"}} {
		w := net.net.Width(net.layer)
		want := run(t, net.net.NewRunner(1), b, net.layer)
		alone := net.net.NewRunner(1)
		for r := 0; r < n; r++ {
			got := run(t, alone, subBatch(b, []int{r}), net.layer)
			if !bitsEqual(got, want[r*w:(r+1)*w]) {
				t.Fatalf("%s: row %d alone differs from row %d in the batch", net.layer, r, r)
			}
		}
		// Row 5 at every position of a batch of other rows.
		for pos := 0; pos < n; pos++ {
			order := make([]int, 0, n)
			for r := 0; r < n; r++ {
				if r != 5 {
					order = append(order, r)
				}
			}
			order = slices.Insert(order, min(pos, len(order)), 5)
			got := run(t, alone, subBatch(b, order), net.layer)
			p := slices.Index(order, 5)
			if !bitsEqual(got[p*w:(p+1)*w], want[5*w:6*w]) {
				t.Fatalf("%s: row 5 at position %d differs", net.layer, p)
			}
		}
		// Every split into two batches, tile sizes 1, 3, 16, threads 1, 2.
		for _, tile := range []int{1, 3, 16} {
			for _, threads := range []int{1, 2} {
				rr := net.net.NewRunner(threads)
				rr.SetTileRows(tile)
				for k := 0; k <= n; k++ {
					first, second := make([]int, k), make([]int, n-k)
					for i := range first {
						first[i] = i
					}
					for i := range second {
						second[i] = k + i
					}
					got := append(run(t, rr, subBatch(b, first), net.layer), run(t, rr, subBatch(b, second), net.layer)...)
					if !bitsEqual(got, want) {
						t.Fatalf("%s: split at %d (tile %d, threads %d) differs from the whole batch", net.layer, k, tile, threads)
					}
				}
				rr.Close()
			}
		}
	}
}

func TestRuntimeThreads(t *testing.T) {
	// Bit-identical results for 1 and 2 threads on a batch of many tiles.
	o := standardCases()[2]
	o.rows = 700
	tc := randomCase(9, o)
	enc, sc, em := allNets(t, tc)
	for _, c := range []struct {
		net   *Net
		layer string
	}{{sc, "p"}, {em, "hidden"}, {enc, "recon"}} {
		r1 := c.net.NewRunner(1)
		want := run(t, r1, tc.batch, c.layer)
		for _, tile := range []int{1, 7, 64, 1000} {
			r2 := c.net.NewRunner(2)
			r2.SetTileRows(tile)
			if got := run(t, r2, tc.batch, c.layer); !bitsEqual(got, want) {
				t.Errorf("%s: 2 threads, tile %d differ from 1 thread", c.layer, tile)
			}
			r2.Close()
		}
		if c.layer == "recon" {
			a1, _ := r1.ReconstructionAt(tc.batch, nil)
			r2 := c.net.NewRunner(2)
			r2.SetTileRows(5)
			a2, err := r2.ReconstructionAt(tc.batch, nil)
			if err != nil || !bitsEqual(a1, a2) {
				t.Errorf("ReconstructionAt: 2 threads differ from 1 (err %v)", err)
			}
		}
	}
}

func TestRuntimeReconstructionAtEqualsFull(t *testing.T) {
	for i, o := range standardCases() {
		tc := randomCase(uint64(200+i), o)
		enc, _, _ := allNets(t, tc)
		r := enc.NewRunner(2)
		r.SetTileRows(4)
		b := tc.batch
		full := run(t, r, b, "recon")
		at, err := r.ReconstructionAt(b, nil)
		if err != nil {
			t.Fatal(err)
		}
		w := enc.Width("recon")
		if len(at) != len(b.Indices) {
			t.Fatalf("len %d, want %d", len(at), len(b.Indices))
		}
		for row := 0; row < b.Rows(); row++ {
			for p := b.Indptr[row]; p < b.Indptr[row+1]; p++ {
				want := full[row*w+int(b.Indices[p])]
				if math.Float32bits(at[p]) != math.Float32bits(want) {
					t.Fatalf("case %d row %d index %d: ReconstructionAt %v, full decoder %v", i, row, b.Indices[p], at[p], want)
				}
			}
		}
	}
}

func TestRuntimeRefusesRows(t *testing.T) {
	base := func(dups, transform string) (*Net, *Runner) {
		sp := SparseInput{Name: "plays", VocabularySize: 10, Unknown: UnknownBucket, Transform: transform, Duplicates: dups, Vocabulary: "v"}
		m := newModel(KindEncoder, "e", sp).randTensor(rand.New(rand.NewPCG(1, 1)), "w", "encoder", 11, 3).
			layer(Layer{Name: "code", Op: OpSparseDense, Input: "plays", Weight: "w"})
		m.spec.Code, m.spec.Output = "code", "code"
		n := mustCompile(t, m.spec, m.w, nil)
		return n, n.NewRunner(2)
	}
	good := []pair{{1, 1}}
	nan, inf := float32(math.NaN()), float32(math.Inf(1))
	cases := []struct {
		name       string
		dups       string
		transform  string
		bad        []pair
		problem    RowProblem
		index      int32
		acceptable bool
	}{
		{"negative index", DuplicatesSum, TransformLog1p, []pair{{1, 1}, {-1, 1}}, IndexOutOfRange, -1, false},
		{"index past the bucket", DuplicatesSum, TransformLog1p, []pair{{11, 1}}, IndexOutOfRange, 11, false},
		{"index before value", DuplicatesSum, TransformLog1p, []pair{{2, nan}, {12, 1}}, IndexOutOfRange, 12, false},
		{"NaN value", DuplicatesSum, TransformLog1p, []pair{{2, nan}}, InvalidValue, 2, false},
		{"infinite value", DuplicatesSum, TransformLog1p, []pair{{2, inf}}, InvalidValue, 2, false},
		{"negative value", DuplicatesSum, TransformLog1p, []pair{{2, 1}, {4, -0.5}}, InvalidValue, 4, false},
		{"duplicate refused", DuplicatesRefuse, TransformLog1p, []pair{{4, 1}, {2, 1}, {4, 1}}, DuplicateIndex, 4, false},
		{"value before duplicate", DuplicatesRefuse, TransformLog1p, []pair{{4, 1}, {4, -1}}, InvalidValue, 4, false},
		{"sum overflows float32", DuplicatesSum, TransformIdentity, []pair{{3, 3e38}, {3, 3e38}}, ValueOverflow, 3, false},
		{"bucket duplicates summed under refuse", DuplicatesRefuse, TransformLog1p, []pair{{10, 1}, {10, 2}}, 0, 0, true},
		{"duplicates under max", DuplicatesMax, TransformBinary, []pair{{4, 1}, {4, 2}}, 0, 0, true},
		{"sum overflow tamed by log1p", DuplicatesSum, TransformLog1p, []pair{{3, 3e38}, {3, 3e38}}, 0, 0, true},
		{"zero and negative zero", DuplicatesSum, TransformIdentity, []pair{{3, 0}, {3, float32(math.Copysign(0, -1))}}, 0, 0, true},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, r := base(c.dups, c.transform)
			defer r.Close()
			// Rows 0..4 good, row 5 bad, row 6 good, row 8 bad too: row 5 is reported.
			rows := [][]pair{good, good, nil, good, good, c.bad, good, nil, c.bad}
			_, err := r.Run(batchOf(rows, nil), "code", nil)
			if c.acceptable {
				if err != nil {
					t.Fatalf("refused: %v", err)
				}
				return
			}
			var re *RowError
			if !errors.As(err, &re) {
				t.Fatalf("error %v, want a *RowError", err)
			}
			if !errkind.Is(err, errkind.BadInput) {
				t.Errorf("error kind %v, want bad input", errkind.Of(err))
			}
			if re.Row != 5 || re.Problem != c.problem || re.Index != c.index {
				t.Errorf("got row %d problem %v index %d, want row 5 problem %v index %d (%v)", re.Row, re.Problem, re.Index, c.problem, c.index, err)
			}
			if !strings.Contains(err.Error(), "row 5") {
				t.Errorf("message %q does not name the row", err)
			}
		})
	}

	// Dense inputs: missing, misshapen, not finite.
	tc := randomCase(3, standardCases()[0])
	_, sc, _ := allNets(t, tc)
	r := sc.NewRunner(1)
	defer r.Close()
	b := tc.batch
	good2 := b.Dense["show_features"]
	delete(b.Dense, "show_features")
	if _, err := r.Run(b, "p", nil); err == nil || !strings.Contains(err.Error(), "show_features") || !errkind.Is(err, errkind.BadInput) {
		t.Errorf("missing dense input: %v", err)
	}
	// A layer that does not read it runs without it.
	if _, err := r.Run(b, "encoder/code", nil); err != nil {
		t.Errorf("encoder/code without show_features: %v", err)
	}
	b.Dense["show_features"] = good2[:len(good2)-1]
	if _, err := r.Run(b, "p", nil); err == nil || !strings.Contains(err.Error(), "show_features") {
		t.Errorf("short dense input: %v", err)
	}
	bad := slices.Clone(good2)
	bad[3*3+2] = float32(math.Inf(-1))
	b.Dense["show_features"] = bad
	_, err := r.Run(b, "p", nil)
	var re *RowError
	if !errors.As(err, &re) || re.Row != 3 || re.Problem != InvalidDenseValue || re.Input != "show_features" || re.Column != 2 {
		t.Errorf("infinite dense value: %v", err)
	}
	b.Dense["show_features"] = good2

	// Malformed CSR structure.
	for name, mb := range map[string]*Batch{
		"indptr not from 0":   {Indptr: []int32{1, 1}, Indices: []int32{1}, Values: []float32{1}},
		"indptr decreasing":   {Indptr: []int32{0, 2, 1}, Indices: []int32{1, 2}, Values: []float32{1, 1}},
		"indptr short":        {Indptr: []int32{0, 1}, Indices: []int32{1, 2}, Values: []float32{1, 1}},
		"values short":        {Indptr: []int32{0, 2}, Indices: []int32{1, 2}, Values: []float32{1}},
		"no rows but indices": {Indices: []int32{1}, Values: []float32{1}},
	} {
		_, r := base(DuplicatesSum, TransformLog1p)
		if _, err := r.Run(mb, "code", nil); err == nil || !errkind.Is(err, errkind.BadInput) {
			t.Errorf("%s: %v, want a bad-input error", name, err)
		}
		r.Close()
	}
	if _, err := r.Run(b, "no_such_layer", nil); err == nil {
		t.Error("unknown layer accepted")
	}
}

func TestRuntimeRefusalDoesNotDependOnThreads(t *testing.T) {
	o := standardCases()[0]
	o.rows = 500
	tc := randomCase(11, o)
	_, sc, _ := allNets(t, tc)
	b := tc.batch
	// Bad rows late and early: the lowest must always be reported.
	for _, badRow := range []int{3, 250, 499} {
		rows, dense := rowsOf(b)
		rows[badRow] = append(slices.Clone(rows[badRow]), pair{-4, 1})
		if badRow+1 < len(rows) {
			rows[len(rows)-1] = append(slices.Clone(rows[len(rows)-1]), pair{2, float32(math.NaN())})
		}
		flat := map[string][]float32{}
		for k := range dense {
			for _, r := range dense[k] {
				flat[k] = append(flat[k], r...)
			}
		}
		bb := batchOf(rows, flat)
		for _, threads := range []int{1, 2} {
			for _, tile := range []int{1, 8, 128} {
				r := sc.NewRunner(threads)
				r.SetTileRows(tile)
				_, err := r.Run(bb, "p", nil)
				var re *RowError
				if !errors.As(err, &re) || re.Row != badRow || re.Problem != IndexOutOfRange {
					t.Errorf("bad row %d, threads %d, tile %d: %v", badRow, threads, tile, err)
				}
				r.Close()
			}
		}
	}
}

func TestRuntimeAllocs(t *testing.T) {
	o := standardCases()[0]
	o.rows = 300
	tc := randomCase(5, o)
	enc, sc, _ := allNets(t, tc)
	for _, threads := range []int{1, 2} {
		r := sc.NewRunner(threads)
		r.SetTileRows(32)
		dst, err := r.Run(tc.batch, "p", nil)
		if err != nil {
			t.Fatal(err)
		}
		allocs := testing.AllocsPerRun(20, func() {
			dst, err = r.Run(tc.batch, "p", dst)
		})
		if err != nil || allocs != 0 {
			t.Errorf("threads %d: Run allocates %v times per call (err %v)", threads, allocs, err)
		}
		r.Close()

		re := enc.NewRunner(threads)
		re.SetTileRows(32)
		at, _ := re.ReconstructionAt(tc.batch, nil)
		allocs = testing.AllocsPerRun(20, func() {
			at, err = re.ReconstructionAt(tc.batch, at)
		})
		if err != nil || allocs != 0 {
			t.Errorf("threads %d: ReconstructionAt allocates %v times per call (err %v)", threads, allocs, err)
		}
		re.Close()
	}
}

// FuzzRuntimeRows feeds arbitrary rows to an encoder: Run must never panic,
// must either refuse the batch with a RowError or return outputs (finite
// when no value exceeds 1e6: larger ones may overflow float32 inside the
// network), and reversing every row's pairs must not change a single bit.
func FuzzRuntimeRows(f *testing.F) {
	f.Add([]byte{1, 0, 0, 128, 63, 2, 0, 0, 0, 64}, uint8(0))
	f.Add([]byte{0, 3, 0, 0, 128, 63, 3, 0, 0, 0, 63, 255, 0, 0, 128, 127}, uint8(1))
	f.Add([]byte{10, 0, 0, 0, 0, 10, 0, 0, 0, 0, 0}, uint8(2))
	f.Fuzz(func(t *testing.T, data []byte, rule uint8) {
		rules := []string{DuplicatesSum, DuplicatesMax, DuplicatesRefuse}
		transforms := []string{TransformIdentity, TransformLog1p, TransformBinary}
		sp := SparseInput{Name: "plays", VocabularySize: 9, Unknown: UnknownBucket,
			Duplicates: rules[int(rule)%3], Transform: transforms[int(rule/3)%3], Vocabulary: "v"}
		m := newModel(KindEncoder, "e", sp).randTensor(rand.New(rand.NewPCG(3, 3)), "w", "encoder", 10, 5).
			layer(Layer{Name: "code", Op: OpSparseDense, Input: "plays", Weight: "w", Activation: ActTanh}).
			layer(Layer{Name: "recon", Op: OpTiedDecoder, Input: "code", TiedTo: "w", Activation: ActSigmoid})
		m.spec.Code, m.spec.Output, m.spec.Reconstruction = "code", "code", "recon"
		net := mustCompile(t, m.spec, m.w, nil)
		// Each 5-byte record is (index byte − 2, float32 value); a record
		// whose index byte is 255 ends the row.
		var rows [][]pair
		var cur []pair
		for len(data) >= 5 {
			if data[0] == 255 {
				rows, cur = append(rows, cur), nil
			} else {
				v := math.Float32frombits(uint32(data[1]) | uint32(data[2])<<8 | uint32(data[3])<<16 | uint32(data[4])<<24)
				cur = append(cur, pair{int32(data[0]) - 2, v})
			}
			data = data[5:]
		}
		rows = append(rows, cur)
		r := net.NewRunner(2)
		defer r.Close()
		r.SetTileRows(2)
		out, err := r.Run(batchOf(rows, nil), "recon", nil)
		if err != nil {
			var re *RowError
			if !errors.As(err, &re) {
				t.Fatalf("error without a RowError: %v", err)
			}
			return
		}
		small := true
		for _, row := range rows {
			for _, p := range row {
				small = small && p.val <= 1e6
			}
		}
		for i, v := range out {
			if small && (math.IsNaN(float64(v)) || math.IsInf(float64(v), 0)) {
				t.Fatalf("output %d is %v", i, v)
			}
		}
		rev := make([][]pair, len(rows))
		for i, row := range rows {
			rev[i] = slices.Clone(row)
			slices.Reverse(rev[i])
		}
		out2, err := r.Run(batchOf(rev, nil), "recon", nil)
		if err != nil || !bitsEqual(out, out2) { // bitsEqual: NaN payloads too
			t.Fatalf("reversed rows: %v, equal %v", err, bitsEqual(out, out2))
		}
	})
}

// TestLog1pTable: log1p32 gives float32(math.Log1p(v)) bit for bit, from
// the table (small integers) and past it (fractions, large and huge
// values, the table's edges).
func TestLog1pTable(t *testing.T) {
	vs := []float64{0, math.Copysign(0, -1), 0.5, 1e-30, 1023, 1023.5, 1024, 1025, 1e6, 3e38, 1e300, math.MaxFloat64}
	for k := range 2100 {
		vs = append(vs, float64(k), float64(k)+0.25, math.Nextafter(float64(k), 0))
	}
	for _, v := range vs {
		want := float32(math.Log1p(v))
		if got := log1p32(v); math.Float32bits(got) != math.Float32bits(want) && !(got == 0 && want == 0) {
			t.Fatalf("log1p32(%v) = %v, math.Log1p gives %v", v, got, want)
		}
	}
}
