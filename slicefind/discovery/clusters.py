"""Embedding clusters: regions and error modes (PCA, UMAP, HDBSCAN), as slices.

The reduction runs in four steps, each chosen so that a seeded run is reproducible and
does not pay numba's compile cost on every call:

1. optional L2 normalisation (``metric="cosine"``), then PCA to at most `PCA_DIMS` dims;
2. an *exact* k-nearest-neighbour graph (scikit-learn, brute force) and UMAP's fuzzy
   graph computed from it here in numpy (UMAP, McInnes et al. 2018, section 3) -- no
   approximate neighbour search and no per-process compile of it;
3. UMAP's layout optimisation (umap-learn's ``simplicial_set_embedding``, spectral
   start) to `CLUSTER_DIMS` dims for clustering and to 2 dims for the map; with an
   integer ``random_state`` the layout runs single-threaded and is reproducible, and
   its compiled code is kept in numba's disk cache between processes;
4. HDBSCAN (the ``hdbscan`` package) over all rows (*regions*) and over error rows only
   (*error modes*, then extended to the nearby rows by nearest neighbours with a
   distance cut-off).

Exact duplicate embedding rows are collapsed first and every result is mapped back to
each copy. Above ``sample_above`` distinct rows (default 20,000) the reduction and
clustering are fitted on a sample (every error up to a cap, plus random correct rows) and
the other rows are placed by a majority vote of their nearest fitted rows in the PCA space
(found with faiss's inverted-file index, `slicefind.discovery.neighbours`).
"""
from __future__ import annotations

import importlib.util
import inspect
import os
import time
import warnings
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np

from slicefind.compiled import cache_dir
from slicefind.discovery.describe import describe_rows
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.discovery.hierarchy import (ROOT, Tree, condensed_tree, single_node, subtree_rows,
                                           tree_vote)
from slicefind.discovery.items import build_items
from slicefind.discovery.neighbours import NeighbourIndex, PLACINGS
from slicefind.discovery.placing import HASH_BLOCK, Placed, row_hashes
from slicefind.discovery.records import Slice, default_min_rows
from slicefind.discovery.table import EvalTable

__all__ = [
    "ClusterResult",
    "DisconnectedGraphWarning",
    "cluster_slices",
    "noise_as_singletons",
    "NOISE",
    "STRATEGIES",
    "METRICS",
    "INITS",
]

#: label of rows HDBSCAN leaves out of every cluster
NOISE = -1
STRATEGIES = ("both", "regions", "error_modes")
METRICS = ("cosine", "euclidean")
#: PCA keeps at most this many dimensions before the neighbour graph
PCA_DIMS = 50
#: dimensions of the UMAP layout that HDBSCAN clusters
CLUSTER_DIMS = 8
#: rows per block when a step runs over all rows (PCA transform, assignment)
#: warn when graph pieces smaller than a region hold at least this share of the fitted rows
FRAGMENT_WARN_SHARE = 0.01
#: the timed steps of `cluster_slices`, in order (keys of ``diagnostics["timings"]``)
_STEPS = ("distinct", "pca", "knn_graph", "layout", "map", "hdbscan_regions",
          "hdbscan_error_modes", "assign", "describe")
#: smallest distinct-row count worth clustering
MIN_ROWS_TO_CLUSTER = 50


class DisconnectedGraphWarning(UserWarning):
    """The nearest-neighbour graph of the embeddings falls apart into many small pieces.

    A few large pieces (well-separated clusters) are recorded in the diagnostics
    (``n_graph_components``) without a warning; pieces too small to be a region, holding
    at least `FRAGMENT_WARN_SHARE` of the rows, are what near-copies of few originals
    produce, and they are warned about."""


@dataclass(frozen=True, repr=False)
class ClusterResult:
    """Regions and error modes found in the embeddings, with the 2-D map.

    Attributes
    ----------
    slices : tuple of Slice
        One per node of each cluster hierarchy but its root (``source`` "region" or
        "error_mode"), rows among the analysed rows.
    labels : dict
        Strategy ("region", "error_mode") -> HDBSCAN's flat cluster per analysed row;
        `NOISE` (-1) for rows in no cluster.
    map_xy : (n_rows, 2) float32 array or None
        UMAP map of every analysed row, for figures.
    coords : (n_rows, CLUSTER_DIMS) float32 array
        The reduced space the clusters were found in (medoids and exemplars use it).
    diagnostics : dict
        ``n_rows, n_distinct, n_fit, sampled, n_graph_components, connected,
        largest_component_share, fragment_share, noise_share`` (per strategy), ``n_clusters`` (per
        strategy), ``min_cluster_size`` (per strategy), ``seeded`` and ``timings`` (seconds
        per step).
    params : dict
        The options used.
    nodes : dict
        Strategy -> the deepest node of its hierarchy holding each analysed row
        (`slicefind.discovery.hierarchy.ROOT`, 0, when no cluster holds it).
    trees : dict
        Strategy -> its hierarchy (`slicefind.discovery.hierarchy.Tree`).
    """

    slices: tuple[Slice, ...]
    labels: Mapping[str, np.ndarray]
    map_xy: np.ndarray | None
    coords: np.ndarray | None
    diagnostics: Mapping[str, Any] = field(default_factory=dict)
    params: Mapping[str, Any] = field(default_factory=dict)
    nodes: Mapping[str, np.ndarray] = field(default_factory=dict)
    trees: Mapping[str, Tree] = field(default_factory=dict)

    def __repr__(self):
        counts = ", ".join(f"{k}={int(v.max(initial=NOISE)) + 1}" for k, v in self.labels.items())
        return f"ClusterResult(n_slices={len(self.slices)}, {counts})"


