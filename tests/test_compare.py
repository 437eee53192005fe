"""Before and after: McNemar's exact test, per-slice and per-category comparisons, new slices."""
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from slicefind.stats import mcnemar_exact
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError

# --- McNemar's exact test: external checks ---------------------------------------------------

# REFERENCES.md §7, tables [[a, b], [c, d]]: b = right before & wrong after, c = the reverse.
MCNEMAR_CASES = [
    # Fagerland, Lydersen & Laake (2013) BMC Med Res Methodol 13:91, Bentur et al.'s 21 children
    # (AHR before/after transplant): exact two-sided 18/256 = 0.0703125 (M+T: table and p-value
    # recalled, not re-read; statsmodels mcnemar(exact=True) reproduces it, test below)
    ([[1, 1], [7, 12]], 18 / 256),
    # Agresti, An Introduction to Categorical Data Analysis (paired proportions), PM approval,
    # 1600 people surveyed twice (table recalled, not re-read): exact two-sided 3.71594e-5
    # computed by statsmodels (REFERENCES §7), no published exact p-value claimed
    ([[794, 150], [86, 570]], 3.71594e-5),
    # constructed (REFERENCES §7, tag C): b=1, c=9 -> 22/1024
    ([[0, 1], [9, 0]], 22 / 1024),
    # constructed: b=0, c=5 -> 0.0625
    ([[5, 0], [5, 5]], 0.0625),
    # constructed: b=15, c=7 -> 0.133801
    ([[20, 15], [7, 8]], 0.133801),
    # constructed: b=c=0 -> 1 by convention
    ([[10, 0], [0, 10]], 1.0),
]


@pytest.mark.parametrize("table, expected", MCNEMAR_CASES)
def test_mcnemar_exact_matches_references(table, expected):
    """Two-sided exact p-values equal REFERENCES §7 to the printed digits."""
    b, c = table[0][1], table[1][0]
    assert expected == pytest.approx(mcnemar_exact(b, c), rel=5e-6)


@pytest.mark.parametrize("table, _", MCNEMAR_CASES)
def test_mcnemar_exact_matches_statsmodels(table, _):
    """Two-sided p equals statsmodels 0.15.0 `mcnemar(table, exact=True).pvalue`."""
    from statsmodels.stats.contingency_tables import mcnemar

    b, c = table[0][1], table[1][0]
    expected = mcnemar(np.array(table), exact=True).pvalue
    assert expected == pytest.approx(mcnemar_exact(b, c), rel=1e-12)


def test_mcnemar_exact_bentur_fraction_is_exact():
    """The 21-children table (Fagerland et al. 2013): 2 * P(X <= 1), X ~ Bin(8, 1/2) = 18/256."""
    assert 18 / 256 == mcnemar_exact(1, 7)


@pytest.mark.parametrize("b, c, less, greater", [
    # REFERENCES §7 one-sided column P(X <= b): Bentur/Fagerland 9/256; b=1,c=9 11/1024; b=0,c=5 1/32
    (1, 7, 9 / 256, 1 - 1 / 256),
    (1, 9, 11 / 1024, 1 - 1 / 1024),
    (0, 5, 0.03125, 1.0),
    (0, 0, 1.0, 1.0),
])
def test_mcnemar_one_sided(b, c, less, greater):
    """One-sided p-values: "less" is P(X <= b) as in REFERENCES §7, "greater" P(X >= b)."""
    assert less == pytest.approx(mcnemar_exact(b, c, alternative="less"), rel=1e-12)
    assert greater == pytest.approx(mcnemar_exact(b, c, alternative="greater"), rel=1e-12)


def test_mcnemar_matches_scipy_binomtest_vectorised():
    """The vectorised result equals scipy 1.17 `binomtest(min(b, c), b + c, 0.5).pvalue` per pair."""
    from scipy.stats import binomtest

    rng = np.random.default_rng(5)
    b = rng.integers(0, 60, 200)
    c = rng.integers(0, 60, 200)
    expected = np.array([1.0 if x + y == 0 else binomtest(int(min(x, y)), int(x + y), 0.5).pvalue
                         for x, y in zip(b, c)])
    np.testing.assert_allclose(mcnemar_exact(b, c), expected, rtol=1e-10)
    assert (200,) == mcnemar_exact(b, c).shape


