"""The review server under hostile or unlucky conditions: other sites' pages, form posts,
deep JSON, many connections at once, clients that leave early, a busy workspace."""
import http.client
import io
import json
import selectors
import socket
import struct
import tempfile
import threading
import time

import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from slicefind.page import server as review
from slicefind.exceptions import SlicefindValueError, WorkspaceBusyError
from slicefind.workspace import Workspace
# the depot workspace and request helpers of the review tests (fixtures are used by name)
from browser import CHROMIUM_ARGS, chromium_or_skip
from test_review import (_call, _queued, _snapshot, depot,  # noqa: F401
                         server, shared, template, workspace)

BUSY = ("another process held the workspace's database for longer than 4 waits of the busy "
        "timeout; nothing was written.")


def _port(server):
    return server.httpd.server_address[1]


def _request(conn, server, method, path, body=b"", headers=None):
    """(status, headers, parsed JSON or bytes) of one request on an open connection."""
    heads = {"Host": f"127.0.0.1:{_port(server)}", **(headers or {})}
    conn.request(method, f"/{server.token}/{path}", body=body or None, headers=heads)
    answer = conn.getresponse()
    raw = answer.read()
    kind = answer.getheader("Content-Type", "")
    return answer.status, answer, (json.loads(raw) if kind.startswith("application/json") else raw)


def _sheet(server, workspace, row, tags):
    """The exported review sheet with `row` marked reviewed with `tags`, as CSV bytes."""
    _, sheet = _call(server, "GET", "api/export")
    frame = pd.read_csv(io.BytesIO(sheet), encoding="utf-8-sig", dtype=str, keep_default_na=False)
    frame.loc[frame["row"] == str(row), ["reviewed", "tags"]] = ["1", tags]
    return frame.to_csv(index=False).encode("utf-8")


# --- 9: writes only from the page itself ---------------------------------------------------

FOREIGN = [
    ("another site's page", {"Origin": "http://depot-tools.example", "Sec-Fetch-Site": "cross-site"}),
    ("cross-site, no Origin", {"Sec-Fetch-Site": "cross-site"}),
    ("same-site, no Origin", {"Sec-Fetch-Site": "same-site"}),
    ("foreign Origin only", {"Origin": "http://depot-tools.example"}),
    ("opaque Origin", {"Origin": "null"}),
    ("another port", {"Origin": "http://127.0.0.1:1"}),
    ("https on this port", {"Origin": "https://127.0.0.1:PORT"}),
    ("own Origin but cross-site", {"Origin": "http://127.0.0.1:PORT", "Sec-Fetch-Site": "cross-site"}),
]


@pytest.mark.parametrize("headers", [h for _, h in FOREIGN], ids=[n for n, _ in FOREIGN])
def test_write_from_another_site_is_refused_and_the_connection_stays_usable(shared, headers):
    """Every write route refuses (403, JSON) a request another site's page sent, writes nothing,
    and the same keep-alive connection answers the next request."""
    server, workspace = shared
    headers = {k: v.replace("PORT", str(_port(server))) for k, v in headers.items()}
    row = _queued(workspace)
    sheet = _sheet(server, workspace, row, "smeared ink")
    writes = [("api/review", json.dumps({"row": row, "toggle": "smeared ink"}).encode(), "application/json"),
              ("api/name", json.dumps({"slice_id": "R1", "name": "smeared ink"}).encode(), "application/json"),
              ("api/category", json.dumps({"name": "torn label"}).encode(), "application/json"),
              ("api/import", sheet, "text/csv")]
    before = _snapshot(workspace)
    conn = http.client.HTTPConnection("127.0.0.1", _port(server), timeout=20)
    try:
        for path, body, kind in writes:
            status, answer, reply = _request(conn, server, "POST", path, body,
                                             {**headers, "Content-Type": kind})
            sock = conn.sock
            assert (403, 403) == (status, reply["status"]), path
            assert reply["error"].startswith("write refused"), reply
            assert "close" != (answer.getheader("Connection") or "").lower()
            status, _, reply = _request(conn, server, "GET", "api/version")
            assert (200, True, sock) == (status, "version" in reply, conn.sock)   # same socket
    finally:
        conn.close()
    assert before == _snapshot(workspace)


