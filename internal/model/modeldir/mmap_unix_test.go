//go:build unix

package modeldir

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/model"
)

// TestMappedFileTruncatedWhileChecked: a tensor file that shrinks while it
// is mapped makes the pages past its new end fault (SIGBUS on Linux, see
// mmap(2): "Use of a mapped region can result in ... SIGBUS: attempted access
// to a page of the buffer that lies beyond the end of the mapped file").
// The check must report the file as changed, not kill the process.
func TestMappedFileTruncatedWhileChecked(t *testing.T) {
	const n = 1 << 19 // 2 MiB of float32: above mmapMin, so the file is mapped
	header := fmt.Sprintf(`{"w":{"dtype":"F32","shape":[%d],"data_offsets":[0,%d]}}`, n, 4*n)
	for len(header)%8 != 0 {
		header += " "
	}
	buf := make([]byte, 8+len(header)+4*n)
	binary.LittleEndian.PutUint64(buf, uint64(len(header)))
	copy(buf[8:], header)
	for i := range n {
		binary.LittleEndian.PutUint32(buf[8+len(header)+4*i:], math.Float32bits(float32(i%7)))
	}
	dir := t.TempDir()
	if err := os.WriteFile(filepath.Join(dir, "w.safetensors"), buf, 0o644); err != nil {
		t.Fatal(err)
	}
	declared := []model.Tensor{{Name: "w", File: "w.safetensors", Shape: []int{n}, DType: "F32"}}

	b, mapped, err := mapFile(dir, "w.safetensors")
	if err != nil || !mapped {
		t.Fatalf("mapFile: mapped %v, err %v", mapped, err)
	}
	defer unmap(b)
	if _, problems := checkMapped("w.safetensors", b, declared, false); len(problems) != 0 {
		t.Fatalf("the intact file: %q", problems)
	}
	if err := os.Truncate(filepath.Join(dir, "w.safetensors"), 4096); err != nil {
		t.Fatal(err)
	}
	_, problems := checkMapped("w.safetensors", b, declared, false)
	if len(problems) != 1 || !strings.Contains(problems[0], "w.safetensors: "+changedWhileRead) {
		t.Fatalf("after truncation: %q", problems)
	}
	p := &Problems{Dir: dir, List: problems}
	if !errors.Is(p.err(), ErrChangedWhileRead) {
		t.Error("errors.Is does not find ErrChangedWhileRead")
	}
	if errors.Is((&Problems{Dir: dir, List: []string{"w.safetensors: other"}}).err(), ErrChangedWhileRead) {
		t.Error("errors.Is finds ErrChangedWhileRead in an unrelated problem")
	}
}
