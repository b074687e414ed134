package web

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"sort"
	"strings"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
)

// tagLog is a tag's release log as the view shows it.
type tagLog struct {
	// Moved, By and Kind describe the newest record: when the tag last
	// moved, who moved it, and how (promote, rollback, initial).
	Moved string
	By    string
	Kind  string
	// Broken is true when verifying the chain found damage.
	Broken  bool
	Entries int
	// Findings are every finding; Notes those that are not damage.
	Findings []logFinding
	Notes    []logFinding
	Records  []logRecord
}

type logFinding struct {
	Severity, Where, Message string
}

// logRecord is one release record, newest first.
type logRecord struct {
	N        int
	Repo     string
	Digest   string
	Time     string
	Kind     string
	From     string
	To       string
	By       string
	Verified bool
	Reason   string
}

// trustedFor returns the keys a policy trusts for target's records and
// approvals (nil when no policy covers target).
func (s *Server) trustedFor(target string) []release.PublicKey {
	_, rule := s.policyFor(target, "")
	if rule == nil {
		return nil
	}
	keys, err := release.TrustedKeys(append(append([]policy.Key(nil), rule.Approvals.Approvers...), rule.Approvals.ReportSigners...))
	if err != nil {
		return nil
	}
	return keys
}

// tagLog reads and verifies the release log of repo:tag (release.Log
// walks the whole chain); nil when the tag has none.
func (s *Server) tagLog(ctx context.Context, repo, tag string) (*tagLog, error) {
	target := registry.Ref{Repository: repo, Tag: tag}
	rep, err := release.Log(ctx, s.store, target, release.LogOptions{Trusted: s.trustedFor(target.String())})
	if errkind.Is(err, errkind.BadInput) && !errors.Is(err, registry.ErrNotFound) {
		return nil, nil // a tag that cannot have a log (a head pointer's own name)
	}
	if err != nil {
		return nil, err
	}
	if rep.Head == "" {
		return nil, nil
	}
	lg := &tagLog{Entries: len(rep.Entries)}
	for _, f := range rep.Findings {
		lf := logFinding{Severity: f.Severity, Where: f.Where, Message: f.Message}
		lg.Findings = append(lg.Findings, lf)
		if f.Severity == release.SeverityDamage {
			lg.Broken = true
		} else {
			lg.Notes = append(lg.Notes, lf)
		}
	}
	for i, e := range rep.Entries {
		r := e.Record
		lg.Records = append(lg.Records, logRecord{N: len(rep.Entries) - i, Repo: repo, Digest: e.Digest, Time: r.Time,
			Kind: r.Kind, From: r.From, To: r.To, By: r.By.String(), Verified: e.Verified, Reason: r.Reason})
	}
	if len(lg.Records) > 0 {
		lg.Moved, lg.By, lg.Kind = lg.Records[0].Time, lg.Records[0].By, lg.Records[0].Kind
	}
	return lg, nil
}

// isLogHead reports whether a tag names a release-log head (a release
// record) rather than a model or holdout.
func isLogHead(row *tagRow) bool {
	return row.Kind == "release" || strings.HasPrefix(row.Tag, release.HeadTagPrefix)
}

// approvalView is where a candidate stands with its approvals for one
// target.
type approvalView struct {
	// PolicyKnown is false when no --policy covers the target.
	PolicyKnown  bool
	PolicyName   string
	PolicySource string
	PolicyDigest string
	// ReportPolicy is false when the report was made under another
	// version of the policy than the one the server was given.
	ReportPolicy bool
	Required     int
	Approvers    []string
	// Waiting lists the approvers with no approval that counts yet.
	Waiting []string
	// Counted is how many distinct approver keys have an approval that
	// counts now.
	Counted int
	Entries []approvalEntry
	// Problems are what promote would say about the gate reports now
	// (empty when a usable report exists or the policy is unknown).
	Problems []string
	// RolledBack are the rollbacks that took the target away from this
	// candidate, oldest first; ReportEnded is true when the newest report
	// is one of the gate reports they ended (promote would refuse it).
	RolledBack  []release.EndedRelease
	ReportEnded bool
	// Bound is true when the policy shown is the one bound to the target
	// by its release log (read from the store).
	Bound bool
}

type approvalEntry struct {
	Digest   string
	Approver string
	Time     string
	Comment  string
	Counted  bool
	Why      string
}

// policyFor returns the policy and rule covering target, preferring the
// policy whose digest is want.
func (s *Server) policyFor(target, want string) (*policy.Policy, *policy.Rule) {
	var pol *policy.Policy
	var rule *policy.Rule
	for _, p := range s.opts.Policies {
		r, err := p.Rule(target)
		if err != nil {
			continue
		}
		if pol == nil || p.Digest() == want {
			pol, rule = p, r
		}
	}
	return pol, rule
}

