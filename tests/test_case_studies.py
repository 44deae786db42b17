"""The worked case studies in case_studies/: each gives the answer its README states.

Every data set is synthetic: `invert synth survey.toml` computes the picks from the true model
written in that file (invented places), with the seed written there. Each test copies one
case-study folder to a temporary folder, generates its picks as a user would, inverts them
with a reduced sampler setting (fewer walkers, ensembles and steps than the folder's run.toml)
and checks the key quantities of the README against the true model:

* site_water_table -- water-table depth from P alone and from P + S, depth to bedrock
  (Vs >= 760 m/s), Vs30 and its most probable site class (ASCE 7-16 bands, from memory:
  D is 180-360 m/s), Vs unchanged and Vp jumping at the water table, and one soil layer
  enough for the S picks alone but not for the P picks;
* regional_network -- Moho depth, Vp/Vs and the mantle velocity; the size of the flat-Earth
  approximation at 200 km, computed with an independent spherical ray calculation;
* borehole -- interval velocities (Vp and Vs of every layer) and interface depths;
* hidden_lvz -- a slower layer between faster ones: first arrivals alone put the refractor
  at the depth given by the textbook intercept-time formula read as one layer (too deep), the
  low-velocity-zone test on them is driven by the prior (its Bayes factor bounded by the prior
  cap ln 3), and with reflections from the slow layer the slower layer is favoured (ln B > 5);
* layer_count -- 1 to 4 layers compared by evidence on a 3-layer truth: 3 favoured over 2 by
  ln B > 5, 4 not favoured over 3 by more than about 1 nat (Kass & Raftery 1995, from memory).

The true derived values are computed here from the true layers with the textbook formulas
(Vs30 = 30 m / sum of h_i / Vs_i over the top 30 m, NEHRP provisions; ASCE 7-16 ch. 20,
from memory), not taken from the package. A fixed-seed check of a 99 % interval can miss by
chance (about 1 % per quantity for a calibrated posterior); tests/test_inversion.py holds
the statistical coverage checks. The `slow` tests run each folder's full setting as written
and require the convergence verdict.
"""

from __future__ import annotations

import math
import re
import shutil
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
from scipy import optimize, stats

from invert import cli
from invert import posterior as post
from invert.data import read_picks
from invert.forward import travel_times
from invert.model import LayerModel
from invert.run import derived_values, kept_samples, run_inversion

# arviz warns when the pointwise log-likelihood subset has more chains than draws; harmless here
pytestmark = pytest.mark.filterwarnings("ignore:More chains:UserWarning")

CASES = Path(__file__).resolve().parents[1] / "case_studies"
STUDIES = ("site_water_table", "regional_network", "borehole")
#: Files a run or `invert synth` writes; never copied, always regenerated.
GENERATED = ("runs", "picks*.csv", "sources.csv", "receivers.csv", "__pycache__")


# ============================================================================ helpers
def copy_case(name: str, tmp_path: Path) -> Path:
    """The case-study folder copied to ``tmp_path`` without generated files, its picks made by `invert synth`."""
    folder = tmp_path / name
    shutil.copytree(CASES / name, folder, ignore=shutil.ignore_patterns(*GENERATED))
    assert cli.main(["synth", str(folder / "survey.toml")]) == 0
    return folder


def reduced(config: Path, **sampler) -> Path:
    """Write a copy of run description ``config`` whose [sampler] keys are replaced by ``sampler``."""
    text = config.read_text()
    head, sep, tail = text.partition("[sampler]")
    assert sep, f"{config.name} has no [sampler] table"
    body, nxt, rest = tail.partition("\n[")
    for key, value in sampler.items():
        body, n = re.subn(rf"^{key}\s*=.*$", f"{key} = {value}", body, flags=re.M)
        if n == 0:
            body += f"{key} = {value}\n"
    out = config.with_name(config.stem + "_reduced.toml")
    out.write_text(head + sep + body + nxt + rest)
    return out


