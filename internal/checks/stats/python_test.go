package stats

import (
	"bytes"
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"testing"
)

// debianPython is the interpreter that sees Debian's numpy 1.24, scipy
// 1.10 and scikit-learn 1.2 (another python3 may come first on PATH).
const debianPython = "/usr/bin/python3"

// runPython runs script with the JSON of in written to a temp file whose
// path is the script's argv[1], and decodes its stdout JSON into out. When
// the interpreter or its libraries are missing it skips, or fails when the
// CI environment variable is set.
func runPython(t *testing.T, script string, in, out any) {
	t.Helper()
	runPythonWith(t, "numpy, scipy, sklearn, mpmath", script, in, out)
}

// runPythonWith is runPython for a script that imports only modules (a
// comma-separated list).
func runPythonWith(t *testing.T, modules, script string, in, out any) {
	t.Helper()
	probe := exec.Command(debianPython, "-c", "import "+modules)
	if msg, err := probe.CombinedOutput(); err != nil {
		if os.Getenv("CI") != "" {
			t.Fatalf("%s with %s is required in CI: %v\n%s", debianPython, modules, err, msg)
		}
		t.Skipf("%s with %s not available: %v", debianPython, modules, err)
	}
	data, err := json.Marshal(in)
	if err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(t.TempDir(), "in.json")
	if err := os.WriteFile(path, data, 0o600); err != nil {
		t.Fatal(err)
	}
	cmd := exec.Command(debianPython, "-c", script, path)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	stdout, err := cmd.Output()
	if err != nil {
		t.Fatalf("python: %v\n%s", err, stderr.String())
	}
	if err := json.Unmarshal(stdout, out); err != nil {
		t.Fatalf("decoding python output %q: %v", stdout, err)
	}
}

// crossScript computes the reference numbers with scikit-learn 1.2.1,
// scipy 1.10.1, numpy 1.24 and mpmath (for the t quantile: scipy 1.10's
// t.ppf is off by up to ~1e-10 relative, see TestTQuantile).
const crossScript = `
import json, sys
import numpy as np
from scipy import stats
from sklearn.metrics import log_loss, roc_auc_score
import mpmath
d = json.load(open(sys.argv[1]))
y, p, w = np.array(d["y"]), np.array(d["p"]), np.array(d["w"])
out = {}
out["logloss"] = log_loss(y, p, eps=1e-15)
out["logloss_w"] = log_loss(y, p, eps=1e-15, sample_weight=w)
out["auc"] = roc_auc_score(y, p)
out["auc_w"] = roc_auc_score(y, p, sample_weight=w)
b, c = np.array(d["lossB"]), np.array(d["lossC"])
r = stats.ttest_rel(c, b)
out["t_rel"], out["p_rel"] = float(r.statistic), float(r.pvalue)
diff = c - b
m = d["margin"]
r = stats.ttest_1samp(diff, m, alternative="less")
out["t_ni"], out["p_ni"] = float(r.statistic), float(r.pvalue)
n = len(diff)
se = np.std(diff, ddof=1) / np.sqrt(n)
mpmath.mp.dps = 40
nu = mpmath.mpf(n - 1)
q = mpmath.findroot(lambda x: 1 - mpmath.betainc(nu/2, 0.5, 0, nu/(nu + x*x), regularized=True)/2 - mpmath.mpf(0.95), 1.6)
out["upper"] = float(np.mean(diff) + float(q) * se)
out["quantiles"] = [float(np.quantile(np.array(d["x"]), qq)) for qq in d["qs"]]
bq, bt = np.array(d["bq"]), np.array(d["bt"])
e = -(bt * np.log(bq) + (1 - bt) * np.log(1 - bq))
out["bce_all"] = [float(v) for v in e.mean(axis=1)]
out["bce_nz"] = [float(e[i][bt[i] != 0].mean()) for i in range(len(bt))]
print(json.dumps(out))
`

