package registry

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"mime"
	"net"
	"net/http"
	"net/url"
	"os"
	"regexp"
	"sort"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/google/go-containerregistry/pkg/authn"
	"github.com/google/go-containerregistry/pkg/name"
	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/remote"
	"github.com/google/go-containerregistry/pkg/v1/remote/transport"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/errkind"
)

// Environment variables that give registry credentials (for CI); when
// unset, the container tools' configuration and credential helpers are
// used (go-containerregistry's default keychain).
const (
	EnvRegistryUser     = "MODELGATE_REGISTRY_USER"
	EnvRegistryPassword = "MODELGATE_REGISTRY_PASSWORD"
)

// Tags that the remote store keeps for its own bookkeeping, all under
// "sha256-<64 hex>", the prefix the OCI distribution spec (v1.1, "Referrers
// Tag Schema") already gives to the referrers fallback index:
//
//   - sha256-<manifest>.keep: one per manifest the store puts, pointing at
//     it, on every registry: the API lists tags, not manifests, so this is
//     how every manifest is listed (Manifests), and a registry's garbage
//     collection of untagged manifests (distribution's garbage-collect
//     --delete-untagged, which does not spare referrers) never removes a
//     report, approval or release record.
//   - sha256-<subject>: the spec's fallback referrers index (an OCI image
//     index of the referrers of subject), only on registries without the
//     referrers API; other OCI tools read it.
//   - sha256-<subject>.<first 56 hex of the referrer>: one per referrer,
//     only on registries without the referrers API, written once and never
//     rewritten, so that a referrer is found even when concurrent writers
//     lost it from the read-modify-write fallback index.
//
// Referrers reads the last two also on a registry with the API while the
// repository has any (written before the registry had the API).
// Tags lists none of them; Tag and SwapTag refuse them.
var (
	reservedTagPattern = regexp.MustCompile(`^sha256-[a-f0-9]{64}`)
	keepTagPattern     = regexp.MustCompile(`^sha256-([a-f0-9]{64})\.keep$`)
	linkTagPattern     = regexp.MustCompile(`^sha256-([a-f0-9]{64})\.([a-f0-9]{56})$`)
	fallbackTagPattern = regexp.MustCompile(`^sha256-[a-f0-9]{64}$`)
)

func keepTag(d v1.Hash) string              { return "sha256-" + d.Hex + ".keep" }
func fallbackTag(subject v1.Hash) string    { return "sha256-" + subject.Hex }
func linkTag(subject, ref v1.Hash) string   { return "sha256-" + subject.Hex + "." + ref.Hex[:56] }
func isReservedTag(tag string) bool         { return reservedTagPattern.MatchString(tag) }
func fullName(prefix, repo string) string   { return strings.TrimPrefix(prefix+"/"+repo, "/") }
func repoKey(repo string, d v1.Hash) string { return repo + "@" + d.String() }

// Manifest media types the remote store asks for and accepts.
var acceptManifests = strings.Join([]string{
	string(types.OCIManifestSchema1), string(types.OCIImageIndex),
	string(types.DockerManifestSchema2), string(types.DockerManifestList),
}, ", ")

// Remote is a store in an OCI distribution registry (distribution-spec
// v1.1): the repository REPO of the store lives at PREFIX/REPO on the
// registry. It is safe for concurrent use and for many processes and
// machines sharing the registry.
//
// Guarantees, and where they stop:
//   - Content: every blob and manifest read is hashed and compared with its
//     digest and size; an upload that does not hash to its digest is cut
//     off before its last byte, so the registry never commits it. Blobs
//     the registry already has are not uploaded again (HEAD first); a blob
//     this process saw in another repository of the store is mounted
//     across repositories instead of uploaded.
//   - Order: blobs, then the manifest, then tags, so a tag never points
//     at content the registry lacks.
//   - Referrers: the referrers API when the registry has it; otherwise the
//     spec's tag fallback, an index under sha256-<subject> that clients
//     update by read, modify, write. That update is racy by the spec's own
//     admission: two writers adding referrers to one subject at once can
//     lose one entry. The store therefore also writes a per-referrer tag
//     (see the reserved tags above) that is never rewritten, and Referrers
//     reads both, so modelgate never loses a referrer; other tools reading
//     only the index may miss one until the next referrer is added.
//   - Tags: the distribution spec has no compare-and-swap. SwapTag reads
//     the tag, compares, writes, and reads back. Within one process it is
//     exact (a lock per tag). Between processes it detects a lost race
//     whenever the other writer's write lands before our read-back, but a
//     writer whose read, write and read-back all fall between another
//     writer's read and write believes it won and is then overwritten. The
//     release log exposes that case (committed markers on records
//     that dropped out of its chain).
//   - Plain HTTP is used only for loopback registries, or any registry when
//     opened WithInsecure; credentials are never sent in clear otherwise.
//
// Errors: missing things wrap ErrNotFound (errkind.BadInput); content that
// does not match its digest wraps ErrDigestMismatch (errkind.Integrity on
// read, errkind.BadInput on upload); refused credentials are
// errkind.Unauthorized; network failures and 5xx/429 answers wrap
// ErrTransient (retry them with NewRetry); a lost SwapTag wraps ErrConflict
// (errkind.Conflict).
type Remote struct {
	reg      name.Registry
	prefix   string
	insecure bool
	auth     authn.Authenticator
	keychain authn.Keychain
	base     http.RoundTripper

	mu      sync.Mutex
	clients map[string]*http.Client // by repository full name; "" is the catalog

	referrersAPI   atomic.Int32     // 0 unknown, 1 supported, 2 not supported
	noFallbackTags sync.Map         // full name → true: no link or fallback tags (registry with the API)
	present        sync.Map         // repoKey → size: blobs this process saw present
	holders        sync.Map         // digest → full repository name that has the blob
	tagLocks       sync.Map         // full name:tag → *sync.Mutex
	tagDelete      atomic.Int32     // tagDeleteUnknown, tagDeleteYes, tagDeleteNo
	clock          func() time.Time // push-time tags' clock (nil: time.Now)
}

var (
	_ Store          = (*Remote)(nil)
	_ TagSwapper     = (*Remote)(nil)
	_ ManifestLister = (*Remote)(nil)
)

