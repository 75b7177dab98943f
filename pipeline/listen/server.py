"""The local listening server: 127.0.0.1 only, a token on every request, an allowlist of files.

It serves the page (HTML, CSS and JavaScript shipped in the package), the sounds'
records as JSON, the WAVs and thumbnails listed in the folders' manifests, the bank's
clips with ``--bank``, and takes keep/reject marks by POST. Nothing else can be
fetched: a file is found by exact lookup of its manifest name, never by joining a
requested path, and it is re-checked to lie inside its folder (links resolved) each
time it is served.
"""

from __future__ import annotations

import hmac
import html
import json
import math
import os
import secrets
import signal
import sys
import threading
import webbrowser
from collections.abc import Callable
from functools import lru_cache
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from importlib import resources
from pathlib import Path
from typing import Any
from urllib.parse import parse_qs, unquote, urlsplit

from pipeline.errors import ShotsmithError
from pipeline.files import reason
from pipeline.listen.catalog import contained_file, read_bank, read_folders
from pipeline.listen.measure import draw_legend_png, thumbnail
from pipeline.listen.picks import PICKS_FILE, STATES, set_pick, settle
from pipeline.listen.sounds import References, build_sounds, current_marks

HOST = "127.0.0.1"  # loopback only: never reachable from another machine
MAX_BODY = 4096
STATIC = {"listen.css": "text/css; charset=utf-8",
          "listen.js": "text/javascript; charset=utf-8",
          "icon.svg": "image/svg+xml"}
SECURITY_HEADERS = {
    "Content-Security-Policy": "default-src 'none'; script-src 'self'; style-src 'self'; "
    "img-src 'self'; media-src 'self'; connect-src 'self'; base-uri 'none'; "
    "form-action 'none'; frame-ancestors 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "X-Frame-Options": "DENY",
    "Cross-Origin-Resource-Policy": "same-origin",
}


def _static(name: str) -> bytes:
    return resources.files("pipeline.listen").joinpath("static", name).read_bytes()


class ListenServer:
    """The listening page for ``folders``; ``bank`` adds categories and nearest-clip playback.

    >>> srv = ListenServer(["out"])          # doctest: +SKIP
    >>> srv.start(); print(srv.url); srv.stop()
    """

    def __init__(self, folders: list[str | Path], *, bank: str | Path | None = None,
                 port: int = 0) -> None:
        self.catalog = read_folders(folders)
        self.bank = read_bank(bank) if bank is not None else None
        self.data = build_sounds(self.catalog, self.bank)
        self.references = References(self.bank) if self.bank is not None else None
        self.token = secrets.token_urlsafe(32)
        try:
            self.httpd = _HTTPServer((HOST, port), _Handler)
        except OSError as exc:
            raise ShotsmithError(f"port {port}: cannot listen on {HOST} "
                                 f"({reason(exc)})") from None
        self.httpd.app = self
        self.closed = False
        self._thread: threading.Thread | None = None

    @property
    def port(self) -> int:
        return self.httpd.server_address[1]

    @property
    def url(self) -> str:
        return f"http://{HOST}:{self.port}/?token={self.token}"

    def picks_files(self) -> list[Path]:
        return [root / PICKS_FILE for root in self.catalog.folders]

    def serve_forever(self) -> None:
        self.httpd.serve_forever(poll_interval=0.05)

    def start(self) -> None:
        """Serve from a background thread (scripts and tests)."""
        self._thread = threading.Thread(target=self.serve_forever, daemon=True)
        self._thread.start()

    def stop(self) -> None:
        """Stop serving; marks already being written are finished first, later ones refused."""
        self.closed = True
        if self._thread is not None:
            self.httpd.shutdown()
            self._thread.join()
            self._thread = None
        self.httpd.server_close()
        for root in self.catalog.folders:
            settle(root)

    def records(self) -> dict[str, Any]:
        marks = current_marks(self.catalog)
        sounds = [r | {"mark": marks.get(r["id"])} for r in self.data["sounds"]]
        return self.data | {"sounds": sounds}


class _HTTPServer(ThreadingHTTPServer):
    daemon_threads = True
    block_on_close = False
    app: ListenServer


