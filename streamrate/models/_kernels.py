"""Compiled (numba) loops of the matchup model; the math is in :mod:`.matchup`.

Every function here has a twin of the same name and signature in
:mod:`._kernels_numpy` that gives the same numbers to round-off; tests compare them.

Layout shared by both (``D = so + 2 * dims``): ``own[r]`` holds the entity's own
offsets ``[strength (if so == 1), blade (dims), chest (dims)]`` in float32 and
``acc[r]`` their AdaGrad sums of squared gradients. ``W`` (D, n_feat + n_stack)
maps entity features (and the context when stacked) into a prior added to the
own offsets; ``G`` (2 * dims, C) makes the context gate ``1 + G z``; ``H`` (1, C)
is the context part of the first-side advantage; ``sc = [h0, eta]`` holds the
always-on advantage and the log draw weight. ``cfg`` packs the integer settings:
``[dims, so, form (0 inner / 1 distance), tanh, draws, stacked, gated, n_feat,
uncertainty, vector_uncertainty]`` and ``hyp`` the float ones: ``[lr, lr_shared,
l2, l2_shared, forget_per_day, clock_s, advantage, lr_strength, prior_var,
noise_per_day, vector_prior_var, vector_noise_per_day]``. With uncertainty on,
``acc[r, 0]`` holds the strength's variance; with vector uncertainty on,
``acc[r, so]`` the blade's and ``acc[r, so + dims]`` the chest's (the other
blade/chest columns of ``acc`` are then unused). Strengths, the advantage (``H``, ``h0``) and
the draw weight step at ``lr_strength``; blade/chest at ``lr``; ``W``, ``G`` at
``lr_shared``.
"""

from __future__ import annotations

import math

import numpy as np

from streamrate.models._jit import kernel, leaf

THETA_CLIP = 30.0
"""Logits are clipped to +-30 so that probabilities stay strictly inside (0, 1)."""


@leaf
def _gather(
    e, rows, n, off, feat_idx, feat_val, own, last_t, fs_idx, fs_val, W, ctx_idx, ctx_val,
    cfg, hyp, now, od, base, q, cols, vals, ncols, V,
):  # fmt: skip
    d, so, tanh_on, stacked, nfeat = cfg[0], cfg[1], cfg[3], cfg[5], cfg[7]
    D = so + 2 * d
    forget = hyp[4]
    has_prior = W.shape[0] > 0
    has_ef = feat_idx.shape[0] > 0 and feat_idx.shape[2] > 0
    inv = 1.0 / n
    for t in range(D):
        V[t] = 0.0
    for j in range(n):
        m = off + j
        r = rows[e, j]
        if r >= 0:
            dec = 1.0
            if forget > 0.0 and last_t.shape[0] > 0:
                lt = last_t[r]
                if not math.isnan(lt) and now > lt:
                    dec = math.exp(-forget * (now - lt) / 86400.0)
            for t in range(D):
                od[m, t] = own[r, t] * dec
        else:
            for t in range(D):
                od[m, t] = 0.0
        nc = 0
        if has_prior:
            if nfeat > 0:
                if has_ef and feat_idx[e, m, 0] >= 0:
                    for f in range(feat_idx.shape[2]):
                        fi = feat_idx[e, m, f]
                        if fi < 0:
                            break
                        cols[m, nc] = fi
                        vals[m, nc] = feat_val[e, m, f]
                        nc += 1
                elif r >= 0:
                    for f in range(fs_idx.shape[1]):
                        fi = fs_idx[r, f]
                        if fi < 0:
                            break
                        cols[m, nc] = fi
                        vals[m, nc] = fs_val[r, f]
                        nc += 1
            if stacked:
                for c in range(ctx_idx.shape[1]):
                    ci = ctx_idx[e, c]
                    if ci < 0:
                        continue
                    cols[m, nc] = nfeat + ci
                    vals[m, nc] = ctx_val[e, c]
                    nc += 1
        ncols[m] = nc
        for t in range(D):
            s = 0.0
            for u in range(nc):
                s += W[t, cols[m, u]] * vals[m, u]
            q[m, t] = s
            p = math.tanh(s) if tanh_on else s
            base[m, t] = od[m, t] + p
            V[t] += base[m, t] * inv


