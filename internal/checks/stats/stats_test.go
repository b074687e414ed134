package stats

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

// near fails the test unless got is within rel (relative) of want.
func near(t *testing.T, what string, got, want, rel float64) {
	t.Helper()
	if !(math.Abs(got-want) <= rel*math.Abs(want)) {
		t.Errorf("%s = %.17g, want %.17g (relative error %.3g > %.3g)", what, got, want, math.Abs(got-want)/math.Abs(want), rel)
	}
}

const rel = 1e-12

func binary64(t *testing.T, p, y, w []float64) *Binary {
	t.Helper()
	b := NewBinary()
	if err := b.AddBatch64(p, y, w); err != nil {
		t.Fatal(err)
	}
	return b
}

func TestLogLossReferences(t *testing.T) {
	// scikit-learn 1.2 log_loss docstring example:
	// log_loss(["spam", "ham", "ham", "spam"], [[.1, .9], [.9, .1], [.8, .2], [.35, .65]]);
	// the columns are the sorted labels (ham, spam), so spam is the positive
	// class and P(spam) is the second column.
	labels := []string{"spam", "ham", "ham", "spam"}
	y := make([]float64, len(labels))
	for i, l := range labels {
		if l == "spam" {
			y[i] = 1
		}
	}
	near(t, "docstring log loss", binary64(t, []float64{.9, .1, .2, .65}, y, nil).LogLoss(), 0.21616187468057912, rel)

	// Computed with scikit-learn 1.2.1 (Debian python3-sklearn), see
	// REFERENCES.md "Metrics".
	p := []float64{0.9, 0.2, 0.6, 0.4}
	y = []float64{1, 0, 1, 0}
	near(t, "log loss", binary64(t, p, y, nil).LogLoss(), 0.3375388286260044, rel)
	near(t, "weighted log loss", binary64(t, p, y, []float64{1, 2, 3, 4}).LogLoss(), 0.41274269846481804, rel)

	// Clipping: our rule (Eps = 1e-15) matches scikit-learn <= 1.2's
	// log_loss(eps=1e-15): y=[1,0,1,0], p=[1,0,0,0.5] -> 8.807980893867658
	// (scikit-learn 1.2.1 with eps=1e-15). Its 1.2 default, float64 machine
	// epsilon, would give 9.184200142419275 instead.
	clipped := binary64(t, []float64{1, 0, 0, 0.5}, y, nil).LogLoss()
	near(t, "clipped log loss", clipped, 8.807980893867658, rel)
	if math.Abs(clipped-9.184200142419275) < 0.1 {
		t.Errorf("clipped log loss %v matches the machine-epsilon rule, not Eps", clipped)
	}

	// The same through the single-row function and soft labels: a label of
	// 0.5 costs the mean of both logarithms.
	near(t, "LogLoss(0.9, 1)", LogLoss(0.9, 1), -math.Log(0.9), 1e-15)
	near(t, "LogLoss(0.2, 0.5)", LogLoss(0.2, 0.5), -(math.Log(0.2)+math.Log(0.8))/2, 1e-15)
}

func TestFloat32PathAgreesWithFloat64(t *testing.T) {
	// The float32 entry point computes in float64 from the float32 values:
	// it must agree with AddBatch64 fed the same (float32-rounded) values.
	p32 := []float32{0.9, 0.2, 0.6, 0.4, 1, 0, 0.37}
	y32 := []float32{1, 0, 1, 0, 1, 1, 0.25}
	w32 := []float32{1, 2, 3, 4, 0.5, 0.25, 2}
	p64, y64, w64 := widen(p32), widen(y32), widen(w32)
	a, b := NewBinary(), NewBinary()
	if err := a.AddBatch(p32, y32, w32); err != nil {
		t.Fatal(err)
	}
	if err := b.AddBatch64(p64, y64, w64); err != nil {
		t.Fatal(err)
	}
	if a.LogLoss() != b.LogLoss() || a.ECE() != b.ECE() {
		t.Errorf("float32 path %v/%v, float64 path %v/%v", a.LogLoss(), a.ECE(), b.LogLoss(), b.ECE())
	}
	loss := make([]float64, len(p32))
	c := NewBinary()
	if err := c.AddBatchLoss(p32, y32, w32, loss); err != nil {
		t.Fatal(err)
	}
	for i := range loss {
		if want := LogLoss(p64[i], y64[i]); loss[i] != want {
			t.Errorf("row %d: loss %v, LogLoss %v", i, loss[i], want)
		}
	}
}

