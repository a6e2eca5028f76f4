"""Fused multiply-add for compiled code.

``fma(a, b, c)`` = a * b + c rounded once (IEEE 754-2008 ``fusedMultiplyAdd``), emitted as
LLVM's ``llvm.fma.f64`` intrinsic: one instruction on CPUs with FMA units, a correctly
rounded library call otherwise.  Used for the exact error of a product,
``p = a * b; e = fma(a, b, -p)`` (p + e = a b exactly; J.-M. Muller et al., *Handbook of
Floating-Point Arithmetic*, 2nd ed., Birkhaeuser 2018, Sec. 4.2, "2MultFMA").  Float64
arguments only.
"""

from __future__ import annotations

from llvmlite import ir
from numba import types
from numba.extending import intrinsic


@intrinsic
def fma(typingctx, a, b, c):
    """a * b + c with a single rounding (float64)."""
    if not all(x == types.float64 for x in (a, b, c)):
        return None
    sig = types.float64(types.float64, types.float64, types.float64)

    def codegen(context, builder, signature, args):
        d = ir.DoubleType()
        fn = builder.module.declare_intrinsic("llvm.fma", [d], ir.FunctionType(d, [d, d, d]))
        return builder.call(fn, args)

    return sig, codegen
