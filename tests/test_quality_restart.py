"""Quality windows, drift windows and change detectors survive a restart (in the checkpoint)."""

from __future__ import annotations

import math
import threading
import time
from pathlib import Path

import fakeredis
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry
from service_fakes import fake_settings

from streamrate.checkpoint import (
    Checkpoint,
    PartState,
    decode_checkpoint,
    encode_checkpoint,
)
from streamrate.client import send_events
from streamrate.config import QualitySettings, SpaceSettings
from streamrate.dedupe import SeenIds
from streamrate.errors import CheckpointError, StateError
from streamrate.events import event_to_json
from streamrate.models.base import ModelState
from streamrate.quality import MonitorSettings, QualityMonitor
from streamrate.quality_state import monitor_from_state, monitor_state
from streamrate.service import Service
from streamrate.simulate import simulate, world_spec
from streamrate.statefile import state_from_bytes, state_to_bytes

SETTINGS = MonitorSettings(
    recent_n=20,
    reference_n=40,
    group_field="map",
    group_top_k=2,
    group_warmup_n=15,
    drift_fields=("map", "ping"),
    change_delta=0.01,
    change_threshold=3.0,
    change_min_events=5,
)
MAPS = ["saltflats", "glasswood", "emberfen", "all"]

rows = st.lists(
    st.tuples(
        st.sampled_from(["elo", "glicko2"]),
        st.floats(0.01, 0.99),
        st.sampled_from([0.0, 0.5, 1.0]),
        st.sampled_from(MAPS),
        st.one_of(st.floats(0.0, 300.0), st.sampled_from(["lagged", "n/a"])),
    ),
    max_size=150,
)


def _feed(mon: QualityMonitor, data: list[tuple[str, float, float, str, float | str]]) -> list:
    return [mon.add(m, p, y, {"map": mp, "ping": ping}) for m, p, y, mp, ping in data]


def _view(mon: QualityMonitor) -> dict[str, object]:
    """Everything a gauge is computed from, as comparable values."""
    out: dict[str, object] = {"groups": mon.groups_.labels}
    for name, mq in mon.models_.items():
        for group, pair in mq.windows_.items():
            for w, rq in (("recent", pair.recent), ("reference", pair.reference)):
                snap = rq.snapshot(with_slope=False)  # the slope fit is tested elsewhere
                out[f"{name}/{group}/{w}"] = tuple(
                    "nan" if isinstance(v, float) and math.isnan(v) else v
                    for v in snap.__dict__.values()
                )
        out[f"{name}/psi"] = {k: (None if math.isnan(v) else v) for k, v in mq.drift_.psi().items()}
        out[f"{name}/ph"] = {
            d: (ph.statistic, ph.n_, ph.total_events_, ph.n_alarms) for d, ph in mq.change_.items()
        }
    return out


@settings(max_examples=60)
@given(rows, rows)
def test_a_monitor_restored_from_its_state_goes_on_exactly_like_the_original(
    before: list, after: list
) -> None:
    kept = QualityMonitor(SETTINGS)
    _feed(kept, before)
    part = monitor_state(kept)
    # through the checkpoint's own encoding, as on disk
    blob = encode_checkpoint(
        Checkpoint(ModelState("demo", 1, {}, {}), "1-0", 0, SeenIds(10, 60), parts={"q": part})
    )
    back_part = decode_checkpoint(blob, keep=10, window_s=60).parts["q"]
    back = monitor_from_state(SETTINGS, back_part)
    assert back is not None
    assert _view(back) == _view(kept)
    assert _feed(back, after) == _feed(kept, after)  # the same change alarms fire
    assert _view(back) == _view(kept)


def test_state_saved_under_other_settings_is_not_applied() -> None:
    mon = QualityMonitor(SETTINGS)
    _feed(mon, [("elo", 0.6, 1.0, "saltflats", 20.0)] * 30)
    other = MonitorSettings(**{**SETTINGS.__dict__, "recent_n": 25})
    assert monitor_from_state(other, monitor_state(mon)) is None


def _filled() -> PartState:
    mon = QualityMonitor(SETTINGS)
    _feed(mon, [("elo", 0.1 + 0.01 * i, float(i % 2), MAPS[i % 3], "x") for i in range(70)])
    return monitor_state(mon)


@pytest.mark.parametrize(
    ("change", "problem"),
    [
        (lambda a, m: a.__setitem__("m0.p", a["m0.p"] + 2.0), "[0, 1]"),
        (lambda a, m: a.__setitem__("m0.sizes", a["m0.sizes"] * 100), "sizes"),
        (lambda a, m: a.__setitem__("m0.code", a["m0.code"] + 50), "out of range"),
        (lambda a, m: a.pop("m0.y"), "m0.y"),
        (lambda a, m: m["models"][0]["change"]["up"].__setitem__("min_cum", 5.0), "running"),
        (lambda a, m: m["models"][0].__setitem__("groups", ["all", "nowhere"]), "groups"),
        (lambda a, m: m["groups"].__setitem__("chosen", ["a", "b", "c"]), "chosen"),
        (lambda a, m: m["models"][0].__setitem__("events", -1), "events"),
    ],
)
def test_a_malformed_quality_state_is_refused(change: object, problem: str) -> None:
    part = _filled()
    arrays, meta = dict(part.arrays), part.meta
    change(arrays, meta)  # type: ignore[operator]
    with pytest.raises(StateError, match=problem.replace("[", r"\[")):
        monitor_from_state(SETTINGS, PartState(arrays, meta))


