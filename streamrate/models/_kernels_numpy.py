"""Pure-numpy twin of :mod:`._kernels` (same names, signatures and numbers to round-off).

Used when numba is unavailable or ``backend="numpy"``; one event at a time with
vectorised numpy inside an event, so it is much slower than the compiled loops.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

THETA_CLIP = 30.0

Arr = np.ndarray


def _inputs(e: int, m: int, r: int, fi: Arr, fv: Arr, fs_idx: Arr, fs_val: Arr,
            ctx_idx: Arr, ctx_val: Arr, cfg: Arr) -> tuple[Arr, Arr]:  # fmt: skip
    """Columns and values of member slot ``m``'s input to the prior map."""
    nfeat, stacked = int(cfg[7]), bool(cfg[5])
    cols: list[Arr] = []
    vals: list[Arr] = []
    if nfeat > 0:
        if fi.shape[0] > 0 and fi.shape[2] > 0 and fi[e, m, 0] >= 0:
            idx, val = fi[e, m], fv[e, m]
        elif r >= 0:
            idx, val = fs_idx[r], fs_val[r].astype(np.float64)
        else:
            idx, val = fs_idx[:0, 0], np.zeros(0)
        stop = np.flatnonzero(idx < 0)
        k = int(stop[0]) if stop.size else idx.shape[0]
        cols.append(idx[:k].astype(np.int64))
        vals.append(val[:k].astype(np.float64))
    if stacked:
        keep = ctx_idx[e] >= 0
        cols.append(ctx_idx[e][keep].astype(np.int64) + nfeat)
        vals.append(ctx_val[e][keep])
    if not cols:
        return np.zeros(0, np.int64), np.zeros(0)
    return np.concatenate(cols), np.concatenate(vals)


def _forward(e: int, a: dict[str, Any]) -> dict[str, Any]:
    """Everything of event ``e`` that the prediction and the gradients need."""
    cfg, hyp = a["cfg"], a["hyp"]
    d, so, form, tanh_on, draws = (int(x) for x in cfg[:5])
    D = so + 2 * d
    now = float(a["time_s"][e])
    if math.isnan(now):
        now = float(hyp[5])
    W, last_t, own = a["W"], a["last_t"], a["own"]
    k1 = a["first"].shape[1]
    sides = []
    for rows, n, off in ((a["first"], a["n1"][e], 0), (a["second"], a["n2"][e], k1)):
        members = []
        V = np.zeros(D)
        for j in range(int(n)):
            r = int(rows[e, j])
            if r >= 0:
                dec = 1.0
                if hyp[4] > 0.0 and last_t.shape[0] > 0:
                    lt = last_t[r]
                    if not math.isnan(lt) and now > lt:
                        dec = math.exp(-hyp[4] * (now - lt) / 86400.0)
                od = own[r].astype(np.float64) * dec
            else:
                od = np.zeros(D)
            cols, vals = np.zeros(0, np.int64), np.zeros(0)
            q = np.zeros(D)
            if W.shape[0] > 0:
                cols, vals = _inputs(e, off + j, r, a["feat_idx"], a["feat_val"], a["fs_idx"],
                                     a["fs_val"], a["ctx_idx"], a["ctx_val"], cfg)  # fmt: skip
                q = W[:, cols] @ vals if cols.size else q
            base = od + (np.tanh(q) if tanh_on else q)
            V += base * (1.0 / n)
            members.append((r, off + j, od, q, cols, vals))
        sides.append((members, V, int(n)))
    keep = a["ctx_idx"][e] >= 0
    ci, cv = a["ctx_idx"][e][keep].astype(np.int64), a["ctx_val"][e][keep]
    gate = np.ones(2 * d)
    if cfg[6] and ci.size:
        gate += a["G"][:, ci] @ cv
    adv = 0.0
    if hyp[6] > 0.0:
        adv = float(a["sc"][0]) + (float(a["H"][0, ci] @ cv) if ci.size else 0.0)
    VA, VB = sides[0][1], sides[1][1]
    EA, EB = VA.copy(), VB.copy()
    EA[so:] *= gate
    EB[so:] *= gate
    theta = adv + (EA[0] - EB[0] if so else 0.0)
    aA, cA = EA[so : so + d], EA[so + d :]
    aB, cB = EB[so : so + d], EB[so + d :]
    if d:
        if form == 0:
            theta += float(aA @ cB - aB @ cA)
        else:
            theta += float(((aB - cA) ** 2 - (aA - cB) ** 2).sum())
    theta = min(max(theta, -THETA_CLIP), THETA_CLIP)
    norms = _jac_norms(EA, EB, gate, cfg) if cfg[9] else (0.0,) * 7
    kappa, var = _widening(e, a, now, norms) if cfg[8] or cfg[9] else (1.0, 0.0)
    p = _probs(kappa * theta, float(a["sc"][1]), draws)
    return {"sides": sides, "gate": gate, "EA": EA, "EB": EB, "p": p, "now": now,
            "ci": ci, "cv": cv, "kappa": kappa, "V": var, "q": norms}  # fmt: skip