def invert_quietly(config: Path):
    return run_inversion(config, quiet=True, progress=False, overwrite=True)


def draws(out) -> dict[str, np.ndarray]:
    """Pooled kept draws of every sampled and derived quantity, plus the layer models."""
    s = out.config.sampler
    flat = kept_samples(out.result, s.burn, s.thin)
    flat = flat.reshape(-1, flat.shape[-1])
    d = {name: flat[:, i] for i, name in enumerate(out.problem.names)}
    d.update(derived_values(out.problem, flat))
    model, ok = out.problem.models(flat)
    assert ok.all()
    d["model"] = model
    return d


def interval(x, level: float) -> tuple[float, float]:
    a = (1.0 - level) / 2.0
    lo, hi = np.quantile(np.asarray(x, dtype=float), [a, 1.0 - a])
    return float(lo), float(hi)


def check_inside(samples: dict, truth: dict, level: float = 0.99) -> list[str]:
    """Messages for every true value outside its central ``level`` interval (empty if none)."""
    bad = []
    for name, value in truth.items():
        lo, hi = interval(samples[name], level)
        if not lo <= value <= hi:
            bad.append(f"{name}: true {value:g} outside the {level:.0%} interval [{lo:.5g}, {hi:.5g}]")
    return bad


def survey_model(folder: Path) -> dict:
    with open(folder / "survey.toml", "rb") as fh:
        return tomllib.load(fh)["model"]


def vs30_by_hand(thickness, vs) -> float:
    """30 m / vertical S time over the top 30 m of constant-velocity layers."""
    time, top = 0.0, 0.0
    for h, v in zip(list(thickness) + [math.inf], vs):
        h_in = min(h, 30.0 - top)
        if h_in <= 0:
            break
        time += h_in / v
        top += h_in
    return 30.0 / time


# ============================================================================ every folder
@pytest.mark.parametrize("name", STUDIES)
def test_folder_holds_what_its_readme_promises(name):
    folder = CASES / name
    for f in ("README.md", "survey.toml", "run.toml"):
        assert (folder / f).is_file(), f"{name}: {f} missing"
    readme = (folder / "README.md").read_text()
    for words in ("invert synth survey.toml", "invert run run.toml", "invert report runs/", "synthetic",
                  "invented"):
        assert words in readme, f"{name}/README.md does not mention {words!r}"
    assert "licensed professionals" in readme or name == "regional_network"


@pytest.mark.parametrize("name", STUDIES)
def test_truth_of_every_run_description_is_the_generator_model(name):
    """The [truth] drawn on the figures is the model the picks were generated from."""
    folder = CASES / name
    m = survey_model(folder)
    depths = np.cumsum(m["thickness"])
    vs = m["vs"] if "vs" in m else [a / b for a, b in zip(m["vp"], m["vpvs"])]
    events = {e["name"]: e["depth"] for e in tomllib.loads((folder / "survey.toml").read_text())["survey"]
              .get("events", [])}
    for config in sorted(folder.glob("run*.toml")):
        with open(config, "rb") as fh:
            run = tomllib.load(fh)
        truth, n = run["truth"], run["model"]["layers"]
        assert truth, config.name
        for key, value in truth.items():
            family, _, k = key.rpartition("_")
            if key == "vpvs":  # one Vp/Vs for every layer
                expected = m["vpvs"][0]
                assert all(v == expected for v in m["vpvs"])
            elif family == "event_depth":
                expected = events[k]
            elif n == len(m["thickness"]):  # the same layering as the generator
                k = int(k)
                expected = {"thickness": lambda: m["thickness"][k - 1], "depth": lambda: depths[k - 1],
                            "vp": lambda: m["vp"][k - 1], "vs": lambda: vs[k - 1],
                            "vpvs": lambda: m["vp"][k - 1] / vs[k - 1]}[family]()
            else:  # a coarser reading (site_water_table/run_s.toml): the soil layers of equal Vs merged
                k = int(k)
                assert n == 1 and vs[0] == vs[-2]
                expected = {"thickness": depths[-1], "vs": vs[0] if k == 1 else vs[-1]}[family]
            assert value == pytest.approx(expected, rel=1e-6), (config.name, key)


