"""The SQLite workspace: scans without the data file, queues, append-only reviews, schema."""
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time

import numpy as np
import pandas as pd
import pytest

import slicefind.workspace.store as wsmod
from review_helpers import strata_found
from slicefind.review.queue import build_queue
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.review.tally import tally
from slicefind.workspace import DB_NAME, SCHEMA_VERSION, Workspace, data_fingerprint


def _raw(ws):
    """A second, plain sqlite3 connection to the workspace database."""
    return sqlite3.connect(os.path.join(ws.path, DB_NAME))


# --- creating and opening --------------------------------------------------------------------

def test_new_workspace_creates_folder_schema_and_wal(tmp_path):
    """A new folder gets slicefind.sqlite in WAL mode at the current schema version."""
    path = tmp_path / "new" / "ws"
    with Workspace(path) as ws:
        assert SCHEMA_VERSION == ws.schema_version
    conn = sqlite3.connect(path / DB_NAME)
    assert "wal" == conn.execute("PRAGMA journal_mode").fetchone()[0]
    tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    assert {"meta", "scans", "scan_arrays", "slice_rows", "queues", "queue_order", "reviews", "names"} <= tables


def test_newer_schema_is_refused(tmp_path):
    """A database from a newer slicefind is refused with the versions and the fix."""
    Workspace(tmp_path / "ws").close()
    conn = sqlite3.connect(tmp_path / "ws" / DB_NAME)
    conn.execute("UPDATE meta SET value = '99' WHERE key = 'schema_version'")
    conn.commit()
    conn.close()
    with pytest.raises(SlicefindValueError, match=r"written by a newer slicefind .*schema version 99.* "
                                                  r"reads schema version 1 and older\. Upgrade slicefind"):
        Workspace(tmp_path / "ws")


def test_older_schema_without_a_migration_is_refused(tmp_path):
    """A schema version with no migration step is refused, saying what to do."""
    Workspace(tmp_path / "ws").close()
    conn = sqlite3.connect(tmp_path / "ws" / DB_NAME)
    conn.execute("UPDATE meta SET value = '0' WHERE key = 'schema_version'")
    conn.commit()
    conn.close()
    with pytest.raises(SlicefindValueError, match=r"uses schema version 0, which this slicefind .* cannot "
                                                  r"migrate \(no step from version 0\)"):
        Workspace(tmp_path / "ws")


def test_older_schema_is_migrated_after_a_backup(tmp_path, monkeypatch, depot):
    """With a migration step registered, a version-1 file is upgraded, backed up, data kept."""
    _, found = depot
    with Workspace(tmp_path / "ws") as ws:
        scan_id = ws.save_scan(found)

    def add_reviewer_column(conn):
        conn.execute("ALTER TABLE reviews ADD COLUMN reviewer TEXT NOT NULL DEFAULT ''")

    monkeypatch.setattr(wsmod, "SCHEMA_VERSION", 2)
    monkeypatch.setattr(wsmod, "MIGRATIONS", {1: add_reviewer_column})
    with Workspace(tmp_path / "ws") as ws:
        assert 2 == ws.schema_version
        assert found.table["slice_id"].tolist() == ws.load_found(scan_id).table["slice_id"].tolist()
        columns = [r[1] for r in ws._conn.execute("PRAGMA table_info(reviews)")]
    assert "reviewer" in columns
    assert (tmp_path / "ws" / f"{DB_NAME}.v1.bak").exists()


def test_files_that_are_not_workspaces_are_refused(tmp_path):
    """A file instead of a folder, a non-SQLite file, and a foreign SQLite file are refused."""
    (tmp_path / "plain.txt").write_text("shift,belt\n")
    with pytest.raises(SlicefindValueError, match="is a file; a workspace is a folder"):
        Workspace(tmp_path / "plain.txt")
    (tmp_path / "a").mkdir()
    (tmp_path / "a" / DB_NAME).write_bytes(b"this is not a database, just belt notes" * 50)
    with pytest.raises(SlicefindValueError, match="is not a SQLite database"):
        Workspace(tmp_path / "a")
    (tmp_path / "b").mkdir()
    conn = sqlite3.connect(tmp_path / "b" / DB_NAME)
    conn.execute("CREATE TABLE parcels (id TEXT)")
    conn.commit()
    conn.close()
    with pytest.raises(SlicefindValueError, match=r"not a slicefind workspace \(it has no meta table"):
        Workspace(tmp_path / "b")
    with pytest.raises(SlicefindTypeError, match="path must be a folder path"):
        Workspace(42)


