"""Posterior summaries and derived quantities from arrays of samples.

Every function takes samples with a leading sample axis ``S`` (chains x draws
flattened) or a :class:`~invert.model.LayerModel` batch holding one model per
sample, and returns plain numbers, arrays, dicts or short texts that the report
and the figures reuse. Nothing here reads files or draws.

Conventions
-----------
* Lengths and velocities are in the unit system of the run (metres and m/s for
  site work, kilometres and km/s for crustal work); times are in seconds.
* Layers are numbered 1..N+1 from the top (N+1 is the half-space) and interface
  ``k`` is the base of layer ``k``, as everywhere users see numbers.
* Residuals are observed minus predicted: positive means the pick is late.
"""

from __future__ import annotations

import math
import re
import warnings
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from .model import MIN_SOLID_VPVS, LayerModel

with warnings.catch_warnings():  # arviz announces a future refactor on import
    warnings.simplefilter("ignore", FutureWarning)
    warnings.simplefilter("ignore", UserWarning)
    import arviz as _az

DEFAULT_PROBS = (0.68, 0.95)


# ---------------------------------------------------------------- checks
def _samples_1d(name: str, samples, *, allow_inf: bool = False) -> np.ndarray:
    arr = np.asarray(samples, dtype=float)
    if arr.ndim != 1:
        raise ValueError(f"{name}: expected a 1-D array of samples (flatten chains x draws first), "
                         f"got shape {arr.shape}")
    if arr.size == 0:
        raise ValueError(f"{name}: no samples")
    bad = np.isnan(arr) if allow_inf else ~np.isfinite(arr)
    if bad.any():
        i = int(np.argmax(bad))
        raise ValueError(f"{name}: sample {i} is {arr[i]} (not a finite number); summarise the finite "
                         "samples and report the fraction of the others separately")
    return arr


def _check_prob(prob) -> float:
    p = float(prob)
    if not 0.0 < p < 1.0:
        raise ValueError(f"prob: a credible-interval probability must lie strictly between 0 and 1, got {prob}")
    return p


def _is_int_in(k, low: int, high: int) -> bool:
    try:
        f = float(k)
    except (TypeError, ValueError):
        return False
    return not isinstance(k, bool) and f.is_integer() and low <= f <= high


def _check_interface(model: LayerModel, k) -> int:
    n = model.n_layers - 1
    if n == 0:
        raise ValueError("interface: the model is a half-space alone and has no interfaces")
    if not _is_int_in(k, 1, n):
        raise ValueError(f"interface: expected an integer from 1 to {n} (interface k is the base of layer k), "
                         f"got {k!r}")
    return int(k)


def _check_layer_below(model: LayerModel, k) -> int:
    n = model.n_layers
    if n < 2:
        raise ValueError("layer: the model is a half-space alone; there is no layer above to compare with")
    if not _is_int_in(k, 2, n):
        raise ValueError(f"layer: expected an integer from 2 to {n} (layer {n} is the half-space), got {k!r}")
    return int(k)


# ------------------------------------------------------- interval summaries
@dataclass(frozen=True)
class IntervalSummary:
    """Location, spread and credible intervals of one quantity.

    Attributes
    ----------
    median, mean, sd : float
        Sample median, mean and standard deviation (ddof=0) [unit of the samples].
    n : int
        Number of samples.
    eti, hdi : dict
        Maps each probability to the ``(low, high)`` equal-tailed interval
        (quantiles (1-p)/2 and (1+p)/2) and highest-density interval.
    """

    median: float
    mean: float
    sd: float
    n: int
    eti: dict
    hdi: dict


def interval_summary(samples, prob: Sequence[float] = DEFAULT_PROBS) -> IntervalSummary:
    """Median, mean, sd and credible intervals of a 1-D sample array.

    Parameters
    ----------
    samples : (S,) array
        Posterior samples of one quantity [any unit]; must be finite.
    prob : sequence of float
        Probabilities of the credible intervals, each in (0, 1).

    Returns
    -------
    IntervalSummary
        The equal-tailed interval uses linear interpolation between order
        statistics (``numpy.quantile``); the highest-density interval is the
        narrowest interval holding the fraction ``p`` of the samples, from
        ``arviz.hdi`` (one interval: a multimodal posterior gets a wide one).
    """
    x = _samples_1d("samples", samples)
    probs = tuple(_check_prob(p) for p in np.atleast_1d(prob))
    eti, hdi = {}, {}
    for p in probs:
        lo, hi = np.quantile(x, [(1.0 - p) / 2.0, (1.0 + p) / 2.0])
        eti[p] = (float(lo), float(hi))
        h = np.asarray(_az.hdi(x, hdi_prob=p), dtype=float)
        hdi[p] = (float(h[0]), float(h[1]))
    return IntervalSummary(float(np.median(x)), float(np.mean(x)), float(np.std(x)), int(x.size), eti, hdi)


