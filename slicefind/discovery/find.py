"""Slices: the record every source produces, ranking, de-duplication, and `find_slices`.

Rules (from `rules`) and clusters (from `clusters`) become `Slice` records scored by the
one scorer in `stats`; Benjamini–Hochberg runs once over every candidate tested, from
every source; the table then shows the passing slices ranked by excess errors.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from slicefind.discovery import bitset
from slicefind.discovery.clusters import cluster_slices
from slicefind.discovery.describe import confusions
from slicefind.discovery.distributed import is_dask_frame, mine_dask
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.discovery.items import ItemSet, build_items
from slicefind.discovery.labelcheck import (label_check_slices, nested_tests, params_summary,
                                            score_columns)
from slicefind.discovery.records import Slice, default_min_rows, jaccard
from slicefind.discovery.rules import (ENGINES, RuleCounts, fold_into_refinements,
                                       refinement_pvalues, rule_bits, search_rules)
from slicefind.stats import SCORE_COLUMNS, bh_qvalues, fisher_greater, score_slices
from slicefind.discovery.table import EvalTable, build_eval_table
from slicefind.discovery.text import TermCounts, check_texts, embed_column, surface_features

__all__ = ["FoundSlices", "find_slices", "TABLE_COLUMNS"]

#: the contract's columns of `FoundSlices.table`, in order (extra columns follow)
TABLE_COLUMNS = ("slice_id", "source", "description") + SCORE_COLUMNS + ("q_value",)
#: the letter each source's slice ids start with (``R1``, ``C2``, ``L1``)
ID_PREFIXES = {"rule": "R", "region": "C", "error_mode": "C", "label_check": "L"}
CLUSTER_CHOICES = ("both", "regions", "error_modes", "none")
TESTED_COLUMNS = (("description", "source", "n_terms") + SCORE_COLUMNS
                  + ("q_value", "passed", "parent_p_value", "worse_than_parents", "too_large",
                     "folded_into", "explained_by"))


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

    def confusions(self, top: int = 10) -> pd.DataFrame:
        """The commonest confusions (true label -> prediction) among all errors, with counts.

        Columns: ``label, prediction, n_errors, error_share`` (share of all errors),
        ``n_class_rows`` (rows of that true label) and ``class_rate`` (the share of those
        rows read as that prediction). Empty without labels and predictions (``errors=``,
        ``loss=``). The label and prediction columns keep the user's names in
        ``params["label_column"]`` and ``params["prediction_column"]``.

        Examples
        --------
        >>> frame = pd.DataFrame({"y": [1, 1, 1, 2, 2, 3] * 50, "p": [1, 2, 2, 2, 3, 3] * 50,
        ...                       "site": ["a", "b", "c"] * 100})
        >>> found = find_slices(frame, label="y", prediction="p")
        >>> for r in found.confusions().itertuples():
        ...     print(f"{r.label} -> {r.prediction}: {r.n_errors} errors ({r.error_share:.0%}), "
        ...           f"{r.class_rate:.0%} of label {r.label}")
        1 -> 2: 100 errors (67%), 67% of label 1
        2 -> 3: 50 errors (33%), 50% of label 2
        """
        if isinstance(top, bool) or not isinstance(top, (int, np.integer)) or top < 1:
            raise SlicefindValueError(f"top must be an integer >= 1; got {top!r}.")
        table = self.eval_table
        conf = confusions(table, np.arange(table.n_rows), top=int(top))
        if conf.empty:
            return conf.assign(n_class_rows=pd.Series(dtype=np.int64), class_rate=pd.Series(dtype=float))
        classes = pd.Series(table.label).value_counts(sort=False)
        conf["n_class_rows"] = classes.reindex(conf["label"]).to_numpy(dtype=np.int64)
        conf["class_rate"] = conf["n_errors"] / conf["n_class_rows"]
        return conf

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


def _check_params(max_terms, min_rows, min_errors, fdr, confidence_level, engine,
                  clusters, merge_jaccard, distinct_jaccard, max_share):
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
    if clusters not in CLUSTER_CHOICES:
        raise SlicefindValueError(f"clusters must be one of {CLUSTER_CHOICES}; got {clusters!r}.")
    for name, value in (("merge_jaccard", merge_jaccard), ("distinct_jaccard", distinct_jaccard),
                        ("max_share", max_share)):
        if isinstance(value, bool) or not isinstance(value, (int, float, np.floating)) or not 0 < value <= 1:
            raise SlicefindValueError(f"{name} must be a number in (0, 1]; got {value!r}.")
    if distinct_jaccard > merge_jaccard:
        msg = (f"distinct_jaccard ({distinct_jaccard!r}) must not exceed merge_jaccard "
               f"({merge_jaccard!r}).")
        raise SlicefindValueError(msg)
    return max_terms, min_rows, min_errors


def _rule_candidates(items: ItemSet, counts: RuleCounts):
    """Flatten the levels: (level, index) and the description of every rule, in search order."""
    where, text = [], []
    texts = np.array([item.text for item in items.items], dtype=object)
    for width, level in enumerate(counts.levels, start=1):
        where += [(width - 1, i) for i in range(len(level))]
        joined = texts[level[:, 0]] if len(level) else np.array([], dtype=object)
        for j in range(1, width):
            joined = joined + " and " + texts[level[:, j]]
        text += list(joined)
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
    clusters: str = "both",
    cluster_options: Mapping[str, Any] | None = None,
    merge_jaccard: float = 0.8,
    distinct_jaccard: float = 0.5,
    max_share: float = 0.5,
    mine_label: bool = True,
    client=None,
    scores=None,
    text: str | None = None,
    text_model=None,
    text_features: bool = True,
) -> FoundSlices:
    """Find groups of rows where the model errs more often than on the rest.

    Mines conjunctions of up to ``max_terms`` metadata conditions, tests each against
    the rest of the table (one-sided Fisher exact test), controls the false discovery
    rate over every candidate tested (Benjamini–Hochberg), and ranks the passing ones by
    excess errors.

    Parameters
    ----------
    data : pandas.DataFrame or dask.dataframe.DataFrame
        The eval table: one row per dev example. Never modified. A Dask DataFrame is
        mined partition by partition on a Dask cluster (label, prediction, errors and
        loss must then be column names).
    label, prediction : str or array-like, optional
        Column names or arrays; a row is an error when they differ.
    errors : str or array-like, optional
        Instead of label/prediction: booleans or 0/1, true for an error.
    loss, threshold : str or array-like, float, optional
        Instead: a per-row loss; a row is an error when ``loss > threshold``.
    embeddings : (n, d) array, column name or list of column names, optional
        Row embeddings for clusters: an array, a column of data holding one vector per
        row, or one column per dimension (those columns are not mined). With a Dask
        DataFrame: column names, a numpy array or a dask array; the clusters are fitted
        on a sample gathered to the driver and every partition places its own rows.
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
    clusters : {"both", "regions", "error_modes", "none"}, default="both"
        Which embedding clusters to propose when ``embeddings`` is given.
    cluster_options : mapping, optional
        Extra keyword arguments for `slicefind.discovery.clusters.cluster_slices`.
    merge_jaccard : float, default=0.8
        Slices whose rows overlap at least this much (Jaccard) are one entry; the
        others are listed as its aliases, and a rule is preferred as the main entry.
    distinct_jaccard : float, default=0.5
        A candidate overlapping a listed slice at least this much (Jaccard) is listed
        beside it only when both are needed: each one's rows outside the other still
        err significantly more than the rest. Otherwise it is an alias of the slice above.
    max_share : float, default=0.5
        Largest share of the rows a listed slice may hold: a slice covering most of the
        data describes the data, not a finding. Larger candidates are still tested
        (``found.tested.too_large``).
    mine_label : bool, default=True
        Mine the true label column like any other column (``true_digit = 7``), so that
        per-class slices compete with the rest. The prediction is never mined.
    client : distributed.Client, optional
        With a Dask DataFrame as ``data``: the cluster to count on (default the current
        client, or a local cluster of 2 worker processes). See `slicefind.discovery.distributed`.
    scores : str, sequence of str, mapping or array-like, optional
        The model's probabilities, for the label check (`slicefind.discovery.labelcheck`): a column
        holding the probability of the predicted class; one column per class (a sequence
        in the sorted order of the class values, or a mapping class -> column); or an
        ``(n,)`` / ``(n, k)`` array of the same. Needs label and prediction, every row
        analysed (no ``error_kind``/``true_class``) and a pandas DataFrame. Score
        columns are never mined (``skipped`` says "scores column"). The rows the scores
        confidently give another class than the label become candidates with source
        "label_check" and ids ``L1, L2, ...``: the union of suspected label mistakes and,
        with at least ``min_rows`` rows, each (given label -> suspected label) pair. They
        are tested against the scores' own calibration instead of the Fisher test of
        their error rate (suspected rows are errors by construction), then share the
        Benjamini–Hochberg step and the selection with every other candidate.
    text : str, optional
        A column of free text (messages, documents, generated answers); needs a pandas
        DataFrame. Without ``embeddings``, the clusters are fitted on vectors computed
        from it (`slicefind.discovery.text.embed_texts`; ``found.extras["text"]`` says how). With
        ``text_features``, its surface features (`slicefind.discovery.text.text_features`:
        ``"<text>.tokens"``, ``"<text>.has_url"``, ...) are mined like any other column.
        The column itself is not mined, and `describe_slice` lists its distinctive terms.
    text_model : None, str or callable, optional
        How ``text`` becomes vectors: None for TF-IDF + truncated SVD fitted on the
        table (seeded by ``random_state``), a folder holding a sentence-transformers
        model (``pip install "slicefind[text]"``; nothing is downloaded), or a callable
        ``texts -> (n, d) array``.
    text_features : bool, default=True
        Mine the surface features of ``text``.

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
    exclude = (exclude,) if isinstance(exclude, str) else tuple(exclude)
    user_exclude = exclude
    max_terms, min_rows, min_errors = _check_params(max_terms, min_rows, min_errors,
                                                    fdr, confidence_level, engine, clusters,
                                                    merge_jaccard, distinct_jaccard, max_share)
    if not isinstance(mine_label, (bool, np.bool_)):
        raise SlicefindTypeError(f"mine_label must be True or False; got {mine_label!r}.")
    if isinstance(n_bins, bool) or not isinstance(n_bins, (int, np.integer)) or n_bins < 1:
        raise SlicefindValueError(f"n_bins must be an integer >= 1; got {n_bins!r}.")

    def rows_for(n_rows: int) -> int:
        return default_min_rows(n_rows) if min_rows is None else min_rows

    def errors_for(n_rows: int, n_errors: int, at_least: int) -> int:
        if min_errors is not None:
            return min_errors
        return max(3, math.floor(at_least * n_errors / n_rows) + 1)

    if scores is not None and (is_dask_frame(data) or client is not None):
        msg = ("scores= (--scores) needs an in-memory pandas DataFrame; the Dask engine (a Dask "
               "DataFrame, client=, --engine dask) does not run the label check. Drop scores= or "
               "load the data with pandas.")
        raise SlicefindValueError(msg)
    score_cols: tuple[str, ...] = ()
    if scores is not None:
        if not isinstance(data, pd.DataFrame):
            raise SlicefindTypeError(f"data must be a pandas DataFrame; got {type(data).__name__}.")
        if label is None or prediction is None:
            given = "errors=" if errors is not None else "loss=" if loss is not None else "neither"
            msg = ("scores= needs label= and prediction=: the label check compares the scores with "
                   f"the given labels; got {given}.")
            raise SlicefindValueError(msg)
        score_cols = score_columns(scores, data.columns)
        exclude = exclude + tuple(c for c in score_cols if c not in exclude)
    label_check = None
    text_record = term_counts = None
    if text is not None:
        data, embeddings, text_record, term_counts = _with_text(
            data, text, text_model, text_features, embeddings, random_state,
            dask=is_dask_frame(data) or client is not None)
        exclude = exclude + ((text,) if text not in exclude else ())
    elif text_model is not None:
        raise SlicefindValueError("text_model= needs text=, the column of text to embed.")

    how = dict(label=label, prediction=prediction, errors=errors, loss=loss, threshold=threshold,
               error_kind=error_kind, positive=positive, true_class=true_class, id_column=id_column)
    mined = _mine(data, how, exclude=exclude, embeddings=embeddings, scores=scores, score_cols=score_cols,
                  term_counts=term_counts, rows_for=rows_for, errors_for=errors_for, engine=engine,
                  client=client, n_bins=n_bins, max_terms=max_terms, random_state=random_state,
                  mine_label=mine_label)
    table, items, counts = mined.table, mined.items, mined.counts
    min_rows, min_errors = mined.min_rows, mined.min_errors
    label_check, term_counts = mined.label_check, mined.term_counts

    tested, where, extra_slices, n_clusters, cluster_extra = _candidates(
        mined, clusters=clusters, cluster_options=cluster_options, random_state=random_state,
        confidence_level=confidence_level)
    n_rules = len(where)
    has_embeddings = table.embeddings is not None or mined.embedding_rows is not None

    p_all, cutoff, folded_into, cluster_folds, eligible = _family_tests(
        tested, mined, n_rules, extra_slices, n_clusters, fdr=fdr, max_share=max_share)

    table_df, slice_rows, kept, ids = _ranked_table(
        tested, mined, where, extra_slices, p_all, cutoff, folded_into, cluster_folds, eligible,
        fdr=fdr, jaccards=(merge_jaccard, distinct_jaccard))

    params = dict(max_terms=max_terms, min_rows=min_rows, min_errors=min_errors, fdr=fdr,
                  confidence_level=confidence_level, engine=engine, error_kind=error_kind,
                  n_bins=n_bins, exclude=list(user_exclude), n_items=len(items),
                  n_tested=len(tested), error_definition=table.error_definition,
                  clusters=clusters if has_embeddings else "none",
                  merge_jaccard=merge_jaccard, distinct_jaccard=distinct_jaccard, max_share=max_share,
                  mine_label=mine_label, label_column=table.columns_used.get("label", "label"),
                  prediction_column=table.columns_used.get("prediction", "prediction"))
    if text is not None:
        params.update(text=text, text_features=bool(text_features),
                      text_model=None if text_record is None else text_record.model,
                      text_method="given embeddings" if text_record is None else text_record.method)
        cluster_extra.update(text=text_record, term_counts=term_counts)
    if label_check is not None:
        label_ids = {extra_slices[idx - n_rules].key: sid for idx, sid in zip(kept, ids)
                     if idx >= n_rules + n_clusters}
        params["scores"] = list(score_cols) if score_cols else "array"
        params["label_check"] = params_summary(label_check, label_ids)
    return FoundSlices(table=table_df, tested=tested, eval_table=table, params=params,
                       _rows=slice_rows, extras={"items": items, "counts": counts, **cluster_extra})


