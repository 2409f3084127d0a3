"""The case file: a TOML description of one moving-body case, read into a validated :class:`Case`.

A case is 3-D, or 2-D when the ``[grid]`` bounds have two components (the
body is then a NACA section in the x–y plane). A case file has the tables ``[body]``, ``[motion]``, ``[flow]``, ``[grid]`` (with
``[[grid.refine]]`` boxes), ``[time]`` and the optional ``[checks]`` and
``[sizing]``. Units are SI; angles are degrees only in keys ending ``_deg``.
Every problem is an :class:`~ibprep.errors.InputError` that names the key
(``[motion] frequency``) and says what to do; an unknown key gets a
did-you-mean suggestion. See :data:`KEYS` for the full list with units.

Several bodies: the form reserved for them is an array ``[[bodies]]`` whose
entries take the ``[body]`` keys plus a ``[bodies.motion]`` table; this
version reads one ``[body]`` and says so when it meets ``[[bodies]]``.
"""

from __future__ import annotations

import difflib
import math
import tomllib
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from ..grid import Grid, NestedGrid, refine

__all__ = ["Case", "BodyCase", "BodySpec", "FlowSpec", "TimeSpec", "CheckLimits", "SizingSpec", "KEYS", "SCALE_LIMITS",
           "load_case", "parse_case"]


# --------------------------------------------------------------------------- key table
@dataclass(frozen=True)
class _Key:
    kind: str  # "float", "int", "bool", "str", "vec3" (a point: [x, y, z], or [x, y] in a 2-D case), "boxes"
    unit: str = ""
    required: bool = False
    default: Any = None
    minimum: float | None = None  # inclusive unless strict
    strict: bool = False
    maximum: float | None = None
    choices: tuple[str, ...] | None = None
    doc: str = ""
    fix: str = ""  # appended to an out-of-range error: how a user most likely meant it


def _k(kind, unit="", **kw) -> _Key:
    return _Key(kind, unit, **kw)


