"""Resident memory of a model holding many entities, measured in a process of its own.

Run by hand:  python bench/bench_memory.py [--entities 1000000] [--dims 16] [--batch 1000]
              python bench/bench_memory.py --service [--entities 1000000] [--dims 16]
                  [--env MALLOC_MMAP_THRESHOLD_=131072 ...] [--pause-events 100000]

``--service`` measures the service itself: a ``streamrate serve`` subprocess
(blade-chest, ``--dims``, default settings otherwise: background checkpoints
to a file, retry record, quality windows; metrics on a free port) against a
``redis-server`` this script starts on a free loopback port in a temporary
directory (no persistence) and stops by its PID. After a warm-up (1,000
events among 100 entities, applied and acknowledged) it reads the service's
VmRSS from ``/proc/PID/status`` and resets its peak (VmHWM, by writing 5 to
``/proc/PID/clear_refs``); it then adds events that each name two new
entities until ``--entities`` are known, waits until every one is applied and
acknowledged (the group has no lag and nothing pending), and reads VmRSS and
VmHWM again (sampled every 0.2 s meanwhile too). The state's own bytes are
computed the same way as below, from the service's last checkpoint loaded in
this process. Printed: RSS growth and peak growth per entity and as ratios to
the state's own bytes (aims: at most 1.5 and 2). Then, at full size, it plays
``--pause-events`` more events among the known entities at a steady pace while
the service checkpoints (every 5,000 events or 5 s) and reads, from the
service's own ``/metrics``, how long each checkpoint stopped the writer
(``streamrate_checkpoint_pause_seconds``: the state copied under the model lock;
the write itself runs in the background) against the aim of 50 ms.

Without ``--service``:

A child process (this script with ``--child``) builds a blade-chest model, warms
it up (kernels compiled or loaded), reads its own VmRSS, clears its peak
(VmHWM, by writing 5 to /proc/self/clear_refs), then learns matches that each
bring two new entities until ``--entities`` are known, and reads VmRSS and VmHWM
again. The events are made and dropped batch by batch, so they do not stay in
memory. The parent prints:

* the state's own bytes: the numpy arrays' rows in use plus the id map (the
  dict, the list and the id strings, by ``sys.getsizeof``), and the bytes of the
  saved state (``to_state()`` arrays);
* the RSS growth from 0 to ``--entities`` entities and the peak growth while
  they arrived, each per entity and as a ratio to the state's own bytes;
* the same with the former growth of the arrays (doubling by concatenation),
  measured in a second child process of the same run.
"""

from __future__ import annotations

import argparse
import json
import math
import subprocess
import sys
from datetime import UTC, datetime, timedelta
from typing import Any


def _status_kb(field: str) -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    raise RuntimeError(f"{field} not in /proc/self/status")


def _clear_peak() -> bool:
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")  # resets VmHWM to the current RSS (Linux 4.0 and later)
        return True
    except OSError:
        return False


def _former_grow(self: Any, need: int) -> None:
    """How the matchup models grew their arrays before (doubling, by concatenation)."""
    import numpy as np

    from streamrate.models.matchup import hashed_uniform

    cap = self.own_.shape[0]
    if need <= cap:
        return
    new = max(need, 2 * cap, 16)
    so, D = int(self.strength), self.width
    own = np.zeros((new - cap, D), dtype=np.float32)
    step = 1 << 16
    for lo in range(cap, new, step) if self.dims else ():
        hi = min(lo + step, new)
        block = hashed_uniform(self.seed, lo, hi, 2 * self.dims)
        own[lo - cap : hi - cap, so:] = self.init_scale * block
    self.own_ = np.concatenate([self.own_, own])
    self.acc_ = np.concatenate(
        [self.acc_, np.full((new - cap, D), self.accum_init, dtype=np.float32)]
    )
    self._rows_ready = new


