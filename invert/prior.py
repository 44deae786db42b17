"""Prior distributions for layered-model parameters, with physical constraints.

Three layers of objects:

* 1-D distributions (:class:`Uniform`, :class:`Normal`, :class:`LogNormal`,
  :class:`Truncated`) behind one small base class, :class:`Distribution`, which wraps a
  frozen ``scipy.stats`` object. Each answers ``logpdf``, ``cdf``, ``ppf``,
  ``from_unit`` (inverse CDF, for nested sampling), ``sample`` and ``describe``.
  :class:`Fixed` marks a parameter held at one value (not in the free vector).
* :class:`JointPrior`: the ordered free parameters, their 1-D priors and the constraints
  (velocity increasing downward, interface depths increasing, bounds on the depth of the
  last interface). Its density is the product prior restricted to the constraints and
  divided by the probability of the constraints under the product prior, so that it
  integrates to 1. The same object maps the unit cube onto the constrained support
  (``from_unit_cube``), so that nested sampling sees the same prior as MCMC.
* :func:`prior_from_toml_table` and :func:`load_prior_template`: our TOML layout
  (documented in ``docs/priors.md``) to a :class:`JointPrior`.

Parameter names (layers numbered 1..N+1 from the top, N+1 = half-space, interface k =
base of layer k): ``thickness_k`` or ``depth_k`` (k = 1..N), ``vp_k``, ``vpvs_k`` or one
shared ``vpvs``, ``vs_k``, ``gradient_k`` (dVp/dz of layer k, 1/s).

How the constraint probability and the unit-cube map are computed
-------------------------------------------------------------------
The free parameters split into independent blocks (connected by constraints):

* a chain of independent variables that must be ordered (velocities down the layers, also
  across the random rise gradient_k * thickness_k of a gradient layer; interface depths;
  possibly bounded by fixed neighbours or by the total-depth bounds): a recursive integral
  on a grid (forward pass) gives the probability of the order, and sampling backward
  through the conditionals gives the ordered unit-cube map;
* independent thicknesses whose sum is bounded: a recursive integral over the partial
  depth on a uniform grid, then a forward conditional inverse-CDF map;
* anything else (a random rise through a gradient layer with interface depths as
  parameters, or whose thickness also enters the total-depth bounds): Monte Carlo estimate
  of the probability with its standard error, rejection sampling, and no unit-cube map
  (:meth:`JointPrior.from_unit_cube` raises).

Grid results carry an error estimate: the change of the log-probability when the grid is
halved (the error of the full grid is smaller than that).
"""

from __future__ import annotations

import math
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import stats

from .model import MIN_SOLID_VPVS

__all__ = [
    "Distribution", "Uniform", "Normal", "LogNormal", "Truncated", "Fixed",
    "JointPrior", "parameter_names", "parameter_unit", "distribution_from_spec",
    "prior_from_toml_table", "load_prior_template", "DIST_PARAMETERS", "VPVS_MODES",
]


# =============================================================== 1-D distributions
class Distribution:
    """A continuous 1-D distribution backed by a frozen ``scipy.stats`` object.

    Subclasses build the frozen object and write :meth:`describe`. Values are in the unit
    of the parameter the distribution is attached to.
    """

    def __init__(self, frozen):
        self._frozen = frozen

    def logpdf(self, x) -> np.ndarray:
        """Log-density at ``x`` (array, any shape); ``-inf`` outside the support."""
        return self._frozen.logpdf(np.asarray(x, dtype=float))

    def cdf(self, x) -> np.ndarray:
        """Cumulative distribution function at ``x``."""
        return self._frozen.cdf(np.asarray(x, dtype=float))

    def sf(self, x) -> np.ndarray:
        """Survival function 1 - cdf, accurate in the upper tail."""
        return self._frozen.sf(np.asarray(x, dtype=float))

    def ppf(self, q) -> np.ndarray:
        """Inverse of :meth:`cdf` for ``q`` in [0, 1]."""
        return self._frozen.ppf(np.asarray(q, dtype=float))

    def isf(self, q) -> np.ndarray:
        """Inverse of :meth:`sf`."""
        return self._frozen.isf(np.asarray(q, dtype=float))

    def from_unit(self, u) -> np.ndarray:
        """Map ``u`` in [0, 1] to a value of this distribution (inverse CDF)."""
        return self.ppf(u)

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """``n`` independent draws, shape (n,), by inverse-CDF sampling."""
        return self.from_unit(rng.random(int(n)))

    @property
    def support(self) -> tuple[float, float]:
        """(lower, upper) ends of the support; may be infinite."""
        lo, hi = self._frozen.support()
        return float(lo), float(hi)

    def describe(self, unit: str = "") -> str:  # pragma: no cover - overridden
        """Short text such as ``'uniform on [200, 800] m/s'``."""
        raise NotImplementedError

    def __repr__(self) -> str:
        return f"<{type(self).__name__}: {self.describe()}>"


def _number(value: float) -> str:
    return f"{value:.6g}"


def _with_unit(text: str, unit: str) -> str:
    return f"{text} {unit}".rstrip()


def _finite(name: str, value) -> float:
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"{name} must be finite; got {value}")
    return value


class Uniform(Distribution):
    """Uniform density 1/(high - low) on [low, high]."""

    def __init__(self, low: float, high: float):
        self.low, self.high = _finite("low", low), _finite("high", high)
        if not self.low < self.high:
            raise ValueError(f"low must be < high; got low = {self.low:g}, high = {self.high:g}")
        super().__init__(stats.uniform(loc=self.low, scale=self.high - self.low))
        self._log_density = -math.log(self.high - self.low)

    def logpdf(self, x) -> np.ndarray:
        """Log-density at ``x``: -log(high - low) inside [low, high], ``-inf`` outside (no scipy call)."""
        x = np.asarray(x, dtype=float)
        return np.where((x >= self.low) & (x <= self.high), self._log_density, -np.inf)

    def describe(self, unit: str = "") -> str:
        return _with_unit(f"uniform on [{_number(self.low)}, {_number(self.high)}]", unit)


class Normal(Distribution):
    """Normal (Gaussian) density with mean ``mean`` and standard deviation ``sd``."""

    def __init__(self, mean: float, sd: float):
        self.mean, self.sd = _finite("mean", mean), _finite("sd", sd)
        if not self.sd > 0:
            raise ValueError(f"sd must be > 0; got {self.sd:g}")
        super().__init__(stats.norm(loc=self.mean, scale=self.sd))

    def describe(self, unit: str = "") -> str:
        return f"normal, mean {_with_unit(_number(self.mean), unit)}, sd {_with_unit(_number(self.sd), unit)}"


class LogNormal(Distribution):
    """Log-normal density: ``ln X`` is normal with mean ``ln(median)`` and sd ``sigma_log``.

    ``median`` is in the unit of the parameter; ``sigma_log`` is dimensionless (natural
    log), so the central 68 % interval is about [median / e^sigma_log, median * e^sigma_log].
    """

    def __init__(self, median: float, sigma_log: float):
        self.median, self.sigma_log = _finite("median", median), _finite("sigma_log", sigma_log)
        if not self.median > 0:
            raise ValueError(f"median must be > 0; got {self.median:g}")
        if not self.sigma_log > 0:
            raise ValueError(f"sigma_log must be > 0; got {self.sigma_log:g}")
        super().__init__(stats.lognorm(s=self.sigma_log, scale=self.median))

    def describe(self, unit: str = "") -> str:
        return f"log-normal, median {_with_unit(_number(self.median), unit)}, sigma_log {_number(self.sigma_log)}"


