"""Prequential replay: predict each match, then learn from it, and score the predictions.

Every event of the file trains every model, in file order. An event is *scored*
when it comes after the burn-in (an event count, or a time: events finished
strictly after it). Metrics follow :mod:`streamrate.calibration`.

File order is the order of learning. A ``finished_at`` earlier than the event
before it is an :class:`~streamrate.errors.EventError` naming the line, unless
``allow_unordered`` is set; then the file order is kept and the number of such
steps is reported (equal times are always fine).

Models are compared with the first one by a paired circular block bootstrap of
the mean per-match log-loss difference: blocks of ``ceil(n ** (1/3))``
consecutive scored matches (common practice for weakly dependent series) keep
the serial dependence of a time-ordered replay inside each resample; 2000
resamples, seeded, percentile 95% interval.
"""

from __future__ import annotations

import json
import math
import sys
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from streamrate import calibration as cal
from streamrate.errors import ConfigError, EventError
from streamrate.events import MatchEvent, parse_event
from streamrate.models.base import Model
from streamrate.modelspec import ModelSpec

CHUNK_EVENTS = 1024
BOOTSTRAP_RESAMPLES = 2000
BOOTSTRAP_LEVEL = 0.95
BOOTSTRAP_SEED = 0


def parse_burn_in(text: str | None) -> int | datetime:
    """An event count (``5000``) or a time (RFC 3339, or ``YYYY-MM-DD`` meaning midnight UTC).

    >>> parse_burn_in("200"), parse_burn_in("2026-03-02")
    (200, datetime.datetime(2026, 3, 2, 0, 0, tzinfo=datetime.timezone.utc))
    """
    if text is None or not text.strip():
        return 0
    raw = text.strip()
    if raw.isdigit():
        return int(raw)
    try:
        if len(raw) == 10:
            d = date.fromisoformat(raw)
            return datetime(d.year, d.month, d.day, tzinfo=UTC)
        when = datetime.fromisoformat(raw.replace("Z", "+00:00").replace("z", "+00:00"))
    except ValueError as exc:
        raise ConfigError(
            f"burn-in {raw!r}: expected an event count or a date (YYYY-MM-DD or RFC 3339)"
        ) from exc
    if when.tzinfo is None:
        raise ConfigError(f"burn-in {raw!r}: a time needs an offset such as Z or +02:00")
    return when


def numbered_events(path: Path | str) -> Iterator[tuple[int, int, MatchEvent]]:
    """(line number, bytes read so far, event) for each non-blank line; bad lines raise."""
    done = 0
    try:
        fh = open(path, "rb")  # noqa: SIM115 - closed by the with below; open errors differ
    except OSError as exc:
        raise EventError(f"cannot read event file {path}: {exc.strerror}") from exc
    with fh:
        for lineno, line in enumerate(fh, start=1):
            done += len(line)
            if not line.strip():
                continue
            try:
                yield lineno, done, parse_event(line)
            except EventError as exc:
                raise EventError(f"{path}:{lineno}: {exc}") from exc


@dataclass
class ReplayRecord:
    """What a replay saw: outcomes, times and each model's prequential forecasts."""

    labels: list[str]
    score: np.ndarray  # (n,) first side's score
    time_s: np.ndarray  # (n,) unix seconds
    expected: dict[str, np.ndarray]  # label -> (n,) expected score predicted before learning
    unordered_steps: int = 0


