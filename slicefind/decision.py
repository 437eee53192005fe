"""Plain words for a tally: one short paragraph per top category, generated from the numbers.

Each paragraph restates what the tally's tables hold: the category's share of errors with
its interval, the error rate if it were fixed, the verdict on each candidate named after it,
and how many more reviews would likely settle an undecided one. It gives no advice beyond
the numbers; which direction to staff stays the team's call.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.review.tally import Tally, UNTAGGED, WRONG_LABEL

__all__ = ["decision_paragraphs"]


def _pct(value: float, digits: int = 1) -> str:
    """A share as a percentage (one decimal; error rates two), or 'unknown' when NaN."""
    return "unknown" if value is None or not np.isfinite(value) else f"{value:.{digits}%}"


def _interval(low: float, high: float, digits: int = 1) -> str:
    return f"{_pct(low, digits)}–{_pct(high, digits)}"


def _slice_sentence(s: pd.Series) -> str:
    """What the review says about one candidate named after a category."""
    head = f"Slice {s['slice_id']} ({s['description']})"
    if int(s["n_reviewed"]) == 0:
        return f"{head} has no review yet; about {int(s['more_needed'])} reviews could decide it."
    counted = (f"{int(s['n_named'])} of its {int(s['n_reviewed'])} reviewed errors carry the name, "
               f"precision {_pct(s['precision'])} ({_interval(s['precision_low'], s['precision_high'])})")
    if s["verdict"] == "undecided":
        more = int(s["more_needed"])
        return (f"{head} is undecided: {counted}; about {more} more review{'s' if more != 1 else ''} "
                "from it would likely settle it.")
    return f"{head} is {s['verdict']}: {counted}."


def decision_paragraphs(result, *, top: int = 3) -> list[str]:
    """Short paragraphs on the `top` largest categories of a tally, then wrong labels and the rest.

    Parameters
    ----------
    result : Tally
        From `slicefind.review.tally.tally` (or `Workspace.tally`).
    top : int, default=3
        How many of the largest categories get a paragraph, ``>= 1``.

    Returns
    -------
    list of str
        One paragraph per category, then one on wrong labels when any row was tagged so,
        then one on the errors no tag explains and on strata with no review yet.

    Examples
    --------
    >>> from slicefind.demodata import example_scan
    >>> from slicefind.review.queue import build_queue
    >>> from slicefind.review.tally import tally
    >>> queue = build_queue(example_scan(), budget=30, rest=10)
    >>> sheet = queue.table[["row", "stratum"]].copy()
    >>> sheet["reviewed"] = "yes"
    >>> sheet["tags"] = sheet["stratum"].map({"R1": "smudged print", "R2": "ink smear", "rest": ""})
    >>> print(decision_paragraphs(tally(queue, sheet), top=1)[0])   # doctest: +NORMALIZE_WHITESPACE
    smudged print: 43.9% of errors (95% CI 32.1%–54.7%), about 186 of 424. Fixed, the error
    rate would be at best 11.90% (9.60%–14.39%) instead of 21.20%. Slice R1 (scanner = S3 and
    shift = night) is confirmed: 10 of its 10 reviewed errors carry the name, precision 100.0%
    (73.2%–100.0%).
    """
    if not isinstance(result, Tally):
        raise SlicefindTypeError(f"result must be a Tally (from tally()); got {type(result).__name__}.")
    if isinstance(top, bool) or not isinstance(top, (int, np.integer)) or top < 1:
        raise SlicefindValueError(f"top must be an integer >= 1; got {top!r}.")
    summary = result.summary
    rate, total = float(summary["error_rate"]), int(summary["n_errors"])
    level = f"{float(summary['confidence_level']):.0%}"
    cats = result.categories.set_index("category")
    paragraphs = []
    for name in result.user_categories()[:int(top)]:
        c = cats.loc[name]
        text = (f"{name}: {_pct(c['share'])} of errors ({level} CI {_interval(c['share_low'], c['share_high'])}), "
                f"about {c['est_errors']:.0f} of {total}. Fixed, the error rate would be at best "
                f"{_pct(c['headroom'], 2)} ({_interval(c['headroom_low'], c['headroom_high'], 2)}) instead of "
                f"{_pct(rate, 2)}.")
        if int(summary.get("n_wrong_label", 0)):
            text += (f" Against corrected labels it would be {_pct(c['headroom_corrected'], 2)} "
                     f"({_interval(c['headroom_corrected_low'], c['headroom_corrected_high'], 2)}).")
        named = result.slices[result.slices["name"] == name]
        if len(named):
            text += " " + " ".join(_slice_sentence(s) for _, s in named.iterrows())
        else:
            text += " No queued slice is named after it."
        paragraphs.append(text)
    if int(summary.get("n_wrong_label", 0)):
        n = int(summary["n_wrong_label"])
        paragraphs.append(
            f"{WRONG_LABEL}: {n} reviewed error{'s' if n != 1 else ''} had a wrong dev-set label, "
            f"{_pct(summary['wrong_label_share'])} of errors "
            f"({_interval(summary['wrong_label_share_low'], summary['wrong_label_share_high'])}). With "
            f"those labels corrected the error rate would be {_pct(summary['corrected_error_rate'], 2)} "
            f"({_interval(summary['corrected_error_rate_low'], summary['corrected_error_rate_high'], 2)}); "
            "wrong labels on rows the model got right are not seen by a review of errors.")
    u = cats.loc[UNTAGGED]
    text = (f"{UNTAGGED}: {_pct(u['share'])} of errors ({_interval(u['share_low'], u['share_high'])}) "
            f"carry no tag ({int(u['n_tagged'])} reviewed rows).")
    unreviewed = float(summary.get("unreviewed_weight", 0.0))
    if unreviewed > 0:
        text += (f" Strata holding {_pct(unreviewed)} of the errors have no review yet; the intervals "
                 "count them as holding none to all of each category.")
    paragraphs.append(text)
    return paragraphs
