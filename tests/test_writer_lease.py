"""The writer lease and its fence (streamrate.stream.lease) on fakeredis with Lua."""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from pathlib import Path

import fakeredis
import pytest
from prometheus_client import CollectorRegistry
from service_fakes import fake_settings

from streamrate.checkpoint import FileCheckpointStore, RedisCheckpointStore
from streamrate.client import send_events
from streamrate.config import LeaseSettings, QualitySettings, Settings, SpaceSettings
from streamrate.errors import LeaseLostError
from streamrate.events import event_to_json
from streamrate.service import Service
from streamrate.simulate import simulate, world_spec
from streamrate.stream.applied_log import AppliedLogWriter, parse_entry
from streamrate.stream.lease import Lease

KEYS = Settings(spaces=(SpaceSettings(name="duel"),)).keys(SpaceSettings(name="duel"))
WORLD = simulate(world_spec("plain", matches=200, entities=20, seed=5)).events


def _wait(cond: Callable[[], bool], what: str, timeout_s: float = 30) -> None:
    deadline = time.monotonic() + timeout_s
    while not cond():
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        time.sleep(0.01)


def _pair(r: fakeredis.FakeRedis) -> tuple[Lease, Lease]:
    st = LeaseSettings(lease_ms=60_000, renew_every_ms=1000)
    return Lease(r, KEYS.lease, KEYS.epoch, st, "a"), Lease(r, KEYS.lease, KEYS.epoch, st, "b")


def _lapse(r: fakeredis.FakeRedis) -> None:
    r.delete(KEYS.lease)  # what the expiry does after lease_ms without renewal


def test_key_name_is_derived_in_config() -> None:
    assert KEYS.lease == "{sr:duel}:lease"


def test_one_holder_at_a_time_and_the_token_is_the_writer_epoch() -> None:
    r = fakeredis.FakeRedis()
    r.set(KEYS.epoch, 7)  # epochs of earlier writers
    a, b = _pair(r)
    assert a.take() == 8
    assert b.take() == 0
    assert r.get(KEYS.lease) == b"a 8"
    assert 0 < r.pttl(KEYS.lease) <= 60_000
    a.renew()
    _lapse(r)
    assert b.take() == 9
    with pytest.raises(LeaseLostError):
        a.renew()
    with pytest.raises(LeaseLostError):
        a.ensure()  # known lost: no read, no write


def test_taking_again_while_holding_gives_a_new_epoch() -> None:
    r = fakeredis.FakeRedis()
    a, _ = _pair(r)
    assert (a.take(), a.take()) == (1, 2)
    assert r.get(KEYS.lease) == b"a 2"


def test_release_only_frees_its_own_lease() -> None:
    r = fakeredis.FakeRedis()
    a, b = _pair(r)
    a.take()
    _lapse(r)
    b.take()
    a.release()
    assert r.get(KEYS.lease) == b"b 2"
    b.release()  # PEXPIRE 1: free a millisecond later
    time.sleep(0.01)
    assert r.get(KEYS.lease) is None


def test_a_replaced_writer_cannot_overwrite_the_redis_checkpoint() -> None:
    r = fakeredis.FakeRedis()
    a, b = _pair(r)
    a.take()
    RedisCheckpointStore(r, KEYS.ckpt, a).save(b"old writer")
    _lapse(r)
    b.take()
    RedisCheckpointStore(r, KEYS.ckpt, b).save(b"new writer")
    with pytest.raises(LeaseLostError):
        RedisCheckpointStore(r, KEYS.ckpt, a).save(b"late write")
    assert r.get(KEYS.ckpt) == b"new writer"


def test_a_replaced_writer_cannot_rename_a_checkpoint_file(tmp_path: Path) -> None:
    r = fakeredis.FakeRedis()
    a, b = _pair(r)
    a.take()
    FileCheckpointStore(tmp_path, "duel", a).save(b"old writer")
    _lapse(r)
    b.take()
    FileCheckpointStore(tmp_path, "duel", b).save(b"new writer")
    with pytest.raises(LeaseLostError):
        FileCheckpointStore(tmp_path, "duel", a).save(b"late write")
    assert (tmp_path / "duel.ckpt.npz").read_bytes() == b"new writer"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["duel.ckpt.npz"]  # no temp file left


