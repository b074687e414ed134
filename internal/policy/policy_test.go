package policy

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/google/go-cmp/cmp"
	"github.com/google/go-cmp/cmp/cmpopts"
	"sigs.k8s.io/yaml"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/schemas"
)

var examples = []string{"../../policies/listener-encoder.yaml", "../../policies/promo-scorer.yaml"}

func mustRef(t testing.TB, s string) registry.Ref {
	t.Helper()
	r, err := registry.ParseRef(s, false)
	if err != nil {
		t.Fatal(err)
	}
	return r
}

func TestExamplePolicies(t *testing.T) {
	enc, err := Load(examples[0])
	if err != nil {
		t.Fatal(err)
	}
	sc, err := Load(examples[1])
	if err != nil {
		t.Fatal(err)
	}

	r, err := sc.Rule("promo-scorer:prod")
	if err != nil {
		t.Fatal(err)
	}
	if r.Kind != KindScorer || r.HoldoutRef == nil || r.HoldoutRef.String() != "promo-holdout:v1" {
		t.Errorf("scorer rule: kind %q holdout %v", r.Kind, r.HoldoutRef)
	}
	if r.Freeze.EncoderTag == nil || r.Freeze.EncoderTag.String() != "listener-encoder:prod" || r.Freeze.RequireFrozen {
		t.Errorf("scorer freeze: %+v", r.Freeze)
	}
	if r.Budget.MaxBytes == nil || *r.Budget.MaxBytes != 512<<10 {
		t.Errorf("scorer maxBytes: %v", r.Budget.MaxBytes)
	}
	// The demo's scorers load about 71 KB of tensors and its over-budget
	// candidate about 1.03 MB (internal/demo, default config): the budget
	// must split them.
	if max := *r.Budget.MaxBytes; !(71_000 < max && max < 1_000_000) {
		t.Errorf("maxBytes %d does not separate the demo's scorers", max)
	}
	if l := r.Budget.Latency; l == nil || l.Candidates != 200 || l.P50Ms == nil || l.P99Ms == nil {
		t.Errorf("scorer latency: %+v", l)
	}
	if r.Approvals.Required != 0 || len(r.Approvals.Approvers) != 0 || r.Approvals.MaxAge != 72*time.Hour {
		t.Errorf("scorer approvals: %+v", r.Approvals)
	}
	if !slicesEqual(r.Holdout.Slices.NonzeroQuantiles, []float64{0.5, 0.9}) || r.Holdout.Slices.PerSliceMargin != 0.005 {
		t.Errorf("scorer slices: %+v", r.Holdout.Slices)
	}
	for _, c := range []string{CheckIntegrity, CheckFreeze, CheckContract, CheckHoldout, CheckBudget} {
		if !r.Enabled(c) {
			t.Errorf("scorer check %s disabled", c)
		}
	}

	e, err := enc.Rule("listener-encoder:prod")
	if err != nil {
		t.Fatal(err)
	}
	if e.Kind != KindEncoder || e.HoldoutRef.String() != "listener-holdout:v1" || e.Holdout.Alpha != 0.5 || e.Holdout.WeightPower != 1 {
		t.Errorf("encoder rule: %+v", e)
	}
	if e.Freeze.EncoderTag != nil || e.Holdout.MinAUC != nil || e.Holdout.Slices.NonzeroQuantiles != nil {
		t.Errorf("encoder rule has scorer settings: %+v", e)
	}
	if sc.Name != "promo-scorer" || enc.Name != "listener-encoder" {
		t.Errorf("names %q %q", sc.Name, enc.Name)
	}
}

func slicesEqual(a, b []float64) bool { return cmp.Equal(a, b) }

func TestDefaults(t *testing.T) {
	p, err := Parse("tiny.yaml", []byte(minimalScorer))
	if err != nil {
		t.Fatal(err)
	}
	f := func(v float64) *float64 { return &v }
	want := Rule{
		Target:     mustRef(t, "promo-scorer:prod"),
		Kind:       KindScorer,
		HoldoutRef: ptr(mustRef(t, "promo-holdout:v1")),
		Integrity:  IntegrityCheck{Enabled: true},
		Freeze:     FreezeCheck{Enabled: true},
		Contract: ContractCheck{
			Enabled:              true,
			ProbeTolerance:       Tolerance{Abs: 1e-5, Rel: 1e-4},
			PermutationTolerance: Tolerance{},
			ExtraRows:            ExtraRows{Count: 256, Seed: 1},
		},
		Holdout: HoldoutCheck{
			Enabled: true, Margin: 0.001, Confidence: 0.95, BootstrapReplicas: 200, Seed: 1,
			Slices:               Slices{NonzeroQuantiles: []float64{0.5, 0.9}, AnomalyQuantile: 0.99, AnomalyWeight: 0.25, PerSliceMargin: 0.001, MinRows: 100},
			MaxNormalizedEntropy: f(1), MinAUC: f(0.5), Tail: Tail{Excess: 5, Action: TailFail},
		},
		Budget:    BudgetCheck{Enabled: true, MaxGrowth: 0.2},
		Approvals: Approvals{MaxAge: 72 * time.Hour},
	}
	if d := cmp.Diff(want, p.Rules[0]); d != "" {
		t.Errorf("scorer defaults (-want +got):\n%s", d)
	}

	p, err = Parse("tiny.yaml", []byte(minimalEncoder))
	if err != nil {
		t.Fatal(err)
	}
	want = Rule{
		Target:     mustRef(t, "listener-encoder:prod"),
		Kind:       KindEncoder,
		HoldoutRef: ptr(mustRef(t, "listener-holdout:v1")),
		Integrity:  IntegrityCheck{Enabled: true},
		Freeze:     FreezeCheck{Enabled: true},
		Contract:   want.Contract,
		Holdout: HoldoutCheck{
			Enabled: true, Margin: 0.001, Confidence: 0.95, BootstrapReplicas: 200, Seed: 1,
			Alpha: 0.5, WeightQuantile: 0.99, WeightPower: 1,
		},
		Budget:    BudgetCheck{Enabled: true, MaxGrowth: 0.2},
		Approvals: Approvals{MaxAge: 72 * time.Hour},
	}
	if d := cmp.Diff(want, p.Rules[0]); d != "" {
		t.Errorf("encoder defaults (-want +got):\n%s", d)
	}

	// A latency section with only its limits takes the default sizes; a
	// slices section without perSliceMargin takes the rule's margin.
	p, err = Parse("x.yaml", []byte(minimalScorer+`    checks:
      holdout: {margin: 0.01}
      budget: {latency: {p99Ms: 3}}
`))
	if err != nil {
		t.Fatal(err)
	}
	r := p.Rules[0]
	if l := r.Budget.Latency; l == nil || l.Candidates != 200 || l.Runs != 200 || l.Blocks != 5 || l.P50Ms != nil || *l.P99Ms != 3 || l.MaxRatio != nil {
		t.Errorf("latency defaults: %+v", l)
	}
	if r.Holdout.Slices.PerSliceMargin != 0.01 {
		t.Errorf("perSliceMargin %v, want the margin 0.01", r.Holdout.Slices.PerSliceMargin)
	}
}