@pytest.mark.parametrize("headers", [
    {},                                                                   # a script, curl
    {"Origin": "http://127.0.0.1:PORT", "Sec-Fetch-Site": "same-origin"},  # the page
    {"Origin": "http://localhost:PORT"},                                  # the page opened as localhost
    {"Sec-Fetch-Site": "none"},                                           # typed by the user
], ids=["no headers", "own page", "localhost", "user-initiated"])
def test_writes_from_the_page_itself_or_a_script_are_taken(server, workspace, headers):
    """Requests without Origin or Sec-Fetch-Site, or with the server's own origin, still write."""
    headers = {k: v.replace("PORT", str(_port(server))) for k, v in headers.items()}
    row = _queued(workspace)
    status, answer = _call(server, "POST", "api/review", {"row": row, "toggle": "faded print"},
                           headers=headers)
    assert (200, ["faded print"]) == (status, answer["row"]["tags"])


FORMS = ["application/x-www-form-urlencoded", "multipart/form-data; boundary=depot", "text/plain",
         "text/plain; charset=utf-8", None]


@pytest.mark.parametrize("kind", FORMS, ids=["urlencoded", "multipart", "text/plain", "text/plain utf-8",
                                             "no type"])
def test_form_posts_cannot_write_even_with_the_token(shared, kind):
    """A body a plain HTML form can send (or one without a type) gets 415 on every write route."""
    server, workspace = shared
    row = _queued(workspace)
    sheet = _sheet(server, workspace, row, "smeared ink")
    before = _snapshot(workspace)
    headers = {} if kind is None else {"Content-Type": kind}
    for path, body in (("api/review", json.dumps({"row": row, "toggle": "smeared ink"}).encode()),
                       ("api/name", json.dumps({"slice_id": "R1", "name": "smeared ink"}).encode()),
                       ("api/category", json.dumps({"name": "torn label"}).encode()),
                       ("api/import", sheet)):
        status, answer = _call(server, "POST", path, body, headers=headers)
        assert (415, 415) == (status, answer["status"]), path
        assert "Content-Type" in answer["error"]
    assert before == _snapshot(workspace)


def test_import_takes_text_csv(server, workspace):
    """api/import takes the sheet as text/csv (what the page sends), charset or not."""
    first, second = _queued(workspace, 0), _queued(workspace, 1)
    for row, kind in ((first, "text/csv"), (second, "text/csv; charset=utf-8")):
        status, answer = _call(server, "POST", "api/import", _sheet(server, workspace, row, "glare"),
                               headers={"Content-Type": kind})
        assert (200, 1) == (status, answer["imported"]["recorded"])


# --- 10: nesting -----------------------------------------------------------------------------

def test_deeply_nested_json_gets_400_not_500(shared):
    """30,000 nested brackets (or 33 nested objects) are refused with 400, and nothing is written."""
    server, workspace = shared
    before = _snapshot(workspace)
    for body in (b"[" * 30000, b"[" * 30000 + b"]" * 30000, b'{"row":' * 33 + b"1" + b"}" * 33,
                 b'{"note": ' + b"[" * 5000 + b'"x', b"{" * 20000):
        status, answer = _call(server, "POST", "api/review", body,
                               headers={"Content-Type": "application/json"})
        assert (400, 400) == (status, answer["status"]), body[:20]
    status, answer = _call(server, "POST", "api/review", b"[" * 30000,
                           headers={"Content-Type": "application/json"})
    assert f"more than {review.MAX_JSON_DEPTH} levels deep" in answer["error"]
    assert before == _snapshot(workspace)
    assert 200 == _call(server, "GET", "api/version")[0]


def test_brackets_inside_strings_are_not_nesting(server, workspace):
    """A note full of brackets, quotes and backslashes is a flat body and is stored as written."""
    row = _queued(workspace)
    note = '[[[[' * 20 + '\\"]]{' * 10 + '"\\'
    status, answer = _call(server, "POST", "api/review", {"row": row, "note": note})
    assert (200, note) == (status, answer["row"]["note"])


def _depth(value):
    if isinstance(value, list):
        return 1 + max(map(_depth, value), default=0)
    if isinstance(value, dict):
        return 1 + max(map(_depth, value.values()), default=0)
    return 0


_TEXT = st.text(alphabet='[]{}"\\ab:,\n\u00e9', max_size=8)
_JSON = st.recursive(st.none() | st.booleans() | st.integers() | _TEXT,
                     lambda inner: st.lists(inner, max_size=3) | st.dictionaries(_TEXT, inner, max_size=3),
                     max_leaves=40)


