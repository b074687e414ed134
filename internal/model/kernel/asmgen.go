//go:build ignore

// asmgen writes kernel_amd64.s and kernel_amd64_gen.go: the register-blocked
// AVX-512 and AVX2 micro-kernels of this package. Run it with
// `go generate` in this directory (it needs nothing outside the standard library).
//
// Every kernel keeps one accumulator lane per output element and walks the
// reduction in order, one fused multiply-add per step, so an element's value does
// not depend on which kernel (tile height, tile width, masked or not) computed it.
package main

import (
	"bytes"
	"fmt"
	"go/format"
	"log"
	"os"
	"strings"
)

// isa describes one instruction set the generator targets.
type isa struct {
	name   string // suffix of the Go function names
	reg    string // vector register prefix: "Z" or "Y"
	lanes  int    // float32 lanes per vector
	maxRV  int    // accumulator registers available (rows × vectors)
	maxR   int    // tallest tile
	maxV   int    // widest tile, in vectors
	sparse int    // vectors per column chunk of the sparse kernel
}

var isas = []isa{
	{name: "AVX512", reg: "Z", lanes: 16, maxRV: 24, maxR: 6, maxV: 4, sparse: 8},
	{name: "AVX2", reg: "Y", lanes: 8, maxRV: 12, maxR: 6, maxV: 2, sparse: 8},
}

type writer struct{ bytes.Buffer }

func (w *writer) f(format string, args ...any) { fmt.Fprintf(&w.Buffer, format+"\n", args...) }

// rowAddr is the address of a[row r] at element offset u, with row groups of
// three rows held in SI, R8 (the lda stride in BX).
func rowAddr(r, u int) string {
	base := []string{"SI", "R8"}[r/3]
	disp := ""
	if u != 0 {
		disp = fmt.Sprint(4 * u)
	}
	switch r % 3 {
	case 0:
		return fmt.Sprintf("%s(%s)", disp, base)
	case 1:
		return fmt.Sprintf("%s(%s)(BX*1)", disp, base)
	default:
		return fmt.Sprintf("%s(%s)(BX*2)", disp, base)
	}
}

// bAddr is the address of vector v of b's row p+u (DI = row p, DX = ldb bytes, R10 = 3·ldb).
func bAddr(x isa, u, v int) string {
	disp := ""
	if v != 0 {
		disp = fmt.Sprint(v * x.lanes * 4)
	}
	switch u {
	case 0:
		return fmt.Sprintf("%s(DI)", disp)
	case 1:
		return fmt.Sprintf("%s(DI)(DX*1)", disp)
	case 2:
		return fmt.Sprintf("%s(DI)(DX*2)", disp)
	default:
		return fmt.Sprintf("%s(DI)(R10*1)", disp)
	}
}

func acc(x isa, nv, r, v int) string { return fmt.Sprintf("%s%d", x.reg, r*nv+v) }

// load writes a load of vector v (the last one masked when masked is set).
func load(w *writer, x isa, addr, dst string, last, masked bool) {
	switch {
	case !last || !masked:
		w.f("\tVMOVUPS %s, %s", addr, dst)
	case x.reg == "Z":
		w.f("\tVMOVUPS.Z %s, K1, %s", addr, dst)
	default:
		w.f("\tVMASKMOVPS %s, Y15, %s", addr, dst)
	}
}

func store(w *writer, x isa, src, addr string, last, masked bool) {
	switch {
	case !last || !masked:
		w.f("\tVMOVUPS %s, %s", src, addr)
	case x.reg == "Z":
		w.f("\tVMOVUPS %s, K1, %s", src, addr)
	default:
		w.f("\tVMASKMOVPS %s, Y15, %s", src, addr)
	}
}

