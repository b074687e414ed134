package main

import (
	"testing"

	"github.com/google/go-cmp/cmp"

	"github.com/modelgate/modelgate/internal/checks"
)

func TestReportWarnings(t *testing.T) {
	rep := &checks.Report{Verdict: checks.VerdictPass, Checks: []checks.CheckResult{
		{Name: "contract", Findings: []checks.Finding{
			{Status: checks.StatusPass, Code: "contract.probe", Message: "probes match"},
			{Status: checks.StatusWarn, Code: "contract.values", Message: "probe values all equal"},
		}},
		{Name: "holdout", Findings: []checks.Finding{
			{Status: checks.StatusWarn, Code: "holdout.slice", Where: "anomalous listeners", Message: "loses 0.004 nats"},
			{Status: checks.StatusSkip, Code: "holdout.info", Message: "not judged"},
		}},
	}}
	want := []string{"contract: probe values all equal", "holdout (anomalous listeners): loses 0.004 nats"}
	if d := cmp.Diff(want, reportWarnings(rep)); d != "" {
		t.Errorf("warnings (-want +got):\n%s", d)
	}
	if got := reportWarnings(&checks.Report{}); got == nil || len(got) != 0 {
		t.Errorf("no findings: %#v, want an empty list (JSON [])", got)
	}
}
