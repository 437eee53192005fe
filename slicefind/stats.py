"""Statistics: Wilson intervals, one-sided Fisher tests, Benjamini–Hochberg q-values.

Every function is vectorised over numpy arrays and cites its source beside the formula.
Review-sample estimates (stratified proportions, sample sizes) and paired tests live
here too, next to the methods they share.
"""
from __future__ import annotations

import numpy as np
from scipy import stats

__all__ = [
    "z_value",
    "wilson_interval",
    "fisher_greater",
    "bh_qvalues",
    "score_slices",
    "SCORE_COLUMNS",
]


def z_value(confidence_level: float = 0.95) -> float:
    """Two-sided normal quantile, e.g. 1.959964 for 0.95."""
    return float(stats.norm.ppf(0.5 + confidence_level / 2.0))


def wilson_interval(k, n, *, confidence_level: float = 0.95):
    """Wilson score interval for a binomial proportion.

    Parameters
    ----------
    k, n : int or array of int
        Successes (errors) and trials (rows), ``0 <= k <= n``, ``n >= 1``.
    confidence_level : float, default=0.95
        Two-sided coverage, in (0, 1).

    Returns
    -------
    low, high : float or arrays
        Bounds; exactly 0 when ``k == 0`` and exactly 1 when ``k == n``.

    References
    ----------
    .. [1] E. B. Wilson, "Probable inference, the law of succession, and statistical
           inference", J. Amer. Statist. Assoc. 22 (1927) 209-212.
    .. [2] R. G. Newcombe, "Two-sided confidence intervals for the single proportion:
           comparison of seven methods", Stat. Med. 17 (1998) 857-872 (method 3).

    Examples
    --------
    >>> low, high = wilson_interval(3, 15)   # 3 errors among a slice's 15 rows
    >>> print(f"{low:.4f} {high:.4f}")
    0.0705 0.4519
    """
    scalar = np.ndim(k) == 0 and np.ndim(n) == 0
    k = np.asarray(k, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    z = z_value(confidence_level)
    # Wilson (1927): (p + z²/2n ± z sqrt(p(1-p)/n + z²/4n²)) / (1 + z²/n)
    p = k / n
    denom = 1.0 + z * z / n
    centre = (p + z * z / (2.0 * n)) / denom
    half = z * np.sqrt(np.maximum(p * (1.0 - p) / n + z * z / (4.0 * n * n), 0.0)) / denom
    low = np.where(k == 0, 0.0, np.clip(centre - half, 0.0, 1.0))
    high = np.where(k == n, 1.0, np.clip(centre + half, 0.0, 1.0))
    if scalar:
        return float(low), float(high)
    return low, high


def fisher_greater(slice_errors, slice_rows, total_errors, total_rows):
    """One-sided Fisher exact p-value that a slice's error rate exceeds the rest's.

    The p-value is ``P(X >= slice_errors)`` for ``X ~ Hypergeometric(total_rows,
    total_errors, slice_rows)``: the chance that a random subset of ``slice_rows`` rows
    holds at least this many errors. Vectorised.

    References
    ----------
    .. [1] R. A. Fisher, *The Design of Experiments*, ch. II (1935): the tea-tasting table.

    Examples
    --------
    >>> print(f"{fisher_greater(3, 4, 4, 8):.6f}")   # Fisher's tea table: 17/70
    0.242857
    """
    scalar = all(np.ndim(v) == 0 for v in (slice_errors, slice_rows, total_errors, total_rows))
    a = np.asarray(slice_errors, dtype=np.float64)
    # scipy's hypergeom(M=total, n=successes, N=draws); sf(a - 1) = P(X >= a)
    p = stats.hypergeom.sf(a - 1.0, total_rows, total_errors, slice_rows)
    p = np.clip(np.where(a <= 0, 1.0, p), 0.0, 1.0)
    return float(p) if scalar else p


def bh_qvalues(p_values) -> np.ndarray:
    """Benjamini–Hochberg adjusted p-values (q-values), in the input order.

    ``q(i) = min_{j >= i} min(1, m p(j) / j)`` over the sorted p-values; a hypothesis is
    rejected at false discovery rate ``alpha`` when its q-value is ``<= alpha``.

    References
    ----------
    .. [1] Y. Benjamini and Y. Hochberg, "Controlling the false discovery rate: a
           practical and powerful approach to multiple testing", J. R. Statist. Soc. B 57
           (1995) 289-300.

    Examples
    --------
    >>> print(np.round(bh_qvalues([0.04, 0.001, 0.03, 0.2]), 6).tolist())
    [0.053333, 0.004, 0.053333, 0.2]
    """
    p = np.asarray(p_values, dtype=np.float64)
    m = p.size
    if m == 0:
        return p.copy()
    order = np.argsort(p, kind="stable")
    ranked = p[order] * m / np.arange(1, m + 1)
    q_sorted = np.minimum.accumulate(ranked[::-1])[::-1]
    q = np.empty(m, dtype=np.float64)
    q[order] = np.minimum(q_sorted, 1.0)
    return q



SCORE_COLUMNS = ("n_rows", "n_errors", "error_rate", "ci_low", "ci_high", "lift",
                 "excess_errors", "error_share", "p_value")


def score_slices(n_rows, n_errors, total_rows: int, total_errors: int, *,
                 confidence_level: float = 0.95) -> dict[str, np.ndarray]:
    """The statistics of slices against the whole table, one array per column.

    ``error_rate`` with its Wilson interval (``ci_low``, ``ci_high``); ``lift`` = error
    rate / overall error rate; ``excess_errors`` = ``n_errors - n_rows * overall rate``;
    ``error_share`` = ``n_errors / total_errors``; ``p_value`` from the one-sided Fisher
    test of the slice against the rest. Rules and clusters are scored by this one function.

    Examples
    --------
    >>> s = score_slices([10], [6], 100, 15)
    >>> print(f"{s['lift'][0]:.1f} {s['excess_errors'][0]:.1f} {s['p_value'][0]:.3g}")
    4.0 4.5 0.000624
    """
    r = np.asarray(n_rows, dtype=np.int64)
    k = np.asarray(n_errors, dtype=np.int64)
    overall = total_errors / total_rows
    low, high = wilson_interval(k, r, confidence_level=confidence_level)
    rate = k / r
    return {
        "n_rows": r,
        "n_errors": k,
        "error_rate": rate,
        "ci_low": np.asarray(low, dtype=np.float64),
        "ci_high": np.asarray(high, dtype=np.float64),
        "lift": rate / overall,
        "excess_errors": k - r * overall,
        "error_share": k / total_errors,
        "p_value": np.asarray(fisher_greater(k, r, total_errors, total_rows), dtype=np.float64),
    }
