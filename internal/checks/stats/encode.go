package stats

import (
	"encoding/binary"
	"math"
	"slices"

	"github.com/modelgate/modelgate/internal/errkind"
)

// Shard accumulators travel between machines as bytes: each accumulator
// has MarshalBinary and UnmarshalBinary (encoding.BinaryMarshaler and
// BinaryUnmarshaler). The format is little-endian: the magic "mgstat", a
// version byte (2), a kind byte ('B' Binary, 'P' Paired, 'R' Recon, 'H'
// Histogram), then the kind's fields; every compensated sum is its two
// float64 parts, so a decoded accumulator merges exactly as the original.
// Binary's AUC histogram is written sparsely: the number of non-empty bins,
// then per bin its index (uint32, increasing), positive and negative
// weight (not both zero). The encoding is canonical: decoding and encoding
// again gives the same bytes. Decoding refuses (errkind.BadInput) any other length, a value
// that is not finite, a negative count or weight sum, and on error leaves
// the receiver unchanged.

const (
	magic         = "mgstat"
	formatVersion = 2
)

type encoder struct{ b []byte }

func newEncoder(kind byte, size int) *encoder {
	e := &encoder{b: make([]byte, 0, len(magic)+2+size)}
	e.b = append(e.b, magic...)
	e.b = append(e.b, formatVersion, kind)
	return e
}

func (e *encoder) u32(v uint32)  { e.b = binary.LittleEndian.AppendUint32(e.b, v) }
func (e *encoder) u64(v uint64)  { e.b = binary.LittleEndian.AppendUint64(e.b, v) }
func (e *encoder) f64(v float64) { e.u64(math.Float64bits(v)) }
func (e *encoder) sum(k ksum)    { e.f64(k.s); e.f64(k.c) }

type decoder struct {
	b   []byte
	err error
}

func newDecoder(data []byte, kind byte, what string) *decoder {
	d := &decoder{b: data}
	if len(data) < len(magic)+2 || string(data[:len(magic)]) != magic {
		d.err = errkind.New(errkind.BadInput, "decoding %s: not modelgate statistics", what)
	} else if data[len(magic)] != formatVersion {
		d.err = errkind.New(errkind.BadInput, "decoding %s: format version %d, want %d", what, data[len(magic)], formatVersion)
	} else if data[len(magic)+1] != kind {
		d.err = errkind.New(errkind.BadInput, "decoding %s: holds kind %q", what, data[len(magic)+1])
	} else {
		d.b = data[len(magic)+2:]
	}
	return d
}

func (d *decoder) fail(format string, args ...any) {
	if d.err == nil {
		d.err = errkind.New(errkind.BadInput, "decoding statistics: "+format, args...)
	}
}

func (d *decoder) take(n int) []byte {
	if d.err != nil {
		return nil
	}
	if len(d.b) < n {
		d.fail("truncated")
		return nil
	}
	v := d.b[:n]
	d.b = d.b[n:]
	return v
}

func (d *decoder) u32() uint32 {
	if v := d.take(4); v != nil {
		return binary.LittleEndian.Uint32(v)
	}
	return 0
}

func (d *decoder) u64() uint64 {
	if v := d.take(8); v != nil {
		return binary.LittleEndian.Uint64(v)
	}
	return 0
}

// f64 reads a finite float64.
func (d *decoder) f64() float64 {
	v := math.Float64frombits(d.u64())
	if math.IsNaN(v) || math.IsInf(v, 0) {
		d.fail("value %v is not finite", v)
		return 0
	}
	return v
}

// nonneg reads a finite float64 >= 0.
func (d *decoder) nonneg() float64 {
	v := d.f64()
	if v < 0 {
		d.fail("negative weight %v", v)
	}
	return v
}

func (d *decoder) sum() ksum {
	k := ksum{s: d.f64(), c: d.f64()}
	if math.IsInf(k.value(), 0) {
		d.fail("sum overflows")
	}
	return k
}

// weightSum reads a sum of non-negative terms.
func (d *decoder) weightSum() ksum {
	k := d.sum()
	if k.value() < 0 {
		d.fail("negative weight sum %v", k.value())
	}
	return k
}

func (d *decoder) count() int64 {
	v := int64(d.u64())
	if v < 0 {
		d.fail("negative row count %d", v)
	}
	return v
}

