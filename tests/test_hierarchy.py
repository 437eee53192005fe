"""Tests for slicefind.discovery.hierarchy: the condensed tree as nested nodes, votes, subtree counts."""
import hdbscan
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.datasets import make_blobs

from slicefind.discovery.clusters import _renumber
from slicefind.discovery.hierarchy import (ROOT, Tree, condensed_tree, subtree_rows, subtree_sums,
                                           tree_vote)


@pytest.fixture(scope="module")
def fitted():
    """HDBSCAN (the hdbscan package) on four blobs, two of them close together."""
    x, _ = make_blobs(n_samples=[150, 150, 150, 150], centers=[[0, 0], [4, 0], [30, 0], [0, 30]],
                      cluster_std=1.0, random_state=0)
    model = hdbscan.HDBSCAN(min_cluster_size=15, min_samples=10).fit(x)
    raw = model.condensed_tree_.to_numpy()
    flat = _renumber(model.labels_)
    deepest, tree = condensed_tree(raw, x.shape[0], flat)
    return raw, flat, deepest, tree, x.shape[0]


def test_node_sizes_match_the_condensed_tree(fitted):
    """Every node holds exactly the points hdbscan's condensed tree gives it (child_size)."""
    # reference: hdbscan 0.8.x condensed_tree_.to_numpy(): a cluster child's child_size is
    # the number of points in it when it is born, i.e. in its whole subtree
    raw, _, deepest, tree, n = fitted
    clusters = raw[raw["child"] >= n]
    expected = sorted(clusters["child_size"].tolist())
    rows = subtree_rows(tree, deepest)
    assert n == rows[ROOT].size
    assert expected == sorted(r.size for r in rows[1:])


def test_flat_labels_are_hdbscans_own(fitted):
    """The flat cut read off the tree equals hdbscan's labels_ (renumbered by size)."""
    _, flat, deepest, tree, _ = fitted
    assert flat.tolist() == tree.flat[deepest].tolist()


def test_preorder_ranges_nest(fitted):
    """A child's id range lies inside its parent's, and children follow their parent."""
    _, _, _, tree, _ = fitted
    for j in range(1, tree.n_nodes):
        p = tree.parent[j]
        assert p < j and tree.end[j] <= tree.end[p]
    assert tree.ancestors[:, 0].tolist() == list(range(tree.n_nodes))


def test_from_parents_and_subtree_sums():
    """Subtree sums of per-label counts add each node's descendants (hand-worked tree)."""
    #      0
    #    1   4
    #   2 3
    tree = Tree.from_parents([-1, 0, 1, 1, 0])
    assert [5, 4, 3, 4, 5] == tree.end.tolist()
    per_label = np.array([1, 2, 3, 4, 5])
    assert [15, 9, 3, 4, 5] == subtree_sums(tree, per_label).tolist()
    assert [[0, -1, -1], [1, 0, -1], [2, 1, 0], [3, 1, 0], [4, 0, -1]] == tree.ancestors.tolist()


def test_tree_vote_takes_the_deepest_majority():
    """A query goes to the deepest node holding more than half of the vote, else the root."""
    tree = Tree.from_parents([-1, 0, 1, 1, 0])
    labels = np.array([[2, 2, 3, 4],      # node 1 holds 3/4, node 2 only 2/4 -> 1
                       [2, 2, 2, 3],      # node 2 holds 3/4 -> 2
                       [2, 3, 4, 4],      # node 1 2/4, node 4 2/4: no majority -> root
                       [0, 0, 0, 2]])     # mostly in no cluster -> root
    weights = np.ones(labels.shape)
    assert [1, 2, ROOT, ROOT] == tree_vote(tree, labels, weights).tolist()
    # weights move the majority: the single vote for node 4 outweighs the others
    assert [4] == tree_vote(tree, np.array([[2, 3, 4]]), np.array([[1.0, 1.0, 5.0]])).tolist()


def test_tree_vote_cut_falls_back_to_the_parent():
    """A node whose nearest member is beyond its cut gives way to its parent."""
    tree = Tree.from_parents([-1, 0, 1, 1, 0])
    labels = np.array([[2, 2, 2, 3]])
    distances = np.array([[1.0, 1.2, 1.5, 0.5]])
    cut = np.array([np.inf, 2.0, 0.8, 0.8, 0.8])
    assert [1] == tree_vote(tree, labels, np.ones((1, 4)), distances=distances, cut=cut).tolist()
    cut[1] = 0.1
    assert [ROOT] == tree_vote(tree, labels, np.ones((1, 4)), distances=distances, cut=cut).tolist()


@st.composite
def _preorder_trees(draw):
    """A random tree in preorder: node j's parent is one of the nodes on the path to j-1."""
    m = draw(st.integers(2, 25))
    parent = [-1]
    for j in range(1, m):
        path = [j - 1]
        while parent[path[-1]] >= 0:
            path.append(parent[path[-1]])
        parent.append(draw(st.sampled_from(path)))
    return Tree.from_parents(parent)


@settings(max_examples=60, deadline=None)
@given(_preorder_trees(), st.integers(0, 2**31 - 1))
def test_bisection_vote_equals_the_scan_down_the_chain(tree, seed):
    """The bisection (no cuts) and the node-by-node scan (infinite cuts) give the same node,
    and that node's subtree holds more than half the vote (or it is the root)."""
    rng = np.random.default_rng(seed)
    labels = rng.integers(0, tree.n_nodes, (40, 7))
    weights = rng.random((40, 7))
    fast = tree_vote(tree, labels, weights)
    scan = tree_vote(tree, labels, weights, distances=np.zeros((40, 7)), cut=np.full(tree.n_nodes, np.inf))
    assert fast.tolist() == scan.tolist()
    inside = (labels >= fast[:, None]) & (labels < tree.end[fast][:, None])
    assert np.all(((weights * inside).sum(axis=1) > weights.sum(axis=1) / 2) | (fast == ROOT))