def test_a_part_with_non_finite_values_or_stray_arrays_refuses_the_checkpoint() -> None:
    part = _filled()
    bad = {**part.arrays, "m0.x": np.full_like(part.arrays["m0.x"], np.inf)}
    ck = Checkpoint(ModelState("demo", 1, {}, {}), "1-0", 0, SeenIds(10, 60))
    ck.parts = {"quality": PartState(bad, part.meta)}
    with pytest.raises(CheckpointError, match="non-finite"):
        decode_checkpoint(encode_checkpoint(ck), keep=10, window_s=60)
    state, extra = state_from_bytes(encode_checkpoint(Checkpoint(ck.state, "1-0", 0, ck.seen)))
    arrays = {**state.arrays, "_part_ghost.x": np.zeros(2)}
    with pytest.raises(CheckpointError, match="no listed part"):
        decode_checkpoint(
            state_to_bytes(ModelState("demo", 1, {}, arrays), extra), keep=10, window_s=60
        )


def test_a_version_2_checkpoint_still_loads_with_no_parts() -> None:
    ck = Checkpoint(ModelState("demo", 1, {}, {"w": np.ones(2)}), "5-0", 3, SeenIds(10, 60))
    state, extra = state_from_bytes(encode_checkpoint(ck))
    extra["checkpoint_version"] = 2
    del extra["parts"]
    back = decode_checkpoint(state_to_bytes(state, extra), keep=10, window_s=60)
    assert back.parts == {} and back.last_id == "5-0"
    extra["checkpoint_version"] = 4
    with pytest.raises(CheckpointError, match="version"):
        decode_checkpoint(state_to_bytes(state, extra), keep=10, window_s=60)


# -- the running service: restart in the middle, same gauges as an uninterrupted run ------

WORLD = simulate(world_spec("cyclic", matches=600, entities=20, seed=8)).events
WATCHED = (
    "streamrate_quality_",
    "streamrate_drift_psi",
    "streamrate_drift_change_statistic",
    "streamrate_recalibration_",
)


def _space() -> SpaceSettings:
    return SpaceSettings(
        name="duel",
        model="recalibrated",
        model_settings={"base": "elo", "base_settings": {"compiled": False}},
        batch_count=37,
        block_ms=5,
        quality=QualitySettings(
            recent_events=100,
            reference_events=150,
            group_field="map",
            group_top_k=2,
            drift_fields=("map",),
            publish_every_s=0.0,
        ),
    )


def _run(server: fakeredis.FakeServer, ckpt: Path, lines: list[str], until: int) -> dict:
    """Start a service, send ``lines``, wait until ``until`` events are applied, stop it."""
    registry = CollectorRegistry()
    svc = Service(
        fake_settings(ckpt, _space()), lambda: fakeredis.FakeRedis(server=server), registry
    )
    stop = threading.Event()
    svc.start(stop)
    live = svc.spaces[0].consumer.live
    try:
        send_events(fakeredis.FakeRedis(server=server), "{sr:duel}:events", lines)
        deadline = time.monotonic() + 60
        while live.applied < until:
            assert time.monotonic() < deadline, "the service did not apply every event"
            time.sleep(0.01)
    finally:
        stop.set()
        svc.join()
    return {
        (m.name, s.name, tuple(sorted(s.labels.items()))): s.value
        for m in registry.collect()
        for s in m.samples
        if s.name.startswith(WATCHED)
    }


def _same(a: dict, b: dict) -> None:
    assert set(a) == set(b)
    for key, value in a.items():
        other = b[key]
        assert (math.isnan(value) and math.isnan(other)) or value == other, key


def test_gauges_after_a_restart_equal_those_of_an_uninterrupted_run(tmp_path: Path) -> None:
    lines = [event_to_json(e) for e in WORLD]
    whole = _run(fakeredis.FakeServer(), tmp_path / "whole", lines, len(lines))
    server = fakeredis.FakeServer()
    _run(server, tmp_path / "split", lines[:450], 450)
    after = _run(server, tmp_path / "split", lines[450:], len(lines))
    labels = {"space": "duel", "model": "recalibrated", "window": "reference", "group": "all"}
    key = ("streamrate_quality_window_events", "streamrate_quality_window_events")
    assert whole[(*key, tuple(sorted(labels.items())))] == 150
    _same(after, whole)
