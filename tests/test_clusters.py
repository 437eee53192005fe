"""Tests for slicefind.discovery.clusters: reduction, regions, error modes, sampling, determinism."""
import re
import subprocess
import sys
import warnings

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.datasets import make_blobs
from sklearn.metrics import adjusted_rand_score

import slicefind as sf
from slicefind.discovery import clusters
from slicefind.discovery.clusters import (NOISE, DisconnectedGraphWarning, cluster_slices,
                                          noise_as_singletons)
from slicefind.discovery.hierarchy import ROOT, Tree
from slicefind.discovery.records import jaccard
from slicefind.discovery.table import build_eval_table

N_BLOB = 300
ERROR_BLOB = 3


def _blobs(n_per=N_BLOB, seed=0):
    """Four planted 16-d blobs; metadata that says nothing; blob 3 errs at 45%, the rest at 5%."""
    x, truth = make_blobs(n_samples=[n_per] * 4, n_features=16, cluster_std=1.0,
                          center_box=(-8, 8), random_state=seed)
    rng = np.random.default_rng(seed)
    n = x.shape[0]
    frame = pd.DataFrame({"site": rng.choice(["A", "B", "C"], n),
                          "speed": np.round(rng.uniform(0.5, 3.0, n), 2)})
    errors = rng.random(n) < np.where(truth == ERROR_BLOB, 0.45, 0.05)
    return frame, errors, x, truth


@pytest.fixture(scope="module")
def blobs():
    return _blobs()


_CAUGHT = []


@pytest.fixture(scope="module")
def found_blobs(blobs):
    frame, errors, x, _ = blobs
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        found = sf.find_slices(frame, errors=errors, embeddings=x, random_state=0)
    _CAUGHT.extend(caught)
    return found


def test_planted_blobs_recovered_as_regions(blobs, found_blobs):
    """Regions recover four planted make_blobs clusters with adjusted Rand index >= 0.9."""
    # named check: scikit-learn adjusted_rand_score; noise rows count as singletons
    truth = blobs[3]
    labels = found_blobs.extras["clusters"].labels["region"]
    ari = adjusted_rand_score(truth, noise_as_singletons(labels))
    assert ari >= 0.9, f"ARI {ari:.3f}"


def test_embedding_only_error_slice_in_top_five(blobs, found_blobs):
    """A planted error blob that no column records is among the top 5 slices, from a cluster."""
    truth = blobs[3]
    planted = np.flatnonzero(truth == ERROR_BLOB)
    top = found_blobs.table.head(5)
    hits = [(sid, src) for sid, src in zip(top["slice_id"], top["source"])
            if jaccard(found_blobs.rows(sid), planted) >= 0.8]
    assert hits, found_blobs.table[["slice_id", "source", "description"]].head(5).to_string()
    assert {"region", "error_mode"} >= {src for _, src in hits}


def test_same_random_state_gives_identical_output(blobs, found_blobs):
    """Two runs with the same random_state give the same table, labels and map."""
    frame, errors, x, _ = blobs
    again = sf.find_slices(frame, errors=errors, embeddings=x, random_state=0)
    pd.testing.assert_frame_equal(found_blobs.table, again.table)
    first, second = found_blobs.extras["clusters"], again.extras["clusters"]
    for key in first.labels:
        assert first.labels[key].tolist() == second.labels[key].tolist()
    assert np.array_equal(first.map_xy, second.map_xy)
    assert np.array_equal(first.coords, second.coords)


def test_cluster_result_shapes_and_diagnostics(blobs, found_blobs):
    """The result holds a label per row for each strategy, a 2-D map and its diagnostics."""
    result = found_blobs.extras["clusters"]
    n = blobs[2].shape[0]
    assert {"region", "error_mode"} == set(result.labels)
    assert (n, 2) == result.map_xy.shape
    assert (n, clusters.CLUSTER_DIMS) == result.coords.shape
    d = result.diagnostics
    assert (n, n, False, True) == (d["n_rows"], d["n_fit"], d["sampled"], d["seeded"])
    assert set(d["timings"]) >= {"pca", "knn_graph", "layout", "map", "hdbscan_regions", "assign"}
    for sl in result.slices:
        assert sl.source in ("region", "error_mode")
        assert np.all(np.diff(sl.rows) > 0)
        assert not re.search(r"\bC\d+\b", sl.description)


