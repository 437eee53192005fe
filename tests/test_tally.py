"""The tally: reading review sheets strictly and tolerantly, shares, headroom, verdicts."""
import importlib.util
import math
import pathlib

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from review_helpers import strata_found
from slicefind.review.queue import REST, build_queue
from slicefind.stats import cochran_sample_size, wilson_interval_fpc
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.review.tally import MAX_LISTED, UNTAGGED, normalize_tag, read_reviews, tally


def _prefix_sheet(queue, plan):
    """Review the first n rows of each stratum's queue; tag the first k of them with `tag`.

    plan: {stratum: (n, k, tag)}.
    """
    rows, tags = [], []
    for stratum, (n, k, tag) in plan.items():
        queued = queue.rows(stratum)[:n]
        rows += queued.tolist()
        tags += [tag] * k + [""] * (n - k)
    return pd.DataFrame({"row": rows, "reviewed": "yes", "tags": tags})


@pytest.fixture(scope="module")
def case_a():
    """REFERENCES §6 case A as a queue: strata of 120, 60, 220 errors."""
    queue = build_queue(strata_found([120, 60], 220), budget=150, rest=25, top=2)
    assert [120, 60, 220] == queue.strata["n_errors"].tolist()
    return queue


@pytest.fixture()
def small_queue():
    return build_queue(strata_found([40, 30], 50), budget=40, rest=10)


def _write(path, text, encoding="utf-8"):
    path.write_bytes(text.encode(encoding))
    return path


# --- external checks -------------------------------------------------------------------------

def test_share_matches_stratified_case_a(case_a):
    """Case A of REFERENCES §6 (constructed, checked there against samplics 0.6.1 TaylorEstimator):
    p_st = 0.3435, SE = 0.0412334 with FPC, total 137.4 +- 16.4933."""
    sheet = _prefix_sheet(case_a, {"R1": (30, 24, "faded ink"), "R2": (20, 5, "faded ink"),
                                   REST: (25, 3, "faded ink")})
    row = tally(case_a, sheet).categories.set_index("category").loc["faded ink"]
    assert 0.3435 == pytest.approx(row["share"], abs=5e-5)
    assert 0.0412334 == pytest.approx(row["share_se"], abs=5e-7)
    assert 137.4 == pytest.approx(row["est_errors"], abs=0.05)
    assert 16.4933 == pytest.approx(400 * row["share_se"], abs=5e-4)
    assert row["share_low"] < 0.3435 < row["share_high"]


def test_share_matches_stratified_case_b_with_a_census_stratum():
    """Case B of REFERENCES §6 (constructed, samplics-checked): strata 40 and 10, stratum 2 a
    census; p_st = 0.38, SE = 0.105830 (v = 0.0112 exactly)."""
    queue = build_queue(strata_found([40], 10), budget=20, rest=10)
    sheet = _prefix_sheet(queue, {"R1": (10, 3, "ink smear"), REST: (10, 7, "ink smear")})
    row = tally(queue, sheet).categories.set_index("category").loc["ink smear"]
    assert 0.38 == pytest.approx(row["share"], abs=1e-12)
    assert math.sqrt(0.0112) == pytest.approx(row["share_se"], abs=1e-9)


@pytest.mark.parametrize("n_correct, n_tagged, headroom", [
    # common practice (REFERENCES "Facts of the trade"): error 10%, share 5% -> at best 9.5%
    (900, 5, 0.095),
    # common practice: error 10%, share 50% -> at best 5%
    (900, 50, 0.05),
    # common practice: error 8%, share 25% -> at best 6%
    (1150, 25, 0.06),
])
def test_headroom_common_practice(n_correct, n_tagged, headroom):
    """With every error reviewed (a census) headroom is error_rate * (1 - share) exactly."""
    queue = build_queue(strata_found([], 100, n_correct=n_correct), budget=100, rest=100)
    sheet = _prefix_sheet(queue, {REST: (100, n_tagged, "overwritten digit")})
    row = tally(queue, sheet).categories.set_index("category").loc["overwritten digit"]
    assert (headroom, headroom, headroom) == pytest.approx(
        (row["headroom"], row["headroom_low"], row["headroom_high"]), abs=1e-12)


# --- estimates -------------------------------------------------------------------------------

