//go:build amd64 && !purego

#include "textflag.h"

// Log32 and LogLoss32 (log.go) in AVX-512 and AVX2+FMA. Hand-written, not
// produced by asmgen.go. Both paths run the operations of log32 and
// lossTerm32 in log.go in the same order, one rounding each.

// Constants, eight copies each (a 256-bit operand for AVX2; AVX-512 reads
// the first with an embedded broadcast).
// Cephes logf P(t), highest degree first
DATA logP0<>+0(SB)/4, $0x3d9021bb
DATA logP0<>+4(SB)/4, $0x3d9021bb
DATA logP0<>+8(SB)/4, $0x3d9021bb
DATA logP0<>+12(SB)/4, $0x3d9021bb
DATA logP0<>+16(SB)/4, $0x3d9021bb
DATA logP0<>+20(SB)/4, $0x3d9021bb
DATA logP0<>+24(SB)/4, $0x3d9021bb
DATA logP0<>+28(SB)/4, $0x3d9021bb
GLOBL logP0<>(SB), RODATA|NOPTR, $32
DATA logP1<>+0(SB)/4, $0xbdebd1b8
DATA logP1<>+4(SB)/4, $0xbdebd1b8
DATA logP1<>+8(SB)/4, $0xbdebd1b8
DATA logP1<>+12(SB)/4, $0xbdebd1b8
DATA logP1<>+16(SB)/4, $0xbdebd1b8
DATA logP1<>+20(SB)/4, $0xbdebd1b8
DATA logP1<>+24(SB)/4, $0xbdebd1b8
DATA logP1<>+28(SB)/4, $0xbdebd1b8
GLOBL logP1<>(SB), RODATA|NOPTR, $32
DATA logP2<>+0(SB)/4, $0x3def251a
DATA logP2<>+4(SB)/4, $0x3def251a
DATA logP2<>+8(SB)/4, $0x3def251a
DATA logP2<>+12(SB)/4, $0x3def251a
DATA logP2<>+16(SB)/4, $0x3def251a
DATA logP2<>+20(SB)/4, $0x3def251a
DATA logP2<>+24(SB)/4, $0x3def251a
DATA logP2<>+28(SB)/4, $0x3def251a
GLOBL logP2<>(SB), RODATA|NOPTR, $32
DATA logP3<>+0(SB)/4, $0xbdfe5d4f
DATA logP3<>+4(SB)/4, $0xbdfe5d4f
DATA logP3<>+8(SB)/4, $0xbdfe5d4f
DATA logP3<>+12(SB)/4, $0xbdfe5d4f
DATA logP3<>+16(SB)/4, $0xbdfe5d4f
DATA logP3<>+20(SB)/4, $0xbdfe5d4f
DATA logP3<>+24(SB)/4, $0xbdfe5d4f
DATA logP3<>+28(SB)/4, $0xbdfe5d4f
GLOBL logP3<>(SB), RODATA|NOPTR, $32
DATA logP4<>+0(SB)/4, $0x3e11e9bf
DATA logP4<>+4(SB)/4, $0x3e11e9bf
DATA logP4<>+8(SB)/4, $0x3e11e9bf
DATA logP4<>+12(SB)/4, $0x3e11e9bf
DATA logP4<>+16(SB)/4, $0x3e11e9bf
DATA logP4<>+20(SB)/4, $0x3e11e9bf
DATA logP4<>+24(SB)/4, $0x3e11e9bf
DATA logP4<>+28(SB)/4, $0x3e11e9bf
GLOBL logP4<>(SB), RODATA|NOPTR, $32
DATA logP5<>+0(SB)/4, $0xbe2aae50
DATA logP5<>+4(SB)/4, $0xbe2aae50
DATA logP5<>+8(SB)/4, $0xbe2aae50
DATA logP5<>+12(SB)/4, $0xbe2aae50
DATA logP5<>+16(SB)/4, $0xbe2aae50
DATA logP5<>+20(SB)/4, $0xbe2aae50
DATA logP5<>+24(SB)/4, $0xbe2aae50
DATA logP5<>+28(SB)/4, $0xbe2aae50
GLOBL logP5<>(SB), RODATA|NOPTR, $32
DATA logP6<>+0(SB)/4, $0x3e4cceac
DATA logP6<>+4(SB)/4, $0x3e4cceac
DATA logP6<>+8(SB)/4, $0x3e4cceac
DATA logP6<>+12(SB)/4, $0x3e4cceac
DATA logP6<>+16(SB)/4, $0x3e4cceac
DATA logP6<>+20(SB)/4, $0x3e4cceac
DATA logP6<>+24(SB)/4, $0x3e4cceac
DATA logP6<>+28(SB)/4, $0x3e4cceac
GLOBL logP6<>(SB), RODATA|NOPTR, $32
DATA logP7<>+0(SB)/4, $0xbe7ffffc
DATA logP7<>+4(SB)/4, $0xbe7ffffc
DATA logP7<>+8(SB)/4, $0xbe7ffffc
DATA logP7<>+12(SB)/4, $0xbe7ffffc
DATA logP7<>+16(SB)/4, $0xbe7ffffc
DATA logP7<>+20(SB)/4, $0xbe7ffffc
DATA logP7<>+24(SB)/4, $0xbe7ffffc
DATA logP7<>+28(SB)/4, $0xbe7ffffc
GLOBL logP7<>(SB), RODATA|NOPTR, $32
DATA logP8<>+0(SB)/4, $0x3eaaaaaa
DATA logP8<>+4(SB)/4, $0x3eaaaaaa
DATA logP8<>+8(SB)/4, $0x3eaaaaaa
DATA logP8<>+12(SB)/4, $0x3eaaaaaa
DATA logP8<>+16(SB)/4, $0x3eaaaaaa
DATA logP8<>+20(SB)/4, $0x3eaaaaaa
DATA logP8<>+24(SB)/4, $0x3eaaaaaa
DATA logP8<>+28(SB)/4, $0x3eaaaaaa
GLOBL logP8<>(SB), RODATA|NOPTR, $32
// ln2 = logQ2 - logQ1 (as Cephes splits it)
DATA logQ1<>+0(SB)/4, $0xb95e8083
DATA logQ1<>+4(SB)/4, $0xb95e8083
DATA logQ1<>+8(SB)/4, $0xb95e8083
DATA logQ1<>+12(SB)/4, $0xb95e8083
DATA logQ1<>+16(SB)/4, $0xb95e8083
DATA logQ1<>+20(SB)/4, $0xb95e8083
DATA logQ1<>+24(SB)/4, $0xb95e8083
DATA logQ1<>+28(SB)/4, $0xb95e8083
GLOBL logQ1<>(SB), RODATA|NOPTR, $32
DATA logQ2<>+0(SB)/4, $0x3f318000
DATA logQ2<>+4(SB)/4, $0x3f318000
DATA logQ2<>+8(SB)/4, $0x3f318000
DATA logQ2<>+12(SB)/4, $0x3f318000
DATA logQ2<>+16(SB)/4, $0x3f318000
DATA logQ2<>+20(SB)/4, $0x3f318000
DATA logQ2<>+24(SB)/4, $0x3f318000
DATA logQ2<>+28(SB)/4, $0x3f318000
GLOBL logQ2<>(SB), RODATA|NOPTR, $32
// -0.5
DATA logMHalf<>+0(SB)/4, $0xbf000000
DATA logMHalf<>+4(SB)/4, $0xbf000000
DATA logMHalf<>+8(SB)/4, $0xbf000000
DATA logMHalf<>+12(SB)/4, $0xbf000000
DATA logMHalf<>+16(SB)/4, $0xbf000000
DATA logMHalf<>+20(SB)/4, $0xbf000000
DATA logMHalf<>+24(SB)/4, $0xbf000000
DATA logMHalf<>+28(SB)/4, $0xbf000000
GLOBL logMHalf<>(SB), RODATA|NOPTR, $32
// sqrt(1/2)
DATA logSqrtHalf<>+0(SB)/4, $0x3f3504f3
DATA logSqrtHalf<>+4(SB)/4, $0x3f3504f3
DATA logSqrtHalf<>+8(SB)/4, $0x3f3504f3
DATA logSqrtHalf<>+12(SB)/4, $0x3f3504f3
DATA logSqrtHalf<>+16(SB)/4, $0x3f3504f3
DATA logSqrtHalf<>+20(SB)/4, $0x3f3504f3
DATA logSqrtHalf<>+24(SB)/4, $0x3f3504f3
DATA logSqrtHalf<>+28(SB)/4, $0x3f3504f3
GLOBL logSqrtHalf<>(SB), RODATA|NOPTR, $32
DATA logOne<>+0(SB)/4, $0x3f800000
DATA logOne<>+4(SB)/4, $0x3f800000
DATA logOne<>+8(SB)/4, $0x3f800000
DATA logOne<>+12(SB)/4, $0x3f800000
DATA logOne<>+16(SB)/4, $0x3f800000
DATA logOne<>+20(SB)/4, $0x3f800000
DATA logOne<>+24(SB)/4, $0x3f800000
DATA logOne<>+28(SB)/4, $0x3f800000
GLOBL logOne<>(SB), RODATA|NOPTR, $32
// 2^-126, the smallest normal float32
DATA logMinNorm<>+0(SB)/4, $0x00800000
DATA logMinNorm<>+4(SB)/4, $0x00800000
DATA logMinNorm<>+8(SB)/4, $0x00800000
DATA logMinNorm<>+12(SB)/4, $0x00800000
DATA logMinNorm<>+16(SB)/4, $0x00800000
DATA logMinNorm<>+20(SB)/4, $0x00800000
DATA logMinNorm<>+24(SB)/4, $0x00800000
DATA logMinNorm<>+28(SB)/4, $0x00800000
GLOBL logMinNorm<>(SB), RODATA|NOPTR, $32
// 2^23
DATA logTwo23<>+0(SB)/4, $0x4b000000
DATA logTwo23<>+4(SB)/4, $0x4b000000
DATA logTwo23<>+8(SB)/4, $0x4b000000
DATA logTwo23<>+12(SB)/4, $0x4b000000
DATA logTwo23<>+16(SB)/4, $0x4b000000
DATA logTwo23<>+20(SB)/4, $0x4b000000
DATA logTwo23<>+24(SB)/4, $0x4b000000
DATA logTwo23<>+28(SB)/4, $0x4b000000
GLOBL logTwo23<>(SB), RODATA|NOPTR, $32
// -23.0
DATA logMinus23<>+0(SB)/4, $0xc1b80000
DATA logMinus23<>+4(SB)/4, $0xc1b80000
DATA logMinus23<>+8(SB)/4, $0xc1b80000
DATA logMinus23<>+12(SB)/4, $0xc1b80000
DATA logMinus23<>+16(SB)/4, $0xc1b80000
DATA logMinus23<>+20(SB)/4, $0xc1b80000
DATA logMinus23<>+24(SB)/4, $0xc1b80000
DATA logMinus23<>+28(SB)/4, $0xc1b80000
GLOBL logMinus23<>(SB), RODATA|NOPTR, $32
// int32 126: exponent bits - 126 = e of m in [0.5, 1)
DATA logBias<>+0(SB)/4, $0x0000007e
DATA logBias<>+4(SB)/4, $0x0000007e
DATA logBias<>+8(SB)/4, $0x0000007e
DATA logBias<>+12(SB)/4, $0x0000007e
DATA logBias<>+16(SB)/4, $0x0000007e
DATA logBias<>+20(SB)/4, $0x0000007e
DATA logBias<>+24(SB)/4, $0x0000007e
DATA logBias<>+28(SB)/4, $0x0000007e
GLOBL logBias<>(SB), RODATA|NOPTR, $32
// mantissa bits
DATA logMant<>+0(SB)/4, $0x007fffff
DATA logMant<>+4(SB)/4, $0x007fffff
DATA logMant<>+8(SB)/4, $0x007fffff
DATA logMant<>+12(SB)/4, $0x007fffff
DATA logMant<>+16(SB)/4, $0x007fffff
DATA logMant<>+20(SB)/4, $0x007fffff
DATA logMant<>+24(SB)/4, $0x007fffff
DATA logMant<>+28(SB)/4, $0x007fffff
GLOBL logMant<>(SB), RODATA|NOPTR, $32
// 0.5: the exponent bits of [0.5, 1)
DATA logHalf<>+0(SB)/4, $0x3f000000
DATA logHalf<>+4(SB)/4, $0x3f000000
DATA logHalf<>+8(SB)/4, $0x3f000000
DATA logHalf<>+12(SB)/4, $0x3f000000
DATA logHalf<>+16(SB)/4, $0x3f000000
DATA logHalf<>+20(SB)/4, $0x3f000000
DATA logHalf<>+24(SB)/4, $0x3f000000
DATA logHalf<>+28(SB)/4, $0x3f000000
GLOBL logHalf<>(SB), RODATA|NOPTR, $32
DATA logInf<>+0(SB)/4, $0x7f800000
DATA logInf<>+4(SB)/4, $0x7f800000
DATA logInf<>+8(SB)/4, $0x7f800000
DATA logInf<>+12(SB)/4, $0x7f800000
DATA logInf<>+16(SB)/4, $0x7f800000
DATA logInf<>+20(SB)/4, $0x7f800000
DATA logInf<>+24(SB)/4, $0x7f800000
DATA logInf<>+28(SB)/4, $0x7f800000
GLOBL logInf<>(SB), RODATA|NOPTR, $32
DATA logNegInf<>+0(SB)/4, $0xff800000
DATA logNegInf<>+4(SB)/4, $0xff800000
DATA logNegInf<>+8(SB)/4, $0xff800000
DATA logNegInf<>+12(SB)/4, $0xff800000
DATA logNegInf<>+16(SB)/4, $0xff800000
DATA logNegInf<>+20(SB)/4, $0xff800000
DATA logNegInf<>+24(SB)/4, $0xff800000
DATA logNegInf<>+28(SB)/4, $0xff800000
GLOBL logNegInf<>(SB), RODATA|NOPTR, $32
// the quiet NaN Log32 returns
DATA logNaN<>+0(SB)/4, $0x7fc00000
DATA logNaN<>+4(SB)/4, $0x7fc00000
DATA logNaN<>+8(SB)/4, $0x7fc00000
DATA logNaN<>+12(SB)/4, $0x7fc00000
DATA logNaN<>+16(SB)/4, $0x7fc00000
DATA logNaN<>+20(SB)/4, $0x7fc00000
DATA logNaN<>+24(SB)/4, $0x7fc00000
DATA logNaN<>+28(SB)/4, $0x7fc00000
GLOBL logNaN<>(SB), RODATA|NOPTR, $32
DATA logZero<>+0(SB)/4, $0x00000000
DATA logZero<>+4(SB)/4, $0x00000000
DATA logZero<>+8(SB)/4, $0x00000000
DATA logZero<>+12(SB)/4, $0x00000000
DATA logZero<>+16(SB)/4, $0x00000000
DATA logZero<>+20(SB)/4, $0x00000000
DATA logZero<>+24(SB)/4, $0x00000000
DATA logZero<>+28(SB)/4, $0x00000000
GLOBL logZero<>(SB), RODATA|NOPTR, $32
// Eps32 = 2^-24
DATA logEps<>+0(SB)/4, $0x33800000
DATA logEps<>+4(SB)/4, $0x33800000
DATA logEps<>+8(SB)/4, $0x33800000
DATA logEps<>+12(SB)/4, $0x33800000
DATA logEps<>+16(SB)/4, $0x33800000
DATA logEps<>+20(SB)/4, $0x33800000
DATA logEps<>+24(SB)/4, $0x33800000
DATA logEps<>+28(SB)/4, $0x33800000
GLOBL logEps<>(SB), RODATA|NOPTR, $32
// 1 - 2^-24
DATA logOneMEps<>+0(SB)/4, $0x3f7fffff
DATA logOneMEps<>+4(SB)/4, $0x3f7fffff
DATA logOneMEps<>+8(SB)/4, $0x3f7fffff
DATA logOneMEps<>+12(SB)/4, $0x3f7fffff
DATA logOneMEps<>+16(SB)/4, $0x3f7fffff
DATA logOneMEps<>+20(SB)/4, $0x3f7fffff
DATA logOneMEps<>+24(SB)/4, $0x3f7fffff
DATA logOneMEps<>+28(SB)/4, $0x3f7fffff
GLOBL logOneMEps<>(SB), RODATA|NOPTR, $32

