"""Tests for slicefind.stats: Wilson intervals, one-sided Fisher, Benjamini–Hochberg, scoring."""
import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from slicefind.stats import bh_qvalues, fisher_greater, score_slices, wilson_interval


@given(st.integers(1, 5_000).flatmap(lambda n: st.tuples(st.integers(0, n), st.just(n))))
def test_wilson_contains_estimate(k_n):
    """The Wilson interval lies in [0, 1] and contains k/n."""
    k, n = k_n
    low, high = wilson_interval(k, n)
    assert 0.0 <= low <= k / n <= high <= 1.0


@pytest.mark.parametrize("k, n, low, high", [
    # Newcombe (1998) Stat Med 17:857, Table I, method 3 (recalled, not re-read; statsmodels
    # proportion_confint(method="wilson") reproduces each row, REFERENCES.md §1, tag M+T)
    (81, 263, 0.2553, 0.3662),
    (15, 148, 0.0624, 0.1605),
    (0, 20, 0.0000, 0.1611),
    (1, 29, 0.0061, 0.1718),
])
def test_wilson_matches_newcombe_table(k, n, low, high):
    """Bounds match Newcombe's Table I (method 3, Wilson without continuity correction)."""
    from statsmodels.stats.proportion import proportion_confint
    got = wilson_interval(k, n)
    assert (low, high) == pytest.approx(got, abs=5e-5)
    # the recalled row is also what statsmodels 0.15 computes
    assert (low, high) == pytest.approx(proportion_confint(k, n, alpha=0.05, method="wilson"), abs=5e-5)


def test_wilson_matches_statsmodels_and_scipy_vectorised():
    """Vectorised bounds equal statsmodels proportion_confint(method='wilson') and scipy binomtest."""
    from scipy.stats import binomtest
    from statsmodels.stats.proportion import proportion_confint
    k = np.array([0, 3, 50, 81, 100])
    n = np.array([100, 15, 100, 263, 100])
    low, high = wilson_interval(k, n)
    sm_low, sm_high = proportion_confint(k, n, alpha=0.05, method="wilson")  # statsmodels 0.15
    assert np.allclose(low, sm_low, atol=1e-12) and np.allclose(high, sm_high, atol=1e-12)
    ci = binomtest(3, 15).proportion_ci(0.95, method="wilson")              # scipy 1.17
    assert (ci.low, ci.high) == pytest.approx((low[1], high[1]), abs=1e-12)


def test_wilson_exact_ends():
    """k = 0 gives a lower bound of exactly 0 and k = n an upper bound of exactly 1."""
    assert 0.0 == wilson_interval(0, 7)[0]
    assert 1.0 == wilson_interval(7, 7)[1]
    # REFERENCES.md §1 extra case (statsmodels): 100/100 -> 0.963007–1
    assert 0.963007 == pytest.approx(wilson_interval(100, 100)[0], abs=5e-7)


def test_wilson_confidence_level_changes_width():
    """A 99% interval is wider than a 95% one and contains it."""
    low95, high95 = wilson_interval(20, 80)
    low99, high99 = wilson_interval(20, 80, confidence_level=0.99)
    assert low99 < low95 and high95 < high99


def test_fisher_tea_tasting():
    """Fisher's tea table: 3 of 4 slice rows wrong vs 1 of 4 elsewhere gives p = 17/70."""
    from scipy.stats import fisher_exact
    # Fisher (1935), The Design of Experiments, ch. II: 17/70 and 1/70 (recalled, not re-read;
    # scipy fisher_exact(alternative="greater") reproduces both, REFERENCES.md §2, tag M)
    assert float(Fraction(17, 70)) == pytest.approx(fisher_greater(3, 4, 4, 8), abs=1e-12)
    assert float(Fraction(1, 70)) == pytest.approx(fisher_greater(4, 4, 4, 8), abs=1e-12)
    assert float(Fraction(17, 70)) == pytest.approx(
        fisher_exact([[3, 1], [1, 3]], alternative="greater").pvalue, abs=1e-12)     # scipy 1.17
    assert float(Fraction(1, 70)) == pytest.approx(
        fisher_exact([[4, 0], [0, 4]], alternative="greater").pvalue, abs=1e-12)


