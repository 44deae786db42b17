"""Inversion on a spherical planet: run descriptions with ``[model] geometry = "sphere"``.

* Configuration: the new keys, their errors, and the flat path left exactly as it was (same
  settings class, same text in the run fingerprint, same resolved keys, same predictions as
  the flat engine).
* Wiring: the problem's predicted times are those of the spherical engine on
  ``RadialModel.from_layers``, and for a uniform planet the chord times ``2 R sin(Delta/2) / v``
  (geometry of a circle, common practice), which does not go through the engine's code.
* The inverse problem by hand: log likelihood = sum of normal log densities (Gelman et al.) of the
  engine's times on the planet typed in shell by shell (not through ``from_layers``), log
  prior = normalised uniform densities; chords by the law of cosines for buried ends (plane
  geometry, common practice); S stopped by a liquid core but not by the same core made solid
  (no shear waves in a liquid; Aki & Richards); sources in the core.
* Great-circle distances against the haversine formula (common practice) and simple cases.
* A global synthetic survey (events and stations by longitude and latitude): picks at the
  true times plus the seeded noise, shadow-zone pairs named in the comments and not written.
* A reduced inversion of synthetic global picks on an invented planet through
  ``run_inversion``: the run folder is written, and the core radius and the mantle velocity
  of the true model lie inside the 99 % credible intervals (the 95 % ones are checked too;
  for a fixed seed each can miss by chance, about 5 % and 1 % of seeds for a calibrated
  posterior). The case study of case_studies/invented_planet: its files cheaply in the
  default suite (seeded picks reproduced, fit at the truth, the solid core's Vp/Vs unseen, no
  core far off); the slow test runs it as written.
"""

from __future__ import annotations

import dataclasses
import json
import shutil
import textwrap
from pathlib import Path

import numpy as np
import pytest

from invert import cli, sphere
from invert.config import ConfigError, load_config
from invert.data import read_picks
from invert.forward import predict
from invert.model import LayerModel
from invert.parameters import LayerSettings, SphereSettings
from invert.problem import build_problem
from invert.run import fingerprint, run_inversion

pytestmark = pytest.mark.filterwarnings("ignore:More chains:UserWarning")

DATA = Path(__file__).resolve().parent / "data"
CASE = Path(__file__).resolve().parents[1] / "case_studies" / "invented_planet"

# True model of the reduced test planet (invented): radius 3000 km; crust 30 km, 6.0 km/s;
# mantle 30-1500 km, Vp 7.5 -> 11.0 km/s, Vp/Vs 1.8; liquid core below 1500 km, Vp 7.0 km/s
# at its top (gradient 0.0005 1/s); core radius 1500 km.
R_TEST = 3000.0
TRUE = {"depth_2": 1500.0, "vp_2": 7.5, "vp_3": 7.0}
TRUE_GRADIENT_2 = 3.5 / 1470.0

SURVEY = f"""
title = "reduced invented planet (synthetic)"
units = "km"
seed = 4242
[model]
thickness = [30.0, 1470.0]
vp = [6.0, 7.5, 7.0]
vs = [{6.0 / 1.75!r}, {7.5 / 1.8!r}, 0.0]
gradient = [0.0, {TRUE_GRADIENT_2!r}, 0.0005]
[survey]
kind = "global"
planet_radius = {R_TEST}
max_diffraction = 0.0
waves = ["P", "S"]
sigma = {{ P = 0.3, S = 0.6 }}
events = [
  {{ name = "A", lon = 0.0, lat = 0.0, depth = 40.0 }},
  {{ name = "B", lon = 100.0, lat = 30.0, depth = 250.0 }},
]
stations = [
{{ name = "N01", lon = 12.0, lat = 3.0 }}, {{ name = "N05", lon = 97.0, lat = 2.0 }},
{{ name = "N06", lon = 120.0, lat = -10.0 }}, {{ name = "N07", lon = 150.0, lat = 5.0 }},
{{ name = "N08", lon = 165.0, lat = -3.0 }}, {{ name = "N09", lon = -170.0, lat = 8.0 }},
{{ name = "N10", lon = -140.0, lat = -20.0 }}, {{ name = "N11", lon = -110.0, lat = 15.0 }},
{{ name = "N12", lon = -80.0, lat = -30.0 }}, {{ name = "N13", lon = -50.0, lat = 40.0 }},
{{ name = "N14", lon = -25.0, lat = -45.0 }}, {{ name = "N16", lon = 60.0, lat = -60.0 }},
]
[output]
picks = "picks.csv"
"""