def _pct(p: float) -> str:
    return f"{100 * p:g}"


def summarise(samples: Mapping[str, np.ndarray], units: Mapping[str, str],
              prob: Sequence[float] = DEFAULT_PROBS) -> list[dict]:
    """One table row per quantity: median, mean, sd and credible intervals.

    Parameters
    ----------
    samples : mapping name -> (S,) array
        Samples of each quantity.
    units : mapping name -> str
        Unit of each quantity (``""`` for dimensionless); every name needs one.
    prob : sequence of float
        Credible-interval probabilities.

    Returns
    -------
    list of dict
        Keys ``quantity, unit, median, mean, sd, n`` and, for each probability
        ``p`` in percent, ``eti{p}_low, eti{p}_high, hdi{p}_low, hdi{p}_high``.
    """
    rows = []
    for name, values in samples.items():
        if name not in units:
            raise ValueError(f"units: no unit given for {name!r} (use '' for a dimensionless quantity)")
        try:
            s = interval_summary(values, prob)
        except ValueError as err:
            raise ValueError(f"{name}: {err}") from None
        row = {"quantity": name, "unit": units[name], "median": s.median, "mean": s.mean, "sd": s.sd, "n": s.n}
        for p in s.eti:
            row[f"eti{_pct(p)}_low"], row[f"eti{_pct(p)}_high"] = s.eti[p]
            row[f"hdi{_pct(p)}_low"], row[f"hdi{_pct(p)}_high"] = s.hdi[p]
        rows.append(row)
    return rows


# ------------------------------------------------------ vertical travel time
def _log1p_ratio(x: np.ndarray) -> np.ndarray:
    """log(1 + x) / x, with the x -> 0 limit 1 taken from its series."""
    small = np.abs(x) < 1e-6
    with np.errstate(divide="ignore", invalid="ignore"):
        exact = np.log1p(x) / np.where(small, 1.0, x)
    return np.where(small, 1.0 - x / 2.0 + x * x / 3.0, exact)


def _layer_bases(model: LayerModel) -> np.ndarray:
    return np.concatenate([model.interface_depths, np.full((model.n_models, 1), np.inf)], axis=1)


def vertical_time(model: LayerModel, depth, wave: str = "P") -> np.ndarray:
    """One-way vertical travel time from the datum down to ``depth``.

    Exact for linear-gradient layers: inside a layer with velocity
    ``v0 + g z`` the time over a thickness ``h`` is ``ln(1 + g h / v0) / g``,
    evaluated as ``(h / v0) * log1p(x) / x`` with ``x = g h / v0`` so that it
    tends smoothly to ``h / v0`` as ``g -> 0``.

    Parameters
    ----------
    model : LayerModel
        Batch of S models.
    depth : float or (S,) array
        Depth below the datum [length], >= 0.
    wave : {"P", "S"}

    Returns
    -------
    (S,) array
        Time [s]; ``inf`` where the path crosses a fluid layer (Vs = 0) for S.
    """
    z = np.broadcast_to(np.asarray(depth, dtype=float), (model.n_models,))
    if np.isnan(z).any() or (z < 0).any():
        raise ValueError(f"depth: expected depths >= 0 below the datum, got {z[np.isnan(z) | (z < 0)][0]}")
    v0, grad = model.velocity(wave)
    tops = model.layer_tops
    h = np.clip(np.minimum(z[:, None], _layer_bases(model)) - tops, 0.0, None)
    with np.errstate(divide="ignore", invalid="ignore"):
        x = grad * h / np.where(v0 > 0, v0, 1.0)
        t = np.where(v0 > 0, h / np.where(v0 > 0, v0, 1.0) * _log1p_ratio(x), np.inf)
    t = np.where(h > 0, t, 0.0)
    return t.sum(axis=1)


def _warn_fluid(times: np.ndarray, wave: str, what: str) -> None:
    bad = ~np.isfinite(times)
    if bad.any():
        warnings.warn(f"{what}: the {wave} path crosses a fluid layer (Vs = 0) in {int(bad.sum())} of "
                      f"{bad.size} models; {what} is set to {'0' if 'velocity' in what else 'inf'} there",
                      UserWarning, stacklevel=3)


