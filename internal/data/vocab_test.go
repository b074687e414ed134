package data

import (
	"bytes"
	"fmt"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
	"unicode/utf8"

	"github.com/modelgate/modelgate/internal/cputime"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
)

func sparseInput(size int, unknown string) model.SparseInput {
	return model.SparseInput{Name: "episodes", VocabularySize: size, Unknown: unknown,
		Transform: model.TransformIdentity, Duplicates: model.DuplicatesSum, Vocabulary: "vocab.txt"}
}

func TestParseVocabulary(t *testing.T) {
	for _, text := range []string{"ep-1\n42\nshow/é\n", "ep-1\n42\nshow/é"} {
		v, err := ParseVocabulary(strings.NewReader(text), sparseInput(3, model.UnknownBucket))
		if err != nil {
			t.Fatalf("%q: %v", text, err)
		}
		if v.Len() != 3 {
			t.Fatalf("%q: Len = %d, want 3", text, v.Len())
		}
		for i, id := range []string{"ep-1", "42", "show/é"} {
			if got := v.ID(i); got != id {
				t.Errorf("ID(%d) = %q, want %q", i, got, id)
			}
			if got, ok := v.Lookup(id); !ok || got != int32(i) {
				t.Errorf("Lookup(%q) = %d, %v; want %d", id, got, ok, i)
			}
		}
		if _, ok := v.Lookup("EP-1"); ok {
			t.Errorf("Lookup is not case-sensitive")
		}
		if _, ok := v.Lookup("ep-1 "); ok {
			t.Errorf("Lookup trims spaces")
		}
	}
}

func TestParseVocabularyLongLine(t *testing.T) {
	long := strings.Repeat("x", 200<<10) // beyond the reader's 64 KiB buffer
	v, err := ParseVocabulary(strings.NewReader("a\n"+long+"\nb"), sparseInput(3, model.UnknownDrop))
	if err != nil {
		t.Fatal(err)
	}
	if i, ok := v.Lookup(long); !ok || i != 1 {
		t.Errorf("long id: row %d, %v; want 1", i, ok)
	}
	if i, ok := v.Lookup("b"); !ok || i != 2 {
		t.Errorf("id after the long one: row %d, %v; want 2", i, ok)
	}
}

func TestParseVocabularyErrors(t *testing.T) {
	cases := []struct {
		name, text string
		size       int
		unknown    string
		want       string
	}{
		{"empty id", "a\n\nb\n", 3, model.UnknownBucket, "line 2: empty id"},
		{"blank line at end", "a\nb\n\n", 3, model.UnknownBucket, "line 3: empty id"},
		{"duplicate", "a\nb\nc\nb\n", 4, model.UnknownBucket, `"b" appears on lines 2 and 4 (weight rows 1 and 3)`},
		{"crlf", "a\r\nb\r\n", 2, model.UnknownBucket, "line 1: carriage return"},
		{"invalid utf-8", "a\nb\xff\n", 2, model.UnknownBucket, "line 2: id is not valid UTF-8"},
		{"bom", "\uFEFFa\nb\n", 2, model.UnknownBucket, "line 1: file starts with a byte order mark"},
		{"too few", "a\nb\n", 3, model.UnknownBucket, "has 2 ids but the spec says vocabularySize 3"},
		{"too many", "a\nb\nc", 2, model.UnknownBucket, "has 3 ids but the spec says vocabularySize 2"},
		{"bad rule", "a\n", 1, "hash", `unknown-id rule "hash"`},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, err := ParseVocabulary(strings.NewReader(c.text), sparseInput(c.size, c.unknown))
			if err == nil {
				t.Fatalf("no error, want %q", c.want)
			}
			if !strings.Contains(err.Error(), c.want) {
				t.Errorf("error %q does not contain %q", err, c.want)
			}
			if !errkind.Is(err, errkind.BadInput) {
				t.Errorf("error kind %v, want bad input", errkind.Of(err))
			}
		})
	}
}

