"""Speed and memory of the models, on pre-encoded and on pre-parsed events.

Run by hand:  python bench/bench_models.py [--events 1000000] [--entities 100000]
              [--memory-entities 1000000]
              [--only encoded|parsed|ratings|memory|default|default-service]

Times are CPU seconds of this process (see :func:`timed`).

Everything is timed on an :class:`~streamrate.batch.EncodedBatch` built straight
from random rows (1v1, no context), i.e. "updates on pre-parsed events". In the
same run it times, on the same events:

* blade-chest d=16 (inner and distance form) and Bradley-Terry, sequential,
  compiled (``learn_encoded``), and the mini-batch path (``learn_batch_encoded``);
* Elo through the same path (``streamrate.models.elo`` if present, else a
  compiled Elo loop written here);
* a straightforward per-event numpy implementation of the same blade-chest d=16
  AdaGrad update (the baseline of the speed ratio) and the package's own
  ``backend="numpy"`` fallback, on a slice of the events.

``parsed``: every model through ``learn_many`` on pre-parsed MatchEvent objects
(1v1, then with 2v2 and draws), with the one-pass encoder and, in the same run,
the former encoder (tests/encode_reference.py): the per-event microseconds of
both.

``ratings``: Glicko-2 and TrueSkill, compiled, against the former plain-Python
models with the former encoder (tests/rating_reference.py), on the same paths
(``learn_many``, ``learn_batch`` of 100 and 1000), and the update alone.

``default``: the served default model (``SpaceSettings().model``) against
blade-chest d=16 (stacked context, with and without uncertainty): learn rate in
chunks of 64 events and microseconds per ``predict``, as ratios.
``default-service``: the same two through the real consumer against a
redis-server it starts (needs ``redis-server``), next to an empty consumer.

Memory: bytes per entity at d=16 with ``--memory-entities`` entities (model
arrays + AdaGrad sums + id map), by tracemalloc; resident memory of a process
holding them is measured by bench/bench_memory.py.
"""

from __future__ import annotations

import argparse
import gc
import math
import sys
import time
import tracemalloc
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np

from streamrate.batch import EncodedBatch, encode_events
from streamrate.encode import EntityTable
from streamrate.events import MatchEvent
from streamrate.models.base import Model, warm_up
from streamrate.models.matchup import BladeChest, BladeChestDistance, BradleyTerry, MatchupModel


def make_batch(n: int, n_ent: int, seed: int = 0) -> EncodedBatch:
    rng = np.random.default_rng(seed)
    i = rng.integers(0, n_ent, n)
    j = (i + rng.integers(1, n_ent, n)) % n_ent
    strength = rng.normal(0, 1, n_ent)
    p = 1 / (1 + np.exp(-(strength[i] - strength[j])))
    score = (rng.random(n) < p).astype(np.float64)
    return EncodedBatch(
        first=i.astype(np.int32).reshape(n, 1),
        second=j.astype(np.int32).reshape(n, 1),
        score=score,
        ctx_idx=np.full((n, 0), -1, dtype=np.int32),
        ctx_val=np.zeros((n, 0)),
        time_s=1.77e9 + np.arange(n, dtype=np.float64) * 10.0,
        first_size=np.ones(n, dtype=np.int32),
        second_size=np.ones(n, dtype=np.int32),
    )


def fill_table(table: EntityTable, n_ent: int) -> None:
    for k in range(n_ent):
        table.row(f"quill-{k}")


def timed(fn: Callable[[], object], repeat: int = 3) -> float:
    """Best of ``repeat`` runs, in CPU seconds of this process: everything timed is
    single-threaded, and on a shared machine wall time also counts the waits for
    a core, which swing from run to run."""
    best = math.inf
    for _ in range(repeat):
        t = time.process_time()
        fn()
        best = min(best, time.process_time() - t)
    return best


