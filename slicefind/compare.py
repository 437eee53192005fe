"""Before and after: on the same dev rows, did a fix move the error rate, and what got worse?

`compare` judges a second model (the one after a fix) against the first on the rows of
a scan. Each row is right or wrong under each model, so the comparison is paired: per
line of the table (the whole set, each slice, each category named in review) it counts
the rows the fix repaired and the rows it broke, and tests them with McNemar's exact test.
Benjamini–Hochberg controls the false discovery rate over every slice and category
compared. A line that got significantly worse is a regression, whatever the total did.

With the data, the errors of the second model are scanned too (`find_slices` with the
scan's options), and slices that no earlier slice resembles, or that got significantly
worse, are listed as new trouble.

`run_compare` is the command line's entry: it reads the new predictions from a file,
matches them to the scan's rows by the id column, and writes ``compare.csv``.
"""
from __future__ import annotations

import inspect
import math
from dataclasses import dataclass, replace
from typing import Any, Mapping

import numpy as np
import pandas as pd

from slicefind.exceptions import SlicefindTypeError, SlicefindValueError, check_level, did_you_mean
from slicefind.discovery.records import jaccard
from slicefind.discovery.find import FoundSlices, find_slices
from slicefind.stats import bh_qvalues, mcnemar_exact, wilson_interval
from slicefind.discovery.table import error_flags, labels_equal, mined_roles
from slicefind.review.tally import Tally, UNTAGGED, normalize_tag
from slicefind.values import json_scalar
from slicefind.workspace import Workspace

__all__ = ["Comparison", "compare", "match_after", "format_comparison", "COMPARE_COLUMNS",
           "NEW_SLICE_COLUMNS", "OVERALL", "KINDS", "NEW_JACCARD", "NEW_STATUSES",
           "COMPARE_CSV", "NEW_SLICES_CSV"]

#: ``slice_id`` of the table's first line, the whole set of analysed rows
OVERALL = "overall"
#: what a category line made only of reviewed error rows measures (said in its description)
KNOWN_ERRORS_NOTE = ("all wrong before by construction, so the line counts fixes of known errors, "
                     "not the category's error rate")

#: values of the table's ``kind`` column, in table order
KINDS = ("overall", "slice", "category")
#: an after-scan slice is new when no earlier slice overlaps it at least this much (Jaccard)
NEW_JACCARD = 0.5
#: values of ``new_slices["status"]``
NEW_STATUSES = ("new", "worse")
#: files `run_compare` writes into the workspace
COMPARE_CSV = "compare.csv"
NEW_SLICES_CSV = "compare_new_slices.csv"

_RATE_COLUMNS = ("n_rows", "n_errors_before", "n_errors_after", "error_rate_before",
                 "error_rate_before_low", "error_rate_before_high", "error_rate_after",
                 "error_rate_after_low", "error_rate_after_high", "change", "n_fixed", "n_broken",
                 "p_value", "q_value")
#: columns of `Comparison.table`, in order
COMPARE_COLUMNS = (("slice_id", "category", "kind", "description") + _RATE_COLUMNS
                   + ("improved", "regression"))
#: columns of `Comparison.new_slices`, in order
NEW_SLICE_COLUMNS = (("slice_id", "description", "status") + _RATE_COLUMNS
                     + ("closest_slice", "jaccard"))
_INT_COLUMNS = ("n_rows", "n_errors_before", "n_errors_after", "n_fixed", "n_broken")
_TEXT_COLUMNS = ("slice_id", "category", "kind", "description", "status", "closest_slice")
#: find_slices options that say which rows are errors or analysed: compare sets those itself
_FIXED_SCAN_OPTIONS = ("data", "label", "prediction", "errors", "loss", "threshold", "error_kind",
                       "positive", "true_class", "id_column")
#: options of the earlier scan that the after scan reuses
_REUSED_SCAN_OPTIONS = ("max_terms", "min_rows", "fdr", "confidence_level", "engine", "n_bins",
                        "clusters", "merge_jaccard", "distinct_jaccard", "max_share")