def test_unreviewed_stratum_widens_the_interval(small_queue):
    """A stratum with no review counts as none for the lower bound and all for the upper."""
    sheet = _prefix_sheet(small_queue, {"R1": (10, 8, "faded ink"), "R2": (8, 1, "faded ink")})
    result = tally(small_queue, sheet)
    row = result.categories.set_index("category").loc["faded ink"]
    full = pd.concat([sheet, _prefix_sheet(small_queue, {REST: (6, 0, "")})])
    seen_rest = tally(small_queue, full).categories.set_index("category").loc["faded ink"]
    w_rest = 50 / 120
    assert w_rest == pytest.approx(result.summary["unreviewed_weight"])
    assert row["share_high"] >= w_rest + 0.1
    assert row["share_high"] > seen_rest["share_high"] + 0.2
    assert 0 == int(result.strata.set_index("stratum").at[REST, "n_reviewed"])


def test_categories_untagged_and_named_but_unseen(small_queue):
    """Categories by share, then (untagged); a name never tagged still gets a line at 0."""
    sheet = _prefix_sheet(small_queue, {"R1": (10, 7, "faded ink"), "R2": (10, 2, "torn label"),
                                        REST: (5, 0, "")})
    result = tally(small_queue, sheet, names={"R2": "Label Skew"})
    cats = result.categories
    assert ["faded ink", "torn label", "label skew", UNTAGGED] == cats["category"].tolist()
    assert [7, 2, 0, 16] == cats["n_tagged"].tolist()
    skew = cats.set_index("category").loc["label skew"]
    assert (0.0, 0.0) == (skew["share"], skew["share_low"]) and skew["share_high"] > 0
    assert "R2" == skew["slices"]
    assert ((cats["share_low"] <= cats["share"]) & (cats["share"] <= cats["share_high"])).all()


def test_cooccurrence_counts_rows_with_both_tags(small_queue):
    """Two tags on one row count once for the pair; the diagonal is each tag's count."""
    rows = small_queue.rows("R1")[:4].tolist()
    sheet = pd.DataFrame({"row": rows, "reviewed": "1",
                          "tags": ["faded ink; torn label", "Faded Ink", "torn label;faded ink", ""]})
    co = tally(small_queue, sheet).cooccurrence
    assert ["faded ink", "torn label"] == list(co.columns)
    assert [[3, 2], [2, 2]] == co.to_numpy().tolist()


def test_verdicts_and_more_needed():
    """18/20 confirms, 2/20 rejects, 6/10 is undecided with Cochran's FPC count still to review."""
    queue = build_queue(strata_found([200, 200, 200, 200], 100), budget=160, rest=20)
    sheet = _prefix_sheet(queue, {"R1": (20, 18, "torn label"), "R2": (20, 2, "torn label"),
                                  "R3": (10, 6, "faded ink")})
    result = tally(queue, sheet, names={"R1": "torn label", "R2": "torn label"})
    s = result.slices.set_index("slice_id")
    assert ["confirmed", "rejected", "undecided", "undecided"] == s["verdict"].tolist()
    assert [0, 0] == s.loc[["R1", "R2"], "more_needed"].tolist()
    # Cochran 1977 §4.4 with FPC: n0 = z^2 .5 .5 / .1^2 = 96.04, n = n0/(1 + (n0-1)/200) = 65.1 -> 66
    assert 66 - 10 == s.at["R3", "more_needed"]
    assert 66 == math.ceil(cochran_sample_size(0.5, 0.1, population=200))
    low, high = wilson_interval_fpc(0.6 * 66, 66, 200)                  # if 60% holds at 66 reviews
    assert low > 0.5
    # no review yet: undecided over [0, 1]; the fewest that could decide it (all for or against)
    assert (0, 0.0, 1.0) == (s.at["R4", "n_reviewed"], s.at["R4", "precision_low"], s.at["R4", "precision_high"])
    assert math.isnan(s.at["R4", "precision"])
    assert math.ceil(cochran_sample_size(0.5, 0.5, population=200)) == s.at["R4", "more_needed"] == 4


