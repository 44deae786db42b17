"""Tests of invert.plots: files written, axes labelled with units, plotted data correct.

All inputs are synthetic: perturbations of an invented 3-layer site model and
straight-ray direct-wave times t = x / v over it.
"""

import numpy as np
import pytest
from matplotlib.colors import to_rgba

from invert import plots
from invert.model import LayerModel

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def batch():
    rng = np.random.default_rng(11)
    s = 200
    thickness = np.column_stack([rng.normal(5.0, 0.8, s), rng.normal(10.0, 1.5, s)])
    vs = np.column_stack([rng.normal(180, 15, s), rng.normal(350, 25, s), rng.normal(760, 60, s)])
    return LayerModel.build(thickness, vs * np.array([3.5, 3.0, 2.0]), vs=vs)


@pytest.fixture(scope="module")
def picks():
    """30 synthetic P picks from two sources, direct wave through a 630 m/s top layer."""
    rng = np.random.default_rng(12)
    x = np.tile(np.arange(2.0, 62.0, 4.0), 2)
    source = np.repeat(["S1", "S2"], 15)
    wave = np.where(np.arange(30) % 3 == 0, "S", "P")
    v = np.where(wave == "P", 630.0, 180.0)
    sigma = np.full(30, 0.002)
    observed = x / v + rng.normal(0.0, 0.002, 30)
    predicted = x[None, :] / (v[None, :] * rng.normal(1.0, 0.02, (100, 1)))
    return x, observed, sigma, predicted, source, wave


def _written(path):
    data = path.read_bytes()
    assert data[:8] == PNG_SIGNATURE and len(data) > 5000


def test_velocity_depth_figure(batch, tmp_path):
    z = np.linspace(0.0, 25.0, 101)
    truth = LayerModel.build([5.0, 10.0], [630.0, 1050.0, 1520.0], vs=[180.0, 350.0, 760.0])
    doi = np.full(batch.n_models, 20.0)
    fig = plots.plot_velocity_depth(batch, z, truth=truth, doi=doi, path=tmp_path / "vd.png")
    _written(tmp_path / "vd.png")
    ax_p, ax_s, ax_i = fig.axes[:3]
    assert ax_p.get_xlabel() == "P velocity [m/s]"
    assert ax_s.get_xlabel() == "S velocity [m/s]"
    assert ax_i.get_xlabel().startswith("relative frequency")
    assert ax_p.get_ylabel() == "depth below datum [m]"
    assert ax_p.get_ylim() == (25.0, 0.0)  # depth increases downward
    # the first line of each panel is the median velocity at each depth
    for ax, wave in ((ax_p, "P"), (ax_s, "S")):
        line = ax.get_lines()[0]
        np.testing.assert_allclose(line.get_xdata(), np.median(batch.profile(z, wave), axis=0))
        np.testing.assert_allclose(line.get_ydata(), z)
    colorbar_labels = [a.get_ylabel() for a in fig.axes[3:]]
    assert "fraction of models per velocity bin (at each depth)" in colorbar_labels
    legend_texts = [t.get_text() for t in fig.legends[0].get_texts()]
    assert "below median depth of investigation (20 m)" in legend_texts
    assert "true model" in legend_texts


def test_velocity_depth_thins_large_batches(batch):
    z = np.linspace(0.0, 25.0, 51)
    fig = plots.plot_velocity_depth(batch, z, waves=["S"], max_models=50, doi=np.full(batch.n_models, 30.0))
    keep = np.linspace(0, batch.n_models - 1, 50).round().astype(int)
    median = fig.axes[0].get_lines()[0].get_xdata()
    np.testing.assert_allclose(median, np.median(batch.profile(z, "S")[keep], axis=0))
    assert fig.get_suptitle() == "Velocity–depth posterior (50 of 200 models)"


