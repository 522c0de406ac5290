"""The query protocol: schema, validation, lobby splits, error replies."""

from __future__ import annotations

import itertools
import json
import threading
from collections.abc import Sequence
from typing import Any

import jsonschema
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamrate.consumer import LiveModel
from streamrate.events import Matchup
from streamrate.models.base import Prediction, Predictions
from streamrate.models.registry import build_model
from streamrate.queries import (
    Answerer,
    WatchRequest,
    exact_split,
    handle,
    heuristic_split,
    pair_matrix,
    request_schema,
    strengths,
)
from streamrate.simulate import simulate, world_spec

PREFIX = "{sr:duel}:q:reply:"
R = PREFIX + "client-1:r"
WORLD = simulate(world_spec("cyclic", matches=800, entities=24, seed=1)).events


def _live(kind: str = "blade_chest", **settings_: Any) -> LiveModel:
    model = build_model(kind, **settings_)
    model.learn_many(WORLD)
    return LiveModel(model, "1700-0", len(WORLD), threading.Lock())


def _watch(_req: WatchRequest) -> dict[str, Any]:
    return {"watching": 0}


def _ask(ans: Answerer, req: dict[str, Any] | str | bytes) -> tuple[str | None, dict[str, Any]]:
    raw = req if isinstance(req, str | bytes) else json.dumps(req)
    channel, reply, _ = handle(raw, ans, _watch, 65536, reply_prefix=PREFIX)
    json.dumps(reply)  # every reply must be JSON-able
    return channel, reply


GOOD = [
    {"kind": "pairing", "id": "1", "reply_to": R, "first": ["kelvash"], "second": ["morvenn"]},
    {"kind": "pairing", "id": "2", "reply_to": R, "first": ["a", "b"], "second": ["c", "d"],
     "context": {"map": "saltflats", "heat": 0.5}},
    {"kind": "lobby", "id": "3", "reply_to": R, "entities": ["a", "b", "c", "d"],
     "team_sizes": [2, 2]},
    {"kind": "watch", "id": "4", "reply_to": R, "action": "set",
     "pairings": [{"first": ["a"], "second": ["b"]}]},
    {"kind": "watch", "id": "5", "reply_to": R, "action": "clear"},
]  # fmt: skip
BAD = [
    {"kind": "pairing", "id": "1", "reply_to": R, "first": ["kelvash"]},
    {"kind": "pairing", "id": "1", "reply_to": R, "first": [], "second": ["b"]},
    {"kind": "pairing", "id": "1", "first": ["a"], "second": ["b"]},
    {"kind": "lobby", "id": "1", "reply_to": R, "entities": ["a"], "team_sizes": [1, 1]},
    {"kind": "lobby", "id": "1", "reply_to": R, "entities": ["a", "b"], "team_sizes": [0, 2]},
    {"kind": "watch", "id": "1", "reply_to": R, "action": "flip"},
    {"kind": "poke", "id": "1", "reply_to": R},
    {"kind": "pairing", "id": "1", "reply_to": R, "first": ["a"], "second": ["b"], "x": 1},
]


@pytest.mark.parametrize("req", GOOD)
def test_schema_accepts_what_the_service_accepts(req: dict[str, Any]) -> None:
    # jsonschema (general-purpose validator, Draft 2020-12) checks the published schema.
    jsonschema.Draft202012Validator(request_schema()).validate(req)
    _, reply = _ask(Answerer(_live(), 10, 256), req)
    assert reply["ok"] is True, reply


@pytest.mark.parametrize("req", BAD)
def test_schema_and_service_reject_the_same_requests(req: dict[str, Any]) -> None:
    assert not jsonschema.Draft202012Validator(request_schema()).is_valid(req)
    _, reply = _ask(Answerer(_live(), 10, 256), req)
    assert reply["ok"] is False and reply["error"]


@settings(max_examples=200)
@given(raw=st.one_of(st.binary(max_size=200), st.text(max_size=200)))
def test_arbitrary_bytes_get_an_error_reply_never_an_exception(raw: bytes | str) -> None:
    _channel, reply = _ask(Answerer(_live("elo", compiled=False), 10, 256), raw)
    assert reply["ok"] is False and isinstance(reply["error"], str) and reply["error"]