RUN = f"""
title = "reduced invented planet (synthetic): liquid core"
units = "km"
[data]
picks = "picks.csv"
[model]
geometry = "sphere"
planet_radius = {R_TEST}
max_diffraction = 0.0
layers = 2
depth_parameter = true
gradient_layers = [2, 3]
fluid_layers = [3]
[prior]
depth_1 = {{ fixed = 30.0 }}
vp_1 = {{ fixed = 6.0 }}
vpvs_1 = {{ fixed = 1.75 }}
vpvs_2 = {{ fixed = 1.8 }}
vpvs_3 = {{ fixed = inf }}
gradient_2 = {{ fixed = {TRUE_GRADIENT_2!r} }}
gradient_3 = {{ fixed = 0.0005 }}
depth_2 = {{ dist = "uniform", low = 1000.0, high = 1800.0 }}
vp_2 = {{ dist = "uniform", low = 7.0, high = 8.2 }}
vp_3 = {{ dist = "uniform", low = 5.5, high = 8.0 }}
[sampler]
walkers = 12
ensembles = 2
steps = 150
burn = 75
seed = 3
start = "optimum"
[output]
folder = "runs/sphere"
"""


def write(folder: Path, name: str, text: str) -> Path:
    path = folder / name
    path.write_text(textwrap.dedent(text).lstrip())
    return path


@pytest.fixture(scope="module")
def planet(tmp_path_factory) -> Path:
    """A folder with the reduced synthetic survey's picks and its run description."""
    folder = tmp_path_factory.mktemp("planet")
    spec = write(folder, "survey.toml", SURVEY)
    assert cli.main(["synth", str(spec)]) == 0
    write(folder, "run.toml", RUN)
    return folder


def true_layers() -> LayerModel:
    return LayerModel.build([30.0, 1470.0], [6.0, 7.5, 7.0], vs=[6.0 / 1.75, 7.5 / 1.8, 0.0],
                            gradient=[0.0, TRUE_GRADIENT_2, 0.0005])


# ============================================================================ configuration
FLAT = """
title = "flat"
units = "m"
[data]
picks = "{picks}"
[model]
layers = 1
[prior]
thickness_1 = {{ dist = "uniform", low = 1.0, high = 20.0 }}
vp = {{ dist = "uniform", low = 200.0, high = 3000.0 }}
vpvs = {{ fixed = 2.0 }}
"""


def test_flat_path_unchanged(tmp_path):
    """Without the new keys nothing differs: class, fingerprint text, resolved keys, predictions."""
    picks = DATA / "borehole_picks.csv"
    cfg = load_config(write(tmp_path, "flat.toml", FLAT.format(picks=picks)))
    assert type(cfg.layers) is LayerSettings and cfg.layers.geometry == "flat"
    # the text hashed into the run fingerprint (run.fingerprint) is the one written before spheres existed
    assert repr(cfg.layers) == ("LayerSettings(n_layers=1, gradient_layers=(), vpvs_mode='per_layer', "
                                "depth_parameter=False, fluid_layers=())")
    assert set(dataclasses.asdict(cfg.layers)) == {"n_layers", "gradient_layers", "vpvs_mode", "depth_parameter",
                                                   "fluid_layers"}
    explicit = load_config(write(tmp_path, "flat2.toml", FLAT.format(picks=picks).replace(
        "layers = 1", 'layers = 1\ngeometry = "flat"')))
    assert explicit.layers == cfg.layers and fingerprint(explicit) == fingerprint(cfg)
    problem = build_problem(cfg)
    assert not problem.sphere
    theta = np.array([[4.0, 500.0, 1800.0], [8.0, 700.0, 2500.0]])
    model, ok = problem.models(theta)
    assert ok.all()
    p = problem.picks
    expected = predict(model, p.wave, p.branch, p.interface, p.distance, p.source_depth, p.receiver_depth)
    np.testing.assert_array_equal(problem.travel_times(theta)[0], expected)


def test_sphere_settings_read(planet):
    cfg = load_config(planet / "run.toml")
    assert isinstance(cfg.layers, SphereSettings) and cfg.layers.geometry == "sphere"
    assert cfg.layers.planet_radius == R_TEST and cfg.layers.max_diffraction == 0.0
    assert "planet_radius=3000.0" in repr(cfg.layers)  # enters the run fingerprint
    flat_twin = dataclasses.replace(cfg, layers=LayerSettings(**{f.name: getattr(cfg.layers, f.name) for f in
                                                                 dataclasses.fields(LayerSettings)}))
    assert fingerprint(flat_twin) != fingerprint(cfg)
    # without a liquid core the key may be left out (default inf) ...
    solid = RUN.replace("max_diffraction = 0.0\n", "").replace("fluid_layers = [3]\n", "").replace(
        "vpvs_3 = { fixed = inf }", "vpvs_3 = { fixed = 1.8 }")
    default = load_config(write(planet, "default_md.toml", solid))
    assert default.layers.max_diffraction == np.inf