@leaf
def _event(
    e, first, second, n1, n2, ctx_idx, ctx_val, time_s, feat_idx, feat_val,
    own, last_t, fs_idx, fs_val, W, G, H, sc, cfg, hyp,
    od, base, q, cols, vals, ncols, VA, VB, EA, EB, gate, out,
):  # fmt: skip
    """Probabilities of event ``e``; fills the scratch buffers used by ``_grads``."""
    d, so, form, draws, gated = cfg[0], cfg[1], cfg[2], cfg[4], cfg[6]
    D = so + 2 * d
    now = time_s[e]
    if math.isnan(now):
        now = hyp[5]
    k1 = first.shape[1]
    _gather(e, first, n1[e], 0, feat_idx, feat_val, own, last_t, fs_idx, fs_val, W,
            ctx_idx, ctx_val, cfg, hyp, now, od, base, q, cols, vals, ncols, VA)  # fmt: skip
    _gather(e, second, n2[e], k1, feat_idx, feat_val, own, last_t, fs_idx, fs_val, W,
            ctx_idx, ctx_val, cfg, hyp, now, od, base, q, cols, vals, ncols, VB)  # fmt: skip
    for j in range(2 * d):
        gate[j] = 1.0
    adv = sc[0] if hyp[6] > 0.0 else 0.0
    for c in range(ctx_idx.shape[1]):
        ci = ctx_idx[e, c]
        if ci < 0:
            continue
        v = ctx_val[e, c]
        if hyp[6] > 0.0:
            adv += H[0, ci] * v
        if gated:
            for j in range(2 * d):
                gate[j] += G[j, ci] * v
    for t in range(so):
        EA[t] = VA[t]
        EB[t] = VB[t]
    for t in range(so, D):
        EA[t] = VA[t] * gate[t - so]
        EB[t] = VB[t] * gate[t - so]
    theta = adv
    if so:
        theta += EA[0] - EB[0]
    for j in range(d):
        aA, cA = EA[so + j], EA[so + d + j]
        aB, cB = EB[so + j], EB[so + d + j]
        if form == 0:
            theta += aA * cB - aB * cA
        else:
            theta += (aB - cA) ** 2 - (aA - cB) ** 2
    theta = min(max(theta, -THETA_CLIP), THETA_CLIP)
    out[3], out[4], out[5] = theta, 1.0, 0.0  # logit, widening factor, its variance
    _probs(theta, sc[1], draws, out)


@leaf
def _probs(theta, eta, draws, out):
    """(p_win, p_draw, p_loss) of logit ``theta`` into ``out[0:3]``."""
    if draws:
        u = 0.5 * theta
        au = abs(u)
        ew = math.exp(u - au)
        el = math.exp(-u - au)
        en = math.exp(eta - au)
        tot = ew + el + en
        out[0], out[1], out[2] = ew / tot, en / tot, el / tot
    else:
        if theta >= 0:
            pw = 1.0 / (1.0 + math.exp(-theta))
        else:
            z = math.exp(theta)
            pw = z / (1.0 + z)
        out[0], out[1], out[2] = pw, 0.0, 1.0 - pw


