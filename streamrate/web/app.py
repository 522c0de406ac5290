"""The HTTP side: routes, the Server-Sent Events stream, the snapshot, access control.

Routes (all ``GET``; nothing here can change the model)::

    /overlay          the broadcast overlay page (configured by its query string)
    /board            the analysts' live board
    /static/...       the pages' CSS and scripts (shipped in the package)
    /api/watch        SSE: ?p=first,ids:second,ids (repeatable) &ctx=name=value
                      (repeatable) &history=1; resumes from Last-Event-ID
    /api/snapshot     JSON: the current probability of the same pairings
    /api/quality      JSON: the quality panel (from the service's metrics page)
    /api/config       JSON: space, heartbeat, pinned pairings, caps, feed status

A pairing's value is sent at once on connect (``event: p``, ``id:`` the model
version), then on every change; ``event: beat`` every ``heartbeat_s`` and at each
change of the feed's status keeps proxies from closing the connection and lets
a page show a stale state.
"""

from __future__ import annotations

import asyncio
import contextlib
import hmac
import json
import re
import time
from collections.abc import AsyncIterator, Awaitable, Callable, MutableMapping
from contextlib import asynccontextmanager
from importlib import resources
from typing import Any

from starlette.applications import Starlette
from starlette.middleware import Middleware
from starlette.middleware.cors import CORSMiddleware
from starlette.requests import Request
from starlette.responses import FileResponse, JSONResponse, RedirectResponse, Response
from starlette.routing import Mount, Route
from starlette.staticfiles import StaticFiles

from streamrate.client import parse_context
from streamrate.config import SpaceKeys, WebSettings
from streamrate.events import Matchup
from streamrate.web.feed import Feed, FeedDown, pairing_body
from streamrate.web.hub import Hub, HubFull, PairKey, Subscriber, pairing_key
from streamrate.web.quality import QualityPoller

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
ASGIApp = Callable[[Scope, Receive, Send], Awaitable[None]]

RETRY_MS = 1500  # how soon a browser reconnects after the stream ends
_VERSION = re.compile(r"^\d{1,20}-\d{1,20}$")
STATIC = resources.files("streamrate.web") / "static"


def parse_pairing(text: str, context: dict[str, Any]) -> PairKey:
    """``"kelvash,tuvrenn:morvenn,oskuvar"`` in ``context`` -> a validated pairing key."""
    a, sep, b = text.partition(":")
    if not sep:
        raise ValueError(f"pairing {text!r}: write first,ids:second,ids")
    first, second = [x for x in a.split(",") if x], [x for x in b.split(",") if x]
    try:
        Matchup(first=first, second=second, context=context)
    except ValueError as exc:
        raise ValueError(f"pairing {text!r}: {exc}".splitlines()[0]) from exc
    return pairing_key(first, second, context)


def pairings_of(request: Request, limit: int) -> list[PairKey]:
    """The pairings named by ``p`` (repeatable) in the context named by ``ctx``."""
    texts = request.query_params.getlist("p")
    if not texts:
        raise ValueError("name at least one pairing: ?p=first,ids:second,ids")
    if len(texts) > limit:
        raise ValueError(f"{len(texts)} pairings; at most {limit} per client")
    ctx = parse_context(request.query_params.getlist("ctx"))
    return [parse_pairing(t, ctx) for t in texts]


