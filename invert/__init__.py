"""invert: Bayesian inversion of 1-D layered seismic velocity structure from arrival times."""

from .model import LayerModel

__all__ = ["LayerModel"]
__version__ = "0.1.0"
