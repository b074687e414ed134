package checks

import (
	"fmt"
	"math"
	"math/rand/v2"

	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/score"
)

// ContractConfig holds the contract check's thresholds.
type ContractConfig struct {
	Enabled bool
	// ProbeAbs and ProbeRel: a probe output o matches the recorded e when
	// |o − e| ≤ ProbeAbs + ProbeRel·|e|.
	ProbeAbs, ProbeRel float64
	// BatchTolerance and PermutationTolerance bound the absolute deviation
	// between a row scored alone / permuted and the reference; 0 demands
	// bit-identical outputs.
	BatchTolerance       float64
	PermutationTolerance float64
	// WeakProbesFail makes a model whose probes cannot show a value/index
	// misalignment fail instead of warn.
	WeakProbesFail bool
	// ExtraRows random rows (from Seed) join the probe rows in the
	// permutation, rotation and batch tests.
	ExtraRows int
	Seed      uint64
}

type probeRow struct {
	where    string
	idx      []int32
	vals     []float32
	dense    map[string][]float32
	distinct bool // ≥ 2 distinct (index, value) positions after mapping
}

// contract runs the input-ordering contract on sparse index/value pairs.
func contract(m *score.Model, cfg ContractConfig) CheckResult {
	res := CheckResult{Name: CheckContract, Contract: &ContractDetail{}}
	net := m.Net
	spec := m.Loaded.Spec
	out := net.Output()
	runner := net.NewRunner(1)
	defer runner.Close()
	add := func(it ContractItem, findings ...Finding) {
		res.Contract.Items = append(res.Contract.Items, it)
		res.Findings = append(res.Findings, findings...)
	}
	dense := spec.Inputs.Dense

	// (a) probes reproduce the training side's outputs.
	var rows []probeRow
	probeItem := ContractItem{Name: "probes", Status: StatusPass, Tolerance: cfg.ProbeAbs}
	var probeFindings []Finding
	if len(m.Loaded.Probes) == 0 {
		probeItem.Status = StatusWarn
		probeItem.Note = "the model carries no probe rows"
		probeFindings = append(probeFindings, Finding{Status: StatusWarn, Code: "contract.no-probes",
			Message: "no probe rows stored with the model: a vocabulary out of order with the weight rows cannot be detected"})
	}
	for i, p := range m.Loaded.Probes {
		where := fmt.Sprintf("probe %d", i+1)
		row, err := mapProbe(m, p, where)
		if err != nil {
			// A probe the model's own rules refuse (e.g. unknown ids under
			// "refuse") cannot be compared; report it.
			probeFindings = append(probeFindings, Finding{Status: StatusFail, Code: "contract.probe-refused", Where: where, Message: err.Error()})
			probeItem.Status = StatusFail
			continue
		}
		rows = append(rows, row)
		for layer, want := range p.Expect {
			if net.Width(layer) == 0 {
				probeFindings = append(probeFindings, Finding{Status: StatusWarn, Code: "contract.probe-layer", Where: where,
					Message: fmt.Sprintf("expected output for layer %q, which the model does not compute", layer)})
				continue
			}
			got, err := runner.Run(batchOf(row, dense), layer, nil)
			if err != nil {
				probeFindings = append(probeFindings, Finding{Status: StatusFail, Code: "contract.probe-refused", Where: where, Message: err.Error()})
				probeItem.Status = StatusFail
				continue
			}
			if len(got) != len(want) {
				probeFindings = append(probeFindings, Finding{Status: StatusFail, Code: "contract.probe-width", Where: where,
					Message: fmt.Sprintf("layer %q has %d outputs, the probe recorded %d", layer, len(got), len(want))})
				probeItem.Status = StatusFail
				continue
			}
			worst, worstJ := 0.0, 0
			bad := false
			for j := range got {
				d := math.Abs(float64(got[j]) - float64(want[j]))
				if d > worst {
					worst, worstJ = d, j
				}
				if d > cfg.ProbeAbs+cfg.ProbeRel*math.Abs(float64(want[j])) {
					bad = true
				}
			}
			probeItem.MaxDeviation = math.Max(probeItem.MaxDeviation, worst)
			if bad {
				probeItem.Status = StatusFail
				probeFindings = append(probeFindings, Finding{Status: StatusFail, Code: "contract.probe", Where: where + ", layer " + layer,
					Message: fmt.Sprintf("output %d is %.6g, training recorded %.6g (deviation %.3g > %.3g + %.3g·|e|): the weights, vocabulary or runtime disagree with training",
						worstJ, got[worstJ], want[worstJ], worst, cfg.ProbeAbs, cfg.ProbeRel),
					Value: ptr(worst), Limit: ptr(cfg.ProbeAbs + cfg.ProbeRel*math.Abs(float64(want[worstJ])))})
			}
		}
	}
	probeItem.Rows = len(m.Loaded.Probes)
	add(probeItem, probeFindings...)

	rng := rand.New(rand.NewPCG(cfg.Seed, 0x636f6e7472616374))
	rows = append(rows, randomRows(rng, spec, cfg.ExtraRows)...)
	ref := make([][]float32, len(rows))
	for i, r := range rows {
		o, err := runner.Run(batchOf(r, dense), out, nil)
		if err != nil {
			res.Findings = append(res.Findings, Finding{Status: StatusFail, Code: "contract.row-refused", Where: r.where, Message: err.Error()})
			continue
		}
		ref[i] = o
	}

	// (b) permuting (index, value) pairs in lockstep changes nothing.
	perm := ContractItem{Name: "permutation", Status: StatusPass, Tolerance: cfg.PermutationTolerance}
	var permF []Finding
	for i, r := range rows {
		if ref[i] == nil || len(r.idx) < 2 {
			continue
		}
		for k := 0; k < 3; k++ {
			p := rng.Perm(len(r.idx))
			q := probeRow{where: r.where, idx: make([]int32, len(p)), vals: make([]float32, len(p)), dense: r.dense}
			for j, pj := range p {
				q.idx[j], q.vals[j] = r.idx[pj], r.vals[pj]
			}
			o, err := runner.Run(batchOf(q, dense), out, nil)
			if err != nil {
				permF = append(permF, Finding{Status: StatusFail, Code: "contract.permutation", Where: r.where, Message: err.Error()})
				perm.Status = StatusFail
				break
			}
			d := maxAbsDiff(o, ref[i])
			perm.MaxDeviation = math.Max(perm.MaxDeviation, d)
			perm.Rows++
			if d > cfg.PermutationTolerance || (cfg.PermutationTolerance == 0 && !bitEqual(o, ref[i])) {
				perm.Status = StatusFail
				permF = append(permF, Finding{Status: StatusFail, Code: "contract.permutation", Where: r.where,
					Message: fmt.Sprintf("permuting the row's (index, value) pairs changed the output by %.3g", d), Value: ptr(d), Limit: ptr(cfg.PermutationTolerance)})
				break
			}
		}
	}
	add(perm, permF...)

	// (c) rotating values against indices changes the output for rows
	// with ≥ 2 distinct values: otherwise a misalignment would go unseen.
	rot := ContractItem{Name: "rotation", Status: StatusPass}
	var rotF []Finding
	distinctRows, changed := 0, 0
	binary := spec.Inputs.Sparse[0].Transform == model.TransformBinary
	for i, r := range rows {
		if ref[i] == nil || !r.distinct {
			continue
		}
		distinctRows++
		q := probeRow{where: r.where, idx: r.idx, vals: make([]float32, len(r.vals)), dense: r.dense}
		for j := range r.vals {
			q.vals[j] = r.vals[(j+1)%len(r.vals)]
		}
		o, err := runner.Run(batchOf(q, dense), out, nil)
		if err != nil {
			continue
		}
		d := maxAbsDiff(o, ref[i])
		rot.MaxDeviation = math.Max(rot.MaxDeviation, d)
		if d > 0 {
			changed++
		}
	}
	rot.Rows = distinctRows
	weakStatus := StatusWarn
	if cfg.WeakProbesFail {
		weakStatus = StatusFail
	}
	switch {
	case binary:
		rot.Status, rot.Note = StatusSkip, "binary transform: values do not reach the model, so rotation cannot change outputs"
	case distinctRows == 0:
		rot.Status, rot.Note = weakStatus, "no row has two or more distinct values"
		rotF = append(rotF, Finding{Status: weakStatus, Code: "contract.weak-probes",
			Message: "no probe row has two or more distinct values: rotating values against indices cannot reveal a misalignment; add such probe rows"})
	case changed < distinctRows:
		rot.Status = weakStatus
		rot.Note = fmt.Sprintf("%d of %d rows unchanged by rotation", distinctRows-changed, distinctRows)
		rotF = append(rotF, Finding{Status: weakStatus, Code: "contract.weak-probes",
			Message: fmt.Sprintf("rotating values against indices left %d of %d rows' outputs unchanged: those rows cannot reveal a misalignment", distinctRows-changed, distinctRows)})
	}
	add(rot, rotF...)

	// (d) a row alone equals the same row inside batches, at every
	// position and split.
	bat := ContractItem{Name: "batch", Status: StatusPass, Tolerance: cfg.BatchTolerance}
	var batF []Finding
	var valid []int
	for i := range rows {
		if ref[i] != nil {
			valid = append(valid, i)
		}
	}
	if len(valid) > 0 {
		order := append([]int(nil), valid...)
		for rep := 0; rep < 3 && len(batF) == 0; rep++ {
			rng.Shuffle(len(order), func(a, b int) { order[a], order[b] = order[b], order[a] })
			for _, split := range []int{1, 2, 3, 7, len(order)} {
				if split > len(order) {
					continue
				}
				for start := 0; start < len(order); start += split {
					end := min(start+split, len(order))
					group := make([]probeRow, 0, end-start)
					for _, i := range order[start:end] {
						group = append(group, rows[i])
					}
					o, err := runner.Run(batchOfRows(group, dense), out, nil)
					if err != nil {
						batF = append(batF, Finding{Status: StatusFail, Code: "contract.batch", Message: err.Error()})
						break
					}
					w := len(o) / len(group)
					for gi, i := range order[start:end] {
						got := o[gi*w : (gi+1)*w]
						d := maxAbsDiff(got, ref[i])
						bat.MaxDeviation = math.Max(bat.MaxDeviation, d)
						bat.Rows++
						if d > cfg.BatchTolerance || (cfg.BatchTolerance == 0 && !bitEqual(got, ref[i])) {
							bat.Status = StatusFail
							batF = append(batF, Finding{Status: StatusFail, Code: "contract.batch", Where: rows[i].where,
								Message: fmt.Sprintf("the row scored at position %d of a batch of %d differs from the row alone by %.3g", gi, len(group), d),
								Value:   ptr(d), Limit: ptr(cfg.BatchTolerance)})
						}
					}
				}
			}
		}
	}
	add(bat, batF...)

	// (e) duplicate indices and unknown ids follow the spec's rules.
	dupItem, dupF := duplicates(runner, m, dense)
	add(dupItem, dupF...)
	unkItem, unkF := unknownIDs(runner, m, dense)
	add(unkItem, unkF...)

	// (f) malformed rows are refused, not scored.
	malItem, malF := malformed(runner, m, dense)
	add(malItem, malF...)

	finish(&res)
	for _, it := range res.Contract.Items {
		if it.Status == StatusFail {
			res.Summary = fmt.Sprintf("%s failed (max deviation %.3g)", it.Name, it.MaxDeviation)
			return res
		}
	}
	res.Summary = fmt.Sprintf("%d probe rows within %.3g; permutation, batch and rule tests bit-identical", len(m.Loaded.Probes), probeItem.MaxDeviation)
	return res
}

