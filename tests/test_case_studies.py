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
* borehole -- interval velocities (Vp and Vs of every layer) and interface depths.

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
