"""Categories fixed together, wrong labels, and the plain-words paragraphs of a tally."""
import numpy as np
import pandas as pd
import pytest

from review_helpers import strata_found
from slicefind.cli import main
from slicefind.decision import decision_paragraphs
from slicefind.review.queue import REST, build_queue
from slicefind.stats import stratified_interval
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.review.tally import PAIR_COLUMNS, UNTAGGED, WRONG_LABEL, normalize_tag, tally


@pytest.fixture()
def two_strata():
    """One candidate stratum of 40 errors and a rest of 60, fully queued."""
    queue = build_queue(strata_found([40], 60), budget=100, rest=60)
    assert [40, 60] == queue.strata["n_errors"].tolist()
    return queue


def _sheet(queue, plan):
    """plan: {stratum: [tags of its first rows, in queue order]}; those rows are reviewed."""
    rows, tags = [], []
    for stratum, tag_list in plan.items():
        queued = queue.rows(stratum)[:len(tag_list)]
        rows += queued.tolist()
        tags += tag_list
    return pd.DataFrame({"row": rows, "reviewed": "yes", "tags": tags})


# R1: 10 reviewed, a on 4, b on 3, both on 1 -> union 6; rest: 20 reviewed, a on 2, b on 6,
# both on 2 -> union 6.
HAND_PLAN = {"R1": ["a;b", "a", "a", "a", "b", "b", "", "", "", ""],
             REST: ["a;b", "a;b", "b", "b", "b", "b"] + [""] * 14}


def test_union_share_hand_worked(two_strata):
    """Hand-worked: union = 0.4*6/10 + 0.6*6/20 = 0.42, overlap = 0.4*1/10 + 0.6*2/20 = 0.10."""
    result = tally(two_strata, _sheet(two_strata, HAND_PLAN))
    both = result.combined(["a", "b"])
    assert 0.42 == pytest.approx(both.share, abs=1e-12)
    assert 0.10 == pytest.approx(both.overlap, abs=1e-12)
    # shares: a = 0.4*0.4 + 0.6*0.1 = 0.22, b = 0.4*0.3 + 0.6*0.3 = 0.30
    assert 0.52 == pytest.approx(both.sum_of_shares, abs=1e-12)
    assert 12 == both.n_tagged
    rate = two_strata.error_rate
    assert rate * (1 - 0.42) == pytest.approx(both.headroom, abs=1e-12)
    # the interval is the tally's own stratified interval, applied to "tagged a or b"
    _, low, high = stratified_interval([6, 6], [10, 20], [40, 60])
    assert (low, high) == pytest.approx((both.share_low, both.share_high), abs=1e-12)
    assert rate * (1 - high) == pytest.approx(both.headroom_low, abs=1e-12)


def test_union_is_inclusion_exclusion_of_the_table(two_strata):
    """The estimator is linear, so union = share(a) + share(b) - overlap (inclusion-exclusion)."""
    result = tally(two_strata, _sheet(two_strata, HAND_PLAN))
    shares = result.categories.set_index("category")["share"]
    both = result.combined(["B", " a "])              # case and spaces do not matter
    assert shares["a"] + shares["b"] - both.overlap == pytest.approx(both.share, abs=1e-12)
    assert ("b", "a") == both.categories


def test_pairs_table_ranked_by_union(two_strata):
    """Every pair among the top categories, largest union first, with the union's numbers."""
    plan = {"R1": ["a", "a", "b", "c", "a;c", "", "", "", "", ""], REST: ["c"] * 5 + [""] * 15}
    result = tally(two_strata, _sheet(two_strata, plan))
    pairs = result.pairs(top=3)
    assert list(PAIR_COLUMNS) == list(pairs.columns)
    assert 3 == len(pairs)
    assert list(pairs["share"]) == sorted(pairs["share"], reverse=True)
    for line in pairs.itertuples():
        got = result.combined([line.category_a, line.category_b])
        assert got.share == pytest.approx(line.share)
        assert got.share_high == pytest.approx(line.share_high)
    assert 0 == len(result.pairs(top=2).query("category_a == 'zzz'"))