def test_velocity_depth_p_only_in_km():
    model = LayerModel.build([[0.5, 20.0], [0.7, 25.0]], [[1.8, 6.0, 8.0], [2.0, 6.2, 8.1]], vpvs=1.75)
    fig = plots.plot_velocity_depth(model, np.linspace(0.0, 40.0, 41), waves=["P"], length_unit="km")
    assert fig.axes[0].get_xlabel() == "P velocity [km/s]"
    assert fig.axes[0].get_ylabel() == "depth below datum [km]"
    assert fig.axes[1].get_title() == "interface depths"


def test_row_histogram_against_numpy():
    values = np.random.default_rng(13).normal(0.0, 1.0, (500, 4))
    edges = np.linspace(-2.0, 2.0, 21)
    frac = plots._row_histogram(values, edges)
    for j in range(4):
        counts, _ = np.histogram(values[:, j], edges)
        np.testing.assert_allclose(frac[j], counts / 500)


def test_corner_figure(batch, tmp_path):
    names = ["thickness_1 [m]", "thickness_2 [m]", "vs_1 [m/s]"]
    samples = np.column_stack([batch.thickness, batch.vs[:, 0]])
    fig = plots.plot_corner(samples, names, truths=[5.0, 10.0, 180.0], path=tmp_path / "corner.png")
    _written(tmp_path / "corner.png")
    assert len(fig.axes) == 9
    bottom = [ax.get_xlabel() for ax in fig.axes[6:9]]
    assert bottom == names
    assert fig.axes[3].get_ylabel() == "thickness_2 [m]"
    with pytest.raises(ValueError, match="labels"):
        plots.plot_corner(samples, names[:2])


def test_corner_too_few_points_message_is_silenced_and_nothing_else(caplog):
    import logging

    # eight draws of two parameters: the corner package cannot contour the 2-D panel and says so through
    # logging.warning (the root logger); that one message is dropped, other messages still pass
    x = np.random.default_rng(0).normal(size=(8, 2))
    with caplog.at_level(logging.WARNING):
        plots.plot_corner(x, ["a [m]", "b [m/s]"])
        logging.warning("another message")
    messages = [r.getMessage() for r in caplog.records]
    assert plots.CORNER_CONTOUR_MESSAGE not in messages
    assert "another message" in messages
    # the filter is removed afterwards: the same words logged outside the corner plot are not hidden
    caplog.clear()
    with caplog.at_level(logging.WARNING):
        logging.warning(plots.CORNER_CONTOUR_MESSAGE)
    assert [r.getMessage() for r in caplog.records] == [plots.CORNER_CONTOUR_MESSAGE]
    assert plots._not_corner_contour_message not in logging.getLogger().filters


def test_travel_time_fit_figure(picks, tmp_path):
    x, observed, sigma, predicted, source, wave = picks
    outlier = np.zeros(30)
    outlier[[4, 9]] = 0.8
    replicated = predicted + np.random.default_rng(14).normal(0, 0.002, predicted.shape)
    fig = plots.plot_travel_time_fit(x, observed, sigma, predicted, source=source, wave=wave,
                                     replicated=replicated, outlier_probability=outlier,
                                     path=tmp_path / "fit.png")
    _written(tmp_path / "fit.png")
    ax, ax_r = fig.axes
    assert ax.get_ylabel() == "travel time [s]"
    assert ax_r.get_xlabel() == "source–receiver distance [m]"
    assert "[ms]" in ax_r.get_ylabel()
    # red rings: one scatter per panel at the two outlier picks
    rings = [c for c in ax_r.collections if c.get_offsets().shape[0] == 2]
    assert len(rings) == 1
    expected_ms = (observed - np.median(predicted, axis=0)) * 1e3
    np.testing.assert_allclose(np.sort(rings[0].get_offsets()[:, 1]), np.sort(expected_ms[[4, 9]]))
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "outlier probability > 0.5 (2 picks)" in legend
    assert "P picks ± 1 sd" in legend and "S picks ± 1 sd" in legend


