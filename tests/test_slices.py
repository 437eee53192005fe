"""Tests for slicefind.discovery.find: find_slices end to end on planted and null data."""
import numpy as np
import pandas as pd
import pytest

import slicefind as sf
from slicefind.discovery.find import TABLE_COLUMNS
from slicefind.discovery.records import default_min_rows, jaccard


def _depot(n=6000, seed=0, planted=True):
    """A generated sorting-depot table; errors rise on scanner S3 at night when planted."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "parcel_id": np.arange(n),
        "scanner": rng.choice(["S1", "S2", "S3", "S4"], n),
        "shift": rng.choice(["day", "night"], n, p=[0.6, 0.4]),
        "label_stock": rng.choice(["matte", "glossy", "thermal"], n),
        "belt_speed": np.round(rng.uniform(0.5, 3.0, n), 2),
        "depot": rng.choice(["north", "south", "east"], n),
    })
    base = np.full(n, 0.06)
    if planted:
        base[((frame["scanner"] == "S3") & (frame["shift"] == "night")).to_numpy()] = 0.45
    errors = rng.random(n) < base
    return frame, errors


def test_planted_two_term_conjunction_ranks_first():
    """A planted 2-term conjunction is R1, described by exactly its two conditions."""
    frame, errors = _depot()
    found = sf.find_slices(frame, errors=errors, exclude=["parcel_id"])
    assert "scanner = S3 and shift = night" == found.table.loc[0, "description"]
    assert "R1" == found.table.loc[0, "slice_id"]
    expected = np.flatnonzero(((frame["scanner"] == "S3") & (frame["shift"] == "night")).to_numpy())
    assert expected.tolist() == found.rows("R1").tolist()
    # its two single-item parents are folded into it, not listed beside it
    assert "scanner = S3" not in set(found.table["description"])
    assert {"scanner = S3", "shift = night"} == set(found.table.loc[0, "folded"].split("; "))


def test_table_has_contract_columns_and_ranking():
    """The table has the contract's columns, q <= fdr, and is sorted by excess errors."""
    frame, errors = _depot()
    found = sf.find_slices(frame, errors=errors, exclude=["parcel_id"])
    assert list(TABLE_COLUMNS) == list(found.table.columns[:len(TABLE_COLUMNS)])
    assert (found.table["q_value"] <= 0.05).all()
    excess = found.table["excess_errors"].to_numpy()
    assert np.all(np.diff(excess) <= 1e-9)
    assert len(found.tested) >= len(found.table)
    assert found.tested["passed"].sum() >= len(found.table)


def test_null_data_passes_fdr_in_95_percent_of_seeds():
    """With errors independent of every column, no rule passes fdr=0.05 in >= 95% of 50 seeds."""
    clean = 0
    for seed in range(50):
        frame, errors = _depot(n=2000, seed=seed, planted=False)
        found = sf.find_slices(frame, errors=errors, exclude=["parcel_id"])
        clean += len(found.table) == 0
    assert clean >= 48


def test_refinement_must_be_worse_than_each_parent():
    """Adding an unrelated condition to a planted slice does not yield a listed refinement."""
    frame, errors = _depot()
    found = sf.find_slices(frame, errors=errors, exclude=["parcel_id"])
    listed = set(found.table["description"])
    assert not any(d.startswith("scanner = S3 and shift = night and") for d in listed)
    tested = found.tested.set_index("description")
    assert not tested.loc["scanner = S3 and shift = night and label_stock = matte", "worse_than_parents"]


def test_identical_rows_collapse_to_one_entry_with_alias():
    """Two columns encoding the same rows give one slice, the other listed as its alias."""
    frame, errors = _depot()
    frame = frame.assign(lane=frame["scanner"].map({"S1": "L1", "S2": "L2", "S3": "L3", "S4": "L4"}))
    found = sf.find_slices(frame, errors=errors, exclude=["parcel_id"])
    top = found.table.loc[0]
    assert top["description"] == "scanner = S3 and shift = night"
    assert "shift = night and lane = L3" in top["aliases"].split("; ")
    assert not (found.table["description"] == "shift = night and lane = L3").any()