func TestCrossCheckWithPython(t *testing.T) {
	rng := newTestRand(99)
	const n, nPaired = 3000, 500
	p32, y32, w32 := make([]float32, n), make([]float32, n), make([]float32, n)
	for i := range n {
		logit := rng.NormFloat64() * 2
		p := 1 / (1 + math.Exp(-logit))
		switch {
		case i%400 == 0:
			p = 0 // clipped
		case i%400 == 1:
			p = 1
		case i%3 == 0:
			p = math.Round(p*50) / 50 // many exact ties for AUC
		}
		p32[i] = float32(p)
		if rng.Float64() < 1/(1+math.Exp(-logit*0.8)) {
			y32[i] = 1
		}
		w32[i] = float32(0.1 + 2*rng.Float64())
	}
	scored := makeScored(100, nPaired)
	x := make([]float64, 257)
	for i := range x {
		x[i] = rng.ExpFloat64() - 0.5
	}
	qs := []float64{0, 0.01, 0.05, 0.25, 0.5, 0.9, 0.95, 0.975, 0.999, 1}
	const rows, width = 20, 30
	bq, bt := make([][]float64, rows), make([][]float64, rows)
	bq32, bt32 := make([]float32, rows*width), make([]float32, rows*width)
	for i := range rows {
		bq[i], bt[i] = make([]float64, width), make([]float64, width)
		for j := range width {
			v := float32(0.001 + 0.998*rng.Float64())
			var tv float32
			if j == i%width || rng.Float64() < 0.15 { // every row has a nonzero
				tv = float32(rng.Intn(4)+1) / 4
			}
			bq32[i*width+j], bt32[i*width+j] = v, tv
			bq[i][j], bt[i][j] = float64(v), float64(tv)
		}
	}
	const margin = 0.003
	in := map[string]any{
		"y": widen(y32), "p": widen(p32), "w": widen(w32),
		"lossB": scored.lossB, "lossC": scored.lossC, "margin": margin,
		"x": x, "qs": qs, "bq": bq, "bt": bt,
	}
	var out struct {
		LogLoss         float64 `json:"logloss"`
		LogLossWeighted float64 `json:"logloss_w"`
		AUC             float64 `json:"auc"`
		AUCW            float64 `json:"auc_w"`
		TRel            float64 `json:"t_rel"`
		PRel            float64 `json:"p_rel"`
		TNI             float64 `json:"t_ni"`
		PNI             float64 `json:"p_ni"`
		Upper           float64 `json:"upper"`
		Quantiles       []float64
		BCEAll          []float64 `json:"bce_all"`
		BCENZ           []float64 `json:"bce_nz"`
	}
	runPython(t, crossScript, in, &out)

	// scikit-learn 1.2.1 log_loss(eps=1e-15) and roc_auc_score.
	unit, weighted := NewBinary(), NewBinary()
	if err := unit.AddBatch(p32, y32, nil); err != nil {
		t.Fatal(err)
	}
	if err := weighted.AddBatch(p32, y32, w32); err != nil {
		t.Fatal(err)
	}
	near(t, "log loss vs sklearn", unit.LogLoss(), out.LogLoss, rel)
	near(t, "weighted log loss vs sklearn", weighted.LogLoss(), out.LogLossWeighted, rel)
	exact, _ := ExactAUC(p32, y32, nil)
	exactW, _ := ExactAUC(p32, y32, w32)
	near(t, "exact AUC vs sklearn", exact, out.AUC, rel)
	near(t, "weighted exact AUC vs sklearn", exactW, out.AUCW, rel)
	for _, c := range []struct {
		b    *Binary
		want float64
	}{{unit, out.AUC}, {weighted, out.AUCW}} {
		auc, bound := c.b.AUC()
		if math.Abs(auc-c.want) > bound+1e-12 {
			t.Errorf("histogram AUC %v, sklearn %v, bound %v", auc, c.want, bound)
		}
	}

	// scipy 1.10.1 ttest_rel and ttest_1samp(alternative="less"); the
	// p-values go through gonum's t CDF (tolerance: see tDistTol).
	a := mustPaired(t, 3, 0)
	if err := a.AddBatch(scored.ids, scored.diffs(0, nPaired), nil); err != nil {
		t.Fatal(err)
	}
	tt, df, p := a.TTest()
	near(t, "paired t vs scipy", tt, out.TRel, rel)
	near(t, "paired p vs scipy", p, out.PRel, tDistTol(df))
	r, err := a.NonInferiority(margin, 0.95)
	if err != nil {
		t.Fatal(err)
	}
	near(t, "NI t vs scipy", r.T, out.TNI, rel)
	near(t, "NI p vs scipy", r.P, out.PNI, tDistTol(df))
	near(t, "NI upper vs numpy+mpmath", r.Upper, out.Upper, tDistTol(df))

	// numpy 1.24 np.quantile (default method).
	for i, q := range qs {
		near(t, "quantile vs numpy", Quantile(x, q), out.Quantiles[i], rel)
	}

	// numpy 1.24 BCE per row.
	for i := range rows {
		all, nz := BCE(bq32[i*width:(i+1)*width], bt32[i*width:(i+1)*width])
		near(t, "BCE all vs numpy", all, out.BCEAll[i], rel)
		near(t, "BCE nonzero vs numpy", nz, out.BCENZ[i], rel)
	}
}
