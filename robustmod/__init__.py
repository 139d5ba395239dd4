"""robustmod: is a moderation effect an artifact of non-constant variance?

Fit one moderation model with several back-ends that treat the variance differently
and put the product term, conditional slopes and Johnson–Neyman regions side by side.
"""
from .compare import Comparison, compare
from .design import Design, build_design
from .errors import InputError, RobustmodError
from .spec import ModelSpec

__version__ = "0.1.0"
__all__ = ["Comparison", "Design", "InputError", "ModelSpec", "RobustmodError", "build_design", "compare", "__version__"]