@dataclass(frozen=True, repr=False)
class Comparison:
    """Two models on the same rows: per slice and per category, the error rate before and after.

    Attributes
    ----------
    table : DataFrame
        One line per group of rows, the whole set first (``kind == "overall"``), then the
        slices of the scan (``kind == "slice"``) and the categories of the review
        (``kind == "category"``), each ranked by ``change`` (largest fall in error rate
        first). Columns: ``slice_id`` (``"overall"``, the slice's id, or ``""`` for a
        category), ``category`` (the category's name; for a slice, the category that names
        it), ``kind``, ``description``, ``n_rows``, ``n_errors_before``, ``n_errors_after``,
        ``error_rate_before`` and ``error_rate_after`` with Wilson intervals
        (``*_low``, ``*_high``), ``change`` (after minus before; negative is better),
        ``n_fixed`` (wrong before, right after), ``n_broken`` (right before, wrong after),
        ``p_value`` (McNemar's exact test), ``q_value`` (Benjamini–Hochberg over the slices
        and categories; the overall line is one test of its own, so its q-value is its
        p-value), ``improved`` and ``regression`` (significantly better or worse at
        ``fdr``).
    overall : dict
        The overall line as a dict.
    new_slices : DataFrame
        Slices of the after model's errors that are ``"new"`` (no earlier slice overlaps them
        with Jaccard >= 0.5) or ``"worse"`` (they overlap one, and their rows got
        significantly worse), with the same rate columns plus ``closest_slice`` and
        ``jaccard``. Empty when no rescan ran (see ``params["rescan"]``).
    params : dict
        Options and provenance: ``fdr``, ``confidence_level``, ``before``, ``after``,
        ``error_definition``, ``scan_id``, ``rescan``, and for `run_compare` how rows were
        matched.
    after_found : FoundSlices or None
        The scan of the after model's errors (rows are positions in the user's frame).
    """

    table: pd.DataFrame
    overall: Mapping[str, Any]
    new_slices: pd.DataFrame
    params: Mapping[str, Any]
    after_found: FoundSlices | None = None

    @property
    def regressions(self) -> pd.DataFrame:
        """The lines that got significantly worse."""
        return self.table[self.table["regression"]].reset_index(drop=True)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready parts (tables as column lists), e.g. for a workspace artifact.

        `from_dict` rebuilds the comparison without ``after_found``.
        """
        return {"format": 1, "table": _frame_to_lists(self.table),
                "new_slices": _frame_to_lists(self.new_slices),
                "overall": {k: json_scalar(v, keep_infinite=True) for k, v in self.overall.items()},
                "params": {k: json_scalar(v, keep_infinite=True) for k, v in self.params.items()}}

    @classmethod
    def from_dict(cls, parts: Mapping[str, Any]) -> "Comparison":
        """Inverse of `to_dict`."""
        if not isinstance(parts, Mapping) or parts.get("format") != 1:
            msg = "parts must be the dict Comparison.to_dict() returns (with format 1)."
            raise SlicefindValueError(msg)
        table = _lists_to_frame(parts["table"], COMPARE_COLUMNS)
        new = _lists_to_frame(parts["new_slices"], NEW_SLICE_COLUMNS)
        overall = {k: (math.nan if v is None else v) for k, v in parts["overall"].items()}
        return cls(table=table, overall=overall, new_slices=new, params=dict(parts["params"]))

    def __repr__(self):
        change = self.overall.get("change", math.nan)
        return (f"Comparison(n_rows={self.overall.get('n_rows')}, change={change:+.4f}, "
                f"n_improved={int(self.table['improved'].sum())}, "
                f"n_regressions={int(self.table['regression'].sum())}, "
                f"n_new_slices={len(self.new_slices)})")


# --- plain parts for storage -----------------------------------------------------------------


def _frame_to_lists(frame: pd.DataFrame) -> dict[str, list]:
    return {str(c): [json_scalar(v, keep_infinite=True) for v in frame[c].tolist()] for c in frame.columns}


def _lists_to_frame(parts: Mapping[str, list], columns) -> pd.DataFrame:
    """A table rebuilt from `_frame_to_lists`, with the dtypes `compare` gives it."""
    frame = pd.DataFrame({c: parts.get(c, []) for c in columns}, columns=list(columns))
    return _typed(frame)


def _typed(frame: pd.DataFrame) -> pd.DataFrame:
    """One dtype per column: text, int64 counts, bool flags, float64 otherwise."""
    types = {}
    for column in frame.columns:
        if column in _TEXT_COLUMNS:
            types[column] = "str"
        elif column in _INT_COLUMNS:
            types[column] = np.int64
        elif column in ("improved", "regression"):
            types[column] = bool
        else:
            types[column] = np.float64
    if len(frame) == 0:
        return pd.DataFrame({c: pd.Series([], dtype=t) for c, t in types.items()})
    frame = frame.copy()
    for column in frame.columns:
        if types[column] == np.float64:
            frame[column] = pd.to_numeric(frame[column], errors="coerce")
    return frame.astype(types)


# --- validating the inputs -------------------------------------------------------------------


def _source(found_or_workspace, categories):
    """(found, tally or None, slice names of the workspace) from a FoundSlices or a Workspace."""
    if not (isinstance(categories, (bool, np.bool_)) or isinstance(categories, Tally)):
        msg = (f"categories must be True, False or a Tally (from tally()); got "
               f"{type(categories).__name__}.")
        raise SlicefindTypeError(msg)
    if isinstance(found_or_workspace, FoundSlices):
        found, names = found_or_workspace, {}
        result = categories if isinstance(categories, Tally) else None
    elif isinstance(found_or_workspace, Workspace):
        ws = found_or_workspace
        found = ws.load_found()
        names = ws.names() if categories is not False else {}
        if isinstance(categories, Tally):
            result = categories
        elif categories:
            reviews = ws.reviews()
            result = ws.tally() if bool(reviews["reviewed"].any()) else None
        else:
            result = None
    else:
        msg = (f"found_or_workspace must be a FoundSlices (from find_slices) or a Workspace; got "
               f"{type(found_or_workspace).__name__}.")
        raise SlicefindTypeError(msg)
    return found, result, names


def check_data(data, table) -> None:
    """`data` must be the scanned frame: its row count, and its ids where the scan kept them."""
    if not isinstance(data, pd.DataFrame):
        raise SlicefindTypeError(f"data must be a pandas DataFrame; got {type(data).__name__}.")
    if len(data) != table.n_input_rows:
        msg = (f"data has {len(data):,} rows but the scan was of {table.n_input_rows:,}; pass the "
               "frame that was scanned (the same rows in the same order).")
        raise SlicefindValueError(msg)
    column = table.id_column
    if column and column in data.columns and column in table.data.columns:
        given = data[column].to_numpy()[table.positions]
        stored = table.data[column].to_numpy()
        same = _same_ids(given, stored)
        if not same.all():
            i = int(np.flatnonzero(~same)[0])
            msg = (f"data is not the scanned frame: row {int(table.positions[i])} has {column} = "
                   f"{given[i]!r} but the scan has {stored[i]!r} ({int((~same).sum()):,} rows "
                   "differ). Pass the frame that was scanned, rows in the same order.")
            raise SlicefindValueError(msg)


def _same_ids(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Elementwise equality of id values, comparing text forms when the types differ."""
    same = labels_equal(a, b)
    if not same.all():
        same = labels_equal(np.asarray([str(v) for v in a], dtype=object),
                      np.asarray([str(v) for v in b], dtype=object))
    return same


