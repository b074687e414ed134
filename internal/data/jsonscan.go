package data

import (
	"errors"
	"fmt"
	"strconv"
	"unicode/utf16"
	"unicode/utf8"
)

// scanner is a small JSON (RFC 8259) tokenizer over one line. It decodes
// only what the holdout reader needs and skips the rest, without allocating
// for strings free of escapes or for numbers.
type scanner struct {
	b   []byte
	i   int
	buf []byte // decoded strings with escapes
}

// maxDepth bounds the nesting of skipped values.
const maxDepth = 512

func (s *scanner) reset(b []byte) { s.b, s.i = b, 0 }

func (s *scanner) syntax(what string) error {
	return fmt.Errorf("invalid JSON at byte %d: %s", s.i+1, what)
}

func (s *scanner) ws() {
	for s.i < len(s.b) {
		switch s.b[s.i] {
		case ' ', '\t', '\n', '\r':
			s.i++
		default:
			return
		}
	}
}

// peek skips whitespace and returns the next byte, 0 at the end.
func (s *scanner) peek() byte {
	s.ws()
	if s.i < len(s.b) {
		return s.b[s.i]
	}
	return 0
}

// expect skips whitespace and consumes c.
func (s *scanner) expect(c byte) error {
	if s.peek() != c {
		if s.i >= len(s.b) {
			return s.syntax(fmt.Sprintf("expected %q, found the end of the line", c))
		}
		return s.syntax(fmt.Sprintf("expected %q, found %q", c, s.b[s.i]))
	}
	s.i++
	return nil
}

// str decodes the string at s.i. The result aliases the line or s.buf and
// is valid until the next call.
func (s *scanner) str() ([]byte, error) {
	if s.peek() != '"' {
		return nil, s.syntax("expected a string")
	}
	s.i++
	start := s.i
	for s.i < len(s.b) {
		c := s.b[s.i]
		if c == '"' {
			out := s.b[start:s.i]
			s.i++
			if !utf8.Valid(out) {
				return nil, errors.New("string is not valid UTF-8")
			}
			return out, nil
		}
		if c == '\\' {
			break
		}
		if c < 0x20 {
			return nil, s.syntax("control character in string")
		}
		s.i++
	}
	out := append(s.buf[:0], s.b[start:s.i]...)
	for s.i < len(s.b) {
		c := s.b[s.i]
		switch {
		case c == '"':
			s.i++
			s.buf = out // keep the grown buffer
			if !utf8.Valid(out) {
				return nil, errors.New("string is not valid UTF-8")
			}
			return out, nil
		case c < 0x20:
			return nil, s.syntax("control character in string")
		case c != '\\':
			out = append(out, c)
			s.i++
			continue
		}
		s.i++
		if s.i >= len(s.b) {
			break
		}
		e := s.b[s.i]
		s.i++
		switch e {
		case '"', '\\', '/':
			out = append(out, e)
		case 'b':
			out = append(out, '\b')
		case 'f':
			out = append(out, '\f')
		case 'n':
			out = append(out, '\n')
		case 'r':
			out = append(out, '\r')
		case 't':
			out = append(out, '\t')
		case 'u':
			r, err := s.hex4()
			if err != nil {
				return nil, err
			}
			if utf16.IsSurrogate(r) {
				var r2 rune = -1
				if s.i+1 < len(s.b) && s.b[s.i] == '\\' && s.b[s.i+1] == 'u' {
					s.i += 2
					if r2, err = s.hex4(); err != nil {
						return nil, err
					}
				}
				if r = utf16.DecodeRune(r, r2); r == utf8.RuneError {
					return nil, s.syntax("unpaired UTF-16 surrogate in \\u escape")
				}
			}
			out = utf8.AppendRune(out, r)
		default:
			return nil, s.syntax("invalid escape in string")
		}
	}
	return nil, s.syntax("unterminated string")
}