#: Every key of the case file, by table: kind, unit, default and a line of documentation.
KEYS: dict[str, dict[str, _Key]] = {
    "case": {
        "title": _k("str", default="", doc="a name for the case, shown in reports"),
    },
    "body": {
        "name": _k("str", default="", doc="a name for the body, used in messages (several bodies)"),
        "offset": _k("vec3", "m", default=(0.0, 0.0, 0.0),
                     doc="where the body frame's origin sits in the world at rest (e.g. the second foil of a pair)"),
        "section": _k("str", doc='NACA 4-digit code, e.g. "0015"; or give surface'),
        "surface": _k("str", doc="path of a closed STL/OBJ/PLY body, relative to the case file"),
        "scale": _k("float", "-", default=1.0, minimum=0.0, strict=True, doc="factor applied to surface coordinates"),
        "chord": _k("float", "m", required=True, minimum=1e-6, maximum=1e4, doc="reference (root) chord",
                    fix="the chord is in metres (1 micrometre to 10 km)"),
        "span": _k("float", "m", minimum=0.0, strict=True, doc="tip-to-tip span of a wing built from section",
                   fix="leave span out for a 2-D section case (two-component [grid] bounds)"),
        "tips": _k("str", default="round", choices=("flat", "round"), doc="how the wing ends are closed"),
        "taper": _k("float", "-", default=1.0, minimum=0.0, strict=True, doc="tip chord / root chord"),
        "sweep_deg": _k("float", "deg", default=0.0, minimum=-75.0, maximum=75.0, doc="leading-edge sweep"),
        "twist_deg": _k("float", "deg", default=0.0, minimum=-60.0, maximum=60.0, doc="tip incidence relative to root"),
        "closed_te": _k("bool", default=True, doc="closed (sharp) trailing edge of the NACA section"),
        "centred": _k("bool", default=False, doc="mid-span at z = 0 instead of the root"),
        "faces": _k("int", default=20000, minimum=200, maximum=2_000_000,
                    doc="approximate triangle count of a generated wing"),
    },
    "motion": {
        "frequency": _k("float", "Hz", minimum=0.0, strict=True,
                        doc="oscillation frequency (required unless a table gives the period)"),
        "plunge_amplitude": _k("float", "m", default=0.0, minimum=0.0, doc="plunge amplitude along y"),
        "pitch_amplitude_deg": _k("float", "deg", default=0.0, minimum=0.0, maximum=90.0, strict=False,
                                  doc="pitch amplitude about the span axis, nose-up positive"),
        "phase_deg": _k("float", "deg", default=90.0, doc="phase by which pitch leads plunge"),
        "pivot": _k("vec3", "m", default=(0.0, 0.0, 0.0), doc="pitch axis point, body frame"),
        "plunge_sharpness": _k("float", "-", default=0.0, minimum=0.0, maximum=100.0,
                               doc="0 = sine; larger = flatter, near-square plunge"),
        "pitch_sharpness": _k("float", "-", default=0.0, minimum=0.0, maximum=100.0,
                              doc="0 = sine; larger = flatter, near-square pitch"),
        "roll_amplitude_deg": _k("float", "deg", default=0.0, minimum=0.0, maximum=180.0,
                                 doc="flapping stroke amplitude about the body x axis at the root"),
        "roll_phase_deg": _k("float", "deg", default=0.0, doc="phase by which the stroke leads plunge"),
        "roll_root": _k("vec3", "m", default=(0.0, 0.0, 0.0), doc="point of the stroke axis, body frame"),
        "table": _k("str", doc="CSV of t, h, theta(_deg) over one period (replaces the sine waveforms)"),
    },
    "flow": {
        "speed": _k("float", "m/s", required=True, minimum=0.0, strict=True, doc="free stream along +x"),
        "viscosity": _k("float", "m^2/s", required=True, minimum=0.0, strict=True, doc="kinematic viscosity"),
    },
    "grid": {
        "lower": _k("bounds", "m", required=True, doc="domain corner: [x, y, z], or [x, y] for a 2-D case"),
        "upper": _k("bounds", "m", required=True, doc="opposite domain corner"),
        "spacing": _k("float", "m", required=True, minimum=0.0, strict=True, doc="base cell size"),
        "refine": _k("boxes", "m", default=(), doc="nested boxes, each halving the spacing"),
    },
    "time": {
        "step": _k("float", "s", required=True, minimum=0.0, strict=True, doc="solver time step"),
        "cycles": _k("int", "-", default=1, minimum=1, maximum=1_000_000, doc="cycles the run will last"),
    },
    "checks": {
        "phases": _k("int", "-", default=32, minimum=4, maximum=100_000,
                     doc="sampled phases per cycle (plus peak-speed instants)"),
        "all_steps": _k("bool", default=False, doc="check every solver step of one cycle instead"),
        "cfl_warn": _k("float", "-", default=0.5, minimum=0.0, strict=True, doc="convective Courant number: warn above"),
        "cfl_max": _k("float", "-", default=1.0, minimum=0.0, strict=True, doc="convective Courant number: fail above"),
        "travel_warn": _k("float", "cells", default=0.5, minimum=0.0, strict=True,
                          doc="surface travel per step: warn above"),
        "travel_max": _k("float", "cells", default=1.0, minimum=0.0, strict=True,
                         doc="surface travel per step: fail above"),
        "cells_per_chord_warn": _k("float", "cells", default=64.0, minimum=0.0, doc="warn below"),
        "cells_per_chord_min": _k("float", "cells", default=32.0, minimum=0.0, doc="fail below"),
        "le_radius_cells_warn": _k("float", "cells", default=2.0, minimum=0.0, doc="warn below"),
        "le_radius_cells_min": _k("float", "cells", default=1.0, minimum=0.0, doc="fail below"),
        "bl_cells_warn": _k("float", "cells", default=10.0, minimum=0.0, doc="cells across delta99 at the TE: warn below"),
        "bl_cells_min": _k("float", "cells", default=5.0, minimum=0.0, doc="fail below"),
        "stokes_cells_warn": _k("float", "cells", default=4.0, minimum=0.0, doc="cells across the Stokes layer: warn below"),
        "stokes_cells_min": _k("float", "cells", default=2.0, minimum=0.0, doc="fail below"),
        "upstream_chords": _k("float", "c", default=2.0, minimum=0.0, doc="clearance ahead of the swept body: warn below"),
        "downstream_chords": _k("float", "c", default=5.0, minimum=0.0, doc="clearance behind it: warn below"),
        "lateral_chords": _k("float", "c", default=2.0, minimum=0.0, doc="clearance above and below: warn below"),
        "spanwise_chords": _k("float", "c", default=1.0, minimum=0.0, doc="clearance beyond the ends: warn below"),
        "gap_cells_warn": _k("float", "cells", default=4.0, minimum=0.0, doc="narrowest gap between bodies: warn below"),
        "gap_cells_min": _k("float", "cells", default=2.0, minimum=0.0, doc="narrowest gap between bodies: fail below"),
        "thin_fraction_max": _k("float", "-", default=0.10, minimum=0.0, maximum=1.0,
                                doc="area fraction thinner than two cells: fail above"),
        "condition_max": _k("float", "-", minimum=1.0, doc="stencil condition number: fail above (default: the stencil limit)"),
        "weight_bound_max": _k("float", "-", minimum=1.0, doc="stencil sum |w|: fail above (default: the stencil limit)"),
    },
    "sizing": {
        "upstream": _k("float", "c", default=0.25, minimum=0.0, doc="finest box margin ahead of the swept body"),
        "lateral": _k("float", "c", default=0.25, minimum=0.0, doc="finest box margin above, below and beyond the ends"),
        "wake": _k("float", "c", default=1.0, minimum=0.0, doc="finest box length behind the swept body"),
        "buffer_cells": _k("int", "cells", default=8, minimum=2, doc="cells of a level around the next finer box"),
        "target_spacing": _k("float", "m", minimum=0.0, strict=True,
                             doc="finest spacing wanted (default: from the resolution rules); at least chord / 100 000"),
    },
}

# Half-depth of the prism a 2-D section is extruded into, in chords.
_PRISM_HALF_DEPTH = 0.25

#: Tables that describe one body; with several bodies each ``[[bodies]]`` entry takes the
#: ``[body]`` keys and has its own ``motion`` table.
_BODY_TABLES = ("body", "motion")


