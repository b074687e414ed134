package artifact

import (
	"cmp"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"slices"
	"sort"
	"strconv"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/fileio"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/registry"
)

// MediaTypeHoldoutInfo is the config blob of a holdout artifact: what the
// holdout holds, computed when it was pushed.
const MediaTypeHoldoutInfo types.MediaType = "application/vnd.modelgate.holdout.v1+json"

// MaxHoldoutInfoSize is the largest holdout summary (config blob) any
// reader accepts; push refuses a holdout whose summary would be larger (a
// slice column of very long or very many values), and verify reports a
// stored one as damage.
const MaxHoldoutInfoSize = 1 << 20

// HoldoutInfo describes a holdout artifact (its config blob).
type HoldoutInfo struct {
	SchemaVersion int    `json:"schemaVersion"`
	Format        string `json:"format"`
	File          string `json:"file"`
	Rows          int64  `json:"rows"`
	HasLabels     bool   `json:"hasLabels"`
	Positives     int64  `json:"positives"`
	// Slices counts rows per slice value ("" for rows without one).
	Slices map[string]int64 `json:"slices,omitempty"`
	// Nonzeros is the total number of (item, value) pairs.
	Nonzeros int64 `json:"nonzeros"`
	// NonzerosPerRow holds quantiles of the pairs per row, keyed like a
	// model's stats.json ("q50", "q90", "q99", "q999"; numpy's default,
	// Hyndman & Fan type 7). The gate slices and weights rows by them when
	// there is no baseline to take them from. Absent in summaries written
	// before it existed.
	NonzerosPerRow map[string]float64 `json:"nonzerosPerRow,omitempty"`
	// ClusterColumn names the column declared at push to group rows that
	// are not independent (a listener's rows); Clusters counts its
	// distinct values. Empty and 0 when none was declared.
	ClusterColumn string `json:"clusterColumn,omitempty"`
	Clusters      int64  `json:"clusters,omitempty"`
	// RowIDsChecked says the push found no row_id twice (with a cluster
	// column: no row_id in two clusters). Holdouts pushed before the check
	// existed lack it; the gate checks those itself.
	RowIDsChecked bool `json:"rowIdsChecked,omitempty"`
	// Blocks holds the sha256 of each block of the data blob, so that a
	// reader of some row groups (a gate shard) fetches and verifies only
	// those blocks. Absent in summaries written before it existed: those
	// holdouts are read whole.
	Blocks *registry.BlockDigests `json:"blocks,omitempty"`
}

// HoldoutQuantiles are the quantiles a holdout summary records of the
// pairs per row.
var HoldoutQuantiles = []float64{0.5, 0.9, 0.99, 0.999}

// countQuantiles computes type-7 quantiles (numpy's default) of a sample
// given as a histogram of integer values (value → rows), keyed "q50" etc.
func countQuantiles(hist map[int]int64, rows int64) map[string]float64 {
	if rows == 0 {
		return nil
	}
	vals := make([]int, 0, len(hist))
	for v := range hist {
		vals = append(vals, v)
	}
	sort.Ints(vals)
	// at returns the k-th smallest (0-based) value.
	at := func(k int64) float64 {
		for _, v := range vals {
			if k < hist[v] {
				return float64(v)
			}
			k -= hist[v]
		}
		return float64(vals[len(vals)-1])
	}
	out := map[string]float64{}
	for _, q := range HoldoutQuantiles {
		h := q * float64(rows-1)
		lo := int64(h)
		hi := min(lo+1, rows-1)
		x := at(lo) + (h-float64(lo))*(at(hi)-at(lo))
		out["q"+strings.ReplaceAll(strconv.FormatFloat(q*100, 'f', -1, 64), ".", "")] = x
	}
	return out
}

// structuralSpec is a stand-in model for reading a holdout without one:
// every id maps to the unknown bucket and no dense column is read, so the
// reader checks items, values, labels, weights and slices.
func structuralSpec() (*model.Spec, *data.Vocabulary, error) {
	in := model.SparseInput{Name: "items", VocabularySize: 1, Unknown: model.UnknownBucket,
		Transform: model.TransformIdentity, Duplicates: model.DuplicatesSum, Vocabulary: "v"}
	v, err := data.ParseVocabulary(strings.NewReader("modelgate-structural-check\n"), in)
	if err != nil {
		return nil, nil, err
	}
	return &model.Spec{Inputs: model.Inputs{Sparse: []model.SparseInput{in}}}, v, nil
}

