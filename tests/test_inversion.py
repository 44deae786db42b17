"""End-to-end Bayesian inversion: recovery of stated truths, calibration, exact resume.

Every data set here is synthetic: arrival times computed from the true models stated in
this file, plus seeded Gaussian noise, for invented surveys (a refraction line at an
invented site, a local network in an invented region).

What is checked, and against what:

* Recovery (a) -- a refraction line (two layers over a half-space, metres, P and S first
  arrivals, shots at both ends): every true parameter lies inside its central 99 %
  posterior interval, and a quarter of the noise gives narrower 95 % intervals.
* Recovery (b) -- a local network (crust over mantle, kilometres, events at unknown depth
  and unknown origin time, the origin times marginalised under a normal prior): Moho depth
  and velocities inside their 99 % intervals (event depths as well in the slow version).
* Calibration -- simulation-based calibration (Talts, Betancourt, Simpson, Vehtari &
  Gelman, "Validating Bayesian inference algorithms with simulation-based calibration",
  arXiv:1804.06788, 2018; algorithm and rank-uniformity theorem from memory): parameters
  drawn from the prior, data drawn from the likelihood, each data set inverted; the rank of
  the true value among L posterior draws is uniform on {0, ..., L} when the inference is
  right. A one-layer P-only problem through the sampler directly, and (slow) the whole run
  on the three-layer line.
* Resume -- a run interrupted part-way and continued with ``invert run --resume`` gives
  the same chain, bit for bit, as the same run left alone.

The default suite runs one noise realisation of each recovery case (one ensemble, a few
hundred steps) and 24 calibration replications; the ``slow`` versions (``make test-long``)
repeat the recoveries over 8-12 noise realisations with binomial coverage tests, run 200
calibration replications, and kill a running ``invert run`` process before resuming it.
A fixed-seed check of a 99 % interval can miss by chance (about 1 % per parameter for a
calibrated posterior); the slow versions are the statistical tests.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from invert import cli
from invert import run as run_module
from invert.config import ConfigError
from invert.data import read_picks, write_picks
from invert.model import LayerModel
from invert.parameters import LayerSettings
from invert.prior import prior_from_toml_table
from invert.problem import Problem
from invert.run import default_moves, derived_values, kept_samples, run_inversion
from invert.sample import checkpoint_steps, initial_from_prior, run_ensembles
from invert.synthetic import make_synthetic, synthesize

# arviz warns when the pointwise log-likelihood subset has more chains than draws; harmless here
pytestmark = pytest.mark.filterwarnings("ignore:More chains:UserWarning")


# ============================================================================ helpers
def toml_number(x: float) -> str:
    return repr(float(x))


def toml_list(values) -> str:
    return "[" + ", ".join(toml_number(v) for v in values) + "]"


def invert_quietly(config_path, **kwargs):
    return run_inversion(config_path, quiet=True, progress=False, overwrite=True, **kwargs)


def posterior_draws(out) -> dict[str, np.ndarray]:
    """Kept draws of every sampled and derived quantity of a finished run, pooled."""
    s = out.config.sampler
    samples = kept_samples(out.result, s.burn, s.thin)
    flat = samples.reshape(-1, samples.shape[-1])
    draws = {name: flat[:, i] for i, name in enumerate(out.problem.names)}
    draws.update(derived_values(out.problem, flat))
    return draws


def central_interval(x: np.ndarray, level: float) -> tuple[float, float]:
    tail = 50.0 * (1.0 - level)
    lo, hi = np.percentile(x, [tail, 100.0 - tail])
    return float(lo), float(hi)


def misses(draws: dict, truth: dict, level: float) -> list[str]:
    """Descriptions of the true values that fall outside their central ``level`` interval."""
    out = []
    for name, value in truth.items():
        lo, hi = central_interval(draws[name], level)
        if not lo <= value <= hi:
            out.append(f"{name}: true {value:g} outside the {100 * level:g} % interval [{lo:g}, {hi:g}]")
    return out


def coverage_p_values(inside: np.ndarray, level: float) -> np.ndarray:
    """Lower-tail binomial p-values P(X <= observed), X ~ Binomial(seeds, level), per parameter.

    ``inside`` is (seeds, parameters) bool. For a fixed truth and a posterior dominated by
    the data, central credible intervals have close to nominal frequentist coverage
    (Bernstein-von Mises; common practice), so a small p-value means over-confident
    intervals.
    """
    n = inside.shape[0]
    return stats.binom.cdf(inside.sum(axis=0), n, level)


# ============================================================================ (a) refraction line
# True model of the invented site (synthetic): loose soil over stiff clay over sandstone.
LINE_MODEL = {"thickness": [4.0, 10.0], "vp": [500.0, 1500.0, 3000.0], "vs": [250.0, 520.0, 1400.0]}
LINE_SIGMA = {"P": 0.001, "S": 0.002}  # pick uncertainty [s]


def line_truth() -> dict[str, float]:
    h, vp, vs = LINE_MODEL["thickness"], LINE_MODEL["vp"], LINE_MODEL["vs"]
    truth = {"thickness_1": h[0], "thickness_2": h[1], "depth_1": h[0], "depth_2": h[0] + h[1]}
    for k in range(3):
        truth[f"vp_{k + 1}"] = vp[k]
        truth[f"vs_{k + 1}"] = vs[k]
        truth[f"vpvs_{k + 1}"] = vp[k] / vs[k]
    return truth


LINE_PRIOR = """\
thickness = { dist = "uniform", low = 0.5, high = 30.0 }
vp_1 = { dist = "uniform", low = 150.0, high = 1200.0 }
vp_2 = { dist = "uniform", low = 300.0, high = 3000.0 }
vp_3 = { dist = "uniform", low = 800.0, high = 6000.0 }
vpvs = { dist = "uniform", low = 1.4, high = 6.0 }
"""


def write_line_case(folder: Path, *, noise_scale: float = 1.0, noise_seed: int = 5, walkers: int = 48,
                    ensembles: int = 1, steps: int = 250, burn: int = 100, seed: int = 3,
                    receivers_spacing: float = 5.0, model: dict = LINE_MODEL, prior: str = LINE_PRIOR) -> Path:
    """Synthetic reversed refraction line (shots 2 m beyond both ends of a 60 m spread) and its run description.

    The noise of ``noise_scale`` < 1 is the same realisation (same seed), scaled.
    """
    folder.mkdir(parents=True, exist_ok=True)
    sig = {w: s * noise_scale for w, s in LINE_SIGMA.items()}
    (folder / "survey.toml").write_text(f"""\
