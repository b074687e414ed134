package report

import (
	"bytes"
	"flag"
	"os"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/report/reporttest"
)

var show = flag.Bool("show", false, "print the terminal renderings")

func terminal(t *testing.T, r *checks.Report, opts TerminalOptions) string {
	t.Helper()
	var b bytes.Buffer
	if err := Terminal(&b, r, opts); err != nil {
		t.Fatal(err)
	}
	if *show {
		os.Stdout.Write(b.Bytes())
	}
	return b.String()
}

func wantLines(t *testing.T, out string, lines ...string) {
	t.Helper()
	have := strings.Split(out, "\n")
	for _, want := range lines {
		found := false
		for _, h := range have {
			if strings.TrimRight(h, " ") == want {
				found = true
				break
			}
		}
		if !found {
			t.Errorf("no line %q in:\n%s", want, out)
		}
	}
}

func TestTerminalPass(t *testing.T) {
	out := terminal(t, reporttest.Scorer(), TerminalOptions{ReportDigest: "sha256:" + strings.Repeat("9", 64)})
	wantLines(t, out,
		"PASS  integrity  7 blobs re-hashed, 0 mismatches; spec valid; no NaN/Inf",
		"PASS  freeze     encoder part frozen: 0 trainable tensors, 0 optimizer slots, 0 regularisers",
		"WARN  contract   max deviation 3.1e-07 ≤ tolerance 1e-05 over 6 tests; 1 weak probe",
		"                 WARN  probe row 4: row has one distinct value: rotation cannot reveal a misalignment [contract.weak-probe]",
		"PASS  holdout    upper 95% bound of mean loss difference -0.0021 < margin 0.002",
		"PASS  budget     latency p99 6.8 ms ≤ 10 ms; 3.4 MiB ≤ 8 MiB",
		"verdict: pass — promo-scorer@sha256:111111111111… may replace promo-scorer@sha256:222222222222… on promo-scorer:prod",
		"report     sha256:"+strings.Repeat("9", 64),
		"candidate  "+reporttest.CandidateDigest+"  promo-scorer:cand-better",
		"baseline   "+reporttest.BaselineDigest+"  promo-scorer:prod",
		"holdout    "+reporttest.HoldoutDigest+"  listeners-holdout:2026-03 (200000 rows)",
		"policy     "+reporttest.PolicyDigest+"  promo-scorer-prod (policies/promo-scorer.yaml)",
		"tool       modelgate 0.1.0-test, 2026-03-14T09:26:53Z",
	)
	// A passing check lists none of its findings; the holdout's WARN
	// finding stays hidden because the check passed.
	if strings.Contains(out, "anomalous rows") || strings.Contains(out, "7 of 7 blobs") {
		t.Errorf("findings of passing checks listed:\n%s", out)
	}
	if strings.Contains(out, "\x1b") {
		t.Errorf("colour without Color:\n%q", out)
	}
}

func TestTerminalFirstRelease(t *testing.T) {
	out := terminal(t, reporttest.FirstRelease(), TerminalOptions{})
	wantLines(t, out,
		"verdict: pass — promo-scorer@sha256:111111111111… may go to promo-scorer:prod (first release)",
		"baseline   none (first release)",
	)
	if strings.Contains(out, "report     ") {
		t.Errorf("report digest line without a digest:\n%s", out)
	}
}

func TestTerminalFail(t *testing.T) {
	out := terminal(t, reporttest.Failing(), TerminalOptions{})
	wantLines(t, out,
		"FAIL  contract   probe max deviation 0.031 > tolerance 1e-05",
		"                 WARN  probe row 4: row has one distinct value: rotation cannot reveal a misalignment [contract.weak-probe]",
		"                 FAIL  probe row 3: output 0.412 differs from the recorded 0.381 (0.031, limit 1e-05) [contract.probe]",
		"                 FAIL  probe row 17: output 0.090 differs from the recorded 0.104 (0.014, limit 1e-05) [contract.probe]",
		"FAIL  holdout    upper 95% bound of mean loss difference 0.0113 ≥ margin 0.002",
		"                 FAIL  all rows: candidate worse than baseline beyond the margin (0.0113, limit 0.002) [holdout.noninferiority]",
		"verdict: fail — 2 check(s) failed: contract, holdout",
		"  - contract: probe rows deviate by 0.031 > tolerance 1e-05",
		"  - holdout: upper 95% bound of mean loss difference 0.0113 ≥ margin 0.002",
		"candidate  "+reporttest.CandidateDigest+"  promo-scorer:cand-shuffled",
	)
	// PASS findings of a failing check are not listed.
	if strings.Contains(out, "32 probe rows reproduce") {
		t.Errorf("PASS finding listed:\n%s", out)
	}
}

