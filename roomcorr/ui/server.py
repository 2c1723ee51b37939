"""The browser app's server: Starlette routes on uvicorn, bound to the loopback address.

Security model (every rule has a test in ``tests/test_ui_server.py``):

* The socket is bound to 127.0.0.1 only.
* Every request, the page and its static files included, must carry the
  session token: as the ``token`` query parameter (the address printed at
  start), the ``x-roomcorr-token`` header (the page's own requests) or the
  cookie the page receives with the first valid request.
* The ``Host`` header must name the loopback address and the server's port,
  and an ``Origin`` header, when present, must be that same origin: a page on
  another site that resolves its name to 127.0.0.1 (DNS rebinding) is refused.
* Only files inside the room folder can be read, by run id and a path
  relative to the run (see :mod:`roomcorr.app.explore`); ``measurements/``,
  ``designs/`` and ``targets/`` must be plain folders inside the room
  (:func:`roomcorr.rooms.room_folder`, the rule the command line keeps).
* Request bodies are limited to :data:`MAX_BODY_BYTES` (413 before they are read)
  and parsed with the depth and number limits of :func:`roomcorr.checked.loads_json`;
  a malformed name or body is a 400, never a 500.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import secrets
import socket
import tempfile
import threading
import time
import webbrowser
from collections.abc import Awaitable, Callable, Iterator, MutableMapping
from http.cookies import SimpleCookie
from importlib import resources
from pathlib import Path
from typing import Any
from urllib.parse import parse_qs

import uvicorn
from starlette.applications import Starlette
from starlette.concurrency import run_in_threadpool
from starlette.requests import Request
from starlette.responses import FileResponse, JSONResponse, Response
from starlette.routing import Route, WebSocketRoute
from starlette.websockets import WebSocket, WebSocketDisconnect

from roomcorr import app as service
from roomcorr import rooms
from roomcorr.app import measure as measuring
from roomcorr.app import playback as playback_app
from roomcorr.app.design import DesignPreview
from roomcorr.app.history import set_run_label
from roomcorr.app.imports import MAX_IMPORT_BYTES, import_candidates, import_from_app
from roomcorr.app.plan import plan_view, save_plan
from roomcorr.app.report import report_in_room
from roomcorr.checked import loads_json
from roomcorr.errors import BadNameError, RoomBusyError, RoomcorrError
from roomcorr.settings import find_preset, preset_names, read_toml

TOKEN_HEADER = "x-roomcorr-token"
TOKEN_COOKIE = "roomcorr_token"
LOOPBACK = "127.0.0.1"

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
ASGIApp = Callable[
    [Scope, Callable[[], Awaitable[Message]], Callable[[Message], Awaitable[None]]], Awaitable[None]
]

_STATIC_TYPES = {
    ".html": "text/html",
    ".js": "text/javascript",
    ".css": "text/css",
    ".txt": "text/plain",
}


def static_dir() -> Path:
    """Folder of the page's files (HTML, JS, CSS and the plotting library with its licence)."""
    return Path(str(resources.files("roomcorr.ui") / "static"))


class Guard:
    """ASGI middleware enforcing the token, the Host and the Origin rules.

    Parameters
    ----------
    app : ASGI application
    token : str
        The session token.
    port : int
        The port the server listens on (part of the allowed Host and Origin).
    """

    def __init__(self, app: ASGIApp, token: str, port: int) -> None:
        self.app = app
        self.token = token
        self.hosts = {f"{LOOPBACK}:{port}", f"localhost:{port}"}
        self.origins = {f"http://{h}" for h in self.hosts}

    def _allowed(self, scope: Scope) -> str | None:
        headers = {k.decode("latin-1").lower(): v.decode("latin-1") for k, v in scope["headers"]}
        if headers.get("host", "") not in self.hosts:
            return "host not allowed"
        origin = headers.get("origin")
        if origin is not None and origin not in self.origins:
            return "origin not allowed"
        candidates = [headers.get(TOKEN_HEADER, "")]
        query = parse_qs(scope.get("query_string", b"").decode("latin-1"))
        candidates += query.get("token", [])
        if "cookie" in headers:
            jar: SimpleCookie = SimpleCookie()
            try:
                jar.load(headers["cookie"])
            except Exception:  # noqa: BLE001 - a malformed cookie is simply no token
                jar = SimpleCookie()
            if TOKEN_COOKIE in jar:
                candidates.append(jar[TOKEN_COOKIE].value)
        if not any(c and secrets.compare_digest(c, self.token) for c in candidates):
            return "token missing or wrong"
        return None

    async def __call__(self, scope: Scope, receive: Any, send: Any) -> None:
        if scope["type"] not in ("http", "websocket"):
            await self.app(scope, receive, send)
            return
        reason = self._allowed(scope)
        if reason is None:
            await self.app(scope, receive, send)
            return
        if scope["type"] == "websocket":
            await send({"type": "websocket.close", "code": 1008})
            return
        await JSONResponse({"error": f"refused: {reason}"}, status_code=403)(scope, receive, send)


