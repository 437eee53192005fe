"""Adaptive queue extension: where the next reviews go (`Queue.extend(n, adaptive=tally)`)."""
import importlib.util
import itertools
import os
import pathlib

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from review_helpers import overlapping_slices, strata_found
from slicefind.cli import main
from slicefind.review.queue import ADAPTIVE_RULE, REST, _adaptive_allocation, build_queue
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.review.tally import tally
from slicefind.workspace import Workspace


def _sheet(queue, tag_of):
    """Every queued row reviewed; ``tag_of(stratum, k)`` tags the k-th row of each stratum."""
    sheet = queue.table[["row", "stratum"]].copy()
    sheet["reviewed"] = "yes"
    nth = sheet.groupby("stratum").cumcount()
    sheet["tags"] = [tag_of(s, k) for s, k in zip(sheet["stratum"], nth)]
    return sheet


def _hand_tags(stratum, k):
    """R1: 9 of 10 faded ink; R2: 7 of 10 torn label; R3 and rest: untagged."""
    if stratum == "R1":
        return "faded ink" if k < 9 else ""
    if stratum == "R2":
        return "torn label" if k < 7 else ""
    return ""


@pytest.fixture(scope="module")
def hand():
    """Strata of 200, 150, 100 errors and 300 in rest, 10 reviews each (the hand-worked case)."""
    queue = build_queue(strata_found([200, 150, 100], 300), budget=40, rest=10)
    return queue, tally(queue, _sheet(queue, _hand_tags))


# --- the allocation -------------------------------------------------------------------------

def test_hand_worked_allocation(hand):
    """30 more rows: R2 (undecided) gets its Cochran need, 11; Neyman gives R1 9 and rest 10.

    R1 (9/10, Wilson-FPC low >= 0.5) is confirmed and R3 (0/10) rejected; R2 (7/10) is undecided.
    Its need (Cochran 1977 4.4, with the threshold as p and the gap 0.2 as e, FPC N = 150):
    n0 = 1.96^2 * 0.25 / 0.2^2 = 24.01, n = 24.01 / (1 + 23.01 / 150) = 20.8 -> 21 in all, 11 more.
    Neyman for the other 19: S_h^2 adds (k + 1/2)/(n + 1) * (1 - that) over faded ink, torn label
    and untagged: R1 0.1178 + 0.0434 + 0.1178 = 0.2789, R2 0.0434 + 0.2169 + 0.2169 = 0.4773,
    R3 and rest 3 * 0.0434 = 0.1302; n_h proportional to N_h S_h = 105.6, 103.6, 36.1, 108.2 over
    70 reviews in all puts R2 (21 already) and R3 (10) above their share, so the 19 split
    between R1 and rest, 9.4 : 9.6 continuous, 9 and 10 as integers.
    """
    queue, result = hand
    assert (["confirmed", "undecided", "rejected"] == result.slices["verdict"].tolist())
    assert [0, 11, 0] == result.slices["more_needed"].tolist()
    longer = queue.extend(30, adaptive=result)
    step = longer.params["extensions"][-1]
    assert {"R2": 11} == step["undecided"]
    assert {"R1": 9, REST: 10} == step["neyman"]
    assert {"R1": 9, "R2": 11, REST: 10} == step["allocated"]
    assert {"R1": 0.5281, "R2": 0.6908, "R3": 0.3608, REST: 0.3608} == step["spread"]
    assert (True, ADAPTIVE_RULE, None, {}) == (step["adaptive"], step["rule"], step["rest"], step["asked"])
    assert [19, 21, 10, 20] == longer.strata["n_queued"].tolist()