# --- scans -----------------------------------------------------------------------------------

def test_scan_round_trip_without_the_data(tmp_path, depot):
    """A stored scan comes back with its slices, rows, per-row arrays, id and pointer columns."""
    frame, found = depot
    with Workspace(tmp_path / "ws") as ws:
        scan_id = ws.save_scan(found, data_fingerprint=data_fingerprint(frame), show="label_image")
    with Workspace(tmp_path / "ws") as ws:                  # a new process would do the same
        back = ws.load_found()
        scans = ws.scans()
    pd.testing.assert_frame_equal(found.table, back.table)
    pd.testing.assert_frame_equal(found.tested.reset_index(drop=True), back.tested)
    for sid in found.table["slice_id"]:
        assert found.rows(sid).tolist() == back.rows(sid).tolist()
    a, b = found.eval_table, back.eval_table
    assert a.errors.tolist() == b.errors.tolist() and a.positions.tolist() == b.positions.tolist()
    assert a.label.tolist() == b.label.tolist() and a.prediction.tolist() == b.prediction.tolist()
    assert (a.n_rows, a.n_errors, a.n_input_rows, a.id_column) == (b.n_rows, b.n_errors, b.n_input_rows, b.id_column)
    assert frame["label_image"].tolist() == b.data["label_image"].tolist()
    assert found.params["min_rows"] == back.params["min_rows"]
    assert data_fingerprint(frame) == back.extras["fingerprint"] == scans.at[0, "fingerprint"]
    assert [scan_id] == scans["scan_id"].tolist()


def test_queue_from_the_stored_scan_equals_the_queue_from_the_data(ws, depot):
    """build_queue gives the same sheet from the workspace as from the original data."""
    _, found = depot
    direct = build_queue(found, budget=60, show=("label_image",), random_state=3)
    stored = build_queue(ws.load_found(), budget=60, show=("label_image",), random_state=3)
    pd.testing.assert_frame_equal(direct.table, stored.table)
    pd.testing.assert_frame_equal(direct.strata, stored.strata)


def test_fingerprint_tells_data_apart():
    """The same frame gives the same fingerprint; one changed cell or index gives another."""
    frame = pd.DataFrame({"scanner": ["S1", "S2", "S3"], "belt_speed": [1.2, 2.5, 2.9]})
    changed = frame.copy()
    changed.loc[1, "belt_speed"] = 2.6
    assert data_fingerprint(frame) == data_fingerprint(frame.copy())
    assert data_fingerprint(frame) != data_fingerprint(changed)
    assert data_fingerprint(frame) != data_fingerprint(frame.set_axis([5, 6, 7]))


def test_unknown_scan_and_empty_workspace_are_named(tmp_path):
    """No scan yet, or an unknown scan id, says so."""
    with Workspace(tmp_path / "ws") as ws:
        with pytest.raises(SlicefindValueError, match="holds no scan yet"):
            ws.load_found()
    with Workspace(tmp_path / "ws") as ws:
        ws.save_scan(strata_found([10], 5))
        with pytest.raises(SlicefindValueError, match=r"scan_id=7 is not in this workspace; scans: \[1\]"):
            ws.load_found(7)
        with pytest.raises(SlicefindValueError, match="scan 1 has no queue yet"):
            ws.load_queue()


# --- queues ----------------------------------------------------------------------------------

def test_queue_round_trip_and_extension(ws):
    """A saved queue loads back equal in a new connection; an extension keeps it as a prefix;
    saving the same queue again adds nothing."""
    queue = ws.load_queue()
    with Workspace(ws.path) as other:
        again = other.load_queue()
    pd.testing.assert_frame_equal(queue.table, again.table)
    pd.testing.assert_frame_equal(queue.strata, again.strata)
    first = ws._latest_queue_id(1)
    assert first == ws.save_queue(queue)
    longer = queue.extend(15)
    second = ws.save_queue(longer)
    assert second != first
    loaded = ws.load_queue()
    pd.testing.assert_frame_equal(longer.table, loaded.table)
    pd.testing.assert_frame_equal(queue.table, loaded.table.head(len(queue)))