func widen(x []float32) []float64 {
	out := make([]float64, len(x))
	for i, v := range x {
		out[i] = float64(v)
	}
	return out
}

func TestBinaryLabelPathIsBitIdentical(t *testing.T) {
	// A batch of 0/1 labels takes one logarithm per row; the two-term form
	// must give the very same bits (so batching cannot change a sum).
	for _, p := range []float64{0, 1e-300, 1e-15, 0.1, 0.5, 0.999, 1 - 1e-15, 1} {
		for _, y := range []float64{0, 1} {
			if a, b := binaryLoss(p, y), softLoss(p, y); a != b {
				t.Errorf("p=%v y=%v: one-log %v, two-log %v", p, y, a, b)
			}
		}
	}
}

func TestAUCReferences(t *testing.T) {
	cases := []struct {
		name string
		y, s []float64
		want float64
	}{
		// scikit-learn roc_auc_score documentation example.
		{"docs", []float64{0, 0, 1, 1}, []float64{0.1, 0.4, 0.35, 0.8}, 0.75},
		// Ties count 1/2 (Mann-Whitney); computed with scikit-learn 1.2.1.
		{"ties", []float64{0, 0, 1, 1, 0, 1}, []float64{0.5, 0.5, 0.5, 0.9, 0.1, 0.3}, 0.6666666666666667},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			exact, err := ExactAUC(c.s, c.y, nil)
			if err != nil {
				t.Fatal(err)
			}
			near(t, "exact AUC", exact, c.want, rel)
			auc, bound := binary64(t, c.s, c.y, nil).AUC()
			if math.Abs(auc-exact) > bound+1e-15 {
				t.Errorf("histogram AUC %v, exact %v, bound %v", auc, exact, bound)
			}
			// These scores are far apart except for exact ties, which both
			// count 1/2: the histogram is exact here.
			near(t, "histogram AUC", auc, c.want, rel)
		})
	}
}

func TestHistogramAUCBound(t *testing.T) {
	// Scores crowded into few histogram bins: the histogram AUC is off,
	// but never by more than its bound.
	rng := newTestRand(7)
	n := 5000
	s, y := make([]float32, n), make([]float32, n)
	for i := range s {
		y[i] = float32(rng.Intn(2))
		// 3 bins' worth of range, positives slightly higher.
		s[i] = float32(0.5 + (rng.Float64()+0.3*float64(y[i]))*2.5/AUCBins)
	}
	b := NewBinary()
	if err := b.AddBatch(s, y, nil); err != nil {
		t.Fatal(err)
	}
	auc, bound := b.AUC()
	exact, err := ExactAUC(s, y, nil)
	if err != nil {
		t.Fatal(err)
	}
	if bound < 0.05 {
		t.Fatalf("bound %v: the test data should share bins", bound)
	}
	if math.Abs(auc-exact) > bound {
		t.Errorf("histogram AUC %v, exact %v, bound %v", auc, exact, bound)
	}
	if auc == exact {
		t.Errorf("histogram AUC equals exact %v: the data do not exercise the bound", auc)
	}
}

func TestNormalizedEntropyReference(t *testing.T) {
	// He et al., "Practical Lessons from Predicting Clicks on Ads at
	// Facebook", ADKDD 2014: NE = log loss / H(mean label); worked example
	// from REFERENCES.md.
	y := []float64{1, 0, 0, 0, 1, 0, 0, 0, 0, 0}
	p := []float64{.8, .1, .2, .05, .6, .3, .1, .15, .05, .1}
	b := binary64(t, p, y, nil)
	near(t, "log loss", b.LogLoss(), 0.18949747355794977, rel)
	near(t, "H", entropy(0.2), 0.5004024235381879, rel)
	near(t, "NE", b.NormalizedEntropy(), 0.3786901594482154, rel)

	// A constant predictor at the base rate has NE 1 (same paper).
	c := make([]float64, len(y))
	for i := range c {
		c[i] = 0.2
	}
	near(t, "constant NE", binary64(t, c, y, nil).NormalizedEntropy(), 1, rel)
	if ne := binary64(t, []float64{0.3, 0.4}, []float64{0, 0}, nil).NormalizedEntropy(); !math.IsNaN(ne) {
		t.Errorf("NE with one class = %v, want NaN", ne)
	}
}

