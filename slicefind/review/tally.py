"""The tally: read a review sheet, estimate category shares, and decide each candidate.

Reviews come back as a CSV sheet (from `Queue.to_csv`, filled in any spreadsheet
program) or a DataFrame with at least ``row``, ``reviewed`` and ``tags``. Reading is
tolerant of what spreadsheets do (byte-order mark, ``;`` or tab as the delimiter, stray
spaces, letter case of tags and headers, quoting) and strict about real problems, which
are all listed in one error: unknown rows, rows not in the queue, duplicate lines that
disagree, ``reviewed`` values that are not yes/no, tags on a line marked not reviewed.

Estimates are design-based: each stratum's reviewed rows are a simple random sample of
its error rows (the queue's order makes any reviewed prefix one).
"""
from __future__ import annotations

import csv
import io
import os
import re
import unicodedata
import warnings
from collections import Counter
from dataclasses import dataclass, field, fields
from math import lgamma, log
from typing import Any, Mapping

import numpy as np
import pandas as pd

from slicefind.exceptions import SlicefindTypeError, SlicefindValueError, check_level, did_you_mean
from slicefind.review.queue import Queue, REST
from slicefind.discovery.records import LABEL_SOURCE
from slicefind.stats import (cochran_sample_size, stratified_interval, stratified_proportion,
                             wilson_interval_fpc)
from slicefind.discovery.table import restore_formula_text

__all__ = ["Tally", "Combined", "tally", "read_reviews", "normalize_tag", "UNTAGGED",
           "WRONG_LABEL", "TRUE_WORDS", "FALSE_WORDS", "MAX_LISTED", "CATEGORY_COLUMNS",
           "SLICE_COLUMNS", "PAIR_COLUMNS", "RELABEL_COLUMNS"]

#: the category row for reviewed errors that carry no tag: what no category explains yet
UNTAGGED = "(untagged)"
#: the reserved tag for an error row whose dev-set label is itself wrong (the model may be
#: right); typed as ``(wrong label)`` or plainly ``wrong label``
WRONG_LABEL = "(wrong label)"
_WRONG_LABEL_SPELLINGS = (WRONG_LABEL, "wrong label")
#: accepted spellings of "reviewed" (compared after stripping and lower-casing)
TRUE_WORDS = ("1", "1.0", "yes", "y", "true", "t", "x", "✓", "✔")
#: accepted spellings of "not reviewed"; an empty cell is "not reviewed" too
FALSE_WORDS = ("0", "0.0", "no", "n", "false", "f")
#: problems listed in one error message (the count of all is given too)
MAX_LISTED = 20
CATEGORY_COLUMNS = ("category", "n_tagged", "share", "share_low", "share_high", "share_se",
                    "est_errors", "est_errors_low", "est_errors_high", "headroom",
                    "headroom_low", "headroom_high", "headroom_corrected",
                    "headroom_corrected_low", "headroom_corrected_high", "slices")
#: columns of `Tally.pairs`
PAIR_COLUMNS = ("category_a", "category_b", "n_tagged", "share", "share_low", "share_high",
                "overlap", "overlap_low", "overlap_high", "sum_of_shares", "headroom",
                "headroom_low", "headroom_high")
#: columns of `Tally.relabel` (and the workspace's relabel.csv)
RELABEL_COLUMNS = ("row", "stratum", "id", "label", "prediction", "tags", "note")
SLICE_COLUMNS = ("slice_id", "description", "name", "name_source", "n_errors", "n_reviewed",
                 "n_named", "precision", "precision_low", "precision_high", "verdict",
                 "more_needed")
_REQUIRED = ("row", "reviewed", "tags")
_SPACES = re.compile(r"\s+")


def normalize_tag(text: str) -> str:
    """A category name as compared and shown: NFC, trimmed, single spaces, lower case.

    ``wrong label``, with or without parentheses, is the reserved tag `WRONG_LABEL`.

    Examples
    --------
    >>> normalize_tag("  Faded   Ink ")
    'faded ink'
    >>> normalize_tag("Wrong  Label")
    '(wrong label)'
    """
    text = _SPACES.sub(" ", unicodedata.normalize("NFC", str(text))).strip().lower()
    return WRONG_LABEL if text in _WRONG_LABEL_SPELLINGS else text


@dataclass(frozen=True)
class _Design:
    """The stratified design of a tally: strata sizes, reviews per stratum, each reviewed row's tags."""

    sizes: np.ndarray              # N_h, error rows per stratum
    n_reviewed: np.ndarray         # n_h
    row_stratum: np.ndarray        # per reviewed row: its stratum's index
    tag_sets: tuple                # per reviewed row: its tags (a tuple of names)
    error_rate: float
    confidence_level: float

    def counts(self, has) -> np.ndarray:
        """k_h: reviewed rows per stratum whose tag set satisfies ``has(tags)``."""
        k = np.zeros(len(self.sizes), dtype=np.int64)
        for tags, h in zip(self.tag_sets, self.row_stratum):
            if has(tags):
                k[h] += 1
        return k

    def share(self, k: np.ndarray) -> tuple[float, float, float, float]:
        """Stratified share of all errors for per-stratum counts ``k``: estimate, low, high, se."""
        est, low, high = stratified_interval(k, self.n_reviewed, self.sizes,
                                             confidence_level=self.confidence_level)
        seen = self.n_reviewed > 0
        if seen.any():
            total = int(self.sizes.sum())
            _, v = stratified_proportion(k[seen], self.n_reviewed[seen], self.sizes[seen],
                                         population=total)
            se = float(np.sqrt(v)) / (float(self.sizes[seen].sum()) / total)
        else:
            se = float("nan")
        return est, low, high, se


