"""``streamrate demo``: the whole product in one process, in well under a minute.

A simulated Quillrock world (:mod:`streamrate.simulate`) sends its matches to the
event stream (with a few malformed entries and producer retries mixed in), the
service learns from them, a matchmaker asks lobby questions, the live feed
prints changing odds of a few watched duels, and a summary of accuracy and
calibration of the service's own before-the-match predictions closes it.

Without a Redis URL everything runs on fakeredis (an in-process stand-in); with
``--redis-url`` the same runs against a real server (keys under prefix
``demo``, removed at the end).
"""

from __future__ import annotations

import json
import tempfile
import threading
import time
from collections.abc import Callable
from functools import partial
from typing import Any

import numpy as np

from streamrate import calibration
from streamrate.client import ask, follow, new_watcher_id, send_events
from streamrate.config import (
    CheckpointSettings,
    MetricsSettings,
    RedisSettings,
    Settings,
    SpaceSettings,
)
from streamrate.errors import ServiceError
from streamrate.events import MatchEvent, event_to_json
from streamrate.models.base import Prediction
from streamrate.service import ClientFactory, Service, SpaceService, redis_factory
from streamrate.simulate import simulate, world_spec
from streamrate.warm import compile_models, warm_kernels

ASK_TIMEOUT_S = 60.0
"""A safety net for questions asked once the service says it is ready, not a race:
the slow part of a first run (compiling) is over by then."""
RUN_LIMIT_S = 50.0
"""The demo stops sending after this long from the moment the service is ready."""


class _Collector:
    """An observer: keeps every (prediction, outcome) the service served, in order
    (the predictions of models inside the served one, such as the raw model under a
    recalibration, come under their own labels and are left out)."""

    def __init__(self, served: str) -> None:
        self.served = served
        self.expected: list[float] = []
        self.scores: list[float] = []
        self.lock = threading.Lock()

    def __call__(self, event: MatchEvent, pred: Prediction, model: str) -> None:
        if model != self.served:
            return
        with self.lock:
            self.expected.append(pred.expected_score)
            self.scores.append(event.score)


def _fake_clients() -> ClientFactory:
    import fakeredis

    server = fakeredis.FakeServer()
    return lambda: fakeredis.FakeRedis(server=server)


def _spoiled(events: list[MatchEvent]) -> list[str]:
    """A few malformed entries and retries, to show dead letters and de-duplication."""
    good = json.loads(event_to_json(events[0]))
    bad_score = {**good, "match_id": "q-bad-1", "score": 2}
    same_side = {**good, "match_id": "q-bad-2", "second": good["first"]}
    return [
        "{not json",
        json.dumps(bad_score),
        json.dumps(same_side),
        json.dumps({"match_id": "q-bad-3"}),
    ]