// LOG8 sets R to log(X) in eight lanes (X is kept); E, T, U, M are scratch.
// Steps as in log32: scale denormals, split x = m*2^e, t = 2m-1 or m-1,
// Horner's rule for P(t), e*ln2 + t - t*t/2 + t*t*t*P(t), then the special
// inputs (+Inf, zero, negative or NaN) by blending.
#define LOG8(X, R, E, T, U, M) \
	VCMPPS $1, logMinNorm<>(SB), X, T \
	VMULPS logTwo23<>(SB), X, U \
	VBLENDVPS T, U, X, R \
	VANDPS logMinus23<>(SB), T, E \
	VPSRLD $23, R, M \
	VPSUBD logBias<>(SB), M, M \
	VCVTDQ2PS M, M \
	VADDPS M, E, E \
	VANDPS logMant<>(SB), R, R \
	VORPS logHalf<>(SB), R, R \
	VCMPPS $1, logSqrtHalf<>(SB), R, T \
	VANDPS R, T, U \
	VADDPS U, R, R \
	VSUBPS logOne<>(SB), R, R \
	VANDPS logOne<>(SB), T, U \
	VSUBPS U, E, E \
	VMULPS R, R, M \
	VMOVUPS logP0<>(SB), U \
	VFMADD213PS logP1<>(SB), R, U \
	VFMADD213PS logP2<>(SB), R, U \
	VFMADD213PS logP3<>(SB), R, U \
	VFMADD213PS logP4<>(SB), R, U \
	VFMADD213PS logP5<>(SB), R, U \
	VFMADD213PS logP6<>(SB), R, U \
	VFMADD213PS logP7<>(SB), R, U \
	VFMADD213PS logP8<>(SB), R, U \
	VMULPS R, U, U \
	VMULPS M, U, U \
	VFMADD231PS logQ1<>(SB), E, U \
	VFMADD231PS logMHalf<>(SB), M, U \
	VADDPS U, R, R \
	VFMADD231PS logQ2<>(SB), E, R \
	VCMPPS $0, logInf<>(SB), X, T \
	VBLENDVPS T, logInf<>(SB), R, R \
	VCMPPS $0, logZero<>(SB), X, T \
	VBLENDVPS T, logNegInf<>(SB), R, R \
	VCMPPS $0x19, logZero<>(SB), X, T \
	VBLENDVPS T, logNaN<>(SB), R, R

