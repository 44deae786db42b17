"""Tests of invert.posterior on small synthetic sample sets.

Every model batch here is synthetic: random perturbations of an invented
3-layer site (5 m of soft soil, 10 m of stiff soil, bedrock).
"""

import math
import warnings

import numpy as np
import pytest
from scipy import integrate, stats

from invert import posterior as po
from invert.model import LayerModel

RNG_SEED = 20240601


@pytest.fixture(scope="module")
def site_batch():
    """Synthetic posterior-like batch: 300 perturbed 3-layer site models (metres, m/s)."""
    rng = np.random.default_rng(RNG_SEED)
    s = 300
    thickness = np.column_stack([rng.normal(5.0, 0.8, s), rng.normal(10.0, 1.5, s)])
    vs = np.column_stack([rng.normal(180, 20, s), rng.normal(350, 40, s), rng.normal(760, 80, s)])
    vp = vs * np.array([3.5, 3.0, 2.0])
    return LayerModel.build(thickness, vp, vs=vs)


# ------------------------------------------------------------ intervals
def _brute_force_hdi(x, p):
    """Shortest interval holding at least ceil(p n) sorted samples (definition of a sample HDI)."""
    xs = np.sort(x)
    m = math.ceil(p * xs.size)
    best = None
    for i in range(xs.size - m + 1):
        lo, hi = xs[i], xs[i + m - 1]
        if best is None or hi - lo < best[1] - best[0]:
            best = (lo, hi)
    return best


def test_interval_summary_matches_direct_computation():
    rng = np.random.default_rng(1)
    x = rng.gamma(2.0, 3.0, 201)  # skewed, n chosen so that p*n is not an integer
    s = po.interval_summary(x, prob=(0.68, 0.95))
    xs = np.sort(x)
    assert s.n == 201
    assert s.median == xs[100]
    assert s.mean == pytest.approx(x.sum() / x.size, rel=1e-12)
    assert s.sd == pytest.approx(math.sqrt(np.sum((x - x.mean()) ** 2) / x.size), rel=1e-12)
    # equal-tailed: quantile q at position q*(n-1) = q*200 of the sorted samples
    # 0.68 -> 0.16*200 = 32 and 0.84*200 = 168 exactly
    assert s.eti[0.68] == pytest.approx((xs[32], xs[168]), rel=1e-12)
    # 0.95 -> 0.025*200 = 5 and 0.975*200 = 195 exactly
    assert s.eti[0.95] == pytest.approx((xs[5], xs[195]), rel=1e-12)
    for p in (0.68, 0.95):
        assert s.hdi[p] == pytest.approx(_brute_force_hdi(x, p), rel=1e-12)
        lo, hi = s.hdi[p]
        assert np.mean((x >= lo) & (x <= hi)) >= p
        # for a right-skewed density the HDI is no wider than the equal-tailed interval
        assert hi - lo <= s.eti[p][1] - s.eti[p][0]


def test_hdi_of_exponential_against_analytic_interval():
    # Exponential(1): density decreasing, so the HDI is [0, -ln(1 - p)] (analytic).
    x = np.random.default_rng(2).exponential(1.0, 20000)
    s = po.interval_summary(x, prob=(0.9,))
    lo, hi = s.hdi[0.9]
    assert lo == pytest.approx(0.0, abs=2e-3)
    assert hi == pytest.approx(-math.log(0.1), abs=0.05)


def test_interval_summary_rejects_bad_input():
    with pytest.raises(ValueError, match="1-D"):
        po.interval_summary(np.ones((4, 5)))
    with pytest.raises(ValueError, match="not a finite"):
        po.interval_summary([1.0, np.inf, 2.0])
    with pytest.raises(ValueError, match="between 0 and 1"):
        po.interval_summary([1.0, 2.0, 3.0], prob=(1.2,))