// denseKernel writes one tile kernel: nr rows × nv vectors of output columns.
//
//	func denseAVX512_R6V4(k int, a *float32, lda int, b *float32, ldb int,
//		bias *float32, c *float32, ldc int, mask int, flags int)
//
// mask selects the lanes of the last vector (AVX-512: a bit mask; AVX2: a pointer
// to eight int32 lane masks); flags bit 0 adds bias, bit 1 applies relu.
func denseKernel(w *writer, x isa, nr, nv int, masked bool) string {
	name := fmt.Sprintf("dense%s_R%dV%d", x.name, nr, nv)
	if masked {
		name += "M"
	}
	bReg := func(v int) string { return fmt.Sprintf("%s%d", x.reg, x.maxRV+v) }
	var bcast [2]string
	if x.reg == "Z" {
		bcast = [2]string{"Z28", "Z29"}
	} else {
		bcast = [2]string{"Y14", "Y14"}
	}
	w.f("// func %s(k int, a *float32, lda int, b *float32, ldb int, bias *float32, c *float32, ldc int, mask int, flags int)", name)
	w.f("TEXT ·%s(SB), NOSPLIT, $0-80", name)
	w.f("\tMOVQ k+0(FP), CX")
	w.f("\tMOVQ a+8(FP), SI")
	w.f("\tMOVQ lda+16(FP), BX")
	w.f("\tSHLQ $2, BX")
	w.f("\tMOVQ b+24(FP), DI")
	w.f("\tMOVQ ldb+32(FP), DX")
	w.f("\tSHLQ $2, DX")
	w.f("\tLEAQ (DX)(DX*2), R10")
	w.f("\tLEAQ (DX)(DX*4), R11")
	w.f("\tSUBQ DX, R11") // R11 = 4·ldb
	if nr > 3 {
		w.f("\tLEAQ (SI)(BX*2), R8")
		w.f("\tADDQ BX, R8")
	}
	if masked {
		if x.reg == "Z" {
			w.f("\tMOVQ mask+64(FP), AX")
			w.f("\tKMOVW AX, K1")
		} else {
			w.f("\tMOVQ mask+64(FP), AX")
			w.f("\tVMOVDQU (AX), Y15")
		}
	}
	for r := 0; r < nr; r++ {
		for v := 0; v < nv; v++ {
			a := acc(x, nv, r, v)
			if x.reg == "Z" {
				w.f("\tVPXORD %s, %s, %s", a, a, a)
			} else {
				w.f("\tVXORPS %s, %s, %s", a, a, a)
			}
		}
	}
	step := func(u int) {
		for v := 0; v < nv; v++ {
			load(w, x, bAddr(x, u, v), bReg(v), v == nv-1, masked)
		}
		for r := 0; r < nr; r++ {
			t := bcast[r%2]
			w.f("\tVBROADCASTSS %s, %s", rowAddr(r, u), t)
			for v := 0; v < nv; v++ {
				w.f("\tVFMADD231PS %s, %s, %s", bReg(v), t, acc(x, nv, r, v))
			}
		}
	}
	const unroll = 4
	w.f("\tCMPQ CX, $%d", unroll)
	w.f("\tJLT %s_tail", name)
	w.f("%s_loop4:", name)
	for u := 0; u < unroll; u++ {
		step(u)
	}
	w.f("\tADDQ $%d, SI", 4*unroll)
	if nr > 3 {
		w.f("\tADDQ $%d, R8", 4*unroll)
	}
	w.f("\tADDQ R11, DI")
	w.f("\tSUBQ $%d, CX", unroll)
	w.f("\tCMPQ CX, $%d", unroll)
	w.f("\tJGE %s_loop4", name)
	w.f("%s_tail:", name)
	w.f("\tTESTQ CX, CX")
	w.f("\tJZ %s_done", name)
	w.f("%s_loop1:", name)
	step(0)
	w.f("\tADDQ $4, SI")
	if nr > 3 {
		w.f("\tADDQ $4, R8")
	}
	w.f("\tADDQ DX, DI")
	w.f("\tDECQ CX")
	w.f("\tJNZ %s_loop1", name)
	w.f("%s_done:", name)
	// Epilogue: bias, relu, store.
	w.f("\tMOVQ flags+72(FP), R9")
	w.f("\tTESTQ $1, R9")
	w.f("\tJZ %s_nobias", name)
	w.f("\tMOVQ bias+40(FP), AX")
	for v := 0; v < nv; v++ {
		load(w, x, fmt.Sprintf("%d(AX)", v*x.lanes*4), bReg(v), v == nv-1, masked)
	}
	for r := 0; r < nr; r++ {
		for v := 0; v < nv; v++ {
			a := acc(x, nv, r, v)
			w.f("\tVADDPS %s, %s, %s", bReg(v), a, a)
		}
	}
	w.f("%s_nobias:", name)
	w.f("\tTESTQ $2, R9")
	w.f("\tJZ %s_store", name)
	zero := bcast[0]
	if x.reg == "Z" {
		w.f("\tVPXORD %s, %s, %s", zero, zero, zero)
	} else {
		w.f("\tVXORPS %s, %s, %s", zero, zero, zero)
	}
	for r := 0; r < nr; r++ {
		for v := 0; v < nv; v++ {
			a := acc(x, nv, r, v)
			w.f("\tVMAXPS %s, %s, %s", zero, a, a)
		}
	}
	w.f("%s_store:", name)
	w.f("\tMOVQ c+48(FP), AX")
	w.f("\tMOVQ ldc+56(FP), R9")
	w.f("\tSHLQ $2, R9")
	for r := 0; r < nr; r++ {
		if r > 0 {
			w.f("\tADDQ R9, AX")
		}
		for v := 0; v < nv; v++ {
			store(w, x, acc(x, nv, r, v), fmt.Sprintf("%d(AX)", v*x.lanes*4), v == nv-1, masked)
		}
	}
	w.f("\tVZEROUPPER")
	w.f("\tRET")
	w.f("")
	return name
}