// LOG16 is LOG8 in sixteen lanes, with mask registers K1 and K2 in place of
// blends: the same operations on the lanes that matter (adding 0 or
// subtracting 0 where LOG8 does is the identity on these values).
#define LOG16(X, R, E, U, M) \
	VCMPPS.BCST $1, logMinNorm<>(SB), X, K1 \
	VMOVAPS X, R \
	VMULPS.BCST logTwo23<>(SB), X, K1, R \
	VBROADCASTSS.Z logMinus23<>(SB), K1, E \
	VPSRLD $23, R, M \
	VPSUBD.BCST logBias<>(SB), M, M \
	VCVTDQ2PS M, M \
	VADDPS M, E, E \
	VPANDD.BCST logMant<>(SB), R, R \
	VPORD.BCST logHalf<>(SB), R, R \
	VCMPPS.BCST $1, logSqrtHalf<>(SB), R, K2 \
	VADDPS R, R, K2, R \
	VSUBPS.BCST logOne<>(SB), R, R \
	VSUBPS.BCST logOne<>(SB), E, K2, E \
	VMULPS R, R, M \
	VBROADCASTSS logP0<>(SB), U \
	VFMADD213PS.BCST logP1<>(SB), R, U \
	VFMADD213PS.BCST logP2<>(SB), R, U \
	VFMADD213PS.BCST logP3<>(SB), R, U \
	VFMADD213PS.BCST logP4<>(SB), R, U \
	VFMADD213PS.BCST logP5<>(SB), R, U \
	VFMADD213PS.BCST logP6<>(SB), R, U \
	VFMADD213PS.BCST logP7<>(SB), R, U \
	VFMADD213PS.BCST logP8<>(SB), R, U \
	VMULPS R, U, U \
	VMULPS M, U, U \
	VFMADD231PS.BCST logQ1<>(SB), E, U \
	VFMADD231PS.BCST logMHalf<>(SB), M, U \
	VADDPS U, R, R \
	VFMADD231PS.BCST logQ2<>(SB), E, R \
	VCMPPS.BCST $0, logInf<>(SB), X, K1 \
	VBROADCASTSS logInf<>(SB), K1, R \
	VCMPPS.BCST $0, logZero<>(SB), X, K1 \
	VBROADCASTSS logNegInf<>(SB), K1, R \
	VCMPPS.BCST $0x19, logZero<>(SB), X, K1 \
	VBROADCASTSS logNaN<>(SB), K1, R

