"""The inverse problem: priors + picks + noise model -> batched log-posterior.

A :class:`Problem` maps a batch of free-parameter vectors ``theta`` (B, D) --
the layer parameters of the prior followed by nuisance parameters (event
depths, unknown epicentres, a noise scale) -- to log prior, predicted travel
times and log likelihood, all walkers in one call.

With :class:`~invert.parameters.SphereSettings` (``[model] geometry =
"sphere"``) the layers are shells of a planet and the times come from the
spherical engine (:mod:`invert.sphere`); distances are then arc lengths along
the surface [km].
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import likelihood as lk
from .config import ConfigError, NoiseSettings, NuisanceSettings, RunConfig
from .data import PickSet
from .forward import pick_groups, predict
from .parameters import LayerSettings, build_models, build_radial_models
from .prior import Distribution, JointPrior, distribution_from_spec, prior_from_toml_table


@dataclass
class Problem:
    """Everything needed to evaluate the posterior of one parameterisation.

    Build with :func:`build_problem` (from a run description) or directly.
    Attributes ``names`` and ``units`` list every free parameter.
    """

    picks: PickSet
    layers: LayerSettings
    prior: JointPrior
    noise: NoiseSettings = field(default_factory=NoiseSettings)
    nuisance: NuisanceSettings = field(default_factory=NuisanceSettings)
    units: str = "m"
    source: str = "run description"  # the run description's path, named in error messages

    def __post_init__(self):
        picks = self.picks
        self.n_layer_params = self.prior.ndim
        self.nuisance_names: list[str] = []
        self.nuisance_priors: list[Distribution] = []
        # ---------------------------------------------------------- S picks need S parameters
        if self.layers.vpvs_mode == "none" and np.any(picks.wave == "S"):
            line = int(picks.line_numbers[np.argmax(picks.wave == "S")])
            raise ConfigError(self.source, "model",
                              f"vpvs_mode = 'none' but {picks.path}, line {line} is an S pick; "
                              "choose 'per_layer', 'shared' or 'vs'")
        self._check_fluid_crossings()
        self.sphere = self.layers.geometry == "sphere"
        if self.sphere:
            self._check_sphere()
        # ---------------------------------------------------------- event depths and epicentres
        self._depth_col = np.full(picks.n_sources, -1)
        self._x_col = np.full(picks.n_sources, -1)
        self._y_col = np.full(picks.n_sources, -1)
        for s in np.flatnonzero(~picks.depth_known):
            spec = self.nuisance.event_depth
            if spec is None:
                raise ConfigError(self.source, "nuisance",
                                  f"source {picks.source_names[s]} has no depth in {picks.sources_path}; give "
                                  "event_depth = { dist = ..., ... } (a prior for unknown source depths)")
            self._depth_col[s] = self._add(f"event_depth_{picks.source_names[s]}", spec, "nuisance.event_depth")
        for s in np.flatnonzero(~picks.epicentre_known):
            for axis, cols in (("x", self._x_col), ("y", self._y_col)):
                spec = getattr(self.nuisance, f"epicentre_{axis}")
                if spec is None:
                    raise ConfigError(self.source, "nuisance",
                                      f"source {picks.source_names[s]} has no {axis} in {picks.sources_path}; "
                                      f"give epicentre_{axis} = {{ dist = ..., ... }}")
                cols[s] = self._add(f"event_{axis}_{picks.source_names[s]}", spec, f"nuisance.epicentre_{axis}")
        self._scale_col = -1
        if self.noise.scale == "free":
            self._scale_col = self._add("noise_scale", self.noise.scale_prior, "noise.scale_prior")
        self.names = list(self.prior.names) + self.nuisance_names
        self.ndim = len(self.names)
        # ---------------------------------------------------------- origin times and delays
        known = picks.origin_time_known
        self.marginal_origin = bool((~known).any())
        if self.marginal_origin and self.nuisance.origin_time == "known":
            s = int(np.argmax(~known))
            raise ConfigError(self.source, "nuisance",
                              f"source {picks.source_names[s]} has no origin_time in {picks.sources_path}; set "
                              "origin_time = 'normal' or 'uniform' to marginalise unknown origin times")
        first_pick = np.full(picks.n_sources, np.inf)
        np.minimum.at(first_pick, picks.source_index, picks.time)
        centre = np.where(known, picks.source_origin_time, first_pick - self.nuisance.origin_time_mean)
        if self.nuisance.origin_time == "uniform":
            spread = np.where(known, 0.0, 0.5 * self.nuisance.origin_time_width)
        else:
            spread = np.where(known, 0.0, self.nuisance.origin_time_sd)
        kind = np.where(known, "known", self.nuisance.origin_time if self.marginal_origin else "known")
        self.origin_prior = lk.OriginPrior.build(kind, np.where(np.isfinite(centre), centre, 0.0), spread)
        self.delays = self.nuisance.receiver_delay_sd > 0 or self.nuisance.source_delay_sd > 0
        self.plan = None
        if self.delays:
            if self.noise.model != "gaussian":
                raise ConfigError(self.source, "nuisance",
                                  "delay terms are marginalised in closed form for Gaussian noise only; "
                                  "set [noise] model = 'gaussian' or turn the delays off")
            groups = [lk.OffsetGroup.origin_times(picks.source_index, self.origin_prior)]
            if self.nuisance.receiver_delay_sd > 0:
                groups.append(lk.OffsetGroup("receiver delay", picks.receiver_index, 0.0,
                                             np.full(picks.n_receivers, self.nuisance.receiver_delay_sd)))
            if self.nuisance.source_delay_sd > 0:
                groups.append(lk.OffsetGroup("source delay", picks.source_index, 0.0,
                                             np.full(picks.n_sources, self.nuisance.source_delay_sd)))
            self.plan = lk.prepare_linear_gaussian(picks.sigma, groups)
        self._groups = pick_groups(picks.wave, picks.branch, picks.interface)
        self._obs = np.asarray(picks.time, dtype=float)
        self._sigma = np.asarray(picks.sigma, dtype=float)

    # ------------------------------------------------------------------ helpers
    def _fixed_interface_depths(self) -> list:
        """Depth of each interface (1..N) where the prior fixes it, else None."""
        fixed = self.prior.fixed
        out, total = [], 0.0
        for k in range(1, self.layers.n_layers + 1):
            if self.layers.depth_parameter:
                out.append(fixed.get(f"depth_{k}"))
            else:
                t = fixed.get(f"thickness_{k}")
                total = None if (t is None or total is None) else total + t
                out.append(total)
        return out

    def _check_fluid_crossings(self) -> None:
        """S picks that must enter a fluid layer whose depth range is fixed are errors (file and line named)."""
        if not self.layers.fluid_layers:
            return
        picks = self.picks
        depths = [0.0] + self._fixed_interface_depths()
        s_idx = np.flatnonzero(picks.wave == "S")
        for k in sorted(self.layers.fluid_layers):
            top = -np.inf if k == 1 else depths[k - 1]
            bottom = np.inf if k == self.layers.total_layers else depths[k]
            if top is None or bottom is None:
                continue
            for j in s_idx:
                zs, zr = picks.source_depth[j], picks.receiver_depth[j]
                if not (np.isfinite(zs) and np.isfinite(zr)):
                    continue
                lo, hi = min(zs, zr), max(zs, zr)
                inside = (top <= zs < bottom) or (top <= zr < bottom)
                across = lo < top and hi >= bottom
                if inside or across:
                    where = "lies inside" if inside else "would have to cross"
                    raise ConfigError(picks.path, "data",
                                      f"line {int(picks.line_numbers[j])}, column 'wave': S pick ({picks.source_id[j]} -> "
                                      f"{picks.receiver_id[j]}) {where} fluid layer {k} "
                                      f"(Vs = 0 from {top:g} to {bottom:g} {self.units}); S cannot travel there. "
                                      "Remove the pick or correct its wave")

    def _check_sphere(self) -> None:
        """Sphere runs: inline geometry in km, branches the spherical engine has, ends inside the planet."""
        picks = self.picks
        where = self.source
        if self.units != "km":
            raise ConfigError(where, "", f"units = {self.units!r}, but geometry = 'sphere' needs units = 'km'")
        if picks.geometry != "inline":
            raise ConfigError(picks.sources_path or where, "data",
                              "geometry = 'sphere' reads distances inline (arc length along the surface [km]); "
                              "geometry tables are not read as coordinates on a sphere")
        bad = np.flatnonzero(picks.branch == "reflection")
        if bad.size:
            j = bad[0]
            raise ConfigError(picks.path, "data", f"line {int(picks.line_numbers[j])}, column 'branch': the "
                              "spherical engine computes no reflections; use first, direct or head picks")
        radius = float(self.layers.planet_radius)
        half = np.pi * radius
        checks = (("distance", picks.distance, lambda v: v <= half * (1 + 1e-12),
                   f"is longer than half the circumference ({half:g} km)"),
                  ("source_depth", picks.source_depth, lambda v: v < radius,
                   f"lies at or below the centre (planet_radius = {radius:g} km)"),
                  ("receiver_depth", picks.receiver_depth, lambda v: v < radius,
                   f"lies at or below the centre (planet_radius = {radius:g} km)"))
        for name, values, good, what in checks:
            values = np.asarray(values, dtype=float)
            out = np.flatnonzero(~good(values))
            if out.size:
                j = out[0]
                raise ConfigError(picks.path, "data", f"line {int(picks.line_numbers[j])}, column '{name}': "
                                  f"{values[j]:g} km {what}")
        # a liquid core whose top is fixed by the prior: no source or receiver can lie in or below it
        core_top = self._fixed_liquid_core_top()
        if core_top is not None:
            for name in ("source_depth", "receiver_depth"):
                values = np.asarray(getattr(picks, name), dtype=float)
                out = np.flatnonzero(values >= core_top)
                if out.size:
                    j = out[0]
                    raise ConfigError(picks.path, "data", f"line {int(picks.line_numbers[j])}, column '{name}': "
                                      f"{values[j]:g} km lies in the core (the liquid core starts at {core_top:g} km, "
                                      "fixed by the prior); no wave of a run starts or ends there")

    def _fixed_liquid_core_top(self) -> float | None:
        """Sphere runs: depth [km] of the top of the liquid (outer) core where the prior fixes it, else None.

        The core is the deepest run of fluid layers under a solid layer (as in
        :meth:`invert.sphere.RadialModel.core`); the spherical engine has no
        wave starting or ending in it or in an inner core below it.
        """
        fluid = set(self.layers.fluid_layers)
        if not fluid:
            return None
        k = max(fluid)
        while k - 1 in fluid:
            k -= 1
        if k == 1:
            return None  # liquid from the surface down: not a core
        return self._fixed_interface_depths()[k - 2]

    def _add(self, name: str, spec, where: str) -> int:
        try:
            dist = distribution_from_spec(spec, where)
        except ValueError as exc:
            raise ConfigError(self.source, where.split(".")[0], str(exc)) from None
        if not isinstance(dist, Distribution):
            raise ConfigError(self.source, where.split(".")[0], f"{where}: a fixed value is not a prior "
                              "(give the value in the geometry table instead)")
        self.nuisance_names.append(name)
        self.nuisance_priors.append(dist)
        return self.prior.ndim + len(self.nuisance_names) - 1

    @property
    def pointwise_kind(self) -> str:
        """'pick', 'event' or 'total': what one stored log-likelihood value refers to."""
        if self.delays:
            return "total"
        return "event" if self.marginal_origin else "pick"

    def log_prior(self, theta) -> np.ndarray:
        """Normalised log prior density (B,)."""
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        lp = self.prior.log_prob(theta[:, :self.n_layer_params])
        for j, dist in enumerate(self.nuisance_priors):
            lp = lp + dist.logpdf(theta[:, self.n_layer_params + j])
        return lp

    def bounds(self, tail: float = 1e-4) -> tuple[np.ndarray, np.ndarray]:
        """Lower and upper bounds (D,) holding all but ``tail`` of each 1-D prior at either end."""
        dists = [self.prior.priors[n] for n in self.prior.names] + list(self.nuisance_priors)
        low = np.array([float(d.ppf(tail)) for d in dists])
        high = np.array([float(d.ppf(1.0 - tail)) for d in dists])
        return low, high

    def sample_prior(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """``n`` draws from the prior, shape (n, D)."""
        out = np.empty((n, self.ndim))
        out[:, :self.n_layer_params] = self.prior.sample(n, rng)
        for j, dist in enumerate(self.nuisance_priors):
            out[:, self.n_layer_params + j] = dist.sample(n, rng)
        return out

    def from_unit_cube(self, u) -> np.ndarray:
        """Unit cube -> parameters (prior transform for nested sampling)."""
        u = np.atleast_2d(np.asarray(u, dtype=float))
        out = np.empty_like(u)
        out[:, :self.n_layer_params] = self.prior.from_unit_cube(u[:, :self.n_layer_params])
        for j, dist in enumerate(self.nuisance_priors):
            out[:, self.n_layer_params + j] = dist.from_unit(u[:, self.n_layer_params + j])
        return out

    def models(self, theta):
        """(LayerModel of the valid rows or None, validity mask (B,))."""
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        values = self.prior.values(theta[:, :self.n_layer_params])
        return build_models(values, self.layers)

    def radial_models(self, theta):
        """Sphere runs: (RadialModel of the valid rows or None, validity mask (B,))."""
        model, ok = self.models(theta)
        return build_radial_models(model, ok, self.layers)

    def _predict_sphere(self, radial, x, zs, zr, return_deepest: bool = False):
        """Times (and deepest points) [s, km] (M, P) from the spherical engine, by pick group."""
        from . import sphere

        n = self.picks.n_picks
        out = np.empty((radial.n_models, n))
        deep = np.empty((radial.n_models, n)) if return_deepest else None
        for w, b, k, sel in self._groups:
            arr = sphere.travel_times(radial, w, x[..., sel], zs[..., sel], zr[..., sel], branch=b,
                                      interface=k if b == "head" else None, distance_unit="km",
                                      max_diffraction=self.layers.max_diffraction)
            out[:, sel] = arr.time
            if return_deepest:
                deep[:, sel] = arr.deepest
        return (out, deep) if return_deepest else out

    def geometry(self, theta):
        """Per-pick distance, source depth, receiver depth: (P,) or (B, P) when sampled."""
        picks = self.picks
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        x = np.asarray(picks.distance, dtype=float)
        zs = np.asarray(picks.source_depth, dtype=float)
        zr = np.asarray(picks.receiver_depth, dtype=float)
        si = picks.source_index
        if (self._depth_col >= 0).any():
            z_src = np.broadcast_to(np.asarray(picks.source_z, dtype=float), (theta.shape[0], picks.n_sources)).copy()
            for s in np.flatnonzero(self._depth_col >= 0):
                z_src[:, s] = theta[:, self._depth_col[s]]
            zs = z_src[:, si]
        if (self._x_col >= 0).any():
            sx = np.broadcast_to(np.asarray(picks.source_x, dtype=float), (theta.shape[0], picks.n_sources)).copy()
            sy = np.broadcast_to(np.asarray(picks.source_y, dtype=float), (theta.shape[0], picks.n_sources)).copy()
            for s in np.flatnonzero(self._x_col >= 0):
                sx[:, s] = theta[:, self._x_col[s]]
                sy[:, s] = theta[:, self._y_col[s]]
            rx = np.asarray(picks.receiver_x, dtype=float)[picks.receiver_index]
            ry = np.asarray(picks.receiver_y, dtype=float)[picks.receiver_index]
            x = np.hypot(sx[:, si] - rx, sy[:, si] - ry)
        return x, zs, zr

    def travel_times(self, theta) -> tuple[np.ndarray, np.ndarray]:
        """Predicted travel times (B, P) [s] (inf where absent or the model is invalid) and the validity mask."""
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        model, ok = self.radial_models(theta) if self.sphere else self.models(theta)
        if model is None:
            return np.full((theta.shape[0], self.picks.n_picks), np.inf), ok
        x, zs, zr = self.geometry(theta[ok])
        picks = self.picks
        if self.sphere:
            pred = self._predict_sphere(model, x, zs, zr)
        else:
            pred = predict(model, picks.wave, picks.branch, picks.interface, x, zs, zr, groups=self._groups)
        if ok.all():
            return pred, ok
        out = np.full((theta.shape[0], self.picks.n_picks), np.inf)
        out[ok] = pred
        return out, ok

    def deepest_points(self, theta) -> np.ndarray:
        """Deepest point reached by any modelled ray, per row (B,) [length]; NaN for invalid rows.

        The depth of investigation of each posterior sample: structure below
        it is seen by no pick and is constrained by the prior alone.
        """
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        model, ok = self.radial_models(theta) if self.sphere else self.models(theta)
        out = np.full(theta.shape[0], np.nan)
        if model is None:
            return out
        x, zs, zr = self.geometry(theta[ok])
        picks = self.picks
        if self.sphere:
            _, deep = self._predict_sphere(model, x, zs, zr, return_deepest=True)
        else:
            _, deep = predict(model, picks.wave, picks.branch, picks.interface, x, zs, zr, return_deepest=True,
                              groups=self._groups)
        with np.errstate(invalid="ignore"):
            out[ok] = np.nanmax(np.where(np.isfinite(deep), deep, -np.inf), axis=1)
        return out

    def _scale(self, theta):
        return None if self._scale_col < 0 else theta[:, self._scale_col]

    def log_likelihood(self, theta, pointwise: bool = False):
        """Log likelihood (B,), or pointwise values (B, n) when ``pointwise`` (see :attr:`pointwise_kind`).

        Rows with an invalid model or an absent arrival get -inf.
        """
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        pred, ok = self.travel_times(theta)
        n_points = {"pick": self.picks.n_picks, "event": self.picks.n_sources, "total": 1}[self.pointwise_kind]
        if ok.all():
            out = self._pointwise(pred, self._scale(theta))
        else:
            out = np.full((theta.shape[0], n_points), -np.inf)
            if ok.any():
                out[ok] = self._pointwise(pred[ok], self._scale(theta[ok]))
        return out if pointwise else out.sum(axis=1)

    def _pointwise(self, pred, scale):
        nz = self.noise
        obs, sigma = self._obs, self._sigma
        if self.delays:
            resid = np.where(np.isfinite(pred), obs - pred, -np.inf)
            return lk.linear_gaussian_marginal(resid, self.plan, scale=scale)[:, None]
        if self.marginal_origin:
            if nz.model == "gaussian":
                return lk.marginal_origin_gaussian(pred, obs, sigma, self.picks.source_index, self.origin_prior,
                                                   scale=scale)
            noise = "mixture" if nz.model == "outlier_mixture" else "student_t"
            return lk.marginal_origin_quadrature(pred, obs, sigma, self.picks.source_index, self.origin_prior,
                                                 noise=noise, fraction=nz.outlier_fraction,
                                                 outlier_sigma=nz.outlier_sigma, dof=nz.dof, scale=scale)
        tt_obs = np.asarray(self.picks.travel_time, dtype=float)
        if nz.model == "gaussian":
            return lk.gaussian(pred, tt_obs, sigma, scale=scale)
        if nz.model == "outlier_mixture":
            return lk.outlier_mixture(pred, tt_obs, sigma, nz.outlier_fraction, nz.outlier_sigma, scale=scale)[0]
        return lk.student_t(pred, tt_obs, sigma, nz.dof, scale=scale)[0]

    def outlier_probability(self, theta) -> np.ndarray | None:
        """Posterior outlier probability (B, P) for the mixture noise model (known origins), else None."""
        if self.noise.model != "outlier_mixture" or self.marginal_origin:
            return None
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        pred, ok = self.travel_times(theta)
        out = np.full(pred.shape, np.nan)
        if ok.any():
            out[ok] = lk.outlier_mixture(pred[ok], np.asarray(self.picks.travel_time, dtype=float), self._sigma,
                                         self.noise.outlier_fraction, self.noise.outlier_sigma,
                                         scale=self._scale(theta[ok]))[1]
        return out

    def log_prob(self, theta) -> np.ndarray:
        """Unnormalised log posterior (B,): log prior + log likelihood, -inf outside the prior."""
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        lp = self.log_prior(theta)
        good = np.isfinite(lp)
        out = np.full(theta.shape[0], -np.inf)
        if good.any():
            ll = self.log_likelihood(theta[good])
            out[good] = lp[good] + ll
        return out

    def parameter_units(self) -> dict[str, str]:
        """Unit of every free parameter."""
        from .prior import parameter_unit

        out = {}
        for name in self.names:
            if name.startswith("event_"):
                out[name] = self.units
            elif name == "noise_scale":
                out[name] = "1"
            else:
                out[name] = parameter_unit(name, self.units) or "1"
        return out


def select_waves(config: RunConfig, picks: PickSet) -> PickSet:
    """The picks of the waves listed in ``[data] waves`` (all picks when the key is absent).

    Raises ConfigError, naming the run description, the key and the picks file,
    when a listed wave has no pick in the file.
    """
    waves = getattr(config, "waves", None)
    if not waves:
        return picks
    present = set(np.asarray(picks.wave).astype(str))
    missing = [w for w in waves if w not in present]
    if missing:
        raise ConfigError(config.path, "data", f"waves = {list(waves)!r}: {picks.path} has no {' or '.join(missing)} "
                                               f"picks (it holds {' and '.join(sorted(present)) or 'none'}); "
                                               "list only waves the picks file contains")
    keep = np.isin(np.asarray(picks.wave).astype(str), list(waves))
    return picks if keep.all() else picks.subset(keep)


def read_run_picks(config: RunConfig) -> PickSet:
    """The picks of a run description: its data files read, then ``[data] waves`` applied."""
    from .data import read_picks

    return select_waves(config, read_picks(config.picks, config.sources, config.receivers))


def build_problem(config: RunConfig, picks: PickSet | None = None) -> Problem:
    """Problem of a run description (reads the picks unless given; ``[data] waves`` applied)."""
    picks = read_run_picks(config) if picks is None else select_waves(config, picks)
    table = {"prior": config.prior}
    if config.constraints:
        table["constraints"] = config.constraints
    try:
        prior = prior_from_toml_table(table, config.layers.total_layers, units=config.units,
                                      gradient_layers=sorted(config.layers.gradient_layers),
                                      vpvs_mode=config.layers.vpvs_mode,
                                      depth_parameter=config.layers.depth_parameter)
    except ValueError as exc:
        raise ConfigError(config.path, "prior", str(exc)) from None
    return Problem(picks=picks, layers=config.layers, prior=prior, noise=config.noise, nuisance=config.nuisance,
                   units=config.units, source=str(config.path))
