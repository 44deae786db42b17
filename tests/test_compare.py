"""Model comparison and the low-velocity-zone test on synthetic refraction lines.

Every data set here is synthetic: P travel times computed from the true models stated in
this file (invented sites), plus seeded Gaussian noise, on a reversed line (shots 1 m beyond
both ends of a 60 m spread). Layer counts in test names include the half-space: a
"3-layer truth" is two layers over a half-space (run descriptions say `layers = 2`).

What is checked, and against what:

* Occam's razor -- a 3-layer truth with small noise: 3 layers favoured over 2 by ln B > 5
  ("very strong" on the scale of Kass & Raftery, J. Am. Stat. Assoc. 90, 1995, sec. 3.2;
  from memory), and 4 layers not favoured over 3 by more than about 1 nat.
* Low-velocity zone -- a truth with a slower layer plus reflections from its base: the
  permissive model favoured; a monotone truth with the same picks: it is not; and the
  textbook effect of ignoring a slower layer -- the refractor below comes out deeper
  (Telford, Geldart & Sheriff, "Applied Geophysics", 2nd ed., 1990, sec. 4.3; from memory).
* The one-run cross-check B(monotone : permissive) = P(monotone | data) / P(monotone)
  (encompassing-prior identity) against the two-run Bayes factor, and the two evidence
  estimators against each other, within their combined errors.
* Model probabilities against Bayes' theorem for models worked by hand, the verbal scale
  against its stated thresholds, and the model-averaged density against its definition.
* Nuisance parameters (unknown origin times marginalised, a free noise scale sampled): the two
  estimators agree, and with two exchangeable velocities (P(monotone) = 1/2, combinatorics)
  the monotone model reaches its cap ln 2 by the two-run and the one-run route.

The default suite uses few live points and short ladders; the `slow` versions repeat the
layered checks with both estimators at longer settings.
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path

import numpy as np
import pytest

from invert import compare as cmp
from invert.config import load_config
from invert.problem import build_problem
from invert.synthetic import make_synthetic

TINY = cmp.EvidenceSettings(estimators=("nested",), live_points=50, seed=3)
SMALL = cmp.EvidenceSettings(estimators=("nested",), live_points=80, seed=3)
SMALL_BOTH = cmp.EvidenceSettings(live_points=80, rungs=10, rung_steps=120, rung_burn=40, seed=3)
LONG_BOTH = cmp.EvidenceSettings(live_points=400, rungs=24, rung_steps=500, rung_burn=150, seed=5)


def toml_list(values) -> str:
    return "[" + ", ".join(repr(float(v)) for v in values) + "]"


def write_line(folder: Path, thickness, vp, *, branches=("first",), sigma=0.001, seed=5) -> None:
    """Synthetic reversed line (P only) from a stated true model."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "survey.toml").write_text(f"""\
title = "synthetic refraction line at an invented site"
units = "m"
seed = {seed}
[model]
thickness = {toml_list(thickness)}
vp = {toml_list(vp)}
vpvs = {toml_list([2.0] * len(vp))}
[survey]
kind = "line"
shots = [-1.0, 61.0]
receivers = {{ first = 0.0, last = 60.0, spacing = 5.0 }}
waves = ["P"]
branches = {json.dumps(list(branches))}
sigma = {sigma!r}
[output]
picks = "picks.csv"
""")
    make_synthetic(folder / "survey.toml")


def write_run(folder: Path, name: str, layers: int, *, vp_high=6000.0, slower=()) -> Path:
    extra = f"slower_allowed = {list(slower)}\n" if slower else ""
    (folder / f"{name}.toml").write_text(f"""\