@dataclass(frozen=True, repr=False)
class Combined:
    """Categories fixed together: the share of errors tagged with any of them (`Tally.combined`).

    Attributes
    ----------
    categories : tuple of str
    n_tagged : int
        Reviewed rows tagged with at least one of them.
    share, share_low, share_high : float
        Share of all errors tagged with any of them (the union), with its interval.
    overlap, overlap_low, overlap_high : float
        Share of all errors tagged with every one of them, with its interval.
    sum_of_shares : float
        The categories' shares added up: what the union would be without overlap.
    headroom, headroom_low, headroom_high : float
        Error rate if all of them were fixed, ``error_rate * (1 - share)``.
    headroom_corrected, headroom_corrected_low, headroom_corrected_high : float
        The same against corrected labels: ``error_rate * (1 - share of errors tagged with
        any of them or WRONG_LABEL)``.
    """

    categories: tuple
    n_tagged: int
    share: float
    share_low: float
    share_high: float
    overlap: float
    overlap_low: float
    overlap_high: float
    sum_of_shares: float
    headroom: float
    headroom_low: float
    headroom_high: float
    headroom_corrected: float
    headroom_corrected_low: float
    headroom_corrected_high: float

    def as_dict(self) -> dict[str, Any]:
        """The attributes as a plain dict (``categories`` joined by ``" + "``)."""
        out = {f.name: getattr(self, f.name) for f in fields(self)}
        out["categories"] = " + ".join(self.categories)
        return out

    def __repr__(self):
        return (f"Combined({' + '.join(self.categories)}: share={self.share:.3f} "
                f"[{self.share_low:.3f}, {self.share_high:.3f}])")