def test_error_modes_are_extended_beyond_error_rows(blobs, found_blobs):
    """The error blob's error mode also holds the correct rows among its errors."""
    truth = blobs[3]
    errors = blobs[1]
    result = found_blobs.extras["clusters"]
    modes = result.labels["error_mode"]
    inside = modes[truth == ERROR_BLOB]
    assert (inside != NOISE).any()
    top = np.bincount(inside[inside != NOISE]).argmax()
    members = modes == top
    assert (members & ~errors).sum() > 0                      # correct rows joined the mode
    assert members[truth != ERROR_BLOB].mean() < 0.02          # far rows stayed out


def test_duplicates_collapsed_and_mapped_back():
    """Exact copies of an embedding row are fitted once and all get the same labels."""
    frame, errors, x, truth = _blobs(n_per=100, seed=1)
    reps = np.repeat(np.arange(x.shape[0]), 3)
    table = build_eval_table(pd.DataFrame({"site": frame["site"].to_numpy()[reps]}),
                             errors=errors[reps], embeddings=x[reps])
    result = cluster_slices(table, strategy="regions", random_state=0, make_map=False)
    assert 400 == result.diagnostics["n_distinct"]
    labels = result.labels["region"].reshape(-1, 3)
    assert (labels == labels[:, :1]).all()
    assert adjusted_rand_score(truth, noise_as_singletons(labels[:, 0])) >= 0.9
    assert result.map_xy is None


def test_sampled_fit_assigns_the_rest():
    """Above sample_above rows the fit runs on a sample and the rest are assigned by kNN."""
    frame, errors, x, truth = _blobs(n_per=500, seed=2)
    table = build_eval_table(frame, errors=errors, embeddings=x)
    result = cluster_slices(table, random_state=0, sample_above=1000, sample_size=800)
    d = result.diagnostics
    assert (True, 800) == (d["sampled"], d["n_fit"])
    assert adjusted_rand_score(truth, noise_as_singletons(result.labels["region"])) >= 0.9
    assert np.isfinite(result.map_xy).all()


def test_fragmented_graph_warns():
    """A neighbour graph in many small pieces warns, says how to silence it, and points at the caller."""
    rng = np.random.default_rng(0)
    centres = rng.uniform(-1000, 1000, (30, 5))
    x = np.repeat(centres, 6, axis=0) + rng.normal(0, 0.01, (180, 5))     # 30 far groups of 6
    table = build_eval_table(pd.DataFrame({"g": rng.choice(["a", "b"], 180)}),
                             errors=rng.random(180) < 0.2, embeddings=x)
    with pytest.warns(DisconnectedGraphWarning, match="filterwarnings") as record:
        result = cluster_slices(table, strategy="regions", random_state=0, make_map=False,
                                metric="euclidean")
    assert __file__ == record[0].filename
    d = result.diagnostics
    assert (False, 1.0) == (d["connected"], d["fragment_share"])
    assert d["n_graph_components"] >= 10


def test_few_large_pieces_do_not_warn(found_blobs):
    """Well-separated blobs split the graph into large pieces: recorded, not warned about."""
    d = found_blobs.extras["clusters"].diagnostics
    assert (0.0, False) == (d["fragment_share"], d["connected"])
    assert [] == [w for w in _CAUGHT if issubclass(w.category, DisconnectedGraphWarning)]


