"""Bad run descriptions: every error names the file, the key and what was expected.

Table-driven: a valid run description (checked first) is changed in one place per case,
read with ``load_config`` and assembled with ``build_problem`` (what ``invert check`` and
``invert run`` do), and the resulting :class:`ConfigError` is inspected. All data here are
small synthetic tables.
"""

from __future__ import annotations

import copy
import json
from pathlib import Path

import pytest

from invert.config import ConfigError, load_config
from invert.problem import build_problem

# ---------------------------------------------------------------------------- files
LINE_PICKS = """\
# synthetic: P and S first arrivals on an invented 2-layer site, metres and seconds
source,receiver,wave,time,sigma,distance,source_depth,receiver_depth
A,g1,P,0.0100,0.001,5,0,0
A,g2,P,0.0190,0.001,10,0,0
A,g3,P,0.0240,0.001,20,0,0
A,g1,S,0.0210,0.002,5,0,0
A,g2,S,0.0400,0.002,10,0,0
"""
NET_PICKS = """\
# synthetic: two invented events recorded at three invented stations, kilometres
source,receiver,wave,time,sigma
e1,s1,P,2.10,0.05
e1,s2,P,4.30,0.05
e1,s3,P,6.80,0.05
e2,s1,P,3.00,0.05
e2,s2,P,3.90,0.05
e2,s3,P,5.20,0.05
"""
NET_SOURCES = """\
source,x,y,depth,origin_time
e1,0,0,,
e2,10,5,,
"""
NET_SOURCES_NO_EPICENTRE = """\
source,x,y,depth,origin_time
e1,0,0,,
e2,,,,
"""
NET_RECEIVERS = """\
receiver,x,y,depth
s1,5,0,0
s2,20,5,0
s3,35,-5,0
"""
TEMPLATE_KM = """\
[template]
description = "synthetic crustal template (kilometres)"
units = "km"
n_layers = 2
[prior]
thickness_1 = { dist = "uniform", low = 5.0, high = 50.0 }
vp = { dist = "uniform", low = 4.0, high = 9.0 }
vpvs = { dist = "uniform", low = 1.5, high = 2.2 }
"""


def uniform(low, high):
    return {"dist": "uniform", "low": low, "high": high}


BASE = {
    "title": "synthetic two-layer line (configuration checks)",
    "units": "m",
    "data": {"picks": "line_picks.csv"},
    "model": {"layers": 1, "vpvs_mode": "shared"},
    "prior": {"thickness_1": uniform(1.0, 20.0), "vp_1": uniform(200.0, 1000.0), "vp_2": uniform(800.0, 3000.0),
              "vpvs": uniform(1.5, 4.0)},
    "constraints": {"increasing_velocity": True},
    "noise": {"model": "gaussian"},
    "nuisance": {"origin_time": "known"},
    "sampler": {"walkers": 16, "steps": 200, "burn": 50, "seed": 1},
    "output": {"folder": "run"},
}
NETWORK = {  # the same description on the network tables (depths and origin times unknown)
    "data": {"picks": "net_picks.csv", "sources": "net_sources.csv", "receivers": "net_receivers.csv"},
    "units": "km",
    "prior": {"thickness_1": uniform(5.0, 50.0), "vp_1": uniform(4.0, 7.5), "vp_2": uniform(7.0, 9.0),
              "vpvs": uniform(1.5, 2.2)},
    "nuisance": {"origin_time": "normal", "event_depth": uniform(0.0, 40.0)},
}


# ---------------------------------------------------------------------------- TOML writing
def toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)  # a TOML basic string
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(v)


def toml_text(doc: dict) -> str:
    lines = [f"{k} = {toml_value(v)}" for k, v in doc.items() if not isinstance(v, dict)]
    for section, table in doc.items():
        if isinstance(table, dict):
            lines.append(f"[{section}]")
            lines += [f"{k} = {toml_value(v)}" for k, v in table.items()]
    return "\n".join(lines) + "\n"


DELETE = object()


def changed(doc: dict, changes: dict) -> dict:
    """Copy of ``doc`` with ``{"section.key": value}`` changes (DELETE removes; whole sections too)."""
    out = copy.deepcopy(doc)
    for path, value in changes.items():
        *parents, last = path.split(".")
        table = out
        for p in parents:
            table = table.setdefault(p, {})
        if value is DELETE:
            table.pop(last, None)
        elif isinstance(value, dict) and isinstance(table.get(last), dict) and not path.startswith("prior."):
            table[last] = {**table[last], **value}
        else:
            table[last] = value
    return out


