"""A software prefetch for compiled kernels: ``prefetch(array, index)``, ``prefetch_2d(array, row, col)``.

A forward push visits nodes in queue order, so the next nodes' records and
out-edge blocks are known a few steps ahead but sit at random places in
memory. Asking the processor to fetch them early (LLVM's ``llvm.prefetch``
intrinsic, a hint that never faults) overlaps those cache misses with the
work on the current node.

References
----------
.. [1] T. C. Mowry, M. S. Lam, A. Gupta, "Design and evaluation of a compiler
   algorithm for prefetching", ASPLOS 1992.
.. [2] LLVM Language Reference Manual, "'llvm.prefetch' Intrinsic".
"""

from __future__ import annotations

from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic

#: Arguments of ``llvm.prefetch`` after the address: a read (0), high
#: temporal locality (3: keep in all cache levels), a data cache (1).
_READ, _LOCALITY, _DATA = 0, 3, 1


def _prefetch_codegen(context, builder, signature, args):
    """Emit ``llvm.prefetch`` of the element ``args[0][args[1:]]`` (indices of any integer type)."""
    array_type = signature.args[0]
    view = context.make_array(array_type)(context, builder, args[0])
    index = [context.cast(builder, value, kind, types.intp) for value, kind in zip(args[1:], signature.args[1:])]
    address = cgutils.get_item_pointer(context, builder, array_type, view, index, wraparound=False)
    i8_ptr = ir.IntType(8).as_pointer()
    i32 = ir.IntType(32)
    fn_type = ir.FunctionType(ir.VoidType(), [i8_ptr, i32, i32, i32])
    fn = cgutils.get_or_insert_function(builder.module, fn_type, "llvm.prefetch.p0")
    builder.call(fn, [builder.bitcast(address, i8_ptr), ir.Constant(i32, _READ),
                      ir.Constant(i32, _LOCALITY), ir.Constant(i32, _DATA)])
    return context.get_dummy_value()


@intrinsic
def prefetch(typingctx, array, index):
    """Hint the processor to load ``array[index]`` into cache; no effect on results.

    ``index`` is not bounds-checked: the hint is harmless for any address, but
    callers pass valid indices all the same.
    """
    if not isinstance(array, types.Array) or array.ndim != 1 or not isinstance(index, types.Integer):
        return None
    return types.void(array, index), _prefetch_codegen


@intrinsic
def prefetch_2d(typingctx, array, row, col):
    """Hint the processor to load ``array[row, col]`` of a 2-D array into cache; no effect on results.

    The indices may be of any integer type (node ids are often int32).
    """
    if not isinstance(array, types.Array) or array.ndim != 2 or not isinstance(row, types.Integer) \
            or not isinstance(col, types.Integer):
        return None
    return types.void(array, row, col), _prefetch_codegen
