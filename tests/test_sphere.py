"""Spherical travel times (invert.sphere) against checks from outside the engine.

1. Radial models: our CSV layout (read, write, errors naming file, line and column), the
   two shell laws evaluated by their defining formulas, layers turned into shells.
2. Geometry (common practice): in uniform shells rays are straight, so a uniform sphere
   gives chords T = 2 R sin(Delta / 2) / v (law of cosines for a buried source), and a
   uniform crust over a uniform mantle sphere gives straight legs joined by Snell's law
   r sin(i) / v = p. Thin 'flat' shells converge to the uniform sphere.
3. Direct numerical quadrature of the spherical ray integrals (scipy.integrate.quad)
       Delta = int p dr / (r sqrt(eta^2 - p^2)),  T = int eta^2 dr / (r sqrt(eta^2 - p^2)),
   eta = r / v(r), for a synthetic planet with both shell laws, a liquid outer core and an
   inner core: every branch (P, S, head wave, Pdiff, PKPab, PKPbc, PKIKP, SKS, SKIKS) and
   the earliest of several roots in triplications.
4. The flat engine (invert.forward) on the flattened model (z_f = R ln(R / r),
   v_f = R v / r, x = R Delta; built here from those formulas) gives the same times for
   'flat' shells; the flattening option for layered models.
5. The published ak135 model (Kennett, Engdahl & Buland, GJI 122, 1995; volume from memory) as shipped with
   ObsPy's TauP module (a general-purpose library, used here only as an independent
   check): first-arrival P and direct S 10-95 degrees, core phases, and the distances at
   which branches start and end.
"""

from __future__ import annotations

import csv
import math
import os

import numpy as np
import pytest
from scipy import integrate, optimize

from invert import forward, sphere
from invert.data import DataError
from invert.model import LayerModel

DATA = os.path.join(os.path.dirname(__file__), "data")
PLANET = os.path.join(DATA, "radial_synthetic_planet.csv")
RAD = math.pi / 180.0


# =================================================================== reference integrals
def _read_rows(path):
    """Shell rows of a radial CSV read with the csv module alone (independent of the reader)."""
    with open(path, encoding="utf-8") as fh:
        lines = [ln for ln in fh if ln.strip() and not ln.lstrip().startswith("#")]
    return list(csv.DictReader(lines))


class SphereReference:
    """Ray integrals through a radial model by quadrature; one shell law per shell.

    'flat': v / r linear in ln r between the end values; 'r2': 1 / v^2 linear in r^2.
    Integrals over [a, b] use r = a + s^2, which makes the inverse square root at a
    turning point at a regular. On a segment that ends at a turning (or grazing) point
    the integrand uses p = eta(a) itself: the integral near a square-root end is so
    sensitive to where the end lies (a radius off by one rounding unit moves Delta by
    ~1e-8 rad) that the exact root of the rounded p cannot be used.
    """

    def __init__(self, rows, radius):
        self.R = float(radius)
        self.shells = []
        for row in rows:
            if "top_radius_km" in row:
                rt, rb = float(row["top_radius_km"]), float(row["bottom_radius_km"])
            else:
                rt = self.R - float(row["top_depth_km"])
                rb = self.R - float(row["bottom_depth_km"])
            self.shells.append(dict(
                rt=rt, rb=rb, law=row.get("law") or "r2",
                P=(float(row["vp_top_km_s"]), float(row["vp_bottom_km_s"])),
                S=(float(row["vs_top_km_s"]), float(row["vs_bottom_km_s"]))))

    def v(self, i, r, wave):
        sh = self.shells[i]
        vt, vb = sh[wave]
        if vt == 0.0:
            return 0.0
        rt, rb = sh["rt"], sh["rb"]
        if sh["law"] == "flat":
            zt, zb = vt / rt, vb / rb
            return r * (zt + (zb - zt) * math.log(rt / r) / math.log(rt / rb))
        b = (1.0 / vt ** 2 - 1.0 / vb ** 2) / (rt ** 2 - rb ** 2)
        a = 1.0 / vb ** 2 - b * rb ** 2
        return 1.0 / math.sqrt(a + b * r * r)

    def eta(self, i, r, wave):
        return r / self.v(i, r, wave)

    def _eta2_step(self, i, a, ds2, wave):
        """eta(a + ds2)^2 - eta(a)^2 without cancellation."""
        sh = self.shells[i]
        vt, vb = sh[wave]
        rt, rb = sh["rt"], sh["rb"]
        r = a + ds2
        if sh["law"] == "flat":  # eta = 1 / zeta, zeta linear in ln r
            za, zr = a / self.v(i, a, wave), r / self.v(i, r, wave)
            za, zr = 1.0 / za, 1.0 / zr
            dz = (vb / rb - vt / rt) * math.log1p(ds2 / a) / math.log(rt / rb)  # zeta(a) - zeta(r)
            return dz * (za + zr) / (za * za * zr * zr)
        b = (1.0 / vt ** 2 - 1.0 / vb ** 2) / (rt ** 2 - rb ** 2)  # eta^2 = r^2 (A + B r^2)
        a_ = 1.0 / vb ** 2 - b * rb ** 2
        return ds2 * (2 * a + ds2) * (a_ + b * (r * r + a * a))

    def _segment(self, i, wave, a, b, p, turning=False):
        """Delta, T over radii a < b of shell i (turning at a: p = eta(a))."""
        top = math.sqrt(b - a)

        def f(s, which):
            r = a + s * s
            e = self.eta(i, r, wave)
            d2 = self._eta2_step(i, a, s * s, wave) if turning else (e - p) * (e + p)
            if d2 <= 0.0:
                return 0.0
            return 2.0 * s * (p if which == 0 else e * e) / (r * math.sqrt(d2))

        kw = dict(epsabs=0.0, epsrel=1e-12, limit=400)
        x = integrate.quad(f, 0.0, top, args=(0,), **kw)[0]
        t = integrate.quad(f, 0.0, top, args=(1,), **kw)[0]
        return x, t

    def _shell_of(self, r):
        for i, sh in enumerate(self.shells):
            if sh["rb"] < r <= sh["rt"]:
                return i
        raise ValueError(r)

    def ray(self, p, r_src, waves, r_rec=None, stop=None, up=False):
        """(Delta, T, turning shell, turning radius) of the ray with ray parameter p > 0.

        ``waves[i]`` is the wave in shell i. Both ends go down (weight 2 below the deeper
        end). With ``stop`` (a boundary radius) the legs end there, grazing it. With
        ``up`` the ray goes straight up from the deeper end (no turning point). None if
        the ray cannot exist.
        """
        r_rec = self.R if r_rec is None else r_rec
        r1, r2 = max(r_src, r_rec), min(r_src, r_rec)
        x = t = 0.0
        for i, sh in enumerate(self.shells):
            a, b = max(sh["rb"], r2), min(sh["rt"], r1)
            if b > a:
                if self.v(i, a, waves[i]) == 0 or min(self.eta(i, a, waves[i]), self.eta(i, b, waves[i])) <= p:
                    return None
                dx, dt = self._segment(i, waves[i], a, b, p)
                x, t = x + dx, t + dt
        if up:
            return x, t, self._shell_of(r2), r2
        for i in range(self._shell_of(r2), len(self.shells)):
            sh = self.shells[i]
            top = min(sh["rt"], r2)
            w = waves[i]
            if self.v(i, top, w) == 0 or self.eta(i, top, w) < p:
                return None
            if stop is not None and sh["rb"] < stop:
                raise ValueError("stop must be a boundary below the ends")
            e_bot = self.eta(i, sh["rb"], w) if sh["rb"] > 0 else 0.0
            if e_bot >= p or (stop is not None and sh["rb"] == stop):
                graze = stop is not None and sh["rb"] == stop
                dx, dt = self._segment(i, w, sh["rb"], top, e_bot if graze else p, graze)
                x, t = x + 2 * dx, t + 2 * dt
                if stop is not None and sh["rb"] == stop:
                    return x, t, i, stop
                continue
            rt_ = optimize.brentq(lambda r: self.eta(i, r, w) - p, max(sh["rb"], 1e-9), top, xtol=1e-13,
                                  rtol=4 * np.finfo(float).eps, maxiter=500)
            dx, dt = self._segment(i, w, rt_, top, self.eta(i, rt_, w), True)
            return x + 2 * dx, t + 2 * dt, i, rt_
        return None


