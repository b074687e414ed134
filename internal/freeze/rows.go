package freeze

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"os"
	"sort"
	"strings"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/fileio"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
)

// Names of the verification row sets.
const (
	SetProbes  = "probes"
	SetHoldout = "holdout"
)

// rowSet is a batch of verification rows.
type rowSet struct {
	name  string
	from  string
	total int64 // rows the source holds
	ids   []int64
	batch *model.Batch
	notes []string
	out   []float32 // the verified scorer's outputs, once computed
}

type rowSets struct {
	sets    []*rowSet
	cleanup func()
}

func (r *rowSets) close() {
	if r.cleanup != nil {
		r.cleanup()
	}
}

// holdoutSource is a holdout to sample: a local file, possibly fetched
// from the store.
type holdoutSource struct {
	path, name string
	hold       *artifact.Holdout // when it names a holdout artifact (then path is "")
	rows       int
	err        error
	cleanup    func()
}

// holdout resolves Options.Holdout: an existing file is used as it is,
// otherwise it must name a holdout artifact. Errors surface in collectRows.
func (o Options) holdout(ctx context.Context, store registry.Store) *holdoutSource {
	n := o.HoldoutRows
	if n <= 0 {
		n = DefaultHoldoutRows
	}
	if o.Holdout == "" {
		return nil
	}
	return openHoldout(ctx, store, o.Holdout, n)
}

func openHoldout(ctx context.Context, store registry.Store, s string, n int) *holdoutSource {
	if st, err := os.Stat(s); err == nil && !st.IsDir() {
		dg, err := fileDigest(s)
		if err != nil {
			return &holdoutSource{err: err}
		}
		return &holdoutSource{path: s, name: s + " (" + dg + ")", rows: n}
	}
	ref, err := registry.ParseRef(s, false)
	if err != nil {
		return &holdoutSource{err: badInput("--holdout %q is neither a file nor a holdout reference: %v", s, err)}
	}
	h, err := artifact.FetchHoldout(ctx, store, ref)
	if err != nil {
		return &holdoutSource{err: err}
	}
	return &holdoutSource{hold: h, name: ref.String() + " (" + h.Artifact.Desc.Digest.String() + ")", rows: n, cleanup: h.Close}
}

func fileDigest(path string) (string, error) {
	f, _, err := fileio.OpenRegular(path)
	if err != nil {
		return "", err
	}
	defer f.Close()
	h := sha256.New()
	if _, err := io.Copy(h, f); err != nil {
		return "", fmt.Errorf("reading %s: %w", path, err)
	}
	return "sha256:" + hex.EncodeToString(h.Sum(nil)), nil
}

// vocabularyOf parses a loaded model's vocabulary for its sparse input.
func vocabularyOf(spec *model.Spec, ids []string) (*data.Vocabulary, error) {
	var b strings.Builder
	for _, id := range ids {
		b.WriteString(id)
		b.WriteByte('\n')
	}
	v, err := data.ParseVocabulary(strings.NewReader(b.String()), spec.Inputs.Sparse[0])
	if err != nil {
		return nil, errkind.New(errkind.Integrity, "vocabulary of %s: %w", spec.Name, err)
	}
	return v, nil
}