func ptr(v float64) *float64 { return &v }

// mapProbe maps a probe's raw ids through the model's vocabulary.
func mapProbe(m *score.Model, p modeldir.Probe, where string) (probeRow, error) {
	r := probeRow{where: where, dense: p.Dense}
	for j, id := range p.Items {
		idx, keep, err := m.Vocab.Map(id)
		if err != nil {
			return r, err
		}
		if !keep {
			continue
		}
		r.idx = append(r.idx, idx)
		r.vals = append(r.vals, p.Values[j])
	}
	r.distinct = distinctPairs(r.idx, r.vals)
	return r, nil
}

// distinctPairs: at least two different indices carry different values.
func distinctPairs(idx []int32, vals []float32) bool {
	seen := map[int32]float32{}
	for j, i := range idx {
		seen[i] += vals[j]
	}
	var first float32
	n := 0
	for _, v := range seen {
		if n == 0 {
			first = v
		} else if v != first {
			return true
		}
		n++
	}
	return false
}

// randomRows draws rows over the model's vocabulary (and unknown bucket),
// with dense features in [0, 1).
func randomRows(rng *rand.Rand, spec *model.Spec, n int) []probeRow {
	in := spec.Inputs.Sparse[0]
	var out []probeRow
	for i := 0; i < n; i++ {
		k := 1 + rng.IntN(8)
		r := probeRow{where: fmt.Sprintf("random row %d", i+1), dense: map[string][]float32{}}
		used := map[int32]bool{}
		for len(r.idx) < k {
			idx := int32(rng.IntN(in.Rows()))
			if in.Duplicates == model.DuplicatesRefuse && used[idx] {
				continue
			}
			used[idx] = true
			r.idx = append(r.idx, idx)
			r.vals = append(r.vals, float32(1+rng.IntN(20)))
		}
		for _, d := range spec.Inputs.Dense {
			v := make([]float32, d.Size)
			for j := range v {
				v[j] = rng.Float32()
			}
			r.dense[d.Name] = v
		}
		r.distinct = distinctPairs(r.idx, r.vals)
		out = append(out, r)
	}
	return out
}