// ScanHoldout reads a holdout file once, checking every row's structure,
// and summarises it. cluster names the cluster column ("" for none): every
// row must have it. A row_id given twice is refused (errkind.BadInput),
// except, with a cluster column, twice within one cluster.
func ScanHoldout(path, cluster string, progress func(Event)) (*HoldoutInfo, error) {
	format, err := data.FormatOf(path)
	if err != nil {
		return nil, err
	}
	f, st, err := openHoldout(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	return scanHoldoutAt(f, st.Size(), path, format, cluster, progress)
}

// scanHoldoutAt is ScanHoldout over size bytes of r, named path in
// messages.
func scanHoldoutAt(ra io.ReaderAt, size int64, path, format, cluster string, progress func(Event)) (*HoldoutInfo, error) {
	if format == data.FormatCSV {
		return nil, errkind.New(errkind.BadInput, "%s: CSV is not a holdout format (want .parquet, .jsonl or .ndjson)", path)
	}
	spec, vocab, err := structuralSpec()
	if err != nil {
		return nil, err
	}
	r, err := data.OpenReader(ra, size, format, data.Options{Spec: spec, Vocab: vocab, Name: path, ClusterColumn: cluster, EveryColumn: true})
	if err != nil {
		return nil, err
	}
	defer r.Close()
	info := &HoldoutInfo{SchemaVersion: 1, Format: format, File: filepath.Base(path), Slices: map[string]int64{}, ClusterColumn: cluster}
	var f data.Frame
	perRow := map[int]int64{}
	var ids []rowIDKey
	for {
		n, err := r.Read(&f, 8192)
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, err
		}
		info.Rows += int64(n)
		info.HasLabels = f.HasLabels
		info.Nonzeros += int64(len(f.Indices))
		for i := 0; i < n; i++ {
			if f.HasLabels && f.Labels[i] == 1 {
				info.Positives++
			}
			info.Slices[f.Slices[i]]++
			perRow[int(f.Indptr[i+1]-f.Indptr[i])]++
			k := rowIDKey{id: f.RowIDs[i]}
			if cluster != "" {
				k.cluster = f.Clusters[i]
			}
			ids = append(ids, k)
		}
		if progress != nil {
			progress(Event{Phase: "scan", Name: path, Done: info.Rows, Total: r.Rows()})
		}
	}
	if info.Rows == 0 {
		return nil, errkind.New(errkind.BadInput, "holdout %s has no rows", path)
	}
	if info.Clusters, err = checkRowIDs(ids, path, cluster); err != nil {
		return nil, err
	}
	info.RowIDsChecked = true
	if len(info.Slices) == 1 && info.Slices[""] > 0 {
		info.Slices = nil
	}
	info.NonzerosPerRow = countQuantiles(perRow, info.Rows)
	// The summary is stored as the artifact's config: it must be one that
	// every reader accepts.
	if cfg, err := json.Marshal(info); err != nil {
		return nil, err
	} else if len(cfg) > MaxHoldoutInfoSize {
		longest := 0
		for k := range info.Slices {
			longest = max(longest, len(k))
		}
		return nil, errkind.New(errkind.BadInput, "holdout %s: its summary would be %d bytes, over the %d bytes modelgate reads back: the slice column has %d distinct values, the longest %d bytes; use fewer or shorter slice names",
			path, len(cfg), MaxHoldoutInfoSize, len(info.Slices), longest)
	}
	return info, nil
}

// openHoldout opens a holdout file: a regular file (a named pipe or a
// device is refused before it is read).
func openHoldout(path string) (*os.File, os.FileInfo, error) {
	f, st, err := fileio.OpenRegular(path)
	if err != nil {
		return nil, nil, errkind.Wrap(errkind.BadInput, fmt.Errorf("opening holdout: %w", err))
	}
	return f, st, nil
}

// rowIDKey is a row's id and cluster key (0 without a cluster column).
type rowIDKey struct {
	id      int64
	cluster uint64
}

