package web

import (
	"context"
	"encoding/json"
	"errors"
	"net/http"
	"sort"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/registry"
)

// digestRef parses a path's NAME@sha256:… reference. A reference that is
// well formed but names a tag, or a digest together with a tag, is sent
// (303) to the canonical NAME@DIGEST address of prefix when resolvable.
func (s *Server) digestRef(ctx context.Context, raw, prefix string) (registry.Ref, error) {
	ref, err := registry.ParseRef(raw, false)
	if err != nil {
		return registry.Ref{}, err
	}
	if ref.HasDigest() && ref.Tag == "" {
		return ref, nil
	}
	if ref.HasDigest() {
		return registry.Ref{}, &redirect{to: prefix + ref.Repository + "@" + ref.Digest.String()}
	}
	d, err := s.store.Resolve(ctx, ref.Repository, ref.Tag)
	if err != nil {
		return registry.Ref{}, err
	}
	return registry.Ref{}, &redirect{to: prefix + ref.Repository + "@" + d.Digest.String()}
}

// tagRef parses a path's NAME:TAG reference.
func tagRef(raw string) (registry.Ref, error) {
	ref, err := registry.ParseRef(raw, false)
	if err != nil {
		return registry.Ref{}, err
	}
	if ref.Tag == "" || ref.HasDigest() {
		return registry.Ref{}, badRequestf("%q: want a tag NAME:TAG", raw)
	}
	return ref, nil
}

// ---- the tag list (home) ----

type tagsData struct {
	Repos   []repoTags
	Pending int
	// Unlisted: the store does not list its repositories (a registry
	// without a catalog); Named are those the policies name, shown instead.
	Unlisted bool
	Named    []string
}

func (s *Server) tagsPage(r *http.Request) (*view, error) {
	ctx := r.Context()
	named, listed, err := s.repositories(ctx)
	if err != nil {
		return nil, err
	}
	repos, err := s.listTags(ctx)
	if err != nil {
		return nil, err
	}
	reports, err := s.scanReports(ctx)
	if err != nil {
		return nil, err
	}
	pending, err := s.candidates(ctx, reports, true)
	if err != nil {
		return nil, err
	}
	return &view{name: "tags", title: "Tags", section: "tags", data: tagsData{Repos: repos, Pending: len(pending), Unlisted: !listed, Named: named}}, nil
}

// ---- the candidate list ----

type candidatesData struct {
	Rows []candidateRow
}

func (s *Server) candidatesPage(r *http.Request) (*view, error) {
	ctx := r.Context()
	reports, err := s.scanReports(ctx)
	if err != nil {
		return nil, err
	}
	rows, err := s.candidates(ctx, reports, true)
	if err != nil {
		return nil, err
	}
	return &view{name: "candidates", title: "Candidates", section: "candidates", data: candidatesData{Rows: rows}}, nil
}

// ---- one tag ----

type tagData struct {
	Row        tagRow
	Candidates []candidateRow
	Commands   []command
}

func (s *Server) tagPage(r *http.Request) (*view, error) {
	ctx := r.Context()
	ref, err := tagRef(r.PathValue("ref"))
	if err != nil {
		return nil, err
	}
	row, err := s.tagRow(ctx, ref.Repository, ref.Tag)
	if err != nil {
		return nil, err
	}
	reports, err := s.scanReports(ctx)
	if err != nil {
		return nil, err
	}
	var mine []reportRef
	for _, rp := range reports {
		if rp.Target == row.Ref {
			mine = append(mine, rp)
		}
	}
	cands, err := s.candidates(ctx, mine, true)
	if err != nil {
		return nil, err
	}
	d := tagData{Row: *row, Candidates: cands}
	if row.Log != nil {
		logCmd := []string{"log", row.Ref}
		if pol, _ := s.policyFor(row.Ref, ""); pol != nil {
			logCmd = append(logCmd, "--policy", pol.Source)
		}
		d.Commands = append(d.Commands,
			command{Label: "Show the release log, verifying its chain and signers", Text: s.cli(logCmd...)},
			command{Label: "See what a rollback would do, changing nothing", Text: s.cli("rollback", row.Ref, "--reason", "WHY", "--dry-run")},
			command{Label: "Roll the tag back to the previous release (no gate; say why, sign with your key)",
				Text: s.cli("rollback", row.Ref, "--reason", "WHY", "--key", keyPlaceholder)})
	}
	return &view{name: "tag", title: row.Ref, section: "tags",
		crumbs: []crumb{{Href: "/", Text: "Tags"}, {Href: repoHref(row.Repo), Text: row.Repo}}, data: d}, nil
}

