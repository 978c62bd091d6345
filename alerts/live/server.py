"""A small read-only HTTP server for the live pages and the daily reports (standard library).

``/`` serves the live folder (``/`` itself is its ``index.html``, the overview), ``/reports/``
the reports folder. Only GET and HEAD; only regular files of a few known types, inside their
folder after every symbolic link is resolved; never a directory listing; nothing whose path
holds ``..``, a backslash, a NUL, an encoded slash or a hidden name (the page writer's
temporary files start with a dot). Binds 127.0.0.1 unless told otherwise.

References
----------
RFC 9110 (HTTP semantics): methods, status codes. OWASP, "Path Traversal" (common practice):
decode once, refuse ``..`` and encoded separators, compare the resolved path with the root.
"""
from __future__ import annotations

import logging
import posixpath
from http import HTTPStatus
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Mapping
from urllib.parse import unquote, urlsplit

__all__ = ["LiveServer", "make_server", "resolve_request", "CONTENT_TYPES", "DEFAULT_PORT"]

log = logging.getLogger(__name__)

DEFAULT_PORT = 8470
CONTENT_TYPES = {
    ".html": "text/html; charset=utf-8", ".json": "application/json", ".png": "image/png",
    ".svg": "image/svg+xml", ".css": "text/css; charset=utf-8", ".txt": "text/plain; charset=utf-8",
    ".csv": "text/csv; charset=utf-8", ".pdf": "application/pdf",
}
_MAX_PATH = 1024


def resolve_request(target: str, mounts: Mapping[str, Path]) -> Path | None:
    """The file a request target names, or None when it names nothing we serve.

    Parameters
    ----------
    target : str
        The request target as sent (``/dunmerrow.html?x=1``).
    mounts : mapping
        URL prefix (``"/"``, ``"/reports/"``) -> folder. The longest matching prefix wins.

    Returns
    -------
    Path or None
        A regular file inside its folder (after resolving symbolic links) with a known type.
    """
    if len(target) > _MAX_PATH:
        return None
    raw = urlsplit(target).path
    low = raw.lower()
    if "%2f" in low or "%5c" in low or "%00" in low or "%25" in low:
        return None
    path = unquote(raw)
    if not path.startswith("/") or "\\" in path or "\x00" in path or "//" in path:
        return None
    parts = path.split("/")[1:]
    if any(p in (".", "..") or p.startswith(".") for p in parts):
        return None
    if posixpath.normpath(path) != path.rstrip("/") and path != "/":
        return None
    for prefix in sorted(mounts, key=len, reverse=True):
        bare = prefix.rstrip("/")
        if path == bare or path.startswith(bare + "/"):
            root = Path(mounts[prefix]).resolve()
            rest = path[len(bare):].lstrip("/")
            break
    else:
        return None
    if rest == "" or rest.endswith("/"):
        rest += "index.html"
    try:
        found = (root / rest).resolve(strict=True)
    except (OSError, RuntimeError):
        return None
    if not found.is_relative_to(root) or not found.is_file():
        return None
    if found.suffix.lower() not in CONTENT_TYPES:
        return None
    return found


class _Handler(BaseHTTPRequestHandler):
    server_version = "quaywatch-live"
    sys_version = ""
    mounts: Mapping[str, Path] = {}

    def _refuse(self, status: HTTPStatus) -> None:
        body = f"{status.value} {status.phrase}\n".encode()
        self.send_response(status)
        self.send_header("Content-Type", "text/plain; charset=utf-8")
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(body)

    def _serve(self) -> None:
        found = resolve_request(self.path, self.mounts)
        if found is None:
            self._refuse(HTTPStatus.NOT_FOUND)
            return
        try:
            body = found.read_bytes()
        except OSError:
            self._refuse(HTTPStatus.NOT_FOUND)
            return
        self.send_response(HTTPStatus.OK)
        self.send_header("Content-Type", CONTENT_TYPES[found.suffix.lower()])
        self.send_header("Content-Length", str(len(body)))
        self.send_header("Cache-Control", "no-cache")
        self.send_header("X-Content-Type-Options", "nosniff")
        self.send_header("Referrer-Policy", "no-referrer")
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(body)

    def do_GET(self) -> None:  # noqa: N802 (http.server's naming)
        self._serve()

    def do_HEAD(self) -> None:  # noqa: N802
        self._serve()

    def _not_allowed(self) -> None:
        self.send_response(HTTPStatus.METHOD_NOT_ALLOWED)
        self.send_header("Allow", "GET, HEAD")
        self.send_header("Content-Length", "0")
        self.end_headers()

    do_POST = do_PUT = do_DELETE = do_PATCH = do_OPTIONS = _not_allowed

    def log_message(self, format: str, *args) -> None:  # noqa: A002 (http.server's signature)
        log.info("%s %s", self.address_string(), format % args)


class LiveServer(ThreadingHTTPServer):
    """A threading HTTP server bound to one handler class with its mounts."""

    daemon_threads = True


def make_server(live: Path, reports: Path | None = None, host: str = "127.0.0.1",
                port: int = DEFAULT_PORT) -> LiveServer:
    """A server of the live folder at ``/`` and the reports folder at ``/reports/``.

    Raises
    ------
    OSError
        When the address cannot be bound (in use, not ours).
    """
    mounts = {"/": Path(live)}
    if reports is not None:
        mounts["/reports/"] = Path(reports)
    handler = type("LiveHandler", (_Handler,), {"mounts": mounts})
    return LiveServer((host, port), handler)