@settings(max_examples=300, deadline=None)
@given(value=_JSON, limit=st.integers(0, 6), ascii_only=st.booleans())
def test_depth_scan_agrees_with_the_parsed_value(value, limit, ascii_only):
    """_nests_deeper says 'deeper than limit' exactly when the parsed value is, strings and escapes included."""
    data = json.dumps(value, ensure_ascii=ascii_only).encode("utf-8")
    assert (_depth(value) > limit) == review._nests_deeper(data, limit)


# --- 11: many connections, cheap writes ------------------------------------------------------

def test_listen_queue_holds_200_connections_before_any_is_accepted(workspace):
    """200 clients connecting at once all get a connection from the kernel, while the server is
    not yet accepting (the listen backlog, not the accept loop, decides)."""
    server = review.make_server(workspace)                # bound, not serving
    address = ("127.0.0.1", _port(server))
    sockets, selector = [], selectors.DefaultSelector()
    try:
        for _ in range(200):
            sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
            sock.setblocking(False)
            sock.connect_ex(address)
            sockets.append(sock)
            selector.register(sock, selectors.EVENT_WRITE)
        connected, deadline = set(), time.monotonic() + 2.0
        while len(connected) < len(sockets) and time.monotonic() < deadline:
            for key, _ in selector.select(timeout=0.1):
                if key.fileobj.getsockopt(socket.SOL_SOCKET, socket.SO_ERROR) == 0:
                    connected.add(key.fileobj)
                selector.unregister(key.fileobj)
    finally:
        selector.close()
        for sock in sockets:
            sock.close()
        server.close()
    assert 200 == len(connected)
    assert review._Server.request_queue_size >= 200


def test_answers_are_not_held_back_by_nagle(shared, monkeypatch):
    """Connections are served with TCP_NODELAY, so an answer's body (a second write after the
    headers) is not held until the client's delayed ACK."""
    server, _ = shared
    handler = server.httpd.RequestHandlerClass
    original, seen = handler.setup, []

    def setup(self):
        original(self)
        seen.append(self.connection.getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY))

    monkeypatch.setattr(handler, "setup", setup)
    assert 200 == _call(server, "GET", "api/version")[0]
    assert 1 == len(seen) and seen[0] != 0


def test_writes_leave_the_tally_to_one_later_read(server, workspace, monkeypatch):
    """A write does not compute the tally; reads at one version (many tabs) share one computation,
    and the next read after a write sees the write."""
    computed = []
    original = server.workspace.tally

    def counting(*args, **kwargs):
        computed.append(1)
        return original(*args, **kwargs)

    monkeypatch.setattr(server.workspace, "tally", counting)
    rows = [_queued(workspace, k) for k in range(5)]
    for row in rows:
        status, answer = _call(server, "POST", "api/review", {"row": row, "toggle": "faded print"})
        assert (200, False) == (status, "tally" in answer)
    assert 0 == len(computed)
    answers = []
    threads = [threading.Thread(target=lambda p=p: answers.append(_call(server, "GET", p)))
               for p in ("api/state", "api/tally") * 4]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    tallies = [a[1]["tally"] if "rows" in a[1] else a[1] for a in answers]
    n_tagged = {c["category"]: c["n_tagged"] for c in tallies[0]["categories"]}
    assert (1, [200] * 8, 5) == (len(computed), [a[0] for a in answers], n_tagged["faded print"])
    assert all(t == tallies[0] for t in tallies)
    _call(server, "POST", "api/review", {"row": rows[0], "toggle": "faded print"})
    _, after = _call(server, "GET", "api/tally")
    assert (2, 4) == (len(computed), {c["category"]: c["n_tagged"] for c in after["categories"]}["faded print"])


def test_state_follows_a_longer_queue_saved_elsewhere(server, workspace):
    """The page's cached layout is rebuilt when another process saves a longer queue."""
    before = _call(server, "GET", "api/state")[1]
    with Workspace(workspace, create=False) as ws:
        ws.save_queue(ws.load_queue().extend(6))
        expected = ws.load_queue().table["row"].tolist()
    after = _call(server, "GET", "api/state")[1]
    assert (len(before["rows"]) + 6, expected) == (len(after["rows"]), [r["row"] for r in after["rows"]])
    assert before["version"] != after["version"]


# --- 13: clients that leave early, import messages -------------------------------------------

