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
