package web

import (
	"context"
	"errors"
	"sort"
	"sync"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
)

var (
	reportType = artifact.ArtifactType("report")
)

// read reads and parses one manifest.
func (s *Server) read(ctx context.Context, repo string, d v1.Hash) (*artifact.Artifact, error) {
	return artifact.ReadArtifact(ctx, s.store, registry.Ref{Repository: repo, Digest: d})
}

// tagRow is one tag and what it points at.
type tagRow struct {
	Repo    string
	Tag     string
	Ref     string // repo:tag
	Digest  string
	Kind    string
	Name    string // the target's dev.modelgate.name annotation
	Created string // the target's org.opencontainers.image.created
	Log     *tagLog
}

// repoTags groups the tags of one repository.
type repoTags struct {
	Repo string
	Tags []tagRow
}

// repositories lists the store's repositories. A registry that does not
// list them (no catalog) gives the repositories the policies name (their
// target tags, holdouts and encoder tags), sorted, and listed false.
func (s *Server) repositories(ctx context.Context) (repos []string, listed bool, err error) {
	repos, err = s.store.Repositories(ctx)
	if err == nil {
		return repos, true, nil
	}
	if !errors.Is(err, registry.ErrNoCatalog) {
		return nil, false, err
	}
	seen := map[string]bool{}
	add := func(r *registry.Ref) {
		if r != nil && r.Repository != "" && !seen[r.Repository] {
			seen[r.Repository] = true
			repos = append(repos, r.Repository)
		}
	}
	for _, p := range s.opts.Policies {
		for i := range p.Rules {
			add(&p.Rules[i].Target)
			add(p.Rules[i].HoldoutRef)
			add(p.Rules[i].Freeze.EncoderTag)
		}
	}
	sort.Strings(repos)
	return repos, false, nil
}

// listTags reads every tag of every repository, leaving out the tags that
// name release-log heads (they are shown as the log of their tag).
func (s *Server) listTags(ctx context.Context) ([]repoTags, error) {
	repos, _, err := s.repositories(ctx)
	if err != nil {
		return nil, err
	}
	type job struct {
		repo, tag string
		row       *tagRow
		err       error
	}
	var jobs []*job
	for _, repo := range repos {
		tags, err := s.store.Tags(ctx, repo)
		if errors.Is(err, registry.ErrNotFound) {
			continue // a repository that holds only blobs so far
		}
		if err != nil {
			return nil, err
		}
		for _, tag := range tags {
			jobs = append(jobs, &job{repo: repo, tag: tag})
		}
	}
	// Each row waits on the store most of its time: read them a few at a
	// time (a registry answers each request on loopback in milliseconds).
	parallel(len(jobs), rowReaders, func(i int) {
		jobs[i].row, jobs[i].err = s.tagRow(ctx, jobs[i].repo, jobs[i].tag)
	})
	var out []repoTags
	for i := 0; i < len(jobs); {
		rt := repoTags{Repo: jobs[i].repo}
		for ; i < len(jobs) && jobs[i].repo == rt.Repo; i++ {
			row, err := jobs[i].row, jobs[i].err
			if errors.Is(err, registry.ErrNotFound) {
				continue // moved or deleted while we listed
			}
			if err != nil {
				return nil, err
			}
			if isLogHead(row) {
				continue
			}
			rt.Tags = append(rt.Tags, *row)
		}
		// Release tags (with a log) first: they are what serves.
		sort.SliceStable(rt.Tags, func(i, j int) bool { return rt.Tags[i].Log != nil && rt.Tags[j].Log == nil })
		if len(rt.Tags) > 0 {
			out = append(out, rt)
		}
	}
	return out, nil
}

// rowReaders is how many rows of a page are read from the store at once.
const rowReaders = 8

// parallel calls fn(0) … fn(n-1), at most width at a time, and waits for
// all of them.
func parallel(n, width int, fn func(i int)) {
	sem := make(chan struct{}, width)
	var wg sync.WaitGroup
	for i := range n {
		wg.Add(1)
		sem <- struct{}{}
		go func() {
			defer wg.Done()
			defer func() { <-sem }()
			fn(i)
		}()
	}
	wg.Wait()
}

