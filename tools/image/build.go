package main

import (
	"archive/tar"
	"bytes"
	"compress/gzip"
	"context"
	"debug/elf"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"time"

	"github.com/google/go-containerregistry/pkg/authn"
	"github.com/google/go-containerregistry/pkg/name"
	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/empty"
	"github.com/google/go-containerregistry/pkg/v1/layout"
	"github.com/google/go-containerregistry/pkg/v1/mutate"
	"github.com/google/go-containerregistry/pkg/v1/remote"
	"github.com/google/go-containerregistry/pkg/v1/static"
	"github.com/google/go-containerregistry/pkg/v1/types"
)

// DefaultCABundle is where Debian's ca-certificates package keeps its
// bundle (and where Go's crypto/x509 looks first on linux).
const DefaultCABundle = "/etc/ssl/certs/ca-certificates.crt"

// Paths and ids inside the image.
const (
	BinaryPath   = "/usr/local/bin/modelgate"
	CAPath       = "/etc/ssl/certs/ca-certificates.crt"
	caCopyright  = "/usr/share/doc/ca-certificates/copyright"
	HomeDir      = "/home/modelgate"
	UID          = 65532
	UserName     = "modelgate"
	labelPrefix  = "org.opencontainers.image."
	defaultTitle = "modelgate"
)

// Options says what goes into the image.
type Options struct {
	Version  string
	Revision string
	Source   string
	Arch     string
	CABundle string
	// Binary, when set, is shipped as is (it must be a static linux ELF);
	// otherwise Build compiles ./cmd/modelgate of the module at ModuleDir
	// ("" = the working directory).
	Binary    string
	ModuleDir string
	Created   time.Time
}

// Build compiles (or takes) the binary and assembles the image.
func Build(ctx context.Context, o Options) (v1.Image, error) {
	bin := o.Binary
	if bin == "" {
		dir, err := os.MkdirTemp("", "modelgate-image-")
		if err != nil {
			return nil, err
		}
		defer os.RemoveAll(dir)
		bin = filepath.Join(dir, "modelgate")
		if err := compile(ctx, o, bin); err != nil {
			return nil, err
		}
	}
	binBytes, err := os.ReadFile(bin)
	if err != nil {
		return nil, fmt.Errorf("reading the binary: %w", err)
	}
	if err := checkStatic(binBytes); err != nil {
		return nil, fmt.Errorf("binary %s: %w", bin, err)
	}
	ca, err := os.ReadFile(o.CABundle)
	if err != nil {
		return nil, fmt.Errorf("reading the CA bundle (install Debian's ca-certificates or pass --ca-bundle): %w", err)
	}
	if !bytes.Contains(ca, []byte("-----BEGIN CERTIFICATE-----")) {
		return nil, fmt.Errorf("CA bundle %s holds no PEM certificate", o.CABundle)
	}
	var caLicense []byte
	if o.CABundle == DefaultCABundle {
		caLicense, _ = os.ReadFile(caCopyright) // shipped with the bundle when Debian's package is there
	}
	layerTar, err := rootTar(binBytes, ca, caLicense, o.Created)
	if err != nil {
		return nil, err
	}
	return assemble(o, layerTar)
}

// compile builds ./cmd/modelgate as a static linux binary with the
// version stamped in.
func compile(ctx context.Context, o Options, out string) error {
	// The version variable's package path, asked of the go tool so that a
	// change of module path needs no change here.
	lst := exec.CommandContext(ctx, "go", "list", "-f", "{{.ImportPath}}", "./internal/version")
	lst.Dir = o.ModuleDir
	pkg, err := lst.Output()
	if err != nil {
		return fmt.Errorf("go list ./internal/version (run from the module's root): %w", err)
	}
	ldflags := fmt.Sprintf("-s -w -X %s.Version=%s", strings.TrimSpace(string(pkg)), o.Version)
	cmd := exec.CommandContext(ctx, "go", "build", "-trimpath", "-ldflags", ldflags, "-o", out, "./cmd/modelgate")
	cmd.Dir = o.ModuleDir
	cmd.Env = append(os.Environ(), "CGO_ENABLED=0", "GOOS=linux", "GOARCH="+o.Arch)
	cmd.Stderr = os.Stderr
	if err := cmd.Run(); err != nil {
		return fmt.Errorf("go build ./cmd/modelgate: %w", err)
	}
	return nil
}

