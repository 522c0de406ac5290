"""One 1v1 pairing of a matchup model, straight from the entity rows (compiled).

The same arithmetic, in the same order, as the compiled prediction loop of
:mod:`streamrate.models._kernels` restricted to one member per side and no
entity features (the logit, its clip, the probit widening by the strengths'
and vectors' variances, Davidson's draws), so the answer equals ``MatchupModel.predict`` to
round-off. Allocation-free and with few arguments: calling it costs well under
a microsecond more than the arithmetic.

``cfg`` is ``[dims, so, form, tanh, draws, stacked, gated, n_feat, uncertainty,
vector_uncertainty]`` as the model's ``_cfg()``; ``hyp`` ``[forget_per_day,
advantage, prior_var, noise_per_day, vector_prior_var, vector_noise_per_day]``
(both fixed for a model object); ``now`` the model's clock;
``r1``/``r2`` the rows (``-1`` for an entity never seen); ``ci``/``cv`` the
hashed context slots and values (``-1`` slots skipped).
"""

from __future__ import annotations

import math

import numpy as np

from streamrate.models._jit import leaf

THETA_CLIP = 30.0  # as the model's kernels


@leaf
def _v_eff(r, col, now, acc, last_t, prior_var, noise):
    if r < 0:
        return prior_var
    v = np.float64(acc[r, col])
    if last_t.shape[0] > 0 and not math.isnan(now):
        lt = last_t[r]
        if not math.isnan(lt) and now > lt:
            v = min(v + noise * (now - lt) / 86400.0, max(v, prior_var))
    return v


@leaf
def _member(r, t, now, forget, own, last_t):
    """Own offset ``t`` of row ``r`` after forgetting (0 for a newcomer)."""
    if r < 0:
        return 0.0
    dec = 1.0
    if forget > 0.0 and last_t.shape[0] > 0:
        lt = last_t[r]
        if not math.isnan(lt) and now > lt:
            dec = math.exp(-forget * (now - lt) / 86400.0)
    return own[r, t] * dec


@leaf
def _prior(t, W, ci, cv, nfeat, tanh_on):
    """The stacked context's prior of parameter ``t`` (the same for every member)."""
    s = 0.0
    for c in range(ci.shape[0]):
        if ci[c] >= 0:
            s += W[t, nfeat + ci[c]] * cv[c]
    return math.tanh(s) if tanh_on else s


@leaf
def one_pairing(own, acc, last_t, r1, r2, W, G, H, sc, ci, cv, cfg, hyp, now):
    """(p_win, p_draw) of first row ``r1`` against second row ``r2``."""
    d, so, form, tanh_on, draws = cfg[0], cfg[1], cfg[2], cfg[3], cfg[4]
    stacked, gated, nfeat, unc, vunc = cfg[5], cfg[6], cfg[7], cfg[8], cfg[9]
    forget, adv_on = hyp[0], hyp[1]
    prior = W.shape[0] > 0 and stacked and ci.shape[0] > 0
    adv = sc[0] if adv_on > 0.0 else 0.0
    for c in range(ci.shape[0]):
        k = ci[c]
        if k >= 0 and adv_on > 0.0:
            adv += H[0, k] * cv[c]
    theta = adv
    qaA, qcA, qaB, qcB = 0.0, 0.0, 0.0, 0.0  # squared logit gradients in the vectors
    g22, g4a, g4c = 0.0, 0.0, 0.0  # gate sums of the second-order terms
    if so:
        # a stacked prior over no context columns adds 0.0, which changes no bits
        pa = _prior(0, W, ci, cv, nfeat, tanh_on) if prior else 0.0
        a0 = _member(r1, 0, now, forget, own, last_t) + pa
        b0 = _member(r2, 0, now, forget, own, last_t) + pa
        theta += a0 - b0
    for j in range(d):
        ga = 1.0
        gc = 1.0
        if gated:
            for c in range(ci.shape[0]):
                k = ci[c]
                if k >= 0:
                    ga += G[j, k] * cv[c]
                    gc += G[d + j, k] * cv[c]
        ta, tc = so + j, so + d + j
        pa = _prior(ta, W, ci, cv, nfeat, tanh_on) if prior else 0.0
        pc = _prior(tc, W, ci, cv, nfeat, tanh_on) if prior else 0.0
        aA = (_member(r1, ta, now, forget, own, last_t) + pa) * ga
        cA = (_member(r1, tc, now, forget, own, last_t) + pc) * gc
        aB = (_member(r2, ta, now, forget, own, last_t) + pa) * ga
        cB = (_member(r2, tc, now, forget, own, last_t) + pc) * gc
        if form == 0:
            theta += aA * cB - aB * cA
            jaA, jcA, jaB, jcB = cB * ga, -aB * gc, -cA * ga, aA * gc
        else:
            theta += (aB - cA) ** 2 - (aA - cB) ** 2
            jaA, jcA = -2.0 * (aA - cB) * ga, -2.0 * (aB - cA) * gc
            jaB, jcB = 2.0 * (aB - cA) * ga, 2.0 * (aA - cB) * gc
        qaA += jaA * jaA
        qcA += jcA * jcA
        qaB += jaB * jaB
        qcB += jcB * jcB
        g22 += ga * ga * gc * gc
        g4a += ga * ga * ga * ga
        g4c += gc * gc * gc * gc
    theta = min(max(theta, -THETA_CLIP), THETA_CLIP)
    if unc or vunc:
        V = 0.0
        if unc:
            V += _v_eff(r1, 0, now, acc, last_t, hyp[2], hyp[3])
            V += _v_eff(r2, 0, now, acc, last_t, hyp[2], hyp[3])
        if vunc:
            SaA = _v_eff(r1, so, now, acc, last_t, hyp[4], hyp[5])
            ScA = _v_eff(r1, so + d, now, acc, last_t, hyp[4], hyp[5])
            SaB = _v_eff(r2, so, now, acc, last_t, hyp[4], hyp[5])
            ScB = _v_eff(r2, so + d, now, acc, last_t, hyp[4], hyp[5])
            V += SaA * qaA + ScA * qcA
            V += SaB * qaB + ScB * qcB
            if form == 0:
                V += g22 * (SaA * ScB + SaB * ScA)
            else:
                u = SaB * SaB * g4a + 2.0 * SaB * ScA * g22 + ScA * ScA * g4c
                u += SaA * SaA * g4a + 2.0 * SaA * ScB * g22 + ScB * ScB * g4c
                V += 2.0 * u
        theta = 1.0 / math.sqrt(1.0 + math.pi * V / 8.0) * theta
    if draws:
        u = 0.5 * theta
        au = abs(u)
        ew = math.exp(u - au)
        el = math.exp(-u - au)
        en = math.exp(sc[1] - au)
        tot = ew + el + en
        return ew / tot, en / tot
    if theta >= 0:
        return 1.0 / (1.0 + math.exp(-theta)), 0.0
    z = math.exp(theta)
    return z / (1.0 + z), 0.0
