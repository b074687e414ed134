package freeze_test

import (
	"bytes"
	"context"
	"encoding/binary"
	"encoding/json"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/freeze"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/model/safetensors"
	"github.com/modelgate/modelgate/internal/registry"
)

// TestFreezeExternalScorer freezes the tiny scorer, which references its
// encoder by digest: "encoder/code" becomes the encoder's own "code"
// layer, the decoder blob is left out, and the frozen scorer equals the
// runtime's composition of the unfrozen one bit for bit.
func TestFreezeExternalScorer(t *testing.T) {
	ctx := context.Background()
	store, _ := tinyStore(t)
	res, err := freeze.Scorer(ctx, store, mustRef(t, "tiny-scorer:v1"), freeze.Options{Out: mustRef(t, "tiny-scorer:frozen")})
	if err != nil {
		t.Fatal(err)
	}
	if !res.Record.Verification.Passed || res.Record.Verification.Sets[0].Rows != 12 {
		t.Fatalf("verification: %+v", res.Record.Verification)
	}
	src, frozen, enc := load(t, store, "tiny-scorer:v1"), load(t, store, "tiny-scorer:frozen"), load(t, store, "tiny-encoder:v1")
	if got := frozen.Spec.Layers[0]; got.Name != "code" || got.Weight != "enc.w" {
		t.Errorf("first frozen layer %+v, want the encoder's code layer", got)
	}
	if got := frozen.Spec.Layers[1].Inputs; !slices.Equal(got, []string{"code", "listener_tenure", "show_age"}) {
		t.Errorf("features reads %v", got)
	}
	var titles []string
	for _, l := range frozen.Artifact.Manifest.Layers {
		titles = append(titles, l.Annotations[artifact.AnnotationTitle])
	}
	if !slices.Equal(titles, []string{"encoder.safetensors", "head.safetensors", "vocabulary.txt", "stats.json", "probes.jsonl"}) {
		t.Errorf("frozen layers %v", titles)
	}
	if layerDigest(t, frozen, "encoder.safetensors") != layerDigest(t, enc, "encoder.safetensors") ||
		layerDigest(t, frozen, "head.safetensors") != layerDigest(t, src, "head.safetensors") ||
		layerDigest(t, frozen, "vocabulary.txt") != layerDigest(t, src, "vocabulary.txt") {
		t.Errorf("encoder, head or vocabulary blob not shared by digest")
	}
	for _, p := range frozen.Probes {
		if _, ok := p.Expect["encoder/code"]; ok {
			t.Fatalf("frozen probe still expects encoder/code: %+v", p.Expect)
		}
	}
	if f := checks.Freeze(ctx, store, frozen, checks.FreezeConfig{Enabled: true, RequireFrozen: true}); f.Status != checks.StatusPass {
		t.Errorf("freeze check: %+v", f)
	}
	// Random rows (not only the probes): frozen against the runtime's own
	// composition of the unfrozen scorer.
	b := randomBatch(rand.New(rand.NewPCG(1, 2)), src.Spec, 3000)
	a, err := runtimeComposition(t, src).NewRunner(2).Run(b, "p", nil)
	if err != nil {
		t.Fatal(err)
	}
	f, err := compile(t, frozen).NewRunner(2).Run(b, "p", nil)
	if err != nil {
		t.Fatal(err)
	}
	for i := range a {
		if math.Float32bits(a[i]) != math.Float32bits(f[i]) {
			t.Fatalf("row %d: frozen %v, composition %v", i, f[i], a[i])
		}
	}
	v, err := freeze.Verify(ctx, store, frozen)
	if err != nil || !v.Passed || v.Mismatches != 0 {
		t.Errorf("Verify: %v %+v", err, v)
	}
}

// randomBatch draws rows of random sparse pairs (duplicates, the unknown
// bucket and empty rows included) and dense features.
func randomBatch(r *rand.Rand, s *model.Spec, rows int) *model.Batch {
	b := &model.Batch{Indptr: []int32{0}, Dense: map[string][]float32{}}
	n := s.Inputs.Sparse[0].Rows()
	for range rows {
		for range r.IntN(9) {
			b.Indices = append(b.Indices, int32(r.IntN(n)))
			b.Values = append(b.Values, float32(r.IntN(20)))
		}
		b.Indptr = append(b.Indptr, int32(len(b.Indices)))
		for _, d := range s.Inputs.Dense {
			for range d.Size {
				b.Dense[d.Name] = append(b.Dense[d.Name], float32(r.NormFloat64()))
			}
		}
	}
	return b
}