// func logAVX512(dst, x *float32, n int)
TEXT ·logAVX512(SB), NOSPLIT, $0-24
	MOVQ dst+0(FP), DI
	MOVQ x+8(FP), SI
	MOVQ n+16(FP), CX
	SHRQ $4, CX
	JZ   logAVX512_done

logAVX512_loop:
	VMOVUPS (SI), Z0
	LOG16(Z0, Z1, Z2, Z3, Z4)
	VMOVUPS Z1, (DI)
	ADDQ    $64, SI
	ADDQ    $64, DI
	DECQ    CX
	JNZ     logAVX512_loop

logAVX512_done:
	VZEROUPPER
	RET

// func logAVX2(dst, x *float32, n int)
TEXT ·logAVX2(SB), NOSPLIT, $0-24
	MOVQ dst+0(FP), DI
	MOVQ x+8(FP), SI
	MOVQ n+16(FP), CX
	SHRQ $3, CX
	JZ   logAVX2_done

logAVX2_loop:
	VMOVUPS (SI), Y0
	LOG8(Y0, Y1, Y2, Y3, Y4, Y5)
	VMOVUPS Y1, (DI)
	ADDQ    $32, SI
	ADDQ    $32, DI
	DECQ    CX
	JNZ     logAVX2_loop

logAVX2_done:
	VZEROUPPER
	RET

