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

The lane-wise operations below (:func:`vadd`, :func:`vsub`, :func:`vmul`, :func:`vdiv`,
:func:`vsqrt`, the comparisons :func:`vlt`, :func:`vgt`, :func:`veq`, the masks :func:`vand`,
:func:`vor`, :func:`vnot` and the select :func:`vsel`) carry one value per lane in a tuple
and serve :func:`monitor.estimators.kernel.step_two_lanes`, which runs four different series'
rows in one pass: addition, subtraction and multiplication are correctly rounded too,
comparisons are ordered (false with a NaN operand, as in scalar code), so every lane equals
the scalar step.
"""

from __future__ import annotations

from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic

_I32 = ir.IntType(32)


def _pack(builder, tup, n):
    vals = [builder.extract_value(tup, i) for i in range(n)]
    v = ir.Constant(ir.VectorType(vals[0].type, n), ir.Undefined)
    for i in range(n):
        v = builder.insert_element(v, vals[i], ir.Constant(_I32, i))
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



# Lane-wise operations on a tuple of float64 (one value per lane, :func:`monitor.estimators.
# kernel.step_two_lanes`): the same IEEE operation on every lane, emitted as one LLVM vector
# instruction without fast-math flags, so each lane's result is the scalar operation's to the
# bit. Comparisons give a tuple of booleans (a mask), ``vsel`` picks lane by lane.

def _lanes(t) -> int:
    if isinstance(t, types.UniTuple) and t.dtype == types.float64:
        return len(t)
    return 0


def _masks(t) -> int:
    if isinstance(t, types.UniTuple) and t.dtype == types.boolean:
        return len(t)
    return 0


def _vbin(op):
    def typer(typingctx, a, b):
        n = _lanes(a)
        if not n or a != b:
            return None

        def codegen(context, builder, sig, args):
            r = getattr(builder, op)(_pack(builder, args[0], n), _pack(builder, args[1], n))
            return _unpack(context, builder, sig.return_type, r, n)
        return a(a, b), codegen
    return typer


def _vcmp(op):
    def typer(typingctx, a, b):
        n = _lanes(a)
        if not n or a != b:
            return None
        ret = types.UniTuple(types.boolean, n)

        def codegen(context, builder, sig, args):
            r = builder.fcmp_ordered(op, _pack(builder, args[0], n), _pack(builder, args[1], n))
            return _unpack(context, builder, ret, r, n)
        return ret(a, b), codegen
    return typer


def _vmask(op):
    def typer(typingctx, a, b):
        n = _masks(a)
        if not n or a != b:
            return None

        def codegen(context, builder, sig, args):
            r = getattr(builder, op)(_pack(builder, args[0], n), _pack(builder, args[1], n))
            return _unpack(context, builder, sig.return_type, r, n)
        return a(a, b), codegen
    return typer


@intrinsic
def vadd(typingctx, a, b):
    """Lane-wise ``a + b``."""
    return _vbin("fadd")(typingctx, a, b)


@intrinsic
def vsub(typingctx, a, b):
    """Lane-wise ``a - b``."""
    return _vbin("fsub")(typingctx, a, b)


@intrinsic
def vmul(typingctx, a, b):
    """Lane-wise ``a * b``."""
    return _vbin("fmul")(typingctx, a, b)


@intrinsic
def vdiv(typingctx, a, b):
    """Lane-wise ``a / b`` (IEEE: a zero divisor gives inf or nan, raises nothing)."""
    return _vbin("fdiv")(typingctx, a, b)


@intrinsic
def vlt(typingctx, a, b):
    """Lane-wise ``a < b`` (false where either is nan, as in scalar code)."""
    return _vcmp("<")(typingctx, a, b)


@intrinsic
def vgt(typingctx, a, b):
    """Lane-wise ``a > b`` (false where either is nan)."""
    return _vcmp(">")(typingctx, a, b)


@intrinsic
def veq(typingctx, a, b):
    """Lane-wise ``a == b`` (false where either is nan)."""
    return _vcmp("==")(typingctx, a, b)


@intrinsic
def vand(typingctx, a, b):
    """Lane-wise ``a and b`` of two masks."""
    return _vmask("and_")(typingctx, a, b)


@intrinsic
def vor(typingctx, a, b):
    """Lane-wise ``a or b`` of two masks."""
    return _vmask("or_")(typingctx, a, b)


@intrinsic
def vsel(typingctx, m, a, b):
    """Lane-wise ``a if m else b``."""
    n = _lanes(a)
    if not n or a != b or _masks(m) != n:
        return None

    def codegen(context, builder, sig, args):
        r = builder.select(_pack(builder, args[0], n), _pack(builder, args[1], n),
                           _pack(builder, args[2], n))
        return _unpack(context, builder, sig.return_type, r, n)
    return a(m, a, b), codegen


@intrinsic
def vsqrt(typingctx, a):
    """Lane-wise square root (nan for a negative lane)."""
    n = _lanes(a)
    if not n:
        return None
    return _sqrt(n)(typingctx, a)


@intrinsic
def vnot(typingctx, m):
    """Lane-wise ``not m`` of a mask."""
    n = _masks(m)
    if not n:
        return None

    def codegen(context, builder, sig, args):
        r = builder.not_(_pack(builder, args[0], n))
        return _unpack(context, builder, sig.return_type, r, n)
    return m(m), codegen
