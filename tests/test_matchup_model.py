"""The matchup models (Bradley-Terry, blade-chest): fits, paths, backends, state files."""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression

from streamrate.errors import ConfigError, StateError, StateVersionError
from streamrate.events import MatchEvent, Matchup
from streamrate.models.matchup import BladeChest, BladeChestDistance, BradleyTerry, MatchupModel
from streamrate.models.registry import build_model, model_from_state
from streamrate.statefile import load_state, save_state, state_from_bytes, state_to_bytes

T0 = datetime(2026, 3, 1, 18, 0, tzinfo=UTC)
PLAYERS = ["kelvash", "morvenn", "tuvrenn", "oskuvar", "bravik", "vantor"]
MAPS = ["saltflats", "ember-quarry", "glasswood", "sunken-bell"]


def _event(k: int, first: tuple[str, ...], second: tuple[str, ...], score: float,
           **extra: object) -> MatchEvent:  # fmt: skip
    return MatchEvent(
        match_id=f"m-{k}",
        finished_at=T0 + timedelta(hours=k),
        first=first,
        second=second,
        score=score,
        **extra,  # type: ignore[arg-type]
    )


def mixed_events(n: int, seed: int = 0) -> list[MatchEvent]:
    """Teams of 1-3, draws, maps, and features for some entities: every code path."""
    rng = np.random.default_rng(seed)
    pool = [f"{p}-{i}" for p in PLAYERS for i in range(4)]
    out = []
    for k in range(n):
        k1, k2 = int(rng.integers(1, 4)), int(rng.integers(1, 4))
        ids = [pool[i] for i in rng.choice(len(pool), k1 + k2, replace=False)]
        feats = {e: {"style": ["rush", "hold", "roam"][hash(e) % 3], "reach": 0.5} for e in ids
                 if rng.random() < 0.4}  # fmt: skip
        ctx = {"map": MAPS[int(rng.integers(4))], "mode": "trio"} if rng.random() < 0.8 else {}
        score = float(rng.choice([0.0, 0.5, 1.0], p=[0.45, 0.1, 0.45]))
        out.append(_event(k, tuple(ids[:k1]), tuple(ids[k1:]), score, context=ctx, features=feats))
    return out


def cyclic_world(n: int, seed: int = 0, n_ent: int = 60) -> list[MatchEvent]:
    """Three play styles, rock-paper-scissors: the stronger style wins with p = 0.9."""
    rng = np.random.default_rng(seed)
    style = rng.integers(0, 3, n_ent)
    out = []
    for k in range(n):
        i, j = rng.choice(n_ent, 2, replace=False)
        p = {0: 0.5, 1: 0.9, 2: 0.1}[int((style[i] - style[j]) % 3)]
        out.append(_event(k, (f"kelvash-{i}",), (f"kelvash-{j}",), float(rng.random() < p)))
    return out


def log_loss(p: np.ndarray, y: np.ndarray) -> float:
    p = np.clip(p, 1e-12, 1 - 1e-12)
    return float(np.mean(-(y * np.log(p) + (1 - y) * np.log(1 - p))))


RICH = {
    "dims": 4,
    "draws": True,
    "context": "stacked",
    "context_width": 16,
    "feature_width": 16,
    "feature_slots": 4,
    "prior_map": "tanh",
    "forget_per_day": 0.05,
}
CONFIGS = [
    (BradleyTerry, {}),
    (BladeChest, RICH),
    (BladeChestDistance, {**RICH, "context": "gated", "prior_map": "identity"}),
    (BladeChest, {"dims": 3, "context": "gated", "context_width": 8, "strength": False}),
    (BladeChest, {**RICH, "vector_uncertainty": True}),
    (
        BladeChestDistance,
        {**RICH, "context": "gated", "prior_map": "identity", "vector_uncertainty": True},
    ),
    (
        BladeChest,
        {
            "dims": 3,
            "context": "gated",
            "context_width": 8,
            "strength": False,
            "uncertainty": False,
            "vector_uncertainty": True,
            "vector_noise_per_day": 0.5,
        },
    ),
]


def _arrays(m: MatchupModel) -> dict[str, np.ndarray]:
    return {k: v for k, v in m._state_arrays().items() if k not in ("entity_ids",)}


