"""What makes a slice distinct: enriched items, labels and confusions, terms, exemplars.

Works for every slice, rule or cluster. `describe_rows` writes the one-line text a
cluster carries in the table (``71% label_stock = glossy, mostly 4 -> 9; 412 rows, 38%
errors``); `describe_slice` gives the report and the review page the full tables.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from slicefind.discovery import bitset
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError, did_you_mean
from slicefind.discovery.table import EvalTable
from slicefind.discovery.text import TOKEN_PATTERN, class_tfidf
from slicefind.values import value_text

__all__ = [
    "SliceDescription",
    "describe_slice",
    "describe_rows",
    "enriched_items",
    "label_shares",
    "confusions",
    "distinctive_terms",
    "exemplars",
    "label_column",
    "prediction_column",
]

#: an item is named in a summary when at least this share of the slice holds it ...
SUMMARY_MIN_SHARE = 0.5
#: ... and it is at least this many times as common in the slice as overall
SUMMARY_MIN_LIFT = 1.5
#: rows the medoid search and the term statistics look at, at most
_MAX_MEDOID_ROWS = 2_000
_MAX_TEXT_ROWS = 50_000


def label_column(table: EvalTable) -> str:
    """The name the user gave the true label (its column), or "label" for an array."""
    return table.columns_used.get("label", "label")


def prediction_column(table: EvalTable) -> str:
    """The name the user gave the prediction (its column), or "prediction" for an array."""
    return table.columns_used.get("prediction", "prediction")


def _percent(share: float) -> str:
    """'71%' (rounded down below 100%, so 99.6% never reads as 100%)."""
    value = math.floor(share * 100) if share < 1 else 100
    return f"{value}%"


def enriched_items(table: EvalTable, rows: np.ndarray, *, items, top: int = 5,
                   max_per_column: int = 2, exclude_texts=(), inside=None) -> pd.DataFrame:
    """Items most over-represented in `rows` (positions among the analysed rows).

    ``inside`` (optional) gives each item's row count within `rows`, for items whose
    bitsets are not in this process (the Dask engine counts them on the workers).

    Ranks items by the gain in share, ``slice_share - overall_share``, and keeps those
    with ``lift = slice_share / overall_share > 1``, at most `max_per_column` per column.
    Columns: ``item, column, n_rows, slice_share, overall_share, lift``.
    """
    columns = ["item", "column", "n_rows", "slice_share", "overall_share", "lift"]
    got = _enriched(table, rows, items, top, max_per_column, exclude_texts, inside)
    if got is None:
        return pd.DataFrame({c: pd.Series(dtype=object if c in ("item", "column") else float)
                             for c in columns})
    chosen, inside, slice_share, overall, lift = got
    frame = pd.DataFrame({
        "item": [items.items[i].text for i in chosen],
        "column": [items.items[i].column for i in chosen],
        "n_rows": inside[chosen].astype(np.int64),
        "slice_share": slice_share[chosen],
        "overall_share": overall[chosen],
        "lift": lift[chosen],
    })
    return frame[columns]


def _enriched(table, rows, items, top, max_per_column, exclude_texts, inside):
    """`enriched_items` as arrays: (chosen item indices, counts inside, slice shares,
    overall shares, lifts), or None when nothing can be counted."""
    if items is None or len(items) == 0 or rows.size == 0 or (items.bits is None and inside is None):
        return None
    if inside is None:
        mask = np.zeros(table.n_rows, dtype=bool)
        mask[rows] = True
        packed = bitset.pack(mask)[0]
        inside = np.bitwise_count(items.bits & packed).sum(axis=1, dtype=np.int64)
    inside = np.asarray(inside, dtype=np.int64)
    slice_share = inside / rows.size
    overall = items.n_rows / table.n_rows
    lift = slice_share / overall
    gain = slice_share - overall
    order = np.lexsort((np.arange(len(items)), -gain))
    chosen, per_column = [], {}
    skip = set(exclude_texts)
    for i in order:
        if lift[i] <= 1.0 or len(chosen) >= top:
            break
        item = items.items[i]
        if item.text in skip or per_column.get(item.column, 0) >= max_per_column:
            continue
        per_column[item.column] = per_column.get(item.column, 0) + 1
        chosen.append(i)
    return chosen, inside, slice_share, overall, lift


class _Codes:
    """The table's labels and predictions as integer codes (pandas' factorize), computed
    once per table: a description per tree node reads them hundreds of times."""

    def __init__(self, table: EvalTable):
        self.label, self.label_values = pd.factorize(pd.Series(table.label, dtype=object), sort=False)
        self.overall = np.bincount(self.label, minlength=len(self.label_values))
        if table.prediction is not None:
            self.prediction, self.prediction_values = pd.factorize(pd.Series(table.prediction, dtype=object),
                                                                   sort=False)


_CODES: dict[int, tuple] = {}


def _codes(table: EvalTable) -> _Codes:
    """`_Codes` of `table`, kept while the table lives (keyed by identity)."""
    import weakref

    key = id(table)
    held = _CODES.get(key)
    if held is None or held[0]() is not table:
        held = (weakref.ref(table, lambda _ref, key=key: _CODES.pop(key, None)), _Codes(table))
        _CODES[key] = held
    return held[1]


def _ranked(values, counts: np.ndarray, top: int) -> np.ndarray:
    """Indices of the `top` largest counts (ties by the values' text), counts > 0 only."""
    present = np.flatnonzero(counts > 0)
    texts = np.array([value_text(values[i]) for i in present], dtype=object)
    order = np.lexsort((texts, -counts[present]))
    return present[order[:top]]


def label_shares(table: EvalTable, rows: np.ndarray, *, top: int = 3) -> pd.DataFrame:
    """The most common true labels in `rows`: ``label, n_rows, slice_share, overall_share``
    (empty when the table has no labels)."""
    columns = ["label", "n_rows", "slice_share", "overall_share"]
    values, counts, overall = _label_counts(table, rows, top)
    return pd.DataFrame({"label": pd.Series(values, dtype=object),
                         "n_rows": np.asarray(counts, dtype=np.int64),
                         "slice_share": np.asarray(counts, dtype=float) / max(rows.size, 1),
                         "overall_share": np.asarray(overall, dtype=float) / table.n_rows})[columns]


def _label_counts(table: EvalTable, rows: np.ndarray, top: int):
    """(the `top` commonest labels in `rows`, their counts there, their counts overall)."""
    if table.label is None or rows.size == 0:
        return [], [], []
    codes = _codes(table)
    inside = np.bincount(codes.label[rows], minlength=len(codes.label_values))
    pick = _ranked(codes.label_values, inside, top)
    return [codes.label_values[i] for i in pick], inside[pick], codes.overall[pick]


def confusions(table: EvalTable, rows: np.ndarray, *, top: int = 5) -> pd.DataFrame:
    """The commonest ``label -> prediction`` pairs among the errors in `rows`:
    ``label, prediction, n_errors, error_share`` (share of the slice's errors); empty
    without labels and predictions."""
    columns = ["label", "prediction", "n_errors", "error_share"]
    labels, predictions, counts, n_wrong = _confusion_counts(table, rows, top)
    return pd.DataFrame({"label": pd.Series(labels, dtype=object),
                         "prediction": pd.Series(predictions, dtype=object),
                         "n_errors": np.asarray(counts, dtype=np.int64),
                         "error_share": np.asarray(counts, dtype=float) / max(n_wrong, 1)})[columns]


def _confusion_counts(table: EvalTable, rows: np.ndarray, top: int):
    """(labels, predictions, error counts) of the `top` commonest pairs among the errors
    in `rows`, and the number of those errors."""
    if table.label is None or table.prediction is None or rows.size == 0:
        return [], [], [], 0
    wrong = rows[table.errors[rows]]
    if wrong.size == 0:
        return [], [], [], 0
    codes = _codes(table)
    width = len(codes.prediction_values)
    pairs, counts = np.unique(codes.label[wrong].astype(np.int64) * width + codes.prediction[wrong],
                              return_counts=True)
    texts = [f"{value_text(codes.label_values[p // width])} -> {value_text(codes.prediction_values[p % width])}"
             for p in pairs]
    order = np.lexsort((np.array(texts, dtype=object), -counts))[:top]
    return ([codes.label_values[pairs[i] // width] for i in order],
            [codes.prediction_values[pairs[i] % width] for i in order], counts[order], int(wrong.size))


def distinctive_terms(texts, rows: np.ndarray, *, top: int = 10, random_state=0) -> pd.DataFrame:
    """Terms that set the texts of `rows` apart from the rest (class-based TF-IDF).

    Two classes, the slice and the rest; a term's weight in the slice is
    ``tf * log(1 + A / f)``, with ``tf`` its count in the slice over the slice's word
    count, ``A`` the mean word count per class and ``f`` its count over both classes.
    Terms seen fewer than twice in the slice are left out. Columns: ``term, weight,
    n_slice, n_rest``. At most 50,000 rest rows are read (a seeded sample).

    References
    ----------
    .. [1] M. Grootendorst, "BERTopic: Neural topic modeling with a class-based TF-IDF
           procedure", arXiv:2203.05794 (2022), section 3.3.

    Examples
    --------
    >>> texts = ["torn label", "torn corner", "clean label", "clean print", "clean"]
    >>> distinctive_terms(texts, np.array([0, 1]))["term"].tolist()
    ['torn']
    """
    from sklearn.feature_extraction.text import CountVectorizer

    texts = pd.Series(texts).fillna("").astype(str).to_numpy()
    n = texts.size
    mask = np.zeros(n, dtype=bool)
    mask[rows] = True
    rest = np.flatnonzero(~mask)
    if rest.size > _MAX_TEXT_ROWS:
        rest = np.sort(np.random.default_rng(random_state).choice(rest, _MAX_TEXT_ROWS, replace=False))
    inside_rows = rows if rows.size <= _MAX_TEXT_ROWS else np.sort(
        np.random.default_rng(random_state).choice(rows, _MAX_TEXT_ROWS, replace=False))
    docs = [" ".join(texts[inside_rows]), " ".join(texts[rest])]
    vectorizer = CountVectorizer(token_pattern=TOKEN_PATTERN, lowercase=True)
    try:
        counts = vectorizer.fit_transform(docs).toarray().astype(np.float64)
    except ValueError:                       # no term at all (empty texts)
        return class_tfidf(np.zeros(0), np.zeros(0), np.array([], dtype=object), top=top)
    # rest counts rescaled to the full rest when it was sampled
    counts[1] *= (n - rows.size) / max(rest.size, 1)
    return class_tfidf(counts[0], counts[1], vectorizer.get_feature_names_out(), top=top)


def exemplars(table: EvalTable, rows: np.ndarray, *, coords=None, n_exemplars: int = 6,
              random_state=0) -> pd.DataFrame:
    """Rows to show a reviewer: those nearest the slice's medoid, then random members.

    The medoid is the member with the least total distance to the others in `coords`
    (the clusters' reduced space, or the raw embeddings), searched among at most 2,000
    members. Half the exemplars (rounded up) are nearest it, the rest are a random draw
    of the other members; without coordinates all are random. Columns: ``row`` (position
    in the user's frame), ``kind`` ("medoid", "near_medoid" or "random"), ``error``,
    ``label``, ``prediction``, ``distance`` (to the medoid; NaN without coordinates).
    """
    rng = np.random.default_rng(random_state)
    k = min(n_exemplars, rows.size)
    picked, kinds, dist = [], [], []
    if coords is not None and k > 0:
        points = np.asarray(coords[rows], dtype=np.float64)
        pool = np.arange(rows.size)
        if pool.size > _MAX_MEDOID_ROWS:
            pool = np.sort(rng.choice(pool, _MAX_MEDOID_ROWS, replace=False))
        sub = points[pool]
        sq = (sub * sub).sum(axis=1)
        total = np.sqrt(np.maximum(sq[:, None] + sq[None, :] - 2 * sub @ sub.T, 0.0)).sum(axis=1)
        medoid = pool[int(np.argmin(total))]
        to_medoid = np.linalg.norm(points - points[medoid], axis=1)
        n_near = (k + 1) // 2
        near = np.lexsort((np.arange(rows.size), to_medoid))[:n_near]
        picked += near.tolist()
        kinds += ["medoid"] + ["near_medoid"] * (near.size - 1)
        others = np.setdiff1d(np.arange(rows.size), near)
        extra = rng.choice(others, min(k - near.size, others.size), replace=False) if others.size else []
        picked += list(extra)
        kinds += ["random"] * len(extra)
        dist = to_medoid[picked].tolist()
    elif k > 0:
        picked = sorted(rng.choice(rows.size, k, replace=False).tolist())
        kinds = ["random"] * k
        dist = [np.nan] * k
    chosen = rows[np.asarray(picked, dtype=np.intp)] if picked else np.zeros(0, dtype=np.intp)
    frame = pd.DataFrame({
        "row": table.positions[chosen].astype(np.int64),
        "kind": kinds,
        "error": table.errors[chosen],
        "label": table.label[chosen] if table.label is not None else None,
        "prediction": table.prediction[chosen] if table.prediction is not None else None,
        "distance": np.asarray(dist, dtype=np.float64),
    })
    if table.id_column is not None:
        frame.insert(1, table.id_column, table.data[table.id_column].to_numpy()[chosen])
    return frame


def _confusion_text(labels, predictions, counts, n_errors: int) -> str:
    """'mostly 4 -> 9' or '3 -> 5 (31%), 8 -> 1 (22%)', or '' when nothing stands out."""
    if not len(counts) or n_errors < 3:
        return ""
    shares = np.asarray(counts, dtype=float) / n_errors
    if shares[0] >= 0.5:
        return f"mostly {value_text(labels[0])} -> {value_text(predictions[0])}"
    parts = [f"{value_text(a)} -> {value_text(b)} ({_percent(s)})"
             for a, b, s in list(zip(labels, predictions, shares))[:2] if s >= 0.2]
    return ", ".join(parts)


def describe_rows(table: EvalTable, rows: np.ndarray, *, items=None, exclude_texts=(), inside=None) -> str:
    """One line that says what the rows (positions among the analysed rows) share.

    Up to two metadata items held by at least half of the rows and at least 1.5 times
    as common as overall (or "no metadata value stands out" when items were given and
    none qualifies), a dominant true label (same test, named by the label column), the
    dominant confusions, then size and error rate: ``71% label_stock = glossy, 80%
    true_digit = 4, mostly 4 -> 9; 412 rows, 38% errors``.
    The slice id is not part of it. ``inside``: as in `enriched_items`. Works on arrays
    throughout: a scan describes every node of its cluster trees.
    """
    rows = np.asarray(rows, dtype=np.intp)
    parts = []
    label_name = label_column(table)
    got = _enriched(table, rows, items, 6, 1, exclude_texts, inside)
    for i in (got[0] if got is not None else []):
        _, _, slice_share, _, lift = got
        if items.items[i].column == label_name:          # the label is named below
            continue
        if slice_share[i] >= SUMMARY_MIN_SHARE and lift[i] >= SUMMARY_MIN_LIFT and len(parts) < 2:
            parts.append(f"{_percent(slice_share[i])} {items.items[i].text}")
    if not parts and items is not None and len(items) and not exclude_texts:
        parts.append("no metadata value stands out")
    values, counts, overall = _label_counts(table, rows, 1)
    if len(values):
        share, base = counts[0] / rows.size, overall[0] / table.n_rows
        if share >= SUMMARY_MIN_SHARE and share >= SUMMARY_MIN_LIFT * base:
            parts.append(f"{_percent(share)} {label_name} = {value_text(values[0])}")
    n_errors = int(table.errors[rows].sum())
    labels, predictions, pair_counts, n_wrong = _confusion_counts(table, rows, 2)
    confusion = _confusion_text(labels, predictions, pair_counts, n_errors)
    if confusion:
        parts.append(confusion)
    size = f"{rows.size:,} rows, {_percent(n_errors / rows.size) if rows.size else '0%'} errors"
    return f"{', '.join(parts)}; {size}" if parts else size


@dataclass(frozen=True, repr=False)
class SliceDescription:
    """What sets one slice apart, from `describe_slice`.

    Attributes
    ----------
    slice_id, source, summary : str
        The id, its source ("rule", "region", "error_mode") and a one-line summary.
    n_rows, n_errors : int
    items : DataFrame
        Over-represented metadata items (`enriched_items`).
    labels : DataFrame
        Commonest true labels (`label_shares`).
    confusions : DataFrame
        Commonest label -> prediction pairs among its errors (`confusions`).
    terms : DataFrame or None
        Distinctive terms of ``text_column`` (`distinctive_terms`), None without one.
    exemplars : DataFrame
        Rows for a reviewer (`exemplars`).
    """

    slice_id: str
    source: str
    summary: str
    n_rows: int
    n_errors: int
    items: pd.DataFrame
    labels: pd.DataFrame
    confusions: pd.DataFrame
    terms: pd.DataFrame | None
    exemplars: pd.DataFrame

    def __repr__(self):
        return f"SliceDescription({self.slice_id!r}, n_rows={self.n_rows}, summary={self.summary!r})"


def describe_slice(found, slice_id: str, *, text_column: str | None = None, n_exemplars: int = 6,
                   top: int = 5, random_state=0) -> SliceDescription:
    """Describe one slice of a `find_slices` result for a report or a reviewer.

    Parameters
    ----------
    found : FoundSlices
        The result holding the slice.
    slice_id : str
        ``"R1"``, ``"C2"``, ...
    text_column : str, optional
        A column of free text (mined or not) whose distinctive terms to list; default
        the scan's ``text=`` column, when it had one.
    n_exemplars : int, default=6
        Rows to pick for a reviewer.
    top : int, default=5
        Rows of each table (items, labels, confusions), and twice as many terms.
    random_state : int, Generator or None, default=0
        Seeds the random exemplars and the text sample.

    Returns
    -------
    SliceDescription

    Examples
    --------
    >>> from slicefind.discovery.find import find_slices
    >>> rng = np.random.default_rng(0)
    >>> frame = pd.DataFrame({"scanner": rng.choice(["S1", "S2", "S3"], 3000),
    ...                       "shift": rng.choice(["day", "night"], 3000)})
    >>> wrong = rng.random(3000) < np.where((frame["scanner"] == "S3") & (frame["shift"] == "night"), 0.4, 0.05)
    >>> found = find_slices(frame, errors=wrong)
    >>> describe_slice(found, "R1").summary
    'scanner = S3 and shift = night: 494 rows, 38% errors'
    """
    if not isinstance(slice_id, str):
        raise SlicefindTypeError(f"slice_id must be a string such as 'R1'; got {type(slice_id).__name__}.")
    table: EvalTable = found.eval_table
    user_rows = found.rows(slice_id)                        # raises for an unknown id
    rows = np.searchsorted(table.positions, user_rows).astype(np.intp)
    if text_column is None and found.params.get("text") in table.data.columns:
        text_column = found.params["text"]
    if text_column is not None and text_column not in table.data.columns:
        msg = f"text_column={text_column!r} is not a column of data.{did_you_mean(text_column, table.data.columns)}"
        raise SlicefindValueError(msg)
    if isinstance(n_exemplars, bool) or not isinstance(n_exemplars, (int, np.integer)) or n_exemplars < 0:
        raise SlicefindValueError(f"n_exemplars must be an integer >= 0; got {n_exemplars!r}.")
    if isinstance(top, bool) or not isinstance(top, (int, np.integer)) or top < 1:
        raise SlicefindValueError(f"top must be an integer >= 1; got {top!r}.")
    record = found.table.loc[found.table["slice_id"] == slice_id].iloc[0]
    source = str(record["source"])
    items = found.extras.get("items")
    own = tuple(str(record["description"]).split(" and ")) if source == "rule" else ()
    clusters = found.extras.get("clusters")
    coords = getattr(clusters, "coords", None)
    if coords is None:
        coords = table.embeddings
    summary = describe_rows(table, rows, items=items, exclude_texts=own)
    if source == "rule":
        summary = f"{record['description']}: {summary}"
    terms = None
    term_counts = found.extras.get("term_counts")
    if term_counts is not None and text_column == found.params.get("text"):
        terms = term_counts.distinctive(rows, top=2 * top)
    elif text_column is not None:
        terms = distinctive_terms(table.data[text_column].to_numpy(), rows, top=2 * top,
                                  random_state=random_state)
    return SliceDescription(
        slice_id=slice_id, source=source, summary=summary, n_rows=int(rows.size),
        n_errors=int(table.errors[rows].sum()),
        items=enriched_items(table, rows, items=items, top=top, exclude_texts=own),
        labels=label_shares(table, rows, top=top),
        confusions=confusions(table, rows, top=top),
        terms=terms,
        exemplars=exemplars(table, rows, coords=coords, n_exemplars=n_exemplars,
                            random_state=random_state))
