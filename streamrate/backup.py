"""Backup and restore of a space's checkpoint (``streamrate checkpoint-backup`` / ``-restore``).

A backup is the checkpoint blob itself, copied out of the store (a file or a
Redis key) into a file of the operator's choosing, after checking that it
decodes. A restore installs such a file as the space's checkpoint, but first:

* refuses one that the service would refuse at start: another model, other
  settings, another format, or malformed (the very checks of
  :meth:`streamrate.stream.writer.Writer.load_checkpoint`, run on the file);
* refuses while a writer of the space is running (a member of the consumer
  group read within ``idle_s`` seconds: a running service reads every
  ``block_ms``), unless forced; the writer would overwrite the restored
  checkpoint at its next one anyway;
* moves the consumer group back to the checkpoint's last stream id, so that
  entries after it are read again (those still in the stream; the report says
  when some were trimmed away).

>>> import fakeredis, tempfile, pathlib
>>> from streamrate.config import Settings
>>> settings = Settings()
>>> client = fakeredis.FakeRedis()
>>> out = pathlib.Path(tempfile.mkdtemp()) / "duel.ckpt"
>>> try:
...     backup(settings, settings.space(), client, out)
... except BackupError as exc:
...     print(exc)
no checkpoint to back up: checkpoint file checkpoints/duel.ckpt.npz does not exist
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import redis
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import (
    CheckpointBlob,
    CheckpointStore,
    FileCheckpointStore,
    RedisCheckpointStore,
    decode_checkpoint,
)
from streamrate.config import Settings, SpaceSettings
from streamrate.errors import ServiceError, StreamrateError
from streamrate.metrics import ServiceMetrics
from streamrate.models.registry import build_model
from streamrate.statefile import write_atomic
from streamrate.stream.reader import id_key
from streamrate.stream.writer import Writer
from streamrate.watch.quality_metrics import QualityMetrics, quality_observers

WRITER_IDLE_S = 10.0
"""A group member that read within this many seconds counts as a running writer."""


class BackupError(ServiceError):
    """A backup or restore that cannot be done (one line, for the command line)."""


@dataclass(frozen=True)
class CheckpointInfo:
    """What a backup or restore moved."""

    where: str
    last_id: str
    applied: int
    model: str
    size_bytes: int
    note: str = ""


def store_of(settings: Settings, space: SpaceSettings, client: Any) -> CheckpointStore:
    """The space's checkpoint store, as the service opens it."""
    if settings.checkpoint.store == "redis":
        return RedisCheckpointStore(client, settings.keys(space).ckpt)
    return FileCheckpointStore(settings.checkpoint.dir, space.name)


def _where(store: CheckpointStore) -> str:
    if isinstance(store, FileCheckpointStore):
        return f"checkpoint file {store.path}"
    if isinstance(store, RedisCheckpointStore):
        return f"Redis key {store.key}"
    return "checkpoint"


def backup(settings: Settings, space: SpaceSettings, client: Any, out: Path) -> CheckpointInfo:
    """Copy the space's newest checkpoint into ``out`` (written atomically)."""
    store = store_of(settings, space, client)
    data = store.load()
    if data is None:
        raise BackupError(f"no checkpoint to back up: {_where(store)} does not exist")
    try:
        ck = decode_checkpoint(data, space.dedupe_keep_ids, space.dedupe_window_s)
    except StreamrateError as exc:
        raise BackupError(f"the stored checkpoint is unreadable: {exc}") from exc
    write_atomic(out, bytes(data))
    return CheckpointInfo(str(out), ck.last_id, ck.applied, ck.state.kind, len(data))


class _Held:
    """A checkpoint store holding one blob (what the restore checks)."""

    def __init__(self, data: bytes) -> None:
        self.data = data

    def load(self) -> bytes | None:
        return self.data

    def save(self, data: bytes) -> None:  # never called: the check only loads
        raise ServiceError("the restore check does not write")


def check_fits(settings: Settings, space: SpaceSettings, client: Any, data: bytes) -> Writer:
    """Load ``data`` exactly as the service would at start; :class:`BackupError` if refused."""
    registry = CollectorRegistry()
    consumer = Writer(
        client,
        space,
        settings.keys(space),
        _Held(data),
        ServiceMetrics(registry, [space.name]),
        lambda: build_model(space.model, **space.model_settings),
        observers=quality_observers(space.name, space.quality, QualityMetrics(registry)),
    )
    try:
        consumer.load_checkpoint()
    except StreamrateError as exc:
        raise BackupError(" ".join(str(exc).split())) from exc
    return consumer


def running_writers(
    client: Any, settings: Settings, space: SpaceSettings, idle_s: float
) -> list[str]:
    """Members of the space's consumer group that read within ``idle_s`` seconds."""
    keys = settings.keys(space)
    try:
        members = client.xinfo_consumers(keys.events, space.group)
    except redis.ResponseError:  # no stream or no group: nobody reads
        return []
    active = []
    for m in members:
        name = m.get("name")
        text = name.decode() if isinstance(name, bytes) else str(name)
        if int(m.get("idle") or 0) < idle_s * 1000:
            active.append(text)
    return active


def restore(
    settings: Settings,
    space: SpaceSettings,
    client: Any,
    source: Path,
    force: bool = False,
    idle_s: float = WRITER_IDLE_S,
) -> CheckpointInfo:
    """Install the checkpoint in ``source`` as the space's (see the module docstring)."""
    try:
        data = CheckpointBlob.named(source.read_bytes(), str(source))
    except OSError as exc:
        raise BackupError(f"cannot read {source}: {exc}") from exc
    consumer = check_fits(settings, space, client, data)
    writers = running_writers(client, settings, space, idle_s)
    if writers and not force:
        raise BackupError(
            f"space {space.name!r} has a running writer ({', '.join(writers)} read within "
            f"{idle_s:g} s); stop it first, or pass --force"
        )
    store = store_of(settings, space, client)
    store.save(bytes(data))
    note = _rewind(client, settings, space, consumer.last_id)
    return CheckpointInfo(
        _where(store), consumer.last_id, consumer.live.applied, consumer.live.model.kind,
        len(data), note,
    )  # fmt: skip


def _rewind(client: Any, settings: Settings, space: SpaceSettings, last_id: str) -> str:
    """Set the group to ``last_id``; say whether entries after it are gone from the stream."""
    events = settings.keys(space).events
    try:
        client.xgroup_setid(events, space.group, last_id)
    except redis.ResponseError:
        return "the consumer group does not exist yet; the service creates it at start"
    first = client.xrange(events, min="-", max="+", count=1)
    if first and id_key(first[0][0]) > id_key(last_id):
        sid = first[0][0].decode() if isinstance(first[0][0], bytes) else first[0][0]
        return (
            f"the stream's first entry ({sid}) is after the checkpoint's last id "
            f"{last_id}: entries trimmed from between them, if any, are not learned again"
        )
    return ""
