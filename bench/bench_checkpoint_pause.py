"""The longest pause of the apply loop while checkpoints are written.

Run by hand:  python bench/bench_checkpoint_pause.py [--model blade_chest|default]
[--entities 1000000] [--dims 16]
(``uptime`` before and after: the load of the machine sets the wall-clock pauses)

Builds a model holding ``--entities`` entities (``--model blade_chest``, the
default: blade-chest d = ``--dims``; ``--model default``: the served default, a
recalibrated mixture of three Gaussian-strength members and blade-chest d=8), then
runs the writer's apply loop twice on it in the same process: events applied in
chunks of ``lock_chunk`` under the model lock, a checkpoint due every
``--every`` events, stored through the writer's own
:class:`~streamrate.stream.checkpoints.Checkpointer` into a checkpoint file
(fsync + rename) in a temporary directory. Three modes, in this order, in the
same process: no checkpoints at all (the floor: what the machine's other load
and the loop itself give), the synchronous path (``checkpoint.background =
false``: lock, copy, encode, store, ack), and background checkpoints (under the
lock only the small arrays are copied; the per-entity rows stay in a
copy-on-write snapshot, streamed into the file by a thread while the loop goes
on; a row is copied only when a batch writes it first).

A pause is the time between the end of one applied chunk and the end of the
next: the chunk itself plus whatever the loop did in between (a checkpoint).
Printed per mode: the longest pause in wall-clock time and in the loop
thread's CPU time (``time.thread_time``: what the loop itself did, without the
time other processes or the saving thread kept it off a core), the 99th
percentile, the median chunk, the longest ``save`` call, the longest time a
``save`` call held the model lock (taking the state), the rows the snapshots
copied, the checkpoints completed; then the ratio of the longest pauses
(synchronous over background). The stream reader and applied log are stand-ins
that only count (Redis is not what is measured). On a shared two-core machine
the wall-clock pauses follow the load: compare each with the floor of its run.
"""

from __future__ import annotations

import argparse
import tempfile
import threading
import time
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import FileCheckpointStore
from streamrate.config import SpaceSettings
from streamrate.dedupe import SeenIds
from streamrate.events import MatchEvent
from streamrate.metrics import ServiceMetrics
from streamrate.models._snapshot import RowSnapshot
from streamrate.models.base import Model, ModelState, warm_up
from streamrate.models.matchup import BladeChest
from streamrate.models.registry import build_model, model_from_state
from streamrate.service import freeze_loaded, tune_gc
from streamrate.stream.apply import LiveModel
from streamrate.stream.checkpoints import Checkpointer

START = datetime(2026, 3, 1, tzinfo=UTC)
MAPS = ("saltflats", "ember-quarry", "glasswood", "sunken-bell")


class CountingReader:
    """Stands in for the stream reader: counts acknowledged entries."""

    def __init__(self) -> None:
        self.acked = 0

    def ack(self, ids: list[bytes]) -> None:
        self.acked += len(ids)

    def trim(self, min_id: str) -> None:
        return None


class QuietLog:
    """Stands in for the applied log (nothing to replicate here)."""

    def promote(self, seq: int, model: str) -> None:
        return None

    def flush(self) -> str:
        return "0-0"

    def trim(self, keep_from: str, min_entries: int) -> None:
        return None


def events(lo: int, hi: int, n_ent: int, rng: np.random.Generator) -> list[MatchEvent]:
    pairs = rng.integers(0, n_ent, size=(hi - lo, 2))
    return [
        MatchEvent.model_construct(
            match_id=f"m-{k}",
            finished_at=START + timedelta(seconds=k),
            first=(f"quill-{int(a)}",),
            second=(f"quill-{int(b) if b != a else (int(a) + 1) % n_ent}",),
            score=float(k % 2),
            context={"map": MAPS[k % 4]},
            features={},
        )
        for k, (a, b) in zip(range(lo, hi), pairs, strict=True)
    ]


