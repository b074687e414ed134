package checks

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"testing"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

// demoRows reads the demo scorer holdout back into writable rows (raw ids
// recovered through cand-better's vocabulary).
func demoRows(t *testing.T, store registry.Store) ([]data.HoldoutRow, data.HoldoutLayout) {
	t.Helper()
	ctx := context.Background()
	m, err := loadPrepared(ctx, store, registry.Ref{Repository: "promo-scorer", Tag: "cand-better"})
	if err != nil {
		t.Fatal(err)
	}
	hold, err := artifact.FetchHoldout(ctx, store, registry.Ref{Repository: "promo-holdout", Tag: "v1"})
	if err != nil {
		t.Fatal(err)
	}
	defer hold.Close()
	r, err := hold.Open(m.ReadOptions("demo holdout", true))
	if err != nil {
		t.Fatal(err)
	}
	defer r.Close()
	dense := m.Loaded.Spec.Inputs.Dense
	var rows []data.HoldoutRow
	var f data.Frame
	for {
		n, err := r.Read(&f, 1000)
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
		for i := 0; i < n; i++ {
			row := data.HoldoutRow{RowID: f.RowIDs[i], Label: f.Labels[i], Weight: f.Weights[i], Slice: f.Slices[i], Dense: map[string][]float32{}}
			for p := f.Indptr[i]; p < f.Indptr[i+1]; p++ {
				id := "ep-not-in-any-vocabulary"
				if ix := int(f.Indices[p]); ix < m.Vocab.Len() {
					id = m.Vocab.ID(ix)
				}
				row.Items = append(row.Items, id)
				row.Values = append(row.Values, f.Values[p])
			}
			for _, d := range dense {
				row.Dense[d.Name] = append([]float32(nil), f.Dense[d.Name][i*d.Size:(i+1)*d.Size]...)
			}
			rows = append(rows, row)
		}
	}
	return rows, data.HoldoutLayout{Dense: dense, Weights: true, Slices: true}
}

