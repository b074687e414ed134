package registry_test

import (
	"context"
	"net/http"
	"path/filepath"
	"testing"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/fixture/bigmodel"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
)

// benchModel writes an encoder whose tensor file is about mb MiB and
// returns its checked directory (blobs in memory).
func benchModel(b *testing.B, mb int) *modeldir.Dir {
	b.Helper()
	m := bigmodel.Encoder(mb, 1, 1)
	p := filepath.Join(b.TempDir(), "model")
	if err := modeldir.Write(p, m); err != nil {
		b.Fatal(err)
	}
	d, err := modeldir.Check(p)
	if err != nil {
		b.Fatal(err)
	}
	return d
}

// benchPush pushes the model's blobs, manifest and tag with the same code
// path as `modelgate push` (artifact.PushArtifact) into stores made by
// open: "cold" into an empty store each time, "present" into a store that
// already has everything (only the existence checks and the tag remain).
// It reports MB/s of the model's bytes and HTTP requests per push.
func benchPush(b *testing.B, d *modeldir.Dir, open func(b *testing.B, fresh bool) (registry.Store, *countingTransport)) {
	config, layers, ann, err := artifact.ModelBlobs(d)
	if err != nil {
		b.Fatal(err)
	}
	size := config.Desc.Size
	for _, l := range layers {
		size += l.Desc.Size
	}
	ctx := context.Background()
	ref := registry.Ref{Repository: "podcast/bench-encoder", Tag: "v1"}
	at := artifact.ArtifactType(model.KindEncoder)
	push := func(s registry.Store) {
		if _, err := artifact.PushArtifact(ctx, s, ref, at, config, layers, nil, ann, artifact.Options{}); err != nil {
			b.Fatal(err)
		}
	}
	b.Run("cold", func(b *testing.B) {
		b.SetBytes(size)
		var reqs int64
		for i := 0; i < b.N; i++ {
			b.StopTimer()
			s, ct := open(b, true)
			b.StartTimer()
			push(s)
			reqs += ct.n.Load()
		}
		b.ReportMetric(float64(reqs)/float64(b.N), "requests/op")
	})
	b.Run("present", func(b *testing.B) {
		s, ct := open(b, true)
		push(s)
		b.SetBytes(size)
		b.ResetTimer()
		ct.n.Store(0)
		for i := 0; i < b.N; i++ {
			push(s)
		}
		b.ReportMetric(float64(ct.n.Load())/float64(b.N), "requests/op")
	})
}

// BenchmarkRemotePush200MB: a 200 MiB model pushed to the registry server
// (docker-registry with basic auth, through the retry wrapper as
// openStore builds it) and to the GCS emulator. Run with -benchtime=2x:
//
//	go test ./internal/registry/ -run '^$' -bench RemotePush200MB -benchtime=2x
func BenchmarkRemotePush200MB(b *testing.B) {
	d := benchModel(b, 200)
	b.Run("docker-registry", func(b *testing.B) {
		addr, auth := serviceRegistry(b)
		benchPush(b, d, func(b *testing.B, fresh bool) (registry.Store, *countingTransport) {
			ct := &countingTransport{inner: http.DefaultTransport}
			r := openRemote(b, addr+"/"+uniquePrefix(b), registry.WithRemoteAuth(auth), registry.WithRemoteTransport(ct))
			return registry.NewRetry(r, registry.RetryOptions{}), ct
		})
	})
	b.Run("gcs-emulator", func(b *testing.B) {
		benchPush(b, d, func(b *testing.B, fresh bool) (registry.Store, *countingTransport) {
			ct := &countingTransport{}
			_, c := gcsEmulator(b, func(rt http.RoundTripper) http.RoundTripper { ct.inner = rt; return ct })
			return registry.NewRetry(registry.NewGCS(c, testBucket, "bench"), registry.RetryOptions{}), ct
		})
	})
}
