"""Metadata columns -> boolean items, packed as bitsets over all rows and over error rows.

An item is one condition on one column: ``scanner = S3``, ``scanner is rare (4 values)``,
``glare is missing``, ``belt_speed >= 2.1``, ``0.5 <= exposure < 0.8``,
``hour of scanned_at = 14``. Numeric cut points come from quantiles and from a shallow
decision tree fitted on the error flag of that column alone, so a threshold lands where
the error rate actually changes; every cut is then moved to the shortest decimal that
splits the data in exactly the same place, which keeps descriptions readable.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from slicefind.discovery import bitset
from slicefind.stats import fisher_greater
from slicefind.discovery.table import CATEGORICAL, DATETIME, EvalTable, NUMERIC
from slicefind.values import value_text

__all__ = ["Item", "ItemSet", "build_items", "readable_cut", "WEEKDAYS"]

WEEKDAYS = ("Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun")


@dataclass(frozen=True)
class Item:
    """One boolean condition on one column.

    ``op`` is one of ``"="``, ``"rare"`` (one of the values too rare to stand alone),
    ``"missing"``, ``">="``, ``"<"``, ``"range"`` (``low <= x < high``), and for
    datetime columns ``"hour"`` and ``"weekday"``.
    """

    column: str
    op: str
    value: Any
    text: str

    def __str__(self):
        return self.text


@dataclass(frozen=True, repr=False)
class ItemSet:
    """Items of one eval table with their packed bitsets."""

    items: tuple[Item, ...]
    column_of: np.ndarray   # (m,) int: index of each item's column in `columns`
    columns: tuple[str, ...]
    bits: np.ndarray        # (m, W) uint64 over all rows
    error_bits: np.ndarray  # (m, W_err) uint64 over error rows only
    n_rows: np.ndarray      # (m,) rows per item
    n_errors: np.ndarray    # (m,) errors per item

    def __len__(self):
        return len(self.items)

    def __repr__(self):
        return f"ItemSet(n_items={len(self.items)}, n_columns={len(self.columns)})"


def readable_cut(low: float, high: float) -> float:
    """The shortest decimal ``r`` with ``low < r <= high``.

    ``x >= r`` then selects exactly the values ``>= high`` when no value lies strictly
    between ``low`` and ``high``: the split is unchanged, only its text is shorter.

    Examples
    --------
    >>> readable_cut(2.0834, 2.1172)
    2.1
    >>> readable_cut(99.0, 150.0)
    100.0
    >>> readable_cut(-0.31, -0.29)
    -0.3
    """
    if not low < high:
        return float(high)
    span = max(abs(low), abs(high), 1e-300)
    for exponent in range(math.floor(math.log10(span)) + 1, -16, -1):   # coarse to fine
        step = 10.0 ** exponent
        candidate = math.floor(high / step) * step
        if candidate > high:            # float noise in the division
            candidate -= step
        if candidate > low:
            cleaned = round(candidate, max(0, -exponent))
            return float(cleaned if low < cleaned <= high else candidate)
    return float(high)


def _fmt(x: float) -> str:
    """Shortest text of a float cut point."""
    return f"{x:.12g}"


class ItemBuilder:
    """Collects items and packs their masks (all-row and error-row bitsets)."""

    def __init__(self, errors: np.ndarray, min_rows: int, min_errors: int):
        self.errors = errors
        self.min_rows = min_rows
        self.min_errors = min_errors
        self.items: list[Item] = []
        self.cols: list[int] = []
        self.seen: dict[tuple[int, int, int], list[int]] = {}
        self.bits: list[np.ndarray] = []
        self.error_bits: list[np.ndarray] = []
        self.n_rows: list[int] = []
        self.n_errors: list[int] = []

    def wanted(self, n_rows: int, n_errors: int, n_total: int) -> bool:
        """Whether an item with these counts can be part of any rule."""
        return self.min_rows <= n_rows < n_total and n_errors >= self.min_errors

    def add(self, item: Item, column_index: int, mask: np.ndarray,
            error_mask: np.ndarray | None = None) -> None:
        """Keep `item` unless it is too small or repeats the rows of an item of its column.

        `error_mask` (the mask restricted to error rows) may be passed when cheaper to get.
        """
        n_rows = int(np.count_nonzero(mask))
        if error_mask is None:
            error_mask = mask[self.errors]
        n_errors = int(np.count_nonzero(error_mask))
        if not self.wanted(n_rows, n_errors, mask.size):
            return
        packed = bitset.pack(mask)[0]
        if self._keep(item, column_index, n_rows, n_errors, packed,
                      lambda j: np.array_equal(self.bits[j], packed)):
            self.bits.append(packed)
            self.error_bits.append(bitset.pack(error_mask)[0])

    def add_counted(self, item: Item, column_index: int, n_rows: int, n_errors: int,
                    n_total: int, signature, payload) -> bool:
        """`add` for engines that count elsewhere: `signature` decides identical rows
        (equal signatures = equal rows) and `payload` is kept in place of the bitsets."""
        if not self.wanted(n_rows, n_errors, n_total):
            return False
        if self._keep(item, column_index, n_rows, n_errors, signature,
                      lambda j: self.bits[j][0] == signature):
            self.bits.append((signature, payload))
            self.error_bits.append(None)
            return True
        return False

    def _keep(self, item, column_index, n_rows, n_errors, signature, same) -> bool:
        key = (column_index, n_rows, n_errors)
        for j in self.seen.get(key, []):       # identical rows: keep the first (simplest) text
            if same(j):
                return False
        self.seen.setdefault(key, []).append(len(self.items))
        self.items.append(item)
        self.cols.append(column_index)
        self.n_rows.append(n_rows)
        self.n_errors.append(n_errors)
        return True

    def reorder(self, order: np.ndarray) -> None:
        """Put the items in `order` (a permutation)."""
        for name in ("items", "cols", "bits", "error_bits", "n_rows", "n_errors"):
            values = getattr(self, name)
            setattr(self, name, [values[i] for i in order])


#: numeric cut points are also sought inside the rows of this many worst categorical items
CONDITIONAL_ITEMS = 5


def _worst_items(builder, errors: np.ndarray, top: int) -> list[np.ndarray]:
    """Masks of the `top` items with the most excess errors that are clearly worse than the rest."""
    if not builder.items:
        return []
    n_rows, n_errors = np.asarray(builder.n_rows), np.asarray(builder.n_errors)
    total, bad = errors.size, int(errors.sum())
    excess = n_errors - n_rows * bad / total
    p = np.atleast_1d(fisher_greater(n_errors, n_rows, bad, total))
    ranked = [i for i in np.argsort(-excess, kind="stable") if p[i] < 1e-3 and excess[i] > 0][:top]
    return [bitset.unpack(builder.bits[i][None, :], total)[0] for i in ranked]


def categorical_items(column: str, uniques, counts: np.ndarray, min_rows: int):
    """The candidate items of a categorical column, in order: (Item, codes it selects).

    `uniques` are the column's distinct values in ``pd.factorize(sort=True)`` order and
    `counts` their rows; code -1 stands for missing (always a candidate: it is dropped
    later if no row is missing).
    """
    out = []
    rare = [k for k in range(len(uniques)) if counts[k] < min_rows]
    for k in range(len(uniques)):
        if counts[k] >= min_rows:
            value = uniques[k]
            out.append((Item(column, "=", value, f"{column} = {value_text(value)}"), (k,)))
    if len(rare) >= 2:
        values = tuple(uniques[k] for k in rare)
        shown = ", ".join(value_text(v) for v in values[:3])
        more = f", … {len(values)} values" if len(values) > 3 else ""
        out.append((Item(column, "rare", values, f"{column} in {{{shown}{more}}}"), tuple(rare)))
    out.append((Item(column, "missing", None, f"{column} is missing"), (-1,)))
    return out


def code_mask(codes: np.ndarray, selected: tuple[int, ...]) -> np.ndarray:
    """Rows whose code is in `selected`."""
    return codes == selected[0] if len(selected) == 1 else np.isin(codes, selected)


def _categorical_items(builder, column, index, series, min_rows):
    codes, uniques = pd.factorize(series, sort=True, use_na_sentinel=True)
    codes = codes.astype(np.int32, copy=False)
    error_codes = codes[builder.errors]
    counts = np.bincount(codes[codes >= 0], minlength=len(uniques))
    error_counts = np.bincount(error_codes[error_codes >= 0], minlength=len(uniques))
    n_missing, e_missing = int((codes < 0).sum()), int((error_codes < 0).sum())
    for item, selected in categorical_items(column, uniques, counts, min_rows):
        if item.op == "=":       # skip building masks that cannot be kept
            k = selected[0]
            if not builder.wanted(int(counts[k]), int(error_counts[k]), codes.size):
                continue
        if item.op == "missing" and not builder.wanted(n_missing, e_missing, codes.size):
            continue
        builder.add(item, index, code_mask(codes, selected), code_mask(error_codes, selected))


def _split_score(n_left, e_left, n_node, e_node):
    """Gini purity of a binary split (larger is better): sum over sides of (e² + c²) / n."""
    n_right, e_right = n_node - n_left, e_node - e_left
    c_left, c_right = n_left - e_left, n_right - e_right
    with np.errstate(divide="ignore", invalid="ignore"):
        return (e_left ** 2 + c_left ** 2) / n_left + (e_right ** 2 + c_right ** 2) / n_right


def _round_cut(xs: np.ndarray, pos: int, accept) -> float:
    """The coarsest decimal cut whose split position `accept` allows, else the exact one.

    ``xs`` is sorted; the exact split puts ``xs[:pos]`` below the cut.
    """
    low, high = float(xs[pos - 1]), float(xs[pos])
    middle = (low + high) / 2.0
    span = max(abs(low), abs(high), 1e-300)
    for exponent in range(math.floor(math.log10(span)) + 1, -16, -1):
        step = 10.0 ** exponent
        options = {round(math.floor(middle / step) * step, max(0, -exponent)),
                   round(math.ceil(middle / step) * step, max(0, -exponent))}
        moved = sorted((abs(int(np.searchsorted(xs, r, side="left")) - pos), r) for r in options)
        for _, r in moved:
            if accept(int(np.searchsorted(xs, r, side="left"))):
                return float(r)
        if step < (high - low):      # finer steps only find cuts inside the exact gap
            break
    return readable_cut(low, high)


def _tree_cuts(xs: np.ndarray, errs: np.ndarray, min_leaf: int, depth: int) -> list[float]:
    """Error-aware cut points: a depth-`depth` binary tree on sorted x (best Gini split per
    node), keeping only splits whose two sides differ in error rate (two-sided Fisher
    p < 0.001 within the node) and rounding each to the coarsest decimal that keeps 98% of
    the split's Gini gain."""
    n = xs.size
    cum = np.concatenate([[0], np.cumsum(errs, dtype=np.int64)])
    distinct = np.concatenate([[False], xs[1:] > xs[:-1]])      # a split may fall before i
    cuts: list[float] = []
    nodes = [(0, n, 0)]
    while nodes:
        lo, hi, level = nodes.pop()
        if level >= depth or hi - lo < 2 * min_leaf:
            continue
        positions = np.arange(lo + min_leaf, hi - min_leaf + 1)
        positions = positions[distinct[positions]] if positions.size else positions
        if positions.size == 0:
            continue
        n_node, e_node = hi - lo, int(cum[hi] - cum[lo])
        if e_node == 0 or e_node == n_node:
            continue
        scores = _split_score(positions - lo, cum[positions] - cum[lo], n_node, e_node)
        best = int(positions[int(np.argmax(scores))])
        n_left, e_left = best - lo, int(cum[best] - cum[lo])
        p = 2.0 * min(fisher_greater(e_left, n_left, e_node, n_node),
                      fisher_greater(e_node - e_left, n_node - n_left, e_node, n_node))
        if p >= 1e-3:
            continue
        base = (e_node ** 2 + (n_node - e_node) ** 2) / n_node
        gain = float(scores.max()) - base

        def accept(pos, lo=lo, hi=hi, n_node=n_node, e_node=e_node, base=base, gain=gain):
            if pos - lo < min_leaf or hi - pos < min_leaf:
                return False
            got = _split_score(pos - lo, cum[pos] - cum[lo], n_node, e_node) - base
            return got >= 0.98 * gain

        cuts.append(_round_cut(xs, best, accept))
        nodes += [(lo, best, level + 1), (best, hi, level + 1)]
    return sorted(cuts)