// ---- one candidate ----

type candidateData struct {
	Repo     string
	Digest   string
	Name     string
	Kind     string
	Sections []targetSection
}

type targetSection struct {
	Target       string
	Current      string
	Promoted     bool
	Stale        bool
	Report       *checks.Report
	ReportDigest string
	Older        []reportRef
	Approvals    *approvalView
	Commands     []command
}

func (s *Server) candidatePage(r *http.Request) (*view, error) {
	ctx := r.Context()
	ref, err := s.digestRef(ctx, r.PathValue("ref"), "/candidates/")
	if err != nil {
		return nil, err
	}
	a, err := s.read(ctx, ref.Repository, ref.Digest)
	if err != nil {
		return nil, err
	}
	if k := a.Kind(); k != model.KindEncoder && k != model.KindScorer {
		return nil, notFoundf("%s is a %s artifact, not a model: it cannot be a candidate", ref, kindName(k))
	}
	descs, err := s.store.Referrers(ctx, ref.Repository, ref.Digest, reportType)
	if err != nil {
		return nil, err
	}
	var reports []reportRef
	for _, d := range descs {
		ra, err := s.read(ctx, ref.Repository, d.Digest)
		if err != nil {
			return nil, err
		}
		if rr, ok := reportRefOf(ra); ok && rr.Candidate == ref.Digest.String() {
			reports = append(reports, rr)
		}
	}
	rows, err := s.candidates(ctx, reports, false)
	if err != nil {
		return nil, err
	}
	d := candidateData{Repo: ref.Repository, Digest: ref.Digest.String(), Kind: a.Kind(),
		Name: a.Manifest.Annotations[artifact.AnnotationName]}
	for _, c := range rows {
		sec := targetSection{Target: c.Target, Current: c.Current, Promoted: c.Promoted, Stale: c.Stale,
			ReportDigest: c.Report.Digest, Approvals: c.Approvals}
		rd, _ := registry.ParseDigest(c.Report.Digest)
		rep, err := checks.ReadReport(ctx, s.store, c.Repo, rd)
		if err != nil {
			return nil, err
		}
		sec.Report = rep
		for _, o := range reports {
			if o.Target == c.Target && o.Digest != c.Report.Digest {
				sec.Older = append(sec.Older, o)
			}
		}
		sort.SliceStable(sec.Older, func(i, j int) bool { return newer(sec.Older[i], sec.Older[j]) })
		sec.Commands = s.candidateCommands(d.Repo+"@"+d.Digest, c, rep)
		d.Sections = append(d.Sections, sec)
	}
	title := "Candidate " + ref.Repository + "@" + shortDigest(d.Digest)
	return &view{name: "candidate", title: title, section: "candidates",
		crumbs: []crumb{{Href: "/candidates", Text: "Candidates"}}, data: d}, nil
}

// candidateCommands lists what a release manager can run next for one
// (candidate, target) pair.
func (s *Server) candidateCommands(cand string, c candidateRow, rep *checks.Report) []command {
	if c.Promoted {
		return nil
	}
	// A tag with a bound policy is judged by it: the commands need no
	// --policy.
	polArgs := []string{"--policy", policyPlaceholder}
	if c.Approvals != nil && c.Approvals.PolicyKnown {
		polArgs = []string{"--policy", c.Approvals.PolicySource}
		if c.Approvals.Bound {
			polArgs = nil
		}
	}
	words := func(w ...string) []string { return append(w, polArgs...) }
	gate := command{Label: "Run the gate again against what the tag points at now", Text: s.cli(words("gate", cand, "--to", c.Target)...)}
	if c.Stale || rep.Verdict != checks.VerdictPass || (c.Approvals != nil && (c.Approvals.ReportEnded || (c.Approvals.PolicyKnown && !c.Approvals.ReportPolicy))) {
		return []command{gate}
	}
	var out []command
	if c.Approvals == nil || !c.Approvals.PolicyKnown || c.Approvals.Counted < c.Approvals.Required {
		out = append(out, command{Label: "Approve (on your own machine, with your private key)",
			Text: s.cli(append(words("approve", cand, "--to", c.Target), "--key", keyPlaceholder)...)})
	}
	out = append(out, command{Label: "Promote once the approvals are in", Text: s.cli(append(words("promote", cand, "--to", c.Target), "--key", keyPlaceholder)...)})
	return out
}