class TimedLock:
    """The model lock, also timing how long it is held while ``armed`` (a save)."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.armed = False
        self.longest = 0.0
        self._t0 = 0.0

    def acquire(self, *args: Any) -> bool:
        got = self._lock.acquire(*args)
        self._t0 = time.perf_counter()
        return got

    def release(self) -> None:
        held = time.perf_counter() - self._t0
        if self.armed:
            self.longest = max(self.longest, held)
        self._lock.release()

    def __enter__(self) -> bool:
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()


def build(n_ent: int, dims: int, kind: str = "blade_chest", learned: int = 4000) -> Model:
    """A model of ``n_ent`` entities: ``learned`` of them learned from matches,
    their rows repeated to fill the rest (learning a million entities one match
    at a time would take minutes; what a checkpoint costs depends on the rows,
    not on how they were learned). ``kind`` ``default``: the served default
    model, whose members' rows (each member's ``entity_*`` and per-entity
    arrays) are repeated the same way."""
    if kind == "default":
        model = build_model(SpaceSettings().model, **SpaceSettings().model_settings)
    else:
        model = BladeChest(dims=dims, context="stacked")
    warm_up(model)
    model.learn_many(
        [
            MatchEvent.model_construct(
                match_id=f"b-{k}",
                finished_at=START + timedelta(seconds=k),
                first=(f"quill-{2 * k}",),
                second=(f"quill-{2 * k + 1}",),
                score=float(k % 2),
                context={"map": MAPS[k % 4]},
                features={},
            )
            for k in range(learned // 2)
        ]
    )
    state = model.to_state()
    k = len(model.entities_)
    arrays = dict(state.arrays)
    ids = np.frombuffer(
        "\n".join(f"quill-{i}" for i in range(n_ent)).encode("utf-8"), dtype=np.uint8
    )
    for name, arr in state.arrays.items():
        if name.endswith("entity_ids"):
            arrays[name] = ids.copy()
        elif arr.ndim >= 1 and arr.shape[0] == k:
            reps = (-(-n_ent // k),) + (1,) * (arr.ndim - 1)
            arrays[name] = np.ascontiguousarray(np.tile(arr, reps)[:n_ent])
    big = model_from_state(ModelState(state.kind, state.version, state.params, arrays))
    assert len(big.entities_) == n_ent
    warm_up(big)
    return big


def run(
    live: LiveModel, mode: str, n_events: int, every: int, n_ent: int, chunk: int
) -> dict[str, float]:
    background = mode == "background"
    space = SpaceSettings(checkpoint_every_events=every, checkpoint_every_s=3600.0)
    reader, applied_log = CountingReader(), QuietLog()
    copied = [0]
    model = live.model
    take = getattr(model, "snapshot", None)
    lock = live.lock
    assert isinstance(lock, TimedLock)
    lock.longest = 0.0

    def counted() -> tuple[ModelState, RowSnapshot]:  # counts the rows the snapshots copy
        assert take is not None
        state, snap = take()
        before = snap.close

        def close() -> None:
            copied[0] += snap.rows_copied
            before()

        snap.close = close  # type: ignore[method-assign]
        return state, snap

    if take is not None:
        model.snapshot = counted  # type: ignore[method-assign]
    with tempfile.TemporaryDirectory() as tmp:
        store = FileCheckpointStore(tmp, space.name)
        ck = Checkpointer(
            store,
            reader,  # type: ignore[arg-type]
            applied_log,  # type: ignore[arg-type]
            live,
            (),
            ServiceMetrics(CollectorRegistry(), [space.name]),
            space,
            time.monotonic,
            0,
            background=background,
        )
        seen = SeenIds(space.dedupe_keep_ids, space.dedupe_window_s)
        rng = np.random.default_rng(7)
        gaps: list[float] = []
        cpu_gaps: list[float] = []
        save_s = 0.0
        saves = 0
        batch = space.batch_count
        t_prev, c_prev = time.perf_counter(), time.thread_time()
        for lo in range(0, n_events, batch):
            evs = events(lo, min(lo + batch, n_events), n_ent, rng)  # "read" (not timed apart)
            for s in range(0, len(evs), chunk):
                part = evs[s : s + chunk]
                with live.lock:
                    live.model.learn_many(part)
                    live.applied += len(part)
                t, c = time.perf_counter(), time.thread_time()
                gaps.append(t - t_prev)
                cpu_gaps.append(c - c_prev)
                t_prev, c_prev = t, c
            if mode == "none":
                continue
            ck.handled([f"{k}-0".encode() for k in range(lo, lo + len(evs))])
            ck.poll()
            if ck.due():
                t0 = time.perf_counter()
                lock.armed = True
                ck.save(f"{lo + len(evs)}-0", seen, {}, wait=not background)
                lock.armed = False
                save_s = max(save_s, time.perf_counter() - t0)
                saves += 1
        if mode != "none":
            ck.save(f"{n_events}-0", seen, {}, wait=True)  # the final one: not in the gaps
    if take is not None:
        del model.snapshot  # the class's own again
    g = np.array(gaps) * 1000
    return {
        "max_ms": float(g.max()),
        "cpu_max_ms": float(np.max(cpu_gaps) * 1000),
        "p99_ms": float(np.percentile(g, 99)),
        "median_ms": float(np.median(g)),
        "save_ms": save_s * 1000,
        "lock_ms": lock.longest * 1000,
        "rows_copied": float(copied[0]),
        "checkpoints": float(saves),
        "acked": float(reader.acked),
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", choices=("blade_chest", "default"), default="blade_chest")
    ap.add_argument("--entities", type=int, default=1_000_000)
    ap.add_argument("--dims", type=int, default=16)
    ap.add_argument("--events", type=int, default=60_000, help="events applied per mode")
    ap.add_argument("--every", type=int, default=15_000, help="events between checkpoints")
    ap.add_argument(
        "--gc",
        choices=("default", "tuned"),
        default="default",
        help="tuned: the collector as `streamrate serve` sets it (tune_gc, then freeze_loaded "
        "once the model is built, as after loading a checkpoint)",
    )
    args = ap.parse_args()
    if args.gc == "tuned":
        tune_gc()
    t0 = time.perf_counter()
    model = build(args.entities, args.dims, args.model)
    name = f"blade_chest d={args.dims}" if args.model == "blade_chest" else "the default model"
    print(
        f"{name} ({model.kind}), {len(model.entities_):,} entities, collector {args.gc} "
        f"(built in {time.perf_counter() - t0:.0f} s); {args.events:,} events per mode, "
        f"a checkpoint every {args.every:,}"
    )
    if args.gc == "tuned":
        freeze_loaded()
    live = LiveModel(model, lock=TimedLock())  # type: ignore[arg-type]
    chunk = SpaceSettings().lock_chunk
    got = {}
    for mode in ("none", "synchronous", "background"):
        r = run(live, mode, args.events, args.every, args.entities, chunk)
        got[mode] = r
        print(
            f"  {mode:>11}: longest pause {r['max_ms']:7.1f} ms (loop CPU {r['cpu_max_ms']:6.1f}"
            f" ms), p99 {r['p99_ms']:5.1f} ms, median chunk {r['median_ms']:4.2f} ms, longest"
            f" save call {r['save_ms']:6.1f} ms (lock held {r['lock_ms']:5.1f} ms), "
            f"{r['checkpoints']:.0f} checkpoints, "
            f"{r['acked']:.0f} acknowledged, {r['rows_copied']:.0f} rows copied on write"
        )
    sync, bg = got["synchronous"], got["background"]
    print(
        f"  longest pause, synchronous / background: {sync['max_ms'] / bg['max_ms']:.1f}x "
        f"(loop CPU {sync['cpu_max_ms'] / bg['cpu_max_ms']:.1f}x); background / none: "
        f"{bg['max_ms'] / got['none']['max_ms']:.2f}x"
    )


if __name__ == "__main__":
    main()
