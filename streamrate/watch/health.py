"""``streamrate health``: a one-screen report with a verdict per line.

Two sources:

* a running service's metrics endpoint (``/metrics``, text format): consumer lag
  and pending entries, dead-letter and query-error shares (cumulative since the
  service started), checkpoint age, the consumer's state (``bad`` unless it is
  ready), loop errors in a row (``bad`` above 0) and its Redis connection
  (``bad`` while unreachable), and per model the recent-window log loss,
  ECE, calibration slope, drift PSI per feature and change detections;
* a checkpoint file: model, events applied, entities known, last stream id,
  checkpoint age, dead-letter share of the events it covers.

Verdicts: ``ok``; ``watch`` (past a warning level, e.g. PSI above 0.1); ``bad``
(past the level at which ``deploy/prometheus/streamrate-alerts.yml`` alerts;
tests check that both use the same numbers); ``n/a`` (not enough data). The
alerts also need a condition to hold for a while; this report is a snapshot.

>>> lines = [Line("duel", "consumer lag", 12.0, "entries", "ok", "alert above 10000")]
>>> print(format_report(lines))  # doctest: +NORMALIZE_WHITESPACE
space  what          value        verdict  why
duel   consumer lag  12 entries   ok       alert above 10000
"""

from __future__ import annotations

import math
import time
import urllib.request
from collections import defaultdict
from dataclasses import dataclass
from pathlib import Path

from prometheus_client.parser import text_string_to_metric_families

from streamrate.config import MetricsSettings
from streamrate.errors import ConfigError, ServiceError
from streamrate.watch.drift import PSI_MAJOR, PSI_MODERATE

# The alert levels of deploy/prometheus/streamrate-alerts.yml (see its comments).
ECE_ALERT = 0.07
ECE_WATCH = 0.05
LOG_LOSS_ALERT = 0.6931  # ln 2: always answering 50 %
LAG_ALERT_ENTRIES = 10_000
DEAD_LETTER_ALERT_SHARE = 0.01
CHECKPOINT_ALERT_AGE_S = 900.0
QUERY_ERROR_ALERT_SHARE = 0.05
MIN_WINDOW_EVENTS = 500
LOOP_ERROR_STREAK_ALERT = 0
"""Any loop error not yet followed by a good turn of the loop: the consumer is failing."""
SLOPE_WATCH = (0.8, 1.25)
"""Calibration slope outside this range is worth a look (our choice, no alert)."""

OK, WATCH, BAD, NA = "ok", "watch", "bad", "n/a"


@dataclass(frozen=True)
class Line:
    """One checked figure: where, what, its value and unit, the verdict and why."""

    space: str
    what: str
    value: float
    unit: str
    verdict: str
    why: str
    alert_level: float | None = None  # the value at which the matching alert fires


def _level(value: float, watch: float | None, bad: float) -> str:
    if math.isnan(value):
        return NA
    if value > bad:
        return BAD
    if watch is not None and value > watch:
        return WATCH
    return OK


def _share(part: float, whole: float) -> float:
    return part / whole if whole > 0 else math.nan


Samples = dict[str, list[tuple[dict[str, str], float]]]


def _samples(text: str) -> Samples:
    out: Samples = defaultdict(list)
    try:
        for family in text_string_to_metric_families(text):
            for s in family.samples:
                out[s.name].append((dict(s.labels), float(s.value)))
    except ValueError as exc:
        raise ServiceError(f"the metrics text could not be parsed: {exc}") from exc
    return out


def metric_samples(text: str) -> Samples:
    """Samples of a metrics page by name: ``{name: [(labels, value), ...]}``."""
    return _samples(text)


def _by_space(samples: Samples, name: str, **match: str) -> dict[str, float]:
    total: dict[str, float] = defaultdict(float)
    for labels, value in samples.get(name, []):
        if all(labels.get(k) == v for k, v in match.items()):
            total[labels.get("space", "")] += value
    return dict(total)