def test_neyman_step_matches_brute_force(hand):
    """The greedy Neyman step gives the integer split of 19 rows that minimises
    sum_h N_h^2 S_h^2 / n_h, found by trying every split (an independent computation)."""
    queue, result = hand
    step = queue.extend(30, adaptive=result).params["extensions"][-1]
    sizes = queue.sizes
    start = {"R1": 10, "R2": 21, "R3": 10, REST: 10}
    spread = {"R1": np.sqrt(0.27893), "R2": np.sqrt(0.47727), "R3": np.sqrt(0.13017),
              REST: np.sqrt(0.13017)}
    strata = list(start)
    best, best_cost = None, np.inf
    for split in itertools.product(range(20), repeat=3):
        if sum(split) > 19:
            continue
        parts = dict(zip(strata, split + (19 - sum(split),)))
        cost = sum((sizes[s] * spread[s]) ** 2 / (start[s] + parts[s]) for s in strata)
        if cost < best_cost:
            best, best_cost = parts, cost
    assert {s: c for s, c in best.items() if c} == step["neyman"]


def test_fixed_rule_on_the_same_case_spreads_evenly(hand):
    """The fixed rule ignores the reviews: rest keeps its share (round(30 * 10 / 40) = 8) and
    the candidates even out (8, 7, 7); its record says nothing of adaptive."""
    queue, _ = hand
    longer = queue.extend(30)
    assert [18, 17, 17, 18] == longer.strata["n_queued"].tolist()
    assert {"n": 30, "rest": 8} == longer.params["extensions"][-1]


def test_cheapest_undecided_first_and_the_last_funded_in_part():
    """Undecided needs are met cheapest first; the one that does not fit gets what is left and
    Neyman gets nothing; a need already covered by queued rows gets nothing."""
    strata = ["R1", "R2", "R3", REST]
    counts = dict.fromkeys(strata, 10)
    caps = {"R1": 100, "R2": 100, "R3": 100, REST: 100}
    spread = dict.fromkeys(strata, 0.5)
    steps = _adaptive_allocation(strata, counts, caps, {"R1": 30, "R2": 5, "R3": -2}, spread, 20, None)
    assert {"R1": 15, "R2": 5, "R3": 0, REST: 0} == steps["undecided"]
    assert dict.fromkeys(strata, 0) == steps["neyman"]


def test_need_capped_by_the_stratum_and_rest_quota_kept():
    """rest=4 goes to rest first; an undecided need beyond its stratum's unqueued rows gets the
    rows there are; Neyman then leaves rest alone (its count was asked for)."""
    strata = ["R1", "R2", REST]
    counts = {"R1": 10, "R2": 10, REST: 5}
    caps = {"R1": 12, "R2": 80, REST: 200}
    spread = {"R1": 0.5, "R2": 0.5, REST: 0.9}
    steps = _adaptive_allocation(strata, counts, caps, {"R1": 9}, spread, 10, 4)
    assert {"R1": 0, "R2": 0, REST: 4} == steps["asked"]
    assert {"R1": 2, "R2": 0, REST: 0} == steps["undecided"]
    assert {"R1": 0, "R2": 4, REST: 0} == steps["neyman"]


def test_rows_spill_to_rest_when_the_candidates_are_full():
    """With rest=0 asked and every candidate queued in full, the rows still go to rest: n is met."""
    strata = ["R1", REST]
    steps = _adaptive_allocation(strata, {"R1": 5, REST: 5}, {"R1": 6, REST: 50}, {}, {"R1": 1.0, REST: 0.1},
                                 8, 0)
    assert {"R1": 1, REST: 7} == steps["neyman"]


def test_an_unreviewed_stratum_is_sampled_first():
    """A stratum with nothing queued gets the first Neyman row, whatever the spreads say."""
    strata = ["R1", "R2", REST]
    steps = _adaptive_allocation(strata, {"R1": 10, "R2": 0, REST: 10}, dict.fromkeys(strata, 100), {},
                                 {"R1": 1.0, "R2": 0.01, REST: 1.0}, 1, None)
    assert {"R1": 0, "R2": 1, REST: 0} == steps["neyman"]


# --- the prefix property ----------------------------------------------------------------------