def test_fuzzy_graph_matches_umap_learn():
    """The numpy fuzzy graph equals umap-learn's fuzzy_simplicial_set on the same kNN graph."""
    # reference: umap-learn 0.5.x umap.umap_.fuzzy_simplicial_set(knn_indices=, knn_dists=)
    from umap.umap_ import fuzzy_simplicial_set

    x, _ = make_blobs(n_samples=300, n_features=6, centers=3, random_state=0)
    idx, dist = clusters._knn(x.astype(np.float32), 15)
    ours = clusters._fuzzy_graph(idx, dist).toarray()
    theirs, _, _ = fuzzy_simplicial_set(x, 15, np.random.RandomState(0), "euclidean",
                                        knn_indices=idx, knn_dists=dist)
    assert np.allclose(theirs.toarray(), ours, atol=1e-5)


def test_pca_matches_scikit_learn():
    """The PCA step equals scikit-learn's PCA projection up to the sign of each axis."""
    # reference: scikit-learn PCA(n_components=5, svd_solver="full").fit_transform(x)
    from sklearn.decomposition import PCA

    x = np.random.default_rng(0).normal(size=(200, 12)) @ np.diag(np.arange(12, 0, -1.0))
    ours = clusters._project(x, *clusters._pca_axes(x, 5, "euclidean"), "euclidean")
    theirs = PCA(n_components=5, svd_solver="full").fit_transform(x)
    assert np.allclose(np.abs(theirs), np.abs(ours), atol=1e-4)


@settings(max_examples=40, deadline=None)
@given(st.integers(1, 60), st.integers(1, 6), st.integers(1, 4), st.integers(0, 2**31 - 1))
def test_distinct_matches_numpy_unique(n_base, d, copies, seed):
    """Distinct rows group exactly the rows numpy's unique(axis=0) groups, in first-seen order."""
    rng = np.random.default_rng(seed)
    base = rng.integers(0, 3, (n_base, d)).astype(np.float64)      # collisions are likely
    x = base[rng.integers(0, n_base, n_base * copies)]
    first, inverse = clusters._distinct(x)
    assert np.array_equal(x, x[first][inverse])
    assert len(np.unique(x, axis=0)) == first.size
    assert np.all(np.diff(first) > 0)


def test_distinct_survives_hash_collisions(monkeypatch):
    """When every row hashes alike, the exact split still groups equal rows only."""
    rng = np.random.default_rng(0)
    x = rng.integers(0, 3, (40, 2)).astype(np.float64)[rng.integers(0, 40, 200)]
    monkeypatch.setattr(clusters, "row_hashes", lambda rows: np.zeros(rows.shape[0], np.uint64))
    first, inverse = clusters._distinct(x)
    assert np.array_equal(x, x[first][inverse])
    assert len(np.unique(x, axis=0)) == first.size
    assert np.all(np.diff(first) > 0)


def test_noise_convention_matches_references():
    """With noise as singletons the ARI of REFERENCES §8's noise example is 22/29."""
    # REFERENCES.md §8 (hand formula with fractions): -1 as one cluster 13/21, singletons 22/29
    a = [0, 0, 0, 1, 1, 1, -1, -1]
    b = [0, 0, 0, 1, 1, -1, -1, -1]
    assert pytest.approx(13 / 21, abs=5e-7) == adjusted_rand_score(a, b)
    assert pytest.approx(22 / 29, abs=5e-7) == adjusted_rand_score(noise_as_singletons(a),
                                                                   noise_as_singletons(b))


def test_extend_modes_respects_cut_off():
    """A correct row among a mode's errors joins it; a far one stays out."""
    rng = np.random.default_rng(0)
    group = rng.normal(0, 0.1, (20, 2))
    coords = np.vstack([group, [[0.0, 0.05]], [[5.0, 5.0]]])
    err = np.r_[np.ones(20, bool), False, False]
    one = Tree.from_parents([-1, 0])                      # the root and one error mode
    out = clusters._extend_modes(coords, err, np.ones(20, dtype=np.int64), one, n_vote=5)
    assert [1, ROOT] == out[20:].tolist()


def test_renumber_orders_by_size():
    """Clusters are renumbered by decreasing size; noise stays noise."""
    assert [1, 0, 0, NOISE, 1, 0] == clusters._renumber(np.array([5, 2, 2, -1, 5, 2])).tolist()