def from_metrics_text(text: str, now_s: float | None = None) -> list[Line]:
    """Lines for every space and model found in a metrics page."""
    now = time.time() if now_s is None else now_s
    s = _samples(text)
    lines: list[Line] = []
    lag = _by_space(s, "streamrate_consumer_lag_entries")
    pending = _by_space(s, "streamrate_consumer_pending_entries")
    events = _by_space(s, "streamrate_consumer_events_total")
    dead = _by_space(s, "streamrate_consumer_events_total", outcome="dead_lettered")
    ckpt = _by_space(s, "streamrate_checkpoint_last_success_timestamp_seconds")
    queries = _by_space(s, "streamrate_query_requests_total")
    failed = _by_space(s, "streamrate_query_requests_total", outcome="error")
    for space in sorted(set(lag) | set(events) | set(ckpt)):
        v = lag.get(space, math.nan)
        lines.append(
            Line(space, "consumer lag", v, "entries", _level(v, None, LAG_ALERT_ENTRIES),
                 f"alert above {LAG_ALERT_ENTRIES}", LAG_ALERT_ENTRIES)
        )  # fmt: skip
        v = pending.get(space, math.nan)
        lines.append(Line(space, "pending entries", v, "entries", OK if v == v else NA, "info"))
        v = _share(dead.get(space, 0.0), events.get(space, 0.0))
        lines.append(
            Line(space, "dead-lettered share", v, "ratio",
                 _level(v, None, DEAD_LETTER_ALERT_SHARE),
                 f"since start; alert above {DEAD_LETTER_ALERT_SHARE:.0%}",
                 DEAD_LETTER_ALERT_SHARE)
        )  # fmt: skip
        stamp = ckpt.get(space, 0.0)
        v = now - stamp if stamp > 0 else math.nan
        lines.append(
            Line(space, "checkpoint age", v, "s", _level(v, None, CHECKPOINT_ALERT_AGE_S),
                 f"alert above {CHECKPOINT_ALERT_AGE_S:.0f} s while events arrive",
                 CHECKPOINT_ALERT_AGE_S)
        )  # fmt: skip
        v = _share(failed.get(space, 0.0), queries.get(space, 0.0))
        lines.append(
            Line(space, "query error share", v, "ratio",
                 _level(v, None, QUERY_ERROR_ALERT_SHARE),
                 f"since start; alert above {QUERY_ERROR_ALERT_SHARE:.0%}",
                 QUERY_ERROR_ALERT_SHARE)
        )  # fmt: skip
    lines += _consumer_lines(s)
    lines += _quality_lines(s)
    return sorted(lines, key=lambda x: x.space)  # stable: keeps the order within a space


def _consumer_lines(s: Samples) -> list[Line]:
    """Whether the consumer is answering, failing or cut off from Redis (services
    that do not export these series get no such lines)."""
    lines: list[Line] = []
    states: dict[str, str] = {}
    for labels, value in s.get("streamrate_consumer_state", []):
        if value == 1:
            states[labels.get("space", "")] = labels.get("state", "")
    streak = _by_space(s, "streamrate_consumer_consecutive_loop_errors")
    connected = _by_space(s, "streamrate_redis_up")
    for space in sorted(set(states) | set(streak) | set(connected)):
        if space in states:
            state = states[space]
            why = {
                "ready": "applying events and answering",
                "loading": "loading the checkpoint: questions get 'not ready' replies",
                "stalled": "cannot apply events: questions get 'not ready' replies",
            }.get(state, state)
            lines.append(
                Line(space, f"consumer {state}", math.nan, "", OK if state == "ready" else BAD, why)
            )
        if space in streak:
            v = streak[space]
            lines.append(
                Line(space, "loop errors in a row", v, "",
                     _level(v, None, LOOP_ERROR_STREAK_ALERT),
                     "errors since the last good turn of the loop; alert above 0 for 2 min",
                     LOOP_ERROR_STREAK_ALERT)
            )  # fmt: skip
        if space in connected:
            v = connected[space]
            lines.append(
                Line(space, "Redis connected", v, "", OK if v >= 1 else BAD,
                     "the consumer's connection; 0 while Redis is unreachable")
            )  # fmt: skip
    return lines