title = "synthetic reversed refraction line at an invented site"
units = "m"
seed = {noise_seed}
[model]
thickness = {toml_list(model["thickness"])}
vp = {toml_list(model["vp"])}
vs = {toml_list(model["vs"])}
[survey]
kind = "line"
shots = [-2.0, 62.0]
receivers = {{ first = 0.0, last = 60.0, spacing = {toml_number(receivers_spacing)} }}
waves = ["P", "S"]
sigma = {{ P = {toml_number(sig["P"])}, S = {toml_number(sig["S"])} }}
[output]
picks = "picks.csv"
""")
    make_synthetic(folder / "survey.toml")
    (folder / "run.toml").write_text(f"""\
title = "synthetic refraction line (test)"
units = "m"
[data]
picks = "picks.csv"
[model]
layers = 2
vpvs_mode = "per_layer"
[prior]
{prior}[constraints]
increasing_velocity = true
[sampler]
walkers = {walkers}
ensembles = {ensembles}
steps = {steps}
burn = {burn}
seed = {seed}
checkpoint_every = 100000
[output]
folder = "run"
""")
    return folder / "run.toml"


@pytest.fixture(scope="module")
def line_runs(tmp_path_factory):
    """The line inverted at the stated noise and at a quarter of it (same noise realisation, scaled)."""
    base = tmp_path_factory.mktemp("line")
    return {scale: invert_quietly(write_line_case(base / f"noise_{scale}", noise_scale=scale))
            for scale in (1.0, 0.25)}


def head_wave_time(x, thickness, v, k):
    """Head wave along the top of layer k+1 (0-based k), surface source and receiver, flat layers:
    t = x / v_k + sum_j 2 h_j cos(i_j) / v_j, sin(i_j) = v_j / v_k (common practice; e.g. the
    multi-layer intercept-time formula of refraction text books)."""
    t = x / v[k]
    for j in range(k):
        t += 2.0 * thickness[j] * np.sqrt(1.0 - (v[j] / v[k]) ** 2) / v[j]
    return t


def test_line_picks_match_the_stated_truth(line_runs):
    # the test data are what this file says: true times plus noise of the stated size
    out = line_runs[1.0]
    picks = out.problem.picks
    assert picks.n_picks == 2 * 13 * 2  # two shots, 13 receivers, P and S
    x = np.asarray(picks.distance)
    wave = np.asarray(picks.wave)
    h = LINE_MODEL["thickness"]
    z = np.empty(x.size)
    for w, v in (("P", LINE_MODEL["vp"]), ("S", LINE_MODEL["vs"])):
        sel = wave == w
        first = np.minimum.reduce([x[sel] / v[0], head_wave_time(x[sel], h, v, 1), head_wave_time(x[sel], h, v, 2)])
        z[sel] = (np.asarray(picks.travel_time)[sel] - first) / np.asarray(picks.sigma)[sel]
    assert np.all(np.abs(z) < 4.5)
    assert abs(z.mean()) < 4 / np.sqrt(z.size) and 0.6 < z.std() < 1.4


def test_line_truth_inside_99_percent_intervals(line_runs):
    truth = line_truth()
    problems = []
    for scale, out in line_runs.items():
        problems += [f"noise x {scale}: {m}" for m in misses(posterior_draws(out), truth, 0.99)]
    assert not problems, "\n".join(problems)


def test_line_intervals_shrink_when_noise_falls(line_runs):
    # 95 % intervals from the run's own summary table; for a data-dominated posterior the
    # width scales with the noise (a quarter here), so demand at least a halving
    rows = {scale: {r["parameter"]: r for r in out.summary} for scale, out in line_runs.items()}
    names = ["thickness_1", "thickness_2", "vp_1", "vp_2", "vp_3", "vs_1", "vs_2", "vs_3"]
    ratios = {}
    for name in names:
        wide = rows[1.0][name]["high_95"] - rows[1.0][name]["low_95"]
        narrow = rows[0.25][name]["high_95"] - rows[0.25][name]["low_95"]
        ratios[name] = narrow / wide
    assert all(r < 0.5 for r in ratios.values()), ratios
    # and the summary's interval is the 2.5-97.5 % range of the kept draws
    draws = posterior_draws(line_runs[1.0])
    lo, hi = central_interval(draws["vp_2"], 0.95)
    assert rows[1.0]["vp_2"]["low_95"] == pytest.approx(lo, rel=1e-5)
    assert rows[1.0]["vp_2"]["high_95"] == pytest.approx(hi, rel=1e-5)


@pytest.mark.slow
def test_line_coverage_over_many_noise_realisations(tmp_path):
    truth = line_truth()
    names = list(truth)
    seeds = range(101, 113)
    inside = {0.9: [], 0.99: []}
    for seed in seeds:
        out = invert_quietly(write_line_case(tmp_path / f"seed{seed}", noise_seed=seed, ensembles=2, steps=800,
                                             burn=300, seed=seed))
        draws = posterior_draws(out)
        for level in inside:
            inside[level].append([not misses(draws, {n: truth[n]}, level) for n in names])
    # one-sided binomial tests, Bonferroni over parameters and the two levels, family-wise 1 %
    alpha = 0.01 / (len(names) * len(inside))
    report = {level: dict(zip(names, np.array(rows).mean(axis=0).round(2))) for level, rows in inside.items()}
    print(f"coverage over {len(seeds)} noise realisations: {report}")
    for level, rows in inside.items():
        p = coverage_p_values(np.array(rows), level)
        assert p.min() > alpha, f"coverage at {level}: {report[level]} (p = {dict(zip(names, p.round(5)))})"


@pytest.mark.slow
def test_line_calibration_over_prior_draws(tmp_path):
    # Simulation-based calibration of the whole run (optimum start, sampler, summaries) on the
    # line: true models drawn from a prior, noise from the likelihood; the posterior quantile of
    # every true value is uniform when the inference is right. Fixed-truth coverage (above) is
    # only approximately nominal; this is exact on average over the prior.
    bounds = {"thickness_1": (2.0, 8.0), "thickness_2": (6.0, 14.0), "vp_1": (300.0, 700.0),
              "vp_2": (1000.0, 2000.0), "vp_3": (2500.0, 4000.0), "vpvs_1": (1.7, 3.5), "vpvs_2": (1.7, 3.5),
              "vpvs_3": (1.7, 3.5)}  # disjoint velocity ranges: the increasing-velocity constraint always holds
    prior = "".join(f'{n} = {{ dist = "uniform", low = {lo!r}, high = {hi!r} }}\n' for n, (lo, hi) in bounds.items())
    rng = np.random.default_rng(77)
    quantiles = []
    for r in range(60):
        while True:  # a data set with a negative time cannot be written: redraw truth and noise together
            truth = {n: float(rng.uniform(lo, hi)) for n, (lo, hi) in bounds.items()}
            model = {"thickness": [truth["thickness_1"], truth["thickness_2"]],
                     "vp": [truth[f"vp_{k}"] for k in (1, 2, 3)],
                     "vs": [truth[f"vp_{k}"] / truth[f"vpvs_{k}"] for k in (1, 2, 3)]}
            try:
                config = write_line_case(tmp_path / f"r{r}", noise_seed=int(rng.integers(2**31)), steps=700,
                                         burn=350, seed=r + 1, model=model, prior=prior)
                break
            except ConfigError as err:
                assert "before the origin time" in str(err)
        out = invert_quietly(config)
        draws = posterior_draws(out)
        quantiles.append([np.mean(draws[n] < truth[n]) for n in bounds])
    q = np.array(quantiles)
    counts = [np.histogram(q[:, j], bins=5, range=(0.0, 1.0))[0] for j in range(q.shape[1])]
    p = np.array([stats.chisquare(c).pvalue for c in counts])
    print(f"posterior quantiles of the truth, counts in fifths: {dict(zip(bounds, map(list, counts)))}")
    assert p.min() > 0.01 / p.size, f"p-values {dict(zip(bounds, p.round(4)))}"


# ============================================================================ (b) local network
# True structure of the invented region (synthetic): crust over mantle, kilometres and km/s.
NETWORK_MODELS = {
    1: {"thickness": [31.0], "vp": [6.2, 8.0], "vpvs": 1.75},  # one crustal layer
    2: {"thickness": [15.0, 17.0], "vp": [5.9, 6.6, 8.05], "vpvs": 1.74},  # upper and lower crust
}
# events: name, x, y [km], depth [km], origin time [s] (depths and origin times hidden from the inversion)
NETWORK_EVENTS = [
    ("ev1", 8.0, 4.0, 6.0, 12.0),
    ("ev2", -15.0, 12.0, 11.0, 95.5),
    ("ev3", 4.0, -20.0, 17.0, 240.2),
    ("ev4", 22.0, 16.0, 9.0, 301.7),
    ("ev5", -6.0, -9.0, 23.0, 488.0),
]
NETWORK_STATIONS = [
    ("NA01", 0.0, 0.0), ("NA02", 24.0, -3.0), ("NA03", -31.0, 9.0), ("NA04", 44.0, -38.0),
    ("NA05", -55.0, -47.0), ("NA06", 72.0, 31.0), ("NA07", -84.0, 42.0), ("NA08", 101.0, -18.0),
    ("NA09", -108.0, -63.0), ("NA10", 119.0, 58.0), ("NA11", -131.0, 27.0), ("NA12", 18.0, 145.0),
]
NETWORK_SIGMA = {"P": 0.05, "S": 0.10}  # s


def network_truth(n_crust: int) -> dict[str, float]:
    m = NETWORK_MODELS[n_crust]
    depths = np.cumsum(m["thickness"])
    truth = {f"depth_{k + 1}": float(d) for k, d in enumerate(depths)}
    for k, v in enumerate(m["vp"]):
        truth[f"vp_{k + 1}"] = v
        truth[f"vs_{k + 1}"] = v / m["vpvs"]
    truth["vpvs"] = m["vpvs"]
    for name, _, _, depth, _ in NETWORK_EVENTS:
        truth[f"event_depth_{name}"] = depth
    return truth


def write_network_case(folder: Path, *, n_crust: int = 1, noise_seed: int = 12, walkers: int = 40,
                       ensembles: int = 1, steps: int = 300, burn: int = 120, seed: int = 4) -> Path:
    """Synthetic picks with sources/receivers tables (depths and origin times left empty) and the run description."""
    folder.mkdir(parents=True, exist_ok=True)
    m = NETWORK_MODELS[n_crust]
    events = ",\n  ".join(f'{{ name = "{n}", x = {x!r}, y = {y!r}, depth = {z!r}, origin_time = {t!r} }}'
                          for n, x, y, z, t in NETWORK_EVENTS)
    stations = ",\n  ".join(f'{{ name = "{n}", x = {x!r}, y = {y!r} }}' for n, x, y in NETWORK_STATIONS)
    (folder / "survey.toml").write_text(f"""\
