package web

import (
	"context"
	"path/filepath"
	"strings"
	"testing"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
)

// Hostile strings put into every free-text field of the store.
const (
	xssScript = `<script>alert("mg")</script>`
	xssImg    = `"><img src=x onerror=alert(1)>`
	xssURL    = `javascript:alert(1)`
	xssStyle  = `</style><style>body{display:none}</style>`
)

// hostileStore pushes the tiny fixture models with HTML and script in
// their spec's free text and in annotations, a gate report and an
// approval with the same, and returns the store and the scorer's digest.
func hostileStore(t testing.TB) (*registry.Local, string, string) {
	t.Helper()
	ctx := context.Background()
	dir := t.TempDir()
	store, err := registry.OpenLocal(filepath.Join(dir, "store"))
	if err != nil {
		t.Fatal(err)
	}
	enc := fixture.EncoderModel()
	enc.Spec.Description = xssScript + xssImg
	enc.Spec.Lineage.SourceRepository = xssURL
	enc.Spec.Lineage.CreatedBy = xssStyle
	encDir := filepath.Join(dir, "enc")
	if err := modeldir.Write(encDir, enc); err != nil {
		t.Fatal(err)
	}
	er, err := artifact.PushModelDir(ctx, store, encDir, registry.Ref{Repository: "tiny-encoder", Tag: "v1"}, artifact.Options{})
	if err != nil {
		t.Fatal(err)
	}
	sc := fixture.ScorerModel(enc, er.Digest)
	sc.Spec.Description = xssImg + xssScript
	sc.Spec.Lineage.SourceRepository = xssURL
	sc.Spec.Encoder.Name = "tiny-encoder:v1"
	scDir := filepath.Join(dir, "scorer")
	if err := modeldir.Write(scDir, sc); err != nil {
		t.Fatal(err)
	}
	sr, err := artifact.PushModelDir(ctx, store, scDir, registry.Ref{Repository: "tiny-scorer", Tag: "cand"}, artifact.Options{})
	if err != nil {
		t.Fatal(err)
	}
	// A holdout-like artifact with hostile annotations and a hostile layer
	// title, tagged so the tag list shows it.
	cfg := artifact.NewBlob("application/vnd.modelgate.spec.v1+json", []byte(`{}`), nil)
	layer := artifact.NewBlob("text/plain", []byte("x"), map[string]string{artifact.AnnotationTitle: xssScript})
	if _, err := artifact.PushArtifact(ctx, store, registry.Ref{Repository: "tiny-scorer", Tag: "odd"}, "application/vnd.example.other",
		cfg, []artifact.Blob{layer}, nil, map[string]string{
			artifact.AnnotationName: xssScript, artifact.AnnotationCreated: xssImg, "dev.modelgate.note": xssStyle + xssURL,
		}, artifact.Options{}); err != nil {
		t.Fatal(err)
	}
	// A gate report whose free text is hostile.
	rep := &checks.Report{SchemaVersion: 1, Tool: checks.Tool{Name: "modelgate", Version: xssScript},
		Created: time.Now().UTC().Format(time.RFC3339), Target: "tiny-scorer:prod",
		Candidate: checks.Subject{Ref: xssImg, Digest: sr.Digest, Kind: "scorer", Name: xssScript},
		Policy:    checks.Policy{Name: xssScript, Source: xssImg, Digest: "sha256:" + strings.Repeat("4", 64)},
		Verdict:   checks.VerdictPass, Reasons: []string{xssScript},
		Checks: []checks.CheckResult{{Name: checks.CheckIntegrity, Status: checks.StatusPass, Summary: xssImg + xssScript,
			Findings: []checks.Finding{{Status: checks.StatusWarn, Code: xssScript, Where: xssImg, Message: xssStyle}}}}}
	rd, err := checks.PushReport(ctx, store, rep, []byte(xssScript))
	if err != nil {
		t.Fatal(err)
	}
	k, err := release.GenerateKey("mallory")
	if err != nil {
		t.Fatal(err)
	}
	cd, _ := registry.ParseDigest(sr.Digest)
	if _, err := release.Approve(ctx, store, release.ApproveRequest{Candidate: cd, Target: registry.Ref{Repository: "tiny-scorer", Tag: "prod"},
		PolicyDigest: rep.Policy.Digest, Report: rd.Digest, Key: k, Comment: xssScript + xssImg}); err != nil {
		t.Fatal(err)
	}
	return store, sr.Digest, rd.Digest.String()
}

// TestServeHostile: HTML and script from the store come out escaped on
// every page, and no link takes a javascript: URL.
func TestServeHostile(t *testing.T) {
	store, scorer, rep := hostileStore(t)
	s := newServer(t, store, Options{})
	ctx := context.Background()
	enc, err := store.Resolve(ctx, "tiny-encoder", "v1")
	if err != nil {
		t.Fatal(err)
	}
	odd, err := store.Resolve(ctx, "tiny-scorer", "odd")
	if err != nil {
		t.Fatal(err)
	}
	pages := []string{"/", "/candidates", "/tags/tiny-scorer:cand", "/tags/tiny-scorer:odd",
		"/candidates/tiny-scorer@" + scorer, "/artifacts/tiny-scorer@" + scorer, "/artifacts/tiny-encoder@" + enc.Digest.String(),
		"/artifacts/tiny-scorer@" + odd.Digest.String(), "/artifacts/tiny-scorer@" + rep, "/repositories/tiny-scorer",
		"/reports/tiny-scorer@" + rep}
	refs, err := store.Referrers(ctx, "tiny-scorer", mustDigest(t, scorer), release.ArtifactTypeApproval)
	if err != nil || len(refs) != 1 {
		t.Fatalf("approval referrers: %v %v", refs, err)
	}
	pages = append(pages, "/artifacts/tiny-scorer@"+refs[0].Digest.String())
	seen := 0
	for _, p := range pages {
		r := get(t, s, p)
		if r.status != 200 {
			t.Errorf("%s: %d\n%s", p, r.status, r.body)
			continue
		}
		for _, raw := range []string{xssScript, xssImg, xssStyle, "<img", `href="javascript:`, "<script"} {
			if strings.Contains(r.body, raw) {
				t.Errorf("%s: the page contains %q unescaped", p, raw)
			}
		}
		if strings.Contains(r.body, "&lt;script&gt;alert(&#34;mg&#34;)&lt;/script&gt;") || strings.Contains(r.body, "&lt;script&gt;alert(&#34;mg&#34;)") {
			seen++
		}
	}
	// The hostile text is shown (escaped), not dropped: most pages carry it.
	if seen < 6 {
		t.Errorf("the escaped script text shows on %d of %d pages", seen, len(pages))
	}
}

func mustDigest(t *testing.T, s string) v1.Hash {
	t.Helper()
	d, err := registry.ParseDigest(s)
	if err != nil {
		t.Fatal(err)
	}
	return d
}