// func lossAVX512(p, y *float32, n int, acc *[16]float64)
// Z10 = Eps32, Z11 = 1 - Eps32, Z14 = 1; Z12 and Z13 hold acc[0:8], acc[8:16].
// A vector whose labels are all 0 or 1 takes one logarithm per row: with q
// and log(1-q) finite and nonzero, fma(y, log q, (1-y)*log(1-q)) is exactly
// log q for y = 1 and log(1-q) for y = 0, so the term is log of q or 1-q as
// the label says, the same bits as the two-logarithm form.
TEXT ·lossAVX512(SB), NOSPLIT, $0-32
	MOVQ p+0(FP), SI
	MOVQ y+8(FP), DI
	MOVQ n+16(FP), CX
	MOVQ acc+24(FP), DX
	VMOVUPD      (DX), Z12
	VMOVUPD      64(DX), Z13
	VBROADCASTSS logEps<>(SB), Z10
	VBROADCASTSS logOneMEps<>(SB), Z11
	VBROADCASTSS logOne<>(SB), Z14
	SHRQ         $4, CX
	JZ           lossAVX512_done

lossAVX512_loop:
	// q = min(max(p, eps), 1-eps) with p the second source (NaN stays).
	VMOVUPS     (SI), Z0
	VMAXPS      Z0, Z10, Z0
	VMINPS      Z0, Z11, Z0
	VSUBPS      Z0, Z14, Z1
	VMOVUPS     (DI), Z8
	VCMPPS.BCST $0, logZero<>(SB), Z8, K3
	VCMPPS      $0, Z14, Z8, K4
	KORW        K3, K4, K5
	KORTESTW    K5, K5
	JCC         lossAVX512_soft
	// Every label 0 or 1: Z1 = y == 1 ? q : 1-q, the term is its log.
	VMOVAPS Z0, K4, Z1
	LOG16(Z1, Z9, Z4, Z5, Z6)
	JMP     lossAVX512_add

