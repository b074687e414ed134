package safetensors

import (
	"encoding/binary"
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"testing"

	"github.com/google/go-cmp/cmp"
)

// debianPython is the interpreter that sees Debian's python3-numpy (1.24);
// another python3 earlier on PATH may not.
const debianPython = "/usr/bin/python3"

// numpyReader parses a safetensors file following only the published format
// (huggingface/safetensors README, "Format": u64 little-endian N, N bytes of
// UTF-8 JSON, then the byte buffer; data_offsets relative to the buffer;
// little-endian, C order), with numpy for the number decoding: '<f4' and
// '<f2' are numpy's own IEEE binary32/binary16 types; BF16 is widened by
// placing its bits in the upper half of a binary32. It also converts the F32
// tensor "src" to float16 with numpy's cast (round to nearest even), as the
// reference for our F16 encoding.
const numpyReader = `
import json, struct, sys
import numpy as np
raw = open(sys.argv[1], "rb").read()
(n,) = struct.unpack("<Q", raw[:8])
header = json.loads(raw[8:8 + n].decode("utf-8"))
buf = raw[8 + n:]
meta = header.pop("__metadata__", None)
out = {"n": n, "buffer_len": len(buf), "metadata": meta, "tensors": {}}
for name, info in header.items():
    begin, end = info["data_offsets"]
    chunk = buf[begin:end]
    dt = info["dtype"]
    if dt == "F32":
        vals = np.frombuffer(chunk, dtype="<f4")
    elif dt == "F16":
        vals = np.frombuffer(chunk, dtype="<f2").astype(np.float32)
    elif dt == "BF16":
        vals = (np.frombuffer(chunk, dtype="<u2").astype(np.uint32) << 16).view(np.float32)
    else:
        raise SystemExit("unexpected dtype " + dt)
    vals = vals.reshape(info["shape"])
    out["tensors"][name] = {
        "dtype": dt, "shape": list(vals.shape), "begin": begin, "end": end,
        "bits": vals.astype("<f4").view("<u4").ravel().tolist(),
        "first_nonfinite": ([int(i) for i in np.flatnonzero(~np.isfinite(vals))] + [-1])[0],
    }
info = header["src"]
src = np.frombuffer(buf[info["data_offsets"][0]:info["data_offsets"][1]], dtype="<f4")
with np.errstate(over="ignore"):
    out["f16_of_src"] = src.astype(np.float16).view("<u2").tolist()
print(json.dumps(out))
`

type numpyTensor struct {
	DType string   `json:"dtype"`
	Shape []int    `json:"shape"`
	Begin int64    `json:"begin"`
	End   int64    `json:"end"`
	Bits  []uint32 `json:"bits"`
	// FirstNonFinite is numpy's first flat index where np.isfinite is
	// false, or -1.
	FirstNonFinite int64 `json:"first_nonfinite"`
}

type numpyOut struct {
	N         int64                  `json:"n"`
	BufferLen int64                  `json:"buffer_len"`
	Metadata  map[string]string      `json:"metadata"`
	Tensors   map[string]numpyTensor `json:"tensors"`
	F16OfSrc  []uint16               `json:"f16_of_src"`
}

