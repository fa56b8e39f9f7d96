"""cladewise: Bayesian phylogenetic comparative analysis on a laptop CPU."""

from __future__ import annotations

__version__ = "0.1.0"

from cladewise.errors import FitError, InputError
from cladewise.data.trees import FlatTree
# cheap to import: PyMC and the engine load only when these are called
from cladewise.direct import fit_traits, prepare_traits, signal_traits

__all__ = ["FlatTree", "InputError", "FitError", "fit_traits", "prepare_traits", "signal_traits", "__version__"]