def _suggest(name: str, options) -> str:
    close = difflib.get_close_matches(name, list(options), n=1, cutoff=0.6)
    return f"; did you mean {close[0]!r}?" if close else f"; allowed: {', '.join(sorted(options))}"


def _coerce(table: str, name: str, spec: _Key, value):
    where = f"[{table}] {name}"
    if spec.kind == "str":
        if not isinstance(value, str):
            raise InputError(f"{where} must be a string, got {value!r}")
        if spec.choices and value not in spec.choices:
            raise InputError(f"{where} must be one of {', '.join(map(repr, spec.choices))}, got {value!r}")
        return value
    if spec.kind == "bool":
        if not isinstance(value, bool):
            raise InputError(f"{where} must be true or false, got {value!r}")
        return value
    if spec.kind in ("float", "int"):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise InputError(f"{where} must be a number{f' in {spec.unit}' if spec.unit not in ('', '-') else ''}, got {value!r}")
        if spec.kind == "int":
            if isinstance(value, float) and not value.is_integer():
                raise InputError(f"{where} must be a whole number, got {value!r}")
            value = int(value)
        else:
            value = float(value)
            if not math.isfinite(value):
                raise InputError(f"{where} must be finite, got {value!r}")
        unit = f" {spec.unit}" if spec.unit not in ("", "-") else ""
        fix = f"; {spec.fix}" if spec.fix else ""
        if spec.minimum is not None:
            if spec.strict and not value > spec.minimum:
                raise InputError(f"{where} must be > {spec.minimum:g}{unit}, got {value!r}{fix}")
            if not spec.strict and value < spec.minimum:
                raise InputError(f"{where} must be >= {spec.minimum:g}{unit}, got {value!r}{fix}")
        if spec.maximum is not None and value > spec.maximum:
            raise InputError(f"{where} must be <= {spec.maximum:g}{unit}, got {value!r}{fix}")
        return value
    if spec.kind == "vec3":
        return _vec3(where, value)  # two components only in a 2-D case: see _points
    if spec.kind == "bounds":
        return _vec3(where, value)
    if spec.kind == "boxes":
        if not isinstance(value, list):
            raise InputError(f"{where} must be an array of tables [[grid.refine]] with lower and upper")
        boxes = []
        for i, box in enumerate(value):
            w = f"[[grid.refine]] box {i + 1}"
            if not isinstance(box, dict):
                raise InputError(f"{w} must be a table with lower and upper")
            extra = set(box) - {"lower", "upper"}
            if extra:
                bad = sorted(extra)[0]
                raise InputError(f"{w}: unknown key {bad!r}{_suggest(bad, ('lower', 'upper'))}")
            for key in ("lower", "upper"):
                if key not in box:
                    raise InputError(f"{w} needs {key} = [x, y, z] in metres")
            boxes.append((_vec3(f"{w} lower", box["lower"]), _vec3(f"{w} upper", box["upper"])))
        return tuple(boxes)
    raise AssertionError(spec.kind)  # pragma: no cover - the key table is ours


def _vec3(where: str, value, sizes=(2, 3)) -> tuple[float, ...]:
    if not isinstance(value, list) or len(value) not in sizes or any(
        isinstance(v, bool) or not isinstance(v, (int, float)) for v in value
    ):
        tail = " (or [x, y] for a 2-D case)" if 2 in sizes else ""
        raise InputError(f"{where} must be [x, y, z] in metres{tail}, got {value!r}")
    out = tuple(float(v) for v in value)
    if not all(math.isfinite(v) for v in out):
        raise InputError(f"{where} must be finite, got {value!r}")
    return out


def _read_table(label: str, given, keys: dict[str, _Key]) -> dict[str, Any]:
    """Validated values of one table: known keys only, types and ranges, defaults filled in."""
    if not isinstance(given, dict):
        raise InputError(f"[{label}] must be a table, got {given!r}")
    unknown = set(given) - set(keys)
    if unknown:
        bad = sorted(unknown)[0]
        raise InputError(f"[{label}] unknown key {bad!r}{_suggest(bad, keys)}")
    values = {}
    for name, spec in keys.items():
        if name in given:
            values[name] = _coerce(label, name, spec, given[name])
        elif spec.required:
            unit = f" ({spec.unit})" if spec.unit not in ("", "-") else ""
            raise InputError(f"[{label}] {name} is missing: give the {spec.doc}{unit}")
        else:
            values[name] = spec.default
    return values


