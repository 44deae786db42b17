"""One inversion run: run description -> samples, diagnostics and files in a folder.

Folder layout (docs/outputs.md): ``posterior.nc`` (ArviZ InferenceData),
``summary.csv`` / ``summary.json``, ``convergence.json`` / ``convergence.txt``,
``config.toml`` (the run description as given) and ``config_resolved.json``
(every setting with its default filled in), ``checkpoint.h5`` (to resume).
Every file is written to a temporary name and renamed into place.
"""

from __future__ import annotations

import contextlib
import csv
import dataclasses
import hashlib
import io
import json
import os
import sys
import tempfile
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .config import RunConfig, load_config
from .data import (PickSet, offset_message, offset_mismatch, read_picks, reciprocal_mismatch,
                   reciprocity_message)
from .problem import Problem, build_problem, select_waves
from .sample import (ConvergenceReport, SamplerResult, convergence_report, initial_around, initial_from_prior,
                     run_ensembles)

#: Most (draw x pick) values stored in each array of the pointwise log-likelihood and posterior
#: predictive groups (about 8 MB each before compression)...
MAX_POINTWISE_VALUES = 1_000_000
#: ... unless that leaves fewer draws than this (PSIS-LOO wants a few thousand draws; Vehtari, Gelman &
#: Gabry, Stat. Comput. 27, 2017), in which case up to POINTWISE_CEILING values are kept.
MIN_POINTWISE_DRAWS = 2000
POINTWISE_CEILING = 4_000_000
#: Draws of the prior stored for prior-vs-posterior comparisons.
PRIOR_DRAWS = 2000


@dataclass
class RunOutput:
    """What a run produced (also on disk in ``folder``)."""

    folder: Path
    config: RunConfig
    problem: Problem
    result: SamplerResult
    report: ConvergenceReport
    summary: list[dict]

    @property
    def converged(self) -> bool:
        return self.report.converged


@contextlib.contextmanager
def chain_layout_warning_off():
    """Silence arviz's "More chains (C) than draws (N)" layout warning, and only that one.

    arviz guesses that an array with more chains than draws may have its axes
    swapped. Every array this module hands to arviz is built explicitly as
    (chain, draw, ...) -- with one chain per walker, short runs legitimately have
    more chains than draws -- so the guess is wrong here and the warning would
    only alarm the user. Every other warning still reaches them.
    """
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r"More chains \(\d+\) than draws", category=UserWarning)
        yield


def _say(msg: str, quiet: bool) -> None:
    if not quiet:
        print(msg, flush=True)


def write_atomic(path: Path, data: bytes | str) -> None:
    """Write ``data`` to ``path`` through a temporary file in the same folder and a rename."""
    path = Path(path)
    mode = "wb" if isinstance(data, bytes) else "w"
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        os.chmod(tmp, 0o644)
        with os.fdopen(fd, mode) as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def fingerprint(config: RunConfig) -> str:
    """Hash of everything that defines the posterior (data files, model, prior, noise, nuisance)."""
    h = hashlib.sha256()
    for p in (config.picks, config.sources, config.receivers):
        if p is not None:
            h.update(Path(p).read_bytes())
    for part in (config.layers, config.noise, config.nuisance):
        h.update(repr(part).encode())
    h.update(json.dumps(config.prior, sort_keys=True, default=str).encode())
    h.update(json.dumps(config.constraints, sort_keys=True, default=str).encode())
    h.update(config.units.encode())
    if config.waves is not None:  # only when set, so runs without [data] waves keep their fingerprints
        h.update(repr(config.waves).encode())
    return h.hexdigest()[:16]


def fingerprint_parts(config: RunConfig) -> dict[str, str]:
    """Separate hashes of the picks, priors, model and noise settings behind :func:`fingerprint`.

    Stored in the checkpoint so that a refused resume can name what changed.
    """
    def digest(*items) -> str:
        h = hashlib.sha256()
        for item in items:
            h.update(item if isinstance(item, bytes) else str(item).encode())
        return h.hexdigest()[:16]

    files = [Path(p).read_bytes() for p in (config.picks, config.sources, config.receivers) if p is not None]
    return {"picks": digest(*files, repr(config.waves)),
            "priors": digest(json.dumps(config.prior, sort_keys=True, default=str),
                             json.dumps(config.constraints, sort_keys=True, default=str)),
            "model": digest(repr(config.layers), config.units),
            "noise": digest(repr(config.noise), repr(config.nuisance))}


#: What each part of :func:`fingerprint_parts` covers, in words.
PART_WORDS = {"picks": "the picks (data files or [data] waves)",
              "priors": "the priors ([prior], [constraints] or the prior template)",
              "model": "the model ([model] or units)",
              "noise": "the noise or nuisance settings ([noise], [nuisance])"}


