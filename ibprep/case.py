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

from .errors import InputError
from .grid import Grid, NestedGrid, refine

__all__ = ["Case", "BodySpec", "FlowSpec", "TimeSpec", "CheckLimits", "SizingSpec", "KEYS", "load_case", "parse_case"]


# --------------------------------------------------------------------------- key table
@dataclass(frozen=True)
class _Key:
    kind: str  # "float", "int", "bool", "str", "vec3", "boxes"
    unit: str = ""
    required: bool = False
    default: Any = None
    minimum: float | None = None  # inclusive unless strict
    strict: bool = False
    maximum: float | None = None
    choices: tuple[str, ...] | None = None
    doc: str = ""


def _k(kind, unit="", **kw) -> _Key:
    return _Key(kind, unit, **kw)


#: Every key of the case file, by table: kind, unit, default and a line of documentation.
KEYS: dict[str, dict[str, _Key]] = {
    "case": {
        "title": _k("str", default="", doc="a name for the case, shown in reports"),
    },
    "body": {
        "section": _k("str", doc='NACA 4-digit code, e.g. "0015"; or give surface'),
        "surface": _k("str", doc="path of a closed STL/OBJ/PLY body, relative to the case file"),
        "scale": _k("float", "-", default=1.0, minimum=0.0, strict=True, doc="factor applied to surface coordinates"),
        "chord": _k("float", "m", required=True, minimum=0.0, strict=True, doc="reference (root) chord"),
        "span": _k("float", "m", minimum=0.0, strict=True, doc="tip-to-tip span of a wing built from section"),
        "tips": _k("str", default="round", choices=("flat", "round"), doc="how the wing ends are closed"),
        "taper": _k("float", "-", default=1.0, minimum=0.0, strict=True, doc="tip chord / root chord"),
        "sweep_deg": _k("float", "deg", default=0.0, minimum=-75.0, maximum=75.0, doc="leading-edge sweep"),
        "twist_deg": _k("float", "deg", default=0.0, minimum=-60.0, maximum=60.0, doc="tip incidence relative to root"),
        "closed_te": _k("bool", default=True, doc="closed (sharp) trailing edge of the NACA section"),
        "centred": _k("bool", default=False, doc="mid-span at z = 0 instead of the root"),
        "faces": _k("int", default=20000, minimum=200, doc="approximate triangle count of a generated wing"),
    },
    "motion": {
        "frequency": _k("float", "Hz", required=True, minimum=0.0, strict=True, doc="oscillation frequency"),
        "plunge_amplitude": _k("float", "m", default=0.0, minimum=0.0, doc="plunge amplitude along y"),
        "pitch_amplitude_deg": _k("float", "deg", default=0.0, minimum=0.0, maximum=90.0, strict=False,
                                  doc="pitch amplitude about the span axis, nose-up positive"),
        "phase_deg": _k("float", "deg", default=90.0, doc="phase by which pitch leads plunge"),
        "pivot": _k("vec3", "m", default=(0.0, 0.0, 0.0), doc="pitch axis point, body frame"),
        "plunge_sharpness": _k("float", "-", default=0.0, minimum=0.0,
                               doc="0 = sine; larger = flatter, near-square plunge"),
        "pitch_sharpness": _k("float", "-", default=0.0, minimum=0.0,
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
        "cycles": _k("int", "-", default=1, minimum=1, doc="cycles the run will last"),
    },
    "checks": {
        "phases": _k("int", "-", default=32, minimum=4, doc="sampled phases per cycle (plus peak-speed instants)"),
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
                             doc="finest spacing wanted (default: from the resolution rules)"),
    },
}

# Half-depth of the prism a 2-D section is extruded into, in chords.
_PRISM_HALF_DEPTH = 0.25

_RESERVED_TABLES = {"bodies": "several bodies in one case are not supported yet; describe one body under [body]"}


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
        if spec.minimum is not None:
            if spec.strict and not value > spec.minimum:
                raise InputError(f"{where} must be > {spec.minimum:g}{unit}, got {value!r}")
            if not spec.strict and value < spec.minimum:
                raise InputError(f"{where} must be >= {spec.minimum:g}{unit}, got {value!r}")
        if spec.maximum is not None and value > spec.maximum:
            raise InputError(f"{where} must be <= {spec.maximum:g}{unit}, got {value!r}")
        return value
    if spec.kind == "vec3":
        return _vec3(where, value, sizes=(3,))
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


