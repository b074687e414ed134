package registry

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"
)

// RetryOptions tune NewRetry. Zero fields take the defaults.
type RetryOptions struct {
	// Attempts is the number of tries of one operation (default 6).
	Attempts int
	// Initial is the wait before the first retry (default 250ms); each
	// further wait doubles, up to Max (default 8s), with full jitter.
	Initial, Max time.Duration
	// Sleep waits (default: a timer that ctx can cancel); tests replace it.
	Sleep func(ctx context.Context, d time.Duration) error
	// Notify, when set, is told of every retry.
	Notify func(op string, err error, wait time.Duration)
}

// retryStore retries a store's operations that fail with a transient error
// (IsTransient), with exponential backoff and full jitter (restic's
// backend/retry does the same for its backends).
type retryStore struct {
	s Store
	o RetryOptions
}

// NewRetry wraps s so that operations failing with a transient error are
// tried again. The result has exactly the optional abilities (TagSwapper,
// ManifestLister, Scrubber, Deleter) that s has.
//
// What a retry can and cannot do:
//   - Reads are retried; a blob reader that fails mid-stream reopens the
//     blob and skips what it already returned (the inner store still
//     verifies the whole content).
//   - PutBlob is retried when its reader is an io.Seeker (rewound to where
//     it started) or nothing was read from it yet; otherwise the error is
//     returned.
//   - SwapTag: when a retry of a swap whose earlier attempt failed
//     transiently after it wrote (or may have written) the tag finds the
//     tag moved, and moved to desc, the earlier attempt may have landed: it
//     reports success. The outcome (the tag at desc) is the one asked for;
//     who moved it cannot be told apart. An attempt that failed before
//     writing (a backend marks it) makes no such claim.
func NewRetry(s Store, o RetryOptions) Store {
	if o.Attempts <= 0 {
		o.Attempts = 6
	}
	if o.Initial <= 0 {
		o.Initial = 250 * time.Millisecond
	}
	if o.Max <= 0 {
		o.Max = 8 * time.Second
	}
	if o.Sleep == nil {
		o.Sleep = sleepCtx
	}
	r := &retryStore{s: s, o: o}
	var (
		sw TagSwapper
		ml ManifestLister
		sc Scrubber
	)
	if _, ok := s.(TagSwapper); ok {
		sw = retrySwapper{r}
	}
	if _, ok := s.(ManifestLister); ok {
		ml = retryLister{r}
	}
	if _, ok := s.(Scrubber); ok {
		sc = retryScrubber{r}
	}
	var dl wrapDeleter
	if _, ok := s.(Deleter); ok {
		dl = retryDeleter{r}
	}
	return compose(r, sw, ml, sc, dl)
}

func sleepCtx(ctx context.Context, d time.Duration) error {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
		return ctx.Err()
	case <-t.C:
		return nil
	}
}

// do runs f until it succeeds, fails for good, or the attempts run out.
// before, when set, runs before every retry and may refuse it.
func (r *retryStore) do(ctx context.Context, op string, f func() error, before func() error) error {
	wait := r.o.Initial
	var err error
	for i := 0; ; i++ {
		err = f()
		if err == nil || !IsTransient(err) || i+1 >= r.o.Attempts {
			break
		}
		d := time.Duration(rand.Int64N(int64(wait))) + 1 // full jitter
		if r.o.Notify != nil {
			r.o.Notify(op, err, d)
		}
		if serr := r.o.Sleep(ctx, d); serr != nil {
			return fmt.Errorf("%w (then: %w)", err, serr)
		}
		if wait *= 2; wait > r.o.Max {
			wait = r.o.Max
		}
		if before != nil {
			if berr := before(); berr != nil {
				return fmt.Errorf("%w (not retried: %w)", err, berr)
			}
		}
	}
	if err != nil && IsTransient(err) {
		return fmt.Errorf("%s: gave up after %d attempts: %w", op, r.o.Attempts, err)
	}
	return err
}