def resume_mismatch(checkpoint: Path, config: RunConfig, problem: Problem) -> str:
    """Why the run in ``checkpoint`` cannot be resumed with ``config`` ("" when it can)."""
    from .sample import checkpoint_settings

    saved = checkpoint_settings(checkpoint)
    changed, details = [], []
    if saved["fingerprint"] != fingerprint(config):
        old = saved["fingerprint_parts"]
        if old:
            now = fingerprint_parts(config)
            changed += [PART_WORDS.get(k, k) for k in now if old.get(k) != now[k]]
        if not changed:
            changed.append("the picks, priors or settings")
    if tuple(saved["parameter_names"]) != tuple(problem.names) and not changed:
        changed.append("the model")
        details.append(f"free parameters {', '.join(saved['parameter_names'])} then, {', '.join(problem.names)} now")
    s = config.sampler
    sampler = [f"{key} = {then} then, {now} now" for key, then, now in
               (("ensembles", saved["n_ensembles"], s.ensembles), ("walkers", saved["n_walkers"], s.walkers),
                ("seed", saved["seed"], s.seed)) if then != now]
    if sampler:
        changed.append("the [sampler] settings")
        details += sampler
    if not changed:
        return ""
    what = ", ".join(changed[:-1]) + (" and " if len(changed) > 1 else "") + changed[-1]
    return (f"cannot resume the run in {checkpoint.parent}: {what} changed since it was started"
            + (f" ({'; '.join(details)})" if details else "")
            + ". Start it again with --overwrite (the samples so far are discarded), or set another [output] "
              "folder to keep both runs")


def suggested_steps(result: SamplerResult, report: ConvergenceReport) -> int:
    """Steps per ensemble to ask for when a run did not converge (rounded up to hundreds).

    At least twice the current length, and long enough that the kept part spans
    the target number of the largest autocorrelation time with a 20% margin.
    """
    tau = np.asarray(report.tau, dtype=float)
    tau_max = float(np.nanmax(tau)) if np.any(np.isfinite(tau)) else 0.0
    need = report.burn + 1.2 * report.targets.min_tau_multiple * tau_max
    n = max(2 * result.n_steps, int(np.ceil(need)))
    return int(np.ceil(n / 100.0) * 100)


def default_moves():
    """emcee proposal: the differential-evolution move (ter Braak, Stat. Comput. 16, 2006).

    It keeps no internal state, so resumed runs stay exact. emcee's snooker
    move (DESnookerMove, emcee 3.1.6) is deliberately NOT used: on a 6-D
    standard normal (32 walkers, 3000 steps) it returned variances of about
    0.6-0.7 instead of 1, while DEMove alone returned 0.99-1.03 (measured here).
    """
    import emcee

    return [(emcee.moves.DEMove(), 1.0)]


def valid_prior_draws(problem: Problem, n: int, rng: np.random.Generator, low=None, high=None,
                      max_rounds: int = 20) -> np.ndarray:
    """Up to ``n`` prior draws with a finite log posterior (and inside ``[low, high]`` when given).

    Prior draws honour every constraint of the prior (ordering, total depth), unlike
    points spread over the box of the 1-D marginals, most of which can be invalid.
    Returns an array (k, D) with ``k <= n`` (``k = 0`` when no valid draw was found).
    """
    kept = []
    total = 0
    for _ in range(max_rounds):
        draws = problem.sample_prior(max(n, 64), rng)
        ok = np.isfinite(problem.log_prob(draws))
        if low is not None:
            ok &= np.all((draws >= low) & (draws <= high), axis=1)
        kept.append(draws[ok])
        total += int(ok.sum())
        if total >= n:
            break
    return np.concatenate(kept)[:n] if kept else np.empty((0, problem.ndim))


def optimum_start(problem: Problem, config: RunConfig, rng: np.random.Generator, quiet: bool = True):
    """Starting points near the posterior mode, found independently for every ensemble.

    Each ensemble runs its own differential evolution (Storn & Price, J. Global
    Optim. 11, 1997; scipy's implementation, all candidates evaluated in one
    batched call) over the central 99.98% of every prior, from its own seed,
    then starts its walkers in a small ball around what it found. Ensembles
    that land in different modes disagree, and R-hat across ensembles says so.

    The first population is drawn from the prior itself (so it obeys the prior's
    ordering and depth constraints even when almost all of the box does not).
    An ensemble for which no valid model is found, or whose optimum has no valid
    neighbourhood, starts from prior draws instead, and a message says so.
    """
    from scipy.optimize import differential_evolution

    s = config.sampler
    low, high = problem.bounds()
    width = high - low
    out = np.empty((s.ensembles, s.walkers, problem.ndim))
    popsize = 12
    n_pop = popsize * problem.ndim

    def cost(x):
        lp = problem.log_prob(np.atleast_2d(x.T))
        return np.where(np.isfinite(lp), -lp, 1e30)

    def from_prior(e: int, why: str):
        _say(f"ensemble {e + 1}: {why}; starting this ensemble from prior draws instead "
             "(the sampler then needs a longer burn-in; [sampler] start = 'prior' does this for every ensemble)",
             quiet)
        return initial_from_prior(problem.sample_prior, 1, s.walkers, rng, log_prob=problem.log_prob)[0]

    for e in range(s.ensembles):
        seed = int(rng.integers(2**31))
        init = valid_prior_draws(problem, n_pop, rng, low, high)
        if init.shape[0] < 5:
            out[e] = from_prior(e, "too few prior draws give a valid model to start the optimiser")
            continue
        res = differential_evolution(cost, list(zip(low, high)), vectorized=True, updating="deferred", seed=seed,
                                     maxiter=300, popsize=popsize, tol=1e-8, polish=False, init=init)
        if not res.fun < 1e30:
            out[e] = from_prior(e, "the optimiser found no valid model")
            continue
        _say(f"ensemble {e + 1}: starting near log-posterior {-res.fun:.2f} "
             f"({res.nit} generations of differential evolution)", quiet)
        try:
            out[e] = initial_around(res.x, 1e-4 * width, 1, s.walkers, rng, log_prob=problem.log_prob)[0]
        except RuntimeError:
            out[e] = from_prior(e, "the optimum lies on the edge of the prior's valid region")
    return out


