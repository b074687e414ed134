package pyexport

import (
	"bufio"
	"bytes"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"sort"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/clitest"
)

func TestMain(m *testing.M) { clitest.Main(m) }

// inCI is true when .ci/run (CI=true) or a caller (MODELGATE_CI) says the
// run is CI's: there a missing framework is a failure, not a skip.
func inCI() bool { return os.Getenv("CI") != "" || os.Getenv("MODELGATE_CI") != "" }

// python is the interpreter with the frameworks: MODELGATE_PYTHON, else
// Debian's /usr/bin/python3 (where the apt packages install), else python3.
func python(t *testing.T) string {
	t.Helper()
	if p := os.Getenv("MODELGATE_PYTHON"); p != "" {
		return p
	}
	if _, err := os.Stat("/usr/bin/python3"); err == nil {
		return "/usr/bin/python3"
	}
	p, err := exec.LookPath("python3")
	if err != nil {
		missing(t, "python3")
	}
	return p
}

func missing(t *testing.T, what string) {
	t.Helper()
	if inCI() {
		t.Fatalf("%s is not available: CI installs it (.ci/run), so this is a failure", what)
	}
	t.Skipf("%s is not available (outside CI the test skips; CI fails)", what)
}

// need fails (CI) or skips (elsewhere) unless python can import modules.
func need(t *testing.T, modules ...string) string {
	t.Helper()
	py := python(t)
	for _, m := range modules {
		if out, err := exec.Command(py, "-c", "import "+m).CombinedOutput(); err != nil {
			missing(t, fmt.Sprintf("python module %s (%s: %s)", m, py, strings.TrimSpace(string(out))))
		}
	}
	return py
}

// readOutputs reads a score --out .jsonl file: row_id -> the values of the
// columns in name order (layer, or layer_0, layer_1, ...).
func readOutputs(t *testing.T, path string) map[int64][]float64 {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	out := map[int64][]float64{}
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		var row map[string]float64
		if err := json.Unmarshal(sc.Bytes(), &row); err != nil {
			t.Fatalf("%s: %v", path, err)
		}
		id := int64(row["row_id"])
		delete(row, "row_id")
		keys := make([]string, 0, len(row))
		for k := range row {
			keys = append(keys, k)
		}
		sort.Slice(keys, func(i, j int) bool { return colIndex(keys[i]) < colIndex(keys[j]) })
		for _, k := range keys {
			out[id] = append(out[id], row[k])
		}
	}
	return out
}

func colIndex(k string) int {
	i := strings.LastIndexByte(k, '_')
	var n int
	if i < 0 || func() bool { _, err := fmt.Sscanf(k[i+1:], "%d", &n); return err != nil }() {
		return -1
	}
	return n
}

// compare checks the runtime's outputs against the framework's, row by
// row, within abs + rel*|want|, and returns the largest deviation. extra
// is how many trailing runtime outputs have no framework counterpart (the
// reconstruction of the unknown-id bucket).
func compare(t *testing.T, what string, got map[int64][]float64, want [][]float64, abs, rel float64, extra int) float64 {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("%s: runtime scored %d rows, the framework %d", what, len(got), len(want))
	}
	worst := 0.0
	for i, w := range want {
		g := got[int64(i)]
		if len(g) != len(w)+extra {
			t.Fatalf("%s row %d: runtime width %d, framework %d", what, i, len(g), len(w))
		}
		for j := range w {
			d := math.Abs(g[j] - w[j])
			worst = math.Max(worst, d)
			if d > abs+rel*math.Abs(w[j]) {
				t.Fatalf("%s row %d output %d: runtime %.9g, framework %.9g (deviation %.3g > %.3g + %.3g|want|)", what, i, j, g[j], w[j], d, abs, rel)
			}
		}
	}
	return worst
}

