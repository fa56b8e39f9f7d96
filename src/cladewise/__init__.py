"""cladewise: Bayesian phylogenetic comparative analysis on a laptop CPU."""

from __future__ import annotations

__version__ = "0.1.0"

from cladewise.errors import FitError, InputError
from cladewise.data.trees import FlatTree

__all__ = ["FlatTree", "InputError", "FitError", "__version__"]
