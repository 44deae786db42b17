"""Textbook checks of the travel-time engine with worked numbers.

Refraction formulas (intercept time, crossover and critical distances, hidden layer,
low-velocity layer): Telford, Geldart & Sheriff, Applied Geophysics, 2nd ed. (1990), ch. 4;
Kearey, Brooks & Hill, An Introduction to Geophysical Exploration, 3rd ed. (2002), ch. 5
(formulas from memory; every worked number below is recomputed in the comments).
Linear-gradient half-space: Shearer, Introduction to Seismology, 2nd ed. (2009), ch. 4
(T = (2/g) asinh(g x / 2 v0) for a surface source and receiver; quoted from memory and
re-derived below from the closed-form X(p), T(p) of a linear-gradient layer).

Units: metres and m/s unless stated. The engine is imported lazily (``run`` fixture), so
this module imports cleanly without it.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize

from invert.model import LayerModel

RTOL = 1e-9


def _codes(forward):
    return forward.BRANCH_NONE, forward.BRANCH_DIRECT, forward.BRANCH_DIVING, forward.BRANCH_HEAD, \
        forward.BRANCH_REFLECTION


# --------------------------------------------------------- closed forms
def grad_layer(p, v1, v2, g):
    """Closed-form one-way X, T, tau through a linear-gradient layer from v1 to v2 (g != 0).

    With dz = dv/g and eta = sqrt(1 - p^2 v^2):
        X   = (eta1 - eta2) / (g p)
        T   = ln( v2 (1 + eta1) / (v1 (1 + eta2)) ) / g
        tau = [eta - ln((1 + eta) / (p v))]_{v1}^{v2} / g        (T = p X + tau)
    """
    e1 = math.sqrt(1 - (p * v1) ** 2)
    e2 = math.sqrt(max(0.0, 1 - (p * v2) ** 2))
    X = (e1 - e2) / (g * p)
    T = math.log(v2 * (1 + e1) / (v1 * (1 + e2))) / g
    tau = ((e2 - math.log((1 + e2) / (p * v2))) - (e1 - math.log((1 + e1) / (p * v1)))) / g
    return X, T, tau


# ======================================================= two-layer refraction
# Telford et al. 1990 ch. 4 / Kearey et al. 2002 ch. 5 (from memory). Worked example: h = 20 m, v1 = 1000 m/s over v2 = 3000 m/s.
#   sin(theta_c) = v1/v2 = 1/3, cos(theta_c) = sqrt(8)/3 = 0.9428090, tan(theta_c) = 1/sqrt(8) = 0.3535534
#   intercept   t_i = 2 h cos(theta_c) / v1 = 40 * 0.9428090 / 1000 = 0.03771236 s
#   critical    x_crit = 2 h tan(theta_c) = 40 * 0.3535534 = 14.14214 m
#   crossover   x_c = 2 h sqrt((v2 + v1)/(v2 - v1)) = 40 * sqrt(4000/2000) = 56.56854 m
#   check:      x_c / v1 = 0.05656854 s = x_c / v2 + t_i = 0.01885618 + 0.03771236 s
H, V1, V2 = 20.0, 1000.0, 3000.0
T_I = 0.03771236166328254
X_CRIT = 14.142135623730951
X_CROSS = 56.568542494923804


def _two_layer():
    return LayerModel.build([H], [V1, V2], vpvs=2.0)


def test_two_layer_worked_numbers_are_consistent():
    assert T_I == pytest.approx(2 * H * math.sqrt(1 - (V1 / V2) ** 2) / V1, rel=1e-15)
    assert X_CRIT == pytest.approx(2 * H * (V1 / V2) / math.sqrt(1 - (V1 / V2) ** 2), rel=1e-15)
    assert X_CROSS == pytest.approx(2 * H * math.sqrt((V2 + V1) / (V2 - V1)), rel=1e-15)
    assert X_CROSS / V1 == pytest.approx(X_CROSS / V2 + T_I, rel=1e-15)


def test_two_layer_head_wave_intercept(run, forward):
    x = np.array([15.0, 56.0, 100.0, 1000.0])
    a = run(_two_layer(), "P", x, branch="head", interface=1)
    # e.g. x = 100 m: 100/3000 + 0.03771236 = 0.03333333 + 0.03771236 = 0.07104569 s
    np.testing.assert_allclose(a.time[0], x / V2 + T_I, rtol=RTOL)
    np.testing.assert_allclose(a.ray_parameter[0], 1 / V2, rtol=RTOL)
    assert np.all(a.branch[0] == forward.BRANCH_HEAD)
    assert np.all(a.interface[0] == 1)


def test_head_wave_absent_before_critical_distance(run, forward):
    x = np.array([0.0, 1.0, 10.0, 14.0, X_CRIT * (1 - 1e-6)])
    a = run(_two_layer(), "P", x, branch="head", interface=1)
    assert np.all(np.isinf(a.time)), a.time
    assert np.all(np.isnan(a.ray_parameter))
    assert np.all(a.branch == forward.BRANCH_NONE)
    # ... and present just beyond it, where it coincides with the critical reflection
    xb = np.array([X_CRIT * (1 + 1e-6), 14.2, 20.0])
    b = run(_two_layer(), "P", xb, branch="head", interface=1)
    np.testing.assert_allclose(b.time[0], xb / V2 + T_I, rtol=RTOL)
    r = run(_two_layer(), "P", xb[:1], branch="reflection", interface=1)
    # at x_crit: reflection sqrt(40^2 + 14.142^2)/1000 = 42.4264/1000 = 0.04242641 s = head time
    assert r.time[0, 0] == pytest.approx(b.time[0, 0], rel=1e-6)
    assert r.time[0, 0] == pytest.approx(math.hypot(2 * H, X_CRIT) / V1, rel=1e-6)


def test_two_layer_crossover_first_arrivals(run, forward):
    x = np.array([1.0, 30.0, 56.0, X_CROSS * (1 - 1e-6), X_CROSS * (1 + 1e-6), 57.0, 200.0])
    a = run(_two_layer(), "P", x)
    expected = np.minimum(x / V1, x / V2 + T_I)
    np.testing.assert_allclose(a.time[0], expected, rtol=RTOL)
    before = x < X_CROSS
    assert np.all(a.branch[0][before] == forward.BRANCH_DIRECT)
    assert np.all(a.branch[0][~before] == forward.BRANCH_HEAD)
    np.testing.assert_allclose(a.ray_parameter[0][before], 1 / V1, rtol=RTOL)
    np.testing.assert_allclose(a.ray_parameter[0][~before], 1 / V2, rtol=RTOL)
    # the direct branch itself keeps going past the crossover
    d = run(_two_layer(), "P", x, branch="direct")
    np.testing.assert_allclose(d.time[0], x / V1, rtol=RTOL)


# ===================================================== multilayer refraction
# Telford et al. 1990 ch. 4 (multilayer intercept times, from memory). v = 1000 / 2000 / 4000 m/s, h1 = 10 m, h2 = 20 m; t_i = 2 sum h_j cos(theta_j) / v_j.
#   interface 1 (p = 1/2000): cos(theta_1) = sqrt(1 - 1/4) = 0.8660254
#       t_i1 = 2 * 10 * 0.8660254 / 1000 = 0.01732051 s
#   interface 2 (p = 1/4000): cos(theta_1) = sqrt(1 - 1/16) = 0.9682458, cos(theta_2) = sqrt(1 - 1/4) = 0.8660254
#       t_i2 = 2 * (10 * 0.9682458 / 1000 + 20 * 0.8660254 / 2000) = 2 * (0.00968246 + 0.00866025) = 0.03668542 s
#   critical distance of interface 2: 2 (10 tan(theta_1) + 20 tan(theta_2))
#       = 2 (10 * 0.2581989 + 20 * 0.5773503) = 2 (2.581989 + 11.547005) = 28.25799 m
#   crossovers: direct/head1 at 2 h1 sqrt(3000/1000) = 34.64102 m;
#               head1/head2 at (t_i2 - t_i1) / (1/2000 - 1/4000) = 0.01936492 * 4000 = 77.45967 m
ML_H = [10.0, 20.0]
ML_V = [1000.0, 2000.0, 4000.0]
T_I1 = 0.017320508075688773
T_I2 = 0.036685424806725854


def test_multilayer_worked_numbers_are_consistent():
    p1, p2 = 1 / 2000, 1 / 4000
    assert T_I1 == pytest.approx(2 * 10 * math.sqrt(1 - (p1 * 1000) ** 2) / 1000, rel=1e-14)
    t2 = 2 * (10 * math.sqrt(1 - (p2 * 1000) ** 2) / 1000 + 20 * math.sqrt(1 - (p2 * 2000) ** 2) / 2000)
    assert T_I2 == pytest.approx(t2, rel=1e-14)


def test_multilayer_intercepts_and_first_arrivals(run, forward):
    m = LayerModel.build(ML_H, ML_V, vpvs=1.9)
    x = np.array([30.0, 100.0, 500.0])
    h1 = run(m, "P", x, branch="head", interface=1)
    h2 = run(m, "P", x, branch="head", interface=2)
    np.testing.assert_allclose(h1.time[0], x / 2000 + T_I1, rtol=RTOL)
    np.testing.assert_allclose(h2.time[0], x / 4000 + T_I2, rtol=RTOL)
    assert np.all(h2.interface[0] == 2)
    # interface 2 head wave: absent at 28.2 m, present at 28.3 m (critical distance 28.25799 m)
    c = run(m, "P", [28.2, 28.3], branch="head", interface=2)
    assert np.isinf(c.time[0, 0]) and np.isfinite(c.time[0, 1])
    # first arrivals: direct < 34.64 m < head 1 < 77.46 m < head 2
    xs = np.array([20.0, 34.0, 35.0, 77.0, 78.0, 300.0])
    f = run(m, "P", xs)
    expected = np.minimum.reduce([xs / 1000, xs / 2000 + T_I1, xs / 4000 + T_I2])
    np.testing.assert_allclose(f.time[0], expected, rtol=RTOL)
    D, H_ = forward.BRANCH_DIRECT, forward.BRANCH_HEAD
    assert list(f.branch[0]) == [D, D, H_, H_, H_, H_]
    assert list(f.interface[0]) == [0, 0, 1, 1, 2, 2]


# ============================================================ hidden layer
# Hidden layer: Kearey et al. 2002 ch. 5; Telford et al. 1990 ch. 4 (from memory). v1 = 1000 (h 20 m), v2 = 1500 (h 5 m, thin), v3 = 3000 m/s.
#   t_i1 (top of the thin layer, p = 1/1500): 2 * 20 * sqrt(1 - (2/3)^2) / 1000 = 40 * 0.745356 / 1000 = 0.02981424 s
#   t_i2 (top of v3, p = 1/3000): 2 * (20 * sqrt(1 - 1/9) / 1000 + 5 * sqrt(1 - 1/4) / 1500)
#        = 2 * (0.01885618 + 0.00288675) = 0.04348587 s
#   direct = head(v3) at x = t_i2 / (1/1000 - 1/3000) = 0.04348587 * 1500 = 65.2288 m; there the thin
#   layer's head wave arrives at 65.2288/1500 + 0.02981424 = 0.0733 s > 0.0652 s, and beyond it its slope
#   1/1500 exceeds 1/3000: the thin layer is never a first arrival (a hidden layer).
#   Interpreting direct + head(v3) as two layers: h = t_i2 v1 v3 / (2 sqrt(v3^2 - v1^2))
#        = 0.04348587 * 3e6 / (2 * 2828.427) = 23.062 m < 25 m true depth: the refractor looks shallower.
def test_hidden_layer(run, forward):
    m = LayerModel.build([20.0, 5.0], [1000.0, 1500.0, 3000.0], vpvs=2.0)
    thin = run(m, "P", [100.0], branch="head", interface=1)
    assert thin.time[0, 0] == pytest.approx(100 / 1500 + 0.029814239699997195, rel=RTOL)  # it exists...
    xs = np.linspace(0.5, 600.0, 1200)
    f = run(m, "P", xs)
    assert not np.any(f.interface[0] == 1), "the thin layer should never be a first arrival"  # ...never first
    t_i2 = 2 * (20 * math.sqrt(1 - 1 / 9) / 1000 + 5 * math.sqrt(1 - 1 / 4) / 1500)
    np.testing.assert_allclose(f.time[0], np.minimum(xs / 1000, xs / 3000 + t_i2), rtol=RTOL)
    # two-layer interpretation of the engine's own first arrivals
    far = run(m, "P", [400.0, 600.0]).time[0]
    slope = (far[1] - far[0]) / 200.0
    intercept = far[0] - 400.0 * slope
    near = run(m, "P", [10.0]).time[0, 0]
    v1, v3 = 10.0 / near, 1 / slope
    assert v3 == pytest.approx(3000.0, rel=1e-9)
    h_apparent = intercept * v1 * v3 / (2 * math.sqrt(v3**2 - v1**2))
    assert h_apparent == pytest.approx(23.0619, abs=1e-3)
    assert h_apparent < 25.0


# ====================================================== low-velocity layer
# Low-velocity layer: Kearey et al. 2002 ch. 5; Telford et al. 1990 ch. 4 (from memory). v1 = 1500 (h 20 m), v2 = 1000 (h 10 m, LVL), v3 = 3000 m/s.
#   No head wave at interface 1 (v2 < v1).
#   t_i (top of v3, p = 1/3000): 2 * (20 * sqrt(1 - 1/4) / 1500 + 10 * sqrt(1 - 1/9) / 1000)
#        = 2 * (0.01154701 + 0.00942809) = 0.04195020 s
#   Two-layer interpretation (v1 = 1500 over 3000): h = t_i v1 v3 / (2 sqrt(v3^2 - v1^2))
#        = 0.04195020 * 4.5e6 / (2 * 2598.076) = 36.330 m > 30 m true depth: the refractor looks deeper.
def test_low_velocity_layer(run, forward):
    m = LayerModel.build([20.0, 10.0], [1500.0, 1000.0, 3000.0], vpvs=2.0)
    none = run(m, "P", [10.0, 100.0, 1000.0, 1e5], branch="head", interface=1)
    assert np.all(np.isinf(none.time)) and np.all(none.branch == forward.BRANCH_NONE)
    t_i = 2 * (20 * math.sqrt(1 - 1 / 4) / 1500 + 10 * math.sqrt(1 - 1 / 9) / 1000)
    assert t_i == pytest.approx(0.0419502, abs=1e-7)
    xs = np.array([200.0, 300.0, 1000.0])
    h = run(m, "P", xs, branch="head", interface=2)
    np.testing.assert_allclose(h.time[0], xs / 3000 + t_i, rtol=RTOL)  # 200 m: 0.0666667 + 0.0419502 = 0.1086169 s
    f = run(m, "P", xs)
    np.testing.assert_allclose(f.time[0], xs / 3000 + t_i, rtol=RTOL)
    assert np.all(f.interface[0] == 2)
    h_apparent = t_i * 1500 * 3000 / (2 * math.sqrt(3000**2 - 1500**2))
    assert h_apparent == pytest.approx(36.330, abs=1e-3)
    assert h_apparent > 30.0


# ================================================== linear-gradient half-space
# Shearer, Introduction to Seismology, 2nd ed. 2009, ch. 4 (from memory). v(z) = v0 + g z, surface source and receiver: X(p) = 2 sqrt(1 - p^2 v0^2) / (g p), and
# T = (2/g) asinh(g x / (2 v0)), p = 1 / (v0 sqrt(1 + (g x / 2 v0)^2)).
# Worked: v0 = 2000 m/s, g = 0.5 /s, x = 8000 m: g x / (2 v0) = 1, T = 4 asinh(1) = 4 * 0.8813736 = 3.525494 s
# (straight line along the surface: 8000/2000 = 4 s), p = 1 / (2000 sqrt 2) = 3.535534e-4 s/m.
def _gradient_closed_form(x, v0, g):
    y = g * x / (2 * v0)
    return 2 / g * np.arcsinh(y), 1 / (v0 * np.sqrt(1 + y * y))


def test_gradient_half_space_worked_number(run, forward):
    m = LayerModel.build([], [2000.0], vpvs=1.8, gradient=[0.5])
    a = run(m, "P", [8000.0])
    assert a.time[0, 0] == pytest.approx(3.525494, abs=1e-6)
    assert a.time[0, 0] == pytest.approx(4 * math.asinh(1.0), rel=RTOL)
    assert a.ray_parameter[0, 0] == pytest.approx(1 / (2000 * math.sqrt(2)), rel=RTOL)
    assert a.branch[0, 0] == forward.BRANCH_DIVING


@pytest.mark.parametrize("rel_gradient", [1e-1, 1e-3, 1e-6, 1e-9, 1e-12, 1e-15, 1e-18])
def test_gradient_half_space_including_g_to_zero(run, rel_gradient):
    # g chosen so that g * x_max / v0 = rel_gradient (x_max = 10 km)
    v0, xs = 2000.0, np.array([1.0, 100.0, 3000.0, 10000.0])
    g = rel_gradient * v0 / 10000.0
    m = LayerModel.build([], [v0], vpvs=1.8, gradient=[g])
    a = run(m, "P", xs)
    t, p = _gradient_closed_form(xs, v0, g)
    np.testing.assert_allclose(a.time[0], t, rtol=RTOL)
    np.testing.assert_allclose(a.ray_parameter[0], p, rtol=1e-8)
    d = run(m, "P", xs, branch="direct")
    np.testing.assert_allclose(d.time[0], t, rtol=RTOL)


def test_gradient_half_space_closed_form_from_integrals():
    # asinh form re-derived from X(p), T(p) of grad_layer with turning (v2 = 1/p)
    v0, g, x = 2000.0, 0.5, 8000.0
    p = 1 / (2000 * math.sqrt(2))
    X, T, tau = grad_layer(p, v0, 1 / p, g)
    assert 2 * X == pytest.approx(x, rel=1e-13)
    assert 2 * T == pytest.approx(4 * math.asinh(1.0), rel=1e-13)
    assert T == pytest.approx(p * X + tau, rel=1e-13)


def test_zero_gradient_is_the_constant_half_space(run, forward):
    m = LayerModel.build([], [2000.0], vpvs=1.8, gradient=[0.0])
    xs = np.array([1.0, 100.0, 10000.0])
    a = run(m, "P", xs)
    np.testing.assert_allclose(a.time[0], xs / 2000.0, rtol=1e-12)
    assert np.all(a.branch[0] == forward.BRANCH_DIRECT)


def test_gradient_source_above_datum_and_buried(run):
    # top layer extends above the datum: the same half-space seen from z0 = -500 m (v = 1750)
    # must give the surface formula with v0 = 1750 when both ends sit at -500 m.
    m = LayerModel.build([], [2000.0], vpvs=1.8, gradient=[0.5])
    xs = np.array([500.0, 8000.0])
    a = run(m, "P", xs, zs=-500.0, zr=-500.0)
    t, _ = _gradient_closed_form(xs, 1750.0, 0.5)
    np.testing.assert_allclose(a.time[0], t, rtol=RTOL)


# ======================================================== reflection hyperbola
# t^2 = t0^2 + x^2/v^2 (common practice); image-source geometry for buried ends (common practice).
# One layer h = 100 m, v = 2000 m/s: t0 = 2h/v = 0.1 s, t^2 = t0^2 + x^2/v^2;
# x = 300 m: t^2 = 0.01 + 0.0225 = 0.0325, t = 0.1802776 s; p = x / (v^2 t) = 300 / (4e6 * 0.1802776) = 4.160251e-4 s/m.
def test_reflection_hyperbola(run, forward):
    m = LayerModel.build([100.0], [2000.0, 3500.0], vpvs=1.8)
    xs = np.array([0.0, 10.0, 300.0, 1000.0, 5000.0])
    a = run(m, "P", xs, branch="reflection", interface=1)
    t = np.sqrt(0.1**2 + xs**2 / 2000.0**2)
    np.testing.assert_allclose(a.time[0], t, rtol=RTOL)
    assert a.time[0, 2] == pytest.approx(0.1802776, abs=1e-7)
    np.testing.assert_allclose(a.ray_parameter[0], xs / (2000.0**2 * t), rtol=1e-8, atol=1e-15)
    assert np.all(a.branch[0] == forward.BRANCH_REFLECTION) and np.all(a.interface[0] == 1)


def test_reflection_buried_source_receiver_above_datum(run):
    # image method: vertical legs (100 - 30) + (100 + 20) = 190 m; t = sqrt(190^2 + x^2) / 2000
    m = LayerModel.build([100.0], [2000.0, 3500.0], vpvs=1.8)
    xs = np.array([0.0, 50.0, 400.0])
    a = run(m, "P", xs, zs=30.0, zr=-20.0, branch="reflection", interface=1)
    np.testing.assert_allclose(a.time[0], np.hypot(190.0, xs) / 2000.0, rtol=RTOL)


def test_direct_to_receiver_above_datum(run):
    # receiver 100 m above the datum inside the upward extension of layer 1: straight line
    m = LayerModel.build([100.0], [2000.0, 3500.0], vpvs=1.8)
    xs = np.array([0.0, 50.0, 400.0])
    a = run(m, "P", xs, zs=0.0, zr=-100.0, branch="direct")
    np.testing.assert_allclose(a.time[0], np.hypot(100.0, xs) / 2000.0, rtol=RTOL)


# ============================================================ S and fluids
# A fluid has zero shear modulus, so S cannot propagate in it (common practice).
def test_s_is_absent_in_a_fluid_top_layer(run, forward):
    # 1000 m of water over rock; S between surface ends is inf for every branch
    m = LayerModel.build([1000.0], [1500.0, 3000.0], vs=[0.0, 1700.0])
    xs = np.array([10.0, 1000.0, 20000.0])
    for kw in (dict(), dict(branch="direct"), dict(branch="head", interface=1),
               dict(branch="reflection", interface=1)):
        a = run(m, "S", xs, **kw)
        assert np.all(np.isinf(a.time)), (kw, a.time)
        assert np.all(np.isnan(a.ray_parameter)), kw
        assert np.all(a.branch == forward.BRANCH_NONE), kw
    # P is fine: direct along the surface, head wave at 3000 m/s beyond the crossover
    p = run(m, "P", xs)
    t_i = 2 * 1000 * math.sqrt(1 - 0.25) / 1500
    np.testing.assert_allclose(p.time[0], np.minimum(xs / 1500, xs / 3000 + t_i), rtol=RTOL)


def test_s_from_below_a_fluid_layer(run, forward):
    m = LayerModel.build([1000.0], [1500.0, 3000.0], vs=[0.0, 1700.0])
    # source in the rock, receiver at the sea surface: S cannot cross the water
    a = run(m, "S", [500.0, 5000.0], zs=1500.0, zr=0.0)
    assert np.all(np.isinf(a.time)) and np.all(a.branch == forward.BRANCH_NONE)
    # both ends in the rock: straight S ray, sqrt(500^2 + 300^2) / 1700
    b = run(m, "S", [500.0], zs=1500.0, zr=1200.0)
    assert b.time[0, 0] == pytest.approx(math.hypot(500.0, 300.0) / 1700.0, rel=RTOL)


def test_s_does_not_cross_a_buried_fluid_layer(run):
    # solid (vs 1000) / fluid 50 m / solid half-space (vs 2500)
    m = LayerModel.build([100.0, 50.0], [2000.0, 1500.0, 4500.0], vs=[1000.0, 0.0, 2500.0])
    xs = np.array([100.0, 2000.0])
    head2 = run(m, "S", xs, branch="head", interface=2)
    refl2 = run(m, "S", xs, branch="reflection", interface=2)
    assert np.all(np.isinf(head2.time)) and np.all(np.isinf(refl2.time))
    # the reflection off the top of the fluid stays in layer 1: t = sqrt(200^2 + x^2) / 1000
    refl1 = run(m, "S", xs, branch="reflection", interface=1)
    np.testing.assert_allclose(refl1.time[0], np.hypot(200.0, xs) / 1000.0, rtol=RTOL)
    first = run(m, "S", xs)
    np.testing.assert_allclose(first.time[0], xs / 1000.0, rtol=RTOL)
    # P crosses the fluid and refracts along the half-space top
    p = run(m, "P", [2000.0], branch="head", interface=2)
    t_i = 2 * (100 * math.sqrt(1 - (2000 / 4500) ** 2) / 2000 + 50 * math.sqrt(1 - (1500 / 4500) ** 2) / 1500)
    assert p.time[0, 0] == pytest.approx(2000 / 4500 + t_i, rel=RTOL)


# ================================================ falling velocity at the top
# Layer 1: h = 100 m, v = 2000 - 2 z (1800 m/s at its base); half-space 3000 m/s.
# Rays leaving a surface source downward curve away from the surface and never come back up,
# so no direct ray reaches a surface receiver: the first arrival is the reflection from
# interface 1 (closed forms of grad_layer, x = 2 X(p)) or, beyond the critical distance
#   x_crit = 2 (sqrt(1 - (2000/3000)^2) - sqrt(1 - (1800/3000)^2)) / (-2 / 3000)
#          = 2 * (0.745356 - 0.8) * (-1500) = 163.93 m,
# the head wave t = x/3000 + 2 tau(1/3000). The reflection ends at x = 871.78 m (p -> 1/2000).
def test_falling_top_layer_first_arrival_is_reflection_or_head(run, forward):
    m = LayerModel.build([100.0], [2000.0, 3000.0], vpvs=1.8, gradient=[-2.0, 0.0])
    v1, v2, g = 2000.0, 1800.0, -2.0
    pc = 1 / 3000.0
    Xc, _, tauc = grad_layer(pc, v1, v2, g)
    assert 2 * Xc == pytest.approx(163.93, abs=0.01)
    xs = np.array([20.0, 100.0, 160.0, 170.0, 500.0, 2000.0])
    d = run(m, "P", xs, branch="direct")
    assert np.all(np.isinf(d.time)), d.time
    f = run(m, "P", xs)
    for i, x in enumerate(xs):
        if x < 2 * Xc:
            p = optimize.brentq(lambda q: 2 * grad_layer(q, v1, v2, g)[0] - x, 1e-9, 1 / v1 * (1 - 1e-15),
                                xtol=1e-20, rtol=1e-15)
            expected = 2 * grad_layer(p, v1, v2, g)[1]
            assert f.branch[0, i] == forward.BRANCH_REFLECTION, x
            assert f.ray_parameter[0, i] == pytest.approx(p, rel=1e-8)
        else:
            expected = x * pc + 2 * tauc
            assert f.branch[0, i] == forward.BRANCH_HEAD, x
        assert f.time[0, i] == pytest.approx(expected, rel=RTOL), x
        assert f.interface[0, i] == 1