@pytest.mark.parametrize("given, error, text", [
    (["a", "nope"], SlicefindValueError, "'nope'"),
    (["a", "a"], SlicefindValueError, "more than once"),
    ([], SlicefindValueError, "at least one"),
    ("a", SlicefindTypeError, "list of category names"),
    ([UNTAGGED], SlicefindValueError, "not a category"),
])
def test_combined_bad_input_is_named(two_strata, given, error, text):
    """An unknown, repeated or missing category is named; nothing is computed."""
    result = tally(two_strata, _sheet(two_strata, HAND_PLAN))
    with pytest.raises(error, match=text):
        result.combined(given)


def test_combined_suggests_the_closest_category(two_strata):
    """A misspelt category gets the closest known one."""
    plan = {"R1": ["faded ink"] * 3, REST: ["torn label"] * 2}
    result = tally(two_strata, _sheet(two_strata, plan))
    with pytest.raises(SlicefindValueError, match="Did you mean 'faded ink'"):
        result.combined(["faded inc", "torn label"])


@pytest.mark.slow
def test_union_interval_covers_the_truth_in_simulated_reviews():
    """Simulation: the union's 95% interval holds the true union share in >= 93% of queues.

    Independent check: the true share is counted on the whole finite population of errors,
    each repetition draws a new queue and reviews its rows (common practice: a coverage
    simulation).
    """
    found = strata_found([150, 100], 250)
    rng = np.random.default_rng(11)
    truth = {}
    for stratum, (pa, pb) in {"R1": (0.6, 0.3), "R2": (0.2, 0.5), REST: (0.05, 0.1)}.items():
        for row in build_queue(found, budget=500, rest=250).order(stratum):
            a, b = rng.random() < pa, rng.random() < pb
            truth[int(row)] = ";".join(t for t, on in (("a", a), ("b", b)) if on)
    true_union = np.mean([bool(t) for t in truth.values()])
    true_overlap = np.mean([t == "a;b" for t in truth.values()])
    covered = overlap_covered = 0
    reps = 300
    for rep in range(reps):
        queue = build_queue(found, budget=60, rest=20, random_state=rep)
        rows = queue.table["row"].astype(int)
        sheet = pd.DataFrame({"row": rows, "reviewed": "yes", "tags": [truth[r] for r in rows]})
        both = tally(queue, sheet).combined(["a", "b"])
        covered += both.share_low <= true_union <= both.share_high
        overlap_covered += both.overlap_low <= true_overlap <= both.overlap_high
    assert covered / reps >= 0.93
    assert overlap_covered / reps >= 0.93


# --- wrong labels --------------------------------------------------------------------------

def test_wrong_label_spellings_are_the_reserved_tag():
    """'(wrong label)' and 'Wrong Label' are the reserved tag; other names are left alone."""
    assert WRONG_LABEL == normalize_tag(" (Wrong  Label) ")
    assert WRONG_LABEL == normalize_tag("wrong label")
    assert "wrong labels" == normalize_tag("wrong labels")


WRONG_PLAN = {"R1": ["a", "a;(wrong label)", "wrong label", "a", "", "", "", "", "", ""],
              REST: ["(wrong label)", "a"] + [""] * 18}


