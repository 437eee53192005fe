"""Tests for slicefind.demodata: the parcel-depot demo dev set and the stamped set."""
import warnings

import numpy as np
import pandas as pd
import pytest

import slicefind as sf
from slicefind.demodata import DEPOTS, LABEL_STOCKS, SCANNERS, make_depot, make_stamped
from slicefind.discovery.records import jaccard

N = 3000


@pytest.fixture(scope="module")
def depot():
    return make_depot(N, random_state=0)


def test_frame_columns_and_kinds(depot):
    """The frame has the scenario's columns, one row per image and embedding."""
    frame = depot.frame
    assert ["parcel_id", "scanner", "belt_speed", "label_stock", "shift", "depot", "scanned_at",
            "label", "pred"] == list(frame.columns)
    assert (N, N, N) == (len(frame), depot.images.shape[0], depot.embeddings.shape[0])
    assert (8, 8) == depot.images.shape[1:]
    assert set(frame["scanner"]) <= set(SCANNERS) and set(frame["label_stock"]) <= set(LABEL_STOCKS)
    assert set(frame["depot"]) <= set(DEPOTS)
    assert pd.api.types.is_datetime64_any_dtype(frame["scanned_at"])
    assert pd.api.types.is_float_dtype(frame["belt_speed"])
    assert frame["parcel_id"].is_unique
    assert set(frame["label"]) == set(range(10))


def test_no_two_images_are_identical(depot):
    """Augmentation leaves no exact duplicate image (near-copies split UMAP's graph)."""
    flat = depot.images.reshape(N, -1)
    assert N == len(np.unique(flat, axis=0))
    assert N == len(np.unique(depot.embeddings, axis=0))


def test_planted_rows_match_their_columns(depot):
    """Recorded degradations are exactly the rows their columns select; one is in no column."""
    frame = depot.frame
    faded = np.flatnonzero(((frame["label_stock"] == "thermal") & (frame["depot"] == "harbour")).to_numpy())
    smear = np.flatnonzero(((frame["scanner"] == "S3") & (frame["belt_speed"] >= 2.2)).to_numpy())
    assert faded.tolist() == depot.planted["faded thermal print"].rows.tolist()
    assert smear.tolist() == depot.planted["ink smear"].rows.tolist()
    assert ["packing tape"] == [k for k, p in depot.planted.items() if not p.recorded]
    for p in depot.planted.values():
        assert np.all(np.diff(p.rows) > 0) and p.rows.dtype == np.intp
        assert 0.02 * N < p.rows.size < 0.12 * N


def test_degradations_raise_the_error_rate(depot):
    """Each planted degradation errs at least three times as often as the untouched rows."""
    wrong = (depot.frame["label"] != depot.frame["pred"]).to_numpy()
    touched = np.zeros(N, dtype=bool)
    for p in depot.planted.values():
        touched[p.rows] = True
    clean = wrong[~touched].mean()
    assert 0.01 < clean < 0.10
    for name, p in depot.planted.items():
        assert wrong[p.rows].mean() >= 3 * clean, name


def test_same_seed_same_depot(depot):
    """The same random_state rebuilds the same frame, images and embeddings; another differs."""
    again = make_depot(N, random_state=0)
    pd.testing.assert_frame_equal(depot.frame, again.frame)
    assert np.array_equal(depot.images, again.images)
    assert np.array_equal(depot.embeddings, again.embeddings)
    other = make_depot(N, random_state=1)
    assert not np.array_equal(depot.embeddings, other.embeddings)


@pytest.mark.parametrize("n_rows", [99, 2.5, True, "600"])
def test_bad_n_rows(n_rows):
    """n_rows must be an integer of at least 100; the message names it."""
    with pytest.raises(ValueError, match="n_rows"):
        make_depot(n_rows)


@pytest.mark.parametrize("share", [-0.1, 0.6, "0.1", None])
def test_bad_tape_share(share):
    """tape_share must be a number in [0, 0.5]; the message names it."""
    with pytest.raises(ValueError, match="tape_share"):
        make_depot(200, tape_share=share)


def test_tape_share_sets_the_unrecorded_slice():
    """tape_share sets the share of parcels in the unrecorded slice."""
    small = make_depot(2000, tape_share=0.015, random_state=0).planted["packing tape"].rows.size
    assert 15 <= small <= 45                     # 30 expected, binomial spread


def test_all_three_degradations_top_the_table_with_scarce_tape():
    """With tape on 1.5% of parcels, find_slices lists all three degradations in its top 5."""
    # a regression guard: a wider threshold variant ('scanner = S3 and belt_speed >= 1.23')
    # once hid the smear rule ('... >= 2.18') as its alias
    depot = make_depot(6000, tape_share=0.015, random_state=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        found = sf.find_slices(depot.frame, label="label", prediction="pred", exclude=("parcel_id",),
                               embeddings=depot.embeddings, random_state=0)
    top = [found.rows(s) for s in found.table["slice_id"].head(5)]
    for name, planted in depot.planted.items():
        assert max(jaccard(rows, planted.rows) for rows in top) >= 0.9, name


def test_stamped_set_is_one_unrecorded_cross_class_degradation():
    """make_stamped: the stamp is on about 12% of rows, across every digit, and raises the error rate."""
    data = make_stamped(random_state=0)
    stamped = data.planted["customs stamp"].rows
    frame = data.frame
    wrong = (frame["true_digit"] != frame["read_as"]).to_numpy()
    assert 0.10 <= stamped.size / len(frame) <= 0.14
    assert 10 == frame["true_digit"].iloc[stamped].nunique()
    assert wrong[stamped].mean() > 5 * wrong[np.setdiff1d(np.arange(len(frame)), stamped)].mean()
    assert (len(frame), 10) == data.embeddings.shape
