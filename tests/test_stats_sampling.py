"""Review-sample statistics: Wilson with finite-population correction, stratified estimates,
MOVER limits and Cochran's sample size, checked against ../shared/REFERENCES.md §1, §5, §6."""
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize
from scipy.stats import norm
from statsmodels.stats.proportion import proportion_confint, samplesize_confint_proportion

from slicefind.stats import (cochran_sample_size, mover_sum_interval, score_sum_interval,
                             stratified_interval, stratified_proportion, wilson_interval,
                             wilson_interval_fpc, z_value)


# --- Cochran's sample size (REFERENCES §5) ----------------------------------------------------

@pytest.mark.parametrize("p, e, n0, rounded", [
    # Cochran, Sampling Techniques, 3rd ed. (1977) §4.4: 385 for p=.5, e=.05, 95% (recalled, not
    # re-read; statsmodels samplesize_confint_proportion reproduces n0 = 384.1459, tag M)
    (0.5, 0.05, 384.1459, 385),
    (0.5, 0.03, 1067.0719, 1068),  # computed (tag C): statsmodels 0.15 samplesize_confint_proportion
    (0.5, 0.10, 96.0365, 97),      # computed (tag C), same call
    (0.1, 0.05, 138.2925, 139),    # computed (tag C), same call
])
def test_cochran_n0_matches_reference(p, e, n0, rounded):
    """n0 = z^2 p q / e^2 matches REFERENCES §5 and rounds up to the tabulated size."""
    got = cochran_sample_size(p, e)
    assert n0 == pytest.approx(got, abs=5e-5)
    assert n0 == pytest.approx(samplesize_confint_proportion(p, e, alpha=0.05), abs=5e-5)  # statsmodels 0.15
    assert rounded == math.ceil(got)


def test_cochran_n0_matches_statsmodels():
    """n0 agrees with statsmodels 0.15 samplesize_confint_proportion(p, e, alpha=0.05)."""
    for p, e in [(0.5, 0.05), (0.3, 0.02), (0.9, 0.1)]:
        assert samplesize_confint_proportion(p, e, alpha=0.05) == pytest.approx(
            cochran_sample_size(p, e), rel=1e-12)


@pytest.mark.parametrize("N, ceil_n", [
    # REFERENCES §5, column "n0/(1+(n0-1)/N)" rounded up (Cochran's FPC form, tag C)
    (100, 80), (500, 218), (1000, 278), (2000, 323), (10000, 370), (1000000, 384)])
def test_cochran_fpc_table(N, ceil_n):
    """The finite-population correction n0/(1+(n0-1)/N) gives REFERENCES §5's sizes."""
    assert ceil_n == math.ceil(cochran_sample_size(0.5, 0.05, population=N))


@pytest.mark.parametrize("N, km", [
    # Krejcie & Morgan 1970, Educ Psychol Meas 30:607, table (recalled, not re-read, tag M in
    # REFERENCES §5; no library applies the FPC, so their own formula, written out in the test,
    # reproduces it); their chi-square 3.841 and rounding to the nearest integer
    (10, 10), (50, 44), (200, 132), (500, 217), (1000, 278), (2000, 322), (5000, 357),
    (20000, 377), (75000, 382)])
def test_cochran_fpc_matches_krejcie_morgan(N, km):
    """With z^2 = 3.841 and nearest-integer rounding the formula reproduces K&M's table."""
    level = 2.0 * norm.cdf(math.sqrt(3.841)) - 1.0
    assert km == round(cochran_sample_size(0.5, 0.05, population=N, confidence_level=level))
    # K&M's formula chi^2 N P(1-P) / (d^2 (N-1) + chi^2 P(1-P)), with P = .5 and d = .05
    assert km == round(3.841 * N * 0.25 / (0.05 ** 2 * (N - 1) + 3.841 * 0.25))