def test_client_that_leaves_early_prints_nothing(server, workspace, monkeypatch, capfd):
    """A client that resets its connection while its (refused) write is answered leaves no
    traceback on stderr, and the server keeps answering."""
    entered, release, done = threading.Event(), threading.Event(), threading.Event()

    def slow_refusal(body):
        entered.set()
        release.wait(10)
        raise SlicefindValueError("row=1 is not in the queue of scan 1.")

    monkeypatch.setattr(server._app, "review", slow_refusal)
    original = server.httpd.shutdown_request

    def shutdown_request(request):
        original(request)
        done.set()

    monkeypatch.setattr(server.httpd, "shutdown_request", shutdown_request)
    capfd.readouterr()
    body = json.dumps({"row": _queued(workspace), "toggle": "glare"}).encode()
    sock = socket.create_connection(("127.0.0.1", _port(server)), timeout=10)
    sock.sendall(f"POST /{server.token}/api/review HTTP/1.1\r\nHost: 127.0.0.1:{_port(server)}\r\n"
                 f"Content-Type: application/json\r\nContent-Length: {len(body)}\r\n\r\n".encode() + body)
    assert entered.wait(10)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
    sock.close()                                           # reset, not a polite close
    time.sleep(0.2)
    release.set()
    assert done.wait(10)
    time.sleep(0.1)
    _, err = capfd.readouterr()
    assert "" == err
    assert 200 == _call(server, "GET", "api/version")[0]


@pytest.mark.parametrize("gone", [BrokenPipeError, ConnectionResetError, socket.timeout])
def test_server_error_hook_is_quiet_for_departed_clients(shared, capfd, gone):
    """handle_error prints nothing for a client that went away or timed out."""
    server, _ = shared
    capfd.readouterr()
    try:
        raise gone("client went away")
    except gone:
        server.httpd.handle_error(None, ("127.0.0.1", 50000))
    assert "" == capfd.readouterr().err


def test_server_error_hook_reports_other_errors_in_one_line(shared, capfd):
    """Any other error reaching the server's hook is one line on stderr, without a traceback."""
    server, _ = shared
    capfd.readouterr()
    try:
        raise ValueError("the handler tripped over row 12")
    except ValueError:
        server.httpd.handle_error(None, ("127.0.0.1", 50000))
    err = capfd.readouterr().err
    assert ("Traceback" not in err, 1) == (True, len(err.strip().splitlines()))
    assert "ValueError: the handler tripped over row 12" in err


@pytest.mark.parametrize("body", [b"", b"\xff\xfe row,reviewed\n", b'row,reviewed\n"1,yes\n'],
                         ids=["empty", "not UTF-8", "broken quote"])
def test_import_errors_name_the_uploaded_file_not_a_temporary_path(shared, body):
    """A refused sheet's message names the file the reviewer chose, never the server's temporary copy."""
    server, workspace = shared
    before = _snapshot(workspace)
    status, answer = _call(server, "POST", "api/import", body,
                           headers={"Content-Type": "text/csv", "X-Sheet-Name": "depot%20week%2012.csv"})
    assert (400, True) == (status, "depot week 12.csv" in answer["error"]), answer
    assert "slicefind-import-" not in answer["error"] and tempfile.gettempdir() not in answer["error"]
    assert before == _snapshot(workspace)


# --- a busy workspace ------------------------------------------------------------------------

def _busy(*args, **kwargs):
    raise WorkspaceBusyError(BUSY)


@pytest.mark.parametrize("method, path, body", [
    ("record_review", "api/review", {"row": "QUEUED", "toggle": "faded print"}),
    ("record_review", "api/review", {"row": "QUEUED", "note": "ink runs"}),
    ("set_name", "api/name", {"slice_id": "R1", "name": "faded print"}),
    ("save_artifact", "api/category", {"name": "torn label"}),
    ("import_sheet", "api/import", "SHEET"),
], ids=["toggle", "note", "name", "category", "import"])
def test_busy_workspace_answers_503_with_retry_after(server, workspace, monkeypatch, method, path, body):
    """WorkspaceBusyError from the workspace becomes 503 with the message and Retry-After: 2."""
    row = _queued(workspace)
    if body == "SHEET":
        body, headers = _sheet(server, workspace, row, "glare"), {"Content-Type": "text/csv"}
    else:
        body, headers = json.dumps({**body, "row": row} if "row" in body else body).encode(), \
            {"Content-Type": "application/json"}
    before = _snapshot(workspace)
    monkeypatch.setattr(server.workspace, method, _busy)
    conn = http.client.HTTPConnection("127.0.0.1", _port(server), timeout=20)
    try:
        status, answer, reply = _request(conn, server, "POST", path, body, headers)
    finally:
        conn.close()
    assert (503, {"error": BUSY, "status": 503}, "2") == (status, reply, answer.getheader("Retry-After"))
    assert before == _snapshot(workspace)


