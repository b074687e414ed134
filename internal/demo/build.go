package demo

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strconv"
	"sync"

	"gonum.org/v1/gonum/mat"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/fit"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
)

// Names of the model directories Build writes under <dir>/models.
const (
	EncoderV1            = "listener-encoder-v1"
	EncoderV2            = "listener-encoder-v2"
	EncoderWide          = "listener-encoder-wide"
	ScorerBaseline       = "promo-scorer-baseline"
	CandBetter           = "promo-scorer-better"
	CandWorse            = "promo-scorer-worse"
	CandShuffledVocab    = "promo-scorer-shuffled-vocab"
	CandTrainableEncoder = "promo-scorer-trainable-encoder"
	CandOverBudget       = "promo-scorer-over-budget"
	// CandEncoderV2 is the better candidate's features refitted on
	// listener-encoder:v2's code: it goes to production only together
	// with that encoder.
	CandEncoderV2 = "promo-scorer-on-encoder-v2"
)

// Paths of the holdout files under dir, and the scenario file.
const (
	ScorerHoldoutPath  = "holdouts/promo-holdout.parquet"
	EncoderHoldoutPath = "holdouts/listener-holdout.parquet"
	ScenarioFile       = "scenario.json"
)

// worseRows is how many training rows the worse candidate sees.
const worseRows = 1000

// overBudgetHalf is half the hidden units of the over-budget candidate's
// head (our own choice: with the demo's 16-wide code and dense features,
// enough that the head alone is above the demo policy's 512 KiB and 131,072
// parameters).
const overBudgetHalf = 4096

// Scenario says what Build wrote and how the demo pushes and gates it.
//
// Push order: Models is already in push order — every encoder before the
// scorers that use it. A scorer's spec refers to its encoder by the
// encoder's manifest digest (ScenarioModel.Digest of the model named by
// ScenarioModel.Encoder). A model's manifest is a pure function of its
// directory (artifact.ModelManifest), so Build computes the digests itself
// and writes them into the scorers' specs: the pusher patches nothing, it
// must only push the encoders first, since a push checks that a scorer's
// encoder is in the store.
type Scenario struct {
	// Dir is the directory Build wrote; every path below is relative to it.
	Dir      string            `json:"-"`
	Models   []ScenarioModel   `json:"models"`
	Holdouts []ScenarioHoldout `json:"holdouts"`
	// Prod maps each production tag to the Name of the model it must point
	// at before any gate runs: promo-scorer:prod is the baseline scorer,
	// listener-encoder:prod the first encoder.
	Prod map[string]string `json:"prod"`
	// Network summarises the generated data.
	Network NetworkFacts `json:"network"`
}

// ScenarioModel is one model directory of the scenario.
type ScenarioModel struct {
	// Name is the directory's name under models/; Path its relative path.
	Name string `json:"name"`
	Path string `json:"path"`
	Kind string `json:"kind"`
	// Tag is the tag to push it under (repository:tag).
	Tag string `json:"tag"`
	// Digest is the manifest digest pushing Path gives.
	Digest string `json:"digest"`
	// Encoder names (by Name) the encoder a scorer uses; its spec's
	// encoder.digest is that encoder's Digest.
	Encoder string `json:"encoder,omitempty"`
	// Role is "encoder", "baseline" or "candidate".
	Role string `json:"role"`
	// Fails names the gate check the model is built to fail ("holdout",
	// "contract", "freeze", "budget"), or is empty for a model built to pass.
	Fails string `json:"fails,omitempty"`
	// Why says in a line what the model is.
	Why string `json:"why"`
	// HoldoutLogLoss (scorers) is the mean log loss on the scorer holdout
	// by the training side's float64 forward pass, mapping ids with the
	// model's own vocabulary.
	HoldoutLogLoss float64 `json:"holdoutLogLoss,omitempty"`
	// ReconstructionError (encoders) is the mean over the encoder holdout's
	// rows of the squared error of the reconstruction summed over all
	// vocabulary columns and the unknown bucket (log1p space).
	ReconstructionError float64 `json:"reconstructionError,omitempty"`
	// TensorBytes is the size of the model's own safetensors files.
	TensorBytes int64 `json:"tensorBytes"`
	// ServedBytes is what serving the model loads: TensorBytes plus, for a
	// scorer that refers to its encoder, the encoder's TensorBytes less its
	// decoder file.
	ServedBytes int64 `json:"servedBytes"`
}

