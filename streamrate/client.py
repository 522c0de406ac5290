"""Client side of the service: send events, ask questions, follow the live feed.

These are what ``streamrate send``, ``streamrate ask`` and ``streamrate watch``
run; the demo uses them too. Every function takes a Redis client (injected):
one server's or a cluster's (:mod:`streamrate.pubsub` picks sharded pub/sub).

Stream entry format (what the consumer reads): one field ``event`` holding the
event's JSON (see ``streamrate schema``); other fields are ignored and kept in
dead letters.
"""

from __future__ import annotations

import contextlib
import json
import threading
import time
import uuid
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any

import redis

from streamrate.errors import ServiceError
from streamrate.pubsub import Subscriber, publish


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


CLIENT_ID = uuid.uuid4().hex[:12]
"""This process's client id: the part of its reply channels the service's fair queue
keys on (``{sr:duel}:q:reply:<client id>:<request>``)."""


def reply_channel(requests: str, client_id: str | None = None) -> str:
    """A fresh reply channel in the service's reply namespace (``<requests>:reply:``)."""
    return f"{requests}:reply:{client_id or CLIENT_ID}:{uuid.uuid4().hex}"


def _json_object(data: Any) -> dict[str, Any] | None:
    try:
        obj = json.loads(data)
    except (ValueError, TypeError):
        return None
    return obj if isinstance(obj, dict) else None


def ask(
    client: Any,
    channel: str,
    request: dict[str, Any],
    timeout_s: float = 5.0,
    stream: str | None = None,
    stream_max: int = 10_000,
) -> Any:
    """Publish ``request`` on ``channel`` and wait for the reply with its id.

    With ``stream`` (a space's request stream, ``{sr:space}:q:stream``) the request
    is added there instead, for the responders to share (exactly one answers);
    the stream is capped near ``stream_max`` entries. Messages on the reply
    channel that are not JSON objects with our id are skipped.
    """
    req = dict(request)
    req.setdefault("id", uuid.uuid4().hex)
    req.setdefault("reply_to", reply_channel(channel))
    pubsub = Subscriber(client, req["reply_to"])
    try:
        if stream is not None:
            client.xadd(stream, {"request": json.dumps(req)}, maxlen=stream_max, approximate=True)
        elif publish(client, channel, json.dumps(req)) == 0:
            raise ServiceError(f"no service listens on {channel}")
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            msg = pubsub.get_message(timeout=min(0.1, max(deadline - time.monotonic(), 0.001)))
            if msg is None:
                continue
            reply = _json_object(msg["data"])
            if reply is not None and reply.get("id") == req["id"]:
                return reply
        raise ServiceError(f"no reply within {timeout_s} s")
    finally:
        pubsub.close()


LIVE_FIELDS = {
    "first": list,
    "second": list,
    "p_first_wins": float,
    "match_id": str,
    "model_version": str,
}


def live_update(data: Any) -> dict[str, Any] | None:
    """A live-feed message as a dict, or None when it is not one (never raises)."""
    msg = _json_object(data)
    if msg is None:
        return None
    for name, kind in LIVE_FIELDS.items():
        value = msg.get(name)
        if kind is float:
            if isinstance(value, bool) or not isinstance(value, int | float):
                return None
        elif not isinstance(value, kind):
            return None
    if not all(isinstance(e, str) for e in msg["first"] + msg["second"]):
        return None
    return msg


def follow(
    client: Any,
    channel: str,
    on_message: Callable[[dict[str, Any]], None],
    stop: threading.Event,
    ready: threading.Event | None = None,
) -> None:
    """Call ``on_message`` with each live-feed message until ``stop`` is set.

    Anything on the channel that is not a live-feed message is skipped.
    """
    pubsub = Subscriber(client, channel)
    if ready is not None:
        ready.set()
    try:
        while not stop.is_set():
            msg = pubsub.get_message(timeout=0.2)
            if msg is not None:
                update = live_update(msg["data"])
                if update is not None:
                    on_message(update)
    finally:
        pubsub.close()


def new_watcher_id() -> str:
    return f"w-{uuid.uuid4().hex[:16]}"


def watch(
    client: Any,
    requests: str,
    pairings: list[dict[str, Any]],
    on_message: Callable[[dict[str, Any]], None],
    stop: threading.Event,
    *,
    watcher: str | None = None,
    ttl_s: float = 60.0,
    ready: threading.Event | None = None,
    timeout_s: float = 5.0,
) -> str:
    """Watch ``pairings`` as one watcher until ``stop``: its own live channel, renewed
    every ``ttl_s / 3`` seconds (set again if the service forgot it), cleared at the end.

    Returns the watcher id. Raises :class:`ServiceError` when the service refuses.
    """
    who = watcher or new_watcher_id()
    base = {"kind": "watch", "watcher": who, "ttl_s": ttl_s}

    def set_list() -> str:
        rep = ask(client, requests, {**base, "action": "set", "pairings": pairings}, timeout_s)
        if not rep.get("ok"):
            raise ServiceError(str(rep.get("error")))
        return str(rep["live_channel"])

    live = set_list()
    pubsub = Subscriber(client, live)
    if ready is not None:
        ready.set()
    renew_every_s = ttl_s / 3
    next_renew = time.monotonic() + renew_every_s
    try:
        while not stop.is_set():
            msg = pubsub.get_message(timeout=0.2)
            if msg is not None:
                update = live_update(msg["data"])
                if update is not None:
                    on_message(update)
            if time.monotonic() >= next_renew:
                rep = ask(client, requests, {**base, "action": "renew"}, timeout_s)
                if rep.get("ok") and rep.get("watching") == 0 and pairings:
                    set_list()  # the service restarted or the list expired
                next_renew = time.monotonic() + renew_every_s
    finally:
        pubsub.close()
        # Best effort: if this fails the list expires by itself after ttl_s.
        with contextlib.suppress(ServiceError, redis.RedisError):
            ask(client, requests, {**base, "action": "clear"}, min(timeout_s, 2.0))
    return who


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


def never_seen(reply: dict[str, Any]) -> list[str]:
    """Entities of a pairing reply the model has never seen (answered with a newcomer's
    estimate)."""
    seen = reply.get("seen")
    if not isinstance(seen, dict):
        return []
    return [e for e, n in seen.items() if n == 0]


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
        lines = [f"P(first wins) = {reply['p_first_wins']:.3f}{draw}  seen: {seen}  {ver}"]
        lines += [f"never seen: {e} (newcomer estimate)" for e in never_seen(reply)]
        return "\n".join(lines)
    if reply.get("kind") == "lobby":
        s = reply["split"]
        if reply["method"] == "exact":
            how = "exact: every split was scored with the model"
        else:
            bound = reply.get("gap_bound")
            how = "heuristic: teams balanced by each player's mean strength, then scored"
            if bound is not None:
                how += f" (strength gap {reply['surrogate_gap']:.3f}, at most {bound:.3f})"
        return (
            f"{' + '.join(s['first'])}  vs  {' + '.join(s['second'])}: "
            f"P(first wins) = {s['p_first_wins']:.3f} [{reply['method']}] {ver}\n"
            f"[{reply['method']}] = {how}"
        )
    return json.dumps(reply)
