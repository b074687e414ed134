package demo

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/fit"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
)

// The default scenario is built once and shared by the tests that read it.
var (
	defaultOnce sync.Once
	defaultDir  string
	defaultSc   *Scenario
	defaultErr  error
)

func TestMain(m *testing.M) {
	code := m.Run()
	if defaultDir != "" {
		os.RemoveAll(defaultDir)
	}
	os.Exit(code)
}

func defaultScenario(t *testing.T) (string, *Scenario) {
	t.Helper()
	defaultOnce.Do(func() {
		defaultDir, defaultErr = os.MkdirTemp("", "modelgate-demo-")
		if defaultErr == nil {
			defaultSc, defaultErr = Build(defaultDir, DefaultConfig(), nil)
		}
	})
	if defaultErr != nil {
		t.Fatal(defaultErr)
	}
	return defaultDir, defaultSc
}

func smallConfig() Config {
	c := DefaultConfig()
	c.Shows, c.Train, c.Holdout, c.Extra = 600, 3000, 600, 1500
	c.Listening.AnomalyMin, c.Listening.AnomalyMax = 150, 500
	c.VocabularyMinListeners = 4
	c.WideCodeWidth = 48
	return c
}

func (s *Scenario) model(t *testing.T, name string) ScenarioModel {
	t.Helper()
	for _, m := range s.Models {
		if m.Name == name {
			return m
		}
	}
	t.Fatalf("scenario has no model %q", name)
	return ScenarioModel{}
}

func readModel(t *testing.T, dir, name string) *modeldir.Model {
	t.Helper()
	d, err := modeldir.Read(filepath.Join(dir, "models", name))
	if err != nil {
		t.Fatal(err)
	}
	return d.Model
}

