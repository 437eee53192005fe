"""Bad input refused before anything is written; sheets all-in or all-out; a busy database.

Each test here failed on the code before it (issue: hardening) and names what it guards.
"""
import hashlib
import os
import sqlite3
import subprocess
import sys
import threading
import time

import numpy as np
import pandas as pd
import pytest

import slicefind.workspace.store as wsmod
from slicefind.cli import _read_table, main
from slicefind.exceptions import WorkspaceBusyError
from slicefind.discovery.table import neutralize_formulas, restore_formula_text
from slicefind.review.tally import read_reviews
from slicefind.workspace import DB_NAME, Workspace


def _dev_frame(n=1500, seed=0):
    """A small generated table where scanner S3 on the night shift misreads labels."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "id": [f"P{i:05d}" for i in range(n)],
        "scanner": rng.choice(["S1", "S2", "S3"], n),
        "shift": rng.choice(["day", "night"], n),
        "label": rng.integers(0, 10, n),
    })
    bad = ((frame["scanner"] == "S3") & (frame["shift"] == "night")).to_numpy()
    wrong = rng.random(n) < np.where(bad, 0.5, 0.05)
    frame["pred"] = np.where(wrong, (frame["label"] + 3) % 10, frame["label"])
    return frame


def _digest(path):
    with open(path, "rb") as handle:
        return hashlib.sha256(handle.read()).hexdigest()


def _counts(path):
    """(review events, name events) in a workspace, read through a plain connection."""
    conn = sqlite3.connect(os.path.join(path, DB_NAME))
    try:
        return tuple(conn.execute(f"SELECT COUNT(*) FROM {t}").fetchone()[0] for t in ("reviews", "names"))
    finally:
        conn.close()


# --- reading the data --------------------------------------------------------------------


def test_scan_reads_a_semicolon_csv(tmp_path, capsys):
    """A ';'-separated file is read like a ',' one (it used to be one column, 'id' not found)."""
    frame = _dev_frame()
    path = tmp_path / "dev.csv"
    frame.to_csv(path, index=False, sep=";")
    out = str(tmp_path / "ws")
    assert 0 == main(["scan", str(path), "--label", "label", "--prediction", "pred",
                      "--id-column", "id", "--out", out])
    assert "scanner = S3 and shift = night" in capsys.readouterr().out


def test_iso_timestamps_are_read_as_dates(tmp_path):
    """A date column written to CSV comes back as datetimes; other text stays text."""
    frame = pd.DataFrame({"scanned_at": pd.date_range("2026-03-01 06:00", periods=50, freq="37min"),
                          "day": pd.date_range("2026-03-01", periods=50, freq="D").strftime("%Y-%m-%d"),
                          "code": [f"2026-X{i}" for i in range(50)]})
    path = tmp_path / "t.csv"
    frame.to_csv(path, index=False)
    back = _read_table(str(path))
    assert pd.api.types.is_datetime64_any_dtype(back["scanned_at"])
    assert back["scanned_at"].equals(frame["scanned_at"])
    assert pd.api.types.is_datetime64_any_dtype(back["day"])
    assert not pd.api.types.is_datetime64_any_dtype(back["code"]) and back["code"].iloc[3] == "2026-X3"


def test_unreadable_csv_names_the_file(tmp_path, capsys):
    path = tmp_path / "dev.csv"
    path.write_text('a,b\n1,"2\n3,4\n')                 # an unclosed quote
    assert 1 == main(["scan", str(path), "--errors", "b", "--out", str(tmp_path / "ws")])
    err = capsys.readouterr().err
    assert "DATA file" in err and "dev.csv" in err and "Traceback" not in err
    assert not os.path.exists(tmp_path / "ws")


def test_embeddings_with_a_repeated_id_name_the_id_and_file(tmp_path, capsys):
    """A duplicated id in the embeddings file used to end in pandas' InvalidIndexError."""
    frame = _dev_frame(400)
    data = tmp_path / "dev.csv"
    frame.to_csv(data, index=False)
    rng = np.random.default_rng(0)
    vectors = pd.DataFrame(rng.normal(size=(401, 4)), columns=["e0", "e1", "e2", "e3"])
    vectors.insert(0, "id", list(frame["id"]) + ["P00007"])
    emb = tmp_path / "emb.csv"
    vectors.to_csv(emb, index=False)
    out = tmp_path / "ws"
    assert 1 == main(["scan", str(data), "--label", "label", "--prediction", "pred", "--id-column", "id",
                      "--embeddings", str(emb), "--out", str(out)])
    err = capsys.readouterr().err
    assert "'P00007'" in err and "emb.csv" in err and "lines [9, 402]" in err
    assert not out.exists()


