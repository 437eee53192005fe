"""The numbers that the CLI prints and the report shows are those of the files they come from.

One seeded depot table goes through ``scan``, ``queue`` and ``tally`` in-process. Every number
printed is parsed back and compared with slices.csv, tally.csv and verdicts.csv at the
precision it was printed with (within half a unit of its last digit), so a printed number
taken from the wrong column, or rounded wrongly, fails here. The files' counts are in turn
recounted from the generated table and the filled sheet.
"""
import contextlib
import html
import io
import os
import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

from slicefind.cli import main

PCT = r"\d+(?:\.\d+)?%"
TAGS = {  # what the reviewer writes, cycled over each stratum's rows of the sheet
    "R1": ["glare on belt"] * 9 + ["glare on belt;smudged digit", "(wrong label)", "smudged digit", ""],
    "R2": ["faded thermal print"] * 6 + ["smudged digit"] * 4 + [""] * 5,
    "R3": ["glossy reflection"] * 3 + [""] * 10,
    "rest": ["smudged digit", "torn label", "", "torn label;smudged digit", "wrong label", "",
             "smudged digit", "", "", ""],
}
NAMES = {"R1": "glare on belt", "R2": "faded thermal print", "R3": "glossy reflection"}


def _depot_eval_csv(folder, n=4000, seed=11):
    """A generated depot eval table with three planted conjunctions where the reader errs more."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "parcel_id": [f"Q{i:05d}" for i in range(n)],
        "scanner": rng.choice(["S1", "S2", "S3", "S4"], n),
        "shift": rng.choice(["day", "night"], n),
        "label_stock": rng.choice(["matte", "glossy", "thermal"], n),
        "label": rng.integers(0, 10, n),
    })
    glare = ((frame["scanner"] == "S3") & (frame["shift"] == "night")).to_numpy()
    faded = ((frame["label_stock"] == "thermal") & (frame["shift"] == "day")).to_numpy()
    glossy = ((frame["label_stock"] == "glossy") & (frame["scanner"] == "S1")).to_numpy()
    rate = np.where(glare, 0.5, np.where(faded, 0.2, np.where(glossy, 0.3, 0.04)))
    wrong = rng.random(n) < rate
    frame["pred"] = np.where(wrong, (frame["label"] + 3) % 10, frame["label"])
    path = os.path.join(folder, "dev.csv")
    frame.to_csv(path, index=False)
    return path, frame


def _run(argv):
    """main(argv) with stdout captured; returns the printed text."""
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert 0 == main(argv)
    return out.getvalue()


@pytest.fixture(scope="module")
def loop(tmp_path_factory):
    """scan -> queue -> tally once for the module: printouts, written files, the data and sheet.

    stdout is captured with contextlib.redirect_stdout rather than capsys, which is
    function-scoped, so that the loop runs once for all the tests here.
    """
    folder = str(tmp_path_factory.mktemp("printed"))
    data, frame = _depot_eval_csv(folder)
    ws = os.path.join(folder, "ws")
    scan_out = _run(["scan", data, "--label", "label", "--prediction", "pred",
                     "--id-column", "parcel_id", "--out", ws])
    slices = pd.read_csv(os.path.join(ws, "slices.csv"))
    assert len(slices) >= 3, "the planted table should give at least three slices"
    queue_out = _run(["queue", ws, "--budget", "40", "--rest", "10"])
    sheet = pd.read_csv(os.path.join(ws, "queue.csv"), encoding="utf-8-sig")
    sheet["reviewed"] = "yes"
    sheet["tags"] = ""
    for stratum, tags in TAGS.items():
        at = np.flatnonzero((sheet["stratum"] == stratum).to_numpy())
        sheet.loc[at, "tags"] = [tags[i % len(tags)] for i in range(len(at))]
    sheet.loc[np.flatnonzero((sheet["stratum"] == "rest").to_numpy())[-2:], "reviewed"] = ""  # left blank
    filled = os.path.join(folder, "filled.csv")
    sheet.to_csv(filled, index=False)
    names = [arg for sid, name in NAMES.items() for arg in ("--name", f"{sid}={name}")]
    tally_out = _run(["tally", ws, filled, *names])
    with open(os.path.join(ws, "report.html"), encoding="utf-8") as fh:
        report = fh.read()
    return dict(scan=scan_out, queue=queue_out, tally=tally_out, report=report, frame=frame,
                sheet=sheet, slices=slices, queue_csv=pd.read_csv(os.path.join(ws, "queue.csv"),
                                                                   encoding="utf-8-sig"),
                categories=pd.read_csv(os.path.join(ws, "tally.csv"), keep_default_na=False,
                                       na_values=[""]),
                verdicts=pd.read_csv(os.path.join(ws, "verdicts.csv")))


def _agrees(text, value):
    """True when `text` (as printed: '52.1%', '1,343', '8.40%', '68.2', '1.5e-100') is `value`
    rounded to the digits shown: within half a unit of its last printed digit."""
    t = text.strip().replace(",", "")
    scale = 100.0 if t.endswith("%") else 1.0
    t = t.rstrip("%")
    mantissa, _, exponent = t.lower().partition("e")
    decimals = len(mantissa.partition(".")[2])
    half = 0.5 * 10.0 ** (int(exponent or 0) - decimals)
    return abs(float(t) - scale * float(value)) <= half * (1 + 1e-9) + 1e-300


def _check(text, value, what):
    assert _agrees(text, value), f"{what}: printed {text!r}, the table holds {value!r}"


def _errors(frame):
    return int((frame["label"] != frame["pred"]).sum())


# --- scan ------------------------------------------------------------------------------------

SLICE_LINE = re.compile(
    rf"^(?P<id>\S+)\s+(?P<desc>.+?)\s+(?P<rows>[\d,]+)\s+(?P<errors>[\d,]+)\s+(?P<rate>{PCT}) "
    rf"\[(?P<low>{PCT})–(?P<high>{PCT})\]\s+(?P<share>{PCT})\s+(?P<q>\S+)$")


def test_scan_slice_lines_are_slices_csv(loop):
    """Each slice line of the scan printout is its row of slices.csv at the printed precision."""
    lines = loop["scan"].splitlines()
    head = next(i for i, line in enumerate(lines) if line.startswith("id ") and "rate [95% interval]" in line)
    parsed = []
    for line in lines[head + 1:]:
        match = SLICE_LINE.match(line)
        if match is None:
            break
        parsed.append(match)
    slices = loop["slices"]
    assert min(len(slices), 10) == len(parsed)           # the default --top is 10
    for match, (_, s) in zip(parsed, slices.iterrows()):
        sid = s["slice_id"]
        assert s["slice_id"] == match["id"]
        assert s["description"] == match["desc"]
        assert int(s["n_rows"]) == int(match["rows"].replace(",", ""))
        assert int(s["n_errors"]) == int(match["errors"].replace(",", ""))
        for key, column in [("rate", "error_rate"), ("low", "ci_low"), ("high", "ci_high"),
                            ("share", "error_share"), ("q", "q_value")]:
            _check(match[key], s[column], f"{sid} {column}")


def test_scan_summary_line_is_the_data(loop):
    """The first line's rows, errors, error rate and slice count are the data's and slices.csv's."""
    frame = loop["frame"]
    match = re.search(rf"^([\d,]+) rows, ([\d,]+) errors \(({PCT})\); (\d+) slices pass FDR 0.05 of "
                      r"([\d,]+) tested\.$", loop["scan"], re.M)
    assert match is not None, loop["scan"]
    assert len(frame) == int(match[1].replace(",", ""))
    assert _errors(frame) == int(match[2].replace(",", ""))
    _check(match[3], _errors(frame) / len(frame), "error rate")
    assert len(loop["slices"]) == int(match[4])