def _read_tables(data: dict) -> tuple[dict[str, dict[str, Any]], list[tuple[dict, dict]]]:
    """The shared tables, and (body, motion) values for each body."""
    known = set(KEYS) | {"bodies"}
    unknown = set(data) - known
    if unknown:
        bad = sorted(unknown)[0]
        raise InputError(f"unknown table [{bad}]{_suggest(bad, known)}")
    out = {t: _read_table(t, data.get(t, {}), keys) for t, keys in KEYS.items() if t not in _BODY_TABLES}
    if "bodies" in data:
        if any(t in data for t in _BODY_TABLES):
            raise InputError("give either one [body] with its [motion], or [[bodies]] entries each with a "
                             "[bodies.motion] table, not both")
        entries = data["bodies"]
        if not isinstance(entries, list) or not entries:
            raise InputError("[[bodies]] must be an array of tables, one per body")
        bodies = []
        for i, entry in enumerate(entries, start=1):
            if not isinstance(entry, dict):
                raise InputError(f"[[bodies]] entry {i} must be a table")
            entry = dict(entry)
            motion = entry.pop("motion", None)
            label = f"[bodies] {i}"
            if motion is None:
                raise InputError(f"{label}: each body needs its own [bodies.motion] table")
            bodies.append((_read_table(f"bodies {i}", entry, KEYS["body"]),
                           _read_table(f"bodies {i} motion", motion, KEYS["motion"])))
        names = [b["name"] or f"body {i}" for i, (b, _) in enumerate(bodies, start=1)]
        if len(set(names)) != len(names):
            raise InputError(f"[[bodies]] names must differ, got {names}")
        for (b, _), name in zip(bodies, names):
            b["name"] = name
    else:
        bodies = [(_read_table("body", data.get("body", {}), KEYS["body"]),
                   _read_table("motion", data.get("motion", {}), KEYS["motion"]))]
        bodies[0][0]["name"] = bodies[0][0]["name"] or "body"
    return out, bodies


# --------------------------------------------------------------------------- specs
@dataclass(frozen=True)
class BodySpec:
    """What the body is: a NACA-section wing or a surface file (paths resolved, metres, radians)."""

    chord: float
    section: str | None = None
    surface: Path | None = None
    scale: float = 1.0
    span: float | None = None
    tips: str = "round"
    taper: float = 1.0
    sweep: float = 0.0
    twist: float = 0.0
    closed_te: bool = True
    centred: bool = False
    faces: int = 20000
    planar: bool = False
    offset: tuple = (0.0, 0.0, 0.0)


@dataclass(frozen=True)
class FlowSpec:
    """Free stream speed (m/s, along +x) and kinematic viscosity (m²/s)."""

    speed: float
    viscosity: float


@dataclass(frozen=True)
class TimeSpec:
    """Solver time step (s) and the number of cycles the run lasts."""

    step: float
    cycles: int = 1


@dataclass(frozen=True)
class CheckLimits:
    """Limits of the pre-flight checks; every value is overridable in ``[checks]``.

    Defaults and where they come from (see the README's check table):
    Courant number warn 0.5 / fail 1.0 (explicit schemes; CFL 1928, scheme-dependent);
    surface travel warn 0.5 / fail 1.0 cell per step (the one-cell-per-step rule of
    moving sharp-interface methods); cells per chord warn 64 / fail 32, cells across
    the Blasius thickness warn 10 / fail 5, across the Stokes layer warn 4 / fail 2,
    across the leading-edge radius warn 2 / fail 1 (common practice, no single
    source); domain clearances in chords warn below 2 upstream, 5 downstream,
    2 laterally, 1 spanwise (common practice, no single source); thin area fraction
    fail above 10 %; the narrowest gap between bodies warn below 4 cells, fail below 2
    (a gap under about two cells starves the stencils). ``condition_max`` and ``weight_bound_max`` default to the
    stencil builder's own limits (None here).
    """

    phases: int = 32
    all_steps: bool = False
    cfl_warn: float = 0.5
    cfl_max: float = 1.0
    travel_warn: float = 0.5
    travel_max: float = 1.0
    cells_per_chord_warn: float = 64.0
    cells_per_chord_min: float = 32.0
    le_radius_cells_warn: float = 2.0
    le_radius_cells_min: float = 1.0
    bl_cells_warn: float = 10.0
    bl_cells_min: float = 5.0
    stokes_cells_warn: float = 4.0
    stokes_cells_min: float = 2.0
    upstream_chords: float = 2.0
    downstream_chords: float = 5.0
    lateral_chords: float = 2.0
    spanwise_chords: float = 1.0
    thin_fraction_max: float = 0.10
    gap_cells_warn: float = 4.0
    gap_cells_min: float = 2.0
    condition_max: float | None = None
    weight_bound_max: float | None = None

    def __post_init__(self) -> None:
        for warn, fail, sense in (
            ("cfl_warn", "cfl_max", "above"),
            ("travel_warn", "travel_max", "above"),
            ("cells_per_chord_warn", "cells_per_chord_min", "below"),
            ("le_radius_cells_warn", "le_radius_cells_min", "below"),
            ("bl_cells_warn", "bl_cells_min", "below"),
            ("stokes_cells_warn", "stokes_cells_min", "below"),
            ("gap_cells_warn", "gap_cells_min", "below"),
        ):
            w, f = getattr(self, warn), getattr(self, fail)
            if (sense == "above" and w > f) or (sense == "below" and w < f):
                raise InputError(
                    f"[checks] {warn} ({w:g}) must not be {'above' if sense == 'above' else 'below'} "
                    f"{fail} ({f:g}): the warning comes before the failure"
                )


