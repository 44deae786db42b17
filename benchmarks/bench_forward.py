"""Throughput of the forward engine: first-arrival times per second.

Two synthetic batches (invented models and geometry, seeded; metres and m/s):

(a) "surface"  -- 64 models x 500 offsets; 4 constant-velocity layers over a
    half-space, velocity increasing with depth; sources and receivers at the
    surface. The engine takes its lower-envelope-of-lines kernel here.
(b) "buried"   -- 64 models x 500 picks; the same kind of models with linear
    velocity gradients in 2 or 3 of the 5 layers; sources 0-20 m deep,
    receivers at borehole levels 0-40 m, offsets 1-400 m. The engine takes its
    general per-pick kernel (direct, diving, head and reflected rays).

For each batch the engine ``invert.forward.travel_times`` is timed against
baselines measured in the same run:

* a straightforward per-pick Python loop -- for (a) plain Python floats with
  the intercept-time formulas of the head waves (Telford, Geldart & Sheriff,
  *Applied Geophysics*, 2nd ed., 1990, ch. 4), for (b) a Python loop over
  models and picks calling the compiled scalar routine ``invert.forward._pick``
  once per pick (timed on a few evenly spread models, rate per pick, against
  the engine timed on the same models);
* a plain numpy broadcast -- for (a) the line values t_k + x / V_k on a
  (models, interfaces, picks) array masked before the critical distance, for
  (b) a simplified vectorised solver of the direct and diving rays only
  (bisection in p for the direct ray, a coarse p-grid scan for diving rays),
  of lower accuracy; its difference from the engine is printed.

Every baseline is checked against the engine before it is timed. Timings are
the best of several repeats (each at least ``--min-time`` seconds, garbage
collector off, the methods of a case interleaved round by round); the machine
is shared, so single figures are noisy and only the ratios measured in one
run are meant to be compared. Everything runs on one thread
(NUMBA_NUM_THREADS=1, set before numba is imported).

This is a program that prints figures; it exits non-zero only when a
correctness check fails, never because of a timing.
"""

from __future__ import annotations

import os

# One thread for numba and for any threaded numpy backend; set before they are imported.
os.environ["NUMBA_NUM_THREADS"] = "1"
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import gc  # noqa: E402
import math  # noqa: E402
import platform  # noqa: E402
import shutil  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

N_MODELS = 64
N_PICKS = 500
SEED_SURFACE = 20250101
SEED_BURIED = 20250202
TARGET_SURFACE = 1e8  # times/s on one core
TARGET_BURIED = 1e7
TOL_EXACT = 1e-12  # s; baselines that compute the same formulas must agree to this
N_BISECT = 55  # bisection steps of the numpy direct-ray baseline
N_GRID = 16  # p samples per gradient layer in the numpy diving-ray baseline


# ----------------------------------------------------------------------------
# Synthetic batches
# ----------------------------------------------------------------------------
def synthetic_surface_batch(rng: np.random.Generator):
    """Batch (a): thickness (M, 4) [m], vp (M, 5) [m/s], offsets (P,) [m]; synthetic."""
    thickness = rng.uniform(3.0, 15.0, size=(N_MODELS, 4))
    vp = np.empty((N_MODELS, 5))
    vp[:, 0] = rng.uniform(300.0, 700.0, size=N_MODELS)
    for j in range(1, 5):
        vp[:, j] = vp[:, j - 1] * rng.uniform(1.25, 1.8, size=N_MODELS)
    offsets = np.sort(rng.uniform(1.0, 400.0, size=N_PICKS))
    return thickness, vp, offsets


