"""Independent reference ray tracer for 1-D layered models (tests only).

Written separately from :mod:`invert.forward` and deliberately simple and slow:

* ray integrals X(p), T(p) and tau(p) over depth segments are computed by direct
  numerical quadrature (``scipy.integrate.quad``) of

      X = int p v / sqrt(1 - p^2 v^2) dz,   T = int dz / (v sqrt(1 - p^2 v^2)),
      tau = int sqrt(1/v^2 - p^2) dz,

  after the substitution ``z = z_end -/+ (L/2) s^2`` on each half of a segment, which
  turns the inverse-square-root singularity at a turning point into a regular
  integrand;
* the ray parameters of the direct/diving branch and of reflections are found by
  scanning p finely (clustered towards the ends of every sub-branch) and refining
  every sign change of X(p) - x with ``scipy.optimize.brentq``: every root is kept
  (triplications give several);
* head-wave times come from the intercept formula T = p x + tau_down + tau_up with
  p = 1 / (velocity just below the refractor).

``fermat_time`` is a second, fully independent check for constant-velocity layers: it
minimises the travel time over the horizontal offsets of the straight ray segments.

Conventions: depth positive down from the datum; layer 0 (the top layer) extends
upward above the datum with the same linear law; velocity v(z) = v_top + g (z - z_top)
inside each layer; a velocity of 0 marks a layer the wave cannot enter (S in a fluid).
Branches that leave both ends going upward (rays turning above both ends, underside
reflections) are not computed, like the engine.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import integrate, optimize

_QUAD = dict(epsabs=0.0, epsrel=1e-12, limit=200)


@dataclass(frozen=True)
class Ray:
    """One arrival: ray parameter [s/length], time [s], branch name, 1-based interface."""

    p: float
    time: float
    kind: str  # "direct", "diving", "reflection", "head"
    interface: int = 0


def _scan_points(n_uniform: int) -> np.ndarray:
    """Points t in (0, 1), uniform plus geometrically clustered towards both ends."""
    ends = 10.0 ** -np.arange(1.0, 14.01, 0.125)
    t = np.concatenate([np.linspace(0.0, 1.0, n_uniform + 2)[1:-1], ends, 1.0 - ends])
    return np.unique(t[(t > 0) & (t < 1)])


class Reference:
    """Reference travel times for ONE 1-D model and one wave type.

    Parameters
    ----------
    thickness : (N,) layer thicknesses above the half-space.
    v : (N+1,) velocity at the top of each layer (0: impassable, e.g. S in a fluid).
    g : (N+1,) velocity gradient dv/dz of each layer (default 0).
    n_scan : number of uniform scan points per sub-branch (plus ~200 clustered ones).
    """

    def __init__(self, thickness, v, g=None, n_scan: int = 300):
        self.h = np.atleast_1d(np.asarray(thickness, dtype=float)).ravel()
        self.v = np.atleast_1d(np.asarray(v, dtype=float)).ravel()
        self.g = np.zeros_like(self.v) if g is None else np.atleast_1d(np.asarray(g, dtype=float)).ravel()
        if self.v.size != self.h.size + 1 or self.g.size != self.v.size:
            raise ValueError("need N thicknesses and N+1 velocities/gradients")
        self.tops = np.concatenate([[0.0], np.cumsum(self.h)])
        self.bottoms = np.concatenate([np.cumsum(self.h), [np.inf]])
        self.t_scan = _scan_points(n_scan)
        self._grids: dict = {}

    @classmethod
    def from_model(cls, model, wave: str = "P", index: int = 0, n_scan: int = 300) -> "Reference":
        """Build from row ``index`` of an ``invert.model.LayerModel``."""
        top, grad = model.velocity(wave)
        return cls(model.thickness[index], top[index], grad[index], n_scan=n_scan)

    # ------------------------------------------------------------ geometry
    @property
    def n_interfaces(self) -> int:
        return self.h.size

    def layer_of(self, z: float) -> int:
        """Layer index containing depth z (an interface belongs to the layer below)."""
        return int(np.searchsorted(self.bottoms, z, side="right"))

    def vel(self, j: int, z: float) -> float:
        return float(self.v[j] + self.g[j] * (z - self.tops[j]))

    def velocity(self, z: float) -> float:
        return self.vel(self.layer_of(z), z)

    def pieces(self, za: float, zb: float) -> list[tuple[int, float, float]]:
        """(layer, top, bottom) pieces covering [za, zb], za <= zb, split at interfaces."""
        out = []
        z = za
        while z < zb:
            j = self.layer_of(z)
            b = min(zb, self.bottoms[j])
            out.append((j, z, b))
            z = b
        return out

    def vmax(self, za: float, zb: float) -> float:
        """Largest velocity on [za, zb] (0 if the interval is empty); nan if impassable."""
        best = 0.0
        for j, a, b in self.pieces(za, zb):
            if self.v[j] <= 0:
                return math.nan
            best = max(best, self.vel(j, a), self.vel(j, b))
        return best

    # ------------------------------------------------------- ray integrals
    def _segment(self, p: float, j: int, a: float, b: float, turning: bool, what: str) -> float:
        """Integral ``what`` in {'X','T','tau'} over [a, b] inside layer j.

        ``turning`` says the ray turns exactly at b (v(b) = 1/p). Each half of the
        segment is integrated in s with z = end -/+ (L/2) s^2, and q = 1 - p v is
        written relative to the end so that it is exact near a turning point.
        """
        L = b - a
        if L <= 0:
            return 0.0
        g = float(self.g[j])
        half = 0.5 * L
        ends = [(self.vel(j, a), +1.0, False), (self.vel(j, b), -1.0, turning)]
        total = 0.0
        for v_end, direction, turn in ends:
            q_end = 0.0 if turn else 1.0 - p * v_end

            def integrand(s, v_end=v_end, direction=direction, q_end=q_end):
                d = half * s * s  # distance from this end of the segment
                v = v_end + direction * g * d
                q = q_end - direction * p * g * d
                root = math.sqrt(q * (2.0 - q))  # sqrt(1 - p^2 v^2)
                jac = 2.0 * half * s
                if what == "X":
                    return jac * p * v / root
                if what == "T":
                    return jac / (v * root)
                return jac * root / v

            # near-grazing end (q_end small, q growing away from it like q_end + c s^2): the
            # integrand changes over s ~ sqrt(q_end / c); tell quad where.
            c = abs(p * g * half)
            points = None
            if q_end > 0 and c > 0 and math.sqrt(q_end / c) < 0.1:
                s0 = math.sqrt(q_end / c)
                points = [s0, 10 * s0] if s0 > 1e-12 else None
            val, _err = integrate.quad(integrand, 0.0, 1.0, points=points, **_QUAD)
            total += val
        return total

    def integral(self, what: str, p: float, za: float, zb: float, turning: bool | int = False) -> float:
        """One-way integral over [za, zb]; with ``turning`` the ray turns at zb.

        ``turning`` may be the index of the layer the ray turns in: then only a last piece
        inside that layer is treated as ending at the turning point.
        """
        pcs = self.pieces(za, zb)
        out = 0.0
        for i, (j, a, b) in enumerate(pcs):
            turn = (turning is not False and i == len(pcs) - 1
                    and (turning is True or j == turning))
            out += self._segment(p, j, a, b, turn, what)
        return out

    # ---------------------------------------------------------- sub-branches
    def _subbranches(self, zs: float, zr: float, k: int | None):
        """Sub-branches (pa, pb, include_pa, legs) of the direct/diving (k None) or reflection k branch.

        ``legs(p)`` returns a list of (za, zb, turning, weight) one-way legs.
        """
        zu, zd = min(zs, zr), max(zs, zr)
        out = []
        if k is not None:
            d = float(self.bottoms[k - 1])
            if not zd < d:
                return out
            vm = self.vmax(zu, d)
            if not vm > 0:
                return out
            out.append((0.0, 1.0 / vm, True, lambda p: [(zu, d, False, 1.0), (zd, d, False, 1.0)], "reflection"))
            return out
        vm = self.vmax(zu, zd)
        if self.velocity(zd) <= 0 or self.velocity(zu) <= 0 or math.isnan(vm):
            return out
        if zd > zu:
            out.append((0.0, 1.0 / vm, True, lambda p: [(zu, zd, False, 1.0)], "direct"))
        for j in range(self.layer_of(zd), self.v.size):
            if self.v[j] <= 0:
                break
            if self.g[j] <= 0:
                continue
            s = max(self.tops[j], zd)
            above = self.vmax(zu, s) if s > zu else 0.0
            v_start = self.vel(j, s)
            v_hi = max(above, v_start)
            v_end = math.inf if j == self.v.size - 1 else self.vel(j, self.bottoms[j])
            if not v_end > v_hi:
                continue

            def legs(p, j=j, s=s, v_start=v_start):
                # turning depth, kept inside layer j against rounding at the ends of the range
                zt = min(max(s + (1.0 / p - v_start) / self.g[j], s), self.bottoms[j])
                return [(zu, zd, False, 1.0), (zd, zt, j, 2.0)]

            out.append((1.0 / v_end, 1.0 / v_hi, False, legs, "diving"))
        return out

    def _value(self, what: str, p: float, legs) -> float:
        return sum(w * self.integral(what, p, za, zb, turning) for za, zb, turning, w in legs(p))

    def _grid(self, zs, zr, k, idx, sub):
        key = (zs, zr, k, idx)
        if key not in self._grids:
            pa, pb, include_pa, legs, _kind = sub
            t = self.t_scan
            if include_pa:
                t = np.concatenate([[0.0], t])
            ps = pa + (pb - pa) * t
            xs = np.array([self._value("X", p, legs) for p in ps])
            self._grids[key] = (ps, xs)
        return self._grids[key]

    def _roots(self, x: float, zs: float, zr: float, k: int | None) -> list[Ray]:
        zs, zr, x = float(zs), float(zr), float(x)
        rays: list[Ray] = []
        if k is None and zs == zr:
            j = self.layer_of(zs)
            if self.v[j] > 0 and x == 0:  # coincident ends (ray parameter undefined)
                return [Ray(math.nan, 0.0, "direct")]
            if self.v[j] > 0 and self.g[j] == 0:  # horizontal ray in a constant layer
                rays.append(Ray(1.0 / self.v[j], x / self.v[j], "direct"))
        for idx, sub in enumerate(self._subbranches(zs, zr, k)):
            pa, pb, include_pa, legs, kind = sub
            ps, xs = self._grid(zs, zr, k, idx, sub)
            f = xs - x
            found = []
            for i in range(len(ps) - 1):
                if not (np.isfinite(f[i]) and np.isfinite(f[i + 1])):
                    raise FloatingPointError(f"reference X(p) not finite near p = {ps[i]!r}")
                if f[i] == 0.0:
                    found.append(ps[i])
                elif f[i] * f[i + 1] < 0:
                    found.append(optimize.brentq(lambda p: self._value("X", p, legs) - x, ps[i], ps[i + 1],
                                                 xtol=1e-16 * pb, rtol=1e-15, maxiter=200))
            for p in found:
                t = self._value("T", p, legs)
                rays.append(Ray(p, t, kind, 0 if k is None else k))
        rays.sort(key=lambda r: r.time)
        return rays

    # -------------------------------------------------------------- public
    def direct(self, x: float, zs: float = 0.0, zr: float = 0.0) -> list[Ray]:
        """All direct and diving rays (no reflection, no head wave), sorted by time."""
        return self._roots(x, zs, zr, None)

    def reflection(self, x: float, zs: float, zr: float, k: int) -> list[Ray]:
        """All reflections from the top of interface k (1-based), sorted by time."""
        return self._roots(x, zs, zr, k)

    def head(self, x: float, zs: float, zr: float, k: int) -> Ray | None:
        """Head wave along interface k by the intercept formula, or None."""
        zu, zd = min(zs, zr), max(zs, zr)
        d = float(self.bottoms[k - 1])
        v_star = float(self.v[k])
        if not zd < d or not v_star > 0:
            return None
        vm = self.vmax(zu, d)
        if not v_star > vm:  # nan (impassable) also fails
            return None
        p = 1.0 / v_star
        x_crit = self.integral("X", p, zu, d) + self.integral("X", p, zd, d)
        if x < x_crit:
            return None
        tau = self.integral("tau", p, zu, d) + self.integral("tau", p, zd, d)
        return Ray(p, p * x + tau, "head", k)

    def critical_distance(self, zs: float, zr: float, k: int) -> float:
        zu, zd = min(zs, zr), max(zs, zr)
        d = float(self.bottoms[k - 1])
        p = 1.0 / float(self.v[k])
        return self.integral("X", p, zu, d) + self.integral("X", p, zd, d)

    def all_arrivals(self, x: float, zs: float = 0.0, zr: float = 0.0) -> list[Ray]:
        """Every arrival the engine is expected to consider, sorted by time.

        Head waves are included along refractors whose velocity is constant or falls with
        depth, where the wave grazing the interface stays at the interface; a rising
        refractor bends it back up, so there it is the diving wave (computed as such).
        (Cerveny & Ravindra, Theory of Seismic Head Waves, 1971, from memory.)
        """
        rays = list(self.direct(x, zs, zr))
        for k in range(1, self.n_interfaces + 1):
            rays += self.reflection(x, zs, zr, k)
            if self.g[k] <= 0:
                h = self.head(x, zs, zr, k)
                if h is not None:
                    rays.append(h)
        rays.sort(key=lambda r: r.time)
        return rays

    def first(self, x: float, zs: float = 0.0, zr: float = 0.0) -> Ray | None:
        rays = self.all_arrivals(x, zs, zr)
        return rays[0] if rays else None


# --------------------------------------------------------------- Fermat
def fermat_time(segments, x: float, v_head: float | None = None) -> tuple[float, np.ndarray]:
    """Least time over straight segments (h_i, v_i) with horizontal offsets summing to x.

    Minimises  sum_i sqrt(h_i^2 + x_i^2) / v_i  over x_i with sum x_i = x (the last offset
    is eliminated). With ``v_head`` the path may also run horizontally along the refractor
    at that speed for the remaining offset: minimises sum_i sqrt(h_i^2+x_i^2)/v_i +
    (x - sum x_i)/v_head over all x_i (the head-wave leg must come out >= 0).
    Returns (time, offsets).
    """
    h = np.array([s[0] for s in segments], dtype=float)
    v = np.array([s[1] for s in segments], dtype=float)
    keep = h > 0
    h, v = h[keep], v[keep]
    n = h.size

    def phi(xi):
        return np.sqrt(h * h + xi * xi) / v

    def dphi(xi):
        return xi / (v * np.sqrt(h * h + xi * xi))

    def d2phi(xi):
        return h * h / (v * (h * h + xi * xi) ** 1.5)

    if v_head is not None:
        def f(y):
            return float(np.sum(phi(y)) + (x - np.sum(y)) / v_head)

        def jac(y):
            return dphi(y) - 1.0 / v_head

        def hess(y):
            return np.diag(d2phi(y))

        y0 = np.full(n, 0.5 * x / n)
        res = optimize.minimize(f, y0, jac=jac, hess=hess, method="trust-exact",
                                options=dict(gtol=1e-14, maxiter=1000))
        return f(res.x), res.x

    if n == 1:
        return float(phi(np.array([x]))[0]), np.array([x])

    def full(y):
        return np.concatenate([y, [x - np.sum(y)]])

    def f(y):
        return float(np.sum(phi(full(y))))

    def jac(y):
        d = dphi(full(y))
        return d[:-1] - d[-1]

    def hess(y):
        d2 = d2phi(full(y))
        return np.diag(d2[:-1]) + d2[-1]

    y0 = (x * h / h.sum())[:-1]
    res = optimize.minimize(f, y0, jac=jac, hess=hess, method="trust-exact", options=dict(gtol=1e-14, maxiter=1000))
    return f(res.x), full(res.x)


def constant_legs(thickness, v, za: float, zb: float):
    """(h_i, v_i) straight-segment pieces of a constant-velocity model between depths za <= zb."""
    ref = Reference(thickness, v)
    return [(b - a, float(ref.v[j])) for j, a, b in ref.pieces(za, zb)]
