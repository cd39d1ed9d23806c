"""Compilation settings shared by the compiled (numba) kernels.

``cache=True`` keeps the machine code on disk (next to the sources, or in numba's user cache
when that is not writable), so only the first run after installing or changing a kernel
compiles. Floating point may be reassociated and contracted (vectorised sums, fused
multiply-add) but without assuming finite values, so the NaN and infinity checks stay.
"""

JIT = dict(cache=True, nogil=True, fastmath={"reassoc", "contract", "nsz", "arcp"},
           error_model="numpy")
