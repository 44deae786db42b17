"""Figures of a posterior: velocity–depth density, corner plot, travel-time fit,
chain traces, convergence, prior predictive band, prior vs posterior marginals.

Every function takes arrays (or a :class:`~invert.model.LayerModel` batch),
draws on a new :class:`matplotlib.figure.Figure` rendered with the Agg canvas
(no pyplot state, no display), returns the Figure and, when ``path`` is given,
also writes it as a PNG. Times are in seconds; lengths and velocities in the
unit named by ``length_unit`` ("m" gives m/s, "km" gives km/s).
"""

from __future__ import annotations

from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import PowerNorm
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from .model import LayerModel

DPI = 120
_WAVE_MARKERS = {"P": "o", "S": "s"}
_ENVELOPE_COLOR = "tab:orange"
_MEDIAN_COLOR = "tab:red"
_TRUTH_COLOR = "tab:green"


def _figure(width: float, height: float) -> Figure:
    fig = Figure(figsize=(width, height), dpi=DPI)
    FigureCanvasAgg(fig)
    return fig


def _finish(fig: Figure, path) -> Figure:
    if path is not None:
        path = Path(path)
        if path.suffix.lower() != ".png":
            raise ValueError(f"path: figures are written as PNG; expected a name ending in .png, got {path}")
        fig.savefig(path, dpi=DPI)
    return fig


def _count(n: int, word: str) -> str:
    return f"{n} {word}" if n == 1 else f"{n} {word}s"


def _with_unit(name: str, unit: str) -> str:
    return f"{name} [{unit}]" if unit else name


# ------------------------------------------------------------ velocity–depth
def _default_grid(model: LayerModel) -> np.ndarray:
    if model.n_layers < 2:
        raise ValueError("depth_grid: a half-space alone has no interfaces to scale the plot; give depth_grid")
    deepest = float(np.quantile(model.interface_depths[:, -1], 0.99))
    return np.linspace(0.0, 1.3 * deepest, 241)


def _edges(centres: np.ndarray) -> np.ndarray:
    mid = 0.5 * (centres[1:] + centres[:-1])
    return np.concatenate([[centres[0] - (mid[0] - centres[0])], mid, [centres[-1] + (centres[-1] - mid[-1])]])


