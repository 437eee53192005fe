"""numba kernels for `bitset` (imported only when a large table is mined).

Kept apart so that ``import slicefind`` never imports numba, and defined at module
level so numba can cache the compiled code on disk (``cache=True``).
"""
import numba
import numpy as np

__all__ = ["count_extensions"]

_M1 = np.uint64(0x5555555555555555)
_M2 = np.uint64(0x3333333333333333)
_M4 = np.uint64(0x0F0F0F0F0F0F0F0F)
_H01 = np.uint64(0x0101010101010101)
_BLOCK = 1024  # words per block: the prefix block (8 KB) and each extension's block stay in cache


@numba.njit(inline="always", cache=True)
def _pop(x):
    """Set bits of one uint64 (SWAR; LLVM lowers it to popcnt where the CPU has it)."""
    x = x - ((x >> np.uint64(1)) & _M1)
    x = (x & _M2) + ((x >> np.uint64(2)) & _M2)
    x = (x + (x >> np.uint64(4))) & _M4
    return (x * _H01) >> np.uint64(56)


@numba.njit(parallel=True, cache=True, nogil=True)
def count_extensions(bits, prefixes, offsets, extensions, counts):
    """counts[e] = popcount(AND(bits[prefixes[p]]) & bits[extensions[e]]) for e in prefix p's range."""
    n_prefix, width = prefixes.shape
    n_w = bits.shape[1]
    for p in numba.prange(n_prefix):
        lo = offsets[p]
        hi = offsets[p + 1]
        if lo == hi:
            continue
        base = np.empty(_BLOCK, dtype=np.uint64)
        for e in range(lo, hi):
            counts[e] = 0
        for start in range(0, n_w, _BLOCK):
            size = min(_BLOCK, n_w - start)
            row0 = bits[prefixes[p, 0]]
            for w in range(size):
                base[w] = row0[start + w]
            for j in range(1, width):
                row = bits[prefixes[p, j]]
                for w in range(size):
                    base[w] &= row[start + w]
            for e in range(lo, hi):
                row = bits[extensions[e]]
                total = np.uint64(0)
                for w in range(size):
                    total += _pop(base[w] & row[start + w])
                counts[e] += np.int64(total)
