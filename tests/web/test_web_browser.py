"""The overlay and the board in headless Chromium against the real stack.

Debian's chromium is driven by the playwright package (no browser download);
without either the tests skip, and under CI=true they fail.
"""

from __future__ import annotations

import contextlib
import socket
import tempfile
import threading
import urllib.request
from collections.abc import Iterator
from typing import Any

import pytest

from streamrate.web.quality import read_quality
from tests.integration.helpers import wait_for

from .conftest import Stack, busiest_pair, chromium_or_skip, world

pytestmark = [pytest.mark.integration, pytest.mark.slow]
FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]


@pytest.fixture
def browser() -> Iterator[Any]:
    path = chromium_or_skip()
    from playwright.sync_api import sync_playwright

    with sync_playwright() as pw, tempfile.TemporaryDirectory() as profile:
        ctx = pw.chromium.launch_persistent_context(
            profile,
            executable_path=path,
            headless=True,
            args=FLAGS,
            viewport={"width": 1920, "height": 1080},
        )
        try:
            yield ctx
        finally:
            ctx.close()


def _attr(page: Any, sel: str, name: str) -> str | None:
    return page.evaluate(f"document.querySelector({sel!r})?.dataset.{name} ?? null")


def _wait_attr(page: Any, sel: str, name: str, value: str, timeout_s: float = 20) -> None:
    wait_for(lambda: _attr(page, sel, name) == value, timeout_s, f"{sel} {name}={value}")


def test_overlay_shows_the_services_number_goes_stale_and_recovers(
    stack: Stack, browser: Any
) -> None:
    events = world(1200)
    a, b = busiest_pair(events)
    stack.start_service()
    stack.send(events[:400])
    wait_for(lambda: stack.applied() == 400, 30, "the first events")
    stack.start_web()
    page = browser.new_page()
    page.goto(stack.url(f"/overlay?p={a}:{b}&a=First&b=Second&ctx=map=saltflats"))
    ctx = {"map": "saltflats"}

    def shows_service_value() -> None:
        want = stack.ask(a, b, ctx)["p_first_wins"]
        wait_for(lambda: _attr(page, "#overlay", "p") == repr(want), 20, f"p = {want}")
        wait_for(lambda: page.inner_text("#num1") == f"{100 * want:.0f}%", 10, "the number")
        assert _attr(page, "#overlay", "state") == "live"

    shows_service_value()
    assert page.inner_text("#name1") == "First"
    assert page.inner_text("#ctx") == "map saltflats"
    stack.send(events[400:800])  # matches stream in: the bar follows
    wait_for(lambda: stack.applied() == 800, 30, "more events")
    shows_service_value()

    stack.stop_web()  # the web server goes away: stale, then back by itself
    _wait_attr(page, "#overlay", "state", "stale")
    assert "paused" in page.inner_text("#status")
    stack.start_web()
    _wait_attr(page, "#overlay", "state", "live")

    stack.stop_service()  # the service goes away: stale while the web server stays
    _wait_attr(page, "#overlay", "state", "stale")
    stack.send(events[800:])
    stack.start_service(metrics=False)
    wait_for(lambda: stack.applied() == 1200, 30, "the rest")
    _wait_attr(page, "#overlay", "state", "live")
    shows_service_value()


class Proxy:
    """A TCP forwarder whose connections can be cut (a network drop between browser and server)."""

    def __init__(self, target_port: int) -> None:
        self.target = target_port
        self.sock = socket.socket()
        self.sock.bind(("127.0.0.1", 0))
        self.sock.listen(64)
        self.port = self.sock.getsockname()[1]
        self.conns: list[socket.socket] = []
        self.lock = threading.Lock()
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self) -> None:
        while True:
            try:
                client, _ = self.sock.accept()
            except OSError:
                return
            upstream = socket.create_connection(("127.0.0.1", self.target))
            with self.lock:
                self.conns += [client, upstream]
            for src, dst in ((client, upstream), (upstream, client)):
                threading.Thread(target=self._pipe, args=(src, dst), daemon=True).start()

    @staticmethod
    def _pipe(src: socket.socket, dst: socket.socket) -> None:
        try:
            while data := src.recv(65536):
                dst.sendall(data)
        except OSError:
            pass
        finally:
            for s in (src, dst):
                with contextlib.suppress(OSError):
                    s.shutdown(socket.SHUT_RDWR)

    def cut(self) -> None:
        with self.lock:
            conns, self.conns = self.conns, []
        for s in conns:
            with contextlib.suppress(OSError):
                s.shutdown(socket.SHUT_RDWR)
            s.close()

    def close(self) -> None:
        self.cut()
        self.sock.close()


def test_board_follows_pairings_and_resumes_after_a_drop_without_a_gap(
    stack: Stack, browser: Any
) -> None:
    events = world(1500)
    a, b = busiest_pair(events)
    touching = [e.match_id for e in events if {a, b} & set(e.entities())]
    stack.start_service()
    stack.start_web()
    proxy = Proxy(stack.web_port)
    try:
        page = browser.new_page()
        page.goto(f"http://127.0.0.1:{proxy.port}/board?p={a}:{b}&p={b}:{a}&minutes=5")
        card = f".card[data-key='{_key(a, b)}']"
        wait_for(lambda: _attr(page, card, "p") is not None, 20, "the first value")
        stack.send(events[:700])
        wait_for(lambda: stack.applied() == 700, 30, "the first part")
        proxy.cut()  # the browser's connection drops; the stream goes on
        stack.send(events[700:])
        wait_for(lambda: stack.applied() == 1500, 30, "the second part")

        def logged() -> list[str]:
            return [m for m in page.evaluate("SR.log.map((x) => x[0])") if m in touching]

        wait_for(lambda: logged()[-1:] == touching[-1:], 30, "the last change on the board")
        assert sorted(set(logged()), key=touching.index) == touching  # every change arrived
        want = stack.ask(a, b)["p_first_wins"]
        assert _attr(page, card, "p") == repr(want)
        assert page.inner_text(f"{card} .num") == f"{100 * want:.1f}%"
        # the quality panel, read from the service's metrics page
        wait_for(lambda: page.locator("#models tr[data-model='elo']").count() == 1, 20, "quality")
        cells = page.locator("#models tr[data-model='elo'] td").all_inner_texts()
        assert 0.3 < float(cells[2]) < 1.0  # a log loss in nats
        assert page.locator("#reliability path[data-model='elo']:not(.bins-line)").count() == 1

        # the binned diagram: one point per non-empty bin of the recent window, as exported
        def exported() -> list[tuple[str, str]]:
            text = urllib.request.urlopen(stack.metrics_url(), timeout=5).read().decode()
            elo = next(m for m in read_quality(text, "duel")["models"] if m["model"] == "elo")
            return [(str(b["bin"]), str(int(b["n"]))) for b in elo["bins"] if b["n"]]

        def drawn() -> list[tuple[str, str]]:
            found: list[list[str]] = page.evaluate(
                "[...document.querySelectorAll(\"#reliability circle.bin[data-model='elo']\")]"
                ".map((c) => [c.dataset.bin, c.dataset.n])"
            )
            return [(b, n) for b, n in found]

        wait_for(lambda: drawn() == exported(), 20, "the binned reliability points")
        assert 2 <= len(drawn()) <= 10
        assert sum(int(n) for _, n in drawn()) == 200  # the recent window, every event once
    finally:
        proxy.close()


def _key(a: str, b: str) -> str:
    return f'[["{a}"],["{b}"],[]]'