@given(st.integers(0, 400), st.integers(0, 400))
def test_mcnemar_symmetric_and_bounded(b, c):
    """Swapping b and c keeps the two-sided p; p lies in (0, 1]; one-sided tails swap."""
    p = mcnemar_exact(b, c)
    assert p == mcnemar_exact(c, b)
    assert 0.0 < p <= 1.0
    assert mcnemar_exact(b, c, alternative="less") == pytest.approx(
        mcnemar_exact(c, b, alternative="greater"), rel=1e-9, abs=1e-300)
    assert p >= min(mcnemar_exact(b, c, alternative="less"), mcnemar_exact(b, c, alternative="greater"))


@pytest.mark.parametrize("kwargs, error, text", [
    ({"b": -1, "c": 2}, SlicefindValueError, "b must hold whole numbers >= 0; got -1"),
    ({"b": 1, "c": [2, 1.5]}, SlicefindValueError, "c must hold whole numbers >= 0; got 1.5"),
    ({"b": "x", "c": 2}, SlicefindTypeError, "b must be a count"),
    ({"b": 1, "c": 2, "alternative": "two_sided"}, SlicefindValueError, "alternative must be one of"),
])
def test_mcnemar_bad_inputs_are_named(kwargs, error, text):
    """Each bad argument gets an error naming it and the bad value."""
    with pytest.raises(error, match=text):
        mcnemar_exact(**kwargs)


# --- compare: planted fixes and regressions ----------------------------------------------------

import base64  # noqa: E402
import json  # noqa: E402
import re  # noqa: E402

import pandas as pd  # noqa: E402

from review_helpers import make_found  # noqa: E402
from slicefind.cli import run_compare  # noqa: E402
from slicefind.compare import (COMPARE_COLUMNS, NEW_SLICE_COLUMNS, Comparison, compare,
                               format_comparison)  # noqa: E402
from slicefind.review.queue import build_queue  # noqa: E402
from slicefind.report import ReportInputs, render_report  # noqa: E402
from slicefind.discovery.find import find_slices  # noqa: E402
from slicefind.stats import bh_qvalues, wilson_interval  # noqa: E402
from slicefind.workspace import Workspace, data_fingerprint  # noqa: E402

N_ROWS = 4000


def _misread(digit, wrong, rng):
    """A digit reading that is wrong exactly where `wrong` says."""
    return np.where(wrong, (digit + rng.integers(1, 10, digit.size)) % 10, digit)


@pytest.fixture(scope="module")
def depot():
    """A parcel depot: scanners S3 and S4 misread digits far more often than S1 and S2."""
    rng = np.random.default_rng(11)
    frame = pd.DataFrame({"parcel": [f"P{i:05d}" for i in range(N_ROWS)],
                          "scanner": rng.choice(["S1", "S2", "S3", "S4"], N_ROWS),
                          "belt": rng.choice(["slow", "medium", "fast"], N_ROWS),
                          "label_stock": rng.choice(["matte", "gloss", "thermal"], N_ROWS)})
    digit = rng.integers(0, 10, N_ROWS)
    s3 = (frame["scanner"] == "S3").to_numpy()
    s4 = (frame["scanner"] == "S4").to_numpy()
    wrong = rng.random(N_ROWS) < np.where(s3, 0.40, np.where(s4, 0.30, 0.06))
    frame["digit"] = digit
    frame["read_v1"] = _misread(digit, wrong, rng)
    found = find_slices(frame, label="digit", prediction="read_v1", id_column="parcel")
    assert ["scanner = S3", "scanner = S4"] == found.table["description"].tolist()
    return {"frame": frame, "found": found, "digit": digit, "wrong": wrong, "s3": s3, "s4": s4,
            "rng": rng}


def _churn(wrong, groups, n_each, rng):
    """In each group, flip `n_each` right rows to wrong and `n_each` wrong rows to right: the
    same error rate, other rows right and wrong (a retrained model's noise)."""
    out = wrong.copy()
    for group in groups:
        out[rng.choice(np.flatnonzero(group & ~wrong), n_each, replace=False)] = True
        out[rng.choice(np.flatnonzero(group & wrong), n_each, replace=False)] = False
    return out


@pytest.fixture(scope="module")
def fixed_s3(depot):
    """After a fix for scanner S3: its errors gone; on S1, S2 and S4 each, 15 rows broken and 15
    fixed."""
    rng = np.random.default_rng(2)
    scanner = depot["frame"]["scanner"].to_numpy()
    after = _churn(depot["wrong"], [scanner == s for s in ("S1", "S2", "S4")], 15, rng)
    after[depot["s3"]] = False
    return _misread(depot["digit"], after, rng), after