// TestSchemaDefaultsMatch keeps the defaults the schema documents and the
// ones Parse applies in step.
func TestSchemaDefaultsMatch(t *testing.T) {
	raw, err := schemas.Raw(schemas.Policy)
	if err != nil {
		t.Fatal(err)
	}
	var s map[string]any
	if err := json.Unmarshal(raw, &s); err != nil {
		t.Fatal(err)
	}
	get := func(path ...string) any {
		var v any = s
		for _, k := range path {
			m, ok := v.(map[string]any)
			if !ok {
				t.Fatalf("schema path %v: %q is not in an object", path, k)
			}
			v = m[k]
		}
		return v
	}
	def := func(path ...string) any {
		m, _ := get(path...).(map[string]any)
		d, ok := m["default"]
		if !ok {
			t.Errorf("schema %v has no default", path)
		}
		return d
	}
	sc, err := Parse("s.yaml", []byte(minimalScorer))
	if err != nil {
		t.Fatal(err)
	}
	en, err := Parse("e.yaml", []byte(minimalEncoder))
	if err != nil {
		t.Fatal(err)
	}
	r, e := sc.Rules[0], en.Rules[0]
	d := "$defs"
	p := "properties"
	cases := []struct {
		path []string
		got  any
	}{
		{[]string{d, "confidence"}, r.Holdout.Confidence},
		{[]string{d, "bootstrapReplicas"}, float64(r.Holdout.BootstrapReplicas)},
		{[]string{d, "seed"}, float64(r.Holdout.Seed)},
		{[]string{d, "enabled"}, r.Freeze.Enabled},
		{[]string{d, "integrity", p, "enabled"}, r.Integrity.Enabled},
		{[]string{d, "scorerFreeze", p, "requireFrozen"}, r.Freeze.RequireFrozen},
		{[]string{d, "contract", p, "batchTolerance"}, r.Contract.BatchTolerance},
		{[]string{d, "contract", p, "requireDistinctValuesProbes"}, r.Contract.RequireDistinctValuesProbes},
		{[]string{d, "contract", p, "extraRows", p, "count"}, float64(r.Contract.ExtraRows.Count)},
		{[]string{d, "scorerHoldout", p, "margin"}, r.Holdout.Margin},
		{[]string{d, "scorerHoldout", p, "slices", p, "nonzeroQuantiles"}, []any{r.Holdout.Slices.NonzeroQuantiles[0], r.Holdout.Slices.NonzeroQuantiles[1]}},
		{[]string{d, "scorerHoldout", p, "slices", p, "anomalyQuantile"}, r.Holdout.Slices.AnomalyQuantile},
		{[]string{d, "scorerHoldout", p, "slices", p, "anomalyWeight"}, r.Holdout.Slices.AnomalyWeight},
		{[]string{d, "scorerHoldout", p, "slices", p, "failOnSlice"}, r.Holdout.Slices.FailOnSlice},
		{[]string{d, "scorerHoldout", p, "slices", p, "minRows"}, float64(r.Holdout.Slices.MinRows)},
		{[]string{d, "scorerHoldout", p, "maxNormalizedEntropy"}, *r.Holdout.MaxNormalizedEntropy},
		{[]string{d, "scorerHoldout", p, "minAUC"}, *r.Holdout.MinAUC},
		{[]string{d, "encoderHoldout", p, "alpha"}, e.Holdout.Alpha},
		{[]string{d, "encoderHoldout", p, "weightQuantile"}, e.Holdout.WeightQuantile},
		{[]string{d, "encoderHoldout", p, "weightPower"}, e.Holdout.WeightPower},
		{[]string{d, "encoderHoldout", p, "margin"}, e.Holdout.Margin},
		{[]string{d, "budget", p, "maxGrowth"}, r.Budget.MaxGrowth},
		{[]string{d, "budget", p, "latency", p, "candidates"}, float64(defaultCandidates)},
		{[]string{d, "budget", p, "latency", p, "runs"}, float64(defaultRuns)},
		{[]string{d, "budget", p, "latency", p, "blocks"}, float64(defaultBlocks)},
		{[]string{d, "approvals", p, "required"}, float64(r.Approvals.Required)},
		{[]string{d, "approvals", p, "allowSelfApproval"}, r.Approvals.AllowSelfApproval},
		{[]string{d, "approvals", p, "maxAge"}, "72h"},
	}
	for _, c := range cases {
		if got := def(c.path...); !cmp.Equal(got, c.got) {
			t.Errorf("schema %v default %v, Parse applies %v", c.path, got, c.got)
		}
	}
	if r.Approvals.MaxAge != 72*time.Hour {
		t.Errorf("maxAge default %v", r.Approvals.MaxAge)
	}
	// The tolerances' defaults are written in their descriptions.
	for _, c := range []struct {
		field string
		tol   Tolerance
		text  string
	}{
		{"probeTolerance", r.Contract.ProbeTolerance, "{abs: 1e-5, rel: 1e-4}"},
		{"permutationTolerance", r.Contract.PermutationTolerance, "{abs: 0, rel: 0}"},
	} {
		desc, _ := get(d, "contract", p, c.field, "description").(string)
		if !strings.Contains(desc, "default "+c.text) && !strings.Contains(desc, "Default "+c.text) {
			t.Errorf("%s description %q does not state the default %s", c.field, desc, c.text)
		}
	}
	if r.Contract.ProbeTolerance != (Tolerance{Abs: 1e-5, Rel: 1e-4}) || r.Contract.PermutationTolerance != (Tolerance{}) {
		t.Errorf("tolerance defaults %+v %+v", r.Contract.ProbeTolerance, r.Contract.PermutationTolerance)
	}
}

