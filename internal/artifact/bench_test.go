package artifact

import (
	"context"
	"io"
	"os"
	"path/filepath"
	"syscall"
	"testing"
	"time"

	"github.com/modelgate/modelgate/internal/fixture/bigmodel"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
)

// bigModel writes an encoder whose one tensor file is about mb megabytes.
func bigModel(b testing.TB, dir string, mb int) string {
	b.Helper()
	p := filepath.Join(dir, "model")
	if err := modeldir.Write(p, bigmodel.Encoder(mb, 1, 1)); err != nil {
		b.Fatal(err)
	}
	return p
}

func copyFile(src, dst string) error {
	in, err := os.Open(src)
	if err != nil {
		return err
	}
	defer in.Close()
	out, err := os.Create(dst)
	if err != nil {
		return err
	}
	if _, err := io.Copy(out, in); err != nil {
		out.Close()
		return err
	}
	if err := out.Sync(); err != nil {
		out.Close()
		return err
	}
	return out.Close()
}

// BenchmarkPushPull200MB compares push and pull of a model whose tensor
// file is 200 MiB with a plain file copy (io.Copy file to file, which is
// copy_file_range(2) on Linux, then fsync) of the same bytes on the same
// disk. Cloud disks throttle after a burst and the machine is shared, so
// one round runs all three, in an order that rotates from round to round,
// each after sync(2) has flushed the previous one's writes, and their
// outputs are removed afterwards. Push goes into an empty store created
// before its clock starts. The metrics are MB/s over all rounds and
// the ratios push/copy and pull/copy (the aim is at least 0.8).
func BenchmarkPushPull200MB(b *testing.B) {
	root := b.TempDir()
	dir := bigModel(b, root, 200)
	src := filepath.Join(dir, "encoder.safetensors")
	st, err := os.Stat(src)
	if err != nil {
		b.Fatal(err)
	}
	size := st.Size()
	ctx := context.Background()
	ref := registry.Ref{Repository: "bench-encoder", Tag: "v1"}
	pullStore, err := registry.OpenLocal(filepath.Join(root, "pull-store"))
	if err != nil {
		b.Fatal(err)
	}
	if _, err := PushModelDir(ctx, pullStore, dir, ref, Options{}); err != nil {
		b.Fatal(err)
	}
	out := filepath.Join(root, "out")
	var pushStore *registry.Local
	ops := []struct {
		name  string
		setup func() error // untimed
		run   func() error
		took  time.Duration
	}{
		{name: "copy", run: func() error { return copyFile(src, out) }},
		{name: "push", setup: func() (err error) {
			pushStore, err = registry.OpenLocal(out) // an empty store, as a fresh disk holds
			return err
		}, run: func() error {
			_, err := PushModelDir(ctx, pushStore, dir, ref, Options{})
			return err
		}},
		{name: "pull", run: func() error {
			_, err := Pull(ctx, pullStore, ref, out, Options{})
			return err
		}},
	}
	b.SetBytes(size)
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		for k := range ops {
			op := &ops[(i+k)%len(ops)]
			b.StopTimer()
			if err := os.RemoveAll(out); err != nil {
				b.Fatal(err)
			}
			if op.setup != nil {
				if err := op.setup(); err != nil {
					b.Fatal(err)
				}
			}
			syscall.Sync()
			b.StartTimer()
			start := time.Now()
			if err := op.run(); err != nil {
				b.Fatalf("%s: %v", op.name, err)
			}
			op.took += time.Since(start)
		}
	}
	b.StopTimer()
	mbps := func(d time.Duration) float64 { return float64(size) * float64(b.N) / d.Seconds() / 1e6 }
	for _, op := range ops {
		b.ReportMetric(mbps(op.took), op.name+"-MB/s")
	}
	b.ReportMetric(ops[0].took.Seconds()/ops[1].took.Seconds(), "push/copy")
	b.ReportMetric(ops[0].took.Seconds()/ops[2].took.Seconds(), "pull/copy")
}
