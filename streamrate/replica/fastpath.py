"""Predictions for in-process callers without building a query object per call.

``predict()`` on one pairing builds a :class:`~streamrate.events.Matchup` and
goes through a model's general path (25-45 us). For the plain rating model the
answer is a few array reads and one power: :func:`single` returns a function
doing exactly the arithmetic of ``Elo.predict`` (same summation order, so the
same bits). For the matchup models (strengths, blade-chest in either form,
uncertainty, draws, first-side advantage) a 1v1 pairing with no context or a
context of categories only is one compiled call over the two entity rows
(:mod:`._matchup_one`, equal to ``predict`` to round-off); anything else there,
and every other model, takes the general path. :func:`many` predicts
a batch of pairings with one vectorised call where the model has one (the
encoded-batch models and the plain rating model), else one by one.

Both are called under the live model's lock by :class:`~streamrate.replica.reader.LocalReader`.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from streamrate.batch import EncodedBatch
from streamrate.events import Matchup
from streamrate.models.base import Model, Prediction
from streamrate.models.elo import Elo
from streamrate.models.matchup import MatchupModel

Side = Sequence[str]
Single = Callable[[Side, Side, dict[str, Any]], Prediction]


def _matchup(first: Side, second: Side, context: dict[str, Any]) -> Matchup:
    return Matchup.model_construct(
        first=tuple(first), second=tuple(second), context=context, features={}
    )


def single(model: Model) -> Single:
    """A function (first, second, context) -> Prediction for ``model`` as it is now.

    Rebuild it after the model object is replaced (a checkpoint reload); learning
    in place is seen by it (it reads the model's arrays at each call).
    """

    def general(first: Side, second: Side, context: dict[str, Any]) -> Prediction:
        return model.predict(_matchup(first, second, context))

    if type(model) is Elo:
        return _elo_single(model)
    if (
        isinstance(model, MatchupModel)
        and model.feature_width == 0
        and type(model).predict_encoded is MatchupModel.predict_encoded  # not redefined
    ):
        return _matchup_single(model, general)
    return general


def _elo_single(m: Elo) -> Single:
    lookup = m.entities_.lookup
    initial, scale, pow_ = m.initial, m.scale, math.pow

    def side(ids: Side) -> float:
        ratings = m.ratings_  # re-read: it grows (a new array) as entities arrive
        total = 0.0
        for e in ids:
            r = lookup(e, -1)
            total += initial if r < 0 else float(ratings[r])
        return total / len(ids)

    def predict(first: Side, second: Side, context: dict[str, Any]) -> Prediction:
        diff = side(first) + float(m.advantage_[0]) - side(second)  # learned: read each time
        return Prediction(1.0 / (1.0 + pow_(10.0, -diff / scale)))

    return predict


_NO_SLOTS = np.zeros(0, dtype=np.int64)
_NO_VALUES = np.zeros(0, dtype=np.float64)
_CONTEXTS_KEPT = 1024  # encoded categorical contexts cached per model


def _matchup_single(m: MatchupModel, general: Single) -> Single:
    try:
        from streamrate.replica._matchup_one import one_pairing
    except ImportError:  # no compiler: the general path is all there is
        return general
    cfg = m._cfg()  # settings only: fixed for the model object
    hyp = np.array(
        [
            m.forget_per_day,
            float(m.advantage),
            m.prior_var,
            m.noise_per_day,
            m.vector_prior_var,
            m.vector_noise_per_day,
        ]
    )
    hasher = m._ctx
    contexts: dict[tuple[tuple[str, Any], ...], tuple[Any, Any]] = {}

    def slots(context: dict[str, Any]) -> tuple[Any, Any] | None:
        """Hashed (slots, values) of a context of categories; None when it has numbers."""
        if not context or hasher is None:  # no context slots: the context is not used
            return _NO_SLOTS, _NO_VALUES
        items = tuple(context.items())
        got = contexts.get(items)
        if got is None:
            if not all(isinstance(v, str) for _, v in items):
                return None  # numbers are scaled by running statistics: the general path
            pairs = hasher.encoded_items(items)[0]
            got = (
                np.array([i for i, _ in pairs], dtype=np.int64),
                np.array([v for _, v in pairs], dtype=np.float64),
            )
            if len(contexts) < _CONTEXTS_KEPT:
                contexts[items] = got
        return got

    def predict(first: Side, second: Side, context: dict[str, Any]) -> Prediction:
        if len(first) != 1 or len(second) != 1:
            return general(first, second, context)
        ctx = slots(context)
        if ctx is None:
            return general(first, second, context)
        lookup = m.entities_.lookup  # re-read: a checkpoint load replaces the table
        r1, r2 = lookup(first[0], -1), lookup(second[0], -1)
        pw, pd = one_pairing(
            m.own_, m.acc_, m.last_s_, r1, r2, m.W_, m.G_, m.H_, m.sc_, ctx[0], ctx[1], cfg, hyp,
            m.clock_s_,  # predictions are made at the model's clock
        )  # fmt: skip
        return Prediction(pw, pd)

    return predict


def many(
    model: Model, pairs: Sequence[tuple[Side, Side]], context: dict[str, Any]
) -> npt.NDArray[np.float64]:
    """P(first wins) for every (first, second) pair, vectorised where the model allows."""
    n = len(pairs)
    out = np.empty(n)
    if n == 0:
        return out
    solo = all(len(a) == 1 and len(b) == 1 for a, b in pairs)
    if type(model) is Elo and solo:
        lookup = model.entities_.lookup
        ra = np.fromiter((lookup(a[0], -1) for a, _ in pairs), dtype=np.int64, count=n)
        rb = np.fromiter((lookup(b[0], -1) for _, b in pairs), dtype=np.int64, count=n)
        ratings = model.ratings_
        va = np.where(ra < 0, model.initial, ratings[np.maximum(ra, 0)])
        vb = np.where(rb < 0, model.initial, ratings[np.maximum(rb, 0)])
        diff = va + float(model.advantage_[0]) - vb
        out[:] = 1.0 / (1.0 + np.power(10.0, -diff / model.scale))
        return out
    if solo and hasattr(model, "encode") and hasattr(model, "predict_encoded"):
        enc: Any = model
        one = enc.encode([_matchup(pairs[0][0], pairs[0][1], context)], add=False)
        lookup = model.entities_.lookup
        first = np.fromiter((lookup(a[0], -1) for a, _ in pairs), dtype=np.int32, count=n)
        second = np.fromiter((lookup(b[0], -1) for _, b in pairs), dtype=np.int32, count=n)
        batch = EncodedBatch(
            first=first.reshape(n, 1),
            second=second.reshape(n, 1),
            score=np.full(n, np.nan),
            ctx_idx=np.repeat(one.ctx_idx, n, axis=0),
            ctx_val=np.repeat(one.ctx_val, n, axis=0),
            time_s=np.full(n, np.nan),
            first_size=np.ones(n, dtype=np.int32),
            second_size=np.ones(n, dtype=np.int32),
        )
        out[:] = enc.predict_encoded(batch).p_win
        return out
    for i, (a, b) in enumerate(pairs):
        out[i] = model.predict(_matchup(a, b, context)).p_win
    return out
