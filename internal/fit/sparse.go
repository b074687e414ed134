package fit

import (
	"math"

	"github.com/modelgate/modelgate/internal/errkind"
)

// Sparse is a Rows×Cols matrix in compressed sparse row form: row r's
// entries are at columns Indices[Indptr[r]:Indptr[r+1]] with values
// Values[Indptr[r]:Indptr[r+1]]. A column appears at most once per row;
// the order of entries within a row does not matter. Absent entries are zero.
type Sparse struct {
	Rows, Cols int
	Indptr     []int
	Indices    []int
	Values     []float64
}

// Validate reports, as a bad-input error, the first way in which s is not a
// well-formed matrix: wrong lengths, decreasing row pointers, a column out of
// range or repeated within a row, or a value that is not finite.
func (s *Sparse) Validate() error {
	if s.Rows < 0 || s.Cols < 0 {
		return errkind.New(errkind.BadInput, "sparse matrix: negative shape %d×%d", s.Rows, s.Cols)
	}
	if len(s.Indptr) != s.Rows+1 {
		return errkind.New(errkind.BadInput, "sparse matrix: %d row pointers for %d rows", len(s.Indptr), s.Rows)
	}
	if s.Indptr[0] != 0 || s.Indptr[s.Rows] != len(s.Indices) || len(s.Indices) != len(s.Values) {
		return errkind.New(errkind.BadInput, "sparse matrix: row pointers span [%d,%d) but there are %d indices and %d values",
			s.Indptr[0], s.Indptr[s.Rows], len(s.Indices), len(s.Values))
	}
	seen := make([]int, s.Cols) // seen[c] = 1 + last row that used column c
	for r := 0; r < s.Rows; r++ {
		lo, hi := s.Indptr[r], s.Indptr[r+1]
		if hi < lo {
			return errkind.New(errkind.BadInput, "sparse matrix: row %d has decreasing row pointers", r)
		}
		for i := lo; i < hi; i++ {
			c := s.Indices[i]
			if c < 0 || c >= s.Cols {
				return errkind.New(errkind.BadInput, "sparse matrix: row %d: column %d out of range [0,%d)", r, c, s.Cols)
			}
			if seen[c] == r+1 {
				return errkind.New(errkind.BadInput, "sparse matrix: row %d: column %d appears twice", r, c)
			}
			seen[c] = r + 1
			if v := s.Values[i]; math.IsNaN(v) || math.IsInf(v, 0) {
				return errkind.New(errkind.BadInput, "sparse matrix: row %d: value %v at column %d is not finite", r, v, c)
			}
		}
	}
	return nil
}
