"""Tests for slicefind.cli: the commands end to end on small generated data."""
import os
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from slicefind.cli import main


def _depot_csv(folder, n=3000, seed=0):
    """A generated depot table where scanner S3 on the night shift misreads labels."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "parcel_id": [f"P{i:05d}" for i in range(n)],
        "scanner": rng.choice(["S1", "S2", "S3", "S4"], n),
        "shift": rng.choice(["day", "night"], n),
        "label_stock": rng.choice(["matte", "glossy", "thermal"], n),
        "label": rng.integers(0, 10, n),
    })
    bad = ((frame["scanner"] == "S3") & (frame["shift"] == "night")).to_numpy()
    wrong = rng.random(n) < np.where(bad, 0.5, 0.05)
    frame["pred"] = np.where(wrong, (frame["label"] + 3) % 10, frame["label"])
    path = os.path.join(folder, "dev.csv")
    frame.to_csv(path, index=False)
    return path, frame


def test_scan_queue_tally_report(tmp_path, capsys):
    """scan -> queue -> tally -> report writes every file and finds the planted slice."""
    data, frame = _depot_csv(str(tmp_path))
    ws = str(tmp_path / "ws")
    assert 0 == main(["scan", data, "--label", "label", "--prediction", "pred",
                      "--id-column", "parcel_id", "--out", ws])
    out = capsys.readouterr().out
    assert "R1    scanner = S3 and shift = night" in out
    assert "commonest confusions (label -> pred): " in out
    slices = pd.read_csv(os.path.join(ws, "slices.csv"))
    assert "scanner = S3 and shift = night" == slices.loc[0, "description"]
    assert 0 == main(["queue", ws, "--budget", "40", "--rest", "10"])
    sheet = pd.read_csv(os.path.join(ws, "queue.csv"), encoding="utf-8-sig")
    assert 40 == len(sheet) and {"reviewed", "tags", "note"} <= set(sheet.columns)
    # a reviewer tags every R1 row "glare on belt" and leaves the rest untagged
    sheet["reviewed"] = 1
    sheet["tags"] = np.where(sheet["stratum"] == "R1", "glare on belt", "")
    filled = os.path.join(str(tmp_path), "filled.csv")
    sheet.to_csv(filled, index=False)
    assert 0 == main(["tally", ws, filled, "--name", "R1=glare on belt"])
    out = capsys.readouterr().out
    assert "R1" in out and "confirmed" in out
    tally = pd.read_csv(os.path.join(ws, "tally.csv"))
    assert "glare on belt" == tally.loc[0, "category"]
    verdicts = pd.read_csv(os.path.join(ws, "verdicts.csv"))
    assert "confirmed" == verdicts.set_index("slice_id").loc["R1", "verdict"]
    assert 0 == main(["report", ws])
    html = open(os.path.join(ws, "report.html"), encoding="utf-8").read()
    assert "scanner = S3 and shift = night" in html and "id='category-chart'" in html


def test_bad_input_is_one_line_and_exit_1(tmp_path, capsys):
    """A library error prints 'slicefind: error: <message>' without a traceback and exits 1."""
    data, _ = _depot_csv(str(tmp_path), n=200)
    code = main(["scan", data, "--label", "label", "--prediction", "preds", "--out", str(tmp_path / "ws")])
    err = capsys.readouterr().err
    assert 1 == code
    assert "slicefind: error: prediction='preds' is not a column of data. Did you mean 'pred'?" in err
    assert "Traceback" not in err


def test_missing_workspace_is_a_clear_error(tmp_path, capsys):
    """queue on a folder that is no workspace names the folder."""
    assert 1 == main(["queue", str(tmp_path / "nowhere")])
    assert "is not a slicefind workspace" in capsys.readouterr().err


def test_usage_errors_exit_2():
    """An unknown command or a missing argument is a usage error (exit 2)."""
    for argv in (["frobnicate"], ["scan"], ["queue"]):
        with pytest.raises(SystemExit) as info:
            main(argv)
        assert 2 == info.value.code


def test_help_shows_examples(capsys):
    """Each command's --help ends with examples."""
    for command in ("scan", "queue", "tally", "report", "demo", "compare", "review"):
        with pytest.raises(SystemExit):
            main([command, "--help"])
        assert "examples:" in capsys.readouterr().out