// ScenarioHoldout is one holdout file.
type ScenarioHoldout struct {
	Path string `json:"path"`
	Tag  string `json:"tag"`
	// For is "scorer" (labelled, with every scorer's dense inputs) or
	// "encoder" (sparse input only, no labels).
	For  string `json:"for"`
	Rows int    `json:"rows"`
}

// NetworkFacts are summary figures of the generated network.
type NetworkFacts struct {
	Shows            int `json:"shows"`
	VocabularySize   int `json:"vocabularySize"`
	TrainListeners   int `json:"trainListeners"`
	HoldoutListeners int `json:"holdoutListeners"`
	// MeanNonzerosRegular is the mean number of shows per training
	// listener, anomalous listeners left out.
	MeanNonzerosRegular float64 `json:"meanNonzerosRegular"`
	AnomalousTrain      int     `json:"anomalousTrain"`
	PositiveRate        float64 `json:"positiveRate"`
}

// Build generates the network of cfg and writes under dir (which must be
// missing or empty): the model directories in models/, the holdout files
// in holdouts/, and scenario.json (the returned Scenario). progress, when
// not nil, receives a line per step. The same cfg gives byte-identical
// files.
func Build(dir string, cfg Config, progress func(string)) (*Scenario, error) {
	say := func(format string, args ...any) {
		if progress != nil {
			progress(fmt.Sprintf(format, args...))
		}
	}
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	if ents, err := os.ReadDir(dir); err == nil && len(ents) > 0 {
		return nil, errkind.New(errkind.BadInput, "demo directory %s is not empty", dir)
	} else if err != nil && !errors.Is(err, os.ErrNotExist) {
		return nil, fmt.Errorf("reading demo directory: %w", err)
	}
	b := &builder{dir: dir, say: say, sc: &Scenario{Dir: dir, Prod: map[string]string{}}}
	if err := b.run(cfg); err != nil {
		return nil, err
	}
	return b.sc, nil
}

type builder struct {
	dir string
	say func(string, ...any)
	sc  *Scenario

	d        *Data
	vocab    []string
	vocabIdx map[int]int // show index → weight row
	models   map[string]*modeldir.Model
	digests  map[string]string
	probes   []probeRow
}