def numpy_baseline(b: EncodedBatch, n_ent: int, d: int = 16) -> None:
    """Blade-chest d=16 with strength and AdaGrad, one event at a time in plain numpy."""
    rng = np.random.default_rng(0)
    s = np.zeros(n_ent)
    A = 0.1 * rng.uniform(-1, 1, (n_ent, d))
    C = 0.1 * rng.uniform(-1, 1, (n_ent, d))
    gs, gA, gC = np.full(n_ent, 0.1), np.full((n_ent, d), 0.1), np.full((n_ent, d), 0.1)
    lr, lr_s, l2 = 0.1, 0.4, 1e-3
    first, second, score = b.first[:, 0], b.second[:, 0], b.score
    for e in range(len(score)):
        i, j = first[e], second[e]
        theta = s[i] - s[j] + A[i] @ C[j] - A[j] @ C[i]
        g = 1.0 / (1.0 + math.exp(-theta)) - score[e]
        g_si, g_sj = g + l2 * s[i], -g + l2 * s[j]
        g_ai, g_cj = g * C[j] + l2 * A[i], g * A[i] + l2 * C[j]
        g_aj, g_ci = -g * C[i] + l2 * A[j], -g * A[j] + l2 * C[i]
        gs[i] += g_si * g_si
        gs[j] += g_sj * g_sj
        s[i] -= lr_s * g_si / math.sqrt(gs[i])
        s[j] -= lr_s * g_sj / math.sqrt(gs[j])
        for rows, grads, P, G in (((i, j), (g_ai, g_aj), A, gA), ((j, i), (g_cj, g_ci), C, gC)):
            for r, gr in zip(rows, grads, strict=True):
                G[r] += gr * gr
                P[r] -= lr * gr / np.sqrt(G[r])


def elo_reference() -> tuple[str, Callable[[EncodedBatch, int], Callable[[], object]]]:
    try:
        from streamrate.models.elo import Elo
    except ImportError:
        Elo = None
    if Elo is not None:

        def run_pkg(b: EncodedBatch, n_ent: int) -> Callable[[], object]:
            m = Elo()
            fill_table(m.entities_, n_ent)
            return lambda: m.learn_encoded(b)

        return "streamrate.models.elo.Elo.learn_encoded", run_pkg
    from numba import njit

    @njit(cache=True)
    def loop(first, second, score, ratings, out):  # type: ignore[no-untyped-def]
        for e in range(score.shape[0]):
            i, j = first[e, 0], second[e, 0]
            p = 1.0 / (1.0 + 10.0 ** (-(ratings[i] - ratings[j]) / 400.0))
            out[e] = p
            ratings[i] += 24.0 * (score[e] - p)
            ratings[j] -= 24.0 * (score[e] - p)

    def run_own(b: EncodedBatch, n_ent: int) -> Callable[[], object]:
        ratings = np.full(n_ent, 1500.0)
        out = np.zeros(len(b))
        return lambda: loop(b.first, b.second, b.score, ratings, out)

    return "compiled Elo loop in this bench (no streamrate.models.elo)", run_own


def model_runner(
    make: Callable[[], MatchupModel], minibatch: int = 0
) -> Callable[[EncodedBatch, int], Callable[[], object]]:
    def runner(b: EncodedBatch, n_ent: int) -> Callable[[], object]:
        m = make()
        fill_table(m.entities_, n_ent)
        if not minibatch:
            return lambda: m.learn_encoded(b)
        parts = [b.take(slice(k, k + minibatch)) for k in range(0, len(b), minibatch)]

        def run() -> None:
            for part in parts:
                m.learn_batch_encoded(part)

        return run

    return runner


# The encoded events carry no context, so the kernels run without it.
PLAIN: dict[str, object] = {"context": "none"}


def make_events(n: int, n_ent: int, seed: int = 2, teams: bool = False) -> list[MatchEvent]:
    """Pre-parsed 1v1 events with a map and a mode, as the consumer hands them on;
    with ``teams`` every third match is two against two and one in ten a draw."""
    rng = np.random.default_rng(seed)
    i = rng.integers(0, n_ent, n)
    j = (i + rng.integers(1, n_ent, n)) % n_ent
    i2 = (i + rng.integers(1, n_ent, n)) % n_ent
    j2 = (i + rng.integers(1, n_ent, n)) % n_ent
    maps = ("saltflats", "ember-quarry", "glasswood", "sunken-bell")
    start = datetime(2026, 3, 1, tzinfo=UTC)
    out = []
    for k in range(n):
        first, second = (f"quill-{i[k]}",), (f"quill-{j[k]}",)
        duo = teams and k % 3 == 0 and len({i[k], j[k], i2[k], j2[k]}) == 4
        if duo:
            first, second = (*first, f"quill-{i2[k]}"), (*second, f"quill-{j2[k]}")
        score = float(rng.random() < 0.5)
        if teams and k % 10 == 5:
            score = 0.5
        out.append(
            MatchEvent(
                match_id=f"m-{k}",
                finished_at=start + timedelta(seconds=10 * k),
                first=first,
                second=second,
                score=score,
                context={"map": maps[k % 4], "mode": "duo" if duo else "duel"},
            )
        )
    return out


