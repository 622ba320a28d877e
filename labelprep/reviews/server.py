"""The review server: a page on 127.0.0.1 over one ``prepare`` output folder.

Security rules (each has a test in ``tests/test_review_server.py``):

* bound to 127.0.0.1 only, on a free port;
* every request carries the token made for this run (``?token=`` or the ``X-Review-Token``
  header), compared in constant time; the page's links and calls carry it;
* the Host header must be ``127.0.0.1:PORT``: a page of another site whose name was rebound to
  the loopback address (DNS rebinding) sends its own name and is refused;
* images are served by manifest row index, never by a path from the request, and only from the
  roots the manifest's sidecar lists (a row whose file resolves outside them is refused);
* state-changing requests are POST, with the token in the header (a cross-site form cannot set
  it), a JSON body, and an Origin, when sent, that is this server's;
* the page is served with a Content-Security-Policy allowing only this server, no framing and
  no referrer (the token is in the URL).
"""

from __future__ import annotations

import hmac
import json
import secrets
import threading
from http import HTTPStatus
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from importlib import resources
from pathlib import Path
from urllib.parse import parse_qs, urlsplit

from ..errors import InputError, LabelprepError, ParameterError

HOST = "127.0.0.1"
TOKEN_HEADER = "X-Review-Token"
MAX_BODY = 64 * 1024
THUMB_SIDE = 240
FULL_SIDE = 4096  # full-size previews are re-encoded, bounded so a huge scan cannot exhaust memory
ASSETS = {"review.js": "text/javascript; charset=utf-8", "review.css": "text/css; charset=utf-8",
          "icon.svg": "image/svg+xml"}
POLICY = ("default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; "
          "connect-src 'self'; frame-ancestors 'none'; base-uri 'none'; form-action 'none'")


class ReviewServer(ThreadingHTTPServer):
    """The HTTP server of one review session; :func:`make_server` builds it."""

    daemon_threads = True

    def __init__(self, folder: Path, decisions_path: Path, port: int, token: str):
        super().__init__((HOST, port), _Handler)
        self.folder = folder
        self.decisions_path = decisions_path
        self.token = token
        self.lock = threading.Lock()
        self.load()

    def handle_error(self, request, client_address):
        import sys

        if not isinstance(sys.exc_info()[1], ConnectionError):  # a closed tab is no error
            super().handle_error(request, client_address)

    @property
    def port(self) -> int:
        return self.server_address[1]

    @property
    def url(self) -> str:
        return f"http://{HOST}:{self.port}/?token={self.token}"

    def load(self) -> None:
        """(Re)read the manifest, its sidecar's roots and the decisions file."""
        from .. import manifest
        from ..decisions import load
        from ..pipeline import MANIFEST_NAME
        from ..sources import roots_of
        from .queue import Queue

        target = self.folder / MANIFEST_NAME
        self.manifest = manifest.read(target)
        self.meta = manifest.read_sidecar(target)
        self.roots = roots_of(self.meta)
        recorded = self.meta.get("stages", {}).get("prepare", {}).get("options", {})
        self.queue = Queue(self.manifest, flips=bool(recorded.get("flips")))
        self.decisions = load(self.decisions_path, required=False)

    def summary(self) -> dict:
        """Counts of each list, and the decisions file: its rows and those naming no manifest row."""
        from ..decisions import findings

        return {**self.queue.counts(), "folder": str(self.folder),
                "decisions_file": str(self.decisions_path), "decisions": len(self.decisions),
                "unknown": findings(self.manifest, self.decisions)["unknown"]}

    def preview(self, row: int, side: int):
        """JPEG bytes of manifest row ``row`` fitting ``side``, or None (no file, outside the
        roots, not decodable)."""
        from ..reports.page import preview_jpeg
        from ..sources import locate

        if self.roots is None or not 0 <= row < len(self.queue.paths):
            return None
        path = self.queue.paths[row]
        if self.queue.cell("fault", row):
            return None  # links, bombs, broken files: never opened again from here
        try:
            where, _ = locate(self.roots, path)
        except InputError:
            return None
        roots = self.roots.values() if isinstance(self.roots, dict) else [self.roots]
        real = Path(where).resolve()
        if not any(real == Path(r).resolve() or Path(r).resolve() in real.parents for r in roots):
            return None
        return preview_jpeg(self.roots, path, side, quality=72 if side <= THUMB_SIDE else 90)

    def decide(self, body: dict) -> dict:
        """Apply one change from the page to the decisions file, atomically; return the
        decision it replaced (for the page's undo)."""
        from ..decisions import PAIR_ACTIONS, put, save

        row = _int(body.get("row"), "row")
        if not 0 <= row < len(self.queue.paths):
            raise ParameterError(f"row {row} is not a row of the manifest")
        action = str(body.get("action", ""))
        value = str(body.get("value", "") or "")
        if action in PAIR_ACTIONS:
            other = _int(body.get("other"), "other")
            if not 0 <= other < len(self.queue.paths):
                raise ParameterError(f"other {other} is not a row of the manifest")
            value = self.queue.paths[other]
        entry = {"path": self.queue.paths[row], "action": action, "value": value,
                 "note": str(body.get("note", "") or "")}
        with self.lock:
            table, previous = put(self.decisions, entry, remove=bool(body.get("remove")))
            save(table, self.decisions_path)
            self.decisions = table
        return {"previous": previous, "decisions": len(table)}

    def rerun(self) -> dict:
        """Group, split and report again with the decisions as they are now; reload."""
        from ..pipeline import rerun

        with self.lock:
            _, summary = rerun(self.folder, decisions=self.decisions_path if
                               self.decisions_path.is_file() else None)
            self.load()
        return {"counts": self.queue.counts(), "decisions": summary.get("decisions")}


