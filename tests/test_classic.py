"""Tests of the intercept-time estimate against textbook travel-time curves."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from invert.classic import (
    InterceptTimeWarning,
    fit_segments,
    intercept_time_estimate,
    thicknesses_from_intercepts,
)


def textbook_first_arrivals(x, v, h):
    """First-arrival times over flat layers, surface source and receivers.

    Direct wave x / v1; head wave along the top of layer i:
    t = x / v_i + sum_{j<i} 2 h_j cos(theta_ji) / v_j with sin(theta_ji) = v_j / v_i,
    existing beyond the critical distance sum_{j<i} 2 h_j tan(theta_ji)
    (Telford, Geldart & Sheriff, Applied Geophysics, 2nd ed., 1990, ch. 4;
    Kearey, Brooks & Hill, An Introduction to Geophysical Exploration, 3rd ed., 2002, ch. 5).
    """
    x = np.asarray(x, dtype=float)
    branches = [x / v[0]]
    for i in range(1, len(v)):
        theta = np.arcsin(np.asarray(v[:i]) / v[i])
        intercept = np.sum(2 * np.asarray(h[:i]) * np.cos(theta) / np.asarray(v[:i]))
        critical = np.sum(2 * np.asarray(h[:i]) * np.tan(theta))
        branches.append(np.where(x >= critical, x / v[i] + intercept, np.inf))
    return np.min(branches, axis=0)


def test_two_layer_curve_recovers_model_and_crossover():
    v, h = (500.0, 2000.0), (10.0,)
    x = np.arange(2.0, 101.0, 2.0)
    est = intercept_time_estimate(x, textbook_first_arrivals(x, v, h), n_segments=2)
    assert np.allclose(est.velocities, v, rtol=0.01)
    assert np.allclose(est.thicknesses, h, rtol=0.01)
    # Two-layer crossover distance x_c = 2 h sqrt((v2 + v1) / (v2 - v1))
    # (Kearey, Brooks & Hill 2002, ch. 5; Telford et al. 1990, ch. 4).
    assert est.crossover_distances[0] == pytest.approx(2 * 10.0 * np.sqrt(2500.0 / 1500.0), rel=0.01)
    assert est.warnings == ()


def test_three_layer_curve_recovers_model():
    v, h = (400.0, 1200.0, 3000.0), (4.0, 12.0)
    x = np.arange(1.0, 121.0, 1.5)
    t = textbook_first_arrivals(x, v, h)
    est = intercept_time_estimate(x, t, n_segments=3)
    assert np.allclose(est.velocities, v, rtol=0.01)
    assert np.allclose(est.thicknesses, h, rtol=0.01)
    assert np.allclose(est.interface_depths, [4.0, 16.0], rtol=0.01)
    # every pick is assigned to the branch that arrives first there
    direct = x / v[0]
    assert np.array_equal(est.segment == 1, np.isclose(t, direct))


def test_number_of_segments_is_chosen_from_the_data():
    x = np.arange(1.0, 121.0, 1.5)
    assert intercept_time_estimate(x, textbook_first_arrivals(x, (400.0, 1200.0, 3000.0), (4.0, 12.0))).n_segments == 3
    x2 = np.arange(2.0, 101.0, 2.0)
    assert intercept_time_estimate(x2, textbook_first_arrivals(x2, (500.0, 2000.0), (10.0,))).n_segments == 2
    assert intercept_time_estimate(x2, x2 / 700.0).n_segments == 1


def test_noisy_picks_stay_close():
    rng = np.random.default_rng(4)
    v, h = (400.0, 1200.0, 3000.0), (4.0, 12.0)
    x = np.arange(1.0, 121.0, 1.5)
    t = textbook_first_arrivals(x, v, h) + rng.normal(0, 2e-4, x.size)  # 0.2 ms pick noise
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InterceptTimeWarning)
        est = intercept_time_estimate(x, t)
    assert est.n_segments == 3
    assert np.allclose(est.velocities, v, rtol=0.05)
    assert np.allclose(est.thicknesses, h, rtol=0.15)
    assert est.rms == pytest.approx(2e-4, rel=0.3)


def test_picks_order_does_not_matter():
    v, h = (500.0, 2000.0), (10.0,)
    x = np.arange(2.0, 101.0, 2.0)
    t = textbook_first_arrivals(x, v, h)
    perm = np.random.default_rng(0).permutation(x.size)
    a = intercept_time_estimate(x, t, n_segments=2)
    b = intercept_time_estimate(x[perm], t[perm], n_segments=2)
    assert np.allclose(a.velocities, b.velocities) and np.allclose(a.thicknesses, b.thicknesses)
    assert np.array_equal(b.segment, a.segment[perm])


def test_decreasing_apparent_velocity_is_a_warning():
    # An artificial pick set whose later segment is slower than the first
    # (as picks of a wrong phase would give): the method cannot represent it.
    x = np.arange(2.0, 101.0, 2.0)
    t = np.where(x <= 50, x / 1000.0, 0.01 + x / 600.0)
    with pytest.warns(InterceptTimeWarning) as caught:
        est = intercept_time_estimate(x, t, n_segments=2)
    assert any("does not increase" in str(w.message) for w in caught)
    assert np.allclose(est.velocities, [1000.0, 600.0], rtol=1e-6)
    assert np.isnan(est.thicknesses[0])
    assert any("cannot see a slower layer" in w for w in est.warnings)
    assert "warning:" in est.summary()


def test_thickness_formula_against_trigonometric_form():
    # t_i = 2 sum h_j cos(theta_ji) / v_j (Telford et al. 1990, ch. 4) inverted exactly.
    v = np.array([300.0, 900.0, 1800.0, 4000.0])
    h = np.array([3.0, 7.0, 20.0])
    t = [0.0] + [np.sum(2 * h[:i] * np.cos(np.arcsin(v[:i] / v[i])) / v[:i]) for i in range(1, 4)]
    assert np.allclose(thicknesses_from_intercepts(v, t), h, rtol=1e-12)


def test_fit_segments_finds_exact_breakpoints():
    x = np.arange(12.0)
    t = np.where(x < 5, 2 * x, 10 + 0.5 * (x - 5))
    starts, slopes, intercepts, sse = fit_segments(x, t, 2)
    assert starts.tolist() == [0, 5]
    assert np.allclose(slopes, [2.0, 0.5]) and np.allclose(intercepts, [0.0, 7.5])
    assert sse < 1e-20


def test_summary_is_printable_with_units():
    x = np.arange(2.0, 101.0, 2.0)
    est = intercept_time_estimate(x, textbook_first_arrivals(x, (500.0, 2000.0), (10.0,)), n_segments=2)
    text = est.summary("m")
    assert "velocity [m/s]" in text and "crossover distances [m]" in text and "half-space" in text


@pytest.mark.parametrize("offset, time, message", [
    ([1.0, 2.0, -3.0], [0.1, 0.2, 0.3], "one side of the shot"),
    ([1.0, 2.0, np.nan], [0.1, 0.2, 0.3], "not a finite number"),
    ([1.0, 2.0], [0.1, 0.2, 0.3], "equal length"),
])
def test_bad_picks_are_refused(offset, time, message):
    with pytest.raises(ValueError, match=message):
        intercept_time_estimate(offset, time)


def test_too_few_picks_for_segments():
    with pytest.raises(ValueError, match="cannot make 3 segments"):
        fit_segments([1.0, 2.0, 3.0, 4.0], [1.0, 2.0, 3.0, 4.0], 3)
