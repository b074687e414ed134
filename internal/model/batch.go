package model

// Batch is a batch of rows ready for the runtime: the sparse input as CSR
// (indices already mapped through the vocabulary to weight rows, values not
// yet transformed) and each dense input as a row-major matrix.
//
// Row r's pairs are Indices[Indptr[r]:Indptr[r+1]] and
// Values[Indptr[r]:Indptr[r+1]]. Rows may be empty. len(Indptr) is Rows()+1.
type Batch struct {
	Indptr  []int32
	Indices []int32
	Values  []float32
	// Dense maps a dense input's name to a Rows()×Size row-major matrix.
	Dense map[string][]float32
}

// Rows is the number of rows in the batch.
func (b *Batch) Rows() int {
	if len(b.Indptr) == 0 {
		return 0
	}
	return len(b.Indptr) - 1
}

// Reset empties the batch, keeping its memory for reuse.
func (b *Batch) Reset() {
	b.Indptr = append(b.Indptr[:0], 0)
	b.Indices = b.Indices[:0]
	b.Values = b.Values[:0]
	for k, v := range b.Dense {
		b.Dense[k] = v[:0]
	}
}
