"""One self-contained HTML report: summary, ranked slices, map, exemplars, tally.

Everything is embedded (figures as base64 PNG drawn with matplotlib, thumbnails as
data URIs), so the file opens offline and can be mailed around. `render_report` is
pure (returns the HTML text); `write_report` writes it atomically.
"""
from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import os
import tempfile
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from slicefind.decision import decision_paragraphs
from slicefind.discovery.describe import label_column, prediction_column
from slicefind.review.tally import WRONG_LABEL
from slicefind.discovery.text import mark_terms
from slicefind.values import value_text

__all__ = ["ReportInputs", "render_report", "write_report", "CAUTIONS", "TEXT_CAUTION", "MAX_SLICES_SHOWN",
           "PALETTE"]

#: slices listed in the table (all passing slices are in slices.csv)
MAX_SLICES_SHOWN = 40
#: slices whose exemplars and map outlines are shown
MAX_SLICES_DETAILED = 8
#: our colours: slate for rows, vermilion for errors, then one per highlighted slice
PALETTE = ("#3b6e8f", "#d1495b", "#edae49", "#00798c", "#66a182", "#8d6a9f", "#2e4057",
           "#c17c74", "#a3a948", "#5f0f40")
_MAX_IMAGE_BYTES = 400_000

CAUTIONS = (
    "A slice is a lead for investigation, not proof of cause: rows that share a condition "
    "may err for a reason the condition only travels with.",
    "Slices defined by people's attributes (age, sex, origin, language, ...) call for a "
    "fairness review of their own; a higher error rate there is a finding to examine with "
    "the people affected, not a number to optimise away.",
    "Small samples give wide intervals, and the intervals here say so: read the bounds, "
    "not only the estimates.",
)

#: shown when the report quotes a text column
TEXT_CAUTION = ("This report quotes rows of a text column as they were written, and messages often hold "
                "names, addresses and numbers: share it only as far as you would share the data.")


@dataclass(frozen=True)
class ReportInputs:
    """What the report shows besides the slice table (all optional)."""

    map_xy: np.ndarray | None = None                  # (n_analysed, 2) coordinates
    descriptions: Mapping[str, Any] = field(default_factory=dict)   # slice_id -> SliceDescription
    images: np.ndarray | None = None                  # (n_input, h, w) pixel arrays
    image_paths: Sequence[str] | None = None          # per input row, a path to an image file
    texts: Sequence[str] | None = None                # per input row, text to show
    tally: Any = None                                 # a tally.Tally
    simulated_review: bool = False
    title: str = "slicefind report"
    notes: Sequence[str] = ()
    compare: Any = None                               # a compare.Comparison


def _png(fig) -> str:
    """A matplotlib figure as a data URI (the figure is closed)."""
    import matplotlib.pyplot as plt

    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110, bbox_inches="tight")
    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


