package artifact

import (
	"bytes"
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/model/safetensors"
	"github.com/modelgate/modelgate/internal/registry"
)

// plainStore hides every optional ability of a store (staging included),
// as the retry wrapper around a remote store does.
type plainStore struct{ registry.Store }

// encoderDir copies testdata/models/tiny-encoder (made by
// internal/fixture/gen; the fixture package itself imports this one) into
// a temporary directory.
func encoderDir(t *testing.T) string {
	t.Helper()
	src := filepath.Join("..", "..", "testdata", "models", "tiny-encoder")
	dir := filepath.Join(t.TempDir(), "tiny-encoder")
	if err := os.CopyFS(dir, os.DirFS(src)); err != nil {
		t.Fatal(err)
	}
	return dir
}

func openStore(t *testing.T) *registry.Local {
	t.Helper()
	s, err := registry.OpenLocal(filepath.Join(t.TempDir(), "store"))
	if err != nil {
		t.Fatal(err)
	}
	return s
}

// storeFiles maps every file of a local store (relative path) to its bytes.
func storeFiles(t *testing.T, s *registry.Local) map[string]string {
	t.Helper()
	out := map[string]string{}
	err := filepath.WalkDir(s.Dir(), func(p string, d fs.DirEntry, err error) error {
		if err != nil || d.IsDir() || strings.HasSuffix(p, ".modelgate/lock") {
			return err
		}
		b, err := os.ReadFile(p)
		rel, _ := filepath.Rel(s.Dir(), p)
		out[rel] = string(b)
		return err
	})
	if err != nil {
		t.Fatal(err)
	}
	return out
}

var ref = registry.Ref{Repository: "listener-encoder", Tag: "v1"}

// TestStagedPushMatchesBufferedPush: the streaming push (a store that can
// stage) and the hash-first push (a store that cannot) give the same
// manifest digest and the same blobs, and pulling gives back the
// directory's exact bytes.
func TestStagedPushMatchesBufferedPush(t *testing.T) {
	ctx := context.Background()
	dir := encoderDir(t)
	staged, buffered := openStore(t), openStore(t)
	r1, err := PushModelDir(ctx, staged, dir, ref, Options{})
	if err != nil {
		t.Fatal(err)
	}
	r2, err := PushModelDir(ctx, plainStore{buffered}, dir, ref, Options{})
	if err != nil {
		t.Fatal(err)
	}
	if r1.Digest != r2.Digest || r1.BlobsWritten != r2.BlobsWritten || r1.BytesWritten != r2.BytesWritten {
		t.Errorf("staged push %+v\nbuffered push %+v", r1, r2)
	}
	blobs := func(s *registry.Local) []string {
		var out []string
		for p := range storeFiles(t, s) {
			if strings.HasPrefix(p, "blobs/") {
				out = append(out, p)
			}
		}
		slices.Sort(out)
		return out
	}
	if a, b := blobs(staged), blobs(buffered); !slices.Equal(a, b) {
		t.Errorf("blobs differ:\nstaged   %v\nbuffered %v", a, b)
	}
	// A second push writes nothing new, and leaves no temporary file.
	before := storeFiles(t, staged)
	r3, err := PushModelDir(ctx, staged, dir, ref, Options{})
	if err != nil {
		t.Fatal(err)
	}
	if r3.BlobsWritten != 0 || !r3.ManifestReused {
		t.Errorf("second push wrote %d blobs (manifest reused: %v)", r3.BlobsWritten, r3.ManifestReused)
	}
	if after := storeFiles(t, staged); len(after) != len(before) {
		t.Errorf("second push changed the store's files: %d → %d", len(before), len(after))
	}
	out := filepath.Join(t.TempDir(), "pulled")
	if _, err := Pull(ctx, staged, ref, out, Options{}); err != nil {
		t.Fatal(err)
	}
	for _, name := range []string{"spec.json", "encoder.safetensors", "decoder.safetensors", "vocabulary.txt", "stats.json", "probes.jsonl"} {
		a, _ := os.ReadFile(filepath.Join(dir, name))
		b, err := os.ReadFile(filepath.Join(out, name))
		if err != nil || !bytes.Equal(a, b) {
			t.Errorf("%s: pulled bytes differ (%v)", name, err)
		}
	}
}

