"""Loading a checkpoint that fits the settings: shared by the writer and replicas.

:func:`load_checked` reads the store, decodes and checks the blob
(:func:`streamrate.checkpoint.decode_checkpoint`) and refuses one written for
another model, other settings or another state format, with one
:class:`~streamrate.errors.CheckpointRefusedError` naming the checkpoint and
the ways out. The writer stops on it; a replica reports it and waits.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from streamrate.checkpoint import (
    Checkpoint,
    CheckpointStore,
    FileCheckpointStore,
    RedisCheckpointStore,
    decode_checkpoint,
)
from streamrate.config import SpaceSettings
from streamrate.errors import CheckpointRefusedError, StreamrateError
from streamrate.models.base import Model
from streamrate.models.registry import model_from_state

RUNTIME_SETTINGS = frozenset({"compiled", "active"})
"""Model settings that do not change what a checkpoint means (how kernels run;
which challenger answers): a checkpoint is not refused over them."""


def describe_store(store: CheckpointStore) -> str:
    """Where the checkpoint lives, in words (for messages)."""
    if isinstance(store, FileCheckpointStore):
        return f"checkpoint file {store.path}"
    if isinstance(store, RedisCheckpointStore):
        return f"checkpoint in Redis key {store.key}"
    return "checkpoint"


def refusal(store: CheckpointStore, space: str, what: str) -> CheckpointRefusedError:
    """The one-line refusal of the checkpoint in ``store``, with the ways out."""
    where = describe_store(store)
    if isinstance(store, RedisCheckpointStore):
        aside = f"rename the key aside (RENAME {store.key} {store.key}.old)"
    else:
        aside = "move the file aside"
    what = " ".join(what.split())  # one line, whatever the cause's message holds
    return CheckpointRefusedError(
        f"{where} {what}. Either point space {space!r} at another checkpoint "
        f"(checkpoint.dir, the prefix or the space name), or {aside} to start afresh "
        f"from the stream's first entry"
    )


def load_checked(
    store: CheckpointStore, space: SpaceSettings, build_model: Callable[[], Model]
) -> tuple[Checkpoint, Model] | None:
    """The stored checkpoint and its model, or None when there is none;
    :class:`CheckpointRefusedError` when it is unreadable or was written for
    another model, other settings or in another format."""

    def refuse(what: str) -> CheckpointRefusedError:
        return refusal(store, space.name, what)

    try:
        data = store.load()
    except StreamrateError as exc:
        raise refuse(f"cannot be read ({exc})") from exc
    if data is None:
        return None
    try:
        ck = decode_checkpoint(data, space.dedupe_keep_ids, space.dedupe_window_s)
    except (StreamrateError, ValueError, KeyError, TypeError) as exc:
        raise refuse(f"is not a checkpoint this version reads ({exc})") from exc
    asked = build_model().to_state()
    if ck.state.kind != asked.kind:
        raise refuse(f"holds model {ck.state.kind!r}, the settings ask for {asked.kind!r}")
    diff = settings_diff(ck.state.params, asked.params)
    if diff:
        raise refuse(
            f"holds model {asked.kind!r} with other settings ({diff}) than the settings ask for"
        )
    if ck.state.version != asked.version:
        raise refuse(
            f"holds {asked.kind!r} state of format version {ck.state.version}, "
            f"this version reads {asked.version}"
        )
    try:
        model = model_from_state(ck.state)
    except (StreamrateError, ValueError, TypeError, KeyError, IndexError) as exc:
        raise refuse(f"holds {asked.kind!r} state that cannot be loaded ({exc})") from exc
    return ck, model


def _plain(value: Any) -> Any:
    """Settings as JSON-like values for comparison: lists for tuples, floats for
    numbers, runtime-only keys left out."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items() if k not in RUNTIME_SETTINGS}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, int | float) and not isinstance(value, bool):
        return float(value)
    return value


def settings_diff(saved: dict[str, Any], asked: dict[str, Any], limit: int = 3) -> str:
    """The settings that differ, in words (empty when they agree)."""
    a, b = _plain(saved), _plain(asked)
    if a == b:
        return ""
    keys = sorted(set(a) | set(b))
    parts = [
        f"{k}: {_short(a.get(k, 'unset'))} in the checkpoint, {_short(b.get(k, 'unset'))} asked"
        for k in keys
        if a.get(k) != b.get(k)
    ]
    more = f"; and {len(parts) - limit} more" if len(parts) > limit else ""
    return "; ".join(parts[:limit]) + more


def _short(value: Any, width: int = 60) -> str:
    text = repr(value)
    return text if len(text) <= width else text[: width - 3] + "..."
