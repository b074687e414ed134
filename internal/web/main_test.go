package web

import (
	"context"
	"crypto/sha256"
	"fmt"
	"io"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"

	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/demo"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
	"github.com/modelgate/modelgate/internal/report"
)

// demoFixture is the demo scenario published into a temporary local store
// with gate reports for two candidates of promo-scorer:prod.
type demoFixture struct {
	store    *registry.Local
	dir      string
	policy   *policy.Policy
	better   string            // manifest digest of promo-scorer:cand-better (passes)
	worse    string            // manifest digest of promo-scorer:cand-worse (fails)
	baseline string            // what promo-scorer:prod points at
	reports  map[string]string // candidate digest → report manifest digest
	keys     map[string]*release.Key
}

var (
	demoOnce sync.Once
	demoFix  *demoFixture
	demoErr  error
	tempDirs []string
)

func TestMain(m *testing.M) {
	code := m.Run()
	for _, d := range tempDirs {
		os.RemoveAll(d)
	}
	os.Exit(code)
}

// demoStore builds the fixture once per test binary (about ten seconds).
func demoStore(t testing.TB) *demoFixture {
	t.Helper()
	demoOnce.Do(func() { demoFix, demoErr = buildDemo() })
	if demoErr != nil {
		t.Fatal(demoErr)
	}
	return demoFix
}

func buildDemo() (*demoFixture, error) {
	dir, err := os.MkdirTemp("", "modelgate-web-")
	if err != nil {
		return nil, err
	}
	tempDirs = append(tempDirs, dir)
	sc, err := demo.Build(filepath.Join(dir, "work"), demo.DefaultConfig(), nil)
	if err != nil {
		return nil, err
	}
	store, err := registry.OpenLocal(filepath.Join(dir, "store"))
	if err != nil {
		return nil, err
	}
	f := &demoFixture{store: store, dir: dir, reports: map[string]string{}, keys: map[string]*release.Key{}}
	if err := os.MkdirAll(filepath.Join(dir, "keys"), 0o700); err != nil {
		return nil, err
	}
	for _, name := range []string{"rita", "sam", "ops"} {
		k, err := release.GenerateKey(name)
		if err != nil {
			return nil, err
		}
		if _, _, err := release.WriteKeyFiles(filepath.Join(dir, "keys", name), k); err != nil {
			return nil, err
		}
		f.keys[name] = k
	}
	ctx := context.Background()
	if f.policy, err = approvalPolicy(dir, f.keys); err != nil {
		return nil, err
	}
	encPol, err := policy.Load(filepath.Join("..", "..", "policies", "listener-encoder.yaml"))
	if err != nil {
		return nil, err
	}
	// The first release records bind the policies to the production tags.
	if _, err := demo.PublishWith(ctx, store, sc, nil, demo.PublishOptions{ReleaseKey: f.keys["rita"],
		Policies: map[string]*policy.Policy{"promo-scorer:prod": f.policy, "listener-encoder:prod": encPol}}); err != nil {
		return nil, err
	}
	base, err := store.Resolve(ctx, "promo-scorer", "prod")
	if err != nil {
		return nil, err
	}
	f.baseline = base.Digest.String()
	for _, c := range []struct {
		tag  string
		dest *string
	}{{"cand-better", &f.better}, {"cand-worse", &f.worse}} {
		rep, err := runGate(ctx, store, f.policy, "promo-scorer:"+c.tag, "promo-scorer:prod", f.policy.Source)
		if err != nil {
			return nil, err
		}
		d, err := pushReport(ctx, store, rep)
		if err != nil {
			return nil, err
		}
		*c.dest = rep.Candidate.Digest
		f.reports[rep.Candidate.Digest] = d
	}
	// One of the two approvals the policy requires.
	cand, _ := registry.ParseDigest(f.better)
	rd, _ := registry.ParseDigest(f.reports[f.better])
	prod := registry.Ref{Repository: "promo-scorer", Tag: "prod"}
	if _, err := release.Approve(ctx, store, release.ApproveRequest{Candidate: cand, Target: prod, PolicyDigest: f.policy.Digest(),
		Report: rd, Key: f.keys["rita"], Comment: "slices read; fine by me"}); err != nil {
		return nil, err
	}
	// And one by a key the policy does not list, which must not count.
	mallory, err := release.GenerateKey("mallory")
	if err != nil {
		return nil, err
	}
	if _, err := release.Approve(ctx, store, release.ApproveRequest{Candidate: cand, Target: prod, PolicyDigest: f.policy.Digest(),
		Report: rd, Key: mallory, Comment: "looks fine"}); err != nil {
		return nil, err
	}
	// listener-encoder:prod gets a longer log: v2 gated, promoted, rolled back.
	rep, err := runGate(ctx, store, encPol, "listener-encoder:v2", "listener-encoder:prod", "policies/listener-encoder.yaml")
	if err != nil {
		return nil, err
	}
	if _, err := pushReport(ctx, store, rep); err != nil {
		return nil, err
	}
	v2, _ := registry.ParseDigest(rep.Candidate.Digest)
	encProd := registry.Ref{Repository: "listener-encoder", Tag: "prod"}
	// The live scorer reads v1's code, so v2 goes out with the scorer
	// refitted on its code, gated against v2 and approved by rita and sam.
	srep, err := runGateWith(ctx, store, f.policy, "promo-scorer:cand-encoder-v2", "promo-scorer:prod", f.policy.Source, v2.String())
	if err != nil {
		return nil, err
	}
	sd, err := pushReport(ctx, store, srep)
	if err != nil {
		return nil, err
	}
	scand, _ := registry.ParseDigest(srep.Candidate.Digest)
	srd, _ := registry.ParseDigest(sd)
	for _, who := range []string{"rita", "sam"} {
		if _, err := release.Approve(ctx, store, release.ApproveRequest{Candidate: scand, Target: prod, PolicyDigest: f.policy.Digest(),
			Report: srd, Key: f.keys[who], Comment: "refitted on v2's code"}); err != nil {
			return nil, err
		}
	}
	if _, err := release.PromoteUnit(ctx, store, release.UnitRequest{Members: []release.UnitMember{
		{Candidate: v2, Target: encProd, Policy: encPol}, {Candidate: scand, Target: prod, Policy: f.policy}},
		Key: f.keys["ops"], Reason: "lower reconstruction loss; scorer refitted on its code"}); err != nil {
		return nil, err
	}
	if _, err := release.Rollback(ctx, store, release.RollbackRequest{Target: encProd, Key: f.keys["rita"],
		Reason: "canary: fewer subscriptions; back to v1 and its scorer"}); err != nil {
		return nil, err
	}
	return f, nil
}