def test_slices_csv_counts_are_the_data(loop):
    """slices.csv's rows and errors recount from the generated table; rates follow from them."""
    from statsmodels.stats.proportion import proportion_confint

    frame = loop["frame"]
    wrong = (frame["label"] != frame["pred"]).to_numpy()
    for _, s in loop["slices"].iterrows():
        mask = np.ones(len(frame), dtype=bool)
        for term in s["description"].split(" and "):
            column, value = term.split(" = ")
            mask &= (frame[column].astype(str) == value).to_numpy()
        assert (int(mask.sum()), int((mask & wrong).sum())) == (s["n_rows"], s["n_errors"])
        assert s["n_errors"] / s["n_rows"] == pytest.approx(s["error_rate"], rel=1e-12)
        assert s["n_errors"] / wrong.sum() == pytest.approx(s["error_share"], rel=1e-12)
        low, high = proportion_confint(s["n_errors"], s["n_rows"], alpha=0.05, method="wilson")  # statsmodels
        assert (low, high) == pytest.approx((s["ci_low"], s["ci_high"]), abs=1e-9)


def test_queue_printout_is_queue_csv(loop):
    """The queue's size, strata and queued counts are queue.csv's; the strata's errors add up."""
    text = loop["queue"]
    match = re.search(r"^queue: (\d+) errors in (\d+) strata -> ", text, re.M)
    queue = loop["queue_csv"]
    assert (len(queue), queue["stratum"].nunique()) == (int(match[1]), int(match[2]))
    lines = text.splitlines()
    head = next(i for i, line in enumerate(lines) if line.split()[:3] == ["stratum", "n_errors", "n_queued"])
    rows = [line.split(maxsplit=3) for line in lines[head + 1:head + 1 + int(match[2])]]
    counts = queue["stratum"].value_counts()
    assert {r[0]: int(r[2]) for r in rows} == counts.to_dict()
    assert _errors(loop["frame"]) == sum(int(r[1]) for r in rows)
    first = loop["slices"].iloc[0]
    assert (first["slice_id"], int(first["n_errors"])) == (rows[0][0], int(rows[0][1]))