def time_averaged_velocity(model: LayerModel, depth: float = 30.0, wave: str = "S") -> np.ndarray:
    """Time-averaged velocity over the top ``depth``: depth / sum(h_i / v_i).

    Parameters
    ----------
    model : LayerModel
        Batch of S models; depth is measured from the datum (z = 0), which
        should be the ground surface for site work.
    depth : float
        Averaging depth [length], > 0. ``depth=30`` with a model in metres
        gives Vs30 (see :func:`vs30`).
    wave : {"P", "S"}

    Returns
    -------
    (S,) array
        Velocity [length/s]. Linear gradients are integrated exactly (see
        :func:`vertical_time`). Models with a fluid layer (Vs = 0) inside the
        averaging depth give 0 for S, with a warning.
    """
    d = float(depth)
    if not (np.isfinite(d) and d > 0):
        raise ValueError(f"depth: expected a finite averaging depth > 0, got {depth!r}")
    t = vertical_time(model, d, wave)
    _warn_fluid(t, str(wave).upper(), "time-averaged velocity")
    with np.errstate(divide="ignore"):
        return np.where(np.isfinite(t), d / t, 0.0)


def vs30(model: LayerModel) -> np.ndarray:
    """Vs30 [m/s]: time-averaged S velocity over the top 30 m (model in metres).

    Vs30 = 30 / sum(h_i / Vs_i) over the top 30 m (NEHRP provisions; ASCE 7-16
    ch. 20, from memory). For a model in kilometres use
    ``time_averaged_velocity(model, 0.030, "S") * 1000``.
    """
    return time_averaged_velocity(model, 30.0, "S")


def two_way_time(model: LayerModel, k: int, wave: str = "P") -> np.ndarray:
    """Vertical two-way time from the datum to interface ``k`` [s], shape (S,).

    Exact in linear gradients; ``inf`` (with a warning) where an S path
    crosses a fluid layer.
    """
    k = _check_interface(model, k)
    t = 2.0 * vertical_time(model, model.interface_depths[:, k - 1], wave)
    _warn_fluid(t, str(wave).upper(), "two-way time")
    return t


def depth_above_interface(model: LayerModel, k: int) -> np.ndarray:
    """Depth of interface ``k`` below the datum: total thickness of layers 1..k.

    Returns
    -------
    (S,) array
        Depth [length].
    """
    k = _check_interface(model, k)
    return model.interface_depths[:, k - 1].copy()


def depth_to_velocity(model: LayerModel, threshold: float, wave: str = "S") -> np.ndarray:
    """Depth where velocity first reaches ``threshold`` going down from the datum.

    Used for depth to bedrock (e.g. Vs >= 760 m/s). Inside a gradient layer the
    crossing depth is found exactly; a layer whose top is already fast enough
    gives its top depth.

    Parameters
    ----------
    model : LayerModel
    threshold : float
        Velocity to reach [length/s], > 0.
    wave : {"P", "S"}

    Returns
    -------
    (S,) array
        Depth [length]; ``inf`` where the velocity never reaches the threshold
        (summarise the finite part and report that fraction separately).
    """
    thr = float(threshold)
    if not (np.isfinite(thr) and thr > 0):
        raise ValueError(f"threshold: expected a finite velocity > 0, got {threshold!r}")
    v0, grad = model.velocity(wave)
    tops = model.layer_tops
    v_base = np.empty_like(v0)  # largest velocity a layer reaches at its base
    v_base[:, :-1] = v0[:, :-1] + grad[:, :-1] * model.thickness
    v_base[:, -1] = np.where(grad[:, -1] > 0, np.inf, v0[:, -1])
    out = np.full(model.n_models, np.inf)
    found = np.zeros(model.n_models, dtype=bool)
    for j in range(model.n_layers):
        at_top = v0[:, j] >= thr
        inside = ~at_top & (grad[:, j] > 0) & (v_base[:, j] >= thr)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.where(at_top, tops[:, j], tops[:, j] + (thr - v0[:, j]) / grad[:, j])
        hit = ~found & (at_top | inside)
        out[hit] = z[hit]
        found |= hit
    return out


def poisson_ratio(vpvs) -> np.ndarray:
    """Poisson's ratio from Vp/Vs: (r^2 - 2) / (2 (r^2 - 1)) [dimensionless].

    ``inf`` (a fluid) gives 0.5. Raises ValueError for NaN or Vp/Vs <=
    sqrt(4/3), where the bulk modulus would not be positive.
    """
    r = np.asarray(vpvs, dtype=float)
    bad = np.isnan(r) | (r <= MIN_SOLID_VPVS)
    if bad.any():
        raise ValueError(f"vpvs: expected Vp/Vs > sqrt(4/3) = {MIN_SOLID_VPVS:.4f} (or inf for a fluid), "
                         f"got {r[bad].flat[0]}")
    with np.errstate(invalid="ignore"):
        r2 = r * r
        nu = (r2 - 2.0) / (2.0 * (r2 - 1.0))
    return np.where(np.isinf(r), 0.5, nu)