def test_semantic_errors_name_the_field() -> None:
    ans = Answerer(_live(), 10, 64)
    cases = [
        ({"first": ["a"], "second": ["a"]}, "pairing", "both sides"),
        ({"entities": ["a", "b", "c"], "team_sizes": [1, 1]}, "lobby", "team_sizes"),
        ({"entities": ["a", "a"], "team_sizes": [1, 1]}, "lobby", "twice"),
        ({"entities": [f"e{i}" for i in range(66)], "team_sizes": [33, 33]}, "lobby", "limit"),
    ]
    for body, kind, needle in cases:
        channel, reply = _ask(ans, {"kind": kind, "id": "q", "reply_to": R + "back", **body})
        assert channel == R + "back" and reply["id"] == "q" and needle in reply["error"]


def test_pairing_reply_matches_the_model() -> None:
    live = _live()
    _, rep = _ask(Answerer(live, 10, 256), GOOD[0])
    want = live.model.predict_encoded(
        live.model.encode([_mu(("kelvash",), ("morvenn",))], add=False)
    )
    assert rep["p_first_wins"] == pytest.approx(float(want.p_win[0]))
    assert rep["seen"] == {
        "kelvash": live.model.seen("kelvash"),
        "morvenn": live.model.seen("morvenn"),
    }
    assert rep["model_version"] == "1700-0" and rep["p_draw"] is None


def _mu(a: Sequence[str], b: Sequence[str]) -> Any:
    from streamrate.events import Matchup

    return Matchup(first=tuple(a), second=tuple(b))


class _LoopOnly:
    """The same model seen without its encoded API: forces the per-pair loop."""

    def __init__(self, model: Any) -> None:
        self.predict = model.predict

    def predict_many(self, matchups: Sequence[Matchup]) -> Predictions:
        return Predictions.from_list([self.predict(m) for m in matchups])


def test_encoded_matrix_equals_the_per_pair_loop() -> None:
    live = _live("blade_chest", context="stacked")
    ids = [*sorted({e for ev in WORLD for e in ev.entities()})[:12], "never-seen"]
    fast = pair_matrix(live.model, ids, {"map": "glasswood"})
    slow = pair_matrix(_LoopOnly(live.model), ids, {"map": "glasswood"})  # type: ignore[arg-type]
    np.testing.assert_allclose(fast, slow, atol=1e-12)
    no_adv = _live("blade_chest", advantage=False)
    m = pair_matrix(no_adv.model, ids, {})
    np.testing.assert_allclose(m + m.T, 1.0, atol=1e-12)  # no draws, no first-side edge


def test_draw_models_leave_room_for_draws_in_the_matrix() -> None:
    live = _live("blade_chest", draws=True, advantage=False)
    ids = sorted({e for ev in WORLD for e in ev.entities()})[:6]
    m = pair_matrix(live.model, ids, {})
    for i, j in itertools.permutations(range(6), 2):
        p = live.model.predict(_mu((ids[i],), (ids[j],)))
        assert m[i, j] == pytest.approx(p.p_win)
        assert m[i, j] < 1.0 - m[j, i]  # some probability is left for a draw


def _additive(strength: dict[str, float]) -> Any:
    def predict(a: Sequence[str], b: Sequence[str]) -> Prediction:
        d = np.mean([strength[x] for x in a]) - np.mean([strength[x] for x in b])
        return Prediction(float(1 / (1 + np.exp(-d))))

    return predict


