package fit

import (
	"bytes"
	"os"
	"os/exec"
	"testing"
)

// debianPython is the interpreter that sees Debian's numpy 1.24 and
// scikit-learn 1.2; another python3 earlier on PATH may not.
const debianPython = "/usr/bin/python3"

// runPython runs script with input on stdin and returns its stdout. When
// the interpreter or one of the modules is missing the test fails if the CI
// environment variable is set and is skipped otherwise.
func runPython(t *testing.T, modules []string, script string, input []byte) []byte {
	t.Helper()
	probe := "import " + modules[0]
	for _, m := range modules[1:] {
		probe += ", " + m
	}
	if out, err := exec.Command(debianPython, "-c", probe).CombinedOutput(); err != nil {
		msg := "reference python with " + probe[len("import "):] + " not available: " + string(out) + err.Error()
		if os.Getenv("CI") != "" {
			t.Fatal(msg)
		}
		t.Skip(msg)
	}
	cmd := exec.Command(debianPython, "-c", script)
	// One BLAS thread: the machine is small and shared.
	cmd.Env = append(os.Environ(), "OPENBLAS_NUM_THREADS=1", "OMP_NUM_THREADS=1")
	cmd.Stdin = bytes.NewReader(input)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	out, err := cmd.Output()
	if err != nil {
		t.Fatalf("reference python failed: %v\n%s", err, stderr.String())
	}
	return out
}