# ------------------------------------------------------------- site class
#: Site-class schemes: (edges fastest first [m/s], labels fastest first, source).
SITE_CLASS_SCHEMES = {
    "ASCE7-16": ((1500.0, 760.0, 360.0, 180.0), ("A", "B", "C", "D", "E"),
                 "ASCE 7-16 Table 20.3-1 (5000 / 2500 / 1200 / 600 ft/s; from memory)"),
    "EC8-2004": ((800.0, 360.0, 180.0), ("A", "B", "C", "D"),
                 "Eurocode 8, EN 1998-1:2004 Table 3.1 (from memory); its classes E, S1 and S2 "
                 "need more than Vs30"),
}

SITE_CLASS_CAVEAT = (
    "Site class from Vs30 alone. Vs30 cannot assign every class: profiles with soft clay, liquefiable, "
    "sensitive or highly organic soils, very thick soft deposits, or a shallow soft layer over much "
    "stiffer ground may belong to a class that the code assigns by other criteria or that requires a "
    "site-specific evaluation, whatever their Vs30. These probabilities describe the uncertainty of the "
    "estimate under the model and priors used, not a classification. Classification and design decisions "
    "follow the local building code and the judgement of licensed professionals."
)


@dataclass(frozen=True)
class SiteClassProbabilities:
    """Probability of each Vs30 band.

    Attributes
    ----------
    labels : tuple of str
        Class labels, fastest first.
    probability : (K,) array
        Fraction of samples in each band.
    bands : tuple of (low, high)
        Vs30 band limits [m/s]; ``inf`` above the fastest edge.
    edge_class : str
        Which side a value exactly on an edge joins ("slower" or "faster").
    caveat : str
        Fixed caveat text to print with the probabilities.
    """

    labels: tuple
    probability: np.ndarray
    bands: tuple
    edge_class: str
    caveat: str


def site_class_probabilities(vs30_samples, edges: Sequence[float] = (1500.0, 760.0, 360.0, 180.0),
                             labels: Sequence[str] = ("A", "B", "C", "D", "E"),
                             edge_class: str = "slower") -> SiteClassProbabilities:
    """Probability that Vs30 falls in each site-class band.

    Parameters
    ----------
    vs30_samples : (S,) array
        Vs30 samples [m/s], >= 0.
    edges : sequence of float
        Band edges [m/s], strictly decreasing (fastest first). The default is
        ASCE 7-16 Table 20.3-1 (given there as 5000/2500/1200/600 ft/s; from
        memory). Codes differ (newer editions have more classes; Eurocode 8
        uses 800/360/180 m/s): see ``SITE_CLASS_SCHEMES``.
    labels : sequence of str
        One label per band, fastest first (``len(edges) + 1`` labels).
    edge_class : {"slower", "faster"}
        Class given to a value exactly on an edge. Code tables word their
        edges differently (even within one table), so check the code in
        force; a posterior puts practically no probability exactly on an edge.

    Returns
    -------
    SiteClassProbabilities
    """
    v = _samples_1d("vs30", vs30_samples)
    if (v < 0).any():
        raise ValueError(f"vs30: velocities must be >= 0, got {v[v < 0][0]}")
    e = np.asarray(edges, dtype=float)
    if e.ndim != 1 or e.size == 0 or not np.all(np.isfinite(e)) or (e <= 0).any():
        raise ValueError(f"edges: expected one or more finite velocities > 0, got {list(np.atleast_1d(edges))}")
    if np.any(np.diff(e) >= 0):
        raise ValueError(f"edges: must be strictly decreasing (fastest class first), got {list(e)}")
    labels = tuple(str(s) for s in labels)
    if len(labels) != e.size + 1:
        raise ValueError(f"labels: {e.size} edges make {e.size + 1} bands, got {len(labels)} labels")
    if edge_class not in ("slower", "faster"):
        raise ValueError(f"edge_class: expected 'slower' or 'faster', got {edge_class!r}")
    # band index 0 = fastest; count the edges a value lies below (or on)
    below = v[:, None] <= e[None, :] if edge_class == "slower" else v[:, None] < e[None, :]
    idx = below.sum(axis=1)
    prob = np.bincount(idx, minlength=e.size + 1) / v.size
    limits = np.concatenate([[np.inf], e, [0.0]])
    bands = tuple((float(limits[i + 1]), float(limits[i])) for i in range(e.size + 1))
    return SiteClassProbabilities(labels, prob, bands, edge_class, SITE_CLASS_CAVEAT)