@pytest.mark.parametrize("fluid", ["[3]", "[2]"])
def test_liquid_core_needs_max_diffraction(planet, fluid):
    """... with a liquid core (fluid half-space, or a fluid layer over a solid inner core) it must be stated."""
    text = RUN.replace("max_diffraction = 0.0\n", "").replace("fluid_layers = [3]", f"fluid_layers = {fluid}")
    with pytest.raises(ConfigError) as err:
        load_config(write(planet, "no_md.toml", text))
    assert err.value.key == "model" and "max_diffraction" in str(err.value) and "no_md.toml" in str(err.value)
    assert "liquid core" in str(err.value) and "picked" in str(err.value)
    # an ocean (fluid from the surface down) is not a core: no key needed
    ocean = RUN.replace("max_diffraction = 0.0\n", "").replace("fluid_layers = [3]", "fluid_layers = [1]")
    assert load_config(write(planet, "ocean.toml", ocean)).layers.max_diffraction == np.inf


@pytest.mark.parametrize("edit, key, message", [
    (lambda t: t.replace('units = "km"', 'units = "m"'), "", "needs units = 'km'"),
    (lambda t: t.replace(f"planet_radius = {R_TEST}\n", ""), "model", "missing key 'planet_radius'"),
    (lambda t: t.replace(f"planet_radius = {R_TEST}", "planet_radius = -5.0"), "model", "planet radius"),
    (lambda t: t.replace("max_diffraction = 0.0", "max_diffraction = -1.0"), "model", "arc in degrees"),
    (lambda t: t.replace('geometry = "sphere"', 'geometry = "globe"'), "model", "'flat'"),
    (lambda t: t.replace('geometry = "sphere"', 'geometry = "flat"'), "model",
     "planet_radius is used only with geometry = 'sphere'"),
    (lambda t: t.replace('picks = "picks.csv"', 'picks = "picks.csv"\nsources = "picks.csv"\n'
                                                 'receivers = "picks.csv"'), "data", "inline"),
])
def test_sphere_config_errors(planet, edit, key, message):
    with pytest.raises(ConfigError) as err:
        load_config(write(planet, "bad.toml", edit(RUN)))
    assert err.value.key == key and message in str(err.value)


def test_sphere_pick_errors(planet, tmp_path):
    """Reflections and distances beyond the antipode are refused, naming the line."""
    text = (planet / "picks.csv").read_text().splitlines()
    header = [i for i, line in enumerate(text) if not line.startswith("#")][0]
    cols = text[header].split(",")
    row = text[header + 1].split(",")
    bad_branch = row.copy()
    bad_branch[cols.index("branch")] = "reflection"
    bad_branch[cols.index("interface")] = "1"
    far = text[header + 2].split(",")
    far[cols.index("distance")] = repr(np.pi * R_TEST * 1.001)
    for bad, message in ((bad_branch, "no reflections"), (far, "half the circumference")):
        lines = text[:header + 1] + [",".join(bad)]
        (tmp_path / "picks.csv").write_text("\n".join(lines) + "\n")
        shutil.copy(planet / "run.toml", tmp_path / "run.toml")
        with pytest.raises(ConfigError, match=message) as err:
            build_problem(load_config(tmp_path / "run.toml"))
        assert f"line {header + 2}" in str(err.value)


# ============================================================================ distances and the survey
def haversine(lon1, lat1, lon2, lat2):
    """Central angle [deg] by the haversine formula (common practice), written independently."""
    f1, f2, dl = np.radians(lat1), np.radians(lat2), np.radians(np.asarray(lon2) - lon1)
    h = np.sin((f2 - f1) / 2) ** 2 + np.cos(f1) * np.cos(f2) * np.sin(dl / 2) ** 2
    return np.degrees(2 * np.arcsin(np.sqrt(h)))


