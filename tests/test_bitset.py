"""Tests for slicefind.discovery.bitset: packing and the counting kernels."""
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from slicefind.discovery import bitset


@given(st.integers(1, 300), st.integers(0, 2**32 - 1))
def test_pack_popcount_matches_numpy(n, seed):
    """A packed mask's popcount equals numpy's count of True, and unpack inverts pack."""
    rng = np.random.default_rng(seed)
    masks = rng.random((3, n)) < 0.3
    bits = bitset.pack(masks)
    assert masks.sum(axis=1).tolist() == bitset.popcount(bits).tolist()
    assert np.array_equal(masks, bitset.unpack(bits, n))


@given(st.integers(1, 300), st.integers(0, 2**32 - 1))
def test_packed_and_popcount_matches_numpy(n, seed):
    """popcount(a & b) on packed words equals numpy's count of the boolean AND."""
    rng = np.random.default_rng(seed)
    a, b = rng.random(n) < 0.5, rng.random(n) < 0.5
    assert int((a & b).sum()) == int(bitset.popcount(bitset.pack(a) & bitset.pack(b))[0])


def test_to_rows_gives_sorted_positions():
    """to_rows returns the positions of the set bits, in order."""
    mask = np.zeros(130, dtype=bool)
    mask[[0, 63, 64, 129]] = True
    assert [0, 63, 64, 129] == bitset.to_rows(bitset.pack(mask), 130).tolist()


@pytest.mark.parametrize("engine", ["numpy", "numba"])
def test_count_extensions_matches_brute_force(engine):
    """Both kernels count AND(prefix) & extension exactly as numpy booleans do."""
    rng = np.random.default_rng(7)
    n, m = 5000, 9
    masks = rng.random((m, n)) < 0.4
    bits = bitset.pack(masks)
    prefixes = np.array([[0, 1], [2, 3], [4, 5]])
    offsets = np.array([0, 3, 3, 5])          # the second prefix has no extensions
    extensions = np.array([2, 6, 8, 7, 0])
    counts = bitset.count_extensions(bits, prefixes, offsets, extensions, engine=engine)
    expected = [int((masks[0] & masks[1] & masks[e]).sum()) for e in (2, 6, 8)]
    expected += [int((masks[4] & masks[5] & masks[e]).sum()) for e in (7, 0)]
    assert expected == counts.tolist()


def test_count_extensions_single_item_prefix_both_engines_agree():
    """With one-item prefixes (level 2) the numba and numpy kernels agree on a large table."""
    rng = np.random.default_rng(3)
    masks = rng.random((6, 200_003)) < 0.3
    bits = bitset.pack(masks)
    prefixes = np.arange(6)[:, None]
    offsets = np.array([0, 5, 9, 12, 14, 15, 15])
    extensions = np.array([1, 2, 3, 4, 5, 2, 3, 4, 5, 3, 4, 5, 4, 5, 5])
    a = bitset.count_extensions(bits, prefixes, offsets, extensions, engine="numpy")
    b = bitset.count_extensions(bits, prefixes, offsets, extensions, engine="numba")
    assert a.tolist() == b.tolist()
    assert int((masks[0] & masks[1]).sum()) == int(a[0])
