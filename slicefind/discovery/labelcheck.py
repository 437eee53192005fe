"""Label check: rows whose given label the model's scores contradict with confidence.

A slice source for suspected label mistakes. With the model's scores (one probability
per class, or the probability of the predicted class) it counts the *confident joint*
of confident learning: per class ``j`` a threshold ``t_j``, the mean score of class
``j`` over the rows labelled ``j``; a row labelled ``i`` whose score of some other class
``j`` reaches ``t_j`` (``j`` the highest-scoring such class) is a suspected label
mistake, counted at ``(i, j)``. The suspected rows become one candidate, and every
``(given label, suspected label)`` pair with enough rows one more, nested under it.

Each candidate is tested against the model's own probabilities, not against the error
rate (suspected rows are nearly all model errors by construction, so a Fisher test of
their error rate would pass on any data): if the labels were right and the scores
calibrated, the given label of a confidently scored row would be drawn from its scores,
so the number of disagreements has a known Poisson-binomial law. A candidate passes
when the disagreements exceed it, after the same Benjamini–Hochberg step as every
other source.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from slicefind.discovery.describe import label_column
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError, did_you_mean
from slicefind.discovery.records import LABEL_SOURCE, Slice, default_min_rows
from slicefind.discovery.table import EvalTable
from slicefind.values import value_text

__all__ = ["UNION_KEY", "LabelCheck", "label_check_slices", "score_columns",
           "poisson_binomial_sf", "nested_tests", "params_summary", "SCORE_KINDS"]

#: the key of the candidate holding every suspected row; the pairs' ``extra["parent"]``
UNION_KEY = "label_check:all"
#: what the scores hold: one probability per class, or that of the predicted class
SCORE_KINDS = ("per_class", "predicted")
#: per-class scores whose row sums stray further than this from 1 get a warning
SUM_TOLERANCE = 0.01


@dataclass(frozen=True, repr=False)
class LabelCheck:
    """The confident joint of a dev set and the candidates drawn from it.

    Attributes
    ----------
    slices : tuple of Slice
        ``source`` "label_check": first the union of suspected rows (key `UNION_KEY`),
        then one per (given, suspected) pair with at least ``min_rows`` rows (key
        ``"label_check:<i>-><j>"``, ``extra["parent"]`` the union's key). ``extra`` holds
        ``given`` and ``suspected`` (class values, None for the union), ``expected`` (the
        disagreements calibrated scores would give) and ``p_value``.
    tests : DataFrame
        One line per slice: ``key, description, n_rows`` (disagreements seen),
        ``n_scored`` (confidently scored rows the count is over), ``expected``,
        ``p_value``.
    joint : DataFrame
        The confident joint: rows the given label, columns the class the scores point
        to (class texts), counts of confidently scored rows; off the diagonal, the
        suspected label mistakes.
    thresholds : Series
        ``t_j`` per class (class texts); NaN for a class no row is labelled with.
    confident_class : ndarray of int
        Per analysed row, the index in `classes` of the class its scores confidently
        point to, -1 for none.
    classes : tuple
        The class values (the sorted values of label and prediction).
    kind : {"per_class", "predicted"}
    columns : tuple of str
        The score columns of data used (empty for an array).
    """

    slices: tuple[Slice, ...]
    tests: pd.DataFrame
    joint: pd.DataFrame
    thresholds: pd.Series
    confident_class: np.ndarray
    classes: tuple
    kind: str
    columns: tuple[str, ...]
    _given: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    _chance: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))  # null P(label = c), per class
    _predicted: np.ndarray = field(default_factory=lambda: np.zeros(0))    # predicted kind: P(label != j*)

    @property
    def suspected(self) -> np.ndarray:
        """Sorted positions (among the analysed rows) of every suspected label mistake."""
        confident = self.confident_class >= 0
        return np.flatnonzero(confident & (self.confident_class != self._given)).astype(np.intp)

    def __repr__(self):
        return (f"LabelCheck(kind={self.kind!r}, n_suspected={self.suspected.size}, "
                f"n_slices={len(self.slices)})")

    def remainder_p_value(self, pairs: Sequence[tuple[int, int]]) -> float:
        """One-sided p-value of the suspected rows outside the given (given, suspected)
        class-index pairs: whether calibrated scores would leave that many disagreements
        there. With scores of the predicted class only, the chance of a row landing
        outside the pairs is bounded by its chance of disagreeing at all (conservative)."""
        scored = self.confident_class >= 0
        js = self.confident_class[scored]
        given = self._given[scored]
        outside = js != given
        for i, j in pairs:
            outside &= ~((given == i) & (js == j))
        if self.kind == "predicted":
            chance = self._predicted[scored]
        else:
            chance = 1.0 - self._chance[scored, js]
            for i, j in pairs:
                chance = chance - np.where(js == j, self._chance[scored, i], 0.0)
        return poisson_binomial_sf(np.clip(chance, 0.0, 1.0), int(outside.sum()))


def score_columns(scores, columns) -> tuple[str, ...]:
    """The columns of data that ``scores=`` names (a name, a sequence of names or a mapping
    class -> name); () for an array. Unknown or repeated names get a clear error."""
    if isinstance(scores, str):
        names = (scores,)
    elif isinstance(scores, Mapping):
        names = tuple(scores.values())
        if not all(isinstance(c, str) for c in names):
            bad = next(c for c in names if not isinstance(c, str))
            msg = f"scores maps classes to column names; got {bad!r} ({type(bad).__name__})."
            raise SlicefindTypeError(msg)
    elif isinstance(scores, (list, tuple)) and scores and all(isinstance(c, str) for c in scores):
        names = tuple(scores)
    else:
        return ()
    for name in names:
        if name not in columns:
            msg = f"scores names {name!r}, which is not a column of data.{did_you_mean(name, columns)}"
            raise SlicefindValueError(msg)
    repeated = sorted({c for c in names if names.count(c) > 1})
    if repeated:
        msg = f"scores names column(s) {repeated!r} more than once; give each class its own column."
        raise SlicefindValueError(msg)
    return names


def label_check_slices(table: EvalTable, scores, *, min_rows: int | None = None) -> LabelCheck:
    """Suspected label mistakes: rows the model's scores confidently give another class.

    The confident joint of confident learning [1]_. Per class ``j``, the threshold
    ``t_j`` is the mean score of class ``j`` over the rows labelled ``j``. A row labelled
    ``i`` is *confidently scored* when some class reaches its threshold
    (``p(j | x) >= t_j``), and counted at ``(i, j*)`` with ``j*`` the highest-scoring such
    class. Off the diagonal (``j* != i``) it is a suspected label mistake. The
    candidates are the union of suspected rows (described "scores confidently disagree
    with <label column>") and, with at least `min_rows` rows, each pair ``i -> j*``
    ("<label column> = 7, scores confidently say 1"), nested under the union.

    With only the probability ``q`` of the predicted class, a row's score is known for
    that class alone, so a row can only be suspected at its prediction, and ``t_j``
    cannot be computed exactly: the rows labelled ``j`` but predicted otherwise have an
    unknown ``p(j | x)``, at most ``min(q, 1 - q)`` when the prediction is the most
    probable class. The threshold used is the top of that range,
    ``t_j = (sum of q over rows labelled and predicted j + sum of min(q, 1 - q) over rows
    labelled j, predicted otherwise) / rows labelled j``, never below the exact one. So
    every row it suspects, the per-class count suspects too (when the prediction is the
    argmax of the scores); it misses rows suspected at a class other than the
    prediction, and rows whose exact threshold lies below the bound.

    Each candidate gets a p-value from the model's own probabilities. If the labels
    were right and the scores calibrated, a confidently scored row's label would be
    class ``c`` with probability ``p(c | x)``, independently across rows, so the
    disagreements among the rows scored towards ``j*`` follow a Poisson-binomial law:
    the union's count has chances ``1 - p(j* | x)``, a pair ``i -> j``'s chances
    ``p(i | x)`` over the rows scored towards ``j`` (with the predicted class only,
    ``1 - q``, an upper bound, so its test is conservative). The p-value is the upper
    tail at the count seen (`poisson_binomial_sf`); the thresholds are treated as fixed.
    An overconfident model fails this test too, labels right or not: a passing
    candidate says the model disagrees with the labels more often than its own
    probabilities allow, and the review tells a wrong label from a wrong model.

    Parameters
    ----------
    table : EvalTable
        With labels and predictions, every row analysed (no ``error_kind``/``true_class``
        restriction).
    scores : str, sequence of str, mapping, or array-like
        The model's probabilities, in [0, 1], finite and complete: a column name (the
        probability of the predicted class); a sequence of column names, one per class
        in the sorted order of the class values, or a mapping class -> column; or an
        ``(n,)`` array (the predicted class) or ``(n, k)`` array (one column per class,
        sorted order). ``k`` must equal the number of distinct values of label and
        prediction together.
    min_rows : int, optional
        Fewest rows of a pair candidate; default ``max(20, 0.5% of rows)``. The union is
        a candidate whatever its size: a short list of rows to check one by one.

    Returns
    -------
    LabelCheck

    Raises
    ------
    SlicefindValueError, SlicefindTypeError
        Scores that are not numbers, missing, outside [0, 1], of the wrong length or
        number of columns, or naming unknown columns or classes.

    References
    ----------
    .. [1] C. G. Northcutt, L. Jiang and I. L. Chuang, "Confident learning: estimating
           uncertainty in dataset labels", J. Artif. Intell. Res. 70 (2021) 1373-1411
           (the confident joint, their eq. 1).

    Examples
    --------
    >>> from slicefind.discovery.table import build_eval_table
    >>> rng = np.random.default_rng(3)
    >>> digit = rng.integers(0, 3, 600)                     # digits read off parcel labels
    >>> scores = np.full((600, 3), 0.005)
    >>> scores[np.arange(600), digit] = 0.99
    >>> written = digit.copy()
    >>> written[:30] = (digit[:30] + 1) % 3                   # a clerk keyed 30 labels wrong
    >>> frame = pd.DataFrame({"written": written, "read": digit})
    >>> table = build_eval_table(frame, label="written", prediction="read")
    >>> check = label_check_slices(table, scores, min_rows=5)
    >>> check.suspected.size, bool(np.all(check.suspected < 30))
    (30, True)
    >>> for sl in check.slices:
    ...     print(f"{sl.description}: {sl.rows.size} rows, {sl.extra['expected']:.0f} expected, "
    ...           f"p = {sl.extra['p_value']:.1e}")
    scores confidently disagree with written: 30 rows, 6 expected, p = 1.6e-12
    written = 0, scores confidently say 2: 7 rows, 1 expected, p = 5.2e-05
    written = 1, scores confidently say 0: 12 rows, 1 expected, p = 5.3e-10
    written = 2, scores confidently say 1: 11 rows, 1 expected, p = 1.7e-08

    Scores at 0.94 instead would expect 36 disagreements among the 600 rows; 30 are then
    no evidence against the labels (p = 0.87), however many of them are wrong.
    """
    if not isinstance(table, EvalTable):
        raise SlicefindTypeError(f"table must be an EvalTable; got {type(table).__name__}.")
    if table.label is None or table.prediction is None:
        msg = ("scores= needs label= and prediction=: the label check compares the scores with the "
               f"given labels; this table defines errors by {table.error_definition!r}.")
        raise SlicefindValueError(msg)
    if table.n_rows != table.n_input_rows:
        msg = ("scores= needs every row analysed (the per-class thresholds average the rows of "
               f"each class); this table keeps {table.n_rows:,} of {table.n_input_rows:,} rows "
               f"({table.error_definition}). Drop error_kind=/true_class= for the label check.")
        raise SlicefindValueError(msg)
    if min_rows is None:
        min_rows = default_min_rows(table.n_rows)
    elif isinstance(min_rows, bool) or not isinstance(min_rows, (int, np.integer)) or min_rows < 1:
        raise SlicefindValueError(f"min_rows must be an integer >= 1; got {min_rows!r}.")

    classes = _classes(table.label, table.prediction)
    given = _codes(table.label, classes)
    predicted = _codes(table.prediction, classes)
    values, kind, columns = _score_values(table, scores, classes)
    k = len(classes)
    if kind == "per_class":
        thresholds, confident = _per_class_joint(values, given, k)
        chance = np.clip(values, 0.0, 1.0)
        disagree = np.zeros(0)
    else:
        thresholds, confident = _predicted_joint(values, given, predicted, k)
        chance = np.zeros((0, 0))
        disagree = 1.0 - values

    texts = [value_text(c) for c in classes]
    scored = confident >= 0
    joint = np.zeros((k, k), dtype=np.int64)
    np.add.at(joint, (given[scored], confident[scored]), 1)
    joint_frame = pd.DataFrame(joint, index=pd.Index(texts, name="given"),
                               columns=pd.Index(texts, name="scores_say"))
    check = LabelCheck(slices=(), tests=pd.DataFrame(), joint=joint_frame,
                       thresholds=pd.Series(thresholds, index=pd.Index(texts, name="class"), name="threshold"),
                       confident_class=confident, classes=tuple(classes), kind=kind,
                       columns=columns, _given=given, _chance=chance, _predicted=disagree)

    name = label_column(table)
    slices: list[Slice] = []
    tests = []
    suspected = check.suspected
    if suspected.size:
        js = confident[scored]
        if kind == "per_class":
            null = 1.0 - chance[scored, js]
        else:
            null = disagree[scored]
        slices.append(_candidate(f"scores confidently disagree with {name}", suspected, UNION_KEY, "",
                                 None, None, null, 1, tests))
        for i in range(k):
            for j in range(k):
                if i == j or joint[i, j] < min_rows:
                    continue
                rows = np.flatnonzero(scored & (given == i) & (confident == j)).astype(np.intp)
                towards = scored & (confident == j)
                null = chance[towards, i] if kind == "per_class" else disagree[towards]
                slices.append(_candidate(f"{name} = {texts[i]}, scores confidently say {texts[j]}", rows,
                                         f"{LABEL_SOURCE}:{i}->{j}", UNION_KEY, classes[i], classes[j],
                                         null, len(slices) + 1, tests))
    test_frame = pd.DataFrame(tests, columns=["key", "description", "n_rows", "n_scored", "expected",
                                              "p_value"])
    return LabelCheck(slices=tuple(slices), tests=test_frame, joint=joint_frame, thresholds=check.thresholds,
                      confident_class=confident, classes=tuple(classes), kind=kind, columns=columns,
                      _given=given, _chance=chance, _predicted=disagree)


def _candidate(description: str, rows: np.ndarray, key: str, parent: str, given, suspected,
               null: np.ndarray, node: int, tests: list) -> Slice:
    """One Slice with its calibration test; appends its line of `tests`."""
    null = np.clip(null, 0.0, 1.0)
    p_value = poisson_binomial_sf(null, int(rows.size))
    expected = float(null.sum())
    tests.append({"key": key, "description": description, "n_rows": int(rows.size),
                  "n_scored": int(null.size), "expected": expected, "p_value": p_value})
    return Slice(source=LABEL_SOURCE, description=description, rows=rows, key=key,
                 extra={"node": node, "parent": parent, "given": given, "suspected": suspected,
                        "expected": expected, "p_value": p_value})


def nested_tests(check: LabelCheck, passed: np.ndarray, too_large: np.ndarray, alpha: float):
    """The tree tests of `slices._tree_tests`, for a label check's candidates (indexed like
    ``check.slices``): returns (parent p-values, worse flags, node -> frontier indices).

    The union hangs under the root (parent p-value 0). A pair is "worse than its
    parent" when its own calibration test rejects at `alpha` (its parent p-value is that
    test's): the pairs split the union, so a pair matters when it is a finding of its
    own. The union, when shown (passed, not too large), folds into its shown pairs when
    its suspected rows outside them are not significantly more than calibrated scores
    would leave there (`LabelCheck.remainder_p_value` at `alpha`): the pairs then say
    everything the union says.
    """
    n = len(check.slices)
    parent_p = np.zeros(n)
    for idx, sl in enumerate(check.slices):
        if sl.extra["parent"]:
            parent_p[idx] = sl.extra["p_value"]
    worse = parent_p <= alpha
    shown = passed & worse & ~too_large
    folds: dict[int, list[int]] = {}
    if n and check.slices[0].key == UNION_KEY and shown[0]:
        below = [idx for idx in range(1, n) if shown[idx]]
        if below:
            index = {c: pos for pos, c in enumerate(check.classes)}
            pairs = [(index[check.slices[idx].extra["given"]], index[check.slices[idx].extra["suspected"]])
                     for idx in below]
            if check.remainder_p_value(pairs) > alpha:
                folds[0] = below
    return parent_p, worse, folds


def poisson_binomial_sf(probs, k: int) -> float:
    """``P(K >= k)`` for ``K`` the number of successes among independent trials with
    success chances `probs` (the Poisson-binomial upper tail).

    The law is the product of the trials' generating polynomials ``(1 - p) + p z``,
    multiplied pairwise in a balanced tree: directly while that is cheap (a few thousand
    trials, every tail resolved), by FFT (`scipy.signal.fftconvolve`) beyond, so a
    million trials take under a second. FFT rounding leaves an absolute error of about
    ``1e-16`` per term: with many trials, tails below about ``1e-12`` are not resolved
    (they are far below any cutoff Benjamini–Hochberg sets).

    Examples
    --------
    >>> print(f"{poisson_binomial_sf([0.5, 0.5, 0.5], 2):.3f}")      # 4 of 8 outcomes
    0.500
    >>> print(f"{poisson_binomial_sf([0.9, 0.1], 1):.2f}")          # 1 - 0.1 * 0.9
    0.91
    """
    p = np.asarray(probs, dtype=np.float64).ravel()
    if k <= 0:
        return 1.0
    if k > p.size:
        return 0.0
    pmf = _poisson_binomial_pmf(p)
    return float(min(1.0, max(0.0, pmf[k:].sum())))


def _poisson_binomial_pmf(p: np.ndarray) -> np.ndarray:
    """pmf (0..len(p)) of the number of successes; assumes 0 <= p <= 1 and len(p) >= 1."""
    from scipy.signal import fftconvolve

    size = 1 << max(0, int(p.size - 1).bit_length())
    polys = np.zeros((size, 2))
    polys[:, 0] = 1.0                          # padding trials never succeed
    polys[:p.size, 0] = 1.0 - p
    polys[:p.size, 1] = p
    while polys.shape[0] > 1:
        a, b = polys[0::2], polys[1::2]
        width = a.shape[1]
        if a.shape[0] * width * width <= 1 << 24:     # exact enough for any tail
            out = np.zeros((a.shape[0], 2 * width - 1))
            for j in range(width):
                out[:, j:j + width] += a * b[:, j:j + 1]
        else:
            out = fftconvolve(a, b, axes=1)
            np.clip(out, 0.0, None, out=out)
        polys = out
    return polys[0][:p.size + 1]


def _classes(label: np.ndarray, prediction: np.ndarray) -> list:
    """The distinct values of label and prediction, sorted (by type name and text when the
    values do not compare)."""
    values = pd.unique(pd.Series(np.concatenate([np.asarray(label, dtype=object),
                                                 np.asarray(prediction, dtype=object)])))
    try:
        return sorted(values.tolist())
    except TypeError:
        return sorted(values.tolist(), key=lambda v: (type(v).__name__, str(v)))


def _codes(values: np.ndarray, classes: Sequence) -> np.ndarray:
    """Index in `classes` of each value; assumes every value is one of them."""
    lookup = {c: i for i, c in enumerate(classes)}
    return np.fromiter((lookup[v] for v in np.asarray(values, dtype=object).tolist()), np.int64,
                       len(values))


def _score_values(table: EvalTable, scores, classes: Sequence) -> tuple[np.ndarray, str, tuple[str, ...]]:
    """Validated scores as floats: ((n,) or (n, k) array, kind, columns used)."""
    data, k = table.data, len(classes)
    texts = [value_text(c) for c in classes]
    shown = ", ".join(texts[:10]) + (", ..." if k > 10 else "")
    columns = score_columns(scores, data.columns)
    if isinstance(scores, Mapping):
        lookup = {}
        for key, column in scores.items():
            match = next((i for i, c in enumerate(classes) if _same_class(key, c)), None)
            if match is None:
                msg = (f"scores maps class {key!r} to column {column!r}, but {key!r} is not a value of "
                       f"label or prediction (classes: {shown}).")
                raise SlicefindValueError(msg)
            if match in lookup:
                msg = f"scores maps class {texts[match]} twice (to {lookup[match]!r} and {column!r})."
                raise SlicefindValueError(msg)
            lookup[match] = column
        missing = [texts[i] for i in range(k) if i not in lookup]
        if missing:
            msg = (f"scores maps {len(lookup)} classes to columns, but label and prediction hold {k} "
                   f"classes; no column is given for {', '.join(missing[:10])}.")
            raise SlicefindValueError(msg)
        columns = tuple(lookup[i] for i in range(k))
    if columns:
        frame = data[list(columns)]
        values = np.column_stack([_numbers(frame[c].to_numpy(), f"scores column {c!r}", table.positions)
                                  for c in columns])
        where = [f"scores column {c!r}" for c in columns]
    else:
        values = _array(scores, table)
        if values.ndim == 1:
            values = _numbers(values, "scores", table.positions)[:, None]
            where = ["scores"]
        else:
            values = np.column_stack([_numbers(values[:, c], f"scores column {c}", table.positions)
                                      for c in range(values.shape[1])])
            where = [f"scores column {c}" for c in range(values.shape[1])]
    per_class = values.shape[1] > 1 or (isinstance(scores, Mapping))
    if per_class and values.shape[1] != k:
        msg = (f"scores has {values.shape[1]} class columns but label and prediction hold {k} "
               f"classes ({shown}); give one column per class in that order, a mapping class -> "
               "column, or one column with the probability of the predicted class.")
        raise SlicefindValueError(msg)
    for c, name in enumerate(where):
        column = values[:, c]
        bad = ~((column >= 0.0) & (column <= 1.0))
        if bad.any():
            first = int(np.flatnonzero(bad)[0])
            msg = (f"{name} holds {float(column[first])!r} at row {int(table.positions[first])} "
                   f"({int(bad.sum())} values outside [0, 1]); scores are probabilities in [0, 1].")
            raise SlicefindValueError(msg)
    if per_class:
        sums = values.sum(axis=1)
        off = np.abs(sums - 1.0) > SUM_TOLERANCE
        if off.any():
            first = int(np.flatnonzero(off)[0])
            msg = (f"scores: {int(off.sum())} rows do not sum to 1 (row {int(table.positions[first])} sums "
                   f"to {sums[first]:.3g}); confident learning reads them as probabilities. Normalise "
                   "each row (or pass softmax outputs) to silence this warning.")
            warnings.warn(msg, stacklevel=3)
        return values, "per_class", columns
    low = values[:, 0] < 1.0 / k
    if low.any():
        first = int(np.flatnonzero(low)[0])
        msg = (f"{where[0]}: {int(low.sum())} rows give the predicted class a probability below 1/{k} "
               f"(row {int(table.positions[first])}: {values[first, 0]:.3g}), which the most probable of "
               f"{k} classes cannot have. One column is read as the probability of the predicted class; "
               "if it is the probability of one class, pass one column per class.")
        warnings.warn(msg, stacklevel=3)
    return values[:, 0], "predicted", columns


def _same_class(key, value) -> bool:
    """Whether a mapping key names class `value` (equal, or the same text: '7' for 7)."""
    try:
        if key == value:
            return True
    except (TypeError, ValueError):
        pass
    return str(key) == value_text(value)


def _array(scores, table: EvalTable) -> np.ndarray:
    """``scores=`` given as an array-like: (n,) or (n, k), checked for shape (not values)."""
    if isinstance(scores, (pd.Series, pd.DataFrame)):
        values = scores.to_numpy()
    elif isinstance(scores, (np.ndarray, list, tuple)):
        values = np.asarray(scores, dtype=object if isinstance(scores, (list, tuple)) else None)
    else:
        msg = (f"scores must be a column name, a sequence of column names, a mapping class -> "
               f"column, or an (n,) or (n, k) array; got {type(scores).__name__}.")
        raise SlicefindTypeError(msg)
    if values.ndim not in (1, 2):
        msg = f"scores must be an (n,) or (n, k) array; got shape {values.shape}."
        raise SlicefindValueError(msg)
    if values.shape[0] != table.n_rows:
        msg = (f"scores has {values.shape[0]} rows but data has {table.n_rows}; they must match "
               "row for row.")
        raise SlicefindValueError(msg)
    if values.ndim == 2 and values.shape[1] == 1:
        msg = ("scores has one column; pass a 1-d array for the probability of the predicted class, "
               "or one column per class.")
        raise SlicefindValueError(msg)
    return values


def _numbers(values: np.ndarray, name: str, positions: np.ndarray) -> np.ndarray:
    """Floats from one column of scores, or an error naming the first non-number or gap."""
    series = pd.Series(values)
    if pd.api.types.is_bool_dtype(series.dtype) or not (
            pd.api.types.is_numeric_dtype(series.dtype) or series.dtype == object):
        msg = f"{name} must hold numbers (probabilities); got {series.dtype} values such as {series.iat[0]!r}."
        raise SlicefindTypeError(msg)
    numeric = pd.to_numeric(series, errors="coerce")
    missing = series.isna().to_numpy()
    bad = numeric.isna().to_numpy() & ~missing
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        msg = (f"{name} must hold numbers (probabilities); row {int(positions[first])} holds "
               f"{series.iat[first]!r} ({int(bad.sum())} such rows).")
        raise SlicefindTypeError(msg)
    if missing.any():
        first = int(np.flatnonzero(missing)[0])
        msg = (f"{name} has {int(missing.sum())} missing values (NaN/None), first at row "
               f"{int(positions[first])}; every row needs its scores.")
        raise SlicefindValueError(msg)
    return numeric.to_numpy(dtype=np.float64)


def _per_class_joint(scores: np.ndarray, given: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Thresholds t_j (mean score of class j over rows labelled j; NaN for a class without
    rows) and, per row, the highest-scoring class at or above its threshold (-1 for none)."""
    counts = np.bincount(given, minlength=k)
    sums = np.bincount(given, weights=scores[np.arange(given.size), given], minlength=k)
    with np.errstate(invalid="ignore", divide="ignore"):
        thresholds = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
    above = scores >= np.where(np.isnan(thresholds), np.inf, thresholds)[None, :]
    masked = np.where(above, scores, -np.inf)
    best = np.argmax(masked, axis=1)
    return thresholds, np.where(above.any(axis=1), best, -1).astype(np.int64)


