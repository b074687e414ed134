package retain

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"sync"
	"testing"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
	"github.com/modelgate/modelgate/internal/version"
)

// clocked is a local store whose manifest times come from a fake clock:
// each manifest is stamped with the clock's reading when put, or put again
// or reused (a refresh, as the store itself does with its file times), so
// a test can push over simulated months in seconds. Versions stay the
// store's own: a reuse changes them, whatever the fake clock says.
type clocked struct {
	*registry.Local
	mu        sync.Mutex
	now       time.Time
	times     map[string]map[v1.Hash]time.Time
	blobTimes map[v1.Hash]time.Time
}

func (c *clocked) PutManifest(ctx context.Context, repo string, mt types.MediaType, raw []byte) (v1.Descriptor, error) {
	d, err := c.Local.PutManifest(ctx, repo, mt, raw)
	if err == nil {
		c.mu.Lock()
		if c.times[repo] == nil {
			c.times[repo] = map[v1.Hash]time.Time{}
		}
		c.times[repo][d.Digest] = c.now
		var m struct {
			Config v1.Descriptor   `json:"config"`
			Layers []v1.Descriptor `json:"layers"`
		}
		if json.Unmarshal(raw, &m) == nil {
			for _, b := range append(m.Layers, m.Config) {
				if b.Digest.Hex != "" {
					c.blobTimes[b.Digest] = c.now
				}
			}
		}
		c.mu.Unlock()
	}
	return d, err
}

func (c *clocked) RefreshBlob(ctx context.Context, repo string, dgst v1.Hash) (int64, error) {
	n, err := c.Local.RefreshBlob(ctx, repo, dgst)
	if err == nil {
		c.mu.Lock()
		c.blobTimes[dgst] = c.now
		c.mu.Unlock()
	}
	return n, err
}

func (c *clocked) RefreshManifest(ctx context.Context, repo string, dgst v1.Hash) (v1.Descriptor, error) {
	d, err := c.Local.RefreshManifest(ctx, repo, dgst)
	if err == nil {
		c.mu.Lock()
		if c.times[repo] == nil {
			c.times[repo] = map[v1.Hash]time.Time{}
		}
		c.times[repo][dgst] = c.now
		c.mu.Unlock()
	}
	return d, err
}

func (c *clocked) ManifestTimes(ctx context.Context, repo string) (map[v1.Hash]time.Time, error) {
	c.mu.Lock()
	defer c.mu.Unlock()
	out := map[v1.Hash]time.Time{}
	for d, t := range c.times[repo] {
		out[d] = t
	}
	return out, nil
}

// ManifestStamps gives the fake times with the store's versions.
func (c *clocked) ManifestStamps(ctx context.Context, repo string) (map[v1.Hash]registry.Stamp, error) {
	ss, err := c.Local.ManifestStamps(ctx, repo)
	if err != nil {
		return nil, err
	}
	c.mu.Lock()
	defer c.mu.Unlock()
	out := map[v1.Hash]registry.Stamp{}
	for d, t := range c.times[repo] {
		if st, ok := ss[d]; ok {
			out[d] = registry.Stamp{Time: t, Version: st.Version}
		}
	}
	return out, nil
}

// Blobs stamps each blob with the fake time of the last manifest put that
// referenced it, or of its last reuse; a blob no manifest did keeps the
// store's own time.
func (c *clocked) Blobs(ctx context.Context, repo string) ([]registry.BlobInfo, error) {
	bs, err := c.Local.Blobs(ctx, repo)
	c.mu.Lock()
	defer c.mu.Unlock()
	for i := range bs {
		if t, ok := c.blobTimes[bs[i].Digest]; ok {
			bs[i].Modified = t
		}
	}
	return bs, err
}

func (c *clocked) advance(d time.Duration) {
	c.mu.Lock()
	c.now = c.now.Add(d)
	c.mu.Unlock()
}

func (c *clocked) clock() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.now
}

const (
	encRepo  = "listener-encoder"
	holdRepo = "listener-holdout"
)

var prod = registry.Ref{Repository: encRepo, Tag: "prod"}

// scene is a store that served a team: candidates pushed by CI over
// simulated time, some promoted to prod, some rolled back.
type scene struct {
	t     testing.TB
	ctx   context.Context
	dir   string
	store *clocked
	pol   *policy.Policy
	base  *modeldir.Model
	// released lists every digest ever promoted to prod.
	released  []v1.Hash
	cands     []v1.Hash
	rollbacks int
}

// start is when the simulated history begins.
var start = time.Date(2026, 1, 5, 9, 0, 0, 0, time.UTC)

