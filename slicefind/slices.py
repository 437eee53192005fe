"""Slices: the record every source produces, ranking, de-duplication, and `find_slices`.

Rules (from `rules`) and clusters (from `clusters`) become `Slice` records scored by the
one scorer in `stats`; Benjamini–Hochberg runs once over every candidate tested, from
every source; the table then shows the passing slices ranked by excess errors.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from slicefind import bitset
from slicefind.items import ItemSet, build_items
from slicefind.rules import (ENGINES, RuleCounts, fold_into_refinements, refinement_pvalues,
                             rule_bits, search_rules)
from slicefind.stats import SCORE_COLUMNS, bh_qvalues, score_slices
from slicefind.table import EvalTable, SlicefindTypeError, SlicefindValueError, build_eval_table

__all__ = ["Slice", "FoundSlices", "find_slices", "TABLE_COLUMNS", "default_min_rows",
           "jaccard"]

#: the contract's columns of `FoundSlices.table`, in order (extra columns follow)
TABLE_COLUMNS = ("slice_id", "source", "description") + SCORE_COLUMNS + ("q_value",)
SOURCES = ("rule", "region", "error_mode")


@dataclass(frozen=True, repr=False)
class Slice:
    """One candidate from any source, before ranking.

    ``rows`` are sorted positions among the analysed rows of the `EvalTable`.
    """

    source: str
    description: str
    rows: np.ndarray
    n_terms: int = 0
    key: str = ""                    # stable identity within its source (rule items, cluster label)
    extra: Mapping[str, Any] = field(default_factory=dict)

    def __repr__(self):
        return f"Slice({self.source}, {self.description!r}, n_rows={self.rows.size})"


def jaccard(a: np.ndarray, b: np.ndarray) -> float:
    """|A ∩ B| / |A ∪ B| of two sorted row arrays; 0.0 when both are empty.

    Examples
    --------
    >>> jaccard(np.array([0, 1, 2, 3]), np.array([2, 3, 4]))
    0.4
    """
    union = np.union1d(a, b).size
    return 0.0 if union == 0 else np.intersect1d(a, b, assume_unique=True).size / union


def default_min_rows(n_rows: int) -> int:
    """0.5% of the rows, but never fewer than 20 (nor more than the table).

    A slice holding 0.5% of the rows, and at least 20 rows, can always be found.

    Examples
    --------
    >>> default_min_rows(1_000), default_min_rows(100_000), default_min_rows(1_000_000)
    (20, 500, 5000)
    """
    return int(min(n_rows, max(20, math.floor(0.005 * n_rows))))


@dataclass(frozen=True, repr=False)
class FoundSlices:
    """Slices proposed by `find_slices`, best first.

    Attributes
    ----------
    table : DataFrame
        The slices that pass ``fdr``, ranked by excess errors (largest first); columns
        ``slice_id, source, description, n_rows, n_errors, error_rate, ci_low, ci_high,
        lift, excess_errors, error_share, p_value, q_value``, then ``n_terms``,
        ``aliases`` (other descriptions of the same rows) and ``folded`` (broader rules
        whose excess this slice explains).
    tested : DataFrame
        Every candidate tested, passing or not, with ``passed`` and, for rules,
        ``worse_than_parents`` and ``folded_into``.
    eval_table : EvalTable
        The validated input (errors, labels, predictions, kinds of columns).
    skipped : dict
        Columns not mined, with the reason.
    params : dict
        The options used.
    """

    table: pd.DataFrame
    tested: pd.DataFrame
    eval_table: EvalTable
    params: Mapping[str, Any]
    _rows: Mapping[str, np.ndarray]
    extras: Mapping[str, Any] = field(default_factory=dict)

    @property
    def skipped(self) -> dict[str, str]:
        return dict(self.eval_table.skipped)

    @property
    def n_rows(self) -> int:
        return self.eval_table.n_rows

    @property
    def n_errors(self) -> int:
        return self.eval_table.n_errors

    @property
    def error_rate(self) -> float:
        return self.eval_table.error_rate

    def rows(self, slice_id: str) -> np.ndarray:
        """Sorted positional indices (into the user's frame) of the rows in `slice_id`."""
        if slice_id not in self._rows:
            known = ", ".join(list(self._rows)[:8])
            msg = f"slice_id={slice_id!r} is not in this result; known ids: {known or 'none'}."
            raise SlicefindValueError(msg)
        return self._rows[slice_id].copy()

    def overlap(self) -> pd.DataFrame:
        """Pairwise Jaccard similarity of the slices' rows (square DataFrame by slice_id)."""
        ids = list(self.table["slice_id"])
        out = np.eye(len(ids))
        for i in range(len(ids)):
            for j in range(i + 1, len(ids)):
                out[i, j] = out[j, i] = jaccard(self._rows[ids[i]], self._rows[ids[j]])
        return pd.DataFrame(out, index=ids, columns=ids)

    def __repr__(self):
        return f"FoundSlices(n_slices={len(self.table)}, n_tested={len(self.tested)})"

    def _repr_html_(self):
        shown = self.table[["slice_id", "description", "n_rows", "n_errors", "error_rate",
                            "ci_low", "ci_high", "excess_errors", "error_share", "q_value"]]
        head = (f"<p><b>slicefind</b>: {self.n_rows:,} rows, {self.n_errors:,} errors "
                f"({self.error_rate:.1%}); {len(self.table)} slices pass FDR "
                f"{self.params.get('fdr')} of {len(self.tested):,} tested.</p>")
        return head + shown.to_html(index=False, float_format=lambda x: f"{x:.3g}")


def _check_params(n_rows, max_terms, min_rows, min_errors, fdr, confidence_level, engine):
    """Validate find_slices' options; return (min_rows, min_errors) as ints or None."""
    def _int(name, value, low):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
            raise SlicefindTypeError(f"{name} must be an integer; got {value!r} ({type(value).__name__}).")
        if value < low:
            raise SlicefindValueError(f"{name} must be >= {low}; got {value!r}.")
        return int(value)

    max_terms = _int("max_terms", max_terms, 1)
    if min_rows is not None:
        min_rows = _int("min_rows", min_rows, 1)
    if min_errors is not None:
        min_errors = _int("min_errors", min_errors, 1)
    for name, value in (("fdr", fdr), ("confidence_level", confidence_level)):
        if isinstance(value, bool) or not isinstance(value, (int, float, np.floating)) or not 0 < value < 1:
            raise SlicefindValueError(f"{name} must be a number strictly between 0 and 1; got {value!r}.")
    if engine not in ENGINES:
        raise SlicefindValueError(f"engine must be one of {ENGINES}; got {engine!r}.")
    return max_terms, min_rows, min_errors


def _rule_candidates(items: ItemSet, counts: RuleCounts):
    """Flatten the levels: (level, index, description) per rule, in search order."""
    where, text = [], []
    for width, level in enumerate(counts.levels, start=1):
        for i, terms in enumerate(level):
            where.append((width - 1, i))
            text.append(" and ".join(items.items[t].text for t in terms))
    return where, text


def find_slices(
    data,
    *,
    label=None,
    prediction=None,
    errors=None,
    loss=None,
    threshold=None,
    embeddings=None,
    exclude: Sequence[str] = (),
    max_terms: int = 3,
    min_rows: int | None = None,
    min_errors: int | None = None,
    fdr: float = 0.05,
    confidence_level: float = 0.95,
    random_state=0,
    engine: str = "bitset",
    error_kind: str = "all",
    positive=None,
    true_class=None,
    id_column: str | None = None,
    n_bins: int = 4,
) -> FoundSlices:
    """Find groups of rows where the model errs more often than on the rest.

    Mines conjunctions of up to ``max_terms`` metadata conditions, tests each against
    the rest of the table (one-sided Fisher exact test), controls the false discovery
    rate over every candidate tested (Benjamini–Hochberg), and ranks the passing ones by
    excess errors.

    Parameters
    ----------
    data : pandas.DataFrame
        The eval table: one row per dev example. Never modified.
    label, prediction : str or array-like, optional
        Column names or arrays; a row is an error when they differ.
    errors : str or array-like, optional
        Instead of label/prediction: booleans or 0/1, true for an error.
    loss, threshold : str or array-like, float, optional
        Instead: a per-row loss; a row is an error when ``loss > threshold``.
    embeddings : (n, d) array, optional
        Row embeddings for clusters (see the embedding issue); validated here.
    exclude : sequence of str, default=()
        Columns never mined.
    max_terms : int, default=3
        Most conditions in one rule.
    min_rows : int, optional
        Fewest rows of a slice; default ``max(20, 0.5% of rows)``.
    min_errors : int, optional
        Fewest errors of a slice; default the least count that can exceed the overall
        error rate at ``min_rows`` rows (and at least 3).
    fdr : float, default=0.05
        False discovery rate for the table.
    confidence_level : float, default=0.95
        Coverage of the error-rate intervals.
    random_state : int, Generator or None, default=0
        Seeds the sample the numeric cut points are fitted on (large tables only).
    engine : {"bitset", "mlxtend"}, default="bitset"
        Frequent-itemset engine; both give the same rules and counts.
    error_kind : {"all", "false_positive", "false_negative"}, default="all"
        Binary tasks: which errors to explain (``positive=`` names the positive class).
    true_class : optional
        Explain only the errors on rows of this true class.
    id_column : str, optional
        The column that identifies examples (kept for the review queue, never mined).
    n_bins : int, default=4
        Quantile bins per numeric column (besides the error-aware cut points).

    Returns
    -------
    FoundSlices

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> frame = pd.DataFrame({"scanner": rng.choice(["S1", "S2", "S3"], 3000),
    ...                       "shift": rng.choice(["day", "night"], 3000)})
    >>> wrong = rng.random(3000) < np.where((frame["scanner"] == "S3") & (frame["shift"] == "night"), 0.4, 0.05)
    >>> found = find_slices(frame, errors=wrong)
    >>> print(found.table.loc[0, "description"])
    scanner = S3 and shift = night
    """
    table = build_eval_table(data, label=label, prediction=prediction, errors=errors, loss=loss,
                             threshold=threshold, embeddings=embeddings, exclude=exclude,
                             error_kind=error_kind, positive=positive, true_class=true_class,
                             id_column=id_column)
    max_terms, min_rows, min_errors = _check_params(table.n_rows, max_terms, min_rows, min_errors,
                                                    fdr, confidence_level, engine)
    if isinstance(n_bins, bool) or not isinstance(n_bins, (int, np.integer)) or n_bins < 1:
        raise SlicefindValueError(f"n_bins must be an integer >= 1; got {n_bins!r}.")
    rng = np.random.default_rng(random_state)
    n, k_total = table.n_rows, table.n_errors
    rate = k_total / n
    if min_rows is None:
        min_rows = default_min_rows(n)
    if min_errors is None:
        min_errors = max(3, math.floor(min_rows * rate) + 1)
    if not table.kinds and table.embeddings is None:
        reasons = "; ".join(f"{c}: {r}" for c, r in list(table.skipped.items())[:6])
        msg = f"no column of data can be mined and no embeddings were given ({reasons})."
        raise SlicefindValueError(msg)

    items = build_items(table, min_rows=min_rows, min_errors=min_errors, n_bins=n_bins, rng=rng)
    counts = search_rules(items, max_terms=max_terms, min_rows=min_rows, min_errors=min_errors,
                          n_errors=k_total, engine=engine)
    where, text = _rule_candidates(items, counts)
    n_rules = len(where)
    rule_rows = np.concatenate(counts.n_rows) if n_rules else np.zeros(0, np.int64)
    rule_errs = np.concatenate(counts.n_errors) if n_rules else np.zeros(0, np.int64)

    scores = score_slices(rule_rows, rule_errs, n, k_total, confidence_level=confidence_level)
    q = bh_qvalues(scores["p_value"])
    passed = q <= fdr
    parent_p = np.concatenate(refinement_pvalues(counts, len(items))) if n_rules else np.zeros(0)
    worse = parent_p <= fdr
    shown_flat = passed & worse
    splits = np.cumsum([len(level) for level in counts.levels])[:-1]
    shown = tuple(np.split(shown_flat, splits)) if n_rules else ()
    folded = fold_into_refinements(counts, shown, len(items), n, k_total, fdr) if n_rules else []
    folded_flat = np.concatenate(folded) if n_rules else np.zeros((0, 2), np.int64)
    offsets = np.concatenate([[0], np.cumsum([len(level) for level in counts.levels])]).astype(int)
    folded_into = np.where(folded_flat[:, 0] >= 0,
                           offsets[np.maximum(folded_flat[:, 0], 0)] + folded_flat[:, 1], -1)
    visible = shown_flat & (folded_into < 0)

    tested = pd.DataFrame({"description": text, "source": "rule",
                           "n_terms": [w + 1 for w, _ in where]})
    for column in SCORE_COLUMNS:
        tested[column] = scores[column]
    tested["q_value"] = q
    tested["passed"] = passed
    tested["worse_than_parents"] = worse
    tested["folded_into"] = [text[j] if j >= 0 else "" for j in folded_into]

    # candidates that stay: rows, identical-row collapse, ranking
    candidates = np.flatnonzero(visible)
    rows_of = {}
    for idx in candidates:
        width, i = where[idx]
        bits = rule_bits(items.bits, counts.levels[width][i:i + 1])
        rows_of[idx] = bitset.to_rows(bits, n)
    order = sorted(candidates, key=lambda i: (-scores["excess_errors"][i], where[i][0],
                                              scores["p_value"][i], text[i]))
    kept, aliases = [], {}
    by_size: dict[tuple[int, int], list[int]] = {}
    for idx in order:
        key = (int(rule_rows[idx]), int(rule_errs[idx]))
        twin = next((j for j in by_size.get(key, []) if np.array_equal(rows_of[j], rows_of[idx])), None)
        if twin is None:
            by_size.setdefault(key, []).append(idx)
            kept.append(idx)
            aliases[idx] = []
        else:
            aliases[twin].append(text[idx])
    folded_names = {idx: [] for idx in kept}
    for j in np.flatnonzero(folded_into >= 0):
        if folded_into[j] in folded_names and shown_flat[j]:
            folded_names[folded_into[j]].append(text[j])

    ids = [f"R{r + 1}" for r in range(len(kept))]
    tested["slice_id"] = ""
    tested.loc[kept, "slice_id"] = ids
    out = tested.loc[kept].reset_index(drop=True)
    out.insert(0, "slice_id", out.pop("slice_id"))
    out["aliases"] = ["; ".join(aliases[i]) for i in kept]
    out["folded"] = ["; ".join(folded_names[i]) for i in kept]
    table_df = out[list(TABLE_COLUMNS) + ["n_terms", "aliases", "folded"]]
    table_df = table_df.astype({"n_rows": np.int64, "n_errors": np.int64, "n_terms": np.int64})
    slice_rows = {sid: table.positions[rows_of[i]] for sid, i in zip(ids, kept)}

    params = dict(max_terms=max_terms, min_rows=min_rows, min_errors=min_errors, fdr=fdr,
                  confidence_level=confidence_level, engine=engine, error_kind=error_kind,
                  n_bins=n_bins, exclude=list(exclude), n_items=len(items),
                  n_tested=n_rules, error_definition=table.error_definition)
    return FoundSlices(table=table_df, tested=tested, eval_table=table, params=params,
                       _rows=slice_rows, extras={"items": items, "counts": counts})
