"""Layer parameterisation: named parameter values -> batched LayerModel.

Parameter names (layers numbered 1..N+1 from the top, N+1 the half-space;
interface k is the base of layer k):

``thickness_k`` (k = 1..N) or ``depth_k`` (interface depth) [length];
``vp_k`` [length/s]; ``vpvs_k`` (one per layer) or ``vpvs`` (shared) or
``vs_k`` [length/s]; ``gradient_k`` (dVp/dz, 1/s) for layers that carry one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from .model import MIN_SOLID_VPVS, LayerModel
from .prior import parameter_names

S_MODES = ("per_layer", "shared", "vs", "none")

#: Geometries of a run: layers over a half-space, or shells of a spherical planet.
GEOMETRIES = ("flat", "sphere")

#: Nominal Vp/Vs used to fill S velocities when a run has no S picks (never used in a forward call).
_P_ONLY_VPVS = 2.0


@dataclass(frozen=True)
class LayerSettings:
    """Shape of the layered model of a run.

    Attributes
    ----------
    n_layers : int
        Number of layers above the half-space (N >= 0).
    gradient_layers : tuple of int
        Layer numbers (1..N+1) that carry a linear P-velocity gradient.
    vpvs_mode : str
        'per_layer' (``vpvs_k`` per layer), 'shared' (one ``vpvs``), 'vs'
        (``vs_k`` per layer) or 'none' (P picks only).
    depth_parameter : bool
        False: priors on thicknesses ``thickness_k``; True: on interface depths ``depth_k``.
    fluid_layers : tuple of int
        Layer numbers with Vs = 0 (no S parameter is sampled for them).
    """

    n_layers: int
    gradient_layers: tuple = ()
    vpvs_mode: str = "per_layer"
    depth_parameter: bool = False
    fluid_layers: tuple = field(default_factory=tuple)

    def __post_init__(self):
        if int(self.n_layers) != self.n_layers or self.n_layers < 0:
            raise ValueError(f"model.layers: expected an integer >= 0, got {self.n_layers!r}")
        total = self.n_layers + 1
        for key, layers in (("model.gradient_layers", self.gradient_layers), ("model.fluid_layers", self.fluid_layers)):
            for k in layers:
                if int(k) != k or not 1 <= k <= total:
                    raise ValueError(f"{key}: layer numbers run from 1 to {total} (the half-space); got {k!r}")
        if self.vpvs_mode not in S_MODES:
            raise ValueError(f"model.vpvs_mode: expected one of {', '.join(S_MODES)}, got {self.vpvs_mode!r}")
        if not isinstance(self.depth_parameter, bool):
            raise ValueError(f"model.depth_parameter: expected true or false, got {self.depth_parameter!r}")

    @property
    def total_layers(self) -> int:
        """Layers including the half-space."""
        return self.n_layers + 1

    @property
    def geometry(self) -> str:
        """'flat': the layers lie over a half-space (see :class:`SphereSettings` for planets)."""
        return "flat"

    def names(self) -> list[str]:
        """Every layer parameter name of this parameterisation, in the prior's order."""
        return list(parameter_names(self.total_layers, vpvs_mode=self.vpvs_mode,
                                    gradient_layers=sorted(self.gradient_layers),
                                    depth_parameter=self.depth_parameter))


@dataclass(frozen=True)
class SphereSettings(LayerSettings):
    """Shape of the layered model of a run on a spherical planet (``[model] geometry = "sphere"``).

    The layers are shells from the surface down, with the same parameters
    as in a flat run; :func:`invert.sphere.RadialModel.from_layers` turns
    them into a planet: every layer a shell with the same depths and end
    velocities (``'flat'`` law: ``v / r`` linear in ``ln r``), the half-space
    a shell filling the planet to its centre (``'r2'`` law:
    ``1 / v^2`` linear in ``r^2``, with the velocity of its linear law at the
    centre). A fluid half-space under solid layers is a liquid core.

    Attributes
    ----------
    planet_radius : float
        Radius of the planet [km].
    max_diffraction : float
        Longest arc [degrees] along the core boundary over which a
        diffracted wave (Pdiff, Sdiff) counts as a first arrival (inf: any).
    """

    planet_radius: float = math.nan
    max_diffraction: float = math.inf

    def __post_init__(self):
        super().__post_init__()
        if not (isinstance(self.planet_radius, (int, float)) and math.isfinite(self.planet_radius)
                and self.planet_radius > 0):
            raise ValueError(f"model.planet_radius: expected a positive radius in km, got {self.planet_radius!r}")
        if not (isinstance(self.max_diffraction, (int, float)) and self.max_diffraction >= 0):
            raise ValueError(f"model.max_diffraction: expected an arc in degrees >= 0 (inf: no limit), "
                             f"got {self.max_diffraction!r}")

    @property
    def geometry(self) -> str:
        """'sphere': the layers are shells of a planet of radius ``planet_radius``."""
        return "sphere"


def _column(values: Mapping[str, np.ndarray], name: str, n: int) -> np.ndarray:
    if name not in values:
        raise KeyError(f"parameter {name!r} has neither a prior nor a fixed value")
    return np.broadcast_to(np.asarray(values[name], dtype=float), (n,))


def batch_size(values: Mapping[str, np.ndarray]) -> int:
    """Number of models implied by the (broadcastable) value arrays."""
    return max((np.size(v) for v in values.values()), default=1)