def _values(value, argument: str, data, table) -> tuple[np.ndarray, str]:
    """The analysed rows' values of a column name or an array over the user's frame rows."""
    if isinstance(value, str):
        if data is None:
            msg = (f"{argument}={value!r} names a column, so pass data= (the scanned frame holding "
                   "it), or pass the predictions as an array.")
            raise SlicefindValueError(msg)
        if value not in data.columns:
            msg = f"{argument}={value!r} is not a column of data.{did_you_mean(value, data.columns)}"
            raise SlicefindValueError(msg)
        return data[value].to_numpy()[table.positions], f"column {value!r}"
    if isinstance(value, pd.DataFrame) or not isinstance(
            value, (np.ndarray, pd.Series, list, tuple, pd.Index, pd.api.extensions.ExtensionArray)):
        msg = (f"{argument} must be a column name of data or an array-like with one value per row "
               f"of the scanned frame; got {type(value).__name__}.")
        raise SlicefindTypeError(msg)
    values = (value.to_numpy() if isinstance(value, (pd.Series, pd.Index)) else
              np.asarray(value, dtype=object if isinstance(value, (list, tuple)) else None))
    if values.ndim != 1:
        raise SlicefindValueError(f"{argument} must be one-dimensional; got shape {values.shape}.")
    if len(values) != table.n_input_rows:
        msg = (f"{argument} has {len(values):,} values but the scanned frame has "
               f"{table.n_input_rows:,} rows; give one value per row, in the frame's order.")
        raise SlicefindValueError(msg)
    return values[table.positions], "array"


def _wrong(value, argument: str, data, table) -> tuple[np.ndarray, np.ndarray | None, str]:
    """Per analysed row: is it an error under this model? Also the raw values and their origin.

    With labels, `value` holds predictions; without (a scan of error flags or losses), it
    holds error flags (booleans or 0/1).
    """
    values, origin = _values(value, argument, data, table)
    if table.label is None:
        flags = error_flags(values, f"{argument} (error flags: the scan has no labels)")
        return flags, None, origin
    missing = pd.isna(pd.Series(values, dtype=object)).to_numpy()
    if missing.any():
        first = int(np.flatnonzero(missing)[0])
        msg = (f"{argument} has {int(missing.sum()):,} missing predictions (NaN/None) among the "
               f"scanned rows, first at row {int(table.positions[first])}; every scanned row "
               "needs one.")
        raise SlicefindValueError(msg)
    label = np.asarray(table.label)
    wrong = ~labels_equal(label, values)
    if wrong.all():
        known = set(pd.unique(pd.Series(label, dtype=object)).tolist())
        if not pd.Series(values, dtype=object).isin(known).any():
            shown_labels = sorted(map(repr, list(known)[:5]))
            shown_values = [repr(v) for v in pd.unique(pd.Series(values, dtype=object))[:5]]
            msg = (f"{argument} shares no value with the labels (labels such as "
                   f"{', '.join(shown_labels)}; {argument} such as {', '.join(shown_values)}), so "
                   "every row would be an error. Predictions must be label values of the same type.")
            raise SlicefindValueError(msg)
    return wrong, values, origin


# --- the groups of rows compared -------------------------------------------------------------


def _index_of(rows: np.ndarray, positions: np.ndarray) -> np.ndarray:
    """Analysed-row indices of user-frame positions (all assumed analysed)."""
    return np.searchsorted(positions, np.asarray(rows, dtype=np.intp))


def _category_groups(found: FoundSlices, result, names: Mapping[str, str]):
    """(category, description, user rows, slice ids) for every category of the review.

    A category that names slices (the workspace's names, or the tally's: a given name or
    the tag used most in the slice's stratum) covers those slices' rows; every category
    covers the reviewed rows tagged with it.
    """
    slice_ids = list(found.table["slice_id"])
    named: dict[str, str] = {}
    if result is not None:
        for sid, name in zip(result.slices["slice_id"], result.slices["name"]):
            if isinstance(name, str) and name and sid in slice_ids:
                named[sid] = name
    for sid, name in names.items():
        if sid in slice_ids and name and sid not in named:
            named[sid] = normalize_tag(name)
    tagged: dict[str, list[int]] = {}
    order: list[str] = []
    if result is not None:
        order = [c for c in result.categories["category"] if c != UNTAGGED]
        done = result.reviews[result.reviews["reviewed"]]
        for row, tags in zip(done["row"], done["tags"]):
            for tag in (t for t in str(tags).split(";") if t):
                tagged.setdefault(tag, []).append(int(row))
    for name in named.values():
        if name not in order:
            order.append(name)
    groups = []
    for category in order:
        sids = [sid for sid in slice_ids if named.get(sid) == category]
        tag_rows = np.unique(np.asarray(tagged.get(category, []), dtype=np.intp))
        rows = tag_rows
        for sid in sids:
            rows = np.union1d(rows, found.rows(sid))
        if rows.size == 0:
            continue
        if sids:
            inside = np.zeros(tag_rows.size, dtype=bool)
            for sid in sids:
                inside |= np.isin(tag_rows, found.rows(sid))
            outside = int((~inside).sum())
            text = f"slice{'s' if len(sids) > 1 else ''} {', '.join(sids)}"
            if outside:
                text += f" and {outside} more reviewed row{'s' if outside != 1 else ''} tagged with it"
        else:
            text = (f"{tag_rows.size} reviewed error row{'s' if tag_rows.size != 1 else ''} tagged "
                    f"with it: {KNOWN_ERRORS_NOTE}")
        groups.append((category, text, rows, sids))
    return groups, named