def _read_tables(data: dict) -> dict[str, dict[str, Any]]:
    for name, why in _RESERVED_TABLES.items():
        if name in data:
            raise InputError(f"[[{name}]]: {why}")
    unknown = set(data) - set(KEYS)
    if unknown:
        bad = sorted(unknown)[0]
        raise InputError(f"unknown table [{bad}]{_suggest(bad, KEYS)}")
    out: dict[str, dict[str, Any]] = {}
    for table, keys in KEYS.items():
        given = data.get(table, {})
        if not isinstance(given, dict):
            raise InputError(f"[{table}] must be a table, got {given!r}")
        unknown = set(given) - set(keys)
        if unknown:
            bad = sorted(unknown)[0]
            raise InputError(f"[{table}] unknown key {bad!r}{_suggest(bad, keys)}")
        values = {}
        for name, spec in keys.items():
            if name in given:
                values[name] = _coerce(table, name, spec, given[name])
            elif spec.required:
                unit = f" ({spec.unit})" if spec.unit not in ("", "-") else ""
                raise InputError(f"[{table}] {name} is missing: give the {spec.doc}{unit}")
            else:
                values[name] = spec.default
        out[table] = values
    return out


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
    fail above 10 %. ``condition_max`` and ``weight_bound_max`` default to the
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

    @cached_property
    def surface(self):
        """The body surface in the body frame (a watertight ``trimesh.Trimesh``), built once.

        In a 2-D case the section (scaled by the chord) is extruded along z into a
        prism symmetric about z = 0, whose cut by the plane z = 0 is the section:
        rigid motion in the x–y plane keeps it so. The prism is half a chord deep.
        """
        from .geometry import load_surface, make_wing, naca4

        b = self.body
        if b.surface is not None:
            return load_surface(b.surface, scale=b.scale)
        if b.planar:
            from .geometry.surface import mesh_from_arrays
            from .triangles import extrude_loops

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
        """The NACA section of a generated wing, or None for a surface file."""
        from .geometry import naca4

        return naca4(self.body.section, closed_te=self.body.closed_te) if self.body.section else None

    @property
    def te_point(self) -> tuple[float, float, float]:
        """A trailing-edge point in the body frame (mid-span of a generated wing), metres."""
        b = self.body
        if b.section is None:
            v = np.asarray(self.surface.vertices)
            i = int(np.argmax(v[:, 0]))
            return tuple(float(c) for c in v[i])
        z = 0.0 if (b.centred or b.planar) else 0.5 * (b.span or 0.0)
        return (b.chord, 0.0, z)


def _build(tables: dict[str, dict[str, Any]], base: Path | None) -> Case:
    from .kinematics import Motion, SmoothSquareWave, load_waveform_table

    b = tables["body"]
    planar = len(tables["grid"]["lower"]) == 2
    if planar:
        if b["surface"] is not None:
            raise InputError("[body] surface: a 2-D case (two-component [grid] bounds) takes a NACA section, not a file")
        if b["span"] is not None:
            raise InputError("[body] span has no meaning in a 2-D case (two-component [grid] bounds); remove it")
        m = tables["motion"]
        if m["roll_amplitude_deg"] != 0.0:
            raise InputError("[motion] roll_amplitude_deg: a flapping stroke leaves the plane; a 2-D case cannot have one")
    if (b["section"] is None) == (b["surface"] is None):
        raise InputError("[body] give exactly one of section (a NACA code) or surface (a file)")
    surface = None
    if b["surface"] is not None:
        surface = Path(b["surface"])
        if not surface.is_absolute() and base is not None:
            surface = base / surface
        if not surface.is_file():
            raise InputError(f"[body] surface: file {str(surface)!r} not found; the path is relative to the case file")
    else:
        if b["span"] is None and not planar:
            raise InputError("[body] span is missing: a wing built from a section needs its span in metres")
        from .geometry import naca4

        naca4(b["section"])  # validate the code now, naming the key on failure
    body = BodySpec(
        chord=b["chord"], section=b["section"], surface=surface, scale=b["scale"], span=b["span"],
        tips=b["tips"], taper=b["taper"], sweep=math.radians(b["sweep_deg"]), twist=math.radians(b["twist_deg"]),
        closed_te=b["closed_te"], centred=b["centred"], faces=b["faces"], planar=planar,
    )

    m = tables["motion"]
    if m["pitch_amplitude_deg"] >= 90.0:
        raise InputError(f"[motion] pitch_amplitude_deg must be below 90, got {m['pitch_amplitude_deg']!r}")
    roll = dict(roll_amplitude=math.radians(m["roll_amplitude_deg"]), roll_phase=math.radians(m["roll_phase_deg"]),
                roll_root=m["roll_root"])
    if m["table"] is not None:
        table_path = Path(m["table"])
        if not table_path.is_absolute() and base is not None:
            table_path = base / table_path
        if not table_path.is_file():
            raise InputError(f"[motion] table: file {str(table_path)!r} not found; the path is relative to the case file")
        motion = Motion.from_table(load_waveform_table(table_path), pivot=m["pivot"], **roll)
    else:
        motion = Motion(
            frequency=m["frequency"], plunge_amplitude=m["plunge_amplitude"],
            pitch_amplitude=math.radians(m["pitch_amplitude_deg"]), phase=math.radians(m["phase_deg"]),
            pivot=m["pivot"], plunge_waveform=SmoothSquareWave(m["plunge_sharpness"]),
            pitch_waveform=SmoothSquareWave(m["pitch_sharpness"]), **roll,
        )

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
    return Case(title=tables["case"]["title"], body=body, motion=motion, flow=flow, grid=nested, time=time,
                checks=checks, sizing=sizing, path=None)


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
        try:
            data = tomllib.loads(source)
        except tomllib.TOMLDecodeError as exc:
            raise InputError(f"the case file is not valid TOML: {exc}") from None
    elif isinstance(source, dict):
        data = source
    else:
        raise InputError(f"a case is TOML text or a dict, got {type(source).__name__}")
    tables = _read_tables(data)
    return _build(tables, Path(base) if base is not None else None)


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
    if not p.is_file():
        raise InputError(f"case file {str(p)!r} not found")
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read case file {str(p)!r}: {exc}") from None
    try:
        case = parse_case(text, base=p.parent)
    except InputError as exc:
        raise InputError(f"{p.name}: {exc}") from None
    object.__setattr__(case, "path", p)
    return case
