package main

import (
	"archive/tar"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/google/go-containerregistry/pkg/authn"
	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/layout"
	"github.com/google/go-containerregistry/pkg/v1/mutate"
)

// serviceRegistry returns the loopback docker-registry .ci/services.sh
// started; in CI (MODELGATE_REQUIRE_SERVICES=1 or CI set) its absence
// fails the test instead of skipping it.
func serviceRegistry(t *testing.T) (addr, user, password string) {
	t.Helper()
	addr = os.Getenv("MODELGATE_TEST_REGISTRY")
	if addr == "" {
		if os.Getenv("MODELGATE_REQUIRE_SERVICES") != "" || os.Getenv("CI") != "" {
			t.Fatal("MODELGATE_TEST_REGISTRY is not set: .ci/services.sh must start docker-registry in CI")
		}
		t.Skip("MODELGATE_TEST_REGISTRY not set (source .ci/services.sh to start docker-registry)")
	}
	return addr, os.Getenv("MODELGATE_TEST_REGISTRY_USER"), os.Getenv("MODELGATE_TEST_REGISTRY_PASSWORD")
}

func lookSkopeo(t *testing.T) string {
	t.Helper()
	p, err := exec.LookPath("skopeo")
	if err != nil {
		if os.Getenv("MODELGATE_REQUIRE_SERVICES") != "" || os.Getenv("CI") != "" {
			t.Fatalf("skopeo is required in CI: %v", err)
		}
		t.Skipf("skopeo not installed: %v", err)
	}
	return p
}

// TestImageRegistryRoundTrip builds the image from this module, pushes it
// to the loopback docker-registry, pulls it back with an independent OCI
// client (Debian's skopeo, containers/image: `skopeo copy docker://…
// oci:DIR:TAG` and `skopeo inspect --config`), and runs the binary it
// extracts from the pulled layer.
func TestImageRegistryRoundTrip(t *testing.T) {
	addr, user, password := serviceRegistry(t)
	skopeo := lookSkopeo(t)
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Minute)
	defer cancel()

	const version = "0.0.0-imagetest"
	created := time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)
	o := Options{Version: version, Revision: "0123456789abcdef0123456789abcdef01234567",
		Source: "https://example.invalid/modelgate", Arch: "amd64", CABundle: DefaultCABundle,
		ModuleDir: filepath.Join("..", ".."), Created: created}
	if _, err := os.Stat(o.CABundle); err != nil {
		t.Fatalf("the CA bundle the image ships (Debian's ca-certificates): %v", err)
	}
	img, err := Build(ctx, o)
	if err != nil {
		t.Fatal(err)
	}
	tag := "image-test-" + strings.ReplaceAll(time.Now().UTC().Format("150405.000000000"), ".", "-")
	repo := addr + "/modelgate-image-test/modelgate"
	pinned, err := Push(ctx, repo+":"+tag, true, &authn.Basic{Username: user, Password: password}, img)
	if err != nil {
		t.Fatal(err)
	}
	want, err := img.Digest()
	if err != nil {
		t.Fatal(err)
	}
	if !strings.HasSuffix(pinned, "@"+want.String()) {
		t.Fatalf("Push returned %s, want it pinned by %s", pinned, want)
	}

	// Pull it back with skopeo.
	dir := filepath.Join(t.TempDir(), "pulled")
	creds := user + ":" + password
	src := "docker://" + repo + ":" + tag
	cmd := exec.CommandContext(ctx, skopeo, "copy", "--preserve-digests", "--src-creds", creds, "--src-tls-verify=false", src, "oci:"+dir+":"+tag)
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("skopeo copy %s: %v\n%s", src, err, out)
	}
	cfgJSON, err := exec.CommandContext(ctx, skopeo, "inspect", "--config", "oci:"+dir+":"+tag).Output()
	if err != nil {
		t.Fatalf("skopeo inspect --config: %v", err)
	}
	var cfg v1.ConfigFile
	if err := json.Unmarshal(cfgJSON, &cfg); err != nil {
		t.Fatalf("skopeo's config: %v\n%s", err, cfgJSON)
	}
	if cfg.OS != "linux" || cfg.Architecture != "amd64" {
		t.Errorf("platform %s/%s, want linux/amd64", cfg.OS, cfg.Architecture)
	}
	if got := cfg.Config.User; got != "65532:65532" {
		t.Errorf("user %q, want a non-root 65532:65532", got)
	}
	if got := cfg.Config.Entrypoint; len(got) != 1 || got[0] != BinaryPath {
		t.Errorf("entrypoint %q, want [%s]", got, BinaryPath)
	}
	// image-spec annotations.md's pre-defined keys.
	for k, v := range map[string]string{
		"org.opencontainers.image.version":  version,
		"org.opencontainers.image.revision": o.Revision,
		"org.opencontainers.image.source":   o.Source,
		"org.opencontainers.image.created":  "2026-03-01T12:00:00Z",
	} {
		if got := cfg.Config.Labels[k]; got != v {
			t.Errorf("label %s = %q, want %q", k, got, v)
		}
	}

	// The pulled layout, read with go-containerregistry: the digest skopeo
	// kept, and the files of the flattened filesystem.
	p, err := layout.FromPath(dir)
	if err != nil {
		t.Fatal(err)
	}
	idx, err := p.ImageIndex()
	if err != nil {
		t.Fatal(err)
	}
	im, err := idx.IndexManifest()
	if err != nil {
		t.Fatal(err)
	}
	if len(im.Manifests) != 1 || im.Manifests[0].Digest != want {
		t.Fatalf("skopeo's index.json = %+v, want one manifest %s", im.Manifests, want)
	}
	pulled, err := idx.Image(want)
	if err != nil {
		t.Fatal(err)
	}
	files := extract(t, pulled)
	bin, ok := files[strings.TrimPrefix(BinaryPath, "/")]
	if !ok {
		t.Fatalf("no %s in the image; files: %v", BinaryPath, keys(files))
	}
	if bin.mode&0o111 == 0 {
		t.Errorf("%s mode %o, not executable", BinaryPath, bin.mode)
	}
	if err := checkStatic(bin.data); err != nil {
		t.Errorf("%s: %v", BinaryPath, err)
	}
	ca, ok := files[strings.TrimPrefix(CAPath, "/")]
	hostCA, _ := os.ReadFile(DefaultCABundle)
	if !ok || !bytes.Equal(ca.data, hostCA) {
		t.Errorf("%s in the image is not Debian's bundle (%d bytes, want %d)", CAPath, len(ca.data), len(hostCA))
	}
	if !strings.Contains(string(files["etc/passwd"].data), "modelgate:x:65532:65532:") {
		t.Errorf("/etc/passwd has no modelgate user:\n%s", files["etc/passwd"].data)
	}
	if h, ok := files[strings.TrimPrefix(HomeDir, "/")]; !ok || h.uid != UID {
		t.Errorf("%s is missing or not owned by %d: %+v", HomeDir, UID, h)
	}

	// Run the binary that came back from the registry.
	exe := filepath.Join(t.TempDir(), "modelgate")
	if err := os.WriteFile(exe, bin.data, 0o755); err != nil {
		t.Fatal(err)
	}
	out, err := exec.CommandContext(ctx, exe, "--version").CombinedOutput()
	if err != nil {
		t.Fatalf("modelgate --version from the image: %v\n%s", err, out)
	}
	if !strings.Contains(string(out), version) {
		t.Fatalf("modelgate --version printed %q, want the version %s stamped by the build", out, version)
	}
	t.Logf("pushed %s; pulled with skopeo; %s --version: %s", pinned, BinaryPath, strings.TrimSpace(string(out)))
	help, err := exec.CommandContext(ctx, exe, "--help").CombinedOutput()
	if err != nil || !strings.Contains(string(help), "Exit codes:") {
		t.Fatalf("modelgate --help from the image: %v\n%s", err, help)
	}
}