lossAVX512_soft:
	LOG16(Z0, Z2, Z4, Z5, Z6)
	LOG16(Z1, Z3, Z4, Z5, Z6)
	// term = fma(y, log q, (1-y)*log(1-q))
	VSUBPS      Z8, Z14, Z9
	VMULPS      Z3, Z9, Z9
	VFMADD231PS Z2, Z8, Z9

lossAVX512_add:
	VCVTPS2PD     Y9, Z0
	VEXTRACTF64X4 $1, Z9, Y1
	VCVTPS2PD     Y1, Z1
	VADDPD        Z0, Z12, Z12
	VADDPD        Z1, Z13, Z13
	ADDQ          $64, SI
	ADDQ          $64, DI
	DECQ          CX
	JNZ           lossAVX512_loop

lossAVX512_done:
	VMOVUPD Z12, (DX)
	VMOVUPD Z13, 64(DX)
	VZEROUPPER
	RET

// LOSS8 adds the terms of the eight rows at OFF(SI), OFF(DI) to the partial
// sums LO (rows 0-3) and HI (rows 4-7), with one logarithm per row when
// every label is 0 or 1 (see lossAVX512). Y10 = Eps32, Y11 = 1 - Eps32;
// Y0-Y9 and AX are scratch; SOFT and ADD are labels unique to the use.
#define LOSS8(OFF, LO, HI, SOFT, ADD) \
	VMOVUPS      OFF(SI), Y0 \
	VMAXPS       Y0, Y10, Y0 \
	VMINPS       Y0, Y11, Y0 \
	VMOVUPS      logOne<>(SB), Y1 \
	VSUBPS       Y0, Y1, Y1 \
	VMOVUPS      OFF(DI), Y8 \
	VCMPPS       $0, logZero<>(SB), Y8, Y2 \
	VCMPPS       $0, logOne<>(SB), Y8, Y3 \
	VORPS        Y2, Y3, Y2 \
	VMOVMSKPS    Y2, AX \
	CMPL         AX, $0xff \
	JNE          SOFT \
	VBLENDVPS    Y3, Y0, Y1, Y1 \
	LOG8(Y1, Y9, Y4, Y5, Y6, Y7) \
	JMP          ADD \
