"""Glicko-2 loops over encoded batches, written once and run two ways.

Every function here is plain Python over numpy arrays and ``math``. The helpers
are marked ``register_jitable``: called from Python they are ordinary functions,
called from a compiled loop they are compiled into it. The loops at the bottom
are compiled with numba (``*_compiled``) and are also run as they are (the
fallback, used with ``compiled=False``); both give the same numbers.

Squares are written as products (``x * x``), never ``x ** 2``: Python turns a
float power into a call of ``pow`` while numba multiplies, and the two paths
must not differ in the last bit.

``prm`` holds the settings: ``[mu0, phi0, tau, tolerance, period_s, adv_step]``
(``adv_step``: the first-side advantage's step per unit of surprise, internal
scale). ``adv`` holds the learned first-side advantage ``h`` (internal scale, one
number): the first side is rated as if its mean ``mu`` were ``h`` higher.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit
from numba.extending import register_jitable


@register_jitable
def g(phi: float) -> float:
    """The Glicko weight of an opponent's deviation."""
    return 1.0 / math.sqrt(1.0 + 3.0 * phi * phi / (math.pi * math.pi))


@register_jitable
def logistic(x: float) -> float:
    # Two branches so that exp never overflows, however far apart the ratings.
    if x >= 0:
        return 1.0 / (1.0 + math.exp(-x))
    ex = math.exp(x)
    return ex / (1.0 + ex)


@register_jitable
def _vol_f(x: float, a: float, delta: float, phi2: float, v: float, tau2: float) -> float:
    ex = math.exp(x)
    q = phi2 + v + ex
    return ex * (delta * delta - phi2 - v - ex) / (2.0 * (q * q)) - (x - a) / tau2


@register_jitable
def new_volatility(
    phi: float, sigma: float, delta: float, v: float, tau: float, tolerance: float
) -> float:
    """Step 5: solve for the new volatility by the Illinois (regula falsi) iteration."""
    a = math.log(sigma * sigma)
    phi2 = phi * phi
    tau2 = tau * tau
    big_a = a
    if delta * delta > phi2 + v:
        big_b = math.log(delta * delta - phi2 - v)
    else:
        k = 1
        while _vol_f(a - k * tau, a, delta, phi2, v, tau2) < 0:
            k += 1
        big_b = a - k * tau
    f_a = _vol_f(big_a, a, delta, phi2, v, tau2)
    f_b = _vol_f(big_b, a, delta, phi2, v, tau2)
    for _ in range(200):  # converges in a handful of steps; the cap guards the loop
        if abs(big_b - big_a) <= tolerance:
            break
        big_c = big_a + (big_a - big_b) * f_a / (f_b - f_a)
        f_c = _vol_f(big_c, a, delta, phi2, v, tau2)
        if f_c * f_b <= 0:
            big_a, f_a = big_b, f_b
        else:
            f_a = f_a / 2.0
        big_b, f_b = big_c, f_c
    return math.exp(big_a / 2.0)


@register_jitable
def finish(
    mu: float, phi: float, sigma: float, inv_v: float, total: float, tau: float, tolerance: float
) -> tuple[float, float, float]:
    """Steps 4-7 of one entity, given sum g^2 E (1 - E) (that is 1/v) and sum g (s - E)."""
    if inv_v <= 0.0:
        # Results so certain they carry no information: only the deviation grows.
        return mu, math.sqrt(phi * phi + sigma * sigma), sigma
    v = 1.0 / inv_v
    sigma_new = new_volatility(phi, sigma, v * total, v, tau, tolerance)
    phi_star = math.sqrt(phi * phi + sigma_new * sigma_new)
    phi_new = 1.0 / math.sqrt(1.0 / (phi_star * phi_star) + inv_v)
    return mu + phi_new * phi_new * total, phi_new, sigma_new