# --- options checked before any work -----------------------------------------------------


@pytest.mark.parametrize("option", [["--top", "0"], ["--top", "-1"], ["--fdr", "0"], ["--fdr", "1"],
                                    ["--max-share", "0"], ["--max-share", "1.5"], ["--min-rows", "0"],
                                    ["--max-terms", "0"], ["--seed", "-2"], ["--top", "ten"]])
def test_bad_scan_options_write_nothing(tmp_path, capsys, option):
    """`scan --top 0` used to write the workspace, then fail on a NaN."""
    data = tmp_path / "dev.csv"
    _dev_frame(300).to_csv(data, index=False)
    out = tmp_path / "ws"
    with pytest.raises(SystemExit) as stop:
        main(["scan", str(data), "--label", "label", "--prediction", "pred", "--out", str(out), *option])
    assert stop.value.code == 2
    assert f"argument {option[0]}: must be" in capsys.readouterr().err
    assert not out.exists()


@pytest.mark.parametrize("argv", [["queue", "WS", "--budget", "0"], ["queue", "WS", "--rest", "-1"],
                                  ["queue", "WS", "--extend", "-5"], ["queue", "WS", "--top", "0"],
                                  ["tally", "WS", "SHEET", "--threshold", "2"],
                                  ["tally", "WS", "SHEET", "--threshold", "0"],
                                  ["compare", "WS", "--after", "x.csv", "--top", "0"],
                                  ["review", "WS", "--port", "70000"], ["demo", "--rows", "10"]])
def test_bad_options_of_other_commands_change_nothing(ws, tmp_path, capsys, argv):
    before = _digest(ws.db_path)
    sheet = tmp_path / "sheet.csv"
    ws.load_queue().to_csv(sheet)
    argv = [str(ws.path) if a == "WS" else str(sheet) if a == "SHEET" else a for a in argv]
    with pytest.raises(SystemExit) as stop:
        main(argv)
    assert stop.value.code == 2 and "must be" in capsys.readouterr().err
    assert _digest(ws.db_path) == before


# --- tally: names and the sheet, all or nothing -------------------------------------------


def _filled_sheet(ws, tmp_path, name="filled.csv"):
    """The queue's sheet with every line reviewed and the R1 lines tagged 'glare'."""
    path = tmp_path / name
    ws.load_queue().to_csv(path)
    sheet = pd.read_csv(path, encoding="utf-8-sig", keep_default_na=False)
    sheet["reviewed"] = "yes"
    sheet["tags"] = np.where(sheet["stratum"] == "R1", "glare", "")
    sheet.to_csv(path, index=False)
    return path, sheet


@pytest.mark.parametrize("names", [['R1="(untagged)"'], ["R9=foo"], ["R1"], ["R1=glare", "R1x=y"]])
def test_refused_names_write_nothing(ws, tmp_path, capsys, names):
    """A refused --name used to be refused after the sheet (or the reserved name) was stored."""
    path, _ = _filled_sheet(ws, tmp_path)
    before = _counts(ws.path)
    argv = ["tally", str(ws.path), str(path)]
    for pair in names:
        argv += ["--name", pair]
    assert 1 == main(argv)
    err = capsys.readouterr().err
    assert err.count("slicefind: error:") == 1 and "Traceback" not in err
    assert _counts(ws.path) == before
    # the workspace still works: the same tally with a good name succeeds
    assert 0 == main(["tally", str(ws.path), str(path), "--name", "R1=glare"])
    assert ws.names() == {"R1": "glare"}


