package data

import (
	"encoding/binary"
	"hash/maphash"
	"math/bits"
	"math/rand/v2"
)

// idTable finds the weight row of an id without a string-keyed map: an
// open-addressing table (linear probing, at most half full) built once as
// the vocabulary is parsed. A slot holds the id's length and its first 16
// bytes beside the row, so an id of up to 16 bytes (most ids) is found by
// comparing two words in the slot, without following a pointer; a longer
// one is then compared whole with the vocabulary's copy.
type idTable struct {
	k0, k1 uint64 // random keys of the hash
	seed   maphash.Seed
	slots  []idSlot
	mask   uint64
	n      int
}

type idSlot struct {
	w0, w1 uint64 // the id's first 16 bytes, little-endian, zero-padded
	len    uint32 // the id's length
	row    int32  // the weight row plus one; 0 for an empty slot
}

func newIDTable(capacity int) *idTable {
	t := &idTable{k0: rand.Uint64() | 1, k1: rand.Uint64(), seed: maphash.MakeSeed()}
	t.resize(capacity)
	return t
}

func (t *idTable) resize(capacity int) {
	size := 16
	for size < 2*capacity {
		size *= 2
	}
	t.slots = make([]idSlot, size)
	t.mask = uint64(size - 1)
}

// key returns an id's first 16 bytes as two words and its hash.
func (t *idTable) key(id []byte) (w0, w1, h uint64) {
	n := len(id)
	if n > 16 {
		w0, w1 = binary.LittleEndian.Uint64(id), binary.LittleEndian.Uint64(id[8:])
		return w0, w1, maphash.Bytes(t.seed, id)
	}
	w0, w1 = shortWords(id)
	return w0, w1, t.shortHash(w0, w1, n)
}

// shortWords returns an id of at most 16 bytes as two words, zero-padded.
// It loads whole words (overlapping ones for a short id) rather than
// copying the id into a padded buffer.
func shortWords(id []byte) (w0, w1 uint64) {
	if n := len(id); n >= 8 {
		// The last 8 bytes, shifted down past the ones the first word
		// holds (all of them when n is 8: a shift by 64 gives 0; none
		// when n is 16).
		return binary.LittleEndian.Uint64(id), binary.LittleEndian.Uint64(id[n-8:]) >> (8 * (16 - n))
	}
	return smallWord(id), 0
}

// smallWord is shortWords' first word for an id of fewer than 8 bytes.
func smallWord(id []byte) (w uint64) {
	if n := len(id); n >= 4 {
		// Two overlapping 4-byte words: the shared bytes are equal.
		return uint64(binary.LittleEndian.Uint32(id)) | uint64(binary.LittleEndian.Uint32(id[n-4:]))<<(8*(n-4))
	}
	for i, b := range id {
		w |= uint64(b) << (8 * i)
	}
	return w
}

// shortHash is the hash of an id of n <= 16 bytes with words w0, w1.
func (t *idTable) shortHash(w0, w1 uint64, n int) uint64 {
	hi, lo := bits.Mul64(w0^t.k0, w1^t.k1^uint64(n))
	return hi ^ lo
}

// lookup returns the row of id among ids (the vocabulary's ids by row).
func (t *idTable) lookup(ids []string, id []byte) (int32, bool) {
	w0, w1, h := t.key(id)
	n := uint32(len(id))
	for i := h & t.mask; ; i = (i + 1) & t.mask {
		s := &t.slots[i]
		if s.row == 0 {
			return 0, false
		}
		if s.w0 == w0 && s.w1 == w1 && s.len == n && (n <= 16 || ids[s.row-1] == string(id)) {
			return s.row - 1, true
		}
	}
}

// insert adds row, the row of ids[row], which must not be in the table.
func (t *idTable) insert(ids []string, row int32) {
	if 2*(t.n+1) > len(t.slots) {
		old := t.slots
		t.resize(2 * (t.n + 1))
		for _, s := range old {
			if s.row != 0 {
				t.place(ids, s.row-1)
			}
		}
	}
	t.place(ids, row)
	t.n++
}

func (t *idTable) place(ids []string, row int32) {
	id := []byte(ids[row])
	w0, w1, h := t.key(id)
	i := h & t.mask
	for t.slots[i].row != 0 {
		i = (i + 1) & t.mask
	}
	t.slots[i] = idSlot{w0: w0, w1: w1, len: uint32(len(id)), row: row + 1}
}

// lookupRun appends to dst the rows of the ids ba[off[j]:off[j+1]], j = 0,
// 1, ..., len(off)-2, in turn, up to the first id that is empty or not in
// the table; it returns dst and how many ids it found. It is lookup over a
// page's run of byte-array values with the key computed in the loop.
func (t *idTable) lookupRun(ids []string, ba []byte, off []uint32, dst []int32) ([]int32, int) {
	slots, mask := t.slots, t.mask
	if len(off) < 2 {
		return dst, 0
	}
	m := len(off) - 1
	for j := range m {
		a, b := off[j], off[j+1]
		if a >= b || int(b) > len(ba) || b-a > 16 {
			return dst, j // empty, out of range, or long: the general lookup
		}
		id := ba[a:b]
		n := len(id)
		w0, w1 := shortWords(id)
		for i := t.shortHash(w0, w1, n) & mask; ; i = (i + 1) & mask {
			s := &slots[i]
			if s.row == 0 {
				return dst, j
			}
			if s.w0 == w0 && s.w1 == w1 && s.len == uint32(n) {
				dst = append(dst, s.row-1)
				break
			}
		}
	}
	return dst, m
}
