"""Hindsight oracle for the football aim: settings tuned ON the scored last 20%.

This deliberately cheats: every setting below is chosen by the log loss of the very
matches it is scored on (the last 20% of the German football results, 2,803 matches
after a burn-in of 11,215; draws score 0.5). It gives a lower reference for what a
model family can reach there at all, not a fair score, and nothing here may be
used to choose a default.

    python bench/football_hindsight.py football.jsonl

Families:

- an Elo in logit units with a home bonus, a pull toward the mean between seasons,
  a starting rating for newcomers (promoted sides) and a forecast scale
  (``p = sigmoid(scale * (r_home - r_away + home))``, the update uses the unscaled
  logit), tuned by Nelder-Mead from a grid of starts;
- ``bradley_terry`` and ``blade_chest`` of this project, their step sizes and
  uncertainty settings tuned the same way through the model API (each trial replays
  the whole file with ``learn_many``).
"""

from __future__ import annotations

import argparse
import itertools
import math
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
from scipy.optimize import minimize

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from streamrate.calibration import log_loss
from streamrate.evaluate import numbered_events
from streamrate.events import MatchEvent
from streamrate.models.registry import build_model


def _load(path: str) -> list[MatchEvent]:
    return [ev for _, _, ev in numbered_events(path)]


def _arrays(events: list[MatchEvent]) -> tuple[np.ndarray, ...]:
    ids: dict[str, int] = {}
    home = np.array([ids.setdefault(ev.first[0], len(ids)) for ev in events], dtype=np.int64)
    away = np.array([ids.setdefault(ev.second[0], len(ids)) for ev in events], dtype=np.int64)
    seasons = [str(ev.context.get("season", "")) for ev in events]
    new_season = np.array(
        [i > 0 and s != seasons[i - 1] for i, s in enumerate(seasons)], dtype=np.bool_
    )
    y = np.array([ev.score for ev in events], dtype=np.float64)
    return home, away, new_season, y, np.array([len(ids)])


def elo_forecasts(
    home: np.ndarray,
    away: np.ndarray,
    new_season: np.ndarray,
    y: np.ndarray,
    n: int,
    k: float,
    bonus: float,
    pull: float,
    scale: float,
    start: float,
) -> np.ndarray:
    """Predict-then-learn Elo in logit units; returns the forecast before each match."""
    r = np.zeros(n)
    seen = np.zeros(n, dtype=np.bool_)
    out = np.empty(len(y))
    rl, sl = r.tolist(), seen.tolist()
    hl, al, yl, nl = home.tolist(), away.tolist(), y.tolist(), new_season.tolist()
    for e in range(len(yl)):
        if nl[e]:
            active = [rl[i] for i in range(n) if sl[i]]
            mean = sum(active) / len(active)
            for i in range(n):
                if sl[i]:
                    rl[i] += pull * (mean - rl[i])
        h, a = hl[e], al[e]
        for i in (h, a):
            if not sl[i]:
                sl[i] = True
                rl[i] = start
        d = rl[h] - rl[a] + bonus
        p = 1.0 / (1.0 + math.exp(-d))
        z = max(min(scale * d, 30.0), -30.0)
        out[e] = 1.0 / (1.0 + math.exp(-z))
        step = k * (yl[e] - p)
        rl[h] += step
        rl[a] -= step
    return out


def tune_elo(data: tuple[np.ndarray, ...], burn: int, evals: int) -> tuple[float, dict[str, float]]:
    home, away, new_season, y, n = data
    names = ("k", "bonus", "pull", "scale", "start")

    def loss(x: np.ndarray) -> float:
        k, bonus, pull, scale, start = x
        if k <= 0 or not 0 <= pull <= 1 or scale <= 0:
            return 10.0
        p = elo_forecasts(home, away, new_season, y, int(n[0]), k, bonus, pull, scale, start)
        return log_loss(p[burn:], y[burn:])

    best: tuple[float, np.ndarray] = (math.inf, np.zeros(5))
    for k, pull in itertools.product((0.05, 0.1, 0.2), (0.0, 0.2)):
        x0 = np.array([k, 0.4, pull, 1.0, -0.2])
        res = minimize(loss, x0, method="Nelder-Mead", options={"maxfev": evals, "xatol": 1e-4})
        if res.fun < best[0]:
            best = (float(res.fun), res.x)
    return best[0], dict(zip(names, (float(v) for v in best[1]), strict=True))


def model_loss(kind: str, events: list[MatchEvent], burn: int, settings: dict[str, Any]) -> float:
    model = build_model(kind, **settings)
    p = np.asarray(model.learn_many(events).expected_score, dtype=np.float64)
    y = np.array([ev.score for ev in events])
    return log_loss(p[burn:], y[burn:])


def tune_model(
    kind: str, events: list[MatchEvent], burn: int, fixed: dict[str, Any], evals: int
) -> tuple[float, dict[str, Any]]:
    """Nelder-Mead over the log of the positive settings, from the preset's values."""
    base = build_model(kind, **fixed).get_params()  # type: ignore[attr-defined]
    names = ["lr_strength", "prior_var", "noise_per_day", "l2", "forget_per_day", "accum_init"]
    if base["dims"] > 0:
        names += ["lr", "init_scale"]
    x0 = np.log([max(base[k], 1e-5) for k in names])  # forgetting starts at 1e-5 a day

    def settings(x: np.ndarray) -> dict[str, Any]:
        return {**fixed, **{k: float(math.exp(v)) for k, v in zip(names, x, strict=True)}}

    def loss(x: np.ndarray) -> float:
        if np.any(np.abs(x) > 25):
            return 10.0
        return model_loss(kind, events, burn, settings(x))

    res = minimize(loss, x0, method="Nelder-Mead", options={"maxfev": evals, "xatol": 1e-3})
    return float(res.fun), settings(res.x)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("events", nargs="?", default="football.jsonl")
    ap.add_argument("--burn-in", type=int, default=11215)
    ap.add_argument("--evals", type=int, default=800, help="trials per search")
    args = ap.parse_args()
    events = _load(args.events)
    burn = args.burn_in
    print(f"{len(events)} events, scored {len(events) - burn} (tuned on them: a hindsight bound)")
    t0 = time.perf_counter()
    ll, best = tune_elo(_arrays(events), burn, args.evals)
    shown = ", ".join(f"{k}={v:.4g}" for k, v in best.items())
    print(f"elo (home bonus, season pull, newcomer start, scale): {ll:.4f}  {shown}")
    print(f"  [{time.perf_counter() - t0:.0f} s]")
    trials: list[tuple[str, dict[str, Any]]] = [
        ("bradley_terry", {"backend": "numba"}),
        ("blade_chest", {"backend": "numba"}),
        ("blade_chest", {"backend": "numba", "dims": 2}),
        ("blade_chest", {"backend": "numba", "context": "none"}),
    ]
    for kind, fixed in trials:
        t0 = time.perf_counter()
        default = model_loss(kind, events, burn, fixed)
        ll, best = tune_model(kind, events, burn, fixed, args.evals)
        shown = ", ".join(
            f"{k}={v:.4g}" if isinstance(v, float) else f"{k}={v}"
            for k, v in best.items()
            if k != "backend"
        )
        print(f"{kind}: default {default:.4f}, hindsight {ll:.4f}  {shown}")
        print(f"  [{time.perf_counter() - t0:.0f} s]")


if __name__ == "__main__":
    main()
