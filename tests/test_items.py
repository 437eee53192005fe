"""Tests for slicefind.discovery.items: categorical, rare, missing, numeric and datetime items."""
import numpy as np
import pandas as pd
import pytest
from hypothesis import given
from hypothesis import strategies as st

from slicefind.discovery.items import build_items, readable_cut
from slicefind.discovery.table import build_eval_table


def _texts(frame, errors, **kw):
    table = build_eval_table(frame, errors=errors)
    items = build_items(table, min_rows=kw.pop("min_rows", 5), **kw)
    return [item.text for item in items.items], items


def test_categorical_values_rare_group_and_missing():
    """Common values are items, rare values share one item, missing is its own item."""
    scanner = ["S1"] * 40 + ["S2"] * 30 + ["S7"] * 2 + ["S8"] * 2 + ["S9"] * 2 + [None] * 6
    frame = pd.DataFrame({"scanner": scanner})
    errors = np.arange(len(scanner)) % 3 == 0
    texts, items = _texts(frame, errors, min_rows=5)
    assert ["scanner = S1", "scanner = S2", "scanner in {S7, S8, S9}", "scanner is missing"] == texts
    assert [40, 30, 6, 6] == items.n_rows.tolist()


@given(st.floats(-1e6, 1e6, allow_nan=False), st.floats(1e-6, 1e3))
def test_readable_cut_keeps_the_split(low, gap):
    """The readable cut lies in (low, high], so x >= cut splits exactly as x >= high does."""
    high = low + gap
    if not low < high:
        return
    cut = readable_cut(low, high)
    assert low < cut <= high


def test_tree_cut_lands_where_error_rate_changes():
    """A planted jump in error rate at belt_speed = 2.1 produces the item 'belt_speed >= 2.1'."""
    rng = np.random.default_rng(0)
    speed = np.round(rng.uniform(0.5, 3.0, 4000), 3)
    errors = rng.random(4000) < np.where(speed >= 2.1, 0.35, 0.04)
    texts, _ = _texts(pd.DataFrame({"belt_speed": speed}), errors, min_rows=20)
    assert "belt_speed >= 2.1" in texts
    assert "belt_speed < 2.1" in texts


def test_numeric_items_counts_and_missing():
    """Threshold items count the rows on each side; NaN rows form a 'missing' item."""
    x = np.array([float(i) for i in range(100)] + [np.nan] * 10)
    errors = np.zeros(110, dtype=bool)
    errors[::4] = True
    texts, items = _texts(pd.DataFrame({"x": x}), errors, min_rows=5, tree_depth=0, n_bins=4)
    counts = dict(zip(texts, items.n_rows.tolist()))
    # quartile cuts of 0..99 fall between 24/25, 49/50, 74/75 and read as 25, 50, 75
    assert 25 == counts["x < 25"] and 75 == counts["x >= 25"]
    assert 25 == counts["50 <= x < 75"]
    assert 10 == counts["x is missing"]


def test_datetime_hour_and_weekday_items():
    """A datetime column gives hour-of-day and weekday items."""
    stamps = pd.date_range("2026-03-02 00:00", periods=24 * 14, freq="h")   # 2 weeks, Monday start
    errors = np.asarray(stamps.hour == 3)
    texts, items = _texts(pd.DataFrame({"scanned_at": stamps}), errors, min_rows=5)
    counts = dict(zip(texts, items.n_rows.tolist()))
    assert 14 == counts["hour of scanned_at = 3"]
    assert 48 == counts["weekday of scanned_at = Mon"]


def test_items_with_too_few_errors_are_dropped():
    """An item with fewer than min_errors errors is not kept."""
    frame = pd.DataFrame({"site": ["a"] * 50 + ["b"] * 50})
    errors = np.array([True] * 2 + [False] * 48 + [True] * 10 + [False] * 40)
    texts, _ = _texts(frame, errors, min_rows=5, min_errors=3)
    assert ["site = b"] == texts


def test_bool_items_both_values():
    """A bool column gives an item for True and one for False."""
    frame = pd.DataFrame({"fragile": [True, False] * 30})
    texts, _ = _texts(frame, np.arange(60) % 5 == 0)
    assert ["fragile = False", "fragile = True"] == texts


def test_threshold_inside_one_category_is_found():
    """A speed threshold that matters on one scanner only comes out inside that scanner's rows."""
    rng = np.random.default_rng(4)
    n = 6000
    scanner = rng.choice(["S1", "S2", "S3", "S4", "S5", "S6"], n)
    speed = np.round(rng.uniform(0.8, 2.6, n), 2)
    bad = (scanner == "S3") & (speed >= 2.2)
    errors = rng.random(n) < np.where(bad, 0.6, 0.08)
    frame = pd.DataFrame({"scanner": scanner, "belt_speed": speed})
    texts, _ = _texts(frame, errors, min_rows=30)
    cuts = [float(t.split(">= ")[1]) for t in texts if t.startswith("belt_speed >= ")]
    assert min(abs(c - 2.2) for c in cuts) <= 0.02
