"""Per-voxel RBF one-class SVMs: 8-lane vectors, the kernel matrix, decision values.

For each voxel: the controls' squared distances (libsvm's ``|x|^2 + |y|^2 - 2 x.y``), the width
gamma, the kernel ``exp(-gamma * d2)`` rounded to float32 as libsvm stores it (here), then the
one-class SMO and the loop over voxels (:mod:`embed.scorers.smo`); decision values of cases
(here). The loops release the GIL so that callers can run disjoint voxel ranges on several
threads.

The hot loops are written on 8-lane float64 vectors: numba intrinsics (below) emitting generic
LLVM ``<8 x double>`` code, one AVX-512 register here, two AVX2 or four NEON registers
elsewhere. Dot products sum in another order than scikit-learn's (a BLAS ``ddot``), so
distances agree to rounding (about 1e-15 relative); the exponential agrees with libm's to about
one double ulp, so the float32 kernel that the solver sees is libsvm's own but for rare
last-bit differences. Scratch arrays start on 64-byte boundaries (numba aligns to 32, and a
vector load across two cache lines costs two).
"""

from __future__ import annotations

import math

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.core import cgutils
from numba.extending import intrinsic, models, register_model

W = 8  # lanes per vector

# ---------------------------------------------------------------------------------------------
# 8-lane float64 vectors. Arithmetic is IEEE, lane by lane; only ``vhsum`` and ``vreduce8``
# reassociate (used for dot products, whose order is BLAS's in the reference anyway).

_F64 = ir.DoubleType()
_VEC = ir.VectorType(_F64, W)
_I32 = ir.IntType(32)
_NO_NAN = ("nnan", "nsz")  # max only: no NaN reaches the kernels (inputs are checked finite)


class _Vec8(types.Type):
    def __init__(self):
        super().__init__(name="Vec8")


vec8 = _Vec8()


@register_model(_Vec8)
class _Vec8Model(models.PrimitiveModel):
    def __init__(self, dmm, fe_type):
        super().__init__(dmm, fe_type, _VEC)


def _intrinsic(name, nargs, ret, codegen, scalars=False):
    """A numba intrinsic ``name(arg, ...) -> ret`` (``nargs`` arguments, typed as given, or as
    float64 with ``scalars``) lowered by ``codegen(context, builder, sig, args)``."""
    def lower(context, builder, sig, args):
        out = codegen(context, builder, sig, args)
        return context.get_dummy_value() if out is None else out

    def sig(*args):
        return ret(*([types.float64] * len(args) if scalars else args))
    typer = {0: lambda tc: (sig(), lower), 1: lambda tc, a: (sig(a), lower), 2: lambda tc, a, b: (sig(a, b), lower),
             3: lambda tc, a, b, c: (sig(a, b, c), lower), 4: lambda tc, a, b, c, d: (sig(a, b, c, d), lower),
             8: lambda tc, a, b, c, d, e, f, g, h: (sig(a, b, c, d, e, f, g, h), lower)}[nargs]
    typer.__name__ = name
    return intrinsic(typer)


def _ptr(context, builder, sig, args, n_idx, lanes):
    """(pointer to ``lanes`` elements at ``arr[idx...]``, element type, alignment)."""
    aryty = sig.args[0]
    arr = context.make_array(aryty)(context, builder, args[0])
    p = cgutils.get_item_pointer(context, builder, aryty, arr, list(args[1:1 + n_idx]))
    et = p.type.pointee
    return builder.bitcast(p, ir.VectorType(et, lanes).as_pointer()), et, (4 if et == ir.FloatType() else 8)


def _shuffle(builder, a, b, mask):
    return builder.shuffle_vector(a, b, ir.Constant(ir.VectorType(_I32, W), mask))


def _load_gen(n_idx):
    def codegen(context, builder, sig, args):
        p, et, al = _ptr(context, builder, sig, args, n_idx, W)
        v = builder.load(p, align=al)
        return v if et == _F64 else builder.fpext(v, _VEC)
    return codegen