def test_precision_interval_is_wilson_fpc_on_the_stratum(small_queue):
    """A slice's precision interval is the Wilson-FPC interval of its named rows in its stratum."""
    sheet = _prefix_sheet(small_queue, {"R1": (12, 9, "faded ink")})
    s = tally(small_queue, sheet).slices.set_index("slice_id").loc["R1"]
    assert (9 / 12, *wilson_interval_fpc(9, 12, 40)) == pytest.approx(
        (s["precision"], s["precision_low"], s["precision_high"]), abs=1e-12)
    assert ("faded ink", "tags", 9) == (s["name"], s["name_source"], s["n_named"])


def test_census_decides_at_the_threshold():
    """Reviewing a whole stratum decides it: precision exactly 0.5 is confirmed (>= threshold)."""
    queue = build_queue(strata_found([10], 10), budget=20, rest=10)
    sheet = _prefix_sheet(queue, {"R1": (10, 5, "stamp over digit")})
    s = tally(queue, sheet).slices.iloc[0]
    assert ("confirmed", 0, 0.5, 0.5) == (s["verdict"], s["more_needed"], s["precision_low"], s["precision_high"])


def test_name_from_most_used_tag_ties_alphabetical(small_queue):
    """Without names= a slice takes its stratum's most used tag; ties go alphabetically."""
    rows = small_queue.rows("R1")[:4].tolist()
    sheet = pd.DataFrame({"row": rows, "reviewed": "yes",
                          "tags": ["torn label", "faded ink", "torn label;faded ink", ""]})
    s = tally(small_queue, sheet).slices.set_index("slice_id")
    assert ("faded ink", "tags", 2) == (s.at["R1", "name"], s.at["R1", "name_source"], s.at["R1", "n_named"])
    assert ("", "", "undecided") == (s.at["R2", "name"], s.at["R2", "name_source"], s.at["R2", "verdict"])


def test_threshold_changes_the_verdict(small_queue):
    """threshold=0.9 leaves 10/12 undecided where 0.5 confirms it."""
    sheet = _prefix_sheet(small_queue, {"R1": (12, 11, "faded ink")})
    assert "confirmed" == tally(small_queue, sheet).slices.iloc[0]["verdict"]
    assert "undecided" == tally(small_queue, sheet, threshold=0.9).slices.iloc[0]["verdict"]


def test_skipped_rows_are_counted(small_queue):
    """Reviewing the 1st and 3rd row of a stratum but not the 2nd counts one skipped."""
    rows = small_queue.rows("R1")
    sheet = pd.DataFrame({"row": [rows[0], rows[2]], "reviewed": "x", "tags": ""})
    strata = tally(small_queue, sheet).strata.set_index("stratum")
    assert (2, 1, 2) == (strata.at["R1", "n_reviewed"], strata.at["R1", "n_skipped"], strata.at["R1", "n_untagged"])


def test_nothing_reviewed_gives_unknown_shares(small_queue):
    """With no review at all, every interval is [0, 1]."""
    result = tally(small_queue, pd.DataFrame({"row": [], "reviewed": [], "tags": []}),
                   names={"R1": "faded ink"})
    row = result.categories.set_index("category").loc["faded ink"]
    assert math.isnan(row["share"]) and (0.0, 1.0) == (row["share_low"], row["share_high"])
    assert 1.0 == result.summary["unreviewed_weight"]


@settings(max_examples=25, deadline=None)
@given(st.data())
def test_tally_ignores_the_order_of_reviewed_rows(data):
    """Shuffling the sheet's lines (and their tag order) changes no number of the tally."""
    queue = build_queue(strata_found([30, 20], 25), budget=30, rest=8, random_state=data.draw(st.integers(0, 99)))
    rows = data.draw(st.lists(st.sampled_from(queue.table["row"].tolist()), unique=True, max_size=30))
    choices = ["faded ink", "torn label", "ink smear", ""]
    tags = [data.draw(st.lists(st.sampled_from(choices), max_size=3)) for _ in rows]
    sheet = pd.DataFrame({"row": rows, "reviewed": "yes", "tags": [";".join(t) for t in tags]})
    order = data.draw(st.permutations(range(len(rows))))
    shuffled = sheet.iloc[list(order)].reset_index(drop=True)
    shuffled["tags"] = [";".join(reversed(t.split(";"))) for t in shuffled["tags"]]
    a, b = tally(queue, sheet), tally(queue, shuffled)
    pd.testing.assert_frame_equal(a.categories, b.categories)
    pd.testing.assert_frame_equal(a.slices, b.slices)
    pd.testing.assert_frame_equal(a.cooccurrence, b.cooccurrence)
    pd.testing.assert_frame_equal(a.strata, b.strata)


