"""Run several independent emcee ensembles, checkpoint them, and judge convergence.

The driver is generic: it knows nothing about layers or travel times. It takes a
vectorised log-probability ``log_prob(theta)`` with ``theta`` of shape
(walkers, parameters) that returns one value per walker, shape (walkers,), or a
pair ``(log_prob, blobs)`` where ``blobs`` has shape (walkers,) or (walkers, K)
and holds per-walker numbers to keep alongside the chain (for instance the
log-likelihood).

Every ensemble is its own :class:`emcee.EnsembleSampler` (stretch move of
Goodman & Weare, CAMCoS 5, 2010, as implemented by Foreman-Mackey et al.,
PASP 125, 2013) with its own random stream spawned from one integer seed, so the
same seed gives the same chains bit for bit, and a run resumed from a checkpoint
continues exactly where it stopped. Ensembles run one after the other under a
single progress bar.

Convergence is judged across the independent ensembles with the rank-normalised
R-hat and bulk/tail effective sample sizes of Vehtari et al. (Bayesian Analysis
16, 2021) as implemented in arviz, and emcee's integrated autocorrelation time.
How the walkers are arranged into "chains" for those diagnostics is explained in
``docs/sampler.md`` and in :func:`convergence_report`.

Array layout of a result: ``chain`` (ensembles, steps, walkers, parameters),
``log_prob`` and ``accepted`` (ensembles, steps, walkers). Arrays are 0-based;
messages meant for people number ensembles and walkers from 1.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Sequence

import emcee
import h5py
import numpy as np
from emcee.backends import Backend
from emcee.ensemble import walkers_independent
from emcee.moves import RedBlueMove
from emcee.state import State

__all__ = [
    "ConvergenceTargets",
    "ConvergenceReport",
    "SamplerResult",
    "SamplingInterrupted",
    "run_ensembles",
    "convergence_report",
    "initial_from_prior",
    "initial_around",
    "checkpoint_steps",
]

#: Identifies our checkpoint files and their layout version.
CHECKPOINT_FORMAT = "invert ensemble checkpoint"
CHECKPOINT_VERSION = 1


# ----------------------------------------------------------------------------
# Targets, results and reports
# ----------------------------------------------------------------------------
@dataclass(frozen=True)
class ConvergenceTargets:
    """Thresholds a run must meet before it is called converged.

    Attributes
    ----------
    max_rhat : float
        Rank-normalised R-hat must be below this for every parameter
        (1.01, Vehtari et al., Bayesian Analysis 16, 2021, sec. 4).
    min_ess : float
        Bulk and tail effective sample sizes must exceed this (400, same source).
    min_tau_multiple : float
        The kept chain must be longer than this many integrated autocorrelation
        times (50, the rule of thumb of emcee's documentation; from memory).
    acceptance_range : tuple of float
        Acceptance fractions outside this range are reported (not failed);
        about 0.15-0.5 is usual for the stretch move (common practice).
    stuck_steps : int
        A walker whose position did not change during this many final steps is
        called stuck (fails the verdict).
    stuck_log_prob_gap : float
        A walker whose median log-probability over the same final steps lies
        more than ``max(stuck_log_prob_gap * s, stuck_log_prob_gap)`` below the
        pooled median (s = robust spread of the pooled log-probabilities) is
        called stuck as well.
    burn_fraction : float
        Fraction of the chain discarded as burn-in when ``run_ensembles`` checks
        the targets in "until" mode (and the default of ``convergence_report``).
    """

    max_rhat: float = 1.01
    min_ess: float = 400.0
    min_tau_multiple: float = 50.0
    acceptance_range: tuple[float, float] = (0.15, 0.5)
    stuck_steps: int = 100
    stuck_log_prob_gap: float = 10.0
    burn_fraction: float = 0.5

    def __post_init__(self):
        if not self.max_rhat > 1.0:
            raise ValueError(f"max_rhat must be > 1, got {self.max_rhat}")
        if not self.min_ess > 0 or not self.min_tau_multiple > 0:
            raise ValueError("min_ess and min_tau_multiple must be positive")
        lo, hi = self.acceptance_range
        if not 0.0 <= lo < hi <= 1.0:
            raise ValueError(f"acceptance_range must satisfy 0 <= low < high <= 1, got {self.acceptance_range}")
        if int(self.stuck_steps) < 2:
            raise ValueError(f"stuck_steps must be at least 2, got {self.stuck_steps}")
        if not 0.0 <= self.burn_fraction < 1.0:
            raise ValueError(f"burn_fraction must be in [0, 1), got {self.burn_fraction}")


@dataclass(frozen=True)
class ConvergenceReport:
    """Convergence diagnostics of a set of ensembles and the verdict.

    Per-parameter arrays have shape (parameters,). ``rhat`` is the larger of
    ``rhat_walkers`` (every walker of every ensemble a chain) and
    ``rhat_ensembles`` (every ensemble a chain); ``ess_bulk``/``ess_tail`` use
    every walker as a chain; ``tau`` [steps] is the largest of emcee's integrated
    autocorrelation time of each ensemble (``tau_per_ensemble``, (ensembles,
    parameters)) and of the walker-average series (``tau_walker_mean``). See
    :func:`convergence_report`.
    """

    parameter_names: tuple[str, ...]
    burn: int
    thin: int
    kept_steps: int
    rhat: np.ndarray
    rhat_walkers: np.ndarray
    rhat_ensembles: np.ndarray
    ess_bulk: np.ndarray
    ess_tail: np.ndarray
    tau: np.ndarray
    tau_per_ensemble: np.ndarray
    tau_walker_mean: np.ndarray
    acceptance: np.ndarray
    acceptance_per_walker: np.ndarray
    stuck: tuple[tuple[int, int, str], ...]
    failures: tuple[str, ...]
    notes: tuple[str, ...]
    targets: ConvergenceTargets

    @property
    def converged(self) -> bool:
        """True only if every target holds and no walker is stuck."""
        return not self.failures

    @property
    def tau_multiple(self) -> np.ndarray:
        """Kept chain length in units of the autocorrelation time, (parameters,)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return self.kept_steps / self.tau

    @property
    def verdict(self) -> str:
        """One plain sentence: converged, or what failed."""
        t = self.targets
        if self.converged:
            return (f"Converged: R-hat < {t.max_rhat:g}, bulk and tail ESS > {t.min_ess:g} and a run longer "
                    f"than {t.min_tau_multiple:g} autocorrelation times hold for every parameter.")
        return "NOT converged: " + "; ".join(self.failures) + "."

    def summary(self) -> str:
        """A printable table of the diagnostics followed by notes and the verdict."""
        width = max(9, *(len(n) for n in self.parameter_names))
        lines = [f"Convergence after discarding {self.burn} steps (kept {self.kept_steps}, thin {self.thin}):",
                 f"{'parameter':<{width}}  {'R-hat':>7}  {'ESS bulk':>9}  {'ESS tail':>9}  {'tau':>8}  {'run/tau':>8}"]
        for i, name in enumerate(self.parameter_names):
            lines.append(f"{name:<{width}}  {self.rhat[i]:7.4f}  {self.ess_bulk[i]:9.0f}  {self.ess_tail[i]:9.0f}  "
                         f"{self.tau[i]:8.1f}  {self.tau_multiple[i]:8.1f}")
        acc = ", ".join(f"{a:.2f}" for a in self.acceptance)
        lines.append(f"acceptance fraction per ensemble: {acc}")
        lines.extend(f"note: {n}" for n in self.notes)
        lines.append(self.verdict)
        return "\n".join(lines)


@dataclass(frozen=True)
class SamplerResult:
    """Chains of several independent ensembles.

    Attributes
    ----------
    chain : ndarray (ensembles, steps, walkers, parameters)
        Walker positions after every step (the starting points are not included).
    log_prob : ndarray (ensembles, steps, walkers)
        Log-probability at those positions.
    accepted : ndarray of bool (ensembles, steps, walkers)
        Whether each walker's proposal was accepted at each step.
    blobs : ndarray (ensembles, steps, walkers, K) or None
        Per-walker extra values returned by the log-probability.
    initial : ndarray (ensembles, walkers, parameters)
        Starting points.
    seed : int
        The seed the per-ensemble random streams were spawned from.
    parameter_names : tuple of str
    report : ConvergenceReport or None
        The last convergence check of an "until" run, else None.
    reached_cap : bool
        True when an "until" run stopped at ``max_steps`` without converging.
    """

    chain: np.ndarray
    log_prob: np.ndarray
    accepted: np.ndarray
    blobs: np.ndarray | None
    initial: np.ndarray
    seed: int
    parameter_names: tuple[str, ...]
    report: ConvergenceReport | None = None
    reached_cap: bool = False

    @property
    def n_ensembles(self) -> int:
        return self.chain.shape[0]

    @property
    def n_steps(self) -> int:
        return self.chain.shape[1]

    @property
    def n_walkers(self) -> int:
        return self.chain.shape[2]

    @property
    def n_dim(self) -> int:
        return self.chain.shape[3]

    def acceptance_fraction(self, burn: int = 0) -> np.ndarray:
        """Fraction of accepted proposals after ``burn`` steps, shape (ensembles, walkers)."""
        kept = self.accepted[:, burn:]
        if kept.shape[1] == 0:
            raise ValueError(f"burn={burn} leaves no steps (the run has {self.n_steps})")
        return kept.mean(axis=1)

    def samples(self, burn: int = 0, thin: int = 1) -> np.ndarray:
        """All kept positions pooled, shape (ensembles * kept steps * walkers, parameters)."""
        return self.chain[:, burn::thin].reshape(-1, self.n_dim)

    @property
    def status(self) -> str:
        """A sentence on how the run ended (meaningful for "until" runs)."""
        if self.report is None:
            return f"Ran {self.n_steps} steps; convergence not checked (see convergence_report)."
        if self.report.converged:
            return f"Converged after {self.n_steps} steps per ensemble."
        how = "stopped at the cap of" if self.reached_cap else "stopped after"
        return f"{how.capitalize()} {self.n_steps} steps per ensemble. {self.report.verdict}"


class SamplingInterrupted(KeyboardInterrupt):
    """Raised when a run is interrupted (Ctrl-C); the checkpoint holds every completed step.

    Attributes
    ----------
    checkpoint : pathlib.Path or None
        Where the completed steps were saved (None if no checkpoint was asked for).
    steps : ndarray of int
        Completed steps of each ensemble.
    """

    def __init__(self, checkpoint, steps):
        self.checkpoint = None if checkpoint is None else Path(checkpoint)
        self.steps = np.asarray(steps)
        where = (f"saved to {self.checkpoint}; run again with resume to continue"
                 if checkpoint is not None else "no checkpoint was requested, so they are lost")
        super().__init__(f"sampling interrupted after {self.steps.tolist()} steps per ensemble; {where}")


# ----------------------------------------------------------------------------
# The log-probability seen by emcee
# ----------------------------------------------------------------------------
class _VectorisedLogProb:
    """Call the user's log-probability on a batch and check what comes back."""

    def __init__(self, fn: Callable, n_dim: int):
        if not callable(fn):
            raise TypeError(f"log_prob must be callable, got {type(fn).__name__}")
        self.fn = fn
        self.n_dim = n_dim
        self.blob_width: int | None = None  # unknown until the first call; 0 = no blobs

    def evaluate(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
        """Return log-probabilities (n,) and blobs (n, K) or None."""
        n = theta.shape[0]
        out = self.fn(theta)
        blobs = None
        if isinstance(out, tuple):
            if len(out) != 2:
                raise ValueError(f"log_prob returned a tuple of {len(out)} items; expected (log_prob, blobs)")
            out, blobs = out
        lp = np.asarray(out, dtype=float)
        if lp.shape != (n,):
            raise ValueError(f"log_prob must return shape ({n},) for a batch of {n} walkers, got {lp.shape}")
        if np.isnan(lp).any():
            i = int(np.flatnonzero(np.isnan(lp))[0])
            raise ValueError(f"log_prob returned NaN at {theta[i].tolist()} (use -inf for impossible points)")
        if np.isposinf(lp).any():
            raise ValueError("log_prob returned +inf")
        width = 0
        if blobs is not None:
            try:
                blobs = np.asarray(blobs, dtype=float)
            except (TypeError, ValueError) as exc:
                raise ValueError(f"log_prob blobs must be numbers: {exc}") from None
            if blobs.ndim not in (1, 2) or blobs.shape[0] != n:
                raise ValueError(f"log_prob blobs must have shape ({n},) or ({n}, K), got {blobs.shape}")
            blobs = blobs.reshape(n, -1)
            width = blobs.shape[1]
        if self.blob_width is None:
            self.blob_width = width
        elif width != self.blob_width:
            raise ValueError(f"log_prob returned blobs of width {width} after width {self.blob_width} earlier")
        return lp, blobs

    def __call__(self, theta):
        # emcee (vectorize=True) iterates over what we return: plain floats, or
        # (log_prob, blob) pairs from which it builds its blob array.
        lp, blobs = self.evaluate(np.asarray(theta, dtype=float))
        if blobs is None:
            return lp
        return list(zip(lp, blobs))


def _emcee_blobs(blobs: np.ndarray | None):
    """Blobs (n, K) in the shape emcee produces: (n,) when K == 1, else (n, K)."""
    if blobs is None:
        return None
    return blobs[:, 0].copy() if blobs.shape[1] == 1 else blobs.copy()


# ----------------------------------------------------------------------------
# In-memory record of one ensemble (an emcee backend)
# ----------------------------------------------------------------------------
class _EnsembleRecord(Backend):
    """emcee's in-memory backend plus per-step acceptance flags.

    Each step is published by one assignment to ``committed`` = (steps, random
    state) after all its rows are written, so an interrupt at any moment leaves
    a consistent prefix for the checkpoint.
    """

    def reset(self, nwalkers, ndim):
        super().reset(nwalkers, ndim)
        self.accepted_steps = np.zeros((0, self.nwalkers), dtype=bool)
        self.committed = (0, None)

    def grow(self, ngrow, blobs):
        super().grow(ngrow, blobs)
        extra = len(self.chain) - len(self.accepted_steps)
        if extra > 0:
            self.accepted_steps = np.concatenate([self.accepted_steps, np.zeros((extra, self.nwalkers), bool)])

    def save_step(self, state, accepted):
        self._check(state, accepted)
        i = self.iteration
        self.chain[i] = state.coords
        self.log_prob[i] = state.log_prob
        if state.blobs is not None:
            self.blobs[i] = state.blobs
        self.accepted_steps[i] = accepted
        rng = state.random_state
        self.committed = (i + 1, rng)  # one assignment: step i is complete
        self.accepted = self.accepted + accepted
        self.random_state = rng
        self.iteration = i + 1

    def restore(self, chain, log_prob, accepted, blobs, random_state):
        """Refill from saved arrays (steps already taken)."""
        n = chain.shape[0]
        self.chain = np.array(chain, dtype=self.dtype)
        self.log_prob = np.array(log_prob, dtype=self.dtype)
        self.accepted_steps = np.array(accepted, dtype=bool)
        self.accepted = self.accepted_steps.sum(axis=0).astype(self.dtype)
        self.blobs = None if blobs is None else np.array(blobs, dtype=float)
        self.random_state = random_state
        self.iteration = n
        self.committed = (n, random_state)

    def snapshot(self) -> dict:
        """The committed prefix as arrays (views; copy before mutating)."""
        n, rng = self.committed
        blobs = None
        if self.blobs is not None:
            blobs = self.blobs[:n].reshape(n, self.nwalkers, -1)
        return {"steps": n, "chain": self.chain[:n], "log_prob": self.log_prob[:n],
                "accepted": self.accepted_steps[:n], "blobs": blobs, "random_state": rng}


def _seeded_states(seed: int, n_ensembles: int) -> list[tuple]:
    """Independent MT19937 states (emcee's generator type) spawned from one seed."""
    children = np.random.SeedSequence(seed).spawn(n_ensembles)
    return [np.random.RandomState(np.random.MT19937(c)).get_state() for c in children]


def _same_random_state(a, b) -> bool:
    return (a[0] == b[0] and np.array_equal(a[1], b[1]) and int(a[2]) == int(b[2])
            and int(a[3]) == int(b[3]) and float(a[4]) == float(b[4]))


# ----------------------------------------------------------------------------
# Checkpoint files (HDF5, replaced atomically)
# ----------------------------------------------------------------------------
def _write_checkpoint(path: Path, settings: dict, initial: np.ndarray, target_steps: int,
                      snapshots: list[dict]) -> None:
    """Write the whole state to a temporary file beside ``path``, then rename it over ``path``."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    try:
        with h5py.File(tmp, "w") as f:
            _fill_checkpoint(f, settings, initial, target_steps, snapshots)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    try:  # make the rename itself durable (POSIX); not possible everywhere
        dir_fd = os.open(path.parent, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(dir_fd)
    except OSError:
        pass
    finally:
        os.close(dir_fd)


def _fill_checkpoint(f: h5py.File, settings: dict, initial: np.ndarray, target_steps: int,
                     snapshots: list[dict]) -> None:
    f.attrs["format"] = CHECKPOINT_FORMAT
    f.attrs["format_version"] = CHECKPOINT_VERSION
    f.attrs["n_ensembles"] = settings["n_ensembles"]
    f.attrs["n_walkers"] = settings["n_walkers"]
    f.attrs["n_dim"] = settings["n_dim"]
    f.attrs["seed"] = str(settings["seed"])
    f.attrs["fingerprint"] = settings["fingerprint"]
    if settings.get("fingerprint_parts"):
        f.attrs["fingerprint_parts"] = json.dumps(dict(settings["fingerprint_parts"]), sort_keys=True)
    f.attrs["parameter_names"] = json.dumps(list(settings["parameter_names"]))
    f.attrs["blob_width"] = settings["blob_width"]
    f.attrs["target_steps"] = int(target_steps)
    f.create_dataset("initial", data=initial)
    for e, snap in enumerate(snapshots):
        g = f.create_group(f"ensemble_{e}")
        g.attrs["steps"] = int(snap["steps"])
        g.create_dataset("chain", data=snap["chain"])
        g.create_dataset("log_prob", data=snap["log_prob"])
        g.create_dataset("accepted", data=snap["accepted"].astype(np.uint8))
        if snap["blobs"] is not None:
            g.create_dataset("blobs", data=snap["blobs"])
        rng = snap["random_state"]
        g.create_dataset("rng_key", data=np.asarray(rng[1], dtype=np.uint32))
        g.attrs["rng_kind"] = str(rng[0])
        g.attrs["rng_pos"] = int(rng[2])
        g.attrs["rng_has_gauss"] = int(rng[3])
        g.attrs["rng_cached_gaussian"] = float(rng[4])


def _open_checkpoint(path: Path):
    """Open checkpoint ``path`` for reading (an h5py File) after checking it is one of ours."""
    try:
        f = h5py.File(path, "r")
    except OSError as exc:
        raise ValueError(f"cannot read checkpoint {path}: not a readable HDF5 file ({exc})") from None
    if f.attrs.get("format") != CHECKPOINT_FORMAT:
        f.close()
        raise ValueError(f"cannot read checkpoint {path}: not a checkpoint of this program")
    return f


def _read_checkpoint(path: Path) -> dict:
    """Read a checkpoint written by :func:`_write_checkpoint` (arrays and plain attributes only)."""
    path = Path(path)
    with _open_checkpoint(path) as f:
        try:
            version = int(f.attrs["format_version"])
            if version != CHECKPOINT_VERSION:
                raise ValueError(f"cannot read checkpoint {path}: layout version {version}, "
                                 f"this program reads version {CHECKPOINT_VERSION}")
            settings = {
                "n_ensembles": int(f.attrs["n_ensembles"]),
                "n_walkers": int(f.attrs["n_walkers"]),
                "n_dim": int(f.attrs["n_dim"]),
                "seed": int(f.attrs["seed"]),
                "fingerprint": str(f.attrs["fingerprint"]),
                "parameter_names": tuple(json.loads(f.attrs["parameter_names"])),
                "blob_width": int(f.attrs["blob_width"]),
            }
            target_steps = int(f.attrs["target_steps"])
            initial = np.array(f["initial"], dtype=float)
            snapshots = []
            for e in range(settings["n_ensembles"]):
                g = f[f"ensemble_{e}"]
                n = int(g.attrs["steps"])
                snap = {
                    "steps": n,
                    "chain": np.array(g["chain"], dtype=float),
                    "log_prob": np.array(g["log_prob"], dtype=float),
                    "accepted": np.array(g["accepted"]).astype(bool),
                    "blobs": np.array(g["blobs"], dtype=float) if "blobs" in g else None,
                    "random_state": (str(g.attrs["rng_kind"]), np.array(g["rng_key"], dtype=np.uint32),
                                     int(g.attrs["rng_pos"]), int(g.attrs["rng_has_gauss"]),
                                     float(g.attrs["rng_cached_gaussian"])),
                }
                W, D = settings["n_walkers"], settings["n_dim"]
                if (snap["chain"].shape != (n, W, D) or snap["log_prob"].shape != (n, W)
                        or snap["accepted"].shape != (n, W)):
                    raise ValueError(f"cannot read checkpoint {path}: ensemble {e + 1} arrays do not match "
                                     f"{n} steps of {W} walkers x {D} parameters")
                snapshots.append(snap)
        except (KeyError, TypeError, json.JSONDecodeError) as exc:
            raise ValueError(f"cannot read checkpoint {path}: missing or malformed entry ({exc})") from None
    if initial.shape != (settings["n_ensembles"], settings["n_walkers"], settings["n_dim"]):
        raise ValueError(f"cannot read checkpoint {path}: 'initial' has shape {initial.shape}")
    return {"settings": settings, "initial": initial, "target_steps": target_steps, "snapshots": snapshots}


def checkpoint_settings(path) -> dict:
    """The settings stored in checkpoint ``path`` (attributes only; the chains are not read).

    Returns a dict with ``n_ensembles``, ``n_walkers``, ``n_dim``, ``seed``,
    ``fingerprint``, ``fingerprint_parts`` (dict; empty for checkpoints written
    without them), ``parameter_names``, ``target_steps`` and ``steps`` (completed
    steps per ensemble, a list).
    """
    path = Path(path)
    with _open_checkpoint(path) as f:
        try:
            n_ens = int(f.attrs["n_ensembles"])
            parts = f.attrs.get("fingerprint_parts")
            return {"n_ensembles": n_ens, "n_walkers": int(f.attrs["n_walkers"]), "n_dim": int(f.attrs["n_dim"]),
                    "seed": int(f.attrs["seed"]), "fingerprint": str(f.attrs["fingerprint"]),
                    "fingerprint_parts": json.loads(parts) if parts else {},
                    "parameter_names": tuple(json.loads(f.attrs["parameter_names"])),
                    "target_steps": int(f.attrs["target_steps"]),
                    "steps": [int(f[f"ensemble_{e}"].attrs["steps"]) for e in range(n_ens)]}
        except (KeyError, TypeError, json.JSONDecodeError) as exc:
            raise ValueError(f"cannot read checkpoint {path}: missing or malformed entry ({exc})") from None


def checkpoint_steps(path) -> np.ndarray:
    """Completed steps of each ensemble stored in checkpoint ``path``, shape (ensembles,)."""
    data = _read_checkpoint(Path(path))
    return np.array([s["steps"] for s in data["snapshots"]], dtype=int)


def _settings_mismatch(saved: dict, wanted: dict) -> list[str]:
    out = []
    for key in ("n_ensembles", "n_walkers", "n_dim", "seed", "fingerprint", "parameter_names"):
        if saved[key] != wanted[key]:
            out.append(f"{key} is {saved[key]!r} in the checkpoint but {wanted[key]!r} now")
    return out


# ----------------------------------------------------------------------------
# The driver
# ----------------------------------------------------------------------------
def run_ensembles(log_prob: Callable, initial, n_steps: int, *, seed: int, checkpoint=None,
                  resume: bool = False, progress: bool = True, checkpoint_every: int | None = None,
                  checkpoint_seconds: float = 30.0, until=None, max_steps: int | None = None,
                  parameter_names: Sequence[str] | None = None, moves=None,
                  fingerprint: str = "", fingerprint_parts: dict | None = None) -> SamplerResult:
    """Run independent emcee ensembles with checkpoints; optionally until converged.

    Parameters
    ----------
    log_prob : callable
        ``log_prob(theta)`` with ``theta`` (walkers, parameters) returns
        (walkers,) log-probabilities (``-inf`` where impossible), or a pair
        ``(log_prob, blobs)`` with blobs (walkers,) or (walkers, K) numbers.
    initial : array (ensembles, walkers, parameters) or None
        Starting points; each ensemble's walkers must have finite log-probability
        and not lie on a lower-dimensional subspace. May be None when resuming.
    n_steps : int
        Steps per ensemble (the first target in "until" mode). A resumed run
        continues to the larger of this and the saved target.
    seed : int
        Non-negative integer; each ensemble gets its own stream spawned from it
        with :class:`numpy.random.SeedSequence`. Same seed, same chains.
    checkpoint : str or Path, optional
        HDF5 file for the checkpoint. It is rewritten whole (temporary file in
        the same folder, then an atomic rename) every ``checkpoint_every``
        steps or ``checkpoint_seconds`` seconds, after every ensemble, at the
        end, and when the run is interrupted.
    resume : bool
        Continue the run saved in ``checkpoint``. Without it an existing
        checkpoint is never overwritten.
    progress : bool
        Show one progress bar with an estimate of the time left (stderr).
    checkpoint_every : int, optional
        Save after this many steps (of any ensemble) as well.
    checkpoint_seconds : float
        Save when this many seconds have passed since the last save.
    until : bool or ConvergenceTargets, optional
        Keep extending all ensembles (by half their length each round) until
        :func:`convergence_report` with these targets (True: the defaults) says
        converged, or ``max_steps`` is reached. Burn-in is
        ``targets.burn_fraction`` of the chain.
    max_steps : int, optional
        Cap on steps per ensemble in "until" mode (required there).
    parameter_names : sequence of str, optional
        Names used in reports; default ``theta_0, theta_1, ...``.
    moves : optional
        emcee moves (default: the stretch move). Resuming is exact only for
        moves without internal state (true of emcee's stretch, walk, DE moves).
    fingerprint : str
        Any text that identifies the problem (data, prior, model); a checkpoint
        with another fingerprint is refused on resume.
    fingerprint_parts : dict, optional
        Name -> hash of each part behind ``fingerprint`` (stored in the
        checkpoint so that a refused resume can say which part changed).

    Returns
    -------
    SamplerResult

    Raises
    ------
    SamplingInterrupted
        On Ctrl-C, after saving every completed step to the checkpoint.
    ValueError
        For bad input, an unreadable checkpoint, or one written for other settings.
    FileExistsError, FileNotFoundError
        ``checkpoint`` exists without ``resume``, or is missing with ``resume``.
    """
    n_steps = _positive_int("n_steps", n_steps)
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed!r}")
    seed = int(seed)
    targets = _targets(until)
    if targets is not None:
        if max_steps is None:
            raise ValueError("until mode needs max_steps (a cap on steps per ensemble)")
        max_steps = _positive_int("max_steps", max_steps)
        if max_steps < n_steps:
            raise ValueError(f"max_steps ({max_steps}) is smaller than n_steps ({n_steps})")
    if checkpoint_every is not None:
        checkpoint_every = _positive_int("checkpoint_every", checkpoint_every)
    if not checkpoint_seconds > 0:
        raise ValueError(f"checkpoint_seconds must be positive, got {checkpoint_seconds}")
    if resume and checkpoint is None:
        raise ValueError("resume needs a checkpoint file")
    path = None if checkpoint is None else Path(checkpoint)

    saved = None
    if path is not None:
        if resume:
            if not path.exists():
                raise FileNotFoundError(f"no checkpoint to resume at {path}")
            saved = _read_checkpoint(path)
        elif path.exists():
            raise FileExistsError(f"checkpoint {path} exists; resume it, or delete it / choose another file "
                                  "to start afresh")
        elif not path.parent.is_dir():
            raise FileNotFoundError(f"folder {path.parent} for the checkpoint does not exist")

    if initial is None:
        if saved is None:
            raise ValueError("initial positions are needed unless resuming from a checkpoint")
        initial = saved["initial"]
    initial = np.array(initial, dtype=float)
    if initial.ndim != 3:
        raise ValueError(f"initial must have shape (ensembles, walkers, parameters), got {initial.shape}")
    n_ens, n_walkers, n_dim = initial.shape
    if n_ens < 1 or n_dim < 1:
        raise ValueError(f"initial must have at least one ensemble and one parameter, got {initial.shape}")
    if _ensemble_moves(moves) and n_walkers < 2 * n_dim:
        raise ValueError(f"the ensemble moves need at least 2 x parameters = {2 * n_dim} walkers per ensemble, "
                         f"got {n_walkers}")
    if not np.all(np.isfinite(initial)):
        raise ValueError("initial positions contain NaN or infinite values")
    names = _parameter_names(parameter_names, n_dim)
    settings = {"n_ensembles": n_ens, "n_walkers": n_walkers, "n_dim": n_dim, "seed": seed,
                "fingerprint": str(fingerprint), "parameter_names": names, "blob_width": None,
                "fingerprint_parts": dict(fingerprint_parts or {})}
    target = n_steps
    if saved is not None:
        problems = _settings_mismatch(saved["settings"], settings)
        if problems:
            raise ValueError(f"refusing to resume {path}: it was written for other settings ("
                             + "; ".join(problems) + ")")
        if not np.array_equal(saved["initial"], initial):
            raise ValueError(f"refusing to resume {path}: the initial positions differ from the saved ones "
                             "(pass initial=None to use the saved ones)")
        target = max(target, saved["target_steps"])
        if targets is not None:
            target = min(target, max_steps)

    wrapped = _VectorisedLogProb(log_prob, n_dim)
    records = []
    for e, rng_state in enumerate(_seeded_states(seed, n_ens)):
        rec = _EnsembleRecord()
        rec.reset(n_walkers, n_dim)
        if saved is not None and saved["snapshots"][e]["steps"] > 0:
            s = saved["snapshots"][e]
            blobs = s["blobs"]
            if blobs is not None and blobs.shape[2] == 1:
                blobs = blobs[:, :, 0]
            rec.restore(s["chain"], s["log_prob"], s["accepted"], blobs, s["random_state"])
        else:
            rec.random_state = rng_state
            rec.committed = (0, rng_state)
        records.append(rec)
    if saved is not None:
        width = saved["settings"]["blob_width"]
        wrapped.blob_width = None if width < 0 else width
        for e, rec in enumerate(records):  # the same problem? (no random numbers are drawn here)
            if rec.iteration:
                last = rec.get_last_sample()
                lp_now, _ = wrapped.evaluate(last.coords.copy())
                if not np.allclose(lp_now, last.log_prob, rtol=1e-9, atol=1e-9):
                    worst = float(np.max(np.abs(lp_now - last.log_prob)))
                    raise ValueError(f"refusing to resume {path}: log_prob at the saved positions of ensemble "
                                     f"{e + 1} differs from the saved values (by up to {worst:.3g}); the data or "
                                     "the model have changed")

    def save(target_now):
        if path is None:
            return
        settings["blob_width"] = -1 if wrapped.blob_width is None else wrapped.blob_width
        _write_checkpoint(path, settings, initial, target_now, [r.snapshot() for r in records])

    done = sum(r.iteration for r in records)
    bar = _progress_bar(progress, n_ens * target, done)
    last_save = {"time": time.monotonic(), "steps": done}
    report = None
    reached_cap = False
    try:
        if path is not None and saved is None:
            save(target)
        while True:
            for e, rec in enumerate(records):
                _advance(rec, e, wrapped, initial[e], target, moves, bar, last_save, checkpoint_every,
                         checkpoint_seconds, lambda: save(target))
                if path is not None:
                    save(target)
                    last_save.update(time=time.monotonic(), steps=bar.n)
            if targets is None:
                break
            result = _collect(records, initial, seed, names)
            report = convergence_report(result, burn=int(targets.burn_fraction * result.n_steps), targets=targets)
            if report.converged:
                break
            if target >= max_steps:
                reached_cap = True
                break
            target = min(max_steps, max(target + 1, int(math.ceil(1.5 * target))))
            bar.total = n_ens * target
            bar.refresh()
            save(target)
    except BaseException as exc:
        if path is not None:
            try:
                save(target)
            except BaseException as save_exc:  # keep the older, intact checkpoint
                exc.add_note(f"the checkpoint could not be updated ({save_exc!r}); {path} holds an earlier state")
        bar.close()
        if isinstance(exc, KeyboardInterrupt) and not isinstance(exc, SamplingInterrupted):
            raise SamplingInterrupted(path, [r.committed[0] for r in records]) from exc
        raise
    bar.close()
    result = _collect(records, initial, seed, names)
    return SamplerResult(result.chain, result.log_prob, result.accepted, result.blobs, initial, seed, names,
                         report=report, reached_cap=reached_cap)


def _advance(rec: _EnsembleRecord, e: int, wrapped: _VectorisedLogProb, start: np.ndarray, target: int,
             moves, bar, last_save: dict, checkpoint_every, checkpoint_seconds, save) -> None:
    """Advance one ensemble to ``target`` steps, saving on the way."""
    remaining = target - rec.iteration
    if remaining <= 0:
        return
    if rec.iteration == 0:
        if not walkers_independent(start.copy()):
            raise ValueError(f"ensemble {e + 1}: the starting points lie (nearly) on a lower-dimensional "
                             "subspace; spread them out")
        lp0, blobs0 = wrapped.evaluate(start.copy())
        if not np.all(np.isfinite(lp0)):
            bad = np.flatnonzero(~np.isfinite(lp0)) + 1
            raise ValueError(f"ensemble {e + 1}: walkers {bad.tolist()} start where log_prob is -inf")
        state = State(start.copy(), log_prob=lp0, blobs=_emcee_blobs(blobs0), random_state=rec.random_state)
    else:
        state = rec.get_last_sample()
    sampler = emcee.EnsembleSampler(rec.nwalkers, rec.ndim, wrapped, moves=moves, vectorize=True, backend=rec)
    # emcee wraps the function in a helper that prints every argument on any
    # exception, Ctrl-C included; our wrapper already reports clearly.
    sampler.log_prob_fn = wrapped
    if not _same_random_state(sampler.random_state, rec.random_state):
        raise RuntimeError(f"could not restore the random state of ensemble {e + 1}")
    for _ in sampler.sample(state, iterations=remaining, store=True, skip_initial_state_check=True):
        bar.update(1)
        due_steps = checkpoint_every is not None and bar.n - last_save["steps"] >= checkpoint_every
        if due_steps or time.monotonic() - last_save["time"] >= checkpoint_seconds:
            save()
            last_save.update(time=time.monotonic(), steps=bar.n)


def _collect(records, initial, seed, names) -> SamplerResult:
    n = min(r.committed[0] for r in records)
    snaps = [r.snapshot() for r in records]
    chain = np.stack([s["chain"][:n] for s in snaps])
    log_prob = np.stack([s["log_prob"][:n] for s in snaps])
    accepted = np.stack([s["accepted"][:n] for s in snaps])
    blobs = None
    if snaps[0]["blobs"] is not None:
        blobs = np.stack([s["blobs"][:n] for s in snaps])
    return SamplerResult(chain.copy(), log_prob.copy(), accepted.copy(), None if blobs is None else blobs.copy(),
                         initial, seed, names)


class _NoBar:
    def __init__(self, total, initial):
        self.total, self.n = total, initial

    def update(self, k):
        self.n += k

    def refresh(self):
        pass

    def close(self):
        pass


def _progress_bar(show: bool, total: int, initial: int):
    if not show:
        return _NoBar(total, initial)
    from tqdm import tqdm

    # disable=None: no bar when stderr is not a terminal (logs get no carriage-return updates)
    return tqdm(total=total, initial=initial, unit="step", desc="sampling", smoothing=0.05, dynamic_ncols=True,
                disable=None)


def _ensemble_moves(moves) -> bool:
    """True if any move (default: stretch) is a red-blue ensemble move needing 2 x parameters walkers."""
    if moves is None:
        return True
    items = moves if isinstance(moves, (list, tuple)) else [moves]
    for item in items:
        move = item[0] if isinstance(item, tuple) else item
        if isinstance(move, RedBlueMove) and not move.live_dangerously:
            return True
    return False


def _positive_int(name: str, value) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{name} must be a positive integer, got {value!r}")
    return int(value)


def _targets(until) -> ConvergenceTargets | None:
    if until is None or until is False:
        return None
    if until is True:
        return ConvergenceTargets()
    if isinstance(until, ConvergenceTargets):
        return until
    raise TypeError(f"until must be None, True or ConvergenceTargets, got {type(until).__name__}")


def _parameter_names(names, n_dim: int) -> tuple[str, ...]:
    if names is None:
        return tuple(f"theta_{i}" for i in range(n_dim))
    names = tuple(str(n) for n in names)
    if len(names) != n_dim:
        raise ValueError(f"parameter_names has {len(names)} names for {n_dim} parameters")
    if len(set(names)) != len(names):
        raise ValueError(f"parameter_names has duplicates: {names}")
    return names


# ----------------------------------------------------------------------------
# Convergence
# ----------------------------------------------------------------------------
def convergence_report(result: SamplerResult, burn: int | None = None, thin: int = 1,
                       targets: ConvergenceTargets | None = None) -> ConvergenceReport:
    """Diagnose the ensembles of ``result`` and give a verdict.

    Chains for arviz: R-hat is computed twice and the larger value kept --
    (a) every walker of every ensemble as one chain, (E*W chains of the kept
    steps), which flags walkers that have not mixed, and (b) every ensemble as
    one chain whose draws are its walker positions in step order, which compares
    only truly independent chains as Vehtari et al. (2021) assume; split halves
    of (b) are the early and late halves of the run. Bulk and tail ESS use
    layout (a), as arviz does for emcee output; it treats walkers of one
    ensemble as independent, which they are not, so it is checked together with
    the run length in autocorrelation times. The autocorrelation time is the
    largest of emcee's ``integrated_time`` (``c=5``, ``tol=0``) for each
    ensemble (per-walker autocorrelations averaged, as emcee does) and for the
    walker-average series of the ensembles (the definition of Goodman & Weare,
    CAMCoS 5, 2010, which also counts correlation between walkers).

    Parameters
    ----------
    result : SamplerResult
    burn : int, optional
        Steps discarded at the start; default ``targets.burn_fraction`` of the run.
    thin : int
        Keep every ``thin``-th step for R-hat/ESS; tau is reported in steps.
    targets : ConvergenceTargets, optional

    Returns
    -------
    ConvergenceReport
        ``converged`` is True only if R-hat, bulk ESS, tail ESS and run length
        meet the targets for every parameter, there are at least two ensembles
        and no walker is stuck.
    """
    import arviz as az  # slow import; only needed here
    from emcee.autocorr import integrated_time

    targets = ConvergenceTargets() if targets is None else targets
    n_ens, n_steps, n_walkers, n_dim = result.chain.shape
    if burn is None:
        burn = int(targets.burn_fraction * n_steps)
    if isinstance(burn, bool) or not isinstance(burn, (int, np.integer)) or not 0 <= burn < n_steps:
        raise ValueError(f"burn must be an integer in [0, {n_steps}) for a run of {n_steps} steps, got {burn!r}")
    thin = _positive_int("thin", thin)
    burn = int(burn)
    names = result.parameter_names
    kept_steps = n_steps - burn
    kept = result.chain[:, burn::thin]  # (E, S', W, D)
    n_draws = kept.shape[1]

    nan = np.full(n_dim, np.nan)
    rhat_w, rhat_e, ess_b, ess_t = nan.copy(), nan.copy(), nan.copy(), nan.copy()
    if n_draws >= 4:
        by_walker = kept.transpose(0, 2, 1, 3).reshape(n_ens * n_walkers, n_draws, n_dim)
        by_ensemble = kept.reshape(n_ens, n_draws * n_walkers, n_dim)
        with np.errstate(all="ignore"):
            rhat_w = _arviz_stat(az.rhat, by_walker, method="rank")
            if n_ens >= 2:  # arviz needs two chains; one ensemble cannot be compared with itself
                rhat_e = _arviz_stat(az.rhat, by_ensemble, method="rank")
            ess_b = _arviz_stat(az.ess, by_walker, method="bulk")
            ess_t = _arviz_stat(az.ess, by_walker, method="tail")
    if n_ens < 2:
        rhat = rhat_w
    else:
        rhat = np.where(np.isnan(rhat_w) | np.isnan(rhat_e), np.nan, np.fmax(rhat_w, rhat_e))

    tau_e = np.full((n_ens, n_dim), np.nan)
    tau_mean = np.full(n_dim, np.nan)
    if n_draws >= 2:
        with np.errstate(all="ignore"):
            for e in range(n_ens):
                tau_e[e] = thin * integrated_time(kept[e], c=5, tol=0)
            # walker-average series of each ensemble (Goodman & Weare 2010): includes the
            # correlation between walkers that the per-walker estimate leaves out
            tau_mean = thin * integrated_time(kept.mean(axis=2).transpose(1, 0, 2), c=5, tol=0)
    every = np.vstack([tau_e, tau_mean[None, :]])
    tau = np.where(np.isnan(every).any(axis=0), np.nan, np.max(every, axis=0))

    acc_w = result.accepted[:, burn:].mean(axis=1)
    acc = acc_w.mean(axis=1)
    stuck = _stuck_walkers(result, burn, targets)

    failures, notes = [], []
    t = targets

    def listed(mask, values, fmt):
        return ", ".join(f"{names[i]} ({fmt.format(values[i])})" for i in np.flatnonzero(mask))

    if n_ens < 2:
        failures.append("only one ensemble: at least two independent ensembles are needed to check that "
                        "they agree")
    if n_draws < 4:
        failures.append(f"only {n_draws} kept draws per walker after burn-in; too few for R-hat and ESS")
    else:
        bad = ~(rhat < t.max_rhat)
        if bad.any():
            failures.append(f"R-hat is not below {t.max_rhat:g} for " + listed(bad, rhat, "{:.3f}"))
        for label, ess in (("bulk", ess_b), ("tail", ess_t)):
            bad = ~(ess > t.min_ess)
            if bad.any():
                failures.append(f"{label} ESS is not above {t.min_ess:g} for " + listed(bad, ess, "{:.0f}"))
    with np.errstate(divide="ignore", invalid="ignore"):
        multiple = kept_steps / tau
    bad = ~(multiple > t.min_tau_multiple)
    if bad.any():
        parts = []
        for i in np.flatnonzero(bad):
            if np.isnan(tau[i]):
                parts.append(f"{names[i]} (autocorrelation time not computable: the values never change)")
            else:
                parts.append(f"{names[i]} (tau = {tau[i]:.1f} steps, needs {t.min_tau_multiple * tau[i]:.0f})")
        failures.append(f"the {kept_steps} steps kept are not more than {t.min_tau_multiple:g} "
                        "autocorrelation times for " + ", ".join(parts))
    if stuck:
        shown = "; ".join(f"ensemble {e + 1} walker {w + 1} ({why})" for e, w, why in stuck[:5])
        more = f" and {len(stuck) - 5} more" if len(stuck) > 5 else ""
        failures.append(f"{len(stuck)} stuck walker(s): {shown}{more}")
    lo, hi = t.acceptance_range
    out = (acc < lo) | (acc > hi)
    if out.any():
        which = ", ".join(f"ensemble {e + 1} ({acc[e]:.2f})" for e in np.flatnonzero(out))
        hint = " (high values are usual with very few parameters)" if (acc[out] > hi).all() else ""
        notes.append(f"acceptance fraction outside the usual {lo:g}-{hi:g}: {which}{hint}")
    low_walkers = int(np.sum(acc_w < lo))
    if low_walkers and not out.all():
        notes.append(f"{low_walkers} walker(s) accept fewer than {lo:g} of their proposals")

    return ConvergenceReport(names, burn, thin, kept_steps, rhat, rhat_w, rhat_e, ess_b, ess_t, tau, tau_e,
                             tau_mean, acc, acc_w, tuple(stuck), tuple(failures), tuple(notes), targets)


def _arviz_stat(fn, draws: np.ndarray, **kwargs) -> np.ndarray:
    """Apply an arviz diagnostic to (chain, draw, parameter) draws; returns (parameter,)."""
    import arviz as az

    ds = az.convert_to_dataset({"theta": draws}, dims={"theta": ["parameter"]})
    return np.asarray(fn(ds, **kwargs)["theta"].values, dtype=float)


def _stuck_walkers(result: SamplerResult, burn: int, targets: ConvergenceTargets) -> list[tuple[int, int, str]]:
    """Walkers that did not move, or sit far below the others in log-probability, at the end of the run."""
    n = min(int(targets.stuck_steps), result.n_steps - burn)
    if n < 2:
        return []
    tail = result.chain[:, -n:]  # (E, n, W, D)
    frozen = np.all(tail == tail[:, :1], axis=(1, 3))  # (E, W)
    lp = result.log_prob[:, -n:]  # (E, n, W)
    finite = lp[np.isfinite(lp)]
    centre = np.median(finite) if finite.size else -np.inf
    spread = 1.4826 * np.median(np.abs(finite - centre)) if finite.size else 0.0
    gap = max(targets.stuck_log_prob_gap * spread, targets.stuck_log_prob_gap)
    walker_median = np.median(lp, axis=1)  # (E, W)
    low = walker_median < centre - gap
    out = []
    for e, w in zip(*np.nonzero(frozen | low)):
        why = []
        if frozen[e, w]:
            why.append(f"position unchanged for the last {n} steps")
        if low[e, w]:
            why.append(f"median log-probability {walker_median[e, w]:.4g} vs {centre:.4g} for all walkers")
        out.append((int(e), int(w), "; ".join(why)))
    return out


# ----------------------------------------------------------------------------
# Starting points
# ----------------------------------------------------------------------------
def initial_from_prior(sample_fn: Callable, n_ensembles: int, n_walkers: int, rng: np.random.Generator,
                       log_prob: Callable | None = None, max_tries: int = 100) -> np.ndarray:
    """Starting points drawn from the prior, shape (ensembles, walkers, parameters).

    Parameters
    ----------
    sample_fn : callable
        ``sample_fn(n, rng)`` returns ``n`` prior draws, shape (n, parameters).
    n_ensembles, n_walkers : int
    rng : numpy.random.Generator
    log_prob : callable, optional
        If given, draws where it is ``-inf`` are replaced by new draws.
    max_tries : int
        Rounds of replacement before giving up.

    Raises
    ------
    RuntimeError
        If some points still have ``-inf`` log-probability after ``max_tries`` rounds.
    """
    n_ensembles = _positive_int("n_ensembles", n_ensembles)
    n_walkers = _positive_int("n_walkers", n_walkers)

    def draw(k):
        out = np.asarray(sample_fn(k, rng), dtype=float)
        if out.ndim != 2 or out.shape[0] != k:
            raise ValueError(f"sample_fn({k}, rng) must return shape ({k}, parameters), got {out.shape}")
        return out

    points = _finite_points(draw, n_ensembles * n_walkers, log_prob, max_tries, "prior draws")
    return points.reshape(n_ensembles, n_walkers, -1)


def initial_around(point, scale, n_ensembles: int, n_walkers: int, rng: np.random.Generator,
                   log_prob: Callable | None = None, max_tries: int = 100) -> np.ndarray:
    """Starting points in a small Gaussian ball, shape (ensembles, walkers, parameters).

    Parameters
    ----------
    point : array (parameters,)
        Centre of the ball (e.g. a quick classic estimate).
    scale : float or array (parameters,)
        Standard deviation of the ball in each parameter (positive).
    n_ensembles, n_walkers : int
    rng : numpy.random.Generator
    log_prob : callable, optional
        Points where it is ``-inf`` are redrawn.
    max_tries : int
        Rounds of redrawing before giving up.

    Raises
    ------
    RuntimeError
        If some points still have ``-inf`` log-probability after ``max_tries`` rounds.
    """
    n_ensembles = _positive_int("n_ensembles", n_ensembles)
    n_walkers = _positive_int("n_walkers", n_walkers)
    centre = np.atleast_1d(np.asarray(point, dtype=float))
    if centre.ndim != 1 or not np.all(np.isfinite(centre)):
        raise ValueError(f"point must be a finite 1-D array, got {point!r}")
    width = np.broadcast_to(np.asarray(scale, dtype=float), centre.shape)
    if not np.all(width > 0) or not np.all(np.isfinite(width)):
        raise ValueError(f"scale must be positive and finite, got {scale!r}")

    def draw(k):
        return centre + width * rng.standard_normal((k, centre.size))

    points = _finite_points(draw, n_ensembles * n_walkers, log_prob, max_tries, f"points around {centre.tolist()}")
    return points.reshape(n_ensembles, n_walkers, centre.size)


def _finite_points(draw: Callable, n: int, log_prob, max_tries: int, what: str) -> np.ndarray:
    points = draw(n)
    if not np.all(np.isfinite(points)):
        raise ValueError(f"{what}: the draws contain NaN or infinite values")
    if log_prob is None:
        return points
    max_tries = _positive_int("max_tries", max_tries)
    wrapped = _VectorisedLogProb(log_prob, points.shape[1])
    for _ in range(max_tries):
        lp, _ = wrapped.evaluate(points)
        bad = ~np.isfinite(lp)
        if not bad.any():
            return points
        points[bad] = draw(int(bad.sum()))
    lp, _ = wrapped.evaluate(points)
    bad = int(np.sum(~np.isfinite(lp)))
    if bad == 0:
        return points
    raise RuntimeError(f"{what}: {bad} of {n} starting points still have log-probability -inf after "
                       f"{max_tries} rounds of redrawing; check the centre, the scale or the prior")
