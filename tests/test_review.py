"""The review page: its API over real HTTP (urllib) and the page itself in headless Chromium."""
import http.client
import io
import json
import os
import shutil
import sqlite3
import tempfile
import threading
import urllib.error
import urllib.request

import numpy as np
import pandas as pd
import pytest

import slicefind as sf
from browser import CHROMIUM_ARGS, chromium_or_skip
from slicefind.page import common, server as review
from slicefind.discovery.describe import describe_slice
from slicefind.review.queue import build_queue
from slicefind.review.tally import WRONG_LABEL, read_reviews, tally
from slicefind.workspace import Workspace

SHOW = ("scanner", "belt_speed", "label_stock", "shift")
#: 5 x 7 glyphs of the digits printed on the depot's parcel labels
GLYPHS = {
    0: "01110 10001 10011 10101 11001 10001 01110", 1: "00100 01100 00100 00100 00100 00100 01110",
    2: "01110 10001 00001 00010 00100 01000 11111", 3: "11110 00001 00001 01110 00001 00001 11110",
    4: "00010 00110 01010 10010 11111 00010 00010", 5: "11111 10000 11110 00001 00001 10001 01110",
    6: "00110 01000 10000 11110 10001 10001 01110", 7: "11111 00001 00010 00100 01000 01000 01000",
    8: "01110 10001 10001 01110 10001 10001 01110", 9: "01110 10001 10001 01111 00001 00010 01100",
}
#: where the browser test leaves its screenshots for a reviewer (also under pytest's tmp_path)
SCREENSHOT = os.path.join(tempfile.gettempdir(), "slicefind-review.png")


def _depot(n=2400, seed=7):
    """A parcel depot reading label digits: metadata, digit and reading, 12 x 12 label crops.

    Ink smears on scanner S3 at belt speeds of 2.2 m/s and more; thermal stock fades on
    the night shift. Both raise the error rate and both show in the crops.
    """
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "parcel": [f"P{i:05d}" for i in range(n)],
        "scanner": rng.choice(["S1", "S2", "S3", "S4"], n),
        "belt_speed": np.round(rng.uniform(1.0, 2.6, n), 2),
        "label_stock": rng.choice(["matte", "gloss", "thermal"], n),
        "shift": rng.choice(["day", "night"], n),
    })
    digit = rng.integers(0, 10, n)
    smear = ((frame["scanner"] == "S3") & (frame["belt_speed"] >= 2.2)).to_numpy()
    faded = ((frame["label_stock"] == "thermal") & (frame["shift"] == "night")).to_numpy()
    wrong = rng.random(n) < np.where(smear, 0.6, np.where(faded, 0.45, 0.04))
    frame["digit"] = digit
    frame["read_as"] = np.where(wrong, (digit + rng.integers(1, 10, n)) % 10, digit)
    crops = np.zeros((n, 12, 12), dtype=np.float32)
    for i in range(n):
        glyph = np.array([[c == "1" for c in line] for line in GLYPHS[int(digit[i])].split()]) * 16.0
        dy, dx = rng.integers(1, 4), rng.integers(2, 5)
        crops[i, dy:dy + 7, dx:dx + 5] = glyph
        if smear[i]:
            crops[i] = np.maximum(crops[i], 0.6 * np.roll(crops[i], 1, axis=1))
            crops[i] = np.maximum(crops[i], 0.35 * np.roll(crops[i], 2, axis=1))
        if faded[i]:
            crops[i] *= 0.3
        crops[i] += rng.uniform(0, 0.8, (12, 12))
    return frame, np.clip(crops, 0, 16)


@pytest.fixture(scope="module")
def depot():
    return _depot()


@pytest.fixture(scope="module")
def template(depot, tmp_path_factory):
    """A workspace (scan, queue of 40, descriptions, crops as the report artifact) to copy."""
    frame, crops = depot
    folder = tmp_path_factory.mktemp("depot")
    np.save(folder / "crops.npy", crops)
    found = sf.find_slices(frame, label="digit", prediction="read_as", id_column="parcel")
    with Workspace(folder / "ws") as ws:
        ws.save_scan(found, show=SHOW)
        ws.save_artifact("descriptions", {sid: describe_slice(found, sid) for sid in found.table["slice_id"]})
        ws.save_artifact("report", {"images": str(folder / "crops.npy"), "image_column": None,
                                    "text_column": None, "data_folder": str(folder)})
        ws.save_queue(build_queue(ws.load_found(), budget=40, rest=10, show=SHOW))
    return folder / "ws"


@pytest.fixture
def workspace(template, tmp_path):
    """A fresh copy of the template workspace."""
    path = tmp_path / "ws"
    path.mkdir()
    shutil.copy(template / "slicefind.sqlite", path / "slicefind.sqlite")
    return str(path)


