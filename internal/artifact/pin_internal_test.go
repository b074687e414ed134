package artifact

import (
	"context"
	"encoding/json"
	"maps"
	"os"
	"path/filepath"
	"testing"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
)

// scorerByTagDir copies testdata/models/tiny-scorer and rewrites its spec
// so that it names its encoder as name (NAME:TAG) with no digest.
func scorerByTagDir(t *testing.T, name string) string {
	t.Helper()
	dir := filepath.Join(t.TempDir(), "tiny-scorer")
	if err := os.CopyFS(dir, os.DirFS(filepath.Join("..", "..", "testdata", "models", "tiny-scorer"))); err != nil {
		t.Fatal(err)
	}
	p := filepath.Join(dir, modeldir.SpecFile)
	raw, err := os.ReadFile(p)
	if err != nil {
		t.Fatal(err)
	}
	var doc map[string]any
	if err := json.Unmarshal(raw, &doc); err != nil {
		t.Fatal(err)
	}
	enc := doc["encoder"].(map[string]any)
	delete(enc, "digest")
	enc["name"] = name
	out, _ := json.MarshalIndent(doc, "", "  ")
	if err := os.WriteFile(p, out, 0o644); err != nil {
		t.Fatal(err)
	}
	return dir
}

// A scorer directory may name its encoder by tag; push resolves the tag
// and the stored spec names the digest, through both push paths (a store
// that stages blobs and one that does not).
func TestPushPinsEncoderTag(t *testing.T) {
	ctx := context.Background()
	for _, staged := range []bool{true, false} {
		s := openStore(t)
		var store registry.Store = s
		if !staged {
			store = plainStore{s}
		}
		scorer := scorerByTagDir(t, "tiny-encoder:v1")

		// The tag does not exist yet: refused, nothing written.
		before := storeFiles(t, s)
		_, err := PushModelDir(ctx, store, scorer, registry.Ref{Repository: "promo-scorer", Tag: "c1"}, Options{})
		if errkind.Of(err) != errkind.BadInput {
			t.Fatalf("staged=%v: push with a missing encoder tag: %v, want bad input", staged, err)
		}
		if after := storeFiles(t, s); !maps.Equal(before, after) {
			t.Fatalf("staged=%v: the refused push changed the store", staged)
		}

		enc, err := PushModelDir(ctx, store, encoderDir(t), registry.Ref{Repository: "tiny-encoder", Tag: "v1"}, Options{})
		if err != nil {
			t.Fatal(err)
		}
		res, err := PushModelDir(ctx, store, scorer, registry.Ref{Repository: "promo-scorer", Tag: "c1"}, Options{})
		if err != nil {
			t.Fatalf("staged=%v: %v", staged, err)
		}
		if res.EncoderPinned == nil || res.EncoderPinned.Digest != enc.Digest || res.EncoderPinned.Name != "tiny-encoder:v1" {
			t.Fatalf("staged=%v: pinned %+v, want tiny-encoder:v1 -> %s", staged, res.EncoderPinned, enc.Digest)
		}
		l, err := Load(ctx, store, registry.Ref{Repository: "promo-scorer", Tag: "c1"})
		if err != nil {
			t.Fatal(err)
		}
		if len(l.Problems) > 0 || l.Spec.Encoder.Digest != enc.Digest || l.Encoder == nil {
			t.Fatalf("staged=%v: stored scorer: problems %v, encoder digest %q (want %s), encoder loaded %v",
				staged, l.Problems, l.Spec.Encoder.Digest, enc.Digest, l.Encoder != nil)
		}
		// A spec naming the digest is stored unchanged: no pin reported.
		res2, err := PushModelDir(ctx, store, filepath.Join("..", "..", "testdata", "models", "tiny-scorer"), registry.Ref{Repository: "promo-scorer", Tag: "c2"}, Options{})
		if err != nil {
			t.Fatal(err)
		}
		if res2.EncoderPinned != nil {
			t.Fatalf("a spec with a digest reported a pin: %+v", res2.EncoderPinned)
		}
	}
}

func TestPushEncoderNameWithoutTag(t *testing.T) {
	ctx := context.Background()
	s := openStore(t)
	if _, err := PushModelDir(ctx, s, encoderDir(t), registry.Ref{Repository: "tiny-encoder", Tag: "v1"}, Options{}); err != nil {
		t.Fatal(err)
	}
	before := storeFiles(t, s)
	_, err := PushModelDir(ctx, s, scorerByTagDir(t, "tiny-encoder"), registry.Ref{Repository: "promo-scorer", Tag: "c1"}, Options{})
	if errkind.Of(err) != errkind.BadInput {
		t.Fatalf("encoder named without a tag or digest: %v, want bad input", err)
	}
	if after := storeFiles(t, s); !maps.Equal(before, after) {
		t.Fatal("the refused push changed the store")
	}
}

// A spec in the store must name its encoder by digest.
func TestStoredSpecNeedsEncoderDigest(t *testing.T) {
	raw, err := os.ReadFile(filepath.Join(scorerByTagDir(t, "tiny-encoder:v1"), modeldir.SpecFile))
	if err != nil {
		t.Fatal(err)
	}
	if _, vs, err := modeldir.ParseSpec(raw); err != nil || len(vs) != 0 {
		t.Fatalf("a directory spec naming its encoder by tag: %v %v, want valid", vs, err)
	}
	if _, vs, err := modeldir.ParseStoredSpec(raw); err != nil || len(vs) != 1 {
		t.Fatalf("the same spec read from the store: %v %v, want one problem", vs, err)
	}
}