@register_jitable
def _side(
    rows: np.ndarray, e: int, n: int, mu: np.ndarray, phi: np.ndarray, mu0: float, phi0: float
) -> tuple[float, float]:
    """Mean mu of a side and the deviation of that mean (row -1: never seen)."""
    m = 0.0
    var = 0.0
    for j in range(n):
        r = rows[e, j]
        if r < 0:
            m += mu0
            var += phi0 * phi0
        else:
            m += mu[r]
            p = phi[r]
            var += p * p
    return m / n, math.sqrt(var) / n


@register_jitable
def _p_win(mu_a: float, phi_a: float, mu_b: float, phi_b: float) -> float:
    return logistic(g(math.sqrt(phi_a * phi_a + phi_b * phi_b)) * (mu_a - mu_b))


@register_jitable
def _period(
    lo, hi, first, n1, second, n2, score, time_s, loc1, loc2, uniq, n_uniq,
    mu, phi, sigma, last_s, prm, adv, p_out, inv_v, total, t_first, t_last,
):  # fmt: skip
    """Events ``lo..hi`` as one rating period; ``loc1``/``loc2`` give each member's
    place in ``uniq`` (the period's distinct rows, ``n_uniq`` of them).

    The first-side advantage ``h = adv[0]`` stays fixed during the period; after
    it, ``h`` moves by ``adv_step`` times the summed surprise ``score - E`` of the
    first sides (``E``: the first side's expected score in its update).
    """
    mu0, phi0, tau, tol, period_s = prm[0], prm[1], prm[2], prm[3], prm[4]
    h = adv[0]
    surprise = 0.0
    for u in range(n_uniq):
        inv_v[u] = 0.0
        total[u] = 0.0
        t_first[u] = math.inf
        t_last[u] = math.nan
    for e in range(lo, hi):
        t = time_s[e]
        for side in range(2):
            loc = loc1 if side == 0 else loc2
            n = n1[e] if side == 0 else n2[e]
            for j in range(n):
                u = loc[e, j]
                if t < t_first[u]:
                    t_first[u] = t
                if math.isnan(t_last[u]) or t > t_last[u]:
                    t_last[u] = t
    if period_s > 0:
        # Idle time before the period: step 6 for a fractional number of empty
        # periods, capped at the deviation of an entity never seen.
        for u in range(n_uniq):
            r = uniq[u]
            last = last_s[r]
            t = t_first[u]
            if math.isnan(last) or t <= last:
                continue
            periods = (t - last) / period_s
            s = sigma[r]
            p2 = phi[r] * phi[r] + periods * (s * s)
            phi[r] = min(math.sqrt(p2), phi0)
    for e in range(lo, hi):
        ma, pa = _side(first, e, n1[e], mu, phi, mu0, phi0)
        mb, pb = _side(second, e, n2[e], mu, phi, mu0, phi0)
        p_out[e] = _p_win(ma + h, pa, mb, pb)
        s = score[e]
        for side in range(2):
            # The expectation is the side's, as in the prediction: every member
            # shares the result of the team (one entity a side: the published step 3).
            # The first side plays as if ``h`` higher: its members face mu_b - h,
            # the second side's members face mu_a + h.
            if side == 0:
                gj = g(pb)
                ex = logistic(gj * (ma + h - mb))
                y, loc, n = s, loc1, n1[e]
                surprise += s - ex
            else:
                gj = g(pa)
                ex = logistic(gj * (mb - (ma + h)))
                y, loc, n = 1.0 - s, loc2, n2[e]
            for j in range(n):
                u = loc[e, j]
                inv_v[u] += gj * gj * ex * (1.0 - ex)
                total[u] += gj * (y - ex)
    for u in range(n_uniq):
        r = uniq[u]
        mu[r], phi[r], sigma[r] = finish(mu[r], phi[r], sigma[r], inv_v[u], total[u], tau, tol)
        t = t_last[u]
        if not math.isnan(t) and (math.isnan(last_s[r]) or t > last_s[r]):
            last_s[r] = t
    adv[0] = h + prm[5] * surprise