@dataclass(frozen=True)
class _Mined:
    """What mining leaves for the sources: the eval table, its items and rule counts."""

    table: EvalTable
    items: ItemSet
    counts: RuleCounts
    rule_bitset: Any                 # rule terms -> the rule's packed rows
    embedding_rows: Any              # the Dask engine's embedding rows (None in memory)
    min_rows: int
    min_errors: int
    label_check: Any = None
    term_counts: TermCounts | None = None


def _mine(data, how: Mapping[str, Any], *, exclude, embeddings, scores, score_cols, term_counts,
          rows_for, errors_for, engine, client, n_bins, max_terms, random_state, mine_label) -> _Mined:
    """Validate the table, build its items and count every rule, in memory or on Dask."""
    label_check = None
    if is_dask_frame(data):
        if engine != "bitset":
            msg = (f"with a Dask DataFrame, engine={engine!r} cannot be used (the Dask engine counts "
                   "with the bitset kernel); leave engine at its default.")
            raise SlicefindValueError(msg)
        mined = mine_dask(data, **how, client=client, exclude=exclude, embeddings=embeddings,
                          min_rows_for=rows_for,
                          min_errors_for=errors_for, n_bins=n_bins, max_terms=max_terms,
                          random_state=random_state, mine_label=mine_label)
        table, items, counts = mined.table, mined.items, mined.counts
        n, k_total = table.n_rows, table.n_errors
        min_rows, min_errors = rows_for(n), errors_for(n, k_total, rows_for(n))
        rule_bitset = mined.rule_bitset
        embedding_rows = mined.embedding_rows
    else:
        embedding_rows = None
        table = build_eval_table(data, **how, embeddings=embeddings, exclude=exclude, mine_label=mine_label)
        n, k_total = table.n_rows, table.n_errors
        min_rows, min_errors = rows_for(n), errors_for(n, k_total, rows_for(n))
        if term_counts is not None and term_counts.n_rows != n:
            term_counts = term_counts.take(table.positions)      # the analysed rows only
        if scores is not None:
            # checked before any mining; score columns are skipped as such
            label_check = label_check_slices(table, scores, min_rows=min_rows)
            table = replace(table, skipped={c: ("scores column" if c in score_cols else why)
                                            for c, why in table.skipped.items()})
        if not table.kinds and table.embeddings is None:
            reasons = "; ".join(f"{c}: {r}" for c, r in list(table.skipped.items())[:6])
            msg = f"no column of data can be mined and no embeddings were given ({reasons})."
            raise SlicefindValueError(msg)
        items = build_items(table, min_rows=min_rows, min_errors=min_errors, n_bins=n_bins)
        counts = search_rules(items, max_terms=max_terms, min_rows=min_rows, min_errors=min_errors,
                              n_errors=k_total, engine=engine)

        def rule_bitset(terms: np.ndarray) -> np.ndarray:
            return rule_bits(items.bits, np.asarray(terms)[None, :])[0]

    return _Mined(table, items, counts, rule_bitset, embedding_rows, min_rows, min_errors,
                  label_check, term_counts)


