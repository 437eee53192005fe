"""Tests for slicefind.discovery.table: validation, error flags and column kinds."""
import numpy as np
import pandas as pd
import pytest

import slicefind as sf
from slicefind.discovery.table import CATEGORICAL, DATETIME, NUMERIC, build_eval_table
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError


def _frame(n=60, seed=0):
    rng = np.random.default_rng(seed)
    return pd.DataFrame({
        "parcel_id": [f"P{i:05d}" for i in range(n)],
        "scanner": rng.choice(["S1", "S2", "S3"], n),
        "belt_speed": rng.uniform(0.5, 3.0, n),
        "lane": rng.integers(1, 5, n),
        "weight_g": rng.integers(10, 5000, n),
        "fragile": rng.random(n) < 0.3,
        "scanned_at": pd.date_range("2026-01-05", periods=n, freq="37min"),
        "label": rng.integers(0, 3, n),
        "pred": rng.integers(0, 3, n),
    })


def test_kinds_are_inferred():
    """Strings, bools and few-level ints are categorical; floats and many-level ints numeric."""
    table = build_eval_table(_frame(), label="label", prediction="pred", id_column="parcel_id")
    assert {"scanner": CATEGORICAL, "belt_speed": NUMERIC, "lane": CATEGORICAL,
            "weight_g": NUMERIC, "fragile": CATEGORICAL, "scanned_at": DATETIME} == dict(table.kinds)
    assert {"parcel_id": "id column", "label": "label column", "pred": "prediction column"} == dict(table.skipped)


def test_high_cardinality_strings_are_skipped_with_reason():
    """A free-text column with many distinct values is listed as skipped, with the count."""
    frame = pd.DataFrame({"path": [f"img/{i}.png" for i in range(500)],
                          "site": ["a", "b"] * 250, "e": [0, 1] * 250})
    table = build_eval_table(frame, errors="e")
    assert "path" not in table.kinds
    assert "500 distinct values" in table.skipped["path"]


def test_error_flags_from_label_prediction_errors_and_loss():
    """The three ways of saying which rows are errors give the expected flags."""
    frame = pd.DataFrame({"y": [1, 0, 1, 0], "p": [1, 1, 0, 0], "wrong": [0, 1, 1, 0],
                          "loss": [0.1, 2.0, 0.7, 0.3], "site": list("abab")})
    assert [False, True, True, False] == build_eval_table(frame, label="y", prediction="p").errors.tolist()
    assert [False, True, True, False] == build_eval_table(frame, errors="wrong").errors.tolist()
    assert [False, True, True, False] == build_eval_table(frame, loss="loss", threshold=0.5).errors.tolist()
    arrays = build_eval_table(frame, label=frame["y"].to_numpy(), prediction=[1, 1, 0, 0])
    assert [False, True, True, False] == arrays.errors.tolist()


def test_false_positive_and_false_negative_restrict_rows():
    """False negatives are analysed among positives, false positives among negatives."""
    frame = pd.DataFrame({"y": [1, 1, 1, 0, 0, 0], "p": [1, 0, 0, 1, 0, 0], "site": list("ababab")})
    fn = build_eval_table(frame, label="y", prediction="p", error_kind="false_negative")
    assert [0, 1, 2] == fn.positions.tolist() and [False, True, True] == fn.errors.tolist()
    fp = build_eval_table(frame, label="y", prediction="p", error_kind="false_positive")
    assert [3, 4, 5] == fp.positions.tolist() and [True, False, False] == fp.errors.tolist()
    labels = pd.DataFrame({"y": ["spam", "ham", "spam", "ham"], "p": ["ham", "spam", "spam", "ham"],
                           "site": list("abab")})
    fn_named = build_eval_table(labels, label="y", prediction="p", error_kind="false_negative",
                                positive="spam")
    assert [0, 2] == fn_named.positions.tolist() and [True, False] == fn_named.errors.tolist()