@pytest.fixture
def server(workspace):
    """A review server on a fresh workspace."""
    running = review.make_server(workspace).start()
    yield running
    running.close()


@pytest.fixture(scope="module")
def shared(template, tmp_path_factory):
    """(server, workspace) shared by the tests whose requests must change nothing."""
    path = tmp_path_factory.mktemp("shared") / "ws"
    path.mkdir()
    shutil.copy(template / "slicefind.sqlite", path / "slicefind.sqlite")
    running = review.make_server(path).start()
    yield running, str(path)
    running.close()


def _call(server, method, path, body=None, *, headers=None, token=None):
    """(status, parsed JSON or bytes) of one request through urllib."""
    token = server.token if token is None else token
    base = f"http://127.0.0.1:{server.httpd.server_address[1]}"
    url = f"{base}/{token}/{path}" if token else f"{base}/{path}"
    data = json.dumps(body).encode() if isinstance(body, (dict, list)) else body
    heads = {"Content-Type": "application/json"} if isinstance(body, (dict, list)) else {}
    heads.update(headers or {})
    request = urllib.request.Request(url, data=data, method=method, headers=heads)
    try:
        with urllib.request.urlopen(request, timeout=20) as answer:
            status, kind, raw = answer.status, answer.headers.get("Content-Type", ""), answer.read()
    except urllib.error.HTTPError as exc:
        status, kind, raw = exc.code, exc.headers.get("Content-Type", ""), exc.read()
    return status, (json.loads(raw) if kind.startswith("application/json") else raw)


def _raw(server, method, path, *, body=b"", headers=None):
    """(status, body) of a request sent as written (no path clean-up, headers as given)."""
    port = server.httpd.server_address[1]
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=20)
    conn.putrequest(method, path, skip_host=True, skip_accept_encoding=True)
    heads = {"Host": f"127.0.0.1:{port}", **(headers or {})}
    for key, value in heads.items():
        conn.putheader(key, value)
    conn.endheaders(body if body else None)
    answer = conn.getresponse()
    out = answer.status, answer.read()
    conn.close()
    return out


def _snapshot(path):
    """Everything a write could change: review history, name events, categories."""
    with Workspace(path, create=False) as ws:
        history = ws.history().to_dict("records")
        names = ws.names()
        categories = ws.load_artifact(common.CATEGORIES_ARTIFACT, default=None)
    return history, names, categories


def _queued(workspace, k=0, stratum=None):
    with Workspace(workspace, create=False) as ws:
        table = ws.load_queue().table
    if stratum is not None:
        table = table[table["stratum"] == stratum]
    return int(table["row"].iloc[k])


# --- the API --------------------------------------------------------------------------------


def test_state_lists_the_queue_and_the_workspace_tally(server, workspace):
    """api/state holds every queued row in order, each stratum, and the workspace's own tally."""
    status, state = _call(server, "GET", "api/state")
    with Workspace(workspace, create=False) as ws:
        queue = ws.load_queue()
        expected = ws.tally()
    assert 200 == status
    assert queue.table["row"].tolist() == [r["row"] for r in state["rows"]]
    assert queue.strata["stratum"].tolist() == [s["stratum"] for s in state["strata"]]
    assert common.records(expected.categories) == state["tally"]["categories"]
    assert common.records(expected.slices) == state["tally"]["slices"]
    assert "pixels" == state["image_kind"]


def test_token_is_required_everywhere(shared):
    """Without the token, or with a wrong or shortened one, every path is refused and nothing is written."""
    server, workspace = shared
    row = _queued(workspace)
    before = _snapshot(workspace)
    for token in ("", "x" * len(server.token), server.token[:-1], server.token + "x"):
        for method, path, body in (("GET", "", None), ("GET", "api/state", None), ("GET", "img/0", None),
                                   ("POST", "api/review", {"row": row, "toggle": "faded print"})):
            status, answer = _call(server, method, path, body, token=token or "")
            assert (403, "missing or wrong token") == (status, answer["error"][:22])
    assert (403, 403) == (_raw(server, "GET", "/")[0], _raw(server, "GET", "/favicon.ico")[0])
    assert before == _snapshot(workspace)
    assert 200 == _call(server, "GET", "api/state")[0]


def test_foreign_host_header_is_refused(shared):
    """A request naming another host (a rebound DNS name) is refused even with the token."""
    server, _ = shared
    status, _ = _raw(server, "GET", f"/{server.token}/api/state", headers={"Host": "depot.example:80"})
    assert 403 == status