func TestCalibrationReference(t *testing.T) {
	// Naeini, Cooper, Hauskrecht, AAAI 2015: 10 equal-width bins weighted
	// by frequency, empty bins skipped; worked example from REFERENCES.md.
	p := []float64{.05, .15, .32, .38, .55, .62, .68, .71, .88, .97}
	y := []float64{0, 0, 1, 0, 1, 0, 1, 1, 1, 1}
	b := binary64(t, p, y, nil)
	near(t, "ECE", b.ECE(), 0.169, rel)
	near(t, "MCE", b.MCE(), 0.45, rel)

	bins := b.Calibration()
	if len(bins) != CalibrationBins {
		t.Fatalf("%d bins", len(bins))
	}
	// Bin 3 holds .32 and .38 (labels 1, 0); bins 2 and 4 are empty.
	near(t, "bin 3 predicted", bins[3].Predicted, 0.35, rel)
	near(t, "bin 3 observed", bins[3].Observed, 0.5, rel)
	if bins[3].Count != 2 || bins[2].Count != 0 || bins[4].Count != 0 {
		t.Errorf("bin counts %v %v %v, want 0 2 0", bins[2].Count, bins[3].Count, bins[4].Count)
	}
	near(t, "predicted/observed", b.PredictedObserved(), 5.31/6, rel)
	// The last bin is closed: p = 1 falls in bin 9.
	if got := binary64(t, []float64{1}, []float64{1}, nil).Calibration()[9].Count; got != 1 {
		t.Errorf("p=1 in bin 9: count %v", got)
	}
}

// Paired comparison from REFERENCES.md (computed with scipy 1.10.1).
var (
	refBase = []float64{.52, .61, .48, .70, .55, .66, .59, .63}
	refCand = []float64{.50, .58, .49, .65, .51, .64, .60, .57}
)

func refPaired(t *testing.T, reps int) *Paired {
	t.Helper()
	a, err := NewPaired(1, reps)
	if err != nil {
		t.Fatal(err)
	}
	for i := range refBase {
		if err := a.Add(int64(i), refCand[i]-refBase[i], 1); err != nil {
			t.Fatal(err)
		}
	}
	return a
}

func TestPairedTReference(t *testing.T) {
	a := refPaired(t, 100)
	// scipy 1.10.1: ttest_rel(cand, base).
	tt, df, p := a.TTest()
	near(t, "t", tt, -2.7583864218368523, rel)
	near(t, "two-sided p", p, 0.02816139690900871, rel)
	if df != 7 {
		t.Errorf("df = %v, want 7", df)
	}

	// Non-inferiority, H0: mean(cand - base) >= 0.01 (scipy 1.10.1:
	// ttest_1samp(cand - base, 0.01, alternative="less"), and the bound
	// mean + t.ppf(0.95, 7) * se).
	r, err := a.NonInferiority(0.01, 0.95)
	if err != nil {
		t.Fatal(err)
	}
	near(t, "NI t", r.T, -3.8617409905715934, rel)
	near(t, "NI one-sided p", r.P, 0.0030987602904171446, rel)
	// The reference bound was computed with scipy 1.10.1's t.ppf(0.95, 7) =
	// 1.894578605061305, which is 1.5e-11 relative below the true quantile
	// 1.894578605090007389 (mpmath 1.2.1, 40 digits; see TestTQuantile), so
	// the reference itself carries 3.3e-11 relative error: compare at 1e-10,
	// and at 1e-12 after replacing scipy's quantile with the true one.
	near(t, "NI upper bound", r.Upper, -0.007828923188002105, 1e-10)
	corrected := -0.007828923188002105 + (1.894578605090007389-1.894578605061305)*r.StdErr
	near(t, "NI upper bound, quantile corrected", r.Upper, corrected, rel)
	near(t, "mean diff", r.MeanDiff, -0.025, rel)
	if !r.Pass || r.N != 8 || r.DF != 7 || r.BootstrapReplicas == 0 {
		t.Errorf("result %+v", r)
	}
	if !(r.BootstrapLower <= r.MeanDiff && r.MeanDiff <= r.BootstrapUpper) {
		t.Errorf("bootstrap interval [%v, %v] misses the mean %v", r.BootstrapLower, r.BootstrapUpper, r.MeanDiff)
	}
	// A margin of -0.02 is not met: the bound -0.0078 is above it.
	if r2, _ := a.NonInferiority(-0.02, 0.95); r2.Pass {
		t.Errorf("passed with margin -0.02: %+v", r2)
	}
}