# ============================================================================ shallow site
SITE_REDUCED = dict(walkers=24, ensembles=1, steps=800, burn=250)


def test_site_joint_inversion_gives_water_table_bedrock_vs30_and_site_class(tmp_path):
    folder = copy_case("site_water_table", tmp_path)
    m = survey_model(folder)
    out = invert_quietly(reduced(folder / "run.toml", **SITE_REDUCED))
    d = draws(out)
    # true values from the generator's model, by hand
    water_table = m["thickness"][0]
    bedrock = sum(m["thickness"])  # the first layer with Vs >= 760 m/s is the half-space
    assert m["vs"][-1] >= 760.0 > max(m["vs"][:-1])
    vs30_true = vs30_by_hand(m["thickness"], m["vs"])
    assert vs30_true == pytest.approx(30.0 / (20.0 / 230.0 + 10.0 / 1300.0))
    assert 180.0 < vs30_true <= 360.0  # class D of ASCE 7-16 Table 20.3-1 (from memory)

    d["bedrock"] = post.depth_to_velocity(d["model"], 760.0, "S")
    d["vs30"] = post.vs30(d["model"])
    assert np.isfinite(d["bedrock"]).all(), "every draw reaches Vs >= 760 m/s"
    bad = check_inside(d, {"thickness_1": water_table, "bedrock": bedrock, "vs30": vs30_true})
    assert not bad, "\n".join(bad)
    # the data, not the prior, decide: intervals far narrower than the priors (9.5 m, 49 m, ...)
    assert np.ptp(interval(d["thickness_1"], 0.99)) < 1.0
    assert np.ptp(interval(d["bedrock"], 0.99)) < 5.0
    assert np.ptp(interval(d["vs30"], 0.99)) < 40.0
    # most probable site class is the true one, with little doubt
    sc = post.site_class_probabilities(d["vs30"])
    assert sc.labels[int(np.argmax(sc.probability))] == "D"
    assert sc.probability[sc.labels.index("D")] > 0.9
    # at the water table P jumps (by a factor of about 3.8) while S barely changes
    vs_ratio = interval(d["vs_2"] / d["vs_1"], 0.99)
    assert vs_ratio[0] <= 1.0 <= vs_ratio[1] and np.ptp(vs_ratio) < 0.3
    assert interval(d["vp_2"] / d["vp_1"], 0.99)[0] > 3.0
    # water-saturated below the water table: Vp about 1500-2000 m/s (common practice)
    lo, hi = interval(d["vp_2"], 0.99)
    assert 1500.0 < lo and hi < 2000.0

    # the report: Vs30, site classes, depth to bedrock and the cautions
    from invert.report import write_report

    html = write_report(out.folder, max_draws=200)
    text = html.read_text()
    md = (out.folder / "report.md").read_text()
    for words in ("Vs30", "Site class from Vs30", "depth to Vs ≥ 760 m/s", "licensed professionals"):
        assert words in text and words in md, words