def _rates(groups_idx, wrong_before, wrong_after, confidence_level) -> dict[str, np.ndarray]:
    """Per group of analysed rows: counts, Wilson intervals, change and McNemar's p-value."""
    fixed_row = wrong_before & ~wrong_after
    broken_row = ~wrong_before & wrong_after
    n = np.array([idx.size for idx in groups_idx], dtype=np.int64)
    eb = np.array([int(wrong_before[idx].sum()) for idx in groups_idx], dtype=np.int64)
    ea = np.array([int(wrong_after[idx].sum()) for idx in groups_idx], dtype=np.int64)
    fixed = np.array([int(fixed_row[idx].sum()) for idx in groups_idx], dtype=np.int64)
    broken = np.array([int(broken_row[idx].sum()) for idx in groups_idx], dtype=np.int64)
    b_low, b_high = wilson_interval(eb, n, confidence_level=confidence_level)
    a_low, a_high = wilson_interval(ea, n, confidence_level=confidence_level)
    return {"n_rows": n, "n_errors_before": eb, "n_errors_after": ea,
            "error_rate_before": eb / n, "error_rate_before_low": np.atleast_1d(b_low),
            "error_rate_before_high": np.atleast_1d(b_high), "error_rate_after": ea / n,
            "error_rate_after_low": np.atleast_1d(a_low), "error_rate_after_high": np.atleast_1d(a_high),
            "change": (ea - eb) / n, "n_fixed": fixed, "n_broken": broken,
            # McNemar (1947), exact: broken ~ Bin(fixed + broken, 1/2) if both models err alike
            "p_value": np.atleast_1d(mcnemar_exact(broken, fixed))}


# --- the after scan ----------------------------------------------------------------------------


def _scan_options(found: FoundSlices, scan_options: Mapping[str, Any]) -> dict[str, Any]:
    """The earlier scan's options, overridden by the caller's; unknown keywords refused."""
    allowed = set(inspect.signature(find_slices).parameters) - {"data"}
    for key in scan_options:
        if key in _FIXED_SCAN_OPTIONS:
            msg = (f"{key}= cannot be passed to compare: the after scan explains the after model's "
                   "errors on the scan's own rows, so compare sets which rows are errors itself.")
            raise SlicefindValueError(msg)
        if key not in allowed:
            msg = (f"compare() got an unexpected keyword {key!r}; extra keywords go to find_slices "
                   f"for the after scan.{did_you_mean(key, sorted(allowed))}")
            raise SlicefindTypeError(msg)
    options = {k: found.params[k] for k in _REUSED_SCAN_OPTIONS if k in found.params}
    if found.params.get("text_method") in ("lsa", "sentence-transformers"):   # embedded again, the same way
        options.update(text=found.params["text"], text_features=bool(found.params.get("text_features", True)))
        if found.params.get("text_method") == "sentence-transformers":
            options["text_model"] = found.params.get("text_model")
    options.update(scan_options)
    return options


def _leaking_columns(frame: pd.DataFrame, raw_refs, flag_refs) -> list[str]:
    """Columns holding the labels, either model's predictions or either model's error flags."""
    out = []
    for column in frame.columns:
        if frame[column].dtype.kind in "mM":
            continue                                   # times hold no labels or predictions
        values = frame[column].to_numpy()
        if any(labels_equal(np.asarray(ref), values).all() for ref in raw_refs):
            out.append(column)
            continue
        series = frame[column]
        if series.isna().any():
            continue
        if pd.api.types.is_bool_dtype(series.dtype) or (
                pd.api.types.is_numeric_dtype(series.dtype) and series.isin([0, 1]).all()):
            flags = series.to_numpy().astype(bool)
            if any(np.array_equal(flags, ref) for ref in flag_refs):
                out.append(column)
    return out


def _rescan(found: FoundSlices, data: pd.DataFrame, wrong_before, wrong_after, raw_refs,
            options: dict[str, Any]) -> FoundSlices:
    """`find_slices` on the after model's errors, over the scan's rows; rows mapped back to the
    user's frame."""
    table = found.eval_table
    positions = np.asarray(table.positions, dtype=np.intp)
    frame = data.iloc[positions]
    embeddings = options.pop("embeddings", None)
    if embeddings is not None:
        emb = np.asarray(embeddings)
        if emb.ndim == 2 and emb.shape[0] == table.n_input_rows and emb.shape[0] != positions.size:
            emb = emb[positions]
        options["embeddings"] = emb
    exclude = [c for c in found.params.get("exclude", ()) if c in frame.columns]
    # the role columns stay out, but the label is mined again when the scan mined it
    exclude += [c for c in mined_roles(table.columns_used, bool(found.params.get("mine_label", False)))
                if c in frame.columns]
    exclude += _leaking_columns(frame.drop(columns=[c for c in exclude if c in frame.columns]),
                                raw_refs, (wrong_before, wrong_after))
    exclude += [c for c in options.pop("exclude", ()) if c not in exclude]
    id_column = table.id_column if table.id_column in frame.columns else None
    if id_column in exclude:
        exclude.remove(id_column)
    after = find_slices(frame, errors=wrong_after, exclude=tuple(dict.fromkeys(exclude)),
                        id_column=id_column, **options)
    inner = after.eval_table
    moved = replace(inner, positions=positions[inner.positions], n_input_rows=table.n_input_rows)
    rows = {sid: positions[after.rows(sid)] for sid in after.table["slice_id"]}
    params = dict(after.params)
    params["exclude"] = list(dict.fromkeys(exclude))
    return FoundSlices(table=after.table, tested=after.tested, eval_table=moved, params=params,
                       _rows=rows, extras=dict(after.extras))