# ------------------------------------------------------------ probabilities
def probability_slower(model: LayerModel, k: int, wave: str = "P") -> float:
    """P(layer ``k`` is slower than the layer above it).

    Compares the velocity at the top of layer ``k`` with the velocity at the
    base of layer ``k - 1`` (a velocity inversion / low-velocity zone).

    Parameters
    ----------
    model : LayerModel
    k : int
        Layer number, 2..N+1 (N+1 is the half-space).
    wave : {"P", "S"}

    Returns
    -------
    float
        Fraction of samples in which the velocity drops across interface k-1.
    """
    k = _check_layer_below(model, k)
    top, _ = model.velocity(wave)
    base = model.base_velocity(wave)
    return float(np.mean(top[:, k - 1] < base[:, k - 2]))


def probability_in_range(samples, low: float, high: float) -> float:
    """Fraction of samples with ``low <= x <= high`` (either bound may be infinite)."""
    x = _samples_1d("samples", samples, allow_inf=True)
    lo, hi = float(low), float(high)
    if math.isnan(lo) or math.isnan(hi) or lo > hi:
        raise ValueError(f"range: expected low <= high, got low={low!r}, high={high!r}")
    return float(np.mean((x >= lo) & (x <= hi)))


# ---------------------------------------------------------- identifiability
@dataclass(frozen=True)
class Identifiability:
    """How much the data narrowed one parameter.

    Attributes
    ----------
    width_ratio : float
        Posterior over prior width of the central ``prob`` interval.
    sd_ratio, variance_ratio : float
        Posterior over prior standard deviation, and its square.
    contraction : float
        1 - variance_ratio (1: fully resolved, 0: nothing learned).
    resolved : bool
        ``width_ratio <= threshold``.
    message : str or None
        Plain-language flag when not resolved.
    """

    width_ratio: float
    sd_ratio: float
    variance_ratio: float
    contraction: float
    resolved: bool
    message: str | None


def identifiability(posterior, prior, name: str = "parameter", *, threshold: float = 0.7,
                    prob: float = 0.9) -> Identifiability:
    """Compare posterior and prior spread of one parameter.

    The posterior contraction ``1 - var_post / var_prior`` follows Schad,
    Betancourt & Vasishth, Psychological Methods 26, 2021 (from memory).

    Parameters
    ----------
    posterior, prior : (S,) and (S2,) arrays
        Samples of the parameter from the posterior and from the prior.
    name : str
        Name used in the message, e.g. "thickness of layer 3".
    threshold : float
        Width ratio above which the parameter is flagged (default 0.7).
    prob : float
        Probability of the central interval compared (default 0.9).

    Returns
    -------
    Identifiability
    """
    post = _samples_1d(f"{name} (posterior)", posterior)
    pri = _samples_1d(f"{name} (prior)", prior)
    p = _check_prob(prob)
    q = [(1 - p) / 2, (1 + p) / 2]
    w_post = float(np.diff(np.quantile(post, q))[0])
    w_pri = float(np.diff(np.quantile(pri, q))[0])
    sd_pri = float(np.std(pri))
    if w_pri <= 0 or sd_pri <= 0:
        raise ValueError(f"{name}: the prior samples have zero spread; a fixed parameter has no identifiability")
    width_ratio = w_post / w_pri
    sd_ratio = float(np.std(post)) / sd_pri
    resolved = width_ratio <= threshold
    message = None
    if not resolved:
        message = (f"{name}: posterior close to prior — the data do not resolve it "
                   f"({_pct(p)}% interval {width_ratio:.0%} as wide as the prior's)")
    return Identifiability(width_ratio, sd_ratio, sd_ratio ** 2, 1.0 - sd_ratio ** 2, resolved, message)


def identifiability_table(posterior: Mapping[str, np.ndarray], prior: Mapping[str, np.ndarray], *,
                          threshold: float = 0.7, prob: float = 0.9) -> list[dict]:
    """:func:`identifiability` for every parameter in ``posterior`` (also in ``prior``)."""
    rows = []
    for name, post in posterior.items():
        if name not in prior:
            raise ValueError(f"prior: no prior samples for {name!r}")
        r = identifiability(post, prior[name], name, threshold=threshold, prob=prob)
        rows.append({"quantity": name, "width_ratio": r.width_ratio, "sd_ratio": r.sd_ratio,
                     "variance_ratio": r.variance_ratio, "contraction": r.contraction,
                     "resolved": r.resolved, "message": r.message})
    return rows


# ---------------------------------------------------- depth of investigation
def _doi(doi) -> np.ndarray:
    d = _samples_1d("depth of investigation", doi, allow_inf=True)
    if (d < 0).any():
        raise ValueError(f"depth of investigation: expected depths >= 0, got {d[d < 0][0]}")
    return d