// writeScorer writes m (its probe expectations recomputed by the runtime)
// and pushes it as ref.
func writeScorer(t *testing.T, store registry.Store, m *modeldir.Model, enc *modeldir.Model, ref string) {
	t.Helper()
	var e *model.Encoder
	if !m.Spec.Encoder.Embedded {
		e = &model.Encoder{Spec: enc.Spec, Weights: enc.Tensors}
	}
	net, err := model.Compile(m.Spec, m.Tensors, e)
	if err != nil {
		t.Fatal(err)
	}
	var vb strings.Builder
	for _, id := range m.Vocabulary {
		vb.WriteString(id + "\n")
	}
	vocab, err := data.ParseVocabulary(strings.NewReader(vb.String()), m.Spec.Inputs.Sparse[0])
	if err != nil {
		t.Fatal(err)
	}
	for i, p := range m.Probes {
		b := &model.Batch{Indptr: []int32{0}, Dense: map[string][]float32{}}
		for j, id := range p.Items {
			k, _, _ := vocab.Map(id)
			b.Indices = append(b.Indices, k)
			b.Values = append(b.Values, p.Values[j])
		}
		b.Indptr = append(b.Indptr, int32(len(b.Indices)))
		for k, v := range p.Dense {
			b.Dense[k] = v
		}
		out, err := net.NewRunner(1).Run(b, m.Spec.Output, nil)
		if err != nil {
			t.Fatal(err)
		}
		m.Probes[i].Expect = map[string][]float32{m.Spec.Output: out}
	}
	dir := filepath.Join(t.TempDir(), "m")
	if err := modeldir.Write(dir, m); err != nil {
		t.Fatal(err)
	}
	push(t, store, dir, ref)
}

// tinyModels returns the fixture encoder and the scorer referencing it.
func tinyModels(t *testing.T, dir string) (enc, scorer *modeldir.Model, encDigest string) {
	t.Helper()
	enc = readModel(t, filepath.Join(dir, fixture.EncoderDir))
	scorer = readModel(t, filepath.Join(dir, fixture.ScorerDir))
	return enc, scorer, scorer.Spec.Encoder.Digest
}

// embed turns the tiny scorer into one that embeds its own copy of the
// encoder's code layer, width codeWidth, naming encoder digest named.
func embed(m *modeldir.Model, enc *modeldir.Model, codeWidth int, named string) *modeldir.Model {
	in := m.Spec.Inputs.Sparse[0]
	r := rand.New(rand.NewPCG(7, uint64(codeWidth)))
	w, b := enc.Tensors["enc.w"], enc.Tensors["enc.b"]
	if codeWidth != 4 {
		w, b = make([]float32, in.Rows()*codeWidth), make([]float32, codeWidth)
		for i := range w {
			w[i] = float32(r.NormFloat64())
		}
	}
	spec := *m.Spec
	spec.Encoder = &model.EncoderRef{Name: "tiny-encoder:v1", Digest: named, Embedded: true, Output: "code"}
	spec.Tensors = append([]model.Tensor{
		{Name: "enc.w", File: "encoder.safetensors", Shape: []int{in.Rows(), codeWidth}, DType: "F32", Part: "encoder", Trainable: true},
		{Name: "enc.b", File: "encoder.safetensors", Shape: []int{codeWidth}, DType: "F32", Part: "encoder", Trainable: true},
	}, spec.Tensors...)
	spec.Layers = append([]model.Layer{{Name: "code", Op: model.OpSparseDense, Input: in.Name, Weight: "enc.w", Bias: "enc.b", Activation: model.ActIdentity}}, spec.Layers...)
	spec.Layers[1].Inputs = []string{"code", "listener_tenure", "show_age"}
	out := &modeldir.Model{Spec: &spec, Vocabulary: m.Vocabulary, Stats: m.Stats, Probes: slices.Clone(m.Probes), Tensors: map[string][]float32{"enc.w": w, "enc.b": b}}
	for k, v := range m.Tensors {
		out.Tensors[k] = v
	}
	if codeWidth != 4 {
		hidden := spec.Tensors[2].Shape[1]
		spec.Tensors[2].Shape = []int{codeWidth + 2, hidden}
		w1 := make([]float32, (codeWidth+2)*hidden)
		for i := range w1 {
			w1[i] = float32(r.NormFloat64())
		}
		out.Tensors["head.w1"] = w1
	}
	return out
}