// ---- one repository ----

type repositoryData struct {
	Repo string
	Rows []manifestRow
	Tags []tagRow
}

type manifestRow struct {
	Repo    string
	Digest  string
	Kind    string
	Name    string
	Created string
	Subject string
	Tags    []string
	Summary string
}

func (s *Server) repositoryPage(r *http.Request) (*view, error) {
	ctx := r.Context()
	repo := r.PathValue("repo")
	if err := registry.ValidateRepository(repo); err != nil {
		return nil, err
	}
	tags, err := s.store.Tags(ctx, repo)
	if err != nil {
		return nil, err
	}
	byDigest := map[string][]string{}
	d := repositoryData{Repo: repo}
	var descs []v1.Descriptor
	for _, t := range tags {
		row, err := s.tagRow(ctx, repo, t)
		if errors.Is(err, registry.ErrNotFound) {
			continue
		}
		if err != nil {
			return nil, err
		}
		byDigest[row.Digest] = append(byDigest[row.Digest], t)
		if !isLogHead(row) {
			d.Tags = append(d.Tags, *row)
		}
	}
	if ml, ok := s.store.(registry.ManifestLister); ok {
		if descs, err = ml.Manifests(ctx, repo); err != nil {
			return nil, err
		}
	} else {
		for dg := range byDigest {
			h, _ := registry.ParseDigest(dg)
			descs = append(descs, v1.Descriptor{Digest: h})
		}
	}
	for _, desc := range descs {
		a, err := s.read(ctx, repo, desc.Digest)
		if err != nil {
			return nil, err
		}
		row := manifestRow{Repo: repo, Digest: a.Desc.Digest.String(), Kind: kindName(a.Kind()), Name: a.Manifest.Annotations[artifact.AnnotationName],
			Created: a.Manifest.Annotations[artifact.AnnotationCreated], Tags: byDigest[a.Desc.Digest.String()], Summary: summaryOf(a)}
		if a.Manifest.Subject != nil {
			row.Subject = a.Manifest.Subject.Digest.String()
		}
		d.Rows = append(d.Rows, row)
	}
	sort.SliceStable(d.Rows, func(i, j int) bool {
		if ki, kj := kindOrder(d.Rows[i].Kind), kindOrder(d.Rows[j].Kind); ki != kj {
			return ki < kj
		}
		if d.Rows[i].Created != d.Rows[j].Created {
			return d.Rows[i].Created > d.Rows[j].Created
		}
		return d.Rows[i].Digest < d.Rows[j].Digest
	})
	return &view{name: "repository", title: "Repository " + repo, section: "tags",
		crumbs: []crumb{{Href: "/", Text: "Tags"}}, data: d}, nil
}

func kindName(k string) string {
	if k == "" {
		return "other"
	}
	return k
}

func kindOrder(k string) int {
	switch k {
	case "scorer":
		return 0
	case "encoder":
		return 1
	case "holdout":
		return 2
	case "report":
		return 3
	case "approval":
		return 4
	case "release":
		return 5
	case "committed":
		return 6
	}
	return 7
}

// summaryOf says in a few words what a referrer artifact is about, from
// its annotations.
func summaryOf(a *artifact.Artifact) string {
	ann := a.Manifest.Annotations
	switch a.Kind() {
	case "report":
		return "gate report: " + ann[checks.AnnotationVerdict] + " for " + ann[checks.AnnotationTarget]
	case "approval":
		return "approval for " + ann[checks.AnnotationTarget] + signerNote(ann)
	case "release":
		return "release record for " + ann[checks.AnnotationTarget] + signerNote(ann)
	case "committed":
		return "marks that this release of " + ann[checks.AnnotationTarget] + " took effect (its tag moves succeeded)"
	}
	return ""
}