def test_epicentral_distance():
    rng = np.random.default_rng(5)
    lon1, lon2 = rng.uniform(-180, 180, (2, 500))
    lat1, lat2 = np.degrees(np.arcsin(rng.uniform(-1, 1, (2, 500))))
    got = sphere.epicentral_distance(lon1, lat1, lon2, lat2)
    ref = haversine(lon1, lat1, lon2, lat2)
    ok = ref < 179.0  # haversine loses digits near the antipode
    np.testing.assert_allclose(got[ok], ref[ok], atol=1e-9)
    np.testing.assert_allclose(sphere.epicentral_distance(10.0, 0.0, [55.0, -170.0, 10.0], 0.0), [45.0, 180.0, 0.0],
                               atol=1e-12)
    np.testing.assert_allclose(sphere.epicentral_distance(-33.0, 90.0, 77.0, [12.5, -40.0]), [77.5, 130.0],
                               atol=1e-12)
    np.testing.assert_allclose(sphere.epicentral_distance(20.0, 35.0, -160.0, -35.0), 180.0, atol=1e-12)


def test_global_survey_picks(planet):
    """Times = spherical engine at the great-circle distance + seeded noise; the shadow is named, not written."""
    picks = read_picks(planet / "picks.csv")
    comments = "\n".join(line for line in (planet / "picks.csv").read_text().splitlines() if line.startswith("#"))
    spec = load_toml(planet / "survey.toml")
    ev = {e["name"]: e for e in spec["survey"]["events"]}
    st = {s["name"]: s for s in spec["survey"]["stations"]}
    angle = np.array([float(sphere.epicentral_distance(ev[a]["lon"], ev[a]["lat"], st[b]["lon"], st[b]["lat"]))
                      for a, b in zip(picks.source_id, picks.receiver_id)])
    np.testing.assert_allclose(picks.distance, np.radians(angle) * R_TEST, rtol=1e-13)
    np.testing.assert_array_equal(picks.source_depth, [ev[a]["depth"] for a in picks.source_id])
    planet_model = sphere.RadialModel.from_layers(true_layers(), R_TEST)
    true = np.empty(picks.n_picks)
    for w in "PS":
        sel = picks.wave == w
        true[sel] = sphere.travel_times(planet_model, w, angle[sel], picks.source_depth[sel],
                                        max_diffraction=0.0).time[0]
    z = (picks.time - true) / picks.sigma
    assert np.all(np.isfinite(z)) and abs(z.mean()) < 0.5 and 0.6 < z.std() < 1.4
    # every pair/wave absent from the file is named in the comments with its distance, and lies past
    # the end of direct P (or S), where the engine gives no first arrival
    written = set(zip(picks.source_id, picks.receiver_id, picks.wave))
    n_absent = 0
    for a in ev:
        for b in st:
            d = float(sphere.epicentral_distance(ev[a]["lon"], ev[a]["lat"], st[b]["lon"], st[b]["lat"]))
            for w in "PS":
                if (a, b, w) not in written:
                    n_absent += 1
                    assert f"{a}-{b} {w} ({d:.1f} deg)" in comments
                    t = sphere.travel_times(planet_model, w, [d], ev[a]["depth"], max_diffraction=0.0).time
                    assert np.isinf(t).all()
    assert n_absent > 0 and f"not written, {n_absent})" in comments
    p_deg = angle[picks.wave == "P"]
    assert p_deg.max() > 140 and np.any((p_deg > 80) & (p_deg < 110))  # direct P and P through the core


def load_toml(path):
    import tomllib

    with open(path, "rb") as fh:
        return tomllib.load(fh)


# ============================================================================ the forward model of a sphere run
def test_problem_times_are_the_spherical_engine(planet):
    problem = build_problem(load_config(planet / "run.toml"))
    assert problem.sphere and problem.names == ["depth_2", "vp_2", "vp_3"]
    theta = np.array([[TRUE[n] for n in problem.names], [1200.0, 7.7, 6.0]])
    pred, ok = problem.travel_times(theta)
    assert ok.all()
    values = problem.prior.values(theta)
    picks = problem.picks
    for row in range(2):
        depth, vp2, vp3 = (float(values[k][row]) for k in ("depth_2", "vp_2", "vp_3"))
        layers = LayerModel.build([30.0, depth - 30.0], [6.0, vp2, vp3], vs=[6.0 / 1.75, vp2 / 1.8, 0.0],
                                  gradient=[0.0, TRUE_GRADIENT_2, 0.0005])
        planet_model = sphere.RadialModel.from_layers(layers, R_TEST)
        for w in "PS":
            sel = picks.wave == w
            ref = sphere.travel_times(planet_model, w, picks.distance[sel] / R_TEST * 180 / np.pi,
                                      picks.source_depth[sel], picks.receiver_depth[sel], max_diffraction=0.0)
            np.testing.assert_allclose(pred[row, sel], ref.time[0], rtol=1e-12)
    # the core radius matters: P beyond the shadow is only possible through the core
    deep = problem.deepest_points(theta[:1])
    assert deep[0] > TRUE["depth_2"]
    # a half-space starting below the centre is an invalid sample, not an error
    _, ok = problem.travel_times(np.array([[R_TEST + 10.0, 7.5, 7.0]]))
    assert not ok.any()