func (b *builder) run(cfg Config) error {
	b.say("generating the podcast network (%d shows, %d+%d+%d listeners)", cfg.Shows, cfg.Train, cfg.Holdout, cfg.Extra)
	b.d = Generate(cfg)
	d := b.d
	b.models = map[string]*modeldir.Model{}
	b.digests = map[string]string{}
	b.vocabulary()
	if len(b.vocab) < cfg.WideCodeWidth {
		return errkind.New(errkind.BadInput, "demo config: the vocabulary has %d shows, fewer than the wide code width %d", len(b.vocab), cfg.WideCodeWidth)
	}
	b.probes = probeRows(d, b.vocab, b.vocabIdx)
	b.sc.Network = networkFacts(d, len(b.vocab))

	b.say("fitting encoders: PCA of %d×%d and %d×%d", len(d.Train), len(b.vocab), len(d.Train)+len(d.Extra), len(b.vocab))
	var wide, v2 *fit.PCA
	var errWide, errV2 error
	var wg sync.WaitGroup
	wg.Add(2)
	go func() { defer wg.Done(); wide, errWide = fit.FitPCA(b.sparse(d.Train), cfg.WideCodeWidth) }()
	go func() {
		defer wg.Done()
		v2, errV2 = fit.FitPCA(b.sparse(append(append([]Listener{}, d.Train...), d.Extra...)), cfg.CodeWidth)
	}()
	wg.Wait()
	if err := errors.Join(errWide, errV2); err != nil {
		return fmt.Errorf("fitting encoders: %w", err)
	}
	v1, err := wide.Truncate(cfg.CodeWidth)
	if err != nil {
		return err
	}
	trainDigest := datasetDigest(d, d.Train)
	encoders := []struct {
		name, tag, why, created, data string
		p                             *fit.PCA
		rows                          int
		sets                          [][]Listener
	}{
		{EncoderV1, "listener-encoder:v1", fmt.Sprintf("PCA of listening history, %d-wide code, fitted on the training listeners", cfg.CodeWidth), "2026-02-01T09:00:00Z", trainDigest, v1, len(d.Train), [][]Listener{d.Train}},
		{EncoderV2, "listener-encoder:v2", "the same PCA refitted on the training listeners plus a later sample of the network", "2026-03-01T09:00:00Z", datasetDigest(d, d.Train, d.Extra), v2, len(d.Train) + len(d.Extra), [][]Listener{d.Train, d.Extra}},
		{EncoderWide, "listener-encoder:wide", fmt.Sprintf("PCA with a %d-wide code: an encoder over the encoder budget", cfg.WideCodeWidth), "2026-03-01T10:00:00Z", trainDigest, wide, len(d.Train), [][]Listener{d.Train}},
	}
	for _, e := range encoders {
		stats := map[string]any{
			"rows":                   e.rows,
			"nonzerosPerRow":         nonzeroStats(e.sets...),
			"explainedVariance":      e.p.ExplainedVariance,
			"totalVariance":          e.p.TotalVariance,
			"explainedVarianceRatio": sum(e.p.ExplainedVariance) / e.p.TotalVariance,
		}
		m := encoderModel(e.name, "Listener encoder of a fictional podcast network: "+e.why+".", e.p, b.vocab, stats,
			model.Lineage{TrainingData: e.data, SourceRepository: sourceRepository, SourceCommit: commitOf(e.name),
				CreatedBy: "modelgate demo (internal/demo)", Created: e.created})
		if err := b.probesFor(m, nil, []string{lCode, lRecon}); err != nil {
			return err
		}
		if err := b.write(m, e.name); err != nil {
			return err
		}
		sm := ScenarioModel{Name: e.name, Kind: model.KindEncoder, Tag: e.tag, Role: "encoder", Why: e.why}
		switch e.name {
		case EncoderV1:
			sm.Role = "baseline"
			b.sc.Prod["listener-encoder:prod"] = e.name
		case EncoderV2:
			sm.Role = "candidate"
		}
		if e.name != EncoderWide {
			sm.ReconstructionError, err = b.reconstructionError(m)
			if err != nil {
				return err
			}
		}
		b.add(sm)
	}

	b.say("fitting scorers (logistic regression by Newton's method)")
	codes, err := b.codes(b.models[EncoderV1], d.Train)
	if err != nil {
		return err
	}
	baseDense := []string{InputListener, InputShow}
	betterDense := []string{InputListener, InputShow, InputAffinity}
	base, err := b.logistic(d.Train, codes, baseDense)
	if err != nil {
		return fmt.Errorf("fitting the baseline scorer: %w", err)
	}
	better, err := b.logistic(d.Train, codes, betterDense)
	if err != nil {
		return fmt.Errorf("fitting the better candidate: %w", err)
	}
	worse, err := b.logistic(d.Train[:worseRows], codes[:worseRows], nil)
	if err != nil {
		return fmt.Errorf("fitting the worse candidate: %w", err)
	}
	v2Codes, err := b.codes(b.models[EncoderV2], d.Train)
	if err != nil {
		return err
	}
	onV2, err := b.logistic(d.Train, v2Codes, betterDense)
	if err != nil {
		return fmt.Errorf("fitting the scorer on encoder v2's code: %w", err)
	}

	ref := func(enc string) model.EncoderRef {
		tag := map[string]string{EncoderV1: "listener-encoder:v1", EncoderV2: "listener-encoder:v2", EncoderWide: "listener-encoder:wide"}[enc]
		return model.EncoderRef{Name: tag, Digest: b.digests[enc], Embedded: false, Output: lCode}
	}
	lin := func(name, created string, sets ...[]Listener) model.Lineage {
		return model.Lineage{TrainingData: datasetDigest(d, sets...), SourceRepository: sourceRepository,
			SourceCommit: commitOf(name), CreatedBy: "modelgate demo (internal/demo)", Created: created}
	}
	scorerStats := func(sets ...[]Listener) map[string]any {
		n, pos := 0, 0.0
		for _, s := range sets {
			for i := range s {
				n++
				pos += s[i].Label
			}
		}
		return map[string]any{"rows": n, "positiveRate": pos / float64(n), "nonzerosPerRow": nonzeroStats(sets...)}
	}
	const what = "P(listener subscribes to the promoted show) of a fictional podcast network: "
	type scorer struct {
		name, tag, enc, role, fails, why string
		m                                *modeldir.Model
	}
	baseModel := scorerModel(ScorerBaseline, what+"logistic regression on the listener code and listener and show features.",
		b.vocab, baseDense, base.head, base.intercept, ref(EncoderV1), nil, scorerStats(d.Train), lin(ScorerBaseline, "2026-02-02T09:00:00Z", d.Train))
	shuffled := scorerModel(CandShuffledVocab, what+"the baseline's weights with a vocabulary file in another order.",
		b.shuffledVocabulary(), baseDense, base.head, base.intercept, ref(EncoderV1), nil, scorerStats(d.Train), lin(CandShuffledVocab, "2026-03-02T09:00:00Z", d.Train))
	// The candidates built to fail the freeze and the budget check are the
	// better candidate's function, so that they fail that check alone.
	trainable := scorerModel(CandTrainableEncoder, what+"the better candidate exported with its encoder embedded and still trainable.",
		b.vocab, betterDense, better.head, better.intercept, model.EncoderRef{Name: "listener-encoder:v1", Digest: b.digests[EncoderV1], Embedded: true, Output: lCode},
		b.models[EncoderV1], scorerStats(d.Train), lin(CandTrainableEncoder, "2026-03-02T10:00:00Z", d.Train))
	if err := b.attachTraining(trainable, better); err != nil {
		return err
	}
	overBudget := scorerModel(CandOverBudget, what+fmt.Sprintf("the better candidate re-expressed through a %s-unit hidden ReLU layer: the same predictions, many times the size and cost.", thousands(2*overBudgetHalf)),
		b.vocab, betterDense, better.head, better.intercept, ref(EncoderV1), nil, scorerStats(d.Train), lin(CandOverBudget, "2026-03-02T13:00:00Z", d.Train))
	widenHead(overBudget, overBudgetHalf)
	scorers := []scorer{
		{ScorerBaseline, "promo-scorer:baseline", EncoderV1, "baseline", "", fmt.Sprintf("logistic regression on the %d-wide code plus listener and show features", cfg.CodeWidth), baseModel},
		{CandBetter, "promo-scorer:cand-better", EncoderV1, "candidate", "", "adds the listener's affinity to the promoted show's category",
			scorerModel(CandBetter, what+"the baseline plus the listener's affinity to the promoted show's category.",
				b.vocab, betterDense, better.head, better.intercept, ref(EncoderV1), nil, scorerStats(d.Train), lin(CandBetter, "2026-03-02T11:00:00Z", d.Train))},
		{CandWorse, "promo-scorer:cand-worse", EncoderV1, "candidate", "holdout", fmt.Sprintf("fitted on %d listeners, on the code alone", worseRows),
			scorerModel(CandWorse, what+"fitted on a small sample, without listener or show features.",
				b.vocab, nil, worse.head, worse.intercept, ref(EncoderV1), nil, scorerStats(d.Train[:worseRows]), lin(CandWorse, "2026-03-02T12:00:00Z", d.Train[:worseRows]))},
		{CandShuffledVocab, "promo-scorer:cand-shuffled-vocab", EncoderV1, "candidate", "contract", "the baseline with its vocabulary file shuffled: ids no longer match weight rows", shuffled},
		{CandTrainableEncoder, "promo-scorer:cand-trainable-encoder", EncoderV1, "candidate", "freeze", "the better candidate with the encoder embedded as trainable variables, an Adam slot and an l2 term", trainable},
		{CandOverBudget, "promo-scorer:cand-over-budget", EncoderV1, "candidate", "budget", fmt.Sprintf("the better candidate through a %s-unit hidden layer that computes the same function: many times larger and slower", thousands(2*overBudgetHalf)), overBudget},
		{CandEncoderV2, "promo-scorer:cand-encoder-v2", EncoderV2, "candidate", "", "the better candidate's features refitted on listener-encoder:v2's code: released together with that encoder",
			scorerModel(CandEncoderV2, what+"the better candidate's features, refitted on the code of listener-encoder:v2.",
				b.vocab, betterDense, onV2.head, onV2.intercept, ref(EncoderV2), nil, scorerStats(d.Train), lin(CandEncoderV2, "2026-03-03T09:00:00Z", d.Train))},
	}
	for _, s := range scorers {
		enc := b.models[s.enc]
		expect := []string{model.EncoderPrefix + lCode, lP}
		if s.m.Spec.Encoder.Embedded {
			expect, enc = []string{lCode, lP}, nil
		}
		if s.name == CandShuffledVocab {
			// The probes keep the true mapping: the baseline's, computed
			// first. The gate, mapping ids with this model's vocabulary,
			// computes something else.
			s.m.Probes = baseModel.Probes
		} else if err := b.probesFor(s.m, enc, expect); err != nil {
			return err
		}
		if err := b.write(s.m, s.name); err != nil {
			return err
		}
		ll, err := b.holdoutLogLoss(s.m, enc)
		if err != nil {
			return err
		}
		b.add(ScenarioModel{Name: s.name, Kind: model.KindScorer, Tag: s.tag, Encoder: s.enc, Role: s.role, Fails: s.fails, Why: s.why, HoldoutLogLoss: ll})
	}
	b.sc.Prod["promo-scorer:prod"] = ScorerBaseline

	b.say("writing holdouts (%d rows)", len(d.Holdout))
	if err := b.writeHoldouts(); err != nil {
		return err
	}
	raw, err := json.MarshalIndent(b.sc, "", "  ")
	if err != nil {
		return err
	}
	return writeFile(filepath.Join(b.dir, ScenarioFile), append(raw, '\n'))
}

