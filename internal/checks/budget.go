package checks

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"runtime"
	"sort"
	"strings"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/score"
)

// BudgetConfig holds the serving budget. Nil limits are not enforced.
type BudgetConfig struct {
	Enabled      bool
	MaxBytes     *float64 // artifact bytes (a referenced encoder included)
	MaxParams    *float64 // parameters of serving tensors
	MaxGrowth    *float64 // (bytes − baseline bytes) / baseline bytes
	MaxLoadBytes *float64 // bytes allocated to load and prepare (see loadmem.go)
	// Latency of one request: one user's sparse row through the encoder
	// once, then Candidates rows of candidate features through the scorer
	// head, on one thread. Runs requests per model, split into Blocks
	// blocks that alternate candidate and baseline (see measureLatency).
	Candidates int
	Runs       int
	Blocks     int
	P50ms      *float64
	P99ms      *float64
	// MaxRatio bounds the candidate's median request time over the
	// baseline's, measured in the same blocks.
	MaxRatio *float64
	Seed     uint64
}

// LatencyDetail is how the budget's latency was measured, and the figures.
type LatencyDetail struct {
	// Clock is what was timed: "thread CPU time" (Linux) or "wall time".
	Clock        string `json:"clock"`
	Blocks       int    `json:"blocks"`
	RunsPerBlock int    `json:"runsPerBlock"`
	// Candidate and Baseline: medians over blocks of each block's p50 and
	// p99 request time. Baseline is nil on a first release.
	Candidate LatencyFigures  `json:"candidate"`
	Baseline  *LatencyFigures `json:"baseline,omitempty"`
	// Ratio is the median over blocks of candidate p50 / baseline p50.
	Ratio float64 `json:"ratio,omitempty"`
}

// LatencyFigures are one model's request times, in milliseconds.
type LatencyFigures struct {
	P50ms float64 `json:"p50Ms"`
	P99ms float64 `json:"p99Ms"`
}

// Footprint is what the budget measures of one model.
type Footprint struct {
	Bytes     int64
	Params    int64
	LoadBytes int64
}

// Measure computes a loaded model's footprint: its artifact bytes and, for
// a scorer that references its encoder, the encoder's too (serving needs
// both); parameters of every tensor that is not training state.
func Measure(l *artifact.Loaded) Footprint {
	var f Footprint
	add := func(x *artifact.Loaded) {
		a := x.Artifact
		f.Bytes += a.Desc.Size + a.Manifest.Config.Size
		for _, d := range a.Manifest.Layers {
			f.Bytes += d.Size
		}
		if x.Spec != nil {
			for _, t := range x.Spec.Tensors {
				if t.Part == "training" {
					continue
				}
				n := int64(1)
				for _, d := range t.Shape {
					n *= int64(d)
				}
				f.Params += n
			}
		}
	}
	add(l)
	if l.Encoder != nil {
		add(l.Encoder)
	}
	return f
}