class Truncated(Distribution):
    """``dist`` restricted to [low, high] and renormalised.

    Density ``dist.pdf(x) / (F(high) - F(low))`` on [low, high], zero elsewhere (F = CDF of
    ``dist``). Bounds may be infinite. Computed on the survival-function side when the
    interval lies in the upper tail, so that far-tail truncation keeps its precision.
    """

    def __init__(self, dist: Distribution, low: float, high: float):
        if not isinstance(dist, Distribution) or isinstance(dist, Truncated):
            raise TypeError("Truncated needs an untruncated Distribution")
        low, high = float(low), float(high)
        if math.isnan(low) or math.isnan(high):
            raise ValueError("low and high must be numbers, not NaN")
        if not low < high:
            raise ValueError(f"low must be < high; got low = {low:g}, high = {high:g}")
        s_lo, s_hi = dist.support
        self.dist, self.low, self.high = dist, max(low, s_lo), min(high, s_hi)
        self._bounds = (low, high)
        if not self.low < self.high:
            raise ValueError(f"[low, high] = [{low:g}, {high:g}] does not overlap the support "
                             f"[{s_lo:g}, {s_hi:g}] of the {dist.describe()} distribution")
        self._upper_side = bool(dist.cdf(self.low) > 0.5)
        if self._upper_side:
            self._a, b = float(dist.sf(self.low)), float(dist.sf(self.high))
            mass = self._a - b
        else:
            self._a, b = float(dist.cdf(self.low)), float(dist.cdf(self.high))
            mass = b - self._a
        if not mass > 0:
            raise ValueError(f"[low, high] = [{low:g}, {high:g}] holds no probability under the "
                             f"{dist.describe()} distribution")
        self._mass, self._log_mass = mass, math.log(mass)

    def logpdf(self, x) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        inside = (x >= self.low) & (x <= self.high)
        with np.errstate(invalid="ignore"):
            return np.where(inside, self.dist.logpdf(x) - self._log_mass, -np.inf)

    def cdf(self, x) -> np.ndarray:
        xc = np.clip(np.asarray(x, dtype=float), self.low, self.high)
        if self._upper_side:
            return (self._a - self.dist.sf(xc)) / self._mass
        return (self.dist.cdf(xc) - self._a) / self._mass

    def sf(self, x) -> np.ndarray:
        return 1.0 - self.cdf(x)

    def ppf(self, q) -> np.ndarray:
        q = np.asarray(q, dtype=float)
        if self._upper_side:
            x = self.dist.isf(self._a - q * self._mass)
        else:
            x = self.dist.ppf(self._a + q * self._mass)
        return np.clip(x, self.low, self.high)  # rounding of the shifted probability only

    def isf(self, q) -> np.ndarray:
        return self.ppf(1.0 - np.asarray(q, dtype=float))

    @property
    def support(self) -> tuple[float, float]:
        return self.low, self.high

    def describe(self, unit: str = "") -> str:
        lo, hi = self._bounds
        return f"{self.dist.describe(unit)}, truncated to [{_number(lo)}, {_number(hi)}]"


@dataclass(frozen=True)
class Fixed:
    """A parameter held at ``value`` [unit of the parameter]; not part of the free vector."""

    value: float

    def describe(self, unit: str = "") -> str:
        return _with_unit(f"fixed at {_number(self.value)}", unit)


# ================================================================ vocabulary
VPVS_MODES = ("shared", "per_layer", "vs", "none")
_FAMILIES = ("thickness", "depth", "vp", "vpvs", "vs", "gradient")


def _split(name: str) -> tuple[str, int | None]:
    """'vp_3' -> ('vp', 3); 'vpvs' -> ('vpvs', None)."""
    family, _, index = name.rpartition("_")
    if family in _FAMILIES and index.isdigit():
        return family, int(index)
    return name, None


def parameter_names(n_layers: int, *, vpvs_mode: str = "shared", gradient_layers: Sequence[int] = (),
                    depth_parameter: bool = False) -> tuple[str, ...]:
    """All parameter names of a model, in the order of the free vector.

    Parameters
    ----------
    n_layers : int
        Number of layers including the half-space (N+1 >= 1).
    vpvs_mode : {'shared', 'per_layer', 'vs', 'none'}
        One ``vpvs`` for all layers, ``vpvs_k`` per layer, ``vs_k`` per layer, or no S
        parameters (P data only).
    gradient_layers : sequence of int
        Layers (1..N+1) that carry a ``gradient_k`` parameter (dVp/dz, 1/s).
    depth_parameter : bool
        Interfaces given by their depths ``depth_k`` instead of layer thicknesses.

    Returns
    -------
    tuple of str
        Thicknesses (or depths) 1..N, ``vp_1..vp_{N+1}``, then the S parameters, then gradients.
    """
    n_layers = _check_n_layers(n_layers)
    if vpvs_mode not in VPVS_MODES:
        raise ValueError(f"vpvs_mode must be one of {', '.join(VPVS_MODES)}; got {vpvs_mode!r}")
    layers = range(1, n_layers + 1)
    geometry = "depth" if depth_parameter else "thickness"
    names = [f"{geometry}_{k}" for k in range(1, n_layers)] + [f"vp_{k}" for k in layers]
    if vpvs_mode == "shared":
        names.append("vpvs")
    elif vpvs_mode == "per_layer":
        names += [f"vpvs_{k}" for k in layers]
    elif vpvs_mode == "vs":
        names += [f"vs_{k}" for k in layers]
    names += [f"gradient_{k}" for k in _check_gradient_layers(gradient_layers, n_layers)]
    return tuple(names)


def parameter_unit(name: str, units: str) -> str:
    """Unit of parameter ``name`` when lengths are in ``units`` ('m' or 'km')."""
    if units not in ("m", "km"):
        raise ValueError(f"units must be 'm' (metres, m/s) or 'km' (kilometres, km/s); got {units!r}")
    family, _ = _split(name)
    return {"thickness": units, "depth": units, "vp": f"{units}/s", "vs": f"{units}/s",
            "vpvs": "", "gradient": "1/s"}[family]


def _check_n_layers(n_layers) -> int:
    if isinstance(n_layers, bool) or not isinstance(n_layers, (int, np.integer)) or n_layers < 1:
        raise ValueError(f"n_layers must be an integer >= 1 (layers including the half-space); got {n_layers!r}")
    return int(n_layers)


def _check_gradient_layers(gradient_layers, n_layers: int) -> list[int]:
    out = []
    for k in gradient_layers:
        if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or not 1 <= k <= n_layers:
            raise ValueError(f"gradient_layers: expected layer numbers 1..{n_layers}; got {k!r}")
        if k in out:
            raise ValueError(f"gradient_layers: layer {k} listed twice")
        out.append(int(k))
    return sorted(out)


# ================================================================ constraints
@dataclass(frozen=True)
class _VelocityStep:
    """Velocity at the base of layer k <= velocity at the top of layer k+1."""

    k: int
    gradient: str | None  # 'gradient_k' where layer k has one
    depth_parameter: bool

    @property
    def lower(self) -> str:
        return f"vp_{self.k}"

    @property
    def upper(self) -> str:
        return f"vp_{self.k + 1}"

    @property
    def thickness_names(self) -> tuple[str, ...]:
        if not self.depth_parameter:
            return (f"thickness_{self.k}",)
        return (f"depth_{self.k}",) if self.k == 1 else (f"depth_{self.k}", f"depth_{self.k - 1}")

    def thickness(self, v):
        if not self.depth_parameter:
            return v[f"thickness_{self.k}"]
        return v[f"depth_{self.k}"] - (v[f"depth_{self.k - 1}"] if self.k > 1 else 0.0)

    @property
    def names(self) -> tuple[str, ...]:
        extra = (self.gradient, *self.thickness_names) if self.gradient else ()
        return (self.lower, self.upper, *extra)

    def holds(self, v) -> np.ndarray:
        base = v[self.lower]
        if self.gradient:
            base = base + v[self.gradient] * self.thickness(v)
        return np.asarray(v[self.upper] >= base)

    def text(self) -> str:
        if self.gradient:
            return f"vp_{self.k} + gradient_{self.k} * thickness of layer {self.k} <= vp_{self.k + 1}"
        return f"vp_{self.k} <= vp_{self.k + 1}"


@dataclass(frozen=True)
class _DepthStep:
    """depth_{k-1} <= depth_k (depth_0 = 0, the datum)."""

    k: int

    @property
    def names(self) -> tuple[str, ...]:
        return (f"depth_{self.k}",) if self.k == 1 else (f"depth_{self.k - 1}", f"depth_{self.k}")

    def holds(self, v) -> np.ndarray:
        lower = v[f"depth_{self.k - 1}"] if self.k > 1 else 0.0
        return np.asarray(v[f"depth_{self.k}"] >= lower)

    def text(self) -> str:
        return f"depth_{self.k - 1} <= depth_{self.k}" if self.k > 1 else "depth_1 >= 0"


@dataclass(frozen=True)
class _TotalDepth:
    """low <= depth of interface N <= high."""

    low: float
    high: float
    n: int
    depth_parameter: bool

    @property
    def names(self) -> tuple[str, ...]:
        if self.depth_parameter:
            return (f"depth_{self.n}",)
        return tuple(f"thickness_{k}" for k in range(1, self.n + 1))

    def total(self, v):
        return sum(v[name] for name in self.names)

    def holds(self, v) -> np.ndarray:
        total = self.total(v)
        return np.asarray((total >= self.low) & (total <= self.high))

    def text(self) -> str:
        low = f"{_number(self.low)} <= " if math.isfinite(self.low) else ""
        high = f" <= {_number(self.high)}" if math.isfinite(self.high) else ""
        return f"{low}depth of interface {self.n}{high}"