def test_summarise_rows(site_batch):
    depth = site_batch.interface_depths[:, 1]
    rows = po.summarise({"depth_2": depth, "ratio": site_batch.vpvs[:, 0]}, {"depth_2": "m", "ratio": ""})
    assert [r["quantity"] for r in rows] == ["depth_2", "ratio"]
    r = rows[0]
    assert r["unit"] == "m"
    assert r["median"] == pytest.approx(np.median(depth))
    assert r["sd"] == pytest.approx(np.std(depth))
    assert (r["eti95_low"], r["eti95_high"]) == pytest.approx(tuple(np.percentile(depth, [2.5, 97.5])))
    assert (r["hdi68_low"], r["hdi68_high"]) == pytest.approx(_brute_force_hdi(depth, 0.68))
    with pytest.raises(ValueError, match="no unit given for 'x'"):
        po.summarise({"x": depth}, {})


# --------------------------------------------------------------- Vs30
def test_vs30_hand_worked_three_layers():
    # Vs30 = 30 / sum(h_i / Vs_i) over the top 30 m (NEHRP provisions; ASCE 7-16 ch. 20; from memory)
    # 5 m at 180 m/s, 10 m at 350 m/s, then 15 m of the 760 m/s bedrock:
    #   5/180  = 0.0277778 s
    #   10/350 = 0.0285714 s
    #   15/760 = 0.0197368 s
    #   sum    = 0.0760860 s  ->  Vs30 = 30 / 0.0760860 = 394.29 m/s
    model = LayerModel.build([5.0, 10.0], [630.0, 1050.0, 1520.0], vs=[180.0, 350.0, 760.0])
    assert po.vs30(model)[0] == pytest.approx(394.29, abs=0.01)


def test_vs30_batch_against_direct_layer_sum(site_batch):
    got = po.vs30(site_batch)
    expected = []
    for h, v in zip(site_batch.thickness, site_batch.vs):
        remaining, t = 30.0, 0.0
        for hi, vi in zip(list(h) + [np.inf], v):
            use = min(hi, remaining)
            t += use / vi
            remaining -= use
            if remaining <= 0:
                break
        expected.append(30.0 / t)
    np.testing.assert_allclose(got, expected, rtol=1e-12)


def test_time_averaged_velocity_gradient_layer_against_quad():
    # layer 1: Vs = 200 + 5 z over 20 m; half-space 600 m/s; averaging depth 30 m
    model = LayerModel.build([20.0], [600.0, 1500.0], vs=[200.0, 600.0], vs_gradient=[5.0, 0.0])
    t_quad = integrate.quad(lambda z: 1.0 / (200.0 + 5.0 * z), 0.0, 20.0)[0] + 10.0 / 600.0
    assert po.vs30(model)[0] == pytest.approx(30.0 / t_quad, rel=1e-10)
    # a gradient half-space cut at the averaging depth (Vs = 150 + 12 z below 4 m)
    model = LayerModel.build([4.0], [500.0, 900.0], vs=[120.0, 150.0], gradient=[0.0, 30.0],
                             vs_gradient=[0.0, 12.0])
    t_quad = 4.0 / 120.0 + integrate.quad(lambda z: 1.0 / (150.0 + 12.0 * (z - 4.0)), 4.0, 30.0)[0]
    assert po.vs30(model)[0] == pytest.approx(30.0 / t_quad, rel=1e-10)


def test_time_averaged_velocity_small_gradient_limit_is_stable():
    # ln(1 + g h / v0) / g -> h / v0 as g -> 0; a tiny gradient must agree with quad, not cancel
    for g in (1e-13, -1e-9, 1e-7, 1e-4):
        model = LayerModel.build([12.0], [800.0, 2000.0], vs=[250.0, 900.0], vs_gradient=[g, 0.0])
        t_quad = integrate.quad(lambda z: 1.0 / (250.0 + g * z), 0.0, 12.0, epsrel=1e-13)[0] + 18.0 / 900.0
        assert po.vs30(model)[0] == pytest.approx(30.0 / t_quad, rel=1e-12)


