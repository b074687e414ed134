package registry_test

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/google/go-containerregistry/pkg/authn"
	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

const raceRepo = "podcast/promo-scorer"

// TestGCSSwapRace16: 16 racers, each with its own storage client (as 16
// CI runners would be), swap prod from the same old target: the
// generation precondition lets exactly one win, and prod points at the
// winner's target.
func TestGCSSwapRace16(t *testing.T) {
	srv, c0 := gcsEmulator(t, nil)
	var clients []registry.Store
	for i := range 16 {
		c := c0
		if i > 0 {
			c = gcsClientFor(t, srv.URL(), nil)
		}
		clients = append(clients, registry.NewGCS(c, testBucket, "race"))
	}
	res := storetest.SwapRace(t, clients, raceRepo, "prod")
	if len(res.Winners) != 1 || len(res.Conflicts) != 15 {
		t.Fatalf("%d won, %d lost; want exactly 1 and 15", len(res.Winners), len(res.Conflicts))
	}
	if w := res.Winners[0]; res.Final.Digest != res.Targets[w].Digest {
		t.Errorf("prod = %s, want the winner's %s", res.Final.Digest, res.Targets[w].Digest)
	}
}

// TestRemoteSwapRaceOneProcess: racers sharing one registry store value
// (goroutines of one process) are serialised by its per-tag lock: exactly
// one wins, no race is lost, on a registry without compare-and-swap.
func TestRemoteSwapRaceOneProcess(t *testing.T) {
	r := openRemote(t, memRegistry(t, false)+"/podcasts", registry.WithRemoteAuth(authn.Anonymous))
	clients := slices.Repeat([]registry.Store{r}, 16)
	res := storetest.SwapRace(t, clients, raceRepo, "prod")
	if len(res.Winners) != 1 || len(res.Conflicts) != 15 {
		t.Fatalf("%d won, %d lost; want exactly 1 and 15", len(res.Winners), len(res.Conflicts))
	}
	if w := res.Winners[0]; res.Final.Digest != res.Targets[w].Digest {
		t.Errorf("prod = %s, want the winner's %s", res.Final.Digest, res.Targets[w].Digest)
	}
}

// checkRegistryRace states and checks the guarantee SwapTag gives between
// processes on a registry (see the Remote doc comment): at least one racer
// wins, every other racer either lost with ErrConflict or won; the tag
// ends at the target of a winner, and a winner whose target is not the
// final one was overwritten without knowing — the case only the release
// chain can expose, which is logged (counted, not hidden).
func checkRegistryRace(t *testing.T, res storetest.RaceResult) {
	t.Helper()
	if len(res.Winners) == 0 {
		t.Fatalf("no racer won (%d conflicts)", len(res.Conflicts))
	}
	if len(res.Winners)+len(res.Conflicts) != len(res.Targets) {
		t.Fatalf("%d won + %d lost != %d racers", len(res.Winners), len(res.Conflicts), len(res.Targets))
	}
	finalIsWinner := false
	overwritten := 0
	for _, w := range res.Winners {
		if res.Targets[w].Digest == res.Final.Digest {
			finalIsWinner = true
		} else {
			overwritten++
		}
	}
	if !finalIsWinner {
		t.Errorf("the tag ends at %s, the target of no winner: a race was lost silently", res.Final.Digest)
	}
	t.Logf("%d racers: %d reported winning (%d of them overwritten afterwards, detectable only by the release chain), %d detected the lost race", len(res.Targets), len(res.Winners), overwritten, len(res.Conflicts))
}

// TestRemoteSwapRaceSeparateClients: 16 store values (separate
// connections and locks, as separate processes) race on the in-memory
// registry.
func TestRemoteSwapRaceSeparateClients(t *testing.T) {
	addr := memRegistry(t, false)
	var clients []registry.Store
	for range 16 {
		clients = append(clients, openRemote(t, addr+"/podcasts", registry.WithRemoteAuth(authn.Anonymous)))
	}
	checkRegistryRace(t, storetest.SwapRace(t, clients, raceRepo, "prod"))
}