type reference struct {
	Framework       string      `json:"framework"`
	Reference       string      `json:"reference"`
	Rows            int         `json:"rows"`
	Code            [][]float64 `json:"code"`
	Reconstruction  [][]float64 `json:"reconstruction"`
	P               [][]float64 `json:"p"`
	PLogreg         [][]float64 `json:"p_logreg"`
	Refused         *string     `json:"refused"`
	Ops             []string    `json:"ops"`
	GatherBagMaxAbs *float64    `json:"gatherBagMaxAbs"`
	StateDictMaxAbs *float64    `json:"stateDictMaxAbs"`
	TorchRefusals   []*string   `json:"torchRefusals"`
}

// policy is a first-release policy for promo-scorer-FW:prod: the holdout
// the journey wrote, the scorer tied to the encoder tag it was trained on,
// probes that must show values bound to ids, thresholds a model that
// learned something clears (the journey's labels depend on the true-crime
// shows played and tenure; predicting the base rate gives normalized
// entropy 1 and AUC 0.5).
func policy(t *testing.T, dir, fw string) string {
	t.Helper()
	doc := map[string]any{
		"schemaVersion": 1, "name": "journey-" + fw,
		"rules": []any{map[string]any{
			"target": "promo-scorer-" + fw + ":prod", "kind": "scorer", "holdout": "promo-holdout-" + fw + ":v1",
			"checks": map[string]any{
				"freeze": map[string]any{"encoderTag": "listener-encoder-" + fw + ":v1"},
				// The package's probes must show values bound to ids on their own:
				// rotation may leave no probe unchanged. One extra random row only
				// (the minimum): the contract's random rows are not the package's.
				"contract": map[string]any{"requireDistinctValuesProbes": true, "extraRows": map[string]any{"count": 1, "seed": 1}},
				"holdout":  map[string]any{"maxLogLoss": 0.69, "maxNormalizedEntropy": 0.97, "minAUC": 0.6, "maxECE": 0.15},
			},
		}},
	}
	b, _ := json.MarshalIndent(doc, "", "  ")
	p := filepath.Join(dir, "policy-"+fw+".json")
	if err := os.WriteFile(p, b, 0o644); err != nil {
		t.Fatal(err)
	}
	return p
}

type gateOut struct {
	Report gateReport `json:"report"`
}

type gateReport struct {
	Verdict string `json:"verdict"`
	Checks  []struct {
		Name     string `json:"name"`
		Status   string `json:"status"`
		Findings []struct {
			Code  string `json:"code"`
			Where string `json:"where"`
		} `json:"findings"`
	} `json:"checks"`
}

func gate(t *testing.T, store, cand, fw, pol string) (int, gateReport) {
	t.Helper()
	r := clitest.MG(t, store, "gate", "--json", "--no-push", cand, "--to", "promo-scorer-"+fw+":prod", "--policy", pol)
	var g gateOut
	if err := json.Unmarshal([]byte(r.Stdout), &g); err != nil {
		t.Fatalf("gate --json: %v\n%s\n%s", err, r.Stdout, r.Stderr)
	}
	return r.Code, g.Report
}

