"""The report of a finished run: one self-contained HTML page and a Markdown summary.

:func:`write_report` reads a run folder (``posterior.nc``, ``convergence.json``,
``config.toml``, ``config_resolved.json``), rebuilds the posterior from the
run's own copy of its description, and writes ``report.html`` (figures
embedded as PNG data; no outside resources, so it opens offline) and
``report.md`` into the folder. Numbers come from :mod:`invert.posterior`,
figures from :mod:`invert.plots`; this module reads, subsamples, arranges and
words them. ``docs/report.md`` explains every section.

Both files are built from one list of blocks (headings, paragraphs, tables,
figures), so that they always say the same thing.
"""

from __future__ import annotations

import base64
import dataclasses
import html
import io
import json
import math
import re
import tempfile
import tomllib
import warnings
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from . import posterior as post
from .config import ConfigError, RunConfig, load_config
from .problem import Problem, build_problem

#: Section anchors and headings, in the order they appear.
SECTIONS = (
    ("run", "What was run"),
    ("convergence", "Did the sampling converge?"),
    ("estimates", "Parameter estimates"),
    ("derived", "Derived quantities"),
    ("probabilities", "Probability statements"),
    ("flags", "Things to check"),
    ("figures", "Figures"),
    ("cautions", "Cautions"),
)

#: File names (without .png) and titles of the figures, in the order they appear.
FIGURES = (
    ("velocity_depth", "Velocity against depth"),
    ("travel_time_fit", "Travel-time fit and residuals"),
    ("corner", "Pairwise marginals (corner plot)"),
    ("prior_posterior", "Prior and posterior of each parameter"),
    ("prior_predictive", "Travel times predicted by the prior"),
    ("traces", "Chain traces"),
    ("convergence", "R-hat and effective sample size"),
)

CAUTIONS = (
    "Every number in this report is an estimate with a stated uncertainty under the model, the priors and the "
    "noise model described above; it is not a measurement, and a narrow interval only says that these data "
    "and these assumptions leave little room. The model is one-dimensional: flat, laterally uniform layers "
    "under the whole survey; dipping or laterally varying ground is averaged, or shows up as misfit. First "
    "arrivals cannot see a layer slower than the one above it (a low-velocity layer), nor a layer too thin to "
    "give a first arrival of its own (a hidden layer): such layers may be present without any sign in these "
    "data, and the depths below them would then be wrong. Structure below the depth of investigation rests "
    "on the prior, not on the data. Engineering decisions (site class, foundations, seismic hazard) follow the "
    "local building code and the judgement of licensed professionals; this report does not replace a site "
    "investigation."
)

#: Closing caution of a run on a spherical planet (``[model] geometry = "sphere"``).
SPHERE_CAUTIONS = (
    "Every number in this report is an estimate with a stated uncertainty under the model, the priors and the "
    "noise model described above; it is not a measurement, and a narrow interval only says that these data "
    "and these assumptions leave little room. The model is spherically symmetric: concentric shells, the same "
    "under every source and station, each following the shell law stated above between the velocities at its "
    "ends; lateral variations and ellipticity are averaged, or show up as misfit. First arrivals cannot see a "
    "shell slower than the one above it, except through the shadow it casts, nor a shell too thin to give a "
    "first arrival of its own: such shells may be present without any sign in these data, and the depths "
    "below them would then be wrong. Whether a diffracted wave along the core boundary was picked as a first "
    "arrival is an assumption of the run (max_diffraction), not something the data decide. Structure below "
    "the depth of investigation rests on the prior, not on the data."
)

#: Default velocity for the depth-to-velocity estimate: Vs 760 m/s, the B/C boundary of
#: ASCE 7-16 Table 20.3-1 (from memory), often read as "bedrock-like" (common practice).
BEDROCK_VS = 760.0
#: Most posterior draws used for forward computations (rays, predicted times) and figures.
MAX_FORWARD_DRAWS = 1000
#: Most posterior draws used for quantities computed from the layer models alone.
MAX_MODEL_DRAWS = 4000
#: Prior draws pushed through the forward model for the prior predictive figure.
PRIOR_PREDICTIVE_DRAWS = 300
#: Walkers per ensemble drawn in the trace figure.
TRACE_WALKERS = 8
#: Widest corner plot [inches]; wider ones are scaled down so that their text stays legible in the page.
MAX_FIGURE_WIDTH = 11.0
#: Most sentences on systematic residuals listed among the flags (the table has them all).
MAX_RESIDUAL_FLAGS = 6
#: Largest number of parameters drawn in the corner plot, traces and prior-vs-posterior panels.
MAX_PANELS = 10

_REQUIRED = ("posterior.nc", "convergence.json", "config.toml", "config_resolved.json")


# =================================================================== blocks
@dataclass
class _Heading:
    anchor: str
    text: str


@dataclass
class _Para:
    text: str
    kind: str = "plain"  # plain, good, bad, note


@dataclass
class _Items:
    items: list


@dataclass
class _Table:
    header: list
    rows: list
    caption: str = ""
    align: str = ""  # one letter per column, 'l' or 'r'; default: first column left, others right

    def alignment(self) -> str:
        given = self.align or "l"
        return (given + given[-1:] * len(self.header))[:len(self.header)] if self.align else \
            "l" + "r" * (len(self.header) - 1)


@dataclass
class _Figure:
    key: str
    title: str
    caption: str
    png: bytes


@dataclass
class _Subheading:
    text: str


# =================================================================== reading a run folder
@dataclass
class RunFolder:
    """A finished run as read back from its folder.

    Attributes
    ----------
    path : Path
        The run folder.
    config : RunConfig
        The run description (the folder's copy, with data paths made absolute).
    problem : Problem
        The posterior, rebuilt from ``config``.
    idata : arviz.InferenceData
        Contents of ``posterior.nc``.
    convergence : dict
        Contents of ``convergence.json``.
    resolved : dict
        Contents of ``config_resolved.json``.
    notes : list of str
        Remarks made while reading (e.g. data files changed since the run).
    """

    path: Path
    config: RunConfig
    problem: Problem
    idata: object
    convergence: dict
    resolved: dict
    notes: list = field(default_factory=list)


def _read_json(path: Path) -> dict:
    if not path.exists():
        raise FileNotFoundError(f"{path}: file not found; is this the output folder of 'invert run'?")
    try:
        return json.loads(path.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ValueError(f"{path}: not valid JSON ({exc})") from None


def _toml_value(value, where: str) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False).replace("\x7f", "\\u007f")
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v, where) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{_toml_key(k)} = {_toml_value(v, where)}" for k, v in value.items()) + "}"
    raise ValueError(f"{where}: value {value!r} of type {type(value).__name__} cannot be carried over")


def _toml_key(key: str) -> str:
    return key if re.fullmatch(r"[A-Za-z0-9_-]+", key) else json.dumps(key, ensure_ascii=False)


def toml_text(table: dict, where: str = "run description") -> str:
    """TOML text of a table as read by ``tomllib`` (scalars, arrays, tables; no dates).

    Top-level tables become ``[section]`` headers; deeper tables are written
    inline. ``tomllib.loads(toml_text(t)) == t`` for such tables.
    """
    lines = [f"{_toml_key(k)} = {_toml_value(v, where)}" for k, v in table.items() if not isinstance(v, dict)]
    for k, v in table.items():
        if isinstance(v, dict):
            lines.append(f"\n[{_toml_key(k)}]")
            lines += [f"{_toml_key(kk)} = {_toml_value(vv, where)}" for kk, vv in v.items()]
    return "\n".join(lines) + "\n"


def _start_folder(run_dir: Path, resolved: dict, config_copy: bytes) -> Path:
    """Folder the run was started from: recorded relative paths are relative to it.

    Tries the run folder's ancestors and the current folder; the first one where
    the recorded run description exists with the same content as the copy wins,
    else the first where every recorded data file exists.
    """
    recorded = [resolved.get(k) for k in ("picks", "sources", "receivers")]
    recorded = [Path(p) for p in recorded if p]
    candidates = list(run_dir.resolve().parents) + [Path.cwd()]
    cfg = Path(resolved.get("path", ""))
    for c in candidates:
        p = cfg if cfg.is_absolute() else c / cfg
        try:
            if p.is_file() and p.read_bytes() == config_copy:
                return c
        except OSError:
            continue
    for c in candidates:
        if recorded and all((p if p.is_absolute() else c / p).exists() for p in recorded):
            return c
    missing = ", ".join(str(p) for p in recorded)
    raise FileNotFoundError(
        f"{run_dir / 'config_resolved.json'}: cannot find the data files recorded for this run ({missing}), "
        f"neither from the folders above {run_dir} nor from the current folder; run 'invert report' from the "
        "folder where 'invert run' was started, or put the data files back")


def _absolute(p, start: Path) -> Path:
    p = Path(p)
    return (p if p.is_absolute() else start / p).resolve()


def _config_from_folder(run_dir: Path, resolved: dict) -> RunConfig:
    """The folder's copy of the run description, with data paths made absolute and validated."""
    copy = run_dir / "config.toml"
    text = copy.read_bytes()
    try:
        raw = tomllib.loads(text.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(copy, "", f"not valid TOML: {exc}") from None
    start = _start_folder(run_dir, resolved, text)
    config_dir = _absolute(resolved.get("path", copy), start).parent
    data = dict(raw.get("data", {}))
    for key in ("picks", "sources", "receivers"):
        if resolved.get(key):
            data[key] = str(_absolute(resolved[key], start))
    raw["data"] = data
    if isinstance(raw.get("prior_file"), str) and _absolute(raw["prior_file"], config_dir).exists():
        raw["prior_file"] = str(_absolute(raw["prior_file"], config_dir))  # else the name of a shipped template
    raw["output"] = {**raw.get("output", {}), "folder": str(run_dir.resolve())}
    with tempfile.TemporaryDirectory(prefix="invert-report-") as tmp:
        tmp_path = Path(tmp) / "config.toml"
        tmp_path.write_text(toml_text(raw, str(copy)))
        try:
            config = load_config(tmp_path)
        except ConfigError as exc:
            prefix = f"{tmp_path}: [{exc.key}] " if exc.key else f"{tmp_path}: "
            message = str(exc)[len(prefix):] if str(exc).startswith(prefix) else str(exc)
            raise ConfigError(copy, exc.key, message.replace(str(tmp_path), str(copy))) from None
    return dataclasses.replace(config, path=_absolute(resolved.get("path", copy), start))


def read_run(run_dir) -> RunFolder:
    """Read a run folder written by ``invert run``.

    Parameters
    ----------
    run_dir : str or Path
        The output folder of the run.

    Returns
    -------
    RunFolder

    Raises
    ------
    FileNotFoundError
        Naming the missing file (or data file recorded for the run).
    ConfigError, DataError, ValueError
        Naming the file that cannot be read.
    """
    import arviz as az

    from .run import fingerprint

    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise FileNotFoundError(f"{run_dir}: no such folder (give the output folder of 'invert run')")
    for name in _REQUIRED:
        if not (run_dir / name).exists():
            raise FileNotFoundError(f"{run_dir.resolve()} holds no {name}: is this the output folder of 'invert "
                                    "run' (the [output] folder of the run description), and did the run finish?")
    resolved = _read_json(run_dir / "config_resolved.json")
    convergence = _read_json(run_dir / "convergence.json")
    config = _config_from_folder(run_dir, resolved)
    problem = build_problem(config)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            idata = az.from_netcdf(run_dir / "posterior.nc")
    except Exception as exc:  # netCDF/HDF5 errors have no common base class
        raise ValueError(f"{run_dir / 'posterior.nc'}: cannot be read as InferenceData ({exc})") from None
    missing = [n for n in problem.names if n not in idata.posterior]
    if missing:
        raise ValueError(f"{run_dir / 'posterior.nc'}: no posterior samples of {', '.join(missing)}; the file does "
                         f"not belong to the run described by {run_dir / 'config.toml'}")
    notes = []
    if resolved.get("fingerprint") and fingerprint(config) != resolved["fingerprint"]:
        notes.append("The data files (or settings) differ from those of the run: the recorded fingerprint "
                     f"{resolved['fingerprint']} does not match {fingerprint(config)} now. Predictions, residuals "
                     "and depths of investigation below are computed with the files as they are now; rerun the "
                     "inversion before relying on them.")
    return RunFolder(run_dir, config, problem, idata, convergence, resolved, notes)


# =================================================================== numbers and words
def _num(x, digits: int = 4) -> str:
    """A number with about ``digits`` significant figures, without exponent for everyday sizes."""
    try:
        x = float(x)
    except (TypeError, ValueError):
        return str(x)
    if math.isnan(x):
        return "n/a"
    if math.isinf(x):
        return "∞" if x > 0 else "−∞"
    if x == 0:
        return "0"
    mag = math.floor(math.log10(abs(x)))
    if mag >= 7 or mag < -4:
        return f"{x:.{digits - 1}e}"
    decimals = max(0, digits - 1 - mag)
    return f"{x:,.{decimals}f}".replace(",", "\u2009")


def _interval(pair) -> str:
    return f"{_num(pair[0])} – {_num(pair[1])}"


def _pct(p: float) -> str:
    if p < 0.001:
        return "< 0.1 %" if p > 0 else "0 %"
    if p > 0.999:
        return "> 99.9 %" if p < 1 else "100 %"
    return f"{100 * p:.1f} %"


def _evenly(n_total: int, n_max: int) -> np.ndarray:
    """At most ``n_max`` indices spread evenly over ``range(n_total)``."""
    if n_total <= n_max:
        return np.arange(n_total)
    return np.unique(np.linspace(0, n_total - 1, n_max).round().astype(int))


def _sentence(text: str) -> str:
    """``text`` with a capital first letter and a full stop."""
    text = str(text).strip()
    if not text:
        return text
    text = text[0].upper() + text[1:]
    return text if text[-1] in ".!?" else text + "."


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" if n == 1 else f"{n} {word}s"


def _label(name: str, unit: str) -> str:
    return f"{name} [{unit}]" if unit else name


def _shrink_corner(fig) -> None:
    """Scale a corner figure down to MAX_FIGURE_WIDTH, keeping room for its tick and axis labels."""
    width, height = fig.get_size_inches()
    if width <= MAX_FIGURE_WIDTH:
        return
    fig.set_size_inches(MAX_FIGURE_WIDTH, height * MAX_FIGURE_WIDTH / width)
    fig.subplots_adjust(left=0.11, bottom=0.11, right=0.98, top=0.95, wspace=0.07, hspace=0.07)
    for ax in fig.axes:
        ax.tick_params(labelsize=8)
        if ax.get_xlabel():
            ax.xaxis.set_label_coords(0.5, -0.5)
        if ax.get_ylabel():
            ax.yaxis.set_label_coords(-0.5, 0.5)


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=fig.dpi)
    return buf.getvalue()