def starting_points(problem: Problem, config: RunConfig, rng: np.random.Generator, quiet: bool = True):
    """Initial walker positions (ensembles, walkers, D) as chosen by ``[sampler] start``."""
    s = config.sampler
    if s.start == "classic":
        reasons: list[str] = []
        point = classic_start(problem, quiet=False if not quiet else True, reasons=reasons)
        if point is not None:
            scale = np.maximum(np.abs(point) * 0.02, 1e-6)
            return initial_around(point, scale, s.ensembles, s.walkers, rng, log_prob=problem.log_prob)
        why = f" ({reasons[0]})" if reasons else ""
        _say(f"classic start unavailable for these data{why}; starting near the optimum instead", quiet)
        return optimum_start(problem, config, rng, quiet)
    if s.start == "optimum":
        return optimum_start(problem, config, rng, quiet)
    return initial_from_prior(problem.sample_prior, s.ensembles, s.walkers, rng, log_prob=problem.log_prob)


def classic_start(problem: Problem, quiet: bool = True, reasons: list | None = None,
                  velocities: list | None = None):
    """A starting point from the intercept-time method, or None where it does not apply.

    Uses the P first arrivals of the source with the most surface-to-surface
    picks (the method assumes both ends at the surface), fits N + 1
    straight-line segments and maps slopes and intercepts to ``vp_k`` and
    ``thickness_k`` (Telford, Geldart & Sheriff 1990, ch. 4). Every other
    parameter starts at its prior median; values outside the prior's support
    are replaced by the prior median. The estimate is printed as a sanity check.

    When None is returned, one sentence saying why (and whether an estimate was
    printed) is appended to ``reasons`` if a list is given. The estimate's
    velocities [length unit / s] are appended to ``velocities`` if a list is given.
    """
    from .classic import intercept_time_estimate

    def unavailable(why: str):
        if reasons is not None:
            reasons.append(why)
        return None

    picks = problem.picks
    surface = (picks.wave == "P") & (picks.branch == "first") & (picks.source_depth == 0) \
        & (picks.receiver_depth == 0) & np.isfinite(picks.distance) & np.isfinite(picks.travel_time)
    if not surface.any():
        return unavailable("no intercept-time estimate: it needs P first arrivals with source and receivers "
                           "at the surface")
    counts = np.bincount(picks.source_index[surface], minlength=picks.n_sources)
    src = int(np.argmax(counts))
    sel = surface & (picks.source_index == src)
    n_seg = problem.layers.n_layers + 1
    if sel.sum() < 3 * n_seg:
        return unavailable(f"no intercept-time estimate: {n_seg} line segments need at least {3 * n_seg} surface "
                           f"P first arrivals from one source; source {picks.source_names[src]} has "
                           f"{int(sel.sum())}")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        est = intercept_time_estimate(picks.distance[sel], picks.travel_time[sel], n_segments=n_seg)
    if velocities is not None:
        velocities.append(np.asarray(est.velocities, dtype=float))
    _say(f"Intercept-time estimate from source {picks.source_names[src]} (sanity check):\n"
         f"{est.summary(problem.units)}", quiet)
    for w in caught:
        _say(f"note: {w.message}", quiet)
    low, high = problem.bounds(tail=0.0 + 1e-9)
    point = np.array([float(d.ppf(0.5)) for d in
                      [problem.prior.priors[n] for n in problem.prior.names] + list(problem.nuisance_priors)])
    depth = np.cumsum(est.thicknesses)
    from_estimate = set()
    for i, name in enumerate(problem.names):
        family, _, k = name.rpartition("_")
        if not k.isdigit():
            continue
        k = int(k)
        value = None
        if family == "vp" and k <= est.velocities.size:
            value = est.velocities[k - 1]
        elif family == "thickness" and k <= est.thicknesses.size:
            value = est.thicknesses[k - 1]
        elif family == "depth" and k <= depth.size:
            value = depth[k - 1]
        if value is not None and np.isfinite(value) and low[i] < value < high[i]:
            point[i] = value
            from_estimate.add(name)
    if not np.isfinite(problem.log_prob(point[None, :])[0]):
        medians = [n for n in problem.names if n not in from_estimate]
        if not np.isfinite(problem.log_prior(point[None, :])[0]):
            where = "a point outside the prior's support or constraints"
        elif not problem.travel_times(point[None, :])[1][0]:
            where = "a physically impossible layer model (for instance Vp/Vs not above sqrt(4/3) in some layer)"
        else:
            where = "a model that predicts no arrival for some picks"
        return unavailable("the intercept-time estimate above is a sanity check only and is not used as a "
                           f"starting point: together with the prior medians of {', '.join(medians) or 'nothing'} "
                           f"it gives {where}")
    return point