// RemoteOption configures OpenRemote.
type RemoteOption func(*Remote)

// WithInsecure allows plain HTTP to a registry that is not on a loopback
// address. TLS certificates are still verified when HTTPS is used.
func WithInsecure(insecure bool) RemoteOption {
	return func(r *Remote) { r.insecure = insecure }
}

// WithRemoteAuth sets the credentials, instead of the environment and the
// default keychain.
func WithRemoteAuth(a authn.Authenticator) RemoteOption {
	return func(r *Remote) { r.auth = a }
}

// WithRemoteTransport sets the HTTP transport under authentication (for
// tests: counting or fault injection). The default is
// go-containerregistry's remote.DefaultTransport.
func WithRemoteTransport(t http.RoundTripper) RemoteOption {
	return func(r *Remote) { r.base = t }
}

// ParseRemoteLocation splits a registry store location, "HOST[:PORT]/PREFIX"
// or "oci://HOST[:PORT]/PREFIX" (PREFIX may be empty), into the registry
// host and the repository prefix. Credentials in the location are refused.
func ParseRemoteLocation(loc string) (host, prefix string, err error) {
	s := strings.TrimPrefix(loc, "oci://")
	if strings.Contains(s, "://") {
		return "", "", errkind.New(errkind.BadInput, "registry store %q: use HOST[:PORT]/PREFIX or oci://HOST[:PORT]/PREFIX", loc)
	}
	host, prefix, _ = strings.Cut(s, "/")
	prefix = strings.TrimSuffix(prefix, "/")
	if strings.Contains(host, "@") {
		return "", "", errkind.New(errkind.BadInput, "registry store %q: put credentials in %s/%s or the container tools' configuration, not in the location", redactLocation(loc), EnvRegistryUser, EnvRegistryPassword)
	}
	if _, err := name.NewRegistry(host, name.StrictValidation); err != nil || host == "" {
		return "", "", errkind.New(errkind.BadInput, "registry store %q: invalid registry host %q", loc, host)
	}
	if prefix != "" {
		if err := ValidateRepository(prefix); err != nil {
			return "", "", errkind.New(errkind.BadInput, "registry store %q: repository prefix: %w", loc, err)
		}
	}
	return host, prefix, nil
}

func redactLocation(loc string) string {
	if i := strings.LastIndexByte(loc, '@'); i >= 0 {
		if j := strings.Index(loc, "://"); j >= 0 && j < i {
			return loc[:j+3] + "…" + loc[i:]
		}
		return "…" + loc[i:]
	}
	return loc
}

// OpenRemote opens the registry store at loc (see ParseRemoteLocation).
// Credentials: WithRemoteAuth, else $MODELGATE_REGISTRY_USER and
// $MODELGATE_REGISTRY_PASSWORD when set, else the default keychain (docker
// config and credential helpers). It does not contact the registry.
func OpenRemote(loc string, opts ...RemoteOption) (*Remote, error) {
	host, prefix, err := ParseRemoteLocation(loc)
	if err != nil {
		return nil, err
	}
	r := &Remote{prefix: prefix, base: remote.DefaultTransport, clients: map[string]*http.Client{}}
	for _, o := range opts {
		o(r)
	}
	nopts := []name.Option{name.StrictValidation}
	if r.insecure {
		nopts = append(nopts, name.Insecure)
	}
	if r.reg, err = name.NewRegistry(host, nopts...); err != nil {
		return nil, errkind.New(errkind.BadInput, "registry store %q: %w", loc, err)
	}
	if r.auth == nil {
		if u, p := lookupEnv(EnvRegistryUser), lookupEnv(EnvRegistryPassword); u != "" || p != "" {
			r.auth = authn.FromConfig(authn.AuthConfig{Username: u, Password: p})
		} else {
			r.keychain = authn.DefaultKeychain
		}
	}
	return r, nil
}

// String names the store: oci://HOST/PREFIX (never credentials).
func (r *Remote) String() string {
	return "oci://" + strings.TrimSuffix(r.reg.RegistryStr()+"/"+r.prefix, "/")
}

// Registry returns the registry host and the repository prefix.
func (r *Remote) Registry() (host, prefix string) { return r.reg.RegistryStr(), r.prefix }

// isLoopback reports whether host (with or without port) is a loopback
// name or address.
func isLoopback(host string) bool {
	h := host
	if hh, _, err := net.SplitHostPort(host); err == nil {
		h = hh
	}
	if h == "localhost" {
		return true
	}
	ip := net.ParseIP(strings.Trim(h, "[]"))
	return ip != nil && ip.IsLoopback()
}

// httpGuard refuses plain-HTTP requests to non-loopback hosts unless the
// store is insecure (go-containerregistry would otherwise fall back to
// HTTP for private-range addresses too).
type httpGuard struct {
	inner    http.RoundTripper
	insecure bool
}

func (g httpGuard) RoundTrip(req *http.Request) (*http.Response, error) {
	if req.URL.Scheme == "http" && !g.insecure && !isLoopback(req.URL.Host) {
		if req.Body != nil {
			req.Body.Close()
		}
		return nil, errkind.New(errkind.BadInput, "refusing plain HTTP to %s: only loopback registries may use it unless the store is opened insecure (MODELGATE_INSECURE=1)", req.URL.Host)
	}
	return g.inner.RoundTrip(req)
}

// client returns an authenticated client for the repository full name
// ("" for the catalog), pinging the registry on first use.
func (r *Remote) client(ctx context.Context, full string) (*http.Client, error) {
	r.mu.Lock()
	c := r.clients[full]
	r.mu.Unlock()
	if c != nil {
		return c, nil
	}
	auth := r.auth
	if auth == nil {
		a, err := authn.Resolve(ctx, r.keychain, r.reg)
		if err != nil {
			return nil, fmt.Errorf("registry credentials for %s: %w", r.reg.RegistryStr(), err)
		}
		auth = a
	}
	scope := r.reg.Scope("")
	if full != "" {
		scope = r.reg.Repo(full).Scope(transport.PushScope)
	}
	rt, err := transport.NewWithContext(ctx, r.reg, auth, httpGuard{inner: r.base, insecure: r.insecure}, []string{scope})
	if err != nil {
		return nil, r.classify(fmt.Errorf("contacting registry %s: %w", r.reg.RegistryStr(), err), 0)
	}
	c = &http.Client{Transport: rt}
	r.mu.Lock()
	if old := r.clients[full]; old != nil {
		c = old
	} else {
		r.clients[full] = c
	}
	r.mu.Unlock()
	return c, nil
}