func batchOf(r probeRow, dense []model.DenseInput) *model.Batch {
	return batchOfRows([]probeRow{r}, dense)
}

func batchOfRows(rows []probeRow, dense []model.DenseInput) *model.Batch {
	b := &model.Batch{Indptr: []int32{0}, Dense: map[string][]float32{}}
	for _, r := range rows {
		b.Indices = append(b.Indices, r.idx...)
		b.Values = append(b.Values, r.vals...)
		b.Indptr = append(b.Indptr, int32(len(b.Indices)))
		for _, d := range dense {
			v := r.dense[d.Name]
			if len(v) != d.Size {
				v = make([]float32, d.Size)
			}
			b.Dense[d.Name] = append(b.Dense[d.Name], v...)
		}
	}
	return b
}

func maxAbsDiff(a, b []float32) float64 {
	if len(a) != len(b) {
		return math.Inf(1)
	}
	m := 0.0
	for i := range a {
		d := math.Abs(float64(a[i]) - float64(b[i]))
		if d > m || math.IsNaN(d) {
			m = d
		}
	}
	return m
}

func bitEqual(a, b []float32) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if math.Float32bits(a[i]) != math.Float32bits(b[i]) {
			return false
		}
	}
	return true
}

// duplicates checks the duplicate-index rule on a known index.
func duplicates(runner *model.Runner, m *score.Model, dense []model.DenseInput) (ContractItem, []Finding) {
	in := m.Loaded.Spec.Inputs.Sparse[0]
	out := m.Net.Output()
	it := ContractItem{Name: "duplicates", Status: StatusPass, Note: "rule " + in.Duplicates}
	idx := int32(0)
	dup := probeRow{where: "duplicate index 0", idx: []int32{idx, idx}, vals: []float32{2, 5}}
	o, err := runner.Run(batchOf(dup, dense), out, nil)
	var want probeRow
	switch in.Duplicates {
	case model.DuplicatesRefuse:
		it.Rows = 1
		if err == nil {
			it.Status = StatusFail
			return it, []Finding{{Status: StatusFail, Code: "contract.duplicates", Where: dup.where,
				Message: "the spec says duplicate indices are refused, but a row with index 0 twice was scored"}}
		}
		return it, nil
	case model.DuplicatesSum:
		want = probeRow{idx: []int32{idx}, vals: []float32{7}}
	case model.DuplicatesMax:
		want = probeRow{idx: []int32{idx}, vals: []float32{5}}
	}
	if err != nil {
		it.Status = StatusFail
		return it, []Finding{{Status: StatusFail, Code: "contract.duplicates", Where: dup.where, Message: err.Error()}}
	}
	w, err := runner.Run(batchOf(want, dense), out, nil)
	if err != nil {
		it.Status = StatusFail
		return it, []Finding{{Status: StatusFail, Code: "contract.duplicates", Message: err.Error()}}
	}
	it.Rows = 1
	it.MaxDeviation = maxAbsDiff(o, w)
	if !bitEqual(o, w) {
		it.Status = StatusFail
		return it, []Finding{{Status: StatusFail, Code: "contract.duplicates", Where: dup.where,
			Message: fmt.Sprintf("index 0 given twice (2 and 5) is not scored as the %s rule says (deviation %.3g)", in.Duplicates, it.MaxDeviation)}}
	}
	return it, nil
}

