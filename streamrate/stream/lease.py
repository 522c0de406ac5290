"""The writer lease: at most one writer per space, and a fence on its writes.

One Redis key per space (``{sr:space}:lease``, see :mod:`streamrate.config`)
holds ``"<holder> <epoch>"`` with an expiry of ``lease_ms``. A writer takes it
only when it is free (or already its own); taking it also takes a new epoch
(``INCR {sr:space}:epoch``, the epoch of the applied log's ``start`` entry),
which is the writer's fencing token. The holder renews it every
``renew_every_ms`` with a compare-and-``PEXPIRE``.

Every write that matters is fenced: the checkpoint ``SET`` and the applied-log
``XADD`` run in a script that first compares the lease with the writer's own
value, so a writer that was paused past its lease and wakes up cannot overwrite
the checkpoint of the writer that replaced it; dead letters, acknowledgements
and trims are preceded by the same comparison; a checkpoint file is renamed
into place only after it. A writer that finds the lease gone raises
:class:`~streamrate.errors.LeaseLostError` and stops writing.

All scripts are sent with ``EVAL`` and name every key they touch (Redis Cluster:
all keys of a space share one hash tag).
"""

from __future__ import annotations

import logging
import os
import secrets
import socket
import threading
import time
from collections.abc import Callable, Sequence
from typing import Any

from streamrate.config import LeaseSettings
from streamrate.errors import LeaseLostError

log = logging.getLogger("streamrate.lease")

TAKE = """
local cur = redis.call('GET', KEYS[1])
local mine = ARGV[1] .. ' '
if cur and cur ~= ARGV[3] and string.sub(cur, 1, #mine) ~= mine then return 0 end
local epoch = redis.call('INCRBY', KEYS[2], 1)
redis.call('SET', KEYS[1], mine .. epoch, 'PX', ARGV[2])
return epoch
"""
"""KEYS: lease, epoch. ARGV: holder, lease_ms, the value held now (or "").
A lease naming this holder is taken again with a new epoch: a take whose reply
was lost left it so (the holder id is unique to the process; the new epoch
fences out anything written under the old value)."""

RENEW = """
if redis.call('GET', KEYS[1]) == ARGV[1] then
  return redis.call('PEXPIRE', KEYS[1], ARGV[2])
end
return 0
"""
"""KEYS: lease. ARGV: value, lease_ms. Compare-and-PEXPIRE."""

RELEASE = """
if redis.call('GET', KEYS[1]) == ARGV[1] then return redis.call('PEXPIRE', KEYS[1], 1) end
return 0
"""

FENCED_SET = """
if redis.call('GET', KEYS[1]) ~= ARGV[1] then return 0 end
redis.call('SET', KEYS[2], ARGV[2])
return 1
"""
"""KEYS: lease, key. ARGV: value, data."""

FENCED_XADD = """
if redis.call('GET', KEYS[1]) ~= ARGV[1] then return false end
local ids = {}
local i = 2
while i <= #ARGV do
  local n = tonumber(ARGV[i])
  local fields = {}
  for j = 1, n do fields[j] = ARGV[i + j] end
  ids[#ids + 1] = redis.call('XADD', KEYS[2], '*', unpack(fields))
  i = i + n + 1
end
return ids
"""
"""KEYS: lease, stream. ARGV: value, then per entry its field count and fields."""

MAX_SCRIPT_ARGS = 4000
"""Arguments per fenced XADD call (Lua's unpack limit is near 8000)."""


def holder_id() -> str:
    """This process's name in the lease: host, pid and a random part."""
    return f"{socket.gethostname()}:{os.getpid()}:{secrets.token_hex(4)}"


def _text(value: Any) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