@pytest.fixture
def folder(tmp_path):
    for name, text in (("line_picks.csv", LINE_PICKS), ("net_picks.csv", NET_PICKS),
                       ("net_sources.csv", NET_SOURCES), ("net_receivers.csv", NET_RECEIVERS),
                       ("net_sources_no_epicentre.csv", NET_SOURCES_NO_EPICENTRE),
                       ("template_km.toml", TEMPLATE_KM)):
        (tmp_path / name).write_text(text)
    return tmp_path


def load_and_build(path: Path):
    config = load_config(path)
    return config, build_problem(config)


# ---------------------------------------------------------------------------- the good files
def test_base_description_is_valid(folder):
    path = folder / "run.toml"
    path.write_text(toml_text(BASE))
    config, problem = load_and_build(path)
    assert problem.names == ["thickness_1", "vp_1", "vp_2", "vpvs"]
    assert config.sampler.walkers == 16 and config.sampler.burn == 50
    assert config.picks == folder / "line_picks.csv"
    # defaults of keys not given (documented values in invert/config.py)
    assert config.sampler.thin == 1 and config.sampler.start == "optimum"


def test_network_description_is_valid(folder):
    path = folder / "run.toml"
    path.write_text(toml_text(changed(BASE, NETWORK)))
    _, problem = load_and_build(path)
    assert problem.names[-2:] == ["event_depth_e1", "event_depth_e2"]
    assert problem.marginal_origin


