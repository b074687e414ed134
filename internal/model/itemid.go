package model

import (
	"fmt"
	"unicode"
	"unicode/utf8"

	"golang.org/x/text/unicode/norm"
)

// ItemIDProblem says what makes id unusable as a raw item id, or "" when
// it is fine. One id must have one spelling, so that a vocabulary cannot
// hold two ids a reader takes for one, and a holdout's id means the
// vocabulary's:
//
//   - not empty, valid UTF-8, no control character (Unicode Cc: NUL, tab,
//     CR, DEL, C1 controls);
//   - no white space at either end ("x " is refused, not taken for "x");
//   - in Unicode normalisation form C (NFC: "café" typed as e + U+0301 is
//     refused; its NFC spelling is accepted);
//   - an id made of an optional sign and decimal digits alone is the
//     canonical decimal form of a 64-bit integer ("7", "-7"; not "07",
//     "+7", "-0" or a number beyond int64), because a holdout's integer id 7
//     means the id "7".
func ItemIDProblem(id string) string {
	p, ascii := asciiProblem(id)
	if p != "" || ascii {
		return p
	}
	return unicodeProblem(id)
}

// ItemIDProblemBytes is ItemIDProblem for an id in a byte slice; it does
// not allocate for an ASCII id.
func ItemIDProblemBytes(id []byte) string {
	p, ascii := asciiProblem(id)
	if p != "" || ascii {
		return p
	}
	return unicodeProblem(string(id))
}

// asciiProblem checks what can be checked byte by byte; ascii reports
// whether the id is ASCII alone (then the answer is complete).
func asciiProblem[T string | []byte](id T) (problem string, ascii bool) {
	n := len(id)
	if n == 0 {
		return "empty id", true
	}
	ascii, digits := true, true
	for i := 0; i < n; i++ {
		b := id[i]
		switch {
		case b < 0x20 || b == 0x7f:
			return fmt.Sprintf("contains the control character U+%04X", b), true
		case b >= 0x80:
			ascii = false
		}
		if !('0' <= b && b <= '9') && !(i == 0 && (b == '-' || b == '+') && n > 1) {
			digits = false
		}
	}
	if !ascii {
		return "", false
	}
	if id[0] == ' ' || id[n-1] == ' ' {
		return "white space at its start or end", true
	}
	if digits && !canonicalInt(id) {
		return "an integer id must be written as the decimal form of a 64-bit integer (no leading zeros or plus sign, not -0)", true
	}
	return "", true
}

// canonicalInt reports whether id, an optional sign and digits, is what
// strconv.FormatInt gives for some int64.
func canonicalInt[T string | []byte](id T) bool {
	digits, limit := id[0:], "9223372036854775807"
	if id[0] == '+' {
		return false
	}
	if id[0] == '-' {
		digits, limit = id[1:], "9223372036854775808"
		if len(digits) == 1 && digits[0] == '0' {
			return false // -0
		}
	}
	if len(digits) > 1 && digits[0] == '0' {
		return false
	}
	if len(digits) != len(limit) {
		return len(digits) < len(limit)
	}
	for i := 0; i < len(limit); i++ {
		if digits[i] != limit[i] {
			return digits[i] < limit[i]
		}
	}
	return true
}

// unicodeProblem checks a non-ASCII id (no ASCII control character).
func unicodeProblem(id string) string {
	if !utf8.ValidString(id) {
		return "not valid UTF-8"
	}
	for _, r := range id {
		if unicode.IsControl(r) {
			return fmt.Sprintf("contains the control character U+%04X", r)
		}
	}
	first, _ := utf8.DecodeRuneInString(id)
	last, _ := utf8.DecodeLastRuneInString(id)
	if unicode.IsSpace(first) || unicode.IsSpace(last) {
		return "white space at its start or end"
	}
	if !norm.NFC.IsNormalString(id) {
		return fmt.Sprintf("not in Unicode NFC form (its NFC spelling is %q)", norm.NFC.String(id))
	}
	// Digits and signs are ASCII: a non-ASCII id is never integer-looking.
	return ""
}