func signerNote(ann map[string]string) string {
	if k := ann["dev.modelgate.signer.keyid"]; k != "" {
		return ", signed by key " + k
	}
	return ""
}

// ---- open an artifact by repository and digest (a GET form) ----

func (s *Server) openArtifact(r *http.Request) (*view, error) {
	q := r.URL.Query()
	repo, dg := strings.TrimSpace(q.Get("repository")), strings.TrimSpace(q.Get("digest"))
	if repo == "" && dg == "" {
		return nil, &redirect{to: "/"}
	}
	if err := registry.ValidateRepository(repo); err != nil {
		return nil, err
	}
	d, err := registry.ParseDigest(dg)
	if err != nil {
		return nil, err
	}
	return nil, &redirect{to: artifactHref(repo, d.String())}
}

// ---- one artifact ----

type artifactData struct {
	Repo         string
	Digest       string
	Kind         string
	ArtifactType string
	MediaType    string
	Size         int64
	Total        int64
	Tags         []string
	Annotations  []keyValue
	Blobs        []blobRow
	Subject      *link
	Model        *modelData
	ModelProblem string
	Holdout      *artifact.HoldoutInfo
	Report       *reportRef
	Referrers    []manifestRow
	Statement    *statementView
	Commands     []command
}

type keyValue struct{ Key, Value string }

type blobRow struct {
	Role      string
	Title     string
	MediaType string
	Digest    string
	Size      int64
}

// link is an artifact another one names: Found says whether the store
// holds it (then Repo is where).
type link struct {
	Label  string
	Repo   string
	Digest string
	Kind   string
	Found  bool
	Note   string
}

type modelData struct {
	Name        string
	Description string
	Spec        *model.Spec
	Layers      []artifact.LayerRow
	Params      int64
	Problems    []string
	Lineage     []link
	Source      string
	Commit      string
	CreatedBy   string
	Created     string
	UsedBy      []manifestRow
}