// collectRows builds the verification rows: every probe row (mapped
// through the vocabulary; a row the model's own rules refuse is noted and
// left out) and, when hs is not nil, a seeded sample of the holdout.
func collectRows(spec *model.Spec, vocabIDs []string, probes []modeldir.Probe, hs *holdoutSource) (*rowSets, error) {
	out := &rowSets{}
	if hs != nil {
		out.cleanup = hs.cleanup
		if hs.err != nil {
			return nil, hs.err
		}
	}
	vocab, err := vocabularyOf(spec, vocabIDs)
	if err != nil {
		out.close()
		return nil, err
	}
	ps := &rowSet{name: SetProbes, from: "probe rows stored with the scorer", batch: emptyBatch(spec)}
	for i, p := range probes {
		var idx []int32
		var vals []float32
		refused := false
		for j, id := range p.Items {
			k, keep, err := vocab.Map(id)
			if err != nil {
				ps.notes = append(ps.notes, fmt.Sprintf("probe row %d left out: %v", i+1, err))
				refused = true
				break
			}
			if keep {
				idx = append(idx, k)
				vals = append(vals, p.Values[j])
			}
		}
		if refused {
			continue
		}
		appendRow(ps.batch, spec, idx, vals, func(name string) []float32 { return p.Dense[name] })
		ps.ids = append(ps.ids, int64(i+1))
	}
	ps.total = int64(len(probes))
	out.sets = append(out.sets, ps)
	if hs != nil {
		hset, err := sampleHoldout(spec, vocab, hs)
		if err != nil {
			out.close()
			return nil, err
		}
		out.sets = append(out.sets, hset)
	}
	return out, nil
}

func emptyBatch(spec *model.Spec) *model.Batch {
	b := &model.Batch{Indptr: []int32{0}, Dense: map[string][]float32{}}
	for _, d := range spec.Inputs.Dense {
		b.Dense[d.Name] = nil
	}
	return b
}

func appendRow(b *model.Batch, spec *model.Spec, idx []int32, vals []float32, dense func(string) []float32) {
	b.Indices = append(b.Indices, idx...)
	b.Values = append(b.Values, vals...)
	b.Indptr = append(b.Indptr, int32(len(b.Indices)))
	for _, d := range spec.Inputs.Dense {
		b.Dense[d.Name] = append(b.Dense[d.Name], dense(d.Name)...)
	}
}

// sampled is one holdout row kept by the reservoir.
type sampled struct {
	seq   int64 // position in the file
	id    int64
	idx   []int32
	vals  []float32
	dense map[string][]float32
}

// sampleHoldout draws hs.rows rows uniformly from the holdout (reservoir
// sampling, Algorithm R, seeded with SampleSeed), in file order.
func sampleHoldout(spec *model.Spec, vocab *data.Vocabulary, hs *holdoutSource) (*rowSet, error) {
	opts := data.Options{Spec: spec, Vocab: vocab, Name: hs.name}
	var r data.Reader
	var err error
	if hs.hold != nil {
		r, err = hs.hold.Open(opts)
	} else {
		r, err = data.Open(hs.path, opts)
	}
	if err != nil {
		return nil, err
	}
	defer r.Close()
	rng := rand.New(rand.NewPCG(SampleSeed, uint64(hs.rows)))
	var (
		f    data.Frame
		keep []sampled
		seq  int64
	)
	for {
		n, err := r.Read(&f, 4096)
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, err
		}
		for i := 0; i < n; i++ {
			slot := len(keep)
			if slot >= hs.rows {
				j := rng.Int64N(seq + 1)
				if j >= int64(hs.rows) {
					seq++
					continue
				}
				slot = int(j)
			}
			lo, hi := f.Indptr[i], f.Indptr[i+1]
			s := sampled{seq: seq, id: f.RowIDs[i],
				idx: append([]int32(nil), f.Indices[lo:hi]...), vals: append([]float32(nil), f.Values[lo:hi]...),
				dense: map[string][]float32{}}
			for _, d := range spec.Inputs.Dense {
				s.dense[d.Name] = append([]float32(nil), f.Dense[d.Name][i*d.Size:(i+1)*d.Size]...)
			}
			if slot == len(keep) {
				keep = append(keep, s)
			} else {
				keep[slot] = s
			}
			seq++
		}
	}
	sort.Slice(keep, func(i, j int) bool { return keep[i].seq < keep[j].seq })
	set := &rowSet{name: SetHoldout, from: hs.name, total: seq, batch: emptyBatch(spec)}
	for _, s := range keep {
		appendRow(set.batch, spec, s.idx, s.vals, func(n string) []float32 { return s.dense[n] })
		set.ids = append(set.ids, s.id)
	}
	return set, nil
}
