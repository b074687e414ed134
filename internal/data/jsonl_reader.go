package data

import (
	"bufio"
	"bytes"
	"errors"
	"fmt"
	"io"
	"strconv"
)

// jsonlReader reads a JSON Lines holdout one line at a time.
type jsonlReader struct {
	l      *layout
	lines  *bufio.Scanner
	s      scanner
	sc     scratch
	line   int64 // lines read so far
	labels int   // 1: rows have labels, -1: they have none, 0: not known yet
	slices interner
	done   bool
	err    error // sticky
}

func newJSONL(r io.Reader, l *layout) *jsonlReader {
	lines := bufio.NewScanner(r)
	// Room for the longest line accepted plus "\r\n".
	lines.Buffer(make([]byte, 0, 64<<10), MaxLineBytes+2)
	j := &jsonlReader{l: l, lines: lines}
	if l.requireLabels {
		j.labels = 1
	}
	return j
}

func (j *jsonlReader) Rows() int64  { return -1 }
func (j *jsonlReader) Close() error { return nil }

func (j *jsonlReader) Read(f *Frame, max int) (int, error) {
	f.Reset()
	if j.err != nil {
		return 0, j.err
	}
	if max <= 0 {
		return 0, errMaxRows
	}
	n := 0
	for n < max {
		ok, err := j.next()
		if err == nil && ok {
			err = j.l.appendRow(f, &j.sc, j.line-1, j.labels > 0)
		}
		if err != nil {
			j.err = err
			return 0, err
		}
		if !ok {
			break
		}
		n++
	}
	f.HasLabels = j.labels > 0
	if n == 0 {
		return 0, io.EOF
	}
	return n, nil
}

// collect reads every row, giving each bad row's error to sink until sink
// returns false; it returns an error that stops reading.
func (j *jsonlReader) collect(sink func(error) bool) error {
	var f Frame
	for {
		ok, err := j.next()
		if err != nil {
			var re *RowError
			if !errors.As(err, &re) {
				return err
			}
		} else if !ok {
			return nil
		} else {
			err = j.l.appendRow(&f, &j.sc, j.line-1, j.labels > 0)
		}
		if err != nil && !sink(err) {
			return nil
		}
		f.Reset()
	}
}

// next decodes the next line into j.sc; false at the end of the input. A
// bad line is reported as a RowError.
func (j *jsonlReader) next() (bool, error) {
	if j.done {
		return false, nil
	}
	if !j.lines.Scan() {
		j.done = true
		err := j.lines.Err()
		if errors.Is(err, bufio.ErrTooLong) {
			return false, j.l.rowError(j.line+1, "line longer than %d bytes", MaxLineBytes)
		}
		if err != nil {
			return false, j.l.fileError("reading: %v", err)
		}
		return false, nil
	}
	j.line++
	line := j.lines.Bytes()
	if len(line) > MaxLineBytes {
		return true, j.l.rowError(j.line, "line longer than %d bytes", MaxLineBytes)
	}
	if j.line == 1 {
		line = bytes.TrimPrefix(line, []byte("\uFEFF"))
	}
	if err := j.parse(line); err != nil {
		return true, j.l.rowError(j.line, "%v", err)
	}
	if j.labels == 0 {
		j.labels = -1
		if j.sc.hasLabel {
			j.labels = 1
		}
	}
	return true, nil
}

// Field bits, to refuse a field given twice.
const (
	seenItems = 1 << iota
	seenValues
	seenLabel
	seenWeight
	seenSlice
	seenRowID
	seenCluster
)