@dataclass(frozen=True, repr=False)
class Tally:
    """Estimates from the reviewed rows of a queue.

    Attributes
    ----------
    categories : DataFrame
        One line per category (largest share first), then `WRONG_LABEL` when it was used,
        then ``(untagged)``: ``category``, ``n_tagged`` (reviewed rows carrying it),
        ``share`` of all errors with its interval (``share_low``, ``share_high``) and
        standard error, ``est_errors`` (share times the errors) with its interval,
        ``headroom`` (error rate if the category were fixed, ``error_rate * (1 - share)``)
        with its interval, ``headroom_corrected`` (the same against corrected labels: the
        errors tagged with it or `WRONG_LABEL` taken away) with its interval, and
        ``slices`` (candidates named after it). On the `WRONG_LABEL` line, ``headroom`` is
        the error rate once the wrong labels are corrected.
    slices : DataFrame
        One line per queued candidate: ``slice_id``, ``description``, ``name`` and where it
        came from (``names``, ``tags``, or ``source`` for a label-check candidate, named
        `WRONG_LABEL`), ``n_errors`` in its stratum, ``n_reviewed``,
        ``n_named`` (reviewed rows tagged with the name), ``precision`` with its interval,
        ``verdict`` and ``more_needed``.
    cooccurrence : DataFrame
        Reviewed rows carrying both categories (square, by category; diagonal = ``n_tagged``).
    strata : DataFrame
        Per stratum: ``n_errors``, ``weight``, ``n_queued``, ``n_reviewed``, ``n_untagged``,
        ``n_skipped`` (queued rows before the last reviewed one that are not reviewed: the
        estimate assumes they are like the others).
    reviews : DataFrame
        The reviews as read (one line per row; see `read_reviews`).
    summary : dict
        ``n_errors``, ``n_rows``, ``error_rate``, ``n_queued``, ``n_reviewed``,
        ``unreviewed_weight`` (share of errors in strata with no review yet),
        ``rest_weight``, ``threshold``, ``confidence_level``, ``method``, and for wrong
        labels ``n_wrong_label``, ``wrong_label_share`` (with ``_low``/``_high``) and
        ``corrected_error_rate`` (with ``_low``/``_high``): the error rate once the wrong
        labels among the errors are corrected.
    relabel : DataFrame
        Reviewed rows tagged `WRONG_LABEL`, in row order: ``row``, ``stratum``, ``id``,
        ``label``, ``prediction`` (empty when the queue has none), their other ``tags``
        and the ``note``.
    """

    categories: pd.DataFrame
    slices: pd.DataFrame
    cooccurrence: pd.DataFrame
    strata: pd.DataFrame
    reviews: pd.DataFrame
    summary: Mapping[str, Any] = field(default_factory=dict)
    relabel: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=list(RELABEL_COLUMNS)))
    _design: Any = None

    def __repr__(self):
        return (f"Tally(n_reviewed={self.summary.get('n_reviewed')}, "
                f"n_categories={len(self.user_categories())}, n_slices={len(self.slices)})")

    def user_categories(self) -> list[str]:
        """The categories people tagged, largest share first (no `WRONG_LABEL`, no ``(untagged)``)."""
        return [c for c in self.categories["category"] if c not in (UNTAGGED, WRONG_LABEL)]

    def combined(self, categories) -> Combined:
        """The share of errors that fixing all of `categories` together would remove.

        One error may carry several tags, so fixing A and B removes the errors tagged A
        *or* B: the union, not the sum of the shares. The union's share is estimated like
        any category's (the stratified estimator over each reviewed row's "tagged with any
        of them"), with the same interval; so is the overlap (tagged with all of them).

        Parameters
        ----------
        categories : sequence of str
            Categories of this tally (as tagged; case and spaces do not matter), at least one,
            each once. `WRONG_LABEL` may be one of them.

        Returns
        -------
        Combined

        Examples
        --------
        >>> from slicefind.demodata import example_scan
        >>> from slicefind.review.queue import build_queue
        >>> queue = build_queue(example_scan(), budget=30, rest=10)
        >>> sheet = queue.table[["row", "stratum"]].copy()
        >>> sheet["reviewed"] = "yes"
        >>> sheet["tags"] = sheet["stratum"].map({"R1": "smudged print", "R2": "ink smear;smudged print",
        ...                                       "rest": ""})
        >>> both = tally(queue, sheet).combined(["smudged print", "ink smear"])
        >>> print(f"{both.share:.3f} [{both.share_low:.3f}, {both.share_high:.3f}] "
        ...       f"overlap {both.overlap:.3f}, sum {both.sum_of_shares:.3f}")
        0.797 [0.646, 0.849] overlap 0.358, sum 1.156
        """
        if self._design is None:
            raise SlicefindValueError("this Tally has no review design attached; build it with tally().")
        chosen = self.check_categories(categories)
        design = self._design
        k_any = design.counts(lambda tags: any(c in tags for c in chosen))
        k_all = design.counts(lambda tags: all(c in tags for c in chosen))
        k_fix = design.counts(lambda tags: any(c in tags for c in chosen + (WRONG_LABEL,)))
        share, low, high, _ = design.share(k_any)
        overlap, o_low, o_high, _ = design.share(k_all)
        fixed, f_low, f_high, _ = design.share(k_fix)
        shares = self.categories.set_index("category")["share"]
        rate = design.error_rate
        return Combined(categories=chosen, n_tagged=int(k_any.sum()), share=share,
                        share_low=low, share_high=high, overlap=overlap, overlap_low=o_low,
                        overlap_high=o_high, sum_of_shares=float(sum(shares[c] for c in chosen)),
                        headroom=rate * (1.0 - share), headroom_low=rate * (1.0 - high),
                        headroom_high=rate * (1.0 - low), headroom_corrected=rate * (1.0 - fixed),
                        headroom_corrected_low=rate * (1.0 - f_high),
                        headroom_corrected_high=rate * (1.0 - f_low))

    def pairs(self, top: int = 5) -> pd.DataFrame:
        """Every pair among the `top` largest categories, fixed together, ranked by union share.

        Parameters
        ----------
        top : int, default=5
            How many of the largest user categories to pair (`WRONG_LABEL` and
            ``(untagged)`` are left out), ``>= 2``.

        Returns
        -------
        DataFrame
            `PAIR_COLUMNS`: the two categories, reviewed rows tagged with either, the union's
            share with its interval, the overlap with its interval, the two shares added up,
            and the error rate if both were fixed with its interval. Empty with fewer than two
            categories.
        """
        if isinstance(top, bool) or not isinstance(top, (int, np.integer)) or top < 2:
            raise SlicefindValueError(f"top must be an integer >= 2; got {top!r}.")
        names = self.user_categories()[:int(top)]
        rows = []
        for i, a in enumerate(names):
            for b in names[i + 1:]:
                got = self.combined([a, b]).as_dict()
                got.update(category_a=a, category_b=b)
                rows.append({c: got[c] for c in PAIR_COLUMNS})
        frame = pd.DataFrame(rows, columns=list(PAIR_COLUMNS))
        frame = frame.sort_values(["share", "n_tagged", "category_a", "category_b"],
                                  ascending=[False, False, True, True], kind="mergesort")
        return frame.reset_index(drop=True).astype({"n_tagged": np.int64})

    def check_categories(self, categories, *, argument: str = "categories") -> tuple:
        """The normalised, distinct categories of this tally that `categories` names, or an
        error naming `argument` and the unknown ones (with the closest known name)."""
        name = argument
        if isinstance(categories, str) or not hasattr(categories, "__iter__"):
            raise SlicefindTypeError(f"{name} must be a list of category names; got {categories!r}.")
        given = list(categories)
        if not given:
            raise SlicefindValueError(f"{name} must name at least one category; got none.")
        if not all(isinstance(c, str) for c in given):
            raise SlicefindTypeError(f"{name} must hold category names (strings); got {given!r}.")
        known = [c for c in self.categories["category"] if c != UNTAGGED]
        chosen = [normalize_tag(c) for c in given]
        unknown = [g for g, c in zip(given, chosen) if c not in known]
        if unknown:
            hint = did_you_mean(normalize_tag(unknown[0]), known)
            msg = (f"{name} has {unknown!r}, which {'is' if len(unknown) == 1 else 'are'} not a "
                   f"category of this tally; its categories are {known}.{hint}")
            raise SlicefindValueError(msg)
        repeated = sorted({c for c in chosen if chosen.count(c) > 1})
        if repeated:
            raise SlicefindValueError(f"{name} names {repeated!r} more than once.")
        return tuple(chosen)


# --- reading the sheet -------------------------------------------------------------------


def _cell(value) -> str:
    """A sheet cell as trimmed text: missing -> '', 1.0 -> '1', True -> 'true'."""
    if type(value) is str:
        return value.strip()
    if value is None:
        return ""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (float, np.floating)):
        if np.isnan(value):
            return ""
        if float(value).is_integer():
            return str(int(value))
        return repr(float(value))
    try:
        if pd.isna(value):
            return ""
    except (TypeError, ValueError):
        pass
    return str(value).strip()


def _header_key(name) -> str:
    """A header as matched: trimmed, lower case, inner spaces as underscores."""
    return re.sub(r"\s+", "_", _cell(name).lstrip("\ufeff").strip().lower())


