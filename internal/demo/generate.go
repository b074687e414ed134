package demo

import (
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"sort"

	"github.com/modelgate/modelgate/internal/demo/listening"
	"github.com/modelgate/modelgate/internal/errkind"
)

// Config sets the size and the seed of the generated network. The zero
// value is not useful: start from DefaultConfig.
type Config struct {
	// Seed drives every random draw; the same Config gives the same Data.
	Seed uint64
	// Shows is the size of the network's catalogue.
	Shows int
	// LatentDim is the dimension of listeners' and shows' latent interests.
	LatentDim int
	// Promoted is how many shows the network promotes.
	Promoted int
	// Train, Holdout and Extra are the numbers of listeners in the training
	// set, the holdout, and a later sample of the same network used only to
	// refit the second encoder version.
	Train, Holdout, Extra int
	// Listening is the listening model: shows followed, popularity, episodes
	// played, anomalous listeners (package listening; invented for the demo).
	Listening listening.Model
	// EmptyRate is the fraction of listeners with no listening history yet.
	EmptyRate float64
	// VocabularyMinListeners is how many regular training listeners (at
	// most RegularMaxNonzeros shows) must have played a show for it to
	// enter the encoders' vocabulary; rarer shows fall into the unknown
	// bucket.
	VocabularyMinListeners int
	// CodeWidth is the code width of the encoders the scorers use;
	// WideCodeWidth that of listener-encoder:wide, an encoder built to fail
	// the encoder budget. Both must not exceed the vocabulary size.
	CodeWidth, WideCodeWidth int
}

// DefaultConfig is the demo's network, every figure invented for the demo:
// 3,000 shows, 24,000 training listeners, 5,000 holdout listeners, 10,000
// more for the refit, one listener in 25 with no history yet, the default
// listening model (listening.Default), and encoders with a 16-wide code
// (192-wide for the encoder built to fail its budget).
func DefaultConfig() Config {
	return Config{
		Seed: 20260201, Shows: 3000, LatentDim: 8, Promoted: 40,
		Train: 24000, Holdout: 5000, Extra: 10000,
		Listening: listening.Default(), EmptyRate: 0.04,
		VocabularyMinListeners: 12,
		CodeWidth:              16, WideCodeWidth: 192,
	}
}

// Validate reports, as a bad-input error, a Config Generate or Build
// cannot use.
func (c Config) Validate() error {
	switch {
	case c.Shows < 1 || c.LatentDim < 1 || c.Promoted < 1 || c.Train < 1 || c.Holdout < 16 || c.Extra < 0:
		return errkind.New(errkind.BadInput, "demo config: sizes must be positive (holdout at least 16): %+v", c)
	case !(c.Listening.FollowsPerSession >= 0) || c.Listening.MaxFollowed < 1 || !(c.Listening.PopularityExponent > 1) ||
		c.Listening.MaxPlays < 1 || c.Listening.AnomalyMaxPlays < 1 || !(c.Listening.PlaysLogSpread >= 0):
		return errkind.New(errkind.BadInput, "demo config: listening model %+v: want follows per session ≥ 0, popularity exponent > 1, caps ≥ 1", c.Listening)
	case !(c.EmptyRate >= 0 && c.EmptyRate < 1) || !(c.Listening.AnomalyRate >= 0 && c.Listening.AnomalyRate < 1):
		return errkind.New(errkind.BadInput, "demo config: rates must lie in [0,1)")
	case c.Listening.AnomalyMin < 1 || c.Listening.AnomalyMax < c.Listening.AnomalyMin || c.Listening.AnomalyMax > c.Shows:
		return errkind.New(errkind.BadInput, "demo config: anomalous listeners touch %d..%d shows, want 1 ≤ min ≤ max ≤ shows", c.Listening.AnomalyMin, c.Listening.AnomalyMax)
	case c.CodeWidth < 1 || c.WideCodeWidth < c.CodeWidth:
		return errkind.New(errkind.BadInput, "demo config: code widths %d and %d, want 1 ≤ code ≤ wide", c.CodeWidth, c.WideCodeWidth)
	}
	return nil
}