def _candidates(mined: _Mined, *, clusters, cluster_options, random_state, confidence_level):
    """Every candidate scored alike: (tested frame, rule positions, other slices, how many of
    them are clusters, the clusters' and label check's results)."""
    table, items, counts, min_rows = mined.table, mined.items, mined.counts, mined.min_rows
    n, k_total, embedding_rows, label_check = table.n_rows, table.n_errors, mined.embedding_rows, mined.label_check
    where, rule_text = _rule_candidates(items, counts)
    n_rules = len(where)
    rule_rows = np.concatenate(counts.n_rows) if n_rules else np.zeros(0, np.int64)
    rule_errs = np.concatenate(counts.n_errors) if n_rules else np.zeros(0, np.int64)

    tested = pd.DataFrame({"description": rule_text, "source": "rule",
                           "n_terms": np.array([w + 1 for w, _ in where], dtype=np.int64)})
    scores = score_slices(rule_rows, rule_errs, n, k_total, confidence_level=confidence_level)
    for column in SCORE_COLUMNS:
        tested[column] = scores[column]

    # clusters (when embeddings are given) join the same family of tests
    cluster_extra: dict[str, Any] = {}
    extra_slices: list[Slice] = []
    has_embeddings = table.embeddings is not None or embedding_rows is not None
    if has_embeddings and clusters != "none":
        options = dict(cluster_options or {})
        options.setdefault("items", items)
        result = cluster_slices(table, strategy=clusters, random_state=random_state,
                                source=embedding_rows, **options)
        # a node smaller than min_rows is not a candidate (as for rules)
        extra_slices = [sl for sl in result.slices if sl.rows.size >= min_rows]
        cluster_extra = {"clusters": result}
    n_clusters = len(extra_slices)
    if label_check is not None:
        extra_slices += list(label_check.slices)
        cluster_extra["label_check"] = label_check
    if extra_slices:
        ex_rows = np.array([sl.rows.size for sl in extra_slices], dtype=np.int64)
        ex_errs = np.array([int(table.errors[sl.rows].sum()) for sl in extra_slices], dtype=np.int64)
        ex_scores = score_slices(ex_rows, ex_errs, n, k_total, confidence_level=confidence_level)
        ex_frame = pd.DataFrame({"description": [sl.description for sl in extra_slices],
                                 "source": [sl.source for sl in extra_slices],
                                 "n_terms": np.zeros(len(extra_slices), dtype=np.int64)})
        for column in SCORE_COLUMNS:
            ex_frame[column] = ex_scores[column]
        # the label check's own test: disagreements beyond the scores' calibration
        ex_frame.loc[n_clusters:, "p_value"] = [sl.extra["p_value"] for sl in extra_slices[n_clusters:]]
        tested = pd.concat([tested, ex_frame], ignore_index=True)

    return tested, where, extra_slices, n_clusters, cluster_extra