def test_adaptive_extension_keeps_the_sheet_and_each_stratums_order(hand):
    """The extended queue's first lines are the old table; each stratum's rows continue its order."""
    queue, result = hand
    longer = queue.extend(30, adaptive=result)
    assert 70 == len(longer)
    assert longer.table.head(len(queue)).equals(queue.table)
    for s in queue.strata["stratum"]:
        n_new = int(longer.strata.set_index("stratum").at[s, "n_queued"])
        assert queue.order(s).tolist() == longer.order(s).tolist()
        assert queue.order(s)[:n_new].tolist() == longer.rows(s).tolist()
    again = longer.extend(5, adaptive=tally(longer, _sheet(longer, _hand_tags)))
    assert again.table.head(70).equals(longer.table)
    assert 2 == len(again.params["extensions"])


@settings(max_examples=40, deadline=None)
@given(overlapping_slices(), st.integers(1, 40), st.integers(0, 10**6), st.data())
def test_adaptive_extension_property(found, budget, seed, data):
    """For any queue and reviews, an adaptive extension adds exactly n rows within the strata,
    keeps the sheet as a prefix and every stratum's rows a prefix of its order; beyond the pool
    it is refused."""
    queue = build_queue(found, budget=budget, rest=3, random_state=seed)
    n_done = data.draw(st.integers(1, len(queue)))
    tags = data.draw(st.lists(st.sampled_from(["", "faded ink", "torn label", "faded ink;torn label"]),
                              min_size=n_done, max_size=n_done))
    sheet = queue.table[["row"]].head(n_done).copy()
    sheet["reviewed"] = "yes"
    sheet["tags"] = tags
    result = tally(queue, sheet, trust_order=True)
    pool = int((queue.strata["n_errors"] - queue.strata["n_queued"]).sum())
    if pool == 0:
        with pytest.raises(SlicefindValueError, match="queued in full"):
            queue.extend(1, adaptive=result)
        return
    n = data.draw(st.integers(1, pool))
    longer = queue.extend(n, adaptive=result)
    assert len(queue) + n == len(longer)
    assert longer.table.head(len(queue)).equals(queue.table)
    assert n == sum(longer.params["extensions"][-1]["allocated"].values())
    for s, n_queued, n_errors in longer.strata[["stratum", "n_queued", "n_errors"]].itertuples(index=False):
        assert n_queued <= n_errors
        assert queue.order(s)[:n_queued].tolist() == longer.rows(s).tolist()
    with pytest.raises(SlicefindValueError, match=f"n={pool + 1} is more than the {pool} error rows"):
        queue.extend(pool + 1, adaptive=result)


# --- bad input --------------------------------------------------------------------------------

def test_extension_past_the_pool_is_refused_by_both_rules(hand):
    """n over the unqueued error rows (750 - 40 = 710) names n and the count, for either rule."""
    queue, result = hand
    msg = "n=711 is more than the 710 error rows not yet queued; ask for n <= 710"
    with pytest.raises(SlicefindValueError, match=msg):
        queue.extend(711)
    with pytest.raises(SlicefindValueError, match=msg):
        queue.extend(711, adaptive=result)
    assert 40 == len(queue) and [] == queue.params["extensions"]
    assert 750 == len(queue.extend(710, adaptive=result))


def test_adaptive_must_be_a_tally():
    """A DataFrame as adaptive= is a TypeError naming adaptive and what it needs."""
    queue = build_queue(strata_found([20], 5), budget=10)
    with pytest.raises(SlicefindTypeError, match="adaptive must be the Tally of this queue's reviews.*got DataFrame"):
        queue.extend(5, adaptive=pd.DataFrame({"row": [1]}))


def test_tally_of_other_strata_is_refused(hand):
    """A tally of a queue with other strata names both sets of strata and their sizes."""
    queue, _ = hand
    other = build_queue(strata_found([20, 10], 15), budget=20, rest=5)
    result = tally(other, _sheet(other, lambda s, k: ""))
    with pytest.raises(SlicefindValueError,
                       match=r"adaptive is a tally of another queue: its strata .* are \{'R1': 20, 'R2': 10, "
                             r"'rest': 15\}, this queue's are \{'R1': 200, 'R2': 150, 'R3': 100, 'rest': 300\}"):
        queue.extend(5, adaptive=result)


