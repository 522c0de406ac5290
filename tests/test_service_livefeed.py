"""Per-watcher watch lists and the live feed messages."""

from __future__ import annotations

import json

import pytest
from hypothesis import given
from hypothesis import strategies as st

from streamrate.config import Settings, SpaceSettings
from streamrate.livefeed import SHARED_WATCHER, WatchLimitError, WatchRegistry, live_messages
from streamrate.models.registry import build_model

NAMES = ["kelvash", "morvenn", "tuvrenn", "oskuvar", "bravik", "vantor"]
KEYS = Settings(spaces=(SpaceSettings(name="duel"),)).keys(SpaceSettings(name="duel"))
pair = st.tuples(
    st.lists(st.sampled_from(NAMES[:3]), min_size=1, max_size=2, unique=True),
    st.lists(st.sampled_from(NAMES[3:]), min_size=1, max_size=2, unique=True),
)


class Clock:
    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


@given(
    lists=st.dictionaries(st.sampled_from(["w1", "w2", "w3"]), st.lists(pair, max_size=6)),
    touched=st.lists(st.sampled_from(NAMES), max_size=4),
)
def test_affected_pairs_are_exactly_each_watchers_own_sharing_an_entity(
    lists: dict[str, list[tuple[list[str], list[str]]]], touched: list[str]
) -> None:
    w = WatchRegistry(per_watcher=100, max_watchers=10)
    for who, pairs in lists.items():
        w.set(who, [(a, b, {}) for a, b in pairs], ttl_s=60)
    got = {(who, p.first, p.second) for who, p in w.affected(touched)}
    want = {
        (who, tuple(a), tuple(b))
        for who, pairs in lists.items()
        for a, b in pairs
        if set(a + b) & set(touched)
    }
    assert got == want
    assert w.touches(touched) == bool(want)


def test_two_watchers_each_get_only_their_own_pairings() -> None:
    w = WatchRegistry(per_watcher=8, max_watchers=8)
    w.set("tab-a", [(["kelvash"], ["morvenn"], {})], ttl_s=60)
    w.set("tab-b", [(["tuvrenn"], ["oskuvar"], {})], ttl_s=60)
    assert [(who, p.first) for who, p in w.affected(["morvenn"])] == [("tab-a", ("kelvash",))]
    assert [(who, p.first) for who, p in w.affected(["oskuvar"])] == [("tab-b", ("tuvrenn",))]
    # One watcher replacing its list leaves the other's alone (the old global list did not).
    w.set("tab-b", [(["bravik"], ["vantor"], {})], ttl_s=60)
    assert [who for who, _ in w.affected(["kelvash", "bravik"])] == ["tab-a", "tab-b"]
    assert w.clear("tab-a") == 0 and [who for who, _ in w.affected(["kelvash"])] == []


def test_a_watcher_that_stops_renewing_expires_and_one_that_renews_stays() -> None:
    clock = Clock()
    w = WatchRegistry(per_watcher=8, max_watchers=8, clock=clock)
    w.set("quiet", [(["kelvash"], ["morvenn"], {})], ttl_s=10)
    w.set("steady", [(["kelvash"], ["oskuvar"], {})], ttl_s=10)
    for _ in range(3):
        clock.now += 6
        assert w.renew("steady", ttl_s=10) == 1
    assert [who for who, _ in w.affected(["kelvash"])] == ["steady"]
    assert w.renew("quiet", ttl_s=10) == 0  # gone: the client has to set its list again
    assert w.watchers() == 1
    clock.now += 11
    assert not w.touches(["kelvash"]) and w.watchers() == 0


def test_caps_per_watcher_and_on_watchers() -> None:
    w = WatchRegistry(per_watcher=2, max_watchers=2)
    assert w.set("a", [(["kelvash"], ["morvenn"], {})], ttl_s=60) == 1
    assert w.add("a", [(["tuvrenn"], ["oskuvar"], {"map": "glasswood"})], ttl_s=60) == 2
    with pytest.raises(WatchLimitError, match="per watcher"):
        w.add("a", [(["bravik"], ["vantor"], {})], ttl_s=60)
    assert w.set("b", [(["bravik"], ["vantor"], {})], ttl_s=60) == 1
    with pytest.raises(WatchLimitError, match="busy"):
        w.set("c", [(["bravik"], ["vantor"], {})], ttl_s=60)
    w.clear("b")
    assert w.set("c", [(["bravik"], ["vantor"], {})], ttl_s=60) == 1


def test_live_messages_go_to_each_watchers_channel_with_its_own_seq() -> None:
    model = build_model("elo", compiled=False)
    w = WatchRegistry(per_watcher=4, max_watchers=4)
    w.set("tab-a", [(["kelvash"], ["morvenn"], {"map": "saltflats"})], ttl_s=60)
    w.set("tab-b", [(["kelvash"], ["morvenn"], {"map": "saltflats"})], ttl_s=60)
    w.set(SHARED_WATCHER, [(["kelvash"], ["oskuvar"], {})], ttl_s=60)
    out = []
    for k in range(2):
        hits = w.affected(["kelvash"])
        out += live_messages(model, hits, f"9-{k}", f"m-{k}", KEYS.live_of, w.next_seq)
    by_channel: dict[str, list[dict[str, object]]] = {}
    for channel, msg in out:
        by_channel.setdefault(channel, []).append(json.loads(msg))
    assert set(by_channel) == {"{sr:duel}:live:tab-a", "{sr:duel}:live:tab-b", "{sr:duel}:live"}
    for msgs in by_channel.values():
        assert [m["seq"] for m in msgs] == [1, 2]
        assert [m["match_id"] for m in msgs] == ["m-0", "m-1"]
    data = by_channel["{sr:duel}:live:tab-a"][0]
    assert data["p_first_wins"] == 0.5 and data["p_draw"] is None  # Elo: equal ratings
    assert data["model_version"] == "9-0" and data["context"] == {"map": "saltflats"}
