//go:build !amd64 || purego

package kernel

// backends lists the implementations this CPU can run, fastest first.
func backends() []*backend { return []*backend{generic} }

var active = generic
