"""The engine against independent references.

1. The references themselves against closed forms (these run without the engine):
   quadrature X(p), T(p), tau(p) of tests/reference_rays.py against the closed forms of
   constant and linear-gradient layers; its root finding against the gradient half-space
   and the two-layer refraction formulas; Fermat minimisation against straight lines and
   Snell's law.
2. Fermat's principle for constant layers (minimise sum sqrt(h_i^2 + x_i^2)/v_i over the
   offsets x_i): direct rays between a buried source and borehole receivers, reflections
   and head waves, to ~1e-9 relative.
3. Quadrature + brentq reference for gradient stacks with buried sources and borehole
   receivers, every branch, to 1e-6 relative; a triplication where the engine's "direct"
   must be the earliest of several roots.
4. Splitting a gradient layer into thin constant layers converges toward the gradient
   result (loose tolerance).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

from invert.model import LayerModel
from reference_rays import Reference, constant_legs, fermat_time

FERMAT_RTOL = 1e-9
REF_RTOL = 1e-6


# =================================================================== 1. references
def _grad_closed(p, v1, v2, g):
    e1 = math.sqrt(1 - (p * v1) ** 2)
    e2 = math.sqrt(max(0.0, 1 - (p * v2) ** 2))
    X = (e1 - e2) / (g * p)
    T = math.log(v2 * (1 + e1) / (v1 * (1 + e2))) / g
    tau = ((e2 - math.log((1 + e2) / (p * v2))) - (e1 - math.log((1 + e1) / (p * v1)))) / g
    return X, T, tau


@pytest.mark.parametrize("p", [0.0, 1e-4, 7e-4, 1e-3 * (1 - 1e-8)])
def test_reference_constant_layer_integrals(p):
    r = Reference([100.0], [1000.0, 3000.0])
    c = math.sqrt((1 - p * 1000) * (1 + p * 1000))  # no cancellation near p = 1/v
    assert r.integral("X", p, 0, 100) == pytest.approx(100 * p * 1000 / c, rel=1e-12, abs=1e-300)
    assert r.integral("T", p, 0, 100) == pytest.approx(100 / (1000 * c), rel=1e-12)
    assert r.integral("tau", p, 0, 100) == pytest.approx(100 * c / 1000, rel=1e-12)
    # the half extending above the datum uses the top layer's law as well
    assert r.integral("T", p, -50, 100) == pytest.approx(150 / (1000 * c), rel=1e-12)


@pytest.mark.parametrize("g, v1, frac", [(g, v1, f) for g, v1 in [(1.0, 2000.0), (-1.0, 3000.0), (1e-3, 2000.0)]
                                          for f in (0.1, 0.6, 0.999999, 1.0) if not (g < 0 and f == 1.0)])
def test_reference_gradient_layer_integrals(g, v1, frac):
    # frac = 1: the ray turns at the base of a rising layer (a falling one has no turning point there)
    h = 1000.0
    v2 = v1 + g * h
    p = frac / max(v1, v2)
    turning = frac == 1.0
    r = Reference([h], [v1, 5000.0], [g, 0.0])
    X, T, tau = _grad_closed(p, v1, v2, g)
    assert r.integral("X", p, 0, h, turning) == pytest.approx(X, rel=1e-9)
    assert r.integral("T", p, 0, h, turning) == pytest.approx(T, rel=1e-10)
    assert r.integral("tau", p, 0, h, turning) == pytest.approx(tau, rel=1e-8, abs=1e-12)


def test_reference_gradient_half_space_roots():
    v0, g = 2000.0, 0.5
    r = Reference([], [v0], [g])
    for x in [10.0, 1000.0, 8000.0, 1e5]:
        rays = r.direct(x)
        assert len(rays) == 1 and rays[0].kind == "diving"
        y = g * x / (2 * v0)
        assert rays[0].time == pytest.approx(2 / g * math.asinh(y), rel=1e-10)
        assert rays[0].p == pytest.approx(1 / (v0 * math.sqrt(1 + y * y)), rel=1e-10)


def test_reference_two_layer_refraction_and_reflection():
    r = Reference([20.0], [1000.0, 3000.0])
    t_i = 2 * 20 * math.sqrt(8) / 3 / 1000
    assert r.critical_distance(0, 0, 1) == pytest.approx(40 / math.sqrt(8), rel=1e-12)
    assert r.head(100.0, 0, 0, 1).time == pytest.approx(100 / 3000 + t_i, rel=1e-12)
    assert r.head(14.0, 0, 0, 1) is None
    refl = r.reflection(100.0, 0.0, 0.0, 1)
    assert len(refl) == 1 and refl[0].time == pytest.approx(math.hypot(40, 100) / 1000, rel=1e-12)
    d = r.direct(100.0)
    assert len(d) == 1 and d[0].time == pytest.approx(0.1, rel=1e-15)
    first = r.first(100.0)
    assert first.kind == "head"


def test_reference_direct_between_depths_constant_layers_matches_fermat():
    # two independent methods agree: quadrature + brentq vs. Fermat minimisation
    th, v = [300.0, 500.0, 400.0], [1800.0, 2600.0, 3400.0, 5000.0]
    r = Reference(th, v)
    for zs, zr, x in [(1000.0, 50.0, 700.0), (1000.0, -30.0, 4000.0), (650.0, 250.0, 10.0)]:
        rays = r.direct(x, zs, zr)
        assert len(rays) == 1
        t_f, _ = fermat_time(constant_legs(th, v, min(zs, zr), max(zs, zr)), x)
        assert rays[0].time == pytest.approx(t_f, rel=1e-11)


def test_fermat_reproduces_snell_and_straight_lines():
    t, xs = fermat_time([(100.0, 2000.0)], 300.0)
    assert t == pytest.approx(math.hypot(100, 300) / 2000, rel=1e-15)
    t, xs = fermat_time([(100.0, 1000.0), (200.0, 2500.0), (50.0, 4000.0)], 800.0)
    assert xs.sum() == pytest.approx(800.0, rel=1e-12)
    sines = xs / np.hypot([100.0, 200.0, 50.0], xs) / np.array([1000.0, 2500.0, 4000.0])
    np.testing.assert_allclose(sines, sines[0], rtol=1e-9)  # same ray parameter in every layer
    # head wave: sin(theta_i) = v_i / v_head in every leg
    th, v = [20.0], [1000.0, 3000.0]
    t, xs = fermat_time(constant_legs(th, v, 0, 20) * 2, 100.0, v_head=3000.0)
    assert t == pytest.approx(100 / 3000 + 2 * 20 * math.sqrt(8) / 3 / 1000, rel=1e-13)


def test_reference_triplication_has_three_roots():
    r = Reference([8.0, 1.0], [4.0, 5.0, 6.0], [0.125, 1.0, 0.0625])
    for x in (30.0, 40.0):
        rays = r.direct(x)
        assert len(rays) == 3
        ps = sorted(ray.p for ray in rays)
        assert np.all(np.diff(ps) > 1e-3)  # three distinct rays
        for ray in rays:  # dT/dx = p on every sub-branch
            near = [q for q in r.direct(x + 1e-4) if abs(q.p - ray.p) < 1e-3]
            assert len(near) == 1
            assert (near[0].time - ray.time) / 1e-4 == pytest.approx(ray.p, rel=1e-3)
    assert len(r.direct(20.0)) == 1 and len(r.direct(60.0)) == 1


# ============================================================ 2. Fermat, constant layers
CONST_MODELS = {
    "increasing": ([300.0, 500.0, 400.0], [1800.0, 2600.0, 3400.0, 5000.0]),
    "lvl": ([200.0, 150.0, 400.0], [2200.0, 1500.0, 3000.0, 4200.0]),
}
# (source depth, receiver depth): buried source, borehole receivers, one above the datum
CONST_GEOMETRY = [(1000.0, 0.0), (1000.0, 50.0), (1000.0, 650.0), (1000.0, 1100.0), (1000.0, -30.0),
                  (250.0, 120.0), (120.0, 120.0)]
OFFSETS = np.array([0.0, 30.0, 400.0, 1500.0, 6000.0])


def _const_model(name):
    th, v = CONST_MODELS[name]
    return th, v, LayerModel.build(th, v, vpvs=1.8)


@pytest.mark.parametrize("name", sorted(CONST_MODELS))
def test_direct_matches_fermat(run, forward, name):
    th, v, m = _const_model(name)
    for zs, zr in CONST_GEOMETRY:
        a = run(m, "P", OFFSETS, zs, zr, branch="direct")
        legs = constant_legs(th, v, min(zs, zr), max(zs, zr))
        for i, x in enumerate(OFFSETS):
            if zs == zr:
                expected = x / Reference(th, v).velocity(zs)
            else:
                expected, _ = fermat_time(legs, x)
            assert a.time[0, i] == pytest.approx(expected, rel=FERMAT_RTOL), (name, zs, zr, x)
            assert a.branch[0, i] == forward.BRANCH_DIRECT


@pytest.mark.parametrize("name", sorted(CONST_MODELS))
def test_reflections_match_fermat(run, forward, name):
    th, v, m = _const_model(name)
    depths = np.cumsum(th)
    for zs, zr in CONST_GEOMETRY:
        for k, d in enumerate(depths, start=1):
            a = run(m, "P", OFFSETS, zs, zr, branch="reflection", interface=k)
            if max(zs, zr) >= d:
                continue  # underside reflections are not computed
            legs = constant_legs(th, v, min(zs, zr), d) + constant_legs(th, v, max(zs, zr), d)
            for i, x in enumerate(OFFSETS):
                expected, _ = fermat_time(legs, x)
                assert a.time[0, i] == pytest.approx(expected, rel=FERMAT_RTOL), (name, zs, zr, k, x)
                assert a.branch[0, i] == forward.BRANCH_REFLECTION and a.interface[0, i] == k


@pytest.mark.parametrize("name", sorted(CONST_MODELS))
def test_head_waves_match_fermat(run, forward, name):
    th, v, m = _const_model(name)
    depths = np.cumsum(th)
    ref = Reference(th, v)
    for zs, zr in CONST_GEOMETRY:
        for k, d in enumerate(depths, start=1):
            if max(zs, zr) >= d:
                continue
            a = run(m, "P", OFFSETS, zs, zr, branch="head", interface=k)
            possible = v[k] > max(ref.v[ref.layer_of(min(zs, zr)):k])
            xc = ref.critical_distance(zs, zr, k) if possible else np.inf
            legs = constant_legs(th, v, min(zs, zr), d) + constant_legs(th, v, max(zs, zr), d)
            for i, x in enumerate(OFFSETS):
                if not x > xc * (1 + 1e-9):
                    if x < xc * (1 - 1e-9) or not possible:
                        assert np.isinf(a.time[0, i]), (name, zs, zr, k, x)
                    continue
                expected, offs = fermat_time(legs, x, v_head=v[k])
                assert x - offs.sum() > 0
                assert a.time[0, i] == pytest.approx(expected, rel=FERMAT_RTOL), (name, zs, zr, k, x)
                assert a.branch[0, i] == forward.BRANCH_HEAD and a.interface[0, i] == k


def _fermat_arrivals(th, v, zs, zr, x):
    """(time, kind, interface) of every branch by Fermat minimisation (constant layers)."""
    ref = Reference(th, v)
    zu, zd = min(zs, zr), max(zs, zr)
    if zs == zr:
        out = [(x / ref.velocity(zs), "direct", 0)]
    else:
        out = [(fermat_time(constant_legs(th, v, zu, zd), x)[0], "direct", 0)]
    for k, d in enumerate(np.cumsum(th), start=1):
        if zd >= d:
            continue
        legs = constant_legs(th, v, zu, d) + constant_legs(th, v, zd, d)
        out.append((fermat_time(legs, x)[0], "reflection", k))
        if v[k] > max(ref.v[ref.layer_of(zu):k]):
            t, offs = fermat_time(legs, x, v_head=v[k])
            if x - offs.sum() >= 0:
                out.append((t, "head", k))
    return sorted(out)


@pytest.mark.parametrize("name", sorted(CONST_MODELS))
def test_first_arrival_is_least_fermat_time(run, forward, name):
    th, v, m = _const_model(name)
    codes = {"direct": forward.BRANCH_DIRECT, "head": forward.BRANCH_HEAD,
             "reflection": forward.BRANCH_REFLECTION}
    for zs, zr in CONST_GEOMETRY:
        a = run(m, "P", OFFSETS, zs, zr)
        for i, x in enumerate(OFFSETS):
            arrivals = _fermat_arrivals(th, v, zs, zr, x)
            t, kind, k = arrivals[0]
            assert a.time[0, i] == pytest.approx(t, rel=FERMAT_RTOL), (name, zs, zr, x, arrivals[:2])
            if len(arrivals) == 1 or arrivals[1][0] > t * (1 + 1e-9):  # not a tie
                assert a.branch[0, i] == codes[kind] and a.interface[0, i] == k, (name, zs, zr, x, arrivals[:2])


# ======================================================= 3. quadrature reference, gradients
# km and km/s. (thickness, vp, gradient)
GRAD_MODELS = {
    # gradient layers over a constant half-space (head wave along interface 2 well defined)
    "G1": ([1.0, 2.0], [2.0, 3.0, 4.5], [0.5, 0.25, 0.0]),
    # constant layer 2 below a gradient layer (head along interface 1), gradient half-space
    "G2": ([0.8, 1.5], [2.5, 3.2, 5.0], [0.6, 0.0, 0.08]),
    # a low-velocity gradient layer, a falling-velocity layer and a gradient half-space
    "G3": ([1.0, 1.0, 0.5], [3.0, 2.5, 4.0, 4.2], [0.4, 0.3, -0.5, 0.1]),
}
GRAD_GEOMETRY = [(0.0, 0.0), (0.5, -0.1), (1.7, 0.3), (1.7, 1.2), (2.6, 0.0), (0.3, 0.3)]
GRAD_OFFSETS = [0.0, 0.2, 1.0, 3.0, 7.5, 20.0]  # (G3: 8.0 is exactly the grazing limit of layer 1)

_REFS: dict = {}


def _grad_ref(name):
    if name not in _REFS:
        th, v, g = GRAD_MODELS[name]
        _REFS[name] = Reference(th, v, g, n_scan=150)
    return _REFS[name]


def _grad_model(name):
    th, v, g = GRAD_MODELS[name]
    return LayerModel.build(th, v, vpvs=1.8, gradient=g)


def _check(engine_t, engine_p, ray, what):
    if ray is None:
        assert np.isinf(engine_t), (what, engine_t)
        assert np.isnan(engine_p), what
    else:
        assert engine_t == pytest.approx(ray.time, rel=REF_RTOL, abs=1e-300), (what, ray)
        if not math.isnan(ray.p):  # coincident ends: any ray parameter
            assert engine_p == pytest.approx(ray.p, rel=REF_RTOL, abs=1e-12), (what, ray)


@pytest.mark.parametrize("name", sorted(GRAD_MODELS))
def test_gradient_direct_matches_reference(run, forward, name):
    ref, m = _grad_ref(name), _grad_model(name)
    x = np.array(GRAD_OFFSETS)
    for zs, zr in GRAD_GEOMETRY:
        a = run(m, "P", x, zs, zr, branch="direct")
        for i, xi in enumerate(x):
            rays = ref.direct(xi, zs, zr)
            _check(a.time[0, i], a.ray_parameter[0, i], rays[0] if rays else None, (name, zs, zr, xi, "direct"))
            if rays:
                code = forward.BRANCH_DIRECT if rays[0].kind == "direct" else forward.BRANCH_DIVING
                assert a.branch[0, i] == code, (name, zs, zr, xi, rays[0])


@pytest.mark.parametrize("name", sorted(GRAD_MODELS))
def test_gradient_reflections_match_reference(run, forward, name):
    ref, m = _grad_ref(name), _grad_model(name)
    x = np.array(GRAD_OFFSETS)
    for zs, zr in GRAD_GEOMETRY:
        for k in range(1, ref.n_interfaces + 1):
            if max(zs, zr) >= ref.bottoms[k - 1]:
                continue
            a = run(m, "P", x, zs, zr, branch="reflection", interface=k)
            for i, xi in enumerate(x):
                rays = ref.reflection(xi, zs, zr, k)
                assert len(rays) <= 1
                _check(a.time[0, i], a.ray_parameter[0, i], rays[0] if rays else None, (name, zs, zr, xi, k))


@pytest.mark.parametrize("name", sorted(GRAD_MODELS))
def test_gradient_head_waves_match_reference(run, forward, name):
    ref, m = _grad_ref(name), _grad_model(name)
    x = np.array(GRAD_OFFSETS)
    for zs, zr in GRAD_GEOMETRY:
        for k in range(1, ref.n_interfaces + 1):
            if max(zs, zr) >= ref.bottoms[k - 1] or ref.g[k] > 0:
                continue  # a rising refractor turns the head wave into diving rays
            a = run(m, "P", x, zs, zr, branch="head", interface=k)
            for i, xi in enumerate(x):
                ray = ref.head(xi, zs, zr, k)
                if ray is not None and abs(xi / ref.critical_distance(zs, zr, k) - 1) < 1e-9:
                    continue
                _check(a.time[0, i], a.ray_parameter[0, i], ray, (name, zs, zr, xi, k))


@pytest.mark.parametrize("name", sorted(GRAD_MODELS))
def test_gradient_first_arrival_matches_reference(run, forward, name):
    ref, m = _grad_ref(name), _grad_model(name)
    x = np.array(GRAD_OFFSETS)
    codes = {"direct": forward.BRANCH_DIRECT, "diving": forward.BRANCH_DIVING,
             "head": forward.BRANCH_HEAD, "reflection": forward.BRANCH_REFLECTION}
    for zs, zr in GRAD_GEOMETRY:
        a = run(m, "P", x, zs, zr)
        for i, xi in enumerate(x):
            ray = ref.first(xi, zs, zr)
            _check(a.time[0, i], a.ray_parameter[0, i], ray, (name, zs, zr, xi, "first"))
            if ray is not None:
                assert a.branch[0, i] == codes[ray.kind], (name, zs, zr, xi, ray)
                assert a.interface[0, i] == ray.interface


def test_s_waves_match_reference(run):
    th, v, g = GRAD_MODELS["G1"]
    m = LayerModel.build(th, v, vpvs=[1.9, 1.75, 1.7], gradient=g)
    top, grad = m.velocity("S")
    ref = Reference(th, top[0], grad[0], n_scan=150)
    x = np.array([0.5, 4.0, 15.0])
    for zs, zr in [(0.0, 0.0), (1.7, 0.3)]:
        a = run(m, "S", x, zs, zr)
        for i, xi in enumerate(x):
            ray = ref.first(xi, zs, zr)
            assert a.time[0, i] == pytest.approx(ray.time, rel=REF_RTOL)


# Triplication: v = 4 + 0.125 z over 8 km (4 -> 5 km/s), a 1 km high-gradient zone 5 -> 6 km/s,
# then 6 + 0.0625 z. The diving branch X(p) folds back: between x ~ 25.1 and 48 km there are
# three rays (checked on the reference above); "direct" must be the earliest.
TRIP = ([8.0, 1.0], [4.0, 5.0, 6.0], [0.125, 1.0, 0.0625])


def test_triplication_direct_is_earliest_root(run, forward):
    th, v, g = TRIP
    ref = Reference(th, v, g, n_scan=400)
    m = LayerModel.build(th, v, vpvs=1.8, gradient=g)
    cases = [(0.0, 0.0, x) for x in (20.0, 27.0, 30.0, 35.0, 40.0, 45.0, 47.0, 60.0)]
    cases += [(2.0, 0.0, x) for x in (28.0, 38.0)] + [(3.0, 1.5, x) for x in (30.0, 40.0)]
    n_multi = 0
    for zs, zr, x in cases:
        rays = ref.direct(x, zs, zr)
        n_multi += len(rays) >= 3
        a = run(m, "P", [x], zs, zr, branch="direct")
        assert a.time[0, 0] == pytest.approx(rays[0].time, rel=REF_RTOL), (zs, zr, x, rays)
        assert a.ray_parameter[0, 0] == pytest.approx(rays[0].p, rel=REF_RTOL), (zs, zr, x, rays)
        assert a.branch[0, 0] == forward.BRANCH_DIVING
        f = run(m, "P", [x], zs, zr)
        assert f.time[0, 0] == pytest.approx(ref.first(x, zs, zr).time, rel=REF_RTOL)
    assert n_multi >= 6  # the test really exercises several roots


# =============================================== 4. thin constant layers -> gradient layer
def test_thin_layer_staircase_converges_to_gradient(run):
    # gradient layer 2 km thick, v = 2 + z (2 -> 4 km/s), over a 4.5 km/s half-space
    x = np.array([1.0, 3.0, 6.0, 12.0])
    grad = LayerModel.build([2.0], [2.0, 4.5], vpvs=1.8, gradient=[1.0, 0.0])
    target = run(grad, "P", x).time[0]
    errors = []
    for n in (5, 20, 80, 320):
        z = np.linspace(0.0, 2.0, n + 1)
        mid = 2.0 + 0.5 * (z[:-1] + z[1:])  # velocity at the middle of each thin layer
        stair = LayerModel.build(np.diff(z), np.append(mid, 4.5), vpvs=1.8)
        t = run(stair, "P", x).time[0]
        errors.append(np.max(np.abs(t / target - 1)))
    assert all(b < a for a, b in zip(errors, errors[1:])), errors
    assert errors[-1] < 2e-3, errors


# ================================================ 5. an end exactly on an interface
def test_end_exactly_on_an_interface_is_the_limit_from_either_side(run):
    # h = 1 km, v1 = 1.5 over v2 = 2 km/s; source on the interface, receiver at the surface, x = 2 km.
    # Least time (Fermat with a leg along the interface): leave along the interface at v2, climb at
    # the critical angle: T = x/v2 + h sqrt(1/v1^2 - 1/v2^2) = 1 + sqrt(0.444444 - 0.25) = 1.440959 s
    # (critical distance h tan(theta_c) = 0.75 / 0.661438 = 1.1339 km < 2 km); the straight line
    # sqrt(1 + 4) / 1.5 = 1.490712 s is slower. The first arrival is continuous in the source depth
    # (Fermat), so the value on the interface is the limit from just above and just below.
    m = LayerModel.build([1.0], [1.5, 2.0], vpvs=2.0)
    expected, _ = fermat_time([(1.0, 1.5)], 2.0, v_head=2.0)
    assert expected == pytest.approx(1.440958551844098, rel=1e-12)
    for zs in (1.0 - 1e-9, 1.0 + 1e-9):
        assert run(m, "P", [2.0], zs, 0.0).time[0, 0] == pytest.approx(expected, rel=1e-8), zs
    on = run(m, "P", [2.0, 2.0], [1.0, 0.0], [0.0, 1.0])  # source on it; receiver on it
    np.testing.assert_allclose(on.time[0], expected, rtol=1e-8)