def load_picks(config: RunConfig) -> tuple[PickSet, str]:
    """The run's picks (``[data] waves`` applied) and a sentence on picks left out ("" when none)."""
    every = read_picks(config.picks, config.sources, config.receivers)
    picks = select_waves(config, every)
    if picks.n_picks == every.n_picks:
        return picks, ""
    return picks, (f"[data] waves = {list(config.waves)!r}: {picks.n_picks} of the {every.n_picks} picks in "
                   f"{config.picks} kept; the {every.n_picks - picks.n_picks} picks of other waves are left out.")


def data_checks(picks: PickSet) -> list[str]:
    """Plain-language results of the reciprocity and same-offset checks (empty when nothing to say)."""
    out = []
    pairs = reciprocal_mismatch(picks)
    if pairs:
        out.append(reciprocity_message(pairs))
    same = offset_mismatch(picks)
    if same:
        out.append(offset_message(same))
    return [m for m in out if m]


#: Velocities [m/s] outside which P and S travel times are implausible for earth materials
#: (common practice: Vp from about 100 m/s in loose dry soil to about 14 km/s in the deep mantle,
#: Vs from a few tens of m/s in very soft soil or peat); used only to warn about unit mix-ups.
PLAUSIBLE_VELOCITY = {"P": (50.0, 15000.0), "S": (20.0, 10000.0)}
#: "Far outside" the prior: apparent velocities more than this factor below or above its vp range.
PRIOR_FACTOR = 3.0


def apparent_velocities(picks: PickSet, planet_radius: float | None = None) -> dict[str, np.ndarray]:
    """Straight-line source-receiver distance over travel time, per wave, for first-arriving picks.

    For a first arrival the straight line is the shortest path, so this ratio lies
    between the slowest and the fastest velocity the wave meets (Fermat's principle).
    Reflections (and picks with unknown origin times or zero distance) are left out.

    Parameters
    ----------
    picks : PickSet
        The picks (distances in the run's length unit, times in s).
    planet_radius : float, optional
        Planet radius [km] of a spherical model; distances are then arc lengths
        and the straight line is the chord.

    Returns
    -------
    dict
        Wave name -> (k,) apparent velocities [length unit / s].
    """
    zs = np.asarray(picks.source_depth, dtype=float)
    zr = np.asarray(picks.receiver_depth, dtype=float)
    x = np.asarray(picks.distance, dtype=float)
    if planet_radius:
        rs, rr = planet_radius - zs, planet_radius - zr
        length = np.sqrt(np.maximum(rs**2 + rr**2 - 2 * rs * rr * np.cos(x / planet_radius), 0.0))
    else:
        length = np.hypot(x, zr - zs)
    t = np.asarray(picks.travel_time, dtype=float)
    ok = (picks.branch != "reflection") & np.isfinite(length) & np.isfinite(t) & (t > 0) & (length > 0)
    return {w: length[ok & (picks.wave == w)] / t[ok & (picks.wave == w)] for w in ("P", "S")
            if np.any(ok & (picks.wave == w))}


def _likely_cause(direction: str, units: str, picks: PickSet) -> str:
    """One sentence naming the probable unit mix-up and what to do about it."""
    if direction == "slow":
        causes = ["times (and sigma) in milliseconds instead of seconds -- divide both columns by 1000"]
        if units == "m":
            causes.append('distances in kilometres while the run description says units = "m" -- set '
                          'units = "km" and give the priors in km and km/s, or convert the distances to metres')
        sig = float(np.median(picks.sigma))
        extra = (f" The median sigma, {sig:.3g} s, is also large for a pick uncertainty, which points to "
                 "milliseconds.") if sig >= 0.05 and units == "m" else ""
        return "Likely cause: " + "; or ".join(causes) + "." + extra
    if units == "km":
        return ('Likely cause: distances in metres while the run description says units = "km" -- set '
                'units = "m" and give the priors in m and m/s, or convert the distances to kilometres.')
    return ("Likely cause: distances in a unit smaller than metres, or times in a unit larger than seconds; "
            "the picks need distances in the run's length unit (the units key) and times in seconds.")


