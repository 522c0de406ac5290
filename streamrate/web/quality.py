"""The board's quality panel: read from the service's Prometheus metrics page.

Per model of the space (challengers each under their own label): the recent
window's log loss, Brier score, ECE, calibration slope and intercept and event
count; the reference window's log loss; PSI per drift feature; the Page-Hinkley
statistic per direction and how often it fired. A bounded history of the recent
log loss per model feeds the board's small charts.

The reliability diagram is drawn from the recent window's ten equal-width bins
(``bins``: per bin its mean forecast, observed share and event count, the
means ``None`` for an empty bin), beside the fitted calibration curve
``P(y) = sigmoid(a + b logit p)`` (slope ``b``, intercept ``a``).

>>> text = '''# TYPE streamrate_quality_log_loss gauge
... streamrate_quality_log_loss{space="duel",model="elo",window="recent",group="all"} 0.65
... '''
>>> read_quality(text, "duel")["models"][0]["log_loss"]
0.65
"""

from __future__ import annotations

import asyncio
import contextlib
import math
import time
from collections import deque
from typing import Any

from streamrate.errors import StreamrateError
from streamrate.watch.health import fetch_metrics, metric_samples

_RECENT = {"window": "recent", "group": "all"}
_FIELDS = {
    "log_loss": "streamrate_quality_log_loss",
    "brier": "streamrate_quality_brier_score",
    "ece": "streamrate_quality_ece",
    "slope": "streamrate_quality_calibration_slope",
    "intercept": "streamrate_quality_calibration_intercept",
    "accuracy": "streamrate_quality_accuracy_ratio",
    "n": "streamrate_quality_window_events",
}
_BIN_FIELDS = {
    "forecast": "streamrate_quality_bin_forecast_ratio",
    "observed": "streamrate_quality_bin_observed_ratio",
    "n": "streamrate_quality_bin_events",
}


def _num(v: float) -> float | None:
    return v if math.isfinite(v) else None


def read_quality(text: str, space: str) -> dict[str, Any]:
    """The quality figures of one space in a metrics page, as JSON-ready values."""
    s = metric_samples(text)
    models: dict[str, dict[str, Any]] = {}
    for field, name in _FIELDS.items():
        for labels, v in s.get(name, []):
            if labels.get("space") != space or any(labels.get(k) != w for k, w in _RECENT.items()):
                continue
            models.setdefault(labels["model"], {"model": labels["model"]})[field] = _num(v)
    bins: dict[tuple[str, int], dict[str, Any]] = {}
    for field, name in _BIN_FIELDS.items():
        for labels, v in s.get(name, []):
            if labels.get("space") != space or any(labels.get(k) != w for k, w in _RECENT.items()):
                continue
            if labels["model"] in models and labels.get("bin", "").isdigit():
                key = (labels["model"], int(labels["bin"]))
                bins.setdefault(key, {"bin": key[1]})[field] = _num(v)
    for (model, _), row in sorted(bins.items()):
        models[model].setdefault("bins", []).append(row)
    for labels, v in s.get("streamrate_quality_log_loss", []):
        ok = labels.get("window") == "reference" and labels.get("group") == "all"
        if ok and labels.get("space") == space and labels["model"] in models:
            models[labels["model"]]["reference_log_loss"] = _num(v)
    psi = [
        {"model": lb["model"], "feature": lb["feature"], "psi": _num(v)}
        for lb, v in s.get("streamrate_drift_psi", [])
        if lb.get("space") == space
    ]
    change: dict[tuple[str, str], dict[str, Any]] = {}
    for lb, v in s.get("streamrate_drift_change_statistic", []):
        if lb.get("space") == space:
            row = change.setdefault((lb["model"], lb["direction"]), {"detected": 0.0})
            row.update(model=lb["model"], direction=lb["direction"], statistic=_num(v))
    for lb, v in s.get("streamrate_drift_change_detected_total", []):
        if lb.get("space") == space:
            row = change.setdefault((lb["model"], lb["direction"]), {"statistic": None})
            row.update(model=lb["model"], direction=lb["direction"], detected=v)
    return {
        "models": [models[m] for m in sorted(models)],
        "psi": sorted(psi, key=lambda r: (r["model"], r["feature"])),
        "change": [change[k] for k in sorted(change)],
    }


class QualityPoller:
    """Reads the metrics page every ``every_s``; keeps the last reading and a log-loss history."""

    def __init__(self, url: str | None, space: str, every_s: float, history: int) -> None:
        self.url, self.space, self.every_s = url, space, every_s
        self.latest: dict[str, Any] = {"ok": False, "error": "no metrics URL configured"}
        self.history: deque[dict[str, Any]] = deque(maxlen=history)

    async def poll_once(self) -> None:
        if self.url is None:
            return
        try:
            text = await asyncio.to_thread(fetch_metrics, self.url, 5.0)
            reading = read_quality(text, self.space)
        except StreamrateError as exc:
            self.latest = {"ok": False, "error": str(exc), "at_ms": int(time.time() * 1000)}
            return
        at_ms = int(time.time() * 1000)
        self.latest = {"ok": True, "at_ms": at_ms, **reading}
        losses = {m["model"]: m.get("log_loss") for m in reading["models"]}
        if any(v is not None for v in losses.values()):
            self.history.append({"at_ms": at_ms, "log_loss": losses})

    async def run(self, stop: asyncio.Event) -> None:
        while not stop.is_set() and self.url is not None:
            await self.poll_once()
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(stop.wait(), self.every_s)

    def as_json(self) -> dict[str, Any]:
        return {**self.latest, "space": self.space, "history": list(self.history)}