// approvalPolicy writes a copy of policies/promo-scorer.yaml under dir
// that requires two approvals, by rita and sam, and loads it.
func approvalPolicy(dir string, keys map[string]*release.Key) (*policy.Policy, error) {
	raw, err := os.ReadFile(filepath.Join("..", "..", "policies", "promo-scorer.yaml"))
	if err != nil {
		return nil, err
	}
	entry := func(name string) string {
		return fmt.Sprintf("        - name: %s\n          keyFile: ../keys/%s.pub.pem\n          keyId: \"%s\"\n", name, name, keys[name].ID)
	}
	old := "      required: 0\n      approvers: []\n"
	if !strings.Contains(string(raw), old) {
		return nil, fmt.Errorf("policies/promo-scorer.yaml has no %q to fill in", old)
	}
	text := strings.Replace(string(raw), old, "      required: 2\n      approvers:\n"+entry("rita")+entry("sam")+entry("ops"), 1)
	p := filepath.Join(dir, "policies", "promo-scorer.yaml")
	if err := os.MkdirAll(filepath.Dir(p), 0o755); err != nil {
		return nil, err
	}
	if err := os.WriteFile(p, []byte(text), 0o644); err != nil {
		return nil, err
	}
	return policy.Load(p)
}

// runGate runs the gate as `modelgate gate` does (see
// internal/checks/gate_test.go), with the latency budget left out: timings
// are never pass/fail in tests.
func runGate(ctx context.Context, store registry.Store, pol *policy.Policy, cand, target, source string) (*checks.Report, error) {
	return runGateWith(ctx, store, pol, cand, target, source, "")
}