// thousands writes n with comma thousands separators (8,192).
func thousands(n int) string {
	s := strconv.Itoa(n)
	for i := len(s) - 3; i > 0; i -= 3 {
		s = s[:i] + "," + s[i:]
	}
	return s
}

func sum(x []float64) float64 {
	s := 0.0
	for _, v := range x {
		s += v
	}
	return s
}

func writeFile(path string, b []byte) error {
	if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
		return err
	}
	return os.WriteFile(path, b, 0o644)
}

// vocabulary keeps the shows played by at least VocabularyMinListeners
// regular training listeners, in catalogue order.
func (b *builder) vocabulary() {
	d := b.d
	count := make([]int, len(d.Shows))
	for i := range d.Train {
		l := &d.Train[i]
		if len(l.Items) > RegularMaxNonzeros {
			continue
		}
		for _, j := range l.Items {
			count[j]++
		}
	}
	b.vocabIdx = map[int]int{}
	for j, c := range count {
		if c >= d.Config.VocabularyMinListeners {
			b.vocabIdx[j] = len(b.vocab)
			b.vocab = append(b.vocab, d.Shows[j].ID)
		}
	}
}

// sparse is the log1p activity matrix of ls over the vocabulary (shows
// outside it are left out: their weight row, the unknown bucket, is zero).
func (b *builder) sparse(ls []Listener) *fit.Sparse {
	x := &fit.Sparse{Rows: len(ls), Cols: len(b.vocab), Indptr: []int{0}}
	for i := range ls {
		for k, j := range ls[i].Items {
			if r, ok := b.vocabIdx[j]; ok {
				x.Indices = append(x.Indices, r)
				x.Values = append(x.Values, math.Log1p(ls[i].Counts[k]))
			}
		}
		x.Indptr = append(x.Indptr, len(x.Indices))
	}
	return x
}