def _thumbnail_from_pixels(pixels: np.ndarray) -> str:
    """A small grey PNG data URI of one image array (upscaled without smoothing)."""
    plt = _pyplot()
    pixels = np.asarray(pixels, dtype=np.float64)
    scale = max(1, 64 // max(pixels.shape[:2]))
    big = np.kron(pixels, np.ones((scale, scale))) if pixels.ndim == 2 else pixels
    buffer = io.BytesIO()
    plt.imsave(buffer, big, cmap="gray_r", format="png")
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _thumbnail_from_path(path: str) -> str | None:
    """A data URI of an image file, or None when unreadable or too large."""
    kinds = {".png": "image/png", ".jpg": "image/jpeg", ".jpeg": "image/jpeg", ".gif": "image/gif",
             ".webp": "image/webp", ".bmp": "image/bmp"}
    mime = kinds.get(os.path.splitext(str(path))[1].lower())
    try:
        if mime is None or os.path.getsize(path) > _MAX_IMAGE_BYTES:
            return None
        with open(path, "rb") as handle:
            return f"data:{mime};base64," + base64.b64encode(handle.read()).decode("ascii")
    except OSError:
        return None


def _interval_bar(rate: float, low: float, high: float, overall: float, width: int = 140) -> str:
    """Inline SVG: the error rate as a dot with its interval, the overall rate as a tick."""
    def x(v):
        return 4 + (width - 8) * min(1.0, max(0.0, v))

    return (f'<svg class="bar" width="{width}" height="14" role="img" '
            f'aria-label="error rate {rate:.1%}, interval {low:.1%} to {high:.1%}">'
            f'<line x1="4" y1="7" x2="{width - 4}" y2="7" stroke="#d8dee4"/>'
            f'<line x1="{x(overall):.1f}" y1="1" x2="{x(overall):.1f}" y2="13" stroke="{PALETTE[0]}"/>'
            f'<line x1="{x(low):.1f}" y1="7" x2="{x(high):.1f}" y2="7" stroke="{PALETTE[1]}" stroke-width="3"/>'
            f'<circle cx="{x(rate):.1f}" cy="7" r="3.5" fill="{PALETTE[1]}"/></svg>')


def _map_figure(found, map_xy: np.ndarray, top_ids: Sequence[str]) -> str:
    """The 2-D map: rows in slate, errors in vermilion, top slices outlined."""
    plt = _pyplot()
    table = found.eval_table
    fig, ax = plt.subplots(figsize=(7.5, 6.0))
    errors = table.errors
    ax.scatter(map_xy[~errors, 0], map_xy[~errors, 1], s=3, c=PALETTE[0], alpha=0.25,
               linewidths=0, label="correct")
    ax.scatter(map_xy[errors, 0], map_xy[errors, 1], s=5, c=PALETTE[1], alpha=0.7,
               linewidths=0, label="error")
    position = {int(p): i for i, p in enumerate(table.positions)}
    for k, sid in enumerate(top_ids):
        rows = np.array([position[int(r)] for r in found.rows(sid) if int(r) in position], dtype=int)
        if rows.size == 0:
            continue
        colour = PALETTE[2 + k % (len(PALETTE) - 2)]
        pts = map_xy[rows]
        ax.scatter(pts[:, 0], pts[:, 1], s=14, facecolors="none", edgecolors=colour, linewidths=0.6,
                   alpha=0.8, label=sid)
        centre = np.median(pts, axis=0)
        ax.annotate(sid, centre, fontsize=10, fontweight="bold", color=colour,
                    bbox=dict(boxstyle="round,pad=0.2", fc="white", ec=colour, alpha=0.85))
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_title("Embedding map (2-D): errors and the top slices")
    ax.legend(loc="best", fontsize=8, markerscale=2, frameon=True)
    return _png(fig)


def _category_figure(categories: pd.DataFrame, error_rate: float) -> str:
    """Share of errors per category with its interval, and the headroom it leaves."""
    plt = _pyplot()
    cats = categories.reset_index(drop=True)
    n = len(cats)
    fig, ax = plt.subplots(figsize=(7.5, 0.55 * n + 1.4))
    y = np.arange(n)[::-1]
    share = cats["share"].to_numpy(dtype=float)
    low = cats["share_low"].to_numpy(dtype=float)
    high = cats["share_high"].to_numpy(dtype=float)
    ax.barh(y, share, color=PALETTE[3], alpha=0.85, height=0.6)
    ax.errorbar(share, y, xerr=[np.maximum(share - low, 0), np.maximum(high - share, 0)], fmt="none",
                ecolor=PALETTE[6], capsize=4, lw=1.2)
    for yi, s, h, hr in zip(y, share, high, cats["headroom"].to_numpy(dtype=float)):
        ax.text(min(1.0, h) + 0.01, yi, f"{s:.0%}  (fixed: error rate {hr:.2%})", va="center",
                fontsize=8)
    ax.set_yticks(y, labels=[str(c) for c in cats["category"]])
    ax.set_xlim(0, 1.25)
    ax.set_xlabel(f"share of all errors (95% interval); overall error rate {error_rate:.2%}")
    ax.set_title("Error categories from the review")
    return _png(fig)


def _fmt(value, kind: str) -> str:
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return ""
    if kind == "pct":
        return f"{value:.1%}"
    if kind == "p":
        return f"{value:.2g}"
    if kind == "int":
        return f"{int(value):,}"
    if kind == "f1":
        return f"{value:.1f}"
    if kind == "f2":
        return f"{value:.2f}"
    return html.escape(str(value))


def _table(frame: pd.DataFrame, spec: Sequence[tuple[str, str, str]], css: str = "") -> str:
    """An HTML table from `frame` with (column, header, format) columns."""
    head = "".join(f"<th>{html.escape(h)}</th>" for _, h, _ in spec)
    body = []
    for _, row in frame.iterrows():
        cells = "".join(f"<td class='{k}'>{_fmt(row.get(c), k)}</td>" for c, _, k in spec)
        body.append(f"<tr>{cells}</tr>")
    return f"<table class='{css}'><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _term_list(description, top: int = 8) -> list[str]:
    """The distinctive terms of a SliceDescription, [] when it has none."""
    terms = getattr(description, "terms", None)
    return [] if terms is None or not len(terms) else [str(t) for t in terms["term"].head(top)]


def marked_html(text, terms: Sequence[str], limit: int = 280) -> str:
    """`text` (untrusted) as escaped HTML, cut to `limit` characters, its `terms` in ``<mark>``.

    Examples
    --------
    >>> marked_html("<b>Fwd</b>: lost", ["fwd"])
    '&lt;b&gt;<mark>Fwd</mark>&lt;/b&gt;: lost'
    """
    return "".join(f"<mark>{html.escape(piece)}</mark>" if marked else html.escape(piece)
                   for marked, piece in mark_terms(text, terms, limit=limit))


def _exemplar_cells(found, description, inputs: ReportInputs) -> str:
    """Thumbnails or text snippets of one slice's exemplars."""
    table = found.eval_table
    cells = []
    for _, ex in description.exemplars.iterrows():
        row = int(ex["row"])
        visual = ""
        if inputs.images is not None and row < len(inputs.images):
            visual = f"<img class='thumb' alt='row {row}' src='{_thumbnail_from_pixels(inputs.images[row])}'>"
        elif inputs.image_paths is not None and row < len(inputs.image_paths):
            uri = _thumbnail_from_path(inputs.image_paths[row])
            visual = (f"<img class='thumb' alt='row {row}' src='{uri}'>" if uri else
                      f"<div class='missing'>{html.escape(str(inputs.image_paths[row]))}</div>")
        elif inputs.texts is not None and row < len(inputs.texts):
            visual = f"<div class='snippet'>{marked_html(inputs.texts[row], _term_list(description))}</div>"
        ident = ""
        if table.id_column and table.id_column in ex:
            ident = f"{html.escape(str(ex[table.id_column]))} · "
        label = ""
        if ex.get("label") is not None and not pd.isna(ex.get("label")):
            label = f"{html.escape(str(ex['label']))} → {html.escape(str(ex['prediction']))}"
        mark = "error" if bool(ex["error"]) else "correct"
        kind = " text" if visual.startswith("<div class='snippet'>") else ""
        cells.append(f"<figure class='ex {mark}{kind}'>{visual}<figcaption>{ident}row {row}<br>"
                     f"{label} <span class='{mark}'>{mark}</span></figcaption></figure>")
    return "".join(cells)


_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,sans-serif;margin:24px auto;max-width:1180px;
color:#1f2933;line-height:1.4;padding:0 16px}
h1{font-size:1.6em;margin-bottom:.2em} h2{margin-top:1.6em;border-bottom:2px solid #3b6e8f;
padding-bottom:4px;font-size:1.25em} .sub{color:#52606d}
.cards{display:flex;gap:14px;flex-wrap:wrap;margin:12px 0}
.card{background:#f0f4f8;border-radius:8px;padding:10px 16px;min-width:140px}
.card b{display:block;font-size:1.45em;color:#2e4057}
.caution{background:#fff8e6;border-left:4px solid #edae49;padding:8px 14px;margin:12px 0}
.simulated{background:#fde8ea;border-left:4px solid #d1495b;padding:8px 14px;font-weight:600}
table{border-collapse:collapse;width:100%;font-size:.88em;margin:8px 0}
th{background:#2e4057;color:#fff;text-align:left;padding:5px 6px;position:sticky;top:0}
td{border-bottom:1px solid #e4e7eb;padding:4px 6px;vertical-align:top}
td.int,td.pct,td.p,td.f1,td.f2{text-align:right;font-variant-numeric:tabular-nums}
tr:nth-child(even) td{background:#fafbfc} .small{font-size:.8em;color:#52606d}
.slice{border:1px solid #d9e2ec;border-radius:8px;padding:10px 14px;margin:12px 0}
.ex{display:inline-block;margin:4px;text-align:center;font-size:.75em;width:108px;vertical-align:top}
.ex.text{width:280px}
.thumb{width:64px;height:64px;image-rendering:pixelated;border:1px solid #bcccdc}
.ex .error{color:#d1495b;font-weight:600} .ex .correct{color:#3b6e8f}
.snippet{font-size:.85em;text-align:left;background:#f5f7fa;padding:4px;max-height:90px;overflow:auto}
.snippet mark{background:#fde9a9;padding:0 1px}
.verdict-confirmed{color:#00798c;font-weight:700} .verdict-rejected{color:#d1495b;font-weight:700}
.verdict-undecided{color:#8d6a9f;font-weight:700} img.figure{max-width:100%}
"""

_CHECK_SCRIPT = """
<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var ok = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0; }).length;
  document.body.setAttribute('data-images', String(imgs.length));
  document.body.setAttribute('data-images-decoded', String(ok));
});
</script>
"""


def render_report(found, inputs: ReportInputs | None = None) -> str:
    """The report's HTML text for a `find_slices` result (and optionally a tally)."""
    inputs = inputs or ReportInputs()
    table = found.eval_table
    slices = found.table.head(MAX_SLICES_SHOWN).copy()
    overall = found.error_rate
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
             f"<title>{html.escape(inputs.title)}</title><style>{_CSS}</style></head><body>"]
    stamp = _dt.datetime.now().strftime("%Y-%m-%d %H:%M")
    parts.append(f"<h1>{html.escape(inputs.title)}</h1><p class='sub'>written {stamp} · error "
                 f"definition: {html.escape(str(table.error_definition))}</p>")
    if inputs.simulated_review:
        parts.append("<p class='simulated' id='simulated'>The reviews in this report were made by a "
                     "SIMULATED reviewer (the built-in demo tags each example from the planted "
                     "ground truth). With real data, a person reviews the queue.</p>")
    cards = [("rows analysed", f"{found.n_rows:,}"), ("errors", f"{found.n_errors:,}"),
             ("error rate", f"{overall:.2%}"), ("slices passing FDR", f"{len(found.table):,}"),
             ("candidates tested", f"{len(found.tested):,}")]
    parts.append("<div class='cards'>" + "".join(f"<div class='card'><b>{v}</b>{k}</div>"
                                                 for k, v in cards) + "</div>")
    for note in inputs.notes:
        parts.append(f"<p class='small'>{html.escape(note)}</p>")
    cautions = CAUTIONS + ((TEXT_CAUTION,) if inputs.texts is not None else ())
    parts.append("<div class='caution'><b>Read with care.</b><ul>" +
                 "".join(f"<li>{html.escape(c)}</li>" for c in cautions) + "</ul></div>")

    parts.append("<h2 id='slices'>Slices, ranked by excess errors</h2>")
    if len(slices):
        slices["interval"] = ""
        rows_html = []
        for _, s in slices.iterrows():
            bar = _interval_bar(float(s["error_rate"]), float(s["ci_low"]), float(s["ci_high"]), overall)
            extra = []
            if s.get("aliases"):
                extra.append(f"same rows as: {html.escape(str(s['aliases']))}")
            if s.get("folded"):
                extra.append(f"explains: {html.escape(str(s['folded']))}")
            rows_html.append(
                f"<tr><td><b>{html.escape(str(s['slice_id']))}</b></td><td>{html.escape(str(s['source']))}</td>"
                f"<td>{html.escape(str(s['description']))}"
                + (f"<div class='small'>{'<br>'.join(extra)}</div>" if extra else "") +
                f"</td><td class='int'>{int(s['n_rows']):,}</td><td class='int'>{int(s['n_errors']):,}</td>"
                f"<td class='pct'>{s['error_rate']:.1%}<br><span class='small'>{s['ci_low']:.1%}–{s['ci_high']:.1%}</span></td>"
                f"<td>{bar}</td><td class='pct'>{s['error_share']:.1%}</td><td class='f1'>{s['excess_errors']:.1f}</td>"
                f"<td class='f2'>{s['lift']:.2f}</td><td class='p'>{s['q_value']:.2g}</td></tr>")
        parts.append("<table id='slice-table'><thead><tr><th>id</th><th>source</th><th>description</th>"
                     "<th>rows</th><th>errors</th><th>error rate</th><th>95% interval (tick: overall)</th>"
                     "<th>share of errors</th><th>excess errors</th><th>lift</th><th>q-value</th></tr></thead>"
                     "<tbody>" + "".join(rows_html) + "</tbody></table>")
        if len(found.table) > MAX_SLICES_SHOWN:
            parts.append(f"<p class='small'>{len(found.table) - MAX_SLICES_SHOWN} more in slices.csv.</p>")
    else:
        parts.append("<p>No slice passes the false discovery rate: at this size, no group of rows "
                     "errs detectably more often than the rest. The tally of a random review "
                     "sample of errors (the <i>rest</i> stratum) is still meaningful.</p>")

    conf = found.confusions(top=10)
    if not conf.empty:
        label_name, prediction_name = label_column(table), prediction_column(table)
        parts.append("<h2 id='confusions'>Confusions</h2><p class='small'>The commonest "
                     f"{html.escape(label_name)} → {html.escape(prediction_name)} pairs among all "
                     f"errors. A class that carries many errors is also a candidate slice "
                     f"(<code>{html.escape(label_name)} = …</code>) when the label is mined.</p>")
        conf = conf.assign(label=conf["label"].map(value_text), prediction=conf["prediction"].map(value_text))
        parts.append(_table(conf, [("label", label_name, "text"), ("prediction", prediction_name, "text"),
                                   ("n_errors", "errors", "int"), ("error_share", "share of errors", "pct"),
                                   ("n_class_rows", f"rows with this {label_name}", "int"),
                                   ("class_rate", "of them read so", "pct")],
                            css="confusions"))

    top_ids = list(found.table["slice_id"].head(MAX_SLICES_DETAILED))
    parts.append("<h2 id='map'>Map</h2>")
    if inputs.map_xy is not None and len(inputs.map_xy) == found.n_rows:
        parts.append(f"<img class='figure' id='map-figure' alt='embedding map' "
                     f"src='{_map_figure(found, np.asarray(inputs.map_xy), top_ids)}'>")
    else:
        parts.append("<p class='small'>No embeddings were given, so there is no map.</p>")

    if inputs.descriptions:
        parts.append("<h2 id='exemplars'>What the top slices look like</h2>")
        for sid in top_ids:
            desc = inputs.descriptions.get(sid)
            if desc is None:
                continue
            conf = ", ".join(f"{value_text(r['label'])} → {value_text(r['prediction'])} ({int(r['n_errors'])})"
                             for _, r in desc.confusions.head(3).iterrows()) if len(desc.confusions) else ""
            names = f"{label_column(found.eval_table)} → {prediction_column(found.eval_table)}"
            parts.append(f"<div class='slice' id='slice-{html.escape(sid)}'><b>{html.escape(sid)}</b> "
                         f"{html.escape(desc.summary)}"
                         + (f"<div class='small'>commonest confusions ({html.escape(names)}): "
                            f"{html.escape(conf)}</div>" if conf else "")
                         + (f"<div class='small terms'>distinctive words (marked below): "
                            f"{html.escape(', '.join(_term_list(desc)))}</div>" if _term_list(desc) else "")
                         + f"<div>{_exemplar_cells(found, desc, inputs)}</div></div>")

    result = inputs.tally
    if result is not None:
        parts.append("<h2 id='tally'>Review tally</h2>")
        summary = result.summary
        parts.append(f"<p>{int(summary.get('n_reviewed', 0))} of {int(summary.get('n_queued', 0))} "
                     f"queued errors reviewed. Shares are of <i>all</i> {found.n_errors:,} errors, "
                     "estimated stratum by stratum; strata not reviewed yet widen the intervals.</p>")
        cats = result.categories
        if len(cats):
            parts.append(f"<img class='figure' id='category-chart' alt='category chart' "
                         f"src='{_category_figure(cats, overall)}'>")
            parts.append(_table(cats, [("category", "category", "text"), ("n_tagged", "reviewed with it", "int"),
                                       ("share", "share of errors", "pct"), ("share_low", "low", "pct"),
                                       ("share_high", "high", "pct"), ("est_errors", "est. errors", "f1"),
                                       ("headroom", "error rate if fixed", "pct")], "categories"))
        if len(result.slices):
            verdicts = result.slices.copy()
            parts.append("<h2 id='verdicts'>Verdicts on the proposed slices</h2>")
            rows_html = []
            for _, v in verdicts.iterrows():
                rows_html.append(
                    f"<tr><td><b>{html.escape(str(v['slice_id']))}</b></td><td>{html.escape(str(v.get('name', '')))}</td>"
                    f"<td>{html.escape(str(v.get('description', '')))}</td><td class='int'>{int(v['n_reviewed'])}</td>"
                    f"<td class='pct'>{_fmt(v['precision'], 'pct')}</td>"
                    f"<td class='pct'>{_fmt(v['precision_low'], 'pct')}–{_fmt(v['precision_high'], 'pct')}</td>"
                    f"<td class='verdict-{html.escape(str(v['verdict']))}'>{html.escape(str(v['verdict']))}</td>"
                    f"<td class='int'>{_fmt(v['more_needed'], 'int')}</td></tr>")
            parts.append("<table id='verdict-table'><thead><tr><th>id</th><th>name</th><th>description</th>"
                         "<th>reviewed</th><th>precision</th><th>95% interval</th><th>verdict</th>"
                         "<th>more to review</th></tr></thead><tbody>" + "".join(rows_html) +
                         "</tbody></table>")
        parts.append(_decision_section(result))

    if inputs.compare is not None:
        parts.append(_compare_section(inputs.compare))
    if table.skipped:
        parts.append("<h2 id='skipped'>Columns not mined</h2><ul class='small'>" +
                     "".join(f"<li><b>{html.escape(str(c))}</b>: {html.escape(str(r))}</li>"
                             for c, r in table.skipped.items()) + "</ul>")
    params = ", ".join(f"{k}={v}" for k, v in found.params.items() if k not in ("exclude",))
    parts.append(f"<p class='small'>Options: {html.escape(params)}</p>")
    parts.append(_CHECK_SCRIPT + "</body></html>")
    return "".join(parts)


def _decision_section(result) -> str:
    """Wrong labels, pairs of categories fixed together, and the plain-words paragraphs."""
    parts = []
    summary = result.summary
    if summary.get("n_wrong_label"):
        parts.append(
            f"<h2 id='wrong-labels'>Wrong labels</h2><p>{int(summary['n_wrong_label'])} reviewed errors "
            f"were tagged <b>{html.escape(WRONG_LABEL)}</b>: {_fmt(summary['wrong_label_share'], 'pct')} of "
            f"errors ({_fmt(summary['wrong_label_share_low'], 'pct')}–"
            f"{_fmt(summary['wrong_label_share_high'], 'pct')}). With them corrected the error rate would be "
            f"{_fmt(summary['corrected_error_rate'], 'pct')} ({_fmt(summary['corrected_error_rate_low'], 'pct')}–"
            f"{_fmt(summary['corrected_error_rate_high'], 'pct')}) instead of {_fmt(summary['error_rate'], 'pct')}. "
            "The rows are listed in relabel.csv. A review of errors does not see wrong labels the "
            "model agreed with.</p>")
    if len(result.user_categories()) >= 2:
        pairs = result.pairs(top=4)
        parts.append("<h2 id='together'>Categories fixed together</h2><p class='small'>One error may "
                     "carry several tags, so fixing two categories removes the errors tagged with "
                     "either: the union, not the sum of their shares.</p>")
        parts.append(_table(pairs, [("category_a", "category", "text"), ("category_b", "and", "text"),
                                    ("share", "share of errors", "pct"), ("share_low", "low", "pct"),
                                    ("share_high", "high", "pct"), ("sum_of_shares", "sum of shares", "pct"),
                                    ("overlap", "overlap", "pct"),
                                    ("headroom", "error rate if both fixed", "pct")], "pairs"))
    parts.append("<h2 id='plain-words'>In plain words</h2>" +
                 "".join(f"<p>{html.escape(p)}</p>" for p in decision_paragraphs(result)))
    return "".join(parts)


def write_report(path, found, inputs: ReportInputs | None = None) -> str:
    """Write the report to `path` atomically (a temporary file, then a rename); returns the path."""
    text = render_report(found, inputs)
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    os.makedirs(folder, exist_ok=True)
    handle, temp = tempfile.mkstemp(dir=folder, prefix=".report-", suffix=".html")
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as out:
            out.write(text)
        os.replace(temp, path)
    except BaseException:
        if os.path.exists(temp):
            os.unlink(temp)
        raise
    return path


def _compare_section(comparison) -> str:
    """The before/after section: summary, figure, table with regressions highlighted, new slices."""
    def figure(lines: pd.DataFrame) -> str:
        """Error rate before (slate) and after (teal) with Wilson intervals, one row per line;
        regressions labelled in vermilion, improvements in teal."""
        plt = _pyplot()
        n = len(lines)
        fig, ax = plt.subplots(figsize=(7.5, 0.42 * n + 1.5))
        y = np.arange(n)[::-1].astype(float)
        for column, shift, colour, marker, label in (("error_rate_before", 0.14, PALETTE[0], "o", "before"),
                                                     ("error_rate_after", -0.14, PALETTE[3], "s", "after")):
            rate = lines[column].to_numpy(dtype=float)
            low = lines[column + "_low"].to_numpy(dtype=float)
            high = lines[column + "_high"].to_numpy(dtype=float)
            ax.errorbar(rate, y + shift, xerr=[np.maximum(rate - low, 0), np.maximum(high - rate, 0)],
                        fmt=marker, ms=4.5, color=colour, ecolor=colour, capsize=3, lw=1.2, label=label)
        labels = []
        for _, line in lines.iterrows():
            if line["kind"] == "category":
                text = f"category: {line['category']}"
            elif line["kind"] == "overall":
                text = "overall"
            else:
                text = str(line["slice_id"]) + (f" ({line['category']})" if line["category"] else "")
            labels.append(text[:40])
        ax.set_yticks(y, labels=labels)
        for tick, (_, line) in zip(ax.get_yticklabels(), lines.iterrows()):
            if line["regression"]:
                tick.set_color(PALETTE[1])
                tick.set_fontweight("bold")
            elif line["improved"]:
                tick.set_color(PALETTE[3])
        top = float(np.nanmax(lines[["error_rate_before_high", "error_rate_after_high"]].to_numpy(dtype=float)))
        ax.set_xlim(-0.01, min(1.0, top * 1.08 + 0.02))
        ax.xaxis.set_major_formatter(plt.FuncFormatter(lambda v, _: f"{v:.0%}"))
        ax.grid(axis="x", color="#e4e7eb", lw=0.8)
        ax.set_xlabel(f"error rate with {level:.0%} Wilson interval (labels: vermilion = regression, "
                      "teal = improved)")
        ax.set_title("Before and after, on the same rows")
        ax.legend(loc="lower right", fontsize=8, frameon=True)
        return _png(fig)

    shown_max = 30                       # lines drawn and listed (all are in compare.csv)
    table = comparison.table
    o = comparison.overall
    fdr = comparison.params.get("fdr", 0.05)
    level = comparison.params.get("confidence_level", 0.95)
    n_better = int(table["improved"].iloc[1:].sum())
    n_worse = int(table["regression"].iloc[1:].sum())
    verdict = ("better" if o["improved"] else "worse" if o["regression"] else "not detectably different")
    parts = ["<h2 id='compare'>Before and after</h2>"]
    parts.append(
        f"<p id='compare-summary'>On the same {int(o['n_rows']):,} rows the error rate went from "
        f"<b>{o['error_rate_before']:.2%}</b> to <b>{o['error_rate_after']:.2%}</b> "
        f"({100 * o['change']:+.2f} points: {int(o['n_fixed']):,} rows fixed, {int(o['n_broken']):,} "
        f"broken; McNemar's exact test p = {o['p_value']:.2g}, overall {verdict}). "
        f"{n_better} slice or category line{'s' if n_better != 1 else ''} improved and "
        f"<b>{n_worse}</b> regressed at false discovery rate {fdr} (Benjamini–Hochberg over the "
        f"slices and categories). After: {html.escape(str(comparison.params.get('after', '')))}.</p>")
    if n_worse:
        names = ", ".join(html.escape(str(r["slice_id"] or r["category"])) for _, r in
                          table.iloc[1:][table["regression"].iloc[1:]].iterrows())
        parts.append(f"<p class='caution' id='compare-regressions'><b>Regressions</b> (significantly "
                     f"worse after, whatever the total did): {names}.</p>")
    shown = table.head(shown_max + 1)
    parts.append(f"<img class='figure' id='compare-figure' alt='before and after error rates' "
                 f"src='{figure(shown)}'>")
    rows_html = []
    for _, r in shown.iterrows():
        style = (" style='background:#fde8ea'" if r["regression"] else
                 " style='background:#e6f4f1'" if r["improved"] else "")
        flag = ("<b style='color:#d1495b'>regression</b>" if r["regression"] else
                "<span style='color:#00798c'>improved</span>" if r["improved"] else "")
        name = (f"category: {r['category']}" if r["kind"] == "category" else
                f"{r['slice_id']}" + (f" ({r['category']})" if r["category"] else ""))
        cells = (f"<td><b>{html.escape(name)}</b></td><td>{html.escape(str(r['description']))}</td>"
                 f"<td class='int'>{int(r['n_rows']):,}</td>"
                 f"<td class='pct'>{r['error_rate_before']:.1%}<br><span class='small'>"
                 f"{r['error_rate_before_low']:.1%}–{r['error_rate_before_high']:.1%}</span></td>"
                 f"<td class='pct'>{r['error_rate_after']:.1%}<br><span class='small'>"
                 f"{r['error_rate_after_low']:.1%}–{r['error_rate_after_high']:.1%}</span></td>"
                 f"<td class='f1'>{100 * r['change']:+.1f}</td><td class='int'>{int(r['n_fixed']):,}</td>"
                 f"<td class='int'>{int(r['n_broken']):,}</td><td class='p'>{r['p_value']:.2g}</td>"
                 f"<td class='p'>{r['q_value']:.2g}</td><td>{flag}</td>")
        klass = "regression" if r["regression"] else "improved" if r["improved"] else ""
        rows_html.append(f"<tr class='{klass}'{style}>{cells}</tr>")
    parts.append("<table id='compare-table'><thead><tr><th>line</th><th>description</th><th>rows</th>"
                 f"<th>before ({level:.0%})</th><th>after ({level:.0%})</th><th>change (points)</th>"
                 "<th>fixed</th><th>broken</th><th>p</th><th>q</th><th></th></tr></thead><tbody>"
                 + "".join(rows_html) + "</tbody></table>")
    if len(table) > len(shown):
        parts.append(f"<p class='small'>{len(table) - len(shown)} more lines in compare.csv.</p>")
    new = comparison.new_slices
    if len(new):
        parts.append("<h3 id='compare-new'>New trouble in the errors after</h3><p class='small'>Slices "
                     "of the after model's errors: <i>new</i> when no earlier slice overlaps them "
                     "(Jaccard &ge; 0.5), <i>worse</i> when they overlap one and got significantly "
                     "worse.</p>")
        parts.append(_table(new, [("slice_id", "id in the after scan", "text"), ("status", "status", "text"),
                                  ("description", "description", "text"), ("n_rows", "rows", "int"),
                                  ("error_rate_before", "before", "pct"),
                                  ("error_rate_after", "after", "pct"), ("q_value", "q", "p"),
                                  ("closest_slice", "closest earlier slice", "text"),
                                  ("jaccard", "Jaccard", "f2")], "compare-new"))
    else:
        parts.append(f"<p class='small'>After scan: {html.escape(str(comparison.params.get('rescan', '')))}"
                     "; no new or significantly worse slice listed.</p>")
    return "".join(parts)