// end checks that every byte was used.
func (d *decoder) end() error {
	if d.err == nil && len(d.b) != 0 {
		d.fail("%d bytes after the end", len(d.b))
	}
	return d.err
}

// MarshalBinary encodes the accumulator (see the format above).
func (b *Binary) MarshalBinary() ([]byte, error) {
	e := newEncoder('B', 8+16*(4+3*CalibrationBins)+4)
	e.u64(uint64(b.rows))
	for _, k := range []ksum{b.w, b.wy, b.wl, b.wp} {
		e.sum(k)
	}
	for _, c := range b.cal {
		e.sum(c.w)
		e.sum(c.wp)
		e.sum(c.wy)
	}
	var n uint32
	for i := 0; i < len(b.hist); i += 2 {
		if b.hist[i] != 0 || b.hist[i+1] != 0 {
			n++
		}
	}
	e.u32(n)
	for i := 0; i < len(b.hist); i += 2 {
		if b.hist[i] != 0 || b.hist[i+1] != 0 {
			e.u32(uint32(i / 2))
			e.f64(b.hist[i])
			e.f64(b.hist[i+1])
		}
	}
	return e.b, nil
}

// UnmarshalBinary replaces b's contents with the decoded accumulator; the
// zero Binary may be the receiver.
func (b *Binary) UnmarshalBinary(data []byte) error {
	d := newDecoder(data, 'B', "log-loss statistics")
	var v Binary
	v.rows = d.count()
	v.w, v.wy, v.wl, v.wp = d.weightSum(), d.weightSum(), d.weightSum(), d.weightSum()
	for k := range v.cal {
		v.cal[k] = calSums{w: d.weightSum(), wp: d.weightSum(), wy: d.weightSum()}
	}
	n := d.u32()
	if d.err == nil && int(n) > len(d.b)/20 {
		d.fail("%d histogram bins in %d bytes", n, len(d.b))
	}
	if d.err == nil {
		v.hist = make([]float64, 2*AUCBins)
		next := uint32(0)
		for range n {
			i := d.u32()
			if d.err == nil && (i < next || i >= AUCBins) {
				d.fail("histogram bin %d out of order or range", i)
			}
			next = i + 1
			pos, neg := d.nonneg(), d.nonneg()
			if d.err == nil && pos == 0 && neg == 0 {
				d.fail("empty histogram bin %d listed", i)
			}
			if d.err != nil {
				break
			}
			v.hist[2*i], v.hist[2*i+1] = pos, neg
		}
	}
	if err := d.end(); err != nil {
		return err
	}
	*b = v
	return nil
}

// MarshalBinary encodes the accumulator (see the format above): seed,
// replicate count, rows, the moment sums, every replicate's sums, then a
// cluster flag (uint32 0 or 1) and, for a clustered accumulator, the
// number of clusters and per cluster (in increasing key order) its key,
// Σw·d and Σw.
func (a *Paired) MarshalBinary() ([]byte, error) {
	e := newEncoder('P', 8+4+8+16*(5+2*a.reps)+12+24*len(a.clusters))
	e.u64(a.seed)
	e.u32(uint32(a.reps))
	e.u64(uint64(a.rows))
	for _, k := range []ksum{a.w, a.w2, a.wd, a.m2, a.m3} {
		e.sum(k)
	}
	for _, k := range a.rep {
		e.sum(k)
	}
	if a.clusters == nil {
		e.u32(0)
		return e.b, nil
	}
	e.u32(1)
	keys := make([]uint64, 0, len(a.clusters))
	for k := range a.clusters {
		keys = append(keys, k)
	}
	slices.Sort(keys)
	e.u64(uint64(len(keys)))
	for _, k := range keys {
		c := a.clusters[k]
		e.u64(k)
		e.f64(c.wd)
		e.f64(c.w)
	}
	return e.b, nil
}