def test_site_p_alone_finds_the_water_table_and_s_alone_needs_no_interface_there(tmp_path):
    folder = copy_case("site_water_table", tmp_path)
    sys.path.insert(0, str(folder))
    try:
        import split_by_wave

        split_by_wave.split(folder)
    finally:
        sys.path.remove(str(folder))
        sys.modules.pop("split_by_wave", None)
    m = survey_model(folder)

    # P alone: an interface at the water table, and a saturated layer below it
    d = draws(invert_quietly(reduced(folder / "run_p.toml", walkers=16, ensembles=1, steps=700, burn=200)))
    bad = check_inside(d, {"thickness_1": m["thickness"][0], "depth_2": sum(m["thickness"])})
    assert not bad, "\n".join(bad)
    assert np.ptp(interval(d["thickness_1"], 0.99)) < 1.0
    lo, hi = interval(d["vp_2"], 0.99)
    assert 1500.0 < lo and hi < 2000.0

    # S alone, one soil layer over bedrock: bedrock at the right depth and a fit to the noise level
    out = invert_quietly(reduced(folder / "run_s.toml", walkers=12, ensembles=1, steps=500, burn=150))
    d = draws(out)
    bad = check_inside(d, {"thickness_1": sum(m["thickness"]), "vs_1": m["vs"][0], "vs_2": m["vs"][-1]})
    assert not bad, "\n".join(bad)
    picks = out.problem.picks
    pred, _ = out.problem.travel_times(np.median(kept_samples(out.result, 150, 1).reshape(-1, 3), axis=0))
    chi2_s = float(np.sum(((picks.travel_time - pred[0]) / picks.sigma) ** 2))
    assert chi2_s < stats.chi2.ppf(0.999, picks.n_picks - 3), chi2_s

    # ... whereas no single layer over a half-space fits the P picks (least squares over vp_1, vp_2, h)
    p = read_picks(folder / "picks_p.csv")

    def residuals(x):
        model = LayerModel.build([x[0]], [x[1], x[2]], vpvs=[2.0, 2.0])
        t = travel_times(model, "P", p.distance).time[0]
        return (p.travel_time - t) / p.sigma

    best = min((optimize.least_squares(residuals, x0, bounds=([0.5, 150.0, 300.0], [50.0, 3000.0, 6000.0]))
                for x0 in ([4.0, 450.0, 1700.0], [20.0, 1200.0, 2800.0], [10.0, 600.0, 2500.0])),
               key=lambda r: r.cost)
    chi2_p = 2.0 * best.cost
    assert chi2_p > 3.0 * stats.chi2.ppf(0.999, p.n_picks - 3), chi2_p


# ============================================================================ regional network
def test_network_gives_moho_depth_and_vpvs(tmp_path):
    folder = copy_case("regional_network", tmp_path)
    m = survey_model(folder)
    picks = read_picks(folder / "picks.csv", folder / "sources.csv", folder / "receivers.csv")
    assert not picks.depth_known.any() and not picks.origin_time_known.any()
    assert picks.epicentre_known.all()
    out = invert_quietly(reduced(folder / "run.toml", walkers=24, ensembles=1, steps=500, burn=200))
    d = draws(out)
    moho = sum(m["thickness"])
    truth = {"depth_2": moho, "vpvs": m["vpvs"][0], "vp_3": m["vp"][-1]}
    bad = check_inside(d, truth)
    assert not bad, "\n".join(bad)
    # resolved by the data: far narrower than the priors (40 km, 0.35, 1.4 km/s wide)
    assert np.ptp(interval(d["depth_2"], 0.99)) < 10.0
    assert np.ptp(interval(d["vpvs"], 0.99)) < 0.06
    assert np.ptp(interval(d["vp_3"], 0.99)) < 0.4


def test_flat_earth_error_at_200_km_is_about_a_tenth_of_a_second():
    """README claim: flat Pn is late by about 0.1 s at 200 km (spherical ray calculation of our own)."""
    sys.path.insert(0, str(CASES / "regional_network"))
    try:
        import flat_earth_check as fec
    finally:
        sys.path.remove(str(CASES / "regional_network"))
    m = survey_model(CASES / "regional_network")
    flat = LayerModel.build(m["thickness"], m["vp"], vpvs=m["vpvs"])
    # a uniform half-space: spherical time = chord / v (plane geometry), exact
    assert fec.spherical_first_arrival(100.0, 0.0, [], [6.0], n_p=400) == pytest.approx(
        2 * 6371.0 * math.sin(100.0 / 6371.0 / 2) / 6.0, abs=1e-6)
    sphere = fec.spherical_first_arrival(200.0, 10.0, m["thickness"], m["vp"], n_p=1500)
    t_flat = float(travel_times(flat, "P", [200.0], source_depth=10.0).time[0, 0])
    assert 0.05 < t_flat - sphere < 0.2
    # the package's exact flattening agrees with the independent calculation
    from invert.sphere import travel_times_flattened

    t_pkg = float(travel_times_flattened(flat, "P", [200.0], source_depth=10.0, radius=6371.0).time[0, 0])
    assert t_pkg == pytest.approx(sphere, abs=1e-3)