// parse decodes one line into j.sc.
func (j *jsonlReader) parse(line []byte) error {
	s := &j.s
	s.reset(line)
	sc := &j.sc
	sc.reset(len(j.l.dense))
	if len(bytes.TrimSpace(line)) == 0 {
		return errors.New("empty line (each line must be one JSON object)")
	}
	if s.peek() != '{' {
		return s.syntax("each line must be one JSON object")
	}
	s.i++
	seen := 0
	once := func(bit int, name string) error {
		if seen&bit != 0 {
			return fmt.Errorf("field %q appears twice", name)
		}
		seen |= bit
		return nil
	}
	if s.peek() == '}' {
		s.i++
	} else {
		for {
			key, err := s.str()
			if err != nil {
				return err
			}
			if err := s.expect(':'); err != nil {
				return err
			}
			if s.ws(); s.i >= len(s.b) {
				return s.syntax("the line ends before the value")
			}
			switch string(key) {
			case colItems:
				if err = once(seenItems, colItems); err == nil {
					err = j.items()
				}
			case colValues:
				if err = once(seenValues, colValues); err == nil {
					err = j.values()
				}
			case colLabel:
				if err = once(seenLabel, colLabel); err == nil {
					err = j.label()
				}
			case colWeight:
				if err = once(seenWeight, colWeight); err == nil {
					err = j.weight()
				}
			case colSlice:
				if err = once(seenSlice, colSlice); err == nil {
					err = j.slice()
				}
			case colRowID:
				if err = once(seenRowID, colRowID); err == nil {
					err = j.rowID()
				}
			case clusterKey(j.l.cluster):
				if err = once(seenCluster, j.l.cluster); err == nil {
					err = j.cluster()
				}
			default:
				if di, ok := j.l.denseIdx[string(key)]; ok {
					err = j.dense(di)
				} else {
					err = s.skip(0) // unknown fields are ignored
				}
			}
			if err != nil {
				return err
			}
			if s.peek() == ',' {
				s.i++
				continue
			}
			if err := s.expect('}'); err != nil {
				return err
			}
			break
		}
	}
	if s.peek() != 0 {
		return s.syntax("more after the object")
	}
	return nil
}

func (j *jsonlReader) isNull() bool {
	return j.s.peek() == 'n' && j.s.literal("null")
}

func isNumberStart(c byte) bool { return c == '-' || ('0' <= c && c <= '9') }

func (j *jsonlReader) items() error {
	s, sc, vocab := &j.s, &j.sc, j.l.vocab
	if j.isNull() {
		return errors.New("items is null")
	}
	if s.peek() != '[' {
		return errors.New("items is not a list")
	}
	err := s.array(func(i int) error {
		var (
			ix   int32
			keep bool
			err  error
		)
		switch c := s.peek(); {
		case c == '"':
			var id []byte
			if id, err = s.str(); err != nil {
				return err
			}
			if len(id) == 0 {
				return fmt.Errorf("items[%d] is an empty id", i)
			}
			ix, keep, err = vocab.mapBytes(id)
		case isNumberStart(c):
			var (
				tok     []byte
				integer bool
				n       int64
			)
			if tok, integer, err = s.num(); err != nil {
				return err
			}
			if !integer {
				return fmt.Errorf("items[%d] is %s, not an integer or a string", i, tok)
			}
			if n, err = strconv.ParseInt(string(tok), 10, 64); err != nil {
				return fmt.Errorf("items[%d] = %s is beyond the int64 range", i, tok)
			}
			ix, keep, err = vocab.mapInt(n)
		case j.isNull():
			return fmt.Errorf("items[%d] is null", i)
		default:
			return fmt.Errorf("items[%d] is not a string or an integer", i)
		}
		if err != nil {
			return fmt.Errorf("items[%d]: %w", i, err)
		}
		if !keep {
			ix = -1
		}
		sc.nItems++
		sc.idx = append(sc.idx, ix)
		return nil
	})
	sc.itemsSet = err == nil
	return err
}

// numbers appends the numbers of the list at s.i (or a lone number when
// scalarOK) to dst; what names the field in errors.
func (j *jsonlReader) numbers(dst []float32, what string, scalarOK bool) ([]float32, error) {
	s := &j.s
	c := s.peek()
	switch {
	case c == 'n' && j.isNull():
		return dst, fmt.Errorf("%s is null", what)
	case isNumberStart(c) && scalarOK:
		f, err := s.float()
		return append(dst, float32(f)), err
	case c != '[':
		return dst, fmt.Errorf("%s is not a list of numbers", what)
	}
	err := s.array(func(i int) error {
		c := s.peek()
		switch {
		case isNumberStart(c):
			f, err := s.float()
			dst = append(dst, float32(f))
			return err
		case j.isNull():
			return fmt.Errorf("%s[%d] is null", what, i)
		}
		return fmt.Errorf("%s[%d] is not a number", what, i)
	})
	return dst, err
}

