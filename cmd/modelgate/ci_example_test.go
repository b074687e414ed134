package main

import (
	"bytes"
	"encoding/json"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/schemas"
)

// TestCIExample runs examples/ci/gate.sh as a CI job would, on the demo's
// store: a good candidate passes (exit 0), a worse one fails (exit 1), a
// missing policy cannot be decided (exit 2); each time the script keeps
// the JSON it got and, when the gate ran, the HTML report, and the JSON is
// checked against the command's schema.
func TestCIExample(t *testing.T) {
	if testing.Short() {
		t.Skip("runs the demo")
	}
	bash, err := exec.LookPath("bash")
	if err != nil {
		t.Skip("no bash")
	}
	dir := t.TempDir()
	store, work := filepath.Join(dir, "store"), filepath.Join(dir, "work")
	mustMG(t, store, "demo", "--work", work)
	models := filepath.Join(work, "models")
	// CI's signing key goes to the script as the PEM text in an environment
	// variable (MODELGATE_CI_KEY), as a CI secret store exposes it: the
	// script writes no key file, modelgate reads it with --sign-key env:….
	ciKey, err := os.ReadFile(filepath.Join(work, "keys", "ci.key.pem"))
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		name, model, policy string
		code                int
	}{
		{"better", "cand-better", filepath.Join(work, "policies", "promo-scorer.yaml"), 0},
		{"worse", "cand-worse", filepath.Join(work, "policies", "promo-scorer.yaml"), 1},
		{"no-policy", "cand-better", filepath.Join(dir, "absent.yaml"), 2},
	} {
		t.Run(c.name, func(t *testing.T) {
			out := filepath.Join(dir, "out-"+c.name)
			src := filepath.Join(models, "promo-scorer-"+strings.TrimPrefix(c.model, "cand-"))
			if _, err := os.Stat(src); err != nil {
				t.Fatalf("the demo's model directory for %s: %v", c.model, err)
			}
			cmd := exec.Command(bash, filepath.Join("..", "..", "examples", "ci", "gate.sh"))
			cmd.Env = append(os.Environ(), "MODELGATE="+mgBinary, "MODELGATE_STORE="+store, "CANDIDATE_DIR="+src,
				"CANDIDATE=promo-scorer:ci-"+c.name, "TARGET=promo-scorer:prod", "POLICY="+c.policy,
				"MODELGATE_CI_KEY="+string(ciKey), "OUT="+out)
			var so, se bytes.Buffer
			cmd.Stdout, cmd.Stderr = &so, &se
			err := cmd.Run()
			code := 0
			if ee, ok := err.(*exec.ExitError); ok {
				code = ee.ExitCode()
			} else if err != nil {
				t.Fatal(err)
			}
			if code != c.code {
				t.Fatalf("gate.sh exit %d, want %d\nstdout: %s\nstderr: %s", code, c.code, so.String(), se.String())
			}
			validate := func(file, command string) map[string]any {
				raw, err := os.ReadFile(filepath.Join(out, file))
				if err != nil {
					t.Fatal(err)
				}
				vs, err := schemas.Validate(schemas.Output(command), raw)
				if err != nil {
					t.Fatal(err)
				}
				if len(vs) > 0 {
					t.Errorf("%s breaks %s:\n%s", file, schemas.Output(command), schemas.Join("  ", vs))
				}
				var doc map[string]any
				_ = json.Unmarshal(raw, &doc)
				return doc
			}
			push := validate("push.json", "push")
			if !strings.Contains(so.String(), "pushed promo-scorer:ci-"+c.name+" as promo-scorer@"+push["digest"].(string)) {
				t.Errorf("the script did not pin the pushed digest:\n%s", so.String())
			}
			gate := validate("gate.json", "gate")
			rep, _ := gate["report"].(map[string]any)
			switch c.code {
			case 0, 1:
				want := map[int]string{0: "pass", 1: "fail"}[c.code]
				if rep["verdict"] != want {
					t.Errorf("gate.json .report.verdict = %v, want %s", rep["verdict"], want)
				}
				if page, err := os.ReadFile(filepath.Join(out, "report.html")); err != nil || !bytes.Contains(page, []byte("<svg")) {
					t.Errorf("the HTML report was not kept (%v)", err)
				}
				if c.code == 0 {
					// The report was signed with the key from the environment: an
					// approver's approve checks it against the policy's report
					// signer "ci". The approver's key comes on standard input.
					ana, err := os.ReadFile(filepath.Join(work, "keys", "ana.key.pem"))
					if err != nil {
						t.Fatal(err)
					}
					cmd := exec.Command(mgBinary, "--store", store, "approve", "--json", "promo-scorer@"+push["digest"].(string),
						"--to", "promo-scorer:prod", "--policy", c.policy, "--key", "-")
					cmd.Stdin = bytes.NewReader(ana)
					var ao, ae bytes.Buffer
					cmd.Stdout, cmd.Stderr = &ao, &ae
					if err := cmd.Run(); err != nil {
						t.Fatalf("approve of the CI-signed report, key on stdin: %v\n%s%s", err, ao.String(), ae.String())
					}
					var ap map[string]any
					if err := json.Unmarshal(ao.Bytes(), &ap); err != nil || ap["approver"] != "ana" || ap["trusted"] != true || ap["gateReport"] != gate["reportDigest"] {
						t.Errorf("approve --json: %v %v; want ana, trusted, the report %v", ap, err, gate["reportDigest"])
					}
					if vs, err := schemas.Validate(schemas.Output("approve"), ao.Bytes()); err != nil || len(vs) > 0 {
						t.Errorf("approve --json breaks its schema: %v %s", err, schemas.Join("  ", vs))
					}
					// approve shows what it signs: the report's verdict and each
					// of its warnings, as the gate's own JSON lists them.
					nWarn := 0
					checksList, _ := rep["checks"].([]any)
					for _, c := range checksList {
						fs, _ := c.(map[string]any)["findings"].([]any)
						for _, f := range fs {
							if f.(map[string]any)["status"] == "WARN" {
								nWarn++
							}
						}
					}
					ws, _ := ap["warnings"].([]any)
					if ap["verdict"] != "pass" || len(ws) != nWarn {
						t.Errorf("approve --json: verdict %v, %d warnings; the report says pass with %d", ap["verdict"], len(ws), nWarn)
					}
					t.Logf("approve: verdict %v, %d warning(s)", ap["verdict"], len(ws))
				}
			default:
				e, _ := gate["error"].(map[string]any)
				if e["exitCode"] != float64(c.code) || !strings.Contains(se.String(), "absent.yaml") {
					t.Errorf("gate.json error = %v; stderr %q; want exit %d naming the policy file", e, se.String(), c.code)
				}
			}
		})
	}
}