def _waves(ref, mantle, core="P"):
    """Wave per shell: ``mantle`` above the first liquid shell under a solid one, ``core`` below."""
    liquid = [sh["P"][0] > 0 and sh["S"][0] == 0 for sh in ref.shells]
    first = next(i for i in range(1, len(liquid)) if liquid[i] and not liquid[i - 1])
    return [mantle if i < first else core for i in range(len(ref.shells))], first


@pytest.fixture(scope="module")
def planet():
    return sphere.read_radial_csv(PLANET)


@pytest.fixture(scope="module")
def planet_ref():
    rows = _read_rows(PLANET)
    return SphereReference(rows, float(rows[-1]["bottom_depth_km"]))


# =================================================================== 1. radial models and the CSV
def test_csv_reads_the_synthetic_planet(planet):
    rows = _read_rows(PLANET)
    assert planet.n_models == 1 and planet.n_shells == len(rows)
    assert planet.names == tuple(r["shell"] for r in rows)
    assert planet.law == tuple(r["law"] for r in rows)
    assert planet.radius[0] == 4000.0
    np.testing.assert_array_equal(planet.top_depth[0], [float(r["top_depth_km"]) for r in rows])
    np.testing.assert_array_equal(planet.vs_bottom[0], [float(r["vs_bottom_km_s"]) for r in rows])
    cmb, icb = planet.core()
    assert planet.names[cmb[0]] == "outer core" and planet.names[icb[0]] == "inner core"


def test_csv_round_trip_and_radius_columns(planet, tmp_path):
    for cols in ("depth", "radius"):
        path = tmp_path / f"m_{cols}.csv"
        sphere.write_radial_csv(planet, path, columns=cols)
        back = sphere.read_radial_csv(path)
        for field in ("radius", "r_top", "r_bottom", "vp_top", "vp_bottom", "vs_top", "vs_bottom"):
            np.testing.assert_array_equal(getattr(back, field), getattr(planet, field))
        assert back.names == planet.names and back.law == planet.law


@pytest.mark.parametrize("change, line, column, words", [
    (lambda r: r.__setitem__(3, r[3].replace("lid,40,120", "lid,41,120")), 7, "top_depth_km", "starts at 41"),
    (lambda r: r.__setitem__(4, r[4].replace("7.85,7.8,4.35,4.3", "7.85,7.8,4.35,0")), 8, "vs_bottom_km_s",
     "liquid"),
    (lambda r: r.__setitem__(4, r[4].replace(",flat", ",cubic")), 8, "law", "unknown law"),
    (lambda r: r.__setitem__(5, r[5].replace("8.2,", "fast,")), 9, "vp_top_km_s", "not a number"),
    (lambda r: r.__setitem__(0, r[0] + ",density"), 4, "density", "unknown column"),
])
def test_csv_errors_name_file_line_and_column(tmp_path, change, line, column, words):
    lines = open(PLANET, encoding="utf-8").read().splitlines()
    body = lines[3:]  # header is line 4 of the file
    change(body)
    path = tmp_path / "bad.csv"
    path.write_text("\n".join(lines[:3] + body) + "\n", encoding="utf-8")
    with pytest.raises(DataError) as err:
        sphere.read_radial_csv(path)
    assert err.value.line == line and err.value.column == column
    assert words in str(err.value) and "bad.csv" in str(err.value)


def test_model_validation_messages():
    with pytest.raises(ValueError, match="not monotone"):
        # r / v rises toward the centre over part of the shell only
        sphere.RadialModel.build([100.0, 60.0], [60.0, 0.0], [20.0, 5.0], [5.0, 5.0], [0, 0], [0, 0])
    with pytest.raises(ValueError, match="centre shell 1 .* must use the 'r2' law"):
        sphere.RadialModel.build([100.0], [0.0], [5.0], [5.0], [3.0], [3.0], law=["flat"])
    with pytest.raises(ValueError, match="Vp/Vs"):
        sphere.RadialModel.build([100.0], [0.0], [5.0], [5.0], [4.5], [4.5])
    with pytest.raises(ValueError, match="ends at radius 50 km but shell 2"):
        sphere.RadialModel.build([100.0, 40.0], [50.0, 0.0], [5.0, 6.0], [5.0, 6.0], [3.0, 3.0], [3.0, 3.0])


def test_profile_follows_the_two_shell_laws(planet):
    rows = _read_rows(PLANET)
    R = 4000.0
    for j, row in enumerate(rows):
        zt, zb = float(row["top_depth_km"]), float(row["bottom_depth_km"])
        vt, vb = float(row["vp_top_km_s"]), float(row["vp_bottom_km_s"])
        z = np.array([zt, 0.3 * zt + 0.7 * zb, zb - 1e-9 * R])
        got = planet.profile(z, "P")[0]
        rt, rb, r = R - zt, R - zb, R - z
        if row["law"] == "flat":  # v / r linear in ln r
            expect = r * (vt / rt + (vb / rb - vt / rt) * np.log(rt / r) / np.log(rt / rb))
        else:  # 1 / v^2 linear in r^2
            expect = 1.0 / np.sqrt(1 / vt ** 2 + (1 / vb ** 2 - 1 / vt ** 2) * (rt ** 2 - r ** 2) / (rt ** 2 - rb ** 2))
        np.testing.assert_allclose(got, expect, rtol=1e-9)
        assert got[0] == pytest.approx(vt, rel=1e-12)
    # S is zero in the liquid outer core
    assert planet.profile([2500.0], "S")[0, 0] == 0.0


