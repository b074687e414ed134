package freeze_test

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/demo"
	"github.com/modelgate/modelgate/internal/freeze"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/score"
)

// TestFreezeTrainableEncoderCandidate freezes the demo's candidate that
// embeds its encoder as trainable variables with an Adam slot and an l2
// term: the result passes the gate's freeze check, shares the encoder's
// blob by digest, and scores the whole holdout bit-identically to the
// better candidate composed with its encoder by the runtime (the candidate
// is the better candidate's head on listener-encoder:v1).
func TestFreezeTrainableEncoderCandidate(t *testing.T) {
	ctx := context.Background()
	store, sc := demoStore(t)
	src := load(t, store, "promo-scorer:cand-trainable-encoder")
	if f := checks.Freeze(ctx, store, src, checks.FreezeConfig{Enabled: true, RequireFrozen: true}); f.Status != checks.StatusFail {
		t.Fatalf("the unfrozen candidate passes the freeze check: %+v", f)
	}

	res, err := freeze.Scorer(ctx, store, mustRef(t, "promo-scorer:cand-trainable-encoder"), freeze.Options{
		Out: mustRef(t, "promo-scorer:cand-trainable-encoder-frozen"), Holdout: "promo-holdout:v1", HoldoutRows: 1500,
	})
	if err != nil {
		t.Fatal(err)
	}
	rec := res.Record
	v := rec.Verification
	if !v.Passed || !v.Exact || v.Mismatches != 0 || v.MaxAbs != 0 || len(v.Sets) != 2 {
		t.Fatalf("verification: %+v", v)
	}
	if v.Sets[0].Name != freeze.SetProbes || v.Sets[0].Rows != len(src.Probes) || v.Sets[1].Name != freeze.SetHoldout || v.Sets[1].Rows != 1500 || v.Sets[1].Total != 5000 {
		t.Errorf("verification sets: %+v", v.Sets)
	}

	frozen := load(t, store, "promo-scorer:cand-trainable-encoder-frozen")
	if frozen.Artifact.Desc.Digest.String() != res.Frozen.Digest {
		t.Fatalf("tag points at %s, result says %s", frozen.Artifact.Desc.Digest, res.Frozen.Digest)
	}
	fc := checks.Freeze(ctx, store, frozen, checks.FreezeConfig{Enabled: true, RequireFrozen: true})
	if fc.Status != checks.StatusPass {
		t.Fatalf("frozen scorer fails the freeze check: %+v", fc)
	}
	for _, f := range fc.Findings {
		if f.Status == checks.StatusWarn {
			t.Errorf("freeze check warns: %+v", f)
		}
	}

	// The encoder layer is the encoder artifact's own blob.
	enc := load(t, store, "listener-encoder:v1")
	if got, want := layerDigest(t, frozen, "encoder.safetensors"), layerDigest(t, enc, "encoder.safetensors"); got != want {
		t.Errorf("frozen encoder layer %s, encoder's %s", got, want)
	}
	if len(rec.EncoderBlobs) != 1 || rec.EncoderBlobs[0].Digest != layerDigest(t, enc, "encoder.safetensors") {
		t.Errorf("record's encoder blobs: %+v", rec.EncoderBlobs)
	}
	// The head file is the candidate's, byte for byte.
	if got, want := layerDigest(t, frozen, "head.safetensors"), layerDigest(t, src, "head.safetensors"); got != want {
		t.Errorf("head.safetensors %s, source's %s", got, want)
	}

	// Spec: embedded, lineage, no training state.
	s := frozen.Spec
	if !s.Encoder.Embedded || s.Encoder.Digest != enc.Artifact.Desc.Digest.String() || s.Lineage.FrozenFrom != src.Artifact.Desc.Digest.String() || s.Training != nil {
		t.Errorf("frozen spec: encoder %+v, lineage %+v, training %+v", s.Encoder, s.Lineage, s.Training)
	}
	for _, tn := range s.Tensors {
		if tn.Trainable || tn.Part == "training" {
			t.Errorf("frozen tensor %+v", tn)
		}
	}
	ann := frozen.Artifact.Manifest.Annotations
	if ann[freeze.AnnotationFrozenFrom] != src.Artifact.Desc.Digest.String() || ann[artifact.AnnotationEncoder] != s.Encoder.Digest ||
		ann[artifact.AnnotationToolVersion] == "" || ann[freeze.AnnotationStorage] != freeze.StorageF32 {
		t.Errorf("annotations: %v", ann)
	}
	var stripped []string
	for _, x := range rec.Stripped {
		stripped = append(stripped, x.Kind+" "+x.Name)
	}
	for _, want := range []string{"optimizer-slot enc.w.adam_m", "regularization enc.w", "embedded-copy enc.w", "embedded-copy enc.b", "file training.safetensors", "file encoder.safetensors"} {
		if !slices.Contains(stripped, want) {
			t.Errorf("stripped %q missing from %q", want, stripped)
		}
	}
	if c := rec.EmbeddedCopy; c == nil || c.Differed || len(c.Tensors) != 2 {
		t.Errorf("embedded copy comparison: %+v", c)
	}
	if a := rec.AgainstSource; a == nil || a.Mismatches != 0 || a.Outputs != v.Outputs {
		t.Errorf("against the source as stored: %+v", a)
	}

	// The whole holdout, frozen against the runtime composition of the
	// better candidate (the trainable-encoder candidate is its function).
	base := load(t, store, "promo-scorer:cand-better")
	bm, err := score.Prepare(base)
	if err != nil {
		t.Fatal(err)
	}
	fm, err := score.Prepare(frozen)
	if err != nil {
		t.Fatal(err)
	}
	rows := compareOnHoldout(t, filepath.Join(sc.Dir, demo.ScorerHoldoutPath), bm, fm)
	if rows != 5000 {
		t.Errorf("compared %d holdout rows, want 5000", rows)
	}

	// Verify (the gate's entry point) agrees; the record is a referrer.
	vv, err := freeze.Verify(ctx, store, frozen, freeze.WithHoldout("promo-holdout:v1", 500))
	if err != nil {
		t.Fatal(err)
	}
	if !vv.Passed || vv.Source != src.Artifact.Desc.Digest.String() || vv.Sets[1].Rows != 500 {
		t.Errorf("Verify: %+v", vv)
	}
	recs, err := freeze.Records(ctx, store, "promo-scorer", frozen.Artifact.Desc.Digest)
	if err != nil || len(recs) != 1 || recs[0].Frozen.Digest != res.Frozen.Digest || !recs[0].Verification.Passed {
		t.Errorf("records: %v %+v", err, recs)
	}

	// Freezing again gives the same artifact; freezing the frozen one is a no-op.
	again, err := freeze.Scorer(ctx, store, mustRef(t, "promo-scorer:cand-trainable-encoder"), freeze.Options{Out: mustRef(t, "promo-scorer:again")})
	if err != nil || again.Frozen.Digest != res.Frozen.Digest {
		t.Errorf("second freeze: %v, %+v", err, again)
	}
	noop, err := freeze.Scorer(ctx, store, mustRef(t, "promo-scorer:cand-trainable-encoder-frozen"), freeze.Options{Out: mustRef(t, "promo-scorer:noop")})
	if err != nil || !noop.AlreadyFrozen || !strings.Contains(noop.Message, "already frozen") {
		t.Errorf("freezing a frozen scorer: %v, %+v", err, noop)
	}
	if _, err := store.Resolve(ctx, "promo-scorer", "noop"); !errors.Is(err, registry.ErrNotFound) {
		t.Errorf("the no-op wrote a tag: %v", err)
	}
}

