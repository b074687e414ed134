// Command image builds modelgate's container image without a Docker
// daemon: it compiles a static binary (CGO_ENABLED=0) for linux, puts it in
// one layer with a CA certificate bundle, a non-root user and a writable
// home, on an empty base, and writes the image as an OCI image layout
// and/or pushes it to a registry (go-containerregistry does both).
//
//	go run ./tools/image --version 0.2.0 --revision "$(git rev-parse HEAD)" \
//	    --push registry.example.com/tools/modelgate:0.2.0
//	go run ./tools/image --layout out/image          # an OCI layout, tag "latest"
//
// The image: entrypoint /usr/local/bin/modelgate; user 65532:65532
// ("modelgate", home /home/modelgate, so the blob cache and XDG paths have
// somewhere to live); /etc/ssl/certs/ca-certificates.crt from --ca-bundle
// (default: Debian's ca-certificates bundle at that path, with its copyright
// file); a world-writable /tmp; OCI labels and manifest annotations
// org.opencontainers.image.{source,version,revision,created,title}. Every
// file's time is --created (default $SOURCE_DATE_EPOCH, else the Unix
// epoch), so the same binary gives the same image digest.
//
// Registry credentials: $MODELGATE_REGISTRY_USER and
// $MODELGATE_REGISTRY_PASSWORD when set, else the docker keychain;
// --insecure talks plain HTTP (a loopback registry in CI).
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"os"
	"os/signal"
	"runtime"
	"strconv"
	"time"

	"github.com/google/go-containerregistry/pkg/authn"
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt)
	defer stop()
	if err := run(ctx, os.Args[1:]); err != nil {
		fmt.Fprintln(os.Stderr, "image:", err)
		var u usageError
		if errors.As(err, &u) {
			os.Exit(2)
		}
		os.Exit(1)
	}
}

type usageError struct{ error }

func run(ctx context.Context, args []string) error {
	fs := flag.NewFlagSet("image", flag.ContinueOnError)
	var o Options
	var created string
	fs.StringVar(&o.Version, "version", "0.1.0-dev", "the version baked into the binary and the version label")
	fs.StringVar(&o.Revision, "revision", "", "the source revision (a commit id) for the revision label")
	fs.StringVar(&o.Source, "source", "", "the source repository URL for the source label")
	fs.StringVar(&o.Arch, "arch", runtime.GOARCH, "the linux architecture to build for (GOARCH)")
	fs.StringVar(&o.CABundle, "ca-bundle", DefaultCABundle, "the PEM CA certificate bundle to ship")
	fs.StringVar(&o.Binary, "binary", "", "ship this prebuilt static linux binary instead of building ./cmd/modelgate")
	fs.StringVar(&created, "created", "", "the image's creation time, RFC 3339 (default $SOURCE_DATE_EPOCH, else 1970-01-01T00:00:00Z)")
	layoutDir := fs.String("layout", "", "write the image to this OCI image layout directory (tag \"latest\", or --tag)")
	tag := fs.String("tag", "latest", "the ref.name of the image in --layout")
	push := fs.String("push", "", "push the image to this registry reference (HOST[:PORT]/REPO:TAG)")
	insecure := fs.Bool("insecure", false, "plain HTTP to the registry of --push")
	if err := fs.Parse(args); err != nil {
		return usageError{err}
	}
	if fs.NArg() > 0 {
		return usageError{fmt.Errorf("unexpected arguments %q", fs.Args())}
	}
	if *layoutDir == "" && *push == "" {
		return usageError{errors.New("say where the image goes: --layout DIR and/or --push REF")}
	}
	t, err := createdTime(created, os.Getenv("SOURCE_DATE_EPOCH"))
	if err != nil {
		return usageError{err}
	}
	o.Created = t
	img, err := Build(ctx, o)
	if err != nil {
		return err
	}
	d, err := img.Digest()
	if err != nil {
		return err
	}
	if *layoutDir != "" {
		if err := WriteLayout(*layoutDir, *tag, img); err != nil {
			return err
		}
		fmt.Printf("wrote %s to %s (ref.name %s)\n", d, *layoutDir, *tag)
	}
	if *push != "" {
		var auth authn.Authenticator
		if u := os.Getenv("MODELGATE_REGISTRY_USER"); u != "" {
			auth = &authn.Basic{Username: u, Password: os.Getenv("MODELGATE_REGISTRY_PASSWORD")}
		}
		ref, err := Push(ctx, *push, *insecure, auth, img)
		if err != nil {
			return err
		}
		fmt.Printf("pushed %s\n", ref)
	}
	return nil
}

func createdTime(flagValue, epoch string) (time.Time, error) {
	switch {
	case flagValue != "":
		t, err := time.Parse(time.RFC3339, flagValue)
		if err != nil {
			return time.Time{}, fmt.Errorf("--created %q: want RFC 3339", flagValue)
		}
		return t.UTC(), nil
	case epoch != "":
		s, err := strconv.ParseInt(epoch, 10, 64)
		if err != nil {
			return time.Time{}, fmt.Errorf("SOURCE_DATE_EPOCH %q: want seconds since 1970", epoch)
		}
		return time.Unix(s, 0).UTC(), nil
	}
	return time.Unix(0, 0).UTC(), nil
}
