"""Reference-count-free views of arrays inside numba kernels.

numba counts references to every array it passes around, with an atomic add and
subtract per use; in a kernel whose inner loop calls small helpers on tuples of arrays
those atomics cost more than the arithmetic (bench/kernel.py measured 40 % of the greedy
kernels' time in them). :func:`borrow` returns the same array without an owner record,
so numba skips the counting.

Rule: borrow only arrays that are arguments of the kernel doing the borrowing (their
caller keeps them alive for the whole call), and never return or store a borrowed
array beyond that call.
"""

from __future__ import annotations

from numba.extending import intrinsic

__all__ = ["borrow", "borrow_all"]


def _strip(context, builder, ty, value):
    src = context.make_array(ty)(context, builder, value=value)
    out = context.make_array(ty)(context, builder)
    context.populate_array(out, data=src.data, shape=src.shape, strides=src.strides,
                           itemsize=src.itemsize, meminfo=None)
    return out._getvalue()


@intrinsic
def borrow(typingctx, arr):
    """The array ``arr`` (any dtype, layout, ndim) as a view with no owner record."""

    def codegen(context, builder, sig, args):
        return _strip(context, builder, arr, args[0])

    return arr(arr), codegen


@intrinsic
def borrow_all(typingctx, tup):
    """A tuple of arrays as the same tuple of views with no owner records."""

    def codegen(context, builder, sig, args):
        vals = [builder.extract_value(args[0], k) for k in range(len(tup.types))]
        outs = [_strip(context, builder, t, v) for t, v in zip(tup.types, vals)]
        return context.make_tuple(builder, sig.return_type, outs)

    return tup(tup), codegen