# --- tally -----------------------------------------------------------------------------------

CATEGORY_REST = re.compile(rf"^\s*(?P<n>\d+)\s+(?P<share>{PCT}) \[(?P<low>{PCT})–(?P<high>{PCT})\]\s+"
                           rf"(?P<fixed>{PCT})$")
VERDICT_REST = re.compile(rf"^\s*(?P<n>\d+)\s+(?:(?P<prec>{PCT}) \[(?P<low>{PCT})–(?P<high>{PCT})\])?\s+"
                          r"(?P<verdict>[a-z]+)\s*(?P<more>\d*)$")


def _category_lines(text):
    """(category, match) for each category line of the tally printout."""
    lines = text.splitlines()
    head = next(i for i, line in enumerate(lines) if line.startswith("category ") and "tagged" in line)
    out = []
    for line in lines[head + 1:]:
        match = CATEGORY_REST.match(line[28:])
        if match is None:
            break
        out.append((line[:28].strip(), match))
    return out


def test_tally_category_lines_are_tally_csv(loop):
    """Category, tagged count, share with its interval and error rate if fixed are tally.csv's."""
    cats = loop["categories"]
    lines = _category_lines(loop["tally"])
    assert len(cats) == len(lines)
    for (name, match), (_, c) in zip(lines, cats.iterrows()):
        assert c["category"] == name
        assert int(c["n_tagged"]) == int(match["n"])
        for key, column in [("share", "share"), ("low", "share_low"), ("high", "share_high"),
                            ("fixed", "headroom")]:
            _check(match[key], c[column], f"{name} {column}")


def test_tally_csv_counts_are_the_sheet(loop):
    """tally.csv's tagged counts and verdicts.csv's reviewed and named counts recount from the sheet."""
    from slicefind.review.tally import UNTAGGED, WRONG_LABEL

    sheet = loop["sheet"]
    done = sheet[sheet["reviewed"] == "yes"]
    tags = done["tags"].map(lambda cell: {t.strip() for t in cell.split(";") if t.strip()})
    tags = tags.map(lambda ts: {WRONG_LABEL if t == "wrong label" else t for t in ts})
    expected = {}
    for ts in tags:
        for t in ts or {UNTAGGED}:
            expected[t] = expected.get(t, 0) + 1
    assert expected == dict(zip(loop["categories"]["category"], loop["categories"]["n_tagged"]))
    imported = re.search(r"^imported (\d+) new review events \((\d+) unchanged, (\d+) blank lines", loop["tally"], re.M)
    assert (len(done), 0, len(sheet) - len(done)) == tuple(int(g) for g in imported.groups())
    for _, v in loop["verdicts"].iterrows():
        rows = tags[done["stratum"] == v["slice_id"]]
        name = NAMES.get(v["slice_id"])
        assert len(rows) == v["n_reviewed"]
        assert sum(name in ts for ts in rows) == v["n_named"]


def test_tally_wrong_label_line_is_its_category_row(loop):
    """The corrected error rate printed is the (wrong label) row's 'error rate if fixed'."""
    from slicefind.review.tally import WRONG_LABEL

    match = re.search(rf"^{re.escape(WRONG_LABEL)}: error rate with the labels corrected ({PCT}) "
                      rf"\[({PCT})–({PCT})\], against ({PCT}) measured", loop["tally"], re.M)
    assert match is not None, loop["tally"]
    row = loop["categories"].set_index("category").loc[WRONG_LABEL]
    # correcting the wrong labels is fixing that category: headroom = error_rate * (1 - share)
    for group, column in [(1, "headroom"), (2, "headroom_low"), (3, "headroom_high")]:
        _check(match[group], row[column], f"corrected error rate ({column})")
    frame = loop["frame"]
    _check(match[4], _errors(frame) / len(frame), "measured error rate")


