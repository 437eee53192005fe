"""Packed bitsets over rows: pack, AND, popcount, and the fused counting kernel.

A bitset holds one bit per row in little-endian uint64 words (row ``i`` is bit
``i % 64`` of word ``i // 64``); padding bits past the last row are zero, so a
popcount is a row count. The counting kernel takes *prefixes* (rules already
known to be frequent) and, for each, a list of *extension* items, and returns
``popcount(AND(prefix items) & extension)`` for every pair. Two engines compute
it: a numba kernel that fuses AND and popcount in one pass over the words
(compiled once, cached on disk, threads over prefixes) and plain numpy. Both give
the same integers; tests check them against each other and against numpy counts.
"""
from __future__ import annotations

import numpy as np

from slicefind.compiled import numba_kernels

__all__ = [
    "WORD_BITS",
    "n_words",
    "pack",
    "unpack",
    "popcount",
    "to_rows",
    "count_extensions",
    "NUMBA_MIN_WORDS",
]

WORD_BITS = 64
#: below this many words of work (candidates x words per bitset) the numpy kernel is
#: used: numba's import and cache load (~0.5 s) cost more than they save
NUMBA_MIN_WORDS = 1 << 24


def n_words(n_rows: int) -> int:
    """Words needed for `n_rows` bits."""
    return (n_rows + WORD_BITS - 1) // WORD_BITS


def pack(masks: np.ndarray) -> np.ndarray:
    """Pack boolean masks (n,) or (m, n) into uint64 words (1, W) or (m, W).

    Examples
    --------
    >>> bits = pack(np.array([True, False, True] + [False] * 64 + [True]))
    >>> bits.shape, int(popcount(bits)[0])
    ((1, 2), 3)
    """
    masks = np.atleast_2d(np.asarray(masks, dtype=bool))
    m, n = masks.shape
    width = n_words(n) * WORD_BITS
    if width != n:
        padded = np.zeros((m, width), dtype=bool)
        padded[:, :n] = masks
        masks = padded
    packed = np.packbits(masks, axis=1, bitorder="little")
    return np.ascontiguousarray(packed).view("<u8").astype(np.uint64, copy=False)


def unpack(bits: np.ndarray, n_rows: int) -> np.ndarray:
    """Boolean masks (m, n_rows) from packed words (m, W)."""
    bits = np.atleast_2d(bits)
    as_bytes = np.ascontiguousarray(bits.astype("<u8", copy=False)).view(np.uint8)
    return np.unpackbits(as_bytes, axis=1, count=n_rows, bitorder="little").astype(bool)


def popcount(bits: np.ndarray) -> np.ndarray:
    """Number of set bits of each bitset (int64 per row of `bits`)."""
    return np.bitwise_count(np.atleast_2d(bits)).sum(axis=1, dtype=np.int64)


def to_rows(bits: np.ndarray, n_rows: int) -> np.ndarray:
    """Sorted positions of the set bits of one bitset."""
    return np.flatnonzero(unpack(bits, n_rows)[0]).astype(np.intp)


def _count_numpy(bits, prefixes, offsets, extensions):
    """numpy engine: one AND per prefix, then one batched AND+popcount per prefix."""
    counts = np.empty(extensions.size, dtype=np.int64)
    for p in range(prefixes.shape[0]):
        lo, hi = offsets[p], offsets[p + 1]
        if lo == hi:
            continue
        base = bits[prefixes[p, 0]]
        for j in range(1, prefixes.shape[1]):
            base = base & bits[prefixes[p, j]]
        ext = extensions[lo:hi]
        # chunk so the temporary stays near a few MB whatever the table size
        step = max(1, (1 << 19) // max(1, bits.shape[1]))
        for s in range(0, ext.size, step):
            block = bits[ext[s:s + step]] & base
            counts[lo + s:lo + s + block.shape[0]] = np.bitwise_count(block).sum(axis=1, dtype=np.int64)
    return counts


def count_extensions(bits: np.ndarray, prefixes: np.ndarray, offsets: np.ndarray,
                     extensions: np.ndarray, *, engine: str = "auto") -> np.ndarray:
    """Popcounts of ``AND(bits[prefix]) & bits[extension]`` for every (prefix, extension).

    Parameters
    ----------
    bits : (m, W) uint64 array
        Packed item bitsets.
    prefixes : (P, L) int array
        Item indices of each prefix (L >= 1).
    offsets : (P + 1,) int array
        Extensions of prefix ``p`` are ``extensions[offsets[p]:offsets[p+1]]``.
    extensions : (E,) int array
        Item indices.
    engine : {"auto", "numba", "numpy"}, default="auto"
        "auto" uses numba when the work (extensions x words) is at least `NUMBA_MIN_WORDS`.

    Returns
    -------
    counts : (E,) int64 array

    Examples
    --------
    >>> bits = pack(np.array([[1, 1, 0, 1], [1, 0, 1, 1], [0, 1, 1, 1]], dtype=bool))
    >>> count_extensions(bits, np.array([[0]]), np.array([0, 2]), np.array([1, 2])).tolist()
    [2, 2]
    """
    bits = np.ascontiguousarray(bits, dtype=np.uint64)
    prefixes = np.ascontiguousarray(prefixes, dtype=np.int64).reshape(len(offsets) - 1, -1)
    offsets = np.ascontiguousarray(offsets, dtype=np.int64)
    extensions = np.ascontiguousarray(extensions, dtype=np.int64)
    if engine == "auto":
        engine = "numba" if extensions.size * bits.shape[1] >= NUMBA_MIN_WORDS else "numpy"
    if engine == "numpy" or extensions.size == 0:
        return _count_numpy(bits, prefixes, offsets, extensions)
    if engine != "numba":
        raise ValueError(f"engine must be 'auto', 'numba' or 'numpy'; got {engine!r}.")
    counts = np.zeros(extensions.size, dtype=np.int64)
    numba_kernels().count_extensions(bits, prefixes, offsets, extensions, counts)
    return counts
