package modeldir

import (
	"fmt"
	"slices"
	"testing"
)

// TestVocabularyRefusesBOM: a byte-order mark would silently become part
// of the first id; the model directory refuses it as the holdout reader does.
func TestVocabularyRefusesBOM(t *testing.T) {
	_, probs := ParseVocabulary("vocabulary.txt", []byte("\xef\xbb\xbfshow-1\nshow-2\n"), 2)
	if len(probs) != 1 || probs[0] != "vocabulary.txt:1: starts with a byte-order mark" {
		t.Errorf("problems %q", probs)
	}
	if _, probs := ParseVocabulary("vocabulary.txt", []byte("show-1\nshow-2\n"), 2); len(probs) != 0 {
		t.Errorf("a clean vocabulary: %q", probs)
	}
}

// TestMayRepeat: a repeated id is always seen, wherever it is; distinct
// ids are told apart (a false alarm has odds of about n²/2⁶⁴).
func TestMayRepeat(t *testing.T) {
	ids := make([]string, 24000)
	for i := range ids {
		ids[i] = fmt.Sprintf("show-%07d", i)
	}
	if mayRepeat(ids) {
		t.Error("distinct ids reported as possibly repeated")
	}
	for _, pair := range [][2]int{{0, 1}, {0, 19999}, {12345, 777}, {19998, 19999}} {
		dup := slices.Clone(ids)
		dup[pair[1]] = dup[pair[0]]
		if !mayRepeat(dup) {
			t.Errorf("id at %d repeated at %d not seen", pair[0], pair[1])
		}
	}
	if mayRepeat(nil) || !mayRepeat([]string{"", ""}) {
		t.Error("empty list or two empty ids")
	}
}