func (s *Server) tagRow(ctx context.Context, repo, tag string) (*tagRow, error) {
	a, err := artifact.ReadArtifact(ctx, s.store, registry.Ref{Repository: repo, Tag: tag})
	if err != nil {
		return nil, err
	}
	row := &tagRow{Repo: repo, Tag: tag, Ref: repo + ":" + tag, Digest: a.Desc.Digest.String(), Kind: a.Kind(),
		Name: a.Manifest.Annotations[artifact.AnnotationName], Created: a.Manifest.Annotations[artifact.AnnotationCreated]}
	if row.Kind == "" {
		row.Kind = "other"
	}
	if isLogHead(row) {
		return row, nil
	}
	lg, err := s.tagLog(ctx, repo, tag)
	if err != nil {
		return nil, err
	}
	row.Log = lg
	return row, nil
}

// tagsOf lists the tags of repo that point at d.
func (s *Server) tagsOf(ctx context.Context, repo string, d v1.Hash) ([]string, error) {
	tags, err := s.store.Tags(ctx, repo)
	if err != nil {
		return nil, err
	}
	var out []string
	for _, t := range tags {
		td, err := s.store.Resolve(ctx, repo, t)
		if errors.Is(err, registry.ErrNotFound) {
			continue
		}
		if err != nil {
			return nil, err
		}
		if td.Digest == d {
			out = append(out, t)
		}
	}
	return out, nil
}

// reportRef is a stored gate report, as its manifest describes it.
type reportRef struct {
	Repo      string
	Digest    string // the report's manifest digest
	Candidate string // its subject
	Target    string
	Verdict   string
	Created   string
	Baseline  string
	Policy    string
}

func reportRefOf(a *artifact.Artifact) (reportRef, bool) {
	if a.Kind() != "report" || a.Manifest.Subject == nil {
		return reportRef{}, false
	}
	ann := a.Manifest.Annotations
	r := reportRef{Repo: a.Repository, Digest: a.Desc.Digest.String(), Candidate: a.Manifest.Subject.Digest.String(),
		Target: ann[checks.AnnotationTarget], Verdict: ann[checks.AnnotationVerdict], Created: ann[artifact.AnnotationCreated],
		Baseline: ann[checks.AnnotationBaseline], Policy: ann[checks.AnnotationPolicy]}
	// The target must be a tag of the report's own repository: a report
	// is stored beside its candidate, in the target's repository.
	t, err := registry.ParseRef(r.Target, false)
	if err != nil || t.Tag == "" || t.HasDigest() || t.Repository != a.Repository {
		return reportRef{}, false
	}
	return r, true
}

// newer orders reports newest first (then by digest, for a stable order).
func newer(a, b reportRef) bool {
	if a.Created != b.Created {
		return a.Created > b.Created
	}
	return a.Digest < b.Digest
}

// scanReports finds every gate report in the store: through the manifest
// listing when the store has one, else through the referrers of every
// tagged model.
func (s *Server) scanReports(ctx context.Context) ([]reportRef, error) {
	repos, _, err := s.repositories(ctx)
	if err != nil {
		return nil, err
	}
	var out []reportRef
	for _, repo := range repos {
		var descs []v1.Descriptor
		if ml, ok := s.store.(registry.ManifestLister); ok {
			if descs, err = ml.Manifests(ctx, repo); err != nil {
				return nil, err
			}
		} else {
			if descs, err = s.taggedReferrers(ctx, repo); err != nil {
				return nil, err
			}
		}
		for _, d := range descs {
			if d.ArtifactType != "" && d.ArtifactType != reportType {
				continue
			}
			a, err := s.read(ctx, repo, d.Digest)
			if err != nil {
				return nil, err
			}
			if r, ok := reportRefOf(a); ok {
				out = append(out, r)
			}
		}
	}
	return out, nil
}

func (s *Server) taggedReferrers(ctx context.Context, repo string) ([]v1.Descriptor, error) {
	tags, err := s.store.Tags(ctx, repo)
	if errors.Is(err, registry.ErrNotFound) {
		return nil, nil
	}
	if err != nil {
		return nil, err
	}
	seen := map[v1.Hash]bool{}
	var out []v1.Descriptor
	for _, t := range tags {
		d, err := s.store.Resolve(ctx, repo, t)
		if err != nil || seen[d.Digest] {
			continue
		}
		seen[d.Digest] = true
		rs, err := s.store.Referrers(ctx, repo, d.Digest, reportType)
		if err != nil {
			return nil, err
		}
		out = append(out, rs...)
	}
	return out, nil
}