// classify turns a transport failure or an error status into our errors.
func (r *Remote) classify(err error, status int) error {
	if err == nil {
		return nil
	}
	var te *transport.Error
	if errors.As(err, &te) {
		status = te.StatusCode
	}
	switch {
	case errkind.Of(err) != errkind.Internal:
		return err
	case errors.Is(err, context.Canceled), errors.Is(err, context.DeadlineExceeded):
		return err
	case status == http.StatusUnauthorized || status == http.StatusForbidden:
		return r.authError(err, te, status)
	case status == http.StatusNotFound:
		return errkind.New(errkind.BadInput, "%w: %w", ErrNotFound, err)
	case status == http.StatusRequestTimeout || status == http.StatusTooManyRequests || status >= 500:
		return transient(err)
	case status >= 400:
		return errkind.Wrap(errkind.BadInput, err)
	case status == 0:
		return transient(err) // no answer: the network or the server went away
	}
	return err
}

// authError turns a 401 or 403 into a plain "authentication failed" or
// "access denied" error for this registry (errkind.Unauthorized), keeping
// what was being done but not the registry's raw error details.
func (r *Remote) authError(err error, te *transport.Error, status int) error {
	doing := err.Error()
	if te != nil {
		if i := strings.Index(doing, te.Error()); i > 0 {
			doing = doing[:i]
		}
	}
	// Drop the request line ("GET http://…", "HEAD /v2/…") the context ends with.
	for _, m := range []string{"GET ", "HEAD ", "PUT ", "POST ", "PATCH ", "DELETE "} {
		if i := strings.LastIndex(doing, ": "+m); i >= 0 {
			doing = doing[:i]
		} else if strings.HasPrefix(doing, m) {
			doing = ""
		}
	}
	doing = strings.TrimSuffix(strings.TrimSpace(doing), ":")
	if doing != "" {
		doing = " (" + doing + ")"
	}
	host := r.reg.RegistryStr()
	if status == http.StatusForbidden {
		return errkind.New(errkind.Unauthorized, "access denied by %s%s: the account has no permission for this repository (HTTP 403)", host, doing)
	}
	return errkind.New(errkind.Unauthorized, "authentication failed for %s%s: check %s and %s, or your container tools' login for %s (HTTP 401)", host, doing, EnvRegistryUser, EnvRegistryPassword, host)
}

// call sends one request to the repository full name ("" = catalog) and
// returns the response when its status is one of ok; otherwise the error
// is classified and the body closed.
func (r *Remote) call(ctx context.Context, full, method, path string, hdr http.Header, body io.Reader, length int64, ok ...int) (*http.Response, error) {
	c, err := r.client(ctx, full)
	if err != nil {
		return nil, err
	}
	u := path
	if !strings.Contains(path, "://") {
		p, query, _ := strings.Cut(path, "?") // the query must not be escaped into the path
		u = (&url.URL{Scheme: r.reg.Scheme(), Host: r.reg.RegistryStr(), Path: p, RawQuery: query}).String()
	}
	req, err := http.NewRequestWithContext(ctx, method, u, body)
	if err != nil {
		return nil, err
	}
	if body != nil {
		req.ContentLength = length
	}
	for k, v := range hdr {
		req.Header[k] = v
	}
	resp, err := c.Do(req)
	if err != nil {
		return nil, r.classify(fmt.Errorf("%s %s: %w", method, req.URL.Path, err), 0)
	}
	if err := transport.CheckError(resp, ok...); err != nil {
		resp.Body.Close()
		return nil, r.classify(fmt.Errorf("%s %s: %w", method, req.URL.Path, err), resp.StatusCode)
	}
	return resp, nil
}

func drain(resp *http.Response) {
	io.Copy(io.Discard, io.LimitReader(resp.Body, 1<<16))
	resp.Body.Close()
}

// lookupEnv is os.Getenv, a variable so that tests cannot leak credentials.
var lookupEnv = os.Getenv

// ---- blobs ----

func (r *Remote) checkBlobArgs(repo string, dgst v1.Hash) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	if len(fullName(r.prefix, repo)) > MaxRepositoryLength {
		return errkind.New(errkind.BadInput, "repository %s/%s is longer than %d characters", r.prefix, repo, MaxRepositoryLength)
	}
	return checkDigest(dgst)
}

// StatBlob returns the size of a blob the registry has in repo.
func (r *Remote) StatBlob(ctx context.Context, repo string, dgst v1.Hash) (int64, error) {
	if err := r.checkBlobArgs(repo, dgst); err != nil {
		return 0, err
	}
	full := fullName(r.prefix, repo)
	resp, err := r.call(ctx, full, http.MethodHead, "/v2/"+full+"/blobs/"+dgst.String(), nil, nil, 0, http.StatusOK)
	if err != nil {
		if errors.Is(err, ErrNotFound) {
			return 0, notFound("blob %s in %s", dgst, repo)
		}
		return 0, fmt.Errorf("stat blob %s: %w", dgst, err)
	}
	drain(resp)
	if resp.ContentLength < 0 {
		return 0, errkind.New(errkind.Integrity, "stat blob %s: the registry gave no size", dgst)
	}
	r.sawBlob(full, dgst, resp.ContentLength)
	return resp.ContentLength, nil
}

func (r *Remote) sawBlob(full string, dgst v1.Hash, size int64) {
	r.present.Store(repoKey(full, dgst), size)
	r.holders.Store(dgst, full)
}