# ============================================================================ borehole
def test_borehole_gives_interval_velocities(tmp_path):
    folder = copy_case("borehole", tmp_path)
    m = survey_model(folder)
    out = invert_quietly(reduced(folder / "run.toml", walkers=24, ensembles=1, steps=900, burn=300))
    d = draws(out)
    n = len(m["vp"])
    truth = {f"vp_{k + 1}": v for k, v in enumerate(m["vp"])}
    truth.update({f"vs_{k + 1}": v for k, v in enumerate(m["vs"])})
    truth.update({f"depth_{k + 1}": z for k, z in enumerate(np.cumsum(m["thickness"]))})
    bad = check_inside(d, truth)
    assert not bad, "\n".join(bad)
    # intervals that say something: far narrower than the priors (Vp 4850 m/s, Vs 1920 m/s and
    # depths 63 m wide); the half-space, seen by the deepest receivers only, is looser
    prior_width = {"vp": 4850.0, "vs": 1920.0, "depth": 63.0}
    for name in truth:
        family, _, k = name.rpartition("_")
        limit = (0.5 if int(k) == n else 0.15) * prior_width[family]
        width = np.ptp(interval(d[name], 0.99))
        assert width < limit, (name, width, limit)
    # the soft clay (layer 2) is slower than the fill above it in S but faster in P
    assert np.mean(d["vs_2"] < d["vs_1"]) > 0.99
    assert np.mean(d["vp_2"] > d["vp_1"]) > 0.99


# ============================================================================ full settings (slow)
FULL = {
    "site_water_table": ["run.toml", "run_p.toml", "run_s.toml"],
    "regional_network": ["run.toml"],
    "borehole": ["run.toml"],
}


@pytest.mark.slow
@pytest.mark.parametrize("name,config", [(n, c) for n, cs in FULL.items() for c in cs])
def test_full_setting_converges_and_holds_the_truth(tmp_path, name, config):
    folder = copy_case(name, tmp_path)
    if name == "site_water_table":
        sys.path.insert(0, str(folder))
        try:
            import split_by_wave

            split_by_wave.split(folder)
        finally:
            sys.path.remove(str(folder))
            sys.modules.pop("split_by_wave", None)
    out = invert_quietly(folder / config)
    assert out.converged, out.report.verdict
    with open(folder / config, "rb") as fh:
        truth = tomllib.load(fh)["truth"]
    d = draws(out)
    bad = check_inside(d, {k: v for k, v in truth.items() if k in d}, 0.99)
    assert not bad, "\n".join(bad)


# ============================================================================ hidden_lvz, layer_count: folders
@pytest.mark.parametrize("name", ("hidden_lvz", "layer_count"))
def test_new_folders_hold_what_their_readmes_promise(name):
    folder = CASES / name
    readme = (folder / "README.md").read_text()
    for words in ("invert synth survey.toml", "invert run run.toml", "invert report runs/", "Synthetic",
                  "invented", "licensed professionals", "ln B"):
        assert words in readme, f"{name}/README.md does not mention {words!r}"
    command = "invert lvz-test" if name == "hidden_lvz" else "invert compare compare.toml"
    assert command in readme
    assert name in (CASES / "README.md").read_text(), "row missing from case_studies/README.md"
    # the [truth] of every run description with the generator's layering is the generator's model
    m = survey_model(folder)
    expected = {f"thickness_{k + 1}": h for k, h in enumerate(m["thickness"])}
    expected.update({f"vp_{k + 1}": v for k, v in enumerate(m["vp"])})
    for config in sorted(folder.glob("run*.toml")):
        with open(config, "rb") as fh:
            run = tomllib.load(fh)
        if "truth" in run:
            assert run["model"]["layers"] == len(m["thickness"]), config.name
            assert run["truth"] == pytest.approx(expected), config.name