def test_rows_are_positions_whatever_the_index():
    """rows() returns positions 0..n-1 even when the frame has a shuffled string index."""
    frame, errors = _depot()
    shuffled = frame.set_axis([f"k{i}" for i in np.random.default_rng(1).permutation(len(frame))])
    a = sf.find_slices(frame, errors=errors, exclude=["parcel_id"])
    b = sf.find_slices(shuffled, errors=errors, exclude=["parcel_id"])
    assert a.rows("R1").tolist() == b.rows("R1").tolist()
    assert np.issubdtype(b.rows("R1").dtype, np.integer)


def test_rows_map_back_through_error_kind():
    """With false negatives only, rows() still indexes the user's full frame."""
    frame, errors = _depot(n=8000)
    label = np.random.default_rng(2).integers(0, 2, len(frame))
    pred = np.where(errors, 1 - label, label)
    found = sf.find_slices(frame, label=label, prediction=pred, error_kind="false_negative",
                           exclude=["parcel_id"])
    rows = found.rows(found.table.loc[0, "slice_id"])
    assert np.all(label[rows] == 1)
    assert found.n_rows == int((label == 1).sum())


def test_deterministic_for_a_given_input():
    """Two runs on the same input give the same table."""
    frame, errors = _depot()
    a = sf.find_slices(frame, errors=errors, exclude=["parcel_id"])
    b = sf.find_slices(frame, errors=errors, exclude=["parcel_id"])
    pd.testing.assert_frame_equal(a.table, b.table)


def test_engines_give_identical_tables():
    """engine='mlxtend' and the bitset engine give the same table on the planted data."""
    frame, errors = _depot()
    a = sf.find_slices(frame, errors=errors, exclude=["parcel_id"])
    b = sf.find_slices(frame, errors=errors, exclude=["parcel_id"], engine="mlxtend")
    pd.testing.assert_frame_equal(a.table, b.table)
    pd.testing.assert_frame_equal(a.tested, b.tested)


def test_default_min_rows_finds_half_percent_slice():
    """A slice of 0.5% of the rows (and >= 20 rows) can be found with the default min_rows."""
    assert (20, 20, 50, 5000) == (default_min_rows(100), default_min_rows(4000),
                                  default_min_rows(10_000), default_min_rows(1_000_000))
    rng = np.random.default_rng(5)
    n = 10_000
    frame = pd.DataFrame({"station": rng.choice([f"st{i:02d}" for i in range(40)], n, replace=True)})
    small = np.zeros(n, dtype=bool)
    small[rng.choice(n, 50, replace=False)] = True      # exactly 0.5% of rows
    frame.loc[small, "station"] = "st99"
    errors = rng.random(n) < np.where(small, 0.6, 0.05)
    found = sf.find_slices(frame, errors=errors)
    assert "station = st99" == found.table.loc[0, "description"]


def test_numeric_threshold_in_description():
    """A planted threshold on a numeric column reads as 'belt_speed >= 2.1'."""
    rng = np.random.default_rng(3)
    n = 5000
    frame = pd.DataFrame({"belt_speed": np.round(rng.uniform(0.5, 3.0, n), 3),
                          "scanner": rng.choice(["S1", "S2"], n)})
    errors = rng.random(n) < np.where(frame["belt_speed"] >= 2.1, 0.3, 0.04)
    found = sf.find_slices(frame, errors=errors)
    assert "belt_speed >= 2.1" == found.table.loc[0, "description"]


def test_repr_and_html():
    """The repr is short and stable; the notebook HTML holds the table."""
    frame, errors = _depot()
    found = sf.find_slices(frame, errors=errors, exclude=["parcel_id"])
    assert repr(found).startswith(f"FoundSlices(n_slices={len(found.table)}, n_tested=")
    html = found._repr_html_()
    assert "<table" in html and "scanner = S3 and shift = night" in html


