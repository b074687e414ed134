package stats

// ksum is a compensated float64 sum: s holds the running sum and c the
// accumulated rounding error of every addition (Knuth's TwoSum, which is
// exact for each step and needs no branch). The value is s + c.
type ksum struct{ s, c float64 }

// add adds x to the sum.
func (k *ksum) add(x float64) {
	t := k.s + x
	bp := t - k.s
	k.c += (k.s - (t - bp)) + (x - bp)
	k.s = t
}

// merge adds another compensated sum.
func (k *ksum) merge(o ksum) {
	k.add(o.s)
	k.c += o.c
}

// value returns the sum.
func (k ksum) value() float64 { return k.s + k.c }