def test_cochran_fpc_form_told_apart_by_krejcie_morgan():
    """K&M's entry for N = 100 is 80: Cochran's n0/(1+(n0-1)/N) gives it, n0/(1+n0/N) gives 79.

    The other K&M entries in REFERENCES §5 (N = 10 ... 1,000,000) round the same under both
    forms, so N = 100 is the one case there that can catch the wrong form.
    """
    level = 2.0 * norm.cdf(math.sqrt(3.841)) - 1.0          # K&M's chi-square 3.841, one d.f.
    n0 = 3.841 * 0.25 / 0.05 ** 2                           # 384.1
    got = cochran_sample_size(0.5, 0.05, population=100, confidence_level=level)
    assert 79.5073 == pytest.approx(got, abs=5e-5)          # 38410 / 483.1, computed (tag C)
    # Krejcie & Morgan (1970) table: 80 for N = 100 (recalled, not re-read; REFERENCES §5, tag M)
    assert 80 == round(got)
    other_form = n0 / (1 + n0 / 100)                        # the form many secondary texts use
    assert 79.3431 == pytest.approx(other_form, abs=5e-5)
    assert 79 == round(other_form)                          # so the check fails under that form
    for N in (10, 50, 200, 500, 1000, 2000, 5000, 10000, 20000, 75000, 1000000):
        cochran = round(cochran_sample_size(0.5, 0.05, population=N, confidence_level=level))
        assert round(n0 / (1 + n0 / N)) == cochran


@settings(max_examples=200, deadline=None)
@given(st.floats(0.05, 0.95), st.floats(0.02, 0.98), st.integers(20, 5000))
def test_cochran_with_threshold_is_where_wilson_fpc_excludes_it(t, p, N):
    """At n = ceil(Cochran(t, |p - t|, N)) the Wilson-FPC interval around p excludes t."""
    gap = abs(p - t)
    if gap < 0.02:
        return
    n = math.ceil(cochran_sample_size(t, gap, population=N))
    if n >= N:
        return
    low, high = wilson_interval_fpc(p * n, n, N)
    assert not (low < t < high)
    if n >= 2:
        low, high = wilson_interval_fpc(p * (n - 1), n - 1, N)
        assert low <= t <= high


# --- Wilson with finite-population correction ------------------------------------------------

@pytest.mark.parametrize("k, n, low, high", [
    # Newcombe 1998, Stat Med 17:857, Table I, method 3 (recalled, not re-read, tags M+T;
    # statsmodels proportion_confint(method="wilson") reproduces it)
    (81, 263, 0.2553, 0.3662), (15, 148, 0.0624, 0.1605), (0, 20, 0.0000, 0.1611),
    (1, 29, 0.0061, 0.1718)])
def test_wilson_fpc_without_population_is_wilson(k, n, low, high):
    """With N=None the interval is Newcombe's method 3 (Wilson score, no correction)."""
    assert (low, high) == pytest.approx(wilson_interval_fpc(k, n), abs=5e-5)
    assert (low, high) == pytest.approx(proportion_confint(k, n, alpha=0.05, method="wilson"),
                                        abs=5e-5)                              # statsmodels 0.15


def test_wilson_fpc_large_population_approaches_statsmodels_wilson():
    """For N = 10^12 the bounds equal statsmodels 0.15 proportion_confint(method='wilson')."""
    for k, n in [(3, 15), (50, 100), (0, 7), (7, 7)]:
        expected = proportion_confint(k, n, alpha=0.05, method="wilson")
        assert expected == pytest.approx(wilson_interval_fpc(k, n, 10**12), abs=1e-9)


@pytest.mark.parametrize("k, n, N", [(4, 10, 12), (3, 20, 40), (17, 30, 31), (1, 5, 1000)])
def test_wilson_fpc_inverts_the_score_test(k, n, N):
    """Each bound solves (p - P)^2 = z^2 P(1-P)(N-n)/((N-1)n), found by scipy brentq."""
    z = z_value(0.95)
    p = k / n

    def score(P):
        return (p - P) ** 2 - z * z * P * (1 - P) * (N - n) / ((N - 1) * n)

    low = optimize.brentq(score, 1e-12, p) if k > 0 else 0.0
    high = optimize.brentq(score, p, 1 - 1e-12) if k < n else 1.0
    assert (low, high) == pytest.approx(wilson_interval_fpc(k, n, N), abs=1e-9)