func TestFreezeRefusals(t *testing.T) {
	ctx := context.Background()
	store, dir := tinyStore(t)
	enc, scorer, encDigest := tinyModels(t, dir)
	scorerDigest := load(t, store, "tiny-scorer:v1").Artifact.Desc.Digest.String()

	// A second encoder version, to name with --encoder.
	enc2 := *enc
	spec2 := *enc.Spec
	spec2.Description = "another version"
	enc2.Spec = &spec2
	dir2 := filepath.Join(t.TempDir(), "enc2")
	if err := modeldir.Write(dir2, &enc2); err != nil {
		t.Fatal(err)
	}
	enc2Digest := push(t, store, dir2, "tiny-encoder:v2").Digest

	writeScorer(t, store, embed(scorer, enc, 4, scorerDigest), enc, "tiny-embedded:names-a-scorer")
	writeScorer(t, store, embed(scorer, enc, 3, encDigest), enc, "tiny-embedded:narrow-code")
	pushNoEncoder(t, store, filepath.Join(dir, fixture.ScorerDir), "tiny-broken:no-encoder")

	out := mustRef(t, "tiny-out:frozen")
	for _, tc := range []struct {
		name, ref string
		opts      freeze.Options
		want      []string
	}{
		{"encoder mismatch", "tiny-scorer:v1", freeze.Options{Encoder: "tiny-encoder:v2"}, []string{enc2Digest, encDigest, "refusing"}},
		{"encoder given is a scorer", "tiny-scorer:v1", freeze.Options{Encoder: "tiny-scorer:v1"}, []string{scorerDigest, encDigest}},
		{"encoder missing", "tiny-scorer:v1", freeze.Options{Encoder: "tiny-encoder:nope"}, []string{"tiny-encoder:nope"}},
		{"named encoder is a scorer", "tiny-embedded:names-a-scorer", freeze.Options{}, []string{scorerDigest, "not an encoder"}},
		{"code width mismatch", "tiny-embedded:narrow-code", freeze.Options{}, []string{"shape mismatch", "code", "3", "4"}},
		{"names no encoder", "tiny-broken:no-encoder", freeze.Options{}, []string{"names no encoder"}},
		{"not a scorer", "tiny-encoder:v1", freeze.Options{}, []string{"not a scorer"}},
		{"bad storage", "tiny-scorer:v1", freeze.Options{Storage: "f8"}, []string{"--storage"}},
		{"no tag", "tiny-scorer:v1", freeze.Options{Out: registry.Ref{Repository: "tiny-out"}}, []string{"NAME:TAG"}},
		{"conversion above the bound", "tiny-scorer:v1", freeze.Options{Storage: "bf16", MaxError: 1e-9}, []string{"above --max-error", "nothing written"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if tc.opts.Out.Repository == "" {
				tc.opts.Out = out
			}
			_, err := freeze.Scorer(ctx, store, mustRef(t, tc.ref), tc.opts)
			if !errkind.Is(err, errkind.BadInput) {
				t.Fatalf("got %v (kind %v), want a bad-input error", err, errkind.Of(err))
			}
			for _, w := range tc.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q lacks %q", err, w)
				}
			}
		})
	}
	if tags, _ := store.Tags(ctx, "tiny-out"); len(tags) > 0 {
		t.Errorf("a refused freeze wrote tags %v", tags)
	}
	// The right --encoder, by tag or digest, is accepted.
	for _, e := range []string{"tiny-encoder:v1", "tiny-encoder@" + encDigest} {
		if _, err := freeze.Scorer(ctx, store, mustRef(t, "tiny-scorer:v1"), freeze.Options{Encoder: e, Out: out}); err != nil {
			t.Errorf("--encoder %s: %v", e, err)
		}
	}
}