def _read_csv_records(path: str) -> tuple[list[str], list[tuple[str, list[str]]]]:
    """Header and (where, cells) records of a CSV sheet; sniffs ',' ';' or tab."""
    try:
        with open(path, "rb") as handle:
            raw = handle.read()
    except OSError as exc:
        raise SlicefindValueError(f"reviewed={path!r} cannot be read: {exc.strerror}.") from None
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        msg = (f"reviewed={path!r} is not UTF-8 text (byte {raw[exc.start]:#04x} at offset "
               f"{exc.start}); save it from the spreadsheet as 'CSV UTF-8'.")
        raise SlicefindValueError(msg) from None
    first = text.split("\n", 1)[0]
    best, best_cells = ",", -1
    for delimiter in (",", ";", "\t"):
        cells = [_header_key(c) for c in next(csv.reader([first], delimiter=delimiter), [])]
        score = sum(c in _REQUIRED for c in cells) * 100 + len(cells)
        if score > best_cells:
            best, best_cells = delimiter, score
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=best)
    records = []
    try:
        header = next(reader, None)
        if header is None:
            raise SlicefindValueError(f"reviewed={path!r} is empty; it needs a header line "
                                      "with at least row, reviewed and tags.")
        start = reader.line_num + 1
        for cells in reader:
            records.append((f"line {start}", cells))
            start = reader.line_num + 1
    except csv.Error as exc:
        msg = f"reviewed={path!r} is not valid CSV near line {reader.line_num}: {exc}."
        raise SlicefindValueError(msg) from None
    return header, records


def _frame_records(frame: pd.DataFrame) -> tuple[list[str], list[tuple[str, list[str]]]]:
    """Header and (where, cells) records of a DataFrame of reviews."""
    header = [str(c) for c in frame.columns]
    records = []
    for i, values in enumerate(frame.itertuples(index=False, name=None)):
        label = frame.index[i]
        where = f"frame row {i}" + ("" if label == i else f" (index {label!r})")
        records.append((where, list(values)))
    return header, records


def _parse_reviewed(text: str):
    """True, False, None (blank) or the string itself when unrecognised."""
    word = text.strip().lower()
    if word == "":
        return None
    if word in TRUE_WORDS:
        return True
    if word in FALSE_WORDS:
        return False
    return text


def _parse_row(text: str):
    """An int row number, or None when the text is not one."""
    try:
        value = float(text)
    except ValueError:
        return None
    if not np.isfinite(value) or not value.is_integer():
        return None
    return int(value)


def _raise_problems(source: str, problems: list[tuple[str, str]]) -> None:
    """One error listing up to MAX_LISTED problems (where: what), with the total count."""
    lines = [f"  {where}: {what}" for where, what in problems[:MAX_LISTED]]
    more = len(problems) - MAX_LISTED
    if more > 0:
        lines.append(f"  ... and {more} more")
    msg = (f"reviewed sheet {source} has {len(problems)} problem"
           f"{'s' if len(problems) != 1 else ''}; nothing was read:\n" + "\n".join(lines))
    raise SlicefindValueError(msg)


