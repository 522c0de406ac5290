"""Pools of processes sharing spaces: the fair share, the plan, the member set."""

from __future__ import annotations

import threading
import time
from collections.abc import Callable

import fakeredis
from hypothesis import given, settings
from hypothesis import strategies as st

from streamrate.errors import CheckpointRefusedError, LeaseLostError
from streamrate.pool import Membership, PoolMember, fair_share, home, plan


def test_fair_share_is_the_ceiling() -> None:
    assert [fair_share(6, m) for m in (1, 2, 3, 4, 5, 6, 7)] == [6, 3, 2, 2, 2, 1, 1]


@given(
    st.integers(1, 12),
    st.lists(st.integers(0, 30), max_size=12),
    st.integers(1, 6),
    st.integers(0, 5),
)
def test_a_plan_keeps_to_the_share_and_to_free_spaces(
    n_spaces: int, owner_idx: list[int], n_members: int, me_idx: int
) -> None:
    spaces = [f"s{i}" for i in range(n_spaces)]
    members = [f"m{i}" for i in range(n_members)]
    me = members[me_idx % n_members]
    owners: dict[str, str | None] = {s: None for s in spaces}
    for k, i in enumerate(owner_idx):  # some held by members, some by no member
        owners[spaces[k % n_spaces]] = members[i] if i < n_members else None
    held = [s for s in spaces if owners[s] == me]
    free = [s for s in spaces if owners[s] is None]
    got = plan(me, members, spaces, owners)
    share = fair_share(n_spaces, n_members)
    assert set(got.take) <= set(free) and set(got.give) <= set(held)
    assert not (got.take and got.give)
    after = len(held) + len(got.take) - len(got.give)
    assert after <= max(share, 0) and (after >= len(held) or len(held) > n_spaces // n_members)


def _settle(members: list[str], spaces: list[str], owner: dict[str, str], order: list[int]) -> int:
    """Turns of every member (in ``order``) against one lease table until nothing moves."""
    for turn in range(100):
        moved = False
        for k in [*order, *range(len(members))]:
            me = members[k % len(members)]
            owners: dict[str, str | None] = {s: owner.get(s) for s in spaces}
            got = plan(me, members, spaces, owners)
            for s in got.give:
                del owner[s]
            for s in got.take:
                owner.setdefault(s, me)  # the lease: the first taker wins
            moved = moved or bool(got.give or got.take)
        if not moved:
            return turn
    raise AssertionError("the pool did not settle")


def _balanced(owner: dict[str, str], members: list[str], n_spaces: int) -> None:
    counts = [list(owner.values()).count(m) for m in members]
    assert set(owner.values()) <= set(members)
    assert all(n_spaces // len(members) <= c <= fair_share(n_spaces, len(members)) for c in counts)


@settings(max_examples=60)
@given(st.integers(1, 10), st.integers(1, 6), st.lists(st.integers(0, 20), min_size=1))
def test_members_settle_with_every_space_held_once_within_the_share(
    n_spaces: int, n_members: int, order: list[int]
) -> None:
    spaces = [f"s{i}" for i in range(n_spaces)]
    members = [f"m{i}" for i in range(n_members)]
    owner: dict[str, str] = {}
    _settle(members, spaces, owner, order)
    assert set(owner) == set(spaces)  # every space has a writer
    _balanced(owner, members, n_spaces)
    # One member leaves: its spaces are free and go to the others.
    rest = members[:-1] or members
    if rest != members:
        owner = {s: m for s, m in owner.items() if m != members[-1]}
        _settle(rest, spaces, owner, order)
        assert set(owner) == set(spaces)
        _balanced(owner, rest, n_spaces)
    # One joins: it gets its share (at least one when there are spaces enough).
    everyone = [*rest, "joined"]
    _settle(everyone, spaces, owner, order)
    assert set(owner) == set(spaces)
    _balanced(owner, everyone, n_spaces)
    if n_spaces >= len(everyone):
        assert "joined" in owner.values()


def test_home_is_one_of_the_members_and_stable() -> None:
    members = ["a", "b", "c"]
    homes = {s: home(s, members) for s in ("x", "y", "z", "w")}
    assert set(homes.values()) <= set(members)
    assert homes == {s: home(s, list(reversed(members))) for s in homes}


def test_the_member_set_counts_members_by_the_server_clock() -> None:
    r = fakeredis.FakeRedis()
    a = Membership(r, "{sr}:pool:main", "a", 200)
    b = Membership(r, "{sr}:pool:main", "b", 200)
    assert a.beat() == ["a"]
    assert b.beat() == ["a", "b"]
    time.sleep(0.3)  # a stopped beating: gone (the server's clock, not ours)
    assert b.beat() == ["b"]
    b.leave()
    assert r.zrange("{sr}:pool:main", 0, -1) == []


class _FakeSpace:
    def __init__(self, name: str, leases: dict[str, str], me: str) -> None:
        self.name, self.leases, self.me = name, leases, me
        self.fatal = None
        self.closed = threading.Event()
        self.retired = 0

    def retire(self) -> None:
        self.retired += 1

    def threads(self, stop: threading.Event) -> list[threading.Thread]:
        def run() -> None:
            stop.wait()
            self.leases.pop(self.name, None)  # final checkpoint, then the lease back
            self.closed.set()

        return [threading.Thread(target=run, daemon=True)]


def test_a_member_gives_back_what_is_above_its_share_when_another_joins() -> None:
    r = fakeredis.FakeRedis()
    leases: dict[str, str] = {}
    spaces = [f"s{i}" for i in range(4)]

    def member(name: str) -> PoolMember:
        def take(sp: _FakeSpace) -> bool:
            return leases.setdefault(sp.name, name) == name

        return PoolMember(
            Membership(r, "{sr}:pool:main", name, 10_000),
            spaces,
            lambda s: _FakeSpace(s, leases, name),
            take,  # type: ignore[arg-type]
            leases.get,
            10,
        )

    a, b = member("a"), member("b")
    stop = threading.Event()
    a.turn(stop)
    assert a.held == spaces  # alone: everything
    b.turn(stop)  # b counts two members, finds nothing free
    assert b.held == []
    a.turn(stop)  # a sees b: gives back two (gracefully, in their threads)
    given = {name: a.running[name].space for name in a.giving}
    for name in a.giving:
        for t in a.running[name].threads:
            t.join(5)
    a.turn(stop)
    assert len(given) == 2
    assert all(sp.retired == 1 for sp in given.values())  # type: ignore[attr-defined]
    b.turn(stop)
    assert len(a.held) == 2 and len(b.held) == 2
    assert sorted(leases) == spaces and sorted(set(leases.values())) == ["a", "b"]
    stop.set()
    for m in (a, b):
        for run in m.running.values():
            run.stop.set()


class _EndingSpace(_FakeSpace):
    """A space whose writer ends by itself with ``fatal`` (lease lost, checkpoint refused)."""

    def __init__(self, name: str, leases: dict[str, str], me: str, fatal: Exception) -> None:
        super().__init__(name, leases, me)
        self.fatal_to_be = fatal

    def threads(self, stop: threading.Event) -> list[threading.Thread]:
        def run() -> None:
            self.fatal = self.fatal_to_be  # type: ignore[assignment]
            stop.set()

        return [threading.Thread(target=run, daemon=True)]


def _lone_member(make: Callable[[str], _FakeSpace], leases: dict[str, str]) -> PoolMember:
    def take(sp: _FakeSpace) -> bool:
        return leases.setdefault(sp.name, "a") == "a"

    return PoolMember(
        Membership(fakeredis.FakeRedis(server=fakeredis.FakeServer()), "{sr}:pool:x", "a", 10_000),
        ["s0"],
        make,
        take,  # type: ignore[arg-type]
        leases.get,
        10,
    )


def test_a_space_whose_lease_was_lost_is_dropped_and_taken_again_once_free() -> None:
    leases: dict[str, str] = {}
    made: list[_FakeSpace] = []

    def make(name: str) -> _FakeSpace:
        sp: _FakeSpace = (
            _EndingSpace(name, leases, "a", LeaseLostError("lost")) if not made
            else _FakeSpace(name, leases, "a")
        )  # fmt: skip
        made.append(sp)
        return sp

    m = _lone_member(make, leases)
    stop = threading.Event()
    m.turn(stop)
    for t in m.running["s0"].threads:
        t.join(5)
    leases.clear()  # the lease lapsed (or another writer's lapsed)
    m.turn(stop)  # reaps the lost one, takes the space again
    assert m.fatal is None and m.held == ["s0"] and len(made) == 2
    m.running["s0"].stop.set()


def test_a_lease_left_in_this_members_name_is_taken_again_not_given_back() -> None:
    # The release of a lease failed (Redis away at that moment), so the lease
    # still names this member although no writer of its runs: the member must
    # take the space again, not plan to give back a space it does not run.
    leases = {"s0": "a"}
    made: list[_FakeSpace] = []

    def make(name: str) -> _FakeSpace:
        made.append(_FakeSpace(name, leases, "a"))
        return made[-1]

    m = _lone_member(make, leases)
    stop = threading.Event()
    m.turn(stop)
    assert m.fatal is None and m.held == ["s0"] and len(made) == 1
    m.running["s0"].stop.set()


def test_a_refused_checkpoint_stops_the_member() -> None:
    leases: dict[str, str] = {}
    refused = CheckpointRefusedError("other settings")
    m = _lone_member(lambda name: _EndingSpace(name, leases, "a", refused), leases)
    stop = threading.Event()
    runner = threading.Thread(target=m.run, args=(stop,), daemon=True)
    runner.start()
    runner.join(10)
    assert not runner.is_alive()
    assert m.fatal is refused and stop.is_set()  # the service then exits with code 2