class Web:
    """What the routes share: settings, hub, feed, quality poller."""

    def __init__(
        self,
        settings: WebSettings,
        keys: SpaceKeys,
        space: str,
        redis_url: str,
        pinned: list[PairKey],
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.settings, self.space, self.clock = settings, space, clock
        self.hub = Hub(
            settings.max_clients,
            settings.max_pairings,
            settings.max_pairings_per_client,
            settings.history_per_pairing,
            settings.client_queue,
        )
        self.pinned = pinned
        self.hub.pin(pinned)
        self.feed = Feed(settings, keys, self.hub, redis_url, self._status_changed, clock)
        self.quality = QualityPoller(
            settings.metrics_url, space, settings.quality_every_s, settings.quality_history
        )

    def beat(self) -> bytes:
        data = {
            "feed": self.feed.status,
            "detail": self.feed.detail,
            "version": self.hub.version,
            "t_ms": int(time.time() * 1000),
        }
        return f"event: beat\ndata: {json.dumps(data)}\n\n".encode()

    def _status_changed(self, status: str, detail: str) -> None:
        self.hub.broadcast(self.beat())

    @asynccontextmanager
    async def lifespan(self, app: Starlette) -> AsyncIterator[None]:
        stop = asyncio.Event()
        tasks = [
            asyncio.create_task(self.feed.listen(stop)),
            asyncio.create_task(self.feed.probe(stop)),
            asyncio.create_task(self.quality.run(stop)),
        ]
        try:
            yield
        finally:
            stop.set()
            await self.feed.close()
            for t in tasks:
                t.cancel()
            await asyncio.gather(*tasks, return_exceptions=True)


class WatchStream:
    """``/api/watch``: one SSE connection (a raw ASGI app, to bound each write)."""

    def __init__(self, web: Web) -> None:
        self.web = web

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        web = self.web
        request = Request(scope, receive)
        try:
            keys = pairings_of(request, web.settings.max_pairings_per_client)
            sub = web.hub.attach(keys)
        except ValueError as exc:
            await JSONResponse({"error": str(exc)}, 400)(scope, receive, send)
            return
        except HubFull as exc:
            await JSONResponse({"error": str(exc)}, 503)(scope, receive, send)
            return
        last = request.headers.get("last-event-id") or request.query_params.get("last_id")
        since = last if last and _VERSION.match(last) else None
        history = request.query_params.get("history") == "1"
        try:
            await send(
                {
                    "type": "http.response.start",
                    "status": 200,
                    "headers": [
                        (b"content-type", b"text/event-stream; charset=utf-8"),
                        (b"cache-control", b"no-cache, no-store"),
                        (b"x-accel-buffering", b"no"),
                    ],
                }
            )
            pump = asyncio.create_task(self._pump(sub, send, since, history))
            gone = asyncio.create_task(_disconnected(receive))
            _, pending = await asyncio.wait({pump, gone}, return_when=asyncio.FIRST_COMPLETED)
            for t in pending:
                t.cancel()
            await asyncio.gather(*pending, return_exceptions=True)
            if pump.done() and not pump.cancelled() and pump.exception() is None:
                end = {"type": "http.response.body", "body": b"", "more_body": False}
                # a browser that stopped reading blocks this write too: bounded as well
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(send(end), web.settings.send_timeout_s)
        except OSError:
            pass  # the browser went away mid-write
        finally:
            web.hub.detach(sub, web.clock())

    async def _pump(self, sub: Subscriber, send: Send, since: str | None, history: bool) -> None:
        web = self.web
        s = web.settings

        async def write(body: bytes) -> bool:
            try:
                msg = {"type": "http.response.body", "body": body, "more_body": True}
                await asyncio.wait_for(send(msg), s.send_timeout_s)
            except TimeoutError:
                web.hub.dropped += 1
                return False
            return True

        hello = {"space": web.space, "heartbeat_s": s.heartbeat_s, "pairings": len(sub.keys)}
        first = f"retry: {RETRY_MS}\nevent: hello\ndata: {json.dumps(hello)}\n\n"
        if not await write(first.encode()):
            return
        await web.feed.ensure(sub.keys)
        backlog = web.hub.backlog(sub.keys, since, history)
        while not sub.queue.empty():  # queued since attach: already in the backlog
            sub.queue.get_nowait()
        if not await write(b"".join(backlog) + web.beat()):
            return
        while not sub.overflowed:
            try:
                frame = await asyncio.wait_for(sub.queue.get(), s.heartbeat_s)
            except TimeoutError:
                frame = web.beat()
            frames = [frame]
            while not sub.queue.empty() and len(frames) < 64:
                frames.append(sub.queue.get_nowait())
            if sub.overflowed or not await write(b"".join(frames)):
                return


async def _disconnected(receive: Receive) -> None:
    while True:
        msg = await receive()
        if msg["type"] == "http.disconnect":
            return


def _update_json(u: Any) -> dict[str, Any] | None:
    return None if u is None else u.as_json()


def routes(web: Web) -> list[Route | Mount]:
    async def snapshot(request: Request) -> Response:
        try:
            keys = pairings_of(request, web.settings.max_pairings_per_client)
            got = await web.feed.snapshot(keys)
        except ValueError as exc:
            return JSONResponse({"error": str(exc)}, 400)
        except FeedDown as exc:
            return JSONResponse({"error": str(exc), "feed": exc.status}, 503)
        body = [
            {**pairing_body(k), **(_update_json(u) or {"p_first_wins": None})}
            for k, u in zip(keys, got, strict=True)
        ]
        return JSONResponse({"space": web.space, "feed": web.feed.status, "pairings": body})

    async def config(request: Request) -> Response:
        return JSONResponse(
            {
                "space": web.space,
                "heartbeat_s": web.settings.heartbeat_s,
                "pinned": [pairing_body(k) for k in web.pinned],
                "max_pairings_per_client": web.settings.max_pairings_per_client,
                "watching": len(web.hub.pairings()),
                "clients": len(web.hub.subscribers),
                "dropped": web.hub.dropped,
                "feed": web.feed.status,
                "detail": web.feed.detail,
                "version": web.hub.version,
                "quality": web.settings.metrics_url is not None,
            }
        )

    async def quality(request: Request) -> Response:
        return JSONResponse(web.quality.as_json())

    def page(name: str) -> Callable[[Request], Awaitable[Response]]:
        async def serve(request: Request) -> Response:
            return FileResponse(str(STATIC / name), media_type="text/html")

        return serve

    async def index(request: Request) -> Response:
        query = request.url.query
        return RedirectResponse("/board" + (f"?{query}" if query else ""))

    async def no_icon(request: Request) -> Response:
        return Response(status_code=204)

    return [
        Route("/", index),
        Route("/favicon.ico", no_icon),
        Route("/overlay", page("overlay.html")),
        Route("/board", page("board.html")),
        Route("/api/watch", WatchStream(web), methods=["GET"]),
        Route("/api/snapshot", snapshot),
        Route("/api/config", config),
        Route("/api/quality", quality),
        Mount("/static", StaticFiles(directory=str(STATIC)), name="static"),
    ]


class Guard:
    """Bearer token (header, or ``token`` in the query for pages and EventSource) and headers."""

    def __init__(self, app: ASGIApp, token: str | None) -> None:
        self.app, self.token = app, token

    def _allowed(self, scope: Scope) -> bool:
        if self.token is None or scope["path"].startswith("/static/"):
            return True
        request = Request(scope)
        header = request.headers.get("authorization", "")
        given = header[7:] if header.lower().startswith("bearer ") else ""
        given = given or request.query_params.get("token", "")
        return hmac.compare_digest(given.encode(), self.token.encode())

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        if not self._allowed(scope):
            deny = JSONResponse(
                {"error": "a bearer token is required"},
                401,
                headers={"www-authenticate": "Bearer"},
            )
            await deny(scope, receive, send)
            return

        async def with_headers(msg: Message) -> None:
            if msg["type"] == "http.response.start":
                msg["headers"] = [
                    *msg.get("headers", []),
                    (b"x-content-type-options", b"nosniff"),
                    (b"referrer-policy", b"no-referrer"),
                    (b"content-security-policy", b"default-src 'self'; style-src 'self'"),
                ]
            await send(msg)

        await self.app(scope, receive, with_headers)


def build_app(web: Web) -> Starlette:
    """The ASGI application of one web server."""
    middleware = [Middleware(Guard, token=web.settings.token)]
    if web.settings.cors_origins:
        middleware.insert(
            0,
            Middleware(
                CORSMiddleware,
                allow_origins=list(web.settings.cors_origins),
                allow_methods=["GET"],
                allow_headers=["Authorization", "Last-Event-ID"],
            ),
        )
    return Starlette(routes=routes(web), middleware=middleware, lifespan=web.lifespan)