# --- tolerant reading ------------------------------------------------------------------------

def test_spreadsheet_quirks_are_tolerated(tmp_path, small_queue):
    """BOM, header case and spaces, stray spaces, tag case, quoting, a trailing delimiter,
    12.0 as a row number, blank lines and every yes/no spelling are read."""
    r = small_queue.table["row"].tolist()
    text = ("\ufeff Row ,REVIEWED , Tags ,Note\r\n"
            f" {r[0]} , Yes ,\" Faded  Ink ; TORN label \",\"smudge, left corner\nsecond line\"\r\n"
            f"{r[1]}.0,x,,\r\n"
            "\r\n"
            f"{r[2]},n,,\r\n"
            f"{r[3]}, ,torn label,\r\n"
            f"{r[4]},✓,,,\r\n"
            f"{r[5]},FALSE,,\r\n")
    path = _write(tmp_path / "sheet.csv", text)
    got = read_reviews(path, small_queue).set_index("row")
    assert [True, True, False, True, True, False] == got.loc[r[:6], "reviewed"].tolist()
    assert ["faded ink;torn label", "", "", "torn label", "", ""] == got.loc[r[:6], "tags"].tolist()
    assert "smudge, left corner\nsecond line" == got.at[r[0], "note"]
    assert "line 4" == got.at[r[1], "where"]                   # the quoted note spans lines 2-3


@pytest.mark.parametrize("delimiter", [";", "\t"])
def test_semicolon_and_tab_sheets(tmp_path, small_queue, delimiter):
    """Sheets saved with ';' or tab between cells (some locales) are read; quoted tags keep ';'."""
    r = small_queue.table["row"].tolist()
    text = delimiter.join(["row", "reviewed", "tags"]) + "\n" + delimiter.join(
        [str(r[0]), "1", '"faded ink;torn label"']) + "\n"
    got = read_reviews(_write(tmp_path / "s.csv", text), small_queue)
    assert ["faded ink;torn label"] == got["tags"].tolist()


def test_frame_with_bools_and_missing_values(small_queue):
    """A DataFrame with a bool reviewed column and NaN tags is read like a sheet."""
    r = small_queue.table["row"].tolist()
    frame = pd.DataFrame({"row": r[:3], "reviewed": [True, False, True], "tags": ["Ink Smear", np.nan, None]})
    got = read_reviews(frame, small_queue)
    assert [True, False, True] == got["reviewed"].tolist()
    assert ["ink smear", "", ""] == got["tags"].tolist()


def test_identical_duplicate_lines_are_merged(small_queue):
    """The same row twice with the same review is one review (both lines named)."""
    r = small_queue.table["row"].tolist()
    frame = pd.DataFrame({"row": [r[0], r[0]], "reviewed": ["yes", "y"], "tags": ["Torn label", "torn label "]})
    got = read_reviews(frame, small_queue)
    assert 1 == len(got)
    assert "frame row 0, frame row 1" == got.at[0, "where"]


def test_comma_in_a_tag_warns(small_queue):
    """A tag with a comma probably meant two tags; it is kept and a warning says so."""
    r = small_queue.table["row"].tolist()
    with pytest.warns(UserWarning, match="holds a comma; tags are separated by ';'"):
        got = read_reviews(pd.DataFrame({"row": [r[0]], "reviewed": [1], "tags": ["faded ink, torn label"]}),
                           small_queue)
    assert ["faded ink, torn label"] == got["tags"].tolist()


def test_normalize_tag():
    """Tags compare by NFC, trimmed, single-spaced lower case."""
    assert "überdruck label" == normalize_tag("  U\u0308berdruck   LABEL ")


# --- strict reading: every malformed sheet has its message -----------------------------------

def _sheet(tmp_path, small_queue, lines, header="row,reviewed,tags"):
    return _write(tmp_path / "bad.csv", header + "\n" + "\n".join(lines) + "\n")