def _jac_norms(EA: Arr, EB: Arr, gate: Arr, cfg: Arr) -> tuple[float, ...]:
    """Squared norms of the logit's gradient in (blade A, chest A, blade B, chest B),
    then the gate sums (ga^2 gc^2, ga^4, gc^4) of the second-order terms."""
    d, so, form = int(cfg[0]), int(cfg[1]), int(cfg[2])
    aA, cA = EA[so : so + d], EA[so + d : so + 2 * d]
    aB, cB = EB[so : so + d], EB[so + d : so + 2 * d]
    ga, gc = gate[:d], gate[d:]
    if form == 0:
        jac = (cB * ga, -aB * gc, -cA * ga, aA * gc)
    else:
        d1, d2 = aB - cA, aA - cB
        jac = (-2.0 * d2 * ga, -2.0 * d1 * gc, 2.0 * d1 * ga, 2.0 * d2 * gc)
    norms = tuple(float(np.sum(j * j)) for j in jac)
    sums = (float(np.sum(ga**2 * gc**2)), float(np.sum(ga**4)), float(np.sum(gc**4)))
    return norms + sums


def _second_order(S: list[float], form: int, q: tuple[float, ...]) -> float:
    """See ``_kernels._second_order``; ``S`` = (blade A, chest A, blade B, chest B)."""
    s_aa, s_ca, s_ab, s_cb = S
    g22, g4a, g4c = q[4], q[5], q[6]
    if form == 0:
        return g22 * (s_aa * s_cb + s_ab * s_ca)
    u = s_ab * s_ab * g4a + 2.0 * s_ab * s_ca * g22 + s_ca * s_ca * g4c
    u += s_aa * s_aa * g4a + 2.0 * s_aa * s_cb * g22 + s_cb * s_cb * g4c
    return 2.0 * u


def _probs(theta: float, eta: float, draws: int) -> tuple[float, float, float]:
    if draws:
        u = 0.5 * theta
        au = abs(u)
        ew, el, en = math.exp(u - au), math.exp(-u - au), math.exp(eta - au)
        tot = ew + el + en
        return (ew / tot, en / tot, el / tot)
    ez = math.exp(-abs(theta))
    pw = 1.0 / (1.0 + ez) if theta >= 0 else ez / (1.0 + ez)
    return (pw, 0.0, 1.0 - pw)


def _v_eff(r: int, now: float, a: dict[str, Any], col: int | None = None) -> float:
    """Variance at ``now`` (see ``_kernels._v_eff``): the strength's (``col`` None, kept
    in column 0), else the vector group's kept in column ``col``."""
    hyp = a["hyp"]
    if col is None:
        col, prior, noise = 0, float(hyp[8]), float(hyp[9])
    else:
        prior, noise = float(hyp[10]), float(hyp[11])
    if r < 0:
        return prior
    v = float(a["acc"][r, col])
    last_t = a["last_t"]
    if last_t.shape[0] > 0 and not math.isnan(now):
        lt = float(last_t[r])
        if not math.isnan(lt) and now > lt:
            v = min(v + noise * (now - lt) / 86400.0, max(v, prior))
    return v


