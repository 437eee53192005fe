"""The label check: confident learning's confident joint as a slice source."""
import os
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy.stats import poisson_binom

import slicefind as sf
from slicefind.cli import main
from slicefind.discovery.records import LABEL_SOURCE
from slicefind.discovery.labelcheck import (UNION_KEY, label_check_slices, nested_tests,
                                            poisson_binomial_sf)
from slicefind.discovery.find import ID_PREFIXES
from slicefind.discovery.records import SOURCES
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.discovery.table import build_eval_table
from slicefind.workspace import Workspace

K = 10
PROBS = [f"p{j}" for j in range(K)]


def _depot(n=3000, seed=0, scattered=0.0, keyed=0):
    """Digits read off parcel labels, with calibrated per-class scores.

    Most rows are printed cleanly (sharp scores); on scanner S3 at night the print is
    smudged and the scores spread, so the model errs more there. The true digit is drawn
    from the scores themselves, so they are calibrated by construction. Then label
    mistakes are planted: `scattered` (a share of rows) keyed as a random other digit,
    and `keyed` sevens keyed as 1. Returns the frame and the planted-mistake mask.
    """
    rng = np.random.default_rng(seed)
    scanner = rng.choice(["S1", "S2", "S3"], n)
    shift = rng.choice(["day", "night"], n)
    smudged = (scanner == "S3") & (shift == "night")
    sharp = (rng.random(n) < 0.85) & ~smudged
    centre = rng.integers(0, K, n)
    conc = np.where(sharp[:, None], 0.02, 0.6) * np.ones((n, K))
    conc[np.arange(n), centre] += np.where(sharp, 40.0, 2.0)
    probs = np.vstack([rng.dirichlet(c) for c in conc])
    true = (probs.cumsum(axis=1) > rng.random(n)[:, None]).argmax(axis=1)
    given = true.copy()
    planted = rng.random(n) < scattered
    given[planted] = (true[planted] + rng.integers(1, K, int(planted.sum()))) % K
    if keyed:
        sevens = np.flatnonzero((true == 7) & ~planted)
        rows = rng.choice(sevens, keyed, replace=False)
        given[rows] = 1
        planted[rows] = True
    frame = pd.DataFrame({"parcel": [f"P{i:05d}" for i in range(n)], "scanner": scanner,
                          "shift": shift, "digit": given, "read_as": probs.argmax(axis=1)})
    for j in range(K):
        frame[PROBS[j]] = probs[:, j]
    return frame, planted


def _joint_by_loop(given, probs):
    """The confident joint from the definition (Northcutt, Jiang & Chuang 2021, eq. 1),
    one row at a time: thresholds, counts, suspected rows, and per suspected row its class."""
    n, k = probs.shape
    thresholds = []
    for j in range(k):
        mine = [probs[r, j] for r in range(n) if given[r] == j]
        thresholds.append(sum(mine) / len(mine) if mine else None)
    joint = [[0] * k for _ in range(k)]
    suspected, towards, confident = [], {}, {}
    for r in range(n):
        above = [j for j in range(k) if thresholds[j] is not None and probs[r, j] >= thresholds[j]]
        if not above:
            continue
        best = above[0]
        for j in above:
            if probs[r, j] > probs[r, best]:
                best = j
        confident[r] = best
        joint[given[r]][best] += 1
        if best != given[r]:
            suspected.append(r)
            towards[r] = best
    return thresholds, joint, suspected, towards, confident


def _tail(chances, k):
    """P(K >= k) from scipy 1.17.1's Poisson-binomial pmf."""
    return float(poisson_binom.pmf(np.arange(k, len(chances) + 1), chances).sum())


def _table(frame):
    return build_eval_table(frame, label="digit", prediction="read_as")


@pytest.fixture(scope="module")
def keyed_sevens():
    """A clerk keyed 60 sevens as 1; no other label mistake."""
    frame, planted = _depot(seed=0, keyed=60)
    return frame, planted, sf.find_slices(frame, label="digit", prediction="read_as", scores=PROBS,
                                          id_column="parcel")