UNIFORM = """
title = "uniform planet"
units = "km"
[data]
picks = "picks.csv"
[model]
geometry = "sphere"
planet_radius = 2000.0
layers = 0
[prior]
vp_1 = {{ dist = "uniform", low = 4.0, high = 12.0 }}
vpvs_1 = {{ fixed = 1.8 }}
"""


def test_uniform_planet_chords(tmp_path):
    """A planet of one uniform shell: the time is the chord 2 R sin(Delta/2) / v (circle geometry)."""
    radius = 2000.0
    deg = np.array([0.5, 10.0, 45.0, 90.0, 135.0, 179.0])
    lines = ["source,receiver,wave,time,sigma,distance,source_depth,receiver_depth"]
    for i, d in enumerate(deg):
        for w in "PS":
            lines.append(f"s,r{i},{w},1.0,0.1,{float(np.radians(d) * radius)!r},0,0")
    (tmp_path / "picks.csv").write_text("\n".join(lines) + "\n")
    (tmp_path / "run.toml").write_text(textwrap.dedent(UNIFORM).lstrip().format())
    problem = build_problem(load_config(tmp_path / "run.toml"))
    vp = 7.3
    pred, ok = problem.travel_times(np.array([[vp]]))
    chord = 2 * radius * np.sin(np.radians(deg) / 2)
    expected = np.repeat(chord, 2) / np.tile([vp, vp / 1.8], deg.size)
    np.testing.assert_allclose(pred[0], expected, rtol=1e-10)


def test_uniform_planet_buried_source_chords(tmp_path):
    """Buried sources and receivers read from the picks: straight chords by the law of cosines,
    sqrt(rs^2 + rr^2 - 2 rs rr cos Delta) / v (plane geometry, common practice)."""
    radius = 2000.0
    rows = [(12.0, 0.0, 30.0), (70.0, 150.0, 0.0), (140.0, 600.0, 20.0), (179.5, 1200.0, 0.0)]  # deg, zs, zr km
    lines = ["source,receiver,wave,time,sigma,distance,source_depth,receiver_depth"]
    for i, (d, zs, zr) in enumerate(rows):
        lines.append(f"s{i},r{i},P,1.0,0.1,{float(np.radians(d) * radius)!r},{zs},{zr}")
    (tmp_path / "picks.csv").write_text("\n".join(lines) + "\n")
    (tmp_path / "run.toml").write_text(textwrap.dedent(UNIFORM).lstrip().format())
    problem = build_problem(load_config(tmp_path / "run.toml"))
    vp = 9.1
    pred, ok = problem.travel_times(np.array([[vp]]))
    d, zs, zr = (np.array(c, dtype=float) for c in zip(*rows))
    rs, rr = radius - zs, radius - zr
    expected = np.sqrt(rs ** 2 + rr ** 2 - 2 * rs * rr * np.cos(np.radians(d))) / vp
    assert ok.all()
    np.testing.assert_allclose(pred[0], expected, rtol=1e-10)


def _reduced_planet(depth_2: float, vp_2: float, vp_3: float, liquid: bool = True) -> sphere.RadialModel:
    """The reduced test planet typed in shell by shell (not through RadialModel.from_layers).

    Crust 0-30 km at 6.0 km/s; mantle from 30 km to depth_2, vp_2 at its top and
    vp_2 + TRUE_GRADIENT_2 (depth_2 - 30) at its base ('flat' law); core from depth_2 to the
    centre, vp_3 at its top and vp_3 + 0.0005 (R - depth_2) at the centre ('r2' law);
    Vp/Vs 1.75 in the crust and 1.8 in the mantle (and in a solid core).
    """
    vp_bot = [6.0, vp_2 + TRUE_GRADIENT_2 * (depth_2 - 30.0), vp_3 + 0.0005 * (R_TEST - depth_2)]
    vp_top = [6.0, vp_2, vp_3]
    core_ratio = np.inf if liquid else 1.8
    vs_top = [6.0 / 1.75, vp_2 / 1.8, vp_3 / core_ratio]
    vs_bot = [6.0 / 1.75, vp_bot[1] / 1.8, vp_bot[2] / core_ratio]
    return sphere.RadialModel.from_depths([0.0, 30.0, depth_2], [30.0, depth_2, R_TEST], vp_top, vp_bot,
                                          vs_top, vs_bot, radius=R_TEST, law=("flat", "flat", "r2"))


