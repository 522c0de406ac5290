"""TrueSkill loops over encoded batches, written once and run two ways.

As in :mod:`._kernels_glicko2`: plain Python over numpy arrays and ``math``,
helpers marked ``register_jitable`` (ordinary functions from Python, compiled
into the loops that call them), loops compiled with numba (``*_compiled``) and
also run as they are (``compiled=False``), with the same numbers. Squares are
products, never ``** 2``.

The normal distribution function and its logarithm are written here from
``math.erfc`` (numba cannot call scipy): ``Phi(x) = erfc(-x / sqrt 2) / 2``, its
logarithm through ``log1p`` above 0, directly down to -30, and below that by
the asymptotic series ``log Phi(x) = -x^2/2 - log(-x) - log(2 pi)/2 +
log(1 - 1/x^2 + 3/x^4 - 15/x^6 + ...)`` (the Mills ratio expansion; common
practice), summed until its terms stop mattering.

``prm`` holds the settings ``[mu0, sigma0**2, beta, tau, advantage_tau, learn]``
(``learn`` 1.0 when the first-side advantage is learned, else 0.0); ``eps_n[n]``
is the draw margin of a match of ``n`` players (computed by the caller); ``adv``
is the advantage's belief ``[mean, variance]``, updated in place. The advantage
is part of the first side's performance sum without performance noise: it adds
its mean to the difference and its variance to ``c**2``, and is updated by the
member formulas (see :mod:`.trueskill`). With ``adv = [0, 0]`` and ``learn`` 0
every number is the one computed without it, to the last bit (adding 0.0).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit
from numba.extending import register_jitable

# Shared with the Glicko-2 loops. numba's on-disk cache checks only the file of
# the compiled function itself: after editing these helpers, remove the cached
# kernels of this module (__pycache__/_kernels_trueskill*.nbi and .nbc).
from streamrate.models._kernels_glicko2 import count, places

_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)
_SQRT_HALF = math.sqrt(0.5)


@register_jitable
def ndtr(x: float) -> float:
    """Phi(x), the standard normal distribution function."""
    return 0.5 * math.erfc(-x * _SQRT_HALF)


@register_jitable
def log_ndtr(x: float) -> float:
    """log Phi(x), without underflow far in the lower tail."""
    if x >= 0.0:
        return math.log1p(-0.5 * math.erfc(x * _SQRT_HALF))
    if x >= -30.0:
        return math.log(0.5 * math.erfc(-x * _SQRT_HALF))
    inv = 1.0 / (x * x)
    term = 1.0
    total = 1.0
    k = 1
    while abs(term) > 1e-17 and k < 200:
        term *= -(2.0 * k - 1.0) * inv
        total += term
        k += 1
    return -0.5 * x * x - math.log(-x) - _LOG_SQRT_2PI + math.log(total)


@register_jitable
def log_pdf(x: float) -> float:
    return -0.5 * x * x - _LOG_SQRT_2PI


@register_jitable
def v_win(t: float, eps: float) -> float:
    """Mean of X ~ N(0,1) given X > eps - t, i.e. N(t-eps) / Phi(t-eps) (a win)."""
    x = t - eps
    # In log space: Phi(x) underflows long before the ratio does.
    return math.exp(log_pdf(x) - log_ndtr(x))


@register_jitable
def w_win(t: float, eps: float) -> float:
    """Variance shrinkage for a win: v * (v + t - eps), kept within [0, 1]."""
    x = t - eps
    v = v_win(t, eps)
    return min(max(v * (v + x), 0.0), 1.0)


@register_jitable
def draw_terms(t: float, eps: float) -> tuple[float, float]:
    """(v, w) for a draw at t >= 0: X ~ N(0,1) truncated to [-eps - t, eps - t]."""
    a, b = -eps - t, eps - t
    width = b - a
    if width < 1e-6:
        # A band this narrow pins the variable to its middle; the exact moments
        # differ by O(width**2) while the general formula below would cancel badly.
        return 0.5 * (a + b), 1.0 - width * width / 12.0
    log_b, log_a = log_ndtr(b), log_ndtr(a)
    # log(Phi(b) - Phi(a)) without cancellation or underflow (a <= b <= eps).
    log_z = log_b + math.log(-math.expm1(log_a - log_b))
    pa = math.exp(log_pdf(a) - log_z)
    pb = math.exp(log_pdf(b) - log_z)
    v = pa - pb
    w = v * v + b * pb - a * pa
    return v, min(max(w, 0.0), 1.0)


@register_jitable
def _side(rows, e, n, mu, var, prm, extra):
    """Sum of the members' means and of their variances plus ``extra`` (row -1: prior)."""
    m = 0.0
    v = 0.0
    for j in range(n):
        r = rows[e, j]
        if r < 0:
            m += prm[0]
            v += prm[1] + extra
        else:
            m += mu[r]
            v += var[r] + extra
    return m, v


@register_jitable
def _predict_one(e, first, n1, second, n2, mu, var, prm, eps_n, adv):
    n = n1[e] + n2[e]
    beta = prm[2]
    mu_a, var_a = _side(first, e, n1[e], mu, var, prm, 0.0)
    mu_b, var_b = _side(second, e, n2[e], mu, var, prm, 0.0)
    c = math.sqrt(n * beta * beta + var_a + var_b + adv[1])
    eps = eps_n[n]
    d = mu_a + adv[0] - mu_b
    p_win = ndtr((d - eps) / c)
    p_loss = ndtr((-d - eps) / c)
    return p_win, max(0.0, 1.0 - p_win - p_loss)