def _former_encoder() -> Callable[..., EncodedBatch]:
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))
    from encode_reference import reference_encode_events

    def former(*args: Any, context_scale: Any = None, feature_scale: Any = None, **kw: Any) -> Any:
        # The former encoder had no scaling of numbers; the events timed here
        # carry categories only, where scaling changes nothing.
        return reference_encode_events(*args, **kw)

    return former


def speed_events(n: int, n_ent: int) -> None:
    """Events/s through ``learn_many`` on pre-parsed MatchEvent objects: encoding
    (id lookups, context hashing) plus the compiled update, the path that replay
    and the service take; timed on a second pass over the same events. Each path
    runs with the package's one-pass encoder and, in the same run, with the former
    encoder (tests/encode_reference.py) swapped in: the per-event cost of both."""
    from streamrate.models import elo, glicko2, matchup, trueskill

    modules = (elo, glicko2, matchup, trueskill)
    current, former = matchup.encode_events, _former_encoder()
    makers: list[tuple[str, Callable[[], Model]]] = [
        ("elo", elo.Elo),
        ("glicko2", glicko2.Glicko2),
        ("trueskill", trueskill.TrueSkill),
        ("bradley_terry", BradleyTerry),
        *[
            (f"blade_chest d={d} (context none)", lambda d=d: BladeChest(dims=d, **PLAIN))
            for d in (8, 16, 32)
        ],
        ("blade_chest d=16 (context stacked)", lambda: BladeChest(dims=16)),
        ("blade_chest defaults (d=8, stacked)", BladeChest),
    ]
    for teams in (False, True):
        events = make_events(n, n_ent, teams=teams)
        rows: list[tuple[str, float, float]] = []
        for name, make in makers:
            cost = []
            for encoder in (former, current):
                for mod in modules:
                    mod.encode_events = encoder  # type: ignore[attr-defined]
                m = make()
                # A first pass registers the ids (and compiles); the timed second pass
                # is the steady state of a long-running stream, where most ids are known.
                m.learn_many(events)
                cost.append(timed(lambda m=m, ev=events: m.learn_many(ev), repeat=3) / n)
            rows.append((name, cost[0], cost[1]))
        for mod in modules:
            mod.encode_events = current  # type: ignore[attr-defined]
        kind = "1v1 and 2v2 (every third), draws" if teams else "1v1"
        print(f"\n{n:,} pre-parsed {kind} MatchEvent objects (map + mode context), learn_many")
        print(f"{'path':<44}{'events/s':>12}{'/ elo':>7}{'us/ev before':>14}{'after':>8}{'x':>6}")
        elo_rate = 1.0 / rows[0][2]
        for name, before, after in rows:
            rate = 1.0 / after
            print(f"{name:<44}{rate:>12,.0f}{rate / elo_rate:>7.2f}{before * 1e6:>14.2f}"
                  f"{after * 1e6:>8.2f}{before / after:>6.2f}")  # fmt: skip