def test_set_name_refuses_the_reserved_name(ws):
    with pytest.raises(ValueError, match="reserved"):
        ws.set_name("R1", "(Untagged) ")
    assert ws.names() == {} and _counts(ws.path)[1] == 0
    ws.tally()                                           # and the tally still runs


def test_blank_keeps_a_review_and_no_withdraws_it(ws, tmp_path, capsys):
    """Blank reviewed/tags cells leave a row as it was; reviewed = no withdraws the review."""
    path, sheet = _filled_sheet(ws, tmp_path)
    assert 0 == main(["tally", str(ws.path), str(path)])
    assert "a blank line leaves its row as it was, reviewed = no withdraws a review" in capsys.readouterr().out
    r1 = sheet.index[sheet["stratum"] == "R1"]
    first, second, third = (int(sheet.loc[i, "row"]) for i in r1[:3])
    edited = sheet.copy()
    edited.loc[r1[0], ["reviewed", "tags"]] = ""          # blanked: no change
    edited.loc[r1[1], ["reviewed", "tags"]] = ["no", ""]  # withdrawn
    edited.loc[r1[2], ["reviewed", "tags", "note"]] = ["", "", "checked twice"]  # a note only
    edited.to_csv(path, index=False)
    counts = ws.import_sheet(path)
    assert counts["recorded"] == 2 and counts["blank"] == 1
    state = ws.reviews().set_index("row")
    assert bool(state.loc[first, "reviewed"]) and state.loc[first, "tags"] == "glare"
    assert not bool(state.loc[second, "reviewed"]) and state.loc[second, "tags"] == ""
    assert bool(state.loc[third, "reviewed"]) and state.loc[third, "tags"] == "glare"
    assert state.loc[third, "note"] == "checked twice"


def _sorted_column_sheet(ws, tmp_path):
    """A sheet tagged by a reviewer, then its tags column sorted on its own."""
    path = tmp_path / "sorted.csv"
    ws.load_queue().to_csv(path)
    sheet = pd.read_csv(path, encoding="utf-8-sig", keep_default_na=False)
    rng = np.random.default_rng(4)
    choices = np.array(["glare", "torn label", "glare;torn label", "faded"])
    sheet["tags"] = choices[rng.integers(0, 4, len(sheet))]
    sheet.loc[rng.random(len(sheet)) < 0.25, "tags"] = ""
    true = sheet.copy()
    shuffled = sheet.copy()
    shuffled["tags"] = sorted(sheet["tags"], key=lambda t: (t == "", t))   # blanks at the bottom
    return path, true, shuffled


def test_a_tags_column_sorted_on_its_own_is_refused(ws, tmp_path):
    path, true, shuffled = _sorted_column_sheet(ws, tmp_path)
    shuffled.to_csv(path, index=False)
    with pytest.raises(ValueError, match="tags column is in sorted order on its own") as info:
        ws.import_sheet(path)
    assert "nothing was read" in str(info.value) and "first in doubt: row" in str(info.value)
    assert _counts(ws.path)[0] == 0
    # the same tags on their own rows are read; and a user who says the order is right is trusted
    true.to_csv(path, index=False)
    assert ws.import_sheet(path)["recorded"] > 0
    shuffled.to_csv(path, index=False)
    assert ws.import_sheet(path, trust_order=True)["recorded"] > 0


def test_homogeneous_strata_in_sorted_order_are_not_refused(ws, tmp_path):
    """One category per stratum, strata in alphabetical order: sorted, but not suspicious."""
    path, sheet = _filled_sheet(ws, tmp_path)
    sheet = sheet.sort_values(["stratum", "position"], kind="stable")
    sheet["tags"] = sheet["stratum"].map(lambda s: {"R1": "a glare", "R2": "b smear"}.get(s, ""))
    assert read_reviews(sheet, ws.load_queue())["tags"].ne("").sum() > 10