def test_tally_of_another_draw_of_the_same_strata_is_refused(hand):
    """Same strata but another seed: the reviewed rows are not in this queue, and it says so."""
    queue, _ = hand
    other = build_queue(strata_found([200, 150, 100], 300), budget=40, rest=10, random_state=9)
    result = tally(other, _sheet(other, _hand_tags))
    with pytest.raises(SlicefindValueError, match=r"of its reviewed rows are not in this queue \(first: \["):
        queue.extend(5, adaptive=result)


def test_tally_without_reviews_is_refused(hand):
    """A tally where nothing is reviewed yet has nothing to adapt to."""
    queue, _ = hand
    empty = tally(queue, pd.DataFrame({"row": [int(queue.table["row"][0])], "reviewed": ["no"], "tags": [""]}))
    with pytest.raises(SlicefindValueError, match="adaptive is a tally with no reviewed row yet"):
        queue.extend(5, adaptive=empty)


def test_bad_rest_with_adaptive_is_named(hand):
    """rest='2' with adaptive= is refused by name, before the tally is read."""
    queue, result = hand
    with pytest.raises(SlicefindTypeError, match="rest must be an integer; got '2'"):
        queue.extend(5, rest="2", adaptive=result)


# --- workspace and command line ---------------------------------------------------------------

def test_workspace_round_trip_of_an_adaptive_extension(ws):
    """An adaptive extension of the stored queue, saved, loads back equal (table, strata and the
    recorded step) in a new connection, and the old queue is its prefix."""
    queue = ws.load_queue()
    first_rows = queue.table.groupby("stratum").head(4)
    for row, stratum in zip(first_rows["row"], first_rows["stratum"]):
        ws.record_review(int(row), tags="torn label" if stratum == "R1" else "")
    longer = queue.extend(15, adaptive=ws.tally())
    ws.save_queue(longer)
    with Workspace(ws.path) as other:
        loaded = other.load_queue()
    pd.testing.assert_frame_equal(longer.table, loaded.table)
    pd.testing.assert_frame_equal(longer.strata, loaded.strata)
    pd.testing.assert_frame_equal(queue.table, loaded.table.head(len(queue)))
    assert longer.params["extensions"] == loaded.params["extensions"]
    assert loaded.params["extensions"][-1]["adaptive"] is True
    assert 15 == sum(loaded.params["extensions"][-1]["allocated"].values())


