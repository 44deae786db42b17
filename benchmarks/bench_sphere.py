"""Speed of the spherical engine: a first-arrival P curve through a 40-shell planet.

The model is an invented planet (synthetic, radius 6000 km): a two-shell crust,
23 mantle shells with two discontinuities, 9 shells of liquid outer core and 6 of
inner core, 40 shells in all. The curve is the first P arrival (P, Pdiff, PKP,
PKIKP) at 100 distances from 1 to 179 degrees, for a surface source.

Timed in the same run:

* the engine, ``invert.sphere.travel_times(model, "P", distances)``, after a
  warm-up call (the first call, which loads or compiles the kernel, is printed
  separately);
* ObsPy's TauP module (a general-purpose travel-time library, used here only as an
  independent baseline) computing the same curve: one ``get_travel_times`` call
  per distance with the phases P, Pdiff, PKP and PKIKP, the earliest kept. TauP
  reads the same velocities at the same depths from a temporary model file in its
  own input layout and builds its model once, before timing (that build time is
  printed, not counted).

Before timing, the two curves are compared: TauP interpolates velocity linearly
in depth between the nodes and our shells use their own law between the same
end values, so they differ by a few hundredths of a second; the run fails if any
distance where both report the same kind of first arrival differs by more than
0.5 s. TauP stops reporting the diffracted wave some way along the core
boundary, where the engine (kinematic by default) still does: those distances
are counted and printed, not compared.

Two more figures put the curve in context: a batch of 64 perturbed models on the
same 100 distances (one table of rays per model), and 100 picks whose sources
all lie at different depths (the tables are rebuilt for every pick).

Timings are the best of several repeats (garbage collector off), on one thread;
the machine may be shared, so single figures are noisy and the ratio measured in
one run is the figure to read. This program prints figures and never fails on a
timing. Target: the engine at least 100 times faster than TauP on the curve.
"""

from __future__ import annotations

import os

os.environ["NUMBA_NUM_THREADS"] = "1"
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import gc  # noqa: E402
import platform  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

RADIUS = 6000.0
N_DIST = 100
TOLERANCE = 0.5  # s, engine against TauP where both report the same kind of first arrival
TARGET_RATIO = 100.0
SEED = 20250303


def synthetic_planet():
    """Boundaries (41,) depths [km], vp/vs at the top and bottom of 40 shells [km/s]; synthetic."""
    regions = [  # (top, bottom, shells, vp(top), vp(bottom), vs(top), vs(bottom)); vs = 0: liquid
        (0.0, 15.0, 1, 5.9, 6.1, 3.45, 3.55),
        (15.0, 32.0, 1, 6.6, 6.9, 3.8, 3.95),
        (32.0, 400.0, 5, 8.0, 8.9, 4.5, 4.85),
        (400.0, 650.0, 4, 9.3, 10.1, 5.05, 5.5),
        (650.0, 2850.0, 14, 10.6, 13.5, 5.9, 7.2),
        (2850.0, 4800.0, 9, 8.1, 10.2, 0.0, 0.0),
        (4800.0, RADIUS, 6, 11.0, 11.25, 3.5, 3.6),
    ]
    top, bot, vpt, vpb, vst, vsb, region = [], [], [], [], [], [], []
    for k, (z0, z1, n, p0, p1, s0, s1) in enumerate(regions):
        z = np.linspace(z0, z1, n + 1)
        f = (z - z0) / (z1 - z0)
        vp = p0 + (p1 - p0) * f * (1.6 - 0.6 * f)  # gently curved inside each region
        vs = s0 + (s1 - s0) * f * (1.6 - 0.6 * f)
        top += list(z[:-1])
        bot += list(z[1:])
        vpt += list(vp[:-1])
        vpb += list(vp[1:])
        vst += list(vs[:-1])
        vsb += list(vs[1:])
        region += [k] * n
    return tuple(np.array(a) for a in (top, bot, vpt, vpb, vst, vsb)) + (np.array(region),)


def write_taup_input(path, top, bot, vpt, vpb, vst, vsb, region):
    """The same nodes in TauP's 'named discontinuities' input layout (benchmark baseline only)."""
    lines = []
    names = {2: "mantle", 5: "outer-core", 6: "inner-core"}
    for j in range(len(top)):
        if j == 0 or region[j] != region[j - 1]:
            if region[j] in names:
                lines.append(names[region[j]])
            lines.append(f"{top[j]:.6f} {vpt[j]:.6f} {vst[j]:.6f} {3.0 + top[j] / 1000.0:.4f}")
        lines.append(f"{bot[j]:.6f} {vpb[j]:.6f} {vsb[j]:.6f} {3.0 + bot[j] / 1000.0:.4f}")
    with open(path, "w") as fh:
        fh.write("\n".join(lines) + "\n")