def make_server(folder, *, decisions=None, port: int = 0, token: str | None = None) -> ReviewServer:
    """A review server over the ``prepare`` output ``folder``, bound to 127.0.0.1.

    Parameters
    ----------
    folder : str or Path
        A folder written by ``prepare`` (``manifest.csv`` and its sidecar).
    decisions : str or Path, optional
        The decisions file the page writes; default ``folder/decisions.csv``.
    port : int, default 0
        0 picks a free port.
    token : str, optional
        The token every request must carry; by default a new random one (32 bytes).

    Returns
    -------
    ReviewServer
        Not yet serving: call ``serve_forever()`` (``shutdown()`` from another thread stops it);
        ``url`` holds the address with the token.

    Examples
    --------
    >>> server = make_server("prepared/")            # doctest: +SKIP
    >>> print(server.url)                            # doctest: +SKIP
    http://127.0.0.1:40517/?token=...
    """
    from ..decisions import FILE_NAME
    from ..pipeline import MANIFEST_NAME

    folder = Path(folder)
    if not (folder / MANIFEST_NAME).is_file():
        raise InputError(f"{folder} holds no {MANIFEST_NAME}; run labelprep prepare ROOT --out {folder} first")
    if isinstance(port, bool) or not isinstance(port, int) or not 0 <= port <= 65535:
        raise ParameterError(f"port must be an int from 0 to 65535, got port={port!r}")
    path = Path(decisions) if decisions is not None else folder / FILE_NAME
    return ReviewServer(folder, path, port, token or secrets.token_urlsafe(32))