def _error(exc: Exception, status: int = 400) -> JSONResponse:
    return JSONResponse({"error": " ".join(str(exc).split())}, status_code=status)


def _status(exc: RoomcorrError, missing: int = 404) -> int:
    """The HTTP status of a refusal: 409 for a busy room, 400 for a malformed name or
    request, ``missing`` (404) for a run or file that is not there, else 400."""
    if isinstance(exc, RoomBusyError):
        return 409
    if isinstance(exc, BadNameError):
        return 400
    text = str(exc)
    return missing if "no such" in text or "not a" in text else 400


#: Largest request body the app reads (its requests are small JSON edits, a few kB). A
#: larger body is answered 413 before it is read: by its Content-Length when it has one,
#: else as soon as the bytes received pass the limit (RFC 9110, section 15.5.14).
MAX_BODY_BYTES = 1 << 20


class BodyLimit:
    """ASGI middleware: read a request's body up to :data:`MAX_BODY_BYTES`, answer 413
    beyond it, and hand the body to the app only when it is complete and small.

    The server's memory then stays bounded whatever a client sends: an oversized body
    is never collected (uvicorn stops reading the socket while nobody reads the body).
    """

    def __init__(
        self,
        app: ASGIApp,
        limit: int = MAX_BODY_BYTES,
        per_path: dict[str, int] | None = None,
    ) -> None:
        self.app = app
        self.limit = limit
        #: Routes that take larger bodies (impulse responses brought in), each with its own
        #: bound; they read the body themselves, as a stream, within it.
        self.per_path = dict(per_path or {})

    async def _refuse(self, scope: Scope, receive: Any, send: Any, status: int, text: str) -> None:
        response = JSONResponse(
            {"error": text}, status_code=status, headers={"connection": "close"}
        )
        await response(scope, receive, send)

    async def __call__(self, scope: Scope, receive: Any, send: Any) -> None:
        if scope["type"] != "http" or scope.get("path") in self.per_path:
            await self.app(scope, receive, send)
            return
        length = dict(scope["headers"]).get(b"content-length")
        if length is not None:
            if not length.isdigit() or len(length) > 15:
                await self._refuse(scope, receive, send, 400, "request: bad Content-Length")
                return
            if int(length) > self.limit:
                await self._refuse(
                    scope, receive, send, 413, f"request: larger than {self.limit} bytes"
                )
                return
        chunks: list[bytes] = []
        size = 0
        while True:
            message = await receive()
            if message["type"] == "http.disconnect":
                return
            body = message.get("body", b"")
            size += len(body)
            if size > self.limit:
                await self._refuse(
                    scope, receive, send, 413, f"request: larger than {self.limit} bytes"
                )
                return
            chunks.append(body)
            if not message.get("more_body", False):
                break
        whole = b"".join(chunks)
        replayed = False

        async def replay() -> Message:
            nonlocal replayed
            if not replayed:
                replayed = True
                return {"type": "http.request", "body": whole, "more_body": False}
            return await receive()  # a disconnect, for responses that listen for one

        await self.app(scope, replay, send)