// Blob opens a blob; the reader verifies size and digest and fails with
// ErrDigestMismatch (errkind.Integrity) instead of io.EOF on a mismatch.
func (r *Remote) Blob(ctx context.Context, repo string, dgst v1.Hash) (io.ReadCloser, error) {
	if err := r.checkBlobArgs(repo, dgst); err != nil {
		return nil, err
	}
	full := fullName(r.prefix, repo)
	resp, err := r.call(ctx, full, http.MethodGet, "/v2/"+full+"/blobs/"+dgst.String(), nil, nil, 0, http.StatusOK)
	if err != nil {
		if errors.Is(err, ErrNotFound) {
			return nil, notFound("blob %s in %s", dgst, repo)
		}
		return nil, fmt.Errorf("reading blob %s: %w", dgst, err)
	}
	return newCheckedReader(resp.Body, dgst, resp.ContentLength, "blob "+dgst.String()), nil
}

// PutBlob uploads a blob unless the registry already has it in repo (HEAD
// first); when this process saw the blob in another repository of the
// registry it asks for a cross-repository mount. The upload is one POST
// and one PUT with the whole body; content that does not hash to dgst or
// is not size bytes is cut off before its last byte and refused with
// ErrDigestMismatch (errkind.BadInput).
func (r *Remote) PutBlob(ctx context.Context, repo string, dgst v1.Hash, size int64, body io.Reader) error {
	if err := r.checkBlobArgs(repo, dgst); err != nil {
		return err
	}
	if size < 0 {
		return errkind.New(errkind.BadInput, "blob %s: negative size %d", dgst, size)
	}
	full := fullName(r.prefix, repo)
	if got, err := r.StatBlob(ctx, repo, dgst); err == nil && got == size {
		return nil
	} else if err != nil && !errors.Is(err, ErrNotFound) {
		return err
	}
	q := url.Values{}
	if from, ok := r.holders.Load(dgst); ok && from.(string) != full {
		q.Set("mount", dgst.String())
		q.Set("from", from.(string))
	}
	path := "/v2/" + full + "/blobs/uploads/"
	if len(q) > 0 {
		path += "?" + q.Encode()
	}
	resp, err := r.call(ctx, full, http.MethodPost, path, nil, nil, 0, http.StatusAccepted, http.StatusCreated)
	if err != nil {
		return fmt.Errorf("starting upload of blob %s: %w", dgst, err)
	}
	drain(resp)
	if resp.StatusCode == http.StatusCreated {
		r.sawBlob(full, dgst, size)
		return nil // mounted
	}
	loc, err := resp.Location()
	if err != nil {
		return errkind.New(errkind.Internal, "upload of blob %s: registry gave no upload location: %v", dgst, err)
	}
	qv := loc.Query()
	qv.Set("digest", dgst.String())
	loc.RawQuery = qv.Encode()
	ur := newUploadReader(body, dgst, size)
	hdr := http.Header{"Content-Type": {"application/octet-stream"}}
	resp, err = r.call(ctx, full, http.MethodPut, loc.String(), hdr, ur, size, http.StatusCreated)
	if ur.err != nil {
		return ur.err
	}
	if err != nil {
		return fmt.Errorf("uploading blob %s: %w", dgst, err)
	}
	drain(resp)
	r.sawBlob(full, dgst, size)
	return nil
}

// ---- manifests ----

// descriptorOf describes raw as the store does: media type, size, digest,
// and artifactType (the manifest's, else an image manifest's config media
// type, the distribution spec's rule for referrers).
func descriptorOf(mt types.MediaType, raw []byte, mf manifestFields) v1.Descriptor {
	sum := sha256.Sum256(raw)
	d := v1.Descriptor{MediaType: mt, Size: int64(len(raw)), Digest: v1.Hash{Algorithm: "sha256", Hex: hex.EncodeToString(sum[:])}, ArtifactType: mf.ArtifactType}
	if d.ArtifactType == "" && isImageManifest(mt) && mf.Config != nil {
		d.ArtifactType = string(mf.Config.MediaType)
	}
	return d
}

// PutManifest checks that every blob (or, for an index, every manifest) the
// manifest references is in repo, naming each missing digest, then puts
// the manifest under its keep tag and, when it has a subject, records it
// as a referrer (the referrers API, else the tag fallback and the
// per-referrer tag). Putting a present manifest again writes the same
// bytes again and changes nothing.
func (r *Remote) PutManifest(ctx context.Context, repo string, mediaType types.MediaType, raw []byte) (v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return v1.Descriptor{}, err
	}
	mf, mt, err := parseManifest(mediaType, raw)
	if err != nil {
		return v1.Descriptor{}, err
	}
	desc := descriptorOf(mt, raw, mf)
	full := fullName(r.prefix, repo)
	if err := r.checkReferences(ctx, repo, mt, mf); err != nil {
		return v1.Descriptor{}, fmt.Errorf("putting manifest %s into %s: %w", desc.Digest, repo, err)
	}
	// A release record is never collected: it needs no push time and no
	// read-back (see remote_pushtime.go for the others).
	collectable := !IsReleaseLogType(mf.ArtifactType)
	if collectable {
		if err := r.stamp(ctx, full, mt, raw, desc.Digest); err != nil {
			return v1.Descriptor{}, fmt.Errorf("putting manifest %s into %s: %w", desc.Digest, repo, err)
		}
	}
	resp, err := r.putManifest(ctx, full, keepTag(desc.Digest), mt, raw)
	if err != nil {
		return v1.Descriptor{}, fmt.Errorf("putting manifest %s into %s: %w", desc.Digest, repo, err)
	}
	if got := resp.Header.Get("Docker-Content-Digest"); got != "" && got != desc.Digest.String() {
		return v1.Descriptor{}, errkind.New(errkind.Integrity, "putting manifest %s into %s: the registry stored it as %s", desc.Digest, repo, got)
	}
	var referrer func() error
	if mf.Subject != nil {
		subjectHeader := resp.Header.Get("OCI-Subject") != ""
		referrer = func() error {
			if err := r.recordReferrer(ctx, repo, *mf.Subject, desc, mf, raw, subjectHeader); err != nil {
				return fmt.Errorf("recording %s as a referrer of %s: %w", desc.Digest, mf.Subject.Digest, err)
			}
			return nil
		}
		if err := referrer(); err != nil {
			return v1.Descriptor{}, err
		}
	}
	if collectable {
		if err := r.settle(ctx, full, mt, raw, desc.Digest, "", referrer); err != nil {
			return v1.Descriptor{}, fmt.Errorf("putting manifest %s into %s: %w", desc.Digest, repo, err)
		}
	}
	return desc, nil
}

