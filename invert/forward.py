"""Travel times through flat layered media: exact, batched, compiled.

Every ray is described by its ray parameter p (horizontal slowness, s/length).
Through a depth segment whose velocity varies linearly from ``va`` to ``vb``
over thickness ``h`` the horizontal distance and time are closed-form
(tau-p integrals; Buland & Chapman, BSSA 73, 1983; Shearer, *Introduction to
Seismology*, 2nd ed., 2009, ch. 4)::

    q = sqrt(1 - p^2 v^2)
    X = p h (va + vb) / (qa + qb)                        (exact, any gradient)
    T = h c log1p(d) / d,  c = [1 + (va+vb)/(vb qa + va qb)] / (va (1 + qb)),
                           d = (vb - va) c               (-> h / (v q) as vb -> va)

written so that they stay accurate as the gradient tends to zero. A ray that
turns inside a layer of positive gradient g contributes X = qa / (p g),
T = acosh(1 / (p va)) / g. At a solution of X(p) = x the time is stationary in
p, so T = tau(p) + p x is accurate to second order in the root's error.

Branches (see ``docs/forward.md``): direct (no turning point), diving
(turning in a gradient layer; all roots of X(p) = x are found and the earliest
kept), head wave along interface k, reflection from interface k, and the first
arrival, the earliest of all. Absent arrivals have ``time = inf`` and
``ray_parameter = nan``.

Not computed (documented limitation): branches that leave *both* ends going
upward -- reflections from the underside of an interface, head waves along an
interface above both ends, rays that turn upward in a layer whose velocity
falls with depth. They matter only when both ends lie below a velocity
inversion.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from .model import LayerModel, _check_wave

BRANCH_NONE = 0
BRANCH_DIRECT = 1
BRANCH_DIVING = 2
BRANCH_HEAD = 3
BRANCH_REFLECTION = 4
BRANCH_NAMES = {BRANCH_NONE: "none", BRANCH_DIRECT: "direct", BRANCH_DIVING: "diving",
                BRANCH_HEAD: "head", BRANCH_REFLECTION: "reflection"}

_MODES = {"first": 0, "direct": 1, "head": 2, "reflection": 3}

#: Points at which X(p) is sampled per diving interval before roots are polished.
N_SCAN = 24

_jit = numba.njit(cache=True, error_model="numpy", fastmath=False)


@dataclass(frozen=True)
class Arrivals:
    """Travel times of one branch for a batch of models and picks.

    Attributes
    ----------
    time : (models, picks) array
        Travel time [s]; ``inf`` where the branch does not exist.
    ray_parameter : (models, picks) array
        Horizontal slowness [s/length]; ``nan`` where absent.
    branch : (models, picks) int array
        ``BRANCH_*`` code of the arrival (useful for the first arrival).
    interface : (models, picks) int array
        Interface number (1 = base of the top layer) for head waves and
        reflections, 0 otherwise.
    deepest : (models, picks) array
        Deepest point the ray reaches [length] (turning depth, reflector or
        refractor depth, or the deeper end); ``nan`` where absent.
    """

    time: np.ndarray
    ray_parameter: np.ndarray
    branch: np.ndarray
    interface: np.ndarray
    deepest: np.ndarray


# ----------------------------------------------------------------------------
# Segment integrals (scalars)
# ----------------------------------------------------------------------------
@_jit
def _q(v, vref, qref2):
    """sqrt(1 - p^2 v^2) with p = sqrt(1 - qref2) / vref, accurate near grazing."""
    r = v / vref
    a = (1.0 - r) * (1.0 + r) + r * r * qref2
    if a < 0.0:
        return np.nan
    return np.sqrt(a)


@_jit
def _segment(p, va, vb, h, qa, qb):
    """X, T, dX/dp through a segment with linear velocity va -> vb, thickness h."""
    s = qa + qb
    xs = h * (va + vb) / s  # X / p
    x = p * xs
    dxdp = xs / (qa * qb)
    if vb == va:
        t = h / (va * qa)
    else:
        c = (1.0 + (va + vb) / (vb * qa + va * qb)) / (va * (1.0 + qb))
        d = (vb - va) * c
        t = h * c * np.log1p(d) / d
    return x, t, dxdp


@_jit
def _sum_pieces(p, vref, qref2, va, vb, h, w, n):
    """Weighted X, T, dX/dp over pieces 0..n-1 (nan if the ray cannot pass)."""
    xs = 0.0
    ts = 0.0
    ds = 0.0
    for i in range(n):
        if h[i] <= 0.0:
            continue
        qa = _q(va[i], vref, qref2)
        qb = _q(vb[i], vref, qref2)
        x, t, d = _segment(p, va[i], vb[i], h[i], qa, qb)
        xs += w[i] * x
        ts += w[i] * t
        ds += w[i] * d
    return xs, ts, ds


# ----------------------------------------------------------------------------
# Root finding
# ----------------------------------------------------------------------------
@_jit
def _solve_monotone(x, vmax, va, vb, h, w, n):
    """Solve X(p) = x for a branch without turning points (X increasing in p).

    Newton iterations run in u = tan(angle in the fastest piece), which makes
    X nearly linear in u at large offsets; a bracket guards every step.
    Returns (p, T); p = nan if no ray reaches x.
    """
    if x == 0.0:
        xs, ts, ds = _sum_pieces(0.0, 1.0, 1.0, va, vb, h, w, n)
        return 0.0, ts
    vref = vmax
    # offset reached at grazing in the fastest piece (inf for a constant piece)
    xc, tc, dc = _sum_pieces(1.0 / vmax, vref, 0.0, va, vb, h, w, n)
    if not (x <= xc) and not np.isinf(xc):
        return np.nan, np.inf
    if x == xc:
        return 1.0 / vmax, tc
    length = 0.0
    for i in range(n):
        length += w[i] * h[i]
    u = x / length
    lo = 0.0
    hi = np.inf
    p = 0.0
    t = np.inf
    for _ in range(200):
        qm2 = 1.0 / (1.0 + u * u)
        p = np.sqrt(1.0 - qm2) / vref
        xs, ts, ds = _sum_pieces(p, vref, qm2, va, vb, h, w, n)
        t = ts
        f = xs - x
        if f > 0.0:
            hi = u
        else:
            lo = u
        if abs(f) <= 1e-14 * x:
            break
        dpdu = qm2 * np.sqrt(qm2) / vref
        step = -f / (ds * dpdu)
        un = u + step
        if not (un > lo and un < hi):
            un = 0.5 * (lo + hi) if np.isfinite(hi) else 2.0 * u + 1.0
        if abs(un - u) <= 1e-15 * u:
            u = un
            break
        u = un
    qm2 = 1.0 / (1.0 + u * u)
    p = np.sqrt(1.0 - qm2) / vref
    xs, ts, ds = _sum_pieces(p, vref, qm2, va, vb, h, w, n)
    # time is stationary in p: T(x) = T(p) + p (x - X(p)) to second order
    return p, ts + p * (x - xs)


@_jit
def _diving_eval(qr, vref, va, vb, h, w, n, vturn, g):
    """X, T, dX/dqr of a diving ray: pieces 0..n-1, then a turn (weight 2) in a layer.

    The ray is labelled by ``qr`` = sqrt(1 - p^2 vref^2), its vertical
    cosine at the reference velocity ``vref`` (the fastest velocity above the
    turning point); p = sqrt(1 - qr^2) / vref. Near grazing this keeps every
    q = sqrt(1 - p^2 v^2) accurate, where computing from p would cancel.
    The turning layer starts at velocity ``vturn`` with gradient g > 0 and
    contributes X = qa / (p g), T = acosh(1 / (p vturn)) / g.
    """
    sp = np.sqrt((1.0 - qr) * (1.0 + qr))
    p = sp / vref
    xs, ts, ds = _sum_pieces(p, vref, qr * qr, va, vb, h, w, n)
    r = vturn / vref
    qa = np.sqrt((1.0 - r) * (1.0 + r) + r * r * qr * qr)
    pv = r * sp
    xt = qa / (p * g)
    tt = np.log1p((qa + qa * qa / (1.0 + pv)) / pv) / g
    dxdp = ds - 2.0 / (qa * p * p * g)
    return xs + 2.0 * xt, ts + 2.0 * tt, dxdp * (-qr / (vref * vref * p))


@_jit
def _polish_diving(x, qlo, flo, qhi, fhi, vref, va, vb, h, w, n, vturn, g):
    """Root of X = x for qr in the bracket [qlo, qhi] (f = X - x changes sign); returns (p, T)."""
    q = 0.5 * (qlo + qhi)
    for _ in range(200):
        xs, ts, ds = _diving_eval(q, vref, va, vb, h, w, n, vturn, g)
        f = xs - x
        if f == 0.0:
            break
        if (f > 0.0) == (fhi > 0.0):
            qhi = q
            fhi = f
        else:
            qlo = q
            flo = f
        qn = q - f / ds
        if not (qn > min(qlo, qhi) and qn < max(qlo, qhi)) or not np.isfinite(qn):
            qn = 0.5 * (qlo + qhi)
        if abs(qn - q) <= 1e-15 * q or abs(qhi - qlo) <= 1e-15 * q:
            q = qn
            break
        q = qn
    xs, ts, ds = _diving_eval(q, vref, va, vb, h, w, n, vturn, g)
    p = np.sqrt((1.0 - q) * (1.0 + q)) / vref
    return p, ts + p * (x - xs)


@_jit
def _extremum(qlo, dlo, qhi, vref, va, vb, h, w, n, vturn, g):
    """qr where dX/dqr changes sign between qlo and qhi (bisection)."""
    for _ in range(60):
        qm = 0.5 * (qlo + qhi)
        xs, ts, dm = _diving_eval(qm, vref, va, vb, h, w, n, vturn, g)
        if (dm > 0.0) == (dlo > 0.0):
            qlo = qm
            dlo = dm
        else:
            qhi = qm
    return 0.5 * (qlo + qhi)


@_jit
def _earliest_diving(x, qtop, vref, va, vb, h, w, n, vturn, g, tbest, qg, fg, dg, tg):
    """Earliest diving arrival with qr in (0, qtop) if earlier than ``tbest``.

    X is sampled at N_SCAN + 2 points (Chebyshev spacing, both ends); every
    sign change of X - x is polished, and where dX/dqr changes sign between
    samples the extremum is located so that a hidden pair of roots is found
    too. Returns (p, T); T = tbest and p = nan if nothing earlier exists.
    """
    best_p = np.nan
    best_t = tbest
    for i in range(N_SCAN + 2):
        if i == 0:
            s = 0.0
        elif i == N_SCAN + 1:
            s = 1.0
        else:
            s = 0.5 * (1.0 - np.cos(np.pi * (i - 0.5) / N_SCAN))
        qi = qtop * s
        qg[i] = qi
        if qi >= 1.0:  # p = 0: a ray into a gradient half-space never returns
            fg[i] = np.inf
            dg[i] = np.nan
            tg[i] = 0.0
            continue
        xs, ts, ds = _diving_eval(qi, vref, va, vb, h, w, n, vturn, g)
        pi = np.sqrt((1.0 - qi) * (1.0 + qi)) / vref
        fg[i] = xs - x
        dg[i] = ds
        tg[i] = ts - pi * xs  # tau, which grows with qr (falls with p)
        if np.isnan(fg[i]):
            fg[i] = np.inf
    for i in range(N_SCAN + 1):
        f0 = fg[i]
        f1 = fg[i + 1]
        # any root in [q_i, q_i+1] has T >= tau(q_i) + p(q_i+1) x
        p1 = np.sqrt((1.0 - qg[i + 1]) * (1.0 + qg[i + 1])) / vref
        if np.isfinite(tg[i]) and tg[i] + p1 * x >= best_t:
            continue
        if f0 == 0.0:
            xs, ts, ds = _diving_eval(qg[i], vref, va, vb, h, w, n, vturn, g)
            if ts < best_t:
                best_t = ts
                best_p = np.sqrt((1.0 - qg[i]) * (1.0 + qg[i])) / vref
            continue
        if (f0 > 0.0) != (f1 > 0.0):
            p, t = _polish_diving(x, qg[i], f0, qg[i + 1], f1, vref, va, vb, h, w, n, vturn, g)
            if t < best_t:
                best_t = t
                best_p = p
        elif np.isfinite(dg[i]) and np.isfinite(dg[i + 1]) and (dg[i] > 0.0) != (dg[i + 1] > 0.0):
            # an extremum between samples may hide a pair of roots
            qe = _extremum(qg[i], dg[i], qg[i + 1], vref, va, vb, h, w, n, vturn, g)
            xs, ts, ds = _diving_eval(qe, vref, va, vb, h, w, n, vturn, g)
            fe = xs - x
            if (fe > 0.0) != (f0 > 0.0):
                p, t = _polish_diving(x, qg[i], f0, qe, fe, vref, va, vb, h, w, n, vturn, g)
                if t < best_t:
                    best_t = t
                    best_p = p
                p, t = _polish_diving(x, qe, fe, qg[i + 1], f1, vref, va, vb, h, w, n, vturn, g)
                if t < best_t:
                    best_t = t
                    best_p = p
    return best_p, best_t


# ----------------------------------------------------------------------------
# One pick through one model
# ----------------------------------------------------------------------------
@_jit
def _pick(ztop, vtop, grad, x, zs, zr, mode, kwant, va, vb, h, w, vmx,
          c_layer, c_bound, c_plo, c_phi, pg, fg, dg, tg):
    """First arrival / named branch for one pick. Returns (T, p, code, interface, deepest)."""
    nl = ztop.shape[0]
    zmin = min(zs, zr)
    zmax = max(zs, zr)
    # layer containing zmin (layer 0 extends above the datum)
    lmin = 0
    while lmin + 1 < nl and zmin >= ztop[lmin + 1]:
        lmin += 1
    # layer at or below zmax: a depth on an interface belongs to the layer below
    lb = lmin
    while lb + 1 < nl and zmax >= ztop[lb + 1]:
        lb += 1
    nan = np.nan
    # ---- pieces between the two ends (weight 1)
    n_u = 0
    blocked = False
    if zmax > zmin:
        for l in range(lmin, lb + 1):
            a = zmin if l == lmin else ztop[l]
            b = zmax if l == lb else ztop[l + 1]
            if b <= a:
                continue
            zref = 0.0 if l == 0 else ztop[l]
            va[n_u] = vtop[l] + grad[l] * (a - zref)
            vb[n_u] = vtop[l] + grad[l] * (b - zref)
            h[n_u] = b - a
            w[n_u] = 1.0
            if va[n_u] <= 0.0 or vb[n_u] <= 0.0:
                blocked = True
            n_u += 1
    # velocity at the ends' layers (fluid ends block everything)
    zref_b = 0.0 if lb == 0 else ztop[lb]
    v_at_zmax = vtop[lb] + grad[lb] * (zmax - zref_b)
    zref_m = 0.0 if lmin == 0 else ztop[lmin]
    v_at_zmin = vtop[lmin] + grad[lmin] * (zmin - zref_m)
    if blocked or v_at_zmax <= 0.0 or v_at_zmin <= 0.0:
        return np.inf, nan, 0, 0, nan
    # ---- pieces below zmax, one per layer down to the half-space (weight 2)
    n = n_u
    for l in range(lb, nl):
        a = zmax if l == lb else ztop[l]
        zref = 0.0 if l == 0 else ztop[l]
        va[n] = vtop[l] + grad[l] * (a - zref)
        if l < nl - 1:
            vb[n] = vtop[l] + grad[l] * (ztop[l + 1] - zref)
            h[n] = ztop[l + 1] - a
        else:
            vb[n] = np.inf if grad[l] > 0.0 else va[n]
            h[n] = np.inf
        w[n] = 2.0
        n += 1
    # running maximum velocity over pieces (zero velocity blocks: +inf)
    run = 0.0
    for i in range(n):
        if va[i] <= 0.0 or vb[i] <= 0.0:
            run = np.inf
        if i < n - 1:
            run = max(run, va[i], vb[i])
        else:
            run = max(run, va[i])
        vmx[i] = run
    vmax_u = vmx[n_u - 1] if n_u > 0 else 0.0

    best_t = np.inf
    best_p = nan
    best_code = 0
    best_k = 0
    best_deep = nan

    # ---- head waves along interfaces below zmax (cheap; first, to prune later work)
    if mode == 0 or mode == 2:
        for l in range(lb, nl - 1):
            k = l  # interface index (base of layer l), 0-based
            if mode == 2 and k != kwant:
                continue
            idx = n_u + (l - lb)  # piece of layer l
            vref = vtop[l + 1]
            if grad[l + 1] > 0.0 or not (vref > vmx[idx]) or not np.isfinite(vmx[idx]):
                continue
            qref2 = (1.0 - vmx[idx] / vref) * (1.0 + vmx[idx] / vref)
            p = 1.0 / vref
            xc, tc, dc = _sum_pieces(p, vmx[idx], qref2, va, vb, h, w, idx + 1)
            if x >= xc:
                t = tc + p * (x - xc)
                if t < best_t:
                    best_t = t
                    best_p = p
                    best_code = 3
                    best_k = k + 1
                    best_deep = ztop[l + 1]
    # ---- deeper end exactly on an interface over a faster constant layer: the ray leaves along
    # the interface in the layer below (the limit of an end just below it; Fermat)
    if (mode == 0 or (mode == 2 and kwant == lb - 1)) and n_u > 0 and lb > 0 and zmax == ztop[lb] \
            and grad[lb] <= 0.0 and vtop[lb] > vmax_u:
        vref = vtop[lb]
        qref2 = (1.0 - vmax_u / vref) * (1.0 + vmax_u / vref)
        p = 1.0 / vref
        xc, tc, dc = _sum_pieces(p, vmax_u, qref2, va, vb, h, w, n_u)
        if x >= xc:
            t = tc + p * (x - xc)
            if t < best_t:
                best_t = t
                best_p = p
                best_code = 3
                best_k = lb
                best_deep = zmax
    # ---- shallower end exactly on an interface under a faster constant layer: the ray leaves
    # along the interface in the layer above (the limit of an end just above it)
    if (mode == 0 or (mode == 2 and kwant == lmin - 1)) and lmin > 0 and zmin == ztop[lmin] \
            and grad[lmin - 1] == 0.0 and vtop[lmin - 1] > max(vmax_u, v_at_zmin):
        vref = vtop[lmin - 1]
        if n_u > 0:
            qref2 = (1.0 - vmax_u / vref) * (1.0 + vmax_u / vref)
            xc, tc, dc = _sum_pieces(1.0 / vref, vmax_u, qref2, va, vb, h, w, n_u)
        else:
            xc = 0.0
            tc = 0.0
        if x >= xc:
            t = tc + (x - xc) / vref
            if t < best_t:
                best_t = t
                best_p = 1.0 / vref
                best_code = 3
                best_k = lmin
                best_deep = zmax
    # ---- direct ray (no turning point)
    if mode == 0 or mode == 1:
        if n_u == 0:
            # both ends at one depth: horizontal ray in a constant-velocity layer
            if x == 0.0:
                best_t = 0.0
                best_p = 0.0
                best_code = 1
                best_k = 0
                best_deep = zmax
            elif grad[lb] == 0.0:
                t = x / v_at_zmax
                if t < best_t:
                    best_t = t
                    best_p = 1.0 / v_at_zmax
                    best_code = 1
                    best_k = 0
                    best_deep = zmax
        else:
            p, t = _solve_monotone(x, vmax_u, va, vb, h, w, n_u)
            if t < best_t:
                best_t = t
                best_p = p
                best_code = 1
                best_k = 0
                best_deep = zmax
    # ---- diving rays turning inside gradient layers at or below zmax:
    # branch and bound, the layer with the lowest lower bound on T first.
    # A head-wave pick along a refractor whose velocity rises with depth is
    # matched by the ray diving just beneath that interface (the kinematic head
    # wave does not exist there).
    dive_head = mode == 2 and 0 <= kwant < nl - 1 and grad[kwant + 1] > 0.0 and kwant >= lb
    if mode == 0 or mode == 1 or dive_head:
        nc = 0
        for l in range(lb, nl):
            if grad[l] <= 0.0:
                continue
            if dive_head and l != kwant + 1:
                continue
            idx = n_u + (l - lb)
            if not np.isfinite(va[idx]) or va[idx] <= 0.0:
                break
            vabove = vmx[idx - 1] if idx > 0 else 0.0
            if not np.isfinite(vabove):
                break
            vend = vb[idx]
            if vabove >= vend:
                continue
            vref = max(va[idx], vabove)
            # qr at the deep end of the interval (turning at the layer base; 1 for p = 0)
            rr = vref / vend if np.isfinite(vend) else 0.0
            if not (rr < 1.0):
                continue
            qtop = np.sqrt((1.0 - rr) * (1.0 + rr))
            plo = rr / vref
            # tau grows with qr, so T >= tau(qr = 0) + plo x
            bound = plo * x
            if va[idx] >= vabove:
                xs0, ts0, ds0 = _diving_eval(0.0, vref, va, vb, h, w, idx, va[idx], grad[l])
                if np.isfinite(ts0):
                    bound += ts0 - xs0 / vref
            c_layer[nc] = l
            c_bound[nc] = bound
            c_plo[nc] = qtop
            c_phi[nc] = vref
            nc += 1
        for _ in range(nc):
            ib = -1
            lowest = best_t
            for c in range(nc):
                if c_bound[c] < lowest:
                    lowest = c_bound[c]
                    ib = c
            if ib < 0:
                break
            c_bound[ib] = np.inf
            l = c_layer[ib]
            idx = n_u + (l - lb)
            p, t = _earliest_diving(x, c_plo[ib], c_phi[ib], va, vb, h, w, idx, va[idx], grad[l], best_t,
                                    pg, fg, dg, tg)
            if t < best_t:
                best_t = t
                best_p = p
                best_code = 2
                best_k = kwant + 1 if dive_head else 0
                best_deep = (ztop[l] if l > lb else zmax) + (1.0 / p - va[idx]) / grad[l]
    # ---- reflections from interfaces below zmax
    if mode == 0 or mode == 3:
        for l in range(lb, nl - 1):
            k = l
            if mode == 3 and k != kwant:
                continue
            idx = n_u + (l - lb)
            vm = vmx[idx]
            if not np.isfinite(vm):
                break
            if mode == 0:
                # lower bound: T_refl(x) = max_p [tau(p) + p x] >= tau(0)
                xs0, ts0, ds0 = _sum_pieces(0.0, 1.0, 1.0, va, vb, h, w, idx + 1)
                if ts0 >= best_t:
                    continue
            p, t = _solve_monotone(x, vm, va, vb, h, w, idx + 1)
            if t < best_t:
                best_t = t
                best_p = p
                best_code = 4
                best_k = k + 1
                best_deep = ztop[l + 1]
    if best_code == 0:
        return np.inf, nan, 0, 0, nan
    return best_t, best_p, best_code, best_k, best_deep


@_jit
def _kernel(ztop, vtop, grad, x, zs, zr, mode, kwant, full):
    nm, nl = vtop.shape
    npk = x.shape[1]
    gx = x.shape[0] > 1
    time = np.empty((nm, npk))
    # with full = False only times are returned (the other arrays are 1 x 1 placeholders)
    shape = (nm, npk) if full else (1, 1)
    pout = np.empty(shape)
    code = np.zeros(shape, dtype=np.int8)
    iface = np.zeros(shape, dtype=np.int16)
    deep = np.empty(shape)
    nmax = 2 * nl + 2
    va = np.empty(nmax)
    vb = np.empty(nmax)
    h = np.empty(nmax)
    w = np.empty(nmax)
    vmx = np.empty(nmax)
    c_layer = np.empty(nl, dtype=np.int64)
    c_bound = np.empty(nl)
    c_plo = np.empty(nl)  # qr at the deep end of each diving interval
    c_phi = np.empty(nl)  # reference velocity of each diving interval
    pg = np.empty(N_SCAN + 2)
    fg = np.empty(N_SCAN + 2)
    dg = np.empty(N_SCAN + 2)
    tg = np.empty(N_SCAN + 2)
    for m in range(nm):
        g = m if gx else 0
        for j in range(npk):
            t, p, c, k, d = _pick(ztop[m], vtop[m], grad[m], x[g, j], zs[g, j], zr[g, j], mode, kwant,
                                  va, vb, h, w, vmx, c_layer, c_bound, c_plo, c_phi, pg, fg, dg, tg)
            time[m, j] = t
            if full:
                pout[m, j] = p
                code[m, j] = c
                iface[m, j] = k
                deep[m, j] = d
    return time, pout, code, iface, deep


@_jit
def _kernel_surface_constant(thick, vel, x, full):
    """First arrivals for surface ends and constant layers: lower envelope of lines.

    Direct wave x / v1 and head waves t_k + x / V_k beyond their critical
    distance (Telford, Geldart & Sheriff 1990, ch. 4).
    """
    nm, nl = vel.shape
    npk = x.shape[0]
    time = np.empty((nm, npk))
    shape = (nm, npk) if full else (1, 1)
    pout = np.empty(shape)
    code = np.empty(shape, dtype=np.int8)
    iface = np.zeros(shape, dtype=np.int16)
    deep = np.zeros(shape)
    icpt = np.empty(nl)
    xcrit = np.empty(nl)
    slow = np.empty(nl)
    ok = np.zeros(nl, dtype=np.bool_)
    depth = np.empty(nl)
    for m in range(nm):
        v0 = vel[m, 0]
        if v0 <= 0.0:
            for j in range(npk):
                time[m, j] = np.inf
                if full:
                    pout[m, j] = np.nan
                    code[m, j] = 0
                    deep[m, j] = np.nan
            continue
        vmax = v0
        zacc = 0.0
        for k in range(nl - 1):
            zacc += thick[m, k]
            depth[k] = zacc
            vk = vel[m, k + 1]
            ok[k] = vk > vmax
            if vel[m, k] <= 0.0:  # a fluid layer blocks S below it
                vmax = np.inf
                ok[k] = False
            if ok[k]:
                p = 1.0 / vk
                ti = 0.0
                xi = 0.0
                for i in range(k + 1):
                    r = vel[m, i] * p
                    q = np.sqrt((1.0 - r) * (1.0 + r))
                    ti += 2.0 * thick[m, i] * q / vel[m, i]
                    xi += 2.0 * thick[m, i] * r / q
                icpt[k] = ti
                xcrit[k] = xi
                slow[k] = p
            vmax = max(vmax, vk)
        for j in range(npk):
            xj = x[j]
            best = xj / v0
            bp = 1.0 / v0 if xj > 0.0 else 0.0
            bc = 1
            bk = 0
            bd = 0.0
            for k in range(nl - 1):
                if ok[k] and xj >= xcrit[k]:
                    t = icpt[k] + slow[k] * xj
                    if t < best:
                        best = t
                        bp = slow[k]
                        bc = 3
                        bk = k + 1
                        bd = depth[k]
            time[m, j] = best
            if full:
                pout[m, j] = bp
                code[m, j] = bc
                iface[m, j] = bk
                deep[m, j] = bd
    return time, pout, code, iface, deep


# ----------------------------------------------------------------------------
# Public interface
# ----------------------------------------------------------------------------
def _geometry(distance, source_depth, receiver_depth, n_models=None):
    """Validate pick geometry; returns three (G, picks) arrays, G = 1 or n_models."""
    arrays = {}
    for name, val in (("distance", distance), ("source_depth", source_depth), ("receiver_depth", receiver_depth)):
        arrays[name] = np.asarray(val, dtype=float)
    x = arrays["distance"]
    if x.ndim == 1 and all(a.ndim == 0 or a.shape == x.shape for a in arrays.values()):
        # common case, checked cheaply: one geometry shared by every model
        out = [np.ascontiguousarray(a if a.ndim else np.full(x.shape, float(a)))[None, :] for a in arrays.values()]
        total = out[0].sum() + out[1].sum() + out[2].sum()
        if np.isfinite(total) and (x.size == 0 or out[0].min() >= 0):
            return out
    x = arrays["distance"]
    if x.ndim == 0:
        x = x[None]
    if x.ndim not in (1, 2):
        raise ValueError(f"distance: expected shape (picks,) or (models, picks), got {x.shape}")
    n = x.shape[-1]
    rows = {a.shape[0] for a in arrays.values() if a.ndim == 2}
    if len(rows) > 1 or (rows and n_models is not None and rows != {n_models} and rows != {1}):
        raise ValueError(f"geometry: per-model geometry must have {n_models} rows, got {sorted(rows)}")
    g = rows.pop() if rows else 1
    out = []
    for name, arr in arrays.items():
        if arr.ndim == 0:
            arr = np.full((1, n), float(arr))
        elif arr.ndim == 1:
            arr = arr[None, :]
        if arr.shape[-1] != n:
            raise ValueError(f"{name}: expected {n} picks to match distance, got shape {arr.shape}")
        arr = np.broadcast_to(arr, (g, n))
        bad = ~np.isfinite(arr)
        if bad.any():
            j = int(np.argwhere(bad)[0, 1])
            raise ValueError(f"{name}: pick {j} is {arr[bad][0]} (not a finite number)")
        out.append(np.ascontiguousarray(arr))
    if (out[0] < 0).any():
        j = int(np.argwhere(out[0] < 0)[0, 1])
        raise ValueError(f"distance: pick {j} has negative distance {out[0][out[0] < 0][0]:g}")
    return out


def travel_times(model: LayerModel, wave: str, distance, source_depth=0.0, receiver_depth=0.0, *,
                 branch: str = "first", interface: int | None = None) -> Arrivals:
    """Travel times of P or S for every model of a batch and every pick.

    Parameters
    ----------
    model : LayerModel
        Batch of layered models (lengths and velocities in one unit system).
    wave : {'P', 'S'}
        Wave type; S uses the S velocities and cannot cross fluid layers.
    distance : array (picks,) or (models, picks)
        Horizontal source-receiver distance [length], >= 0. A leading model
        axis gives every model its own geometry (sampled event positions).
    source_depth, receiver_depth : float or array (picks,) or (models, picks)
        Depths below the datum [length]; negative above it (the top layer
        extends upward).
    branch : {'first', 'direct', 'head', 'reflection'}
        'first' is the earliest of all branches; 'direct' the earliest direct
        or diving ray; 'head' and 'reflection' need ``interface``.
    interface : int, optional
        Interface number k >= 1 (the base of layer k) for head waves and
        reflections.

    Returns
    -------
    Arrivals
        Times [s] of shape (models, picks), ray parameters [s/length], branch
        codes, interfaces and deepest points; absent arrivals are ``inf``.
    """
    wave = _check_wave(wave)
    if branch not in _MODES:
        raise ValueError(f"branch: expected one of {', '.join(_MODES)}, got {branch!r}")
    mode = _MODES[branch]
    n_if = model.n_layers - 1
    if mode >= 2:
        if interface is None or int(interface) != interface or not 1 <= int(interface) <= n_if:
            raise ValueError(f"interface: branch {branch!r} needs an interface number 1..{n_if}, got {interface!r}")
        kwant = int(interface) - 1
    else:
        if interface is not None:
            raise ValueError(f"interface: only head and reflection branches take an interface (branch {branch!r})")
        kwant = -1
    x, zs, zr = _geometry(distance, source_depth, receiver_depth, model.n_models)
    return _arrivals(model, wave, x, zs, zr, mode, kwant)


def _arrivals(model: LayerModel, wave: str, x, zs, zr, mode: int, kwant: int, full: bool = True) -> Arrivals:
    """travel_times after validation: geometry (G, picks) contiguous float arrays, G = 1 or models.

    With ``full = False`` only ``time`` is filled (the other fields are 1 x 1 placeholders).
    """
    vtop, grad = model.velocity(wave)
    vtop = np.ascontiguousarray(vtop)
    grad = np.ascontiguousarray(grad)
    if mode == 0 and x.shape[0] == 1 and not grad.any() and not zs.any() and not zr.any():
        out = _kernel_surface_constant(np.ascontiguousarray(model.thickness), vtop, x[0], full)
    else:
        ztop = np.ascontiguousarray(model.layer_tops)
        out = _kernel(ztop, vtop, grad, x, zs, zr, mode, kwant, full)
    time, p, code, iface, deep = out
    return Arrivals(time, p, code, iface, deep)


def pick_groups(wave, branch, interface) -> list[tuple[str, str, int, np.ndarray]]:
    """Group picks by (wave, branch, interface) once: [(wave, branch, interface, indices), ...].

    Pass the result to :func:`predict` as ``groups`` to skip the grouping on
    every call (the sampler calls ``predict`` many thousands of times).
    """
    wave = np.asarray(wave).astype(str)
    branch = np.asarray(branch).astype(str)
    interface = np.asarray(interface, dtype=int)
    n = max(wave.size, branch.size, interface.size)
    wave, branch, interface = (np.broadcast_to(a, (n,)) for a in (wave, branch, interface))
    keys = np.char.add(np.char.add(wave, "|"), np.char.add(np.char.add(branch, "|"), interface.astype(str)))
    out = []
    for key in np.unique(keys):
        sel = np.flatnonzero(keys == key)
        w, b, k = key.split("|")
        out.append((w, b, int(k), sel))
    return out


def predict(model: LayerModel, wave, branch, interface, distance, source_depth, receiver_depth, *,
            return_deepest: bool = False, groups=None):
    """Times [s] (models, picks) for picks of mixed wave, branch and interface.

    Picks sharing (wave, branch, interface) are computed in one batched call.
    ``wave`` holds 'P'/'S', ``branch`` 'first'/'direct'/'head'/'reflection',
    ``interface`` ints (0 where not applicable); geometry arrays are (picks,)
    or (models, picks). ``groups`` (from :func:`pick_groups`) may replace the
    three label arrays. With ``return_deepest`` also the deepest point of every
    ray [length] (models, picks), for the depth of investigation.
    """
    x, zs, zr = _geometry(distance, source_depth, receiver_depth, model.n_models)
    n = x.shape[1]
    if groups is None:
        groups = pick_groups(np.broadcast_to(np.asarray(wave), (n,)), np.broadcast_to(np.asarray(branch), (n,)),
                             np.broadcast_to(np.asarray(interface, dtype=int), (n,)))
    out = np.empty((model.n_models, n))
    deep = np.empty((model.n_models, n)) if return_deepest else None
    whole = len(groups) == 1 and groups[0][3].size == n
    n_if = model.n_layers - 1
    for w, b, k, sel in groups:
        mode = _MODES.get(b)
        if mode is None:
            raise ValueError(f"branch: expected one of {', '.join(_MODES)}, got {b!r}")
        if mode >= 2 and not 1 <= k <= n_if:
            raise ValueError(f"interface: branch {b!r} needs an interface number 1..{n_if}, got {k!r}")
        if w not in ("P", "S"):
            _check_wave(w)
        kk = k - 1 if mode >= 2 else -1
        if whole:
            arr = _arrivals(model, w, x, zs, zr, mode, kk, return_deepest)
        else:
            arr = _arrivals(model, w, np.ascontiguousarray(x[:, sel]), np.ascontiguousarray(zs[:, sel]),
                            np.ascontiguousarray(zr[:, sel]), mode, kk, return_deepest)
        if whole:
            out = arr.time
            deep = arr.deepest if return_deepest else None
        else:
            out[:, sel] = arr.time
            if return_deepest:
                deep[:, sel] = arr.deepest
    return (out, deep) if return_deepest else out