@leaf
def _grads(
    e, first, second, n1, n2, ctx_idx, ctx_val, score, cfg, hyp,
    od, base, q, cols, vals, ncols, VA, VB, EA, EB, gate, out,
    dEA, dEB, gg, gm, gW, gG, gH, gsc, markW, listW, nW, markC, listC, nC,
):  # fmt: skip
    """Gradients of event ``e``'s negative log likelihood (after ``_event``).

    Member gradients go to ``gm`` (overwritten, L2 included); shared gradients are
    added to ``gW``/``gG``/``gH``/``gsc`` and their columns marked as touched.
    Returns the updated touched counts (nW, nC).
    """
    d, so, form, tanh_on, draws, _stacked, gated = (
        cfg[0],
        cfg[1],
        cfg[2],
        cfg[3],
        cfg[4],
        cfg[5],
        cfg[6],
    )
    D = so + 2 * d
    y = score[e]
    pw, pd, pl = out[0], out[1], out[2]
    if draws:
        gth = 0.5 * ((pw - pl) - (2.0 * y - 1.0))
        gsc[1] += pd - (1.0 if y == 0.5 else 0.0)
    else:
        gth = pw - y
    gth *= out[4]  # d(widened logit)/d(logit); 1 without uncertainty
    if hyp[6] > 0.0:
        gsc[0] += gth
    for t in range(D):
        dEA[t] = 0.0
        dEB[t] = 0.0
    if so:
        dEA[0] = gth
        dEB[0] = -gth
    for j in range(d):
        ia, ic = so + j, so + d + j
        if form == 0:
            dEA[ia] = gth * EB[ic]
            dEB[ic] = gth * EA[ia]
            dEB[ia] = -gth * EA[ic]
            dEA[ic] = -gth * EB[ia]
        else:
            d1 = EB[ia] - EA[ic]
            d2 = EA[ia] - EB[ic]
            dEB[ia] = 2.0 * gth * d1
            dEA[ic] = -2.0 * gth * d1
            dEA[ia] = -2.0 * gth * d2
            dEB[ic] = 2.0 * gth * d2
    for t in range(so, D):
        gg[t - so] = dEA[t] * VA[t] + dEB[t] * VB[t]
        dEA[t] *= gate[t - so]
        dEB[t] *= gate[t - so]
    for c in range(ctx_idx.shape[1]):
        ci = ctx_idx[e, c]
        if ci < 0:
            continue
        v = ctx_val[e, c]
        if (hyp[6] > 0.0 or gated) and markC[ci] == 0:
            markC[ci] = 1
            listC[nC] = ci
            nC += 1
        if hyp[6] > 0.0:
            gH[0, ci] += gth * v
        if gated:
            for j in range(2 * d):
                gG[j, ci] += gg[j] * v
    l2 = hyp[2]
    k1 = first.shape[1]
    for side in range(2):
        n = n1[e] if side == 0 else n2[e]
        off = 0 if side == 0 else k1
        rows = first if side == 0 else second
        inv = 1.0 / n
        for j in range(n):
            m = off + j
            known = rows[e, j] >= 0
            for t in range(D):
                db = (dEA[t] if side == 0 else dEB[t]) * inv
                gm[m, t] = db + l2 * od[m, t] if known else db
                if ncols[m] > 0:
                    dq = db
                    if tanh_on:
                        th = math.tanh(q[m, t])
                        dq = db * (1.0 - th * th)
                    for u in range(ncols[m]):
                        col = cols[m, u]
                        gW[t, col] += dq * vals[m, u]
            for u in range(ncols[m]):
                col = cols[m, u]
                if markW[col] == 0:
                    markW[col] = 1
                    listW[nW] = col
                    nW += 1
    return nW, nC


@leaf
def _apply_cols(P, A, g, lst, n, lr, l2):
    """AdaGrad step on the touched columns of a shared matrix; clears their gradients."""
    for k in range(n):
        col = lst[k]
        for t in range(P.shape[0]):
            gt = g[t, col] + l2 * P[t, col]
            A[t, col] += gt * gt
            P[t, col] -= lr * gt / math.sqrt(A[t, col])
            g[t, col] = 0.0


@leaf
def _apply_shared(W, AW, G, AG, H, AH, sc, asc, gW, gG, gH, gsc, markW, listW, nW,
                  markC, listC, nC, cfg, hyp):  # fmt: skip
    lr_s, l2_s = hyp[1], hyp[3]
    if W.shape[0] > 0:
        _apply_cols(W, AW, gW, listW, nW, lr_s, l2_s)
    if cfg[6]:
        _apply_cols(G, AG, gG, listC, nC, lr_s, l2_s)
    if hyp[6] > 0.0:
        _apply_cols(H, AH, gH, listC, nC, hyp[7], l2_s)
    for k in range(nW):
        markW[listW[k]] = 0
    for k in range(nC):
        markC[listC[k]] = 0
    for i in range(2):
        if gsc[i] != 0.0:
            asc[i] += gsc[i] * gsc[i]
            sc[i] -= hyp[7] * gsc[i] / math.sqrt(asc[i])
            gsc[i] = 0.0


@leaf
def _store_member(r, now, od, g, own, acc, last_t, lr, lr_s, so, upto):
    """AdaGrad step of columns ``0..upto`` of one entity's own offsets from ``od``
    (decayed) by gradient ``g``; columns from ``upto`` on are copied from ``od``.

    The strength (column 0 when ``so == 1``) has its own step size ``lr_s``.
    """
    for t in range(upto, own.shape[1]):
        own[r, t] = od[t]
    for t in range(upto):
        acc[r, t] = acc[r, t] + g[t] * g[t]
        step = lr_s if t < so else lr
        # float64 square root of the stored float32 sum (math.sqrt of a float32 is float32)
        own[r, t] = od[t] - step * g[t] / math.sqrt(np.float64(acc[r, t]))
    if last_t.shape[0] > 0 and not math.isnan(now):
        last_t[r] = now


@leaf
def _store_features(r, e, m, fs_idx, fs_val, feat_idx, feat_val):
    """Keep the features given for member slot ``m`` of event ``e`` as entity ``r``'s."""
    if fs_idx.shape[0] == 0 or feat_idx.shape[0] == 0 or feat_idx.shape[2] == 0:
        return
    if feat_idx[e, m, 0] < 0:
        return
    for f in range(fs_idx.shape[1]):
        if f < feat_idx.shape[2] and feat_idx[e, m, f] >= 0:
            fs_idx[r, f] = feat_idx[e, m, f]
            fs_val[r, f] = feat_val[e, m, f]
        else:
            fs_idx[r, f] = -1
            fs_val[r, f] = 0.0