# =================================================================== the analysis
@dataclass
class _Analysis:
    """Everything the sections need, computed once."""

    run: RunFolder
    names: list
    units: dict
    length: str
    all_draws: dict          # name -> all posterior draws (free and stored derived quantities)
    theta_model: np.ndarray  # (<= MAX_MODEL_DRAWS, D)
    theta_fwd: np.ndarray    # (<= MAX_FORWARD_DRAWS, D)
    n_total: int
    s_model: bool            # the models carry S velocities from sampled parameters
    n_s_picks: int
    truth: dict
    truth_model: object
    notes: list
    derived_flags: list = field(default_factory=list)


def _posterior_draws(idata) -> dict:
    out = {}
    for name in idata.posterior.data_vars:
        out[name] = np.asarray(idata.posterior[name], dtype=float).reshape(-1)
    return out


def _truth_model(problem: Problem, truth: dict):
    names = list(problem.prior.names)
    if not truth or not all(n in truth for n in names):
        return None
    model, ok = problem.models(np.array([[float(truth[n]) for n in names]]))
    return model if ok.all() else None


def _analyse(run: RunFolder, max_draws: int) -> _Analysis:
    problem = run.problem
    draws = _posterior_draws(run.idata)
    names = list(problem.names)
    theta_all = np.column_stack([draws[n] for n in names])
    finite = np.all(np.isfinite(theta_all), axis=1)
    theta_all = theta_all[finite]
    n_total = theta_all.shape[0]
    if n_total < 2:
        raise ValueError(f"{run.path / 'posterior.nc'}: fewer than two finite posterior draws; nothing to report")
    theta_model = theta_all[_evenly(n_total, MAX_MODEL_DRAWS)]
    theta_fwd = theta_all[_evenly(n_total, max_draws)]
    units = {n: ("" if u == "1" else u) for n, u in problem.parameter_units().items()}
    length = problem.units
    for name in draws:
        if name not in units:
            family = name.rsplit("_", 1)[0]
            speed = f"{length}/s"
            units[name] = {"depth": length, "thickness": length, "vs": speed, "vp": speed}.get(family, "")
    s_model = problem.layers.vpvs_mode != "none"
    n_s = int(np.sum(problem.picks.wave == "S"))
    truth = {k: float(v) for k, v in run.config.truth.items()}
    truth_model = _truth_model(problem, truth)
    if truth_model is not None:  # true values of the stored derived quantities too
        for k in range(1, truth_model.n_layers):
            truth.setdefault(f"depth_{k}", float(truth_model.interface_depths[0, k - 1]))
            truth.setdefault(f"thickness_{k}", float(truth_model.thickness[0, k - 1]))
        if s_model:
            for k in range(1, truth_model.n_layers + 1):
                truth.setdefault(f"vs_{k}", float(truth_model.vs[0, k - 1]))
    return _Analysis(run=run, names=names, units=units, length=length, all_draws=draws,
                     theta_model=theta_model, theta_fwd=theta_fwd, n_total=n_total, s_model=s_model,
                     n_s_picks=n_s, truth=truth, truth_model=truth_model, notes=list(run.notes))


def _with_warnings(notes: list, fn, *args, **kwargs):
    """Call ``fn``; UserWarnings it raises become notes."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", UserWarning)
        out = fn(*args, **kwargs)
    for w in caught:
        if issubclass(w.category, UserWarning):
            text = str(w.message)
            if text not in notes:
                notes.append(text)
    return out


def _deepest_of(problem: Problem, theta: np.ndarray, select: np.ndarray) -> np.ndarray:
    """Deepest ray point per draw over the picks in ``select`` only (NaN for invalid draws)."""
    from .forward import predict

    model, ok = problem.models(theta)
    out = np.full(theta.shape[0], np.nan)
    if model is None or not select.any():
        return out
    x, zs, zr = problem.geometry(theta[ok])
    picks = problem.picks
    _, deep = predict(model, picks.wave[select], picks.branch[select], picks.interface[select],
                      x[..., select], zs[..., select], zr[..., select], return_deepest=True)
    with np.errstate(invalid="ignore"):
        out[ok] = np.nanmax(np.where(np.isfinite(deep), deep, -np.inf), axis=1)
    return out


@dataclass
class _Fit:
    """Predicted times and residuals of the forward draws."""

    predicted: np.ndarray    # (S, P) predicted arrival times (travel time + origin) [s]
    replicated: np.ndarray   # (S, P) replicated arrival times [s]
    residuals: np.ndarray    # (S, P) observed - predicted [s]
    sigma: np.ndarray        # (S, P) pick standard deviation (times the noise scale) [s]
    origin: np.ndarray       # (S, P) origin time used per draw and pick [s]
    distance: np.ndarray     # (P,)
    outlier: np.ndarray | None
    origin_fitted: bool
    n_dropped: int
    abscissa: np.ndarray | None = None  # (P,) what the figures plot picks against (distance or depth)
    abscissa_label: str = ""            # its axis label with unit
    abscissa_kind: str = "horizontal"   # see plots.pick_abscissa
    source_positions: dict | None = None  # source name -> position along the line (kind "line_position")


def _line_xy(picks):
    """Horizontal coordinates (P, 2) of each pick's source and receiver (tables), or (None, None) inline."""
    if picks.geometry != "tables":
        return None, None
    sxy = np.column_stack([picks.source_x, picks.source_y])[picks.source_index]
    rxy = np.column_stack([picks.receiver_x, picks.receiver_y])[picks.receiver_index]
    return sxy, rxy


def _fit(an: _Analysis, rng: np.random.Generator) -> _Fit | None:
    problem = an.run.problem
    picks = problem.picks
    theta = an.theta_fwd
    pred, ok = problem.travel_times(theta)
    good = ok & np.all(np.isfinite(pred), axis=1)
    if not good.any():
        return None
    theta, pred = theta[good], pred[good]
    s_pick = np.asarray(picks.sigma, dtype=float)
    scale = theta[:, problem.names.index("noise_scale")] if "noise_scale" in problem.names else np.ones(len(theta))
    sigma = s_pick[None, :] * scale[:, None]
    time = np.asarray(picks.time, dtype=float)
    src = picks.source_index
    known = picks.origin_time_known
    origin_src = np.broadcast_to(np.where(known, picks.source_origin_time, 0.0), (len(theta), picks.n_sources)).copy()
    if (~known).any():
        # origin time of each unknown-origin source per draw: sigma-weighted mean of (time - travel time)
        w = 1.0 / s_pick ** 2
        num = np.zeros((len(theta), picks.n_sources))
        np.add.at(num, (slice(None), src), w[None, :] * (time[None, :] - pred))
        den = np.bincount(src, weights=w, minlength=picks.n_sources)
        fitted = num / np.where(den > 0, den, 1.0)
        origin_src[:, ~known] = fitted[:, ~known]
    origin = origin_src[:, src]
    predicted = pred + origin
    replicated = predicted + rng.standard_normal(pred.shape) * sigma
    x, zs, zr = problem.geometry(theta)
    distance, zs, zr = (np.median(v, axis=0) if np.ndim(v) == 2 else np.asarray(v, dtype=float)
                        for v in (x, zs, zr))
    from .plots import pick_abscissa

    if problem.sphere:  # inline distances along the surface of the planet
        abscissa, label, kind = distance.copy(), f"{ARC_WORDS} [{an.length}]", "arc"
    else:
        sxy, rxy = _line_xy(picks)
        abscissa, label, kind = pick_abscissa(distance, zs, zr, source=picks.source_id,
                                              receiver=picks.receiver_id, length_unit=an.length,
                                              source_xy=sxy, receiver_xy=rxy)
    source_positions = None
    if kind == "line_position":
        from .plots import line_positions

        _, s_pos = line_positions(rxy, sxy)
        source_positions = dict(zip(np.asarray(picks.source_id).astype(str), s_pos))
    outlier = problem.outlier_probability(theta)
    if outlier is not None:
        outlier = np.nanmean(outlier, axis=0)
    return _Fit(predicted, replicated, time[None, :] - predicted, sigma, origin, distance, outlier,
                bool((~known).any()), int((~good).sum()), abscissa, label, kind, source_positions)


# =================================================================== sections
def _section_run(an: _Analysis, fit: _Fit | None = None) -> list:
    run, cfg, problem = an.run, an.run.config, an.run.problem
    picks = problem.picks
    out = [_Heading(*SECTIONS[0])]
    if an.truth:
        out.append(_Para("Synthetic data: the run description gives the true model ([truth] table). True values "
                         "appear beside the estimates and in the figures, so that the inversion can be checked "
                         "against them.", "note"))
    out.append(_Para(f"Run “{cfg.title}”, lengths in {cfg.length_unit}, velocities in {cfg.velocity_unit}, "
                     f"times in s. Run folder: {run.path.resolve()}. Run description: {cfg.path} (its copy in the run "
                     "folder, config.toml, is the one used here)."))
    out.append(_Subheading("Data"))
    files = [f"picks: {cfg.picks}"]
    if cfg.sources is not None:
        files += [f"sources: {cfg.sources}", f"receivers: {cfg.receivers}"]
    if getattr(cfg, "waves", None):
        files.append(f"waves kept ([data] waves): {', '.join(cfg.waves)}; picks of other waves in the file are "
                     "left out of this run")
    described = [s for s in picks.describe().splitlines() if not s.startswith("Picks by wave and branch")]
    out.append(_Items(files + described))
    rows = []
    # the same abscissa as the travel-time figures (plots.pick_abscissa): receiver depth for a borehole...
    if fit is not None and fit.abscissa is not None:
        abscissa, kind = np.asarray(fit.abscissa, dtype=float), fit.abscissa_kind
    elif problem.sphere:
        abscissa, kind = np.asarray(picks.distance, dtype=float), "arc"
    else:
        from .plots import pick_abscissa

        sxy, rxy = _line_xy(picks)
        abscissa, _, kind = pick_abscissa(picks.distance, picks.source_depth, picks.receiver_depth,
                                          source=picks.source_id, receiver=picks.receiver_id, length_unit=an.length,
                                          source_xy=sxy, receiver_xy=rxy)
    span_words = {"arc": "arc distance range", "receiver_depth": "receiver depth range",
                  "source_depth": "source depth range",
                  "straight_line": "straight-line distance range",
                  "line_position": "receiver position range (along the line)"}.get(kind, "distance range")
    keys = list(zip(picks.wave, picks.branch, picks.interface))
    for key in sorted(set(keys), key=lambda k: (k[0], k[1], int(k[2]))):
        sel = np.array([k == key for k in keys])
        sig = np.asarray(picks.sigma)[sel]
        rows.append([key[0], key[1], str(int(key[2])) if int(key[2]) else "–", str(int(sel.sum())),
                     f"{np.median(sig) * 1e3:.3g}", f"{np.nanmin(abscissa[sel]):g} – "
                     f"{np.nanmax(abscissa[sel]):g}"])
    out.append(_Table(["wave", "branch", "interface", "picks", "median pick sd [ms]",
                       f"{span_words} [{an.length}]"], rows,
                      "Picks by wave and branch." + (" Distances are arcs along the surface of the planet."
                                                     if problem.sphere else ""), "llr"))
    from .run import data_checks

    checks = data_checks(picks)
    if checks:
        out.append(_Items(checks))
    out.append(_Subheading("Model and priors"))
    lay = problem.layers
    s_words = {"per_layer": "a Vp/Vs ratio per layer", "shared": "one Vp/Vs ratio shared by all layers",
               "vs": "an S velocity per layer", "none": "no S parameters (P picks only)"}[lay.vpvs_mode]
    desc = [sphere_model_words(lay) if problem.sphere else
            f"{_plural(lay.n_layers, 'layer')} over a half-space (layers numbered 1..{lay.n_layers + 1} from the top; "
            f"interface k is the base of layer k); {problem.ndim} free parameters.",
            f"S velocities: {s_words}.",
            "Priors on " + ("interface depths." if lay.depth_parameter else "layer thicknesses.")]
    if lay.gradient_layers:
        desc.append("Linear velocity gradient in layer(s) " + ", ".join(map(str, lay.gradient_layers)) + ".")
    if lay.fluid_layers:
        desc.append("Fluid layer(s) (Vs = 0): " + ", ".join(map(str, lay.fluid_layers)) + ".")
    if problem.sphere:
        desc.append(f"{problem.ndim} free parameters.")
    out.append(_Items(desc))
    prior_rows, other = [], []
    for line in problem.prior.describe().splitlines():
        name, _, text = line.partition(": ")
        if line.startswith("constraint:"):
            other.append("Constraint: " + text)
        elif line.startswith("log P(constraints)"):
            continue
        else:
            prior_rows.append([name, text])
    units = problem.parameter_units()
    for name, dist in zip(problem.nuisance_names, problem.nuisance_priors):
        prior_rows.append([name, dist.describe(units[name])])
    out.append(_Table(["parameter", "prior (with unit)"], prior_rows,
                      "Prior of every parameter; 'fixed' parameters are not sampled.", "ll"))
    if other:
        out.append(_Items(other))
    out.append(_Subheading("Noise model"))
    nz, nu = cfg.noise, cfg.nuisance
    noise = {"gaussian": "Gaussian pick errors with the standard deviation of each pick",
             "outlier_mixture": f"Gaussian pick errors mixed with a broad outlier distribution (outlier "
                                f"fraction {nz.outlier_fraction:g}, outlier sd {nz.outlier_sigma:g} s)",
             "student_t": f"Student-t pick errors ({nz.dof:g} degrees of freedom) scaled by each pick's sd"}
    items = [noise[nz.model] + "."]
    if nz.scale == "free":
        items.append("A common multiplier of all pick standard deviations (noise_scale) is sampled.")
    if problem.marginal_origin:
        items.append(f"Unknown origin times are integrated out ({nu.origin_time} prior).")
    if problem.delays:
        items.append(f"Delay terms integrated out: receiver sd {nu.receiver_delay_sd:g} s, source sd "
                     f"{nu.source_delay_sd:g} s.")
    out.append(_Items(items))
    out.append(_Subheading("Sampler"))
    s = cfg.sampler
    conv = run.convergence
    kept = conv.get("kept_steps")
    # the steps actually taken (a resumed or --steps run differs from [sampler] steps in config.toml)
    done = int(conv["burn"]) + int(kept) if isinstance(kept, int) and isinstance(conv.get("burn"), int) else s.steps
    items = [f"{s.ensembles} independent ensembles of {s.walkers} walkers (emcee; differential-evolution moves), "
             f"{done} steps each" + (f" (run until converged, at most {s.max_steps})" if s.until_converged
                                        else "") + f"; started from: {s.start}; seed {s.seed}.",
             f"Burn-in discarded: {conv.get('burn', s.burn)} steps; kept {kept} steps, thinned by "
             f"{conv.get('thin', s.thin)}: {an.n_total} posterior draws in all.",
             f"This report uses {len(an.theta_fwd)} evenly spread draws for ray tracing and predicted times, and "
             f"{len(an.theta_model)} for quantities computed from the layer models; the parameter table uses "
             "every draw."]
    out.append(_Items(items))
    return out