// row renders a listener's history as raw ids and values.
func (b *builder) row(l *Listener) ([]string, []float32) { return historyRow(b.d, l) }

// codes runs the encoder's code layer (float64 over its stored weights) on
// every listener.
func (b *builder) codes(enc *modeldir.Model, ls []Listener) ([][]float64, error) {
	n, err := newNet64(enc, nil)
	if err != nil {
		return nil, err
	}
	out := make([][]float64, len(ls))
	for i := range ls {
		items, vals := b.row(&ls[i])
		r, err := n.eval(items, vals, nil, lCode)
		if err != nil {
			return nil, err
		}
		out[i] = r[lCode]
	}
	return out, nil
}

// denseFor returns the dense inputs of l, by name.
func denseFor(d *Data, l *Listener) map[string][]float32 {
	return map[string][]float32{
		InputListener: ListenerFeatures(l),
		InputShow:     ShowFeatures(&d.Shows[l.Promo]),
		InputAffinity: AffinityFeature(d, l),
	}
}

type fitted struct {
	head      []float32
	intercept float32
	logLoss   float64
}

// refColumn is the column of the show input left out of the fit: the
// category one-hot sums to one, collinear with the intercept, so the first
// category is the reference and gets weight 0.
const refColumn = 2

// logistic fits P(label) on [code, dense inputs…] and returns the head
// weights in concatenation order.
func (b *builder) logistic(ls []Listener, codes [][]float64, dense []string) (*fitted, error) {
	var width int
	if len(codes) > 0 {
		width = len(codes[0])
	}
	for _, name := range dense {
		width += denseInput(name).Size
	}
	cols := width
	if contains(dense, InputShow) {
		cols--
	}
	x := mat.NewDense(len(ls), cols, nil)
	y := make([]float64, len(ls))
	for i := range ls {
		row := x.RawRowView(i)[:0]
		row = append(row, codes[i]...)
		f := denseFor(b.d, &ls[i])
		for _, name := range dense {
			for c, v := range f[name] {
				if name == InputShow && c == refColumn {
					continue
				}
				row = append(row, float64(v))
			}
		}
		y[i] = ls[i].Label
	}
	m, err := fit.Logistic(x, y, nil, nil)
	if err != nil {
		return nil, err
	}
	head := make([]float32, 0, width)
	k := 0
	if len(codes) > 0 {
		for range codes[0] {
			head = append(head, float32(m.Coef[k]))
			k++
		}
	}
	for _, name := range dense {
		for c := 0; c < denseInput(name).Size; c++ {
			if name == InputShow && c == refColumn {
				head = append(head, 0)
				continue
			}
			head = append(head, float32(m.Coef[k]))
			k++
		}
	}
	return &fitted{head: head, intercept: float32(m.Intercept), logLoss: m.LogLoss}, nil
}