// plantNaN writes a quiet NaN (IEEE 754 binary32 0x7fc00000) over element
// idx of the largest tensor of a safetensors file and returns its name.
func plantNaN(t *testing.T, path string, idx int) string {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	f, err := safetensors.Parse(bytes.NewReader(b), int64(len(b)))
	if err != nil {
		t.Fatal(err)
	}
	ti := slices.MaxFunc(f.Tensors, func(a, b safetensors.TensorInfo) int { return int(a.NumElements() - b.NumElements()) })
	if ti.DType != "F32" || int64(idx) >= ti.NumElements() {
		t.Fatalf("largest tensor is %s with %d elements", ti.DType, ti.NumElements())
	}
	binary.LittleEndian.PutUint32(b[f.DataOffset()+ti.Begin+int64(4*idx):], 0x7fc00000)
	if err := os.WriteFile(path, b, 0o644); err != nil {
		t.Fatal(err)
	}
	return ti.Name
}

// TestPushNaNChangesNothing: a NaN weight is refused as bad input naming
// file, tensor and index, by both push paths, and the store is
// byte-for-byte as before (no blob, no temporary file).
func TestPushNaNChangesNothing(t *testing.T) {
	ctx := context.Background()
	dir := encoderDir(t)
	name := plantNaN(t, filepath.Join(dir, "encoder.safetensors"), 3)
	for _, wrap := range []bool{false, true} {
		s := openStore(t)
		before := storeFiles(t, s)
		var store registry.Store = s
		if wrap {
			store = plainStore{s}
		}
		_, err := PushModelDir(ctx, store, dir, ref, Options{})
		if errkind.Of(err) != errkind.BadInput || !strings.Contains(err.Error(), "encoder.safetensors: tensor \""+name+"\" has a non-finite value at flat index 3") {
			t.Errorf("buffered=%v: got %v", wrap, err)
		}
		after := storeFiles(t, s)
		if len(after) != len(before) {
			t.Errorf("buffered=%v: store files %d → %d", wrap, len(before), len(after))
		}
		for k, v := range before {
			if after[k] != v {
				t.Errorf("buffered=%v: %s changed", wrap, k)
			}
		}
	}
}

// TestStagingRefusesAFileThatChanged: a tensor file that grows between
// the moment its size was taken and the upload is refused as bad input
// and nothing stays.
func TestStagingRefusesAFileThatChanged(t *testing.T) {
	ctx := context.Background()
	dir := encoderDir(t)
	files, _ := tensorFilesOf(dir)
	if len(files) != 2 {
		t.Fatalf("tensor files %v", files)
	}
	f, err := os.OpenFile(filepath.Join(dir, "decoder.safetensors"), os.O_APPEND|os.O_WRONLY, 0)
	if err != nil {
		t.Fatal(err)
	}
	f.Write([]byte("more"))
	f.Close()
	s := openStore(t)
	staged, _, err := stageFiles(ctx, s, ref.Repository, dir, files, Options{})
	for _, b := range staged {
		b.Staged.Discard()
	}
	if errkind.Of(err) != errkind.BadInput || !strings.Contains(err.Error(), "decoder.safetensors changed while it was pushed") {
		t.Errorf("got %v", err)
	}
	for p := range storeFiles(t, s) {
		if strings.HasPrefix(p, "blobs/") || strings.HasPrefix(p, ".modelgate/tmp/") {
			t.Errorf("left behind: %s", p)
		}
	}
	// Through PushModelDir the grown file is simply invalid (4 bytes no
	// tensor covers): bad input naming it, nothing left behind.
	_, err = PushModelDir(ctx, s, dir, ref, Options{})
	if errkind.Of(err) != errkind.BadInput || !strings.Contains(err.Error(), "decoder.safetensors") {
		t.Errorf("push of the grown file: %v", err)
	}
	for p := range storeFiles(t, s) {
		if strings.HasPrefix(p, "blobs/") || strings.HasPrefix(p, ".modelgate/tmp/") {
			t.Errorf("left behind after the push: %s", p)
		}
	}
}