#: Axis label of the arc distance of sphere runs (plots.ARC_LABEL).
ARC_WORDS = "distance along the surface (arc)"


def sphere_model_words(lay) -> str:
    """One sentence on the planet of a sphere run: radius, shells and their laws, max_diffraction.

    Parameters
    ----------
    lay : invert.parameters.SphereSettings
    """
    n = lay.n_layers
    r = lay.planet_radius
    shells = (f"{_plural(n, 'layer')} read as shells" if n else "no layers") + \
        f" (numbered 1..{n + 1} from the surface; interface k is the base of shell k)"
    fluid = set(lay.fluid_layers)
    core = n + 1 in fluid and any(k not in fluid for k in range(1, n + 1))
    md = lay.max_diffraction
    md_words = ("no limit (inf): a wave diffracted along the core boundary counts as a first arrival at every "
                "distance past the grazing ray" if math.isinf(md) else
                "0: no diffracted wave counts as a first arrival; P and S stop at the edge of the core shadow"
                if md == 0 else
                f"{md:g} degrees of arc past the grazing ray, beyond which no diffracted wave counts as a first "
                "arrival")
    return (f"Spherical planet of radius {r:g} km: {shells}. Every layer is a shell with the same depths and "
            "end velocities following the 'flat' law (v / r linear in ln r: the linear layer of the exactly "
            "flattened planet); the half-space is a shell filling the planet to its centre, following the 'r2' "
            "law (1 / v^2 linear in r^2) from its top velocity to the value of its linear law at the centre"
            + (", liquid (a core)" if core else "") + ". Distances are arcs along the surface. "
            f"max_diffraction = {md_words}.")


def rhat_text(rhat: float, limit: float = 1.01, digits: int = 4) -> str:
    """R-hat with at least ``digits`` decimals and as many more as it takes to fall on the same side of
    ``limit`` as the exact value (1.0096 stays below 1.01 in print)."""
    if not np.isfinite(rhat):
        return f"{rhat}"
    for d in range(digits, 12):
        text = f"{rhat:.{d}f}"
        if (float(text) < limit) == (rhat < limit):
            return text
    return repr(float(rhat))


def _section_convergence(an: _Analysis) -> list:
    conv = an.run.convergence
    out = [_Heading(*SECTIONS[1])]
    converged = conv.get("converged") is True
    verdict = str(conv.get("verdict", "")).strip()
    if converged:
        out.append(_Para("Yes. " + verdict, "good"))
    else:
        out.append(_Para("No: the run did NOT converge, so every number in this report is provisional. "
                         "Run longer (more steps, or until_converged = true) before using the results.", "bad"))
        if verdict:
            out.append(_Para(verdict))
    t = conv.get("targets", {})
    max_rhat, min_ess = float(t.get("max_rhat", 1.01)), float(t.get("min_ess", 400))
    min_tau = float(t.get("min_tau_multiple", 50))
    rows = []
    for name, p in conv.get("parameters", {}).items():
        r, eb, et = float(p["rhat"]), float(p["ess_bulk"]), float(p["ess_tail"])
        tau, mult = float(p["tau"]), float(p["run_over_tau"])
        ok = r < max_rhat and eb > min_ess and et > min_ess and mult > min_tau
        rows.append([name, rhat_text(r, max_rhat), _num(eb, 3), _num(et, 3), _num(tau, 3), _num(mult, 3),
                     "yes" if ok else "NO"])
    out.append(_Table(["parameter", "R-hat", "bulk ESS", "tail ESS", "autocorrelation time [steps]",
                       "run / autocorrelation time", "meets targets"], rows,
                      f"Targets: R-hat below {max_rhat:g}, bulk and tail ESS above {min_ess:g}, kept run longer than "
                      f"{min_tau:g} autocorrelation times (Vehtari et al., Bayesian Analysis 16, 2021, for R-hat "
                      "and ESS)."))
    acc = conv.get("acceptance", [])
    items = []
    if acc:
        items.append("Acceptance fraction per ensemble: " + ", ".join(f"{float(a):.2f}" for a in acc) + ".")
    stuck = conv.get("stuck_walkers", [])
    if stuck:
        items.append(f"{len(stuck)} walker(s) stuck: " + "; ".join(
            f"ensemble {int(e) + 1}, walker {int(w) + 1} ({why})" for e, w, why in stuck[:5]) + ".")
    items += [str(n) for n in conv.get("notes", [])]
    if items:
        out.append(_Items(items))
    return out


def _summary_rows(an: _Analysis, samples: dict, units: dict, truth: dict | None = None,
                  partial: dict | None = None) -> tuple[list, list]:
    """Table of medians, means and intervals; non-finite draws are left out and their share named
    (``partial`` maps a quantity to a format string of the finite share, e.g. "where reached: {}")."""
    header = ["quantity", "unit", "median", "mean", "68 % equal-tailed", "95 % equal-tailed", "68 % HDI",
              "95 % HDI"]
    has_truth = bool(truth) and any(n in truth for n in samples)
    if has_truth:
        header.append("true value (synthetic)")
    rows = []
    for name, x in samples.items():
        x = np.asarray(x, dtype=float)
        fin = x[np.isfinite(x)]
        if fin.size < 2:
            continue
        s = post.interval_summary(fin)
        row = [name, units.get(name, "") or "–", _num(s.median), _num(s.mean), _interval(s.eti[0.68]),
               _interval(s.eti[0.95]), _interval(s.hdi[0.68]), _interval(s.hdi[0.95])]
        if has_truth:
            row.append(_num(truth[name]) if name in truth else "")
        if fin.size < x.size:
            words = (partial or {}).get(name, "over the {} of draws where it is finite")
            row[0] += " (" + words.format(_pct(fin.size / x.size)) + ")"
        rows.append(row)
    return header, rows


def _section_estimates(an: _Analysis) -> list:
    out = [_Heading(*SECTIONS[2])]
    samples = {n: an.all_draws[n] for n in an.names}
    derived = {n: v for n, v in an.all_draws.items() if n not in samples}
    header, rows = _summary_rows(an, {**samples, **derived}, an.units, an.truth)
    out.append(_Table(header, rows,
                      f"Every sampled parameter, then the depths, thicknesses and S velocities they imply "
                      f"({an.n_total} draws). Equal-tailed intervals leave equal probability on either side; "
                      "the highest-density interval (HDI) is the narrowest interval with that probability (one "
                      "interval: for a two-humped posterior it spans both humps)."))
    return out


def _depth_grid(model, doi, at_least: float = 0.0, limit: float | None = None) -> np.ndarray:
    """Depths for the velocity–depth figure: to 1.3 times the deeper of the deepest interface (99th
    percentile) and the median depth of investigation, and at least to ``at_least``; never below
    ``limit`` (sphere runs: the planet radius, the centre)."""
    deep = float(np.quantile(model.interface_depths[:, -1], 0.99)) if model.n_layers > 1 else 0.0
    d = np.asarray(doi, dtype=float)
    d = d[np.isfinite(d)]
    ray = float(np.median(d)) if d.size else 0.0
    z_max = max(1.3 * max(deep, ray), at_least)
    if limit is not None:
        z_max = min(z_max, float(limit))
    if not z_max > 0:
        z_max = 1.0
    return np.linspace(0.0, z_max, 241)


