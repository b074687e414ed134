//go:build amd64 && !purego

package kernel

// The vector paths of Log32 and LogLoss32 (log_amd64.s). n is a multiple of
// 16; acc holds the 16 partial sums, row i adding to acc[i mod 16].

//go:noescape
func logAVX512(dst, x *float32, n int)

//go:noescape
func logAVX2(dst, x *float32, n int)

//go:noescape
func lossAVX512(p, y *float32, n int, acc *[16]float64)

//go:noescape
func lossAVX2(p, y *float32, n int, acc *[16]float64)