@pytest.mark.parametrize("events", [1, 3, 2500])
def test_the_fenced_applied_log_keeps_order_and_refuses_after_takeover(events: int) -> None:
    r = fakeredis.FakeRedis()
    a, b = _pair(r)
    log = AppliedLogWriter(r, KEYS.applied, KEYS.epoch, a)
    log.start(0, "0-0", "0-0", a.take())
    ids = [f"{i + 1}-0" for i in range(events)]
    log.chunk(0, ids, [f'{{"n": {i}}}'.encode() for i in range(events)])
    last = log.flush()
    rows = [parse_entry(sid, f) for sid, f in r.xrange(KEYS.applied)]
    assert rows[-1].id == last
    assert rows[0].kind == "start"
    got = [(sid, raw) for e in rows[1:] for sid, raw in zip(e.ids, e.events, strict=True)]
    assert [sid for sid, _ in got] == ids
    assert [e.seq for e in rows[1:]] == list(range(0, events, 1000))  # split: seq per part
    _lapse(r)
    b.take()
    log.chunk(events, ["9999-0"], [b"{}"])
    with pytest.raises(LeaseLostError):
        log.flush()
    assert r.xlen(KEYS.applied) == len(rows)


def test_renew_period_must_fit_twice_in_the_lease() -> None:
    with pytest.raises(ValueError, match="renew_every_ms"):
        LeaseSettings(lease_ms=1000, renew_every_ms=600)


def _space(name: str = "duel") -> SpaceSettings:
    return SpaceSettings(
        name=name,
        model="elo",
        model_settings={"compiled": False},
        batch_count=40,
        block_ms=5,
        checkpoint_every_events=50,
        checkpoint_every_s=0.05,
        quality=QualitySettings(publish_every_s=0.0),
    )


def _quality_spaces(svc: Service) -> set[str]:
    """Spaces whose quality series this process exports."""
    return {
        s.labels["space"]
        for m in svc.registry.collect()
        for s in m.samples
        if s.name.startswith(("streamrate_quality_", "streamrate_drift_"))
    }


def _space_service(
    tmp_path: Path, server: fakeredis.FakeServer, *names: str, **lease: int
) -> Service:
    spaces = tuple(_space(n) for n in names or ("duel",))
    settings = fake_settings(tmp_path, spaces[0]).model_copy(
        update={"lease": LeaseSettings(**lease), "spaces": spaces}
    )
    return Service(settings, lambda: fakeredis.FakeRedis(server=server), CollectorRegistry())


def _lost(svc: Service, space: str) -> float:
    got = svc.registry.get_sample_value("streamrate_writer_leases_lost_total", {"space": space})
    return -1.0 if got is None else got


def test_a_running_writer_that_loses_its_lease_stops_without_writing(tmp_path: Path) -> None:
    server = fakeredis.FakeServer()
    r = fakeredis.FakeRedis(server=server)
    events = [event_to_json(e) for e in WORLD]
    svc = _space_service(tmp_path, server)
    stop = threading.Event()
    svc.start(stop)
    try:
        send_events(r, KEYS.events, events[:100])
        c = svc.spaces[0].consumer
        _wait(lambda: c.ckpt_id != "0-0" and c.live.applied == 100, "the first checkpoint")
        held = r.get(KEYS.lease)
        assert held is not None and held.split()[0] == svc.spaces[0].lease.holder.encode()
        assert _lost(svc, "duel") == 0
        r.set(KEYS.lease, b"another-writer 99", px=60_000)  # taken over elsewhere
        ckpt = (tmp_path / "duel.ckpt.npz").read_bytes()
        log_len, dead_len = r.xlen(KEYS.applied), r.xlen(KEYS.dead)
        send_events(r, KEYS.events, [*events[100:200], "{not json"])
        _wait(lambda: isinstance(svc.spaces[0].fatal, LeaseLostError), "the writer to stop")
        _wait(lambda: svc.runners[0].standby is not None, "the space to follow as a standby")
        time.sleep(0.3)  # a write would have had time to happen
        assert not stop.is_set()  # the process goes on
        assert _lost(svc, "duel") == 1
        assert (tmp_path / "duel.ckpt.npz").read_bytes() == ckpt
        assert (r.xlen(KEYS.applied), r.xlen(KEYS.dead)) == (log_len, dead_len)
        assert r.get(KEYS.lease) == b"another-writer 99"
    finally:
        stop.set()
        svc.join()
    assert (tmp_path / "duel.ckpt.npz").read_bytes() == ckpt  # nor at shutdown
    assert r.get(KEYS.lease) == b"another-writer 99"