def _section_derived(an: _Analysis, fwd: dict, bedrock_velocity: float, site_classes: str) -> list:
    problem = an.run.problem
    out = [_Heading(*SECTIONS[3])]
    model, ok = problem.models(an.theta_model)
    n = problem.layers.n_layers
    samples, units, truth = {}, {}, {}
    tm = an.truth_model
    for k in range(1, n + 1):
        name = f"depth of interface {k}"
        samples[name] = post.depth_above_interface(model, k)
        units[name] = an.length
        if tm is not None:
            truth[name] = float(post.depth_above_interface(tm, k)[0])
    # two-way times only for the waves in the data (an S-only run says nothing new about P times);
    # ms for runs in metres, s for runs in kilometres
    picked = set(np.asarray(problem.picks.wave).astype(str))
    waves = [w for w in ("P", "S") if w in picked and (w == "P" or an.s_model)]
    tw_scale, tw_unit = (1e3, "ms") if an.length == "m" else (1.0, "s")
    for wave in waves:
        for k in range(1, n + 1):
            name = f"{wave} two-way time to interface {k}"
            samples[name] = tw_scale * _with_warnings(an.notes, post.two_way_time, model, k, wave)
            units[name] = tw_unit
            if tm is not None:
                truth[name] = tw_scale * float(_with_warnings([], post.two_way_time, tm, k, wave)[0])
    site_work = an.length == "m" and an.s_model
    vs30 = None
    if site_work:
        vs30 = _with_warnings(an.notes, post.vs30, model)
        samples["Vs30"] = vs30
        units["Vs30"] = "m/s"
        if tm is not None:
            truth["Vs30"] = float(_with_warnings([], post.vs30, tm)[0])
        bed = post.depth_to_velocity(model, bedrock_velocity, "S")
        bed_name = f"depth to Vs ≥ {bedrock_velocity:g} m/s"
        samples[bed_name] = bed
        units[bed_name] = "m"
        if tm is not None:
            truth[bed_name] = float(post.depth_to_velocity(tm, bedrock_velocity, "S")[0])
    if not samples:
        out.append(_Para("The model is a half-space alone and the run is not in metres with S velocities: "
                         "there are no derived quantities to show."))
        return out
    partial = {n: "in the {} of draws where it is reached" for n in samples if n.startswith("depth to V")}
    header, rows = _summary_rows(an, samples, units, truth, partial)
    out.append(_Table(header, rows,
                      f"From {len(an.theta_model)} evenly spread posterior draws. Depths are below the datum; "
                      f"two-way times (in {tw_unit}, for the waves picked) are vertical times from the datum down to "
                      "the interface and back."
                      + (" Vs30 = 30 m / (vertical S travel time over the top 30 m)." if site_work else "")))
    if site_work:
        flags = []
        f = post.flag_without_s_picks(an.n_s_picks, "Vs30")
        if f:
            flags.append(f)
        doi_s = fwd.get("doi_s")
        if doi_s is not None and np.isfinite(doi_s).any():
            f = post.flag_below_investigation(30.0, doi_s[np.isfinite(doi_s)], "Vs30", length_unit="m")
            if f:
                flags.append(f.replace("deepest ray", "deepest S ray"))
        for f in flags:
            out.append(_Para("Caution — " + _sentence(f), "warn"))
        an.derived_flags.extend(flags)
        out.append(_Subheading("Site class from Vs30"))
        edges, labels, source = post.SITE_CLASS_SCHEMES[site_classes]
        sc = post.site_class_probabilities(vs30, edges, labels)
        rows = []
        for lab, (lo, hi), p in zip(sc.labels, sc.bands, sc.probability):
            band = f"above {lo:g}" if math.isinf(hi) else (f"below {hi:g}" if lo == 0 else f"{lo:g} – {hi:g}")
            rows.append([lab, band, _pct(float(p))])
        out.append(_Table(["class", "Vs30 band [m/s]", "posterior probability"], rows,
                          f"Class edges: {source}. A value exactly on an edge joins the {sc.edge_class} class.",
                          "lrr"))
        out.append(_Para(sc.caveat, "note"))
        finite = np.isfinite(bed)
        reach = float(finite.mean())
        text = (f"Depth to Vs ≥ {bedrock_velocity:g} m/s (taken as 'bedrock-like' here; choose the velocity that "
                "fits the site and the code in force): ")
        if finite.sum() < 2:
            text += ("not reached in any draw: S velocity stays below that value down to the half-space, so the "
                     "depth to such material is not constrained by this model (it may be deeper, or absent).")
        else:
            text += f"reached within the model in {_pct(reach)} of the draws"
            text += "; the table summarises those draws." if reach < 1 else "."
        out.append(_Para(text))
        what = f"depth to Vs ≥ {bedrock_velocity:g} m/s"
        warn = post.flag_without_s_picks(an.n_s_picks, what)
        below = fwd.get("bedrock_below_rays")
        if warn is None and below is not None and below > 0.05:
            warn = (f"{what}: in {_pct(below)} of the draws where it is reached, that depth lies below the deepest "
                    "S ray; there it rests on the prior and on the layering assumed, not on the data")
        if warn and finite.sum() >= 2:
            out.append(_Para("Caution — " + _sentence(warn), "warn"))
            an.derived_flags.append(warn)
    return out


def _section_probabilities(an: _Analysis) -> list:
    problem = an.run.problem
    out = [_Heading(*SECTIONS[4])]
    n_layers = problem.layers.total_layers
    if n_layers < 2:
        out.append(_Para("The model is a half-space alone: no layer lies under another."))
        return out
    model, _ = problem.models(an.theta_model)
    prior = problem.prior
    waves = ["P", "S"] if an.s_model else ["P"]
    rows = []
    for k in range(2, n_layers + 1):
        row = [f"layer {k} slower than layer {k - 1}" + (" (half-space)" if k == n_layers else "")]
        for wave in waves:
            p = post.probability_slower(model, k, wave)
            text = _pct(p)
            if wave == "P" and prior.increasing_velocity and k not in prior.slower_allowed:
                text += " (excluded by the prior: velocity increasing with depth)"
            row.append(text)
        rows.append(row)
    caption = (f"Velocity at the top of layer k compared with the velocity at the base of layer k − 1, in "
               f"{len(an.theta_model)} posterior draws. First arrivals do not sample a slower layer well: a "
               "high probability here is a reason to look harder, not a finding on its own.")
    out.append(_Table(["statement"] + [f"probability, {w} velocity" for w in waves], rows, caption,
                      "l" + "r" * len(waves)))
    if an.s_model and not an.n_s_picks:
        out.append(_Para(post.flag_without_s_picks(0, "S-velocity statements") + ".", "note"))
    return out


def _section_flags(an: _Analysis, fwd: dict, fit: _Fit | None) -> list:
    problem = an.run.problem
    picks = problem.picks
    out = [_Heading(*SECTIONS[5])]
    flags = []
    if an.run.convergence.get("converged") is not True:
        flags.append("The sampling did not converge (see above): intervals and probabilities may change with a "
                     "longer run.")
    flags += an.notes
    flags += an.derived_flags
    # -------- resolution against the prior
    prior = an.run.idata.prior
    table = []
    if prior is not None:
        post_s = {n: an.theta_model[:, i] for i, n in enumerate(an.names) if n in prior}
        pri_s = {n: np.asarray(prior[n], dtype=float).reshape(-1) for n in post_s}
        pri_s = {n: v[np.isfinite(v)] for n, v in pri_s.items()}
        post_s = {n: v for n, v in post_s.items() if pri_s[n].size > 1 and np.ptp(pri_s[n]) > 0}
        if post_s:
            table = post.identifiability_table(post_s, pri_s)
            for row in table:
                if row["message"]:
                    flags.append(row["message"])
    # -------- interfaces below the rays
    model_fwd, doi = fwd.get("model"), fwd.get("doi_valid")
    if model_fwd is not None and np.isfinite(doi).any():
        fin = np.isfinite(doi)
        for k in range(1, problem.layers.n_layers + 1):
            frac = float(np.mean(model_fwd.interface_depths[fin, k - 1] > doi[fin]))
            if frac > 0.05:
                flags.append(f"Interface {k} lies below the deepest ray in {_pct(frac)} of the draws: its depth and "
                             "the velocity below it rest on the prior there.")
    # -------- trade-offs
    spread = np.ptp(an.theta_model, axis=0) > 0
    pairs = []
    if spread.sum() >= 2:
        corr = post.correlation_matrix(an.theta_model[:, spread])
        pairs = post.strongest_pairs(corr, [n for n, s in zip(an.names, spread) if s])
        for p in pairs:
            if abs(p["correlation"]) >= 0.8:
                flags.append("Strong trade-off: " + p["text"])
    # -------- fit
    groups, check, words_outlier = [], None, None
    if fit is not None:
        scale = np.median(fit.sigma / np.asarray(picks.sigma)[None, :])
        groups = post.residual_groups(fit.residuals, {"source": picks.source_id, "receiver": picks.receiver_id,
                                                      "wave": picks.wave, "branch": picks.branch},
                                      np.asarray(picks.sigma, dtype=float) * scale)
        systematic = post.describe_systematic_residuals(groups)
        flags += systematic[:MAX_RESIDUAL_FLAGS]
        if len(systematic) > MAX_RESIDUAL_FLAGS:
            flags.append(f"… and {len(systematic) - MAX_RESIDUAL_FLAGS} more groups of picks with systematic "
                         "residuals (see the residual table below)")
        check = post.chi_square_check(np.asarray(picks.time, dtype=float), fit.predicted, fit.replicated, fit.sigma)
        if check.message:
            flags.append(check.message)
        if fit.outlier is not None:
            bad = np.flatnonzero(fit.outlier > 0.5)
            if not bad.size:
                words_outlier = "No pick has an outlier probability above 0.5."
            else:
                shown = "; ".join(f"line {int(picks.line_numbers[j])} ({picks.source_id[j]} → "
                                  f"{picks.receiver_id[j]}, {picks.wave[j]}, outlier probability "
                                  f"{fit.outlier[j]:.2f})" for j in bad[:8])
                flags.append(f"{bad.size} pick(s) in {Path(picks.path).name} are more likely outliers than not: "
                             f"{shown}" + (" …" if bad.size > 8 else "") + ". Check them in the picks file.")
    outside = fwd.get("prior_outside")
    if outside is not None and outside.any():
        flags.append(f"{int(outside.sum())} of {outside.size} picks lie outside the central 95 % of travel times "
                     f"predicted by the {fwd['prior_times'].shape[0]} valid prior models: the prior may exclude "
                     "structure the data need (see the prior predictive figure). " + _prior_invalid_words(fwd))
    if flags:
        out.append(_Items([_sentence(f) for f in flags]))
    else:
        out.append(_Para("Nothing flagged: every parameter is narrowed by the data, no strong trade-off, no "
                         "systematic residual, and the misfit agrees with the noise model.", "good"))
    # -------- supporting tables
    if table:
        rows = [[r["quantity"], f"{r['width_ratio']:.2f}", f"{r['contraction']:.2f}",
                 "yes" if r["resolved"] else "NO (close to the prior)"] for r in table]
        out.append(_Subheading("Resolution: posterior against prior"))
        out.append(_Table(["parameter", "posterior / prior width (90 % interval)", "contraction",
                           "resolved by the data"], rows,
                          "Width ratio above 0.7 (our rule of thumb) is flagged. Contraction = 1 − posterior "
                          "variance / prior variance (Schad, Betancourt & Vasishth, Psychological Methods 26, 2021; "
                          "from memory): 1 fully resolved, 0 nothing learned."))
    if pairs:
        out.append(_Subheading("Trade-offs"))
        out.append(_Items([p["text"] for p in pairs]))
        out.append(_Para("Pearson correlation sees straight-line dependence only; look at the corner plot too. "
                         "Pairs with |r| ≥ 0.8 are also listed above.", "note"))
    if fit is not None:
        out.append(_Subheading("Residuals"))
        rows = [[r["group"], r["label"], str(r["n_picks"]), f"{round(r['mean_s'] * 1e3, 2) + 0.0:+.2f}",
                 f"{r['rms_s'] * 1e3:.2f}", f"{round(r['z'], 1) + 0.0:+.1f}", "yes" if r["systematic"] else ""]
                for r in groups if r["group"] in ("wave", "branch", "source") or r["systematic"]]
        limit = groups[0]["threshold"] if groups else post.bonferroni_threshold(1)
        tested = groups[0]["groups_tested"] if groups else 0
        caption = ("Residual = observed − predicted (positive: the pick is late), averaged over the draws; a group "
                   f"is systematic when its mean exceeds {limit:.2f} standard errors: the two-sided 5 % level with "
                   f"a Bonferroni correction for the {tested} groups tested (sources, receivers, waves and "
                   "branches; Dunn, J. Am. Stat. Assoc. 56, 1961), so that with pick errors as stated all groups "
                   "together raise a false flag at most 5 % of the time. Receivers are listed only when flagged.")
        out.append(_Table(["group", "label", "picks", "mean residual [ms]", "rms [ms]", "mean / standard error",
                           "systematic"], rows, caption, "llrrrrl"))
        words = [f"Posterior predictive check (chi-square discrepancy; Gelman et al., Bayesian Data Analysis, 3rd "
                 f"ed., 2013, ch. 6): p = {check.p_value:.2f}. Values near 0 mean more misfit than the noise "
                 "model allows, near 1 a better fit than the stated pick errors; such p-values crowd towards 0.5 "
                 "even for a correct model, so only extreme values mean much."]
        if problem.noise.model != "gaussian":
            words.append("The replicated picks are drawn with Gaussian errors while the run used the "
                         f"{problem.noise.model.replace('_', ' ')} noise model: read the p-value as a rough guide.")
        if fit.origin_fitted:
            words.append("Unknown origin times were set, draw by draw, to the value that best fits each source's "
                         "picks; that makes residuals a little smaller and the p-value a little larger than "
                         "they would be with the origin times known.")
        if problem.delays:
            words.append("The run integrated out delay terms; the residuals here do not remove them, so sources "
                         "or receivers with a delay show it as a systematic residual.")
        if words_outlier:
            words.append(words_outlier)
        if fit.n_dropped:
            words.append(f"{fit.n_dropped} of {len(an.theta_fwd)} draws predict no arrival for some pick and are "
                         "left out of the residuals and the check.")
        if fit.outlier is None and problem.noise.model == "outlier_mixture":
            words.append("Outlier probabilities are not computed when origin times are unknown.")
        for w in words:
            out.append(_Para(w, "note"))
    return out


def _section_cautions(sphere: bool = False) -> list:
    return [_Heading(*SECTIONS[7]), _Para(SPHERE_CAUTIONS if sphere else CAUTIONS, "note")]


# =================================================================== figures
def _chains_for_traces(an: _Analysis):
    """(ensembles, steps, walkers, K) chains and the burn-in step; from the checkpoint when present."""
    import h5py

    s = an.run.config.sampler
    cp = an.run.path / "checkpoint.h5"
    burn = int(an.run.convergence.get("burn", s.burn))
    if cp.exists():
        try:
            with h5py.File(cp, "r") as f:
                n_ens = int(f.attrs["n_ensembles"])
                chains = [np.asarray(f[f"ensemble_{e}"]["chain"], dtype=float) for e in range(n_ens)]
            n = min(c.shape[0] for c in chains)
            return np.stack([c[:n] for c in chains]), burn, ""
        except (OSError, KeyError, ValueError):
            pass
    post_ = an.run.idata.posterior
    x = np.stack([np.asarray(post_[n], dtype=float) for n in an.names], axis=-1)  # (E*W, N, D)
    e = s.ensembles if x.shape[0] % max(s.ensembles, 1) == 0 else 1
    w = x.shape[0] // e
    return x.reshape(e, w, x.shape[1], -1).transpose(0, 2, 1, 3), None, " (kept steps only: no checkpoint file)"


