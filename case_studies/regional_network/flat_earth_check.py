"""How large is the flat-Earth approximation for the Varn Highlands network (out to ~210 km)?

The inversion treats the layers as flat. On the real, round Earth the same layers are
concentric shells. This script computes first-arrival times for the true model of survey.toml
both ways and prints the difference (spherical minus flat) against distance:

* flat: the package's flat engine (invert.forward.travel_times), distance = the epicentral
  distance along the surface;
* spherical, method 1 (written here, independent of the package): the same layers as
  constant-velocity spherical shells on a sphere of radius 6371 km. In a constant-velocity
  shell a ray is a straight chord, so with the spherical ray parameter p = r sin(i) / v the
  chord's closest approach to the centre is b = p v, a point at radius r lies at angle
  acos(b / r) from that closest approach, and the path length from radius r1 to r2 is
  sqrt(r2^2 - b^2) - sqrt(r1^2 - b^2) (plane geometry). Summing the shells gives distance and
  time as functions of p for the up-going ray and for rays turning in each shell; every
  solution at the wanted distance is found by bisection and the earliest is the first arrival;
* spherical, method 2: the package's exact Earth-flattening (invert.sphere, the transform
  z_f = R ln(R / r), v_f = (R / r) v; Mueller, J. Geophys. 42, 1977; from memory) run through
  the flat engine, as a cross-check of method 1.

    python flat_earth_check.py

The true model and the event depths are those of survey.toml (synthetic, invented region).
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np

from invert.forward import travel_times
from invert.model import LayerModel
from invert.sphere import travel_times_flattened

HERE = Path(__file__).resolve().parent
EARTH_RADIUS = 6371.0  # km, mean radius (common practice)


def shells(thickness, velocity, radius=EARTH_RADIUS, bottom_depth=800.0):
    """(r_top, r_bottom, v) of constant-velocity shells; the half-space is cut at bottom_depth (rays
    out to a few degrees turn far above it)."""
    tops = np.concatenate([[0.0], np.cumsum(thickness)])
    bots = np.concatenate([np.cumsum(thickness), [bottom_depth]])
    return [(radius - t, radius - b, v) for t, b, v in zip(tops, bots, velocity)]


def _piece(b, r_lo, r_hi, v):
    """Angle [rad] and time [s] of a straight ray of closest approach b from radius r_lo out to r_hi."""
    s_hi = math.sqrt(max(r_hi * r_hi - b * b, 0.0))
    s_lo = math.sqrt(max(r_lo * r_lo - b * b, 0.0))
    return math.acos(min(b / r_hi, 1.0)) - math.acos(min(b / r_lo, 1.0)), (s_hi - s_lo) / v


def ray(p, model, r_source, turning: int | None):
    """Angle and time of the ray of parameter p [s/rad]: up-going (turning=None) or turning in shell
    ``turning``; None if that ray does not exist."""
    angle = time = 0.0
    # up from the source to the surface
    for r_top, r_bot, v in model:
        lo, hi = max(r_bot, min(r_source, r_top)), r_top
        if hi <= lo:  # shell below the source
            continue
        b = p * v
        if b > lo:  # the ray cannot climb through this part
            return None
        a, t = _piece(b, lo, hi, v)
        angle, time = angle + a, time + t
    if turning is None:
        return angle, time
    # down from the source and back up to it: twice the part between the turning point and the source
    for j, (r_top, r_bot, v) in enumerate(model):
        hi = min(r_top, r_source)
        if hi <= r_bot or j > turning:
            continue
        b = p * v
        if b > hi:  # total reflection at the top of this shell: not a refracted ray
            return None
        if j < turning:
            if b >= r_bot:  # would turn above the wanted shell
                return None
            a, t = _piece(b, r_bot, hi, v)
        else:
            if b < r_bot:  # passes through the wanted shell without turning
                return None
            a, t = _piece(b, b, hi, v)
        angle, time = angle + 2 * a, time + 2 * t
    return angle, time


def spherical_first_arrival(distance_km, depth_km, thickness, velocity, radius=EARTH_RADIUS, n_p=4000):
    """Earliest arrival at surface distance ``distance_km`` (along the surface) from a source at ``depth_km``."""
    model = shells(thickness, velocity, radius)
    target = distance_km / radius
    r_source = radius - depth_km
    best = math.inf
    for turning in [None] + list(range(len(model))):
        if turning is None:  # up-going: b = p v must stay below the lowest radius of every shell on the way
            lows = [(max(r_bot, r_source), v) for r_top, r_bot, v in model if r_top > r_source]
            lows += [(r_source, v) for r_top, r_bot, v in model if r_bot < r_source <= r_top]
            if depth_km <= 0:
                continue
            p_lo, p_hi = 0.0, min(r / v for r, v in lows)
        else:  # turning in shell `turning`: closest approach b = p v inside that shell, above the source
            r_top, r_bot, v = model[turning]
            if r_bot >= r_source:
                continue
            p_lo, p_hi = r_bot / v, min(r_top, r_source) / v
        # grid dense at both ends: near grazing, the distance changes like the square root of (p_hi - p)
        u = np.linspace(0.0, 1.0, n_p + 1)[:-1]
        ps = p_lo + (p_hi - p_lo) * u**4 / (u**4 + (1.0 - u) ** 4)
        vals = [ray(p, model, r_source, turning) for p in ps]
        for k in range(len(ps) - 1):
            if vals[k] is None or vals[k + 1] is None:
                continue
            fa, fb = vals[k][0] - target, vals[k + 1][0] - target
            if fa * fb > 0:
                continue
            lo, hi = ps[k], ps[k + 1]
            for _ in range(60):  # bisection on the angle
                mid = 0.5 * (lo + hi)
                m = ray(mid, model, r_source, turning)
                if m is None:
                    break
                if (m[0] - target) * fa > 0:
                    lo = mid
                else:
                    hi = mid
            m = ray(0.5 * (lo + hi), model, r_source, turning)
            if m is not None:
                best = min(best, m[1])
    return best


def main() -> None:
    spec = tomllib.loads((HERE / "survey.toml").read_text())
    thickness, vp = spec["model"]["thickness"], spec["model"]["vp"]
    vs = [a / b for a, b in zip(vp, spec["model"]["vpvs"])]
    flat = LayerModel.build(thickness, vp, vs=vs)
    distances = np.array([25.0, 50.0, 100.0, 150.0, 175.0, 200.0, 215.0])
    print("Flat-Earth approximation: first-arrival time on the sphere minus the flat time [s]")
    print(f"(true model of survey.toml; sphere of radius {EARTH_RADIUS:g} km; distance along the surface)")
    for wave, vel in (("P", vp), ("S", vs)):
        for depth in (0.0, 10.0, 27.0):
            t_flat = travel_times(flat, wave, distances, source_depth=depth).time[0]
            t_pkg = travel_times_flattened(flat, wave, distances, source_depth=depth, radius=EARTH_RADIUS).time[0]
            t_own = np.array([spherical_first_arrival(x, depth, thickness, vel) for x in distances])
            print(f"\n{wave}, source {depth:g} km deep")
            print("  distance [km]   flat [s]   sphere [s]   sphere - flat [s]   (package flattening - own) [s]")
            for x, tf, ts, tp in zip(distances, t_flat, t_own, t_pkg):
                print(f"  {x:13.0f} {tf:10.3f} {ts:12.3f} {ts - tf:19.3f} {tp - ts:26.1e}")


if __name__ == "__main__":
    main()
