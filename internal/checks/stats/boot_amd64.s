//go:build amd64 && !purego

#include "textflag.h"

// func bootAVX512(keys *uint64, wv, wdv *float64, n int, steps *[8]uint64, cdf *[12]uint32, out *[32]float64)
//
// Per row: 8 wyrand draws x = hi ^ lo of the 128-bit product s·(s ^ wyMul),
// s = key + steps[j], in the 8 qword lanes (the 64×64→128 product from four
// 32×32→64 products); the 16 dword lanes of x are then 16 uniforms, lane
// 2j the low half of draw j and lane 2j+1 its high half. Each becomes a
// Poisson(1) count: the number of thresholds cdf[t] <= u (four compares,
// and the other eight only when some lane reaches cdf[4], about one row in
// nine). The counts go to float64 and into the sums Σw·k (Z0, Z1) and
// Σw·d·k (Z2, Z3) with a multiply, then an add, as the Go code does.
TEXT ·bootAVX512(SB), NOSPLIT, $0-56
	MOVQ keys+0(FP), SI
	MOVQ wv+8(FP), DI
	MOVQ wdv+16(FP), R8
	MOVQ n+24(FP), CX
	MOVQ steps+32(FP), AX
	MOVQ cdf+40(FP), R9
	MOVQ out+48(FP), DX

	VMOVDQU64 (AX), Z20                // steps
	MOVQ $0xe7037ed1a0b428db, AX
	VPBROADCASTQ AX, Z21               // wyMul
	MOVQ $0xffffffff, AX
	VPBROADCASTQ AX, Z22               // low 32 bits of a qword
	VPTERNLOGD $0xff, Z23, Z23, Z23    // every dword -1
	VPBROADCASTD 0(R9), Z24            // cdf[0..4]
	VPBROADCASTD 4(R9), Z25
	VPBROADCASTD 8(R9), Z26
	VPBROADCASTD 12(R9), Z27
	VPBROADCASTD 16(R9), Z28
	VPXORQ Z0, Z0, Z0
	VPXORQ Z1, Z1, Z1
	VPXORQ Z2, Z2, Z2
	VPXORQ Z3, Z3, Z3
	TESTQ CX, CX
	JZ done

loop:
	VPBROADCASTQ (SI), Z4
	VPADDQ Z20, Z4, Z4                 // s = key + step
	VPXORQ Z21, Z4, Z5                 // t = s ^ wyMul
	VPSRLQ $32, Z4, Z6                 // s1
	VPSRLQ $32, Z5, Z7                 // t1
	VPMULUDQ Z5, Z4, Z8                // p00 = s0·t0
	VPMULUDQ Z7, Z4, Z9                // p01 = s0·t1
	VPMULUDQ Z5, Z6, Z10               // p10 = s1·t0
	VPMULUDQ Z7, Z6, Z11               // p11 = s1·t1
	VPSRLQ $32, Z8, Z12
	VPANDQ Z22, Z9, Z13
	VPADDQ Z13, Z12, Z12
	VPANDQ Z22, Z10, Z13
	VPADDQ Z13, Z12, Z12               // mid = p00>>32 + low(p01) + low(p10)
	VPSRLQ $32, Z9, Z9
	VPSRLQ $32, Z10, Z10
	VPADDQ Z9, Z11, Z11
	VPADDQ Z10, Z11, Z11
	VPSRLQ $32, Z12, Z13
	VPADDQ Z13, Z11, Z11               // hi = p11 + p01>>32 + p10>>32 + mid>>32
	VPSLLQ $32, Z12, Z12               // lo = mid<<32 | low(p00)
	VPANDQ Z22, Z8, Z8
	VPTERNLOGQ $0x96, Z8, Z12, Z11     // x = hi ^ lo

	VPCMPUD $5, Z24, Z11, K1           // u >= cdf[t]
	VPCMPUD $5, Z25, Z11, K2
	VPCMPUD $5, Z26, Z11, K3
	VPCMPUD $5, Z27, Z11, K4
	VPCMPUD $5, Z28, Z11, K5
	VPXORD Z14, Z14, Z14
	VPSUBD Z23, Z14, K1, Z14
	VPSUBD Z23, Z14, K2, Z14
	VPSUBD Z23, Z14, K3, Z14
	VPSUBD Z23, Z14, K4, Z14
	KORTESTW K5, K5
	JNZ tail

sum:
	VCVTDQ2PD Y14, Z29                 // replicates 0-7
	VEXTRACTI64X4 $1, Z14, Y16
	VCVTDQ2PD Y16, Z16                 // replicates 8-15
	VBROADCASTSD (DI), Z17             // w
	VBROADCASTSD (R8), Z18             // w·d
	VMULPD Z29, Z17, Z19
	VADDPD Z19, Z0, Z0
	VMULPD Z16, Z17, Z19
	VADDPD Z19, Z1, Z1
	VMULPD Z29, Z18, Z19
	VADDPD Z19, Z2, Z2
	VMULPD Z16, Z18, Z19
	VADDPD Z19, Z3, Z3
	ADDQ $8, SI
	ADDQ $8, DI
	ADDQ $8, R8
	DECQ CX
	JNZ loop

done:
	VMOVUPD Z0, 0(DX)
	VMOVUPD Z1, 64(DX)
	VMOVUPD Z2, 128(DX)
	VMOVUPD Z3, 192(DX)
	VZEROUPPER
	RET

tail:
	VPSUBD Z23, Z14, K5, Z14           // cdf[4]
	VPBROADCASTD 20(R9), Z19
	VPCMPUD $5, Z19, Z11, K1
	VPSUBD Z23, Z14, K1, Z14
	VPBROADCASTD 24(R9), Z19
	VPCMPUD $5, Z19, Z11, K1
	VPSUBD Z23, Z14, K1, Z14
	VPBROADCASTD 28(R9), Z19
	VPCMPUD $5, Z19, Z11, K1
	VPSUBD Z23, Z14, K1, Z14
	VPBROADCASTD 32(R9), Z19
	VPCMPUD $5, Z19, Z11, K1
	VPSUBD Z23, Z14, K1, Z14
	VPBROADCASTD 36(R9), Z19
	VPCMPUD $5, Z19, Z11, K1
	VPSUBD Z23, Z14, K1, Z14
	VPBROADCASTD 40(R9), Z19
	VPCMPUD $5, Z19, Z11, K1
	VPSUBD Z23, Z14, K1, Z14
	VPBROADCASTD 44(R9), Z19
	VPCMPUD $5, Z19, Z11, K1
	VPSUBD Z23, Z14, K1, Z14
	JMP sum

// func cpuid(eaxArg, ecxArg uint32) (eax, ebx, ecx, edx uint32)
TEXT ·cpuid(SB), NOSPLIT, $0-24
	MOVL eaxArg+0(FP), AX
	MOVL ecxArg+4(FP), CX
	CPUID
	MOVL AX, eax+8(FP)
	MOVL BX, ebx+12(FP)
	MOVL CX, ecx+16(FP)
	MOVL DX, edx+20(FP)
	RET

// func xgetbv() (eax, edx uint32)
TEXT ·xgetbv(SB), NOSPLIT, $0-8
	MOVL $0, CX
	XGETBV
	MOVL AX, eax+0(FP)
	MOVL DX, edx+4(FP)
	RET