func TestCrossCheckWithNumpy(t *testing.T) {
	if err := exec.Command(debianPython, "-c", "import numpy").Run(); err != nil {
		if os.Getenv("CI") != "" {
			t.Fatalf("CI is set but %s with numpy is not available: %v", debianPython, err)
		}
		t.Skipf("%s with numpy not available: %v", debianPython, err)
	}

	// Source values: specials, rounding ties for binary16, subnormals, and
	// a fixed pseudo-random spread.
	src := []float32{
		0, float32(math.Copysign(0, -1)), 1, -2, 0.1, 1.0 / 3, 65504, 65519, 65520, 70000, -1e6,
		float32(math.Ldexp(1, -24)), float32(math.Ldexp(1, -25)), float32(math.Ldexp(3, -25)),
		float32(1 + math.Ldexp(1, -11)), float32(1 + math.Ldexp(3, -11)),
		1e-30, math.MaxFloat32, float32(math.Inf(1)), float32(math.Inf(-1)), float32(math.NaN()),
	}
	seed := uint32(12345)
	for range 200 {
		seed = seed*1664525 + 1013904223 // Numerical Recipes LCG, fixed seed
		src = append(src, float32(int32(seed))/float32(1<<20))
	}
	tensors := []Tensor{
		{Name: "src", DType: "F32", Shape: []int{len(src)}, Data: src},
		{Name: "src.f16", DType: "F16", Shape: []int{len(src)}, Data: src},
		{Name: "src.bf16", DType: "BF16", Shape: []int{len(src)}, Data: src},
		{Name: "episodes_played", DType: "F32", Shape: []int{2, 3}, Data: []float32{3, 0, 7, 1, 12, 5}},
		{Name: "empty", DType: "F16", Shape: []int{0, 3}},
		{Name: "bias", DType: "BF16", Shape: []int{}, Data: []float32{0.25}},
	}
	meta := map[string]string{"network": "Night Shift Radio", "promoted_show": "Tidewater Tales"}
	path := filepath.Join(t.TempDir(), "weights.safetensors")
	out, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := Write(out, tensors, meta); err != nil {
		t.Fatal(err)
	}
	if err := out.Close(); err != nil {
		t.Fatal(err)
	}

	stdout, err := exec.Command(debianPython, "-c", numpyReader, path).Output()
	if err != nil {
		if ee, ok := err.(*exec.ExitError); ok {
			t.Fatalf("numpy reader failed: %v\n%s", err, ee.Stderr)
		}
		t.Fatal(err)
	}
	var np numpyOut
	if err := json.Unmarshal(stdout, &np); err != nil {
		t.Fatalf("numpy reader output: %v\n%s", err, stdout)
	}

	rd, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer rd.Close()
	st, err := rd.Stat()
	if err != nil {
		t.Fatal(err)
	}
	f, err := Parse(rd, st.Size())
	if err != nil {
		t.Fatal(err)
	}
	if np.N != f.HeaderSize || np.BufferLen != st.Size()-f.DataOffset() {
		t.Errorf("numpy reader saw N=%d, buffer %d bytes; we parsed N=%d, buffer %d", np.N, np.BufferLen, f.HeaderSize, st.Size()-f.DataOffset())
	}
	if d := cmp.Diff(meta, np.Metadata); d != "" {
		t.Errorf("metadata seen by the numpy reader (-want +got):\n%s", d)
	}
	if len(np.Tensors) != len(tensors) {
		t.Errorf("numpy reader saw %d tensors, want %d", len(np.Tensors), len(tensors))
	}
	for _, info := range f.Tensors {
		nt, ok := np.Tensors[info.Name]
		if !ok {
			t.Errorf("numpy reader did not see tensor %q", info.Name)
			continue
		}
		if nt.DType != info.DType || !slices.Equal(nt.Shape, info.Shape) || nt.Begin != info.Begin || nt.End != info.End {
			t.Errorf("%s: numpy reader saw %s %v [%d,%d), we parsed %s %v [%d,%d)", info.Name,
				nt.DType, nt.Shape, nt.Begin, nt.End, info.DType, info.Shape, info.Begin, info.End)
		}
		ours, err := f.Float32s(info.Name)
		if err != nil {
			t.Fatal(err)
		}
		if len(ours) != len(nt.Bits) {
			t.Errorf("%s: numpy decoded %d values, we %d", info.Name, len(nt.Bits), len(ours))
			continue
		}
		for i, v := range ours {
			if math.Float32bits(v) != nt.Bits[i] {
				t.Errorf("%s[%d]: we decode %#08x, numpy %#08x", info.Name, i, math.Float32bits(v), nt.Bits[i])
			}
		}
	}

	// The streaming Scanner's first non-finite index per tensor against
	// numpy's np.isfinite, with chunks that split elements.
	whole, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	planted := 0
	for _, nt := range np.Tensors {
		if nt.FirstNonFinite >= 0 {
			planted++
		}
	}
	if planted < 3 { // src, src.f16 and src.bf16 hold Inf and NaN
		t.Errorf("numpy found non-finite values in %d tensors, want 3: the check would be vacuous", planted)
	}
	for _, ch := range [][]int{{0}, {3}, {1000}} {
		_, bad, err := scanChunks(whole, int64(len(whole)), ch...)
		if err != nil {
			t.Fatal(err)
		}
		for name, nt := range np.Tensors {
			got, ok := bad[name]
			if !ok {
				got = -1
			}
			if got != nt.FirstNonFinite {
				t.Errorf("chunks %v, %s: Scanner's first non-finite index %d, numpy's %d", ch, name, got, nt.FirstNonFinite)
			}
		}
	}

	// Our F16 encoding against numpy's float32→float16 cast (round to
	// nearest even, overflow to Inf).
	raw, err := f.Raw("src.f16")
	if err != nil {
		t.Fatal(err)
	}
	if len(np.F16OfSrc) != len(src) {
		t.Fatalf("numpy converted %d values, want %d", len(np.F16OfSrc), len(src))
	}
	for i, v := range src {
		ours := binary.LittleEndian.Uint16(raw[2*i:])
		if math.IsNaN(float64(v)) {
			// Both must give a NaN (exponent all ones, mantissa not 0);
			// payload bits are not specified by IEEE 754.
			if ours&0x7c00 != 0x7c00 || ours&0x3ff == 0 || np.F16OfSrc[i]&0x7c00 != 0x7c00 || np.F16OfSrc[i]&0x3ff == 0 {
				t.Errorf("NaN → F16: ours %#04x, numpy %#04x", ours, np.F16OfSrc[i])
			}
			continue
		}
		if ours != np.F16OfSrc[i] {
			t.Errorf("F16 of %v (%#08x): ours %#04x, numpy %#04x", v, math.Float32bits(v), ours, np.F16OfSrc[i])
		}
	}
}
