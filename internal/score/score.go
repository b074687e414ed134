// Package score runs a stored model over a holdout and writes its outputs:
// the engine behind `modelgate score`, and the scoring step of the gate.
package score

import (
	"context"
	"errors"
	"fmt"
	"io"
	"strings"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
)

// Model is a loaded model compiled for the runtime, with its vocabulary.
type Model struct {
	Loaded *artifact.Loaded
	Net    *model.Net
	Vocab  *data.Vocabulary
}

// Prepare compiles a loaded model (and the encoder a scorer references)
// and parses its vocabulary. A model with content problems is refused.
func Prepare(l *artifact.Loaded) (*Model, error) {
	if l.OnlyEncoderMissing() {
		// Nothing is damaged: an input the scorer needs is not there.
		return nil, errkind.Wrap(errkind.BadInput, fmt.Errorf("%s@%s: %w", l.Artifact.Repository, l.Artifact.Desc.Digest, l.EncoderMissing))
	}
	if len(l.Problems) > 0 {
		return nil, errkind.New(errkind.Integrity, "%s@%s is damaged:\n  %s", l.Artifact.Repository, l.Artifact.Desc.Digest,
			strings.Join(l.Problems, "\n  "))
	}
	var enc *model.Encoder
	if l.Encoder != nil {
		enc = &model.Encoder{Spec: l.Encoder.Spec, Weights: l.Encoder.Tensors}
	}
	net, err := model.Compile(l.Spec, l.Tensors, enc)
	if err != nil {
		return nil, errkind.New(errkind.Integrity, "compiling %s: %w", l.Spec.Name, err)
	}
	var b strings.Builder
	for _, id := range l.Vocab {
		b.WriteString(id)
		b.WriteByte('\n')
	}
	vocab, err := data.ParseVocabulary(strings.NewReader(b.String()), l.Spec.Inputs.Sparse[0])
	if err != nil {
		return nil, errkind.New(errkind.Integrity, "vocabulary of %s: %w", l.Spec.Name, err)
	}
	return &Model{Loaded: l, Net: net, Vocab: vocab}, nil
}

// ReadOptions returns the holdout reader options for this model.
func (m *Model) ReadOptions(name string, requireLabels bool) data.Options {
	return data.Options{Spec: m.Loaded.Spec, Vocab: m.Vocab, RequireLabels: requireLabels, Name: name}
}

// Columns names the output columns of a layer: the layer's name when it is
// one value wide, else name_0 … name_{w-1}.
func (m *Model) Columns(layer string) []string {
	w := m.Net.Width(layer)
	if w == 1 {
		return []string{layer}
	}
	cols := make([]string, w)
	for i := range cols {
		cols[i] = fmt.Sprintf("%s_%d", layer, i)
	}
	return cols
}

// Options tune Run.
type Options struct {
	// Layer to output; default the model's output.
	Layer string
	// BatchSize rows per batch (default 4096).
	BatchSize int
	// Threads for the runtime (default 0: all cores).
	Threads int
	// Progress is called after every batch with rows done and the total
	// (-1 when unknown).
	Progress func(done, total int64)
}

// Run scores every row of r and writes the outputs to w (which it closes
// on success and aborts on failure). It returns the number of rows.
func Run(ctx context.Context, m *Model, r data.Reader, w data.PredWriter, opts Options) (int64, error) {
	layer := opts.Layer
	if layer == "" {
		layer = m.Net.Output()
	}
	if m.Net.Width(layer) == 0 {
		w.Abort()
		return 0, errkind.New(errkind.BadInput, "model %s has no layer %q (layers: %s)", m.Loaded.Spec.Name, layer, strings.Join(m.Net.Layers(), ", "))
	}
	bs := opts.BatchSize
	if bs <= 0 {
		bs = 4096
	}
	runner := m.Net.NewRunner(opts.Threads)
	defer runner.Close()
	var (
		f    data.Frame
		out  []float32
		rows int64
	)
	for {
		if err := ctx.Err(); err != nil {
			w.Abort()
			return rows, err
		}
		n, err := r.Read(&f, bs)
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			w.Abort()
			return rows, err
		}
		out, err = runner.Run(&f.Batch, layer, out)
		if err != nil {
			w.Abort()
			return rows, errkind.New(errkind.BadInput, "rows %d–%d: %w", rows+1, rows+int64(n), err)
		}
		if err := w.Write(f.RowIDs[:n], out); err != nil {
			w.Abort()
			return rows, err
		}
		rows += int64(n)
		if opts.Progress != nil {
			opts.Progress(rows, r.Rows())
		}
	}
	if err := w.Close(); err != nil {
		return rows, err
	}
	return rows, nil
}