func newScene(t testing.TB, retention string) *scene {
	t.Helper()
	dir := t.TempDir()
	l, err := registry.OpenLocal(filepath.Join(dir, "store"))
	if err != nil {
		t.Fatal(err)
	}
	s := &scene{t: t, ctx: context.Background(), dir: dir, store: &clocked{Local: l, now: start, times: map[string]map[v1.Hash]time.Time{}, blobTimes: map[v1.Hash]time.Time{}},
		base: fixture.EncoderModel()}
	text := `schemaVersion: 1
name: listener-encoder
rules:
  - target: listener-encoder:prod
    kind: encoder
    checks:
      holdout: {enabled: false}
      budget: {enabled: false}
` + retention
	p := filepath.Join(dir, "policy.yaml")
	if err := os.WriteFile(p, []byte(text), 0o644); err != nil {
		t.Fatal(err)
	}
	if s.pol, err = policy.Load(p); err != nil {
		t.Fatal(err)
	}
	return s
}

// push pushes candidate i (its own decoder bias, so its own tensor blob)
// as encRepo:tag.
func (s *scene) push(i int, tag string) v1.Hash {
	s.t.Helper()
	d, err := s.tryPush(i, tag)
	if err != nil {
		s.t.Fatal(err)
	}
	s.cands = append(s.cands, d)
	return d
}

// tryPush is push for any goroutine: it returns the error.
func (s *scene) tryPush(i int, tag string) (v1.Hash, error) {
	m := *s.base
	spec := *s.base.Spec
	spec.Name = fmt.Sprintf("listener-encoder-ci-%d", i)
	m.Spec = &spec
	m.Tensors = map[string][]float32{}
	for k, v := range s.base.Tensors {
		m.Tensors[k] = v
	}
	dec := append([]float32(nil), s.base.Tensors["dec.b"]...)
	dec[0] += float32(i+1) * 1e-3
	m.Tensors["dec.b"] = dec
	dir := filepath.Join(s.dir, "models", fmt.Sprint(i))
	if err := modeldir.Write(dir, &m); err != nil {
		return v1.Hash{}, err
	}
	defer os.RemoveAll(dir)
	res, err := artifact.PushModelDir(s.ctx, s.store, dir, registry.Ref{Repository: encRepo, Tag: tag}, artifact.Options{})
	if err != nil {
		return v1.Hash{}, fmt.Errorf("push %d as %s: %w", i, tag, err)
	}
	return registry.ParseDigest(res.Digest)
}

// report stores a passing gate report for cand against prod's current
// target, as the gate writes it (the checks are not run: the collector
// only reads what reports name).
func (s *scene) report(cand v1.Hash) v1.Hash {
	s.t.Helper()
	rep := &checks.Report{SchemaVersion: 1, Tool: checks.Tool{Name: "modelgate", Version: version.Version},
		Created: s.store.clock().Format(time.RFC3339Nano), Target: prod.String(),
		Candidate: checks.Subject{Ref: encRepo + "@" + cand.String(), Digest: cand.String(), Kind: "encoder"},
		Policy:    checks.Policy{Name: s.pol.Name, Source: s.pol.Source, Digest: s.pol.Digest()}, Verdict: checks.VerdictPass,
		Checks: []checks.CheckResult{{Name: "integrity", Status: "PASS"}}}
	if d, err := s.store.Resolve(s.ctx, encRepo, "prod"); err == nil {
		rep.Baseline = &checks.Subject{Digest: d.Digest.String()}
	}
	d, err := checks.PushSignedReport(s.ctx, s.store, rep, nil, nil)
	if err != nil {
		s.t.Fatal(err)
	}
	return d.Digest
}

func (s *scene) promote(cand v1.Hash) {
	s.t.Helper()
	if _, err := release.Promote(s.ctx, s.store, release.PromoteRequest{Candidate: cand, Target: prod, Policy: s.pol, User: "ci", Now: s.store.clock()}); err != nil {
		s.t.Fatalf("promote %s: %v", cand, err)
	}
	s.released = append(s.released, cand)
}

func (s *scene) rollback() {
	s.t.Helper()
	if _, err := release.Rollback(s.ctx, s.store, release.RollbackRequest{Target: prod, Reason: "on-call: listeners saw worse shows", User: "oncall", Now: s.store.clock()}); err != nil {
		s.t.Fatalf("rollback: %v", err)
	}
	s.rollbacks++
}

// history pushes n candidates, one every interval, each with a gate
// report; every promoteEvery-th is promoted, and every rollbackEvery-th
// promotion is followed by a rollback. Every tenth candidate is tagged
// ci-<i>, the others latest (a tag CI moves, which leaves the earlier
// ones untagged).
func (s *scene) history(n int, interval time.Duration, promoteEvery, rollbackEvery int) {
	s.t.Helper()
	promos := 0
	for i := range n {
		tag := "latest"
		if i%10 == 0 {
			tag = fmt.Sprintf("ci-%d", i)
		}
		c := s.push(i, tag)
		s.report(c)
		if (i+1)%promoteEvery == 0 {
			s.promote(c)
			promos++
			if promos%rollbackEvery == 0 {
				s.store.advance(interval / 2)
				s.rollback()
			}
		}
		s.store.advance(interval)
	}
}
