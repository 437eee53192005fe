"""The leaf records every slice source shares: the `Slice` candidate, row overlap, the default size.

Sources (rules, embedding clusters, the label check) import these; `find_slices` ranks
what they return. Nothing here imports another slicefind module.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np

__all__ = ["Slice", "jaccard", "default_min_rows", "SOURCES", "LABEL_SOURCE"]

#: the source of the label check's candidates (suspected label mistakes)
LABEL_SOURCE = "label_check"
#: every candidate source, in the order the table lists ties
SOURCES = ("rule", "region", "error_mode", LABEL_SOURCE)


@dataclass(frozen=True, repr=False)
class Slice:
    """One candidate from any source, before ranking.

    ``rows`` are sorted positions among the analysed rows of the `EvalTable`.
    """

    source: str
    description: str
    rows: np.ndarray
    n_terms: int = 0
    key: str = ""                    # stable identity within its source (rule items, cluster label)
    extra: Mapping[str, Any] = field(default_factory=dict)

    def __repr__(self):
        return f"Slice({self.source}, {self.description!r}, n_rows={self.rows.size})"


def jaccard(a: np.ndarray, b: np.ndarray) -> float:
    """|A ∩ B| / |A ∪ B| of two sorted row arrays; 0.0 when both are empty.

    Examples
    --------
    >>> jaccard(np.array([0, 1, 2, 3]), np.array([2, 3, 4]))
    0.4
    """
    union = np.union1d(a, b).size
    return 0.0 if union == 0 else np.intersect1d(a, b, assume_unique=True).size / union


def default_min_rows(n_rows: int) -> int:
    """0.5% of the rows, but never fewer than 20 (nor more than the table).

    A slice holding 0.5% of the rows, and at least 20 rows, can always be found.

    Examples
    --------
    >>> default_min_rows(1_000), default_min_rows(100_000), default_min_rows(1_000_000)
    (20, 500, 5000)
    """
    return int(min(n_rows, max(20, math.floor(0.005 * n_rows))))