def _vec_cols(a: dict[str, Any]) -> tuple[int, int, int]:
    """(blade column, chest column, dims) of the vector groups' variances."""
    d, so = int(a["cfg"][0]), int(a["cfg"][1])
    return so, so + d, d


def _widening(e: int, a: dict[str, Any], now: float, q: tuple[float, ...]) -> tuple[float, float]:
    cfg = a["cfg"]
    ca, cc, _ = _vec_cols(a)
    V = 0.0
    S = [0.0, 0.0, 0.0, 0.0]
    for side, (rows, n) in enumerate(((a["first"], a["n1"][e]), (a["second"], a["n2"][e]))):
        for j in range(int(n)):
            r = int(rows[e, j])
            if cfg[8]:
                V += _v_eff(r, now, a) / (float(n) * float(n))
            if cfg[9]:
                w = 1.0 / float(n)
                va, vc = _v_eff(r, now, a, ca) * w * w, _v_eff(r, now, a, cc) * w * w
                V += va * q[2 * side] + vc * q[2 * side + 1]
                S[2 * side] += va
                S[2 * side + 1] += vc
    if cfg[9]:
        V += _second_order(S, int(cfg[2]), q)
    return 1.0 / math.sqrt(1.0 + math.pi * V / 8.0), V


def _curv(f: dict[str, Any], draws: int) -> float:
    pw, _, pl = f["p"]
    c = 0.25 * (pw + pl - (pw - pl) ** 2) if draws else pw * pl
    return float(f["kappa"] ** 2 * c)


def _u_terms(n: int, v: float, h: float, V: float) -> tuple[float, float]:
    w = 1.0 / (float(n) * float(n))
    den = 1.0 + h * (V - v * w)
    return 1.0 / den, h * w / den


def _vec_terms(n: int, v: float, q: float, h: float, V: float) -> tuple[float, float]:
    qm = q / (float(n) * float(n))
    den = 1.0 + h * (V - v * qm)
    return 1.0 / den, h * qm / den


def _vec_store(a: dict[str, Any], r: int, row: Arr, g: Arr, gscale: float, v: float,
               info: float, lo: int, d: int) -> None:  # fmt: skip
    vm = v / (1.0 + v * info)
    a["own"][r, lo : lo + d] = row[lo : lo + d] - vm * (g[lo : lo + d] * gscale)
    a["acc"][r, lo] = v / (1.0 + v * info / d)


def _u_store(a: dict[str, Any], r: int, now: float, mu0: float, v: float, gsum: float,
             info: float) -> None:  # fmt: skip
    vn = v / (1.0 + v * info)
    a["own"][r, 0] = mu0 - vn * gsum
    a["acc"][r, 0] = vn
    if a["last_t"].shape[0] > 0 and not math.isnan(now):
        a["last_t"][r] = now


