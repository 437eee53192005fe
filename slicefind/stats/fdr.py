"""False discovery rate over every candidate tested: Benjamini–Hochberg q-values.
"""
from __future__ import annotations

import numpy as np

__all__ = ["bh_qvalues"]


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