# ============================================================================ hidden low-velocity layer
# Textbook intercept-time formulas for flat layers over a refractor of velocity V (Kearey, Brooks
# & Hill, An Introduction to Geophysical Exploration, 3rd ed., 2002, ch. 5, the multi-layer
# intercept time; Telford, Geldart & Sheriff, Applied Geophysics, 2nd ed., 1990, sec. 4.3; both
# from memory): the head wave from the refractor has intercept time
#     t_i = 2 sum_k h_k sqrt(1 / v_k^2 - 1 / V^2)
# over the layers above it. Reading the picks as one layer of velocity v_1 over the refractor
# gives the depth z = t_i / (2 sqrt(1 / v_1^2 - 1 / V^2)); with a slower layer among those above,
# that depth is too large (the hidden-layer / low-velocity-layer effect of the same chapters).
def intercept_time(thickness, vp, refractor: float) -> float:
    return 2.0 * sum(h * math.sqrt(1.0 / v**2 - 1.0 / refractor**2) for h, v in zip(thickness, vp))


def apparent_depth(thickness, vp, refractor: float) -> float:
    """Depth of the refractor from the two-segment reading (one layer of velocity vp[0])."""
    return intercept_time(thickness, vp, refractor) / (2.0 * math.sqrt(1.0 / vp[0] ** 2 - 1.0 / refractor**2))


def lvz_truth(folder: Path) -> dict:
    m = survey_model(folder)
    assert m["vp"][1] < m["vp"][0] < m["vp"][2], "the truth has a slower layer between faster ones"
    depth = sum(m["thickness"])
    z_app = apparent_depth(m["thickness"], m["vp"][:2], m["vp"][2])
    return {"model": m, "depth": depth, "apparent": z_app}


def synth_reflections(folder: Path) -> None:
    assert cli.main(["synth", str(folder / "survey_reflections.toml")]) == 0
    # the same first-arrival times in both files (same seed, first arrivals drawn first)
    first = read_picks(folder / "picks.csv")
    both = read_picks(folder / "picks_reflections.csv")
    is_first = np.asarray(both.branch) == "first"
    assert np.array_equal(both.travel_time[is_first], first.travel_time)
    assert set(np.asarray(both.branch)[~is_first]) == {"reflection"}


def check_first_arrivals_put_the_refractor_too_deep(d: dict, truth: dict) -> None:
    """One layer over the refractor: the velocities are right, the depth is the textbook apparent one."""
    m = truth["model"]
    bad = check_inside(d, {"vp_1": m["vp"][0], "vp_2": m["vp"][2], "thickness_1": truth["apparent"]})
    assert not bad, "\n".join(bad)
    lo, hi = interval(d["thickness_1"], 0.99)
    assert lo > truth["depth"] + 5.0, (lo, truth["depth"])  # far too deep, and sure of it


def check_lvz_first_arrivals(out: dict, truth: dict) -> dict:
    t = out["tests"][0]
    assert t["coverage"]["first_arrivals_only"]
    assert "the verdict is driven by the prior" in out["markdown"]
    # exchangeable uniform velocity priors with layer 3 the fastest: P(vp_2 < vp_1) = 2/3 a priori
    # (combinatorics), so no data can favour the monotone model by more than ln 3
    assert t["prior_inversion_probability"] == pytest.approx(2.0 / 3.0, abs=1e-3)
    assert t["log_cap_monotone"] == pytest.approx(math.log(3.0), abs=2e-3)
    err = t["log_bayes_factor_error"]
    assert -t["log_bayes_factor"] <= math.log(3.0) + 3 * err, t
    # every fit of an inverted model has a monotone fit as good (a deeper refractor), so the data
    # cannot favour the slower layer either: not beyond "a bare mention" (ln B 1, Kass & Raftery 1995)
    assert t["log_bayes_factor"] < 1.0 + 3 * err, t
    assert t["one_run_agrees_with_two_runs"]
    # monotone fits: every layer at least as fast as layer 1 above the refractor, so
    # sum h_k s_k <= depth * s_1 and the refractor is at least at the apparent depth
    depth = [s for s in t["sensitivity"] if s["parameter"].startswith("depth of interface 2")][0]
    assert depth["median_monotone"] > 0.97 * truth["apparent"] > truth["depth"] + 5.0, depth
    return t


