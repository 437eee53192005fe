"""numba kernels: bitset counting, hypergeometric tails, embedding row hashes.

Imported only when a large table is mined, many tails are summed, or embeddings are
clustered.

Kept apart so that ``import slicefind`` never imports numba, and defined at module
level so numba can cache the compiled code on disk (``cache=True``).
"""
import numba
import numpy as np
from numba import types
from numba.extending import intrinsic

__all__ = ["count_extensions", "hypergeom_tails", "row_hashes"]

_BLOCK = 2048  # words per block: one block of every item bitset (16 KB each) stays in L2/L3


@intrinsic
def _popcount(typingctx, x):
    """LLVM's ctpop on a uint64: one popcnt (or vpopcntq once vectorised) where the CPU has it."""
    sig = types.uint64(types.uint64)

    def codegen(context, builder, signature, args):
        return builder.ctpop(args[0])

    return sig, codegen


@numba.njit(parallel=True, cache=True, nogil=True)
def count_extensions(bits, prefixes, offsets, extensions, counts):
    """counts[e] += popcount(AND(bits[prefixes[p]]) & bits[extensions[e]]) for e in prefix p's range.

    Cache-blocked: the outer loop walks blocks of words, so each block of the item
    bitsets is read from memory once and reused by every candidate; threads split the
    prefixes within a block. `counts` must start at zero.
    """
    n_prefix, width = prefixes.shape
    n_w = bits.shape[1]
    for start in range(0, n_w, _BLOCK):
        stop = min(start + _BLOCK, n_w)
        for p in numba.prange(n_prefix):
            lo = offsets[p]
            hi = offsets[p + 1]
            if lo == hi:
                continue
            base = bits[prefixes[p, 0], start:stop].copy()
            for j in range(1, width):
                base &= bits[prefixes[p, j], start:stop]
            for e in range(lo, hi):
                row = bits[extensions[e], start:stop]
                total = 0
                for w in range(stop - start):
                    total += _popcount(base[w] & row[w])
                counts[e] += total


@numba.njit(cache=True, nogil=True)      # serial: a parallel kernel costs ~0.3 s to load from cache
def hypergeom_tails(x0, step, N, K, n, limit, first, out):
    """out[i] = sum of hypergeometric pmf terms from x0[i] towards `limit[i]` (step +1 or -1).

    `first[i]` is pmf(x0[i]); later terms follow from the ratio recursion and the sum
    stops once a term adds less than 1e-17 of it (see `stats._hypergeom_sf`).
    """
    for i in range(x0.size):
        x = x0[i]
        term = first[i]
        total = term
        while term > total * 1e-17:
            if step[i] > 0:
                if x + 1.0 > limit[i]:
                    break
                term *= (K[i] - x) * (n[i] - x) / ((x + 1.0) * (N[i] - K[i] - n[i] + x + 1.0))
                x += 1.0
            else:
                if x - 1.0 < limit[i]:
                    break
                term *= x * (N[i] - K[i] - n[i] + x) / ((K[i] - x + 1.0) * (n[i] - x + 1.0))
                x -= 1.0
            total += term
        out[i] = total


@numba.njit(parallel=True, cache=True, nogil=True)
def row_hashes(words, mult, out):
    """out[i] = sum_j mix(words[i, j]) * mult[j] (mod 2**64), mix(w) = w ^ (w >> 29), then
    ^ (w << 17): the hash of `clusters.row_hashes`, one pass over the rows."""
    n, d = words.shape
    for i in numba.prange(n):
        h = np.uint64(0)
        for j in range(d):
            w = np.uint64(words[i, j])
            w ^= w >> np.uint64(29)
            w ^= w << np.uint64(17)
            h += w * mult[j]
        out[i] = h
