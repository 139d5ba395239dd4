"""Back-ends: each fits a Design and returns a Fit (see base.py); registry.py lists them."""
from .base import Estimates, Fit, JointTest, PosteriorFit, Unavailable, WaldFit
from .registry import DEFAULT_BACKENDS, REGISTRY, available_ids, make_backend

__all__ = ["Estimates", "Fit", "JointTest", "PosteriorFit", "Unavailable", "WaldFit",
           "DEFAULT_BACKENDS", "REGISTRY", "available_ids", "make_backend"]