def _family_tests(tested, mined: _Mined, n_rules, extra_slices, n_clusters, *, fdr, max_share):
    """Benjamini–Hochberg over every candidate, then each source's parent tests and folds;
    writes their columns into `tested`. Returns (p-values, BH cutoff, folded_into,
    cluster folds, the candidates eligible for the table)."""
    counts, items, label_check = mined.counts, mined.items, mined.label_check
    n, k_total = mined.table.n_rows, mined.table.n_errors
    p_all = tested["p_value"].to_numpy()
    q = bh_qvalues(p_all)
    passed = q <= fdr
    cutoff = _bh_cutoff(p_all, q, fdr)
    too_large = tested["n_rows"].to_numpy() > max_share * n
    # rules: a refinement must be worse than each parent; parents explained by a
    # refinement fold into it (both at the table's BH cutoff)
    worse = np.ones(len(tested), dtype=bool)
    parent_p = np.zeros(len(tested))
    folded_into = np.full(len(tested), -1, dtype=np.int64)
    if n_rules:
        splits = np.cumsum([len(level) for level in counts.levels])[:-1]
        # only rules that pass are tested against their parents (NaN elsewhere)
        parent_p[:n_rules] = np.concatenate(refinement_pvalues(
            counts, len(items), tuple(np.split(passed[:n_rules], splits))))
        worse[:n_rules] = parent_p[:n_rules] <= cutoff
        shown = tuple(np.split(passed[:n_rules] & worse[:n_rules], splits))
        folded = np.concatenate(fold_into_refinements(counts, shown, len(items), n, k_total, cutoff))
        offsets = np.concatenate([[0], np.cumsum([len(level) for level in counts.levels])])
        folded_into[:n_rules] = np.where(folded[:, 0] >= 0,
                                         offsets[np.maximum(folded[:, 0], 0)] + folded[:, 1], -1)
    cluster_folds: dict[int, list[int]] = {}
    if n_clusters:
        block = slice(n_rules, n_rules + n_clusters)
        parent_p[block], worse[block], cluster_folds = _tree_tests(
            extra_slices[:n_clusters], tested["n_rows"].to_numpy()[block], tested["n_errors"].to_numpy()[block],
            passed[block], too_large[block], n, k_total, cutoff)
    if len(extra_slices) > n_clusters:
        block = slice(n_rules + n_clusters, None)
        parent_p[block], worse[block], label_folds = nested_tests(label_check, passed[block],
                                                                  too_large[block], cutoff)
        cluster_folds.update({n_clusters + node: [n_clusters + t for t in targets]
                              for node, targets in label_folds.items()})
    if extra_slices:
        for node, targets in cluster_folds.items():
            folded_into[n_rules + node] = n_rules + targets[0]
    tested["q_value"] = q
    tested["passed"] = passed
    tested["parent_p_value"] = parent_p
    tested["worse_than_parents"] = worse
    tested["too_large"] = too_large
    descriptions = tested["description"].tolist()
    tested["folded_into"] = [descriptions[j] if j >= 0 else "" for j in folded_into]
    for node, targets in cluster_folds.items():      # a cluster may fold into several children
        tested.loc[n_rules + node, "folded_into"] = "; ".join(descriptions[n_rules + t] for t in targets)
    eligible = np.flatnonzero(passed & worse & (folded_into < 0) & ~too_large)

    return p_all, cutoff, folded_into, cluster_folds, eligible


