package main

import (
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"

	"sigs.k8s.io/yaml"
)

// TestCIWorkflowFile parses examples/ci/github-actions.yml and checks that
// its steps do what the README says: gate.sh runs with every variable the
// script requires set (in the step, its run lines or the job), the encoder
// is pushed and the policy checked before it, and the report is uploaded
// from gate.sh's OUT folder even when the gate fails. The script itself
// runs for real in TestCIExample.
func TestCIWorkflowFile(t *testing.T) {
	raw, err := os.ReadFile(filepath.Join("..", "..", "examples", "ci", "github-actions.yml"))
	if err != nil {
		t.Fatal(err)
	}
	var wf struct {
		Name string `json:"name"`
		// YAML 1.1 (which sigs.k8s.io/yaml follows) reads the key "on" as
		// the boolean true; GitHub reads it as "on".
		On   map[string]any `json:"true"`
		Jobs map[string]struct {
			RunsOn string            `json:"runs-on"`
			Env    map[string]string `json:"env"`
			Steps  []struct {
				Name string            `json:"name"`
				Uses string            `json:"uses"`
				Run  string            `json:"run"`
				If   string            `json:"if"`
				Env  map[string]string `json:"env"`
				With map[string]any    `json:"with"`
			} `json:"steps"`
		} `json:"jobs"`
	}
	if err := yaml.UnmarshalStrict(raw, &wf); err != nil {
		t.Fatalf("github-actions.yml: %v", err)
	}
	// gate.sh's required variables, from its own check loop.
	script, err := os.ReadFile(filepath.Join("..", "..", "examples", "ci", "gate.sh"))
	if err != nil {
		t.Fatal(err)
	}
	m := regexp.MustCompile(`(?m)^for v in ([A-Z_ ]+); do`).FindSubmatch(script)
	if m == nil {
		t.Fatal("gate.sh: no `for v in ...; do` check of its variables")
	}
	required := strings.Fields(string(m[1]))
	if len(wf.On) == 0 {
		t.Fatal("the workflow has no trigger (on:)")
	}
	job, ok := wf.Jobs["gate"]
	if !ok || job.RunsOn == "" || len(job.Steps) == 0 {
		t.Fatalf("no gate job with steps: %+v", wf.Jobs)
	}
	at := map[string]int{}
	for i, s := range job.Steps {
		switch {
		case strings.Contains(s.Run, "examples/ci/gate.sh"):
			at["gate"] = i
			for _, v := range required {
				_, inStep := s.Env[v]
				_, inJob := job.Env[v]
				exported := strings.Contains(s.Run, "export "+v+"=")
				if !inStep && !inJob && !exported {
					t.Errorf("the gate.sh step does not set %s (gate.sh exits 2 without it)", v)
				}
			}
			// The signing key: gate.sh reads SIGN_KEY, by default env:MODELGATE_CI_KEY.
			if _, ok := s.Env["MODELGATE_CI_KEY"]; !ok && s.Env["SIGN_KEY"] == "" && job.Env["SIGN_KEY"] == "" {
				t.Errorf("the gate.sh step passes no signing key (MODELGATE_CI_KEY or SIGN_KEY)")
			}
		case strings.Contains(s.Run, "modelgate push out/encoder"):
			at["encoder"] = i
		case strings.Contains(s.Run, "modelgate policy check"):
			at["policy"] = i
		case strings.HasPrefix(s.Uses, "actions/upload-artifact@"):
			at["upload"] = i
			if s.If != "always()" {
				t.Errorf("the report upload runs only %q: a failed gate's report must be kept (if: always())", s.If)
			}
			if p, _ := s.With["path"].(string); strings.TrimSuffix(p, "/") != job.Env["OUT"] {
				t.Errorf("the upload keeps %q, gate.sh writes to OUT=%q", p, job.Env["OUT"])
			}
		}
	}
	for _, k := range []string{"encoder", "policy", "gate", "upload"} {
		if _, ok := at[k]; !ok {
			t.Fatalf("no %s step in the workflow", k)
		}
	}
	if !(at["encoder"] < at["gate"] && at["policy"] < at["gate"] && at["gate"] < at["upload"]) {
		t.Fatalf("step order %v: encoder and policy check before the gate, the upload after it", at)
	}
}