def test_wrong_label_share_and_corrected_rate(two_strata):
    """Hand-worked: wrong labels = 0.4*2/10 + 0.6*1/20 = 0.11; corrected rate = rate * 0.89."""
    sheet = _sheet(two_strata, WRONG_PLAN)
    sheet["note"] = ""
    sheet.loc[1, "note"] = "the parcel says 7"
    result = tally(two_strata, sheet)
    s = result.summary
    assert 3 == s["n_wrong_label"]
    assert 0.11 == pytest.approx(s["wrong_label_share"], abs=1e-12)
    rate = two_strata.error_rate
    assert rate * 0.89 == pytest.approx(s["corrected_error_rate"], abs=1e-12)
    _, low, high = stratified_interval([2, 1], [10, 20], [40, 60])
    assert rate * (1 - high) == pytest.approx(s["corrected_error_rate_low"], abs=1e-12)
    assert rate * (1 - low) == pytest.approx(s["corrected_error_rate_high"], abs=1e-12)
    cats = result.categories.set_index("category")
    # the reserved line sits after the user categories, before (untagged)
    assert ["a", WRONG_LABEL, UNTAGGED] == list(result.categories["category"])
    assert ["a"] == result.user_categories()
    # a: 0.4*3/10 + 0.6*1/20 = 0.15; a or wrong label: 0.4*4/10 + 0.6*2/20 = 0.22
    assert rate * (1 - 0.15) == pytest.approx(cats.at["a", "headroom"], abs=1e-12)
    assert rate * (1 - 0.22) == pytest.approx(cats.at["a", "headroom_corrected"], abs=1e-12)
    assert rate * 0.89 == pytest.approx(cats.at[WRONG_LABEL, "headroom"], abs=1e-12)
    # a row tagged only as a wrong label is explained, not untagged: 6 + 18 untagged
    assert 24 == cats.at[UNTAGGED, "n_tagged"]


def test_relabel_rows_with_their_notes(two_strata):
    """relabel lists the wrong-label rows, their other tags and notes, in row order."""
    sheet = _sheet(two_strata, WRONG_PLAN)
    sheet["note"] = ""
    flagged_row = int(sheet.loc[1, "row"])
    sheet.loc[1, "note"] = "the parcel says 7"
    relabel = tally(two_strata, sheet).relabel
    expected_rows = sorted(int(r) for r, t in zip(sheet["row"], sheet["tags"]) if "wrong label" in t)
    assert expected_rows == relabel["row"].tolist()
    line = relabel.set_index("row").loc[flagged_row]
    assert ("a", "the parcel says 7", "R1") == (line["tags"], line["note"], line["stratum"])


def test_no_wrong_labels_leaves_the_table_as_before(two_strata):
    """Without the reserved tag there is no such line and corrected equals measured headroom."""
    result = tally(two_strata, _sheet(two_strata, HAND_PLAN))
    assert WRONG_LABEL not in set(result.categories["category"])
    assert 0 == len(result.relabel)
    assert np.allclose(result.categories["headroom"], result.categories["headroom_corrected"])
    assert result.summary["error_rate"] == pytest.approx(result.summary["corrected_error_rate"])


# --- plain words ---------------------------------------------------------------------------

def test_paragraphs_restate_the_numbers(two_strata):
    """Each paragraph carries the share, interval and headroom of its line, and the verdict."""
    plan = {"R1": ["faded ink"] * 8 + ["", ""], REST: ["torn label"] * 5 + ["wrong label"] + [""] * 14}
    result = tally(two_strata, _sheet(two_strata, plan), names={"R1": "faded ink"})
    paragraphs = decision_paragraphs(result, top=2)
    cats = result.categories.set_index("category")
    first = paragraphs[0]
    c = cats.loc["faded ink"]
    assert first.startswith(f"faded ink: {c['share']:.1%} of errors (95% CI {c['share_low']:.1%}–"
                            f"{c['share_high']:.1%})")
    assert f"at best {c['headroom']:.2%}" in first
    assert f"Against corrected labels it would be {c['headroom_corrected']:.2%}" in first
    v = result.slices.set_index("slice_id").loc["R1"]
    assert f"is {v['verdict']}" in first and f"{int(v['n_named'])} of its {int(v['n_reviewed'])}" in first
    assert "No queued slice is named after it." in paragraphs[1]
    assert paragraphs[2].startswith(f"{WRONG_LABEL}: 1 reviewed error had a wrong dev-set label")
    assert f"{result.summary['corrected_error_rate']:.2%}" in paragraphs[2]
    assert paragraphs[3].startswith(f"{UNTAGGED}: {cats.at[UNTAGGED, 'share']:.1%} of errors")


