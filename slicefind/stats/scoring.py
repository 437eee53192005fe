"""The statistics every candidate slice gets, from its row and error counts.
"""
from __future__ import annotations

import numpy as np

from slicefind.stats.exact import fisher_greater
from slicefind.stats.intervals import wilson_interval

__all__ = ["score_slices", "SCORE_COLUMNS"]


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