def test_from_layers_and_below(planet):
    layers = LayerModel.build([[10.0, 25.0], [12.0, 20.0]], [[5.5, 6.4, 7.9]], vpvs=1.75, gradient=[0.01, 0, 0])
    rm = sphere.RadialModel.from_layers(layers, 4000.0, below=planet)
    assert rm.n_models == 2
    # layers, then the half-space down to the next boundary of the deeper model (40 km), then its shells
    assert rm.names[:3] == ("layer 1", "layer 2", "half-space") and rm.names[3] == "lid"
    np.testing.assert_allclose(rm.bottom_depth[:, :3], [[10, 35, 40], [12, 32, 40]])
    np.testing.assert_allclose(rm.vp_bottom[:, 0], [5.6, 5.62])
    np.testing.assert_allclose(rm.vs_top[:, 2], 7.9 / 1.75)
    assert rm.law[:3] == ("flat", "flat", "flat") and rm.law[3:] == planet.law[2:]
    alone = sphere.RadialModel.from_layers(layers, 4000.0)
    assert alone.r_bottom[0, -1] == 0.0 and alone.law[-1] == "r2"


# =================================================================== 2. geometry
def _uniform(n, law, R=6371.0, v=8.0, vs=4.6):
    """A uniform sphere cut into n shells of equal thickness (the last reaches the centre)."""
    r = np.linspace(R, 0.0, n + 1)
    laws = [law] * (n - 1) + ["r2"]
    return sphere.RadialModel.build(r[:-1], r[1:], np.full(n, v), np.full(n, v), np.full(n, vs), np.full(n, vs),
                                    law=laws)


@pytest.mark.parametrize("n", [1, 7])
def test_uniform_sphere_chords(n):
    R, v = 6371.0, 8.0
    m = _uniform(n, "r2", R, v)
    d = np.array([0.0, 0.01, 1.0, 10.0, 45.0, 90.0, 135.0, 170.0, 179.99, 180.0])
    a = sphere.travel_times(m, "P", d)
    np.testing.assert_allclose(a.time[0], 2 * R * np.sin(np.radians(d) / 2) / v, rtol=1e-11, atol=1e-9)
    # deepest point of a chord between two surface points: R (1 - cos(Delta / 2))
    np.testing.assert_allclose(a.deepest[0], R * (1 - np.cos(np.radians(d) / 2)), rtol=1e-9, atol=1e-6)
    # ray parameter r sin(i) / v: R cos(Delta / 2) / v at the surface
    np.testing.assert_allclose(a.ray_parameter[0, 1:], R * np.cos(np.radians(d[1:]) / 2) / v, rtol=1e-9,
                               atol=1e-9)
    for zs in (35.0, 700.0):  # buried source: law of cosines
        rs = R - zs
        chord = np.sqrt(rs ** 2 + R ** 2 - 2 * rs * R * np.cos(np.radians(d)))
        b = sphere.travel_times(m, "S", d, zs)
        np.testing.assert_allclose(b.time[0], chord / 4.6, rtol=1e-11, atol=1e-9)
        # reciprocity: source and receiver swapped
        c = sphere.travel_times(m, "S", d, 0.0, zs)
        np.testing.assert_allclose(c.time[0], b.time[0], rtol=1e-12)


def test_thin_flat_shells_converge_to_the_uniform_sphere():
    """'flat' shells deviate by ~ v ln(r_top / r_bottom)^2 / 8: the error falls ~4x per halving."""
    R, v = 6371.0, 8.0
    d = np.array([20.0, 60.0, 100.0])  # rays turning well above half the radius
    exact = 2 * R * np.sin(np.radians(d) / 2) / v
    err = []
    for n in (20, 40, 80):
        t = sphere.travel_times(_uniform(n, "flat", R, v), "P", d).time[0]
        assert np.all(t < exact)  # v / r is convex in ln r: the law lies above v between the ends
        err.append(np.abs(t - exact).max())
    assert err[0] < 0.5 and err[2] < 0.04
    assert 3.0 < err[0] / err[1] < 5.0 and 3.0 < err[1] / err[2] < 5.0


def _two_shell_geometry(delta, R, rm, v1, v2):
    """Uniform crust (v1) over a uniform mantle sphere (v2), surface ends: straight legs.

    A straight ray with r sin(i) / v = p passes at closest distance p v from the centre;
    between radii r_a > r_b on it the angle is acos(p v / r_a) - acos(p v / r_b) (angles
    measured from that closest point) and the length sqrt(r_a^2 - (p v)^2) -
    sqrt(r_b^2 - (p v)^2). Returns the earliest of the crustal chord and the
    ray refracted through the mantle.
    """
    def leg(p, v, r_hi, r_lo):  # angle and length between radii r_hi > r_lo on a straight line
        c = p * v
        return (math.acos(c / r_hi) - math.acos(c / r_lo),
                math.sqrt(r_hi ** 2 - c ** 2) - math.sqrt(r_lo ** 2 - c ** 2))

    def through(p):
        a1, l1 = leg(p, v1, R, rm)
        a2 = 2 * math.acos(p * v2 / rm)
        l2 = 2 * math.sqrt(rm ** 2 - (p * v2) ** 2)
        return 2 * a1 + a2, 2 * l1 / v1 + l2 / v2

    best = math.inf
    pmax = rm / v2 * (1 - 1e-15)
    if delta >= through(pmax)[0]:  # through rays reach from the grazing one to the antipode
        p = optimize.brentq(lambda q: through(q)[0] - delta, 0.0, pmax, xtol=1e-15)
        best = through(p)[1]
    if delta <= 2 * math.acos(rm / R):  # chord staying in the crust
        best = min(best, 2 * R * math.sin(delta / 2) / v1)
    return best


def test_uniform_crust_over_uniform_mantle_by_geometry():
    R, h, v1, v2 = 6371.0, 35.0, 6.0, 8.0
    m = sphere.RadialModel.build([R, R - h], [R - h, 0.0], [v1, v2], [v1, v2], [3.5, 4.6], [3.5, 4.6])
    x = np.array([50.0, 150.0, 200.0, 400.0, 1000.0, 3000.0, 8000.0])
    d = x / R
    got = sphere.travel_times(m, "P", x, distance_unit="km").time[0]
    expect = [_two_shell_geometry(di, R, R - h, v1, v2) for di in d]
    np.testing.assert_allclose(got, expect, rtol=1e-10)
    # A 35 km crust over an 8 km/s mantle: flat Pn is late by roughly 0.1 s at 200 km and
    # 0.25 s at 400 km (from memory). Flat head wave: Telford, Geldart & Sheriff, Applied
    # Geophysics, 2nd ed., 1990, ch. 4, t = x / v2 + 2 h sqrt(1/v1^2 - 1/v2^2).
    flat = x / v2 + 2 * h * math.sqrt(1 / v1 ** 2 - 1 / v2 ** 2)
    late = flat - got
    assert 0.07 < late[2] < 0.15 and 0.18 < late[3] < 0.32