def test_wilson_fpc_census_and_empty():
    """A census gives the observed proportion; no sample gives (0, 1)."""
    assert (0.4, 0.4) == pytest.approx(wilson_interval_fpc(4, 10, 10), abs=1e-12)
    assert (0.0, 1.0) == wilson_interval_fpc(0, 0, 30)
    assert (1.0, 1.0) == wilson_interval_fpc(10, 10, 10)


@settings(max_examples=300, deadline=None)
@given(st.integers(1, 400).flatmap(lambda n: st.tuples(st.integers(0, n), st.just(n),
                                                       st.integers(n, 5000))))
def test_wilson_fpc_in_unit_interval_and_narrower(knN):
    """The interval lies in [0, 1], holds k/n, and is no wider than plain Wilson."""
    k, n, N = knN
    low, high = wilson_interval_fpc(k, n, N)
    plain_low, plain_high = wilson_interval(k, n)
    assert 0.0 <= low <= k / n <= high <= 1.0
    assert plain_low - 1e-12 <= low and high <= plain_high + 1e-12
    assert (k == 0) == (low == 0.0) or n == N


# --- stratified proportion (REFERENCES §6, constructed cases, tag C) --------------------------

@pytest.mark.parametrize("k, n, N, p_st, se_fpc, se_plain, total_se", [
    # REFERENCES §6 cases, all constructed (tag C, no published value), checked there against
    # samplics 0.6.1 TaylorEstimator and the hand formula (recomputed in the test below).
    # case A; a 400,000-replicate simulation there also agrees
    ([24, 5, 3], [30, 20, 25], [120, 60, 220], 0.3435, 0.0412334, 0.0452724, 16.4933),
    # case B: stratum 2 is a census; v = 0.0112 exactly
    ([3, 7], [10, 10], [40, 10], 0.38, 0.105830, 0.125963, 5.29150),
    # case C: proportional allocation, one stratum with p_h = 0
    ([10, 15, 0], [50, 30, 20], [500, 300, 200], 0.25, 0.0378546, 0.0399022, 37.8546),
])
def test_stratified_proportion_matches_reference(k, n, N, p_st, se_fpc, se_plain, total_se):
    """Estimate and SE, with and without FPC, and the total's SE match REFERENCES §6."""
    p, v = stratified_proportion(k, n, N)
    _, v_plain = stratified_proportion(k, n, N, fpc=False)
    assert p_st == pytest.approx(p, abs=5e-5)
    assert se_fpc == pytest.approx(math.sqrt(v), abs=5e-7)
    assert se_plain == pytest.approx(math.sqrt(v_plain), abs=5e-7)
    assert total_se == pytest.approx(sum(N) * math.sqrt(v), abs=5e-4)
    # the hand formula, an independent computation (Cochran ch. 5, stratified proportions):
    # p_st = sum W_h p_h, v = sum W_h^2 (1 - n_h/N_h) p_h q_h / (n_h - 1), W_h = N_h / N
    hand_p = hand_v = hand_v_plain = 0.0
    for k_h, n_h, N_h in zip(k, n, N):
        W, p_h = N_h / sum(N), k_h / n_h
        hand_p += W * p_h
        hand_v += W ** 2 * (1 - n_h / N_h) * p_h * (1 - p_h) / (n_h - 1)
        hand_v_plain += W ** 2 * p_h * (1 - p_h) / (n_h - 1)
    assert hand_p == pytest.approx(p, rel=1e-12)
    assert hand_v == pytest.approx(v, rel=1e-12)
    assert hand_v_plain == pytest.approx(v_plain, rel=1e-12)
    assert se_fpc == pytest.approx(math.sqrt(hand_v), abs=5e-7)