// TestRemoteSwapRaceDockerRegistry: the same against the real registry
// server.
func TestRemoteSwapRaceDockerRegistry(t *testing.T) {
	addr, auth := serviceRegistry(t)
	prefix := uniquePrefix(t)
	var clients []registry.Store
	for range 16 {
		clients = append(clients, registry.NewRetry(openRemote(t, addr+"/"+prefix, registry.WithRemoteAuth(auth)), registry.RetryOptions{Initial: 20 * time.Millisecond}))
	}
	checkRegistryRace(t, storetest.SwapRace(t, clients, raceRepo, "prod"))
}

func noSleep(context.Context, time.Duration) error { return nil }

// TestRetryRecoversStoreFaults: a store that fails every third call and
// tears every second upload, wrapped in the retry wrapper, still takes a
// whole workload (uploads from seekable readers are rewound), and keeps
// nothing of the torn uploads.
func TestRetryRecoversStoreFaults(t *testing.T) {
	stores := map[string]func(t *testing.T) registry.Store{
		"local": func(t *testing.T) registry.Store { return openLocal(t) },
		"registry": func(t *testing.T) registry.Store {
			return openRemote(t, memRegistry(t, false)+"/p", registry.WithRemoteAuth(authn.Anonymous))
		},
		"gcs": func(t *testing.T) registry.Store {
			_, c := gcsEmulator(t, nil)
			return registry.NewGCS(c, testBucket, "faults")
		},
	}
	for name, open := range stores {
		t.Run(name, func(t *testing.T) {
			inner := open(t)
			s := registry.NewRetry(registry.NewFaulty(inner, registry.FaultPlan{FailEvery: 3, TearEvery: 2}), registry.RetryOptions{Sleep: noSleep})
			if _, ok := s.(registry.TagSwapper); !ok {
				t.Error("wrapped store lost TagSwapper")
			}
			var arts []storetest.Artifact
			for i := range 6 {
				a := storetest.NewArtifact(uint64(300+i), "application/vnd.modelgate.encoder.v1", nil, nil)
				arts = append(arts, a)
				storetest.Push(t, s, "podcast/listener-encoder", fmt.Sprintf("v%d", i), a)
			}
			checkNoDanglingTags(t, inner)
			for _, a := range arts {
				for _, b := range append([]storetest.Blob{a.Config}, a.Layers...) {
					got := readAll(t, inner, "podcast/listener-encoder", b.Digest)
					if !bytes.Equal(got, b.Data) {
						t.Errorf("blob %s differs", b.Digest)
					}
				}
			}
			// A torn upload from a reader that cannot be rewound is not
			// retried, and leaves nothing behind.
			b := storetest.NewBlob(77, 5000)
			f := registry.NewRetry(registry.NewFaulty(inner, registry.FaultPlan{TearEvery: 1}), registry.RetryOptions{Sleep: noSleep})
			err := f.PutBlob(context.Background(), "podcast/shows", b.Digest, 5000, io.MultiReader(bytes.NewReader(b.Data)))
			if err == nil {
				t.Fatal("torn upload from a one-shot reader succeeded")
			}
			if _, err := inner.StatBlob(context.Background(), "podcast/shows", b.Digest); !errors.Is(err, registry.ErrNotFound) {
				t.Errorf("after a torn upload StatBlob = %v, want ErrNotFound", err)
			}
		})
	}
}

// TestFlippedUploadRefused: a bit flipped on its way into the store is
// refused by every store as a digest mismatch, and not retried.
func TestFlippedUploadRefused(t *testing.T) {
	ctx := context.Background()
	for name, inner := range map[string]registry.Store{
		"local":    openLocal(t),
		"registry": openRemote(t, memRegistry(t, false)+"/p", registry.WithRemoteAuth(authn.Anonymous)),
		"gcs":      func() registry.Store { _, c := gcsEmulator(t, nil); return registry.NewGCS(c, testBucket, "") }(),
	} {
		t.Run(name, func(t *testing.T) {
			s := registry.NewRetry(registry.NewFaulty(inner, registry.FaultPlan{FlipEvery: 1}), registry.RetryOptions{Sleep: noSleep})
			b := storetest.NewBlob(78, 3<<20)
			err := s.PutBlob(ctx, "podcast/shows", b.Digest, int64(len(b.Data)), bytes.NewReader(b.Data))
			if !errors.Is(err, registry.ErrDigestMismatch) {
				t.Fatalf("PutBlob of flipped bytes: %v, want ErrDigestMismatch", err)
			}
			if _, err := inner.StatBlob(ctx, "podcast/shows", b.Digest); !errors.Is(err, registry.ErrNotFound) {
				t.Errorf("after the refused upload StatBlob = %v, want ErrNotFound", err)
			}
		})
	}
}