class Lease:
    """One writer's lease on one space (Redis client and clock injected).

    >>> import fakeredis
    >>> r = fakeredis.FakeRedis()
    >>> a, b = Lease(r, "L", "E", LeaseSettings(), "a"), Lease(r, "L", "E", LeaseSettings(), "b")
    >>> a.take(), b.take()
    (1, 0)
    >>> a.value
    'a 1'
    """

    def __init__(
        self,
        client: Any,
        key: str,
        epoch_key: str,
        settings: LeaseSettings,
        holder: str | None = None,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.r, self.key, self.epoch_key, self.settings = client, key, epoch_key, settings
        self.holder = holder or holder_id()
        self.clock = clock
        self.value = ""  # "<holder> <epoch>" while held
        self.epoch = 0
        self.lost = False
        self.renewed_at = -1e18
        # take() and renew() one at a time: a renewal that read the value before a
        # take() of the same writer gave it a new epoch would find the new value and
        # call the lease lost (the writer takes it once to start and once more when
        # its consumer starts, while the renewal thread already runs).
        self._turn = threading.Lock()

    # -- taking, renewing, giving back --------------------------------------------
    def take(self) -> int:
        """Take the lease (free, or ours already) with a new epoch; 0 when another holds it."""
        with self._turn:
            return self._take()

    def _take(self) -> int:
        got = int(
            self.r.eval(
                TAKE,
                2,
                self.key,
                self.epoch_key,
                self.holder,
                self.settings.lease_ms,
                self.value,
            )
        )
        if got:
            self.epoch, self.value, self.lost = got, f"{self.holder} {got}", False
            self.renewed_at = self.clock()
        return got

    def holder_now(self) -> str | None:
        """The value the lease holds now (None when free)."""
        got = self.r.get(self.key)
        return None if got is None else _text(got)

    def renew(self) -> None:
        """Extend the lease; :class:`LeaseLostError` when it is no longer ours."""
        with self._turn:
            self._renew()

    def _renew(self) -> None:
        if self.lost or not self.value:
            raise self._lost("it is not held")
        at = self.clock()
        if not int(self.r.eval(RENEW, 1, self.key, self.value, self.settings.lease_ms)):
            raise self._lost("another writer holds it or it lapsed")
        self.renewed_at = at

    def ensure(self) -> None:
        """Before a read or write: fail when the lease is known lost, and renew
        first when the last renewal is older than the renewal period allows (after
        a pause the lease may have lapsed)."""
        if self.lost:
            raise self._lost("it was lost")
        if self.clock() - self.renewed_at > 1.5 * self.settings.renew_every_ms / 1000:
            self.renew()

    def check(self) -> None:
        """Compare the lease with ours now (before a dead letter, an ack, a trim or
        the rename of a checkpoint file)."""
        if self.lost or self.holder_now() != self.value:
            raise self._lost("another writer holds it or it lapsed")

    def release(self) -> None:
        """Give the lease back (after the final checkpoint), so a standby need not wait."""
        if self.value and not self.lost:
            self.r.eval(RELEASE, 1, self.key, self.value)
        self.value = ""

    def _lost(self, why: str) -> LeaseLostError:
        self.lost = True
        return LeaseLostError(f"writer lease {self.key} lost ({why}); this writer stops writing")

    # -- fenced writes --------------------------------------------------------------
    def set(self, key: str, data: bytes) -> None:
        """``SET key data`` only while the lease is ours."""
        if self.lost or not int(self.r.eval(FENCED_SET, 2, self.key, key, self.value, data)):
            raise self._lost("a fenced write was refused")

    def xadd_all(self, stream: str, entries: Sequence[dict[str, Any]]) -> list[str]:
        """``XADD`` each entry in order only while the lease is ours; their ids."""
        ids: list[str] = []
        args: list[Any] = []
        for fields in entries:
            flat: list[Any] = [len(fields) * 2]
            for name, value in fields.items():
                flat += [name, value]
            if args and len(args) + len(flat) > MAX_SCRIPT_ARGS:
                ids += self._xadd(stream, args)
                args = []
            args += flat
        if args:
            ids += self._xadd(stream, args)
        return ids

    def _xadd(self, stream: str, args: list[Any]) -> list[str]:
        got = (
            None if self.lost else self.r.eval(FENCED_XADD, 2, self.key, stream, self.value, *args)
        )
        if not got:
            raise self._lost("a fenced write was refused")
        return [_text(sid) for sid in got]

    # -- the renewal thread ----------------------------------------------------------
    def keep(self, stop: threading.Event, on_lost: Callable[[LeaseLostError], None]) -> None:
        """Renew every ``renew_every_ms`` until ``stop`` or until the lease is lost
        (then ``on_lost``). Redis errors are retried at the next period: the
        fenced writes refuse anyway once the lease has lapsed."""
        period_s = self.settings.renew_every_ms / 1000
        while not stop.wait(period_s):
            if not self.value:
                continue
            try:
                self.renew()
            except LeaseLostError as exc:
                on_lost(exc)
                return
            except Exception as exc:  # loop boundary: log and try again next period
                log.warning("lease %s: renewal failed (%s: %s)", self.key, type(exc).__name__, exc)