def test_log_likelihood_and_prior_by_hand(planet):
    """The problem's log likelihood and log posterior equal a computation by hand: the planet
    typed in shell by shell, the engine's first arrivals at the distances in degrees, the sum of
    Gaussian log densities -z^2/2 - ln(sigma) - ln(2 pi)/2 and the normalised uniform priors
    -ln(width) (the normal and uniform densities; Gelman et al., Bayesian Data Analysis, 3rd ed.,
    2013, appendix A, from memory)."""
    problem = build_problem(load_config(planet / "run.toml"))
    picks = problem.picks
    assert problem.names == ["depth_2", "vp_2", "vp_3"] and set(picks.branch) == {"first"}
    assert np.all(picks.source_origin_time == 0.0)  # synthetic: the times are travel times
    theta = np.array([[1500.0, 7.5, 7.0], [1200.0, 7.7, 6.0], [1650.0, 7.2, 7.9]])
    ll = problem.log_likelihood(theta)
    ll_pick = problem.log_likelihood(theta, pointwise=True)
    deg = np.degrees(picks.distance / R_TEST)
    for row, (depth_2, vp_2, vp_3) in enumerate(theta):
        model = _reduced_planet(depth_2, vp_2, vp_3)
        pred = np.empty(picks.n_picks)
        for w in "PS":
            sel = picks.wave == w
            pred[sel] = sphere.travel_times(model, w, deg[sel], picks.source_depth[sel], picks.receiver_depth[sel],
                                            max_diffraction=0.0).time[0]
        z = (picks.time - pred) / picks.sigma
        by_hand = -0.5 * z ** 2 - np.log(picks.sigma) - 0.5 * np.log(2 * np.pi)
        np.testing.assert_allclose(ll_pick[row], by_hand, rtol=1e-10, atol=1e-10)
        assert ll[row] == pytest.approx(by_hand.sum(), rel=1e-12)
    # only the true model explains every pick: chi^2 per pick near 1 there, far above elsewhere
    chi2 = -2 * (ll + np.sum(np.log(picks.sigma) + 0.5 * np.log(2 * np.pi))) / picks.n_picks
    assert 0.5 < chi2[0] < 1.6 and np.all(chi2[1:] > 10)
    widths = (1800.0 - 1000.0) * (8.2 - 7.0) * (8.0 - 5.5)
    np.testing.assert_allclose(problem.log_prior(theta), -np.log(widths), rtol=1e-12)
    np.testing.assert_allclose(problem.log_prob(theta), ll - np.log(widths), rtol=1e-12)


