"""Rows placed by the embedding clusters, shared by the in-memory and the Dask engines.

`row_hashes` finds identical embedding rows (both engines collapse them before fitting);
`Placed` holds where a batch of rows landed: the tree node per cluster kind, the layout and
the map coordinates.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping

import numpy as np

from slicefind.compiled import numba_kernels

__all__ = ["row_hashes", "Placed", "HASH_BLOCK"]

#: rows hashed (or compared) per block
HASH_BLOCK = 20_000


def row_hashes(x: np.ndarray) -> np.ndarray:
    """A 64-bit hash of each row's bytes: every word xor-folded (so float32 values held as
    float64, whose low 29 bits are zero, still spread), times an odd constant per column,
    summed modulo 2**64. Equal rows hash equal; unequal ones rarely do. A numba kernel
    (`slicefind._kernels.row_hashes`) from 100,000 values on, numpy below."""
    n, d = x.shape
    mult = np.random.default_rng(12345).integers(1, 2**62, d, dtype=np.uint64) | np.uint64(1)
    unsigned = np.dtype(f"u{x.dtype.itemsize}")
    hashes = np.empty(n, dtype=np.uint64)
    if n * d >= 100_000 and x.dtype.itemsize in (4, 8):
        kernels = numba_kernels()
        for lo in range(0, n, 16 * HASH_BLOCK):
            words = np.ascontiguousarray(x[lo:lo + 16 * HASH_BLOCK]).view(unsigned)
            kernels.row_hashes(words, mult, hashes[lo:lo + 16 * HASH_BLOCK])
        return hashes
    with np.errstate(over="ignore"):
        for lo in range(0, n, HASH_BLOCK):
            words = np.ascontiguousarray(x[lo:lo + HASH_BLOCK]).view(unsigned).astype(np.uint64)
            words ^= words >> np.uint64(29)
            words ^= words << np.uint64(17)
            hashes[lo:lo + HASH_BLOCK] = (words * mult).sum(axis=1, dtype=np.uint64)
    return hashes


@dataclass(frozen=True, repr=False)
class Placed:
    """Where some rows landed: a label per row for each key ("region", "error_mode"), the
    layout coordinates and the map coordinates (None without a map)."""

    labels: Mapping[str, np.ndarray]
    coords: np.ndarray
    map_xy: np.ndarray | None

    @classmethod
    def empty(cls, like: "Placed", n: int) -> "Placed":
        """Room for `n` rows, with the keys and widths of `like`."""
        return cls({k: np.empty(n, dtype=np.int64) for k in like.labels},
                   np.empty((n, like.coords.shape[1]), dtype=np.float32),
                   None if like.map_xy is None else np.empty((n, 2), dtype=np.float32))

    @classmethod
    def concat(cls, parts: list["Placed"]) -> "Placed":
        first = parts[0]
        return cls({k: np.concatenate([p.labels[k] for p in parts]) for k in first.labels},
                   np.concatenate([p.coords for p in parts]),
                   None if first.map_xy is None else np.concatenate([p.map_xy for p in parts]))

    def take(self, rows) -> "Placed":
        return Placed({k: v[rows] for k, v in self.labels.items()}, self.coords[rows],
                      None if self.map_xy is None else self.map_xy[rows])

    def put(self, rows, other: "Placed") -> None:
        """Write `other`'s rows at `rows` (an index array or a slice)."""
        for k, v in other.labels.items():
            self.labels[k][rows] = v
        self.coords[rows] = other.coords
        if self.map_xy is not None:
            self.map_xy[rows] = other.map_xy