func TestTQuantile(t *testing.T) {
	// mpmath 1.2.1 (Debian python3-mpmath) at 40 digits, solving
	// 1 - I_{df/(df+x^2)}(df/2, 1/2)/2 = p with mpmath.findroot.
	// (scipy 1.10.1's t.ppf(0.95, 7) = 1.894578605061305 is off by 1.5e-11.)
	near(t, "t(0.95, 7)", tQuantile(0.95, 7), 1.894578605090007389, rel)
	near(t, "t(0.975, 30)", tQuantile(0.975, 30), 2.042272456301238310, rel)
	near(t, "t(0.99, 2.5)", tQuantile(0.99, 2.5), 5.353111173030874316, rel)
}

func TestPairedWeightsAreReliabilityWeights(t *testing.T) {
	// Multiplying every weight by a constant changes nothing in the test.
	rng := newTestRand(3)
	n := 300
	ids, d, w, w7 := make([]int64, n), make([]float64, n), make([]float32, n), make([]float32, n)
	for i := range d {
		ids[i], d[i] = int64(i), rng.NormFloat64()*0.1-0.01
		w[i] = float32(0.5 + rng.Float64())
		w7[i] = 8 * w[i] // exact in float32
	}
	a, _ := NewPaired(9, 50)
	b, _ := NewPaired(9, 50)
	if err := a.AddBatch(ids, d, w); err != nil {
		t.Fatal(err)
	}
	if err := b.AddBatch(ids, d, w7); err != nil {
		t.Fatal(err)
	}
	ra, _ := a.NonInferiority(0.005, 0.95)
	rb, _ := b.NonInferiority(0.005, 0.95)
	for _, c := range [][3]any{{"t", ra.T, rb.T}, {"df", ra.DF, rb.DF}, {"upper", ra.Upper, rb.Upper}, {"boot", ra.BootstrapUpper, rb.BootstrapUpper}} {
		near(t, c[0].(string), c[2].(float64), c[1].(float64), rel)
	}
	if n := a.EffectiveN(); !(n > 250 && n < 300) {
		t.Errorf("effective n %v for weights in [0.5, 1.5)", n)
	}
}

func TestNonInferiorityEdges(t *testing.T) {
	a, _ := NewPaired(1, 10)
	if _, err := a.NonInferiority(0.01, 0.95); err == nil {
		t.Error("empty accumulator: no error")
	}
	_ = a.Add(1, -0.5, 1)
	if _, err := a.NonInferiority(0.01, 0.95); err == nil {
		t.Error("one row: no error")
	}
	_ = a.Add(2, -0.5, 1)
	r, err := a.NonInferiority(0.01, 0.95)
	if err != nil {
		t.Fatal(err)
	}
	// Two equal differences: no spread, a certain improvement.
	if !math.IsInf(r.T, -1) || r.P != 0 || r.Upper != -0.5 || !r.Pass {
		t.Errorf("constant improvement: %+v", r)
	}
	r, _ = a.NonInferiority(-0.5, 0.95)
	if r.T != 0 || r.Pass {
		t.Errorf("mean equal to margin with no spread: %+v", r)
	}
	for _, c := range []float64{0, 1, math.NaN()} {
		if _, err := a.NonInferiority(0.01, c); err == nil {
			t.Errorf("confidence %v accepted", c)
		}
	}
	if err := a.Add(3, math.Inf(1), 1); err == nil {
		t.Error("infinite difference accepted")
	}
	if err := a.Add(3, 0, -1); err == nil {
		t.Error("negative weight accepted")
	}
	if a.Rows() != 2 {
		t.Errorf("rows %d after refused rows", a.Rows())
	}
	b, _ := NewPaired(2, 10)
	if err := a.Merge(b); err == nil {
		t.Error("merged different seeds")
	}
}

func TestBCEReferences(t *testing.T) {
	// Computed with numpy 1.24 (REFERENCES.md): mean of
	// -(t*log(q) + (1-t)*log(1-q)) over all outputs and over t != 0.
	q := []float64{.9, .2, .6, .1, .3, .8}
	all, nz := BCE(q, []float64{1, 0, 1, 0, 0, 1})
	near(t, "BCE all", all, 0.2540847836081325, rel)
	near(t, "BCE nonzero", nz, 0.2797765635793423, rel)
	all, nz = BCE(q, []float64{0, .5, 1, 0, .25, 0})
	near(t, "BCE all, fractional", all, 1.002166547626942, rel)
	near(t, "BCE nonzero, fractional", nz, 0.665205254891893, rel)
	if _, nz := BCE([]float32{.5}, []float32{0}); !math.IsNaN(nz) {
		t.Errorf("no nonzero target: %v, want NaN", nz)
	}
}