// compareOnHoldout scores every holdout row with both models and requires
// bit-identical outputs; it returns the number of rows.
func compareOnHoldout(t *testing.T, path string, a, b *score.Model) int {
	t.Helper()
	r, err := data.Open(path, a.ReadOptions(path, false))
	if err != nil {
		t.Fatal(err)
	}
	defer r.Close()
	ra, rb := a.Net.NewRunner(2), b.Net.NewRunner(2)
	defer ra.Close()
	defer rb.Close()
	var f data.Frame
	rows, bad := 0, 0
	for {
		n, err := r.Read(&f, 1024)
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
		oa, err := ra.Run(&f.Batch, a.Net.Output(), nil)
		if err != nil {
			t.Fatal(err)
		}
		ob, err := rb.Run(&f.Batch, b.Net.Output(), nil)
		if err != nil {
			t.Fatal(err)
		}
		for i := range oa {
			if math.Float32bits(oa[i]) != math.Float32bits(ob[i]) {
				if bad < 5 {
					t.Errorf("holdout row %d: %v vs %v", f.RowIDs[i], oa[i], ob[i])
				}
				bad++
			}
		}
		rows += n
	}
	if bad > 0 {
		t.Errorf("%d of %d outputs differ", bad, rows)
	}
	return rows
}

