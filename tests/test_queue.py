"""The review queue: disjoint strata, budget split, fixed random order, top-ups, the sheet."""

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats as sps

from review_helpers import depot_found, make_found, overlapping_slices, strata_found
from slicefind.review.queue import MIN_PER_STRATUM, REST, _allocate, build_queue
from slicefind.discovery.find import FoundSlices
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.discovery.table import build_eval_table
from slicefind.review.tally import read_reviews


@pytest.fixture(scope="module")
def depot():
    return depot_found()


# --- strata ----------------------------------------------------------------------------------

@settings(max_examples=60, deadline=None)
@given(overlapping_slices(), st.integers(1, 60), st.integers(0, 15), st.integers(0, 10**6))
def test_strata_are_disjoint_and_cover_every_error(found, budget, rest, seed):
    """Every error row is in exactly one stratum: the first queued candidate holding it, else rest."""
    queue = build_queue(found, budget=budget, rest=rest, random_state=seed)
    table = found.eval_table
    error_rows = np.sort(table.positions[table.errors])
    members = [queue.order(s) for s in queue.strata["stratum"]]
    together = np.concatenate(members) if members else np.zeros(0, int)
    assert sorted(together.tolist()) == error_rows.tolist()          # a partition of the errors
    candidates = [s for s in queue.strata["stratum"] if s != REST]
    for stratum, rows in zip(queue.strata["stratum"], members):
        for r in rows:
            holders = [s for s in candidates if r in set(found.rows(s).tolist())]
            if stratum == REST:
                assert [] == holders
            else:
                assert stratum == holders[0]
    assert min(budget, error_rows.size) == len(queue)
    assert list(range(1, len(queue) + 1)) == queue.table["position"].tolist()
    assert queue.table["row"].is_unique
    for stratum, n_queued, n_errors in queue.strata[["stratum", "n_queued", "n_errors"]].itertuples(index=False):
        assert n_queued <= n_errors
        assert queue.rows(stratum).tolist() == queue.order(stratum)[:n_queued].tolist()


def test_queue_holds_only_error_rows_with_their_ids(depot):
    """Queued rows are error rows; id, label, prediction and proposal match the user's frame."""
    frame, found = depot
    queue = build_queue(found, budget=40, show=("label_image",))
    assert ["position", "stratum", "row", "id", "label", "prediction", "proposal", "label_image"] == list(queue.table.columns)
    picked = frame.iloc[queue.table["row"]]
    assert (picked["digit"] != picked["read_as"]).all()
    assert picked["parcel"].tolist() == queue.table["id"].tolist()
    assert picked["digit"].tolist() == queue.table["label"].tolist()
    assert picked["read_as"].tolist() == queue.table["prediction"].tolist()
    assert picked["label_image"].tolist() == queue.table["label_image"].tolist()
    described = dict(zip(found.table["slice_id"], found.table["description"]))
    described[REST] = ""
    assert [described[s] for s in queue.table["stratum"]] == queue.table["proposal"].tolist()


def test_rows_are_positions_when_only_some_rows_are_analysed():
    """With true_class= only rows of that class are analysed; rows still index the user's frame."""
    rng = np.random.default_rng(5)
    n = 600
    frame = pd.DataFrame({"parcel": [f"P{i}" for i in range(n)], "scanner": rng.choice(["S1", "S2"], n),
                          "digit": rng.integers(0, 3, n)}, index=pd.Index(rng.permutation(n) + 1000))
    frame["read_as"] = np.where(rng.random(n) < 0.3, (frame["digit"] + 1) % 3, frame["digit"])
    table = build_eval_table(frame, label="digit", prediction="read_as", true_class=2, id_column="parcel")
    found = FoundSlices(table=pd.DataFrame(columns=["slice_id", "source", "description", "n_rows", "n_errors"]),
                        tested=pd.DataFrame(), eval_table=table, params={}, _rows={})
    queue = build_queue(found, budget=1000)
    picked = frame.iloc[queue.table["row"]]
    assert (picked["digit"] == 2).all() and (picked["digit"] != picked["read_as"]).all()
    assert int(((frame["digit"] == 2) & (frame["digit"] != frame["read_as"])).sum()) == len(queue)
    assert picked["parcel"].tolist() == queue.table["id"].tolist()


def test_errors_only_scan_has_no_label_columns():
    """With errors= there is no label or prediction to show."""
    found = strata_found([30, 20], 50)
    queue = build_queue(found, budget=30)
    assert ["position", "stratum", "row", "id", "proposal"] == list(queue.table.columns)


def test_candidate_covered_by_higher_ones_gets_no_stratum():
    """A candidate whose errors all belong to a higher-ranked one is skipped."""
    errors = np.r_[np.ones(60, bool), np.zeros(40, bool)]
    found = make_found(errors, [("R1", "scanner = S1", np.arange(0, 40)),
                                ("R2", "scanner = S1 and shift = night", np.arange(0, 20)),
                                ("R3", "shift = night", np.r_[np.arange(30, 50), np.arange(60, 70)])])
    queue = build_queue(found, budget=40, rest=10)
    assert ["R1", "R3", REST] == queue.strata["stratum"].tolist()
    assert [40, 10, 10] == queue.strata["n_errors"].tolist()       # R3 keeps only rows 40..49


# --- the budget ------------------------------------------------------------------------------

def test_allocation_evens_out_and_caps_by_stratum():
    """Hand check: rest 20; three candidates of 200, 50, 10 errors share 80 as 35, 35, 10."""
    assert ([35, 35, 10], 20) == _allocate([200, 50, 10], 100, budget=100, rest=20, top=None)


def test_allocation_admits_as_many_candidates_as_get_five():
    """With 30 candidates and budget 100, rest 20: the first 16 get 5 each."""
    alloc, rest = _allocate([40] * 30, 100, budget=100, rest=20, top=None)
    assert ([MIN_PER_STRATUM] * 16 + [0] * 14, 20) == (alloc, rest)
    alloc, rest = _allocate([40] * 30, 100, budget=103, rest=20, top=None)
    assert ([6, 6, 6] + [5] * 13 + [0] * 14, 20) == (alloc, rest)    # the remainder evens out, by rank


def test_allocation_small_strata_and_overflow():
    """A stratum smaller than 5 is taken whole; a small rest passes its quota on; spare budget
    goes to rest once the candidates are full; budget below rest's quota goes to rest."""
    assert ([3, 77], 20) == _allocate([3, 400], 100, budget=100, rest=20, top=None)
    assert ([45, 45], 10) == _allocate([400, 400], 10, budget=100, rest=20, top=None)
    assert ([5, 7], 88) == _allocate([5, 7], 300, budget=100, rest=20, top=None)
    assert ([0, 0], 15) == _allocate([50, 50], 100, budget=15, rest=20, top=None)
    assert ([5, 7], 30) == _allocate([5, 7], 30, budget=1000, rest=20, top=None)   # everything


def test_top_limits_candidates_and_a_rest_of_the_candidates_joins_rest():
    """top=1 queues one candidate; the other's errors are in rest."""
    found = strata_found([30, 20], 50)
    queue = build_queue(found, budget=40, rest=10, top=1)
    assert ["R1", REST] == queue.strata["stratum"].tolist()
    assert [30, 70] == queue.strata["n_errors"].tolist()
    assert [30, 10] == queue.strata["n_queued"].tolist()


def test_top_too_large_for_budget_is_refused():
    """Asking for more candidates than the budget can give 5 reviews each names the fix."""
    found = strata_found([30, 20, 25], 50)
    with pytest.raises(SlicefindValueError, match=r"budget=20 cannot give top=3 .* needs budget >= 35"):
        build_queue(found, budget=20, rest=20, top=3)


# --- the order -------------------------------------------------------------------------------

def test_same_seed_same_queue_other_seed_other_order():
    """random_state fixes the queue; another seed draws other rows."""
    found = strata_found([60, 40], 100)
    a = build_queue(found, budget=30, random_state=4)
    b = build_queue(found, budget=30, random_state=4)
    c = build_queue(found, budget=30, random_state=5)
    assert a.table.equals(b.table)
    assert a.table["row"].tolist() != c.table["row"].tolist()


def test_first_row_of_a_stratum_is_uniform_over_seeds():
    """Over 400 seeds the first queued row of an 8-error stratum is each row about equally often
    (chi-square goodness of fit, scipy.stats.chisquare, p > 0.001)."""
    found = strata_found([8], 0, n_correct=20)
    firsts = [int(build_queue(found, budget=1, rest=0, random_state=s).table["row"][0]) for s in range(400)]
    counts = np.bincount(firsts, minlength=8)
    assert 8 == np.count_nonzero(counts)
    assert sps.chisquare(counts).pvalue > 0.001


def test_sheet_interleaves_strata_evenly():
    """Every stratum shows up in the first fifth of the sheet, in proportion to its allocation."""
    found = strata_found([200, 150, 100], 300)
    queue = build_queue(found, budget=100, rest=20)
    head = queue.table.head(20)["stratum"].value_counts().to_dict()
    alloc = dict(zip(queue.strata["stratum"], queue.strata["n_queued"]))
    for stratum, n in alloc.items():
        assert abs(head.get(stratum, 0) - n / 5) <= 1


def test_extend_keeps_the_sheet_and_continues_each_stratum():
    """extend(n) leaves every existing line alone and continues each stratum's order."""
    found = strata_found([200, 150, 100], 300)
    queue = build_queue(found, budget=60, rest=20)
    longer = queue.extend(40)
    assert 100 == len(longer)
    assert longer.table.head(60).equals(queue.table)
    for stratum in queue.strata["stratum"]:
        assert queue.order(stratum).tolist() == longer.order(stratum).tolist()
        assert longer.rows(stratum)[:len(queue.rows(stratum))].tolist() == queue.rows(stratum).tolist()
    added = longer.strata.set_index("stratum")["n_queued"] - queue.strata.set_index("stratum")["n_queued"]
    assert 13 == added[REST]                           # rest keeps its share: round(40 * 20 / 60)
    assert [{"n": 40, "rest": 13}] == longer.params["extensions"]


def test_extend_with_explicit_rest_and_beyond_the_errors():
    """extend(n, rest=k) gives rest k more; asking for more rows than remain is refused by name."""
    found = strata_found([20, 10], 15)
    queue = build_queue(found, budget=20, rest=5)
    longer = queue.extend(6, rest=6)
    assert 11 == int(longer.strata.set_index("stratum").at[REST, "n_queued"])
    with pytest.raises(SlicefindValueError, match="n=100 is more than the 19 error rows not yet queued"):
        longer.extend(100)
    full = longer.extend(19)
    assert 45 == len(full)                             # 20 + 10 + 15 errors, all queued
    with pytest.raises(SlicefindValueError, match="n=5 is more than the 0 error rows.*queued in full"):
        full.extend(5)


def test_larger_budget_same_strata_draws_a_superset_in_order():
    """With the same strata, budget 150 queues budget 100's rows of each stratum first."""
    found = strata_found([200, 150, 100], 300)
    small = build_queue(found, budget=100, rest=20, top=3, random_state=9)
    large = build_queue(found, budget=150, rest=20, top=3, random_state=9)
    for stratum in small.strata["stratum"]:
        k = len(small.rows(stratum))
        assert small.rows(stratum).tolist() == large.rows(stratum)[:k].tolist()


# --- the sheet -------------------------------------------------------------------------------

def test_to_csv_writes_a_sheet_that_reads_back_blank(tmp_path, depot):
    """The sheet has the queue's columns plus reviewed, tags, note; UTF-8 with BOM; nothing filled."""
    _, found = depot
    queue = build_queue(found, budget=25, show="label_image")
    path = tmp_path / "queue.csv"
    queue.to_csv(path)
    raw = path.read_bytes()
    assert raw.startswith(b"\xef\xbb\xbf")
    sheet = pd.read_csv(path, encoding="utf-8-sig", dtype=str, keep_default_na=False)
    assert list(queue.table.columns) + ["reviewed", "tags", "note"] == list(sheet.columns)
    assert queue.table["row"].astype(str).tolist() == sheet["row"].tolist()
    back = read_reviews(path, queue)
    assert len(queue) == len(back)
    assert (0, 0) == (int(back["reviewed"].sum()), int(back["explicit"].sum()))   # nothing said


def test_to_csv_never_overwrites_typed_reviews(tmp_path):
    """A sheet with filled-in cells is refused unless overwrite=True; a blank one is replaced."""
    queue = build_queue(strata_found([20, 10], 15), budget=10)
    path = tmp_path / "queue.csv"
    queue.to_csv(path)
    queue.to_csv(path)                                 # blank: replaced without fuss
    sheet = pd.read_csv(path, encoding="utf-8-sig", dtype=str, keep_default_na=False)
    sheet.loc[0, "tags"] = "torn label"
    sheet.loc[1, "note"] = "stamp over digit"
    sheet.to_csv(path, index=False)
    with pytest.raises(SlicefindValueError, match="already holds 2 filled-in review cells"):
        queue.to_csv(path)
    queue.to_csv(path, overwrite=True)
    assert 0 == int(read_reviews(path, queue)["explicit"].sum())


def test_to_csv_refuses_a_file_that_is_not_a_sheet(tmp_path):
    """An unrelated file at the path is left alone."""
    queue = build_queue(strata_found([20, 10], 15), budget=10)
    path = tmp_path / "notes.csv"
    path.write_text("shift,comment\nnight,belt 3 jams\n")
    with pytest.raises(SlicefindValueError, match="is not a review sheet"):
        queue.to_csv(path)


def test_to_csv_fills_in_given_reviews(tmp_path):
    """reviews= writes earlier reviews onto the sheet; rows outside the queue are left off, warned."""
    queue = build_queue(strata_found([20, 10], 15), budget=10)
    path = tmp_path / "queue.csv"
    rows = queue.table["row"].tolist()
    reviews = pd.DataFrame({"row": rows[:2], "reviewed": [True, True], "tags": ["faded ink", ""],
                            "note": ["", "clean"]})
    queue.to_csv(path, reviews=reviews)
    back = read_reviews(path, queue).set_index("row")
    assert [True, True] == back.loc[rows[:2], "reviewed"].tolist()
    assert ["faded ink", ""] == back.loc[rows[:2], "tags"].tolist()
    assert ["", "clean"] == back.loc[rows[:2], "note"].tolist()
    assert 2 == int(back["explicit"].sum())
    unqueued = next(r for r in range(45) if r not in set(rows))
    outside = pd.DataFrame({"row": [unqueued, rows[0]], "reviewed": [True, True], "tags": ["", "ink smear"]})
    with pytest.warns(UserWarning, match=rf"1 rows that are not in the queue \(first: \[{unqueued}\]\); they are not written"):
        queue.to_csv(tmp_path / "other.csv", reviews=outside)
    assert ["ink smear"] == read_reviews(tmp_path / "other.csv", queue).query("explicit")["tags"].tolist()


# --- bad input -------------------------------------------------------------------------------

@pytest.mark.parametrize("kwargs, error, text", [
    ({"budget": 0}, SlicefindValueError, "budget must be >= 1; got 0"),
    ({"budget": 10.5}, SlicefindTypeError, "budget must be an integer; got 10.5"),
    ({"budget": True}, SlicefindTypeError, "budget must be an integer; got True"),
    ({"rest": -1}, SlicefindValueError, "rest must be >= 0; got -1"),
    ({"top": -2}, SlicefindValueError, "top must be >= 0; got -2"),
    ({"top": "3"}, SlicefindTypeError, "top must be an integer; got '3'"),
    ({"random_state": "seed"}, SlicefindTypeError, "random_state must be an int, a numpy Generator or None; got 'seed'"),
    ({"show": "label_imag"}, SlicefindValueError, "show names 'label_imag', which is not a column of data. Did you mean 'label_image'?"),
    ({"show": ["stratum"]}, SlicefindValueError, "show names 'stratum', which the review sheet already uses"),
    ({"show": [3]}, SlicefindTypeError, "show must name columns by string; got 3"),
    ({"show": ["label_image", "label_image"]}, SlicefindValueError, "show names a column twice"),
])
def test_bad_parameters_are_named(depot, kwargs, error, text):
    """Each bad option raises with its name and value in the message."""
    _, found = depot
    if kwargs.get("show") == ["stratum"]:             # a data column that the sheet also uses
        errors = np.r_[np.ones(10, bool), np.zeros(10, bool)]
        frame = pd.DataFrame({"parcel": [f"P{i}" for i in range(20)], "stratum": ["a", "b"] * 10})
        found = make_found(errors, [], frame=frame)
    with pytest.raises(error) as info:
        build_queue(found, **kwargs)
    assert text in str(info.value)


def test_found_must_be_found_slices():
    """A DataFrame instead of FoundSlices is a TypeError naming found."""
    with pytest.raises(SlicefindTypeError, match="found must be the FoundSlices"):
        build_queue(pd.DataFrame({"row": [1]}))


def test_extend_bad_n():
    """extend(0) and extend('5') are refused by name."""
    queue = build_queue(strata_found([20], 5), budget=5)
    with pytest.raises(SlicefindValueError, match="n must be >= 1; got 0"):
        queue.extend(0)
    with pytest.raises(SlicefindTypeError, match="n must be an integer; got '5'"):
        queue.extend("5")


def test_unknown_stratum_is_named():
    """rows('R9') lists the strata."""
    queue = build_queue(strata_found([20], 5), budget=30)
    with pytest.raises(SlicefindValueError, match=r"stratum='R9' is not a stratum of this queue; strata are \['R1', 'rest'\]"):
        queue.rows("R9")