def test_require_names_the_package():
    """A missing optional package fails with the install command."""
    with pytest.raises(ImportError, match=r"^embeddings= needs not-here: pip install not-here$"):
        clusters._require("slicefind_no_such_module", package="not-here", needed_for="embeddings=")


@pytest.mark.parametrize("options, name", [
    ({"n_neighbors": 1}, "n_neighbors"),
    ({"n_neighbors": 2.5}, "n_neighbors"),
    ({"metric": "manhattan"}, "metric"),
    ({"init": "random"}, "init"),
    ({"cluster_dims": 1}, "cluster_dims"),
    ({"min_cluster_size": 1}, "min_cluster_size"),
    ({"min_samples": 0}, "min_samples"),
    ({"sample_size": 80_000}, "sample_size"),
    ({"max_sample_errors": True}, "max_sample_errors"),
    ({"n_epochs": 0}, "n_epochs"),
    ({"map_size": 10}, "map_size"),
])
def test_bad_cluster_options_name_the_option(blobs, options, name):
    """Each bad cluster option fails before any fitting, and the message names it."""
    frame, errors, x, _ = blobs
    with pytest.raises((ValueError, TypeError), match=name):
        sf.find_slices(frame, errors=errors, embeddings=x, cluster_options=options)


@pytest.mark.parametrize("embeddings, match", [
    (np.full((1200, 4), np.nan), "NaN or inf"),
    (np.ones((1199, 4)), "1199 rows"),
    (np.ones(1200), "two-dimensional"),
    (np.array([["a"] * 3] * 1200), "numeric"),
    (np.ones((1200, 0)), "0 columns"),
])
def test_bad_embeddings_get_clear_errors(blobs, embeddings, match):
    """find_slices rejects NaN, misshapen and non-numeric embeddings with a clear message."""
    frame, errors, _, _ = blobs
    with pytest.raises((ValueError, TypeError), match=match):
        sf.find_slices(frame, errors=errors, embeddings=embeddings)


def test_too_few_distinct_rows_give_no_clusters():
    """With fewer than 50 distinct embedding rows no cluster is proposed, and it says why."""
    rng = np.random.default_rng(0)
    x = np.repeat(rng.normal(size=(10, 3)), 20, axis=0)
    table = build_eval_table(pd.DataFrame({"g": rng.choice(["a", "b"], 200)}),
                             errors=rng.random(200) < 0.3, embeddings=x)
    result = cluster_slices(table, random_state=0)
    assert () == result.slices
    assert "10 distinct" in result.diagnostics["skipped"]