title = "synthetic local network in an invented region"
units = "km"
seed = {noise_seed}
[model]
thickness = {toml_list(m["thickness"])}
vp = {toml_list(m["vp"])}
vpvs = {toml_list([m["vpvs"]] * len(m["vp"]))}
[survey]
kind = "network"
waves = ["P", "S"]
sigma = {{ P = {toml_number(NETWORK_SIGMA["P"])}, S = {toml_number(NETWORK_SIGMA["S"])} }}
events = [
  {events},
]
stations = [
  {stations},
]
[output]
picks = "picks.csv"
""")
    make_synthetic(folder / "survey.toml")
    if n_crust == 1:
        layer_priors = """\
depth_1 = { dist = "uniform", low = 15.0, high = 50.0 }
vp_1 = { dist = "uniform", low = 5.0, high = 7.2 }
vp_2 = { dist = "uniform", low = 7.3, high = 8.8 }
"""
    else:
        layer_priors = """\
depth_1 = { dist = "uniform", low = 3.0, high = 25.0 }
depth_2 = { dist = "uniform", low = 20.0, high = 50.0 }
vp_1 = { dist = "uniform", low = 4.8, high = 7.0 }
vp_2 = { dist = "uniform", low = 5.5, high = 7.5 }
vp_3 = { dist = "uniform", low = 7.3, high = 8.8 }
"""
    (folder / "run.toml").write_text(f"""\
