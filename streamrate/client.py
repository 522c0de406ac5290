"""Client side of the service: send events, ask questions, follow the live feed.

These are what ``streamrate send``, ``streamrate ask`` and ``streamrate watch``
run; the demo uses them too. Every function takes a Redis client (injected).

Stream entry format (what the consumer reads): one field ``event`` holding the
event's JSON (see ``streamrate schema``); other fields are ignored and kept in
dead letters.
"""

from __future__ import annotations

import json
import threading
import time
import uuid
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any

from streamrate.errors import ServiceError


def event_lines(path: Path | str) -> Iterator[bytes]:
    """Non-blank lines of an event file, unvalidated: the service judges them."""
    with open(path, "rb") as fh:
        for line in fh:
            line = line.strip()
            if line:
                yield line


def send_events(
    client: Any,
    stream: str,
    lines: Iterable[bytes | str],
    field: str = "event",
    rate_per_s: float | None = None,
    chunk: int = 500,
    progress: Callable[[int], None] | None = None,
    stop: threading.Event | None = None,
) -> int:
    """XADD each line as one entry (pipelined); ``rate_per_s`` paces them. Returns count."""
    sent = 0
    start = time.monotonic()
    step = chunk if rate_per_s is None else max(1, min(chunk, int(rate_per_s // 20) or 1))
    pipe = client.pipeline(transaction=False)
    pending = 0
    for line in lines:
        if stop is not None and stop.is_set():
            break
        pipe.xadd(stream, {field: line})
        pending += 1
        if pending >= step:
            pipe.execute()
            sent += pending
            if progress is not None:
                progress(pending)
            pending = 0
            if rate_per_s:
                ahead = sent / rate_per_s - (time.monotonic() - start)
                if ahead > 0:
                    time.sleep(ahead)
    if pending:
        pipe.execute()
        sent += pending
        if progress is not None:
            progress(pending)
    return sent


def ask(client: Any, channel: str, request: dict[str, Any], timeout_s: float = 5.0) -> Any:
    """Publish ``request`` on ``channel`` and wait for the reply with its id."""
    req = dict(request)
    req.setdefault("id", uuid.uuid4().hex)
    req.setdefault("reply_to", f"{channel}:reply:{uuid.uuid4().hex}")
    pubsub = client.pubsub(ignore_subscribe_messages=True)
    pubsub.subscribe(req["reply_to"])
    try:
        if client.publish(channel, json.dumps(req)) == 0:
            raise ServiceError(f"no service listens on {channel}")
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            msg = pubsub.get_message(timeout=min(0.1, max(deadline - time.monotonic(), 0.001)))
            if msg is None or msg.get("type") != "message":
                continue
            reply = json.loads(msg["data"])
            if reply.get("id") == req["id"]:
                return reply
        raise ServiceError(f"no reply within {timeout_s} s")
    finally:
        pubsub.close()


def follow(
    client: Any,
    channel: str,
    on_message: Callable[[dict[str, Any]], None],
    stop: threading.Event,
    ready: threading.Event | None = None,
) -> None:
    """Call ``on_message`` with each live-feed message until ``stop`` is set."""
    pubsub = client.pubsub(ignore_subscribe_messages=True)
    pubsub.subscribe(channel)
    if ready is not None:
        ready.set()
    try:
        while not stop.is_set():
            msg = pubsub.get_message(timeout=0.2)
            if msg is not None and msg.get("type") == "message":
                on_message(json.loads(msg["data"]))
    finally:
        pubsub.close()


def parse_context(items: Iterable[str]) -> dict[str, Any]:
    """``["map=saltflats", "heat:=0.4"]`` -> ``{"map": "saltflats", "heat": 0.4}``.

    ``name=value`` is a category (a string, even ``patch=1.5``); ``name:=value`` a number.
    """
    out: dict[str, Any] = {}
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key:
            raise ValueError(f"context {item!r} is not of the form name=value")
        if key.endswith(":"):
            try:
                out[key[:-1]] = float(value)
            except ValueError:
                raise ValueError(f"context {item!r}: {value!r} is not a number") from None
        else:
            out[key] = value
    return out


def format_reply(reply: dict[str, Any]) -> str:
    """A short human reading of a reply (the JSON is available with --json)."""
    if not reply.get("ok"):
        return f"error: {reply.get('error')}"
    ver = f"(model {reply.get('model')} at {reply.get('model_version')})"
    if "answered_by" in reply:  # a challenger set: name the member that answered
        ver = f"(model {reply['model']}: {reply['answered_by']} at {reply.get('model_version')})"
    if reply.get("kind") == "promote":
        return f"{reply['answered_by']} answers now (was {reply['previous']}) {ver}"
    if reply.get("kind") == "compare":
        from streamrate.challengers import format_compare

        return format_compare(reply)
    if reply.get("kind") == "pairing":
        seen = ", ".join(f"{k}: {v}" for k, v in reply["seen"].items())
        draw = "" if reply.get("p_draw") is None else f", P(draw) = {reply['p_draw']:.3f}"
        return f"P(first wins) = {reply['p_first_wins']:.3f}{draw}  seen: {seen}  {ver}"
    if reply.get("kind") == "lobby":
        s = reply["split"]
        return (
            f"{' + '.join(s['first'])}  vs  {' + '.join(s['second'])}: "
            f"P(first wins) = {s['p_first_wins']:.3f} [{reply['method']}] {ver}"
        )
    return json.dumps(reply)