func pushRows(t *testing.T, store registry.Store, tag string, layout data.HoldoutLayout, rows []data.HoldoutRow, cluster string) *registry.Ref {
	t.Helper()
	path := filepath.Join(t.TempDir(), "holdout.parquet")
	w, err := data.CreateHoldout(path, layout)
	if err != nil {
		t.Fatal(err)
	}
	if err := w.Write(rows...); err != nil {
		t.Fatal(err)
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	ref := registry.Ref{Repository: "promo-holdout", Tag: tag}
	if _, err := artifact.PushHoldout(context.Background(), store, path, ref, artifact.Options{ClusterColumn: cluster}); err != nil {
		t.Fatal(err)
	}
	return &ref
}

func findingOf(rep *Report, code string) *Finding {
	for _, c := range rep.Checks {
		for i := range c.Findings {
			if c.Findings[i].Code == code {
				return &c.Findings[i]
			}
		}
	}
	return nil
}

// TestClusteredHoldoutGate: the demo holdout's rows grouped into
// "listeners" of 4 rows each, a listener's rows spread over the whole
// file (so every shard boundary splits listeners), pushed with the
// listener column declared: the gate's test is cluster-robust with
// clusters − 1 degrees of freedom, and 4 shards merge to the one-run
// numbers (cluster sums and cluster bootstrap draws combine exactly).
func TestClusteredHoldoutGate(t *testing.T) {
	store := demoScenario(t)
	ctx := context.Background()
	rows, layout := demoRows(t, store)
	g := len(rows) / 4
	for i := range rows {
		rows[i].Cluster = fmt.Sprintf("listener-%d", i%g)
	}
	layout.Cluster = "listener_id"
	ref := pushRows(t, store, "clustered", layout, rows, "listener_id")

	for _, cand := range []string{"promo-scorer:cand-better", "promo-scorer:cand-worse"} {
		gc := gateConfig(t, store, cand, "promo-scorer:prod", "promo-scorer.yaml")
		gc.Holdout = ref
		one, err := Run(ctx, gc)
		if err != nil {
			t.Fatal(err)
		}
		h1 := holdoutOf(one)
		if h1 == nil || h1.Test == nil {
			t.Fatalf("%s: no holdout test", cand)
		}
		wantG := int64(g)
		if h1.Test.Clusters != wantG || h1.Test.DF != float64(wantG-1) {
			t.Errorf("%s: %d clusters, df %v; want %d, %d", cand, h1.Test.Clusters, h1.Test.DF, wantG, wantG-1)
		}
		if f := findingOf(one, "holdout.clusters"); f == nil || f.Status != StatusPass {
			t.Errorf("%s: no clusters finding: %+v", cand, f)
		}
		var shards []*ShardResult
		for i := 0; i < 4; i++ {
			r, err := RunShard(ctx, gc, i, 4)
			if err != nil {
				t.Fatal(err)
			}
			raw, err := json.Marshal(r)
			if err != nil {
				t.Fatal(err)
			}
			var back ShardResult
			if err := json.Unmarshal(raw, &back); err != nil {
				t.Fatal(err)
			}
			shards = append(shards, &back)
		}
		gc.Shards = shards
		four, err := Run(ctx, gc)
		if err != nil {
			t.Fatal(err)
		}
		h4 := holdoutOf(four)
		if one.Verdict != four.Verdict || h4.Test.Clusters != h1.Test.Clusters {
			t.Errorf("%s: verdict %s vs %s, clusters %d vs %d", cand, one.Verdict, four.Verdict, h1.Test.Clusters, h4.Test.Clusters)
		}
		for _, p := range [][3]any{
			{"mean diff", h1.Test.MeanDiff, h4.Test.MeanDiff}, {"std err", h1.Test.StdErr, h4.Test.StdErr},
			{"upper", h1.Test.Upper, h4.Test.Upper}, {"skewness", h1.Test.Skewness, h4.Test.Skewness},
			{"bootstrap lower", h1.Test.BootstrapLower, h4.Test.BootstrapLower},
			{"bootstrap upper", h1.Test.BootstrapUpper, h4.Test.BootstrapUpper},
		} {
			if !relClose(p[1].(float64), p[2].(float64), 1e-12) {
				t.Errorf("%s: %s: one run %v, four shards %v", cand, p[0], p[1], p[2])
			}
		}
	}

	// A policy naming another cluster column than the holdout declared is
	// refused as bad input.
	gc := gateConfig(t, store, "promo-scorer:cand-better", "promo-scorer:prod", "promo-scorer.yaml")
	gc.Holdout = ref
	gc.Config.Holdout.ClusterColumn = "household"
	if _, err := Run(ctx, gc); !errkind.Is(err, errkind.BadInput) {
		t.Errorf("policy cluster column %q against the holdout's %q: %v", "household", "listener_id", err)
	}
}

// TestRepeatedRowsWarn: the demo holdout with every row repeated (new row
// ids, no cluster column) passes the push, and the gate says rows repeat
// and asks for the cluster column; the demo holdout itself has no
// repeats, and the better candidate trips no tail rule on it.
func TestRepeatedRowsWarn(t *testing.T) {
	store := demoScenario(t)
	ctx := context.Background()
	rows, layout := demoRows(t, store)
	n := len(rows)
	for i := 0; i < n; i++ {
		r := rows[i]
		r.RowID += 1 << 40
		rows = append(rows, r)
	}
	ref := pushRows(t, store, "doubled", layout, rows, "")
	gc := gateConfig(t, store, "promo-scorer:cand-better", "promo-scorer:prod", "promo-scorer.yaml")
	gc.Holdout = ref
	rep, err := Run(ctx, gc)
	if err != nil {
		t.Fatal(err)
	}
	f := findingOf(rep, "holdout.repeats")
	if f == nil || f.Status != StatusWarn || f.Value == nil || *f.Value != float64(n) {
		t.Errorf("doubled holdout: repeats finding %+v, want a warning counting %d rows", f, n)
	}
	plain := gate(t, store, "promo-scorer:cand-better", "promo-scorer:prod", "promo-scorer.yaml")
	if f := findingOf(plain, "holdout.repeats"); f != nil {
		t.Errorf("demo holdout: %+v", f)
	}
	if f := findingOf(plain, "holdout.tail"); f == nil || f.Status != StatusPass {
		t.Errorf("demo better candidate: tail finding %+v, want a pass", f)
	}
}

// TestNeedUniqueRowIDs: a holdout whose summary does not record the
// row-id check (pushed before it existed) is read again by the gate and
// refused as bad input when a row_id repeats; one whose push checked it is
// not read again; a policy cluster column lets ids repeat within a
// cluster.
func TestNeedUniqueRowIDs(t *testing.T) {
	path := filepath.Join(t.TempDir(), "old.jsonl")
	line := func(id int, listener string) string {
		return fmt.Sprintf(`{"row_id":%d,"items":[],"values":[],"label":0,"listener_id":%q}`+"\n", id, listener)
	}
	if err := os.WriteFile(path, []byte(line(1, "a")+line(2, "b")+line(1, "a")), 0o600); err != nil {
		t.Fatal(err)
	}
	old, err := artifact.OpenHoldoutFile(path, artifact.HoldoutInfo{})
	if err != nil {
		t.Fatal(err)
	}
	defer old.Close()
	if err := needUniqueRowIDs(old, HoldoutConfig{}); !errkind.Is(err, errkind.BadInput) {
		t.Errorf("old holdout with a repeated row_id: %v", err)
	}
	if err := needUniqueRowIDs(old, HoldoutConfig{ClusterColumn: "listener_id"}); err != nil {
		t.Errorf("repeated within a cluster named by the policy: %v", err)
	}
	checked := &artifact.Holdout{Info: artifact.HoldoutInfo{RowIDsChecked: true}} // no data: reading it fails
	if err := needUniqueRowIDs(checked, HoldoutConfig{}); err != nil {
		t.Errorf("a holdout whose push checked its ids was read again: %v", err)
	}
}
