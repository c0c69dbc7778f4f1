"""`trawl check`: a local page to listen to hits and mark them yes or no.

A Starlette application served by uvicorn on 127.0.0.1 only. Every address
starts with a random secret (``/SECRET/...``); any other request is refused
with 403. The page reaches hits by their number in the sample, never by a
path: the audio of hit n is cut from ``archive / broadcast`` of that hit,
after checking the broadcast is one the index holds and lies inside the
archive folder. Verdicts and notes are written into the sample file at once
(``detector.checking.CheckFile``).
"""

from __future__ import annotations

import json
import secrets
import socket
import threading
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

from . import TrawlError
from .checking import (CheckFile, FileChanged, hit_audio, parse_note, parse_posted_verdict, png_bytes,
                       spectrogram_image, wav_bytes)

MAX_POST_BYTES = 4096
STATIC = {  # the only files the page may fetch besides the API: name -> media type
    "check.js": "text/javascript; charset=utf-8",
    "check.css": "text/css; charset=utf-8",
}
SECURITY_HEADERS = {
    # everything from this server only: the page works offline and loads nothing from elsewhere
    "content-security-policy": "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' blob:; "
                               "media-src 'self' blob:; connect-src 'self'; base-uri 'none'; form-action 'none'",
    "x-content-type-options": "nosniff",
    "referrer-policy": "no-referrer",
    "cache-control": "no-store",
}
INSTALL_HINT = "trawl check needs starlette and uvicorn: pip install 'starlette>=0.37' 'uvicorn>=0.29'"


@dataclass
class Session:
    """What the page works on: the sample file, where its audio is, and how each term is searched."""

    sample: CheckFile
    archive: Path
    broadcasts: set[str]  # relative paths the index holds
    searched: dict[str, str] = field(default_factory=dict)  # term as typed -> as searched
    secret: str = field(default_factory=lambda: secrets.token_urlsafe(24))
    lock: threading.Lock = field(default_factory=threading.Lock)

    def audio_path(self, number: int) -> Path:
        """The recording of hit `number`: a broadcast of the index, inside the archive folder."""
        rel = self.sample.rows[number].broadcast
        if rel not in self.broadcasts:
            raise LookupError(f"{rel} is not a broadcast of this index")
        root = self.archive.resolve()
        path = (root / rel).resolve()
        if root not in path.parents:
            raise LookupError(f"{rel} lies outside the archive folder")
        return path

    def state(self) -> dict:
        hits = []
        for h in self.sample.hits():
            c = h.cells
            hits.append({
                "n": h.number, "term": h.row.term, "searched": self.searched.get(h.row.term, h.row.term),
                "broadcast": h.row.broadcast, "start": h.row.start, "end": h.row.end,
                "start_hms": c.get("start_hms", ""), "end_hms": c.get("end_hms", ""),
                "score": c.get("score", ""), "confidence": c.get("confidence", ""), "rank": c.get("rank", ""),
                "verdict": None if h.row.verdict is None else ("yes" if h.row.verdict else "no"),
                "note": h.note,
            })
        unchecked = [h["n"] for h in hits if h["verdict"] is None]
        return {"file": self.sample.path.name, "hits": hits, "resume": unchecked[0] if unchecked else 0,
                "changed": self.sample.changed_outside()}


def _progress(s: Session) -> dict:
    v = s.sample.verdicts()
    return {"checked": sum(x is not None for x in v), "total": len(v),
            "yes": sum(x is True for x in v), "no": sum(x is False for x in v)}