def test_travel_time_fit_residuals_in_seconds_for_earthquake_size_errors(picks):
    """Pick errors of tenths of a second (local earthquakes, common practice) give residuals in s."""
    x, observed, sigma, predicted, source, wave = picks
    scale = 100.0  # the same picks on a scale where errors are 0.2 s
    fig = plots.plot_travel_time_fit(x, observed * scale, sigma * scale, predicted * scale, source=source,
                                     wave=wave)
    ax_r = fig.axes[1]
    assert "[s]" in ax_r.get_ylabel() and "[ms]" not in ax_r.get_ylabel()
    plotted = np.concatenate([c.lines[0].get_ydata() for c in ax_r.containers])
    expected = observed * scale - np.median(predicted * scale, axis=0)
    np.testing.assert_allclose(np.sort(plotted), np.sort(expected))


def test_prior_predictive_figure(picks, tmp_path):
    x, observed, sigma, _, source, wave = picks
    prior_times = x[None, :] / np.random.default_rng(15).uniform(100.0, 2000.0, (300, 1))
    prior_times[:10, 0] = np.inf  # absent arrivals
    fig = plots.plot_prior_predictive(x, observed, sigma, prior_times, source=source, wave=wave,
                                      path=tmp_path / "prior_pred.png")
    _written(tmp_path / "prior_pred.png")
    ax = fig.axes[0]
    assert ax.get_xlabel() == "source–receiver distance [m]"
    assert ax.get_ylabel() == "travel time [s]"
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert any("absent" in t for t in legend)


def test_traces_figure(tmp_path):
    rng = np.random.default_rng(16)
    chains = rng.normal(size=(2, 60, 12, 3))
    labels = ["thickness_1 [m]", "vp_1 [m/s]", "vpvs_1"]
    fig = plots.plot_traces(chains, labels, burn_in=20, max_walkers=8, path=tmp_path / "traces.png")
    _written(tmp_path / "traces.png")
    assert [ax.get_ylabel() for ax in fig.axes] == labels
    assert fig.axes[-1].get_xlabel() == "step"
    ensemble_colours = {to_rgba(line.get_color(), 1.0) for line in fig.axes[0].get_lines()[:-1]
                        if line.get_linestyle() == "-"}
    assert ensemble_colours == {to_rgba("C0"), to_rgba("C1")}
    with pytest.raises(ValueError, match="chains"):
        plots.plot_traces(chains[0, 0], labels)


def test_convergence_figure(tmp_path):
    names = ["thickness_1", "vp_1", "vp_2"]
    fig = plots.plot_convergence(names, [1.002, 1.03, 1.0], [900.0, 120.0, 401.0],
                                 ess_tail=[800.0, 500.0, 300.0], path=tmp_path / "conv.png")
    _written(tmp_path / "conv.png")
    ax_r, ax_e = fig.axes
    assert ax_r.get_xlabel() == "R-hat [dimensionless]"
    assert ax_e.get_xlabel() == "effective sample size [draws]"
    red = to_rgba("tab:red")
    assert [p.get_facecolor() == red for p in ax_r.patches] == [False, True, False]
    # bulk ESS 120 < 400 for vp_1; tail ESS 300 < 400 for vp_2
    assert [p.get_facecolor() == red for p in ax_e.patches] == [False, True, True]
    assert ax_r.get_lines()[0].get_xdata()[0] == 1.01
    assert ax_e.get_lines()[0].get_xdata()[0] == 400.0