def test_fisher_vectorised_matches_scipy_fisher_exact():
    """The vectorised tail equals scipy.stats.fisher_exact(alternative='greater') per table."""
    from scipy.stats import fisher_exact
    tables = [((3, 1), (1, 3)),     # Fisher's tea tasting (recalled; see test_fisher_tea_tasting)
              # Fisher (1935) JRSS 98:39, Lange's criminal twins: monozygotic 10 convicted / 3 not,
              # dizygotic 2 / 15 (counts recalled, not re-read; REFERENCES.md §2, tag M)
              ((10, 3), (2, 15)),
              ((20, 30), (80, 870)), ((6, 4), (9, 81)), ((0, 10), (15, 75))]   # constructed (tag C)
    a = np.array([t[0][0] for t in tables])
    n = np.array([t[0][0] + t[0][1] for t in tables])
    k = np.array([t[0][0] + t[1][0] for t in tables])
    total = np.array([sum(map(sum, t)) for t in tables])
    got = fisher_greater(a, n, k, total)
    expected = [fisher_exact(t, alternative="greater").pvalue for t in tables]  # scipy 1.17
    assert np.allclose(expected, got, rtol=1e-9, atol=0)
    # REFERENCES.md §2: twins 619/1330665, the exact tail of the recalled counts (reproduced by
    # scipy fisher_exact above and summed exactly here); [[6,4],[9,81]] 0.000623503 and
    # [[20,30],[80,870]] 6.380389e-9 computed with scipy (tag C)
    assert 619 / 1330665 == pytest.approx(got[1], rel=1e-9)
    twins = sum(Fraction(math.comb(12, x) * math.comb(18, 13 - x), math.comb(30, 13)) for x in range(10, 13))
    assert Fraction(619, 1330665) == twins         # hypergeometric tail in exact rationals, no library
    assert 0.000623503 == pytest.approx(got[3], rel=1e-6)
    assert 6.380389e-9 == pytest.approx(got[2], rel=1e-6)
    assert 1.0 == got[4]


# Benjamini & Hochberg (1995) JRSS-B 57:289, §4: the 15 sorted p-values of their example (recalled,
# not re-read; the same values appear in many test suites; REFERENCES.md §3, tag M+T)
BH_P = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
        0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]


def test_bh_paper_example():
    """Benjamini & Hochberg (1995) §4: 15 p-values, 4 rejected at q = 0.05."""
    from statsmodels.stats.multitest import multipletests
    q = bh_qvalues(BH_P)
    # Benjamini & Hochberg (1995) JRSS-B 57:289, §4 example: 4 rejected at 0.05, Bonferroni 3
    # (recalled, not re-read; statsmodels multipletests(method="fdr_bh") reproduces it,
    # REFERENCES.md §3, tag M+T)
    assert 4 == int((q <= 0.05).sum())
    assert 4 == int(multipletests(BH_P, alpha=0.05, method="fdr_bh")[0].sum())   # statsmodels 0.15
    assert 3 == int((np.array(BH_P) <= 0.05 / 15).sum())                         # Bonferroni
    expected = [0.0015, 0.0030, 0.0095, 0.035625, 0.0603, 0.063857, 0.063857, 0.0645, 0.0765,
                0.486, 0.581182, 0.714875, 0.753231, 0.813214, 1.0]   # REFERENCES.md §3 (C)
    assert expected == pytest.approx(q.tolist(), abs=5e-7)
    assert 3 == int((q <= 0.01).sum()) and 9 == int((q <= 0.10).sum())


def test_bh_matches_statsmodels_on_random_p():
    """q-values equal statsmodels multipletests(method='fdr_bh') on shuffled p-values."""
    from statsmodels.stats.multitest import multipletests
    rng = np.random.default_rng(1)
    p = np.concatenate([rng.random(200), rng.random(20) * 1e-4])
    rng.shuffle(p)
    assert np.allclose(multipletests(p, alpha=0.05, method="fdr_bh")[1], bh_qvalues(p), atol=1e-15)


