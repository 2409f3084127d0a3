"""ibprep — prepare and check moving-body cases for sharp-interface immersed-boundary solvers.

The curated public names are listed in ``__all__``; see the README for a tour.
"""

from __future__ import annotations

from .classify import CellTag
from .errors import IbprepError, IbprepWarning, InputError, MissingDependencyError
from .geometry import (
    Section,
    SurfaceReport,
    check_surface,
    load_surface,
    local_thickness,
    make_wing,
    naca4,
    save_surface,
    surface_markers,
    thin_regions,
)
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
    "Section",
    "SurfaceReport",
    "check_surface",
    "load_surface",
    "local_thickness",
    "make_wing",
    "naca4",
    "refine",
    "save_surface",
    "surface_markers",
    "thin_regions",
]
