"""Several ``streamrate serve --role shared`` processes sharing a set of spaces.

Each member of a pool registers itself in one Redis sorted set
(``{sr}:pool:<name>``, see :meth:`streamrate.config.Settings.pool_key`): the
member id scored with the Redis server's clock plus ``member_ttl_ms``. Every
``heartbeat_ms`` a member renews its score, drops the members whose score has
passed (they stopped heart-beating: killed, paused, cut off) and reads who is
left, all in one script. Clocks of the hosts never matter: only the server's
``TIME`` is used.

From the members it computes its fair share, ``ceil(spaces / members)``, and:

- takes free spaces (no writer lease, :mod:`streamrate.stream.lease`) while it
  holds fewer than its share; the lease decides races (``SET`` only when free);
- gives back, gracefully (final checkpoint, then the lease), the spaces it holds
  above its share, and one at a time down to ``floor(spaces / members)`` while a
  member that joined holds fewer, so that it gets some (see :func:`plan`).

Which spaces a member prefers is a rendezvous hash of (member, space): members
starting together mostly go for different spaces, and a space goes back to the
same member while the members stay the same.

Every space is held by at most one writer at any moment (the lease); a space
whose writer died is free once its lease lapses and is taken by a member below
its share (all members together have at least as many places as spaces, so
one of them is).

>>> fair_share(6, 3), fair_share(6, 4), fair_share(6, 0)
(2, 2, 6)
>>> plan("a", ["a", "b"], ["s1", "s2", "s3"], {"s1": "a", "s2": "a", "s3": "a"}).give
['s1']
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import math
import threading
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import redis

from streamrate.errors import CheckpointRefusedError, ServiceError

log = logging.getLogger("streamrate.pool")
REDIS_DOWN = (redis.ConnectionError, redis.TimeoutError)

HEARTBEAT = """
local t = redis.call('TIME')
local now = tonumber(t[1]) * 1000 + math.floor(tonumber(t[2]) / 1000)
redis.call('ZREMRANGEBYSCORE', KEYS[1], '-inf', now)
if ARGV[3] == '1' then
  redis.call('ZADD', KEYS[1], now + tonumber(ARGV[2]), ARGV[1])
  redis.call('PEXPIRE', KEYS[1], 2 * tonumber(ARGV[2]))
end
return redis.call('ZRANGE', KEYS[1], 0, -1)
"""
"""KEYS: the member set. ARGV: member id, ttl ms, 1 to register (0: only read).
Returns the members alive by the server's clock."""


def fair_share(spaces: int, members: int) -> int:
    """Spaces one member may hold: ``ceil(spaces / members)`` (all when alone)."""
    return spaces if members <= 0 else math.ceil(spaces / members)


def _rank(member: str, space: str) -> bytes:
    return hashlib.blake2b(f"{member}\n{space}".encode(), digest_size=8).digest()


def home(space: str, members: Sequence[str]) -> str:
    """The member a space prefers (rendezvous hash: highest rank wins)."""
    return max(members, key=lambda m: _rank(m, space))


@dataclass(frozen=True)
class Plan:
    """What a member does this turn: spaces to try to take, spaces to give back."""

    take: list[str] = field(default_factory=list)
    give: list[str] = field(default_factory=list)


def plan(
    me: str, members: Sequence[str], spaces: Sequence[str], owners: Mapping[str, str | None]
) -> Plan:
    """This member's moves, from who holds each space now (``owners``: space ->
    member id, None when its lease is free; a holder that is not a member counts
    as nobody's share but the space is not free).

    - above the fair share ``ceil(spaces / members)``: give back the excess;
    - when no space is free and a member holds fewer than ``floor(spaces /
      members)`` (it joined), the member holding most (ties: the highest id)
      gives one back, one space per turn, so the newcomer gets a share;
    - take free spaces up to the fair share, or only up to the floor while
      another member is below the floor (the free spaces are for it).

    Spaces whose home (:func:`home`) is this member are taken first and given
    back last; ties go by the rendezvous rank, so the choice is stable.
    """
    everyone = sorted({*members, me})
    hi = fair_share(len(spaces), len(everyone))
    lo = len(spaces) // len(everyone)
    counts = dict.fromkeys(everyone, 0)
    for owner in owners.values():
        if owner in counts:
            counts[owner] += 1
    mine = [s for s in spaces if owners.get(s) == me]
    free = [s for s in spaces if s in owners and owners[s] is None]

    def order(space: str) -> tuple[bool, bytes]:  # own home first, then by rank
        return (home(space, everyone) != me, bytes(255 - b for b in _rank(me, space)))

    if len(mine) > hi:
        return Plan(give=sorted(mine, key=order, reverse=True)[: len(mine) - hi])
    starving = [m for m in everyone if m != me and counts[m] < lo]
    if starving and not free and len(mine) > lo:
        if max(everyone, key=lambda m: (counts[m], m)) == me:
            return Plan(give=sorted(mine, key=order, reverse=True)[:1])
        return Plan()
    room = (lo if starving else hi) - len(mine)
    return Plan(take=sorted(free, key=order)[:room] if room > 0 else [])