def test_source_is_registered_with_its_own_prefix():
    """The label check is a source of slices.SOURCES with the unused id letter L."""
    assert LABEL_SOURCE in SOURCES
    assert "L" == ID_PREFIXES[LABEL_SOURCE]
    assert sorted(ID_PREFIXES.values()).count("L") == 1


def test_confident_joint_matches_the_definition():
    """Thresholds, the joint, the suspected rows and each pair's rows equal a plain loop over rows."""
    frame, _ = _depot(n=1500, seed=4, scattered=0.04)
    probs = frame[PROBS].to_numpy()
    check = label_check_slices(_table(frame), PROBS, min_rows=5)
    thresholds, joint, suspected, towards, _ = _joint_by_loop(frame["digit"].to_numpy(), probs)
    assert thresholds == pytest.approx(check.thresholds.tolist(), abs=1e-12)
    assert joint == check.joint.to_numpy().tolist()
    assert suspected == check.suspected.tolist()
    assert "scores confidently disagree with digit" == check.slices[0].description
    assert suspected == check.slices[0].rows.tolist()
    for sl in check.slices[1:]:
        i, j = sl.extra["given"], sl.extra["suspected"]
        rows = [r for r in suspected if frame["digit"].iat[r] == i and towards[r] == j]
        assert rows == sl.rows.tolist()
        assert f"digit = {i}, scores confidently say {j}" == sl.description
        assert UNION_KEY == sl.extra["parent"]
        assert joint[i][j] >= 5
    listed = {(sl.extra["given"], sl.extra["suspected"]) for sl in check.slices[1:]}
    assert {(i, j) for i in range(K) for j in range(K) if i != j and joint[i][j] >= 5} == listed


def test_p_values_are_poisson_binomial_tails_of_calibrated_scores():
    """The union's and each pair's p-values equal scipy's Poisson-binomial tail over the loop's rows."""
    frame, _ = _depot(n=1500, seed=4, scattered=0.04)
    probs = frame[PROBS].to_numpy()
    given = frame["digit"].to_numpy()
    check = label_check_slices(_table(frame), PROBS, min_rows=5)
    _, _, suspected, _, confident = _joint_by_loop(given, probs)
    chances = [1 - probs[r, j] for r, j in confident.items()]
    # scipy 1.17.1: P(K >= k) = poisson_binom.pmf(range(k, n + 1), p).sum() (its sf is
    # 1 - cdf, which rounds tails below 1e-15 away)
    assert _tail(chances, len(suspected)) == pytest.approx(
        check.slices[0].extra["p_value"], rel=1e-6, abs=1e-15)
    assert sum(chances) == pytest.approx(check.slices[0].extra["expected"], rel=1e-12)
    for sl in check.slices[1:]:
        i, j = sl.extra["given"], sl.extra["suspected"]
        chance_i = [probs[r, i] for r, c in confident.items() if c == j]
        assert _tail(chance_i, sl.rows.size) == pytest.approx(sl.extra["p_value"], rel=1e-6, abs=1e-15)


def test_poisson_binomial_tail_matches_scipy_and_a_hand_case():
    """The tail matches scipy's poisson_binom across sizes (direct and FFT products) and 3 fair coins."""
    assert 0.5 == pytest.approx(poisson_binomial_sf([0.5, 0.5, 0.5], 2), abs=1e-15)   # 4 of 8 outcomes
    assert 0.125 == pytest.approx(poisson_binomial_sf([0.5, 0.5, 0.5], 3), abs=1e-15)
    assert (1.0, 0.0) == (poisson_binomial_sf([0.3], 0), poisson_binomial_sf([0.3], 2))
    rng = np.random.default_rng(1)
    for n in (1, 7, 64, 65, 500, 3000):
        p = rng.random(n) * rng.random()
        sd = np.sqrt((p * (1 - p)).sum())
        for k in (1, int(p.sum()), int(p.sum() + 3 * sd) + 1):
            # scipy 1.17.1: scipy.stats.poisson_binom.sf(k - 1, p)
            assert poisson_binom.sf(k - 1, p) == pytest.approx(poisson_binomial_sf(p, k), rel=1e-9,
                                                               abs=1e-14)