def _new_slices(found: FoundSlices, after: FoundSlices, wrong_before, wrong_after, fdr,
                confidence_level) -> pd.DataFrame:
    """After-scan slices that are new (Jaccard < 0.5 with every earlier slice) or worse."""
    positions = np.asarray(found.eval_table.positions, dtype=np.intp)
    ids = list(after.table["slice_id"])
    if not ids:
        return _typed(pd.DataFrame(columns=list(NEW_SLICE_COLUMNS)))
    earlier = {sid: found.rows(sid) for sid in found.table["slice_id"]}
    rows = [after.rows(sid) for sid in ids]
    rates = _rates([_index_of(r, positions) for r in rows], wrong_before, wrong_after,
                   confidence_level)
    rates["q_value"] = bh_qvalues(rates["p_value"])
    closest, best = [], []
    for r in rows:
        scores = {sid: jaccard(r, e) for sid, e in earlier.items()}
        top = max(scores, key=lambda s: (scores[s], s)) if scores else ""
        closest.append(top)
        best.append(scores[top] if scores else 0.0)
    best = np.asarray(best, dtype=np.float64)
    worse = (rates["q_value"] <= fdr) & (rates["n_broken"] > rates["n_fixed"])
    status = np.where(best < NEW_JACCARD, "new", np.where(worse, "worse", ""))
    frame = pd.DataFrame({"slice_id": ids, "description": list(after.table["description"]),
                          "status": status, **rates, "closest_slice": closest, "jaccard": best})
    frame = frame[frame["status"] != ""]
    frame = frame.sort_values(["status", "change", "p_value"], kind="stable")
    return _typed(frame[list(NEW_SLICE_COLUMNS)].reset_index(drop=True))


# --- compare -------------------------------------------------------------------------------------


