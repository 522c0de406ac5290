"""The whole service against a real local Redis Cluster of three masters.

Six spaces whose hash tags land two on each master; every node runs the shipped
ACL users (deploy/redis/users.conf), so each command the cluster needs must be
granted there (the ACL log of every node stays empty). ``streamrate serve``
processes: one writer for five spaces, a writer and a standby for the sixth,
a responder (``--role responder``) for one space. The test sends events to
every space, checks that each space's keys and its pub/sub channels sit on the
master that owns its slot (sharded pub/sub: no plain channel anywhere), asks a
pairing of every space (over the request channel, and over the request stream
for the responder) and compares it with an uninterrupted run, follows a watch
of each of five spaces and gets exactly the live messages of the events that
touch the watched pairing (so does the web server's asyncio feed, for one
space), moves one space's slot to another master while the service runs (it
goes on learning and answering; its subscriptions follow the slot), then
SIGKILLs the sixth space's writer while events stream: the standby takes the
lease within the lease time plus one second and the final checkpoint equals
the uninterrupted run (nothing lost, nothing twice).
"""

from __future__ import annotations

import asyncio
import json
import os
import signal
import subprocess
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from streamrate.checkpoint import decode_checkpoint
from streamrate.client import ask, send_events, watch
from streamrate.config import RedisSettings, Settings, SpaceKeys, SpaceSettings, WebSettings
from streamrate.connect import RedisClients
from streamrate.errors import ConfigError
from streamrate.events import MatchEvent, Matchup, event_to_json
from streamrate.models.base import Model
from streamrate.models.registry import build_model
from streamrate.web.feed import Feed
from streamrate.web.hub import Hub, PairKey, Update, pairing_key

from .cluster import LocalCluster
from .conftest import RedisServer, render_users
from .helpers import assert_same_state, serve, wait_for, world_lines
from .test_lost_replies import check_lost_replies

pytestmark = [pytest.mark.integration, pytest.mark.slow]
# Every process's lease (the takeover bound is this plus one second). A space of the
# five-space writer whose lease lapses on a loaded machine is written again by the
# same process once it is free: the other spaces go on meanwhile.
LEASE_MS = 3000
# Invented game modes of Quillrock; the test takes two per master from these.
CANDIDATES = ("duel", "skirmish", "siege", "relay", "joust", "gauntlet", "brawl", "raid",
              "trial", "melee", "rally", "clash", "quest", "sortie", "fray", "bout")  # fmt: skip
MATCHES = 300
FAILOVER_MATCHES = 1200


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LocalCluster]:
    base = tmp_path_factory.mktemp("cluster")
    acl, passwords = render_users(base / "secrets")
    c = LocalCluster(base, masters=3, acl=acl, passwords=passwords)
    try:
        c.start()
        yield c
    finally:
        c.stop()


def _spaces(cluster: LocalCluster) -> list[str]:
    """Two space names per master, chosen by the slot of their hash tag."""
    admin = cluster.node_client(cluster.nodes[0])
    per_node: dict[int, list[str]] = {n.port: [] for n in cluster.nodes}
    for name in CANDIDATES:
        slot = int(admin.execute_command("CLUSTER", "KEYSLOT", f"{{sr:{name}}}"))
        node = cluster.owner(slot)
        if len(per_node[node.port]) < 2:
            per_node[node.port].append(name)
    chosen = [name for names in per_node.values() for name in names]
    assert len(chosen) == 6, per_node
    return chosen


def _config(path: Path, cluster: LocalCluster, names: list[str], lease_ms: int) -> None:
    pw = json.dumps(str(cluster.passwords["streamrate"]))
    body = [
        f'[redis]\nurl = "{cluster.url}"\nusername = "streamrate"\npassword_file = {pw}',
        "reconnect_max_s = 0.5",
        '[checkpoint]\nstore = "redis"',
        "[metrics]\nenabled = false",  # on by default; tests must not share a port
        f"[lease]\nlease_ms = {lease_ms}\nrenew_every_ms = 300\npoll_every_ms = 100",
    ]
    for name in names:
        body += [
            f'[[spaces]]\nname = "{name}"\nmodel = "elo"\nbatch_count = 50\nblock_ms = 100',
            "checkpoint_every_events = 300\ncheckpoint_every_s = 0.3\ndedupe_window_s = 1e9",
        ]
    path.write_text("\n".join(body) + "\n")


def _client(cluster: LocalCluster, role: str) -> Any:
    """A client made the way the service makes its own (``redis+cluster://``)."""
    return RedisClients(
        RedisSettings(url=cluster.url, username=role, password_file=cluster.passwords[role])
    )()


def _keys(name: str) -> Any:
    return Settings(spaces=(SpaceSettings(name=name),)).keys(SpaceSettings(name=name))