def _predicted_joint(q: np.ndarray, given: np.ndarray, predicted: np.ndarray,
                     k: int) -> tuple[np.ndarray, np.ndarray]:
    """Thresholds from the probability `q` of the predicted class (the upper end of the
    exact threshold's range, see `label_check_slices`) and, per row, its prediction when
    ``q`` reaches the prediction's threshold (-1 otherwise)."""
    counts = np.bincount(given, minlength=k)
    known = np.where(predicted == given, q, np.minimum(q, 1.0 - q))
    sums = np.bincount(given, weights=known, minlength=k)
    with np.errstate(invalid="ignore", divide="ignore"):
        thresholds = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
    limit = np.where(np.isnan(thresholds), np.inf, thresholds)[predicted]
    return thresholds, np.where(q >= limit, predicted, -1).astype(np.int64)


def params_summary(check: LabelCheck, ids: Mapping[str, str]) -> dict[str, Any]:
    """What a scan keeps of a label check in its params (JSON): kind, columns, thresholds,
    the confident joint, and per listed slice id its given/suspected class and test."""
    tests = check.tests.set_index("key") if len(check.tests) else None
    listed = {}
    for sl in check.slices:
        if sl.key in ids:
            listed[ids[sl.key]] = {
                "given": None if sl.extra["given"] is None else value_text(sl.extra["given"]),
                "suspected": None if sl.extra["suspected"] is None else value_text(sl.extra["suspected"]),
                "n_scored": int(tests.at[sl.key, "n_scored"]), "expected": float(sl.extra["expected"]),
                "p_value": float(sl.extra["p_value"])}
    return {"kind": check.kind, "columns": list(check.columns),
            "classes": [value_text(c) for c in check.classes],
            "thresholds": [None if np.isnan(t) else float(t) for t in check.thresholds],
            "joint": check.joint.to_numpy().tolist(), "n_suspected": int(check.suspected.size),
            "slices": listed}