def test_queue_that_drops_reviewed_rows_needs_replace(ws):
    """A redrawn queue leaving out reviewed rows is refused; replace=True stores it and the
    tally then warns that those reviews are left out."""
    queue = ws.load_queue()
    row = int(queue.table["row"][0])
    ws.record_review(row, tags="torn label")
    other = build_queue(ws.load_found(), budget=40, random_state=77)
    assert row not in set(other.table["row"])
    with pytest.raises(SlicefindValueError, match=r"has reviews of 1 rows that this queue does not hold"):
        ws.save_queue(other)
    ws.save_queue(other, replace=True)
    with pytest.warns(UserWarning, match="1 reviewed rows of scan 1 are not in its current queue"):
        ws.tally()
    assert 1 == len(ws.history(row))


def test_queue_from_another_scan_is_refused(ws):
    """A queue drawn from a different scan cannot be stored with this one."""
    foreign = build_queue(strata_found([30], 20), budget=10)
    with pytest.raises(SlicefindValueError, match="the queue was drawn from a scan with"):
        ws.save_queue(foreign)


# --- reviews ---------------------------------------------------------------------------------

def test_record_review_latest_wins_and_history_is_kept(ws):
    """Each change is an event; unchanged writes add nothing; the latest is the state."""
    row = int(ws.load_queue().table["row"][3])
    first = ws.record_review(row, tags=["Torn Label", "faded ink "], note="corner missing", source="web")
    assert first is not None
    assert ws.record_review(row, tags="faded ink;torn label", note="corner missing", source="web") is None
    second = ws.record_review(row, tags="faded ink", source="web")
    assert second > first
    state = ws.reviews().set_index("row").loc[row]
    assert (True, "faded ink", "") == (state["reviewed"], state["tags"], state["note"])
    events = ws.history(row)
    assert ["faded ink;torn label", "faded ink"] == events["tags"].tolist()
    assert events["created_at"].is_monotonic_increasing


def test_record_review_bad_input_is_named(ws):
    """A row outside the queue, a non-bool reviewed, tags on a not-reviewed row are refused."""
    queue = ws.load_queue()
    row = int(queue.table["row"][0])
    outside = next(r for r in range(10_000) if r not in set(queue.table["row"]))
    with pytest.raises(SlicefindValueError, match=f"row={outside} is not in the queue of scan 1"):
        ws.record_review(outside)
    with pytest.raises(SlicefindTypeError, match="row must be an integer row number; got '3'"):
        ws.record_review("3")
    with pytest.raises(SlicefindTypeError, match="reviewed must be True or False; got 'yes'"):
        ws.record_review(row, reviewed="yes")
    with pytest.raises(SlicefindValueError, match="reviewed=False with tags 'faded ink'"):
        ws.record_review(row, reviewed=False, tags="faded ink")
    with pytest.raises(SlicefindTypeError, match="tags must be strings"):
        ws.record_review(row, tags=[1, 2])
    assert 0 == len(ws.history())


def _filled_sheet(ws, tmp_path, n=12):
    """The queue's sheet with the first n lines reviewed (alternating tags)."""
    path = tmp_path / "queue.csv"
    ws.load_queue().to_csv(path)
    sheet = pd.read_csv(path, encoding="utf-8-sig", dtype=str, keep_default_na=False)
    sheet.loc[: n - 1, "reviewed"] = "yes"
    sheet.loc[: n - 1, "tags"] = ["Faded ink" if i % 2 else "torn label; faded ink" for i in range(n)]
    sheet.to_csv(path, index=False)
    return path, sheet


def test_importing_the_same_sheet_twice_changes_nothing(ws, tmp_path):
    """A second import of an unchanged sheet writes no event."""
    path, _ = _filled_sheet(ws, tmp_path)
    first = ws.import_sheet(path)
    assert {"lines": 40, "recorded": 12, "unchanged": 0, "blank": 28} == first
    events = len(ws.history())
    second = ws.import_sheet(path)
    assert {"lines": 40, "recorded": 0, "unchanged": 12, "blank": 28} == second
    assert events == len(ws.history())
    assert f"sheet:{path}" == ws.history()["source"].iloc[0]


def test_stale_blank_lines_do_not_undo_other_reviews(ws, tmp_path):
    """A blank line leaves a review made elsewhere alone; an explicit 0 un-reviews the row."""
    path, sheet = _filled_sheet(ws, tmp_path, n=2)
    late = int(sheet.loc[5, "row"])
    ws.record_review(late, tags="ink smear", source="web")
    ws.import_sheet(path)
    assert "ink smear" == ws.reviews().set_index("row").at[late, "tags"]
    sheet.loc[5, "reviewed"] = "0"
    sheet.to_csv(path, index=False)
    ws.import_sheet(path)
    state = ws.reviews().set_index("row").loc[late]
    assert (False, "") == (state["reviewed"], state["tags"])
    assert 2 == len(ws.history(late))