// TestPullRefusesNonFiniteContent: a model pushed by another tool (here
// PushArtifact, which checks nothing) with a NaN weight is written out but
// reported, naming the tensor: pull checks what it streams.
func TestPullRefusesNonFiniteContent(t *testing.T) {
	ctx := context.Background()
	dir := encoderDir(t)
	d, err := modeldir.Read(dir)
	if err != nil {
		t.Fatal(err)
	}
	name := plantNaN(t, filepath.Join(dir, "encoder.safetensors"), 5)
	bad, err := os.ReadFile(filepath.Join(dir, "encoder.safetensors"))
	if err != nil {
		t.Fatal(err)
	}
	config, layers, ann, err := ModelBlobs(d)
	if err != nil {
		t.Fatal(err)
	}
	for i, l := range layers {
		if l.Desc.Annotations[AnnotationTitle] == "encoder.safetensors" {
			layers[i] = NewBlob(MediaTypeTensors, bad, l.Desc.Annotations)
		}
	}
	s := openStore(t)
	if _, err := PushArtifact(ctx, s, ref, ArtifactType("encoder"), config, layers, nil, ann, Options{}); err != nil {
		t.Fatal(err)
	}
	_, err = Pull(ctx, s, ref, filepath.Join(t.TempDir(), "out"), Options{})
	if err == nil || !strings.Contains(err.Error(), "tensor \""+name+"\" has a non-finite value at flat index 5") {
		t.Errorf("got %v", err)
	}
	if errors.Is(err, registry.ErrDigestMismatch) {
		t.Errorf("a content problem reported as a digest mismatch: %v", err)
	}
}

