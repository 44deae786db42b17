"""Cost of a log-evidence with an error of 0.1 nats, by both estimators.

Case (synthetic): a refraction line at an invented site, two constant-velocity layers
over a half-space (thickness 4 and 10 m; Vp 500, 1500, 3000 m/s), P first arrivals from
shots 1 m beyond both ends of a 60 m spread into receivers every 2.5 m (50 picks),
Gaussian pick noise of 1 ms, seed 5. Five free parameters (thickness_1, thickness_2,
vp_1..3) with uniform priors and velocity increasing with depth. The picks and the run
description are written to a temporary folder and read back as any run would.

What is printed:

1. The cost of one call of the log-likelihood with 1 row and with 40 rows (best of
   several repeats): the reason nested sampling batches its proposals.
2. Pilot runs of each estimator at modest settings, with two seeds each: stated error,
   the difference between the two seeds (which should be of the size of the stated
   errors), likelihood rows evaluated and wall time.
3. The settings and cost to reach a stated error of 0.1 nats, extrapolated from the
   pilots: both estimators' errors fall as 1 / sqrt(work) (nested sampling:
   sqrt(H / live points), Skilling 2006; stepping-stone: Monte Carlo averages over the
   kept steps), so work and time scale with (error / 0.1)^2. "rows" counts parameter
   vectors evaluated, "calls" the batched log-likelihood calls that carried them (one call
   costs about the same for 1 row as for 40). The extrapolation assumes the error falls as
   1 / sqrt(work) from the pilot size. For the stepping-stone method it need not: on
   longer rungs the autocorrelation times come out longer and a remaining drift is added to
   the stated error (docs/evidence.md, "Cost"); ``--full`` measures.
4. With ``--full``: one run at the extrapolated settings, measured (several minutes).

Timings on a shared machine move by tens of per cent between runs; the load average is
printed. Nothing here asserts a time.
"""

from __future__ import annotations

import os

