"""Model comparison by evidence, and the low-velocity-zone test.

* :func:`compare_models` -- several run descriptions (candidate
  parameterisations of the same picks) -> log evidence of each by the
  estimators of :mod:`invert.evidence`, Bayes factors, posterior model
  probabilities with error bars, verbal strength on the scale of Kass &
  Raftery ("Bayes factors", J. Am. Stat. Assoc. 90, 1995, sec. 3.2; from
  memory: on 2 ln B the steps are 2, 6 and 10, i.e. about 1, 3 and 5 in
  ln B), a model-averaged velocity-depth density and the posterior of the
  number of layers. Written to a folder as CSV, JSON and a Markdown section.
* :func:`lvz_test` -- a monotone-velocity parameterisation against one that
  lets a chosen layer (or each layer in turn) be slower than the layer
  above: Bayes factor, probability of a velocity inversion, the one-run
  cross-check of the nested pair, and a plain statement of what the data can
  and cannot see.
* :func:`add_commands` -- the ``invert compare`` and ``invert lvz-test``
  commands.

Model probabilities use one log Z per candidate: the inverse-variance
weighted mean of the estimators that were run, or, when they disagree beyond
their stated errors, their plain mean with an error that covers both (and
the disagreement is reported).
"""

from __future__ import annotations

import dataclasses
import io
import json
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import evidence as ev
from .config import ConfigError, RunConfig, load_config
from .problem import Problem, build_problem

__all__ = [
    "EvidenceSettings", "Candidate", "ModelEvidence", "Comparison", "kass_raftery", "model_evidence",
    "combine_estimates", "model_probabilities", "compare_models", "velocity_density", "lvz_test",
    "read_candidate_list", "add_commands", "report_markdown", "ESTIMATORS",
]

ESTIMATORS = ("nested", "stepping")
PROPOSALS = ("rwalk", "rslice", "unif", "auto")
#: Draws used to propagate log Z errors into model probabilities.
PROBABILITY_DRAWS = 20000


# ============================================================================ settings
@dataclass(frozen=True)
class EvidenceSettings:
    """How the evidence of each candidate is estimated (TOML section ``[evidence]``).

    Attributes
    ----------
    estimators : tuple of str
        ``'nested'`` (nested sampling) and/or ``'stepping'`` (stepping-stone).
    live_points : int
        Nested sampling: live points (error ~ sqrt(information / live_points)).
    proposal : str
        Nested sampling: dynesty proposal, ``'rwalk'`` (default; random walks,
        robust on curved trade-offs), ``'rslice'``, ``'unif'`` or ``'auto'``.
    rungs : int
        Stepping-stone: number of ratios along the ladder.
    ladder_power : float
        Stepping-stone: inverse temperatures ``(i / rungs) ** ladder_power``.
    walkers : int or None
        Stepping-stone: walkers per rung (default max(32, 4 x parameters)).
    rung_steps, rung_burn : int
        Stepping-stone: kept and discarded steps per rung.
    seed : int
        Seed of both estimators.
    """

    estimators: tuple = ESTIMATORS
    live_points: int = 400
    proposal: str = "rwalk"
    rungs: int = 24
    ladder_power: float = 5.0
    walkers: int | None = None
    rung_steps: int = 1000
    rung_burn: int = 200
    seed: int = 1

    def __post_init__(self):
        bad = [e for e in self.estimators if e not in ESTIMATORS]
        if bad or not self.estimators:
            raise ValueError(f"estimators: expected one or both of {', '.join(ESTIMATORS)}; "
                             f"got {list(self.estimators)}")
        if self.proposal not in PROPOSALS:
            raise ValueError(f"proposal: expected one of {', '.join(PROPOSALS)}; got {self.proposal!r}")
        for key in ("live_points", "rungs", "rung_steps"):
            if int(getattr(self, key)) < 1:
                raise ValueError(f"{key}: expected a positive integer; got {getattr(self, key)!r}")
        if self.rung_burn < 0:
            raise ValueError(f"rung_burn: expected an integer >= 0; got {self.rung_burn!r}")
        if not self.ladder_power >= 1:
            raise ValueError(f"ladder_power: expected a number >= 1; got {self.ladder_power!r}")


_SETTING_KEYS = {f.name for f in dataclasses.fields(EvidenceSettings)}


def settings_from_table(table: dict, path="evidence settings") -> EvidenceSettings:
    """:class:`EvidenceSettings` from a ``[evidence]`` TOML table (errors name the file and key)."""
    unknown = sorted(set(table) - _SETTING_KEYS)
    if unknown:
        raise ConfigError(path, "evidence", f"unknown key {unknown[0]!r}; allowed: {', '.join(sorted(_SETTING_KEYS))}")
    values = dict(table)
    if "estimators" in values:
        values["estimators"] = tuple(values["estimators"])
    try:
        return EvidenceSettings(**values)
    except (TypeError, ValueError) as exc:
        raise ConfigError(path, "evidence", str(exc)) from None


# ============================================================================ one model
@dataclass
class Candidate:
    """One parameterisation to compare: a name, its run description and its prior weight."""

    name: str
    config: RunConfig
    prior_odds: float = 1.0
    problem: Problem | None = None

    def build(self) -> Problem:
        if self.problem is None:
            self.problem = build_problem(self.config)
        return self.problem


@dataclass
class ModelEvidence:
    """The evidence of one candidate by every estimator run, and their combination."""

    name: str
    n_layers: int
    n_parameters: int
    estimates: dict  # estimator key -> EvidenceResult
    log_z: float
    log_z_error: float
    agreement: dict | None
    notes: list = field(default_factory=list)

    def posterior_draws(self) -> tuple[np.ndarray, str]:
        """Equal-weight posterior draws (nested sampling's when run) and the estimator they come from."""
        key = "nested" if "nested" in self.estimates else "stepping"
        return self.estimates[key].samples, key


def model_evidence(problem: Problem, settings: EvidenceSettings, *, name: str = "", progress: bool = True,
                   n_layers: int | None = None) -> ModelEvidence:
    """Run the chosen estimators on one problem (same likelihood and normalised prior as a run).

    Nested sampling uses the prior's unit-cube transform (ordered constraints
    included); where the prior has none (a coupled constraint handled by
    Monte Carlo) it is skipped with a note and the stepping-stone estimate
    is used alone.
    """
    estimates, notes = {}, []
    if "nested" in settings.estimators:
        if problem.prior.has_unit_cube_transform:
            estimates["nested"] = ev.nested_sampling(
                problem.log_likelihood, problem.from_unit_cube, problem.ndim, live_points=settings.live_points,
                sample=settings.proposal, seed=settings.seed, progress=progress, label=name)
        else:
            notes.append(f"{name}: nested sampling skipped: this prior has no unit-cube transform "
                         "(a coupled constraint handled by Monte Carlo; see docs/priors.md)")
    if "stepping" in settings.estimators or not estimates:
        estimates["stepping"] = ev.stepping_stone(
            problem.log_likelihood, problem.log_prior, problem.sample_prior, problem.ndim, rungs=settings.rungs,
            power=settings.ladder_power, walkers=settings.walkers, steps=settings.rung_steps, burn=settings.rung_burn,
            seed=settings.seed, progress=progress, label=name)
    if problem.prior.log_normaliser_error > 0.01:
        notes.append(f"{name}: the prior's normalising constant carries a numerical error of "
                     f"{problem.prior.log_normaliser_error:.3f} nats (added to the stated error)")
    log_z, err, agree = combine_estimates(list(estimates.values()))
    err = math.hypot(err, problem.prior.log_normaliser_error)
    for r in estimates.values():
        notes.extend(f"{name}: {n}" for n in r.notes)
    if agree is not None and not agree["agree"]:
        notes.append(f"{name}: {agree['message']}")
    layers = n_layers if n_layers is not None else problem.layers.n_layers
    return ModelEvidence(name, int(layers), problem.ndim, estimates, log_z, err, agree, notes)


