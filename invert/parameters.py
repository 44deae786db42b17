"""Layer parameterisation: named parameter values -> batched LayerModel.

Parameter names (layers numbered 1..N+1 from the top, N+1 the half-space;
interface k is the base of layer k):

``thickness_k`` (k = 1..N) or ``depth_k`` (interface depth) [length];
``vp_k`` [length/s]; ``vpvs_k`` (one per layer) or ``vpvs`` (shared) or
``vs_k`` [length/s]; ``gradient_k`` (dVp/dz, 1/s) for layers that carry one.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from .model import MIN_SOLID_VPVS, LayerModel

S_MODES = ("vpvs", "shared_vpvs", "vs", "none")
DEPTH_MODES = ("thickness", "depth")

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
    s_mode : str
        'vpvs' (Vp/Vs per layer), 'shared_vpvs' (one Vp/Vs for all solid
        layers), 'vs' (S velocity per layer) or 'none' (P picks only).
    depth_parameter : str
        'thickness' (priors on thicknesses) or 'depth' (priors on interface depths).
    fluid_layers : tuple of int
        Layer numbers with Vs = 0 (no S parameter is sampled for them).
    """

    n_layers: int
    gradient_layers: tuple = ()
    s_mode: str = "vpvs"
    depth_parameter: str = "thickness"
    fluid_layers: tuple = field(default_factory=tuple)

    def __post_init__(self):
        if int(self.n_layers) != self.n_layers or self.n_layers < 0:
            raise ValueError(f"model.layers: expected an integer >= 0, got {self.n_layers!r}")
        total = self.n_layers + 1
        for key, layers in (("model.gradient_layers", self.gradient_layers), ("model.fluid_layers", self.fluid_layers)):
            for k in layers:
                if int(k) != k or not 1 <= k <= total:
                    raise ValueError(f"{key}: layer numbers run from 1 to {total} (the half-space); got {k!r}")
        if self.s_mode not in S_MODES:
            raise ValueError(f"model.s_velocity: expected one of {', '.join(S_MODES)}, got {self.s_mode!r}")
        if self.depth_parameter not in DEPTH_MODES:
            raise ValueError(f"model.depth_parameter: expected one of {', '.join(DEPTH_MODES)}, "
                             f"got {self.depth_parameter!r}")

    @property
    def total_layers(self) -> int:
        """Layers including the half-space."""
        return self.n_layers + 1

    def names(self) -> list[str]:
        """Every layer parameter name of this parameterisation, in a fixed order."""
        n = self.n_layers
        out = [f"{self.depth_parameter}_{k}" for k in range(1, n + 1)]
        out += [f"vp_{k}" for k in range(1, n + 2)]
        out += [f"gradient_{k}" for k in sorted(self.gradient_layers)]
        solid = [k for k in range(1, n + 2) if k not in self.fluid_layers]
        if self.s_mode == "vpvs":
            out += [f"vpvs_{k}" for k in solid]
        elif self.s_mode == "shared_vpvs" and solid:
            out += ["vpvs"]
        elif self.s_mode == "vs":
            out += [f"vs_{k}" for k in solid]
        return out

    def unit(self, name: str, length: str) -> str:
        """Unit of parameter ``name`` given the length unit ('m' or 'km')."""
        kind = name.rsplit("_", 1)[0] if name[-1].isdigit() else name
        return {"thickness": length, "depth": length, "vp": f"{length}/s", "vs": f"{length}/s",
                "gradient": "1/s", "vpvs": "1"}.get(kind, "")


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
    if settings.depth_parameter == "thickness":
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
        elif settings.s_mode == "vpvs":
            vs[:, k - 1] = vp[:, k - 1] / _column(values, f"vpvs_{k}", n)
        elif settings.s_mode == "shared_vpvs":
            vs[:, k - 1] = vp[:, k - 1] / _column(values, "vpvs", n)
        elif settings.s_mode == "vs":
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
    sel = {k: v[ok] for k, v in arrays.items()}
    model = LayerModel.build(sel["thickness"], sel["vp"], vs=sel["vs"], gradient=sel["gradient"])
    return model, ok