title = "synthetic line, {layers} layer(s) over a half-space"
units = "m"
[data]
picks = "picks.csv"
[model]
layers = {layers}
vpvs_mode = "none"
[prior]
thickness = {{ dist = "uniform", low = 0.5, high = 30.0 }}
vp = {{ dist = "uniform", low = 150.0, high = {vp_high!r} }}
[constraints]
increasing_velocity = true
{extra}[output]
folder = "run_{name}"
""")
    return folder / f"{name}.toml"


def command(argv) -> int:
    parser = argparse.ArgumentParser(prog="invert")
    sub = parser.add_subparsers(dest="command", required=True)
    cmp.add_commands(sub)
    args = parser.parse_args(argv)
    return args.func(args)


# ============================================================================ pieces (no sampling)
def test_model_probabilities_follow_bayes_theorem():
    # P(m | d) = w_m Z_m / sum_j w_j Z_j, worked by hand: Z = (1, 3), equal weights -> (1/4, 3/4);
    # weights (3, 1) -> (3/6, 3/6)
    out = cmp.model_probabilities(np.array([0.0, math.log(3.0)]), np.zeros(2), np.ones(2))
    assert np.allclose(out["probability"], [0.25, 0.75])
    out = cmp.model_probabilities(np.array([0.0, math.log(3.0)]), np.zeros(2), np.array([3.0, 1.0]))
    assert np.allclose(out["probability"], [0.5, 0.5]) and np.allclose(out["prior"], [0.75, 0.25])
    # errors: one model known exactly, the other +-1 nat: the spread is that of a logistic of N(0, 1)
    out = cmp.model_probabilities(np.zeros(2), np.array([0.0, 1.0]), np.ones(2), rng=np.random.default_rng(0))
    sims = 1 / (1 + np.exp(np.random.default_rng(1).standard_normal(200000)))
    assert out["error"][0] == pytest.approx(sims.std(), rel=0.03)


def test_kass_raftery_thresholds():
    # Kass & Raftery (1995) on 2 ln B: 2, 6, 10 (from memory) -> ln B 1, 3, 5
    assert cmp.kass_raftery(0.99) == "not worth more than a bare mention"
    assert cmp.kass_raftery(1.01) == "positive"
    assert cmp.kass_raftery(3.01) == "strong"
    assert cmp.kass_raftery(5.01) == "very strong"
    assert cmp.kass_raftery(-5.01) == "very strong"


def lvz_result_at_cap(log_b=-1.21, log_b_err=0.31, first_only=True) -> dict:
    """A hand-made ``lvz_test`` result: three exchangeable uniform velocities, so P(monotone) = 1/3
    (combinatorics) and the cap ln(1/P(monotone)) = ln 3; ln B as in the hidden-LVZ case study."""
    test = {"layer": 2, "log_z_permissive": -10.0, "log_z_permissive_error": 0.2,
            "log_bayes_factor": log_b, "log_bayes_factor_error": log_b_err, "favours": "monotone",
            "strength": cmp.kass_raftery(log_b), "prior_inversion_probability": 2 / 3,
            "posterior_inversion_probability": 0.02, "posterior_inversion_probability_error": 0.01,
            "one_run_log_bayes_factor_monotone": 1.08, "one_run_log_bayes_factor_monotone_error": 0.01,
            "one_run_upper_bound_only": False, "log_cap_monotone": math.log(3.0),
            "one_run_agrees_with_two_runs": True, "estimators_agree": None, "sensitivity": [],
            "coverage": {"reflections_from_base_or_below": 0, "buried_sources_or_receivers": 0,
                         "first_arrivals_only": first_only}, "notes": []}
    return {"config": "synthetic.toml", "title": "synthetic", "units": "m", "settings": {},
            "monotone": {"log_z": -10.0 - log_b, "log_z_error": 0.2, "estimators_agree": None, "notes": []},
            "tests": [test]}


def test_lvz_strength_at_the_prior_cap_is_not_called_evidence():
    # B(monotone : slower) <= 1 / P(monotone) (encompassing-prior identity, Klugkist, Kato & Hoijtink 2005;
    # from memory); with P(monotone) = 1/3 the cap is ln 3 = 1.10 and ln B = -1.21 +- 0.31 sits at it.
    # Kass & Raftery (1995, from memory) would call 2 ln B = 2.42 "positive"; at the cap that label must go.
    cap = math.log(3.0)
    assert cmp.at_prior_cap(-1.21, 0.31, cap)
    label = cmp.lvz_strength(-1.21, 0.31, cap, first_arrivals_only=True)
    assert "positive" not in label and "prior's limit" in label and "not evidence from the data" in label
    # far below the cap (cap 5 nats) or favouring the slower layer: the ordinary Kass & Raftery label
    assert not cmp.at_prior_cap(-1.21, 0.31, 5.0)
    assert cmp.lvz_strength(-1.21, 0.31, 5.0, first_arrivals_only=True) == "positive"
    assert not cmp.at_prior_cap(1.21, 0.31, cap)
    assert cmp.lvz_strength(1.21, 0.31, cap) == "positive"
    # the Markdown verdict, even from a stored result whose "strength" still reads "positive"
    text = cmp._lvz_markdown(lvz_result_at_cap())
    row = next(line for line in text.splitlines() if line.startswith("| 2 |"))
    assert "positive" not in row and "not evidence from the data" in row
    assert "at the prior's limit" in text


def test_combined_estimate():
    def res(z, e):
        return cmp.ev.EvidenceResult("x", z, e, 0, 0.0, np.zeros((1, 1)), np.zeros(1))

    # inverse-variance weighting (common practice)
    z, e, agree = cmp.combine_estimates([res(1.0, 0.1), res(1.3, 0.2)])
    assert agree["agree"] and z == pytest.approx((1.0 / 0.01 + 1.3 / 0.04) / (1 / 0.01 + 1 / 0.04))
    assert e == pytest.approx(1 / math.sqrt(1 / 0.01 + 1 / 0.04))
    z, e, agree = cmp.combine_estimates([res(1.0, 0.1), res(3.0, 0.1)])
    assert not agree["agree"] and z == pytest.approx(2.0) and e >= 1.0


def test_velocity_density_is_the_probability_weighted_mixture(tmp_path):
    # two one-layer-over-half-space "posteriors" with fixed velocities: at depth 0 the mixture puts
    # weight 0.3 on 500 m/s and 0.7 on 800 m/s, by definition of the mixture
    write_line(tmp_path, [4.0], [500.0, 2000.0])
    problem = build_problem(load_config(write_run(tmp_path, "one", 1)))
    a = np.tile([4.0, 500.0, 2000.0], (50, 1))
    b = np.tile([4.0, 800.0, 2000.0], (50, 1))
    out = cmp.velocity_density([(problem, a), (problem, b)], np.array([0.3, 0.7]), n_velocity=60,
                               rng=np.random.default_rng(0))
    dv = np.diff(out["velocity"])[0]
    row = out["density"][0] * dv
    assert row.sum() == pytest.approx(1.0)
    near = lambda v: int(np.argmin(np.abs(out["velocity"] - v)))  # noqa: E731
    assert row[near(500.0)] == pytest.approx(0.3) and row[near(800.0)] == pytest.approx(0.7)
    deep = out["density"][-1] * dv
    assert deep[near(2000.0)] == pytest.approx(1.0)


def test_data_coverage_and_lvz_constraints(tmp_path):
    write_line(tmp_path, [4.0, 6.0], [800.0, 500.0, 2500.0])
    config = load_config(write_run(tmp_path, "two", 2))
    perm = build_problem(cmp.with_constraints(config, slower=[2]))
    mono = build_problem(cmp.with_constraints(config, slower=[]))
    cov = cmp.data_coverage(perm, 2)
    assert cov["first_arrivals_only"] and cov["reflections"] == 0
    # P(monotone) under the permissive prior: three exchangeable uniform velocities, permissive order
    # vp_2 < vp_3 (probability 1/2) and monotone vp_1 < vp_2 < vp_3 (1/6): 1/3 (combinatorics)
    p = cmp._prior_probability_monotone(mono, perm, np.random.default_rng(0), 2)
    assert p["exact"] == pytest.approx(1 / 3, abs=1e-6)
    assert abs(p["monte_carlo"] - 1 / 3) < 4 * p["monte_carlo_error"]


def test_bad_requests_are_clear_errors(tmp_path):
    write_line(tmp_path, [4.0], [500.0, 2000.0])
    path = write_run(tmp_path, "one", 1)
    with pytest.raises(cmp.ConfigError, match="layer number 2..2"):
        cmp.lvz_test(path, layer=3, settings=SMALL, progress=False)
    with pytest.raises(ValueError, match="estimators"):
        cmp.EvidenceSettings(estimators=("bogus",))
    (tmp_path / "list.toml").write_text('[[candidate]]\nconfig = "one.toml"\n')
    with pytest.raises(cmp.ConfigError, match="at least two"):
        cmp.read_candidate_list(tmp_path / "list.toml")


# ============================================================================ Occam's razor
THREE_LAYER_TRUTH = ([4.0, 10.0], [500.0, 1500.0, 3000.0])


def layer_count_case(folder: Path, settings: cmp.EvidenceSettings) -> dict:
    write_line(folder, *THREE_LAYER_TRUTH)
    for n in (1, 2, 3):
        write_run(folder, f"layers{n}", n)
    est = ", ".join(f'"{e}"' for e in settings.estimators)
    (folder / "compare.toml").write_text(f"""\