def run_demo(
    redis_url: str | None = None,
    matches: int = 6000,
    entities: int = 40,
    rate_per_s: float = 1500.0,
    model: str = "recalibrated",
    seed: int = 7,
    out: Callable[[str], None] = print,
) -> dict[str, Any]:
    """Run the demo; returns the summary numbers (also printed through ``out``)."""
    t_begin = time.monotonic()
    model_settings = {"context": "stacked"} if model.startswith("blade") else {}
    out(f"[demo] loading the {model} model's kernels")
    warm_s = warm_kernels(
        say=lambda line: out(f"[demo] {line}"),
        compile_all=partial(compile_models, [(model, model_settings)]),
    )
    out(f"[demo] model kernels ready ({warm_s:.1f} s)")
    world = simulate(world_spec("cyclic", matches=matches, entities=entities, seed=seed))
    events = world.events
    prefix = "demo"
    clients = _fake_clients() if redis_url is None else redis_factory(RedisSettings(url=redis_url))
    where = "fakeredis (in-process)" if redis_url is None else "Redis server"
    space = SpaceSettings(
        name="duel",
        model=model,
        model_settings=model_settings,
        batch_count=200,
        block_ms=100,
        checkpoint_every_events=2000,
        checkpoint_every_s=2.0,
        dedupe_window_s=365 * 86400.0,
    )
    tmp = tempfile.TemporaryDirectory(prefix="streamrate-demo-")
    settings = Settings(
        prefix=prefix,
        spaces=(space,),
        checkpoint=CheckpointSettings(dir=tmp.name),
        metrics=MetricsSettings(enabled=False),  # the demo prints its own summary
    )
    keys = settings.keys(space)
    client = clients()
    if redis_url is not None:
        client.delete(keys.events, keys.dead, keys.ckpt)
    out(f"streamrate demo: {len(events)} Quillrock duels among {entities} players on {where}")
    out(f"  model {model}, stream {keys.events}, checkpoints every {space.checkpoint_every_events}")

    collector = _Collector(model)
    service = Service(settings, clients, observers=[collector])
    stop = threading.Event()
    service.start(stop)
    _wait_until_ready(service, service.spaces[0], out)
    t_start = time.monotonic()

    # Watch three duels between frequent players and print how their odds move.
    counts: dict[str, int] = {}
    for ev in events[:500]:
        for ent in ev.entities():
            counts[ent] = counts.get(ent, 0) + 1
    top = sorted(counts, key=lambda e: (-counts[e], e))[:6]
    watched = [{"first": [top[i]], "second": [top[i + 1]]} for i in (0, 2, 4)]
    reply = _ask(clients, keys.requests, _watch_request(watched))
    live_channel = str(reply.get("live_channel", keys.live))
    out(f"[watch] following {reply['watching']} duels on {live_channel}")
    last_live: dict[str, float] = {}
    live_lock = threading.Lock()

    def on_live(msg: dict[str, Any]) -> None:
        with live_lock:
            last_live[f"{msg['first'][0]} vs {msg['second'][0]}"] = msg["p_first_wins"]

    live_stop = threading.Event()
    live_ready = threading.Event()
    live_thread = threading.Thread(
        target=follow, args=(clients(), live_channel, on_live, live_stop, live_ready), daemon=True
    )
    live_thread.start()
    while not live_ready.wait(0.1):  # subscribed, so that no early message is missed
        if not live_thread.is_alive():
            raise ServiceError("the live feed reader stopped before it subscribed")

    lines = [event_to_json(ev) for ev in events]
    junk = _spoiled(events)
    for k, j in enumerate(junk):  # spread malformed entries and retries through the stream
        lines.insert((k + 1) * len(lines) // (len(junk) + 1), j)
    for k in range(3):
        lines.insert((2 * k + 1) * len(lines) // 6, event_to_json(events[10 * k]))
    sender = threading.Thread(
        target=send_events,
        args=(clients(), keys.events, lines),
        kwargs={"rate_per_s": rate_per_s, "chunk": 100},
        daemon=True,
    )
    sender.start()
    out(f"[sender] streaming {len(lines)} entries at ~{rate_per_s:.0f}/s")

    lobby_rng = np.random.default_rng(seed)
    pool = sorted(counts)
    consumer = service.spaces[0].consumer
    next_report = time.monotonic()
    while sender.is_alive() or consumer.live.applied + _handled_other(consumer) < len(lines):
        time.sleep(0.1)
        if time.monotonic() < next_report:
            continue
        next_report = time.monotonic() + 1.0
        with live_lock:
            odds = "  ".join(f"{k} {v:.2f}" for k, v in last_live.items())
        if odds:
            out(f"[live] after {consumer.live.applied:5d} matches: {odds}")
        lobby = [str(x) for x in lobby_rng.choice(pool, 8, replace=False)]
        question = {"kind": "lobby", "entities": lobby, "team_sizes": [4, 4]}
        rep = _ask(clients, keys.requests, question)
        s = rep["split"]
        naive = {"kind": "pairing", "first": lobby[:4], "second": lobby[4:]}
        p_naive = _ask(clients, keys.requests, naive)["p_first_wins"]
        out(
            f"[matchmaker] lobby of 8 -> {'+'.join(s['first'])} vs {'+'.join(s['second'])}"
            f"  P(first wins) {s['p_first_wins']:.2f} (first-come split: {p_naive:.2f})"
        )
        if time.monotonic() - t_start > RUN_LIMIT_S:
            out("[demo] time limit reached; stopping early")
            break
    sender.join(5)
    stop.set()
    service.join()
    live_stop.set()
    live_thread.join(2)

    e = np.array(collector.expected)
    y = np.array(collector.scores)
    truth = np.asarray(world.expected_score)
    dead = client.xrange(keys.dead)
    summary = {
        "applied": int(consumer.counters["applied"]),
        "dead_lettered": int(consumer.counters["dead_lettered"]),
        "duplicates": int(consumer.counters["duplicate"]),
        "log_loss": calibration.log_loss(e, y),
        "brier": calibration.brier(e, y),
        "accuracy": calibration.accuracy(e, y),
        "ece": calibration.expected_calibration_error(e, y),
        "log_loss_truth": calibration.log_loss(truth[: len(y)], y),
        "seconds": time.monotonic() - t_start,
        "seconds_total": time.monotonic() - t_begin,
    }
    out("[summary] before-the-match predictions of the service, scored on the outcomes:")
    out(
        f"  applied {summary['applied']}, dead-lettered {summary['dead_lettered']}, "
        f"retries skipped {summary['duplicates']}"
    )
    for _, fields in dead[:4]:
        out(f"  dead letter: {fields[b'dead.reason'].decode()}")
    out(
        f"  accuracy {summary['accuracy']:.3f}   log loss {summary['log_loss']:.4f} "
        f"(true probabilities: {summary['log_loss_truth']:.4f})   Brier {summary['brier']:.4f}"
    )
    curve = calibration.reliability_curve(e, y, bins=5)
    out(f"  calibration (ECE {summary['ece']:.4f}); predicted -> observed, per bin:")
    for p, o, n in zip(curve.mean_forecast, curve.mean_outcome, curve.count, strict=True):
        if n:
            out(f"    {p:.3f} -> {o:.3f}  ({int(n)} matches)")
    out(
        f"[demo] done in {summary['seconds']:.1f} s "
        f"({summary['seconds_total']:.1f} s with start-up)"
    )
    if redis_url is not None:
        client.delete(keys.events, keys.dead, keys.ckpt)
    tmp.cleanup()
    return summary


def _watch_request(pairings: list[dict[str, list[str]]]) -> dict[str, Any]:
    # A watch of its own (per-client); the demo ends long before it would expire.
    return {
        "kind": "watch",
        "action": "set",
        "watcher": new_watcher_id(),
        "ttl_s": 60.0,
        "pairings": pairings,
    }


def _ask(clients: ClientFactory, channel: str, request: dict[str, Any]) -> dict[str, Any]:
    """One question to the ready service; an error reply is an error of the demo."""
    reply = ask(clients(), channel, request, timeout_s=ASK_TIMEOUT_S)
    if not reply.get("ok"):
        raise ServiceError(
            f"the service refused a {request['kind']} question: {reply.get('error')}"
        )
    return dict(reply)


def _status(space: SpaceService) -> str:
    """The live model's status where the service reports one, else "ready" once recovered."""
    status = getattr(space.consumer.live, "status", None)
    return "ready" if status is None else str(getattr(status, "value", status))


def _wait_until_ready(service: Service, space: SpaceService, out: Callable[[str], None]) -> None:
    """Wait for the service's readiness signals (no deadline: a slow machine is not an error)."""
    since = time.monotonic()
    next_note = since + 10.0
    while not (space.ready.is_set() and space.listening.is_set() and _status(space) == "ready"):
        if not all(t.is_alive() for t in service.threads):
            raise ServiceError("the service stopped while starting (see the log above)")
        time.sleep(0.05)
        if time.monotonic() > next_note:
            next_note += 10.0
            detail = getattr(space.consumer.live, "detail", "") or "recovering"
            out(f"[demo] waiting for the service ({time.monotonic() - since:.0f} s): {detail}")


def _handled_other(consumer: Any) -> int:
    return int(consumer.counters["dead_lettered"] + consumer.counters["duplicate"])