class Held(Protocol):
    """A space this member writes (:class:`streamrate.service.SpaceService`)."""

    fatal: Any

    def threads(self, stop: threading.Event) -> list[threading.Thread]: ...

    def retire(self) -> None:
        """It stopped here while this member goes on: drop what it exported."""


class Membership:
    """This process's entry in the pool's member set."""

    def __init__(self, client: Any, key: str, member: str, ttl_ms: int) -> None:
        self.r, self.key, self.member, self.ttl_ms = client, key, member, ttl_ms

    def beat(self) -> list[str]:
        """Register (or renew) this member; the members alive now."""
        got = self.r.eval(HEARTBEAT, 1, self.key, self.member, self.ttl_ms, 1)
        return sorted(m.decode() if isinstance(m, bytes) else str(m) for m in got)

    def leave(self) -> None:
        self.r.zrem(self.key, self.member)


@dataclass
class _Running:
    space: Held
    stop: threading.Event
    threads: list[threading.Thread]

    def alive(self) -> bool:
        return any(t.is_alive() for t in self.threads)


class PoolMember:
    """Takes and gives back spaces by the fair share (see the module docstring).

    ``make_space(name)`` builds the writer of a space (not started);
    ``try_take(held)`` takes its lease, True when it did; ``owner_of(name)`` is the
    member holding a space's lease now (None: free). All three are injected.
    """

    def __init__(
        self,
        membership: Membership,
        spaces: Sequence[str],
        make_space: Callable[[str], Held],
        try_take: Callable[[Held], bool],
        owner_of: Callable[[str], str | None],
        heartbeat_ms: int,
        on_change: Callable[[int, int], None] = lambda members, held: None,
    ) -> None:
        self.membership, self.spaces = membership, list(spaces)
        self.make_space, self.try_take, self.owner_of = make_space, try_take, owner_of
        self.period_s = heartbeat_ms / 1000
        self.on_change = on_change
        self.running: dict[str, _Running] = {}
        self.giving: set[str] = set()
        self.members: list[str] = []
        self.fatal: ServiceError | None = None

    @property
    def held(self) -> list[str]:
        """Spaces this member writes now (those being given back included)."""
        return sorted(self.running)

    def turn(self, outer: threading.Event) -> None:
        """One heartbeat: renew, reap ended spaces, give back or take."""
        self.members = self.membership.beat()
        self._reap()
        if self.fatal is not None:
            return
        me = self.membership.member
        owners: dict[str, str | None] = {}
        for s in self.spaces:
            if s in self.giving:
                owners[s] = ""  # still ours until its final checkpoint, not in our share
            elif s in self.running:
                owners[s] = me
            else:
                # A lease that still names this member although no writer of its
                # runs here (its release failed) is ours to take again: the take
                # script accepts a lease carrying our own holder name.
                owner = self.owner_of(s)
                owners[s] = None if owner == me else owner
        todo = plan(me, self.members, self.spaces, owners)
        for name in todo.give:
            log.info(
                "space %s: giving it back (%d members, a share of %d)",
                name,
                len(self.members),
                fair_share(len(self.spaces), len(self.members)),
            )
            self.giving.add(name)
            self.running[name].stop.set()  # final checkpoint, then the lease is given back
        for name in todo.take:
            self._take(name, outer)
        self.on_change(len(self.members), len(self.running))

    def _take(self, name: str, outer: threading.Event) -> None:
        space = self.make_space(name)
        if not self.try_take(space):
            return  # another member was quicker
        stop = threading.Event()
        threads = space.threads(stop)
        for t in threads:
            t.start()
        self.running[name] = _Running(space, stop, threads)
        log.info(
            "space %s: this member writes it now (%d of a share of %d, %d members)",
            name,
            len(self.running),
            fair_share(len(self.spaces), len(self.members)),
            len(self.members),
        )
        if outer.is_set():
            stop.set()

    def _reap(self, final: bool = False) -> None:
        for name, run in list(self.running.items()):
            if run.alive():
                continue
            del self.running[name]
            self.giving.discard(name)
            if not final:
                run.space.retire()  # its next writer exports its series
            fatal = run.space.fatal
            if isinstance(fatal, CheckpointRefusedError):
                self.fatal = fatal
            elif fatal is not None:
                log.warning("space %s: no longer written here (%s)", name, fatal)

    def run(self, stop: threading.Event) -> None:
        """Heart-beat until ``stop``; then stop every space (final checkpoints) and leave."""
        while not stop.is_set() and self.fatal is None:
            try:
                self.turn(stop)
            except REDIS_DOWN as exc:
                log.warning("pool: Redis unreachable (%s); retrying", exc)
            except Exception as exc:  # loop boundary: log and go on at the next beat
                log.exception("pool: error in the heartbeat (%s)", exc)
            stop.wait(self.period_s)
        for run in self.running.values():
            run.stop.set()
        for run in self.running.values():
            for t in run.threads:
                t.join()
        self._reap(final=True)
        with contextlib.suppress(*REDIS_DOWN):
            self.membership.leave()
        if self.fatal is not None:
            stop.set()