func contains(xs []string, s string) bool {
	for _, x := range xs {
		if x == s {
			return true
		}
	}
	return false
}

// shuffledVocabulary is the vocabulary in a seeded random order.
func (b *builder) shuffledVocabulary() []string {
	r := rand.New(rand.NewPCG(b.d.Config.Seed, 99))
	out := make([]string, len(b.vocab))
	for i, j := range r.Perm(len(b.vocab)) {
		out[i] = b.vocab[j]
	}
	return out
}

// attachTraining turns an embedded-encoder scorer into one an exporter
// left mid-training: the encoder tensors trainable, an l2 penalty on the
// encoder weight, and Adam's first-moment slot for it, computed for real as
// the moving average (β1 = 0.9) of the log-loss gradient over ten
// minibatches of 256 training listeners.
func (b *builder) attachTraining(m *modeldir.Model, head *fitted) error {
	for i := range m.Spec.Tensors {
		if m.Spec.Tensors[i].Part == "encoder" {
			m.Spec.Tensors[i].Trainable = true
		}
	}
	in := m.Spec.Inputs.Sparse[0]
	k := b.d.Config.CodeWidth
	n, err := newNet64(m, nil)
	if err != nil {
		return err
	}
	grad := make([]float64, in.Rows()*k)
	mom := make([]float64, in.Rows()*k)
	const batches, batch = 10, 256
	for t := 0; t < batches; t++ {
		for i := range grad {
			grad[i] = 0
		}
		for i := t * batch; i < (t+1)*batch; i++ {
			l := &b.d.Train[i]
			items, vals := b.row(l)
			out, err := n.eval(items, vals, denseFor(b.d, l), lP)
			if err != nil {
				return err
			}
			resid := out[lP][0] - l.Label
			x, err := n.canonical(items, vals)
			if err != nil {
				return err
			}
			for _, p := range x {
				for c := 0; c < k; c++ {
					grad[p.row*k+c] += resid * p.v * float64(head.head[c]) / batch
				}
			}
		}
		for i := range mom {
			mom[i] = 0.9*mom[i] + 0.1*grad[i]
		}
	}
	m.Tensors[tAdamM] = to32(mom)
	m.Spec.Tensors = append(m.Spec.Tensors, model.Tensor{Name: tAdamM, File: trainFile, Shape: []int{in.Rows(), k}, DType: "F32", Part: "training"})
	m.Spec.Training = &model.TrainingState{
		Regularization: []model.Regularizer{{Tensor: tEncW, Type: "l2", Weight: 1e-5}},
		OptimizerSlots: []model.OptimizerSlot{{Tensor: tAdamM, Of: tEncW, Slot: "m"}},
	}
	return nil
}