def test_prior_posterior_figure(batch, tmp_path):
    rng = np.random.default_rng(17)
    prior = {"thickness_1": rng.uniform(1.0, 15.0, 1000), "vpvs_1": rng.uniform(1.6, 4.0, 1000)}
    post = {"thickness_1": batch.thickness[:, 0], "vpvs_1": batch.vpvs[:, 0]}
    fig = plots.plot_prior_posterior(prior, post, {"thickness_1": "m", "vpvs_1": ""},
                                     truths={"thickness_1": 5.0}, path=tmp_path / "marg.png")
    _written(tmp_path / "marg.png")
    visible = [ax for ax in fig.axes if ax.get_visible()]
    assert [ax.get_xlabel() for ax in visible] == ["thickness_1 [m]", "vpvs_1"]
    assert [ax.get_ylabel() for ax in visible] == ["probability density [1/m]", "probability density"]
    with pytest.raises(ValueError, match="no unit"):
        plots.plot_prior_posterior(prior, post, {"thickness_1": "m"})


def test_path_must_be_png(batch, tmp_path):
    with pytest.raises(ValueError, match=".png"):
        plots.plot_velocity_depth(batch, path=tmp_path / "vd.pdf")


# ----------------------------------------------------------- what the picks are plotted against
def test_pick_abscissa_follows_the_survey_layout():
    depths = np.arange(2.0, 66.0, 2.0)
    n = depths.size
    # receivers down a hole, source 2 m from the wellhead (invented downhole survey)
    x, label, kind = plots.pick_abscissa(np.full(n, 2.0), np.zeros(n), depths, source=["s"] * n,
                                         receiver=[f"r{i}" for i in range(n)])
    assert kind == "receiver_depth" and label == "receiver depth [m]"
    np.testing.assert_array_equal(x, depths)
    # two sources at 2 m and 20 m from the hole: still receiver depth
    x, label, kind = plots.pick_abscissa(np.r_[np.full(n, 2.0), np.full(n, 20.0)], np.zeros(2 * n),
                                         np.r_[depths, depths], source=["a"] * n + ["b"] * n,
                                         receiver=[f"r{i}" for i in range(n)] * 2)
    assert kind == "receiver_depth"
    # sources fired down a hole into one surface receiver
    x, label, kind = plots.pick_abscissa(np.full(n, 5.0), depths, np.zeros(n), source=[f"s{i}" for i in range(n)],
                                         receiver=["g"] * n, length_unit="km")
    assert kind == "source_depth" and label == "source depth [km]"
    # hole to hole, 30 m apart, a source every 8 m down one hole and every receiver level of the
    # other: straight-line distance sqrt(x^2 + dz^2) (Pythagoras)
    src_depths = np.arange(2.0, 66.0, 8.0)
    zs = np.repeat(src_depths, n)
    zr = np.tile(depths, src_depths.size)
    x, label, kind = plots.pick_abscissa(np.full(zs.size, 30.0), zs, zr, source=zs.astype(str),
                                         receiver=zr.astype(str))
    assert kind == "straight_line" and "straight-line" in label
    np.testing.assert_allclose(x, np.sqrt(30.0 ** 2 + (zr - zs) ** 2))
    # surface line, and a network of events at 5-20 km depth recorded 10-200 km away (here all
    # three events under one epicentre, so each station sees one distance): horizontal
    x, label, kind = plots.pick_abscissa(np.arange(2.0, 62.0, 4.0), np.zeros(15), np.zeros(15))
    assert kind == "horizontal" and label == "horizontal source–receiver distance [m]"
    dist = np.tile(np.linspace(10.0, 200.0, 8), 3)
    x, label, kind = plots.pick_abscissa(dist, np.repeat([5.0, 12.0, 20.0], 8), np.zeros(24),
                                         source=np.repeat(["e1", "e2", "e3"], 8),
                                         receiver=np.tile([f"st{i}" for i in range(8)], 3), length_unit="km")
    assert kind == "horizontal"
    np.testing.assert_array_equal(x, dist)