// unknownIDs checks the unknown-id rule through the vocabulary.
func unknownIDs(runner *model.Runner, m *score.Model, dense []model.DenseInput) (ContractItem, []Finding) {
	in := m.Loaded.Spec.Inputs.Sparse[0]
	out := m.Net.Output()
	it := ContractItem{Name: "unknown-ids", Status: StatusPass, Note: "rule " + in.Unknown}
	// Two well-formed ids (model.ItemIDProblem) the vocabulary lacks.
	unknown := func(base string) string {
		id := base
		for i := 1; ; i++ {
			if _, ok := m.Vocab.Lookup(id); !ok {
				return id
			}
			id = fmt.Sprintf("%s-%d", base, i)
		}
	}
	a, b := unknown("modelgate-not-in-vocabulary-a"), unknown("modelgate-not-in-vocabulary-b")
	known := m.Vocab.ID(0)
	mk := func(ids []string, vals []float32) (probeRow, error) {
		return mapProbe(m, modeldir.Probe{Items: ids, Values: vals}, "unknown-id row")
	}
	fail := func(msg string) (ContractItem, []Finding) {
		it.Status = StatusFail
		return it, []Finding{{Status: StatusFail, Code: "contract.unknown", Message: msg}}
	}
	ra, errA := mk([]string{known, a}, []float32{3, 4})
	it.Rows = 2
	switch in.Unknown {
	case model.UnknownRefuse:
		if errA == nil {
			return fail("the spec says unknown ids are refused, but a row with one was accepted")
		}
		return it, nil
	case model.UnknownDrop:
		if errA != nil {
			return fail(errA.Error())
		}
		rk, _ := mk([]string{known}, []float32{3})
		oa, err1 := runner.Run(batchOf(ra, dense), out, nil)
		ok, err2 := runner.Run(batchOf(rk, dense), out, nil)
		if err1 != nil || err2 != nil || !bitEqual(oa, ok) {
			return fail("a row with an unknown id is not scored as the same row without it (rule drop)")
		}
		return it, nil
	default: // bucket: any two unknown ids score alike, and like the bucket row.
		rb, errB := mk([]string{known, b}, []float32{3, 4})
		if errA != nil || errB != nil {
			return fail(fmt.Sprintf("unknown ids refused under rule bucket: %v %v", errA, errB))
		}
		oa, err1 := runner.Run(batchOf(ra, dense), out, nil)
		ob, err2 := runner.Run(batchOf(rb, dense), out, nil)
		direct := probeRow{idx: []int32{ra.idx[0], int32(in.VocabularySize)}, vals: []float32{3, 4}}
		od, err3 := runner.Run(batchOf(direct, dense), out, nil)
		if err1 != nil || err2 != nil || err3 != nil {
			return fail(fmt.Sprintf("scoring unknown-id rows: %v %v %v", err1, err2, err3))
		}
		it.MaxDeviation = math.Max(maxAbsDiff(oa, ob), maxAbsDiff(oa, od))
		if !bitEqual(oa, ob) || !bitEqual(oa, od) {
			return fail(fmt.Sprintf("two different unknown ids do not both score as the unknown bucket (deviation %.3g)", it.MaxDeviation))
		}
		return it, nil
	}
}

