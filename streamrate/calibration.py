"""Scores and calibration statistics for probability forecasts of match outcomes.

Scoring convention (used everywhere in streamrate): a model's forecast for a match
is the first side's *expected score* ``e = P(win) + P(draw) / 2`` and the outcome
is the first side's score ``y`` in {0, 0.5, 1}. Log loss is the binary
cross-entropy ``-[y ln e + (1 - y) ln(1 - e)]`` in nats. It is minimised at
``e = E[y]``, so with draws its floor is the mean binary entropy of the true
expected score (see :func:`binary_entropy`). Brier score is ``(e - y)^2``.

Accuracy is taken over decisive matches only (``y != 0.5``): a forecast is right
when ``e > 0.5`` and the first side won or ``e < 0.5`` and it lost; ``e == 0.5``
counts as half right. Draws are left out because no single pick is right for them.

Calibration is measured on 10 equal-width bins of ``e`` over [0, 1] (the bin of
``e`` is the first whose upper edge is ``>= e``, so bins are ``(a, b]`` except the
first, which includes 0). ECE is the count-weighted mean of ``|mean e - mean y|``
over non-empty bins. Calibration slope and intercept come from the logistic
regression ``y ~ a + b logit(e)`` (``b = 1, a = 0`` for a calibrated forecast);
draws enter that regression as the fractional outcome 0.5.

>>> import numpy as np
>>> e = np.array([0.8, 0.3, 0.6]); y = np.array([1.0, 0.0, 0.5])
>>> round(log_loss(e, y), 4), round(brier(e, y), 4), accuracy(e, y)
(0.4311, 0.0467, 1.0)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]

PROB_EPS = 1e-12
"""Forecasts are clipped to [eps, 1 - eps] before taking logs."""
ECE_BINS = 10


def _arrays(e: npt.ArrayLike, y: npt.ArrayLike) -> tuple[FloatArray, FloatArray]:
    ea = np.asarray(e, dtype=np.float64).ravel()
    ya = np.asarray(y, dtype=np.float64).ravel()
    if ea.shape != ya.shape:
        raise ValueError(f"{ea.size} forecasts but {ya.size} outcomes")
    return ea, ya


def pointwise_log_loss(e: npt.ArrayLike, y: npt.ArrayLike) -> FloatArray:
    """Per-match binary cross-entropy in nats (see the module docstring)."""
    ea, ya = _arrays(e, y)
    ec = np.clip(ea, PROB_EPS, 1.0 - PROB_EPS)
    return -(ya * np.log(ec) + (1.0 - ya) * np.log1p(-ec))


def log_loss(e: npt.ArrayLike, y: npt.ArrayLike) -> float:
    """Mean log loss in nats; NaN for no matches."""
    pl = pointwise_log_loss(e, y)
    return float(pl.mean()) if pl.size else float("nan")


def brier(e: npt.ArrayLike, y: npt.ArrayLike) -> float:
    """Mean squared difference between expected score and score."""
    ea, ya = _arrays(e, y)
    return float(np.mean((ea - ya) ** 2)) if ea.size else float("nan")


def accuracy(e: npt.ArrayLike, y: npt.ArrayLike) -> float:
    """Share of decisive matches whose winner was favoured (a 0.5 forecast counts half)."""
    ea, ya = _arrays(e, y)
    decisive = ya != 0.5
    if not decisive.any():
        return float("nan")
    ed, yd = ea[decisive], ya[decisive]
    right = np.where(ed == 0.5, 0.5, ((ed > 0.5) == (yd == 1.0)).astype(np.float64))
    return float(right.mean())


def binary_entropy(p: npt.ArrayLike) -> FloatArray:
    """``-[p ln p + (1 - p) ln(1 - p)]`` in nats: the least expected log loss at ``E[y] = p``."""
    pa = np.clip(np.asarray(p, dtype=np.float64), PROB_EPS, 1.0 - PROB_EPS)
    return -(pa * np.log(pa) + (1.0 - pa) * np.log1p(-pa))


@dataclass(frozen=True)
class ReliabilityCurve:
    """Per non-empty bin: mean forecast, mean outcome and number of matches."""

    mean_forecast: FloatArray
    mean_outcome: FloatArray
    count: npt.NDArray[np.int64]
    bins: int


def bin_index(e: npt.ArrayLike, bins: int = ECE_BINS) -> npt.NDArray[np.int64]:
    """Equal-width bin of each forecast: ``(a, b]`` bins, the first one closed at 0."""
    inner = np.linspace(0.0, 1.0, bins + 1)[1:-1]
    return np.searchsorted(inner, np.asarray(e, dtype=np.float64), side="left").astype(np.int64)


def reliability_curve(e: npt.ArrayLike, y: npt.ArrayLike, bins: int = ECE_BINS) -> ReliabilityCurve:
    """Mean outcome against mean forecast in equal-width bins (empty bins left out)."""
    ea, ya = _arrays(e, y)
    idx = bin_index(ea, bins)
    count = np.bincount(idx, minlength=bins)
    sum_e = np.bincount(idx, weights=ea, minlength=bins)
    sum_y = np.bincount(idx, weights=ya, minlength=bins)
    keep = count > 0
    n = count[keep].astype(np.float64)
    return ReliabilityCurve(sum_e[keep] / n, sum_y[keep] / n, count[keep].astype(np.int64), bins)


def expected_calibration_error(e: npt.ArrayLike, y: npt.ArrayLike, bins: int = ECE_BINS) -> float:
    """Count-weighted mean over bins of ``|mean forecast - mean outcome|``."""
    curve = reliability_curve(e, y, bins)
    total = curve.count.sum()
    if total == 0:
        return float("nan")
    gap = np.abs(curve.mean_forecast - curve.mean_outcome)
    return float(np.sum(curve.count * gap) / total)


def logit(p: npt.ArrayLike) -> FloatArray:
    pa = np.clip(np.asarray(p, dtype=np.float64), PROB_EPS, 1.0 - PROB_EPS)
    return np.log(pa) - np.log1p(-pa)


def sigmoid(z: npt.ArrayLike) -> FloatArray:
    """Logistic function, safe for large ``|z|``."""
    za = np.asarray(z, dtype=np.float64)
    return np.exp(-np.logaddexp(0.0, -za))


def _nll(z: FloatArray, y: FloatArray) -> float:
    # -[y log s(z) + (1 - y) log(1 - s(z))] written with logaddexp: no overflow.
    return float(np.sum(y * np.logaddexp(0.0, -z) + (1.0 - y) * np.logaddexp(0.0, z)))


def calibration_slope_intercept(
    e: npt.ArrayLike, y: npt.ArrayLike, max_iter: int = 100, tol: float = 1e-10
) -> tuple[float, float]:
    """``(slope, intercept)`` of ``logit P(y) = intercept + slope * logit(e)``.

    Newton's method with step halving from (slope 1, intercept 0), so strongly
    over-confident forecasts (logits of 10 and more) converge instead of
    overflowing. Draws enter as the fractional outcome 0.5. NaNs when the fit is
    undefined: fewer than 2 events, all outcomes equal, constant forecasts, or
    no convergence (perfect separation).

    >>> rng = np.random.default_rng(0)
    >>> z = rng.normal(0, 1.5, 20000); y = (rng.random(20000) < sigmoid(z)).astype(float)
    >>> b, a = calibration_slope_intercept(sigmoid(3 * z), y)
    >>> round(b, 2), abs(round(a, 1))
    (0.33, 0.0)
    """
    pa = np.asarray(e, dtype=np.float64).ravel()
    ya = np.asarray(y, dtype=np.float64).ravel()
    nan = (float("nan"), float("nan"))
    if pa.size < 2 or np.ptp(ya) == 0:
        return nan
    x = logit(pa)
    if np.ptp(x) < 1e-12:
        return nan
    design = np.column_stack([np.ones_like(x), x])
    theta = np.array([0.0, 1.0])
    current = _nll(design @ theta, ya)
    for _ in range(max_iter):
        mu = sigmoid(design @ theta)
        grad = design.T @ (mu - ya)
        hess = design.T @ (design * (mu * (1.0 - mu))[:, None])
        try:
            step = np.linalg.solve(hess, grad)
        except np.linalg.LinAlgError:
            return nan
        scale = 1.0
        while scale > 1e-8:
            cand = theta - scale * step
            value = _nll(design @ cand, ya)
            if value <= current + 1e-12 * (1.0 + abs(current)):
                break
            scale *= 0.5
        else:
            return nan
        theta, current = cand, value
        if np.max(np.abs(scale * step)) < tol * (1.0 + np.max(np.abs(theta))):
            return (float(theta[1]), float(theta[0])) if np.all(np.abs(theta) < 1e6) else nan
    return nan


@dataclass(frozen=True)
class MurphyParts:
    """Binned Murphy decomposition of the Brier score: ``reliability - resolution + uncertainty``.

    The identity is exact when forecasts are constant within each bin; with
    varying forecasts ``brier - (reliability - resolution + uncertainty)`` is the
    within-bin remainder, reported as ``within_bin``.
    """

    reliability: float
    resolution: float
    uncertainty: float
    within_bin: float


def murphy_decomposition(e: npt.ArrayLike, y: npt.ArrayLike, bins: int = ECE_BINS) -> MurphyParts:
    ea, ya = _arrays(e, y)
    curve = reliability_curve(ea, ya, bins)
    n = float(ea.size)
    ybar = float(ya.mean())
    w = curve.count / n
    rel = float(np.sum(w * (curve.mean_forecast - curve.mean_outcome) ** 2))
    res = float(np.sum(w * (curve.mean_outcome - ybar) ** 2))
    # The variance of y in {0, .5, 1} is not ybar(1 - ybar) when there are draws.
    unc = float(np.mean((ya - ybar) ** 2))
    return MurphyParts(rel, res, unc, brier(ea, ya) - (rel - res + unc))