func TestMalformed(t *testing.T) {
	dir := t.TempDir()
	_, goodPEM := testKey(t, 1)
	_, otherPEM := testKey(t, 2)
	writeFile(t, dir, "keys/ana.pem", goodPEM)
	// An ECDSA P-256 public key, made for this test with
	// `openssl ecparam -name prime256v1 -genkey -noout | openssl ec -pubout`.
	ecPEM := "-----BEGIN PUBLIC KEY-----\n" +
		"MFkwEwYHKoZIzj0CAQYIKoZIzj0DAQcDQgAENKcftDMPj74m2eKkPF9eVTYVpibl\n" +
		"Eh9CQNZp5XJOsuRssA3+5DrTX8ZePYAiyKQ+ev84HMcrPd+1L+61TnhyYQ==\n" +
		"-----END PUBLIC KEY-----\n"

	approvers := func(required int, keys string) string {
		return minimalScorer + "    approvals:\n      required: " + strconv.Itoa(required) + "\n      approvers:\n" + keys
	}
	inline := func(name, pemText string) string {
		return "        - name: " + name + "\n          publicKey: |\n            " + indent(pemText, 12) + "\n"
	}

	cases := []struct {
		name string
		file string // default "policy.yaml"
		doc  string
		want []string // substrings of the error message
	}{
		{"wrong type", "", strings.Replace(minimalScorer, "kind: scorer", "kind: scorer\n    checks: {holdout: {margin: small}}", 1),
			[]string{"/rules/0/checks/holdout/margin", "expected number"}},
		{"unknown field", "", minimalScorer + "    checks: {holdout: {marginn: 0.1}}\n",
			[]string{"/rules/0/checks/holdout", "'marginn' not allowed"}},
		{"unknown top-level field", "", minimalScorer + "owner: ana\n", []string{"/: additionalProperties 'owner' not allowed"}},
		{"key id of digits, unquoted", "", minimalScorer + "    approvals:\n      approvers:\n        - {name: ana, publicKey: x, keyId: 1234567890123456}\n",
			[]string{"/rules/0/approvals/approvers/0/keyId", "must be quoted"}},
		{"scorer knob on an encoder", "", minimalEncoder + "    checks: {holdout: {slices: {failOnSlice: true}}}\n",
			[]string{"/rules/0/checks/holdout", "'slices' not allowed"}},
		{"wrong kind", "", strings.Replace(minimalScorer, "kind: scorer", "kind: ranker", 1), []string{"/rules/0/kind"}},
		{"schema version", "", strings.Replace(minimalScorer, "schemaVersion: 1", "schemaVersion: 2", 1), []string{"/schemaVersion", "must be 1"}},
		{"bad target", "", strings.Replace(minimalScorer, "promo-scorer:prod", "Promo-Scorer:prod", 1),
			[]string{"/rules/0/target", "invalid repository name"}},
		{"target without tag", "", strings.Replace(minimalScorer, "promo-scorer:prod", "promo-scorer", 1), []string{"/rules/0/target", "NAME:TAG"}},
		{"target with digest", "", strings.Replace(minimalScorer, "promo-scorer:prod", "promo-scorer@sha256:"+strings.Repeat("a", 64), 1),
			[]string{"/rules/0/target", "without a digest"}},
		{"bad holdout ref", "", strings.Replace(minimalScorer, "promo-holdout:v1", "promo-holdout@sha256:abc", 1),
			[]string{"/rules/0/holdout", "invalid digest"}},
		{"no holdout", "", strings.Replace(minimalScorer, "    holdout: promo-holdout:v1\n", "", 1),
			[]string{"/rules/0: holdout is required"}},
		{"bad encoderTag", "", minimalScorer + "    checks: {freeze: {encoderTag: listener-encoder:-x}}\n",
			[]string{"/rules/0/checks/freeze/encoderTag", "invalid tag"}},
		{"integrity disabled", "", minimalScorer + "    checks: {integrity: {enabled: false}}\n",
			[]string{"/rules/0/checks/integrity/enabled", "cannot be disabled"}},
		{"negative margin", "", minimalScorer + "    checks: {holdout: {margin: -0.01}}\n",
			[]string{"/rules/0/checks/holdout/margin", "must be >= 0"}},
		{"confidence 1", "", minimalScorer + "    checks: {holdout: {confidence: 1}}\n",
			[]string{"/rules/0/checks/holdout/confidence", "must be < 1"}},
		{"confidence 0", "", minimalEncoder + "    checks: {holdout: {confidence: 0}}\n",
			[]string{"/rules/0/checks/holdout/confidence", "must be > 0"}},
		{"quantiles not increasing", "", minimalScorer + "    checks: {holdout: {slices: {nonzeroQuantiles: [0.9, 0.5]}}}\n",
			[]string{"/rules/0/checks/holdout/slices/nonzeroQuantiles/1", "strictly increasing"}},
		{"quantile above anomaly", "", minimalScorer + "    checks: {holdout: {slices: {nonzeroQuantiles: [0.5, 0.995]}}}\n",
			[]string{"/rules/0/checks/holdout/slices/nonzeroQuantiles/1", "anomalyQuantile"}},
		{"p99 below p50", "", minimalScorer + "    checks: {budget: {latency: {p50Ms: 5, p99Ms: 2}}}\n",
			[]string{"/rules/0/checks/budget/latency/p99Ms", "below p50Ms"}},
		{"fewer runs than blocks", "", minimalScorer + "    checks: {budget: {latency: {runs: 3, blocks: 4}}}\n",
			[]string{"/rules/0/checks/budget/latency/runs", "below blocks 4"}},
		{"ratio not positive", "", minimalScorer + "    checks: {budget: {latency: {maxRatio: 0}}}\n",
			[]string{"/rules/0/checks/budget/latency/maxRatio", "must be > 0"}},
		{"fractional integer", "", minimalScorer + "    checks: {budget: {maxBytes: 1.5}}\n",
			[]string{"/rules/0/checks/budget/maxBytes", "expected integer"}},
		{"duplicate targets", "", minimalScorer + "  - target: promo-scorer:prod\n    kind: scorer\n    holdout: promo-holdout:v2\n",
			[]string{"/rules/1/target", `"promo-scorer:prod" is already covered by /rules/0`}},
		{"m > approvers", "", approvers(2, inline("ana", goodPEM)),
			[]string{"/rules/0/approvals/required", "2 approvals required but only 1 approver(s)"}},
		{"bad PEM", "", approvers(1, "        - name: bo\n          publicKey: not a key\n"),
			[]string{"/rules/0/approvals/approvers/0/publicKey", `approver "bo"`, "no PEM block"}},
		{"private key", "", approvers(1, inline("cy", rfc8410PrivatePEM)),
			[]string{"/rules/0/approvals/approvers/0/publicKey", `approver "cy"`, "PRIVATE KEY"}},
		{"ECDSA key", "", approvers(1, inline("di", ecPEM)),
			[]string{"/rules/0/approvals/approvers/0/publicKey", `approver "di"`, "the key is ecdsa, want ed25519"}},
		{"missing keyFile", filepath.Join(dir, "policy.yaml"), approvers(1, "        - name: ed\n          keyFile: keys/ed.pem\n"),
			[]string{"/rules/0/approvals/approvers/0/keyFile", `approver "ed"`, "no such file"}},
		{"publicKey and keyFile", filepath.Join(dir, "policy.yaml"), approvers(1, inline("fa", goodPEM)+"          keyFile: keys/ana.pem\n"),
			[]string{"/rules/0/approvals/approvers/0/keyFile", "not allowed together with publicKey"}},
		{"no key at all", "", approvers(1, "        - name: gu\n"),
			[]string{"/rules/0/approvals/approvers/0", "missing properties: 'publicKey'", "missing properties: 'keyFile'"}},
		{"same key twice", filepath.Join(dir, "policy.yaml"), approvers(2, inline("ana", goodPEM)+"        - name: ana2\n          keyFile: keys/ana.pem\n"),
			[]string{"/rules/0/approvals/approvers/1/keyFile", `approver "ana2" has the same public key as /rules/0/approvals/approvers/0`}},
		{"same name twice", "", approvers(2, inline("ana", goodPEM)+inline("ana", otherPEM)),
			[]string{"/rules/0/approvals/approvers/1/name", `approver "ana" is listed twice`}},
		{"bad report signer", "", minimalScorer + "    approvals:\n      reportSigners:\n        - name: ci\n          publicKey: x\n",
			[]string{"/rules/0/approvals/reportSigners/0/publicKey", `report signer "ci"`}},
		{"bad maxAge", "", minimalScorer + "    approvals: {maxAge: 3 days}\n", []string{"/rules/0/approvals/maxAge", "not a duration"}},
		{"negative maxAge", "", minimalScorer + "    approvals: {maxAge: -1h}\n", []string{"/rules/0/approvals/maxAge", "positive"}},
		{"YAML syntax error", "", "schemaVersion: 1\nname: x\nrules:\n  - target: [promo-scorer:prod\n    kind: scorer\n",
			[]string{"not valid YAML", "line 4"}},
		{"YAML duplicate key", "", minimalScorer + "name: again\n", []string{"not valid YAML", `line 7: key "name" already set`}},
		{"two YAML documents", "", minimalScorer + "---\n" + minimalScorer, []string{"more than one YAML document"}},
		{"YAML infinity", "", minimalScorer + "    checks: {holdout: {margin: .inf}}\n", []string{"not valid YAML", "infinities"}},
		{"empty file", "", "", []string{"/: expected object, but got null"}},
		{"JSON trailing garbage", "policy.json", `{"schemaVersion": 1, "name": "x", "rules": []}` + "\n  garbage\n",
			[]string{"not valid JSON", "data after the top-level value at line 2, column 3"}},
		{"JSON syntax error", "policy.json", "{\n  \"schemaVersion\": 1,\n  \"name\": \"x\"\n  \"rules\": []\n}\n",
			[]string{"not valid JSON", "line 4, column 3"}},
		{"JSON duplicate key", "policy.json", `{"schemaVersion": 1, "name": "x", "rules": [{"target": "a:b", "kind": "scorer", "kind": "encoder"}]}`,
			[]string{"not valid JSON", `/rules/0/kind: key "kind" appears twice`}},
		{"JSON truncated", "policy.json", `{"schemaVersion": 1, "name": "x", "rules": [`, []string{"not valid JSON", "unexpected end of input at line 1"}},
		{"JSON number too large for Go", "policy.json", `{"schemaVersion": 1, "name": "x", "rules": [{"target": "a:b", "kind": "scorer", "holdout": "h:1", "checks": {"holdout": {"margin": 1e400}}}]}`,
			[]string{"/rules/checks/holdout/margin", "cannot hold"}},
		{"content sniffed as JSON", "policy", `{"schemaVersion": 1} {}`, []string{"not valid JSON", "data after"}},
		{"too deep", "policy.json", strings.Repeat("[", 100) + strings.Repeat("]", 100), []string{"nested deeper than 64"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			file := c.file
			if file == "" {
				file = "policy.yaml"
			}
			p, err := Parse(file, []byte(c.doc))
			if err == nil {
				t.Fatalf("parsed: %+v", p)
			}
			if !errkind.Is(err, errkind.BadInput) {
				t.Errorf("kind %v, want bad input: %v", errkind.Of(err), err)
			}
			var probs *Problems
			if !errors.As(err, &probs) || probs.File != file {
				t.Errorf("not a *Problems for %s: %#v", file, err)
			}
			msg := err.Error()
			if !strings.Contains(msg, "policy "+file) {
				t.Errorf("message does not name the file %s:\n%s", file, msg)
			}
			for _, w := range c.want {
				if !strings.Contains(msg, w) {
					t.Errorf("message lacks %q:\n%s", w, msg)
				}
			}
		})
	}
	if len(cases) < 12 {
		t.Fatalf("only %d cases", len(cases))
	}
}