def compare(found_or_workspace, before=None, after=None, *, data=None, categories=True,
            fdr: float = 0.05, confidence_level: float = 0.95, rescan: bool = True,
            **scan_options) -> Comparison:
    """Compare two models on the rows of a scan: overall, per slice and per category.

    Each analysed row is right or wrong under the model before the fix and under the one
    after. For every group of rows (all of them, each slice of the scan, each category
    named in review) the table gives both error rates with Wilson intervals, the change,
    the rows fixed and broken, and McNemar's exact test on the paired per-row correctness
    (only the rows whose correctness changed carry information). Benjamini–Hochberg
    adjusts the p-values over the slices and categories together; the overall line is one
    test on its own. A line is a regression when it got significantly worse (q-value at most
    ``fdr``), even if the total improved.

    Parameters
    ----------
    found_or_workspace : FoundSlices or Workspace
        The scan (from `find_slices`, or the latest scan of a workspace, with its reviews).
    before, after : str or array-like, optional
        The two models' predictions for the scanned frame: arrays with one value per row of
        the user's frame (positional; an index is ignored), or column names of ``data``.
        ``before`` defaults to the predictions the scan was made with; ``after`` is required.
        When the scan has no labels (it was made from ``errors=`` or ``loss=``), pass error
        flags instead (booleans or 0/1, true for an error). Rows the scan did not analyse
        (``error_kind=``, ``true_class=``) are ignored.
    data : DataFrame, optional
        The scanned frame, same rows in the same order (checked against the scan's id
        column). Needed for column names and for the after scan.
    categories : bool or Tally, default=True
        Compare the categories of the review too. With a workspace, True uses its reviews
        and names (`Workspace.tally`); with a FoundSlices pass the `Tally` of its review. A
        category that names slices (a given name, or the tag used most in a slice's
        stratum) covers those slices' rows; every category covers the reviewed rows tagged
        with it, so a category without a slice covers only reviewed error rows: all
        wrong before by construction, its line counts fixes of known errors, not the
        category's error rate (its description says so, and `format_comparison` marks it).
    fdr : float, default=0.05
        False discovery rate for ``improved``, ``regression`` and new slices.
    confidence_level : float, default=0.95
        Coverage of the Wilson intervals.
    rescan : bool, default=True
        With ``data``: scan the after model's errors (`find_slices` with the earlier scan's
        options, over the same rows) and list slices that are new or got worse. Columns
        holding labels, either model's predictions or error flags are never mined.
    **scan_options
        Options for that scan, overriding the earlier scan's (``embeddings=`` over the
        user's frame rows, ``max_terms=``, ``min_rows=``, ...).

    Returns
    -------
    Comparison

    References
    ----------
    .. [1] Q. McNemar, Psychometrika 12 (1947) 153-157 (paired proportions; exact form).
    .. [2] Y. Benjamini and Y. Hochberg, J. R. Statist. Soc. B 57 (1995) 289-300.
    .. [3] E. B. Wilson, J. Amer. Statist. Assoc. 22 (1927) 209-212.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> n = 3000
    >>> depot = pd.DataFrame({"scanner": rng.choice(["S1", "S2", "S3"], n),
    ...                       "belt": rng.choice(["slow", "fast"], n)})
    >>> digit = rng.integers(0, 10, n)
    >>> bad = (depot["scanner"] == "S3").to_numpy()
    >>> wrong = rng.random(n) < np.where(bad, 0.35, 0.06)
    >>> old = np.where(wrong, (digit + 1) % 10, digit)
    >>> found = find_slices(depot, label=digit, prediction=old)
    >>> new = np.where(bad, digit, old)          # the fix repairs scanner S3 only
    >>> result = compare(found, after=new)
    >>> print(result.table[["slice_id", "description", "change", "improved", "regression"]]
    ...       .round(3).to_string(index=False))
    slice_id      description  change  improved  regression
     overall all scanned rows  -0.117      True       False
          R1     scanner = S3  -0.344      True       False
    """
    found, result, names = _source(found_or_workspace, categories)
    fdr = check_level("fdr", fdr)
    confidence_level = check_level("confidence_level", confidence_level)
    if not isinstance(rescan, (bool, np.bool_)):
        raise SlicefindTypeError(f"rescan must be True or False; got {rescan!r}.")
    table = found.eval_table
    if data is not None:
        check_data(data, table)
    if after is None:
        raise SlicefindValueError("after= is required: the predictions of the model after the fix.")
    options = _scan_options(found, scan_options)
    if scan_options and (data is None or not rescan):
        first = next(iter(scan_options))
        msg = (f"{first}= is an option of the after scan, which runs only with data= and "
               "rescan=True; pass data= or leave it out.")
        raise SlicefindValueError(msg)
    if before is None:
        wrong_before, raw_before, before_origin = table.errors.astype(bool), table.prediction, "stored"
    else:
        wrong_before, raw_before, before_origin = _wrong(before, "before", data, table)
    wrong_after, raw_after, after_origin = _wrong(after, "after", data, table)
    positions = np.asarray(table.positions, dtype=np.intp)

    # the lines: overall, slices, categories
    slice_ids = list(found.table["slice_id"])
    groups, named = _category_groups(found, result, names) if categories is not False else ([], {})
    keys = [(OVERALL, "", "overall", "all scanned rows")]
    keys += [(sid, named.get(sid, ""), "slice", str(desc))
             for sid, desc in zip(slice_ids, found.table["description"])]
    keys += [("", cat, "category", text) for cat, text, _, _ in groups]
    idx = [np.arange(positions.size)]
    idx += [_index_of(found.rows(sid), positions) for sid in slice_ids]
    idx += [_index_of(rows, positions) for _, _, rows, _ in groups]
    rates = _rates(idx, wrong_before, wrong_after, confidence_level)
    p = rates["p_value"]
    q = np.empty_like(p)
    q[0] = p[0]                                        # the overall line: one test of its own
    q[1:] = bh_qvalues(p[1:])                          # Benjamini–Hochberg over slices + categories
    rates["q_value"] = q
    frame = pd.DataFrame(keys, columns=["slice_id", "category", "kind", "description"])
    for column, values in rates.items():
        frame[column] = values
    significant = frame["q_value"] <= fdr
    frame["improved"] = significant & (frame["n_fixed"] > frame["n_broken"])
    frame["regression"] = significant & (frame["n_broken"] > frame["n_fixed"])
    rank = {kind: i for i, kind in enumerate(KINDS)}
    frame["_kind"] = frame["kind"].map(rank)
    frame["_order"] = np.arange(len(frame))
    frame = frame.sort_values(["_kind", "change", "p_value", "_order"], kind="stable")
    frame = _typed(frame[list(COMPARE_COLUMNS)].reset_index(drop=True))

    after_found = None
    new = _typed(pd.DataFrame(columns=list(NEW_SLICE_COLUMNS)))
    if data is None:
        rescan_note = "no data given"
    elif not rescan:
        rescan_note = "off"
    elif not wrong_after.any() or wrong_after.all():
        rescan_note = "skipped: the after model is " + ("never" if not wrong_after.any() else "always") + " wrong"
    else:
        raw_refs = [r for r in (table.label, table.prediction, raw_before, raw_after) if r is not None]
        after_found = _rescan(found, data, wrong_before, wrong_after, raw_refs, options)
        new = _new_slices(found, after_found, wrong_before, wrong_after, fdr, confidence_level)
        rescan_note = f"{len(after_found.table)} slices in the after errors"

    overall = {k: (v.item() if isinstance(v, np.generic) else v) for k, v in frame.iloc[0].items()}
    params = {"fdr": fdr, "confidence_level": confidence_level, "before": before_origin,
              "after": after_origin, "error_definition": table.error_definition,
              "scan_id": found.extras.get("scan_id"), "n_slices": len(slice_ids),
              "n_categories": len(groups), "rescan": rescan_note,
              "categories_from": ("none" if categories is False else
                                  "tally" if result is not None else "names" if named else "none")}
    return Comparison(table=frame, overall=overall, new_slices=new, params=params,
                      after_found=after_found)


# --- matching a file of new predictions to the scan (the command line's compare) -----------------