@dataclass(frozen=True)
class SizingSpec:
    """Margins of the finest refinement box around the swept body, in chords, and level buffers.

    upstream, lateral, wake : float — chords; ahead of, around (y and z) and behind
        the swept envelope. buffer_cells : int — cells of each coarser level around
        the next finer box. target_spacing : float or None — metres; the finest
        spacing wanted (None: from the resolution rules).
    """

    upstream: float = 0.25
    lateral: float = 0.25
    wake: float = 1.0
    buffer_cells: int = 8
    target_spacing: float | None = None


@dataclass(frozen=True)
class Case:
    """A validated case: body, motion, flow, grid, time step, check limits and sizing margins.

    Build it with :func:`load_case` (from a file) or :func:`parse_case` (from a
    TOML string or dict). ``motion`` is a :class:`~ibprep.Motion`, ``grid`` a
    :class:`~ibprep.NestedGrid`.
    """

    title: str
    body: BodySpec
    motion: Any
    flow: FlowSpec
    grid: NestedGrid
    time: TimeSpec
    checks: CheckLimits = field(default_factory=CheckLimits)
    sizing: SizingSpec = field(default_factory=SizingSpec)
    path: Path | None = None
    bodies: tuple = ()
    files: tuple = ()

    @property
    def inputs(self) -> tuple:
        """Every file the case reads: the case file itself (when loaded from one), surfaces and tables."""
        return ((self.path,) if self.path is not None else ()) + tuple(self.files)

    @property
    def chord(self) -> float:
        """Reference chord, metres."""
        return self.body.chord

    @property
    def steps_per_cycle(self) -> int:
        """Solver steps in one period (rounded to the nearest whole step)."""
        return max(1, int(round(self.motion.period / self.time.step)))

    @property
    def ndim(self) -> int:
        """2 for a section in a 2-D grid, 3 otherwise."""
        return self.grid.base.ndim

    @property
    def surface(self):
        """The first body's surface, placed (a watertight ``trimesh.Trimesh``); see :class:`BodyCase`."""
        return self.bodies[0].surface

    @property
    def section(self):
        """The first body's NACA section, or None for a surface file."""
        return self.bodies[0].section

    @property
    def te_point(self) -> tuple[float, float, float]:
        """A trailing-edge point of the first body, placed frame, metres."""
        return self.bodies[0].te_point

    @property
    def surfaces(self) -> tuple:
        """Every body's placed surface."""
        return tuple(b.surface for b in self.bodies)

    @property
    def motions(self) -> tuple:
        """Every body's motion (pivots in the placed frame)."""
        return tuple(b.motion for b in self.bodies)

    def world_surface(self, t: float) -> tuple[np.ndarray, np.ndarray]:
        """All bodies at time ``t`` as one surface: vertices (n, 3) float, metres, world frame; faces (m, 3) int."""
        from ..geometry.triangles import transform_points

        verts, faces, offset = [], [], 0
        for b in self.bodies:
            mesh = b.surface
            verts.append(transform_points(b.motion.pose(float(t)), mesh.vertices))
            faces.append(np.asarray(mesh.faces) + offset)
            offset += len(mesh.vertices)
        return np.vstack(verts), np.vstack(faces)


@dataclass(frozen=True)
class BodyCase:
    """One body of a case: its name, what it is, and how it moves.

    The body frame is *placed*: the body's own frame (chord along +x from the leading
    edge at the origin) moved by ``spec.offset``; the motion's pivot and stroke root
    are moved with it, so ``motion.pose(t)`` maps placed points to the world.
    """

    name: str
    spec: BodySpec
    motion: Any

    @property
    def chord(self) -> float:
        """Reference chord, metres."""
        return self.spec.chord

    @cached_property
    def surface(self):
        """The body surface in the placed frame (a watertight ``trimesh.Trimesh``), built once.

        In a 2-D case the section (scaled by the chord) is extruded along z into a
        prism symmetric about z = 0, whose cut by the plane z = 0 is the section:
        rigid motion in the x–y plane keeps it so. The prism is half a chord deep.
        """
        mesh = self._body_frame_surface()
        if any(self.spec.offset):
            mesh = mesh.copy()
            mesh.vertices = np.asarray(mesh.vertices) + np.asarray(self.spec.offset)
        return mesh

    def _body_frame_surface(self):
        from ..geometry import load_surface, make_wing, naca4

        b = self.spec
        if b.surface is not None:
            return load_surface(b.surface, scale=b.scale)
        if b.planar:
            from ..geometry.surface import mesh_from_arrays
            from ..geometry.triangles import extrude_loops

            sec = naca4(b.section, closed_te=b.closed_te)
            loop = np.column_stack([np.asarray(sec.x), np.asarray(sec.y)]) * b.chord
            # Half a chord deep: caps far from z = 0 for every stencil and closest-point
            # query near the section, yet a small surface for the thickness markers.
            return mesh_from_arrays(*extrude_loops([loop], half_depth=_PRISM_HALF_DEPTH * b.chord))
        sec = naca4(b.section, closed_te=b.closed_te)
        return make_wing(sec, b.chord, b.span, taper=b.taper, sweep=b.sweep, twist=b.twist,
                         tips=b.tips, centred=b.centred, faces=b.faces)

    @cached_property
    def section(self):
        """The NACA section of a generated body, or None for a surface file."""
        from ..geometry import naca4

        return naca4(self.spec.section, closed_te=self.spec.closed_te) if self.spec.section else None

    @property
    def te_point(self) -> tuple[float, float, float]:
        """A trailing-edge point, placed frame, metres.

        For a generated wing, the trailing edge of the section at mid-span, placed
        as make_wing places its straight part (chord tapered, leading edge swept,
        section twisted about its quarter chord; between two spanwise stations of
        a twisted wing the facets lie within about (twist step)^2 chord of that
        shape); where mid-span falls on a rounded end (a span shorter than the
        ends' bulge), the trailing edge of the nearest end of the straight part.
        For a 2-D section, its trailing edge; for a surface file, the vertex
        furthest along +x.
        """
        b = self.spec
        if b.section is None:
            v = np.asarray(self.surface.vertices)
            i = int(np.argmax(v[:, 0]))
            return tuple(float(c) for c in v[i])
        if b.planar:
            return tuple(float(c) for c in np.array([b.chord, 0.0, 0.0]) + np.asarray(b.offset))
        layout = self.surface.metadata.get("wing") or self._body_frame_surface().metadata["wing"]
        z = 0.0 if b.centred else 0.5 * float(b.span)
        z = min(max(z, layout.z_root), layout.z_tip)
        length = layout.z_tip - layout.z_root
        frac = (z - layout.z_root) / length if length > 0 else 0.0
        chord = b.chord * (1.0 + (b.taper - 1.0) * frac)
        x_le = (z - layout.z_root) * math.tan(b.sweep)
        pitch = b.twist * frac
        te = np.array([x_le + 0.25 * chord + 0.75 * chord * math.cos(pitch), -0.75 * chord * math.sin(pitch), z])
        return tuple(float(c) for c in te + np.asarray(b.offset))