os.environ.setdefault("NUMBA_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import argparse  # noqa: E402
import gc  # noqa: E402
import math  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from invert import evidence as ev  # noqa: E402
from invert.config import load_config  # noqa: E402
from invert.problem import build_problem  # noqa: E402
from invert.synthetic import make_synthetic  # noqa: E402

SURVEY = """\
title = "synthetic refraction line at an invented site (benchmark)"
units = "m"
seed = 5
[model]
thickness = [4.0, 10.0]
vp = [500.0, 1500.0, 3000.0]
vpvs = [2.0, 2.0, 2.0]
[survey]
kind = "line"
shots = [-1.0, 61.0]
receivers = { first = 0.0, last = 60.0, spacing = 2.5 }
waves = ["P"]
sigma = 0.001
[output]
picks = "picks.csv"
"""

RUN = """\
title = "synthetic line, two layers over a half-space (benchmark)"
units = "m"
[data]
picks = "picks.csv"
[model]
layers = 2
vpvs_mode = "none"
[prior]
thickness = { dist = "uniform", low = 0.5, high = 30.0 }
vp = { dist = "uniform", low = 150.0, high = 6000.0 }
[constraints]
increasing_velocity = true
[output]
folder = "run"
"""

TARGET = 0.1


def best_time(fn, repeats: int, min_time: float = 0.2) -> float:
    """Best time per call over ``repeats`` rounds of at least ``min_time`` seconds each."""
    best = math.inf
    gc.disable()
    try:
        for _ in range(repeats):
            n, t0 = 0, time.perf_counter()
            while True:
                fn()
                n += 1
                elapsed = time.perf_counter() - t0
                if elapsed >= min_time:
                    break
            best = min(best, elapsed / n)
    finally:
        gc.enable()
    return best


def run_nested(problem, live_points, seed):
    return ev.nested_sampling(problem.log_likelihood, problem.from_unit_cube, problem.ndim, live_points=live_points,
                              sample="rwalk", seed=seed, progress=False)


def run_stepping(problem, rungs, steps, seed):
    return ev.stepping_stone(problem.log_likelihood, problem.log_prior, problem.sample_prior, problem.ndim,
                             rungs=rungs, steps=steps, burn=max(100, steps // 4), seed=seed, progress=False)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--live-points", type=int, default=150, help="pilot nested sampling live points")
    parser.add_argument("--rungs", type=int, default=16, help="pilot stepping-stone rungs")
    parser.add_argument("--steps", type=int, default=300, help="pilot stepping-stone kept steps per rung")
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--full", action="store_true", help="also run both estimators at the extrapolated settings")
    args = parser.parse_args(argv)
    warnings.simplefilter("ignore")
    print(f"load average: {', '.join(f'{x:.2f}' for x in os.getloadavg())} on {os.cpu_count()} CPU(s)")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        (folder / "survey.toml").write_text(SURVEY)
        (folder / "run.toml").write_text(RUN)
        make_synthetic(folder / "survey.toml")
        problem = build_problem(load_config(folder / "run.toml"))
        print(f"synthetic case: {problem.picks.n_picks} P picks, {problem.ndim} free parameters "
              f"({', '.join(problem.names)})\n")

        # 1. cost of one call, batched or not
        rng = np.random.default_rng(0)
        theta = problem.sample_prior(40, rng)
        one = best_time(lambda: problem.log_likelihood(theta[:1]), args.repeats)
        forty = best_time(lambda: problem.log_likelihood(theta), args.repeats)
        print("1. log-likelihood call (best of %d)" % args.repeats)
        print(f"   1 row : {one * 1e3:8.3f} ms per call, {one * 1e6:9.1f} us per row")
        print(f"   40 rows: {forty * 1e3:8.3f} ms per call, {forty / 40 * 1e6:9.1f} us per row  "
              f"(per row {one / (forty / 40):.1f} x cheaper batched)\n")

        # 2. pilots
        print("2. pilot runs (two seeds each)")
        header = (f"   {'estimator':<34} {'seed':>4} {'log Z':>10} {'stated err':>10} {'rows':>10} {'calls':>8} "
                  f"{'time s':>8}")
        print(header)
        pilots = {}
        for label, fn in ((f"nested sampling, {args.live_points} live points",
                           lambda s: run_nested(problem, args.live_points, s)),
                          (f"stepping-stone, {args.rungs} rungs x {args.steps} steps",
                           lambda s: run_stepping(problem, args.rungs, args.steps, s))):
            runs = []
            for seed in (1, 2):
                r = fn(seed)
                runs.append(r)
                print(f"   {label:<34} {seed:>4} {r.log_z:10.3f} {r.log_z_error:10.3f} {r.n_calls:10,d} "
                      f"{r.details['likelihood_calls']:8,d} {r.seconds:8.1f}")
            d = runs[0].log_z - runs[1].log_z
            comb = math.hypot(runs[0].log_z_error, runs[1].log_z_error)
            print(f"   {'':<34} seed 1 - seed 2 = {d:+.3f} ({abs(d) / comb:.1f} combined stated errors)")
            for note in runs[0].notes:
                print(f"   note (seed 1): {note}")
            pilots[label] = runs
        (ns_a, ns_b), (ss_a, ss_b) = pilots.values()
        agree = ev.agreement(ns_a, ss_a)
        print(f"   nested sampling vs stepping-stone (seed 1): {agree['message']}\n")

        # 3. extrapolation
        print(f"3. extrapolated to a stated error of {TARGET} nats (work and time x (error / {TARGET})^2)")
        print(f"   {'estimator':<20} {'settings':<34} {'rows':>12} {'calls':>10} {'time s':>9}")
        plan = {}
        for name, runs in (("nested sampling", (ns_a, ns_b)), ("stepping-stone", (ss_a, ss_b))):
            err = float(np.mean([r.log_z_error for r in runs]))
            factor = (err / TARGET) ** 2
            rows = np.mean([r.n_calls for r in runs]) * factor
            calls = np.mean([r.details["likelihood_calls"] for r in runs]) * factor
            secs = np.mean([r.seconds for r in runs]) * factor
            if name == "nested sampling":
                setting = int(math.ceil(args.live_points * factor))
                text = f"{setting} live points"
            else:
                setting = int(math.ceil(args.steps * factor))
                text = f"{args.rungs} rungs x {setting} kept steps"
            plan[name] = setting
            print(f"   {name:<20} {text:<34} {rows:12,.0f} {calls:10,.0f} {secs:9.0f}")
        print()

        if args.full:
            print("4. measured at the extrapolated settings")
            r = run_nested(problem, plan["nested sampling"], 3)
            print(f"   {r.describe()}; {r.details['likelihood_calls']:,} batched calls")
            s = run_stepping(problem, args.rungs, plan["stepping-stone"], 3)
            print(f"   {s.describe()}; {s.details['likelihood_calls']:,} batched calls")
            print(f"   {ev.agreement(r, s)['message']}")
        else:
            print("4. (run with --full to measure at the extrapolated settings)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