def plausibility_warnings(problem: Problem, classic_velocities=None) -> list[str]:
    """Warnings when the picks' velocities do not fit the units or the priors (empty when they do).

    Compares the median apparent velocity of every wave (:func:`apparent_velocities`)
    and the intercept-time velocities (if given) with plausible velocities of earth
    materials (:data:`PLAUSIBLE_VELOCITY`, converted to the run's units) and the
    P velocities with the range of the ``vp_k`` priors. A factor of 1000 off
    points to times in ms or distances in the wrong length unit.

    Parameters
    ----------
    problem : Problem
        The inversion problem (picks, priors, units).
    classic_velocities : array, optional
        Velocities of the intercept-time estimate [length unit / s].
    """
    units = problem.units
    scale = 1.0 if units == "m" else 1e-3  # m/s -> the run's velocity unit
    vu = f"{units}/s"
    radius = getattr(problem.layers, "planet_radius", None) if problem.sphere else None
    apparent = apparent_velocities(problem.picks, radius)
    vp_names = [n for n in problem.prior.priors if n.startswith("vp_")]
    prior_lo = prior_hi = None
    if vp_names:
        ends = []
        for n in vp_names:
            d = problem.prior.priors[n]
            ends += ([float(d.ppf(1e-3)), float(d.ppf(1 - 1e-3))] if hasattr(d, "ppf") else [float(d.value)] * 2)
        prior_lo, prior_hi = min(ends), max(ends)
    out = []
    for wave, v in apparent.items():
        lo, hi = (b * scale for b in PLAUSIBLE_VELOCITY[wave])
        med = float(np.median(v))
        q = np.percentile(v, [5, 95])
        direction = "slow" if med < lo else "fast" if med > hi else ""
        against = f"what earth materials have ({lo:g}-{hi:g} {vu} for {wave}; common practice)"
        if not direction and wave == "P" and prior_lo is not None:
            if med < prior_lo / PRIOR_FACTOR or med > prior_hi * PRIOR_FACTOR:
                direction = "slow" if med < prior_lo / PRIOR_FACTOR else "fast"
                against = f"the prior's P velocities ({prior_lo:.4g}-{prior_hi:.4g} {vu})"
        if not direction:
            continue
        t = np.asarray(problem.picks.travel_time, dtype=float)
        t_max = float(np.nanmax(t)) if np.any(np.isfinite(t)) else float("nan")
        x_max = float(np.nanmax(problem.picks.distance))
        cause = _likely_cause(direction, units, problem.picks)
        if against.startswith("the prior"):
            cause = (f"Likely cause: the priors are written in other units than the picks (with units = "
                     f"{units!r} they must be in {units} and {vu}), or " + cause[len("Likely cause: "):])
        out.append(
            f"WARNING: implausible {wave} velocities: the {wave} picks imply apparent velocities "
            f"(straight-line distance / travel time) of {q[0]:.3g}-{q[1]:.3g} {vu} (median {med:.3g} {vu}; "
            f"travel times up to {t_max:.4g} s over distances up to {x_max:.4g} {units}), far "
            f"{'below' if direction == 'slow' else 'above'} {against}. "
            + cause
            + " Fix the files or the units key and run 'invert check' again; an inversion of these numbers "
              "as they are would not describe the site.")
    if classic_velocities is not None and not out:
        v = np.asarray(classic_velocities, dtype=float)
        v = v[np.isfinite(v)]
        lo, hi = (b * scale for b in PLAUSIBLE_VELOCITY["P"])
        if v.size and (v.max() < lo or v.min() > hi):
            direction = "slow" if v.max() < lo else "fast"
            out.append(f"WARNING: the intercept-time P velocities ({', '.join(f'{x:.3g}' for x in v)} {vu}) lie "
                       f"far {'below' if direction == 'slow' else 'above'} what earth materials have "
                       f"({lo:g}-{hi:g} {vu}; common practice). "
                       + _likely_cause(direction, units, problem.picks))
    return out