def test_busy_answer_from_the_application_itself(server, workspace, monkeypatch):
    """A WorkspaceBusyError raised anywhere in a route (here the application's review) is a 503."""
    monkeypatch.setattr(server._app, "review", _busy)
    status, answer = _call(server, "POST", "api/review", {"row": _queued(workspace), "toggle": "glare"})
    assert (503, BUSY) == (status, answer["error"])


# --- the page --------------------------------------------------------------------------------

def test_new_category_placeholder_is_neutral(shared):
    """The page's new-category field suggests no particular dataset's wording."""
    server, _ = shared
    _, page = _call(server, "GET", "")
    assert b'id="new-category" name="name" maxlength="200" placeholder="new category name"' in page


def test_page_keeps_a_change_the_busy_workspace_refused(workspace, monkeypatch):
    """In Chromium: the page's writes carry its own origin; while the workspace is busy a toggle
    is marked not saved and the message shown, a refused category stays in its field, a note
    keeps its text and is sent again; once the workspace is free the note lands and the toggle,
    pressed again, too."""
    executable = chromium_or_skip("the busy-workspace browser test")
    try:
        from playwright.sync_api import expect, sync_playwright
    except ImportError:
        pytest.fail("the browser test needs Playwright for Python: pip install -e '.[test]'")
    server = review.make_server(workspace).start()
    ws = server.workspace
    busy = threading.Event()
    real_record = ws.record_review

    def record_review(*args, **kwargs):
        if busy.is_set():
            raise WorkspaceBusyError(BUSY)
        return real_record(*args, **kwargs)

    real_save = ws.save_artifact

    def save_artifact(*args, **kwargs):
        if busy.is_set():
            raise WorkspaceBusyError(BUSY)
        return real_save(*args, **kwargs)

    monkeypatch.setattr(ws, "record_review", record_review)
    monkeypatch.setattr(ws, "save_artifact", save_artifact)
    seen, problems = [], []
    try:
        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=executable, headless=True, args=CHROMIUM_ARGS)
            page = browser.new_page(viewport={"width": 1280, "height": 900})
            page.on("pageerror", lambda exc: problems.append(f"page error: {exc}"))
            page.on("request", lambda r: seen.append((r.header_value("origin"), r.header_value("sec-fetch-site")))
                    if r.method == "POST" else None)
            page.goto(server.url)
            page.wait_for_selector("body[data-ready='1']")
            placeholder = page.get_attribute("#new-category", "placeholder")
            page.keyboard.press("a")
            page.keyboard.type("glare")
            page.keyboard.press("Enter")
            page.wait_for_selector("body[data-pending='0']", state="attached")
            row = int(page.get_attribute(".card.current", "data-row"))

            busy.set()
            page.keyboard.press("1")
            page.wait_for_selector(f"#card-{row}[data-unsaved='1']")
            toggle_message = page.text_content("#status")
            page.keyboard.press("a")
            page.keyboard.type("torn label")
            page.keyboard.press("Enter")                    # refused: the name goes back in the field
            expect(page.locator("#new-category")).to_have_value("torn label")
            page.keyboard.press("e")
            page.keyboard.type("glare over the digits")
            page.keyboard.press("Enter")                    # leaves the field: saved at once, refused
            page.wait_for_selector("#status:has-text('sent again in 2 s')")
            note_kept = page.input_value(f"#note-{row}")
            stored_while_busy = ws.history(row)
            pending_while_busy = page.get_attribute("body", "data-pending")

            busy.clear()
            page.wait_for_selector("body[data-pending='0']", state="attached", timeout=15000)
            page.keyboard.press("1")                        # the toggle, pressed again
            page.wait_for_selector(f"#card-{row}[data-tags='glare']:not([data-unsaved])")
            page.wait_for_selector("body[data-pending='0']", state="attached")
            shown_tally = page.locator("#tally tr.cat[data-category='glare']").get_attribute("data-n-tagged")
            browser.close()
    finally:
        server.close()
    with Workspace(workspace, create=False) as check:
        latest = check.reviews().set_index("row")
    port = _port(server)
    assert "new category name" == placeholder
    assert seen and all(s == (f"http://127.0.0.1:{port}", "same-origin") for s in seen), seen
    assert BUSY in toggle_message and "do it again to retry" in toggle_message
    assert ("glare over the digits", 0, True) == (note_kept, len(stored_while_busy), pending_while_busy != "0")
    assert ("glare", "glare over the digits", "1") == (latest.at[row, "tags"], latest.at[row, "note"], shown_tally)
    assert [] == problems