def _require(module: str, *, package: str, needed_for: str) -> None:
    """Fail early, with the install command, when an optional package is missing."""
    if importlib.util.find_spec(module) is None:
        msg = f"{needed_for} needs {package}: pip install {package}"
        raise ImportError(msg)


def _stacklevel() -> int:
    """`warnings.warn` stack level, from the function calling this one, of the first frame
    outside slicefind, so that a warning points at the user's call."""
    here = os.path.dirname(os.path.abspath(__file__))
    level = 1
    for frame in inspect.stack()[2:]:
        level += 1
        if not os.path.abspath(frame.filename).startswith(here + os.sep):
            break
    return level


def noise_as_singletons(labels) -> np.ndarray:
    """Labels with every `NOISE` row put in a cluster of its own (for agreement scores).

    slicefind's noise convention: a row HDBSCAN calls noise agrees with no other row, so
    scores such as the adjusted Rand index neither reward nor punish two noise rows for
    sharing the noise label.

    Examples
    --------
    >>> noise_as_singletons([0, 0, -1, 1, -1]).tolist()
    [0, 0, 2, 1, 3]
    """
    out = np.asarray(labels, dtype=np.int64).copy()
    noise = out == NOISE
    start = int(out.max(initial=NOISE)) + 1
    out[noise] = start + np.arange(int(noise.sum()))
    return out


# ---------------------------------------------------------------- reduction steps