// checkStatic refuses a binary that needs a dynamic loader: the image has
// no libc.
func checkStatic(b []byte) error {
	f, err := elf.NewFile(bytes.NewReader(b))
	if err != nil {
		return fmt.Errorf("not an ELF binary: %w", err)
	}
	for _, p := range f.Progs {
		if p.Type == elf.PT_INTERP {
			return errors.New("dynamically linked (it has an ELF interpreter): build with CGO_ENABLED=0")
		}
	}
	return nil
}

// rootTar is the image's only layer: the directories, the binary, the CA
// bundle, the user database and a writable home and /tmp.
func rootTar(bin, ca, caLicense []byte, mtime time.Time) ([]byte, error) {
	var buf bytes.Buffer
	tw := tar.NewWriter(&buf)
	dir := func(path string, mode int64, uid int) error {
		return tw.WriteHeader(&tar.Header{Typeflag: tar.TypeDir, Name: path + "/", Mode: mode, Uid: uid, Gid: uid, ModTime: mtime, Format: tar.FormatPAX})
	}
	file := func(path string, mode int64, b []byte) error {
		if err := tw.WriteHeader(&tar.Header{Typeflag: tar.TypeReg, Name: path, Mode: mode, Size: int64(len(b)), ModTime: mtime, Format: tar.FormatPAX}); err != nil {
			return err
		}
		_, err := tw.Write(b)
		return err
	}
	passwd := fmt.Sprintf("root:x:0:0:root:/root:/sbin/nologin\n%s:x:%d:%d:%s:%s:/sbin/nologin\n", UserName, UID, UID, UserName, HomeDir)
	group := fmt.Sprintf("root:x:0:\n%s:x:%d:\n", UserName, UID)
	steps := []func() error{
		func() error { return dir("etc", 0o755, 0) },
		func() error { return file("etc/passwd", 0o644, []byte(passwd)) },
		func() error { return file("etc/group", 0o644, []byte(group)) },
		func() error { return dir("etc/ssl", 0o755, 0) },
		func() error { return dir("etc/ssl/certs", 0o755, 0) },
		func() error { return file(strings.TrimPrefix(CAPath, "/"), 0o644, ca) },
		func() error { return dir("home", 0o755, 0) },
		func() error { return dir(strings.TrimPrefix(HomeDir, "/"), 0o700, UID) },
		func() error { return dir("tmp", 0o1777, 0) },
		func() error { return dir("usr", 0o755, 0) },
		func() error { return dir("usr/local", 0o755, 0) },
		func() error { return dir("usr/local/bin", 0o755, 0) },
		func() error { return file(strings.TrimPrefix(BinaryPath, "/"), 0o755, bin) },
	}
	if caLicense != nil {
		steps = append(steps,
			func() error { return dir("usr/share", 0o755, 0) },
			func() error { return dir("usr/share/doc", 0o755, 0) },
			func() error { return dir("usr/share/doc/ca-certificates", 0o755, 0) },
			func() error { return file(strings.TrimPrefix(caCopyright, "/"), 0o644, caLicense) },
		)
	}
	for _, s := range steps {
		if err := s(); err != nil {
			return nil, fmt.Errorf("writing the layer: %w", err)
		}
	}
	if err := tw.Close(); err != nil {
		return nil, err
	}
	return buf.Bytes(), nil
}

