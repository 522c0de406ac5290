"""Scoring a chunk of events at once gives exactly the state and the alarms of
scoring them one at a time (windows, groups while warming up and after, drift
windows, change detectors), and the writer hands chunks to observers that take them."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry

from streamrate.events import MatchEvent
from streamrate.models.base import Prediction, Predictions
from streamrate.stream.apply import Applier, ChunkObserver, ChunkResult, LiveModel
from streamrate.watch.drift import PageHinkley
from streamrate.watch.quality import MonitorSettings, QualityMonitor, RollingQuality
from streamrate.watch.quality_metrics import QualityMetrics, QualityObserver
from streamrate.watch.quality_state import monitor_state

MAPS = ("saltflats", "glasswood", "ember-quarry", "all", "other")
probs = st.one_of(st.sampled_from([0.0, 1.0, 0.5, 1e-16]), st.floats(0.0, 1.0))
contexts = st.fixed_dictionaries(
    {}, optional={"map": st.sampled_from(MAPS), "tier": st.integers(0, 3) | st.just("gold")}
)


@st.composite
def streams(draw: st.DrawFn) -> tuple[MonitorSettings, list[str], list[list[Any]]]:
    """Small windows and a touchy change detector so that windows roll over, groups
    finish warming up inside a chunk and detectors fire; the events cut in chunks."""
    s = MonitorSettings(
        recent_n=draw(st.integers(1, 6)),
        reference_n=draw(st.integers(1, 9)),
        group_field=draw(st.sampled_from([None, "map"])),
        group_top_k=draw(st.integers(1, 3)),
        group_warmup_n=draw(st.integers(1, 12)),
        drift_fields=draw(st.sampled_from([(), ("map",), ("map", "tier")])),
        change_delta=0.0,
        change_threshold=draw(st.sampled_from([0.5, 2.0, 40.0])),
        change_min_events=draw(st.integers(1, 4)),
    )
    models = draw(st.sampled_from([["served"], ["served", "raw"], ["a", "b", "c"]]))
    n = draw(st.integers(0, 40))
    events = [
        [draw(contexts), draw(st.sampled_from([0.0, 0.5, 1.0])), [draw(probs) for _ in models]]
        for _ in range(n)
    ]
    cuts = sorted(draw(st.lists(st.integers(0, n), max_size=6)))
    chunks = [events[a:b] for a, b in zip([0, *cuts], [*cuts, n], strict=True)]
    return s, models, chunks


def _same_state(a: QualityMonitor, b: QualityMonitor) -> None:
    sa, sb = monitor_state(a), monitor_state(b)
    assert sa.meta == sb.meta
    assert sa.arrays.keys() == sb.arrays.keys()
    for k in sa.arrays:
        np.testing.assert_array_equal(sa.arrays[k], sb.arrays[k], err_msg=k)
    for name, mq in a.models_.items():  # the rings' layout too, not only their contents
        for group, w in mq.windows_.items():
            other = b.models_[name].windows_[group]
            for rq, rq2 in ((w.recent, other.recent), (w.reference, other.reference)):
                assert (rq.p_, rq.y_, rq.head_, rq.size_) == (rq2.p_, rq2.y_, rq2.head_, rq2.size_)


@settings(max_examples=400)
@given(streams())
def test_a_chunk_scores_exactly_as_its_events_one_at_a_time(
    stream: tuple[MonitorSettings, list[str], list[list[Any]]],
) -> None:
    s, models, chunks = stream
    one, many = QualityMonitor(s), QualityMonitor(s)
    fired_one: list[tuple[int, str, str]] = []
    fired_many: list[tuple[int, str, str]] = []
    at = 0
    for chunk in chunks:
        for i, (ctx, y, ps) in enumerate(chunk):
            for m, p in zip(models, ps, strict=True):
                fired_one += [(at + i, m, d) for d in one.add(m, p, y, ctx)]
        preds = {m: [ps[k] for _, _, ps in chunk] for k, m in enumerate(models)}
        got = many.add_chunk([c for c, _, _ in chunk], [y for _, y, _ in chunk], preds)
        fired_many += [(at + i, m, d) for i, m, d in got]
        at += len(chunk)
    assert fired_many == fired_one
    _same_state(one, many)


@given(st.lists(st.floats(-5.0, 5.0), max_size=200), st.sampled_from(["up", "down"]))
def test_the_change_detector_on_a_list_is_the_detector_on_each_value(
    xs: list[float], direction: str
) -> None:
    a = PageHinkley(0.01, 1.5, 3, direction)  # type: ignore[arg-type]
    b = PageHinkley(0.01, 1.5, 3, direction)  # type: ignore[arg-type]
    assert [i for i, x in enumerate(xs) if a.update(x)] == b.update_many(xs)
    assert vars(a) == vars(b)


def test_a_value_outside_the_unit_interval_is_refused_after_the_ones_before_it() -> None:
    a, b = RollingQuality(3), RollingQuality(3)
    for p in (0.2, 0.4):
        a.add(p, 1.0)
    try:
        b.add_many([0.2, 0.4, float("nan"), 0.6], [1.0] * 4)
    except ValueError as exc:
        assert "must lie in [0, 1]" in str(exc)
    else:
        raise AssertionError("NaN was accepted")
    assert (a.p_, a.head_, a.size_) == (b.p_, b.head_, b.size_)


def _events(n: int) -> list[MatchEvent]:
    t0 = datetime(2026, 3, 1, tzinfo=UTC)
    return [
        MatchEvent(
            match_id=f"m-{k}",
            finished_at=t0 + timedelta(minutes=k),
            first=("kelvash",),
            second=("morvenn",),
            score=(1.0, 0.0, 0.5)[k % 3],
            context={"map": MAPS[k % 3]},
        )
        for k in range(n)
    ]


class _Model:
    kind = "served"


class _OneAtATime:
    """An observer without ``observe_chunk``: the applier calls it event by event."""

    def __init__(self, inner: QualityObserver) -> None:
        self.inner = inner

    def __call__(self, event: MatchEvent, prediction: Prediction, kind: str) -> None:
        self.inner(event, prediction, kind)


def test_the_applier_hands_chunks_to_observers_that_take_them() -> None:
    s = MonitorSettings(recent_n=5, reference_n=7, group_field="map", group_warmup_n=4)
    registry = CollectorRegistry()
    chunked = QualityObserver(QualityMonitor(s), QualityMetrics(registry), "duel")
    single = QualityObserver(QualityMonitor(s), QualityMetrics(CollectorRegistry()), "duel")
    plain = _OneAtATime(single)
    assert isinstance(chunked, ChunkObserver) and not isinstance(plain, ChunkObserver)
    live = LiveModel(_Model())  # type: ignore[arg-type]
    applier = Applier(live, None, str, observers=(chunked, plain))  # type: ignore[arg-type]
    events = _events(23)
    rng = np.random.default_rng(3)
    for lo in range(0, 23, 8):
        part = [(f"{k}-0", ev) for k, ev in enumerate(events[lo : lo + 8], lo)]
        pw, pd = rng.random(len(part)) * 0.8, rng.random(len(part)) * 0.2
        raw = Predictions(pw[::-1].copy(), pd.copy())
        got = ChunkResult(list(zip(pw.tolist(), pd.tolist(), strict=True)), {"raw": raw}, 0, [])
        applier.notify(part, got)
    _same_state(single.monitor, chunked.monitor)
    assert list(chunked.monitor.models_) == ["served", "raw"]


def test_probabilities_and_outcomes_of_other_lengths_are_refused() -> None:
    mon = QualityMonitor(MonitorSettings(recent_n=3, reference_n=3))
    try:
        mon.add_chunk([{}, {}], [1.0, 0.0], {"served": [0.5]})
    except ValueError as exc:
        assert "a chunk of 2 contexts needs as many outcomes and forecasts" in str(exc)
    else:
        raise AssertionError("a short list of probabilities was accepted")
