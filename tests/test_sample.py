"""Tests of the ensemble driver: sampling, determinism, checkpoints, convergence verdicts."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest
from emcee.autocorr import integrated_time
from emcee.moves import DEMove, DESnookerMove, MHMove

from invert import sample
from invert.sample import (
    ConvergenceTargets,
    SamplerResult,
    SamplingInterrupted,
    checkpoint_steps,
    convergence_report,
    initial_around,
    initial_from_prior,
    run_ensembles,
)

# A correlated 2-D Gaussian: its mean and covariance are the exact answers.
MEAN = np.array([1.0, -2.0])
COV = np.array([[1.0, 1.6], [1.6, 4.0]])  # correlation 0.8
ICOV = np.linalg.inv(COV)


def gaussian_lp(theta):
    d = theta - MEAN
    return -0.5 * np.einsum("wi,ij,wj->w", d, ICOV, d)


def std_normal_lp(theta):
    return -0.5 * np.sum(theta**2, axis=1)


def independence_move(width=1.3):
    """Metropolis-Hastings independence proposal N(0, width^2 I): for a standard
    normal target it mixes in a few steps, which keeps "until" tests short."""

    def propose(coords, random):
        new = width * random.randn(*coords.shape)
        log_q = lambda x: -0.5 * np.sum(x**2, axis=1) / width**2  # noqa: E731
        return new, log_q(coords) - log_q(new)

    return MHMove(propose)


def start(n_ens=2, n_walkers=8, n_dim=2, seed=0):
    return np.random.default_rng(seed).normal(size=(n_ens, n_walkers, n_dim))


class InterruptAt:
    """Log-probability that raises KeyboardInterrupt (as Ctrl-C would) on call number ``n``."""

    def __init__(self, fn, n):
        self.fn, self.n, self.calls = fn, n, 0

    def __call__(self, theta):
        self.calls += 1
        if self.calls == self.n:
            raise KeyboardInterrupt
        return self.fn(theta)


def assert_same_run(a: SamplerResult, b: SamplerResult):
    assert np.array_equal(a.chain, b.chain)
    assert np.array_equal(a.log_prob, b.log_prob)
    assert np.array_equal(a.accepted, b.accepted)
    if a.blobs is None:
        assert b.blobs is None
    else:
        assert np.array_equal(a.blobs, b.blobs)


# ---------------------------------------------------------------- sampling
@pytest.fixture(scope="module")
def gaussian_run():
    init = initial_around(MEAN, 0.3, 2, 12, np.random.default_rng(1), gaussian_lp)
    result = run_ensembles(gaussian_lp, init, 1500, seed=11, progress=False, parameter_names=["a", "b"])
    return result, convergence_report(result, burn=300)


def test_correlated_gaussian_mean_and_covariance(gaussian_run):
    # Exact answer: the target's own mean and covariance; tolerance 5 Monte Carlo
    # standard errors with the effective sample size of the run.
    result, report = gaussian_run
    draws = result.samples(burn=300)
    ess = np.min(report.ess_bulk)
    assert ess > 400
    se_mean = np.sqrt(np.diag(COV) / ess)
    assert np.all(np.abs(draws.mean(axis=0) - MEAN) < 5 * se_mean)
    cov = np.cov(draws, rowvar=False)
    # Standard error of a sample (co)variance of a Gaussian: sqrt((s_ii s_jj + s_ij^2) / n) (common practice).
    se_cov = np.sqrt((np.outer(np.diag(COV), np.diag(COV)) + COV**2) / ess)
    assert np.all(np.abs(cov - COV) < 5 * se_cov)


def test_report_matches_arviz_and_emcee_on_stored_samples(gaussian_run):
    import arviz as az

    result, report = gaussian_run
    kept = result.chain[:, 300:]  # (E, S, W, D)
    E, S, W, D = kept.shape
    by_walker = kept.transpose(0, 2, 1, 3).reshape(E * W, S, D)
    by_ensemble = kept.reshape(E, S * W, D)
    for i in range(D):
        assert report.rhat_walkers[i] == pytest.approx(az.rhat(by_walker[:, :, i], method="rank"), rel=1e-12)
        assert report.rhat_ensembles[i] == pytest.approx(az.rhat(by_ensemble[:, :, i], method="rank"), rel=1e-12)
        assert report.ess_bulk[i] == pytest.approx(az.ess(by_walker[:, :, i], method="bulk"), rel=1e-12)
        assert report.ess_tail[i] == pytest.approx(az.ess(by_walker[:, :, i], method="tail"), rel=1e-12)
    assert np.allclose(report.rhat, np.maximum(report.rhat_walkers, report.rhat_ensembles))
    taus = np.array([integrated_time(kept[e], tol=0) for e in range(E)])
    walker_mean = np.stack([kept[e].mean(axis=1) for e in range(E)], axis=1)  # (S, E, D)
    tau_mean = integrated_time(walker_mean, tol=0)
    assert np.allclose(report.tau_per_ensemble, taus) and np.allclose(report.tau_walker_mean, tau_mean)
    assert np.allclose(report.tau, np.maximum(taus.max(axis=0), tau_mean))
    assert np.allclose(report.acceptance, result.accepted[:, 300:].mean(axis=(1, 2)))
    # The stretch move on a 2-D Gaussian accepts well above 0.5: that is noted, not failed.
    assert any("acceptance" in n for n in report.notes)


def test_same_seed_same_chains_other_seed_other_chains():
    init = start()
    a = run_ensembles(std_normal_lp, init, 60, seed=5, progress=False)
    b = run_ensembles(std_normal_lp, init, 60, seed=5, progress=False)
    c = run_ensembles(std_normal_lp, init, 60, seed=6, progress=False)
    assert_same_run(a, b)
    assert not np.array_equal(a.chain, c.chain)
    # Ensembles get different streams even from the same start.
    d = run_ensembles(std_normal_lp, np.repeat(init[:1], 2, axis=0), 60, seed=5, progress=False)
    assert not np.array_equal(d.chain[0], d.chain[1])


def test_blobs_are_kept_with_their_positions():
    def lp_with_blobs(theta):
        return std_normal_lp(theta), np.column_stack([theta[:, 0] ** 2, theta.sum(axis=1)])

    result = run_ensembles(lp_with_blobs, start(), 40, seed=2, progress=False)
    assert result.blobs.shape == (2, 40, 8, 2)
    assert np.allclose(result.blobs[..., 0], result.chain[..., 0] ** 2)
    assert np.allclose(result.blobs[..., 1], result.chain.sum(axis=-1))
    plain = run_ensembles(std_normal_lp, start(), 40, seed=2, progress=False)
    assert np.array_equal(plain.chain, result.chain)

    def lp_one_blob(theta):
        lp = std_normal_lp(theta)
        return lp, 2 * lp

    single = run_ensembles(lp_one_blob, start(), 20, seed=2, progress=False)
    assert single.blobs.shape == (2, 20, 8, 1)
    assert np.allclose(single.blobs[..., 0], 2 * single.log_prob)


def test_progress_bar_shows_time_left(capsys, monkeypatch):
    import sys

    monkeypatch.setattr(sys.stderr, "isatty", lambda: True)  # the bar is drawn on a terminal only
    run_ensembles(std_normal_lp, start(), 20, seed=1, progress=True)
    err = capsys.readouterr().err
    assert "40/40" in err and "<" in err  # steps of both ensembles; tqdm's "elapsed<remaining"


# ------------------------------------------------------------- checkpoints
@pytest.mark.parametrize("call, saved_steps", [(101, [49, 0]), (302, [120, 29])])
def test_resume_after_ctrl_c_equals_uninterrupted_run(tmp_path, call, saved_steps):
    # Calls: 1 for the start of an ensemble, then 2 per stretch step (two half-ensembles).
    init = start()
    reference = run_ensembles(std_normal_lp, init, 120, seed=9, progress=False)
    path = tmp_path / "run.h5"
    with pytest.raises(SamplingInterrupted) as info:
        run_ensembles(InterruptAt(std_normal_lp, call), init, 120, seed=9, checkpoint=path, checkpoint_every=7,
                      progress=False)
    assert isinstance(info.value, KeyboardInterrupt)
    assert checkpoint_steps(path).tolist() == saved_steps  # every completed step, no more
    resumed = run_ensembles(std_normal_lp, None, 120, seed=9, checkpoint=path, resume=True, progress=False)
    assert_same_run(resumed, reference)
    assert checkpoint_steps(path).tolist() == [120, 120]
    assert [p.name for p in tmp_path.iterdir()] == ["run.h5"]  # no temporary files left behind


def test_resume_with_differential_evolution_moves(tmp_path):
    moves = [(DEMove(), 0.8), (DESnookerMove(), 0.2)]
    init = start()
    reference = run_ensembles(std_normal_lp, init, 80, seed=12, moves=moves, progress=False)
    path = tmp_path / "run.h5"
    with pytest.raises(KeyboardInterrupt):
        run_ensembles(InterruptAt(std_normal_lp, 77), init, 80, seed=12, moves=moves, checkpoint=path,
                      progress=False)
    assert 0 < checkpoint_steps(path).sum() < 160
    resumed = run_ensembles(std_normal_lp, init, 80, seed=12, moves=moves, checkpoint=path, resume=True,
                            progress=False)
    assert_same_run(resumed, reference)


def test_resume_with_blobs_after_ctrl_c(tmp_path):
    def lp_with_blobs(theta):
        return std_normal_lp(theta), theta[:, 0] + 10.0

    init = start()
    reference = run_ensembles(lp_with_blobs, init, 50, seed=4, progress=False)
    path = tmp_path / "run.h5"
    with pytest.raises(KeyboardInterrupt):
        run_ensembles(InterruptAt(lp_with_blobs, 61), init, 50, seed=4, checkpoint=path, checkpoint_seconds=1e-9,
                      progress=False)  # saved after every step
    resumed = run_ensembles(lp_with_blobs, init, 50, seed=4, checkpoint=path, resume=True, progress=False)
    assert_same_run(resumed, reference)


def test_extending_a_finished_run_equals_one_long_run(tmp_path):
    init = start()
    path = tmp_path / "run.h5"
    run_ensembles(std_normal_lp, init, 40, seed=3, checkpoint=path, progress=False)
    longer = run_ensembles(std_normal_lp, init, 90, seed=3, checkpoint=path, resume=True, progress=False)
    assert_same_run(longer, run_ensembles(std_normal_lp, init, 90, seed=3, progress=False))


CHILD = """
import sys, time
import numpy as np
from invert.sample import run_ensembles

