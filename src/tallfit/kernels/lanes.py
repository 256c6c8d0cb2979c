"""A four-lane add for numba kernels that scatter four sums per row into a table.

``add4(t, k, v0, v1, v2, v3)`` does t[k, 0:4] += (v0, v1, v2, v3) as one 256-bit load, add and
store. Written as four scalar updates, LLVM keeps them scalar (its SLP vectoriser does not pair
them): four stores per row, which bound the binned-residual kernel. Each lane adds the same
values in the same order as the scalar code, so results are bit-identical to it. Measured here on
the feature bins of a 65,536 × 20 block: 3.0 → 1.8 ms (min of 40).
"""

from __future__ import annotations

from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic


@intrinsic
def add4(typingctx, table, k, v0, v1, v2, v3):
    """table[k, 0:4] += (v0, v1, v2, v3): table a C-contiguous 2-D float64 array with at least 4
    columns, 0 ≤ k < its rows (not checked: the caller's index must be in range)."""
    if not (isinstance(table, types.Array) and table.ndim == 2 and table.layout == "C"
            and table.dtype == types.float64):
        return None
    sig = types.void(table, k, v0, v1, v2, v3)

    def codegen(context, builder, signature, args):
        aryty = signature.args[0]
        ary = context.make_array(aryty)(context, builder, args[0])
        row = context.cast(builder, args[1], signature.args[1], types.intp)
        zero = context.get_constant(types.intp, 0)
        ptr = cgutils.get_item_pointer(context, builder, aryty, ary, [row, zero], wraparound=False)
        vt = ir.VectorType(ir.DoubleType(), 4)
        vec = ir.Constant(vt, ir.Undefined)
        for lane, (a, t) in enumerate(zip(args[2:], signature.args[2:])):
            vec = builder.insert_element(vec, context.cast(builder, a, t, types.float64),
                                         ir.Constant(ir.IntType(32), lane))
        vp = builder.bitcast(ptr, vt.as_pointer())
        builder.store(builder.fadd(builder.load(vp, align=8), vec), vp, align=8)
        return context.get_dummy_value()

    return sig, codegen