// sparseKernel writes the kernel for one CSR row:
//
//	func sparseRowAVX512(idx *int32, vals *float32, nnz int, w *float32, n int,
//		bias *float32, c *float32, mask int, flags int)
//
// For each column chunk it zeroes the accumulators, then for e = 0..nnz-1 adds
// vals[e]·w[idx[e], chunk] with one fused multiply-add per element, then applies
// bias and relu and stores. Full chunks of x.sparse vectors come first, then single
// vectors, then the last partial vector under mask.
func sparseKernel(w *writer, x isa) string {
	name := "sparseRow" + x.name
	w.f("// func %s(idx *int32, vals *float32, nnz int, w *float32, n int, bias *float32, c *float32, mask int, flags int)", name)
	w.f("TEXT ·%s(SB), NOSPLIT, $0-72", name)
	w.f("\tMOVQ idx+0(FP), SI")
	w.f("\tMOVQ vals+8(FP), R8")
	w.f("\tMOVQ nnz+16(FP), R9")
	w.f("\tMOVQ w+24(FP), DI")  // w plus current column offset
	w.f("\tMOVQ n+32(FP), R10") // columns left
	w.f("\tMOVQ R10, R11")      // row stride in bytes
	w.f("\tSHLQ $2, R11")       //
	w.f("\tMOVQ bias+40(FP), R12")
	w.f("\tMOVQ c+48(FP), R13")
	w.f("\tMOVQ flags+64(FP), BX")
	if x.reg == "Z" {
		w.f("\tMOVQ mask+56(FP), AX")
		w.f("\tKMOVW AX, K1")
	} else {
		w.f("\tMOVQ mask+56(FP), AX")
		w.f("\tVMOVDQU (AX), Y15")
	}
	bc := fmt.Sprintf("%s%d", x.reg, x.sparse)    // broadcast value
	tmp := fmt.Sprintf("%s%d", x.reg, x.sparse+1) // bias / zero
	vb := x.lanes * 4
	// chunk writes the code for a chunk of nv vectors (last one masked if masked).
	chunk := func(label string, nv int, masked bool) {
		for v := 0; v < nv; v++ {
			a := fmt.Sprintf("%s%d", x.reg, v)
			if x.reg == "Z" {
				w.f("\tVPXORD %s, %s, %s", a, a, a)
			} else {
				w.f("\tVXORPS %s, %s, %s", a, a, a)
			}
		}
		w.f("\tXORQ CX, CX")
		w.f("\tTESTQ R9, R9")
		w.f("\tJZ %s_epi", label)
		w.f("%s_e:", label)
		w.f("\tMOVLQSX (SI)(CX*4), AX")
		w.f("\tIMULQ R11, AX")
		w.f("\tADDQ DI, AX")
		w.f("\tVBROADCASTSS (R8)(CX*4), %s", bc)
		for v := 0; v < nv; v++ {
			a := fmt.Sprintf("%s%d", x.reg, v)
			addr := fmt.Sprintf("%d(AX)", v*vb)
			if v == nv-1 && masked {
				load(w, x, addr, tmp, true, true)
				w.f("\tVFMADD231PS %s, %s, %s", tmp, bc, a)
			} else {
				w.f("\tVFMADD231PS %s, %s, %s", addr, bc, a)
			}
		}
		w.f("\tINCQ CX")
		w.f("\tCMPQ CX, R9")
		w.f("\tJLT %s_e", label)
		w.f("%s_epi:", label)
		w.f("\tTESTQ $1, BX")
		w.f("\tJZ %s_nobias", label)
		for v := 0; v < nv; v++ {
			a := fmt.Sprintf("%s%d", x.reg, v)
			load(w, x, fmt.Sprintf("%d(R12)", v*vb), tmp, v == nv-1, masked)
			w.f("\tVADDPS %s, %s, %s", tmp, a, a)
		}
		w.f("%s_nobias:", label)
		w.f("\tTESTQ $2, BX")
		w.f("\tJZ %s_store", label)
		if x.reg == "Z" {
			w.f("\tVPXORD %s, %s, %s", tmp, tmp, tmp)
		} else {
			w.f("\tVXORPS %s, %s, %s", tmp, tmp, tmp)
		}
		for v := 0; v < nv; v++ {
			a := fmt.Sprintf("%s%d", x.reg, v)
			w.f("\tVMAXPS %s, %s, %s", tmp, a, a)
		}
		w.f("%s_store:", label)
		for v := 0; v < nv; v++ {
			a := fmt.Sprintf("%s%d", x.reg, v)
			store(w, x, a, fmt.Sprintf("%d(R13)", v*vb), v == nv-1, masked)
		}
	}
	full := x.sparse * x.lanes
	w.f("%s_big:", name)
	w.f("\tCMPQ R10, $%d", full)
	w.f("\tJLT %s_one", name)
	chunk(name+"_bigc", x.sparse, false)
	w.f("\tADDQ $%d, DI", full*4)
	w.f("\tADDQ $%d, R12", full*4)
	w.f("\tADDQ $%d, R13", full*4)
	w.f("\tSUBQ $%d, R10", full)
	w.f("\tJMP %s_big", name)
	w.f("%s_one:", name)
	w.f("\tCMPQ R10, $%d", x.lanes)
	w.f("\tJLT %s_part", name)
	chunk(name+"_onec", 1, false)
	w.f("\tADDQ $%d, DI", vb)
	w.f("\tADDQ $%d, R12", vb)
	w.f("\tADDQ $%d, R13", vb)
	w.f("\tSUBQ $%d, R10", x.lanes)
	w.f("\tJMP %s_one", name)
	w.f("%s_part:", name)
	w.f("\tTESTQ R10, R10")
	w.f("\tJZ %s_ret", name)
	chunk(name+"_partc", 1, true)
	w.f("%s_ret:", name)
	w.f("\tVZEROUPPER")
	w.f("\tRET")
	w.f("")
	return name
}

