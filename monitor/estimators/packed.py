"""Several independent IEEE divisions (or square roots) in one vector instruction.

A division and a square root are the slowest arithmetic the estimator step does: each takes
one pass through the processor's divider, which on x86-64 accepts a new operation only every
few cycles, the same for one lane or four (``vdivpd`` on 4 doubles costs about as much as one
``divsd``; measured for issue 15: 8 divisions in 10.9 ns as scalars, 3.2 ns as two 4-lane
instructions). The k = 2 step needs over twenty divisions per observation, many of them
independent of each other, so it packs them: :func:`div4` ``(a0, a1, a2, a3) / (b0, b1, b2,
b3)`` lane by lane, :func:`div2`, :func:`sqrt4`.

The results are the same to the bit as the scalar operations: IEEE 754 division and square
root are correctly rounded, lane by lane, in the scalar and the vector instructions alike
(Intel and AMD manuals for ``divsd``/``vdivpd``, ``sqrtsd``/``vsqrtpd``; IEEE 754-2008 sec.
5.4.1). The functions emit plain LLVM ``fdiv`` / ``llvm.sqrt`` on a vector type without
fast-math flags, so LLVM may not reassociate or approximate them. Unlike numba's own ``/``
(error model ``python``) a zero divisor raises nothing: it gives ``inf`` or ``nan`` as IEEE
says, so a lane may divide speculatively where the scalar code divided only under a guard;
the caller then ignores that lane.
"""

from __future__ import annotations

from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic

_I32 = ir.IntType(32)


def _pack(builder, tup, n):
    vt = ir.VectorType(ir.DoubleType(), n)
    v = ir.Constant(vt, ir.Undefined)
    for i in range(n):
        v = builder.insert_element(v, builder.extract_value(tup, i), ir.Constant(_I32, i))
    return v


def _unpack(context, builder, ret_type, v, n):
    res = context.get_constant_undef(ret_type)
    for i in range(n):
        res = builder.insert_value(res, builder.extract_element(v, ir.Constant(_I32, i)), i)
    return res


def _check(tup, n) -> bool:
    return (isinstance(tup, types.BaseTuple) and len(tup) == n
            and all(t == types.float64 for t in tup))


def _div(n):
    def typer(typingctx, num, den):
        if not (_check(num, n) and _check(den, n)):
            return None
        ret = types.UniTuple(types.float64, n)

        def codegen(context, builder, sig, args):
            q = builder.fdiv(_pack(builder, args[0], n), _pack(builder, args[1], n))
            return _unpack(context, builder, ret, q, n)
        return ret(num, den), codegen
    return typer


def _sqrt(n):
    def typer(typingctx, val):
        if not _check(val, n):
            return None
        ret = types.UniTuple(types.float64, n)

        def codegen(context, builder, sig, args):
            vt = ir.VectorType(ir.DoubleType(), n)
            fn = cgutils.get_or_insert_function(builder.module, ir.FunctionType(vt, [vt]),
                                                f"llvm.sqrt.v{n}f64")
            r = builder.call(fn, [_pack(builder, args[0], n)])
            return _unpack(context, builder, ret, r, n)
        return ret(val), codegen
    return typer


@intrinsic
def div4(typingctx, num, den):
    """``(num[i] / den[i] for i in 0..3)``: four float64 divisions in one instruction."""
    return _div(4)(typingctx, num, den)


@intrinsic
def div2(typingctx, num, den):
    """``(num[0] / den[0], num[1] / den[1])`` in one instruction."""
    return _div(2)(typingctx, num, den)


@intrinsic
def sqrt4(typingctx, val):
    """``(sqrt(val[i]) for i in 0..3)`` in one instruction (``nan`` for a negative lane)."""
    return _sqrt(4)(typingctx, val)