@leaf
def _v_eff(r, col, now, acc, last_t, prior, noise):
    """Variance kept in ``acc[r, col]`` at time ``now``: stored, plus noise for idle days.

    An unknown row has the prior variance ``prior``; growth is ``noise`` per idle
    day, capped at the prior (or at the stored value if that is larger).
    """
    if r < 0:
        return prior
    v = np.float64(acc[r, col])
    if last_t.shape[0] > 0 and not math.isnan(now):
        lt = last_t[r]
        if not math.isnan(lt) and now > lt:
            v = min(v + noise * (now - lt) / 86400.0, max(v, prior))
    return v


@leaf
def _jac_norms(EA, EB, gate, cfg, out):
    """Squared norms of the logit's gradient in each side's mean blade and chest.

    ``out[6:10]`` = (blade A, chest A, blade B, chest B), gradients taken through
    the gate (with respect to the sides' ungated means); ``out[10:13]`` = the gate
    sums ``sum ga^2 gc^2``, ``sum ga^4``, ``sum gc^4`` of the second-order terms.
    """
    d, so, form = cfg[0], cfg[1], cfg[2]
    qaA, qcA, qaB, qcB = 0.0, 0.0, 0.0, 0.0
    g22, g4a, g4c = 0.0, 0.0, 0.0
    for j in range(d):
        ia, ic = so + j, so + d + j
        ga, gc = gate[j], gate[d + j]
        if form == 0:
            jaA, jcA = EB[ic] * ga, -EB[ia] * gc
            jaB, jcB = -EA[ic] * ga, EA[ia] * gc
        else:
            d1 = EB[ia] - EA[ic]
            d2 = EA[ia] - EB[ic]
            jaA, jcA = -2.0 * d2 * ga, -2.0 * d1 * gc
            jaB, jcB = 2.0 * d1 * ga, 2.0 * d2 * gc
        qaA += jaA * jaA
        qcA += jcA * jcA
        qaB += jaB * jaB
        qcB += jcB * jcB
        g22 += ga * ga * gc * gc
        g4a += ga * ga * ga * ga
        g4c += gc * gc * gc * gc
    out[6], out[7], out[8], out[9] = qaA, qcA, qaB, qcB
    out[10], out[11], out[12] = g22, g4a, g4c


@leaf
def _second_order(SaA, ScA, SaB, ScB, form, out):
    """Variance of the logit's bilinear (inner) or quadratic (distance) part beyond
    its linearisation, for sides whose mean blade and chest have per-dimension
    variances ``Sa*``/``Sc*`` (independent Gaussians; gate sums from ``out``)."""
    g22, g4a, g4c = out[10], out[11], out[12]
    if form == 0:
        return g22 * (SaA * ScB + SaB * ScA)
    u = SaB * SaB * g4a + 2.0 * SaB * ScA * g22 + ScA * ScA * g4c
    u += SaA * SaA * g4a + 2.0 * SaA * ScB * g22 + ScB * ScB * g4c
    return 2.0 * u


@leaf
def _widen(e, first, second, n1, n2, time_s, acc, last_t, sc, cfg, hyp, out, EA, EB, gate):
    """Integrate the logit ``out[3]`` over the entities' uncertainty (probit approximation).

    ``V`` sums each member's strength variance times ``x_j^2`` (``cfg[8]``) and its
    blade and chest variances times the squared gradient norms (``cfg[9]``).
    """
    d, so = cfg[0], cfg[1]
    now = time_s[e]
    if math.isnan(now):
        now = hyp[5]
    if cfg[9]:
        _jac_norms(EA, EB, gate, cfg, out)
    V = 0.0
    SaA, ScA, SaB, ScB = 0.0, 0.0, 0.0, 0.0
    for side in range(2):
        rows = first if side == 0 else second
        n = n1[e] if side == 0 else n2[e]
        inv = 1.0 / n
        qa, qc = out[6 + 2 * side], out[7 + 2 * side]
        for j in range(n):
            r = rows[e, j]
            if cfg[8]:
                V += _v_eff(r, 0, now, acc, last_t, hyp[8], hyp[9]) * inv * inv
            if cfg[9]:
                va = _v_eff(r, so, now, acc, last_t, hyp[10], hyp[11]) * inv * inv
                vc = _v_eff(r, so + d, now, acc, last_t, hyp[10], hyp[11]) * inv * inv
                V += va * qa + vc * qc
                if side == 0:
                    SaA += va
                    ScA += vc
                else:
                    SaB += va
                    ScB += vc
    if cfg[9]:
        V += _second_order(SaA, ScA, SaB, ScB, cfg[2], out)
    k = 1.0 / math.sqrt(1.0 + math.pi * V / 8.0)
    out[4], out[5] = k, V
    _probs(k * out[3], sc[1], cfg[4], out)


