"""Compiled loop specialised for the common case: 1v1, known entities, no entity
features, context used by the first-side advantage only.

It performs the same arithmetic in the same order as :func:`._kernels.learn_seq`
(tests hold them equal) with far less bookkeeping per event.
"""

from __future__ import annotations

import math

import numpy as np

from streamrate.models._jit import kernel, leaf
from streamrate.models._kernels import THETA_CLIP, _apply_cols


@leaf
def _solo_loop(
    first, second, score, ctx_idx, ctx_val, time_s, own, acc, last_t, H, AH, sc, asc,
    cfg, hyp, p_out, od, g, gH, gsc, markC, listC,
):  # fmt: skip
    d, so, form, draws = cfg[0], cfg[1], cfg[2], cfg[4]
    D = so + 2 * d
    lr, l2, forget, lr_s = hyp[0], hyp[2], hyp[4], hyp[7]
    adv_on = hyp[6] > 0.0
    for e in range(first.shape[0]):
        now = time_s[e]
        if math.isnan(now):
            now = hyp[5]
        for side in range(2):
            r = first[e, 0] if side == 0 else second[e, 0]
            dec = 1.0
            if forget > 0.0 and last_t.shape[0] > 0:
                lt = last_t[r]
                if not math.isnan(lt) and now > lt:
                    dec = math.exp(-forget * (now - lt) / 86400.0)
            for t in range(D):
                od[side, t] = own[r, t] * dec
        adv = sc[0] if adv_on else 0.0
        nC = 0
        if adv_on:
            for c in range(ctx_idx.shape[1]):
                ci = ctx_idx[e, c]
                if ci >= 0:
                    adv += H[0, ci] * ctx_val[e, c]
        theta = adv
        if so:
            theta += od[0, 0] - od[1, 0]
        for j in range(d):
            aA, cA = od[0, so + j], od[0, so + d + j]
            aB, cB = od[1, so + j], od[1, so + d + j]
            if form == 0:
                theta += aA * cB - aB * cA
            else:
                theta += (aB - cA) ** 2 - (aA - cB) ** 2
        theta = min(max(theta, -THETA_CLIP), THETA_CLIP)
        if draws:
            u = 0.5 * theta
            au = abs(u)
            ew = math.exp(u - au)
            el = math.exp(-u - au)
            en = math.exp(sc[1] - au)
            tot = ew + el + en
            pw, pd, pl = ew / tot, en / tot, el / tot
        else:
            if theta >= 0:
                pw = 1.0 / (1.0 + math.exp(-theta))
            else:
                z = math.exp(theta)
                pw = z / (1.0 + z)
            pd, pl = 0.0, 1.0 - pw
        p_out[e, 0] = pw
        p_out[e, 1] = pd
        y = score[e]
        if draws:
            gth = 0.5 * ((pw - pl) - (2.0 * y - 1.0))
            gsc[1] += pd - (1.0 if y == 0.5 else 0.0)
        else:
            gth = pw - y
        if adv_on:
            gsc[0] += gth
            for c in range(ctx_idx.shape[1]):
                ci = ctx_idx[e, c]
                if ci >= 0:
                    if markC[ci] == 0:
                        markC[ci] = 1
                        listC[nC] = ci
                        nC += 1
                    gH[0, ci] += gth * ctx_val[e, c]
        if so:
            g[0, 0] = gth + l2 * od[0, 0]
            g[1, 0] = -gth + l2 * od[1, 0]
        if form == 0:
            for j in range(d):
                ia, ic = so + j, so + d + j
                g[0, ia] = gth * od[1, ic] + l2 * od[0, ia]
                g[1, ic] = gth * od[0, ia] + l2 * od[1, ic]
                g[1, ia] = -gth * od[0, ic] + l2 * od[1, ia]
                g[0, ic] = -gth * od[1, ia] + l2 * od[0, ic]
        else:
            for j in range(d):
                ia, ic = so + j, so + d + j
                d1 = od[1, ia] - od[0, ic]
                d2 = od[0, ia] - od[1, ic]
                g[1, ia] = 2.0 * gth * d1 + l2 * od[1, ia]
                g[0, ic] = -2.0 * gth * d1 + l2 * od[0, ic]
                g[0, ia] = -2.0 * gth * d2 + l2 * od[0, ia]
                g[1, ic] = 2.0 * gth * d2 + l2 * od[1, ic]
        for side in range(2):
            r = first[e, 0] if side == 0 else second[e, 0]
            if so:
                gt = g[side, 0]
                acc[r, 0] = acc[r, 0] + gt * gt
                own[r, 0] = od[side, 0] - lr_s * gt / math.sqrt(np.float64(acc[r, 0]))
            # branch-free, so the compiler can vectorise it
            for t in range(so, D):
                gt = g[side, t]
                acc[r, t] = acc[r, t] + gt * gt
                own[r, t] = od[side, t] - lr * gt / math.sqrt(np.float64(acc[r, t]))
            if last_t.shape[0] > 0 and not math.isnan(time_s[e]):
                last_t[r] = time_s[e]
        if adv_on:
            _apply_cols(H, AH, gH, listC, nC, lr_s, hyp[3])
            for k in range(nC):
                markC[listC[k]] = 0
        for i in range(2):
            if gsc[i] != 0.0:
                asc[i] += gsc[i] * gsc[i]
                sc[i] -= lr_s * gsc[i] / math.sqrt(asc[i])
                gsc[i] = 0.0
        now = time_s[e]
        if not math.isnan(now) and (math.isnan(hyp[5]) or now > hyp[5]):
            hyp[5] = now


@kernel
def learn_solo(
    first, second, score, ctx_idx, ctx_val, time_s, own, acc, last_t, H, AH, sc, asc,
    cfg, hyp, p_out,
):  # fmt: skip
    """``learn_seq`` for the common case, specialised: 1v1, known entities, no entity
    features, context used by the advantage only. Same numbers, in the same order."""
    D = own.shape[1]
    nC = max(H.shape[1], 1)
    _solo_loop(
        first, second, score, ctx_idx, ctx_val, time_s, own, acc, last_t, H, AH, sc, asc,
        cfg, hyp, p_out, np.zeros((2, D)), np.zeros((2, D)), np.zeros(H.shape), np.zeros(2),
        np.zeros(nC, dtype=np.int8), np.zeros(nC, dtype=np.int32),
    )  # fmt: skip