func (r *Remote) putManifest(ctx context.Context, full, ref string, mt types.MediaType, raw []byte) (*http.Response, error) {
	hdr := http.Header{"Content-Type": {string(mt)}}
	resp, err := r.call(ctx, full, http.MethodPut, "/v2/"+full+"/manifests/"+ref, hdr, bytes.NewReader(raw), int64(len(raw)), http.StatusCreated, http.StatusOK, http.StatusAccepted)
	if err != nil {
		return nil, err
	}
	drain(resp)
	return resp, nil
}

// checkReferences applies checkRefs with the registry's lookups; a blob
// this process saw present (uploaded or mounted) is not asked for again.
func (r *Remote) checkReferences(ctx context.Context, repo string, mt types.MediaType, mf manifestFields) error {
	full := fullName(r.prefix, repo)
	return checkRefs(mt, mf, func(d v1.Hash) (int64, error) {
		if v, ok := r.present.Load(repoKey(full, d)); ok {
			return v.(int64), nil
		}
		return r.StatBlob(ctx, repo, d)
	}, func(d v1.Hash) error {
		_, _, err := r.Manifest(ctx, repo, d)
		return err
	})
}

// Manifest reads a manifest of repo by digest, at most MaxManifestSize
// bytes, and verifies it (a mismatch wraps ErrDigestMismatch, errkind
// Integrity).
func (r *Remote) Manifest(ctx context.Context, repo string, dgst v1.Hash) ([]byte, v1.Descriptor, error) {
	if err := r.checkBlobArgs(repo, dgst); err != nil {
		return nil, v1.Descriptor{}, err
	}
	raw, mt, err := r.getManifest(ctx, fullName(r.prefix, repo), dgst.String())
	if err != nil {
		if errors.Is(err, ErrNotFound) {
			return nil, v1.Descriptor{}, notFound("manifest %s in repository %s", dgst, repo)
		}
		return nil, v1.Descriptor{}, err
	}
	sum := sha256.Sum256(raw)
	if got := hex.EncodeToString(sum[:]); got != dgst.Hex {
		return nil, v1.Descriptor{}, errkind.New(errkind.Integrity, "reading manifest %s: %w: the registry's content hashes to sha256:%s", dgst, ErrDigestMismatch, got)
	}
	var mf manifestFields
	_ = json.Unmarshal(raw, &mf) // the digest matches: what was put was checked
	if mf.MediaType != "" {
		mt = mf.MediaType
	}
	return raw, descriptorOf(mt, raw, mf), nil
}

// getManifest fetches a manifest by tag or digest string, unverified.
func (r *Remote) getManifest(ctx context.Context, full, ref string) ([]byte, types.MediaType, error) {
	hdr := http.Header{"Accept": {acceptManifests}}
	resp, err := r.call(ctx, full, http.MethodGet, "/v2/"+full+"/manifests/"+ref, hdr, nil, 0, http.StatusOK)
	if err != nil {
		return nil, "", err
	}
	defer resp.Body.Close()
	raw, err := io.ReadAll(io.LimitReader(resp.Body, MaxManifestSize+1))
	if err != nil {
		return nil, "", fmt.Errorf("reading manifest %s: %w", ref, transient(err))
	}
	if len(raw) > MaxManifestSize {
		return nil, "", errkind.New(errkind.Integrity, "reading manifest %s: %w: larger than %d bytes", ref, ErrDigestMismatch, MaxManifestSize)
	}
	mt, _, _ := mime.ParseMediaType(resp.Header.Get("Content-Type"))
	return raw, types.MediaType(mt), nil
}

// ---- tags ----

func (r *Remote) checkTagArgs(repo, tag string) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	return ValidateTag(tag)
}

// Resolve returns the descriptor of the manifest repo:tag points at (a
// HEAD request; the digest is the registry's Docker-Content-Digest).
func (r *Remote) Resolve(ctx context.Context, repo, tag string) (v1.Descriptor, error) {
	if err := r.checkTagArgs(repo, tag); err != nil {
		return v1.Descriptor{}, err
	}
	full := fullName(r.prefix, repo)
	d, err := r.headOnce(ctx, full, tag)
	if errors.Is(err, ErrNotFound) {
		return v1.Descriptor{}, notFound("tag %s:%s", repo, tag)
	}
	if c := collectionOf(ctx); c != nil && err == nil {
		c.setResolved(full, tag, d.Digest)
	}
	return d, err
}

func (r *Remote) head(ctx context.Context, full, ref string) (v1.Descriptor, error) {
	hdr := http.Header{"Accept": {acceptManifests}}
	resp, err := r.call(ctx, full, http.MethodHead, "/v2/"+full+"/manifests/"+ref, hdr, nil, 0, http.StatusOK)
	if err != nil {
		return v1.Descriptor{}, err
	}
	drain(resp)
	mt, _, _ := mime.ParseMediaType(resp.Header.Get("Content-Type"))
	dg, err := ParseDigest(resp.Header.Get("Docker-Content-Digest"))
	if err != nil || resp.ContentLength < 0 {
		// The header is optional: fetch and hash instead.
		raw, mt2, err := r.getManifest(ctx, full, ref)
		if err != nil {
			return v1.Descriptor{}, err
		}
		sum := sha256.Sum256(raw)
		return v1.Descriptor{MediaType: mt2, Size: int64(len(raw)), Digest: v1.Hash{Algorithm: "sha256", Hex: hex.EncodeToString(sum[:])}}, nil
	}
	return v1.Descriptor{MediaType: types.MediaType(mt), Size: resp.ContentLength, Digest: dg}, nil
}

