"""Cost of the live quality statistics per event, as a ratio to the model's own update.

Run by hand: ``python bench/bench_quality.py [--matches N]``. Prints events/s of
Elo alone (the baseline, measured in the same run), of the quality observer alone
(default settings: 1,000/10,000-event windows, publishing every 500 events) and
of the online recalibrator, plus the ratios; then Elo's mini-batch path with and
without the recalibration wrapper.
"""

from __future__ import annotations

import argparse
import time

from prometheus_client import CollectorRegistry

from streamrate.config import QualitySettings
from streamrate.models.base import Model, Prediction
from streamrate.models.elo import Elo
from streamrate.quality_metrics import QualityMetrics, quality_observers
from streamrate.recalibrate import OnlineRecalibrator, Recalibrated
from streamrate.simulate import simulate, world_spec


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--matches", type=int, default=50_000)
    args = ap.parse_args()
    world = simulate(world_spec("patch", matches=args.matches, seed=0))
    events = world.events

    Elo().learn_many(events[:100])  # compile outside the timing
    t0 = time.perf_counter()
    model = Elo()
    preds = [model.learn(e) for e in events]
    t_model = time.perf_counter() - t0

    settings = QualitySettings(drift_fields=("map", "patch"), group_field="map")
    (obs,) = quality_observers("duel", settings, QualityMetrics(CollectorRegistry()))
    t0 = time.perf_counter()
    for e, p in zip(events, preds, strict=True):
        obs(e, p, "elo")
    t_obs = time.perf_counter() - t0

    rc = OnlineRecalibrator()
    t0 = time.perf_counter()
    for e, p in zip(events, preds, strict=True):
        rc.apply(Prediction(p.p_win, p.p_draw))
        rc.learn(p.expected_score, e.score)
    t_rc = time.perf_counter() - t0

    def batched(model: Model) -> float:
        t0 = time.perf_counter()
        for lo in range(0, len(events), 500):
            model.learn_batch(events[lo : lo + 500])
        return time.perf_counter() - t0

    t_elo_batch = batched(Elo())
    t_wrapped_batch = batched(Recalibrated(base="elo"))

    n = len(events)
    print(f"events: {n}")
    print(f"elo learn (per event, baseline): {n / t_model:12,.0f} events/s")
    print(f"quality observer:                {n / t_obs:12,.0f} events/s")
    print(f"online recalibrator:             {n / t_rc:12,.0f} events/s")
    print(f"observer time / elo time:        {t_obs / t_model:.2f}")
    print(f"recalibrator time / elo time:    {t_rc / t_model:.2f}")
    print(f"elo learn_batch (500 a batch):   {n / t_elo_batch:12,.0f} events/s")
    print(f"recalibrated elo learn_batch:    {n / t_wrapped_batch:12,.0f} events/s")
    print(f"recalibrated / plain (batched):  {t_wrapped_batch / t_elo_batch:.2f}")


if __name__ == "__main__":
    main()