// malformed checks that rows the contract forbids are refused.
func malformed(runner *model.Runner, m *score.Model, dense []model.DenseInput) (ContractItem, []Finding) {
	in := m.Loaded.Spec.Inputs.Sparse[0]
	out := m.Net.Output()
	it := ContractItem{Name: "malformed", Status: StatusPass}
	cases := []struct {
		name string
		row  probeRow
	}{
		{"negative value", probeRow{idx: []int32{0}, vals: []float32{-1}}},
		{"NaN value", probeRow{idx: []int32{0}, vals: []float32{float32(math.NaN())}}},
		{"infinite value", probeRow{idx: []int32{0}, vals: []float32{float32(math.Inf(1))}}},
		{"index past the last weight row", probeRow{idx: []int32{int32(in.Rows())}, vals: []float32{1}}},
		{"negative index", probeRow{idx: []int32{-1}, vals: []float32{1}}},
	}
	var fs []Finding
	for _, c := range cases {
		it.Rows++
		if _, err := runner.Run(batchOf(c.row, dense), out, nil); err == nil {
			it.Status = StatusFail
			fs = append(fs, Finding{Status: StatusFail, Code: "contract.malformed", Where: c.name, Message: "a malformed row (" + c.name + ") was scored instead of refused"})
		}
	}
	return it, fs
}

// finish sets a check's status from its findings: FAIL if any finding
// fails, WARN if any warns, else PASS.
func finish(r *CheckResult) {
	r.Status = StatusPass
	for _, f := range r.Findings {
		switch f.Status {
		case StatusFail:
			r.Status = StatusFail
			return
		case StatusWarn:
			r.Status = StatusWarn
		}
	}
}
