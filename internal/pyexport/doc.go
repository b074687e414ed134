// Package pyexport holds the tests of the Python export package
// (python/modelgate_export in the repository): tiny models trained in
// numpy, PyTorch, scikit-learn and ONNX (through PyTorch's exporter) are
// written by the package, pushed, scored and gated with the modelgate
// binary, and the runtime's outputs are compared with each framework's own
// forward pass. The package has no code of its own.
package pyexport
