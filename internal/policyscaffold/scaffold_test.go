package policyscaffold

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
)

// world is a local store with the tiny encoder as listener-encoder:prod
// and tiny-encoder:v1 (the tag the tiny scorer's spec names), the tiny scorer (on that encoder) as promo-scorer:prod, a labelled
// holdout promo-holdout:v1 and an unlabelled one listeners:v1.
func world(t *testing.T) (registry.Store, string) {
	t.Helper()
	ctx := context.Background()
	dir := t.TempDir()
	s, err := registry.OpenLocal(filepath.Join(dir, "store"))
	if err != nil {
		t.Fatal(err)
	}
	models := filepath.Join("..", "..", "testdata", "models")
	for _, m := range []struct{ dir, repo, tag string }{
		{"tiny-encoder", "listener-encoder", "prod"},
		{"tiny-encoder", "tiny-encoder", "v1"},
		{"tiny-scorer", "promo-scorer", "prod"},
	} {
		if _, err := artifact.PushModelDir(ctx, s, filepath.Join(models, m.dir), registry.Ref{Repository: m.repo, Tag: m.tag}, artifact.Options{}); err != nil {
			t.Fatal(err)
		}
	}
	vocab, err := os.ReadFile(filepath.Join(models, "tiny-scorer", "vocabulary.txt"))
	if err != nil {
		t.Fatal(err)
	}
	ids := strings.Fields(string(vocab))
	var labelled, unlabelled strings.Builder
	for i := 0; i < 120; i++ {
		row := fmt.Sprintf(`{"row_id":%d,"items":[%q,%q],"values":[%d,%d],"listener_tenure":%g,"show_age":%g`,
			i, ids[i%len(ids)], ids[(i*5+1)%len(ids)], 1+i%7, 2+i%3, float64(i%10)/10, float64(i%4)/4)
		fmt.Fprintf(&labelled, "%s,\"label\":%d}\n", row, i%3%2)
		fmt.Fprintf(&unlabelled, "%s}\n", row)
	}
	for name, text := range map[string]string{"promo-holdout": labelled.String(), "listeners": unlabelled.String()} {
		p := filepath.Join(dir, name+".jsonl")
		if err := os.WriteFile(p, []byte(text), 0o644); err != nil {
			t.Fatal(err)
		}
		if _, err := artifact.PushHoldout(ctx, s, p, registry.Ref{Repository: name, Tag: "v1"}, artifact.Options{}); err != nil {
			t.Fatal(err)
		}
	}
	return s, dir
}