// Tag points repo:tag at a manifest of repo (read and verified first: a
// registry tags by receiving the manifest's bytes again).
//
// It refuses reserved tags and tags with a release log (CheckTagWrite).
func (r *Remote) Tag(ctx context.Context, repo, tag string, desc v1.Descriptor) error {
	if err := r.checkTagArgs(repo, tag); err != nil {
		return fmt.Errorf("tagging %s:%s: %w", repo, tag, err)
	}
	if err := CheckTagWrite(ctx, r, repo, tag); err != nil {
		return fmt.Errorf("tagging %s:%s: %w", repo, tag, err)
	}
	raw, md, err := r.tagTarget(ctx, repo, tag, desc)
	if err != nil {
		return fmt.Errorf("tagging %s:%s: %w", repo, tag, err)
	}
	full := fullName(r.prefix, repo)
	collectable := !isReleaseLogManifest(raw)
	if collectable {
		if err := r.stamp(ctx, full, md.MediaType, raw, md.Digest); err != nil {
			return fmt.Errorf("tagging %s:%s: %w", repo, tag, err)
		}
	}
	if _, err := r.putManifest(ctx, full, tag, md.MediaType, raw); err != nil {
		return fmt.Errorf("tagging %s:%s: %w", repo, tag, err)
	}
	if collectable {
		if err := r.settle(ctx, full, md.MediaType, raw, md.Digest, tag, nil); err != nil {
			return fmt.Errorf("tagging %s:%s: %w", repo, tag, err)
		}
	}
	return nil
}

func (r *Remote) tagTarget(ctx context.Context, repo, tag string, desc v1.Descriptor) ([]byte, v1.Descriptor, error) {
	if err := r.checkTagArgs(repo, tag); err != nil {
		return nil, v1.Descriptor{}, err
	}
	if isReservedTag(tag) {
		return nil, v1.Descriptor{}, errkind.New(errkind.BadInput, "tag %q: tags starting with sha256-<digest> are reserved for the store's referrer and keep tags", tag)
	}
	if err := checkDigest(desc.Digest); err != nil {
		return nil, v1.Descriptor{}, err
	}
	raw, md, err := r.Manifest(ctx, repo, desc.Digest)
	if err != nil {
		return nil, v1.Descriptor{}, err
	}
	if desc.Size != 0 && desc.Size != md.Size {
		return nil, v1.Descriptor{}, errkind.New(errkind.BadInput, "descriptor of %s says %d bytes, the stored manifest has %d", desc.Digest, desc.Size, md.Size)
	}
	return raw, md, nil
}

// SwapTag points repo:tag at desc only if it now points at old (a zero old:
// only if the tag does not exist). It reads the tag, compares, writes and
// reads back; a lost race wraps ErrConflict (errkind.Conflict). Exact
// between goroutines of this process; between processes see the Remote
// doc comment for the case it cannot see.
func (r *Remote) SwapTag(ctx context.Context, repo, tag string, old v1.Hash, desc v1.Descriptor) error {
	if err := checkSwapName(tag); err != nil {
		return fmt.Errorf("swapping %s:%s: %w%w", repo, tag, err, errSwapUntried)
	}
	if old != (v1.Hash{}) {
		if err := checkDigest(old); err != nil {
			return err
		}
	}
	raw, md, err := r.tagTarget(ctx, repo, tag, desc)
	if err != nil {
		return fmt.Errorf("swapping %s:%s: %w%w", repo, tag, err, errSwapUntried)
	}
	full := fullName(r.prefix, repo)
	lk, _ := r.tagLocks.LoadOrStore(full+":"+tag, &sync.Mutex{})
	lk.(*sync.Mutex).Lock()
	defer lk.(*sync.Mutex).Unlock()

	cur, err := r.head(ctx, full, tag)
	switch {
	case errors.Is(err, ErrNotFound) && old != (v1.Hash{}):
		return errkind.New(errkind.Conflict, "tag %s:%s does not exist, want it at %s: %w", repo, tag, old, ErrConflict)
	case errors.Is(err, ErrNotFound):
	case err != nil:
		// Nothing was written: a retry that then finds the tag moved
		// must not take the move for its own.
		return fmt.Errorf("swapping %s:%s: %w%w", repo, tag, err, errSwapUntried)
	case old == (v1.Hash{}):
		return errkind.New(errkind.Conflict, "tag %s:%s exists (points at %s), want it absent: %w", repo, tag, cur.Digest, ErrConflict)
	case cur.Digest != old:
		return errkind.New(errkind.Conflict, "tag %s:%s points at %s, want %s: %w", repo, tag, cur.Digest, old, ErrConflict)
	}
	collectable := !isReleaseLogManifest(raw)
	if collectable {
		if err := r.stamp(ctx, full, md.MediaType, raw, md.Digest); err != nil {
			return fmt.Errorf("swapping %s:%s: %w%w", repo, tag, err, errSwapUntried)
		}
	}
	if _, err := r.putManifest(ctx, full, tag, md.MediaType, raw); err != nil {
		return fmt.Errorf("swapping %s:%s: %w", repo, tag, err)
	}
	back, err := r.head(ctx, full, tag)
	if errors.Is(err, ErrNotFound) && collectable {
		// Gone right after we wrote it: a collection that deleted the
		// manifest (docker-registry deletes its tags with it) puts it
		// back in settle; anyone else removing the tag is an error.
		if ok, perr := r.presentByDigest(ctx, full, md.Digest); perr == nil && !ok {
			err = nil
			back = md
		}
	}
	if err != nil {
		return fmt.Errorf("swapping %s:%s: reading the tag back: %w", repo, tag, err)
	}
	if back.Digest != md.Digest {
		return errkind.New(errkind.Conflict, "tag %s:%s points at %s right after we wrote %s: another writer moved it: %w", repo, tag, back.Digest, md.Digest, ErrConflict)
	}
	if collectable {
		if err := r.settle(ctx, full, md.MediaType, raw, md.Digest, tag, nil); err != nil {
			return fmt.Errorf("swapping %s:%s: %w", repo, tag, err)
		}
	}
	return nil
}

// allTags lists every tag of a repository full name, ours included.
func (r *Remote) allTags(ctx context.Context, full string) ([]string, error) {
	c, err := r.client(ctx, full)
	if err != nil {
		return nil, err
	}
	repo, err := name.NewRepository(r.reg.RegistryStr()+"/"+full, r.nameOpts()...)
	if err != nil {
		return nil, errkind.Wrap(errkind.BadInput, err)
	}
	tags, err := remote.List(repo, remote.WithContext(ctx), remote.WithTransport(c.Transport))
	if err != nil {
		return nil, r.classify(fmt.Errorf("listing tags of %s: %w", full, err), 0)
	}
	return tags, nil
}