def speed_ratings(n: int, n_ent: int, n_slow: int) -> None:
    """Glicko-2 and TrueSkill on pre-parsed MatchEvent objects (encoding included):
    the former plain-Python models (tests/rating_reference.py, with the former
    encoder of tests/encode_reference.py: the baseline) against
    the compiled loops and their uncompiled run, sequential and in mini-batches."""
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))
    import rating_reference
    from rating_reference import ReferenceGlicko2, ReferenceTrueSkill

    from streamrate.models.glicko2 import Glicko2
    from streamrate.models.trueskill import TrueSkill

    # "Before" is the former models with the former encoder.
    former = _former_encoder()
    rating_reference.encode_events = former  # type: ignore[attr-defined]

    events = make_events(n, n_ent, teams=True)
    slow = events[:n_slow]
    print(f"\n{n:,} pre-parsed MatchEvent objects (1v1 and 2v2, some draws), {n_ent:,} entities;")
    print(f"plain-Python and uncompiled paths on the first {n_slow:,}")
    print("x plain: against the plain-Python model on the same path (learn_many, batch size)")
    print(f"{'path':<62}{'events/s':>12}{'x plain':>10}")
    for name, ref, fast in (
        ("glicko2", ReferenceGlicko2, Glicko2),
        ("trueskill", ReferenceTrueSkill, TrueSkill),
    ):
        warm_up(fast())  # compile every path (or load it from the cache) untimed
        rows: list[tuple[str, Callable[[], Model], list[MatchEvent], int]] = [
            ("plain Python (before), learn_many", ref, slow, 0),
            ("plain Python (before), learn_batch 100", ref, slow, 100),
            ("plain Python (before), learn_batch 1000", ref, slow, 1000),
            ("uncompiled loops (fallback), learn_many", lambda f=fast: f(compiled=False), slow, 0),
            ("compiled, learn_many", fast, events, 0),
            ("compiled, learn_batch 100", fast, events, 100),
            ("compiled, learn_batch 1000", fast, events, 1000),
        ]
        plain: dict[int, float] = {}  # the baseline rate of each path (0: learn_many)
        batch_s: dict[str, float] = {}
        for label, make, evs, size in rows:
            m = make()
            if size:
                parts = [evs[k : k + size] for k in range(0, len(evs), size)]
                t = timed(lambda m=m, parts=parts: [m.learn_batch(p) for p in parts], repeat=1)
            else:
                t = timed(lambda m=m, evs=evs: m.learn_many(evs), repeat=1)
            rate = len(evs) / t
            plain.setdefault(size, rate)
            print(f"{name + ' ' + label:<62}{rate:>12,.0f}{rate / plain[size]:>10.1f}")
            if label.endswith("learn_batch 100"):
                batch_s[label.split(",")[0]] = t / len(evs)
        # The update alone: batch-100 time less the encoding of the same batches
        # (former encoder for the plain model, one-pass encoder for the compiled).
        enc = {}
        for label, encoder, evs in (
            ("plain Python (before)", former, slow),
            ("compiled", encode_events, events),
        ):
            parts = [evs[k : k + 100] for k in range(0, len(evs), 100)]
            table = EntityTable()
            t = timed(lambda parts=parts, e=encoder, tb=table: [e(p, tb) for p in parts], 1)
            enc[label] = t / len(evs)
        upd = {k: batch_s[k] - enc[k] for k in enc}
        print(f"{name} batch 100, us/event: encoding {enc['plain Python (before)'] * 1e6:.2f} "
              f"-> {enc['compiled'] * 1e6:.2f}, update alone "
              f"{upd['plain Python (before)'] * 1e6:.2f} -> {upd['compiled'] * 1e6:.2f} "
              f"(x{upd['plain Python (before)'] / upd['compiled']:.1f})")  # fmt: skip


def speed(n: int, n_ent: int, n_slow: int) -> None:
    b = make_batch(n, n_ent)
    small = make_batch(200, n_ent, seed=1)
    slow = b.take(slice(0, n_slow))
    elo_name, elo = elo_reference()
    rows: list[tuple[str, Callable[[EncodedBatch, int], Callable[[], object]], EncodedBatch]] = [
        ("elo (" + elo_name + ")", elo, b),
        ("bradley_terry", model_runner(lambda: BradleyTerry()), b),
        *[
            (f"blade_chest d={d}", model_runner(lambda d=d: BladeChest(dims=d, **PLAIN)), b)
            for d in (8, 16, 32)
        ],
        ("blade_chest_dist d=16", model_runner(lambda: BladeChestDistance(dims=16, **PLAIN)), b),
        (
            "blade_chest d=16 mini-batch 1000",
            model_runner(lambda: BladeChest(dims=16, **PLAIN), 1000),
            b,
        ),
        (
            "blade_chest d=16 mini-batch 100",
            model_runner(lambda: BladeChest(dims=16, **PLAIN), 100),
            b,
        ),
        (
            "blade_chest d=16 backend=numpy",
            model_runner(lambda: BladeChest(dims=16, backend="numpy", **PLAIN)),
            slow,
        ),
        ("per-event numpy baseline d=16", lambda bb, ne: lambda: numpy_baseline(bb, ne), slow),
    ]
    rates: dict[str, float] = {}
    for name, runner, batch in rows:
        runner(small, n_ent)()  # compile / warm up outside the timing
        fn = runner(batch, n_ent)
        t = timed(fn, repeat=3 if len(batch) == n else 1)
        rates[name] = len(batch) / t
    base = rates["per-event numpy baseline d=16"]
    elo_rate = rates["elo (" + elo_name + ")"]
    print(f"{n:,} pre-encoded 1v1 events, {n_ent:,} entities (slow paths: {n_slow:,} events)")
    print(f"{'path':<62}{'events/s':>12}{'x baseline':>12}{'/ elo':>8}")
    for name, rate in rates.items():
        print(f"{name:<62}{rate:>12,.0f}{rate / base:>12.1f}{rate / elo_rate:>8.2f}")


