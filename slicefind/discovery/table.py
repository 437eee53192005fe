"""The eval table: validated input, error flags and the kind of every column.

Everything the user passes to `find_slices` is checked here, once. Code below this
module trusts an `EvalTable` and never re-validates.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from slicefind.exceptions import SlicefindTypeError, SlicefindValueError, did_you_mean

__all__ = [
    "neutralize_formulas",
    "restore_formula_text",
    "EvalTable",
    "build_eval_table",
    "ERROR_KINDS",
    "CATEGORICAL",
    "NUMERIC",
    "DATETIME",
]

CATEGORICAL = "categorical"
NUMERIC = "numeric"
DATETIME = "datetime"
ERROR_KINDS = ("all", "false_positive", "false_negative")

#: integer columns with at most this many distinct values are mined as categories
MAX_INT_LEVELS = 20
#: string columns with more distinct values than this are skipped (ids, paths, free text)
MAX_STRING_LEVELS = 200


@dataclass(frozen=True, repr=False)
class EvalTable:
    """A validated dev set: which rows are errors and which columns can be mined.

    Build it with `build_eval_table`; the fields are read-only views and are never
    written back into the user's frame.
    """

    data: pd.DataFrame                 # the user's frame, restricted to the analysed rows
    errors: np.ndarray                 # bool, one per analysed row
    positions: np.ndarray              # positional index of each analysed row in the user's frame
    n_input_rows: int                  # rows of the user's frame
    kinds: Mapping[str, str]           # mined column -> CATEGORICAL | NUMERIC | DATETIME
    skipped: Mapping[str, str]         # column -> why it is not mined
    label: np.ndarray | None = None
    prediction: np.ndarray | None = None
    embeddings: np.ndarray | None = None
    id_column: str | None = None
    error_definition: str = "label != prediction"
    columns_used: Mapping[str, str] = field(default_factory=dict)  # role -> column name

    @property
    def n_rows(self) -> int:
        return int(self.errors.size)

    @property
    def n_errors(self) -> int:
        return int(self.errors.sum())

    @property
    def error_rate(self) -> float:
        return self.n_errors / self.n_rows

    def __repr__(self):
        return (f"EvalTable(n_rows={self.n_rows}, n_errors={self.n_errors}, "
                f"mined={len(self.kinds)}, skipped={len(self.skipped)})")


#: a cell a spreadsheet would run as a formula starts with one of these
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def neutralize_formulas(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of `frame` for CSV export whose text cells cannot run as spreadsheet formulas.

    A text cell starting with ``= + - @``, a tab or a carriage return gets a leading
    ``'`` (the usual CSV-injection defence: the spreadsheet shows the text as text);
    `restore_formula_text` takes it off again when the sheet is read back. Numbers and
    other non-text cells are left alone, so ``-1.5`` in a numeric column stays a number.

    Examples
    --------
    >>> out = neutralize_formulas(pd.DataFrame({"tags": ['=hyperlink("x")', "ok"], "n": [-1, 2]}))
    >>> print(out.loc[0, "tags"], out.loc[1, "tags"], out["n"].tolist())
    '=hyperlink("x") ok [-1, 2]
    """
    out = frame.copy()
    for column in out.columns:
        values = out[column]
        if values.dtype == object or pd.api.types.is_string_dtype(values.dtype):
            out[column] = values.map(_guard_formula)
    return out


def _guard_formula(value):
    return "'" + value if isinstance(value, str) and value.startswith(FORMULA_STARTS) else value


def restore_formula_text(text: str) -> str:
    """The cell text as it was before `neutralize_formulas` (``'=x`` -> ``=x``; other text unchanged)."""
    if isinstance(text, str) and len(text) > 1 and text[0] == "'" and text[1:].startswith(FORMULA_STARTS):
        return text[1:]
    return text


def _column_or_array(data: pd.DataFrame, value, argument: str):
    """Resolve a column name or an array-like to (values, column name or None)."""
    if value is None:
        return None, None
    if isinstance(value, str):
        if value not in data.columns:
            msg = f"{argument}={value!r} is not a column of data.{did_you_mean(value, data.columns)}"
            raise SlicefindValueError(msg)
        return data[value].to_numpy(), value
    if isinstance(value, pd.Series):
        values = value.to_numpy()
    elif isinstance(value, (np.ndarray, list, tuple, pd.Index, pd.api.extensions.ExtensionArray)):
        values = np.asarray(value, dtype=object if isinstance(value, (list, tuple)) else None)
    else:
        msg = (f"{argument} must be a column name or an array-like of length {len(data)}; "
               f"got {type(value).__name__}.")
        raise SlicefindTypeError(msg)
    if values.ndim != 1:
        msg = f"{argument} must be one-dimensional; got shape {values.shape}."
        raise SlicefindValueError(msg)
    if len(values) != len(data):
        msg = (f"{argument} has {len(values)} values but data has {len(data)} rows; "
               "they must be the same length.")
        raise SlicefindValueError(msg)
    return values, None


