"""Layered velocity models: N layers over a half-space, batched.

Depth ``z`` increases downward from the datum (z = 0). Layer 1 is the top
layer; it also extends upward above the datum so that stations standing
above it (negative depth) lie inside it. The half-space (layer N+1) extends
to infinite depth. Inside every layer velocity varies linearly with depth::

    v(z) = v_top + gradient * (z - z_top)

Every array carries a leading batch axis (one row per model, e.g. every
walker of an ensemble). Units are whatever the caller uses consistently
(metres and m/s, or kilometres and km/s); gradients are velocity per depth
unit (1/s).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Smallest Vp/Vs ratio of a solid: Vp/Vs > sqrt(4/3) <=> bulk modulus > 0.
MIN_SOLID_VPVS = float(np.sqrt(4.0 / 3.0))

WAVES = ("P", "S")


def _as_batch(name: str, value, n_cols: int | None, n_models: int | None) -> np.ndarray:
    """Return ``value`` as a float (models, columns) array or raise ValueError."""
    arr = np.asarray(value, dtype=float)
    if arr.ndim == 0:
        if n_cols is None:
            raise ValueError(f"{name}: a scalar cannot fix the number of layers; give one value per layer")
        arr = np.full((1, n_cols), float(arr))
    elif arr.ndim == 1:
        arr = arr[None, :]
    elif arr.ndim != 2:
        raise ValueError(f"{name}: expected shape (layers,) or (models, layers), got {arr.shape}")
    if n_cols is not None and arr.shape[1] != n_cols:
        raise ValueError(f"{name}: expected {n_cols} values per model, got {arr.shape[1]}")
    if n_models is not None and arr.shape[0] not in (1, n_models):
        raise ValueError(f"{name}: batch of {arr.shape[0]} models does not match {n_models}")
    return arr


def _layer_label(j: int, n_layers: int) -> str:
    return "half-space" if j == n_layers - 1 else f"layer {j + 1}"


@dataclass(frozen=True)
class LayerModel:
    """A batch of layered models (validated; build with :meth:`build`).

    Attributes
    ----------
    thickness : (models, N) array
        Thickness of each layer above the half-space [length].
    vp, vp_gradient : (models, N+1) arrays
        P velocity at the top of each layer [length/s] and dVp/dz [1/s].
    vs, vs_gradient : (models, N+1) arrays
        S velocity at the top of each layer and dVs/dz; zero in fluid layers.
    """

    thickness: np.ndarray
    vp: np.ndarray
    vp_gradient: np.ndarray
    vs: np.ndarray
    vs_gradient: np.ndarray

    @classmethod
    def build(cls, thickness, vp, *, vs=None, vpvs=None, gradient=None, vs_gradient=None) -> "LayerModel":
        """Validate and broadcast a (batch of) layered model(s).

        Parameters
        ----------
        thickness : array (N,) or (models, N)
            Layer thicknesses above the half-space [length]; N may be 0.
        vp : array (N+1,) or (models, N+1)
            P velocity at the top of each layer and of the half-space [length/s].
        vs : array, optional
            S velocity at the top of each layer [length/s]; 0 marks a fluid layer.
        vpvs : array or float, optional
            Vp/Vs per layer (alternative to ``vs``); ``inf`` marks a fluid layer.
        gradient : array, optional
            dVp/dz per layer [1/s]; 0 (default) gives constant-velocity layers.
        vs_gradient : array, optional
            dVs/dz per layer [1/s]. Defaults to ``gradient * vs / vp`` (Vp/Vs
            constant inside each layer).

        Raises
        ------
        ValueError
            Naming the field and the layer for NaN, thickness <= 0, Vp <= 0 or
            Vs < 0 anywhere in a layer (its base included), Vp/Vs of a solid
            not above sqrt(4/3), or mismatched shapes.
        """
        if vs is not None and vpvs is not None:
            raise ValueError("give either vs or vpvs, not both")
        vp_arr = np.asarray(vp, dtype=float)
        if vp_arr.ndim not in (1, 2) or vp_arr.shape[-1] < 1:
            raise ValueError(f"vp: expected shape (layers,) or (models, layers), got {vp_arr.shape}")
        n_layers = vp_arr.shape[-1]
        th = np.asarray(thickness, dtype=float)
        if th.ndim == 0 or th.shape[-1] != n_layers - 1:
            got = th.shape[-1] if th.ndim else "a scalar"
            raise ValueError(
                f"thickness: expected {n_layers - 1} values (one per layer above the half-space, "
                f"vp has {n_layers}), got {got}"
            )
        shapes = [vp_arr.shape[0] if vp_arr.ndim == 2 else 1, th.shape[0] if th.ndim == 2 else 1]
        for extra in (vs, vpvs, gradient, vs_gradient):
            a = np.asarray(extra) if extra is not None else None
            if a is not None and a.ndim == 2:
                shapes.append(a.shape[0])
        n_models = max(shapes)
        th = _as_batch("thickness", th, n_layers - 1, n_models)
        vp_arr = _as_batch("vp", vp_arr, n_layers, n_models)
        grad = (np.zeros((1, n_layers)) if gradient is None
                else _as_batch("gradient", gradient, n_layers, n_models))
        if vs is not None:
            vs_arr = _as_batch("vs", vs, n_layers, n_models)
        elif vpvs is not None:
            ratio = _as_batch("vpvs", vpvs, n_layers, n_models)
            _check_finite_or_inf("vpvs", ratio, n_layers)
            bad = (ratio <= MIN_SOLID_VPVS)
            if bad.any():
                j = int(np.argwhere(bad)[0, 1])
                raise ValueError(
                    f"vpvs: {_layer_label(j, n_layers)} has Vp/Vs <= sqrt(4/3) = {MIN_SOLID_VPVS:.4f} "
                    "(negative bulk modulus); use inf for a fluid layer")
            with np.errstate(divide="ignore"):
                vs_arr = np.where(np.isinf(ratio), 0.0, vp_arr / ratio)
        else:
            raise ValueError("give vs or vpvs (Vp/Vs); use vs = 0 for fluid layers")
        shape = (n_models, n_layers)
        vp_arr, grad, vs_arr = (np.broadcast_to(a, shape).copy() for a in (vp_arr, grad, vs_arr))
        th = np.broadcast_to(th, (n_models, n_layers - 1)).copy()
        if vs_gradient is None:
            with np.errstate(divide="ignore", invalid="ignore"):
                vs_grad = np.where(vs_arr > 0, grad * vs_arr / vp_arr, 0.0)
        else:
            vs_grad = np.broadcast_to(_as_batch("vs_gradient", vs_gradient, n_layers, n_models), shape).copy()
        model = cls(th, vp_arr, grad, vs_arr, vs_grad)
        model._validate()
        return model

    # ------------------------------------------------------------------ checks
    def _validate(self) -> None:
        n_layers = self.n_layers
        for name, arr in (("thickness", self.thickness), ("vp", self.vp), ("gradient", self.vp_gradient),
                          ("vs", self.vs), ("vs_gradient", self.vs_gradient)):
            _check_finite(name, arr, n_layers)
        bad = self.thickness <= 0
        if bad.any():
            m, j = np.argwhere(bad)[0]
            raise ValueError(f"thickness: {_layer_label(j, n_layers)} has thickness {self.thickness[m, j]:g} <= 0"
                             + _model_suffix(m, self.n_models))
        vp_base = self.base_velocity("P")
        vs_base = self.base_velocity("S")
        for name, top, base, strict in (("vp", self.vp, vp_base, True), ("vs", self.vs, vs_base, False)):
            bad_top = top <= 0 if strict else top < 0
            bad_base = base <= 0 if strict else base < 0
            rel = "<=" if strict else "<"
            if bad_top.any():
                m, j = np.argwhere(bad_top)[0]
                raise ValueError(f"{name}: {_layer_label(j, n_layers)} has {name} = {top[m, j]:g} {rel} 0 at its top"
                                 + _model_suffix(m, self.n_models))
            if bad_base.any():
                m, j = np.argwhere(bad_base)[0]
                what = "base" if j < n_layers - 1 else "depth"
                raise ValueError(f"{name}: {_layer_label(j, n_layers)} reaches {name} {rel} 0 at its {what} "
                                 f"through its gradient" + _model_suffix(m, self.n_models))
        fluid = self.vs == 0
        bad = fluid & (self.vs_gradient != 0)
        if bad.any():
            m, j = np.argwhere(bad)[0]
            raise ValueError(f"vs_gradient: {_layer_label(j, n_layers)} is fluid (vs = 0) but has an S gradient"
                             + _model_suffix(m, self.n_models))
        solid = ~fluid
        for where, vpa, vsa in (("top", self.vp, self.vs), ("base", vp_base, vs_base)):
            with np.errstate(divide="ignore", invalid="ignore"):
                ratio = np.where(solid, vpa / np.where(vsa > 0, vsa, np.nan), np.inf)
            bad = solid & ~(ratio > MIN_SOLID_VPVS)
            if where == "base":
                # the half-space has no base: Vp/Vs tends to gp/gs at depth (monotone in between)
                gp, gs = self.vp_gradient[:, -1], self.vs_gradient[:, -1]
                with np.errstate(divide="ignore", invalid="ignore"):
                    deep = np.where(gs > 0, gp / np.where(gs > 0, gs, 1.0), np.inf)
                bad[:, -1] = solid[:, -1] & ~(deep > MIN_SOLID_VPVS)
            if bad.any():
                m, j = np.argwhere(bad)[0]
                raise ValueError(f"vs: {_layer_label(j, n_layers)} has Vp/Vs <= sqrt(4/3) at its {where} "
                                 "(negative bulk modulus)" + _model_suffix(m, self.n_models))

    # --------------------------------------------------------------- queries
    @property
    def n_models(self) -> int:
        """Number of models in the batch."""
        return self.vp.shape[0]

    @property
    def n_layers(self) -> int:
        """Number of layers including the half-space (N+1)."""
        return self.vp.shape[1]

    @property
    def interface_depths(self) -> np.ndarray:
        """Depth of interface k (base of layer k), shape (models, N) [length]."""
        return np.cumsum(self.thickness, axis=1)

    @property
    def layer_tops(self) -> np.ndarray:
        """Depth of the top of every layer, (models, N+1); layer 1 starts at the datum (0)."""
        return np.concatenate([np.zeros((self.n_models, 1)), self.interface_depths], axis=1)

    def velocity(self, wave: str) -> tuple[np.ndarray, np.ndarray]:
        """Velocity at each layer top and its gradient for ``wave`` ('P' or 'S')."""
        wave = _check_wave(wave)
        return (self.vp, self.vp_gradient) if wave == "P" else (self.vs, self.vs_gradient)

    def base_velocity(self, wave: str) -> np.ndarray:
        """Velocity at the base of each layer (models, N+1); the half-space gives its top value."""
        top, grad = self.velocity(wave)
        base = top.copy()
        base[:, :-1] += grad[:, :-1] * self.thickness
        hs = grad[:, -1]
        base[:, -1] = np.where(hs < 0, -np.inf, top[:, -1])  # a falling half-space reaches 0 somewhere
        return base

    @property
    def vpvs(self) -> np.ndarray:
        """Vp/Vs at each layer top (inf for fluid layers), (models, N+1)."""
        with np.errstate(divide="ignore"):
            return np.where(self.vs > 0, self.vp / np.where(self.vs > 0, self.vs, 1.0), np.inf)

    def profile(self, depth, wave: str = "P") -> np.ndarray:
        """Velocity at depths ``depth`` (D,) for every model, shape (models, D).

        A depth exactly on an interface takes the velocity of the layer below.
        """
        z = np.asarray(depth, dtype=float)
        top, grad = self.velocity(wave)
        tops = self.layer_tops
        idx = np.sum(z[None, :] >= tops[:, 1:, None], axis=1)  # layer index (models, D)
        rows = np.arange(self.n_models)[:, None]
        return top[rows, idx] + grad[rows, idx] * (z[None, :] - tops[rows, idx])

    def take(self, index) -> "LayerModel":
        """Models selected by ``index`` along the batch axis (kept 2-D)."""
        idx = np.atleast_1d(np.arange(self.n_models)[index])
        return LayerModel(self.thickness[idx], self.vp[idx], self.vp_gradient[idx], self.vs[idx],
                          self.vs_gradient[idx])


def _check_wave(wave: str) -> str:
    w = str(wave).upper()
    if w not in WAVES:
        raise ValueError(f"wave: expected 'P' or 'S', got {wave!r}")
    return w


def _model_suffix(m: int, n_models: int) -> str:
    return f" (model {m} of the batch)" if n_models > 1 else ""


def _check_finite(name: str, arr: np.ndarray, n_layers: int) -> None:
    bad = ~np.isfinite(arr)
    if bad.any():
        m, j = np.argwhere(bad)[0]
        raise ValueError(f"{name}: {_layer_label(j, n_layers)} is {arr[m, j]} (not a finite number)")


def _check_finite_or_inf(name: str, arr: np.ndarray, n_layers: int) -> None:
    bad = np.isnan(arr) | (arr == -np.inf)
    if bad.any():
        m, j = np.argwhere(bad)[0]
        raise ValueError(f"{name}: {_layer_label(j, n_layers)} is {arr[m, j]} (not a number)")