def _int(value, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise ParameterError(f"{name} must be an integer row index, got {value!r}")
    return value


def _asset(name: str) -> bytes:
    return resources.files("labelprep.reviews").joinpath("assets", name).read_bytes()


class _Handler(BaseHTTPRequestHandler):
    server: ReviewServer
    protocol_version = "HTTP/1.1"

    def log_message(self, format, *args):  # noqa: A002 - the signature http.server calls
        pass  # the terminal shows the URL only; requests are not logged

    # ------------------------------------------------------------ the checks on every request
    def _allowed(self, *, post: bool) -> bool:
        if self.headers.get("Host") != f"{HOST}:{self.server.port}":
            return self._refuse(HTTPStatus.MISDIRECTED_REQUEST, "Host must be the loopback address")
        given = self.headers.get(TOKEN_HEADER, "")
        if not post and not given:
            given = parse_qs(urlsplit(self.path).query).get("token", [""])[0]
        if not hmac.compare_digest(given.encode(), self.server.token.encode()):
            return self._refuse(HTTPStatus.FORBIDDEN, "missing or wrong token")
        if post:
            origin = self.headers.get("Origin")
            if origin is not None and origin != f"http://{HOST}:{self.server.port}":
                return self._refuse(HTTPStatus.FORBIDDEN, "cross-origin request refused")
            if self.headers.get("Content-Type", "").split(";")[0].strip() != "application/json":
                return self._refuse(HTTPStatus.UNSUPPORTED_MEDIA_TYPE, "send JSON")
        return True

    def _refuse(self, status, reason: str) -> bool:
        self._send(status, json.dumps({"error": reason}).encode(), "application/json")
        return False

    def _send(self, status, body: bytes, kind: str, *, page: bool = False):
        self.send_response(status)
        self.send_header("Content-Type", kind)
        self.send_header("Content-Length", str(len(body)))
        self.send_header("Cache-Control", "no-store")
        self.send_header("X-Content-Type-Options", "nosniff")
        self.send_header("Referrer-Policy", "no-referrer")
        if page:
            self.send_header("Content-Security-Policy", POLICY)
            self.send_header("X-Frame-Options", "DENY")
        self.end_headers()
        self.wfile.write(body)

    def _json(self, value, status=HTTPStatus.OK):
        self._send(status, json.dumps(value, ensure_ascii=False).encode("utf-8"), "application/json")

    # ------------------------------------------------------------ routes
    def do_GET(self):  # noqa: N802 - the name http.server calls
        if not self._allowed(post=False):
            return
        parts = urlsplit(self.path)
        query = {k: v[0] for k, v in parse_qs(parts.query).items()}
        route = parts.path
        if route == "/":
            self._send(HTTPStatus.OK, self._page(), "text/html; charset=utf-8", page=True)
        elif route.startswith("/assets/") and route[len("/assets/"):] in ASSETS:
            name = route[len("/assets/"):]
            self._send(HTTPStatus.OK, _asset(name), ASSETS[name])
        elif route == "/api/summary":
            self._json(self.server.summary())
        elif route == "/api/items":
            self._items(query)
        elif route == "/api/image":
            self._image(query)
        elif route in ("/api/decide", "/api/rerun"):
            self._refuse(HTTPStatus.METHOD_NOT_ALLOWED, "use POST")
        else:
            self._refuse(HTTPStatus.NOT_FOUND, "no such page")

    def do_POST(self):  # noqa: N802
        if not self._allowed(post=True):
            return
        length = self.headers.get("Content-Length", "")
        if not length.isdigit() or int(length) > MAX_BODY:
            return self._refuse(HTTPStatus.REQUEST_ENTITY_TOO_LARGE, f"a body of at most {MAX_BODY} bytes")
        try:
            body = json.loads(self.rfile.read(int(length)) or b"{}")
            if not isinstance(body, dict):
                raise ValueError("a JSON object is expected")
        except ValueError as exc:
            return self._refuse(HTTPStatus.BAD_REQUEST, f"bad JSON: {exc}")
        route = urlsplit(self.path).path
        try:
            if route == "/api/decide":
                self._json(self.server.decide(body))
            elif route == "/api/rerun":
                self._json(self.server.rerun())
            else:
                self._refuse(HTTPStatus.NOT_FOUND, "no such action")
        except LabelprepError as exc:
            self._refuse(HTTPStatus.BAD_REQUEST, str(exc))

    def _not_allowed(self):
        if self._allowed(post=False):
            self._refuse(HTTPStatus.METHOD_NOT_ALLOWED, "only GET and POST")

    do_PUT = do_DELETE = do_PATCH = _not_allowed

    def _items(self, query: dict):
        from .queue import MAX_PAGE, TABS

        tab = query.get("tab", "clusters")
        try:
            offset, limit = int(query.get("offset", 0)), int(query.get("limit", 50))
        except ValueError:
            return self._refuse(HTTPStatus.BAD_REQUEST, "offset and limit are integers")
        if tab not in TABS or offset < 0 or not 1 <= limit <= MAX_PAGE:
            return self._refuse(HTTPStatus.BAD_REQUEST,
                                f"tab is one of {', '.join(TABS)}, offset >= 0, limit 1..{MAX_PAGE}")
        self._json(self.server.queue.page(tab, offset, limit, self.server.decisions))

    def _image(self, query: dict):
        try:
            row = int(query.get("row", ""))
        except ValueError:
            return self._refuse(HTTPStatus.BAD_REQUEST, "row is a manifest row index")
        side = FULL_SIDE if query.get("size") == "full" else THUMB_SIDE
        data = self.server.preview(row, side)
        if data is None:
            return self._refuse(HTTPStatus.NOT_FOUND, "no preview for this row")
        self._send(HTTPStatus.OK, data, "image/jpeg")

    def _page(self) -> bytes:
        import html

        token = html.escape(self.server.token)
        text = _asset("review.html").decode("utf-8")
        return text.replace("{{token}}", token).replace(
            "{{folder}}", html.escape(str(self.server.folder))).encode("utf-8")
