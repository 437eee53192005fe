"""Levelwise search for rules (conjunctions of items) with enough rows and errors.

The search is Apriori's: level L+1 candidates join two level-L rules that share their
first L-1 items, and a candidate survives only when every L-item subset survived. Both
thresholds are anti-monotone: an error count is counted first on bitsets over the
error rows alone (about 1/12 of the words at an 8% error rate), and only candidates
with at least ``min_errors`` errors are counted over all rows for ``min_rows``. Two
items of one column never share a rule.

Two engines produce the same rules and counts: ``"bitset"`` (the packed kernel in
`bitset`) and ``"mlxtend"`` (mlxtend's FP-growth on the error rows, then numpy counts
over all rows), kept as the reference the tests and benchmarks compare against.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from slicefind.discovery import bitset
from slicefind.discovery.items import ItemSet
from slicefind.stats import fisher_greater

__all__ = ["RuleCounts", "search_rules", "search_levels", "ENGINES", "refinement_pvalues", "fold_into_refinements",
           "rule_bits"]

ENGINES = ("bitset", "mlxtend")


@dataclass(frozen=True, repr=False)
class RuleCounts:
    """Every rule that met the thresholds, level by level, in lexicographic item order."""

    levels: tuple[np.ndarray, ...]      # levels[L-1]: (R_L, L) item indices
    n_rows: tuple[np.ndarray, ...]      # per level, rows of each rule
    n_errors: tuple[np.ndarray, ...]    # per level, errors of each rule
    words_touched: int = 0              # bitset words the counting kernel read (for the bound)
    candidates: tuple[int, ...] = field(default=())   # candidates generated per level

    @property
    def n_rules(self) -> int:
        return int(sum(len(level) for level in self.levels))

    def __repr__(self):
        return f"RuleCounts(n_rules={self.n_rules}, per_level={[len(x) for x in self.levels]})"


def _encode(rules: np.ndarray, base: int) -> np.ndarray:
    """Mixed-radix int64 code of each rule (row of item indices)."""
    code = np.zeros(rules.shape[0], dtype=np.int64)
    for j in range(rules.shape[1]):
        code = code * base + rules[:, j]
    return code


def _join(level: np.ndarray, column_of: np.ndarray, base: int):
    """Apriori join + prune of a lexicographically sorted level: (u, ext) per candidate.

    A candidate is ``level[u] + (ext,)``; candidates come out sorted lexicographically.
    """
    s, width = level.shape
    if s < 2:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    if width == 1:
        run_end = np.full(s, s, dtype=np.int64)
    else:
        keys = _encode(level[:, :-1], base)
        change = np.flatnonzero(np.diff(keys)) + 1
        ends = np.append(change, s)
        starts = np.insert(change, 0, 0)
        run_end = np.repeat(ends, ends - starts)
    counts = run_end - np.arange(s) - 1
    total = int(counts.sum())
    if total == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    u = np.repeat(np.arange(s, dtype=np.int64), counts)
    first = np.repeat(np.cumsum(counts) - counts, counts)
    v = u + 1 + (np.arange(total, dtype=np.int64) - first)
    last_u, last_v = level[u, -1], level[v, -1]
    ok = column_of[last_u] != column_of[last_v]
    u, v, ext = u[ok], v[ok], last_v[ok]
    if width >= 2 and u.size:
        # every subset that drops one of the first `width` - 1 items must be a rule too
        known = np.sort(_encode(level, base))
        cand = np.concatenate([level[u], ext[:, None]], axis=1)
        keep = np.ones(u.size, dtype=bool)
        for drop in range(width - 1):
            sub = np.delete(cand, drop, axis=1)
            code = _encode(sub, base)
            pos = np.searchsorted(known, code)
            keep &= (pos < known.size) & (known[np.minimum(pos, known.size - 1)] == code)
        u, ext = u[keep], ext[keep]
    return u, ext


def _offsets(u: np.ndarray, n_prefix: int) -> np.ndarray:
    """CSR offsets of sorted prefix indices `u` over `n_prefix` prefixes."""
    return np.concatenate([[0], np.cumsum(np.bincount(u, minlength=n_prefix))]).astype(np.int64)


def search_levels(n_rows: np.ndarray, n_errors: np.ndarray, column_of: np.ndarray, *,
                  max_terms: int, min_rows: int, min_errors: int, count_errors, count_rows,
                  words_per_count=(0, 0)) -> RuleCounts:
    """The levelwise search, whatever does the counting.

    ``count_errors(prefixes, offsets, extensions)`` and ``count_rows(...)`` return the
    error and row counts of each candidate ``prefix + (extension,)`` (see
    `bitset.count_extensions`); the in-memory engine counts packed bitsets, the Dask
    engine sums the same kernel over partitions. Pruning and joining stay here, so both
    give identical rules and counts.
    """
    base = max(2, len(n_rows))
    level = np.arange(len(n_rows), dtype=np.int64)[:, None]
    keep = (n_rows >= min_rows) & (n_errors >= min_errors)
    levels, rows, errs = [level[keep]], [n_rows[keep]], [n_errors[keep]]
    words = 0
    generated = [int(len(n_rows))]
    for _ in range(2, max_terms + 1):
        current = levels[-1]
        u, ext = _join(current, column_of, base)
        generated.append(int(u.size))
        if u.size == 0:
            break
        n_err = count_errors(current, _offsets(u, len(current)), ext)
        words += int(u.size) * words_per_count[0]
        ok = n_err >= min_errors
        u, ext, n_err = u[ok], ext[ok], n_err[ok]
        n_row = count_rows(current, _offsets(u, len(current)), ext)
        words += int(u.size) * words_per_count[1]
        ok = n_row >= min_rows
        u, ext, n_err, n_row = u[ok], ext[ok], n_err[ok], n_row[ok]
        if u.size == 0:
            break
        levels.append(np.concatenate([current[u], ext[:, None]], axis=1))
        rows.append(n_row)
        errs.append(n_err)
    return RuleCounts(tuple(levels), tuple(rows), tuple(errs), words, tuple(generated))


def _search_bitset(items: ItemSet, max_terms: int, min_rows: int, min_errors: int, kernel: str):
    """Levelwise search over the packed item bitsets; see the module docstring."""
    def count_errors(prefixes, offsets, extensions):
        return bitset.count_extensions(items.error_bits, prefixes, offsets, extensions, engine=kernel)

    def count_rows(prefixes, offsets, extensions):
        return bitset.count_extensions(items.bits, prefixes, offsets, extensions, engine=kernel)

    return search_levels(items.n_rows, items.n_errors, items.column_of, max_terms=max_terms,
                         min_rows=min_rows, min_errors=min_errors, count_errors=count_errors,
                         count_rows=count_rows,
                         words_per_count=(items.error_bits.shape[1], items.bits.shape[1]))


def _search_mlxtend(items: ItemSet, max_terms: int, min_rows: int, min_errors: int, n_errors: int):
    """Reference engine: mlxtend FP-growth on the error rows, numpy counts over all rows."""
    import pandas as pd
    from mlxtend.frequent_patterns import fpgrowth

    m = len(items)
    if m == 0 or min_errors > n_errors:
        return RuleCounts((np.zeros((0, 1), np.int64),), (np.zeros(0, np.int64),),
                          (np.zeros(0, np.int64),), 0, ())
    error_masks = bitset.unpack(items.error_bits, n_errors).T
    onehot = pd.DataFrame(error_masks, columns=list(range(m)))
    found = fpgrowth(onehot, min_support=min_errors / n_errors, max_len=max_terms,
                     use_colnames=True)
    by_level: dict[int, list[tuple[int, ...]]] = {}
    for itemset in found["itemsets"]:
        terms = tuple(sorted(int(i) for i in itemset))
        cols = items.column_of[list(terms)]
        if len(set(cols.tolist())) == len(terms):
            by_level.setdefault(len(terms), []).append(terms)
    levels, rows, errs = [], [], []
    for width in range(1, max_terms + 1):
        rules = sorted(by_level.get(width, []))
        if not rules:
            break
        arr = np.asarray(rules, dtype=np.int64).reshape(-1, width)
        masks_all = rule_bits(items.bits, arr)
        masks_err = rule_bits(items.error_bits, arr)
        n_row, n_err = bitset.popcount(masks_all), bitset.popcount(masks_err)
        ok = n_row >= min_rows
        if not ok.any():
            break
        levels.append(arr[ok]), rows.append(n_row[ok]), errs.append(n_err[ok])
        if width >= 2:     # anti-monotone: a rule whose parent failed min_rows is dropped too
            known = np.sort(_encode(levels[-2], max(2, m)))
            keep = np.ones(len(levels[-1]), dtype=bool)
            for drop in range(width):
                code = _encode(np.delete(levels[-1], drop, axis=1), max(2, m))
                pos = np.searchsorted(known, code)
                keep &= (pos < known.size) & (known[np.minimum(pos, known.size - 1)] == code)
            levels[-1], rows[-1], errs[-1] = levels[-1][keep], rows[-1][keep], errs[-1][keep]
    return RuleCounts(tuple(levels), tuple(rows), tuple(errs), 0, ())


def rule_bits(bits: np.ndarray, rules: np.ndarray) -> np.ndarray:
    """AND of the item bitsets of each rule: (R, W) words."""
    out = bits[rules[:, 0]].copy()
    for j in range(1, rules.shape[1]):
        out &= bits[rules[:, j]]
    return out


def search_rules(items: ItemSet, *, max_terms: int, min_rows: int, min_errors: int,
                 n_errors: int, engine: str = "bitset", kernel: str = "auto") -> RuleCounts:
    """All rules of up to `max_terms` items with >= `min_rows` rows and >= `min_errors` errors.

    Assumes validated arguments (`find_slices` checks them).
    """
    if engine == "mlxtend":
        return _search_mlxtend(items, max_terms, min_rows, min_errors, n_errors)
    return _search_bitset(items, max_terms, min_rows, min_errors, kernel)


class _LevelIndex:
    """Finds rules by their items: per level, the sorted mixed-radix codes."""

    def __init__(self, levels, base: int):
        self.base = base
        self.codes = []
        self.order = []
        for level in levels:
            codes = _encode(level, base)
            order = np.argsort(codes, kind="stable")
            self.codes.append(codes[order])
            self.order.append(order)

    def find(self, rules: np.ndarray) -> np.ndarray:
        """Index of each rule (row of items) within its level; all must exist."""
        width = rules.shape[1]
        pos = np.searchsorted(self.codes[width - 1], _encode(rules, self.base))
        return self.order[width - 1][pos]


def refinement_pvalues(counts: RuleCounts, n_items: int,
                       evaluate: tuple[np.ndarray, ...] | None = None) -> tuple[np.ndarray, ...]:
    """Per level, the largest one-sided Fisher p-value of a rule against each of its parents.

    Within a parent's rows, the test asks whether the rule's rows err more often than
    the parent's other rows. Level-1 rules get 0 (their parent is the whole table and
    is tested by the main p-value). A rule with the same rows as a parent gets 1. With
    `evaluate` (per-level masks), only those rules are tested and the rest get NaN.
    """
    index = _LevelIndex(counts.levels, max(2, n_items))
    out = [np.zeros(len(counts.levels[0]))]
    for width in range(2, len(counts.levels) + 1):
        rules = counts.levels[width - 1]
        pick = np.arange(len(rules)) if evaluate is None else np.flatnonzero(evaluate[width - 1])
        k, r = counts.n_errors[width - 1][pick], counts.n_rows[width - 1][pick]
        worst = np.zeros(pick.size)
        for drop in range(width):
            idx = index.find(np.delete(rules[pick], drop, axis=1))
            kp, rp = counts.n_errors[width - 2][idx], counts.n_rows[width - 2][idx]
            p = np.where(rp > r, fisher_greater(k, r, kp, rp), 1.0) if pick.size else worst
            worst = np.maximum(worst, p)
        level = np.full(len(rules), np.nan)
        level[pick] = worst
        out.append(level)
    return tuple(out)


def fold_into_refinements(counts: RuleCounts, shown: tuple[np.ndarray, ...], n_items: int,
                          total_rows: int, total_errors: int, alpha: float):
    """Which shown rules are explained by a shown refinement.

    A rule P is folded into a refinement R (one more item, also shown) when P's rows
    outside R are not significantly worse than the rows outside P (one-sided Fisher,
    level `alpha`). Among several such R the one with most excess errors wins; folding
    follows chains to the deepest refinement. Returns, per level, the (level, index) of
    the rule each rule folds into, or (-1, -1).
    """
    index = _LevelIndex(counts.levels, max(2, n_items))
    target = [np.full((len(level), 2), -1, dtype=np.int64) for level in counts.levels]
    rate = total_errors / total_rows
    for width in range(len(counts.levels), 1, -1):
        show = np.flatnonzero(shown[width - 1])
        if show.size == 0:
            continue
        rules = counts.levels[width - 1][show]
        subsets = np.stack([np.delete(rules, d, axis=1) for d in range(width)], axis=1)
        parent = index.find(subsets.reshape(-1, width - 1))
        child = np.repeat(show, width)
        ok = shown[width - 2][parent]
        child, parent = child[ok], parent[ok]
        k_r, r_r = counts.n_errors[width - 1][child], counts.n_rows[width - 1][child]
        k_p, r_p = counts.n_errors[width - 2][parent], counts.n_rows[width - 2][parent]
        outside = np.atleast_1d(fisher_greater(k_p - k_r, r_p - r_r, total_errors - k_r,
                                               total_rows - r_r))
        ok = outside > alpha
        child, parent = child[ok], parent[ok]
        excess = k_r[ok] - r_r[ok] * rate
        order = np.lexsort((child, -excess, parent))
        parent, child = parent[order], child[order]
        first = np.concatenate([[True], parent[1:] != parent[:-1]]) if parent.size else parent
        for j, i in zip(parent[first], child[first]):
            final = (width - 1, int(i))
            while target[final[0]][final[1], 0] >= 0:
                final = tuple(target[final[0]][final[1]])
            target[width - 2][j] = final
    return target