def _ranked_table(tested, mined: _Mined, where, extra_slices, p_all, cutoff, folded_into, cluster_folds,
                  eligible, *, fdr, jaccards):
    """The greedy selection in rank order, the slice ids and the listed table.

    Returns (table, rows per slice id, kept candidate indices, their ids)."""
    table, items, counts, term_counts = mined.table, mined.items, mined.counts, mined.term_counts
    n, k_total, rule_bitset, n_rules = table.n_rows, table.n_errors, mined.rule_bitset, len(where)
    merge_jaccard, distinct_jaccard = jaccards
    descriptions = tested["description"].tolist()

    def bits_of(idx: int) -> np.ndarray:
        if idx < n_rules:
            width, i = where[idx]
            return rule_bitset(counts.levels[width][i])
        mask = np.zeros(n, dtype=bool)
        mask[extra_slices[idx - n_rules].rows] = True
        return bitset.pack(mask)[0]

    excess = tested["excess_errors"].to_numpy()
    terms = tested["n_terms"].to_numpy()
    # aliases name the source of a cluster ("region: 71% label_stock = glossy, ...")
    source_named = [d if src == "rule" else f"{src.replace('_', ' ')}: {d}"
                    for d, src in zip(descriptions, tested["source"].to_numpy(dtype=object))]
    order = sorted(eligible.tolist(), key=lambda i: (-excess[i], i >= n_rules, terms[i], p_all[i],
                                                     descriptions[i]))
    signatures = _rule_signatures(items, counts)
    kept, kept_bits, aliases, sharpened, explained = _select(
        order, bits_of, tested["n_rows"].to_numpy(), n_rules, bitset.pack(table.errors)[0],
        n, k_total, fdr, len(tested), cutoff, (merge_jaccard, distinct_jaccard), source_named,
        signatures)
    rank = sorted(range(len(kept)), key=lambda r: order.index(kept[r]))   # replacements moved
    kept, kept_bits = [kept[r] for r in rank], [kept_bits[r] for r in rank]
    folded_names: dict[int, list[str]] = {idx: list(sharpened.get(idx, [])) for idx in kept}
    for j in np.flatnonzero(folded_into >= 0):
        targets = ([n_rules + t for t in cluster_folds[j - n_rules]] if j >= n_rules
                   else [int(folded_into[j])])
        for target in targets:
            if target in folded_names:
                folded_names[target].append(source_named[j])

    source_col = tested["source"].to_numpy()
    ids, counter = [], dict.fromkeys(ID_PREFIXES.values(), 0)
    for idx in kept:
        prefix = ID_PREFIXES[source_col[idx]]
        counter[prefix] += 1
        ids.append(f"{prefix}{counter[prefix]}")
    id_of = dict(zip(kept, ids))
    tested["explained_by"] = ""
    for idx, by in explained.items():
        tested.loc[idx, "explained_by"] = ", ".join(id_of[j] for j in by)
    tested["slice_id"] = ""
    tested.loc[kept, "slice_id"] = ids
    out = tested.loc[kept].reset_index(drop=True)
    out.insert(0, "slice_id", out.pop("slice_id"))
    is_cluster = out["source"] != "rule"
    if term_counts is not None and is_cluster.any():
        out.loc[is_cluster, "description"] = [
            _with_words(text_, term_counts, bitset.to_rows(kept_bits[i], n))
            for i, text_ in zip(np.flatnonzero(is_cluster.to_numpy()), out.loc[is_cluster, "description"])]
    out.loc[is_cluster, "description"] = [
        f"{src.replace('_', ' ')} {sid}: {text_}" for src, sid, text_ in
        zip(out.loc[is_cluster, "source"], out.loc[is_cluster, "slice_id"], out.loc[is_cluster, "description"])]
    out["aliases"] = ["; ".join(aliases[i]) for i in kept]
    out["folded"] = ["; ".join(folded_names[i]) for i in kept]
    table_df = out[list(TABLE_COLUMNS) + ["n_terms", "aliases", "folded"]]
    table_df = table_df.astype({"n_rows": np.int64, "n_errors": np.int64, "n_terms": np.int64})
    slice_rows = {sid: table.positions[bitset.to_rows(b, n)] for sid, b in zip(ids, kept_bits)}

    return table_df, slice_rows, kept, ids