@pytest.mark.parametrize("zs", [0.0, 250.0])
def test_diffraction_limit_on_a_uniform_mantle_by_geometry(zs):
    """A uniform mantle (straight rays) over a liquid core of radius rc: the last direct ray grazes
    the core at Delta_g = acos(rc / rs) + acos(rc / rr); past it the diffracted wave takes the two
    tangent legs and the arc along the boundary at the mantle velocity,
    T = (sqrt(rs^2 - rc^2) + sqrt(rr^2 - rc^2)) / v + rc (Delta - Delta_g) / v
    (circle geometry and the kinematics of a head wave, common practice). ``max_diffraction``
    counts the arc Delta - Delta_g in degrees: the wave is there up to it and absent past it."""
    R, rc, v, vs, vcore = 6000.0, 3000.0, 10.0, 5.6, 6.0
    m = sphere.RadialModel.build([R, rc], [rc, 0.0], [v, vcore], [v, vcore], [vs, 0.0], [vs, 0.0])
    rs, rr = R - zs, R
    graze = math.degrees(math.acos(rc / rs) + math.acos(rc / rr))
    legs = math.sqrt(rs ** 2 - rc ** 2) + math.sqrt(rr ** 2 - rc ** 2)
    limit = 20.0
    d = graze + np.array([-0.01, 0.01, 5.0, limit - 0.01, limit + 0.01, 40.0])
    for wave, vel in (("P", v), ("S", vs)):
        expect = (legs + rc * np.radians(d - graze)) / vel
        diff = sphere.travel_times(m, wave, d, zs, branch="diffracted", max_diffraction=limit).time[0]
        inside = (d > graze) & (d - graze <= limit)
        np.testing.assert_allclose(diff[inside], expect[inside], rtol=1e-10)
        assert np.all(np.isinf(diff[~inside]))
        unlimited = sphere.travel_times(m, wave, d, zs, branch="diffracted").time[0]
        np.testing.assert_allclose(unlimited[1:], expect[1:], rtol=1e-10)
        # direct waves: the law-of-cosines chord up to the grazing ray, none past it
        direct = sphere.travel_times(m, wave, d, zs, branch="direct").time[0]
        chord = math.sqrt(rs ** 2 + rr ** 2 - 2 * rs * rr * math.cos(math.radians(d[0])))
        assert direct[0] == pytest.approx(chord / vel, rel=1e-10) and np.all(np.isinf(direct[1:]))
        # first arrivals: the diffracted wave within the limit (or P through the core if earlier);
        # in the shadow past the limit only P through the core, S nothing
        first = sphere.travel_times(m, wave, d, zs, max_diffraction=limit).time[0]
        core = (sphere.travel_times(m, "P", d, zs, branch="PKP").time[0] if wave == "P"
                else np.full(d.size, np.inf))
        np.testing.assert_allclose(first[1:], np.minimum(np.where(inside, expect, np.inf), core)[1:], rtol=1e-10)
        if wave == "S":
            assert np.all(np.isinf(first[~inside][1:]))
    # max_diffraction = 0: the shadow starts at the grazing ray
    zero = sphere.travel_times(m, "S", d, zs, max_diffraction=0.0).time[0]
    assert np.isfinite(zero[0]) and np.all(np.isinf(zero[1:]))


# =================================================================== 3. quadrature reference
def _check(ref, arr, j, delta_deg, zs, waves, shells, stop=None, zr=0.0):
    """The engine's (p, T) at pick j reproduce Delta and T by quadrature, turning in ``shells``."""
    p = float(arr.ray_parameter[0, j])
    t = float(arr.time[0, j])
    assert np.isfinite(t), (delta_deg, arr.names()[0, j])
    res = ref.ray(p, ref.R - zs, waves, r_rec=ref.R - zr, stop=stop, up=arr.phase[0, j] == sphere.PHASE_DIRECT)
    assert res is not None
    x, tt, shell, r_turn = res
    assert shell in shells, (delta_deg, shell)
    if stop is None:
        assert x == pytest.approx(delta_deg * RAD, abs=2e-10)
        assert t == pytest.approx(tt, abs=2e-8)
        assert float(arr.deepest[0, j]) == pytest.approx(ref.R - r_turn, abs=1e-5)
    else:  # head and diffracted waves: legs to the boundary, then along it at p
        assert delta_deg * RAD >= x
        assert t == pytest.approx(tt + p * (delta_deg * RAD - x), abs=2e-8)


@pytest.mark.parametrize("zs", [0.0, 70.0, 300.0])
def test_direct_p_and_s_by_quadrature(planet, planet_ref, zs):
    ref = planet_ref
    for wave in ("P", "S"):
        waves, cmb = _waves(ref, wave)
        d = np.array([8.0, 25.0, 50.0, 80.0, 95.0])
        arr = sphere.travel_times(planet, wave, d, zs, branch="direct")
        for j, dj in enumerate(d):
            _check(ref, arr, j, dj, zs, waves, range(cmb))
            assert arr.names()[0, j] == wave
        if zs == 300.0:  # the shortest distance leaves the source upward
            assert arr.phase[0, 0] == sphere.PHASE_DIRECT


def test_receiver_at_depth_by_quadrature(planet, planet_ref):
    ref = planet_ref
    waves, cmb = _waves(ref, "P")
    d = np.array([3.0, 30.0])
    arr = sphere.travel_times(planet, "P", d, 300.0, 25.0, branch="direct")
    for j, dj in enumerate(d):
        _check(ref, arr, j, dj, 300.0, waves, range(cmb), zr=25.0)


def test_core_phases_by_quadrature(planet, planet_ref):
    ref = planet_ref
    p_waves, cmb = _waves(ref, "P")
    s_waves, _ = _waves(ref, "S", "P")
    icb = cmb + 1
    cases = [("P", "PKIKP", [125.0, 160.0, 179.0], p_waves, [icb], "PKIKP"),
             ("P", "PKPab", [165.0, 178.0], p_waves, [cmb], "PKPab"),
             ("S", "SKS", [70.0, 100.0, 130.0], s_waves, [cmb], "SKS"),
             ("S", "SKIKS", [130.0, 170.0], s_waves, [icb], "SKIKS")]
    for wave, branch, d, waves, shells, name in cases:
        for zs in (0.0, 150.0):
            arr = sphere.travel_times(planet, wave, d, zs, branch=branch)
            for j, dj in enumerate(d):
                _check(ref, arr, j, dj, zs, waves, shells)
                assert arr.names()[0, j] == name


def test_pkp_branches_by_quadrature():
    """A planet with a PKP caustic: ab (dDelta/dp > 0) and bc (dDelta/dp < 0) both found."""
    rows = _read_rows(os.path.join(DATA, "radial_synthetic_caustic.csv"))
    ref = SphereReference(rows, float(rows[0]["top_radius_km"]))
    m = sphere.read_radial_csv(os.path.join(DATA, "radial_synthetic_caustic.csv"))
    waves, cmb = _waves(ref, "P")
    d = [142.0, 146.0]  # between the caustic (about 139 deg) and the end of bc (about 149 deg)
    ab = sphere.travel_times(m, "P", d, branch="PKPab")
    bc = sphere.travel_times(m, "P", d, branch="PKPbc")
    anyp = sphere.travel_times(m, "P", d, branch="PKP")
    for j, dj in enumerate(d):
        _check(ref, ab, j, dj, 0.0, waves, [cmb, cmb + 1])
        _check(ref, bc, j, dj, 0.0, waves, [cmb, cmb + 1])
        assert ab.ray_parameter[0, j] > bc.ray_parameter[0, j]
        assert anyp.time[0, j] == min(ab.time[0, j], bc.time[0, j])
    # numerical slope of Delta(p) from the reference, on each side
    for arr, sign in ((ab, 1), (bc, -1)):
        p = float(arr.ray_parameter[0, 0])
        x1 = ref.ray(p * (1 - 1e-5), ref.R, waves)[0]
        x2 = ref.ray(p * (1 + 1e-5), ref.R, waves)[0]
        assert np.sign(x2 - x1) == sign