@leaf
def _curv(out, draws):
    """Curvature of the event's negative log likelihood in the (unwidened) logit."""
    c = 0.25 * (out[0] + out[2] - (out[0] - out[2]) ** 2) if draws else out[0] * out[2]
    return out[4] * out[4] * c


@leaf
def _u_terms(inv, v, h, V):
    """(gradient scale, information) of a member with variance ``v`` and weight ``inv``."""
    den = 1.0 + h * (V - v * inv * inv)
    return 1.0 / den, h * inv * inv / den


@leaf
def _u_store(r, now, mu0, v, gsum, info, own, acc, last_t):
    """Gaussian update of row ``r``'s strength: ``v' = v / (1 + v info)``, mean ``-v' gsum``."""
    vn = v / (1.0 + v * info)
    own[r, 0] = mu0 - vn * gsum
    acc[r, 0] = vn
    if last_t.shape[0] > 0 and not math.isnan(now):
        last_t[r] = now


@leaf
def _vec_terms(inv, v, q, h, V):
    """(gradient scale, information along the gradient) of one member's vector group
    with variance ``v`` whose logit gradient has squared norm ``q`` per unit weight."""
    qm = q * inv * inv
    den = 1.0 + h * (V - v * qm)
    return 1.0 / den, h * qm / den


@leaf
def _vec_store(r, row, g, gscale, v, info, lo, d, own, acc):
    """Gaussian update of one vector group (columns ``lo..lo + d``) of row ``r``.

    Mean: ``row - v / (1 + v info) * g * gscale`` (the exact step along the
    gradient); variance: ``v / (1 + v info / d)`` (the precision averaged over the
    group's ``d`` directions).
    """
    vm = v / (1.0 + v * info)
    for t in range(lo, lo + d):
        own[r, t] = row[t] - vm * (g[t] * gscale)
    acc[r, lo] = v / (1.0 + v * info / d)


# The public kernels below allocate scratch space and hand it to loops compiled
# with ``_nrt=False``: without that, every helper call in the per-event loop pays
# atomic reference counting on ~30 arrays, which costs more than the arithmetic.


@kernel
def _scratch(first, second, ctx_idx, feat_idx, fs_idx, W, G, H, cfg):
    d, so = cfg[0], cfg[1]
    D = so + 2 * d
    K = first.shape[1] + second.shape[1]
    ncolmax = max(feat_idx.shape[2] if feat_idx.shape[0] > 0 else 0, fs_idx.shape[1])
    ncolmax = max(ncolmax + ctx_idx.shape[1], 1)
    nWcol = max(W.shape[1], 1)
    nCcol = max(H.shape[1], G.shape[1], ctx_idx.shape[1], 1)
    return (
        np.zeros((K, D)),  # od
        np.zeros((K, D)),  # base
        np.zeros((K, D)),  # q
        np.zeros((K, D)),  # gm
        np.zeros((K, ncolmax), dtype=np.int32),  # cols
        np.zeros((K, ncolmax)),  # vals
        np.zeros(K, dtype=np.int32),  # ncols
        np.zeros((6, D)),  # VA, VB, EA, EB, dEA, dEB
        np.zeros((2, max(2 * d, 1))),  # gate, gg
        np.zeros(13),  # out: p_win, p_draw, p_loss, logit, widening, its variance, 7 sums
        np.zeros(W.shape),  # gW
        np.zeros(G.shape),  # gG
        np.zeros(H.shape),  # gH
        np.zeros(2),  # gsc
        np.zeros(nWcol, dtype=np.int8),  # markW
        np.zeros(nWcol, dtype=np.int32),  # listW
        np.zeros(nCcol, dtype=np.int8),  # markC
        np.zeros(nCcol, dtype=np.int32),  # listC
    )


