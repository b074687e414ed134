package kernel

import (
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"testing"
	"time"
)

// benchLossBatch is the log loss benchmark's batch: the workload's 16,384
// listeners, p the scorer's sigmoid of a normal score with standard
// deviation 2 (redrawn in the rare case it lands outside [Eps32, 1−Eps32],
// so that clipping changes nothing and numpy's unclipped expression computes
// the same loss), y = 1 with probability p. Fixed seed.
func benchLossBatch() (p, y []float32) {
	rng := rand.New(rand.NewPCG(20, 26))
	p, y = make([]float32, benchRows), make([]float32, benchRows)
	for i := range p {
		for {
			p[i] = float32(1 / (1 + math.Exp(-2*rng.NormFloat64())))
			if p[i] >= Eps32 && p[i] <= 1-Eps32 {
				break
			}
		}
		if rng.Float64() < float64(p[i]) {
			y[i] = 1
		}
	}
	return p, y
}

// BenchmarkLogLoss times LogLoss32 over the batch on the active path, one
// goroutine, call by call, and reports rows/s of the fastest call (the
// statistic bench/logloss_numpy.py reports for numpy; bench/run.sh runs
// both with 300 calls) and of the mean. With MODELGATE_BENCH_DUMP=DIR it
// also writes the batch (p.f32, y.f32, little-endian) and its loss
// (loss.txt) to DIR.
func BenchmarkLogLoss(b *testing.B) {
	p, y := benchLossBatch()
	loss := LogLoss32(p, y)
	if dir := os.Getenv("MODELGATE_BENCH_DUMP"); dir != "" {
		for name, data := range map[string][]float32{"p.f32": p, "y.f32": y} {
			if err := writeFloats(filepath.Join(dir, name), data); err != nil {
				b.Fatal(err)
			}
		}
		if err := os.WriteFile(filepath.Join(dir, "loss.txt"), []byte(fmt.Sprintf("%.17g\n", loss)), 0o644); err != nil {
			b.Fatal(err)
		}
	}
	var sink float64
	best := time.Duration(math.MaxInt64)
	for b.Loop() {
		t0 := time.Now()
		sink += LogLoss32(p, y)
		best = min(best, time.Since(t0))
	}
	rows := float64(len(p))
	b.ReportMetric(rows/best.Seconds(), "rows/s")
	b.ReportMetric(rows*float64(b.N)/b.Elapsed().Seconds(), "mean-rows/s")
	b.Logf("kernel path %s, %d rows, log loss %.9g", active.name, len(p), loss)
	_ = sink
}

// BenchmarkLogLossPaths times LogLoss32 on every path the CPU has.
func BenchmarkLogLossPaths(b *testing.B) {
	p, y := benchLossBatch()
	benchBackend(b, func(b *testing.B) {
		for b.Loop() {
			LogLoss32(p, y)
		}
		b.ReportMetric(float64(len(p))*float64(b.N)/b.Elapsed().Seconds(), "rows/s")
	})
}

// BenchmarkLog32Paths times Log32 over the batch's predictions on every
// path.
func BenchmarkLog32Paths(b *testing.B) {
	p, _ := benchLossBatch()
	dst := make([]float32, len(p))
	benchBackend(b, func(b *testing.B) {
		for b.Loop() {
			Log32(dst, p)
		}
		b.ReportMetric(float64(len(p))*float64(b.N)/b.Elapsed().Seconds(), "values/s")
	})
}

func writeFloats(path string, x []float32) error {
	buf := make([]byte, 4*len(x))
	for i, v := range x {
		bits := math.Float32bits(v)
		buf[4*i], buf[4*i+1], buf[4*i+2], buf[4*i+3] = byte(bits), byte(bits>>8), byte(bits>>16), byte(bits>>24)
	}
	return os.WriteFile(path, buf, 0o644)
}
