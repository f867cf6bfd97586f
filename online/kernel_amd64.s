#include "textflag.h"

// func prefetchRange(p unsafe.Pointer, n uintptr)
//
// Issues PREFETCHT0 for every 64-byte line that holds a byte of [p, p+n).
// n must be at least 1. A prefetch retires without waiting for its line, so
// unlike a load it does not hold the reorder buffer while memory answers.
TEXT ·prefetchRange(SB), NOSPLIT|NOFRAME, $0-16
	MOVQ p+0(FP), AX
	MOVQ n+8(FP), CX
	LEAQ -1(AX)(CX*1), CX
	ANDQ $~63, AX
loop:
	PREFETCHT0 (AX)
	ADDQ $64, AX
	CMPQ AX, CX
	JLS loop
	RET

// func prefetchPair(a, b unsafe.Pointer, n uintptr, ma, mb unsafe.Pointer, mn uintptr)
//
// prefetchRange(a, n), prefetchRange(b, n), prefetchRange(ma, mn) and
// prefetchRange(mb, mn) in one call: a Touch of a user and an item row.
TEXT ·prefetchPair(SB), NOSPLIT|NOFRAME, $0-48
	MOVQ n+16(FP), DX
	MOVQ a+0(FP), AX
	LEAQ -1(AX)(DX*1), CX
	ANDQ $~63, AX
loopa:
	PREFETCHT0 (AX)
	ADDQ $64, AX
	CMPQ AX, CX
	JLS loopa
	MOVQ b+8(FP), AX
	LEAQ -1(AX)(DX*1), CX
	ANDQ $~63, AX
loopb:
	PREFETCHT0 (AX)
	ADDQ $64, AX
	CMPQ AX, CX
	JLS loopb
	MOVQ mn+40(FP), DX
	MOVQ ma+24(FP), AX
	PREFETCHT0 (AX)
	PREFETCHT0 -1(AX)(DX*1)
	MOVQ mb+32(FP), AX
	PREFETCHT0 (AX)
	PREFETCHT0 -1(AX)(DX*1)
	RET