def test_tally_verdict_lines_are_verdicts_csv(loop):
    """Each verdict line's id, name, reviewed count, precision, verdict and 'more' are verdicts.csv's."""
    lines = loop["tally"].splitlines()
    head = next(i for i, line in enumerate(lines) if line.startswith("slice ") and "verdict" in line)
    verdicts = loop["verdicts"]
    body = lines[head + 1:head + 1 + len(verdicts)]
    assert "" == lines[head + 1 + len(verdicts)].strip()
    for line, (_, v) in zip(body, verdicts.iterrows()):
        sid, name = line[:6].strip(), line[7:31].strip()
        match = VERDICT_REST.match(line[31:])
        assert match is not None, line
        assert v["slice_id"] == sid
        assert ("" if pd.isna(v["name"]) else str(v["name"])[:24]) == name
        assert int(v["n_reviewed"]) == int(match["n"])
        assert v["verdict"] == match["verdict"]
        assert ("" if pd.isna(v["more_needed"]) else str(int(v["more_needed"]))) == match["more"]
        if pd.isna(v["precision"]):
            assert match["prec"] is None
        else:
            for key, column in [("prec", "precision"), ("low", "precision_low"), ("high", "precision_high")]:
                _check(match[key], v[column], f"{sid} {column}")
    assert {"confirmed", "undecided", "rejected"} <= set(verdicts["verdict"])   # every kind was printed


def _plain_words(text):
    """The 'In plain words' paragraphs of the tally printout, unwrapped."""
    lines = text.splitlines()
    start = lines.index("In plain words:") + 1
    paragraphs = []
    for line in lines[start:]:
        if line.startswith("- "):
            paragraphs.append(line[2:])
        elif line.startswith("  ") and paragraphs:
            joint = "" if paragraphs[-1].endswith("-") else " "   # textwrap breaks after hyphens
            paragraphs[-1] += joint + line.strip()
        else:
            break
    return paragraphs


CATEGORY_PARAGRAPH = re.compile(
    rf"^(?P<cat>.+?): (?P<share>{PCT}) of errors \(95% CI (?P<low>{PCT})–(?P<high>{PCT})\), about "
    rf"(?P<est>\d+) of (?P<total>\d+)\. Fixed, the error rate would be at best (?P<fixed>{PCT}) "
    rf"\((?P<flow>{PCT})–(?P<fhigh>{PCT})\) instead of (?P<rate>{PCT})\.(?: Against corrected labels "
    rf"it would be (?P<corr>{PCT}) \((?P<clow>{PCT})–(?P<chigh>{PCT})\)\.)?")
SLICE_SENTENCE = re.compile(
    rf"Slice (?P<id>\S+) \((?P<desc>[^)]*)\) is (?P<verdict>[a-z]+): (?P<named>\d+) of its (?P<n>\d+) "
    rf"reviewed errors carry the name, precision (?P<prec>{PCT}) \((?P<low>{PCT})–(?P<high>{PCT})\)"
    r"(?:; about (?P<more>\d+) more reviews? from it)?")
WRONG_PARAGRAPH = re.compile(
    rf"^\(wrong label\): (?P<n>\d+) reviewed errors? had a wrong dev-set label, (?P<share>{PCT}) of "
    rf"errors \((?P<low>{PCT})–(?P<high>{PCT})\)\. With those labels corrected the error rate would be "
    rf"(?P<rate>{PCT}) \((?P<rlow>{PCT})–(?P<rhigh>{PCT})\);")
UNTAGGED_PARAGRAPH = re.compile(
    rf"^\(untagged\): (?P<share>{PCT}) of errors \((?P<low>{PCT})–(?P<high>{PCT})\) carry no tag "
    r"\((?P<n>\d+) reviewed rows\)\.")