// budget compares a candidate's footprint and request latency with the
// policy's budget and with the baseline's (nil on a first release).
func budget(ctx context.Context, cand, base *loadedModel, cfg BudgetConfig) CheckResult {
	res := CheckResult{Name: CheckBudget, Budget: &BudgetDetail{}}
	item := func(name, unit string, v float64, limit *float64, b *float64) {
		it := BudgetItem{Name: name, Unit: unit, Value: v, Limit: limit, Baseline: b, Status: StatusPass}
		if limit != nil && v > *limit {
			it.Status = StatusFail
			res.Findings = append(res.Findings, Finding{Status: StatusFail, Code: "budget." + name, Where: name,
				Message: fmt.Sprintf("%s is %s, over the budget of %s", name, fmtUnit(v, unit), fmtUnit(*limit, unit)), Value: ptr(v), Limit: ptr(*limit)})
		}
		res.Budget.Items = append(res.Budget.Items, it)
	}
	fail := func(code string, err error) {
		res.Findings = append(res.Findings, Finding{Status: StatusFail, Code: code, Message: err.Error()})
	}
	cf := cand.foot
	var bb, bp *float64
	if base != nil {
		bb, bp = ptr(float64(base.foot.Bytes)), ptr(float64(base.foot.Params))
	}
	item("bytes", "bytes", float64(cf.Bytes), cfg.MaxBytes, bb)
	item("params", "count", float64(cf.Params), cfg.MaxParams, bp)
	if base != nil && base.foot.Bytes > 0 {
		item("growth", "fraction", float64(cf.Bytes-base.foot.Bytes)/float64(base.foot.Bytes), cfg.MaxGrowth, nil)
	}
	if cl, err := cand.loadBytes(ctx); err != nil {
		fail("budget.load-memory", err)
	} else {
		var lb *float64
		if base != nil {
			if n, err := base.loadBytes(ctx); err == nil {
				lb = ptr(float64(n))
			}
		}
		item("load-memory", "bytes", float64(cl), cfg.MaxLoadBytes, lb)
	}
	if cfg.Runs > 0 {
		var bm *score.Model
		if base != nil {
			bm = base.model
		}
		lat, err := measureLatency(cand.model, bm, cfg)
		if err != nil {
			fail("budget.latency", err)
		} else {
			res.Budget.Latency = lat
			var b50, b99 *float64
			if lat.Baseline != nil {
				b50, b99 = ptr(lat.Baseline.P50ms), ptr(lat.Baseline.P99ms)
			}
			item("latency-p50", "ms", lat.Candidate.P50ms, cfg.P50ms, b50)
			item("latency-p99", "ms", lat.Candidate.P99ms, cfg.P99ms, b99)
			if lat.Baseline != nil {
				item("latency-ratio", "ratio", lat.Ratio, cfg.MaxRatio, nil)
			}
		}
	}
	finish(&res)
	var parts []string
	for _, it := range res.Budget.Items {
		if it.Limit != nil {
			parts = append(parts, fmt.Sprintf("%s %s/%s", it.Name, fmtUnit(it.Value, it.Unit), fmtUnit(*it.Limit, it.Unit)))
		}
	}
	res.Summary = strings.Join(parts, ", ")
	if res.Summary == "" {
		res.Summary = "no limits set"
	}
	if lat := res.Budget.Latency; lat != nil && strings.Contains(res.Summary, "latency") {
		res.Summary += fmt.Sprintf(" (latency: %s, median of %d blocks)", lat.Clock, lat.Blocks)
	}
	return res
}

func fmtUnit(v float64, unit string) string {
	switch unit {
	case "bytes":
		const k = 1024.0
		switch {
		case v >= k*k*k:
			return fmt.Sprintf("%.2f GiB", v/(k*k*k))
		case v >= k*k:
			return fmt.Sprintf("%.2f MiB", v/(k*k))
		case v >= k:
			return fmt.Sprintf("%.1f KiB", v/k)
		}
		return fmt.Sprintf("%.0f B", v)
	case "ms":
		return fmt.Sprintf("%.4g ms", v)
	case "fraction":
		return fmt.Sprintf("%+.1f%%", 100*v)
	case "ratio":
		return fmt.Sprintf("%.2f×", v)
	}
	return fmt.Sprintf("%.0f", v)
}