// Categories are the show categories; a show's dense features one-hot its
// category in this order.
var Categories = []string{"news", "comedy", "true-crime", "sports", "science", "business"}

// RegularMaxNonzeros bounds the history of a listener counted as regular
// when choosing the vocabulary: above the most shows a regular listener
// follows (listening.Model.MaxFollowed), below the fewest an anomalous one
// touches.
const RegularMaxNonzeros = 120

// Show is one show of the catalogue.
type Show struct {
	ID         string // "show-00042"
	Category   int    // index into Categories
	Latent     []float64
	Popularity float64 // relative play probability within its category
	AgeYears   float64
	Episodes   int
	Promoted   bool
}

// Listener is one listener with one promotion shown to them.
type Listener struct {
	ID string
	// Items and Counts are the shows played (indices into Data.Shows,
	// distinct) and episodes played of each (1..listening.Model.MaxPlays).
	Items  []int
	Counts []float64
	Latent []float64
	// TenureDays and SessionsPerWeek describe the listener.
	TenureDays      float64
	SessionsPerWeek float64
	Anomalous       bool
	// Cohort is "new", "regular" or "heavy": the holdout's slice.
	Cohort string
	// Promo is the promoted show (index into Data.Shows) and Label whether
	// the listener subscribed to it (0 or 1).
	Promo int
	Label float64
}

// Data is a generated network.
type Data struct {
	Config                Config
	Shows                 []Show
	Train, Holdout, Extra []Listener
	// PromotedShows lists the promoted shows' indices.
	PromotedShows []int
}

// Random streams, one per part, so that the parts do not shift each other.
const (
	streamShows = iota + 1
	streamTrain
	streamHoldout
	streamExtra
)

type generator struct {
	cfg       Config
	shows     []Show
	centroids [][]float64
	propensty []float64 // direction of a general taste for subscribing
	catBias   []float64
	byCat     [][]int     // shows of each category
	cumPop    [][]float64 // cumulative popularity within each category
	catShare  []float64
}

// Generate draws a network from cfg. Listeners have a latent interest
// vector near the centroid of a favourite category; they pick a category
// by softmax of interest·centroid, then the best (by interest·show latent)
// of three shows drawn by popularity within it. Popularity, the number of
// shows a listener follows (it grows with their sessions per week), the
// episodes played and the anomalous listeners, who touch hundreds of shows,
// come from cfg.Listening. The label — subscribed to the promoted show — is
// drawn from a logistic model of interest·promoted-show latent, a general
// subscription propensity, and the dense features of listener and show.
// It panics if cfg.Validate fails.
func Generate(cfg Config) *Data {
	if err := cfg.Validate(); err != nil {
		panic(err)
	}
	g := &generator{cfg: cfg}
	r := rand.New(rand.NewPCG(cfg.Seed, streamShows))
	d := cfg.LatentDim
	nc := len(Categories)
	g.centroids = make([][]float64, nc)
	for k := range g.centroids {
		g.centroids[k] = scaled(randn(r, d), 1.6)
	}
	g.propensty = scaled(randn(r, d), 1)
	g.catBias = make([]float64, nc)
	for k := range g.catBias {
		g.catBias[k] = 0.3 * r.NormFloat64()
	}
	rank := r.Perm(cfg.Shows)
	g.shows = make([]Show, cfg.Shows)
	g.byCat = make([][]int, nc)
	for j := range g.shows {
		cat := r.IntN(nc)
		lat := randn(r, d)
		for i := range lat {
			lat[i] = g.centroids[cat][i] + 0.7*lat[i]
		}
		age := 0.1 + 7.9*r.Float64()
		g.shows[j] = Show{
			ID: fmt.Sprintf("show-%05d", j), Category: cat, Latent: lat,
			Popularity: cfg.Listening.Popularity(rank[j] + 1),
			AgeYears:   age,
			Episodes:   max(1, int(age*52*(0.1+0.9*r.Float64()))),
		}
		g.byCat[cat] = append(g.byCat[cat], j)
	}
	g.cumPop = make([][]float64, nc)
	g.catShare = make([]float64, nc)
	total := 0.0
	for k, js := range g.byCat {
		c := make([]float64, len(js))
		s := 0.0
		for i, j := range js {
			s += g.shows[j].Popularity
			c[i] = s
		}
		g.cumPop[k] = c
		g.catShare[k] = s
		total += s
	}
	for k := range g.catShare {
		g.catShare[k] /= total
	}
	// The network promotes shows among the 400 most popular.
	byPop := make([]int, cfg.Shows)
	for j := range byPop {
		byPop[j] = j
	}
	sort.Slice(byPop, func(a, b int) bool { return g.shows[byPop[a]].Popularity > g.shows[byPop[b]].Popularity })
	top := byPop[:min(400, len(byPop))]
	var promoted []int
	for _, i := range r.Perm(len(top))[:min(cfg.Promoted, len(top))] {
		promoted = append(promoted, top[i])
		g.shows[top[i]].Promoted = true
	}
	slices.Sort(promoted)

	data := &Data{Config: cfg, Shows: g.shows, PromotedShows: promoted}
	data.Train = g.listeners(streamTrain, "train", cfg.Train, promoted)
	data.Holdout = g.listeners(streamHoldout, "holdout", cfg.Holdout, promoted)
	data.Extra = g.listeners(streamExtra, "extra", cfg.Extra, promoted)
	return data
}

