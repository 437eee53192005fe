"""The local review page: a small HTTP server on 127.0.0.1 and its static files (`static/`)."""

from slicefind.page.server import ReviewServer, make_server, serve

__all__ = ["ReviewServer", "make_server", "serve"]
