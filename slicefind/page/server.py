"""The review page: a local web server that writes every tag to the workspace at once.

`make_server` opens a workspace (which must already hold a scan and a queue) and binds
a `http.server.ThreadingHTTPServer` to the loopback interface on a free port. Every
request must carry a random token as the first segment of its path
(``http://127.0.0.1:PORT/TOKEN/``); anything else is refused before it is read. The page
(HTML, CSS and JavaScript in ``slicefind/page/static``) talks to a small JSON API:

=======  ===================  ======================================================
GET      ``api/state``        the queue, its strata, reviews, names, categories, tally
GET      ``api/version``      a fingerprint of reviews, names and categories (polled)
GET      ``api/tally``        the live tally (`Workspace.tally`)
GET      ``api/export``       the review sheet (`Queue.to_csv`) with every review filled in
GET      ``img/ROW``          a thumbnail: a PNG of the row's pixel array, or its image file
POST     ``api/review``       ``{"row": 12, "toggle": "faded ink"}`` or ``{"row": 12,
                              "reviewed": true, "tags": ["a", "b"]}``, optional ``"note"``
POST     ``api/name``         ``{"slice_id": "R1", "name": "faded ink"}`` ("" clears it)
POST     ``api/category``     ``{"name": "torn label"}``; ``"remove": true`` drops an unused one
POST     ``api/import``       a filled-in sheet (``text/csv``), checked whole before anything is written
=======  ===================  ======================================================

Each write is one `Workspace.record_review` or `Workspace.set_name` call (one small
transaction): there is no save button and closing the tab loses nothing. A write answers
with the row's new state, the names, the categories and the version, not the tally: the
page reads ``api/tally`` once its writes have settled, so a burst of key presses costs
one tally. The tally and the page's fixed parts are cached until something changes. A
toggle is applied to the row's latest stored state under a lock, so two tabs toggling
different tags of one row both take effect; otherwise the latest write wins and the
workspace keeps the history.

Bad requests get a 4xx answer and change nothing. A write (any POST) is refused with 403
when its ``Sec-Fetch-Site`` header says ``cross-site`` or ``same-site`` or its ``Origin``
is not the page's own (``null`` included); requests without either header (scripts) are
taken. The JSON routes take only ``application/json`` and ``api/import`` only
``text/csv``, so a form on another site cannot write even with the token. JSON bodies
are bounded in size (`MAX_JSON_BYTES`) and nesting (`MAX_JSON_DEPTH`). When another
process holds the workspace's database past its retries the answer is 503 with
``Retry-After``, and the page keeps the change on screen so it can be sent again.
Images are served only by row number, from the pixel array given or from the path the
scan stored for that row, and only when the file lies inside the workspace, the data
folder or a folder passed in ``image_folders``.
"""
from __future__ import annotations

import http.server
import importlib.resources
import json
import os
import re
import secrets
import socket
import sys
import threading
import urllib.parse
from dataclasses import dataclass, field
from typing import Mapping, Sequence


from slicefind.exceptions import SlicefindError, SlicefindValueError, WorkspaceBusyError
from slicefind.page.common import (CATEGORIES_ARTIFACT, HTTPError, IMAGE_TYPES, MAX_TAG_LENGTH,
                                   SOURCE)
from slicefind.page.state import PageState
from slicefind.page.writes import PageWrites
from slicefind.values import json_scalar
from slicefind.workspace import Workspace

__all__ = ["ReviewServer", "make_server", "serve", "MAX_JSON_BYTES", "MAX_JSON_DEPTH",
           "MAX_SHEET_BYTES", "MAX_TAG_LENGTH", "IMAGE_TYPES", "CATEGORIES_ARTIFACT", "SOURCE"]

