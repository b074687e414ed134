package demo

import (
	"crypto/sha256"
	"encoding/hex"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"testing"

	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
)

// debianPython is the interpreter that sees Debian's numpy 1.24; another
// python3 earlier on PATH may not.
const debianPython = "/usr/bin/python3"

// exporter is the numpy exporter example, relative to this package.
var exporter = filepath.Join("..", "..", "examples", "export_numpy.py")

// needNumpy fails the test when CI is set and numpy is missing, and skips it
// otherwise.
func needNumpy(t *testing.T) {
	t.Helper()
	if out, err := exec.Command(debianPython, "-c", "import numpy").CombinedOutput(); err != nil {
		msg := "numpy under " + debianPython + " not available: " + string(out) + err.Error()
		if os.Getenv("CI") != "" {
			t.Fatal(msg)
		}
		t.Skip(msg)
	}
}

// TestNumpyExporter runs examples/export_numpy.py, reads its model
// directory back with modeldir.Read (schema, tensors, vocabulary, probes
// all validated) and checks that the gate's runtime reproduces the outputs
// numpy computed for the probe rows.
func TestNumpyExporter(t *testing.T) {
	needNumpy(t)
	dir := filepath.Join(t.TempDir(), "numpy-encoder")
	cmd := exec.Command(debianPython, exporter, dir, "--seed", "3")
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("exporter failed: %v\n%s", err, out)
	}
	d, err := modeldir.Read(dir)
	if err != nil {
		t.Fatal(err)
	}
	m := d.Model
	if m.Spec.Kind != model.KindEncoder || len(m.Vocabulary) != 60 || len(m.Probes) != 12 {
		t.Fatalf("kind %s, %d ids, %d probes", m.Spec.Kind, len(m.Vocabulary), len(m.Probes))
	}
	net, err := model.Compile(m.Spec, m.Tensors, nil)
	if err != nil {
		t.Fatal(err)
	}
	runner := net.NewRunner(1)
	defer runner.Close()
	index := map[string]int32{}
	for i, id := range m.Vocabulary {
		index[id] = int32(i)
	}
	for n, p := range m.Probes {
		b := model.Batch{Indptr: []int32{0}}
		for i, id := range p.Items {
			k, ok := index[id]
			if !ok {
				k = int32(m.Spec.Inputs.Sparse[0].VocabularySize)
			}
			b.Indices = append(b.Indices, k)
			b.Values = append(b.Values, p.Values[i])
		}
		b.Indptr = append(b.Indptr, int32(len(b.Indices)))
		for _, layer := range []string{"code", "reconstruction"} {
			got, err := runner.Run(&b, layer, nil)
			if err != nil {
				t.Fatal(err)
			}
			want := p.Expect[layer]
			if len(got) != len(want) {
				t.Fatalf("probe %d %s: %d values, numpy %d", n, layer, len(got), len(want))
			}
			for i := range got {
				if math.Abs(float64(got[i]-want[i])) > 1e-5*(1+math.Abs(float64(want[i]))) {
					t.Fatalf("probe %d %s[%d]: runtime %v, numpy %v", n, layer, i, got[i], want[i])
				}
			}
		}
	}
}

// TestNumpyExporterSafetensors checks the exporter's hand-written
// safetensors against the hand-built vector in REFERENCES.md (from the
// format's README): tensor "w", F32, shape [2,3], values 1..6, header padded
// to 64 bytes → 96 bytes with sha256 ce3fe674….
func TestNumpyExporterSafetensors(t *testing.T) {
	needNumpy(t)
	out := filepath.Join(t.TempDir(), "w.safetensors")
	script := `
import importlib.util, sys
import numpy as np
spec = importlib.util.spec_from_file_location("export_numpy", sys.argv[1])
mod = importlib.util.module_from_spec(spec); spec.loader.exec_module(mod)
mod.write_safetensors(sys.argv[2], [("w", np.arange(1, 7, dtype=np.float32).reshape(2, 3))])
`
	if b, err := exec.Command(debianPython, "-c", script, exporter, out).CombinedOutput(); err != nil {
		t.Fatalf("%v\n%s", err, b)
	}
	b, err := os.ReadFile(out)
	if err != nil {
		t.Fatal(err)
	}
	h := sha256.Sum256(b)
	if got := hex.EncodeToString(h[:]); len(b) != 96 || got != "ce3fe6742cd83277e3941206c742fe23d2bca7b23eb022769ad09d03c6a07808" {
		t.Errorf("%d bytes, sha256 %s; want 96 bytes, ce3fe674…", len(b), got)
	}
}
