package artifact

import (
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/errkind"
)

// TestScanHoldoutRowIDs: a row_id given twice is refused; with a cluster
// column it may repeat within one cluster, not across two; the clusters
// are counted and the check recorded.
func TestScanHoldoutRowIDs(t *testing.T) {
	dir := t.TempDir()
	write := func(name string, lines ...string) string {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, []byte(strings.Join(lines, "\n")+"\n"), 0o600); err != nil {
			t.Fatal(err)
		}
		return p
	}
	row := func(id, listener string) string {
		return `{"row_id":` + id + `,"items":["ep-1"],"values":[1],"label":0,"listener":"` + listener + `"}`
	}
	unique := write("unique.jsonl", row("1", "a"), row("2", "a"), row("3", "b"))
	info, err := ScanHoldout(unique, "", nil)
	if err != nil || !info.RowIDsChecked || info.Clusters != 0 || info.ClusterColumn != "" {
		t.Fatalf("unique ids: %+v, %v", info, err)
	}
	info, err = ScanHoldout(unique, "listener", nil)
	if err != nil || info.Clusters != 2 || info.ClusterColumn != "listener" {
		t.Fatalf("unique ids, clustered: %+v, %v", info, err)
	}
	within := write("within.jsonl", row("1", "a"), row("2", "b"), row("1", "a"), row("1", "a"))
	if _, err := ScanHoldout(within, "", nil); !errkind.Is(err, errkind.BadInput) || !strings.Contains(err.Error(), "2 rows repeat a row_id (row_id 1)") {
		t.Errorf("repeated ids without a cluster column: %v", err)
	}
	if info, err := ScanHoldout(within, "listener", nil); err != nil || info.Clusters != 2 {
		t.Errorf("ids repeated within a cluster: %+v, %v", info, err)
	}
	across := write("across.jsonl", row("1", "a"), row("2", "b"), row("2", "c"))
	if _, err := ScanHoldout(across, "listener", nil); !errkind.Is(err, errkind.BadInput) || !strings.Contains(err.Error(), "row_id 2") {
		t.Errorf("an id in two clusters: %v", err)
	}
	// Without row_id, ids are positions: never repeated.
	noIDs := write("noids.jsonl", `{"items":[],"values":[],"label":1}`, `{"items":[],"values":[],"label":1}`)
	if _, err := ScanHoldout(noIDs, "", nil); err != nil {
		t.Errorf("no row_id column: %v", err)
	}
}
