"""numba intrinsics shared by the compiled TRPES kernels (private module).

``prefetch(arr, i)`` (LLVM's prefetch hint) and ``add8(acc, row, v, d)`` (the eight
Taylor moments ``v d^k`` of a stick added to one cache line with one 8-wide vector
load/add/store), used by :mod:`._kernels_deposit` and :mod:`._kernels_fused`. numba and
llvmlite are imported only by the factories (called on a kernel's first use).
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["add8_scalar", "make_add8", "make_prefetch", "pick_add8", "compiled_helpers"]


def add8_scalar(acc, row, v, d):  # pragma: no cover - compiled by numba
    """``acc[row + k] += v d^k`` for k = 0..7 (the products of the vector version)."""
    d2 = d * d
    v1 = v * d
    v2 = v * d2
    v3 = v1 * d2
    d4 = d2 * d2
    acc[row] += v
    acc[row + np.uint64(1)] += v1
    acc[row + np.uint64(2)] += v2
    acc[row + np.uint64(3)] += v3
    acc[row + np.uint64(4)] += v * d4
    acc[row + np.uint64(5)] += v1 * d4
    acc[row + np.uint64(6)] += v2 * d4
    acc[row + np.uint64(7)] += v3 * d4


def make_add8(numba):
    """A numba intrinsic ``add8(acc, row, v, d)``: :func:`add8_scalar` as one 8-wide
    vector load, add and store (the same products, so the same numbers)."""
    from llvmlite import ir
    from numba.core import cgutils

    @numba.extending.intrinsic
    def add8(typingctx, arr, index, v, d):
        sig = numba.types.void(arr, index, v, d)

        def codegen(context, builder, signature, args):
            aryty = signature.args[0]
            ary = context.make_array(aryty)(context, builder, args[0])
            ptr = cgutils.get_item_pointer(context, builder, aryty, ary, [args[1]],
                                           wraparound=False)
            i32 = ir.IntType(32)
            v4t = ir.VectorType(ir.DoubleType(), 4)
            v8t = ir.VectorType(ir.DoubleType(), 8)
            vv, dd = args[2], args[3]
            d2 = builder.fmul(dd, dd)
            v1 = builder.fmul(vv, dd)
            v2 = builder.fmul(vv, d2)
            v3 = builder.fmul(v1, d2)
            d4 = builder.fmul(d2, d2)
            lo = ir.Constant(v4t, ir.Undefined)
            for k, x in enumerate((vv, v1, v2, v3)):
                lo = builder.insert_element(lo, x, ir.Constant(i32, k))
            b4 = builder.insert_element(ir.Constant(v4t, ir.Undefined), d4, ir.Constant(i32, 0))
            b4 = builder.shuffle_vector(b4, b4, ir.Constant(ir.VectorType(i32, 4), [0] * 4))
            hi = builder.fmul(lo, b4)
            full = builder.shuffle_vector(lo, hi, ir.Constant(ir.VectorType(i32, 8),
                                                              list(range(8))))
            if getattr(ptr.type, "is_opaque", False):
                old = builder.load(ptr, align=8, typ=v8t)
                vptr = ptr
            else:
                vptr = builder.bitcast(ptr, v8t.as_pointer())
                old = builder.load(vptr, align=8)
            builder.store(builder.fadd(old, full), vptr, align=8)
            return context.get_dummy_value()

        return sig, codegen

    return add8


def make_prefetch(numba):
    """A numba intrinsic ``prefetch(arr, index)``: LLVM's prefetch (write, keep in cache).

    A prefetch never faults and never changes results; it lets the CPU fetch the
    accumulator lines of sticks a few places ahead while the current one is added.
    """
    from llvmlite import ir
    from numba.core import cgutils

    @numba.extending.intrinsic
    def prefetch(typingctx, arr, index):
        sig = numba.types.void(arr, index)

        def codegen(context, builder, signature, args):
            aryty = signature.args[0]
            ary = context.make_array(aryty)(context, builder, args[0])
            ptr = cgutils.get_item_pointer(context, builder, aryty, ary, [args[1]],
                                           wraparound=False)
            i32 = ir.IntType(32)
            name = "llvm.prefetch.p0" if getattr(ptr.type, "is_opaque", False) else \
                "llvm.prefetch.p0i8"
            if name.endswith("i8"):
                ptr = builder.bitcast(ptr, ir.IntType(8).as_pointer())
            fn = cgutils.get_or_insert_function(
                builder.module, ir.FunctionType(ir.VoidType(), [ptr.type, i32, i32, i32]), name)
            builder.call(fn, [ptr, ir.Constant(i32, 1), ir.Constant(i32, 3), ir.Constant(i32, 1)])
            return context.get_dummy_value()

        return sig, codegen

    return prefetch


_VEC_ADD8: Any = None  # the vector intrinsic, a global of _probe_vec while it compiles


def _probe_vec(acc, row, v, d):  # pragma: no cover - compiled by numba
    _VEC_ADD8(acc, row, v, d)


#: the choice of :func:`pick_add8`, per numba module (made once per process)
_PICKED: dict[int, object] = {}


def pick_add8(numba):
    """The vector :func:`_add8` intrinsic if it compiles and agrees with the scalar one,
    else the compiled scalar version (older or newer llvmlite, other CPUs).

    Decided once per process (one small probe compile); the scalar reference is run as
    plain Python, whose float64 products are the compiled scalar kernel's (no fastmath).
    """
    key = id(numba)
    if key in _PICKED:
        return _PICKED[key]
    global _VEC_ADD8
    scalar = numba.njit(nogil=True, boundscheck=False)(add8_scalar)  # compiled on first use
    picked = scalar
    try:
        vec = _VEC_ADD8 = make_add8(numba)
        # cached on disk like the kernels (a later process loads it instead of compiling)
        probe = numba.njit(cache=True, nogil=True, boundscheck=False)(_probe_vec)
        a = np.arange(10.0)
        b = a.copy()
        probe(a, np.uint64(1), 0.7, -0.3)
        add8_scalar(b, np.uint64(1), 0.7, -0.3)
        if np.array_equal(a, b):
            picked = vec
    except Exception:  # pragma: no cover - depends on the numba/llvmlite build
        pass
    _PICKED[key] = picked
    return picked


def compiled_helpers(numba):
    """The numba intrinsics ``(prefetch(arr, i), add8(acc, row, v, d))`` of this module.

    ``add8`` adds the 8 moments ``v d^k`` at ``acc[row:row + 8]`` (``row`` uint64), for
    other compiled kernels that deposit moments (e.g. :mod:`._kernels_fused`).
    """
    return make_prefetch(numba), pick_add8(numba)
