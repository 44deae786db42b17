"""Sampling efficiency of an inversion, and the cost of one large log-likelihood.

Part 1 -- minimum effective sample size per second of wall time
----------------------------------------------------------------
A synthetic 3-layer refraction case (invented true model, seeded noise; metres
and m/s): two constant-velocity layers over a half-space, P first arrivals
from shots at both ends of a line into 50 receivers (100 picks), Gaussian
pick noise. Five free parameters: thickness_1, thickness_2, vp_1, vp_2, vp_3
(uniform priors, velocity increasing with depth). The picks and the run
description are written to a temporary folder and read back as any run would.

Three log-posteriors with the same prior and the same data are sampled with the
same emcee settings (the project's ``default_moves()``, the same walkers, the
same seed, the same starting points near the optimum found by
``optimum_start``), each through the project's driver ``run_ensembles``:

(i)   ours: ``Problem.log_prob`` on every walker of a move at once;
(ii)  our engine called one walker at a time: ``Problem.log_prob(theta[i:i+1])``
      in a Python loop over the walkers;
(iii) a hand-written forward model in plain Python floats: per walker the
      intercept time and critical distance of every head wave (Telford, Geldart
      & Sheriff, *Applied Geophysics*, 2nd ed., 1990, ch. 4), per pick the
      earliest of the direct wave and the head waves past their critical
      distance, Gaussian log-likelihood summed in Python. Its prior is the same
      uniform box and velocity order; the constant of the normalised prior is
      taken from ``Problem.log_prior`` once.

(ii) and (iii) are checked against (i) on random prior draws before anything
is timed.

Before sampling, the cost of one call on half the walkers (what a
differential-evolution move evaluates) is printed with its parts, and the cost
per step of the sampler alone (trivial log-probability). Each run takes a
fixed number of steps, chosen from a short pilot run so that it lasts about
``--seconds`` (at least ``--min-steps``); the slower baselines therefore run
fewer steps. The first quarter of every run is discarded as burn-in. The minimum over the
parameters of the effective sample size is computed twice -- arviz bulk ESS
with every walker as a chain, and (walkers x kept steps) / tau with emcee's
integrated autocorrelation time -- and divided by the wall time of the whole
run (burn-in included); the same figures per second of this process's CPU
time follow, as they suffer less from other users of a shared machine. ESS per
second is comparable between runs of different lengths only if each run is
long enough for a stable estimate: the table prints the kept length in
autocorrelation times (emcee's rule of thumb asks for more than 50) and flags
shorter runs. With the same seed and start, the three chains coincide step by
step as long as the log-posteriors agree to rounding (checked and printed), so
the ratio of steps per second is printed too: it is the ESS/s ratio without the
noise of estimating ESS from runs of different lengths.

Part 2 -- one log-likelihood of 64 walkers x 100,000 picks
----------------------------------------------------------
Synthetic picks from the same kind of model: 100 sources x 1000 receivers.
Three cases, each timed as ``Problem.log_likelihood`` of 64 prior draws
(best of ``--repeats``; ``--repeats-buried`` for case (b), whose calls take
seconds), with the likelihood part timed alone; for (a) and (c) also the
forward parts (engine, grouping of the picks, Problem.travel_times) and, as
the baseline, ``Problem.log_likelihood`` called one walker at a time:

(a) surface sources and receivers, known origin times (the engine's
    lower-envelope kernel);
(b) sources buried 0-20 m and receivers at depths 0-40 m, known origin times
    (the engine's general per-pick kernel: slower);
(c) surface, origin times unknown and marginalised per event (100 events,
    normal prior).

Peak memory of one call is measured twice: ``tracemalloc`` (what numpy
allocates; arrays allocated inside compiled code are not seen) and the growth
of the resident set size (``resource.getrusage`` ru_maxrss, after resetting the
kernel's high-water mark through /proc/self/clear_refs where Linux allows it).

Timings are best of repeats with the garbage collector off; the machine is
shared, so single figures move by tens of per cent between runs, and only the
ratios measured in one run are meant to be compared. Everything runs on one
thread (set before numba and numpy are imported). The program exits non-zero
only when a correctness check fails, never because of a timing.

Usage::

    .venv/bin/python benchmarks/bench_inversion.py             # both parts, about 2-4 minutes
    .venv/bin/python benchmarks/bench_inversion.py --only sampling --seconds 20
"""

from __future__ import annotations

import os

# One thread for numba and for any threaded numpy backend; set before they are imported.
os.environ["NUMBA_NUM_THREADS"] = "1"
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import gc  # noqa: E402
import math  # noqa: E402
import platform  # noqa: E402
import resource  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
import tracemalloc  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

# ----------------------------------------------------------------------------
# Settings
# ----------------------------------------------------------------------------
TRUE_THICKNESS = [5.0, 12.0]  # m (synthetic true model)
TRUE_VP = [500.0, 1500.0, 3000.0]  # m/s
PRIOR = {  # uniform priors (low, high); velocities must increase with depth
    "thickness_1": (0.5, 20.0),
    "thickness_2": (0.5, 40.0),
    "vp_1": (150.0, 1200.0),
    "vp_2": (300.0, 3000.0),
    "vp_3": (800.0, 6000.0),
}
SIGMA_SMALL = 0.0005  # s, pick uncertainty of the 100-pick case
SEED_DATA = 20250301
SEED_SAMPLER = 17
SEED_CHECK = 20250302
N_CHECK = 200  # random prior draws for the check of (iii) against (i)
TOL_LOGPROB = 1e-9  # |difference| <= TOL * max(1, |log-prob|)
BURN_FRACTION = 0.25
MIN_TAU_MULTIPLE = 50.0  # emcee's rule of thumb for a reliable tau
TARGET_VS_PYTHON = 20.0
CLEAR_GAIN = 2.0  # the target asks for "a clear gain" without a figure; 2x is used here