def test_time_averaged_velocity_in_km_and_for_p():
    model = LayerModel.build([0.005, 0.010], [0.63, 1.05, 1.52], vs=[0.18, 0.35, 0.76])
    # same site in km: Vs30 = 0.030 / 0.0760860 km/s (hand example above)
    assert po.time_averaged_velocity(model, 0.030, "S")[0] * 1000 == pytest.approx(394.29, abs=0.01)
    # P over 10 m: 5/630 + 5/1050 = 0.0079365 + 0.0047619 = 0.0126984 s -> 10 / 0.0126984 = 787.5 m/s
    model_m = LayerModel.build([5.0, 10.0], [630.0, 1050.0, 1520.0], vs=[180.0, 350.0, 760.0])
    assert po.time_averaged_velocity(model_m, 10.0, "P")[0] == pytest.approx(787.5, rel=1e-9)


def test_vs30_fluid_layer_gives_zero_with_warning():
    models = LayerModel.build([[3.0, 10.0], [3.0, 40.0]], [[1500.0, 1700.0, 2500.0], [1500.0, 1700.0, 2500.0]],
                              vs=[[150.0, 300.0, 900.0], [150.0, 0.0, 900.0]])
    with pytest.warns(UserWarning, match="fluid layer"):
        v = po.vs30(models)
    assert v[1] == 0.0
    # 3/150 + 10/300 + 17/900 = 0.02 + 0.033333 + 0.018889 = 0.072222 s -> 415.38 m/s
    assert v[0] == pytest.approx(30.0 / 0.0722222222, rel=1e-8)
    with pytest.raises(ValueError, match="depth"):
        po.time_averaged_velocity(models, 0.0)


# ------------------------------------------------------- other derived
def test_two_way_time_constant_and_gradient():
    model = LayerModel.build([5.0, 10.0], [630.0, 1050.0, 1520.0], vs=[180.0, 350.0, 760.0])
    # interface 2 (15 m): 2 (5/630 + 10/1050) = 2 (0.0079365 + 0.0095238) = 0.0349206 s
    assert po.two_way_time(model, 2, "P")[0] == pytest.approx(0.0349206, abs=1e-7)
    assert po.two_way_time(model, 1, "S")[0] == pytest.approx(2 * 5.0 / 180.0, rel=1e-12)
    grad = LayerModel.build([8.0, 30.0], [400.0, 1200.0, 2000.0], vs=[150.0, 400.0, 900.0],
                            gradient=[40.0, 10.0, 0.0])
    t_quad = (integrate.quad(lambda z: 1 / (400.0 + 40.0 * z), 0, 8)[0]
              + integrate.quad(lambda z: 1 / (1200.0 + 10.0 * (z - 8.0)), 8, 38)[0])
    assert po.two_way_time(grad, 2, "P")[0] == pytest.approx(2 * t_quad, rel=1e-10)
    with pytest.raises(ValueError, match="integer from 1 to 2"):
        po.two_way_time(model, 3)


def test_depth_to_velocity_hand_cases():
    model = LayerModel.build([5.0, 10.0], [630.0, 1050.0, 1520.0], vs=[180.0, 350.0, 760.0])
    assert po.depth_to_velocity(model, 760.0, "S")[0] == 15.0   # bedrock top
    assert po.depth_to_velocity(model, 300.0, "S")[0] == 5.0
    assert po.depth_to_velocity(model, 100.0, "S")[0] == 0.0
    assert np.isinf(po.depth_to_velocity(model, 1000.0, "S")[0])
    # Vs = 200 + 5 z in layer 1 (20 m): 250 m/s is reached at (250 - 200) / 5 = 10 m
    grad = LayerModel.build([20.0], [700.0, 1500.0], vs=[200.0, 320.0], gradient=[0.0, 10.0],
                            vs_gradient=[5.0, 2.0])
    assert po.depth_to_velocity(grad, 250.0, "S")[0] == pytest.approx(10.0)
    # 310 m/s: layer 1 ends at 300, half-space starts at 320 -> its top, 20 m
    assert po.depth_to_velocity(grad, 310.0, "S")[0] == pytest.approx(20.0)
    # 400 m/s: in the gradient half-space 320 + 2 (z - 20) = 400 -> z = 60 m
    assert po.depth_to_velocity(grad, 400.0, "S")[0] == pytest.approx(60.0)
    with pytest.raises(ValueError, match="threshold"):
        po.depth_to_velocity(model, -5.0)