// pushNoEncoder stores a scorer whose spec lacks its encoder, bypassing
// push's validation (another tool could write one).
func pushNoEncoder(t *testing.T, store registry.Store, scorerDir, ref string) {
	t.Helper()
	d, err := modeldir.Check(scorerDir)
	if err != nil {
		t.Fatal(err)
	}
	var raw map[string]any
	if err := json.Unmarshal(d.SpecBytes, &raw); err != nil {
		t.Fatal(err)
	}
	delete(raw, "encoder")
	d.SpecBytes, _ = json.Marshal(raw)
	d.Model.Spec.Encoder = nil
	config, layers, ann, err := artifact.ModelBlobs(d)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := artifact.PushArtifact(context.Background(), store, mustRef(t, ref), artifact.ArtifactType(model.KindScorer), config, layers, nil, ann, artifact.Options{}); err != nil {
		t.Fatal(err)
	}
}

// TestFreezeEmbeddedCopyThatDiffers: a scorer whose own embedded copy of
// the encoder differs from the encoder it names is frozen onto the named
// encoder; the record says by how much the copy and the outputs differed.
func TestFreezeEmbeddedCopyThatDiffers(t *testing.T) {
	ctx := context.Background()
	store, dir := tinyStore(t)
	enc, scorer, encDigest := tinyModels(t, dir)
	m := embed(scorer, enc, 4, encDigest)
	w := slices.Clone(m.Tensors["enc.w"])
	w[5] += 0.25
	w[17] -= 0.5
	m.Tensors["enc.w"] = w
	writeScorer(t, store, m, enc, "tiny-embedded:drifted")
	src := load(t, store, "tiny-embedded:drifted")
	if v, err := freeze.Verify(ctx, store, src); err != nil || v.Passed || !strings.Contains(strings.Join(v.Problems, " "), `"enc.w"`) {
		t.Errorf("Verify of the drifted copy: %v %+v", err, v)
	}

	res, err := freeze.Scorer(ctx, store, mustRef(t, "tiny-embedded:drifted"), freeze.Options{Out: mustRef(t, "tiny-embedded:frozen")})
	if err != nil {
		t.Fatal(err)
	}
	c := res.Record.EmbeddedCopy
	if c == nil || !c.Differed || c.MaxAbs != 0.5 || c.Tensors[0].Tensor != "enc.w" || c.Tensors[0].Differing != 2 || c.Tensors[1].Differing != 0 {
		t.Errorf("embedded copy comparison: %+v", c)
	}
	if a := res.Record.AgainstSource; a == nil || a.Mismatches == 0 || a.MaxAbs == 0 {
		t.Errorf("the drifted copy's outputs should differ from the frozen ones: %+v", a)
	}
	frozen := load(t, store, "tiny-embedded:frozen")
	if !slices.Equal(frozen.Tensors["enc.w"], load(t, store, "tiny-encoder:v1").Tensors["enc.w"]) {
		t.Errorf("the frozen scorer does not carry the named encoder's weight")
	}
	if v, err := freeze.Verify(ctx, store, frozen); err != nil || !v.Passed {
		t.Errorf("Verify of the frozen scorer: %v %+v", err, v)
	}
	var kinds []string
	for _, s := range res.Record.Stripped {
		kinds = append(kinds, s.Kind+" "+s.Name)
	}
	for _, want := range []string{"embedded-copy enc.w", "embedded-copy enc.b", "file encoder.safetensors"} {
		if !slices.Contains(kinds, want) {
			t.Errorf("stripped lacks %q: %v", want, kinds)
		}
	}
}

// headScorer is the tiny scorer with a hidden layer of width hidden whose
// input weight head.w1 holds vals (cycled), pushed as ref.
func headScorer(t *testing.T, store registry.Store, dir string, hidden int, vals []float32, ref string) {
	t.Helper()
	enc, scorer, _ := tinyModels(t, dir)
	spec := *scorer.Spec
	spec.Tensors = slices.Clone(spec.Tensors)
	spec.Tensors[0].Shape = []int{6, hidden}
	spec.Tensors[1].Shape = []int{hidden}
	spec.Tensors[2].Shape = []int{hidden, 1}
	m := &modeldir.Model{Spec: &spec, Vocabulary: scorer.Vocabulary, Stats: scorer.Stats, Probes: slices.Clone(scorer.Probes), Tensors: map[string][]float32{}}
	w1 := make([]float32, 6*hidden)
	for i := range w1 {
		w1[i] = vals[i%len(vals)]
	}
	m.Tensors["head.w1"] = w1
	m.Tensors["head.b1"] = make([]float32, hidden)
	w2 := make([]float32, hidden)
	for i := range w2 {
		w2[i] = 1 / float32(hidden)
	}
	m.Tensors["head.w2"] = w2
	m.Tensors["head.b2"] = []float32{0.25}
	writeScorer(t, store, m, enc, ref)
}

