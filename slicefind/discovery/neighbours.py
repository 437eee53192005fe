"""Nearest neighbours for placing rows: an inverted-file index (faiss) or an exact search.

Placing the rows outside the fit sample is a k-nearest-neighbour query of every row
against the fitted rows in the PCA space (at most 50 dimensions). An exact search reads
every fitted row for every query: at 1M rows against a 20,000-row fit that was 48-52 s
of a 72 s scan on two cores. faiss's inverted-file index (``IndexIVFFlat``; Jégou, Douze
& Schmid 2011, section 3.1) splits the fitted rows into cells around `n_cells` centroids
and reads only the `N_PROBE` cells nearest a query, about 6% of the rows.

The centroids come from a seeded k-means run on one thread, every row is filed under its
exact nearest centroid, and each query is answered on its own, so the same fit always
gives the same neighbours, in memory and on any Dask partition.
`benchmarks/bench_discovery.py placing` measures the agreement of the placed labels
with the exact search.

faiss computes the distances of 20 or more queries at once with a BLAS matrix product,
and which BLAS library a process calls depends on what it imported first (numpy's,
scipy's or faiss's own); their float32 rounding differs, which reordered near-tied
neighbours and changed the clusters between two processes given the same seed (a Dask
driver that had not imported faiss before the bitset kernels, against the in-memory
engine). Every search here runs faiss's own distance loops instead (`_own_loops`), the
same in every process: 0.8 s more for the exact 20,000-row kNN graph, about 0.1 s more
per 200,000 placed rows.
"""
from __future__ import annotations

import contextlib

import numpy as np

__all__ = ["NeighbourIndex", "PLACINGS"]

#: ways of finding neighbours: "approximate" (inverted file) or "exact"
PLACINGS = ("approximate", "exact")
#: below this many fitted rows the exact search is as fast, and it is used
EXACT_BELOW = 4_000
#: fitted rows per cell of the inverted file
ROWS_PER_CELL = 100
#: cells read per query
N_PROBE = 8


#: faiss uses BLAS from this many queries on; raised above any batch by `_own_loops`
_NO_BLAS = 2**31 - 1


@contextlib.contextmanager
def _own_loops():
    """faiss's own distance loops instead of a BLAS product for the searches inside, so
    the neighbours do not depend on which BLAS library the process loaded first."""
    import faiss

    before = faiss.cvar.distance_compute_blas_threshold
    faiss.cvar.distance_compute_blas_threshold = _NO_BLAS
    try:
        yield
    finally:
        faiss.cvar.distance_compute_blas_threshold = before


class NeighbourIndex:
    """k nearest neighbours among `points`, answering ``kneighbors(query)`` like
    scikit-learn's ``NearestNeighbors``: (Euclidean distances, indices), each (m, k),
    nearest first.

    Parameters
    ----------
    points : (n, d) float array
        The rows to search (the fitted rows' PCA coordinates).
    n_neighbors : int
        k; at most n.
    placing : {"approximate", "exact"}, default="approximate"
        The inverted file (faiss ``IndexIVFFlat``) or an exact search (faiss
        ``IndexFlatL2``); below `EXACT_BELOW` points the search is always exact.

    References
    ----------
    .. [1] H. Jégou, M. Douze and C. Schmid, "Product quantization for nearest neighbor
           search", IEEE Trans. PAMI 33 (2011) 117-128, section 3.1 (the inverted file).
    .. [2] J. Johnson, M. Douze and H. Jégou, "Billion-scale similarity search with GPUs",
           IEEE Trans. Big Data 7 (2021) 535-547 (the faiss library).

    Examples
    --------
    >>> pts = np.array([[0.0, 0.0], [1.0, 0.0], [5.0, 5.0]])
    >>> dist, idx = NeighbourIndex(pts, 2).kneighbors(np.array([[0.9, 0.1]]))
    >>> idx.tolist(), [round(float(v), 4) for v in dist[0]]
    ([[1, 0]], [0.1414, 0.9055])
    """

    def __init__(self, points: np.ndarray, n_neighbors: int, *, placing: str = "approximate"):
        import faiss

        x = np.ascontiguousarray(points, dtype=np.float32)
        n, d = x.shape
        self.k = int(min(n_neighbors, n))
        with _own_loops():
            if placing == "exact" or n < EXACT_BELOW:
                self.index = faiss.IndexFlatL2(d)
            else:
                n_cells = max(16, n // ROWS_PER_CELL)
                self._quantizer = faiss.IndexFlatL2(d)      # the index does not own it: keep it
                self._quantizer.add(_centroids(x, n_cells))
                self.index = faiss.IndexIVFFlat(self._quantizer, d, n_cells)
                self.index.train(x)         # a quantizer holding n_cells points is not retrained
                self.index.nprobe = min(N_PROBE, n_cells)
            self.index.add(x)
        self.points = x

    def kneighbors(self, query: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        import faiss

        q = np.ascontiguousarray(query, dtype=np.float32)
        with _own_loops():
            squared, idx = self.index.search(q, self.k)
            # a query whose probed cells hold fewer than k rows gets -1s: search it exactly
            short = np.flatnonzero((idx < 0).any(axis=1))
            if short.size:
                flat = faiss.IndexFlatL2(q.shape[1])
                flat.add(self.points)
                squared[short], idx[short] = flat.search(q[short], self.k)
        return np.sqrt(np.maximum(squared, 0.0)).astype(np.float64), idx.astype(np.int64)


def _centroids(x: np.ndarray, n_cells: int) -> np.ndarray:
    """Cell centres: faiss's k-means (10 iterations, seed 0) run on one thread, so that the
    centres, and the cells, do not depend on how its sums are split between threads.
    k-means cells are even where a random draw of rows is not (largest cell 242 rows
    against 469 at 200 cells of 20,000 depot rows), so fewer rows are read per query."""
    import faiss

    threads = faiss.omp_get_max_threads()
    faiss.omp_set_num_threads(1)
    try:
        kmeans = faiss.Kmeans(x.shape[1], n_cells, niter=10, seed=0, verbose=False)
        with _own_loops():
            kmeans.train(x)
    finally:
        faiss.omp_set_num_threads(threads)
    return np.ascontiguousarray(kmeans.centroids, dtype=np.float32)