def replay(
    events: Iterator[tuple[int, MatchEvent]] | Sequence[MatchEvent],
    models: dict[str, Model],
    *,
    allow_unordered: bool = False,
    chunk_events: int = CHUNK_EVENTS,
    source: str = "events",
) -> ReplayRecord:
    """Feed events in order through every model; keep the forecast made before each update.

    ``events`` is a sequence of events or an iterator of (line number, event).
    ``learn_many`` is used on chunks: it is defined as ``learn`` in a loop.
    """
    pairs = enumerate(events, start=1) if isinstance(events, Sequence) else events
    scores: list[float] = []
    times: list[float] = []
    preds: dict[str, list[np.ndarray]] = {label: [] for label in models}
    last = -math.inf
    unordered = 0
    chunk: list[MatchEvent] = []

    def flush() -> None:
        for label, model in models.items():
            preds[label].append(np.asarray(model.learn_many(chunk).expected_score, dtype=float))
        chunk.clear()

    for lineno, ev in pairs:
        t = ev.finished_at.timestamp()
        if t < last:
            if not allow_unordered:
                raise EventError(
                    f"{source}:{lineno}: finished_at {ev.finished_at.isoformat()} is earlier "
                    "than the event before it; sort the file by time "
                    "(or allow out-of-order events)"
                )
            unordered += 1
        last = max(last, t)
        scores.append(ev.score)
        times.append(t)
        chunk.append(ev)
        if len(chunk) >= chunk_events:
            flush()
    if chunk:
        flush()
    expected = {
        label: (np.concatenate(parts) if parts else np.zeros(0)) for label, parts in preds.items()
    }
    return ReplayRecord(
        list(models), np.asarray(scores), np.asarray(times), expected, unordered_steps=unordered
    )


def scored_mask(record: ReplayRecord, burn_in: int | datetime) -> np.ndarray:
    """Which events are scored: those after the first ``burn_in`` events, or after a time."""
    n = record.score.size
    if isinstance(burn_in, datetime):
        return record.time_s > burn_in.timestamp()
    mask = np.zeros(n, dtype=bool)
    mask[min(burn_in, n) :] = True
    return mask


@dataclass(frozen=True)
class DiffInterval:
    """Bootstrap interval of mean(loss of a model - loss of the reference model)."""

    mean: float
    low: float
    high: float
    level: float
    resamples: int
    block: int

    def to_json(self, versus: str) -> dict[str, Any]:
        """The interval as reports and replies carry it."""
        return {
            "versus": versus,
            "mean": self.mean,
            "low": self.low,
            "high": self.high,
            "level": self.level,
            "resamples": self.resamples,
            "block_events": self.block,
            "method": "paired circular block bootstrap, percentile",
        }