SOFT: \
	LOG8(Y0, Y2, Y4, Y5, Y6, Y7) \
	LOG8(Y1, Y3, Y4, Y5, Y6, Y7) \
	VMOVUPS      logOne<>(SB), Y9 \
	VSUBPS       Y8, Y9, Y9 \
	VMULPS       Y3, Y9, Y9 \
	VFMADD231PS  Y2, Y8, Y9 \
ADD: \
	VCVTPS2PD    X9, Y0 \
	VEXTRACTF128 $1, Y9, X1 \
	VCVTPS2PD    X1, Y1 \
	VADDPD       Y0, LO, LO \
	VADDPD       Y1, HI, HI

// func lossAVX2(p, y *float32, n int, acc *[16]float64)
TEXT ·lossAVX2(SB), NOSPLIT, $0-32
	MOVQ p+0(FP), SI
	MOVQ y+8(FP), DI
	MOVQ n+16(FP), CX
	MOVQ acc+24(FP), DX
	VMOVUPD (DX), Y12
	VMOVUPD 32(DX), Y13
	VMOVUPD 64(DX), Y14
	VMOVUPD 96(DX), Y15
	VMOVUPS logEps<>(SB), Y10
	VMOVUPS logOneMEps<>(SB), Y11
	SHRQ    $4, CX
	JZ      lossAVX2_done

lossAVX2_loop:
	LOSS8(0, Y12, Y13, lossAVX2_soft0, lossAVX2_add0)
	LOSS8(32, Y14, Y15, lossAVX2_soft1, lossAVX2_add1)
	ADDQ $64, SI
	ADDQ $64, DI
	DECQ CX
	JNZ  lossAVX2_loop

lossAVX2_done:
	VMOVUPD Y12, (DX)
	VMOVUPD Y13, 32(DX)
	VMOVUPD Y14, 64(DX)
	VMOVUPD Y15, 96(DX)
	VZEROUPPER
	RET