def best_time(fn, repeats, min_time):
    """Best time per call [s] over ``repeats`` rounds of at least ``min_time`` seconds each."""
    best = np.inf
    gc.disable()
    try:
        for _ in range(repeats):
            n = 0
            t0 = time.perf_counter()
            while True:
                fn()
                n += 1
                el = time.perf_counter() - t0
                if el >= min_time:
                    break
            best = min(best, el / n)
    finally:
        gc.enable()
    return best


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeats", type=int, default=5, help="repeats of the engine timings; the best is kept")
    parser.add_argument("--min-time", type=float, default=0.3, help="minimum seconds per engine repeat")
    parser.add_argument("--taup-repeats", type=int, default=2, help="repeats of the TauP curve; the best is kept")
    args = parser.parse_args(argv)

    import numba

    from invert import sphere

    load = os.getloadavg() if hasattr(os, "getloadavg") else (float("nan"),) * 3
    print("Spherical engine: first-arrival P curve, 40-shell synthetic planet, 100 distances 1-179 deg")
    print(f"python {platform.python_version()}, numpy {np.__version__}, numba {numba.__version__}; "
          f"{os.cpu_count()} logical CPUs, load average {load[0]:.2f}; one thread")
    top, bot, vpt, vpb, vst, vsb, region = synthetic_planet()
    model = sphere.RadialModel.from_depths(top, bot, vpt, vpb, vst, vsb, radius=RADIUS)
    assert model.n_shells == 40
    dist = np.linspace(1.0, 179.0, N_DIST)

    t0 = time.perf_counter()
    ours = sphere.travel_times(model, "P", dist)
    t_first = time.perf_counter() - t0
    names = ours.names()[0]

    try:
        from obspy.taup import TauPyModel
        from obspy.taup.taup_create import build_taup_model
    except ImportError:
        TauPyModel = None
    taup_curve = None
    if TauPyModel is not None:
        with tempfile.TemporaryDirectory(prefix="invert-bench-taup-") as tmp:
            path = os.path.join(tmp, "synthetic_planet.nd")
            write_taup_input(path, top, bot, vpt, vpb, vst, vsb, region)
            t0 = time.perf_counter()
            build_taup_model(path, output_folder=tmp, verbose=False)
            taup = TauPyModel(model=os.path.join(tmp, "synthetic_planet.npz"))
            t_build = time.perf_counter() - t0
        phases = ["P", "Pdiff", "PKP", "PKIKP"]

        def taup_first():
            out = []
            for x in dist:
                arr = taup.get_travel_times(0.0, float(x), phase_list=phases)
                best = min(arr, key=lambda a: a.time) if arr else None
                out.append((best.time, best.name) if best else (np.inf, ""))
            return out

        taup_curve = taup_first()

    # ---------------------------------------------------------------- correctness check
    failed = False
    if taup_curve is not None:
        t_ref = np.array([t for t, _ in taup_curve])
        n_ref = np.array([str(n) for _, n in taup_curve], dtype=object)
        kind = {"P": "P", "Pdiff": "Pdiff", "PKP": "PKP", "PKPab": "PKP", "PKPbc": "PKP", "PKIKP": "PKIKP"}
        same = np.array([kind.get(a, a) == kind.get(b, b) for a, b in zip(names, n_ref)])
        diff = np.abs(ours.time[0] - t_ref)
        worst = diff[same].max() if same.any() else np.nan
        print(f"\ncheck against TauP: {same.sum()} of {N_DIST} distances with the same kind of first arrival, "
              f"max |difference| {worst:.3f} s (tolerance {TOLERANCE} s)")
        other = ~same
        if other.any():
            print(f"  {other.sum()} distances differ in kind: ours "
                  f"{', '.join(sorted(set(names[other])))} vs TauP {', '.join(sorted(set(n_ref[other])))} "
                  f"(from {dist[other].min():.1f} deg: TauP stops reporting the diffracted wave)")
        if not worst < TOLERANCE:
            print("FAILED: the engine and TauP disagree")
            failed = True
    else:
        print("\nObsPy is not installed: no TauP baseline (pip install obspy)")

    # ---------------------------------------------------------------- timings
    def engine_curve():
        sphere.travel_times(model, "P", dist)

    t_engine = best_time(engine_curve, args.repeats, args.min_time)
    print(f"\nengine, first call (kernel loaded from numba's cache or compiled): {t_first:.3f} s")
    print(f"engine: {t_engine * 1e3:8.3f} ms per curve ({N_DIST / t_engine:,.0f} times/s), "
          f"best of {args.repeats} repeats of >= {args.min_time:g} s")
    if taup_curve is not None:
        t_taup = best_time(taup_first, args.taup_repeats, 0.0)
        ratio = t_taup / t_engine
        print(f"TauP:   {t_taup * 1e3:8.1f} ms per curve (model build {t_build:.2f} s, not counted), "
              f"best of {args.taup_repeats}")
        print(f"ratio TauP / engine: {ratio:,.0f}x  (target >= {TARGET_RATIO:.0f}x: "
              f"{'met' if ratio >= TARGET_RATIO else 'NOT met'})")

    rng = np.random.default_rng(SEED)
    scale = rng.uniform(0.97, 1.03, size=(64, 1))
    batch = sphere.RadialModel.build(model.r_top, model.r_bottom, model.vp_top * scale, model.vp_bottom * scale,
                                     model.vs_top * scale, model.vs_bottom * scale, law=model.law)
    t_batch = best_time(lambda: sphere.travel_times(batch, "P", dist), args.repeats, args.min_time)
    print(f"\n64 models x {N_DIST} distances: {t_batch * 1e3:.1f} ms ({64 * N_DIST / t_batch:,.0f} times/s)")
    depths = rng.uniform(0.0, 700.0, size=N_DIST)
    t_deep = best_time(lambda: sphere.travel_times(model, "P", dist, depths), args.repeats, args.min_time)
    print(f"{N_DIST} picks, every source at its own depth: {t_deep * 1e3:.1f} ms "
          f"({N_DIST / t_deep:,.0f} times/s)")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
