"""Where the writer's time goes, per event, in one run (run by hand).

    python bench/bench_breakdown.py               # batch 100 and 1000, 100,000 events
    python bench/bench_breakdown.py --batch 100 --events 50000

Runs the same writer as ``bench/bench_service.py`` (blade-chest d=16, default
validation, retry record and checkpoints on) against its own ``redis-server``
(every write fenced by the writer lease, the garbage collector tuned as the
service tunes it; ``--gc default`` leaves it) and times each step of the hot
path inside that one run, in microseconds per
applied event:

* validation: bytes to checked events (decoding, every check of the event
  format, the time check against the stream id);
* encoding: events to the arrays the compiled kernels read (ids to rows,
  context hashing);
* dedupe: the retry record (content digests, looking match ids up, remembering
  applied ones, and writing the record into each checkpoint);
* update: the compiled predict-then-learn over the encoded arrays;
* bookkeeping: everything else (Redis round trips: read, applied log, acks;
  the rest of the checkpoint; the loop's own Python), i.e. the run's wall time
  less the four parts above. The applied log of a batch is written with the
  next read, in one round trip: "read" holds both; "applied log alone" is what
  is written on its own (before a checkpoint, or where no write rides with the
  read).

Each part is timed by wrapping the function that does it (batch-level calls,
so the timers add little); the timers' own cost, measured in the same run, is
taken out of the parts and reported. The empty consumer of ``bench_service``
(read and ack only) is measured in the same run for scale.
"""

from __future__ import annotations

import argparse
import functools
import os
import signal
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import redis

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_service
from _common import run_to_end, start_redis
from bench_service import empty_consumer, event_lines, fill, make_writer

import streamrate.stream.decide as decide_mod
from streamrate.dedupe import SeenIds

PARTS = ("validation", "encoding", "dedupe", "update", "observers")
BOOKKEEPING = ("read", "applied log", "checkpoint")
"""Parts of the bookkeeping shown on their own lines (they are inside it)."""


class Timers:
    """Seconds and calls per part; ``wrap`` replaces an attribute by a timed one."""

    def __init__(self) -> None:
        self.seconds = dict.fromkeys(PARTS + BOOKKEEPING, 0.0)
        self.calls = dict.fromkeys(PARTS + BOOKKEEPING, 0)
        self._undo: list[tuple[Any, str, Any, bool]] = []

    def wrap(self, owner: Any, name: str, part: str) -> None:
        fn = getattr(owner, name)
        clock = time.perf_counter
        seconds, calls = self.seconds, self.calls

        @functools.wraps(fn)
        def timed(*args: Any, **kwargs: Any) -> Any:
            t0 = clock()
            try:
                return fn(*args, **kwargs)
            finally:
                seconds[part] += clock() - t0
                calls[part] += 1

        own = name in vars(owner) if isinstance(owner, type) else name in owner.__dict__
        self._undo.append((owner, name, fn, own))
        setattr(owner, name, timed)

    def undo(self) -> None:
        for owner, name, fn, own in reversed(self._undo):
            if own:
                setattr(owner, name, fn)
            else:
                delattr(owner, name)
        self._undo.clear()


def wrapper_cost_s() -> float:
    """Seconds one timed call adds over a plain call (measured here, best of 5)."""

    class Box:
        def nothing(self) -> None:
            return None

    t = Timers()
    box = Box()
    plain = box.nothing
    n = 200_000
    best_plain = min(_loop(plain, n) for _ in range(5))
    t.wrap(box, "nothing", "update")
    best_timed = min(_loop(box.nothing, n) for _ in range(5))
    t.undo()
    return max(best_timed - best_plain, 0.0) / n


def _loop(fn: Callable[[], None], n: int) -> float:
    t0 = time.perf_counter()
    for _ in range(n):
        fn()
    return time.perf_counter() - t0


def hook(t: Timers, writer: Any) -> None:
    """Wrap the functions of each part (batch-level calls of the hot path)."""
    t.wrap(decide_mod, "scan_payloads", "validation")
    t.wrap(decide_mod, "decode_events", "validation")
    t.wrap(decide_mod, "_refused_or_untrusted", "validation")
    t.wrap(decide_mod, "event_digests", "dedupe")
    for name in ("known", "add_many", "to_arrays"):
        t.wrap(SeenIds, name, "dedupe")
    model = writer.live.model
    if hasattr(model, "learn_encoded"):
        t.wrap(model, "encode", "encoding")
        t.wrap(model, "learn_encoded", "update")
    else:  # a model made of models (the served default): encoding is inside its update
        t.wrap(model, "learn_scored", "update")
    t.wrap(writer.applier, "notify", "observers")
    t.wrap(writer.reader, "read", "read")
    t.wrap(writer.log, "flush", "applied log")
    t.wrap(writer.checkpoints, "save", "checkpoint")
    t.wrap(writer.checkpoints, "poll", "checkpoint")


