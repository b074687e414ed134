package clitest

import (
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/schemas"
)

// BigEncoder writes an encoder with a vocabulary large enough that a push
// takes long enough to be killed part way (a few MB of tensors).
func BigEncoder(t testing.TB, root, name string, seed uint64, vocab int) string {
	t.Helper()
	m := fixture.EncoderModel()
	m.Spec.Name = name
	in := &m.Spec.Inputs.Sparse[0]
	in.VocabularySize = vocab
	const width = 64
	m.Spec.Tensors[0].Shape = []int{vocab + 1, width}
	m.Spec.Tensors[1].Shape = []int{width}
	m.Spec.Tensors[2].Shape = []int{vocab + 1}
	m.Spec.Files.Probes = ""
	m.Probes = nil
	r := rand.New(rand.NewPCG(seed, 9))
	fill := func(n int) []float32 {
		v := make([]float32, n)
		for i := range v {
			v[i] = float32(r.NormFloat64())
		}
		return v
	}
	m.Tensors = map[string][]float32{"enc.w": fill((vocab + 1) * width), "enc.b": fill(width), "dec.b": fill(vocab + 1)}
	m.Vocabulary = make([]string, vocab)
	for i := range m.Vocabulary {
		m.Vocabulary[i] = fmt.Sprintf("show-%05d", i)
	}
	dir := filepath.Join(root, name)
	if err := modeldir.Write(dir, m); err != nil {
		t.Fatal(err)
	}
	return dir
}

// ListingDiff shows the lines of two listings that differ (file names
// and sizes only).
func ListingDiff(a, b string) string {
	short := func(s string) map[string]bool {
		out := map[string]bool{}
		for _, l := range strings.Split(s, "\n") {
			f := strings.Fields(l)
			if len(f) >= 2 {
				l = f[0] + " " + f[1]
			}
			out[l] = true
		}
		return out
	}
	sa, sb := short(a), short(b)
	var d []string
	for l := range sa {
		if !sb[l] {
			d = append(d, "- "+l)
		}
	}
	for l := range sb {
		if !sa[l] {
			d = append(d, "+ "+l)
		}
	}
	if len(d) == 0 {
		return "(same names and sizes; contents differ)"
	}
	return strings.Join(d, "\n")
}

// CheckJSON validates a command's stdout against the command's output
// schema (schemas/output-CMD.schema.json) and checks the one-document
// contract: exactly one JSON document; an "error" member exactly when the
// exit code is not 0, carrying that exit code.
func CheckJSON(t testing.TB, cmd string, r Result) map[string]any {
	t.Helper()
	dec := json.NewDecoder(strings.NewReader(r.Stdout))
	var doc any
	if err := dec.Decode(&doc); err != nil {
		t.Fatalf("%s --json (exit %d): stdout is not JSON: %v\n%s\nstderr: %s", cmd, r.Code, err, r.Stdout, r.Stderr)
	}
	if dec.More() {
		t.Errorf("%s --json: more than one document on stdout", cmd)
	}
	vs, err := schemas.Validate(schemas.Output(cmd), []byte(r.Stdout))
	if err != nil {
		t.Fatal(err)
	}
	if len(vs) > 0 {
		t.Errorf("%s --json (exit %d) breaks %s:\n%s", cmd, r.Code, schemas.Output(cmd), schemas.Join("  ", vs))
	}
	obj, _ := doc.(map[string]any)
	e, hasErr := obj["error"].(map[string]any)
	switch {
	case r.Code == 0 && hasErr:
		t.Errorf("%s --json exited 0 with an error member: %v", cmd, e)
	case r.Code != 0 && !hasErr:
		t.Errorf("%s --json exited %d without an error member:\n%s", cmd, r.Code, r.Stdout)
	case r.Code != 0 && e["exitCode"] != float64(r.Code):
		t.Errorf("%s --json exited %d but error.exitCode is %v", cmd, r.Code, e["exitCode"])
	}
	// stderr holds JSON Lines only (progress, log and error events).
	for _, line := range strings.Split(strings.TrimSpace(r.Stderr), "\n") {
		if line != "" && !json.Valid([]byte(line)) {
			t.Errorf("%s --json: a stderr line is not JSON: %q", cmd, line)
		}
	}
	return obj
}

// LogReport is the part of log --json the crash suites read.
type LogReport struct {
	Current string
	Head    string
	Entries []struct {
		Digest string
		Record struct{ Kind, From, To string }
	}
	Findings []struct{ Severity, Where, Message string }
}