def layer_arrays(values: Mapping[str, np.ndarray], settings: LayerSettings) -> dict:
    """Arrays thickness (B,N), vp, gradient, vs (B,N+1) from named values (B,) or scalars."""
    n = batch_size(values)
    nl = settings.total_layers
    if not settings.depth_parameter:
        thick = np.stack([_column(values, f"thickness_{k}", n) for k in range(1, nl)], axis=1) if nl > 1 \
            else np.zeros((n, 0))
    else:
        depth = np.stack([_column(values, f"depth_{k}", n) for k in range(1, nl)], axis=1) if nl > 1 \
            else np.zeros((n, 0))
        thick = np.diff(np.concatenate([np.zeros((n, 1)), depth], axis=1), axis=1)
    vp = np.stack([_column(values, f"vp_{k}", n) for k in range(1, nl + 1)], axis=1)
    grad = np.zeros((n, nl))
    for k in settings.gradient_layers:
        grad[:, k - 1] = _column(values, f"gradient_{k}", n)
    vs = np.empty((n, nl))
    for k in range(1, nl + 1):
        if k in settings.fluid_layers:
            vs[:, k - 1] = 0.0
        elif settings.vpvs_mode == "per_layer":
            vs[:, k - 1] = vp[:, k - 1] / _column(values, f"vpvs_{k}", n)
        elif settings.vpvs_mode == "shared":
            vs[:, k - 1] = vp[:, k - 1] / _column(values, "vpvs", n)
        elif settings.vpvs_mode == "vs":
            vs[:, k - 1] = _column(values, f"vs_{k}", n)
        else:
            vs[:, k - 1] = vp[:, k - 1] / _P_ONLY_VPVS
    return {"thickness": thick, "vp": vp, "gradient": grad, "vs": vs}


def valid_rows(arrays: dict) -> np.ndarray:
    """Rows (B,) whose layer arrays form a valid model (see LayerModel.build)."""
    thick, vp, grad, vs = arrays["thickness"], arrays["vp"], arrays["gradient"], arrays["vs"]
    ok = np.all(np.isfinite(thick), axis=1) & np.all(thick > 0, axis=1)
    ok &= np.all(np.isfinite(vp), axis=1) & np.all(np.isfinite(vs), axis=1) & np.all(np.isfinite(grad), axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        scale = np.where(vp > 0, vs / vp, 0.0)
        vp_base = vp[:, :-1] + grad[:, :-1] * thick
        vs_base = vs[:, :-1] + grad[:, :-1] * scale[:, :-1] * thick
        ok &= np.all(vp > 0, axis=1) & np.all(vp_base > 0, axis=1) & (grad[:, -1] >= 0)
        ok &= np.all(vs >= 0, axis=1) & np.all(vs_base >= 0, axis=1)
        solid = vs > 0
        ratio = np.where(solid, vp / np.where(solid, vs, 1.0), np.inf)
        ok &= np.all(ratio > MIN_SOLID_VPVS, axis=1)
    return ok


def build_models(values: Mapping[str, np.ndarray], settings: LayerSettings) -> tuple[LayerModel | None, np.ndarray]:
    """LayerModel of the valid rows and the (B,) validity mask.

    Invalid rows (e.g. a gradient that drives the velocity below zero) are
    left out rather than raising, so that a sampler can give them zero
    posterior density; the mask tells which rows the model holds.
    """
    arrays = layer_arrays(values, settings)
    ok = valid_rows(arrays)
    if not ok.any():
        return None, ok
    sel = {k: np.ascontiguousarray(v[ok]) for k, v in arrays.items()}
    # rows already passed valid_rows(): construct without repeating LayerModel.build's checks
    vs_grad = np.where(sel["vs"] > 0, sel["gradient"] * sel["vs"] / sel["vp"], 0.0)
    model = LayerModel(sel["thickness"], sel["vp"], sel["gradient"], sel["vs"], vs_grad)
    return model, ok


def build_radial_models(model: LayerModel | None, ok: np.ndarray, settings: SphereSettings):
    """Planets of the layer models built by :func:`build_models`: (RadialModel or None, validity mask (B,)).

    ``model`` holds the rows where ``ok`` is True. Rows whose half-space
    starts at or below the centre, or that the radial model rejects, are
    marked invalid (zero posterior density) instead of raising.
    """
    from .sphere import RadialModel

    ok = np.array(ok, dtype=bool)
    if model is None:
        return None, ok
    radius = float(settings.planet_radius)
    inside = model.layer_tops[:, -1] < radius
    keep = np.flatnonzero(inside)
    if keep.size:
        sub = model if inside.all() else model.take(keep)
        try:
            radial = RadialModel.from_layers(sub, radius)
        except ValueError:
            good = []
            for i in range(sub.n_models):
                try:
                    RadialModel.from_layers(sub.take([i]), radius)
                    good.append(i)
                except ValueError:
                    pass
            inside[keep[np.setdiff1d(np.arange(sub.n_models), good)]] = False
            keep = np.flatnonzero(inside)
            radial = RadialModel.from_layers(model.take(keep), radius) if keep.size else None
    else:
        radial = None
    rows = np.flatnonzero(ok)
    ok[rows[~inside]] = False
    return radial, ok