def _distinct(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(first row of each distinct vector, in row order; inverse) of the rows of `x`.

    Rows are grouped by `row_hashes`; a row is compared with its group's first row only
    when the hash is shared, and hash groups holding unequal rows (collisions) are split
    exactly with numpy's unique on those rows alone, so memory stays small."""
    import pandas as pd

    n = x.shape[0]
    codes, _ = pd.factorize(row_hashes(x), sort=False)
    first = np.full(int(codes.max()) + 1, n, dtype=np.int64)
    np.minimum.at(first, codes, np.arange(n))
    shared = np.flatnonzero(first[codes] != np.arange(n))
    same = np.ones(shared.size, dtype=bool)
    for lo in range(0, shared.size, HASH_BLOCK):
        rows = shared[lo:lo + HASH_BLOCK]
        same[lo:lo + HASH_BLOCK] = np.all(x[rows] == x[first[codes[rows]]], axis=1)
    if not same.all():                                   # hash collisions: split those groups
        members = np.flatnonzero(np.isin(codes, np.unique(codes[shared[~same]])))
        _, exact = np.unique(x[members], axis=0, return_inverse=True)
        codes = codes.astype(np.int64)
        codes[members] = codes.max() + 1 + exact.ravel()
        codes, _ = pd.factorize(codes, sort=False)       # renumber in order of first appearance
        first = np.full(int(codes.max()) + 1, n, dtype=np.int64)
        np.minimum.at(first, codes, np.arange(n))
    return first.astype(np.intp), codes.astype(np.intp)


def _normalise(x: np.ndarray) -> np.ndarray:
    """Rows scaled to unit L2 norm (zero rows stay zero)."""
    norms = np.linalg.norm(x, axis=1, keepdims=True)
    return x / np.where(norms > 0, norms, 1.0)


def _pca_axes(fit: np.ndarray, n_dims: int, metric: str) -> tuple[np.ndarray, np.ndarray]:
    """(mean, axes) of the top principal axes of the rows `fit`: the eigen-decomposition of
    their covariance matrix (deterministic: no random start; each axis's sign fixed so
    that its largest loading is positive). Data with at most n_dims columns is only
    rotated, so the leading columns are always the leading principal coordinates."""
    fit = np.asarray(fit, dtype=np.float64)
    if metric == "cosine":
        fit = _normalise(fit)
    mean = fit.mean(axis=0)
    centred = fit - mean
    cov = centred.T @ centred / max(fit.shape[0] - 1, 1)
    values, vectors = np.linalg.eigh(cov)                 # ascending eigenvalues
    axes = vectors[:, ::-1][:, :min(n_dims, fit.shape[0])]
    signs = np.sign(axes[np.argmax(np.abs(axes), axis=0), np.arange(axes.shape[1])])
    return mean, axes * np.where(signs == 0, 1.0, signs)


def _project(x: np.ndarray, mean: np.ndarray, axes: np.ndarray, metric: str) -> np.ndarray:
    """float32 (len(x), n_axes) PCA coordinates of the rows of `x`, blockwise (no full
    float64 copy). (float32 arithmetic was 30% faster but let a row's last bit depend on
    the block it was projected in, and the engines must agree bit for bit.) Each row's coordinates depend on that row alone, so a row projects to
    the same value in memory and on any Dask partition."""
    out = np.empty((x.shape[0], axes.shape[1]), dtype=np.float32)
    for lo in range(0, x.shape[0], HASH_BLOCK):
        block = x[lo:lo + HASH_BLOCK]
        if metric == "cosine":
            block = _normalise(block)
        out[lo:lo + HASH_BLOCK] = (block - mean) @ axes
    return out


def _knn(z: np.ndarray, n_neighbors: int) -> tuple[np.ndarray, np.ndarray]:
    """Exact k nearest neighbours of every row of `z` among the others, with the row itself
    first (distance 0), as UMAP expects: (indices, distances), each (n, n_neighbors).
    faiss's exact search (``IndexFlatL2``), three times faster than scikit-learn's brute
    force at 20,000 rows here; a row is dropped from its own list wherever it appears."""
    n = z.shape[0]
    k = min(n_neighbors, n)
    dist, idx = NeighbourIndex(z, min(k + 1, n), placing="exact").kneighbors(z)
    own = idx == np.arange(n)[:, None]
    own[~own.any(axis=1), -1] = True            # itself not listed (ties at 0): drop the last
    others_idx = idx[~own].reshape(n, -1)[:, :k - 1]
    others_dist = dist[~own].reshape(n, -1)[:, :k - 1]
    idx = np.hstack([np.arange(n)[:, None], others_idx]).astype(np.int64)
    dist = np.hstack([np.zeros((n, 1)), others_dist]).astype(np.float32)
    return idx, dist


def _fuzzy_graph(idx: np.ndarray, dist: np.ndarray):
    """UMAP's fuzzy simplicial set (McInnes, Healy & Melville 2018, section 3.1) from an
    exact kNN graph: per-row rho (nearest non-zero distance) and sigma (binary search so
    that sum_j exp(-(d_ij - rho_i)/sigma_i) = log2(k)), then the fuzzy union
    ``W + W.T - W * W.T``. Returns a symmetric scipy COO matrix."""
    import scipy.sparse

    n, k = dist.shape
    d = dist.astype(np.float64)
    target = np.log2(k)
    positive = np.where(d > 0, d, np.inf)
    rho = positive.min(axis=1)
    rho[~np.isfinite(rho)] = 0.0
    gap = np.maximum(d[:, 1:] - rho[:, None], 0.0)
    lo = np.zeros(n)
    hi = np.full(n, np.inf)
    mid = np.ones(n)
    for _ in range(64):                         # umap-learn uses 64 bisection steps as well
        psum = np.exp(-gap / mid[:, None]).sum(axis=1)
        high = psum > target
        hi = np.where(high, mid, hi)
        lo = np.where(high, lo, mid)
        mid = np.where(np.isinf(hi), mid * 2.0, (lo + hi) / 2.0)
    sigma = mid
    # the same floor as umap-learn (MIN_K_DIST_SCALE = 1e-3 of the mean distance)
    floor = 1e-3 * np.where(rho > 0, d.mean(axis=1), d.mean())
    sigma = np.maximum(sigma, floor)
    weights = np.exp(-gap / sigma[:, None])
    rows = np.repeat(np.arange(n), k - 1)
    cols = idx[:, 1:].ravel()
    w = scipy.sparse.coo_matrix((weights.ravel().astype(np.float32), (rows, cols)), shape=(n, n)).tocsr()
    wt = w.T.tocsr()
    graph = (w + wt - w.multiply(wt)).tocoo()
    graph.eliminate_zeros()
    return graph


def _components(graph, small: int) -> tuple[int, float, float]:
    """(number of connected components, share of rows in the largest, share of rows in
    pieces of fewer than `small` rows) of a graph."""
    from scipy.sparse.csgraph import connected_components

    n_comp, comp = connected_components(graph, directed=False)
    sizes = np.bincount(comp)
    return int(n_comp), float(sizes.max() / comp.size), float(sizes[sizes < small].sum() / comp.size)


def _umap_layout(z: np.ndarray, graph, n_dims: int, seed: int | None, *, init: str,
                 n_epochs: int, progress: bool, what: str) -> np.ndarray:
    """UMAP layout of `graph` in `n_dims` dims. ``init="pca"`` starts from the leading
    principal coordinates (the first columns of `z`), ``"spectral"`` from UMAP's spectral
    embedding. An int seed runs the single-threaded, reproducible optimiser; None the
    parallel one."""
    os.environ.setdefault("NUMBA_CACHE_DIR", cache_dir())
    with warnings.catch_warnings():          # umap-learn's note on its optional TensorFlow part
        warnings.filterwarnings("ignore", message=".*[Tt]ensor[Ff]low.*")
        import umap.layouts
        from umap.umap_ import find_ab_params, simplicial_set_embedding

    _cache_umap_kernels(umap.layouts)
    a, b = find_ab_params(1.0, 0.1)              # umap-learn's defaults: spread=1, min_dist=0.1
    state = np.random.RandomState(seed)
    start = "spectral"
    if init == "pca":
        start = np.ascontiguousarray(z[:, :n_dims], dtype=np.float32)
        if start.shape[1] < n_dims:               # fewer data dims than layout dims
            pad = state.normal(0.0, 1e-4, (z.shape[0], n_dims - start.shape[1])).astype(np.float32)
            start = np.hstack([start, pad])
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*n_jobs.*")
        embedding, _ = simplicial_set_embedding(
            data=z, graph=graph.copy(), n_components=n_dims, initial_alpha=1.0, a=a, b=b,
            gamma=1.0, negative_sample_rate=5, n_epochs=n_epochs, init=start,
            random_state=state, metric="euclidean", metric_kwds={}, densmap=False,
            densmap_kwds={}, output_dens=False, parallel=seed is None, verbose=False,
            tqdm_kwds={"disable": not progress, "desc": f"UMAP {what}", "leave": False})
    return np.asarray(embedding, dtype=np.float32)


def _cache_umap_kernels(layouts) -> None:
    """Ask numba to keep umap-learn's layout kernels in its disk cache (they are compiled
    in every new process otherwise); a no-op where the dispatcher cannot cache."""
    for name in ("_nb_optimize_layout_euclidean_single_epoch",
                 "_nb_optimize_layout_euclidean_single_epoch_parallel"):
        dispatcher = getattr(layouts, name, None)
        enable = getattr(dispatcher, "enable_caching", None)
        if enable is not None and not getattr(dispatcher, "_slicefind_cached", False):
            try:
                enable()
                dispatcher._slicefind_cached = True
            except Exception:          # numba cannot cache this one: it just compiles
                pass


def _map(zf: np.ndarray, graph, map_size: int, n_neighbors: int, seed, rng, *, init: str,
         n_epochs: int, progress: bool) -> np.ndarray:
    """2-D UMAP map of the fitted rows: laid out on at most `map_size` of them (their own
    neighbour graph), the others placed at the distance-weighted mean of their nearest
    laid-out rows in the PCA space."""
    if zf.shape[0] <= map_size:
        return _umap_layout(zf, graph, 2, seed, init=init, n_epochs=n_epochs, progress=progress,
                            what="map (2-d)")
    core = np.sort(rng.choice(zf.shape[0], map_size, replace=False))
    idx, dist = _knn(zf[core], n_neighbors)
    core_xy = _umap_layout(zf[core], _fuzzy_graph(idx, dist), 2, seed, init=init,
                           n_epochs=n_epochs, progress=progress, what="map (2-d)")
    rest = np.setdiff1d(np.arange(zf.shape[0]), core, assume_unique=True)
    _, (rest_xy,) = _assign(zf, core, rest, [], [core_xy], n_neighbors, progress=False)
    out = np.empty((zf.shape[0], 2), dtype=np.float32)
    out[core], out[rest] = core_xy, rest_xy
    return out


def _hdbscan(points: np.ndarray, min_cluster_size: int, min_samples: int) -> tuple[np.ndarray, Tree]:
    """HDBSCAN's whole condensed tree over `points`: (deepest node of each point, Tree);
    the tree's ``flat`` holds HDBSCAN's own flat selection, renumbered by size."""
    import hdbscan

    if points.shape[0] < 2 * min_cluster_size:
        return np.full(points.shape[0], ROOT, dtype=np.int64), single_node()
    model = hdbscan.HDBSCAN(min_cluster_size=int(min_cluster_size), min_samples=int(min_samples),
                            core_dist_n_jobs=1)
    flat = _renumber(model.fit_predict(points.astype(np.float64)))
    return condensed_tree(model.condensed_tree_.to_numpy(), points.shape[0], flat)


def _renumber(labels: np.ndarray) -> np.ndarray:
    """Clusters renumbered 0, 1, ... by decreasing size (ties by first row); noise kept."""
    labels = np.asarray(labels, dtype=np.int64)
    found = np.unique(labels[labels != NOISE])
    if found.size == 0:
        return labels.copy()
    sizes = np.array([np.count_nonzero(labels == c) for c in found])
    firsts = np.array([np.flatnonzero(labels == c)[0] for c in found])
    order = np.lexsort((firsts, -sizes))
    new = np.full(int(found.max()) + 1, NOISE, dtype=np.int64)
    new[found[order]] = np.arange(found.size)
    out = np.where(labels == NOISE, NOISE, new[np.maximum(labels, 0)])
    return out


def _extend_modes(coords: np.ndarray, err: np.ndarray, modes: np.ndarray, tree: Tree,
                  n_vote: int) -> np.ndarray:
    """Extend the error-mode tree from the error points to every point.

    A point joins node m when the error points of m's subtree hold a strict majority of
    its `n_vote` nearest error points and its nearest member of m is no farther than m's
    cut-off: the 90th percentile, over m's members, of the distance to their
    `n_vote`-th nearest fellow member. It takes the deepest such node (`tree_vote`).
    Error points keep their own node. Assumes `modes` holds the deepest node of each
    error point."""
    from sklearn.neighbors import NearestNeighbors

    out = np.full(coords.shape[0], ROOT, dtype=np.int64)
    err_idx = np.flatnonzero(err)
    out[err_idx] = modes
    if tree.n_nodes == 1:
        return out
    cut = np.full(tree.n_nodes, np.inf)
    for m in range(1, tree.n_nodes):
        members = coords[err_idx[(modes >= m) & (modes < tree.end[m])]]
        k = min(n_vote, members.shape[0] - 1)
        d, _ = NearestNeighbors(n_neighbors=k + 1).fit(members).kneighbors(members)
        cut[m] = np.quantile(d[:, k], 0.9)
    others = np.flatnonzero(~err)
    if others.size == 0:
        return out
    k = min(n_vote, err_idx.size)
    nn = NearestNeighbors(n_neighbors=k).fit(coords[err_idx])
    for lo in range(0, others.size, HASH_BLOCK):
        block = others[lo:lo + HASH_BLOCK]
        d, j = nn.kneighbors(coords[block])
        out[block] = tree_vote(tree, modes[j], np.ones(j.shape), distances=d, cut=cut)
    return out


def _assign(z: np.ndarray, fit: np.ndarray, rest: np.ndarray, label_sets: list[tuple[np.ndarray, Tree]],
            coord_sets: list[np.ndarray], n_neighbors: int, progress: bool):
    """Give the `rest` rows, for each (fit-row node labels, tree) in `label_sets`, the deepest
    node their `n_neighbors` nearest fit rows (in the space `z`) vote for, and the
    distance-weighted mean of their coordinates in each of `coord_sets` (`_vote`)."""
    from tqdm.auto import tqdm

    nn = _neighbours(z[fit], n_neighbors)
    labels_out = [np.empty(rest.size, dtype=np.int64) for _ in label_sets]
    coords_out = [np.empty((rest.size, c.shape[1]), dtype=np.float32) for c in coord_sets]
    blocks = range(0, rest.size, HASH_BLOCK)
    for lo in tqdm(blocks, desc="assigning rows to clusters", disable=not progress, leave=False):
        labels, coords = _vote(nn, z[rest[lo:lo + HASH_BLOCK]], label_sets, coord_sets)
        for got, out in zip(labels + coords, labels_out + coords_out):
            out[lo:lo + got.shape[0]] = got
    return labels_out, coords_out


def _neighbours(points: np.ndarray, n_neighbors: int, placing: str = "approximate"):
    """A nearest-neighbour index over `points` (`slicefind.discovery.neighbours.NeighbourIndex`)."""
    return NeighbourIndex(points, n_neighbors, placing=placing)


def _vote(nn, query: np.ndarray, label_sets: list[tuple[np.ndarray, Tree]], coord_sets: list[np.ndarray]):
    """For each row of `query`: in each (node labels, tree) of `label_sets`, the deepest
    node that its nearest fit rows (`nn`) put a majority of their inverse-distance
    weighted vote in (`tree_vote`); and the distance-weighted mean of their coordinates in
    each of `coord_sets`. Row by row: a row's result does not depend on the other rows of
    the block."""
    d, j = nn.kneighbors(query)
    w = 1.0 / (d + 1e-6 * (d[:, -1:] + 1e-12))
    labels_out = [tree_vote(tree, labels[j], w) for labels, tree in label_sets]
    coords_out = [((coords[j] * w[:, :, None]).sum(axis=1) / w.sum(axis=1, keepdims=True)).astype(np.float32)
                  for coords in coord_sets]
    return labels_out, coords_out


@dataclass(frozen=True, repr=False)
class Fitted:
    """What the fit on the (sampled) distinct rows leaves for placing every other row.

    ``mean, axes`` are the PCA, ``zf`` the fitted rows' PCA coordinates, ``vectors``
    their embeddings; ``labels`` maps "region"/"error_mode" to the fitted rows' deepest
    tree nodes and ``trees`` to the hierarchies (`slicefind.discovery.hierarchy`), ``coords`` and
    ``map_xy`` are their layout and map coordinates."""

    mean: np.ndarray
    axes: np.ndarray
    metric: str
    n_neighbors: int
    vectors: np.ndarray
    zf: np.ndarray
    labels: Mapping[str, np.ndarray]
    trees: Mapping[str, Tree]
    coords: np.ndarray
    map_xy: np.ndarray | None
    placing: str = "approximate"

    def own(self) -> Placed:
        """The fitted rows' own results."""
        return Placed(self.labels, self.coords, self.map_xy)

    def place(self, x: np.ndarray, nn=None) -> Placed:
        """Rows `x` placed by their nearest fitted rows in the PCA space, as
        `cluster_slices` places the unsampled rows."""
        keys = list(self.labels)
        coord_sets = [self.coords] + ([self.map_xy] if self.map_xy is not None else [])
        nn = nn if nn is not None else _neighbours(self.zf, self.n_neighbors, self.placing)
        out = Placed.empty(self.own(), x.shape[0])
        for lo in range(0, x.shape[0], HASH_BLOCK):
            z = _project(x[lo:lo + HASH_BLOCK], self.mean, self.axes, self.metric)
            got_labels, got_coords = _vote(nn, z, [(self.labels[k], self.trees[k]) for k in keys],
                                            coord_sets)
            out.put(slice(lo, lo + z.shape[0]),
                    Placed(dict(zip(keys, got_labels)), got_coords[0],
                           got_coords[1] if self.map_xy is not None else None))
        return out


def _sample(err: np.ndarray, size: int, max_errors: int, rng) -> np.ndarray:
    """Sorted fit rows: every error row (a random `max_errors` of them when there are
    more) and random correct rows up to `size` in all."""
    err_idx = np.flatnonzero(err)
    ok_idx = np.flatnonzero(~err)
    if err_idx.size > max_errors:
        err_idx = rng.choice(err_idx, max_errors, replace=False)
    n_ok = min(ok_idx.size, size - err_idx.size)
    ok_idx = rng.choice(ok_idx, n_ok, replace=False)
    return np.sort(np.concatenate([err_idx, ok_idx])).astype(np.intp)


def _even_part(err: np.ndarray, rate: float, rng) -> np.ndarray:
    """Sorted indices of every correct point plus a random share of the error points, so
    that errors make up `rate` of the result (all error points when they are rarer)."""
    ok = np.flatnonzero(~err)
    bad = np.flatnonzero(err)
    want = int(round(rate * ok.size / max(1e-12, 1.0 - rate)))
    if want < bad.size:
        bad = rng.choice(bad, want, replace=False)
    return np.sort(np.concatenate([ok, bad])).astype(np.intp)


def default_min_cluster_size(n_points: int, *, share: float, floor: int) -> int:
    """HDBSCAN's min_cluster_size for `n_points`: `share` of them, at least `floor`.

    Examples
    --------
    >>> default_min_cluster_size(6_000, share=0.005, floor=15), default_min_cluster_size(600, share=0.02, floor=8)
    (30, 12)
    """
    return int(max(floor, round(share * n_points)))


# ---------------------------------------------------------------- the entry point

INITS = ("pca", "spectral")


def _check_options(strategy, metric, init, counts: Mapping[str, Any], optional: Mapping[str, Any],
                   sample_above, sample_size) -> None:
    """Validate the options of `cluster_slices`: `counts` maps a name to (value, least
    allowed), `optional` likewise for options that may be None."""
    if strategy not in STRATEGIES:
        raise SlicefindValueError(f"strategy must be one of {STRATEGIES}; got {strategy!r}.")
    if metric not in METRICS:
        raise SlicefindValueError(f"metric must be one of {METRICS}; got {metric!r}.")
    if init not in INITS:
        raise SlicefindValueError(f"init must be one of {INITS}; got {init!r}.")
    for name, (value, low) in list(counts.items()) + list(optional.items()):
        if value is None and name in optional:
            continue
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
            kind = "an integer or None" if name in optional else "an integer"
            raise SlicefindTypeError(f"{name} must be {kind}; got {type(value).__name__} {value!r}.")
        if value < low:
            raise SlicefindValueError(f"{name} must be >= {low}; got {value!r}.")
    if sample_size > sample_above:
        msg = f"sample_size ({sample_size}) must not exceed sample_above ({sample_above})."
        raise SlicefindValueError(msg)


def cluster_slices(
    table: EvalTable,
    *,
    strategy: str = "both",
    random_state=0,
    metric: str = "cosine",
    n_neighbors: int = 15,
    cluster_dims: int = CLUSTER_DIMS,
    min_cluster_size: int | None = None,
    min_error_cluster_size: int | None = None,
    min_samples: int | None = None,
    sample_above: int = 20_000,
    sample_size: int = 20_000,
    max_sample_errors: int | None = None,
    make_map: bool = True,
    map_size: int = 5_000,
    n_epochs: int = 100,
    init: str = "pca",
    placing: str = "approximate",
    hierarchy: bool = True,
    items=None,
    progress: bool | None = None,
    source=None,
) -> ClusterResult:
    """Regions and error modes of an eval table's embeddings, as slices.

    Parameters
    ----------
    table : EvalTable
        Validated input with ``embeddings`` (`find_slices` builds it).
    strategy : {"both", "regions", "error_modes"}, default="both"
        Regions cluster every row; error modes cluster the error rows only and extend each
        mode to the rows around it.
    random_state : int, Generator or None, default=0
        An int (or Generator) makes the result reproducible: the layout then runs on one
        thread. None uses the parallel layout, faster and not reproducible.
    metric : {"cosine", "euclidean"}, default="cosine"
        "cosine" scales each embedding to unit length first.
    n_neighbors : int, default=15
        Neighbours in UMAP's graph (and in the assignment of unsampled rows).
    cluster_dims : int, default=8
        Dimensions of the UMAP layout that HDBSCAN clusters.
    min_cluster_size : int, optional
        Smallest region; default 0.5% of the fitted rows, at least 15.
    min_error_cluster_size : int, optional
        Smallest error mode (in error rows); default 2% of the fitted error rows, at least 8.
    min_samples : int, optional
        HDBSCAN's ``min_samples``; default ``min(10, min_cluster_size)`` (much faster than
        HDBSCAN's own default, which equals min_cluster_size).
    sample_above : int, default=20_000
        Distinct embedding rows above which the fit runs on a sample. (On two cores a
        full fit of 50k rows took 66-70 s, a 20k-row sample plus assignment 28 s at 100k
        rows; see benchmarks/README.md.)
    sample_size : int, default=20_000
        Rows in that sample.
    max_sample_errors : int, optional
        Most error rows in the sample; default a quarter of ``sample_size``.
    make_map : bool, default=True
        Also lay out a 2-D map for figures.
    n_epochs : int, default=100
        Epochs of UMAP's layout optimisation (the clustering layout and the map). umap-learn
        uses 200 above 10,000 rows; 100 gave the same planted-slice recall on the depot
        and stamped benchmarks (30/30 and 10/10) in half the time (4.5 s against 8.6 s
        for a 20,000-row, 8-d layout here).
    init : {"pca", "spectral"}, default="pca"
        The layout's start: the leading principal coordinates, or UMAP's spectral embedding.
    placing : {"approximate", "exact"}, default="approximate"
        How the rows outside the fit find their nearest fitted rows: faiss's inverted
        file (`slicefind.discovery.neighbours`, about 8% of the fitted rows read per row) or an
        exact search. Both are reproducible.
    hierarchy : bool, default=True
        Propose every node of the cluster trees; False proposes only the clusters of
        HDBSCAN's own flat cut (excess of mass), as before the trees were used.
    items : ItemSet, optional
        The table's items (`find_slices` has them); built here when not given.
    progress : bool, optional
        Show progress bars; default only for tables of 20,000 rows or more.
    source : optional
        Where the embedding rows live: None for ``table.embeddings`` (`MemoryRows`); the
        Dask engine passes its partitions (`slicefind.discovery.distributed`).

    Returns
    -------
    ClusterResult

    References
    ----------
    .. [1] L. McInnes, J. Healy and J. Melville, "UMAP: Uniform Manifold Approximation and
           Projection for Dimension Reduction", arXiv:1802.03426 (2018).
    .. [2] R. J. G. B. Campello, D. Moulavi and J. Sander, "Density-based clustering based
           on hierarchical density estimates", PAKDD 2013, LNCS 7819, 160-172.

    Examples
    --------
    >>> import pandas as pd
    >>> from sklearn.datasets import make_blobs
    >>> from slicefind.discovery.table import build_eval_table
    >>> x, blob = make_blobs(n_samples=[200, 200, 200], n_features=8, random_state=0)
    >>> wrong = np.random.default_rng(0).random(600) < np.where(blob == 2, 0.5, 0.05)
    >>> table = build_eval_table(pd.DataFrame({"site": ["a", "b"] * 300}), errors=wrong, embeddings=x)
    >>> result = cluster_slices(table, strategy="regions", random_state=0)
    >>> result                     # every node of the hierarchy is a candidate slice
    ClusterResult(n_slices=20, region=3)
    >>> flat = result.labels["region"]          # HDBSCAN's own flat cut: the three blobs
    >>> sorted(np.bincount(flat[flat >= 0]).tolist())
    [200, 200, 200]
    >>> sorted(sl.rows.size for sl in result.slices if sl.extra["flat"] is not None)
    [200, 200, 200]
    """
    if table.embeddings is None and source is None:
        raise SlicefindValueError("cluster_slices needs embeddings: pass embeddings= to find_slices.")
    if placing not in PLACINGS:
        raise SlicefindValueError(f"placing must be one of {PLACINGS}; got {placing!r}.")
    if not isinstance(hierarchy, (bool, np.bool_)):
        raise SlicefindTypeError(f"hierarchy must be True or False; got {hierarchy!r}.")
    _check_options(strategy, metric, init,
                   {"n_neighbors": (n_neighbors, 2), "cluster_dims": (cluster_dims, 2),
                    "sample_above": (sample_above, 100), "sample_size": (sample_size, 100),
                    "map_size": (map_size, 100), "n_epochs": (n_epochs, 1)},
                   {"min_cluster_size": (min_cluster_size, 2),
                    "min_error_cluster_size": (min_error_cluster_size, 2),
                    "min_samples": (min_samples, 1), "max_sample_errors": (max_sample_errors, 1)},
                   sample_above, sample_size)
    _require("umap", package="umap-learn", needed_for="embeddings=")
    _require("hdbscan", package="hdbscan", needed_for="embeddings=")
    from tqdm.auto import tqdm

    source = source if source is not None else MemoryRows(table.embeddings)
    n = table.n_rows
    if progress is None:
        progress = n >= 20_000
    steps = tqdm(total=len(_STEPS), desc="embedding clusters", disable=not progress, leave=False)
    timings: dict[str, float] = {}
    clock = time.perf_counter()

    def lap(name):
        nonlocal clock
        now = time.perf_counter()
        timings[name] = round(now - clock, 3)
        clock = now
        steps.update()
        following = _STEPS.index(name) + 1
        if following < len(_STEPS):
            steps.set_postfix_str(_STEPS[following])

    seeded = random_state is not None
    rng = np.random.default_rng(random_state)
    seed_layout, seed_map = (int(s) for s in rng.integers(0, 2**31 - 1, 2))
    first, err_any = source.distinct(table.errors)
    n_distinct = first.size
    lap("distinct")

    params = dict(strategy=strategy, metric=metric, n_neighbors=n_neighbors, cluster_dims=cluster_dims,
                  min_cluster_size=min_cluster_size, min_error_cluster_size=min_error_cluster_size,
                  min_samples=min_samples, sample_above=sample_above, sample_size=sample_size,
                  max_sample_errors=max_sample_errors, make_map=make_map, map_size=map_size,
                  n_epochs=n_epochs, init=init, placing=placing, hierarchy=bool(hierarchy),
                  random_state=random_state if isinstance(random_state, (int, np.integer)) else None)
    diagnostics: dict[str, Any] = dict(n_rows=n, n_distinct=n_distinct, seeded=seeded, timings=timings)
    if n_distinct < MIN_ROWS_TO_CLUSTER:
        steps.close()
        diagnostics.update(n_fit=0, sampled=False, skipped=f"only {n_distinct} distinct embedding rows")
        keys = [k for k in ("region", "error_mode") if _wanted(k, strategy)]
        return ClusterResult((), {k: np.full(n, NOISE) for k in keys}, None, None, diagnostics, params,
                             {k: np.full(n, ROOT) for k in keys}, {k: single_node() for k in keys})

    sampled = n_distinct > sample_above
    cap = sample_size // 4 if max_sample_errors is None else max_sample_errors
    fit = _sample(err_any, sample_size, cap, rng) if sampled else np.arange(n_distinct, dtype=np.intp)
    xf = source.vectors(first[fit])
    mean, axes = _pca_axes(xf, PCA_DIMS, metric)
    zf = _project(xf, mean, axes, metric)
    lap("pca")

    idx, dist = _knn(zf, n_neighbors)
    graph = _fuzzy_graph(idx, dist)
    small = min_cluster_size or default_min_cluster_size(fit.size, share=0.005, floor=15)
    n_comp, largest, fragments = _components(graph, small)
    lap("knn_graph")
    if n_comp > 1 and fragments >= FRAGMENT_WARN_SHARE:
        msg = (f"the {n_neighbors}-nearest-neighbour graph of the embeddings falls apart into "
               f"{n_comp} pieces, and pieces too small to be a region ({small} rows) hold "
               f"{fragments:.0%} of the distinct rows fitted; clusters cannot span them and the map "
               "places them arbitrarily. Near-copies of a few originals often cause this; a larger "
               "cluster_options={'n_neighbors': ...} joins more of them. Silence with "
               "warnings.filterwarnings('ignore', category=slicefind.discovery.clusters.DisconnectedGraphWarning).")
        warnings.warn(msg, DisconnectedGraphWarning, stacklevel=_stacklevel())

    coords_f = _umap_layout(zf, graph, cluster_dims, seed_layout if seeded else None, init=init,
                            n_epochs=n_epochs, progress=progress, what=f"layout ({cluster_dims}-d)")
    lap("layout")
    map_f = _map(zf, graph, map_size, n_neighbors, seed_map if seeded else None, rng, init=init,
                 n_epochs=n_epochs, progress=progress) if make_map else None
    lap("map")

    n_fit = fit.size
    labels_f, trees, sizes = _cluster_fit(coords_f, err_any[fit], float(err_any.mean()), sampled, strategy,
                                          min_cluster_size, min_error_cluster_size, min_samples,
                                          n_neighbors, rng, lap)

    # every row: copies of fitted rows directly, the others by their nearest fitted rows
    fitted = Fitted(mean=mean, axes=axes, metric=metric, n_neighbors=n_neighbors, vectors=xf,
                    zf=zf, labels=labels_f, trees=trees, coords=coords_f, map_xy=map_f, placing=placing)
    placed = source.place(fitted, fit, progress)
    nodes, coords, map_xy = placed.labels, placed.coords, placed.map_xy
    labels = {k: trees[k].flat[v] for k, v in nodes.items()}
    lap("assign")

    if items is None:
        items = build_items(table, min_rows=default_min_rows(n), min_errors=1) if table.kinds else None
    slices = _tree_slices(table, nodes, trees, items, source.inside(trees), hierarchy)
    lap("describe")
    steps.close()

    diagnostics.update(
        n_fit=int(n_fit), sampled=bool(sampled), n_graph_components=n_comp, connected=n_comp == 1,
        largest_component_share=largest, fragment_share=fragments, min_cluster_size=sizes,
        n_clusters={k: int(v.max(initial=NOISE)) + 1 for k, v in labels.items()},
        n_nodes={k: t.n_nodes - 1 for k, t in trees.items()},
        noise_share={k: float(np.mean(v == NOISE)) for k, v in labels.items()})
    return ClusterResult(slices=tuple(slices), labels=labels, map_xy=map_xy, coords=coords,
                         diagnostics=diagnostics, params=params, nodes=nodes, trees=trees)


def _cluster_fit(coords_f, err_f, error_rate, sampled, strategy, min_cluster_size, min_error_cluster_size,
                 min_samples, n_neighbors, rng, lap):
    """HDBSCAN on the fitted rows' layout: (deepest tree node per fitted row, trees, and the
    min_cluster_size used, each by kind "region" / "error_mode")."""
    n_fit = err_f.size
    labels_f: dict[str, np.ndarray] = {}
    trees: dict[str, Tree] = {}
    sizes: dict[str, int] = {}
    if _wanted("region", strategy):
        # regions are clustered on a part of the fit in which errors are as common as in
        # the whole table (the sample over-represents them); the other fitted rows join
        # by nearest neighbours in the layout
        even = _even_part(err_f, error_rate, rng) if sampled else np.arange(n_fit)
        mcs = min_cluster_size or default_min_cluster_size(even.size, share=0.005, floor=15)
        region_f = np.full(n_fit, ROOT, dtype=np.int64)
        region_f[even], trees["region"] = _hdbscan(coords_f[even], mcs, min_samples or min(10, mcs))
        if even.size < n_fit:
            others = np.setdiff1d(np.arange(n_fit), even, assume_unique=True)
            (region_f[others],), _ = _assign(coords_f, even, others, [(region_f[even], trees["region"])],
                                             [], n_neighbors, progress=False)
        labels_f["region"] = region_f
        sizes["region"] = mcs
    lap("hdbscan_regions")
    if _wanted("error_mode", strategy):
        n_err_f = int(err_f.sum())
        mcs_e = min_error_cluster_size or default_min_cluster_size(n_err_f, share=0.02, floor=8)
        modes, trees["error_mode"] = _hdbscan(coords_f[err_f], mcs_e, min_samples or min(10, mcs_e))
        labels_f["error_mode"] = _extend_modes(coords_f, err_f, modes, trees["error_mode"], n_vote=5)
        sizes["error_mode"] = mcs_e
    lap("hdbscan_error_modes")
    return labels_f, trees, sizes


def _tree_slices(table: EvalTable, nodes: Mapping[str, np.ndarray], trees: Mapping[str, Tree], items,
                 inside, hierarchy: bool = True) -> list[Slice]:
    """One Slice per node of each hierarchy but the root (only the flat cut's nodes
    without `hierarchy`), in preorder, described by
    `describe_rows` (with the per-node item counts `inside[key]` when the items' bitsets
    live elsewhere). ``key`` is ``"region:7"``; ``extra`` holds the node, its parent's key
    (``""`` under the root) and its flat cluster when HDBSCAN's own cut selected it."""
    slices = []
    for source, key in (("region", "region"), ("error_mode", "error_mode")):
        if key not in nodes:
            continue
        tree = trees[key]
        members = subtree_rows(tree, nodes[key])
        for j in range(1, tree.n_nodes):
            rows = members[j]
            up = int(tree.parent[j])
            selected = tree.flat[j] >= 0 and (up <= ROOT or tree.flat[up] < 0)
            if rows.size == 0 or not (hierarchy or selected):
                continue
            counts = None if inside is None else inside[key][:, j]
            text = describe_rows(table, rows, items=items, inside=counts)
            slices.append(Slice(source=source, description=text, rows=rows, key=f"{key}:{j}",
                                extra={"node": j, "parent": f"{key}:{up}" if up > ROOT and hierarchy else "",
                                       "flat": int(tree.flat[j]) if selected else None}))
    return slices


class MemoryRows:
    """The embedding rows of an in-memory table, for `cluster_slices`.

    A source of rows answers four questions: `distinct` (the first row of each distinct
    vector, in row order, and whether any copy is an error), `vectors` (the embeddings of
    some rows), `place` (a `Placed` of every row once the fit is done) and
    `inside` (per-cluster item counts, or None to count on the items' bitsets). The Dask
    engine's source (`slicefind.discovery.distributed`) answers them partition by partition."""

    def __init__(self, x: np.ndarray):
        self.x = x
        self.first = self.inverse = None

    def distinct(self, errors: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        self.first, self.inverse = _distinct(self.x)
        err_any = np.bincount(self.inverse, weights=errors, minlength=self.first.size) > 0
        return self.first, err_any

    def vectors(self, rows: np.ndarray) -> np.ndarray:
        return self.x[rows]

    def place(self, fitted: Fitted, fit: np.ndarray, progress: bool) -> Placed:
        from tqdm.auto import tqdm

        distinct = Placed.empty(fitted.own(), self.first.size)
        distinct.put(fit, fitted.own())
        rest = np.setdiff1d(np.arange(self.first.size), fit, assume_unique=True)
        if rest.size:
            nn = _neighbours(fitted.zf, fitted.n_neighbors, fitted.placing)
            blocks = range(0, rest.size, HASH_BLOCK)
            for lo in tqdm(blocks, desc="assigning rows to clusters", disable=not progress, leave=False):
                block = rest[lo:lo + HASH_BLOCK]
                distinct.put(block, fitted.place(self.x[self.first[block]], nn))
        return distinct.take(self.inverse)

    def inside(self, trees) -> None:
        return None


def _wanted(key: str, strategy: str) -> bool:
    """Whether labelling `key` ("region"/"error_mode") belongs to `strategy`."""
    return strategy == "both" or strategy == key + "s"