def test_travel_time_figures_take_the_abscissa_label(picks):
    x, observed, sigma, predicted, source, wave = picks
    fig = plots.plot_travel_time_fit(x, observed, sigma, predicted, source=source, wave=wave,
                                     x_label="receiver depth [m]")
    assert fig.axes[1].get_xlabel() == "receiver depth [m]"
    fig = plots.plot_prior_predictive(x, observed, sigma, predicted, source=source, wave=wave,
                                      x_label="receiver depth [m]")
    assert fig.axes[0].get_xlabel() == "receiver depth [m]"


# ------------------------------------------------------------ sphere runs
# The invented planet of case_studies/invented_planet (synthetic): radius 5200 km; crust 35 km,
# 6.2 km/s; mantle 35-2500 km, Vp 8.0 -> 12.5 km/s; liquid core below, 8.5 km/s at its top,
# gradient 0.0005 1/s (9.85 km/s at the centre).
R_PLANET = 5200.0


def _planet_layers(n: int = 1) -> LayerModel:
    return LayerModel.build(np.tile([35.0, 2465.0], (n, 1)), np.tile([6.2, 8.0, 8.5], (n, 1)),
                            vs=np.tile([6.2 / 1.75, 8.0 / 1.8, 0.0], (n, 1)),
                            gradient=np.tile([0.0, 4.5 / 2465.0, 0.0005], (n, 1)))


def _shell_law_by_hand(depth):
    """P velocity of the planet read as shells, written out from the two laws (not through invert.sphere).

    Layers: the linear layer of the Earth-flattening transformation z_f = R ln(R / r),
    v_f = (R / r) v (Müller, J. Geophys. 42, 1977; from memory), i.e. v / r linear in ln r
    between the end values. Half-space to the centre: 1 / v^2 = A + B r^2 through its top
    velocity and the centre value of its linear law (9.85 km/s).
    """
    r = R_PLANET - np.asarray(depth, dtype=float)
    out = np.empty_like(r)
    for (z0, z1, v0, v1) in ((0.0, 35.0, 6.2, 6.2), (35.0, 2500.0, 8.0, 12.5)):
        r0, r1 = R_PLANET - z0, R_PLANET - z1
        inside = (r <= r0) & (r > r1)
        frac = np.log(r0 / r[inside]) / np.log(r0 / r1)
        out[inside] = r[inside] * (v0 / r0 + (v1 / r1 - v0 / r0) * frac)
    core = r <= R_PLANET - 2500.0
    rc, vt, vc = R_PLANET - 2500.0, 8.5, 8.5 + 0.0005 * 2700.0
    a = 1.0 / vc ** 2
    b = (1.0 / vt ** 2 - a) / rc ** 2
    out[core] = 1.0 / np.sqrt(a + b * r[core] ** 2)
    return out


