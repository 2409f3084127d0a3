"""ibprep — prepare and check moving-body cases for sharp-interface immersed-boundary solvers.

The curated public names are listed in ``__all__``; see the README for a tour.
"""

from __future__ import annotations

from .classify import CellTag
from .errors import IbprepError, IbprepWarning, InputError, MissingDependencyError
from .grid import Grid, NestedGrid, refine
from .stencils import StencilLimits, Stencils, StencilSummary, build_stencils, load_stencils

__version__ = "0.1.0.dev0"

__all__ = [
    "CellTag",
    "Grid",
    "IbprepError",
    "IbprepWarning",
    "InputError",
    "MissingDependencyError",
    "NestedGrid",
    "StencilLimits",
    "StencilSummary",
    "Stencils",
    "build_stencils",
    "load_stencils",
    "refine",
]
