"""Tests for slicefind.discovery.describe: enriched items, confusions, terms, exemplars, summaries."""
import math

import numpy as np
import pandas as pd
import pytest

import slicefind as sf
from slicefind.discovery.describe import (confusions, describe_rows, describe_slice,
                                          distinctive_terms, enriched_items, exemplars,
                                          label_shares)
from slicefind.discovery.items import build_items
from slicefind.discovery.table import build_eval_table

SLICE = np.arange(20)


@pytest.fixture(scope="module")
def hand():
    """100 rows worked by hand: the slice is rows 0-19, all label 4; 16 of them site B."""
    site = np.array(["A"] * 100, dtype=object)
    site[0:16] = "B"
    site[70:84] = "B"                         # 30 rows of site B in all
    label = np.where(np.arange(100) % 2 == 0, 1, 2)
    label[:20] = 4
    pred = label.copy()
    pred[0:8] = 9                             # 8 errors 4 -> 9
    pred[8:10] = 7                            # 2 errors 4 -> 7
    pred[20:25] = 3                           # 5 errors elsewhere
    frame = pd.DataFrame({"site": site, "label": label, "pred": pred})
    table = build_eval_table(frame, label="label", prediction="pred")
    items = build_items(table, min_rows=10, min_errors=1)
    return table, items


def test_enriched_items_hand_counts(hand):
    """site = B holds 16 of the slice's 20 rows against 30 of 100 overall: lift 8/3."""
    table, items = hand
    got = enriched_items(table, SLICE, items=items)
    assert ["site = B"] == got["item"].tolist()              # site = A is under-represented
    assert (16, 0.8, 0.3) == (got.at[0, "n_rows"], got.at[0, "slice_share"], got.at[0, "overall_share"])
    assert pytest.approx(8 / 3) == got.at[0, "lift"]


def test_confusions_and_labels_hand_counts(hand):
    """The slice's 10 errors are 8 of 4 -> 9 and 2 of 4 -> 7; all its rows are label 4."""
    table, _ = hand
    conf = confusions(table, SLICE)
    assert [(4, 9, 8, 0.8), (4, 7, 2, 0.2)] == list(conf.itertuples(index=False, name=None))
    labels = label_shares(table, SLICE)
    assert [(4, 20, 1.0, 0.2)] == list(labels.itertuples(index=False, name=None))


def test_describe_rows_summary(hand):
    """The one-line summary names the enriched item, the label, the confusion and the size."""
    table, items = hand
    assert "80% site = B, 100% label = 4, mostly 4 -> 9; 20 rows, 50% errors" == describe_rows(
        table, SLICE, items=items)


def test_describe_rows_without_a_pattern(hand):
    """Rows that share no metadata value say so, then give their label and size."""
    table, items = hand
    rows = np.arange(20, 100, 4)              # labels 1 only (even rows); site mostly A
    text = describe_rows(table, rows, items=items)
    # all even rows hold label 1 (40% of the table); their 2 errors are too few for a confusion
    assert "no metadata value stands out, 100% label = 1; 20 rows, 10% errors" == text


def test_descriptions_use_the_users_column_names(hand):
    """The label is named by its column ('true_digit = 4'), also when that column is mined."""
    table, _ = hand
    frame = table.data.rename(columns={"label": "true_digit"})
    renamed = build_eval_table(frame, label="true_digit", prediction="pred", mine_label=True)
    items = build_items(renamed, min_rows=10, min_errors=1)
    assert "true_digit" in {item.column for item in items.items}
    assert "80% site = B, 100% true_digit = 4, mostly 4 -> 9; 20 rows, 50% errors" == describe_rows(
        renamed, SLICE, items=items)


def test_distinctive_terms_class_tfidf_by_hand():
    """c-TF-IDF weight of 'torn' is tf 2/4 times log(1 + 4.5/2); single-use terms are dropped."""
    # hand computation (Grootendorst 2022, eq. in section 3.3): A = (4 + 5) / 2 words per class
    texts = ["torn label", "torn corner", "clean label", "clean print", "clean"]
    got = distinctive_terms(texts, np.array([0, 1]))
    assert ["torn"] == got["term"].tolist()
    assert pytest.approx(0.5 * math.log(1 + 4.5 / 2), abs=1e-12) == got.at[0, "weight"]
    assert (2, 0) == (got.at[0, "n_slice"], got.at[0, "n_rest"])


def test_distinctive_terms_skip_terms_common_elsewhere():
    """A term the slice uses no more often than the rest does is not distinctive."""
    texts = ["late label", "late label"] + ["late label"] * 6
    assert [] == distinctive_terms(texts, np.array([0, 1]))["term"].tolist()