// runGateWith is runGate with the rule's encoder tag taken to point at
// encoder (when not ""): the world after a release that moves it too.
func runGateWith(ctx context.Context, store registry.Store, pol *policy.Policy, cand, target, source, encoder string) (*checks.Report, error) {
	rule, err := pol.Rule(target)
	if err != nil {
		return nil, err
	}
	encTag := encoder
	if et := rule.Freeze.EncoderTag; et != nil && encTag == "" {
		if d, err := store.Resolve(ctx, et.Repository, et.Tag); err == nil {
			encTag = d.Digest.String()
		}
	}
	c, err := registry.ParseRef(cand, false)
	if err != nil {
		return nil, err
	}
	tg, err := registry.ParseRef(target, false)
	if err != nil {
		return nil, err
	}
	cfg := checks.FromRule(rule, encTag)
	cfg.Budget.P50ms, cfg.Budget.P99ms = nil, nil
	return checks.Run(ctx, checks.Gate{Store: store, Candidate: c, Target: tg, Holdout: rule.HoldoutRef, Config: cfg,
		Policy: checks.Policy{Name: pol.Name, Source: source, Digest: pol.Digest()}})
}

func pushReport(ctx context.Context, store registry.Store, rep *checks.Report) (string, error) {
	var page strings.Builder
	if err := report.HTML(&page, rep); err != nil {
		return "", err
	}
	d, err := checks.PushReport(ctx, store, rep, []byte(page.String()))
	if err != nil {
		return "", err
	}
	return d.Digest.String(), nil
}

// response is what a request to the handler gave.
type response struct {
	status int
	header http.Header
	body   string
}

func do(t testing.TB, h http.Handler, method, path string) response {
	t.Helper()
	req := httptest.NewRequest(method, path, nil)
	rec := httptest.NewRecorder()
	h.ServeHTTP(rec, req)
	res := rec.Result()
	b, err := io.ReadAll(res.Body)
	if err != nil {
		t.Fatal(err)
	}
	return response{status: res.StatusCode, header: res.Header, body: string(b)}
}

func get(t testing.TB, h http.Handler, path string) response {
	t.Helper()
	return do(t, h, http.MethodGet, path)
}

// mustGet fetches path and fails the test unless it answers 200.
func mustGet(t testing.TB, h http.Handler, path string) string {
	t.Helper()
	r := get(t, h, path)
	if r.status != http.StatusOK {
		t.Fatalf("GET %s: %d\n%s", path, r.status, r.body)
	}
	return r.body
}

func newServer(t testing.TB, store registry.Store, opts Options) *Server {
	t.Helper()
	if opts.Logf == nil {
		opts.Logf = t.Logf
	}
	s, err := New(store, opts)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

func mustResolve(t testing.TB, f *demoFixture, repo, tag string) string {
	t.Helper()
	d, err := f.store.Resolve(context.Background(), repo, tag)
	if err != nil {
		t.Fatal(err)
	}
	return d.Digest.String()
}

func newRecorder() *httptest.ResponseRecorder { return httptest.NewRecorder() }

// storeState summarises every file of the fixture's store: name, size,
// modification time and, for index.json, its bytes.
func storeState(t testing.TB, f *demoFixture) string {
	t.Helper()
	var b strings.Builder
	root := filepath.Join(f.dir, "store")
	err := filepath.Walk(root, func(p string, info os.FileInfo, err error) error {
		if err != nil {
			return err
		}
		fmt.Fprintf(&b, "%s %d %d\n", strings.TrimPrefix(p, root), info.Size(), info.ModTime().UnixNano())
		if info.Name() == "index.json" {
			raw, err := os.ReadFile(p)
			if err != nil {
				return err
			}
			sum := sha256.Sum256(raw)
			fmt.Fprintf(&b, "  %x\n", sum)
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return b.String()
}
