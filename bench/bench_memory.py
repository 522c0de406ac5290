"""Resident memory of a model holding many entities, measured in a process of its own.

Run by hand:  python bench/bench_memory.py [--entities 1000000] [--dims 16] [--batch 1000]

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
    table = model.entities_
    arrays = [model.own_, model.acc_, model.last_s_, model.feat_idx_, model.feat_val_]
    array_bytes = sum(a[:n].nbytes for a in arrays if a.shape[0]) + table.counts[:n].nbytes
    id_bytes = (
        sys.getsizeof(table._rows)
        + sys.getsizeof(table._ids)
        + sum(sys.getsizeof(s) for s in table._ids)
    )
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


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--entities", type=int, default=1_000_000)
    ap.add_argument("--dims", type=int, default=16)
    ap.add_argument("--batch", type=int, default=1000)
    ap.add_argument("--context", default="none", choices=("none", "stacked", "gated"))
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--former", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args()
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