def mask_below(depth_grid, doi) -> np.ndarray:
    """True where a grid depth lies below the sample's depth of investigation.

    Parameters
    ----------
    depth_grid : (D,) array
        Depths [length].
    doi : (S,) array
        Per-sample deepest ray depth [length] (from the forward engine).

    Returns
    -------
    (S, D) bool array
    """
    z = np.asarray(depth_grid, dtype=float)
    if z.ndim != 1:
        raise ValueError(f"depth_grid: expected a 1-D array of depths, got shape {z.shape}")
    return z[None, :] > _doi(doi)[:, None]


def fraction_below(depth_grid, doi) -> np.ndarray:
    """Fraction of samples whose rays stay above each grid depth, shape (D,)."""
    return mask_below(depth_grid, doi).mean(axis=0)


def flag_below_investigation(quantity_depth: float, doi, quantity: str = "Vs30", *,
                             tolerance: float = 0.05, length_unit: str = "m") -> str | None:
    """Text flag when a quantity depends on depths that the rays do not reach.

    Parameters
    ----------
    quantity_depth : float
        Deepest depth the quantity depends on [length] (30 m for Vs30).
    doi : (S,) array
        Per-sample deepest ray depth [length].
    quantity : str
        Name used in the text.
    tolerance : float
        Flag when more than this fraction of samples has rays above
        ``quantity_depth``.

    Returns
    -------
    str or None
    """
    d = _doi(doi)
    frac = float(np.mean(d < quantity_depth))
    if frac <= tolerance:
        return None
    return (f"{quantity}: in {frac:.0%} of posterior models the deepest ray turns above {quantity_depth:g} "
            f"{length_unit} (median depth of investigation {np.median(d):.3g} {length_unit}); below that the "
            "value rests on the prior and on the layering assumed, not on the data")


def flag_without_s_picks(n_s_picks: int, quantity: str = "Vs30") -> str | None:
    """Text flag for an S-velocity quantity from a run without S picks."""
    if int(n_s_picks) > 0:
        return None
    return (f"{quantity}: no S picks were used, so S velocities follow from P velocities and the prior on "
            "Vp/Vs alone; treat this value as a prior-driven estimate")


# ----------------------------------------------------------- fit diagnostics
def _format_time(seconds: float) -> str:
    s = abs(seconds)
    return f"{s * 1e3:.3g} ms" if s < 1.0 else f"{s:.3g} s"


_GROUP_WORDS = {
    "source": ("picks from source {}", "a delay (static) term or dip?"),
    "receiver": ("picks at receiver {}", "a delay (static) term at this receiver?"),
    "wave": ("{} picks", "a bias in the Vp/Vs assumed or in the S picking?"),
    "branch": ("{} picks", "a wrong branch assignment, or a gradient or hidden layer missing from the model?"),
}


def bonferroni_threshold(n_tests: int, family_level: float = 0.05) -> float:
    """Two-sided normal threshold |z| for ``n_tests`` tests at family-wise level ``family_level``.

    Bonferroni correction (Dunn, J. Am. Stat. Assoc. 56, 1961): each test is run at
    level ``family_level / n_tests``, so the chance that any of them fires when no
    group is offset is at most ``family_level`` whatever their dependence.
    Returns ``Phi^-1(1 - family_level / (2 n_tests))``; 1.96 for one test.
    """
    from scipy.stats import norm

    if not 0 < family_level < 1:
        raise ValueError(f"family_level: expected a probability in (0, 1), got {family_level}")
    return float(norm.isf(family_level / (2.0 * max(int(n_tests), 1))))