def test_unknown_slice_id():
    """rows() with an unknown id names it and lists the known ones."""
    frame, errors = _depot()
    found = sf.find_slices(frame, errors=errors, exclude=["parcel_id"])
    with pytest.raises(sf.SlicefindValueError, match=r"slice_id='R99' is not in this result; known ids: R1"):
        found.rows("R99")


def test_overlap_is_jaccard():
    """overlap() gives 1 on the diagonal and the Jaccard of row sets elsewhere."""
    frame, errors = _depot()
    found = sf.find_slices(frame, errors=errors, exclude=["parcel_id"], max_terms=1)
    ov = found.overlap()
    ids = list(found.table["slice_id"])
    assert all(ov.loc[i, i] == 1.0 for i in ids)
    if len(ids) >= 2:
        a, b = set(found.rows(ids[0])), set(found.rows(ids[1]))
        assert len(a & b) / len(a | b) == pytest.approx(ov.loc[ids[0], ids[1]])


def _masks(a, b, n=10):
    """Boolean masks over n rows of the row sets a and b, for scikit-learn."""
    mask_a, mask_b = np.zeros(n, dtype=bool), np.zeros(n, dtype=bool)
    mask_a[list(a)] = True
    mask_b[list(b)] = True
    return mask_a, mask_b


@pytest.mark.parametrize("a, b, expected", [
    ([0, 1, 2, 3], [2, 3, 4], 2 / 5),                  # REFERENCES.md §9 (tag C): 2 shared, 5 in the union
    # Leskovec, Rajaraman & Ullman, Mining of Massive Datasets, Example 3.1: SIM = 3/8
    # (3 shared, 8 in the union; counts recalled, not re-read; the sets are constructed)
    ([0, 1, 2, 3, 4], [2, 3, 4, 5, 6, 7], 3 / 8),
    ([0, 1], [2, 3], 0.0),                             # disjoint (tag C)
])
def test_jaccard_reference_cases(a, b, expected):
    """Jaccard of row sets matches REFERENCES.md §9 and scikit-learn's jaccard_score on masks."""
    from sklearn.metrics import jaccard_score
    got = jaccard(np.array(a), np.array(b))
    assert expected == pytest.approx(got, abs=1e-15)
    assert jaccard_score(*_masks(a, b)) == pytest.approx(got, abs=1e-15)   # scikit-learn 1.9
    assert got == jaccard(np.array(b), np.array(a))                          # symmetric


def test_jaccard_of_two_empty_sets_is_our_convention():
    """Two empty row sets give 0.0: a convention, since J = 0/0 there (REFERENCES.md §9)."""
    from scipy.spatial.distance import jaccard as jaccard_distance
    from sklearn.metrics import jaccard_score
    empty = np.array([], dtype=np.intp)
    assert 0.0 == jaccard(empty, empty)
    # The libraries disagree, so neither settles it: scikit-learn returns 0.0 (and warns unless
    # zero_division is given), while scipy's distance is 0, i.e. similarity 1.
    mask_a, mask_b = _masks([], [])
    assert 0.0 == jaccard_score(mask_a, mask_b, zero_division=0.0)          # scikit-learn 1.9
    assert 1.0 == 1.0 - jaccard_distance(mask_a, mask_b)                     # scipy 1.17
    assert 0.0 == jaccard(empty, np.array([3, 4]))                          # one empty: 0 / 2