def test_toggle_is_written_at_once_and_keeps_history(server, workspace):
    """Each toggle is one review event in the workspace; toggling twice removes the tag again."""
    row = _queued(workspace)
    status, answer = _call(server, "POST", "api/review", {"row": row, "toggle": "Faded  Print"})
    assert (200, ["faded print"], True) == (status, answer["row"]["tags"], answer["row"]["reviewed"])
    with Workspace(workspace, create=False) as ws:
        assert ["faded print"] == ws.reviews().set_index("row").loc[[row], "tags"].tolist()
    _call(server, "POST", "api/review", {"row": row, "toggle": "smeared ink"})
    _call(server, "POST", "api/review", {"row": row, "toggle": "faded print"})
    with Workspace(workspace, create=False) as ws:
        history = ws.history(row)
        categories = ws.load_artifact(common.CATEGORIES_ARTIFACT)
    assert ["faded print", "faded print;smeared ink", "smeared ink"] == history["tags"].tolist()
    assert {common.SOURCE} == set(history["source"])
    assert ["faded print", "smeared ink"] == categories


def test_reviewed_without_tags_then_reset(server, workspace):
    """reviewed=true records an untagged review; reviewed=false returns the row to not reviewed."""
    row = _queued(workspace, 1)
    _, marked = _call(server, "POST", "api/review", {"row": row, "reviewed": True})
    _, after_mark = _call(server, "GET", "api/tally")
    untagged = {c["category"]: c["n_tagged"] for c in after_mark["categories"]}["(untagged)"]
    _, reset = _call(server, "POST", "api/review", {"row": row, "reviewed": False})
    _, after_reset = _call(server, "GET", "api/tally")
    assert (True, [], 1) == (marked["row"]["reviewed"], marked["row"]["tags"], untagged)
    assert (False, 0) == (reset["row"]["reviewed"], after_reset["summary"]["n_reviewed"])


def test_note_keeps_tags(server, workspace):
    """A note alone leaves the row's tags and reviewed mark as they were."""
    row = _queued(workspace, 2)
    _call(server, "POST", "api/review", {"row": row, "toggle": "smeared ink"})
    _, answer = _call(server, "POST", "api/review", {"row": row, "note": "ink runs off the edge"})
    assert (["smeared ink"], True, "ink runs off the edge") == (
        answer["row"]["tags"], answer["row"]["reviewed"], answer["row"]["note"])


def test_name_and_categories(server, workspace):
    """Naming a candidate and adding a category are stored; an unused category can be removed, a used one not."""
    status, answer = _call(server, "POST", "api/name", {"slice_id": "R1", "name": "Faded print"})
    assert (200, {"R1": "faded print"}) == (status, answer["names"])
    _call(server, "POST", "api/category", {"name": "torn label"})
    _call(server, "POST", "api/category", {"name": "glare"})
    _call(server, "POST", "api/review", {"row": _queued(workspace), "toggle": "glare"})
    status, answer = _call(server, "GET", "api/state")
    assert ["torn label", "glare", "faded print"] == answer["categories"]
    assert 409 == _call(server, "POST", "api/category", {"name": "glare", "remove": True})[0]
    _, answer = _call(server, "POST", "api/category", {"name": "torn label", "remove": True})
    assert ["glare", "faded print"] == answer["categories"]


def test_wrong_label_is_a_tag_of_its_own_not_a_category(server, workspace):
    """Toggling the wrong-label tag stores it on the row but keeps it off the numbered category list."""
    row = _queued(workspace)
    _, answer = _call(server, "POST", "api/review", {"row": row, "toggle": "Wrong label"})
    assert ([WRONG_LABEL], True) == (answer["row"]["tags"], answer["row"]["reviewed"])
    _, state = _call(server, "GET", "api/state")
    assert (WRONG_LABEL, []) == (state["wrong_label"], state["categories"])
    with Workspace(workspace, create=False) as ws:
        assert WRONG_LABEL == ws.reviews().set_index("row").at[row, "tags"]