def _examples(values, n: int = 5) -> str:
    shown = ", ".join(repr(v.item() if isinstance(v, np.generic) else v) for v in list(values)[:n])
    more = len(values) - n
    return shown + (f" and {more:,} more" if more > 0 else "")


def match_after(found: FoundSlices, after: pd.DataFrame, *, id_column, prediction_column,
                 data: pd.DataFrame | None) -> tuple[np.ndarray, dict[str, Any]]:
    """The new predictions of the frame `after` as an array over the user's frame rows,
    matched to the scan's rows by the id column (or by order when the scan has none);
    returns (values, info). The command line's ``compare`` reads `after` from a file."""
    table = found.eval_table
    positions = np.asarray(table.positions, dtype=np.intp)
    n_input = table.n_input_rows
    column = id_column or table.id_column
    if column is not None and column not in after.columns:
        msg = (f"the --after file has no id column {column!r} to match rows by; its columns are "
               f"{list(after.columns)[:10]}.{did_you_mean(column, after.columns)}")
        raise SlicefindValueError(msg)
    others = [c for c in after.columns if c != column]
    if prediction_column is None:
        if len(others) != 1:
            msg = (f"the --after file has {len(others)} columns besides the id column "
                   f"({others[:10]}); name the one with the new predictions (--prediction-column).")
            raise SlicefindValueError(msg)
        prediction_column = others[0]
    elif prediction_column not in after.columns:
        msg = (f"prediction_column={prediction_column!r} is not a column of the --after file; its "
               f"columns are {list(after.columns)[:10]}.{did_you_mean(prediction_column, after.columns)}")
        raise SlicefindValueError(msg)
    if prediction_column == column:
        raise SlicefindValueError(f"prediction_column={prediction_column!r} is the id column.")
    values = after[prediction_column].to_numpy()

    if column is None:
        if len(after) != n_input:
            msg = (f"the scan has no id column, so the --after file's rows are matched by order and "
                   f"it needs exactly {n_input:,} rows, one per scanned row; it has {len(after):,}. "
                   "Scan with --id-column to match rows by id.")
            raise SlicefindValueError(msg)
        return values, {"matched_by": "row order", "prediction_column": prediction_column}

    # the ids each row of the user's frame has (all rows with data, the scanned ones without)
    if data is not None and column in data.columns:
        reference, reference_rows, complete = data[column].to_numpy(), np.arange(n_input), True
    elif table.id_column == column and column in table.data.columns:
        reference, reference_rows = table.data[column].to_numpy(), positions
        complete = positions.size == n_input
    else:
        msg = (f"the scan kept no id column {column!r}; pass the scanned data (--data) holding it, "
               "or leave out --id-column to use the scan's.")
        raise SlicefindValueError(msg)
    given = after[column].to_numpy()
    missing_id = pd.isna(pd.Series(given, dtype=object)).to_numpy()
    if missing_id.any():
        lines = np.flatnonzero(missing_id)
        msg = (f"the --after file has {lines.size:,} rows without an id in {column!r} (file rows "
               f"{_examples(lines.tolist())}); every row needs one.")
        raise SlicefindValueError(msg)
    ref_index, given_index = pd.Index(reference), pd.Index(given)
    if ref_index.dtype.kind != given_index.dtype.kind and (
            ref_index.dtype.kind in "iufb" or given_index.dtype.kind in "iufb"):
        ref_index = pd.Index([str(v) for v in reference], dtype=object)
        given_index = pd.Index([str(v) for v in given], dtype=object)
    if ref_index.has_duplicates:
        repeated = ref_index[ref_index.duplicated()].unique()
        msg = (f"the scan's id column {column!r} is not unique ({repeated.size:,} ids repeat: "
               f"{_examples(repeated.tolist())}); rows cannot be matched by it.")
        raise SlicefindValueError(msg)
    if given_index.has_duplicates:
        counts = given_index.value_counts()
        repeated = counts[counts > 1]
        msg = (f"the --after file has duplicated ids in {column!r}: {repeated.size:,} ids appear more "
               f"than once ({_examples([f'{k} x{v}' for k, v in repeated.items()])}); give each row "
               "one prediction.")
        raise SlicefindValueError(msg)
    where = ref_index.get_indexer(given_index)        # after line -> reference line, -1 if unknown
    extra = np.flatnonzero(where < 0)
    n_ignored = 0
    if extra.size:
        allowed = 0 if complete else n_input - positions.size
        if extra.size > allowed:
            msg = (f"the --after file has {extra.size:,} ids in {column!r} that are not rows of the "
                   f"scan ({_examples(given[extra].tolist())}); it must hold the scanned rows only.")
            if not complete:
                msg += (f" (The scan analysed {positions.size:,} of {n_input:,} rows; pass --data "
                        "to match the others too.)")
            raise SlicefindValueError(msg)
        n_ignored = int(extra.size)
    user_rows = reference_rows[where[where >= 0]]
    line_of = np.full(n_input, -1, dtype=np.int64)
    line_of[user_rows] = np.flatnonzero(where >= 0)
    lacking = positions[line_of[positions] < 0]
    if lacking.size:
        ids = (data[column].to_numpy()[lacking] if data is not None and column in data.columns
               else table.data[column].to_numpy()[np.searchsorted(positions, lacking)])
        msg = (f"the --after file lacks {lacking.size:,} of the {positions.size:,} scanned rows "
               f"(ids in {column!r}: {_examples(ids.tolist())}); every scanned row needs a new "
               "prediction.")
        raise SlicefindValueError(msg)
    if (line_of >= 0).all():
        out = values[line_of]
    else:
        out = np.empty(n_input, dtype=object)
        out[:] = None
        out[line_of >= 0] = values[line_of[line_of >= 0]]
    info = {"matched_by": f"id column {column!r}", "prediction_column": prediction_column,
            "n_after_rows": len(after), "n_ignored": n_ignored}
    return out, info