def test_velocity_depth_sphere_follows_the_shell_laws(tmp_path):
    """Sphere runs: the plotted profile is the engine's (RadialModel.profile) and the shell laws
    written out by hand, not straight lines in depth; the depth axis stops at the centre."""
    from invert.sphere import RadialModel

    model = _planet_layers(3)
    grid = np.linspace(0.0, R_PLANET, 521)  # 10 km steps: 1270 km is a grid depth
    fig = plots.plot_velocity_depth(model, grid, waves=["P"], truth=_planet_layers(1), length_unit="km",
                                    planet_radius=R_PLANET, path=tmp_path / "vd.png")
    _written(tmp_path / "vd.png")
    ax = fig.axes[0]
    median = ax.lines[0]
    z, v = np.asarray(median.get_ydata()), np.asarray(median.get_xdata())
    engine = RadialModel.from_layers(_planet_layers(1), R_PLANET).profile(z, "P")[0]
    np.testing.assert_allclose(v, engine, rtol=1e-12)
    at = [np.flatnonzero(np.isclose(z, d))[0] for d in (20.0, 600.0, 1270.0, 2400.0, 3000.0, 5200.0)]
    np.testing.assert_allclose(v[at], _shell_law_by_hand(z[at]), rtol=1e-10)
    # mantle at 1270 km: 11.19 km/s on the shell law; the straight line in depth gives 10.25
    i = at[2]
    assert abs(v[i] - 11.1877) < 1e-3 and abs(v[i] - (8.0 + 4.5 / 2465.0 * 1235.0)) > 0.9
    truth = next(line for line in ax.lines if line.get_label() == "true model")
    tz, tv = np.asarray(truth.get_ydata()), np.asarray(truth.get_xdata())
    inside = (tz > 36.0) & (tz < 2499.0) | (tz > 2501.0)
    np.testing.assert_allclose(tv[inside], _shell_law_by_hand(tz[inside]), rtol=1e-10)
    assert ax.get_ylim() == (R_PLANET, 0.0) and tz.max() <= R_PLANET
    assert "centre" in ax.get_ylabel()
    # default grid: stops at the centre, however deep 1.3 x the deepest interface would reach
    deep = LayerModel.build([[35.0, 4500.0]], [[6.2, 8.0, 8.5]], vs=[[3.5, 4.4, 0.0]])
    fig = plots.plot_velocity_depth(deep, waves=["P"], length_unit="km", planet_radius=R_PLANET)
    assert fig.axes[0].get_ylim() == (R_PLANET, 0.0)
    with pytest.raises(ValueError, match="below the centre"):
        plots.plot_velocity_depth(model, np.linspace(0.0, 6300.0, 50), planet_radius=R_PLANET, length_unit="km")


def test_band_quantiles_mask_absent_arrivals():
    """Where most models predict no arrival the median and band are NaN (lines break); elsewhere
    they are numpy's quantiles of the finite times."""
    t = np.array([[1.0, 2.0, np.inf, 4.0],
                  [1.5, np.inf, np.inf, 5.0],
                  [2.0, 3.0, 7.0, np.inf],
                  [2.5, 4.0, np.inf, 6.0]])
    lo, med, hi = plots.band_quantiles(t, 0.5)
    for j in (0, 1, 3):
        finite = t[np.isfinite(t[:, j]), j]
        np.testing.assert_allclose([lo[j], med[j], hi[j]], np.quantile(finite, [0.25, 0.5, 0.75]))
    assert np.isnan([lo[2], med[2], hi[2]]).all()  # 1 of 4 models has an arrival


def test_travel_time_figures_on_a_sphere(picks):
    """Arc distance on the x axis with the angle in degrees on top; no line across a shadow."""
    x, observed, sigma, predicted, source, wave = picks
    x_km = x * 100.0  # read as km of arc on a planet of radius 5200 km
    grid = np.linspace(x_km.min(), x_km.max(), 50)
    shadow = (grid > 2500.0) & (grid < 4000.0)
    times = np.tile(grid / 8.0, (20, 1))
    times[:, shadow] = np.inf
    times[:3, ~shadow] = np.inf  # a few models without an arrival anywhere: still a line
    curves = {("S1", "P", ""): (grid, times)}
    for fn, kwargs in ((plots.plot_travel_time_fit, {}), (plots.plot_prior_predictive, {})):
        fig = fn(x_km, observed, sigma, predicted, source=source, wave=wave, length_unit="km",
                 planet_radius=R_PLANET, curves=curves, **kwargs)
        ax = fig.axes[0]
        bottom = fig.axes[1] if fn is plots.plot_travel_time_fit else ax
        assert bottom.get_xlabel() == "distance along the surface (arc) [km]"
        top = ax.child_axes[0]
        assert "deg" in top.get_xlabel()
        lo, hi = ax.get_xlim()
        np.testing.assert_allclose(top.get_xlim(), np.degrees(np.array([lo, hi]) / R_PLANET))
        line = next(ln for ln in ax.lines if len(ln.get_xdata()) == grid.size)
        y = np.asarray(line.get_ydata(), dtype=float)
        assert np.isnan(y[shadow]).all() and np.allclose(y[~shadow], grid[~shadow] / 8.0)
    # without curves, a pick where most models have no arrival gets no line point either
    pred = predicted.copy()
    pred[:60, 4] = np.inf
    fig = plots.plot_prior_predictive(x_km, observed, sigma, pred, source=source, wave=wave, length_unit="km")
    sel = (source == "S1") & (wave == "P")
    shown = [ln for ln in fig.axes[0].lines if len(ln.get_xdata()) == sel.sum()]
    assert any(np.isnan(np.asarray(ln.get_ydata(), dtype=float)).any() for ln in shown)