def test_malformed_sheet_writes_nothing(ws, tmp_path):
    """One bad line anywhere: the error lists it and no event is written."""
    path, sheet = _filled_sheet(ws, tmp_path)
    sheet.loc[30, "reviewed"] = "perhaps"
    sheet.to_csv(path, index=False)
    with pytest.raises(SlicefindValueError, match="line 32: reviewed 'perhaps' is not yes/no"):
        ws.import_sheet(path)
    assert 0 == len(ws.history())


def test_workspace_tally_equals_tally_of_the_sheet_and_uses_names(ws, tmp_path):
    """The stored reviews and names give the same tally as the sheet with names= given."""
    path, _ = _filled_sheet(ws, tmp_path, n=30)
    ws.import_sheet(path)
    ws.set_name("R1", "Torn Label")
    stored = ws.tally()
    direct = tally(ws.load_queue(), path, names={"R1": "torn label"})
    pd.testing.assert_frame_equal(direct.categories, stored.categories)
    pd.testing.assert_frame_equal(direct.slices, stored.slices)
    assert "names" == stored.slices.set_index("slice_id").at["R1", "name_source"]


def test_sheet_refilled_from_the_workspace_reads_back_the_same(ws, tmp_path):
    """to_csv(reviews=ws.reviews()) writes a sheet whose import changes nothing."""
    path, _ = _filled_sheet(ws, tmp_path)
    ws.import_sheet(path)
    fresh = tmp_path / "again.csv"
    ws.load_queue().to_csv(fresh, reviews=ws.reviews())
    assert 0 == ws.import_sheet(fresh)["recorded"]


def test_names_latest_wins_and_clearing(ws):
    """set_name stores events; names() gives the latest non-empty one."""
    assert ws.set_name("R1", "Faded Ink") is not None
    assert ws.set_name("R1", "faded ink") is None
    assert {"R1": "faded ink"} == ws.names()
    ws.set_name("R1", "")
    assert {} == ws.names()
    with pytest.raises(SlicefindValueError, match="slice_id='R99' is not a slice of scan 1"):
        ws.set_name("R99", "torn label")


def test_events_are_append_only(ws):
    """UPDATE and DELETE on reviews and names are refused by the database itself."""
    row = int(ws.load_queue().table["row"][0])
    ws.record_review(row, tags="torn label")
    ws.set_name("R1", "torn label")
    conn = _raw(ws)
    for statement in ("UPDATE reviews SET tags = 'x'", "DELETE FROM reviews",
                      "UPDATE names SET name = 'x'", "DELETE FROM names"):
        with pytest.raises(sqlite3.DatabaseError, match="append-only"):
            conn.execute(statement)
    conn.close()


def test_two_connections_latest_write_wins(ws):
    """Two tabs (two connections) writing the same row: the later write is the state."""
    row = int(ws.load_queue().table["row"][1])
    with Workspace(ws.path) as other:
        ws.record_review(row, tags="faded ink", source="tab 1")
        other.record_review(row, tags="ink smear", source="tab 2")
        assert "ink smear" == ws.reviews().set_index("row").at[row, "tags"]
        assert ["tab 1", "tab 2"] == other.history(row)["source"].tolist()


def test_threads_share_one_workspace(ws):
    """Concurrent single-row writes from 8 threads are all recorded."""
    rows = ws.load_queue().table["row"].astype(int).tolist()[:32]
    errors = []

    def work(part):
        try:
            for r in part:
                ws.record_review(r, tags="torn label", source="web")
        except Exception as exc:           # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(rows[i::8],)) for i in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert [] == errors
    assert sorted(rows) == sorted(ws.history()["row"].tolist())


_IMPORT_SCRIPT = """
import sys
from slicefind.workspace import Workspace
ws = Workspace(sys.argv[1])
ws.import_sheet(sys.argv[2], batch_size=int(sys.argv[3]))
print("finished")
"""