@pytest.fixture(scope="module")
def reviewed_workspace(depot, tmp_path_factory):
    """The depot scan in a workspace, its queue reviewed: R1 rows tagged 'glare on window', R2
    rows 'faded print' (every third also 'smudge'), rest rows 'torn label'."""
    folder = tmp_path_factory.mktemp("ws")
    ws = Workspace(folder)
    ws.save_scan(depot["found"], data_fingerprint=data_fingerprint(depot["frame"]))
    queue = build_queue(ws.load_found(), budget=60, rest=15)
    ws.save_queue(queue)
    tags = {"R1": "glare on window", "R2": "faded print", "rest": "torn label"}
    for position, stratum, row in zip(queue.table["position"], queue.table["stratum"], queue.table["row"]):
        tag = tags[stratum] + (";smudge" if stratum == "R2" and position % 3 == 0 else "")
        ws.record_review(int(row), tags=tag)
    yield ws
    ws.close()


def test_planted_fix_is_that_slice_and_nothing_else(depot, fixed_s3, reviewed_workspace):
    """Removing scanner S3's errors (plus balanced noise) improves R1, its category and the total;
    no other slice or category changes significantly."""
    after, _ = fixed_s3
    result = compare(reviewed_workspace, after=after)
    table = result.table
    significant = table[table["q_value"] <= 0.05]
    names = [(k, s, c) for k, s, c in zip(significant["kind"], significant["slice_id"], significant["category"])]
    assert [("overall", "overall", ""), ("slice", "R1", "glare on window"),
            ("category", "", "glare on window")] == names
    assert significant["improved"].all() and not table["regression"].any()
    r1 = table.set_index("slice_id").loc["R1"]
    s3_errors = int(depot["wrong"][depot["s3"]].sum())
    assert (s3_errors, 0, 0) == (int(r1["n_fixed"]), int(r1["n_broken"]), int(r1["n_errors_after"]))
    assert {"faded print", "torn label", "smudge", "glare on window"} == set(
        table.loc[table["kind"] == "category", "category"])
    assert "overall" == table["kind"].iloc[0]


