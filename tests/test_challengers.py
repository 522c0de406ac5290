"""Challenger sets: members learn as if alone, promotion keeps state, compare, persistence."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import fakeredis
import jsonschema
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry
from service_fakes import fake_settings
from sklearn.metrics import brier_score_loss
from sklearn.metrics import log_loss as sk_log_loss

from streamrate import calibration as cal
from streamrate import evaluate
from streamrate.challengers import ChallengerSet, compare_window, format_compare
from streamrate.client import format_reply, send_events
from streamrate.config import (
    QualitySettings,
    SpaceSettings,
)
from streamrate.consumer import LiveModel
from streamrate.errors import ConfigError, StateError
from streamrate.events import MatchEvent, Matchup, event_to_json
from streamrate.models.base import Model, Predictions
from streamrate.models.registry import build_model, model_from_state
from streamrate.queries import Answerer, WatchRequest, handle, request_schema
from streamrate.service import Service
from streamrate.simulate import simulate, world_spec
from streamrate.statefile import state_from_bytes, state_to_bytes

MEMBERS: dict[str, dict[str, Any]] = {
    "elo": {"kind": "elo", "k": 16.0},
    "bt": {"kind": "bradley_terry"},
    "bc": {"kind": "blade_chest", "dims": 4, "context": "stacked"},
}
WORLD = simulate(world_spec("cyclic", matches=500, entities=24, seed=11)).events
DRAWS = simulate(world_spec("plain", matches=300, entities=16, draw_rate=0.3, seed=12)).events
MEMBERS_DRAWS: dict[str, dict[str, Any]] = {
    "elo": {"kind": "elo"},
    "davidson": {"kind": "bradley_terry", "draws": True},
}


def _alone(spec: dict[str, Any]) -> Model:
    return build_model(spec["kind"], **{k: v for k, v in spec.items() if k != "kind"})


def _feed(model: Model, events: Sequence[MatchEvent], path: str, chunk: int) -> Predictions:
    parts = [Predictions(np.zeros(0), np.zeros(0))]
    for lo in range(0, len(events), chunk):
        part = events[lo : lo + chunk]
        if path == "learn":
            parts.append(Predictions.from_list([model.learn(ev) for ev in part]))
        elif path == "many":
            parts.append(model.learn_many(part))
        else:
            parts.append(model.learn_batch(part))
    return Predictions(
        np.concatenate([p.p_win for p in parts]), np.concatenate([p.p_draw for p in parts])
    )


def _assert_same_arrays(a: dict[str, np.ndarray], b: dict[str, np.ndarray]) -> None:
    assert set(a) == set(b)
    for name in a:
        np.testing.assert_array_equal(np.asarray(a[name]), np.asarray(b[name]), err_msg=name)


def _pairings(events: Sequence[MatchEvent]) -> list[Matchup]:
    return [Matchup(first=ev.first, second=ev.second, context=ev.context) for ev in events[:20]]


@settings(max_examples=12)
@given(
    world=st.sampled_from(["cyclic", "draws"]),
    path=st.sampled_from(["learn", "many", "batch"]),
    chunk=st.integers(1, 97),
    n=st.integers(0, 300),
    active=st.integers(0, 2),
)
def test_each_member_learns_exactly_as_it_would_alone(
    world: str, path: str, chunk: int, n: int, active: int
) -> None:
    members, events = (MEMBERS, WORLD) if world == "cyclic" else (MEMBERS_DRAWS, DRAWS)
    events = events[:n]
    labels = list(members)
    cs = ChallengerSet(members, active=labels[active % len(labels)])
    served = _feed(cs, events, path, chunk)
    for label, spec in members.items():
        alone = _alone(spec)
        want = _feed(alone, events, path, chunk)
        _assert_same_arrays(cs.models_[label].to_state().arrays, alone.to_state().arrays)
        assert cs.models_[label].to_state().params == alone.to_state().params
        got = cs.recent_member_predictions(len(events))[label]
        np.testing.assert_array_equal(got.p_win, want.p_win)
        np.testing.assert_array_equal(got.p_draw, want.p_draw)
        if label == cs.active:  # what the set returns is the active member's forecast
            np.testing.assert_array_equal(served.p_win, want.p_win)
            np.testing.assert_array_equal(served.p_draw, want.p_draw)


def test_promote_switches_answers_and_no_member_loses_state() -> None:
    cs = ChallengerSet(MEMBERS)
    cs.learn_many(WORLD[:300])
    before = {label: m.to_state().arrays for label, m in cs.models_.items()}
    asks = _pairings(WORLD[300:])
    elo_answers = [cs.predict(mu) for mu in asks]
    assert elo_answers == [cs.models_["elo"].predict(mu) for mu in asks]
    cs.promote("bc")
    assert cs.active == "bc"
    bc_answers = [cs.predict(mu) for mu in asks]
    assert bc_answers == [cs.models_["bc"].predict(mu) for mu in asks]
    assert bc_answers != elo_answers
    assert cs.seen("kelvash") == cs.models_["bc"].seen("kelvash")
    for label, m in cs.models_.items():
        _assert_same_arrays(m.to_state().arrays, before[label])
    # Learning goes on for every member as if no promotion had happened.
    cs.learn_many(WORLD[300:])
    for label, spec in MEMBERS.items():
        alone = _alone(spec)
        alone.learn_many(WORLD)
        _assert_same_arrays(cs.models_[label].to_state().arrays, alone.to_state().arrays)


def test_unknown_label_is_a_config_error_and_changes_nothing() -> None:
    cs = ChallengerSet(MEMBERS, active="bt")
    with pytest.raises(ConfigError, match="no member 'nope'"):
        cs.promote("nope")
    assert cs.active == "bt"
    with pytest.raises(ConfigError, match="no member"):
        ChallengerSet(MEMBERS, active="nope")
    with pytest.raises(ConfigError, match="no member"):
        cs.compare(reference="nope")


@pytest.mark.parametrize(
    ("members", "needle"),
    [
        ({}, "non-empty"),
        ({"a": {"k": 1.0}}, "'kind'"),
        ({"a/b": {"kind": "elo"}}, "label"),
        ({"_a": {"kind": "elo"}}, "label"),
        ({"challengers": {"kind": "elo"}}, "reserved"),
        ({"a": {"kind": "challengers"}}, "cannot itself"),
        ({"a": {"kind": "elo", "nonsense": 1}}, "nonsense"),
        ({"a": {"kind": "no_such_model"}}, "unknown model"),
    ],
)
def test_bad_member_tables_are_config_errors(members: dict[str, Any], needle: str) -> None:
    with pytest.raises(ConfigError, match=needle):
        ChallengerSet(members)


def test_compare_agrees_with_a_replay_and_the_bootstrap_run_directly() -> None:
    window = 200
    cs = ChallengerSet(MEMBERS, window_events=window)
    cs.learn_many(WORLD)
    record = evaluate.replay(WORLD, {label: _alone(spec) for label, spec in MEMBERS.items()})
    y = record.score[-window:]
    table = cs.compare(reference="bt")
    assert table["reference"] == "bt" and table["active"] == "elo" and table["events"] == window
    ref_loss = cal.pointwise_log_loss(record.expected["bt"][-window:], y)
    for label in MEMBERS:
        e = record.expected[label][-window:]
        row = table["members"][label]
        assert row["n"] == window and row["active"] == (label == "elo")
        # scikit-learn as an outside reference for the two scores (no draws in this world).
        assert row["log_loss"] == pytest.approx(sk_log_loss(y, e, labels=[0.0, 1.0]), rel=1e-9)
        assert row["brier"] == pytest.approx(brier_score_loss(y, e), rel=1e-9)
        assert row["ece"] == pytest.approx(cal.expected_calibration_error(e, y), rel=1e-12)
        if label == "bt":
            assert row["log_loss_diff_ci"] is None
            continue
        d = evaluate.paired_block_bootstrap(cal.pointwise_log_loss(e, y), ref_loss)
        ci = row["log_loss_diff_ci"]
        assert (ci["mean"], ci["low"], ci["high"]) == pytest.approx((d.mean, d.low, d.high))
        assert ci["low"] <= ci["mean"] <= ci["high"] and ci["block_events"] == d.block
    json.dumps(table)
    text = format_compare(table)
    assert "* elo" in text and "diff vs bt" in text


@settings(max_examples=40)
@given(
    window=st.integers(1, 12),
    chunks=st.lists(st.integers(0, 30), min_size=1, max_size=6),
)
def test_window_holds_the_last_events_oldest_first(window: int, chunks: list[int]) -> None:
    cs = ChallengerSet(MEMBERS_DRAWS, window_events=window)
    history: dict[str, list[np.ndarray]] = {label: [] for label in MEMBERS_DRAWS}
    scores: list[float] = []
    at = 0
    for k in chunks:
        part = DRAWS[at : at + k]
        at += k
        for label, p in cs.learn_scored(part).parts.items():
            history[label].append(p.p_win + 0.5 * p.p_draw)
        scores += [ev.score for ev in part]
    w = cs.window()
    keep = min(window, len(scores))
    np.testing.assert_array_equal(w.score, np.array(scores[len(scores) - keep :]))
    for j, label in enumerate(w.labels):
        full = np.concatenate(history[label]) if history[label] else np.zeros(0)
        np.testing.assert_allclose(w.expected[:, j], full[full.size - keep :], rtol=0, atol=0)
    assert cs.recent_member_predictions(window + 1) == {}


@pytest.mark.parametrize("window", [5000, 123])
def test_state_round_trip_is_exact(window: int) -> None:
    cs = ChallengerSet(MEMBERS, active="bt", window_events=window)
    cs.learn_many(WORLD[:400])
    cs.promote("bc")
    state = cs.to_state()
    back_state, _ = state_from_bytes(state_to_bytes(state))  # npz + JSON, no pickle
    back = model_from_state(back_state)
    assert isinstance(back, ChallengerSet)
    assert back.active == "bc" and back.labels == cs.labels
    again = back.to_state()
    assert again.kind == "challengers" and again.params == state.params
    _assert_same_arrays(again.arrays, state.arrays)
    assert back.compare() == cs.compare()
    assert back.seen("kelvash") == cs.seen("kelvash")
    # Both go on identically.
    a, b = cs.learn_many(WORLD[400:]), back.learn_many(WORLD[400:])
    np.testing.assert_array_equal(a.p_win, b.p_win)
    _assert_same_arrays(cs.to_state().arrays, back.to_state().arrays)


def test_unusable_saved_state_is_a_state_error() -> None:
    cs = ChallengerSet(MEMBERS_DRAWS)
    cs.learn_many(DRAWS[:50])
    state = cs.to_state()
    no_window = {k: v for k, v in state.arrays.items() if not k.startswith("_window/")}
    with pytest.raises(StateError):
        model_from_state(type(state)(state.kind, state.version, state.params, no_window))
    no_member = {k: v for k, v in state.arrays.items() if not k.startswith("elo/")}
    with pytest.raises(StateError):
        model_from_state(type(state)(state.kind, state.version, state.params, no_member))
    bad = dict(state.params, active="nope")
    with pytest.raises(StateError):
        model_from_state(type(state)(state.kind, state.version, bad, state.arrays))


# -- the query side -------------------------------------------------------------------
def _watch(_req: WatchRequest) -> dict[str, Any]:
    return {"watching": 0}


def _ask(ans: Answerer, req: dict[str, Any]) -> dict[str, Any]:
    base = {"id": "q", "reply_to": "{sr:duel}:q:reply:back"}
    _, reply, _ = handle(
        json.dumps({**base, **req}), ans, _watch, 65536, reply_prefix="{sr:duel}:q:reply:"
    )
    json.dumps(reply)
    return reply


def _live_set() -> LiveModel:
    cs = ChallengerSet(MEMBERS)
    cs.learn_many(WORLD)
    return LiveModel(cs, "1700-0", len(WORLD), threading.Lock())


def test_promote_and_compare_requests() -> None:
    live = _live_set()
    ans = Answerer(live, 10, 256)
    pair = {"kind": "pairing", "first": ["kelvash"], "second": ["morvenn"]}
    mu = Matchup(first=("kelvash",), second=("morvenn",))
    before = _ask(ans, pair)
    assert before["answered_by"] == "elo" and before["model"] == "challengers"
    assert before["p_first_wins"] == live.model.models_["elo"].predict(mu).p_win
    rep = _ask(ans, {"kind": "promote", "model": "bc"})
    assert rep["ok"] and rep["previous"] == "elo" and rep["answered_by"] == "bc"
    assert live.changed  # the next checkpoint saves the promotion
    after = _ask(ans, pair)
    assert after["answered_by"] == "bc"
    assert after["p_first_wins"] == live.model.models_["bc"].predict(mu).p_win
    assert "bc answers now (was elo)" in format_reply(rep)
    table = _ask(ans, {"kind": "compare"})
    assert table["ok"] and table["reference"] == "bc"
    want = compare_window(live.model.window())
    assert table["members"] == json.loads(json.dumps(want["members"]))
    assert "diff vs bc" in format_reply(table)
    other = _ask(ans, {"kind": "compare", "reference": "elo"})
    assert other["members"]["elo"]["log_loss_diff_ci"] is None
    assert other["members"]["bc"]["log_loss_diff_ci"]["versus"] == "elo"


def test_bad_promote_and_compare_requests_get_error_replies() -> None:
    live = _live_set()
    ans = Answerer(live, 10, 256)
    rep = _ask(ans, {"kind": "promote", "model": "nope"})
    assert not rep["ok"] and "no member 'nope'" in rep["error"] and "elo, bt, bc" in rep["error"]
    assert live.model.active == "elo" and not live.changed
    assert not _ask(ans, {"kind": "compare", "reference": "nope"})["ok"]
    assert not _ask(ans, {"kind": "promote"})["ok"]
    plain = LiveModel(build_model("elo", compiled=False), "0-0", 0, threading.Lock())
    for req in ({"kind": "promote", "model": "elo"}, {"kind": "compare"}):
        rep = _ask(Answerer(plain, 10, 256), req)
        assert not rep["ok"] and "not a challenger set" in rep["error"]


@pytest.mark.parametrize(
    ("req", "valid"),
    [
        ({"kind": "promote", "model": "bc"}, True),
        ({"kind": "compare"}, True),
        ({"kind": "compare", "reference": "elo"}, True),
        ({"kind": "promote"}, False),
        ({"kind": "promote", "model": ""}, False),
        ({"kind": "compare", "extra": 1}, False),
    ],
)
def test_schema_covers_promote_and_compare(req: dict[str, Any], valid: bool) -> None:
    # jsonschema (general-purpose Draft 2020-12 validator) checks the published schema.
    full = {"id": "1", "reply_to": "{sr:duel}:q:reply:r", **req}
    assert jsonschema.Draft202012Validator(request_schema()).is_valid(full) is valid
    assert _ask(Answerer(_live_set(), 10, 256), req)["ok"] is valid


def test_service_scores_every_member_under_its_own_label(tmp_path: Path) -> None:
    members = {"elo": {"kind": "elo", "compiled": False}, "bt": {"kind": "bradley_terry"}}
    space = SpaceSettings(
        name="duel",
        model="challengers",
        model_settings={"members": members},
        batch_count=40,
        block_ms=5,
        quality=QualitySettings(recent_events=100, reference_events=200, publish_every_s=0.0),
    )
    settings = fake_settings(tmp_path, space)
    server = fakeredis.FakeServer()
    registry = CollectorRegistry()
    svc = Service(settings, lambda: fakeredis.FakeRedis(server=server), registry)
    stop = threading.Event()
    svc.start(stop)
    try:
        send_events(
            fakeredis.FakeRedis(server=server),
            "{sr:duel}:events",
            [event_to_json(e) for e in WORLD],
        )
        deadline = time.monotonic() + 60
        while svc.spaces[0].consumer.live.applied < len(WORLD):
            assert time.monotonic() < deadline, "service did not apply every event"
            time.sleep(0.01)
    finally:
        stop.set()
        svc.join()
    y = np.array([ev.score for ev in WORLD])
    for label, spec in [*members.items(), ("challengers", members["elo"])]:
        alone = _alone(spec)
        e = alone.learn_many(WORLD).expected_score
        labels = {"space": "duel", "model": label, "window": "recent", "group": "all"}
        got = registry.get_sample_value("streamrate_quality_log_loss", labels)
        assert got == pytest.approx(cal.log_loss(e[-100:], y[-100:]), rel=1e-9), label
