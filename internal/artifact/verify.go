package artifact

import (
	"context"
	"encoding/json"
	"fmt"
	"runtime"
	"sort"
	"sync"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/registry"
)

// VerifyReport is the result of verifying a whole store.
type VerifyReport struct {
	Store        string             `json:"store"`
	Repositories int                `json:"repositories"`
	Tags         int                `json:"tags"`
	Manifests    int                `json:"manifests"`
	Models       int                `json:"models"`
	Findings     []registry.Finding `json:"findings"`
	Damage       int                `json:"damage"`
	Hints        int                `json:"hints"`
}

// OK reports whether no damage was found (hints are harmless).
func (r *VerifyReport) OK() bool { return r.Damage == 0 }

func (r *VerifyReport) add(sev, where, format string, args ...any) {
	r.Findings = append(r.Findings, registry.Finding{Severity: sev, Where: where, Message: fmt.Sprintf(format, args...)})
}

// VerifyStore checks a whole store: every tag resolves, every manifest
// parses and references present blobs, every model's spec validates and its
// tensors match the spec with finite values, and (when the store can scrub)
// every blob re-hashes to its digest. Unreferenced blobs are hints.
func VerifyStore(ctx context.Context, store registry.Store, progress func(Event)) (*VerifyReport, error) {
	repos, err := store.Repositories(ctx)
	if err != nil {
		return nil, err
	}
	return verify(ctx, store, repos, true, progress)
}

// VerifyRepositories checks the named repositories of a store as
// VerifyStore checks all of them, for stores that cannot list their
// repositories (registry.ErrNoCatalog). It does not look for unreferenced
// blobs: other repositories may reference them.
func VerifyRepositories(ctx context.Context, store registry.Store, repos []string, progress func(Event)) (*VerifyReport, error) {
	for _, r := range repos {
		if err := registry.ValidateRepository(r); err != nil {
			return nil, err
		}
	}
	return verify(ctx, store, repos, false, progress)
}

func verify(ctx context.Context, store registry.Store, repos []string, scrub bool, progress func(Event)) (*VerifyReport, error) {
	rep := &VerifyReport{Store: store.String()}
	rep.Repositories = len(repos)
	referenced := map[v1.Hash]bool{}
	for _, repo := range repos {
		manifests := map[v1.Hash]bool{}
		tags, err := store.Tags(ctx, repo)
		if err != nil {
			rep.add(registry.SeverityDamage, repo, "listing tags: %v", err)
			continue
		}
		for _, tag := range tags {
			rep.Tags++
			d, err := store.Resolve(ctx, repo, tag)
			if err != nil {
				rep.add(registry.SeverityDamage, repo+":"+tag, "tag does not resolve: %v", err)
				continue
			}
			manifests[d.Digest] = true
		}
		if ml, ok := store.(registry.ManifestLister); ok {
			ds, err := ml.Manifests(ctx, repo)
			if err != nil {
				rep.add(registry.SeverityDamage, repo, "listing manifests: %v", err)
			}
			for _, d := range ds {
				manifests[d.Digest] = true
			}
		}
		digests := make([]v1.Hash, 0, len(manifests))
		for d := range manifests {
			digests = append(digests, d)
		}
		sort.Slice(digests, func(i, j int) bool { return digests[i].String() < digests[j].String() })
		var models []modelJob
		for _, d := range digests {
			rep.Manifests++
			where := repo + "@" + d.String()
			if progress != nil {
				progress(Event{Phase: "verify", Name: where, Done: int64(rep.Manifests)})
			}
			referenced[d] = true
			raw, _, err := store.Manifest(ctx, repo, d)
			if err != nil {
				rep.add(registry.SeverityDamage, where, "manifest unreadable: %v", err)
				continue
			}
			var m v1.Manifest
			if err := json.Unmarshal(raw, &m); err != nil {
				rep.add(registry.SeverityDamage, where, "manifest is not valid JSON: %v", err)
				continue
			}
			referenced[m.Config.Digest] = true
			for _, l := range append([]v1.Descriptor{m.Config}, m.Layers...) {
				referenced[l.Digest] = true
				size, err := store.StatBlob(ctx, repo, l.Digest)
				if err != nil {
					rep.add(registry.SeverityDamage, where, "blob %s (%s) missing: %v", l.Digest, l.MediaType, err)
				} else if size != l.Size {
					rep.add(registry.SeverityDamage, where, "blob %s is %d bytes, the manifest says %d", l.Digest, size, l.Size)
				} else if lim := ReadLimit(l.MediaType); size > lim {
					rep.add(registry.SeverityDamage, where, "blob %s (%s) is %d bytes, over the %d bytes modelgate reads: no command can read it", l.Digest, l.MediaType, size, lim)
				}
			}
			if m.Config.MediaType == MediaTypeHoldoutInfo && m.Config.Size <= MaxHoldoutInfoSize {
				// The summary every holdout reader parses first.
				if raw, err := ReadBlob(ctx, store, repo, m.Config, MaxHoldoutInfoSize); err == nil {
					var info HoldoutInfo
					if err := json.Unmarshal(raw, &info); err != nil {
						rep.add(registry.SeverityDamage, where, "holdout summary %s is not valid: %v", m.Config.Digest, err)
					} else if info.Blocks != nil && len(m.Layers) == 1 {
						if err := info.Blocks.Check(m.Layers[0].Size); err != nil {
							rep.add(registry.SeverityDamage, where, "holdout summary %s: %v", m.Config.Digest, err)
						}
					}
				}
			}
			k := KindOf(m.ArtifactType)
			if k != model.KindEncoder && k != model.KindScorer {
				continue
			}
			rep.Models++
			models = append(models, modelJob{where: where, a: &Artifact{Repository: repo, Desc: v1.Descriptor{Digest: d, Size: int64(len(raw))}, Raw: raw, Manifest: m}})
		}
		// Models are checked by one worker per CPU (each streams its tensor
		// blobs); their findings keep manifest order.
		checkModels(ctx, store, models)
		for _, j := range models {
			if j.err != nil {
				rep.add(registry.SeverityDamage, j.where, "model unreadable: %v", j.err)
				continue
			}
			for _, p := range j.problems {
				rep.add(registry.SeverityDamage, j.where, "%s", p)
			}
		}
		if err := ctx.Err(); err != nil {
			return nil, err
		}
	}
	if sc, ok := store.(registry.Scrubber); ok && scrub {
		fs, err := sc.Scrub(ctx, referenced)
		if err != nil {
			return nil, err
		}
		rep.Findings = append(rep.Findings, fs...)
	}
	for _, f := range rep.Findings {
		if f.Severity == registry.SeverityDamage {
			rep.Damage++
		} else {
			rep.Hints++
		}
	}
	return rep, nil
}

type modelJob struct {
	where    string
	a        *Artifact
	problems []string
	err      error
}

// checkModels runs CheckModel on every job, one worker per CPU.
func checkModels(ctx context.Context, store registry.Store, jobs []modelJob) {
	next := make(chan int)
	var wg sync.WaitGroup
	for range max(1, min(runtime.GOMAXPROCS(0), len(jobs))) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range next {
				jobs[i].problems, jobs[i].err = CheckModel(ctx, store, jobs[i].a)
			}
		}()
	}
	for i := range jobs {
		next <- i
	}
	close(next)
	wg.Wait()
}