@leaf
def _learn_seq_loop(
    first, second, n1, n2, score, ctx_idx, ctx_val, time_s, feat_idx, feat_val,
    own, acc, last_t, fs_idx, fs_val, W, AW, G, AG, H, AH, sc, asc, cfg, hyp, p_out,
    od, base, q, gm, cols, vals, ncols, V6, gate2, out, gW, gG, gH, gsc,
    markW, listW, markC, listC,
):  # fmt: skip
    d, so = cfg[0], cfg[1]
    VA, VB, EA, EB, dEA, dEB = V6[0], V6[1], V6[2], V6[3], V6[4], V6[5]
    gate, gg = gate2[0], gate2[1]
    lr = hyp[0]
    k1 = first.shape[1]
    upto = so if cfg[9] else own.shape[1]  # columns with AdaGrad steps
    for e in range(first.shape[0]):
        _event(e, first, second, n1, n2, ctx_idx, ctx_val, time_s, feat_idx, feat_val,
               own, last_t, fs_idx, fs_val, W, G, H, sc, cfg, hyp,
               od, base, q, cols, vals, ncols, VA, VB, EA, EB, gate, out)  # fmt: skip
        if cfg[8] or cfg[9]:
            _widen(e, first, second, n1, n2, time_s, acc, last_t, sc, cfg, hyp, out, EA, EB,
                   gate)  # fmt: skip
        p_out[e, 0] = out[0]
        p_out[e, 1] = out[1]
        nW, nC = _grads(e, first, second, n1, n2, ctx_idx, ctx_val, score, cfg, hyp,
                        od, base, q, cols, vals, ncols, VA, VB, EA, EB, gate, out,
                        dEA, dEB, gg, gm, gW, gG, gH, gsc, markW, listW, 0,
                        markC, listC, 0)  # fmt: skip
        now = time_s[e]
        nowr = hyp[5] if math.isnan(now) else now
        h = _curv(out, cfg[4])
        for side in range(2):
            rows = first if side == 0 else second
            n = n1[e] if side == 0 else n2[e]
            off = 0 if side == 0 else k1
            inv = 1.0 / n
            for j in range(n):
                r = rows[e, j]
                if r < 0:
                    continue
                v, va, vc = 0.0, 0.0, 0.0
                if cfg[8]:
                    v = _v_eff(r, 0, nowr, acc, last_t, hyp[8], hyp[9])
                if cfg[9]:
                    va = _v_eff(r, so, nowr, acc, last_t, hyp[10], hyp[11])
                    vc = _v_eff(r, so + d, nowr, acc, last_t, hyp[10], hyp[11])
                mu0, g0 = od[off + j, 0], gm[off + j, 0]
                _store_member(
                    r, now, od[off + j], gm[off + j], own, acc, last_t, lr, hyp[7], so, upto
                )
                if cfg[8]:
                    gs, info = _u_terms(inv, v, h, out[5])
                    _u_store(r, nowr, mu0, v, g0 * gs, info, own, acc, last_t)
                if cfg[9]:
                    gs, info = _vec_terms(inv, va, out[6 + 2 * side], h, out[5])
                    _vec_store(r, od[off + j], gm[off + j], gs, va, info, so, d, own, acc)
                    gs, info = _vec_terms(inv, vc, out[7 + 2 * side], h, out[5])
                    _vec_store(r, od[off + j], gm[off + j], gs, vc, info, so + d, d, own, acc)
                    if not math.isnan(nowr):
                        last_t[r] = nowr
                _store_features(r, e, off + j, fs_idx, fs_val, feat_idx, feat_val)
        _apply_shared(W, AW, G, AG, H, AH, sc, asc, gW, gG, gH, gsc, markW, listW, nW,
                      markC, listC, nC, cfg, hyp)  # fmt: skip
        if not math.isnan(now) and (math.isnan(hyp[5]) or now > hyp[5]):
            hyp[5] = now


@kernel
def learn_seq(
    first, second, n1, n2, score, ctx_idx, ctx_val, time_s, feat_idx, feat_val,
    own, acc, last_t, fs_idx, fs_val, W, AW, G, AG, H, AH, sc, asc, cfg, hyp, p_out,
):  # fmt: skip
    """Predict-then-learn over events in order; writes (p_win, p_draw) into ``p_out``."""
    sc_ = _scratch(first, second, ctx_idx, feat_idx, fs_idx, W, G, H, cfg)
    _learn_seq_loop(
        first, second, n1, n2, score, ctx_idx, ctx_val, time_s, feat_idx, feat_val,
        own, acc, last_t, fs_idx, fs_val, W, AW, G, AG, H, AH, sc, asc, cfg, hyp, p_out,
        sc_[0], sc_[1], sc_[2], sc_[3], sc_[4], sc_[5], sc_[6], sc_[7], sc_[8], sc_[9],
        sc_[10], sc_[11], sc_[12], sc_[13], sc_[14], sc_[15], sc_[16], sc_[17],
    )  # fmt: skip