def test_a_lost_lease_stops_only_its_space_which_is_written_again_once_free(
    tmp_path: Path,
) -> None:
    """Two spaces in one process: ``duel`` loses its lease, ``squad`` goes on
    learning; ``duel`` follows as a standby and, once the lease is free, this
    process writes it again and ends with every event applied once."""
    server = fakeredis.FakeServer()
    r = fakeredis.FakeRedis(server=server)
    squad = Settings(spaces=(_space("squad"),)).keys(_space("squad"))
    events = [event_to_json(e) for e in WORLD]
    svc = _space_service(tmp_path, server, "duel", "squad")
    stop = threading.Event()
    svc.start(stop)
    try:
        duel_w, squad_w = (sp.consumer for sp in svc.spaces)
        send_events(r, KEYS.events, events[:100])
        send_events(r, squad.events, events[:100])
        _wait(lambda: duel_w.live.applied == 100 == squad_w.live.applied, "the first events")
        _wait(lambda: duel_w.ckpt_id != "0-0", "the first checkpoint")
        _wait(lambda: _quality_spaces(svc) == {"duel", "squad"}, "both writers' series")
        r.set(KEYS.lease, b"another-writer 99", px=60_000)  # taken over elsewhere
        send_events(r, KEYS.events, events[100:150])
        _wait(lambda: svc.runners[0].standby is not None, "duel to follow as a standby")
        send_events(r, squad.events, events[100:])
        _wait(lambda: squad_w.live.applied == len(events), "squad to go on learning")
        assert svc.runners[1].writer is svc.spaces[1] and svc.spaces[1].fatal is None
        assert (_lost(svc, "duel"), _lost(svc, "squad")) == (1, 0)
        assert not stop.is_set()
        # Quality series: only the writer of a space exports them. The standby has
        # loaded the checkpoint's windows but publishes nothing.
        _wait(lambda: svc.runners[0].standby.replica.follower.loaded, "the replica")  # type: ignore[union-attr]
        assert _quality_spaces(svc) == {"squad"}
        r.delete(KEYS.lease)  # the other writer went away: the lease is free
        send_events(r, KEYS.events, events[150:])
        runner = svc.runners[0]
        _wait(lambda: runner.writer is not svc.spaces[0], "duel to be written here again")
        assert runner.writer is not None
        again = runner.writer.consumer
        _wait(lambda: again.live.applied == len(events), "duel to apply every event")
        held = r.get(KEYS.lease)
        assert held is not None and held.split()[0] == runner.writer.lease.holder.encode()
        assert _quality_spaces(svc) == {"duel", "squad"}  # the writer of duel again
    finally:
        stop.set()
        svc.join()
    assert svc.runners[0].fatal is None and svc.runners[1].fatal is None
    assert _lost(svc, "duel") == 1


def test_entries_a_replaced_writer_read_under_the_same_name_are_still_applied(
    tmp_path: Path,
) -> None:
    # A writer paused between its lease check and its read wakes and takes delivery
    # of entries under the shared consumer name before it notices the lost lease.
    server = fakeredis.FakeServer()
    r = fakeredis.FakeRedis(server=server)
    events = [event_to_json(e) for e in WORLD]
    svc = _space_service(tmp_path, server, lease_ms=200, renew_every_ms=50)
    stop = threading.Event()
    svc.start(stop)
    try:
        c = svc.spaces[0].consumer
        send_events(r, KEYS.events, events[:50])
        _wait(lambda: c.live.applied == 50, "the first events")
        hold = threading.Event()
        read = c.reader.read
        c.reader.read = lambda: [] if hold.is_set() else read()  # type: ignore[method-assign]
        hold.set()
        time.sleep(0.05)  # a read in flight returns
        send_events(r, KEYS.events, events[50:60])
        stolen = r.xreadgroup("streamrate", "consumer-1", {KEYS.events: ">"}, count=10)
        hold.clear()
        assert len(stolen[0][1]) == 10
        send_events(r, KEYS.events, events[60:])
        _wait(lambda: c.live.applied == len(events), "every event, the stolen ones too")
    finally:
        stop.set()
        svc.join()
