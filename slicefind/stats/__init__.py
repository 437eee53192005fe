"""Statistics: Wilson intervals, one-sided Fisher tests, Benjamini–Hochberg q-values.

Every function is vectorised over numpy arrays and cites its source beside the formula.
Review-sample estimates (stratified proportions, sample sizes) and paired tests live
here too, next to the methods they share.
"""
from __future__ import annotations

from slicefind.stats.exact import MCNEMAR_ALTERNATIVES, fisher_greater, mcnemar_exact
from slicefind.stats.fdr import bh_qvalues
from slicefind.stats.intervals import (mover_sum_interval, score_sum_interval, stratified_interval,
                                       stratified_proportion, wilson_interval, wilson_interval_fpc,
                                       z_value)
from slicefind.stats.sampling import cochran_sample_size
from slicefind.stats.scoring import SCORE_COLUMNS, score_slices

__all__ = ["z_value", "wilson_interval", "fisher_greater", "bh_qvalues", "score_slices", "SCORE_COLUMNS",
           "wilson_interval_fpc", "stratified_proportion", "mover_sum_interval", "score_sum_interval",
           "stratified_interval", "cochran_sample_size", "mcnemar_exact", "MCNEMAR_ALTERNATIVES"]