def test_killed_import_is_all_or_nothing(tmp_path):
    """SIGKILL inside a 20,000-line import's transaction: the database is intact, earlier
    reviews survive, none of the sheet is in, and running the import again completes it."""
    found = strata_found([7_000, 7_000], 6_000, n_correct=1_000)
    folder = tmp_path / "ws"
    with Workspace(folder) as ws:
        ws.save_scan(found)
        queue = build_queue(found, budget=20_000)
        ws.save_queue(queue)
        earlier = [int(r) for r in queue.table["row"][:5]]
        for r in earlier:
            ws.record_review(r, tags="faded ink", source="web")
    rows = queue.table["row"].to_numpy()
    sheet = pd.DataFrame({"row": rows, "reviewed": "1",
                          "tags": np.where(rows % 2 == 0, "torn label", "ink smear")})
    path = tmp_path / "big.csv"
    sheet.to_csv(path, index=False)
    batch = 20
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(sys.path))
    proc = subprocess.Popen([sys.executable, "-c", _IMPORT_SCRIPT, str(folder), str(path), str(batch)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env)
    probe = sqlite3.connect(folder / DB_NAME, timeout=0, isolation_level=None)
    deadline = time.monotonic() + 120
    locked = False
    while not locked and time.monotonic() < deadline and proc.poll() is None:
        try:                                   # the importer's write transaction holds the lock
            probe.execute("BEGIN IMMEDIATE")
            probe.execute("ROLLBACK")
            time.sleep(0.001)
        except sqlite3.OperationalError:
            locked = True
    proc.send_signal(signal.SIGKILL)
    out, err = proc.communicate()
    probe.close()
    assert locked, "the import finished before its transaction was seen: " + err.decode()[-2000:]
    assert -signal.SIGKILL == proc.returncode, err.decode()[-2000:]
    with Workspace(folder) as ws:
        assert "ok" == ws._conn.execute("PRAGMA integrity_check").fetchone()[0]
        imported = ws.history()
        assert 0 == imported["source"].str.startswith("sheet:").sum()      # nothing of the sheet
        web = imported[imported["source"] == "web"]
        assert earlier == web["row"].tolist()                              # earlier reviews intact
        done = ws.import_sheet(path)
        assert len(sheet) == done["recorded"]
        state = ws.reviews().set_index("row")
        expected = sheet.set_index("row")["tags"]
        assert expected.to_dict() == state.loc[expected.index, "tags"].to_dict()
        assert 0 == ws.import_sheet(path)["recorded"]


# --- what the command line keeps besides reviews ---------------------------------------------

def test_create_false_refuses_a_missing_workspace(tmp_path):
    """create=False does not make a folder; it says how to start one."""
    with pytest.raises(SlicefindValueError, match=r"is not a slicefind workspace \(it has no slicefind.sqlite\)"):
        Workspace(tmp_path / "nothing", create=False)
    assert not (tmp_path / "nothing").exists()


def test_stored_columns_are_the_pointer_columns(ws):
    """stored_columns() gives the show= columns saved with the scan."""
    assert ("label_image",) == ws.stored_columns()


def test_artifacts_round_trip_without_pickle(ws):
    """Arrays, frames, nested containers and slicefind dataclasses come back equal; a name
    saved again replaces its value; unknown names give the default."""
    from dataclasses import dataclass

    from slicefind.discovery.items import Item
    from slicefind.discovery.records import Slice

    frame = pd.DataFrame({"label": [3, 8], "prediction": [8, 3], "n_errors": [12, 5]},
                         index=pd.Index(["a", "b"], name="pair"))
    value = {"map_xy": np.arange(6, dtype=np.float32).reshape(3, 2), "confusions": frame,
             "notes": ("belt 3 jams", None, 2.5), "R1": Item("scanner", "=", "S3", "scanner = S3"),
             "slice": Slice("rule", "shift = night", np.array([1, 4, 9]), n_terms=1, key="k")}
    ws.save_artifact("report", value)
    back = ws.load_artifact("report")
    assert value["map_xy"].tolist() == back["map_xy"].tolist() and np.float32 == back["map_xy"].dtype
    pd.testing.assert_frame_equal(frame, back["confusions"])
    assert value["notes"] == back["notes"] and value["R1"] == back["R1"]
    assert [1, 4, 9] == back["slice"].rows.tolist() and "shift = night" == back["slice"].description
    ws.save_artifact("report", {"notes": []})
    assert {"notes": []} == ws.load_artifact("report")
    assert "none" == ws.load_artifact("missing", default="none")

    @dataclass
    class Foreign:
        x: int

    with pytest.raises(SlicefindTypeError, match="artifacts hold slicefind's own dataclasses only"):
        ws.save_artifact("bad", Foreign(1))
    with pytest.raises(SlicefindTypeError, match="an artifact cannot hold a set"):
        ws.save_artifact("bad", {1, 2})