def _with_text(data, text, text_model, text_features, embeddings, random_state, *, dask: bool):
    """`find_slices`' text column: (data with its surface features, embeddings, how they
    were made or None when given, the texts' word counts)."""
    if dask:
        raise SlicefindValueError("text= needs an in-memory pandas DataFrame; with a Dask DataFrame, "
                                  "compute the vectors first and pass embeddings=.")
    if not isinstance(data, pd.DataFrame):
        raise SlicefindTypeError(f"data must be a pandas DataFrame with text=; got {type(data).__name__}.")
    if not isinstance(text_features, (bool, np.bool_)):
        raise SlicefindTypeError(f"text_features must be True or False; got {text_features!r}.")
    if embeddings is not None and text_model is not None:
        raise SlicefindValueError("give embeddings= or text_model=, not both: text_model= says how to "
                                  "compute the embeddings from the text.")
    texts = check_texts(data, text)
    if text_features:
        features = surface_features(texts, prefix=text)
        clash = [c for c in features.columns if c in data.columns]
        if clash:
            msg = (f"data already has a column {clash[0]!r}, the name of a surface feature of "
                   f"text={text!r}; rename it or pass text_features=False.")
            raise SlicefindValueError(msg)
    counts = TermCounts(texts)
    record = None
    if embeddings is None:
        embeddings, record = embed_column(texts, text, text_model, counts=counts, random_state=random_state)
    if text_features:
        data = pd.concat([data, features.set_axis(data.index)], axis=1)
    return data, embeddings, record, counts


def _with_words(description: str, term_counts: TermCounts, rows: np.ndarray, top: int = 4) -> str:
    """A cluster's description, led by the distinctive words of its texts."""
    words = term_counts.distinctive(rows, top=top)["term"].tolist()
    return f"words {', '.join(words)}; {description}" if words else description


def _bh_cutoff(p: np.ndarray, q: np.ndarray, fdr: float) -> float:
    """The largest p-value Benjamini–Hochberg rejects at `fdr` (0 when none).

    The refinement and folding tests use it as their level, so "significantly worse"
    means the same thing everywhere in the table: significant at the table's standard.
    """
    passed = p[q <= fdr]
    return float(passed.max()) if passed.size else 0.0