# --- terminal output ----------------------------------------------------------------------------


def _pct(x: float) -> str:
    return f"{100 * x:.1f}%"


def format_comparison(cmp: Comparison, *, top: int = 15) -> str:
    """The comparison as terminal text: the overall line, regressions, then the table.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> depot = pd.DataFrame({"scanner": rng.choice(["S1", "S2", "S3"], 3000)})
    >>> wrong = rng.random(3000) < np.where(depot["scanner"] == "S3", 0.35, 0.06)
    >>> found = find_slices(depot, errors=wrong)
    >>> fixed = wrong & (depot["scanner"] != "S3").to_numpy()
    >>> print(format_comparison(compare(found, after=fixed)).splitlines()[0])
    overall: 3,000 rows, error rate 16.7% -> 4.4% (-12.3 points; 369 fixed, 0 broken), McNemar p = 1.7e-111: better
    """
    if not isinstance(cmp, Comparison):
        raise SlicefindTypeError(f"cmp must be a Comparison (from compare); got {type(cmp).__name__}.")
    o = cmp.overall
    verdict = "better" if o["improved"] else "WORSE" if o["regression"] else "no clear change"
    lines = [f"overall: {int(o['n_rows']):,} rows, error rate {_pct(o['error_rate_before'])} -> "
             f"{_pct(o['error_rate_after'])} ({100 * o['change']:+.1f} points; {int(o['n_fixed']):,} "
             f"fixed, {int(o['n_broken']):,} broken), McNemar p = {o['p_value']:.2g}: {verdict}"]
    rest = cmp.table[cmp.table["kind"] != "overall"]
    worse = rest[rest["regression"]]
    if len(worse):
        lines.append(f"REGRESSIONS ({len(worse)}, significantly worse at FDR {cmp.params.get('fdr')}):")
        for _, r in worse.iterrows():
            lines.append(f"  {_line_name(r)}: {_pct(r['error_rate_before'])} -> {_pct(r['error_rate_after'])} "
                         f"({int(r['n_broken'])} broken, {int(r['n_fixed'])} fixed, q = {r['q_value']:.2g})"
                         f"  {r['description']}")
    if len(rest):
        shown = rest.head(top)
        known = False
        width = min(48, max(len("line"), max(len(_line_name(r)) for _, r in shown.iterrows())))
        lines.append("")
        lines.append(f"{'line':<{width}} {'rows':>7} {'before [95%]':>21} {'after [95%]':>21} "
                     f"{'change':>7} {'fixed':>6} {'broken':>6} {'q':>8}  flag")
        for _, r in shown.iterrows():
            before = (f"{_pct(r['error_rate_before'])} [{_pct(r['error_rate_before_low'])}–"
                      f"{_pct(r['error_rate_before_high'])}]")
            after = (f"{_pct(r['error_rate_after'])} [{_pct(r['error_rate_after_low'])}–"
                     f"{_pct(r['error_rate_after_high'])}]")
            flag = "REGRESSION" if r["regression"] else "better" if r["improved"] else ""
            if _known_errors_only(r):
                flag = (flag + " " if flag else "") + "(known errors*)"
                known = True
            lines.append(f"{_line_name(r)[:width]:<{width}} {int(r['n_rows']):>7,} {before:>21} {after:>21} "
                         f"{100 * r['change']:>+7.1f} {int(r['n_fixed']):>6,} {int(r['n_broken']):>6,} "
                         f"{r['q_value']:>8.2g}  {flag}")
        if len(rest) > top:
            lines.append(f"... {len(rest) - top} more lines in the table (compare.csv)")
        if known:
            lines.append("* a category of reviewed error rows only: " + KNOWN_ERRORS_NOTE)
    new = cmp.new_slices
    if len(new):
        lines.append("")
        lines.append(f"new trouble in the after errors ({len(new)}): 'new' = no earlier slice overlaps "
                     f"it (Jaccard >= {NEW_JACCARD}); 'worse' = overlaps one and got significantly worse")
        for _, r in new.head(top).iterrows():
            near = f", closest {r['closest_slice']} (J = {r['jaccard']:.2f})" if r["closest_slice"] else ""
            lines.append(f"  {r['status']:<5} {r['slice_id']} of the after scan, {r['description']}: {int(r['n_rows']):,} rows, "
                         f"{_pct(r['error_rate_before'])} -> {_pct(r['error_rate_after'])}, q = "
                         f"{r['q_value']:.2g}{near}")
    elif cmp.params.get("rescan") not in (None, "no data given", "off"):
        lines.append("")
        lines.append(f"after scan: {cmp.params['rescan']}; none is new or significantly worse.")
    return "\n".join(lines)


def _known_errors_only(row) -> bool:
    """A category line whose rows were all errors before: reviewed error rows, no slice."""
    return (row["kind"] == "category" and not row["slice_id"]
            and int(row["n_errors_before"]) == int(row["n_rows"]))


def _line_name(row) -> str:
    """How a table line is named in text: its slice id (and category), or the category."""
    if row["kind"] == "category":
        return f"category '{row['category']}'"
    if row["category"]:
        return f"{row['slice_id']} ({row['category']})"
    return str(row["slice_id"])