def test_depth_to_velocity_batch_against_profile_scan(site_batch):
    z = np.linspace(0.0, 40.0, 4001)  # 1 cm steps
    prof = site_batch.profile(z, "S")
    reached = prof >= 500.0
    first = np.where(reached.any(axis=1), z[np.argmax(reached, axis=1)], np.inf)
    np.testing.assert_allclose(po.depth_to_velocity(site_batch, 500.0, "S"), first, atol=1e-2)


def test_depth_above_interface(site_batch):
    np.testing.assert_allclose(po.depth_above_interface(site_batch, 2),
                               site_batch.thickness[:, 0] + site_batch.thickness[:, 1])
    for bad in (0, 3, 1.5, "one", True):
        with pytest.raises(ValueError, match="interface"):
            po.depth_above_interface(site_batch, bad)


def test_poisson_ratio_against_lame_parameters():
    # Poisson solid (lambda = mu): Vp/Vs = sqrt(3), nu = 0.25 (common practice)
    assert po.poisson_ratio(math.sqrt(3.0)) == pytest.approx(0.25)
    assert po.poisson_ratio(np.inf) == 0.5
    # nu = lambda / (2 (lambda + mu)), Vp^2 = (lambda + 2 mu)/rho, Vs^2 = mu/rho (standard isotropic
    # elasticity; common practice)
    rng = np.random.default_rng(3)
    lam, mu = rng.uniform(-0.5, 20.0, 50), rng.uniform(0.5, 10.0, 50)
    vpvs = np.sqrt((lam + 2 * mu) / mu)
    np.testing.assert_allclose(po.poisson_ratio(vpvs), lam / (2 * (lam + mu)), rtol=1e-12)
    with pytest.raises(ValueError, match="sqrt"):
        po.poisson_ratio([1.1])


# ------------------------------------------------------------ site class
def test_site_class_band_edges():
    # ASCE 7-16 Table 20.3-1 edges 1500/760/360/180 m/s (from memory)
    v = np.array([2000.0, 1500.0001, 1500.0, 1499.9999, 760.01, 760.0, 759.99, 360.0, 359.9, 180.0001,
                  180.0, 179.99, 0.0])
    slower = ["A", "A", "B", "B", "B", "C", "C", "D", "D", "D", "E", "E", "E"]
    faster = ["A", "A", "A", "B", "B", "B", "C", "C", "D", "D", "D", "E", "E"]
    for rule, expect in (("slower", slower), ("faster", faster)):
        for value, label in zip(v, expect):
            res = po.site_class_probabilities([value], edge_class=rule)
            assert res.labels[int(np.argmax(res.probability))] == label, (rule, value)
            assert res.probability.max() == 1.0


def test_site_class_probabilities_counts_and_caveat(site_batch):
    v = po.vs30(site_batch)
    res = po.site_class_probabilities(v)
    direct = [np.mean(v > 1500), np.mean((v > 760) & (v <= 1500)), np.mean((v > 360) & (v <= 760)),
              np.mean((v > 180) & (v <= 360)), np.mean(v <= 180)]
    np.testing.assert_allclose(res.probability, direct)
    assert res.probability.sum() == pytest.approx(1.0)
    assert res.bands[2] == (360.0, 760.0)
    assert "licensed professionals" in res.caveat and "cannot assign every class" in res.caveat
    edges, labels, _ = po.SITE_CLASS_SCHEMES["EC8-2004"]
    ec8 = po.site_class_probabilities([900.0, 500.0, 200.0, 100.0], edges, labels)
    np.testing.assert_allclose(ec8.probability, [0.25, 0.25, 0.25, 0.25])