func TestDraftThenCheck(t *testing.T) {
	ctx := context.Background()
	s, dir := world(t)
	k, err := release.GenerateKey("ana")
	if err != nil {
		t.Fatal(err)
	}
	if err := os.MkdirAll(filepath.Join(dir, "keys"), 0o755); err != nil {
		t.Fatal(err)
	}
	_, pub, err := release.WriteKeyFiles(filepath.Join(dir, "keys", "ana"), k)
	if err != nil {
		t.Fatal(err)
	}
	res, err := Draft(ctx, s, DraftOptions{Target: registry.Ref{Repository: "promo-scorer", Tag: "prod"},
		Approvers: []Approver{{Name: "ana", KeyFile: "keys/ana.pub.pem", Path: pub}}, Required: -1, Headroom: 0.25})
	if err != nil {
		t.Fatal(err)
	}
	if res.Kind != "scorer" || res.Holdout != "promo-holdout:v1" || res.EncoderTag != "tiny-encoder:v1" || res.Required != 1 {
		t.Fatalf("draft facts: kind %s, holdout %s, encoder tag %s, required %d", res.Kind, res.Holdout, res.EncoderTag, res.Required)
	}
	if res.MaxBytes < res.Bytes+res.Bytes/4 || res.MaxBytes > res.Bytes+res.Bytes/4+1 {
		t.Fatalf("maxBytes %d for %d measured bytes and 25%% headroom", res.MaxBytes, res.Bytes)
	}
	text := string(res.Policy)
	for _, want := range []string{"kind: scorer", `holdout: "promo-holdout:v1"`, `encoderTag: "tiny-encoder:v1"`,
		fmt.Sprintf("maxBytes: %d", res.MaxBytes), `keyId: "` + k.ID + `"`, "# "} {
		if !strings.Contains(text, want) {
			t.Fatalf("the draft lacks %q:\n%s", want, text)
		}
	}
	path := filepath.Join(dir, "policy.yaml")
	if err := os.WriteFile(path, res.Policy, 0o644); err != nil {
		t.Fatal(err)
	}
	// The draft is a policy the gate reads (schema, keys).
	p, err := policy.Load(path)
	if err != nil {
		t.Fatalf("the draft does not load: %v\n%s", err, text)
	}
	if r, err := p.Rule("promo-scorer:prod"); err != nil || len(r.Approvals.Approvers) != 1 || r.Approvals.Approvers[0].KeyID != k.ID {
		t.Fatalf("rule %+v, %v", r, err)
	}
	rep, err := Check(ctx, s, path, "")
	if err != nil {
		t.Fatal(err)
	}
	if rep.Failed != 0 || len(rep.Rules) != 1 {
		t.Fatalf("check of the draft: %+v", rep)
	}
	got := map[string]Setting{}
	for _, st := range rep.Rules[0].Settings {
		got[st.Path] = st
	}
	for path, want := range map[string]string{
		"checks.holdout.confidence":       "default 0.95",
		"checks.holdout.minAUC":           "policy 0.55",
		"checks.budget.maxBytes":          fmt.Sprintf("policy %d", res.MaxBytes),
		"checks.contract.extraRows.count": "default 256",
		"approvals.maxAge":                "default 72h",
	} {
		st, ok := got[path]
		if !ok || st.Source+" "+FormatValue(st.Value) != want {
			t.Fatalf("setting %s: %+v, want %s", path, st, want)
		}
	}

	// An encoder target drafts with the unlabelled holdout allowed.
	enc, err := Draft(ctx, s, DraftOptions{Target: registry.Ref{Repository: "listener-encoder", Tag: "prod"}, Holdout: "listeners:v1", Required: -1})
	if err != nil || enc.Kind != "encoder" || enc.Required != 0 {
		t.Fatalf("encoder draft: %+v %v", enc, err)
	}
}

func TestDraftRefuses(t *testing.T) {
	ctx := context.Background()
	s, _ := world(t)
	for name, o := range map[string]DraftOptions{
		"no baseline, no --from":    {Target: registry.Ref{Repository: "promo-scorer", Tag: "next"}},
		"unlabelled scorer holdout": {Target: registry.Ref{Repository: "promo-scorer", Tag: "prod"}, Holdout: "listeners:v1"},
		"holdout is a model":        {Target: registry.Ref{Repository: "promo-scorer", Tag: "prod"}, Holdout: "promo-scorer:prod"},
		"more required than people": {Target: registry.Ref{Repository: "promo-scorer", Tag: "prod"}, Required: 1},
		"negative headroom":         {Target: registry.Ref{Repository: "promo-scorer", Tag: "prod"}, Headroom: -1},
	} {
		if _, err := Draft(ctx, s, o); errkind.Of(err) != errkind.BadInput {
			t.Errorf("%s: %v, want bad input", name, err)
		}
	}
}