def test_undecided_paragraph_says_how_many_more(two_strata):
    """An undecided candidate's sentence gives its more_needed."""
    plan = {"R1": ["faded ink", "faded ink", "", ""], REST: [""] * 3}
    result = tally(two_strata, _sheet(two_strata, plan), names={"R1": "faded ink"})
    v = result.slices.set_index("slice_id").loc["R1"]
    assert "undecided" == v["verdict"]
    more = int(v["more_needed"])
    assert f"about {more} more reviews from it would likely settle it" in decision_paragraphs(result)[0]


def test_paragraph_options_are_checked(two_strata):
    """A bad top or a non-tally is named."""
    result = tally(two_strata, _sheet(two_strata, HAND_PLAN))
    with pytest.raises(SlicefindValueError, match="top must be an integer >= 1; got 0"):
        decision_paragraphs(result, top=0)
    with pytest.raises(SlicefindTypeError, match="result must be a Tally"):
        decision_paragraphs("tally")


# --- the command line ----------------------------------------------------------------------

def test_cli_together_and_relabel(tmp_path, ws, capsys):
    """tally --together prints the union line; relabel.csv holds the wrong-label rows."""
    ws_path, queue = ws.path, ws.load_queue()
    rows = queue.table["row"].astype(int).tolist()
    tags = (["faded ink"] * 6 + ["torn label;faded ink"] * 2 + ["torn label"] * 4
            + ["wrong label"] * 2 + [""] * (len(rows) - 14))
    sheet = tmp_path / "filled.csv"
    pd.DataFrame({"row": rows, "reviewed": "yes", "tags": tags}).to_csv(sheet, index=False)
    capsys.readouterr()
    assert 0 == main(["tally", str(ws_path), str(sheet), "--together", "faded ink,torn label"])
    out = capsys.readouterr().out
    result = ws.tally()
    both = result.combined(["faded ink", "torn label"])
    line = next(l for l in out.splitlines() if l.startswith("faded ink + torn label"))
    assert f"{both.share:.1%} [{both.share_low:.1%}–{both.share_high:.1%}]" in line
    assert f"{both.headroom:.2%}" in line
    assert "In plain words:" in out
    relabel = pd.read_csv(f"{ws_path}/relabel.csv")
    assert sorted(rows[12:14]) == relabel["row"].tolist()


def test_cli_unknown_together_changes_nothing(tmp_path, ws, capsys):
    """An unknown category in --together is named and the sheet is not imported."""
    ws_path, queue = ws.path, ws.load_queue()
    rows = queue.table["row"].astype(int).tolist()
    sheet = tmp_path / "filled.csv"
    pd.DataFrame({"row": rows[:3], "reviewed": "yes", "tags": ["faded ink"] * 3}).to_csv(sheet, index=False)
    assert 1 == main(["tally", str(ws_path), str(sheet), "--together", "faded ink,torn lable"])
    err = capsys.readouterr().err
    assert "--together has ['torn lable']" in err
    assert 0 == len(ws.reviews())
    assert 1 == main(["tally", str(ws_path), str(sheet), "--together", "faded ink"])
    assert "must name two or more categories" in capsys.readouterr().err


def test_report_shows_pairs_wrong_labels_and_paragraphs(two_strata):
    """The report's tally ends with the wrong-label numbers, the pairs table and the paragraphs."""
    from slicefind.report import _decision_section
    plan = {"R1": ["a", "a;b", "b", "wrong label"] + [""] * 6, REST: ["b <i>", "a"] + [""] * 18}
    result = tally(two_strata, _sheet(two_strata, plan))
    section = _decision_section(result)
    s = result.summary
    assert f"{s['corrected_error_rate']:.1%}" in section
    assert "id='together'" in section and "b &lt;i&gt;" in section and "<i>" not in section
    for paragraph in decision_paragraphs(result):
        assert paragraph.replace("<", "&lt;").replace(">", "&gt;") in section
