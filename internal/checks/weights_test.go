package checks

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"testing"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/registry"
)

// editedStatsCandidate pushes a copy of the demo's better candidate whose
// stats.json claims other nonzero quantiles (most rows would become
// "anomalous" and weigh a quarter if the gate believed it), and returns
// its reference.
func editedStatsCandidate(t *testing.T, store registry.Store) string {
	t.Helper()
	ctx := context.Background()
	dir := filepath.Join(t.TempDir(), "edited")
	if _, err := artifact.Pull(ctx, store, registry.Ref{Repository: "promo-scorer", Tag: "cand-better"}, dir, artifact.Options{}); err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(dir, "stats.json")
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	var st map[string]any
	if err := json.Unmarshal(b, &st); err != nil {
		t.Fatal(err)
	}
	nz := st["nonzerosPerRow"].(map[string]any)
	nz["q50"], nz["q90"], nz["q99"] = 1.0, 2.0, 3.0
	if b, err = json.MarshalIndent(st, "", "  "); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(path, b, 0o644); err != nil {
		t.Fatal(err)
	}
	ref := registry.Ref{Repository: "promo-scorer", Tag: "cand-edited-stats"}
	if _, err := artifact.PushModelDir(ctx, store, dir, ref, artifact.Options{}); err != nil {
		t.Fatal(err)
	}
	return ref.String()
}

// TestCandidateCannotMoveWeights: the thresholds that slice and weight
// holdout rows come from the baseline, so a candidate whose stats.json is
// edited is judged on exactly the numbers an honest copy gets; and the
// same baseline on the same holdout gets the same figures whatever the
// candidate (the demo used to report it at two different log losses).
func TestCandidateCannotMoveWeights(t *testing.T) {
	store := demoScenario(t)
	edited := editedStatsCandidate(t, store)
	honest := holdoutOf(gate(t, store, "promo-scorer:cand-better", "promo-scorer:prod", "promo-scorer.yaml"))
	moved := holdoutOf(gate(t, store, edited, "promo-scorer:prod", "promo-scorer.yaml"))
	worse := holdoutOf(gate(t, store, "promo-scorer:cand-worse", "promo-scorer:prod", "promo-scorer.yaml"))
	base, err := store.Resolve(context.Background(), "promo-scorer", "prod")
	if err != nil {
		t.Fatal(err)
	}
	if w := honest.Weights; w == nil || w.Source != WeightsFromBaseline || w.From != base.Digest.String() || w.AnomalyAbove == nil {
		t.Fatalf("weights %+v, want the baseline's (%s)", w, base.Digest)
	}
	a, _ := json.Marshal(struct {
		W    *RowWeights
		C, B Metrics
		T    *NonInferiority
		S    []SliceResult
	}{honest.Weights, honest.Candidate, *honest.Baseline, honest.Test, honest.Slices})
	b, _ := json.Marshal(struct {
		W    *RowWeights
		C, B Metrics
		T    *NonInferiority
		S    []SliceResult
	}{moved.Weights, moved.Candidate, *moved.Baseline, moved.Test, moved.Slices})
	if !bytes.Equal(a, b) {
		t.Errorf("an edited stats.json changed the numbers:\nhonest %s\nedited %s", a, b)
	}
	if *worse.Baseline != *honest.Baseline {
		t.Errorf("the same baseline on the same holdout: %+v against one candidate, %+v against another", *honest.Baseline, *worse.Baseline)
	}
}