@leaf
def _predict_loop(
    first, second, n1, n2, ctx_idx, ctx_val, time_s, feat_idx, feat_val,
    own, acc, last_t, fs_idx, fs_val, W, G, H, sc, cfg, hyp, p_out,
    od, base, q, cols, vals, ncols, V6, gate2, out,
):  # fmt: skip
    VA, VB, EA, EB = V6[0], V6[1], V6[2], V6[3]
    gate = gate2[0]
    for e in range(first.shape[0]):
        _event(e, first, second, n1, n2, ctx_idx, ctx_val, time_s, feat_idx, feat_val,
               own, last_t, fs_idx, fs_val, W, G, H, sc, cfg, hyp,
               od, base, q, cols, vals, ncols, VA, VB, EA, EB, gate, out)  # fmt: skip
        if cfg[8] or cfg[9]:
            _widen(e, first, second, n1, n2, time_s, acc, last_t, sc, cfg, hyp, out, EA, EB,
                   gate)  # fmt: skip
        p_out[e, 0] = out[0]
        p_out[e, 1] = out[1]


@kernel
def predict_seq(
    first, second, n1, n2, ctx_idx, ctx_val, time_s, feat_idx, feat_val,
    own, acc, last_t, fs_idx, fs_val, W, G, H, sc, cfg, hyp, p_out,
):  # fmt: skip
    """Probabilities of every event from the current state; changes nothing."""
    sc_ = _scratch(first, second, ctx_idx, feat_idx, fs_idx, W, G, H, cfg)
    _predict_loop(
        first, second, n1, n2, ctx_idx, ctx_val, time_s, feat_idx, feat_val,
        own, acc, last_t, fs_idx, fs_val, W, G, H, sc, cfg, hyp, p_out,
        sc_[0], sc_[1], sc_[2], sc_[4], sc_[5], sc_[6], sc_[7], sc_[8], sc_[9],
    )  # fmt: skip