def _row_histogram(values: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Fraction of samples in each bin for every column: (S, D) -> (D, bins)."""
    n_bins = edges.size - 1
    idx = np.searchsorted(edges, values, side="right") - 1
    inside = (idx >= 0) & (idx < n_bins)
    col = np.broadcast_to(np.arange(values.shape[1])[None, :], values.shape)
    flat = (col * n_bins + idx)[inside]
    counts = np.bincount(flat, minlength=values.shape[1] * n_bins)
    return counts.reshape(values.shape[1], n_bins) / values.shape[0]


def _radial(model: LayerModel, planet_radius: float, what: str):
    """The planets a sphere run makes of ``model`` (invert.sphere.RadialModel.from_layers)."""
    from .sphere import RadialModel

    try:
        return RadialModel.from_layers(model, float(planet_radius))
    except ValueError as exc:
        raise ValueError(f"{what}: not a valid planet of radius {planet_radius:g}: {exc}") from None


def _shell_profile(truth: LayerModel, wave: str, z_max: float, planet_radius: float,
                   n: int = 400) -> tuple[np.ndarray, np.ndarray]:
    """Velocity–depth polyline of one model read as shells (the engine's shell laws) down to ``z_max``.

    Dense inside every shell, with both sides of every boundary, so that the
    curved laws and the jumps are drawn as the engine evaluates them.
    """
    radius = float(planet_radius)
    radial = _radial(truth, radius, "truth")
    bounds = [d for d in truth.interface_depths[0] if 0.0 < d < z_max]
    z = np.union1d(np.linspace(0.0, z_max, n), bounds)
    eps = 1e-9 * radius
    z = np.union1d(z, [d - eps for d in bounds])
    return radial.profile(z, wave)[0], z


def _truth_staircase(truth: LayerModel, wave: str, z_max: float) -> tuple[np.ndarray, np.ndarray]:
    """Exact velocity–depth polyline of one model down to ``z_max``."""
    top, grad = truth.velocity(wave)
    tops = truth.layer_tops[0]
    bases = np.append(truth.interface_depths[0], max(z_max, tops[-1]))
    z, v = [], []
    for j in range(truth.n_layers):
        z += [tops[j], bases[j]]
        v += [top[0, j], top[0, j] + grad[0, j] * (bases[j] - tops[j])]
    return np.array(v), np.array(z)


def plot_velocity_depth(model: LayerModel, depth_grid=None, *, waves: Sequence[str] | None = None,
                        truth: LayerModel | None = None, doi=None, length_unit: str = "m",
                        n_velocity_bins: int = 80, max_models: int = 20000, planet_radius: float | None = None,
                        path=None) -> Figure:
    """Posterior density of velocity against depth, with interface-depth histograms.

    Parameters
    ----------
    model : LayerModel
        Posterior batch, one model per sample.
    depth_grid : (D,) array, optional
        Depths at which profiles are evaluated [length]; default 0 to 1.3 times
        the 99th percentile of the deepest interface.
    waves : sequence of {"P", "S"}, optional
        Panels to draw; default P, plus S when any model has S velocities.
    truth : LayerModel, optional
        One model (e.g. the synthetic true model) drawn on top.
    doi : (S,) array, optional
        Per-sample depth of investigation [length]; shades below its median.
    length_unit : str
        Unit of depth; velocities are in ``length_unit``/s.
    n_velocity_bins : int
        Velocity bins of the density image.
    max_models : int
        Larger batches are thinned to this many evenly spaced models (memory).
    planet_radius : float, optional
        Sphere runs: radius R of the planet [length]. The layers are then read
        as the shells the spherical engine uses
        (:meth:`invert.sphere.RadialModel.from_layers`: layers follow the
        ``flat`` shell law, the half-space the ``r2`` law down to the centre),
        velocities at every depth come from
        :meth:`invert.sphere.RadialModel.profile`, and the depth axis stops at
        the centre (depth R); a ``depth_grid`` beyond R is an error.
    path : str or Path, optional
        Write the figure there as PNG.

    Returns
    -------
    matplotlib.figure.Figure
        Panels: one per wave (colour: fraction of models per velocity bin at
        each depth; median and 68 % / 95 % envelopes of velocity at each depth),
        then the interface-depth histograms on the same depth axis, each
        scaled to its own peak so that deep, wide ones stay visible.
    """
    z = _default_grid(model) if depth_grid is None else np.asarray(depth_grid, dtype=float)
    if planet_radius is not None:
        planet_radius = float(planet_radius)
        if not (np.isfinite(planet_radius) and planet_radius > 0):
            raise ValueError(f"planet_radius: expected a positive radius, got {planet_radius!r}")
        if depth_grid is None and z[-1] > planet_radius:
            z = np.linspace(0.0, planet_radius, z.size)
        elif np.any(z > planet_radius * (1 + 1e-12)):
            raise ValueError(f"depth_grid: depths reach {z.max():g} {length_unit}, below the centre of the planet "
                             f"(planet_radius = {planet_radius:g} {length_unit})")
    if z.ndim != 1 or z.size < 2 or np.any(np.diff(z) <= 0):
        raise ValueError("depth_grid: expected at least two strictly increasing depths")
    if waves is None:
        waves = ("P", "S") if np.any(model.vs > 0) else ("P",)
    waves = tuple(str(w).upper() for w in waves)
    if truth is not None and truth.n_models != 1:
        raise ValueError(f"truth: expected one model, got a batch of {truth.n_models}")
    n_total = model.n_models
    if doi is not None:
        doi = np.asarray(doi, dtype=float)
        if doi.shape != (n_total,):
            raise ValueError(f"doi: expected one depth per model ({n_total}), got shape {doi.shape}")
    if n_total > max_models:
        keep = np.linspace(0, n_total - 1, max_models).round().astype(int)
        model = model.take(keep)
        doi = None if doi is None else doi[keep]
    n_if = model.n_layers - 1
    n_panels = len(waves) + (1 if n_if else 0)
    fig = _figure(3.4 * n_panels + 1.2, 6.8)
    fig.set_layout_engine("constrained")
    widths = [3] * len(waves) + ([2] if n_if else [])
    axes = fig.subplots(1, n_panels, sharey=True, gridspec_kw={"width_ratios": widths})
    axes = np.atleast_1d(axes)
    z_edges = np.clip(_edges(z), z[0], z[-1])
    doi_median = None if doi is None else float(np.median(doi))
    vel_unit = f"{length_unit}/s"
    image = None
    radial = None if planet_radius is None else _radial(model, planet_radius, "model")

    def truth_line(wave):
        if planet_radius is None:
            return _truth_staircase(truth, wave, z[-1])
        return _shell_profile(truth, wave, z[-1], planet_radius)

    for ax, wave in zip(axes, waves):
        prof = model.profile(z, wave) if radial is None else radial.profile(z, wave)
        lo, hi = np.quantile(prof, [0.001, 0.999])
        if truth is not None:
            tv, _ = truth_line(wave)
            lo, hi = min(lo, tv.min()), max(hi, tv.max())
        pad = 0.05 * (hi - lo if hi > lo else max(abs(hi), 1.0))
        v_edges = np.linspace(lo - pad, hi + pad, n_velocity_bins + 1)
        frac = _row_histogram(prof, v_edges)
        image = ax.pcolormesh(v_edges, z_edges, frac, cmap="Greys", norm=PowerNorm(0.5, vmin=0.0),
                              rasterized=True)
        q = np.quantile(prof, [0.025, 0.16, 0.5, 0.84, 0.975], axis=0)
        ax.plot(q[2], z, color=_MEDIAN_COLOR, lw=1.6, label="median at each depth")
        for a, b, style, lab in ((1, 3, "--", "68 % envelope"), (0, 4, ":", "95 % envelope")):
            ax.plot(q[a], z, color=_ENVELOPE_COLOR, ls=style, lw=1.3, label=lab)
            ax.plot(q[b], z, color=_ENVELOPE_COLOR, ls=style, lw=1.3)
        if truth is not None:
            tv, tz = truth_line(wave)
            ax.plot(tv, tz, color=_TRUTH_COLOR, lw=1.8, ls="-.", label="true model")
        ax.set_xlabel(f"{wave} velocity [{vel_unit}]")
        ax.set_xlim(v_edges[0], v_edges[-1])
        ax.set_title(f"{wave} velocity")
    if n_if:
        ax = axes[-1]
        depths = model.interface_depths
        for k in range(n_if):
            lo, hi = np.quantile(depths[:, k], [0.001, 0.999])
            # about 40 bins over each interface's spread, none thinner than 1/150 of the depth axis
            width = max((hi - lo) / 40.0, (z[-1] - z[0]) / 150.0)
            n_bins = int(np.ceil((hi - lo) / width)) + 2
            bins = lo - width + width * np.arange(n_bins + 1)
            counts, _ = np.histogram(depths[:, k], bins)
            ax.stairs(counts / counts.max(), bins, orientation="horizontal", fill=True, alpha=0.55,
                      color=f"C{k % 10}", label=f"interface {k + 1}")
        ax.set_xlabel("relative frequency\n(each histogram scaled to peak 1)")
        ax.set_xlim(0.0, 1.05)
        ax.set_title("interface depths")
        ax.legend(loc="lower right", fontsize=8)
        if truth is not None:
            for d in truth.interface_depths[0]:
                ax.axhline(d, color=_TRUTH_COLOR, ls="-.", lw=1.2)
    for ax in axes:
        if doi_median is not None and doi_median < z[-1]:
            ax.axhspan(max(doi_median, z[0]), z[-1], facecolor="none", edgecolor="tab:blue", hatch="//",
                       lw=0.0, alpha=0.5)
        ax.set_ylim(z[-1], z[0])
    if planet_radius is None:
        axes[0].set_ylabel(f"depth below datum [{length_unit}]")
    else:
        axes[0].set_ylabel(f"depth below the surface [{length_unit}]\n(centre of the planet at "
                           f"{planet_radius:g} {length_unit})")
    handles, labels = axes[0].get_legend_handles_labels()
    if doi_median is not None and doi_median < z[-1]:
        handles.append(Patch(facecolor="none", edgecolor="tab:blue", hatch="//",
                             label=f"below median depth of investigation ({doi_median:.3g} {length_unit})"))
    fig.legend(handles=handles, loc="outside lower center", ncol=3, fontsize=8)
    fig.colorbar(image, ax=list(axes), location="right", fraction=0.03, pad=0.01,
                 label="fraction of models per velocity bin (at each depth)")
    shown = f"{model.n_models} models" if model.n_models == n_total else f"{model.n_models} of {n_total} models"
    if planet_radius is None:
        fig.suptitle(f"Velocity–depth posterior ({shown})")
    else:
        fig.suptitle(f"Velocity–depth posterior ({shown}; shells of a planet of radius {planet_radius:g} "
                     f"{length_unit})")
    return _finish(fig, path)


# -------------------------------------------------------------------- corner
#: The message the corner package logs (on the root logger) when a 2-D panel has too few distinct points.
CORNER_CONTOUR_MESSAGE = "Too few points to create valid contours"


def _not_corner_contour_message(record) -> bool:
    """Logging filter: False (drop) for the corner package's too-few-points message, True for anything else."""
    try:
        return record.getMessage() != CORNER_CONTOUR_MESSAGE
    except Exception:  # a malformed record is not ours to judge: let it through
        return True


def plot_corner(samples, labels: Sequence[str], *, truths=None, path=None) -> Figure:
    """Corner plot of free parameters (pairwise 2-D and 1-D marginals).

    Parameters
    ----------
    samples : (S, K) array
        Posterior samples of K parameters.
    labels : sequence of K str
        Axis labels including units, e.g. "thickness_1 [m]".
    truths : (K,) array, optional
        True values (synthetic tests) drawn as lines.
    path : str or Path, optional
    """
    import corner  # imported here: it loads pyplot

    x = np.asarray(samples, dtype=float)
    if x.ndim != 2 or x.shape[1] != len(labels):
        raise ValueError(f"samples: expected shape (samples, {len(labels)}) to match the labels, got {x.shape}")
    k = x.shape[1]
    # corner's own layout: 2 in per panel, 1 in for labels, 0.4 in margin, 5 % gaps
    dim = 1.0 + 2.0 * k + 2.0 * (k - 1) * 0.05 + 0.4
    fig = _figure(dim, dim)
    import logging

    root = logging.getLogger()
    root.addFilter(_not_corner_contour_message)  # corner logs it through logging.warning (the root logger)
    try:
        corner.corner(x, labels=list(labels), truths=truths, truth_color=_TRUTH_COLOR, fig=fig,
                      quantiles=[0.16, 0.5, 0.84], levels=(0.68, 0.95), label_kwargs={"fontsize": 9},
                      plot_datapoints=False, fill_contours=False)
    finally:
        root.removeFilter(_not_corner_contour_message)
    note = "; green: true values" if truths is not None else ""
    fig.suptitle(f"Posterior marginals (dashed: 16/50/84 % quantiles; contours enclose 68/95 %{note})",
                 fontsize=10)
    return _finish(fig, path)


# ----------------------------------------------------------- travel times
def _pick_groups(n: int, source, wave, branch) -> tuple[list, np.ndarray, np.ndarray, np.ndarray]:
    src = np.asarray(source if source is not None else ["all"] * n).astype(str)
    wav = np.asarray(wave if wave is not None else ["P"] * n).astype(str)
    brn = np.asarray(branch if branch is not None else [""] * n).astype(str)
    for name, a in (("source", src), ("wave", wav), ("branch", brn)):
        if a.shape != (n,):
            raise ValueError(f"{name}: expected {n} labels (one per pick), got shape {a.shape}")
    keys = []
    for key in zip(src, wav, brn):
        if key not in keys:
            keys.append(key)
    return keys, src, wav, brn


def _spans_within(values: np.ndarray, groups: np.ndarray) -> float:
    """Sum over groups of (max - min) of ``values`` inside each group."""
    total = 0.0
    for g in np.unique(groups):
        v = values[groups == g]
        v = v[np.isfinite(v)]
        if v.size:
            total += float(v.max() - v.min())
    return total


#: Largest distance of a receiver from the best straight line through all receivers, as a
#: fraction of the line length, for the receivers to count as one straight line.
LINE_TOLERANCE = 0.01

LINE_POSITION_WORDS = "receiver position along the line"


def line_positions(receiver_xy, source_xy=None, *, tolerance: float = LINE_TOLERANCE):
    """Positions along a straight receiver line, or None when the receivers do not form one.

    The line is the principal axis of the distinct receiver positions (least-squares
    straight line). The receivers form a line when every one lies within
    ``tolerance`` times the line length (the spread of the receivers along the axis)
    of it. Positions are the projections on that axis, measured from the end receiver
    nearest the first receiver given and increasing towards the other end, so the
    receivers span [0, line length].

    Parameters
    ----------
    receiver_xy : (N, 2) array
        Horizontal receiver coordinates [length] (one row per pick or per receiver;
        repeated rows are fine). The first row is the "first receiver".
    source_xy : (M, 2) array, optional
        Horizontal source coordinates [length] to project on the same line (sources
        off the line are projected perpendicularly onto it).
    tolerance : float
        Allowed distance from the line as a fraction of its length (default 0.01).

    Returns
    -------
    None or (receiver_positions (N,), source_positions (M,) or None)
        Positions along the line [length]; None when a coordinate is not finite,
        fewer than two distinct receivers exist, or they are not collinear.
    """
    r = np.asarray(receiver_xy, dtype=float)
    if r.ndim != 2 or r.shape[1] != 2 or r.shape[0] == 0:
        raise ValueError(f"receiver_xy: expected shape (N, 2), got {r.shape}")
    s = None
    if source_xy is not None:
        s = np.asarray(source_xy, dtype=float)
        if s.ndim != 2 or s.shape[1] != 2:
            raise ValueError(f"source_xy: expected shape (M, 2), got {s.shape}")
        if not np.isfinite(s).all():
            return None
    if not np.isfinite(r).all():
        return None
    distinct = np.unique(r, axis=0)
    if distinct.shape[0] < 2:
        return None
    centre = distinct.mean(axis=0)
    _, _, vt = np.linalg.svd(distinct - centre, full_matrices=False)
    axis = vt[0]
    along = (distinct - centre) @ axis
    across = (distinct - centre) @ np.array([-axis[1], axis[0]])
    length = float(along.max() - along.min())
    if not length > 0 or float(np.abs(across).max()) > tolerance * length:
        return None
    first = float((r[0] - centre) @ axis)
    if abs(first - along.min()) <= abs(first - along.max()):
        origin, sign = along.min(), 1.0
    else:
        origin, sign = along.max(), -1.0
    rec = sign * ((r - centre) @ axis - origin)
    src = None if s is None else sign * ((s - centre) @ axis - origin)
    return rec, src


def pick_abscissa(distance, source_depth, receiver_depth, *, source=None, receiver=None,
                  length_unit: str = "m", source_xy=None, receiver_xy=None,
                  tolerance: float = LINE_TOLERANCE) -> tuple[np.ndarray, str, str]:
    """What the travel-time figures plot the picks against, chosen from the survey layout.

    Within one source's picks, receivers strung down a hole change depth more than
    horizontal distance; within one receiver's picks, sources fired down a hole do
    the same, and the depths spread over more than the typical (median) horizontal
    distance. The picks are then plotted against the depth that varies:

    * receivers down a hole (depth varies more than horizontal distance within the
      picks of each source): receiver depth;
    * sources down a hole (likewise within the picks of each receiver): source depth;
    * both (for instance hole to hole): straight-line source-receiver distance
      sqrt(x^2 + (z_r - z_s)^2);
    * otherwise, when the horizontal coordinates of every source and receiver are
      given (``source_xy``, ``receiver_xy``) and the receivers lie on a straight
      line (:func:`line_positions`): the receiver position along that line, so
      that shots fired from either end show as crossing branches;
    * otherwise (networks, or lines known only by distances): horizontal distance.

    Parameters
    ----------
    distance, source_depth, receiver_depth : (P,) arrays
        Horizontal source-receiver distance and the two depths of each pick [length].
    source, receiver : (P,) label arrays, optional
        Source and receiver of each pick (default: all picks from one source, or at
        one receiver).
    length_unit : str
    source_xy, receiver_xy : (P, 2) arrays, optional
        Horizontal coordinates of each pick's source and receiver [length] (NaN
        where unknown; without them, or with any NaN, no line position is used).
    tolerance : float
        Collinearity tolerance passed to :func:`line_positions`.

    Returns
    -------
    values : (P,) array
        The abscissa of each pick [length].
    label : str
        Axis label with unit.
    kind : str
        ``"horizontal"``, ``"receiver_depth"``, ``"source_depth"``, ``"straight_line"``
        or ``"line_position"``.
    """
    x = np.asarray(distance, dtype=float)
    zs = np.broadcast_to(np.asarray(source_depth, dtype=float), x.shape)
    zr = np.broadcast_to(np.asarray(receiver_depth, dtype=float), x.shape)
    src = np.asarray(source if source is not None else np.zeros(x.size)).astype(str)
    rec = np.asarray(receiver if receiver is not None else np.zeros(x.size)).astype(str)
    if src.shape != x.shape or rec.shape != x.shape:
        raise ValueError(f"source, receiver: expected {x.size} labels (one per pick), got shapes {src.shape}, "
                         f"{rec.shape}")
    typical = float(np.nanmedian(x)) if np.isfinite(x).any() else 0.0

    def spread(z):
        return float(np.nanmax(z) - np.nanmin(z)) if np.isfinite(z).any() else 0.0

    down_receivers = _spans_within(zr, src) > _spans_within(x, src) and spread(zr) > typical
    down_sources = _spans_within(zs, rec) > _spans_within(x, rec) and spread(zs) > typical
    if down_receivers and not down_sources:
        return zr.copy(), f"receiver depth [{length_unit}]", "receiver_depth"
    if down_sources and not down_receivers:
        return zs.copy(), f"source depth [{length_unit}]", "source_depth"
    if down_sources and down_receivers:
        return (np.hypot(x, zr - zs), f"straight-line source–receiver distance [{length_unit}]",
                "straight_line")
    if receiver_xy is not None and source_xy is not None:
        rxy, sxy = np.asarray(receiver_xy, dtype=float), np.asarray(source_xy, dtype=float)
        if rxy.shape != (x.size, 2) or sxy.shape != (x.size, 2):
            raise ValueError(f"source_xy, receiver_xy: expected shape ({x.size}, 2) (one row per pick), got "
                             f"{sxy.shape}, {rxy.shape}")
        on_line = line_positions(rxy, sxy, tolerance=tolerance)
        if on_line is not None:
            return on_line[0], f"{LINE_POSITION_WORDS} [{length_unit}]", "line_position"
    return x.copy(), f"horizontal source–receiver distance [{length_unit}]", "horizontal"


def _pick_arrays(distance, observed, sigma, band_times):
    x = np.asarray(distance, dtype=float)
    y = np.asarray(observed, dtype=float)
    s = np.asarray(sigma, dtype=float)
    t = np.asarray(band_times, dtype=float)
    n = x.size
    if x.shape != (n,) or y.shape != (n,) or s.shape != (n,):
        raise ValueError(f"distance, observed, sigma: expected three arrays of shape (picks,), got "
                         f"{x.shape}, {y.shape}, {s.shape}")
    if t.ndim != 2 or t.shape[1] != n:
        raise ValueError(f"predicted times: expected shape (samples, {n}), got {t.shape}")
    return x, y, s, t


def band_quantiles(times, band: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Lower band edge, median and upper band edge of predicted times, masked where no arrival is predicted.

    Parameters
    ----------
    times : (S, N) array
        Predicted times [s] of S models at N places; ``inf`` or ``nan`` where a
        model has no arrival (for instance in the shadow of a core).
    band : float
        Probability of the central band.

    Returns
    -------
    lo, med, hi : (N,) arrays
        Quantiles of the finite times [s]; ``nan`` wherever fewer than half
        of the models predict an arrival, so that lines and bands drawn
        through them break there instead of bridging the gap.
    """
    t = np.asarray(times, dtype=float)
    finite = np.isfinite(t)
    present = finite.mean(axis=0) >= 0.5
    a = (1.0 - band) / 2.0
    tt = np.where(finite, t, np.nan)[:, present]
    out = np.full((3, t.shape[1]), np.nan)
    if tt.size:
        out[:, present] = np.nanquantile(tt, [a, 0.5, 1 - a], axis=0)
    return out[0], out[1], out[2]


#: Hatch of each source's band (cycled): bands of different sources overlap as a cross-hatch in
#: both colours instead of a blend of translucent fills that matches neither legend colour.
_BAND_HATCHES = ("////", "\\\\\\\\", "||||", "----", "++", "xx", "..", "oo")


def _band(ax, gx, lo, hi, c, hatch):
    """A band drawn as a very light fill, a hatch and thin edge lines, all in the source colour."""
    ax.fill_between(gx, lo, hi, facecolor=c, alpha=0.07, lw=0)
    ax.fill_between(gx, lo, hi, facecolor="none", edgecolor=c, hatch=hatch, lw=0, alpha=0.45)
    for edge in (lo, hi):
        ax.plot(gx, edge, color=c, lw=0.6, alpha=0.8)


def _mark_sources(ax, source_positions, colour) -> list:
    """Triangles on the x axis at the source positions [length]; returns legend handles."""
    if not source_positions:
        return []
    for name, pos in source_positions.items():
        pos = float(pos)
        if not np.isfinite(pos):
            raise ValueError(f"source_positions[{name!r}]: expected a finite position, got {pos}")
        ax.plot([pos], [0.0], transform=ax.get_xaxis_transform(), ls="", marker="^", ms=9,
                mfc=colour.get(str(name), "grey"), mec="k", mew=0.6, clip_on=False, zorder=6)
    return [Line2D([], [], ls="", marker="^", ms=8, mfc="grey", mec="k", mew=0.6,
                   label="source position (colour: source)")]


def _draw_band_and_picks(ax, x, y, s, times, keys, src, wav, brn, band, band_label, curves=None):
    sources = list(dict.fromkeys(src))
    colour = {name: f"C{i % 10}" for i, name in enumerate(sources)}
    hatch = {name: _BAND_HATCHES[i % len(_BAND_HATCHES)] for i, name in enumerate(sources)}
    lo, med, hi = band_quantiles(times, band)
    curves = {} if curves is None else curves
    for key in keys:
        sel = (src == key[0]) & (wav == key[1]) & (brn == key[2])
        order = np.argsort(x[sel], kind="stable")
        xs = x[sel][order]
        c = colour[key[0]]
        if key in curves:
            # predictions on a dense distance grid: where most models have no arrival the line breaks
            gx, gt = curves[key]
            gx = np.asarray(gx, dtype=float)
            gt = np.asarray(gt, dtype=float)
            if gt.ndim != 2 or gt.shape[1] != gx.size:
                raise ValueError(f"curves[{key!r}]: expected a grid (G,) and times (samples, G), got "
                                 f"{gx.shape} and {gt.shape}")
            g_order = np.argsort(gx, kind="stable")
            g_lo, g_med, g_hi = band_quantiles(gt[:, g_order], band)
            _band(ax, gx[g_order], g_lo, g_hi, c, hatch[key[0]])
            ax.plot(gx[g_order], g_med, color=c, lw=1.0)
        else:
            _band(ax, xs, lo[sel][order], hi[sel][order], c, hatch[key[0]])
            ax.plot(xs, med[sel][order], color=c, lw=1.0)
        ax.errorbar(xs, y[sel][order], yerr=s[sel][order], fmt=_WAVE_MARKERS.get(key[1], "^"), ms=4,
                    mfc="white", mec=c, ecolor=c, elinewidth=0.8, capsize=1.5, lw=0)
    handles = [Patch(facecolor="#f0f0f0", edgecolor="grey", hatch="////", lw=0.6, label=band_label),
               Line2D([], [], color="grey", lw=1.0, label="median prediction")]
    for w in dict.fromkeys(wav):
        handles.append(Line2D([], [], ls="", marker=_WAVE_MARKERS.get(w, "^"), mfc="white", mec="k",
                              label=f"{w} picks ± 1 sd"))
    if len(sources) > 1:
        shown = sources[:10]
        handles += [Patch(facecolor="white", edgecolor=colour[n], hatch=hatch[n], lw=1.0, label=f"source {n}")
                    for n in shown]
        if len(sources) > len(shown):
            handles.append(Patch(color="none", label=f"(+{len(sources) - len(shown)} more sources)"))
    return handles, med, colour


ARC_LABEL = "distance along the surface (arc)"


def _arc_axes(ax, planet_radius: float | None) -> None:
    """Sphere runs: a secondary axis on top giving the arc distance as an epicentral angle [deg]."""
    if planet_radius is None:
        return
    r = float(planet_radius)
    if not (np.isfinite(r) and r > 0):
        raise ValueError(f"planet_radius: expected a positive radius, got {planet_radius!r}")
    top = ax.secondary_xaxis("top", functions=(lambda x: np.degrees(np.asarray(x) / r),
                                               lambda d: np.radians(np.asarray(d)) * r))
    top.set_xlabel(f"epicentral angle [deg] (arc / planet radius {r:g})", fontsize=9)


#: Median pick error [s] from which fit residuals are drawn in seconds rather than milliseconds.
RESIDUAL_SECONDS_FROM = 0.05


def plot_travel_time_fit(distance, observed, sigma, predicted, *, source=None, wave=None, branch=None,
                         replicated=None, outlier_probability=None, band: float = 0.9,
                         length_unit: str = "m", x_label: str | None = None, planet_radius: float | None = None,
                         curves=None, source_positions=None, path=None) -> Figure:
    """Picks against distance (or depth) with the posterior predictive band and residuals.

    Parameters
    ----------
    distance : (P,) array
        Abscissa of each pick [length]: source–receiver distance, or the receiver
        or source depth for borehole surveys (see :func:`pick_abscissa`).
    observed, sigma : (P,) arrays
        Picked times and their standard deviations [s].
    predicted : (S, P) array
        Noise-free predicted times of each posterior sample [s].
    source, wave, branch : (P,) label arrays, optional
        Picks are grouped (and bands drawn) per source, wave and branch;
        colour marks the source, marker the wave.
    replicated : (S, P) array, optional
        Replicated picks (prediction plus noise); when given the band shows
        them, otherwise it shows ``predicted``.
    outlier_probability : (P,) array, optional
        Posterior probability that each pick is an outlier; picks above 0.5
        are ringed in red.
    band : float
        Probability of the central band (default 0.9).
    length_unit : str
    x_label : str, optional
        Label of the abscissa with its unit (default: source–receiver distance;
        with ``planet_radius``: distance along the surface, the arc).
    planet_radius : float, optional
        Sphere runs: radius of the planet [length]; ``distance`` is then the
        arc along the surface and a top axis gives it in degrees.
    curves : mapping (source, wave, branch) -> (grid (G,), times (S, G)), optional
        Predictions of the same draws on a dense distance grid for a group of
        picks [length, s] (replicated times when ``replicated`` is given);
        the line and band of that group are drawn from them instead of
        through its picks, and break where fewer than half of the draws
        predict an arrival (a shadow). Without curves, lines join the picks
        and break at picks where most draws predict no arrival.
    source_positions : mapping source name -> float, optional
        Positions of the sources on the abscissa [length] (line surveys plotted
        against receiver position along the line); each is marked by a
        triangle on the x axis in the colour of its picks.
    path : str or Path, optional

    Returns
    -------
    matplotlib.figure.Figure
        Top: times [s]; bottom: residuals observed − posterior-median
        prediction with pick error bars, in ms, or in s when the median pick
        error is at least ``RESIDUAL_SECONDS_FROM``.
    """
    x, y, s, mu = _pick_arrays(distance, observed, sigma, predicted)
    band_times = mu if replicated is None else np.asarray(replicated, dtype=float)
    if band_times.shape != mu.shape:
        raise ValueError(f"replicated: shape {band_times.shape} does not match predicted {mu.shape}")
    if not 0 < band < 1:
        raise ValueError(f"band: expected a probability in (0, 1), got {band}")
    keys, src, wav, brn = _pick_groups(x.size, source, wave, branch)
    fig = _figure(8.5, 7.0)
    ax, ax_r = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1.4]})
    what = "posterior predictive" if replicated is not None else "posterior prediction"
    handles, _, colour = _draw_band_and_picks(ax, x, y, s, band_times, keys, src, wav, brn, band,
                                              f"{what}, central {band:.0%}", curves)
    handles += _mark_sources(ax, source_positions, colour)
    _, med_pred, _ = band_quantiles(mu, 0.5)
    # Residuals in ms for refraction-size errors, in s for earthquake-size ones.
    res_scale, res_unit = (1.0, "s") if np.nanmedian(s) >= RESIDUAL_SECONDS_FROM else (1e3, "ms")
    res_ms = (y - med_pred) * res_scale
    sources = list(dict.fromkeys(src))
    for key in keys:
        sel = (src == key[0]) & (wav == key[1]) & (brn == key[2])
        c = f"C{sources.index(key[0]) % 10}"
        ax_r.errorbar(x[sel], res_ms[sel], yerr=s[sel] * res_scale, fmt=_WAVE_MARKERS.get(key[1], "^"), ms=4,
                      mfc="white", mec=c, ecolor=c, elinewidth=0.8, capsize=1.5, lw=0)
    ax_r.axhline(0.0, color="k", lw=0.8)
    if outlier_probability is not None:
        po = np.asarray(outlier_probability, dtype=float)
        if po.shape != x.shape:
            raise ValueError(f"outlier_probability: expected shape {x.shape}, got {po.shape}")
        out = po > 0.5
        for a, vals in ((ax, y), (ax_r, res_ms)):
            a.scatter(x[out], vals[out], s=120, facecolors="none", edgecolors="red", lw=1.4, zorder=5)
        handles.append(Line2D([], [], ls="", marker="o", ms=10, mfc="none", mec="red",
                              label=f"outlier probability > 0.5 ({_count(int(out.sum()), 'pick')})"))
    ax.set_ylabel("travel time [s]")
    ax_r.set_ylabel(f"residual [{res_unit}]\n(observed − median predicted)", fontsize=9)
    default = ARC_LABEL if planet_radius is not None else "source–receiver distance"
    ax_r.set_xlabel(x_label or f"{default} [{length_unit}]")
    _arc_axes(ax, planet_radius)
    ax.legend(handles=handles, loc="upper left", fontsize=8, ncol=2 if len(handles) > 6 else 1)
    ax.set_title("Travel-time fit")
    fig.tight_layout()
    return _finish(fig, path)


def plot_prior_predictive(distance, observed, sigma, prior_predicted, *, source=None, wave=None,
                          branch=None, band: float = 0.95, length_unit: str = "m", x_label: str | None = None,
                          planet_radius: float | None = None, curves=None, source_positions=None,
                          path=None) -> Figure:
    """Picks over the travel times predicted by models drawn from the prior.

    A prior that covers the data leaves the picks inside the band; picks far
    outside it point to priors that exclude the structure the data need.

    Parameters
    ----------
    distance, observed, sigma : (P,) arrays
        Abscissa (distance, or depth for borehole surveys) [length], picked times and
        standard deviations [s].
    prior_predicted : (S, P) array
        Times of prior models [s]; absent arrivals (inf) are ignored.
    source, wave, branch : (P,) label arrays, optional
    band : float
        Probability of the central band (default 0.95).
    length_unit : str
    x_label : str, optional
        Label of the abscissa with its unit (default: source–receiver distance;
        with ``planet_radius``: distance along the surface, the arc).
    planet_radius : float, optional
        Sphere runs: radius of the planet [length] (top axis in degrees).
    curves : mapping (source, wave, branch) -> (grid (G,), times (S, G)), optional
        Prior predictions on a dense distance grid (see
        :func:`plot_travel_time_fit`); lines and bands break where fewer than
        half of the prior models predict an arrival.
    source_positions : mapping source name -> float, optional
        Positions of the sources on the abscissa [length] (line surveys plotted
        against receiver position along the line); each is marked by a
        triangle on the x axis in the colour of its picks.
    path : str or Path, optional
    """
    x, y, s, t = _pick_arrays(distance, observed, sigma, prior_predicted)
    if not 0 < band < 1:
        raise ValueError(f"band: expected a probability in (0, 1), got {band}")
    keys, src, wav, brn = _pick_groups(x.size, source, wave, branch)
    fig = _figure(8.5, 5.5)
    ax = fig.subplots()
    handles, _, colour = _draw_band_and_picks(ax, x, y, s, t, keys, src, wav, brn, band,
                                              f"prior predictive, central {band:.0%}", curves)
    handles += _mark_sources(ax, source_positions, colour)
    absent = np.mean(~np.isfinite(t))
    if absent > 0:
        handles.append(Patch(color="none", label=f"{absent:.0%} of prior arrivals absent (not shown; no line "
                                                 "where most are)"))
    default = ARC_LABEL if planet_radius is not None else "source–receiver distance"
    ax.set_xlabel(x_label or f"{default} [{length_unit}]")
    _arc_axes(ax, planet_radius)
    ax.set_ylabel("travel time [s]")
    ax.legend(handles=handles, loc="upper left", fontsize=8)
    ax.set_title(f"Prior predictive travel times ({t.shape[0]} prior models)")
    fig.tight_layout()
    return _finish(fig, path)


# ---------------------------------------------------------------- sampling
def plot_traces(chains, labels: Sequence[str], *, burn_in: int | None = None, max_walkers: int = 32,
                path=None) -> Figure:
    """Trace of every parameter against step, one colour per ensemble.

    Parameters
    ----------
    chains : (steps, walkers, K) or (ensembles, steps, walkers, K) array
        Walker positions of one or several independent ensembles.
    labels : sequence of K str
        Parameter names with units.
    burn_in : int, optional
        Step where burn-in ends; marked with a vertical line.
    max_walkers : int
        At most this many walkers per ensemble are drawn (evenly chosen).
    path : str or Path, optional
    """
    c = np.asarray(chains, dtype=float)
    if c.ndim == 3:
        c = c[None]
    if c.ndim != 4 or c.shape[-1] != len(labels):
        raise ValueError(f"chains: expected (steps, walkers, {len(labels)}) or (ensembles, steps, walkers, "
                         f"{len(labels)}), got {np.shape(chains)}")
    n_ens, n_steps, n_walk, k = c.shape
    pick = np.unique(np.linspace(0, n_walk - 1, min(n_walk, max_walkers)).round().astype(int))
    fig = _figure(8.0, 1.5 * k + 1.0)
    axes = np.atleast_1d(fig.subplots(k, 1, sharex=True))
    steps = np.arange(n_steps)
    for i, ax in enumerate(axes):
        for e in range(n_ens):
            ax.plot(steps, c[e, :, pick, i].T, color=f"C{e % 10}", alpha=0.3, lw=0.5)
        ax.set_ylabel(labels[i], fontsize=8)
        if burn_in is not None:
            ax.axvline(burn_in, color="k", ls="--", lw=1.0)
    axes[-1].set_xlabel("step")
    handles = [Line2D([], [], color=f"C{e % 10}", label=f"ensemble {e + 1}") for e in range(n_ens)]
    if burn_in is not None:
        handles.append(Line2D([], [], color="k", ls="--", label="end of burn-in"))
    axes[0].legend(handles=handles, loc="upper right", fontsize=7, ncol=min(len(handles), 4))
    fig.suptitle(f"Chain traces ({len(pick)} of {n_walk} walkers per ensemble shown)", fontsize=10)
    fig.tight_layout()
    return _finish(fig, path)


def plot_convergence(names: Sequence[str], rhat, ess, *, ess_tail=None, rhat_target: float = 1.01,
                     ess_target: float = 400.0, path=None) -> Figure:
    """R-hat and effective sample size per parameter against their targets.

    Targets R-hat < 1.01 and ESS > 400 follow Vehtari et al., Bayesian
    Analysis 16, 2021. Bars that miss a target are red.

    Parameters
    ----------
    names : sequence of K str
    rhat, ess : (K,) arrays
        Rank-normalised split R-hat [dimensionless] and bulk ESS [draws].
    ess_tail : (K,) array, optional
        Tail ESS [draws], drawn as black diamonds on the ESS bars.
    rhat_target, ess_target : float
    path : str or Path, optional
    """
    r = np.asarray(rhat, dtype=float)
    e = np.asarray(ess, dtype=float)
    k = len(names)
    if r.shape != (k,) or e.shape != (k,):
        raise ValueError(f"rhat, ess: expected {k} values each (one per name), got {r.shape} and {e.shape}")
    et = None if ess_tail is None else np.asarray(ess_tail, dtype=float)
    if et is not None and et.shape != (k,):
        raise ValueError(f"ess_tail: expected {k} values (one per name), got {et.shape}")
    fig = _figure(9.0, 0.35 * k + 1.8)
    ax_r, ax_e = fig.subplots(1, 2, sharey=True)
    y = np.arange(k)
    bad_r = ~(r < rhat_target)
    bad_e = ~(e > ess_target) | (False if et is None else ~(et > ess_target))
    ax_r.barh(y, r - 1.0, left=1.0, color=np.where(bad_r, "tab:red", "tab:blue"))
    ax_r.axvline(rhat_target, color="k", ls="--", lw=1.0, label=f"target {rhat_target:g}")
    ax_r.set_xlabel("R-hat [dimensionless]")
    ax_r.set_xlim(left=min(0.995, np.nanmin(r) - 0.005 if np.isfinite(r).any() else 0.995))
    ax_e.barh(y, e, color=np.where(bad_e, "tab:red", "tab:blue"))
    ax_e.axvline(ess_target, color="k", ls="--", lw=1.0, label=f"target {ess_target:g}")
    if et is not None:
        ax_e.plot(et, y, ls="", marker="D", ms=5, color="k", label="tail ESS (bars: bulk)")
    ax_e.set_xlabel("effective sample size [draws]")
    ax_r.set_yticks(y, list(names), fontsize=8)
    ax_r.invert_yaxis()
    for ax in (ax_r, ax_e):
        ax.legend(loc="lower right", fontsize=8)
    ax_r.set_title(f"R-hat ({int(bad_r.sum())} of {k} above target)", fontsize=10)
    ax_e.set_title(f"ESS ({int(bad_e.sum())} of {k} below target)", fontsize=10)
    fig.tight_layout()
    return _finish(fig, path)


# --------------------------------------------------------- prior vs posterior
def plot_prior_posterior(prior: Mapping[str, np.ndarray], posterior: Mapping[str, np.ndarray],
                         units: Mapping[str, str], *, truths: Mapping[str, float] | None = None,
                         n_columns: int = 3, path=None) -> Figure:
    """Prior and posterior marginal density of each parameter, side by side.

    Parameters
    ----------
    prior, posterior : mapping name -> (S,) array
        Samples; every posterior name needs prior samples and a unit.
    units : mapping name -> str
        Unit of each parameter ("" for dimensionless).
    truths : mapping name -> float, optional
    n_columns : int
    path : str or Path, optional
    """
    names = list(posterior)
    for n in names:
        if n not in prior:
            raise ValueError(f"prior: no prior samples for {n!r}")
        if n not in units:
            raise ValueError(f"units: no unit given for {n!r} (use '' for a dimensionless quantity)")
    k = len(names)
    n_col = min(n_columns, k)
    n_row = -(-k // n_col)
    fig = _figure(3.3 * n_col, 2.6 * n_row + 0.6)
    axes = np.atleast_1d(fig.subplots(n_row, n_col, squeeze=False)).ravel()
    for ax, name in zip(axes, names):
        pri = np.asarray(prior[name], dtype=float)
        post = np.asarray(posterior[name], dtype=float)
        both = np.concatenate([pri[np.isfinite(pri)], post[np.isfinite(post)]])
        bins = np.linspace(both.min(), both.max(), 50) if np.ptp(both) > 0 else 10
        ax.hist(pri, bins=bins, density=True, color="0.6", alpha=0.6, label="prior")
        ax.hist(post, bins=bins, density=True, histtype="step", color="tab:blue", lw=1.5, label="posterior")
        if truths is not None and name in truths:
            ax.axvline(truths[name], color=_TRUTH_COLOR, ls="-.", lw=1.5, label="true value")
        unit = units[name]
        ax.set_xlabel(_with_unit(name, unit), fontsize=9)
        ax.set_ylabel(f"probability density [1/{unit}]" if unit else "probability density", fontsize=8)
    for ax in axes[k:]:
        ax.set_visible(False)
    axes[0].legend(fontsize=8)
    fig.suptitle("Prior and posterior marginals", fontsize=11)
    fig.tight_layout()
    return _finish(fig, path)
