package demo

import (
	"fmt"

	"github.com/modelgate/modelgate/internal/model/modeldir"
)

// probeRow is one probe input; l supplies the dense inputs.
type probeRow struct {
	items  []string
	values []float32
	l      *Listener
}

// unknownID is an id the network's catalogue does not have.
const unknownID = "show-99999"

// probeRows makes the demo's 16 probe inputs, shared by every model: an
// empty row; one show; duplicate ids; an id outside the catalogue; a
// catalogue show outside the vocabulary; two unknown ids together (both
// in the unknown bucket); a row of 60 shows (the most a regular listener
// follows); extreme counts; seven holdout listeners with at least two
// distinct values; and an anomalous listener touching hundreds of shows.
func probeRows(d *Data, vocab []string, vocabIdx map[int]int) []probeRow {
	var oov []string
	for j := range d.Shows {
		if _, ok := vocabIdx[j]; !ok {
			oov = append(oov, d.Shows[j].ID)
		}
	}
	h := d.Holdout
	v := func(i int) string { return vocab[(i*37)%len(vocab)] }
	rows := []probeRow{
		{items: []string{}, values: []float32{}, l: &h[0]},
		{items: []string{v(1)}, values: []float32{3}, l: &h[1]},
		{items: []string{v(2), v(3), v(2)}, values: []float32{2, 5, 7}, l: &h[2]},
		{items: []string{v(4), unknownID}, values: []float32{4, 9}, l: &h[3]},
		{items: []string{oov[len(oov)/2], v(5)}, values: []float32{6, 1}, l: &h[4]},
		{items: []string{unknownID, v(6), oov[0]}, values: []float32{2, 3, 11}, l: &h[5]},
		{items: []string{v(7), v(8)}, values: []float32{300, 1}, l: &h[6]},
	}
	big := probeRow{l: &h[7]}
	for i := 0; i < 60; i++ {
		big.items = append(big.items, v(100+i))
		big.values = append(big.values, float32(1+(i*13)%40))
	}
	rows = append(rows, big)
	for i := 8; i < len(h) && len(rows) < 15; i++ {
		l := &h[i]
		if len(l.Items) < 2 || l.Anomalous || !distinct(l.Counts) {
			continue
		}
		items, vals := historyRow(d, l)
		rows = append(rows, probeRow{items: items, values: vals, l: l})
	}
	for _, set := range [][]Listener{d.Holdout, d.Extra, d.Train} {
		i := firstAnomalous(set)
		if i >= 0 {
			items, vals := historyRow(d, &set[i])
			rows = append(rows, probeRow{items: items, values: vals, l: &set[i]})
			break
		}
	}
	return rows
}

func distinct(x []float64) bool {
	for _, v := range x[1:] {
		if v != x[0] {
			return true
		}
	}
	return false
}

func firstAnomalous(ls []Listener) int {
	for i := range ls {
		if ls[i].Anomalous {
			return i
		}
	}
	return -1
}

func historyRow(d *Data, l *Listener) ([]string, []float32) {
	items := make([]string, len(l.Items))
	vals := make([]float32, len(l.Items))
	for k, j := range l.Items {
		items[k] = d.Shows[j].ID
		vals[k] = float32(l.Counts[k])
	}
	return items, vals
}

// probesFor computes m's probe rows with the float64 forward pass (enc is
// the encoder a scorer refers to, or nil) and stores the layers in expect
// as float32.
func (b *builder) probesFor(m, enc *modeldir.Model, expect []string) error {
	n, err := newNet64(m, enc)
	if err != nil {
		return err
	}
	m.Probes = nil
	for i, r := range b.probes {
		p := modeldir.Probe{Items: r.items, Values: r.values, Expect: map[string][]float32{}}
		all := denseFor(b.d, r.l)
		for _, in := range m.Spec.Inputs.Dense {
			if p.Dense == nil {
				p.Dense = map[string][]float32{}
			}
			p.Dense[in.Name] = all[in.Name]
		}
		out, err := n.eval(p.Items, p.Values, p.Dense, expect...)
		if err != nil {
			return fmt.Errorf("probe %d of %s: %w", i, m.Spec.Name, err)
		}
		for _, name := range expect {
			p.Expect[name] = to32(out[name])
		}
		m.Probes = append(m.Probes, p)
	}
	return nil
}