func (s *Server) artifactPage(r *http.Request) (*view, error) {
	ctx := r.Context()
	ref, err := s.digestRef(ctx, r.PathValue("ref"), "/artifacts/")
	if err != nil {
		return nil, err
	}
	a, err := s.read(ctx, ref.Repository, ref.Digest)
	if err != nil {
		return nil, err
	}
	d := artifactData{Repo: a.Repository, Digest: a.Desc.Digest.String(), Kind: kindName(a.Kind()),
		ArtifactType: a.Manifest.ArtifactType, MediaType: string(a.Desc.MediaType), Size: a.Desc.Size}
	d.Total = a.Desc.Size + a.Manifest.Config.Size
	d.Blobs = append(d.Blobs, blobRow{Role: "config", MediaType: string(a.Manifest.Config.MediaType),
		Digest: a.Manifest.Config.Digest.String(), Size: a.Manifest.Config.Size})
	for _, l := range a.Manifest.Layers {
		d.Total += l.Size
		d.Blobs = append(d.Blobs, blobRow{Role: "layer", Title: l.Annotations[artifact.AnnotationTitle],
			MediaType: string(l.MediaType), Digest: l.Digest.String(), Size: l.Size})
	}
	for k, v := range a.Manifest.Annotations {
		d.Annotations = append(d.Annotations, keyValue{k, v})
	}
	sort.Slice(d.Annotations, func(i, j int) bool { return d.Annotations[i].Key < d.Annotations[j].Key })
	if d.Tags, err = s.tagsOf(ctx, a.Repository, a.Desc.Digest); err != nil {
		return nil, err
	}
	if sub := a.Manifest.Subject; sub != nil {
		l := link{Label: "subject", Repo: a.Repository, Digest: sub.Digest.String()}
		if sa, err := s.read(ctx, a.Repository, sub.Digest); err == nil {
			l.Found, l.Kind = true, kindName(sa.Kind())
		} else if !errors.Is(err, registry.ErrNotFound) {
			return nil, err
		}
		d.Subject = &l
	}
	switch a.Kind() {
	case model.KindEncoder, model.KindScorer:
		m, problem, err := s.modelData(ctx, a)
		if err != nil {
			return nil, err
		}
		d.Model, d.ModelProblem = m, problem
	case "holdout":
		raw, err := artifact.ReadBlob(ctx, s.store, a.Repository, a.Manifest.Config, artifact.MaxHoldoutInfoSize)
		if err != nil {
			return nil, err
		}
		var info artifact.HoldoutInfo
		if json.Unmarshal(raw, &info) == nil {
			d.Holdout = &info
		}
	case "report":
		if rr, ok := reportRefOf(a); ok {
			d.Report = &rr
		}
	case "approval", "release":
		st, err := s.statement(ctx, a)
		if err != nil {
			return nil, err
		}
		d.Statement = st
	}
	refs, err := s.store.Referrers(ctx, a.Repository, a.Desc.Digest, "")
	if err != nil {
		return nil, err
	}
	for _, rd := range refs {
		ra, err := s.read(ctx, a.Repository, rd.Digest)
		if err != nil {
			return nil, err
		}
		d.Referrers = append(d.Referrers, manifestRow{Repo: a.Repository, Digest: ra.Desc.Digest.String(), Kind: kindName(ra.Kind()),
			Created: ra.Manifest.Annotations[artifact.AnnotationCreated], Summary: summaryOf(ra)})
	}
	sort.SliceStable(d.Referrers, func(i, j int) bool {
		if ki, kj := kindOrder(d.Referrers[i].Kind), kindOrder(d.Referrers[j].Kind); ki != kj {
			return ki < kj
		}
		return d.Referrers[i].Created > d.Referrers[j].Created
	})
	d.Commands = []command{{Label: "Describe it in a terminal", Text: s.cli("show", d.Repo+"@"+d.Digest)}}
	if d.Model != nil {
		d.Commands = append(d.Commands, command{Label: "Write it out as a model directory", Text: s.cli("pull", d.Repo+"@"+d.Digest, "DIR")})
	}
	return &view{name: "artifact", title: d.Kind + " " + d.Repo + "@" + shortDigest(d.Digest), section: "tags",
		crumbs: []crumb{{Href: "/", Text: "Tags"}, {Href: repoHref(d.Repo), Text: d.Repo}}, data: d}, nil
}

// modelData reads a model's spec (not its tensors) and its lineage. A spec
// that cannot be parsed is a problem shown on the page, not an error.
func (s *Server) modelData(ctx context.Context, a *artifact.Artifact) (*modelData, string, error) {
	spec, vs, err := s.specOf(ctx, a)
	if err != nil {
		if errors.Is(err, registry.ErrNotFound) || errors.Is(err, registry.ErrDigestMismatch) {
			return nil, "its spec blob cannot be read: " + err.Error(), nil
		}
		return nil, "", err
	}
	if spec == nil {
		return nil, "its spec is not valid: " + strings.Join(vs, "; "), nil
	}
	m := &modelData{Name: spec.Name, Description: spec.Description, Spec: spec, Problems: vs,
		Source: spec.Lineage.SourceRepository, Commit: spec.Lineage.SourceCommit, CreatedBy: spec.Lineage.CreatedBy, Created: spec.Lineage.Created}
	for _, t := range spec.Tensors {
		n := int64(1)
		for _, x := range t.Shape {
			n *= int64(x)
		}
		m.Params += n
	}
	var encSpec *model.Spec
	if td := spec.Lineage.TrainingData; td != "" {
		tl, err := s.digestLink(ctx, "training data", td, "")
		if err != nil {
			return nil, "", err
		}
		m.Lineage = append(m.Lineage, tl)
	}
	if spec.Encoder != nil {
		l, es, err := s.encoderLink(ctx, a.Repository, spec.Encoder)
		if err != nil {
			return nil, "", err
		}
		encSpec = es
		m.Lineage = append(m.Lineage, l)
		if es != nil && es.Lineage.TrainingData != "" {
			tl, err := s.digestLink(ctx, "the encoder's training data", es.Lineage.TrainingData, "")
			if err != nil {
				return nil, "", err
			}
			m.Lineage = append(m.Lineage, tl)
		}
	}
	if ff := spec.Lineage.FrozenFrom; ff != "" {
		fl, err := s.digestLink(ctx, "frozen from", ff, a.Repository)
		if err != nil {
			return nil, "", err
		}
		m.Lineage = append(m.Lineage, fl)
	}
	m.Layers = artifact.LayerTable(spec, encSpec)
	if spec.Kind == model.KindEncoder {
		if m.UsedBy, err = s.usedBy(ctx, a.Desc.Digest.String()); err != nil {
			return nil, "", err
		}
	}
	return m, "", nil
}