def test_exemplars_start_at_the_medoid(hand):
    """The medoid of points 0, 1, 2, 3, 10 is 2; its nearest neighbour comes next, then random."""
    table, _ = hand
    coords = np.zeros((100, 1))
    coords[:5, 0] = [0, 1, 2, 3, 10]
    got = exemplars(table, np.arange(5), coords=coords, n_exemplars=3, random_state=0)
    assert ["medoid", "near_medoid", "random"] == got["kind"].tolist()
    assert [2, 1] == got["row"].tolist()[:2]          # tie 1 vs 3 broken by position
    assert got.at[2, "row"] in (0, 3, 4)
    assert [0.0, 1.0] == got["distance"].tolist()[:2]
    again = exemplars(table, np.arange(5), coords=coords, n_exemplars=3, random_state=0)
    pd.testing.assert_frame_equal(got, again)


def test_exemplars_without_coordinates_are_random(hand):
    """Without coordinates every exemplar is a random member."""
    table, _ = hand
    got = exemplars(table, SLICE, n_exemplars=4, random_state=1)
    assert ["random"] * 4 == got["kind"].tolist()
    assert set(got["row"]) <= set(SLICE.tolist())
    assert got["distance"].isna().all()


@pytest.fixture(scope="module")
def found_rules():
    rng = np.random.default_rng(0)
    n = 3000
    frame = pd.DataFrame({"scanner": rng.choice(["S1", "S2", "S3"], n),
                          "shift": rng.choice(["day", "night"], n),
                          "note": rng.choice(["fine", "ok", "good"], n)})
    hot = ((frame["scanner"] == "S3") & (frame["shift"] == "night")).to_numpy()
    frame.loc[hot, "note"] = rng.choice(["smudged ink", "ink smudged badly"], int(hot.sum()))
    wrong = rng.random(n) < np.where(hot, 0.4, 0.05)
    return sf.find_slices(frame, errors=wrong, exclude=["note"]), hot


def test_describe_slice_of_a_rule(found_rules):
    """A rule's description leaves out its own items and lists the text column's terms."""
    found, hot = found_rules
    got = describe_slice(found, "R1", text_column="note", n_exemplars=5)
    assert "R1" == got.slice_id and "rule" == got.source
    assert np.flatnonzero(hot).size == got.n_rows
    assert got.summary.startswith("scanner = S3 and shift = night: ")
    assert not {"scanner = S3", "shift = night"} & set(got.items["item"])
    assert {"smudged", "ink"} <= set(got.terms["term"].head(3))
    assert 5 == len(got.exemplars) and got.confusions.empty      # errors= gives no labels
    assert repr(got).startswith("SliceDescription('R1', n_rows=")


@pytest.mark.parametrize("kwargs, error, match", [
    ({"slice_id": "R99"}, ValueError, "R99"),
    ({"slice_id": 1}, TypeError, "slice_id"),
    ({"slice_id": "R1", "text_column": "notes"}, ValueError, "Did you mean 'note'"),
    ({"slice_id": "R1", "n_exemplars": -1}, ValueError, "n_exemplars"),
    ({"slice_id": "R1", "top": 0}, ValueError, "top"),
])
def test_describe_slice_bad_arguments(found_rules, kwargs, error, match):
    """Each bad argument of describe_slice fails with a message that names it."""
    found, _ = found_rules
    with pytest.raises(error, match=match):
        describe_slice(found, **kwargs)


def test_describe_slice_of_a_cluster_uses_its_medoid():
    """A cluster's exemplars start at its medoid in the clusters' reduced space."""
    from sklearn.datasets import make_blobs

    x, truth = make_blobs(n_samples=[200, 200, 200], n_features=8, random_state=3)
    rng = np.random.default_rng(3)
    frame = pd.DataFrame({"site": rng.choice(["A", "B"], 600)})
    wrong = rng.random(600) < np.where(truth == 1, 0.5, 0.05)
    found = sf.find_slices(frame, errors=wrong, embeddings=x, clusters="regions", random_state=0)
    cluster_ids = found.table.loc[found.table["source"] != "rule", "slice_id"].tolist()
    assert cluster_ids
    got = describe_slice(found, cluster_ids[0], n_exemplars=4)
    assert ["medoid", "near_medoid", "random", "random"] == got.exemplars["kind"].tolist()
    assert 0.0 == got.exemplars.at[0, "distance"]
    assert cluster_ids[0] not in got.summary