@register_jitable
def _corrections(e, first, n1, second, n2, score, mu, var, prm, eps_n, adv_mu, adv_var):
    """(c, c**2, v, w) of event ``e`` from the current beliefs (tau added); the
    advantage enters with mean ``adv_mu`` and variance ``adv_var`` (its tau added
    by the caller)."""
    beta, tau = prm[2], prm[3]
    tau2 = tau * tau
    n = n1[e] + n2[e]
    mu_a, var_a = _side(first, e, n1[e], mu, var, prm, tau2)
    mu_b, var_b = _side(second, e, n2[e], mu, var, prm, tau2)
    c2 = n * beta * beta + var_a + var_b + adv_var
    c = math.sqrt(c2)
    eps = eps_n[n] / c
    d = mu_a + adv_mu - mu_b
    if score[e] == 0.5:
        t = d / c
        v, w = draw_terms(abs(t), eps)
        if t < 0:
            v = -v
    else:
        sign = 1.0 if score[e] == 1.0 else -1.0
        t = sign * d / c
        v, w = v_win(t, eps), w_win(t, eps)
        if sign < 0:
            v = -v
    return c, c2, v, w


@register_jitable
def _advantage_prior(adv, prm):
    """The advantage's variance before a match (or a batch): its tau added when learned."""
    if prm[5] > 0.0:
        return adv[1] + prm[4] * prm[4]
    return adv[1]


def learn_seq(first, n1, second, n2, score, mu, var, counts, prm, eps_n, adv, p_out):
    """Predict, then update, one match after another; (P(win), P(draw)) into ``p_out``."""
    tau2 = prm[3] * prm[3]
    for e in range(first.shape[0]):
        p_out[e, 0], p_out[e, 1] = _predict_one(e, first, n1, second, n2, mu, var, prm, eps_n, adv)
        hv = _advantage_prior(adv, prm)
        c, c2, v, w = _corrections(e, first, n1, second, n2, score, mu, var, prm, eps_n, adv[0], hv)
        # The advantage is a member of the first side without performance noise.
        if prm[5] > 0.0 and hv > 0.0:
            adv[0] = adv[0] + hv / c * v
            adv[1] = hv * (1.0 - hv / c2 * w)
        # Members of a match are distinct, and each new belief needs only the
        # member's own prior and (c, v, w): updating in place is safe.
        for side in range(2):
            rows = first if side == 0 else second
            direction = 1.0 if side == 0 else -1.0
            for j in range(n1[e] if side == 0 else n2[e]):
                r = rows[e, j]
                vr = var[r] + tau2
                mu[r] = mu[r] + direction * vr / c * v
                var[r] = vr * (1.0 - vr / c2 * w)
    count(first, n1, second, n2, counts)


def learn_combined(
    first, n1, second, n2, score, mu, var, counts, mark, prm, eps_n, adv, p_out,
):  # fmt: skip
    """Predict all from the batch-start beliefs; then add every match's change in
    precision and precision-times-mean per entity, and for the advantage alike."""
    tau2 = prm[3] * prm[3]
    n, k1, k2 = first.shape[0], first.shape[1], second.shape[1]
    loc1 = np.zeros((n, k1), dtype=np.int64)
    loc2 = np.zeros((n, k2), dtype=np.int64)
    uniq = np.zeros(n * (k1 + k2), dtype=np.int64)
    k = places(first, n1, second, n2, 0, n, mark, uniq, loc1, loc2)
    d_prec = np.zeros(k)
    d_pm = np.zeros(k)
    hv = _advantage_prior(adv, prm)
    learn_h = prm[5] > 0.0 and hv > 0.0
    h_prec = 0.0
    h_pm = 0.0
    for e in range(first.shape[0]):
        p_out[e, 0], p_out[e, 1] = _predict_one(e, first, n1, second, n2, mu, var, prm, eps_n, adv)
        c, c2, v, w = _corrections(e, first, n1, second, n2, score, mu, var, prm, eps_n, adv[0], hv)
        if learn_h:
            h_mu_new = adv[0] + hv / c * v
            h_var_new = hv * (1.0 - hv / c2 * w)
            h_prec = h_prec + 1.0 / h_var_new - 1.0 / hv
            h_pm = h_pm + h_mu_new / h_var_new - adv[0] / hv
        for side in range(2):
            rows = first if side == 0 else second
            loc = loc1 if side == 0 else loc2
            direction = 1.0 if side == 0 else -1.0
            for j in range(n1[e] if side == 0 else n2[e]):
                r = rows[e, j]
                u = loc[e, j]
                prior_var = var[r] + tau2
                mu_new = mu[r] + direction * prior_var / c * v
                var_new = prior_var * (1.0 - prior_var / c2 * w)
                d_prec[u] = d_prec[u] + 1.0 / var_new - 1.0 / prior_var
                d_pm[u] = d_pm[u] + mu_new / var_new - mu[r] / prior_var
    for u in range(k):
        r = uniq[u]
        prior_var = var[r] + tau2
        prec = 1.0 / prior_var + d_prec[u]
        mu[r] = (mu[r] / prior_var + d_pm[u]) / prec
        var[r] = 1.0 / prec
    if learn_h:
        prec = 1.0 / hv + h_prec
        adv[0] = (adv[0] / hv + h_pm) / prec
        adv[1] = 1.0 / prec
    count(first, n1, second, n2, counts)


def predict(first, n1, second, n2, mu, var, prm, eps_n, adv, p_out):
    """(P(win), P(draw)) of every row from the current beliefs; changes nothing."""
    for e in range(first.shape[0]):
        p_out[e, 0], p_out[e, 1] = _predict_one(e, first, n1, second, n2, mu, var, prm, eps_n, adv)


learn_seq_compiled = njit(cache=True)(learn_seq)
learn_combined_compiled = njit(cache=True)(learn_combined)
predict_compiled = njit(cache=True)(predict)
