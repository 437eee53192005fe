"""slicefind.discovery.neighbours: the faiss index used to place rows, checked against brute force."""
import subprocess
import sys

import numpy as np
import pytest

from slicefind.discovery.neighbours import EXACT_BELOW, NeighbourIndex, _own_loops


def _brute(points, query, k):
    """k nearest by float64 brute force (numpy), ties broken by index."""
    d2 = ((query[:, None, :].astype(np.float64) - points[None, :, :]) ** 2).sum(axis=2)
    idx = np.argsort(d2, axis=1, kind="stable")[:, :k]
    return np.sqrt(np.take_along_axis(d2, idx, axis=1)), idx


def test_exact_search_matches_brute_force():
    rng = np.random.default_rng(0)
    points = rng.normal(size=(500, 12)).astype(np.float32)
    query = rng.normal(size=(300, 12)).astype(np.float32)      # >= 20 queries: faiss's BLAS branch
    dist, idx = NeighbourIndex(points, 7, placing="exact").kneighbors(query)
    ref_dist, ref_idx = _brute(points, query, 7)
    assert np.array_equal(idx, ref_idx)
    np.testing.assert_allclose(dist, ref_dist, rtol=1e-5)


def test_inverted_file_finds_most_true_neighbours():
    """The approximate index (faiss IVF, 8 of the cells read) against brute force."""
    rng = np.random.default_rng(1)
    centres = rng.normal(scale=4.0, size=(30, 8))
    points = (centres[rng.integers(0, 30, 6000)] + rng.normal(size=(6000, 8))).astype(np.float32)
    query = (centres[rng.integers(0, 30, 400)] + rng.normal(size=(400, 8))).astype(np.float32)
    assert points.shape[0] >= EXACT_BELOW
    _, idx = NeighbourIndex(points, 10).kneighbors(query)
    _, ref_idx = _brute(points, query, 10)
    recall = np.mean([len(set(a) & set(b)) / 10 for a, b in zip(idx, ref_idx)])
    assert recall > 0.9


def test_searches_bypass_blas_and_restore_the_setting():
    """Which BLAS a process calls depends on import order, and its rounding reordered
    near-tied neighbours between processes; the searches use faiss's own loops."""
    import faiss

    before = faiss.cvar.distance_compute_blas_threshold
    with _own_loops():
        assert faiss.cvar.distance_compute_blas_threshold > 10**9
    assert faiss.cvar.distance_compute_blas_threshold == before


_ORDER_SCRIPT = """
import sys, hashlib
for name in sys.argv[1].split(","):
    __import__(name)
import numpy as np
from slicefind.discovery.clusters import _knn
rng = np.random.default_rng(5)
z = np.round(rng.normal(size=(3000, 6)), 1)          # many exactly tied distances
idx, dist = _knn(z, 15)
print(hashlib.sha1(idx.tobytes() + dist.tobytes()).hexdigest())
"""


def test_knn_graph_is_the_same_whatever_was_imported_first():
    outs = set()
    for first in ("faiss", "scipy.linalg,sklearn.decomposition", "numba,pyarrow"):
        pytest.importorskip(first.split(",")[-1])
        done = subprocess.run([sys.executable, "-c", _ORDER_SCRIPT, first], capture_output=True,
                              text=True, timeout=300)
        assert done.returncode == 0, done.stderr[-2000:]
        outs.add(done.stdout.strip())
    assert len(outs) == 1