func TestEveryViolationListed(t *testing.T) {
	doc := `schemaVersion: 1
name: many
rules:
  - target: promo-scorer:prod
    kind: scorer
    holdout: promo-holdout:v1
    colour: blue
    checks:
      holdout: {margin: -1, confidence: 2, bootstrapReplicas: 5}
      budget: {maxBytes: 0}
  - target: listener-encoder:prod
    kind: encoder
    holdout: listener-holdout:v1
    checks:
      integrity: {enabled: false}
`
	_, err := Parse("many.yaml", []byte(doc))
	var probs *Problems
	if !errors.As(err, &probs) {
		t.Fatalf("%v", err)
	}
	want := []string{
		"/rules/0: additionalProperties 'colour' not allowed",
		"/rules/0/checks/budget/maxBytes: must be >= 1 but found 0",
		"/rules/0/checks/holdout/bootstrapReplicas: must be >= 100 but found 5",
		"/rules/0/checks/holdout/confidence: must be < 1 but found 2",
		"/rules/0/checks/holdout/margin: must be >= 0 but found -1",
		"/rules/1/checks/integrity/enabled: value must be true (the integrity check cannot be disabled)",
	}
	if d := cmp.Diff(want, probs.List); d != "" {
		t.Errorf("problems (-want +got):\n%s", d)
	}
	if !strings.HasPrefix(err.Error(), "policy many.yaml has 6 problems:\n  /rules/0:") {
		t.Errorf("message:\n%s", err)
	}

	// Cross-field problems are all listed too.
	doc = minimalScorer + `    checks:
      freeze: {encoderTag: "Bad:tag"}
      budget: {latency: {p50Ms: 2, p99Ms: 1}}
    approvals: {required: 1, maxAge: soon}
  - target: promo-scorer:prod
    kind: scorer
`
	_, err = Parse("cross.yaml", []byte(doc))
	if !errors.As(err, &probs) {
		t.Fatalf("%v", err)
	}
	want = []string{
		"/rules/0/checks/freeze/encoderTag:",
		"/rules/0/checks/budget/latency/p99Ms:",
		"/rules/0/approvals/maxAge:",
		"/rules/0/approvals/required:",
		"/rules/1: holdout is required",
		"/rules/1/target:",
	}
	if len(probs.List) != len(want) {
		t.Fatalf("got %d problems, want %d:\n%s", len(probs.List), len(want), err)
	}
	for i, w := range want {
		if !strings.HasPrefix(probs.List[i], w) {
			t.Errorf("problem %d = %q, want prefix %q", i, probs.List[i], w)
		}
	}
}