func TestTerminalMaxFindings(t *testing.T) {
	out := terminal(t, reporttest.Failing(), TerminalOptions{MaxFindings: 1})
	wantLines(t, out, "                 … and 2 more")
	if strings.Contains(out, "probe row 17") {
		t.Errorf("capped finding listed:\n%s", out)
	}
}

func TestTerminalColor(t *testing.T) {
	r := reporttest.Failing()
	plain := terminal(t, r, TerminalOptions{})
	coloured := terminal(t, r, TerminalOptions{Color: true})
	if !strings.Contains(coloured, "\x1b[1;31mFAIL\x1b[0m  contract") {
		t.Errorf("no red FAIL:\n%q", coloured)
	}
	if !strings.Contains(coloured, "\x1b[32mPASS\x1b[0m  integrity") {
		t.Errorf("no green PASS:\n%q", coloured)
	}
	// Without the escapes, the coloured text is the plain text.
	stripped := coloured
	for _, e := range []string{"\x1b[0m", "\x1b[1m", "\x1b[32m", "\x1b[33m", "\x1b[1;31m"} {
		stripped = strings.ReplaceAll(stripped, e, "")
	}
	if stripped != plain {
		t.Errorf("coloured text differs from plain:\n%s\n---\n%s", stripped, plain)
	}
}

func TestTerminalEscapesControls(t *testing.T) {
	out := terminal(t, reporttest.Hostile(), TerminalOptions{})
	if strings.ContainsAny(out, "\x1b\x07") {
		t.Errorf("control characters reach the terminal:\n%q", out)
	}
	for _, want := range []string{`policies/\x1b[2J<script>`, `\x1b]0;owned\a<script>`} {
		if !strings.Contains(out, want) {
			t.Errorf("no escaped %q in:\n%s", want, out)
		}
	}
	if got := clean("a\u202eb\xffc"); got != `a\u202eb\ufffdc` {
		t.Errorf("clean = %q", got)
	}
}

func TestVerdictLineInconsistent(t *testing.T) {
	r := reporttest.Scorer()
	r.Verdict = checks.VerdictFail
	r.Reasons = []string{"approvals missing"}
	if got, want := VerdictLine(r), "verdict: fail — approvals missing"; got != want {
		t.Errorf("VerdictLine = %q, want %q", got, want)
	}
}

func TestArtifactName(t *testing.T) {
	for ref, want := range map[string]string{
		"promo-scorer:prod":                   "promo-scorer",
		"localhost:5000/team/promo-scorer:v1": "localhost:5000/team/promo-scorer",
		"promo-scorer@sha256:abc":             "promo-scorer",
		"localhost:5000/promo-scorer":         "localhost:5000/promo-scorer",
		"":                                    "spec-name",
	} {
		if got := artifactName(&checks.Subject{Ref: ref, Name: "spec-name"}); got != want {
			t.Errorf("artifactName(%q) = %q, want %q", ref, got, want)
		}
	}
}

// TestHumanBytes: binary prefixes as IEC 80000-13 defines them (1 KiB =
// 1024 B, 1 MiB = 1024 KiB).
func TestHumanBytes(t *testing.T) {
	for n, want := range map[int64]string{0: "0 B", 1023: "1023 B", 1024: "1.0 KiB", 1536: "1.5 KiB", 200 << 20: "200.0 MiB", 3 << 30: "3.0 GiB"} {
		if got := HumanBytes(n); got != want {
			t.Errorf("HumanBytes(%d) = %q, want %q", n, got, want)
		}
	}
}