@given(
    s=st.lists(st.floats(-3, 3, allow_nan=False), min_size=2, max_size=9, unique=True),
    data=st.data(),
)
def test_exact_split_is_the_most_even_of_all_splits(s: list[float], data: Any) -> None:
    ids = [f"e{i}" for i in range(len(s))]
    a = data.draw(st.integers(1, len(s) - 1))
    predict = _additive(dict(zip(ids, s, strict=True)))
    ta, tb = exact_split(ids, a, predict)
    assert len(ta) == a and sorted(ta + tb) == list(range(len(s)))
    best = min(
        abs(predict([ids[i] for i in t], [ids[i] for i in range(len(s)) if i not in t]).p_win - 0.5)
        for t in itertools.combinations(range(len(s)), a)
    )  # brute force over every subset, independently of exact_split's symmetry shortcut
    got = abs(predict([ids[i] for i in ta], [ids[i] for i in tb]).p_win - 0.5)
    assert got == pytest.approx(best, abs=1e-12)


@given(
    s=st.lists(st.floats(-5, 5, allow_nan=False), min_size=2, max_size=120).filter(
        lambda x: len(x) % 2 == 0
    )
)
def test_heuristic_split_of_equal_teams_meets_its_stated_bound(s: list[float]) -> None:
    arr = np.array(s)
    a = len(s) // 2
    ta, tb, gap, bound = heuristic_split(arr, a)
    assert len(ta) == len(tb) == a and sorted(ta + tb) == list(range(len(s)))
    assert gap == pytest.approx(abs(arr[ta].mean() - arr[tb].mean()))
    order = np.sort(arr)[::-1]
    pair_gaps = order[0::2] - order[1::2]
    assert bound == pytest.approx(pair_gaps.max() / a)
    assert gap <= bound + 1e-9


@given(s=st.lists(st.floats(-5, 5, allow_nan=False), min_size=3, max_size=60), data=st.data())
def test_heuristic_split_of_unequal_teams_has_the_right_sizes(s: list[float], data: Any) -> None:
    a = data.draw(st.integers(1, len(s) - 1))
    ta, tb, _gap, _ = heuristic_split(np.array(s), a)
    assert len(ta) == a and len(tb) == len(s) - a
    assert sorted(ta + tb) == list(range(len(s)))


def test_strengths_recover_an_additive_logit_model() -> None:
    # For P(i beats j) = sigmoid(z_i - z_j), mean_j logit = z_i - mean(z) over the others.
    z = np.array([0.3, -1.0, 2.0, 0.0, 0.7])
    m = 1 / (1 + np.exp(-(z[:, None] - z[None, :])))
    np.fill_diagonal(m, 0.5)
    s = strengths(m)
    np.testing.assert_allclose(s - s.mean(), (z - z.mean()) * len(z) / (len(z) - 1), atol=1e-9)


def test_large_lobby_uses_the_heuristic_and_reports_a_bound() -> None:
    live = _live()
    ids = sorted({e for ev in WORLD for e in ev.entities()})
    _, rep = _ask(
        Answerer(live, 8, 256),
        {"kind": "lobby", "id": "L", "reply_to": R, "entities": ids, "team_sizes": [12, 12]},
    )
    assert rep["ok"] and rep["method"] == "heuristic"
    assert rep["surrogate_gap"] <= rep["gap_bound"] + 1e-9
    assert sorted(rep["split"]["first"] + rep["split"]["second"]) == ids


@pytest.mark.parametrize("kind", ["recalibrated", "elo", "head_to_head"])
def test_a_lobby_matrix_is_each_pairings_own_prediction(kind: str) -> None:
    # The served default (a recalibrated mixture) and other models without an encoded
    # path answer a lobby's pairings all at once: each cell is still that pairing's
    # own prediction, under the lobby's context.
    live = _live(kind)
    ids = [*sorted({e for ev in WORLD for e in ev.entities()})[:9], "newcomer-q"]
    ctx = {"map": "saltflats"}
    _, rep = _ask(
        Answerer(live, 4, 256),
        {"kind": "lobby", "id": "L", "reply_to": R, "entities": ids, "team_sizes": [5, 5],
         "context": ctx},
    )  # fmt: skip
    assert rep["ok"], rep
    m = np.array(rep["matrix"])
    for i, a in enumerate(ids):
        for j, b in enumerate(ids):
            if i != j:
                q = Matchup(first=(a,), second=(b,), context=ctx)
                want = live.model.predict(q).p_win
                assert m[i, j] == pytest.approx(round(want, 6), abs=1e-12)