// fullYAML and fullJSON are one policy written twice, by hand, exercising
// every property. keyFile paths are relative to the policy's directory.
const fullYAML = `# comment
schemaVersion: 1
name: full
description: every knob
rules:
  - target: promo-scorer:prod
    kind: scorer
    holdout: promo-holdout@sha256:%s
    checks:
      integrity: {enabled: true}
      freeze: {enabled: true, requireFrozen: true, encoderTag: listener-encoder:prod}
      contract:
        enabled: true
        probeTolerance: {abs: 2.0e-5, rel: 3.0e-4}
        batchTolerance: 1.0e-7
        permutationTolerance: {abs: 1.0e-6, rel: 0}
        requireDistinctValuesProbes: true
        extraRows: {count: 64, seed: 9007199254740991}
      holdout:
        enabled: true
        margin: 0.002
        confidence: 0.9
        bootstrapReplicas: 500
        seed: 7
        slices: {nonzeroQuantiles: [0.25, 0.5, 0.75], anomalyQuantile: 0.995, anomalyWeight: 0, perSliceMargin: 0.01, failOnSlice: true}
        maxLogLoss: 0.4
        maxNormalizedEntropy: 0.95
        minAUC: 0.7
        maxECE: 0.03
      budget:
        enabled: false
        maxBytes: 4194304
        maxParams: 1000000
        maxGrowth: 0.5
        maxLoadBytes: 8388608
        latency: {candidates: 500, runs: 50, p50Ms: 1.5, p99Ms: 4}
    approvals:
      required: 2
      approvers:
        - name: ana
          keyFile: keys/ana.pem
          keyId: ana-1
        - name: bo
          publicKey: |
            %s
      allowSelfApproval: true
      maxAge: 36h30m
      reportSigners:
        - {name: ci, keyFile: keys/ci.pem}
  - target: listener-encoder:prod
    kind: encoder
    checks:
      freeze: {enabled: false}
      contract: {enabled: false}
      holdout: {enabled: false, alpha: 0.3, weightQuantile: 0.9, weightPower: 2, margin: 0, confidence: 0.99, maxReconstructionLoss: 12.5}
`