// measureLatency times serving requests of the candidate and, when there
// is one, the baseline, in one process on one locked thread, interleaved:
// the runs of each model are split into blocks; block b runs the
// candidate's share then the baseline's (the other way round in odd
// blocks), so a slow stretch of the machine falls on both. Each block
// gives each model a p50 and a p99; the reported figures are the medians
// over blocks (one disturbed block moves none of them), and the ratio is
// the median over blocks of candidate p50 / baseline p50. Times are the
// thread's CPU time where the platform has it (requestClock), so time
// spent waiting for a core on a busy machine is not counted.
func measureLatency(cand, base *score.Model, cfg BudgetConfig) (*LatencyDetail, error) {
	runs, blocks := cfg.Runs, cfg.Blocks
	if blocks < 1 {
		blocks = 1
	}
	if runs < blocks {
		runs = blocks
	}
	per := (runs + blocks - 1) / blocks
	clock, clockName := requestClock()
	type sut struct {
		run      func() error
		p50, p99 []float64
		times    []float64
	}
	var suts []*sut
	for _, m := range []*score.Model{cand, base} {
		if m == nil {
			continue
		}
		run, stop, err := newRequest(m, cfg.Candidates, cfg.Seed)
		if err != nil {
			return nil, err
		}
		defer stop()
		suts = append(suts, &sut{run: run, times: make([]float64, per)})
	}
	runtime.LockOSThread()
	defer runtime.UnlockOSThread()
	for _, s := range suts { // the first run warms caches and buffers
		if err := s.run(); err != nil {
			return nil, err
		}
	}
	for b := 0; b < blocks; b++ {
		for k := range suts {
			s := suts[k]
			if b%2 == 1 {
				s = suts[len(suts)-1-k]
			}
			for r := 0; r < per; r++ {
				t0 := clock()
				if err := s.run(); err != nil {
					return nil, err
				}
				s.times[r] = float64(clock()-t0) / 1e6
			}
			p50, p99, err := percentiles(s.times)
			if err != nil {
				return nil, err
			}
			s.p50, s.p99 = append(s.p50, p50), append(s.p99, p99)
		}
	}
	det := &LatencyDetail{Clock: clockName, Blocks: blocks, RunsPerBlock: per,
		Candidate: LatencyFigures{P50ms: median(suts[0].p50), P99ms: median(suts[0].p99)}}
	if len(suts) == 2 {
		b := suts[1]
		det.Baseline = &LatencyFigures{P50ms: median(b.p50), P99ms: median(b.p99)}
		ratios := make([]float64, blocks)
		for i := range ratios {
			ratios[i] = suts[0].p50[i] / math.Max(b.p50[i], 1e-9)
		}
		det.Ratio = median(ratios)
	}
	return det, nil
}

// median is the type-7 median of xs (xs is not modified).
func median(xs []float64) float64 {
	s := append([]float64(nil), xs...)
	p50, _, _ := percentiles(s)
	return p50
}

// newRequest builds one serving request of m on one thread: the user's
// sparse row through the encoder once, then n candidate rows through the
// scorer head with the code broadcast; for an encoder, the encoder on one
// row. Inputs are drawn from seed. stop releases the runners.
func newRequest(m *score.Model, n int, seed uint64) (run func() error, stop func(), err error) {
	if n < 1 {
		n = 1
	}
	spec := m.Loaded.Spec
	rng := rand.New(rand.NewPCG(seed, 0x6c6174))
	in := spec.Inputs.Sparse[0]
	user := &model.Batch{Indptr: []int32{0}, Dense: map[string][]float32{}}
	for i := 0; i < 5; i++ {
		user.Indices = append(user.Indices, int32(rng.IntN(in.Rows())))
		user.Values = append(user.Values, float32(1+rng.IntN(20)))
	}
	user.Indptr = append(user.Indptr, int32(len(user.Indices)))
	encRunner := m.Net.NewRunner(1)
	if spec.Kind == model.KindEncoder {
		var out []float32
		return func() error {
			var err error
			out, err = encRunner.Run(user, m.Net.Code(), out)
			return err
		}, encRunner.Close, nil
	}
	head, codeLayer, err := headNet(m)
	if err != nil {
		encRunner.Close()
		return nil, nil, err
	}
	headRunner := head.NewRunner(1)
	stop = func() { encRunner.Close(); headRunner.Close() }
	width := m.Net.Width(codeLayer)
	cand := &model.Batch{Indptr: make([]int32, n+1), Dense: map[string][]float32{}}
	for _, d := range head.Dense() {
		if d.Name == headCodeInput {
			continue
		}
		v := make([]float32, n*d.Size)
		for i := range v {
			v[i] = rng.Float32()
		}
		cand.Dense[d.Name] = v
	}
	// Fill the user's dense features once (the encoder path may need none).
	for _, d := range spec.Inputs.Dense {
		user.Dense[d.Name] = make([]float32, d.Size)
	}
	codes := make([]float32, n*width)
	cand.Dense[headCodeInput] = codes
	var code, out []float32
	return func() error {
		var err error
		if code, err = encRunner.Run(user, codeLayer, code); err != nil {
			return err
		}
		for i := 0; i < n; i++ {
			copy(codes[i*width:], code)
		}
		out, err = headRunner.Run(cand, head.Output(), out)
		return err
	}, stop, nil
}

