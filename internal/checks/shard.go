package checks

import (
	"encoding/binary"
	"encoding/json"
	"fmt"
	"math"
	"sort"

	"github.com/modelgate/modelgate/internal/checks/stats"
	"github.com/modelgate/modelgate/internal/errkind"
)

// holdoutState is the holdout check's mergeable sufficient statistics:
// per-slice metric accumulators, the paired differences with their
// bootstrap replicate sums, the histogram of differences, a few encoder
// examples. Merging the states of shards gives the state of one run
// (sums equal up to float64 summation order; replicate draws depend only
// on the row id, so they are identical).
type holdoutState struct {
	Kind        string
	HasBaseline bool
	Seed        uint64
	Replicas    int
	Rows        int64
	All         *sliceAcc
	Slices      map[string]*sliceAcc
	Diff        *stats.Histogram
	Examples    []ReconstructionExample
	Findings    []Finding
	// ClusterColumn groups rows for a cluster-robust test ("" for none);
	// Tail holds the label-free confident-mistake statistics (scorers with
	// a baseline; nil otherwise); Repeats the hashes of rows' content.
	ClusterColumn string
	Tail          *stats.Tail
	Repeats       *repeats
	// Anomaly and Lower are the slicing thresholds used (for merging, they
	// must agree across shards).
	Anomaly float64
	Lower   string
	// Weights says where the thresholds came from (must agree too).
	Weights RowWeights
	// Read, Forward and Stats are seconds spent reading the holdout,
	// running the two models, and accumulating statistics.
	Read, Forward, Stats float64
}

// merge adds o's rows into s.
func (s *holdoutState) merge(o *holdoutState) error {
	sw, ow := s.Weights, o.Weights
	sw.HoldoutWeights, ow.HoldoutWeights = false, false
	sj, _ := json.Marshal(sw)
	oj, _ := json.Marshal(ow)
	if s.Kind != o.Kind || s.HasBaseline != o.HasBaseline || s.Seed != o.Seed || s.Replicas != o.Replicas || s.Lower != o.Lower ||
		s.ClusterColumn != o.ClusterColumn || (s.Tail == nil) != (o.Tail == nil) || (s.Repeats == nil) != (o.Repeats == nil) ||
		!(s.Anomaly == o.Anomaly || (math.IsInf(s.Anomaly, 1) && math.IsInf(o.Anomaly, 1))) || string(sj) != string(oj) {
		return errkind.New(errkind.BadInput, "shard results were made with different settings and cannot be merged")
	}
	s.Weights.HoldoutWeights = s.Weights.HoldoutWeights || o.Weights.HoldoutWeights
	if err := s.All.merge(o.All); err != nil {
		return err
	}
	if s.Tail != nil {
		if err := s.Tail.Merge(o.Tail); err != nil {
			return err
		}
	}
	if err := s.Repeats.merge(o.Repeats); err != nil {
		return err
	}
	for name, a := range o.Slices {
		mine, ok := s.Slices[name]
		if !ok {
			s.Slices[name] = a
			continue
		}
		if err := mine.merge(a); err != nil {
			return err
		}
	}
	if s.Diff != nil && o.Diff != nil {
		if err := s.Diff.Merge(o.Diff); err != nil {
			return err
		}
	}
	s.Rows += o.Rows
	s.Read, s.Forward, s.Stats = s.Read+o.Read, s.Forward+o.Forward, s.Stats+o.Stats
	for _, e := range o.Examples {
		if len(s.Examples) < 4 {
			s.Examples = append(s.Examples, e)
		}
	}
	seen := map[string]bool{}
	for _, f := range s.Findings {
		seen[f.Code+f.Message] = true
	}
	for _, f := range o.Findings {
		if !seen[f.Code+f.Message] {
			s.Findings = append(s.Findings, f)
		}
	}
	return nil
}

func (a *sliceAcc) merge(o *sliceAcc) error {
	if a.cand != nil && o.cand != nil {
		a.cand.Merge(o.cand)
	}
	if a.base != nil && o.base != nil {
		a.base.Merge(o.base)
	}
	if a.rc != nil && o.rc != nil {
		if err := a.rc.Merge(o.rc); err != nil {
			return err
		}
	}
	if a.rb != nil && o.rb != nil {
		if err := a.rb.Merge(o.rb); err != nil {
			return err
		}
	}
	a.plain.merge(&o.plain)
	return a.paired.Merge(o.paired)
}

// wireAcc is a sliceAcc in JSON: each accumulator in its binary encoding.
type wireAcc struct {
	Name   string     `json:"name"`
	Cand   []byte     `json:"cand,omitempty"`
	Base   []byte     `json:"base,omitempty"`
	RC     []byte     `json:"rc,omitempty"`
	RB     []byte     `json:"rb,omitempty"`
	Paired []byte     `json:"paired"`
	Plain  *plainLoss `json:"plain,omitempty"`
}