// approvals says how many approvals cand has for target against what the
// policy covering target requires. It counts as promote does: a signed
// approval by a key the policy lists as an approver, about this candidate,
// for this target and policy, approving a passing gate report of this
// candidate made against what the tag points at now, not older than the
// policy's maximum age; each key counts once (release.Standing). Promote
// alone also checks who promotes (self-approval), so the page says "so far".
func (s *Server) approvals(ctx context.Context, repo string, cand v1.Hash, target string, rep reportRef) (*approvalView, error) {
	av := &approvalView{}
	tref, err := registry.ParseRef(target, false)
	if err != nil {
		return nil, err
	}
	rb, err := release.RolledBack(ctx, s.store, cand, tref)
	if err != nil {
		return nil, err
	}
	av.RolledBack = rb
	for _, e := range rb {
		for _, d := range e.Ended {
			av.ReportEnded = av.ReportEnded || d == rep.Digest
		}
	}
	pol, rule := s.policyFor(target, rep.Policy)
	// The policy bound to the target, when it has one, is the one promote
	// judges by.
	if b, err := release.BoundPolicy(ctx, s.store, tref); err == nil && b.Policy != nil {
		if r, err := b.Policy.Rule(target); err == nil {
			pol, rule, av.Bound = b.Policy, r, true
		}
	}
	if pol == nil {
		return av, nil
	}
	av.PolicyKnown = true
	av.PolicyName, av.PolicySource, av.PolicyDigest = pol.Name, pol.Source, pol.Digest()
	av.ReportPolicy = rep.Policy == pol.Digest()
	av.Required = rule.Approvals.Required
	for _, k := range rule.Approvals.Approvers {
		av.Approvers = append(av.Approvers, k.Name)
	}
	current := ""
	if d, err := s.store.Resolve(ctx, tref.Repository, tref.Tag); err == nil {
		current = d.Digest.String()
	} else if !errors.Is(err, registry.ErrNotFound) {
		return nil, err
	}
	if current != cand.String() {
		if _, err := release.ApproveCheck(ctx, s.store, cand, tref, pol); err != nil {
			var ref *release.Refusal
			if !errors.As(err, &ref) {
				return nil, err
			}
			av.Problems = ref.Problems
		}
	}
	// Which approvals count: promote's own judgement, so the page and
	// promote cannot disagree.
	j, err := release.Standing(ctx, s.store, cand, tref, pol, time.Now())
	if err != nil {
		return nil, err
	}
	approvers, err := release.TrustedKeys(rule.Approvals.Approvers)
	if err != nil {
		return nil, err
	}
	counted := map[string]bool{}
	for _, a := range j.Approvals {
		e := approvalEntry{Digest: a.Digest, Approver: a.Approver.String(), Time: a.Time, Comment: a.Comment, Counted: a.Counted, Why: a.Why}
		if !a.Verified {
			e.Approver += " (claimed)"
		}
		if a.Counted {
			counted[a.Approver.KeyID] = true
		}
		av.Entries = append(av.Entries, e)
	}
	av.Counted = j.Counted
	for _, k := range approvers {
		if !counted[k.ID] {
			av.Waiting = append(av.Waiting, k.Name)
		}
	}
	sort.SliceStable(av.Entries, func(i, j int) bool { return av.Entries[i].Time > av.Entries[j].Time })
	return av, nil
}

// envelope reads the DSSE envelope layer of a signed artifact.
func (s *Server) envelope(ctx context.Context, repo string, d v1.Hash, want string) (*release.Envelope, error) {
	a, err := s.read(ctx, repo, d)
	if err != nil {
		return nil, err
	}
	if a.Manifest.ArtifactType != want {
		return nil, fmt.Errorf("a %q artifact, not %q", a.Manifest.ArtifactType, want)
	}
	return s.envelopeOf(ctx, a)
}

func (s *Server) envelopeOf(ctx context.Context, a *artifact.Artifact) (*release.Envelope, error) {
	for _, l := range a.Manifest.Layers {
		if l.MediaType != release.MediaTypeEnvelope {
			continue
		}
		raw, err := artifact.ReadBlob(ctx, s.store, a.Repository, l, 4<<20)
		if err != nil {
			return nil, err
		}
		return release.ParseEnvelope(raw)
	}
	return nil, fmt.Errorf("no DSSE envelope layer")
}

// statementView is what an approval or a release record says.
type statementView struct {
	PredicateType string
	Subjects      []string
	KeyIDs        []string
	Predicate     string // indented JSON
	Problem       string
}

// statement reads the signed statement of an approval or release record
// for display; its signature is judged where it counts (the candidate and
// tag pages).
func (s *Server) statement(ctx context.Context, a *artifact.Artifact) (*statementView, error) {
	env, err := s.envelopeOf(ctx, a)
	if err != nil {
		if ctx.Err() != nil {
			return nil, err
		}
		return &statementView{Problem: err.Error()}, nil
	}
	v := &statementView{PredicateType: env.Statement.PredicateType, KeyIDs: env.KeyIDs()}
	for _, sub := range env.Statement.Subject {
		v.Subjects = append(v.Subjects, sub.Name+"@sha256:"+sub.Digest["sha256"])
	}
	var out bytes.Buffer
	if json.Indent(&out, env.Statement.Predicate, "", "  ") == nil {
		v.Predicate = out.String()
	}
	return v, nil
}