def paired_block_bootstrap(
    loss: np.ndarray,
    reference: np.ndarray,
    *,
    resamples: int = BOOTSTRAP_RESAMPLES,
    level: float = BOOTSTRAP_LEVEL,
    seed: int = BOOTSTRAP_SEED,
    block: int | None = None,
) -> DiffInterval:
    """Circular block bootstrap percentile interval of ``mean(loss - reference)``.

    >>> rng = np.random.default_rng(1)
    >>> d = paired_block_bootstrap(rng.normal(0.1, 1, 4000), np.zeros(4000))
    >>> d.low < 0.1 < d.high
    True
    """
    diff = np.asarray(loss, dtype=float) - np.asarray(reference, dtype=float)
    n = diff.size
    if n == 0:
        return DiffInterval(math.nan, math.nan, math.nan, level, resamples, 0)
    length = block if block is not None else max(1, math.ceil(n ** (1.0 / 3.0)))
    length = min(length, n)
    n_blocks = math.ceil(n / length)
    wrapped = np.concatenate([diff, diff[: length - 1]])
    prefix = np.concatenate([[0.0], np.cumsum(wrapped)])
    block_sums = prefix[length : length + n] - prefix[:n]
    rng = np.random.default_rng(seed)
    means = np.empty(resamples)
    # Batches keep the index matrix small on long files.
    step = max(1, 2_000_000 // n_blocks)
    for lo in range(0, resamples, step):
        hi = min(resamples, lo + step)
        starts = rng.integers(0, n, (hi - lo, n_blocks))
        means[lo:hi] = block_sums[starts].sum(axis=1) / (n_blocks * length)
    alpha = (1.0 - level) / 2.0
    low, high = np.quantile(means, [alpha, 1.0 - alpha])
    return DiffInterval(float(diff.mean()), float(low), float(high), level, resamples, length)


def metrics(e: np.ndarray, y: np.ndarray) -> dict[str, Any]:
    """Every per-model figure of a report (see :mod:`streamrate.calibration`)."""
    slope, intercept = cal.calibration_slope_intercept(e, y)
    return {
        "n": int(y.size),
        "log_loss": cal.log_loss(e, y),
        "brier": cal.brier(e, y),
        "accuracy": cal.accuracy(e, y),
        "ece": cal.expected_calibration_error(e, y),
        "calibration_slope": slope,
        "calibration_intercept": intercept,
    }


@dataclass
class Truth:
    """A simulator sidecar: true expected scores in file order."""

    expected_score: np.ndarray

    @classmethod
    def for_events(cls, path: Path | str) -> Truth | None:
        """Read ``<path>.truth.json`` if it exists."""
        side = Path(f"{path}.truth.json")
        if not side.exists():
            return None
        try:
            doc = json.loads(side.read_text())
            arr = np.asarray(doc["expected_score"], dtype=np.float64)
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise ConfigError(f"{side}: not a usable truth sidecar: {exc}") from exc
        return cls(arr)


@dataclass
class Report:
    """Per-model figures (keyed by label) and the floor of the scored events if known."""

    models: dict[str, dict[str, Any]]
    scored: int
    total: int
    floor_log_loss: float | None = None
    realised_true_log_loss: float | None = None
    unordered_steps: int = 0
    reference: str = ""

    def to_json(self) -> dict[str, Any]:
        """Per-model figures keyed by label; NaN (undefined) figures become null."""
        return {label: _json_safe(row) for label, row in self.models.items()}


def _json_safe(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe(v) for v in value]
    return value


def build_report(
    record: ReplayRecord,
    specs: Sequence[ModelSpec],
    burn_in: int | datetime = 0,
    truth: Truth | None = None,
    *,
    resamples: int = BOOTSTRAP_RESAMPLES,
    seed: int = BOOTSTRAP_SEED,
) -> Report:
    """Score a replay after the burn-in and compare each model with the first."""
    mask = scored_mask(record, burn_in)
    y = record.score[mask]
    floor = realised = None
    if truth is not None:
        if truth.expected_score.size != record.score.size:
            raise ConfigError(
                f"truth sidecar has {truth.expected_score.size} forecasts "
                f"but the file has {record.score.size} events"
            )
        t = truth.expected_score[mask]
        floor = float(cal.binary_entropy(t).mean()) if t.size else math.nan
        realised = cal.log_loss(t, y)
    ref_label = specs[0].label
    ref_loss = cal.pointwise_log_loss(record.expected[ref_label][mask], y)
    models: dict[str, dict[str, Any]] = {}
    for spec in specs:
        e = record.expected[spec.label][mask]
        row: dict[str, Any] = {"kind": spec.kind, "settings": spec.settings}
        row.update(metrics(e, y))
        row["floor_log_loss"] = floor
        row["log_loss_diff_ci"] = None
        if spec.label != ref_label:
            d = paired_block_bootstrap(
                cal.pointwise_log_loss(e, y), ref_loss, resamples=resamples, seed=seed
            )
            row["log_loss_diff_ci"] = d.to_json(ref_label)
        models[spec.label] = row
    return Report(
        models,
        int(mask.sum()),
        int(record.score.size),
        floor,
        realised,
        record.unordered_steps,
        ref_label,
    )


def format_table(report: Report) -> str:
    """The report as a fixed-width text table."""
    head = (
        f"{'model':<18} {'n':>7} {'log_loss':>9} {'brier':>7} {'acc':>6} {'ece':>6} "
        f"{'slope':>6} {'icpt':>6}  diff vs {report.reference} [95% CI]"
    )
    lines = [head, "-" * len(head)]
    for label, r in report.models.items():
        ci = r["log_loss_diff_ci"]
        diff = "" if ci is None else f"{ci['mean']:+.4f} [{ci['low']:+.4f}, {ci['high']:+.4f}]"
        lines.append(
            f"{label[:18]:<18} {r['n']:>7} {r['log_loss']:>9.4f} {r['brier']:>7.4f} "
            f"{r['accuracy']:>6.3f} {r['ece']:>6.3f} {r['calibration_slope']:>6.2f} "
            f"{r['calibration_intercept']:>6.2f}  {diff}"
        )
    lines.append(f"scored {report.scored} of {report.total} events")
    if report.floor_log_loss is not None:
        lines.append(
            f"floor (true probabilities): expected {report.floor_log_loss:.4f}, "
            f"realised {report.realised_true_log_loss:.4f}"
        )
    if report.unordered_steps:
        lines.append(f"warning: {report.unordered_steps} events were earlier than the one before")
    lines.append(
        "log loss in nats on expected score P(win)+P(draw)/2; accuracy over decisive matches; "
        "ECE on 10 equal-width bins; CI: paired circular block bootstrap, "
        f"{BOOTSTRAP_RESAMPLES} resamples"
    )
    return "\n".join(lines)


class TextProgress:
    """A one-line progress bar on a terminal (silent when the stream is not one)."""

    def __init__(self, total: float, label: str, stream: TextIO | None = None) -> None:
        self.total = max(float(total), 1.0)
        self.label = label
        self.stream = stream if stream is not None else sys.stderr
        self.done = 0.0
        self._shown = -1
        self.enabled = bool(getattr(self.stream, "isatty", lambda: False)())

    def update(self, amount: float) -> None:
        self.set(self.done + amount)

    def set(self, done: float) -> None:
        self.done = done
        pct = int(100 * min(done, self.total) / self.total)
        if self.enabled and pct != self._shown:
            self._shown = pct
            bar = "#" * (pct // 4)
            self.stream.write(f"\r{self.label} [{bar:<25}] {pct:3d}%")
            self.stream.flush()

    def close(self) -> None:
        if self.enabled:
            self.stream.write("\n")
            self.stream.flush()


def replay_file(
    path: Path | str,
    specs: Sequence[ModelSpec],
    *,
    allow_unordered: bool = False,
    progress: Callable[[int], None] | None = None,
) -> ReplayRecord:
    """Build the models of ``specs`` and replay the event file through them."""
    models = {spec.label: spec.build() for spec in specs}

    def pairs() -> Iterator[tuple[int, MatchEvent]]:
        for lineno, done, ev in numbered_events(path):
            if progress is not None:
                progress(done)
            yield lineno, ev

    return replay(pairs(), models, allow_unordered=allow_unordered, source=str(path))


def run_replay(
    path: Path | str,
    specs: Sequence[ModelSpec],
    *,
    burn_in: str | None = None,
    plot: Path | str | None = None,
    allow_unordered: bool = False,
    show_progress: bool = True,
) -> Report:
    """What ``streamrate replay`` does: replay, score, optionally plot; returns the report."""
    if not specs:
        raise ConfigError("no models: give --model, --config or --all-models")
    when = parse_burn_in(burn_in)
    truth = Truth.for_events(path)
    try:
        size = Path(path).stat().st_size
    except OSError as exc:
        raise EventError(f"cannot read event file {path}: {exc.strerror}") from exc
    bar = TextProgress(size, "replay") if show_progress else None
    record = replay_file(
        path,
        specs,
        allow_unordered=allow_unordered,
        progress=None if bar is None else bar.set,
    )
    if bar is not None:
        bar.close()
    report = build_report(record, specs, when, truth)
    if report.scored == 0:
        raise ConfigError(f"burn-in {burn_in!r} leaves no event to score")
    if plot is not None:
        from streamrate.plot import reliability_png

        mask = scored_mask(record, when)
        reliability_png(plot, {k: v[mask] for k, v in record.expected.items()}, record.score[mask])
    return report
