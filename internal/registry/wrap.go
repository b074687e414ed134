package registry

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"hash"
	"io"
	"net"
	"syscall"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
)

// ErrTransient marks a failure worth retrying: the network dropped, the
// service was overloaded or timed out. Remote backends wrap such errors
// with it; the retry wrapper (NewRetry) retries them and nothing else.
var ErrTransient = errors.New("transient failure")

// IsTransient reports whether err is worth retrying: it wraps ErrTransient
// or is a network error (reset, broken pipe, timeout, unexpected EOF). An
// error that says something about the content or the caller (not found,
// digest mismatch, conflict, bad input, integrity, not authorised) and a
// cancelled context are never transient.
func IsTransient(err error) bool {
	if err == nil || errors.Is(err, context.Canceled) || errors.Is(err, context.DeadlineExceeded) {
		return false
	}
	if errors.Is(err, ErrNotFound) || errors.Is(err, ErrDigestMismatch) || errors.Is(err, ErrConflict) {
		return false
	}
	switch errkind.Of(err) {
	case errkind.BadInput, errkind.Integrity, errkind.Conflict, errkind.Unauthorized:
		return false
	}
	if errors.Is(err, ErrTransient) || errors.Is(err, io.ErrUnexpectedEOF) ||
		errors.Is(err, syscall.ECONNRESET) || errors.Is(err, syscall.ECONNREFUSED) ||
		errors.Is(err, syscall.EPIPE) || errors.Is(err, net.ErrClosed) {
		return true
	}
	var ne net.Error
	return errors.As(err, &ne) && ne.Timeout()
}

// transient wraps err with ErrTransient (keeping err in the chain).
func transient(err error) error {
	if err == nil || errors.Is(err, ErrTransient) {
		return err
	}
	return fmt.Errorf("%w: %w", ErrTransient, err)
}

// wrapper is a store wrapping another one.
type wrapper interface {
	Store
	// Unwrap returns the wrapped store: abilities compose does not carry
	// are found along this chain (Ability).
	Unwrap() Store
	// self returns the wrapper itself (compose hides its other methods).
	self() Store
}

// compose returns a Store made of base plus exactly the optional abilities
// given non-nil, so that a type assertion on the result finds an ability
// only when the wrapped store has it.
func compose(base wrapper, sw TagSwapper, ml ManifestLister, sc Scrubber, dl wrapDeleter) Store {
	type (
		s  = wrapper
		w  = TagSwapper
		m  = ManifestLister
		sr = Scrubber
		d  = wrapDeleter
	)
	switch {
	case sw != nil && ml != nil && sc != nil && dl != nil:
		return struct {
			s
			w
			m
			sr
			d
		}{base, sw, ml, sc, dl}
	case sw != nil && ml != nil && sc != nil:
		return struct {
			s
			w
			m
			sr
		}{base, sw, ml, sc}
	case sw != nil && ml != nil && dl != nil:
		return struct {
			s
			w
			m
			d
		}{base, sw, ml, dl}
	case sw != nil && sc != nil && dl != nil:
		return struct {
			s
			w
			sr
			d
		}{base, sw, sc, dl}
	case ml != nil && sc != nil && dl != nil:
		return struct {
			s
			m
			sr
			d
		}{base, ml, sc, dl}
	case sw != nil && ml != nil:
		return struct {
			s
			w
			m
		}{base, sw, ml}
	case sw != nil && sc != nil:
		return struct {
			s
			w
			sr
		}{base, sw, sc}
	case sw != nil && dl != nil:
		return struct {
			s
			w
			d
		}{base, sw, dl}
	case ml != nil && sc != nil:
		return struct {
			s
			m
			sr
		}{base, ml, sc}
	case ml != nil && dl != nil:
		return struct {
			s
			m
			d
		}{base, ml, dl}
	case sc != nil && dl != nil:
		return struct {
			s
			sr
			d
		}{base, sc, dl}
	case sw != nil:
		return struct {
			s
			w
		}{base, sw}
	case ml != nil:
		return struct {
			s
			m
		}{base, ml}
	case sc != nil:
		return struct {
			s
			sr
		}{base, sc}
	case dl != nil:
		return struct {
			s
			d
		}{base, dl}
	}
	return struct{ s }{base}
}