func readAll(t *testing.T, s registry.Store, repo string, d v1.Hash) []byte {
	t.Helper()
	rc, err := s.Blob(context.Background(), repo, d)
	if err != nil {
		t.Fatalf("Blob %s: %v", d, err)
	}
	defer rc.Close()
	b, err := io.ReadAll(rc)
	if err != nil {
		t.Fatalf("reading %s: %v", d, err)
	}
	return b
}

// checkNoDanglingTags: every tag of every repository resolves to a
// manifest that reads back verified and whose blobs are all present.
func checkNoDanglingTags(t *testing.T, s registry.Store) {
	t.Helper()
	ctx := context.Background()
	repos, err := s.Repositories(ctx)
	if err != nil {
		t.Fatal(err)
	}
	n := 0
	for _, repo := range repos {
		tags, err := s.Tags(ctx, repo)
		if err != nil {
			t.Fatal(err)
		}
		for _, tag := range tags {
			n++
			d, err := s.Resolve(ctx, repo, tag)
			if err != nil {
				t.Errorf("%s:%s does not resolve: %v", repo, tag, err)
				continue
			}
			raw, _, err := s.Manifest(ctx, repo, d.Digest)
			if err != nil {
				t.Errorf("%s:%s points at an unreadable manifest: %v", repo, tag, err)
				continue
			}
			var m v1.Manifest
			if err := json.Unmarshal(raw, &m); err != nil {
				t.Errorf("%s:%s: %v", repo, tag, err)
				continue
			}
			for _, l := range append([]v1.Descriptor{m.Config}, m.Layers...) {
				if size, err := s.StatBlob(ctx, repo, l.Digest); err != nil || size != l.Size {
					t.Errorf("%s:%s: blob %s: size %d, %v; want %d", repo, tag, l.Digest, size, err, l.Size)
				}
			}
		}
	}
	if n == 0 {
		t.Error("no tags to check")
	}
}

// TestNetworkFaultsRecovered: below the registry and GCS stores, a
// transport answers 10% of requests 503 and loses the answer to 5% after
// the server acted on them (seeded). Through the retry wrapper a workload of
// pushes, tags and swaps completes, and afterwards (read through a clean
// connection) no tag points at missing content.
func TestNetworkFaultsRecovered(t *testing.T) {
	faults := func() *registry.FaultyTransport {
		return &registry.FaultyTransport{Seed: 7, FailRate: 0.10, DropRate: 0.05}
	}
	cases := map[string]func(t *testing.T) (faulty, clean registry.Store, ft *registry.FaultyTransport){
		"registry": func(t *testing.T) (registry.Store, registry.Store, *registry.FaultyTransport) {
			addr := memRegistry(t, false)
			ft := faults()
			ft.Inner = http.DefaultTransport
			return openRemote(t, addr+"/p", registry.WithRemoteAuth(authn.Anonymous), registry.WithRemoteTransport(ft)),
				openRemote(t, addr+"/p", registry.WithRemoteAuth(authn.Anonymous)), ft
		},
		"gcs": func(t *testing.T) (registry.Store, registry.Store, *registry.FaultyTransport) {
			ft := faults()
			srv, clean := gcsEmulator(t, nil)
			c := gcsClientFor(t, srv.URL(), func(rt http.RoundTripper) http.RoundTripper { ft.Inner = rt; return ft })
			return registry.NewGCS(c, testBucket, "net"), registry.NewGCS(clean, testBucket, "net"), ft
		},
	}
	for name, mk := range cases {
		t.Run(name, func(t *testing.T) {
			ctx := context.Background()
			faulty, clean, ft := mk(t)
			s := registry.NewRetry(faulty, registry.RetryOptions{Sleep: noSleep, Attempts: 10})
			var prev v1.Descriptor
			for i := range 5 {
				subj := storetest.Push(t, s, "podcast/promo-scorer", "", storetest.NewArtifact(uint64(400+i), "application/vnd.modelgate.scorer.v1", nil, nil))
				sd := subj
				sd.ArtifactType = ""
				storetest.Push(t, s, "podcast/promo-scorer", "", storetest.NewArtifact(uint64(450+i), "application/vnd.modelgate.report.v1", &sd, nil))
				if err := s.(registry.TagSwapper).SwapTag(ctx, "podcast/promo-scorer", "prod", prev.Digest, subj); err != nil {
					t.Fatalf("swap %d: %v", i, err)
				}
				prev = subj
			}
			if ft.Failed.Load() == 0 || ft.Dropped.Load() == 0 {
				t.Errorf("injected %d failures and %d drops; want some of each", ft.Failed.Load(), ft.Dropped.Load())
			}
			t.Logf("injected %d 503 answers and %d lost answers", ft.Failed.Load(), ft.Dropped.Load())
			checkNoDanglingTags(t, clean)
			if got, err := clean.Resolve(ctx, "podcast/promo-scorer", "prod"); err != nil || got.Digest != prev.Digest {
				t.Errorf("prod = %v, %v; want %s", got.Digest, err, prev.Digest)
			}
			refs, err := clean.Referrers(ctx, "podcast/promo-scorer", prev.Digest, "")
			if err != nil || len(refs) != 1 {
				t.Errorf("referrers of the last scorer = %v, %v; want 1", refs, err)
			}
		})
	}
}