# ------------------------------------------------------------- line positions
def _line_table_layout(t_receivers, t_sources, offsets=None):
    """Per-pick coordinates of a line along the unit vector (3, 4)/5 from (10, 20) [m]."""
    origin, along, across = np.array([10.0, 20.0]), np.array([0.6, 0.8]), np.array([-0.8, 0.6])
    rec = origin + np.outer(t_receivers, along)
    if offsets is not None:
        rec = rec + np.outer(offsets, across)
    src = origin + np.outer(t_sources, along)
    si, ri = np.repeat(np.arange(len(t_sources)), len(t_receivers)), np.tile(np.arange(len(t_receivers)),
                                                                             len(t_sources))
    sxy, rxy = src[si], rec[ri]
    dist = np.hypot(*(rxy - sxy).T)
    return sxy, rxy, dist, np.array([f"s{i}" for i in si]), np.array([f"g{i}" for i in ri])


def test_pick_abscissa_gives_receiver_position_along_a_straight_table_line():
    # Hand-computed: receivers at (10, 20), (13, 24), (16, 28), (19, 32) [m] lie on the line through
    # (10, 20) along (3, 4)/5 (3-4-5 right triangle: consecutive receivers 5 m apart), so their positions
    # along the line from the first receiver are 0, 5, 10, 15 m; sources at (8.5, 18) and (22, 36) project
    # to -2.5 and 20 m (orthogonal projection onto a line, analytic geometry).
    sxy, rxy, dist, src, rec = _line_table_layout([0.0, 5.0, 10.0, 15.0], [-2.5, 20.0])
    np.testing.assert_allclose(rxy[:4], [[10, 20], [13, 24], [16, 28], [19, 32]])
    np.testing.assert_allclose(sxy[[0, 4]], [[8.5, 18], [22, 36]])
    zeros = np.zeros(dist.size)
    x, label, kind = plots.pick_abscissa(dist, zeros, zeros, source=src, receiver=rec, source_xy=sxy,
                                         receiver_xy=rxy)
    assert kind == "line_position" and label == "receiver position along the line [m]"
    np.testing.assert_allclose(x, np.tile([0.0, 5.0, 10.0, 15.0], 2), atol=1e-9)
    # forward and reverse shots share positions, unlike the source-receiver distance
    assert not np.allclose(dist[:4], dist[4:]) and np.allclose(x[:4], x[4:])
    r_pos, s_pos = plots.line_positions(rxy, sxy[[0, 4]])
    np.testing.assert_allclose(s_pos, [-2.5, 20.0], atol=1e-9)
    # the origin is the end of the line nearest the first receiver given: listed from the far end,
    # positions run from that end (15 - t)
    x_rev, _, _ = plots.pick_abscissa(dist[::-1], zeros, zeros, source=src[::-1], receiver=rec[::-1],
                                      source_xy=sxy[::-1], receiver_xy=rxy[::-1])
    np.testing.assert_allclose(x_rev, 15.0 - np.tile([0.0, 5.0, 10.0, 15.0], 2)[::-1], atol=1e-9)
    # within the 1 % tolerance (0.1 m off a 15 m line) still a line; 0.5 m off is not
    for off, expected in ((0.1, "line_position"), (0.5, "horizontal")):
        sxy, rxy, dist, src, rec = _line_table_layout([0.0, 5.0, 10.0, 15.0], [-2.5, 20.0],
                                                      offsets=[0.0, off, 0.0, 0.0])
        _, label, kind = plots.pick_abscissa(dist, zeros, zeros, source=src, receiver=rec, source_xy=sxy,
                                             receiver_xy=rxy)
        assert kind == expected, off
    assert label == "horizontal source–receiver distance [m]"