// candidateRow is one (candidate, target) pair with a gate report.
type candidateRow struct {
	Repo      string
	Candidate string
	Name      string // the candidate's dev.modelgate.name
	Kind      string
	Target    string
	Report    reportRef // the newest report for the pair
	Reports   int       // how many reports the pair has
	Current   string    // what the target tag points at now ("" when missing)
	Promoted  bool      // the target tag points at the candidate now
	Stale     bool      // the tag moved since the newest report was made
	Approvals *approvalView
}

// candidates gathers (candidate, target) pairs from reports; with
// pendingOnly it keeps the pairs whose target does not point at the
// candidate now.
func (s *Server) candidates(ctx context.Context, reports []reportRef, pendingOnly bool) ([]candidateRow, error) {
	type key struct{ repo, cand, target string }
	byKey := map[key]*candidateRow{}
	var keys []key
	for _, r := range reports {
		k := key{r.Repo, r.Candidate, r.Target}
		c, ok := byKey[k]
		if !ok {
			c = &candidateRow{Repo: r.Repo, Candidate: r.Candidate, Target: r.Target, Report: r}
			byKey[k] = c
			keys = append(keys, k)
		} else if newer(r, c.Report) {
			c.Report = r
		}
		c.Reports++
	}
	// Each pair waits on the store most of its time: read a few at once.
	rows := make([]*candidateRow, len(keys))
	errs := make([]error, len(keys))
	parallel(len(keys), rowReaders, func(i int) {
		rows[i], errs[i] = s.candidate(ctx, byKey[keys[i]], pendingOnly)
	})
	var out []candidateRow
	for i := range keys {
		if errs[i] != nil {
			return nil, errs[i]
		}
		if rows[i] != nil {
			out = append(out, *rows[i])
		}
	}
	sort.SliceStable(out, func(i, j int) bool {
		if out[i].Target != out[j].Target {
			return out[i].Target < out[j].Target
		}
		return newer(out[i].Report, out[j].Report)
	})
	return out, nil
}

// candidate completes one pair: where its target points now, the
// candidate's name and kind, its approvals. nil when pendingOnly and the
// target points at the candidate, or when the candidate is not in the
// store.
func (s *Server) candidate(ctx context.Context, c *candidateRow, pendingOnly bool) (*candidateRow, error) {
	t, _ := registry.ParseRef(c.Target, false)
	d, err := s.store.Resolve(ctx, t.Repository, t.Tag)
	switch {
	case err == nil:
		c.Current = d.Digest.String()
	case !errors.Is(err, registry.ErrNotFound):
		return nil, err
	}
	c.Promoted = c.Current == c.Candidate
	c.Stale = !c.Promoted && c.Current != c.Report.Baseline
	if pendingOnly && c.Promoted {
		return nil, nil
	}
	cd, err := registry.ParseDigest(c.Candidate)
	if err != nil {
		return nil, nil
	}
	a, err := s.read(ctx, c.Repo, cd)
	if errors.Is(err, registry.ErrNotFound) {
		return nil, nil // a report about a candidate that is not in the store
	}
	if err != nil {
		return nil, err
	}
	c.Name, c.Kind = a.Manifest.Annotations[artifact.AnnotationName], a.Kind()
	av, err := s.approvals(ctx, c.Repo, cd, c.Target, c.Report)
	if err != nil {
		return nil, err
	}
	c.Approvals = av
	return c, nil
}

// specOf reads a model's spec without its tensors.
func (s *Server) specOf(ctx context.Context, a *artifact.Artifact) (*model.Spec, []string, error) {
	raw, err := artifact.ReadBlob(ctx, s.store, a.Repository, a.Manifest.Config, modeldir.MaxSpecSize)
	if err != nil {
		return nil, nil, err
	}
	return modeldir.ParseStoredSpec(raw)
}

// locate finds the repository holding manifest d: repo first, then every
// repository of the store. ok is false when none holds it.
func (s *Server) locate(ctx context.Context, d v1.Hash, first string) (string, bool, error) {
	repos, _, err := s.repositories(ctx)
	if err != nil {
		return "", false, err
	}
	if first != "" {
		repos = append([]string{first}, repos...)
	}
	for _, repo := range repos {
		_, _, err := s.store.Manifest(ctx, repo, d)
		if err == nil {
			return repo, true, nil
		}
		if !errors.Is(err, registry.ErrNotFound) {
			return "", false, err
		}
	}
	return "", false, nil
}