def test_diffracted_waves_by_quadrature(planet, planet_ref):
    ref = planet_ref
    for wave, name in (("P", "Pdiff"), ("S", "Sdiff")):
        waves, cmb = _waves(ref, wave)
        r_cmb = ref.shells[cmb]["rt"]
        for zs in (0.0, 150.0):
            d = np.array([105.0, 140.0, 180.0])
            arr = sphere.travel_times(planet, wave, d, zs, branch="diffracted")
            # p of the ray grazing the core from above
            assert arr.ray_parameter[0, 0] == pytest.approx(ref.eta(cmb - 1, r_cmb, wave), rel=1e-12)
            for j, dj in enumerate(d):
                _check(ref, arr, j, dj, zs, waves, [cmb - 1], stop=r_cmb)
                assert arr.names()[0, j] == name and arr.interface[0, j] == cmb
            # the direct branch ends where the diffracted one begins
            x_graze = ref.ray(float(arr.ray_parameter[0, 0]), ref.R - zs, waves, stop=r_cmb)[0] / RAD
            both = sphere.travel_times(planet, wave, [x_graze - 0.01, x_graze + 0.01], zs, branch="direct")
            assert np.isfinite(both.time[0, 0]) and np.isinf(both.time[0, 1])
            diff = sphere.travel_times(planet, wave, [x_graze - 0.01, x_graze + 0.01], zs, branch="diffracted")
            assert np.isinf(diff.time[0, 0]) and np.isfinite(diff.time[0, 1])


def test_earliest_root_in_triplications(planet, planet_ref):
    """Every root of Delta(p) = Delta on the branch above the core, by a fine p scan; the engine keeps the earliest."""
    ref = planet_ref
    waves, cmb = _waves(ref, "P")
    r_cmb = ref.shells[cmb]["rt"]
    p_lo, p_hi = ref.eta(cmb - 1, r_cmb, "P"), ref.eta(0, ref.R, "P")  # grazing the core .. leaving horizontally
    t = np.concatenate([np.geomspace(1e-7, 0.05, 40), np.linspace(0.05, 0.95, 200)[1:-1],
                        1 - np.geomspace(0.05, 1e-7, 40)])
    ps = p_lo + (p_hi - p_lo) * t
    xs = np.array([(ref.ray(p, ref.R, waves) or (np.nan,))[0] for p in ps])
    d = np.array([12.0, 16.0, 21.0, 27.0, 33.0])
    arr = sphere.travel_times(planet, "P", d, branch="direct")
    n_multi = 0
    for j, dj in enumerate(d):
        target = dj * RAD
        f = xs - target
        times = []
        for k in np.flatnonzero(np.isfinite(f[:-1]) & np.isfinite(f[1:]) & (np.sign(f[:-1]) != np.sign(f[1:]))):
            p = optimize.brentq(lambda q: ref.ray(q, ref.R, waves)[0] - target, ps[k], ps[k + 1], xtol=1e-15)
            x, t = ref.ray(p, ref.R, waves)[:2]
            if abs(x - target) < 1e-9:  # not a jump of Delta(p) where the turning shell changes
                times.append(t)
        n_multi += len(times) > 1
        assert arr.time[0, j] == pytest.approx(min(times), abs=1e-7)
    assert n_multi >= 2  # the distances chosen do cross triplications


def _ref_earliest(ref, waves, cmb, target, zs, n=200):
    """Earliest root of Delta(p) = target among rays turning above the core (fine p scan + brentq)."""
    r_cmb = ref.shells[cmb]["rt"]
    rs = ref.R - zs
    i_s = ref._shell_of(rs)
    p_lo = ref.eta(cmb - 1, r_cmb, waves[0])
    p_hi = min(ref.eta(i, r, waves[0]) for i in range(i_s + 1)
               for r in (ref.shells[i]["rt"], max(ref.shells[i]["rb"], rs)))
    # a uniform grid, refined geometrically on both sides of every eta at a shell boundary
    # and at the source, where Delta(p) varies fastest (turning just below them)
    edges = [ref.eta(i, r, waves[0]) for i in range(cmb) for r in (ref.shells[i]["rt"], ref.shells[i]["rb"])]
    edges.append(ref.eta(i_s, rs, waves[0]))  # rays leaving the source horizontally
    fine = np.geomspace(1e-10, 0.03, 30)
    ps = np.concatenate([np.linspace(p_lo, p_hi, n)] + [e * (1 + fine) for e in edges]
                        + [e * (1 - fine) for e in edges])
    ps = np.unique(ps[(ps > p_lo) & (ps < p_hi)])
    xs = np.array([(ref.ray(p, rs, waves) or (np.nan,))[0] for p in ps])
    best = np.inf
    f = xs - target
    for k in np.flatnonzero(np.isfinite(f[:-1]) & np.isfinite(f[1:]) & (np.sign(f[:-1]) != np.sign(f[1:]))):
        p = optimize.brentq(lambda q: ref.ray(q, rs, waves)[0] - target, ps[k], ps[k + 1], xtol=1e-15)
        x, t = ref.ray(p, rs, waves)[:2]
        if abs(x - target) < 1e-9:  # not a jump of Delta(p) where the turning shell changes
            best = min(best, t)
    return best


@pytest.mark.slow
@pytest.mark.filterwarnings("ignore::scipy.integrate.IntegrationWarning")  # quad roundoff near some turning points
@pytest.mark.parametrize("seed", range(12))
def test_random_planets_earliest_root(seed, tmp_path):
    """Random synthetic planets (both laws, velocity jumps up and down): the engine's direct
    branch equals the earliest root found by the quadrature reference, or both find none."""
    rng = np.random.default_rng(1000 + seed)
    R = 3000.0
    n = int(rng.integers(5, 9))
    z = np.sort(np.concatenate([[0.0, 1800.0], rng.uniform(10.0, 1700.0, n - 1)]))
    lines = ["shell,top_depth_km,bottom_depth_km,vp_top_km_s,vp_bottom_km_s,vs_top_km_s,vs_bottom_km_s,law"]
    v = 6.0
    for k in range(n):
        vt = v * rng.uniform(0.93, 1.15)
        vb = vt * rng.uniform(0.98, 1.25)
        v = vb
        law = "flat" if rng.random() < 0.5 else "r2"
        lines.append(f"s{k},{z[k]},{z[k + 1]},{vt},{vb},{vt / 1.75},{vb / 1.75},{law}")
    lines.append(f"core,1800,{R},7.0,8.0,0,0,r2")
    path = tmp_path / "random.csv"
    path.write_text("\n".join(lines) + "\n")
    try:
        m = sphere.read_radial_csv(path)
    except DataError:
        pytest.skip("random r2 shell with r / v not monotone")
    ref = SphereReference(_read_rows(path), R)
    waves, cmb = _waves(ref, "P")
    for zs in (0.0, 150.0):
        d = rng.uniform(3.0, 60.0, 4)
        arr = sphere.travel_times(m, "P", d, zs, branch="direct")
        for j, dj in enumerate(d):
            if arr.phase[0, j] == sphere.PHASE_DIRECT:
                continue  # straight up from the source: not a turning ray
            expect = _ref_earliest(ref, waves, cmb, dj * RAD, zs)
            if np.isinf(expect):
                assert np.isinf(arr.time[0, j])
            else:
                assert arr.time[0, j] == pytest.approx(expect, abs=1e-6), (seed, zs, dj)


