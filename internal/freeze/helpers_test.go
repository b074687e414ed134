package freeze_test

import (
	"context"
	"os"
	"path/filepath"
	"sync"
	"testing"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/demo"
	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
)

// The demo scenario is built once per test binary (it takes seconds) and
// published into a fresh store by each test that needs one.
var (
	demoOnce sync.Once
	demoDir  string
	demoSc   *demo.Scenario
	demoErr  error
)

func TestMain(m *testing.M) {
	code := m.Run()
	if demoDir != "" {
		os.RemoveAll(demoDir)
	}
	os.Exit(code)
}

func demoScenario(tb testing.TB) *demo.Scenario {
	tb.Helper()
	demoOnce.Do(func() {
		demoDir, demoErr = os.MkdirTemp("", "modelgate-freeze-demo-")
		if demoErr == nil {
			demoSc, demoErr = demo.Build(demoDir, demo.DefaultConfig(), nil)
		}
	})
	if demoErr != nil {
		tb.Fatal(demoErr)
	}
	return demoSc
}

// demoStore publishes the demo scenario into a new local store.
func demoStore(tb testing.TB) (*registry.Local, *demo.Scenario) {
	tb.Helper()
	sc := demoScenario(tb)
	store := newStore(tb)
	if _, err := demo.Publish(context.Background(), store, sc, nil); err != nil {
		tb.Fatal(err)
	}
	return store, sc
}

func newStore(tb testing.TB) *registry.Local {
	tb.Helper()
	s, err := registry.OpenLocal(filepath.Join(tb.TempDir(), "store"))
	if err != nil {
		tb.Fatal(err)
	}
	return s
}

func mustRef(tb testing.TB, s string) registry.Ref {
	tb.Helper()
	r, err := registry.ParseRef(s, false)
	if err != nil {
		tb.Fatal(err)
	}
	return r
}

func push(tb testing.TB, store registry.Store, dir, ref string) *artifact.PushResult {
	tb.Helper()
	res, err := artifact.PushModelDir(context.Background(), store, dir, mustRef(tb, ref), artifact.Options{})
	if err != nil {
		tb.Fatalf("pushing %s as %s: %v", dir, ref, err)
	}
	return res
}

// tinyStore pushes the tiny fixture encoder and scorer (tiny-encoder:v1,
// tiny-scorer:v1) into a new store and returns the fixture directory.
func tinyStore(t *testing.T) (*registry.Local, string) {
	t.Helper()
	dir := t.TempDir()
	if _, err := fixture.Write(dir); err != nil {
		t.Fatal(err)
	}
	store := newStore(t)
	push(t, store, filepath.Join(dir, fixture.EncoderDir), "tiny-encoder:v1")
	push(t, store, filepath.Join(dir, fixture.ScorerDir), "tiny-scorer:v1")
	return store, dir
}

func load(tb testing.TB, store registry.Store, ref string) *artifact.Loaded {
	tb.Helper()
	l, err := artifact.Load(context.Background(), store, mustRef(tb, ref))
	if err != nil {
		tb.Fatal(err)
	}
	if len(l.Problems) > 0 {
		tb.Fatalf("%s: %v", ref, l.Problems)
	}
	return l
}

// blobBytes sums the sizes of the files under the store's blob folder.
func blobBytes(tb testing.TB, store *registry.Local) (int64, map[string]int64) {
	tb.Helper()
	dir := filepath.Join(store.Dir(), "blobs", "sha256")
	es, err := os.ReadDir(dir)
	if err != nil {
		tb.Fatal(err)
	}
	var n int64
	files := map[string]int64{}
	for _, e := range es {
		info, err := e.Info()
		if err != nil {
			tb.Fatal(err)
		}
		n += info.Size()
		files["sha256:"+e.Name()] = info.Size()
	}
	return n, files
}

// layerDigest returns the digest of an artifact's layer by title.
func layerDigest(tb testing.TB, l *artifact.Loaded, title string) string {
	tb.Helper()
	for _, d := range l.Artifact.Manifest.Layers {
		if d.Annotations[artifact.AnnotationTitle] == title {
			return d.Digest.String()
		}
	}
	tb.Fatalf("%s has no layer %q", l.Artifact.Desc.Digest, title)
	return ""
}

// runtimeComposition compiles a scorer that references its encoder the
// way the runtime does for serving an unfrozen scorer.
func runtimeComposition(tb testing.TB, l *artifact.Loaded) *model.Net {
	tb.Helper()
	var enc *model.Encoder
	if l.Encoder != nil {
		enc = &model.Encoder{Spec: l.Encoder.Spec, Weights: l.Encoder.Tensors}
	}
	n, err := model.Compile(l.Spec, l.Tensors, enc)
	if err != nil {
		tb.Fatal(err)
	}
	return n
}

func compile(tb testing.TB, l *artifact.Loaded) *model.Net {
	tb.Helper()
	return runtimeComposition(tb, l)
}

// readModel reads a model directory.
func readModel(tb testing.TB, dir string) *modeldir.Model {
	tb.Helper()
	d, err := modeldir.Read(dir)
	if err != nil {
		tb.Fatal(err)
	}
	return d.Model
}