func TestRecon(t *testing.T) {
	q := []float32{.9, .2, .6, .1, .3, .8, .4, .1, .2, .3, .5, .6, .7, .2, .1, .1, .1, .1}
	tg := []float32{1, 0, 1, 0, 0, 1, 0, .5, 1, 0, .25, 0, 0, 0, 0, 0, 0, 0}
	weight := func(nz int) float64 { return 1 + float64(nz) }
	r, err := NewRecon(0.7, weight)
	if err != nil {
		t.Fatal(err)
	}
	loss := make([]float64, 3)
	if err := r.AddBatch(q, tg, 6, loss); err != nil {
		t.Fatal(err)
	}
	// Rebuild the three rows' numbers from BCE and the documented rule.
	var sw, sAll, swNZ, sNZ, sC float64
	for i := range 3 {
		all, nz := BCE(q[6*i:6*i+6], tg[6*i:6*i+6])
		cnt := 0
		for _, v := range tg[6*i : 6*i+6] {
			if v != 0 {
				cnt++
			}
		}
		w := weight(cnt)
		c := all
		if cnt > 0 {
			c = 0.7*nz + 0.3*all
			swNZ += w
			sNZ += w * nz
		}
		near(t, "row loss", loss[i], c, 1e-15)
		sw += w
		sAll += w * all
		sC += w * c
	}
	near(t, "BCEAll", r.BCEAll(), sAll/sw, rel)
	near(t, "BCENonzero", r.BCENonzero(), sNZ/swNZ, rel)
	near(t, "Reconstruction", r.Reconstruction(), sC/sw, rel)

	// AddRow one by one and merging gives the same.
	r1, _ := NewRecon(0.7, weight)
	r2, _ := NewRecon(0.7, weight)
	for i := range 3 {
		dst := r1
		if i == 2 {
			dst = r2
		}
		if _, err := dst.AddRow(q[6*i:6*i+6], tg[6*i:6*i+6]); err != nil {
			t.Fatal(err)
		}
	}
	if err := r1.Merge(r2); err != nil {
		t.Fatal(err)
	}
	near(t, "merged Reconstruction", r1.Reconstruction(), r.Reconstruction(), rel)
	if r1.Rows() != 3 {
		t.Errorf("rows %d", r1.Rows())
	}

	// Bad input is refused and leaves nothing behind.
	if _, err := r1.AddRow([]float32{1.5}, []float32{0}); err == nil {
		t.Error("q 1.5 accepted")
	}
	if err := r1.AddBatch([]float32{.5, .5}, []float32{0, 2}, 1, nil); err == nil {
		t.Error("target 2 accepted")
	}
	bad, _ := NewRecon(0.5, func(int) float64 { return math.NaN() })
	if _, err := bad.AddRow([]float32{.5}, []float32{1}); err == nil {
		t.Error("NaN weight accepted")
	}
	if r1.Rows() != 3 || bad.Rows() != 0 {
		t.Errorf("rows after refusals: %d, %d", r1.Rows(), bad.Rows())
	}
	if _, err := NewRecon(1.5, nil); err == nil {
		t.Error("alpha 1.5 accepted")
	}
}

func TestQuantileReferences(t *testing.T) {
	// numpy 1.24 np.quantile default ("linear", Hyndman & Fan type 7).
	x := []float64{100, 2, 5, 1, 4, 3} // unsorted on purpose
	near(t, "q.5", Quantile(x, 0.5), 3.5, rel)
	near(t, "q.9", Quantile(x, 0.9), 52.5, rel)
	near(t, "q.99", Quantile(x, 0.99), 95.25, rel)
	if x[0] != 100 {
		t.Error("Quantile changed its input")
	}
	if Quantile(x, 0) != 1 || Quantile(x, 1) != 100 || Quantile([]float64{7}, 0.3) != 7 {
		t.Error("end points")
	}
	for _, c := range []struct {
		x []float64
		q float64
	}{{nil, 0.5}, {x, -0.1}, {x, 1.1}, {x, math.NaN()}, {[]float64{1, math.NaN()}, 0.5}} {
		if v := Quantile(c.x, c.q); !math.IsNaN(v) {
			t.Errorf("Quantile(%v, %v) = %v, want NaN", c.x, c.q, v)
		}
	}
}