// UnmarshalBinary replaces a's contents (seed and replicate count
// included) with the decoded accumulator; the zero Paired may be the
// receiver.
func (a *Paired) UnmarshalBinary(data []byte) error {
	d := newDecoder(data, 'P', "paired statistics")
	seed := d.u64()
	reps := d.u32()
	if d.err == nil && (reps > MaxReplicates || int(reps)*32 > len(d.b)) {
		d.fail("%d replicates in %d bytes", reps, len(d.b))
	}
	if d.err != nil {
		return d.err
	}
	v, err := NewPaired(seed, int(reps))
	if err != nil {
		return err
	}
	v.rows = d.count()
	v.w, v.w2, v.wd, v.m2, v.m3 = d.weightSum(), d.weightSum(), d.sum(), d.weightSum(), d.sum()
	for j := range v.rep {
		if j%2 == 0 {
			v.rep[j] = d.weightSum() // Σw·k
		} else {
			v.rep[j] = d.sum() // Σw·k·d
		}
	}
	switch flag := d.u32(); {
	case d.err != nil:
	case flag > 1:
		d.fail("cluster flag %d", flag)
	case flag == 1:
		g := d.u64()
		if d.err == nil && g > uint64(len(d.b)/24) {
			d.fail("%d clusters in %d bytes", g, len(d.b))
		}
		v.clusters = make(map[uint64]*clusterSum, int(min(g, 1<<20)))
		var prev uint64
		for i := uint64(0); i < g && d.err == nil; i++ {
			k := d.u64()
			if i > 0 && k <= prev {
				d.fail("cluster keys out of order")
			}
			prev = k
			v.clusters[k] = &clusterSum{wd: d.f64(), w: d.nonneg()}
		}
	}
	if err := d.end(); err != nil {
		return err
	}
	*a = *v
	return nil
}

// MarshalBinary encodes the accumulator (see the format above). The weight
// function is not encoded.
func (r *Recon) MarshalBinary() ([]byte, error) {
	e := newEncoder('R', 8+16+16*5)
	e.f64(r.alpha)
	e.u64(uint64(r.rows))
	e.u64(uint64(r.rowsNZ))
	for _, k := range []ksum{r.w, r.wAll, r.wNZ, r.wNZLoss, r.wCombo} {
		e.sum(k)
	}
	return e.b, nil
}

// UnmarshalBinary replaces r's sums and alpha with the decoded ones and
// keeps r's weight function (none on the zero Recon).
func (r *Recon) UnmarshalBinary(data []byte) error {
	d := newDecoder(data, 'R', "reconstruction statistics")
	v := Recon{weight: r.weight}
	v.alpha = d.f64()
	if d.err == nil && !(v.alpha >= 0 && v.alpha <= 1) {
		d.fail("alpha %v outside [0, 1]", v.alpha)
	}
	v.rows, v.rowsNZ = d.count(), d.count()
	if d.err == nil && v.rowsNZ > v.rows {
		d.fail("%d rows with a nonzero target of %d", v.rowsNZ, v.rows)
	}
	v.w, v.wAll, v.wNZ, v.wNZLoss, v.wCombo = d.weightSum(), d.weightSum(), d.weightSum(), d.weightSum(), d.weightSum()
	if err := d.end(); err != nil {
		return err
	}
	*r = v
	return nil
}

// MarshalBinary encodes the histogram (see the format above).
func (h *Histogram) MarshalBinary() ([]byte, error) {
	e := newEncoder('H', 8*4+4+8*len(h.Counts))
	e.f64(h.Min)
	e.f64(h.Max)
	e.u32(uint32(len(h.Counts)))
	e.f64(h.Under)
	e.f64(h.Over)
	for _, c := range h.Counts {
		e.f64(c)
	}
	return e.b, nil
}

// UnmarshalBinary replaces h with the decoded histogram.
func (h *Histogram) UnmarshalBinary(data []byte) error {
	d := newDecoder(data, 'H', "histogram")
	lo, hi := d.f64(), d.f64()
	n := d.u32()
	if d.err == nil && (!(lo < hi) || n < 1 || int(n) > len(d.b)/8) {
		d.fail("histogram of %d bins over [%v, %v] in %d bytes", n, lo, hi, len(d.b))
	}
	if d.err != nil {
		return d.err
	}
	v := Histogram{Min: lo, Max: hi, Counts: make([]float64, n)}
	v.Under, v.Over = d.nonneg(), d.nonneg()
	for i := range v.Counts {
		v.Counts[i] = d.nonneg()
	}
	if err := d.end(); err != nil {
		return err
	}
	*h = v
	return nil
}