BAD_REQUESTS = [
    ("unknown row", "POST", "api/review", {"row": 10**9, "toggle": "faded print"}, {}, 404),
    ("row as text", "POST", "api/review", {"row": "12", "toggle": "faded print"}, {}, 400),
    ("row as bool", "POST", "api/review", {"row": True, "toggle": "faded print"}, {}, 400),
    ("malformed JSON", "POST", "api/review", b'{"row": 1, "toggle": ', {"Content-Type": "application/json"}, 400),
    ("JSON list", "POST", "api/review", [1, 2], {}, 400),
    ("not JSON", "POST", "api/review", b"row=1", {"Content-Type": "application/x-www-form-urlencoded"}, 415),
    ("bad UTF-8", "POST", "api/review", b'{"row": "\xff"}', {"Content-Type": "application/json"}, 400),
    ("oversized body", "POST", "api/review", b"{" + b" " * (review.MAX_JSON_BYTES + 10) + b"}",
     {"Content-Type": "application/json"}, 413),
    ("unknown field", "POST", "api/review", {"ROW": 1, "drop": True}, {}, 400),
    ("reserved tag", "POST", "api/review", {"row": "QUEUED", "toggle": "(untagged)"}, {}, 400),
    ("tag with separator", "POST", "api/review", {"row": "QUEUED", "toggle": "faded;smeared"}, {}, 400),
    ("empty toggle", "POST", "api/review", {"row": "QUEUED", "toggle": "  "}, {}, 400),
    ("tags not a list", "POST", "api/review", {"row": "QUEUED", "tags": "a;b"}, {}, 400),
    ("tags and reviewed false", "POST", "api/review", {"row": "QUEUED", "tags": ["a"], "reviewed": False}, {}, 400),
    ("reviewed as text", "POST", "api/review", {"row": "QUEUED", "reviewed": "yes"}, {}, 400),
    ("long tag", "POST", "api/review", {"row": "QUEUED", "toggle": "x" * 201}, {}, 400),
    ("unknown slice", "POST", "api/name", {"slice_id": "R99", "name": "faded"}, {}, 404),
    ("rest has no name", "POST", "api/name", {"slice_id": "rest", "name": "faded"}, {}, 404),
    ("name not text", "POST", "api/name", {"slice_id": "R1", "name": 3}, {}, 400),
    ("empty category", "POST", "api/category", {"name": ""}, {}, 400),
    ("wrong label as a category", "POST", "api/category", {"name": "(wrong label)"}, {}, 400),
    ("unknown API", "POST", "api/delete_everything", {"row": 1}, {}, 404),
    ("GET on a write", "GET", "api/review", None, {}, 405),
    ("PUT", "PUT", "api/review", {"row": "QUEUED", "toggle": "a"}, {}, 405),
    ("DELETE", "DELETE", "api/state", None, {}, 405),
    ("unknown page", "GET", "api/everything", None, {}, 404),
]


@pytest.mark.parametrize("case", BAD_REQUESTS, ids=[c[0] for c in BAD_REQUESTS])
def test_bad_request_gets_4xx_and_changes_nothing(shared, case):
    """Each malformed or impossible request is answered 4xx with a message and writes nothing."""
    server, workspace = shared
    _, method, path, body, headers, expected = case
    if isinstance(body, dict) and body.get("row") == "QUEUED":
        body = {**body, "row": _queued(workspace)}
    before = _snapshot(workspace)
    status, answer = _call(server, method, path, body, headers=headers)
    assert expected == status
    assert isinstance(answer, dict) and answer["error"]
    assert before == _snapshot(workspace)
    assert 200 == _call(server, "GET", "api/version")[0]          # and the server still answers


def test_chunked_or_unsized_body_is_refused(shared):
    """A POST without Content-Length (or chunked) gets 411 and writes nothing."""
    server, workspace = shared
    before = _snapshot(workspace)
    status, _ = _raw(server, "POST", f"/{server.token}/api/review",
                     headers={"Content-Type": "application/json", "Transfer-Encoding": "chunked"})
    assert 411 == status
    status, _ = _raw(server, "POST", f"/{server.token}/api/review", headers={"Content-Type": "application/json"})
    assert 411 == status
    assert before == _snapshot(workspace)


@pytest.mark.parametrize("path", [
    "static/../slicefind.sqlite", "static/../../ws/slicefind.sqlite", "static/%2e%2e/slicefind.sqlite",
    "static/review.py", "static/", "static/..%2fslicefind.sqlite", "img/../slicefind.sqlite", "img/-1",
    "img/1e3", "img/%30", "img/99999999", "../slicefind.sqlite", "api/../../slicefind.sqlite",
    "static/review.css/..", "static\\..\\slicefind.sqlite",
])
def test_paths_outside_the_page_are_not_served(shared, path):
    """Traversal attempts (.., encoded dots, backslashes, other files) get 404 or 403, never a file."""
    server, _ = shared
    status, body = _raw(server, "GET", f"/{server.token}/{path}")
    assert status in (403, 404)
    assert b"SQLite" not in body and b"import" not in body


def test_page_and_static_files_are_served_with_a_strict_policy(shared):
    """The page, its CSS and JS come back with a content security policy and no caching."""
    server, _ = shared
    for path, kind in (("", "text/html"), ("static/review.js", "text/javascript"),
                       ("static/review.css", "text/css")):
        request = urllib.request.Request(f"{server.url}{path}")
        with urllib.request.urlopen(request, timeout=10) as answer:
            assert (200, kind) == (answer.status, answer.headers["Content-Type"].split(";")[0])
            assert "script-src 'self'" in answer.headers["Content-Security-Policy"]
            assert "no-store" == answer.headers["Cache-Control"]