# ---------------------------------------------------------------------------- the bad ones
# (id, changes to BASE, section named in the error ("" = top level), fragments the message
# must contain: the key and what was expected)
CASES = [
    # unknown keys with a typo suggestion
    ("typo-top-level", {"sampeler": {"walkers": 16}}, "", ["'sampeler'", "did you mean 'sampler'"]),
    ("typo-in-sampler", {"sampler.walker": 16}, "sampler", ["'walker'", "did you mean 'walkers'"]),
    ("typo-in-model", {"model.vpvs_mod": "shared"}, "model", ["'vpvs_mod'", "did you mean 'vpvs_mode'"]),
    ("typo-in-nuisance", {"nuisance.origin_tme": "normal"}, "nuisance", ["'origin_tme'", "did you mean 'origin_time'"]),
    ("section-not-a-table", {"sampler": 5}, "sampler", ["expected a table"]),
    # wrong types
    ("walkers-float", {"sampler.walkers": 32.5}, "sampler", ["walkers = 32.5", "expected an integer >= 4"]),
    ("walkers-bool", {"sampler.walkers": True}, "sampler", ["walkers = True", "expected an integer"]),
    ("steps-string", {"sampler.steps": "200"}, "sampler", ["steps = '200'", "expected an integer >= 1"]),
    ("layers-string", {"model.layers": "two"}, "model", ["layers = 'two'", "number of layers above the half-space"]),
    ("layers-negative", {"model.layers": -1}, "model", ["layers = -1", "integer >= 0"]),
    ("depth-parameter-string", {"model.depth_parameter": "yes"}, "model", ["depth_parameter = 'yes'", "true"]),
    ("gradient-layers-floats", {"model.gradient_layers": [1.5]}, "model", ["gradient_layers", "list of layer numbers"]),
    ("fluid-layers-not-a-list", {"model.fluid_layers": 2}, "model", ["fluid_layers = 2", "list of layer numbers"]),
    ("title-number", {"title": 5}, "", ["title = 5", "expected str"]),
    ("until-converged-string", {"sampler.until_converged": "yes"}, "sampler", ["until_converged", "true or false"]),
    ("folder-number", {"output.folder": 3}, "output", ["folder = 3", "a folder path"]),
    ("truth-text", {"truth": {"vp_1": "fast"}}, "truth", ["parameter = number"]),
    # values out of range
    ("walkers-too-few", {"sampler.walkers": 2}, "sampler", ["walkers = 2", "expected an integer >= 4"]),
    ("walkers-odd", {"sampler.walkers": 15}, "sampler", ["walkers = 15", "even number of walkers"]),
    ("burn-equals-steps", {"sampler.burn": 200}, "sampler", ["burn = 200", "smaller than steps = 200"]),
    ("burn-above-steps", {"sampler.burn": 500}, "sampler", ["burn = 500", "smaller than steps = 200"]),
    ("burn-negative", {"sampler.burn": -1}, "sampler", ["burn = -1", "integer >= 0"]),
    ("thin-zero", {"sampler.thin": 0}, "sampler", ["thin = 0", "integer >= 1"]),
    ("ensembles-zero", {"sampler.ensembles": 0}, "sampler", ["ensembles = 0", "integer >= 1"]),
    ("max-steps-zero", {"sampler.max_steps": 0}, "sampler", ["max_steps = 0", "integer >= 1"]),
    ("checkpoint-every-zero", {"sampler.checkpoint_every": 0}, "sampler", ["checkpoint_every = 0", "integer >= 1"]),
    ("seed-negative", {"sampler.seed": -3}, "sampler", ["seed = -3", "integer >= 0"]),
    ("start-unknown", {"sampler.start": "random"}, "sampler", ["start = 'random'", "'optimum'", "'prior'"]),
    ("vpvs-mode-unknown", {"model.vpvs_mode": "ratio"}, "model",
     ["vpvs_mode = 'ratio'", "'per_layer'", "'shared'", "'vs'", "'none'"]),
    ("noise-model-unknown", {"noise.model": "cauchy"}, "noise", ["model = 'cauchy'", "'gaussian'", "'student_t'"]),
    ("noise-scale-unknown", {"noise.scale": "auto"}, "noise", ["scale = 'auto'", "'fixed'", "'free'"]),
    ("outlier-fraction-above-one", {"noise.outlier_fraction": 1.5}, "noise",
     ["outlier_fraction = 1.5", "between 0 and 1"]),
    ("dof-negative", {"noise.dof": -1.0}, "noise", ["dof = -1.0", "degrees of freedom > 0"]),
    ("outlier-sigma-zero", {"noise.outlier_sigma": 0.0}, "noise", ["outlier_sigma = 0.0", "positive width"]),
    ("scale-prior-not-a-table", {"noise.scale_prior": 1.0}, "noise", ["scale_prior = 1.0", "expected dict"]),
    ("origin-time-unknown-mode", {"nuisance.origin_time": "guess"}, "nuisance",
     ["origin_time = 'guess'", "'normal'", "'uniform'"]),
    ("origin-time-sd-zero", {"nuisance.origin_time_sd": 0.0}, "nuisance",
     ["origin_time_sd = 0.0", "positive standard deviation"]),
    ("origin-time-width-negative", {"nuisance.origin_time_width": -1.0}, "nuisance",
     ["origin_time_width = -1.0", "positive width"]),
    ("event-depth-not-a-table", {"nuisance.event_depth": 5.0}, "nuisance", ["event_depth = 5.0", "a prior table"]),
    ("delay-negative", {"nuisance.receiver_delay_sd": -0.1}, "nuisance", ["receiver_delay_sd = -0.1", ">= 0"]),
    # units
    ("units-missing", {"units": DELETE}, "", ["missing key 'units'", "'m'", "'km'"]),
    ("units-unknown", {"units": "ft"}, "", ["units = 'ft'", "'m'", "'km'"]),
    ("units-differ-from-template", {"prior_file": "template_km.toml", "prior": DELETE}, "",
     ["units = 'm'", "template_km.toml", "'km'"]),
    # data files
    ("picks-key-missing", {"data.picks": DELETE}, "data", ["'picks'", "the picks CSV file"]),
    ("picks-file-missing", {"data.picks": "nowhere.csv"}, "data", ["picks = ", "nowhere.csv", "file not found"]),
    ("sources-without-receivers", {"data.sources": "net_sources.csv"}, "data", ["'sources'", "'receivers'"]),
    # the prior (errors found when the problem is assembled)
    ("prior-missing-parameter", {"prior.vp_2": DELETE}, "prior", ["prior.vp_2", "missing"]),
    ("prior-unknown-parameter", {"prior.vp_9": uniform(1.0, 2.0)}, "prior", ["prior.vp_9", "unknown parameter"]),
    ("prior-unknown-dist", {"prior.vp_1": {"dist": "gauss", "mean": 500.0}}, "prior",
     ["prior.vp_1", "'dist' must be one of", "uniform"]),
]