def _quality_lines(s: Samples) -> list[Line]:
    lines: list[Line] = []
    recent = {"window": "recent", "group": "all"}

    def series(name: str) -> dict[tuple[str, str], float]:
        out = {}
        for labels, value in s.get(name, []):
            if all(labels.get(k) == v for k, v in recent.items()):
                out[(labels["space"], labels["model"])] = value
        return out

    n = series("streamrate_quality_window_events")
    ll = series("streamrate_quality_log_loss")
    ece = series("streamrate_quality_ece")
    slope = series("streamrate_quality_calibration_slope")
    for key in sorted(n):
        space, model = key
        few = n[key] < MIN_WINDOW_EVENTS
        note = f"{n[key]:.0f} events in the recent window"

        def judged(v: float, verdict: str, few: bool = few) -> str:
            return NA if few or math.isnan(v) else verdict

        v = ll.get(key, math.nan)
        lines.append(
            Line(space, f"{model} log loss", v, "nats",
                 judged(v, _level(v, None, LOG_LOSS_ALERT)),
                 f"{note}; alert above ln 2 = 0.693", LOG_LOSS_ALERT)
        )  # fmt: skip
        v = ece.get(key, math.nan)
        lines.append(
            Line(space, f"{model} ECE", v, "", judged(v, _level(v, ECE_WATCH, ECE_ALERT)),
                 f"10 bins; watch above {ECE_WATCH}, alert above {ECE_ALERT}", ECE_ALERT)
        )  # fmt: skip
        v = slope.get(key, math.nan)
        lo, hi = SLOPE_WATCH
        lines.append(
            Line(space, f"{model} calibration slope", v, "",
                 judged(v, OK if lo <= v <= hi else WATCH),
                 f"1 is calibrated, below 1 over-confident; watch outside {lo}-{hi}")
        )  # fmt: skip
    for labels, v in sorted(s.get("streamrate_drift_psi", []), key=lambda x: sorted(x[0].items())):
        lines.append(
            Line(labels["space"], f"{labels['model']} PSI {labels['feature']}", v, "",
                 _level(v, PSI_MODERATE, PSI_MAJOR),
                 f"common practice: watch above {PSI_MODERATE}, alert above {PSI_MAJOR}",
                 PSI_MAJOR)
        )  # fmt: skip
    fired: dict[tuple[str, str], float] = defaultdict(float)
    for labels, v in s.get("streamrate_drift_change_detected_total", []):
        fired[(labels["space"], labels["model"])] += v
    for (space, model), v in sorted(fired.items()):
        lines.append(
            Line(space, f"{model} loss shifts detected", v, "", OK if v == 0 else WATCH,
                 "Page-Hinkley alarms since start (alert for 30 min after each)")
        )  # fmt: skip
    return lines


def from_checkpoint(path: Path | str, now_s: float | None = None) -> list[Line]:
    """Lines read from a checkpoint file (no service needed)."""
    from streamrate.checkpoint import decode_checkpoint
    from streamrate.models.registry import model_from_state

    now = time.time() if now_s is None else now_s
    p = Path(path)
    try:
        ck = decode_checkpoint(p.read_bytes(), keep=1 << 30, window_s=math.inf)
    except OSError as exc:
        raise ConfigError(f"cannot read checkpoint {p}: {exc}") from exc
    model = model_from_state(ck.state)
    space = p.name.removesuffix(".ckpt.npz")
    entities = float(len(model.entities_)) if hasattr(model, "entities_") else math.nan
    age = now - ck.written_at_s if ck.written_at_s > 0 else math.nan
    dead = ck.counters.get("dead_lettered", 0)
    seen = dead + ck.counters.get("applied", ck.applied) + ck.counters.get("duplicate", 0)
    share = _share(dead, seen)
    return [
        Line(space, f"model {ck.state.kind}", float(ck.applied), "events applied",
             OK if ck.applied > 0 else WATCH, f"last stream id {ck.last_id}"),
        Line(space, "entities known", entities, "", OK if entities == entities else NA, "info"),
        # A checkpoint is only written while events arrive, so an old one may be an
        # idle stream: "watch", not "bad".
        Line(space, "checkpoint age", age, "s",
             NA if math.isnan(age) else (OK if age <= CHECKPOINT_ALERT_AGE_S else WATCH),
             "old is fine if the stream is idle", CHECKPOINT_ALERT_AGE_S),
        Line(space, "dead-lettered share", share, "ratio",
             _level(share, None, DEAD_LETTER_ALERT_SHARE),
             f"of events covered; alert above {DEAD_LETTER_ALERT_SHARE:.0%}",
             DEAD_LETTER_ALERT_SHARE),
    ]  # fmt: skip