def test_thumbnail_is_a_png_of_the_row(shared, depot):
    """img/ROW is a PNG whose pixels (read by Pillow) are the row's crop on the crops' ink scale."""
    server, _ = shared
    from PIL import Image

    _, crops = depot
    row = 17
    status, data = _call(server, "GET", f"img/{row}")
    low, high = float(crops.min()), float(crops.max())
    expected = 255 - np.round(np.clip((crops[row] - low) / (high - low), 0, 1) * 255).astype(np.uint8)
    assert 200 == status
    assert expected.tolist() == np.asarray(Image.open(io.BytesIO(data))).tolist()


def test_png_encoder_matches_pillow():
    """Grey floats decode (Pillow 10+) to ink-dark 8-bit values; uint8 colour decodes unchanged."""
    from PIL import Image

    grey = common.png_bytes(np.array([[0.0, 8.0], [16.0, 4.0]]), 0.0, 16.0)
    colour = np.arange(2 * 3 * 3, dtype=np.uint8).reshape(2, 3, 3) * 10
    assert [[255, 127], [0, 191]] == np.asarray(Image.open(io.BytesIO(grey))).tolist()
    assert colour.tolist() == np.asarray(Image.open(io.BytesIO(common.png_bytes(colour, 0, 255)))).tolist()


def test_image_files_only_from_allowed_folders(tmp_path):
    """Image paths stored in the scan are served only from inside the data folder, never beyond it."""
    data = tmp_path / "depot"
    (data / "crops").mkdir(parents=True)
    png = common.png_bytes(np.eye(4) * 16, 0, 16)
    (data / "crops" / "ok.png").write_bytes(png)
    (tmp_path / "outside.png").write_bytes(png)
    (data / "crops" / "notes.txt").write_text("not an image")
    os.symlink(tmp_path / "outside.png", data / "crops" / "link.png")
    n = 400
    rng = np.random.default_rng(1)
    frame = pd.DataFrame({"scanner": rng.choice(["S1", "S2"], n), "shift": rng.choice(["day", "night"], n)})
    frame["crop"] = "crops/ok.png"
    frame.loc[1:5, "crop"] = ["../outside.png", str(tmp_path / "outside.png"), "crops/link.png",
                              "crops/notes.txt", "crops/missing.png"]
    wrong = rng.random(n) < np.where(frame["scanner"] == "S2", 0.5, 0.1)
    found = sf.find_slices(frame, errors=wrong, exclude=("crop",))
    with Workspace(tmp_path / "ws") as ws:
        ws.save_scan(found, show=("crop",))
        ws.save_queue(build_queue(ws.load_found(), budget=20, rest=5, show=("crop",)))
    with review.make_server(tmp_path / "ws", image_column="crop", data_folder=str(data)).start() as server:
        got = [_call(server, "GET", f"img/{row}")[0] for row in range(7)]
        assert (200, png) == _call(server, "GET", "img/0")
    assert [200, 403, 403, 403, 415, 404, 200] == got
    with review.make_server(tmp_path / "ws", image_column="crop", data_folder=str(data),
                            image_folders=[str(tmp_path)]).start() as server:
        assert [200, 200, 200, 200] == [_call(server, "GET", f"img/{row}")[0] for row in range(4)]