def _resolve(path: str, base: Path | None, where: str) -> Path:
    p = Path(path)
    if not p.is_absolute() and base is not None:
        p = base / p
    if not p.is_file():
        raise InputError(f"{where}: file {str(p)!r} not found; the path is relative to the case file")
    return p


def _body_spec(b: dict, planar: bool, base: Path | None, label: str) -> BodySpec:
    if planar:
        if b["surface"] is not None:
            raise InputError(f"[{label}] surface: a 2-D case (two-component [grid] bounds) takes a NACA section, not a file")
        if b["span"] is not None:
            raise InputError(f"[{label}] span has no meaning in a 2-D case (two-component [grid] bounds); remove it")
    if (b["section"] is None) == (b["surface"] is None):
        raise InputError(f"[{label}] give exactly one of section (a NACA code) or surface (a file)")
    surface = None
    if b["surface"] is not None:
        surface = _resolve(b["surface"], base, f"[{label}] surface")
        ignored = sorted(b.get("_given", frozenset()) & set(_WING_KEYS))
        if ignored:
            raise InputError(f"[{label}] {ignored[0]} describes a wing built from a section; with surface = "
                             f"... the file is the body: remove {', '.join(ignored)}")
    else:
        if b["span"] is None and not planar:
            raise InputError(f"[{label}] span is missing: a wing built from a section needs its span in metres")
        from ..geometry import naca4

        try:
            naca4(b["section"])  # validate the code now, naming the key on failure
        except InputError as exc:
            raise InputError(f"[{label}] section: {exc}") from None
    return BodySpec(
        chord=b["chord"], section=b["section"], surface=surface, scale=b["scale"], span=b["span"],
        tips=b["tips"], taper=b["taper"], sweep=math.radians(b["sweep_deg"]), twist=math.radians(b["twist_deg"]),
        closed_te=b["closed_te"], centred=b["centred"], faces=b["faces"], planar=planar, offset=b["offset"],
    )


def _motion(m: dict, offset, planar: bool, base: Path | None, label: str):
    """The body's Motion, with pivot and stroke root moved by the body's offset (the placed frame)."""
    from ..motion.kinematics import Motion, SmoothSquareWave, load_waveform_table

    if m["pitch_amplitude_deg"] >= 90.0:
        raise InputError(f"[{label}] pitch_amplitude_deg must be below 90, got {m['pitch_amplitude_deg']!r}")
    if planar and m["roll_amplitude_deg"] != 0.0:
        raise InputError(f"[{label}] roll_amplitude_deg: a flapping stroke leaves the plane; a 2-D case cannot have one")
    o = np.asarray(offset, dtype=float)
    pivot = tuple(float(v) for v in np.asarray(m["pivot"]) + o)
    roll = dict(roll_amplitude=math.radians(m["roll_amplitude_deg"]), roll_phase=math.radians(m["roll_phase_deg"]),
                roll_root=tuple(float(v) for v in np.asarray(m["roll_root"]) + o))
    if m["table"] is not None:
        table = load_waveform_table(_resolve(m["table"], base, f"[{label}] table"))
        return Motion.from_table(table, pivot=pivot, **roll)
    return Motion(
        frequency=m["frequency"], plunge_amplitude=m["plunge_amplitude"],
        pitch_amplitude=math.radians(m["pitch_amplitude_deg"]), phase=math.radians(m["phase_deg"]),
        pivot=pivot, plunge_waveform=SmoothSquareWave(m["plunge_sharpness"]),
        pitch_waveform=SmoothSquareWave(m["pitch_sharpness"]), **roll,
    )