title = "How many layers? (synthetic line)"
[[candidate]]
name = "2 layers"
config = "layers1.toml"
[[candidate]]
name = "3 layers"
config = "layers2.toml"
[[candidate]]
name = "4 layers"
config = "layers3.toml"
[evidence]
estimators = [{est}]
live_points = {settings.live_points}
rungs = {settings.rungs}
rung_steps = {settings.rung_steps}
rung_burn = {settings.rung_burn}
seed = {settings.seed}
[output]
folder = "comparison"
""")
    assert command(["compare", str(folder / "compare.toml"), "--quiet"]) == 0
    doc = json.loads((folder / "comparison" / "comparison.json").read_text())
    return {r["model"]: r for r in doc["models"]} | {"_doc": doc}


def check_occam(rows: dict) -> None:
    two, three, four = rows["2 layers"], rows["3 layers"], rows["4 layers"]
    ln_b_32 = three["log_z"] - two["log_z"]
    ln_b_43 = four["log_z"] - three["log_z"]
    err_43 = math.hypot(four["log_z_error"], three["log_z_error"])
    assert ln_b_32 > 5, ln_b_32
    # "not favoured by more than about 1 nat", allowing 3 combined stated errors
    assert ln_b_43 < 1.0 + 3 * err_43, (ln_b_43, err_43)
    assert two["posterior_probability"] < 0.01


def test_occam_three_layers_small(tmp_path):
    rows = layer_count_case(tmp_path, SMALL)
    check_occam(rows)
    folder = tmp_path / "comparison"
    for name in ("comparison.csv", "comparison.md", "layer_count.csv", "velocity_density.csv",
                 "velocity_quantiles.csv", "velocity_density.png"):
        assert (folder / name).exists(), name
    layer_rows = rows["_doc"]["layer_count"]
    assert sum(r["posterior_probability"] for r in layer_rows) == pytest.approx(1.0)
    assert "Kass & Raftery" in (folder / "comparison.md").read_text()
    # the model-averaged median profile in the top layer (well fixed by the direct wave) is near the truth
    q = np.loadtxt(folder / "velocity_quantiles.csv", delimiter=",", skiprows=1)
    depth, median = q[:, 0], q[:, 3]
    assert abs(np.interp(2.0, depth, median) - 500.0) < 60


@pytest.mark.slow
def test_occam_three_layers_long(tmp_path):
    rows = layer_count_case(tmp_path, LONG_BOTH)
    check_occam(rows)
    for r in (v for k, v in rows.items() if not k.startswith("_")):
        assert r["estimators_agree"], r


# ============================================================================ low-velocity zone
def lvz_case(folder: Path, vp, settings, branches=("first", "reflection:2")) -> dict:
    write_line(folder, [4.0, 6.0], vp, branches=branches)
    path = write_run(folder, "run", 2, vp_high=4000.0)
    return cmp.lvz_test(path, layer=2, settings=settings, folder=folder / "lvz", progress=False)


def test_lvz_favoured_when_reflections_see_it(tmp_path):
    # the slower layer wins by some hundred nats here, so a tiny nested-sampling run suffices
    out = lvz_case(tmp_path, [800.0, 500.0, 2500.0], TINY)
    t = out["tests"][0]
    assert t["log_bayes_factor"] > 5 and t["favours"] == "slower layer"
    assert t["posterior_inversion_probability"] > 0.95
    assert t["prior_inversion_probability"] == pytest.approx(2 / 3, abs=1e-6)
    assert t["one_run_agrees_with_two_runs"]
    # ignoring the slower layer puts the refractor below it deeper (Telford et al. 1990, from memory):
    # deeper than under the permissive model, which finds the true depth (10 m) within 2 sd
    depth = [s for s in t["sensitivity"] if s["parameter"].startswith("depth of interface 2")][0]
    assert depth["median_monotone"] > depth["median_permissive"] + 2 * depth["posterior_sd"], depth
    assert abs(depth["median_permissive"] - 10.0) < 2 * depth["posterior_sd"] + 0.2, depth
    text = (tmp_path / "lvz" / "lvz_test.md").read_text()
    assert "no head wave at its top" in text and "reflections from its base" in text
    assert "first arrivals only" not in text


def check_monotone_truth(out: dict) -> dict:
    t = out["tests"][0]
    # not favoured: below zero within three combined stated errors
    assert t["log_bayes_factor"] < 3 * t["log_bayes_factor_error"], t["log_bayes_factor"]
    # the data exclude an inversion, so B(monotone : slower) reaches its cap 1 / P(monotone) = 3
    assert t["posterior_inversion_probability"] < 0.05
    assert -t["log_bayes_factor"] == pytest.approx(math.log(3.0), abs=3 * t["log_bayes_factor_error"])
    assert t["one_run_agrees_with_two_runs"]
    return t


def test_monotone_truth_not_called_a_lvz_small(tmp_path):
    out = lvz_case(tmp_path, [500.0, 1200.0, 2500.0], SMALL_BOTH)
    t = check_monotone_truth(out)
    assert out["monotone"]["estimators_agree"] and t["estimators_agree"], out["markdown"]


@pytest.mark.slow
def test_monotone_truth_not_called_a_lvz_long(tmp_path):
    out = lvz_case(tmp_path, [500.0, 1200.0, 2500.0], LONG_BOTH)
    t = check_monotone_truth(out)
    assert out["monotone"]["estimators_agree"] and t["estimators_agree"], out["markdown"]


@pytest.mark.slow
def test_lvz_with_reflections_long(tmp_path):
    out = lvz_case(tmp_path, [800.0, 500.0, 2500.0], LONG_BOTH)
    t = out["tests"][0]
    assert t["log_bayes_factor"] > 5 and t["posterior_inversion_probability"] > 0.95
    assert out["monotone"]["estimators_agree"] and t["estimators_agree"], out["markdown"]


@pytest.mark.slow
def test_lvz_with_first_arrivals_only_is_prior_driven(tmp_path):
    out = lvz_case(tmp_path, [800.0, 500.0, 2500.0], LONG_BOTH, branches=("first",))
    t = out["tests"][0]
    assert t["coverage"]["first_arrivals_only"]
    assert "verdict is driven by the prior" in out["markdown"]
    # no data can favour the monotone model by more than the cap
    assert -t["log_bayes_factor"] <= t["log_cap_monotone"] + 3 * t["log_bayes_factor_error"]
    # unseen, the slower layer's delay is explained by a deeper refractor: interface 2 (true depth 10 m)
    # comes out deeper (Telford et al. 1990, from memory); how much deeper depends on the data, so only
    # a margin of 20 % is demanded of the median (the posterior is broad: first arrivals trade depth for
    # velocity)
    depth = [s for s in t["sensitivity"] if s["parameter"].startswith("depth of interface 2")][0]
    assert depth["median_monotone"] > 1.2 * 10.0, depth
    assert t["one_run_agrees_with_two_runs"]


# ============================================================================ nuisance parameters
def nuisance_case(folder: Path, settings: cmp.EvidenceSettings) -> tuple[dict, object]:
    """Two surface shots with UNKNOWN origin times (marginalised, normal prior) and a FREE noise scale.

    Synthetic: one 4 m layer at 500 m/s over a 1500 m/s half-space (a monotone truth), shots at
    x = -1 and 61 m with origin times 0.3 s and 0.7 s that the tables leave empty, 13 receivers.
    """
    folder.mkdir(parents=True, exist_ok=True)
    stations = ", ".join(f'{{ name = "g{i:02d}", x = {5.0 * i!r}, y = 0.0 }}' for i in range(13))
    (folder / "survey.toml").write_text(f"""\