N_BIG_WALKERS = 64
N_SOURCES_BIG = 100
N_RECEIVERS_BIG = 1000
SIGMA_BIG = 0.0002  # s; small enough that no noisy time at 0.5 m offset falls below zero
SEED_BIG = 20250303
TARGET_LOGLIKE_SECONDS = 0.1
TARGET_LOGLIKE_BYTES = 1e9
N_CHECK_ONE = 4  # walkers checked one at a time against the batched call
N_LOOP_WALKERS = 16  # walkers (evenly spread) of the one-at-a-time baseline in part 2, scaled to all 64


# ----------------------------------------------------------------------------
# Small helpers
# ----------------------------------------------------------------------------
class Timing:
    """Best wall time and best CPU time of this process (seconds), each the minimum over repeats."""

    def __init__(self, wall: float, cpu: float):
        self.wall = wall
        self.cpu = cpu

    def __str__(self) -> str:
        return f"{self.wall:.3f}/{self.cpu:.3f}"


def best_of(fn, repeats: int) -> Timing:
    """Best wall and CPU time of ``repeats`` calls of ``fn`` (garbage collector off)."""
    wall = cpu = math.inf
    gc_was_on = gc.isenabled()
    gc.disable()
    try:
        for _ in range(repeats):
            c0 = time.process_time()
            t0 = time.perf_counter()
            fn()
            wall = min(wall, time.perf_counter() - t0)
            cpu = min(cpu, time.process_time() - c0)
    finally:
        if gc_was_on:
            gc.enable()
    return Timing(wall, cpu)


def _status_kib(key: str) -> int | None:
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith(key + ":"):
                    return int(line.split()[1])
    except OSError:
        return None
    return None


def _reset_peak_rss() -> bool:
    """Reset the kernel's resident-set high-water mark (Linux >= 4.0); False if not allowed."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def peak_memory(fn) -> dict:
    """Peak memory of one call of ``fn``: tracemalloc peak and resident-set growth, in bytes."""
    gc.collect()
    reset = _reset_peak_rss()
    rss_before = _status_kib("VmRSS")
    maxrss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    tracemalloc.start()
    tracemalloc.reset_peak()
    base, _ = tracemalloc.get_traced_memory()
    fn()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    maxrss_after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    if reset and rss_before is not None:
        rss_growth = (maxrss_after - rss_before) * 1024
        how = "ru_maxrss after the call - resident set before it (high-water mark reset first)"
    else:
        rss_growth = (maxrss_after - maxrss_before) * 1024
        how = ("ru_maxrss delta without a reset of the high-water mark: a lower bound (only growth beyond "
               "the earlier peak of the process is seen)")
    return {"tracemalloc": peak - base, "rss": rss_growth, "rss_how": how}


def best_per_call(fn, repeats: int, min_time: float = 0.1) -> Timing:
    """Best wall and CPU seconds per call over ``repeats`` repeats of at least ``min_time`` s each (GC off)."""
    n = 1
    while True:
        t0 = time.perf_counter()
        for _ in range(n):
            fn()
        dt = time.perf_counter() - t0
        if dt >= 0.05 * min_time or n >= 1 << 16:
            break
        n *= 4
    per_repeat = max(1, math.ceil(1.1 * min_time * n / dt))
    wall = cpu = math.inf
    gc_was_on = gc.isenabled()
    gc.disable()
    try:
        for _ in range(repeats):
            c0 = time.process_time()
            t0 = time.perf_counter()
            for _ in range(per_repeat):
                fn()
            wall = min(wall, (time.perf_counter() - t0) / per_repeat)
            cpu = min(cpu, (time.process_time() - c0) / per_repeat)
    finally:
        if gc_was_on:
            gc.enable()
    return Timing(wall, cpu)


def fmt_bytes(n: float) -> str:
    return f"{n / 2**20:.0f} MiB" if n >= 2**20 else f"{n / 1024:.0f} KiB"


def print_table(head, rows, right=()) -> None:
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(head)]
    fmt = "  ".join(f"{{:{'>' if i in right else '<'}{w}}}" for i, w in enumerate(widths))
    print(fmt.format(*head))
    print("  ".join("-" * w for w in widths))
    for r in rows:
        print(fmt.format(*r))


class Checks:
    def __init__(self):
        self.failures = []

    def report(self, label: str, ok: bool, text: str) -> None:
        print(f"  check {label}: {text} ({'ok' if ok else 'FAILED'})")
        if not ok:
            self.failures.append(label)


# ----------------------------------------------------------------------------
# Part 1: the 100-pick case
# ----------------------------------------------------------------------------
SURVEY_SMALL = f"""\
title = "benchmark: 3-layer refraction line (synthetic)"
units = "m"
seed = {SEED_DATA}

[model]                      # invented true model
thickness = {TRUE_THICKNESS}
vp = {TRUE_VP}
vpvs = [2.0, 2.0, 2.0]       # not used: P picks only

[survey]
kind = "line"
shots = [-1.0, 99.0]                                   # a reversed line: one shot beyond each end
receivers = {{ first = 0.0, last = 98.0, spacing = 2.0 }}
waves = ["P"]
sigma = {SIGMA_SMALL}

[output]
picks = "picks.csv"
"""


def run_description(n_walkers: int, extra: str = "") -> str:
    prior = "\n".join(f'{name} = {{ dist = "uniform", low = {lo}, high = {hi} }}'
                      for name, (lo, hi) in PRIOR.items())
    return f"""\