// A policy that loads but does not fit the store: each problem is a
// finding naming the setting.
func TestCheckFindings(t *testing.T) {
	ctx := context.Background()
	s, dir := world(t)
	write := func(name, body string) string {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, []byte(body), 0o644); err != nil {
			t.Fatal(err)
		}
		return p
	}
	rule := func(target, kind, holdout, checks string) string {
		if checks == "" {
			checks = "      integrity: {enabled: true}\n"
		}
		return fmt.Sprintf("schemaVersion: 1\nname: t\nrules:\n  - target: %s\n    kind: %s\n    holdout: %s\n    checks:\n%s", target, kind, holdout, checks)
	}
	for _, c := range []struct {
		name, body, want, status string
	}{
		{"holdout missing", rule("promo-scorer:prod", "scorer", "promo-holdout:v9", ""), "not in the store", StatusFail},
		{"holdout unlabelled", rule("promo-scorer:prod", "scorer", "listeners:v1", ""), "has no labels", StatusFail},
		{"kind mismatch", rule("promo-scorer:prod", "encoder", "listeners:v1", ""), "serves a scorer", StatusFail},
		{"encoder tag missing", rule("promo-scorer:prod", "scorer", "promo-holdout:v1", "      freeze: {encoderTag: listener-encoder:gone}\n"), "does not exist", StatusFail},
		{"auc below chance", rule("promo-scorer:prod", "scorer", "promo-holdout:v1", "      holdout: {minAUC: 0.4}\n"), "below 0.5", StatusWarn},
		{"log loss above ln 2", rule("promo-scorer:prod", "scorer", "promo-holdout:v1", "      holdout: {maxLogLoss: 0.9}\n"), "ln 2", StatusWarn},
		{"baseline over budget", rule("promo-scorer:prod", "scorer", "promo-holdout:v1", "      budget: {maxBytes: 100}\n"), "the baseline itself measures", StatusFail},
		{"no approvals", rule("promo-scorer:prod", "scorer", "promo-holdout:v1", ""), "needs no one's approval", StatusWarn},
		{"too few rows for slices", rule("promo-scorer:prod", "scorer", "promo-holdout:v1", "      holdout: {slices: {minRows: 500}}\n"), "no slice can be judged", StatusWarn},
	} {
		rep, err := Check(ctx, s, write(strings.ReplaceAll(c.name, " ", "-")+".yaml", c.body), "")
		if err != nil {
			t.Fatalf("%s: %v", c.name, err)
		}
		found := false
		for _, f := range rep.Rules[0].Findings {
			if strings.Contains(f.Message, c.want) && f.Status == c.status {
				found = true
			}
		}
		if !found {
			t.Errorf("%s: no %s finding with %q: %+v", c.name, c.status, c.want, rep.Rules[0].Findings)
		}
	}
	// A key file that cannot be read: the policy does not load (bad input).
	bad := write("badkey.yaml", rule("promo-scorer:prod", "scorer", "promo-holdout:v1", "")+
		"    approvals:\n      required: 1\n      approvers:\n        - {name: ana, keyFile: keys/absent.pub.pem}\n")
	if _, err := Check(ctx, s, bad, ""); errkind.Of(err) != errkind.BadInput || !strings.Contains(err.Error(), "absent.pub.pem") {
		t.Fatalf("unreadable key file: %v", err)
	}
}

func TestCheckRetention(t *testing.T) {
	ctx := context.Background()
	s, dir := world(t)
	body := "schemaVersion: 1\nname: t\nrules:\n  - target: promo-scorer:prod\n    kind: scorer\n    holdout: promo-holdout:v1\n"
	p := filepath.Join(dir, "plain.yaml")
	if err := os.WriteFile(p, []byte(body), 0o644); err != nil {
		t.Fatal(err)
	}
	rep, err := Check(ctx, s, p, "")
	if err != nil {
		t.Fatal(err)
	}
	if len(rep.Retention) != 1 || !strings.Contains(rep.Retention[0].Message, "nothing eligible") {
		t.Errorf("without retention: %+v", rep.Retention)
	}
	p = filepath.Join(dir, "retention.yaml")
	body += "retention:\n  repositories:\n    - {repository: promo-scorer, expireTags: [{tags: \"ci-*\", after: 720h}]}\n    - {repository: \"promo-*\", keepCandidates: 2}\n    - {repository: nowhere}\n"
	if err := os.WriteFile(p, []byte(body), 0o644); err != nil {
		t.Fatal(err)
	}
	warned := rep.Warned
	if rep, err = Check(ctx, s, p, ""); err != nil {
		t.Fatal(err)
	}
	var text []string
	for _, f := range rep.Retention {
		text = append(text, f.Status+" "+f.Message)
	}
	got := strings.Join(text, "\n")
	for _, want := range []string{
		"ok grace period 168h0m0s",
		"ok repository promo-scorer: keeps the newest 10 candidates nothing else keeps; tags ci-* expire after 720h0m0s",
		"ok repository promo-*: keeps the newest 2 candidates nothing else keeps; no tag expires",
		// promo-holdout matches promo-*; nowhere matches nothing.
		"warn retention entry nowhere applies to none",
	} {
		if !strings.Contains(got, want) {
			t.Errorf("retention findings lack %q:\n%s", want, got)
		}
	}
	if strings.Contains(got, "warn retention entry promo-*") || rep.Warned != warned+1 {
		t.Errorf("warnings: %d (was %d)\n%s", rep.Warned, warned, got)
	}
}
