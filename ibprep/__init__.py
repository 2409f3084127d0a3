"""ibprep — prepare and check moving-body cases for sharp-interface immersed-boundary solvers.

geometry → motion → grid → per-step cell tagging → stencils → conditioning →
a pre-flight verdict. The curated public names are listed in ``__all__``; see
the README for a tour.
"""

from __future__ import annotations

from .io.case import BodyCase, Case, CheckLimits, load_case, parse_case
from .tagging.classify import CellTag, Transition, classify, classify_levels, label_bodies, step_tags
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
from .motion.kinematics import (
    FlowNumbers,
    Motion,
    Sine,
    SmoothSquareWave,
    Tabulated,
    Waveform,
    WaveformTable,
    flow_numbers,
    load_waveform_table,
)
from .checks.preflight import Check, Report, preflight
from .checks.sizing import propose_boxes, swept_envelope
from .stencils.build import StencilLimits, Stencils, StencilSummary, build_stencils, load_stencils
from .checks.sweep import StepResult, sweep

from ._version import __version__  # noqa: E402 (one place for the version)

__all__ = [
    "BodyCase",
    "Case",
    "CellTag",
    "Check",
    "CheckLimits",
    "FlowNumbers",
    "Grid",
    "IbprepError",
    "IbprepWarning",
    "InputError",
    "MissingDependencyError",
    "Motion",
    "NestedGrid",
    "Report",
    "Section",
    "Sine",
    "SmoothSquareWave",
    "StencilLimits",
    "StencilSummary",
    "Stencils",
    "StepResult",
    "SurfaceReport",
    "Tabulated",
    "Transition",
    "Waveform",
    "WaveformTable",
    "build_stencils",
    "check_surface",
    "classify",
    "classify_levels",
    "flow_numbers",
    "label_bodies",
    "load_case",
    "load_stencils",
    "load_surface",
    "load_waveform_table",
    "local_thickness",
    "make_wing",
    "naca4",
    "parse_case",
    "preflight",
    "propose_boxes",
    "refine",
    "save_surface",
    "step_tags",
    "surface_markers",
    "sweep",
    "swept_envelope",
    "thin_regions",
]