// TestJourney trains tiny models in each framework, exports them with the
// Python package, pushes, scores and gates them, and compares the
// runtime's outputs with the framework's own forward pass.
func TestJourney(t *testing.T) {
	if testing.Short() {
		t.Skip("trains models in Python")
	}
	for _, c := range []struct {
		fw      string
		modules []string
		// Tolerances of the comparison: the runtime computes in float32 on
		// float32 weights; the numpy and scikit-learn references in
		// float64 (the weights stored as float32 move the outputs by up to
		// ~1e-7 relative per product), PyTorch in float32 with its own
		// summation order.
		abs, rel float64
	}{
		{"numpy", []string{"numpy"}, 2e-5, 1e-4},
		{"torch", []string{"numpy", "torch"}, 2e-5, 1e-4},
		{"sklearn", []string{"numpy", "sklearn"}, 2e-5, 1e-4},
		{"onnx", []string{"numpy", "torch", "onnx"}, 2e-5, 1e-4},
	} {
		t.Run(c.fw, func(t *testing.T) {
			py := need(t, c.modules...)
			dir := t.TempDir()
			out, store := filepath.Join(dir, "out"), filepath.Join(dir, "store")
			cmd := exec.Command(py, filepath.Join("..", "..", "python", "tests", "journey.py"), out, c.fw)
			if b, err := cmd.CombinedOutput(); err != nil {
				t.Fatalf("journey.py %s: %v\n%s", c.fw, err, b)
			}
			var ref reference
			b, err := os.ReadFile(filepath.Join(out, "reference.json"))
			if err != nil {
				t.Fatal(err)
			}
			if err := json.Unmarshal(b, &ref); err != nil {
				t.Fatal(err)
			}
			t.Logf("outside reference: %s", ref.Reference)

			encTag, scTag := "listener-encoder-"+c.fw+":v1", "promo-scorer-"+c.fw+":c1"
			encDigest := strings.TrimSpace(clitest.MustMG(t, store, "push", filepath.Join(out, "encoder"), encTag).Stdout)
			// The scorer's directory names its encoder by tag; push pins the digest.
			var pushed struct {
				EncoderPinned struct{ Name, Digest string } `json:"encoderPinned"`
			}
			if err := json.Unmarshal([]byte(clitest.MustMG(t, store, "push", "--json", filepath.Join(out, "scorer"), scTag).Stdout), &pushed); err != nil {
				t.Fatal(err)
			}
			if pushed.EncoderPinned.Name != encTag || pushed.EncoderPinned.Digest != encDigest {
				t.Fatalf("push pinned %+v, want %s -> %s", pushed.EncoderPinned, encTag, encDigest)
			}
			hold := filepath.Join(out, "holdout.jsonl")
			clitest.MustMG(t, store, "push", "--kind", "holdout", hold, "promo-holdout-"+c.fw+":v1")

			score := func(ref, layer string) map[int64][]float64 {
				p := filepath.Join(dir, strings.NewReplacer(":", "_", "/", "_").Replace(ref)+layer+".jsonl")
				args := []string{"score", ref, "--holdout", hold, "--out", p}
				if layer != "" {
					args = append(args, "--layer", layer)
				}
				clitest.MustMG(t, store, args...)
				return readOutputs(t, p)
			}
			// Outside reference: the framework's forward pass (ref.Reference names it).
			d := compare(t, c.fw+" encoder code", score(encTag, ""), ref.Code, c.abs, c.rel, 0)
			t.Logf("%s code: max |runtime - %s| = %.3g over %d rows", c.fw, c.fw, d, ref.Rows)
			if ref.Reconstruction != nil {
				// Outside reference: the framework's reconstruction (numpy: code @ W.T + mean; scikit-learn: inverse_transform).
				// The runtime's last column reconstructs the unknown-id bucket, which the framework does not have.
				d = compare(t, c.fw+" encoder reconstruction", score(encTag, "reconstruction"), ref.Reconstruction, c.abs, c.rel, 1)
				t.Logf("%s reconstruction: max deviation %.3g", c.fw, d)
			}
			// Outside reference: the framework's predicted probability.
			d = compare(t, c.fw+" scorer p", score(scTag, ""), ref.P, c.abs, c.rel, 0)
			t.Logf("%s p: max deviation %.3g", c.fw, d)

			pol := policy(t, dir, c.fw)
			code, g := gate(t, store, scTag, c.fw, pol)
			if code != 0 || g.Verdict != "pass" {
				t.Fatalf("gate of the %s scorer: exit %d, verdict %q, checks %+v", c.fw, code, g.Verdict, g.Checks)
			}
			for _, ch := range g.Checks {
				if ch.Name == "contract" && ch.Status != "PASS" {
					t.Fatalf("contract check %s: the probes the package chose should show values bound to ids: %+v", ch.Status, ch.Findings)
				}
			}

			switch c.fw {
			case "sklearn":
				// Outside reference: scikit-learn's LogisticRegression.predict_proba.
				clitest.MustMG(t, store, "push", filepath.Join(out, "scorer-logreg"), "promo-scorer-sklearn:logreg")
				d = compare(t, "sklearn logistic regression p", score("promo-scorer-sklearn:logreg", ""), ref.PLogreg, c.abs, c.rel, 0)
				t.Logf("sklearn logreg p: max deviation %.3g", d)
			case "torch":
				// The same modules read as state_dicts give the same model.
				if ref.StateDictMaxAbs == nil || *ref.StateDictMaxAbs != 0 {
					t.Fatalf("the scorer from state_dicts differs from the one from modules by %v", ref.StateDictMaxAbs)
				}
				// An EmbeddingBag that averages and a LayerNorm are refused by name.
				if len(ref.TorchRefusals) != 2 || ref.TorchRefusals[0] == nil || !strings.Contains(*ref.TorchRefusals[0], `mode="sum"`) ||
					ref.TorchRefusals[1] == nil || !strings.Contains(*ref.TorchRefusals[1], "LayerNorm") {
					t.Fatalf("torch modules the runtime cannot compute: refusals %v", ref.TorchRefusals)
				}
			case "onnx":
				if ref.Refused == nil || !strings.Contains(*ref.Refused, "promo_softmax") || !strings.Contains(*ref.Refused, "Softmax") {
					t.Fatalf("a graph with a Softmax node: refused %v, want the node named", ref.Refused)
				}
				// Outside reference for the Gather + ReduceSum bag: numpy's take and sum.
				if ref.GatherBagMaxAbs == nil || *ref.GatherBagMaxAbs > 1e-12 {
					t.Fatalf("the Gather+ReduceSum bag graph read back differs from numpy by %v", ref.GatherBagMaxAbs)
				}
				t.Logf("onnx operators in the exported graphs: %v", ref.Ops)
			}
			// Training-only state is recorded, so the gate's freeze check sees it.
			if _, err := os.Stat(filepath.Join(out, "scorer-trainstate")); err == nil {
				clitest.MustMG(t, store, "push", filepath.Join(out, "scorer-trainstate"), "promo-scorer-"+c.fw+":trainstate")
				code, g := gate(t, store, "promo-scorer-"+c.fw+":trainstate", c.fw, pol)
				slots, regs := 0, 0
				for _, ch := range g.Checks {
					if ch.Name != "freeze" {
						continue
					}
					for _, f := range ch.Findings {
						switch f.Code {
						case "freeze.optimizer-slot":
							slots++
						case "freeze.regularization":
							regs++
						}
					}
				}
				if code != 1 || slots == 0 || regs == 0 {
					t.Fatalf("gate of the %s scorer with its training state: exit %d, %d optimizer-slot and %d regularization findings; want exit 1 and both", c.fw, code, slots, regs)
				}
				t.Logf("%s scorer with training state: freeze fails with %d optimizer-slot and %d regularization findings", c.fw, slots, regs)
			}
		})
	}
}