def check_lvz_with_reflections(out: dict, truth: dict) -> dict:
    t = out["tests"][0]
    assert t["coverage"]["reflections_from_base_or_below"] > 0 and not t["coverage"]["first_arrivals_only"]
    assert "verdict is driven by the prior" not in out["markdown"]
    # "very strong" for the slower layer: ln B > 5 (2 ln B > 10, Kass & Raftery 1995, from memory)
    assert t["log_bayes_factor"] > 5.0 and t["favours"] == "slower layer", t["log_bayes_factor"]
    assert t["posterior_inversion_probability"] > 0.95
    # with the slower layer allowed the refractor is found at its true depth; without it, deeper
    depth = [s for s in t["sensitivity"] if s["parameter"].startswith("depth of interface 2")][0]
    assert abs(depth["median_permissive"] - truth["depth"]) < 3 * depth["posterior_sd"] + 0.2, depth
    assert depth["median_monotone"] > truth["depth"] + 3 * depth["posterior_sd"], depth
    return t


LVZ_REDUCED_FIRST = dict(estimators=("nested",), live_points=80, seed=3)
LVZ_REDUCED_REFLECTIONS = dict(estimators=("nested",), live_points=40, seed=3)


def test_hidden_lvz_first_arrivals_alone(tmp_path):
    from invert import compare as cmp

    folder = copy_case("hidden_lvz", tmp_path)
    truth = lvz_truth(folder)
    d = draws(invert_quietly(reduced(folder / "run.toml", walkers=16, ensembles=1, steps=600, burn=200)))
    check_first_arrivals_put_the_refractor_too_deep(d, truth)
    out = cmp.lvz_test(folder / "run_two_layers.toml", layer=2, settings=cmp.EvidenceSettings(**LVZ_REDUCED_FIRST),
                       folder=folder / "runs" / "lvz_first", progress=False)
    check_lvz_first_arrivals(out, truth)


def test_hidden_lvz_reflections_see_the_slow_layer(tmp_path):
    from invert import compare as cmp

    folder = copy_case("hidden_lvz", tmp_path)
    synth_reflections(folder)
    truth = lvz_truth(folder)
    out = cmp.lvz_test(folder / "run_reflections.toml", layer=2,
                       settings=cmp.EvidenceSettings(**LVZ_REDUCED_REFLECTIONS),
                       folder=folder / "runs" / "lvz_reflections", progress=False)
    check_lvz_with_reflections(out, truth)


# ============================================================================ how many layers
def compare_case(folder: Path, **evidence) -> dict:
    """Run `invert compare compare.toml` (with ``evidence`` replacing its [evidence] keys); rows by model name."""
    import json

    text = (folder / "compare.toml").read_text()
    for key, value in evidence.items():
        value = "[" + ", ".join(f'"{v}"' for v in value) + "]" if isinstance(value, tuple) else value
        text, n = re.subn(rf"^{key}\s*=.*$", f"{key} = {value}", text, flags=re.M)
        assert n == 1, key
    path = folder / "compare_reduced.toml"
    path.write_text(text)
    assert cli.main(["compare", str(path), "--quiet", "--overwrite"]) == 0
    doc = json.loads((folder / "runs" / "comparison" / "comparison.json").read_text())
    return {r["model"]: r for r in doc["models"]} | {"_doc": doc}