def _select(order, bits_of, n_rows, n_rules, error_bits, total_rows, total_errors, fdr,
            n_tested, cutoff, thresholds, descriptions, signatures):
    """Greedy pass in rank order over the eligible candidates.

    `thresholds` is (merge, distinct) Jaccard. For each candidate S, in order:

    1. near-duplicate: if its rows overlap a kept slice at Jaccard >= merge it
       becomes that slice's alias (a rule meeting a kept cluster takes its place as the
       main entry);
    2. sharper: if S lies (>= 90%) inside a kept slice T whose rows outside S are not
       significantly worse than the rows outside S (one-sided Fisher at `cutoff`, the
       test `rules.fold_into_refinements` uses), S replaces T and T is listed as folded
       into S: ``scanner = S3 and belt_speed >= 2.1`` beats ``... >= 1.7``;
    3. variant: a rule on the same columns as a kept rule, each column's condition
       overlapping the kept one's (``physlm < 0.15 and disea < 15`` against ``physlm <
       0.01 and disea < 13.3``), and sharing rows with it, is that rule's alias whatever
       the Jaccard: another threshold on the same finding (`_variant`);
    4. distinct: if S overlaps a kept slice T at Jaccard >= distinct, both are listed
       only when both are needed -- S's rows outside T err significantly more than the
       rows outside T and hold at least half of S's excess errors, and the same for T's
       rows outside S (`_needed`, at the step of step 5) -- otherwise S is T's alias; so
       the top of the table holds pairwise distinct findings;
    5. explained: if S's rows outside every kept slice are not significantly worse than
       the rows outside them, S is explained by the kept slices it overlaps and is left
       out. "Significantly" here is Benjamini–Hochberg's step for the k-th discovery
       among all `n_tested` candidates (``fdr * k / n_tested``): with thousands of rules
       overlapping one strong slice BH's own cutoff grows lenient, and a flat cutoff let
       unrelated rules with lift ~1.1 through at a million rows.

    Returns (kept indices, their bitsets, aliases and folded descriptions per kept
    index, explained index -> kept indices).
    """
    kept: list[int] = []
    kept_bits: list[np.ndarray] = []
    aliases: dict[int, list[str]] = {}
    folded: dict[int, list[str]] = {}
    explained: dict[int, list[int]] = {}
    successor: dict[int, int] = {}          # a kept slice replaced by a sharper or a rule

    def count(bits):
        return int(np.bitwise_count(bits).sum()), int(np.bitwise_count(bits & error_bits).sum())

    merge, distinct = thresholds
    rate = total_errors / total_rows
    union = np.zeros_like(error_bits)
    union_rows = union_errors = 0
    for idx in order:
        bits = bits_of(idx)
        size, errs = count(bits)
        overlaps = [int(np.bitwise_count(bits & kb).sum()) for kb in kept_bits]
        similar = [inter / (size + int(n_rows[j]) - inter) for j, inter in zip(kept, overlaps)]
        twin = next((pos for pos, sim in enumerate(similar) if sim >= merge), None)
        if twin is not None:
            j = kept[twin]
            if idx < n_rules <= j:          # a rule explains a kept cluster: swap roles
                kept[twin], kept_bits[twin] = idx, bits
                aliases[idx] = [descriptions[j]] + aliases.pop(j)
                folded[idx] = folded.pop(j)
                successor[j] = idx
            else:
                aliases[j].append(descriptions[idx])
            continue
        sharper = None
        for pos, (j, inter) in enumerate(zip(kept, overlaps)):
            if inter < 0.9 * size or int(n_rows[j]) <= size:
                continue
            r_rest, k_rest = count(kept_bits[pos] & ~bits)
            if fisher_greater(k_rest, r_rest, total_errors - errs, total_rows - size) > cutoff:
                sharper = pos
                break
        if sharper is not None:
            j = kept[sharper]
            kept[sharper], kept_bits[sharper] = idx, bits
            folded[idx] = [descriptions[j]] + aliases.pop(j) + folded.pop(j)
            successor[j] = idx
            aliases[idx] = []
            union = np.bitwise_or.reduce(np.stack(kept_bits), axis=0)
            union_rows, union_errors = count(union)
            continue
        variant = next((j for j, inter in zip(kept, overlaps)
                        if inter and idx < n_rules and j < n_rules
                        and _variant(signatures[idx], signatures[j])), None)
        if variant is not None:
            aliases[variant].append(descriptions[idx])
            continue
        step = fdr * (len(kept) + 1) / n_tested
        near = None
        for pos, sim in enumerate(similar):
            if sim < distinct:
                continue
            t_rows, t_errs = count(kept_bits[pos])
            r1, k1 = count(bits & ~kept_bits[pos])
            r2, k2 = count(kept_bits[pos] & ~bits)
            needed = (_needed(k1, r1, errs - rate * size, total_errors - t_errs, total_rows - t_rows, step)
                      and _needed(k2, r2, t_errs - rate * t_rows, total_errors - errs, total_rows - size, step))
            if not needed:
                near = kept[pos]
                break
        if near is not None:
            aliases[near].append(descriptions[idx])
            continue
        if kept:
            r_out, k_out = count(bits & ~union)
            p = fisher_greater(k_out, r_out, total_errors - union_errors, total_rows - union_rows)
            # the k-th slice shown must meet BH's threshold for k discoveries among
            # everything tested, on its rows outside the slices above it
            if r_out == 0 or p > step:
                explained[idx] = [j for j, inter in zip(kept, overlaps) if inter > 0]
                continue
        kept.append(idx)
        kept_bits.append(bits)
        aliases[idx] = []
        folded[idx] = []
        union |= bits
        union_rows, union_errors = count(union)

    # a sharper rule that replaced a kept one may be a variant of another kept rule
    position = {idx: pos for pos, idx in enumerate(order)}
    ranked = sorted(range(len(kept)), key=lambda r: position[kept[r]])
    dropped = set()
    for a_pos, a in enumerate(ranked):
        if a in dropped or kept[a] >= n_rules:
            continue
        for b in ranked[a_pos + 1:]:
            if b in dropped or kept[b] >= n_rules or not _variant(signatures[kept[a]], signatures[kept[b]]):
                continue
            if not np.bitwise_count(kept_bits[a] & kept_bits[b]).sum():
                continue
            i, j = kept[a], kept[b]
            aliases[i] += [descriptions[j]] + aliases.pop(j)
            folded[i] += folded.pop(j)
            successor[j] = i
            dropped.add(b)
    kept = [k for r, k in enumerate(kept) if r not in dropped]
    kept_bits = [k for r, k in enumerate(kept_bits) if r not in dropped]

    def final(j):
        while j in successor:
            j = successor[j]
        return j

    explained = {idx: sorted({final(j) for j in by}, key=kept.index) for idx, by in explained.items()}
    return kept, kept_bits, aliases, folded, explained