class Live:
    """The live channel: every connected page gets each event (design started, done...)."""

    def __init__(self) -> None:
        self.sockets: set[WebSocket] = set()
        # per page: its event loop and a queue drained in order (events from threads)
        self.queues: dict[WebSocket, tuple[asyncio.AbstractEventLoop, asyncio.Queue]] = {}

    def publish_threadsafe(self, event: dict[str, Any]) -> None:
        """Send ``event`` to every page from any thread (a measurement's worker), in order."""
        for loop, q in list(self.queues.values()):
            with contextlib.suppress(RuntimeError):  # that page's loop has ended
                loop.call_soon_threadsafe(q.put_nowait, event)

    async def _drain(self, ws: WebSocket, q: asyncio.Queue) -> None:
        while True:
            event = await q.get()
            try:
                await ws.send_json(event)
            except Exception:  # noqa: BLE001 - a page that went away
                return

    async def publish(self, event: dict[str, Any]) -> None:
        for ws in list(self.sockets):
            try:
                await ws.send_json(event)
            except Exception:  # noqa: BLE001 - a page that went away
                self.sockets.discard(ws)

    async def endpoint(self, ws: WebSocket) -> None:
        await ws.accept()
        self.sockets.add(ws)
        await ws.send_json({"type": "hello"})
        q: asyncio.Queue = asyncio.Queue()
        self.queues[ws] = (asyncio.get_running_loop(), q)
        drain = asyncio.create_task(self._drain(ws, q))
        try:
            while True:
                await ws.receive_text()  # the page sends nothing; this waits for it to leave
        except WebSocketDisconnect:
            pass
        finally:
            self.sockets.discard(ws)
            self.queues.pop(ws, None)
            drain.cancel()


def target_presets() -> list[dict[str, Any]]:
    """The bundled target presets with their ``[target]`` tables (for the app's editor)."""
    out = []
    for name in preset_names():
        path = find_preset(name)
        table = read_toml(path).get("target") if path is not None else None
        if isinstance(table, dict):
            out.append({"name": name, "table": table})
    return out


class _TooLarge(RoomcorrError):
    """A request body above its limit (answered 413)."""


