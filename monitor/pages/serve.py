"""A read-only web server for a built history site, on the loopback interface by default.

This module owns how a site folder is served: which requests are answered (GET and HEAD;
every other method gets 405), which files may be read (only regular files inside the
folder, after following symbolic links; nothing hidden, no directory listings), the
content types, and the security headers sent with every answer.

Refusals, from the first check that fails:

- a target that is not an absolute path, holds a NUL or a backslash, or is not valid
  percent-encoded UTF-8: 400;
- after percent-decoding, a "." or ".." segment or a drive-like ":": 403;
- a file or folder whose name starts with "." (the build's manifest and temporary files):
  404;
- a path that does not exist, a folder without index.html, anything that is not a regular
  file: 404;
- a path that resolves (through a symbolic link) outside the folder: 403.

A refusal never carries any file's content. Headers on every answer:
``X-Content-Type-Options: nosniff``, ``Referrer-Policy: no-referrer``,
``Cache-Control: no-cache`` (pages are rebuilt in place) and a Content-Security-Policy that
allows scripts, styles and images from the site itself only. Two documented exceptions
relax the style part only, never scripts: SVG charts (matplotlib writes inline styles) and
the digest archive under `monitor.pages.DIGEST_ARCHIVE_DIR` (digests are email HTML, whose
styles must be inline).

Connections are served by a bounded pool of `WORKERS` threads (connections beyond it wait
in the listen queue of `LISTEN_BACKLOG`, never a thread each); a connection that sends
nothing for `CONNECTION_TIMEOUT` seconds is closed, so idle or slow clients cannot hold the
pool. A client that goes away mid-answer (a broken pipe, a reset) is logged at debug level
on the "comove.pages" logger; any other fault in a request is one warning line, never a
traceback.

The server binds to 127.0.0.1 unless told otherwise, and refuses any address that is not
loopback unless ``allow_remote=True`` is passed: the pages name the desk's positions and
people, and a browser on the same machine is the intended reader.
"""

from __future__ import annotations

import ipaddress
import logging
import socket
import sys
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from http import HTTPStatus
from http.server import BaseHTTPRequestHandler, HTTPServer
from pathlib import Path
from typing import Any, cast
from urllib.parse import unquote

from monitor.errors import ComoveError
from monitor.pages.paths import DIGEST_ARCHIVE_DIR

CONTENT_TYPES: dict[str, str] = {
    ".html": "text/html; charset=utf-8",
    ".htm": "text/html; charset=utf-8",
    ".css": "text/css; charset=utf-8",
    ".js": "text/javascript; charset=utf-8",
    ".svg": "image/svg+xml",
    ".png": "image/png",
    ".json": "application/json",
    ".txt": "text/plain; charset=utf-8",
    ".csv": "text/csv; charset=utf-8",
    ".eml": "message/rfc822",
    ".ico": "image/x-icon",
}
"""Content type by file suffix; anything else is served as application/octet-stream."""

PAGE_POLICY = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; "
    "base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
)
"""Content-Security-Policy of the site's pages: only the site's own files, no inline code."""

SVG_POLICY = "default-src 'none'; style-src 'unsafe-inline'; frame-ancestors 'self'"
"""Policy of SVG charts: inline styles (matplotlib's), nothing else, no scripts."""

DIGEST_POLICY = (
    "default-src 'none'; style-src 'self' 'unsafe-inline'; img-src 'self'; "
    "base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
)
"""Policy of the archived digests: their inline styles are allowed, scripts are not."""

ALLOWED_METHODS = ("GET", "HEAD")


class RequestRefused(Exception):
    """A request the server answers with an error status instead of a file."""

    def __init__(self, status: HTTPStatus, reason: str) -> None:
        super().__init__(reason)
        self.status = status


def resolve_request(root: Path, target: str) -> Path:
    """Map a request target to a file inside `root`, or refuse it.

    Parameters
    ----------
    root : Path
        The site folder, already resolved (absolute, no symbolic links).
    target : str
        The request target as sent ("/pairs/klv-...html?x=1").

    Returns
    -------
    Path
        A regular file inside `root` (resolved).

    Raises
    ------
    RequestRefused
        With the status to answer (400, 403 or 404); see the module docstring.
    """
    path = target.split("#", 1)[0].split("?", 1)[0]
    if not path.startswith("/"):
        raise RequestRefused(HTTPStatus.BAD_REQUEST, "target is not an absolute path")
    try:
        decoded = unquote(path, errors="strict")
    except UnicodeDecodeError as exc:
        raise RequestRefused(HTTPStatus.BAD_REQUEST, "target is not UTF-8") from exc
    if "\x00" in decoded or "\\" in decoded:
        raise RequestRefused(HTTPStatus.BAD_REQUEST, "NUL or backslash in target")
    parts = [part for part in decoded.split("/") if part]
    if any(part in (".", "..") or ":" in part for part in parts):
        raise RequestRefused(HTTPStatus.FORBIDDEN, "dot segment or drive in target")
    if any(part.startswith(".") for part in parts):
        raise RequestRefused(HTTPStatus.NOT_FOUND, "hidden file")
    try:
        found = root.joinpath(*parts).resolve(strict=True)
    except (OSError, RuntimeError) as exc:  # missing, a symlink loop, a name too long
        raise RequestRefused(HTTPStatus.NOT_FOUND, "no such file") from exc
    if found != root and root not in found.parents:
        raise RequestRefused(HTTPStatus.FORBIDDEN, "resolves outside the site")
    if found.is_dir():
        index = (found / "index.html").resolve()
        if not index.is_file() or (index != root and root not in index.parents):
            raise RequestRefused(HTTPStatus.NOT_FOUND, "folder without index.html")
        found = index
    if not found.is_file():
        raise RequestRefused(HTTPStatus.NOT_FOUND, "not a regular file")
    return found