def make_app(s: Session):
    try:
        from starlette.applications import Starlette
        from starlette.requests import ClientDisconnect
        from starlette.responses import JSONResponse, PlainTextResponse, RedirectResponse, Response
        from starlette.routing import Route
    except ImportError:
        raise TrawlError(INSTALL_HINT) from None

    prefix = f"/{s.secret}"

    def problem(status: int, message: str) -> JSONResponse:
        return JSONResponse({"error": message}, status_code=status)

    def hit_number(request) -> int | None:
        n = request.path_params["n"]
        return n if 0 <= n < len(s.sample.rows) else None

    async def page(request):
        html = resources.files("detector").joinpath("check_static/check.html").read_text(encoding="utf-8")
        return Response(html, media_type="text/html; charset=utf-8")

    async def to_page(request):
        return RedirectResponse(prefix + "/", status_code=308)

    async def static(request):
        name = request.path_params["name"]
        if name not in STATIC:  # a fixed list: the name never reaches the file system
            return problem(404, "no such file")
        body = resources.files("detector").joinpath("check_static", name).read_bytes()
        return Response(body, media_type=STATIC[name])

    async def state(request):
        with s.lock:
            return JSONResponse(s.state() | {"progress": _progress(s)})

    async def changed(request):
        return JSONResponse({"changed": s.sample.changed_outside()})

    def clip(request):
        """(row, samples, rate, clip start) of the hit in the path, or an error response."""
        n = hit_number(request)
        if n is None:
            return None, problem(404, "no such hit in the sample")
        row = s.sample.rows[n]
        try:
            return (row, *hit_audio(s.audio_path(n), row.start, row.end)), None
        except (LookupError, TrawlError) as e:
            return None, problem(404, str(e))

    async def audio(request):
        got, err = clip(request)
        if err is not None:
            return err
        row, x, sr, t0 = got
        return Response(wav_bytes(x, sr), media_type="audio/wav", headers={"x-clip-start": f"{t0:.3f}"})

    async def picture(request):
        got, err = clip(request)
        if err is not None:
            return err
        row, x, sr, t0 = got
        img = spectrogram_image(x, sr, (row.start - t0, row.end - t0))
        return Response(png_bytes(img), media_type="image/png",
                        headers={"x-clip-start": f"{t0:.3f}", "x-clip-seconds": f"{len(x) / sr:.3f}"})

    async def read_json(request):
        """The posted JSON object, or an error response (RFC 9110 status codes)."""
        if request.headers.get("content-type", "").split(";")[0].strip().lower() != "application/json":
            return None, problem(415, "send application/json")
        length = request.headers.get("content-length")
        if length is not None and (not length.isdigit() or int(length) > MAX_POST_BYTES):
            return None, problem(413, f"a request body may hold at most {MAX_POST_BYTES} bytes")
        body = b""
        try:
            async for piece in request.stream():  # also bounds bodies sent without a length
                body += piece
                if len(body) > MAX_POST_BYTES:
                    return None, problem(413, f"a request body may hold at most {MAX_POST_BYTES} bytes")
        except ClientDisconnect:
            return None, problem(400, "the request was cut off")
        try:
            data = json.loads(body.decode("utf-8"))
        except (UnicodeDecodeError, ValueError):
            return None, problem(400, "the body is not JSON")
        if not isinstance(data, dict):
            return None, problem(400, "the body must be a JSON object")
        return data, None

    async def mark(request):
        n = hit_number(request)
        if n is None:
            return problem(404, "no such hit in the sample")
        data, err = await read_json(request)
        if err is not None:
            return err
        unknown = set(data) - {"verdict", "note"}
        if unknown or not data:
            return problem(422, "send verdict and/or note, nothing else")
        try:
            verdict = parse_posted_verdict(data["verdict"]) if "verdict" in data else "keep"
            note = parse_note(data["note"]) if "note" in data else None
        except ValueError as e:
            return problem(422, str(e))
        with s.lock:
            try:
                s.sample.set(n, verdict, note)
            except FileChanged as e:
                return problem(409, str(e))
            except OSError as e:
                return problem(500, f"cannot write {s.sample.path.name}: {e.strerror}")
            return JSONResponse({"ok": True, "progress": _progress(s)})

    async def reload(request):
        data, err = await read_json(request)
        if err is not None:
            return err
        with s.lock:
            try:
                s.sample.load()
            except TrawlError as e:
                return problem(422, str(e))
            return JSONResponse({"ok": True})

    routes = [
        Route(prefix, to_page),
        Route(prefix + "/", page),
        Route(prefix + "/static/{name}", static),
        Route(prefix + "/api/state", state),
        Route(prefix + "/api/changed", changed),
        Route(prefix + "/api/hits/{n:int}/audio", audio),
        Route(prefix + "/api/hits/{n:int}/picture", picture),
        Route(prefix + "/api/hits/{n:int}", mark, methods=["POST"]),
        Route(prefix + "/api/reload", reload, methods=["POST"]),
    ]
    inner = Starlette(routes=routes)

    async def app(scope, receive, send):
        """Refuse (403) any request whose path does not start with the secret; then add the security headers."""
        if scope["type"] == "http":
            path = scope.get("path", "")
            head = path[1:].split("/", 1)[0] if path.startswith("/") else ""
            if not secrets.compare_digest(head.encode(), s.secret.encode()):
                await PlainTextResponse("forbidden: this address lacks the page's secret", status_code=403)(
                    scope, receive, send)
                return

            async def send_with_headers(message):
                if message["type"] == "http.response.start":
                    names = {k.lower() for k, _ in message.get("headers", [])}
                    extra = [(k.encode(), v.encode()) for k, v in SECURITY_HEADERS.items() if k.encode() not in names]
                    message = dict(message, headers=list(message.get("headers", [])) + extra)
                await send(message)

            await inner(scope, receive, send_with_headers)
            return
        await inner(scope, receive, send)

    return app