// checkRowIDs refuses a row id given twice (with a cluster column: given
// in two clusters) and counts the clusters. It sorts ids.
func checkRowIDs(ids []rowIDKey, path, cluster string) (clusters int64, err error) {
	slices.SortFunc(ids, func(a, b rowIDKey) int {
		if c := cmp.Compare(a.id, b.id); c != 0 {
			return c
		}
		return cmp.Compare(a.cluster, b.cluster)
	})
	var bad []string
	badRows := 0
	for i := 1; i < len(ids); i++ {
		if ids[i].id != ids[i-1].id || (cluster != "" && ids[i].cluster == ids[i-1].cluster) {
			continue
		}
		badRows++
		if len(bad) < 5 && (len(bad) == 0 || bad[len(bad)-1] != strconv.FormatInt(ids[i].id, 10)) {
			bad = append(bad, strconv.FormatInt(ids[i].id, 10))
		}
	}
	if badRows > 0 {
		if cluster != "" {
			return 0, errkind.New(errkind.BadInput, "holdout %s: %d rows reuse a row_id of another cluster (%q) (row_id %s): a row_id may repeat only within one cluster",
				path, badRows, cluster, strings.Join(bad, ", "))
		}
		return 0, errkind.New(errkind.BadInput, "holdout %s: %d rows repeat a row_id (row_id %s): row ids must be unique; if the repeats are one listener's rows, declare the listener column with --cluster-column",
			path, badRows, strings.Join(bad, ", "))
	}
	if cluster == "" {
		return 0, nil
	}
	keys := make([]uint64, len(ids))
	for i, k := range ids {
		keys[i] = k.cluster
	}
	slices.Sort(keys)
	return int64(len(slices.Compact(keys))), nil
}

var holdoutMediaTypes = map[string]types.MediaType{
	data.FormatParquet: MediaTypeHoldoutParquet,
	data.FormatJSONL:   MediaTypeHoldoutJSONL,
}

// PushHoldout checks a holdout file row by row and stores it as a holdout
// artifact: the file as one blob (streamed, never held in memory), its
// summary as the config. On a store that stages blobs the file is read
// once: it streams into the store (hashed as it is written) and the row
// check reads the staged copy, so the summary describes exactly the bytes
// stored even if the file changes meanwhile; other stores get a check, a
// hash and an upload, each reading the file.
func PushHoldout(ctx context.Context, store registry.Store, path string, ref registry.Ref, opts Options) (*PushResult, error) {
	if ref.Tag == "" || ref.HasDigest() {
		return nil, errkind.New(errkind.BadInput, "push needs NAME:TAG, got %q", ref.String())
	}
	if err := registry.CheckTagWrite(ctx, store, ref.Repository, ref.Tag); err != nil {
		return nil, err
	}
	format, err := data.FormatOf(path)
	if err != nil {
		return nil, err
	}
	if format == data.FormatCSV {
		return nil, errkind.New(errkind.BadInput, "%s: CSV is not a holdout format (want .parquet, .jsonl or .ndjson)", path)
	}
	mt, ok := holdoutMediaTypes[format]
	if !ok {
		return nil, errkind.New(errkind.BadInput, "holdout %s: format %q cannot be stored", path, format)
	}
	var info *HoldoutInfo
	var layer Blob
	if stager, ok := store.(registry.BlobStager); ok {
		info, layer, err = stageHoldout(ctx, stager, ref.Repository, path, format, opts)
	} else {
		info, layer, err = hashHoldout(ctx, store, ref.Repository, path, opts)
	}
	if err != nil {
		return nil, err
	}
	if layer.Staged != nil {
		defer layer.Staged.Discard() // a no-op once committed
	}
	layer.Desc.MediaType, layer.Desc.Annotations = mt, map[string]string{AnnotationTitle: info.File}
	cfg, err := json.Marshal(info)
	if err != nil {
		return nil, err
	}

	config := NewBlob(MediaTypeHoldoutInfo, cfg, nil)
	ann := map[string]string{AnnotationKind: "holdout", AnnotationName: info.File}
	res, err := PushArtifact(ctx, store, ref, ArtifactType("holdout"), config, []Blob{layer}, nil, ann, opts)
	if err != nil {
		return nil, err
	}
	if layer.uploaded {
		// hashHoldout put the data blob up; PushArtifact found it present.
		res.BlobsSkipped--
		res.BlobsWritten++
		res.BytesWritten += layer.Desc.Size
	}
	return res, nil
}