// checkedReader hashes and counts what it reads from a remote body and,
// at its end, returns an error wrapping ErrDigestMismatch (errkind
// Integrity) instead of io.EOF when the bytes do not hash to want or differ
// from the expected size (size < 0: unknown). It never returns more than
// size bytes.
type checkedReader struct {
	rc   io.ReadCloser
	h    hash.Hash
	n    int64
	size int64
	want v1.Hash
	what string
	err  error // sticky: io.EOF or the failure
}

func newCheckedReader(rc io.ReadCloser, want v1.Hash, size int64, what string) *checkedReader {
	return &checkedReader{rc: rc, h: sha256.New(), size: size, want: want, what: what}
}

func (r *checkedReader) Read(p []byte) (int, error) {
	if r.err != nil {
		return 0, r.err
	}
	if r.size >= 0 && int64(len(p)) > r.size-r.n+1 {
		p = p[:r.size-r.n+1] // one byte more than expected shows an overlong body
	}
	n, err := r.rc.Read(p)
	if r.size >= 0 && r.n+int64(n) > r.size {
		r.err = errkind.New(errkind.Integrity, "reading %s: %w: more than the %d bytes expected", r.what, ErrDigestMismatch, r.size)
		return 0, r.err
	}
	r.h.Write(p[:n])
	r.n += int64(n)
	switch {
	case err == io.EOF:
		return n, r.finish()
	case err != nil:
		r.err = fmt.Errorf("reading %s: %w", r.what, transient(err))
		return n, r.err
	}
	return n, nil
}

func (r *checkedReader) finish() error {
	got := hex.EncodeToString(r.h.Sum(nil))
	switch {
	case r.size >= 0 && r.n != r.size:
		r.err = errkind.New(errkind.Integrity, "reading %s: %w: got %d bytes, want %d", r.what, ErrDigestMismatch, r.n, r.size)
	case got != r.want.Hex:
		r.err = errkind.New(errkind.Integrity, "reading %s: %w: content hashes to sha256:%s (%d bytes)", r.what, ErrDigestMismatch, got, r.n)
	default:
		r.err = io.EOF
	}
	return r.err
}

func (r *checkedReader) Close() error { return r.rc.Close() }

// uploadReader feeds an upload from r and refuses, before handing over the
// last byte, content that does not hash to want or is not exactly size
// bytes long: a server that commits when the body ends never sees a whole
// wrong body. Its error (errkind BadInput, wrapping ErrDigestMismatch) is
// kept in err for the caller to report.
type uploadReader struct {
	r    io.Reader
	h    hash.Hash
	n    int64
	size int64
	want v1.Hash
	err  error
	done bool
}

func newUploadReader(r io.Reader, want v1.Hash, size int64) *uploadReader {
	return &uploadReader{r: r, h: sha256.New(), size: size, want: want}
}

func (u *uploadReader) Read(p []byte) (int, error) {
	if u.err != nil {
		return 0, u.err
	}
	if u.done {
		return 0, io.EOF
	}
	if rem := u.size - u.n; int64(len(p)) > rem {
		p = p[:rem]
	}
	n := 0
	var err error
	if len(p) > 0 {
		n, err = io.ReadFull(u.r, p)
	}
	u.h.Write(p[:n])
	u.n += int64(n)
	if err == io.EOF || err == io.ErrUnexpectedEOF {
		u.err = errkind.New(errkind.BadInput, "uploading blob %s: %w: got %d bytes, want %d", u.want, ErrDigestMismatch, u.n, u.size)
		return 0, u.err
	}
	if err != nil {
		u.err = fmt.Errorf("reading the blob to upload: %w", err)
		return 0, u.err
	}
	if u.n < u.size {
		return n, nil
	}
	// The last bytes: check before handing them over.
	var one [1]byte
	if k, _ := io.ReadFull(u.r, one[:]); k > 0 {
		u.err = errkind.New(errkind.BadInput, "uploading blob %s: %w: more than the %d bytes declared", u.want, ErrDigestMismatch, u.size)
		return 0, u.err
	}
	if got := hex.EncodeToString(u.h.Sum(nil)); got != u.want.Hex {
		u.err = errkind.New(errkind.BadInput, "uploading blob %s: %w: content hashes to sha256:%s", u.want, ErrDigestMismatch, got)
		return 0, u.err
	}
	u.done = true
	return n, nil
}