def test_two_clients_on_two_servers_keep_the_workspace_whole(workspace):
    """Four writers (two tabs on each of two servers) all land: every event kept, the latest state wins."""
    with Workspace(workspace, create=False) as ws:
        rows = ws.load_queue().table["row"].astype(int).tolist()
    servers = [review.make_server(workspace).start() for _ in range(2)]
    shared = rows[0]
    plans = {w: [(rows[1 + w * 3 + k], f"cat {w}") for k in range(3)] + [(shared, f"cat {w}")]
             for w in range(4)}
    failures = []

    def writer(w):
        for row, tag in plans[w] * 3:                    # toggled on, off, on again
            status, answer = _call(servers[w % 2], "POST", "api/review", {"row": row, "toggle": tag})
            if status != 200:
                failures.append((w, status, answer))

    threads = [threading.Thread(target=writer, args=(w,)) for w in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    for s in servers:
        s.close()
    assert [] == failures
    with Workspace(workspace, create=False) as ws:
        latest = ws.reviews().set_index("row")
        history = ws.history()
    own = {row: tag for w in plans for row, tag in plans[w][:-1]}
    assert {row: tag for row, tag in own.items()} == {row: latest.at[row, "tags"] for row in own}
    assert 3 * len(own) == int(history["row"].isin(list(own)).sum())
    last_shared = history[history["row"] == shared].iloc[-1]
    assert last_shared["tags"] == latest.at[shared, "tags"]
    conn = sqlite3.connect(os.path.join(workspace, "slicefind.sqlite"))
    assert [("ok",)] == conn.execute("PRAGMA integrity_check").fetchall()
    conn.close()


def test_two_tabs_on_one_server_toggle_one_row(server, workspace):
    """Two tabs toggling different tags of one row at once both take effect."""
    row = _queued(workspace)
    tags = [f"tag {k}" for k in range(8)]
    threads = [threading.Thread(target=_call, args=(server, "POST", "api/review", {"row": row, "toggle": t}))
               for t in tags]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    with Workspace(workspace, create=False) as ws:
        assert ";".join(sorted(tags)) == ws.reviews().set_index("row").at[row, "tags"]
        assert len(tags) == len(ws.history(row))


def test_export_then_import_a_filled_sheet(server, workspace, tmp_path):
    """The exported sheet carries every review; a filled sheet imports; a bad one is refused whole."""
    first, second, third = (_queued(workspace, k) for k in range(3))
    _call(server, "POST", "api/review", {"row": first, "toggle": "faded print"})
    status, sheet = _call(server, "GET", "api/export")
    with Workspace(workspace, create=False) as ws:
        queue = ws.load_queue()
    (tmp_path / "sheet.csv").write_bytes(sheet)
    read = read_reviews(str(tmp_path / "sheet.csv"), queue).set_index("row")
    assert (200, "faded print", True) == (status, read.at[first, "tags"], bool(read.at[first, "reviewed"]))

    frame = pd.read_csv(io.BytesIO(sheet), encoding="utf-8-sig", dtype=str, keep_default_na=False)
    frame.loc[frame["row"] == str(second), ["reviewed", "tags"]] = ["1", "Smeared ink; glare"]
    filled = frame.to_csv(index=False).encode("utf-8")
    status, answer = _call(server, "POST", "api/import", filled, headers={"Content-Type": "text/csv"})
    assert (200, 1) == (status, answer["imported"]["recorded"])
    with Workspace(workspace, create=False) as ws:
        assert "glare;smeared ink" == ws.reviews().set_index("row").at[second, "tags"]

    frame.loc[frame["row"] == str(third), "row"] = "999999"
    before = _snapshot(workspace)
    status, answer = _call(server, "POST", "api/import", frame.to_csv(index=False).encode(),
                           headers={"Content-Type": "text/csv"})
    assert (400, True) == (status, "999999" in answer["error"])
    assert before == _snapshot(workspace)


def test_oversized_sheet_is_refused(server, workspace, monkeypatch):
    """A sheet larger than MAX_SHEET_BYTES gets 413 and nothing is imported."""
    monkeypatch.setattr(review, "MAX_SHEET_BYTES", 2000)
    before = _snapshot(workspace)
    status, _ = _call(server, "POST", "api/import", b"row,reviewed,tags\n" + b"1,1,a\n" * 600,
                      headers={"Content-Type": "text/csv"})
    assert (413, before) == (status, _snapshot(workspace))


def test_version_changes_with_every_write(server, workspace):
    """api/version moves when a review, a name or a category changes (what other tabs poll)."""
    seen = [_call(server, "GET", "api/version")[1]["version"]]
    _call(server, "POST", "api/review", {"row": _queued(workspace), "toggle": "glare"})
    seen.append(_call(server, "GET", "api/version")[1]["version"])
    _call(server, "POST", "api/name", {"slice_id": "R1", "name": "faded print"})
    seen.append(_call(server, "GET", "api/version")[1]["version"])
    _call(server, "POST", "api/category", {"name": "torn label"})
    seen.append(_call(server, "GET", "api/version")[1]["version"])
    assert 4 == len(set(seen))


@pytest.mark.parametrize("kwargs, needle", [
    ({"host": "0.0.0.0"}, "host="),
    ({"host": "192.168.1.20"}, "host="),
    ({"port": -1}, "port"),
    ({"port": "8080"}, "port"),
    ({"token": "short"}, "token"),
    ({"images": "/no/such/crops.npy"}, "images="),
    ({"images": np.zeros((3, 12, 12))}, "images holds 3 arrays"),
    ({"images": np.zeros((2400, 12))}, "images must hold"),
    ({"image_column": "crop"}, "image_column='crop'"),
    ({"text_column": "ocr_text"}, "text_column='ocr_text'"),
])
def test_bad_arguments_name_themselves(workspace, kwargs, needle):
    """make_server refuses each bad argument with a message that names it."""
    with pytest.raises((ValueError, TypeError), match=needle.replace("(", r"\(")):
        review.make_server(workspace, **kwargs)


def test_workspace_without_queue_or_scan_is_refused(tmp_path, depot):
    """A folder without a workspace, or a workspace without a queue, gets advice, not a server."""
    with pytest.raises(ValueError, match="not a slicefind workspace"):
        review.make_server(tmp_path / "nothing")
    frame, _ = depot
    with Workspace(tmp_path / "ws") as ws:
        ws.save_scan(sf.find_slices(frame, label="digit", prediction="read_as"))
    with pytest.raises(ValueError, match="no queue yet"):
        review.make_server(tmp_path / "ws")


def test_a_newer_scan_leaves_the_page_on_its_own(server, workspace, depot):
    """When a new scan is saved while the page is open, writes still go to the page's scan, with a notice."""
    row = _queued(workspace)
    frame, _ = depot
    with Workspace(workspace, create=False) as ws:
        ws.save_scan(sf.find_slices(frame, label="digit", prediction="read_as"))
    status, answer = _call(server, "POST", "api/review", {"row": row, "toggle": "faded print"})
    with Workspace(workspace, create=False) as ws:
        tags = ws.reviews(scan_id=1).set_index("row").at[row, "tags"]
        assert (2, 0) == (int(ws.scans()["scan_id"].max()), len(ws.reviews(scan_id=2)))
    assert (200, "faded print") == (status, tags)
    assert "newer scan (2)" in " ".join(_call(server, "GET", "api/tally")[1]["warnings"])


def test_serve_prints_the_url_and_stops_on_ctrl_c(workspace):
    """serve() prints the tokened URL, answers on it, and on Ctrl+C stops cleanly (exit 0)."""
    import signal
    import subprocess
    import sys

    code = "import sys; from slicefind.page.server import serve; serve(sys.argv[1])"
    process = subprocess.Popen([sys.executable, "-c", code, workspace], stdout=subprocess.PIPE,
                               stderr=subprocess.PIPE, text=True)
    try:
        lines = [process.stdout.readline() for _ in range(2)]
        url = lines[1].strip()
        with urllib.request.urlopen(url + "api/version", timeout=20) as answer:
            status = answer.status
        wrong = url.rsplit("/", 2)[0] + "/not-the-token/api/version"
        with pytest.raises(urllib.error.HTTPError) as refused:
            urllib.request.urlopen(wrong, timeout=20)
    finally:
        process.send_signal(signal.SIGINT)
        out, err = process.communicate(timeout=20)
    assert url.startswith("http://127.0.0.1:") and url.endswith("/")
    assert (200, 403) == (status, refused.value.code)
    assert (0, True) == (process.returncode, "every review was already saved" in out), err


# --- the page in a browser ------------------------------------------------------------------


def _floats(text):
    return float("nan") if text in ("", None) else float(text)


def _same(a, b):
    return (np.isnan(a) and np.isnan(b)) or a == b


def test_page_tags_with_keys_and_survives_a_reload(workspace, tmp_path):
    """Keys tag ten examples and add categories; after a reload, an export and an import all agree with the workspace."""
    executable = chromium_or_skip("the review page's browser test")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        pytest.fail("the browser test needs Playwright for Python: pip install -e '.[test]'")
    with Workspace(workspace, create=False) as ws:
        queue = ws.load_queue()
    imported_row = int(queue.rows("R2")[0])
    problems = []
    plan = ["1", "1", "12", "1", "2", "1", "1", "2", "1", "211"]     # keys per example; "211" ends with 2 only
    server = review.make_server(workspace).start()
    try:
        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=executable, headless=True, args=CHROMIUM_ARGS)
            page = browser.new_page(viewport={"width": 1440, "height": 1000}, accept_downloads=True)
            page.on("pageerror", lambda exc: problems.append(f"page error: {exc}"))
            page.on("console", lambda msg: problems.append(f"console {msg.type}: {msg.text}")
                    if msg.type in ("error", "warning") else None)
            page.goto(server.url)
            page.wait_for_selector("body[data-ready='1']")
            keys = page.keyboard

            def settle():
                page.wait_for_selector("body[data-pending='0']", state="attached")

            def current_row():
                return int(page.get_attribute(".card.current", "data-row"))

            for name in ("faded print", "Smeared ink"):
                keys.press("a")
                keys.type(name)
                keys.press("Enter")
            keys.press("n")
            keys.type("Faded print")
            keys.press("Enter")
            settle()
            tagged = {}
            for presses in plan:
                row = current_row()
                for key in presses:
                    keys.press(key)
                keys.press("j")
                tagged[row] = presses
            plain = current_row()
            keys.press("r")                                       # reviewed, no category; moves on
            mislabelled = current_row()
            keys.press("w")                                       # the dev-set label is wrong
            keys.press("j")
            keys.press("a")
            keys.type("torn label")
            keys.press("Enter")
            keys.press("?")
            help_open = page.is_visible("#help")
            keys.press("Escape")
            settle()
            where = current_row()
            page.reload()
            page.wait_for_selector("body[data-ready='1']")

            shown = {row: page.get_attribute(f"#card-{row}", "data-tags") for row in tagged}
            plain_shown = (page.get_attribute(f"#card-{plain}", "data-reviewed"),
                           page.get_attribute(f"#card-{plain}", "data-tags"))
            listed = page.locator("#categories li").evaluate_all("items => items.map(i => i.dataset.category)")
            name = page.input_value("#cand-name")
            pressed = page.locator(f"#card-{next(iter(tagged))} .tag[aria-pressed='true']").all_inner_texts()
            wrong_pressed = page.locator(f"#card-{mislabelled} .tag[aria-pressed='true']").all_inner_texts()
            current = current_row()
            page.wait_for_selector(f"#card-{current} img.thumb")
            loaded = page.locator(f"#card-{current} img.thumb").evaluate(
                "img => img.decode().then(() => img.naturalWidth)")

            with page.expect_download() as download:
                page.click("#export")
            exported = tmp_path / "exported.csv"
            download.value.save_as(exported)
            sheet = pd.read_csv(exported, encoding="utf-8-sig", dtype=str, keep_default_na=False)
            sheet.loc[sheet["row"] == str(imported_row), ["reviewed", "tags"]] = ["yes", "Torn label"]
            filled = tmp_path / "filled.csv"
            sheet.to_csv(filled, index=False)
            page.set_input_files("#import-file", str(filled))
            page.wait_for_selector("#status:has-text('imported filled.csv')")
            settle()

            page_categories = page.locator("#tally tr.cat").evaluate_all(
                "rows => rows.map(r => [r.dataset.category, r.dataset.nTagged, r.dataset.share,"
                " r.dataset.shareLow, r.dataset.shareHigh, r.dataset.headroom])")
            page_slices = page.locator("#tally li.verdict").evaluate_all(
                "rows => rows.map(r => [r.dataset.sliceId, r.dataset.name, r.dataset.verdict, r.dataset.precision,"
                " r.dataset.precisionLow, r.dataset.precisionHigh, r.dataset.moreNeeded])")
            page.evaluate("() => { window.scrollTo(0, 0); document.getElementById('status').className = 'status'; }")
            page.wait_for_timeout(300)
            shot = tmp_path / "review_page.png"
            page.screenshot(path=str(shot))
            page.screenshot(path=str(tmp_path / "review_page_full.png"), full_page=True)
            shutil.copy(shot, SCREENSHOT)
            shutil.copy(tmp_path / "review_page_full.png", SCREENSHOT.replace(".png", "-full.png"))
            browser.close()
    finally:
        server.close()

    categories = ["faded print", "smeared ink", "torn label"]
    expected = {}
    for row, presses in tagged.items():
        on = set()
        for key in presses:
            on ^= {categories[int(key) - 1]}
        expected[row] = ";".join(sorted(on))
    with Workspace(workspace, create=False) as ws:
        reviews = ws.reviews()
        names = ws.names()
        result = ws.tally()
        direct = tally(ws.load_queue(), reviews, names=names)
    stored = reviews.set_index("row")
    exported_reviews = read_reviews(str(exported), queue).set_index("row")
    assert 10 == len(tagged) == sum(bool(t) for t in expected.values())
    assert expected == shown
    assert expected == {row: stored.at[row, "tags"] for row in tagged}
    assert (("1", ""), (True, "")) == (plain_shown, (bool(stored.at[plain, "reviewed"]), stored.at[plain, "tags"]))
    assert categories == listed
    assert ({"R1": "faded print"}, "faded print") == (names, name)
    assert ["1fadedprint"] == ["".join(t.split()) for t in pressed]
    assert (["wwronglabel"], WRONG_LABEL) == (["".join(t.split()) for t in wrong_pressed],
                                               stored.at[mislabelled, "tags"])
    assert WRONG_LABEL in [r[0] for r in page_categories]
    assert (where, 12, True) == (current, loaded, help_open)          # back where it was; crop shown
    assert expected == {row: exported_reviews.at[row, "tags"] for row in tagged}
    assert "torn label" == stored.at[imported_row, "tags"]
    for frame in (result, direct):
        want = [[c.category, int(c.n_tagged), c.share, c.share_low, c.share_high, c.headroom]
                for c in frame.categories.itertuples()]
        got = [[r[0], int(r[1]), *map(_floats, r[2:])] for r in page_categories]
        assert [w[:2] for w in want] == [g[:2] for g in got]
        assert all(_same(a, b) for w, g in zip(want, got) for a, b in zip(w[2:], g[2:]))
        want = [[s.slice_id, s.name, s.verdict, s.precision, s.precision_low, s.precision_high,
                 float(s.more_needed)] for s in frame.slices.itertuples()]
        got = [[r[0], r[1], r[2], *map(_floats, r[3:])] for r in page_slices]
        assert [w[:3] for w in want] == [g[:3] for g in got]
        assert all(_same(a, b) for w, g in zip(want, got) for a, b in zip(w[3:], g[3:]))
    assert [] == problems