def test_plain_words_numbers_are_tally_csv_and_verdicts_csv(loop):
    """Every number of the 'In plain words' paragraphs is tally.csv's, verdicts.csv's or the data's."""
    from slicefind.review.tally import UNTAGGED, WRONG_LABEL

    cats = loop["categories"].set_index("category")
    verdicts = loop["verdicts"].set_index("slice_id")
    frame = loop["frame"]
    paragraphs = _plain_words(loop["tally"])
    user = [c for c in loop["categories"]["category"] if c not in (UNTAGGED, WRONG_LABEL)]
    kinds = []
    for text in paragraphs:
        if (match := WRONG_PARAGRAPH.match(text)) is not None:
            kinds.append(WRONG_LABEL)
            row = cats.loc[WRONG_LABEL]
            assert int(row["n_tagged"]) == int(match["n"])
            for key, column in [("share", "share"), ("low", "share_low"), ("high", "share_high"),
                                ("rate", "headroom"), ("rlow", "headroom_low"), ("rhigh", "headroom_high")]:
                _check(match[key], row[column], f"{WRONG_LABEL} {column}")
        elif (match := UNTAGGED_PARAGRAPH.match(text)) is not None:
            kinds.append(UNTAGGED)
            row = cats.loc[UNTAGGED]
            assert int(row["n_tagged"]) == int(match["n"])
            for key, column in [("share", "share"), ("low", "share_low"), ("high", "share_high")]:
                _check(match[key], row[column], f"{UNTAGGED} {column}")
        else:
            match = CATEGORY_PARAGRAPH.match(text)
            assert match is not None, text
            name = match["cat"]
            kinds.append(name)
            row = cats.loc[name]
            assert _errors(frame) == int(match["total"])
            _check(match["rate"], _errors(frame) / len(frame), "error rate")
            _check(match["est"], row["est_errors"], f"{name} est_errors")
            for key, column in [("share", "share"), ("low", "share_low"), ("high", "share_high"),
                                ("fixed", "headroom"), ("flow", "headroom_low"), ("fhigh", "headroom_high"),
                                ("corr", "headroom_corrected"), ("clow", "headroom_corrected_low"),
                                ("chigh", "headroom_corrected_high")]:
                if match[key] is not None:
                    _check(match[key], row[column], f"{name} {column}")
            assert (match["corr"] is not None) == (WRONG_LABEL in cats.index)
            sentences = list(SLICE_SENTENCE.finditer(text))
            named = verdicts[verdicts["name"] == name]
            assert list(named.index) == [s["id"] for s in sentences]
            for s in sentences:
                v = verdicts.loc[s["id"]]
                assert (v["description"], v["verdict"]) == (s["desc"], s["verdict"])
                assert (int(v["n_named"]), int(v["n_reviewed"])) == (int(s["named"]), int(s["n"]))
                for key, column in [("prec", "precision"), ("low", "precision_low"), ("high", "precision_high")]:
                    _check(s[key], v[column], f"{s['id']} {column}")
                assert (s["more"] is not None) == (v["verdict"] == "undecided")
                if s["more"] is not None:
                    assert int(v["more_needed"]) == int(s["more"])
            if not len(named):
                assert text.endswith("No queued slice is named after it.")
    # the three largest categories, then wrong labels, then the untagged rest
    assert user[:3] + [WRONG_LABEL, UNTAGGED] == kinds


# --- the report ------------------------------------------------------------------------------

class _Tables(HTMLParser):
    """The report's tables by id (or class): rows of cells, each cell a list of its text pieces."""

    def __init__(self):
        super().__init__()
        self.tables, self._table, self._row, self._cell, self._depth = {}, None, None, None, 0
        self.cards = {}
        self._card = None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "table":
            self._table = self.tables.setdefault(attrs.get("id") or attrs.get("class"), [])
        elif tag == "tr" and self._table is not None:
            self._row = []
        elif tag == "td" and self._row is not None:
            self._cell = []
        elif tag == "div" and attrs.get("class") == "card":
            self._card = []

    def handle_endtag(self, tag):
        if tag == "td" and self._cell is not None:
            self._row.append(self._cell)
            self._cell = None
        elif tag == "tr" and self._row is not None:
            if self._row:                       # header rows hold <th>, no <td>
                self._table.append(self._row)
            self._row = None
        elif tag == "table":
            self._table = None
        elif tag == "div" and self._card is not None:
            self.cards[self._card[1]] = self._card[0]
            self._card = None

    def handle_data(self, data):
        if self._cell is not None and data.strip():
            self._cell.append(data.strip())
        if self._card is not None and data.strip():
            self._card.append(data.strip())


@pytest.fixture(scope="module")
def report(loop):
    parser = _Tables()
    parser.feed(loop["report"])
    return parser