def combine_estimates(results: list) -> tuple[float, float, dict | None]:
    """One log Z from one or two estimates: (value, error, agreement or None).

    Agreeing estimates are averaged with inverse-variance weights. When they
    disagree (:data:`invert.evidence.DISAGREEMENT_SIGMAS`), the value is
    their plain mean and the error adds half their difference in quadrature
    to the combined error, so that it covers both.
    """
    if not results:
        raise ValueError("no estimates to combine")
    if len(results) == 1:
        return float(results[0].log_z), float(results[0].log_z_error), None
    if len(results) != 2:
        raise ValueError("combine_estimates takes one or two estimates")
    a, b = results
    agree = ev.agreement(a, b)
    if agree["agree"]:
        wa, wb = 1.0 / a.log_z_error ** 2, 1.0 / b.log_z_error ** 2
        return float((wa * a.log_z + wb * b.log_z) / (wa + wb)), float(1.0 / math.sqrt(wa + wb)), agree
    mean = 0.5 * (a.log_z + b.log_z)
    return float(mean), float(math.hypot(agree["combined_error"], 0.5 * agree["difference"])), agree


# ============================================================================ probabilities
def kass_raftery(log_b: float) -> str:
    """Verbal strength of a Bayes factor B >= 1 given as ln B (Kass & Raftery 1995, sec. 3.2; from memory).

    Their scale is on 2 ln B: 0-2 "not worth more than a bare mention",
    2-6 "positive", 6-10 "strong", above 10 "very strong".
    """
    two = 2.0 * abs(float(log_b))
    if two < 2:
        return "not worth more than a bare mention"
    if two < 6:
        return "positive"
    if two < 10:
        return "strong"
    return "very strong"


def at_prior_cap(log_b: float, log_b_error: float, log_cap: float) -> bool:
    """Whether ln B (slower : monotone) sits at the most the prior lets any data give the monotone model.

    The encompassing-prior identity caps B(monotone : slower) at 1 / P(monotone)
    (see :func:`invert.evidence.encompassing_bayes_factor`). The value is "at the
    cap" when it favours the monotone model and ``-log_b`` reaches
    ``log_cap`` within twice its stated error.

    Parameters
    ----------
    log_b : float
        ln B (slower : monotone) [nats].
    log_b_error : float
        Its standard error [nats].
    log_cap : float
        ln (1 / P(monotone)) under the permissive prior [nats].
    """
    log_b, log_b_error, log_cap = float(log_b), float(log_b_error), float(log_cap)
    if not (math.isfinite(log_b) and math.isfinite(log_cap)) or log_b >= 0:
        return False
    err = log_b_error if math.isfinite(log_b_error) else 0.0
    return -log_b >= log_cap - 2.0 * err


def lvz_strength(log_b: float, log_b_error: float, log_cap: float, first_arrivals_only: bool = False) -> str:
    """Verbal strength of ln B (slower : monotone) for the low-velocity-zone test.

    The Kass & Raftery label (:func:`kass_raftery`), except when ln B sits at
    the prior's cap (:func:`at_prior_cap`): then the size of ln B is set by the
    prior, not by the data, and the label says so.

    Parameters
    ----------
    log_b, log_b_error : float
        ln B (slower : monotone) and its standard error [nats].
    log_cap : float
        ln (1 / P(monotone)) under the permissive prior [nats].
    first_arrivals_only : bool
        Whether the data hold first arrivals only.
    """
    if at_prior_cap(log_b, log_b_error, log_cap):
        text = (f"at the prior's limit (cap {float(log_cap):.2f}): not evidence from the data" if first_arrivals_only
                else f"at the prior's limit (cap {float(log_cap):.2f}): its size is set by the prior")
        return text
    return kass_raftery(log_b) + (" (within twice the error)" if abs(log_b) < 2 * log_b_error else "")


def model_probabilities(log_z: np.ndarray, log_z_error: np.ndarray, prior_odds: np.ndarray,
                        rng: np.random.Generator | None = None, draws: int = PROBABILITY_DRAWS) -> dict:
    """Posterior model probabilities and their error bars.

    P(m | d) = w_m Z_m / sum_j w_j Z_j with prior weights w (normalised).
    The errors propagate the log Z errors by drawing every log Z from a normal
    with its stated error (independently) and recomputing.

    Returns
    -------
    dict
        ``prior`` (M,), ``probability`` (M,) at the point estimates,
        ``error`` (M,) standard deviation over the draws, ``low``/``high``
        (M,) 2.5 and 97.5 percentiles.
    """
    log_z = np.asarray(log_z, dtype=float)
    err = np.asarray(log_z_error, dtype=float)
    w = np.asarray(prior_odds, dtype=float)
    if np.any(w < 0) or not np.any(w > 0):
        raise ValueError("prior odds must be >= 0 with at least one > 0")
    prior = w / w.sum()
    with np.errstate(divide="ignore"):
        log_prior = np.log(prior)

    def probs(lz):
        a = lz + log_prior
        a = a - np.max(a, axis=-1, keepdims=True)
        e = np.exp(a)
        return e / e.sum(axis=-1, keepdims=True)

    point = probs(log_z)
    rng = rng if rng is not None else np.random.default_rng(0)
    sims = probs(log_z + err * rng.standard_normal((draws, log_z.size)))
    return {"prior": prior, "probability": point, "error": sims.std(axis=0, ddof=1),
            "low": np.percentile(sims, 2.5, axis=0), "high": np.percentile(sims, 97.5, axis=0), "draws": sims}


