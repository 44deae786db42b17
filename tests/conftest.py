"""Shared fixtures for the forward-engine tests.

The engine (``invert.forward``) is imported inside the ``forward`` fixture so that every
test file imports cleanly without it; tests that need it are skipped until it exists,
while the checks of the reference ray tracer (tests/reference_rays.py) still run.
"""

from __future__ import annotations

import os
import sys

import numpy as np
import pytest

sys.path.insert(0, os.path.dirname(__file__))


@pytest.fixture(scope="session")
def forward():
    return pytest.importorskip("invert.forward")


def engine_call(forward, model, wave, x, zs=0.0, zr=0.0, branch="first", interface=None):
    """Call ``travel_times`` with (picks,) geometry arrays; returns the Arrivals object."""
    x = np.atleast_1d(np.asarray(x, dtype=float))
    zs = np.broadcast_to(np.asarray(zs, dtype=float), x.shape).copy()
    zr = np.broadcast_to(np.asarray(zr, dtype=float), x.shape).copy()
    kwargs = {"branch": branch}
    if interface is not None:
        kwargs["interface"] = interface
    return forward.travel_times(model, wave, x, zs, zr, **kwargs)


@pytest.fixture(scope="session")
def run(forward):
    """``run(model, wave, x, zs, zr, branch, interface)`` -> Arrivals (engine imported lazily)."""

    def _run(model, wave, x, zs=0.0, zr=0.0, branch="first", interface=None):
        return engine_call(forward, model, wave, x, zs, zr, branch, interface)

    return _run