def child(n_ent: int, dims: int, batch: int, context: str, former: bool) -> dict[str, float]:
    import numpy as np

    from streamrate.events import MatchEvent
    from streamrate.models.base import warm_up
    from streamrate.models.matchup import BladeChest, MatchupModel

    if former:
        MatchupModel._grow = _former_grow  # type: ignore[method-assign]

    model = BladeChest(dims=dims, context=context)
    warm_up(model)
    start = datetime(2026, 3, 1, tzinfo=UTC)
    maps = ("saltflats", "ember-quarry", "glasswood", "sunken-bell")

    def events(lo: int, hi: int) -> list[MatchEvent]:
        # model_construct: the events are valid by construction; validation is
        # not what is measured here.
        return [
            MatchEvent.model_construct(
                match_id=f"m-{k}",
                finished_at=start + timedelta(seconds=k),
                first=(f"quill-{2 * k}",),
                second=(f"quill-{2 * k + 1}",),
                score=float(k % 2),
                context={"map": maps[k % 4]},
                features={},
            )
            for k in range(lo, hi)
        ]

    model.learn_many(events(0, 1))  # the first entities; everything allocated once
    rss0 = _status_kb("VmRSS")
    cleared = _clear_peak()
    hwm0 = _status_kb("VmHWM")
    for lo in range(1, n_ent // 2, batch):
        model.learn_many(events(lo, min(lo + batch, n_ent // 2)))
    rss1 = _status_kb("VmRSS")
    hwm1 = _status_kb("VmHWM")
    n = len(model.entities_)
    array_bytes, id_bytes = _own_bytes(model)
    saved = sum(np.asarray(a).nbytes for a in model.to_state().arrays.values())
    return {
        "entities": n,
        "array_bytes": array_bytes,
        "id_bytes": id_bytes,
        "saved_bytes": saved,
        "rss0_kb": rss0,
        "rss1_kb": rss1,
        "hwm0_kb": hwm0,
        "hwm1_kb": hwm1,
        "peak_cleared": cleared,
    }


def report(r: dict[str, float], dims: int, context: str, label: str) -> None:
    n = r["entities"]
    own = r["array_bytes"] + r["id_bytes"]
    growth = (r["rss1_kb"] - r["rss0_kb"]) * 1024
    base = r["rss0_kb"] if r["peak_cleared"] else r["hwm0_kb"]
    peak = (r["hwm1_kb"] - base) * 1024
    print(f"blade_chest d={dims} (context {context}), {n:,} entities, in a child process: {label}")
    print(f"  state's own bytes: {own / n:8.1f} per entity "
          f"(arrays {r['array_bytes'] / n:.1f}, id map {r['id_bytes'] / n:.1f}); "
          f"saved state {r['saved_bytes'] / n:.1f}")  # fmt: skip
    print(f"  RSS growth:        {growth / n:8.1f} per entity = {growth / own:.2f} x own bytes "
          f"({growth / 2**20:,.0f} MiB)")  # fmt: skip
    note = "" if r["peak_cleared"] else " (peak not reset: includes start-up)"
    print(f"  peak growth:       {peak / n:8.1f} per entity = {peak / own:.2f} x own bytes "
          f"({peak / 2**20:,.0f} MiB){note}")  # fmt: skip


def _proc_kb(pid: int, field: str) -> int:
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    raise RuntimeError(f"{field} not in /proc/{pid}/status")


def _own_bytes(model: Any) -> tuple[int, int]:
    """(bytes of the per-entity arrays' rows in use, bytes of the id map): the
    state's own bytes, as :func:`child` counts them."""
    n = len(model.entities_)
    table = model.entities_
    arrays = [model.own_, model.acc_, model.last_s_, model.feat_idx_, model.feat_val_]
    array_bytes = sum(a[:n].nbytes for a in arrays if a.shape[0]) + table.counts[:n].nbytes
    id_bytes = (
        sys.getsizeof(table._rows)
        + sys.getsizeof(table._ids)
        + sum(sys.getsizeof(s) for s in table._ids)
    )
    return array_bytes, id_bytes


def _scrape(metrics_port: int) -> list[Any]:
    import urllib.request

    from prometheus_client.parser import text_string_to_metric_families

    with urllib.request.urlopen(f"http://127.0.0.1:{metrics_port}/metrics", timeout=10) as resp:
        return list(text_string_to_metric_families(resp.read().decode()))


def _counter_sum(metrics_port: int, name: str) -> float:
    """The sum of a counter's series (all labels), scraped."""
    fams = [f for f in _scrape(metrics_port) if f.name == name.removesuffix("_total")]
    return sum(x.value for f in fams for x in f.samples if x.name == name)


def _buckets(metrics_port: int, name: str) -> dict[str, int]:
    """A histogram of the service's (one space), scraped: cumulative count by ``le``."""
    out: dict[str, int] = {}
    for fam in _scrape(metrics_port):
        if fam.name == name:
            for sample in fam.samples:
                if sample.name.endswith("_bucket"):
                    out[sample.labels["le"]] = int(sample.value)
    return out


def service(
    n_ent: int, dims: int, batch: int, env: list[str], pause_events: int, every: tuple[int, float]
) -> None:
    import json as _json
    import os
    import shutil
    import signal
    import socket
    import tempfile
    import time
    from datetime import timedelta
    from pathlib import Path

    import redis

    from streamrate.checkpoint import decode_checkpoint
    from streamrate.models.registry import model_from_state

    def free_port() -> int:
        with socket.socket() as sock:
            sock.bind(("127.0.0.1", 0))
            return int(sock.getsockname()[1])

    stream = "{sr:duel}:events"
    now = datetime.now(UTC).replace(microsecond=0)

    def line(k: int, a: str, b: str) -> str:
        t = (now - timedelta(hours=2) + timedelta(milliseconds=k)).isoformat()
        return _json.dumps({"match_id": f"m-{k}", "finished_at": t.replace("+00:00", "Z"),
                            "first": [a], "second": [b], "score": k % 2,
                            "context": {"map": ("saltflats", "glasswood")[k % 2]}})  # fmt: skip

    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        port = free_port()
        exe = shutil.which("redis-server") or "/usr/bin/redis-server"
        rs = subprocess.Popen(
            [exe, "--port", str(port), "--bind", "127.0.0.1", "--dir", d, "--save", "",
             "--appendonly", "no", "--daemonize", "no"],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        )  # fmt: skip
        svc: subprocess.Popen[bytes] | None = None
        try:
            r = redis.Redis(port=port)
            for _ in range(500):
                try:
                    r.ping()
                    break
                except redis.ConnectionError:
                    time.sleep(0.02)
            cfg = tmp / "serve.toml"
            mport = free_port()
            cfg.write_text(
                f'[redis]\nurl = "redis://127.0.0.1:{port}/0"\n'
                f'[checkpoint]\ndir = "{tmp / "ck"}"\n[metrics]\nport = {mport}\n'
                '[[spaces]]\nname = "duel"\nmodel = "blade_chest"\n'
                f"batch_count = {batch}\ncheckpoint_every_events = {every[0]}\n"
                f"checkpoint_every_s = {every[1]}\n[spaces.model_settings]\ndims = {dims}\n"
            )
            log = tmp / "serve.log"

            def fill(lo: int, hi: int, ids: Any) -> None:
                pipe = r.pipeline(transaction=False)
                for k in range(lo, hi):
                    a, b = ids(k)
                    pipe.xadd(stream, {"event": line(k, a, b)})
                    if (k - lo) % 5000 == 4999:
                        pipe.execute()
                pipe.execute()

            checkpointing = every[0] < 10**8 or every[1] < 10**5

            def settled() -> bool:
                """Every entry handled (the service's own count) and, when it
                checkpoints, acknowledged."""
                try:
                    handled = _counter_sum(mport, "streamrate_consumer_events_total")
                except OSError:
                    return False  # not serving metrics yet
                if handled < r.xlen(stream):
                    return False
                groups = r.xinfo_groups(stream)
                return not checkpointing or all(g["pending"] == 0 for g in groups)

            def wait(what: str, timeout_s: float = 1800.0) -> tuple[int, int]:
                deadline = time.monotonic() + timeout_s
                top_rss = 0
                assert svc is not None
                while not settled():
                    if svc.poll() is not None or time.monotonic() > deadline:
                        raise RuntimeError(f"{what}: service log:\n{log.read_text()[-3000:]}")
                    top_rss = max(top_rss, _proc_kb(svc.pid, "VmRSS"))
                    time.sleep(0.2)
                return top_rss, _proc_kb(svc.pid, "VmRSS")

            warm = 1000
            fill(0, warm, lambda k: (f"warm-{k % 100}", f"warm-{(k + 1 + k % 7) % 100}"))
            with open(log, "wb") as fh:
                svc = subprocess.Popen(
                    [sys.executable, "-m", "streamrate", "serve", "--config", str(cfg)],
                    stdout=fh, stderr=subprocess.STDOUT,
                    env={**os.environ, **dict(e.split("=", 1) for e in env)},
                )  # fmt: skip
            wait("warm-up")
            time.sleep(1.0)  # a last checkpoint, quiet threads
            rss0 = _proc_kb(svc.pid, "VmRSS")
            try:
                with open(f"/proc/{svc.pid}/clear_refs", "w") as f:
                    f.write("5")
                hwm0 = rss0
            except OSError:
                hwm0 = _proc_kb(svc.pid, "VmHWM")
            t0 = time.perf_counter()
            pairs = n_ent // 2
            step = 50_000
            top = 0
            for lo in range(warm, warm + pairs, step):
                hi = min(lo + step, warm + pairs)
                fill(lo, hi, lambda k: (f"quill-{2 * (k - warm)}", f"quill-{2 * (k - warm) + 1}"))
                top = max(top, _proc_kb(svc.pid, "VmRSS"))
            top_wait, rss1 = wait("one million entities")
            took = time.perf_counter() - t0
            time.sleep(1.0)
            rss1 = _proc_kb(svc.pid, "VmRSS")
            hwm1 = _proc_kb(svc.pid, "VmHWM")  # memory is read before the pause part
            top = max(top, top_wait)
            # The checkpoint pause at full size: events among the entities now known,
            # at a steady pace, while checkpoints are taken (by default every 5,000
            # events or 5 s, as the service does).
            pause_name = "streamrate_checkpoint_pause_seconds"
            batch_name = "streamrate_consumer_batch_processing_seconds"
            before = _buckets(mport, pause_name)
            before_b = _buckets(mport, batch_name)

            def among(k: int) -> tuple[str, str]:
                a = (7919 * k) % n_ent
                return f"quill-{a}", f"quill-{(a + 1 + k % 97) % n_ent}"

            played = 0
            t_p = time.perf_counter()
            while played < pause_events:
                lo = warm + pairs + played
                fill(lo, lo + 10_000, among)
                played += 10_000
                time.sleep(0.25)
            wait("events among one million entities")
            took_p = time.perf_counter() - t_p
            pauses = {le: n - before.get(le, 0) for le, n in _buckets(mport, pause_name).items()}
            batches = {le: n - before_b.get(le, 0) for le, n in _buckets(mport, batch_name).items()}
            os.kill(svc.pid, signal.SIGTERM)
            svc.wait(300)
            svc = None
            ck = decode_checkpoint((tmp / "ck" / "duel.ckpt.npz").read_bytes(), 10**6, 1e12)
        finally:
            if svc is not None:
                svc.kill()
                svc.wait()
            rs.kill()
            rs.wait()
    model = model_from_state(ck.state)
    array_bytes, id_bytes = _own_bytes(model)
    n = len(model.entities_)  # type: ignore[attr-defined]
    own = array_bytes + id_bytes
    growth = (rss1 - rss0) * 1024
    peak = (hwm1 - hwm0) * 1024
    mib = 2**20
    print(
        f"streamrate serve (blade_chest d={dims}, batch {batch}), {n:,} entities "
        f"({n - 100:,} added in {took:.0f} s), RSS of the service process"
        f"{' with ' + ' '.join(env) if env else ''}:"
    )
    print(
        f"  state's own bytes: {own / n:8.1f} per entity (arrays {array_bytes / n:.1f}, "
        f"id map {id_bytes / n:.1f}); {own / mib:,.0f} MiB"
    )
    print(
        f"  RSS {rss0 / 1024:,.0f} -> {rss1 / 1024:,.0f} MiB; growth {growth / n:8.1f} "
        f"per entity = {growth / own:.2f} x own bytes (aim <= 1.5)"
    )
    print(
        f"  peak (VmHWM) growth:  {peak / n:8.1f} per entity = {peak / own:.2f} x own bytes "
        f"(peak {hwm1 / 1024:,.0f} MiB; aim <= 2); largest sampled RSS {top / 1024:,.0f} MiB"
    )
    for label, got in (("checkpoint pauses", pauses), ("batches handled", batches)):
        total = got.get("+Inf", 0)
        if not total:
            print(f"  {label}: none")
            continue
        slowest = min((float(le) for le, c in got.items() if c == total), default=math.inf)
        shown = ", ".join(f"<= {le} s: {c}" for le, c in got.items() if 0 < c < total)
        print(f"  {label}: {total}, every one <= {slowest:g} s{'; ' + shown if shown else ''}")
    print(
        f"  (at {n:,} entities, {pause_events:,} events in {took_p:.0f} s; checkpoint pause:"
        " streamrate_checkpoint_pause_seconds, the writer stopped to start a checkpoint,"
        " aim < 50 ms; batches: streamrate_consumer_batch_processing_seconds, a batch's"
        " validation and update, slowed if the saving thread holds the interpreter)"
    )


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--entities", type=int, default=1_000_000)
    ap.add_argument("--dims", type=int, default=16)
    ap.add_argument("--batch", type=int, default=1000)
    ap.add_argument("--context", default="none", choices=("none", "stacked", "gated"))
    ap.add_argument("--service", action="store_true", help="measure a streamrate serve process")
    ap.add_argument(
        "--env", action="append", default=[], help="KEY=VALUE for the service's environment"
    )
    ap.add_argument(
        "--pause-events",
        type=int,
        default=100_000,
        help="with --service: events played among the entities once all are known, while"
        " the writer's checkpoint pauses are counted",
    )
    ap.add_argument(
        "--checkpoint-every-events",
        type=int,
        default=5000,
        help="with --service: the space's checkpoint cadence (the service's default);"
        " a huge value and --checkpoint-every-s 1e6 give the same run without checkpoints",
    )
    ap.add_argument("--checkpoint-every-s", type=float, default=5.0)
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--former", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.service:
        every = (args.checkpoint_every_events, args.checkpoint_every_s)
        service(args.entities, args.dims, args.batch, args.env, args.pause_events, every)
        return
    if args.child:
        got = child(args.entities, args.dims, args.batch, args.context, args.former)
        print(json.dumps(got))
        return
    cmd = [sys.executable, __file__, "--child", "--entities", str(args.entities),
           "--dims", str(args.dims), "--batch", str(args.batch),
           "--context", args.context]  # fmt: skip
    for label, extra in (("chunked growth", []), ("former growth (doubling)", ["--former"])):
        out = subprocess.run(cmd + extra, check=True, capture_output=True, text=True).stdout
        report(json.loads(out.strip().splitlines()[-1]), args.dims, args.context, label)


if __name__ == "__main__":
    main()