func (r *retryStore) String() string { return r.s.String() }

// Unwrap returns the wrapped store.
func (r *retryStore) Unwrap() Store { return r.s }
func (r *retryStore) self() Store   { return r }

func (r *retryStore) Resolve(ctx context.Context, repo, tag string) (d v1.Descriptor, err error) {
	err = r.do(ctx, "resolving "+repo+":"+tag, func() error { d, err = r.s.Resolve(ctx, repo, tag); return err }, nil)
	return d, err
}

func (r *retryStore) Manifest(ctx context.Context, repo string, dgst v1.Hash) (raw []byte, d v1.Descriptor, err error) {
	err = r.do(ctx, "reading manifest "+dgst.String(), func() error { raw, d, err = r.s.Manifest(ctx, repo, dgst); return err }, nil)
	return raw, d, err
}

func (r *retryStore) PutManifest(ctx context.Context, repo string, mt types.MediaType, raw []byte) (d v1.Descriptor, err error) {
	err = r.do(ctx, "putting a manifest into "+repo, func() error { d, err = r.s.PutManifest(ctx, repo, mt, raw); return err }, nil)
	return d, err
}

func (r *retryStore) StatBlob(ctx context.Context, repo string, dgst v1.Hash) (n int64, err error) {
	err = r.do(ctx, "stat blob "+dgst.String(), func() error { n, err = r.s.StatBlob(ctx, repo, dgst); return err }, nil)
	return n, err
}

func (r *retryStore) Tag(ctx context.Context, repo, tag string, desc v1.Descriptor) error {
	return r.do(ctx, "tagging "+repo+":"+tag, func() error { return r.s.Tag(ctx, repo, tag, desc) }, nil)
}

func (r *retryStore) Repositories(ctx context.Context) (out []string, err error) {
	err = r.do(ctx, "listing repositories", func() error { out, err = r.s.Repositories(ctx); return err }, nil)
	return out, err
}

func (r *retryStore) Tags(ctx context.Context, repo string) (out []string, err error) {
	err = r.do(ctx, "listing tags of "+repo, func() error { out, err = r.s.Tags(ctx, repo); return err }, nil)
	return out, err
}

func (r *retryStore) Referrers(ctx context.Context, repo string, subject v1.Hash, artifactType string) (out []v1.Descriptor, err error) {
	err = r.do(ctx, "listing referrers of "+subject.String(), func() error {
		out, err = r.s.Referrers(ctx, repo, subject, artifactType)
		return err
	}, nil)
	return out, err
}

// countingReader counts what was read through it.
type countingReader struct {
	r io.Reader
	n int64
}

func (c *countingReader) Read(p []byte) (int, error) {
	n, err := c.r.Read(p)
	c.n += int64(n)
	return n, err
}

func (r *retryStore) PutBlob(ctx context.Context, repo string, dgst v1.Hash, size int64, body io.Reader) error {
	cr := &countingReader{r: body}
	seeker, canSeek := body.(io.Seeker)
	var start int64
	if canSeek {
		var err error
		if start, err = seeker.Seek(0, io.SeekCurrent); err != nil {
			canSeek = false
		}
	}
	before := func() error {
		if cr.n == 0 {
			return nil
		}
		if !canSeek {
			return errors.New("the upload's reader cannot be rewound")
		}
		if _, err := seeker.Seek(start, io.SeekStart); err != nil {
			return fmt.Errorf("rewinding the upload's reader: %w", err)
		}
		cr.n = 0
		return nil
	}
	return r.do(ctx, "uploading blob "+dgst.String(), func() error { return r.s.PutBlob(ctx, repo, dgst, size, cr) }, before)
}

