"""A windowed, age-weighted logistic strength fit, refitted every few matches.

A candidate member measured on the first 80% of the football results (not shipped):
every ``--every`` matches, fit ``P(home scores) = sigmoid(h + s_home - s_away)`` by
Newton's method (warm-started, L2 pull ``--l2`` on the strengths, none on ``h``)
to the matches of the last ``--window-days``, each weighted by
``0.5 ** (age in days / --half-life-days)``; forecast the next matches with the
probit-widened logit (the Laplace covariance, the inverse Hessian). Prints the log
loss and calibration slope on matches 5,607-11,214 and the cost per event::

    python bench/football_events.py football.jsonl --first-80 football80.jsonl
    python bench/football_window_refit.py football80.jsonl
"""

from __future__ import annotations

import argparse
import itertools
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from streamrate.calibration import calibration_slope_intercept, log_loss
from streamrate.events import read_events


def refit_forecasts(
    home: np.ndarray,
    away: np.ndarray,
    y: np.ndarray,
    day: np.ndarray,
    window_days: float,
    half_life_days: float,
    l2: float,
    every: int,
    start: int = 200,
) -> np.ndarray:
    n_teams = int(max(home.max(), away.max())) + 1
    p = n_teams + 1  # strengths, then the home advantage
    beta = np.zeros(p)
    out = np.full(len(y), 0.5)
    for i in range(start, len(y), every):
        lo = int(np.searchsorted(day, day[i - 1] - window_days))
        a, b, yy = home[lo:i], away[lo:i], y[lo:i]
        wt = 0.5 ** ((day[i - 1] - day[lo:i]) / half_life_days)
        x = np.zeros((i - lo, p))
        rows = np.arange(i - lo)
        x[rows, a] = 1.0
        x[rows, b] = -1.0
        x[:, -1] = 1.0
        ridge = np.full(p, l2)
        ridge[-1] = 1e-6
        for _ in range(20):
            q = 1.0 / (1.0 + np.exp(-(x @ beta)))
            grad = x.T @ (wt * (yy - q)) - ridge * beta
            hess = (x * (wt * q * (1.0 - q))[:, None]).T @ x + np.diag(ridge)
            step = np.linalg.solve(hess, grad)
            beta += step
            if np.abs(step).max() < 1e-8:
                break
        cov = np.linalg.inv(hess)
        j = slice(i, min(i + every, len(y)))
        ha, hb = home[j], away[j]
        m = beta[ha] - beta[hb] + beta[-1]
        v = cov[ha, ha] + cov[hb, hb] - 2 * cov[ha, hb] + cov[-1, -1]
        v += 2 * (cov[ha, -1] - cov[hb, -1])
        out[j] = 1.0 / (1.0 + np.exp(-m / np.sqrt(1.0 + np.pi * v / 8.0)))
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("file", nargs="?", default="football80.jsonl")
    ap.add_argument("--every", type=int, default=9)
    ap.add_argument("--score-from", type=int, default=5607)
    args = ap.parse_args()
    events = list(read_events(args.file))
    ids: dict[str, int] = {}
    for ev in events:
        for e in (*ev.first, *ev.second):
            ids.setdefault(e, len(ids))
    home = np.array([ids[ev.first[0]] for ev in events])
    away = np.array([ids[ev.second[0]] for ev in events])
    y = np.array([ev.score for ev in events])
    day = np.array([ev.finished_at.timestamp() / 86_400.0 for ev in events])
    scored = slice(args.score_from, len(events))
    head = ("window d", "half-life d", "l2", "log loss", "slope", "us/event")
    print("".join(f"{h:>{w}}" for h, w in zip(head, (9, 12, 5, 10, 7, 10), strict=True)))
    for window, half, l2 in itertools.product((730.0, 1460.0), (180.0, 365.0, 730.0), (1.0, 3.0)):
        t = time.perf_counter()
        e = refit_forecasts(home, away, y, day, window, half, l2, args.every)
        cost = (time.perf_counter() - t) / len(events) * 1e6
        slope, _ = calibration_slope_intercept(e[scored], y[scored])
        loss = log_loss(e[scored], y[scored])
        print(f"{window:>9.0f}{half:>12.0f}{l2:>5.0f}{loss:>10.4f}{slope:>7.2f}{cost:>10.0f}")


if __name__ == "__main__":
    main()