func (r *Remote) nameOpts() []name.Option {
	if r.insecure {
		return []name.Option{name.StrictValidation, name.Insecure}
	}
	return []name.Option{name.StrictValidation}
}

// Tags lists repo's tags, sorted, without the store's reserved tags. A
// repository the registry does not know gives ErrNotFound.
func (r *Remote) Tags(ctx context.Context, repo string) ([]string, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	all, err := r.tagList(ctx, fullName(r.prefix, repo))
	if errors.Is(err, ErrNotFound) {
		return nil, notFound("repository %s", repo)
	}
	if err != nil {
		return nil, err
	}
	tags := []string{}
	for _, t := range all {
		if !isReservedTag(t) && ValidateTag(t) == nil {
			tags = append(tags, t)
		}
	}
	sort.Strings(tags)
	return tags, nil
}

// Repositories lists the repositories under the store's prefix that the
// registry's catalog API lists, sorted. (A registry may list a repository
// that so far only received blobs.)
func (r *Remote) Repositories(ctx context.Context) ([]string, error) {
	c, err := r.client(ctx, "")
	if err != nil {
		return nil, err
	}
	all, err := remote.Catalog(ctx, r.reg, remote.WithTransport(c.Transport))
	if err != nil {
		return nil, r.catalogError(ctx, err)
	}
	repos := []string{}
	for _, full := range all {
		repo := full
		if r.prefix != "" {
			var ok bool
			if repo, ok = strings.CutPrefix(full, r.prefix+"/"); !ok {
				continue
			}
		}
		if ValidateRepository(repo) == nil {
			repos = append(repos, repo)
		}
	}
	sort.Strings(repos)
	return compactStrings(repos), nil
}

// catalogError classifies a failed catalog listing: a registry that
// answers it 404 or 405, or with the distribution spec's UNSUPPORTED code,
// does not list repositories (ErrNoCatalog, bad input: ask by name); one
// that refuses it 401 or 403 while its base endpoint accepts our
// credentials limits it to other accounts (ErrNoCatalog, not authorised);
// wrong credentials are an authentication failure. Anything else is classified as any other request.
func (r *Remote) catalogError(ctx context.Context, err error) error {
	var te *transport.Error
	if errors.As(err, &te) {
		unsupported := te.StatusCode == http.StatusNotFound || te.StatusCode == http.StatusMethodNotAllowed
		for _, d := range te.Errors {
			if d.Code == transport.UnsupportedErrorCode {
				unsupported = true
			}
		}
		host := r.reg.RegistryStr()
		switch {
		case te.StatusCode == http.StatusUnauthorized || te.StatusCode == http.StatusForbidden:
			// Wrong credentials are refused everywhere; a catalog kept
			// for other accounts is refused while the base endpoint answers.
			if resp, perr := r.call(ctx, "", http.MethodGet, "/v2/", nil, nil, 0, http.StatusOK); perr != nil {
				return perr
			} else {
				resp.Body.Close()
			}
			return errkind.New(errkind.Unauthorized, "%w: %s refuses its catalog to this account (HTTP %d)", ErrNoCatalog, host, te.StatusCode)
		case unsupported:
			return errkind.New(errkind.BadInput, "%w: %s has its catalog endpoint switched off (HTTP %d)", ErrNoCatalog, host, te.StatusCode)
		}
	}
	return r.classify(fmt.Errorf("listing the registry's catalog: %w", err), 0)
}

// Manifests lists the manifests of repo that the store put (their keep
// tags) and those that user tags point at, sorted by digest. Descriptors
// of kept manifests carry only the digest: read the manifest for the rest.
func (r *Remote) Manifests(ctx context.Context, repo string) ([]v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	full := fullName(r.prefix, repo)
	all, err := r.tagList(ctx, full)
	if errors.Is(err, ErrNotFound) {
		return []v1.Descriptor{}, nil
	}
	if err != nil {
		return nil, err
	}
	seen := map[v1.Hash]bool{}
	out := []v1.Descriptor{}
	for _, t := range all {
		if m := keepTagPattern.FindStringSubmatch(t); m != nil {
			d := v1.Hash{Algorithm: "sha256", Hex: m[1]}
			if !seen[d] {
				seen[d] = true
				out = append(out, v1.Descriptor{Digest: d})
			}
		}
	}
	for _, t := range all {
		if isReservedTag(t) || ValidateTag(t) != nil {
			continue
		}
		d, err := r.headOnce(ctx, full, t)
		if err != nil {
			if errors.Is(err, ErrNotFound) {
				continue // deleted meanwhile
			}
			return nil, err
		}
		if !seen[d.Digest] {
			seen[d.Digest] = true
			out = append(out, d)
		}
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Digest.String() < out[j].Digest.String() })
	return out, nil
}

// ---- referrers ----

const (
	referrersUnknown int32 = iota
	referrersAPI
	referrersFallback
)

// recordReferrer makes a referrer findable. With the referrers API (the
// PUT answered OCI-Subject, or a probe shows the API) the registry does
// it. Otherwise the per-referrer tag is written, then the spec's fallback
// index is updated by read, modify, write, read back (retried a few times
// when the read-back misses our entry, which narrows but cannot close the
// race the spec admits).
func (r *Remote) recordReferrer(ctx context.Context, repo string, subject v1.Descriptor, desc v1.Descriptor, mf manifestFields, raw []byte, subjectHeader bool) error {
	full := fullName(r.prefix, repo)
	if subjectHeader {
		r.referrersAPI.Store(referrersAPI)
	}
	if r.referrersAPI.Load() == referrersUnknown {
		resp, err := r.call(ctx, full, http.MethodGet, "/v2/"+full+"/referrers/"+subject.Digest.String(), nil, nil, 0, http.StatusOK)
		switch {
		case err == nil:
			ct, _, _ := mime.ParseMediaType(resp.Header.Get("Content-Type"))
			drain(resp)
			if ct == string(types.OCIImageIndex) {
				r.referrersAPI.Store(referrersAPI)
			} else {
				r.referrersAPI.Store(referrersFallback)
			}
		case errors.Is(err, ErrNotFound), errkind.Of(err) == errkind.BadInput:
			r.referrersAPI.Store(referrersFallback)
		default:
			return err
		}
	}
	if r.referrersAPI.Load() == referrersAPI {
		return nil
	}
	if _, err := r.putManifest(ctx, full, linkTag(subject.Digest, desc.Digest), desc.MediaType, raw); err != nil {
		return err
	}
	entry := desc
	entry.Annotations = mf.Annotations
	for range 4 {
		idx, err := r.fallbackIndex(ctx, full, subject.Digest)
		if err != nil {
			return err
		}
		if slicesContainDigest(idx.Manifests, desc.Digest) {
			return nil
		}
		idx.Manifests = append(idx.Manifests, entry)
		sort.Slice(idx.Manifests, func(i, j int) bool { return idx.Manifests[i].Digest.String() < idx.Manifests[j].Digest.String() })
		b, err := json.Marshal(idx)
		if err != nil {
			return err
		}
		if _, err := r.putManifest(ctx, full, fallbackTag(subject.Digest), types.OCIImageIndex, b); err != nil {
			return err
		}
	}
	// Still missing after four writes: the per-referrer tag finds it for
	// modelgate; other tools see it once the index is rewritten.
	return nil
}