def read_reviews(reviewed, queue: Queue, *, trust_order: bool = False) -> pd.DataFrame:
    """Read and check a review sheet against the queue it was written from.

    Parameters
    ----------
    reviewed : str, os.PathLike or DataFrame
        A CSV sheet (UTF-8, with or without byte-order mark; ``,`` ``;`` or tab between
        cells) or a frame, with columns ``row``, ``reviewed`` and ``tags`` (``note`` and the
        queue's own columns optional; header case and spaces do not matter). ``reviewed``
        accepts 1/0, yes/no, y/n, true/false, x, or empty (not reviewed); a line with tags
        and an empty ``reviewed`` counts as reviewed. Tags are separated by ``;``.
        Lines with every cell empty are skipped. When the sheet has ``position``,
        ``stratum`` or ``id`` columns they must match the queue's (they catch a sheet
        sorted on one column only). A cell written with a leading ``'`` against formula
        injection (``'=x``, see `Queue.to_csv`) is read as it was (``=x``).
    queue : Queue
        The queue the sheet belongs to.
    trust_order : bool, default=False
        Skip the check for a ``tags`` column sorted on its own. Without it a sheet is
        refused when its tags, read down the sheet, are in sorted order with the blank
        cells all at one end *and* the queue's random order within strata makes that
        order unlikely (probability below 0.001): the usual trace of sorting one
        column of a spreadsheet without the others, which puts tags on the wrong rows.

    Returns
    -------
    DataFrame
        One line per row mentioned, sorted by row: ``row``, ``reviewed`` (bool), ``tags``
        (normalised category names, sorted, joined by ``;``), ``note``, ``explicit``
        (whether the line said anything: a reviewed mark, tags or a note), ``marked``
        (whether it said something about the review itself: a reviewed mark or tags;
        a line with a note only leaves the review as it was), ``where`` (the sheet line
        or lines). Identical duplicate lines are merged.

    Raises
    ------
    SlicefindValueError
        Listing every offending line when any line has a problem; nothing is read then.

    Examples
    --------
    >>> from slicefind.demodata import example_scan
    >>> from slicefind.review.queue import build_queue
    >>> queue = build_queue(example_scan(), budget=10, rest=2)
    >>> first = int(queue.table["row"][0])
    >>> sheet = pd.DataFrame({"row": [first], "reviewed": ["Yes "], "tags": ["Torn Label; faded ink"]})
    >>> print(read_reviews(sheet, queue)[["row", "reviewed", "tags"]].to_string(index=False))
     row  reviewed                 tags
     232      True faded ink;torn label
    """
    if not isinstance(queue, Queue):
        raise SlicefindTypeError(f"queue must be a Queue (from build_queue); got {type(queue).__name__}.")
    if isinstance(reviewed, pd.DataFrame):
        source = "(DataFrame)"
        header, records = _frame_records(reviewed)
    elif isinstance(reviewed, (str, os.PathLike)):
        source = repr(os.fspath(reviewed))
        header, records = _read_csv_records(os.fspath(reviewed))
    else:
        msg = f"reviewed must be a CSV path or a DataFrame; got {type(reviewed).__name__}."
        raise SlicefindTypeError(msg)

    keys = [_header_key(h) for h in header]
    repeated = sorted({k for k in keys if k and keys.count(k) > 1})
    if repeated:
        raise SlicefindValueError(f"reviewed sheet {source} has the column(s) {repeated} more than once.")
    missing = [c for c in _REQUIRED if c not in keys]
    if missing:
        shown = [h for h in header]
        msg = (f"reviewed sheet {source} lacks the column(s) {missing}; its columns are "
               f"{shown}. It needs row, reviewed and tags (see Queue.to_csv).")
        raise SlicefindValueError(msg)
    col = {k: i for i, k in enumerate(keys) if k}

    table = queue.table
    in_queue = dict(zip(table["row"].astype(int), range(len(table))))
    error_rows = set(int(r) for r in queue._rowdata.index)
    checks = [(name, table[name].map(_cell).tolist()) for name in ("position", "stratum", "id")
              if name in col and name in table.columns]

    problems: list[tuple[str, str]] = []
    parsed: dict[int, list[tuple[str, bool, tuple, str, bool, bool]]] = {}
    trace: list[tuple[str, int, str, str]] = []          # (where, row, stratum, tags) down the sheet
    strata_of = table["stratum"].astype(str).tolist()
    for where, cells in records:
        cells = [restore_formula_text(_cell(c)) for c in cells]
        if len(cells) > len(header):
            if any(cells[len(header):]):
                problems.append((where, f"has {len(cells)} cells but the header has {len(header)} "
                                        "(a note or tag with the delimiter in it needs quotes)"))
                continue
            cells = cells[:len(header)]
        cells += [""] * (len(header) - len(cells))
        if not any(cells):
            continue
        row_text = cells[col["row"]]
        row = _parse_row(row_text)
        if row is None:
            problems.append((where, f"row {row_text!r} is not a row number (unknown row)"))
            continue
        if row not in in_queue:
            why = ("an error row of the scan that is not queued yet" if row in error_rows
                   else "not an error row of the scan")
            problems.append((where, f"row {row} is not in the queue ({why})"))
            continue
        line = in_queue[row]
        bad_check = False
        for name, values in checks:
            given = cells[col[name]]
            if given and given != values[line]:
                problems.append((where, f"row {row} has {name} {values[line]!r} in the queue but "
                                        f"{given!r} in the sheet"))
                bad_check = True
        if bad_check:
            continue
        mark = _parse_reviewed(cells[col["reviewed"]])
        if isinstance(mark, str):
            problems.append((where, f"reviewed {mark!r} is not yes/no (use 1/0, yes/no, y/n, "
                                    "true/false, x or leave it empty)"))
            continue
        raw_tags = cells[col["tags"]]
        tags = tuple(sorted({t for t in map(normalize_tag, raw_tags.split(";")) if t})) if raw_tags else ()
        if UNTAGGED in tags:
            problems.append((where, f"the tag {UNTAGGED!r} is reserved for reviewed rows "
                                    "without tags; leave tags empty instead"))
            continue
        if mark is False and tags:
            problems.append((where, f"reviewed says no but tags are {raw_tags!r}; mark it "
                                    "reviewed or clear the tags"))
            continue
        for tag in tags:
            if "," in tag:
                warnings.warn(f"{where}: the tag {tag!r} holds a comma; tags are separated by "
                              "';' (silence with warnings.simplefilter).", stacklevel=3)
        note = cells[col["note"]] if "note" in col else ""
        done = bool(mark) or (mark is None and bool(tags))
        marked = mark is not None or bool(tags)
        explicit = marked or bool(note)
        trace.append((where, row, strata_of[line], ";".join(tags)))
        parsed.setdefault(row, []).append((where, done, tags, note, explicit, marked))

    if not trust_order and not problems:
        problems.extend(_sorted_tags_problem(trace))
    out = []
    for row in sorted(parsed):
        entries = parsed[row]
        states = {(done, tags, note) for _, done, tags, note, _, _ in entries}
        if len(states) > 1:
            described = "; ".join(
                f"{w}: reviewed={'yes' if d else 'no'}, tags={';'.join(t)!r}"
                + (f", note={n!r}" if n else "") for w, d, t, n, _, _ in entries)
            problems.append((", ".join(w for w, *_ in entries),
                             f"row {row} appears {len(entries)} times and the lines disagree ({described})"))
            continue
        done, tags, note = states.pop()
        out.append({"row": row, "reviewed": done, "tags": ";".join(tags), "note": note,
                    "explicit": any(e[4] for e in entries), "marked": any(e[5] for e in entries),
                    "where": ", ".join(w for w, *_ in entries)})
    if problems:
        _raise_problems(source, problems)
    frame = pd.DataFrame(out, columns=["row", "reviewed", "tags", "note", "explicit", "marked", "where"])
    return frame.astype({"row": np.int64, "reviewed": bool, "explicit": bool, "marked": bool,
                         "tags": "str", "note": "str", "where": "str"})


#: a tags column in sorted order is refused when a random order gives it less often than this
SORTED_TAGS_P = 0.001


