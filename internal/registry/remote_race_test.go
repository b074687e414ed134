package registry_test

import (
	"context"
	"errors"
	"io"
	"log"
	"net/http"
	"net/http/httptest"
	"net/http/httputil"
	"net/url"
	"strings"
	"sync"
	"sync/atomic"
	"testing"

	"github.com/google/go-containerregistry/pkg/authn"
	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"
	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// clientHeader names, on each request of the race tests, which client
// sent it: the pusher or the collector.
const clientHeader = "X-Modelgate-Test-Client"

type labelled struct {
	who  string
	base http.RoundTripper
}

func (l labelled) RoundTrip(req *http.Request) (*http.Response, error) {
	req = req.Clone(req.Context())
	req.Header.Set(clientHeader, l.who)
	return l.base.RoundTrip(req)
}

// deleteWindow stands between the stores and a registry and lets a push
// run inside a collector's removal of the very manifest it pushes: when
// the collector's DELETE of that manifest arrives (after its last look at
// the tags), the push runs up to and including its tag write; the DELETE
// is then served; the push's later reads of the manifest, and its
// writes, wait until the collector's DeleteManifest has returned.
type deleteWindow struct {
	next      http.Handler
	digest    string // "sha256:…" of the manifest pushed and deleted
	tag       string // the push's tag
	push      func() // runs the push (from the DELETE's handler)
	pushWrote chan struct{}
	pushDone  chan struct{}
	deleted   chan struct{}
	collected chan struct{}
	// whole: the whole push, read-back included, runs before the DELETE
	// is served.
	whole   bool
	once    sync.Once
	tagPut  atomic.Bool
	deletes atomic.Int64
}

func (h *deleteWindow) ServeHTTP(w http.ResponseWriter, req *http.Request) {
	who := req.Header.Get(clientHeader)
	ref := ""
	if i := strings.LastIndex(req.URL.Path, "/manifests/"); i >= 0 {
		ref = req.URL.Path[i+len("/manifests/"):]
	}
	switch {
	case who == "collector" && req.Method == http.MethodDelete && ref == h.digest && h.deletes.Add(1) == 1:
		go func() { defer close(h.pushDone); h.push() }()
		if h.whole {
			<-h.pushDone
		}
		select {
		case <-h.pushWrote:
		case <-h.pushDone:
		}
		h.next.ServeHTTP(w, req)
		close(h.deleted)
		return
	case who == "push" && h.tagPut.Load() && ref != "" && !h.whole:
		// Anything the push does after writing its tag comes after the
		// DELETE, and its writes after the collector is done.
		<-h.deleted
		if req.Method == http.MethodPut || req.Method == http.MethodDelete {
			<-h.collected
		}
	}
	h.next.ServeHTTP(w, req)
	if who == "push" && req.Method == http.MethodPut && ref == h.tag {
		h.tagPut.Store(true)
		h.once.Do(func() { close(h.pushWrote) })
	}
}

// testPushInsideDeleteWindow: a push of exactly the bytes of a manifest a
// collector is removing, which writes its manifest and its tag after the
// collector's last look at the tags and before its DELETE, ends with its
// manifest readable by digest, its tag on it, and the manifest listed by
// the store: the push reads its work back after tagging and puts back what
// the DELETE took. The collector either says the manifest came back
// (ErrConflict) or removed it; neither is an error of the push.
func testPushInsideDeleteWindow(t *testing.T, upstream http.Handler, prefix string, auth authn.Authenticator, whole bool) {
	ctx := context.Background()
	const repo = "podcast/listener-encoder"
	a := storetest.NewArtifact(300, "application/vnd.modelgate.encoder.v1", nil, nil)
	h := &deleteWindow{next: upstream, tag: "candidate-7", pushWrote: make(chan struct{}), pushDone: make(chan struct{}),
		deleted: make(chan struct{}), collected: make(chan struct{}), whole: whole}
	srv := httptest.NewServer(h)
	t.Cleanup(srv.Close)
	loc := strings.TrimPrefix(srv.URL, "http://") + "/" + prefix
	open := func(who string) *registry.Remote {
		return openRemote(t, loc, registry.WithRemoteAuth(auth), registry.WithRemoteTransport(labelled{who, http.DefaultTransport}))
	}
	pusher, collector := open("push"), open("collector")
	first := storetest.Push(t, pusher, repo, "", a)
	h.digest = first.Digest.String()
	var pushErr error
	var pushed v1.Descriptor
	h.push = func() {
		pushed, pushErr = pusher.PutManifest(ctx, repo, first.MediaType, a.Manifest.Data)
		if pushErr == nil {
			pushErr = pusher.Tag(ctx, repo, h.tag, pushed)
		}
	}
	err := collector.DeleteManifest(ctx, repo, first.Digest)
	close(h.collected)
	<-h.pushDone
	if err != nil && !errors.Is(err, registry.ErrConflict) || whole && err == nil {
		t.Fatalf("DeleteManifest: %v", err)
	}
	if pushErr != nil {
		t.Fatalf("the push: %v", pushErr)
	}
	if h.deletes.Load() == 0 {
		t.Fatal("the collector sent no DELETE")
	}
	// Read with a client of its own (not held by the window).
	s := openRemote(t, strings.TrimPrefix(srv.URL, "http://")+"/"+prefix, registry.WithRemoteAuth(auth))
	if _, _, err := s.Manifest(ctx, repo, first.Digest); err != nil {
		t.Errorf("after a successful push, its manifest: %v", err)
	}
	if got, err := s.Resolve(ctx, repo, h.tag); err != nil || got.Digest != first.Digest {
		t.Errorf("after a successful push, its tag: %v, %v", got.Digest, err)
	}
	ms, err := s.Manifests(ctx, repo)
	if err != nil || len(ms) != 1 || ms[0].Digest != first.Digest {
		t.Errorf("manifests listed after the push: %v, %v", ms, err)
	}
}

// TestRemotePushInsideDeleteWindowMem runs it on the in-memory registry,
// which keeps a deleted manifest's tags (the store removes its own by
// name). Before the push read its work back this failed: the manifest
// was gone by digest after the push had returned.
func TestRemotePushInsideDeleteWindowMem(t *testing.T) {
	h := ggcrregistry.New(ggcrregistry.WithReferrersSupport(false), ggcrregistry.Logger(log.New(io.Discard, "", 0)))
	testPushInsideDeleteWindow(t, h, "podcasts", authn.Anonymous, false)
}

// TestRemoteWholePushInsideDeleteWindowMem: the whole push, its read-back
// included, runs between the collector's last look and its DELETE, on the
// in-memory registry, which keeps the tags of a deleted manifest. The
// collector lists the tags again after the DELETE, finds the push's
// push-time tag, puts the manifest back and says so (ErrConflict). Before
// that second listing this failed: the manifest was gone by digest after
// the push had returned. (On docker-registry this window stays open: its
// DELETE takes the push's tags too; README "Retention" says so.)
func TestRemoteWholePushInsideDeleteWindowMem(t *testing.T) {
	h := ggcrregistry.New(ggcrregistry.WithReferrersSupport(false), ggcrregistry.Logger(log.New(io.Discard, "", 0)))
	testPushInsideDeleteWindow(t, h, "podcasts", authn.Anonymous, true)
}

// TestRemotePushInsideDeleteWindowDockerRegistry runs it on
// docker-registry 2.8 (.ci/services.sh), behind a reverse proxy: there the
// DELETE removes the manifest with every tag naming it, the push's tag
// included. Before the push read its work back this failed: the manifest
// and the push's tag were gone after the push had returned.
func TestRemotePushInsideDeleteWindowDockerRegistry(t *testing.T) {
	proxy, auth := serviceProxy(t)
	testPushInsideDeleteWindow(t, proxy, uniquePrefix(t), auth, false)
}

// TestRemoteUntagWindowDockerRegistry: on docker-registry 2.8 (which
// deletes a tag only with its manifest) DeleteTag's DELETE is by the
// manifest's digest, so what happens to other tags between its last look
// and that DELETE is what README "Untag" states: a tag that another writer
// moved away from the manifest in that window stays where it was moved;
// a tag that modelgate's Tag pointed at the manifest in that window goes
// with it and is put back by that Tag's read-back.
func TestRemoteUntagWindowDockerRegistry(t *testing.T) {
	proxy, auth := serviceProxy(t)
	ctx := context.Background()
	const repo = "podcast/promo-scorer"
	a := storetest.NewArtifact(310, "application/vnd.modelgate.scorer.v1", nil, nil)
	b := storetest.NewArtifact(311, "application/vnd.modelgate.scorer.v1", nil, nil)

	t.Run("moved away", func(t *testing.T) {
		var mover *registry.Remote
		var moved atomic.Bool
		var moveErr error
		var db v1.Descriptor
		srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, req *http.Request) {
			if req.Header.Get(clientHeader) == "collector" && req.Method == http.MethodDelete && strings.Contains(req.URL.Path, "/manifests/sha256:") && moved.CompareAndSwap(false, true) {
				moveErr = mover.Tag(ctx, repo, "candidate-1", db)
			}
			proxy.ServeHTTP(w, req)
		}))
		t.Cleanup(srv.Close)
		loc := strings.TrimPrefix(srv.URL, "http://") + "/" + uniquePrefix(t)
		collector := openRemote(t, loc, registry.WithRemoteAuth(auth), registry.WithRemoteTransport(labelled{"collector", http.DefaultTransport}))
		mover = openRemote(t, loc, registry.WithRemoteAuth(auth))
		da := storetest.Push(t, mover, repo, "candidate-1", a)
		db = storetest.Push(t, mover, repo, "candidate-2", b)
		if err := collector.DeleteTag(ctx, repo, "candidate-1", da.Digest); err != nil {
			t.Fatalf("DeleteTag: %v", err)
		}
		if moveErr != nil || !moved.Load() {
			t.Fatalf("the move inside the window: %v (ran: %v)", moveErr, moved.Load())
		}
		if got, err := mover.Resolve(ctx, repo, "candidate-1"); err != nil || got.Digest != db.Digest {
			t.Errorf("candidate-1 after it moved away inside the window: %v, %v; want %s", got.Digest, err, db.Digest)
		}
		if _, _, err := mover.Manifest(ctx, repo, db.Digest); err != nil {
			t.Errorf("the manifest it moved to: %v", err)
		}
		if _, _, err := mover.Manifest(ctx, repo, da.Digest); !errors.Is(err, registry.ErrNotFound) {
			t.Errorf("the untagged manifest: %v, want it deleted", err)
		}
	})

	t.Run("tagged onto it", func(t *testing.T) {
		h := &deleteWindow{next: proxy, tag: "candidate-3", pushWrote: make(chan struct{}), pushDone: make(chan struct{}),
			deleted: make(chan struct{}), collected: make(chan struct{})}
		srv := httptest.NewServer(h)
		t.Cleanup(srv.Close)
		loc := strings.TrimPrefix(srv.URL, "http://") + "/" + uniquePrefix(t)
		collector := openRemote(t, loc, registry.WithRemoteAuth(auth), registry.WithRemoteTransport(labelled{"collector", http.DefaultTransport}))
		pusher := openRemote(t, loc, registry.WithRemoteAuth(auth), registry.WithRemoteTransport(labelled{"push", http.DefaultTransport}))
		da := storetest.Push(t, pusher, repo, "candidate-1", a)
		h.digest = da.Digest.String()
		var tagErr error
		h.push = func() { tagErr = pusher.Tag(ctx, repo, h.tag, da) }
		err := collector.DeleteTag(ctx, repo, "candidate-1", da.Digest)
		close(h.collected)
		<-h.pushDone
		if err != nil || tagErr != nil || h.deletes.Load() == 0 {
			t.Fatalf("DeleteTag: %v; Tag inside the window: %v; DELETEs %d", err, tagErr, h.deletes.Load())
		}
		s := openRemote(t, loc, registry.WithRemoteAuth(auth))
		if got, err := s.Resolve(ctx, repo, "candidate-3"); err != nil || got.Digest != da.Digest {
			t.Errorf("the tag written inside the window: %v, %v; want it put back at %s", got.Digest, err, da.Digest)
		}
		if _, err := s.Resolve(ctx, repo, "candidate-1"); !errors.Is(err, registry.ErrNotFound) {
			t.Errorf("the removed tag: %v, want it gone", err)
		}
	})
}

// serviceProxy is a reverse proxy in front of the loopback docker-registry
// (.ci/services.sh), and its credentials.
func serviceProxy(t *testing.T) (*httputil.ReverseProxy, authn.Authenticator) {
	t.Helper()
	addr, auth := serviceRegistry(t)
	u, err := url.Parse("http://" + addr)
	if err != nil {
		t.Fatal(err)
	}
	proxy := httputil.NewSingleHostReverseProxy(u)
	proxy.ErrorLog = log.New(io.Discard, "", 0)
	return proxy, auth
}