const fullJSON = `{
  "schemaVersion": 1, "name": "full", "description": "every knob",
  "rules": [
    {
      "target": "promo-scorer:prod", "kind": "scorer", "holdout": "promo-holdout@sha256:%s",
      "checks": {
        "integrity": {"enabled": true},
        "freeze": {"enabled": true, "requireFrozen": true, "encoderTag": "listener-encoder:prod"},
        "contract": {"enabled": true, "probeTolerance": {"abs": 2e-5, "rel": 3e-4}, "batchTolerance": 1e-7,
          "permutationTolerance": {"abs": 1e-6, "rel": 0}, "requireDistinctValuesProbes": true,
          "extraRows": {"count": 64.0, "seed": 9007199254740991}},
        "holdout": {"enabled": true, "margin": 0.002, "confidence": 0.9, "bootstrapReplicas": 5e2, "seed": 7,
          "slices": {"nonzeroQuantiles": [0.25, 0.5, 0.75], "anomalyQuantile": 0.995, "anomalyWeight": 0, "perSliceMargin": 0.01, "failOnSlice": true},
          "maxLogLoss": 0.4, "maxNormalizedEntropy": 0.95, "minAUC": 0.7, "maxECE": 0.03},
        "budget": {"enabled": false, "maxBytes": 4194304, "maxParams": 1000000, "maxGrowth": 0.5, "maxLoadBytes": 8388608,
          "latency": {"candidates": 500, "runs": 50, "p50Ms": 1.5, "p99Ms": 4}}
      },
      "approvals": {
        "required": 2,
        "approvers": [
          {"name": "ana", "keyFile": "keys/ana.pem", "keyId": "ana-1"},
          {"name": "bo", "publicKey": %s}
        ],
        "allowSelfApproval": true, "maxAge": "36h30m",
        "reportSigners": [{"name": "ci", "keyFile": "keys/ci.pem"}]
      }
    },
    {
      "target": "listener-encoder:prod", "kind": "encoder",
      "checks": {"freeze": {"enabled": false}, "contract": {"enabled": false},
        "holdout": {"enabled": false, "alpha": 0.3, "weightQuantile": 0.9, "weightPower": 2, "margin": 0, "confidence": 0.99, "maxReconstructionLoss": 12.5}}
    }
  ]
}
`

func TestYAMLAndJSONAgree(t *testing.T) {
	dir := t.TempDir()
	anaKey, anaPEM := testKey(t, 1)
	boKey, boPEM := testKey(t, 2)
	ciKey, ciPEM := testKey(t, 3)
	writeFile(t, dir, "pol/keys/ana.pem", anaPEM)
	writeFile(t, dir, "pol/keys/ci.pem", ciPEM)
	hd := strings.Repeat("0123456789abcdef", 4)
	boJSON, _ := json.Marshal(boPEM)
	yp := writeFile(t, dir, "pol/full.yaml", fmt.Sprintf(fullYAML, hd, indent(boPEM, 12)))
	jp := writeFile(t, dir, "pol/full.json", fmt.Sprintf(fullJSON, hd, boJSON))

	y, err := Load(yp)
	if err != nil {
		t.Fatal(err)
	}
	j, err := Load(jp)
	if err != nil {
		t.Fatal(err)
	}
	opts := cmpopts.IgnoreFields(Policy{}, "Source")
	if d := cmp.Diff(y, j, opts, cmpopts.IgnoreUnexported(Policy{})); d != "" {
		t.Errorf("YAML and JSON forms differ (-yaml +json):\n%s", d)
	}
	if y.FileDigest() == j.FileDigest() {
		t.Error("different files share a file digest")
	}
	if y.Digest() != j.Digest() {
		t.Errorf("the YAML and JSON forms of one policy have different canonical digests:\n%s\n%s", y.Canonical(), j.Canonical())
	}

	// Spot checks against the text, so that agreeing on wrong values fails.
	r := y.Rules[0]
	if r.HoldoutRef.Digest.Hex != hd || r.HoldoutRef.Tag != "" {
		t.Errorf("holdout %v", r.HoldoutRef)
	}
	if r.Contract.ExtraRows.Seed != 1<<53-1 || r.Contract.ExtraRows.Count != 64 || r.Holdout.BootstrapReplicas != 500 {
		t.Errorf("integers: %+v %d", r.Contract.ExtraRows, r.Holdout.BootstrapReplicas)
	}
	if r.Approvals.MaxAge != 36*time.Hour+30*time.Minute || r.Approvals.Required != 2 || !r.Approvals.AllowSelfApproval {
		t.Errorf("approvals %+v", r.Approvals)
	}
	keys := []Key{
		{Name: "ana", KeyID: "ana-1", KeyFile: "keys/ana.pem", PublicKey: anaKey},
		{Name: "bo", PublicKey: boKey},
	}
	if d := cmp.Diff(keys, r.Approvals.Approvers); d != "" {
		t.Errorf("approvers (-want +got):\n%s", d)
	}
	if len(r.Approvals.ReportSigners) != 1 || !r.Approvals.ReportSigners[0].PublicKey.Equal(ciKey) {
		t.Errorf("report signers %+v", r.Approvals.ReportSigners)
	}
	if r.Budget.Enabled || r.Enabled(CheckBudget) || !r.Enabled(CheckIntegrity) {
		t.Errorf("enabled flags: %+v", r.Budget)
	}
	e := y.Rules[1]
	if e.HoldoutRef != nil || e.Enabled(CheckHoldout) || e.Holdout.Margin != 0 || *e.Holdout.MaxReconstructionLoss != 12.5 || e.Holdout.WeightPower != 2 {
		t.Errorf("encoder rule %+v", e.Holdout)
	}
}

