"""Cluster hierarchies: HDBSCAN's condensed tree as nested candidate slices.

A flat cut of HDBSCAN's hierarchy (excess of mass) often picks the leaves: a degradation
that cuts across classes comes out as one small cluster per class, and the cluster that
holds all of it is never proposed. slicefind keeps the whole condensed tree instead
(Campello, Moulavi & Sander 2013, section 3): every node is a candidate, and a parent
and its children compete the way a rule and its refinements do (`slices.find_slices`).

Representation: the nodes are numbered in depth-first preorder, node 0 is the root (every
point), so the subtree of node ``j`` is the contiguous id range ``j .. end[j] - 1`` and a
child's id is larger than its parent's. Each point carries one label, its *deepest* node
(the node it falls out of, 0 for a point that falls out of the root); it belongs to that
node and to every ancestor. Membership of node ``j`` is ``j <= label < end[j]``.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Tree", "ROOT", "condensed_tree", "single_node", "tree_vote", "subtree_rows",
           "subtree_sums"]

#: the root node: every point; a point labelled ROOT is in no cluster
ROOT = 0


@dataclass(frozen=True, repr=False)
class Tree:
    """A cluster hierarchy in depth-first preorder (node 0 is the root).

    Attributes
    ----------
    parent : (m,) int array
        Parent of each node; -1 for the root.
    end : (m,) int array
        One past the last node of each node's subtree.
    flat : (m,) int array
        The flat cluster (HDBSCAN's own selection, renumbered by decreasing size) a point
        whose deepest node is this node belongs to, or -1 (noise).
    ancestors : (m, depth + 1) int array
        Each node, then its parent, grandparent, ... up to the root, padded with -1.
    """

    parent: np.ndarray
    end: np.ndarray
    flat: np.ndarray
    ancestors: np.ndarray

    @classmethod
    def from_parents(cls, parent, flat=None) -> "Tree":
        """The tree of a preorder parent array (``parent[0] == -1``, ``parent[j] < j``).

        Examples
        --------
        >>> Tree.from_parents([-1, 0, 1, 0]).end.tolist()
        [4, 3, 3, 4]
        """
        parent = np.asarray(parent, dtype=np.int64)
        end = np.arange(1, parent.size + 1, dtype=np.int64)
        for j in range(parent.size - 1, 0, -1):
            end[parent[j]] = max(end[parent[j]], end[j])
        flat = np.full(parent.size, -1, dtype=np.int64) if flat is None else np.asarray(flat, dtype=np.int64)
        return cls(parent=parent, end=end, flat=flat, ancestors=_ancestors(parent))

    @property
    def n_nodes(self) -> int:
        return int(self.parent.size)

    def __repr__(self):
        return f"Tree(n_nodes={self.n_nodes}, depth={self.ancestors.shape[1] - 1})"


def _ancestors(parent: np.ndarray) -> np.ndarray:
    """(m, depth + 1) chains self, parent, ... root, padded with -1 (parents come first in
    preorder, so one pass in id order fills them)."""
    m = parent.size
    depth = np.zeros(m, dtype=np.int64)
    for j in range(1, m):
        depth[j] = depth[parent[j]] + 1
    out = np.full((m, int(depth.max(initial=0)) + 1), -1, dtype=np.int64)
    out[:, 0] = np.arange(m)
    for j in range(1, m):
        out[j, 1:depth[j] + 1] = out[parent[j], :depth[j]]
    return out


def single_node() -> Tree:
    """The tree of points that form no cluster: the root alone."""
    return Tree.from_parents([-1])


def condensed_tree(raw: np.ndarray, n_points: int, flat_labels: np.ndarray) -> tuple[np.ndarray, Tree]:
    """(deepest node of every point, Tree) from HDBSCAN's condensed tree.

    Parameters
    ----------
    raw : structured array
        ``hdbscan.HDBSCAN().condensed_tree_.to_numpy()``: fields ``parent, child,
        lambda_val, child_size``; children ``>= n_points`` are clusters, the others points.
    n_points : int
        Points clustered.
    flat_labels : (n_points,) int array
        HDBSCAN's flat labels (-1 noise), already renumbered by decreasing size; each flat
        cluster is the subtree of one node (the one it selected).

    References
    ----------
    .. [1] R. J. G. B. Campello, D. Moulavi and J. Sander, "Density-based clustering based
           on hierarchical density estimates", PAKDD 2013, LNCS 7819, 160-172.

    Examples
    --------
    A root (id 4) over four points with one child cluster (id 5) holding points 0-2:

    >>> raw = np.array([(4, 3, 0.5, 1), (4, 5, 0.5, 3), (5, 0, 1.0, 1), (5, 1, 1.0, 1),
    ...                 (5, 2, 1.0, 1)], dtype=[("parent", "i8"), ("child", "i8"),
    ...                 ("lambda_val", "f8"), ("child_size", "i8")])
    >>> deepest, tree = condensed_tree(raw, 4, np.array([0, 0, 0, -1]))
    >>> deepest.tolist(), tree.parent.tolist(), tree.flat.tolist()
    ([1, 1, 1, 0], [-1, 0], [-1, 0])
    """
    parent_id = np.asarray(raw["parent"], dtype=np.int64)
    child_id = np.asarray(raw["child"], dtype=np.int64)
    is_cluster = child_id >= n_points
    deepest_raw = np.full(n_points, -1, dtype=np.int64)
    points = ~is_cluster
    deepest_raw[child_id[points]] = parent_id[points]
    root = int(parent_id.min()) if parent_id.size else n_points
    deepest_raw[deepest_raw < 0] = root
    # children of each cluster node, largest first (ties: lower id), then preorder ids
    sizes = {int(c): int(s) for c, s in zip(child_id[is_cluster], np.asarray(raw["child_size"])[is_cluster])}
    kids: dict[int, list[int]] = {}
    for p, c in zip(parent_id[is_cluster], child_id[is_cluster]):
        kids.setdefault(int(p), []).append(int(c))
    order, parent, stack = [], [], [(root, -1)]
    while stack:
        node, up = stack.pop()
        order.append(node)
        parent.append(up)
        here = len(order) - 1
        below = sorted(kids.get(node, []), key=lambda c: (-sizes[c], c))
        stack += [(c, here) for c in reversed(below)]
    tree = Tree.from_parents(parent)
    parent, end, m = tree.parent, tree.end, tree.n_nodes
    lookup = np.full(int(max(order)) + 1, -1, dtype=np.int64)
    lookup[np.asarray(order)] = np.arange(m)
    deepest = lookup[deepest_raw]
    flat = np.full(m, -1, dtype=np.int64)
    for c in range(int(flat_labels.max(initial=-1)) + 1):
        own = deepest[flat_labels == c]
        # the selected node: the smallest subtree holding every point of the flat cluster
        node = int(own.min())
        while not (np.all(own >= node) and np.all(own < end[node])):
            node = int(parent[node])
        flat[node:end[node]] = c                   # selected subtrees are disjoint
    return deepest, Tree(parent=parent, end=end, flat=flat, ancestors=tree.ancestors)


def tree_vote(tree: Tree, labels: np.ndarray, weights: np.ndarray, *, distances=None,
              cut=None) -> np.ndarray:
    """For each query, the deepest node whose subtree holds more than half the vote.

    ``labels`` (b, k) are the deepest nodes of each query's k neighbours and ``weights``
    (b, k) their votes. The nodes holding a majority form one chain from the root (two
    disjoint subtrees cannot both hold more than half), so the deepest of them decides
    membership in every node. With ``distances`` (b, k) and ``cut`` (per node), a node is
    taken only when the query's nearest neighbour inside it is within its cut; otherwise
    the next node up the chain is tried. Returns node ids ((b,), `ROOT` when no cluster
    holds a majority).
    """
    b = labels.shape[0]
    total = weights.sum(axis=1)
    order = np.argsort(labels, axis=1, kind="stable")
    lab_sorted = np.take_along_axis(labels, order, axis=1)
    cum = np.cumsum(np.take_along_axis(weights, order, axis=1), axis=1)
    # the weighted median neighbour (in preorder) lies inside every majority subtree
    median = lab_sorted[np.arange(b), np.argmax(cum > total[:, None] / 2.0, axis=1)]
    chain = tree.ancestors[median]                        # (b, depth + 1), deepest first
    if distances is None:
        return _deepest_majority(tree, labels, weights, total, chain)
    out = np.full(b, ROOT, dtype=np.int64)
    done = np.zeros(b, dtype=bool)
    for d in range(chain.shape[1]):
        node = chain[:, d]
        valid = (node > ROOT) & ~done
        if not valid.any():
            continue
        safe = np.maximum(node, 0)
        inside = (labels >= safe[:, None]) & (labels < tree.end[safe][:, None])
        ok = valid & ((weights * inside).sum(axis=1) > total / 2.0)
        if distances is not None:
            nearest = np.where(inside, distances, np.inf).min(axis=1)
            ok &= nearest <= cut[safe]
        out[ok] = node[ok]
        done |= ok
    return out


def _deepest_majority(tree: Tree, labels, weights, total, chain) -> np.ndarray:
    """`tree_vote` without cuts, by bisection along each query's chain: a node's vote
    never exceeds its parent's, so the nodes holding a majority are a chain's upper part,
    and log2(depth) checks find where it begins."""
    b = labels.shape[0]
    rows = np.arange(b)
    length = (chain >= 0).sum(axis=1)              # the root is at length - 1
    lo, hi = np.zeros(b, dtype=np.int64), length - 1
    while True:
        open_ = lo < hi
        if not open_.any():
            break
        mid = (lo + hi) // 2
        node = chain[rows, mid]
        inside = (labels >= node[:, None]) & (labels < tree.end[node][:, None])
        major = (weights * inside).sum(axis=1) > total / 2.0
        hi = np.where(open_ & major, mid, hi)
        lo = np.where(open_ & ~major, mid + 1, lo)
    return chain[rows, lo]


def subtree_rows(tree: Tree, labels: np.ndarray) -> list[np.ndarray]:
    """Sorted rows of every node (index = node id; the root holds every row)."""
    order = np.argsort(labels, kind="stable")
    sorted_labels = labels[order]
    lo = np.searchsorted(sorted_labels, np.arange(tree.n_nodes), side="left")
    hi = np.searchsorted(sorted_labels, tree.end, side="left")
    return [np.sort(order[a:b]).astype(np.intp) for a, b in zip(lo, hi)]


def subtree_sums(tree: Tree, per_label: np.ndarray) -> np.ndarray:
    """Counts per node from counts per deepest label: ``per_label`` (..., m) -> (..., m),
    node j summing labels j .. end[j] - 1."""
    cum = np.concatenate([np.zeros(per_label.shape[:-1] + (1,), dtype=per_label.dtype),
                          np.cumsum(per_label, axis=-1)], axis=-1)
    return cum[..., tree.end] - cum[..., :tree.n_nodes]