def test_debug_shows_traceback(tmp_path):
    """--debug lets the error propagate (a traceback for developers)."""
    data, _ = _depot_csv(str(tmp_path), n=200)
    with pytest.raises(ValueError):
        main(["--debug", "scan", data, "--label", "label", "--prediction", "nope", "--out", str(tmp_path / "w")])


def test_demo_runs_the_whole_loop(tmp_path):
    """`slicefind demo` finds the three planted degradations, tallies a simulated review, writes the report."""
    out = tmp_path / "demo"
    result = subprocess.run([sys.executable, "-m", "slicefind.cli", "demo", "--out", str(out)],
                            capture_output=True, text=True, timeout=300)
    assert 0 == result.returncode, result.stderr[-2000:]
    assert "SIMULATED" in result.stdout
    report = out / "workspace" / "report.html"
    assert report.exists()
    verdicts = pd.read_csv(out / "workspace" / "verdicts.csv")
    names = set(verdicts.loc[verdicts["verdict"] == "confirmed", "name"])
    assert {"faded thermal print", "ink smear", "packing tape"} == names
    assert "SIMULATED reviewer" in report.read_text(encoding="utf-8")


def test_text_demo_runs_the_whole_loop(tmp_path):
    """`slicefind demo --text` finds the planted failure modes of the help desk from the text alone."""
    out = tmp_path / "desk"
    result = subprocess.run([sys.executable, "-m", "slicefind.cli", "demo", "--text", "--out", str(out)],
                            capture_output=True, text=True, timeout=300)
    assert 0 == result.returncode, result.stderr[-2000:]
    assert "distinctive words of message (against the other rows):" in result.stdout
    verdicts = pd.read_csv(out / "workspace" / "verdicts.csv")
    names = set(verdicts["name"].dropna())
    confirmed = set(verdicts.loc[verdicts["verdict"] == "confirmed", "name"])
    assert {"forwarded thread", "second language", "moving house", "sms cut short"} <= names
    assert {"forwarded thread", "second language", "moving house"} <= confirmed
    assert (out / "helpdesk.csv").exists()
    assert "<mark>" in (out / "workspace" / "report.html").read_text(encoding="utf-8")


def _messages_csv(folder):
    frame = pd.DataFrame({"message": ["parcel lost in the depot", "refund the double charge",
                                      "router light is red", "cancel my contract"] * 60,
                          "team": ["depot", "billing", "outage", "cancel"] * 60})
    frame["routed"] = frame["team"].where(np.arange(len(frame)) % 7 != 0, "billing")
    path = os.path.join(folder, "messages.csv")
    frame.to_csv(path, index=False)
    return path


@pytest.mark.parametrize("extra, message", [
    (["--embed-text"], "--embed-text needs --text-column COL"),
    (["--text-column", "message", "--text-model", "m"], "--text-model needs --embed-text"),
    (["--text-column", "message", "--no-text-features"], "--no-text-features needs --embed-text"),
    (["--text-column", "mesage", "--embed-text"], "text='mesage' is not a column of data. Did you mean 'message'?"),
    (["--text-column", "message", "--embed-text", "--text-model", "no/such/folder"],
     "text_model='no/such/folder' does not exist"),
])
def test_text_options_are_checked(tmp_path, capsys, extra, message):
    data = _messages_csv(str(tmp_path))
    code = main(["scan", data, "--label", "team", "--prediction", "routed", "--out", str(tmp_path / "ws"), *extra])
    assert (1, True) == (code, message in capsys.readouterr().err)
    assert not os.path.exists(tmp_path / "ws" / "slices.csv")


def test_scan_embed_text(tmp_path, capsys):
    """scan --text-column --embed-text clusters the text and stores the column for the review page."""
    data = _messages_csv(str(tmp_path))
    ws = str(tmp_path / "ws")
    assert 0 == main(["scan", data, "--label", "team", "--prediction", "routed", "--text-column", "message",
                      "--embed-text", "--out", ws])
    out = capsys.readouterr().out
    assert "finding slices (rules and embedding clusters)" in out
    from slicefind.workspace import Workspace

    with Workspace(ws, create=False) as w:
        found = w.load_found()
        assert ("message", "lsa") == (found.params["text"], found.params["text_method"])
        assert "message" in found.eval_table.data.columns