def _backward(e: int, a: dict[str, Any], f: dict[str, Any], g: dict[str, Any]) -> list[Any]:
    """Add event ``e``'s shared gradients to ``g``; return per-member (r, m, od, grad)."""
    cfg, hyp = a["cfg"], a["hyp"]
    d, so, form, tanh_on, draws = (int(x) for x in cfg[:5])
    D = so + 2 * d
    pw, pd, pl = f["p"]
    y = float(a["score"][e])
    if draws:
        gth = 0.5 * ((pw - pl) - (2.0 * y - 1.0))
        g["sc"][1] += pd - (1.0 if y == 0.5 else 0.0)
    else:
        gth = pw - y
    gth *= f["kappa"]
    if hyp[6] > 0.0:
        g["sc"][0] += gth
    EA, EB = f["EA"], f["EB"]
    dEA, dEB = np.zeros(D), np.zeros(D)
    if so:
        dEA[0], dEB[0] = gth, -gth
    ia, ic = slice(so, so + d), slice(so + d, D)
    if form == 0:
        dEA[ia], dEB[ic] = gth * EB[ic], gth * EA[ia]
        dEB[ia], dEA[ic] = -gth * EA[ic], -gth * EB[ia]
    else:
        d1, d2 = EB[ia] - EA[ic], EA[ia] - EB[ic]
        dEB[ia], dEA[ic] = 2.0 * gth * d1, -2.0 * gth * d1
        dEA[ia], dEB[ic] = -2.0 * gth * d2, 2.0 * gth * d2
    VA, VB = f["sides"][0][1], f["sides"][1][1]
    gg = dEA[so:] * VA[so:] + dEB[so:] * VB[so:]
    dEA[so:] *= f["gate"]
    dEB[so:] *= f["gate"]
    ci, cv = f["ci"], f["cv"]
    if ci.size:
        if hyp[6] > 0.0 or cfg[6]:
            g["touchC"].update(ci.tolist())
        if hyp[6] > 0.0:
            np.add.at(g["H"][0], ci, gth * cv)
        if cfg[6]:
            np.add.at(g["G"].T, ci, np.outer(cv, gg))
    members = []
    for (mem, _, n), dE in zip(f["sides"], (dEA, dEB), strict=True):
        db = dE * (1.0 / n)
        for r, m, od, q, cols, vals in mem:
            gm = db + hyp[2] * od if r >= 0 else db.copy()
            if cols.size:
                dq = db * (1.0 - np.tanh(q) ** 2) if tanh_on else db
                np.add.at(g["W"].T, cols, np.outer(vals, dq))
                g["touchW"].update(cols.tolist())
            members.append((r, m, od, gm, n))
    return members


def _grad_buffers(a: dict[str, Any]) -> dict[str, Any]:
    return {"W": np.zeros(a["W"].shape), "G": np.zeros(a["G"].shape), "H": np.zeros(a["H"].shape),
            "sc": np.zeros(2), "touchW": set(), "touchC": set()}  # fmt: skip


def _apply_cols(P: Arr, A: Arr, g: Arr, cols: list[int], lr: float, l2: float) -> None:
    if not cols:
        return
    c = np.array(sorted(cols), dtype=np.int64)
    gt = g[:, c] + l2 * P[:, c]
    A[:, c] += gt * gt
    P[:, c] -= lr * gt / np.sqrt(A[:, c])


def _apply_shared(a: dict[str, Any], g: dict[str, Any]) -> None:
    cfg, hyp = a["cfg"], a["hyp"]
    lr_s, l2_s = hyp[1], hyp[3]
    if a["W"].shape[0] > 0:
        _apply_cols(a["W"], a["AW"], g["W"], list(g["touchW"]), lr_s, l2_s)
    if cfg[6]:
        _apply_cols(a["G"], a["AG"], g["G"], list(g["touchC"]), lr_s, l2_s)
    if hyp[6] > 0.0:
        _apply_cols(a["H"], a["AH"], g["H"], list(g["touchC"]), hyp[7], l2_s)
    for i in range(2):
        gi = g["sc"][i]
        if gi != 0.0:
            a["asc"][i] += gi * gi
            a["sc"][i] -= hyp[7] * gi / math.sqrt(a["asc"][i])


def _store_member(a: dict[str, Any], r: int, now: float, od: Arr, gm: Arr) -> None:
    """AdaGrad step; with vector uncertainty only of the strength (vectors copied)."""
    k = int(a["cfg"][1]) if a["cfg"][9] else gm.shape[0]
    a["own"][r, k:] = od[k:]
    acc = a["acc"][r, :k].astype(np.float64) + gm[:k] * gm[:k]
    a["acc"][r, :k] = acc
    step = np.full(k, a["hyp"][0])
    step[: int(a["cfg"][1])] = a["hyp"][7]
    a["own"][r, :k] = od[:k] - step * gm[:k] / np.sqrt(a["acc"][r, :k].astype(np.float64))
    if a["last_t"].shape[0] > 0 and not math.isnan(now):
        a["last_t"][r] = now