func slicesContainDigest(ds []v1.Descriptor, d v1.Hash) bool {
	for _, x := range ds {
		if x.Digest == d {
			return true
		}
	}
	return false
}

// fallbackIndex reads the spec's fallback index of subject (empty when
// absent).
func (r *Remote) fallbackIndex(ctx context.Context, full string, subject v1.Hash) (*v1.IndexManifest, error) {
	raw, _, err := r.getManifest(ctx, full, fallbackTag(subject))
	if errors.Is(err, ErrNotFound) {
		return &v1.IndexManifest{SchemaVersion: 2, MediaType: types.OCIImageIndex, Manifests: []v1.Descriptor{}}, nil
	}
	if err != nil {
		return nil, err
	}
	var idx v1.IndexManifest
	if err := json.Unmarshal(raw, &idx); err != nil || idx.SchemaVersion != 2 {
		return nil, errkind.New(errkind.Integrity, "fallback referrers index %s is not an OCI image index", fallbackTag(subject))
	}
	if idx.Manifests == nil {
		idx.Manifests = []v1.Descriptor{}
	}
	return &idx, nil
}

// Referrers lists the manifests of repo whose subject is subject, sorted
// by digest, optionally of one artifactType. Candidates come from the
// referrers API, or from the fallback index and the per-referrer tags;
// each is then read and verified, and kept only when its subject really
// is subject, so descriptors carry the manifest's own artifactType and
// annotations (a registry's listing is not trusted for them).
func (r *Remote) Referrers(ctx context.Context, repo string, subject v1.Hash, artifactType string) ([]v1.Descriptor, error) {
	if err := r.checkBlobArgs(repo, subject); err != nil {
		return nil, err
	}
	full := fullName(r.prefix, repo)
	cands := map[string]bool{} // digests, or tags of per-referrer links
	if r.referrersAPI.Load() != referrersFallback {
		ans, err := r.askReferrersAPI(ctx, full, subject)
		if err != nil {
			return nil, err
		}
		for _, d := range ans.digests {
			cands[d.String()] = true
		}
	}
	// Link tags and the fallback index: on a registry without the API, and
	// on one with it as long as the repository has any (written before the
	// registry had the API).
	if _, clean := r.noFallbackTags.Load(full); r.referrersAPI.Load() != referrersAPI || !clean {
		all, err := r.tagList(ctx, full)
		if err != nil && !errors.Is(err, ErrNotFound) {
			return nil, err
		}
		legacy := false
		for _, t := range all {
			if m := linkTagPattern.FindStringSubmatch(t); m != nil {
				legacy = true
				if m[1] == subject.Hex {
					cands[t] = true
				}
			} else if fallbackTagPattern.MatchString(t) {
				legacy = true
			}
		}
		if err == nil && !legacy && r.referrersAPI.Load() == referrersAPI {
			r.noFallbackTags.Store(full, true)
		}
		idx, err := r.fallbackIndexOnce(ctx, full, subject, all)
		if err != nil {
			return nil, err
		}
		for _, d := range idx.Manifests {
			if checkDigest(d.Digest) == nil {
				cands[d.Digest.String()] = true
			}
		}
		for k := range cands {
			if d, err := ParseDigest(k); err == nil {
				delete(cands, linkTag(subject, d)) // read by digest once
			}
		}
	}
	keys := make([]string, 0, len(cands))
	for k := range cands {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	seen := map[v1.Hash]bool{}
	out := []v1.Descriptor{}
	for _, k := range keys {
		raw, mt, err := r.candidateManifest(ctx, repo, full, k)
		if errors.Is(err, ErrNotFound) {
			continue // listed but gone: stale index entry
		}
		if err != nil {
			return nil, err
		}
		var mf manifestFields
		if err := json.Unmarshal(raw, &mf); err != nil {
			return nil, errkind.New(errkind.Integrity, "referrer %s of %s is not a manifest: %v", k, subject, err)
		}
		if mf.MediaType != "" {
			mt = mf.MediaType
		}
		d := descriptorOf(mt, raw, mf)
		if strings.HasPrefix(k, "sha256:") && d.Digest.String() != k {
			return nil, errkind.New(errkind.Integrity, "referrer %s: %w: the registry's content hashes to %s", k, ErrDigestMismatch, d.Digest)
		}
		if m := linkTagPattern.FindStringSubmatch(k); m != nil && !strings.HasPrefix(d.Digest.Hex, m[2]) {
			return nil, errkind.New(errkind.Integrity, "referrer tag %s points at %s, not the referrer it names", k, d.Digest)
		}
		keepCandidate(ctx, repo, full, k, raw, d)
		if mf.Subject == nil || mf.Subject.Digest != subject || seen[d.Digest] {
			continue
		}
		if artifactType != "" && d.ArtifactType != artifactType {
			continue
		}
		seen[d.Digest] = true
		if len(mf.Annotations) > 0 {
			d.Annotations = mf.Annotations
		}
		out = append(out, d)
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Digest.String() < out[j].Digest.String() })
	return out, nil
}