def test_bh_ties_and_order():
    """Ties share a q-value and the input order is kept (REFERENCES.md §3 extra cases)."""
    assert [0.05] * 4 + [0.9] == pytest.approx(bh_qvalues([0.01, 0.04, 0.04, 0.04, 0.9]).tolist(), abs=1e-12)
    assert [0.053333, 0.004, 0.053333, 0.2] == pytest.approx(bh_qvalues([0.04, 0.001, 0.03, 0.2]).tolist(), abs=5e-7)


@given(st.lists(st.floats(0, 1), min_size=1, max_size=60))
def test_bh_qvalues_monotone_and_at_least_p(p):
    """q-values are >= p, <= 1, and never fall as p grows."""
    p = np.array(p)
    q = bh_qvalues(p)
    assert np.all(q >= p - 1e-15) and np.all(q <= 1.0)
    order = np.argsort(p, kind="stable")
    assert np.all(np.diff(q[order]) >= -1e-15)


def test_score_slices_columns():
    """Lift, excess errors and share follow their definitions in DESIGN.md."""
    s = score_slices([10, 50], [6, 20], 1000, 100)
    assert [0.6, 0.4] == pytest.approx(s["error_rate"].tolist())
    assert [6.0, 4.0] == pytest.approx(s["lift"].tolist())
    assert [5.0, 15.0] == pytest.approx(s["excess_errors"].tolist())
    assert [0.06, 0.2] == pytest.approx(s["error_share"].tolist())
    assert 6.380389e-9 == pytest.approx(s["p_value"][1], rel=1e-6)   # REFERENCES.md §2


@given(st.integers(1, 400).flatmap(lambda N: st.tuples(
    st.just(N), st.integers(0, N), st.integers(0, N), st.integers(-2, N + 2))))
def test_fisher_tail_matches_scipy_hypergeom(args):
    """The summed hypergeometric tail equals scipy.stats.hypergeom.sf(a - 1, N, K, n)."""
    from scipy.stats import hypergeom
    N, K, n, a = args
    expected = float(hypergeom.sf(a - 1, N, K, n))                  # scipy 1.17
    assert expected == pytest.approx(fisher_greater(a, n, K, N), rel=1e-9, abs=1e-15)


def test_fisher_tail_large_table_matches_scipy_and_exact_sum():
    """On million-row slices the tail agrees with exact rational arithmetic and scipy to 5e-9."""
    from math import comb

    from scipy.stats import hypergeom
    n = np.array([5_000, 52_421, 400_000, 15_645])
    k = np.array([420, 4_151, 30_100, 4_702])
    got = fisher_greater(k, n, 75_000, 1_000_000)
    expected = hypergeom.sf(k - 1, 1_000_000, 75_000, n)            # scipy 1.17
    assert np.allclose(expected, got, rtol=5e-9, atol=1e-300)
    # the first tail summed exactly with Python integers (hand formula, no library)
    exact = Fraction(sum(comb(75_000, x) * comb(925_000, 5_000 - x) for x in range(420, 5_001)),
                     comb(1_000_000, 5_000))
    assert float(exact) == pytest.approx(got[0], rel=5e-9)


def test_fisher_tail_engines_agree():
    """The Python (few tails), numpy and numba loops give the same tails."""
    from slicefind import stats
    rng = np.random.default_rng(9)
    n = rng.integers(100, 50_000, 3000)
    k = rng.binomial(n, 0.09)
    together = fisher_greater(k, n, 75_000, 1_000_000)               # numba (>= 2,000 tails)
    in_numpy = np.concatenate([fisher_greater(k[i:i + 500], n[i:i + 500], 75_000, 1_000_000)
                               for i in range(0, 3000, 500)])          # numpy (33..1,999)
    one_by_one = np.array([fisher_greater(int(a), int(b), 75_000, 1_000_000)
                           for a, b in zip(k[:200], n[:200])])        # Python loop (<= 32)
    assert np.allclose(together, in_numpy, rtol=1e-12, atol=0)
    assert np.allclose(together[:200], one_by_one, rtol=1e-12, atol=0)
