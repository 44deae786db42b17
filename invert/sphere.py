"""Spherical planets: radial models and travel times through concentric shells.

A radial model is a stack of concentric shells from the surface (radius R) to
the centre, each with P and S velocities (S = 0 in liquid shells) given at its
top and bottom. Between them the velocity follows one of two laws, chosen per
shell, for both of which every ray integral has a closed form (p = r sin(i) / v
is the ray parameter [s/rad], eta = r / v, zeta = v / r = 1 / eta):

* ``'r2'`` (the default; required for a shell reaching the centre):
  ``1 / v^2 = A + B r^2``. With ``w = r^2``, ``Q = w (A + B w) - p^2 =
  eta^2 - p^2`` and ``D = sqrt(A^2 + 4 B p^2)``, measured from the turning
  point ``w_t = 2 p^2 / (A + D)`` up to radius ``sqrt(w)``::

      Delta = atan2(2 p sqrt(Q), 2 p^2 - A w) / 2
      T     = [sqrt(Q) + (A / 2) I] / 2,      I = int_{w_t}^{w} dw / sqrt(Q)
      dDelta/dp = -(A^2 + A B w + 2 B p^2) / (sqrt(Q) D^2)

  (I is a logarithm for B > 0, an arcsine for B < 0, 2 sqrt(Q) / A for B = 0;
  ``w - w_t = 2 Q / (A + D + 2 B w)`` avoids cancellation). A ray crossing the
  shell takes the difference of the two ends. Uniform shells (B = 0) are exact
  at any radius: rays are straight chords. Rays turn in the shell only if
  ``eta`` falls toward the centre throughout it, which is checked.
* ``'flat'``: ``v / r`` linear in ``ln r``, i.e. a linear layer in the exactly
  flattened coordinates ``z_f = R ln(R / r)``, ``v_f = (R / r) v`` (the
  Earth-flattening transformation; Müller, J. Geophys. 42, 1977, from
  memory). A ray of ray parameter p covers the distance ``R * Delta`` of a
  flat ray of ray parameter ``p / R`` in that layer, in the same time, so the
  linear-gradient integrals of the flat engine (``docs/forward.md``) apply in
  ``u = ln(R / r)`` and zeta::

      Delta = p h (za + zb) / (qa + qb),        q = sqrt(1 - p^2 zeta^2)
      T     = h c log1p(d) / d,  c = [1 + (za + zb)/(zb qa + za qb)] / (za (1 + qb)),
                                 d = (zb - za) c

  over ``h = ln(r_a / r_b)``, and ``Delta = qa / (p g)``,
  ``T = acosh(1 / (p za)) / g`` (g = dzeta/du > 0) for a ray turning inside.
  Between its ends a uniform shell comes out faster by up to
  ``v ln(r_top / r_bottom)^2 / 8``: negligible in crust and mantle, large
  near the centre.

Branches (IASPEI standard phase names; Storchak et al., SRL 74, 2003):
rays staying above the core (P, S: up from a buried source, or turning in a
shell), head waves along a shell boundary above the core, waves diffracted
along the core-mantle boundary (Pdiff, Sdiff; kinematically a head wave at the
velocity just above the boundary), P through the liquid outer core (PKPab,
PKPbc) and through the inner core (PKIKP), S converted to P in the outer core
and back (SKS) or through the inner core as well (SKIKS). The core is the
deepest run of liquid shells (vs = 0) under a solid shell. Every root of
Delta(p) = Delta is searched (26 samples of Delta(p) per turning shell, sign
changes and extrema polished, branch and bound across shells) and the earliest
kept. Absent branches have ``time = inf`` and ``ray_parameter = nan``.

For regional work with the flat parameterisation, :func:`flatten_layers`
turns a flat :class:`~invert.model.LayerModel` into its exactly flattened
counterpart ('flat' law) and :func:`travel_times_flattened` runs the flat
engine on it.

Units: kilometres, km/s, seconds; distances in degrees (or km of arc at the
surface); ray parameters in s/rad. Details and checks: ``docs/sphere.md``.
"""

from __future__ import annotations

import csv
import io
import math
import os
from dataclasses import dataclass

import numba
import numpy as np

from . import forward
from .data import DataError
from .model import MIN_SOLID_VPVS, LayerModel, _check_wave

# ---------------------------------------------------------------------------- phase codes
PHASE_NONE = 0
PHASE_DIRECT = 1        # P / S leaving the deeper end upward, no turning point
PHASE_TURNING = 2       # P / S turning in a shell above the core
PHASE_HEAD = 3          # head wave along a shell boundary above the core
PHASE_DIFFRACTED = 4    # Pdiff / Sdiff along the core-mantle boundary
PHASE_PKPAB = 5         # P turning in the outer core, dDelta/dp > 0
PHASE_PKPBC = 6         # P turning in the outer core, dDelta/dp < 0
PHASE_PKIKP = 7         # P turning in the inner core
PHASE_SKS = 8           # S in the mantle, P turning in the outer core
PHASE_SKIKS = 9         # S in the mantle, P through the outer core, turning in the inner core

PHASE_NAMES = {
    "P": {PHASE_NONE: "", PHASE_DIRECT: "P", PHASE_TURNING: "P", PHASE_HEAD: "P",
          PHASE_DIFFRACTED: "Pdiff", PHASE_PKPAB: "PKPab", PHASE_PKPBC: "PKPbc", PHASE_PKIKP: "PKIKP"},
    "S": {PHASE_NONE: "", PHASE_DIRECT: "S", PHASE_TURNING: "S", PHASE_HEAD: "S",
          PHASE_DIFFRACTED: "Sdiff", PHASE_SKS: "SKS", PHASE_SKIKS: "SKIKS"},
}

#: Branch names accepted by :func:`travel_times`, with the wave they need (None: either).
BRANCHES = {"first": None, "direct": None, "head": None, "diffracted": None, "PKP": "P", "PKPab": "P",
            "PKPbc": "P", "PKIKP": "P", "SKS": "S", "SKIKS": "S"}
_MODES = {"first": 0, "direct": 1, "head": 2, "diffracted": 3, "PKP": 4, "PKPab": 5, "PKPbc": 6,
          "PKIKP": 7, "SKS": 8, "SKIKS": 9}

#: IASPEI phase names accepted by :func:`phase_times` -> (wave, branch).
PHASES = {"P": ("P", "direct"), "S": ("S", "direct"), "Pdiff": ("P", "diffracted"),
          "Sdiff": ("S", "diffracted"), "PKP": ("P", "PKP"), "PKPab": ("P", "PKPab"),
          "PKPbc": ("P", "PKPbc"), "PKIKP": ("P", "PKIKP"), "PKPdf": ("P", "PKIKP"),
          "SKS": ("S", "SKS"), "SKSac": ("S", "SKS"), "SKIKS": ("S", "SKIKS"), "SKSdf": ("S", "SKIKS")}

#: Samples of Delta(p) per turning shell (Chebyshev spacing, plus both ends).
N_SCAN = 24

_NS = N_SCAN + 2

#: Velocity laws inside a shell.
LAWS = ("flat", "r2")
_N_FAMILIES = 5  # turning-ray families: above core, outer core, inner core, S->outer core, S->inner core

_jit = numba.njit(cache=True, error_model="numpy", fastmath=False)


# ============================================================================ radial model
def _as_batch(name, value, n_shells=None):
    arr = np.asarray(value, dtype=float)
    if arr.ndim == 1:
        arr = arr[None, :]
    if arr.ndim != 2:
        raise ValueError(f"{name}: expected shape (shells,) or (models, shells), got {arr.shape}")
    if n_shells is not None and arr.shape[1] != n_shells:
        raise ValueError(f"{name}: expected {n_shells} values per model, got {arr.shape[1]}")
    return arr


