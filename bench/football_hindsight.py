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
- ``trueskill`` and ``glicko2`` (with their learned first-side advantage),
  ``bayes_strength`` (the family of the served default's members: season pull,
  drifting first-side advantage, newcomer offset), ``bradley_terry`` and
  ``blade_chest`` of this project, their step sizes and uncertainty settings tuned
  the same way through the model API (each trial replays the whole file with
  ``learn_many``).
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
from streamrate.models.mixture import DEFAULT_MEMBERS
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


def model_forecasts(kind: str, events: list[MatchEvent], settings: dict[str, Any]) -> np.ndarray:
    model = build_model(kind, **settings)
    return np.asarray(model.learn_many(events).expected_score, dtype=np.float64)


def model_loss(kind: str, events: list[MatchEvent], burn: int, settings: dict[str, Any]) -> float:
    p = model_forecasts(kind, events, settings)
    y = np.array([ev.score for ev in events])
    return log_loss(p[burn:], y[burn:])


def best_pool(forecasts: list[np.ndarray], y: np.ndarray) -> tuple[float, float]:
    """Log loss of the best fixed pools of tuned forecasts, weights also chosen in
    hindsight: (linear pool, logit pool with a scale)."""
    f = np.clip(np.stack(forecasts), 1e-9, 1 - 1e-9)
    logits = np.log(f) - np.log1p(-f)

    def weights(x: np.ndarray) -> np.ndarray:
        w = np.exp(x - x.max())
        return w / w.sum()

    def linear(x: np.ndarray) -> float:
        return log_loss(weights(x) @ f, y)

    def logit(x: np.ndarray) -> float:
        z = math.exp(x[0]) * (weights(x[1:]) @ logits)
        return log_loss(1.0 / (1.0 + np.exp(-z)), y)

    k = len(forecasts)
    opts = {"maxfev": 4000, "xatol": 1e-5, "fatol": 1e-7}
    lin = minimize(linear, np.zeros(k), method="Nelder-Mead", options=opts)
    lgt = minimize(logit, np.zeros(k + 1), method="Nelder-Mead", options=opts)
    return float(lin.fun), float(lgt.fun)


def tune_model(
    kind: str, events: list[MatchEvent], burn: int, fixed: dict[str, Any], evals: int
) -> tuple[float, dict[str, Any]]:
    """Nelder-Mead over the log of the positive settings (the logit of a fraction),
    from the preset's values."""
    base = build_model(kind, **fixed).get_params()  # type: ignore[attr-defined]
    if kind == "bayes_strength":
        names = ["prior_var", "noise_per_day", "advantage_var", "period_var", "newcomer_var"]
        names += ["shared_noise_per_day", "period_pull"]
    elif kind == "trueskill":
        names = ["sigma", "beta", "tau", "advantage_sigma", "advantage_tau", "draw_probability"]
    elif kind == "glicko2":
        names = ["initial_deviation", "initial_volatility", "tau", "advantage_k"]
        names = [k for k in names if k in base]
    else:
        names = ["lr_strength", "prior_var", "noise_per_day", "l2", "forget_per_day"]
        names += ["accum_init"] + (["lr", "init_scale"] if base["dims"] > 0 else [])
    fractions = {"period_pull", "draw_probability"}
    # zero settings start small: forgetting, noise and pulls at about 1e-5 (a pull at 0.1)
    x0 = np.array(
        [
            math.log(min(max(base[k], 0.1), 0.9) / (1 - min(max(base[k], 0.1), 0.9)))
            if k in fractions
            else math.log(max(base[k], 1e-5))
            for k in names
        ]
    )

    def value(k: str, v: float) -> float:
        return 1.0 / (1.0 + math.exp(-v)) if k in fractions else math.exp(v)

    def settings(x: np.ndarray) -> dict[str, Any]:
        return {**fixed, **{k: value(k, float(v)) for k, v in zip(names, x, strict=True)}}

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
    ap.add_argument("--only", help="families to search, comma-separated (elo, bayes_strength, ...)")
    args = ap.parse_args()
    only = set(args.only.split(",")) if args.only else None
    events = _load(args.events)
    burn = args.burn_in
    print(f"{len(events)} events, scored {len(events) - burn} (tuned on them: a hindsight bound)")
    t0 = time.perf_counter()
    y = np.array([ev.score for ev in events])
    tuned: list[np.ndarray] = []  # each family's forecasts with its hindsight settings
    if only is None or "elo" in only:
        data = _arrays(events)
        ll, best = tune_elo(data, burn, args.evals)
        tuned.append(elo_forecasts(*data[:4], int(data[4][0]), **best)[burn:])
        shown = ", ".join(f"{k}={v:.4g}" for k, v in best.items())
        print(f"elo (home bonus, season pull, newcomer start, scale): {ll:.4f}  {shown}")
        print(f"  [{time.perf_counter() - t0:.0f} s]")
    seasonal = {"period_field": "season", "newcomer_matches": 15}
    member = next(m for m in DEFAULT_MEMBERS if m["label"] == "seasonal")["settings"]
    trials: list[tuple[str, dict[str, Any]]] = [
        # the family of the served default's members: from its own defaults, and from
        # the settings of the member "seasonal" of the served default's mixture
        ("bayes_strength", seasonal),
        ("bayes_strength", {**member, **seasonal}),
        ("trueskill", {}),
        ("glicko2", {}),
        ("bradley_terry", {"backend": "numba"}),
        ("blade_chest", {"backend": "numba"}),
        ("blade_chest", {"backend": "numba", "dims": 2}),
        ("blade_chest", {"backend": "numba", "context": "none"}),
    ]
    for kind, fixed in trials:
        if only is not None and kind not in only:
            continue
        t0 = time.perf_counter()
        default = model_loss(kind, events, burn, fixed)
        ll, best = tune_model(kind, events, burn, fixed, args.evals)
        tuned.append(model_forecasts(kind, events, best)[burn:])
        shown = ", ".join(
            f"{k}={v:.4g}" if isinstance(v, float) else f"{k}={v}"
            for k, v in best.items()
            if k not in ("backend", "compiled", *seasonal)
        )
        print(f"{kind}: default {default:.4f}, hindsight {ll:.4f}  {shown}")
        print(f"  [{time.perf_counter() - t0:.0f} s]")
    if len(tuned) > 1:
        lin, lgt = best_pool(tuned, y[burn:])
        print(
            f"the {len(tuned)} tuned forecasts pooled, weights also in hindsight: "
            f"linear pool {lin:.4f}, logit pool {lgt:.4f}"
        )


if __name__ == "__main__":
    main()
