"""The in-process fan-out: caps, ordering by model version, slow subscribers, resuming."""

from __future__ import annotations

import asyncio

import pytest
from hypothesis import given
from hypothesis import strategies as st

from streamrate.web.hub import Hub, HubFull, Update, pairing_key, version_order

A = pairing_key(["kelvash"], ["morvenn"], {})
B = pairing_key(["tuvrenn"], ["oskuvar"], {"map": "saltflats"})


def _hub(**kw: int) -> Hub:
    args = {"max_clients": 4, "max_pairings": 4, "max_per_client": 2, "ring": 64, "queue": 8}
    return Hub(**{**args, **kw})


def _u(key: object, p: float, ms: int, seq: int = 0) -> Update:
    return Update(key, p, None, f"{ms}-{seq}", f"m-{ms}-{seq}", 0)  # type: ignore[arg-type]


def test_caps_on_clients_pairings_and_pairings_per_client() -> None:
    hub = _hub(max_clients=2, max_pairings=2, max_per_client=1)
    hub.attach([A])
    with pytest.raises(HubFull, match="per client"):
        hub.attach([A, B])
    hub.attach([B])
    with pytest.raises(HubFull, match="clients"):
        hub.attach([A])
    hub2 = _hub(max_pairings=1)
    hub2.attach([A])
    with pytest.raises(HubFull, match="watched pairings"):
        hub2.attach([B])


def test_older_versions_and_repeats_are_dropped() -> None:
    hub = _hub()
    sub = hub.attach([A])
    assert hub.publish(_u(A, 0.6, 10))
    assert not hub.publish(_u(A, 0.5, 9))  # older
    assert not hub.publish(_u(A, 0.6, 10))  # the same again (a replay)
    assert hub.publish(_u(A, 0.7, 10, 1))
    assert sub.queue.qsize() == 2
    assert not hub.publish(_u(B, 0.5, 11))  # nobody watches B


def test_a_full_queue_drops_that_subscriber_only() -> None:
    hub = _hub(queue=4)
    slow, fast = hub.attach([A]), hub.attach([A])
    got = []
    for i in range(20):
        hub.publish(_u(A, i / 100, 100 + i))
        got.append(fast.queue.get_nowait())
    assert slow.overflowed and not fast.overflowed
    assert len(got) == 20 and hub.dropped == 1


def test_detached_pairings_linger_then_go() -> None:
    hub = _hub()
    sub = hub.attach([A, B])
    hub.pin([B])
    hub.detach(sub, now_s=100.0)
    assert set(hub.pairings()) == {A, B}
    assert hub.sweep(now_s=130.0, linger_s=60.0) == []
    assert hub.sweep(now_s=161.0, linger_s=60.0) == [A]
    assert hub.pairings() == [B]  # pinned stays


@given(
    steps=st.lists(
        st.tuples(st.sampled_from([0, 1]), st.floats(0.01, 0.99), st.integers(0, 3)),
        min_size=1,
        max_size=60,
    ),
    cut=st.integers(0, 59),
)
def test_resuming_from_any_event_id_misses_nothing(
    steps: list[tuple[int, float, int]], cut: int
) -> None:
    """What a browser saw up to its Last-Event-ID plus the backlog covers every update."""
    hub = _hub(ring=100, queue=100)
    keys = (A, B)
    sub = hub.attach(keys)
    published = []
    ms = 1000
    for which, p, gap in steps:
        ms += gap  # several updates may share a millisecond: sequence numbers tell them apart
        u = Update(keys[which], p, None, f"{ms}-{len(published)}", None, 0)
        if hub.publish(u):
            published.append(u)
    frames = []
    while not sub.queue.empty():
        frames.append(sub.queue.get_nowait())
    assert frames == [u.sse() for u in published]
    cut = min(cut, len(published) - 1)
    last_id = published[cut].model_version
    resumed = hub.backlog(keys, last_id, history=False)
    seen = {u.sse() for u in published[: cut + 1]}
    assert [f for f in resumed if f not in seen] == [u.sse() for u in published[cut + 1 :]]
    assert all(version_order(u.model_version) > (0, 0) for u in published)


def test_a_stream_whose_writes_block_is_closed() -> None:
    """The SSE pump gives up on a browser that stops reading (send never returns)."""
    from streamrate.config import Settings, WebSettings
    from streamrate.web.app import WatchStream, Web

    settings = Settings()
    web = Web(
        WebSettings(send_timeout_s=0.05, heartbeat_s=0.01),
        settings.keys(settings.spaces[0]),
        "duel",
        "redis://127.0.0.1:1/0",
        [],
    )
    web.feed.ensure = _nothing  # type: ignore[method-assign]  # no service here
    sent: list[bytes] = []

    async def send(msg: dict[str, object]) -> None:
        if msg["type"] == "http.response.body" and len(sent) >= 2:
            await asyncio.Event().wait()  # a browser that stopped reading
        sent.append(msg.get("body", b""))  # type: ignore[arg-type]

    async def receive() -> dict[str, object]:
        await asyncio.Event().wait()
        return {}

    scope = {"type": "http", "method": "GET", "path": "/api/watch",
             "query_string": b"p=kelvash:morvenn", "headers": []}  # fmt: skip

    async def run() -> None:
        await asyncio.wait_for(WatchStream(web)(scope, receive, send), 5)  # type: ignore[arg-type]

    asyncio.run(run())
    assert web.hub.dropped == 1
    assert web.hub.subscribers == set()


async def _nothing(keys: object) -> None:
    return None