def _covered(admin: Any, name: str, applied: int | None = None) -> bool:
    k = _keys(name)
    data = admin.get(k.ckpt)
    if data is None or not admin.exists(k.events):
        return False
    ck = decode_checkpoint(data, keep=1_000_000, window_s=1e12)
    last = admin.xinfo_stream(k.events)["last-generated-id"].decode()
    return ck.last_id == last and (applied is None or ck.applied == applied)


def _reference(events: list[MatchEvent]) -> Model:
    model = build_model("elo")
    for ev in events:
        model.learn(ev)
    return model


class WebFeed:
    """The web server's feed of one space, pinned to one pairing, in a thread of its own."""

    def __init__(self, url: str, keys: SpaceKeys, key: PairKey) -> None:
        self.url, self.keys, self.key = url, keys, key
        self.current: Update | None = None
        self.stop = threading.Event()
        self.thread = threading.Thread(target=asyncio.run, args=(self._main(),), daemon=True)

    async def _main(self) -> None:
        hub = Hub(max_clients=4, max_pairings=4, max_per_client=4, ring=64, queue=64)
        hub.pin([self.key])
        settings = WebSettings(probe_every_s=0.3, ask_timeout_s=3.0)
        feed = Feed(settings, self.keys, hub, self.url)
        stop = asyncio.Event()
        tasks = [asyncio.create_task(feed.listen(stop)), asyncio.create_task(feed.probe(stop))]
        while not self.stop.is_set():
            self.current = hub.current(self.key)
            await asyncio.sleep(0.05)
        stop.set()
        await asyncio.gather(*tasks)
        await feed.close()


def _unique_in(lines: list[str], events: list[MatchEvent]) -> int:
    """How many of ``events`` (in order) first occur in ``lines``."""
    sent = set(lines)
    n = 0
    while n < len(events) and event_to_json(events[n]) in sent:
        n += 1
    return n


def _assert_answer(
    admin: Any, asker: Any, name: str, events: list[MatchEvent], a: list[str], b: list[str]
) -> None:
    """A pairing of ``name`` answered as an uninterrupted run of ``events`` answers it."""
    rep = ask(asker, _keys(name).requests, {"kind": "pairing", "first": a, "second": b}, 10.0)
    assert rep["ok"], rep
    want = _reference(events).predict(Matchup(first=a, second=b)).p_win
    assert rep["p_first_wins"] == pytest.approx(want, rel=1e-9, abs=1e-12), name
    last = admin.xinfo_stream(_keys(name).events)["last-generated-id"].decode()
    assert rep["model_version"] == last


def _stop(*procs: subprocess.Popen[bytes]) -> None:
    for p in procs:
        if p.poll() is None:
            os.kill(p.pid, signal.SIGKILL)
            p.wait()