# ============================================================================ model average
def velocity_density(models: list, weights: np.ndarray, *, n_depth: int = 120, n_velocity: int = 150,
                     max_depth: float | None = None, draws: int = 4000, wave: str = "P",
                     rng: np.random.Generator | None = None) -> dict:
    """Model-averaged velocity-depth density: each model's posterior mixed by its probability.

    Parameters
    ----------
    models : list of (Problem, draws (S, D))
        Every candidate's problem and equal-weight posterior draws.
    weights : array (M,)
        Posterior model probabilities.
    n_depth, n_velocity : int
        Grid size.
    max_depth : float, optional
        Deepest depth of the grid (default 1.3 x the largest 97.5 % point of
        the deepest interface over the models with weight > 1e-3).
    draws : int
        Draws in the mixture used for the quantiles.
    wave : {'P', 'S'}

    Sphere runs (``problem.sphere``) are read as the planets their
    likelihood uses (:meth:`~invert.problem.Problem.radial_models`): the
    velocity at each depth follows the shell laws
    (:meth:`invert.sphere.RadialModel.profile`), draws that make no planet are
    left out, and the grid stops at the centre (the smallest planet radius).

    Returns
    -------
    dict
        ``depth`` (Z,), ``velocity`` (V,) bin centres, ``density`` (Z, V)
        (each depth row integrates to 1 over velocity), ``quantiles``
        {level: (Z,)} for 2.5, 16, 50, 84, 97.5 %, ``per_model`` draw counts.
    """
    rng = rng if rng is not None else np.random.default_rng(0)
    weights = np.asarray(weights, dtype=float)
    deep, vmin, vmax = 0.0, np.inf, -np.inf
    built, centre = [], np.inf
    for (problem, theta), w in zip(models, weights):
        if getattr(problem, "sphere", False):
            radial, ok = problem.radial_models(theta)
            layer_model = None if radial is None else problem.models(np.asarray(theta)[ok])[0]
            centre = min(centre, float(problem.layers.planet_radius))
        else:
            radial = None
            layer_model, ok = problem.models(theta)
        built.append(layer_model if radial is None else radial)
        if layer_model is None:
            continue
        top, _ = layer_model.velocity(wave)
        base = layer_model.base_velocity(wave)
        finite = np.concatenate([top.ravel(), base[np.isfinite(base)].ravel()])
        if radial is not None:  # shell laws run outside the end velocities (faster inside a 'flat' shell)
            finite = np.concatenate([finite, radial.profile(np.linspace(0.0, centre, 101), wave).ravel()])
        if w > 1e-3:
            if layer_model.interface_depths.shape[1]:
                deep = max(deep, float(np.percentile(layer_model.interface_depths[:, -1], 97.5)))
            vmin, vmax = min(vmin, float(np.percentile(finite, 0.5))), max(vmax, float(np.percentile(finite, 99.5)))
    if not np.isfinite(vmin):
        raise ValueError("no model has usable posterior draws")
    zmax = float(max_depth) if max_depth is not None else (1.3 * deep if deep > 0 else 1.0)
    if max_depth is None:
        zmax = min(zmax, centre)
    elif zmax > centre:
        raise ValueError(f"max_depth: {zmax:g} km lies below the centre of the planet (radius {centre:g} km)")
    depth = np.linspace(0.0, zmax, n_depth)
    span = vmax - vmin
    edges = np.linspace(max(0.0, vmin - 0.05 * span), vmax + 0.05 * span, n_velocity + 1)
    centres = 0.5 * (edges[1:] + edges[:-1])
    width = np.diff(edges)
    density = np.zeros((n_depth, n_velocity))
    counts = rng.multinomial(draws, weights / weights.sum())
    mixture = []
    for layer_model, w, count in zip(built, weights, counts):
        if layer_model is None or w <= 0:
            continue
        prof = layer_model.profile(depth, wave)  # (S, Z)
        idx = np.clip(np.searchsorted(edges, prof, side="right") - 1, 0, n_velocity - 1)
        hist = np.zeros((n_depth, n_velocity))
        np.add.at(hist, (np.broadcast_to(np.arange(n_depth), prof.shape), idx), 1.0)
        hist /= prof.shape[0] * width[None, :]
        density += w * hist
        if count:
            mixture.append(prof[rng.integers(0, prof.shape[0], size=count)])
    density /= max(weights.sum(), 1e-300)
    mix = np.concatenate(mixture, axis=0)
    levels = (2.5, 16.0, 50.0, 84.0, 97.5)
    q = np.percentile(mix, levels, axis=0)
    return {"depth": depth, "velocity": centres, "density": density, "quantiles": dict(zip(levels, q)),
            "per_model": counts, "wave": wave}


# ============================================================================ comparison
@dataclass
class Comparison:
    """What :func:`compare_models` produced (also written to ``folder``)."""

    folder: Path | None
    rows: list
    models: list
    layer_count: list
    density: dict | None
    notes: list
    markdown: str


def compare_models(candidates: list, settings: EvidenceSettings | None = None, *, folder=None,
                   title: str = "Model comparison", progress: bool = True, quiet: bool = True,
                   overwrite: bool = False) -> Comparison:
    """Evidence, Bayes factors and model probabilities of candidate parameterisations.

    Parameters
    ----------
    candidates : list of Candidate
        Parameterisations of the same picks (the same data files are required:
        evidences of different data sets are not comparable).
    settings : EvidenceSettings
    folder : path, optional
        Where to write ``comparison.csv``, ``comparison.json``, ``layer_count.csv``,
        ``velocity_density.csv``, ``velocity_quantiles.csv``, ``velocity_density.png``, ``comparison.md``.
    title : str
    progress, quiet : bool
    overwrite : bool
        Replace an earlier comparison in ``folder``.

    Returns
    -------
    Comparison
    """
    settings = settings or EvidenceSettings()
    if len(candidates) < 2:
        raise ValueError("a comparison needs at least two candidates")
    names = [c.name for c in candidates]
    if len(set(names)) != len(names):
        raise ValueError(f"candidate names must differ; got {names}")
    _same_data(candidates)
    folder = _prepare(folder, "comparison.json", overwrite)
    results = []
    for c in candidates:
        problem = c.build()
        _say(f"{c.name}: {problem.ndim} free parameters ({', '.join(problem.names)})", quiet)
        me = model_evidence(problem, settings, name=c.name, progress=progress, n_layers=c.config.layers.n_layers)
        for r in me.estimates.values():
            _say(f"  {r.describe()}", quiet)
        results.append(me)
    log_z = np.array([m.log_z for m in results])
    err = np.array([m.log_z_error for m in results])
    odds = np.array([c.prior_odds for c in candidates], dtype=float)
    probs = model_probabilities(log_z, err, odds, rng=np.random.default_rng(settings.seed))
    best = int(np.argmax(log_z + np.log(np.maximum(probs["prior"], 1e-300))))
    rows = []
    for i, (c, m) in enumerate(zip(candidates, results)):
        d = float(m.log_z - results[best].log_z)
        d_err = float(math.hypot(m.log_z_error, results[best].log_z_error)) if i != best else 0.0
        row = {"model": c.name, "layers_above_half_space": m.n_layers, "free_parameters": m.n_parameters}
        for key, label in (("nested", "nested"), ("stepping", "stepping_stone")):
            r = m.estimates.get(key)
            row[f"log_z_{label}"] = None if r is None else r.log_z
            row[f"log_z_{label}_error"] = None if r is None else r.log_z_error
        row.update({"estimators_agree": None if m.agreement is None else m.agreement["agree"],
                    "log_z": m.log_z, "log_z_error": m.log_z_error, "delta_log_z": d, "delta_log_z_error": d_err,
                    "bayes_factor_vs_best": math.exp(d), "prior_probability": float(probs["prior"][i]),
                    "posterior_probability": float(probs["probability"][i]),
                    "posterior_probability_error": float(probs["error"][i]),
                    "posterior_probability_low95": float(probs["low"][i]),
                    "posterior_probability_high95": float(probs["high"][i]),
                    "strength": "best" if i == best else _strength_text(-d, d_err, candidates[best].name)})
        rows.append(row)
    layer_rows = _layer_count(rows, probs)
    density = None
    notes = [n for m in results for n in m.notes]
    try:
        density = velocity_density([(c.problem, m.posterior_draws()[0]) for c, m in zip(candidates, results)],
                                   probs["probability"], rng=np.random.default_rng(settings.seed))
        density["units"] = candidates[0].config.units
    except ValueError as exc:
        notes.append(f"no model-averaged velocity density: {exc}")
    md = _comparison_markdown(title, rows, layer_rows, settings, notes, results)
    comp = Comparison(folder, rows, results, layer_rows, density, notes, md)
    if folder is not None:
        _write_comparison(folder, comp, title, settings)
        _say(f"Comparison written to {folder}/ (comparison.csv, comparison.json, comparison.md, layer_count.csv, "
             "velocity_density.csv, velocity_quantiles.csv, velocity_density.png)", quiet)
    return comp