#: largest JSON body a write may send
MAX_JSON_BYTES = 64 * 1024
#: deepest nesting of arrays and objects a JSON body may have (a write needs 2)
MAX_JSON_DEPTH = 32
#: largest review sheet the import accepts
MAX_SHEET_BYTES = 32 * 1024 * 1024
_DRAIN_LIMIT = 1024 * 1024               # an oversized body up to this is read and dropped
_STATIC = {"review.css": "text/css; charset=utf-8",
           "review.js": "text/javascript; charset=utf-8"}
_LOOPBACK = ("127.0.0.1", "localhost", "::1")
_REQUEST_QUEUE = 256                     # connections the kernel holds before the server accepts them
_BUSY_RETRY_S = 2                        # Retry-After of a 503 (workspace busy)
#: what a client that leaves early raises; answered by dropping the connection, quietly
_GONE = (BrokenPipeError, ConnectionResetError, ConnectionAbortedError, socket.timeout)
_JSON_TOKENS = re.compile(rb'[\[\]{}"\\]')
_SECURITY_HEADERS = {
    "Cache-Control": "no-store",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "X-Frame-Options": "DENY",
    "Content-Security-Policy": ("default-src 'none'; script-src 'self'; style-src 'self'; "
                                "img-src 'self' data:; connect-src 'self'; form-action 'none'; "
                                "frame-ancestors 'none'; base-uri 'none'"),
}


# --- small pure helpers ---------------------------------------------------------------------


def _static(name: str) -> bytes:
    """The bytes of one file of the page, shipped inside the package."""
    return (importlib.resources.files("slicefind.page") / "static" / name).read_bytes()


def _nests_deeper(data: bytes, limit: int) -> bool:
    """Whether JSON text nests ``[``/``{`` more than `limit` deep (brackets in strings skipped).

    One pass over the brackets, quotes and backslashes, stopping at the first level past
    `limit`; a text with at most `limit` brackets is not scanned. Assumes nothing of the
    text's validity: whatever the parser accepts recurses no deeper than this counts.
    """
    if data.count(b"[") + data.count(b"{") <= limit:          # the usual body: no scan needed
        return False
    depth = 0
    in_string, escaped_at = False, -1
    for match in _JSON_TOKENS.finditer(data):
        at = match.start()
        if at == escaped_at:
            continue
        char = data[at]
        if in_string:
            if char == 0x5C:                                    # backslash: the next byte is escaped
                escaped_at = at + 1
            elif char == 0x22:
                in_string = False
        elif char == 0x22:
            in_string = True
        elif char in (0x5B, 0x7B):
            depth += 1
            if depth > limit:
                return True
        elif char in (0x5D, 0x7D):
            depth -= 1
    return False


# --- the application (no HTTP in here) ------------------------------------------------------


class _ReviewApp(PageState, PageWrites):
    """What the API does, on one open workspace; the request handler only translates."""

    def __init__(self, workspace, *, images=None, image_column=None, text_column=None,
                 image_folders: Sequence[str] = (), data_folder=None):
        self.ws = Workspace(workspace, create=False)
        try:
            self._load(images, image_column, text_column, image_folders, data_folder)
        except BaseException:
            self.ws.close()
            raise


    # -- workspace access ----------------------------------------------------------------


    # -- what the page shows ---------------------------------------------------------------


    # -- writes ----------------------------------------------------------------------------

    def close(self) -> None:
        self.ws.close()


# --- HTTP ----------------------------------------------------------------------------------