def test_six_spaces_on_three_masters_with_failover(cluster: LocalCluster, tmp_path: Path) -> None:
    names = _spaces(cluster)
    admin = cluster.cluster_client()
    nodes = {n.port: cluster.node_client(n) for n in cluster.nodes}
    owner = {name: cluster.owner(admin.keyslot(f"{{sr:{name}}}")) for name in names}
    # Two spaces per master, and the server agrees with the client on every slot.
    assert sorted(list(owner.values()).count(n) for n in cluster.nodes) == [2, 2, 2]
    for name in names:
        got = nodes[owner[name].port].execute_command("CLUSTER", "KEYSLOT", _keys(name).events)
        assert int(got) == admin.keyslot(_keys(name).lease)
    failed, rest = names[0], names[1:]  # ``failed``: the space whose writer is killed
    shifted = rest[2]  # the space whose slot moves to another master

    worlds = {name: world_lines(MATCHES, seed=71 + i) for i, name in enumerate(rest)}
    worlds[failed] = world_lines(FAILOVER_MATCHES, seed=70)
    # Lines sent before the slot move (all of them for the other spaces).
    cut = {name: len(w[0]) for name, w in worlds.items()}
    cut[shifted] = len(worlds[shifted][0]) * 3 // 4
    # Unique events in the lines sent before the slot move.
    upto = {name: _unique_in(worlds[name][0][: cut[name]], worlds[name][1]) for name in rest}
    main_cfg, one_cfg, resp_cfg = tmp_path / "main.toml", tmp_path / "one.toml", tmp_path / "r.toml"
    _config(main_cfg, cluster, rest, LEASE_MS)
    _config(one_cfg, cluster, [failed], LEASE_MS)
    _config(resp_cfg, cluster, [rest[0]], LEASE_MS)
    logs = {k: tmp_path / f"{k}.log" for k in ("main", "writer", "standby", "responder")}
    procs: list[subprocess.Popen[bytes]] = []
    producer, asker = _client(cluster, "producer"), _client(cluster, "asker")
    try:
        procs.append(serve(main_cfg, logs["main"], "both"))
        procs.append(writer := serve(one_cfg, logs["writer"], "both"))

        def listening(name: str) -> bool:
            node = nodes[owner[name].port]
            return (
                dict(node.pubsub_shardnumsub(_keys(name).requests))[_keys(name).requests.encode()]
                >= 1
                and admin.get(_keys(name).lease) is not None
            )

        for name in names:
            wait_for(lambda n=name: listening(n), 120, f"the writer of {name}")
        old_holder = admin.get(_keys(failed).lease)
        procs.append(serve(one_cfg, logs["standby"], "standby"))
        procs.append(serve(resp_cfg, logs["responder"], "responder"))

        # Phase 1: the first half of every space's events.
        half = {name: len(w[0]) // 2 for name, w in worlds.items()}
        for name in rest:
            send_events(producer, _keys(name).events, worlds[name][0][: half[name]])
        send_events(producer, _keys(failed).events, worlds[failed][0][: half[failed] // 2])
        for name in names:
            wait_for(lambda n=name: _covered(admin, n), 60, f"{name} to cover phase 1")

        # Every key and every channel of a space is on the master of its slot;
        # the service uses sharded pub/sub only (no plain channel on any node).
        for name in names:
            node = nodes[owner[name].port]
            slot = admin.keyslot(_keys(name).events)
            assert int(node.execute_command("CLUSTER", "COUNTKEYSINSLOT", slot)) >= 5
            assert _keys(name).requests.encode() in node.pubsub_shardchannels()
        for node in nodes.values():
            assert node.pubsub_channels() == []

        # Phase 2: a watch per space, then the second half of the events.
        watched = {}
        for name in rest:
            first_half = set(worlds[name][0][: half[name]])
            later = [e for e in worlds[name][1][: upto[name]] if event_to_json(e) not in first_half]
            a, b = later[0].first[0], later[0].second[0]
            watched[name] = (a, b, [e.match_id for e in later if {a, b} & set(e.entities())])
        got: dict[str, list[dict[str, Any]]] = {name: [] for name in rest}
        stop = threading.Event()
        threads = []
        for name in rest:
            ready = threading.Event()
            a, b, _ = watched[name]
            t = threading.Thread(
                target=watch,
                args=(_client(cluster, "asker"), _keys(name).requests,
                      [{"first": [a], "second": [b]}], got[name].append, stop),
                kwargs={"watcher": f"t-{name}", "ready": ready, "timeout_s": 10.0},
                daemon=True,
            )  # fmt: skip
            t.start()
            assert ready.wait(30), f"watch of {name}"
            threads.append(t)
        web_space = rest[1]
        a, b, _ = watched[web_space]
        pw = cluster.password("asker")
        web = WebFeed(
            cluster.url.replace("://", f"://asker:{pw}@"),
            _keys(web_space),
            pairing_key([a], [b], {}),
        )
        web.thread.start()
        wait_for(lambda: web.current is not None, 30, "the web feed's first answer")
        for name in rest:
            send_events(producer, _keys(name).events, worlds[name][0][half[name] : cut[name]])
        for name in rest:
            n_events = upto[name]
            wait_for(lambda n=name, k=n_events: _covered(admin, n, k), 60, f"{name} phase 2")
            k = len(watched[name][2])
            wait_for(lambda n=name, k=k: len(got[n]) >= k, 30, f"live feed of {name}")
        last = got[web_space][-1]
        wait_for(
            lambda: web.current is not None and web.current.match_id == last["match_id"],
            30,
            "the web feed to show the last live message",
        )
        assert web.current is not None and web.current.p_first_wins == last["p_first_wins"]
        web.stop.set()
        stop.set()
        for t in [*threads, web.thread]:
            t.join(15)
        for name in rest:
            assert [m["match_id"] for m in got[name]] == watched[name][2], name
            assert [m["seq"] for m in got[name]] == list(range(1, len(got[name]) + 1))

        # Answers equal an uninterrupted run of each space's events.
        for name in rest:
            a, b, _ = watched[name]
            _assert_answer(admin, asker, name, worlds[name][1][: upto[name]], [a], [b])
        k0 = _keys(rest[0])  # the space with a responder: ask over the request stream
        a, b, _ = watched[rest[0]]
        rep = ask(asker, k0.requests, {"kind": "pairing", "first": [a], "second": [b]},
                  timeout_s=10.0, stream=k0.request_stream)  # fmt: skip
        want_p = _reference(worlds[rest[0]][1]).predict(Matchup(first=[a], second=[b])).p_win
        assert rep["ok"] and rep["p_first_wins"] == pytest.approx(want_p, rel=1e-9, abs=1e-12)

        # The slot of ``shifted`` moves to another master while the service runs:
        # commands follow MOVED/ASK, the sharded subscriptions move with the slot.
        slot = admin.keyslot(_keys(shifted).events)
        src = owner[shifted]
        dst = next(n for n in cluster.nodes if n is not src)
        cluster.move_slot(slot, dst)
        assert cluster.owner(slot) is dst
        assert int(nodes[src.port].execute_command("CLUSTER", "COUNTKEYSINSLOT", slot)) == 0
        assert int(nodes[dst.port].execute_command("CLUSTER", "COUNTKEYSINSLOT", slot)) >= 5
        channel = _keys(shifted).requests.encode()
        wait_for(lambda: channel in nodes[dst.port].pubsub_shardchannels(), 30, "resubscribe")
        assert channel not in nodes[src.port].pubsub_shardchannels()
        send_events(producer, _keys(shifted).events, worlds[shifted][0][cut[shifted] :])
        n_all = len(worlds[shifted][1])
        wait_for(lambda: _covered(admin, shifted, n_all), 60, f"{shifted} after the slot move")
        a, b, _ = watched[shifted]
        _assert_answer(admin, asker, shifted, worlds[shifted][1], [a], [b])
        # A blocked read the move cut off is expected: a warning line, no error line,
        # no traceback (it is counted in streamrate_stream_reads_cut_total).
        main_log = logs["main"].read_text()
        assert "Traceback" not in main_log
        for line in main_log.splitlines():
            assert " ERROR " not in line or "UNBLOCKED" not in line, line
            if "was cut off" in line:
                assert " WARNING " in line, line

        # Failover: the writer of ``failed`` is killed while its events stream in.
        wait_for(lambda: "replica loaded" in logs["standby"].read_text(), 120, "the standby")
        lines = worlds[failed][0][half[failed] // 2 :]
        sender = threading.Thread(
            target=send_events,
            args=(_client(cluster, "producer"), _keys(failed).events, lines),
            kwargs={"rate_per_s": 600.0, "chunk": 20},
        )
        sender.start()
        start_len = half[failed] // 2
        wait_for(lambda: admin.xlen(_keys(failed).events) > start_len + len(lines) // 3, 60, "1/3")
        os.kill(writer.pid, signal.SIGKILL)
        killed_at = time.monotonic()
        writer.wait()
        wait_for(lambda: admin.get(_keys(failed).lease) not in (None, old_holder), 30, "takeover")
        assert time.monotonic() - killed_at < LEASE_MS / 1000 + 1.0
        sender.join()
        n_moved = len(worlds[failed][1])
        wait_for(lambda: _covered(admin, failed, n_moved), 90, "the new writer to cover all")
        ck = decode_checkpoint(admin.get(_keys(failed).ckpt), keep=1_000_000, window_s=1e12)
        assert ck.applied == n_moved and ck.counters["dead_lettered"] == worlds[failed][2]
        ref = _reference(worlds[failed][1])
        assert_same_state(ck, ref)
        ev = worlds[failed][1][-1]
        q = {"kind": "pairing", "first": list(ev.first), "second": list(ev.second)}
        rep = ask(asker, _keys(failed).requests, q, timeout_s=10.0)
        want_p = ref.predict(Matchup(first=ev.first, second=ev.second)).p_win
        assert rep["ok"] and rep["p_first_wins"] == pytest.approx(want_p, rel=1e-9, abs=1e-12)

        for p in procs:
            if p.poll() is None:
                os.kill(p.pid, signal.SIGTERM)
        for p in procs:
            if p is not writer:
                assert p.wait(30) == 0
    finally:
        _stop(*procs)
    assert "becomes the writer" in logs["standby"].read_text()
    for port, node in nodes.items():  # every command the service sent was granted
        assert node.acl_log() == [], (port, node.acl_log())


def test_a_plain_server_or_a_wrong_password_is_refused_at_start(
    cluster: LocalCluster, redis_server: RedisServer
) -> None:
    """``serve`` checks the URL once at start: no retry can fix these two."""
    plain = RedisClients(RedisSettings(url=f"redis+cluster://127.0.0.1:{redis_server.port}/0"))
    with pytest.raises(ConfigError, match="Cluster mode is not enabled"):
        plain.check()
    wrong = cluster.url.replace("://", "://streamrate:not-the-password@")
    with pytest.raises(ConfigError, match="refused the user name or password"):
        RedisClients(RedisSettings(url=wrong)).check()


def test_a_lost_reply_is_not_sent_again_on_a_cluster(cluster: LocalCluster) -> None:
    # The cluster client of redis-py repeats a command ten times by default; ours never.
    check_lost_replies(
        cluster.url,
        cluster.cluster_client(),
        "lostreply",
        username="streamrate",
        password_file=cluster.passwords["streamrate"],
    )
