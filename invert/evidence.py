"""Marginal likelihood (evidence) by two independent estimators.

Both estimators are generic: they see a batched log-likelihood
``log_likelihood(theta) -> (B,)`` for ``theta`` of shape (B, D) and the
normalised prior, and know nothing about layers or travel times.

* :func:`nested_sampling` -- nested sampling (Skilling, "Nested sampling for
  general Bayesian computation", Bayesian Analysis 1, 2006) with dynesty
  (Speagle, "dynesty: a dynamic nested sampling package for estimating
  Bayesian posteriors and evidences", MNRAS 493, 2020). The prior enters
  through ``prior_transform(u) -> theta`` from the unit cube, so ordered
  constraints are part of the transform and never appear as ``-inf``
  likelihoods. dynesty asks for one point at a time; a small thread pool
  gathers the requests of all queued proposals and answers them with one
  batched call (see :class:`BatchingPool`).
* :func:`stepping_stone` -- the stepping-stone estimator (Xie, Lewis, Fan,
  Kuo & Chen, "Improving marginal likelihood estimation for Bayesian
  phylogenetic model selection", Systematic Biology 60, 2011) over a ladder
  of inverse temperatures ``0 = beta_0 < ... < beta_K = 1``, each power
  posterior ``prior x likelihood^beta`` sampled with emcee, each rung
  started from the draws of the rung before resampled to its temperature.
  Its error comes from every rung's samples (block bootstrap, delta method
  or the spread between walkers, whichever is largest, with the slowest
  autocorrelation time over the whole rung), widened when the two halves of
  the kept steps disagree (a chain still drifting). The thermodynamic-
  integration estimate (Lartillot & Philippe, "Computing Bayes factors using
  thermodynamic integration", Systematic Biology 55, 2006) of the same
  ladder is reported beside it as a diagnostic.

:func:`agreement` says whether two estimates agree within their stated
errors, and :func:`encompassing_bayes_factor` gives the one-run Bayes factor
of a model nested inside a more permissive one from the permissive run alone.
"""

from __future__ import annotations

import math
import threading
import time
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

__all__ = [
    "EvidenceResult",
    "BatchingPool",
    "nested_sampling",
    "stepping_stone",
    "power_ladder",
    "default_moves",
    "beta_quantile_ladder",
    "agreement",
    "encompassing_bayes_factor",
    "DISAGREEMENT_SIGMAS",
]

#: Two estimates whose difference exceeds this many combined standard errors are said to disagree.
DISAGREEMENT_SIGMAS = 3.0

#: Largest batch handed to the log-likelihood at once (memory of the (B, picks) arrays).
MAX_BATCH = 4096


# ----------------------------------------------------------------------------
# Result
# ----------------------------------------------------------------------------
@dataclass
class EvidenceResult:
    """One estimate of the log marginal likelihood.

    Attributes
    ----------
    method : str
        ``'nested sampling'`` or ``'stepping-stone'``.
    log_z : float
        Natural log of the evidence, including the prior's normalisation.
    log_z_error : float
        Stated standard error of ``log_z`` [nats].
    n_calls : int
        Rows passed to the log-likelihood (one row = one parameter vector);
        ``details['likelihood_calls']`` counts the batched calls that carried them.
    seconds : float
        Wall-clock time.
    samples : array (S, D)
        Equal-weight posterior draws.
    sample_log_likelihood : array (S,)
        Log-likelihood of each draw.
    details : dict
        Estimator-specific numbers (settings, information, per-rung table, ...).
    notes : list of str
        Plain-language warnings about this estimate.
    """

    method: str
    log_z: float
    log_z_error: float
    n_calls: int
    seconds: float
    samples: np.ndarray
    sample_log_likelihood: np.ndarray
    details: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)

    def to_dict(self) -> dict:
        """Everything but the draws, as plain JSON-friendly values."""
        return {"method": self.method, "log_z": float(self.log_z), "log_z_error": float(self.log_z_error),
                "n_calls": int(self.n_calls), "seconds": float(self.seconds),
                "n_samples": int(self.samples.shape[0]), "details": _plain(self.details),
                "notes": list(self.notes)}

    def describe(self) -> str:
        """One line such as ``'nested sampling: log Z = -123.45 +- 0.12 (40 000 calls, 12 s)'``."""
        return (f"{self.method}: log Z = {self.log_z:.3f} +- {self.log_z_error:.3f} "
                f"({self.n_calls:,} likelihood calls, {self.seconds:.1f} s)")


def _plain(obj):
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _plain(obj.tolist())
    if isinstance(obj, (np.floating, float)):
        return float(obj) if np.isfinite(obj) else str(float(obj))
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj


class _Counted:
    """A batched function that counts the rows it was given."""

    def __init__(self, fn: Callable, what: str):
        self.fn, self.what, self.rows, self.calls = fn, what, 0, 0

    def __call__(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        out = []
        for start in range(0, x.shape[0], MAX_BATCH):
            chunk = x[start:start + MAX_BATCH]
            self.rows += chunk.shape[0]
            self.calls += 1
            out.append(np.asarray(self.fn(chunk), dtype=float))
        return np.concatenate(out, axis=0) if out else np.zeros((0,) + x.shape[1:])


def _check_loglike(values: np.ndarray, n: int) -> np.ndarray:
    values = np.asarray(values, dtype=float)
    if values.shape != (n,):
        raise ValueError(f"log_likelihood must return shape ({n},) for a batch of {n} rows, got {values.shape}")
    if np.isnan(values).any() or np.isposinf(values).any():
        raise ValueError("log_likelihood returned NaN or +inf (use -inf for impossible points)")
    return values


# ----------------------------------------------------------------------------
# Batched evaluation for dynesty
# ----------------------------------------------------------------------------
class _Slot:
    __slots__ = ("event", "value", "error")

    def __init__(self):
        self.event, self.value, self.error = threading.Event(), None, None


class BatchingPool:
    """A thread "pool" whose ``map`` answers per-point calls in batches.

    dynesty proposes ``queue_size`` new points through ``pool.map``; each
    proposal calls the log-likelihood one point at a time. Here the proposals
    run in ``size`` worker threads, and each per-point call waits until every
    worker with work is waiting too; the gathered points then go through one
    batched call. Only one thread runs at a time (the others wait), and every
    proposal carries its own random seed, so the results are those of a
    serial run with the same proposals.

    Parameters
    ----------
    functions : dict
        ``name -> batched function`` taking (B, D) and returning (B, ...).
    size : int
        Worker threads (dynesty's ``queue_size``).

    Notes
    -----
    Waking a thread costs of the order of 10-100 microseconds (more on a
    loaded machine), so batching pays when one call of the likelihood costs
    much more than that, as the travel-time likelihood does (about a
    millisecond per call whatever the batch size). Call :meth:`close` (or use
    the pool as a context manager) to end the worker threads.
    """

    def __init__(self, functions: dict[str, Callable], size: int):
        if size < 1:
            raise ValueError(f"size must be >= 1, got {size}")
        self.functions = functions
        self.size = int(size)
        self.batches = 0
        self._lock = threading.Lock()
        self._start = threading.Condition(self._lock)
        self._done = threading.Event()
        self._active = 0
        self._pending: list = []
        self._local = threading.local()
        self._threads: list[threading.Thread] = []
        self._job = None
        self._next = 0
        self._generation = 0
        self._finished = 0
        self._closed = False

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def per_point(self, name: str) -> Callable:
        """The per-point function dynesty is given for ``name``."""
        if name not in self.functions:
            raise KeyError(name)

        def call(x):
            return self.call(name, x)

        return call

    def call(self, name: str, x) -> np.ndarray:
        """Evaluate ``functions[name]`` at one point, batched with the other workers."""
        x = np.asarray(x, dtype=float)
        if not getattr(self._local, "worker", False):  # outside map: evaluate directly
            return np.asarray(self.functions[name](x[None, :]))[0]
        slot = _Slot()
        with self._lock:
            self._pending.append((name, x, slot))
            self._active -= 1
            if self._active == 0:
                self._flush()
        slot.event.wait()
        if slot.error is not None:
            raise slot.error
        return slot.value

    def _flush(self) -> None:
        """Evaluate every pending request (lock held; every busy worker is waiting)."""
        pending, self._pending = self._pending, []
        if not pending:
            return
        groups: dict[str, list] = {}
        for item in pending:
            groups.setdefault(item[0], []).append(item)
        for name, items in groups.items():
            try:
                out = np.asarray(self.functions[name](np.stack([it[1] for it in items])))
                if out.shape[0] != len(items):
                    raise ValueError(f"{name}: returned {out.shape[0]} rows for {len(items)} points")
                for it, value in zip(items, out):
                    it[2].value = value
            except BaseException as exc:  # handed to every waiting thread
                for it in items:
                    it[2].error = exc
        self.batches += 1
        self._active += len(pending)
        for item in pending:
            item[2].event.set()

    def _worker(self) -> None:
        self._local.worker = True
        seen = 0
        while True:
            with self._start:
                while self._generation == seen and not self._closed:
                    self._start.wait()
                if self._closed:
                    return
                seen = self._generation
                func, items, results, failures = self._job
            while True:
                with self._lock:
                    i = self._next
                    self._next += 1
                if i >= len(items):
                    break
                try:
                    results[i] = func(items[i])
                except BaseException as exc:
                    failures.append((i, exc))
            with self._lock:
                self._active -= 1
                self._finished += 1
                if self._active == 0 and self._pending:
                    self._flush()
                if self._finished == self.size:
                    self._done.set()

    def map(self, func: Callable, iterable) -> list:
        """``[func(x) for x in iterable]`` with the per-point calls inside batched."""
        if self._closed:
            raise RuntimeError("the pool is closed")
        items = list(iterable)
        if not items:
            return []
        while len(self._threads) < self.size:
            t = threading.Thread(target=self._worker, daemon=True)
            t.start()
            self._threads.append(t)
        results: list = [None] * len(items)
        failures: list = []
        with self._start:
            self._job = (func, items, results, failures)
            self._next = 0
            self._finished = 0
            self._active = self.size
            self._done.clear()
            self._generation += 1
            self._start.notify_all()
        self._done.wait()
        self._job = None
        if failures:
            raise min(failures, key=lambda f: f[0])[1]
        return results

    def close(self) -> None:
        """End the worker threads."""
        with self._start:
            self._closed = True
            self._start.notify_all()
        for t in self._threads:
            t.join(timeout=5)
        self._threads = []


# ----------------------------------------------------------------------------
# Nested sampling
# ----------------------------------------------------------------------------
def nested_sampling(log_likelihood: Callable, prior_transform: Callable, ndim: int, *, live_points: int = 400,
                    dlogz: float = 0.1, sample: str = "auto", bound: str = "multi",
                    queue_size: int | None = None,
                    seed: int = 0, max_calls: int | None = None, progress: bool = True,
                    label: str = "") -> EvidenceResult:
    """Log evidence by nested sampling (dynesty's static sampler).

    Parameters
    ----------
    log_likelihood : callable
        ``log_likelihood(theta)`` with ``theta`` (B, D) returns (B,); ``-inf``
        where the likelihood is zero.
    prior_transform : callable
        ``prior_transform(u)`` maps (B, D) points of the open unit cube to
        (B, D) parameters whose distribution is the normalised prior.
    ndim : int
        D.
    live_points : int
        Number of live points; the stated error falls as sqrt(H / live_points)
        with H the information (Skilling 2006, sec. 4).
    dlogz : float
        Stop when the live points could add at most this much to log Z
        (dynesty's criterion); the remaining live points are then added to the
        integral. dynesty's own default, 0.001 (live_points - 1) + 0.01, stops
        early for thousands of live points and inflates the stated error, so
        a fixed 0.1 is used.
    sample, bound : str
        dynesty's proposal and bounding methods (``'auto'`` picks uniform
        sampling in the bounds below 10 dimensions, random walks above).
    queue_size : int, optional
        Proposals evaluated together in one batched likelihood call (default
        ``max(8, live_points // 2)``); 1 evaluates one point per call without
        threads, which is faster for likelihoods that cost microseconds.
    seed : int
        Seed of dynesty's random generator; same seed, same result.
    max_calls : int, optional
        Cap on likelihood calls (a capped run says so in ``notes``).
    progress : bool
        Show a progress bar (iterations, calls, log Z, remaining).
    label : str
        Shown on the progress bar.

    Returns
    -------
    EvidenceResult
        ``log_z_error`` is dynesty's statistical error (from the information),
        ``details`` holds the information H, iterations and efficiency.

    Raises
    ------
    ImportError
        If dynesty is missing (``pip install -e '.[evidence]'``).
    ValueError
        For bad settings or a prior transform that returns the wrong shape.
    """
    try:
        import dynesty
    except ImportError:  # pragma: no cover - depends on the environment
        raise ImportError("nested sampling needs dynesty: pip install -e '.[evidence]'") from None
    ndim = int(ndim)
    if ndim < 1:
        raise ValueError(f"ndim must be >= 1, got {ndim}")
    if live_points < 2 * ndim + 2:
        raise ValueError(f"live_points = {live_points} is too few for {ndim} parameters "
                         f"(use at least {2 * ndim + 2}; a few hundred for a stated error of a few tenths)")
    queue = int(queue_size) if queue_size else max(8, live_points // 2)
    loglike = _Counted(log_likelihood, "log_likelihood")
    ptform = _Counted(prior_transform, "prior_transform")

    def transform(u):
        out = ptform(u)
        if out.shape != u.shape:
            raise ValueError(f"prior_transform must return shape {u.shape}, got {out.shape}")
        return out

    def cube_loglike(u):
        # dynesty works in the unit cube; the prior transform runs inside the same batched call
        return _check_loglike(loglike(transform(u)), u.shape[0])

    rng = np.random.default_rng(seed)
    t0 = time.perf_counter()
    if queue > 1:
        pool = BatchingPool({"logl": cube_loglike}, size=queue)
        sampler = dynesty.NestedSampler(pool.per_point("logl"), _identity, ndim, nlive=int(live_points),
                                        bound=bound, sample=sample, rstate=rng, pool=pool, queue_size=queue,
                                        use_pool={"update_bound": False, "prior_transform": False})
    else:  # serial: one point per call (for likelihoods that cost little per call)
        pool = None
        sampler = dynesty.NestedSampler(lambda u: float(cube_loglike(np.asarray(u)[None, :])[0]), _identity, ndim,
                                        nlive=int(live_points), bound=bound, sample=sample, rstate=rng)
    bar = _progress(progress, f"nested sampling{' ' + label if label else ''}", unit=" it")

    def show(results, niter, ncall, **_):
        if bar is None:
            return
        bar.update(max(0, niter - bar.n))
        logz = getattr(results, "logz", np.nan)
        remain = getattr(results, "delta_logz", np.nan)
        bar.set_postfix_str(f"calls {loglike.rows:,}, log Z {logz:.2f}, remaining {remain:.3g} (stop < {dlogz:.3g})",
                            refresh=False)

    try:
        sampler.run_nested(dlogz=dlogz, maxcall=max_calls, print_progress=bar is not None, print_func=show,
                           add_live=True)
    finally:
        if pool is not None:
            pool.close()
        if bar is not None:
            bar.close()
    seconds = time.perf_counter() - t0
    res = sampler.results
    log_z = float(res["logz"][-1])
    log_z_error = float(res["logzerr"][-1])
    info = float(res["information"][-1])
    weights = np.exp(res["logwt"] - res["logz"][-1])
    weights = weights / weights.sum()
    ess = float(1.0 / np.sum(weights ** 2))
    draws_rng = np.random.default_rng([seed, 1])
    index = _systematic_resample(weights, draws_rng)
    samples = transform(np.asarray(res["samples"])[index])
    ll = np.asarray(res["logl"])[index]
    notes = []
    iterations = int(res["niter"])
    if max_calls is not None and loglike.rows >= max_calls:
        notes.append(f"nested sampling stopped at the call cap ({max_calls:,}) before its stopping criterion; "
                     "log Z is then too low by up to the remaining live-point mass")
    if not np.isfinite(log_z_error) or log_z_error <= 0:
        notes.append("nested sampling returned no usable error estimate")
    details = {"live_points": int(live_points), "iterations": iterations, "information_nats": info,
               "efficiency": float(res["eff"]) / 100.0, "sample": sampler.internal_sampler.__class__.__name__,
               "bound": bound, "queue_size": queue,
               "batched_calls": pool.batches if pool is not None else loglike.rows,
               "likelihood_calls": loglike.calls, "dlogz": float(dlogz),
               "posterior_ess": ess, "seed": int(seed),
               "error_formula": "sqrt(H / live points) accumulated by dynesty (Skilling 2006)"}
    return EvidenceResult("nested sampling", log_z, log_z_error, loglike.rows, seconds, samples, ll, details, notes)


def _identity(u):
    return np.array(u, dtype=float)


def _systematic_resample(weights: np.ndarray, rng: np.random.Generator, count: int | None = None) -> np.ndarray:
    """Indices of ``count`` (default: as many as weights) equal-weight draws by systematic resampling.

    ``weights`` sum to 1; a draw is repeated only when its weight exceeds 1 / count.
    """
    n = weights.size if count is None else int(count)
    positions = (rng.random() + np.arange(n)) / n
    cum = np.cumsum(weights)
    cum[-1] = 1.0
    index = np.searchsorted(cum, positions)
    return index


def _progress(show: bool, desc: str, total: int | None = None, unit: str = " it"):
    if not show:
        return None
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit=unit, leave=False, dynamic_ncols=True)


# ----------------------------------------------------------------------------
# Stepping-stone
# ----------------------------------------------------------------------------
def default_moves():
    """emcee moves of the tempered chains: differential evolution (ter Braak, Stat. Comput. 16, 2006).

    Nine proposals in ten use emcee's default scale (2.38 / sqrt(2 D)); one in
    ten uses gamma = 1, which carries a walker by the full difference between
    two others and so can jump between separated modes, as ter Braak
    recommends (from memory). It matters for power posteriors that are
    bimodal, as when a permissive velocity order leaves an inverted and a
    monotone region at intermediate temperatures: with the default scale
    alone, each walker kept to the mode it started in, and on such a case
    the spread of log Z over seeds was about 2.7 times the stated error (12
    rungs of 20 + 60 steps, measured); with the jumps it matched it.

    emcee's snooker move (``DESnookerMove``, emcee 3.1) is left out on purpose:
    on a 6-D standard normal it gave variances of about 0.65 instead of 1
    (measured; 32 walkers, 5000 steps), so its chains do not target the
    requested density, and an evidence estimate built on them is biased.
    """
    import emcee

    return [(emcee.moves.DEMove(), 0.9), (emcee.moves.DEMove(gamma0=1.0), 0.1)]


def power_ladder(rungs: int, power: float = 5.0) -> np.ndarray:
    """Inverse temperatures ``(i / rungs) ** power`` for i = 0..rungs (0 and 1 included).

    A power above 1 crowds the rungs near 0, where the power posterior changes
    fastest; Friel & Pettitt (J. R. Stat. Soc. B 70, 2008) use 5 (from memory).
    """
    rungs = int(rungs)
    if rungs < 1:
        raise ValueError(f"rungs must be >= 1, got {rungs}")
    if not power >= 1:
        raise ValueError(f"power must be >= 1, got {power}")
    return (np.arange(rungs + 1) / rungs) ** float(power)


def beta_quantile_ladder(rungs: int, shape: float = 0.3) -> np.ndarray:
    """Inverse temperatures at the evenly spaced quantiles of a Beta(shape, 1) distribution.

    Xie et al. (2011) place the rungs so, with shape 0.3 (from memory); the
    quantile function of Beta(a, 1) is ``q ** (1 / a)``, so this equals
    ``power_ladder(rungs, 1 / shape)``.
    """
    if not 0 < shape <= 1:
        raise ValueError(f"shape must lie in (0, 1], got {shape}")
    return power_ladder(rungs, 1.0 / shape)


def _integrated_time(x: np.ndarray) -> float:
    """Integrated autocorrelation time of a 1-D series (Sokal's window, c = 5); 1 for short or constant series."""
    x = np.asarray(x, dtype=float)
    n = x.size
    if n < 8 or not np.all(np.isfinite(x)) or np.ptp(x) == 0:
        return 1.0
    f = np.fft.rfft(x - x.mean(), n=2 * n)
    acf = np.fft.irfft(f * np.conjugate(f))[:n]
    acf = acf / acf[0]
    taus = 2.0 * np.cumsum(acf) - 1.0
    m = np.arange(n) < 5.0 * taus
    window = int(np.argmin(m)) if not m.all() else n - 1
    return float(max(1.0, taus[window]))


def _rung_ratio(loglike: np.ndarray, dbeta: float, rng: np.random.Generator, n_boot: int,
                tau_floor: float = 1.0, max_blocks: int = 50) -> dict:
    """log E[L^dbeta] from one rung's draws (steps, walkers) with its standard error.

    The error is the largest of three estimates. Two treat whole steps (all
    walkers of a step together) as the unit:

    * a block bootstrap, with blocks at least twice the autocorrelation time
      long, so that they are close to independent;
    * the delta method, sd(per-step mean weight) / mean weight x sqrt(tau / steps).

    The third treats walkers as the unit: sd(per-walker time-averaged weight)
    / mean weight / sqrt(walkers). It exceeds the others when walkers keep to
    different parts of the distribution for the whole rung (separate modes):
    then every step shares the same imbalance, which no blocking in time can
    see. Walkers of an ensemble are not independent, so this is an
    approximation; on the linear-Gaussian checks the stated errors came out
    1.0-1.6 times the observed spread over seeds (conservative; docs/evidence.md).

    The autocorrelation time used is the larger of that of the per-step mean
    weight and ``tau_floor`` (the slowest parameter of the chain): from a
    short chain the weight's own estimate comes out too small, and blocks
    that are too short understate the error.
    """
    a = dbeta * loglike  # (T, W); -inf where the likelihood is zero
    top = float(np.max(a))
    if not np.isfinite(top):
        return {"log_ratio": -np.inf, "error": np.inf, "tau": np.nan, "blocks": 0, "ess": 0.0}
    w = np.exp(a - top)
    per_step = w.mean(axis=1)  # (T,)
    n_steps = per_step.size
    tau = max(_integrated_time(per_step), float(tau_floor))
    blocks = int(np.clip(n_steps // max(1, math.ceil(2.0 * tau)), 2, max_blocks)) if n_steps >= 2 else 1
    length = n_steps // blocks
    used = per_step[n_steps - blocks * length:]  # drop the oldest remainder
    block_means = used.reshape(blocks, length).mean(axis=1)
    mean = float(per_step.mean())
    estimate = top + math.log(mean)
    error = np.inf
    if blocks >= 2:
        idx = rng.integers(0, blocks, size=(n_boot, blocks))
        boot = block_means[idx].mean(axis=1)
        with np.errstate(divide="ignore"):
            boot_log = np.log(boot)
        if np.all(np.isfinite(boot_log)):
            error = float(np.std(boot_log, ddof=1))
        delta = float(np.std(per_step, ddof=1) / mean * math.sqrt(tau / n_steps))
        error = max(error, delta)
    walker_error = 0.0
    if w.shape[1] >= 2:
        # walkers as the unit: a walker that keeps to one part of the distribution for the whole rung
        # (a mode it cannot leave) makes its time average differ from the others' by more than its noise
        per_walker = w.mean(axis=0)
        walker_error = float(np.std(per_walker, ddof=1) / mean / math.sqrt(per_walker.size))
        error = max(error, walker_error)
    wf = w.ravel()
    ess = float(wf.sum() ** 2 / np.sum(wf ** 2))
    return {"log_ratio": estimate, "error": error, "walker_error": walker_error, "tau": tau, "blocks": blocks,
            "ess": ess}


def _resample_start(theta: np.ndarray, loglike: np.ndarray, dbeta: float, walkers: int,
                    rng: np.random.Generator) -> np.ndarray:
    """Starting walkers of the next rung: draws of the rung before, resampled with weights L^dbeta.

    Draws of the power posterior at beta, weighted by L^(beta' - beta), represent
    the one at beta' (importance sampling; the same weights make the
    stepping-stone ratio), so the next rung starts close to its own
    distribution instead of lagging behind at lower likelihood. Systematic
    resampling picks ``walkers`` draws; a draw is repeated only when its weight
    exceeds 1 / walkers of the total.
    """
    a = dbeta * np.asarray(loglike, dtype=float)
    ok = np.isfinite(a)
    if ok.sum() < walkers:
        raise RuntimeError(f"only {int(ok.sum())} draws with a finite likelihood to start {walkers} walkers from")
    w = np.zeros(a.size)
    w[ok] = np.exp(a[ok] - np.max(a[ok]))
    index = _systematic_resample(w / w.sum(), rng, walkers)
    return np.array(theta[rng.permutation(index)], dtype=float)


def _pooled_time(series: list) -> float:
    """Integrated autocorrelation time from the autocorrelation functions of several chains averaged.

    ``series`` holds arrays (T_k, D); for each column the normalised
    autocorrelation functions of the chains are averaged lag by lag (over the
    shortest length) before Sokal's window (c = 5) is applied, as emcee does
    over walkers (Foreman-Mackey et al., PASP 125, 2013, and the emcee
    documentation's autocorrelation notes; from memory). Returns the largest
    time over the columns.
    """
    series = [np.asarray(x, dtype=float) for x in series if x is not None and len(x) >= 8]
    if not series:
        return 1.0
    n = min(x.shape[0] for x in series)
    worst = 1.0
    for d in range(series[0].shape[1]):
        acfs = []
        for x in series:
            y = x[-n:, d] - x[-n:, d].mean()
            if not np.all(np.isfinite(y)) or np.ptp(y) == 0:
                continue
            f = np.fft.rfft(y, n=2 * n)
            acf = np.fft.irfft(f * np.conjugate(f))[:n]
            acfs.append(acf / acf[0])
        if not acfs:
            continue
        acf = np.mean(acfs, axis=0)
        taus = 2.0 * np.cumsum(acf) - 1.0
        m = np.arange(n) < 5.0 * taus
        window = int(np.argmin(m)) if not m.all() else n - 1
        worst = max(worst, float(taus[window]))
    return worst


def _log_mean_weight(a: np.ndarray) -> float:
    a = np.asarray(a, dtype=float)
    top = float(np.max(a)) if a.size else -np.inf
    if not np.isfinite(top):
        return -np.inf
    return top + math.log(float(np.mean(np.exp(a - top))))


def _ladder_estimate(betas: np.ndarray, rung_full: list, rung_means: list, burn: int, rng: np.random.Generator,
                     n_boot: int, drift_sigmas: float = 1.0) -> tuple:
    """Stepping-stone sum and its stated error from every rung's chain.

    Parameters
    ----------
    betas : array (K + 1,)
    rung_full : list of arrays (T_k, W)
        Log-likelihood of every walker at every step, burn-in included (rung
        0: independent prior draws, no burn-in).
    rung_means : list of arrays (T_k, D) or None
        Walker means of the parameters at every step (None for rung 0).
    burn : int
        Steps always discarded at the start of rungs 1..K.
    rng, n_boot
        Bootstrap generator and replicates.
    drift_sigmas : float
        When half the summed difference between the second and the first half
        of the kept steps exceeds this many statistical errors, it is added to
        the stated error in quadrature (see Notes).

    Returns
    -------
    rows : list of dict
        One per rung.
    log_z, error : float
    parts : dict
        ``statistical`` (the error from the within-rung variances alone) and
        ``half_difference`` (the summed second-minus-first-half difference).

    Notes
    -----
    The statistical error sums every rung's variance of log r_k (see
    :func:`_rung_ratio`). The autocorrelation time that sets the bootstrap
    blocks and the delta-method factor is the largest of the rung's own
    weight series and of a floor: the times of the walker means of every
    parameter and of the mean log-likelihood, measured over the whole rung,
    burn-in included. The rungs start from resampled draws of the rung before
    (:func:`_resample_start`), so the burn-in is close to stationary, and the
    longer series gives a less downward-biased time than the kept steps
    alone (on a rung of a few autocorrelation times, the kept steps alone
    under-estimate it, and the error with it).

    A rung whose chain is still relaxing biases its ratio, and all such biases
    share one direction; the variance of a stationary chain cannot see them.
    They show as a difference between the two halves of the kept steps: for a
    drift that ends within the first half, the first half carries about twice
    the bias of the whole and the second half about none, so half the
    difference estimates the bias of the whole. For a stationary chain the
    same quantity is noise of about the size of the statistical error, hence
    the threshold (it then widens the error in about a third of the runs, by
    a factor of at most about 1.4 in most of them).
    """
    rows = []
    log_z, var, half_sum = 0.0, 0.0, 0.0
    last = len(betas) - 1
    for k in range(last + 1):
        ll = np.asarray(rung_full[k], dtype=float)
        if k == 0:
            start, tau_floor = 0, 1.0
        else:
            start = burn
            means = np.asarray(rung_means[k], dtype=float)
            tau_floor = max([_integrated_time(means[:, d]) for d in range(means.shape[1])]
                            + [_integrated_time(ll.mean(axis=1))])
        kept = ll[start:]
        row = {"beta": float(betas[k]), "next_beta": float(betas[k + 1]) if k < last else None,
               "start": int(start), "kept_steps": int(kept.shape[0])}
        if k < last:
            dbeta = float(betas[k + 1] - betas[k])
            r = _rung_ratio(kept, dbeta, rng, n_boot, tau_floor=tau_floor)
            half = kept.shape[0] // 2
            d = 0.0
            if k > 0 and half >= 1:
                d = _log_mean_weight(dbeta * kept[half:]) - _log_mean_weight(dbeta * kept[:half])
                d = d if np.isfinite(d) else 0.0
            row.update(r)
            row["half_difference"] = float(d)
            log_z += r["log_ratio"]
            var += r["error"] ** 2
            half_sum += d
        else:
            row.update({"log_ratio": None, "error": None, "tau": None, "blocks": None, "ess": None,
                        "half_difference": None})
        row["mean_log_likelihood"] = _finite_mean(kept)
        rows.append(row)
    sigma = math.sqrt(var)
    bias = 0.5 * abs(half_sum)
    error = math.hypot(sigma, bias) if bias > drift_sigmas * sigma else sigma
    return rows, float(log_z), float(error), {"statistical": sigma, "half_difference": float(half_sum)}


def stepping_stone(log_likelihood: Callable, log_prior: Callable, sample_prior: Callable, ndim: int, *,
                   rungs: int = 24, power: float = 5.0, ladder=None, walkers: int | None = None,
                   steps: int = 1000, burn: int = 200, seed: int = 0, moves=None, n_boot: int = 1000,
                   progress: bool = True, label: str = "") -> EvidenceResult:
    """Log evidence by the stepping-stone estimator over a ladder of power posteriors.

    The power posterior at inverse temperature beta is prior x L^beta. With
    draws from rung k, ``r_k = E_k[L^(beta_{k+1} - beta_k)]`` estimates
    Z_{k+1} / Z_k, and ``log Z = sum_k log r_k`` (Xie et al. 2011, eq. 8 and
    following; Z_0 = 1 because the prior is normalised). Rung 0 uses
    independent prior draws; every later rung runs one emcee ensemble
    (differential-evolution moves, :func:`default_moves`), discards ``burn``
    steps and keeps ``steps``. Its walkers start from draws of the rung before
    (the later half of its kept steps; rung 0's prior draws for rung 1),
    resampled with the weights L^(beta_k - beta_{k-1}) that also make the
    ratio: so each rung starts near its own distribution. Started instead from
    the last walkers of the rung before, short rungs lag behind at low
    likelihood and bias every ratio low (measured on the linear-Gaussian
    check: 3 stated errors low on average with 12 rungs of 20 + 50 steps in 6
    dimensions). The last rung (beta = 1) gives the posterior draws. The
    stated error is described in :func:`_ladder_estimate`.

    Parameters
    ----------
    log_likelihood : callable
        (B, D) -> (B,), ``-inf`` where the likelihood is zero.
    log_prior : callable
        (B, D) -> (B,), the normalised log prior density, ``-inf`` outside it.
    sample_prior : callable
        ``sample_prior(n, rng)`` -> (n, D) independent prior draws.
    ndim : int
        D.
    rungs : int
        K: number of ratios (K + 1 inverse temperatures including 0 and 1).
    power : float
        Ladder ``(i / K) ** power`` (see :func:`power_ladder`).
    ladder : array, optional
        Explicit increasing inverse temperatures from 0 to 1 (overrides ``rungs`` and ``power``).
    walkers : int, optional
        Walkers per rung (even, >= 2 D; default max(32, 4 D) rounded to even).
    steps, burn : int
        Kept and discarded steps per rung.
    seed : int
        Same seed, same result.
    moves : optional
        emcee moves; default :func:`default_moves` (differential evolution).
    n_boot : int
        Bootstrap replicates per rung.
    progress : bool
        Show a progress bar over all steps of all rungs.
    label : str
        Shown on the progress bar.

    Returns
    -------
    EvidenceResult
        ``details['rungs']`` lists per rung: beta, log ratio and its error, the
        autocorrelation time of the weights, bootstrap blocks, weight ESS,
        acceptance and mean log-likelihood; ``details['thermodynamic_integration']``
        the trapezoid estimate from the same draws.
    """
    import emcee

    ndim = int(ndim)
    if ladder is None:
        betas = power_ladder(rungs, power)
    else:
        betas = np.asarray(ladder, dtype=float)
        if betas.ndim != 1 or betas.size < 2 or betas[0] != 0.0 or betas[-1] != 1.0 or np.any(np.diff(betas) <= 0):
            raise ValueError("ladder must increase strictly from 0 to 1")
    if walkers is None:
        walkers = max(32, 4 * ndim)
        walkers += walkers % 2
    walkers = int(walkers)
    if walkers < 2 * ndim or walkers % 2:
        raise ValueError(f"walkers = {walkers}: need an even number >= 2 x parameters = {2 * ndim}")
    steps, burn = int(steps), int(burn)
    if steps < 10 or burn < 0:
        raise ValueError(f"steps must be >= 10 and burn >= 0; got steps = {steps}, burn = {burn}")
    if moves is None:
        moves = default_moves()
    loglike = _Counted(log_likelihood, "log_likelihood")
    seq = np.random.SeedSequence(seed)
    child = seq.spawn(len(betas) + 3)
    rng_prior = np.random.default_rng(child[0])
    rng_boot = np.random.default_rng(child[1])
    rng_start = np.random.default_rng(child[len(betas) + 2])

    def evaluate(theta):
        theta = np.atleast_2d(theta)
        lp = np.asarray(log_prior(theta), dtype=float)
        ll = np.full(theta.shape[0], -np.inf)
        ok = np.isfinite(lp)
        if ok.any():
            ll[ok] = _check_loglike(loglike(theta[ok]), int(ok.sum()))
        return lp, ll

    t0 = time.perf_counter()
    total = (len(betas) - 1) * (burn + steps) + steps
    bar = _progress(progress, f"stepping-stone{' ' + label if label else ''}", total=total, unit=" step")
    # rung 0: independent prior draws, arranged as (steps, walkers)
    prior_draws = np.asarray(sample_prior(steps * walkers, rng_prior), dtype=float)
    if prior_draws.shape != (steps * walkers, ndim):
        raise ValueError(f"sample_prior must return shape ({steps * walkers}, {ndim}), got {prior_draws.shape}")
    lp0, ll0 = evaluate(prior_draws)
    if not np.all(np.isfinite(lp0)):
        raise ValueError("sample_prior returned draws where log_prior is -inf: the two do not describe the same prior")
    rung_full = [ll0.reshape(steps, walkers)]  # per rung: log-likelihood of every step (burn included)
    rung_means = [None]  # per rung: walker means of the parameters (steps, D); rung 0 holds independent draws
    acceptance = [1.0]
    if bar is not None:
        bar.update(steps)
    finite = np.flatnonzero(np.isfinite(ll0))
    if finite.size < walkers:
        raise RuntimeError(f"only {finite.size} of {ll0.size} prior draws have a finite likelihood; the stepping-stone "
                           "ladder needs at least one per walker (widen the prior or check the data)")
    pool_theta, pool_ll = prior_draws, ll0  # draws of the rung before, to start the next one from
    last_chain = None
    for k in range(1, len(betas)):
        beta = float(betas[k])

        def log_prob(theta, beta=beta):
            lp, ll = evaluate(theta)
            with np.errstate(invalid="ignore"):
                out = np.where(np.isfinite(lp) & np.isfinite(ll), lp + beta * ll, -np.inf)
            return list(zip(out, ll))

        state = _resample_start(pool_theta, pool_ll, beta - float(betas[k - 1]), walkers, rng_start)
        sampler = emcee.EnsembleSampler(walkers, ndim, log_prob, vectorize=True, moves=moves, blobs_dtype=float)
        sampler.random_state = np.random.RandomState(child[k + 1].generate_state(1)[0]).get_state()
        for _ in sampler.sample(state, iterations=burn + steps, store=True):
            if bar is not None:
                bar.update(1)
        chain = sampler.get_chain()
        blobs = np.asarray(sampler.get_blobs(), dtype=float)
        rung_full.append(blobs)
        later = burn + steps // 2  # the later half of the kept steps seeds the next rung
        pool_theta, pool_ll = chain[later:].reshape(-1, ndim), blobs[later:].reshape(-1)
        rung_means.append(chain.mean(axis=1))
        acceptance.append(float(np.mean(sampler.acceptance_fraction)))
        last_chain = chain
    if bar is not None:
        bar.close()
    seconds = time.perf_counter() - t0
    rows, log_z, error, parts = _ladder_estimate(betas, rung_full, rung_means, burn, rng_boot, n_boot)
    for row, acc in zip(rows, acceptance):
        row["acceptance"] = acc
    means = np.array([r["mean_log_likelihood"] for r in rows])
    ti = float(np.sum(np.diff(betas) * 0.5 * (means[1:] + means[:-1]))) if np.all(np.isfinite(means)) else -np.inf
    samples = last_chain[rows[-1]["start"]:].reshape(-1, ndim)
    ll_post = rung_full[-1][rows[-1]["start"]:].reshape(-1)
    notes = []
    short = [i for i, r in enumerate(rows[:-1]) if r["tau"] is not None and np.isfinite(r["tau"])
             and steps < 50 * r["tau"]]
    if short:
        notes.append(f"stepping-stone rungs {', '.join(str(i) for i in short)} ran fewer than 50 autocorrelation "
                     "times (a common rule of thumb for trusting the estimate of the autocorrelation time; from "
                     "memory): from short chains that time, and with it the stated error, tends to come out too "
                     "small; run more steps per rung")
    weak = [i for i, r in enumerate(rows[:-1]) if r["blocks"] is not None and r["blocks"] < 5]
    if weak:
        notes.append(f"stepping-stone rungs {', '.join(str(i) for i in weak)} hold fewer than 5 independent blocks "
                     "(the chains are short for their autocorrelation time): the stated error is itself uncertain; "
                     "run more steps per rung")
    low_ess = [i for i, r in enumerate(rows[:-1]) if r["ess"] is not None and r["ess"] < 0.01 * walkers * steps]
    if low_ess:
        notes.append(f"stepping-stone rungs {', '.join(str(i) for i in low_ess)}: the importance weights are "
                     "dominated by a few draws (weight ESS < 1 % of the draws); use more rungs")
    if error > parts["statistical"]:
        notes.append(f"stepping-stone: the two halves of the kept steps give log Z differing by "
                     f"{parts['half_difference']:+.3f} nats, more than twice the statistical error "
                     f"({parts['statistical']:.3f}): the chains may still have been drifting; half that difference "
                     "is added to the stated error in quadrature; if it dominates, run more burn-in or more steps "
                     "per rung")
    low_acc = [i for i, a in enumerate(acceptance) if a < 0.05]
    if low_acc:
        notes.append(f"stepping-stone rungs {', '.join(str(i) for i in low_acc)} accepted < 5 % of proposals; "
                     "their draws may not represent the power posterior")
    details = {"rungs": rows, "ladder": betas, "walkers": walkers, "steps": steps, "burn": burn, "seed": int(seed),
               "likelihood_calls": loglike.calls,
               "thermodynamic_integration": ti,
               "thermodynamic_integration_note": "trapezoid rule over the same ladder (Lartillot & Philippe 2006); "
                                                 "its discretisation error is not estimated",
               "statistical_error": parts["statistical"], "half_difference": parts["half_difference"],
               "error_formula": "sum over rungs of the variance of log r_k: the larger of a block bootstrap and "
                                "the delta method, with the autocorrelation time of the slowest parameter over "
                                "the whole rung (burn-in included), or the spread between walkers if larger; "
                                "plus, in quadrature, half the summed difference between the halves of the "
                                "kept steps when it exceeds that"}
    return EvidenceResult("stepping-stone", float(log_z), float(error), loglike.rows, seconds, samples,
                          ll_post, details, notes)


def _finite_mean(x: np.ndarray) -> float:
    x = np.asarray(x, dtype=float).ravel()
    x = x[np.isfinite(x)]
    return float(x.mean()) if x.size else -np.inf


# ----------------------------------------------------------------------------
# Checks between estimates
# ----------------------------------------------------------------------------
def agreement(a: EvidenceResult, b: EvidenceResult, sigmas: float = DISAGREEMENT_SIGMAS) -> dict:
    """Do two estimates of the same log Z agree within their stated errors?

    Returns
    -------
    dict
        ``difference`` (a - b), ``combined_error`` (errors in quadrature),
        ``z`` (difference / combined error), ``agree`` (|z| <= sigmas) and a
        plain-language ``message``.
    """
    diff = float(a.log_z - b.log_z)
    comb = float(math.hypot(a.log_z_error, b.log_z_error))
    z = diff / comb if comb > 0 else (0.0 if diff == 0 else math.inf)
    ok = bool(abs(z) <= sigmas)
    if ok:
        msg = (f"{a.method} and {b.method} agree: they differ by {diff:+.3f} nats, "
               f"{abs(z):.1f} combined standard errors ({comb:.3f}).")
    else:
        msg = (f"{a.method} and {b.method} DISAGREE beyond their stated errors: they differ by {diff:+.3f} nats, "
               f"{abs(z):.1f} combined standard errors ({comb:.3f}); at least one of them is wrong or its error "
               "is understated (too few live points, rungs or steps, or a mode one of them missed). Do not trust "
               "either value until a longer run resolves it.")
    return {"difference": diff, "combined_error": comb, "z": z, "agree": ok, "message": msg}


def encompassing_bayes_factor(inside_posterior: np.ndarray, prior_probability: float,
                              posterior_ess: float | None = None) -> dict:
    """Bayes factor of a model nested inside a permissive one, from the permissive run alone.

    When the restricted prior is the permissive prior cut to a region R and
    renormalised, ``B(restricted : permissive) = P(R | data) / P(R)``, both
    probabilities under the permissive model (the encompassing-prior identity,
    e.g. Klugkist, Kato & Hoijtink, Statistica Neerlandica 59, 2005; from
    memory). Because P(R | data) <= 1, no data can give the restricted model
    more support than ``1 / P(R)``.

    Parameters
    ----------
    inside_posterior : bool array (S,)
        Whether each equal-weight posterior draw of the permissive model lies in R.
    prior_probability : float
        P(R) under the permissive prior.
    posterior_ess : float, optional
        Effective number of independent draws (default S).

    Returns
    -------
    dict
        ``posterior_probability`` (of R) and its binomial standard error,
        ``log_bayes_factor`` (restricted : permissive) with its error (delta
        method; an upper bound from a 95 % interval when no draw lies in R),
        ``log_cap`` = -log P(R), the most any data could give.
    """
    inside = np.asarray(inside_posterior, dtype=bool).ravel()
    if inside.size == 0:
        raise ValueError("no posterior draws")
    if not 0 < prior_probability <= 1:
        raise ValueError(f"prior_probability must lie in (0, 1], got {prior_probability}")
    n = float(posterior_ess if posterior_ess is not None else inside.size)
    p = float(inside.mean())
    se = math.sqrt(max(p * (1 - p), 0.25 / n) / n)  # floor: never claim zero error
    cap = -math.log(prior_probability)
    out = {"posterior_probability": p, "posterior_probability_error": se, "prior_probability": prior_probability,
           "log_cap": cap, "effective_draws": n}
    if p > 0:
        out["log_bayes_factor"] = math.log(p) + cap
        out["log_bayes_factor_error"] = se / p
        out["upper_bound_only"] = False
    else:
        upper = 3.0 / n  # 95 % upper bound for zero successes in n trials ("rule of three"; common practice)
        out["log_bayes_factor"] = math.log(upper) + cap
        out["log_bayes_factor_error"] = math.nan
        out["upper_bound_only"] = True
    return out
