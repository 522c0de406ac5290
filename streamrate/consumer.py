"""The former home of the writer, kept so that existing imports keep working.

The writer's loop now lives in :mod:`streamrate.stream`, one module per step of
the data path: :mod:`~streamrate.stream.reader` (reading, claims,
acknowledging), :mod:`~streamrate.stream.decide` (what is applied, dead
letters), :mod:`~streamrate.stream.apply` (applying, shared with replicas),
:mod:`~streamrate.stream.checkpoints` (cadence, save, ack after durable, trim)
and :mod:`~streamrate.stream.writer`, which wires them. ``Consumer`` is the
writer under its former name.
"""

from __future__ import annotations

from streamrate.stream.apply import LiveModel, Observer, Status
from streamrate.stream.checkpoints import RUNTIME_SETTINGS
from streamrate.stream.reader import Entry, id_key
from streamrate.stream.writer import Writer

Consumer = Writer

__all__ = [
    "RUNTIME_SETTINGS",
    "Consumer",
    "Entry",
    "LiveModel",
    "Observer",
    "Status",
    "Writer",
    "id_key",
]