class _FailingSecondBatch:
    """A connection proxy whose second executemany fails, as a kill halfway would."""

    def __init__(self, conn):
        self._conn, self.calls = conn, 0

    def executemany(self, *args):
        self.calls += 1
        if self.calls == 2:
            raise sqlite3.OperationalError("disk I/O error (simulated)")
        return self._conn.executemany(*args)

    def __getattr__(self, name):
        return getattr(self._conn, name)


@pytest.mark.filterwarnings("ignore:pandas only supports SQLAlchemy")
def test_a_sheet_is_imported_in_one_transaction(ws, tmp_path):
    """Batches used to commit one by one, so a failure halfway left part of a sheet in."""
    path, _ = _filled_sheet(ws, tmp_path)
    real = ws._conn
    ws._conn = _FailingSecondBatch(real)
    try:
        with pytest.raises(sqlite3.OperationalError, match="simulated"):
            ws.import_sheet(path, batch_size=10)
    finally:
        ws._conn = real
    assert _counts(ws.path)[0] == 0
    assert ws.import_sheet(path, batch_size=10)["recorded"] == 40


# --- a busy database ---------------------------------------------------------------------


def _hold_lock(path):
    conn = sqlite3.connect(os.path.join(path, DB_NAME), isolation_level=None, check_same_thread=False)
    conn.execute("BEGIN IMMEDIATE")
    return conn


def test_a_busy_database_gives_one_clear_error_and_writes_nothing(ws, tmp_path, monkeypatch, capsys):
    path, _ = _filled_sheet(ws, tmp_path)
    monkeypatch.setattr(wsmod, "BUSY_TIMEOUT", 0.05)
    monkeypatch.setattr(wsmod, "BUSY_RETRIES", (0.01, 0.02))
    other = _hold_lock(ws.path)
    try:
        busy = Workspace(ws.path, create=False)
        row = int(busy.load_queue().table["row"][0])
        with pytest.raises(WorkspaceBusyError, match="another process held .* nothing was written"):
            busy.record_review(row, tags="glare")
        assert 1 == main(["tally", str(ws.path), str(path)])
        err = capsys.readouterr().err
        assert err.strip().startswith("slicefind: error: another process held") and "Traceback" not in err
    finally:
        other.rollback()
        other.close()
    assert _counts(ws.path)[0] == 0
    assert busy.record_review(row, tags="glare") is not None
    busy.close()


def test_a_lock_released_during_the_retries_is_waited_for(ws, monkeypatch):
    monkeypatch.setattr(wsmod, "BUSY_RETRIES", (0.4, 0.4))
    other = _hold_lock(ws.path)
    busy = Workspace(ws.path, create=False, timeout=0.05)
    row = int(busy.load_queue().table["row"][0])
    release = threading.Timer(0.2, lambda: (other.rollback(), other.close()))
    release.start()
    start = time.perf_counter()
    assert busy.record_review(row, tags="glare") is not None
    assert time.perf_counter() - start < 2.0
    release.join()
    busy.close()


# --- cells a spreadsheet would run --------------------------------------------------------


def test_formula_cells_are_neutralised_and_read_back(ws, tmp_path):
    formula = '=hyperlink("http://example.invalid")'
    row = int(ws.load_queue().table["row"][0])
    ws.record_review(row, tags=formula, note="+1 see above")
    path = tmp_path / "out.csv"
    ws.load_queue().to_csv(path, reviews=ws.reviews())
    text = path.read_text(encoding="utf-8-sig")
    assert "'=hyperlink(" in text and "'+1 see above" in text
    assert ',=hyperlink(' not in text and ',"=hyperlink(' not in text
    back = read_reviews(path, ws.load_queue()).set_index("row")
    assert back.loc[row, "tags"] == formula and back.loc[row, "note"] == "+1 see above"
    assert ws.import_sheet(path)["recorded"] == 0        # read back unchanged: nothing new


