"""Run description: a TOML file read with tomllib into validated settings.

Every key is documented in ``docs/config.md``. Errors name the file, the key
and what was expected. Nothing is evaluated.
"""

from __future__ import annotations

import difflib
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .parameters import GEOMETRIES, S_MODES, LayerSettings, SphereSettings

UNITS = {"m": ("m", "m/s"), "km": ("km", "km/s")}
NOISE_MODELS = ("gaussian", "outlier_mixture", "student_t")
ORIGIN_MODES = ("known", "normal", "uniform")
START_MODES = ("optimum", "prior", "classic")


class ConfigError(ValueError):
    """A problem in the run description, naming the file and key."""

    def __init__(self, path, key: str, message: str):
        self.path = str(path)
        self.key = key
        super().__init__(f"{path}: [{key}] {message}" if key else f"{path}: {message}")


@dataclass(frozen=True)
class NoiseSettings:
    """Noise model of the picks (see docs/likelihood.md)."""

    model: str = "gaussian"
    scale: str = "fixed"  # "fixed" or "free"
    scale_prior: dict = field(default_factory=lambda: {"dist": "lognormal", "median": 1.0, "sigma_log": 0.7})
    outlier_fraction: float = 0.05
    outlier_sigma: float = 0.2  # s
    dof: float = 4.0


@dataclass(frozen=True)
class NuisanceSettings:
    """Event origin times, event positions and delay terms."""

    origin_time: str = "known"  # "known", "normal", "uniform"
    origin_time_mean: float = 0.0  # s, relative to the table's origin time (0 when unknown)
    origin_time_sd: float = 1.0  # s (normal prior)
    origin_time_width: float = 10.0  # s (uniform prior, centred on the mean)
    event_depth: dict | None = None  # prior table for unknown source depths
    epicentre_x: dict | None = None  # prior table for unknown epicentre x
    epicentre_y: dict | None = None
    receiver_delay_sd: float = 0.0  # s; > 0 turns on marginalised receiver delays
    source_delay_sd: float = 0.0  # s


@dataclass(frozen=True)
class SamplerSettings:
    """emcee settings."""

    walkers: int = 32
    steps: int = 2000
    burn: int = 500
    thin: int = 1
    ensembles: int = 4
    seed: int = 1
    until_converged: bool = False
    max_steps: int = 20000
    start: str = "optimum"
    checkpoint_every: int = 100


@dataclass(frozen=True)
class RunConfig:
    """A validated run description."""

    path: Path
    title: str
    units: str
    picks: Path
    sources: Path | None
    receivers: Path | None
    layers: LayerSettings
    prior: dict
    constraints: dict
    noise: NoiseSettings
    nuisance: NuisanceSettings
    sampler: SamplerSettings
    output: Path
    truth: dict = field(default_factory=dict)
    raw: dict = field(default_factory=dict)
    waves: tuple[str, ...] | None = None  # [data] waves: keep only these waves' picks (None: all)
    prior_template: Path | None = None  # the prior template file actually read (prior_file resolved)

    @property
    def length_unit(self) -> str:
        return UNITS[self.units][0]

    @property
    def velocity_unit(self) -> str:
        return UNITS[self.units][1]


_TOP_KEYS = {"title", "units", "prior_file", "data", "model", "prior", "constraints", "noise", "nuisance",
             "sampler", "output", "truth"}
_SECTION_KEYS = {
    "data": {"picks", "sources", "receivers", "waves"},
    "model": {"layers", "gradient_layers", "vpvs_mode", "depth_parameter", "fluid_layers", "geometry",
              "planet_radius", "max_diffraction"},
    "noise": {"model", "scale", "scale_prior", "outlier_fraction", "outlier_sigma", "dof"},
    "nuisance": {"origin_time", "origin_time_mean", "origin_time_sd", "origin_time_width", "event_depth",
                 "epicentre_x", "epicentre_y", "receiver_delay_sd", "source_delay_sd"},
    "sampler": {"walkers", "steps", "burn", "thin", "ensembles", "seed", "until_converged", "max_steps", "start",
                "checkpoint_every"},
    "output": {"folder"},
}


