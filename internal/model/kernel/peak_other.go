//go:build !amd64 || purego

package kernel

// fmaPeak: the portable path has no peak loop.
func fmaPeak() (func(n int), float64) { return nil, 0 }