title = "benchmark: 3-layer refraction line (synthetic)"
units = "m"

[data]
picks = "picks.csv"

[model]
layers = 2
vpvs_mode = "none"

[prior]
{prior}

[constraints]
increasing_velocity = true

[sampler]
walkers = {n_walkers}
ensembles = 1
seed = {SEED_SAMPLER}
start = "optimum"

[output]
folder = "run"
{extra}"""


def build_small_problem(folder: Path, n_walkers: int):
    from invert.config import load_config
    from invert.problem import build_problem
    from invert.synthetic import make_synthetic

    (folder / "survey.toml").write_text(SURVEY_SMALL)
    make_synthetic(folder / "survey.toml")
    (folder / "run.toml").write_text(run_description(n_walkers))
    config = load_config(folder / "run.toml")
    return config, build_problem(config)


class PythonLogProb:
    """Log-posterior (iii): plain Python floats, one walker and one pick at a time.

    Forward model of constant layers with surface ends (Telford, Geldart &
    Sheriff 1990, ch. 4): the head wave along interface k exists where V_k+1 is
    faster than every layer above; its intercept time is
    t_k = sum_i 2 h_i cos(theta_i) / v_i and its critical distance
    x_k = sum_i 2 h_i tan(theta_i), with sin(theta_i) = v_i / V_k+1. The first
    arrival at offset x is the earliest of x / v_1 and t_k + x / V_k+1 over the
    head waves with x >= x_k. Likelihood: independent Gaussian pick errors.
    """

    def __init__(self, problem, names, bounds, log_prior_constant):
        picks = problem.picks
        self.offsets = [float(x) for x in picks.distance]
        self.obs = [float(t) for t in picks.travel_time]
        self.sigma = [float(s) for s in picks.sigma]
        self.norm = sum(-math.log(s) - 0.5 * math.log(2.0 * math.pi) for s in self.sigma)
        self.lows = [bounds[n][0] for n in names]
        self.highs = [bounds[n][1] for n in names]
        self.n_layers = (len(names) + 1) // 2  # thicknesses 1..N, vp 1..N+1
        self.constant = log_prior_constant

    def one(self, theta) -> float:
        for x, lo, hi in zip(theta, self.lows, self.highs):
            if not lo <= x <= hi:
                return -math.inf
        n = self.n_layers
        h = theta[:n - 1]
        v = theta[n - 1:]
        for k in range(n - 1):
            if v[k + 1] < v[k]:  # velocity must not decrease with depth
                return -math.inf
        lines = []  # (intercept, slowness, critical distance) of each head wave
        vmax = v[0]
        for k in range(n - 1):
            vk = v[k + 1]
            if vk > vmax:
                t_k = 0.0
                x_k = 0.0
                for i in range(k + 1):
                    s = v[i] / vk  # sin of the critical angle in layer i
                    c = math.sqrt((1.0 - s) * (1.0 + s))
                    t_k += 2.0 * h[i] * c / v[i]
                    x_k += 2.0 * h[i] * s / c
                lines.append((t_k, 1.0 / vk, x_k))
            vmax = max(vmax, vk)
        v1 = v[0]
        misfit = 0.0
        for x, t_obs, sig in zip(self.offsets, self.obs, self.sigma):
            best = x / v1
            for t_k, slow, x_k in lines:
                if x >= x_k:
                    t = t_k + slow * x
                    if t < best:
                        best = t
            r = (t_obs - best) / sig
            misfit += r * r
        return self.constant + self.norm - 0.5 * misfit

    def __call__(self, theta) -> np.ndarray:
        return np.array([self.one(row) for row in np.asarray(theta, dtype=float).tolist()])


def per_walker(problem):
    """Log-posterior (ii): our Problem.log_prob called once per walker."""

    def log_prob(theta):
        return np.concatenate([problem.log_prob(theta[i:i + 1]) for i in range(theta.shape[0])])

    return log_prob


def check_python_against_ours(problem, python_lp, checks: Checks) -> None:
    rng = np.random.default_rng(SEED_CHECK)
    theta = problem.sample_prior(N_CHECK, rng)
    ours = problem.log_prob(theta)
    theirs = python_lp(theta)
    both = np.isfinite(ours) & np.isfinite(theirs)
    diff = np.abs(ours[both] - theirs[both])
    rel = diff / np.maximum(1.0, np.abs(ours[both]))
    mism = int(np.count_nonzero(np.isfinite(ours) != np.isfinite(theirs)))
    ok = bool(both.any()) and float(rel.max()) <= TOL_LOGPROB and mism == 0
    checks.report("(iii) hand-written Python vs (i) ours", ok,
                  f"{N_CHECK} prior draws, log-prob from {ours[both].min():.4g} to {ours[both].max():.4g}; "
                  f"max |difference| = {diff.max():.3g} (relative {rel.max():.3g}, required <= {TOL_LOGPROB:g} "
                  f"x max(1, |log-prob|)); finite in one only: {mism}")
    # near the true model too, where the sampler spends its time
    truth = np.array(TRUE_THICKNESS + TRUE_VP)
    near = truth * (1.0 + 0.01 * rng.standard_normal((N_CHECK, truth.size)))
    ours = problem.log_prob(near)
    theirs = python_lp(near)
    both = np.isfinite(ours) & np.isfinite(theirs)
    diff = np.abs(ours[both] - theirs[both])
    mism = int(np.count_nonzero(np.isfinite(ours) != np.isfinite(theirs)))
    ok = bool(both.any()) and float(diff.max()) <= TOL_LOGPROB * max(1.0, float(np.abs(ours[both]).max())) \
        and mism == 0
    checks.report("(iii) vs (i) within 1% of the true model", ok,
                  f"{N_CHECK} points, max |difference| = {diff.max():.3g}; finite in one only: {mism}")


def run_chain(log_prob, initial, n_steps, names):
    from invert.run import default_moves
    from invert.sample import run_ensembles

    gc_was_on = gc.isenabled()
    gc.disable()
    try:
        t0 = time.perf_counter()
        c0 = time.process_time()
        result = run_ensembles(log_prob, initial[None], n_steps, seed=SEED_SAMPLER, progress=False,
                               parameter_names=names, moves=default_moves())
        cpu = time.process_time() - c0
        seconds = time.perf_counter() - t0
    finally:
        if gc_was_on:
            gc.enable()
    return result, seconds, cpu


def ess_figures(result) -> dict:
    """Minimum ESS over parameters: arviz bulk (walkers as chains) and from emcee's tau."""
    import arviz as az
    from emcee.autocorr import integrated_time

    n_steps = result.n_steps
    burn = int(BURN_FRACTION * n_steps)
    kept = result.chain[0, burn:]  # (steps, walkers, D)
    draws = kept.transpose(1, 0, 2)  # (walkers as chains, draws, D)
    ds = az.convert_to_dataset({"theta": draws}, dims={"theta": ["parameter"]})
    ess_bulk = np.asarray(az.ess(ds, method="bulk")["theta"].values, dtype=float)
    with np.errstate(all="ignore"):
        tau = integrated_time(kept, c=5, tol=0)  # per-walker autocorrelations averaged
    ess_tau = kept.shape[0] * kept.shape[1] / tau
    return {"burn": burn, "kept": kept.shape[0], "ess_bulk": ess_bulk, "tau": tau, "ess_tau": ess_tau,
            "acceptance": float(result.accepted[0, burn:].mean())}