#: Sizes a case may ask for, relative to its chord or absolute; past them the case is bad input
#: (refused before anything is built or allocated). Documented in the README's case-file section.
SCALE_LIMITS = {
    "span_chords": (0.01, 1000.0),  # a wing's span, in chords
    "length_chords": 1000.0,  # plunge amplitude, |pivot|, |roll_root|, |offset| components, in chords
    "steps_per_cycle": 10**8,  # solver steps in one period
    "target_spacing_chords": 1e-5,  # the finest spacing [sizing] may ask for, in chords
}


# [body] keys that shape a wing built from a section: refused beside surface = "...".
_WING_KEYS = ("span", "tips", "taper", "sweep_deg", "twist_deg", "closed_te", "centred", "faces")

# [motion] keys that a waveform table replaces: giving them beside table is refused, not ignored.
_TABLE_REPLACES = ("plunge_amplitude", "pitch_amplitude_deg", "phase_deg", "plunge_sharpness", "pitch_sharpness")


def _given_keys(bodies_in: list, data: dict) -> list[tuple[set, set]]:
    """The keys each body's [body] and [motion] tables actually give (defaults not counted)."""
    if "bodies" in data:
        return [(set(e) - {"motion"}, set(e.get("motion", {}))) for e in data["bodies"]]
    return [(set(data.get("body", {})), set(data.get("motion", {})))]


def _check_combinations(bodies_in: list, given: list, planar: bool, several: bool) -> None:
    """Keys that mean nothing beside others are refused, so that nothing is silently ignored."""
    for i, ((b, m), (gb, gm)) in enumerate(zip(bodies_in, given), start=1):
        blabel, mlabel = (f"bodies {i}", f"bodies {i} motion") if several else ("body", "motion")
        b["_given"] = frozenset(gb)  # for _body_spec, once the surface file is found
        if m["table"] is not None:
            replaced = sorted(gm & set(_TABLE_REPLACES))
            if replaced:
                raise InputError(f"[{mlabel}] {replaced[0]}: the table gives h and theta over the period, so "
                                 f"{', '.join(replaced)} would be ignored; remove them or the table")
        elif m["frequency"] is None:
            raise InputError(f"[{mlabel}] frequency is missing: give the oscillation frequency (Hz), or a table")
        for label, key, table in ((blabel, "offset", b), (mlabel, "pivot", m), (mlabel, "roll_root", m)):
            if len(table[key]) == 2:
                if not planar:
                    raise InputError(f"[{label}] {key} must be [x, y, z] in metres in a 3-D case, got "
                                     f"{list(table[key])!r}")
                table[key] = (*table[key], 0.0)  # a point of the x-y plane


def _check_scales(tables: dict, bodies_in: list, several: bool) -> None:
    """Refuse sizes that no real case has and that would overflow or exhaust memory later."""
    lo_span, hi_span = SCALE_LIMITS["span_chords"]
    far = SCALE_LIMITS["length_chords"]
    for i, (b, m) in enumerate(bodies_in, start=1):
        blabel, mlabel = (f"bodies {i}", f"bodies {i} motion") if several else ("body", "motion")
        c = b["chord"]
        if b["span"] is not None and not lo_span * c <= b["span"] <= hi_span * c:
            raise InputError(f"[{blabel}] span ({b['span']!r} m) must be between {lo_span:g} and {hi_span:g} chords "
                             f"({lo_span * c:.6g} to {hi_span * c:.6g} m); check its units")
        lengths = [(blabel, "offset", b["offset"]), (mlabel, "pivot", m["pivot"]), (mlabel, "roll_root", m["roll_root"]),
                   (mlabel, "plunge_amplitude", (m["plunge_amplitude"],))]
        for label, key, vec in lengths:
            if any(abs(v) > far * c for v in vec):
                raise InputError(f"[{label}] {key} ({list(vec) if len(vec) > 1 else vec[0]!r} m) is more than "
                                 f"{far:g} chords ({far * c:.6g} m) from the body; check its units")
    target = tables["sizing"]["target_spacing"]
    if target is not None:
        c_min = min(b["chord"] for b, _ in bodies_in)
        if target < SCALE_LIMITS["target_spacing_chords"] * c_min:
            raise InputError(f"[sizing] target_spacing ({target!r} m) is finer than chord / "
                             f"{1 / SCALE_LIMITS['target_spacing_chords']:.0f} ({SCALE_LIMITS['target_spacing_chords'] * c_min:.3g} m); "
                             "check its units")


def _check_steps(step: float, bodies: list, several: bool) -> None:
    """Refuse a step longer than a period, or so short that one period has more steps than the cap."""
    cap = SCALE_LIMITS["steps_per_cycle"]
    for i, body in enumerate(bodies, start=1):
        mlabel = f"bodies {i} motion" if several else "motion"
        period = body.motion.period
        steps = period / step
        if not steps >= 1.0:
            raise InputError(f"[time] step ({step!r} s) is longer than one period of the motion "
                             f"({period:.6g} s, from [{mlabel}]); a step must be a small fraction of the period")
        if not steps <= cap:
            raise InputError(f"[time] step ({step!r} s) gives {steps:.3g} steps per period ({period:.6g} s, from "
                             f"[{mlabel}]), more than the {cap:.0e} allowed; check the units of step and frequency")