// TestExamplesAsJSON converts the example policies to JSON and checks the
// JSON parses to the same structs.
func TestExamplesAsJSON(t *testing.T) {
	for _, f := range examples {
		raw, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		js, err := yaml.YAMLToJSON(raw)
		if err != nil {
			t.Fatal(err)
		}
		y, err := Parse(f, raw)
		if err != nil {
			t.Fatal(err)
		}
		j, err := Parse(strings.TrimSuffix(f, ".yaml")+".json", js)
		if err != nil {
			t.Fatal(err)
		}
		if d := cmp.Diff(y.Rules, j.Rules); d != "" {
			t.Errorf("%s: (-yaml +json):\n%s", f, d)
		}
	}
}

func TestDigest(t *testing.T) {
	raw, err := os.ReadFile(examples[1])
	if err != nil {
		t.Fatal(err)
	}
	a, err := Parse("a.yaml", raw)
	if err != nil {
		t.Fatal(err)
	}
	b, err := Load(examples[1])
	if err != nil {
		t.Fatal(err)
	}
	sum := sha256.Sum256(raw)
	want := "sha256:" + hex.EncodeToString(sum[:])
	if a.FileDigest() != want || b.FileDigest() != want {
		t.Errorf("file digests %s %s, want %s", a.FileDigest(), b.FileDigest(), want)
	}
	sum = sha256.Sum256(a.Canonical())
	if a.Digest() != "sha256:"+hex.EncodeToString(sum[:]) || b.Digest() != a.Digest() {
		t.Errorf("digests %s %s are not the sha256 of the canonical form", a.Digest(), b.Digest())
	}
	if _, err := registry.ParseDigest(a.Digest()); err != nil {
		t.Errorf("digest is not an OCI digest: %v", err)
	}

	// A comment changes the bytes, hence the file digest, not the rules
	// nor the canonical digest; a changed setting changes both.
	edited := append([]byte("# reviewed\n"), raw...)
	c, err := Parse("a.yaml", edited)
	if err != nil {
		t.Fatal(err)
	}
	if c.FileDigest() == a.FileDigest() || c.Digest() != a.Digest() {
		t.Errorf("a comment: file digest %s → %s, digest %s → %s", a.FileDigest(), c.FileDigest(), a.Digest(), c.Digest())
	}
	if d := cmp.Diff(a.Rules, c.Rules); d != "" {
		t.Errorf("a comment changed the rules:\n%s", d)
	}
	if Diff(a, c) != nil {
		t.Errorf("Diff of equal policies: %v", Diff(a, c))
	}
	stricter, err := Parse("a.yaml", bytes.Replace(raw, []byte("margin: 0.001"), []byte("margin: 0.0005"), 1))
	if err != nil {
		t.Fatal(err)
	}
	if stricter.Digest() == a.Digest() {
		t.Error("a changed margin kept the canonical digest")
	}
	if d := cmp.Diff([]string{"/rules/0/checks/holdout/margin: 0.001 → 0.0005"}, Diff(a, stricter)); d != "" {
		t.Errorf("Diff (-want +got):\n%s", d)
	}

	// Pinned: the minimal policy's file digest, computed outside Go with
	// coreutils: printf %s "$minimalScorer" | sha256sum.
	m, err := Parse("m.yaml", []byte(minimalScorer))
	if err != nil {
		t.Fatal(err)
	}
	if m.FileDigest() != pinnedMinimalDigest {
		t.Errorf("minimal policy file digest %s, want %s", m.FileDigest(), pinnedMinimalDigest)
	}
	// Its canonical form, computed outside Go with Python 3 (PyYAML and
	// the json module):
	// json.dumps(yaml.safe_load(minimalScorer), sort_keys=True,
	// separators=(",", ":"), ensure_ascii=False).
	const wantCanonical = `{"name":"tiny","rules":[{"holdout":"promo-holdout:v1","kind":"scorer","target":"promo-scorer:prod"}],"schemaVersion":1}`
	if string(m.Canonical()) != wantCanonical {
		t.Errorf("canonical form\n%s\nwant\n%s", m.Canonical(), wantCanonical)
	}
}