def test_stratified_proportion_case_a_terms():
    """Case A's variance is 272.03042 / 400^2 (REFERENCES §6, per-stratum terms, tag C)."""
    _, v = stratified_proportion([24, 5, 3], [30, 20, 25], [120, 60, 220])
    assert 272.03042 / 400**2 == pytest.approx(v, rel=1e-7)


def test_stratified_proportion_single_review_is_conservative():
    """A stratum with one reviewed row contributes W^2 (1 - f) / 4 (our documented rule)."""
    _, v = stratified_proportion([1, 3], [1, 10], [20, 20])
    expected = 0.25 * (1 - 1 / 20) * 0.25 + 0.25 * (1 - 10 / 20) * 0.3 * 0.7 / 9
    assert expected == pytest.approx(v, rel=1e-12)


# --- MOVER and the stratified interval -------------------------------------------------------

def test_mover_single_stratum_is_its_interval():
    """With one stratum of weight 1 the MOVER limits are that stratum's limits."""
    low, high = wilson_interval(7, 30)
    assert (low, high) == pytest.approx(mover_sum_interval([7 / 30], [low], [high], [1.0]), abs=1e-15)


def test_mover_hand_example():
    """Hand check: 0.45 -/+ sqrt((.5*.2)^2 + (.5*.08)^2), sqrt((.5*.1)^2 + (.5*.2)^2)."""
    low, high = mover_sum_interval([0.8, 0.1], [0.6, 0.02], [0.9, 0.3], [0.5, 0.5])
    assert (0.45 - math.sqrt(0.01 + 0.0016), 0.45 + math.sqrt(0.0025 + 0.01)) == pytest.approx(
        (low, high), abs=1e-12)


def test_stratified_interval_one_stratum_is_wilson_fpc():
    """A single stratum gives its Wilson-FPC interval."""
    est, low, high = stratified_interval([4], [10], [12])
    assert (0.4, *wilson_interval_fpc(4, 10, 12)) == pytest.approx((est, low, high), abs=1e-12)


def test_stratified_interval_edges():
    """0 everywhere starts at 0, all everywhere ends at 1, a full census is exact."""
    est, low, high = stratified_interval([0, 0], [10, 5], [100, 50])
    assert (0.0, 0.0) == (est, low) and 0.0 < high < 0.3
    est, low, high = stratified_interval([10, 5], [10, 5], [100, 50])
    assert (1.0, 1.0) == (est, high) and 0.7 < low < 1.0
    assert (0.1, 0.1, 0.1) == pytest.approx(stratified_interval([3, 0], [10, 20], [10, 20]), abs=1e-12)


def test_stratified_interval_unknown_stratum_is_bounded_by_none_and_all():
    """An unreviewed stratum adds 0 to the lower bound and its whole weight to the upper."""
    known = stratified_interval([24, 5], [30, 20], [120, 60])
    est, low, high = stratified_interval([24, 5, 0], [30, 20, 0], [120, 60, 220])
    weights = [120 / 400, 60 / 400]
    lo_m, hi_m = mover_sum_interval([0.8, 0.25], *wilson_interval_fpc([24, 5], [30, 20], [120, 60]),
                                    weights)
    lo_s, hi_s = score_sum_interval([24, 5], [30, 20], [120, 60], weights)
    assert known[0] == pytest.approx(est, abs=1e-12)          # re-weighted to the reviewed strata
    assert min(lo_m, lo_s) == pytest.approx(low, abs=1e-12)
    assert max(hi_m, hi_s) + 220 / 400 == pytest.approx(high, abs=1e-12)


def test_stratified_interval_is_union_of_mover_and_score():
    """Case A (REFERENCES §6): the interval is the union of the MOVER and score limits."""
    k, n, N = [24, 5, 3], [30, 20, 25], [120, 60, 220]
    w = np.array(N) / 400
    lo_m, hi_m = mover_sum_interval(np.array(k) / n, *wilson_interval_fpc(k, n, N), w)
    lo_s, hi_s = score_sum_interval(k, n, N, w)
    est, low, high = stratified_interval(k, n, N)
    assert (0.3435, min(lo_m, lo_s), max(hi_m, hi_s)) == pytest.approx((est, low, high), abs=5e-5)