def memory(n_ent: int, dims: int = 16) -> None:
    gc.collect()
    tracemalloc.start()
    m = BladeChest(dims=dims)
    fill_table(m.entities_, n_ent)
    after_ids, _ = tracemalloc.get_traced_memory()
    m._grow(len(m.entities_))
    total, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    arrays = sum(
        a.nbytes for a in (m.own_, m.acc_, m.last_s_, m.feat_idx_, m.feat_val_, m.entities_.counts)
    )
    print(f"\nmemory, blade_chest d={dims}, {n_ent:,} entities (tracemalloc):")
    print(f"  id map (dict + list + strings + counts): {after_ids / n_ent:8.1f} bytes/entity")
    own = (total - after_ids) / n_ent
    print(f"  parameters + AdaGrad sums (float32):     {own:8.1f} bytes/entity")
    print(f"  total:                                   {total / n_ent:8.1f} bytes/entity")
    print(f"  (numpy arrays incl. counts: {arrays / n_ent:.1f} bytes/entity; peak while growing"
          f" {peak / n_ent:.1f})")  # fmt: skip


def speed_default(n: int, n_ent: int, chunk: int = 64) -> None:
    """The served default (``SpaceSettings().model``) against blade-chest d=16 with
    stacked context (the example service configuration), on the same pre-parsed
    events through ``learn_many`` in chunks of ``chunk`` (the apply step's lock
    slice) and one ``predict`` per pairing (the query path); second pass timed."""
    from streamrate.config import SpaceSettings
    from streamrate.events import Matchup
    from streamrate.models.registry import build_model

    space = SpaceSettings()
    events = make_events(n, n_ent)
    queries = [Matchup(first=ev.first, second=ev.second, context=ev.context) for ev in events]
    queries = queries[: min(len(queries), 20_000)]
    served = f"served default: {space.model}"
    makers: list[tuple[str, Callable[[], Model]]] = [
        ("blade_chest d=16 (context stacked)", lambda: BladeChest(dims=16)),
        ("blade_chest d=16, uncertainty off", lambda: BladeChest(dims=16, uncertainty=False)),
        (served, lambda: build_model(space.model, **space.model_settings)),
        # a candidate member alone: the diagonal Gaussian filter and the full
        # covariance over the 48 most recent entities (here every event evicts)
        ("bayes_strength (diagonal)", lambda: build_model("bayes_strength")),
        ("kalman_strength (max_active=48)", lambda: build_model("kalman_strength")),
    ]
    rows = []
    for name, make in makers:
        m = make()
        warm_up(m)

        def learn(m: Model = m) -> None:
            for k in range(0, n, chunk):
                m.learn_many(events[k : k + chunk])

        learn()  # ids registered, kernels compiled
        learn_s = timed(learn, repeat=3) / n
        ask_s = timed(lambda m=m: [m.predict(q) for q in queries], repeat=3) / len(queries)
        rows.append((name, learn_s, ask_s))
    print(f"\n{n:,} pre-parsed 1v1 events (map + mode context), learn_many in chunks of {chunk}")
    print(f"{'model':<44}{'learn ev/s':>12}{'x bc16':>8}{'predict us':>12}{'x bc16':>8}")
    base_learn, base_ask = rows[0][1], rows[0][2]
    for name, learn_s, ask_s in rows:
        print(f"{name:<44}{1 / learn_s:>12,.0f}{base_learn / learn_s:>8.2f}"
              f"{ask_s * 1e6:>12.1f}{base_ask / ask_s:>8.2f}")  # fmt: skip