type wireState struct {
	Kind        string                  `json:"kind"`
	HasBaseline bool                    `json:"hasBaseline"`
	Seed        uint64                  `json:"seed"`
	Replicas    int                     `json:"replicas"`
	Rows        int64                   `json:"rows"`
	All         wireAcc                 `json:"all"`
	Slices      []wireAcc               `json:"slices"`
	Diff        []byte                  `json:"diff,omitempty"`
	Examples    []ReconstructionExample `json:"examples,omitempty"`
	Findings    []Finding               `json:"findings,omitempty"`
	Anomaly     *float64                `json:"anomaly,omitempty"` // nil: +Inf
	Lower       string                  `json:"lower"`
	Weights     RowWeights              `json:"weights"`
	Cluster     string                  `json:"clusterColumn,omitempty"`
	Tail        []byte                  `json:"tail,omitempty"`
	Repeats     *wireRepeats            `json:"repeats,omitempty"`
}

// wireRepeats is repeats in JSON: the hashes as little-endian bytes.
type wireRepeats struct {
	Off    bool   `json:"off"`
	Shift  uint   `json:"shift"`
	Hashes []byte `json:"hashes"`
}

type binaryMarshaler interface{ MarshalBinary() ([]byte, error) }

func enc(m binaryMarshaler, isNil bool) ([]byte, error) {
	if isNil {
		return nil, nil
	}
	return m.MarshalBinary()
}

func (a *sliceAcc) wire() (wireAcc, error) {
	w := wireAcc{Name: a.name, Plain: &a.plain}
	var err error
	if w.Cand, err = enc(a.cand, a.cand == nil); err != nil {
		return w, err
	}
	if w.Base, err = enc(a.base, a.base == nil); err != nil {
		return w, err
	}
	if w.RC, err = enc(a.rc, a.rc == nil); err != nil {
		return w, err
	}
	if w.RB, err = enc(a.rb, a.rb == nil); err != nil {
		return w, err
	}
	w.Paired, err = a.paired.MarshalBinary()
	return w, err
}

func (w wireAcc) acc(hasBase bool) (*sliceAcc, error) {
	a := &sliceAcc{name: w.Name, paired: &stats.Paired{}}
	if w.Plain != nil {
		a.plain = *w.Plain
	}
	if err := a.paired.UnmarshalBinary(w.Paired); err != nil {
		return nil, err
	}
	if w.Cand != nil {
		a.cand = stats.NewBinary()
		if err := a.cand.UnmarshalBinary(w.Cand); err != nil {
			return nil, err
		}
		a.base = stats.NewBinary()
		if w.Base != nil {
			if err := a.base.UnmarshalBinary(w.Base); err != nil {
				return nil, err
			}
		}
	}
	if w.RC != nil {
		a.rc, a.rb = &stats.Recon{}, &stats.Recon{}
		if err := a.rc.UnmarshalBinary(w.RC); err != nil {
			return nil, err
		}
		if w.RB != nil {
			if err := a.rb.UnmarshalBinary(w.RB); err != nil {
				return nil, err
			}
		}
	}
	return a, nil
}

// MarshalJSON encodes the state for a shard result artifact.
func (s *holdoutState) MarshalJSON() ([]byte, error) {
	w := wireState{Kind: s.Kind, HasBaseline: s.HasBaseline, Seed: s.Seed, Replicas: s.Replicas, Rows: s.Rows,
		Examples: s.Examples, Findings: s.Findings, Lower: s.Lower, Weights: s.Weights, Cluster: s.ClusterColumn}
	if !math.IsInf(s.Anomaly, 1) {
		w.Anomaly = &s.Anomaly
	}
	var err error
	if s.Tail != nil {
		if w.Tail, err = s.Tail.MarshalBinary(); err != nil {
			return nil, err
		}
	}
	if r := s.Repeats; r != nil {
		w.Repeats = &wireRepeats{Off: r.Off, Shift: r.Shift, Hashes: make([]byte, 0, 8*len(r.Hashes))}
		for _, h := range r.Hashes {
			w.Repeats.Hashes = binary.LittleEndian.AppendUint64(w.Repeats.Hashes, h)
		}
	}
	if w.All, err = s.All.wire(); err != nil {
		return nil, err
	}
	names := make([]string, 0, len(s.Slices))
	for k := range s.Slices {
		names = append(names, k)
	}
	sort.Strings(names)
	for _, n := range names {
		wa, err := s.Slices[n].wire()
		if err != nil {
			return nil, err
		}
		w.Slices = append(w.Slices, wa)
	}
	if s.Diff != nil {
		if w.Diff, err = s.Diff.MarshalBinary(); err != nil {
			return nil, err
		}
	}
	return json.Marshal(w)
}