def test_site_class_rejects_bad_configuration():
    with pytest.raises(ValueError, match="strictly decreasing"):
        po.site_class_probabilities([300.0], edges=(180, 360, 760, 1500))
    with pytest.raises(ValueError, match="labels"):
        po.site_class_probabilities([300.0], labels=("A", "B"))
    with pytest.raises(ValueError, match=">= 0"):
        po.site_class_probabilities([-1.0])


# ----------------------------------------------------------- probabilities
def test_probability_slower_and_in_range(site_batch):
    rng = np.random.default_rng(4)
    vs = np.column_stack([rng.normal(300, 50, 500), rng.normal(280, 50, 500), np.full(500, 800.0)])
    model = LayerModel.build(np.tile([4.0, 6.0], (500, 1)), vs * 3.0, vs=vs)
    assert po.probability_slower(model, 2, "S") == pytest.approx(np.mean(vs[:, 1] < vs[:, 0]))
    assert po.probability_slower(model, 3, "S") == pytest.approx(np.mean(800.0 < vs[:, 1]))
    # gradient: layer 1 goes 300 -> 300 + 20*4 = 380 m/s at its base; layer 2 starts at 350 -> slower
    grad = LayerModel.build([4.0], [900.0, 1000.0], vs=[300.0, 350.0], vs_gradient=[20.0, 0.0])
    assert po.probability_slower(grad, 2, "S") == 1.0
    with pytest.raises(ValueError, match="from 2 to 3"):
        po.probability_slower(model, 1)
    d = site_batch.interface_depths[:, 1]
    assert po.probability_in_range(d, 12.0, 18.0) == pytest.approx(np.mean((d >= 12) & (d <= 18)))
    assert po.probability_in_range(np.array([1.0, np.inf]), 0.0, np.inf) == 1.0
    with pytest.raises(ValueError, match="low <= high"):
        po.probability_in_range(d, 5.0, 1.0)


# -------------------------------------------------------- identifiability
def test_identifiability_ratios_and_flag():
    rng = np.random.default_rng(5)
    prior = rng.uniform(-1.0, 1.0, 40000)
    resolved = rng.normal(0.0, 0.1, 40000)
    r = po.identifiability(resolved, prior, "thickness of layer 1")
    q = lambda x: np.diff(np.quantile(x, [0.05, 0.95]))[0]
    assert r.width_ratio == pytest.approx(q(resolved) / q(prior), rel=1e-12)
    assert r.sd_ratio == pytest.approx(resolved.std() / prior.std(), rel=1e-12)
    # analytic: 90 % width of N(0, 0.1) is 2 * 1.6449 * 0.1; of U(-1, 1) it is 1.8
    assert r.width_ratio == pytest.approx(2 * stats.norm.ppf(0.95) * 0.1 / 1.8, rel=0.03)
    # variance of U(-1, 1) is 1/3 -> variance ratio 0.01 / (1/3) = 0.03
    assert r.variance_ratio == pytest.approx(0.03, rel=0.05)
    assert r.contraction == pytest.approx(1 - r.variance_ratio)
    assert r.resolved and r.message is None
    unresolved = rng.uniform(-0.9, 0.9, 40000)
    r2 = po.identifiability(unresolved, prior, "thickness of layer 3")
    assert not r2.resolved
    assert r2.message.startswith("thickness of layer 3: posterior close to prior — the data do not resolve it")
    rows = po.identifiability_table({"a": resolved, "b": unresolved}, {"a": prior, "b": prior})
    assert [row["resolved"] for row in rows] == [True, False]
    with pytest.raises(ValueError, match="zero spread"):
        po.identifiability(resolved, np.ones(10))