// stageHoldout streams the file into the store and checks the staged copy.
func stageHoldout(ctx context.Context, stager registry.BlobStager, repo, path, format string, opts Options) (*HoldoutInfo, Blob, error) {
	f, st, err := openHoldout(path)
	if err != nil {
		return nil, Blob{}, err
	}
	defer f.Close()
	name := filepath.Base(path)
	opts.emit(Event{Phase: "upload", Name: name, Total: st.Size()})
	bh := registry.NewBlockHasher(st.Size())
	sb, err := stager.StageBlob(ctx, repo, st.Size(), io.TeeReader(&progressReader{r: f, opts: opts, name: name, total: st.Size()}, bh))
	if errors.Is(err, registry.ErrDigestMismatch) {
		return nil, Blob{}, errkind.New(errkind.BadInput, "holdout %s changed while it was pushed (%v); push again once it is written", path, err)
	}
	if err != nil {
		return nil, Blob{}, fmt.Errorf("uploading %s: %w", path, err)
	}
	var ra io.ReaderAt = f // stores that cannot read a staged blob back
	if sr, ok := sb.(registry.StagedReader); ok {
		ra = sr
	}
	info, err := scanHoldoutAt(ra, sb.Size(), path, format, opts.ClusterColumn, opts.Progress)
	if err != nil {
		sb.Discard()
		return nil, Blob{}, err
	}
	// The stager wrote exactly the bytes the hasher saw (it refuses more
	// or fewer than the size).
	if info.Blocks = bh.Digests(); info.Blocks.Check(sb.Size()) != nil {
		sb.Discard()
		return nil, Blob{}, errkind.New(errkind.BadInput, "holdout %s changed while it was pushed; push again once it is written", path)
	}
	return info, Blob{Desc: v1.Descriptor{Size: sb.Size(), Digest: sb.Digest()}, Staged: sb}, nil
}

// hashHoldout checks, hashes and uploads the file, each a pass over it.
func hashHoldout(ctx context.Context, store registry.Store, repo, path string, opts Options) (*HoldoutInfo, Blob, error) {
	info, err := ScanHoldout(path, opts.ClusterColumn, opts.Progress)
	if err != nil {
		return nil, Blob{}, err
	}
	f, _, err := openHoldout(path)
	if err != nil {
		return nil, Blob{}, err
	}
	defer f.Close()
	st, err := f.Stat()
	if err != nil {
		return nil, Blob{}, err
	}
	h, bh := sha256.New(), registry.NewBlockHasher(st.Size())
	size, err := io.Copy(io.MultiWriter(h, bh), f)
	if err != nil {
		return nil, Blob{}, fmt.Errorf("hashing %s: %w", path, err)
	}
	if info.Blocks = bh.Digests(); info.Blocks.Check(size) != nil {
		return nil, Blob{}, errkind.New(errkind.BadInput, "holdout %s changed while it was pushed; push again once it is written", path)
	}
	b := Blob{Desc: v1.Descriptor{Size: size, Digest: v1.Hash{Algorithm: "sha256", Hex: hex.EncodeToString(h.Sum(nil))}}}
	if _, err := registry.ReuseBlob(ctx, store, repo, b.Desc.Digest); err == nil {
		return info, b, nil
	}
	if _, err := f.Seek(0, io.SeekStart); err != nil {
		return nil, Blob{}, err
	}
	opts.emit(Event{Phase: "upload", Name: info.File, Total: size})
	if err := store.PutBlob(ctx, repo, b.Desc.Digest, size, f); err != nil {
		return nil, Blob{}, fmt.Errorf("uploading %s: %w", path, err)
	}
	opts.emit(Event{Phase: "upload", Name: info.File, Done: size, Total: size})
	b.uploaded = true
	return info, b, nil
}

// Holdout is a holdout artifact: its summary, read and verified, and its
// data blob, opened for reading when first needed (Open, Scan).
type Holdout struct {
	Artifact *Artifact
	Info     HoldoutInfo
	// Format is the data's format (data.FormatParquet or data.FormatJSONL).
	Format string
	// Layer is the data blob's descriptor.
	Layer v1.Descriptor

	ctx   context.Context
	store registry.Store
	name  string
	blob  *registry.BlobAt
	file  *os.File // OpenHoldoutFile
	size  int64
}

// Close releases the data blob's reader (and its temporary copy).
func (h *Holdout) Close() {
	if h.blob != nil {
		h.blob.Close()
		h.blob = nil
	}
	if h.file != nil {
		h.file.Close()
		h.file = nil
	}
}

// Fetched counts the data blob's bytes read from the store so far (0 when
// the local blob cache held it).
func (h *Holdout) Fetched() int64 {
	if h.blob == nil {
		return 0
	}
	return h.blob.Fetched()
}

