"""Batch logistic regression, refit from scratch on a schedule: an offline reference.

Each match becomes one sparse row of a design matrix:

* column 0: 1 (an intercept, i.e. a first-side advantage);
* ``context_width`` columns: the match context, feature-hashed;
* ``feature_width`` columns: entity features, feature-hashed, summed over the
  first side's members minus the second side's;
* one column per entity: +1 for members of the first side, -1 for the second.

The target is the first side's score (a draw is the soft target 0.5). Every
``refit_every`` learned events the coefficients are refit on everything seen so
far by minimising the mean-free penalised log loss

    sum_i [log(1 + exp(z_i)) - y_i z_i] + l2 / 2 * |beta without intercept|**2

with L-BFGS (``l2`` plays the role of 1 / C in the usual notation), starting
from the previous coefficients. Before the first fit every prediction is 0.5.
Entities unseen at the last fit have coefficient 0. No draw model.

>>> m = LogisticBatch(refit_every=2)
>>> m.get_params()["refit_every"]
2
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from contextlib import nullcontext
from typing import Any, ClassVar

import numpy as np
from scipy.optimize import minimize
from scipy.sparse import csr_matrix
from scipy.special import expit

try:  # installed alongside scipy/scikit-learn almost everywhere; optional here
    from threadpoolctl import threadpool_limits
except ImportError:  # pragma: no cover
    threadpool_limits = None

from streamrate.batch import add_numbers, scaled_items
from streamrate.encode import EntityTable, FeatureHasher, RunningScale
from streamrate.errors import ConfigError, StateError
from streamrate.events import MatchEvent, Matchup
from streamrate.models.base import Model, ModelState, Prediction, Predictions, numbers_read_raw


def fit_logistic(
    x: csr_matrix,
    y: np.ndarray,
    l2: float,
    start: np.ndarray | None = None,
    max_iter: int = 500,
) -> np.ndarray:
    """Coefficients minimising the penalised log loss; column 0 is not penalised."""
    n_cols = x.shape[1]
    penal = np.ones(n_cols)
    penal[0] = 0.0
    xt = x.T.tocsr()

    def loss(beta: np.ndarray) -> tuple[float, np.ndarray]:
        z = x @ beta
        value = float(np.sum(np.logaddexp(0.0, z) - y * z)) + 0.5 * l2 * float(
            np.dot(penal * beta, beta)
        )
        grad = xt @ (expit(z) - y) + l2 * penal * beta
        return value, grad

    beta0 = np.zeros(n_cols) if start is None else start
    # L-BFGS works on short vectors; a multi-threaded BLAS only adds hand-off cost
    # there (ten times slower on a busy two-core machine), so it runs on one thread.
    limit = threadpool_limits(1) if threadpool_limits is not None else nullcontext()
    with limit:
        res = minimize(
            loss,
            beta0,
            jac=True,
            method="L-BFGS-B",
            options={"maxiter": max_iter, "gtol": 1e-9, "ftol": 1e-14},
        )
    return np.asarray(res.x, dtype=np.float64)


class LogisticBatch(Model):
    """Logistic regression on entity, context and entity-feature columns, refit in batch."""

    kind: ClassVar[str] = "logistic_batch"
    # Version 2 added the running statistics of numeric fields (scale_numbers);
    # a version 1 state still loads, with numbers read raw as it was trained.
    state_version: ClassVar[int] = 2

    def __init__(
        self,
        refit_every: int = 2000,
        l2: float = 1.0,
        context_width: int = 64,
        feature_width: int = 16,
        max_iter: int = 500,
        scale_numbers: bool = True,
    ) -> None:
        if refit_every < 1 or max_iter < 1:
            raise ConfigError("logistic_batch: refit_every and max_iter must be at least 1")
        if not (l2 > 0 and math.isfinite(l2)):
            raise ConfigError("logistic_batch: l2 must be a positive number")
        if context_width < 1 or feature_width < 1:
            raise ConfigError("logistic_batch: hashing widths must be at least 1")
        self.refit_every = int(refit_every)
        self.l2 = float(l2)
        self.context_width = int(context_width)
        self.feature_width = int(feature_width)
        self.max_iter = int(max_iter)
        self.scale_numbers = bool(scale_numbers)
        # Numbers enter the design as running standard scores (see RunningScale);
        # a row keeps the scores of the moment it was recorded.
        self.context_scale_ = RunningScale()
        self.feature_scale_ = RunningScale()
        self._context = FeatureHasher(self.context_width)
        self._features = FeatureHasher(self.feature_width)
        self._entity_col0 = 1 + self.context_width + self.feature_width
        self.entities_ = EntityTable()
        self.coef_ = np.zeros(0)
        self.fits_ = 0
        self._indptr: list[int] = [0]
        self._cols: list[int] = []
        self._vals: list[float] = []
        self._y: list[float] = []

    # -- design rows ---------------------------------------------------------------
    def _row(
        self, m: Matchup, rows1: Sequence[int], rows2: Sequence[int], learn: bool = False
    ) -> tuple[list, list]:
        """Sparse design row (columns, values); entity rows of -1 are left out.
        ``learn``: the row is recorded, its numbers join the running statistics."""
        cols: list[int] = [0]
        vals: list[float] = [1.0]
        ctx = self.context_scale_ if self.scale_numbers else None
        hit = self._context.encoded_items(tuple(m.context.items()))
        for slot, v in scaled_items(hit, ctx):
            cols.append(slot + 1)
            vals.append(v)
        f0 = 1 + self.context_width
        feat = self.feature_scale_ if self.scale_numbers else None
        hits = []
        for side, sign in ((m.first, 1.0), (m.second, -1.0)):
            for e in side:
                fm = m.features.get(e)
                if fm:
                    hits.append(self._features.encoded_items(tuple(fm.items())))
                    for slot, v in scaled_items(hits[-1], feat):
                        cols.append(slot + f0)
                        vals.append(sign * v)
        if learn:  # scored first, then added (see streamrate.batch.add_numbers)
            add_numbers((hit,), ctx)
            add_numbers(hits, feat)
        for rows, sign in ((rows1, 1.0), (rows2, -1.0)):
            for r in rows:
                if r >= 0:
                    cols.append(self._entity_col0 + r)
                    vals.append(sign)
        return cols, vals

    def _p(self, cols: list[int], vals: list[float]) -> float:
        if self.fits_ == 0:
            return 0.5
        z = 0.0
        n = len(self.coef_)
        for c, v in zip(cols, vals, strict=True):
            if c < n:
                z += self.coef_[c] * v
        return float(expit(z))

    def design(self) -> tuple[csr_matrix, np.ndarray]:
        """The recorded design matrix (all columns known so far) and targets."""
        n_cols = self._entity_col0 + len(self.entities_)
        x = csr_matrix(
            (
                np.asarray(self._vals, dtype=np.float64),
                np.asarray(self._cols, dtype=np.int64),
                np.asarray(self._indptr, dtype=np.int64),
            ),
            shape=(len(self._y), n_cols),
        )
        x.sum_duplicates()
        return x, np.asarray(self._y, dtype=np.float64)

    def refit(self) -> None:
        """Fit the coefficients on everything recorded so far."""
        x, y = self.design()
        start = np.zeros(x.shape[1])
        start[: len(self.coef_)] = self.coef_
        self.coef_ = fit_logistic(x, y, self.l2, start, self.max_iter)
        self.fits_ += 1

    # -- the online API -----------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        get = self.entities_.get
        rows1 = [get(e) for e in matchup.first]
        rows2 = [get(e) for e in matchup.second]
        return Prediction(self._p(*self._row(matchup, rows1, rows2)))

    def learn(self, event: MatchEvent) -> Prediction:
        p = self.learn_batch([event])
        return Prediction(float(p.p_win[0]), float(p.p_draw[0]))

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        """Predict all from the current fit, record all, refit if a refit falls due."""
        before = len(self._y)
        p = np.empty(len(events))
        for i, ev in enumerate(events):
            rows1 = self.entities_.rows(ev.first)
            rows2 = self.entities_.rows(ev.second)
            cols, vals = self._row(ev, rows1, rows2, learn=True)
            p[i] = self._p(cols, vals)
            self._cols.extend(cols)
            self._vals.extend(vals)
            self._indptr.append(len(self._cols))
            self._y.append(ev.score)
            self.entities_.counts[rows1 + rows2] += 1
        if len(self._y) // self.refit_every > before // self.refit_every:
            self.refit()
        return Predictions(p, np.zeros_like(p))

    # -- persistence --------------------------------------------------------------
    def get_params(self) -> dict[str, Any]:
        return {
            "refit_every": self.refit_every,
            "l2": self.l2,
            "context_width": self.context_width,
            "feature_width": self.feature_width,
            "max_iter": self.max_iter,
            "scale_numbers": self.scale_numbers,
        }

    @classmethod
    def upgrade_state(cls, state: ModelState) -> ModelState:
        return numbers_read_raw(cls, state)

    def _state_arrays(self) -> dict[str, np.ndarray]:
        arrays = self.entities_.to_arrays()
        arrays["design_indptr"] = np.asarray(self._indptr, dtype=np.int64)
        arrays["design_cols"] = np.asarray(self._cols, dtype=np.int32)
        arrays["design_vals"] = np.asarray(self._vals, dtype=np.float64)
        arrays["target"] = np.asarray(self._y, dtype=np.float64)
        arrays["coef"] = self.coef_.copy()
        arrays["fits"] = np.array([self.fits_], dtype=np.int64)
        arrays.update(self.context_scale_.to_arrays("context_scale"))
        arrays.update(self.feature_scale_.to_arrays("feature_scale"))
        return arrays

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        table = EntityTable.from_arrays(arrays)
        indptr = np.asarray(arrays["design_indptr"], dtype=np.int64)
        cols = np.asarray(arrays["design_cols"], dtype=np.int64)
        vals = np.asarray(arrays["design_vals"], dtype=np.float64)
        y = np.asarray(arrays["target"], dtype=np.float64)
        coef = np.asarray(arrays["coef"], dtype=np.float64)
        fits = np.asarray(arrays["fits"], dtype=np.int64)
        ok = (
            len(indptr) == len(y) + 1
            and indptr[0] == 0
            and indptr[-1] == len(cols) == len(vals)
            and bool(np.all(np.diff(indptr) >= 0))
            and (len(cols) == 0 or 0 <= cols.min() < self._entity_col0 + len(table))
            and (len(cols) == 0 or cols.max() < self._entity_col0 + len(table))
            and fits.shape == (1,)
        )
        if not ok:
            raise StateError("logistic_batch: saved design arrays are inconsistent")
        if "context_scale_names" in arrays or self.scale_numbers:
            self.context_scale_ = RunningScale.from_arrays(arrays, "context_scale")
            self.feature_scale_ = RunningScale.from_arrays(arrays, "feature_scale")
        self.entities_ = table
        self._indptr = indptr.tolist()
        self._cols = cols.tolist()
        self._vals = vals.tolist()
        self._y = y.tolist()
        self.coef_ = coef
        self.fits_ = int(fits[0])
