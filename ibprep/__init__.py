"""ibprep — prepare and check moving-body cases for sharp-interface immersed-boundary solvers.

The curated public names are listed in ``__all__``; see the README for a tour.
"""

from __future__ import annotations

from .classify import CellTag, Transition, classify, classify_levels, label_bodies, step_tags, surface_components
from .errors import IbprepError, IbprepWarning, InputError, MissingDependencyError
from .grid import Grid, NestedGrid, refine

__version__ = "0.1.0.dev0"

__all__ = [
    "CellTag",
    "Grid",
    "IbprepError",
    "IbprepWarning",
    "InputError",
    "MissingDependencyError",
    "NestedGrid",
    "Transition",
    "classify",
    "classify_levels",
    "label_bodies",
    "refine",
    "step_tags",
    "surface_components",
]