// storedBits freezes ref with the given storage and returns the stored
// 16-bit patterns of head.w1 in the frozen artifact's head blob.
func storedBits(t *testing.T, store registry.Store, ref, storage string) []uint16 {
	t.Helper()
	ctx := context.Background()
	res, err := freeze.Scorer(ctx, store, mustRef(t, ref), freeze.Options{Out: mustRef(t, "conv:"+storage), Storage: storage, MaxError: 1})
	if err != nil {
		t.Fatal(err)
	}
	v := res.Record.Verification
	if !v.Passed || v.Exact || v.Bound != 1 || v.Storage != storage {
		t.Fatalf("verification of %s storage: %+v", storage, v)
	}
	frozen := load(t, store, "conv:"+storage)
	if vv, err := freeze.Verify(ctx, store, frozen); err != nil || !vv.Passed || vv.Bound != 1 || vv.MaxAbs != v.MaxAbs {
		t.Errorf("Verify of the %s artifact: %v %+v", storage, err, vv)
	}
	if f := checks.Freeze(ctx, store, frozen, checks.FreezeConfig{Enabled: true, RequireFrozen: true}); f.Status != checks.StatusPass {
		t.Errorf("freeze check of the %s artifact: %+v", storage, f)
	}
	var blob []byte
	for _, l := range frozen.Artifact.Manifest.Layers {
		if l.Annotations[artifact.AnnotationTitle] == "head.safetensors" {
			if blob, err = artifact.ReadBlob(ctx, store, frozen.Artifact.Repository, l, 1<<30); err != nil {
				t.Fatal(err)
			}
		}
	}
	f, err := safetensors.Parse(bytes.NewReader(blob), int64(len(blob)))
	if err != nil {
		t.Fatal(err)
	}
	info, _ := f.Info("head.w1")
	if info.DType != map[string]string{"f16": "F16", "bf16": "BF16"}[storage] {
		t.Fatalf("head.w1 stored as %s", info.DType)
	}
	raw, err := f.Raw("head.w1")
	if err != nil {
		t.Fatal(err)
	}
	out := make([]uint16, len(raw)/2)
	for i := range out {
		out[i] = binary.LittleEndian.Uint16(raw[2*i:])
	}
	return out
}

// TestFreezeHeadConversionKnownValues checks the stored bits of a converted head
// against values worked out from the standards.
func TestFreezeHeadConversionKnownValues(t *testing.T) {
	store, dir := tinyStore(t)
	f32 := math.Float32frombits
	type kv struct {
		x    float32
		want uint16
	}
	// IEEE 754-2008 binary16 (§3.6: 5 exponent bits, bias 15, 10 fraction
	// bits) with roundTiesToEven (§4.3.1). The first five patterns are also
	// the worked examples of Wikipedia's "Half-precision floating-point
	// format" page (3c00 = 1, 7bff = 65504, 0400 = 2^-14, 0001 = 2^-24,
	// 3555 ≈ 1/3); the ties are derived by hand from the rounding rule.
	half := []kv{
		{1, 0x3c00}, {65504, 0x7bff}, {f32(0x38800000), 0x0400}, {f32(0x33800000), 0x0001}, {1.0 / 3, 0x3555},
		{-2, 0xc000}, {0.1, 0x2e66}, {65519, 0x7bff}, // below the tie 65520 with +Inf: rounds down
		{f32(0x33000000), 0x0000}, // 2^-25: tie between 0 and 2^-24, even is 0
		{f32(0x33c00000), 0x0002}, // 3·2^-25: tie between 2^-24 and 2^-23, even is 2^-23
		{f32(0x3f801000), 0x3c00}, // 1+2^-11: tie between 1 and 1+2^-10, even is 1
		{f32(0x3f803000), 0x3c02}, // 1+3·2^-11: tie, even is 1+2^-9
		{f32(0x3f801001), 0x3c01}, // just above the tie: up
		{float32(math.Copysign(0, -1)), 0x8000},
	}
	// bfloat16: the upper 16 bits of a binary32, rounded to nearest with
	// ties to even (Google's bfloat16 definition; Wikipedia's "bfloat16
	// floating-point format" lists 3f80 = 1, 4049 ≈ π, 3eab ≈ 1/3).
	bf := []kv{
		{1, 0x3f80}, {float32(math.Pi), 0x4049}, {1.0 / 3, 0x3eab}, {-2, 0xc000},
		{f32(0x3f808000), 0x3f80},                  // tie, kept half even: stays
		{f32(0x3f818000), 0x3f82},                  // tie, kept half odd: up to even
		{f32(0x3f808001), 0x3f81},                  // above the tie: up
		{f32(0x3f807fff), 0x3f80},                  // below the tie: down
		{65536, 0x4780}, {f32(0x477fffff), 0x4780}, // 65536 exact; just below it rounds up to it
	}
	for _, c := range []struct {
		storage string
		cases   []kv
	}{{"f16", half}, {"bf16", bf}} {
		vals := make([]float32, len(c.cases))
		for i, k := range c.cases {
			vals[i] = k.x
		}
		ref := "known-" + c.storage + ":v1"
		headScorer(t, store, dir, len(vals), vals, ref)
		got := storedBits(t, store, ref, c.storage)
		for i, k := range c.cases {
			if got[i] != k.want {
				t.Errorf("%s of %v (bits %#08x): stored %#04x, want %#04x", c.storage, k.x, math.Float32bits(k.x), got[i], k.want)
			}
		}
	}
}