def first_divergence(a, b, tol=1e-9) -> int | None:
    """First step at which two chains (steps, walkers, D) differ by more than ``tol`` (relative), or None."""
    n = min(a.shape[0], b.shape[0])
    scale = np.maximum(np.abs(a[:n]), 1e-300)
    bad = np.any(np.abs(a[:n] - b[:n]) > tol * scale, axis=(1, 2))
    return int(np.argmax(bad)) if bad.any() else None


def call_costs(problem, python_lp, initial, repeats: int) -> dict:
    """Seconds per log-posterior call on half the walkers (what one DE move evaluates), and its parts."""
    from invert import likelihood as lk
    from invert.forward import predict, travel_times

    theta = initial[: initial.shape[0] // 2]
    picks = problem.picks
    one = per_walker(problem)
    model, _ = problem.models(theta)
    x, zs, zr = problem.geometry(theta)
    pred, _ = problem.travel_times(theta)
    obs = np.asarray(problem.picks.travel_time, dtype=float)
    sigma = np.asarray(problem.picks.sigma, dtype=float)
    parts = {
        "(i) Problem.log_prob": lambda: problem.log_prob(theta),
        "    log_prior": lambda: problem.log_prior(theta),
        "    models (parameters -> LayerModel)": lambda: problem.models(theta),
        "    travel_times (Problem: models + predict)": lambda: problem.travel_times(theta),
        "      predict (grouping picks + engine)": lambda: predict(model, picks.wave, picks.branch,
                                                                   picks.interface, x, zs, zr),
        "      engine travel_times alone": lambda: travel_times(model, "P", x, zs, zr),
        "    likelihood alone (gaussian + sum)": lambda: lk.gaussian(pred, obs, sigma).sum(axis=1),
        "(ii) loop of Problem.log_prob, 1 walker each": lambda: one(theta),
        "(iii) hand-written Python": lambda: python_lp(theta),
    }
    return {k: best_per_call(fn, repeats) for k, fn in parts.items()}, theta.shape[0]


def part_sampling(args, checks: Checks) -> None:
    from invert.run import optimum_start

    print(f"\nPart 1: minimum ESS per second, 3-layer refraction line (synthetic; true thickness "
          f"{TRUE_THICKNESS} m, vp {TRUE_VP} m/s; data seed {SEED_DATA})")
    with tempfile.TemporaryDirectory(prefix="bench_inversion_") as tmp:
        config, problem = build_small_problem(Path(tmp), args.walkers)
    picks = problem.picks
    print(f"  {picks.n_picks} P first-arrival picks, {picks.n_sources} shots, {picks.n_receivers} receivers, "
          f"offsets {picks.distance.min():g}-{picks.distance.max():g} m, sigma {SIGMA_SMALL * 1e3:g} ms; "
          f"free parameters: {', '.join(problem.names)}")
    truth = np.array(TRUE_THICKNESS + TRUE_VP)
    log_prior_inside = float(problem.log_prior(truth)[0])  # the same everywhere inside the support
    log_p_order = sum(-math.log(hi - lo) for lo, hi in PRIOR.values()) - log_prior_inside
    python_lp = PythonLogProb(problem, problem.names, PRIOR, log_prior_inside)
    print(f"  prior: uniform box, velocity increasing with depth; log probability of that order under the box "
          f"{log_p_order:.4f} (normalising constant, from Problem.log_prior; used by (iii))")
    check_python_against_ours(problem, python_lp, checks)
    theta = problem.sample_prior(N_CHECK, np.random.default_rng(SEED_CHECK))
    a, b = problem.log_prob(theta), per_walker(problem)(theta)
    same = bool(np.array_equal(a, b))
    both = np.isfinite(a) & np.isfinite(b)
    checks.report("(ii) one walker at a time vs (i) all at once", same,
                  f"{N_CHECK} prior draws, identical: {same} (max |difference| "
                  f"{float(np.max(np.abs(a[both] - b[both]))) if both.any() else 0.0:.3g})")

    t0 = time.perf_counter()
    problem.log_prob(truth[None])  # compile / load the engine
    print(f"  first call of Problem.log_prob: {time.perf_counter() - t0:.2f} s (engine compiled or loaded)")
    rng = np.random.default_rng(SEED_SAMPLER)
    t0 = time.perf_counter()
    initial = optimum_start(problem, config, rng)[0]
    lp0 = problem.log_prob(initial)
    print(f"  starting points: {args.walkers} walkers around the optimum found by optimum_start "
          f"({time.perf_counter() - t0:.1f} s); log-posterior {lp0.min():.2f} to {lp0.max():.2f}")

    costs, n_half = call_costs(problem, python_lp, initial, args.repeats)
    print(f"  cost of one log-posterior call on {n_half} walkers (a DE move evaluates half the ensemble; "
          f"2 calls per step), best of {args.repeats} repeats of >= 0.1 s; wall / CPU:")
    for k, v in costs.items():
        print(f"    {k:<46} {v.wall * 1e6:9.1f} / {v.cpu * 1e6:9.1f} us")
    # what the sampler itself costs per step: the driver and emcee with a trivial log-probability
    trivial_steps = 200
    best = best_cpu = math.inf
    for _ in range(3):
        _, sec, cpu = run_chain(lambda th: -0.5 * np.sum(((th - initial.mean(axis=0)) / initial.std(axis=0)) ** 2,
                                                         axis=1), initial, trivial_steps, problem.names)
        best = min(best, sec)
        best_cpu = min(best_cpu, cpu)
    label = "sampler alone, per step (trivial log-prob)"
    print(f"    {label:<46} {best / trivial_steps * 1e6:9.1f} / {best_cpu / trivial_steps * 1e6:9.1f} us "
          f"(run_ensembles + emcee; best of 3 runs of {trivial_steps} steps)")
    sampler_step = Timing(best / trivial_steps, best_cpu / trivial_steps)

    methods = [
        ("(i) ours: Problem.log_prob, all walkers at once", problem.log_prob, args.pilot_fast),
        ("(ii) our engine, one walker at a time", per_walker(problem), args.pilot_slow),
        ("(iii) hand-written Python, per walker and pick", python_lp, args.pilot_slow),
    ]
    runs = []
    for label, fn, pilot in methods:
        _, sec, _ = run_chain(fn, initial, pilot, problem.names)
        per_step = sec / pilot
        steps = int(min(args.max_steps, max(args.min_steps, round(args.seconds / per_step))))
        print(f"  {label}: pilot {pilot} steps, {per_step * 1e3:.3f} ms/step -> {steps} steps", flush=True)
        result, seconds, cpu = run_chain(fn, initial, steps, problem.names)
        figs = ess_figures(result)
        runs.append({"label": label, "steps": steps, "wall": seconds, "cpu": cpu, "result": result, **figs})
        print(f"    {seconds:.1f} s wall, {cpu:.1f} s CPU; acceptance {figs['acceptance']:.2f}; tau (steps) "
              + ", ".join(f"{n} {t:.1f}" for n, t in zip(problem.names, figs["tau"]))
              + "; bulk ESS " + ", ".join(f"{e:.0f}" for e in figs["ess_bulk"]), flush=True)

    # same seed, same moves, same start: the chains should agree step by step
    ref = runs[0]["result"].chain[0]
    for run in runs[1:]:
        d = first_divergence(ref, run["result"].chain[0])
        n = min(ref.shape[0], run["steps"])
        tag = run["label"].split(" ")[0]
        if d is None:
            print(f"  the chain of {tag} equals that of (i) (to 1e-9 relative) over all {n} common steps")
        else:
            print(f"  the chain of {tag} equals that of (i) (to 1e-9 relative) up to step {d} of {n} common "
                  "steps, then departs (a rounding difference flipped an acceptance)")

    for run in runs:
        run["bulk"] = float(run["ess_bulk"].min())
        run["etau"] = float(run["ess_tau"].min())
    ours = runs[0]
    short_names = ["(i) ours, batched", "(ii) engine, 1 walker/call", "(iii) hand-written Python"]
    for clock, title in (("wall", "wall time (the figure asked for)"),
                         ("cpu", "CPU time of this process (less sensitive to other users of the machine)")):
        rows = []
        for k, run in enumerate(runs):
            sec = run[clock]
            rb = (ours["bulk"] / ours[clock]) / (run["bulk"] / sec)
            rt = (ours["etau"] / ours[clock]) / (run["etau"] / sec)
            mult = run["kept"] / run["tau"].max()
            if k == 0:
                target = ""
            elif k == 1:
                target = (f"clear gain (>= {CLEAR_GAIN:g}x taken): "
                          f"{'met' if min(rb, rt) >= CLEAR_GAIN else 'NOT met'}")
            else:
                target = f">= {TARGET_VS_PYTHON:g}x: {'met' if min(rb, rt) >= TARGET_VS_PYTHON else 'NOT met'}"
            rs = (ours["steps"] / ours[clock]) / (run["steps"] / sec)
            rows.append((short_names[k], str(run["steps"]), f"{sec:.1f}", f"{run['steps'] / sec:.0f}", f"{rs:.2f}",
                         f"{mult:.0f}{'' if mult > MIN_TAU_MULTIPLE else ' (short)'}",
                         f"{run['bulk']:.0f}", f"{run['bulk'] / sec:.1f}", f"{rb:.2f}",
                         f"{run['etau']:.0f}", f"{run['etau'] / sec:.1f}", f"{rt:.2f}", target))
        print(f"\n  Minimum ESS per second of {title}")
        print_table(("method", "steps", "seconds", "steps/s", "ours/x", "kept/tau", "min ESS bulk", "ESS/s",
                     "ours/x", "min ESS tau", "ESS/s", "ours/x", "target (both ESS ratios)"), rows,
                    right=range(1, 12))
    python_run = runs[2]
    print(f"\n  Bound from the sampler's own cost: even a free log-posterior would make (i) at most "
          f"{python_run['wall'] / python_run['steps'] / sampler_step.wall:.1f}x (wall) / "
          f"{python_run['cpu'] / python_run['steps'] / sampler_step.cpu:.1f}x (CPU) faster per step than (iii) "
          "here (step time of (iii) / step time of the sampler alone).")
    print(f"\n  {args.walkers} walkers, moves = default_moves() (DE 0.8 + DE snooker 0.2), seed {SEED_SAMPLER}, "
          f"the same starting points; burn-in {BURN_FRACTION:.0%} of each run; seconds = the whole run "
          "(burn-in included).")
    print("  ESS bulk: arviz (rank-normalised bulk ESS), every walker a chain; ESS tau: walkers x kept steps / "
          "emcee integrated_time (c=5, per-walker autocorrelations averaged); both the minimum over the "
          f"{len(problem.names)} parameters. ours/x = ESS/s (or steps/s) of (i) / that of the method.")
    print(f"  kept/tau: kept steps / largest tau; below {MIN_TAU_MULTIPLE:g} ('short') tau and ESS are less "
          "reliable (emcee's rule of thumb). One run per method, no repeats: the ESS estimates carry sampling "
          "noise besides the timing noise of a shared machine. Where the chains coincide step by step (printed "
          "above), the ESS/s ratios differ from the steps/s ratio only by that estimation noise.")


# ----------------------------------------------------------------------------
# Part 2: one log-likelihood of 64 walkers x 100,000 picks
# ----------------------------------------------------------------------------
def big_layout(rng, buried: bool):
    """Synthetic geometry: 100 sources x 1000 receivers on a line (metres)."""
    rx = np.arange(N_RECEIVERS_BIG, dtype=float)  # receivers every 1 m
    sx = 10.0 * np.arange(N_SOURCES_BIG) + 5.5  # sources between receivers: offsets >= 0.5 m
    if buried:
        sz = np.round(rng.uniform(0.0, 20.0, N_SOURCES_BIG), 3)
        rz = 2.0 * rng.integers(0, 21, N_RECEIVERS_BIG)  # levels 0, 2, ..., 40 m
    else:
        sz = np.zeros(N_SOURCES_BIG)
        rz = np.zeros(N_RECEIVERS_BIG)
    si = np.repeat(np.arange(N_SOURCES_BIG), N_RECEIVERS_BIG)
    ri = np.tile(np.arange(N_RECEIVERS_BIG), N_SOURCES_BIG)
    return sx, sz, rx, rz, si, ri


def write_big_case(folder: Path, kind: str, rng) -> Path:
    """Write picks (+ tables) and a run description for case ``kind``; returns the run description path."""
    from invert.model import LayerModel
    from invert.synthetic import synthesize

    buried = kind == "buried"
    sx, sz, rx, rz, si, ri = big_layout(rng, buried)
    n = si.size
    cols = {"wave": np.full(n, "P"), "branch": np.full(n, "first"), "interface": np.zeros(n, int),
            "distance": np.abs(rx[ri] - sx[si]), "source_depth": sz[si], "receiver_depth": rz[ri]}
    model = LayerModel.build(TRUE_THICKNESS, TRUE_VP, vpvs=2.0)
    synth = synthesize(model, cols, SIGMA_BIG, rng)
    t = synth["time"]
    src = np.array([f"s{i:03d}" for i in range(N_SOURCES_BIG)])
    rec = np.array([f"r{j:04d}" for j in range(N_RECEIVERS_BIG)])
    extra = ""
    if kind == "marginal":
        origin = rng.uniform(0.0, 100.0, N_SOURCES_BIG)  # hidden: the run must marginalise them
        t = t + origin[si]
        lines = ["# synthetic picks (benchmark); origin times hidden", "source,receiver,wave,time,sigma"]
        lines += [f"{src[a]},{rec[b]},P,{tt!r},{SIGMA_BIG!r}" for a, b, tt in zip(si.tolist(), ri.tolist(),
                                                                                   t.tolist())]
        (folder / "picks.csv").write_text("\n".join(lines) + "\n")
        (folder / "sources.csv").write_text("source,x,y,depth,origin_time\n" + "".join(
            f"{src[a]},{x!r},0.0,0.0,\n" for a, x in enumerate(sx.tolist())))
        (folder / "receivers.csv").write_text("receiver,x,y,depth\n" + "".join(
            f"{rec[b]},{x!r},0.0,0.0\n" for b, x in enumerate(rx.tolist())))
        extra = "\n[nuisance]\norigin_time = \"normal\"\norigin_time_sd = 1.0\n"
    else:
        lines = ["# synthetic picks (benchmark)", "source,receiver,wave,time,sigma,distance,source_depth,"
                 "receiver_depth"]
        lines += [f"{src[a]},{rec[b]},P,{tt!r},{SIGMA_BIG!r},{d!r},{zs!r},{zr!r}"
                  for a, b, tt, d, zs, zr in zip(si.tolist(), ri.tolist(), t.tolist(), cols["distance"].tolist(),
                                                 cols["source_depth"].tolist(), cols["receiver_depth"].tolist())]
        (folder / "picks.csv").write_text("\n".join(lines) + "\n")
    text = run_description(N_BIG_WALKERS, extra)
    if kind == "marginal":
        text = text.replace('picks = "picks.csv"', 'picks = "picks.csv"\nsources = "sources.csv"\n'
                                                   'receivers = "receivers.csv"')
    (folder / "run.toml").write_text(text)
    return folder / "run.toml"


def part_loglike(args, checks: Checks) -> None:
    from invert import likelihood as lk
    from invert.config import load_config
    from invert.forward import predict, travel_times
    from invert.problem import build_problem

    n_picks = N_SOURCES_BIG * N_RECEIVERS_BIG
    print(f"\nPart 2: one log-likelihood, {N_BIG_WALKERS} walkers x {n_picks:,} picks "
          f"({N_SOURCES_BIG} sources x {N_RECEIVERS_BIG} receivers, synthetic, seed {SEED_BIG})")
    cases = [("surface", "(a) surface, known origins", args.repeats, True),
             ("buried", "(b) sources 0-20 m, receivers 0-40 m deep, known origins", args.repeats_buried, False),
             ("marginal", f"(c) surface, origin times marginalised ({N_SOURCES_BIG} events, normal prior)",
              args.repeats, True)]
    rows = []
    rss_note = None
    for kind, label, repeats, loop in cases:
        rng = np.random.default_rng(SEED_BIG)
        with tempfile.TemporaryDirectory(prefix="bench_inversion_") as tmp:
            t0 = time.perf_counter()
            run_path = write_big_case(Path(tmp), kind, rng)
            t_write = time.perf_counter() - t0
            t0 = time.perf_counter()
            config = load_config(run_path)
            problem = build_problem(config)
            t_read = time.perf_counter() - t0
        picks = problem.picks
        theta = problem.sample_prior(N_BIG_WALKERS, np.random.default_rng(SEED_BIG + 1))
        print(f"\n  {label}: wrote the files in {t_write:.1f} s, read them and built the problem in "
              f"{t_read:.1f} s; {picks.n_picks:,} picks, pointwise kind '{problem.pointwise_kind}'")
        t0 = time.perf_counter()
        one = [problem.log_likelihood(theta[:1])]
        first = time.perf_counter() - t0
        print(f"    first call, one walker: {first:.2f} s (includes compiling or loading the engine path)",
              flush=True)
        n_one = N_CHECK_ONE
        one = np.concatenate(one + [problem.log_likelihood(theta[i:i + 1]) for i in range(1, n_one)])
        result = {}

        def full():
            result["ll"] = problem.log_likelihood(theta)

        t_full = best_of(full, repeats)
        ll = result["ll"]
        checks.report(f"{kind}: log-likelihood finite for all {N_BIG_WALKERS} prior draws",
                      bool(np.all(np.isfinite(ll))), f"from {ll.min():.4g} to {ll.max():.4g}")
        diff = float(np.max(np.abs(one - ll[:n_one]) / np.maximum(1.0, np.abs(ll[:n_one]))))
        checks.report(f"{kind}: one walker at a time vs all at once ({n_one} walkers)", diff <= 1e-12,
                      f"max relative difference {diff:.3g} (required <= 1e-12)")
        # the parts: forward (Problem.travel_times; the engine's travel_times alone) and likelihood alone
        pred, _ = problem.travel_times(theta)
        model, _ = problem.models(theta)
        x, zs, zr = problem.geometry(theta)
        obs = np.asarray(picks.time if problem.marginal_origin else picks.travel_time, dtype=float)
        sigma = np.asarray(picks.sigma, dtype=float)
        if problem.marginal_origin:
            def like():
                return lk.marginal_origin_gaussian(pred, obs, sigma, picks.source_index,
                                                   problem.origin_prior).sum(axis=1)
        else:
            def like():
                return lk.gaussian(pred, obs, sigma).sum(axis=1)
        diff = float(np.max(np.abs(like() - ll) / np.maximum(1.0, np.abs(ll))))
        checks.report(f"{kind}: likelihood part alone vs Problem.log_likelihood", diff <= 1e-12,
                      f"max relative difference {diff:.3g} (required <= 1e-12)")

        t_like = best_of(like, repeats)
        t_engine = best_of(lambda: travel_times(model, "P", x, zs, zr), repeats) if loop else None
        one_model = model.take([0])
        t_engine_one = best_of(lambda: travel_times(one_model, "P", x, zs, zr), repeats) if loop else None
        t_predict = best_of(lambda: predict(model, picks.wave, picks.branch, picks.interface, x, zs, zr),
                            repeats) if loop else None
        t_tt = best_of(lambda: problem.travel_times(theta), repeats) if loop else None
        t_one = None
        if loop:
            sub = np.linspace(0, N_BIG_WALKERS - 1, N_LOOP_WALKERS).round().astype(int)
            t_sub = best_of(lambda: [problem.log_likelihood(theta[i:i + 1]) for i in sub], args.repeats_loop)
            scale = N_BIG_WALKERS / N_LOOP_WALKERS
            t_one = Timing(t_sub.wall * scale, t_sub.cpu * scale)
        del pred, model, one_model, x, zs, zr, result
        mem = peak_memory(lambda: problem.log_likelihood(theta))
        rss_note = mem["rss_how"]
        rate = N_BIG_WALKERS * n_picks / t_full.wall
        rate_cpu = N_BIG_WALKERS * n_picks / t_full.cpu
        text = (f"    seconds wall/CPU, best of {repeats}: Problem.log_likelihood {t_full} ({rate:.3g} / "
                f"{rate_cpu:.3g} pick-evaluations per wall / CPU second); likelihood alone {t_like}")
        if loop:
            text += (f"; engine travel_times alone {t_engine}; predict (grouping the picks by wave, branch and "
                     f"interface + engine) {t_predict}; Problem.travel_times {t_tt}; one walker at a time (best of "
                     f"{args.repeats_loop}; timed on {N_LOOP_WALKERS} walkers, scaled to {N_BIG_WALKERS}) {t_one} = "
                     f"{t_one.wall / t_full.wall:.2f}x (wall) "
                     f"{t_one.cpu / t_full.cpu:.2f}x (CPU) the batched call, i.e. "
                     f"{t_one.wall / N_BIG_WALKERS:.4f}/{t_one.cpu / N_BIG_WALKERS:.4f} s per one-walker call, "
                     f"of which the engine on one model takes {t_engine_one}")
        print(text)
        print(f"    peak memory of one call: tracemalloc {fmt_bytes(mem['tracemalloc'])}, "
              f"resident-set growth {fmt_bytes(mem['rss'])}", flush=True)
        peak = max(mem["tracemalloc"], mem["rss"])
        met_t = ("met" if t_full.wall <= TARGET_LOGLIKE_SECONDS else "NOT met") + " (wall), " + \
            ("met" if t_full.cpu <= TARGET_LOGLIKE_SECONDS else "NOT met") + " (CPU)"
        met_m = peak <= TARGET_LOGLIKE_BYTES
        rows.append((label.split(":")[0].split(",")[0] if kind != "buried" else "(b) buried",
                     str(repeats), str(t_full), "-" if t_engine is None else str(t_engine),
                     "-" if t_predict is None else str(t_predict),
                     "-" if t_tt is None else str(t_tt), str(t_like),
                     "-" if t_one is None else f"{t_one.wall / t_full.wall:.1f}/{t_one.cpu / t_full.cpu:.1f}",
                     fmt_bytes(mem["tracemalloc"]), fmt_bytes(mem["rss"]),
                     f"<= {TARGET_LOGLIKE_SECONDS:g} s: {met_t}; <= 1 GB: {'met' if met_m else 'NOT met'}"))
        del problem, theta, ll
        gc.collect()
    print(f"\n  {N_BIG_WALKERS} walkers (prior draws) x {n_picks:,} picks; times are wall/CPU seconds, each the "
          "best of 'best of' calls; engine = "
          "invert.forward.travel_times on the same models and geometry; predict = "
          "invert.forward.predict (groups the picks by wave, branch and interface, then calls the engine); "
          "travel_times = Problem.travel_times (parameters -> models -> predict); likelihood = the "
          "invert.likelihood function Problem uses, on precomputed times; loop/ours = Problem.log_likelihood "
          f"one walker at a time (timed on {N_LOOP_WALKERS} evenly spread walkers, scaled to {N_BIG_WALKERS}) / "
          "all at once ('-': not measured, to keep the run short)")
    print_table(("case", "best of", "log_likelihood", "engine", "predict", "travel_times",
                 "likelihood", "loop/ours", "tracemalloc", "RSS growth", "targets"), rows, right=range(1, 10))
    print(f"  tracemalloc counts numpy's allocations only (the engine's compiled kernels allocate their "
          f"outputs outside it); RSS growth: {rss_note}.")


# ----------------------------------------------------------------------------
def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seconds", type=float, default=10.0,
                        help="target wall time of each sampling run (default 10)")
    parser.add_argument("--walkers", type=int, default=32, help="walkers of every sampling run (default 32)")
    parser.add_argument("--min-steps", type=int, default=300, help="fewest steps of a sampling run (default 300)")
    parser.add_argument("--max-steps", type=int, default=40000, help="most steps of a sampling run")
    parser.add_argument("--pilot-fast", type=int, default=200, help="pilot steps of (i) (default 200)")
    parser.add_argument("--pilot-slow", type=int, default=20, help="pilot steps of (ii), (iii) (default 20)")
    parser.add_argument("--repeats", type=int, default=5, help="repeats of every timing of single calls (default 5)")
    parser.add_argument("--repeats-buried", type=int, default=3,
                        help="repeats for the buried case, whose calls take seconds (default 3)")
    parser.add_argument("--repeats-loop", type=int, default=1,
                        help="repeats of the one-walker-at-a-time loop in part 2 (default 1)")
    parser.add_argument("--only", choices=("sampling", "likelihood"), help="run one part only")
    args = parser.parse_args(argv)

    import arviz
    import emcee
    import numba

    print(__doc__.split("\n")[0])
    load = os.getloadavg() if hasattr(os, "getloadavg") else ("?",) * 3
    print(f"python {platform.python_version()}, numpy {np.__version__}, numba {numba.__version__}, "
          f"emcee {emcee.__version__}, arviz {arviz.__version__}; {os.cpu_count()} CPUs, load average "
          f"{', '.join(f'{v:.2f}' for v in load)} (shared machine: timings are noisy; best of repeats where "
          "repeated; compare ratios)")
    t0 = time.perf_counter()
    checks = Checks()
    if args.only in (None, "sampling"):
        part_sampling(args, checks)
    if args.only in (None, "likelihood"):
        part_loglike(args, checks)
    print(f"\nTotal {time.perf_counter() - t0:.0f} s.")
    if checks.failures:
        print(f"FAILED checks: {', '.join(checks.failures)}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
