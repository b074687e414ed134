// Package checks runs the promotion gate's checks — integrity, freeze,
// contract, holdout, budget — and assembles the gate report.
package checks