// debianPython is the interpreter that sees Debian's python3-numpy.
const debianPython = "/usr/bin/python3"

// numpyConvert converts float32 values with numpy: float16 by numpy's own
// cast (astype(np.float16), round to nearest even); bfloat16, which numpy
// lacks, by choosing between the two bfloat16 neighbours of each value by
// their exact float64 distances, ties to the even one — the definition,
// computed differently from our bit trick.
const numpyConvert = `
import sys
import numpy as np
x = np.frombuffer(sys.stdin.buffer.read(), dtype="<u4").view(np.float32)
with np.errstate(over="ignore"):
    h = x.astype(np.float16).view(np.uint16)
b = x.view(np.uint32)
lo = b & np.uint32(0xFFFF0000)
hi = lo + np.uint32(0x10000)
xf = x.astype(np.float64)
dlo = np.abs(xf - lo.view(np.float32).astype(np.float64))
dhi = np.abs(hi.view(np.float32).astype(np.float64) - xf)
up = (dhi < dlo) | ((dhi == dlo) & (((lo >> np.uint32(16)) & np.uint32(1)) == 1))
bf = np.where(up, hi >> np.uint32(16), lo >> np.uint32(16)).astype(np.uint16)
sys.stdout.buffer.write(h.astype("<u2").tobytes() + bf.astype("<u2").tobytes())
`

// TestFreezeHeadConversionAgainstNumpy freezes a head of random values (all
// magnitudes from f16 subnormals to 2^15, both signs, and exact ties) as
// f16 and bf16 and compares the stored bits with numpy's.
func TestFreezeHeadConversionAgainstNumpy(t *testing.T) {
	if err := exec.Command(debianPython, "-c", "import numpy").Run(); err != nil {
		if os.Getenv("CI") != "" {
			t.Fatalf("CI is set but %s with numpy is not available: %v", debianPython, err)
		}
		t.Skipf("%s with numpy not available: %v", debianPython, err)
	}
	r := rand.New(rand.NewPCG(2026, 5))
	const hidden = 500
	vals := make([]float32, 6*hidden)
	for i := range vals {
		switch i % 4 {
		case 0: // a tie of binary16: an odd multiple of half a binary16 ulp
			e := r.IntN(20) - 10
			m := 1024 + r.IntN(1024)
			vals[i] = float32(math.Ldexp(float64(2*m+1), e-11))
		case 1: // a tie of bfloat16
			vals[i] = math.Float32frombits(uint32(0x30000000+r.IntN(0x12000000))&0xffff0000 | 0x8000)
		default:
			vals[i] = float32(math.Exp2(r.Float64()*43 - 28))
		}
		if r.IntN(2) == 0 {
			vals[i] = -vals[i]
		}
	}
	store, dir := tinyStore(t)
	headScorer(t, store, dir, hidden, vals, "random:v1")
	in := make([]byte, 4*len(vals))
	for i, v := range vals {
		binary.LittleEndian.PutUint32(in[4*i:], math.Float32bits(v))
	}
	cmd := exec.Command(debianPython, "-c", numpyConvert)
	cmd.Stdin = bytes.NewReader(in)
	out, err := cmd.Output()
	if err != nil || len(out) != 4*len(vals) {
		t.Fatalf("numpy: %v (%d bytes)", err, len(out))
	}
	for k, storage := range []string{"f16", "bf16"} {
		got := storedBits(t, store, "random:v1", storage)
		bad := 0
		for i := range vals {
			want := binary.LittleEndian.Uint16(out[2*(k*len(vals)+i):])
			if got[i] != want {
				if bad < 5 {
					t.Errorf("%s of %v (bits %#08x): stored %#04x, numpy %#04x", storage, vals[i], math.Float32bits(vals[i]), got[i], want)
				}
				bad++
			}
		}
		if bad > 0 {
			t.Errorf("%s: %d of %d values differ from numpy", storage, bad, len(vals))
		}
	}
}