def _store_gen(n_idx):
    def codegen(context, builder, sig, args):
        p, et, al = _ptr(context, builder, sig, args, n_idx, W)
        builder.store(args[-1] if et == _F64 else builder.fptrunc(args[-1], ir.VectorType(et, W)), p, align=al)
    return codegen


def _llvm(name, nargs, flags=(), ret=_VEC, lead=()):
    def codegen(context, builder, sig, args):
        fnty = ir.FunctionType(ret, [c.type for c in lead] + [_VEC] * nargs)
        fn = cgutils.get_or_insert_function(builder.module, fnty, name)
        return builder.call(fn, list(lead) + list(args), fastmath=flags)
    return codegen


def _splat(context, builder, sig, args):
    v = builder.insert_element(ir.Constant(_VEC, ir.Undefined), args[0], ir.Constant(_I32, 0))
    return _shuffle(builder, v, v, [0] * W)


def _select(pred):
    def codegen(context, builder, sig, args):
        return builder.select(builder.fcmp_ordered(pred, args[0], args[1]), args[2], args[3])
    return codegen


def _pow2i(context, builder, sig, args):
    iv = ir.VectorType(ir.IntType(64), W)
    e = builder.add(builder.fptosi(args[0], iv), ir.Constant(iv, [1023] * W))
    return builder.bitcast(builder.shl(e, ir.Constant(iv, [52] * W)), _VEC)


def _reduce8(context, builder, sig, args):
    def fold(x, y, m1, m2):
        return builder.fadd(_shuffle(builder, x, y, m1), _shuffle(builder, x, y, m2))
    b = [fold(args[2 * k], args[2 * k + 1], [0, 8, 2, 10, 4, 12, 6, 14], [1, 9, 3, 11, 5, 13, 7, 15]) for k in range(4)]
    c = [fold(b[2 * k], b[2 * k + 1], [0, 1, 8, 9, 4, 5, 12, 13], [2, 3, 10, 11, 6, 7, 14, 15]) for k in range(2)]
    return fold(c[0], c[1], [0, 1, 2, 3, 8, 9, 10, 11], [4, 5, 6, 7, 12, 13, 14, 15])


def _prefetch_line(context, builder, sig, args):
    arr = context.make_array(sig.args[0])(context, builder, args[0])
    p = cgutils.get_item_pointer(context, builder, sig.args[0], arr, list(args[1:]))
    i8p = ir.IntType(8).as_pointer()
    fnty = ir.FunctionType(ir.VoidType(), [i8p] + [_I32] * 3)
    fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0")
    builder.call(fn, [builder.bitcast(p, i8p)] + [ir.Constant(_I32, c) for c in (0, 2, 1)])  # read, keep in L2, data


_vec, _f64, _none = vec8, types.float64, types.none
vload = _intrinsic("vload", 2, _vec, _load_gen(1))  # a[i:i+8] of a 1-D array, float64 lanes
vload2 = _intrinsic("vload2", 3, _vec, _load_gen(2))  # a[r, c:c+8] of a 2-D array (rows contiguous)
vstore = _intrinsic("vstore", 3, _none, _store_gen(1))  # a[i:i+8] = v (rounded to nearest if float32)
vstore2 = _intrinsic("vstore2", 4, _none, _store_gen(2))  # a[r, c:c+8] = v
vsplat = _intrinsic("vsplat", 1, _vec, _splat, scalars=True)  # [x] * 8
viota = _intrinsic("viota", 0, _vec, lambda c, b, s, a: ir.Constant(_VEC, [float(k) for k in range(W)]))  # 0..7
vadd = _intrinsic("vadd", 2, _vec, lambda c, b, s, a: b.fadd(a[0], a[1]))
vsub = _intrinsic("vsub", 2, _vec, lambda c, b, s, a: b.fsub(a[0], a[1]))
vmul = _intrinsic("vmul", 2, _vec, lambda c, b, s, a: b.fmul(a[0], a[1]))
vdiv = _intrinsic("vdiv", 2, _vec, lambda c, b, s, a: b.fdiv(a[0], a[1]))
vfma = _intrinsic("vfma", 3, _vec, _llvm("llvm.fma.v8f64", 3))  # a * b + c, rounded once
vmax = _intrinsic("vmax", 2, _vec, _llvm("llvm.maxnum.v8f64", 2, _NO_NAN))
vabs = _intrinsic("vabs", 1, _vec, _llvm("llvm.fabs.v8f64", 1))
vfloor = _intrinsic("vfloor", 1, _vec, _llvm("llvm.floor.v8f64", 1))
vsel_ge = _intrinsic("vsel_ge", 4, _vec, _select(">="))  # (a >= b) ? x : y, lane-wise
vsel_gt = _intrinsic("vsel_gt", 4, _vec, _select(">"))
vsel_eq = _intrinsic("vsel_eq", 4, _vec, _select("=="))
vpow2i = _intrinsic("vpow2i", 1, _vec, _pow2i)  # 2.0 ** k for integral k in [-1022, 1023], exact
vhmax = _intrinsic("vhmax", 1, _f64, _llvm("llvm.vector.reduce.fmax.v8f64", 1, _NO_NAN, _F64))
vhsum = _intrinsic("vhsum", 1, _f64,  # sum of the lanes, in tree order
                   _llvm("llvm.vector.reduce.fadd.v8f64", 1, ("reassoc", "nsz"), _F64, (ir.Constant(_F64, -0.0),)))