def residual_groups(residuals, groups: Mapping[str, Sequence], sigma=None, *, threshold: float | None = None,
                    family_level: float = 0.05) -> list[dict]:
    """Mean and spread of the residuals of each group of picks.

    Parameters
    ----------
    residuals : (S, P) array
        Observed minus predicted time per sample and pick [s].
    groups : mapping key -> (P,) labels
        E.g. ``{"source": ..., "receiver": ..., "wave": ..., "branch": ...}``.
    sigma : (P,) array, optional
        Pick standard deviations [s]. With them the standard error of a group
        mean is sqrt(sum sigma_i^2) / n; without them it is sd / sqrt(n) over
        the picks of the group (undefined for a single pick).
    threshold : float, optional
        A group is ``systematic`` when |mean| exceeds this many standard errors.
        Default: the Bonferroni threshold (:func:`bonferroni_threshold`) for the
        number of groups tested (those with a defined standard error) at
        ``family_level``, so that testing many sources and receivers does not
        flag some of them by chance alone.
    family_level : float
        Family-wise two-sided level of the default threshold (0.05).

    Returns
    -------
    list of dict
        Keys ``group, label, n_picks, mean_s, sd_s, rms_s, standard_error_s,
        z, systematic, threshold, groups_tested``; statistics use the
        posterior-mean residual of each pick.
    """
    r = np.asarray(residuals, dtype=float)
    if r.ndim != 2:
        raise ValueError(f"residuals: expected shape (samples, picks), got {r.shape}")
    if not np.all(np.isfinite(r)):
        raise ValueError("residuals: contain non-finite values (absent arrivals?)")
    n_picks = r.shape[1]
    s = None
    if sigma is not None:
        s = np.asarray(sigma, dtype=float)
        if s.shape != (n_picks,) or not np.all(np.isfinite(s)) or (s <= 0).any():
            raise ValueError(f"sigma: expected {n_picks} finite standard deviations > 0")
    rbar = r.mean(axis=0)
    rows = []
    for key, labels in groups.items():
        lab = np.asarray(labels)
        if lab.shape != (n_picks,):
            raise ValueError(f"groups[{key!r}]: expected {n_picks} labels (one per pick), got shape {lab.shape}")
        _, first = np.unique(lab, return_index=True)
        for value in lab[np.sort(first)]:
            sel = lab == value
            n = int(sel.sum())
            x = rbar[sel]
            mean = float(x.mean())
            sd = float(x.std(ddof=1)) if n > 1 else math.nan
            se = float(np.sqrt(np.sum(s[sel] ** 2)) / n) if s is not None else sd / math.sqrt(n)
            z = mean / se if se > 0 else math.nan
            rows.append({"group": key, "label": str(value), "n_picks": n, "mean_s": mean, "sd_s": sd,
                         "rms_s": float(np.sqrt(np.mean(x * x))), "standard_error_s": se, "z": z})
    tested = sum(math.isfinite(row["z"]) for row in rows)
    limit = bonferroni_threshold(tested, family_level) if threshold is None else float(threshold)
    for row in rows:
        row["systematic"] = bool(abs(row["z"]) > limit)
        row["threshold"] = limit
        row["groups_tested"] = tested
    return rows


def describe_systematic_residuals(rows: Sequence[dict]) -> list[str]:
    """Sentences for the rows of :func:`residual_groups` marked systematic."""
    out = []
    for row in rows:
        if not row["systematic"]:
            continue
        who, hint = _GROUP_WORDS.get(row["group"], (f"picks with {row['group']} = {{}}", "a missing term?"))
        mean = row["mean_s"]
        way = "late" if mean > 0 else "early"
        limit = row.get("threshold")
        beyond = (f", beyond the {limit:.2f} allowed for {row['groups_tested']} groups tested"
                  if limit is not None and row.get("groups_tested") else "")
        out.append(f"{who.format(row['label'])} are {way} by {_format_time(mean)} on average "
                   f"({abs(row['z']):.1f} standard errors{beyond}; {row['n_picks']} picks): {hint}")
    return out


@dataclass(frozen=True)
class PredictiveCheck:
    """Chi-square discrepancy posterior predictive check.

    Attributes
    ----------
    p_value : float
        Fraction of samples with T(y_rep, theta) >= T(y, theta).
    observed_discrepancy, replicated_discrepancy : (S,) arrays
        T(y, theta) and T(y_rep, theta) per sample [dimensionless].
    message : str or None
        Plain-language note for p below 0.05 or above 0.95.
    """

    p_value: float
    observed_discrepancy: np.ndarray
    replicated_discrepancy: np.ndarray
    message: str | None