// hashTree maps every file under dir (relative path) to its sha256.
func hashTree(t *testing.T, dir string) map[string]string {
	t.Helper()
	out := map[string]string{}
	err := filepath.WalkDir(dir, func(p string, e fs.DirEntry, err error) error {
		if err != nil || e.IsDir() {
			return err
		}
		b, err := os.ReadFile(p)
		if err != nil {
			return err
		}
		rel, _ := filepath.Rel(dir, p)
		h := sha256.Sum256(b)
		out[filepath.ToSlash(rel)] = hex.EncodeToString(h[:])
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return out
}

func TestBuildIsDeterministic(t *testing.T) {
	cfg := smallConfig()
	a, b := t.TempDir(), t.TempDir()
	if _, err := Build(a, cfg, nil); err != nil {
		t.Fatal(err)
	}
	var lines []string
	if _, err := Build(b, cfg, func(s string) { lines = append(lines, s) }); err != nil {
		t.Fatal(err)
	}
	if len(lines) == 0 {
		t.Error("no progress lines")
	}
	ha, hb := hashTree(t, a), hashTree(t, b)
	if len(ha) < 9*5+3 {
		t.Fatalf("only %d files written", len(ha))
	}
	for f, h := range ha {
		if hb[f] != h {
			t.Errorf("%s differs between two builds with the same seed", f)
		}
	}
	if len(ha) != len(hb) {
		t.Errorf("%d files vs %d", len(ha), len(hb))
	}
	// Another seed gives other models.
	cfg.Seed++
	c := t.TempDir()
	if _, err := Build(c, cfg, nil); err != nil {
		t.Fatal(err)
	}
	if hc := hashTree(t, c); hc["models/listener-encoder-v1/encoder.safetensors"] == ha["models/listener-encoder-v1/encoder.safetensors"] {
		t.Error("a different seed gave the same encoder")
	}
}

func TestBuildRefuses(t *testing.T) {
	dir := t.TempDir()
	if err := os.WriteFile(filepath.Join(dir, "x"), nil, 0o644); err != nil {
		t.Fatal(err)
	}
	if _, err := Build(dir, smallConfig(), nil); !errkind.Is(err, errkind.BadInput) {
		t.Errorf("non-empty directory: %v, want bad input", err)
	}
	cfg := smallConfig()
	cfg.WideCodeWidth = 5000
	if _, err := Build(t.TempDir(), cfg, nil); !errkind.Is(err, errkind.BadInput) {
		t.Errorf("wide code wider than the vocabulary: %v, want bad input", err)
	}
	cfg = smallConfig()
	cfg.Promoted = 0
	if _, err := Build(t.TempDir(), cfg, nil); !errkind.Is(err, errkind.BadInput) {
		t.Errorf("no promoted shows: %v, want bad input", err)
	}
}

// TestSparsityFacts checks the generated activity against a fact of the
// trade (shared notes on outside references: common practice, no
// published source): activity vectors are very sparse, a typical user
// touches a handful (about 4–5) of several thousand items, and a few
// anomalous users touch far more items than anyone else.
func TestSparsityFacts(t *testing.T) {
	cfg := DefaultConfig()
	d := Generate(cfg)
	regular, anomalies, maxRegular, minAnomalous := 0, 0, 0, cfg.Shows
	nonzeros := 0
	for _, set := range [][]Listener{d.Train, d.Holdout, d.Extra} {
		for i := range set {
			l := &set[i]
			seen := map[int]bool{}
			for _, j := range l.Items {
				if seen[j] {
					t.Fatalf("listener %s lists show %d twice", l.ID, j)
				}
				seen[j] = true
			}
			if l.Anomalous {
				anomalies++
				minAnomalous = min(minAnomalous, len(l.Items))
				continue
			}
			regular++
			nonzeros += len(l.Items)
			maxRegular = max(maxRegular, len(l.Items))
		}
	}
	// Common practice, no published source: about 4–5 items per user, out
	// of several thousand.
	if mean := float64(nonzeros) / float64(regular); mean < 4 || mean > 5 {
		t.Errorf("mean shows per regular listener %.2f, want about 4–5", mean)
	}
	if len(d.Shows) < 2000 {
		t.Errorf("catalogue of %d shows, want several thousand", len(d.Shows))
	}
	// Common practice, no published source: a few anomalous users, each
	// touching far more items than anyone else.
	total := len(d.Train) + len(d.Holdout) + len(d.Extra)
	if anomalies == 0 || float64(anomalies) > 0.01*float64(total) {
		t.Errorf("%d anomalous listeners of %d, want a few", anomalies, total)
	}
	if minAnomalous < 2*maxRegular {
		t.Errorf("the lightest anomalous listener touches %d shows, the heaviest regular one %d", minAnomalous, maxRegular)
	}
	if d.Shows[42].ID != "show-00042" {
		t.Errorf("show 42 is %q", d.Shows[42].ID)
	}
}

func TestScenarioShape(t *testing.T) {
	dir, sc := defaultScenario(t)
	pushed := map[string]ScenarioModel{}
	for _, m := range sc.Models {
		d, err := modeldir.Check(filepath.Join(dir, m.Path))
		if err != nil {
			t.Fatal(err)
		}
		_, dg, err := artifact.ModelManifest(d)
		if err != nil {
			t.Fatal(err)
		}
		if dg.String() != m.Digest {
			t.Errorf("%s: scenario digest %s, manifest %s", m.Name, m.Digest, dg)
		}
		if m.Kind == model.KindScorer {
			enc, ok := pushed[m.Encoder]
			if !ok {
				t.Errorf("%s comes before its encoder %q", m.Name, m.Encoder)
			}
			if got := d.Model.Spec.Encoder.Digest; got != enc.Digest {
				t.Errorf("%s refers to encoder %s, its encoder %s has digest %s", m.Name, got, m.Encoder, enc.Digest)
			}
			if m.HoldoutLogLoss <= 0 {
				t.Errorf("%s: no holdout log loss", m.Name)
			}
		}
		pushed[m.Name] = m
	}
	if len(pushed) != 10 {
		t.Errorf("%d models, want 10", len(pushed))
	}
	if m := sc.model(t, CandEncoderV2); m.Encoder != EncoderV2 || m.Fails != "" {
		t.Errorf("the scorer refitted on encoder v2: encoder %q, fails %q", m.Encoder, m.Fails)
	}
	if sc.Prod["promo-scorer:prod"] != ScorerBaseline || sc.Prod["listener-encoder:prod"] != EncoderV1 {
		t.Errorf("prod tags %v", sc.Prod)
	}
	for _, h := range sc.Holdouts {
		if _, err := os.Stat(filepath.Join(dir, h.Path)); err != nil || h.Rows != DefaultConfig().Holdout {
			t.Errorf("holdout %s: %v, %d rows", h.Path, err, h.Rows)
		}
	}
	raw, err := os.ReadFile(filepath.Join(dir, ScenarioFile))
	if err != nil || !bytes.Contains(raw, []byte(`"promo-scorer:cand-better"`)) {
		t.Errorf("scenario.json: %v", err)
	}
	// The demo policy's budget is 512 KiB (policies/promo-scorer.yaml).
	if ob, base := sc.model(t, CandOverBudget), sc.model(t, ScorerBaseline); ob.ServedBytes < 2*base.ServedBytes || ob.ServedBytes <= 512<<10 {
		t.Errorf("over-budget candidate serves %d bytes, baseline %d: want more than 512 KiB and twice the baseline", ob.ServedBytes, base.ServedBytes)
	}
	if v1, v2 := sc.model(t, EncoderV1), sc.model(t, EncoderV2); !(v2.ReconstructionError <= v1.ReconstructionError) {
		t.Errorf("encoder v2 reconstruction error %v > v1's %v", v2.ReconstructionError, v1.ReconstructionError)
	}
}

func TestCandidateLogLossOrder(t *testing.T) {
	_, sc := defaultScenario(t)
	better, base, worse := sc.model(t, CandBetter), sc.model(t, ScorerBaseline), sc.model(t, CandWorse)
	for _, m := range sc.Models {
		t.Logf("%-32s log loss %.5f  reconstruction %.4f  tensor bytes %7d  served bytes %7d", m.Name, m.HoldoutLogLoss, m.ReconstructionError, m.TensorBytes, m.ServedBytes)
	}
	if !(better.HoldoutLogLoss < base.HoldoutLogLoss-0.005) {
		t.Errorf("better candidate %.5f not clearly below the baseline %.5f", better.HoldoutLogLoss, base.HoldoutLogLoss)
	}
	if v2 := sc.model(t, CandEncoderV2); !(v2.HoldoutLogLoss < base.HoldoutLogLoss-0.005) {
		t.Errorf("the scorer refitted on encoder v2 %.5f not clearly below the baseline %.5f", v2.HoldoutLogLoss, base.HoldoutLogLoss)
	}
	if !(worse.HoldoutLogLoss > base.HoldoutLogLoss+0.005) {
		t.Errorf("worse candidate %.5f not clearly above the baseline %.5f", worse.HoldoutLogLoss, base.HoldoutLogLoss)
	}
	// The candidates built to fail freeze and budget compute the better
	// candidate's function: the first exactly (float64 reference forward),
	// the second up to the rounding of its re-expressed head.
	if tr := sc.model(t, CandTrainableEncoder); math.Abs(tr.HoldoutLogLoss-better.HoldoutLogLoss) > 1e-12 {
		t.Errorf("trainable-encoder candidate %.6f should predict like the better candidate %.6f", tr.HoldoutLogLoss, better.HoldoutLogLoss)
	}
	if ob := sc.model(t, CandOverBudget); math.Abs(ob.HoldoutLogLoss-better.HoldoutLogLoss) > 1e-6 {
		t.Errorf("over-budget candidate %.8f should predict like the better candidate %.8f", ob.HoldoutLogLoss, better.HoldoutLogLoss)
	}
}

// runtimeNet compiles a scorer or encoder directory with the gate's runtime.
func runtimeNet(t *testing.T, dir, name string) (*model.Net, *modeldir.Model) {
	t.Helper()
	m := readModel(t, dir, name)
	var enc *model.Encoder
	if r := m.Spec.Encoder; r != nil && !r.Embedded {
		em := readModel(t, dir, map[string]string{"listener-encoder:v1": EncoderV1, "listener-encoder:v2": EncoderV2, "listener-encoder:wide": EncoderWide}[r.Name])
		enc = &model.Encoder{Spec: em.Spec, Weights: em.Tensors}
	}
	net, err := model.Compile(m.Spec, m.Tensors, enc)
	if err != nil {
		t.Fatalf("%s: %v", name, err)
	}
	return net, m
}

// TestHoldoutLogLossWithRuntime reads the holdout file with package data
// and scores it with the gate's float32 runtime: the log loss must match
// the figure the training side's float64 forward pass computed.
func TestHoldoutLogLossWithRuntime(t *testing.T) {
	dir, sc := defaultScenario(t)
	for _, name := range []string{ScorerBaseline, CandBetter, CandWorse, CandShuffledVocab, CandTrainableEncoder, CandOverBudget, CandEncoderV2} {
		net, m := runtimeNet(t, dir, name)
		in := m.Spec.Inputs.Sparse[0]
		vocab, err := data.ParseVocabulary(strings.NewReader(strings.Join(m.Vocabulary, "\n")+"\n"), in)
		if err != nil {
			t.Fatal(err)
		}
		r, err := data.Open(filepath.Join(dir, ScorerHoldoutPath), data.Options{Spec: m.Spec, Vocab: vocab, RequireLabels: true})
		if err != nil {
			t.Fatal(err)
		}
		runner := net.NewRunner(1)
		var f data.Frame
		var out []float32
		total, n := 0.0, 0
		for {
			k, err := r.Read(&f, 1024)
			if errors.Is(err, io.EOF) {
				break
			}
			if err != nil {
				t.Fatal(err)
			}
			out, err = runner.Run(&f.Batch, lP, out)
			if err != nil {
				t.Fatal(err)
			}
			for i := 0; i < k; i++ {
				total += logLoss(float64(f.Labels[i]), float64(out[i]))
				n++
			}
		}
		r.Close()
		runner.Close()
		got, want := total/float64(n), sc.model(t, name).HoldoutLogLoss
		if math.Abs(got-want) > 1e-5 {
			t.Errorf("%s: runtime log loss %.7f, training side %.7f", name, got, want)
		}
	}
}

// TestProbes checks the probe rows' coverage and that the gate's runtime
// reproduces them — except for the shuffled-vocabulary candidate, whose
// probes were computed with the true mapping.
func TestProbes(t *testing.T) {
	dir, sc := defaultScenario(t)
	for _, sm := range sc.Models {
		net, m := runtimeNet(t, dir, sm.Name)
		if len(m.Probes) != 16 {
			t.Errorf("%s: %d probes", sm.Name, len(m.Probes))
		}
		var empty, dup, unknown, distinct bool
		known := map[string]int{}
		for i, id := range m.Vocabulary {
			known[id] = i
		}
		runner := net.NewRunner(1)
		worst := 0.0
		for _, p := range m.Probes {
			ids := map[string]bool{}
			vals := map[float32]bool{}
			b := model.Batch{Indptr: []int32{0}, Dense: map[string][]float32{}}
			for i, id := range p.Items {
				if ids[id] {
					dup = true
				}
				ids[id] = true
				vals[p.Values[i]] = true
				k, ok := known[id]
				if !ok {
					unknown = true
					k = m.Spec.Inputs.Sparse[0].VocabularySize
				}
				b.Indices = append(b.Indices, int32(k))
				b.Values = append(b.Values, p.Values[i])
			}
			b.Indptr = append(b.Indptr, int32(len(b.Indices)))
			empty = empty || len(p.Items) == 0
			distinct = distinct || len(vals) >= 2
			for k, v := range p.Dense {
				b.Dense[k] = v
			}
			for layer, want := range p.Expect {
				got, err := runner.Run(&b, layer, nil)
				if err != nil {
					t.Fatalf("%s: %s: %v", sm.Name, layer, err)
				}
				if len(got) != len(want) {
					t.Fatalf("%s: %s: %d outputs, probe has %d", sm.Name, layer, len(got), len(want))
				}
				for i := range got {
					worst = math.Max(worst, math.Abs(float64(got[i])-float64(want[i]))/(1+math.Abs(float64(want[i]))))
				}
			}
		}
		runner.Close()
		if !empty || !dup || !unknown || !distinct {
			t.Errorf("%s: probes cover empty %v, duplicate ids %v, unknown id %v, ≥2 distinct values %v", sm.Name, empty, dup, unknown, distinct)
		}
		t.Logf("%s: largest relative difference between runtime and probes %.3g", sm.Name, worst)
		if sm.Name == CandShuffledVocab {
			if worst < 1e-2 {
				t.Errorf("shuffled vocabulary: runtime agrees with the probes (worst difference %.3g)", worst)
			}
		} else if bound := probeBound(sm.Name); worst > bound {
			t.Errorf("%s: runtime differs from the probes by %.3g (relative), bound %.3g", sm.Name, worst, bound)
		}
	}
}

// probeBound is how far the runtime (float32) may be from a model's float64
// probe outputs, relative. The over-budget candidate's output sums 8,192
// float32 products, and the rounding error of a sum grows with its length
// (Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed. 2002,
// §4.2: |error| ≤ γ_{n−1}·Σ|terms|, γ_n = nu/(1−nu), u = 2⁻²⁴ in float32), so
// it is held to the demo policy's relative probe tolerance (1e-4,
// policies/promo-scorer.yaml) instead of 1e-5.
func probeBound(name string) float64 {
	if name == CandOverBudget {
		return 1e-4
	}
	return 1e-5
}

func TestShuffledVocabulary(t *testing.T) {
	dir, _ := defaultScenario(t)
	base, shuf := readModel(t, dir, ScorerBaseline), readModel(t, dir, CandShuffledVocab)
	moved := 0
	for i := range base.Vocabulary {
		if base.Vocabulary[i] != shuf.Vocabulary[i] {
			moved++
		}
	}
	if moved < len(base.Vocabulary)*9/10 {
		t.Errorf("only %d of %d vocabulary lines moved", moved, len(base.Vocabulary))
	}
	if a, b := slices.Sorted(slices.Values(base.Vocabulary)), slices.Sorted(slices.Values(shuf.Vocabulary)); !slices.Equal(a, b) {
		t.Error("the shuffled vocabulary holds other ids")
	}
	for _, f := range []string{headFile} {
		a, _ := os.ReadFile(filepath.Join(dir, "models", ScorerBaseline, f))
		b, _ := os.ReadFile(filepath.Join(dir, "models", CandShuffledVocab, f))
		if len(a) == 0 || !bytes.Equal(a, b) {
			t.Errorf("%s differs from the baseline's", f)
		}
	}
	if fmt.Sprint(base.Spec.Inputs, base.Spec.Layers, base.Spec.Encoder) != fmt.Sprint(shuf.Spec.Inputs, shuf.Spec.Layers, shuf.Spec.Encoder) {
		t.Error("the shuffled candidate's inputs, layers or encoder differ from the baseline's")
	}
	if fmt.Sprint(base.Probes) != fmt.Sprint(shuf.Probes) {
		t.Error("the shuffled candidate's probes differ from the baseline's")
	}
}

func TestTrainableEncoder(t *testing.T) {
	dir, _ := defaultScenario(t)
	m, enc := readModel(t, dir, CandTrainableEncoder), readModel(t, dir, EncoderV1)
	s := m.Spec
	if s.Encoder == nil || !s.Encoder.Embedded || s.Encoder.Output != lCode {
		t.Fatalf("encoder reference %+v", s.Encoder)
	}
	trainable := 0
	for _, tn := range s.Tensors {
		switch tn.Part {
		case "encoder":
			if !tn.Trainable {
				t.Errorf("encoder tensor %s is not trainable", tn.Name)
			}
			trainable++
			if !slices.Equal(m.Tensors[tn.Name], enc.Tensors[tn.Name]) {
				t.Errorf("embedded %s differs from encoder v1's", tn.Name)
			}
		case "training":
			if tn.Name != tAdamM || !slices.Equal(tn.Shape, []int{len(m.Vocabulary) + 1, DefaultConfig().CodeWidth}) {
				t.Errorf("training tensor %s shape %v", tn.Name, tn.Shape)
			}
			nonzero := 0
			for _, v := range m.Tensors[tn.Name] {
				if v != 0 {
					nonzero++
				}
			}
			if nonzero == 0 {
				t.Error("the Adam slot is all zeros")
			}
		}
	}
	if trainable != 2 {
		t.Errorf("%d trainable encoder tensors, want 2", trainable)
	}
	tr := s.Training
	if tr == nil || len(tr.Regularization) != 1 || tr.Regularization[0].Type != "l2" || tr.Regularization[0].Tensor != tEncW ||
		len(tr.OptimizerSlots) != 1 || tr.OptimizerSlots[0].Slot != "m" || tr.OptimizerSlots[0].Of != tEncW {
		t.Errorf("training state %+v", tr)
	}
}

// TestStats checks stats.json against the type-7 quantiles of the training
// rows' nonzero counts.
func TestStats(t *testing.T) {
	dir, _ := defaultScenario(t)
	d := Generate(DefaultConfig())
	var nnz []float64
	for i := range d.Train {
		nnz = append(nnz, float64(len(d.Train[i].Items)))
	}
	q := fit.Quantiles(nnz, []float64{0.5, 0.9, 0.99})
	m := readModel(t, dir, EncoderV1)
	st, ok := m.Stats["nonzerosPerRow"].(map[string]any)
	if !ok || m.Stats["rows"] != float64(len(d.Train)) {
		t.Fatalf("stats %v", m.Stats)
	}
	for i, k := range []string{"q50", "q90", "q99"} {
		if st[k] != q[i] {
			t.Errorf("%s = %v, want %v", k, st[k], q[i])
		}
	}
	if st["max"].(float64) < float64(DefaultConfig().Listening.AnomalyMin) {
		t.Errorf("max nonzeros %v: the anomalous listeners are missing", st["max"])
	}
	ev, _ := m.Stats["explainedVariance"].([]any)
	if len(ev) != DefaultConfig().CodeWidth {
		t.Errorf("%d explained variances", len(ev))
	}
}

func BenchmarkBuild(b *testing.B) {
	for i := 0; i < b.N; i++ {
		if _, err := Build(b.TempDir(), DefaultConfig(), nil); err != nil {
			b.Fatal(err)
		}
	}
}