def prior_support_error(problem: Problem, rng: np.random.Generator | None = None, n: int = 256) -> str:
    """A sentence when no prior draw gives a usable model for these picks ("" when some do)."""
    rng = np.random.default_rng(0) if rng is None else rng
    draws = valid_prior_draws(problem, 1, rng, max_rounds=max(1, n // 64))
    if draws.shape[0]:
        return ""
    return (f"the prior has zero support for these picks: none of {max(1, n // 64) * 64} prior draws gives a "
            "model with a finite posterior (a valid layer model that predicts every pick); widen the priors or "
            "relax the constraints, and check the units of the picks")


def prepare_folder(folder: Path, resume: bool, overwrite: bool) -> None:
    """Create the output folder; refuse to mix a new run into an old one."""
    folder = Path(folder)
    if folder.exists() and any(folder.iterdir()) and not resume:
        if not overwrite:
            raise FileExistsError(f"output folder {folder} already holds a run; use --resume to continue it or "
                                  "--overwrite to start again (or change [output] folder)")
        for name in ("checkpoint.h5", "posterior.nc", "summary.csv", "summary.json", "convergence.json",
                     "convergence.txt", "config.toml", "config_resolved.json"):
            if (folder / name).exists():
                (folder / name).unlink()
    folder.mkdir(parents=True, exist_ok=True)


def run_inversion(config_path, *, resume: bool = False, overwrite: bool = False, progress: bool = True,
                  quiet: bool = False, steps: int | None = None, report_hint: bool = True) -> RunOutput:
    """Run the inversion described by ``config_path`` and write its folder.

    Parameters
    ----------
    config_path : path
        Run description (TOML; docs/config.md).
    resume : bool
        Continue from the folder's checkpoint (same data, prior and settings).
    overwrite : bool
        Replace the results of an earlier run in the output folder.
    progress : bool
        Show a progress bar.
    quiet : bool
        Print nothing but errors.
    steps : int, optional
        Override ``[sampler] steps``.
    report_hint : bool
        End with the command that writes the report (False when the caller writes it).
    """
    config = load_config(config_path)
    if steps is not None:
        if not config.sampler.until_converged and int(steps) <= config.sampler.burn:
            from .config import ConfigError

            raise ConfigError(config.path, "sampler", f"--steps {int(steps)} must be larger than burn = "
                                                      f"{config.sampler.burn}")
        config = dataclasses.replace(config, sampler=dataclasses.replace(config.sampler, steps=int(steps)))
    picks, kept = load_picks(config)
    _say(f"Data: {picks.describe()}", quiet)
    if kept:
        _say(kept, quiet)
    for message in data_checks(picks):
        _say(message, quiet)
    problem = build_problem(config, picks)
    from .config import model_words

    _say(f"Model: {model_words(config.layers, problem.ndim)}: {', '.join(problem.names)}", quiet)
    for message in plausibility_warnings(problem):
        print(message, file=sys.stderr, flush=True)
    support = prior_support_error(problem)
    if support:
        from .config import ConfigError

        raise ConfigError(config.path, "prior", support)
    if config.sampler.walkers < 2 * problem.ndim:
        from .config import ConfigError

        raise ConfigError(config.path, "sampler", f"walkers = {config.sampler.walkers} is too few for "
                                                  f"{problem.ndim} free parameters: the ensemble moves need at "
                                                  f"least 2 x parameters = {2 * problem.ndim} walkers per ensemble "
                                                  f"(an even number); set walkers = {2 * problem.ndim} or more")
    folder = Path(config.output)
    prepare_folder(folder, resume, overwrite)
    s = config.sampler
    checkpoint = folder / "checkpoint.h5"
    if resume and checkpoint.exists():
        from .config import ConfigError
        from .sample import checkpoint_settings

        why = resume_mismatch(checkpoint, config, problem)
        if why:
            raise ConfigError(config.path, "", why)
        saved = checkpoint_settings(checkpoint)
        if steps is not None and int(steps) < saved["target_steps"]:
            _say(f"note: --steps {int(steps)} is fewer than the {saved['target_steps']} steps per ensemble this run "
                 f"already has or was set to reach ({max(saved['steps'])} done); the run continues to "
                 f"{saved['target_steps']} steps. To continue further, give a larger --steps; to take fewer, "
                 "start again with --overwrite.", quiet)
    rng = np.random.default_rng(s.seed)
    initial = None if resume else starting_points(problem, config, rng, quiet=quiet)
    with chain_layout_warning_off():
        result = run_ensembles(problem.log_prob, initial, s.steps, seed=s.seed,
                               checkpoint=folder / "checkpoint.h5", resume=resume, progress=progress and not quiet,
                               checkpoint_every=s.checkpoint_every, until=True if s.until_converged else None,
                               max_steps=s.max_steps if s.until_converged else None,
                               parameter_names=problem.names, fingerprint=fingerprint(config),
                               fingerprint_parts=fingerprint_parts(config), moves=default_moves())
        burn = s.burn if not s.until_converged else None
        report = convergence_report(result, burn=burn, thin=s.thin)
        summary = write_outputs(folder, config, problem, result, report, rng)
    _say(report.summary(), quiet)
    if not report.converged:
        if s.until_converged:
            _say(f"To continue: raise [sampler] max_steps (now {s.max_steps}) in {config.path} and run: "
                 f"invert run {config.path} --resume", quiet)
        else:
            _say(f"To continue this run: invert run {config.path} --resume --steps "
                 f"{suggested_steps(result, report)}", quiet)
    _say(f"Results written to {folder}/ (posterior.nc, summary.csv, convergence.txt)"
         + (f"; make the report with: invert report {folder}" if report_hint else ""), quiet)
    return RunOutput(folder, config, problem, result, report, summary)


# ----------------------------------------------------------------------------- outputs
def kept_samples(result: SamplerResult, burn: int, thin: int) -> np.ndarray:
    """Posterior samples (chains = ensembles x walkers, draws, D) after burn-in and thinning."""
    chain = result.chain[:, burn::thin]  # (E, S, W, D)
    e, n, w, d = chain.shape
    return np.transpose(chain, (0, 2, 1, 3)).reshape(e * w, n, d)


def derived_values(problem: Problem, flat: np.ndarray) -> dict[str, np.ndarray]:
    """Interface depths / thicknesses and S velocities implied by samples (S, D)."""
    model, ok = problem.models(flat)
    out: dict[str, np.ndarray] = {}
    n = problem.layers.n_layers
    full = {}
    if model is not None:
        full["depth"] = np.full((flat.shape[0], n), np.nan)
        full["depth"][ok] = model.interface_depths
        full["thickness"] = np.full((flat.shape[0], n), np.nan)
        full["thickness"][ok] = model.thickness
        full["vs"] = np.full((flat.shape[0], n + 1), np.nan)
        full["vs"][ok] = model.vs
    other = "thickness" if problem.layers.depth_parameter else "depth"
    for k in range(1, n + 1):
        if other in full:
            out[f"{other}_{k}"] = full[other][:, k - 1]
    if problem.layers.vpvs_mode in ("per_layer", "shared") and "vs" in full:
        for k in range(1, n + 2):
            out[f"vs_{k}"] = full["vs"][:, k - 1]
    return out


def build_inference_data(problem: Problem, config: RunConfig, result: SamplerResult, burn: int, thin: int,
                         rng: np.random.Generator):
    """ArviZ InferenceData with posterior, log likelihood, prior, observed data and posterior predictive."""
    import arviz as az

    samples = kept_samples(result, burn, thin)  # (C, N, D)
    c, n, d = samples.shape
    posterior = {name: samples[:, :, i] for i, name in enumerate(problem.names)}
    flat = samples.reshape(c * n, d)
    derived = derived_values(problem, flat)
    posterior.update({k: v.reshape(c, n) for k, v in derived.items()})
    # pointwise log likelihood and posterior predictive on a thinned subset of draws
    n_points = {"pick": problem.picks.n_picks, "event": problem.picks.n_sources, "total": 1}[problem.pointwise_kind]
    width = max(n_points, problem.picks.n_picks)
    draws = max(MAX_POINTWISE_VALUES / width, min(MIN_POINTWISE_DRAWS, POINTWISE_CEILING / width))
    step = max(1, int(np.ceil(c * n / draws)))
    sub = samples[:, ::step]
    cs, ns, _ = sub.shape
    sub_flat = sub.reshape(cs * ns, d)
    loglik = problem.log_likelihood(sub_flat, pointwise=True).reshape(cs, ns, n_points)
    pred, _ = problem.travel_times(sub_flat)
    sigma = np.asarray(problem.picks.sigma, dtype=float)
    scale = sub_flat[:, problem.names.index("noise_scale")][:, None] if "noise_scale" in problem.names else 1.0
    replicated = pred + rng.standard_normal(pred.shape) * sigma * scale
    offset = np.where(problem.picks.origin_time_known[problem.picks.source_index],
                      problem.picks.source_origin_time[problem.picks.source_index], np.nan)
    prior_draws = problem.sample_prior(PRIOR_DRAWS, rng)
    prior = {name: prior_draws[None, :, i] for i, name in enumerate(problem.names)}
    prior.update({k: v[None, :] for k, v in derived_values(problem, prior_draws).items()})
    point_dim = {"pick": "pick", "event": "event", "total": "all"}[problem.pointwise_kind]
    picks = problem.picks
    idata = az.from_dict(
        posterior=posterior,
        log_likelihood={"arrival_time": loglik},
        posterior_predictive={"travel_time": replicated.reshape(cs, ns, -1),
                              "predicted_travel_time": pred.reshape(cs, ns, -1)},
        prior=prior,
        observed_data={"arrival_time": np.asarray(picks.time, dtype=float)},
        constant_data={"sigma": sigma, "distance": np.asarray(picks.distance, dtype=float),
                       "source_depth": np.asarray(picks.source_depth, dtype=float),
                       "receiver_depth": np.asarray(picks.receiver_depth, dtype=float),
                       "origin_time": offset,
                       "line": np.asarray(picks.line_numbers, dtype=int)},
        dims={"arrival_time": [point_dim],
              "travel_time": ["pick"], "predicted_travel_time": ["pick"],
              "sigma": ["pick"], "distance": ["pick"], "source_depth": ["pick"], "receiver_depth": ["pick"],
              "origin_time": ["pick"], "line": ["pick"]},
        attrs={"title": config.title, "units": config.units, "inference_library": "emcee",
               "pointwise_log_likelihood": problem.pointwise_kind,
               "pointwise_draw_stride": step, "burn": burn, "thin": thin},
    )
    # observed data lives per pick even when the likelihood is per event
    idata.observed_data = idata.observed_data.rename({list(idata.observed_data.dims)[0]: "pick"})
    for group in ("observed_data", "constant_data", "posterior_predictive"):
        ds = getattr(idata, group)
        ds.coords["pick"] = np.arange(picks.n_picks)
        ds.coords["source"] = ("pick", np.asarray(picks.source_id, dtype=str))
        ds.coords["receiver"] = ("pick", np.asarray(picks.receiver_id, dtype=str))
        ds.coords["wave"] = ("pick", np.asarray(picks.wave, dtype=str))
        ds.coords["branch"] = ("pick", np.asarray(picks.branch, dtype=str))
        ds.coords["interface"] = ("pick", np.asarray(picks.interface, dtype=int))
    units = problem.parameter_units()
    for name in problem.names:
        idata.posterior[name].attrs["units"] = units[name]
    return idata


def summary_rows(idata, problem: Problem, report: ConvergenceReport) -> list[dict]:
    """Summary table rows: every parameter and derived depth/velocity with intervals and diagnostics."""
    units = problem.parameter_units()
    idx = {n: i for i, n in enumerate(report.parameter_names)}
    rows = []
    for name in idata.posterior.data_vars:
        x = np.asarray(idata.posterior[name]).ravel()
        x = x[np.isfinite(x)]
        if x.size == 0:
            continue
        q = np.percentile(x, [2.5, 16, 50, 84, 97.5])
        family = name.rsplit("_", 1)[0]
        unit = units.get(name) or {"depth": problem.units, "thickness": problem.units,
                                   "vs": f"{problem.units}/s"}.get(family, "")
        row = {"parameter": name, "unit": unit, "kind": "sampled" if name in idx else "derived",
               "mean": float(x.mean()), "median": float(q[2]), "sd": float(x.std(ddof=1)) if x.size > 1 else 0.0,
               "low_68": float(q[1]), "high_68": float(q[3]), "low_95": float(q[0]), "high_95": float(q[4]),
               "rhat": float(report.rhat[idx[name]]) if name in idx else None,
               "ess_bulk": float(report.ess_bulk[idx[name]]) if name in idx else None,
               "ess_tail": float(report.ess_tail[idx[name]]) if name in idx else None}
        rows.append(row)
    return rows


def _csv(rows: list[dict], digits: int = 6) -> str:
    """CSV text of ``rows`` (dicts with the same keys): floats to ``digits`` significant digits, None empty."""
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=list(rows[0].keys()), lineterminator="\n")
    writer.writeheader()
    for r in rows:
        writer.writerow({k: ("" if v is None else (f"{v:.{digits}g}" if isinstance(v, float) else v))
                         for k, v in r.items()})
    return buf.getvalue()


def _jsonable(obj):
    if dataclasses.is_dataclass(obj):
        return {k: _jsonable(v) for k, v in dataclasses.asdict(obj).items()}
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, Path):
        return str(obj)
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    if isinstance(obj, (np.floating, float)):
        return float(obj) if np.isfinite(obj) else str(float(obj))
    if isinstance(obj, np.integer):
        return int(obj)
    return obj


