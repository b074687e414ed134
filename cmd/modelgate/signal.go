package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"syscall"
	"time"

	"github.com/modelgate/modelgate/internal/fileio"
)

// interruptGrace is how long a command may take to unwind after SIGINT or
// SIGTERM (stop between chunks, discard what it staged) before the process
// leaves without it; a second signal leaves at once.
const interruptGrace = 10 * time.Second

// signalled is the cause of a context cancelled by a signal.
type signalled struct{ sig os.Signal }

func (s signalled) Error() string { return "interrupted by " + s.sig.String() }

// exitCode is the conventional code of a process ended by the signal:
// 128 + its number (SIGINT 130, SIGTERM 143).
func (s signalled) exitCode() int {
	if n, ok := s.sig.(syscall.Signal); ok {
		return 128 + int(n)
	}
	return 130
}

// stopOnSignal cancels the command's context on the first signal, with
// the signal as its cause, so the command unwinds and run returns the
// signal's exit code. If the command has not returned after
// interruptGrace, or a second signal comes, the process removes the
// temporary files it registered and exits with that code.
func stopOnSignal(sigs <-chan os.Signal, cancel context.CancelCauseFunc, stderr io.Writer) {
	first := signalled{<-sigs}
	cancel(first)
	t := time.NewTimer(interruptGrace)
	select {
	case <-sigs:
	case <-t.C:
	}
	fileio.RemoveRegistered()
	fmt.Fprintf(stderr, "modelgate: %v; stopped before the command finished unwinding\n", first)
	os.Exit(first.exitCode())
}

// interruptCode returns the exit code for an error returned after ctx was
// cancelled by a signal, and whether it was.
func interruptCode(ctx context.Context) (int, bool) {
	var s signalled
	if errors.As(context.Cause(ctx), &s) {
		return s.exitCode(), true
	}
	return 0, false
}