vreduce8 = _intrinsic("vreduce8", 8, _vec, _reduce8)  # lane k = sum of the lanes of the k-th argument
prefetch3 = _intrinsic("prefetch3", 4, _none, _prefetch_line)  # hint the line of x[i, j, k] (3-D array) into L2


# ---------------------------------------------------------------------------------------------
# Kernel pieces

# exp(v) = 2^k exp(r) with v = k ln2 + r (Cody-Waite, fdlibm's split of ln2), exp(r) by its Taylor
# polynomial of degree 13 (|r| <= ln2 / 2: truncation < 1e-17 relative), 2^k from its exponent
# bits. Measured against numpy's exp on 80,000 arguments: max relative difference 2.2e-16 and
# the same float32 rounding everywhere.
_LOG2E = 1.4426950408889634
_LN2_HI = 6.93147180369123816490e-01
_LN2_LO = 1.90821492927058770002e-10
_C = tuple(1.0 / math.factorial(k) for k in range(14))


@njit(cache=True)
def padded(n):
    """``n`` rounded up to a multiple of the vector width."""
    return (n + W - 1) // W * W


@njit(cache=True)
def _zeros(rows, cols, dtype):
    """Zeroed ``(rows, cols)`` array whose data starts on a 64-byte boundary."""
    n = rows * cols
    raw = np.zeros(n + 16, dtype)  # 16 spare items: 64 bytes of float32, 128 of float64
    off = ((-raw.ctypes.data) % 64) // raw.itemsize
    return raw[off:off + n].reshape((rows, cols))


@njit(cache=True, inline="always")
def _exp_neg(d2, g):
    """``exp(-g * d2)`` lane by lane, to about one ulp of libm's exp; arguments below -110 are
    clamped (exp(-110) < 2e-48: float32 rounds it to 0, and in a decision value it is far below
    rounding), above 1 too (never reached: d2 >= 0 up to rounding)."""
    x = vmul(vsplat(-g), d2)
    x = vsel_gt(x, vsplat(-110.0), x, vsplat(-110.0))  # NaN (overflowed d2) -> -110 too
    x = vsel_gt(x, vsplat(1.0), vsplat(1.0), x)
    k = vfloor(vfma(x, vsplat(_LOG2E), vsplat(0.5)))
    r = vsub(vfma(k, vsplat(-_LN2_HI), x), vmul(k, vsplat(_LN2_LO)))
    p = vsplat(_C[13])
    for c in _C[12::-1]:
        p = vfma(p, r, vsplat(c))
    return vmul(p, vpow2i(k))