# ===================================================================== blocks
class _Independent:
    """One unconstrained free parameter."""

    kind = "independent"
    log_mass = 0.0
    log_mass_error = 0.0

    def __init__(self, col: int, dist: Distribution):
        self.cols, self.dist = [col], dist

    def from_unit(self, u):
        return self.dist.from_unit(u[:, 0])[:, None]

    def sample(self, n, rng):
        return self.from_unit(rng.random((n, 1)))


def _times(a: float, b: float) -> float:
    """a * b with 0 * inf = 0 (a support corner of a product)."""
    return 0.0 if a == 0.0 or b == 0.0 else a * b


class _ProductShift:
    """The random rise of velocity through a gradient layer: S = g * h [velocity].

    ``g`` (gradient, 1/s) and ``h`` (thickness >= 0) are independent; either may be fixed
    (a float) but not both. ``cdf(s) = P(g h <= s)``; ``draw_given_room`` draws (g, h) from
    their priors restricted to g h <= room, using u-coordinates ``u_g`` and ``u_h``.
    """

    _N_QUAD = 512

    def __init__(self, g, h, g_name: str, h_name: str):
        self.g, self.h, self.g_name, self.h_name = g, h, g_name, h_name
        self.free = [n for n, v in ((g_name, g), (h_name, h)) if isinstance(v, Distribution)]
        g_lo, g_hi = g.support if isinstance(g, Distribution) else (g, g)
        h_lo, h_hi = h.support if isinstance(h, Distribution) else (h, h)
        corners = [_times(a, b) for a in (g_lo, g_hi) for b in (h_lo, h_hi)]
        self.s_min, self.s_max = min(corners), max(corners)
        if isinstance(h, Distribution) and not h.support[0] >= 0:
            raise ValueError(f"{h_name}: thickness prior must not allow negative values")
        # Q(s) = P(g h <= s), tabulated on 4097 points between its 1e-10 quantiles (linear
        # interpolation). It enters the normaliser and the cell weights of the map; the draws
        # of g and h themselves invert their exact priors.
        tail = np.array([1e-10, 1 - 1e-10])
        gq = g.ppf(tail) if isinstance(g, Distribution) else (g, g)
        hq = h.ppf(tail) if isinstance(h, Distribution) else (h, h)
        ends = [_times(a, b) for a in gq for b in hq]
        self._s_grid = np.linspace(max(min(ends), self.s_min), min(max(ends), self.s_max), 4097)
        self._q_table = self._exact_cdf(self._s_grid)

    def _exact_cdf(self, s):
        g, h = self.g, self.h
        with np.errstate(divide="ignore", invalid="ignore"):
            if not isinstance(h, Distribution):
                return g.cdf(s / h) if h > 0 else (s >= 0).astype(float)
            if not isinstance(g, Distribution):
                return h.cdf(s / g) if g > 0 else h.sf(s / g)
            # E_h[F_g(s / h)] by the midpoint rule in the probability of h
            nodes = h.ppf((np.arange(self._N_QUAD) + 0.5) / self._N_QUAD)
            return g.cdf(s[:, None] / nodes[None, :]).mean(axis=1)

    def cdf(self, s):
        """P(g h <= s) (tabulated)."""
        return np.interp(np.asarray(s, dtype=float), self._s_grid, self._q_table, left=0.0, right=1.0)

    def draw_given_room(self, room, u_g, u_h):
        """(g, h) arrays from p_g p_h restricted to g h <= room (room >= s_min)."""
        g, h = self.g, self.h
        with np.errstate(divide="ignore", invalid="ignore"):
            if not isinstance(h, Distribution):
                g_val = np.minimum(g.ppf(u_g * g.cdf(room / h)), room / h)  # guard against rounding
                return g_val, np.full(room.shape, float(h))
            if not isinstance(g, Distribution):
                lim = room / g
                if g > 0:
                    return np.full(room.shape, float(g)), h.ppf(u_h * h.cdf(lim))
                f = h.cdf(lim)
                return np.full(room.shape, float(g)), h.ppf(f + u_h * (1.0 - f))
            # h given room: density p_h(h) F_g(room / h) on the h for which F_g(room / h) > 0
            g_lo = g.support[0]
            h_lo, h_hi = (np.full(room.shape, v) for v in h.support)
            if g_lo > 0:
                h_hi = np.minimum(h_hi, room / g_lo)
            elif g_lo < 0:
                h_lo = np.where(room < 0, np.maximum(h_lo, room / g_lo), h_lo)
            qL, qR = h.cdf(h_lo), h.cdf(h_hi)
            lin = np.linspace(0.0, 1.0, 257)
            q = qL[:, None] + (qR - qL)[:, None] * lin[None, :]
            t = h.ppf(q)
            fg = g.cdf(room[:, None] / t)
            w = np.diff(q, axis=1) * 0.5 * (fg[:, :-1] + fg[:, 1:])
            q_h = _pick_in_cells(q, w, u_h)
            h_val = np.clip(h.ppf(q_h), h_lo, h_hi)
            g_val = g.ppf(u_g * g.cdf(room / h_val))
            return np.minimum(g_val, room / h_val), h_val   # guard against last-bit rounding