def convergence_dict(report: ConvergenceReport) -> dict:
    """The convergence report as plain JSON-friendly values."""
    return _jsonable({
        "converged": report.converged, "verdict": report.verdict, "burn": report.burn, "thin": report.thin,
        "kept_steps": report.kept_steps,
        "parameters": {n: {"rhat": report.rhat[i], "ess_bulk": report.ess_bulk[i], "ess_tail": report.ess_tail[i],
                           "tau": report.tau[i], "run_over_tau": report.tau_multiple[i]}
                       for i, n in enumerate(report.parameter_names)},
        "acceptance": report.acceptance, "stuck_walkers": [list(s) for s in report.stuck],
        "failures": list(report.failures), "notes": list(report.notes),
        "targets": dataclasses.asdict(report.targets),
    })


def write_outputs(folder: Path, config: RunConfig, problem: Problem, result: SamplerResult,
                  report: ConvergenceReport, rng: np.random.Generator) -> list[dict]:
    """Write every output file of a run atomically; returns the summary rows."""
    folder = Path(folder)
    idata = build_inference_data(problem, config, result, report.burn, report.thin, rng)
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=".posterior.nc.", suffix=".tmp")
    os.close(fd)
    try:
        os.chmod(tmp, 0o644)
        idata.to_netcdf(tmp)
        os.replace(tmp, folder / "posterior.nc")
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    rows = summary_rows(idata, problem, report)
    write_atomic(folder / "summary.csv", _csv(rows))
    write_atomic(folder / "summary.json", json.dumps(_jsonable({"title": config.title, "units": config.units,
                                                                "converged": report.converged,
                                                                "rows": rows}), indent=2))
    write_atomic(folder / "convergence.json", json.dumps(convergence_dict(report), indent=2))
    write_atomic(folder / "convergence.txt", report.summary() + "\n")
    write_atomic(folder / "config.toml", Path(config.path).read_bytes())
    resolved = {k: v for k, v in dataclasses.asdict(config).items() if k != "raw"}
    for key in ("path", "picks", "sources", "receivers", "output"):
        if resolved.get(key) is not None:
            resolved[key] = str(Path(resolved[key]).resolve())
    resolved["fingerprint"] = fingerprint(config)
    resolved["parameters"] = problem.names
    resolved["python"] = sys.version.split()[0]
    write_atomic(folder / "config_resolved.json", json.dumps(_jsonable(resolved), indent=2))
    return rows