def create_app(room: rooms.Room, token: str, port: int) -> ASGIApp:
    """The app for one room folder, guarded by :class:`Guard`.

    Parameters
    ----------
    room : roomcorr.rooms.Room
    token : str
    port : int
        Port the server is bound to.
    """

    def api(func: Callable[..., Any]) -> Callable[[Request], Awaitable[Response]]:
        async def endpoint(request: Request) -> Response:
            try:
                data = await run_in_threadpool(func, **request.path_params)
            except RoomcorrError as exc:
                return _error(exc, _status(exc))
            return Response(json.dumps(data, allow_nan=False), media_type="application/json")

        return endpoint

    async def index(request: Request) -> Response:
        resp = FileResponse(static_dir() / "index.html", media_type="text/html")
        resp.set_cookie(TOKEN_COOKIE, token, httponly=True, samesite="strict")
        resp.headers["cache-control"] = "no-store"
        return resp

    async def static(request: Request) -> Response:
        name = request.path_params["name"]
        files = {p.name: p for p in static_dir().iterdir() if p.is_file()}
        if name not in files:
            return JSONResponse({"error": f"{name}: no such file"}, status_code=404)
        path = files[name]
        return FileResponse(
            path, media_type=_STATIC_TYPES.get(path.suffix, "application/octet-stream")
        )

    live = Live()
    previews: dict[str, DesignPreview] = {}

    def preview_for(measurement: Any) -> DesignPreview:
        if measurement is not None and not isinstance(measurement, str):
            raise BadNameError("measurement: expected a run id")
        key = measurement or ""
        if key not in previews:
            previews.clear()  # one measurement at a time: the analysis is large
            previews[key] = DesignPreview(room, measurement or None)
        return previews[key]

    async def body(request: Request) -> dict[str, Any]:
        # size-limited by BodyLimit; depth, integer and NaN limits as for files
        # NaN and Infinity are read, then refused by the check of their key (named)
        data = loads_json(await request.body(), "request", BadNameError, constants=True)
        if not isinstance(data, dict):
            raise RoomcorrError("request: expected a JSON object")
        return data

    async def preview(request: Request) -> Response:
        try:
            edit = await body(request)
            prev = await run_in_threadpool(preview_for, edit.get("measurement"))
            data = await run_in_threadpool(prev.update, edit)
        except RoomcorrError as exc:
            return _error(exc)
        return Response(json.dumps(data, allow_nan=False), media_type="application/json")

    measurer = MeasureRoutes(room, live, body)

    async def save(request: Request) -> Response:
        if measurer.busy():
            return _error(RoomcorrError("a measurement is running; save when it has finished"), 409)
        try:
            edit = await body(request)
            prev = await run_in_threadpool(preview_for, edit.get("measurement"))
            await live.publish({"type": "design", "state": "started"})
            run_dir, entries = await run_in_threadpool(prev.save, edit, str(edit.get("name", "")))
        except RoomcorrError as exc:
            await live.publish({"type": "design", "state": "failed", "error": str(exc)})
            return _error(exc, 409 if isinstance(exc, RoomBusyError) else 400)
        await live.publish({"type": "design", "state": "finished", "run_id": run_dir.name})
        return JSONResponse({"run_id": run_dir.name, "files": len(entries)})

    async def run_file(request: Request) -> Response:
        p = request.path_params
        try:
            path = await run_in_threadpool(
                service.run_file, room, p["kind"], p["run_id"], p["path"]
            )
        except RoomcorrError as exc:
            return _error(exc, _status(exc))
        return FileResponse(path, filename=path.name)

    async def design_zip(request: Request) -> Response:
        try:
            name, data = await run_in_threadpool(
                playback_app.design_zip, room, request.path_params["run_id"]
            )
        except RoomcorrError as exc:
            return _error(exc, 404)
        disposition = f'attachment; filename="{name}"'
        return Response(
            data, media_type="application/zip", headers={"content-disposition": disposition}
        )

    listener = playback_app.ListenSession(room)

    async def listen(request: Request) -> Response:
        action = request.path_params["action"]
        try:
            if action == "music":
                data: Any = await run_in_threadpool(playback_app.listen_music, room)
            elif action == "state":
                data = listener.state()
            elif request.method != "POST":
                return _error(RoomcorrError(f"listen/{action}: use POST"), 405)
            elif action == "start":
                if measurer.busy():
                    raise RoomBusyError("a measurement is running; listen when it has finished")
                req = await body(request)
                run_id, music = req.get("run_id"), req.get("music")
                if not isinstance(run_id, str) or not isinstance(music, str):
                    raise RoomcorrError('listen: send {"run_id": ..., "music": ...} as text')
                device = req.get("device")
                if device is not None and not isinstance(device, str | int):
                    raise RoomcorrError("listen: device must be a name or a number")
                data = await run_in_threadpool(listener.start, run_id, music, device)
            elif action == "switch":
                data = listener.switch()
            elif action == "level":
                data = listener.level((await body(request)).get("delta_db"))
            elif action == "stop":
                data = await run_in_threadpool(listener.stop)
            else:
                return _error(RoomcorrError(f"listen/{action}: no such action"), 404)
        except RoomcorrError as exc:
            busy = isinstance(exc, RoomBusyError)
            missing = "no such" in str(exc) or "not a" in str(exc)
            return _error(exc, 409 if busy else 404 if missing else 400)
        return Response(json.dumps(data, allow_nan=False), media_type="application/json")

    async def report(request: Request) -> Response:
        if measurer.busy():
            return _error(RoomcorrError("a measurement is running; write the report later"), 409)
        p = request.path_params
        try:
            data = await run_in_threadpool(report_in_room, room, p["kind"], p["run_id"])
        except RoomcorrError as exc:
            return _error(exc, _status(exc))
        return JSONResponse(data)

    async def label(request: Request) -> Response:
        p = request.path_params
        try:
            data = await body(request)
            stored = await run_in_threadpool(
                set_run_label, room, p["kind"], p["run_id"], data.get("name"), data.get("note")
            )
        except RoomcorrError as exc:
            busy, missing = isinstance(exc, RoomBusyError), "not a run" in str(exc)
            return _error(exc, 409 if busy else 404 if missing else 400)
        return JSONResponse({"kind": p["kind"], "run_id": p["run_id"], "label": stored})

    async def decay(request: Request) -> Response:
        p, q = request.path_params, request.query_params
        try:
            numbers: dict[str, int | None] = {"channel": None}
            for key, default in (("bands", "1"), ("position", "0"), ("channel", None)):
                text = q.get(key, default)
                if text is None:
                    continue
                if not text.isdigit() or len(text) > 3:
                    raise RoomcorrError(f"{key}={text!r}: expected a small whole number")
                numbers[key] = int(text)
            data = await run_in_threadpool(
                service.decay_view,
                room,
                p["kind"],
                p["run_id"],
                numbers["bands"],
                numbers["position"],
                numbers["channel"],
            )
        except RoomcorrError as exc:
            return _error(exc, _status(exc))
        return Response(json.dumps(data, allow_nan=False), media_type="application/json")

    async def bounded_body(request: Request, limit: int) -> dict[str, Any]:
        """The JSON body, read at most ``limit`` bytes (413 beyond)."""
        declared = request.headers.get("content-length", "")
        if declared.isdigit() and int(declared) > limit:
            raise _TooLarge(f"request: larger than {limit // (1024 * 1024)} MB; import fewer files")
        chunks, size = [], 0
        async for chunk in request.stream():
            size += len(chunk)
            if size > limit:
                raise _TooLarge(f"request: larger than {limit // (1024 * 1024)} MB")
            chunks.append(chunk)
        # depth, integer and NaN limits as for every other body and file
        data = loads_json(b"".join(chunks), "request", BadNameError, constants=True)
        if not isinstance(data, dict):
            raise RoomcorrError("request: expected a JSON object")
        return data

    async def import_files(request: Request) -> Response:
        if measurer.busy():
            return _error(
                RoomcorrError("a measurement is running; import when it has finished"), 409
            )
        try:
            data = await bounded_body(request, MAX_IMPORT_BYTES)
            with tempfile.TemporaryDirectory(prefix="roomcorr-import-") as work:
                res = await run_in_threadpool(import_from_app, room, data, Path(work))
        except _TooLarge as exc:
            return _error(exc, 413)
        except RoomcorrError as exc:
            return _error(exc, 409 if isinstance(exc, RoomBusyError) else 400)
        await live.publish({"type": "import", "state": "finished", "run_id": res["run_id"]})
        return JSONResponse(res)

    async def plan(request: Request) -> Response:
        """The plan view: GET the layout and advice; POST a layout to save (as layout set)."""
        try:
            if request.method == "GET":
                data = await run_in_threadpool(plan_view, room)
            else:
                if measurer.busy():
                    raise RoomBusyError(
                        "a measurement is running; save the plan when it has finished"
                    )
                data = await run_in_threadpool(save_plan, room, await body(request))
                await live.publish({"type": "layout", "state": "saved"})
        except RoomcorrError as exc:
            return _error(exc, 409 if isinstance(exc, RoomBusyError) else 400)
        return Response(json.dumps(data, allow_nan=False), media_type="application/json")

    routes = [
        Route("/", index),
        Route("/api/plan", plan, methods=["GET", "POST"]),
        Route("/api/import", import_files, methods=["POST"]),
        Route("/api/import/candidates", api(lambda: import_candidates(room))),
        Route("/api/decay/{kind}/{run_id}", decay),
        Route("/static/{name}", static),
        Route("/api/room", api(lambda: service.room_overview(room))),
        Route("/api/design/{run_id}", api(lambda run_id: service.design_view(room, run_id))),
        Route(
            "/api/measurement/{run_id}",
            api(lambda run_id: service.measurement_view(room, run_id)),
        ),
        Route("/api/files/{run_id}", api(lambda run_id: service.run_files(room, run_id))),
        Route(
            "/api/compare/{before}/{after}",
            api(lambda before, after: service.compare_view(room, before, after)),
        ),
        Route("/api/file/{kind}/{run_id}/{path:path}", run_file),
        Route(
            "/api/loading/{run_id}",
            api(lambda run_id: playback_app.design_loading(room, run_id)),
        ),
        Route("/api/zip/{run_id}", design_zip),
        Route("/api/listen/{action}", listen, methods=["GET", "POST"]),
        Route("/api/presets", api(target_presets)),
        Route("/api/preview", preview, methods=["POST"]),
        Route("/api/save", save, methods=["POST"]),
        Route("/api/report/{kind}/{run_id}", report, methods=["POST"]),
        Route("/api/label/{kind}/{run_id}", label, methods=["POST"]),
        WebSocketRoute("/api/live", live.endpoint),
        *measurer.routes(),
    ]
    return Guard(
        BodyLimit(Starlette(routes=routes), per_path={"/api/import": MAX_IMPORT_BYTES}),
        token,
        port,
    )