def _pick_in_cells(edges, weights, u):
    """Invert a piecewise-uniform distribution: cell i has mass weights[:, i] and spans
    [edges[:, i], edges[:, i + 1]]; returns the point at cumulative fraction u (per row)."""
    W = np.cumsum(weights, axis=1)
    target = u * W[:, -1]
    i = np.minimum((W < target[:, None]).sum(axis=1), weights.shape[1] - 1)
    rows = np.arange(weights.shape[0])
    w_i = weights[rows, i]
    W_prev = np.where(i > 0, W[rows, np.maximum(i - 1, 0)], 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.clip(np.where(w_i > 0, (target - W_prev) / w_i, 0.0), 0.0, 1.0)
    return edges[rows, i] + frac * (edges[rows, i + 1] - edges[rows, i])


class _OrderedChain:
    """Independent x_1..x_m with lo_j <= x_j <= hi_j and x_{j+1} >= x_j + S_j.

    The shift S_j is a constant, or the random rise g h through a gradient layer
    (:class:`_ProductShift`). With offsets o_1 = 0, o_{j+1} = o_j + S_j for constant shifts
    (o_{j+1} = o_j for random ones) and z_j = x_j - o_j the order is z_1 <= ... <= z_m
    (plus the random shifts). Let F_j(z) = P(lo_j <= X_j <= min(hi_j, z + o_j)) (a
    sub-distribution function), G_0 = 1, and

        G_j(z) = integral_{-inf}^{z} R_{j-1}(y) dF_j(y),

    where R_{j-1} = G_{j-1} after a constant shift and R_{j-1}(y) = integral Q(y - x)
    dG_{j-1}(x) after a random one (Q = CDF of S). Then P(constraints) = G_m(+inf), and
    sampling runs backward: z_m from G_m / P, then z_j given z_{j+1} from G_j(z) / G_j(z_{j+1})
    (constant shift) or from Q(z_{j+1} - z) dG_j(z) followed by (g, h) given the room left
    (random shift). A fixed velocity above (``head``) or below (``tail``) reached through a
    random shift enters the same way. On a grid holding every support edge, the weights are
    averaged over each cell (trapezoid) while F_j is exact, so jumps of uniform densities cost
    nothing; inside a cell the map inverts F_j exactly.
    """

    kind = "ordered chain (grid)"

    def __init__(self, cols, names, dists, shifts, lows, highs, grid_size: int, *, head=None, tail=None,
                 shift_cols=None):
        self.names, self.dists = list(names), list(dists)
        self.shifts = list(shifts)
        self.head, self.tail = head, tail            # (fixed velocity, _ProductShift) or None
        const = [s if not isinstance(s, _ProductShift) else 0.0 for s in self.shifts]
        self.offsets = np.concatenate([[0.0], np.cumsum(const)])
        self.lo = np.array([max(lo, d.support[0]) for lo, d in zip(lows, dists)])
        self.hi = np.array([min(hi, d.support[1]) for hi, d in zip(highs, dists)])
        for name, lo, hi in zip(names, self.lo, self.hi):
            if not lo < hi:
                raise ValueError(f"constraints: {name} cannot satisfy them: its prior support and the "
                                 f"bounds set by fixed neighbours leave [{lo:g}, {hi:g}]")
        self._cdf_lo = np.array([float(d.cdf(lo)) for d, lo in zip(dists, self.lo)])
        # columns: the chain's velocities, then the free gradients / thicknesses of random shifts
        self._random = [s for s in [head and head[1], *self.shifts, tail and tail[1]]
                        if isinstance(s, _ProductShift)]
        self.cols = list(cols) + [shift_cols[n] for s in self._random for n in s.free]
        self._random_pos = {}
        pos = len(self.dists)
        for s in self._random:
            self._random_pos[id(s)] = {n: pos + i for i, n in enumerate(s.free)}
            pos += len(s.free)
        if self._random:
            grid_size = max(grid_size // 4, 16)   # the random-shift convolution costs (grid points)^2
        self._tables, mass = self._build(grid_size)
        _, coarse = self._build(max(grid_size // 2, 16))
        if not mass > 0:
            raise ValueError(f"constraints: the order {' <= '.join(names)} has probability 0 under the priors")
        self._mass = mass
        self.log_mass = math.log(mass)
        self.log_mass_error = abs(self.log_mass - math.log(coarse)) if coarse > 0 else np.inf

    # F_j and its inverse in z-space
    def _F(self, j, z):
        x = np.clip(np.asarray(z, dtype=float) + self.offsets[j], self.lo[j], self.hi[j])
        return np.maximum(self.dists[j].cdf(x) - self._cdf_lo[j], 0.0)

    def _F_inv(self, j, f):
        x = self.dists[j].ppf(np.asarray(f) + self._cdf_lo[j])
        return np.clip(x, self.lo[j], self.hi[j]) - self.offsets[j]

    @staticmethod
    def _shifted_mass(G, grid, shift, y):
        """integral Q(y - x) dG(x) for each y (1-D), cell masses of G times cell-averaged Q."""
        dG = np.diff(G)
        out = np.empty(np.shape(y))
        y = np.asarray(y, dtype=float)
        for start in range(0, y.size, 256):
            yy = y[start:start + 256, None]
            with np.errstate(invalid="ignore"):
                d = yy - grid[None, :]
            d = np.where(np.isnan(d), np.inf, d)   # inf - inf only in cells of negligible mass
            Q = shift.cdf(d)
            out[start:start + 256] = (dG[None, :] * 0.5 * (Q[:, :-1] + Q[:, 1:])).sum(axis=1)
        return out

    def _build(self, n):
        q = np.linspace(0.0, 1.0, n)
        pts = [self.lo - self.offsets, self.hi - self.offsets]
        for j, d in enumerate(self.dists):
            top = float(d.cdf(self.hi[j])) - self._cdf_lo[j]
            pts.append(self._F_inv(j, q * top))
        grid = np.unique(np.concatenate(pts))
        grid = grid[~np.isnan(grid)]
        F = np.array([self._F(j, grid) for j in range(len(self.dists))])
        dF = np.maximum(np.diff(F, axis=1), 0.0)
        G = np.empty_like(F)
        Gbar = np.empty_like(dF)
        if self.head is None:
            prev = np.ones(grid.size)
        else:
            with np.errstate(invalid="ignore"):
                prev = self.head[1].cdf(np.where(np.isinf(grid), grid, grid - self.head[0]))
        for j in range(len(self.dists)):
            Gbar[j] = 0.5 * (prev[:-1] + prev[1:])
            G[j] = np.concatenate([[0.0], np.cumsum(Gbar[j] * dF[j])])
            if j < len(self.shifts) and isinstance(self.shifts[j], _ProductShift):
                prev = self._shifted_mass(G[j], grid, self.shifts[j], grid)
            else:
                prev = G[j]
        if self.tail is None:
            mass = G[-1, -1]
        else:
            mass = float(self._shifted_mass(G[-1], grid, self.tail[1], np.array([self._tail_z]))[0])
        return (grid, F, Gbar, G), mass

    @property
    def _tail_z(self):
        return self.tail[0] - self.offsets[-1]

    def _G_at(self, j, z):
        grid, F, Gbar, G = self._tables
        i = np.clip(np.searchsorted(grid, z, side="right") - 1, 0, grid.size - 2)
        return G[j, i] + Gbar[j, i] * (self._F(j, z) - F[j, i])

    def _G_inv(self, j, t):
        grid, F, Gbar, G = self._tables
        i = np.clip(np.searchsorted(G[j], t, side="left") - 1, 0, grid.size - 2)
        w = Gbar[j, i]
        with np.errstate(divide="ignore", invalid="ignore"):
            f = F[j, i] + np.where(w > 0, (t - G[j, i]) / w, 0.0)
        return self._F_inv(j, np.clip(f, F[j, i], F[j, i + 1]))

    def _below_random(self, j, z_next, shift, u_z):
        """z_j given z_{j+1} across a random shift: density Q(z_{j+1} - z) dG_j(z), z_j + s_min <= z_{j+1}."""
        grid, _, _, G = self._tables
        cap = z_next - shift.s_min
        G_cap = self._G_at(j, cap)
        left = np.broadcast_to(grid[:-1], (z_next.size, grid.size - 1))
        right = np.minimum(grid[None, 1:], cap[:, None])
        G_left = np.broadcast_to(G[j, :-1], left.shape)
        G_right = np.where(grid[None, 1:] <= cap[:, None], G[j, None, 1:], G_cap[:, None])
        dG = np.where(left < cap[:, None], np.maximum(G_right - G_left, 0.0), 0.0)
        with np.errstate(invalid="ignore"):
            d_left, d_right = z_next[:, None] - left, z_next[:, None] - right
        Q_left = shift.cdf(np.where(np.isnan(d_left), np.inf, d_left))
        Q_right = shift.cdf(np.where(np.isnan(d_right), np.inf, d_right))
        w = dG * 0.5 * (Q_left + Q_right)
        t = self._pick_G(G_left, dG, w, u_z)   # cell i spans G values [G_left_i, G_left_i + dG_i]
        return np.minimum(self._G_inv(j, t), cap)

    @staticmethod
    def _pick_G(G_left, dG, w, u):
        W = np.cumsum(w, axis=1)
        target = u * W[:, -1]
        i = np.minimum((W < target[:, None]).sum(axis=1), w.shape[1] - 1)
        rows = np.arange(w.shape[0])
        W_prev = np.where(i > 0, W[rows, np.maximum(i - 1, 0)], 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            frac = np.clip(np.where(w[rows, i] > 0, (target - W_prev) / w[rows, i], 0.0), 0.0, 1.0)
        return G_left[rows, i] + frac * dG[rows, i]

    def _draw_shift(self, shift, room, u):
        pos = self._random_pos[id(shift)]
        u_g = u[:, pos[shift.g_name]] if shift.g_name in pos else None
        u_h = u[:, pos[shift.h_name]] if shift.h_name in pos else None
        g, h = shift.draw_given_room(room, u_g, u_h)
        out = {}
        if shift.g_name in pos:
            out[pos[shift.g_name]] = g
        if shift.h_name in pos:
            out[pos[shift.h_name]] = h
        return out

    def from_unit(self, u):
        out = np.empty(u.shape)
        for start in range(0, u.shape[0], 512):
            sl = slice(start, start + 512)
            out[sl] = self._from_unit_rows(u[sl])
        return out

    def _from_unit_rows(self, u):
        m = len(self.dists)
        out = np.empty(u.shape)
        z = np.empty((u.shape[0], m))
        if self.tail is None:
            z[:, m - 1] = self._G_inv(m - 1, u[:, m - 1] * self._tables[3][-1, -1])
        else:
            z_tail = np.full(u.shape[0], self._tail_z)
            z[:, m - 1] = self._below_random(m - 1, z_tail, self.tail[1], u[:, m - 1])
            for c, v in self._draw_shift(self.tail[1], z_tail - z[:, m - 1], u).items():
                out[:, c] = v
        for j in range(m - 2, -1, -1):
            shift = self.shifts[j]
            if isinstance(shift, _ProductShift):
                z[:, j] = self._below_random(j, z[:, j + 1], shift, u[:, j])
                for c, v in self._draw_shift(shift, z[:, j + 1] - z[:, j], u).items():
                    out[:, c] = v
            else:
                t = u[:, j] * self._G_at(j, z[:, j + 1])
                z[:, j] = np.minimum(self._G_inv(j, t), z[:, j + 1])  # guard against last-bit rounding
        if self.head is not None:
            for c, v in self._draw_shift(self.head[1], z[:, 0] - self.head[0], u).items():
                out[:, c] = v
        out[:, :m] = z + self.offsets
        return out

    def sample(self, n, rng):
        return self.from_unit(rng.random((n, len(self.cols))))


class _BoundedSum:
    """Independent thicknesses h_1..h_M >= 0 with low <= sum(h) <= high.

    R_k(s) = P(low <= s + h_k + ... + h_M <= high): R_M(s) = F_M(high - s) - F_M(low - s)
    exactly, and R_k(s) = E[R_{k+1}(s + h_k)] by a convolution on a uniform grid of the
    partial depth s (cell averages of R, exact cell masses of h_k). P(constraint) = R_1(0).
    The unit-cube map draws h_1 from p_1(h) R_2(h), then h_k given the depth s above it from
    p_k(h) R_{k+1}(s + h) (on a per-draw quantile grid of p_k), and h_M exactly from p_M
    truncated to [low - s, high - s], so the bound always holds.
    """

    kind = "bounded sum (grid)"
    _N_QUANTILE = 256

    def __init__(self, cols, names, dists, low, high, grid_size: int, label: str):
        self.cols, self.names, self.dists = list(cols), list(names), list(dists)
        self.low, self.high = float(low), float(high)
        self.a = np.array([d.support[0] for d in dists])
        self.b = np.array([d.support[1] for d in dists])
        if np.any(self.a < 0):
            raise ValueError("constraints: thickness priors must not allow negative values")
        self._L = self.high if math.isfinite(self.high) else self.low
        self._beyond = 0.0 if math.isfinite(self.high) else 1.0
        self._R = self._build(grid_size)
        coarse = self._build(max(grid_size // 2, 16))
        mass = self._R[0][1][0] if len(dists) > 1 else self._R_last(np.zeros(1))[0]
        cmass = coarse[0][1][0] if len(dists) > 1 else mass
        if not mass > 0:
            raise ValueError(f"constraints: {label} has probability 0 under the priors of {', '.join(names)}")
        self.log_mass = math.log(mass)
        self.log_mass_error = abs(self.log_mass - math.log(cmass)) if cmass > 0 else np.inf

    def _R_last(self, s):
        d = self.dists[-1]
        upper = d.cdf(self.high - s) if math.isfinite(self.high) else 1.0
        lower = d.cdf(self.low - s) if math.isfinite(self.low) else 0.0
        return np.maximum(upper - lower, 0.0)

    def _build(self, n):
        """[(s-grid, R_k on it)] for k = 1..M-1 (index k-1); R_M is exact."""
        M = len(self.dists)
        s = np.linspace(0.0, self._L, n + 1)
        out = [None] * M
        nxt = self._R_last(s)
        for k in range(M - 2, -1, -1):
            d = self.dists[k]
            Fk = d.cdf(s)
            dF = np.maximum(np.diff(Fk), 0.0)
            ext = np.concatenate([nxt, np.full(n, self._beyond)])
            A = 0.5 * (ext[:-1] + ext[1:])
            cur = np.correlate(A, dF, mode="valid") + self._beyond * (1.0 - Fk[-1])
            out[k] = (s, cur)
            nxt = cur
        return out

    def _R_next(self, k, s):
        """R_{k+1} at partial depths s (any shape) for 0-based layer index k."""
        if k + 1 == len(self.dists) - 1:
            return self._R_last(s)
        grid, vals = self._R[k + 1]
        return np.interp(s, grid, vals, right=self._beyond)

    def from_unit(self, u):
        out = np.empty(u.shape)
        for start in range(0, u.shape[0], 2048):
            sl = slice(start, start + 2048)
            out[sl] = self._from_unit_rows(u[sl])
        return out

    def _from_unit_rows(self, u):
        B, M = u.shape
        lin = np.linspace(0.0, 1.0, self._N_QUANTILE + 1)
        s = np.zeros(B)
        h = np.empty((B, M))
        a_below = np.concatenate([np.cumsum(self.a[::-1])[::-1][1:], [0.0]])  # sum of a_j, j > k
        b_below = np.concatenate([np.cumsum(self.b[::-1])[::-1][1:], [0.0]])
        for k in range(M - 1):
            d = self.dists[k]
            left = np.maximum(self.a[k], self.low - s - b_below[k])
            right = np.minimum(self.b[k], self.high - s - a_below[k])
            qL, qR = d.cdf(left), d.cdf(right)
            q = qL[:, None] + (qR - qL)[:, None] * lin[None, :]
            t = d.ppf(q)
            r = self._R_next(k, s[:, None] + t)
            w = np.diff(q, axis=1) * 0.5 * (r[:, :-1] + r[:, 1:])
            W = np.cumsum(w, axis=1)
            target = u[:, k] * W[:, -1]
            i = np.minimum((W < target[:, None]).sum(axis=1), self._N_QUANTILE - 1)
            rows = np.arange(B)
            w_i = w[rows, i]
            W_prev = np.where(i > 0, W[rows, i - 1], 0.0)
            with np.errstate(divide="ignore", invalid="ignore"):
                frac = np.where(w_i > 0, (target - W_prev) / w_i, 0.0)
            qh = q[rows, i] + np.clip(frac, 0.0, 1.0) * (q[rows, i + 1] - q[rows, i])
            h[:, k] = np.clip(d.ppf(qh), left, right)
            s = s + h[:, k]
        d = self.dists[-1]
        qlo, qhi = d.cdf(self.low - s), d.cdf(self.high - s)
        h[:, -1] = np.clip(d.ppf(qlo + u[:, -1] * (qhi - qlo)), self.low - s, self.high - s)
        return h

    def sample(self, n, rng):
        return self.from_unit(rng.random((n, len(self.cols))))


class _MonteCarloBlock:
    """Constraints that couple parameters in ways the grid methods do not cover.

    P(constraints) is estimated from draws of the product prior (fixed seed), with
    standard error sqrt((1 - P) / (n P)) on log P; draws continue until that error is below
    ``target_error`` nats or ``max_draws`` is reached. Sampling is by rejection. There is no
    unit-cube map for such a block.
    """

    kind = "Monte Carlo"

    def __init__(self, cols, names, dists, links, fixed, *, seed: int, min_draws: int = 1_000_000,
                 max_draws: int = 20_000_000, target_error: float = 0.01, chunk: int = 250_000):
        self.cols, self.names, self.dists, self.links, self.fixed = list(cols), list(names), list(dists), links, fixed
        rng = np.random.default_rng(seed)
        hits = draws = 0
        while draws < min_draws or (draws < max_draws and self._se(hits, draws) > target_error):
            hits += int(self._accept(self._draw(chunk, rng)).sum())
            draws += chunk
        if hits == 0:
            raise ValueError(f"constraints: none of {draws} draws of {', '.join(names)} from their priors "
                             f"satisfies {'; '.join(link.text() for link in links)}")
        self.probability = hits / draws
        self.n_draws = draws
        self.log_mass = math.log(self.probability)
        self.log_mass_error = self._se(hits, draws)

    @staticmethod
    def _se(hits, draws):
        if hits == 0:
            return np.inf
        p = hits / draws
        return math.sqrt((1.0 - p) / (draws * p))

    def _draw(self, n, rng):
        return np.column_stack([d.sample(n, rng) for d in self.dists])

    def _accept(self, x):
        v = dict(self.fixed)
        v.update({name: x[:, i] for i, name in enumerate(self.names)})
        ok = np.ones(x.shape[0], dtype=bool)
        for link in self.links:
            ok &= link.holds(v)
        return ok

    def from_unit(self, u):
        raise NotImplementedError(
            "from_unit_cube: no exact unit-cube map for the coupled constraint(s) "
            f"{'; '.join(link.text() for link in self.links)} among {', '.join(self.names)}; "
            "fix the gradient, allow the layer below to be slower (slower_allowed), parameterise by "
            "thickness without total-depth bounds, or use log_prob/sample (MCMC) instead of nested sampling")

    def sample(self, n, rng):
        out, have = [], 0
        while have < n:
            m = int(min(5_000_000, max(1000, 1.3 * (n - have) / self.probability)))
            x = self._draw(m, rng)
            x = x[self._accept(x)]
            out.append(x)
            have += x.shape[0]
        return np.concatenate(out)[:n]


# =================================================================== joint prior
class JointPrior:
    """Prior over the free parameter vector of a layered model, with constraints.

    Parameters
    ----------
    params : mapping name -> Distribution or Fixed
        Every parameter of the model (see :func:`parameter_names`); the order of the free
        ones (non-:class:`Fixed`) is the order of the columns of ``theta``.
    n_layers : int
        Layers including the half-space (N+1).
    units : {'m', 'km'}
        Length unit; velocities are in units/s, gradients in 1/s, Vp/Vs dimensionless.
    gradient_layers : sequence of int
        Layers that have a ``gradient_k`` parameter.
    depth_parameter : bool
        Interfaces given by ``depth_k`` (then depth_1 <= depth_2 <= ... always applies).
    increasing_velocity : bool
        Vp at the base of layer k (top + gradient * thickness) <= Vp at the top of layer k+1.
    slower_allowed : sequence of int
        Layers k (2..N+1) exempt from the above: layer k may be slower than layer k-1.
    min_total_depth, max_total_depth : float, optional
        Bounds on the depth of interface N (the top of the half-space) [units].
    grid_size : int
        Grid points per variable for the grid methods.
    seed : int
        Seed of the Monte Carlo estimate of P(constraints), where one is needed.

    Attributes
    ----------
    names, units : tuple of str
        Free parameter names and their units.
    fixed : dict
        Fixed parameter values.
    log_normaliser : float
        log P(constraints hold) under the product of the 1-D priors (<= 0). ``log_prob``
        subtracts it so that the constrained density integrates to 1.
    log_normaliser_error : float
        Numerical uncertainty of ``log_normaliser`` [nats]: one standard error for Monte
        Carlo blocks, the change on halving the grid for grid blocks (summed over blocks).
    """

    def __init__(self, params: Mapping, *, n_layers: int, units: str = "m", gradient_layers: Sequence[int] = (),
                 depth_parameter: bool = False, increasing_velocity: bool = False,
                 slower_allowed: Sequence[int] = (), min_total_depth: float | None = None,
                 max_total_depth: float | None = None, grid_size: int = 2048, seed: int = 20240101):
        self.n_layers = _check_n_layers(n_layers)
        N = self.n_layers - 1
        self.gradient_layers = tuple(_check_gradient_layers(gradient_layers, self.n_layers))
        self.depth_parameter = bool(depth_parameter)
        self.priors = dict(params)
        for name, p in self.priors.items():
            if _split(name)[0] not in _FAMILIES:
                raise ValueError(f"{name}: not a parameter name (expected thickness_k, depth_k, vp_k, "
                                 "vpvs or vpvs_k, vs_k, gradient_k)")
            if not isinstance(p, (Distribution, Fixed)):
                raise TypeError(f"{name}: expected a Distribution or Fixed, got {type(p).__name__}")
        self.names = tuple(n for n, p in self.priors.items() if isinstance(p, Distribution))
        self.units = tuple(parameter_unit(n, units) for n in self.names)
        self.unit_system = units
        self.fixed = {n: float(p.value) for n, p in self.priors.items() if isinstance(p, Fixed)}
        self.increasing_velocity = bool(increasing_velocity)
        self.slower_allowed = tuple(sorted(int(k) for k in slower_allowed))
        for k in self.slower_allowed:
            if not 2 <= k <= self.n_layers:
                raise ValueError(f"constraints.slower_allowed: expected layer numbers 2..{self.n_layers}; got {k}")
        if self.slower_allowed and not self.increasing_velocity:
            raise ValueError("constraints.slower_allowed: only meaningful with increasing_velocity = true")
        lo = -np.inf if min_total_depth is None else float(min_total_depth)
        hi = np.inf if max_total_depth is None else float(max_total_depth)
        if (min_total_depth is not None or max_total_depth is not None) and N == 0:
            raise ValueError("constraints: total-depth bounds need at least one interface (n_layers >= 2)")
        if not lo < hi:
            raise ValueError(f"constraints: min_total_depth ({lo:g}) must be < max_total_depth ({hi:g})")
        self.min_total_depth, self.max_total_depth = lo, hi

        links: list = []
        if self.increasing_velocity:
            for k in range(1, N + 1):
                if k + 1 not in self.slower_allowed:
                    g = f"gradient_{k}" if k in self.gradient_layers else None
                    links.append(_VelocityStep(k, g, self.depth_parameter))
        if self.depth_parameter:
            links += [_DepthStep(k) for k in range(1, N + 1)]
        if math.isfinite(lo) or math.isfinite(hi):
            links.append(_TotalDepth(lo, hi, N, self.depth_parameter))
        for link in links:
            for name in link.names:
                if name not in self.priors:
                    raise ValueError(f"prior.{name}: missing, but the constraint {link.text()} needs it")
        self._links = tuple(links)
        self._blocks = self._make_blocks(grid_size, seed)
        self.log_normaliser = float(sum(b.log_mass for b in self._blocks))
        self.log_normaliser_error = float(sum(b.log_mass_error for b in self._blocks))

    # ------------------------------------------------------------ structure
    def _make_blocks(self, grid_size, seed):
        col = {n: i for i, n in enumerate(self.names)}
        parent = {n: n for n in self.names}

        def find(n):
            while parent[n] != n:
                parent[n] = parent[parent[n]]
                n = parent[n]
            return n

        def union(names):
            names = [n for n in names if n in col]
            for other in names[1:]:
                parent[find(other)] = find(names[0])

        lows = {n: -np.inf for n in self.names}
        highs = {n: np.inf for n in self.names}
        orders = []      # (lower, upper, shift) between two free parameters
        sums = []        # (_TotalDepth, constant part)
        general = []     # links that need Monte Carlo
        heads, tails = {}, {}   # random shift from / to a fixed velocity: name -> (value, shift)
        for link in self._links:
            kind = self._structure(link)
            if kind[0] == "order" and isinstance(kind[3], tuple):
                _, a, b, (g_name, h_name) = kind
                g = self.priors[g_name] if g_name in col else self.fixed[g_name]
                h = self.priors[h_name] if h_name in col else self.fixed[h_name]
                shift = _ProductShift(g, h, g_name, h_name)
                if a in col and b in col:
                    orders.append((a, b, shift))
                elif b in col:
                    heads[b] = (self.fixed[a], shift)
                elif a in col:
                    tails[a] = (self.fixed[b], shift)
                else:
                    general.append(link)
                union([n for n in (a, b, g_name, h_name) if n in col])
            elif kind[0] == "order":
                _, a, b, shift = kind
                a_free, b_free = a in col, b in col
                ca = 0.0 if a is None else self.fixed.get(a)
                if a_free and b_free:
                    orders.append((a, b, shift))
                    union([a, b])
                elif b_free:
                    lows[b] = max(lows[b], ca + shift)
                elif a_free:
                    highs[a] = min(highs[a], self.fixed[b] - shift)
                elif not self.fixed[b] >= ca + shift:
                    raise ValueError(f"constraints: the fixed values violate {link.text()}")
            elif kind[0] == "bound":
                _, name, low, high = kind
                if name in col:
                    lows[name], highs[name] = max(lows[name], low), min(highs[name], high)
                elif not low <= self.fixed[name] <= high:
                    raise ValueError(f"constraints: fixed {name} = {self.fixed[name]:g} violates {link.text()}")
            elif kind[0] == "sum":
                free = [n for n in link.names if n in col]
                const = sum(self.fixed[n] for n in link.names if n not in col)
                if not free:
                    if not link.low <= const <= link.high:
                        raise ValueError(f"constraints: the fixed thicknesses (total {const:g}) violate {link.text()}")
                    continue
                sums.append((link, const, free))
                union(free)
            else:
                if not any(n in col for n in link.names):
                    v = {n: np.asarray(self.fixed[n]) for n in link.names}
                    if not link.holds(v):
                        raise ValueError(f"constraints: the fixed values violate {link.text()}")
                    continue
                general.append(link)
                union(link.names)

        components: dict[str, list[str]] = {}
        for n in self.names:
            components.setdefault(find(n), []).append(n)
        blocks = []
        for members in components.values():
            mset = set(members)
            c_orders = [o for o in orders if o[0] in mset]
            c_sums = [s for s in sums if s[2][0] in mset]
            c_general = [g for g in general if any(n in mset for n in g.names)]
            c_head = {n: heads[n] for n in members if n in heads}
            c_tail = {n: tails[n] for n in members if n in tails}
            bounded = any(math.isfinite(lows[n]) or math.isfinite(highs[n]) for n in members)
            dists = [self.priors[n] for n in members]
            cols = [col[n] for n in members]
            if c_general or (c_sums and (c_orders or bounded or c_head or c_tail)):
                links = [lk for lk in self._links if any(n in mset for n in lk.names)]
                blocks.append(_MonteCarloBlock(cols, members, dists, links, self.fixed, seed=seed))
            elif c_sums:
                link, const, free = c_sums[0]
                blocks.append(_BoundedSum([col[n] for n in free], free, [self.priors[n] for n in free],
                                          link.low - const, link.high - const, grid_size, link.text()))
            elif c_orders or bounded or c_head or c_tail:
                random = [s for _, _, s in c_orders if isinstance(s, _ProductShift)]
                random += [v[1] for v in (*c_head.values(), *c_tail.values())]
                shift_names = {n for r in random for n in r.free}
                chain = self._chain_order([n for n in members if n not in shift_names], c_orders)
                shift = {(a, b): s for a, b, s in c_orders}
                shifts = [shift[(chain[j], chain[j + 1])] for j in range(len(chain) - 1)]
                blocks.append(_OrderedChain([col[n] for n in chain], chain, [self.priors[n] for n in chain],
                                            shifts, [lows[n] for n in chain], [highs[n] for n in chain],
                                            grid_size, head=c_head.get(chain[0]), tail=c_tail.get(chain[-1]),
                                            shift_cols=col))
            else:
                blocks.append(_Independent(cols[0], dists[0]))
        return blocks

    def _structure(self, link):
        """Classify a constraint: ('order', a, b, shift) | ('bound', name, lo, hi) | ('sum',) | ('general',).

        ``shift`` is a number, or (gradient name, thickness name) for the random rise g h.
        """
        if isinstance(link, _DepthStep):
            a = None if link.k == 1 else f"depth_{link.k - 1}"
            return ("order", a, f"depth_{link.k}", 0.0)
        if isinstance(link, _TotalDepth):
            if self.depth_parameter:
                return ("bound", link.names[0], link.low, link.high)
            return ("sum",)
        if link.gradient is None:
            return ("order", link.lower, link.upper, 0.0)
        g = self.fixed.get(link.gradient)
        if g == 0.0:
            return ("order", link.lower, link.upper, 0.0)
        if g is not None and all(n in self.fixed for n in link.thickness_names):
            h = link.thickness({n: self.fixed[n] for n in link.thickness_names})
            return ("order", link.lower, link.upper, g * h)
        if not self.depth_parameter:
            return ("order", link.lower, link.upper, (link.gradient, link.thickness_names[0]))
        return ("general",)

    @staticmethod
    def _chain_order(members, orders):
        if not orders:
            return list(members)
        succ = {a: b for a, b, _ in orders}
        heads = set(succ) - set(succ.values())
        chain = [heads.pop()]
        while chain[-1] in succ:
            chain.append(succ[chain[-1]])
        return chain

    # ------------------------------------------------------------ evaluation
    @property
    def ndim(self) -> int:
        """Number of free parameters D."""
        return len(self.names)

    @property
    def has_unit_cube_transform(self) -> bool:
        """False where some coupled constraint is handled by Monte Carlo (see :meth:`from_unit_cube`)."""
        return not any(isinstance(b, _MonteCarloBlock) for b in self._blocks)

    def _as_batch(self, arr, what):
        arr = np.asarray(arr, dtype=float)
        single = arr.ndim == 1
        if single:
            arr = arr[None, :]
        if arr.ndim != 2 or arr.shape[1] != self.ndim:
            raise ValueError(f"{what}: expected shape (batch, {self.ndim}) or ({self.ndim},) for "
                             f"({', '.join(self.names)}); got {np.shape(arr)}")
        bad = np.isnan(arr).any(axis=0)
        if bad.any():
            raise ValueError(f"{what}: NaN in column {self.names[int(np.argmax(bad))]}")
        return arr, single

    def values(self, theta) -> dict[str, np.ndarray]:
        """Every parameter (free and fixed) as a (batch,) array, keyed by name."""
        theta, _ = self._as_batch(theta, "theta")
        out = {n: theta[:, i] for i, n in enumerate(self.names)}
        out.update({n: np.full(theta.shape[0], v) for n, v in self.fixed.items()})
        return out

    def constraints_hold(self, theta) -> np.ndarray:
        """Boolean (batch,) array: every constraint holds for the row of ``theta``."""
        v = self.values(theta)
        ok = np.ones(np.asarray(theta, dtype=float).reshape(-1, self.ndim).shape[0], dtype=bool)
        for link in self._links:
            ok &= link.holds(v)
        return ok

    def log_prob(self, theta) -> np.ndarray:
        """Log of the normalised constrained prior density.

        Parameters
        ----------
        theta : array (batch, D) or (D,)
            Free parameters in the order of :attr:`names`, in :attr:`units`.

        Returns
        -------
        array (batch,) or float
            ``sum_i log p_i(theta_i) - log_normaliser`` where every constraint holds and
            ``theta`` is inside every support; ``-inf`` elsewhere.
        """
        arr, single = self._as_batch(theta, "theta")
        lp = np.zeros(arr.shape[0])
        for i, n in enumerate(self.names):
            lp += self.priors[n].logpdf(arr[:, i])
        lp = np.where(self.constraints_hold(arr), lp - self.log_normaliser, -np.inf)
        return float(lp[0]) if single else lp

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """``n`` independent draws from the constrained prior, shape (n, D)."""
        out = np.empty((int(n), self.ndim))
        for block in self._blocks:
            out[:, block.cols] = block.sample(int(n), rng)
        return out

    def from_unit_cube(self, u) -> np.ndarray:
        """Map points of the unit cube onto the constrained support (for nested sampling).

        The map is deterministic and its push-forward of the uniform distribution is the
        normalised constrained prior (to the grid accuracy stated by
        ``log_normaliser_error``); every output satisfies the constraints.

        Parameters
        ----------
        u : array (batch, D) or (D,), values in [0, 1]
            Use the open interval: 0 or 1 send unbounded priors to -inf or +inf. At the
            edge of a constraint the outputs satisfy it up to last-bit rounding.

        Returns
        -------
        array of the same shape: free parameters in the order of :attr:`names`.

        Raises
        ------
        NotImplementedError
            Where a coupled constraint is handled by Monte Carlo (see
            :attr:`has_unit_cube_transform`).
        """
        arr, single = self._as_batch(u, "u")
        if np.any((arr < 0) | (arr > 1)):
            raise ValueError("u: unit-cube coordinates must lie in [0, 1]")
        out = np.empty_like(arr)
        for block in self._blocks:
            out[:, block.cols] = block.from_unit(arr[:, block.cols])
        return out[0] if single else out

    def describe(self) -> str:
        """Multi-line text: every parameter with its prior and unit, the constraints, the normaliser."""
        lines = []
        for n, p in self.priors.items():
            lines.append(f"{n}: {p.describe(parameter_unit(n, self.unit_system))}")
        for link in self._links:
            lines.append(f"constraint: {link.text()}")
        lines.append(f"log P(constraints) = {self.log_normaliser:.5f} +- {self.log_normaliser_error:.1e}"
                     f" ({', '.join(sorted({b.kind for b in self._blocks}))})")
        return "\n".join(lines)

    def __repr__(self) -> str:
        return f"<JointPrior over {', '.join(self.names)}>"


# ===================================================================== TOML layout
#: Keys of each distribution form in a ``[prior]`` entry (besides ``dist``).
DIST_PARAMETERS = {
    "uniform": ("low", "high"),
    "normal": ("mean", "sd"),
    "lognormal": ("median", "sigma_log"),
    "truncated_normal": ("mean", "sd", "low", "high"),
    "truncated_lognormal": ("median", "sigma_log", "low", "high"),
}
_BOUNDS_MAY_BE_INFINITE = ("truncated_normal", "truncated_lognormal")


def _spec_number(where, key, value, *, allow_inf=False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ValueError(f"{where}: '{key}' must be a number; got {value!r}")
    value = float(value)
    if math.isnan(value) or (math.isinf(value) and not allow_inf):
        raise ValueError(f"{where}: '{key}' must be a finite number; got {value}")
    return value


def distribution_from_spec(spec, where: str) -> Distribution | Fixed:
    """Build a 1-D prior from one TOML entry such as ``{dist = "uniform", low = 1, high = 2}``.

    ``where`` (e.g. ``'prior.vp_2'``) starts every error message.
    """
    if not isinstance(spec, Mapping):
        raise ValueError(f"{where}: expected a table such as {{ dist = \"uniform\", low = ..., high = ... }} "
                         f"or {{ fixed = ... }}; got {spec!r}")
    if "fixed" in spec:
        extra = sorted(set(spec) - {"fixed"})
        if extra:
            raise ValueError(f"{where}: 'fixed' stands alone; unexpected key(s) {', '.join(extra)}")
        return Fixed(_spec_number(where, "fixed", spec["fixed"], allow_inf=True))
    if "dist" not in spec:
        raise ValueError(f"{where}: give 'dist' (one of {', '.join(DIST_PARAMETERS)}) or 'fixed'")
    kind = spec["dist"]
    if kind not in DIST_PARAMETERS:
        raise ValueError(f"{where}: 'dist' must be one of {', '.join(DIST_PARAMETERS)}; got {kind!r}")
    keys = DIST_PARAMETERS[kind]
    unknown = sorted(set(spec) - {"dist", *keys})
    if unknown:
        raise ValueError(f"{where}: unknown key(s) {', '.join(map(repr, unknown))} for dist '{kind}' "
                         f"(expected {', '.join(keys)})")
    missing = [k for k in keys if k not in spec]
    if missing:
        raise ValueError(f"{where}: missing {', '.join(map(repr, missing))} for dist '{kind}' "
                         f"(expected {', '.join(keys)})")
    v = {k: _spec_number(where, k, spec[k], allow_inf=(kind in _BOUNDS_MAY_BE_INFINITE and k in ("low", "high")))
         for k in keys}
    try:
        if kind == "uniform":
            return Uniform(v["low"], v["high"])
        if kind == "normal":
            return Normal(v["mean"], v["sd"])
        if kind == "lognormal":
            return LogNormal(v["median"], v["sigma_log"])
        if kind == "truncated_normal":
            return Truncated(Normal(v["mean"], v["sd"]), v["low"], v["high"])
        return Truncated(LogNormal(v["median"], v["sigma_log"]), v["low"], v["high"])
    except ValueError as err:
        raise ValueError(f"{where}: {err}") from None


def _check_domain(name: str, prior, where: str, n_layers: int) -> None:
    """Reject priors that allow physically impossible values for ``name``."""
    family, k = _split(name)
    if family == "vpvs":
        floor, what = MIN_SOLID_VPVS, "Vp/Vs of a solid exceeds sqrt(4/3) = 1.1547 (inf marks a fluid layer)"
    elif family == "gradient":
        if k != n_layers:
            floor = -np.inf
        else:
            floor, what = 0.0, "the half-space gradient must be >= 0 (a falling half-space reaches zero velocity)"
    elif family == "vs":
        floor, what = 0.0, "vs must be >= 0 (0 marks a fluid layer)"
    else:
        floor, what = 0.0, f"{family} must be positive"
    if isinstance(prior, Fixed):
        value = prior.value
        if family == "vpvs":
            ok = value > floor
        elif family in ("thickness", "depth", "vp"):
            ok = math.isfinite(value) and value > 0
        else:
            ok = math.isfinite(value) and value >= floor
        if not ok:
            raise ValueError(f"{where}: fixed value {value:g} not allowed: "
                             f"{what if floor > -np.inf else 'must be finite'}")
        return
    low = prior.support[0]
    if low < floor:
        raise ValueError(f"{where}: the prior allows values down to {low:g}, but {what}; "
                         "use a uniform or truncated form with a suitable low, or a log-normal")


def _parse_constraints(table, n_layers: int) -> dict:
    if table is None:
        return {}
    if not isinstance(table, Mapping):
        raise ValueError(f"constraints: expected a table; got {table!r}")
    allowed = ("increasing_velocity", "slower_allowed", "min_total_depth", "max_total_depth")
    unknown = sorted(set(table) - set(allowed))
    if unknown:
        raise ValueError(f"constraints.{unknown[0]}: unknown key (expected one of {', '.join(allowed)})")
    out = {}
    if "increasing_velocity" in table:
        value = table["increasing_velocity"]
        if not isinstance(value, bool):
            raise ValueError(f"constraints.increasing_velocity: expected true or false; got {value!r}")
        out["increasing_velocity"] = value
    if "slower_allowed" in table:
        value = table["slower_allowed"]
        if not isinstance(value, list):
            raise ValueError(f"constraints.slower_allowed: expected a list of layer numbers such as [3]; got {value!r}")
        for k in value:
            if isinstance(k, bool) or not isinstance(k, int) or not 2 <= k <= n_layers:
                raise ValueError(f"constraints.slower_allowed: expected layer numbers 2..{n_layers} "
                                 f"(layer 1 has no layer above); got {k!r}")
        if len(set(value)) != len(value):
            raise ValueError(f"constraints.slower_allowed: a layer is listed twice in {value}")
        if value and not table.get("increasing_velocity", False):
            raise ValueError("constraints.slower_allowed: only meaningful with increasing_velocity = true")
        out["slower_allowed"] = list(value)
    for key in ("min_total_depth", "max_total_depth"):
        if key in table:
            value = _spec_number(f"constraints.{key}", key, table[key])
            if value < 0 or (key == "max_total_depth" and value == 0):
                raise ValueError(f"constraints.{key}: must be > 0 (a depth below the datum); got {value:g}")
            if n_layers < 2:
                raise ValueError(f"constraints.{key}: the model has no interface (n_layers = 1)")
            out[key] = value
    if "min_total_depth" in out and "max_total_depth" in out and not out["min_total_depth"] < out["max_total_depth"]:
        raise ValueError("constraints.min_total_depth: must be < max_total_depth")
    return out


def prior_from_toml_table(table: Mapping, n_layers: int, *, units: str, gradient_layers: Sequence[int] = (),
                          vpvs_mode: str = "shared", depth_parameter: bool = False,
                          grid_size: int = 2048) -> JointPrior:
    """Build a :class:`JointPrior` from the ``[prior]`` and ``[constraints]`` tables.

    Parameters
    ----------
    table : mapping
        ``{"prior": {...}, "constraints": {...}}`` as read by ``tomllib`` (``constraints``
        optional); see ``docs/priors.md`` for every key.
    n_layers : int
        Layers including the half-space (N+1).
    units : {'m', 'km'}
        Length unit of the values (velocities in units/s).
    gradient_layers, vpvs_mode, depth_parameter
        Model structure, as in :func:`parameter_names`.

    Raises
    ------
    ValueError
        Naming the key (``prior.vp_2``, ``constraints.slower_allowed``...) and what was
        expected: unknown sections or keys, unknown ``dist``, missing or extra numbers,
        low >= high, a free parameter without a prior, priors allowing impossible values,
        constraints that no parameter values satisfy.
    """
    if not isinstance(table, Mapping):
        raise ValueError(f"expected a table with [prior] and optionally [constraints]; got {type(table).__name__}")
    unknown = sorted(set(table) - {"prior", "constraints"})
    if unknown:
        raise ValueError(f"[{unknown[0]}]: unknown section (expected [prior] and optionally [constraints])")
    if "prior" not in table or not isinstance(table["prior"], Mapping):
        raise ValueError("[prior]: missing section (one entry per parameter or family)")
    prior_table = table["prior"]
    names = parameter_names(n_layers, vpvs_mode=vpvs_mode, gradient_layers=gradient_layers,
                            depth_parameter=depth_parameter)
    parameter_unit(names[0], units)  # checks units
    families = {_split(n)[0] for n in names if _split(n)[1] is not None}
    for key in prior_table:
        if key not in names and key not in families:
            raise ValueError(
                f"prior.{key}: unknown parameter; this model (n_layers = {n_layers}, vpvs_mode = '{vpvs_mode}', "
                f"depth_parameter = {str(bool(depth_parameter)).lower()}, gradient_layers = {list(gradient_layers)}) "
                f"has {', '.join(names)} and family defaults {', '.join(sorted(families))}")
    params = {}
    for name in names:
        family = _split(name)[0]
        if name in prior_table:
            spec, where = prior_table[name], f"prior.{name}"
        elif family in prior_table and family != name:
            spec, where = prior_table[family], f"prior.{family} (default for {name})"
        else:
            hint = f" or a family default '{family} = {{...}}'" if family in families else ""
            raise ValueError(f"prior.{name}: missing; every parameter needs a prior "
                             f"(add '{name} = {{ dist = ... }}'{hint}, or '{{ fixed = ... }}')")
        prior = distribution_from_spec(spec, where)
        _check_domain(name, prior, where, n_layers)
        params[name] = prior
    constraints = _parse_constraints(table.get("constraints"), n_layers)
    return JointPrior(params, n_layers=n_layers, units=units, gradient_layers=gradient_layers,
                      depth_parameter=depth_parameter, grid_size=grid_size, **constraints)


_TEMPLATE_KEYS = ("description", "units", "n_layers", "vpvs_mode", "gradient_layers", "depth_parameter")


def load_prior_template(path) -> JointPrior:
    """Read a prior file such as ``priors/shallow_site.toml`` into a :class:`JointPrior`.

    The file has a ``[template]`` table describing the model it is made for (keys
    ``description``, ``units``, ``n_layers``, ``vpvs_mode``, ``gradient_layers``,
    ``depth_parameter``) besides ``[prior]`` and ``[constraints]``. Errors start with the
    file name.
    """
    path = Path(path)
    try:
        with path.open("rb") as fh:
            doc = tomllib.load(fh)
    except tomllib.TOMLDecodeError as err:
        raise ValueError(f"{path}: {err}") from None
    try:
        settings = doc.pop("template", None)
        if not isinstance(settings, Mapping):
            raise ValueError("[template]: missing section (units, n_layers, vpvs_mode, ...)")
        unknown = sorted(set(settings) - set(_TEMPLATE_KEYS))
        if unknown:
            raise ValueError(f"template.{unknown[0]}: unknown key (expected {', '.join(_TEMPLATE_KEYS)})")
        for key in ("units", "n_layers"):
            if key not in settings:
                raise ValueError(f"template.{key}: missing")
        return prior_from_toml_table(doc, settings["n_layers"], units=settings["units"],
                                     gradient_layers=settings.get("gradient_layers", []),
                                     vpvs_mode=settings.get("vpvs_mode", "shared"),
                                     depth_parameter=settings.get("depth_parameter", False))
    except ValueError as err:
        raise ValueError(f"{path}: {err}") from None