def _strength_text(log_b: float, err: float, best: str) -> str:
    words = kass_raftery(log_b)
    text = f"{words} for {best}"
    if abs(log_b) < 2 * err:
        text += " (within twice the error)"
    return text


def _layer_count(rows: list, probs: dict) -> list:
    counts = sorted({r["layers_above_half_space"] for r in rows})
    out = []
    for n in counts:
        sel = [i for i, r in enumerate(rows) if r["layers_above_half_space"] == n]
        sims = probs["draws"][:, sel].sum(axis=1)
        out.append({"layers_above_half_space": n, "layers_with_half_space": n + 1,
                    "prior_probability": float(sum(probs["prior"][i] for i in sel)),
                    "posterior_probability": float(sum(probs["probability"][i] for i in sel)),
                    "posterior_probability_error": float(sims.std(ddof=1)),
                    "models": ", ".join(rows[i]["model"] for i in sel)})
    return out


def _same_data(candidates: list) -> None:
    first = candidates[0].config
    for c in candidates[1:]:
        for key in ("picks", "sources", "receivers"):
            a, b = getattr(first, key), getattr(c.config, key)
            same = (a is None and b is None) or (a is not None and b is not None and
                                                 Path(a).read_bytes() == Path(b).read_bytes())
            if not same:
                raise ConfigError(c.config.path, "data",
                                  f"{key} differs from that of {candidates[0].name} ({a} vs {b}); evidences of "
                                  "different data are not comparable")
        if c.config.units != first.units:
            raise ConfigError(c.config.path, "", f"units = {c.config.units!r} but {candidates[0].name} uses "
                                                 f"{first.units!r}; the likelihoods would not be comparable")


def _say(msg: str, quiet: bool) -> None:
    if not quiet:
        print(msg, flush=True)


def _prepare(folder, marker: str, overwrite: bool):
    if folder is None:
        return None
    folder = Path(folder)
    if (folder / marker).exists() and not overwrite:
        raise FileExistsError(f"{folder} already holds a result ({marker}); use --overwrite or another folder")
    folder.mkdir(parents=True, exist_ok=True)
    return folder


def _fmt(x, digits=3) -> str:
    if x is None:
        return ""
    if isinstance(x, bool):
        return "yes" if x else "NO"
    if isinstance(x, (float, np.floating)):
        if not np.isfinite(x):
            return str(x)
        if abs(x) >= 1e5 or (abs(x) < 1e-3 and x != 0):
            return f"{x:.{digits}e}"
        return f"{x:.{digits}f}"
    return str(x)


def _csv_text(rows: list) -> str:
    from .run import _csv

    return _csv(rows, digits=8)