def _policy(root: Path, file: Path) -> str:
    if file.suffix.lower() == ".svg":
        return SVG_POLICY
    relative = file.relative_to(root).parts
    if relative and relative[0] == DIGEST_ARCHIVE_DIR:
        return DIGEST_POLICY
    return PAGE_POLICY


LOG = logging.getLogger("comove.pages")

WORKERS = 16
"""Threads answering requests; each answer is one file read from the local disk."""
LISTEN_BACKLOG = 512
"""Connections the kernel queues while every worker is busy (socketserver's default of 5
drops connections under a burst, which clients see as time-outs)."""
CONNECTION_TIMEOUT = 10.0
"""Seconds a connection may stay silent (before or within its request) before it is closed."""

_GONE = (BrokenPipeError, ConnectionResetError, ConnectionAbortedError, TimeoutError)
"""Ways a client leaves early; they are the client's business, not a fault of ours."""


class SiteServer(HTTPServer):
    """An `HTTPServer` that knows its site folder and how loudly to log, and answers
    connections from a bounded thread pool with a per-connection timeout."""

    request_queue_size = LISTEN_BACKLOG

    def __init__(self, address: tuple[str, int], root: Path, *, quiet: bool = True,
                 workers: int = WORKERS, timeout: float = CONNECTION_TIMEOUT) -> None:
        self.root = root
        self.quiet = quiet
        self.connection_timeout = timeout
        self._pool = ThreadPoolExecutor(max_workers=workers,
                                        thread_name_prefix="comove-pages")
        super().__init__(address, _SiteHandler)

    def process_request(self, request: Any, client_address: Any) -> None:
        self._pool.submit(self._answer, request, client_address)

    def _answer(self, request: Any, client_address: Any) -> None:
        try:
            self.finish_request(request, client_address)
        except Exception:
            self.handle_error(request, client_address)
        finally:
            self.shutdown_request(request)

    def handle_error(self, request: Any, client_address: Any) -> None:
        error = sys.exc_info()[1]
        peer = client_address[0] if client_address else "?"
        if isinstance(error, _GONE):
            LOG.debug("pages: %s went away: %s", peer, type(error).__name__)
        else:
            LOG.warning("pages: request from %s failed: %s: %s", peer,
                        type(error).__name__, error)

    def server_close(self) -> None:
        super().server_close()
        self._pool.shutdown(wait=False, cancel_futures=True)


class _SiteHandler(BaseHTTPRequestHandler):
    server_version = "comove"
    sys_version = ""

    def setup(self) -> None:
        super().setup()
        # Every read and write on the connection, the request line included.
        self.connection.settimeout(cast(SiteServer, self.server).connection_timeout)

    @property
    def site(self) -> SiteServer:
        return cast(SiteServer, self.server)

    def __getattr__(self, name: str) -> Any:
        # http.server looks up do_<METHOD>; any method but GET and HEAD gets a 405.
        if name.startswith("do_"):
            return self._method_not_allowed
        raise AttributeError(name)

    def _common_headers(self, policy: str) -> None:
        self.send_header("X-Content-Type-Options", "nosniff")
        self.send_header("Content-Security-Policy", policy)
        self.send_header("Referrer-Policy", "no-referrer")
        self.send_header("Cache-Control", "no-cache")

    def _plain(self, status: HTTPStatus, extra: dict[str, str] | None = None) -> None:
        body = f"{status.value} {status.phrase}\n".encode()
        self.send_response(status)
        self._common_headers(PAGE_POLICY)
        for key, value in (extra or {}).items():
            self.send_header(key, value)
        self.send_header("Content-Type", "text/plain; charset=utf-8")
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(body)

    def _method_not_allowed(self) -> None:
        self._plain(HTTPStatus.METHOD_NOT_ALLOWED, {"Allow": ", ".join(ALLOWED_METHODS)})

    def _serve(self, with_body: bool) -> None:
        try:
            file = resolve_request(self.site.root, self.path)
            data = file.read_bytes()
        except RequestRefused as refusal:
            self._plain(refusal.status)
            return
        except OSError:
            self._plain(HTTPStatus.NOT_FOUND)
            return
        self.send_response(HTTPStatus.OK)
        self._common_headers(_policy(self.site.root, file))
        content_type = CONTENT_TYPES.get(file.suffix.lower(), "application/octet-stream")
        self.send_header("Content-Type", content_type)
        self.send_header("Content-Length", str(len(data)))
        self.end_headers()
        if with_body:
            self.wfile.write(data)

    def do_GET(self) -> None:  # noqa: N802 - the name http.server dispatches to
        self._serve(with_body=True)

    def do_HEAD(self) -> None:  # noqa: N802
        self._serve(with_body=False)

    def log_request(self, code: int | str = "-", size: int | str = "-") -> None:
        status = int(code) if str(code).isdigit() else 0
        if not self.site.quiet or status >= 400:
            super().log_request(code, size)

    def log_message(self, format: str, *args: Any) -> None:  # noqa: A002 - base signature
        sys.stderr.write(f"comove pages: {self.address_string()} {format % args}\n")