def test_true_class_restricts_to_that_class():
    """true_class keeps only the rows whose label is that class."""
    frame = pd.DataFrame({"y": [3, 3, 5, 3, 5], "p": [3, 8, 5, 3, 3], "site": list("ababa")})
    table = build_eval_table(frame, label="y", prediction="p", true_class=3)
    assert [0, 1, 3] == table.positions.tolist() and [False, True, False] == table.errors.tolist()


def test_user_frame_is_not_modified():
    """find_slices leaves the user's frame exactly as it was."""
    frame = _frame(400)
    before = frame.copy(deep=True)
    sf.find_slices(frame, label="label", prediction="pred", id_column="parcel_id")
    pd.testing.assert_frame_equal(before, frame)


def _bad(**overrides):
    frame = _frame()
    kwargs = dict(label="label", prediction="pred")
    kwargs.update(overrides)
    return frame, kwargs


@pytest.mark.parametrize("make, error, fragment", [
    (lambda f: (f, dict(label="label", prediction="preds")), SlicefindValueError,
     "prediction='preds' is not a column of data. Did you mean 'pred'?"),
    (lambda f: (f, dict(label="labels", prediction="pred")), SlicefindValueError, "Did you mean 'label'?"),
    (lambda f: (f, dict(label="label", prediction=np.zeros(5))), SlicefindValueError,
     "prediction has 5 values but data has 60 rows"),
    (lambda f: (f.assign(label=f["label"].astype(float).where(f.index != 7)), dict(label="label", prediction="pred")),
     SlicefindValueError, "label column 'label' has 1 missing values (NaN/None), first at row 7"),
    (lambda f: (f.assign(pred=f["pred"].astype(object).where(f.index != 3, None)), dict(label="label", prediction="pred")),
     SlicefindValueError, "prediction column 'pred' has 1 missing values"),
    (lambda f: (f.assign(pred=f["label"]), dict(label="label", prediction="pred")), SlicefindValueError,
     "no row is an error"),
    (lambda f: (f.assign(pred=f["label"] + 1), dict(label="label", prediction="pred")), SlicefindValueError,
     "every one of the 60 rows analysed is an error"),
    (lambda f: (f.iloc[:0], dict(label="label", prediction="pred")), SlicefindValueError, "data is empty"),
    (lambda f: (f.assign(e=["yes"] * 60), dict(errors="e")), SlicefindValueError,
     "errors column 'e' must hold booleans or 0/1; row 0 holds 'yes'"),
    (lambda f: (f.assign(tags=[["a"]] * 60), dict(label="label", prediction="pred")), SlicefindTypeError,
     "column 'tags' holds an unhashable value at row 0 (list"),
    (lambda f: (f, dict(label="label", prediction="pred", exclude=["scaner"])), SlicefindValueError,
     "exclude names 'scaner', which is not a column of data. Did you mean 'scanner'?"),
    (lambda f: (f, dict(label="label", prediction="pred", errors="fragile")), SlicefindValueError,
     "say which rows are errors in exactly one way"),
    (lambda f: (f, dict()), SlicefindValueError, "say which rows are errors in exactly one way"),
    (lambda f: (f, dict(label="label")), SlicefindValueError, "prediction= is required"),
    (lambda f: (f, dict(loss="belt_speed")), SlicefindValueError, "loss= needs threshold="),
    (lambda f: (f, dict(label="label", prediction="pred", error_kind="fp")), SlicefindValueError,
     "error_kind must be one of ('all', 'false_positive', 'false_negative'); got 'fp'"),
    (lambda f: (f, dict(label="label", prediction="pred", error_kind="false_negative")), SlicefindValueError,
     "is for binary tasks, but label has 3 classes; pass positive="),
    (lambda f: (f, dict(label="label", prediction="pred", true_class=9)), SlicefindValueError,
     "true_class=9 never occurs in label"),
    (lambda f: (f, dict(label="label", prediction="pred", id_column="parcel")), SlicefindValueError,
     "id_column='parcel' is not a column of data. Did you mean 'parcel_id'?"),
    (lambda f: (f, dict(label="label", prediction="pred", embeddings=np.zeros((59, 4)))), SlicefindValueError,
     "embeddings has 59 rows but data has 60"),
    (lambda f: (f, dict(label="label", prediction="pred", embeddings=np.zeros(60))), SlicefindValueError,
     "embeddings must be two-dimensional (n_rows, d); got shape (60,)"),
    (lambda f: (f, dict(label="label", prediction="pred",
                        embeddings=np.where(np.arange(240).reshape(60, 4) == 9, np.nan, 0.0))),
     SlicefindValueError, "embeddings holds 1 rows with NaN or inf, first at row 2 (column 1: nan)"),
    (lambda f: (f, dict(label="label", prediction="pred", embeddings="vectors.npy")), SlicefindValueError,
     "embeddings names 'vectors.npy', which is not a column of data."),
    (lambda f: (f.assign(vec=[np.zeros(3)] * 59 + [np.zeros(2)]), dict(label="label", prediction="pred",
                                                                        embeddings="vec")),
     SlicefindValueError, "embeddings column 'vec' holds vectors of 3 and 2 values (row 59)"),
    (lambda f: (f.assign(vec="abc"), dict(label="label", prediction="pred", embeddings="vec")),
     SlicefindTypeError, "embeddings column 'vec' must hold numbers (a vector per row); got values such as 'abc'"),
    (lambda f: (f, dict(label="label", prediction=3.5)), SlicefindTypeError,
     "prediction must be a column name or an array-like of length 60; got float"),
])
def test_bad_input_messages(make, error, fragment):
    """Each bad input raises the library's error with a message naming the argument and value."""
    frame, kwargs = make(_frame())
    with pytest.raises(error) as info:
        sf.find_slices(frame, **kwargs)
    assert fragment in str(info.value)