def fetch_metrics(url: str, timeout_s: float = 5.0) -> str:
    """GET a metrics page; :class:`ServiceError` when it cannot be read."""
    if not url.startswith(("http://", "https://")):
        raise ConfigError(f"metrics URL must start with http:// or https://, not {url!r}")
    try:
        with urllib.request.urlopen(url, timeout=timeout_s) as resp:
            return str(resp.read().decode("utf-8"))
    except (OSError, ValueError) as exc:
        raise ServiceError(f"cannot read metrics from {url}: {exc}") from exc


def _fmt(line: Line) -> str:
    v = line.value
    if math.isnan(v):
        text = "-"
    elif line.unit == "ratio":
        text = f"{v:.2%}"
    elif line.unit == "s":
        text = f"{v:.0f} s"
    elif float(v).is_integer():
        text = f"{v:.0f} {line.unit}".strip()
    else:
        text = f"{v:.3f} {line.unit}".strip()
    return text


def format_report(lines: list[Line]) -> str:
    """The report as an aligned text table."""
    rows = [("space", "what", "value", "verdict", "why")]
    rows += [(x.space, x.what, _fmt(x), x.verdict, x.why) for x in lines]
    widths = [max(len(r[i]) for r in rows) for i in range(4)]
    return "\n".join(
        "  ".join(c.ljust(w) for c, w in zip(r[:4], widths, strict=True)) + "  " + r[4]
        for r in rows
    )


def worst(lines: list[Line]) -> str:
    """The worst verdict of the report (``n/a`` counts as ``ok``)."""
    verdicts = {x.verdict for x in lines}
    return BAD if BAD in verdicts else WATCH if WATCH in verdicts else OK


def health_png(path: Path | str, lines: list[Line]) -> None:
    """Bars of each figure relative to its alert level (1 = the alert fires)."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError as exc:
        raise ConfigError("plots need matplotlib: pip install 'streamrate[plot]'") from exc
    shown = [x for x in lines if x.alert_level and not math.isnan(x.value)]
    colours = {OK: "#009E73", WATCH: "#E69F00", BAD: "#D55E00", NA: "#999999"}
    fig, ax = plt.subplots(figsize=(8.0, 0.4 * len(shown) + 1.5), layout="constrained")
    ys = range(len(shown))
    ratios = [x.value / x.alert_level for x in shown if x.alert_level]
    ax.barh(list(ys), ratios, color=[colours[x.verdict] for x in shown])
    ax.axvline(1.0, color="black", linestyle="--", linewidth=1)
    ax.set_yticks(list(ys), [f"{x.space}: {x.what}" for x in shown])
    ax.invert_yaxis()
    ax.set_xlabel("value / alert level (dashed line: the alert fires)")
    ax.set_title(f"streamrate health: {worst(lines)}")
    fig.savefig(path, dpi=110)
    plt.close(fig)


def metrics_url(metrics: MetricsSettings) -> str:
    """Where a service with these metrics settings serves its page (loopback for 0.0.0.0).

    >>> metrics_url(MetricsSettings(bind="0.0.0.0", port=8564))
    'http://127.0.0.1:8564/metrics'
    """
    host = {"0.0.0.0": "127.0.0.1", "::": "::1", "": "127.0.0.1"}.get(metrics.bind, metrics.bind)
    if ":" in host:
        host = f"[{host}]"
    return f"http://{host}:{metrics.port}/metrics"
