"""Cost of running models as a challenger set, as a ratio to running them alone.

Run by hand: ``python bench/bench_challengers.py [--matches N] [--chunk K]``.
Feeds the same events in chunks of ``--chunk`` (the consumer's lock chunk) to
Elo, Bradley-Terry and blade-chest d=8, each alone (the baseline, measured in the
same run), then to a challenger set of the three; prints events/s and the ratio
of the set's time to the sum of the members' times (1.0 = no overhead). Then the
time of one ``compare`` over a full 5,000-event window against one chunk update.
"""

from __future__ import annotations

import argparse
import time
from typing import Any

from streamrate.challengers import ChallengerSet
from streamrate.models.base import Model
from streamrate.models.registry import build_model
from streamrate.simulate import simulate, world_spec

MEMBERS: dict[str, dict[str, Any]] = {
    "elo": {"kind": "elo"},
    "bradley_terry": {"kind": "bradley_terry"},
    "blade_chest": {"kind": "blade_chest", "dims": 8, "context": "stacked"},
}


def _run(model: Model, events: list[Any], chunk: int) -> float:
    t0 = time.perf_counter()
    for lo in range(0, len(events), chunk):
        model.learn_many(events[lo : lo + chunk])
    return time.perf_counter() - t0


def _build(spec: dict[str, Any]) -> Model:
    return build_model(spec["kind"], **{k: v for k, v in spec.items() if k != "kind"})


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--matches", type=int, default=50_000)
    ap.add_argument("--chunk", type=int, default=64)
    args = ap.parse_args()
    events = simulate(world_spec("cyclic", matches=args.matches, seed=0)).events
    n = len(events)
    for spec in MEMBERS.values():  # compile the kernels outside the timings
        _run(_build(spec), events[:200], args.chunk)
    alone = {label: _run(_build(spec), events, args.chunk) for label, spec in MEMBERS.items()}
    cs = ChallengerSet(MEMBERS)
    together = _run(cs, events, args.chunk)
    for label, t in alone.items():
        print(f"{label:<14} alone: {n / t:>10,.0f} events/s")
    total = sum(alone.values())
    print(f"sum of members alone: {n / total:>10,.0f} events/s")
    print(f"challenger set      : {n / together:>10,.0f} events/s")
    print(f"set time / sum of members' times: {together / total:.3f}")
    t0 = time.perf_counter()
    reps = 5
    for _ in range(reps):
        cs.compare()
    compare_s = (time.perf_counter() - t0) / reps
    chunk_s = together / max(1, n // args.chunk)
    print(
        f"compare over {cs.size_} events: {compare_s * 1e3:.1f} ms "
        f"= {compare_s / chunk_s:.0f} chunk updates of {args.chunk} events"
    )


if __name__ == "__main__":
    main()
