package model

import (
	"strconv"
	"testing"
)

// TestItemIDProblem: the item id rule. NFC examples from Unicode Standard
// Annex #15 (Unicode Normalization Forms): U+0065 U+0301 composes to
// U+00E9; U+212B ANGSTROM SIGN normalises to U+00C5. Integer spellings are
// held to strconv.FormatInt's output.
func TestItemIDProblem(t *testing.T) {
	ok := []string{"x", "show-00042", "café", "7", "-7", "0", "9223372036854775807", "-9223372036854775808", "a b", "Å", "-", "+", "07a", "日本"}
	bad := []string{"", "x\x00y", "x ", " x", "x\t", "a\r", "\x7f", "caf\u0065\u0301", "\u212B", "07", "+7", "-0", "00", "9223372036854775808", "-9223372036854775809", "x\u00a0", "\u2003x", "a\u0085b"}
	for _, id := range ok {
		if p := ItemIDProblem(id); p != "" {
			t.Errorf("%q refused: %s", id, p)
		}
		if p := ItemIDProblemBytes([]byte(id)); p != "" {
			t.Errorf("%q refused (bytes): %s", id, p)
		}
	}
	for _, id := range bad {
		if ItemIDProblem(id) == "" || ItemIDProblemBytes([]byte(id)) == "" {
			t.Errorf("%q accepted", id)
		}
	}
	// Every integer-looking id is accepted exactly when it round-trips
	// through strconv.
	for _, s := range []string{"1", "10", "010", "-1", "-01", "123456789", "99999999999999999999"} {
		n, err := strconv.ParseInt(s, 10, 64)
		want := err == nil && strconv.FormatInt(n, 10) == s
		if got := ItemIDProblem(s) == ""; got != want {
			t.Errorf("%q: accepted %v, strconv round trip %v", s, got, want)
		}
	}
}