def test_pick_abscissa_falls_back_to_distance_without_a_table_line():
    sxy, rxy, dist, src, rec = _line_table_layout([0.0, 5.0, 10.0, 15.0], [-2.5, 20.0])
    zeros = np.zeros(dist.size)
    # inline geometry: no coordinates
    x, label, kind = plots.pick_abscissa(dist, zeros, zeros, source=src, receiver=rec)
    assert kind == "horizontal" and np.array_equal(x, dist)
    # an unknown source epicentre (NaN) leaves no position along the line
    s_nan = sxy.copy()
    s_nan[0] = np.nan
    _, _, kind = plots.pick_abscissa(dist, zeros, zeros, source=src, receiver=rec, source_xy=s_nan,
                                     receiver_xy=rxy)
    assert kind == "horizontal"
    # stations spread over an area (a network)
    net = np.array([[0.0, 0.0], [40.0, 0.0], [0.0, 30.0], [40.0, 30.0]])[np.tile(np.arange(4), 2)]
    _, _, kind = plots.pick_abscissa(dist, zeros, zeros, source=src, receiver=rec, source_xy=sxy, receiver_xy=net)
    assert kind == "horizontal"
    # a borehole (receivers all at one x, y, down the hole) keeps its receiver-depth abscissa
    depths = np.arange(1.0, 9.0)
    hole = np.tile([[5.0, 5.0]], (8, 1))
    x, _, kind = plots.pick_abscissa(np.full(8, 2.0), np.zeros(8), depths, source=["s"] * 8,
                                     source_xy=np.tile([[3.0, 5.0]], (8, 1)), receiver_xy=hole)
    assert kind == "receiver_depth" and np.array_equal(x, depths)
    with pytest.raises(ValueError, match="one row per pick"):
        plots.pick_abscissa(dist, zeros, zeros, source_xy=sxy[:3], receiver_xy=rxy)


def test_line_figures_mark_sources_and_keep_overlapping_bands_apart():
    sxy, rxy, dist, src, rec = _line_table_layout([0.0, 5.0, 10.0, 15.0], [-2.5, 20.0])
    zeros = np.zeros(dist.size)
    x, label, _ = plots.pick_abscissa(dist, zeros, zeros, source=src, receiver=rec, source_xy=sxy,
                                      receiver_xy=rxy)
    _, s_pos = plots.line_positions(rxy, sxy)
    positions = dict(zip(src, s_pos))
    rng = np.random.default_rng(3)
    pred = dist / 600.0 * rng.normal(1.0, 0.1, (50, 1))  # direct wave t = d / v (synthetic)
    for fn in (plots.plot_travel_time_fit, plots.plot_prior_predictive):
        fig = fn(x, dist / 600.0, np.full(dist.size, 1e-3), pred, source=src, x_label=label,
                 source_positions=positions)
        ax = fig.axes[0]
        assert fig.axes[-1 if fn is plots.plot_travel_time_fit else 0].get_xlabel() == label
        marks = [ln for ln in ax.lines if ln.get_marker() == "^" and len(ln.get_xdata()) == 1]
        assert sorted(float(m.get_xdata()[0]) for m in marks) == pytest.approx([-2.5, 20.0])
        # bands: hatched, and any plain fill is so light that two overlapping stay near white
        fills = [c for c in ax.collections if len(c.get_paths())]
        assert {c.get_hatch() for c in fills} >= {"////", "\\\\\\\\"}
        assert max(float(c.get_facecolor()[0][3]) for c in fills if c.get_facecolor().size) <= 0.1