def _comparison_markdown(title: str, rows: list, layer_rows: list, settings: EvidenceSettings, notes: list,
                         results: list) -> str:
    lines = [f"## {title}", "",
             "Evidence (marginal likelihood, natural logs) of each candidate parameterisation of the same picks, "
             "with the same likelihood and normalised priors as the ordinary run. Posterior model probabilities "
             "use the stated prior weights; their ranges propagate the log Z errors.", ""]
    bad = [m.name for m in results if m.agreement is not None and not m.agreement["agree"]]
    if bad:
        lines += [f"**The two estimators disagree for {', '.join(bad)}**: the log Z used for them is the mean of the "
                  "two with an error that covers both, and the probabilities below are only as good as that. Run "
                  "longer (more live points, rungs or steps) before drawing conclusions.", ""]
    lines += ["| model | layers over half-space | free parameters | log Z nested | log Z stepping-stone | "
              "log Z used | Δ log Z to best | Bayes factor vs best | prior P | posterior P (95 % range) | strength |",
              "|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in rows:
        ns = "" if r["log_z_nested"] is None else f"{r['log_z_nested']:.2f} ± {r['log_z_nested_error']:.2f}"
        ss = "" if r["log_z_stepping_stone"] is None else \
            f"{r['log_z_stepping_stone']:.2f} ± {r['log_z_stepping_stone_error']:.2f}"
        lines.append(f"| {r['model']} | {r['layers_above_half_space']} | {r['free_parameters']} | {ns} | {ss} | "
                     f"{r['log_z']:.2f} ± {r['log_z_error']:.2f} | {r['delta_log_z']:.2f} | "
                     f"{_fmt(r['bayes_factor_vs_best'])} | {r['prior_probability']:.3f} | "
                     f"{r['posterior_probability']:.3f} ({r['posterior_probability_low95']:.3f}–"
                     f"{r['posterior_probability_high95']:.3f}) | {r['strength']} |")
    lines += ["", "Number of layers:", "",
              "| layers over half-space | with half-space | prior P | posterior P | models |", "|---|---|---|---|---|"]
    for r in layer_rows:
        lines.append(f"| {r['layers_above_half_space']} | {r['layers_with_half_space']} | "
                     f"{r['prior_probability']:.3f} | {r['posterior_probability']:.3f} ± "
                     f"{r['posterior_probability_error']:.3f} | {r['models']} |")
    lines += ["", "Model-averaged velocity against depth (every model's posterior weighted by its probability): "
              "`velocity_density.csv`, `velocity_quantiles.csv`, figure `velocity_density.png`.", "",
              "![model-averaged velocity-depth density](velocity_density.png)"]
    lines += ["", "Agreement of the two estimators:", ""]
    for m in results:
        if m.agreement is None:
            lines.append(f"- {m.name}: one estimator only.")
        else:
            lines.append(f"- {m.name}: {m.agreement['message']}")
    lines += ["", "Verbal strength: Kass & Raftery (1995) on 2 ln B (0–2 not worth more than a bare mention, 2–6 "
              "positive, 6–10 strong, > 10 very strong); a Bayes factor depends on the priors, which set how much "
              "parameter room each model pays for (Occam's razor).", ""]
    lines.append(f"Settings: estimators {', '.join(settings.estimators)}; nested sampling {settings.live_points} live "
                 f"points ({settings.proposal} proposals); stepping-stone {settings.rungs} rungs, ladder power "
                 f"{settings.ladder_power:g}, {settings.rung_steps} kept + {settings.rung_burn} discarded steps per "
                 f"rung; seed {settings.seed}.")
    if notes:
        lines += ["", "Notes:", ""] + [f"- {n}" for n in notes]
    return "\n".join(lines) + "\n"


def _write_comparison(folder: Path, comp: Comparison, title: str, settings: EvidenceSettings) -> None:
    from .run import write_atomic

    write_atomic(folder / "comparison.csv", _csv_text(comp.rows))
    write_atomic(folder / "layer_count.csv", _csv_text(comp.layer_count))
    units = comp.density.get("units", "") if comp.density is not None else ""
    doc = {"title": title, "units": units, "settings": dataclasses.asdict(settings), "models": comp.rows,
           "layer_count": comp.layer_count, "notes": comp.notes,
           "estimates": {m.name: {k: r.to_dict() for k, r in m.estimates.items()} for m in comp.models}}
    write_atomic(folder / "comparison.json", json.dumps(ev._plain(doc), indent=2))
    write_atomic(folder / "comparison.md", comp.markdown)
    if comp.density is not None:
        _write_density(folder, comp.density)
        _density_figure(folder / "velocity_density.png", comp.density, title)


def _write_density(folder: Path, density: dict) -> None:
    from .run import write_atomic

    buf = io.StringIO()
    buf.write("depth,velocity,density\n")
    for i, z in enumerate(density["depth"]):
        for j, v in enumerate(density["velocity"]):
            buf.write(f"{z:.6g},{v:.6g},{density['density'][i, j]:.6g}\n")
    write_atomic(folder / "velocity_density.csv", buf.getvalue())
    q = density["quantiles"]
    lines = ["depth," + ",".join(f"q{lvl:g}" for lvl in q)]
    for i, z in enumerate(density["depth"]):
        lines.append(f"{z:.6g}," + ",".join(f"{q[lvl][i]:.6g}" for lvl in q))
    write_atomic(folder / "velocity_quantiles.csv", "\n".join(lines) + "\n")


def _density_figure(path: Path, density: dict, title: str) -> None:
    """PNG of the model-averaged density (shaded by the square root of its ratio to the peak at each depth)
    with its median and 95 % band."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(5.0, 5.5), dpi=110)
    v, z, d = density["velocity"], density["depth"], density["density"]
    peak = np.max(d, axis=1, keepdims=True)
    shade = np.sqrt(np.divide(d, peak, out=np.zeros_like(d), where=peak > 0))  # relative to each depth's peak
    ax.pcolormesh(v, z, shade, shading="auto", cmap="Greys", vmin=0.0, vmax=1.0)
    q = density["quantiles"]
    ax.plot(q[50.0], z, color="tab:red", lw=1.2, label="median")
    ax.plot(q[2.5], z, color="tab:red", lw=0.8, ls="--", label="95 % range")
    ax.plot(q[97.5], z, color="tab:red", lw=0.8, ls="--")
    ax.set_ylim(z[-1], z[0])
    units = density.get("units", "")
    ax.set_xlabel(f"{density['wave']} velocity" + (f" [{units}/s]" if units else ""))
    ax.set_ylabel("depth" + (f" [{units}]" if units else ""))
    ax.set_title(title, fontsize=9)
    ax.legend(loc="lower left", fontsize=8)
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    plt.close(fig)
    from .run import write_atomic

    write_atomic(path, buf.getvalue())


def report_markdown(folder) -> str:
    """The Markdown section written by :func:`compare_models` or :func:`lvz_test` in ``folder`` (for the report)."""
    folder = Path(folder)
    for name in ("comparison.md", "lvz_test.md"):
        if (folder / name).exists():
            return (folder / name).read_text()
    raise FileNotFoundError(f"{folder} holds no comparison.md or lvz_test.md")


# ============================================================================ candidate lists
_LIST_KEYS = {"title", "candidate", "evidence", "output"}
_CANDIDATE_KEYS = {"name", "config", "prior_odds"}


def is_candidate_list(path) -> bool:
    """True if the TOML file at ``path`` lists candidates (``[[candidate]]``) rather than describing a run."""
    try:
        with open(path, "rb") as fh:
            return "candidate" in tomllib.load(fh)
    except (OSError, tomllib.TOMLDecodeError):
        return False


def read_candidate_list(path) -> tuple[str, list, EvidenceSettings, Path]:
    """Read a comparison file: ``title``, ``[[candidate]]`` (name, config, prior_odds), ``[evidence]``, ``[output]``.

    Returns (title, candidates, settings, output folder). Paths are relative to the file.
    """
    path = Path(path)
    if not path.exists():
        raise ConfigError(path, "", "file not found")
    try:
        with open(path, "rb") as fh:
            doc = tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(path, "", f"not valid TOML: {exc}") from None
    unknown = sorted(set(doc) - _LIST_KEYS)
    if unknown:
        raise ConfigError(path, "", f"unknown key {unknown[0]!r}; allowed: {', '.join(sorted(_LIST_KEYS))}")
    items = doc.get("candidate")
    if not isinstance(items, list) or len(items) < 2:
        raise ConfigError(path, "candidate", "expected at least two [[candidate]] tables "
                                             "(name = ..., config = \"run.toml\", prior_odds = 1.0)")
    candidates = []
    for i, item in enumerate(items, start=1):
        where = f"candidate {i}"
        bad = sorted(set(item) - _CANDIDATE_KEYS)
        if bad:
            raise ConfigError(path, where, f"unknown key {bad[0]!r}; allowed: {', '.join(sorted(_CANDIDATE_KEYS))}")
        if not isinstance(item.get("config"), str):
            raise ConfigError(path, where, "missing 'config' (the run description of this candidate)")
        cfg_path = Path(item["config"])
        cfg_path = cfg_path if cfg_path.is_absolute() else path.parent / cfg_path
        odds = item.get("prior_odds", 1.0)
        if isinstance(odds, bool) or not isinstance(odds, (int, float)) or not odds >= 0:
            raise ConfigError(path, where, f"prior_odds = {odds!r}: expected a number >= 0")
        config = load_config(cfg_path)
        candidates.append(Candidate(str(item.get("name", cfg_path.stem)), config, float(odds)))
    settings = settings_from_table(doc.get("evidence", {}), path)
    out = doc.get("output", {})
    if set(out) - {"folder"}:
        raise ConfigError(path, "output", "only 'folder' is allowed")
    folder = Path(out.get("folder", f"runs/{path.stem}"))
    folder = folder if folder.is_absolute() else path.parent / folder
    return str(doc.get("title", "Model comparison")), candidates, settings, folder


# ============================================================================ low-velocity zone
def with_constraints(config: RunConfig, *, slower: list) -> RunConfig:
    """The run description with ``increasing_velocity = true`` and ``slower_allowed = slower``."""
    constraints = {k: v for k, v in config.constraints.items() if k != "slower_allowed"}
    constraints["increasing_velocity"] = True
    if slower:
        constraints["slower_allowed"] = list(slower)
    return dataclasses.replace(config, constraints=constraints)


def inversion_mask(problem: Problem, theta: np.ndarray, layer: int) -> np.ndarray:
    """Draws (S,) in which layer ``layer`` is slower (P) at its top than the base of the layer above."""
    model, ok = problem.models(theta)
    out = np.zeros(theta.shape[0], dtype=bool)
    if model is None:
        return out
    top, _ = model.velocity("P")
    base = model.base_velocity("P")
    out[ok] = top[:, layer - 1] < base[:, layer - 2]
    return out


def interface_depth(problem: Problem, theta: np.ndarray, k: int) -> np.ndarray:
    """Depth of interface k (base of layer k) per draw (S,); NaN for invalid draws."""
    model, ok = problem.models(theta)
    out = np.full(theta.shape[0], np.nan)
    if model is not None:
        out[ok] = model.interface_depths[:, k - 1]
    return out


def data_coverage(problem: Problem, layer: int) -> dict:
    """What kinds of picks the data hold, as far as they bear on a slower layer ``layer``."""
    picks = problem.picks
    wave = np.asarray(picks.wave)
    branch = np.asarray(picks.branch)
    iface = np.asarray(picks.interface)
    reflections_below = int(np.sum((branch == "reflection") & (iface >= layer)))
    reflections = int(np.sum(branch == "reflection"))
    s_picks = int(np.sum(wave == "S"))
    zs = np.asarray(picks.source_depth, dtype=float)
    zr = np.asarray(picks.receiver_depth, dtype=float)
    buried = int(np.sum((np.nan_to_num(zs) > 0) | (np.nan_to_num(zr) > 0)))
    first_only = reflections == 0 and buried == 0
    return {"picks": int(picks.n_picks), "reflections": reflections,
            "reflections_from_base_or_below": reflections_below, "s_picks": s_picks,
            "buried_sources_or_receivers": buried, "first_arrivals_only": first_only}


def _prior_probability_monotone(mono: Problem, perm: Problem, rng: np.random.Generator, layer: int,
                                n: int = 20000) -> dict:
    """P(no inversion at ``layer``) under the permissive prior: exact from the normalisers, and by Monte Carlo."""
    exact = math.exp(mono.prior.log_normaliser - perm.prior.log_normaliser)
    err = math.hypot(mono.prior.log_normaliser_error, perm.prior.log_normaliser_error) * exact
    draws = perm.sample_prior(n, rng)
    mc = float(np.mean(~inversion_mask(perm, draws, layer)))
    return {"exact": exact, "exact_error": err, "monte_carlo": mc, "monte_carlo_error": math.sqrt(mc * (1 - mc) / n)}


def _posterior_ess(result: ev.EvidenceResult, indicator: np.ndarray) -> float:
    if result.method == "nested sampling":
        return float(min(result.details.get("posterior_ess", indicator.size), indicator.size))
    walkers = int(result.details["walkers"])
    per_step = indicator.reshape(-1, walkers).mean(axis=1)
    return float(indicator.size / ev._integrated_time(per_step))


def _sensitivity(perm: Problem, mono: Problem, perm_draws: np.ndarray, mono_draws: np.ndarray, layer: int,
                 rng: np.random.Generator) -> list:
    """Prior-to-posterior contraction and the shift between models for the parameters around the slower layer."""
    prior = perm.sample_prior(20000, rng)
    rows = []
    watch = {f"vp_{layer - 1}", f"vp_{layer}", f"thickness_{layer - 1}", f"thickness_{layer}",
             f"depth_{layer - 1}", f"depth_{layer}", f"vp_{layer + 1}"}
    for i, name in enumerate(perm.names):
        if name not in watch:
            continue
        sd_prior = float(np.std(prior[:, i]))
        sd_post = float(np.std(perm_draws[:, i]))
        med_perm = float(np.median(perm_draws[:, i]))
        med_mono = float(np.median(mono_draws[:, mono.names.index(name)])) if name in mono.names else math.nan
        rows.append({"parameter": name, "prior_sd": sd_prior, "posterior_sd": sd_post,
                     "contraction": 1.0 - (sd_post / sd_prior) ** 2 if sd_prior > 0 else math.nan,
                     "median_permissive": med_perm, "median_monotone": med_mono,
                     "shift_in_sd": (med_mono - med_perm) / sd_post if sd_post > 0 else math.nan})
    k = layer
    if k <= perm.layers.n_layers:
        zp = interface_depth(perm, perm_draws, k)
        zm = interface_depth(mono, mono_draws, k)
        sd = float(np.nanstd(zp))
        rows.append({"parameter": f"depth of interface {k} (top of the refractor below)", "prior_sd": math.nan,
                     "posterior_sd": sd, "contraction": math.nan, "median_permissive": float(np.nanmedian(zp)),
                     "median_monotone": float(np.nanmedian(zm)),
                     "shift_in_sd": (float(np.nanmedian(zm)) - float(np.nanmedian(zp))) / sd if sd > 0 else math.nan})
    return rows


def lvz_test(config_path, *, layer: int | None = None, settings: EvidenceSettings | None = None, folder=None,
             progress: bool = True, quiet: bool = True, overwrite: bool = False) -> dict:
    """Is a slower layer demanded? Monotone velocities against a slower layer at ``layer`` (or each in turn).

    Parameters
    ----------
    config_path : path
        A run description; its ``[constraints]`` are replaced by
        ``increasing_velocity = true`` (monotone) and, for the permissive
        model, ``slower_allowed = [layer]``.
    layer : int, optional
        Layer number 2..N+1 that may be slower than the layer above; None
        tests each in turn.
    settings : EvidenceSettings
    folder : path, optional
        Where ``lvz_test.json``, ``lvz_test.csv`` and ``lvz_test.md`` go.
    progress, quiet, overwrite : bool

    Returns
    -------
    dict
        ``monotone`` (log Z ...), ``tests``: one entry per layer tested with
        the Bayes factor (permissive : monotone), P(inversion | data) and its
        prior value, the one-run cross-check, the parameters the verdict
        moves, the data coverage; ``markdown``.
    """
    settings = settings or EvidenceSettings()
    config = load_config(config_path)
    n = config.layers.n_layers
    if n < 1:
        raise ConfigError(config.path, "model", "layers = 0: a slower layer needs at least one layer over the "
                                                "half-space")
    layers = list(range(2, n + 2)) if layer is None else [int(layer)]
    for k in layers:
        if not 2 <= k <= n + 1:
            raise ConfigError(config.path, "model", f"--layer {k}: expected a layer number 2..{n + 1} (layer 1 "
                                                    "has no layer above it)")
    folder = _prepare(folder, "lvz_test.json", overwrite)
    mono = build_problem(with_constraints(config, slower=[]))
    _say(f"monotone model: {mono.ndim} free parameters", quiet)
    mono_ev = model_evidence(mono, settings, name="monotone", progress=progress)
    mono_draws, _ = mono_ev.posterior_draws()
    rng = np.random.default_rng(settings.seed)
    tests = []
    for k in layers:
        perm = build_problem(with_constraints(config, slower=[k]))
        name = f"layer {k} may be slower"
        perm_ev = model_evidence(perm, settings, name=name, progress=progress)
        draws, key = perm_ev.posterior_draws()
        inv = inversion_mask(perm, draws, k)
        prior_mono = _prior_probability_monotone(mono, perm, rng, k)
        cross = ev.encompassing_bayes_factor(~inv, prior_mono["exact"],
                                             _posterior_ess(perm_ev.estimates[key], ~inv))
        log_b = perm_ev.log_z - mono_ev.log_z
        log_b_err = math.hypot(perm_ev.log_z_error, mono_ev.log_z_error)
        two_run = -log_b  # ln B(monotone : permissive)
        if cross["upper_bound_only"]:
            consistent = two_run <= cross["log_bayes_factor"] + 3 * log_b_err
        else:
            consistent = abs(two_run - cross["log_bayes_factor"]) <= 3 * math.hypot(log_b_err,
                                                                                 cross["log_bayes_factor_error"])
        coverage = data_coverage(perm, k)
        tests.append({
            "layer": k, "log_z_permissive": perm_ev.log_z, "log_z_permissive_error": perm_ev.log_z_error,
            "log_bayes_factor": log_b, "log_bayes_factor_error": log_b_err,
            "favours": "slower layer" if log_b > 0 else "monotone",
            "strength": lvz_strength(log_b, log_b_err, cross["log_cap"], coverage["first_arrivals_only"]),
            "at_prior_cap": at_prior_cap(log_b, log_b_err, cross["log_cap"]),
            "posterior_inversion_probability": float(inv.mean()),
            "posterior_inversion_probability_error": cross["posterior_probability_error"],
            "prior_inversion_probability": 1.0 - prior_mono["exact"],
            "prior_monotone_probability_check": prior_mono,
            "one_run_log_bayes_factor_monotone": cross["log_bayes_factor"],
            "one_run_log_bayes_factor_monotone_error": cross["log_bayes_factor_error"],
            "one_run_upper_bound_only": cross["upper_bound_only"],
            "log_cap_monotone": cross["log_cap"],
            "one_run_agrees_with_two_runs": bool(consistent),
            "estimates": {kk: r.to_dict() for kk, r in perm_ev.estimates.items()},
            "estimators_agree": None if perm_ev.agreement is None else perm_ev.agreement["agree"],
            "sensitivity": _sensitivity(perm, mono, draws, mono_draws, k, rng),
            "coverage": coverage, "notes": perm_ev.notes,
        })
    result = {"config": str(config.path), "title": config.title, "units": config.units,
              "settings": dataclasses.asdict(settings),
              "monotone": {"log_z": mono_ev.log_z, "log_z_error": mono_ev.log_z_error,
                           "estimates": {kk: r.to_dict() for kk, r in mono_ev.estimates.items()},
                           "estimators_agree": None if mono_ev.agreement is None else mono_ev.agreement["agree"],
                           "notes": mono_ev.notes},
              "tests": tests}
    result["markdown"] = _lvz_markdown(result)
    if folder is not None:
        from .run import write_atomic

        write_atomic(folder / "lvz_test.json", json.dumps(ev._plain({k: v for k, v in result.items()
                                                                      if k != "markdown"}), indent=2))
        write_atomic(folder / "lvz_test.md", result["markdown"])
        flat = [{kk: v for kk, v in t.items() if not isinstance(v, (dict, list))} for t in tests]
        write_atomic(folder / "lvz_test.csv", _csv_text(flat))
        _say(f"Low-velocity-zone test written to {folder}/ (lvz_test.md, lvz_test.json, lvz_test.csv)", quiet)
    _say(result["markdown"], quiet)
    return result


FIRST_ARRIVAL_LIMIT = (
    "A slower layer gives no head wave at its top, so first arrivals never come from it. With first arrivals "
    "alone its presence trades off with the depth of the refractor below it: the slow layer delays the head "
    "wave from that refractor, and a model without it explains the delay by putting the refractor deeper "
    "(ignoring a slower layer makes the refractor below look deeper).")


#: Said of a layer whose ln B (monotone : slower) sits at the cap ln(1 / P(monotone)).
LVZ_AT_CAP = ("ln B (monotone : slower) = {log_b:.2f} is at the prior's limit, ln(1/P(monotone)) = {cap:.2f}: "
              "no data could favour the monotone model more under these priors. Its size measures the prior room "
              "given to a slower layer, not evidence from the data.")


def lvz_test_strength(test: dict) -> str:
    """:func:`lvz_strength` of one entry of ``lvz_test(...)["tests"]`` (also of one read back from ``lvz_test.json``)."""
    return lvz_strength(test["log_bayes_factor"], test["log_bayes_factor_error"], test["log_cap_monotone"],
                        bool(test.get("coverage", {}).get("first_arrivals_only", False)))


def _lvz_markdown(result: dict) -> str:
    units = result["units"]
    mono = result["monotone"]
    lines = ["## Low-velocity-zone test", "",
             f"Run description: {result['config']}. Monotone model (velocity never decreases downward): "
             f"log Z = {mono['log_z']:.2f} ± {mono['log_z_error']:.2f}.", ""]
    if mono["estimators_agree"] is False:
        lines += ["**The two estimators disagree for the monotone model** (see notes); the Bayes factors below "
                  "are uncertain beyond their stated errors.", ""]
    lines += ["| slower layer allowed | log Z | ln B (slower : monotone) | favours | strength | P(inversion) prior | "
              "P(inversion \\| data) | one-run ln B (monotone : slower) | cap ln(1/P(monotone)) | "
              "one run vs two runs |",
              "|---|---|---|---|---|---|---|---|---|---|"]
    for t in result["tests"]:
        one = (f"< {t['one_run_log_bayes_factor_monotone']:.2f}" if t["one_run_upper_bound_only"] else
               f"{t['one_run_log_bayes_factor_monotone']:.2f} ± {t['one_run_log_bayes_factor_monotone_error']:.2f}")
        lines.append(f"| {t['layer']} | {t['log_z_permissive']:.2f} ± {t['log_z_permissive_error']:.2f} | "
                     f"{t['log_bayes_factor']:+.2f} ± {t['log_bayes_factor_error']:.2f} | {t['favours']} | "
                     f"{lvz_test_strength(t)} | {t['prior_inversion_probability']:.3f} | "
                     f"{t['posterior_inversion_probability']:.3f} ± "
                     f"{t['posterior_inversion_probability_error']:.3f} | "
                     f"{one} | {t['log_cap_monotone']:.2f} | "
                     f"{'agree' if t['one_run_agrees_with_two_runs'] else 'DISAGREE'} |")
    lines += ["", "The one-run cross-check uses the permissive run alone: B(monotone : slower) = P(monotone | data) / "
              "P(monotone), both under the permissive model. Since P(monotone | data) cannot exceed 1, no data can "
              "give the monotone model more than 1 / P(monotone) in its favour (the cap column, in nats): when the "
              "permissive prior already gives most of its mass to monotone profiles, the monotone model can never "
              "be strongly favoured, whatever the data.", ""]
    for t in result["tests"]:
        k = t["layer"]
        cov = t["coverage"]
        lines += [f"### Slower layer {k}", ""]
        lines.append(FIRST_ARRIVAL_LIMIT)
        lines.append("")
        if cov["first_arrivals_only"]:
            lines.append("**These data hold first arrivals only** (no reflections, no buried sources or receivers): "
                         "the verdict is driven by the prior — by how much prior room the slower layer's velocity "
                         "and thickness are given — not by the data. Read the Bayes factor as a statement about the "
                         "priors.")
        elif cov["reflections_from_base_or_below"] == 0 and cov["buried_sources_or_receivers"] == 0:
            lines.append(f"The data hold reflections, but none from interface {k} (the base of layer {k}) or "
                         "below, and no buried sources or receivers: the slower layer is still seen only "
                         "through the delay it adds, and the verdict leans on the prior.")
        else:
            lines.append(f"The data hold {cov['reflections_from_base_or_below']} reflection pick(s) from interface "
                         f"{k} or below and {cov['buried_sources_or_receivers']} pick(s) with buried sources or "
                         "receivers: these see the slower layer's travel time directly.")
        if at_prior_cap(t["log_bayes_factor"], t["log_bayes_factor_error"], t["log_cap_monotone"]):
            lines += ["", LVZ_AT_CAP.format(log_b=-t["log_bayes_factor"], cap=t["log_cap_monotone"])]
        lines += ["", "What the verdict moves (permissive model; contraction = 1 − posterior variance / prior "
                      "variance, near 0 means the data say nothing about the parameter; shift = monotone median "
                      "minus permissive median, in permissive posterior sd):", "",
                  "| parameter | contraction | median (slower allowed) | median (monotone) | shift (sd) |",
                  "|---|---|---|---|---|"]
        for s in t["sensitivity"]:
            lines.append(f"| {s['parameter']} | {_fmt(s['contraction'], 2)} | {_fmt(s['median_permissive'])} | "
                         f"{_fmt(s['median_monotone'])} | {_fmt(s['shift_in_sd'], 2)} |")
        sens = [s["parameter"] for s in t["sensitivity"] if np.isfinite(s["shift_in_sd"]) and abs(s["shift_in_sd"]) > 1]
        weak = [s["parameter"] for s in t["sensitivity"] if np.isfinite(s["contraction"]) and s["contraction"] < 0.5]
        lines.append("")
        if sens:
            lines.append(f"The test is sensitive to: {', '.join(sens)} (they move by more than one posterior sd "
                         "between the two models).")
        else:
            lines.append("No parameter near the slower layer moves by more than one posterior sd between the models.")
        if weak:
            lines.append(f"Poorly constrained by the data (contraction < 0.5): {', '.join(weak)}; the verdict on "
                         "them comes from their priors.")
        lines += ["", f"To resolve a slower layer {k}: reflections from its base (interface {k}) give its two-way "
                      "time and, with offset, its velocity; S waves see it separately (an S low-velocity zone need "
                      "not coincide with a P one); a borehole (sensors in and below the layer, or a log) measures "
                      f"its velocity directly. Depths in {units}.", ""]
        if t["estimators_agree"] is False:
            lines.append("**The two estimators disagree for this permissive model**; see the notes.")
        if not t["one_run_agrees_with_two_runs"]:
            lines.append("**The one-run cross-check disagrees with the two-run Bayes factor**: at least one of the "
                         "evidence estimates (or the posterior fraction) is off; run longer before trusting either.")
        for note in t["notes"]:
            lines.append(f"- {note}")
        lines.append("")
    for note in mono["notes"]:
        lines.append(f"- {note}")
    return "\n".join(lines) + "\n"


# ============================================================================ command line
def _settings_from_args(args, base: EvidenceSettings | None = None) -> EvidenceSettings:
    base = base or EvidenceSettings()
    values = dataclasses.asdict(base)
    if args.estimators:
        values["estimators"] = tuple(e.strip() for e in args.estimators.split(",") if e.strip())
    for key in ("live_points", "proposal", "rungs", "ladder_power", "walkers", "rung_steps", "rung_burn", "seed"):
        v = getattr(args, key, None)
        if v is not None:
            values[key] = v
    try:
        return EvidenceSettings(**values)
    except ValueError as exc:
        raise ConfigError("command line", "evidence", str(exc)) from None


def _add_evidence_options(p) -> None:
    g = p.add_argument_group("evidence estimators")
    g.add_argument("--estimators", help="comma-separated: nested, stepping (default both)")
    g.add_argument("--live-points", dest="live_points", type=int, help="nested sampling live points (default 400)")
    g.add_argument("--proposal", choices=PROPOSALS, help="nested sampling proposal (default rwalk)")
    g.add_argument("--rungs", type=int, help="stepping-stone ratios along the ladder (default 24)")
    g.add_argument("--ladder-power", dest="ladder_power", type=float, help="ladder (i/K)^power (default 5)")
    g.add_argument("--walkers", type=int, help="stepping-stone walkers per rung")
    g.add_argument("--rung-steps", dest="rung_steps", type=int, help="kept steps per rung (default 1000)")
    g.add_argument("--rung-burn", dest="rung_burn", type=int, help="discarded steps per rung (default 200)")
    g.add_argument("--seed", type=int, help="seed of both estimators (default 1)")
    p.add_argument("--out", help="output folder")
    p.add_argument("--overwrite", action="store_true", help="replace an earlier result in the output folder")
    p.add_argument("--quiet", action="store_true", help="print nothing but errors")
    p.add_argument("--no-progress", action="store_true", help="no progress bars")


def _cmd_compare(args) -> int:
    if len(args.configs) == 1 and is_candidate_list(args.configs[0]):
        title, candidates, settings, folder = read_candidate_list(args.configs[0])
        settings = _settings_from_args(args, settings)
        if args.prior_odds:
            raise ConfigError(args.configs[0], "candidate", "give prior_odds in the file, not with --prior-odds")
    else:
        if len(args.configs) < 2:
            raise ConfigError("command line", "", "give at least two run descriptions, or one file with "
                                                  "[[candidate]] tables")
        odds = args.prior_odds or [1.0] * len(args.configs)
        if len(odds) != len(args.configs):
            raise ConfigError("command line", "", f"--prior-odds has {len(odds)} values for {len(args.configs)} "
                                                  "run descriptions")
        candidates = []
        for path, w in zip(args.configs, odds):
            config = load_config(path)
            candidates.append(Candidate(Path(path).stem, config, float(w)))
        settings = _settings_from_args(args)
        title, folder = "Model comparison", Path("runs/comparison")
    if args.out:
        folder = Path(args.out)
    compare_models(candidates, settings, folder=folder, title=title, progress=not (args.no_progress or args.quiet),
                   quiet=args.quiet, overwrite=args.overwrite)
    if not args.quiet:
        print((folder / "comparison.md").read_text())
    return 0


def _cmd_lvz(args) -> int:
    settings = _settings_from_args(args)
    config = load_config(args.config)
    folder = Path(args.out) if args.out else config.output.parent / f"{config.output.name}-lvz-test"
    lvz_test(args.config, layer=None if args.each_layer else args.layer, settings=settings, folder=folder,
             progress=not (args.no_progress or args.quiet), quiet=args.quiet, overwrite=args.overwrite)
    return 0


def add_commands(subparsers) -> None:
    """Add ``compare`` and ``lvz-test`` to the ``invert`` command line (argparse subparsers)."""
    c = subparsers.add_parser(
        "compare", help="compare parameterisations of the same picks by their evidence",
        description="Estimate the evidence (marginal likelihood) of each run description by nested sampling and "
                    "the stepping-stone method, and write a table of Bayes factors, posterior model probabilities "
                    "(with error bars), the number-of-layers posterior and a model-averaged velocity-depth "
                    "density. CONFIG is either two or more run descriptions, or one file listing candidates "
                    "([[candidate]] tables with name, config, prior_odds; optional [evidence] and [output]).")
    c.add_argument("configs", nargs="+", metavar="CONFIG", help="run descriptions, or one candidate list (TOML)")
    c.add_argument("--prior-odds", dest="prior_odds", type=float, nargs="+",
                   help="prior weight of each run description (default equal)")
    _add_evidence_options(c)
    c.set_defaults(func=_cmd_compare)

    lv = subparsers.add_parser(
        "lvz-test", help="is a slower layer (velocity inversion) demanded by the data?",
        description="Compare a monotone-velocity model with one in which a layer may be slower than the layer "
                    "above it: Bayes factor, probability of a velocity inversion, a one-run cross-check, the "
                    "parameters the verdict moves, and what data would resolve it.")
    lv.add_argument("config", help="run description (its [constraints] on velocity order are replaced)")
    where = lv.add_mutually_exclusive_group(required=True)
    where.add_argument("--layer", type=int, help="the layer (2..N+1) that may be slower than the one above")
    where.add_argument("--each-layer", action="store_true", help="test every layer 2..N+1 in turn")
    _add_evidence_options(lv)
    lv.set_defaults(func=_cmd_lvz)