@dataclass(frozen=True)
class RadialModel:
    """A batch of radial planet models: concentric shells, surface to centre.

    Build with :meth:`build`, :meth:`from_depths`, :meth:`from_layers` or
    :func:`read_radial_csv`; the constructor does not validate.

    Attributes
    ----------
    radius : (models,) array
        Planet radius R [km] (top of the first shell).
    r_top, r_bottom : (models, shells) arrays
        Top and bottom radius of each shell [km]; shells are contiguous and
        the last may reach the centre (bottom radius 0).
    vp_top, vp_bottom, vs_top, vs_bottom : (models, shells) arrays
        Velocities at the top and bottom of each shell [km/s]; ``vs = 0`` at
        both marks a liquid shell. Between them ``v / r`` is linear in
        ``ln r`` (``1 / v^2`` linear in ``r^2`` in a shell reaching the
        centre, whose bottom value is the velocity at the centre).
    names : tuple of str
        Shell names, shared by the batch.
    law : tuple of str
        Velocity law inside each shell, shared by the batch: ``'r2'``
        (``1 / v^2`` linear in ``r^2``; exact for uniform shells at any
        radius; required for a shell reaching the centre) or ``'flat'``
        (``v / r`` linear in ``ln r``: exactly a linear layer in the
        flattened coordinates, the flat engine's layer; a uniform shell comes
        out faster between its ends, by up to about
        ``v ln(r_top / r_bottom)^2 / 8``: small in crust and mantle, large
        near the centre).
    """

    radius: np.ndarray
    r_top: np.ndarray
    r_bottom: np.ndarray
    vp_top: np.ndarray
    vp_bottom: np.ndarray
    vs_top: np.ndarray
    vs_bottom: np.ndarray
    names: tuple
    law: tuple

    # ------------------------------------------------------------------ constructors
    @classmethod
    def build(cls, r_top, r_bottom, vp_top, vp_bottom, vs_top, vs_bottom, names=None,
              law=None) -> "RadialModel":
        """Validate and broadcast a (batch of) radial model(s) given by radii.

        Parameters
        ----------
        r_top, r_bottom : array (shells,) or (models, shells)
            Top and bottom radius of every shell [km], from the surface down;
            the bottom of shell k must equal the top of shell k+1.
        vp_top, vp_bottom, vs_top, vs_bottom : array (shells,) or (models, shells)
            Velocities at the top and bottom of every shell [km/s]; 0 for S at
            both ends marks a liquid shell.
        names : sequence of str, optional
            One name per shell (default ``shell 1``, ``shell 2``, ...).
        law : sequence of {'flat', 'r2'}, optional
            Velocity law of every shell (default 'r2' for all; a shell
            reaching the centre must use 'r2').

        Raises
        ------
        ValueError
            Naming the field and the shell for non-finite values, shells that
            are not contiguous or have no thickness, velocities <= 0 (P) or
            < 0 (S), half-liquid shells, Vp/Vs not above sqrt(4/3) in solids,
            or an 'r2' shell in which r / v is not monotone (for the centre
            shell: a velocity at its top sqrt(2) times its centre value or
            more).
        """
        arrays = {"r_top": r_top, "r_bottom": r_bottom, "vp_top": vp_top, "vp_bottom": vp_bottom,
                  "vs_top": vs_top, "vs_bottom": vs_bottom}
        first = _as_batch("r_top", r_top)
        n_shells = first.shape[1]
        if n_shells < 1:
            raise ValueError("r_top: a radial model needs at least one shell")
        out = {k: _as_batch(k, v, n_shells) for k, v in arrays.items()}
        n_models = max(a.shape[0] for a in out.values())
        for k, a in out.items():
            if a.shape[0] not in (1, n_models):
                raise ValueError(f"{k}: batch of {a.shape[0]} models does not match {n_models}")
            out[k] = np.ascontiguousarray(np.broadcast_to(a, (n_models, n_shells)), dtype=float).copy()
        if names is None:
            names = tuple(f"shell {i + 1}" for i in range(n_shells))
        names = tuple(str(n) for n in names)
        if len(names) != n_shells:
            raise ValueError(f"names: expected {n_shells} shell names, got {len(names)}")
        if law is None:
            law = ("r2",) * n_shells
        law = tuple(str(v) for v in law)
        if len(law) != n_shells:
            raise ValueError(f"law: expected {n_shells} values, got {len(law)}")
        for j, v in enumerate(law):
            if v not in LAWS:
                raise ValueError(f"law: shell {j + 1} ({names[j]}) has law {v!r}; expected one of {', '.join(LAWS)}")
        # contiguity: bottom of shell k is the top of shell k+1 (tiny rounding is snapped)
        rt, rb = out["r_top"], out["r_bottom"]
        for k, a in out.items():
            bad = ~np.isfinite(a)
            if bad.any():
                m, j = np.argwhere(bad)[0]
                raise ValueError(f"{k}: shell {j + 1} ({names[j]}) is {a[m, j]} (not a finite number)"
                                 + _suffix(m, n_models))
        if n_shells > 1:
            gap = np.abs(rb[:, :-1] - rt[:, 1:])
            bad = gap > 1e-9 * np.maximum(rt[:, :1], 1.0)
            if bad.any():
                m, j = np.argwhere(bad)[0]
                raise ValueError(f"r_bottom: shell {j + 1} ({names[j]}) ends at radius {rb[m, j]:g} km but "
                                 f"shell {j + 2} ({names[j + 1]}) starts at {rt[m, j + 1]:g} km"
                                 + _suffix(m, n_models))
            rt[:, 1:] = rb[:, :-1]
        model = cls(rt[:, 0].copy(), rt, rb, out["vp_top"], out["vp_bottom"], out["vs_top"],
                    out["vs_bottom"], names, law)
        model._validate()
        return model

    @classmethod
    def from_depths(cls, top_depth, bottom_depth, vp_top, vp_bottom, vs_top, vs_bottom, *, radius,
                    names=None, law=None) -> "RadialModel":
        """Same as :meth:`build` with depths below the surface [km] and the radius R [km]."""
        radius = np.asarray(radius, dtype=float)
        if radius.ndim > 1 or not np.all(np.isfinite(radius)) or np.any(radius <= 0):
            raise ValueError(f"radius: expected a positive number (or one per model), got {radius!r}")
        r = radius[:, None] if radius.ndim == 1 else radius
        top = _as_batch("top_depth", top_depth)
        bot = _as_batch("bottom_depth", bottom_depth, top.shape[1])
        if np.any(top[:, 0] != 0.0):
            raise ValueError(f"top_depth: the first shell must start at depth 0, got {top[0, 0]:g} km")
        bad = bot > r + 1e-9 * r
        if bad.any():
            m, j = np.argwhere(bad)[0]
            raise ValueError(f"bottom_depth: shell {j + 1} ends at depth {bot[m, j]:g} km, below the centre "
                             f"(radius {np.broadcast_to(r, bot.shape)[m, j]:g} km)")
        return cls.build(r - top, np.maximum(r - bot, 0.0), vp_top, vp_bottom, vs_top, vs_bottom, names=names,
                         law=law)

    @classmethod
    def from_layers(cls, layers: LayerModel, radius: float, *, below: "RadialModel | None" = None,
                    names=None) -> "RadialModel":
        """Radial model from flat layers (the layer parameterisation with its priors).

        Every layer becomes a shell with the same depth range and the same
        velocities at its top and base (depths below the surface, km and
        km/s). A planet has no half-space: it becomes a shell down to the
        first boundary of ``below`` deeper than its top, with the velocities
        of its linear law there, and the shells of ``below`` follow; without
        ``below`` it fills the planet to the centre as a shell of the centre
        law, with the velocity of its linear law at the centre.

        Parameters
        ----------
        layers : LayerModel
            Batch of flat models [km, km/s]; layer 1 starts at the surface.
        radius : float
            Planet radius R [km]; must equal ``below.radius`` if given.
        below : RadialModel, optional
            One fixed deeper structure (a single model) under the layers.
        names : sequence of str, optional
            Names of the layers and of the half-space shell (default
            ``layer 1``, ..., ``half-space``).

        Returns
        -------
        RadialModel
            One radial model per model of ``layers``.
        """
        radius = float(radius)
        tops = layers.layer_tops  # (M, N+1)
        n = layers.n_layers
        m = layers.n_models
        if not np.all(tops[:, -1] < radius):
            raise ValueError(f"layers: the half-space starts at or below the centre (radius {radius:g} km)")
        vp_base = layers.base_velocity("P")
        vs_base = layers.base_velocity("S")
        if below is not None:
            if below.n_models != 1:
                raise ValueError("below: give one fixed deeper model, not a batch")
            if abs(float(below.radius[0]) - radius) > 1e-9 * radius:
                raise ValueError(f"below: its radius {below.radius[0]:g} km differs from radius {radius:g} km")
            b_depth = radius - below.r_bottom[0]
            hs_top = tops[:, -1]
            start = int(np.searchsorted(b_depth, hs_top.max(), side="right"))
            if start >= below.n_shells:
                raise ValueError("below: the half-space starts below the deepest boundary of the deeper model")
            hs_bottom = np.full(m, b_depth[start])
        else:
            hs_bottom = np.full(m, radius)
        h = hs_bottom - tops[:, -1]
        vp_top = layers.vp
        vs_top = layers.vs
        vp_bot = vp_base.copy()
        vs_bot = vs_base.copy()
        vp_bot[:, -1] = layers.vp[:, -1] + layers.vp_gradient[:, -1] * h
        vs_bot[:, -1] = layers.vs[:, -1] + layers.vs_gradient[:, -1] * h
        if np.any(vp_bot[:, -1] <= 0) or np.any(vs_bot[:, -1] < 0):
            raise ValueError("layers: the half-space velocity law reaches zero above the base of its shell")
        top_d = tops
        bot_d = np.concatenate([tops[:, 1:], hs_bottom[:, None]], axis=1)
        lnames = list(names) if names is not None else [f"layer {i + 1}" for i in range(n - 1)] + ["half-space"]
        if len(lnames) != n:
            raise ValueError(f"names: expected {n} names (layers and half-space), got {len(lnames)}")
        if below is not None:
            rest = below.n_shells - start - 1

            def add(a, b):  # append the deeper model's shells below `start` to every model
                return np.concatenate([a, np.broadcast_to(b[:, start + 1:], (m, rest))], axis=1)

            top_d, bot_d = add(top_d, radius - below.r_top), add(bot_d, radius - below.r_bottom)
            vp_top, vp_bot = add(vp_top, below.vp_top), add(vp_bot, below.vp_bottom)
            vs_top, vs_bot = add(vs_top, below.vs_top), add(vs_bot, below.vs_bottom)
            lnames += list(below.names[start + 1:])
            laws = ["flat"] * n + list(below.law[start + 1:])
        else:
            laws = ["flat"] * (n - 1) + ["r2"]
        return cls.from_depths(top_d, bot_d, vp_top, vp_bot, vs_top, vs_bot, radius=radius, names=lnames,
                               law=laws)

    # ------------------------------------------------------------------ checks
    def _validate(self) -> None:
        n_models = self.n_models
        names = self.names
        if np.any(self.radius <= 0):
            raise ValueError(f"r_top: the planet radius must be positive, got {self.radius.min():g} km")
        bad = ~(self.r_bottom < self.r_top) | (self.r_bottom < 0)
        if bad.any():
            m, j = np.argwhere(bad)[0]
            raise ValueError(f"r_bottom: shell {j + 1} ({names[j]}) has no thickness or a negative radius "
                             f"(top {self.r_top[m, j]:g} km, bottom {self.r_bottom[m, j]:g} km)"
                             + _suffix(m, n_models))
        inner = self.r_bottom[:, :-1] <= 0
        if inner.any():
            m, j = np.argwhere(inner)[0]
            raise ValueError(f"r_bottom: shell {j + 1} ({names[j]}) reaches the centre but is not the last shell"
                             + _suffix(m, n_models))
        for name, arr in (("vp_top", self.vp_top), ("vp_bottom", self.vp_bottom)):
            bad = arr <= 0
            if bad.any():
                m, j = np.argwhere(bad)[0]
                raise ValueError(f"{name}: shell {j + 1} ({names[j]}) has Vp = {arr[m, j]:g} <= 0"
                                 + _suffix(m, n_models))
        for name, arr in (("vs_top", self.vs_top), ("vs_bottom", self.vs_bottom)):
            bad = arr < 0
            if bad.any():
                m, j = np.argwhere(bad)[0]
                raise ValueError(f"{name}: shell {j + 1} ({names[j]}) has Vs = {arr[m, j]:g} < 0"
                                 + _suffix(m, n_models))
        half = (self.vs_top == 0) != (self.vs_bottom == 0)
        if half.any():
            m, j = np.argwhere(half)[0]
            raise ValueError(f"vs_top: shell {j + 1} ({names[j]}) is liquid at one end only; a liquid shell has "
                             "vs = 0 at its top and bottom" + _suffix(m, n_models))
        solid = self.vs_top > 0
        for where, vp, vs in (("top", self.vp_top, self.vs_top), ("bottom", self.vp_bottom, self.vs_bottom)):
            with np.errstate(divide="ignore", invalid="ignore"):
                bad = solid & ~(vp / np.where(solid, vs, 1.0) > MIN_SOLID_VPVS)
            if bad.any():
                m, j = np.argwhere(bad)[0]
                raise ValueError(f"vs_{where}: shell {j + 1} ({names[j]}) has Vp/Vs <= sqrt(4/3) at its {where} "
                                 "(negative bulk modulus)" + _suffix(m, n_models))
        if np.any(self.r_bottom[:, -1] == 0) and self.law[-1] != "r2":
            j = self.n_shells - 1
            raise ValueError(f"law: the centre shell {j + 1} ({names[j]}) must use the 'r2' law")
        r2 = np.array([v == "r2" for v in self.law])[None, :]
        for name, top, bot in (("vp", self.vp_top, self.vp_bottom), ("vs", self.vs_top, self.vs_bottom)):
            ok = r2 & (bot > 0)
            with np.errstate(divide="ignore", invalid="ignore"):
                st, sb = _r2_slopes(self.r_top, self.r_bottom, np.where(ok, top, 1.0), np.where(ok, bot, 1.0))
            bad = ok & ~(((st > 0) & (sb > 0)) | ((st < 0) & (sb < 0)))
            if bad.any():
                m, j = np.argwhere(bad)[0]
                raise ValueError(f"{name}_top: in the 'r2' shell {j + 1} ({names[j]}) r / v is not monotone "
                                 f"({top[m, j]:g} km/s at its top, {bot[m, j]:g} km/s at its bottom); split the "
                                 "shell or use the 'flat' law" + _suffix(m, n_models))

    # ------------------------------------------------------------------ queries
    @property
    def n_models(self) -> int:
        """Number of models in the batch."""
        return self.r_top.shape[0]

    @property
    def n_shells(self) -> int:
        """Number of shells."""
        return self.r_top.shape[1]

    @property
    def top_depth(self) -> np.ndarray:
        """Depth of the top of every shell [km], (models, shells)."""
        return self.radius[:, None] - self.r_top

    @property
    def bottom_depth(self) -> np.ndarray:
        """Depth of the bottom of every shell [km], (models, shells)."""
        return self.radius[:, None] - self.r_bottom

    @property
    def liquid(self) -> np.ndarray:
        """True for liquid shells (vs = 0), (models, shells)."""
        return self.vs_top == 0

    def core(self) -> tuple[np.ndarray, np.ndarray]:
        """0-based index of the first outer-core and first inner-core shell per model (-1 if none).

        The outer core is the deepest run of liquid shells lying under a solid
        shell; the inner core is everything below it.
        """
        return _core_indices(self.liquid)

    def velocity(self, wave: str) -> tuple[np.ndarray, np.ndarray]:
        """Velocities at the top and bottom of every shell for ``wave`` ('P' or 'S') [km/s]."""
        wave = _check_wave(wave)
        return (self.vp_top, self.vp_bottom) if wave == "P" else (self.vs_top, self.vs_bottom)

    def profile(self, depth, wave: str = "P") -> np.ndarray:
        """Velocity [km/s] at depths ``depth`` (D,) [km] for every model, shape (models, D).

        Evaluates the shell law; a depth exactly on a boundary takes the
        velocity of the shell below. Depths above the surface extend the top
        shell's law.
        """
        z = np.asarray(depth, dtype=float)
        top, bot = self.velocity(wave)
        r = self.radius[:, None] - z[None, :]
        if np.any(r < 0):
            raise ValueError("depth: below the centre")
        idx = np.sum(r[:, :, None] <= self.r_bottom[:, None, :], axis=2)  # shell index
        idx = np.minimum(idx, self.n_shells - 1)
        rows = np.arange(self.n_models)[:, None]
        rt, rb = self.r_top[rows, idx], self.r_bottom[rows, idx]
        vt, vb = top[rows, idx], bot[rows, idx]
        out = np.empty(r.shape)
        r2 = np.array([v == "r2" for v in self.law])[idx]
        with np.errstate(divide="ignore", invalid="ignore"):
            zt = vt / rt
            zb = vb / np.where(r2, 1.0, rb)
            frac = np.log(rt / r) / np.log(rt / np.where(r2, 1.0, rb))
            lin = r * (zt + (zb - zt) * frac)
            a, b = _r2_coefficients(rt, rb, vt, vb)
            cen = 1.0 / np.sqrt(a + b * r ** 2)
        out[:] = np.where(r2, cen, lin)
        out[(vt == 0) & (vb == 0)] = 0.0
        return out

    def take(self, index) -> "RadialModel":
        """Models selected by ``index`` along the batch axis (kept 2-D)."""
        idx = np.atleast_1d(np.arange(self.n_models)[index])
        return RadialModel(self.radius[idx], self.r_top[idx], self.r_bottom[idx], self.vp_top[idx],
                           self.vp_bottom[idx], self.vs_top[idx], self.vs_bottom[idx], self.names, self.law)


