"""The walk-throughs in demo/ run as a user runs them and print what they say they print."""
import os
import re
import subprocess
import sys

import pandas as pd
import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _run(script, out, *extra):
    result = subprocess.run([sys.executable, os.path.join(ROOT, "demo", script), "--out", str(out), *extra],
                            capture_output=True, text=True, timeout=300, cwd=ROOT)
    assert 0 == result.returncode, result.stderr[-2000:]
    return result.stdout


def test_depot_walkthrough(tmp_path):
    out = _run("depot_walkthrough.py", tmp_path / "wt", "--rows", "3000")
    assert "SIMULATED reviewer filled" in out
    filled = pd.read_csv(tmp_path / "wt" / "queue_reviewed_SIMULATED.csv", keep_default_na=False)
    assert 100 == len(filled) and {"packing tape", "faded thermal print"} <= set(
        t for cell in filled["tags"] for t in cell.split(";") if t)
    for name in ("packing tape", "faded thermal print", "ink smear"):
        assert f"   {name}: " in out                    # a plain-words paragraph per planted mode


def test_randhie_walkthrough(tmp_path):
    pytest.importorskip("statsmodels")
    out = _run("randhie_walkthrough.py", tmp_path / "rh")
    assert "1. 20,190 people" in out and "RAND corporation" in out
    assert "caution: Slices defined by people's attributes" in out
    counts = [int(m.group(1)) for m in re.finditer(r"^\s*(?:predicted|missed) a visit\s+(\d+)\s", out, re.M)]
    # the two error kinds split every reviewed error between them: tagged counts add to the 100 queued
    assert (2, 100) == (len(counts), sum(counts))
