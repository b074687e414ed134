package registry

import (
	"context"
	"encoding/json"
	"errors"
	"io"
	"mime"
	"net/http"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/remote/transport"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/errkind"
)

// What a registry store may remember, and for how long:
//
//   - Under WithRequestMemo (one page of the web view), each tag list, tag
//     target, referrers answer and fallback index is asked of the registry
//     once; the next page asks again, so it shows everything written
//     before it was requested.
//   - Under NewMemo, verified manifests are kept across pages by digest,
//     and a per-referrer link tag's target too: the tag is written once and
//     names the first 56 hex digits of the manifest it points at, so what
//     it resolved to once it resolves to for good. Whether a link tag
//     exists is still read from the tag list of each page.
//
// Writes never go through either memo: PutManifest, Tag, SwapTag and
// recordReferrer read the registry themselves.

// contentCache keeps verified manifests by repository and digest, and the
// digests per-referrer link tags resolved to. NewMemo lends itself to the
// stores it wraps through the context (withContentCache).
type contentCache interface {
	cachedManifest(repo string, d v1.Hash) ([]byte, types.MediaType, bool)
	keepManifest(repo string, d v1.Hash, raw []byte, desc v1.Descriptor)
	cachedLink(key string) (v1.Hash, bool)
	keepLink(key string, d v1.Hash)
}

type contentCacheKey struct{}

func withContentCache(ctx context.Context, c contentCache) context.Context {
	if _, ok := ctx.Value(contentCacheKey{}).(contentCache); ok {
		return ctx
	}
	return context.WithValue(ctx, contentCacheKey{}, c)
}

func contentCacheOf(ctx context.Context) contentCache {
	c, _ := ctx.Value(contentCacheKey{}).(contentCache)
	return c
}

// tagList lists every tag of full, once per request memo.
func (r *Remote) tagList(ctx context.Context, full string) ([]string, error) {
	return remember(ctx, "remote tags "+full, func() ([]string, error) { return r.allTags(ctx, full) })
}

// headOnce resolves a tag of full for a read, once per request memo.
// Compare-and-swap reads the registry itself (head).
func (r *Remote) headOnce(ctx context.Context, full, ref string) (v1.Descriptor, error) {
	return remember(ctx, "remote head "+full+":"+ref, func() (v1.Descriptor, error) { return r.head(ctx, full, ref) })
}

// apiReferrers is the referrers API's answer for one subject: answered is
// false when the registry has no referrers API (or does not know the
// repository).
type apiReferrers struct {
	digests  []v1.Hash
	answered bool
}

// askReferrersAPI asks GET /v2/<name>/referrers/<digest>, once per request
// memo, and records whether the registry has the API: per the distribution
// spec (v1.1, "Listing Referrers") a 200 with an image index means it has,
// a 404 that it has not. A 404 that says NAME_UNKNOWN only says the
// repository does not exist yet, and decides nothing.
func (r *Remote) askReferrersAPI(ctx context.Context, full string, subject v1.Hash) (apiReferrers, error) {
	return remember(ctx, "remote referrers "+full+"@"+subject.String(), func() (apiReferrers, error) {
		resp, err := r.call(ctx, full, http.MethodGet, "/v2/"+full+"/referrers/"+subject.String(), http.Header{"Accept": {string(types.OCIImageIndex)}}, nil, 0, http.StatusOK)
		switch {
		case err == nil:
		case errors.Is(err, ErrNotFound):
			if !nameUnknown(err) {
				r.referrersAPI.Store(referrersFallback)
			}
			return apiReferrers{}, nil
		case errkind.Of(err) == errkind.BadInput:
			return apiReferrers{}, nil
		default:
			return apiReferrers{}, err
		}
		ct, _, _ := mime.ParseMediaType(resp.Header.Get("Content-Type"))
		var idx v1.IndexManifest
		derr := json.NewDecoder(io.LimitReader(resp.Body, MaxManifestSize)).Decode(&idx)
		resp.Body.Close()
		if ct != string(types.OCIImageIndex) || derr != nil {
			r.referrersAPI.Store(referrersFallback)
			return apiReferrers{}, nil
		}
		r.referrersAPI.Store(referrersAPI)
		out := apiReferrers{answered: true}
		for _, d := range idx.Manifests {
			if checkDigest(d.Digest) == nil {
				out.digests = append(out.digests, d.Digest)
			}
		}
		return out, nil
	})
}

// nameUnknown reports whether a registry error carries the distribution
// spec's NAME_UNKNOWN code (the repository does not exist).
func nameUnknown(err error) bool {
	var te *transport.Error
	if !errors.As(err, &te) {
		return false
	}
	for _, d := range te.Errors {
		if d.Code == transport.NameUnknownErrorCode {
			return true
		}
	}
	return false
}

// fallbackIndexOnce reads subject's fallback index for a read, once per
// request memo, and only when the tag list all has its tag.
func (r *Remote) fallbackIndexOnce(ctx context.Context, full string, subject v1.Hash, all []string) (*v1.IndexManifest, error) {
	tag := fallbackTag(subject)
	found := false
	for _, t := range all {
		if t == tag {
			found = true
			break
		}
	}
	if !found {
		return &v1.IndexManifest{SchemaVersion: 2, MediaType: types.OCIImageIndex, Manifests: []v1.Descriptor{}}, nil
	}
	return remember(ctx, "remote fallback "+full+"@"+subject.String(), func() (*v1.IndexManifest, error) { return r.fallbackIndex(ctx, full, subject) })
}

// candidateManifest reads a referrer candidate (a digest, or a
// per-referrer link tag) of repo, from the lent content cache when it has
// it. The caller verifies what it gets.
func (r *Remote) candidateManifest(ctx context.Context, repo, full, key string) ([]byte, types.MediaType, error) {
	if cc := contentCacheOf(ctx); cc != nil {
		var d v1.Hash
		ok := false
		if strings.HasPrefix(key, "sha256:") {
			var err error
			d, err = ParseDigest(key)
			ok = err == nil
		} else {
			d, ok = cc.cachedLink(full + ":" + key)
		}
		if ok {
			if raw, mt, ok := cc.cachedManifest(repo, d); ok {
				return raw, mt, nil
			}
		}
	}
	return r.getManifest(ctx, full, key)
}

// keepCandidate hands a verified referrer to the lent content cache.
func keepCandidate(ctx context.Context, repo, full, key string, raw []byte, desc v1.Descriptor) {
	cc := contentCacheOf(ctx)
	if cc == nil {
		return
	}
	cc.keepManifest(repo, desc.Digest, raw, desc)
	if !strings.HasPrefix(key, "sha256:") {
		cc.keepLink(full+":"+key, desc.Digest)
	}
}