def test_report_cards_are_the_data(loop, report):
    """The report's cards: rows, errors and error rate of the data, slices of slices.csv."""
    frame = loop["frame"]
    assert len(frame) == int(report.cards["rows analysed"].replace(",", ""))
    assert _errors(frame) == int(report.cards["errors"].replace(",", ""))
    _check(report.cards["error rate"], _errors(frame) / len(frame), "error rate")
    assert len(loop["slices"]) == int(report.cards["slices passing FDR"])
    tested = re.search(r"of ([\d,]+) tested\.", loop["scan"])[1]
    assert tested == report.cards["candidates tested"]           # the same count as the CLI's


def test_report_slice_table_is_slices_csv(loop, report):
    """Rows, errors, rate with its interval, share, excess, lift and q of the slice table."""
    rows = report.tables["slice-table"]
    slices = loop["slices"]
    assert len(slices) == len(rows)
    for cells, (_, s) in zip(rows, slices.iterrows()):
        sid = s["slice_id"]
        assert [sid] == cells[0]
        assert s["source"] == cells[1][0] and s["description"] == cells[2][0]
        assert int(s["n_rows"]) == int(cells[3][0].replace(",", ""))
        assert int(s["n_errors"]) == int(cells[4][0].replace(",", ""))
        rate, interval = cells[5]
        low, high = interval.split("–")
        for text, column in [(rate, "error_rate"), (low, "ci_low"), (high, "ci_high"),
                             (cells[7][0], "error_share"), (cells[8][0], "excess_errors"),
                             (cells[9][0], "lift"), (cells[10][0], "q_value")]:
            _check(text, s[column], f"report {sid} {column}")


def test_report_verdict_table_is_verdicts_csv(loop, report):
    """Name, reviewed count, precision with its interval, verdict and 'more to review'."""
    rows = report.tables["verdict-table"]
    verdicts = loop["verdicts"]
    assert len(verdicts) == len(rows)
    for cells, (_, v) in zip(rows, verdicts.iterrows()):
        sid = v["slice_id"]
        assert [sid] == cells[0]
        assert ([] if pd.isna(v["name"]) else [v["name"]]) == cells[1]
        assert [v["description"]] == cells[2]
        assert [str(int(v["n_reviewed"]))] == cells[3]
        low, high = cells[5][0].split("–")
        for text, column in [(cells[4][0], "precision"), (low, "precision_low"), (high, "precision_high")]:
            _check(text, v[column], f"report {sid} {column}")
        assert [v["verdict"]] == cells[6]
        assert [str(int(v["more_needed"]))] == cells[7]


def test_report_category_table_is_tally_csv(loop, report):
    """Category, reviewed count, share, its bounds, estimated errors and error rate if fixed."""
    rows = report.tables["categories"]
    cats = loop["categories"]
    assert len(cats) == len(rows)
    for cells, (_, c) in zip(rows, cats.iterrows()):
        assert [c["category"]] == cells[0]
        assert int(c["n_tagged"]) == int(cells[1][0])
        for cell, column in zip(cells[2:], ["share", "share_low", "share_high", "est_errors", "headroom"]):
            _check(cell[0], c[column], f"report {c['category']} {column}")


def test_report_plain_words_are_the_printed_ones(loop):
    """The report's 'In plain words' paragraphs are, word for word, the ones the CLI printed."""
    section = re.search(r"<h2 id='plain-words'>In plain words</h2>((?:<p>.*?</p>)+)", loop["report"])
    assert section is not None
    in_report = [" ".join(html.unescape(p).split()) for p in re.findall(r"<p>(.*?)</p>", section[1])]
    assert _plain_words(loop["tally"]) == in_report


@pytest.mark.parametrize("text, value, ok", [
    ("52.1%", 0.52145, True), ("52.1%", 0.52151, False),     # half a unit of 0.1 points
    ("8.40%", 0.084, True), ("8.40%", 0.08406, False),
    ("1,343", 1343, True), ("1,343", 1344, False),
    ("68.2", 68.25, True), ("68.2", 68.26, False),
    ("1.5e-100", 1.46e-100, True), ("1.5e-100", 1.4e-100, False),
    ("0.00044", 0.000444, True), ("0.00044", 0.000446, False),
    ("100%", 1.0, True), ("68%", 0.6815, True), ("68%", 0.6851, False),
])
def test_agrees_is_half_a_unit_of_the_last_digit(text, value, ok):
    """The comparison used above accepts only values that round to the printed text."""
    assert ok == _agrees(text, value)
