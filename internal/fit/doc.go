// Package fit fits the small models the demo scenario and the example
// exporters need: a truncated principal component analysis of a sparse
// activity matrix (the optimum of a linear autoencoder) and an unregularised
// logistic regression. Both compute in float64 with gonum's dense linear
// algebra and are deterministic for a given input.
//
// Package fit is a training-side tool: the gate never calls it. It also
// holds the type-7 quantile used for training statistics.
package fit