def log_prob(theta):
    time.sleep(0.001)  # slow enough to be killed mid-run
    return -0.5 * np.sum(theta**2, axis=1)

init = np.random.default_rng(0).normal(size=(2, 8, 2))
run_ensembles(log_prob, init, 120, seed=21, checkpoint=sys.argv[1], checkpoint_every=3, progress=False)
"""


def test_resume_after_process_killed_equals_uninterrupted_run(tmp_path):
    script = tmp_path / "child.py"
    script.write_text(textwrap.dedent(CHILD))
    path = tmp_path / "run.h5"
    child = subprocess.Popen([sys.executable, str(script), str(path)], stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            if path.exists():
                try:
                    if checkpoint_steps(path).sum() >= 15:
                        break
                except ValueError:
                    pass
            assert child.poll() is None, child.stderr.read().decode()
            time.sleep(0.02)
        assert child.poll() is None, "the child finished before it could be killed"
        os.kill(child.pid, signal.SIGKILL)
        assert child.wait(timeout=10) == -signal.SIGKILL
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
    saved = checkpoint_steps(path)
    assert 15 <= saved.sum() < 240
    init = np.random.default_rng(0).normal(size=(2, 8, 2))
    resumed = run_ensembles(std_normal_lp, init, 120, seed=21, checkpoint=path, resume=True, progress=False)
    reference = run_ensembles(std_normal_lp, init, 120, seed=21, progress=False)
    assert_same_run(resumed, reference)


@pytest.mark.parametrize("change, message", [
    (dict(initial=start(n_walkers=10)), "n_walkers"),
    (dict(initial=start(n_dim=3)), "n_dim"),
    (dict(initial=start(n_ens=3)), "n_ensembles"),
    (dict(seed=8), "seed"),
    (dict(fingerprint="other data"), "fingerprint"),
    (dict(parameter_names=["x", "y"]), "parameter_names"),
    (dict(initial=start(seed=1)), "initial positions differ"),
])
def test_resume_refuses_other_settings(tmp_path, change, message):
    path = tmp_path / "run.h5"
    base = dict(initial=start(), seed=7, fingerprint="data v1", parameter_names=None)
    run_ensembles(std_normal_lp, base["initial"], 10, seed=7, checkpoint=path, progress=False, fingerprint="data v1")
    args = {**base, **change}
    with pytest.raises(ValueError, match=message):
        run_ensembles(std_normal_lp, args["initial"], 10, seed=args["seed"], checkpoint=path, resume=True,
                      progress=False, fingerprint=args["fingerprint"], parameter_names=args["parameter_names"])


def test_resume_refuses_a_changed_log_prob(tmp_path):
    path = tmp_path / "run.h5"
    run_ensembles(std_normal_lp, start(), 10, seed=7, checkpoint=path, progress=False)
    with pytest.raises(ValueError, match="differs from the saved values"):
        run_ensembles(lambda t: 0.5 * std_normal_lp(t), None, 20, seed=7, checkpoint=path, resume=True,
                      progress=False)


def test_checkpoint_is_not_overwritten_or_invented(tmp_path):
    path = tmp_path / "run.h5"
    with pytest.raises(FileNotFoundError, match="no checkpoint"):
        run_ensembles(std_normal_lp, start(), 10, seed=1, checkpoint=path, resume=True, progress=False)
    run_ensembles(std_normal_lp, start(), 10, seed=1, checkpoint=path, progress=False)
    with pytest.raises(FileExistsError, match="exists"):
        run_ensembles(std_normal_lp, start(), 10, seed=1, checkpoint=path, progress=False)


def test_failed_checkpoint_write_keeps_previous_file(tmp_path, monkeypatch):
    path = tmp_path / "run.h5"
    run_ensembles(std_normal_lp, start(), 30, seed=1, checkpoint=path, progress=False)

    def broken(f, *args):
        f.attrs["format"] = "half written"
        f.create_dataset("initial", data=np.zeros(3))
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(sample, "_fill_checkpoint", broken)
    with pytest.raises(OSError, match="disk full"):
        run_ensembles(std_normal_lp, None, 60, seed=1, checkpoint=path, resume=True, checkpoint_every=5,
                      progress=False)
    monkeypatch.undo()
    assert checkpoint_steps(path).tolist() == [30, 30]
    assert [p.name for p in tmp_path.iterdir()] == ["run.h5"]


def test_unreadable_checkpoint_gives_clear_error(tmp_path):
    path = tmp_path / "run.h5"
    path.write_bytes(b"this is not HDF5")
    with pytest.raises(ValueError, match="cannot read checkpoint"):
        run_ensembles(std_normal_lp, start(), 10, seed=1, checkpoint=path, resume=True, progress=False)


# ------------------------------------------------------------- convergence
def iid_result(n_ens=4, n_steps=1000, n_walkers=8, n_dim=2, seed=0, shift=None, accept=None):
    """A 'run' made of independent standard-normal draws: the exact reference
    for which R-hat -> 1, ESS = number of draws and tau = 1 (Vehtari et al.,
    Bayesian Analysis 16, 2021; Sokal's definition of tau as used in emcee)."""
    rng = np.random.default_rng(seed)
    chain = rng.standard_normal((n_ens, n_steps, n_walkers, n_dim))
    if shift is not None:
        chain[0] += shift
    lp = -0.5 * np.sum(chain**2, axis=-1)
    shape = (n_ens, n_steps, n_walkers)
    acc = np.ones(shape, bool) if accept is None else rng.random(shape) < accept
    return SamplerResult(chain, lp, acc, None, chain[:, 0].copy(), 0, tuple(f"p{i}" for i in range(n_dim)))


def test_independent_draws_are_converged_with_ess_near_n_and_tau_near_one():
    report = convergence_report(iid_result(), burn=500)
    n_draws = 4 * 500 * 8
    assert np.all(report.rhat < 1.01)
    assert np.all(np.abs(report.ess_bulk / n_draws - 1) < 0.15)
    assert np.all(np.abs(report.ess_tail / n_draws - 1) < 0.25)
    assert np.all(np.abs(report.tau - 1) < 0.3)
    assert report.converged, report.verdict
    assert report.verdict.startswith("Converged")


def test_disagreeing_ensembles_are_not_converged():
    report = convergence_report(iid_result(shift=np.array([0.5, 0.0])), burn=500)
    assert not report.converged
    assert report.rhat[0] > 1.01 and report.rhat_ensembles[0] > 1.01
    assert "R-hat is not below 1.01 for p0" in report.verdict
    assert "p1 (" not in report.failures[0]  # the unshifted parameter is not blamed


def test_single_ensemble_is_never_called_converged():
    report = convergence_report(iid_result(n_ens=1, n_walkers=64), burn=500)
    assert np.all(report.rhat < 1.01) and np.all(report.ess_bulk > 400)
    assert not report.converged
    assert "only one ensemble" in report.verdict


def test_low_acceptance_is_noted():
    report = convergence_report(iid_result(accept=0.05), burn=500)
    assert any("acceptance fraction outside the usual 0.15-0.5" in n for n in report.notes)
    assert "acceptance" in report.summary()


def test_too_short_run_is_not_converged_and_says_why():
    result = run_ensembles(std_normal_lp, start(), 60, seed=1, progress=False)
    report = convergence_report(result)
    assert not report.converged
    assert report.verdict.startswith("NOT converged")
    assert "not more than 50 autocorrelation times" in report.verdict
    assert "ESS is not above 400" in report.verdict
    assert "NOT converged" in report.summary()


def test_stuck_walker_is_found_and_blocks_the_verdict():
    # Outside a disc of radius 6 the density is zero except on a tiny island at
    # (20, 20); a walker started there can never leave (every stretch move from
    # it lands where log_prob = -inf) and sits 400 log-units below the others.
    def trap_lp(theta):
        r_main = np.linalg.norm(theta, axis=1)
        r_island = np.linalg.norm(theta - 20.0, axis=1)
        lp = std_normal_lp(theta)
        return np.where((r_main < 6) | (r_island < 0.01), lp, -np.inf)

    init = start(n_walkers=8) * 0.5
    init[1, 3] = [20.0, 20.0]
    result = run_ensembles(trap_lp, init, 300, seed=2, progress=False)
    report = convergence_report(result, burn=100)
    assert [(e, w) for e, w, _ in report.stuck] == [(1, 3)]
    assert "position unchanged" in report.stuck[0][2] and "median log-probability" in report.stuck[0][2]
    assert not report.converged
    assert "stuck walker(s): ensemble 2 walker 4" in report.verdict


def test_until_mode_runs_until_converged():
    init = start(n_walkers=8)
    result = run_ensembles(std_normal_lp, init, 50, seed=4, until=True, max_steps=2000, moves=independence_move(),
                           progress=False)
    assert result.report is not None and result.report.converged
    assert not result.reached_cap
    assert 50 < result.n_steps < 2000
    assert result.status.startswith("Converged after")
    # The check is reproducible from the returned chains.
    again = convergence_report(result, burn=result.report.burn)
    assert again.converged and np.allclose(again.rhat, result.report.rhat)


def test_until_mode_stops_at_cap_and_says_so():
    result = run_ensembles(std_normal_lp, start(), 40, seed=4, until=True, max_steps=80, progress=False)
    assert result.n_steps == 80 and result.reached_cap
    assert not result.report.converged
    assert "cap of 80 steps" in result.status and "NOT converged" in result.status


def test_until_mode_resumes_exactly(tmp_path):
    init = start(n_walkers=8)
    kw = dict(seed=4, until=True, max_steps=2000, progress=False)
    reference = run_ensembles(std_normal_lp, init, 50, moves=independence_move(), **kw)
    path = tmp_path / "run.h5"
    # one call per step with this move: interrupt inside the second round
    with pytest.raises(KeyboardInterrupt):
        run_ensembles(InterruptAt(std_normal_lp, 140), init, 50, moves=independence_move(), checkpoint=path, **kw)
    resumed = run_ensembles(std_normal_lp, init, 50, moves=independence_move(), checkpoint=path, resume=True, **kw)
    assert_same_run(resumed, reference)
    assert resumed.report.converged


def test_convergence_targets_are_configurable():
    result = iid_result(n_ens=2, n_steps=400, n_walkers=4)  # 1600 independent draws kept
    assert convergence_report(result, burn=200).converged
    strict = convergence_report(result, burn=200, targets=ConvergenceTargets(min_ess=5000))
    assert not strict.converged
    assert "bulk ESS is not above 5000" in strict.verdict


# ---------------------------------------------------------- starting points
def test_initial_around_redraws_impossible_points():
    def half_plane(theta):
        return np.where(theta[:, 0] > 0, std_normal_lp(theta), -np.inf)

    init = initial_around([0.0, 0.0], 1.0, 3, 10, np.random.default_rng(0), half_plane)
    assert init.shape == (3, 10, 2)
    assert np.all(init[..., 0] > 0)


def test_initial_around_gives_up_with_a_clear_error():
    def nowhere(theta):
        return np.full(len(theta), -np.inf)

    with pytest.raises(RuntimeError, match="still have log-probability -inf after 5 rounds"):
        initial_around([0.0], 1.0, 2, 4, np.random.default_rng(0), nowhere, max_tries=5)


def test_initial_from_prior_shape_and_redraws():
    def prior(n, rng):
        return rng.uniform(-1, 1, size=(n, 3))

    def positive_first(theta):
        return np.where(theta[:, 0] > 0, 0.0, -np.inf)

    init = initial_from_prior(prior, 2, 12, np.random.default_rng(3), positive_first)
    assert init.shape == (2, 12, 3)
    assert np.all((init > -1) & (init < 1)) and np.all(init[..., 0] > 0)


@pytest.mark.parametrize("bad_lp, message", [
    (lambda t: np.where(t[:, 0] > 10, 0.0, -np.inf), "start where log_prob is -inf"),
    (lambda t: np.full(len(t), np.nan), "NaN"),
    (lambda t: np.zeros(len(t) + 1), "must return shape"),
])
def test_bad_log_prob_or_start_gives_clear_error(bad_lp, message):
    with pytest.raises(ValueError, match=message):
        run_ensembles(bad_lp, start(), 10, seed=1, progress=False)


def test_bad_arguments_are_refused():
    with pytest.raises(ValueError, match="at least 2 x parameters"):
        run_ensembles(std_normal_lp, start(n_walkers=3), 10, seed=1, progress=False)
    with pytest.raises(ValueError, match="at least 2 x parameters"):
        run_ensembles(std_normal_lp, start(n_walkers=3), 10, seed=1, progress=False,
                      moves=[(DEMove(), 0.8), (DESnookerMove(), 0.2)])
    # a Metropolis move does not need the walkers of the others
    run_ensembles(std_normal_lp, start(n_walkers=3), 10, seed=1, progress=False, moves=independence_move())
    with pytest.raises(ValueError, match="seed"):
        run_ensembles(std_normal_lp, start(), 10, seed=-1, progress=False)
    with pytest.raises(ValueError, match="max_steps"):
        run_ensembles(std_normal_lp, start(), 10, seed=1, until=True, progress=False)
    with pytest.raises(ValueError, match="lower-dimensional"):
        flat = start()
        flat[..., 1] = flat[..., 0]
        run_ensembles(std_normal_lp, flat, 10, seed=1, progress=False)