// TestCanonicalKeys checks that a key given by file and the same key
// given inline make one canonical form, that the form holds the key
// itself, and that replacing a key file's content changes the digest (the
// file digest alone could not see it).
func TestCanonicalKeys(t *testing.T) {
	dir := t.TempDir()
	_, anaPEM := testKey(t, 1)
	_, boPEM := testKey(t, 2)
	writeFile(t, dir, "keys/ana.pem", anaPEM)
	byFile := minimalScorer + "    approvals:\n      approvers:\n        - name: ana\n          keyFile: keys/ana.pem\n"
	inline := minimalScorer + "    approvals:\n      approvers:\n        - name: ana\n          publicKey: |\n            " + indent(anaPEM, 12) + "\n"
	f, err := Load(writeFile(t, dir, "f.yaml", byFile))
	if err != nil {
		t.Fatal(err)
	}
	i, err := Load(writeFile(t, dir, "i.yaml", inline))
	if err != nil {
		t.Fatal(err)
	}
	if f.Digest() != i.Digest() {
		t.Errorf("by file and inline differ:\n%s\n%s", f.Canonical(), i.Canonical())
	}
	if bytes.Contains(f.Canonical(), []byte("keyFile")) || !bytes.Contains(f.Canonical(), []byte("PUBLIC KEY")) {
		t.Errorf("canonical form does not hold the key itself: %s", f.Canonical())
	}
	writeFile(t, dir, "keys/ana.pem", boPEM)
	g, err := Load(filepath.Join(dir, "f.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	if g.FileDigest() != f.FileDigest() || g.Digest() == f.Digest() {
		t.Errorf("a replaced key file: file digest %s → %s, digest %s → %s", f.FileDigest(), g.FileDigest(), f.Digest(), g.Digest())
	}
	d := Diff(f, g)
	if len(d) != 1 || !strings.HasPrefix(d[0], "/rules/0/approvals/approvers/0/publicKey: key ") {
		t.Errorf("Diff: %q", d)
	}
}

func TestRuleLookup(t *testing.T) {
	doc := minimalScorer + minimalEncoder[strings.Index(minimalEncoder, "  - target"):]
	p, err := Parse("two.yaml", []byte(doc))
	if err != nil {
		t.Fatal(err)
	}
	if d := cmp.Diff([]string{"promo-scorer:prod", "listener-encoder:prod"}, p.Targets()); d != "" {
		t.Error(d)
	}
	r, err := p.Rule("listener-encoder:prod")
	if err != nil || r.Kind != KindEncoder || r != &p.Rules[1] {
		t.Fatalf("%v %+v", err, r)
	}
	_, err = p.Rule("promo-scorer:canary")
	if !errkind.Is(err, errkind.BadInput) || !strings.Contains(err.Error(), "policy two.yaml has no rule for target \"promo-scorer:canary\"; it covers: promo-scorer:prod, listener-encoder:prod") {
		t.Errorf("uncovered target: %v", err)
	}
	for _, bad := range []string{"promo-scorer", "promo-scorer:prod@sha256:" + strings.Repeat("0", 64), "Promo:prod", ""} {
		if _, err := p.Rule(bad); !errkind.Is(err, errkind.BadInput) {
			t.Errorf("Rule(%q): %v", bad, err)
		}
	}
}

func TestLoadErrors(t *testing.T) {
	dir := t.TempDir()
	_, err := Load(filepath.Join(dir, "missing.yaml"))
	if !errkind.Is(err, errkind.BadInput) || !strings.Contains(err.Error(), "missing.yaml") {
		t.Errorf("missing file: %v", err)
	}
	if _, err := Load(dir); !errkind.Is(err, errkind.BadInput) || !strings.Contains(err.Error(), "not a regular file") {
		t.Errorf("directory: %v", err)
	}
	big := writeFile(t, dir, "big.yaml", minimalScorer+"#"+strings.Repeat("x", MaxFileBytes)+"\n")
	_, err = Load(big)
	if !errkind.Is(err, errkind.BadInput) || !strings.Contains(err.Error(), "larger than") || !strings.Contains(err.Error(), big) {
		t.Errorf("big file: %v", err)
	}
}

func TestTolerance(t *testing.T) {
	tol := Tolerance{Abs: 1e-5, Rel: 1e-4}
	cases := []struct {
		got, want float64
		ok        bool
	}{
		{0.5, 0.5, true},
		{0.5 + 5e-5, 0.5, true},  // limit 1e-5 + 0.5e-4 = 6e-5
		{0.5 + 7e-5, 0.5, false}, // beyond it
		{1e-5, 0, true},
		{2e-5, 0, false},
		{math.Inf(1), math.Inf(1), true},
		{math.NaN(), 0.5, false},
		{0.5, math.NaN(), false},
	}
	for _, c := range cases {
		if got := tol.Allows(c.got, c.want); got != c.ok {
			t.Errorf("Allows(%v, %v) = %v", c.got, c.want, got)
		}
	}
	if !(Tolerance{}).Allows(0.25, 0.25) || (Tolerance{}).Allows(0.25, math.Nextafter(0.25, 1)) {
		t.Error("zero tolerance is not bit-identity")
	}
}

func TestRowWeight(t *testing.T) {
	h := HoldoutCheck{WeightPower: 1}
	cases := []struct {
		n    int
		t, w float64
	}{
		{5, 10, 1}, {10, 10, 1}, {20, 10, 0.5}, {1000, 10, 0.01}, {3, 0, 1.0 / 3},
	}
	for _, c := range cases {
		if got := h.RowWeight(c.n, c.t); math.Abs(got-c.w) > 1e-15 {
			t.Errorf("RowWeight(%d, %v) = %v, want %v", c.n, c.t, got, c.w)
		}
	}
	if got := (HoldoutCheck{WeightPower: 2}).RowWeight(40, 10); got != 1.0/16 {
		t.Errorf("power 2: %v", got)
	}
	if got := (HoldoutCheck{WeightPower: 0}).RowWeight(4000, 10); got != 1 {
		t.Errorf("power 0: %v", got)
	}
}

// TestReleasers reads who may promote and roll back.
func TestReleasers(t *testing.T) {
	anaKey, anaPEM := testKey(t, 1)
	doc := minimalScorer + "    releasers:\n      promote:\n        - name: rita\n          publicKey: |\n            " + indent(anaPEM, 12) +
		"\n      rollback:\n        - name: oncall\n          publicKey: |\n            " + indent(anaPEM, 12) + "\n        - name: oncall2\n          publicKey: |\n            " + indent(anaPEM, 12) + "\n"
	_, err := Parse("r.yaml", []byte(doc))
	var probs *Problems
	if !errors.As(err, &probs) || len(probs.List) != 1 || !strings.HasPrefix(probs.List[0], "/rules/0/releasers/rollback/1/publicKey: rollback signer \"oncall2\" has the same public key") {
		t.Fatalf("a key listed twice: %v", err)
	}
	doc = doc[:strings.Index(doc, "        - name: oncall2")]
	p, err := Parse("r.yaml", []byte(doc))
	if err != nil {
		t.Fatal(err)
	}
	r := p.Rules[0].Releasers
	if len(r.Promote) != 1 || r.Promote[0].Name != "rita" || !r.Promote[0].PublicKey.Equal(anaKey) || len(r.Rollback) != 1 || r.Rollback[0].Name != "oncall" {
		t.Errorf("releasers %+v", r)
	}
	m, err := Parse("m.yaml", []byte(minimalScorer))
	if err != nil {
		t.Fatal(err)
	}
	if r := m.Rules[0].Releasers; r.Promote != nil || r.Rollback != nil {
		t.Errorf("releasers of a policy that lists none: %+v", r)
	}
}