class _Handler(BaseHTTPRequestHandler):
    server: _HTTPServer
    server_version = "shotsmith-listen"
    sys_version = ""
    protocol_version = "HTTP/1.1"

    def log_message(self, format: str, *args: Any) -> None:  # noqa: A002 - the base's name
        if os.environ.get("SHOTSMITH_DEBUG") == "1":
            super().log_message(format, *args)

    # --- responses --------------------------------------------------------------------

    def _send(self, code: int, body: bytes, ctype: str, *, cache: bool = False,
              extra: dict[str, str] | None = None) -> None:
        self.send_response(code)
        self.send_header("Content-Type", ctype)
        self.send_header("Content-Length", str(len(body)))
        self.send_header("Cache-Control", "private, max-age=3600" if cache else "no-store")
        for k, v in (SECURITY_HEADERS | (extra or {})).items():
            self.send_header(k, v)
        self.end_headers()
        if self.command != "HEAD":
            try:
                self.wfile.write(body)
            except (BrokenPipeError, ConnectionResetError):  # the page stopped a media load
                pass

    def _json(self, code: int, data: Any) -> None:
        body = json.dumps(_finite_json(data), ensure_ascii=False, allow_nan=False)
        self._send(code, body.encode("utf-8"), "application/json; charset=utf-8")

    def _error(self, code: int, why: str) -> None:
        self.close_connection = True  # an unread request body must not be taken for a request
        self._json(code, {"error": why})

    def _bytes(self, data: bytes, ctype: str) -> None:
        """Send ``data`` whole, or the single byte range the request asks for (media seeking)."""
        rng = self.headers.get("Range")
        if not rng:
            self._send(200, data, ctype, cache=True, extra={"Accept-Ranges": "bytes"})
            return
        span = _byte_range(rng, len(data))
        if span is None:
            self._send(416, b"", ctype, extra={"Content-Range": f"bytes */{len(data)}"})
            return
        a, b = span
        self._send(206, data[a : b + 1], ctype, cache=True,
                   extra={"Accept-Ranges": "bytes", "Content-Range": f"bytes {a}-{b}/{len(data)}"})

    # --- checks -----------------------------------------------------------------------

    def _authorised(self, query: dict[str, list[str]]) -> bool:
        """Host header of this server (no DNS rebinding) and the session token."""
        host = self.headers.get("Host", "")
        port = self.server.app.port
        if host not in (f"{HOST}:{port}", f"localhost:{port}"):
            return False
        given = (query.get("token") or [""])[0]
        return hmac.compare_digest(given.encode(), self.server.app.token.encode())

    def _sound_path(self, rest: str) -> tuple[Path, Path, str] | None:
        """``<folder>/<file>`` of a listed sound: (folder, resolved file, name), re-checked."""
        folder, _, name = rest.partition("/")
        if not folder.isdigit():
            return None
        sound = self.server.app.catalog.find(int(folder), unquote(name))
        if sound is None:
            return None
        real = contained_file(sound.root, sound.file)
        return (sound.root, real, sound.file) if real is not None else None

    # --- methods ----------------------------------------------------------------------

    def do_GET(self) -> None:  # noqa: N802 - the base class's name
        url = urlsplit(self.path)
        if not self._authorised(parse_qs(url.query)):
            self._error(403, "forbidden: this page needs the link printed by shotsmith listen")
            return
        app = self.server.app
        path = url.path
        if path in ("/", "/index.html"):
            page = _static("index.html").decode("utf-8")
            page = page.replace("__TOKEN__", html.escape(app.token, quote=True))
            self._send(200, page.encode("utf-8"), "text/html; charset=utf-8")
        elif path.startswith("/static/") and path[8:] in STATIC:
            self._send(200, _static(path[8:]), STATIC[path[8:]], cache=True)
        elif path == "/api/sounds":
            self._json(200, app.records())
        elif path == "/legend.png":
            self._send(200, _legend(), "image/png", cache=True)
        elif path.startswith(("/audio/", "/thumb/")):
            found = self._sound_path(path[7:])
            if found is None:
                self._error(404, "not found")
                return
            root, real, name = found
            try:
                if path.startswith("/audio/"):
                    self._bytes(real.read_bytes(), "audio/wav")
                else:
                    self._send(200, thumbnail(root, name, real), "image/png", cache=True)
            except OSError:
                self._error(404, "not found")
        elif path.startswith(("/reference/", "/api/reference/")) and app.references is not None:
            name = unquote(path.rsplit("/", 1)[1])
            got = app.references.get(name, app.data["target_lufs"])
            if got is None:
                self._error(404, "not found")
            elif path.startswith("/api/"):
                self._json(200, got[1])
            else:
                self._bytes(got[0], "audio/wav")
        else:
            self._error(404, "not found")

    def do_POST(self) -> None:  # noqa: N802 - the base class's name
        url = urlsplit(self.path)
        if not self._authorised(parse_qs(url.query)):
            self._error(403, "forbidden")
            return
        origin = self.headers.get("Origin")
        if origin is not None and origin != f"http://{self.headers.get('Host')}":
            self._error(403, "forbidden: request from another site")
            return
        if url.path != "/api/pick":
            self._error(404, "not found")
            return
        try:
            length = int(self.headers.get("Content-Length", ""))
        except ValueError:
            self._error(411, "Content-Length required")
            return
        if not 0 < length <= MAX_BODY:
            self._error(413, "request too large")
            return
        if not self.headers.get("Content-Type", "").startswith("application/json"):
            self._error(415, "send JSON")
            return
        try:
            body = json.loads(self.rfile.read(length))
            folder, file, state = int(body["folder"]), str(body["file"]), body.get("state")
        except (ValueError, KeyError, TypeError):
            self._error(400, "expected {folder, file, state}")
            return
        if state is not None and state not in STATES:
            self._error(400, "state must be keep, reject or null")
            return
        if self.server.app.closed:
            self._error(503, "the listening server is stopping; the mark was not saved")
            return
        sound = self.server.app.catalog.find(folder, file)
        if sound is None or contained_file(sound.root, sound.file) is None:
            self._error(404, "not found")
            return
        try:
            where = set_pick(sound.root, sound.file, state)
        except ShotsmithError as exc:
            self._error(500, str(exc))
            return
        self._json(200, {"id": f"{folder}/{file}", "mark": state, "picks": str(where)})

    def do_HEAD(self) -> None:  # noqa: N802 - the base class's name
        self.do_GET()