def speed_default_service(n: int, n_ent: int) -> None:
    """The consumer (validation, update, checkpoints, acks) with the served default
    against the same with blade-chest d=16, and both against an empty consumer that
    only reads and acks, over one pre-filled stream of a real redis-server (started
    here by :mod:`_common`'s helper, stopped by its PID); medians of three."""
    import os
    import signal
    import tempfile

    import redis
    from prometheus_client import CollectorRegistry

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    import bench_service as bs
    from _common import run_to_end, start_redis

    from streamrate.checkpoint import FileCheckpointStore
    from streamrate.config import Settings, SpaceSettings
    from streamrate.consumer import Consumer
    from streamrate.metrics import ServiceMetrics
    from streamrate.models.registry import build_model

    served = SpaceSettings()

    def consume(r: Any, group: str, batch: int, ckpt: str, model: str, st: dict[str, Any]) -> float:
        space = SpaceSettings(name="duel", model=model, model_settings=st, group=group,
                              batch_count=batch, block_ms=1, checkpoint_every_events=10_000,
                              checkpoint_every_s=5.0)  # fmt: skip
        keys = Settings(spaces=(space,)).keys(space)
        metrics = ServiceMetrics(CollectorRegistry(), ["duel"])
        c = Consumer(r, space, keys, FileCheckpointStore(ckpt, group), metrics,
                     lambda: build_model(model, **st))  # fmt: skip
        c.recover()
        t0 = time.perf_counter()
        run_to_end(c)
        return c.live.applied / (time.perf_counter() - t0)

    setups = [("blade_chest", {"dims": 16}), (served.model, dict(served.model_settings))]
    with tempfile.TemporaryDirectory() as d:
        proc, port = start_redis(Path(d))
        try:
            r = redis.Redis(port=port)
            bs.fill(r, bs.event_lines(n, n_ent, 0))
            for k, (model, st) in enumerate(setups):
                consume(r, f"warm{k}", 1000, d, model, st)  # kernels, page cache
            print(f"\n{n:,} events in a redis stream; consumer rates, medians of 3 runs")
            for batch in (100, 1000):
                rows = []
                for rep in range(3):
                    empty = bs.empty_consumer(r, f"e{batch}-{rep}", batch)
                    got = [consume(r, f"{k}-{batch}-{rep}", batch, d, model, st)
                           for k, (model, st) in enumerate(setups)]  # fmt: skip
                    rows.append([empty, *got])
                a = np.array(rows)
                med = np.median(a, axis=0)
                of_empty = np.median(a[:, 1:] / a[:, :1], axis=0)
                ratio = ", ".join(f"{x:.2f}" for x in a[:, 2] / a[:, 1])
                print(f"batch {batch:4d}: empty {med[0]:,.0f} ev/s; blade_chest d=16 "
                      f"{med[1]:,.0f} ({of_empty[0]:.3f} of empty); {served.model} "
                      f"{med[2]:,.0f} ({of_empty[1]:.3f} of empty); default / blade-chest "
                      f"per run: {ratio}")  # fmt: skip
        finally:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--events", type=int, default=1_000_000)
    ap.add_argument("--entities", type=int, default=100_000)
    ap.add_argument("--slow-events", type=int, default=20_000)
    ap.add_argument("--parsed-events", type=int, default=200_000)
    ap.add_argument("--rating-events", type=int, default=200_000)
    ap.add_argument("--default-events", type=int, default=100_000)
    ap.add_argument(
        "--only",
        choices=("encoded", "parsed", "ratings", "memory", "default", "default-service"),
        default=None,
    )
    ap.add_argument("--memory-entities", type=int, default=1_000_000)
    args = ap.parse_args()
    run = {
        "encoded": lambda: speed(args.events, args.entities, args.slow_events),
        "parsed": lambda: speed_events(args.parsed_events, args.entities),
        "ratings": lambda: speed_ratings(args.rating_events, args.entities, args.slow_events),
        "memory": lambda: memory(args.memory_entities),
        "default": lambda: speed_default(args.default_events, args.entities),
        "default-service": lambda: speed_default_service(args.default_events, 5_000),
    }
    for name, part in run.items():
        if args.only in (None, name):
            part()


if __name__ == "__main__":
    main()