def test_liquid_core_stops_s_and_sources_inside_it(planet, tmp_path):
    """S cannot travel in a liquid (no rigidity; Aki & Richards, Quantitative Seismology, 2nd ed.,
    2002, from memory): beyond the shadow the liquid core
    lets P through and no S, while the same planet with a solid core has S there too. A source
    lying in the core of a sampled model is an impossible model (log likelihood -inf), not an error."""
    lines = ["source,receiver,wave,time,sigma,distance,source_depth,receiver_depth"]
    arcs = [60.0, 170.0]
    for i, d in enumerate(arcs):
        for w in "PS":
            lines.append(f"A,r{i},{w},100.0,0.5,{float(np.radians(d) * R_TEST)!r},40.0,0.0")
    lines.append(f"B,r0,P,100.0,0.5,{float(np.radians(60.0) * R_TEST)!r},250.0,0.0")
    (tmp_path / "picks.csv").write_text("\n".join(lines) + "\n")
    liquid = RUN
    solid = RUN.replace("fluid_layers = [3]\n", "").replace("vpvs_3 = { fixed = inf }", "vpvs_3 = { fixed = 1.8 }")
    assert solid != liquid
    (tmp_path / "liquid.toml").write_text(textwrap.dedent(liquid).lstrip())
    (tmp_path / "solid.toml").write_text(textwrap.dedent(solid).lstrip())
    theta = np.array([[1500.0, 7.5, 7.0]])
    t_liq = build_problem(load_config(tmp_path / "liquid.toml")).travel_times(theta)[0][0]
    t_sol = build_problem(load_config(tmp_path / "solid.toml")).travel_times(theta)[0][0]
    # order of the picks: A-r0 P, A-r0 S, A-r1 P, A-r1 S, B-r0 P
    assert np.all(np.isfinite(t_liq[[0, 1, 2, 4]])) and np.isinf(t_liq[3])
    assert np.all(np.isfinite(t_sol))
    np.testing.assert_array_equal(t_liq[[0, 1, 2, 4]], t_sol[[0, 1, 2, 4]])  # mantle paths and P: same
    # the core boundary above the 250 km deep source B: its pick has no arrival, the row is -inf
    problem = build_problem(load_config(tmp_path / "liquid.toml"))
    pred, ok = problem.travel_times(np.array([[200.0, 7.5, 7.0]]))
    assert ok.all() and np.isinf(pred[0, 4])
    assert problem.log_likelihood(np.array([[200.0, 7.5, 7.0]]))[0] == -np.inf
    # ... while a core boundary fixed by the prior above a source is an error naming the line
    fixed = RUN.replace('depth_2 = { dist = "uniform", low = 1000.0, high = 1800.0 }', "depth_2 = { fixed = 200.0 }")
    assert fixed != RUN
    (tmp_path / "fixed.toml").write_text(textwrap.dedent(fixed).lstrip())
    with pytest.raises(ConfigError, match="liquid core") as err:
        build_problem(load_config(tmp_path / "fixed.toml"))
    assert "line 6, column 'source_depth'" in str(err.value)
    # an outer core over a solid inner core: an end below the outer core's top is refused too
    cores = textwrap.dedent("""
        title = "outer and inner core"
        units = "km"
        [data]
        picks = "deep.csv"
        [model]
        geometry = "sphere"
        planet_radius = 3000.0
        max_diffraction = 0.0
        layers = 2
        depth_parameter = true
        fluid_layers = [2]
        [prior]
        depth_1 = {{ fixed = {top} }}
        depth_2 = {{ fixed = 2200.0 }}
        vp_1 = {{ dist = "uniform", low = 8.0, high = 11.0 }}
        vp_2 = {{ fixed = 7.0 }}
        vp_3 = {{ fixed = 9.0 }}
        vpvs_1 = {{ fixed = 1.8 }}
        vpvs_2 = {{ fixed = inf }}
        vpvs_3 = {{ fixed = 2.5 }}
        """).lstrip()
    (tmp_path / "deep.csv").write_text("source,receiver,wave,time,sigma,distance,source_depth,receiver_depth\n"
                                       "q,r,P,100.0,0.5,3000.0,2500.0,0.0\n")
    (tmp_path / "cores.toml").write_text(cores.format(top=1500.0))
    with pytest.raises(ConfigError, match="liquid core starts at 1500 km"):
        build_problem(load_config(tmp_path / "cores.toml"))
    (tmp_path / "cores.toml").write_text(cores.format(top=2600.0).replace("2200.0", "2800.0"))
    assert build_problem(load_config(tmp_path / "cores.toml")).sphere  # the source lies in the mantle


# ============================================================================ inversion
def test_reduced_inversion_recovers_core_and_mantle(planet):
    """run_inversion on a sphere run: folder written, core radius and mantle Vp inside the credible intervals."""
    out = run_inversion(planet / "run.toml", quiet=True, progress=False, overwrite=True)
    folder = planet / "runs" / "sphere"
    for name in ("posterior.nc", "summary.csv", "summary.json", "convergence.json", "config.toml",
                 "config_resolved.json"):
        assert (folder / name).exists(), name
    resolved = json.loads((folder / "config_resolved.json").read_text())
    assert resolved["layers"]["planet_radius"] == R_TEST and resolved["layers"]["max_diffraction"] == 0.0
    import arviz as az

    idata = az.from_netcdf(folder / "posterior.nc")
    core_radius = R_TEST - np.asarray(idata.posterior["depth_2"]).ravel()
    vp2 = np.asarray(idata.posterior["vp_2"]).ravel()
    true_core = R_TEST - TRUE["depth_2"]
    for values, truth in ((core_radius, true_core), (vp2, TRUE["vp_2"])):
        lo99, lo95, hi95, hi99 = np.percentile(values, [0.5, 2.5, 97.5, 99.5])
        assert lo99 < truth < hi99
        assert lo95 < truth < hi95
        assert hi95 - lo95 < {True: 150.0, False: 0.5}[truth == true_core]  # the data do constrain it
    rows = {r["parameter"]: r for r in out.summary}
    assert rows["depth_2"]["unit"] == "km" and rows["vp_2"]["unit"] == "km/s"
    # a short run: chains started near the optimum, none stuck elsewhere, roughly mixed
    assert not out.report.stuck and max(out.report.rhat) < 1.25
    _check_sphere_report(folder)