def _message(tmp_path, small_queue, lines, header="row,reviewed,tags"):
    with pytest.raises(SlicefindValueError) as info:
        read_reviews(_sheet(tmp_path, small_queue, lines, header), small_queue)
    return str(info.value)


def test_missing_column_is_named(tmp_path, small_queue):
    """A sheet without tags names the missing column and lists the columns it has."""
    msg = _message(tmp_path, small_queue, ["1,yes"], header="row,reviewed")
    assert "lacks the column(s) ['tags']; its columns are ['row', 'reviewed']" in msg


def test_duplicate_header_is_named(tmp_path, small_queue):
    """Two 'tags' columns (after case and spaces) are refused."""
    msg = _message(tmp_path, small_queue, ["1,yes,a,b"], header="row,reviewed,tags,Tags ")
    assert "has the column(s) ['tags'] more than once" in msg


def test_unknown_row_is_listed(tmp_path, small_queue):
    """A row cell that is not a number is an unknown row, with its line."""
    r = small_queue.table["row"].tolist()
    msg = _message(tmp_path, small_queue, [f"{r[0]},yes,", "P00012,yes,torn label"])
    assert "line 3: row 'P00012' is not a row number (unknown row)" in msg
    assert "has 1 problem; nothing was read" in msg


def test_rows_not_in_the_queue_are_listed(tmp_path, small_queue):
    """An error row not yet queued and a row that is no error are told apart."""
    queued = set(small_queue.table["row"])
    unqueued_error = next(r for r in range(120) if r not in queued)
    msg = _message(tmp_path, small_queue, [f"{unqueued_error},yes,", "125,yes,"])
    assert f"line 2: row {unqueued_error} is not in the queue (an error row of the scan that is not queued yet)" in msg
    assert "line 3: row 125 is not in the queue (not an error row of the scan)" in msg
    assert "has 2 problems" in msg


def test_conflicting_duplicates_are_listed(tmp_path, small_queue):
    """The same row twice with different tags lists both lines and both reviews."""
    r = small_queue.table["row"].tolist()
    msg = _message(tmp_path, small_queue, [f"{r[0]},yes,faded ink", f"{r[1]},yes,", f"{r[0]},yes,torn label"])
    assert (f"line 2, line 4: row {r[0]} appears 2 times and the lines disagree (line 2: reviewed=yes, "
            f"tags='faded ink'; line 4: reviewed=yes, tags='torn label')") in msg


def test_bad_reviewed_value_is_listed(tmp_path, small_queue):
    """'maybe' in reviewed is refused with the accepted spellings."""
    r = small_queue.table["row"].tolist()
    msg = _message(tmp_path, small_queue, [f"{r[0]},maybe,faded ink"])
    assert "line 2: reviewed 'maybe' is not yes/no (use 1/0, yes/no, y/n, true/false, x or leave it empty)" in msg


def test_tags_on_a_line_marked_not_reviewed(tmp_path, small_queue):
    """reviewed=no with tags is a contradiction, not a silent drop."""
    r = small_queue.table["row"].tolist()
    msg = _message(tmp_path, small_queue, [f"{r[0]},no,faded ink"])
    assert "line 2: reviewed says no but tags are 'faded ink'; mark it reviewed or clear the tags" in msg


def test_reserved_tag_is_refused(tmp_path, small_queue):
    """'(untagged)' is the tally's own line; typing it is refused."""
    r = small_queue.table["row"].tolist()
    msg = _message(tmp_path, small_queue, [f"{r[0]},yes,(Untagged)"])
    assert "line 2: the tag '(untagged)' is reserved" in msg


def test_too_many_cells_is_listed(tmp_path, small_queue):
    """An unquoted delimiter in a note shifts cells: the line is refused, not mangled."""
    r = small_queue.table["row"].tolist()
    msg = _message(tmp_path, small_queue, [f"{r[0]},yes,faded ink,left, corner"], header="row,reviewed,tags,note")
    assert "line 2: has 5 cells but the header has 4 (a note or tag with the delimiter in it needs quotes)" in msg