def _build(tables: dict[str, dict[str, Any]], bodies_in: list, base: Path | None) -> Case:
    planar = len(tables["grid"]["lower"]) == 2
    _check_scales(tables, bodies_in, len(bodies_in) > 1)
    several = len(bodies_in) > 1
    bodies = []
    for i, (b, m) in enumerate(bodies_in, start=1):
        blabel, mlabel = (f"bodies {i}", f"bodies {i} motion") if several else ("body", "motion")
        spec = _body_spec(b, planar, base, blabel)
        bodies.append(BodyCase(name=b["name"], spec=spec, motion=_motion(m, spec.offset, planar, base, mlabel)))
    _check_table_frequency(bodies, bodies_in, several)
    _check_steps(tables["time"]["step"], bodies, several)
    periods = [bc.motion.period for bc in bodies]
    if several and not np.allclose(periods, periods[0], rtol=1e-9):
        raise InputError(f"[[bodies]] motions must share one period (frequency), got periods {periods} s")

    f = tables["flow"]
    flow = FlowSpec(speed=f["speed"], viscosity=f["viscosity"])

    g = tables["grid"]
    try:
        base_grid = Grid(lower=g["lower"], upper=g["upper"], spacing=g["spacing"])
        nested = refine(base_grid, g["refine"])
    except InputError as exc:
        raise InputError(f"[grid] {exc}") from None

    t = tables["time"]
    time = TimeSpec(step=t["step"], cycles=t["cycles"])
    checks = CheckLimits(**tables["checks"])
    sizing = SizingSpec(**tables["sizing"])
    files = [b.spec.surface for b in bodies if b.spec.surface is not None]
    files += [_resolve(m["table"], base, "table") for _, m in bodies_in if m["table"] is not None]
    return Case(title=tables["case"]["title"], body=bodies[0].spec, motion=bodies[0].motion, flow=flow,
                grid=nested, time=time, checks=checks, sizing=sizing, path=None, bodies=tuple(bodies),
                files=tuple(files))


def _check_table_frequency(bodies: list, bodies_in: list, several: bool) -> None:
    """A frequency given beside a table must agree with the table's period (else: which one wins?)."""
    for i, (body, (_, m)) in enumerate(zip(bodies, bodies_in), start=1):
        if m["table"] is not None and m["frequency"] is not None:
            f_table = 1.0 / body.motion.period
            if not math.isclose(m["frequency"], f_table, rel_tol=1e-9):
                mlabel = f"bodies {i} motion" if several else "motion"
                raise InputError(f"[{mlabel}] frequency ({m['frequency']!r} Hz) differs from the table's "
                                 f"({f_table!r} Hz, one over its period); remove frequency or make them agree")


def parse_case(source, *, base: str | Path | None = None) -> Case:
    """A :class:`Case` from TOML text or an already parsed dict.

    Parameters
    ----------
    source : str or dict — the case file's text, or its parsed tables.
    base : path, optional — folder that relative file paths in the case refer to.

    Raises
    ------
    InputError
        Malformed TOML, unknown tables or keys, wrong types, non-finite or
        out-of-range values, missing files — each naming the key.
    """
    if isinstance(source, str):
        if "\x00" in source:
            raise InputError("the case file holds NUL bytes: it is a binary file, not TOML text")
        try:
            data = tomllib.loads(source)
        except tomllib.TOMLDecodeError as exc:
            raise InputError(f"the case file is not valid TOML: {exc}") from None
        except RecursionError:
            raise InputError("the case file nests arrays or tables too deeply to be a case file; "
                             "a case needs at most a few levels") from None
    elif isinstance(source, dict):
        data = source
    else:
        raise InputError(f"a case is TOML text or a dict, got {type(source).__name__}")
    tables, bodies = _read_tables(data)
    planar = len(tables["grid"]["lower"]) == 2
    _check_combinations(bodies, _given_keys(bodies, data), planar, len(bodies) > 1)
    return _build(tables, bodies, Path(base) if base is not None else None)


def load_case(path) -> Case:
    """Read and validate a case file.

    Parameters
    ----------
    path : str or Path — the TOML case file; relative paths inside it refer to its folder.

    Returns
    -------
    Case

    Raises
    ------
    InputError
        A missing or unreadable file, or any problem :func:`parse_case` finds,
        with the file named.
    """
    p = Path(path)
    if p.is_dir():
        raise InputError(f"case file {str(p)!r} is a folder; give the TOML file inside it")
    if not p.is_file():
        raise InputError(f"case file {str(p)!r} not found")
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read case file {str(p)!r}: {exc.strerror or exc}") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError(f"case file {str(p)!r} is not UTF-8 text (byte {exc.start + 1}, line {line}); "
                         "save it as UTF-8") from None
    try:
        case = parse_case(text, base=p.parent)
    except InputError as exc:
        raise InputError(f"{p.name}: {exc}") from None
    object.__setattr__(case, "path", p)
    return case
