// Package demo builds modelgate's demo scenario: a fictional podcast
// network whose listeners play episodes of shows, an encoder of listening
// history, and scorers that predict whether a listener subscribes to a
// promoted show.
//
// Generate draws the network from a seeded latent-interest model; Build
// fits the models on it (package fit) and writes everything a demo pushes
// and gates: model directories (package modeldir), holdout files (package
// data), and a Scenario that says what to push in which order and under
// which tags. Every model is fitted for real, and every probe row's
// expected output comes from this package's own float64 forward pass, not
// from the runtime the gate uses.
//
// The same Config always gives byte-identical files.
package demo
