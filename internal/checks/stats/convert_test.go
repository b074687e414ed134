package stats_test

import (
	"testing"

	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/checks/stats"
)

// The result types mirror the report types field for field, so the caller
// converts with a plain conversion; this breaks the build if either side
// changes alone.
var (
	_ = checks.NonInferiority(stats.Test{})
	_ = checks.CalibrationBin(stats.Bin{})
)

func TestConvertToReportTypes(t *testing.T) {
	b := stats.NewBinary()
	if err := b.AddBatch([]float32{0.2, 0.75}, []float32{0, 1}, nil); err != nil {
		t.Fatal(err)
	}
	bins := b.Calibration()
	got := checks.CalibrationBin(bins[7])
	if got.Count != 1 || got.Predicted != 0.75 || got.Observed != 1 || got.Lower != 0.7 {
		t.Errorf("bin 7 = %+v", got)
	}
}