// TestCorruptReadRefused: a bit flipped in transit in a blob or manifest
// download is refused as a digest mismatch of kind integrity (exit 5).
func TestCorruptReadRefused(t *testing.T) {
	ctx := context.Background()
	isGet := func(r *http.Request) bool { return r.Method == http.MethodGet }
	cases := map[string]func(t *testing.T) (writer, reader registry.Store){
		"registry": func(t *testing.T) (registry.Store, registry.Store) {
			addr := memRegistry(t, true)
			ft := &registry.FaultyTransport{Inner: http.DefaultTransport, FlipEvery: 1, Match: isGet}
			return openRemote(t, addr+"/p", registry.WithRemoteAuth(authn.Anonymous)),
				openRemote(t, addr+"/p", registry.WithRemoteAuth(authn.Anonymous), registry.WithRemoteTransport(ft))
		},
		"gcs": func(t *testing.T) (registry.Store, registry.Store) {
			srv, clean := gcsEmulator(t, nil)
			c := gcsClientFor(t, srv.URL(), func(rt http.RoundTripper) http.RoundTripper {
				return &registry.FaultyTransport{Inner: rt, FlipEvery: 1, Match: func(r *http.Request) bool {
					return isGet(r) && !strings.Contains(r.URL.Path, "/o/") || isGet(r) && r.URL.Query().Get("alt") == "media"
				}}
			})
			return registry.NewGCS(clean, testBucket, ""), registry.NewGCS(c, testBucket, "")
		},
	}
	for name, mk := range cases {
		t.Run(name, func(t *testing.T) {
			w, r := mk(t)
			a := storetest.NewArtifact(500, "application/vnd.modelgate.encoder.v1", nil, nil)
			storetest.Push(t, w, "podcast/listener-encoder", "prod", a)
			rc, err := r.Blob(ctx, "podcast/listener-encoder", a.Layers[0].Digest)
			if err == nil {
				_, err = io.ReadAll(rc)
				rc.Close()
			}
			if !errors.Is(err, registry.ErrDigestMismatch) || errkind.Of(err) != errkind.Integrity {
				t.Errorf("reading a blob flipped in transit: %v, want ErrDigestMismatch of kind integrity", err)
			}
			_, _, err = r.Manifest(ctx, "podcast/listener-encoder", a.Manifest.Digest)
			if !errors.Is(err, registry.ErrDigestMismatch) || errkind.Of(err) != errkind.Integrity {
				t.Errorf("reading a manifest flipped in transit: %v, want ErrDigestMismatch of kind integrity", err)
			}
		})
	}
}