// encoderLink locates a scorer's encoder and reads its spec (nil when the
// store does not hold it).
func (s *Server) encoderLink(ctx context.Context, repo string, ref *model.EncoderRef) (link, *model.Spec, error) {
	l := link{Label: "encoder", Digest: ref.Digest, Kind: model.KindEncoder}
	if ref.Embedded {
		l.Note = "embedded as constants (frozen); this is the encoder it was made from"
	} else {
		l.Note = "referenced by digest; loaded at serving time"
	}
	d, err := registry.ParseDigest(ref.Digest)
	if err != nil {
		l.Note = "the spec names a malformed digest"
		return l, nil, nil
	}
	first := ""
	if r, err := registry.ParseRef(ref.Name, true); err == nil {
		first = r.Repository
	}
	if first == "" {
		first = repo
	}
	found, ok, err := s.locate(ctx, d, first)
	if err != nil || !ok {
		return l, nil, err
	}
	l.Repo, l.Found = found, true
	ea, err := s.read(ctx, found, d)
	if err != nil {
		return l, nil, err
	}
	l.Kind = kindName(ea.Kind())
	if ea.Kind() != model.KindEncoder {
		l.Note = "names a " + l.Kind + " artifact, not an encoder"
		return l, nil, nil
	}
	es, _, err := s.specOf(ctx, ea)
	if err != nil {
		return l, nil, err
	}
	return l, es, nil
}

// digestLink names a digest a spec records; Found when it is an artifact
// of this store.
func (s *Server) digestLink(ctx context.Context, label, digest, first string) (link, error) {
	l := link{Label: label, Digest: digest}
	d, err := registry.ParseDigest(digest)
	if err != nil {
		l.Note = "malformed digest"
		return l, nil
	}
	repo, ok, err := s.locate(ctx, d, first)
	if err != nil {
		return l, err
	}
	if !ok {
		l.Note = "not an artifact of this store (a digest recorded by the training side)"
		return l, nil
	}
	a, err := s.read(ctx, repo, d)
	if err != nil {
		return l, err
	}
	l.Repo, l.Found, l.Kind = repo, true, kindName(a.Kind())
	return l, nil
}

// usedBy lists the models, in any repository, whose encoder is digest.
func (s *Server) usedBy(ctx context.Context, digest string) ([]manifestRow, error) {
	ml, ok := s.store.(registry.ManifestLister)
	if !ok {
		return nil, nil
	}
	repos, err := s.store.Repositories(ctx)
	if errors.Is(err, registry.ErrNoCatalog) {
		return nil, nil // a registry without a catalog: no way to search
	}
	if err != nil {
		return nil, err
	}
	var out []manifestRow
	for _, repo := range repos {
		descs, err := ml.Manifests(ctx, repo)
		if err != nil {
			return nil, err
		}
		for _, desc := range descs {
			if desc.ArtifactType != "" && desc.ArtifactType != artifact.ArtifactType(model.KindScorer) {
				continue
			}
			a, err := s.read(ctx, repo, desc.Digest)
			if err != nil {
				return nil, err
			}
			if a.Kind() == model.KindScorer && a.Manifest.Annotations[artifact.AnnotationEncoder] == digest {
				out = append(out, manifestRow{Repo: repo, Digest: a.Desc.Digest.String(), Kind: a.Kind(), Name: a.Manifest.Annotations[artifact.AnnotationName],
					Created: a.Manifest.Annotations[artifact.AnnotationCreated]})
			}
		}
	}
	return out, nil
}