def _abscissa_words(fit: _Fit) -> str:
    """What the travel-time figures plot the picks against, in words (plots.pick_abscissa)."""
    return {"receiver_depth": "receiver depth (receivers down a hole; horizontal source–receiver distance "
                              f"{_range_words(fit.distance)})",
            "source_depth": "source depth (sources down a hole; horizontal source–receiver distance "
                            f"{_range_words(fit.distance)})",
            "straight_line": "the straight-line source–receiver distance (sources and receivers at depth)",
            "arc": "the distance along the surface of the planet (arc; epicentral angle on the top axis)",
            "line_position": "the receiver position along the line, from its first receiver (triangles on the axis: "
                             "source positions projected on the line)",
            }.get(fit.abscissa_kind, "horizontal source–receiver distance")


def _range_words(x: np.ndarray) -> str:
    lo, hi = float(np.nanmin(x)), float(np.nanmax(x))
    return f"{lo:.3g}" if np.isclose(lo, hi) else f"{lo:.3g} – {hi:.3g}"


def _figures(an: _Analysis, fwd: dict, fit: _Fit | None) -> list:
    from . import plots

    problem = an.run.problem
    picks = problem.picks
    figs = []
    units = an.units
    truth = an.truth

    def add(key, fig, caption):
        title = dict(FIGURES)[key]
        figs.append(_Figure(key, title, caption, _png(fig)))

    radius = problem.layers.planet_radius if problem.sphere else None

    # velocity–depth
    model, doi = fwd.get("model"), fwd.get("doi_ok")
    if model is not None:
        waves = ["P", "S"] if (an.s_model and an.n_s_picks) else ["P"]
        site = 33.0 if (an.length == "m" and an.s_model) else 0.0  # show the top 30 m that Vs30 averages
        radius = problem.layers.planet_radius if problem.sphere else None
        if problem.sphere:  # only the draws that make a planet (all of them in a finished run)
            from .parameters import build_radial_models

            _, planet = build_radial_models(model, np.ones(model.n_models, bool), problem.layers)
            model, doi = model.take(np.flatnonzero(planet)), doi[planet]
        fig = plots.plot_velocity_depth(model, _depth_grid(model, doi, site, radius), waves=waves,
                                        truth=an.truth_model, doi=doi, length_unit=an.length,
                                        planet_radius=radius)
        cap = (f"{len(doi)} posterior draws. Grey shading: fraction of models in each velocity bin at each depth "
               "(darker = more models). Red: median velocity at each depth; orange: 68 % and 95 % envelopes. Right "
               "panel: where the interfaces lie. Blue hatching: below the median depth of investigation (deepest "
               "ray), where the picture is the prior's.")
        if an.truth_model is not None:
            cap += " Green dash-dot: the true model of the synthetic data."
        if an.s_model and not an.n_s_picks:
            cap += " No S picks: only P velocity is shown."
        if problem.sphere:
            cap += (f" Depths below the surface of the planet, down to at most its centre ({radius:g} km); velocities "
                    "follow the shell laws the travel times use (layers: 'flat' law; half-space: 'r2' law), not "
                    "straight lines in depth.")
        add("velocity_depth", fig, cap)
    # travel-time fit
    if fit is not None:
        o_med = np.median(fit.origin, axis=0)
        obs_tt = np.asarray(picks.time, dtype=float) - o_med
        fig = plots.plot_travel_time_fit(fit.abscissa, obs_tt, np.asarray(picks.sigma, dtype=float),
                                         fit.predicted - o_med, source=picks.source_id, wave=picks.wave,
                                         branch=picks.branch, replicated=fit.replicated - o_med,
                                         outlier_probability=fit.outlier, length_unit=an.length,
                                         x_label=fit.abscissa_label, planet_radius=radius,
                                         source_positions=fit.source_positions,
                                         curves=_sphere_curves(problem, an.theta_fwd, fit, replicate=True))
        cap = (f"Picks (± 1 sd) against {_abscissa_words(fit)}, with the central 90 % of picks replicated from "
               f"{fit.predicted.shape[0]} posterior draws (prediction plus pick noise). Colour: source; marker: "
               "wave. Lower panel: observed minus median predicted time in ms.")
        if fit.origin_fitted:
            cap += " Times are travel times after subtracting the fitted origin time of each source."
        if problem.sphere:
            cap += (" Lines and bands follow the predictions along the arc between a group's picks and break where "
                    "most draws predict no arrival (a shadow).")
        add("travel_time_fit", fig, cap)
    # corner
    k = min(len(an.names), MAX_PANELS)
    spread = np.ptp(an.theta_model[:, :k], axis=0) > 0
    if spread.sum() >= 2:
        idx = np.flatnonzero(spread)
        labels = [_label(an.names[i], units[an.names[i]]) for i in idx]
        tr = [truth.get(an.names[i]) for i in idx] if truth else None
        fig = plots.plot_corner(an.theta_model[:, idx], labels, truths=tr)
        _shrink_corner(fig)
        cap = f"{len(an.theta_model)} posterior draws. Tilted, narrow contours mark trade-offs between two parameters."
        if len(an.names) > k:
            cap += f" Only the first {k} of {len(an.names)} parameters are shown."
        add("corner", fig, cap)
    # prior vs posterior
    prior = an.run.idata.prior
    if prior is not None:
        shown = [n for n in an.names[:max(MAX_PANELS, 12)] if n in prior]
        pri = {n: np.asarray(prior[n], dtype=float).reshape(-1) for n in shown}
        pos = {n: an.theta_model[:, an.names.index(n)] for n in shown}
        fig = plots.plot_prior_posterior(pri, pos, units, truths=truth or None)
        cap = ("Grey: prior; blue: posterior. A posterior much narrower than its prior was resolved by the data; one "
               "that looks like its prior was not.")
        if len(shown) < len(an.names):
            cap += f" {len(shown)} of {len(an.names)} parameters shown."
        add("prior_posterior", fig, cap)
    # prior predictive
    pp = fwd.get("prior_times")
    if pp is not None and fit is not None:
        o_med = np.median(fit.origin, axis=0)
        obs_tt = np.asarray(picks.time, dtype=float) - o_med
        fig = plots.plot_prior_predictive(fit.abscissa, obs_tt, np.asarray(picks.sigma, dtype=float), pp,
                                          source=picks.source_id, wave=picks.wave, branch=picks.branch,
                                          length_unit=an.length, x_label=fit.abscissa_label,
                                          source_positions=fit.source_positions,
                                          planet_radius=radius,
                                          curves=_sphere_curves(problem, fwd.get("prior_theta"), fit))
        cap = (f"Travel times of {pp.shape[0]} models drawn from the prior (central 95 %), with the picks, against "
               f"{_abscissa_words(fit)}. Picks far outside the band point to a prior that excludes the structure the "
               "data need. " + _prior_invalid_words(fwd))
        if problem.sphere:
            cap += (" No line or band is drawn where most prior models predict no arrival (a shadow).")
        add("prior_predictive", fig, cap.strip())
    # traces and convergence
    chains, burn, where = _chains_for_traces(an)
    k = min(chains.shape[-1], MAX_PANELS)
    fig = plots.plot_traces(chains[..., :k], [_label(n, units[n]) for n in an.names[:k]], burn_in=burn,
                            max_walkers=TRACE_WALKERS)
    cap = ("Walker positions against step, one colour per ensemble" + where + ". After burn-in the ensembles should "
           "overlap and wander over the same range without trends.")
    if chains.shape[-1] > k:
        cap += f" Only the first {k} of {chains.shape[-1]} parameters are shown."
    add("traces", fig, cap)
    params = an.run.convergence.get("parameters", {})
    if params:
        names = list(params)
        fig = plots.plot_convergence(names, [float(params[n]["rhat"]) for n in names],
                                     [float(params[n]["ess_bulk"]) for n in names],
                                     ess_tail=[float(params[n]["ess_tail"]) for n in names])
        add("convergence", fig, "R-hat (left) and effective sample size (right) per parameter; red bars miss the "
                                "target (dashed line).")
    return figs


def _forward_quantities(an: _Analysis, bedrock_velocity: float) -> dict:
    problem = an.run.problem
    out = {}
    model, ok = problem.models(an.theta_fwd)
    if model is None:
        return out
    doi = problem.deepest_points(an.theta_fwd)
    out.update(model=model, ok=ok, doi_valid=doi[ok], doi_ok=np.where(np.isfinite(doi[ok]), doi[ok], 0.0))
    if an.s_model and an.n_s_picks:
        doi_s = _deepest_of(problem, an.theta_fwd, problem.picks.wave == "S")
        out["doi_s"] = doi_s
        if an.length == "m":
            bed = post.depth_to_velocity(model, bedrock_velocity, "S")
            ds = doi_s[ok]
            reach = np.isfinite(bed) & np.isfinite(ds)
            out["bedrock_below_rays"] = float(np.mean(bed[reach] > ds[reach])) if reach.any() else None
    prior = an.run.idata.prior
    if prior is not None and all(n in prior for n in problem.names):
        theta = np.column_stack([np.asarray(prior[n], dtype=float).reshape(-1) for n in problem.names])
        theta = theta[_evenly(len(theta), PRIOR_PREDICTIVE_DRAWS)]
        times, valid = problem.travel_times(theta)
        # draws the prior allows but that make no valid layer model (e.g. Vp/Vs not above sqrt(4/3)) have no
        # arrivals at all; they are left out and counted, not mistaken for missing arrivals
        out["prior_draws"] = int(valid.size)
        out["prior_invalid"] = int((~valid).sum())
        if valid.any():
            out["prior_times"] = times[valid]
            out["prior_theta"] = theta[valid]
    return out


#: Sphere runs: at most this many draws and grid distances per pick group for the predicted curves.
CURVE_DRAWS = 100
CURVE_POINTS = 120


def _sphere_curves(problem: Problem, theta, fit: _Fit | None, replicate: bool = False) -> dict | None:
    """Sphere runs: predicted times of every pick group on a dense grid of arc distances.

    Each group of picks (source, wave, branch) with one receiver depth and one
    interface gets the spherical engine's times [s] of up to ``CURVE_DRAWS``
    of the draws ``theta`` at ``CURVE_POINTS`` distances spanning its picks
    (the picks' own distances included), ``inf`` where a model has no arrival
    (the plots break lines there). With ``replicate`` pick noise is added (the
    median sd of the group's picks times the draw's noise scale). Returns None
    for flat runs, fitted origin times (the figures subtract them) or no draws.
    """
    if not problem.sphere or theta is None or fit is None or fit.origin_fitted or len(theta) == 0:
        return None
    from . import sphere

    theta = np.asarray(theta, dtype=float)
    theta = theta[_evenly(len(theta), CURVE_DRAWS)]
    radial, ok = problem.radial_models(theta)
    if radial is None:
        return None
    theta = theta[ok]
    x, zs, zr = problem.geometry(theta)
    if np.ndim(x) != 1 or np.ndim(zs) != 1 or np.ndim(zr) != 1:
        return None
    picks = problem.picks
    src = np.asarray(picks.source_id).astype(str)
    wav = np.asarray(picks.wave).astype(str)
    brn = np.asarray(picks.branch).astype(str)
    scale = theta[:, problem.names.index("noise_scale")] if "noise_scale" in problem.names else np.ones(len(theta))
    rng = np.random.default_rng(0)
    out = {}
    for key in dict.fromkeys(zip(src, wav, brn)):
        sel = (src == key[0]) & (wav == key[1]) & (brn == key[2])
        xs = np.asarray(x, dtype=float)[sel]
        iface = np.unique(np.asarray(picks.interface)[sel])
        if xs.min() == xs.max() or np.ptp(zs[sel]) > 0 or np.ptp(zr[sel]) > 0 or iface.size != 1:
            continue
        grid = np.union1d(np.linspace(xs.min(), xs.max(), CURVE_POINTS), xs)
        arr = sphere.travel_times(radial, key[1], grid, float(zs[sel][0]), float(zr[sel][0]), branch=key[2],
                                  interface=int(iface[0]) if key[2] == "head" else None, distance_unit="km",
                                  max_diffraction=problem.layers.max_diffraction)
        times = arr.time
        if replicate:
            sd = float(np.median(np.asarray(picks.sigma, dtype=float)[sel])) * scale
            times = times + rng.standard_normal(times.shape) * sd[:, None]
        out[key] = (grid, times)
    return out


def _prior_invalid_words(fwd: dict) -> str:
    """Sentence on prior draws left out of the prior predictive because they are not valid models."""
    bad, total = fwd.get("prior_invalid", 0), fwd.get("prior_draws", 0)
    if not bad:
        return ""
    return (f"{bad} of {total} prior draws give no valid layer model (for instance Vp/Vs not above sqrt(4/3) in "
            "some layer, which the forward model rejects) and are left out; they are not counted as missing "
            "arrivals.")


