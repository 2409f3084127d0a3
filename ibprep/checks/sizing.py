"""Swept envelope of a moving body, the resolution it needs, and refinement boxes to hold it.

The envelope is the union, over one cycle, of the body's world bounding boxes,
sampled densely enough that no point of the body moves more than a fraction of
a cell between samples. The refinement boxes proposed for it are nested: the
finest wraps the envelope with margins ahead, around and behind (the near wake);
each coarser level wraps the next finer with a buffer of its own cells.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..grid import Grid, NestedGrid, refine
from ..geometry.triangles import as_triangles

__all__ = [
    "Envelope",
    "ResolutionLengths",
    "SizingResult",
    "swept_envelope",
    "resolution_lengths",
    "required_spacing",
    "propose_boxes",
    "demanding_lengths",
    "CaseSizing",
    "size_case",
]

# Samples are placed so that the fastest body point moves at most this many cells
# between two of them; the envelope is then padded by the same length.
_SAMPLE_TRAVEL_CELLS = 0.5
# At least this many samples per period, whatever the speed.
_MIN_SAMPLES = 64
# Blasius: delta99 = 4.91 x / sqrt(Re_x) (Schlichting & Gersten, Boundary-Layer Theory,
# flat-plate chapter [memory: high]; 4.9100 re-derived by shooting [computed], REFERENCES §4.1).
BLASIUS_DELTA99 = 4.91


@dataclass(frozen=True)
class Envelope:
    """World-frame bounding boxes of the body over one cycle.

    Attributes
    ----------
    lower, upper : (3,) float — metres; union of all sampled boxes, padded by the
        largest travel between samples.
    times : (n,) float — seconds; sample instants over one period.
    box_lower, box_upper : (n, 3) float — metres; the body's box at each sample.
    max_speed : float — m/s; largest sampled speed of a body point (grid frame).
    """

    lower: np.ndarray
    upper: np.ndarray
    times: np.ndarray
    box_lower: np.ndarray
    box_upper: np.ndarray
    max_speed: float


# The most samples of one period swept_envelope takes (each sample is two boxes: 48 bytes,
# plus one block of transformed hull points at a time). A body that needs more travels
# millions of cells per period: the case's units are wrong.
_MAX_SAMPLES = 10**6


def _hull_points(vertices: np.ndarray) -> np.ndarray:
    """Vertices of the convex hull (the extreme points of every rigid pose of the body)."""
    from scipy.spatial import ConvexHull, QhullError

    try:
        return vertices[ConvexHull(vertices).vertices]
    except (QhullError, ValueError):
        return vertices


def swept_envelope(surface, motion, spacing: float) -> Envelope:
    """Bounding boxes of one or several rigidly moving bodies over one period.

    Parameters
    ----------
    surface : trimesh.Trimesh or (vertices, faces), or a sequence of them — each body
        in its own (placed) body frame, metres.
    motion : Motion, or a sequence of them (one per body, sharing one period).
    spacing : float — metres; the finest cell size that matters: samples are close
        enough that no point moves more than half of it between two of them.

    Returns
    -------
    Envelope — of all bodies together.
    """
    if not (isinstance(spacing, (int, float)) and math.isfinite(spacing) and spacing > 0):
        raise InputError(f"spacing must be a positive length in metres, got {spacing!r}")
    surfaces, motions = _as_bodies(surface, motion)
    hulls = [_hull_points(as_triangles(s)[0]) for s in surfaces]
    period = max(m.period for m in motions)
    probe = np.linspace(0.0, period, 257)[:-1]
    speed = max(float(np.linalg.norm(m.velocity(h, probe), axis=-1).max()) for h, m in zip(hulls, motions))
    # The sampled maximum can miss the true one slightly; 10 % headroom.
    n_float = 1.1 * speed * period / (_SAMPLE_TRAVEL_CELLS * spacing)
    if not n_float <= _MAX_SAMPLES:  # also inf and nan, before any allocation
        raise InputError(
            f"the body travels {speed * period:.3g} m per period ({period:.6g} s), which needs {n_float:.3g} samples "
            f"of the swept envelope at spacing {spacing:.6g} m, more than the {_MAX_SAMPLES:.0e} allowed; "
            "check the units of the motion's amplitudes, frequency and pivot, and of the spacing"
        )
    n = max(_MIN_SAMPLES, int(math.ceil(n_float)))
    times = np.linspace(0.0, period, n, endpoint=False)
    lo = np.full((n, 3), np.inf)
    hi = np.full((n, 3), -np.inf)
    for hull, m in zip(hulls, motions):
        block = max(1, 2_000_000 // max(1, len(hull)))
        for s in range(0, n, block):
            pts = m.transform(hull, times[s : s + block])
            lo[s : s + block] = np.minimum(lo[s : s + block], pts.min(axis=1))
            hi[s : s + block] = np.maximum(hi[s : s + block], pts.max(axis=1))
    pad = 1.1 * speed * period / n
    return Envelope(lower=lo.min(axis=0) - pad, upper=hi.max(axis=0) + pad, times=times,
                    box_lower=lo, box_upper=hi, max_speed=speed)


def _as_bodies(surface, motion):
    """(surfaces, motions) lists from one body or parallel sequences of them."""
    if isinstance(motion, (list, tuple)):
        surfaces, motions = list(surface), list(motion)
        if len(surfaces) != len(motions) or not surfaces:
            raise InputError(f"give one motion per body: {len(surfaces)} surfaces, {len(motions)} motions")
        return surfaces, motions
    return [surface], [motion]


@dataclass(frozen=True)
class ResolutionLengths:
    """The lengths a grid must resolve near the body, metres.

    Attributes
    ----------
    chord : float — reference chord ``c``.
    le_radius : float or None — leading-edge radius (NACA sections: 1.1019 t² c), None for a surface file.
    bl_thickness : float — Blasius ``delta99 = 4.91 c / sqrt(Re_c)`` at the trailing edge.
    stokes_layer : float — ``delta_s = sqrt(2 nu / omega)`` of the oscillation.
    reynolds : float — ``U c / nu``.
    """

    chord: float
    le_radius: float | None
    bl_thickness: float
    stokes_layer: float
    reynolds: float


def resolution_lengths(chord: float, speed: float, viscosity: float, frequency: float,
                       le_radius: float | None = None) -> ResolutionLengths:
    """Lengths to resolve: chord, leading-edge radius, Blasius thickness at the TE, Stokes layer.

    Parameters
    ----------
    chord : float — metres. speed : float — m/s, free stream. viscosity : float — m²/s,
    kinematic. frequency : float — Hz. le_radius : float, optional — metres.

    Notes
    -----
    Blasius flat plate at x = c: ``delta99 = 4.91 c / sqrt(Re_c)`` (Schlichting & Gersten,
    *Boundary-Layer Theory*, flat-plate chapter). Stokes' second problem: the
    oscillating layer decays as ``exp(-y / delta_s)``, ``delta_s = sqrt(2 nu / omega)``.
    """
    re = speed * chord / viscosity
    return ResolutionLengths(
        chord=chord,
        le_radius=le_radius,
        bl_thickness=BLASIUS_DELTA99 * chord / math.sqrt(re),
        stokes_layer=math.sqrt(2.0 * viscosity / (2.0 * math.pi * frequency)),
        reynolds=re,
    )


def required_spacing(lengths: ResolutionLengths, limits) -> tuple[float, str, dict[str, float]]:
    """The largest finest spacing that meets every resolution warning limit.

    Parameters
    ----------
    lengths : ResolutionLengths
    limits : CheckLimits-like — ``cells_per_chord_warn``, ``bl_cells_warn``,
        ``stokes_cells_warn``, ``le_radius_cells_warn``.

    Returns
    -------
    spacing : float — metres.
    rule : str — the rule that sets it.
    per_rule : dict — the spacing each rule alone asks for, metres.
    """
    per_rule = {
        "cells per chord": lengths.chord / limits.cells_per_chord_warn,
        "boundary layer": lengths.bl_thickness / limits.bl_cells_warn,
        "Stokes layer": lengths.stokes_layer / limits.stokes_cells_warn,
    }
    if lengths.le_radius is not None:
        per_rule["leading-edge radius"] = lengths.le_radius / limits.le_radius_cells_warn
    rule = min(per_rule, key=per_rule.get)
    return per_rule[rule], rule, per_rule


@dataclass(frozen=True)
class SizingResult:
    """Refinement boxes proposed for a case (see :func:`propose_boxes`).

    Attributes
    ----------
    envelope : Envelope
    target_spacing : float — metres; what the resolution rules ask for.
    rule : str — the rule that sets it.
    grid : NestedGrid — the base grid with the proposed boxes (snapped).
    boxes : tuple of ((3,), (3,)) — lower/upper of each proposed box, metres, coarsest first.
    clipped : tuple of bool — whether each box had to be cut back to the domain.
    """

    envelope: Envelope
    target_spacing: float
    rule: str
    grid: NestedGrid
    boxes: tuple
    clipped: tuple


def propose_boxes(base: Grid, envelope: Envelope, chord: float, target_spacing: float, *,
                  upstream: float = 0.25, lateral: float = 0.25, wake: float = 1.0,
                  buffer_cells: int = 8, rule: str = "") -> SizingResult:
    """Nested refinement boxes that reach ``target_spacing`` around the swept envelope.

    Parameters
    ----------
    base : Grid — the domain and its base spacing (2-D or 3-D; a 2-D grid uses the
        envelope's x and y).
    envelope : Envelope — from :func:`swept_envelope`.
    chord : float — metres; margins are in chords.
    target_spacing : float — metres; the finest spacing must not exceed it.
    upstream, lateral, wake : float — chords; margins of the finest box ahead of,
        around (y and z) and behind the envelope.
    buffer_cells : int — cells of each coarser level around the next finer box.

    Returns
    -------
    SizingResult
    """
    nd = base.ndim
    levels = max(0, int(math.ceil(math.log2(base.spacing / target_spacing) - 1e-9)))
    lo_dom, hi_dom = np.asarray(base.lower), np.asarray(base.upper)
    finest_lo = envelope.lower[:nd] - chord * np.array([upstream, lateral, lateral])[:nd]
    finest_hi = envelope.upper[:nd] + chord * np.array([wake, lateral, lateral])[:nd]
    boxes = []
    lo, hi = finest_lo, finest_hi
    for lvl in range(levels, 0, -1):
        h_lvl = base.spacing / 2**lvl
        if lvl < levels:
            lo = lo - buffer_cells * h_lvl
            hi = hi + buffer_cells * h_lvl
        boxes.append((lo.copy(), hi.copy()))
    boxes.reverse()  # coarsest first
    clipped = []
    out = []
    for lo, hi in boxes:
        c_lo, c_hi = np.maximum(lo, lo_dom), np.minimum(hi, hi_dom)
        clipped.append(bool(np.any(c_lo != lo) or np.any(c_hi != hi)))
        out.append((tuple(float(x) for x in c_lo), tuple(float(x) for x in c_hi)))
    nested = refine(base, out)
    snapped = tuple((g.lower, g.upper) for g in nested.levels[1:])
    return SizingResult(envelope=envelope, target_spacing=target_spacing, rule=rule, grid=nested,
                        boxes=snapped, clipped=tuple(clipped))


def demanding_lengths(case) -> ResolutionLengths:
    """Resolution lengths of a case's most demanding body: smallest chord, nose radius, Blasius and Stokes layers.

    Parameters
    ----------
    case : Case — every body's chord, section and motion frequency, and the flow.
    """
    per = []
    for body in case.bodies:
        sec = body.section
        le = float(sec.le_radius) * body.chord if sec is not None else None  # Section lengths are per unit chord
        per.append(resolution_lengths(body.chord, case.flow.speed, case.flow.viscosity, body.motion.frequency, le))
    if len(per) == 1:
        return per[0]
    from dataclasses import replace

    les = [p.le_radius for p in per if p.le_radius is not None]
    return replace(per[0], chord=min(p.chord for p in per), le_radius=min(les) if les else None,
                   bl_thickness=min(p.bl_thickness for p in per), stokes_layer=min(p.stokes_layer for p in per))


@dataclass(frozen=True)
class CaseSizing:
    """What ``ibprep size`` reports for a case (see :func:`size_case`).

    Attributes
    ----------
    lengths : ResolutionLengths — of the most demanding body.
    per_rule : dict of str to float — metres; the spacing each resolution rule asks for.
    target_spacing : float — metres; the finest spacing wanted.
    rule : str — what sets it (a resolution rule, or ``[sizing] target_spacing``).
    proposal : SizingResult — the swept envelope and the proposed, snapped boxes.
    """

    lengths: ResolutionLengths
    per_rule: dict
    target_spacing: float
    rule: str
    proposal: SizingResult


def size_case(case) -> CaseSizing:
    """Refinement boxes for a case: the spacing its most demanding body needs, around everything it sweeps.

    Parameters
    ----------
    case : Case — from :func:`~ibprep.load_case`; its ``[checks]`` warn limits set the resolution
        rules, its ``[sizing]`` table the margins (in the reference chord) and an optional target spacing.

    Returns
    -------
    CaseSizing — the proposal's boxes are snapped to the faces of the levels they sit in, so pasting
    them into the case gives exactly the proposal's cells.
    """
    lengths = demanding_lengths(case)
    target, rule, per_rule = required_spacing(lengths, case.checks)
    if case.sizing.target_spacing is not None:
        target, rule = case.sizing.target_spacing, "[sizing] target_spacing"
    env = swept_envelope(case.surfaces, case.motions, target)
    s = case.sizing
    proposal = propose_boxes(case.grid.base, env, case.chord, target, upstream=s.upstream, lateral=s.lateral,
                             wake=s.wake, buffer_cells=s.buffer_cells, rule=rule)
    return CaseSizing(lengths=lengths, per_rule=per_rule, target_spacing=target, rule=rule, proposal=proposal)