// TestHoldoutPushPaths: a holdout pushed by streaming into a staging store
// (checked on the staged copy) and by the check-hash-upload path give the
// same artifact and summary; a bad row leaves a staging store unchanged.
func TestHoldoutPushPaths(t *testing.T) {
	ctx := context.Background()
	dir := t.TempDir()
	good := filepath.Join(dir, "listeners.jsonl")
	rows := `{"row_id":1,"items":["show-003","show-010"],"values":[2,1],"label":1,"slice":"new"}` + "\n" +
		`{"row_id":2,"items":[],"values":[],"label":0,"slice":"new"}` + "\n" +
		`{"row_id":3,"items":["show-007"],"values":[5],"label":0,"slice":"returning"}` + "\n"
	if err := os.WriteFile(good, []byte(rows), 0o644); err != nil {
		t.Fatal(err)
	}
	href := registry.Ref{Repository: "promo-holdout", Tag: "v1"}
	staged, buffered := openStore(t), openStore(t)
	r1, err := PushHoldout(ctx, staged, good, href, Options{})
	if err != nil {
		t.Fatal(err)
	}
	r2, err := PushHoldout(ctx, plainStore{buffered}, good, href, Options{})
	if err != nil {
		t.Fatal(err)
	}
	if r1.Digest != r2.Digest || r1.BlobsWritten != r2.BlobsWritten || r1.BytesWritten != r2.BytesWritten || r1.BlobsSkipped != r2.BlobsSkipped {
		t.Errorf("staged %+v\nbuffered %+v", r1, r2)
	}
	h, err := FetchHoldout(ctx, staged, href)
	if err != nil {
		t.Fatal(err)
	}
	defer h.Close()
	if h.Info.Rows != 3 || h.Info.Positives != 1 || !h.Info.HasLabels || h.Info.Slices["new"] != 2 || h.Info.Nonzeros != 3 {
		t.Errorf("summary %+v", h.Info)
	}
	if r3, err := PushHoldout(ctx, staged, good, href, Options{}); err != nil || r3.BlobsWritten != 0 {
		t.Errorf("second push: %+v, %v", r3, err)
	}

	bad := filepath.Join(dir, "bad.jsonl")
	if err := os.WriteFile(bad, []byte(rows+`{"row_id":4,"items":[],"values":[],"label":2}`+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	before := storeFiles(t, staged)
	_, err = PushHoldout(ctx, staged, bad, registry.Ref{Repository: "promo-holdout", Tag: "bad"}, Options{})
	if errkind.Of(err) != errkind.BadInput || !strings.Contains(err.Error(), "row 4") {
		t.Errorf("bad row: got %v", err)
	}
	after := storeFiles(t, staged)
	if len(after) != len(before) {
		t.Errorf("a refused holdout changed the store: %d files → %d", len(before), len(after))
	}
}

// TestVerifyStreamsModels: verify finds a NaN weight in a stored model
// (put there by a tool that checks nothing) and a tensor blob whose bytes
// were changed on disk, without decoding the model.
func TestVerifyStreamsModels(t *testing.T) {
	ctx := context.Background()
	dir := encoderDir(t)
	d, err := modeldir.Read(dir)
	if err != nil {
		t.Fatal(err)
	}
	name := plantNaN(t, filepath.Join(dir, "encoder.safetensors"), 2)
	bad, _ := os.ReadFile(filepath.Join(dir, "encoder.safetensors"))
	config, layers, ann, err := ModelBlobs(d)
	if err != nil {
		t.Fatal(err)
	}
	var tensorDigest string
	for i, l := range layers {
		if l.Desc.Annotations[AnnotationTitle] == "encoder.safetensors" {
			layers[i] = NewBlob(MediaTypeTensors, bad, l.Desc.Annotations)
			tensorDigest = layers[i].Desc.Digest.Hex
		}
	}
	s := openStore(t)
	if _, err := PushArtifact(ctx, s, ref, ArtifactType("encoder"), config, layers, nil, ann, Options{}); err != nil {
		t.Fatal(err)
	}
	rep, err := VerifyStore(ctx, s, nil)
	if err != nil {
		t.Fatal(err)
	}
	if rep.OK() || rep.Models != 1 || !strings.Contains(fmt.Sprint(rep.Findings), "tensor \""+name+"\" has a non-finite value at flat index 2") {
		t.Errorf("NaN weight: %+v", rep)
	}

	// Flip a byte of the stored tensor blob: its digest no longer matches.
	p := filepath.Join(s.Dir(), "blobs", "sha256", tensorDigest)
	os.Chmod(p, 0o644)
	b, _ := os.ReadFile(p)
	b[len(b)-1] ^= 1
	if err := os.WriteFile(p, b, 0o644); err != nil {
		t.Fatal(err)
	}
	rep, err = VerifyStore(ctx, s, nil)
	if err != nil {
		t.Fatal(err)
	}
	text := fmt.Sprint(rep.Findings)
	if rep.OK() || !strings.Contains(text, "model unreadable") || !strings.Contains(text, "the blob is corrupt") {
		t.Errorf("changed blob: %+v", rep)
	}
}

// TestPushArtifactParallelUploads: blobs go up concurrently, a digest
// listed twice is uploaded and counted once, and when one upload is
// refused (a flipped bit: the store rejects the digest) the push fails
// with no manifest written and no tag.
func TestPushArtifactParallelUploads(t *testing.T) {
	ctx := context.Background()
	var blobs []Blob
	for i := range 9 {
		blobs = append(blobs, NewBlob(MediaTypeStats, []byte(fmt.Sprintf(`{"show":%d}`, i)), map[string]string{AnnotationTitle: fmt.Sprintf("s%d.json", i)}))
	}
	blobs = append(blobs, blobs[3]) // listed twice
	config := NewBlob(MediaTypeSpec, []byte(`{}`), nil)
	s := openStore(t)
	r, err := PushArtifact(ctx, s, ref, ArtifactType("encoder"), config, blobs, nil, nil, Options{})
	if err != nil {
		t.Fatal(err)
	}
	if r.BlobsWritten != 11 || r.BlobsSkipped != 1 { // 10 distinct blobs + the manifest; the repeat skipped
		t.Errorf("written %d, skipped %d; want 11 and 1", r.BlobsWritten, r.BlobsSkipped)
	}
	r2, err := PushArtifact(ctx, s, ref, ArtifactType("encoder"), config, blobs, nil, nil, Options{})
	if err != nil || r2.BlobsWritten != 0 || r2.BlobsSkipped != 11 || !r2.ManifestReused {
		t.Errorf("second push: %+v, %v", r2, err)
	}

	fresh := openStore(t)
	faulty := registry.NewFaulty(fresh, registry.FaultPlan{FlipEvery: 4})
	other := registry.Ref{Repository: "listener-encoder", Tag: "v2"}
	if _, err := PushArtifact(ctx, faulty, other, ArtifactType("encoder"), config, blobs, nil, nil, Options{}); !errors.Is(err, registry.ErrDigestMismatch) {
		t.Fatalf("a refused upload: got %v", err)
	}
	if _, err := fresh.Resolve(ctx, other.Repository, other.Tag); !errors.Is(err, registry.ErrNotFound) {
		t.Errorf("the tag exists after a failed push: %v", err)
	}
	if ms, err := fresh.Manifests(ctx, other.Repository); err == nil && len(ms) != 0 {
		t.Errorf("manifests written by a failed push: %v", ms)
	}
}