def _store_features(a: dict[str, Any], r: int, e: int, m: int) -> None:
    fs_idx, fi = a["fs_idx"], a["feat_idx"]
    if fs_idx.shape[0] == 0 or fi.shape[0] == 0 or fi.shape[2] == 0 or fi[e, m, 0] < 0:
        return
    k = min(fs_idx.shape[1], fi.shape[2])
    fs_idx[r] = -1
    a["fs_val"][r] = 0.0
    fs_idx[r, :k] = fi[e, m, :k]
    a["fs_val"][r, :k] = np.where(fi[e, m, :k] >= 0, a["feat_val"][e, m, :k], 0.0)


_NAMES = ("first", "second", "n1", "n2", "score", "ctx_idx", "ctx_val", "time_s", "feat_idx",
          "feat_val", "own", "acc", "last_t", "fs_idx", "fs_val", "W", "AW", "G", "AG", "H",
          "AH", "sc", "asc", "cfg", "hyp")  # fmt: skip


def learn_seq(*args: Arr) -> None:
    """Predict-then-learn over events in order; writes (p_win, p_draw) into ``p_out``."""
    a = dict(zip(_NAMES, args[:-1], strict=True))
    p_out = args[-1]
    hyp = a["hyp"]
    uncertain, vec = bool(a["cfg"][8]), bool(a["cfg"][9])
    for e in range(a["first"].shape[0]):
        f = _forward(e, a)
        p_out[e, 0], p_out[e, 1] = f["p"][0], f["p"][1]
        g = _grad_buffers(a)
        now = float(a["time_s"][e])
        nowr = float(hyp[5]) if math.isnan(now) else now
        h = _curv(f, int(a["cfg"][4]))
        k1 = a["first"].shape[1]
        ca, cc, d = _vec_cols(a)
        for r, m, od, gm, n in _backward(e, a, f, g):
            if r < 0:
                continue
            v = _v_eff(r, nowr, a) if uncertain else 0.0
            va = _v_eff(r, nowr, a, ca) if vec else 0.0
            vc = _v_eff(r, nowr, a, cc) if vec else 0.0
            _store_member(a, r, now, od, gm)
            if uncertain:
                gs, info = _u_terms(n, v, h, f["V"])
                _u_store(a, r, nowr, float(od[0]), v, float(gm[0]) * gs, info)
            if vec:
                side = 0 if m < k1 else 1
                gs, info = _vec_terms(n, va, f["q"][2 * side], h, f["V"])
                _vec_store(a, r, od, gm, gs, va, info, ca, d)
                gs, info = _vec_terms(n, vc, f["q"][2 * side + 1], h, f["V"])
                _vec_store(a, r, od, gm, gs, vc, info, cc, d)
                if not math.isnan(nowr):
                    a["last_t"][r] = nowr
            _store_features(a, r, e, m)
        _apply_shared(a, g)
        now = float(a["time_s"][e])
        if not math.isnan(now) and (math.isnan(hyp[5]) or now > hyp[5]):
            hyp[5] = now


def predict_seq(first: Arr, second: Arr, n1: Arr, n2: Arr, ctx_idx: Arr, ctx_val: Arr,
                time_s: Arr, feat_idx: Arr, feat_val: Arr, own: Arr, acc: Arr, last_t: Arr,
                fs_idx: Arr, fs_val: Arr, W: Arr, G: Arr, H: Arr, sc: Arr, cfg: Arr, hyp: Arr,
                p_out: Arr) -> None:  # fmt: skip
    """Probabilities of every event from the current state; changes nothing."""
    a = {"first": first, "second": second, "n1": n1, "n2": n2, "ctx_idx": ctx_idx,
         "ctx_val": ctx_val, "time_s": time_s, "feat_idx": feat_idx, "feat_val": feat_val,
         "own": own, "acc": acc, "last_t": last_t, "fs_idx": fs_idx, "fs_val": fs_val, "W": W,
         "G": G, "H": H, "sc": sc, "cfg": cfg, "hyp": hyp}  # fmt: skip
    for e in range(first.shape[0]):
        p = _forward(e, a)["p"]
        p_out[e, 0], p_out[e, 1] = p[0], p[1]


