"""The writer's fast lane (events as columns from the compiled scan) against its
object path: the same models to the bit, the same retry record and applied log,
and events made from the columns equal to the model's own parse."""

from __future__ import annotations

import json
import tempfile
from typing import Any

import fakeredis
import numpy as np
import pytest
from prometheus_client import CollectorRegistry

import streamrate.stream.decide as decide_mod
from streamrate.checkpoint import FileCheckpointStore
from streamrate.columns import EventColumns, Pairs, events_of, sids_of
from streamrate.config import QualitySettings, Settings, SpaceSettings
from streamrate.consumer import Consumer
from streamrate.events import parse_event
from streamrate.metrics import ServiceMetrics
from streamrate.models.base import Model
from streamrate.models.registry import build_model
from streamrate.scan import Scanned, scan_payloads
from streamrate.watch.quality_metrics import QualityMetrics, quality_observers

RECEIVED_MS = 1_790_000_000_000  # 2026-09: after every finish time below
MAPS = ("saltflats", "ember-quarry", "glasswood")
MODES = ("duel", "trios")


def _lines(n: int, seed: int, teams: bool) -> list[str]:
    """Payloads of an invented league: some with a context, some in teams, a few
    spellings the scan leaves to the object path (a number in the context, margins),
    and match ids that come back (retries, conflicts)."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        k = int(rng.integers(1, 4)) if teams else 1
        people = rng.choice(40, size=2 * k, replace=False)
        data: dict[str, Any] = {
            # retries and conflicts in one stretch only: other batches are all new ids
            "match_id": f"t{seed}-{int(rng.integers(0, i + 1)) if 200 <= i < 230 else i}",
            "finished_at": f"2026-04-{1 + i // 1440:02d}T{(i // 60) % 24:02d}:{i % 60:02d}:"
            f"{int(rng.integers(0, 60)):02d}{'.25' if rng.random() < 0.2 else ''}Z",
            "first": [f"v{p}" for p in people[:k]],
            "second": [f"v{p}" for p in people[k:]],
            "score": float(rng.choice([0.0, 0.5, 1.0])),
        }
        roll = rng.random()
        if roll < 0.5:
            data["context"] = {"map": MAPS[i % 3], "mode": MODES[i % 2]}
        elif roll < 0.7:  # names out of order, three of them: sums in the given order
            data["context"] = {"stage": "final", "mode": MODES[i % 2], "map": MAPS[i % 3]}
        elif roll < 0.75:
            data["context"] = {}
        if 300 <= i < 310:
            data["context"] = {"map": MAPS[i % 3], "tier": 3}  # a number: the object path
        out.append(json.dumps(data))
    return out


def _writer(
    r: Any, model: str, settings: dict[str, Any], ckpt_dir: str, observers: list[Any]
) -> Consumer:
    space = SpaceSettings(
        name="duel", model=model, model_settings=settings, batch_count=50, block_ms=1,
        checkpoint_every_events=120, checkpoint_every_s=10**6, claim_idle_ms=0,
        dedupe_window_s=1e9,
    )  # fmt: skip
    keys = Settings(spaces=(space,)).keys(space)
    return Consumer(
        r, space, keys, FileCheckpointStore(ckpt_dir, "g"),
        ServiceMetrics(CollectorRegistry(), ["duel"]), lambda: build_model(model, **settings),
        observers=observers,
    )  # fmt: skip


def _run(
    lines: list[str], model: str, settings: dict[str, Any]
) -> tuple[Model, Any, list[Any], list[Any]]:
    """The model, retry record, applied log and quality state (windows, drift, change
    detectors, as ``serve`` watches the writer) after the writer has taken ``lines``."""
    r = fakeredis.FakeRedis()
    observers = quality_observers(
        "duel",
        QualitySettings(group_field="map", drift_fields=("map", "stage")),  # contexts read
        QualityMetrics(CollectorRegistry()),
        exporting=False,
    )
    with tempfile.TemporaryDirectory() as d:
        c = _writer(r, model, settings, d, observers)
        for i, line in enumerate(lines):  # ids of our own: both runs receive alike
            r.xadd(c.keys.events, {"event": line}, id=f"{RECEIVED_MS + 1000 * i}-0")
        c.recover()
        while True:
            reading_new = c.cursor == ">"
            if c.step() == 0 and reading_new:
                break
        c.close()
        assert c.live.applied > 0.8 * len(lines)
        log = [fields for _, fields in r.xrange(c.keys.applied)]
        return c.live.model, c.decider.seen.to_arrays(), log, [o.state() for o in observers]


def _nothing_sure(raws: list[bytes]) -> Scanned:
    got = scan_payloads([b"{}"] * len(raws))
    assert not got.sure.any()
    return got


@pytest.mark.parametrize(
    ("model", "settings", "teams"),
    [
        ("blade_chest", {"dims": 4}, False),
        ("blade_chest", {"dims": 4}, True),
        ("elo", {}, False),
        ("recalibrated", {}, True),
    ],
)
def test_the_fast_lane_learns_what_the_object_path_learns(
    model: str, settings: dict[str, Any], teams: bool, monkeypatch: pytest.MonkeyPatch
) -> None:
    lines = _lines(400, 5, teams)
    taken: list[int] = []
    columns = decide_mod.Decider._columns

    def counting(self: Any, *args: Any) -> Any:
        got = columns(self, *args)
        taken.append(len(got.valid))
        return got

    monkeypatch.setattr(decide_mod.Decider, "_columns", counting)
    fast, fast_seen, fast_log, fast_quality = _run(lines, model, settings)
    assert sum(taken) >= 100  # the lane was taken (batches of plain payloads)
    monkeypatch.setattr(decide_mod, "scan_payloads", _nothing_sure)
    slow, slow_seen, slow_log, slow_quality = _run(lines, model, settings)
    a, b = fast.to_state().arrays, slow.to_state().arrays
    assert set(a) == set(b)
    for k in a:
        np.testing.assert_array_equal(a[k], b[k], err_msg=k)
    for k in slow_seen:
        np.testing.assert_array_equal(fast_seen[k], slow_seen[k], err_msg=k)
    assert fast_log == slow_log
    assert len(fast_quality) == len(slow_quality) > 0
    for q, p in zip(fast_quality, slow_quality, strict=True):
        assert q.meta == p.meta and set(q.arrays) == set(p.arrays)
        for k in p.arrays:
            np.testing.assert_array_equal(q.arrays[k], p.arrays[k], err_msg=k)


def test_events_made_from_columns_are_the_models_own() -> None:
    raws = [line.encode() for line in _lines(200, 8, True)]
    got = scan_payloads(raws)
    cols = EventColumns.from_scan(got)
    assert len(cols) == int(got.sure.sum()) > 100
    one, some = cols.event(7), cols.take([5, 2, 9])  # before any event is made
    assert one == parse_event(raws[int(got.at[7])])
    assert list(some) == [parse_event(raws[int(got.at[j])]) for j in (5, 2, 9)]
    assert some.digests == [cols.digests[j] for j in (5, 2, 9)]
    for i, k in enumerate(got.at.tolist()):
        want = parse_event(raws[k])
        ev = cols[i]
        assert ev == want and ev.model_fields_set == want.model_fields_set
        assert ev.finished_at.utcoffset() == want.finished_at.utcoffset()
    part = cols[10:20]
    assert isinstance(part, EventColumns) and list(part) == cols.events()[10:20]


def test_pairs_keep_ids_and_events_apart() -> None:
    raws = [line.encode() for line in _lines(30, 9, False)]
    cols = EventColumns.from_scan(scan_payloads(raws))
    sids = [f"{k}-0" for k in range(len(cols))]
    p = Pairs(sids, cols)
    assert sids_of(p[2:5]) == sids[2:5] and events_of(p[2:5]).match_ids == cols.match_ids[2:5]
    assert p[3] == (sids[3], cols[3])
    plain = list(p)
    assert sids_of(plain) == sids and list(events_of(plain)) == cols.events()
    clocked = Pairs(sids, cols, list(range(len(sids))))
    assert clocked[4:7].received_ms == [4, 5, 6] and p[4:7].received_ms is None
