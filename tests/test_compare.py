"""Before and after: McNemar's exact test, per-slice and per-category comparisons, new slices."""
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from slicefind.stats import mcnemar_exact
from slicefind.table import SlicefindTypeError, SlicefindValueError

# --- McNemar's exact test: external checks ---------------------------------------------------

# REFERENCES.md §7, tables [[a, b], [c, d]]: b = right before & wrong after, c = the reverse.
MCNEMAR_CASES = [
    # Fagerland, Lydersen & Laake (2013) BMC Med Res Methodol 13:91, Bentur et al.'s 21 children
    # (AHR before/after transplant): exact two-sided 18/256 = 0.0703125 (M+T)
    ([[1, 1], [7, 12]], 18 / 256),
    # Agresti, An Introduction to Categorical Data Analysis (paired proportions), PM approval,
    # 1600 people surveyed twice: exact two-sided 3.71594e-5 (REFERENCES §7, computed)
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