def _r2_coefficients(rt, rb, vt, vb):
    """A, B of the 'r2' law 1 / v^2 = A + B r^2 through (rt, vt) and (rb, vb) (arrays)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        b = (1.0 / vt ** 2 - 1.0 / vb ** 2) / ((rt - rb) * (rt + rb))
        a = 1.0 / vb ** 2 - b * rb ** 2
    return a, b


def _r2_slopes(rt, rb, vt, vb):
    """d(r^2 / v^2) / d(r^2) = A + 2 B r^2 at the top and bottom of an 'r2' shell."""
    a, b = _r2_coefficients(rt, rb, vt, vb)
    return a + 2.0 * b * rt ** 2, a + 2.0 * b * rb ** 2


def _suffix(m: int, n_models: int) -> str:
    return f" (model {m} of the batch)" if n_models > 1 else ""


def _core_indices(liquid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    m, s = liquid.shape
    cmb = np.full(m, -1, dtype=np.int64)
    icb = np.full(m, -1, dtype=np.int64)
    for i in range(m):
        liq = np.flatnonzero(liquid[i])
        if liq.size == 0:
            continue
        last = liq[-1]
        first = last
        while first - 1 >= 0 and liquid[i, first - 1]:
            first -= 1
        if first == 0:
            continue  # liquid from the surface down (an ocean): no solid above, not a core
        cmb[i] = first
        icb[i] = last + 1 if last + 1 < s else -1
    return cmb, icb


# ============================================================================ CSV
_CSV_VEL = ("vp_top_km_s", "vp_bottom_km_s", "vs_top_km_s", "vs_bottom_km_s")
_CSV_DEPTH = ("top_depth_km", "bottom_depth_km")
_CSV_RADIUS = ("top_radius_km", "bottom_radius_km")


def read_radial_csv(path, radius: float | None = None) -> RadialModel:
    """Read a radial model from our CSV layout (one row per shell, surface first).

    Columns (header row; lines starting with ``#`` are comments)::

        shell, top_depth_km, bottom_depth_km, vp_top_km_s, vp_bottom_km_s, vs_top_km_s, vs_bottom_km_s

    or ``top_radius_km, bottom_radius_km`` instead of the depth columns, and
    optionally ``law`` (``r2`` or ``flat``, see :class:`RadialModel`; empty
    or missing: ``r2``). ``vs = 0`` at both ends marks a liquid shell.
    Velocities at the bottom of a shell reaching the centre are the values at
    the centre.

    Parameters
    ----------
    path : str or path
        The CSV file.
    radius : float, optional
        Planet radius [km]. With depth columns it defaults to the bottom depth
        of the last shell (the model must then reach the centre); with radius
        columns it is the top radius of the first shell.

    Returns
    -------
    RadialModel
        A single model.

    Raises
    ------
    invert.data.DataError
        Naming file, line and column for any problem.
    """
    path = os.fspath(path)
    try:
        with open(path, encoding="utf-8", newline="") as fh:
            text = fh.read()
    except UnicodeDecodeError as exc:
        raise DataError(path, None, None, f"not UTF-8 text ({exc.reason})") from None
    lines = [(i + 1, ln) for i, ln in enumerate(text.splitlines()) if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise DataError(path, None, None, "no header row and no shells")
    hdr_line, hdr = lines[0]
    header = [h.strip() for h in next(csv.reader(io.StringIO(hdr)))]
    if "top_depth_km" in header or "bottom_depth_km" in header:
        geo = _CSV_DEPTH
    elif "top_radius_km" in header or "bottom_radius_km" in header:
        geo = _CSV_RADIUS
    else:
        raise DataError(path, hdr_line, None, "header needs top_depth_km and bottom_depth_km (or top_radius_km "
                                              "and bottom_radius_km)")
    required = ("shell",) + geo + _CSV_VEL
    for col in required:
        if col not in header:
            raise DataError(path, hdr_line, col, f"missing column (required: {', '.join(required)})")
    extra = [h for h in header if h not in required + ("law",)]
    if extra:
        raise DataError(path, hdr_line, extra[0], f"unknown column (expected: {', '.join(required)})")
    if len(set(header)) != len(header):
        raise DataError(path, hdr_line, None, "a column name appears twice")
    rows = []
    for lineno, ln in lines[1:]:
        cells = [c.strip() for c in next(csv.reader(io.StringIO(ln)))]
        if len(cells) != len(header):
            raise DataError(path, lineno, None, f"expected {len(header)} cells, got {len(cells)}")
        row = dict(zip(header, cells))
        vals = {}
        for col in geo + _CSV_VEL:
            try:
                v = float(row[col])
            except ValueError:
                raise DataError(path, lineno, col, f"not a number: {row[col]!r}") from None
            if not math.isfinite(v):
                raise DataError(path, lineno, col, f"not a finite number: {row[col]!r}")
            vals[col] = v
        if not row["shell"]:
            raise DataError(path, lineno, "shell", "empty shell name")
        law = row.get("law", "")
        if law and law not in LAWS:
            raise DataError(path, lineno, "law", f"unknown law {law!r} (expected {' or '.join(LAWS)})")
        rows.append((lineno, row["shell"], vals, law))
    if not rows:
        raise DataError(path, None, None, "no shells")
    for (l0, n0, v0, _), (l1, n1, v1, _) in zip(rows[:-1], rows[1:]):
        if v0[geo[1]] != v1[geo[0]]:
            raise DataError(path, l1, geo[0], f"shell {n1!r} starts at {v1[geo[0]]:g} km but the shell above "
                                              f"({n0!r}, line {l0}) ends at {v0[geo[1]]:g} km")
    for lineno, name, v, _ in rows:
        thick = v[geo[1]] - v[geo[0]] if geo is _CSV_DEPTH else v[geo[0]] - v[geo[1]]
        if not thick > 0:
            raise DataError(path, lineno, geo[1], f"shell {name!r} has no thickness")
        for col in _CSV_VEL:
            if v[col] < 0 or (col.startswith("vp") and v[col] == 0):
                raise DataError(path, lineno, col, f"velocity {v[col]:g} km/s is not allowed")
        if (v["vs_top_km_s"] == 0) != (v["vs_bottom_km_s"] == 0):
            raise DataError(path, lineno, "vs_bottom_km_s", "a liquid shell has vs = 0 at its top and bottom")
    names = [r[1] for r in rows]
    col = {c: np.array([r[2][c] for r in rows]) for c in geo + _CSV_VEL}
    if geo is _CSV_DEPTH:
        if col["top_depth_km"][0] != 0:
            raise DataError(path, rows[0][0], "top_depth_km", "the first shell must start at depth 0")
        if radius is None:
            radius = float(col["bottom_depth_km"][-1])
        if col["bottom_depth_km"][-1] > radius:
            raise DataError(path, rows[-1][0], "bottom_depth_km", f"below the centre (radius {radius:g} km)")
        rt = radius - col["top_depth_km"]
        rb = radius - col["bottom_depth_km"]
    else:
        rt, rb = col["top_radius_km"], col["bottom_radius_km"]
        if radius is not None and radius != rt[0]:
            raise DataError(path, rows[0][0], "top_radius_km", f"differs from the given radius {radius:g} km")
        if rb[-1] < 0:
            raise DataError(path, rows[-1][0], "bottom_radius_km", "negative radius")
    laws = [r[3] or "r2" for r in rows]
    try:
        return RadialModel.build(rt, rb, col["vp_top_km_s"], col["vp_bottom_km_s"], col["vs_top_km_s"],
                                 col["vs_bottom_km_s"], names=names, law=laws)
    except ValueError as exc:
        msg = str(exc)
        line = None
        for i, name in enumerate(names):
            if f"shell {i + 1} ({name})" in msg:
                line = rows[i][0]
                break
        raise DataError(path, line, None, msg) from None


def write_radial_csv(model: RadialModel, path, *, index: int = 0, columns: str = "depth") -> None:
    """Write model ``index`` of a batch in the layout read by :func:`read_radial_csv`.

    ``columns`` is 'depth' (depth columns) or 'radius'. Values are written
    with 17 significant digits, so a file read back gives the same model.
    """
    if columns not in ("depth", "radius"):
        raise ValueError(f"columns: expected 'depth' or 'radius', got {columns!r}")
    m = int(index)
    geo = _CSV_DEPTH if columns == "depth" else _CSV_RADIUS
    a = (model.top_depth[m], model.bottom_depth[m]) if columns == "depth" else (model.r_top[m], model.r_bottom[m])
    with open(path, "w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        fh.write(f"# radial model, radius {model.radius[m]:.17g} km; velocities in km/s\n")
        w.writerow(("shell",) + geo + _CSV_VEL + ("law",))
        for j in range(model.n_shells):
            vals = (a[0][j], a[1][j], model.vp_top[m, j], model.vp_bottom[m, j], model.vs_top[m, j],
                    model.vs_bottom[m, j])
            w.writerow([model.names[j]] + [f"{v:.17g}" for v in vals] + [model.law[j]])


# ============================================================================ compiled core
@_jit
def _q(v, vref, qref2):
    """sqrt(1 - p^2 v^2) with p = sqrt(1 - qref2) / vref, accurate near grazing."""
    r = v / vref
    a = (1.0 - r) * (1.0 + r) + r * r * qref2
    if a < 0.0:
        return np.nan
    return np.sqrt(a)


@_jit
def _seg(p, va, vb, h, qa, qb):
    """Delta, T, dDelta/dp through a flattened-linear piece zeta = va -> vb over h = ln(r_a / r_b)."""
    s = qa + qb
    xs = h * (va + vb) / s
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
def _r2_one(p, vref, qref2, w, a, b):
    """Delta, T, dDelta/dp from the turning point up to radius sqrt(w) in an 'r2' shell.

    The shell has 1 / v^2 = a + b r^2; the turning point is the root
    w_t = 2 p^2 / (a + D) of Q = w (a + b w) - p^2, whether or not it lies
    inside the shell (a crossing takes the difference of two ends). Returns
    nan where Q < 0 (the ray cannot reach radius sqrt(w)).
    """
    eta2 = w * (a + b * w)  # (r / v)^2
    zeta = 1.0 / np.sqrt(eta2)
    q = _q(zeta, vref, qref2)
    if np.isnan(q):
        return np.nan, np.nan, np.nan
    sq = np.sqrt(eta2) * q  # sqrt(Q), Q = eta^2 - p^2
    qq = sq * sq
    p2 = p * p
    dd = np.sqrt(a * a + 4.0 * b * p2)
    dw = 2.0 * qq / (a + dd + 2.0 * b * w)  # w - w_turn, without cancellation
    x = 0.5 * np.arctan2(2.0 * p * sq, 2.0 * p2 - a * w)
    if b > 0.0:
        k = np.sqrt(b)
        y = k * dw + sq
        eps = 2.0 * k * y / dd
        integral = 2.0 * y / dd * (np.log1p(eps) / eps if eps > 1e-300 else 1.0)
    elif b < 0.0:
        k = np.sqrt(-b)
        s = k * np.sqrt(dw / dd)
        integral = 2.0 * np.sqrt(dw / dd) * (np.arcsin(s) / s if s > 1e-300 else 1.0)
    else:
        integral = 2.0 * sq / a
    t = 0.5 * (sq + 0.5 * a * integral)
    if sq > 0.0:
        dxdp = -(a * a + a * b * w + 2.0 * b * p2) / (sq * dd * dd)
    else:
        dxdp = -np.inf
    return x, t, dxdp


@_jit
def _sum(p, vref, qref2, n, pk, pa, pb, ph, pw, pA, pB):
    """Weighted Delta, T, dDelta/dp over pieces 0..n-1 (nan if the ray cannot pass)."""
    xs = 0.0
    ts = 0.0
    ds = 0.0
    for i in range(n):
        if pk[i] == 0:
            if ph[i] <= 0.0:
                continue
            qa = _q(pa[i], vref, qref2)
            qb = _q(pb[i], vref, qref2)
            x, t, d = _seg(p, pa[i], pb[i], ph[i], qa, qb)
        else:
            x1, t1, d1 = _r2_one(p, vref, qref2, pa[i], pA[i], pB[i])
            x2, t2, d2 = _r2_one(p, vref, qref2, pb[i], pA[i], pB[i])
            x = x1 - x2
            t = t1 - t2
            d = d1 - d2
        xs += pw[i] * x
        ts += pw[i] * t
        ds += pw[i] * d
    return xs, ts, ds


@_jit
def _ray(qr, vref, n, pk, pa, pb, ph, pw, pA, pB, idx):
    """Delta, T, dDelta/dqr of a ray turning in piece ``idx`` after pieces 0..n-1 (weight 2 turn).

    The ray is labelled by its vertical cosine ``qr`` at ``vref`` (the largest
    zeta above the turning point): p = sqrt(1 - qr^2) / vref.
    """
    sp = np.sqrt((1.0 - qr) * (1.0 + qr))
    p = sp / vref
    qr2 = qr * qr
    xs, ts, ds = _sum(p, vref, qr2, n, pk, pa, pb, ph, pw, pA, pB)
    if pk[idx] == 0:
        za = pa[idx]
        g = (pb[idx] - za) / ph[idx]
        r = za / vref
        qa = np.sqrt((1.0 - r) * (1.0 + r) + r * r * qr2)
        pv = r * sp
        xt = qa / (p * g)
        tt = np.log1p((qa + qa * qa / (1.0 + pv)) / pv) / g
        dt = -1.0 / (qa * p * p * g)
    else:
        xt, tt, dt = _r2_one(p, vref, qr2, pa[idx], pA[idx], pB[idx])
    x = xs + 2.0 * xt
    t = ts + 2.0 * tt
    dxdp = ds + 2.0 * dt
    if p > 0.0:
        dxdq = dxdp * (-qr / (vref * vref * p))
    else:
        dxdq = np.nan
    return x, t, dxdq


@_jit
def _polish(x, qlo, flo, qhi, fhi, vref, n, pk, pa, pb, ph, pw, pA, pB, idx):
    """Root of Delta(qr) = x in the bracket [qlo, qhi]; returns (p, T, dDelta/dqr)."""
    q = 0.5 * (qlo + qhi)
    for _ in range(200):
        xs, ts, ds = _ray(q, vref, n, pk, pa, pb, ph, pw, pA, pB, idx)
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
    xs, ts, ds = _ray(q, vref, n, pk, pa, pb, ph, pw, pA, pB, idx)
    p = np.sqrt((1.0 - q) * (1.0 + q)) / vref
    t = ts + p * (x - xs)  # stationary in p: second-order accurate
    # one Newton step in p itself (qr resolves p poorly as p -> 0, near the antipode)
    dxdp = ds * (-(vref * vref * p) / q) if q > 0.0 else np.nan
    step = (x - xs) / dxdp
    if np.isfinite(step) and abs(step) < 1e-6 * p:
        p += step
    return p, t, ds


@_jit
def _extremum(qlo, dlo, qhi, vref, n, pk, pa, pb, ph, pw, pA, pB, idx):
    """qr where dDelta/dqr changes sign between qlo and qhi (bisection)."""
    for _ in range(60):
        qm = 0.5 * (qlo + qhi)
        xs, ts, dm = _ray(qm, vref, n, pk, pa, pb, ph, pw, pA, pB, idx)
        if (dm > 0.0) == (dlo > 0.0):
            qlo = qm
            dlo = dm
        else:
            qhi = qm
    return 0.5 * (qlo + qhi)


@_jit
def _solve_up(x, vmax, n, pk, pa, pb, ph, pw, pA, pB):
    """Ray from the deeper end straight up (Delta increasing in p): returns (p, T); p = nan if none.

    Newton iterations in u = tan(angle at the largest zeta) with a bracket.
    """
    if x == 0.0:
        xs, ts, ds = _sum(0.0, 1.0, 1.0, n, pk, pa, pb, ph, pw, pA, pB)
        return 0.0, ts
    vref = vmax
    xc, tc, dc = _sum(1.0 / vmax, vref, 0.0, n, pk, pa, pb, ph, pw, pA, pB)
    if not (x <= xc) and not np.isinf(xc):
        return np.nan, np.inf
    if x == xc:
        return 1.0 / vmax, tc
    length = 0.0
    for i in range(n):
        length += pw[i] * ph[i]
    u = x / length
    lo = 0.0
    hi = np.inf
    for _ in range(200):
        qm2 = 1.0 / (1.0 + u * u)
        p = np.sqrt(1.0 - qm2) / vref
        xs, ts, ds = _sum(p, vref, qm2, n, pk, pa, pb, ph, pw, pA, pB)
        f = xs - x
        if f > 0.0:
            hi = u
        else:
            lo = u
        if abs(f) <= 1e-14 * x:
            break
        dpdu = qm2 * np.sqrt(qm2) / vref
        un = u - f / (ds * dpdu)
        if not (un > lo and un < hi):
            un = 0.5 * (lo + hi) if np.isfinite(hi) else 2.0 * u + 1.0
        if abs(un - u) <= 1e-15 * u:
            u = un
            break
        u = un
    qm2 = 1.0 / (1.0 + u * u)
    p = np.sqrt(1.0 - qm2) / vref
    xs, ts, ds = _sum(p, vref, qm2, n, pk, pa, pb, ph, pw, pA, pB)
    return p, ts + p * (x - xs)


@_jit
def _zeta_at(i, r, rt, rb, zt, zb):
    """zeta = v / r at radius r inside ordinary shell i."""
    if zt[i] <= 0.0:
        return 0.0
    return zt[i] + (zb[i] - zt[i]) * np.log(rt[i] / r) / np.log(rt[i] / rb[i])


@_jit
def _wzeta(w, a, b):
    """zeta = v / r at w = r^2 in an 'r2' shell (1 / v^2 = a + b w); 0 where the wave cannot exist."""
    if not np.isfinite(a):
        return 0.0
    if w <= 0.0:
        return np.inf
    return 1.0 / np.sqrt(w * (a + b * w))


@_jit
def _piece_ends(k, a, b, pa_, pb_):
    """zeta at the top and bottom of a piece."""
    if k == 0:
        return a, b
    return _wzeta(a, pa_, pb_), _wzeta(b, pa_, pb_)


@_jit
def _fill(r1, r2, l1, l2, last, law, rt, rb, zt, zb, aa, bb,
          pk, pa, pb, ph, pw, pA, pB, prad, vmx):
    """Pieces from r1 down to r2 (weight 1), then from r2 to the base of shell ``last`` (weight 2).

    r1 >= r2 are the ends' radii in shells l1 <= l2. A 'flat' piece stores
    zeta at its ends (kind 0), an 'r2' piece the squared radii of its ends
    (kind 1; 0 at the centre). Returns (n_u, n). Running maximum of zeta in
    ``vmx`` (inf once a piece is blocked).
    """
    n = 0
    if r1 > r2:
        for i in range(l1, l2 + 1):
            a = r1 if i == l1 else rt[i]
            b = r2 if i == l2 else rb[i]
            if not (b < a):
                continue
            prad[n] = a
            pw[n] = 1.0
            pA[n] = aa[i]
            pB[n] = bb[i]
            if law[i] == 0:
                pk[n] = 0
                pa[n] = _zeta_at(i, a, rt, rb, zt, zb)
                pb[n] = _zeta_at(i, b, rt, rb, zt, zb)
                ph[n] = np.log1p((a - b) / b)
            else:
                pk[n] = 1
                pa[n] = a * a
                pb[n] = b * b
                ph[n] = 0.5 * np.log(a * a / (b * b))
            n += 1
    n_u = n
    for i in range(l2, last + 1):
        a = r2 if i == l2 else rt[i]
        prad[n] = a
        pw[n] = 2.0
        pA[n] = aa[i]
        pB[n] = bb[i]
        if law[i] == 0:
            pk[n] = 0
            pa[n] = _zeta_at(i, a, rt, rb, zt, zb)
            pb[n] = zb[i] if zt[i] > 0.0 else 0.0
            ph[n] = np.log1p((a - rb[i]) / rb[i])
        else:
            pk[n] = 1
            pa[n] = a * a
            pb[n] = rb[i] * rb[i]
            ph[n] = np.log(a / rb[i]) if rb[i] > 0.0 else np.inf
        n += 1
    run = 0.0
    for i in range(n):
        za, zb_ = _piece_ends(pk[i], pa[i], pb[i], pA[i], pB[i])
        if za <= 0.0 or zb_ <= 0.0:
            run = np.inf  # S in a liquid shell
        run = max(run, za)
        if np.isfinite(zb_):  # the centre itself does not count
            run = max(run, zb_)
        vmx[i] = run
    return n_u, n


@_jit
def _kernel(radius, rt, rb, law, wzt, wzb, wA, wB, czt, czb, cA, cB, cmb, icb,
            delta, rsrc, rrec, order, mode, kwant, wave_p, dmax):
    nm, ns = rt.shape
    npk = delta.shape[1]
    gx = delta.shape[0] > 1
    time = np.full((nm, npk), np.inf)
    pout = np.full((nm, npk), np.nan)
    code = np.zeros((nm, npk), dtype=np.int8)
    iface = np.zeros((nm, npk), dtype=np.int16)
    deep = np.full((nm, npk), np.nan)
    nmax = 2 * ns + 2
    # piece lists: 0 = the wave everywhere, 1 = the wave above the core and P below (SKS family)
    pk = np.zeros((2, nmax), dtype=np.int64)
    pa = np.zeros((2, nmax))
    pb = np.zeros((2, nmax))
    ph = np.zeros((2, nmax))
    pw = np.zeros((2, nmax))
    pA = np.zeros((2, nmax))
    pB = np.zeros((2, nmax))
    prad = np.zeros((2, nmax))
    vmx = np.zeros((2, nmax))
    n_list = np.zeros(2, dtype=np.int64)
    # turning candidates per family and piece
    c_ok = np.zeros((_N_FAMILIES, nmax), dtype=np.bool_)
    c_vref = np.zeros((_N_FAMILIES, nmax))
    c_qtop = np.zeros((_N_FAMILIES, nmax))
    c_tau0 = np.zeros((_N_FAMILIES, nmax))
    c_plo = np.zeros((_N_FAMILIES, nmax))
    c_ready = np.zeros((_N_FAMILIES, nmax), dtype=np.bool_)
    tq = np.zeros((_N_FAMILIES, nmax, _NS))
    tx = np.zeros((_N_FAMILIES, nmax, _NS))
    tt = np.zeros((_N_FAMILIES, nmax, _NS))
    td = np.zeros((_N_FAMILIES, nmax, _NS))
    ttau = np.zeros((_N_FAMILIES, nmax, _NS))
    # head waves (per shell above the boundary) and the diffracted wave
    h_ok = np.zeros(nmax, dtype=np.bool_)
    h_x = np.zeros(nmax)
    h_t = np.zeros(nmax)
    h_p = np.zeros(nmax)
    cand_f = np.zeros(_N_FAMILIES * nmax, dtype=np.int64)
    cand_i = np.zeros(_N_FAMILIES * nmax, dtype=np.int64)
    cand_b = np.zeros(_N_FAMILIES * nmax)
    r_p = np.zeros(2)  # up to two roots per sampling interval
    r_t = np.zeros(2)
    r_d = np.zeros(2)
    # families used by this mode
    use = np.zeros(_N_FAMILIES, dtype=np.bool_)
    if mode == 0:
        use[0] = True
        if wave_p:
            use[1] = True
            use[2] = True
    elif mode == 1 or mode == 2:  # head: rays diving beneath a refractor whose v / r rises
        use[0] = True
    elif mode >= 4 and mode <= 6:
        use[1] = True
    elif mode == 7:
        use[2] = True
    elif mode == 8:
        use[3] = True
    elif mode == 9:
        use[4] = True
    for m in range(nm):
        g = m if gx else 0
        R = radius[m]
        ncmb = cmb[m]
        nicb = icb[m]
        last_d = ncmb - 1 if ncmb >= 0 else ns - 1
        prev_r1 = -1.0
        prev_r2 = -1.0
        valid = False
        l2 = 0
        n_u = 0
        d_ok = False
        d_x = 0.0
        d_t = 0.0
        d_p = 0.0
        for jj in range(npk):
            j = order[g, jj]
            rs = rsrc[g, j]
            rr = rrec[g, j]
            r1 = max(rs, rr)
            r2 = min(rs, rr)
            if r1 != prev_r1 or r2 != prev_r2:
                # ------------------------------------------------ new pair of ends: set up
                prev_r1 = r1
                prev_r2 = r2
                l1 = 0
                while l1 + 1 < ns and r1 <= rb[m, l1]:
                    l1 += 1
                l2 = l1
                while l2 + 1 < ns and r2 <= rb[m, l2]:
                    l2 += 1
                valid = not (ncmb >= 0 and l2 >= ncmb)
                for f in range(_N_FAMILIES):
                    for i in range(nmax):
                        c_ok[f, i] = False
                        c_ready[f, i] = False
                d_ok = False
                if not valid:
                    continue
                last_all = ns - 1
                n_u, n0 = _fill(r1, r2, l1, l2, last_all, law, rt[m], rb[m], wzt[m], wzb[m], wA[m], wB[m],
                                pk[0], pa[0], pb[0], ph[0], pw[0], pA[0], pB[0], prad[0], vmx[0])
                n_list[0] = n0
                if use[3] or use[4]:
                    _, n1 = _fill(r1, r2, l1, l2, last_all, law, rt[m], rb[m], czt[m], czb[m], cA[m], cB[m],
                                    pk[1], pa[1], pb[1], ph[1], pw[1], pA[1], pB[1], prad[1], vmx[1])
                    n_list[1] = n1
                # turning candidates
                for f in range(_N_FAMILIES):
                    if not use[f]:
                        continue
                    lst = 0 if f < 3 else 1
                    if f == 0:
                        s_lo = l2
                        s_hi = last_d
                    elif f == 1 or f == 3:
                        if ncmb < 0:
                            continue
                        s_lo = ncmb
                        s_hi = nicb - 1 if nicb >= 0 else ns - 1
                    else:
                        if nicb < 0:
                            continue
                        s_lo = nicb
                        s_hi = ns - 1
                    for sh in range(s_lo, s_hi + 1):
                        if mode == 2 and (sh != kwant + 1 or kwant < l2):
                            continue
                        idx = n_u + (sh - l2)
                        vabove = vmx[lst, idx - 1] if idx > 0 else 0.0
                        if not np.isfinite(vabove):
                            break
                        za, vend = _piece_ends(pk[lst, idx], pa[lst, idx], pb[lst, idx], pA[lst, idx],
                                               pB[lst, idx])
                        if not (vend > za) or za <= 0.0 or vabove >= vend:
                            continue
                        vref = max(za, vabove)
                        if np.isfinite(vend):
                            rr_ = vref / vend
                            qtop = np.sqrt((1.0 - rr_) * (1.0 + rr_))
                        else:
                            qtop = 1.0  # down to p = 0: through the centre
                        xs0, ts0, ds0 = _ray(0.0, vref, idx, pk[lst], pa[lst], pb[lst], ph[lst], pw[lst],
                                             pA[lst], pB[lst], idx)
                        tau0 = ts0 - xs0 / vref
                        if not np.isfinite(tau0):
                            tau0 = 0.0
                        c_ok[f, idx] = True
                        c_vref[f, idx] = vref
                        c_qtop[f, idx] = qtop
                        c_tau0[f, idx] = tau0
                        c_plo[f, idx] = np.sqrt((1.0 - qtop) * (1.0 + qtop)) / vref
                # head waves along boundaries above the core (below the deeper end)
                for i in range(nmax):
                    h_ok[i] = False
                if mode == 0 or mode == 2:
                    for sh in range(l2, last_d):
                        idx = n_u + (sh - l2)
                        nxt = idx + 1
                        vh, vhb = _piece_ends(pk[0, nxt], pa[0, nxt], pb[0, nxt], pA[0, nxt], pB[0, nxt])
                        if vhb > vh:
                            continue
                        if not (vh > vmx[0, idx]) or not np.isfinite(vmx[0, idx]):
                            continue
                        q2 = (1.0 - vmx[0, idx] / vh) * (1.0 + vmx[0, idx] / vh)
                        xc, tc, dc = _sum(1.0 / vh, vmx[0, idx], q2, idx + 1, pk[0], pa[0], pb[0], ph[0], pw[0],
                                          pA[0], pB[0])
                        if np.isfinite(xc) and np.isfinite(tc):
                            h_ok[sh] = True
                            h_x[sh] = xc
                            h_t[sh] = tc
                            h_p[sh] = 1.0 / vh
                # diffracted along the core-mantle boundary
                if (mode == 0 or mode == 3) and ncmb >= 1 and l2 <= ncmb - 1:
                    idx = n_u + (ncmb - 1 - l2)
                    zg = _piece_ends(pk[0, idx], pa[0, idx], pb[0, idx], pA[0, idx], pB[0, idx])[1]
                    if zg > 0.0 and np.isfinite(vmx[0, idx]) and zg >= vmx[0, idx]:
                        xc, tc, dc = _sum(1.0 / zg, zg, 0.0, idx + 1, pk[0], pa[0], pb[0], ph[0], pw[0],
                                          pA[0], pB[0])
                        if np.isfinite(xc) and np.isfinite(tc):
                            d_ok = True
                            d_x = xc
                            d_t = tc
                            d_p = 1.0 / zg
            if not valid:
                continue
            # ---------------------------------------------------- one pick
            x = delta[g, j]
            best_t = np.inf
            best_p = np.nan
            best_c = 0
            best_k = 0
            best_r = np.nan
            if mode == 0 or mode == 2:
                for sh in range(l2, last_d):
                    if not h_ok[sh] or (mode == 2 and sh != kwant):
                        continue
                    if x >= h_x[sh]:
                        t = h_t[sh] + h_p[sh] * (x - h_x[sh])
                        if t < best_t:
                            best_t = t
                            best_p = h_p[sh]
                            best_c = 3
                            best_k = sh + 1
                            best_r = rb[m, sh]
            if (mode == 0 or mode == 3) and d_ok and x >= d_x and x - d_x <= dmax:
                t = d_t + d_p * (x - d_x)
                if t < best_t:
                    best_t = t
                    best_p = d_p
                    best_c = 4
                    best_k = ncmb
                    best_r = rt[m, ncmb]
            if mode == 0 or mode == 1:
                if n_u == 0:
                    if x == 0.0:
                        best_t = 0.0
                        best_p = 0.0
                        best_c = 1
                        best_k = 0
                        best_r = r2
                else:
                    vmax_u = vmx[0, n_u - 1]
                    if np.isfinite(vmax_u):
                        p, t = _solve_up(x, vmax_u, n_u, pk[0], pa[0], pb[0], ph[0], pw[0], pA[0], pB[0])
                        if t < best_t:
                            best_t = t
                            best_p = p
                            best_c = 1
                            best_k = 0
                            best_r = r2
            # turning rays: candidates ordered by a lower bound on their time
            nc = 0
            for f in range(_N_FAMILIES):
                if not use[f]:
                    continue
                for idx in range(n_list[0 if f < 3 else 1]):
                    if c_ok[f, idx]:
                        cand_f[nc] = f
                        cand_i[nc] = idx
                        cand_b[nc] = c_tau0[f, idx] + c_plo[f, idx] * x
                        nc += 1
            for _ in range(nc):
                ib = -1
                lowest = best_t
                for c in range(nc):
                    if cand_b[c] < lowest:
                        lowest = cand_b[c]
                        ib = c
                if ib < 0:
                    break
                cand_b[ib] = np.inf
                f = cand_f[ib]
                idx = cand_i[ib]
                lst = 0 if f < 3 else 1
                vref = c_vref[f, idx]
                if not c_ready[f, idx]:
                    qtop = c_qtop[f, idx]
                    for i in range(_NS):
                        if i == 0:
                            s = 0.0
                        elif i == _NS - 1:
                            s = 1.0
                        else:
                            s = 0.5 * (1.0 - np.cos(np.pi * (i - 0.5) / N_SCAN))
                        qi = qtop * s
                        xs, ts, ds = _ray(qi, vref, idx, pk[lst], pa[lst], pb[lst], ph[lst], pw[lst], pA[lst],
                                          pB[lst], idx)
                        pi_ = np.sqrt((1.0 - qi) * (1.0 + qi)) / vref
                        tq[f, idx, i] = qi
                        tx[f, idx, i] = xs if np.isfinite(xs) else np.inf
                        tt[f, idx, i] = ts
                        td[f, idx, i] = ds
                        ttau[f, idx, i] = ts - pi_ * xs
                    c_ready[f, idx] = True
                # targets: the minor arc and the major arc (rays beyond the antipode)
                for target_k in range(2):
                    xt_ = x if target_k == 0 else 2.0 * np.pi - x
                    if target_k == 1 and xt_ == x:
                        continue
                    for i in range(_NS - 1):
                        f0 = tx[f, idx, i] - xt_
                        f1 = tx[f, idx, i + 1] - xt_
                        p1 = np.sqrt((1.0 - tq[f, idx, i + 1]) * (1.0 + tq[f, idx, i + 1])) / vref
                        if np.isfinite(ttau[f, idx, i]) and ttau[f, idx, i] + p1 * xt_ >= best_t:
                            continue
                        nroot = 0
                        if f0 == 0.0 or (f1 == 0.0 and i == _NS - 2):
                            e = i if f0 == 0.0 else i + 1
                            r_p[0] = np.sqrt((1.0 - tq[f, idx, e]) * (1.0 + tq[f, idx, e])) / vref
                            r_t[0] = tt[f, idx, e]
                            r_d[0] = td[f, idx, e]
                            nroot = 1
                        elif (f0 > 0.0) != (f1 > 0.0):
                            p, t, d = _polish(xt_, tq[f, idx, i], f0, tq[f, idx, i + 1], f1, vref, idx, pk[lst],
                                              pa[lst], pb[lst], ph[lst], pw[lst], pA[lst], pB[lst], idx)
                            r_p[0] = p
                            r_t[0] = t
                            r_d[0] = d if np.isfinite(d) else f1 - f0
                            nroot = 1
                        elif np.isfinite(td[f, idx, i]) and np.isfinite(td[f, idx, i + 1]) and \
                                (td[f, idx, i] > 0.0) != (td[f, idx, i + 1] > 0.0):
                            qe = _extremum(tq[f, idx, i], td[f, idx, i], tq[f, idx, i + 1], vref, idx, pk[lst],
                                           pa[lst], pb[lst], ph[lst], pw[lst], pA[lst], pB[lst], idx)
                            xe, te, de = _ray(qe, vref, idx, pk[lst], pa[lst], pb[lst], ph[lst], pw[lst], pA[lst],
                                              pB[lst], idx)
                            fe = xe - xt_
                            if (fe > 0.0) != (f0 > 0.0):
                                p, t, d = _polish(xt_, tq[f, idx, i], f0, qe, fe, vref, idx, pk[lst], pa[lst],
                                                  pb[lst], ph[lst], pw[lst], pA[lst], pB[lst], idx)
                                r_p[0] = p
                                r_t[0] = t
                                r_d[0] = fe - f0
                                p, t, d = _polish(xt_, qe, fe, tq[f, idx, i + 1], f1, vref, idx, pk[lst], pa[lst],
                                                  pb[lst], ph[lst], pw[lst], pA[lst], pB[lst], idx)
                                r_p[1] = p
                                r_t[1] = t
                                r_d[1] = f1 - fe
                                nroot = 2
                        for k in range(nroot):
                            t = r_t[k]
                            if not (t < best_t):
                                continue
                            # dDelta/dqr > 0 <=> dDelta/dp < 0
                            if f == 0:
                                c = 2
                            elif f == 1:
                                c = 6 if r_d[k] > 0.0 else 5
                                if (mode == 5 and c != 5) or (mode == 6 and c != 6):
                                    continue
                            elif f == 2:
                                c = 7
                            elif f == 3:
                                c = 8
                            else:
                                c = 9
                            best_t = t
                            best_p = r_p[k]
                            best_c = c
                            best_k = kwant + 1 if mode == 2 else 0
                            # turning radius
                            pp = r_p[k]
                            if pk[lst, idx] == 0:
                                gg = (pb[lst, idx] - pa[lst, idx]) / ph[lst, idx]
                                best_r = prad[lst, idx] * np.exp(-(1.0 / pp - pa[lst, idx]) / gg)
                            else:
                                a_ = pA[lst, idx]
                                b_ = pB[lst, idx]
                                best_r = np.sqrt(2.0 * pp * pp / (a_ + np.sqrt(a_ * a_ + 4.0 * b_ * pp * pp)))
            if best_c != 0:
                time[m, j] = best_t
                pout[m, j] = best_p
                code[m, j] = best_c
                iface[m, j] = best_k
                deep[m, j] = R - best_r
    return time, pout, code, iface, deep


# ============================================================================ public interface
@dataclass(frozen=True)
class SphereArrivals:
    """Travel times of one branch through a batch of radial models.

    Attributes
    ----------
    time : (models, picks) array
        Travel time [s]; ``inf`` where the branch does not exist.
    ray_parameter : (models, picks) array
        Ray parameter p = r sin(i) / v [s/rad]; ``nan`` where absent.
    phase : (models, picks) int array
        ``PHASE_*`` code of the arrival (see :meth:`names`).
    interface : (models, picks) int array
        Boundary number for head waves and diffracted waves (boundary k is
        the base of shell k, 1-based), 0 otherwise.
    deepest : (models, picks) array
        Depth of the deepest point of the ray [km]; ``nan`` where absent.
    wave : str
        'P' or 'S' (the wave leaving the source).
    """

    time: np.ndarray
    ray_parameter: np.ndarray
    phase: np.ndarray
    interface: np.ndarray
    deepest: np.ndarray
    wave: str

    @property
    def slowness_deg(self) -> np.ndarray:
        """Ray parameter in s/degree."""
        return self.ray_parameter * (np.pi / 180.0)

    def names(self) -> np.ndarray:
        """IASPEI phase names (Storchak et al., SRL 74, 2003) as a (models, picks) object array; '' if absent."""
        table = PHASE_NAMES[self.wave]
        out = np.empty(self.phase.shape, dtype=object)
        for c, name in table.items():
            out[self.phase == c] = name
        return out


def _wave_arrays(model: RadialModel, wave: str):
    """zeta at shell tops/bottoms and centre-law coefficients for one wave, (models, shells) each."""
    top, bot = model.velocity(wave)
    rt, rb = model.r_top, model.r_bottom
    centre = rb == 0
    r2 = np.array([v == "r2" for v in model.law])[None, :] & np.ones(rt.shape, dtype=bool)
    with np.errstate(divide="ignore", invalid="ignore"):
        zt = top / rt
        zb = np.where(centre, np.inf, bot / np.where(centre, 1.0, rb))
        a, b = _r2_coefficients(rt, rb, np.where(top > 0, top, 1.0), np.where(bot > 0, bot, 1.0))
    liquid = ~(top > 0)
    a = np.where(r2 & ~liquid, a, np.inf)
    b = np.where(r2 & ~liquid, b, 0.0)
    zb = np.where(liquid, 0.0, zb)
    zt = np.where(liquid, 0.0, zt)
    return (np.ascontiguousarray(zt), np.ascontiguousarray(zb), np.ascontiguousarray(a),
            np.ascontiguousarray(b))


def travel_times(model: RadialModel, wave: str, distance, source_depth=0.0, receiver_depth=0.0, *,
                 branch: str = "first", interface: int | None = None,
                 distance_unit: str = "deg", max_diffraction: float = np.inf) -> SphereArrivals:
    """Travel times of P or S waves through a batch of radial models.

    Parameters
    ----------
    model : RadialModel
        Batch of radial models [km, km/s].
    wave : {'P', 'S'}
        Wave leaving the source.
    distance : array (picks,) or (models, picks)
        Epicentral distance, 0..180 degrees (or km of arc at the surface with
        ``distance_unit='km'``).
    source_depth, receiver_depth : float or array (picks,) or (models, picks)
        Depths below the surface [km]; both ends must lie above the core.
    branch : str
        'first' (earliest of every branch that stays the same wave: for P the
        P, head, Pdiff, PKP and PKIKP branches; for S the S, head and Sdiff
        branches; converted waves are never in it), 'direct' (earliest ray
        staying above the core: IASPEI P or S), 'head' (needs ``interface``;
        where r / v falls below the boundary no head wave exists and the
        earliest ray turning in the shell just beneath it is returned, as the
        flat engine does for a refractor with a rising velocity),
        'diffracted' (Pdiff, Sdiff), 'PKP' (earliest outer-core branch),
        'PKPab', 'PKPbc', 'PKIKP' (P only), 'SKS', 'SKIKS' (S only).
    interface : int, optional
        Boundary number k >= 1 (the base of shell k) for head waves.
    distance_unit : {'deg', 'km'}
        Unit of ``distance``.
    max_diffraction : float, optional
        Longest arc [degrees] a diffracted wave (Pdiff, Sdiff) may travel
        along the core boundary; beyond it the branch is absent. Kinematically
        it exists at any distance past the grazing ray (the default, inf), but
        its amplitude decays along the boundary, so that at large distances
        the core phases are the first arrivals observed.

    Returns
    -------
    SphereArrivals
        Times [s] (models, picks), ray parameters [s/rad], phase codes,
        boundary numbers and deepest points [km]; absent branches are ``inf``.
    """
    wave = _check_wave(wave)
    if branch not in _MODES:
        raise ValueError(f"branch: expected one of {', '.join(_MODES)}, got {branch!r}")
    need = BRANCHES[branch]
    if need is not None and need != wave:
        raise ValueError(f"branch {branch!r} leaves the source as {need}, not {wave}")
    mode = _MODES[branch]
    if mode == 2:
        if interface is None or int(interface) != interface or not 1 <= int(interface) <= model.n_shells - 1:
            raise ValueError(f"interface: branch 'head' needs a boundary number 1..{model.n_shells - 1}, "
                             f"got {interface!r}")
        kwant = int(interface) - 1
    else:
        if interface is not None:
            raise ValueError(f"interface: only the head branch takes an interface (branch {branch!r})")
        kwant = -1
    if distance_unit not in ("deg", "km"):
        raise ValueError(f"distance_unit: expected 'deg' or 'km', got {distance_unit!r}")
    dmax = float(max_diffraction)
    if not dmax >= 0:
        raise ValueError(f"max_diffraction: expected a number of degrees >= 0, got {max_diffraction!r}")
    x, zs, zr = forward._geometry(distance, source_depth, receiver_depth, model.n_models)
    radius = model.radius
    same_r = bool(np.all(radius == radius[0]))
    if distance_unit == "deg":
        delta = np.radians(x)
    else:
        delta = x / (radius[0] if same_r else radius[:, None])
    if not same_r:
        delta = np.broadcast_to(delta, (model.n_models, x.shape[1]))
        zs = np.broadcast_to(zs, delta.shape)
        zr = np.broadcast_to(zr, delta.shape)
    if np.any(delta > np.pi * (1 + 1e-12)):
        raise ValueError("distance: epicentral distances must not exceed 180 degrees (half the circumference)")
    delta = np.ascontiguousarray(np.minimum(delta, np.pi))
    rad = radius[0] if same_r else radius[:, None]
    rs = np.ascontiguousarray(rad - zs, dtype=float)
    rr = np.ascontiguousarray(rad - zr, dtype=float)
    deepest_ok = model.r_bottom[:, -1].max()
    if np.any(rs <= deepest_ok) or np.any(rr <= deepest_ok) or np.any(rs <= 0) or np.any(rr <= 0):
        raise ValueError("source_depth/receiver_depth: an end lies at or below the base of the model")
    r1 = np.maximum(rs, rr)
    r2 = np.minimum(rs, rr)
    order = np.ascontiguousarray(np.lexsort((r2, r1), axis=-1).astype(np.int64))
    cmb, icb = model.core()
    wzt, wzb, wA, wB = _wave_arrays(model, wave)
    if wave == "S":
        pzt, pzb, pA, pB = _wave_arrays(model, "P")
        below = np.arange(model.n_shells)[None, :] >= np.where(cmb >= 0, cmb, model.n_shells)[:, None]
        czt, czb, cA, cB = (np.ascontiguousarray(np.where(below, pv, sv))
                            for pv, sv in ((pzt, wzt), (pzb, wzb), (pA, wA), (pB, wB)))
    else:
        czt, czb, cA, cB = wzt, wzb, wA, wB
    law = np.array([LAWS.index(v) for v in model.law], dtype=np.int64)
    out = _kernel(np.ascontiguousarray(radius), np.ascontiguousarray(model.r_top),
                  np.ascontiguousarray(model.r_bottom), law, wzt, wzb, wA, wB, czt, czb, cA, cB, cmb, icb,
                  delta, rs, rr, order, mode, kwant, wave == "P", np.radians(dmax))
    time, p, code, iface, deep = out
    return SphereArrivals(time, p, code, iface, deep, wave)


def phase_times(model: RadialModel, phase: str, distance, source_depth=0.0, receiver_depth=0.0, *,
                distance_unit: str = "deg", max_diffraction: float = np.inf) -> SphereArrivals:
    """Travel times of a phase named in IASPEI style ('P', 'S', 'Pdiff', 'PKPab', 'SKS', ...).

    'P' and 'S' are the rays staying above the core (branch 'direct'); see
    :data:`PHASES` for the names accepted and :func:`travel_times` for the
    arguments.
    """
    if phase not in PHASES:
        raise ValueError(f"phase: expected one of {', '.join(PHASES)}, got {phase!r}")
    wave, branch = PHASES[phase]
    return travel_times(model, wave, distance, source_depth, receiver_depth, branch=branch,
                        distance_unit=distance_unit, max_diffraction=max_diffraction)


def epicentral_distance(lon1, lat1, lon2, lat2) -> np.ndarray:
    """Angle [degrees] between points given by longitude and latitude [degrees] on a sphere.

    The arctangent form of the central angle (accurate at every distance,
    antipodes included; the same as the haversine formula where both work)::

        Delta = atan2(sqrt((cos f2 sin dl)^2 + (cos f1 sin f2 - sin f1 cos f2 cos dl)^2),
                      sin f1 sin f2 + cos f1 cos f2 cos dl)

    with latitudes f1, f2 and dl = lon2 - lon1. Geocentric latitudes: the
    planet is a sphere. Multiply the angle in radians by the radius for the
    arc length along the surface.
    """
    f1, f2 = np.radians(np.asarray(lat1, dtype=float)), np.radians(np.asarray(lat2, dtype=float))
    dl = np.radians(np.asarray(lon2, dtype=float) - np.asarray(lon1, dtype=float))
    num = np.hypot(np.cos(f2) * np.sin(dl), np.cos(f1) * np.sin(f2) - np.sin(f1) * np.cos(f2) * np.cos(dl))
    den = np.sin(f1) * np.sin(f2) + np.cos(f1) * np.cos(f2) * np.cos(dl)
    return np.degrees(np.arctan2(num, den))


# ============================================================================ flattening for the flat engine
def flatten_depth(depth, radius: float) -> np.ndarray:
    """Flattened depth z_f = R ln(R / (R - z)) [km] of true depth z [km] (negative above the surface)."""
    z = np.asarray(depth, dtype=float)
    if np.any(z >= radius):
        raise ValueError(f"depth: must be above the centre (radius {radius:g} km)")
    return -radius * np.log1p(-z / radius)


def unflatten_depth(depth_flat, radius: float) -> np.ndarray:
    """True depth z = R (1 - exp(-z_f / R)) [km] of flattened depth z_f [km]."""
    zf = np.asarray(depth_flat, dtype=float)
    return -radius * np.expm1(-zf / radius)


def flatten_layers(layers: LayerModel, radius: float) -> LayerModel:
    """Exactly flattened counterpart of flat layers lying at the top of a sphere of radius R.

    Layer k (depths z_k..z_k+1, velocities v_top, v_base = v_top + g h) is read
    as a spherical shell with the same depths and velocities at its ends and
    the shell law of this module (``v / r`` linear in ``ln r``), whose
    flattened image is exactly a linear layer: depths z_f = R ln(R / r),
    velocities v_f = (R / r) v. The flat engine run on the result, with the
    distance measured along the surface (R times the angle) and flattened
    source and receiver depths (:func:`flatten_depth`), gives the spherical
    travel times (see :func:`travel_times_flattened`).

    The half-space has no base: its flattened image keeps the flattened
    gradient of its top, ``v / r + g``, all the way down (in the sphere its
    velocity then falls slowly below that of its linear law: by a
    relative 1e-4 about 90 km below a top at 35 km depth on a planet of radius
    6371 km, for g = 0). Layers with g = 0 are not exactly constant in the
    sphere: between the ends their velocity exceeds the end value by up to
    about (h / R)^2 / 8 of it (4e-6 for a 35 km layer on radius 6371 km).

    Parameters
    ----------
    layers : LayerModel
        Flat models in km and km/s (layer 1 starts at depth 0).
    radius : float
        Planet radius R [km].

    Returns
    -------
    LayerModel
        The flattened models (km, km/s), with the same number of layers.
    """
    radius = float(radius)
    tops = layers.layer_tops
    if np.any(tops[:, -1] >= radius):
        raise ValueError(f"layers: the half-space starts below the centre (radius {radius:g} km)")
    rt = radius - tops  # (M, N+1)
    rb = rt[:, 1:]
    zf_top = flatten_depth(tops, radius)
    thick = np.diff(zf_top, axis=1)
    out = {}
    for wave, grad in (("P", layers.vp_gradient), ("S", layers.vs_gradient)):
        top, _ = layers.velocity(wave)
        base = layers.base_velocity(wave)
        vf_top = radius * top / rt
        vf_base = radius * base[:, :-1] / rb
        g = np.empty_like(top)
        g[:, :-1] = (vf_base - vf_top[:, :-1]) / thick
        # half-space: d v_f / d z_f = v / r + g at its top
        g[:, -1] = np.where(top[:, -1] > 0, top[:, -1] / rt[:, -1] + grad[:, -1], 0.0)
        g[top == 0] = 0.0
        out[wave] = (vf_top, g)
    return LayerModel.build(thick, out["P"][0], vs=out["S"][0], gradient=out["P"][1], vs_gradient=out["S"][1])


def travel_times_flattened(layers: LayerModel, wave: str, distance, source_depth=0.0, receiver_depth=0.0, *,
                           radius: float, branch: str = "first", interface: int | None = None
                           ) -> forward.Arrivals:
    """The flat engine on the flattened layers: spherical travel times for regional work.

    Parameters
    ----------
    layers : LayerModel
        Flat models in km and km/s (see :func:`flatten_layers`).
    wave, branch, interface
        As in :func:`invert.forward.travel_times`. A mantle half-space always
        has a positive flattened gradient, so its "head wave" is a ray diving
        beneath the interface: 'head' returns that ray (branch code diving).
    distance : array (picks,) or (models, picks)
        Distance along the surface [km] (R times the epicentral angle).
    source_depth, receiver_depth : float or array
        True depths below the surface [km].
    radius : float
        Planet radius R [km].

    Returns
    -------
    invert.forward.Arrivals
        Times [s]; ray parameters [s/km] (horizontal slowness at the surface,
        p / R with p in s/rad); deepest points converted back to true depth
        [km].
    """
    flat = flatten_layers(layers, radius)
    arr = forward.travel_times(flat, wave, distance, flatten_depth(source_depth, radius),
                               flatten_depth(receiver_depth, radius), branch=branch, interface=interface)
    return forward.Arrivals(arr.time, arr.ray_parameter, arr.branch, arr.interface,
                            unflatten_depth(arr.deepest, radius))