def test_planted_mistakes_recall_and_precision():
    """Scattered planted mistakes: the check finds most of them, and far more precisely than
    taking every error as a suspect."""
    frame, planted = _depot(n=4000, seed=1, scattered=0.04)
    check = label_check_slices(_table(frame), PROBS)
    suspected = check.suspected
    recall = planted[suspected].sum() / planted.sum()
    precision = planted[suspected].mean()
    errors = (frame["digit"] != frame["read_as"]).to_numpy()
    baseline = planted[errors].mean()          # every model error as a suspect
    # measured: 141 planted, 109 suspected, recall 0.660, precision 0.853, baseline 0.162
    # (841 errors); the planted mistakes the check misses sit on rows with spread scores
    assert (141, 109) == (int(planted.sum()), int(suspected.size))
    assert (0.660, 0.853, 0.162) == pytest.approx((recall, precision, baseline), abs=5e-4)
    assert check.slices[0].extra["p_value"] < 1e-60


def test_keyed_pair_is_listed_and_the_union_folds_into_it(keyed_sevens):
    """Sevens keyed as 1 come out as one pair candidate, with the union folded into it."""
    frame, planted, found = keyed_sevens
    checks = found.table[found.table["source"] == LABEL_SOURCE]
    assert ["L1"] == checks["slice_id"].tolist()
    record = checks.iloc[0]
    assert "label check L1: digit = 1, scores confidently say 7" == record["description"]
    assert "label check: scores confidently disagree with digit" == record["folded"]
    rows = found.rows("L1")
    assert planted[rows].all()                 # every suspected 1 -> 7 row was planted
    assert 34 == rows.size                     # measured; the other 26 have spread scores
    summary = found.params["label_check"]
    assert {"L1": ("1", "7")} == {sid: (v["given"], v["suspected"]) for sid, v in summary["slices"].items()}
    assert ("per_class", PROBS) == (summary["kind"], summary["columns"])


def test_scattered_and_keyed_mistakes_list_the_union():
    """With mistakes scattered too, the pairs leave excess outside them, so the union is listed."""
    frame, planted = _depot(seed=0, keyed=60, scattered=0.03)
    found = sf.find_slices(frame, label="digit", prediction="read_as", scores=PROBS)
    checks = found.table[found.table["source"] == LABEL_SOURCE]
    assert ["label check L1: scores confidently disagree with digit"] == checks["description"].tolist()
    tested = found.tested.set_index("description")
    assert tested.at["digit = 1, scores confidently say 7", "passed"]
    assert "L1" == tested.at["digit = 1, scores confidently say 7", "explained_by"]


def test_score_columns_are_not_mined(keyed_sevens):
    """Score columns are skipped as 'scores column' and appear in no rule."""
    _, _, found = keyed_sevens
    assert {c: "scores column" for c in PROBS} == {c: found.skipped[c] for c in PROBS}
    rules = found.tested.loc[found.tested["source"] == "rule", "description"]
    assert not rules.str.contains(r"\bp\d\b").any()
    assert [] == found.params["exclude"]


def test_predicted_class_scores_suspect_a_subset():
    """With the predicted class's probability only, the thresholds are the upper bounds of the
    exact ones and every suspected row is one the per-class count suspects too."""
    frame, planted = _depot(n=4000, seed=1, scattered=0.04)
    probs = frame[PROBS].to_numpy()
    given, pred = frame["digit"].to_numpy(), frame["read_as"].to_numpy()
    q = probs[np.arange(len(frame)), pred]
    full = label_check_slices(_table(frame), PROBS)
    only = label_check_slices(_table(frame), q)
    assert "predicted" == only.kind
    for j in range(K):                       # the bound, from its definition, one row at a time
        rows = [r for r in range(len(frame)) if given[r] == j]
        bound = sum(q[r] if pred[r] == j else min(q[r], 1 - q[r]) for r in rows) / len(rows)
        assert bound == pytest.approx(only.thresholds.iat[j], abs=1e-12)
        assert only.thresholds.iat[j] >= full.thresholds.iat[j] - 1e-12
    assert set(only.suspected) <= set(full.suspected)
    # measured: 107 of the per-class count's 109, the same 93 planted ones (precision 0.869)
    assert (107, 93) == (only.suspected.size, int(planted[only.suspected].sum()))
    assert int(planted[full.suspected].sum()) == int(planted[only.suspected].sum())
    assert only.slices[0].extra["p_value"] < 1e-60


