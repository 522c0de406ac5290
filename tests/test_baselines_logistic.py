"""Batch logistic regression against scikit-learn on the same design."""

from __future__ import annotations

import random
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from scipy.sparse import vstack
from scipy.special import expit
from sklearn.linear_model import LogisticRegression

from streamrate.events import MatchEvent, Matchup
from streamrate.models.logistic_batch import LogisticBatch

T0 = datetime(2026, 3, 1, 18, 0, tzinfo=UTC)
PLAYERS = ["kelvash", "morvenn", "tuvrenn", "oskuvar", "bravik", "vantor"]
STRENGTH = dict(zip(PLAYERS, [1.2, 0.6, 0.0, -0.3, -0.6, -1.0], strict=True))


def stream(seed: int, n: int) -> list[MatchEvent]:
    rng = random.Random(seed)
    out = []
    for i in range(n):
        k = rng.choice([1, 2])
        who = rng.sample(PLAYERS, 2 * k)
        gap = sum(STRENGTH[w] for w in who[:k]) - sum(STRENGTH[w] for w in who[k:])
        u = rng.random()
        p = float(expit(gap + 0.3))
        score = 0.5 if u < 0.1 else (1.0 if u < 0.1 + 0.9 * p else 0.0)
        out.append(
            MatchEvent(
                match_id=f"m-{i}",
                finished_at=T0 + timedelta(minutes=i),
                first=tuple(who[:k]),
                second=tuple(who[k:]),
                score=score,
                context={"map": rng.choice(["saltflats", "glasswood"]), "mode": "duel"},
                features={who[0]: {"heat": rng.random()}} if rng.random() < 0.5 else {},
            )
        )
    return out


@pytest.mark.parametrize("l2", [0.5, 3.0])
def test_fit_matches_scikit_learn(l2: float) -> None:
    # Reference: scikit-learn's LogisticRegression (L2 penalty 1/(2C)|w|^2, intercept
    # not penalised) on the same design; a draw is a 0.5 soft target, which for the
    # log loss equals a win and a loss each of weight 0.5.
    m = LogisticBatch(refit_every=300, l2=l2)
    m.learn_many(stream(1, 300))
    assert m.fits_ == 1
    x, y = m.design()
    assert np.all(x[:, 0].toarray() == 1.0)
    feats = x[:, 1:]
    xx = vstack([feats, feats]).tocsr()
    yy = np.concatenate([np.ones_like(y), np.zeros_like(y)])
    ww = np.concatenate([y, 1.0 - y])
    keep = ww > 0
    ref = LogisticRegression(C=1.0 / l2, tol=1e-12, max_iter=10_000)
    ref.fit(xx[keep], yy[keep], sample_weight=ww[keep])
    assert m.coef_[0] == pytest.approx(ref.intercept_[0], abs=1e-5)
    np.testing.assert_allclose(m.coef_[1:], ref.coef_[0], atol=1e-5)
    for ev in stream(2, 20):
        p = m.predict(ev).p_win
        row = m._row(ev, m.entities_.rows(ev.first), m.entities_.rows(ev.second))
        ref_x = np.zeros((1, x.shape[1] - 1))
        for c, v in zip(*row, strict=True):
            if c > 0:
                ref_x[0, c - 1] += v
        assert p == pytest.approx(ref.predict_proba(ref_x)[0, 1], abs=1e-5)


def test_refits_on_schedule_and_predicts_a_coin_before_the_first_fit() -> None:
    m = LogisticBatch(refit_every=50)
    evs = stream(3, 120)
    p = m.learn_many(evs[:49]).p_win
    assert np.all(p == 0.5) and m.fits_ == 0
    m.learn(evs[49])
    assert m.fits_ == 1
    m.learn_batch(evs[50:120])  # crosses 100: one refit at the end of the batch
    assert m.fits_ == 2
    # The strongest entity in the simulation comes out on top.
    q = Matchup(first=("kelvash",), second=("vantor",))
    assert m.predict(q).p_win > 0.6


def test_a_new_entity_contributes_nothing_until_refit() -> None:
    m = LogisticBatch(refit_every=60)
    m.learn_many(stream(4, 60))
    q_known = Matchup(first=("kelvash",), second=("morvenn",))
    q_new = Matchup(first=("kelvash",), second=("morvenn", "sable"))
    assert m.predict(q_new) == m.predict(q_known)