// write writes m under models/name, records its digest and size.
func (b *builder) write(m *modeldir.Model, name string) error {
	path := filepath.Join(b.dir, "models", name)
	if err := modeldir.Write(path, m); err != nil {
		return fmt.Errorf("writing model %s: %w", name, err)
	}
	dir, err := modeldir.Check(path)
	if err != nil {
		return err
	}
	defer dir.Close()
	_, dg, err := artifact.ModelManifest(dir)
	if err != nil {
		return fmt.Errorf("computing the manifest of %s: %w", name, err)
	}
	b.models[name] = m
	b.digests[name] = dg.String()
	return nil
}

// fileBytes sums the sizes of a written model's safetensors files, except skip.
func (b *builder) fileBytes(name, skip string) int64 {
	var n int64
	for _, f := range modeldir.TensorFileNames(b.models[name].Spec) {
		if f == skip {
			continue
		}
		if st, err := os.Stat(filepath.Join(b.dir, "models", name, f)); err == nil {
			n += st.Size()
		}
	}
	return n
}

func (b *builder) add(sm ScenarioModel) {
	sm.Path = filepath.ToSlash(filepath.Join("models", sm.Name))
	sm.Digest = b.digests[sm.Name]
	sm.TensorBytes = b.fileBytes(sm.Name, "")
	sm.ServedBytes = sm.TensorBytes
	if enc := b.models[sm.Name].Spec.Encoder; enc != nil && !enc.Embedded {
		sm.ServedBytes += b.fileBytes(sm.Encoder, decoderFile)
	}
	b.sc.Models = append(b.sc.Models, sm)
}