def _assert_state_close(a: MatchupModel, b: MatchupModel, rtol: float) -> None:
    sa, sb = _arrays(a), _arrays(b)
    assert sa.keys() == sb.keys()
    for k in sa:
        if sa[k].dtype.kind == "f":
            # float32 state: a last-bit difference can flip a rounding, hence 1e-5
            tol = 1e-5 if sa[k].dtype == np.float32 else rtol
            np.testing.assert_allclose(sa[k], sb[k], rtol=tol, atol=tol, err_msg=k)
        else:
            np.testing.assert_array_equal(sa[k], sb[k], err_msg=k)


@pytest.mark.parametrize(("cls", "settings"), CONFIGS)
def test_compiled_and_numpy_backends_agree(cls: type[MatchupModel], settings: dict) -> None:
    evs = mixed_events(120, seed=1)
    fast, slow = cls(backend="numba", **settings), cls(backend="numpy", **settings)
    pf, ps = fast.learn_many(evs[:80]), slow.learn_many(evs[:80])
    np.testing.assert_allclose(pf.p_win, ps.p_win, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(pf.p_draw, ps.p_draw, rtol=1e-9, atol=1e-12)
    for lo in range(80, 120, 10):
        pf, ps = fast.learn_batch(evs[lo : lo + 10]), slow.learn_batch(evs[lo : lo + 10])
        np.testing.assert_allclose(pf.p_win, ps.p_win, rtol=1e-5, atol=1e-7)
    _assert_state_close(fast, slow, rtol=1e-9)
    q = Matchup(first=("kelvash-0", "new-one"), second=("bravik-1",), context={"map": "glasswood"})
    assert fast.predict(q).p_win == pytest.approx(slow.predict(q).p_win, rel=1e-5)


SOLO_CONFIGS = [  # the specialised loop serves models without uncertainty
    (BradleyTerry, {"uncertainty": False}),
    (BladeChest, {"dims": 5, "draws": True, "forget_per_day": 0.1, "uncertainty": False}),
    (BladeChestDistance, {"dims": 3, "strength": False, "context_width": 8}),
]


@pytest.mark.parametrize(("cls", "settings"), SOLO_CONFIGS)
def test_specialised_solo_loop_equals_general_loop(cls: type[MatchupModel], settings: dict) -> None:
    # 1v1 without entity features goes through a specialised compiled loop
    evs = [e.model_copy(update={"first": e.first[:1], "second": e.second[:1], "features": {}})
           for e in mixed_events(150, seed=5)]  # fmt: skip
    fast, general, slow = cls(**settings), cls(**settings), cls(backend="numpy", **settings)
    general.fast_path = False
    pf, pg, ps = fast.learn_many(evs), general.learn_many(evs), slow.learn_many(evs)
    np.testing.assert_allclose(pf.p_win, pg.p_win, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(pf.p_draw, pg.p_draw, rtol=1e-12, atol=1e-15)
    _assert_state_close(fast, general, rtol=1e-12)
    np.testing.assert_allclose(pf.p_win, ps.p_win, rtol=1e-5)
    _assert_state_close(fast, slow, rtol=1e-9)


@pytest.mark.parametrize(("cls", "settings"), CONFIGS)
def test_batch_of_one_equals_sequential(cls: type[MatchupModel], settings: dict) -> None:
    evs = mixed_events(60, seed=2)
    seq, mini = cls(**settings), cls(**settings)
    for ev in evs:
        a, b = seq.learn(ev), mini.learn_batch([ev])[0]
        assert a == pytest.approx(b, rel=1e-12, abs=1e-15)
    _assert_state_close(seq, mini, rtol=1e-12)
    # and learn_many is the same loop as learn
    many = cls(**settings)
    many.learn_many(evs)
    _assert_state_close(seq, many, rtol=1e-12)


def test_minibatch_predicts_from_batch_start_state() -> None:
    evs = [_event(k, ("kelvash",), ("morvenn",), 1.0) for k in range(5)]
    m = BladeChest(dims=2)
    p = m.learn_batch(evs)
    assert np.all(p.p_win == p.p_win[0])  # nothing moved inside the batch
    assert m.predict(Matchup(first=("kelvash",), second=("morvenn",))).p_win > p.p_win[0]
    assert m.seen("kelvash") == 5 and m.seen("oskuvar") == 0


@pytest.mark.parametrize(("cls", "settings"), CONFIGS)
def test_predict_changes_nothing(cls: type[MatchupModel], settings: dict) -> None:
    m = cls(**settings)
    m.learn_many(mixed_events(40))
    before = _arrays(m)
    n = len(m.entities_)
    q = Matchup(
        first=("kelvash-0", "unknown-a"),
        second=("unknown-b",),
        context={"map": "saltflats"},
        features={"unknown-b": {"style": "roam"}},
    )
    p1, p2 = m.predict(q), m.predict(q)
    assert p1 == p2 and len(m.entities_) == n and "unknown-a" not in m.entities_
    after = _arrays(m)
    for k in before:
        np.testing.assert_array_equal(before[k], after[k], err_msg=k)


@pytest.mark.parametrize(("cls", "settings"), CONFIGS)
def test_state_round_trip_is_exact(tmp_path: Path, cls: type[MatchupModel], settings: dict) -> None:
    evs = mixed_events(90, seed=3)
    m = cls(**settings)
    m.learn_many(evs[:50])
    save_state(tmp_path / "m.npz", m.to_state())
    back = model_from_state(load_state(tmp_path / "m.npz"))
    assert type(back) is cls and back.get_params() == m.get_params()
    q = Matchup(first=("kelvash-1",), second=("morvenn-2", "ghost"), context={"map": "glasswood"})
    assert back.predict(q) == m.predict(q)
    pa, pb = m.learn_many(evs[50:]), back.learn_many(evs[50:])  # type: ignore[attr-defined]
    np.testing.assert_array_equal(pa.p_win, pb.p_win)
    a, b = _arrays(m), _arrays(back)  # type: ignore[arg-type]
    for k in a:
        np.testing.assert_array_equal(a[k], b[k], err_msg=k)


def test_corrupt_or_foreign_state_is_refused(tmp_path: Path) -> None:
    m = BladeChest(dims=2)
    m.learn_many(mixed_events(10))
    state = m.to_state()
    with pytest.raises(StateError):
        state_from_bytes(state_to_bytes(state)[:200])
    state.version = 99
    with pytest.raises(StateVersionError):
        model_from_state(state)
    state = m.to_state()
    state.arrays["own"] = state.arrays["own"][:, :3]
    with pytest.raises(StateError, match="own"):
        model_from_state(state)
    state = m.to_state()
    del state.arrays["acc"]
    with pytest.raises(StateError, match="acc"):
        model_from_state(state)
    state = m.to_state()
    state.kind = "bradley_terry"
    with pytest.raises(StateError):
        BladeChest.from_state(state)


def test_settings_are_checked() -> None:
    with pytest.raises(ConfigError):
        build_model("bradley_terry", dims=4)
    with pytest.raises(ConfigError):
        build_model("blade_chest", dims=0)
    with pytest.raises(ConfigError):
        build_model("blade_chest", context="sideways")
    with pytest.raises(ConfigError):
        build_model("blade_chest", colour="red")
    assert build_model("blade_chest_dist", dims=3).kind == "blade_chest_dist"


def test_bradley_terry_converges_to_penalised_logistic_regression() -> None:
    # Reference: Bradley-Terry is logistic regression on a design row with +1 for the
    # first entity and -1 for the second (the WSDM 2016 paper 'Modeling Intransitivity
    # in Matchup and Comparison Data', section 2); scikit-learn's LogisticRegression
    # minimises 0.5*|w|^2 + C * sum(log loss). Our full-batch learn_batch adds
    # 0.5 * l2 * |w_i|^2 per appearance; in a double round robin every entity plays
    # 8 times, so C = 1 / (8 * l2). Tolerance 2e-4: float32 strengths, AdaGrad steps.
    names = PLAYERS[:5]
    rng = np.random.default_rng(7)
    evs, rows, ys = [], [], []
    for rep in range(2):
        for i in range(5):
            for j in range(i + 1, 5):
                y = float(rng.random() < 1 / (1 + math.exp(j - i - 0.5 * rep)))
                evs.append(_event(len(evs), (names[i],), (names[j],), y))
                x = np.zeros(5)
                x[i], x[j] = 1.0, -1.0
                rows.append(x)
                ys.append(y)
    l2 = 0.05
    ref = LogisticRegression(C=1 / (8 * l2), fit_intercept=False, tol=1e-12, max_iter=10_000)
    ref.fit(np.array(rows), np.array(ys))
    # the point estimate (AdaGrad steps): uncertainty would turn it into a posterior
    m = BradleyTerry(l2=l2, lr_strength=0.3, advantage=False, uncertainty=False)
    for _ in range(3000):
        m.learn_batch(evs)
    got = np.array([m.vectors(e)[0] for e in names])  # type: ignore[index]
    np.testing.assert_allclose(got, ref.coef_[0], atol=2e-4)
    p_ref = ref.predict_proba(np.array(rows[:3]))[:, 1]
    p_got = [m.predict(Matchup(first=e.first, second=e.second)).p_win for e in evs[:3]]
    np.testing.assert_allclose(p_got, p_ref, atol=1e-4)


def test_blade_chest_learns_a_cycle_that_strengths_cannot() -> None:
    # The point of blade-chest vectors (the WSDM 2016 paper 'Modeling Intransitivity in
    # Matchup and Comparison Data', section 1): a rock-paper-scissors world has no
    # ordering, so a strength model stays near coin-flip log loss ln 2 = 0.693, while
    # the vectors can represent the cycle (ideal log loss here is about 0.46).
    evs = cyclic_world(3000)
    y = np.array([e.score for e in evs])
    half = len(evs) // 2
    bc = log_loss(BladeChest(dims=8).learn_many(evs).p_win[half:], y[half:])
    bcd = log_loss(BladeChestDistance(dims=8).learn_many(evs).p_win[half:], y[half:])
    bt = log_loss(BradleyTerry().learn_many(evs).p_win[half:], y[half:])
    assert bt > 0.68
    assert bc < 0.56 and bcd < 0.58


def test_no_worse_than_elo_when_there_is_no_cycle() -> None:
    # A world that is Bradley-Terry by construction (logistic in the strength gap);
    # Elo (K = 24, common practice) is the yardstick of the project's baselines.
    from streamrate.models.elo import Elo

    rng = np.random.default_rng(11)
    strength = rng.normal(0, 1, 60)
    evs = []
    for k in range(3000):
        i, j = rng.choice(60, 2, replace=False)
        p = 1 / (1 + math.exp(strength[j] - strength[i]))
        evs.append(_event(k, (f"morvenn-{i}",), (f"morvenn-{j}",), float(rng.random() < p)))
    y = np.array([e.score for e in evs])
    half = len(evs) // 2
    elo = log_loss(Elo().learn_many(evs).p_win[half:], y[half:])
    for model in (BradleyTerry(), BladeChest(dims=8), BladeChest(dims=16)):
        assert log_loss(model.learn_many(evs).p_win[half:], y[half:]) < elo + 0.01


def test_seeds_make_starts_deterministic() -> None:
    evs = cyclic_world(50)
    a, b, c = BladeChest(dims=4, seed=1), BladeChest(dims=4, seed=1), BladeChest(dims=4, seed=2)
    pa, pb, pc = a.learn_many(evs), b.learn_many(evs), c.learn_many(evs)
    np.testing.assert_array_equal(pa.p_win, pb.p_win)
    assert not np.array_equal(pa.p_win, pc.p_win)


def test_draw_model_learns_the_draw_rate() -> None:
    # Davidson's draw model (JASA 1970, 'On extending the Bradley-Terry model to
    # accommodate ties in paired comparison experiments'): between equals
    # P(draw) = nu / (2 + nu); with 30% draws between equals it should approach 0.3.
    rng = np.random.default_rng(4)
    evs = [
        _event(
            k, ("kelvash",), ("morvenn",), float(rng.choice([0.0, 0.5, 1.0], p=[0.35, 0.3, 0.35]))
        )
        for k in range(3000)
    ]
    m = BradleyTerry(draws=True, advantage=False)
    m.learn_many(evs)
    p = m.predict(Matchup(first=("kelvash",), second=("morvenn",)))
    assert p.p_draw == pytest.approx(0.3, abs=0.05)
    assert p.p_win + p.p_draw + m.predict(
        Matchup(first=("morvenn",), second=("kelvash",))
    ).p_win == (pytest.approx(1.0, abs=1e-12))


def test_first_side_advantage_is_learned_per_map() -> None:
    # On saltflats the first side wins 80%, elsewhere 50%: the context term h.z finds it.
    rng = np.random.default_rng(5)
    evs = []
    for k in range(3000):
        i, j = rng.choice(20, 2, replace=False)
        mp = MAPS[k % 4]
        p = 0.8 if mp == "saltflats" else 0.5
        evs.append(_event(k, (f"oskuvar-{i}",), (f"oskuvar-{j}",), float(rng.random() < p),
                          context={"map": mp}))  # fmt: skip
    m = BradleyTerry()
    m.learn_many(evs)
    salt = m.predict(
        Matchup(first=("oskuvar-1",), second=("oskuvar-2",), context={"map": "saltflats"})
    )
    glass = m.predict(
        Matchup(first=("oskuvar-1",), second=("oskuvar-2",), context={"map": "glasswood"})
    )
    assert salt.p_win - glass.p_win > 0.15