# ------------------------------------------------- depth of investigation
def test_mask_below_and_flags():
    grid = np.array([0.0, 10.0, 20.0, 30.0])
    doi = np.array([15.0, 25.0, 35.0, 20.0])
    mask = po.mask_below(grid, doi)
    expected = np.array([[g > d for g in grid] for d in doi])
    np.testing.assert_array_equal(mask, expected)
    np.testing.assert_allclose(po.fraction_below(grid, doi), expected.mean(axis=0))
    msg = po.flag_below_investigation(30.0, doi)
    assert msg is not None and msg.startswith("Vs30: in 75% of posterior models") and "30 m" in msg
    assert po.flag_below_investigation(30.0, np.full(10, 45.0)) is None
    assert "no S picks" in po.flag_without_s_picks(0)
    assert po.flag_without_s_picks(12) is None
    with pytest.raises(ValueError, match="depth of investigation"):
        po.mask_below(grid, [-1.0])


# ------------------------------------------------------- fit diagnostics
def _synthetic_residuals():
    """40 picks from sources S1..S4; S3 picks late by 12 ms; pick sd 3 ms (synthetic)."""
    rng = np.random.default_rng(6)
    source = np.repeat(["S1", "S2", "S3", "S4"], 10)
    wave = np.tile(["P", "S"], 20)
    base = rng.normal(0.0, 0.003, 40) + np.where(source == "S3", 0.012, 0.0)
    residuals = base[None, :] + rng.normal(0.0, 0.001, (200, 40))
    return residuals, source, wave


def test_residual_groups_match_numpy_and_flag_late_source():
    residuals, source, wave = _synthetic_residuals()
    sigma = np.full(40, 0.003)
    rows = po.residual_groups(residuals, {"source": source, "wave": wave}, sigma)
    assert [(r["group"], r["label"]) for r in rows] == [("source", "S1"), ("source", "S2"), ("source", "S3"),
                                                      ("source", "S4"), ("wave", "P"), ("wave", "S")]
    rbar = residuals.mean(axis=0)
    s3 = rows[2]
    sel = source == "S3"
    assert s3["mean_s"] == pytest.approx(rbar[sel].mean())
    assert s3["sd_s"] == pytest.approx(np.std(rbar[sel], ddof=1))
    assert s3["rms_s"] == pytest.approx(np.sqrt(np.mean(rbar[sel] ** 2)))
    assert s3["standard_error_s"] == pytest.approx(0.003 / math.sqrt(10))
    source_rows = [r for r in rows if r["group"] == "source"]
    assert [r["label"] for r in source_rows if r["systematic"]] == ["S3"]
    # groups are marginal: the S3 delay also lifts the mean of each wave group (5 S3 picks of 20)
    assert rows[4]["mean_s"] == pytest.approx(rbar[wave == "P"].mean())
    text = po.describe_systematic_residuals(source_rows)
    assert len(text) == 1
    late_ms = s3["mean_s"] * 1e3
    assert text[0].startswith(f"picks from source S3 are late by {late_ms:.3g} ms on average")
    assert text[0].endswith("a delay (static) term or dip?")
    # without pick sds the standard error is the sample sd over sqrt(n)
    rows2 = po.residual_groups(residuals, {"source": source})
    assert rows2[0]["standard_error_s"] == pytest.approx(np.std(rbar[:10], ddof=1) / math.sqrt(10))


def test_residual_groups_reject_bad_shapes():
    residuals, source, _ = _synthetic_residuals()
    with pytest.raises(ValueError, match="one per pick"):
        po.residual_groups(residuals, {"source": source[:5]})
    with pytest.raises(ValueError, match="samples, picks"):
        po.residual_groups(residuals[0], {"source": source})


