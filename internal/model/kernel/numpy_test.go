package kernel

import (
	"encoding/binary"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"testing"
)

// debianPython is the interpreter that sees Debian's numpy 1.24 and scipy 1.10
// (another python3 may come first on PATH without them).
const debianPython = "/usr/bin/python3"

// numpyScript computes, in float64, relu(a @ b + bias), tanh(a @ w.T) and
// sigmoid(csr @ ws + bias2) with numpy 1.24 and scipy 1.10.
const numpyScript = `
import sys, numpy as np, scipy.sparse as sp, scipy.special as ss
d = sys.argv[1]
m, n, k, rows, vocab, n2 = [int(x) for x in sys.argv[2:8]]
f = lambda name: np.fromfile(d + "/" + name, dtype="<f4").astype(np.float64)
a = f("a").reshape(m, k); b = f("b").reshape(k, n); bias = f("bias")
w = f("w").reshape(n, k)
indptr = np.fromfile(d + "/indptr", dtype="<i4"); idx = np.fromfile(d + "/idx", dtype="<i4")
vals = f("vals"); ws = f("ws").reshape(vocab, n2); bias2 = f("bias2")
csr = sp.csr_matrix((vals, idx, indptr), shape=(rows, vocab))
np.maximum(a @ b + bias, 0).astype("<f8").tofile(d + "/dense")
np.tanh(a @ w.T).astype("<f8").tofile(d + "/tied")
ss.expit(csr @ ws + bias2).astype("<f8").tofile(d + "/sparse")
`

// TestAgainstNumpy checks the kernels against numpy 1.24 matmul and scipy 1.10's
// CSR product (scipy.sparse.csr_matrix, scipy.special.expit), computed in float64
// on the same float32 inputs.
func TestAgainstNumpy(t *testing.T) {
	requireModules(t, "numpy, scipy.sparse, scipy.special")
	rng := rand.New(rand.NewPCG(21, 22))
	const m, n, k = 23, 77, 130
	const vocab, n2 = 40, 150
	a, b, bias := randSlice(rng, m*k), randSlice(rng, k*n), randSlice(rng, n)
	w := randSlice(rng, n*k)
	s := randCSR(rng, 19, vocab, 9)
	ws, bias2 := randSlice(rng, vocab*n2), randSlice(rng, n2)
	rows := len(s.indptr) - 1

	dir := t.TempDir()
	for name, data := range map[string]any{
		"a": a, "b": b, "bias": bias, "w": w, "indptr": s.indptr, "idx": s.idx, "vals": s.vals, "ws": ws, "bias2": bias2,
	} {
		writeLE(t, filepath.Join(dir, name), data)
	}
	cmd := exec.Command(debianPython, "-c", numpyScript, dir,
		fmt.Sprint(m), fmt.Sprint(n), fmt.Sprint(k), fmt.Sprint(rows), fmt.Sprint(vocab), fmt.Sprint(n2))
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("running numpy: %v\n%s", err, out)
	}

	wantDense, wantTied, wantSparse := readF64(t, dir, "dense"), readF64(t, dir, "tied"), readF64(t, dir, "sparse")
	run(t, func(t *testing.T, be *backend) {
		dense := make([]float32, m*n)
		Dense(m, n, k, a, k, b, bias, dense, n, ReLU)
		tied := make([]float32, m*n)
		DenseT(m, n, k, a, k, w, nil, tied, n, Tanh)
		sparse := make([]float32, rows*n2)
		SparseDense(s.indptr, s.idx, s.vals, ws, n2, bias2, sparse, n2, Sigmoid)

		// The float32 results differ from numpy's float64 ones by accumulated
		// rounding only (see checkClose for the bound).
		for i := 0; i < m; i++ {
			for j := 0; j < n; j++ {
				var sd, st float64
				for p := 0; p < k; p++ {
					sd += math.Abs(float64(a[i*k+p]) * float64(b[p*n+j]))
					st += math.Abs(float64(a[i*k+p]) * float64(w[j*k+p]))
				}
				sd += math.Abs(float64(bias[j]))
				checkClose(t, fmt.Sprintf("dense c[%d,%d] vs numpy", i, j), dense[i*n+j], wantDense[i*n+j], sd, k)
				checkClose(t, fmt.Sprintf("tied c[%d,%d] vs numpy", i, j), tied[i*n+j], wantTied[i*n+j], st, k)
			}
		}
		for r := 0; r < rows; r++ {
			for j := 0; j < n2; j++ {
				sum := math.Abs(float64(bias2[j]))
				for e := s.indptr[r]; e < s.indptr[r+1]; e++ {
					sum += math.Abs(float64(s.vals[e]) * float64(ws[int(s.idx[e])*n2+j]))
				}
				checkClose(t, fmt.Sprintf("sparse c[%d,%d] vs scipy", r, j), sparse[r*n2+j], wantSparse[r*n2+j], sum, int(s.indptr[r+1]-s.indptr[r]))
			}
		}
	})
}

func readF64(t *testing.T, dir, name string) []float64 {
	t.Helper()
	raw, err := os.ReadFile(filepath.Join(dir, name))
	if err != nil {
		t.Fatal(err)
	}
	out := make([]float64, len(raw)/8)
	for i := range out {
		out[i] = math.Float64frombits(binary.LittleEndian.Uint64(raw[8*i:]))
	}
	return out
}

func writeLE(t *testing.T, path string, data any) {
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

// requireModules skips the test, or fails it in CI (which installs them),
// when Debian's python cannot import modules (a comma-separated list).
func requireModules(t *testing.T, modules string) {
	t.Helper()
	if out, err := exec.Command(debianPython, "-c", "import "+modules).CombinedOutput(); err != nil {
		msg := fmt.Sprintf("%s cannot import %s: %v %s", debianPython, modules, err, out)
		if os.Getenv("CI") != "" {
			t.Fatal(msg)
		}
		t.Skip(msg)
	}
}