# =================================================================== 4. the flat engine on the flattened model
def _flat_test_model():
    """'flat' shells with a fast lens (velocity falling with depth) for head waves; synthetic."""
    R = 6371.0
    z = [0, 20, 35, 90, 110, 400, 2891, 5150, 6371]
    vp = [(5.8, 6.0), (6.5, 6.7), (8.0, 8.05), (8.6, 8.5), (8.2, 9.0), (9.5, 13.7), (8.0, 10.3), (11.0, 11.3)]
    vs = [(3.4, 3.5), (3.8, 3.85), (4.45, 4.48), (4.8, 4.75), (4.5, 4.9), (5.2, 7.3), (0, 0), (3.5, 3.6)]
    law = ["flat"] * 6 + ["r2", "r2"]
    m = sphere.RadialModel.from_depths(z[:-1], z[1:], [a for a, _ in vp], [b for _, b in vp],
                                       [a for a, _ in vs], [b for _, b in vs], radius=R, law=law)
    # the flattened image (z_f = R ln(R / r), v_f = R v / r) of the six 'flat' shells, over a
    # half-space standing for the core: constant, slower than the mantle above, liquid
    r = R - np.array(z[:7], dtype=float)
    zf = R * np.log(R / r)
    thick = np.diff(zf)
    vpf_top = np.array([R * a / r[i] for i, (a, _) in enumerate(vp[:6])] + [R * 8.0 / r[6]])
    vpf_bot = np.array([R * b / r[i + 1] for i, (_, b) in enumerate(vp[:6])])
    vsf_top = np.array([R * a / r[i] for i, (a, _) in enumerate(vs[:6])] + [0.0])
    vsf_bot = np.array([R * b / r[i + 1] for i, (_, b) in enumerate(vs[:6])])
    gp = np.append((vpf_bot - vpf_top[:6]) / thick, 0.0)
    gs = np.append((vsf_bot - vsf_top[:6]) / thick, 0.0)
    flat = LayerModel.build(thick, vpf_top, vs=vsf_top, gradient=gp, vs_gradient=gs)
    return m, flat, R


@pytest.mark.parametrize("wave", ["P", "S"])
def test_sphere_equals_flat_engine_on_flattened_model(wave):
    m, flat, R = _flat_test_model()
    x = np.array([10.0, 60.0, 150.0, 250.0, 400.0, 700.0, 1200.0, 2000.0, 3500.0, 6000.0, 9000.0])
    for zs, zr in ((0.0, 0.0), (12.0, 0.0), (60.0, 3.0), (250.0, 0.0)):
        zsf, zrf = R * math.log(R / (R - zs)), R * math.log(R / (R - zr))
        for branch in ("direct", "first"):
            s = sphere.travel_times(m, wave, x, zs, zr, branch=branch, distance_unit="km")
            f = forward.travel_times(flat, wave, x, zsf, zrf, branch=branch)
            np.testing.assert_allclose(s.time[0], f.time[0], rtol=1e-10, err_msg=f"{branch} {zs} {zr}")
            np.testing.assert_allclose(s.ray_parameter[0] / R, f.ray_parameter[0], rtol=1e-8)
        s = sphere.travel_times(m, wave, x, zs, zr, branch="head", interface=3, distance_unit="km")
        f = forward.travel_times(flat, wave, x, zsf, zrf, branch="head", interface=3)
        np.testing.assert_allclose(s.time[0], f.time[0], rtol=1e-10)
        if zs < 90.0:
            assert np.isfinite(s.time[0, -1]) and np.all(s.interface[0][np.isfinite(s.time[0])] == 3)
            assert np.all(s.phase[0][np.isfinite(s.time[0])] == sphere.PHASE_HEAD)
        else:  # source below the boundary: no head wave
            assert np.all(np.isinf(s.time[0]))
        # boundary 2, over a shell whose v / r rises: the ray diving just beneath it, in both engines
        s = sphere.travel_times(m, wave, x, zs, zr, branch="head", interface=2, distance_unit="km")
        f = forward.travel_times(flat, wave, x, zsf, zrf, branch="head", interface=2)
        np.testing.assert_allclose(s.time[0], f.time[0], rtol=1e-10)
        ok = np.isfinite(s.time[0])
        assert ok.any() == (zs < 35.0)
        assert np.all(s.phase[0][ok] == sphere.PHASE_TURNING) and np.all(s.interface[0][ok] == 2)
        assert np.all((s.deepest[0][ok] > 35.0) & (s.deepest[0][ok] < 90.0))


def test_flatten_layers_is_the_flattened_sphere():
    """The flattening option for the flat engine against the spherical engine on the same shells."""
    R = 6371.0
    layers = LayerModel.build([20.0, 15.0], [5.8, 6.5, 8.0], vs=[3.4, 3.8, 4.5], gradient=[0.01, 0.0, 0.002])
    x = np.array([30.0, 150.0, 300.0, 600.0, 1000.0, 1500.0])
    # the same shells, the half-space carried down to 1000 km with the flattened gradient of its
    # top (d v_f / d z_f = v / r + g, so zeta = v / r grows by (v / r + g) per unit of ln r)
    rt = R - 35.0
    rb = R - 1000.0
    rows_vp, rows_vs = [], []
    for v, g, rows in ((8.0, 0.002, rows_vp), (4.5, 0.002 * 4.5 / 8.0, rows_vs)):
        zeta_b = v / rt + (v / rt + g) * math.log(rt / rb)
        rows.append((v, zeta_b * rb))
    m = sphere.RadialModel.from_depths(
        [0, 20, 35, 1000], [20, 35, 1000, R], [5.8, 6.5, 8.0, 12.0], [6.0, 6.5, rows_vp[0][1], 12.0],
        [3.4, 3.8, 4.5, 6.5], [3.4 + 0.01 * 20 * 3.4 / 5.8, 3.8, rows_vs[0][1], 6.5], radius=R,
        law=["flat", "flat", "flat", "r2"])
    for wave in ("P", "S"):
        for zs, zr in ((0.0, 0.0), (10.0, 2.0)):
            f = sphere.travel_times_flattened(layers, wave, x, zs, zr, radius=R)
            s = sphere.travel_times(m, wave, x, zs, zr, distance_unit="km")
            assert np.all(s.deepest[0] < 1000.0)
            np.testing.assert_allclose(f.time[0], s.time[0], rtol=1e-10)
            np.testing.assert_allclose(f.deepest[0], s.deepest[0], rtol=1e-7, atol=1e-6)
    # depth transformation and its inverse
    z = np.array([-1.0, 0.0, 35.0, 660.0])
    np.testing.assert_allclose(sphere.flatten_depth(z, R), R * np.log(R / (R - z)), rtol=1e-11)
    np.testing.assert_allclose(sphere.unflatten_depth(sphere.flatten_depth(z, R), R), z, rtol=1e-13, atol=1e-12)