func TestVocabularyMap(t *testing.T) {
	ids := []string{"ep-1", "42", "007", "-5"}
	for _, c := range []struct {
		unknown string
		idx     int32
		keep    bool
		err     bool
	}{
		{model.UnknownBucket, 4, true, false},
		{model.UnknownDrop, 0, false, false},
		{model.UnknownRefuse, 0, false, true},
	} {
		v := testVocab(t, c.unknown, ids...)
		if i, keep, err := v.Map("42"); i != 1 || !keep || err != nil {
			t.Errorf("%s: Map(42) = %d, %v, %v", c.unknown, i, keep, err)
		}
		i, keep, err := v.Map("ep-999")
		if i != c.idx || keep != c.keep || (err != nil) != c.err {
			t.Errorf("%s: Map(unknown) = %d, %v, %v; want %d, %v, error %v", c.unknown, i, keep, err, c.idx, c.keep, c.err)
		}
		if err != nil && (!errkind.Is(err, errkind.BadInput) || !strings.Contains(err.Error(), `"ep-999"`)) {
			t.Errorf("%s: refusal %v is not a bad-input error naming the id", c.unknown, err)
		}
		// Integer ids match by their decimal form only: 42 and -5 are
		// known, 7 is not "007".
		if i, keep, err := v.mapInt(42); i != 1 || !keep || err != nil {
			t.Errorf("%s: mapInt(42) = %d, %v, %v", c.unknown, i, keep, err)
		}
		if i, keep, err := v.mapInt(-5); i != 3 || !keep || err != nil {
			t.Errorf("%s: mapInt(-5) = %d, %v, %v", c.unknown, i, keep, err)
		}
		if i, keep, err := v.mapInt(7); i != c.idx || keep != c.keep || (err != nil) != c.err {
			t.Errorf("%s: mapInt(7) = %d, %v, %v; want the unknown rule", c.unknown, i, keep, err)
		}
	}
}

func FuzzVocabulary(f *testing.F) {
	for _, s := range []string{"a\nb\nc\n", "a\nb", "", "\n", "x\r\ny", "1\n01\n-0\n", "é\n\xff", "a\na"} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, text []byte) {
		lines := bytes.Split(text, []byte{'\n'})
		if len(lines) > 0 && len(lines[len(lines)-1]) == 0 {
			lines = lines[:len(lines)-1] // the optional final newline
		}
		v, err := ParseVocabulary(bytes.NewReader(text), sparseInput(len(lines), model.UnknownBucket))
		if err != nil {
			if !errkind.Is(err, errkind.BadInput) {
				t.Fatalf("error %v is not bad input", err)
			}
			return
		}
		if v.Len() != len(lines) {
			t.Fatalf("Len %d, %d lines", v.Len(), len(lines))
		}
		for i, line := range lines {
			id := v.ID(i)
			if id != string(line) || id == "" || strings.ContainsRune(id, '\r') || !utf8.ValidString(id) {
				t.Fatalf("line %d: id %q accepted from %q", i+1, id, line)
			}
			if j, ok := v.Lookup(id); !ok || j != int32(i) {
				t.Fatalf("Lookup(%q) = %d, %v; want %d", id, j, ok, i)
			}
			if n, ok := canonicalInt(line); ok {
				if j, keep, err := v.mapInt(n); j != int32(i) || !keep || err != nil {
					t.Fatalf("mapInt(%d) = %d, %v, %v; want %d", n, j, keep, err, i)
				}
			}
		}
	})
}

// TestVocabularyTableAgreesWithMap: the id table gives every id its line's
// row and knows no other id, checked against a Go map over the same ids
// (ids that differ by one byte, a prefix, a suffix, integers).
func TestVocabularyTableAgreesWithMap(t *testing.T) {
	ids := episodeIDs(5000)
	v := testVocab(t, model.UnknownBucket, ids...)
	want := make(map[string]int32, len(ids))
	for i, id := range ids {
		want[id] = int32(i)
	}
	probes := append([]string(nil), ids...)
	for _, id := range ids[:500] {
		probes = append(probes, id+"x", id[:len(id)-1], "x"+id, id+id)
	}
	for _, id := range probes {
		wi, wok := want[id]
		gi, gok := v.Lookup(id)
		bi, _, _ := v.mapBytes([]byte(id))
		if gok != wok || gi != wi && wok || wok && bi != wi {
			t.Fatalf("%q: Lookup %d %v, mapBytes %d; the map says %d %v", id, gi, gok, bi, wi, wok)
		}
		if !wok && bi != int32(v.Len()) {
			t.Fatalf("%q: unknown id mapped to %d, want the bucket row %d", id, bi, v.Len())
		}
	}
}