class MeasureRoutes:
    """The Measure page's routes: devices, cautions, test tone, start, answer, stop, state.

    Sound is refused until the room's cautions are acknowledged; one measurement
    (or test tone) at a time; live meter, progress and prompts go out on the
    live channel as events of :mod:`roomcorr.app.measure`. Settings are only the
    keys of :data:`roomcorr.app.measure.APP_MEASURE_KEYS`, checked like a
    settings file (the level cap and ``allow_loud`` included).
    """

    def __init__(
        self,
        room: rooms.Room,
        live: Live,
        body: Callable[[Request], Awaitable[dict[str, Any]]],
    ) -> None:
        self.room = room
        self.live = live
        self.body = body
        self.job: measuring.MeasureJob | None = None
        self.tone_stop = threading.Event()
        self.tone_lock = threading.Lock()

    def busy(self) -> bool:
        return (self.job is not None and self.job.running()) or self.tone_lock.locked()

    def _sender(self) -> Callable[[dict[str, Any]], None]:
        return self.live.publish_threadsafe

    @staticmethod
    def _json(data: Any, status: int = 200) -> Response:
        return Response(
            json.dumps(data, allow_nan=False), status_code=status, media_type="application/json"
        )

    async def devices(self, request: Request) -> Response:
        try:
            data = await run_in_threadpool(measuring.devices_view, self.room)
        except RoomcorrError as exc:  # no device: the page says what to do, and still works
            data = {"devices": [], "last": {}, "problem": " ".join(str(exc).split())}
        return self._json(data)

    async def cautions(self, request: Request) -> Response:
        return self._json(await run_in_threadpool(measuring.cautions_view, self.room))

    async def acknowledge(self, request: Request) -> Response:
        try:
            data = await self.body(request)
            if data.get("acknowledged") is not True:
                raise RoomcorrError('acknowledge: send {"acknowledged": true} after reading')
            view = await run_in_threadpool(measuring.acknowledge_cautions, self.room)
        except RoomcorrError as exc:
            return _error(exc, 409 if isinstance(exc, RoomBusyError) else 400)
        await self.live.publish({"type": "cautions", "acknowledged": True})
        return self._json(view)

    async def _settings(self, data: dict[str, Any]) -> Any:
        changes = data.get("settings") or {}
        if not isinstance(changes, dict):
            raise RoomcorrError("settings: expected a JSON object")
        return await run_in_threadpool(measuring.settings_for_room, self.room, changes)

    async def tone(self, request: Request) -> Response:
        try:
            data = await self.body(request)
            measuring.require_acknowledged(self.room)
            if self.busy():
                return _error(RoomcorrError("a measurement or tone is playing; wait or stop"), 409)
            ms = await self._settings(data)
            output = data.get("output")
            if not isinstance(output, int) or isinstance(output, bool):
                raise RoomcorrError("tone: give the loudspeaker's output channel number")
            send = self._sender()

            def meter(fraction: float, peak: float, rms: float) -> None:
                send(
                    {
                        "type": "meter",
                        "label": f"test tone, output {output}",
                        "fraction": round(fraction, 4),
                        "peak_dbfs": round(peak, 2),
                        "rms_dbfs": round(rms, 2),
                    }
                )

            def play() -> dict[str, Any]:
                if not self.tone_lock.acquire(blocking=False):
                    raise RoomcorrError("a tone is playing already")
                try:
                    self.tone_stop.clear()
                    return measuring.play_test_tone(ms, output, stop=self.tone_stop, meter=meter)
                finally:
                    self.tone_lock.release()

            res = await run_in_threadpool(play)
        except measuring.capture.Stopped:
            return self._json({"stopped": True})
        except RoomcorrError as exc:
            return _error(exc)
        await self.live.publish({"type": "tone", **res})
        return self._json(res)

    async def start(self, request: Request) -> Response:
        try:
            data = await self.body(request)
            if self.busy():
                return _error(RoomcorrError("a measurement is running already"), 409)
            measuring.require_acknowledged(self.room)
            ms = await self._settings(data)
            if rooms.is_locked(self.room):
                return _error(
                    RoomBusyError(f"{self.room.root}: in use by another roomcorr command"), 409
                )
            job = measuring.MeasureJob(
                self.room, ms, self._sender(), resume=data.get("resume") is True
            )
            job.start()
        except RoomcorrError as exc:
            return _error(exc)
        self.job = job
        return self._json(
            {"state": "running", "positions": ms.positions, "outputs": list(ms.outputs)}
        )

    async def answer(self, request: Request) -> Response:
        try:
            data = await self.body(request)
            if self.job is None:
                raise RoomcorrError("no measurement is running")
            self.job.answer(str(data.get("answer", "")))
        except RoomcorrError as exc:
            return _error(exc, 409 if "no measurement" in str(exc) else 400)
        return self._json({"answered": data["answer"]})

    async def stop(self, request: Request) -> Response:
        self.tone_stop.set()
        running = self.job is not None and self.job.running()
        if self.job is not None:
            self.job.stop()
        return self._json({"stopping": running})

    async def state(self, request: Request) -> Response:
        job = self.job
        return self._json(
            {
                "state": "idle" if job is None else job.state,
                "prompt": None if job is None else job.prompt,
                "result": None if job is None else job.result,
                "resumable": measuring.unfinished_measurement(self.room) is not None,
            }
        )

    def routes(self) -> list[Route]:
        return [
            Route("/api/measure/devices", self.devices),
            Route("/api/measure/cautions", self.cautions),
            Route("/api/measure/acknowledge", self.acknowledge, methods=["POST"]),
            Route("/api/measure/tone", self.tone, methods=["POST"]),
            Route("/api/measure/start", self.start, methods=["POST"]),
            Route("/api/measure/answer", self.answer, methods=["POST"]),
            Route("/api/measure/stop", self.stop, methods=["POST"]),
            Route("/api/measure/state", self.state),
        ]