def test_planted_regression_is_flagged_while_total_improves(depot):
    """Fixing S3 but breaking a quarter of S4's right rows: the total improves, R2 is a regression."""
    rng = np.random.default_rng(3)
    after = depot["wrong"].copy()
    after[depot["s3"]] = False
    right_s4 = np.flatnonzero(depot["s4"] & ~depot["wrong"])
    broken = rng.choice(right_s4, right_s4.size // 4, replace=False)
    after[broken] = True
    result = compare(depot["found"], after=_misread(depot["digit"], after, rng))
    lines = result.table.set_index("slice_id")
    assert result.overall["change"] < 0 and result.overall["improved"]
    assert not result.overall["regression"]
    assert lines.loc["R2", "regression"] and not lines.loc["R2", "improved"]
    assert (broken.size, 0) == (int(lines.loc["R2", "n_broken"]), int(lines.loc["R2", "n_fixed"]))
    assert ["R2"] == result.regressions["slice_id"].tolist()
    text = format_comparison(result)
    assert "REGRESSIONS (1" in text and "\n  R2: " in text


def test_slices_ranked_by_change_after_the_overall_line(depot, fixed_s3):
    """Lines: overall first, then slices by change (largest fall first), then categories."""
    result = compare(depot["found"], after=fixed_s3[0])
    assert ["overall", "R1", "R2"] == result.table["slice_id"].tolist()
    assert list(COMPARE_COLUMNS) == list(result.table.columns)
    changes = result.table["change"].iloc[1:].to_numpy()
    assert np.all(np.diff(changes) >= 0)


def test_before_defaults_to_the_stored_predictions(depot, fixed_s3):
    """before=None, before='read_v1' with data, and before as an array give the same table."""
    a = compare(depot["found"], after=fixed_s3[0])
    b = compare(depot["found"], before="read_v1", after=fixed_s3[0], data=depot["frame"], rescan=False)
    c = compare(depot["found"], before=depot["frame"]["read_v1"].to_numpy(), after=fixed_s3[0])
    pd.testing.assert_frame_equal(a.table, b.table)
    pd.testing.assert_frame_equal(a.table, c.table)
    assert "stored" == a.params["before"]


# --- the statistics of one line, by hand -------------------------------------------------------

def _bentur_scan(id_column="parcel"):
    """21 rows in slice R1 laid out as the Bentur/Fagerland table [[1, 1], [7, 12]] (REFERENCES
    §7): 1 right-right, 1 right->wrong (b), 7 wrong->right (c), 12 wrong-wrong; 39 other rows."""
    before = np.array([0] * 2 + [1] * 19 + [0] * 30 + [1] * 9, dtype=bool)
    after = np.array([0, 1] + [0] * 7 + [1] * 12 + [0] * 30 + [1] * 9, dtype=bool)
    found = make_found(before, [("R1", "scanner = S1", np.arange(21)),
                                ("R2", "scanner = S2", np.arange(21, 60))], id_column=id_column)
    return found, before, after


def test_slice_line_matches_mcnemar_reference_and_wilson():
    """R1's p-value is the Bentur/Fagerland exact 18/256 = 0.0703125 (REFERENCES §7); its rates and
    intervals are Wilson's on 19/21 before and 13/21 after (12 still wrong, 1 broken)."""
    found, before, after = _bentur_scan()
    result = compare(found, after=after)
    r1 = result.table.set_index("slice_id").loc["R1"]
    assert 18 / 256 == pytest.approx(r1["p_value"], rel=1e-12)
    assert (21, 19, 13, 7, 1) == tuple(int(r1[c]) for c in ("n_rows", "n_errors_before", "n_errors_after",
                                                             "n_fixed", "n_broken"))
    assert (19 / 21, 13 / 21, -6 / 21) == pytest.approx(
        (r1["error_rate_before"], r1["error_rate_after"], r1["change"]), abs=1e-12)
    assert wilson_interval(19, 21) == pytest.approx((r1["error_rate_before_low"], r1["error_rate_before_high"]))
    assert wilson_interval(13, 21) == pytest.approx((r1["error_rate_after_low"], r1["error_rate_after_high"]))
    assert not r1["improved"]                      # 0.07 is not significant at 0.05


def test_q_values_are_benjamini_hochberg_over_slices_and_categories(depot, fixed_s3, reviewed_workspace):
    """q-values equal statsmodels 0.15 multipletests(p, method='fdr_bh') over the slice and category
    lines; the overall line keeps its own p-value."""
    from statsmodels.stats.multitest import multipletests

    table = compare(reviewed_workspace, after=fixed_s3[0]).table
    p = table["p_value"].to_numpy()[1:]
    expected = multipletests(p, alpha=0.05, method="fdr_bh")[1]
    np.testing.assert_allclose(table["q_value"].to_numpy()[1:], expected, rtol=1e-12)
    assert table["q_value"].iloc[0] == table["p_value"].iloc[0]
    np.testing.assert_allclose(bh_qvalues(p), expected, rtol=1e-12)


def test_counts_balance_on_every_line(depot, fixed_s3, reviewed_workspace):
    """On each line, errors after = errors before - fixed + broken, and change is their rate."""
    t = compare(reviewed_workspace, after=fixed_s3[0]).table
    assert (t["n_errors_after"] == t["n_errors_before"] - t["n_fixed"] + t["n_broken"]).all()
    np.testing.assert_allclose(t["change"], (t["n_broken"] - t["n_fixed"]) / t["n_rows"])


# --- categories -----------------------------------------------------------------------------

def test_a_category_covers_its_slices_and_its_tagged_rows(depot, fixed_s3, tmp_path):
    """Only R1 is queued; R2 is named 'worn print head' in the workspace and that category covers
    its rows; 'smudge', naming no slice, covers only the reviewed rows tagged with it (wrong before)."""
    with Workspace(tmp_path / "ws") as ws:
        ws.save_scan(depot["found"])
        queue = build_queue(ws.load_found(), budget=40, rest=20, top=1)
        ws.save_queue(queue)
        for position, stratum, row in zip(queue.table["position"], queue.table["stratum"], queue.table["row"]):
            tags = "glare on window" if stratum == "R1" else "torn label" + (";smudge" if position % 4 == 0 else "")
            ws.record_review(int(row), tags=tags)
        ws.set_name("R2", "Worn Print Head")
        lines = compare(ws, after=fixed_s3[0]).table
        n_smudge = int(ws.reviews()["tags"].str.contains("smudge").sum())
    assert ["R1"] == [s for s in queue.strata["stratum"] if s != "rest"]
    cats = lines[lines["kind"] == "category"].set_index("category")
    assert {"glare on window", "torn label", "smudge", "worn print head"} == set(cats.index)
    slices = lines.set_index("slice_id")
    assert ("glare on window", "worn print head") == (slices.loc["R1", "category"], slices.loc["R2", "category"])
    for column in ("n_rows", "n_errors_before", "n_fixed", "n_broken"):
        assert slices.loc["R2", column] == cats.loc["worn print head", column]
    assert "slice R2" == cats.loc["worn print head", "description"]
    assert 0 < n_smudge == int(cats.loc["smudge", "n_rows"]) == int(cats.loc["smudge", "n_errors_before"])
    assert "reviewed error rows tagged with it" in cats.loc["smudge", "description"]


def test_a_tally_gives_a_found_slices_its_categories(depot, fixed_s3, reviewed_workspace):
    """compare(found, categories=tally) gives the same categories as the workspace does."""
    from_ws = compare(reviewed_workspace, after=fixed_s3[0]).table
    from_tally = compare(depot["found"], after=fixed_s3[0],
                         categories=reviewed_workspace.tally()).table
    cols = ["category", "n_rows", "n_fixed", "n_broken", "p_value"]
    pd.testing.assert_frame_equal(from_ws.loc[from_ws["kind"] == "category", cols].reset_index(drop=True),
                                  from_tally.loc[from_tally["kind"] == "category", cols].reset_index(drop=True))
    none = compare(reviewed_workspace, after=fixed_s3[0], categories=False).table
    assert ["overall", "slice", "slice"] == none["kind"].tolist()


# --- the after scan: new trouble ------------------------------------------------------------------

def test_new_slice_found_in_the_after_errors(depot):
    """A fix for S3 that breaks gloss labels on S1/S2 shows 'label_stock = gloss' as new trouble;
    label, prediction and error-flag columns are never mined."""
    rng = np.random.default_rng(4)
    frame = depot["frame"].copy()
    gloss = (frame["label_stock"] == "gloss").to_numpy()
    after = depot["wrong"].copy()
    after[depot["s3"]] = False
    after[gloss & ~depot["s3"] & ~depot["s4"] & (rng.random(N_ROWS) < 0.3)] = True
    frame["read_v2"] = _misread(depot["digit"], after, rng)
    frame["wrong_v2"] = after
    result = compare(depot["found"], after="read_v2", data=frame)
    new = result.new_slices
    assert list(NEW_SLICE_COLUMNS) == list(new.columns)
    assert ["new"] == new["status"].unique().tolist()
    assert "label_stock = gloss" in new["description"].tolist()
    for sid in new["slice_id"]:
        rows = result.after_found.rows(sid)
        assert 0.9 < gloss[rows].mean()
        assert new.set_index("slice_id").loc[sid, "jaccard"] < 0.5
    tested = " ".join(result.after_found.tested["description"])
    for column in ("digit", "read_v1", "read_v2", "wrong_v2", "parcel"):
        assert column not in tested
    assert {"digit", "read_v1", "read_v2", "wrong_v2"} <= set(result.after_found.params["exclude"])


def test_no_new_slice_when_the_fix_only_fixes(depot, fixed_s3):
    """The S3 fix alone: the after scan finds S4 again (Jaccard ~1 with R2, unchanged), nothing new."""
    frame = depot["frame"].assign(read_v2=fixed_s3[0])
    result = compare(depot["found"], after="read_v2", data=frame)
    assert 0 == len(result.new_slices)
    assert ["scanner = S4"] == result.after_found.table["description"].tolist()
    assert np.array_equal(result.after_found.rows("R1"), depot["found"].rows("R2"))


def test_worse_slice_overlapping_an_earlier_one(depot):
    """S4 breaking further is found again by the after scan and listed as 'worse', closest R2."""
    rng = np.random.default_rng(6)
    after = depot["wrong"].copy()
    right_s4 = np.flatnonzero(depot["s4"] & ~depot["wrong"])
    after[rng.choice(right_s4, right_s4.size // 3, replace=False)] = True
    frame = depot["frame"].assign(read_v2=_misread(depot["digit"], after, rng))
    new = compare(depot["found"], after="read_v2", data=frame).new_slices.set_index("description")
    assert "worse" == new.loc["scanner = S4", "status"]
    assert "R2" == new.loc["scanner = S4", "closest_slice"]
    assert 0.99 < new.loc["scanner = S4", "jaccard"]


# --- error flags instead of predictions ----------------------------------------------------------

def test_a_scan_without_labels_takes_error_flags(depot):
    """A scan made from errors= compares error flags; a prediction-like value is refused by name."""
    frame = depot["frame"].assign(wrong=depot["wrong"])
    found = find_slices(frame, errors="wrong", exclude=("digit", "read_v1"), id_column="parcel")
    after = depot["wrong"] & ~depot["s3"]
    result = compare(found, after=after.astype(int))
    assert int(depot["wrong"][depot["s3"]].sum()) == int(result.overall["n_fixed"])
    with pytest.raises(SlicefindValueError, match=r"after \(error flags: the scan has no labels\) must "
                                                  r"hold booleans or 0/1; row 0 holds"):
        compare(found, after=depot["digit"])


# --- bad inputs ---------------------------------------------------------------------------------

@pytest.mark.parametrize("change, error, text", [
    (dict(found_or_workspace="ws"), SlicefindTypeError, "found_or_workspace must be a FoundSlices"),
    (dict(after=None), SlicefindValueError, "after= is required"),
    (dict(after=np.zeros(10)), SlicefindValueError, "after has 10 values but the scanned frame has 4,000"),
    (dict(after="read_v3"), SlicefindValueError, "after='read_v3' names a column, so pass data="),
    (dict(after="read_v3", data="frame"), SlicefindValueError,
     "after='read_v3' is not a column of data. Did you mean 'read_v1'"),
    (dict(after=42), SlicefindTypeError, "after must be a column name of data or an array-like"),
    (dict(before=np.zeros((4000, 2))), SlicefindValueError, "before must be one-dimensional"),
    (dict(fdr=1.5), SlicefindValueError, "fdr must be a number strictly between 0 and 1; got 1.5"),
    (dict(confidence_level=0), SlicefindValueError, "confidence_level must be a number strictly"),
    (dict(categories="yes"), SlicefindTypeError, "categories must be True, False or a Tally"),
    (dict(rescan="no", data="frame"), SlicefindTypeError, "rescan must be True or False; got 'no'"),
    (dict(data="short"), SlicefindValueError, "data has 3,999 rows but the scan was of 4,000"),
    (dict(data="shuffled"), SlicefindValueError, "data is not the scanned frame: row 0 has parcel"),
    (dict(data="frame", max_term=2), SlicefindTypeError, "unexpected keyword 'max_term'.*'max_terms'"),
    (dict(data="frame", label="digit"), SlicefindValueError, "label= cannot be passed to compare"),
    (dict(max_terms=2), SlicefindValueError, "max_terms= is an option of the after scan, which runs only"),
    (dict(after="gaps"), SlicefindValueError, "after has 1 missing predictions .* first at row 7"),
    (dict(after="text"), SlicefindValueError, "after shares no value with the labels"),
])
def test_bad_inputs_are_named(depot, fixed_s3, change, error, text):
    """Each bad argument gets an error naming it and the bad value."""
    frame = depot["frame"]
    kwargs = dict(found_or_workspace=depot["found"], after=fixed_s3[0])
    kwargs.update(change)
    choices = {"frame": frame, "short": frame.iloc[1:], "shuffled": frame.iloc[::-1].reset_index(drop=True)}
    if isinstance(kwargs.get("data"), str):
        kwargs["data"] = choices[kwargs["data"]]
    if isinstance(kwargs["after"], str) and kwargs["after"] == "gaps":
        gaps = fixed_s3[0].astype(float)
        gaps[7] = np.nan
        kwargs["after"] = gaps
    elif isinstance(kwargs["after"], str) and kwargs["after"] == "text":
        kwargs["after"] = np.array([f"d{v}" for v in fixed_s3[0]], dtype=object)
    source = kwargs.pop("found_or_workspace")
    with pytest.raises(error, match=text):
        compare(source, **kwargs)


# --- the command line's entry ----------------------------------------------------------------------

@pytest.fixture()
def cli_workspace(depot, tmp_path, fixed_s3):
    """A workspace holding the depot scan, the scanned data file and a shuffled --after file."""
    folder = tmp_path / "ws"
    with Workspace(folder) as ws:
        ws.save_scan(depot["found"], data_fingerprint=data_fingerprint(depot["frame"]))
    after = pd.DataFrame({"parcel": depot["frame"]["parcel"], "read_v2": fixed_s3[0]})
    after = after.sample(frac=1.0, random_state=0).reset_index(drop=True)
    data_path = tmp_path / "depot.csv"
    depot["frame"].to_csv(data_path, index=False)
    return folder, after, data_path


def test_run_compare_matches_rows_by_id_and_writes_compare_csv(depot, fixed_s3, cli_workspace, tmp_path):
    """A shuffled after file (CSV or Parquet) gives the comparison of the aligned array, and
    compare.csv holds its table."""
    folder, after, data_path = cli_workspace
    expected = compare(depot["found"], after=fixed_s3[0]).table
    for path in (tmp_path / "after.csv", tmp_path / "after.parquet"):
        after.to_csv(path, index=False) if path.suffix == ".csv" else after.to_parquet(path)
        result = run_compare(folder, path)
        pd.testing.assert_frame_equal(expected, result.table)
        assert "id column 'parcel'" == result.params["matched_by"]
        written = pd.read_csv(folder / "compare.csv", keep_default_na=False)
        assert list(COMPARE_COLUMNS) == list(written.columns)
        assert expected["n_fixed"].tolist() == written["n_fixed"].tolist()
    result = run_compare(folder, tmp_path / "after.csv", data_path=data_path)
    assert (folder / "compare_new_slices.csv").exists()
    assert result.params["rescan"].startswith("1 slices")


def _mangle(after, how):
    if how == "missing":
        return after.drop(index=[0, 1, 2])
    if how == "duplicated":
        return pd.concat([after, after.iloc[[5, 5, 9]]], ignore_index=True)
    if how == "extra":
        return pd.concat([after, pd.DataFrame({"parcel": ["X0001"], "read_v2": [3]})], ignore_index=True)
    if how == "blank id":
        return after.assign(parcel=after["parcel"].where(after.index != 4, None))
    if how == "no id column":
        return after.rename(columns={"parcel": "parcel_id"})
    if how == "two columns":
        return after.assign(score=0.5)
    raise AssertionError(how)


@pytest.mark.parametrize("how, text", [
    ("missing", r"lacks 3 of the 4,000 scanned rows \(ids in 'parcel': 'P\d{5}', 'P\d{5}', 'P\d{5}'\)"),
    ("duplicated", r"duplicated ids in 'parcel': 2 ids appear more than once \('P\d{5} x3', 'P\d{5} x2'\)"),
    ("extra", r"1 ids in 'parcel' that are not rows of the scan \('X0001'\)"),
    ("blank id", r"1 rows without an id in 'parcel' \(file rows 4\)"),
    ("no id column", r"no id column 'parcel' to match rows by.*Did you mean 'parcel_id'"),
    ("two columns", r"2 columns besides the id column \(\['read_v2', 'score'\]\).*--prediction-column"),
])
def test_run_compare_mismatched_ids_give_clear_errors(cli_workspace, tmp_path, how, text):
    """Missing, duplicated, extra or blank ids, and ambiguous columns, are refused with examples."""
    folder, after, _ = cli_workspace
    path = tmp_path / "after.csv"
    _mangle(after, how).to_csv(path, index=False)
    with pytest.raises(SlicefindValueError, match=text):
        run_compare(folder, path)
    assert not (folder / "compare.csv").exists()


def test_run_compare_refuses_what_is_not_there(cli_workspace, tmp_path):
    """A folder without a workspace, a missing file, a bad suffix and a bad column are named."""
    folder, after, _ = cli_workspace
    path = tmp_path / "after.csv"
    after.to_csv(path, index=False)
    with pytest.raises(SlicefindValueError, match="is not a workspace"):
        run_compare(tmp_path / "nowhere", path)
    with pytest.raises(SlicefindValueError, match="--after file .*missing.csv' does not exist"):
        run_compare(folder, tmp_path / "missing.csv")
    (tmp_path / "after.xlsx").write_text("x")
    with pytest.raises(SlicefindValueError, match="must be .csv, .tsv or .parquet"):
        run_compare(folder, tmp_path / "after.xlsx")
    with pytest.raises(SlicefindValueError, match="prediction_column='read_v3' is not a column.*'read_v2'"):
        run_compare(folder, path, prediction_column="read_v3")


def test_run_compare_without_an_id_column_matches_by_order(tmp_path):
    """A scan with no id column takes the after file's rows in order, and needs all of them."""
    found, before, after = _bentur_scan(id_column=None)
    folder = tmp_path / "ws"
    with Workspace(folder) as ws:
        ws.save_scan(found)
    path = tmp_path / "after.csv"
    pd.DataFrame({"wrong_after": after.astype(int)}).to_csv(path, index=False)
    result = run_compare(folder, path)
    assert "row order" == result.params["matched_by"]
    assert 18 / 256 == pytest.approx(result.table.set_index("slice_id").loc["R1", "p_value"])
    pd.DataFrame({"wrong_after": after[:-1].astype(int)}).to_csv(path, index=False)
    with pytest.raises(SlicefindValueError, match="matched by order and it needs exactly 60 rows.*has 59"):
        run_compare(folder, path)


# --- storage, text and report ------------------------------------------------------------------

def test_to_dict_survives_json(depot, fixed_s3):
    """Comparison.to_dict() goes through JSON and from_dict() gives the same tables back."""
    frame = depot["frame"].assign(read_v2=fixed_s3[0])
    result = compare(depot["found"], after="read_v2", data=frame)
    back = Comparison.from_dict(json.loads(json.dumps(result.to_dict(), allow_nan=False)))
    pd.testing.assert_frame_equal(result.table, back.table)
    pd.testing.assert_frame_equal(result.new_slices, back.new_slices)
    assert result.overall == back.overall
    assert repr(result) == repr(back)
    with pytest.raises(SlicefindValueError, match="parts must be the dict"):
        Comparison.from_dict({"table": {}})


def test_report_section_shows_bars_and_highlights_regressions(depot):
    """The report's before/after section has the figure, the table and the regression highlighted."""
    rng = np.random.default_rng(3)
    after = depot["wrong"].copy()
    after[depot["s3"]] = False
    right_s4 = np.flatnonzero(depot["s4"] & ~depot["wrong"])
    after[rng.choice(right_s4, right_s4.size // 4, replace=False)] = True
    result = compare(depot["found"], after=_misread(depot["digit"], after, rng))
    page = render_report(depot["found"], ReportInputs(compare=result))
    assert "id='compare-table'" in page and "id='compare-regressions'" in page
    rows = re.findall(r"<tr class='(\w*)'[^>]*><td><b>([^<]+)</b>", page.split("id='compare-table'")[1])
    assert [("improved", "overall"), ("improved", "R1"), ("regression", "R2")] == rows
    figure = re.search(r"id='compare-figure' alt='[^']*' src='data:image/png;base64,([^']+)'", page)
    assert base64.b64decode(figure.group(1)).startswith(b"\x89PNG")
    assert "id='compare'" not in render_report(depot["found"])


def test_only_the_scanned_rows_are_compared(depot, tmp_path):
    """A scan of false negatives (label 1 only) compares those rows; an after file may hold the
    other rows too, but an id the frame never had is refused."""
    rng = np.random.default_rng(8)
    frame = depot["frame"].copy()
    frame["is_seven"] = (frame["digit"] == 7).astype(int)
    frame["said_seven"] = np.where(depot["s3"] & (rng.random(N_ROWS) < 0.6), 0, frame["is_seven"])
    frame.loc[rng.random(N_ROWS) < 0.04, "said_seven"] = 1 - frame["is_seven"]
    found = find_slices(frame, label="is_seven", prediction="said_seven", error_kind="false_negative",
                        id_column="parcel", exclude=("digit", "read_v1"))
    positives = int(frame["is_seven"].sum())
    after = frame["is_seven"].to_numpy().copy()           # the fixed model misses no seven
    result = compare(found, after=after)
    assert positives == int(result.overall["n_rows"]) == found.eval_table.n_rows
    assert 0 == int(result.overall["n_errors_after"]) and 0 == int(result.overall["n_broken"])
    folder = tmp_path / "ws"
    with Workspace(folder) as ws:
        ws.save_scan(found)
    sheet = pd.DataFrame({"parcel": frame["parcel"], "said_seven_v2": after})
    sheet.to_csv(tmp_path / "after.csv", index=False)
    matched = run_compare(folder, tmp_path / "after.csv")
    assert N_ROWS - positives == matched.params["n_ignored"]
    pd.testing.assert_frame_equal(result.table, matched.table)
    too_many = pd.concat([sheet, pd.DataFrame({"parcel": ["X1"], "said_seven_v2": [1]})])
    too_many.to_csv(tmp_path / "after.csv", index=False)
    data_path = tmp_path / "depot.csv"
    frame.to_csv(data_path, index=False)
    with pytest.raises(SlicefindValueError, match=r"1 ids in 'parcel' that are not rows of the scan \('X1'\)"):
        run_compare(folder, tmp_path / "after.csv", data_path=data_path)