class _Handler(http.server.BaseHTTPRequestHandler):
    """Checks the host, token and (for writes) origin, routes, and turns errors into answers."""

    server_version = "slicefind-review"
    sys_version = ""
    protocol_version = "HTTP/1.1"
    timeout = 30
    # headers and body go out as two writes: without this, Nagle's algorithm holds the body
    # until the client's delayed ACK (about 40 ms on every answer of a keep-alive connection)
    disable_nagle_algorithm = True

    # set on a subclass per server
    app: _ReviewApp
    token: str
    hosts: frozenset                 # accepted Host headers, "127.0.0.1:PORT" ...
    origins: frozenset               # accepted Origin headers, "http://127.0.0.1:PORT" ...
    quiet: bool = True

    def log_message(self, format, *args):            # noqa: A002 (the stdlib's name)
        if not self.quiet:
            sys.stderr.write("review: " + (format % args).replace(self.token, "TOKEN") + "\n")

    # -- answering -------------------------------------------------------------------------

    def _send(self, status: int, body: bytes, kind: str, headers: Mapping[str, str] = ()):
        self.send_response(status)
        self.send_header("Content-Type", kind)
        self.send_header("Content-Length", str(len(body)))
        for key, value in {**_SECURITY_HEADERS, **dict(headers)}.items():
            self.send_header(key, value)
        if self.close_connection:
            self.send_header("Connection", "close")
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(body)

    def _json(self, status: int, payload, headers: Mapping[str, str] = ()):
        body = json.dumps(payload, allow_nan=False, default=json_scalar).encode("utf-8")
        self._send(status, body, "application/json; charset=utf-8", headers)

    def _fail(self, exc: HTTPError):
        self._json(exc.status, {"error": exc.message, "status": exc.status}, exc.headers)

    def _route(self) -> list[str]:
        """The path segments after the token; raises 403 for a wrong host or token."""
        host = (self.headers.get("Host") or "").lower()
        if host not in self.hosts:
            raise HTTPError(403, "unexpected Host header; open the URL the server printed.")
        split = urllib.parse.urlsplit(self.path)
        parts = split.path.split("/")
        if len(parts) < 2 or not secrets.compare_digest(parts[1].encode("utf-8", "replace"),
                                                        self.token.encode("ascii")):
            raise HTTPError(403, "missing or wrong token; open the URL the server printed.")
        if any(p in ("..", ".") or "\\" in p or "%" in p for p in parts[2:]):
            raise HTTPError(404, "no such page.")
        return parts[2:]

    def _check_origin(self) -> None:
        """Refuse (403) a write another site's page sent: by Sec-Fetch-Site, or a foreign Origin.

        A request with neither header (a script, curl) passes. The body is drained first
        so the connection stays usable.
        """
        site = (self.headers.get("Sec-Fetch-Site") or "").strip().lower()
        foreign = [o for o in self.headers.get_all("Origin", ())
                   if o.strip().lower() not in self.origins]
        if site in ("cross-site", "same-site"):
            why = f"Sec-Fetch-Site is {site!r}"
        elif foreign:
            why = f"Origin {foreign[0][:100]!r} is not this server's"
        else:
            return
        self._drain()
        raise HTTPError(403, f"write refused: {why}; only the review page itself (open the URL "
                              "the server printed) or a script without an Origin header may write.")

    def _kind(self) -> str:
        """The media type of the body, lower case, parameters dropped."""
        return (self.headers.get("Content-Type") or "").split(";")[0].strip().lower()

    def _require_kind(self, kind: str, what: str) -> None:
        """Refuse (415) a body of another media type, draining it; forms cannot send `kind`."""
        if self._kind() != kind:
            self._drain()
            sent = self.headers.get("Content-Type")
            got = repr(sent[:100]) if sent else "no Content-Type"
            raise HTTPError(415, f"send {what} as Content-Type {kind}; got {got}.")

    def _drain(self) -> None:
        """Read and drop a refused request's body (up to 1 MB) so the connection stays usable.

        A body that cannot be drained (chunked, unsized, larger) closes the connection.
        """
        length = self.headers.get("Content-Length")
        if (self.headers.get("Transfer-Encoding") or length is None or not length.isdigit()
                or int(length) > _DRAIN_LIMIT):
            self.close_connection = True
            return
        self.rfile.read(int(length))
        self._consumed = True

    def _body(self, limit: int) -> bytes:
        if self.headers.get("Transfer-Encoding"):
            self.close_connection = True
            raise HTTPError(411, "send the body with a Content-Length, not chunked.")
        length = self.headers.get("Content-Length")
        if length is None or not length.isdigit():
            self.close_connection = True
            raise HTTPError(411, "a Content-Length header is required.")
        length = int(length)
        if length > limit:
            if length <= _DRAIN_LIMIT:
                self.rfile.read(length)
            self.close_connection = True
            raise HTTPError(413, f"the body is {length} bytes; at most {limit} are accepted here.")
        data = self.rfile.read(length)
        self._consumed = True
        return data

    def _json_body(self) -> dict:
        self._require_kind("application/json", "the body")
        data = self._body(MAX_JSON_BYTES)
        if _nests_deeper(data, MAX_JSON_DEPTH):
            raise HTTPError(400, f"the body nests arrays or objects more than {MAX_JSON_DEPTH} "
                                  "levels deep; a write is one flat JSON object.")
        try:
            body = json.loads(data.decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise HTTPError(400, f"the body is not valid JSON ({exc}).") from None
        except RecursionError:                          # cannot pass the depth check; kept as a guard
            raise HTTPError(400, "the body nests arrays or objects too deep.") from None
        if not isinstance(body, dict):
            raise HTTPError(400, "the body must be a JSON object.")
        return body

    def _refuse(self, exc: HTTPError) -> None:
        if self.command not in ("GET", "HEAD") and not self._consumed:
            self.close_connection = True              # an unread body would poison the next request
        self._fail(exc)

    def _guarded(self, action):
        """Run `action`; answer its refusals, a busy workspace (503) and bugs (500).

        A client that went away (broken pipe, reset, timeout), even while an error is
        being answered, only closes the connection: nothing is printed.
        """
        self._consumed = False
        try:
            try:
                action()
            except _GONE:
                raise
            except WorkspaceBusyError as exc:
                self._refuse(HTTPError(503, str(exc), {"Retry-After": str(_BUSY_RETRY_S)}))
            except (HTTPError, SlicefindError) as exc:
                self._refuse(exc if isinstance(exc, HTTPError) else HTTPError(400, str(exc)))
            except Exception as exc:                      # a bug: say so, keep serving
                if self.command not in ("GET", "HEAD") and not self._consumed:
                    self.close_connection = True
                self._json(500, {"error": f"internal error: {type(exc).__name__}: {exc}", "status": 500})
        except _GONE:
            self.close_connection = True

    # -- methods ---------------------------------------------------------------------------

    def do_GET(self):
        self._guarded(self._get)

    def do_HEAD(self):
        self._guarded(self._get)

    def do_POST(self):
        self._guarded(self._post)

    def _not_allowed(self):
        def refuse():
            self._route()
            raise HTTPError(405, f"{self.command} is not used here.", {"Allow": "GET, POST"})
        self._guarded(refuse)

    do_PUT = do_DELETE = do_PATCH = do_OPTIONS = _not_allowed

    def _get(self):
        parts = self._route()
        app = self.app
        if parts == []:
            raise HTTPError(308, "the page lives at the token's folder.",
                             {"Location": f"/{self.token}/"})
        if parts == [""]:
            self._send(200, _static("index.html"), "text/html; charset=utf-8")
        elif len(parts) == 2 and parts[0] == "static" and parts[1] in _STATIC:
            self._send(200, _static(parts[1]), _STATIC[parts[1]])
        elif len(parts) == 2 and parts[0] == "img":
            data, kind = app.image(parts[1])
            self._send(200, data, kind)
        elif parts == ["api", "state"]:
            self._json(200, app.state())
        elif parts == ["api", "tally"]:
            self._json(200, app.tally())
        elif parts == ["api", "version"]:
            self._json(200, {"version": app.version()})
        elif parts == ["api", "export"]:
            self._send(200, app.export_sheet(), "text/csv; charset=utf-8",
                       {"Content-Disposition": 'attachment; filename="queue-reviewed.csv"'})
        elif parts and parts[0] == "api" and len(parts) == 2 and parts[1] in (
                "review", "name", "category", "import"):
            raise HTTPError(405, f"api/{parts[1]} takes POST.", {"Allow": "POST"})
        else:
            raise HTTPError(404, "no such page.")

    def _post(self):
        parts = self._route()
        self._check_origin()
        app = self.app
        if parts == ["api", "import"]:
            self._require_kind("text/csv", "the review sheet")
            data = self._body(MAX_SHEET_BYTES)
            name = urllib.parse.unquote(self.headers.get("X-Sheet-Name") or "sheet.csv")[:200]
            self._json(200, app.import_sheet(data, name))
            return
        routes = {"review": app.review, "name": app.name, "category": app.category}
        if len(parts) != 2 or parts[0] != "api" or parts[1] not in routes:
            self._body(MAX_JSON_BYTES)                    # read it so the connection stays usable
            raise HTTPError(404, "no such API.")
        self._json(200, routes[parts[1]](self._json_body()))


class _Server(http.server.ThreadingHTTPServer):
    """One thread per connection; a deep listen queue; quiet about clients that left early."""

    daemon_threads = True
    allow_reuse_address = False
    request_queue_size = _REQUEST_QUEUE          # the listen backlog: many tabs or clients at once

    def handle_error(self, request, client_address):
        """Drop a connection the client closed or let time out; print other errors in one line."""
        exc = sys.exc_info()[1]
        if isinstance(exc, _GONE):
            return
        sys.stderr.write(f"review: error answering a request from {client_address[0]}: "
                         f"{type(exc).__name__}: {exc}\n")


def _family(host: str) -> int:
    return socket.AF_INET6 if ":" in host else socket.AF_INET


@dataclass(frozen=True, repr=False)


class ReviewServer:
    """A bound, not yet serving, review server (from `make_server`).

    Attributes
    ----------
    url : str
        ``http://127.0.0.1:PORT/TOKEN/``, the page.
    token : str
        The random token every request must carry.
    httpd : http.server.ThreadingHTTPServer
        The server; `serve_forever` or `start` serves it.
    """

    url: str
    token: str
    httpd: http.server.ThreadingHTTPServer
    _app: _ReviewApp
    _threads: list = field(default_factory=list)

    @property
    def workspace(self):
        """The open `Workspace` the server writes to."""
        return self._app.ws

    def serve_forever(self) -> None:
        """Serve until `close` (from another thread) or KeyboardInterrupt."""
        self.httpd.serve_forever(poll_interval=0.05)

    def start(self) -> "ReviewServer":
        """Serve in a background (daemon) thread; returns self."""
        thread = threading.Thread(target=self.serve_forever, name="slicefind-review", daemon=True)
        thread.start()
        self._threads.append(thread)
        return self

    def close(self) -> None:
        """Stop serving, release the port and close the workspace (every write is committed)."""
        if self._threads:
            self.httpd.shutdown()
            for thread in self._threads:
                thread.join(timeout=5)
        self.httpd.server_close()
        self._app.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def __repr__(self):
        return f"ReviewServer({self.url.replace(self.token, '…')!r})"


def make_server(workspace_path, *, host: str = "127.0.0.1", port: int = 0, images=None,
                image_column: str | None = None, text_column: str | None = None,
                image_folders: Sequence[str] = (), data_folder: str | None = None,
                token: str | None = None, quiet: bool = True) -> ReviewServer:
    """Bind the review server for a workspace on the loopback interface, without serving.

    Parameters
    ----------
    workspace_path : str or os.PathLike
        A workspace folder holding a scan and a queue.
    host : str, default="127.0.0.1"
        ``"127.0.0.1"``, ``"localhost"`` or ``"::1"``; the page is never served beyond
        this machine.
    port : int, default=0
        0 picks a free port.
    images : str, os.PathLike or ndarray, optional
        Pixel arrays, one per row of the scanned data, shaped (n, h, w) (grey; high values
        drawn dark, like ink) or (n, h, w, 3) uint8; a path to a ``.npy``. Default the
        workspace's ``report`` artifact's ``images``, when it has one.
    image_column, text_column : str, optional
        Stored columns (``save_scan(show=...)``) holding image paths or text to show;
        default those of the ``report`` artifact.
    image_folders : sequence of str, default=()
        Folders besides the workspace and the data folder that images may be read from.
    data_folder : str, optional
        The folder relative image paths start from; default the ``report`` artifact's,
        else the workspace.
    token : str, optional
        Default a fresh ``secrets.token_urlsafe(24)``.
    quiet : bool, default=True
        Leave requests unlogged (False logs them to stderr, the token masked).

    Returns
    -------
    ReviewServer
        With ``url``, ``token`` and ``httpd``; `ReviewServer.start` or `serve_forever`
        serves it and `ReviewServer.close` stops it.
    """
    if host not in _LOOPBACK:
        msg = (f"host={host!r} is not a loopback address; the review page is only served on "
               f"this machine ({', '.join(map(repr, _LOOPBACK))}).")
        raise SlicefindValueError(msg)
    if isinstance(port, bool) or not isinstance(port, int) or not 0 <= port <= 65535:
        raise SlicefindValueError(f"port must be an integer in 0..65535 (0 = any free port); got {port!r}.")
    if token is None:
        token = secrets.token_urlsafe(24)
    if not isinstance(token, str) or not re.fullmatch(r"[A-Za-z0-9_-]{16,}", token):
        raise SlicefindValueError("token must be at least 16 URL-safe characters (A-Z a-z 0-9 _ -).")
    if isinstance(image_folders, (str, os.PathLike)):
        image_folders = (image_folders,)
    app = _ReviewApp(workspace_path, images=images, image_column=image_column,
                     text_column=text_column, image_folders=tuple(image_folders),
                     data_folder=data_folder)
    bind = "127.0.0.1" if host == "localhost" else host
    server_class = type("_BoundServer", (_Server,), {"address_family": _family(bind)})
    try:
        handler = type("_BoundHandler", (_Handler,), {"app": app, "token": token, "quiet": quiet,
                                                     "hosts": frozenset(), "origins": frozenset()})
        httpd = server_class((bind, port), handler)
    except OSError as exc:
        app.close()
        raise SlicefindValueError(f"cannot listen on {bind}:{port} ({exc}); try port=0.") from None
    bound = httpd.server_address[1]
    handler.hosts = frozenset({f"127.0.0.1:{bound}", f"localhost:{bound}", f"[::1]:{bound}"})
    handler.origins = frozenset(f"http://{h}" for h in handler.hosts)
    shown = f"[{bind}]" if ":" in bind else bind
    return ReviewServer(url=f"http://{shown}:{bound}/{token}/", token=token, httpd=httpd, _app=app)


def serve(workspace_path, *, host: str = "127.0.0.1", port: int = 0, open_browser: bool = False,
          images=None, **options) -> None:
    """Serve the review page until Ctrl+C; prints the URL (with its token).

    Parameters are those of `make_server`; ``open_browser=True`` also opens the page in
    the default browser.
    """
    server = make_server(workspace_path, host=host, port=port, images=images, **options)
    print(f"review page for {os.path.abspath(os.fspath(workspace_path))}:\n  {server.url}\n"
          "every click is saved to the workspace at once; Ctrl+C stops the server.", flush=True)
    if open_browser:
        import webbrowser
        webbrowser.open(server.url)
    try:
        server.serve_forever()
    except KeyboardInterrupt:
        print("\nstopped; every review was already saved.", flush=True)
    finally:
        server.close()