# Errors found while assembling the problem from the data; they name the run description by its path.
PROBLEM_CASES = [
    ("source-without-depth-no-prior", {**NETWORK, "nuisance": {"origin_time": "normal"}}, "nuisance",
     ["e1", "no depth", "event_depth"]),
    ("unknown-origin-time-but-known-mode", {**NETWORK, "nuisance": {"origin_time": "known", "event_depth":
                                                                    uniform(0.0, 40.0)}}, "nuisance",
     ["e1", "no origin_time", "origin_time = 'normal' or 'uniform'"]),
    ("source-without-epicentre-no-prior", {**NETWORK, "data": {**NETWORK["data"],
                                                                      "sources": "net_sources_no_epicentre.csv"}},
     "nuisance", ["e2", "no x", "epicentre_x"]),
    ("event-depth-fixed", {**NETWORK, "nuisance": {"origin_time": "normal", "event_depth": {"fixed": 10.0}}},
     "nuisance", ["event_depth", "fixed value is not a prior"]),
    ("s-pick-with-vpvs-mode-none", {"model.vpvs_mode": "none", "prior.vpvs": DELETE}, "model",
     ["vpvs_mode = 'none'", "line_picks.csv", "line 6", "S pick"]),
    ("delays-with-student-t-noise", {"noise.model": "student_t", "nuisance.receiver_delay_sd": 0.01}, "nuisance",
     ["delay", "Gaussian noise only", "[noise] model = 'gaussian'"]),
    ("delays-with-outlier-mixture", {"noise.model": "outlier_mixture", "nuisance.source_delay_sd": 0.01},
     "nuisance", ["delay", "Gaussian noise only"]),
]


def _error_for(folder: Path, changes: dict) -> tuple[Path, ConfigError]:
    path = folder / "run.toml"
    path.write_text(toml_text(changed(BASE, changes)))
    with pytest.raises(ConfigError) as info:
        load_and_build(path)
    return path, info.value


@pytest.mark.parametrize("case_id, changes, section, fragments", CASES + PROBLEM_CASES,
                         ids=[c[0] for c in CASES + PROBLEM_CASES])
def test_error_names_key_and_expectation(folder, case_id, changes, section, fragments):
    _, err = _error_for(folder, changes)
    message = str(err)
    assert err.key == section, message
    if section:
        assert f"[{section}]" in message
    for fragment in fragments:
        assert fragment in message, f"{fragment!r} not in {message!r}"


@pytest.mark.parametrize(
    "case_id, changes, section, fragments",
    CASES + PROBLEM_CASES,
    ids=[c[0] for c in CASES + PROBLEM_CASES])
def test_error_names_the_file(folder, case_id, changes, section, fragments):
    path, err = _error_for(folder, changes)
    assert err.path == str(path)
    assert str(err).startswith(f"{path}: ")


# ---------------------------------------------------------------------------- whole-file problems
def test_missing_run_description(tmp_path):
    with pytest.raises(ConfigError) as info:
        load_config(tmp_path / "absent.toml")
    assert str(info.value) == f"{tmp_path / 'absent.toml'}: file not found"


def test_invalid_toml_names_file_and_line(folder):
    path = folder / "run.toml"
    path.write_text(toml_text(BASE) + "[sampler\nwalkers = 16\n")
    with pytest.raises(ConfigError) as info:
        load_config(path)
    message = str(info.value)
    assert message.startswith(f"{path}: not valid TOML")
    assert "line" in message


def test_missing_prior_template_names_run_file_and_key(folder):
    path = folder / "run.toml"
    path.write_text(toml_text(changed(BASE, {"prior_file": "nothere.toml"})))
    with pytest.raises(ConfigError) as info:
        load_config(path)
    message = str(info.value)
    assert "nothere.toml" in message and "not found" in message
    assert str(path) in message and "prior_file" in message


def test_bad_event_depth_prior_is_a_config_error(folder):
    path = folder / "run.toml"
    path.write_text(toml_text(changed(BASE, {**NETWORK, "nuisance": {
        "origin_time": "normal", "event_depth": {"dist": "gauss", "mean": 10.0}}})))
    with pytest.raises(ConfigError) as info:
        load_and_build(path)
    assert "event_depth" in str(info.value) and "'dist' must be one of" in str(info.value)


def test_template_supplies_units_and_prior(folder):
    # the positive counterpart of "units-differ-from-template": same units, prior from the template
    path = folder / "run.toml"
    path.write_text(toml_text(changed(BASE, {**NETWORK, "prior": DELETE, "units": "km",
                                             "prior_file": "template_km.toml"})))
    config, problem = load_and_build(path)
    assert config.units == "km"
    assert problem.names[:4] == ["thickness_1", "vp_1", "vp_2", "vpvs"]


def test_empty_run_description_says_it_is_empty(tmp_path):
    path = tmp_path / "run.toml"
    path.write_text("# nothing yet\n")
    with pytest.raises(ConfigError) as info:
        load_config(path)
    message = str(info.value)
    assert message.startswith(f"{path}: ") and "empty" in message and "None" not in message


