"""The watch list and the live feed messages."""

from __future__ import annotations

import json

from hypothesis import given
from hypothesis import strategies as st

from streamrate.livefeed import WatchList, live_messages
from streamrate.models.registry import build_model

NAMES = ["kestrel", "marlow", "tindra", "oskel", "brisa", "vantor"]
pair = st.tuples(
    st.lists(st.sampled_from(NAMES[:3]), min_size=1, max_size=2, unique=True),
    st.lists(st.sampled_from(NAMES[3:]), min_size=1, max_size=2, unique=True),
)


@given(pairs=st.lists(pair, max_size=10), touched=st.lists(st.sampled_from(NAMES), max_size=4))
def test_affected_pairings_are_exactly_those_sharing_an_entity(
    pairs: list[tuple[list[str], list[str]]], touched: list[str]
) -> None:
    w = WatchList(limit=100)
    w.set([(a, b, {}) for a, b in pairs])
    got = {(p.first, p.second) for p in w.affected(touched)}
    want = {(tuple(a), tuple(b)) for a, b in pairs if set(a + b) & set(touched)}
    assert got == want
    assert w.touches(touched) == bool(want)


def test_set_add_clear_and_limit() -> None:
    w = WatchList(limit=2)
    assert w.set([(["kestrel"], ["marlow"], {})]) == 1
    assert w.add([(["tindra"], ["oskel"], {"map": "glasswood"})]) == 2
    assert w.add([(["brisa"], ["vantor"], {})]) == 2  # the oldest one goes
    assert w.affected(["kestrel"]) == []
    assert w.clear() == 0 and not w.touches(["brisa"])


def test_live_messages_carry_fresh_odds() -> None:
    model = build_model("elo", compiled=False)
    w = WatchList(limit=4)
    w.set([(["kestrel"], ["marlow"], {"map": "saltflats"})])
    (msg,) = live_messages(model, w.affected(["kestrel"]), "9-0", "m-1")
    data = json.loads(msg)
    assert data["p_first_wins"] == 0.5 and data["p_draw"] is None  # Elo: equal ratings
    assert data["model_version"] == "9-0" and data["context"] == {"map": "saltflats"}
