// Package stats computes the holdout check's numbers from float slices:
// log loss and its companions (normalized entropy, AUC, calibration), the
// paired non-inferiority test with a Poisson bootstrap, encoder
// reconstruction losses, quantiles and histograms.
//
// # Shards
//
// Every accumulator (Binary, Paired, Recon, Histogram) is mergeable: a
// holdout split into shards, each shard fed to its own accumulator and the
// accumulators merged, gives the same result as one accumulator fed every
// row, up to float64 summation order. Sums are kept compensated (each sum
// carries its rounding error), so a merged result and a single-pass result
// agree to within a few units in the last place for sums of non-negative
// terms, and to about 1e-15 × (Σ|x| / |Σx|) relative for signed sums. The
// Poisson-bootstrap draws of Paired depend only on (seed, row id,
// replicate), never on shard boundaries or row order.
//
// # Numbers
//
// Inputs are float32 (as the runtime produces them) or float64 where a
// function says so; all arithmetic is float64. Probabilities are clipped to
// [Eps, 1−Eps] before a logarithm is taken (see Eps).
//
// The package has no model or runtime dependency. Result types mirror the
// report types of package checks field for field, so the caller converts
// them with a plain type conversion.
package stats