func percentiles(ts []float64) (float64, float64, error) {
	if len(ts) == 0 {
		return 0, 0, errkind.New(errkind.BadInput, "no latency runs")
	}
	sort.Float64s(ts)
	q := func(p float64) float64 { // numpy's default (type 7) quantile
		h := p * float64(len(ts)-1)
		lo := math.Floor(h)
		hi := math.Min(lo+1, float64(len(ts)-1))
		return ts[int(lo)] + (h-lo)*(ts[int(hi)]-ts[int(lo)])
	}
	return q(0.5), q(0.99), nil
}

// headCodeInput names the dense input that carries the encoder's code into
// a head-only net.
const headCodeInput = "encoder_code__"

// headNet builds the scorer's head as a net of its own: the layers that do
// not compute the encoder, reading the encoder's output from a dense input.
func headNet(m *score.Model) (*model.Net, string, error) {
	spec := m.Loaded.Spec
	enc := spec.Encoder
	codeLayer := model.EncoderPrefix + enc.Output
	encLayers := map[string]bool{}
	if enc.Embedded {
		codeLayer = enc.Output
		// The encoder part: every layer the encoder output depends on.
		deps := map[string][]string{}
		for _, l := range spec.Layers {
			ins := l.Inputs
			if l.Input != "" {
				ins = []string{l.Input}
			}
			deps[l.Name] = ins
		}
		var mark func(string)
		mark = func(name string) {
			if encLayers[name] {
				return
			}
			if _, ok := deps[name]; !ok {
				return
			}
			encLayers[name] = true
			for _, d := range deps[name] {
				mark(d)
			}
		}
		mark(enc.Output)
	}
	width := m.Net.Width(codeLayer)
	if width == 0 {
		return nil, "", errkind.New(errkind.BadInput, "scorer %q: encoder output %q not found", spec.Name, codeLayer)
	}
	h := *spec
	h.Kind = model.KindEncoder
	h.Encoder, h.Training = nil, nil
	h.Code = spec.Output
	h.Inputs.Dense = append(append([]model.DenseInput(nil), spec.Inputs.Dense...), model.DenseInput{Name: headCodeInput, Size: width, Describes: model.DescribesUser})
	h.Layers = nil
	used := map[string]bool{}
	for _, l := range spec.Layers {
		if encLayers[l.Name] {
			continue
		}
		l2 := l
		l2.Inputs = append([]string(nil), l.Inputs...)
		if l2.Input == codeLayer {
			l2.Input = headCodeInput
		}
		for i, x := range l2.Inputs {
			if x == codeLayer {
				l2.Inputs[i] = headCodeInput
			}
		}
		h.Layers = append(h.Layers, l2)
		for _, t := range []string{l.Weight, l.Bias, l.TiedTo} {
			if t != "" {
				used[t] = true
			}
		}
	}
	h.Tensors = nil
	w := model.Weights{}
	for _, t := range spec.Tensors {
		if used[t.Name] {
			h.Tensors = append(h.Tensors, t)
			w[t.Name] = m.Loaded.Tensors[t.Name]
		}
	}
	net, err := model.Compile(&h, w, nil)
	if err != nil {
		return nil, "", fmt.Errorf("building the scorer head for the latency test: %w", err)
	}
	return net, codeLayer, nil
}