// UnmarshalJSON decodes a shard result's state.
func (s *holdoutState) UnmarshalJSON(b []byte) error {
	var w wireState
	if err := json.Unmarshal(b, &w); err != nil {
		return err
	}
	*s = holdoutState{Kind: w.Kind, HasBaseline: w.HasBaseline, Seed: w.Seed, Replicas: w.Replicas, Rows: w.Rows,
		Examples: w.Examples, Findings: w.Findings, Lower: w.Lower, Weights: w.Weights, Anomaly: math.Inf(1), Slices: map[string]*sliceAcc{},
		ClusterColumn: w.Cluster}
	if w.Anomaly != nil {
		s.Anomaly = *w.Anomaly
	}
	var err error
	if w.Tail != nil {
		s.Tail = &stats.Tail{}
		if err := s.Tail.UnmarshalBinary(w.Tail); err != nil {
			return fmt.Errorf("tail: %w", err)
		}
	}
	if r := w.Repeats; r != nil {
		if len(r.Hashes)%8 != 0 || r.Shift > 63 {
			return errkind.New(errkind.BadInput, "shard result: malformed repeated-row hashes")
		}
		s.Repeats = &repeats{Off: r.Off, Shift: r.Shift, Hashes: make([]uint64, len(r.Hashes)/8)}
		for i := range s.Repeats.Hashes {
			s.Repeats.Hashes[i] = binary.LittleEndian.Uint64(r.Hashes[8*i:])
		}
	}
	if s.All, err = w.All.acc(w.HasBaseline); err != nil {
		return fmt.Errorf("all rows: %w", err)
	}
	for _, wa := range w.Slices {
		a, err := wa.acc(w.HasBaseline)
		if err != nil {
			return fmt.Errorf("slice %q: %w", wa.Name, err)
		}
		s.Slices[wa.Name] = a
	}
	if w.Diff != nil {
		s.Diff = &stats.Histogram{}
		if err := s.Diff.UnmarshalBinary(w.Diff); err != nil {
			return err
		}
	}
	return nil
}

// ShardResult is one shard's holdout sums, bound to the inputs of the gate
// run it belongs to.
type ShardResult struct {
	SchemaVersion int           `json:"schemaVersion"`
	Tool          Tool          `json:"tool"`
	Target        string        `json:"target"`
	Candidate     string        `json:"candidate"` // digest
	Baseline      string        `json:"baseline"`  // digest, "" on a first release
	Holdout       string        `json:"holdout"`   // digest
	Policy        string        `json:"policy"`    // digest
	Shard         int           `json:"shard"`     // 0-based
	Of            int           `json:"of"`
	FirstRow      int64         `json:"firstRow"` // rows [FirstRow, EndRow) of the holdout
	EndRow        int64         `json:"endRow"`
	Seconds       float64       `json:"seconds"`
	State         *holdoutState `json:"state"`
}

// ShardRange returns the rows [lo, hi) of shard i of n over rows rows:
// contiguous, as equal as integers allow, covering every row once.
func ShardRange(i, n int, rows int64) (lo, hi int64) {
	return rows * int64(i) / int64(n), rows * int64(i+1) / int64(n)
}

// mergeShards checks that results are the complete set of shards of one
// gate run with these inputs and merges their states.
func mergeShards(results []*ShardResult, cand, base, hold, pol string, rows int64) (*holdoutState, error) {
	if len(results) == 0 {
		return nil, errkind.New(errkind.BadInput, "no shard results to merge")
	}
	n := results[0].Of
	byShard := map[int]*ShardResult{}
	for _, r := range results {
		switch {
		case r.Of != n:
			return nil, errkind.New(errkind.BadInput, "shard %d/%d does not belong with shards of %d", r.Shard+1, r.Of, n)
		case r.Candidate != cand || r.Baseline != base || r.Holdout != hold || r.Policy != pol:
			return nil, errkind.New(errkind.BadInput, "shard %d/%d was made for other inputs (candidate %s, baseline %q, holdout %s, policy %s)",
				r.Shard+1, r.Of, r.Candidate, r.Baseline, r.Holdout, r.Policy)
		case byShard[r.Shard] != nil:
			return nil, errkind.New(errkind.BadInput, "shard %d/%d given twice", r.Shard+1, n)
		case r.State == nil:
			return nil, errkind.New(errkind.BadInput, "shard %d/%d has no state", r.Shard+1, n)
		}
		lo, hi := ShardRange(r.Shard, n, rows)
		if r.FirstRow != lo || r.EndRow != hi {
			return nil, errkind.New(errkind.BadInput, "shard %d/%d covers rows [%d, %d), want [%d, %d)", r.Shard+1, n, r.FirstRow, r.EndRow, lo, hi)
		}
		byShard[r.Shard] = r
	}
	var missing []string
	for i := 0; i < n; i++ {
		if byShard[i] == nil {
			missing = append(missing, fmt.Sprintf("%d/%d", i+1, n))
		}
	}
	if len(missing) > 0 {
		return nil, errkind.New(errkind.BadInput, "missing shard results: %v", missing)
	}
	st := byShard[0].State
	for i := 1; i < n; i++ {
		if err := st.merge(byShard[i].State); err != nil {
			return nil, err
		}
	}
	return st, nil
}