func TestHistogram(t *testing.T) {
	h, err := NewHistogram(-1, 1, 4)
	if err != nil {
		t.Fatal(err)
	}
	if err := h.AddBatch([]float64{-2, -1, -0.5, 0, 0.49, 1, 3}, []float32{1, 1, 1, 1, 2, 1, 1}); err != nil {
		t.Fatal(err)
	}
	want := []float64{1, 1, 3, 1}
	for i := range want {
		if h.Counts[i] != want[i] {
			t.Errorf("counts %v, want %v", h.Counts, want)
			break
		}
	}
	if h.Under != 1 || h.Over != 1 || h.Total() != 8 {
		t.Errorf("under %v over %v total %v", h.Under, h.Over, h.Total())
	}
	g, _ := NewHistogram(-1, 1, 4)
	_ = g.Add(0.9, 2)
	if err := h.Merge(g); err != nil || h.Counts[3] != 3 {
		t.Errorf("merge: %v %v", err, h.Counts)
	}
	other, _ := NewHistogram(-1, 2, 4)
	if err := h.Merge(other); err == nil {
		t.Error("merged different ranges")
	}
	if err := h.Add(math.NaN(), 1); err == nil {
		t.Error("NaN accepted")
	}
	if _, err := NewHistogram(1, 1, 3); err == nil {
		t.Error("empty range accepted")
	}
}

func TestPoissonTable(t *testing.T) {
	// The thresholds are round(2^32 * P(K <= j)), K ~ Poisson(1), checked
	// against gonum's Poisson CDF (an outside implementation).
	dist := distuv.Poisson{Lambda: 1}
	for j, c := range poissonCDF {
		want := math.Round(dist.CDF(float64(j)) * (1 << 32))
		if float64(c) != want {
			t.Errorf("threshold %d = %d, want %v", j, c, want)
		}
	}
	if dist.Survival(12)*(1<<32) > 0.5 {
		t.Error("P(K > 12) is not negligible at 32 bits")
	}
	// The fast draw (top-byte table, one comparison, tail) against a plain
	// count of the thresholds, at every threshold and every bucket edge.
	us := []uint64{0, 1<<32 - 1}
	for _, c := range poissonCDF {
		us = append(us, c-1, c, c+1)
	}
	for b := uint64(1); b < 256; b++ {
		us = append(us, b<<24-1, b<<24)
	}
	for _, u := range us {
		var want uint64
		for _, c := range poissonCDF {
			if u >= c {
				want++
			}
		}
		if got := poisson1(u); got != want {
			t.Errorf("poisson1(%d) = %d, want %d", u, got, want)
		}
	}
}

func TestPoissonDraws(t *testing.T) {
	// The draws over many (row, replicate) pairs have the Poisson(1)
	// frequencies: a chi-square goodness-of-fit test at the 1e-4 level.
	dist := distuv.Poisson{Lambda: 1}
	const rows, reps = 2000, 201
	var counts [6]float64 // 0..4, 5+
	seedMix := mix64(42)
	for id := range int64(rows) {
		key := rowKey(seedMix, id)
		for r := range reps {
			counts[min(poissonDraw(key, r), 5)]++
		}
	}
	n := float64(rows * reps)
	var chi2 float64
	for k := range counts {
		e := n * dist.Prob(float64(k))
		if k == 5 {
			e = n * dist.Survival(4)
		}
		chi2 += (counts[k] - e) * (counts[k] - e) / e
	}
	if crit := (distuv.ChiSquared{K: 5}).Quantile(1 - 1e-4); chi2 > crit {
		t.Errorf("chi-square %v > %v: counts %v", chi2, crit, counts)
	}
}

func TestReplicateSumsFollowTheDraws(t *testing.T) {
	// The batch kernel (replicates outer, inlined draws) must add exactly
	// the documented draw poissonDraw(rowKey(seed, id), r) per row: with
	// unit weights and d = 1 both replicate sums are Σ_rows k.
	for _, reps := range []int{1, 2, 7, 64} {
		a := mustPaired(t, 77, reps)
		ids := make([]int64, 2500) // more than one chunk
		d := make([]float64, len(ids))
		for i := range ids {
			ids[i], d[i] = int64(i*7-300), 1
		}
		if err := a.AddBatch(ids, d, nil); err != nil {
			t.Fatal(err)
		}
		for r := range reps {
			var want uint64
			for _, id := range ids {
				want += poissonDraw(rowKey(mix64(77), id), r)
			}
			wk, wkd := a.ReplicateSums(r)
			if wk != float64(want) || wkd != float64(want) {
				t.Errorf("R=%d replicate %d: sums %v, %v, want %d", reps, r, wk, wkd, want)
			}
		}
	}
}