def _unknown(path, section: str, keys, allowed) -> None:
    for key in keys:
        if key not in allowed:
            close = difflib.get_close_matches(key, sorted(allowed), n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise ConfigError(path, section, f"unknown key {key!r}{hint}; allowed: {', '.join(sorted(allowed))}")


def _get(path, section: str, table: dict, key: str, kind, default=None, *, required=False, check=None,
         expect: str = ""):
    if key not in table:
        if required:
            raise ConfigError(path, section, f"missing key {key!r}" + (f": expected {expect}" if expect else ""))
        return default
    value = table[key]
    ok = isinstance(value, kind) and not (kind in (int, float) and isinstance(value, bool))
    if kind is float and isinstance(value, int) and not isinstance(value, bool):
        value, ok = float(value), True
    if not ok or (check is not None and not check(value)):
        raise ConfigError(path, section, f"{key} = {value!r}: expected {expect or kind.__name__}")
    return value


#: Wave names the ``[data] waves`` key accepts (as in the picks file's ``wave`` column).
WAVE_NAMES = ("P", "S")


def _waves(path, data: dict) -> tuple[str, ...] | None:
    """``[data] waves``: the waves whose picks are kept, upper case, in the given order (None: all)."""
    if "waves" not in data:
        return None
    value = data["waves"]
    expect = 'a list of wave names from "P" and "S", for instance waves = ["P"]'
    if isinstance(value, str):
        raise ConfigError(path, "data", f"waves = {value!r}: expected {expect} (square brackets)")
    if not isinstance(value, list) or not value or not all(isinstance(w, str) for w in value):
        raise ConfigError(path, "data", f"waves = {value!r}: expected {expect}")
    out = []
    for w in value:
        name = w.strip().upper()
        if name not in WAVE_NAMES:
            raise ConfigError(path, "data", f"waves = {value!r}: unknown wave {w!r}; the picks' wave column "
                                            f"holds only {' and '.join(WAVE_NAMES)}, so use names from those")
        if name in out:
            raise ConfigError(path, "data", f"waves = {value!r}: wave {name!r} is listed twice")
        out.append(name)
    return tuple(out)


def _path(base: Path, value: str | None) -> Path | None:
    if value is None:
        return None
    p = Path(value)
    return p if p.is_absolute() else (base / p)


def template_folders() -> list[Path]:
    """Folders holding the prior templates shipped with invert, in search order.

    Installed packages carry them as package data (``invert/priors``); a source
    checkout (or an editable install) has them in ``priors/`` beside the package.
    """
    here = Path(__file__).resolve().parent
    return [d for d in (here / "priors", here.parent / "priors") if d.is_dir()]


def builtin_templates() -> dict[str, Path]:
    """Name (file name without ``.toml``) -> path of every shipped prior template."""
    out: dict[str, Path] = {}
    for folder in template_folders():
        for f in sorted(folder.glob("*.toml")):
            out.setdefault(f.stem, f)
    return out


def resolve_prior_file(path, base: Path, value: str) -> Path:
    """The prior template named by ``prior_file``: a file (relative to ``base``) or a shipped template name.

    A path that exists wins; otherwise a name such as ``"shallow_site"`` (with or
    without ``.toml`` or a ``priors/`` prefix) selects the template shipped with
    invert. Raises :class:`ConfigError` with near matches when neither exists.
    """
    given = _path(base, value)
    if given.exists():
        return given
    shipped = builtin_templates()
    stem = Path(value).name
    stem = stem[:-5] if stem.endswith(".toml") else stem
    parent = Path(value).parent
    if stem in shipped and not Path(value).is_absolute() and str(parent) in (".", "priors"):
        return shipped[stem]
    close = difflib.get_close_matches(stem, sorted(shipped), n=2, cutoff=0.5)
    hint = f"; did you mean {' or '.join(repr(c) for c in close)}?" if close else ""
    names = ", ".join(repr(n) for n in sorted(shipped)) or "none found"
    raise ConfigError(path, "", f"prior_file = {value!r}: file not found ({given}), and not the name of a "
                                f"template shipped with invert ({names}){hint}")


def has_liquid_core(layers: LayerSettings) -> bool:
    """True when the model of ``layers`` has a liquid core: a fluid half-space under a solid layer.

    The core is the deepest run of fluid layers under a solid one
    (:meth:`invert.sphere.RadialModel.core`); since a fluid layer over a solid
    half-space is an outer core over an inner core, any fluid layer below a
    solid one makes a core.
    """
    fluid = set(layers.fluid_layers)
    total = layers.n_layers + 1
    solid_above = False
    for k in range(1, total + 1):
        if k in fluid and solid_above:
            return True
        if k not in fluid:
            solid_above = True
    return False


def model_words(layers: LayerSettings, n_free: int) -> str:
    """One line on the model of a run: flat layers, or the spherical planet with its shell laws.

    Parameters
    ----------
    layers : LayerSettings or SphereSettings
    n_free : int
        Number of free (sampled) parameters.
    """
    n = layers.n_layers
    if layers.geometry != "sphere":
        return f"{n} layer(s) over a half-space; {n_free} free parameters"
    md = layers.max_diffraction
    md_text = "inf (no limit)" if math.isinf(md) else f"{md:g} deg"
    core = "a liquid core" if has_liquid_core(layers) else "solid to the centre"
    return (f"spherical planet of radius {layers.planet_radius:g} km: {n} layer(s) as 'flat'-law shells (v / r "
            f"linear in ln r) over a half-space shell to the centre ('r2' law, 1 / v^2 linear in r^2), {core}; "
            f"max_diffraction = {md_text}; {n_free} free parameters")


def _read_toml(path: Path) -> dict:
    if not path.exists():
        raise ConfigError(path, "", "file not found")
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(path, "", f"not valid TOML: {exc}") from None


def load_config(path) -> RunConfig:
    """Read and validate a run description.

    Parameters
    ----------
    path : str or Path
        The TOML file. Relative paths inside it are relative to its folder.

    Raises
    ------
    ConfigError
        Naming the file, the key and what was expected.
    """
    path = Path(path)
    raw = _read_toml(path)
    base = path.parent
    _unknown(path, "", raw.keys(), _TOP_KEYS)
    for section, allowed in _SECTION_KEYS.items():
        if section in raw:
            if not isinstance(raw[section], dict):
                raise ConfigError(path, section, "expected a table")
            _unknown(path, section, raw[section].keys(), allowed)

    # prior template: its [model], [prior] and [constraints] are defaults that the run overrides
    template: dict = {}
    tpath = None
    if "prior_file" in raw:
        tpath = resolve_prior_file(path, base, _get(path, "", raw, "prior_file", str,
                                                    expect="a path to a TOML prior template, or the name of a "
                                                           "shipped template such as 'shallow_site'"))
        template = _read_toml(tpath)
        _unknown(tpath, "", template.keys(), {"template", "prior", "constraints"})
        template_units = template.get("template", {}).get("units")
        if template_units is not None and "units" not in raw:
            raw = {**raw, "units": template_units}
        if template_units is not None and template_units != raw["units"]:
            raise ConfigError(path, "", f"units = {raw['units']!r} but the prior template {tpath.name} is "
                                        f"written in {template_units!r}; use a template in the same units")
    title = _get(path, "", raw, "title", str, "untitled run")
    units = raw.get("units")
    if not raw:
        raise ConfigError(path, "", "the run description is empty; it needs at least units = \"m\" or \"km\", "
                                    "[data] picks and [model] layers (docs/config.md; the demo's run.toml is an "
                                    "example)")
    if "units" not in raw:
        raise ConfigError(path, "", "missing key 'units': expected units = 'm' (metres, m/s) or 'km' (kilometres, km/s), "
                                    "the length unit of the picks' distances and depths")
    if units not in UNITS:
        raise ConfigError(path, "", f"units = {units!r}: expected 'm' (metres, m/s) or 'km' (kilometres, km/s)")

    data = raw.get("data", {})
    picks = _path(base, _get(path, "data", data, "picks", str, required=True, expect="the picks CSV file"))
    sources = _path(base, _get(path, "data", data, "sources", str))
    receivers = _path(base, _get(path, "data", data, "receivers", str))
    for key, p in (("picks", picks), ("sources", sources), ("receivers", receivers)):
        if p is not None and not p.exists():
            raise ConfigError(path, "data", f"{key} = {str(p)!r}: file not found")
    if (sources is None) != (receivers is None):
        raise ConfigError(path, "data", "give both 'sources' and 'receivers' tables, or neither "
                                        "(then the picks file carries distance and depths)")
    waves = _waves(path, data)

    tmpl = template.get("template", {})
    from_template = {k: v for k, v in (("vpvs_mode", tmpl.get("vpvs_mode")),
                                       ("gradient_layers", tmpl.get("gradient_layers")),
                                       ("depth_parameter", tmpl.get("depth_parameter"))) if v is not None}
    if "n_layers" in tmpl:
        from_template["layers"] = tmpl["n_layers"] - 1
    model = {**from_template, **raw.get("model", {})}
    _unknown(path, "model", model.keys(), _SECTION_KEYS["model"])
    int_list = (lambda v: isinstance(v, list) and all(isinstance(i, int) and not isinstance(i, bool) for i in v))
    geometry = _get(path, "model", model, "geometry", str, "flat", check=lambda v: v in GEOMETRIES,
                    expect="'flat' (layers over a half-space) or 'sphere' (shells of a spherical planet)")
    shape = dict(
        n_layers=_get(path, "model", model, "layers", int, required=True, check=lambda v: v >= 0,
                      expect="the number of layers above the half-space (an integer >= 0)"),
        gradient_layers=tuple(_get(path, "model", model, "gradient_layers", list, [], check=int_list,
                                   expect="a list of layer numbers")),
        vpvs_mode=_get(path, "model", model, "vpvs_mode", str, "per_layer", check=lambda v: v in S_MODES,
                       expect=" or ".join(repr(m) for m in S_MODES)),
        depth_parameter=_get(path, "model", model, "depth_parameter", bool, False,
                             expect="true (priors on interface depths) or false (on thicknesses)"),
        fluid_layers=tuple(_get(path, "model", model, "fluid_layers", list, [], check=int_list,
                                expect="a list of layer numbers")),
    )
    if geometry == "flat":
        for key in ("planet_radius", "max_diffraction"):
            if key in model:
                raise ConfigError(path, "model", f"{key} is used only with geometry = 'sphere'")
        layers = LayerSettings(**shape)
    else:
        if units != "km":
            raise ConfigError(path, "", f"units = {units!r}, but geometry = 'sphere' needs units = 'km' "
                                        "(kilometres, km/s)")
        if sources is not None:
            raise ConfigError(path, "data", "geometry = 'sphere' reads the geometry inline from the picks file: "
                                            "distance = arc length along the surface [km], source_depth, "
                                            "receiver_depth; remove 'sources' and 'receivers'")
        if "max_diffraction" not in model and has_liquid_core(LayerSettings(**shape)):
            raise ConfigError(path, "model",
                              "missing key 'max_diffraction': the model has a liquid core (a fluid layer under a "
                              "solid one), so give the longest arc in degrees along the core boundary over which a "
                              "diffracted wave (Pdiff, Sdiff) counts as a first arrival (0: none, so P and S stop "
                              "at the edge of the core shadow; inf: at every distance). The diffracted time is "
                              "exact as kinematics, but whether such a wave was picked as the first arrival "
                              "depends on the data, not on the model (docs/sphere.md, 'Diffracted waves and "
                              "first-arrival picks')")
        layers = SphereSettings(
            **shape,
            planet_radius=_get(path, "model", model, "planet_radius", float, required=True,
                               check=lambda v: math.isfinite(v) and v > 0, expect="the planet radius in km (> 0)"),
            max_diffraction=_get(path, "model", model, "max_diffraction", float, math.inf,
                                 check=lambda v: v >= 0,
                                 expect="the longest arc in degrees (>= 0; inf: no limit) along the core boundary "
                                        "over which a diffracted wave counts as a first arrival"),
        )
    prior = {**template.get("prior", {}), **raw.get("prior", {})}
    constraints = {**template.get("constraints", {}), **raw.get("constraints", {})}

    nz = raw.get("noise", {})
    noise = NoiseSettings(
        model=_get(path, "noise", nz, "model", str, "gaussian", check=lambda v: v in NOISE_MODELS,
                   expect=" or ".join(repr(m) for m in NOISE_MODELS)),
        scale=_get(path, "noise", nz, "scale", str, "fixed", check=lambda v: v in ("fixed", "free"),
                   expect="'fixed' (use the picks' sigma) or 'free' (sample a common multiplier)"),
        scale_prior=_get(path, "noise", nz, "scale_prior", dict, NoiseSettings().scale_prior),
        outlier_fraction=_get(path, "noise", nz, "outlier_fraction", float, 0.05, check=lambda v: 0 < v < 1,
                              expect="a fraction between 0 and 1"),
        outlier_sigma=_get(path, "noise", nz, "outlier_sigma", float, 0.2, check=lambda v: v > 0,
                           expect="a positive width in seconds"),
        dof=_get(path, "noise", nz, "dof", float, 4.0, check=lambda v: v > 0, expect="degrees of freedom > 0"),
    )
    nu = raw.get("nuisance", {})
    positive = (lambda v: v > 0)
    nuisance = NuisanceSettings(
        origin_time=_get(path, "nuisance", nu, "origin_time", str, "known", check=lambda v: v in ORIGIN_MODES,
                         expect="'known' (from the sources table), 'normal' or 'uniform' (marginalised)"),
        origin_time_mean=_get(path, "nuisance", nu, "origin_time_mean", float, 0.0),
        origin_time_sd=_get(path, "nuisance", nu, "origin_time_sd", float, 1.0, check=positive,
                            expect="a positive standard deviation in seconds"),
        origin_time_width=_get(path, "nuisance", nu, "origin_time_width", float, 10.0, check=positive,
                               expect="a positive width in seconds"),
        event_depth=_get(path, "nuisance", nu, "event_depth", dict, None, expect="a prior table"),
        epicentre_x=_get(path, "nuisance", nu, "epicentre_x", dict, None, expect="a prior table"),
        epicentre_y=_get(path, "nuisance", nu, "epicentre_y", dict, None, expect="a prior table"),
        receiver_delay_sd=_get(path, "nuisance", nu, "receiver_delay_sd", float, 0.0, check=lambda v: v >= 0,
                               expect="a standard deviation >= 0 in seconds"),
        source_delay_sd=_get(path, "nuisance", nu, "source_delay_sd", float, 0.0, check=lambda v: v >= 0,
                             expect="a standard deviation >= 0 in seconds"),
    )
    sm = raw.get("sampler", {})
    pos_int = (lambda v: v >= 1)
    sampler = SamplerSettings(
        walkers=_get(path, "sampler", sm, "walkers", int, 32, check=lambda v: v >= 4, expect="an integer >= 4"),
        steps=_get(path, "sampler", sm, "steps", int, 2000, check=pos_int, expect="an integer >= 1"),
        burn=_get(path, "sampler", sm, "burn", int, 500, check=lambda v: v >= 0, expect="an integer >= 0"),
        thin=_get(path, "sampler", sm, "thin", int, 1, check=pos_int, expect="an integer >= 1"),
        ensembles=_get(path, "sampler", sm, "ensembles", int, 4, check=pos_int, expect="an integer >= 1"),
        seed=_get(path, "sampler", sm, "seed", int, 1, check=lambda v: v >= 0, expect="an integer >= 0"),
        until_converged=_get(path, "sampler", sm, "until_converged", bool, False, expect="true or false"),
        max_steps=_get(path, "sampler", sm, "max_steps", int, 20000, check=pos_int, expect="an integer >= 1"),
        start=_get(path, "sampler", sm, "start", str, "optimum", check=lambda v: v in START_MODES,
                   expect="'optimum' (near the posterior mode), 'prior' (prior draws) or 'classic' "
                          "(around the intercept-time estimate)"),
        checkpoint_every=_get(path, "sampler", sm, "checkpoint_every", int, 100, check=pos_int,
                              expect="an integer >= 1"),
    )
    if sampler.burn >= sampler.steps and not sampler.until_converged:
        raise ConfigError(path, "sampler", f"burn = {sampler.burn} must be smaller than steps = {sampler.steps}")
    if sampler.walkers % 2:
        raise ConfigError(path, "sampler", f"walkers = {sampler.walkers}: emcee needs an even number of walkers")
    out = raw.get("output", {})
    folder = _path(base, _get(path, "output", out, "folder", str, f"runs/{path.stem}", expect="a folder path"))
    truth = raw.get("truth", {})
    if not isinstance(truth, dict) or not all(isinstance(v, (int, float)) for v in truth.values()):
        raise ConfigError(path, "truth", "expected parameter = number entries (the true model of synthetic data)")
    return RunConfig(path=path, title=title, units=units, picks=picks, sources=sources, receivers=receivers,
                     layers=layers, prior=prior, constraints=constraints, noise=noise, nuisance=nuisance,
                     sampler=sampler, output=folder, truth=dict(truth), raw=raw, waves=waves,
                     prior_template=tpath)