// Data opens the data for random access, once. A holdout artifact's blob
// is opened with registry.OpenBlobAt: from the local blob cache, by
// verified ranges when the summary records block digests and the store
// serves ranges, else whole and verified.
func (h *Holdout) Data() (io.ReaderAt, int64, error) {
	if h.file != nil {
		return h.file, h.size, nil
	}
	if h.blob != nil {
		return h.blob, h.blob.Size(), nil
	}
	if h.store == nil {
		return nil, 0, errkind.New(errkind.Internal, "holdout %s: closed", h.name)
	}
	b, err := registry.OpenBlobAt(h.ctx, h.store, h.Artifact.Repository, h.Layer.Digest, h.Layer.Size, h.Info.Blocks)
	if err != nil {
		return nil, 0, fmt.Errorf("fetching holdout %s: %w", h.name, err)
	}
	h.blob = b
	return b, b.Size(), nil
}

// Fetch reads the whole data blob now (verified against its digest), for
// a reader of every row that should learn of damage before it starts.
func (h *Holdout) Fetch() error {
	if _, _, err := h.Data(); err != nil {
		return err
	}
	if h.blob != nil {
		if err := h.blob.Whole(); err != nil {
			return fmt.Errorf("fetching holdout %s: %w", h.name, err)
		}
	}
	return nil
}

// Open reads the holdout's rows (data.OpenReader over Data).
func (h *Holdout) Open(opts data.Options) (data.Reader, error) {
	ra, size, err := h.Data()
	if err != nil {
		return nil, err
	}
	if opts.Name == "" {
		opts.Name = h.name
	}
	return data.OpenReader(ra, size, h.Format, opts)
}

// Scan reads every row as ScanHoldout does (cluster names the cluster
// column, "" for none).
func (h *Holdout) Scan(cluster string) (*HoldoutInfo, error) {
	ra, size, err := h.Data()
	if err != nil {
		return nil, err
	}
	return scanHoldoutAt(ra, size, h.name, h.Format, cluster, nil)
}

// OpenHoldoutFile is a Holdout read from a local file, with the summary
// info (not checked against the file).
func OpenHoldoutFile(path string, info HoldoutInfo) (*Holdout, error) {
	format, err := data.FormatOf(path)
	if err != nil {
		return nil, err
	}
	f, st, err := openHoldout(path)
	if err != nil {
		return nil, err
	}
	return &Holdout{Info: info, Format: format, name: path, file: f, size: st.Size()}, nil
}

// FetchHoldout reads a holdout artifact's manifest and summary (both
// verified by digest). The data blob is read only when Open or Scan need
// it, and then only the parts they read when it can be (see Data); a
// sharded gate's merge step reads none of it.
func FetchHoldout(ctx context.Context, store registry.Store, ref registry.Ref) (*Holdout, error) {
	a, err := ReadArtifact(ctx, store, ref)
	if err != nil {
		return nil, err
	}
	if a.Kind() != "holdout" || len(a.Manifest.Layers) != 1 {
		return nil, errkind.New(errkind.BadInput, "%s is a %q artifact, not a holdout", ref, a.Manifest.ArtifactType)
	}
	h := &Holdout{Artifact: a, ctx: ctx, store: store, name: ref.String()}
	raw, err := ReadBlob(ctx, store, a.Repository, a.Manifest.Config, MaxHoldoutInfoSize)
	if err != nil {
		return nil, err
	}
	if err := json.Unmarshal(raw, &h.Info); err != nil {
		return nil, errkind.New(errkind.Integrity, "holdout %s: config is not valid: %v", ref, err)
	}
	h.Layer = a.Manifest.Layers[0]
	h.Format = map[types.MediaType]string{MediaTypeHoldoutParquet: data.FormatParquet, MediaTypeHoldoutJSONL: data.FormatJSONL}[h.Layer.MediaType]
	if h.Format == "" {
		return nil, errkind.New(errkind.Integrity, "holdout %s: unknown data media type %q", ref, h.Layer.MediaType)
	}
	if h.Info.Blocks != nil {
		if err := h.Info.Blocks.Check(h.Layer.Size); err != nil {
			return nil, errkind.New(errkind.Integrity, "holdout %s: summary: %v", ref, err)
		}
	}
	return h, nil
}

// SliceNames returns the slice names of a holdout summary, sorted.
func (i *HoldoutInfo) SliceNames() []string {
	out := make([]string, 0, len(i.Slices))
	for k := range i.Slices {
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}
