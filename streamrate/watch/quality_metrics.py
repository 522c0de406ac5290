"""Prometheus gauges for forecast quality, drift and recalibration.

The statistics come from :mod:`streamrate.watch.quality`, :mod:`streamrate.watch.drift` and
:mod:`streamrate.recalibrate`; this module only publishes them on an injected
registry. Labels and their closed sets:

* ``space`` -- the model space (from the settings),
* ``model`` -- the model name scored (from the settings),
* ``window`` -- ``recent`` (last ``recent_n`` events) or ``reference`` (the
  ``reference_n`` events before those),
* ``group`` -- ``all``, or one of the top-K values of the grouping context field,
  or ``other`` (see :class:`streamrate.watch.quality.GroupLabels`),
* ``feature`` -- ``p_win`` (the predicted expected score) or a configured context field,
* ``bin`` -- ``"0"`` .. ``"9"``, the equal-width forecast bins of the reliability
  diagram (bin ``i`` holds forecasts in ``(i/10, (i+1)/10]``, bin 0 also 0); only
  the recent window is binned, and every bin of a window is set at each
  publication, so the ten series appear together (an empty bin: 0 events, NaN means).

A statistic that is undefined (empty window, degenerate fit) is exported as NaN,
which Prometheus comparisons treat as false, so it never fires an alert.

>>> from prometheus_client import CollectorRegistry
>>> from streamrate.watch.quality import MonitorSettings, QualityMonitor
>>> reg = CollectorRegistry()
>>> qm = QualityMetrics(reg)
>>> mon = QualityMonitor(MonitorSettings(recent_n=4, reference_n=8))
>>> for y in [1.0, 0.0, 1.0, 1.0]:
...     _ = mon.add("elo", 0.75, y)
>>> qm.publish("duel", mon)
>>> reg.get_sample_value("streamrate_quality_brier_score",
...     {"space": "duel", "model": "elo", "window": "recent", "group": "all"})
0.1875
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable, Mapping, Sequence

from prometheus_client import CollectorRegistry, Counter, Gauge

from streamrate.checkpoint import PartState
from streamrate.columns import contexts_of, scores_of
from streamrate.config import QualitySettings
from streamrate.events import MatchEvent
from streamrate.models.base import Prediction
from streamrate.recalibrate import OnlineRecalibrator
from streamrate.watch.quality import (
    CHANGE_DIRECTIONS,
    BinnedWindow,
    MonitorSettings,
    QualityMonitor,
    QualitySnapshot,
)
from streamrate.watch.quality_state import monitor_from_state, monitor_state

log = logging.getLogger("streamrate.quality")

WINDOWS = ("recent", "reference")
_QLABELS = ["space", "model", "window", "group"]

# (attribute of QualitySnapshot, metric name, help text)
_QUALITY_GAUGES: tuple[tuple[str, str, str], ...] = (
    ("log_loss", "streamrate_quality_log_loss", "Mean log loss of the forecasts, in nats."),
    ("brier", "streamrate_quality_brier_score", "Mean squared error of the forecasts (Brier)."),
    (
        "reliability",
        "streamrate_quality_brier_reliability",
        "Reliability part of the Brier score (Murphy decomposition, 10 equal-width bins).",
    ),
    (
        "resolution",
        "streamrate_quality_brier_resolution",
        "Resolution part of the Brier score (Murphy decomposition, 10 equal-width bins).",
    ),
    (
        "uncertainty",
        "streamrate_quality_brier_uncertainty",
        "Uncertainty part of the Brier score: the variance of the outcomes.",
    ),
    (
        "accuracy",
        "streamrate_quality_accuracy_ratio",
        "Share of decisive matches whose winner was favoured (draws left out).",
    ),
    (
        "ece",
        "streamrate_quality_ece",
        "Expected calibration error on 10 equal-width bins of the forecast over [0, 1].",
    ),
    (
        "slope",
        "streamrate_quality_calibration_slope",
        "Slope b of logit P(y) = a + b logit(p); 1 is calibrated, below 1 over-confident.",
    ),
    (
        "intercept",
        "streamrate_quality_calibration_intercept",
        "Intercept a of logit P(y) = a + b logit(p); 0 is calibrated.",
    ),
    ("n_events", "streamrate_quality_window_events", "Events currently held in the window."),
)
_BIN_LABELS = [*_QLABELS, "bin"]
BINNED_WINDOWS = ("recent",)
"""Windows whose reliability diagram is exported bin by bin."""


class QualityMetrics:
    """Quality, drift and recalibration series; one instance per registry, all spaces."""

    def __init__(self, registry: CollectorRegistry) -> None:
        self.registry = registry
        self.quality = {
            attr: Gauge(name, text, _QLABELS, registry=registry)
            for attr, name, text in _QUALITY_GAUGES
        }
        self.bin_forecast = Gauge(
            "streamrate_quality_bin_forecast_ratio",
            "Mean forecast (expected score of the first side) of the window's events in each "
            "of 10 equal-width forecast bins; NaN for an empty bin.",
            _BIN_LABELS,
            registry=registry,
        )
        self.bin_observed = Gauge(
            "streamrate_quality_bin_observed_ratio",
            "Observed frequency (mean score of the first side, a draw counting 0.5) of the "
            "window's events in each of 10 equal-width forecast bins; NaN for an empty bin.",
            _BIN_LABELS,
            registry=registry,
        )
        self.bin_events = Gauge(
            "streamrate_quality_bin_events",
            "Events of the window in each of 10 equal-width forecast bins.",
            _BIN_LABELS,
            registry=registry,
        )
        self.psi = Gauge(
            "streamrate_drift_psi",
            "Population Stability Index, recent window against reference window.",
            ["space", "model", "feature"],
            registry=registry,
        )
        self.change_detected = Counter(
            "streamrate_drift_change_detected_total",
            "Times the Page-Hinkley test fired on a shift (up or down) of the per-event log loss.",
            ["space", "model", "direction"],
            registry=registry,
        )
        self.change_statistic = Gauge(
            "streamrate_drift_change_statistic",
            "Current Page-Hinkley statistic on the log loss, in nats (fires at its threshold).",
            ["space", "model", "direction"],
            registry=registry,
        )
        self.recal_slope = Gauge(
            "streamrate_recalibration_slope",
            "Slope the online recalibration applies to the model's logit.",
            ["space", "model"],
            registry=registry,
        )
        self.recal_intercept = Gauge(
            "streamrate_recalibration_intercept",
            "Intercept the online recalibration adds to the model's logit.",
            ["space", "model"],
            registry=registry,
        )

    def forget(self, space: str) -> int:
        """Remove every series of ``space`` from this registry (this process no
        longer writes it: the writer's process exports them); the series removed."""
        per_model = ["space", "model"]
        metrics: list[tuple[Gauge | Counter, list[str]]] = [
            *((g, _QLABELS) for g in self.quality.values()),
            *((g, _BIN_LABELS) for g in (self.bin_forecast, self.bin_observed, self.bin_events)),
            (self.psi, [*per_model, "feature"]),
            (self.change_detected, [*per_model, "direction"]),
            (self.change_statistic, [*per_model, "direction"]),
            (self.recal_slope, per_model),
            (self.recal_intercept, per_model),
        ]
        removed = 0
        for metric, names in metrics:
            seen: set[tuple[str, ...]] = set()
            for family in metric.collect():
                for sample in family.samples:
                    if sample.labels.get("space") == space:
                        seen.add(tuple(sample.labels[n] for n in names))
            for values in seen:
                metric.remove(*values)
                removed += 1
        return removed

    def start_model(self, space: str, model: str) -> None:
        """Create the model's counters at 0 so that ``increase()`` sees the first firing."""
        for d in CHANGE_DIRECTIONS:
            self.change_detected.labels(space=space, model=model, direction=d)

    def change_fired(self, space: str, model: str, direction: str) -> None:
        self.change_detected.labels(space=space, model=model, direction=direction).inc()

    def publish(
        self,
        space: str,
        monitor: QualityMonitor,
        recalibrators: Mapping[str, OnlineRecalibrator] | None = None,
    ) -> None:
        """Set every gauge from the monitor's current windows (O(window) per series)."""
        for model, mq in monitor.models_.items():
            self.start_model(space, model)
            for group, pair in mq.windows_.items():
                for window, rq in zip(WINDOWS, (pair.recent, pair.reference), strict=True):
                    self._set_quality(space, model, window, group, rq.snapshot())
                    if window in BINNED_WINDOWS:
                        self._set_bins(space, model, window, group, rq.binned())
            for feature, value in mq.drift_.psi().items():
                self.psi.labels(space=space, model=model, feature=feature).set(value)
            for d, ph in mq.change_.items():
                self.change_statistic.labels(space=space, model=model, direction=d).set(
                    ph.statistic
                )
        for model, rc in (recalibrators or {}).items():
            self.recal_slope.labels(space=space, model=model).set(rc.slope)
            self.recal_intercept.labels(space=space, model=model).set(rc.intercept)

    def _set_quality(
        self, space: str, model: str, window: str, group: str, snap: QualitySnapshot
    ) -> None:
        for attr, gauge in self.quality.items():
            value = float(getattr(snap, attr))
            gauge.labels(space=space, model=model, window=window, group=group).set(
                value if math.isfinite(value) else math.nan
            )

    def _set_bins(
        self, space: str, model: str, window: str, group: str, binned: BinnedWindow
    ) -> None:
        for i, (fc, ob, n) in enumerate(
            zip(binned.forecast_mean, binned.outcome_mean, binned.count, strict=True)
        ):
            lbl = {"space": space, "model": model, "window": window, "group": group, "bin": str(i)}
            self.bin_forecast.labels(**lbl).set(float(fc))
            self.bin_observed.labels(**lbl).set(float(ob))
            self.bin_events.labels(**lbl).set(int(n))


class QualityObserver:
    """The consumer's observer hook: ``observer(event, prediction, model_name)``.

    Scores each applied event (O(1)), counts change-detector firings at once and
    republishes the gauges when ``publish_every_s`` seconds of ``clock`` have
    passed since the last time (reading the windows costs O(window), so they are
    read at about the pace Prometheus scrapes, not per event); :meth:`tick` does
    the same on a timer while no events arrive.
    """

    def __init__(
        self,
        monitor: QualityMonitor,
        metrics: QualityMetrics,
        space: str,
        publish_every_s: float = 5.0,
        recalibrators: Mapping[str, OnlineRecalibrator]
        | Callable[[], Mapping[str, OnlineRecalibrator]]
        | None = None,
        on_change: Callable[[str, str], None] | None = None,
        clock: Callable[[], float] = time.monotonic,
        exporting: bool = True,
    ) -> None:
        if publish_every_s < 0:
            raise ValueError("publish_every_s must not be negative")
        self.exporting = exporting
        self.monitor = monitor
        self.metrics = metrics
        self.space = space
        self.publish_every_s = publish_every_s
        self.recalibrators = recalibrators
        self.on_change = on_change
        self.clock = clock
        self._published_at = clock()
        self._unpublished = 0  # events scored since the gauges were last set

    def __call__(self, event: MatchEvent, prediction: Prediction, model_name: str) -> None:
        fired = self.monitor.add(model_name, prediction.expected_score, event.score, event.context)
        for direction in fired:
            if self.exporting:
                self.metrics.change_fired(self.space, model_name, direction)
            if self.on_change is not None:
                self.on_change(model_name, direction)
        self._unpublished += 1
        self.tick()

    def observe_chunk(
        self, events: Sequence[MatchEvent], scores: Mapping[str, Sequence[float]]
    ) -> None:
        """The hook for a chunk of applied events at once: each model's expected
        scores (``scores``, model name -> one per event). The same as calling
        the observer event by event, each event for every model in that order
        (:meth:`QualityMonitor.add_chunk`), with the gauges published at most once."""
        fired = self.monitor.add_chunk(contexts_of(events), scores_of(events), scores)
        for _, model_name, direction in fired:
            if self.exporting:
                self.metrics.change_fired(self.space, model_name, direction)
            if self.on_change is not None:
                self.on_change(model_name, direction)
        self._unpublished += len(events) * len(scores)
        self.tick()

    def tick(self) -> None:
        """Publish when ``publish_every_s`` has passed since the last time and events
        came in since. The consumer calls this from its loop whether events arrive
        or not, so the gauges are never older than about ``publish_every_s`` (a
        burst is shown in full once the stream goes quiet, not at the next event)."""
        now = self.clock()
        if self._unpublished and now - self._published_at >= self.publish_every_s:
            self._publish(now)

    def publish(self) -> None:
        """Set every gauge from the monitor now."""
        self._publish(self.clock())

    def export(self, on: bool) -> None:
        """Start (publishing at once) or stop exporting the space's series. Only the
        process writing the space exports them: a standby's replica keeps the
        windows current without duplicating the writer's series; a writer that
        stops (lease lost, space given back) removes its own."""
        self.exporting = on
        if on:
            self.publish()
        else:
            self.metrics.forget(self.space)

    # -- state kept in the checkpoint (streamrate.checkpoint.Stateful) ------------------
    state_name = "quality"

    def state(self) -> PartState:
        """The windows, drift windows and change detectors, for the checkpoint."""
        return monitor_state(self.monitor)

    def load_state(self, part: PartState | None) -> None:
        """Continue from a checkpoint's state (``None``: none saved, start empty) and
        publish it at once, so the gauges continue the series they showed before."""
        settings = self.monitor.settings
        mon = None if part is None else monitor_from_state(settings, part)
        if mon is None and part is not None:
            log.warning(
                "space %s: the checkpoint's quality windows were kept under other quality "
                "settings; they start empty",
                self.space,
            )
        self.monitor = mon if mon is not None else QualityMonitor(settings)
        self.publish()

    def _publish(self, now: float) -> None:
        if not self.exporting:
            return  # the windows go on; the writer's process exports them
        recs = self.recalibrators
        # A callable is asked at each publication: the live model may be replaced
        # (recovery from a checkpoint) while the observer stays.
        self.metrics.publish(self.space, self.monitor, recs() if callable(recs) else recs)
        self._published_at = now
        self._unpublished = 0


def quality_observers(
    space: str, settings: QualitySettings, metrics: QualityMetrics, exporting: bool = True
) -> list[QualityObserver]:
    """The observers a space's consumer runs for these settings (none when disabled);
    ``exporting=False``: they keep their windows without publishing until
    :meth:`QualityObserver.export` (the service turns it on while it holds the
    space's writer lease)."""
    if not settings.enabled:
        return []
    monitor = QualityMonitor(
        MonitorSettings(
            recent_n=settings.recent_events,
            reference_n=settings.reference_events,
            group_field=settings.group_field,
            group_top_k=settings.group_top_k,
            group_warmup_n=settings.recent_events,
            drift_fields=settings.drift_fields,
        )
    )
    return [QualityObserver(monitor, metrics, space, settings.publish_every_s, exporting=exporting)]