def synthetic_buried_batch(rng: np.random.Generator):
    """Batch (b): thickness, vp (top of layer), gradient [1/s], offsets, source and receiver depths.

    Gradients of 5-25 1/s sit in 2 or 3 of the 5 layers (the half-space may be
    one of them); the top of every layer is faster than the base of the one
    above, so velocity increases with depth everywhere. Synthetic.
    """
    thickness = rng.uniform(3.0, 15.0, size=(N_MODELS, 4))
    gradient = np.zeros((N_MODELS, 5))
    for m in range(N_MODELS):
        layers = rng.choice(5, size=rng.integers(2, 4), replace=False)
        gradient[m, layers] = rng.uniform(5.0, 25.0, size=layers.size)
    vp = np.empty((N_MODELS, 5))
    vp[:, 0] = rng.uniform(300.0, 700.0, size=N_MODELS)
    for j in range(1, 5):
        base_above = vp[:, j - 1] + gradient[:, j - 1] * thickness[:, j - 1]
        vp[:, j] = base_above * rng.uniform(1.15, 1.6, size=N_MODELS)
    offsets = rng.uniform(1.0, 400.0, size=N_PICKS)
    source_depth = np.where(rng.random(N_PICKS) < 0.2, 0.0, rng.uniform(0.0, 20.0, size=N_PICKS))
    receiver_depth = 2.0 * rng.integers(0, 21, size=N_PICKS)  # borehole levels 0, 2, ..., 40 m
    return thickness, vp, gradient, offsets, source_depth, receiver_depth