def check_layer_count(rows: dict) -> None:
    """Occam's razor on a 3-layer truth with small noise (thresholds of Kass & Raftery 1995 on ln B, from memory)."""
    one, two, three, four = (rows[f"{n} layer{'s' if n > 1 else ''}"] for n in (1, 2, 3, 4))
    assert [r["layers_above_half_space"] for r in (one, two, three, four)] == [0, 1, 2, 3]
    ln_b_32 = three["log_z"] - two["log_z"]
    ln_b_43 = four["log_z"] - three["log_z"]
    err_43 = math.hypot(four["log_z_error"], three["log_z_error"])
    # the third layer is demanded: "very strong", ln B > 5
    assert ln_b_32 > 5.0, ln_b_32
    assert two["log_z"] > one["log_z"] + 5.0
    # a fourth layer buys no fit worth its prior room: not favoured by more than about 1 nat
    assert ln_b_43 < 1.0 + 3 * err_43, (ln_b_43, err_43)
    assert one["posterior_probability"] < 1e-3 and two["posterior_probability"] < 0.01
    assert three["posterior_probability"] + four["posterior_probability"] > 0.99
    probs = [r["posterior_probability"] for r in (one, two, three, four)]
    assert sum(probs) == pytest.approx(1.0)


def test_layer_count_three_layers_favoured(tmp_path):
    folder = copy_case("layer_count", tmp_path)
    m = survey_model(folder)
    assert len(m["thickness"]) == 2 and m["vp"] == sorted(m["vp"])  # a monotone 3-layer truth
    rows = compare_case(folder, estimators=("nested",), live_points=60, seed=3)
    check_layer_count(rows)
    assert "Kass & Raftery" in (folder / "runs" / "comparison" / "comparison.md").read_text()
    # the 3-layer posterior holds the truth
    d = draws(invert_quietly(reduced(folder / "run.toml", walkers=16, ensembles=1, steps=700, burn=250)))
    truth = {"thickness_1": m["thickness"][0], "thickness_2": m["thickness"][1]}
    truth.update({f"vp_{k + 1}": v for k, v in enumerate(m["vp"])})
    bad = check_inside(d, truth)
    assert not bad, "\n".join(bad)


# ============================================================================ full settings (slow), new studies
@pytest.mark.slow
def test_hidden_lvz_full(tmp_path):
    from invert import compare as cmp

    folder = copy_case("hidden_lvz", tmp_path)
    synth_reflections(folder)
    truth = lvz_truth(folder)
    out = invert_quietly(folder / "run.toml")
    assert out.converged, out.report.verdict
    check_first_arrivals_put_the_refractor_too_deep(draws(out), truth)
    out = invert_quietly(folder / "run_reflections.toml")
    assert out.converged, out.report.verdict
    d = draws(out)
    with open(folder / "run_reflections.toml", "rb") as fh:
        bad = check_inside(d, tomllib.load(fh)["truth"])
    assert not bad, "\n".join(bad)
    assert np.mean(d["vp_2"] < d["vp_1"]) > 0.99
    full = cmp.EvidenceSettings(estimators=("nested",), live_points=400, seed=3)  # as in README.md
    check_lvz_first_arrivals(cmp.lvz_test(folder / "run_two_layers.toml", layer=2, settings=full,
                                          folder=folder / "runs" / "lvz_first", progress=False), truth)
    check_lvz_with_reflections(cmp.lvz_test(folder / "run_reflections.toml", layer=2, settings=full,
                                            folder=folder / "runs" / "lvz_reflections", progress=False), truth)


@pytest.mark.slow
def test_layer_count_full(tmp_path):
    folder = copy_case("layer_count", tmp_path)
    rows = compare_case(folder)  # compare.toml as written
    check_layer_count(rows)
    for name in ("1 layer", "2 layers", "3 layers", "4 layers"):
        assert rows[name]["estimators_agree"], rows[name]
    out = invert_quietly(folder / "run.toml")
    assert out.converged, out.report.verdict
    with open(folder / "run.toml", "rb") as fh:
        bad = check_inside(draws(out), tomllib.load(fh)["truth"])
    assert not bad, "\n".join(bad)
