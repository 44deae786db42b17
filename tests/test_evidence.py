"""Evidence estimators checked against closed forms.

The reference problem is the linear-Gaussian model with a Gaussian prior:
data t = Phi w + noise, noise ~ N(0, beta^-1 I), prior w ~ N(0, alpha^-1 I). Its log
evidence is Bishop, "Pattern Recognition and Machine Learning", 2006, eq. 3.86:

    ln p(t) = M/2 ln alpha + N/2 ln beta - E(m_N) - 1/2 ln|A| - N/2 ln(2 pi),
    A = alpha I + beta Phi^T Phi,  m_N = beta A^-1 Phi^T t,
    E(m_N) = beta/2 |t - Phi m_N|^2 + alpha/2 m_N^T m_N,

itself checked here against the marginal t ~ N(0, beta^-1 I + alpha^-1 Phi Phi^T)
(Bishop 2006, eq. 2.115) evaluated by scipy.stats.multivariate_normal.

Default suite: each estimator in 2 and 6 dimensions with fixed seeds, within 3 of its
own stated standard errors plus 0.1 nats of the closed form; the spread of the standardised
errors over 5 seeds. Slow suite (`make test-long`): the stated errors over 20 seeds (RMS of
the standardised errors between 0.5 and 1.5), the stepping-stone ones on short rungs too, and,
for each estimator, a long setting whose stated error is at most 0.1 nats and which lands
within 0.1 nats of the closed form.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from invert import evidence as ev


# ============================================================================ the reference problem
class LinearGaussian:
    """Synthetic linear-Gaussian regression with known evidence (all inputs seeded)."""

    def __init__(self, dim: int, n_data: int = 20, alpha: float = 1.0, beta: float = 25.0, seed: int = 0):
        rng = np.random.default_rng(seed)
        self.dim, self.n, self.alpha, self.beta = dim, n_data, alpha, beta
        self.phi = rng.normal(size=(n_data, dim))
        w = rng.normal(size=dim) / math.sqrt(alpha)
        self.t = self.phi @ w + rng.normal(size=n_data) / math.sqrt(beta)

    def log_evidence(self) -> float:
        """Bishop (2006) eq. 3.86."""
        a, b, phi, t = self.alpha, self.beta, self.phi, self.t
        big_a = a * np.eye(self.dim) + b * phi.T @ phi
        m = b * np.linalg.solve(big_a, phi.T @ t)
        e = b / 2 * np.sum((t - phi @ m) ** 2) + a / 2 * m @ m
        return (self.dim / 2 * math.log(a) + self.n / 2 * math.log(b) - e
                - 0.5 * np.linalg.slogdet(big_a)[1] - self.n / 2 * math.log(2 * math.pi))

    def log_likelihood(self, theta):
        r = self.t[None, :] - np.atleast_2d(theta) @ self.phi.T
        return -0.5 * self.beta * np.sum(r * r, axis=1) + self.n / 2 * math.log(self.beta / (2 * math.pi))

    def prior_transform(self, u):
        return stats.norm.ppf(u) / math.sqrt(self.alpha)

    def log_prior(self, theta):
        return np.sum(stats.norm.logpdf(np.atleast_2d(theta), scale=1 / math.sqrt(self.alpha)), axis=1)

    def sample_prior(self, n, rng):
        return rng.normal(size=(n, self.dim)) / math.sqrt(self.alpha)


def nested(problem: LinearGaussian, seed: int, live_points: int, queue_size: int = 1):
    # this likelihood costs microseconds: one point per call (queue_size 1) is faster than batching
    return ev.nested_sampling(problem.log_likelihood, problem.prior_transform, problem.dim, live_points=live_points,
                              seed=seed, progress=False, queue_size=queue_size)


def stepping(problem: LinearGaussian, seed: int, rungs: int, steps: int, burn: int):
    return ev.stepping_stone(problem.log_likelihood, problem.log_prior, problem.sample_prior, problem.dim,
                             rungs=rungs, steps=steps, burn=burn, seed=seed, progress=False)


# ============================================================================ the closed form itself
@pytest.mark.parametrize("dim", [2, 6])
def test_closed_form_matches_the_gaussian_marginal(dim):
    # Bishop eq. 3.86 against the marginal N(0, beta^-1 I + alpha^-1 Phi Phi^T) (Bishop eq. 2.115) in scipy
    p = LinearGaussian(dim, alpha=2.0, beta=10.0, seed=3)
    cov = np.eye(p.n) / p.beta + p.phi @ p.phi.T / p.alpha
    direct = stats.multivariate_normal(np.zeros(p.n), cov).logpdf(p.t)
    assert p.log_evidence() == pytest.approx(direct, abs=1e-9)


# ============================================================================ estimators, default suite
@pytest.mark.parametrize("dim, live_points", [(2, 80), (6, 120)])
def test_nested_sampling_matches_closed_form(dim, live_points):
    p = LinearGaussian(dim)
    r = nested(p, seed=11, live_points=live_points)
    exact = p.log_evidence()
    assert 0 < r.log_z_error < 1.0
    assert abs(r.log_z - exact) < 3 * r.log_z_error + 0.1, (r.log_z, r.log_z_error, exact)
    # equal-weight draws follow the posterior N(m_N, A^-1) (Bishop eq. 3.53-3.54): mean within 4 sd / sqrt(ESS)
    big_a = p.alpha * np.eye(dim) + p.beta * p.phi.T @ p.phi
    mean = p.beta * np.linalg.solve(big_a, p.phi.T @ p.t)
    sd = np.sqrt(np.diag(np.linalg.inv(big_a)))
    ess = r.details["posterior_ess"]
    assert np.all(np.abs(r.samples.mean(axis=0) - mean) < 4 * sd / math.sqrt(ess) + 0.05 * sd)
    assert r.n_calls > 0 and r.samples.shape[1] == dim


@pytest.mark.parametrize("dim", [2, 6])
def test_stepping_stone_matches_closed_form(dim):
    p = LinearGaussian(dim)
    r = stepping(p, seed=5, rungs=12, steps=150, burn=50)
    exact = p.log_evidence()
    assert 0 < r.log_z_error < 1.0
    assert abs(r.log_z - exact) < 3 * r.log_z_error + 0.1, (r.log_z, r.log_z_error, exact)
    assert len(r.details["rungs"]) == 13 and r.details["ladder"][0] == 0 and r.details["ladder"][-1] == 1


def test_same_seed_same_evidence():
    p = LinearGaussian(2)
    # batched through the thread pool: the batches must not change the result
    a, b = nested(p, seed=3, live_points=40, queue_size=8), nested(p, seed=3, live_points=40, queue_size=8)
    assert a.log_z == b.log_z and a.n_calls == b.n_calls and a.details["batched_calls"] < a.n_calls
    c, d = stepping(p, 2, 4, 30, 10), stepping(p, 2, 4, 30, 10)
    assert c.log_z == d.log_z


# ============================================================================ pieces
def test_batching_pool_gives_serial_results_in_fewer_calls():
    calls = []

    def batched(x):
        calls.append(x.shape[0])
        return np.sum(x ** 2, axis=1)

    pool = ev.BatchingPool({"f": batched}, size=8)
    f = pool.per_point("f")

    def task(seed):  # a sequential chain of per-point calls, like a random walk
        rng = np.random.default_rng(seed)
        x, total = rng.normal(size=3), 0.0
        for _ in range(5):
            total += f(x)
            x = x + rng.normal(size=3)
        return total

    try:
        got = pool.map(task, range(20))
    finally:
        pool.close()
    want = []
    for seed in range(20):
        rng = np.random.default_rng(seed)
        x, total = rng.normal(size=3), 0.0
        for _ in range(5):
            total += float(np.sum(x ** 2))
            x = x + rng.normal(size=3)
        want.append(total)
    assert np.allclose(got, want, rtol=1e-14)
    assert sum(calls) == 100 and len(calls) < 100 and max(calls) == 8


def test_batching_pool_passes_errors_on():
    def broken(x):
        raise RuntimeError("likelihood failed")

    pool = ev.BatchingPool({"f": broken}, size=4)
    try:
        with pytest.raises(RuntimeError, match="likelihood failed"):
            pool.map(pool.per_point("f"), [np.zeros(2)] * 6)
    finally:
        pool.close()


def test_nested_sampling_rejects_bad_input():
    p = LinearGaussian(2)
    with pytest.raises(ValueError, match="too few"):
        ev.nested_sampling(p.log_likelihood, p.prior_transform, 2, live_points=3, progress=False)
    with pytest.raises(ValueError, match="NaN"):
        ev.nested_sampling(lambda th: np.full(th.shape[0], np.nan), p.prior_transform, 2, live_points=20,
                           progress=False)


def test_ladders():
    b = ev.power_ladder(8, 5.0)
    assert b[0] == 0 and b[-1] == 1 and np.all(np.diff(b) > 0)
    # Xie et al. (2011): rungs at evenly spaced quantiles of Beta(0.3, 1); quantiles from scipy
    q = ev.beta_quantile_ladder(10, 0.3)
    assert np.allclose(q, stats.beta(0.3, 1.0).ppf(np.arange(11) / 10), rtol=1e-12, atol=1e-15)


def test_default_moves_sample_the_target():
    # the tempered chains' moves must leave the target invariant: a 6-D standard normal
    import emcee

    s = emcee.EnsembleSampler(32, 6, lambda x: -0.5 * np.sum(x ** 2, axis=1), vectorize=True,
                              moves=ev.default_moves())
    s.random_state = np.random.RandomState(4).get_state()
    s.run_mcmc(np.random.default_rng(4).normal(size=(32, 6)), 3000)
    var = s.get_chain()[500:].reshape(-1, 6).var(axis=0)
    # 2500 steps x 32 walkers with autocorrelation ~10-20 steps: ~5000 effective draws, sd of a variance ~0.02
    assert np.all(np.abs(var - 1.0) < 0.12), var


def test_block_bootstrap_error_for_independent_draws():
    # iid weights: the error of log(mean w) is sd(w) / (mean(w) sqrt(n)) by the delta method (common practice)
    rng = np.random.default_rng(1)
    ll = rng.normal(size=(400, 32))
    r = ev._rung_ratio(ll, 0.5, np.random.default_rng(2), 2000)
    w = np.exp(0.5 * ll)
    delta = w.std() / (w.mean() * math.sqrt(w.size))
    assert r["error"] == pytest.approx(delta, rel=0.3)
    assert r["log_ratio"] == pytest.approx(math.log(w.mean()), abs=1e-12)


def test_block_bootstrap_sees_autocorrelation():
    # AR(1) log-likelihood series (phi = 0.9, integrated time (1 + phi) / (1 - phi) = 19; common practice):
    # the stated error must track the spread over independent replicates, not the iid formula
    phi, steps, walkers = 0.9, 2000, 8
    estimates, errors = [], []
    for seed in range(30):
        rng = np.random.default_rng(seed)
        e = rng.normal(size=(steps, walkers)) * math.sqrt(1 - phi ** 2)
        x = np.empty_like(e)
        x[0] = rng.normal(size=walkers)
        for t in range(1, steps):
            x[t] = phi * x[t - 1] + e[t]
        r = ev._rung_ratio(x, 0.5, np.random.default_rng(100 + seed), 500)
        estimates.append(r["log_ratio"])
        errors.append(r["error"])
    spread = float(np.std(estimates, ddof=1))
    assert 0.6 < float(np.mean(errors)) / spread < 1.6, (np.mean(errors), spread)


def test_agreement_and_disagreement():
    def res(z, e):
        return ev.EvidenceResult("x", z, e, 0, 0.0, np.zeros((1, 1)), np.zeros(1))

    ok = ev.agreement(res(1.0, 0.1), res(1.2, 0.1))
    assert ok["agree"] and ok["z"] == pytest.approx(-0.2 / math.hypot(0.1, 0.1))
    bad = ev.agreement(res(1.0, 0.1), res(2.0, 0.1))
    assert not bad["agree"] and "DISAGREE" in bad["message"]


def test_encompassing_bayes_factor_matches_two_evidences():
    # permissive: theta ~ U(-1, 1); restricted: U(0, 1); likelihood N(x_obs | theta, s^2).
    # Evidences in closed form from the normal CDF: Z = (Phi((b - x)/s) - Phi((a - x)/s)) / (b - a)
    x_obs, s = 0.3, 0.4
    z_perm = (stats.norm.cdf((1 - x_obs) / s) - stats.norm.cdf((-1 - x_obs) / s)) / 2
    z_restr = (stats.norm.cdf((1 - x_obs) / s) - stats.norm.cdf((0 - x_obs) / s)) / 1
    # exact posterior draws of the permissive model: the normal truncated to [-1, 1] (scipy.stats.truncnorm)
    post = stats.truncnorm((-1 - x_obs) / s, (1 - x_obs) / s, loc=x_obs, scale=s).rvs(20000, random_state=3)
    out = ev.encompassing_bayes_factor(post > 0, prior_probability=0.5)
    assert out["log_bayes_factor"] == pytest.approx(math.log(z_restr / z_perm), abs=4 * out["log_bayes_factor_error"])
    assert out["log_cap"] == pytest.approx(math.log(2.0))
    assert out["log_bayes_factor"] <= out["log_cap"]


# ============================================================================ honesty of the stated errors
# Over independent seeds the standardised errors z = (estimate - exact) / stated error of an honest
# estimator have mean square 1 (common practice). The checks: RMS z below 1.5 (errors not understated by
# more than half) and above 0.5 with at least one |z| > 0.5 (errors not grossly overstated, which would
# make every check pass). Exact values: Bishop (2006) eq. 3.86.
def _z_scores(run, exact: float, seeds) -> np.ndarray:
    return np.array([(r.log_z - exact) / r.log_z_error for r in (run(s) for s in seeds)])


def _assert_honest(z: np.ndarray, rms_high: float, rms_low: float, some: float) -> None:
    rms = float(np.sqrt(np.mean(z ** 2)))
    assert rms_low < rms < rms_high and np.max(np.abs(z)) > some, (np.round(z, 2), rms)


def test_stated_errors_are_honest_small():
    # 5 seeds in 2 dimensions, short settings; for honest errors RMS z > 2 has probability 0.1 % and
    # max |z| < 0.2 about 0.01 % (chi-square with 5 degrees of freedom; common practice)
    p = LinearGaussian(2)
    exact = p.log_evidence()
    zn = _z_scores(lambda s: nested(p, seed=300 + s, live_points=40), exact, range(5))
    zs = _z_scores(lambda s: stepping(p, seed=400 + s, rungs=8, steps=60, burn=20), exact, range(5))
    _assert_honest(zn, 2.0, 0.0, 0.2)
    _assert_honest(zs, 2.0, 0.0, 0.2)


@pytest.mark.slow
@pytest.mark.parametrize("dim", [2, 6])
def test_nested_sampling_errors_are_honest(dim):
    p = LinearGaussian(dim)
    z = _z_scores(lambda s: nested(p, seed=1000 + s, live_points=100), p.log_evidence(), range(20))
    _assert_honest(z, 1.5, 0.5, 0.5)


@pytest.mark.slow
@pytest.mark.parametrize("dim", [2, 6])
@pytest.mark.parametrize("steps, burn", [(100, 30), (50, 20)])
def test_stepping_stone_errors_are_honest(dim, steps, burn):
    # short rungs on purpose (50-100 kept steps, a few autocorrelation times): where the stated error
    # used to come out too small
    p = LinearGaussian(dim)
    z = _z_scores(lambda s: stepping(p, seed=2000 + s, rungs=12, steps=steps, burn=burn), p.log_evidence(),
                  range(20))
    _assert_honest(z, 1.5, 0.5, 0.5)


def test_drifting_rungs_widen_the_error():
    # a rung whose log-likelihood still climbs through the kept steps (a chain relaxing from a lower
    # temperature) biases its ratio low; the halves of the kept steps then differ and the error grows
    rng = np.random.default_rng(5)
    betas = np.array([0.0, 0.5, 1.0])
    steps, walkers = 200, 16
    flat = [rng.normal(size=(steps, walkers)) for _ in range(3)]
    means = [None] + [rng.normal(size=(steps, 2)) for _ in range(2)]
    _, _, err_flat, parts = ev._ladder_estimate(betas, flat, means, 0, np.random.default_rng(1), 200)
    assert err_flat == pytest.approx(parts["statistical"])
    drifting = [flat[0], flat[1] + np.linspace(-12.0, 0.0, steps)[:, None], flat[2]]
    _, _, err, parts = ev._ladder_estimate(betas, drifting, means, 0, np.random.default_rng(1), 200)
    # the ratio of rung 1 is low by about ln(6) = 1.8 nats (the weights exp(ll / 2) average exp(-6 u) over
    # u in [0, 1] relative to the end: (1 - e^-6) / 6); the widened error reaches that size
    assert parts["half_difference"] > 2 and err > 1.5 * parts["statistical"] and err > 1.5
    assert err == pytest.approx(math.hypot(parts["statistical"], 0.5 * parts["half_difference"]))


def test_rungs_start_from_resampled_draws():
    # draws of N(0, 1) weighted by exp(x): importance sampling gives N(1, 1) (completing the square;
    # common practice); the resampled starting walkers follow it
    rng = np.random.default_rng(2)
    x = rng.normal(size=(200000, 1))
    start = ev._resample_start(x, x[:, 0], 1.0, 4000, np.random.default_rng(3))
    assert start.shape == (4000, 1)
    assert start.mean() == pytest.approx(1.0, abs=0.06) and start.std() == pytest.approx(1.0, abs=0.06)


@pytest.mark.slow
def test_nested_sampling_long_setting_reaches_a_tenth_of_a_nat():
    # stated error sqrt(H / live points) with H ~ 17 nats here: 7000 live points give ~0.05-0.07
    p = LinearGaussian(6)
    exact = p.log_evidence()
    r = nested(p, seed=7, live_points=7000)
    assert r.log_z_error <= 0.1 and abs(r.log_z - exact) <= 0.1, (r.log_z, r.log_z_error, exact)


@pytest.mark.slow
def test_stepping_stone_long_setting_reaches_a_tenth_of_a_nat():
    p = LinearGaussian(6)
    exact = p.log_evidence()
    # 2000 kept steps gave a stated error of 0.1001 (just above the bar) once the walker term was added
    s = stepping(p, seed=7, rungs=32, steps=3000, burn=300)
    assert s.log_z_error <= 0.1 and abs(s.log_z - exact) <= 0.1, (s.log_z, s.log_z_error, exact)