title = "synthetic local network in an invented region (test)"
units = "km"
[data]
picks = "picks.csv"
sources = "sources.csv"
receivers = "receivers.csv"
[model]
layers = {n_crust}
vpvs_mode = "shared"
depth_parameter = true
[prior]
{layer_priors}vpvs = {{ dist = "uniform", low = 1.5, high = 2.1 }}
[constraints]
increasing_velocity = true
[nuisance]
origin_time = "normal"
origin_time_mean = 3.0
origin_time_sd = 5.0
event_depth = {{ dist = "uniform", low = 0.5, high = 40.0 }}
[sampler]
walkers = {walkers}
ensembles = {ensembles}
steps = {steps}
burn = {burn}
seed = {seed}
checkpoint_every = 100000
[output]
folder = "run"
""")
    return folder / "run.toml"


def test_network_moho_and_velocities_inside_99_percent_intervals(tmp_path):
    folder = tmp_path / "network"
    out = invert_quietly(write_network_case(folder))
    problem = out.problem
    # the tables hide depths and origin times: five depth parameters, origin times marginalised
    assert not np.any(problem.picks.depth_known) and not np.any(problem.picks.origin_time_known)
    assert problem.marginal_origin and problem.pointwise_kind == "event"
    assert [n for n in problem.names if n.startswith("event_depth_")] == [f"event_depth_{e[0]}" for e in NETWORK_EVENTS]
    draws = posterior_draws(out)
    truth = {k: v for k, v in network_truth(1).items() if not k.startswith("event_depth_")}
    assert set(truth) == {"depth_1", "vp_1", "vp_2", "vpvs", "vs_1", "vs_2"}
    bad = misses(draws, truth, 0.99)
    assert not bad, "\n".join(bad)
    # the data do resolve the Moho: its 99 % interval is far narrower than the 35 km prior range
    lo, hi = central_interval(draws["depth_1"], 0.99)
    assert hi - lo < 10.0


@pytest.mark.slow
@pytest.mark.parametrize("n_crust", [1, 2])
def test_network_coverage_over_many_noise_realisations(tmp_path, n_crust):
    truth = network_truth(n_crust)
    names = list(truth)
    inside = {0.9: [], 0.99: []}
    for seed in range(201, 209):
        out = invert_quietly(write_network_case(tmp_path / f"seed{seed}", n_crust=n_crust, noise_seed=seed,
                                                ensembles=2, steps=800, burn=300, seed=seed))
        draws = posterior_draws(out)
        for level in inside:
            inside[level].append([not misses(draws, {n: truth[n]}, level) for n in names])
    alpha = 0.01 / (len(names) * len(inside))
    report = {level: dict(zip(names, np.array(rows).mean(axis=0).round(2))) for level, rows in inside.items()}
    print(f"coverage over 8 noise realisations: {report}")
    for level, rows in inside.items():
        p = coverage_p_values(np.array(rows), level)
        assert p.min() > alpha, f"coverage at {level}: {report[level]} (p = {dict(zip(names, p.round(5)))})"


# ============================================================================ calibration (SBC)
# A small problem: one layer over a half-space, P first arrivals at 20 receivers of a line
# (3-60 m from one surface shot), metres. The prior, stated once here and used both to draw
# the true values (independently of the package) and to build the Problem:
SBC_PRIOR = {"thickness_1": (2.0, 8.0), "vp_1": (300.0, 1200.0), "vp_2": (900.0, 3000.0)}  # uniform bounds
SBC_DISTANCES = np.arange(3.0, 63.0, 3.0)
SBC_SIGMA = 0.002  # s


def sbc_prior_draw(rng: np.random.Generator) -> dict[str, float]:
    """Independent uniforms conditioned on vp_2 > vp_1 (the increasing-velocity constraint), by rejection."""
    while True:
        draw = {name: float(rng.uniform(lo, hi)) for name, (lo, hi) in SBC_PRIOR.items()}
        if draw["vp_2"] > draw["vp_1"]:
            return draw


def sbc_simulate(truth: dict, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """Pick columns simulated from ``truth``: first-arrival times plus N(0, sigma^2) noise."""
    n = SBC_DISTANCES.size
    model = LayerModel.build([truth["thickness_1"]], [truth["vp_1"], truth["vp_2"]],
                             vpvs=[2.0, 2.0])  # S velocities are not used: P picks only
    cols = {"source": np.full(n, "shot"), "receiver": np.array([f"g{i:02d}" for i in range(n)]),
            "wave": np.full(n, "P"), "branch": np.full(n, "first"), "interface": np.zeros(n, dtype=int),
            "distance": SBC_DISTANCES, "source_depth": np.zeros(n), "receiver_depth": np.zeros(n)}
    return synthesize(model, cols, SBC_SIGMA, rng)


def sbc_problem(folder: Path, synth: dict) -> Problem:
    """The Problem that inverts simulated picks (written to and read back from a picks file)."""
    write_picks(folder / "picks.csv", {k: v for k, v in synth.items() if k != "branch" and k != "interface"},
                comment="synthetic calibration data set")
    table = {"prior": {name: {"dist": "uniform", "low": lo, "high": hi} for name, (lo, hi) in SBC_PRIOR.items()},
             "constraints": {"increasing_velocity": True}}
    prior = prior_from_toml_table(table, 2, units="m", vpvs_mode="none")
    return Problem(picks=read_picks(folder / "picks.csv"), layers=LayerSettings(1, vpvs_mode="none"), prior=prior)


def sbc_ranks(folder: Path, replications: int, *, steps: int, walkers: int = 40, draws: int = 39,
              seed: int = 0) -> np.ndarray:
    """Ranks (replications, parameters) of the true values among ``draws`` posterior draws.

    Each replication starts its walkers from prior draws and keeps only their positions
    after the last step (one draw per walker), which after a burn-in of many
    autocorrelation times (about 8 steps here) are close to independent posterior draws.
    """
    rng = np.random.default_rng(seed)
    names = list(SBC_PRIOR)
    ranks = np.empty((replications, len(names)), dtype=int)
    for r in range(replications):
        # a data set with a time <= 0 cannot be written as picks; such (truth, data) pairs are
        # drawn again as a whole. Conditioning on an event of the data alone leaves p(theta | data)
        # unchanged, so the ranks stay uniform; redrawing only the noise would not.
        while True:
            truth = sbc_prior_draw(rng)
            synth = sbc_simulate(truth, rng)
            if np.all(synth["time"] > 0):
                break
        problem = sbc_problem(folder, synth)
        assert problem.names == names
        start = initial_from_prior(problem.sample_prior, 1, walkers, rng, log_prob=problem.log_prob)
        result = run_ensembles(problem.log_prob, start, steps, seed=int(rng.integers(2**31)), progress=False,
                               moves=default_moves())
        final = result.chain[0, -1, :draws]  # (draws, parameters)
        ranks[r] = np.sum(final < np.array([truth[n] for n in names]), axis=0)
    return ranks


def rank_uniformity_p_values(ranks: np.ndarray, draws: int, bins: int) -> np.ndarray:
    """Chi-square p-value per parameter for ranks uniform on {0..draws}, pooled into ``bins`` equal bins."""
    assert (draws + 1) % bins == 0, "bins must split the draws + 1 rank values evenly"
    counts = np.stack([np.bincount(ranks[:, j] // ((draws + 1) // bins), minlength=bins)
                       for j in range(ranks.shape[1])])
    return np.array([stats.chisquare(c).pvalue for c in counts])


SBC_DESIGNS = {"small": (24, 5, 150), "large": (200, 10, 400)}  # replications, rank bins, steps per chain
SBC_DRAWS = 39  # posterior draws per replication: ranks 0..39, 40 values split evenly into the bins
SBC_ALPHA = 0.01  # family-wise, Bonferroni over the three parameters


def simulated_rejection_rate(replications, bins, width, shift, rng, experiments=300):
    """How often the rank check rejects when each posterior is N(mu + shift, width^2) but the truth is
    N(mu, 1) given the data (width 1, shift 0: a correct posterior), by simulation."""
    rejected = 0
    for _ in range(experiments):
        mu = rng.standard_normal(replications)
        truth = mu + rng.standard_normal(replications)
        post = mu[:, None] + shift + width * rng.standard_normal((replications, SBC_DRAWS))
        ranks = np.sum(post < truth[:, None], axis=1)[:, None]
        rejected += rank_uniformity_p_values(ranks, SBC_DRAWS, bins)[0] < SBC_ALPHA / len(SBC_PRIOR)
    return rejected / experiments


def test_rank_check_size_and_power():
    # the rank check itself, on exactly simulated ranks: it rarely rejects correct posteriors,
    # and the large design detects modest over-confidence; the small one only gross errors
    rng = np.random.default_rng(42)
    small, large = SBC_DESIGNS["small"][:2], SBC_DESIGNS["large"][:2]
    assert simulated_rejection_rate(*small, 1.0, 0.0, rng) < 0.02
    assert simulated_rejection_rate(*large, 1.0, 0.0, rng) < 0.02
    assert simulated_rejection_rate(*small, 1.0, 1.0, rng) > 0.6  # posterior off by one sd
    assert simulated_rejection_rate(*large, 0.7, 0.0, rng) > 0.8  # posterior 30 % too narrow
    assert simulated_rejection_rate(*large, 1.0, 0.5, rng) > 0.9  # off by half an sd


def test_simulation_based_calibration_small(tmp_path):
    replications, bins, steps = SBC_DESIGNS["small"]
    ranks = sbc_ranks(tmp_path, replications, steps=steps, draws=SBC_DRAWS, seed=1804)
    p = rank_uniformity_p_values(ranks, SBC_DRAWS, bins)
    print(f"rank uniformity p-values {dict(zip(SBC_PRIOR, p.round(4)))}")
    assert p.min() > SBC_ALPHA / p.size, f"p-values {dict(zip(SBC_PRIOR, p.round(4)))}; ranks {ranks.tolist()}"


@pytest.mark.slow
def test_simulation_based_calibration_large(tmp_path):
    replications, bins, steps = SBC_DESIGNS["large"]
    ranks = sbc_ranks(tmp_path, replications, steps=steps, draws=SBC_DRAWS, seed=2018)
    p = rank_uniformity_p_values(ranks, SBC_DRAWS, bins)
    print(f"rank uniformity p-values {dict(zip(SBC_PRIOR, p.round(4)))}")
    assert p.min() > SBC_ALPHA / p.size, f"p-values {dict(zip(SBC_PRIOR, p.round(4)))}"


# ============================================================================ resume
def write_resume_case(folder: Path, steps: int = 60) -> Path:
    """A small line (one layer over a half-space, P only) with two ensembles and frequent checkpoints."""
    folder.mkdir(parents=True, exist_ok=True)
    truth = {"thickness_1": 5.0, "vp_1": 600.0, "vp_2": 2000.0}
    problem = sbc_problem(folder, sbc_simulate(truth, np.random.default_rng(7)))
    assert problem.picks.n_picks == SBC_DISTANCES.size
    (folder / "run.toml").write_text(f"""\