func randn(r *rand.Rand, n int) []float64 {
	v := make([]float64, n)
	for i := range v {
		v[i] = r.NormFloat64()
	}
	return v
}

// scaled returns v rescaled to Euclidean norm s.
func scaled(v []float64, s float64) []float64 {
	n := math.Sqrt(dot(v, v))
	for i := range v {
		v[i] *= s / n
	}
	return v
}

func dot(a, b []float64) float64 {
	s := 0.0
	for i := range a {
		s += a[i] * b[i]
	}
	return s
}

func (g *generator) listeners(stream uint64, prefix string, n int, promoted []int) []Listener {
	r := rand.New(rand.NewPCG(g.cfg.Seed, stream))
	out := make([]Listener, n)
	for i := range out {
		out[i] = g.listener(r, fmt.Sprintf("%s-%06d", prefix, i), promoted)
	}
	return out
}

func (g *generator) listener(r *rand.Rand, id string, promoted []int) Listener {
	cfg := g.cfg
	nc := len(Categories)
	// Favourite category by catalogue share; interest near its centroid.
	fav := pick(r, g.catShare)
	u := randn(r, cfg.LatentDim)
	for i := range u {
		u[i] = 0.9*g.centroids[fav][i] + 0.5*u[i]
	}
	l := Listener{
		ID: id, Latent: u,
		TenureDays:      1 + r.ExpFloat64()*500,
		SessionsPerWeek: listening.SessionsPerWeek(r),
	}
	heavyFactor := 0.6 + l.SessionsPerWeek/5
	switch {
	case cfg.Listening.Anomalous(r):
		l.Anomalous = true
		l.Items, l.Counts = cfg.Listening.AnomalousRow(r, cfg.Shows)
	case r.Float64() < cfg.EmptyRate:
		l.TenureDays = 1 + 20*r.Float64()
	default:
		nnz := cfg.Listening.Followed(r, l.SessionsPerWeek)
		logits := make([]float64, nc)
		for k := range logits {
			logits[k] = dot(u, g.centroids[k]) + math.Log(g.catShare[k])
		}
		probs := softmax(logits)
		seen := map[int]bool{}
		for len(l.Items) < nnz {
			var j int
			for try := 0; try < 20; try++ {
				k := pick(r, probs)
				j = g.bestOfThree(r, k, u)
				if !seen[j] {
					break
				}
			}
			if seen[j] {
				break
			}
			seen[j] = true
			aff := dot(u, g.shows[j].Latent)
			l.Items = append(l.Items, j)
			l.Counts = append(l.Counts, cfg.Listening.Plays(r, math.Exp(0.15*aff)*heavyFactor, g.shows[j].Episodes))
		}
	}
	switch {
	case l.TenureDays < 60:
		l.Cohort = "new"
	case l.SessionsPerWeek >= 8 || len(l.Items) >= 12:
		l.Cohort = "heavy"
	default:
		l.Cohort = "regular"
	}
	l.Promo = promoted[r.IntN(len(promoted))]
	eta := g.logit(&l)
	if r.Float64() < 1/(1+math.Exp(-eta)) {
		l.Label = 1
	}
	return l
}