def bind(port: int) -> socket.socket:
    """A listening TCP socket on 127.0.0.1 (loopback only) at `port` (0: any free port)."""
    if not 0 <= port <= 65535:
        raise TrawlError(f"--port must be between 0 and 65535, not {port}")
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind(("127.0.0.1", port))
    except OSError as e:
        sock.close()
        raise TrawlError(f"cannot listen on 127.0.0.1:{port} ({e.strerror}); choose another --port") from None
    sock.listen(64)
    return sock


def address(s: Session, sock: socket.socket) -> str:
    host, port = sock.getsockname()[:2]
    return f"http://{host}:{port}/{s.secret}/"


def make_server(s: Session, sock: socket.socket):
    try:
        import uvicorn
    except ImportError:
        raise TrawlError(INSTALL_HINT) from None
    config = uvicorn.Config(make_app(s), log_level="warning", access_log=False, lifespan="off",
                            proxy_headers=False, server_header=False)
    return uvicorn.Server(config)


def serve(s: Session, sock: socket.socket) -> None:
    """Serve until Ctrl-C (SIGINT) or SIGTERM; returns normally then."""
    server = make_server(s, sock)
    try:
        server.run(sockets=[sock])
    except KeyboardInterrupt:  # uvicorn re-raises the signal it caught, after shutting down cleanly
        pass
    finally:
        sock.close()


def open_session(sample: Path, index_dir: Path, archive: Path | None = None) -> Session:
    """A Session for `sample` over the index at `index_dir` (TrawlError for a bad file or index)."""
    from .checking import searched_form
    from .index_store import Index

    idx = Index.open(index_dir)
    try:
        root = Path(archive) if archive else Path(idx.manifest.get("archive") or "")
        if not str(root) or not root.is_dir():
            raise TrawlError(f"the archive folder {root} is not there; give it with --archive DIR")
        known = {b["path"] for b in idx.broadcasts()}
        checkfile = CheckFile(sample)
        missing = sorted({r.broadcast for r in checkfile.rows} - known)
        if missing:
            more = f" (and {len(missing) - 1} more)" if len(missing) > 1 else ""
            raise TrawlError(f"{sample}: the broadcast {missing[0]}{more} is not in the index {index_dir}")
        searched = {t: searched_form(idx, t) for t in {r.term for r in checkfile.rows}}
    finally:
        idx.close()
    return Session(checkfile, root, known, searched)