def test_id_and_position_mismatch_is_listed(tmp_path, small_queue):
    """A sheet sorted on one column only: its id and position no longer match the row."""
    t = small_queue.table
    lines = [f"1,{t['stratum'][0]},{t['row'][0]},{t['id'][1]},yes,",
             f"5,{t['stratum'][1]},{t['row'][1]},{t['id'][1]},yes,"]
    msg = _message(tmp_path, small_queue, lines, header="position,stratum,row,id,reviewed,tags")
    assert f"line 2: row {t['row'][0]} has id {t['id'][0]!r} in the queue but {t['id'][1]!r} in the sheet" in msg
    assert f"line 3: row {t['row'][1]} has position '2' in the queue but '5' in the sheet" in msg


def test_not_utf8_is_refused(tmp_path, small_queue):
    """A sheet saved in a legacy encoding is refused with the fix."""
    r = small_queue.table["row"].tolist()
    path = _write(tmp_path / "latin.csv", f"row,reviewed,tags\n{r[0]},yes,étiquette\n", encoding="latin-1")
    with pytest.raises(SlicefindValueError, match=r"is not UTF-8 text \(byte 0xe9 at offset \d+\); save it .* 'CSV UTF-8'"):
        read_reviews(path, small_queue)


def test_empty_and_missing_files(tmp_path, small_queue):
    """An empty file and a path that does not exist are named."""
    with pytest.raises(SlicefindValueError, match="is empty; it needs a header line"):
        read_reviews(_write(tmp_path / "empty.csv", ""), small_queue)
    with pytest.raises(SlicefindValueError, match="cannot be read"):
        read_reviews(tmp_path / "nowhere.csv", small_queue)


def test_many_problems_are_capped(tmp_path, small_queue):
    """More than MAX_LISTED problems: the first ones and a count of the rest."""
    lines = [f"x{i},yes," for i in range(MAX_LISTED + 5)]
    msg = _message(tmp_path, small_queue, lines)
    assert f"has {MAX_LISTED + 5} problems" in msg and "... and 5 more" in msg
    assert msg.count("is not a row number") == MAX_LISTED


def test_wrong_types_are_named(small_queue):
    """reviewed must be a path or frame; queue must be a Queue; names must be a mapping."""
    with pytest.raises(SlicefindTypeError, match="reviewed must be a CSV path or a DataFrame; got list"):
        tally(small_queue, [1, 2])
    with pytest.raises(SlicefindTypeError, match="queue must be a Queue"):
        tally("queue.csv", pd.DataFrame())
    with pytest.raises(SlicefindTypeError, match="names must map slice ids to category names; got list"):
        tally(small_queue, pd.DataFrame({"row": [], "reviewed": [], "tags": []}), names=["R1"])


@pytest.mark.parametrize("kwargs, text", [
    ({"names": {"R7": "faded ink"}}, "names has 'R7', which is not a queued candidate; the queue's candidates are ['R1', 'R2']"),
    ({"names": {"R1": "  "}}, "names['R1'] must be a non-empty category name; got '  '"),
    ({"names": {"R1": "(untagged)"}}, "names['R1'] = '(untagged)' is reserved"),
    ({"threshold": 1.0}, "threshold must be a number strictly between 0 and 1; got 1.0"),
    ({"confidence_level": 95}, "confidence_level must be a number strictly between 0 and 1; got 95"),
])
def test_bad_options_are_named(small_queue, kwargs, text):
    """Each bad option of tally raises with its name and value."""
    with pytest.raises(SlicefindValueError) as info:
        tally(small_queue, pd.DataFrame({"row": [], "reviewed": [], "tags": []}), **kwargs)
    assert text in str(info.value)


# --- coverage with a simulated reviewer (the full check: benchmarks/bench_coverage.py) -------

@pytest.mark.slow
def test_share_intervals_cover_the_truth_with_a_simulated_reviewer():
    """60 simulated reviews of the depot world: pooled coverage of the 95% share intervals is
    >= 93% and no category falls below 85% (the 200-repetition check is in benchmarks/)."""
    path = pathlib.Path(__file__).resolve().parents[1] / "benchmarks" / "bench_coverage.py"
    spec = importlib.util.spec_from_file_location("bench_coverage", path)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    table = bench.simulate(60, scenarios=bench.SCENARIOS[:1])
    assert table["coverage"].mean() >= 0.93
    assert table["coverage"].min() >= 0.85
    assert (table["mean_width"] < 0.2).all()