def run(r: redis.Redis, batch: int, n: int, ckpt: str, rep: int) -> dict[str, float]:
    base = empty_consumer(r, f"empty-bd{batch}-{rep}", batch)
    w = make_writer(r, f"bd{batch}-{rep}", batch, ckpt)
    w.recover()
    t = Timers()
    hook(t, w)
    try:
        t0 = time.perf_counter()
        run_to_end(w)
        wall = time.perf_counter() - t0
    finally:
        t.undo()
    applied = w.live.applied
    assert applied == n, (applied, n)
    cost = wrapper_cost_s()
    out = {p: (t.seconds[p] - t.calls[p] * cost) / applied * 1e6 for p in PARTS + BOOKKEEPING}
    out["total"] = wall / applied * 1e6
    out["bookkeeping"] = out["total"] - sum(out[p] for p in PARTS)
    out["timers"] = sum(t.calls[p] for p in PARTS) * cost / applied * 1e6
    out["empty"] = 1e6 / base
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--events", type=int, default=100_000)
    ap.add_argument("--entities", type=int, default=5_000)
    ap.add_argument("--batch", type=int, action="append")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--checkpoint", choices=("background", "inline"))
    ap.add_argument("--gc", choices=("tuned", "default"), default="tuned")
    ap.add_argument(
        "--quality",
        choices=("off", "chunks", "events"),
        default="off",
        help="the service's quality observers: off (the aim's setting), as serve runs"
        " them (chunks), or called event by event (events)",
    )
    ap.add_argument(
        "--model",
        choices=("blade_chest", "default"),
        default="blade_chest",
        help="blade-chest d=16 (the aim's setting) or the served default (recalibrated mixture)",
    )
    args = ap.parse_args()
    bench_service.QUALITY = args.quality
    if args.model == "default":
        bench_service.WRITER_MODEL = ("recalibrated", {})
    if args.checkpoint:
        bench_service.BACKGROUND = args.checkpoint == "background"
    batches = args.batch or [100, 1000]
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        proc, port = start_redis(tmp)
        try:
            r = redis.Redis(port=port)
            fill(r, event_lines(args.events, args.entities, 0))
            warm = make_writer(r, "warmup", 1000, str(tmp / "ck"))
            warm.recover()
            while warm.step():
                pass
            if args.gc == "tuned":
                from streamrate.service import tune_gc

                tune_gc()  # as the service does once it has started
            print(
                f"{args.events} events among {args.entities} entities; "
                f"{'blade-chest d=16' if args.model == 'blade_chest' else 'the served default'}; "
                f"checkpoints {'in the background' if bench_service.BACKGROUND else 'inline'}; "
                f"garbage collector {args.gc}; quality observers {args.quality}; "
                f"microseconds per applied event, median of {args.repeat} runs (min-max)"
            )
            cols = ("validation", "encoding", "dedupe", "update", "observers", "bookkeeping")
            for batch in batches:
                runs = [run(r, batch, args.events, str(tmp / "ck"), k) for k in range(args.repeat)]
                print(f"batch {batch}:")
                for c in (*cols, *BOOKKEEPING, "total", "timers", "empty"):
                    xs = np.array([x[c] for x in runs])
                    label = {
                        "timers": "(timers' own cost, taken out)",
                        "empty": "empty consumer (read + ack)",
                        "read": "  of which: read (+ applied log)",
                        "applied log": "  of which: applied log alone",
                        "checkpoint": "  of which: checkpoint, ack, trim",
                    }.get(c, c)
                    print(f"  {label:32s} {np.median(xs):6.2f} us  ({xs.min():.2f}-{xs.max():.2f})")
                ratio = [x["empty"] / x["total"] for x in runs]
                print(
                    f"  ratio to the empty consumer (1/us each): "
                    f"{', '.join(f'{v:.3f}' for v in ratio)}"
                )
        finally:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()
    print(f"load: {os.getloadavg()}")


if __name__ == "__main__":
    main()