// TestExamples installs the package with pip from a copy of python/ and
// runs the README's example for each framework against the installed
// copy: every example must appear verbatim in the README, write a model
// directory push accepts (the scorer naming its encoder by tag), and a
// scorer the gate passes (scikit-learn's once frozen: its penalty is
// recorded as training state).
func TestExamples(t *testing.T) {
	if testing.Short() {
		t.Skip("trains models in Python")
	}
	py := need(t, "numpy", "pip", "setuptools")
	readme, err := os.ReadFile(filepath.Join("..", "..", "README.md"))
	if err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	src := filepath.Join(dir, "src")
	if err := os.CopyFS(src, os.DirFS(filepath.Join("..", "..", "python"))); err != nil {
		t.Fatal(err)
	}
	site := filepath.Join(dir, "site")
	if b, err := exec.Command(py, "-m", "pip", "install", "--quiet", "--no-deps", "--no-build-isolation", "--no-index", "--target", site, src).CombinedOutput(); err != nil {
		t.Fatalf("pip install python/: %v\n%s", err, b)
	}
	for _, c := range []struct {
		fw      string
		modules []string
	}{
		{"numpy", nil},
		{"torch", []string{"torch"}},
		{"sklearn", []string{"sklearn"}},
		{"onnx", []string{"torch", "onnx"}},
	} {
		t.Run(c.fw, func(t *testing.T) {
			need(t, c.modules...)
			example := filepath.Join(src, "examples", c.fw+"_example.py")
			text, err := os.ReadFile(example)
			if err != nil {
				t.Fatal(err)
			}
			if !bytes.Contains(readme, []byte("```python\n"+string(text)+"```\n")) {
				t.Fatalf("README.md does not show python/examples/%s_example.py verbatim", c.fw)
			}
			work := filepath.Join(dir, c.fw)
			if err := os.MkdirAll(work, 0o755); err != nil {
				t.Fatal(err)
			}
			run := func(script string) {
				cmd := exec.Command(py, script)
				cmd.Dir = work
				cmd.Env = append(os.Environ(), "PYTHONPATH="+site, "PYTHONDONTWRITEBYTECODE=1")
				if b, err := cmd.CombinedOutput(); err != nil {
					t.Fatalf("%s: %v\n%s", filepath.Base(script), err, b)
				}
			}
			if c.fw == "onnx" {
				run(filepath.Join(src, "examples", "make_onnx.py"))
			}
			run(example)
			store := filepath.Join(work, "store")
			fw := c.fw
			clitest.MustMG(t, store, "push", filepath.Join(work, "out", "encoder"), "listener-encoder-"+fw+":v1")
			// The examples name listener-encoder:v1; this store names the
			// encoder per framework, so the scorer's spec is pointed there.
			specPath := filepath.Join(work, "out", "scorer", "spec.json")
			spec, err := os.ReadFile(specPath)
			if err != nil {
				t.Fatal(err)
			}
			if !bytes.Contains(spec, []byte(`"name": "listener-encoder:v1"`)) || bytes.Contains(spec, []byte(`"digest"`)) {
				t.Fatalf("the scorer's spec should name its encoder by tag only:\n%s", spec)
			}
			if err := os.WriteFile(specPath, bytes.Replace(spec, []byte(`"listener-encoder:v1"`), []byte(`"listener-encoder-`+fw+`:v1"`), 1), 0o644); err != nil {
				t.Fatal(err)
			}
			r := clitest.MustMG(t, store, "push", filepath.Join(work, "out", "scorer"), "promo-scorer-"+fw+":cand")
			if !strings.Contains(r.Stderr, "encoder listener-encoder-"+fw+":v1 pinned") {
				t.Fatalf("push did not report the pinned encoder:\n%s", r.Stderr)
			}
			// The journey's holdout: listeners the examples never trained on.
			cmd := exec.Command(py, "-c", `import sys, modelgate_export as mx
_, rows, y = mx.sample.network(seed=2, listeners=240)
mx.write_holdout(sys.argv[1], rows, labels=y)`, filepath.Join(work, "holdout.jsonl"))
			cmd.Env = append(os.Environ(), "PYTHONPATH="+site)
			if b, err := cmd.CombinedOutput(); err != nil {
				t.Fatalf("holdout: %v\n%s", err, b)
			}
			clitest.MustMG(t, store, "push", "--kind", "holdout", filepath.Join(work, "holdout.jsonl"), "promo-holdout-"+fw+":v1")
			pol := policy(t, work, fw)
			cand := "promo-scorer-" + fw + ":cand"
			code, g := gate(t, store, cand, fw, pol)
			if fw == "sklearn" {
				regs := 0
				for _, ch := range g.Checks {
					for _, f := range ch.Findings {
						if f.Code == "freeze.regularization" {
							regs++
						}
					}
				}
				if code != 1 || regs != 1 {
					t.Fatalf("the LogisticRegression scorer with its penalty: gate exit %d, %d regularization findings; want exit 1 and one", code, regs)
				}
				clitest.MustMG(t, store, "freeze", cand, "--out", "promo-scorer-"+fw+":frozen")
				cand = "promo-scorer-" + fw + ":frozen"
				code, g = gate(t, store, cand, fw, pol)
			}
			if code != 0 || g.Verdict != "pass" {
				t.Fatalf("gate of %s: exit %d, verdict %q, checks %+v", cand, code, g.Verdict, g.Checks)
			}
		})
	}
}
