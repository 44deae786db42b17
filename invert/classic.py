"""Quick classic estimate from one shot: the intercept-time method.

First-arrival times of a surface shot recorded by surface receivers are fitted
by straight-line segments, one per branch of the travel-time curve (direct
wave, then head waves from successively deeper interfaces). Each segment ``i``
(1-based, ``i = 1`` the direct wave) gives an apparent velocity ``v_i = 1 /
slope_i`` and an intercept time ``t_i``. For flat layers whose velocity
increases downward the intercepts obey (Telford, Geldart & Sheriff, *Applied
Geophysics*, 2nd ed., 1990, ch. 4; Kearey, Brooks & Hill, *An Introduction to
Geophysical Exploration*, 3rd ed., 2002, ch. 5)::

    t_i = 2 * sum_{j < i} h_j * cos(theta_ji) / v_j,   sin(theta_ji) = v_j / v_i

or, identically, ``t_i = 2 * sum_{j<i} h_j * sqrt(1/v_j**2 - 1/v_i**2)``, which
is solved for the thicknesses ``h_1 .. h_{n-1}`` layer by layer from the top.

The method cannot see a layer slower than the one above it (it produces no
head wave) nor a thin layer whose head wave never arrives first (a hidden
layer); such layers bias the thicknesses below them. The estimate is meant as
a sanity check and a starting point for sampling, not as a result.

Units: offsets in any length unit, times in seconds; velocities come out in
length unit per second.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

__all__ = ["InterceptTimeEstimate", "InterceptTimeWarning", "fit_segments", "thicknesses_from_intercepts",
           "intercept_time_estimate"]


class InterceptTimeWarning(UserWarning):
    """The picks do not fit the assumptions of the intercept-time method."""


@dataclass(frozen=True)
class InterceptTimeEstimate:
    """Result of :func:`intercept_time_estimate`.

    Attributes
    ----------
    velocities : ndarray (segments,)
        Apparent velocity of each segment: layer 1, ..., half-space [length/s].
    intercepts : ndarray (segments,)
        Intercept time of each fitted line at zero offset [s] (ideally 0 for the direct wave).
    thicknesses : ndarray (segments - 1,)
        Layer thicknesses from the intercepts [length]; NaN where they cannot be computed.
    crossover_distances : ndarray (segments - 1,)
        Offsets where consecutive fitted lines intersect [length].
    segment_starts : ndarray of int (segments,)
        Index (into the offset-sorted picks) of the first pick of each segment.
    segment : ndarray of int (picks,)
        Segment (1-based) of every pick, in the order the picks were given.
    offsets : ndarray (picks,)
        The offsets as given [length].
    rms : float
        Root-mean-square misfit of the fitted lines [s].
    warnings : tuple of str
        Reasons to distrust the estimate.
    """

    velocities: np.ndarray
    intercepts: np.ndarray
    thicknesses: np.ndarray
    crossover_distances: np.ndarray
    segment_starts: np.ndarray
    segment: np.ndarray
    offsets: np.ndarray
    rms: float
    warnings: tuple[str, ...]

    @property
    def n_segments(self) -> int:
        return len(self.velocities)

    @property
    def interface_depths(self) -> np.ndarray:
        """Depth of the base of each layer above the half-space [length]."""
        return np.cumsum(self.thicknesses)

    def summary(self, length_unit: str = "m") -> str:
        """A printable report of the fit, the layers and the warnings."""
        u = length_unit
        lines = ["Intercept-time estimate (straight lines fitted to the first arrivals of one shot; flat layers,",
                 "velocity increasing downward assumed):",
                 f"  segment  picks  offsets [{u}]        velocity [{u}/s]   intercept [s]"]
        ends = list(self.segment_starts[1:]) + [len(self.offsets)]
        x = np.sort(self.offsets)
        for k, (a, b) in enumerate(zip(self.segment_starts, ends)):
            span = f"{x[a]:g} - {x[b - 1]:g}"
            lines.append(f"  {k + 1:>7}  {b - a:>5}  {span:<19}  {self.velocities[k]:>15.4g}  "
                         f"{self.intercepts[k]:>13.5f}")
        lines.append(f"  layer       thickness [{u}]  depth to base [{u}]  velocity [{u}/s]")
        depths = self.interface_depths
        for k, h in enumerate(self.thicknesses):
            lines.append(f"  {k + 1:<10}  {h:>14.4g}  {depths[k]:>18.4g}  {self.velocities[k]:>15.4g}")
        lines.append(f"  {'half-space':<10}  {'':>14}  {'':>18}  {self.velocities[-1]:>15.4g}")
        if len(self.crossover_distances):
            xs = ", ".join(f"{c:.4g}" for c in self.crossover_distances)
            lines.append(f"  crossover distances [{u}]: {xs}")
        lines.append(f"  rms misfit of the lines: {self.rms:.3g} s")
        lines.extend(f"  warning: {w}" for w in self.warnings)
        return "\n".join(lines)


def fit_segments(offset, time, n_segments: int, min_points: int = 3):
    """Least-squares fit of ``n_segments`` straight lines to contiguous runs of picks.

    The breakpoints are chosen by dynamic programming over all splits of the
    offset-sorted picks into runs of at least ``min_points`` picks with distinct
    offsets, minimising the total squared misfit; each run gets its own line
    (slope and intercept).

    Parameters
    ----------
    offset, time : arrays (picks,)
        Source-receiver offsets [length] and first-arrival times [s].
    n_segments : int
    min_points : int

    Returns
    -------
    starts : ndarray of int (n_segments,)
        Index into the sorted picks of the first pick of each segment.
    slopes, intercepts : ndarrays (n_segments,)
        Fitted lines ``t = intercept + slope * x`` [s/length, s].
    sse : float
        Total squared misfit [s^2].
    """
    x, t = _sorted_picks(offset, time)
    n = len(x)
    n_segments = _positive("n_segments", n_segments)
    min_points = _positive("min_points", min_points)
    if min_points < 2:
        raise ValueError("min_points must be at least 2 (two points fix a line)")
    if n < n_segments * min_points:
        raise ValueError(f"{n} picks cannot make {n_segments} segments of at least {min_points} picks")
    cost = _segment_costs(x, t, min_points)
    best = np.full((n_segments + 1, n + 1), np.inf)
    arg = np.zeros((n_segments + 1, n + 1), dtype=int)
    best[0, 0] = 0.0
    for k in range(1, n_segments + 1):
        for j in range(k * min_points, n + 1):
            total = best[k - 1, :j] + cost[:j, j]
            i = int(np.argmin(total))
            best[k, j], arg[k, j] = total[i], i
    if not np.isfinite(best[n_segments, n]):
        raise ValueError(f"the picks cannot be split into {n_segments} segments of at least {min_points} "
                         "distinct offsets")
    starts = np.zeros(n_segments, dtype=int)
    j = n
    for k in range(n_segments, 0, -1):
        starts[k - 1] = j = arg[k, j]
    ends = np.append(starts[1:], n)
    slopes = np.empty(n_segments)
    intercepts = np.empty(n_segments)
    sse = 0.0
    for k, (a, b) in enumerate(zip(starts, ends)):
        slopes[k], intercepts[k] = np.polyfit(x[a:b], t[a:b], 1)
        sse += float(np.sum((t[a:b] - intercepts[k] - slopes[k] * x[a:b]) ** 2))  # exact, not the running sums
    return starts, slopes, intercepts, sse


def thicknesses_from_intercepts(velocities, intercepts) -> np.ndarray:
    """Layer thicknesses from head-wave intercept times (flat layers, surface source).

    Solves ``t_i = 2 * sum_{j<i} h_j * sqrt(1/v_j**2 - 1/v_i**2)`` for
    ``i = 2..n`` (Telford, Geldart & Sheriff 1990, ch. 4; Kearey, Brooks & Hill
    2002, ch. 5) from the top down.

    Parameters
    ----------
    velocities : array (n,)
        Velocity of layer 1 .. layer n-1 and of the half-space [length/s].
    intercepts : array (n,)
        Intercept time of each branch [s]; the first (direct wave) is not used.

    Returns
    -------
    ndarray (n - 1,)
        Thickness of each layer above the half-space [length]; NaN from the
        first layer whose velocity does not increase below it, or whose
        thickness would come out negative.
    """
    v = np.asarray(velocities, dtype=float)
    ti = np.asarray(intercepts, dtype=float)
    if v.ndim != 1 or v.shape != ti.shape:
        raise ValueError(f"velocities and intercepts must be 1-D of equal length, got {v.shape} and {ti.shape}")
    h = np.full(len(v) - 1, np.nan)
    for i in range(1, len(v)):
        # vertical slowness of each upper layer for the ray critical at the top of layer i
        with np.errstate(invalid="ignore"):
            q = np.sqrt(1.0 / v[:i] ** 2 - 1.0 / v[i] ** 2)
        if not (np.all(np.isfinite(q)) and q[-1] > 0):
            break
        hi = (ti[i] / 2.0 - np.dot(h[: i - 1], q[:-1])) / q[-1]
        if not hi > 0:
            break
        h[i - 1] = hi
    return h


def intercept_time_estimate(offset, time, n_segments: int | None = None, max_segments: int = 4,
                            min_points: int = 3) -> InterceptTimeEstimate:
    """Velocities, thicknesses and crossover distances from one shot's first arrivals.

    Parameters
    ----------
    offset : array (picks,)
        Source-receiver distances on one side of a surface shot [length], >= 0.
    time : array (picks,)
        First-arrival times [s].
    n_segments : int, optional
        Number of straight-line segments (= layers including the half-space).
        If omitted, the number from 1 to ``max_segments`` with the smallest
        Bayesian information criterion ``n log(SSE/n) + (3k - 1) log n`` is
        taken (2 parameters per line, k - 1 breakpoints; SSE floored at
        ``n * (1e-6 * time range)**2`` so that exact data do not reward extra
        lines for round-off).
    max_segments : int
    min_points : int
        Fewest picks per segment.

    Returns
    -------
    InterceptTimeEstimate
        Warnings (also issued as :class:`InterceptTimeWarning`) name velocities
        that do not increase with depth, non-positive slopes, thicknesses that
        cannot be computed and a direct-wave intercept far from zero.
    """
    x, t = _sorted_picks(offset, time)
    n = len(x)
    if n_segments is None:
        max_segments = _positive("max_segments", max_segments)
        top = min(max_segments, n // max(min_points, 2))
        if top < 1:
            raise ValueError(f"{n} picks are too few for segments of {min_points} picks")
        floor = n * (1e-6 * max(np.ptp(t), np.finfo(float).tiny)) ** 2
        fits, scores = [], []
        for k in range(1, top + 1):
            try:
                fit = fit_segments(x, t, k, min_points)
            except ValueError:
                break
            fits.append(fit)
            scores.append(n * np.log(max(fit[3], floor) / n) + (3 * k - 1) * np.log(n))
        starts, slopes, intercepts, sse = fits[int(np.argmin(scores))]
    else:
        starts, slopes, intercepts, sse = fit_segments(x, t, n_segments, min_points)

    notes = []
    with np.errstate(divide="ignore"):
        velocities = np.where(slopes > 0, 1.0 / slopes, np.nan)
    for k in np.flatnonzero(~(slopes > 0)):
        notes.append(f"segment {k + 1} has a non-positive slope (times do not grow with offset); "
                     "it gives no velocity")
    for k in range(1, len(velocities)):
        if velocities[k] <= velocities[k - 1]:
            notes.append(f"apparent velocity does not increase from segment {k} ({velocities[k - 1]:.4g}) to "
                         f"segment {k + 1} ({velocities[k]:.4g}); the intercept-time method assumes velocity "
                         "increasing with depth and cannot see a slower layer (no head wave)")
    thick = thicknesses_from_intercepts(velocities, intercepts)
    missing = np.flatnonzero(np.isnan(thick))
    if missing.size:
        notes.append(f"thickness of layer {missing[0] + 1} and below cannot be computed from these slopes and "
                     "intercepts")
    ends = np.append(starts[1:], n)
    if len(slopes) > 1:
        with np.errstate(divide="ignore", invalid="ignore"):
            crossover = (intercepts[1:] - intercepts[:-1]) / (slopes[:-1] - slopes[1:])
    else:
        crossover = np.empty(0)
    direct = slice(starts[0], ends[0])
    if abs(intercepts[0]) > 0.1 * (t[direct].max() - t[direct].min() + 1e-300) and abs(intercepts[0]) > 1e-9:
        notes.append(f"the direct-wave line does not pass through the origin (intercept {intercepts[0]:.3g} s): "
                     "check the time origin (trigger delay) or the picks")
    for note in notes:
        warnings.warn(note, InterceptTimeWarning, stacklevel=2)

    order = np.argsort(np.asarray(offset, dtype=float), kind="stable")
    seg_sorted = np.searchsorted(starts, np.arange(n), side="right")
    segment = np.empty(n, dtype=int)
    segment[order] = seg_sorted
    return InterceptTimeEstimate(velocities, intercepts, thick, crossover, starts, segment,
                                 np.asarray(offset, dtype=float).copy(), float(np.sqrt(sse / n)), tuple(notes))


def _sorted_picks(offset, time) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(offset, dtype=float)
    t = np.asarray(time, dtype=float)
    if x.ndim != 1 or x.shape != t.shape:
        raise ValueError(f"offset and time must be 1-D arrays of equal length, got {x.shape} and {t.shape}")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(t))):
        bad = int(np.flatnonzero(~(np.isfinite(x) & np.isfinite(t)))[0])
        raise ValueError(f"pick {bad}: offset {x[bad]} / time {t[bad]} is not a finite number")
    if np.any(x < 0):
        bad = int(np.flatnonzero(x < 0)[0])
        raise ValueError(f"pick {bad}: offset {x[bad]} < 0; give the picks of one side of the shot "
                         "(the two sides see dipping layers differently)")
    order = np.argsort(x, kind="stable")
    return x[order], t[order]


def _segment_costs(x: np.ndarray, t: np.ndarray, min_points: int) -> np.ndarray:
    """Squared misfit of the best line through picks i..j-1, as cost[i, j] (inf if not allowed)."""
    n = len(x)
    xc = (x - x.mean()) / max(np.ptp(x), 1e-300)  # centred and scaled against round-off
    tc = t - t.mean()
    c = [np.concatenate([[0.0], np.cumsum(v)]) for v in (np.ones(n), xc, tc, xc * xc, xc * tc, tc * tc)]
    i, j = np.meshgrid(np.arange(n + 1), np.arange(n + 1), indexing="ij")
    m, sx, st, sxx, sxt, stt = (cj[j] - cj[i] for cj in c)
    with np.errstate(divide="ignore", invalid="ignore"):
        vxx = sxx - sx * sx / m
        cost = stt - st * st / m - (sxt - sx * st / m) ** 2 / vxx
    ok = (m >= min_points) & (vxx > 1e-12 * np.maximum(m, 1))
    return np.where(ok, np.maximum(cost, 0.0), np.inf)


def _positive(name: str, value) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{name} must be a positive integer, got {value!r}")
    return int(value)