def _no_missing(values: np.ndarray, argument: str) -> None:
    """Raise if `values` holds NaN/None (labels and predictions must be complete)."""
    missing = pd.isna(pd.Series(values, dtype=object if values.dtype == object else None))
    if missing.any():
        first = int(np.flatnonzero(missing.to_numpy())[0])
        msg = (f"{argument} has {int(missing.sum())} missing values (NaN/None), first at row "
               f"{first}; drop those rows or fill them before calling.")
        raise SlicefindValueError(msg)


def error_flags(values: np.ndarray, argument: str) -> np.ndarray:
    """Booleans from a bool or 0/1 array, or a clear error naming the first bad row."""
    flags = pd.Series(values)
    if flags.dtype == bool:
        return flags.to_numpy(dtype=bool)
    bad = ~flags.isin([True, False, 0, 1])
    if bad.any():
        first = int(np.flatnonzero(bad.to_numpy())[0])
        msg = (f"{argument} must hold booleans or 0/1; row {first} holds {flags.iat[first]!r} "
               f"({int(bad.sum())} bad rows).")
        raise SlicefindValueError(msg)
    return flags.to_numpy().astype(bool)


def labels_equal(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Elementwise equality of labels and predictions, tolerant of mixed dtypes."""
    try:
        eq = np.asarray(a == b)
        if eq.shape == a.shape and eq.dtype == bool:
            return eq
    except (TypeError, ValueError):
        pass
    return np.array([x == y for x, y in zip(a.tolist(), b.tolist())], dtype=bool)


def check_hashable(data: pd.DataFrame, column, where: str = "") -> None:
    """Raise if an object column holds unhashable cells (lists, dicts, arrays); `where`
    follows the row number in the message (" of partition 3")."""
    series = data[column]
    if series.dtype != object:
        return
    for i, value in enumerate(series.to_numpy()):
        try:
            hash(value)
        except TypeError:
            msg = (f"column {column!r} holds an unhashable value at row {i}{where} "
                   f"({type(value).__name__}: {str(value)[:40]!r}); pass exclude=[{column!r}] "
                   "to leave it out, or pass vectors through embeddings=.")
            raise SlicefindTypeError(msg) from None


def _column_kind(series: pd.Series, n_rows: int) -> tuple[str | None, str]:
    """Infer how a column is mined: (kind, '') or (None, reason it is skipped)."""
    n_distinct = int(series.nunique(dropna=True))
    integral = True
    if pd.api.types.is_float_dtype(series.dtype) and n_distinct <= MAX_INT_LEVELS:
        values = series.dropna().to_numpy()
        integral = bool(np.all(values == np.round(values)))
    return column_kind(series.dtype, n_distinct, bool(series.isna().any()), integral)


def column_kind(dtype, n_distinct: int, has_missing: bool, integral: bool = True):
    """How a column with these properties is mined: (kind, '') or (None, why it is skipped).

    `integral` says whether a float column's values are all whole numbers (only read
    when it has at most `MAX_INT_LEVELS` distinct values). Shared by every engine, so a
    column gets the same kind however the table is held.
    """
    if n_distinct == 0:
        return None, "all values missing"
    if n_distinct == 1 and not has_missing:
        return None, "a single value"
    if pd.api.types.is_bool_dtype(dtype) or isinstance(dtype, pd.CategoricalDtype):
        return CATEGORICAL, ""
    if pd.api.types.is_datetime64_any_dtype(dtype):
        return DATETIME, ""
    if pd.api.types.is_timedelta64_dtype(dtype):
        return NUMERIC, ""
    if pd.api.types.is_integer_dtype(dtype):
        return (CATEGORICAL if n_distinct <= MAX_INT_LEVELS else NUMERIC), ""
    if pd.api.types.is_float_dtype(dtype):
        if n_distinct <= MAX_INT_LEVELS and integral:
            return CATEGORICAL, ""      # small integer codes stored as float (NaN forced it)
        return NUMERIC, ""
    if n_distinct > MAX_STRING_LEVELS:   # strings and mixed objects
        return None, (f"{n_distinct:,} distinct values (ids, paths and free text are not "
                      "mined; describe text with text_column=)")
    return CATEGORICAL, ""


def build_eval_table(
    data,
    *,
    label=None,
    prediction=None,
    errors=None,
    loss=None,
    threshold=None,
    embeddings=None,
    exclude: Sequence[str] = (),
    error_kind: str = "all",
    positive: Any = None,
    true_class: Any = None,
    id_column: str | None = None,
    mine_label: bool = False,
) -> EvalTable:
    """Validate the user's dev set and derive the per-row error flag.

    Exactly one way of saying which rows are errors must be given: ``label`` and
    ``prediction``; ``errors`` (booleans or 0/1); or ``loss`` with ``threshold``
    (a row is an error when its loss is above the threshold). ``error_kind``
    ("all", "false_positive", "false_negative", binary tasks) and ``true_class``
    restrict the analysis to the rows where that kind of error is possible: the
    negatives for false positives, the positives for false negatives, the rows of
    ``true_class``. Row positions always refer to the user's frame. With
    ``mine_label=True`` a label given as a column is mined like any other column (the
    prediction never is: it defines the errors).

    Examples
    --------
    >>> frame = pd.DataFrame({"site": ["a", "b", "a", "b"], "y": [0, 1, 1, 0], "p": [0, 0, 1, 1]})
    >>> build_eval_table(frame, label="y", prediction="p")
    EvalTable(n_rows=4, n_errors=2, mined=1, skipped=2)
    """
    if not isinstance(data, pd.DataFrame):
        msg = f"data must be a pandas DataFrame; got {type(data).__name__}."
        raise SlicefindTypeError(msg)
    if len(data) == 0:
        raise SlicefindValueError("data is empty (0 rows); slicefind needs a dev set with rows.")
    duplicated = data.columns[data.columns.duplicated()].unique().tolist()
    if duplicated:
        msg = f"data has duplicate column names {duplicated!r}; rename them so each is unique."
        raise SlicefindValueError(msg)
    if isinstance(exclude, str):
        exclude = (exclude,)
    for column in exclude:
        if column not in data.columns:
            msg = f"exclude names {column!r}, which is not a column of data.{did_you_mean(column, data.columns)}"
            raise SlicefindValueError(msg)
    if id_column is not None and id_column not in data.columns:
        msg = f"id_column={id_column!r} is not a column of data.{did_you_mean(id_column, data.columns)}"
        raise SlicefindValueError(msg)
    if error_kind not in ERROR_KINDS:
        msg = f"error_kind must be one of {ERROR_KINDS}; got {error_kind!r}."
        raise SlicefindValueError(msg)

    ways = [name for name, v in (("label/prediction", label if label is not None else prediction),
                                 ("errors", errors), ("loss", loss)) if v is not None]
    if len(ways) != 1:
        msg = ("say which rows are errors in exactly one way: label= and prediction=, or "
               f"errors=, or loss= with threshold=; got {ways or 'none'}.")
        raise SlicefindValueError(msg)

    used: dict[str, str] = {}
    label_values = prediction_values = None
    if label is not None or prediction is not None:
        if label is None or prediction is None:
            missing = "label" if label is None else "prediction"
            raise SlicefindValueError(f"{missing}= is required when the other of label=/prediction= is given.")
        label_values, label_col = _column_or_array(data, label, "label")
        prediction_values, prediction_col = _column_or_array(data, prediction, "prediction")
        _no_missing(label_values, "label" + (f" column {label_col!r}" if label_col else ""))
        _no_missing(prediction_values, "prediction" + (f" column {prediction_col!r}" if prediction_col else ""))
        wrong = ~labels_equal(label_values, prediction_values)
        definition = "label != prediction"
        for role, col in (("label", label_col), ("prediction", prediction_col)):
            if col is not None:
                used[role] = col
    elif errors is not None:
        values, col = _column_or_array(data, errors, "errors")
        wrong = error_flags(values, "errors" + (f" column {col!r}" if col else ""))
        definition = f"{col or 'errors'} is true"
        if col is not None:
            used["errors"] = col
    else:
        if threshold is None:
            raise SlicefindValueError("loss= needs threshold=: a row is an error when its loss is above it.")
        values, col = _column_or_array(data, loss, "loss")
        try:
            numeric = np.asarray(values, dtype=float)
        except (TypeError, ValueError):
            msg = f"loss must be numeric; got values such as {values[0]!r}."
            raise SlicefindTypeError(msg) from None
        if not np.all(np.isfinite(numeric)):
            first = int(np.flatnonzero(~np.isfinite(numeric))[0])
            msg = f"loss has a non-finite value {numeric[first]!r} at row {first}; losses must be finite numbers."
            raise SlicefindValueError(msg)
        if not isinstance(threshold, (int, float, np.number)) or not np.isfinite(threshold):
            raise SlicefindValueError(f"threshold must be a finite number; got {threshold!r}.")
        wrong = numeric > threshold
        definition = f"{col or 'loss'} > {threshold:g}"
        if col is not None:
            used["loss"] = col

    keep = np.ones(len(data), dtype=bool)
    if error_kind != "all" or true_class is not None:
        if label_values is None:
            msg = "error_kind= and true_class= need label= and prediction= (not errors= or loss=)."
            raise SlicefindValueError(msg)
    if error_kind != "all":
        positive = positive_class(error_kind, positive, pd.unique(pd.Series(label_values, dtype=object)))
        is_pos = labels_equal(label_values, np.full(len(label_values), positive, dtype=object))
        keep &= ~is_pos if error_kind == "false_positive" else is_pos
        definition = f"{error_kind.replace('_', ' ')} (positive = {positive!r})"
    if true_class is not None:
        is_class = labels_equal(label_values, np.full(len(label_values), true_class, dtype=object))
        if not is_class.any():
            msg = f"true_class={true_class!r} never occurs in label."
            raise SlicefindValueError(msg)
        keep &= is_class
        definition += f", label = {true_class!r}"

    positions = np.flatnonzero(keep).astype(np.intp)
    wrong = wrong[keep]
    n_errors = int(wrong.sum())
    if n_errors == 0:
        msg = (f"no row is an error ({definition}) among the {wrong.size:,} rows analysed; "
               "there is nothing to explain. Check label=/prediction= or the error definition.")
        raise SlicefindValueError(msg)
    if n_errors == wrong.size:
        msg = (f"every one of the {wrong.size:,} rows analysed is an error ({definition}); "
               "slices need correct rows to compare against. Check label=/prediction=.")
        raise SlicefindValueError(msg)

    emb = None
    emb_columns = embedding_columns(embeddings, data.columns)
    if embeddings is not None:
        if emb_columns:
            embeddings = vectors_of(data, emb_columns)
        emb = _check_embeddings(embeddings, len(data))
        emb = emb if keep.all() else emb[keep]

    not_mined = (set(exclude) | set(mined_roles(used, mine_label)) | ({id_column} if id_column else set())
                 | set(emb_columns))
    view = data.iloc[positions] if not keep.all() else data
    kinds: dict[str, str] = {}
    skipped: dict[str, str] = {}
    for column in data.columns:
        if column in not_mined:
            skipped[column] = ("excluded" if column in exclude else "id column" if column == id_column
                               else "embeddings column" if column in emb_columns
                               else f"{_role(used, column)} column")
            continue
        check_hashable(data, column)
        kind, reason = _column_kind(view[column], len(view))
        if kind is None:
            skipped[column] = reason
        else:
            kinds[column] = kind

    return EvalTable(
        data=view,
        errors=wrong,
        positions=positions,
        n_input_rows=len(data),
        kinds=kinds,
        skipped=skipped,
        label=None if label_values is None else label_values[keep],
        prediction=None if prediction_values is None else prediction_values[keep],
        embeddings=emb,
        id_column=id_column,
        error_definition=definition,
        columns_used=used,
    )


def positive_class(error_kind: str, positive, classes: np.ndarray):
    """The positive class for `error_kind`: `positive` checked against the label values
    `classes`, or inferred (1 or True) for binary labels; a clear error otherwise."""
    present = set(classes.tolist())
    if positive is None:
        if len(classes) > 2:
            msg = (f"error_kind={error_kind!r} is for binary tasks, but label has {len(classes)} "
                   "classes; pass positive= to name the positive class.")
            raise SlicefindValueError(msg)
        positive = 1 if 1 in present else (True if True in present else None)
        if positive is None:
            msg = (f"error_kind={error_kind!r} needs positive=, the positive class; labels are "
                   f"{sorted(map(str, classes))!r}.")
            raise SlicefindValueError(msg)
    if positive not in present:
        msg = f"positive={positive!r} is not a label value; labels are {sorted(map(str, classes))[:10]!r}."
        raise SlicefindValueError(msg)
    return positive


def mined_roles(used: Mapping[str, str], mine_label: bool) -> list[str]:
    """The role columns (label, prediction, errors, loss) that are not mined: all of them,
    or all but the label with `mine_label` (the label column is then a column like any
    other, unless the prediction is the same column)."""
    label = used.get("label") if mine_label else None
    return [c for role, c in used.items() if role != "label" or c != label or c == used.get("prediction")]


def _role(used: Mapping[str, str], column: str) -> str:
    return next(role for role, col in used.items() if col == column)


def embedding_columns(embeddings, columns) -> tuple[str, ...]:
    """The columns of data named by ``embeddings=`` (one vector column, or one column per
    dimension); () when embeddings is an array. Unknown names get a clear error."""
    if isinstance(embeddings, str):
        names = (embeddings,)
    elif (isinstance(embeddings, (list, tuple)) and embeddings
          and all(isinstance(c, str) for c in embeddings)):
        names = tuple(embeddings)
    else:
        return ()
    for name in names:
        if name not in columns:
            msg = f"embeddings names {name!r}, which is not a column of data.{did_you_mean(name, columns)}"
            raise SlicefindValueError(msg)
    return names


def vectors_of(frame: pd.DataFrame, names: tuple[str, ...], where: str = "") -> np.ndarray:
    """The (len(frame), d) embeddings held in `names`: one column of vectors (lists or
    arrays, as Parquet list columns load) or one numeric column per dimension."""
    values = frame[names[0]].to_numpy()
    if len(names) > 1 or (values.dtype != object and values.dtype.kind in "fiub"):
        out = frame[list(names)].to_numpy()
    elif len(values) == 0:
        return np.zeros((0, 0))
    else:
        lengths = np.fromiter((np.size(v) if v is not None else 0 for v in values), np.int64, len(values))
        if (lengths != lengths[0]).any():
            row = int(np.flatnonzero(lengths != lengths[0])[0])
            msg = (f"embeddings column {names[0]!r} holds vectors of {lengths[0]} and {lengths[row]} "
                   f"values (row {row}{where}); every row needs one vector of the same length.")
            raise SlicefindValueError(msg)
        out = np.stack([np.asarray(v) for v in values])
    if out.dtype.kind not in "fiub":
        first = frame[names[0]].iloc[0]
        msg = (f"embeddings column{'s' if len(names) > 1 else ''} {', '.join(map(repr, names))} must "
               f"hold numbers (a vector per row); got values such as {first!r}.")
        raise SlicefindTypeError(msg)
    return out


def _check_embeddings(embeddings, n_rows: int) -> np.ndarray:
    """A finite float (n_rows, d) array, or a clear error."""
    if isinstance(embeddings, pd.DataFrame):
        embeddings = embeddings.to_numpy()
    try:
        emb = np.asarray(embeddings)
        if emb.dtype.kind != "f":              # float32 stays float32: no copy at 1M x 384
            emb = emb.astype(np.float64)
    except (TypeError, ValueError):
        msg = f"embeddings must be a numeric (n_rows, d) array; got {type(embeddings).__name__}."
        raise SlicefindTypeError(msg) from None
    if emb.ndim != 2:
        msg = f"embeddings must be two-dimensional (n_rows, d); got shape {emb.shape}."
        raise SlicefindValueError(msg)
    if emb.shape[0] != n_rows:
        msg = f"embeddings has {emb.shape[0]} rows but data has {n_rows}; they must match row for row."
        raise SlicefindValueError(msg)
    if emb.shape[1] == 0:
        raise SlicefindValueError("embeddings has 0 columns; it needs at least one dimension.")
    bad_rows, first = nonfinite_rows(emb)
    if first is not None:
        raise SlicefindValueError(nonfinite_message(bad_rows, *first))
    return emb


def nonfinite_rows(emb: np.ndarray) -> tuple[int, tuple[int, int, float] | None]:
    """(rows holding NaN or inf, (row, column, value) of the first such value or None),
    checked in blocks: no n x d mask of the whole array."""
    bad_rows, first = 0, None
    for start in range(0, emb.shape[0], 65_536):
        bad = ~np.isfinite(emb[start:start + 65_536])
        if bad.any():
            bad_rows += int(bad.any(axis=1).sum())
            if first is None:
                row, col = (int(x) for x in np.argwhere(bad)[0])
                first = (start + row, col, float(emb[start + row, col]))
    return bad_rows, first


def nonfinite_message(bad_rows: int, row: int, col: int, value: float) -> str:
    return (f"embeddings holds {bad_rows} rows with NaN or inf, first at row {row} (column {col}: "
            f"{value!r}); drop or impute them first.")