def _depot_csv(folder, n=3000, seed=0):
    """A generated depot table where scanner S3 on the night shift misreads labels."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({"parcel_id": [f"P{i:05d}" for i in range(n)],
                          "scanner": rng.choice(["S1", "S2", "S3", "S4"], n),
                          "shift": rng.choice(["day", "night"], n),
                          "label": rng.integers(0, 10, n)})
    bad = ((frame["scanner"] == "S3") & (frame["shift"] == "night")).to_numpy()
    wrong = rng.random(n) < np.where(bad, 0.5, 0.05)
    frame["pred"] = np.where(wrong, (frame["label"] + 3) % 10, frame["label"])
    path = os.path.join(folder, "dev.csv")
    frame.to_csv(path, index=False)
    return path


@pytest.fixture()
def cli_ws(tmp_path, capsys):
    """A workspace from the command line: scanned and queued (30 rows), nothing reviewed."""
    ws = str(tmp_path / "ws")
    assert 0 == main(["scan", _depot_csv(str(tmp_path)), "--label", "label", "--prediction", "pred",
                      "--id-column", "parcel_id", "--out", ws])
    assert 0 == main(["queue", ws, "--budget", "30", "--rest", "6"])
    capsys.readouterr()
    return ws


def test_cli_adaptive_extension(cli_ws, tmp_path, capsys):
    """queue --extend N --adaptive tallies the stored reviews, extends, saves, rewrites queue.csv
    with the reviews filled in, and prints what each stratum got and why."""
    sheet = pd.read_csv(os.path.join(cli_ws, "queue.csv"), encoding="utf-8-sig")
    nth = sheet.groupby("stratum").cumcount()
    sheet["reviewed"] = 1
    sheet["tags"] = np.where((sheet["stratum"] == "R1") & (nth % 4 != 0), "glare on belt", "")
    filled = str(tmp_path / "filled.csv")
    sheet.to_csv(filled, index=False)
    assert 0 == main(["tally", cli_ws, filled])
    capsys.readouterr()
    with Workspace(cli_ws, create=False) as ws:         # the API on the same stored reviews
        expected = ws.load_queue().extend(20, adaptive=ws.tally())
    assert 0 == main(["queue", cli_ws, "--extend", "20", "--adaptive"])
    out = capsys.readouterr().out
    with Workspace(cli_ws, create=False) as ws:
        queue = ws.load_queue()
    step = queue.params["extensions"][-1]
    assert 50 == len(queue) and step["adaptive"] is True
    assert expected.params["extensions"][-1] == step
    pd.testing.assert_frame_equal(expected.table, queue.table)
    assert f"adaptive: 20 more ({ADAPTIVE_RULE})" in out
    line = [ln.split() for ln in out.splitlines() if ln.split()[:1] == ["R1"]][-1]
    assert ["R1", step["verdicts"]["R1"], str(step["more_needed"]["R1"]), str(step["undecided"].get("R1", 0)),
            str(step["neyman"].get("R1", 0)), str(step["allocated"].get("R1", 0))] == line[:6]
    written = pd.read_csv(os.path.join(cli_ws, "queue.csv"), encoding="utf-8-sig", keep_default_na=False)
    assert queue.table["row"].tolist() == written["row"].tolist()
    assert [1] * 30 + [""] * 20 == [v if v == "" else int(v) for v in written["reviewed"]]
    assert sheet["tags"].fillna("").tolist() == written["tags"].head(30).tolist()


def test_cli_adaptive_bad_input_is_one_line_and_changes_nothing(cli_ws, capsys):
    """--adaptive without --extend, --adaptive before any review, --threshold without --adaptive
    and an extension past the pool each print one named error, exit 1, and leave the stored
    queue and queue.csv as they were."""
    path = os.path.join(cli_ws, "queue.csv")
    before = open(path, "rb").read()
    cases = [(["--adaptive"], "--adaptive needs --extend N"),
             (["--extend", "5", "--adaptive"], "--adaptive needs reviews, and no row of the stored queue"),
             (["--extend", "5", "--threshold", "0.6"], "--threshold only applies with --extend N --adaptive"),
             (["--extend", "100000"], "n=100000 is more than the 293 error rows not yet queued")]
    for extra, message in cases:
        assert 1 == main(["queue", cli_ws] + extra)
        err = capsys.readouterr().err
        assert f"slicefind: error: {message}" in err and "Traceback" not in err
        assert 1 == len(err.strip().splitlines())
    assert before == open(path, "rb").read()
    with Workspace(cli_ws, create=False) as ws:
        assert 30 == len(ws.load_queue()) and [] == ws.load_queue().params["extensions"]


# --- seeded simulation (the full check: benchmarks/bench_coverage.py --adaptive) ---------------

@pytest.mark.slow
def test_adaptive_decides_more_with_coverage_near_nominal():
    """25 seeded first passes of the wide depot world, 60 more rows each: the adaptive rule
    decides at least as many candidates as the fixed rule on the same seeds, and the 95%
    share and precision intervals still cover about 95% (pooled >= 90%)."""
    path = pathlib.Path(__file__).resolve().parents[1] / "benchmarks" / "bench_coverage.py"
    spec = importlib.util.spec_from_file_location("bench_coverage", path)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    table, paired, _, _ = bench.simulate_adaptive(25, bench.wide_world(), extra=60)
    rules = table.set_index("rule")
    assert rules.at["adaptive", "reviews"] == rules.at["fixed", "reviews"] == 120
    assert rules.at["adaptive", "decided"] >= rules.at["fixed", "decided"]
    assert paired.sum() > 0
    assert rules.at["adaptive", "share_coverage"] >= 0.90
    assert rules.at["adaptive", "precision_coverage"] >= 0.90
    assert rules.at["adaptive", "wrong"] <= 0.1
