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