def test_duplicate_column_names_rejected():
    """Duplicate column names are refused with the names listed."""
    frame = pd.DataFrame([[1, 2, 0, 1]] * 30, columns=["a", "a", "y", "p"])
    with pytest.raises(SlicefindValueError, match=r"duplicate column names \['a'\]"):
        sf.find_slices(frame, label="y", prediction="p")


def test_data_must_be_a_dataframe():
    """A non-DataFrame input raises a TypeError naming the type."""
    with pytest.raises(SlicefindTypeError, match="data must be a pandas DataFrame; got dict"):
        sf.find_slices({"a": [1]}, errors=[True])


def test_library_errors_are_value_and_type_errors():
    """The library's errors subclass ValueError/TypeError and its own base class."""
    assert issubclass(sf.SlicefindValueError, ValueError)
    assert issubclass(sf.SlicefindTypeError, TypeError)
    assert issubclass(sf.SlicefindValueError, sf.SlicefindError)


def test_embeddings_from_columns_equal_the_array():
    """embeddings= may name a column of vectors or one column per dimension: the same
    float array as passing it, and those columns are not mined."""
    frame = _frame()
    x = np.random.default_rng(1).normal(size=(60, 3)).astype(np.float32)
    base = dict(label="label", prediction="pred")
    from_array = build_eval_table(frame, embeddings=x, **base)
    one = build_eval_table(frame.assign(vec=list(x)), embeddings="vec", **base)
    per_dim = build_eval_table(frame.assign(e0=x[:, 0], e1=x[:, 1], e2=x[:, 2]),
                               embeddings=["e0", "e1", "e2"], **base)
    for table in (one, per_dim):
        assert np.array_equal(from_array.embeddings, table.embeddings)
        assert np.float32 == table.embeddings.dtype
        assert from_array.kinds == table.kinds
    assert "embeddings column" == one.skipped["vec"]
    assert ["embeddings column"] * 3 == [per_dim.skipped[c] for c in ("e0", "e1", "e2")]