def _loopback_family(host: str) -> tuple[bool, socket.AddressFamily]:
    try:
        infos = socket.getaddrinfo(host, None, proto=socket.IPPROTO_TCP)
    except (socket.gaierror, UnicodeError):
        return (False, socket.AF_INET)
    addresses = [info[4][0] for info in infos]
    loopback = bool(addresses) and all(
        ipaddress.ip_address(str(address).split("%", 1)[0]).is_loopback for address in addresses
    )
    return (loopback, infos[0][0] if infos else socket.AF_INET)


def make_server(
    folder: Path | str,
    host: str = "127.0.0.1",
    port: int = 0,
    *,
    allow_remote: bool = False,
    quiet: bool = True,
    workers: int = WORKERS,
    timeout: float = CONNECTION_TIMEOUT,
) -> HTTPServer:
    """Create (and bind) a read-only server of a built site; call ``serve_forever()`` on it.

    Parameters
    ----------
    folder : Path or str
        The site folder (`monitor.pages.build_site`'s ``out_dir``).
    host : str
        Address to listen on. Must be loopback (127.0.0.1, ::1, localhost) unless
        `allow_remote` is True.
    port : int
        TCP port; 0 picks a free one (read it from ``server.server_address[1]``).
    allow_remote : bool
        Allow a non-loopback `host` such as "0.0.0.0", which lets other machines read the
        pages. Off by default: the pages name the desk's positions and people.
    quiet : bool
        Log only refused and failed requests (to stderr); False logs every request.
    workers : int
        Threads answering connections (the pool is bounded; others wait to be accepted).
    timeout : float
        Seconds a connection may stay silent before it is closed.

    Returns
    -------
    HTTPServer
        A `SiteServer`, bound and listening, not yet serving.

    Raises
    ------
    ComoveError
        `folder` is not a folder, `host` is not loopback without `allow_remote`, `port` is
        out of range, or the address cannot be bound.
    """
    root = Path(folder)
    if not root.is_dir():
        raise ComoveError(f"folder: {str(root)!r} is not a folder")
    if not 0 <= port <= 65535:
        raise ComoveError(f"port: {port!r} is not between 0 and 65535")
    loopback, family = _loopback_family(host)
    if not loopback and not allow_remote:
        raise ComoveError(
            f"host: {host!r} is not a loopback address; pass allow_remote=True to let "
            "other machines read the pages"
        )
    server_class = type("SiteServer", (SiteServer,), {"address_family": family})
    try:
        return cast(HTTPServer, server_class((host, port), root.resolve(), quiet=quiet,
                                             workers=workers, timeout=timeout))
    except OSError as exc:
        raise ComoveError(f"port: cannot listen on {host}:{port}: {exc.strerror or exc}") from exc


def server_url(server: HTTPServer) -> str:
    """The http:// address of a server made by `make_server`, ending in "/"."""
    host, port = server.server_address[:2]
    text = host.decode() if isinstance(host, bytes) else str(host)
    if ":" in text:
        text = f"[{text}]"
    return f"http://{text}:{port}/"


def serve_forever(
    folder: Path | str,
    host: str = "127.0.0.1",
    port: int = 8000,
    *,
    allow_remote: bool = False,
    quiet: bool = True,
    announce: Callable[[str], None] | None = None,
) -> None:
    """Serve a built site until interrupted (Ctrl+C), then close the socket.

    Parameters
    ----------
    folder, host, port, allow_remote, quiet
        As for `make_server` (the port defaults to 8000 here).
    announce : callable, optional
        Called once with a line saying where the pages are; by default the line goes to
        stderr.

    Raises
    ------
    ComoveError
        As for `make_server`.
    """
    server = make_server(folder, host, port, allow_remote=allow_remote, quiet=quiet)
    line = f"Serving {folder} at {server_url(server)} (read-only; Ctrl+C stops)"
    if announce is None:
        sys.stderr.write(line + "\n")
    else:
        announce(line)
    try:
        server.serve_forever()
    except KeyboardInterrupt:
        pass
    finally:
        server.server_close()


__all__ = [
    "CONTENT_TYPES",
    "DIGEST_POLICY",
    "PAGE_POLICY",
    "RequestRefused",
    "SVG_POLICY",
    "SiteServer",
    "make_server",
    "resolve_request",
    "serve_forever",
    "server_url",
]