@register_jitable
def places(first, n1, second, n2, lo, hi, mark, uniq, loc1, loc2):  # fmt: skip
    """Number the distinct rows of events ``lo..hi`` into ``uniq`` (first seen, first)
    and write each member's number into ``loc1``/``loc2``; returns how many.

    ``mark`` (one slot per entity row, all -1) remembers the numbers while this
    runs and is cleared again before it returns.
    """
    m = 0
    for e in range(lo, hi):
        for side in range(2):
            rows = first if side == 0 else second
            loc = loc1 if side == 0 else loc2
            for j in range(n1[e] if side == 0 else n2[e]):
                r = rows[e, j]
                u = mark[r]
                if u < 0:
                    u = m
                    mark[r] = m
                    uniq[m] = r
                    m += 1
                loc[e, j] = u
    for u in range(m):
        mark[uniq[u]] = -1
    return m


@register_jitable
def count(first, n1, second, n2, counts):  # fmt: skip
    """One more match learned from for every member of every event."""
    for e in range(first.shape[0]):
        for j in range(n1[e]):
            counts[first[e, j]] += 1
        for j in range(n2[e]):
            counts[second[e, j]] += 1


def learn_seq(
    first, n1, second, n2, score, time_s, mu, phi, sigma, last_s, counts, mark, prm, adv,
    p_out,
):  # fmt: skip
    """Each event its own rating period, in order; P(first wins) before each into ``p_out``."""
    n, k1, k2 = first.shape[0], first.shape[1], second.shape[1]
    loc1 = np.zeros((n, k1), dtype=np.int64)
    loc2 = np.zeros((n, k2), dtype=np.int64)
    uniq = np.zeros(k1 + k2, dtype=np.int64)
    acc = np.zeros((4, k1 + k2))
    for e in range(n):
        m = places(first, n1, second, n2, e, e + 1, mark, uniq, loc1, loc2)
        _period(e, e + 1, first, n1, second, n2, score, time_s, loc1, loc2, uniq, m, mu,
                phi, sigma, last_s, prm, adv, p_out, acc[0], acc[1], acc[2], acc[3])  # fmt: skip
    count(first, n1, second, n2, counts)


def learn_period(
    first, n1, second, n2, score, time_s, mu, phi, sigma, last_s, counts, mark, prm, adv,
    p_out,
):  # fmt: skip
    """All events as one rating period (predictions from the period-start state)."""
    n, k1, k2 = first.shape[0], first.shape[1], second.shape[1]
    loc1 = np.zeros((n, k1), dtype=np.int64)
    loc2 = np.zeros((n, k2), dtype=np.int64)
    uniq = np.zeros(n * (k1 + k2), dtype=np.int64)
    m = places(first, n1, second, n2, 0, n, mark, uniq, loc1, loc2)
    acc = np.zeros((4, max(m, 1)))
    _period(0, n, first, n1, second, n2, score, time_s, loc1, loc2, uniq, m,
            mu, phi, sigma, last_s, prm, adv, p_out, acc[0], acc[1], acc[2], acc[3])  # fmt: skip
    count(first, n1, second, n2, counts)


def predict(first, n1, second, n2, mu, phi, prm, adv, p_out):
    """P(first wins) of every row from the current state; changes nothing."""
    h = adv[0]
    for e in range(first.shape[0]):
        ma, pa = _side(first, e, n1[e], mu, phi, prm[0], prm[1])
        mb, pb = _side(second, e, n2[e], mu, phi, prm[0], prm[1])
        p_out[e] = _p_win(ma + h, pa, mb, pb)


learn_seq_compiled = njit(cache=True)(learn_seq)
learn_period_compiled = njit(cache=True)(learn_period)
predict_compiled = njit(cache=True)(predict)