type tarFile struct {
	mode int64
	uid  int
	data []byte
}

func extract(t *testing.T, img v1.Image) map[string]tarFile {
	t.Helper()
	rc := mutate.Extract(img)
	defer rc.Close()
	tr := tar.NewReader(rc)
	files := map[string]tarFile{}
	for {
		h, err := tr.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
		b, err := io.ReadAll(tr)
		if err != nil {
			t.Fatal(err)
		}
		files[h.Name] = tarFile{mode: h.Mode, uid: h.Uid, data: b}
	}
	return files
}

func keys[V any](m map[string]V) []string {
	var out []string
	for k := range m {
		out = append(out, k)
	}
	return out
}

// TestCheckStatic refuses a dynamically linked binary: the image has no
// libc or loader. The host's /bin/sh (dynamically linked on Debian) is the
// outside example.
func TestCheckStatic(t *testing.T) {
	b, err := os.ReadFile("/bin/sh")
	if err != nil {
		t.Skip(err)
	}
	if err := checkStatic(b); err == nil || !strings.Contains(err.Error(), "dynamically linked") {
		t.Fatalf("checkStatic(/bin/sh) = %v, want dynamically linked", err)
	}
	if err := checkStatic([]byte("#!/bin/sh\n")); err == nil {
		t.Fatal("checkStatic accepted a script")
	}
}

func TestCreatedTime(t *testing.T) {
	for _, c := range []struct {
		flag, epoch, want string
		bad               bool
	}{
		{"", "", "1970-01-01T00:00:00Z", false},
		{"", "1700000000", "2023-11-14T22:13:20Z", false},
		{"2026-01-02T03:04:05+01:00", "1700000000", "2026-01-02T02:04:05Z", false},
		{"yesterday", "", "", true},
		{"", "soon", "", true},
	} {
		got, err := createdTime(c.flag, c.epoch)
		if (err != nil) != c.bad {
			t.Errorf("createdTime(%q, %q) error %v, want bad=%v", c.flag, c.epoch, err, c.bad)
			continue
		}
		if !c.bad && got.Format(time.RFC3339) != c.want {
			t.Errorf("createdTime(%q, %q) = %s, want %s", c.flag, c.epoch, got.Format(time.RFC3339), c.want)
		}
	}
}