def test_flattened_regional_times_against_the_uniform_mantle_sphere():
    """A uniform mantle is not linear in flattened coordinates: the flattened half-space keeps
    the gradient of its top, and the error stays far below a pick error regionally."""
    R = 6371.0
    layers = LayerModel.build([35.0], [6.0, 8.0], vpvs=1.75)
    x = np.array([200.0, 400.0, 1000.0, 1500.0])
    f = sphere.travel_times_flattened(layers, "P", x, radius=R).time[0]
    s = sphere.travel_times(sphere.RadialModel.from_layers(layers, R), "P", x, distance_unit="km").time[0]
    assert np.all(np.abs(f - s) < 0.005)


# =================================================================== branches, absent arrivals, batches
def test_first_is_the_earliest_branch(planet):
    d = np.linspace(0.0, 180.0, 91)
    for wave, branches in (("P", ["direct", "diffracted", "PKP", "PKIKP"]), ("S", ["direct", "diffracted"])):
        first = sphere.travel_times(planet, wave, d, 40.0)
        each = np.array([sphere.travel_times(planet, wave, d, 40.0, branch=b).time[0] for b in branches])
        np.testing.assert_allclose(first.time[0], each.min(axis=0), rtol=1e-13)
        assert np.all(np.isfinite(first.time[0]))


def test_absent_branches_are_inf(planet):
    a = sphere.travel_times(planet, "P", [60.0, 100.0], branch="PKIKP")
    assert np.isinf(a.time[0, 0]) and np.isnan(a.ray_parameter[0, 0]) and a.phase[0, 0] == sphere.PHASE_NONE
    assert a.names()[0, 0] == ""
    assert np.all(np.isinf(sphere.travel_times(planet, "S", [30.0], branch="head", interface=2).time))
    # an end in the core: no branch at all
    assert np.all(np.isinf(sphere.travel_times(planet, "P", [30.0, 120.0], 2500.0).time))
    # S cannot cross a liquid: an S source inside the outer core ... and a planet with an ocean
    ocean = sphere.RadialModel.build([1000.0, 995.0], [995.0, 0.0], [1.5, 5.0], [1.5, 5.0], [0.0, 2.9], [0.0, 2.9])
    assert np.all(np.isinf(sphere.travel_times(ocean, "S", [10.0, 90.0]).time))
    assert np.all(np.isfinite(sphere.travel_times(ocean, "S", [10.0, 90.0], 100.0, 100.0).time))
    with pytest.raises(ValueError, match="leaves the source as P"):
        sphere.travel_times(planet, "S", [10.0], branch="PKIKP")
    with pytest.raises(ValueError, match="180 degrees"):
        sphere.travel_times(planet, "P", [181.0])
    with pytest.raises(ValueError, match="base of the model"):
        sphere.travel_times(planet, "P", [10.0], 4000.0)


def test_phase_names_and_units(planet):
    d = np.array([30.0, 150.0])
    a = sphere.phase_times(planet, "PKIKP", d)
    b = sphere.travel_times(planet, "P", d * planet.radius[0] * RAD, distance_unit="km", branch="PKIKP")
    np.testing.assert_allclose(a.time, b.time, rtol=1e-12)
    assert a.names()[0, 1] == "PKIKP" and np.isinf(a.time[0, 0])
    assert a.slowness_deg[0, 1] == pytest.approx(a.ray_parameter[0, 1] * RAD)


def test_batches_and_per_model_geometry(planet):
    scale = np.array([[1.0], [1.03], [0.97]])
    big = sphere.RadialModel.build(planet.r_top, planet.r_bottom, planet.vp_top * scale, planet.vp_bottom * scale,
                                   planet.vs_top * scale, planet.vs_bottom * scale, names=planet.names,
                                   law=planet.law)
    d = np.array([[20.0, 80.0, 150.0], [25.0, 85.0, 155.0], [30.0, 90.0, 160.0]])
    zs = np.array([[0.0, 50.0, 10.0], [5.0, 0.0, 10.0], [0.0, 0.0, 300.0]])
    batch = sphere.travel_times(big, "P", d, zs)
    for k in range(3):
        one = sphere.travel_times(big.take(k), "P", d[k], zs[k])
        np.testing.assert_array_equal(batch.time[k], one.time[0])
        # velocities scaled by c: times scaled by 1 / c (same rays)
        base = sphere.travel_times(planet, "P", d[k], zs[k])
        np.testing.assert_allclose(one.time[0], base.time[0] / scale[k, 0], rtol=1e-11)


# =================================================================== 5. ak135 through ObsPy's TauP
@pytest.fixture(scope="module")
def ak135():
    """ak135 (Kennett, Engdahl & Buland, GJI 122, 1995; from memory) from the velocity nodes shipped with
    ObsPy's TauP, one shell per node interval (velocities linear in depth there; our shells use
    the default 'r2' law between the same end values)."""
    taup = pytest.importorskip("obspy.taup")
    model = taup.TauPyModel("ak135")
    vmod = model.model.s_mod.v_mod
    lay = [row for row in vmod.layers if row["bot_depth"] > row["top_depth"]]
    cols = [np.array([row[k] for row in lay]) for k in ("top_depth", "bot_depth", "top_p_velocity",
                                                         "bot_p_velocity", "top_s_velocity", "bot_s_velocity")]
    return sphere.RadialModel.from_depths(*cols, radius=vmod.radius_of_planet), model


def _taup_times(model, depth, dist, phases):
    """{phase: [(time, ray parameter s/deg), ...]} from TauP at one distance."""
    out = {}
    for arr in model.get_travel_times(depth, dist, phase_list=phases):
        out.setdefault(arr.name, []).append((arr.time, arr.ray_param_sec_degree))
    return out


@pytest.mark.parametrize("depth", [0.0, 100.0])
def test_ak135_first_p_and_direct_s_against_taup(ak135, depth):
    m, taup = ak135
    d = np.arange(10.0, 95.01, 5.0)
    p = sphere.travel_times(m, "P", d, depth).time[0]
    s = sphere.travel_times(m, "S", d, depth, branch="direct").time[0]
    tp, ts = [], []
    for x in d:
        got = _taup_times(taup, depth, x, ["P", "S"])
        tp.append(min(t for t, _ in got["P"]))
        ts.append(min(t for t, _ in got["S"]))
    assert np.abs(p - tp).max() < 0.3
    assert np.abs(s - ts).max() < 0.3