func (r *retryStore) Blob(ctx context.Context, repo string, dgst v1.Hash) (io.ReadCloser, error) {
	var rc io.ReadCloser
	err := r.do(ctx, "reading blob "+dgst.String(), func() error {
		var err error
		rc, err = r.s.Blob(ctx, repo, dgst)
		return err
	}, nil)
	if err != nil {
		return nil, err
	}
	return &resumingReader{r: r, ctx: ctx, repo: repo, dgst: dgst, rc: rc}, nil
}

// resumingReader reopens a blob after a transient read failure and skips
// the bytes it already returned.
type resumingReader struct {
	r     *retryStore
	ctx   context.Context
	repo  string
	dgst  v1.Hash
	rc    io.ReadCloser
	n     int64
	tries int
}

func (rr *resumingReader) Read(p []byte) (int, error) {
	n, err := rr.rc.Read(p)
	rr.n += int64(n)
	if err == nil || err == io.EOF || !IsTransient(err) {
		return n, err
	}
	// Reopen now; the bytes read (if any) are returned without the error.
	rr.rc.Close()
	if rerr := rr.reopen(); rerr != nil {
		return n, fmt.Errorf("%w (resuming: %w)", err, rerr)
	}
	return n, nil
}

func (rr *resumingReader) reopen() error {
	rr.tries++
	if rr.tries >= rr.r.o.Attempts {
		return fmt.Errorf("reading blob %s: gave up resuming after %d attempts", rr.dgst, rr.tries)
	}
	if err := rr.r.o.Sleep(rr.ctx, rr.r.o.Initial); err != nil {
		return err
	}
	var rc io.ReadCloser
	err := rr.r.do(rr.ctx, "reopening blob "+rr.dgst.String(), func() error {
		var err error
		if rc, err = rr.r.s.Blob(rr.ctx, rr.repo, rr.dgst); err != nil {
			return err
		}
		if _, err = io.CopyN(io.Discard, rc, rr.n); err != nil {
			rc.Close()
			return fmt.Errorf("reading blob %s: skipping %d bytes already read: %w", rr.dgst, rr.n, err)
		}
		return nil
	}, nil)
	if err != nil {
		return err
	}
	rr.rc = rc
	return nil
}

func (rr *resumingReader) Close() error { return rr.rc.Close() }

type retrySwapper struct{ r *retryStore }

func (w retrySwapper) SwapTag(ctx context.Context, repo, tag string, old v1.Hash, desc v1.Descriptor) error {
	sw := w.r.s.(TagSwapper)
	failedBefore := false
	return w.r.do(ctx, "swapping "+repo+":"+tag, func() error {
		err := sw.SwapTag(ctx, repo, tag, old, desc)
		if errors.Is(err, ErrConflict) && failedBefore {
			if cur, rerr := w.r.s.Resolve(ctx, repo, tag); rerr == nil && cur.Digest == desc.Digest {
				return nil
			}
		}
		if IsTransient(err) && !errors.Is(err, errSwapUntried) {
			failedBefore = true // the write may have landed
		}
		return err
	}, nil)
}

// errSwapUntried marks a SwapTag failure that came before the tag was
// written, so a retry that finds the tag at desc knows another writer put
// it there (a conflict), not its own earlier attempt. It is added to the
// error's chain with an empty message.
var errSwapUntried = untried{}

type untried struct{}

func (untried) Error() string { return "" }

type retryLister struct{ r *retryStore }

func (w retryLister) Manifests(ctx context.Context, repo string) (out []v1.Descriptor, err error) {
	err = w.r.do(ctx, "listing manifests of "+repo, func() error {
		out, err = w.r.s.(ManifestLister).Manifests(ctx, repo)
		return err
	}, nil)
	return out, err
}

type retryScrubber struct{ r *retryStore }

func (w retryScrubber) Scrub(ctx context.Context, referenced map[v1.Hash]bool) (out []Finding, err error) {
	err = w.r.do(ctx, "scrubbing", func() error {
		out, err = w.r.s.(Scrubber).Scrub(ctx, referenced)
		return err
	}, nil)
	return out, err
}