@pytest.mark.parametrize("text", ["=1+2", "+x", "-y", "@z", "\tq", "\rr"])
def test_neutralise_round_trip(text):
    guarded = neutralize_formulas(pd.DataFrame({"c": [text, "plain"], "n": [-1.5, 2.0]}))
    assert guarded.loc[0, "c"] == "'" + text and guarded.loc[1, "c"] == "plain"
    assert guarded["n"].tolist() == [-1.5, 2.0]
    assert restore_formula_text(guarded.loc[0, "c"]) == text
    assert restore_formula_text("'quoted") == "'quoted"


# --- output to a closed pipe ---------------------------------------------------------------


def test_tally_into_a_closed_pipe_is_quiet_and_writes_everything(ws, tmp_path):
    """`slicefind tally ... | head` used to end with '[Errno 32] Broken pipe'."""
    path, _ = _filled_sheet(ws, tmp_path)
    ws.close()
    proc = subprocess.Popen([sys.executable, "-m", "slicefind.cli", "tally", str(ws.path), str(path)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    proc.stdout.close()                                  # the reader is gone before anything is printed
    err = proc.stderr.read().decode()
    proc.wait(timeout=120)
    assert "Broken pipe" not in err and "Traceback" not in err
    assert os.path.exists(os.path.join(ws.path, "tally.csv"))
    assert os.path.exists(os.path.join(ws.path, "report.html"))
    assert _counts(ws.path)[0] == 40


# --- compare: a category of reviewed error rows only ---------------------------------------


def test_a_category_of_tagged_errors_only_says_what_it_measures(ws, depot):
    """Such a line is wrong-before by construction: six fixed rows read as 'better', so the
    table and the terminal text say it counts fixes of known errors."""
    from slicefind.compare import KNOWN_ERRORS_NOTE, compare, format_comparison

    frame, found = depot
    rest = ws.load_queue().table.query("stratum == 'rest'")["row"].astype(int).tolist()[:6]
    for row in rest:
        ws.record_review(row, tags="loose thread")
    after = frame["read_as"].to_numpy().copy()
    after[rest] = frame["digit"].to_numpy()[rest]           # the fix repairs exactly those six
    result = compare(ws, after=after)
    line = result.table.set_index("category").loc["loose thread"]
    assert line["kind"] == "category" and line["n_rows"] == 6 and line["n_errors_before"] == 6
    assert line["n_fixed"] == 6 and KNOWN_ERRORS_NOTE in line["description"]
    text = format_comparison(result, top=50)
    shown = next(t for t in text.splitlines() if t.startswith("category 'loose thread'"))
    assert "(known errors*)" in shown
    assert "* a category of reviewed error rows only: " + KNOWN_ERRORS_NOTE in text


def test_float_labels_print_as_their_classes(tmp_path, capsys):
    """A label column stored as floats (3.0) prints its confusions as '3 -> 4', as the
    review page's thumbnails do, not '3.0 -> 4.0'."""
    frame = _dev_frame(1500)
    frame["label"] = frame["label"].astype(float)
    frame["pred"] = frame["pred"].astype(float)
    path = tmp_path / "dev.csv"
    frame.to_csv(path, index=False)
    out = str(tmp_path / "ws")
    assert 0 == main(["scan", str(path), "--label", "label", "--prediction", "pred", "--out", out])
    line = next(t for t in capsys.readouterr().out.splitlines() if t.startswith("commonest confusions"))
    assert ".0" not in line and " -> " in line
    assert 0 == main(["report", out])
    html = open(os.path.join(out, "report.html"), encoding="utf-8").read()
    section = html[html.index("id='confusions'"):]
    section = section[:section.index("</table>")]
    assert ".0<" not in section and ".0 " not in section
