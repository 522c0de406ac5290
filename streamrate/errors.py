"""The exception tree of streamrate.

Every error the package raises on purpose derives from :class:`StreamrateError`::

    StreamrateError
    ├── EventError          an event or query failed validation (names the field)
    ├── ConfigError         settings that cannot be used
    ├── StateError          a saved model state or checkpoint cannot be loaded
    │   ├── StateVersionError   written by an incompatible format version
    │   ├── CheckpointError     a checkpoint refused as input (names the file and the problem)
    │   └── AppliedLogError     an applied-log entry a replica cannot follow
    ├── ServiceError        the running service cannot go on (Redis, checkpoint store)
    │   ├── CheckpointRefusedError  the checkpoint is unreadable or not of these settings
    │   └── LeaseLostError      this writer no longer holds its space's lease
    └── ReadCutError        a blocked stream read ended because its key left the node

Code translates lower-level failures with ``raise ... from exc`` so that the
cause stays visible.
"""

from __future__ import annotations


class StreamrateError(Exception):
    """Root of every error streamrate raises on purpose."""


class EventError(StreamrateError, ValueError):
    """An event, query or file line that is not valid; the message names the field."""


class ConfigError(StreamrateError, ValueError):
    """Settings that cannot be used."""


class StateError(StreamrateError):
    """A saved model state or checkpoint that cannot be read back."""


class StateVersionError(StateError):
    """A saved state written by a format version this code does not read."""


class ServiceError(StreamrateError):
    """The running service cannot continue."""


class CheckpointError(StateError):
    """A checkpoint that is refused: too large, malformed or holding unusable values.

    The message names the checkpoint (file path or Redis key) and the problem.
    """


class AppliedLogError(StateError):
    """An entry of the applied log that is malformed: the replica reloads the checkpoint."""


class CheckpointRefusedError(ServiceError):
    """The space's checkpoint cannot be read or was written for other model settings:
    the service does not start (the message names the checkpoint and the ways out)."""


class LeaseLostError(ServiceError):
    """The writer no longer holds its space's lease (another writer took it, or it
    lapsed while this one was paused): it must stop writing at once."""


class ReadCutError(StreamrateError):
    """A blocked stream read that the server ended because the stream's key left
    the node (``UNBLOCKED the stream key no longer exists``: a Redis Cluster slot
    moved, or the key was deleted). Nothing was delivered; the caller counts it,
    logs one line and reads again, which follows the slot to its new owner."""