def bind_loopback(port: int = 0) -> socket.socket:
    """A listening TCP socket on 127.0.0.1 (``port=0``: a free port chosen by the system)."""
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.bind((LOOPBACK, port))
    sock.listen(64)
    return sock


@contextlib.contextmanager
def background_server(room: rooms.Room, token: str) -> Iterator[str]:
    """Run the app for ``room`` in a thread (tests, benchmarks); yields its base address.

    The server is stopped and its socket closed when the block ends.
    """
    sock = bind_loopback(0)
    port = sock.getsockname()[1]
    config = uvicorn.Config(create_app(room, token, port), log_level="warning", lifespan="off")
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    try:
        while not server.started and thread.is_alive():
            time.sleep(0.02)
        yield f"http://{LOOPBACK}:{port}"
    finally:
        measuring.stop_all()
        server.should_exit = True
        thread.join(timeout=10)
        sock.close()


def serve(
    room: rooms.Room, port: int = 0, open_browser: bool = True, log: Callable[[str], None] = print
) -> None:
    """Run the app for ``room`` until Ctrl-C.

    Prints the address with the session token; opens it in the browser unless
    ``open_browser`` is false.
    """
    sock = bind_loopback(port)
    real_port = sock.getsockname()[1]
    token = secrets.token_urlsafe(24)
    app = create_app(room, token, real_port)
    url = f"http://{LOOPBACK}:{real_port}/?token={token}"
    log(f"roomcorr app for {room.root} at {url}")
    log("Only this machine can reach it; the address holds a one-time key. Ctrl-C stops it.")
    config = uvicorn.Config(app, log_level="warning", lifespan="off")
    server = uvicorn.Server(config)
    if open_browser:
        webbrowser.open(url)
    try:
        server.run(sockets=[sock])
    finally:
        measuring.stop_all()  # Ctrl-C while sweeping: silence first, then leave
        sock.close()
