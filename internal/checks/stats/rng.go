package stats

import "math/bits"

// The Poisson-bootstrap weights are a pure function of (seed, row id,
// replicate): no state is carried from row to row, so shards and row order
// cannot change them.
//
// Row key: key = mix64(mix64(seed) ^ mix64(id)), with mix64 the SplitMix64
// finaliser (a bijection of uint64), so distinct ids give distinct keys
// for one seed.
//
// Replicate pair j (replicates 2j and 2j+1) uses the (j+1)-th output of
// the wyrand generator started at key: x = wymix(key + (j+1)·wyInc),
// wymix(s) = hi ^ lo of the 128-bit product s·(s ^ wyMul). Its low 32 bits
// give replicate 2j, its high 32 bits replicate 2j+1.
//
// A 32-bit uniform u becomes a Poisson(1) count by inversion: k is the
// number of thresholds poissonCDF[j] <= u, poissonCDF[j] =
// round(2^32 · P(K <= j)). P(K >= 13) is below 2^−32, so k <= 12.

const (
	wyInc = 0xa0761d6478bd642f
	wyMul = 0xe7037ed1a0b428db
)

// mix64 is the SplitMix64 output function.
func mix64(z uint64) uint64 {
	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9
	z = (z ^ (z >> 27)) * 0x94d049bb133111eb
	return z ^ (z >> 31)
}

// rowKey returns the generator start of a row; seedMix is mix64(seed).
func rowKey(seedMix uint64, id int64) uint64 { return mix64(seedMix ^ mix64(uint64(id))) }

// wymix returns the output of wyrand for state s.
func wymix(s uint64) uint64 {
	hi, lo := bits.Mul64(s, s^wyMul)
	return hi ^ lo
}

// poissonCDF[j] = round(2^32 · P(K <= j)) for K ~ Poisson(1), j = 0..11
// (checked against gonum's Poisson CDF in the tests).
var poissonCDF = [12]uint64{
	1580030169, 3160060337, 3950075422, 4213413783, 4279248374, 4292415292,
	4294609778, 4294923276, 4294962463, 4294966817, 4294967253, 4294967292,
}

// poissonTop maps the top byte b of a 32-bit uniform u to k | c<<8: k is
// the count of thresholds at or below b·2^24 and c the one threshold
// inside (b·2^24, (b+1)·2^24), or 2^32 when there is none, so that
// k + [u >= c] is the draw. Every bucket but the last holds at most one
// threshold; the last (u >= tailStart, probability 1/256) holds eight
// and goes to poissonTail.
var poissonTop = func() (t [256]uint64) {
	for b := range uint64(255) {
		lo, hi := b<<24, (b+1)<<24
		var k, inside uint64
		c := uint64(1) << 32
		for _, th := range poissonCDF {
			switch {
			case th <= lo:
				k++
			case th < hi:
				c = th
				inside++
			}
		}
		if inside > 1 {
			panic("stats: two Poisson thresholds share a table bucket")
		}
		t[b] = k | c<<8
	}
	t[255] = 0 // never used: tailStart
	return t
}()

const tailStart = 255 << 24

// ge returns 1 if u >= c else 0, for u < 2^32 < 2^63 and 1 <= c <= 2^32.
func ge(u, c uint64) uint64 { return (c - 1 - u) >> 63 }

// poisson1 maps a 32-bit uniform u to a Poisson(1) count: one table load
// and one branch-free comparison; the top 1/256 of u goes to the full
// table (a rarely taken branch).
func poisson1(u uint64) uint64 {
	if u >= tailStart {
		return poissonTail(u)
	}
	e := poissonTop[u>>24]
	return e&0xff + ge(u, e>>8)
}

//go:noinline
func poissonTail(u uint64) uint64 {
	var k uint64
	for _, c := range poissonCDF {
		k += ge(u, c)
	}
	return k
}

// poissonDraw returns the Poisson(1) weight of replicate r of a row.
func poissonDraw(key uint64, r int) uint64 {
	x := wymix(key + uint64(r/2+1)*wyInc)
	if r%2 == 0 {
		return poisson1(x & 0xffffffff)
	}
	return poisson1(x >> 32)
}