def _sorted_tags_problem(trace: list[tuple[str, int, str, str]]) -> list[tuple[str, str]]:
    """The problem of a tags column sorted on its own, or nothing.

    ``trace`` is (where, row, stratum, tags) down the sheet. The queue lists each
    stratum's rows in random order, so the tagged lines of a stratum holding tags
    ``a`` (``m_a`` times), ``b`` (``m_b``), ... come out in sorted order with
    probability ``m_a! m_b! ... / k!``. The sheet is refused when its tags, blanks
    all at one end, are sorted (up or down) and the product of those probabilities over
    the strata, doubled for the two directions, is below `SORTED_TAGS_P`.
    """
    tagged = [i for i, (*_, tags) in enumerate(trace) if tags]
    if len(tagged) < 4 or tagged[-1] - tagged[0] + 1 != len(tagged):
        return []
    if tagged[0] != 0 and tagged[-1] != len(trace) - 1:
        return []                                        # blanks on both ends: not one sorted column
    values = [trace[i][3] for i in tagged]
    if len(set(values)) < 2:
        return []
    if values != sorted(values) and values != sorted(values, reverse=True):
        return []
    by_stratum: dict[str, list[str]] = {}
    for i in tagged:
        by_stratum.setdefault(trace[i][2], []).append(trace[i][3])
    log_p = log(2.0)
    for tags in by_stratum.values():
        log_p += sum(lgamma(m + 1) for m in Counter(tags).values()) - lgamma(len(tags) + 1)
    if log_p >= log(SORTED_TAGS_P):
        return []
    first, last_of = tagged[0], {}
    for i in tagged:                                     # the first tag change inside a stratum
        stratum, tags = trace[i][2], trace[i][3]
        if last_of.get(stratum, tags) != tags:
            first = i
            break
        last_of[stratum] = tags
    where, row, stratum, tags = trace[first]
    what = (f"the tags column is in sorted order on its own ({trace[tagged[0]][0]} to "
            f"{trace[tagged[-1]][0]}: {values[0]!r} ... {values[-1]!r}, blank cells at one end), "
            f"which the queue's random order gives with probability {np.exp(log_p):.1g}; it looks "
            f"sorted without the other columns, which moves tags onto other rows (first in doubt: "
            f"row {row}, stratum {stratum}, tags {tags!r}). Sort whole lines, or re-export the sheet; "
            "if the order is right, pass trust_order=True (slicefind tally --trust-order)")
    return [(where, what)]


# --- estimates ---------------------------------------------------------------------------


def _check_names(names, queue: Queue) -> dict[str, str]:
    """slice_id -> normalised category, each id a candidate stratum of the queue."""
    if names is None:
        return {}
    if not isinstance(names, Mapping):
        raise SlicefindTypeError(f"names must map slice ids to category names; got {type(names).__name__}.")
    candidates = [s for s in queue.strata["stratum"] if s != REST]
    out = {}
    for sid, name in names.items():
        if sid not in candidates:
            msg = (f"names has {sid!r}, which is not a queued candidate; the queue's candidates "
                   f"are {candidates}.")
            raise SlicefindValueError(msg)
        if not isinstance(name, str) or not normalize_tag(name):
            raise SlicefindValueError(f"names[{sid!r}] must be a non-empty category name; got {name!r}.")
        if normalize_tag(name) == UNTAGGED:
            raise SlicefindValueError(f"names[{sid!r}] = {name!r} is reserved; choose another name.")
        out[sid] = normalize_tag(name)
    return out


def _more_needed(k: int, n: int, N: int, threshold: float, low: float, high: float,
                 confidence_level: float) -> int:
    """Further reviews that would likely decide a candidate (Cochran with the threshold as p).

    The Wilson interval with finite-population correction excludes the threshold ``t``
    once ``n >= n0 / (1 + (n0 - 1)/N)`` with ``n0 = z^2 t (1-t) / (p - t)^2`` if the
    observed precision ``p`` holds; with no review yet, the best case (every review for,
    or every review against) gives the fewest that could decide it.
    """
    if low >= threshold or high < threshold or n >= N:
        return 0
    if n == 0:
        gap = max(threshold, 1.0 - threshold)
    else:
        gap = abs(k / n - threshold)
    if gap == 0.0:
        return N - n
    need = cochran_sample_size(threshold, gap, population=N, confidence_level=confidence_level)
    return int(min(N - n, max(1, int(np.ceil(need - 1e-9)) - n)))