def test_shipped_prior_template_by_name_from_any_folder(folder):
    # the run description lives in a temporary folder far from the repository's priors/
    path = folder / "run.toml"
    path.write_text(toml_text(changed(BASE, {"prior": DELETE, "model": DELETE, "prior_file": "shallow_site"})))
    config, problem = load_and_build(path)
    assert config.prior_template is not None and config.prior_template.name == "shallow_site.toml"
    assert config.prior_template.is_file() and config.layers.n_layers == 2  # n_layers = 3 in the template
    assert "thickness_2" in problem.names


def test_prior_template_typo_suggests_the_shipped_name(folder):
    path = folder / "run.toml"
    path.write_text(toml_text(changed(BASE, {"prior": DELETE, "model": DELETE, "prior_file": "shalow_site"})))
    with pytest.raises(ConfigError) as info:
        load_config(path)
    message = str(info.value)
    assert str(path) in message and "'shalow_site'" in message and "did you mean 'shallow_site'" in message


# ---------------------------------------------------------------------------- [data] waves
WAVES_CASES = [
    ("waves-unknown-name", {"data.waves": ["P", "SH"]}, "data", ["waves = ['P', 'SH']", "unknown wave 'SH'", "P and S"]),
    ("waves-a-string", {"data.waves": "P"}, "data", ["waves = 'P'", "a list of wave names", 'waves = ["P"]']),
    ("waves-empty", {"data.waves": []}, "data", ["waves = []", "a list of wave names"]),
    ("waves-twice", {"data.waves": ["P", "p"]}, "data", ["'P' is listed twice"]),
    ("waves-not-in-file", {"data": {"picks": "net_picks.csv", "sources": "net_sources.csv",
                                    "receivers": "net_receivers.csv", "waves": ["S"]},
                           **{k: v for k, v in NETWORK.items() if k != "data"}}, "data",
     ["waves = ['S']", "net_picks.csv", "has no S picks", "holds P"]),
]


@pytest.mark.parametrize("case_id, changes, section, fragments", WAVES_CASES, ids=[c[0] for c in WAVES_CASES])
def test_waves_errors_name_the_file_and_key(folder, case_id, changes, section, fragments):
    path, err = _error_for(folder, changes)
    message = str(err)
    assert err.key == "data" and "[data]" in message and str(err).startswith(f"{path}: ")
    for fragment in fragments:
        assert fragment in message, f"{fragment!r} not in {message!r}"


def test_waves_keeps_only_the_listed_waves(folder):
    # the P picks alone of the joint P + S file, with no S parameters in the model
    path = folder / "run.toml"
    path.write_text(toml_text(changed(BASE, {"data.waves": ["p"], "model.vpvs_mode": "none",
                                             "prior.vpvs": DELETE})))
    config, problem = load_and_build(path)
    assert config.waves == ("P",)
    assert problem.picks.n_picks == 3 and set(problem.picks.wave) == {"P"}
    assert list(problem.picks.line_numbers) == [3, 4, 5]  # lines of the file are kept for messages
    # both waves listed, or the key absent: every pick
    path.write_text(toml_text(changed(BASE, {"data.waves": ["S", "P"]})))
    assert load_and_build(path)[1].picks.n_picks == 5
    path.write_text(toml_text(BASE))
    config, problem = load_and_build(path)
    assert config.waves is None and problem.picks.n_picks == 5


def test_model_words_state_the_geometry():
    """`invert check` / `invert run` say what the model is: flat layers as before, or the planet
    with its radius, shell laws, core and max_diffraction."""
    import math

    from invert.config import has_liquid_core, model_words
    from invert.parameters import LayerSettings, SphereSettings

    flat = LayerSettings(n_layers=2)
    assert model_words(flat, 5) == "2 layer(s) over a half-space; 5 free parameters"
    core = SphereSettings(n_layers=2, fluid_layers=(3,), planet_radius=5200.0, max_diffraction=0.0)
    text = model_words(core, 6)
    for fragment in ("spherical planet of radius 5200 km", "'flat'-law shells", "'r2' law", "a liquid core",
                     "max_diffraction = 0 deg", "6 free parameters"):
        assert fragment in text
    solid = SphereSettings(n_layers=1, planet_radius=3000.0, max_diffraction=math.inf)
    assert "solid to the centre" in model_words(solid, 3) and "inf (no limit)" in model_words(solid, 3)
    # a core is a fluid layer under a solid one; an ocean from the surface down is not
    assert has_liquid_core(core) and not has_liquid_core(solid)
    assert has_liquid_core(LayerSettings(n_layers=2, fluid_layers=(2,)))          # outer over inner core
    assert not has_liquid_core(LayerSettings(n_layers=2, fluid_layers=(1,)))      # an ocean
    assert has_liquid_core(LayerSettings(n_layers=2, fluid_layers=(1, 3)))        # ocean and core
