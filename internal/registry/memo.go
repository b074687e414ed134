package registry

import (
	"bytes"
	"container/list"
	"context"
	"errors"
	"io"
	"sync"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"
)

// memoStore keeps verified manifests and small blobs in memory, by
// repository and digest: content addressed, so a copy never goes stale.
// Tags, tag lists, manifest lists and referrers are asked of the wrapped
// store once per request memo (WithRequestMemo) and never kept longer.
// It lends itself to the stores under it as their contentCache, so that
// a registry store reads each referrer's manifest once.
type memoStore struct {
	Store
	mu    sync.Mutex
	max   int64
	used  int64
	order *list.List // front: most recently used
	items map[string]*list.Element
	links map[string]v1.Hash // per-referrer link tag → the manifest it resolved to
}

type memoItem struct {
	key  string
	raw  []byte
	desc v1.Descriptor // manifests
}

// requestMemo holds what one request (a page) asked the store for
// repeatedly: tag lists, tag targets and referrers, which can change
// between requests but not within one.
type requestMemo struct {
	mu    sync.Mutex
	calls map[string]*memoCall
}

// memoCall is one question to the store; callers asking the same question
// while it is being answered wait for its answer.
type memoCall struct {
	done chan struct{}
	val  any
	err  error
}

type requestMemoKey struct{}

// WithRequestMemo returns a context under which a store made by NewMemo
// answers each Tags, Resolve, Manifests and Referrers question once (and a
// registry store each tag list, tag target and referrers listing): for
// the reads of one web page, which may ask for the same tag list many
// times. Only for reads: a write under it could compare against a tag
// target read earlier in the request.
func WithRequestMemo(ctx context.Context) context.Context {
	return context.WithValue(ctx, requestMemoKey{}, &requestMemo{calls: map[string]*memoCall{}})
}

// remember returns the memo's answer to key, or computes and keeps it.
// Concurrent callers with the same key share one computation. Errors are
// not kept: the next caller asks again.
func remember[T any](ctx context.Context, key string, f func() (T, error)) (T, error) {
	rm, _ := ctx.Value(requestMemoKey{}).(*requestMemo)
	if rm == nil {
		return f()
	}
	rm.mu.Lock()
	c, ok := rm.calls[key]
	if !ok {
		c = &memoCall{done: make(chan struct{})}
		rm.calls[key] = c
	}
	rm.mu.Unlock()
	if ok {
		<-c.done
		if c.err != nil {
			var zero T
			return zero, c.err
		}
		return c.val.(T), nil
	}
	finished := false
	defer func() {
		if !finished { // f panicked: release the waiters
			c.err = errors.New("reading the store failed")
			rm.mu.Lock()
			delete(rm.calls, key)
			rm.mu.Unlock()
			close(c.done)
		}
	}()
	t, err := f()
	c.val, c.err = t, err
	if err != nil {
		rm.mu.Lock()
		delete(rm.calls, key)
		rm.mu.Unlock()
	}
	finished = true
	close(c.done)
	return t, err
}

func (m *memoStore) Tags(ctx context.Context, repo string) ([]string, error) {
	tags, err := remember(ctx, "tags "+repo, func() ([]string, error) { return m.Store.Tags(ctx, repo) })
	return append([]string(nil), tags...), err
}

func (m *memoStore) Resolve(ctx context.Context, repo, tag string) (v1.Descriptor, error) {
	return remember(ctx, "resolve "+repo+":"+tag, func() (v1.Descriptor, error) { return m.Store.Resolve(ctx, repo, tag) })
}

func (m *memoStore) Referrers(ctx context.Context, repo string, subject v1.Hash, artifactType string) ([]v1.Descriptor, error) {
	ds, err := remember(ctx, "referrers "+repo+"@"+subject.String()+" "+artifactType, func() ([]v1.Descriptor, error) {
		return m.Store.Referrers(withContentCache(ctx, m), repo, subject, artifactType)
	})
	return append([]v1.Descriptor(nil), ds...), err
}

func (m *memoStore) Repositories(ctx context.Context) ([]string, error) {
	rs, err := remember(ctx, "repositories", func() ([]string, error) { return m.Store.Repositories(ctx) })
	return append([]string(nil), rs...), err
}

// memoLister answers Manifests once per request memo.
type memoLister struct{ ml ManifestLister }

func (l memoLister) Manifests(ctx context.Context, repo string) ([]v1.Descriptor, error) {
	ds, err := remember(ctx, "manifests "+repo, func() ([]v1.Descriptor, error) { return l.ml.Manifests(ctx, repo) })
	return append([]v1.Descriptor(nil), ds...), err
}

// memoBlobMax is the largest blob kept in memory.
const memoBlobMax = 1 << 20