@lru_cache(maxsize=1)
def _legend() -> bytes:
    return draw_legend_png()


def _byte_range(header: str, size: int) -> tuple[int, int] | None:
    """One ``bytes=a-b`` / ``bytes=a-`` / ``bytes=-n`` range (RFC 9110, 14.1.2) within ``size``."""
    unit, _, spec = header.strip().partition("=")
    if unit.strip().lower() != "bytes" or "," in spec or "-" not in spec:
        return None
    first, _, last = (p.strip() for p in spec.partition("-"))
    try:
        if first == "":
            n = int(last)
            if n <= 0:
                return None
            return max(size - n, 0), size - 1
        a = int(first)
        b = int(last) if last else size - 1
    except ValueError:
        return None
    if a < 0 or a >= size or b < a:
        return None
    return a, min(b, size - 1)


def _finite_json(x: Any) -> Any:
    if isinstance(x, dict):
        return {k: _finite_json(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_finite_json(v) for v in x]
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def _can_open_browser() -> bool:
    """A graphical browser is likely: not a Linux console, where webbrowser picks text browsers."""
    if sys.platform.startswith("linux"):
        return bool(os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"))
    return True


def serve(
    folders: list[str | Path],
    *,
    bank: str | Path | None = None,
    port: int = 0,
    open_browser: bool = True,
    echo: Callable[[str], None] = print,
) -> dict[str, Any]:
    """Run the listening page until Ctrl-C (or SIGTERM); returns where the marks are.

    Prints the page's address (with its token); opens it in the default browser when
    ``open_browser`` and a graphical browser is likely.
    """
    srv = ListenServer(folders, bank=bank, port=port)
    n = len(srv.data["sounds"])
    for note in srv.data["notes"]:
        echo(f"note: {note}")
    echo(f"{n} sounds from {len(srv.catalog.folders)} folder(s) at {srv.url}")
    echo("press Ctrl-C to stop")
    if open_browser and _can_open_browser():
        webbrowser.open(srv.url)
    previous = None
    if threading.current_thread() is threading.main_thread():
        previous = signal.signal(signal.SIGTERM, _raise_interrupt)
    try:
        srv.serve_forever()
    except KeyboardInterrupt:
        pass
    finally:
        srv.stop()
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)
    saved = [str(p) for p in srv.picks_files() if p.is_file()]
    marks = current_marks(srv.catalog)
    return {
        "sounds": n,
        "kept": sum(v == "keep" for v in marks.values()),
        "rejected": sum(v == "reject" for v in marks.values()),
        "picks": saved,
        "url": srv.url,
    }


def _raise_interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt
