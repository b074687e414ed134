package main

import (
	"bufio"
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/model/modeldir"
)

// probeHoldout writes the model directory's probe rows as a JSON Lines
// holdout (row_id = probe line) so scoring can be compared with the
// outputs the fixture generator's own float64 forward pass recorded.
func probeHoldout(t *testing.T, dir string) (string, []modeldir.Probe) {
	t.Helper()
	d, err := modeldir.Read(dir)
	if err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(t.TempDir(), "probes-holdout.jsonl")
	f, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	enc := json.NewEncoder(f)
	for i, p := range d.Model.Probes {
		row := map[string]any{"row_id": i, "items": p.Items, "values": p.Values, "label": i % 2}
		for k, v := range p.Dense {
			row[k] = v
		}
		if p.Items == nil {
			row["items"], row["values"] = []string{}, []float32{}
		}
		if err := enc.Encode(row); err != nil {
			t.Fatal(err)
		}
	}
	f.Close()
	return path, d.Model.Probes
}

func readPredictions(t *testing.T, path string) []map[string]float64 {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	var out []map[string]float64
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		var m map[string]float64
		if err := json.Unmarshal(sc.Bytes(), &m); err != nil {
			t.Fatalf("%s: %v", sc.Text(), err)
		}
		out = append(out, m)
	}
	return out
}

func TestScoreAndHoldouts(t *testing.T) {
	store := filepath.Join(t.TempDir(), "store")
	encDir, scorerDir := fixtures(t)
	mustMG(t, store, "push", encDir, "tiny-encoder:v1")
	mustMG(t, store, "push", scorerDir, "tiny-scorer:v1")
	hold, probes := probeHoldout(t, scorerDir)

	hd := strings.TrimSpace(mustMG(t, store, "push", "--kind", "holdout", hold, "tiny-holdout:v1").stdout)
	if !strings.HasPrefix(hd, "sha256:") {
		t.Fatalf("push --kind holdout printed %q", hd)
	}
	var rows []lsRow
	json.Unmarshal([]byte(mustMG(t, store, "ls", "--json", "tiny-holdout").stdout), &rows)
	if len(rows) != 1 || rows[0].Kind != "holdout" || rows[0].Digest != hd {
		t.Errorf("ls tiny-holdout: %+v", rows)
	}

	// Scoring the probe rows reproduces the fixture generator's float64
	// outputs (an independent forward pass) within float32 rounding.
	out := filepath.Join(t.TempDir(), "p.jsonl")
	mustMG(t, store, "score", "tiny-scorer:v1", "--holdout", hold, "--out", out)
	preds := readPredictions(t, out)
	if len(preds) != len(probes) {
		t.Fatalf("%d predictions for %d rows", len(preds), len(probes))
	}
	for i, p := range preds {
		want := float64(probes[i].Expect["p"][0])
		if int(p["row_id"]) != i || math.Abs(p["p"]-want) > 1e-5*math.Max(1, math.Abs(want)) {
			t.Errorf("row %d: got %v, want p=%v", i, p, want)
		}
	}
	// The same holdout from the store gives the same bytes.
	out2 := filepath.Join(t.TempDir(), "p2.jsonl")
	mustMG(t, store, "score", "tiny-scorer:v1", "--holdout", "tiny-holdout:v1", "--out", out2)
	a, _ := os.ReadFile(out)
	b, _ := os.ReadFile(out2)
	if string(a) != string(b) {
		t.Error("scoring the stored holdout differs from scoring the file")
	}
	// An encoder outputs its code, one column per dimension.
	encOut := filepath.Join(t.TempDir(), "code.csv")
	mustMG(t, store, "score", "tiny-encoder:v1", "--holdout", hold, "--out", encOut)
	csv, _ := os.ReadFile(encOut)
	if first := strings.SplitN(string(csv), "\n", 2)[0]; first != "row_id,code_0,code_1,code_2,code_3" {
		t.Errorf("encoder CSV header %q", first)
	}

	// A bad row is refused with its row number; no output file appears.
	bad := filepath.Join(t.TempDir(), "bad.jsonl")
	os.WriteFile(bad, []byte(`{"items":["show-003"],"values":[1],"label":0,"listener_tenure":[0.1],"show_age":[0.2]}`+"\n"+
		`{"items":["show-003","show-010"],"values":[1],"label":1,"listener_tenure":[0.1],"show_age":[0.2]}`+"\n"), 0o644)
	badOut := filepath.Join(t.TempDir(), "never.jsonl")
	r := mg(t, store, "score", "tiny-scorer:v1", "--holdout", bad, "--out", badOut)
	if r.code != 2 || !strings.Contains(r.stderr, "row 2") {
		t.Errorf("bad holdout: exit %d: %s", r.code, r.stderr)
	}
	if _, err := os.Stat(badOut); !os.IsNotExist(err) {
		t.Errorf("a failed score left %s behind", badOut)
	}
	before := listing(t, store)
	if r := mg(t, store, "push", "--kind", "holdout", bad, "bad-holdout:v1"); r.code != 2 || !strings.Contains(r.stderr, "row 2") {
		t.Errorf("push of a bad holdout: exit %d: %s", r.code, r.stderr)
	}
	if listing(t, store) != before {
		t.Error("a refused holdout push changed the store")
	}
	mustMG(t, store, "verify")
}

// TestPushNumpyExport runs the numpy exporter example (Debian's
// python3-numpy) and pushes, shows and verifies what it wrote.
func TestPushNumpyExport(t *testing.T) {
	py := "/usr/bin/python3"
	if err := exec.Command(py, "-c", "import numpy").Run(); err != nil {
		if os.Getenv("CI") != "" {
			t.Fatalf("%s with numpy is needed in CI: %v", py, err)
		}
		t.Skip("no Debian python3 with numpy")
	}
	dir := filepath.Join(t.TempDir(), "numpy-encoder")
	if out, err := exec.Command(py, filepath.Join("..", "..", "examples", "export_numpy.py"), dir).CombinedOutput(); err != nil {
		t.Fatalf("export_numpy.py: %v\n%s", err, out)
	}
	store := filepath.Join(t.TempDir(), "store")
	d := strings.TrimSpace(mustMG(t, store, "push", dir, "listener-encoder:numpy").stdout)
	if !strings.HasPrefix(d, "sha256:") {
		t.Fatalf("push printed %q", d)
	}
	if r := mustMG(t, store, "show", "listener-encoder:numpy"); !strings.Contains(r.stdout, "tied_decoder") {
		t.Errorf("show: %s", r.stdout)
	}
	mustMG(t, store, "verify")
}

// TestShowOtherArtifacts: show describes a holdout (its summary: rows,
// labels, slice values) and a release record (what it is about), not only
// models; --json carries the same.
func TestShowOtherArtifacts(t *testing.T) {
	dir := t.TempDir()
	store := filepath.Join(dir, "store")
	hold := filepath.Join(dir, "listeners.jsonl")
	rows := `{"row_id":1,"items":["show-003"],"values":[2],"label":1,"slice":"new"}` + "\n" +
		`{"row_id":2,"items":["show-003","show-010"],"values":[1,4],"label":0,"slice":"new"}` + "\n" +
		`{"row_id":3,"items":[],"values":[],"label":0,"slice":"returning"}` + "\n"
	if err := os.WriteFile(hold, []byte(rows), 0o644); err != nil {
		t.Fatal(err)
	}
	mustMG(t, store, "push", "--kind", "holdout", hold, "listeners:v1")
	out := mustMG(t, store, "show", "listeners:v1").stdout
	for _, want := range []string{"kind:        holdout", "rows:        3, 3 (item, value) pairs", "labels:      1 positive (33.33%)",
		"slices:      2 value(s)", `"new"                    2 rows`, "listeners.jsonl"} {
		if !strings.Contains(out, want) {
			t.Errorf("show of a holdout lacks %q:\n%s", want, out)
		}
	}
	var d struct {
		Kind    string
		Holdout struct {
			Rows      int64
			Positives int64
			Slices    map[string]int64
		}
	}
	if err := json.Unmarshal([]byte(mustMG(t, store, "show", "--json", "listeners:v1").stdout), &d); err != nil {
		t.Fatal(err)
	}
	if d.Kind != "holdout" || d.Holdout.Rows != 3 || d.Holdout.Positives != 1 || d.Holdout.Slices["returning"] != 1 {
		t.Errorf("show --json of a holdout: %+v", d)
	}

	w := newReleaseWorld(t, 0)
	w.Push(0, "tiny-encoder:prod")
	cand := w.Push(1, "")
	w.Gate("tiny-encoder:v1")
	if r := w.Promote("tiny-encoder:v1", "--key", w.Key("rita")); r.code != 0 {
		t.Fatalf("promote: %d %s", r.code, r.stderr)
	}
	rec := mustMG(t, w.Store, "show", "tiny-encoder:release-prod").stdout
	if !strings.Contains(rec, "kind:        release") || !strings.Contains(rec, "about:       "+cand) {
		t.Errorf("show of a release record:\n%s", rec)
	}
}