// BenchmarkVocabularyLookup looks up ids (one in ten unknown) in a
// 32,768-id vocabulary with the id table and, for comparison in the same
// run, with a Go map.
func BenchmarkVocabularyLookup(b *testing.B) {
	ids := episodeIDs(32768)
	v := testVocab(b, model.UnknownBucket, ids...)
	m := make(map[string]int32, len(ids))
	for i, id := range ids {
		m[id] = int32(i)
	}
	rng := rand.New(rand.NewPCG(1, 2))
	probes := make([][]byte, 1<<16)
	for i := range probes {
		id := ids[rng.IntN(len(ids))]
		if i%10 == 0 {
			id = fmt.Sprintf("unknown-%d", i)
		}
		probes[i] = []byte(id)
	}
	b.Run("table", func(b *testing.B) {
		var sum int32
		stop := cputime.Thread()
		for i := 0; b.Loop(); i++ {
			r, _ := v.index.lookup(v.ids, probes[i&(len(probes)-1)])
			sum += r
		}
		b.ReportMetric(float64(stop().Nanoseconds())/float64(b.N), "cpu-ns/op")
		_ = sum
	})
	b.Run("map", func(b *testing.B) {
		var sum int32
		stop := cputime.Thread()
		for i := 0; b.Loop(); i++ {
			r := m[string(probes[i&(len(probes)-1)])]
			sum += r
		}
		b.ReportMetric(float64(stop().Nanoseconds())/float64(b.N), "cpu-ns/op")
		_ = sum
	})
}

// TestIDTableKeyWords: the words key loads are an id's first 16 bytes,
// zero-padded, little-endian (the table's definition), for every length
// up to 24, checked against a padded copy decoded byte by byte.
func TestIDTableKeyWords(t *testing.T) {
	tab := newIDTable(1)
	rng := rand.New(rand.NewPCG(3, 4))
	for n := 0; n <= 24; n++ {
		for range 50 {
			id := make([]byte, n, n+8)
			for i := range id {
				id[i] = byte(rng.IntN(256))
			}
			// Bytes past the id in its array must not leak into the key.
			full := id[:n+8]
			for i := n; i < len(full); i++ {
				full[i] = 0xff
			}
			var pad [16]byte
			copy(pad[:], id)
			var want0, want1 uint64
			for i := 7; i >= 0; i-- {
				want0 = want0<<8 | uint64(pad[i])
				want1 = want1<<8 | uint64(pad[8+i])
			}
			w0, w1, h := tab.key(id)
			if w0 != want0 || w1 != want1 {
				t.Fatalf("%x: words %x %x, want %x %x", id, w0, w1, want0, want1)
			}
			if _, _, h2 := tab.key(append([]byte(nil), id...)); h2 != h {
				t.Fatalf("%x: hash differs between two copies", id)
			}
		}
	}
}

// TestLookupRunAgreesWithLookup: lookupRun over a page's run of ids finds
// the rows lookup finds, in order, and stops at the first id that is
// empty, longer than 16 bytes or unknown (which the reader then maps the
// general way), on random runs of ids of every length up to 24.
func TestLookupRunAgreesWithLookup(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 8))
	const letters = "abcdefghijklmnopqrstuvwxyz0123456789-_"
	word := func(n int) string {
		b := make([]byte, n)
		for i := range b {
			b[i] = letters[rng.IntN(len(letters))]
		}
		return string(b)
	}
	ids := episodeIDs(2000)
	seen := map[string]bool{}
	for _, id := range ids {
		seen[id] = true
	}
	for n := 1; n <= 24; n++ {
		for range 20 {
			if w := word(n); !seen[w] {
				seen[w] = true
				ids = append(ids, w)
			}
		}
	}
	v := testVocab(t, model.UnknownBucket, ids...)
	for range 2000 {
		var ba []byte
		off := []uint32{0}
		for range rng.IntN(12) {
			var id string
			switch x := rng.IntN(40); {
			case x == 0:
				id = "" // empty
			case x < 4:
				id = word(1 + rng.IntN(24)) // most likely unknown
			default:
				id = ids[rng.IntN(len(ids))]
			}
			ba = append(ba, id...)
			off = append(off, uint32(len(ba)))
		}
		// The run starts after a prefix of the page, as in a page read
		// from its middle.
		skip := rng.IntN(len(off))
		var want []int32
		for j := skip; j+1 < len(off); j++ {
			id := ba[off[j]:off[j+1]]
			r, ok := v.index.lookup(v.ids, id)
			if len(id) == 0 || len(id) > 16 || !ok {
				break
			}
			want = append(want, r)
		}
		dst := []int32{-7}
		got, n := v.index.lookupRun(v.ids, ba[:len(ba):len(ba)], off[skip:], dst)
		if n != len(want) || !slices.Equal(got, append([]int32{-7}, want...)) {
			t.Fatalf("page %q offsets %v from %d: lookupRun %v (%d), lookup %v", ba, off, skip, got, n, want)
		}
	}
}