func main() {
	var s, g writer
	s.f("// Code generated by asmgen.go; DO NOT EDIT.")
	s.f("")
	s.f("//go:build amd64 && !purego")
	s.f("")
	s.f("#include \"textflag.h\"")
	s.f("")
	g.f("// Code generated by asmgen.go; DO NOT EDIT.")
	g.f("")
	g.f("//go:build amd64 && !purego")
	g.f("")
	g.f("package kernel")
	g.f("")
	for _, x := range isas {
		var table []string
		for r := 1; r <= x.maxR; r++ {
			var row []string
			for v := 1; v <= x.maxV; v++ {
				if r*v > x.maxRV {
					log.Fatalf("%s: tile %d×%d does not fit", x.name, r, v)
				}
				for _, m := range []bool{false, true} {
					name := denseKernel(&s, x, r, v, m)
					g.f("//go:noescape")
					g.f("func %s(k int, a *float32, lda int, b *float32, ldb int, bias *float32, c *float32, ldc int, mask int, flags int)", name)
					g.f("")
					row = append(row, name)
				}
			}
			table = append(table, "{"+strings.Join(pairs(row), ", ")+"}")
		}
		name := sparseKernel(&s, x)
		g.f("//go:noescape")
		g.f("func %s(idx *int32, vals *float32, nnz int, w *float32, n int, bias *float32, c *float32, mask int, flags int)", name)
		g.f("")
		g.f("// dense%sTiles[r-1][v-1] holds the r-row, v-vector tile kernel, unmasked then masked.", x.name)
		g.f("var dense%sTiles = [%d][%d][2]tileFunc{", x.name, x.maxR, x.maxV)
		for _, t := range table {
			g.f("\t%s,", t)
		}
		g.f("}")
		g.f("")
		g.f("const (")
		g.f("\tmaxRows%s = %d", x.name, x.maxR)
		g.f("\tmaxVecs%s = %d", x.name, x.maxV)
		g.f("\tlanes%s = %d", x.name, x.lanes)
		g.f(")")
		g.f("")
	}
	if err := os.WriteFile("kernel_amd64.s", s.Bytes(), 0o644); err != nil {
		log.Fatal(err)
	}
	src, err := format.Source(g.Bytes())
	if err != nil {
		log.Fatalf("formatting generated Go: %v\n%s", err, g.Bytes())
	}
	if err := os.WriteFile("kernel_amd64_gen.go", src, 0o644); err != nil {
		log.Fatal(err)
	}
}

// pairs groups names two by two into "{unmasked, masked}" literals.
func pairs(names []string) []string {
	var out []string
	for i := 0; i+1 < len(names); i += 2 {
		out = append(out, "{"+names[i]+", "+names[i+1]+"}")
	}
	return out
}