// assemble puts the layer on an empty base with the config and labels.
func assemble(o Options, layerTar []byte) (v1.Image, error) {
	gz, err := gzipBytes(layerTar)
	if err != nil {
		return nil, err
	}
	layer := static.NewLayer(gz, types.OCILayer)
	img := mutate.MediaType(empty.Image, types.OCIManifestSchema1)
	img = mutate.ConfigMediaType(img, types.OCIConfigJSON)
	img, err = mutate.Append(img, mutate.Addendum{Layer: layer, History: v1.History{
		Created: v1.Time{Time: o.Created}, CreatedBy: "modelgate tools/image", Comment: "modelgate binary, CA certificates, user " + UserName}})
	if err != nil {
		return nil, err
	}
	cf, err := img.ConfigFile()
	if err != nil {
		return nil, err
	}
	cf = cf.DeepCopy()
	cf.Architecture = o.Arch
	cf.OS = "linux"
	cf.Created = v1.Time{Time: o.Created}
	labels := Labels(o)
	cf.Config = v1.Config{
		Entrypoint: []string{BinaryPath},
		Env: []string{
			"PATH=/usr/local/bin",
			"HOME=" + HomeDir,
			"SSL_CERT_FILE=" + CAPath,
		},
		User:       fmt.Sprintf("%d:%d", UID, UID),
		WorkingDir: HomeDir,
		Labels:     labels,
	}
	img, err = mutate.ConfigFile(img, cf)
	if err != nil {
		return nil, err
	}
	return mutate.Annotations(img, labels).(v1.Image), nil
}

// Labels are the OCI labels (and manifest annotations) of the image:
// image-spec annotations.md's pre-defined keys.
func Labels(o Options) map[string]string {
	l := map[string]string{
		labelPrefix + "title":   defaultTitle,
		labelPrefix + "version": o.Version,
		labelPrefix + "created": o.Created.Format(time.RFC3339),
	}
	if o.Revision != "" {
		l[labelPrefix+"revision"] = o.Revision
	}
	if o.Source != "" {
		l[labelPrefix+"source"] = o.Source
	}
	return l
}

// WriteLayout writes img into the OCI image layout at dir (created when
// missing), named tag by its ref.name annotation.
func WriteLayout(dir, tag string, img v1.Image) error {
	p, err := layout.FromPath(dir)
	if err != nil {
		if p, err = layout.Write(dir, empty.Index); err != nil {
			return fmt.Errorf("creating the layout %s: %w", dir, err)
		}
	}
	return p.AppendImage(img, layout.WithAnnotations(map[string]string{"org.opencontainers.image.ref.name": tag}))
}

// Push writes img to the registry reference s with auth (nil: the docker
// keychain) and returns it pinned by digest.
func Push(ctx context.Context, s string, insecure bool, auth authn.Authenticator, img v1.Image) (string, error) {
	var opts []name.Option
	if insecure {
		opts = append(opts, name.Insecure)
	}
	ref, err := name.ParseReference(s, opts...)
	if err != nil {
		return "", usageError{fmt.Errorf("--push %q: %w", s, err)}
	}
	ro := remote.WithAuthFromKeychain(authn.DefaultKeychain)
	if auth != nil {
		ro = remote.WithAuth(auth)
	}
	if err := remote.Write(ref, img, ro, remote.WithContext(ctx)); err != nil {
		return "", fmt.Errorf("pushing %s: %w", ref, err)
	}
	d, err := img.Digest()
	if err != nil {
		return "", err
	}
	return ref.Context().Digest(d.String()).String(), nil
}

// gzipBytes compresses b with no name or time in the gzip header, so the
// layer's digest depends on its content only.
func gzipBytes(b []byte) ([]byte, error) {
	var buf bytes.Buffer
	zw, err := gzip.NewWriterLevel(&buf, gzip.BestCompression)
	if err != nil {
		return nil, err
	}
	if _, err := zw.Write(b); err != nil {
		return nil, err
	}
	if err := zw.Close(); err != nil {
		return nil, err
	}
	return buf.Bytes(), nil
}