// holdoutLogLoss is the mean log loss of m on the holdout listeners.
func (b *builder) holdoutLogLoss(m, enc *modeldir.Model) (float64, error) {
	n, err := newNet64(m, enc)
	if err != nil {
		return 0, err
	}
	total := 0.0
	for i := range b.d.Holdout {
		l := &b.d.Holdout[i]
		items, vals := b.row(l)
		out, err := n.eval(items, vals, denseFor(b.d, l), lP)
		if err != nil {
			return 0, err
		}
		total += logLoss(l.Label, out[lP][0])
	}
	return total / float64(len(b.d.Holdout)), nil
}

// logLoss is −(y log p + (1−y) log(1−p)) with p clipped to [1e-15, 1−1e-15].
func logLoss(y, p float64) float64 {
	p = math.Min(math.Max(p, 1e-15), 1-1e-15)
	return -(y*math.Log(p) + (1-y)*math.Log(1-p))
}

// reconstructionError is the mean over holdout rows of the summed squared
// reconstruction error over all weight rows (log1p space).
func (b *builder) reconstructionError(m *modeldir.Model) (float64, error) {
	n, err := newNet64(m, nil)
	if err != nil {
		return 0, err
	}
	total := 0.0
	for i := range b.d.Holdout {
		items, vals := b.row(&b.d.Holdout[i])
		out, err := n.eval(items, vals, nil, lRecon)
		if err != nil {
			return 0, err
		}
		x, err := n.canonical(items, vals)
		if err != nil {
			return 0, err
		}
		rec := out[lRecon]
		target := make(map[int]float64, len(x))
		for _, p := range x {
			target[p.row] = p.v
		}
		for r, v := range rec {
			e := v - target[r]
			total += e * e
		}
	}
	return total / float64(len(b.d.Holdout)), nil
}

func (b *builder) writeHoldouts() error {
	d := b.d
	scorer := data.HoldoutLayout{Dense: denseInputs, Weights: true, Slices: true}
	encoder := data.HoldoutLayout{NoLabels: true, Slices: true}
	for _, h := range []struct {
		path, tag, kind string
		layout          data.HoldoutLayout
	}{
		{ScorerHoldoutPath, "promo-holdout:v1", model.KindScorer, scorer},
		{EncoderHoldoutPath, "listener-holdout:v1", model.KindEncoder, encoder},
	} {
		path := filepath.Join(b.dir, h.path)
		if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
			return err
		}
		w, err := data.CreateHoldout(path, h.layout)
		if err != nil {
			return err
		}
		rows := make([]data.HoldoutRow, len(d.Holdout))
		for i := range d.Holdout {
			l := &d.Holdout[i]
			items, vals := b.row(l)
			rows[i] = data.HoldoutRow{RowID: int64(i), Items: items, Values: vals, Slice: l.Cohort}
			if h.kind == model.KindScorer {
				rows[i].Dense, rows[i].Label, rows[i].Weight = denseFor(d, l), float32(l.Label), 1
			}
		}
		if err := w.Write(rows...); err != nil {
			w.Abort()
			return fmt.Errorf("writing %s: %w", h.path, err)
		}
		if err := w.Close(); err != nil {
			return fmt.Errorf("writing %s: %w", h.path, err)
		}
		b.sc.Holdouts = append(b.sc.Holdouts, ScenarioHoldout{Path: h.path, Tag: h.tag, For: h.kind, Rows: len(rows)})
	}
	return nil
}

func networkFacts(d *Data, vocab int) NetworkFacts {
	f := NetworkFacts{Shows: len(d.Shows), VocabularySize: vocab, TrainListeners: len(d.Train), HoldoutListeners: len(d.Holdout)}
	n, nnz, pos := 0, 0, 0.0
	for i := range d.Train {
		l := &d.Train[i]
		pos += l.Label
		if l.Anomalous {
			f.AnomalousTrain++
			continue
		}
		n++
		nnz += len(l.Items)
	}
	f.MeanNonzerosRegular = float64(nnz) / float64(n)
	f.PositiveRate = pos / float64(len(d.Train))
	return f
}