@pytest.mark.parametrize("k, n, N", [(4, 10, 12), (0, 10, 100), (10, 10, 100), (3, 15, 10**9)])
def test_score_sum_single_stratum_is_wilson_fpc(k, n, N):
    """For one stratum of weight 1 the score interval is the Wilson-FPC interval."""
    assert wilson_interval_fpc(k, n, N) == pytest.approx(score_sum_interval([k], [n], [N], [1.0]),
                                                         abs=1e-9)


@pytest.mark.parametrize("k, n, N", [([24, 5, 3], [30, 20, 25], [120, 60, 220]),
                                     ([0, 4, 1], [10, 12, 9], [50, 40, 300]),
                                     ([10, 2], [10, 15], [200, 15])])
def test_score_sum_bounds_solve_the_constrained_score_test(k, n, N):
    """At each bound, the score statistic with the constrained MLE (found by scipy SLSQP) is z^2."""
    k, n, N = (np.array(x, dtype=float) for x in (k, n, N))
    w = N / N.sum()
    n_star = np.where(n < N, n * (N - 1) / np.maximum(N - n, 1e-300), np.inf)
    p = k / n
    free = np.isfinite(n_star)

    def statistic(P):
        def nll(x):
            pi = p.copy()
            pi[free] = x
            pi = np.clip(pi, 1e-12, 1 - 1e-12)
            return -np.sum(n_star[free] * (p[free] * np.log(pi[free]) + (1 - p[free]) * np.log(1 - pi[free])))
        cons = {"type": "eq", "fun": lambda x: np.sum(w[free] * x) + np.sum(w[~free] * p[~free]) - P}
        fit = optimize.minimize(nll, np.clip(p[free], 0.01, 0.99), constraints=[cons],
                                bounds=[(1e-9, 1 - 1e-9)] * int(free.sum()), method="SLSQP",
                                options={"ftol": 1e-14, "maxiter": 500})
        pi = p.copy()
        pi[free] = fit.x
        v = np.sum((w ** 2 * pi * (1 - pi))[free] / n_star[free])
        return (np.sum(w * p) - P) ** 2 / v

    low, high = score_sum_interval(k, n, N, w)
    z2 = z_value(0.95) ** 2
    for bound in (low, high):
        if 0.0 < bound < 1.0 and bound != pytest.approx(np.sum(w * p)):
            assert z2 == pytest.approx(statistic(bound), rel=1e-4)


def test_stratified_interval_nothing_reviewed():
    """No stratum reviewed: estimate NaN, interval [0, 1]."""
    est, low, high = stratified_interval([0, 0], [0, 0], [10, 20])
    assert math.isnan(est) and (0.0, 1.0) == (low, high)


@settings(max_examples=150, deadline=None)
@given(st.lists(st.integers(1, 300).flatmap(
    lambda N: st.integers(0, N).flatmap(lambda n: st.tuples(st.integers(0, n), st.just(n), st.just(N)))),
    min_size=1, max_size=6))
def test_stratified_interval_properties(strata):
    """Bounds in [0, 1] around the estimate, containing the score interval; no tag gives low 0."""
    k, n, N = (np.array(x) for x in zip(*strata))
    est, low, high = stratified_interval(k, n, N)
    assert 0.0 <= low <= high <= 1.0
    seen = n > 0
    if seen.any():
        s_low, s_high = score_sum_interval(k[seen], n[seen], N[seen], N[seen] / N.sum())
        assert low <= s_low + 1e-12 and s_high <= high + 1e-12
    if (n > 0).any():
        assert low - 1e-12 <= est <= high + 1e-12
    if k.sum() == 0:
        assert low == 0.0