def test_null_scores_pass_at_chance_rate():
    """Calibrated scores and no mistakes: the union's test rejects at about its level, both kinds."""
    rejected = {"per_class": 0, "predicted": 0}
    for seed in range(60):
        frame, _ = _depot(n=1500, seed=100 + seed)
        probs = frame[PROBS].to_numpy()
        q = probs[np.arange(len(frame)), frame["read_as"].to_numpy()]
        for scores in (probs, q):
            check = label_check_slices(_table(frame), scores)
            p = check.slices[0].extra["p_value"] if check.slices else 1.0
            rejected[check.kind] += p < 0.05
    # Binomial(60, 0.05): mean 3, P(X >= 9) = 0.003 (scipy.stats.binom.sf(8, 60, 0.05));
    # 200 seeds of 2,000 rows measured 5.0% (per class) and 4.5% (predicted)
    assert rejected["per_class"] <= 8
    assert rejected["predicted"] <= 8


def test_null_scan_lists_no_label_check():
    """On calibrated scores without mistakes find_slices lists the planted rule and no label check."""
    for seed in range(4):
        frame, _ = _depot(n=2000, seed=200 + seed)
        found = sf.find_slices(frame, label="digit", prediction="read_as", scores=PROBS)
        assert LABEL_SOURCE not in set(found.table["source"])
        assert "scanner = S3 and shift = night" == found.table["description"].iat[0]


def test_queue_gives_the_label_check_its_own_stratum(keyed_sevens):
    """build_queue queues the label check beyond top, with every one of its error rows."""
    frame, _, found = keyed_sevens
    assert ["R1", "R2", "L1"] == found.table["slice_id"].tolist()
    errors_in = (frame["digit"] != frame["read_as"]).to_numpy()
    overlap = np.intersect1d(found.rows("L1"), found.rows("R2"))
    assert 13 == overlap.size                 # R2 (night, digit 1) ranks higher and holds 13 of L1
    for top in (0, 1, 2):                     # L1 ranks third: beyond top
        queue = sf.build_queue(found, budget=40, rest=10, top=top)
        strata = queue.strata.set_index("stratum")
        assert ["R1", "R2"][:top] + ["L1", "rest"] == queue.strata["stratum"].tolist()
        assert int(errors_in[found.rows("L1")].sum()) == strata.at["L1", "n_errors"]
        assert strata.at["L1", "n_queued"] >= 5
        assert int(errors_in.sum()) == int(strata["n_errors"].sum())
    with pytest.raises(SlicefindValueError, match="label-check candidates"):
        sf.build_queue(found, budget=12, rest=5, top=1)


def test_queue_without_label_check_is_unchanged():
    """A scan without scores queues exactly as before: strata in rank order, first candidate keeps a row."""
    frame, _ = _depot(seed=0, keyed=60)
    found = sf.find_slices(frame, label="digit", prediction="read_as", exclude=PROBS)
    queue = sf.build_queue(found, budget=40, rest=10)
    assert LABEL_SOURCE not in set(found.table["source"])
    assert list(found.table["slice_id"]) + ["rest"] == queue.strata["stratum"].tolist()


def test_workspace_round_trip(keyed_sevens, tmp_path):
    """A scan with the label check saves and loads, and the loaded scan queues the same rows."""
    _, _, found = keyed_sevens
    ws = Workspace(tmp_path / "ws")
    ws.save_scan(found)
    loaded = ws.load_found()
    pd.testing.assert_frame_equal(found.table, loaded.table)
    for sid in found.table["slice_id"]:
        assert found.rows(sid).tolist() == loaded.rows(sid).tolist()
    assert found.params["label_check"] == loaded.params["label_check"]
    assert PROBS == loaded.params["scores"]
    pd.testing.assert_frame_equal(sf.build_queue(found, budget=40, top=0).table,
                                  sf.build_queue(loaded, budget=40, top=0).table)


