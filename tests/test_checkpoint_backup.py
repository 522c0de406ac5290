"""checkpoint-backup and -restore: copy out, refuse what does not fit, never under a writer."""

from __future__ import annotations

import threading
import time
from pathlib import Path

import fakeredis
import pytest
from prometheus_client import CollectorRegistry
from service_fakes import fake_settings
from typer.testing import CliRunner

import streamrate.service
from streamrate.backup import BackupError, backup, restore, running_writers
from streamrate.checkpoint import decode_checkpoint
from streamrate.cli import app
from streamrate.client import send_events
from streamrate.config import CheckpointSettings, Settings, SpaceSettings
from streamrate.events import event_to_json
from streamrate.service import Service
from streamrate.simulate import simulate, world_spec

WORLD = simulate(world_spec("cyclic", matches=300, entities=12, seed=3)).events
LINES = [event_to_json(e) for e in WORLD]
EVENTS = "{sr:duel}:events"


def _space(**model: object) -> SpaceSettings:
    return SpaceSettings(
        name="duel",
        model="elo",
        model_settings={"compiled": False, **model},
        batch_count=50,
        block_ms=5,
    )


def _settings(tmp_path: Path, store: str = "file", **model: object) -> Settings:
    base = fake_settings(tmp_path / "ckpt", _space(**model))
    return base.model_copy(
        update={"checkpoint": CheckpointSettings(store=store, dir=tmp_path / "ckpt")}  # type: ignore[arg-type]
    )


def _run(settings: Settings, server: fakeredis.FakeServer, lines: list[str], until: int) -> None:
    svc = Service(settings, lambda: fakeredis.FakeRedis(server=server), CollectorRegistry())
    stop = threading.Event()
    svc.start(stop)
    try:
        send_events(fakeredis.FakeRedis(server=server), EVENTS, lines)
        live = svc.spaces[0].consumer.live
        deadline = time.monotonic() + 30
        while live.applied < until:
            assert time.monotonic() < deadline
            time.sleep(0.01)
    finally:
        stop.set()
        svc.join()


@pytest.mark.parametrize("store", ["file", "redis"])
def test_backup_then_restore_rewinds_the_space_and_it_learns_the_rest_again(
    tmp_path: Path, store: str
) -> None:
    settings = _settings(tmp_path, store)
    server = fakeredis.FakeServer()
    client = fakeredis.FakeRedis(server=server)
    _run(settings, server, LINES[:120], 120)
    out = tmp_path / "saved" / "duel.ckpt"
    info = backup(settings, settings.space(), client, out)
    assert info.applied == 120 and info.model == "elo"
    stored = settings.checkpoint.dir / "duel.ckpt.npz" if store == "file" else None
    first = stored.read_bytes() if stored else client.get("{sr:duel}:ckpt")
    assert out.read_bytes() == first

    _run(settings, server, LINES[120:], len(LINES))  # the space goes on past the backup
    got = restore(settings, settings.space(), client, out, idle_s=0.0)
    assert (got.applied, got.last_id) == (120, info.last_id) and got.note == ""
    now = stored.read_bytes() if stored else client.get("{sr:duel}:ckpt")
    assert now == out.read_bytes()
    # The group is back at the backup's position: a restart learns the rest again.
    _run(settings, server, [], len(LINES))
    blob = stored.read_bytes() if stored else client.get("{sr:duel}:ckpt")
    assert decode_checkpoint(blob, 1000, 1e9).applied == len(LINES)


def test_a_checkpoint_of_other_settings_is_refused_with_the_services_own_words(
    tmp_path: Path,
) -> None:
    server = fakeredis.FakeServer()
    client = fakeredis.FakeRedis(server=server)
    other = _settings(tmp_path / "other", k=40.0)
    _run(other, server, LINES[:60], 60)
    out = tmp_path / "other.ckpt"
    backup(other, other.space(), client, out)
    settings = _settings(tmp_path)
    with pytest.raises(BackupError, match="other settings") as err:
        restore(settings, settings.space(), client, out, idle_s=0.0)
    assert "\n" not in str(err.value)
    assert not (settings.checkpoint.dir / "duel.ckpt.npz").exists()
    junk = tmp_path / "junk.ckpt"
    junk.write_bytes(b"PK not a checkpoint")
    with pytest.raises(BackupError, match="is not a checkpoint this version reads"):
        restore(settings, settings.space(), client, junk, idle_s=0.0)


def test_no_restore_while_a_writer_reads_unless_forced(tmp_path: Path) -> None:
    settings = _settings(tmp_path)
    server = fakeredis.FakeServer()
    client = fakeredis.FakeRedis(server=server)
    _run(settings, server, LINES[:50], 50)
    out = tmp_path / "duel.ckpt"
    backup(settings, settings.space(), client, out)
    assert running_writers(client, settings, settings.space(), 3600.0) == ["consumer-1"]
    with pytest.raises(BackupError, match="running writer"):
        restore(settings, settings.space(), client, out, idle_s=3600.0)
    assert restore(settings, settings.space(), client, out, idle_s=3600.0, force=True).applied == 50


def test_the_commands_print_one_line_and_exit_2_when_refused(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    server = fakeredis.FakeServer()
    monkeypatch.setattr(
        streamrate.service, "redis_factory", lambda _s: lambda: fakeredis.FakeRedis(server=server)
    )
    settings = _settings(tmp_path)
    _run(settings, server, LINES[:40], 40)
    ckpt = str(settings.checkpoint.dir)
    common = ["--set", f"checkpoint.dir={ckpt}", "--set", "spaces.0.name=duel"]
    common += ["--set", "spaces.0.model=elo"]  # the model the checkpoint above holds
    runner = CliRunner()
    out = tmp_path / "b.ckpt"
    res = runner.invoke(app, ["checkpoint-backup", str(out), *common])
    assert res.exit_code == 0, res.output
    assert "40 events applied" in res.output and out.exists()
    # the settings ask for elo with its default (compiled) kernels: "compiled" is
    # a runtime setting, so this checkpoint fits; another model does not
    res = runner.invoke(app, ["checkpoint-restore", str(out), *common])
    assert res.exit_code == 2 and "running writer" in res.output
    res = runner.invoke(app, ["checkpoint-restore", str(out), *common, "--force"])
    assert res.exit_code == 0, res.output
    res = runner.invoke(
        app, ["checkpoint-restore", str(out), *common, "--force", "--set", "spaces.0.model=glicko2"]
    )
    assert res.exit_code == 2
    assert res.output.count("\n") == 1 and "holds model 'elo'" in res.output
    res = runner.invoke(
        app, ["checkpoint-backup", str(out), "--set", f"checkpoint.dir={tmp_path}/none"]
    )
    assert res.exit_code == 2 and "no checkpoint to back up" in res.output