def tally(queue: Queue, reviewed, *, names: Mapping[str, str] | None = None,
          threshold: float = 0.5, confidence_level: float = 0.95, trust_order: bool = False) -> Tally:
    """Estimate each category's share of all errors and decide each candidate.

    A category's share of errors is estimated stratum by stratum (the stratified
    estimator, Cochran 1977 ch. 5): ``share = sum_h W_h p_h`` with ``W_h`` the stratum's
    share of errors and ``p_h`` the tagged fraction of its reviewed rows. The interval
    (`slicefind.stats.stratified_interval`) is the union of MOVER over per-stratum Wilson
    limits with finite-population correction (Zou, Huang & Zhang 2009) and the score
    interval for a weighted sum of proportions; it stays in [0, 1], starts at 0 when nobody
    used the tag and ends at 1 when every review did, and covered the true share in about
    95% of simulated reviews (``benchmarks/bench_coverage.py``). ``share_se`` is the
    square root of Cochran's unbiased variance estimate with finite-population correction.
    A stratum with no review yet is unknown, not zero:
    the lower bound counts none of its errors, the upper bound all of them, and the
    estimate takes it to look like the reviewed strata. Headroom is the error rate if the
    category were fixed, ``error_rate * (1 - share)`` (common practice). A candidate's
    precision is the share of its stratum's reviewed rows tagged with its name; it is
    ``confirmed`` when the interval's lower end is at least ``threshold``, ``rejected``
    when its upper end is below, ``undecided`` otherwise, and ``more_needed`` is Cochran's
    sample size with finite-population correction (see `cochran_sample_size`).

    Parameters
    ----------
    queue : Queue
        The queue the reviews belong to.
    reviewed : str, os.PathLike or DataFrame
        The review sheet (see `read_reviews`).
    names : mapping, optional
        slice_id -> category. A candidate without one is named after the tag used most in
        its stratum (ties: alphabetical).
    threshold : float, default=0.5
        Precision that confirms a candidate.
    confidence_level : float, default=0.95
    trust_order : bool, default=False
        Passed to `read_reviews` (skip the check for a tags column sorted on its own).

    Returns
    -------
    Tally

    References
    ----------
    .. [1] W. G. Cochran, *Sampling Techniques*, 3rd ed., Wiley (1977), ch. 3-5 (recalled).
    .. [2] G. Y. Zou, W. Huang and X. Zhang, Comput. Stat. Data Anal. 53 (2009) 1080-1085
           (MOVER with Wilson limits for a linear function of proportions; recalled).

    Examples
    --------
    >>> from slicefind.demodata import example_scan
    >>> from slicefind.review.queue import build_queue
    >>> queue = build_queue(example_scan(), budget=30, rest=10)
    >>> sheet = queue.table[["row", "stratum"]].copy()
    >>> sheet["reviewed"] = "yes"
    >>> sheet["tags"] = sheet["stratum"].map({"R1": "smudged print", "R2": "ink smear", "rest": ""})
    >>> result = tally(queue, sheet)
    >>> print(result.categories[["category", "share", "share_low", "share_high"]].round(3).to_string(index=False))
         category  share  share_low  share_high
    smudged print  0.439      0.321       0.547
        ink smear  0.358      0.263       0.487
       (untagged)  0.203      0.151       0.354
    >>> print(result.slices[["slice_id", "name", "precision_low", "verdict"]].round(3).to_string(index=False))
    slice_id          name  precision_low   verdict
          R1 smudged print          0.732 confirmed
          R2     ink smear          0.735 confirmed
    """
    if not isinstance(queue, Queue):
        raise SlicefindTypeError(f"queue must be a Queue (from build_queue); got {type(queue).__name__}.")
    threshold = check_level("threshold", threshold)
    confidence_level = check_level("confidence_level", confidence_level)
    named = _check_names(names, queue)
    reviews = read_reviews(reviewed, queue, trust_order=trust_order)

    strata = list(queue.strata["stratum"])
    sizes = queue.strata["n_errors"].to_numpy(dtype=np.int64)
    stratum_of = dict(zip(queue.table["row"].astype(int), queue.table["stratum"]))
    done = reviews[reviews["reviewed"]]
    tag_sets = [tuple(t.split(";")) if t else () for t in done["tags"]]
    row_strata = [stratum_of[int(r)] for r in done["row"]]
    index = {s: i for i, s in enumerate(strata)}
    n_rev = np.zeros(len(strata), dtype=np.int64)
    for s in row_strata:
        n_rev[index[s]] += 1

    per_stratum: dict[str, np.ndarray] = {}
    for tags, s in zip(tag_sets, row_strata):
        for tag in tags:
            per_stratum.setdefault(tag, np.zeros(len(strata), dtype=np.int64))[index[s]] += 1
    for name in named.values():
        per_stratum.setdefault(name, np.zeros(len(strata), dtype=np.int64))
    untagged = np.zeros(len(strata), dtype=np.int64)
    for tags, s in zip(tag_sets, row_strata):
        if not tags:
            untagged[index[s]] += 1

    # candidate names: given, or the tag used most in the stratum
    slice_names: dict[str, tuple[str, str]] = {}
    source_of = dict(zip(queue.strata["stratum"], queue.strata["source"]))
    for s in strata:
        if s == REST:
            continue
        if s in named:
            slice_names[s] = (named[s], "names")
            continue
        if source_of.get(s) == LABEL_SOURCE:        # suspected label mistakes stand for one
            slice_names[s] = (WRONG_LABEL, "source")
            per_stratum.setdefault(WRONG_LABEL, np.zeros(len(strata), dtype=np.int64))
            continue
        counts = Counter(t for tags, rs in zip(tag_sets, row_strata) if rs == s for t in tags)
        if counts:
            best = min(counts.items(), key=lambda kv: (-kv[1], kv[0]))[0]
            slice_names[s] = (best, "tags")
        else:
            slice_names[s] = ("", "")

    total = int(sizes.sum())
    rate = queue.error_rate
    seen = n_rev > 0
    known_weight = float(sizes[seen].sum()) / total if total else 0.0
    design = _Design(sizes=sizes, n_reviewed=n_rev,
                     row_stratum=np.array([index[s] for s in row_strata], dtype=np.int64),
                     tag_sets=tuple(tag_sets), error_rate=rate, confidence_level=confidence_level)
    wrong = per_stratum.get(WRONG_LABEL, np.zeros(len(strata), dtype=np.int64))

    def _row(category, k):
        est, low, high, se = design.share(k)
        if category == WRONG_LABEL:
            fixed, f_low, f_high = est, low, high
        else:
            k_fix = design.counts(lambda tags: (category in tags if category != UNTAGGED else not tags)
                                  or WRONG_LABEL in tags)
            fixed, f_low, f_high, _ = design.share(k_fix)
        return {"category": category, "n_tagged": int(k.sum()), "share": est,
                "share_low": low, "share_high": high, "share_se": se,
                "est_errors": est * total, "est_errors_low": low * total,
                "est_errors_high": high * total,
                "headroom": rate * (1.0 - est),          # common practice: e * (1 - share)
                "headroom_low": rate * (1.0 - high), "headroom_high": rate * (1.0 - low),
                "headroom_corrected": rate * (1.0 - fixed),
                "headroom_corrected_low": rate * (1.0 - f_high),
                "headroom_corrected_high": rate * (1.0 - f_low),
                "slices": ";".join(s for s, (nm, _) in slice_names.items() if nm == category)}

    rows = [_row(c, k) for c, k in per_stratum.items() if c != WRONG_LABEL]
    rows.sort(key=lambda r: (-(r["share"] if np.isfinite(r["share"]) else 0.0), -r["n_tagged"],
                             r["category"]))
    if WRONG_LABEL in per_stratum:
        rows.append(_row(WRONG_LABEL, wrong))
    rows.append(_row(UNTAGGED, untagged))
    categories = pd.DataFrame(rows, columns=list(CATEGORY_COLUMNS))
    categories = categories.astype({"category": "str", "slices": "str", "n_tagged": np.int64})

    slice_rows = []
    described = queue.strata.set_index("stratum")["description"]
    for s in strata:
        if s == REST:
            continue
        i = index[s]
        name, source = slice_names[s]
        k = int(per_stratum[name][i]) if name else 0
        n, N = int(n_rev[i]), int(sizes[i])
        low, high = wilson_interval_fpc(k, n, N, confidence_level=confidence_level)
        precision = k / n if n else float("nan")
        verdict = "confirmed" if low >= threshold else ("rejected" if high < threshold else "undecided")
        slice_rows.append({"slice_id": s, "description": str(described[s]), "name": name,
                           "name_source": source, "n_errors": N, "n_reviewed": n, "n_named": k,
                           "precision": precision, "precision_low": low, "precision_high": high,
                           "verdict": verdict,
                           "more_needed": _more_needed(k, n, N, threshold, low, high,
                                                       confidence_level)})
    slices = pd.DataFrame(slice_rows, columns=list(SLICE_COLUMNS))
    slices = slices.astype({"slice_id": "str", "description": "str", "name": "str",
                            "name_source": "str", "verdict": "str", "n_errors": np.int64,
                            "n_reviewed": np.int64, "n_named": np.int64,
                            "more_needed": np.int64})

    order = [r["category"] for r in rows[:-1]]
    pos = {c: i for i, c in enumerate(order)}
    co = np.zeros((len(order), len(order)), dtype=np.int64)
    for tags in tag_sets:
        idx = [pos[t] for t in tags]
        for a in idx:
            for b in idx:
                co[a, b] += 1
    cooccurrence = pd.DataFrame(co, index=pd.Index(order, name="category"), columns=order)

    strata_table = queue.strata[["stratum", "description", "n_errors", "weight", "n_queued"]].copy()
    strata_table["n_reviewed"] = n_rev
    strata_table["n_untagged"] = untagged
    reviewed_rows = set(int(r) for r in done["row"])
    skipped = []
    for s in strata:
        queued = queue.rows(s)
        flags = np.array([int(r) in reviewed_rows for r in queued], dtype=bool)
        last = np.flatnonzero(flags)
        skipped.append(int((~flags[:last[-1]]).sum()) if last.size else 0)
    strata_table["n_skipped"] = np.asarray(skipped, dtype=np.int64)

    rest_weight = float(queue.strata.set_index("stratum")["weight"].get(REST, 0.0))
    w_share, w_low, w_high, _ = design.share(wrong)
    summary = {"n_errors": total, "n_rows": queue.n_rows, "error_rate": rate,
               "n_queued": len(queue.table), "n_reviewed": int(n_rev.sum()),
               "unreviewed_weight": 1.0 - known_weight, "rest_weight": rest_weight,
               "threshold": threshold, "confidence_level": confidence_level,
               "n_wrong_label": int(wrong.sum()), "wrong_label_share": w_share,
               "wrong_label_share_low": w_low, "wrong_label_share_high": w_high,
               "corrected_error_rate": rate * (1.0 - w_share),
               "corrected_error_rate_low": rate * (1.0 - w_high),
               "corrected_error_rate_high": rate * (1.0 - w_low),
               "method": "stratified estimator with finite-population correction; interval = "
                         "MOVER over per-stratum Wilson limits, united with the score interval; "
                         "unreviewed strata bounded by none/all"}
    return Tally(categories=categories, slices=slices, cooccurrence=cooccurrence,
                 strata=strata_table, reviews=reviews, summary=summary,
                 relabel=_relabel_rows(done, queue), _design=design)


def _relabel_rows(done: pd.DataFrame, queue: Queue) -> pd.DataFrame:
    """Reviewed rows tagged WRONG_LABEL, with their queue columns (RELABEL_COLUMNS)."""
    flagged = done[np.array([WRONG_LABEL in t.split(";") for t in done["tags"]], dtype=bool)]
    by_row = queue.table.set_index("row")
    out = pd.DataFrame({"row": flagged["row"].to_numpy(dtype=np.int64)})
    out["stratum"] = [str(by_row.at[r, "stratum"]) for r in out["row"]]
    for column in ("id", "label", "prediction"):
        out[column] = ([by_row.at[r, column] for r in out["row"]] if column in by_row.columns
                       else [""] * len(out))
    out["tags"] = [";".join(t for t in tags.split(";") if t != WRONG_LABEL) for tags in flagged["tags"]]
    out["note"] = flagged["note"].to_numpy()
    return out[list(RELABEL_COLUMNS)].reset_index(drop=True)