func (s *scanner) hex4() (rune, error) {
	if s.i+4 > len(s.b) {
		return 0, s.syntax("short \\u escape")
	}
	var r rune
	for _, c := range s.b[s.i : s.i+4] {
		switch {
		case '0' <= c && c <= '9':
			c -= '0'
		case 'a' <= c && c <= 'f':
			c = c - 'a' + 10
		case 'A' <= c && c <= 'F':
			c = c - 'A' + 10
		default:
			return 0, s.syntax("invalid \\u escape")
		}
		r = r<<4 | rune(c)
	}
	s.i += 4
	return r, nil
}

// num scans the number at s.i and returns its text; integer says it has
// neither fraction nor exponent.
func (s *scanner) num() (tok []byte, integer bool, err error) {
	s.ws()
	start := s.i
	b := s.b
	digits := func() bool {
		n := s.i
		for s.i < len(b) && '0' <= b[s.i] && b[s.i] <= '9' {
			s.i++
		}
		return s.i > n
	}
	if s.i < len(b) && b[s.i] == '-' {
		s.i++
	}
	switch {
	case s.i < len(b) && b[s.i] == '0':
		s.i++
	case !digits():
		return nil, false, s.syntax("expected a value")
	}
	integer = true
	if s.i < len(b) && b[s.i] == '.' {
		s.i++
		if !digits() {
			return nil, false, s.syntax("expected digits after '.'")
		}
		integer = false
	}
	if s.i < len(b) && (b[s.i] == 'e' || b[s.i] == 'E') {
		s.i++
		if s.i < len(b) && (b[s.i] == '+' || b[s.i] == '-') {
			s.i++
		}
		if !digits() {
			return nil, false, s.syntax("expected digits in exponent")
		}
		integer = false
	}
	return b[start:s.i], integer, nil
}

// float scans a number as float64 (correctly rounded).
func (s *scanner) float() (float64, error) {
	tok, _, err := s.num()
	if err != nil {
		return 0, err
	}
	f, err := strconv.ParseFloat(string(tok), 64)
	if err != nil && !errors.Is(err, strconv.ErrRange) {
		return 0, s.syntax("bad number")
	}
	return f, nil // ±Inf when out of range; the caller refuses it
}

// literal consumes one of true, false and null at s.i.
func (s *scanner) literal(word string) bool {
	if len(s.b)-s.i >= len(word) && string(s.b[s.i:s.i+len(word)]) == word {
		s.i += len(word)
		return true
	}
	return false
}

// skip consumes any value.
func (s *scanner) skip(depth int) error {
	if depth > maxDepth {
		return s.syntax("nesting too deep")
	}
	switch s.peek() {
	case '{':
		s.i++
		if s.peek() == '}' {
			s.i++
			return nil
		}
		for {
			if _, err := s.str(); err != nil {
				return err
			}
			if err := s.expect(':'); err != nil {
				return err
			}
			if err := s.skip(depth + 1); err != nil {
				return err
			}
			if s.peek() == ',' {
				s.i++
				continue
			}
			return s.expect('}')
		}
	case '[':
		s.i++
		if s.peek() == ']' {
			s.i++
			return nil
		}
		for {
			if err := s.skip(depth + 1); err != nil {
				return err
			}
			if s.peek() == ',' {
				s.i++
				continue
			}
			return s.expect(']')
		}
	case '"':
		_, err := s.str()
		return err
	case 't':
		if s.literal("true") {
			return nil
		}
	case 'f':
		if s.literal("false") {
			return nil
		}
	case 'n':
		if s.literal("null") {
			return nil
		}
	default:
		_, _, err := s.num()
		return err
	}
	return s.syntax("expected a value")
}

// array calls elem for each element of the array at s.i, after whitespace.
func (s *scanner) array(elem func(i int) error) error {
	if err := s.expect('['); err != nil {
		return err
	}
	if s.peek() == ']' {
		s.i++
		return nil
	}
	for i := 0; ; i++ {
		if s.ws(); s.i >= len(s.b) {
			return s.syntax("the line ends inside a list")
		}
		if err := elem(i); err != nil {
			return err
		}
		if s.peek() == ',' {
			s.i++
			continue
		}
		return s.expect(']')
	}
}