def chi_square_check(observed, predicted, replicated, sigma) -> PredictiveCheck:
    """Posterior predictive p-value of the chi-square discrepancy.

    T(y, theta) = sum_i (y_i - mu_i(theta))^2 / sigma_i^2, compared with the
    same discrepancy of data replicated from each posterior sample (Gelman et
    al., Bayesian Data Analysis, 3rd ed., 2013, ch. 6; from memory).

    Parameters
    ----------
    observed : (P,) array
        Picked times [s].
    predicted : (S, P) array
        Noise-free predicted times of each sample [s].
    replicated : (S, P) array
        Replicated picks (prediction plus noise drawn from the likelihood) [s].
    sigma : (P,) or (S, P) array
        Pick standard deviation [s] (per sample when the noise scale is sampled).

    Returns
    -------
    PredictiveCheck
    """
    y = np.asarray(observed, dtype=float)
    mu = np.asarray(predicted, dtype=float)
    rep = np.asarray(replicated, dtype=float)
    if y.ndim != 1:
        raise ValueError(f"observed: expected shape (picks,), got {y.shape}")
    for name, a in (("predicted", mu), ("replicated", rep)):
        if a.ndim != 2 or a.shape[1] != y.size:
            raise ValueError(f"{name}: expected shape (samples, {y.size}), got {a.shape}")
        bad = ~np.isfinite(a)
        if bad.any():
            raise ValueError(f"{name}: pick {int(np.argwhere(bad)[0, 1])} has a non-finite time (absent arrival?)")
    if mu.shape != rep.shape:
        raise ValueError(f"replicated: shape {rep.shape} does not match predicted {mu.shape}")
    sig = np.asarray(sigma, dtype=float)
    if sig.shape not in ((y.size,), mu.shape) or not np.all(np.isfinite(sig)) or (sig <= 0).any():
        raise ValueError("sigma: expected finite standard deviations > 0 of shape (picks,) or (samples, picks)")
    t_obs = np.sum(((y[None, :] - mu) / sig) ** 2, axis=1)
    t_rep = np.sum(((rep - mu) / sig) ** 2, axis=1)
    p = float(np.mean(t_rep >= t_obs))
    message = None
    if p < 0.05:
        message = (f"posterior predictive p = {p:.2f}: the misfit is larger than the noise model allows "
                   "(pick errors underestimated, outliers, or a model too simple)")
    elif p > 0.95:
        message = (f"posterior predictive p = {p:.2f}: the picks fit better than the noise model expects "
                   "(pick errors overstated?)")
    return PredictiveCheck(p, t_obs, t_rep, message)


# --------------------------------------------------------------- trade-offs
def correlation_matrix(samples) -> np.ndarray:
    """Pearson correlation matrix of parameters, (S, K) -> (K, K).

    A parameter with no spread gets NaN in its row and column.
    """
    x = np.asarray(samples, dtype=float)
    if x.ndim != 2 or x.shape[0] < 2:
        raise ValueError(f"samples: expected shape (samples >= 2, parameters), got {x.shape}")
    if not np.all(np.isfinite(x)):
        raise ValueError("samples: contain non-finite values")
    xc = x - x.mean(axis=0)
    sd = np.sqrt(np.mean(xc * xc, axis=0))
    with np.errstate(divide="ignore", invalid="ignore"):
        z = xc / np.where(sd > 0, sd, np.nan)
    corr = z.T @ z / x.shape[0]
    return np.clip(corr, -1.0, 1.0)


def _kind(name: str) -> str:
    n = name.lower()
    if re.match(r"(vp_?vs|vpvs|poisson)", n):
        return "ratio"
    if "gradient" in n:
        return "gradient"
    if re.match(r"(thickness|depth|h_?\d)", n):
        return "thickness"
    if re.match(r"(vp|vs|velocity)", n):
        return "velocity"
    return "other"


_REMARKS = {
    frozenset(["thickness", "velocity"]): "the classic thickness–velocity trade-off",
    frozenset(["velocity"]): "the two velocities trade off against each other",
    frozenset(["gradient", "velocity"]): "velocity and gradient trade off",
    frozenset(["thickness", "gradient"]): "thickness and gradient trade off",
    frozenset(["thickness"]): "the two depths trade off against each other",
}


def strongest_pairs(corr, names: Sequence[str], *, n: int = 5, min_abs: float = 0.5) -> list[dict]:
    """The most correlated parameter pairs, named.

    Parameters
    ----------
    corr : (K, K) array
        Correlation matrix (:func:`correlation_matrix`).
    names : sequence of K str
    n : int
        At most this many pairs.
    min_abs : float
        Pairs with |correlation| below this are left out.

    Returns
    -------
    list of dict
        Keys ``first, second, correlation, text``, strongest first, e.g.
        "thickness_1 vs vp_2: correlation 0.83 — the classic thickness–velocity
        trade-off". Pearson correlation sees linear dependence only.
    """
    c = np.asarray(corr, dtype=float)
    names = list(names)
    if c.ndim != 2 or c.shape != (len(names), len(names)):
        raise ValueError(f"corr: expected a ({len(names)}, {len(names)}) matrix for {len(names)} names, "
                         f"got {c.shape}")
    i, j = np.triu_indices(len(names), k=1)
    r = c[i, j]
    keep = np.isfinite(r) & (np.abs(r) >= min_abs)
    order = np.argsort(-np.abs(r[keep]), kind="stable")[:n]
    rows = []
    for a, b, rho in zip(i[keep][order], j[keep][order], r[keep][order]):
        remark = _REMARKS.get(frozenset([_kind(names[a]), _kind(names[b])]))
        text = f"{names[a]} vs {names[b]}: correlation {rho:.2f}" + (f" — {remark}" if remark else "")
        rows.append({"first": names[a], "second": names[b], "correlation": float(rho), "text": text})
    return rows