func (j *jsonlReader) values() error {
	var err error
	j.sc.vals, err = j.numbers(j.sc.vals[:0], colValues, false)
	j.sc.valuesSet = err == nil
	return err
}

func (j *jsonlReader) dense(di int) error {
	sc := &j.sc
	d := j.l.dense[di]
	if sc.denseSet[di] {
		return fmt.Errorf("field %q appears twice", d.Name)
	}
	var err error
	sc.dense[di], err = j.numbers(sc.dense[di][:0], j.l.denseWhat[di], d.Size == 1)
	sc.denseSet[di] = err == nil
	return err
}

func (j *jsonlReader) label() error {
	s, sc := &j.s, &j.sc
	var v float64
	switch c := s.peek(); {
	case c == 't' && s.literal("true"):
		v = 1
	case c == 'f' && s.literal("false"):
		v = 0
	case isNumberStart(c):
		f, err := s.float()
		if err != nil {
			return err
		}
		v = f
	case j.isNull():
		return errors.New("label is null")
	default:
		return errors.New("label is not a number or a boolean")
	}
	lab, msg := checkLabel(v)
	if msg != "" {
		return errors.New(msg)
	}
	sc.hasLabel, sc.label = true, lab
	return nil
}

func (j *jsonlReader) weight() error {
	s, sc := &j.s, &j.sc
	if j.isNull() {
		return nil
	}
	if !isNumberStart(s.peek()) {
		return errors.New("weight is not a number")
	}
	f, err := s.float()
	if err != nil {
		return err
	}
	w, msg := checkWeight(f)
	if msg != "" {
		return errors.New(msg)
	}
	sc.hasWeight, sc.weight = true, w
	return nil
}

func (j *jsonlReader) slice() error {
	s := &j.s
	if j.isNull() {
		return nil
	}
	if s.peek() != '"' {
		return errors.New("slice is not a string")
	}
	b, err := s.str()
	if err != nil {
		return err
	}
	j.sc.slice = j.slices.get(b)
	return nil
}

func (j *jsonlReader) rowID() error {
	s, sc := &j.s, &j.sc
	if j.isNull() {
		return nil
	}
	if !isNumberStart(s.peek()) {
		return errors.New("row_id is not an integer")
	}
	tok, integer, err := s.num()
	if err != nil {
		return err
	}
	if !integer {
		return fmt.Errorf("row_id %s is not an integer", tok)
	}
	n, err := strconv.ParseInt(string(tok), 10, 64)
	if err != nil {
		return fmt.Errorf("row_id %s is beyond the int64 range", tok)
	}
	sc.hasRowID, sc.rowID = true, n
	return nil
}

// clusterKey is the JSON key of the cluster column, or one no JSON key
// can be (an invalid UTF-8 byte) when there is none.
func clusterKey(name string) string {
	if name == "" {
		return "\xff"
	}
	return name
}

// cluster reads the cluster column's value: a string or an integer.
func (j *jsonlReader) cluster() error {
	s, sc := &j.s, &j.sc
	name := j.l.cluster
	if j.isNull() {
		return nil
	}
	switch c := s.peek(); {
	case c == '"':
		b, err := s.str()
		if err != nil {
			return err
		}
		sc.hasClust, sc.cluster = true, ClusterKey(b)
		return nil
	case isNumberStart(c):
		tok, integer, err := s.num()
		if err != nil {
			return err
		}
		n, perr := strconv.ParseInt(string(tok), 10, 64)
		if !integer || perr != nil {
			return fmt.Errorf("%s %s is not an int64 integer", name, tok)
		}
		sc.hasClust, sc.cluster = true, ClusterKey(strconv.AppendInt(nil, n, 10))
		return nil
	}
	return fmt.Errorf("%s is not a string or an integer", name)
}

var _ Reader = (*jsonlReader)(nil)
