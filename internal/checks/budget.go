package checks

import (
	"fmt"
	"math"
	"math/rand/v2"
	"runtime"
	"sort"
	"strings"
	"time"

	"modelgate/internal/artifact"
	"modelgate/internal/errkind"
	"modelgate/internal/model"
	"modelgate/internal/score"
)

// BudgetConfig holds the serving budget. Nil limits are not enforced.
type BudgetConfig struct {
	Enabled      bool
	MaxBytes     *float64 // artifact bytes (a referenced encoder included)
	MaxParams    *float64 // parameters of serving tensors
	MaxGrowth    *float64 // (bytes − baseline bytes) / baseline bytes
	MaxLoadBytes *float64 // heap bytes allocated to load and compile
	// Latency of one request: one user's sparse row through the encoder
	// once, then Candidates rows of candidate features through the scorer
	// head, on one thread, Runs times.
	Candidates int
	Runs       int
	P50ms      *float64
	P99ms      *float64
	Seed       uint64
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

// LoadAndPrepare loads and compiles a model, recording the heap bytes it
// allocated to do so (Footprint.LoadBytes).
func LoadAndPrepare(load func() (*artifact.Loaded, error)) (*score.Model, Footprint, error) {
	var before, after runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&before)
	l, err := load()
	if err != nil {
		return nil, Footprint{}, err
	}
	m, err := score.Prepare(l)
	if err != nil {
		return nil, Footprint{}, err
	}
	runtime.ReadMemStats(&after)
	f := Measure(l)
	f.LoadBytes = int64(after.TotalAlloc - before.TotalAlloc)
	return m, f, nil
}

// Budget compares a candidate's footprint and request latency with the
// policy's budget and with the baseline's footprint.
func Budget(m *score.Model, cand Footprint, base *Footprint, cfg BudgetConfig) CheckResult {
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
	var bb, bp *float64
	if base != nil {
		bb, bp = ptr(float64(base.Bytes)), ptr(float64(base.Params))
	}
	item("bytes", "bytes", float64(cand.Bytes), cfg.MaxBytes, bb)
	item("params", "count", float64(cand.Params), cfg.MaxParams, bp)
	if base != nil && base.Bytes > 0 {
		item("growth", "fraction", float64(cand.Bytes-base.Bytes)/float64(base.Bytes), cfg.MaxGrowth, nil)
	}
	var lb *float64
	if base != nil {
		lb = ptr(float64(base.LoadBytes))
	}
	item("load-memory", "bytes", float64(cand.LoadBytes), cfg.MaxLoadBytes, lb)
	if cfg.Runs > 0 {
		p50, p99, err := RequestLatency(m, cfg.Candidates, cfg.Runs, cfg.Seed)
		if err != nil {
			res.Findings = append(res.Findings, Finding{Status: StatusFail, Code: "budget.latency", Message: err.Error()})
		} else {
			item("latency-p50", "ms", p50, cfg.P50ms, nil)
			item("latency-p99", "ms", p99, cfg.P99ms, nil)
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
	}
	return fmt.Sprintf("%.0f", v)
}

// RequestLatency times one serving request on one thread, runs times:
// the user's sparse row through the encoder once, then n candidate rows
// through the scorer head with the code broadcast. For an encoder it times
// the encoder on one row. It returns p50 and p99 in milliseconds.
func RequestLatency(m *score.Model, n, runs int, seed uint64) (p50, p99 float64, err error) {
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
	defer encRunner.Close()
	times := make([]float64, 0, runs)
	if spec.Kind == model.KindEncoder {
		var out []float32
		for r := 0; r < runs; r++ {
			t0 := time.Now()
			if out, err = encRunner.Run(user, m.Net.Code(), out); err != nil {
				return 0, 0, err
			}
			times = append(times, float64(time.Since(t0).Nanoseconds())/1e6)
		}
		return percentiles(times)
	}
	head, codeLayer, err := headNet(m)
	if err != nil {
		return 0, 0, err
	}
	headRunner := head.NewRunner(1)
	defer headRunner.Close()
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
	var code, out []float32
	for r := 0; r < runs+1; r++ {
		t0 := time.Now()
		if code, err = encRunner.Run(user, codeLayer, code); err != nil {
			return 0, 0, err
		}
		for i := 0; i < n; i++ {
			copy(codes[i*width:], code)
		}
		cand.Dense[headCodeInput] = codes
		if out, err = headRunner.Run(cand, head.Output(), out); err != nil {
			return 0, 0, err
		}
		if r > 0 { // the first run warms caches and buffers
			times = append(times, float64(time.Since(t0).Nanoseconds())/1e6)
		}
	}
	return percentiles(times)
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