// logit is the true log-odds that l subscribes to their promoted show.
func (g *generator) logit(l *Listener) float64 {
	s := &g.shows[l.Promo]
	lf := ListenerFeatures(l)
	sf := ShowFeatures(s)
	return -2.4 +
		1.1*(dot(l.Latent, s.Latent)-1) +
		0.5*dot(l.Latent, g.propensty) +
		1.5*(float64(lf[1])-0.4) + 0.6*(float64(lf[0])-0.8) +
		0.4*float64(sf[1]) - 0.5*float64(sf[0]) +
		g.catBias[s.Category]
}

// bestOfThree draws three shows of category k by popularity and keeps the
// one the listener likes most.
func (g *generator) bestOfThree(r *rand.Rand, k int, u []float64) int {
	best, bestScore := -1, math.Inf(-1)
	cum := g.cumPop[k]
	for t := 0; t < 3; t++ {
		x := r.Float64() * cum[len(cum)-1]
		i := sort.SearchFloat64s(cum, x)
		if i == len(cum) {
			i--
		}
		j := g.byCat[k][i]
		if s := dot(u, g.shows[j].Latent); s > bestScore {
			best, bestScore = j, s
		}
	}
	return best
}

func pick(r *rand.Rand, probs []float64) int {
	x := r.Float64()
	for i, p := range probs {
		if x < p {
			return i
		}
		x -= p
	}
	return len(probs) - 1
}

func softmax(x []float64) []float64 {
	m := slices.Max(x)
	out := make([]float64, len(x))
	s := 0.0
	for i, v := range x {
		out[i] = math.Exp(v - m)
		s += out[i]
	}
	for i := range out {
		out[i] /= s
	}
	return out
}

// Dense input names and sizes of the scorers.
const (
	// InputListener describes the listener: tenure and activity.
	InputListener = "listener"
	// InputShow describes the promoted show: age, episode count, category.
	InputShow = "show"
	// InputAffinity is the share of the listener's listening in the
	// promoted show's category: it varies per candidate, so it is an item
	// input.
	InputAffinity = "category_affinity"
	// InputSparse is the sparse input: episodes played per show.
	InputSparse = "episodes_played"
)

// ListenerFeatures returns the listener's dense input: log1p(tenure days)/7
// and sessions per week/10.
func ListenerFeatures(l *Listener) []float32 {
	return []float32{float32(math.Log1p(l.TenureDays) / 7), float32(l.SessionsPerWeek / 10)}
}

// ShowFeatures returns the show's dense input: age in years/8,
// log1p(episodes)/6, then the category one-hot.
func ShowFeatures(s *Show) []float32 {
	f := make([]float32, 2+len(Categories))
	f[0] = float32(s.AgeYears / 8)
	f[1] = float32(math.Log1p(float64(s.Episodes)) / 6)
	f[2+s.Category] = 1
	return f
}

// AffinityFeature returns the share of the listener's log1p-episodes spent
// in the promoted show's category (0 with no history).
func AffinityFeature(d *Data, l *Listener) []float32 {
	cat := d.Shows[l.Promo].Category
	in, all := 0.0, 0.0
	for i, j := range l.Items {
		v := math.Log1p(l.Counts[i])
		all += v
		if d.Shows[j].Category == cat {
			in += v
		}
	}
	if all == 0 {
		return []float32{0}
	}
	return []float32{float32(in / all)}
}
