package data

import (
	"bufio"
	"bytes"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"unicode/utf8"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
)

// Vocabulary maps raw item ids to weight rows of one sparse input.
//
// It is parsed from the model directory's vocabulary file: UTF-8 text, one
// raw item id per line, line i (counting from 0) naming weight row i. A
// Vocabulary is immutable once parsed and safe for concurrent use.
type Vocabulary struct {
	in    model.SparseInput
	ids   []string
	index *idTable // the row of each id
	// ints indexes the ids that are the canonical decimal form of an int64
	// ("42", "-7"; not "042", "+7" or "-0"), so integer ids from a holdout
	// are looked up without formatting them.
	ints map[int64]int32
}

// ParseVocabulary reads a vocabulary file for the sparse input in.
//
// The file is UTF-8 text with one raw item id per line; the last line may
// or may not end with a newline ("\n"). It refuses, as errkind.BadInput
// naming the 1-based line: an empty id (so also a blank line, or a newline
// after the final newline), a carriage return anywhere (CRLF files), invalid
// UTF-8, a leading byte order mark, an id that appears twice (both lines are
// named), and a line count different from in.VocabularySize. It also refuses
// an input whose Unknown rule is not bucket, drop or refuse, or whose rows do
// not fit an int32 index.
func ParseVocabulary(r io.Reader, in model.SparseInput) (*Vocabulary, error) {
	switch in.Unknown {
	case model.UnknownBucket, model.UnknownDrop, model.UnknownRefuse:
	default:
		return nil, errkind.New(errkind.BadInput, "vocabulary of input %q: unknown-id rule %q is not %q, %q or %q",
			in.Name, in.Unknown, model.UnknownBucket, model.UnknownDrop, model.UnknownRefuse)
	}
	if in.VocabularySize < 0 || int64(in.Rows()) > math.MaxInt32 {
		return nil, errkind.New(errkind.BadInput, "vocabulary of input %q: size %d is out of range", in.Name, in.VocabularySize)
	}
	v := &Vocabulary{
		in:    in,
		ids:   make([]string, 0, min(in.VocabularySize, 1<<20)),
		index: newIDTable(min(in.VocabularySize, 1<<20)),
		ints:  make(map[int64]int32),
	}
	br := bufio.NewReaderSize(r, 64<<10)
	var long []byte
	for lineNo := 1; ; lineNo++ {
		line, err := br.ReadSlice('\n')
		if errors.Is(err, bufio.ErrBufferFull) {
			// A long line: gather it whole outside the reader's buffer.
			long = append(long[:0], line...)
			for errors.Is(err, bufio.ErrBufferFull) {
				line, err = br.ReadSlice('\n')
				long = append(long, line...)
			}
			line = long
		}
		if err != nil && err != io.EOF {
			return nil, fmt.Errorf("reading vocabulary of input %q: %w", in.Name, err)
		}
		if err == io.EOF && len(line) == 0 {
			break // end of file right after a newline, or an empty file
		}
		id := bytes.TrimSuffix(line, []byte{'\n'})
		if verr := v.add(id, lineNo); verr != nil {
			return nil, verr
		}
		if err == io.EOF {
			break
		}
	}
	if len(v.ids) != in.VocabularySize {
		return nil, errkind.New(errkind.BadInput, "vocabulary of input %q has %d ids but the spec says vocabularySize %d",
			in.Name, len(v.ids), in.VocabularySize)
	}
	return v, nil
}