def learn_minibatch(*args: Arr) -> None:
    """Predict every event from the batch-start state, then one combined AdaGrad step."""
    a = dict(zip(_NAMES, args[:-4], strict=True))
    p_out, uniq, loc1, loc2 = args[-4:]
    hyp = a["hyp"]
    D = a["own"].shape[1]
    U = uniq.shape[0]
    gown = np.zeros((U, D))
    tmax = np.full(U, np.nan)
    last_em: dict[int, tuple[int, int]] = {}
    g = _grad_buffers(a)
    k1 = a["first"].shape[1]
    fi = a["feat_idx"]
    uncertain, vec = bool(a["cfg"][8]), bool(a["cfg"][9])
    ca, cc, d = _vec_cols(a)
    upto = ca if vec else D
    uinfo = np.zeros((U, 4))
    for e in range(a["first"].shape[0]):
        f = _forward(e, a)
        p_out[e, 0], p_out[e, 1] = f["p"][0], f["p"][1]
        now = float(a["time_s"][e])
        nowr = float(hyp[5]) if math.isnan(now) else now
        h = _curv(f, int(a["cfg"][4]))
        for r, m, _, gm, n in _backward(e, a, f, g):
            if r < 0:
                continue
            u = int(loc1[e, m] if m < k1 else loc2[e, m - k1])
            gown[u, :upto] += gm[:upto]
            if uncertain:
                gs, info = _u_terms(n, _v_eff(r, nowr, a), h, f["V"])
                uinfo[u, 0] += float(gm[0]) * gs
                uinfo[u, 1] += info
            if vec:
                side = 0 if m < k1 else 1
                for grp, lo in enumerate((ca, cc)):
                    v = _v_eff(r, nowr, a, lo)
                    gs, info = _vec_terms(n, v, f["q"][2 * side + grp], h, f["V"])
                    gown[u, lo : lo + d] += gm[lo : lo + d] * gs
                    uinfo[u, 2 + grp] += info
            if not math.isnan(now) and (math.isnan(tmax[u]) or now > tmax[u]):
                tmax[u] = now
            if fi.shape[0] > 0 and fi.shape[2] > 0 and fi[e, m, 0] >= 0:
                last_em[u] = (e, m)
    for u in range(U):
        r = int(uniq[u])
        now = float(tmax[u])
        dec = 1.0
        if hyp[4] > 0.0 and a["last_t"].shape[0] > 0 and not math.isnan(now):
            lt = a["last_t"][r]
            if not math.isnan(lt) and now > lt:
                dec = math.exp(-hyp[4] * (now - lt) / 86400.0)
        row = a["own"][r].astype(np.float64) * dec
        nowr = float(hyp[5]) if math.isnan(now) else now
        v = _v_eff(r, nowr, a) if uncertain else 0.0
        va = _v_eff(r, nowr, a, ca) if vec else 0.0
        vc = _v_eff(r, nowr, a, cc) if vec else 0.0
        _store_member(a, r, now, row, gown[u])
        if uncertain:
            _u_store(a, r, nowr, float(row[0]), v, float(uinfo[u, 0]), float(uinfo[u, 1]))
        if vec:
            _vec_store(a, r, row, gown[u], 1.0, va, float(uinfo[u, 2]), ca, d)
            _vec_store(a, r, row, gown[u], 1.0, vc, float(uinfo[u, 3]), cc, d)
            if not math.isnan(nowr):
                a["last_t"][r] = nowr
        if u in last_em:
            _store_features(a, r, *last_em[u])
    _apply_shared(a, g)
    times = a["time_s"][~np.isnan(a["time_s"])]
    if times.size and (math.isnan(hyp[5]) or times.max() > hyp[5]):
        hyp[5] = float(times.max())