// TestFreezeTenScorersShareTheEncoder freezes ten scorers on one encoder:
// the store grows by the scorers' own blobs (spec, manifest, rewritten
// probes, freeze record) and not one byte of encoder tensors.
func TestFreezeTenScorersShareTheEncoder(t *testing.T) {
	ctx := context.Background()
	store, sc := demoStore(t)
	base := readModel(t, filepath.Join(sc.Dir, "models", demo.ScorerBaseline))
	// Ten scorers on listener-encoder:v1 that differ in their intercept.
	// Their probe expectations stay the baseline's: only the probe inputs
	// matter here.
	for i := range 10 {
		m := *base
		m.Tensors = map[string][]float32{}
		for k, v := range base.Tensors {
			m.Tensors[k] = slices.Clone(v)
		}
		m.Tensors["head.b"][0] += float32(i+1) / 64
		dir := filepath.Join(t.TempDir(), fmt.Sprint(i))
		if err := modeldir.Write(dir, &m); err != nil {
			t.Fatal(err)
		}
		push(t, store, dir, fmt.Sprintf("promo-scorer:variant-%d", i))
	}
	enc := load(t, store, "listener-encoder:v1")
	encBlob := layerDigest(t, enc, "encoder.safetensors")
	before, present := blobBytes(t, store)

	var frozen []string
	for i := range 10 {
		res, err := freeze.Scorer(ctx, store, mustRef(t, fmt.Sprintf("promo-scorer:variant-%d", i)), freeze.Options{
			Out: mustRef(t, fmt.Sprintf("promo-scorer-frozen:variant-%d", i)),
		})
		if err != nil {
			t.Fatal(err)
		}
		if !res.Record.Verification.Passed {
			t.Fatalf("variant %d: %+v", i, res.Record.Verification)
		}
		frozen = append(frozen, res.Frozen.Digest, res.RecordDigest)
	}
	after, files := blobBytes(t, store)

	// The scorers' own bytes: every blob the ten frozen scorers and their
	// records reference, and the manifests, that were not in the store.
	own := map[string]int64{}
	addNew := func(d string, size int64) {
		if _, ok := present[d]; !ok {
			own[d] = size
		}
	}
	for _, d := range frozen {
		dg, _ := registry.ParseDigest(d)
		a, err := artifact.ReadArtifact(ctx, store, registry.Ref{Repository: "promo-scorer-frozen", Digest: dg})
		if err != nil {
			t.Fatal(err)
		}
		addNew(d, a.Desc.Size)
		addNew(a.Manifest.Config.Digest.String(), a.Manifest.Config.Size)
		for _, l := range a.Manifest.Layers {
			if l.Digest.String() == encBlob {
				continue
			}
			if _, ok := present[l.Digest.String()]; !ok && l.MediaType == artifact.MediaTypeTensors {
				t.Errorf("frozen scorer %s wrote a new tensor blob %s (%s)", d, l.Digest, l.Annotations[artifact.AnnotationTitle])
			}
			addNew(l.Digest.String(), l.Size)
		}
		if a.Kind() == model.KindScorer && !slices.ContainsFunc(a.Manifest.Layers, func(l v1.Descriptor) bool { return l.Digest.String() == encBlob }) {
			t.Errorf("frozen scorer %s does not carry the encoder blob %s", d, encBlob)
		}
	}
	var ownBytes int64
	for d, n := range own {
		ownBytes += n
		if files[d] != n {
			t.Errorf("blob %s: %d bytes on disk, %d referenced", d, files[d], n)
		}
	}
	if _, ok := own[encBlob]; ok {
		t.Errorf("the encoder blob was written again")
	}
	if growth := after - before; growth != ownBytes {
		t.Errorf("store grew by %d bytes, the frozen scorers' own blobs are %d bytes", growth, ownBytes)
	}
	t.Logf("ten frozen scorers: the store grew by %d bytes in %d new blobs; the shared encoder blob is %d bytes, stored once", after-before, len(own), files[encBlob])
}
