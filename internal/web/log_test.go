package web

import (
	"context"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
	"github.com/modelgate/modelgate/internal/release"
)

// TestServeBrokenLog: a verified release log shows as verified; a tag
// moved outside modelgate and a record edited in the store show as a
// broken log, on the tag page and in the tag list.
func TestServeBrokenLog(t *testing.T) {
	ctx := context.Background()
	dir := t.TempDir()
	models := filepath.Join(dir, "models")
	if _, err := fixture.Write(models); err != nil {
		t.Fatal(err)
	}
	storeDir := filepath.Join(dir, "store")
	store, err := registry.OpenLocal(storeDir)
	if err != nil {
		t.Fatal(err)
	}
	var digests []string
	for _, p := range []struct{ dir, tag string }{{fixture.EncoderDir, "enc"}, {fixture.ScorerDir, "scorer"}} {
		r, err := artifact.PushModelDir(ctx, store, filepath.Join(models, p.dir), registry.Ref{Repository: "tiny", Tag: p.tag}, artifact.Options{})
		if err != nil {
			t.Fatal(err)
		}
		digests = append(digests, r.Digest)
	}
	k, err := release.GenerateKey("rita")
	if err != nil {
		t.Fatal(err)
	}
	enc, _ := registry.ParseDigest(digests[0])
	prod := registry.Ref{Repository: "tiny", Tag: "prod"}
	first, err := release.Initial(ctx, store, release.InitialRequest{Target: prod, To: enc, Key: k, Reason: "first release"})
	if err != nil {
		t.Fatal(err)
	}
	s := newServer(t, store, Options{})
	page := func() (string, string) {
		return mustGet(t, s, "/tags/tiny:prod"), mustGet(t, s, "/")
	}

	tag, home := page()
	if !strings.Contains(tag, "chain verified") || strings.Contains(tag, "broken") || !strings.Contains(home, "verified") {
		t.Fatal("a fresh release log does not show as verified")
	}

	// The tag moved outside modelgate: the log and the tag disagree.
	_, sd, err := store.Manifest(ctx, "tiny", mustDigest(t, digests[1]))
	if err != nil {
		t.Fatal(err)
	}
	if err := storetest.ForceTag(ctx, store, "tiny", "prod", sd); err != nil {
		t.Fatal(err)
	}
	tag, home = page()
	if !strings.Contains(tag, "The release log is broken") || !strings.Contains(tag, "moved outside modelgate") {
		t.Error("a tag moved outside modelgate does not show a broken log")
	}
	if !strings.Contains(home, "</span> broken</span>") {
		t.Error("the tag list does not mark the log broken")
	}

	// A rollback repairs it: two records, verified, the repair noted.
	if _, err := release.Rollback(ctx, store, release.RollbackRequest{Target: prod, Key: k, Reason: "restore the released model"}); err != nil {
		t.Fatal(err)
	}
	tag, _ = page()
	if !strings.Contains(tag, "chain verified") || strings.Contains(tag, "The release log is broken") || strings.Count(tag, `<td class="num">`) != 2 {
		t.Error("after the rollback the log is not verified with two records")
	}

	// Edit the first record's envelope in the store: the chain breaks.
	a, err := artifact.ReadArtifact(ctx, store, registry.Ref{Repository: "tiny", Digest: mustDigest(t, first)})
	if err != nil {
		t.Fatal(err)
	}
	edited := false
	for _, l := range a.Manifest.Layers {
		if l.MediaType != release.MediaTypeEnvelope {
			continue
		}
		p := filepath.Join(storeDir, "blobs", "sha256", l.Digest.Hex)
		b, err := os.ReadFile(p)
		if err != nil {
			t.Fatal(err)
		}
		b[len(b)/2] ^= 0x20
		if err := os.WriteFile(p, b, 0o644); err != nil {
			t.Fatal(err)
		}
		edited = true
	}
	if !edited {
		t.Fatal("the first record has no envelope layer")
	}
	tag, home = page()
	if !strings.Contains(tag, "The release log is broken") || !strings.Contains(tag, "missing, edited or invalid") {
		t.Errorf("an edited record does not show a broken chain:\n%s", tag)
	}
	if !strings.Contains(home, "</span> broken</span>") {
		t.Error("the tag list does not mark the edited log broken")
	}
}