def _tree_tests(slices: list[Slice], n_rows: np.ndarray, n_errors: np.ndarray, passed: np.ndarray,
                too_large: np.ndarray, total_rows: int, total_errors: int, alpha: float):
    """The refinement and folding tests of rules, for the nodes of the cluster hierarchies.

    A node must err significantly more than its parent's other rows (one-sided Fisher at
    `alpha`, as `rules.refinement_pvalues`); a node under the root is tested against the
    whole table by its main p-value (parent p 0). A shown node P (passed, worse than its
    parent, not too large) folds into its *frontier* -- its shown children, or a folded
    child's own frontier -- when P's rows outside the frontier are not significantly
    worse than the rows outside it (as `rules.fold_into_refinements`): the children then
    explain the parent. Otherwise the parent stays and competes with its children in the
    selection. Returns (parent p-values, worse flags, node -> frontier node indices), all
    indexed like `slices`.
    """
    index = {sl.key: i for i, sl in enumerate(slices)}
    parent = np.array([index.get(sl.extra.get("parent", ""), -1) for sl in slices], dtype=np.int64)
    has = parent >= 0
    parent_p = np.zeros(len(slices))
    if has.any():
        p_rows, p_errs = n_rows[parent[has]], n_errors[parent[has]]
        parent_p[has] = np.where(p_rows > n_rows[has],
                                 np.atleast_1d(fisher_greater(n_errors[has], n_rows[has], p_errs, p_rows)), 1.0)
    worse = parent_p <= alpha
    shown = passed & worse & ~too_large
    children: dict[int, list[int]] = {}
    for i in np.flatnonzero(has):
        children.setdefault(int(parent[i]), []).append(int(i))
    folds: dict[int, list[int]] = {}
    frontier: dict[int, list[int]] = {}
    for i in sorted(range(len(slices)), key=lambda i: -slices[i].extra.get("node", 0)):   # deepest first
        below = []
        for c in children.get(i, []):
            below += frontier[c] if c in folds else ([c] if shown[c] else [])
        frontier[i] = below
        if not shown[i] or not below:
            continue
        # frontier nodes lie in disjoint subtrees of i: their counts add up
        u_rows, u_errs = int(n_rows[below].sum()), int(n_errors[below].sum())
        p = fisher_greater(int(n_errors[i]) - u_errs, int(n_rows[i]) - u_rows,
                           total_errors - u_errs, total_rows - u_rows)
        if p > alpha:
            folds[i] = below
    return parent_p, worse, folds


#: item operators whose conditions are intervals of one numeric column
_INTERVAL_OPS = ("<", ">=", "range")


def _rule_signatures(items: ItemSet, counts: RuleCounts) -> list[tuple]:
    """Per rule, in search order: its items as (column, operator kind, low, high, item)
    sorted by column, for `_variant`. Numeric conditions become intervals [low, high)."""
    facts = []
    for index, item in enumerate(items.items):
        column = int(items.column_of[index])
        if item.op in _INTERVAL_OPS:
            low, high = ((-np.inf, item.value) if item.op == "<" else
                         (item.value, np.inf) if item.op == ">=" else item.value)
            facts.append((column, "interval", float(low), float(high), index))
        else:
            facts.append((column, item.op, 0.0, 0.0, index))
    out = []
    for level in counts.levels:
        for rule in level:
            out.append(tuple(sorted((facts[i] for i in rule.tolist()), key=lambda f: f[0])))
    return out


def _variant(a: tuple, b: tuple) -> bool:
    """Whether two rules are the same conditions at other thresholds: the same columns, and
    on each column the same item or two overlapping numeric intervals."""
    if len(a) != len(b):
        return False
    for (col_a, kind_a, lo_a, hi_a, item_a), (col_b, kind_b, lo_b, hi_b, item_b) in zip(a, b):
        if col_a != col_b:
            return False
        if item_a == item_b:
            continue
        if not (kind_a == kind_b == "interval" and max(lo_a, lo_b) < min(hi_a, hi_b)):
            return False
    return True


def _needed(k_out: int, r_out: int, excess: float, rest_errors: int, rest_rows: int, step: float) -> bool:
    """Whether a slice's `r_out` rows outside another slice (holding `k_out` errors) make
    it a finding of its own: they err significantly more than the `rest_rows` rows outside
    the other slice (one-sided Fisher at `step`) and hold at least half of the slice's
    `excess` errors."""
    if r_out == 0:
        return False
    outside_excess = k_out - r_out * (rest_errors / rest_rows) if rest_rows else 0.0
    return (fisher_greater(k_out, r_out, rest_errors, rest_rows) <= step
            and outside_excess >= 0.5 * excess)