def test_import_stays_light():
    """Importing slicefind (and slicefind.discovery.clusters) loads neither umap, hdbscan nor numba."""
    code = ("import sys, slicefind, slicefind.discovery.clusters, slicefind.discovery.describe, slicefind.demodata; "
            "print(sorted(m for m in ('umap', 'hdbscan', 'numba', 'pynndescent') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert "[]" == out.stdout.strip()


def test_unseeded_run_uses_parallel_layout(blobs):
    """random_state=None fits without a seed (parallel layout) and says so in diagnostics."""
    frame, errors, x, truth = blobs
    table = build_eval_table(frame, errors=errors, embeddings=x)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = cluster_slices(table, strategy="regions", random_state=None, make_map=False)
    assert result.diagnostics["seeded"] is False
    assert adjusted_rand_score(truth, noise_as_singletons(result.labels["region"])) >= 0.9


def test_cross_class_degradation_is_one_tree_node():
    """A stamp over every class, recorded nowhere, is one listed slice although HDBSCAN's
    flat cut splits it by digit."""
    from slicefind.demodata import make_stamped

    data = make_stamped(random_state=0)
    planted = data.planted["customs stamp"].rows
    found = sf.find_slices(data.frame, label="true_digit", prediction="read_as", id_column="parcel_id",
                           embeddings=data.embeddings, random_state=0)
    best = max(jaccard(found.rows(s), planted) for s in found.table["slice_id"].head(3))
    assert best >= 0.75                     # one slice, where per-digit pieces reach 0.15-0.3
    # the flat cut alone (the clusters HDBSCAN selects) holds no cluster near the stamp
    result = found.extras["clusters"]
    flat = [jaccard(np.flatnonzero(labels == c), planted)
            for labels in result.labels.values() for c in range(int(labels.max()) + 1)]
    assert max(flat) < 0.5


def _two_near_blobs(rates, seed=0):
    """Five 4-d blobs of 400 rows; blobs 0 and 1 are close, so the tree holds a node for
    both (their parent) above one for each; `rates` are the blobs' error rates."""
    rng = np.random.default_rng(seed)
    centres = np.array([[0, 0, 0, 0], [6, 0, 0, 0], [40, 0, 0, 0], [0, 40, 0, 0], [40, 40, 0, 0]], float)
    truth = np.repeat(np.arange(5), 400)
    x = centres[truth] + rng.normal(0, 1.0, (truth.size, 4))
    frame = pd.DataFrame({"site": rng.choice(["a", "b", "c"], truth.size)})
    errors = rng.random(truth.size) < np.asarray(rates)[truth]
    return sf.find_slices(frame, errors=errors, embeddings=x, random_state=0,
                          cluster_options={"metric": "euclidean"}), truth


def test_parent_folds_into_the_child_that_explains_it():
    """When one child holds the parent's excess, the child is listed and the parent folded into it."""
    found, truth = _two_near_blobs([0.4, 0.05, 0.05, 0.05, 0.05])
    clusters_listed = found.table[found.table["source"] != "rule"]
    assert 1 == len(clusters_listed)
    sid = clusters_listed["slice_id"].iloc[0]
    assert jaccard(found.rows(sid), np.flatnonzero(truth == 0)) >= 0.95
    assert "800 rows" in clusters_listed["folded"].iloc[0]          # the parent of blobs 0 and 1


def test_parent_listed_when_children_are_no_worse():
    """When both children err alike, the parent is listed and the children are not."""
    found, truth = _two_near_blobs([0.3, 0.3, 0.05, 0.05, 0.05])
    clusters_listed = found.table[found.table["source"] != "rule"]
    assert 1 == len(clusters_listed)
    both = np.flatnonzero(truth <= 1)
    assert jaccard(found.rows(clusters_listed["slice_id"].iloc[0]), both) >= 0.95
    for sid in found.table["slice_id"]:           # neither child is listed on its own
        assert max(jaccard(found.rows(sid), np.flatnonzero(truth == b)) for b in (0, 1)) < 0.9


@pytest.mark.slow
def test_null_embeddings_list_nothing_in_95_percent_of_seeds():
    """With errors independent of rows and embeddings, no slice is listed in >= 19 of 20 seeds."""
    clean = 0
    for seed in range(20):
        x, _ = make_blobs(n_samples=[300] * 4, n_features=8, random_state=seed)
        rng = np.random.default_rng(seed)
        frame = pd.DataFrame({"site": rng.choice(["a", "b", "c"], x.shape[0])})
        errors = rng.random(x.shape[0]) < 0.1
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            found = sf.find_slices(frame, errors=errors, embeddings=x, random_state=seed)
        clean += len(found.table) == 0
    assert clean >= 19


def test_row_hash_kernel_equals_numpy():
    """The numba row hash (from 100,000 values) equals the numpy one, for float32 and float64."""
    rng = np.random.default_rng(3)
    for dtype in (np.float32, np.float64):
        x = rng.normal(size=(3000, 40)).astype(dtype)             # 120,000 values: the kernel
        pieces = np.concatenate([clusters.row_hashes(x[lo:lo + 500]) for lo in range(0, 3000, 500)])
        assert clusters.row_hashes(x).tolist() == pieces.tolist()  # 20,000 values each: numpy