// TestPlainLogLossMatchesSklearn: the report's plain log loss is what
// scikit-learn's log_loss computes on the same rows and predictions, and
// its weighted log loss is log_loss with sample_weight = the anomalous
// rows' weight (outside check: scikit-learn 1.2.1 from Debian's
// python3-sklearn).
func TestPlainLogLossMatchesSklearn(t *testing.T) {
	store := demoScenario(t)
	rep := gate(t, store, "promo-scorer:cand-better", "promo-scorer:prod", "promo-scorer.yaml")
	det := holdoutOf(rep)
	if det.Weights == nil || det.Weights.AnomalyAbove == nil || !det.Weights.Weighted() {
		t.Fatalf("weights %+v: the demo policy down-weights anomalous rows", det.Weights)
	}
	ctx := context.Background()
	hold, err := artifact.FetchHoldout(ctx, store, registry.Ref{Repository: "promo-holdout", Tag: "v1"})
	if err != nil {
		t.Fatal(err)
	}
	defer hold.Close()
	type side struct {
		ref  string
		p    []float64
		want Metrics
	}
	sides := []*side{{ref: "promo-scorer:cand-better", want: det.Candidate}, {ref: "promo-scorer:prod", want: *det.Baseline}}
	var y, w []float64
	for k, s := range sides {
		r, _ := registry.ParseRef(s.ref, false)
		d, err := artifact.Resolve(ctx, store, r)
		if err != nil {
			t.Fatal(err)
		}
		m, err := loadPrepared(ctx, store, registry.Ref{Repository: r.Repository, Digest: d.Digest})
		if err != nil {
			t.Fatal(err)
		}
		rd, err := hold.Open(m.ReadOptions("holdout", true))
		if err != nil {
			t.Fatal(err)
		}
		run := m.Net.NewRunner(1)
		var f data.Frame
		var out []float32
		for {
			n, err := rd.Read(&f, 4096)
			if errors.Is(err, io.EOF) {
				break
			}
			if err != nil {
				t.Fatal(err)
			}
			if out, err = run.Run(&f.Batch, m.Net.Output(), out); err != nil {
				t.Fatal(err)
			}
			for i := 0; i < n; i++ {
				s.p = append(s.p, float64(out[i]))
				if k == 0 {
					y = append(y, float64(f.Labels[i]))
					wi := float64(f.Weights[i])
					if float64(f.Indptr[i+1]-f.Indptr[i]) > *det.Weights.AnomalyAbove {
						wi *= float64(float32(det.Weights.AnomalyWeight))
					}
					w = append(w, wi)
				}
			}
		}
		run.Close()
		rd.Close()
	}
	var got struct{ Plain, Weighted [2]float64 }
	runSklearn(t, `
import json, sys
import numpy as np
from sklearn.metrics import log_loss
d = json.load(open(sys.argv[1]))
y, w = np.array(d["y"]), np.array(d["w"])
out = {"Plain": [], "Weighted": []}
for p in d["p"]:
    p = np.array(p)
    out["Plain"].append(log_loss(y, p, labels=[0, 1]))
    out["Weighted"].append(log_loss(y, p, sample_weight=w, labels=[0, 1]))
print(json.dumps(out))
`, map[string]any{"y": y, "w": w, "p": [][]float64{sides[0].p, sides[1].p}}, &got)
	for k, s := range sides {
		if math.Abs(s.want.LogLoss-got.Plain[k]) > 1e-9*got.Plain[k] {
			t.Errorf("%s: plain log loss %.12g, scikit-learn %.12g", s.ref, s.want.LogLoss, got.Plain[k])
		}
		if math.Abs(s.want.WeightedLogLoss-got.Weighted[k]) > 1e-9*got.Weighted[k] {
			t.Errorf("%s: weighted log loss %.12g, scikit-learn with sample_weight %.12g", s.ref, s.want.WeightedLogLoss, got.Weighted[k])
		}
		t.Logf("%s: plain %.6f (scikit-learn %.6f), weighted %.6f (scikit-learn %.6f)", s.ref, s.want.LogLoss, got.Plain[k], s.want.WeightedLogLoss, got.Weighted[k])
	}
}

// runSklearn runs script with Debian's python (numpy, scikit-learn) on the
// JSON of in (argv[1]) and decodes its stdout into out; it skips when the
// interpreter or its libraries are missing, unless CI is set.
func runSklearn(t *testing.T, script string, in, out any) {
	t.Helper()
	const py = "/usr/bin/python3" // Debian's, with python3-sklearn
	if msg, err := exec.Command(py, "-c", "import numpy, sklearn").CombinedOutput(); err != nil {
		if os.Getenv("CI") != "" {
			t.Fatalf("%s with numpy and sklearn is required in CI: %v\n%s", py, err, msg)
		}
		t.Skipf("%s with numpy and sklearn not available: %v", py, err)
	}
	b, err := json.Marshal(in)
	if err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(t.TempDir(), "in.json")
	if err := os.WriteFile(path, b, 0o600); err != nil {
		t.Fatal(err)
	}
	cmd := exec.Command(py, "-c", script, path)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	stdout, err := cmd.Output()
	if err != nil {
		t.Fatalf("python: %v\n%s", err, stderr.String())
	}
	if err := json.Unmarshal(stdout, out); err != nil {
		t.Fatalf("decoding %q: %v", stdout, err)
	}
}

// TestDiffShowsStats: diff names every file of two models and the
// differing values of their training statistics: the edited copy of the
// better candidate differs in stats.json alone, at the three quantiles
// that were edited.
func TestDiffShowsStats(t *testing.T) {
	store := demoScenario(t)
	edited := editedStatsCandidate(t, store)
	a, _ := registry.ParseRef("promo-scorer:cand-better", false)
	b, _ := registry.ParseRef(edited, false)
	d, err := artifact.Diff(context.Background(), store, a, b)
	if err != nil {
		t.Fatal(err)
	}
	changed := map[string]string{}
	for _, f := range d.Files {
		changed[f.Name] = f.Change
	}
	for _, name := range []string{"spec.json", "stats.json", "head.safetensors", "vocabulary.txt", "probes.jsonl"} {
		want := "same"
		if name == "stats.json" {
			want = "changed"
		}
		if changed[name] != want {
			t.Errorf("file %s: %q, want %q (files %v)", name, changed[name], want, changed)
		}
	}
	var ptrs []string
	for _, c := range d.Stats {
		ptrs = append(ptrs, c.Pointer)
	}
	if fmt.Sprint(ptrs) != "[/nonzerosPerRow/q50 /nonzerosPerRow/q90 /nonzerosPerRow/q99]" {
		t.Errorf("stats differences %v, want the three edited quantiles", ptrs)
	}
	if d.Probes.Changed || d.Probes.CountA == 0 || d.Probes.CountA != d.Probes.CountB {
		t.Errorf("probes %+v: the copy's probe rows are the same", d.Probes)
	}
}