def _prior_outside(fwd: dict, fit: _Fit | None, picks) -> np.ndarray | None:
    t = fwd.get("prior_times")
    if t is None or fit is None:
        return None
    obs = np.asarray(picks.time, dtype=float) - np.median(fit.origin, axis=0)
    tt = np.where(np.isfinite(t), t, np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        lo, hi = np.nanquantile(tt, [0.025, 0.975], axis=0)
    return ~((obs >= lo) & (obs <= hi))


# =================================================================== rendering
_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,Helvetica,Arial,sans-serif;margin:0;color:#1d2430;
background:#fff;line-height:1.45}
main{max-width:1100px;margin:0 auto;padding:1.5em 2em 4em}
h1{font-size:1.6em;margin:.2em 0 .4em}
h2{font-size:1.3em;border-bottom:2px solid #d0d7e2;padding-bottom:.2em;margin-top:2em}
h3{font-size:1.05em;margin:1.4em 0 .4em}
nav{background:#f3f5f9;border:1px solid #d0d7e2;padding:.6em 1em;border-radius:6px}
nav a{margin-right:1.2em;color:#1f4e9a;text-decoration:none;white-space:nowrap}
table{border-collapse:collapse;margin:.6em 0;font-size:.88em}
th,td{border:1px solid #d0d7e2;padding:.25em .55em;text-align:right;vertical-align:top}
th{background:#eef1f6;text-align:center}
td{text-align:right}
td.l{text-align:left}
td.r{white-space:nowrap}
.scroll{overflow-x:auto}
caption{caption-side:bottom;text-align:left;font-size:.9em;color:#4a5568;padding-top:.3em;max-width:60em}
.box{padding:.6em 1em;border-radius:6px;margin:.8em 0}
.good{background:#e7f5ea;border-left:5px solid #2f8f46}
.bad{background:#fdeaea;border-left:5px solid #c53030;font-weight:600}
.warn{background:#fff6e0;border-left:5px solid #c98a00}
.note{background:#f6f7fb;border-left:5px solid #8a94a6}
figure{margin:1.5em 0;border-top:1px solid #e2e8f0;padding-top:.8em}
figure img{max-width:100%;height:auto;display:block}
figcaption{font-size:.92em;color:#2d3748;max-width:60em;margin-top:.4em}
.meta{color:#4a5568;font-size:.9em}
"""


def _esc(text) -> str:
    return html.escape(str(text), quote=True)


def _render_html(title: str, blocks: list, meta: str, verdict: _Para) -> str:
    parts = ["<!DOCTYPE html>", '<html lang="en">', "<head>", '<meta charset="utf-8">',
             '<meta name="viewport" content="width=device-width, initial-scale=1">',
             f"<title>{_esc(title)} — inversion report</title>", f"<style>{_CSS}</style>", "</head>", "<body>",
             "<main>", f"<h1>{_esc(title)}</h1>", f'<p class="meta">{_esc(meta)}</p>',
             f'<div class="box {verdict.kind}">{_esc(verdict.text)}</div>',
             "<nav>" + "".join(f'<a href="#{a}">{_esc(t)}</a>' for a, t in SECTIONS) + "</nav>"]
    for b in blocks:
        if isinstance(b, _Heading):
            parts.append(f'<h2 id="{b.anchor}">{_esc(b.text)}</h2>')
        elif isinstance(b, _Subheading):
            parts.append(f"<h3>{_esc(b.text)}</h3>")
        elif isinstance(b, _Para):
            cls = f' class="box {b.kind}"' if b.kind != "plain" else ""
            parts.append(f"<p{cls}>{_esc(b.text)}</p>")
        elif isinstance(b, _Items):
            parts.append("<ul>" + "".join(f"<li>{_esc(i)}</li>" for i in b.items) + "</ul>")
        elif isinstance(b, _Table):
            al = b.alignment()
            rows = "".join("<tr>" + "".join(f'<td class="{a}">{_esc(c)}</td>' for a, c in zip(al, r)) + "</tr>"
                           for r in b.rows)
            cap = f"<caption>{_esc(b.caption)}</caption>" if b.caption else ""
            head = "<tr>" + "".join(f"<th>{_esc(h)}</th>" for h in b.header) + "</tr>"
            parts.append(f'<div class="scroll"><table>{cap}<thead>{head}</thead><tbody>{rows}</tbody></table></div>')
        elif isinstance(b, _Figure):
            data = base64.b64encode(b.png).decode("ascii")
            parts.append(f'<figure id="figure-{b.key}"><h3>{_esc(b.title)}</h3>'
                         f'<img src="data:image/png;base64,{data}" alt="{_esc(b.title)}">'
                         f"<figcaption>{_esc(b.caption)}</figcaption></figure>")
    parts += ["</main>", "</body>", "</html>"]
    return "\n".join(parts) + "\n"


def _md_cell(text) -> str:
    return str(text).replace("|", "\\|").replace("\n", " ")


def _render_markdown(title: str, blocks: list, meta: str, verdict: _Para, png: bool) -> str:
    lines = [f"# {title}", "", f"*{meta}*", "", f"> **{verdict.text}**", ""]
    lines.append("Contents: " + " · ".join(f"[{t}](#{a})" for a, t in SECTIONS))
    lines.append("")
    for b in blocks:
        if isinstance(b, _Heading):
            lines += [f'<a id="{b.anchor}"></a>', "", f"## {b.text}", ""]
        elif isinstance(b, _Subheading):
            lines += [f"### {b.text}", ""]
        elif isinstance(b, _Para):
            if b.kind == "bad":
                lines += [f"> **{b.text}**", ""]
            elif b.kind in ("good", "note", "warn"):
                lines += [f"> {b.text}", ""]
            else:
                lines += [b.text, ""]
        elif isinstance(b, _Items):
            lines += [f"- {i}" for i in b.items] + [""]
        elif isinstance(b, _Table):
            lines.append("| " + " | ".join(_md_cell(h) for h in b.header) + " |")
            lines.append("|" + "|".join(":---" if a == "l" else "---:" for a in b.alignment()) + "|")
            lines += ["| " + " | ".join(_md_cell(c) for c in r) + " |" for r in b.rows]
            if b.caption:
                lines += ["", f"*{b.caption}*"]
            lines.append("")
        elif isinstance(b, _Figure):
            lines += [f"### {b.title}", ""]
            if png:
                lines += [f"![{b.title}](figures/{b.key}.png)", ""]
            else:
                lines += [f"(Embedded in report.html; `invert report --png` also writes figures/{b.key}.png.)", ""]
            lines += [b.caption, ""]
    return "\n".join(lines).rstrip() + "\n"


# =================================================================== entry point
def write_report(run_dir, png: bool = False, *, bedrock_velocity: float = BEDROCK_VS,
                 site_classes: str = "ASCE7-16", max_draws: int = MAX_FORWARD_DRAWS, seed: int = 0) -> Path:
    """Write ``report.html`` and ``report.md`` for the run in ``run_dir``.

    Parameters
    ----------
    run_dir : str or Path
        Output folder of ``invert run``.
    png : bool
        Also write every figure as ``run_dir/figures/<name>.png`` and reference
        those files from ``report.md``.
    bedrock_velocity : float
        S velocity [m/s] whose depth is reported (metre runs with S velocities);
        default 760 m/s.
    site_classes : str
        Key of :data:`invert.posterior.SITE_CLASS_SCHEMES` ("ASCE7-16" or "EC8-2004").
    max_draws : int
        Most posterior draws used for ray tracing, predicted times and figures.
    seed : int
        Seed of the noise drawn for replicated picks (the report is reproducible).

    Returns
    -------
    Path
        The HTML report. Both files are written to temporary names and renamed into place.
    """
    from .run import write_atomic

    if site_classes not in post.SITE_CLASS_SCHEMES:
        raise ValueError(f"site_classes: expected one of {', '.join(post.SITE_CLASS_SCHEMES)}, got {site_classes!r}")
    if not (np.isfinite(bedrock_velocity) and bedrock_velocity > 0):
        raise ValueError(f"bedrock_velocity: expected a velocity > 0 in m/s, got {bedrock_velocity!r}")
    if int(max_draws) < 10:
        raise ValueError(f"max_draws: expected at least 10 draws, got {max_draws!r}")
    run = read_run(run_dir)
    rng = np.random.default_rng(seed)
    an = _analyse(run, int(max_draws))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        fwd = _forward_quantities(an, bedrock_velocity)
        fit = _fit(an, rng)
        fwd["prior_outside"] = _prior_outside(fwd, fit, run.problem.picks)
        blocks = _section_run(an, fit)
        blocks += _section_convergence(an)
        blocks += _section_estimates(an)
        blocks += _section_derived(an, fwd, bedrock_velocity, site_classes)
        blocks += _section_probabilities(an)
        blocks += _section_flags(an, fwd, fit)
        figures = _figures(an, fwd, fit)
    blocks += [_Heading(*SECTIONS[6])]
    blocks += [_Para("Each figure is described in its caption; docs/report.md explains how to read them.", "plain")]
    blocks += figures
    blocks += _section_cautions(run.problem.sphere)
    converged = run.convergence.get("converged") is True
    verdict = (_Para("Sampling converged (all convergence targets met). Read the cautions at the end before using "
                     "the numbers.", "good") if converged else
               _Para("The sampling did NOT converge: every number below is provisional. Read the cautions at the "
                     "end before using the numbers.", "bad"))
    created = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    meta = f"Report of the run in {run.path.resolve()}, written {created}."
    title = run.config.title
    run_dir = Path(run_dir)
    if png:
        folder = run_dir / "figures"
        folder.mkdir(exist_ok=True)
        for f in figures:
            write_atomic(folder / f"{f.key}.png", f.png)
    write_atomic(run_dir / "report.md", _render_markdown(title, blocks, meta, verdict, png))
    write_atomic(run_dir / "report.html", _render_html(title, blocks, meta, verdict))
    return run_dir / "report.html"


# =================================================================== comparison and low-velocity-zone folders
#: Section anchors and headings of the report of an ``invert compare`` folder.
COMPARISON_SECTIONS = (
    ("compared", "What was compared"),
    ("evidence", "Evidence and model probabilities"),
    ("layers", "How many layers?"),
    ("average", "Model-averaged velocity against depth"),
    ("agreement", "Do the two estimators agree?"),
    ("notes", "Notes"),
    ("cautions", "Cautions"),
)

#: Section anchors and headings of the report of an ``invert lvz-test`` folder.
LVZ_SECTIONS = (
    ("tested", "What was tested"),
    ("verdict", "Bayes factors"),
    ("layers", "Each slower layer tested"),
    ("notes", "Notes"),
    ("cautions", "Cautions"),
)

COMPARISON_CAUTIONS = (
    "Evidences and Bayes factors depend on the priors: a wider prior range makes a model pay more for its "
    "parameters (Occam's razor), so the verdict is a statement about the data and the priors together. Model "
    "probabilities are relative to the candidates compared: a model nobody proposed gets none. Every log Z is an "
    "estimate with a stated error, propagated into the probability ranges; when the two estimators disagree, "
    "neither value is trustworthy until a longer run settles it. The model is one-dimensional (flat, laterally "
    "uniform layers), and the cautions of the run report apply to every candidate. Engineering decisions follow "
    "the local code and the judgement of licensed professionals."
)


def comparison_kind(folder) -> str | None:
    """``'comparison'`` or ``'lvz'`` for a folder of ``invert compare`` or ``invert lvz-test``, else None."""
    folder = Path(folder)
    if (folder / "comparison.json").is_file():
        return "comparison"
    if (folder / "lvz_test.json").is_file():
        return "lvz"
    return None


def _f(x, digits: int = 2) -> str:
    """Fixed decimals for log evidences and their differences (n/a when missing)."""
    if x is None:
        return "n/a"
    try:
        x = float(x)
    except (TypeError, ValueError):
        return str(x)
    if not math.isfinite(x):
        return _num(x)
    return f"{x:.{digits}f}".replace("-", "−")


def _pm(value, error, digits: int = 2) -> str:
    if value is None:
        return "—"
    return f"{_f(value, digits)} ± {_f(error, digits)}"


def _estimate_rows(estimates: dict) -> list:
    """Table rows per model and estimator: method, log Z, error, likelihood calls, seconds, settings."""
    rows = []
    for model, per in estimates.items():
        for key in ("nested", "stepping"):
            r = per.get(key)
            if r is None:
                continue
            d = r.get("details", {})
            if key == "nested":
                setting = (f"{d.get('live_points', '?')} live points, information "
                           f"{_f(d.get('information_nats'), 1)} nats")
            else:
                setting = (f"{len(d.get('ladder', [])) - 1} rungs × ({d.get('burn', '?')} + {d.get('steps', '?')}) "
                           f"steps, {d.get('walkers', '?')} walkers")
            rows.append([model, r["method"], _pm(r["log_z"], r["log_z_error"], 3), f"{int(r['n_calls']):,}",
                         _num(r["seconds"], 3), setting])
    return rows


#: Spread of log Z [nats] beyond which the comparison figure uses a symmetric-log axis, linear within SYMLOG_LINEAR_NATS.
SYMLOG_FROM_NATS = 50.0
SYMLOG_LINEAR_NATS = 10.0


def evidence_axis(spread: float) -> tuple:
    """Axis of the log-evidence figure for candidates spanning ``spread`` nats of log Z.

    Returns (scale, limits, label note): ``"linear"`` (limits None, no note) up to
    ``SYMLOG_FROM_NATS``; beyond, ``"symlog"`` (linear within
    ``SYMLOG_LINEAR_NATS``) from twice the spread below the best to
    ``SYMLOG_LINEAR_NATS`` above it, so that near-best models stay readable.
    """
    if not spread > SYMLOG_FROM_NATS:
        return "linear", None, ""
    return ("symlog", (-2.0 * spread, SYMLOG_LINEAR_NATS),
            f"\n(axis linear within ±{SYMLOG_LINEAR_NATS:g} nats, logarithmic beyond)")


def _comparison_figures(doc: dict, folder: Path) -> list:
    """Figures of a comparison: log Z per model and estimator, the layer-count posterior, the averaged density."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    figures = []
    models = doc["models"]
    names = [m["model"] for m in models]
    # log Z by estimator, relative to the best model's combined value
    best = max(m["log_z"] for m in models)
    fig, ax = plt.subplots(figsize=(7.0, 0.6 * len(models) + 1.8), dpi=110)
    y = np.arange(len(models))
    for off, key, label, colour in ((-0.18, "log_z_nested", "nested sampling", "tab:blue"),
                                    (0.0, "log_z_stepping_stone", "stepping-stone", "tab:orange"),
                                    (0.18, "log_z", "used (combined)", "black")):
        vals = [m.get(key) for m in models]
        errs = [m.get(key + "_error") for m in models]
        sel = [i for i, v in enumerate(vals) if v is not None]
        if sel:
            ax.errorbar([vals[i] - best for i in sel], y[sel] + off, xerr=[2 * errs[i] for i in sel], fmt="o",
                        color=colour, ms=4, capsize=3, label=label)
    ax.set_yticks(y, names)
    ax.invert_yaxis()
    ax.axvline(0.0, color="0.6", lw=0.8)
    for step in (-1.0, -3.0, -5.0):  # Kass & Raftery (1995) steps in ln B (from memory)
        ax.axvline(step, color="0.85", lw=0.8, ls=":")
    scale, limits, scale_note = evidence_axis(best - min(m["log_z"] for m in models))
    if scale == "symlog":  # keep the near-best models readable next to far-worse ones
        ax.set_xscale("symlog", linthresh=SYMLOG_LINEAR_NATS)
        ax.set_xlim(*limits)
    ax.set_xlabel("log Z − log Z of the best model [nats]; bars ± 2 stated errors; dotted: ln B = −1, −3, −5"
                  + scale_note, fontsize=9)
    ax.legend(fontsize=8, loc="best")
    fig.tight_layout()
    figures.append(("log_evidence", "Log evidence of each candidate", fig,
                    "Each candidate's log evidence by each estimator, relative to the best model's combined value "
                    "(error bars: twice the stated standard error). Estimates of the same model should overlap; the "
                    "dotted lines mark where the Bayes factor against the best model reaches e, e³ and e⁵ (the "
                    "steps of Kass & Raftery's scale in ln B)."))
    # number of layers
    lc = doc.get("layer_count", [])
    if lc:
        fig, ax = plt.subplots(figsize=(5.5, 3.4), dpi=110)
        n = [r["layers_with_half_space"] for r in lc]
        p = [r["posterior_probability"] for r in lc]
        e = [r["posterior_probability_error"] for r in lc]
        pr = [r["prior_probability"] for r in lc]
        x = np.arange(len(lc))
        ax.bar(x - 0.2, pr, width=0.38, color="0.8", label="prior")
        ax.bar(x + 0.2, p, width=0.38, color="tab:blue", yerr=e, capsize=4, label="posterior (± 1 sd)")
        ax.set_xticks(x, [str(v) for v in n])
        ax.set_xlabel("number of layers, half-space included")
        ax.set_ylabel("probability")
        ax.set_ylim(0, 1.05)
        ax.legend(fontsize=8)
        fig.tight_layout()
        figures.append(("layer_count", "Posterior of the number of layers", fig,
                        "Prior and posterior probability of each number of layers (the half-space counted as a "
                        "layer), summed over the candidates with that number; error bars propagate the stated log Z "
                        "errors."))
    # model-averaged density, redrawn from the CSV files
    dens = _read_density(folder)
    if dens is not None:
        depth, vel, d, q = dens
        units = doc.get("units", "")
        fig, ax = plt.subplots(figsize=(5.5, 6.0), dpi=110)
        peak = np.max(d, axis=1, keepdims=True)
        shade = np.sqrt(np.divide(d, peak, out=np.zeros_like(d), where=peak > 0))
        ax.pcolormesh(vel, depth, shade, shading="auto", cmap="Greys", vmin=0.0, vmax=1.0)
        ax.plot(q[:, 2], depth, color="tab:red", lw=1.3, label="median")
        ax.plot(q[:, 1], depth, color="tab:red", lw=0.8, ls=":", label="68 % range")
        ax.plot(q[:, 3], depth, color="tab:red", lw=0.8, ls=":")
        ax.plot(q[:, 0], depth, color="tab:red", lw=0.8, ls="--", label="95 % range")
        ax.plot(q[:, 4], depth, color="tab:red", lw=0.8, ls="--")
        ax.set_ylim(depth[-1], depth[0])
        ax.set_xlabel("P velocity" + (f" [{units}/s]" if units else ""))
        ax.set_ylabel("depth" + (f" [{units}]" if units else ""))
        ax.legend(loc="lower left", fontsize=8)
        fig.tight_layout()
        figures.append(("velocity_density", "Model-averaged velocity against depth", fig,
                        "Every candidate's posterior velocity profile, mixed in proportion to its posterior model "
                        "probability. Shading: density at each depth relative to that depth's peak (square root, so "
                        "that faint branches stay visible); red: median and 68 / 95 % ranges of the mixture. Where "
                        "the candidates put interfaces at different depths the mixture shows each of them."))
    out = []
    for key, title, fig, caption in figures:
        out.append(_Figure(key, title, caption, _png(fig)))
        plt.close(fig)
    return out


def _read_density(folder: Path):
    """(depth, velocity, density (Z, V), quantiles (Z, 5)) from velocity_density.csv and velocity_quantiles.csv."""
    dpath, qpath = folder / "velocity_density.csv", folder / "velocity_quantiles.csv"
    if not (dpath.is_file() and qpath.is_file()):
        return None
    try:
        raw = np.loadtxt(dpath, delimiter=",", skiprows=1, ndmin=2)
        q = np.loadtxt(qpath, delimiter=",", skiprows=1, ndmin=2)
    except ValueError as exc:
        raise ValueError(f"{dpath} or {qpath}: not the layout written by 'invert compare' ({exc})") from None
    depth = np.unique(raw[:, 0])
    vel = np.unique(raw[:, 1])
    if raw.shape[0] != depth.size * vel.size or q.shape != (depth.size, 6):
        raise ValueError(f"{dpath}: expected one row per depth and velocity ({depth.size} x {vel.size}) and "
                         f"{qpath} one row per depth with 5 quantiles")
    return depth, vel, raw[:, 2].reshape(depth.size, vel.size), q[:, 1:]


def _comparison_blocks(doc: dict, folder: Path) -> tuple:
    models = doc["models"]
    settings = doc.get("settings", {})
    blocks = [_Heading(*COMPARISON_SECTIONS[0])]
    blocks.append(_Para(
        f"{_plural(len(models), 'candidate parameterisation')} of the same picks, compared by their evidence "
        "(marginal likelihood): the probability of the data under each model, averaged over its prior. Both "
        "estimators use the same likelihood and normalised priors as an ordinary run, nuisance parameters "
        "included. docs/evidence.md describes the method."))
    est = ", ".join({"nested": "nested sampling", "stepping": "stepping-stone"}.get(e, e)
                    for e in settings.get("estimators", []))
    blocks.append(_Para(
        f"Estimators: {est}. Nested sampling: {settings.get('live_points')} live points "
        f"({settings.get('proposal')} proposals). Stepping-stone: {settings.get('rungs')} rungs, ladder power "
        f"{settings.get('ladder_power')}, {settings.get('rung_burn')} discarded + {settings.get('rung_steps')} kept "
        f"steps per rung. Seed {settings.get('seed')}."))
    blocks.append(_Table(["model", "estimator", "log Z", "likelihood calls", "time [s]", "settings"],
                         _estimate_rows(doc.get("estimates", {})), "One row per model and estimator run.",
                         align="llrrrl"))
    blocks.append(_Heading(*COMPARISON_SECTIONS[1]))
    rows = []
    for m in models:
        rows.append([m["model"], str(m["layers_above_half_space"] + 1), str(m["free_parameters"]),
                     _pm(m.get("log_z_nested"), m.get("log_z_nested_error")),
                     _pm(m.get("log_z_stepping_stone"), m.get("log_z_stepping_stone_error")),
                     _pm(m["log_z"], m["log_z_error"]), _pm(m["delta_log_z"], m["delta_log_z_error"]),
                     _num(m["bayes_factor_vs_best"], 3), _pct(m["prior_probability"]),
                     f"{_pct(m['posterior_probability'])} ({_pct(m['posterior_probability_low95'])} – "
                     f"{_pct(m['posterior_probability_high95'])})", m["strength"]])
    blocks.append(_Table(["model", "layers (with half-space)", "free parameters", "log Z nested",
                          "log Z stepping-stone", "log Z used", "Δ log Z to best", "Bayes factor vs best",
                          "prior P", "posterior P (95 % range)", "strength against"], rows,
                         "Natural logs. Δ log Z = ln B against the best model. Strength on the scale of Kass & "
                         "Raftery (1995), defined on 2 ln B: 0–2 not worth more than a bare mention, 2–6 positive, "
                         "6–10 strong, above 10 very strong (in ln B about 1, 3 and 5). Posterior model "
                         "probabilities use the stated prior weights; their 95 % ranges propagate the log Z errors.",
                         align="lrrrrrrrrrl"))
    order = sorted(models, key=lambda m: -m["posterior_probability"])
    best, second = order[0], order[1]
    ln_b = best["log_z"] - second["log_z"]
    err = math.hypot(best["log_z_error"], second["log_z_error"])
    blocks.append(_Para(
        f"Best supported: {best['model']} (posterior probability {_pct(best['posterior_probability'])}). Against "
        f"the runner-up, {second['model']}, ln B = {_pm(ln_b, err)}: {second['strength']}."
        + (" The difference is within twice its error: the data do not separate these two." if abs(ln_b) < 2 * err
           else ""), "note"))
    figures = _comparison_figures(doc, folder)
    by_key = {f.key: f for f in figures}
    blocks.append(by_key["log_evidence"])
    blocks.append(_Heading(*COMPARISON_SECTIONS[2]))
    lc = doc.get("layer_count", [])
    blocks.append(_Table(["layers (with half-space)", "layers over the half-space", "prior P", "posterior P",
                          "models"],
                         [[str(r["layers_with_half_space"]), str(r["layers_above_half_space"]),
                           _pct(r["prior_probability"]),
                           f"{_pct(r['posterior_probability'])} ± {_pct(r['posterior_probability_error'])}",
                           r["models"]] for r in lc],
                         "Posterior of the number of layers: the probabilities of the candidates with that number, "
                         "summed.", align="rrrrl"))
    if "layer_count" in by_key:
        blocks.append(by_key["layer_count"])
    blocks.append(_Heading(*COMPARISON_SECTIONS[3]))
    if "velocity_density" in by_key:
        blocks.append(_Para("Each candidate's posterior draws, mixed by its posterior probability; the numbers are "
                            "in velocity_density.csv and velocity_quantiles.csv."))
        blocks.append(by_key["velocity_density"])
    else:
        blocks.append(_Para("No model-averaged density in this folder (velocity_density.csv missing); see the "
                            "notes.", "warn"))
    blocks.append(_Heading(*COMPARISON_SECTIONS[4]))
    items, bad = [], []
    for m in models:
        per = doc.get("estimates", {}).get(m["model"], {})
        if "nested" in per and "stepping" in per:
            a, b = per["nested"], per["stepping"]
            diff = a["log_z"] - b["log_z"]
            comb = math.hypot(a["log_z_error"], b["log_z_error"])
            z = diff / comb if comb > 0 else math.inf
            ok = m.get("estimators_agree")
            if not ok:
                bad.append(m["model"])
            items.append(f"{m['model']}: nested − stepping-stone = {_f(diff, 3)} nats, {abs(z):.1f} combined "
                         f"standard errors ({_f(comb, 3)}): {'agree' if ok else 'DISAGREE'}.")
        else:
            items.append(f"{m['model']}: one estimator only; nothing to compare.")
    if bad:
        blocks.append(_Para(f"The two estimators disagree for {', '.join(bad)} beyond three combined stated "
                            "errors: the log Z used is their mean with an error covering both, and the verdict "
                            "above is only as good as that. Run longer before drawing conclusions.", "bad"))
    elif any("one estimator only" not in i for i in items):
        blocks.append(_Para("The two estimators agree within three combined stated errors for every model that "
                            "ran both.", "good"))
    blocks.append(_Items(items))
    blocks.append(_Heading(*COMPARISON_SECTIONS[5]))
    notes = doc.get("notes", [])
    blocks.append(_Items([_sentence(n) for n in notes]) if notes else _Para("No notes."))
    blocks.append(_Heading(*COMPARISON_SECTIONS[6]))
    blocks.append(_Para(COMPARISON_CAUTIONS, "warn"))
    verdict_bad = bool(bad)
    verdict = (_Para(f"The estimators DISAGREE for {', '.join(bad)}: the comparison is provisional.", "bad")
               if verdict_bad else
               _Para(f"Best supported: {best['model']} ({_pct(best['posterior_probability'])}); against "
                     f"{second['model']}: {second['strength']}. Read the cautions at the end.", "good"))
    return blocks, figures, verdict


def _lvz_figure(doc: dict) -> _Figure:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    tests = doc["tests"]
    fig, ax = plt.subplots(figsize=(6.5, 0.6 * len(tests) + 1.9), dpi=110)
    y = np.arange(len(tests))
    lb = np.array([t["log_bayes_factor"] for t in tests])
    le = np.array([t["log_bayes_factor_error"] for t in tests])
    ax.errorbar(lb, y, xerr=2 * le, fmt="o", color="black", capsize=3, label="two runs: ln B (slower : monotone)")
    one = np.array([-t["one_run_log_bayes_factor_monotone"] for t in tests])
    one_e = np.array([t["one_run_log_bayes_factor_monotone_error"] for t in tests], dtype=float)
    bound = np.array([bool(t["one_run_upper_bound_only"]) for t in tests])
    if (~bound).any():
        ax.errorbar(one[~bound], y[~bound] + 0.2, xerr=2 * one_e[~bound], fmt="s", color="tab:blue", ms=4,
                    capsize=3, label="one run (encompassing prior)")
    if bound.any():
        ax.scatter(one[bound], y[bound] + 0.2, marker=">", s=40, color="tab:blue",
                   label="one run: at least this (no monotone draw)")
    caps = np.array([-t["log_cap_monotone"] for t in tests])
    ax.scatter(caps, y - 0.2, marker="|", s=200, color="tab:red", label="lowest possible: ln P(monotone)")
    for step in (-5, -3, -1, 1, 3, 5):
        ax.axvline(step, color="0.85", lw=0.8, ls=":")
    ax.axvline(0, color="0.6", lw=0.8)
    ax.set_yticks(y, [f"layer {t['layer']} may be slower" for t in tests])
    ax.set_ylim(len(tests) - 0.5, -0.5)
    ax.set_xlabel("ln B (slower layer : monotone) [nats]\n> 0 favours a slower layer; bars ± 2 stated errors")
    ax.legend(fontsize=7, loc="best")
    fig.tight_layout()
    out = _Figure("lvz_bayes_factors", "Bayes factors of the slower-layer models", (
        "ln B of each permissive model (a slower layer allowed) against the monotone one, from the two evidences "
        "(black) and from the permissive run alone (blue; a lower bound, drawn as an arrow head, when no draw was "
        "monotone), with twice the "
        "stated errors. Red: the lowest value possible, ln P(monotone) under the permissive prior: no data can "
        "favour the monotone model more. Dotted lines: ln B = ±1, ±3, ±5 (Kass & Raftery 1995)."), _png(fig))
    plt.close(fig)
    return out


def _lvz_blocks(doc: dict) -> tuple:
    from .compare import FIRST_ARRIVAL_LIMIT, LVZ_AT_CAP, at_prior_cap, lvz_test_strength

    mono = doc["monotone"]
    tests = doc["tests"]
    units = doc.get("units", "")
    s = doc.get("settings", {})
    blocks = [_Heading(*LVZ_SECTIONS[0])]
    blocks.append(_Para(
        f"Run description {doc.get('config', '?')}. A monotone model (velocity never decreases downward) against "
        f"{_plural(len(tests), 'permissive model')} in which one layer may be slower than the layer above it. Same "
        f"picks, likelihood and priors otherwise. Monotone model: log Z = {_pm(mono['log_z'], mono['log_z_error'])}. "
        f"Estimators: {', '.join(s.get('estimators', []))}; {s.get('live_points')} live points; "
        f"{s.get('rungs')} rungs × ({s.get('rung_burn')} + {s.get('rung_steps')}) steps; seed {s.get('seed')}."))
    blocks.append(_Heading(*LVZ_SECTIONS[1]))
    rows = []
    for t in tests:
        one = (f"< {_f(t['one_run_log_bayes_factor_monotone'])}" if t["one_run_upper_bound_only"] else
               _pm(t["one_run_log_bayes_factor_monotone"], t["one_run_log_bayes_factor_monotone_error"]))
        rows.append([str(t["layer"]), _pm(t["log_z_permissive"], t["log_z_permissive_error"]),
                     _pm(t["log_bayes_factor"], t["log_bayes_factor_error"]), t["favours"], lvz_test_strength(t),
                     _pct(t["prior_inversion_probability"]),
                     f"{_pct(t['posterior_inversion_probability'])} ± "
                     f"{_pct(t['posterior_inversion_probability_error'])}", one, _f(t["log_cap_monotone"]),
                     "agree" if t["one_run_agrees_with_two_runs"] else "DISAGREE"])
    blocks.append(_Table(["slower layer allowed", "log Z", "ln B (slower : monotone)", "favours", "strength",
                          "P(inversion) prior", "P(inversion | data)", "one-run ln B (monotone : slower)",
                          "cap ln(1/P(monotone))", "one run vs two runs"], rows,
                         "The one-run cross-check uses the permissive run alone: B(monotone : slower) = "
                         "P(monotone | data) / P(monotone), both under the permissive model. Since P(monotone | data) "
                         "cannot exceed 1, no data can give the monotone model more than 1 / P(monotone) (the cap, "
                         "in nats).", align="rrrllrrrrl"))
    figure = _lvz_figure(doc)
    blocks.append(figure)
    blocks.append(_Heading(*LVZ_SECTIONS[2]))
    any_bad = mono.get("estimators_agree") is False
    for t in tests:
        k = t["layer"]
        cov = t["coverage"]
        blocks.append(_Subheading(f"Slower layer {k}"))
        blocks.append(_Para(FIRST_ARRIVAL_LIMIT))
        if cov["first_arrivals_only"]:
            blocks.append(_Para("These data hold first arrivals only (no reflections, no buried sources or "
                                "receivers): the verdict is driven by the prior (how much prior room the slower "
                                "layer's velocity and thickness are given), not by the data. Read the Bayes factor as "
                                "a statement about the priors.", "warn"))
        elif cov["reflections_from_base_or_below"] == 0 and cov["buried_sources_or_receivers"] == 0:
            blocks.append(_Para(f"The data hold reflections, but none from interface {k} (the base of layer {k}) or "
                                "below, and no buried sources or receivers: the slower layer is still seen only "
                                "through the delay it adds, and the verdict leans on the prior.", "warn"))
        else:
            blocks.append(_Para(f"The data hold {cov['reflections_from_base_or_below']} reflection pick(s) from "
                                f"interface {k} or below and {cov['buried_sources_or_receivers']} pick(s) with buried "
                                "sources or receivers: these see the slower layer's travel time directly.", "note"))
        if at_prior_cap(t["log_bayes_factor"], t["log_bayes_factor_error"], t["log_cap_monotone"]):
            blocks.append(_Para(LVZ_AT_CAP.format(log_b=-t["log_bayes_factor"], cap=t["log_cap_monotone"]), "warn"))
        srows = [[x["parameter"], _num(x["contraction"], 2), _num(x["median_permissive"]),
                  _num(x["median_monotone"]), _num(x["shift_in_sd"], 2)] for x in t["sensitivity"]]
        blocks.append(_Table(["parameter", "contraction", "median (slower allowed)", "median (monotone)",
                              "shift [sd]"], srows,
                             "Contraction = 1 − posterior variance / prior variance under the permissive model (near "
                             "0: the data say nothing about it); shift = monotone median − permissive median, in "
                             f"permissive posterior standard deviations. Depths and velocities in {units} and "
                             f"{units}/s.", align="lrrrr"))
        sens = [x["parameter"] for x in t["sensitivity"] if _finite(x["shift_in_sd"]) and abs(x["shift_in_sd"]) > 1]
        blocks.append(_Para(f"The test is sensitive to: {', '.join(sens)} (they move by more than one posterior sd "
                            "between the two models)." if sens else
                            "No parameter near the slower layer moves by more than one posterior sd between the "
                            "models."))
        blocks.append(_Para(f"To resolve a slower layer {k}: reflections from its base (interface {k}) give its "
                            "two-way time and, with offset, its velocity; S waves see it separately (an S "
                            "low-velocity zone need not coincide with a P one); a borehole (sensors in and below the "
                            "layer, or a log) measures its velocity directly."))
        if t.get("estimators_agree") is False:
            any_bad = True
            blocks.append(_Para("The two estimators disagree for this permissive model; see the notes.", "bad"))
        if not t["one_run_agrees_with_two_runs"]:
            any_bad = True
            blocks.append(_Para("The one-run cross-check disagrees with the two-run Bayes factor: at least one of "
                                "the evidence estimates (or the posterior fraction) is off; run longer before "
                                "trusting either.", "bad"))
    blocks.append(_Heading(*LVZ_SECTIONS[3]))
    notes = [n for t in tests for n in t.get("notes", [])] + list(mono.get("notes", []))
    blocks.append(_Items([_sentence(n) for n in notes]) if notes else _Para("No notes."))
    blocks.append(_Heading(*LVZ_SECTIONS[4]))
    blocks.append(_Para(COMPARISON_CAUTIONS, "warn"))
    words = "; ".join(f"layer {t['layer']}: {t['favours']} ({lvz_test_strength(t)}, P(inversion | data) "
                      f"{_pct(t['posterior_inversion_probability'])})" for t in tests)
    verdict = (_Para(f"{words}. Some checks DISAGREE (see below): the verdict is provisional.", "bad") if any_bad
               else _Para(f"{words}. Read what first arrivals cannot see, and the cautions.", "good"))
    return blocks, [figure], verdict


def _finite(x) -> bool:
    try:
        return math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def _render_page_html(title: str, blocks: list, meta: str, verdict: _Para, sections: tuple, kind: str) -> str:
    """:func:`_render_html` for a page with its own sections (comparison and low-velocity-zone reports)."""
    page = _render_html(title, blocks, meta, verdict)
    nav = "<nav>" + "".join(f'<a href="#{a}">{_esc(t)}</a>' for a, t in SECTIONS) + "</nav>"
    own = "<nav>" + "".join(f'<a href="#{a}">{_esc(t)}</a>' for a, t in sections) + "</nav>"
    page = page.replace(nav, own, 1).replace(" — inversion report</title>", f" — {kind}</title>", 1)
    return page


def _render_page_markdown(title: str, blocks: list, meta: str, verdict: _Para, png: bool, sections: tuple) -> str:
    text = _render_markdown(title, blocks, meta, verdict, png)
    old = "Contents: " + " · ".join(f"[{t}](#{a})" for a, t in SECTIONS)
    new = "Contents: " + " · ".join(f"[{t}](#{a})" for a, t in sections)
    return text.replace(old, new, 1)


def write_comparison_report(folder, png: bool = False) -> Path:
    """Write ``report.html`` and ``report.md`` for a folder written by ``invert compare`` or ``invert lvz-test``.

    Parameters
    ----------
    folder : str or Path
        Holds ``comparison.json`` (with ``layer_count.csv``, ``velocity_density.csv`` and
        ``velocity_quantiles.csv``) or ``lvz_test.json``.
    png : bool
        Also write every figure as ``folder/figures/<name>.png`` and show those files in ``report.md``.

    Returns
    -------
    Path
        The HTML page: self-contained (figures embedded as PNG data), like the run report.

    Raises
    ------
    FileNotFoundError
        If the folder holds neither result.
    ValueError
        If a result file cannot be read (the message names it).
    """
    from .run import write_atomic

    folder = Path(folder)
    kind = comparison_kind(folder)
    if kind is None:
        raise FileNotFoundError(f"{folder} holds neither comparison.json ('invert compare') nor lvz_test.json "
                                "('invert lvz-test')")
    name = "comparison.json" if kind == "comparison" else "lvz_test.json"
    doc = _read_json(folder / name)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            if kind == "comparison":
                blocks, figures, verdict = _comparison_blocks(doc, folder)
                title, sections, label = doc.get("title", "Model comparison"), COMPARISON_SECTIONS, "model comparison"
            else:
                blocks, figures, verdict = _lvz_blocks(doc)
                title = f"Low-velocity-zone test: {doc.get('title', '')}".rstrip(": ")
                sections, label = LVZ_SECTIONS, "low-velocity-zone test"
    except (KeyError, TypeError, IndexError) as exc:
        raise ValueError(f"{folder / name}: missing or malformed entry ({exc!r}); was it written by this version "
                         "of 'invert compare' / 'invert lvz-test'?") from None
    created = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    meta = f"Report of the {label} in {folder.resolve()}, written {created}."
    if png:
        (folder / "figures").mkdir(exist_ok=True)
        for f in figures:
            write_atomic(folder / "figures" / f"{f.key}.png", f.png)
    write_atomic(folder / "report.md", _render_page_markdown(title, blocks, meta, verdict, png, sections))
    write_atomic(folder / "report.html", _render_page_html(title, blocks, meta, verdict, sections, label))
    return folder / "report.html"

