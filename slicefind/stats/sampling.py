"""How many reviews settle a proportion: Cochran's sample size with finite-population correction.
"""
from __future__ import annotations

import numpy as np

from slicefind.stats.intervals import z_value

__all__ = ["cochran_sample_size"]


def cochran_sample_size(p, e, *, population=None, confidence_level: float = 0.95):
    """Sample size to estimate a proportion to within ``e``, with finite-population correction.

    ``n0 = z^2 p (1-p) / e^2``, and for a population of ``N`` units
    ``n = n0 / (1 + (n0 - 1) / N)`` (Cochran 1977, §4.4). Round the result up.
    With ``p`` the threshold and ``e`` the distance from the observed proportion to it,
    ``n`` is also the sample size at which the Wilson interval with finite-population
    correction (`wilson_interval_fpc`) stops containing the threshold, if the observed
    proportion holds: the Wilson interval is the set where ``(p_obs - P)^2 <= z^2 P(1-P)/n*``.

    Parameters
    ----------
    p : float or array
        Planning proportion, in [0, 1].
    e : float or array
        Half-width (margin), > 0.
    population : int, array or None, default=None
        Units in the population; None for no correction.
    confidence_level : float, default=0.95

    Returns
    -------
    n : float or array
        Unrounded sample size.

    References
    ----------
    .. [1] W. G. Cochran, *Sampling Techniques*, 3rd ed., Wiley (1977), §4.4 (recalled).
    .. [2] R. V. Krejcie and D. W. Morgan, "Determining sample size for research
           activities", Educ. Psychol. Meas. 30 (1970) 607-610 (the same formula, tabulated).

    Examples
    --------
    >>> import math
    >>> math.ceil(cochran_sample_size(0.5, 0.05)), math.ceil(cochran_sample_size(0.5, 0.05, population=1000))
    (385, 278)
    """
    scalar = all(np.ndim(v) == 0 for v in (p, e, population))
    p = np.asarray(p, dtype=np.float64)
    e = np.asarray(e, dtype=np.float64)
    z = z_value(confidence_level)
    n0 = z * z * p * (1.0 - p) / (e * e)          # Cochran (1977) §4.4: n0 = z² p q / e²
    if population is None:
        n = n0
    else:
        N = np.asarray(population, dtype=np.float64)
        n = n0 / (1.0 + (n0 - 1.0) / N)            # n = n0 / (1 + (n0 - 1)/N)
    return float(n) if scalar else n
