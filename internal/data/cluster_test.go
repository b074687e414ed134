package data

import (
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/errkind"
)

// TestClusterColumn: a named cluster column is read from Parquet and JSON
// Lines files (string values written by HoldoutWriter), each row's key is
// ClusterKey of its text, and files without it are refused.
func TestClusterColumn(t *testing.T) {
	v := testVocab(t, "bucket", episodeIDs(30)...)
	spec := testSpec(v)
	rows := genRows(5, 40, 30, 6)
	for i := range rows {
		rows[i].Cluster = "listener-" + strconv.Itoa(i/4)
	}
	dir := t.TempDir()
	for _, ext := range []string{".parquet", ".jsonl"} {
		path := filepath.Join(dir, "clustered"+ext)
		writeHoldout(t, path, HoldoutLayout{Cluster: "listener"}, rows)
		r, err := Open(path, Options{Spec: spec, Vocab: v, ClusterColumn: "listener"})
		if err != nil {
			t.Fatal(err)
		}
		var f Frame
		n, err := r.Read(&f, 100)
		r.Close()
		if err != nil || n != len(rows) || len(f.Clusters) != n {
			t.Fatalf("%s: %d rows, %d cluster keys, %v", ext, n, len(f.Clusters), err)
		}
		for i := range rows {
			if f.Clusters[i] != ClusterKey([]byte(rows[i].Cluster)) {
				t.Fatalf("%s row %d: cluster key %x, want the key of %q", ext, i, f.Clusters[i], rows[i].Cluster)
			}
		}
		// Without the option the column is an ordinary ignored one.
		fl, _ := readAll(t, path, Options{Spec: spec, Vocab: v}, 16)
		if len(fl.RowIDs) != len(rows) {
			t.Errorf("%s read without a cluster column: %d rows", ext, len(fl.RowIDs))
		}
		// Another column name: refused.
		r, err = Open(path, Options{Spec: spec, Vocab: v, ClusterColumn: "household"})
		if err == nil {
			_, err = r.Read(&f, 100)
			r.Close()
		}
		if !errkind.Is(err, errkind.BadInput) || !strings.Contains(err.Error(), "household") {
			t.Errorf("%s: missing cluster column: %v", ext, err)
		}
	}
	// A reserved column cannot be the cluster column.
	if _, err := Open(filepath.Join(dir, "clustered.jsonl"), Options{Spec: spec, Vocab: v, ClusterColumn: "slice"}); !errkind.Is(err, errkind.BadInput) {
		t.Errorf("slice as the cluster column: %v", err)
	}
}

// TestClusterColumnJSONLValues: JSON integers and strings of the same
// decimal form are one cluster; null, a fraction and other types are
// refused, naming the row.
func TestClusterColumnJSONLValues(t *testing.T) {
	v := testVocab(t, "bucket", episodeIDs(5)...)
	spec := testSpec(v)
	path := filepath.Join(t.TempDir(), "h.jsonl")
	write := func(lines ...string) {
		if err := os.WriteFile(path, []byte(strings.Join(lines, "\n")+"\n"), 0o600); err != nil {
			t.Fatal(err)
		}
	}
	read := func() (*Frame, error) {
		r, err := Open(path, Options{Spec: spec, Vocab: v, ClusterColumn: "listener"})
		if err != nil {
			return nil, err
		}
		defer r.Close()
		var f Frame
		_, err = r.Read(&f, 10)
		return &f, err
	}
	write(`{"items":["ep-0"],"values":[1],"label":0,"listener":42}`, `{"items":[],"values":[],"label":1,"listener":"42"}`, `{"items":[],"values":[],"label":1,"listener":"x"}`)
	f, err := read()
	if err != nil {
		t.Fatal(err)
	}
	if f.Clusters[0] != f.Clusters[1] || f.Clusters[0] == f.Clusters[2] || f.Clusters[2] != ClusterKey([]byte("x")) {
		t.Errorf("cluster keys %x", f.Clusters)
	}
	for _, bad := range []struct{ line, want string }{
		{`{"items":[],"values":[],"label":0,"listener":null}`, "cluster column \"listener\" missing or null"},
		{`{"items":[],"values":[],"label":0}`, "cluster column \"listener\" missing or null"},
		{`{"items":[],"values":[],"label":0,"listener":1.5}`, "not an int64 integer"},
		{`{"items":[],"values":[],"label":0,"listener":[1]}`, "not a string or an integer"},
		{`{"items":[],"values":[],"label":0,"listener":1,"listener":1}`, "appears twice"},
	} {
		write(`{"items":[],"values":[],"label":0,"listener":7}`, bad.line)
		_, err := read()
		rowErr(t, err, path, 2, bad.want)
	}
}