@pytest.mark.parametrize("depth", [0.0, 100.0])
def test_ak135_core_phases_against_taup(ak135, depth):
    """Within 0.5 s where both exist; branches matched by ray parameter (PKP ab/bc)."""
    m, taup = ak135
    cases = [("P", "diffracted", "Pdiff", [102.0, 120.0, 140.0]), ("S", "diffracted", "Sdiff", [102.0, 125.0]),
             ("P", "PKIKP", "PKIKP", [118.0, 140.0, 160.0, 179.0]), ("P", "PKPab", "PKP", [147.0, 160.0, 170.0]),
             ("P", "PKPbc", "PKP", [147.0, 152.0]), ("S", "SKS", "SKS", [66.0, 90.0, 120.0]),
             ("S", "SKIKS", "SKIKS", [110.0, 150.0])]
    for wave, branch, name, d in cases:
        arr = sphere.travel_times(m, wave, d, depth, branch=branch)
        for j, x in enumerate(d):
            got = _taup_times(taup, depth, x, [name]).get(name, [])
            assert got and np.isfinite(arr.time[0, j]), (branch, x)
            pj = arr.slowness_deg[0, j]
            t_ref, p_ref = min(got, key=lambda tp_: abs(tp_[1] - pj))
            assert abs(arr.time[0, j] - t_ref) < 0.5, (branch, x)
            assert abs(pj - p_ref) < 0.05, (branch, x)
    # the first P arrival beyond the mantle: Pdiff, or the core phases when the diffracted wave
    # may not travel that far along the core boundary
    for d, limit in (([110.0, 150.0], np.inf), ([150.0, 175.0], 30.0)):
        first = sphere.travel_times(m, "P", d, depth, max_diffraction=limit)
        for j, x in enumerate(d):
            got = _taup_times(taup, depth, x, ["Pdiff", "PKP", "PKIKP"])
            if limit < np.inf:
                got.pop("Pdiff", None)
            assert abs(first.time[0, j] - min(t for v in got.values() for t, _ in v)) < 0.5
        assert (first.names()[0] == "PKIKP").all() if limit < np.inf else (first.names()[0] == "Pdiff").all()


@pytest.mark.parametrize("depth", [0.0, 100.0])
def test_ak135_branch_ends_against_taup(ak135, depth):
    """Distances where branches start and end: the engine and TauP on the same side of each
    value recalled (from memory, surface source): direct P ends near 99.6 deg and direct S
    near 100 deg, then the diffracted waves; PKIKP from about 115 deg; the outer-core P
    branches from the caustic near 145 deg; SKS from about 63 deg, earlier than S beyond
    about 84 deg. Each check brackets the value by 0.6 deg (a 100 km source shifts them by
    up to 0.3 deg)."""
    m, taup = ak135

    def exists(wave, branch, name, x):
        ours = bool(np.isfinite(sphere.travel_times(m, wave, [x], depth, branch=branch).time[0, 0]))
        theirs = bool(_taup_times(taup, depth, x, [name]).get(name))
        assert ours == theirs, (branch, x)
        return ours

    shift = 0.3 if depth else 0.0
    edges = [("P", "direct", "P", 99.6, False), ("P", "diffracted", "Pdiff", 99.6, True),
             ("S", "direct", "S", 100.0, False), ("S", "diffracted", "Sdiff", 100.0, True),
             ("P", "PKIKP", "PKIKP", 115.3, True), ("P", "PKP", "PKP", 145.0, True), ("S", "SKS", "SKS", 63.0, True)]
    for wave, branch, name, edge, start in edges:
        assert exists(wave, branch, name, edge - shift - 0.6) is not start
        assert exists(wave, branch, name, edge + 0.6 - shift * (not start)) is start
    for x, earlier in ((83.7 - shift - 0.6, False), (83.7 + 0.6, True)):
        sks = sphere.travel_times(m, "S", [x], depth, branch="SKS").time[0, 0]
        s = sphere.travel_times(m, "S", [x], depth, branch="direct").time[0, 0]
        got = _taup_times(taup, depth, x, ["S", "SKS"])
        assert bool(sks < s) is earlier
        assert bool(min(t for t, _ in got["SKS"]) < min(t for t, _ in got["S"])) is earlier


def test_ak135_triplications_against_taup(ak135):
    """The first-arrival slope (ray parameter) jumps where the upper-mantle discontinuities
    bring new branches in, between about 15 and 30 deg (from memory); TauP agrees on the slope."""
    m, taup = ak135
    d = np.arange(12.0, 32.01, 0.5)
    p = sphere.travel_times(m, "P", d).slowness_deg[0]
    jumps = d[1:][np.diff(p) < -0.4]
    assert len(jumps) >= 2 and jumps.min() > 14.0 and jumps.max() < 30.0
    assert np.all(np.abs(np.diff(p)[np.diff(p) > -0.4]) < 0.35)  # smooth elsewhere
    ref = []
    for x in d:
        got = _taup_times(taup, 0.0, x, ["P"])["P"]
        ref.append(min(got)[1])
    assert np.abs(p - np.array(ref)).max() < 0.05


@pytest.mark.slow
@pytest.mark.parametrize("depth", [0.0, 35.0, 100.0, 300.0, 600.0])
def test_ak135_dense_against_taup(ak135, depth):
    """Every branch every degree where both exist: direct P and S within 0.3 s, the rest within 0.5 s."""
    m, taup = ak135
    d = np.arange(1.0, 180.0, 1.0)
    cases = [("P", "direct", ["P", "p", "Pn", "Pg"], 0.3), ("S", "direct", ["S", "s", "Sn", "Sg"], 0.3),
             ("P", "diffracted", ["Pdiff"], 0.5), ("S", "diffracted", ["Sdiff"], 0.5),
             ("P", "PKPab", ["PKP"], 0.5), ("P", "PKPbc", ["PKP"], 0.5), ("P", "PKIKP", ["PKIKP"], 0.5),
             ("S", "SKS", ["SKS"], 0.5), ("S", "SKIKS", ["SKIKS"], 0.5)]
    table = {}
    for x in d:
        table[x] = _taup_times(taup, depth, x, sorted({n for c in cases for n in c[2]}))
    for wave, branch, names, tol in cases:
        arr = sphere.travel_times(m, wave, d, depth, branch=branch)
        worst, n = 0.0, 0
        for j, x in enumerate(d):
            got = [tp for name in names for tp in table[x].get(name, [])]
            if not got or not np.isfinite(arr.time[0, j]):
                continue
            if branch in ("PKPab", "PKPbc"):  # the TauP arrival of nearest ray parameter
                t_ref = min(got, key=lambda tp: abs(tp[1] - arr.slowness_deg[0, j]))[0]
            else:
                t_ref = min(got)[0]
            worst, n = max(worst, abs(arr.time[0, j] - t_ref)), n + 1
        print(f"depth {depth:5.0f} km  {branch:10s} {wave}: {n:3d} distances, max |difference| {worst:.3f} s")
        assert n > 0 and worst < tol, (branch, worst)
