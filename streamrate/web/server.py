"""Running the web server: uvicorn around :func:`streamrate.web.app.build_app`.

``serve_web`` blocks until SIGINT/SIGTERM (the command line);
:class:`WebServer` also runs in a background thread (tests, benchmarks).
"""

from __future__ import annotations

import asyncio
import socket
import threading
import time

import uvicorn

from streamrate.config import Settings, WebSettings
from streamrate.errors import ServiceError
from streamrate.web.app import Web, build_app
from streamrate.web.hub import PairKey


class _Server(uvicorn.Server):
    """uvicorn's server, ending the event streams first so that shutdown does not wait."""

    def __init__(self, config: uvicorn.Config, web: Web) -> None:
        super().__init__(config)
        self.web = web

    async def shutdown(self, sockets: list[socket.socket] | None = None) -> None:
        self.web.hub.close_all()
        await super().shutdown(sockets)


class WebServer:
    """One web server for one space of ``settings`` (the service's settings)."""

    def __init__(
        self,
        web: WebSettings,
        settings: Settings,
        space: str | None = None,
        pinned: list[PairKey] | None = None,
    ) -> None:
        if settings.redis.url is None:
            raise ServiceError("no Redis URL given (use --redis-url or redis.url in the settings)")
        sp = settings.space(space)
        self.state = Web(web, settings.keys(sp), sp.name, settings.redis.url, pinned or [])
        self.app = build_app(self.state)
        self.config = uvicorn.Config(
            self.app,
            host=web.bind,
            port=web.port,
            log_level="warning",
            access_log=False,
            lifespan="on",
            timeout_graceful_shutdown=1,
            server_header=False,
        )
        self.server = _Server(self.config, self.state)
        self._thread: threading.Thread | None = None

    def run(self) -> None:
        """Serve until a signal (uvicorn installs SIGINT/SIGTERM handlers)."""
        self.server.run()

    def start(self, timeout_s: float = 10.0) -> None:
        """Serve from a background thread; return once it accepts connections."""

        # uvicorn leaves signal handling alone outside the main thread.
        def run() -> None:
            asyncio.run(self.server.serve())

        self._thread = threading.Thread(target=run, name="web", daemon=True)
        self._thread.start()
        deadline = time.monotonic() + timeout_s
        while not self.server.started:
            if time.monotonic() > deadline or not self._thread.is_alive():
                raise ServiceError("the web server did not start")
            time.sleep(0.02)

    def stop(self) -> None:
        self.server.should_exit = True
        if self._thread is not None:
            self._thread.join(10)
            self._thread = None