// add appends the id found on the 1-based line lineNo.
func (v *Vocabulary) add(id []byte, lineNo int) error {
	bad := func(format string, args ...any) error {
		return errkind.New(errkind.BadInput, "vocabulary of input %q: line %d: %s", v.in.Name, lineNo, fmt.Sprintf(format, args...))
	}
	switch {
	case len(id) == 0:
		return bad("empty id")
	case bytes.IndexByte(id, '\r') >= 0:
		return bad("carriage return in id (lines must end with \\n alone)")
	case !utf8.Valid(id):
		return bad("id is not valid UTF-8")
	case lineNo == 1 && bytes.HasPrefix(id, []byte("\uFEFF")):
		return bad("file starts with a byte order mark")
	}
	if len(v.ids) >= math.MaxInt32 {
		return bad("too many ids")
	}
	if prev, dup := v.index.lookup(v.ids, id); dup {
		return errkind.New(errkind.BadInput, "vocabulary of input %q: id %q appears on lines %d and %d (weight rows %d and %d)",
			v.in.Name, id, prev+1, lineNo, prev, lineNo-1)
	}
	s := string(id)
	row := int32(len(v.ids))
	v.ids = append(v.ids, s)
	v.index.insert(v.ids, row)
	if n, ok := canonicalInt(id); ok {
		v.ints[n] = row
	}
	return nil
}

// canonicalInt parses b when it is exactly the decimal form
// strconv.FormatInt would give.
func canonicalInt(b []byte) (int64, bool) {
	if len(b) == 0 || len(b) > 20 || !(b[0] == '-' || ('0' <= b[0] && b[0] <= '9')) {
		return 0, false
	}
	n, err := strconv.ParseInt(string(b), 10, 64)
	if err != nil {
		return 0, false
	}
	var buf [24]byte
	return n, bytes.Equal(strconv.AppendInt(buf[:0], n, 10), b)
}

// Input returns the sparse input the vocabulary was parsed for.
func (v *Vocabulary) Input() model.SparseInput { return v.in }

// Len is the number of known ids (the spec's vocabularySize).
func (v *Vocabulary) Len() int { return len(v.ids) }

// ID returns the id of weight row i, 0 <= i < Len(); it panics otherwise.
func (v *Vocabulary) ID(i int) string { return v.ids[i] }

// Lookup returns the weight row of a known id. Ids are compared byte for
// byte: no trimming, no case folding, no Unicode normalisation.
func (v *Vocabulary) Lookup(id string) (int32, bool) {
	return v.index.lookup(v.ids, []byte(id))
}

// Map returns the weight row the sparse input's unknown-id rule gives id:
// its row when known; otherwise row Len() for "bucket", keep=false for
// "drop" (the pair is to be left out), and an errkind.BadInput error for
// "refuse".
func (v *Vocabulary) Map(id string) (idx int32, keep bool, err error) {
	if i, ok := v.index.lookup(v.ids, []byte(id)); ok {
		return i, true, nil
	}
	if p := model.ItemIDProblem(id); p != "" {
		return 0, false, errkind.New(errkind.BadInput, "item id %q: %s", id, p)
	}
	if v.in.Unknown == model.UnknownRefuse {
		return 0, false, v.refuse(id)
	}
	return v.unknown()
}

// mapBytes is Map for an id held in a byte slice; it does not allocate.
func (v *Vocabulary) mapBytes(id []byte) (int32, bool, error) {
	if i, ok := v.index.lookup(v.ids, id); ok {
		return i, true, nil
	}
	// A known id passed this check when its model was pushed; an unknown
	// one must be spelled so that it cannot be a known id written
	// another way.
	if p := model.ItemIDProblemBytes(id); p != "" {
		return 0, false, errkind.New(errkind.BadInput, "item id %q: %s", id, p)
	}
	if v.in.Unknown == model.UnknownRefuse {
		return 0, false, v.refuse(string(id))
	}
	return v.unknown()
}

// mapInt is Map for an integer id, compared by its decimal form.
func (v *Vocabulary) mapInt(id int64) (int32, bool, error) {
	if i, ok := v.ints[id]; ok {
		return i, true, nil
	}
	if v.in.Unknown == model.UnknownRefuse {
		return 0, false, v.refuse(strconv.FormatInt(id, 10))
	}
	return v.unknown()
}

// unknown applies the bucket or drop rule.
func (v *Vocabulary) unknown() (int32, bool, error) {
	if v.in.Unknown == model.UnknownBucket {
		return int32(len(v.ids)), true, nil
	}
	return 0, false, nil
}

func (v *Vocabulary) refuse(id string) error {
	return errkind.New(errkind.BadInput, "unknown item id %q (input %q refuses unknown ids)", id, v.in.Name)
}