title = "synthetic line for the resume test"
units = "m"
[data]
picks = "picks.csv"
[model]
layers = 1
vpvs_mode = "none"
[prior]
thickness_1 = {{ dist = "uniform", low = 2.0, high = 8.0 }}
vp_1 = {{ dist = "uniform", low = 300.0, high = 1200.0 }}
vp_2 = {{ dist = "uniform", low = 900.0, high = 3000.0 }}
[constraints]
increasing_velocity = true
[sampler]
walkers = 16
ensembles = 2
steps = {steps}
burn = 20
seed = 99
checkpoint_every = 7
[output]
folder = "run"
""")
    return folder / "run.toml"


class InterruptAfter:
    """log_prob wrapper that raises KeyboardInterrupt (as Ctrl-C would) on call number ``n``."""

    def __init__(self, log_prob, n):
        self.log_prob, self.n, self.calls = log_prob, n, 0

    def __call__(self, theta):
        self.calls += 1
        if self.calls == self.n:
            raise KeyboardInterrupt
        return self.log_prob(theta)


def posterior_group(folder: Path) -> dict[str, np.ndarray]:
    import arviz as az

    idata = az.from_netcdf(folder / "posterior.nc")
    return {name: np.asarray(idata.posterior[name]) for name in idata.posterior.data_vars}


def test_resume_after_interrupt_equals_uninterrupted_run(tmp_path, monkeypatch, capsys):
    reference = invert_quietly(write_resume_case(tmp_path / "whole"))
    config = write_resume_case(tmp_path / "broken")

    # interrupt during the second ensemble: a step calls log_prob twice (two half-ensembles), or
    # four times for the 20 % snooker steps (emcee splits the ensemble in four for that move; from
    # memory), so an ensemble of 60 steps makes about 145 calls; the checks below confirm where
    real = run_module.run_ensembles

    def interrupted_run_ensembles(log_prob, *args, **kwargs):
        return real(InterruptAfter(log_prob, 200), *args, **kwargs)

    monkeypatch.setattr(run_module, "run_ensembles", interrupted_run_ensembles)
    assert cli.main(["run", str(config), "--quiet", "--no-progress"]) == 130
    assert "--resume" in capsys.readouterr().err
    saved = checkpoint_steps(tmp_path / "broken" / "run" / "checkpoint.h5")
    assert saved[0] == 60 and 0 < saved[1] < 60, saved
    assert not (tmp_path / "broken" / "run" / "posterior.nc").exists()

    monkeypatch.setattr(run_module, "run_ensembles", real)
    assert cli.main(["run", str(config), "--resume", "--quiet", "--no-progress"]) == 0
    resumed = invert_quietly(config, resume=True)  # the finished checkpoint: nothing left to sample
    assert resumed.result.chain.shape == reference.result.chain.shape == (2, 60, 16, 3)
    assert np.array_equal(resumed.result.chain, reference.result.chain)
    assert np.array_equal(resumed.result.log_prob, reference.result.log_prob)
    assert np.array_equal(resumed.result.initial, reference.result.initial)
    a, b = posterior_group(tmp_path / "whole" / "run"), posterior_group(tmp_path / "broken" / "run")
    assert a.keys() == b.keys() and all(np.array_equal(a[k], b[k]) for k in a)


def _invert_command() -> list[str]:
    script = Path(sys.executable).with_name("invert")
    return [str(script)] if script.exists() else [sys.executable, "-m", "invert.cli"]


@pytest.mark.slow
def test_resume_after_killed_process_equals_uninterrupted_run(tmp_path):
    steps = 400
    reference = invert_quietly(write_resume_case(tmp_path / "whole", steps=steps))
    config = write_resume_case(tmp_path / "killed", steps=steps)
    checkpoint = tmp_path / "killed" / "run" / "checkpoint.h5"
    proc = subprocess.Popen(_invert_command() + ["run", str(config), "--quiet", "--no-progress"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + 300
        while time.monotonic() < deadline:
            if checkpoint.exists():
                try:
                    if checkpoint_steps(checkpoint)[0] >= 150:
                        break
                except (OSError, ValueError):
                    pass  # being replaced right now
            if proc.poll() is not None:
                pytest.fail(f"the run finished before it could be killed: {proc.stderr.read().decode()}")
            time.sleep(0.05)
        else:
            pytest.fail("no checkpoint progress within 300 s")
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait()
    assert proc.returncode == -signal.SIGKILL
    done = checkpoint_steps(checkpoint)
    assert 0 < done.sum() < 2 * steps
    resumed = subprocess.run(_invert_command() + ["run", str(config), "--resume", "--quiet", "--no-progress"],
                             capture_output=True, text=True, timeout=600)
    assert resumed.returncode == 0, resumed.stderr
    final = invert_quietly(config, resume=True)
    assert np.array_equal(final.result.chain, reference.result.chain)
    assert np.array_equal(final.result.log_prob, reference.result.log_prob)


# ============================================================================ optimum start
BOREHOLE_PRIOR = Path(__file__).resolve().parents[1] / "priors" / "borehole.toml"


def write_borehole_four_layer_case(folder: Path) -> Path:
    """The borehole prior template with 4 layers: almost all of its box breaks the constraints.

    Thickness priors are log-normal (median 15 m) while the interfaces must lie above 100 m
    and P velocities must increase (one exception): 4e-5 of the box of the 1-D marginals was
    valid when measured. Ten synthetic P picks, one straight 500 m/s ray each (invented).
    """
    rows = ["source,receiver,wave,time,sigma,distance,source_depth,receiver_depth"]
    for i, z in enumerate(range(5, 55, 5)):
        rows.append(f"s,r{i},P,{np.hypot(2.0, z) / 500.0:.6f},0.001,2,0,{z}")
    (folder / "picks.csv").write_text("\n".join(rows) + "\n")
    (folder / "run.toml").write_text(f'''title = "borehole template, 4 layers (synthetic)"
prior_file = "{BOREHOLE_PRIOR.as_posix()}"
[data]
picks = "picks.csv"
[model]
layers = 4
[sampler]
walkers = 28
ensembles = 1
steps = 20
burn = 5
seed = 3
''')
    return folder / "run.toml"


def test_optimum_start_survives_a_prior_box_that_is_almost_all_invalid(tmp_path, capsys):
    from invert.problem import build_problem

    config = run_module.load_config(write_borehole_four_layer_case(tmp_path))
    problem = build_problem(config, read_picks(config.picks))
    lo, hi = problem.bounds()
    box = lo + (hi - lo) * np.random.default_rng(0).random((2000, problem.ndim))
    assert np.isfinite(problem.log_prior(box)).mean() < 0.01  # the premise: the box is almost all invalid
    start = run_module.optimum_start(problem, config, np.random.default_rng(1), quiet=False)
    assert start.shape == (1, 28, problem.ndim)
    assert np.all(np.isfinite(problem.log_prob(start[0])))
    assert "starting near log-posterior" in capsys.readouterr().out


def test_optimum_start_falls_back_to_prior_draws_with_a_message(tmp_path, capsys, monkeypatch):
    import scipy.optimize
    from invert.problem import build_problem

    config = run_module.load_config(write_borehole_four_layer_case(tmp_path))
    problem = build_problem(config, read_picks(config.picks))

    class Nothing:  # what differential evolution returns when every candidate was invalid
        fun, x, nit = 1e30, problem.bounds()[0], 1

    monkeypatch.setattr(scipy.optimize, "differential_evolution", lambda *a, **k: Nothing())
    start = run_module.optimum_start(problem, config, np.random.default_rng(1), quiet=False)
    assert np.all(np.isfinite(problem.log_prob(start[0])))
    out = capsys.readouterr().out
    assert "found no valid model" in out and "prior draws" in out
