"""A software prefetch for numba kernels: a hint that an array element will soon be read.

In: a 3-D array and an index (i, j, k). Out: nothing; the CPU starts loading the
element's cache line and goes on (llvm.prefetch: read, keep in all cache levels).
The cell walk knows a segment's cells before it reads them, so it asks for the
cube's lines a few cells ahead and their latency overlaps the work in between
(common practice, no source).
"""

from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic


@intrinsic
def prefetch(typingctx, array, i, j, k):
    if not (isinstance(array, types.Array) and array.ndim == 3):
        return None
    signature = types.void(array, i, j, k)

    def codegen(context, builder, signature, args):
        array_type = signature.args[0]
        view = context.make_array(array_type)(context, builder, args[0])
        indices = [context.cast(builder, value, kind, types.intp) for value, kind in zip(args[1:], signature.args[1:])]
        pointer = cgutils.get_item_pointer(context, builder, array_type, view, indices, wraparound=False)
        byte_pointer = builder.bitcast(pointer, ir.IntType(8).as_pointer())
        i32 = ir.IntType(32)
        function_type = ir.FunctionType(ir.VoidType(), [byte_pointer.type, i32, i32, i32])
        function = builder.module.declare_intrinsic("llvm.prefetch", [byte_pointer.type], function_type)
        # (address, read = 0, locality = 3: keep in every level, data cache = 1)
        builder.call(function, [byte_pointer, i32(0), i32(3), i32(1)])
        return context.get_dummy_value()

    return signature, codegen