// TestFreezeRenamesClashingNames: a scorer whose layer, tensor and file
// names clash with the encoder's keeps the encoder's names (its blob is
// shared as it is) and has its own renamed, with the references rewritten.
func TestFreezeRenamesClashingNames(t *testing.T) {
	ctx := context.Background()
	store, dir := tinyStore(t)
	enc, scorer, _ := tinyModels(t, dir)
	spec := *scorer.Spec
	spec.Tensors = slices.Clone(spec.Tensors)
	spec.Layers = slices.Clone(spec.Layers)
	for i := range spec.Tensors {
		spec.Tensors[i].File = "encoder.safetensors"
	}
	spec.Tensors[1].Name = "enc.b"         // head.b1 → the name of the encoder's code bias
	spec.Layers[1].Name = "reconstruction" // hidden → the name of the encoder's decoder layer
	spec.Layers[1].Bias = "enc.b"
	spec.Layers[2].Input = "reconstruction"
	m := &modeldir.Model{Spec: &spec, Vocabulary: scorer.Vocabulary, Stats: scorer.Stats, Probes: slices.Clone(scorer.Probes), Tensors: map[string][]float32{}}
	for k, v := range scorer.Tensors {
		m.Tensors[k] = v
	}
	m.Tensors["enc.b"] = scorer.Tensors["head.b1"]
	delete(m.Tensors, "head.b1")
	writeScorer(t, store, m, enc, "tiny-clash:v1")

	res, err := freeze.Scorer(ctx, store, mustRef(t, "tiny-clash:v1"), freeze.Options{Out: mustRef(t, "tiny-clash:frozen")})
	if err != nil {
		t.Fatal(err)
	}
	got := map[string]string{}
	for _, r := range res.Record.Renamed {
		got[r.Kind+" "+r.From] = r.To
	}
	want := map[string]string{"layer reconstruction": "head.reconstruction", "tensor enc.b": "head.enc.b", "file encoder.safetensors": "head-encoder.safetensors"}
	if len(got) != len(want) {
		t.Errorf("renamed %v, want %v", got, want)
	}
	for k, v := range want {
		if got[k] != v {
			t.Errorf("renamed %s to %q, want %q", k, got[k], v)
		}
	}
	frozen := load(t, store, "tiny-clash:frozen")
	if p := frozen.Spec.Layers[len(frozen.Spec.Layers)-1]; p.Input != "head.reconstruction" {
		t.Errorf("output layer reads %q", p.Input)
	}
	if layerDigest(t, frozen, "encoder.safetensors") != layerDigest(t, load(t, store, "tiny-encoder:v1"), "encoder.safetensors") {
		t.Errorf("the encoder blob is not shared")
	}
	if !res.Record.Verification.Passed {
		t.Errorf("verification: %+v", res.Record.Verification)
	}
	if v, err := freeze.Verify(ctx, store, frozen); err != nil || !v.Passed {
		t.Errorf("Verify: %v %+v", err, v)
	}
	if f := checks.Freeze(ctx, store, frozen, checks.FreezeConfig{Enabled: true, RequireFrozen: true}); f.Status != checks.StatusPass {
		t.Errorf("freeze check: %+v", f)
	}
}