def _conditional_cuts(x: np.ndarray, errors: np.ndarray, within: list[np.ndarray],
                      min_rows: int) -> set[float]:
    """Error-aware cuts of `x` inside the rows of each mask in `within` (one split each).

    A threshold that matters on one scanner only (``scanner = S3 and belt_speed >= 2.2``)
    is blurred in the column's overall error rate; splitting inside the rows of the
    items that err most finds it where it is.
    """
    cuts: set[float] = set()
    for mask in within:
        keep = mask & ~np.isnan(x)
        if keep.sum() < 2 * min_rows:
            continue
        order = np.argsort(x[keep], kind="stable")
        cuts.update(_tree_cuts(x[keep][order], errors[keep][order], min_rows, 1))
    return cuts


def numeric_cuts(x: np.ndarray, errors: np.ndarray, *, min_rows: int, n_bins: int, depth: int,
                 within=()) -> list[float]:
    """Cut points of one numeric column: quantiles, error-aware splits, splits inside `within`."""
    present = ~np.isnan(x)
    order = np.argsort(x[present], kind="stable")
    xs = x[present][order]
    if xs.size < 2:
        return []
    cuts = set()
    if n_bins > 1:
        tolerance = max(1, int(0.01 * xs.size))   # a quantile may move by 1% of rows to read well
        for q in np.arange(1, n_bins) / n_bins:
            pos = int(np.searchsorted(xs, np.quantile(xs, q), side="left"))
            if 0 < pos < xs.size and xs[pos - 1] < xs[pos]:
                cuts.add(_round_cut(xs, pos, lambda p, pos=pos: abs(p - pos) <= tolerance
                                    and 0 < p < xs.size))
    if depth > 0:
        min_leaf = max(min_rows, xs.size // 100)
        cuts.update(_tree_cuts(xs, errors[present][order], min_leaf, depth))
        cuts.update(_conditional_cuts(x, errors, list(within), min_rows))
    return sorted(cuts)


def numeric_masks(column: str, x: np.ndarray, cuts):
    """(Item, mask) of a numeric column's candidates for the given cut points, in order."""
    present = ~np.isnan(x)
    for cut in cuts:
        yield Item(column, "<", cut, f"{column} < {_fmt(cut)}"), present & (x < cut)
        yield Item(column, ">=", cut, f"{column} >= {_fmt(cut)}"), present & (x >= cut)
    for low, high in zip(cuts[:-1], cuts[1:]):
        yield (Item(column, "range", (low, high), f"{_fmt(low)} <= {column} < {_fmt(high)}"),
               present & (x >= low) & (x < high))
    yield Item(column, "missing", None, f"{column} is missing"), ~present


def numeric_values(series: pd.Series) -> np.ndarray:
    """A numeric (or timedelta) column as float64 with NaN for missing."""
    values = series.dt.total_seconds() if pd.api.types.is_timedelta64_dtype(series.dtype) else series
    return pd.to_numeric(pd.Series(values), errors="coerce").to_numpy(dtype=np.float64,
                                                                       na_value=np.nan)


def datetime_masks(column: str, series: pd.Series):
    """(Item, mask) of a datetime column: hour of day, weekday, missing."""
    stamps = pd.to_datetime(series)
    present = stamps.notna().to_numpy()
    hours = stamps.dt.hour.to_numpy(dtype=np.float64, na_value=np.nan)
    days = stamps.dt.day_of_week.to_numpy(dtype=np.float64, na_value=np.nan)
    for h in range(24):
        yield Item(column, "hour", h, f"hour of {column} = {h}"), hours == h
    for d in range(7):
        yield Item(column, "weekday", d, f"weekday of {column} = {WEEKDAYS[d]}"), days == d
    yield Item(column, "missing", None, f"{column} is missing"), ~present


def build_items(table: EvalTable, *, min_rows: int, min_errors: int = 1, n_bins: int = 4,
                tree_depth: int = 2) -> ItemSet:
    """Items of every mined column, keeping those with >= `min_rows` rows and >= `min_errors` errors.

    Items that cover every row, and items whose rows equal an earlier item of the same
    column, are dropped. Assumes a validated `EvalTable`.
    """
    builder = ItemBuilder(table.errors, min_rows, min_errors)
    columns = tuple(table.kinds)
    numeric = [c for c in columns if table.kinds[c] == NUMERIC]
    for index, column in enumerate(columns):      # categories and dates first ...
        kind = table.kinds[column]
        if kind == CATEGORICAL:
            _categorical_items(builder, column, index, table.data[column], min_rows)
        elif kind == DATETIME:
            for item, mask in datetime_masks(column, table.data[column]):
                builder.add(item, index, mask)
    within = _worst_items(builder, table.errors, CONDITIONAL_ITEMS) if tree_depth > 0 else []
    for column in numeric:                         # ... so numeric cuts can look inside them
        x = numeric_values(table.data[column])
        cuts = numeric_cuts(x, table.errors, min_rows=min_rows, n_bins=n_bins, depth=tree_depth,
                            within=within)
        for item, mask in numeric_masks(column, x, cuts):
            builder.add(item, columns.index(column), mask)
    order = np.argsort(np.asarray(builder.cols, dtype=np.int64), kind="stable")   # column order
    builder.reorder(order)
    n_err = int(table.errors.sum())
    empty_all = np.zeros((0, bitset.n_words(table.n_rows)), dtype=np.uint64)
    empty_err = np.zeros((0, bitset.n_words(n_err)), dtype=np.uint64)
    return ItemSet(
        items=tuple(builder.items),
        column_of=np.asarray(builder.cols, dtype=np.int64),
        columns=columns,
        bits=np.stack(builder.bits) if builder.bits else empty_all,
        error_bits=np.stack(builder.error_bits) if builder.error_bits else empty_err,
        n_rows=np.asarray(builder.n_rows, dtype=np.int64),
        n_errors=np.asarray(builder.n_errors, dtype=np.int64),
    )