@pytest.mark.parametrize("kwargs, fragment", [
    (dict(max_terms=0), "max_terms must be >= 1; got 0"),
    (dict(max_terms=2.5), "max_terms must be an integer; got 2.5"),
    (dict(min_rows=0), "min_rows must be >= 1; got 0"),
    (dict(min_errors=-1), "min_errors must be >= 1; got -1"),
    (dict(fdr=1.5), "fdr must be a number strictly between 0 and 1; got 1.5"),
    (dict(confidence_level=0), "confidence_level must be a number strictly between 0 and 1; got 0"),
    (dict(engine="fast"), "engine must be one of ('bitset', 'mlxtend'); got 'fast'"),
    (dict(clusters="all"), "clusters must be one of ('both', 'regions', 'error_modes', 'none'); got 'all'"),
    (dict(merge_jaccard=0), "merge_jaccard must be a number in (0, 1]; got 0"),
    (dict(distinct_jaccard=1.5), "distinct_jaccard must be a number in (0, 1]; got 1.5"),
    (dict(distinct_jaccard=0.9), "distinct_jaccard (0.9) must not exceed merge_jaccard (0.8)"),
    (dict(max_share=0), "max_share must be a number in (0, 1]; got 0"),
    (dict(mine_label="yes"), "mine_label must be True or False; got 'yes'"),
    (dict(n_bins=0), "n_bins must be an integer >= 1; got 0"),
])
def test_bad_parameters_are_named(kwargs, fragment):
    """Each public parameter given a bad value raises an error that names it."""
    frame, errors = _depot(n=500)
    with pytest.raises((sf.SlicefindValueError, sf.SlicefindTypeError)) as info:
        sf.find_slices(frame, errors=errors, **kwargs)
    assert fragment in str(info.value)


def _wide_slice(n=6000, seed=0):
    """Day shift (70% of rows) errs at 9%, night at 4%: a real but giant slice."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({"shift": rng.choice(["day", "night"], n, p=[0.7, 0.3]),
                          "scanner": rng.choice(["S1", "S2", "S3"], n)})
    errors = rng.random(n) < np.where(frame["shift"] == "day", 0.09, 0.04)
    return frame, errors


def test_slice_over_max_share_is_tested_not_listed():
    """A slice holding 70% of the rows is tested and flagged too_large, and listed only when allowed."""
    frame, errors = _wide_slice()
    found = sf.find_slices(frame, errors=errors)
    tested = found.tested.set_index("description")
    assert tested.loc["shift = day", "passed"] and tested.loc["shift = day", "too_large"]
    assert "shift = day" not in set(found.table["description"])
    wider = sf.find_slices(frame, errors=errors, max_share=0.8)
    assert "shift = day" == wider.table.loc[0, "description"]


def test_numeric_threshold_variants_are_one_entry():
    """Rules on the same columns at other thresholds are aliases of the first, not entries."""
    rng = np.random.default_rng(4)
    n = 30_000
    frame = pd.DataFrame({"load": rng.uniform(0, 10, n).round(2), "temp": rng.uniform(0, 40, n).round(1),
                          "site": rng.choice(["a", "b"], n)})
    # the error rate rises smoothly with load and temperature, so many thresholds "work";
    # before variants were folded, three of them were listed ('load >= 2.89 and temp >= 17',
    # 'load >= 2.89 and temp >= 10', 'load >= 7.5 and temp >= 8.2')
    errors = rng.random(n) < 0.02 + 0.2 * (frame["load"] / 10) * (frame["temp"] / 40)
    found = sf.find_slices(frame, errors=errors)
    assert ["load >= 2.89 and temp >= 17"] == found.table["description"].tolist()
    assert "load >= 7.5 and temp >= 8.2" in found.table.loc[0, "aliases"].split("; ")
    assert found.tested.set_index("description").loc["load >= 2.89 and temp >= 10", "too_large"]   # 53%


def test_label_column_is_mined_and_prediction_is_not():
    """The true class that carries the errors is a slice; the prediction is never an item."""
    rng = np.random.default_rng(6)
    n = 5000
    frame = pd.DataFrame({"true_kind": rng.choice(["letter", "parcel", "crate"], n),
                          "scanner": rng.choice(["S1", "S2"], n)})
    wrong = rng.random(n) < np.where(frame["true_kind"] == "crate", 0.3, 0.04)
    frame["read_kind"] = np.where(wrong, "letter", frame["true_kind"])
    frame.loc[wrong & (frame["true_kind"] == "letter"), "read_kind"] = "parcel"
    found = sf.find_slices(frame, label="true_kind", prediction="read_kind")
    assert "true_kind = crate" == found.table.loc[0, "description"]
    assert not found.tested["description"].str.contains("read_kind").any()
    assert "label column" == sf.find_slices(frame, label="true_kind", prediction="read_kind",
                                            mine_label=False).skipped["true_kind"]