// NewMemo wraps s so that manifests and blobs up to 1 MiB, once read and
// verified, are served from memory (at most max bytes, least recently
// used dropped first): for a long-running reader such as the web view,
// whose pages read the same reports and specs again and again. The
// result has exactly the optional abilities of s.
func NewMemo(s Store, max int64) Store {
	w := &memoStore{Store: s, max: max, order: list.New(), items: map[string]*list.Element{}, links: map[string]v1.Hash{}}
	sw, _ := s.(TagSwapper)
	var ml ManifestLister
	if l, ok := s.(ManifestLister); ok {
		ml = memoLister{l}
	}
	sc, _ := s.(Scrubber)
	var dl wrapDeleter
	if _, ok := s.(Deleter); ok {
		dl = memoDeleter{w}
	}
	return compose(w, sw, ml, sc, dl)
}

func (m *memoStore) Unwrap() Store { return m.Store }
func (m *memoStore) self() Store   { return m }

func (m *memoStore) get(key string) (*memoItem, bool) {
	m.mu.Lock()
	defer m.mu.Unlock()
	e, ok := m.items[key]
	if !ok {
		return nil, false
	}
	m.order.MoveToFront(e)
	return e.Value.(*memoItem), true
}

func (m *memoStore) put(it *memoItem) {
	m.mu.Lock()
	defer m.mu.Unlock()
	if _, ok := m.items[it.key]; ok || int64(len(it.raw)) > m.max {
		return
	}
	m.items[it.key] = m.order.PushFront(it)
	m.used += int64(len(it.raw))
	for m.used > m.max {
		e := m.order.Back()
		old := e.Value.(*memoItem)
		m.order.Remove(e)
		delete(m.items, old.key)
		m.used -= int64(len(old.raw))
	}
}

// Manifest serves a verified manifest from memory, or reads and keeps it.
func (m *memoStore) Manifest(ctx context.Context, repo string, dgst v1.Hash) ([]byte, v1.Descriptor, error) {
	key := "m " + repo + "@" + dgst.String()
	if it, ok := m.get(key); ok {
		return bytes.Clone(it.raw), it.desc, nil
	}
	raw, desc, err := m.Store.Manifest(ctx, repo, dgst)
	if err != nil {
		return nil, desc, err
	}
	m.put(&memoItem{key: key, raw: bytes.Clone(raw), desc: desc})
	return raw, desc, nil
}

// Blob serves a small verified blob from memory, or reads it through,
// keeping it once the wrapped store's reader verified all of it.
func (m *memoStore) Blob(ctx context.Context, repo string, dgst v1.Hash) (io.ReadCloser, error) {
	key := "b " + repo + "@" + dgst.String()
	if it, ok := m.get(key); ok {
		return io.NopCloser(bytes.NewReader(it.raw)), nil
	}
	rc, err := m.Store.Blob(ctx, repo, dgst)
	if err != nil {
		return nil, err
	}
	return &memoReader{rc: rc, m: m, key: key}, nil
}

// memoReader keeps what it reads, up to memoBlobMax, and hands it to the
// memo at a clean end of file.
type memoReader struct {
	rc   io.ReadCloser
	m    *memoStore
	key  string
	buf  []byte
	over bool
}

func (r *memoReader) Read(p []byte) (int, error) {
	n, err := r.rc.Read(p)
	if !r.over {
		if len(r.buf)+n > memoBlobMax {
			r.over, r.buf = true, nil
		} else {
			r.buf = append(r.buf, p[:n]...)
		}
	}
	if err == io.EOF && !r.over {
		r.m.put(&memoItem{key: r.key, raw: r.buf})
		r.over = true
	}
	return n, err
}

func (r *memoReader) Close() error { return r.rc.Close() }

// contentCache, lent to the wrapped store.

func (m *memoStore) cachedManifest(repo string, d v1.Hash) ([]byte, types.MediaType, bool) {
	it, ok := m.get("m " + repo + "@" + d.String())
	if !ok {
		return nil, "", false
	}
	return bytes.Clone(it.raw), it.desc.MediaType, true
}

func (m *memoStore) keepManifest(repo string, d v1.Hash, raw []byte, desc v1.Descriptor) {
	desc.Annotations = nil
	m.put(&memoItem{key: "m " + repo + "@" + d.String(), raw: bytes.Clone(raw), desc: desc})
}

// memoLinksMax bounds the link tags remembered (a few hundred bytes each).
const memoLinksMax = 100_000

func (m *memoStore) cachedLink(key string) (v1.Hash, bool) {
	m.mu.Lock()
	defer m.mu.Unlock()
	d, ok := m.links[key]
	return d, ok
}

func (m *memoStore) keepLink(key string, d v1.Hash) {
	m.mu.Lock()
	defer m.mu.Unlock()
	if len(m.links) >= memoLinksMax {
		clear(m.links)
	}
	m.links[key] = d
}
