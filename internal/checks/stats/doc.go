// Package stats computes the holdout check's numbers from float slices:
// log loss and its companions (normalized entropy, AUC, calibration), the
// paired non-inferiority test (cluster-robust when rows are clustered)
// with a Poisson bootstrap, the label-free tail statistics, encoder
// reconstruction losses, quantiles and histograms.
//
// # Shards
//
// Every accumulator (Binary, Paired, Recon, Histogram) is mergeable: a
// holdout split into shards, each shard fed to its own accumulator and the
// accumulators merged, gives the same result as one accumulator fed every
// row, up to float64 summation order. Rows are summed in plain float64
// within chunks of 1,024 and the chunk sums are added with compensation
// (each total carries its rounding error), so merged and single-pass sums
// agree to about 1e-13 relative for non-negative terms (1,024 ulp at
// worst), and to that times Σ|x| / |Σx| for signed sums such as Σw·d; the
// AUC histogram's bins are plain sums (exact for integer weights). The
// Poisson-bootstrap draws of Paired depend only on (seed, row id,
// replicate), never on shard boundaries or row order; a clustered Paired
// (NewClusteredPaired) keys them by cluster instead of row, and keeps each
// cluster's sums so that a cluster split across shards merges exactly.
// Tail (confident mistakes, label-free) merges its counts and worst rows. Accumulators travel
// between machines through MarshalBinary and UnmarshalBinary.
//
// To use several cores on one machine, do the same: one accumulator per
// goroutine over its share of the rows, then Merge.
//
// # Numbers
//
// Inputs are float32 (as the runtime produces them) or float64 where a
// function says so; all arithmetic is float64. Probabilities are clipped to
// [Eps, 1−Eps] before a logarithm is taken (see Eps).
//
// On amd64 CPUs with AVX-512F the Poisson bootstrap's replicate sums run
// in an assembly kernel (16 replicates per pass over a chunk's rows) that
// makes the same float64 operations in the same order as the Go code, so
// results are bit-identical with or without it; the purego build tag
// keeps the Go code.
//
// The package has no model or runtime dependency (only the standard
// library, gonum and errkind). Bin and Test have the fields of
// checks.CalibrationBin and checks.NonInferiority, so the caller converts
// them with a plain type conversion; Histogram's Min, Max and Counts are
// those of checks.Histogram.
package stats
