package checks

import (
	"context"
	"errors"
	"fmt"
	"io"
	"time"

	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/errkind"
)

// readAheadDepth is how many batches the reader may hold at once: one
// being read, one through the forward pass, one in the statistics and one
// waiting between two of them. Memory stays bounded by the batch size
// times this depth.
const readAheadDepth = 4

// framePair is one batch as read for the candidate (fc) and, when the
// baseline reads the holdout differently, for the baseline (fb).
type framePair struct {
	fc, fb data.Frame
	n      int
	// pc and pb are the candidate's and the baseline's predictions for
	// the batch (a scorer's), kept with it for the statistics.
	pc, pb []float32
	// end: no more batches; readSeconds is then the reader's total time.
	end         bool
	readSeconds float64
	err         error
	free        chan<- *framePair
}

// release hands the pair back to the reader for the next batch.
func (fp *framePair) release() { fp.free <- fp }

// readAhead reads rows [lo, hi) of the holdout (hi < 0: to the end) in
// batches of size rows from rc and, when not nil, rb, in a goroutine of
// its own, and sends them in file order. The last value sent has end or
// err set. stop ends the reading and waits for the goroutine, so the
// readers may be closed after it; call it before returning.
func readAhead(ctx context.Context, rc, rb data.Reader, size int, lo, hi int64) (<-chan *framePair, func()) {
	out := make(chan *framePair, readAheadDepth)
	free := make(chan *framePair, readAheadDepth)
	for range readAheadDepth {
		free <- &framePair{free: free}
	}
	ctx, cancel := context.WithCancel(ctx)
	done := make(chan struct{})
	go func() {
		defer close(done)
		defer close(out)
		var pos int64
		seconds := 0.0
		for {
			if ctx.Err() != nil {
				return
			}
			var fp *framePair
			select {
			case fp = <-free:
			case <-ctx.Done():
				return
			}
			fp.n, fp.end, fp.err = 0, false, nil
			want := size
			if pos < lo {
				want = int(min(int64(want), lo-pos))
			} else if hi >= 0 {
				want = int(min(int64(want), hi-pos))
			}
			if want <= 0 {
				fp.end, fp.readSeconds = true, seconds
				out <- fp
				return
			}
			t := time.Now()
			n, err := rc.Read(&fp.fc, want)
			if errors.Is(err, io.EOF) {
				if rb != nil {
					if m, err := rb.Read(&fp.fb, 1); hi < 0 && (!errors.Is(err, io.EOF) || m != 0) {
						fp.err = errkind.New(errkind.Internal, "holdout readers disagree on the row count")
						out <- fp
						return
					}
				}
				fp.end, fp.readSeconds = true, seconds+time.Since(t).Seconds()
				out <- fp
				return
			}
			if err != nil {
				fp.err = err
				out <- fp
				return
			}
			if rb != nil {
				m, err := rb.Read(&fp.fb, want)
				if err != nil {
					fp.err = fmt.Errorf("baseline's reading of the holdout: %w", err)
					out <- fp
					return
				}
				if m != n {
					fp.err = errkind.New(errkind.Internal, "holdout readers disagree: %d and %d rows", n, m)
					out <- fp
					return
				}
			}
			seconds += time.Since(t).Seconds()
			skip := pos < lo
			pos += int64(n)
			if skip {
				free <- fp
				continue
			}
			fp.n = n
			out <- fp
		}
	}()
	return out, func() {
		cancel()
		<-done
	}
}
