"""Tests for slicefind.report: content, and the page as a real headless browser renders it."""
import os
from html import escape
import re
import subprocess

import numpy as np
import pandas as pd
import pytest

import slicefind as sf
from slicefind.discovery.describe import describe_slice
from browser import chromium_or_skip
from slicefind.report import CAUTIONS, ReportInputs, render_report, write_report


@pytest.fixture(scope="module")
def reviewed(tmp_path_factory):
    """A planted slice, a queue, a review where every R1 row is tagged, and the report inputs."""
    rng = np.random.default_rng(0)
    n = 3000
    frame = pd.DataFrame({"scanner": rng.choice(["S1", "S2", "S3"], n),
                          "shift": rng.choice(["day", "night"], n)})
    wrong = rng.random(n) < np.where((frame["scanner"] == "S3") & (frame["shift"] == "night"), 0.4, 0.05)
    found = sf.find_slices(frame, errors=wrong)
    queue = sf.build_queue(found, budget=30, rest=10)
    sheet = queue.table[["row", "stratum"]].assign(
        reviewed=1, tags=lambda t: np.where(t["stratum"] == "R1", "smudged label", ""))
    result = sf.tally(queue, sheet[["row", "reviewed", "tags"]])
    inputs = ReportInputs(map_xy=rng.normal(size=(n, 2)), images=rng.random((n, 8, 8)) * 16,
                          descriptions={"R1": describe_slice(found, "R1")}, tally=result)
    return found, inputs, tmp_path_factory.mktemp("report")


def test_report_holds_table_cautions_and_tally(reviewed):
    """The HTML has the slice table, the cautions, the map, thumbnails and the category chart."""
    found, inputs, _ = reviewed
    html = render_report(found, inputs)
    assert "id='slice-table'" in html and "scanner = S3 and shift = night" in html
    assert all(escape(c) in html for c in CAUTIONS)
    assert "id='map-figure'" in html and "id='category-chart'" in html
    assert "smudged label" in html and "verdict-confirmed" in html
    assert html.count("class='thumb'") == 6


def test_report_without_slices_or_embeddings_says_so():
    """With null data the report explains that nothing passed and that there is no map."""
    rng = np.random.default_rng(1)
    frame = pd.DataFrame({"scanner": rng.choice(["S1", "S2"], 500)})
    found = sf.find_slices(frame, errors=rng.random(500) < 0.1)
    html = render_report(found)
    assert "No slice passes the false discovery rate" in html
    assert "No embeddings were given" in html


def test_report_renders_in_headless_chromium(reviewed):
    """Debian's chromium loads the report offline: table, map and chart present, every image decoded."""
    browser = chromium_or_skip("the report's browser test")
    found, inputs, folder = reviewed
    path = write_report(os.path.join(folder, "report.html"), found, inputs)
    args = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
            "--disable-component-update", "--disable-sync", "--no-first-run",
            f"--user-data-dir={folder / 'profile'}", "--virtual-time-budget=5000"]
    dom = subprocess.run(args + ["--dump-dom", "file://" + path], capture_output=True, text=True,
                         timeout=120).stdout
    body = re.search(r"<body([^>]*)>", dom).group(1)
    total = int(re.search(r'data-images="(\d+)"', body).group(1))
    decoded = int(re.search(r'data-images-decoded="(\d+)"', body).group(1))
    assert total >= 8 and decoded == total            # map, chart and 6 thumbnails
    for element in ('id="slice-table"', 'id="map-figure"', 'id="category-chart"', 'id="verdict-table"'):
        assert element in dom
    shot = folder / "report.png"
    subprocess.run(args + ["--window-size=1280,2000", f"--screenshot={shot}", "file://" + path],
                   capture_output=True, timeout=120)
    assert shot.exists() and shot.stat().st_size > 10_000


def test_report_lists_confusions_with_the_users_column_names():
    """The confusion section names the label and prediction columns and gives the counts."""
    frame = pd.DataFrame({"true_kind": ["letter"] * 300 + ["crate"] * 300,
                          "site": ["a", "b", "c"] * 200})
    frame["read_kind"] = frame["true_kind"]
    frame.loc[frame.index[:60], "read_kind"] = "parcel"          # 60 letters read as parcels
    frame.loc[frame.index[300:330], "read_kind"] = "letter"      # 30 crates read as letters
    found = sf.find_slices(frame, label="true_kind", prediction="read_kind")
    html = render_report(found)
    section = html[html.index("id='confusions'"):html.index("id='map'")]
    assert "true_kind → read_kind" in section
    # 60 of 90 errors (66.7%), 60 of the 300 letters (20.0%)
    assert "<td class='int'>60</td><td class='pct'>66.7%</td><td class='int'>300</td><td class='pct'>20.0%</td>" in section