# ----------------------------------------------------------------------------
# Baselines for (a): surface ends, constant layers
# ----------------------------------------------------------------------------
def loop_surface_constant(thickness: np.ndarray, vp: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """First arrivals (M, P) [s] with a plain Python loop over models and picks.

    Per model the head wave along interface k (faster than every layer above)
    has intercept time t_k = sum_i 2 h_i cos(theta_i) / v_i and critical
    distance x_k = sum_i 2 h_i tan(theta_i), sin(theta_i) = v_i / V_k
    (Telford, Geldart & Sheriff 1990, ch. 4); per pick the earliest of the
    direct wave x / v_1 and the head waves t_k + x / V_k with x >= x_k is kept.
    """
    th_rows = thickness.tolist()
    v_rows = vp.tolist()
    xs = offsets.tolist()
    out = []
    for h, v in zip(th_rows, v_rows):
        lines = []  # (intercept, slowness, critical distance)
        vmax = v[0]
        for k in range(len(h)):
            vk = v[k + 1]
            if vk > vmax:
                ti = 0.0
                xc = 0.0
                for i in range(k + 1):
                    s = v[i] / vk
                    c = math.sqrt((1.0 - s) * (1.0 + s))
                    ti += 2.0 * h[i] * c / v[i]
                    xc += 2.0 * h[i] * s / c
                lines.append((ti, 1.0 / vk, xc))
            vmax = max(vmax, vk)
        v1 = v[0]
        row = []
        for x in xs:
            best = x / v1
            for ti, slow, xc in lines:
                if x >= xc:
                    t = ti + slow * x
                    if t < best:
                        best = t
            row.append(best)
        out.append(row)
    return np.array(out)


def numpy_surface_constant(thickness: np.ndarray, vp: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """First arrivals (M, P) [s] by broadcasting over (models, interfaces, picks).

    Same formulas as :func:`loop_surface_constant`; lines are set to inf before
    their critical distance and the minimum is taken over the interface axis.
    """
    n_if = thickness.shape[1]
    v_above = vp[:, None, :n_if]  # (M, 1, i)
    v_below = vp[:, 1:, None]  # (M, k, 1)
    above = np.tril(np.ones((n_if, n_if), dtype=bool))[None]  # i <= k
    s = np.where(above, v_above / v_below, 0.0)
    c = np.sqrt((1.0 - s) * (1.0 + s))
    h2 = 2.0 * thickness[:, None, :]
    intercept = np.sum(np.where(above, h2 * c / v_above, 0.0), axis=2)  # (M, k)
    x_crit = np.sum(np.where(above, h2 * s / c, 0.0), axis=2)
    exists = vp[:, 1:] > np.maximum.accumulate(vp[:, :-1], axis=1)
    x = offsets[None, None, :]
    lines = intercept[:, :, None] + x / vp[:, 1:, None]
    lines = np.where(exists[:, :, None] & (x >= x_crit[:, :, None]), lines, np.inf)
    return np.minimum(offsets[None, :] / vp[:, :1], lines.min(axis=1))


# ----------------------------------------------------------------------------
# Baselines for (b): buried ends, gradient layers
# ----------------------------------------------------------------------------
def loop_pick_scalar(pick, ztop, vtop, grad, offsets, source_depth, receiver_depth, n_scan):
    """First arrivals (M, P) [s]: Python loop calling the compiled scalar ``pick`` per pick.

    The scratch arrays are those the engine's batch kernel allocates once and
    passes to the same routine.
    """
    n_layers = vtop.shape[1]
    nmax = 2 * n_layers + 2
    va, vb, h, w, vmx = (np.empty(nmax) for _ in range(5))
    c_layer = np.empty(n_layers, dtype=np.int64)
    c_bound, c_plo, c_phi = (np.empty(n_layers) for _ in range(3))
    pg, fg, dg, tg = (np.empty(n_scan + 2) for _ in range(4))
    geometry = list(zip(offsets.tolist(), source_depth.tolist(), receiver_depth.tolist()))
    out = np.empty((vtop.shape[0], len(geometry)))
    for m in range(vtop.shape[0]):
        zt, vt, gr = ztop[m], vtop[m], grad[m]
        row = out[m]
        for j, (x, zs, zr) in enumerate(geometry):
            row[j] = pick(zt, vt, gr, x, zs, zr, 0, -1, va, vb, h, w, vmx,
                          c_layer, c_bound, c_plo, c_phi, pg, fg, dg, tg)[0]
    return out


def _velocity_at(depth, vtop, grad, zref):
    return vtop + grad * (depth - zref)


def _segment_xt(p, va, vb, h, g):
    """One-way X, T through a linear-velocity segment va -> vb of thickness h (arrays).

    X = p h (va + vb) / (qa + qb), q = sqrt(1 - p^2 v^2); T = h / (v q) for a
    constant segment, ln(vb (1 + qa) / (va (1 + qb))) / g otherwise (Buland &
    Chapman, BSSA 73, 1983; Shearer, Introduction to Seismology, 2nd ed.,
    2009, ch. 4).
    """
    pa = p * va
    pb = p * vb
    qa = np.sqrt((1.0 - pa) * (1.0 + pa))
    qb = np.sqrt((1.0 - pb) * (1.0 + pb))
    x = p * h * (va + vb) / (qa + qb)
    t = np.where(g == 0.0, h / (va * qa), np.log(vb * (1.0 + qa) / (va * (1.0 + qb))) / g)
    return x, t


class NumpyDirectDiving:
    """Simplified vectorised solver of the earliest direct or diving ray (lower accuracy).

    All (model, pick) pairs at once as flat arrays, loops over layers only:

    * direct ray (no turning point between the two ends): X(p) grows with p, so
      p is found by ``N_BISECT`` bisection steps on [0, 1 / v_max];
    * diving rays (turning in a gradient layer below the deeper end): for every
      such layer X(p) is sampled at ``N_GRID`` evenly spaced ray parameters of
      the rays turning inside it, every sign change of X - x gives a root by
      linear interpolation, and per layer the root of the earliest interpolated
      time is evaluated once more at its interpolated p. Roots hidden between two
      samples, or closer than the first sample to an end of the interval, are
      missed.

    In both cases the time at an approximate root p is T(p) + p (x - X(p)),
    which is stationary in p. Each step works only on the pairs it concerns.
    """

    def __init__(self, ztop, vtop, grad, offsets, source_depth, receiver_depth):
        n_models, n_layers = vtop.shape
        self.shape = (n_models, offsets.size)
        model = np.repeat(np.arange(n_models), offsets.size)  # model of every pair
        self.x = np.tile(offsets, n_models)
        zmin = np.tile(np.minimum(source_depth, receiver_depth), n_models)
        zmax = np.tile(np.maximum(source_depth, receiver_depth), n_models)
        tops = ztop.copy()
        tops[:, 0] = -np.inf  # the top layer extends above the datum
        bots = np.concatenate([ztop[:, 1:], np.full((n_models, 1), np.inf)], axis=1)
        self.between = []  # (on, va, vb, h, g) of the segment of every layer between the two ends
        self.below = []  # the same from the deeper end down
        vmax = np.zeros_like(self.x)
        for l in range(n_layers):
            top, bot, zref, vt, g = (a[model, l] for a in (tops, bots, ztop, vtop, grad))
            a = np.maximum(zmin, top)
            b = np.minimum(zmax, bot)
            on = b > a
            va = _velocity_at(a, vt, g, zref)
            vb = _velocity_at(b, vt, g, zref)
            self.between.append((on, va, vb, np.where(on, b - a, 0.0), g))
            vmax = np.where(on, np.maximum(vmax, np.maximum(va, vb)), vmax)
            a = np.maximum(zmax, top)
            on = bot > a
            va = _velocity_at(a, vt, g, zref)
            vb = _velocity_at(bot, vt, g, zref) if l < n_layers - 1 else np.where(g > 0.0, np.inf, va)
            self.below.append((on, va, vb, np.where(on, bot - a, 0.0), g))
        self.vmax_between = vmax
        self.has_between = vmax > 0.0
        # layer holding the deeper end (a depth on an interface belongs to the layer below)
        lb = np.sum(zmax[:, None] >= ztop[model, 1:], axis=1)
        self.g_at_zmax = grad[model, lb]
        self.v_at_zmax = _velocity_at(zmax, vtop[model, lb], self.g_at_zmax, ztop[model, lb])
        # diving intervals, one per layer below the deeper end: rays turning in
        # layer l have 1 / v_base(l) < p < 1 / max(v_top(l), fastest velocity above).
        # Below the half-space top a ray turning at depth D travels at least 2 D
        # horizontally, so the half-space is scanned down to D = x / 2 only.
        hs_top = np.maximum(zmax, ztop[model, -1])
        v_hs_cap = _velocity_at(hs_top + 0.51 * self.x + 1.0, vtop[model, -1], grad[model, -1], ztop[model, -1])
        self.intervals = []  # (p_lo, p_hi, pairs to scan) per layer
        v_run = vmax
        for on, va, vb, h, g in self.below:
            v_end = np.where(np.isinf(vb), v_hs_cap, vb)
            v_top = np.maximum(va, v_run)
            scan = on & (g > 0.0) & (v_top < v_end)
            self.intervals.append((1.0 / v_end, 1.0 / v_top, np.flatnonzero(scan)))
            v_run = np.where(on, np.maximum(v_run, np.maximum(va, v_end)), v_run)

    @staticmethod
    def _take(segments, sel):
        """Segments restricted to the pairs ``sel`` (column vectors), dropping absent ones."""
        out = []
        for seg in segments:
            on = seg[0][sel]
            if on.any():
                out.append(tuple(a[sel, None] for a in seg))
        return out

    @staticmethod
    def _between_x(p, between):
        """X(p) between the two ends only (what the bisection needs)."""
        xs = 0.0
        for on, va, vb, h, g in between:
            pa = p * va
            pb = p * vb
            q = np.sqrt((1.0 - pa) * (1.0 + pa)) + np.sqrt((1.0 - pb) * (1.0 + pb))
            xs = xs + np.where(on, p * h * (va + vb) / q, 0.0)
        return xs

    @staticmethod
    def _between_xt(p, between):
        xs = 0.0
        ts = 0.0
        for on, va, vb, h, g in between:
            x, t = _segment_xt(p, va, vb, h, g)
            xs = xs + np.where(on, x, 0.0)
            ts = ts + np.where(on, t, 0.0)
        return xs, ts

    @staticmethod
    def _diving_xt(p, between, below):
        """X, T of rays with parameter p turning below the deeper end; nan where none."""
        xs, ts = NumpyDirectDiving._between_xt(p, between)
        xd = np.zeros(np.broadcast(p, xs).shape)
        td = np.zeros_like(xd)
        turned = np.zeros(xd.shape, dtype=bool)
        blocked = np.zeros(xd.shape, dtype=bool)
        for on, va, vb, h, g in below:
            live = on & ~turned & ~blocked
            pa = p * va
            pb = p * vb
            blocked |= live & (pa >= 1.0)  # faster layer: reflected, not diving
            passes = live & (pa < 1.0) & (pb < 1.0)
            turns = live & (pa < 1.0) & (pb >= 1.0) & (g > 0.0)
            x, t = _segment_xt(p, va, np.where(passes, vb, va), np.where(passes, h, 0.0), g)
            qa = np.sqrt((1.0 - pa) * (1.0 + pa))
            xd += np.where(passes, x, 0.0) + np.where(turns, qa / (p * g), 0.0)
            td += np.where(passes, t, 0.0) + np.where(turns, np.log((1.0 + qa) / pa) / g, 0.0)
            turned |= turns
        ok = turned & ~blocked
        return np.where(ok, xs + 2.0 * xd, np.nan), np.where(ok, ts + 2.0 * td, np.nan)

    def direct(self) -> np.ndarray:
        """Direct-ray times (pairs,); inf where no direct ray reaches."""
        # both ends at one depth: a horizontal ray exists only in a constant layer
        t = np.where(self.g_at_zmax == 0.0, self.x / self.v_at_zmax, np.inf)
        sel = np.flatnonzero(self.has_between)
        between = self._take(self.between, sel)
        x = self.x[sel, None]
        p_hi = 1.0 / self.vmax_between[sel, None]
        x_hi = self._between_x(p_hi, between)
        lo = np.zeros_like(p_hi)
        hi = p_hi
        for _ in range(N_BISECT):
            mid = 0.5 * (lo + hi)
            xm = self._between_x(mid, between)
            short = xm < x
            lo = np.where(short, mid, lo)
            hi = np.where(short, hi, mid)
        p = 0.5 * (lo + hi)
        xp, tp = self._between_xt(p, between)
        t[sel] = np.where(x <= x_hi, tp + p * (x - xp), np.inf)[:, 0]
        return t

    def diving(self) -> np.ndarray:
        """Earliest diving-ray times (pairs,); inf where none is found."""
        s = np.linspace(1e-9, 1.0 - 1e-9, N_GRID)  # ends nudged inside the interval
        t_best = np.full(self.x.shape, np.inf)
        for l, (p_lo, p_hi, sel) in enumerate(self.intervals):
            if sel.size == 0:
                continue
            between = self._take(self.between, sel)
            below = self._take(self.below[:l + 1], sel)
            x = self.x[sel, None]
            p = p_lo[sel, None] + (p_hi[sel, None] - p_lo[sel, None]) * s  # (pairs, N_GRID)
            xg, tg = self._diving_xt(p, between, below)
            f = xg - x
            f0, f1 = f[:, :-1], f[:, 1:]
            cross = np.isfinite(f0) & np.isfinite(f1) & ((f0 > 0.0) != (f1 > 0.0))
            frac = np.where(cross, f0 / np.where(cross, f0 - f1, 1.0), 0.0)
            p_root = p[:, :-1] + frac * (p[:, 1:] - p[:, :-1])
            t_root = np.where(cross, tg[:, :-1] + frac * (tg[:, 1:] - tg[:, :-1]), np.inf)
            k = np.argmin(t_root, axis=1)[:, None]
            t_lin = np.take_along_axis(t_root, k, axis=1)
            # the earliest interpolated root of this layer, evaluated once more
            p_one = np.where(np.isfinite(t_lin), np.take_along_axis(p_root, k, axis=1), np.nan)
            xb, tb = self._diving_xt(p_one, between, below)
            t = np.where(np.isfinite(tb), tb + p_one * (x - xb), t_lin)[:, 0]
            t_best[sel] = np.minimum(t_best[sel], t)
        return t_best

    def first_direct_or_diving(self) -> np.ndarray:
        """Earliest direct or diving ray (models, picks) [s]."""
        with np.errstate(all="ignore"):
            return np.minimum(self.direct(), self.diving()).reshape(self.shape)


def numpy_direct_diving(ztop, vtop, grad, offsets, source_depth, receiver_depth) -> np.ndarray:
    """Earliest direct or diving ray (M, P) [s]; simplified, see :class:`NumpyDirectDiving`."""
    with np.errstate(all="ignore"):
        solver = NumpyDirectDiving(ztop, vtop, grad, offsets, source_depth, receiver_depth)
    return solver.first_direct_or_diving()


# ----------------------------------------------------------------------------
# Measuring
# ----------------------------------------------------------------------------
def best_times(methods: dict, repeats: int, min_time: float) -> dict:
    """Best seconds per call of every callable in ``methods``.

    Each method is first calibrated so that one repeat (a run of back-to-back
    calls) lasts at least ``min_time`` seconds; then ``repeats`` rounds run
    one repeat of every method in turn, so that all methods see the same
    background load, and the best repeat of each is kept. The garbage
    collector is off while timing. Returns {name: (seconds per call, calls per repeat)}.
    """
    calls = {}
    for name, fn in methods.items():
        n = 1
        while True:
            t0 = time.perf_counter()
            for _ in range(n):
                fn()
            dt = time.perf_counter() - t0
            if dt >= 0.05 * min_time or n >= 1 << 20:
                break
            n *= 4
        calls[name] = max(1, math.ceil(1.1 * min_time * n / dt))
    best = dict.fromkeys(methods, math.inf)
    gc_was_on = gc.isenabled()
    gc.disable()
    try:
        for _ in range(repeats):
            for name, fn in methods.items():
                n = calls[name]
                t0 = time.perf_counter()
                for _ in range(n):
                    fn()
                best[name] = min(best[name], (time.perf_counter() - t0) / n)
    finally:
        if gc_was_on:
            gc.enable()
    return {name: (best[name], calls[name]) for name in methods}


def compare(a: np.ndarray, b: np.ndarray) -> tuple[float, int]:
    """(max |a - b| where both are finite, number of picks finite in one only)."""
    fa, fb = np.isfinite(a), np.isfinite(b)
    both = fa & fb
    diff = float(np.max(np.abs(a[both] - b[both]))) if both.any() else 0.0
    return diff, int(np.count_nonzero(fa != fb))


def branch_mix(forward, arrivals) -> str:
    codes, counts = np.unique(arrivals.branch, return_counts=True)
    total = counts.sum()
    return ", ".join(f"{forward.BRANCH_NAMES[int(c)]} {100.0 * n / total:.1f}%" for c, n in zip(codes, counts))


def compile_note(*dispatchers) -> str:
    hits = sum(sum(d.stats.cache_hits.values()) for d in dispatchers)
    misses = sum(sum(d.stats.cache_misses.values()) for d in dispatchers)
    if hits and not misses:
        return "loaded from numba's on-disk cache, not compiled"
    if misses and not hits:
        return "compiled"
    return f"numba cache: {hits} hit(s), {misses} miss(es)"


class Report:
    def __init__(self):
        self.rows = []
        self.failures = []

    def check(self, label: str, diff: float, mismatched: int, tol: float | None) -> None:
        verdict = ""
        if tol is not None:
            ok = diff <= tol and mismatched == 0
            verdict = f"  (required <= {tol:g} s: {'ok' if ok else 'FAILED'})"
            if not ok:
                self.failures.append(label)
        print(f"  check {label}: max |difference| = {diff:.3g} s; "
              f"picks present in one only: {mismatched}{verdict}")

    def row(self, case, method, rate, reference_rate, target=None, note=""):
        self.rows.append((case, method, rate, reference_rate / rate, target, note))


def print_table(rows) -> None:
    head = ("case", "method", "times/s", "engine/method", "target")
    lines = []
    for case, method, rate, ratio, target, note in rows:
        if target is None:
            tgt = ""
        else:
            tgt = f">= {target:.0e}: {'met' if rate >= target else 'NOT met'}"
        lines.append((case, method + (f" [{note}]" if note else ""), f"{rate:.3e}", f"{ratio:.3g}", tgt))
    widths = [max(len(h), *(len(r[i]) for r in lines)) for i, h in enumerate(head)]
    fmt = "  ".join(f"{{:{'>' if i in (2, 3) else '<'}{w}}}" for i, w in enumerate(widths))
    print(fmt.format(*head))
    print("  ".join("-" * w for w in widths))
    for r in lines:
        print(fmt.format(*r))


# ----------------------------------------------------------------------------
# Cases
# ----------------------------------------------------------------------------
def case_surface(forward, LayerModel, report: Report, args) -> None:
    thickness, vp, offsets = synthetic_surface_batch(np.random.default_rng(SEED_SURFACE))
    model = LayerModel.build(thickness, vp, vpvs=1.9)
    n = model.n_models * offsets.size
    print(f"\n(a) surface: {model.n_models} models x {offsets.size} offsets, 4 constant layers over a "
          f"half-space, surface ends (synthetic, seed {SEED_SURFACE})")

    def engine():
        return forward.travel_times(model, "P", offsets)

    t0 = time.perf_counter()
    arrivals = engine()
    first_call = time.perf_counter() - t0
    print(f"  engine first call: {first_call:.2f} s ({compile_note(forward._kernel_surface_constant)})")
    print(f"  engine first-arrival mix: {branch_mix(forward, arrivals)}")
    t_engine = arrivals.time

    t_loop = loop_surface_constant(thickness, vp, offsets)
    report.check("(a) Python loop vs engine", *compare(t_loop, t_engine), TOL_EXACT)
    t_np = numpy_surface_constant(thickness, vp, offsets)
    report.check("(a) numpy broadcast vs engine", *compare(t_np, t_engine), TOL_EXACT)

    thick_c, vp_c = np.ascontiguousarray(model.thickness), np.ascontiguousarray(model.vp)
    timed = best_times({
        "engine": engine,
        # where the engine's time goes: the compiled kernel alone, without input checks
        "kernel": lambda: forward._kernel_surface_constant(thick_c, vp_c, offsets, True),
        "loop": lambda: loop_surface_constant(thickness, vp, offsets),
        "numpy": lambda: numpy_surface_constant(thickness, vp, offsets),
    }, args.repeats, args.min_time)
    sec, calls = timed["engine"]
    rate_engine = n / sec
    print(f"  engine: {sec * 1e3:.3f} ms per batch ({calls} calls per repeat); "
          f"compile time ~ {first_call - sec:.2f} s")
    report.row("(a) surface", "engine travel_times", rate_engine, rate_engine, TARGET_SURFACE)
    report.row("(a) surface", "engine kernel alone", n / timed["kernel"][0], rate_engine, TARGET_SURFACE,
               note="_kernel_surface_constant, no input checks")
    report.row("(a) surface", "Python loop per pick", n / timed["loop"][0], rate_engine)
    report.row("(a) surface", "numpy broadcast", n / timed["numpy"][0], rate_engine)


def case_buried(forward, LayerModel, report: Report, args) -> None:
    thickness, vp, gradient, offsets, zs, zr = synthetic_buried_batch(np.random.default_rng(SEED_BURIED))
    model = LayerModel.build(thickness, vp, vpvs=1.9, gradient=gradient)
    n = model.n_models * offsets.size
    print(f"\n(b) buried: {model.n_models} models x {offsets.size} picks, gradients in 2-3 of 5 layers, "
          f"sources 0-20 m, receivers 0-40 m, offsets 1-400 m (synthetic, seed {SEED_BURIED})")
    ztop = np.ascontiguousarray(model.layer_tops)
    vtop, grad = (np.ascontiguousarray(a) for a in model.velocity("P"))

    def engine():
        return forward.travel_times(model, "P", offsets, zs, zr)

    def engine_direct():
        return forward.travel_times(model, "P", offsets, zs, zr, branch="direct")

    t0 = time.perf_counter()
    arrivals = engine()
    first_call = time.perf_counter() - t0
    print(f"  engine first call: {first_call:.2f} s ({compile_note(forward._kernel, forward._pick)})")
    print(f"  engine first-arrival mix: {branch_mix(forward, arrivals)}")
    direct = engine_direct()
    print(f"  engine direct-or-diving mix: {branch_mix(forward, direct)}")

    t_loop = loop_pick_scalar(forward._pick, ztop, vtop, grad, offsets, zs, zr, forward.N_SCAN)
    report.check("(b) Python loop over _pick vs engine (all models)", *compare(t_loop, arrivals.time), TOL_EXACT)
    t_np = numpy_direct_diving(ztop, vtop, grad, offsets, zs, zr)
    diff, mism = compare(t_np, direct.time)
    report.check("(b) simplified numpy direct+diving vs engine branch='direct'", diff, mism, None)
    both = np.isfinite(t_np) & np.isfinite(direct.time)
    with np.errstate(invalid="ignore"):
        err = np.abs(t_np - direct.time)
    for code in (forward.BRANCH_DIRECT, forward.BRANCH_DIVING):
        sel = both & (direct.branch == code)
        if sel.any():
            print(f"    where the engine's ray is {forward.BRANCH_NAMES[code]}: max {err[sel].max():.3g} s, "
                  f"median {np.median(err[sel]):.3g} s, > 1e-6 s at {np.count_nonzero(err[sel] > 1e-6)} "
                  f"of {np.count_nonzero(sel)} picks")

    # the per-pick loop is slow: it is timed on evenly spread models, and the engine on the same ones
    n_loop = min(args.loop_models, model.n_models)
    sub = np.linspace(0, model.n_models - 1, n_loop).round().astype(int)
    sub_model = model.take(sub)
    sub_arrays = (ztop[sub], vtop[sub], grad[sub])
    timed = best_times({
        "engine": engine,
        "direct": engine_direct,
        "engine_sub": lambda: forward.travel_times(sub_model, "P", offsets, zs, zr),
        "loop_sub": lambda: loop_pick_scalar(forward._pick, *sub_arrays, offsets, zs, zr, forward.N_SCAN),
        "numpy": lambda: numpy_direct_diving(ztop, vtop, grad, offsets, zs, zr),
    }, args.repeats, args.min_time)
    sec, calls = timed["engine"]
    rate_engine = n / sec
    print(f"  engine: {sec * 1e3:.2f} ms per batch ({calls} calls per repeat); "
          f"compile time ~ {first_call - sec:.2f} s")
    rate_direct = n / timed["direct"][0]
    n_sub = n_loop * offsets.size
    rate_sub = n_sub / timed["engine_sub"][0]
    label = f"{n_loop} of {model.n_models} models"
    report.row("(b) buried", "engine travel_times, first arrival", rate_engine, rate_engine, TARGET_BURIED)
    report.row("(b) buried", "engine travel_times, branch='direct'", rate_direct, rate_direct,
               note="reference for the numpy row")
    report.row("(b) buried", "engine travel_times, first arrival", rate_sub, rate_sub,
               note=f"{label}, reference for the loop row")
    report.row("(b) buried", "Python loop calling _pick", n_sub / timed["loop_sub"][0], rate_sub, note=label)
    report.row("(b) buried", "numpy simplified direct+diving", n / timed["numpy"][0], rate_direct,
               note=f"lower accuracy, max diff {diff:.1e} s")


def _cpu_name() -> str:
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown CPU"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeats", type=int, default=5, help="repeats per measurement; the best is kept")
    parser.add_argument("--min-time", type=float, default=0.3, help="minimum seconds per repeat")
    parser.add_argument("--loop-models", type=int, default=4,
                        help="models of batch (b) used to time the per-pick Python loop")
    parser.add_argument("--numba-cache", choices=("fresh", "project"), default="fresh",
                        help="'fresh' compiles into an empty temporary cache (true compile time); "
                             "'project' uses numba's usual cache beside the sources")
    args = parser.parse_args(argv)

    cache_dir = None
    if args.numba_cache == "fresh":
        cache_dir = tempfile.mkdtemp(prefix="invert-bench-numba-")
        os.environ["NUMBA_CACHE_DIR"] = cache_dir
    try:
        import numba

        from invert import forward
        from invert.model import LayerModel

        load = os.getloadavg() if hasattr(os, "getloadavg") else (float("nan"),) * 3
        print("Forward engine throughput (first-arrival times per second)")
        print(f"python {platform.python_version()}, numpy {np.__version__}, numba {numba.__version__}; "
              f"{_cpu_name()}, {os.cpu_count()} logical CPUs, load average {load[0]:.2f}")
        print(f"numba threads: {numba.get_num_threads()} (NUMBA_NUM_THREADS={os.environ['NUMBA_NUM_THREADS']}); "
              f"the engine kernels are serial, so every figure is single-thread")
        print(f"timing: best of {args.repeats} repeats, each >= {args.min_time:g} s, methods of a case "
              f"interleaved round by round; the machine may be shared, so absolute figures are noisy")
        report = Report()
        case_surface(forward, LayerModel, report, args)
        case_buried(forward, LayerModel, report, args)
    finally:
        if cache_dir is not None:
            shutil.rmtree(cache_dir, ignore_errors=True)

    print()
    print_table(report.rows)
    print("\nengine/method: how many times faster the engine is than the method, both timed on the same\n"
          "quantity and models: first arrivals of the whole batch; in (b) the loop row against the engine\n"
          "on the same models and the numpy row against the engine's branch='direct' (direct or diving\n"
          "rays, the quantity that baseline computes).")
    if report.failures:
        print("\nFAILED checks: " + "; ".join(report.failures))
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