title = "synthetic line with untimed shots at an invented site"
units = "m"
seed = 8
[model]
thickness = [4.0]
vp = [500.0, 1500.0]
vpvs = [2.0, 2.0]
[survey]
kind = "network"
waves = ["P"]
sigma = 0.001
hide_depth = false
hide_origin_time = true
events = [{{ name = "west", x = -1.0, y = 0.0, depth = 0.0, origin_time = 0.3 }},
          {{ name = "east", x = 61.0, y = 0.0, depth = 0.0, origin_time = 0.7 }}]
stations = [{stations}]
[output]
picks = "picks.csv"
""")
    make_synthetic(folder / "survey.toml")
    (folder / "run.toml").write_text("""\
title = "untimed shots, one layer over a half-space"
units = "m"
[data]
picks = "picks.csv"
sources = "sources.csv"
receivers = "receivers.csv"
[model]
layers = 1
vpvs_mode = "none"
[prior]
thickness = { dist = "uniform", low = 0.5, high = 20.0 }
vp = { dist = "uniform", low = 150.0, high = 3000.0 }
[constraints]
increasing_velocity = true
[noise]
scale = "free"
scale_prior = { dist = "lognormal", median = 1.0, sigma_log = 0.5 }
[nuisance]
origin_time = "normal"
origin_time_mean = 0.0
origin_time_sd = 2.0
[output]
folder = "run"
""")
    problem = build_problem(cmp.with_constraints(load_config(folder / "run.toml"), slower=[2]))
    out = cmp.lvz_test(folder / "run.toml", layer=2, settings=settings, folder=folder / "lvz", progress=False)
    return out, problem


def check_nuisance(out: dict, problem) -> None:
    # the estimators did see the nuisance parameters: a sampled noise scale, origin times marginalised
    assert problem.ndim == 4 and len(problem.nuisance_names) == 1, problem.names
    assert problem.marginal_origin and not np.any(problem.picks.origin_time_known)
    t = out["tests"][0]
    for estimates in (out["monotone"]["estimates"], t["estimates"]):
        ns, ss = estimates["nested"], estimates["stepping"]
        comb = math.hypot(ns["log_z_error"], ss["log_z_error"])
        assert abs(ns["log_z"] - ss["log_z"]) < 3 * comb, (ns["log_z"], ss["log_z"], comb)
    # permissive prior: two exchangeable velocities, so P(monotone) = 1/2 (combinatorics); the head wave
    # from the half-space excludes an inversion, so B(monotone : permissive) reaches its cap 2
    # (encompassing-prior identity, Klugkist, Kato & Hoijtink 2005; from memory), by both routes
    assert t["prior_inversion_probability"] == pytest.approx(0.5, abs=1e-9)
    assert t["posterior_inversion_probability"] < 0.02
    assert -t["log_bayes_factor"] == pytest.approx(math.log(2.0), abs=3 * t["log_bayes_factor_error"])
    assert t["one_run_agrees_with_two_runs"]
    assert t["one_run_log_bayes_factor_monotone"] == pytest.approx(math.log(2.0), abs=0.05)


def test_nuisance_parameters_small(tmp_path):
    out, problem = nuisance_case(tmp_path, cmp.EvidenceSettings(live_points=50, rungs=8, rung_steps=80,
                                                                rung_burn=20, walkers=16, seed=4))
    check_nuisance(out, problem)


@pytest.mark.slow
def test_nuisance_parameters_long(tmp_path):
    out, problem = nuisance_case(tmp_path, LONG_BOTH)
    check_nuisance(out, problem)
    t = out["tests"][0]
    assert out["monotone"]["estimators_agree"] and t["estimators_agree"]
    assert t["log_bayes_factor_error"] < 0.3
