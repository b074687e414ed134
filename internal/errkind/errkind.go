// Package errkind classifies errors into the few kinds that map to
// modelgate's documented exit codes.
//
// Exit codes: 0 ok / gate passed; 1 gate failed; 2 usage or bad input;
// 3 conflict (the tag moved, a race lost); 4 not authorised; 5 integrity
// (digest or signature mismatch in the store).
package errkind

import (
	"errors"
	"fmt"
)

// Kind is the class of an error; its value is the process exit code.
type Kind int

// The kinds, valued as their exit codes.
const (
	Internal     Kind = 70 // a bug or an environment failure not covered below
	GateFailed   Kind = 1
	BadInput     Kind = 2
	Conflict     Kind = 3
	Unauthorized Kind = 4
	Integrity    Kind = 5
)

func (k Kind) String() string {
	switch k {
	case GateFailed:
		return "gate failed"
	case BadInput:
		return "bad input"
	case Conflict:
		return "conflict"
	case Unauthorized:
		return "not authorised"
	case Integrity:
		return "integrity"
	}
	return "internal"
}

type kindError struct {
	kind Kind
	err  error
}

func (e *kindError) Error() string { return e.err.Error() }
func (e *kindError) Unwrap() error { return e.err }

// Wrap marks err as being of kind k. A nil err stays nil.
func Wrap(k Kind, err error) error {
	if err == nil {
		return nil
	}
	return &kindError{kind: k, err: err}
}

// New returns a new error of kind k with a formatted message; %w works.
func New(k Kind, format string, args ...any) error {
	return &kindError{kind: k, err: fmt.Errorf(format, args...)}
}

// Of reports the kind of err: the outermost kind found while unwrapping,
// or Internal when no kind was set. Of(nil) is 0.
func Of(err error) Kind {
	if err == nil {
		return 0
	}
	var ke *kindError
	if errors.As(err, &ke) {
		return ke.kind
	}
	return Internal
}

// Is reports whether err is of kind k.
func Is(err error, k Kind) bool { return err != nil && Of(err) == k }