def test_mapping_with_text_classes():
    """A mapping class -> column works with text classes, in any order, and names them in descriptions."""
    frame, _ = _depot(n=1500, seed=3, keyed=40)
    names = ["zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine"]
    frame["digit"] = [names[d] for d in frame["digit"]]
    frame["read_as"] = [names[d] for d in frame["read_as"]]
    mapping = {names[j]: PROBS[j] for j in reversed(range(K))}
    check = label_check_slices(build_eval_table(frame, label="digit", prediction="read_as"), mapping,
                               min_rows=20)
    assert sorted(names) == list(check.classes)
    assert ["digit = one, scores confidently say seven"] == [sl.description for sl in check.slices[1:]]


def test_remainder_folds_only_when_the_pairs_explain_the_union():
    """nested_tests folds the union into its pair when the rest is within chance, and not otherwise."""
    for scattered, folds in ((0.0, {0: [1]}), (0.03, {})):
        frame, _ = _depot(seed=0, keyed=60, scattered=scattered)
        check = label_check_slices(_table(frame), PROBS, min_rows=20)
        assert [UNION_KEY, "label_check:1->7"] == [sl.key for sl in check.slices]
        passed = np.ones(2, dtype=bool)
        parent_p, worse, found_folds = nested_tests(check, passed, np.zeros(2, dtype=bool), 0.01)
        assert folds == found_folds
        assert (0.0, check.slices[1].extra["p_value"]) == tuple(parent_p)
        assert worse.all()


def test_warnings_for_odd_probabilities():
    """Rows not summing to 1, or a predicted class below 1/k, are warned about; the check still runs."""
    frame, _ = _depot(n=600, seed=5)
    probs = frame[PROBS].to_numpy() * 0.9
    with pytest.warns(UserWarning, match="do not sum to 1"):
        label_check_slices(_table(frame), probs)
    q = np.full(len(frame), 0.05)
    with pytest.warns(UserWarning, match="below 1/10"):
        label_check_slices(_table(frame), q)


def _bad_frame():
    frame, _ = _depot(n=400, seed=6, keyed=10)
    return frame


@pytest.mark.parametrize("change, scores, kwargs, error, words", [
    (None, "p_7", {}, SlicefindValueError, ["scores", "'p_7'", "Did you mean 'p7'"]),
    (("p3", 3, 1.2), PROBS, {}, SlicefindValueError, ["scores column 'p3'", "1.2", "row 3", "[0, 1]"]),
    (("p3", 3, -0.1), PROBS, {}, SlicefindValueError, ["scores column 'p3'", "-0.1", "[0, 1]"]),
    (("p3", 5, np.inf), PROBS, {}, SlicefindValueError, ["scores column 'p3'", "inf", "row 5"]),
    (("p3", 8, np.nan), PROBS, {}, SlicefindValueError, ["scores column 'p3'", "missing", "row 8"]),
    (("p3", 2, "high"), PROBS, {}, SlicefindTypeError, ["scores column 'p3'", "'high'", "row 2"]),
    (None, PROBS[:9], {}, SlicefindValueError, ["scores has 9 class columns", "10 classes", "0, 1, 2"]),
    (None, PROBS + ["p0"], {}, SlicefindValueError, ["scores", "'p0'", "more than once"]),
    (None, {j: PROBS[j] for j in range(9)}, {}, SlicefindValueError, ["scores maps 9 classes", "9"]),
    (None, {**{j: PROBS[j] for j in range(10)}, 11: "scanner"}, {}, SlicefindValueError, ["class 11"]),
    (None, np.full((400, 1), 0.5), {}, SlicefindValueError, ["scores has one column"]),
    (None, np.full(399, 0.9), {}, SlicefindValueError, ["scores has 399 rows", "400"]),
    (None, np.full((400, 10, 2), 0.1), {}, SlicefindValueError, ["scores", "(400, 10, 2)"]),
    (None, 0.9, {}, SlicefindTypeError, ["scores must be", "float"]),
    (None, PROBS, {"errors": "wrong", "label": None, "prediction": None}, SlicefindValueError,
     ["scores= needs label= and prediction=", "errors="]),
    (None, PROBS, {"true_class": 7}, SlicefindValueError, ["scores=", "true_class="]),
    (None, PROBS, {"client": object()}, SlicefindValueError, ["scores=", "Dask", "--engine dask"]),
])
def test_bad_scores_are_named_and_change_nothing(change, scores, kwargs, error, words):
    """Each bad scores= raises a message naming the argument and the value; the frame is untouched."""
    frame = _bad_frame()
    frame["wrong"] = frame["digit"] != frame["read_as"]
    if change is not None:
        column, row, value = change
        frame[column] = frame[column].astype(object)
        frame.loc[row, column] = value
    before = frame.copy()
    args = {"label": "digit", "prediction": "read_as", **kwargs}
    with pytest.raises(error) as caught:
        sf.find_slices(frame, scores=scores, **args)
    for word in words:
        assert word in str(caught.value)
    pd.testing.assert_frame_equal(before, frame)