def test_chi_square_check_direct_and_misfit():
    rng = np.random.default_rng(7)
    s, p = 400, 30
    mu = np.linspace(0.01, 0.2, p)[None, :] + rng.normal(0, 0.0005, (s, p))
    sigma = np.full(p, 0.002)
    rep = mu + rng.normal(0, 0.002, (s, p))
    y_good = np.linspace(0.01, 0.2, p) + rng.normal(0, 0.002, p)
    res = po.chi_square_check(y_good, mu, rep, sigma)
    t_obs = np.array([np.sum(((y_good - mu[i]) / sigma) ** 2) for i in range(s)])
    t_rep = np.array([np.sum(((rep[i] - mu[i]) / sigma) ** 2) for i in range(s)])
    assert res.p_value == pytest.approx(np.mean(t_rep >= t_obs))
    np.testing.assert_allclose(res.observed_discrepancy, t_obs)
    assert 0.05 < res.p_value < 0.95 and res.message is None
    # picks with three times the noise the model assumes -> discrepancy far beyond replicates
    y_bad = np.linspace(0.01, 0.2, p) + rng.normal(0, 0.006, p)
    bad = po.chi_square_check(y_bad, mu, rep, sigma)
    assert bad.p_value < 0.01 and "larger than the noise model" in bad.message
    with pytest.raises(ValueError, match="non-finite"):
        po.chi_square_check(y_good, np.where(np.arange(p) == 3, np.inf, mu), rep, sigma)


# ------------------------------------------------------------ trade-offs
def test_correlation_matrix_and_named_pairs():
    rng = np.random.default_rng(8)
    n = 5000
    vp2 = rng.normal(1200.0, 100.0, n)
    # thickness_1 = a vp_2 + noise with correlation 0.83: noise sd = 100 a sqrt(1/0.83^2 - 1)
    a = 0.01
    th1 = 4.0 + a * (vp2 - 1200.0) + rng.normal(0.0, 100 * a * math.sqrt(1 / 0.83 ** 2 - 1), n)
    vs1 = rng.normal(200.0, 20.0, n)
    x = np.column_stack([th1, vp2, vs1, np.full(n, 3.0)])
    corr = po.correlation_matrix(x)
    np.testing.assert_allclose(corr[:3, :3], np.corrcoef(x[:, :3], rowvar=False), atol=1e-12)
    assert np.isnan(corr[3, 0])
    pairs = po.strongest_pairs(corr, ["thickness_1", "vp_2", "vs_1", "fixed"])
    assert len(pairs) == 1
    assert pairs[0]["correlation"] == pytest.approx(0.83, abs=0.02)
    assert pairs[0]["text"].startswith("thickness_1 vs vp_2: correlation 0.8")
    assert pairs[0]["text"].endswith("— the classic thickness–velocity trade-off")
    assert po.strongest_pairs(corr, ["thickness_1", "vp_2", "vs_1", "fixed"], min_abs=0.9) == []


def test_residual_flags_use_a_bonferroni_threshold_over_the_groups_tested():
    # Five sources, four picks each with sigma 2 ms: standard error of a group mean 1 ms.
    # Bonferroni over 5 two-sided tests at family-wise 5 %: each at 1 %, |z| > 2.5758
    # (standard normal 0.5 % upper point; Abramowitz & Stegun, Handbook of Mathematical
    # Functions, 1964, ch. 26, from memory; Dunn, J. Am. Stat. Assoc. 56, 1961, for the
    # correction).
    # A source 2.3 standard errors late was flagged by the old fixed 2-sigma rule; it is not now.
    source = np.repeat(["A", "B", "C", "D", "E"], 4)
    means = {"A": 0.0023, "B": 0.0027, "C": 0.0, "D": -0.0004, "E": 0.0001}
    residuals = np.array([[means[s] for s in source]])
    rows = po.residual_groups(residuals, {"source": source}, np.full(20, 0.002))
    assert rows[0]["threshold"] == pytest.approx(2.5758, abs=1e-4)
    assert rows[0]["groups_tested"] == 5
    assert [r["label"] for r in rows if r["systematic"]] == ["B"]
    text = po.describe_systematic_residuals(rows)
    assert len(text) == 1 and "2.58 allowed for 5 groups tested" in text[0]
    # one group: the plain two-sided 5 % point, 1.95996 (same source, from memory)
    assert po.bonferroni_threshold(1) == pytest.approx(1.95996, abs=1e-5)
    # an explicit threshold is used as given
    fixed = po.residual_groups(residuals, {"source": source}, np.full(20, 0.002), threshold=2.0)
    assert [r["label"] for r in fixed if r["systematic"]] == ["A", "B"]