def _check_sphere_report(folder: Path) -> None:
    """The report of a sphere run speaks of the planet, not of flat layers and a site survey."""
    from invert.report import write_report

    write_report(folder, png=True, max_draws=40)
    text = (folder / "report.md").read_text()
    assert f"Spherical planet of radius {R_TEST:g} km" in text and "'flat' law" in text and "'r2'" in text
    assert "max_diffraction = 0: no diffracted wave" in text
    assert "over a half-space (layers numbered" not in text
    cautions = text[text.index("spherically symmetric") - 400:]
    assert "flat, laterally uniform layers" not in cautions and "site investigation" not in cautions
    assert "Every number in this report is an estimate" in cautions  # the general caution stays
    assert "distance along the surface of the planet (arc" in text
    for name in ("velocity_depth", "travel_time_fit", "prior_predictive"):
        assert (folder / "figures" / f"{name}.png").stat().st_size > 1000


def test_velocity_density_of_a_sphere_run(planet):
    """compare.velocity_density on a sphere run: the profile is the engine's shell law, the grid
    stops at the centre."""
    from invert.compare import velocity_density

    problem = build_problem(load_config(planet / "run.toml"))
    theta = np.array([[TRUE[n] for n in problem.names]] * 5)
    out = velocity_density([(problem, theta)], np.array([1.0]), n_depth=61, max_depth=None, draws=50)
    depth = out["depth"]
    assert depth[-1] <= R_TEST
    radial, _ = problem.radial_models(theta[:1])
    np.testing.assert_allclose(out["quantiles"][50.0], radial.profile(depth, "P")[0], rtol=1e-12)
    # mid-mantle the 'flat' shell law, not the straight line between the end velocities
    j = np.argmin(np.abs(depth - 750.0))
    straight = TRUE["vp_2"] + TRUE_GRADIENT_2 * (depth[j] - 30.0)
    assert out["quantiles"][50.0][j] - straight > 0.3
    with pytest.raises(ValueError, match="below the centre"):
        velocity_density([(problem, theta)], np.array([1.0]), max_depth=2 * R_TEST)


def test_case_study_files(tmp_path):
    """case_studies/invented_planet, cheaply: the picks are those of its seeded survey, the three
    run descriptions build, the true model fits to chi^2 per pick near 1 (Gaussian noise of the
    stated sd), the solid core's Vp/Vs leaves the likelihood unchanged (no first-arrival S pick
    reaches the core: S stops at the shadow edge), and no model without a core comes near."""
    folder = tmp_path / "planet"
    folder.mkdir()
    shutil.copy(CASE / "survey.toml", folder / "survey.toml")
    assert cli.main(["synth", str(folder / "survey.toml")]) == 0
    assert (folder / "picks.csv").read_bytes() == (CASE / "picks.csv").read_bytes()
    liquid, solid, none = (build_problem(load_config(CASE / name))
                           for name in ("run.toml", "run_solid_core.toml", "run_no_core.toml"))
    truth = load_config(CASE / "run.toml").truth
    theta = np.array([[truth[n] for n in liquid.names]])
    n = liquid.picks.n_picks
    const = np.sum(np.log(liquid.picks.sigma) + 0.5 * np.log(2 * np.pi))
    chi2 = -2 * (liquid.log_likelihood(theta)[0] + const) / n
    assert 0.7 < chi2 < 1.3
    rows = np.array([[{**truth, "vpvs_3": r}[k] for k in solid.names] for r in (1.5, 1.8, 2.5, 4.0)])
    ll_solid = solid.log_likelihood(rows)
    assert np.all(ll_solid == ll_solid[0]) and ll_solid[0] == liquid.log_likelihood(theta)[0]
    draws = none.sample_prior(400, np.random.default_rng(2))
    assert np.all(none.log_likelihood(draws) < liquid.log_likelihood(theta)[0] - 1e4)


@pytest.mark.slow
def test_case_study_as_written(tmp_path):
    """case_studies/invented_planet/run.toml as written: truth inside the 95 % intervals, converged."""
    folder = tmp_path / "invented_planet"
    shutil.copytree(CASE, folder, ignore=shutil.ignore_patterns("runs", "picks.csv", "comparison*", "__pycache__"))
    assert cli.main(["synth", str(folder / "survey.toml")]) == 0
    out = run_inversion(folder / "run.toml", quiet=True, progress=False, overwrite=True)
    assert out.converged
    truth = load_config(folder / "run.toml").truth
    rows = {r["parameter"]: r for r in out.summary}
    for name in ("depth_2", "vp_2", "vp_3", "vpvs_2"):
        assert rows[name]["low_95"] < truth[name] < rows[name]["high_95"], name