def test_cli_scan_with_scores(tmp_path, capsys):
    """slicefind scan --scores writes the label check into the workspace; a bad column is one error line."""
    frame, _ = _depot(seed=0, keyed=60)
    data = tmp_path / "dev.csv"
    frame.to_csv(data, index=False)
    out = tmp_path / "ws"
    assert 0 == main(["scan", str(data), "--label", "digit", "--prediction", "read_as",
                      "--id-column", "parcel", "--scores", *PROBS, "--out", str(out)])
    slices = pd.read_csv(out / "slices.csv")
    assert "label check L1: digit = 1, scores confidently say 7" in slices["description"].tolist()
    printed = capsys.readouterr().out
    assert "p0 (scores column)" in printed
    assert 0 == main(["queue", str(out), "--budget", "30", "--top", "1"])
    assert "L1" in set(pd.read_csv(out / "queue.csv")["stratum"])
    capsys.readouterr()
    bad = tmp_path / "ws2"
    assert 1 == main(["scan", str(data), "--label", "digit", "--prediction", "read_as",
                      "--scores", "p0", "p1", "--out", str(bad)])
    err = capsys.readouterr().err.strip().splitlines()
    assert ["slicefind: error: scores has 2 class columns but label and prediction hold 10 classes "
            "(0, 1, 2, 3, 4, 5, 6, 7, 8, 9); give one column per class in that order, a mapping "
            "class -> column, or one column with the probability of the predicted class."] == err
    assert not os.path.exists(bad)


def test_cli_single_column_is_the_predicted_class(tmp_path, capsys):
    """One --scores column is the predicted class's probability."""
    frame, _ = _depot(seed=0, keyed=60)
    frame["p_read"] = frame[PROBS].to_numpy()[np.arange(len(frame)), frame["read_as"].to_numpy()]
    data = tmp_path / "dev.csv"
    frame.drop(columns=PROBS).to_csv(data, index=False)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert 0 == main(["scan", str(data), "--label", "digit", "--prediction", "read_as",
                          "--scores", "p_read", "--out", str(tmp_path / "ws")])
    found = Workspace(tmp_path / "ws").load_found()
    assert ("predicted", ["p_read"]) == (found.params["label_check"]["kind"],
                                         found.params["label_check"]["columns"])
    assert LABEL_SOURCE in set(found.table["source"])


def test_tally_names_the_label_check_after_the_reserved_tag(keyed_sevens):
    """A label-check stratum is named (wrong label) unless named otherwise; its precision counts that tag."""
    from slicefind.review.tally import WRONG_LABEL, tally
    found = keyed_sevens[2]
    queue = sf.build_queue(found, budget=40, rest=10)
    check = [s for s, src in zip(queue.strata["stratum"], queue.strata["source"]) if src == "label_check"]
    assert check
    rows = queue.rows(check[0])
    tags = [WRONG_LABEL] * (len(rows) - 1) + ["faded ink"]
    sheet = pd.DataFrame({"row": rows, "reviewed": "yes", "tags": tags})
    line = tally(queue, sheet).slices.set_index("slice_id").loc[check[0]]
    assert (WRONG_LABEL, "source", len(rows) - 1, len(rows)) == (
        line["name"], line["name_source"], line["n_named"], line["n_reviewed"])
    named = tally(queue, sheet, names={check[0]: "faded ink"}).slices.set_index("slice_id").loc[check[0]]
    assert ("faded ink", "names", 1) == (named["name"], named["name_source"], named["n_named"])
