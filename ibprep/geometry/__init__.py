"""Body geometry: NACA 4-digit sections, finite-span wings, watertight surfaces.

``naca`` and ``wing`` produce shapes; ``surface`` is the one module that touches
trimesh (building, loading, checking and saving meshes, markers, thickness).
"""

from .naca import Section, naca4, parse_naca4
from .surface import (
    SurfaceReport,
    ThinRegions,
    check_surface,
    load_surface,
    local_thickness,
    save_surface,
    surface_markers,
    thin_regions,
)
from .wing import WingLayout, make_wing

__all__ = [
    "Section",
    "SurfaceReport",
    "ThinRegions",
    "WingLayout",
    "check_surface",
    "load_surface",
    "local_thickness",
    "make_wing",
    "naca4",
    "parse_naca4",
    "save_surface",
    "surface_markers",
    "thin_regions",
]