@leaf
def _minibatch_loop(
    first, second, n1, n2, score, ctx_idx, ctx_val, time_s, feat_idx, feat_val,
    own, acc, last_t, fs_idx, fs_val, W, AW, G, AG, H, AH, sc, asc, cfg, hyp, p_out,
    uniq, loc1, loc2, gown, tmax, last_e, last_m, row, uinfo,
    od, base, q, gm, cols, vals, ncols, V6, gate2, out, gW, gG, gH, gsc,
    markW, listW, markC, listC,
):  # fmt: skip
    d, so = cfg[0], cfg[1]
    D = own.shape[1]
    VA, VB, EA, EB, dEA, dEB = V6[0], V6[1], V6[2], V6[3], V6[4], V6[5]
    gate, gg = gate2[0], gate2[1]
    nW, nC = 0, 0
    upto = so if cfg[9] else D  # columns with AdaGrad steps
    k1 = first.shape[1]
    has_ef = feat_idx.shape[0] > 0 and feat_idx.shape[2] > 0
    for e in range(first.shape[0]):
        _event(e, first, second, n1, n2, ctx_idx, ctx_val, time_s, feat_idx, feat_val,
               own, last_t, fs_idx, fs_val, W, G, H, sc, cfg, hyp,
               od, base, q, cols, vals, ncols, VA, VB, EA, EB, gate, out)  # fmt: skip
        if cfg[8] or cfg[9]:
            _widen(e, first, second, n1, n2, time_s, acc, last_t, sc, cfg, hyp, out, EA, EB,
                   gate)  # fmt: skip
        p_out[e, 0] = out[0]
        p_out[e, 1] = out[1]
        nW, nC = _grads(e, first, second, n1, n2, ctx_idx, ctx_val, score, cfg, hyp,
                        od, base, q, cols, vals, ncols, VA, VB, EA, EB, gate, out,
                        dEA, dEB, gg, gm, gW, gG, gH, gsc, markW, listW, nW,
                        markC, listC, nC)  # fmt: skip
        now = time_s[e]
        nowr = hyp[5] if math.isnan(now) else now
        h = _curv(out, cfg[4])
        for side in range(2):
            locs = loc1 if side == 0 else loc2
            rows = first if side == 0 else second
            n = n1[e] if side == 0 else n2[e]
            off = 0 if side == 0 else k1
            for j in range(n):
                u = locs[e, j]
                if u < 0:
                    continue
                for t in range(upto):
                    gown[u, t] += gm[off + j, t]
                if cfg[8]:
                    v = _v_eff(rows[e, j], 0, nowr, acc, last_t, hyp[8], hyp[9])
                    gs, info = _u_terms(1.0 / n, v, h, out[5])
                    uinfo[u, 0] += gm[off + j, 0] * gs
                    uinfo[u, 1] += info
                if cfg[9]:
                    for grp in range(2):
                        lo = so + grp * d
                        v = _v_eff(rows[e, j], lo, nowr, acc, last_t, hyp[10], hyp[11])
                        gs, info = _vec_terms(1.0 / n, v, out[6 + 2 * side + grp], h, out[5])
                        for t in range(lo, lo + d):
                            gown[u, t] += gm[off + j, t] * gs
                        uinfo[u, 2 + grp] += info
                if not math.isnan(now) and (math.isnan(tmax[u]) or now > tmax[u]):
                    tmax[u] = now
                if has_ef and feat_idx[e, off + j, 0] >= 0:
                    last_e[u] = e
                    last_m[u] = off + j
    lr = hyp[0]
    forget = hyp[4]
    for u in range(uniq.shape[0]):
        r = uniq[u]
        now = tmax[u]
        dec = 1.0
        if forget > 0.0 and last_t.shape[0] > 0 and not math.isnan(now):
            lt = last_t[r]
            if not math.isnan(lt) and now > lt:
                dec = math.exp(-forget * (now - lt) / 86400.0)
        for t in range(D):
            row[t] = own[r, t] * dec
        nowr = hyp[5] if math.isnan(now) else now
        v, va, vc = 0.0, 0.0, 0.0
        if cfg[8]:
            v = _v_eff(r, 0, nowr, acc, last_t, hyp[8], hyp[9])
        if cfg[9]:
            va = _v_eff(r, so, nowr, acc, last_t, hyp[10], hyp[11])
            vc = _v_eff(r, so + d, nowr, acc, last_t, hyp[10], hyp[11])
        _store_member(r, now, row, gown[u], own, acc, last_t, lr, hyp[7], so, upto)
        if cfg[8]:
            _u_store(r, nowr, row[0], v, uinfo[u, 0], uinfo[u, 1], own, acc, last_t)
        if cfg[9]:
            _vec_store(r, row, gown[u], 1.0, va, uinfo[u, 2], so, d, own, acc)
            _vec_store(r, row, gown[u], 1.0, vc, uinfo[u, 3], so + d, d, own, acc)
            if not math.isnan(nowr):
                last_t[r] = nowr
        if last_e[u] >= 0:
            _store_features(r, last_e[u], last_m[u], fs_idx, fs_val, feat_idx, feat_val)
    _apply_shared(W, AW, G, AG, H, AH, sc, asc, gW, gG, gH, gsc, markW, listW, nW,
                  markC, listC, nC, cfg, hyp)  # fmt: skip
    for e in range(first.shape[0]):
        now = time_s[e]
        if not math.isnan(now) and (math.isnan(hyp[5]) or now > hyp[5]):
            hyp[5] = now


@kernel
def learn_minibatch(
    first, second, n1, n2, score, ctx_idx, ctx_val, time_s, feat_idx, feat_val,
    own, acc, last_t, fs_idx, fs_val, W, AW, G, AG, H, AH, sc, asc, cfg, hyp, p_out,
    uniq, loc1, loc2,
):  # fmt: skip
    """Predict every event from the batch-start state, then one combined AdaGrad step.

    ``uniq`` lists the distinct known rows of the batch; ``loc1``/``loc2`` give
    each member's position in ``uniq`` (-1 for unknown/padding).
    """
    U = uniq.shape[0]
    D = own.shape[1]
    sc_ = _scratch(first, second, ctx_idx, feat_idx, fs_idx, W, G, H, cfg)
    _minibatch_loop(
        first, second, n1, n2, score, ctx_idx, ctx_val, time_s, feat_idx, feat_val,
        own, acc, last_t, fs_idx, fs_val, W, AW, G, AG, H, AH, sc, asc, cfg, hyp, p_out,
        uniq, loc1, loc2, np.zeros((U, D)), np.full(U, np.nan),
        np.full(U, -1, dtype=np.int64), np.full(U, -1, dtype=np.int64), np.zeros(D),
        np.zeros((U, 4)),
        sc_[0], sc_[1], sc_[2], sc_[3], sc_[4], sc_[5], sc_[6], sc_[7], sc_[8], sc_[9],
        sc_[10], sc_[11], sc_[12], sc_[13], sc_[14], sc_[15], sc_[16], sc_[17],
    )  # fmt: skip