@njit(cache=True)
def _prefetch(X, v):
    """Hint voxel ``v``'s controls toward the cache (a no-op past the end)."""
    if v < X.shape[0]:
        for s in range(X.shape[1]):
            for d in range(0, X.shape[2], 64 // X.itemsize):
                prefetch3(X, v, s, d)


@njit(cache=True)
def _sq_distances(xv, S, sq, d2):
    """``d2[s, t] = |x_s|^2 + |x_t|^2 - 2 x_s.x_t`` for ``s < t < S`` (libsvm's RBF argument),
    from ``xv (>= S + 9, D8)`` zero-padded; ``d2 (S, >= S + 9)`` gets meaningless values at
    columns >= S and is left alone on and below its diagonal.

    Blocks of 2 rows x 8 columns: 16 dot products accumulate in 16 vectors over D (10 loads per
    16 fused multiply-adds) and leave through two shuffle trees (:func:`vreduce8`)."""
    D8 = xv.shape[1]
    for s in range(xv.shape[0]):
        acc = vsplat(0.0)
        for d in range(0, D8, W):
            x = vload2(xv, s, d)
            acc = vfma(x, x, acc)
        sq[s] = vhsum(acc)
    two = vsplat(2.0)
    for s in range(0, S - 1, 2):
        acc = vsplat(0.0)
        for d in range(0, D8, W):
            acc = vfma(vload2(xv, s, d), vload2(xv, s + 1, d), acc)
        d2[s, s + 1] = sq[s] + sq[s + 1] - 2 * vhsum(acc)
        s0 = vsplat(sq[s])
        s1 = vsplat(sq[s + 1])
        for t in range(s + 2, S, 8):
            a0 = a1 = a2 = a3 = a4 = a5 = a6 = a7 = vsplat(0.0)
            b0 = b1 = b2 = b3 = b4 = b5 = b6 = b7 = vsplat(0.0)
            for d in range(0, D8, W):
                x0 = vload2(xv, s, d)
                x1 = vload2(xv, s + 1, d)
                y = vload2(xv, t, d)
                a0 = vfma(x0, y, a0)
                b0 = vfma(x1, y, b0)
                y = vload2(xv, t + 1, d)
                a1 = vfma(x0, y, a1)
                b1 = vfma(x1, y, b1)
                y = vload2(xv, t + 2, d)
                a2 = vfma(x0, y, a2)
                b2 = vfma(x1, y, b2)
                y = vload2(xv, t + 3, d)
                a3 = vfma(x0, y, a3)
                b3 = vfma(x1, y, b3)
                y = vload2(xv, t + 4, d)
                a4 = vfma(x0, y, a4)
                b4 = vfma(x1, y, b4)
                y = vload2(xv, t + 5, d)
                a5 = vfma(x0, y, a5)
                b5 = vfma(x1, y, b5)
                y = vload2(xv, t + 6, d)
                a6 = vfma(x0, y, a6)
                b6 = vfma(x1, y, b6)
                y = vload2(xv, t + 7, d)
                a7 = vfma(x0, y, a7)
                b7 = vfma(x1, y, b7)
            st = vload(sq, t)
            vstore2(d2, s, t, vsub(vadd(s0, st), vmul(two, vreduce8(a0, a1, a2, a3, a4, a5, a6, a7))))
            vstore2(d2, s + 1, t, vsub(vadd(s1, st), vmul(two, vreduce8(b0, b1, b2, b3, b4, b5, b6, b7))))


@njit(cache=True)
def _rbf_kernel(d2, S, g, Q):
    """``Q[:S, :S] = float32(exp(-g * d2))`` symmetric with unit diagonal, zero elsewhere, from
    the upper triangle of ``d2`` (its diagonal and below hold 0)."""
    lp = Q.shape[0]
    for s in range(S):
        for c in range(s // W * W, lp, W):
            vstore2(Q, s, c, _exp_neg(vload2(d2, s, c), g))  # exp(0) = 1 on the diagonal
        for c in range(S, lp):
            Q[s, c] = 0.0
    for t in range(1, S):
        for s in range(t):
            Q[t, s] = Q[s, t]


@njit(cache=True)
def _load_support(X, v, alpha, sv, sq, coef):
    """The controls of voxel ``v`` with non-zero alpha into ``sv`` rows (float64), their squared
    norms into ``sq`` and alphas into ``coef``; returns their number."""
    _, S, D = X.shape
    n = 0
    for s in range(S):
        if alpha[v, s] != 0.0:
            coef[n] = alpha[v, s]
            for d in range(D):
                sv[n, d] = X[v, s, d]
            acc = vsplat(0.0)
            for d in range(0, sv.shape[1], W):
                x = vload2(sv, n, d)
                acc = vfma(x, x, acc)
            sq[n] = vhsum(acc)
            n += 1
    return n


@njit(cache=True, nogil=True)
def decision_voxels(X, alpha, rho, gamma, cases, lo, hi, out):
    """Decision values of ``cases: (M, V, D)`` float32/float64 at voxels ``[lo, hi)`` under the
    per-voxel models fitted on ``X: (V, S, D)`` (any strides; ``alpha (V, S)``, ``rho (V,)``,
    ``gamma (V,)``), written into ``out: (M, V) float64``. Releases the GIL.

    The cases sit in the lanes (8 at a time, transposed to ``ct (D, 8)``): each support vector's
    distance to all of them is one vector, and the sum over support vectors runs in their order,
    as in libsvm's ``svm_predict_values``. Distances use the expanded form, which differs from
    libsvm's sum of squared differences by about 1e-15 relative.
    """
    V, S, D = X.shape
    M = cases.shape[0]
    D8 = padded(D)
    sv = _zeros(S + 1, D8, np.float64)
    sq = np.zeros(S + 1)
    coef = np.zeros(S + 1)
    ct = _zeros(D8, W, np.float64)
    res = _zeros(1, W, np.float64)[0]
    for v in range(lo, hi):
        _prefetch(X, v + 1)
        n = _load_support(X, v, alpha, sv, sq, coef)
        sq[n] = 0.0
        coef[n] = 0.0
        sv[n, :] = 0.0
        g = gamma[v]
        for m0 in range(0, M, W):
            mw = min(W, M - m0)
            for m in range(W):
                for d in range(D):
                    ct[d, m] = cases[m0 + m, v, d] if m < mw else 0.0
            sqc = vsplat(0.0)
            for d in range(D):
                c = vload2(ct, d, 0)
                sqc = vfma(c, c, sqc)
            total = vsplat(0.0)
            for k in range(0, n, 2):  # two support vectors at a time (row n is zero, coef 0)
                a0 = a1 = a2 = a3 = b0 = b1 = b2 = b3 = vsplat(0.0)
                for d in range(0, D8, 4):
                    c0 = vload2(ct, d, 0)
                    c1 = vload2(ct, d + 1, 0)
                    c2 = vload2(ct, d + 2, 0)
                    c3 = vload2(ct, d + 3, 0)
                    a0 = vfma(c0, vsplat(sv[k, d]), a0)
                    a1 = vfma(c1, vsplat(sv[k, d + 1]), a1)
                    a2 = vfma(c2, vsplat(sv[k, d + 2]), a2)
                    a3 = vfma(c3, vsplat(sv[k, d + 3]), a3)
                    b0 = vfma(c0, vsplat(sv[k + 1, d]), b0)
                    b1 = vfma(c1, vsplat(sv[k + 1, d + 1]), b1)
                    b2 = vfma(c2, vsplat(sv[k + 1, d + 2]), b2)
                    b3 = vfma(c3, vsplat(sv[k + 1, d + 3]), b3)
                for kk, dot in ((k, vadd(vadd(a0, a1), vadd(a2, a3))), (k + 1, vadd(vadd(b0, b1), vadd(b2, b3)))):
                    r = vsub(vadd(sqc, vsplat(sq[kk])), vmul(vsplat(2.0), dot))
                    total = vadd(total, vmul(vsplat(coef[kk]), _exp_neg(r, g)))
            vstore(res, 0, total)
            for m in range(mw):
                out[m0 + m, v] = res[m] - rho[v]
