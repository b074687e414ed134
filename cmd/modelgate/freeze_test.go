package main

import (
	"encoding/json"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/freeze"
	"github.com/modelgate/modelgate/internal/model/modeldir"
)

// TestFreezeCLI freezes the tiny scorer through the binary: text and JSON
// output, determinism, the no-op on a frozen scorer, a holdout sample with
// bf16 storage, and that the store still verifies clean.
func TestFreezeCLI(t *testing.T) {
	store := filepath.Join(t.TempDir(), "store")
	encDir, scorerDir := fixtures(t)
	encDigest := strings.TrimSpace(mustMG(t, store, "push", encDir, "tiny-encoder:v1").stdout)
	srcDigest := strings.TrimSpace(mustMG(t, store, "push", scorerDir, "tiny-scorer:v1").stdout)

	r := mustMG(t, store, "freeze", "tiny-scorer:v1", "--out", "tiny-scorer:frozen")
	for _, want := range []string{
		"froze tiny-scorer:v1 (" + srcDigest + ")", "onto encoder tiny-encoder:v1 (" + encDigest + ")",
		"verification   PASS  f32 storage, bit-identical to the composition",
		"probes", "0 of 12 outputs differ", "against the source as stored: all 12 outputs bit-identical",
		"encoder blobs, shared by digest:", "encoder.safetensors", "head.safetensors",
		"byte-identical to the source's head.safetensors", "stripped: nothing", "freeze record  tiny-scorer@sha256:",
	} {
		if !strings.Contains(r.stdout, want) {
			t.Errorf("freeze output lacks %q:\n%s", want, r.stdout)
		}
	}

	var res freeze.Result
	j := mustMG(t, store, "freeze", "--json", "tiny-scorer:v1", "--out", "tiny-scorer:frozen-again")
	if err := json.Unmarshal([]byte(j.stdout), &res); err != nil {
		t.Fatalf("--json output: %v\n%s", err, j.stdout)
	}
	var rows []lsRow
	if err := json.Unmarshal([]byte(mustMG(t, store, "ls", "--json", "tiny-scorer").stdout), &rows); err != nil {
		t.Fatal(err)
	}
	tags := map[string]string{}
	for _, row := range rows {
		tags[row.Tag] = row.Digest
	}
	if res.Frozen == nil || res.Frozen.Digest != tags["frozen"] || tags["frozen"] != tags["frozen-again"] || res.Source.Digest != srcDigest ||
		res.Record == nil || !res.Record.Verification.Passed || res.RecordDigest == "" {
		t.Errorf("second freeze: %+v; tags %v", res, tags)
	}

	// A frozen scorer is left alone.
	r = mustMG(t, store, "freeze", "tiny-scorer:frozen", "--out", "tiny-scorer:refrozen")
	if !strings.Contains(r.stdout, "already frozen") || !strings.Contains(r.stdout, srcDigest) {
		t.Errorf("freezing a frozen scorer: %q", r.stdout)
	}
	if strings.Contains(mustMG(t, store, "ls", "tiny-scorer").stdout, "refrozen") {
		t.Errorf("the no-op wrote a tag")
	}

	// bf16 head, verified on the probes and a sample of a holdout file.
	hold, probes := probeHoldout(t, scorerDir)
	j = mustMG(t, store, "freeze", "--json", "tiny-scorer:v1", "--out", "tiny-scorer:bf16", "--storage", "bf16",
		"--max-error", "0.01", "--holdout", hold, "--holdout-rows", "5")
	res = freeze.Result{}
	if err := json.Unmarshal([]byte(j.stdout), &res); err != nil {
		t.Fatal(err)
	}
	v := res.Record.Verification
	if v.Storage != "bf16" || v.Exact || v.Bound != 0.01 || !v.Passed || len(v.Sets) != 2 || v.Sets[1].Rows != 5 || v.Sets[1].Total != int64(len(probes)) ||
		v.MaxAbs == 0 || v.MaxAbs > 0.01 {
		t.Errorf("bf16 verification: %+v", v)
	}
	mustMG(t, store, "verify")
}

func TestFreezeCLIRefusals(t *testing.T) {
	store := filepath.Join(t.TempDir(), "store")
	encDir, scorerDir := fixtures(t)
	encDigest := strings.TrimSpace(mustMG(t, store, "push", encDir, "tiny-encoder:v1").stdout)
	mustMG(t, store, "push", scorerDir, "tiny-scorer:v1")
	d, err := modeldir.Read(encDir)
	if err != nil {
		t.Fatal(err)
	}
	d.Model.Spec.Description = "a later version of the tiny encoder"
	enc2 := filepath.Join(t.TempDir(), "enc2")
	if err := modeldir.Write(enc2, d.Model); err != nil {
		t.Fatal(err)
	}
	enc2Digest := strings.TrimSpace(mustMG(t, store, "push", enc2, "tiny-encoder:v2").stdout)
	before := listing(t, store)

	for _, tc := range []struct {
		name string
		args []string
		want []string
	}{
		{"no --out", []string{"freeze", "tiny-scorer:v1"}, []string{"--out NAME:TAG"}},
		{"no scorer", []string{"freeze", "--out", "x:y"}, []string{"SCORER_REF"}},
		{"--out without tag", []string{"freeze", "tiny-scorer:v1", "--out", "tiny-scorer"}, []string{"NAME:TAG"}},
		{"bad storage", []string{"freeze", "tiny-scorer:v1", "--out", "x:y", "--storage", "fp8"}, []string{"--storage", "f16"}},
		{"bad max error", []string{"freeze", "tiny-scorer:v1", "--out", "x:y", "--max-error", "-1"}, []string{"--max-error"}},
		{"encoder mismatch", []string{"freeze", "tiny-scorer:v1", "--out", "x:y", "--encoder", "tiny-encoder:v2"}, []string{enc2Digest, encDigest}},
		{"not a scorer", []string{"freeze", "tiny-encoder:v1", "--out", "x:y"}, []string{"not a scorer"}},
		{"unknown scorer", []string{"freeze", "tiny-scorer:nope", "--out", "x:y"}, []string{"tiny-scorer:nope"}},
		{"conversion too coarse", []string{"freeze", "tiny-scorer:v1", "--out", "x:y", "--storage", "f16", "--max-error", "1e-12"}, []string{"above --max-error", "nothing written"}},
		{"holdout neither file nor ref", []string{"freeze", "tiny-scorer:v1", "--out", "x:y", "--holdout", "no such file"}, []string{"--holdout"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := mg(t, store, tc.args...)
			if r.code != 2 {
				t.Fatalf("exit %d, want 2\nstdout: %s\nstderr: %s", r.code, r.stdout, r.stderr)
			}
			if r.stdout != "" {
				t.Errorf("stdout on a refusal: %q", r.stdout)
			}
			for _, w := range tc.want {
				if !strings.Contains(r.stderr, w) {
					t.Errorf("stderr %q lacks %q", r.stderr, w)
				}
			}
		})
	}
	if after := listing(t, store); after != before {
		t.Errorf("refused freezes changed the store")
	}
}
