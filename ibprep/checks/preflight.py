"""The pre-flight checks of a case over its whole cycle, returned as a :class:`Report`.

Families (ids are documented in the README):

* ``surface.*`` — the body is closed and outward; where it is thinner than two cells.
* ``domain.*`` — the swept body stays inside the domain; clearances to its faces.
* ``resolution.*`` — cells per chord, across the leading-edge radius, across the
  Blasius layer at the trailing edge and across the Stokes layer.
* ``refine.*`` — the finest box holds the swept body and its near wake.
* ``time.*`` — Courant number with the free stream plus the body's own speed;
  surface travel per step against one cell.
* ``stencil.*`` — at every checked step pair, every interface cell and every fresh
  cell has an ok stencil; worst condition number and weight bound, with where and when.

This module returns data and never prints; the command line formats it.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import asdict, dataclass, field

import numpy as np

from ..io.case import Case
from ..errors import InputError
from .sizing import demanding_lengths, swept_envelope
from ..stencils.build import StencilLimits

__all__ = ["Check", "Report", "preflight", "CAUTION", "check_instants", "STATUSES"]

#: The caution every report carries.
CAUTION = (
    "A pre-flight check does not validate a simulation: passing it means only that the case meets the "
    "geometric, resolution, time-step and stencil rules listed, at the steps checked. Whether the results "
    "of the run are right must be judged by convergence studies and comparison with trusted data. "
    "Engineering decisions rest with qualified people and the applicable codes and standards."
)

STATUSES = ("pass", "warn", "fail")
_RANK = {s: i for i, s in enumerate(STATUSES)}

# Stencils near the domain or box faces need this many cells of room (support radius).
_STENCIL_REACH_CELLS = 3.0


@dataclass(frozen=True)
class Check:
    """One check's outcome.

    Attributes
    ----------
    id : str — dotted id, e.g. ``time.cfl``.
    status : str — "pass", "warn" or "fail".
    value : float or None — what was measured. limit : float or None — the limit it is held to.
    unit : str — unit of value and limit.
    message : str — what was found, with where and when if it applies.
    hint : str — what to change (empty on a pass).
    """

    id: str
    status: str
    value: float | None
    limit: float | None
    unit: str
    message: str
    hint: str = ""

    def __post_init__(self) -> None:
        if self.status not in STATUSES:
            raise ValueError(f"check status must be one of {STATUSES}, got {self.status!r}")


@dataclass(frozen=True)
class Report:
    """The outcome of a pre-flight: verdict, checks, figures and the caution.

    Attributes
    ----------
    verdict : str — "fail" if any check failed, else "warn" if any warned, else "pass".
    checks : tuple of Check.
    figures : dict — non-dimensional numbers, cell counts, time step, worst stencils.
    caution : str — :data:`CAUTION`.
    title : str — the case title.
    steps : tuple — per-step figures (:class:`~ibprep.checks.sweep.StepResult`), for plots.
    """

    verdict: str
    checks: tuple
    figures: dict
    caution: str = CAUTION
    title: str = ""
    steps: tuple = field(default=(), repr=False)

    @property
    def failed(self) -> tuple:
        """The checks that failed."""
        return tuple(c for c in self.checks if c.status == "fail")

    def to_dict(self) -> dict:
        """The report as plain JSON-ready data (DESIGN §5 shape)."""
        return {
            "verdict": self.verdict,
            "title": self.title,
            "checks": [_check_dict(c) for c in self.checks],
            "figures": _plain(self.figures),
            "caution": self.caution,
        }

    def to_json(self, indent: int = 2) -> str:
        """The report as a JSON string."""
        return json.dumps(self.to_dict(), indent=indent, allow_nan=False)


def _check_dict(c: Check) -> dict:
    """A check as JSON-ready data: a value or limit that is not finite is null, and the message says why."""
    d = _plain(asdict(c))
    notes = [f"{k} is {float(getattr(c, k))!r}, written as null" for k in ("value", "limit")
             if isinstance(getattr(c, k), (int, float, np.floating)) and not math.isfinite(float(getattr(c, k)))]
    if notes:
        d["message"] = f"{c.message} ({'; '.join(notes)})"
    return d


def _plain(x):
    if isinstance(x, dict):
        return {str(k): _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    if isinstance(x, np.ndarray):
        return _plain(x.tolist())
    if isinstance(x, (np.floating, float)):
        v = float(x)
        return v if math.isfinite(v) else None
    if isinstance(x, np.integer):
        return int(x)
    return x


def _verdict(checks) -> str:
    worst = max((_RANK[c.status] for c in checks), default=0)
    return STATUSES[worst]


def _lim(limit) -> str:
    """A limit as printed in messages: up to 12 significant digits (2, 0.5, 1.2342, 2.00000005)."""
    return f"{limit:.12g}"


def _near(value, limit) -> str:
    """value to 3 significant digits, or more where fewer would not print it on its side of the printed limit."""
    shown = float(_lim(limit))
    for digits in range(3, 18):
        text = f"{value:.{digits}g}"
        v = float(text)
        if (v > shown) == (value > limit) and (v < shown) == (value < limit):
            return text
    return repr(float(value))


def _qty(value, unit, limit=None) -> str:
    text = f"{value:.3g}" if limit is None else _near(value, limit)
    return _counted(text, unit) if unit else text


def _counted(text, unit) -> str:
    """A printed number with its unit, singular for exactly one cell or chord ("1 chord")."""
    if text == "1" and unit in ("cells", "chords"):
        unit = unit[:-1]
    return f"{text} {unit}"


def _below(id_, value, warn, fail, unit, what, hint) -> Check:
    """A check where small is bad: fail below ``fail``, warn below ``warn``."""
    if value < fail:
        return Check(id_, "fail", value, fail, unit,
                     f"{what}: {_qty(value, unit, fail)}, below the minimum {_lim(fail)}", hint)
    if value < warn:
        return Check(id_, "warn", value, warn, unit,
                     f"{what}: {_qty(value, unit, warn)}, below the advised {_lim(warn)}", hint)
    return Check(id_, "pass", value, warn, unit, f"{what}: {_qty(value, unit)}")


def _above(id_, value, warn, fail, unit, what, hint) -> Check:
    """A check where large is bad: fail above ``fail``, warn above ``warn``."""
    if value > fail:
        return Check(id_, "fail", value, fail, unit,
                     f"{what}: {_qty(value, unit, fail)}, above the maximum {_lim(fail)}", hint)
    if value > warn:
        return Check(id_, "warn", value, warn, unit,
                     f"{what}: {_qty(value, unit, warn)}, above the advised {_lim(warn)}", hint)
    return Check(id_, "pass", value, warn, unit, f"{what}: {_qty(value, unit)}")


def _pct(frac: float) -> str:
    return f"{100 * frac:.0f}" if frac >= 0.1 else f"{100 * frac:.2g}"


def _fmt_point(p) -> str:
    return "(" + ", ".join(f"{v:.4g}" for v in p) + ") m" if len(p) else "(none)"


# --------------------------------------------------------------------------- families
def _surface_checks(case: Case, h_body: float, figures: dict) -> list[Check]:
    """surface.* for every body; with several bodies the worst outcome per id, messages naming the body."""
    per_body = []
    figures["surface"] = []
    for body in case.bodies:
        fig: dict = {"name": body.name}
        per_body.append(_body_surface_checks(case, body.surface, h_body, fig))
        figures["surface"].append(fig)
    if len(per_body) == 1:
        return per_body[0]
    ids = list(dict.fromkeys(c.id for checks in per_body for c in checks))  # first-seen order
    merged = []
    for id_ in ids:
        group = [(b.name, c) for b, checks in zip(case.bodies, per_body) for c in checks if c.id == id_]
        worst = max((c for _, c in group), key=lambda c: _RANK[c.status])
        message = "; ".join(f"{name}: {c.message}" for name, c in group)
        merged.append(Check(id_, worst.status, worst.value, worst.limit, worst.unit, message, worst.hint))
    return merged


def _body_surface_checks(case: Case, mesh, h_body: float, figures: dict) -> list[Check]:
    from ..geometry import check_surface, thin_regions

    rep = check_surface(mesh)
    figures.update({"faces": rep.n_faces, "pieces": rep.n_bodies, "area_m2": rep.area, "volume_m3": rep.volume})
    out = []
    if rep.closed and rep.finite and rep.degenerate_faces == 0:
        out.append(Check("surface.closed", "pass", 0, 0, "open edges", "every edge is shared by exactly two faces"))
    else:
        where = f" (first near {_fmt_point(rep.open_edge_location)})" if rep.open_edge_location else ""
        out.append(Check(
            "surface.closed", "fail", float(rep.open_edges + rep.nonmanifold_edges + rep.degenerate_faces), 0,
            "edges", f"{rep.open_edges} open, {rep.nonmanifold_edges} non-manifold edges and "
            f"{rep.degenerate_faces} degenerate faces{where}",
            "repair the surface so it is closed and manifold (every edge in exactly two faces)"))
    if rep.outward:
        out.append(Check("surface.oriented", "pass", float(rep.misoriented_edges), 0, "edges",
                         "faces are consistently oriented with normals pointing out"))
    else:
        out.append(Check("surface.oriented", "fail", float(rep.misoriented_edges), 0, "edges",
                         f"{rep.misoriented_edges} edges with inconsistent orientation or an inward body",
                         "orient every face consistently, normals pointing out of the body"))
    if not rep.closed:
        return out
    planar = case.grid.base.ndim == 2
    # A 2-D body is a prism: only its section matters, so only a band of its walls about z = 0.
    thin = thin_regions(mesh, 2.0 * h_body, spacing=h_body, planar_band=2.0 * h_body if planar else None)
    examined = thin.examined_area if thin.examined_area > 0 else 1.0
    frac = float(thin.area / examined)
    other = float(thin.other_area / examined)  # thin area not explained by a sharp edge's taper
    where = ""
    if thin.count:
        k = int(np.argmin(thin.thickness))
        where = f"; thinnest {thin.min_thickness / h_body:.2g} cells near {_fmt_point(thin.points[k][:2] if planar else thin.points[k])} (body frame)"
        figures["thin_area_fraction"] = frac
        figures["thin_area_fraction_not_edge"] = other
        rest = ~thin.edge_taper
        if rest.any():
            j = int(np.flatnonzero(rest)[np.argmin(thin.thickness[rest])])
            p = thin.points[j][:2] if planar else thin.points[j]
            where += f"; away from sharp edges {_pct(other)} %, thinnest {thin.thickness[j] / h_body:.2g} cells near {_fmt_point(p)}"
    msg = (f"{_pct(frac)} % of the {'section perimeter' if planar else 'surface'} is thinner than two cells "
           f"({2 * h_body:.3g} m){where}")
    if other > case.checks.thin_fraction_max:
        out.append(Check("surface.thin", "fail", other, case.checks.thin_fraction_max, "area fraction", msg,
                         "refine the grid near the body or thicken the body: thin parts away from a sharp edge "
                         "vanish or leak on the grid"))
    elif thin.count:
        out.append(Check("surface.thin", "warn", other, case.checks.thin_fraction_max, "area fraction",
                         msg + (" (the taper of a sharp edge, as expected)" if other == 0 else ""),
                         "expected along a sharp trailing edge; elsewhere refine or thicken"))
    else:
        out.append(Check("surface.thin", "pass", other, case.checks.thin_fraction_max, "area fraction", msg))
    return out


def _domain_checks(case: Case, env, figures: dict) -> list[Check]:
    g = case.grid.base
    c = case.chord
    nd = g.ndim
    lo, hi = np.asarray(g.lower), np.asarray(g.upper)
    reach = _STENCIL_REACH_CELLS * case.grid.finest_spacing
    gap_lo = env.lower[:nd] - lo
    gap_hi = hi - env.upper[:nd]
    figures["envelope"] = {"lower_m": env.lower[:nd], "upper_m": env.upper[:nd]}
    out = []
    worst = float(min(gap_lo.min(), gap_hi.min()))
    if worst < reach:
        # Every face the moving body comes too close to, each with when in the cycle it is closest.
        found, moves = [], []
        for axis in range(nd):
            for side, gap in (("lower", gap_lo[axis]), ("upper", gap_hi[axis])):
                if gap >= reach:
                    continue
                per = (env.box_lower[:, axis] - lo[axis]) if side == "lower" else (hi[axis] - env.box_upper[:, axis])
                k = int(np.argmin(per))
                face = f"{side} {'xyz'[axis]}"
                found.append(f"within {gap:.3g} m of the {face} face (at t = {env.times[k]:.4g} s in the cycle)")
                moves.append(f"the {face} face by at least {reach - gap:.3g} m")
        out.append(Check(
            "domain.inside", "fail", worst / case.grid.finest_spacing, _STENCIL_REACH_CELLS, "cells",
            f"the moving body comes {'; '.join(found)}; stencils need {_STENCIL_REACH_CELLS:g} cells of room",
            f"move out {', '.join(moves)}"))
    else:
        out.append(Check("domain.inside", "pass", worst / case.grid.finest_spacing, _STENCIL_REACH_CELLS, "cells",
                         "the body stays inside the domain over the whole motion"))
    lim = case.checks
    for id_, value, limit, what, face in (
        ("domain.upstream", gap_lo[0] / c, lim.upstream_chords, "clearance ahead of the swept body", "lower x"),
        ("domain.downstream", gap_hi[0] / c, lim.downstream_chords, "clearance behind the swept body", "upper x"),
        ("domain.lateral", min(gap_lo[1], gap_hi[1]) / c, lim.lateral_chords, "clearance above/below the swept body",
         "lower/upper y"),
        ("domain.spanwise", min(gap_lo[2], gap_hi[2]) / c if nd == 3 else None, lim.spanwise_chords,
         "clearance beyond the body's ends", "lower/upper z"),
    ):
        if value is None:  # 2-D: no span
            continue
        if value < limit:
            out.append(Check(id_, "warn", value, limit, "chords",
                             f"{what}: {_qty(value, 'chords', limit)}, below the common-practice {_lim(limit)}",
                             f"move the {face} face(s) out if blockage or inflow/outflow conditions matter"))
        else:
            out.append(Check(id_, "pass", value, limit, "chords", f"{what}: {_qty(value, 'chords')}"))
    return out


def _body_level(case: Case, env) -> int:
    nd = case.grid.base.ndim
    lvl = case.grid.level_containing(env.lower[:nd], env.upper[:nd])
    return lvl if lvl >= 0 else 0


def _resolution_checks(case: Case, lengths, h: float) -> list[Check]:
    lim = case.checks
    out = [_below("resolution.chord", lengths.chord / h, lim.cells_per_chord_warn, lim.cells_per_chord_min, "cells",
                  "cells per chord at the body", "halve the spacing near the body (add a refinement level)")]
    if lengths.le_radius is not None:
        out.append(_below("resolution.le_radius", lengths.le_radius / h, lim.le_radius_cells_warn,
                          lim.le_radius_cells_min, "cells", "cells across the leading-edge radius",
                          "refine near the leading edge"))
    out.append(_below("resolution.boundary_layer", lengths.bl_thickness / h, lim.bl_cells_warn, lim.bl_cells_min,
                      "cells", f"cells across the Blasius thickness at the trailing edge ({lengths.bl_thickness:.3g} m)",
                      "refine near the body: the boundary layer is under-resolved"))
    out.append(_below("resolution.stokes_layer", lengths.stokes_layer / h, lim.stokes_cells_warn, lim.stokes_cells_min,
                      "cells", f"cells across the Stokes layer of the oscillation ({lengths.stokes_layer:.3g} m)",
                      "refine near the body: the oscillating layer is under-resolved"))
    return out


def _refine_checks(case: Case, env, figures: dict) -> list[Check]:
    ng = case.grid
    fin = ng.finest
    c = case.chord
    reach = _STENCIL_REACH_CELLS * fin.spacing
    nd = fin.ndim
    lo, hi = np.asarray(fin.lower), np.asarray(fin.upper)
    gap = np.minimum(env.lower[:nd] - lo, hi - env.upper[:nd])
    out = []
    if len(ng.levels) == 1:
        out.append(Check("refine.envelope", "pass", None, None, "", "no refinement boxes: the base grid holds the body"))
    elif gap.min() >= reach:
        out.append(Check("refine.envelope", "pass", float(gap.min() / fin.spacing), _STENCIL_REACH_CELLS, "cells",
                         "the finest box holds the swept body with room for stencils"))
    else:
        axis = int(np.argmin(gap))
        if gap.min() < 0:
            what = f"the swept body leaves the finest box along {'xyz'[axis]} by up to {-gap.min():.3g} m"
        else:
            what = (f"the swept body comes within {gap.min():.3g} m of the finest box's {'xyz'[axis]} faces; "
                    f"stencils need {reach:.3g} m ({_STENCIL_REACH_CELLS:g} cells)")
        out.append(Check(
            "refine.envelope", "fail", float(gap.min() / fin.spacing), _STENCIL_REACH_CELLS, "cells", what,
            "enlarge the finest box to hold the swept envelope plus margins; `ibprep size` proposes boxes"))
    if len(ng.levels) > 1:
        wake = float((hi[0] - env.upper[0]) / c)
        want = case.sizing.wake
        if wake < want:
            out.append(Check("refine.wake", "warn", wake, want, "chords",
                             f"the finest box reaches {_qty(wake, 'chords')} behind the swept body, less than the "
                             f"wake allowance of {want:g}",
                             "extend the finest box downstream to resolve the near wake"))
        else:
            out.append(Check("refine.wake", "pass", wake, want, "chords",
                             f"the finest box reaches {_qty(wake, 'chords')} behind the swept body"))
    return out


def _time_checks(case: Case, env, h: float, figures: dict) -> list[Check]:
    lim = case.checks
    dt = case.time.step
    u = case.flow.speed
    v = env.max_speed
    cfl = (u + v) * dt / h
    travel = v * dt / h
    figures["time"] = {"step_s": dt, "steps_per_cycle": case.steps_per_cycle,
                       "total_steps": case.steps_per_cycle * case.time.cycles, "courant": cfl,
                       "travel_cells_per_step": travel, "max_body_speed_m_s": v}
    cfl_fix = (lim.cfl_warn * h / (u + v))
    return [
        _above("time.cfl", cfl, lim.cfl_warn, lim.cfl_max, "",
               "convective Courant number (U + max body speed) dt / h",
               f"reduce the time step to {cfl_fix:.3g} s or less"),
        _above("time.travel", travel, lim.travel_warn, lim.travel_max, "cells",
               "largest surface travel per step", f"reduce the time step to {lim.travel_warn * h / v:.3g} s or less"
               if v > 0 else "")
    ]


def check_instants(case: Case, *, all_steps: bool | None = None) -> np.ndarray:
    """The instants ``t`` whose step pairs (t, t + dt) are checked, seconds, in one period.

    Default: ``case.checks.phases`` evenly spaced phases plus the instants of peak
    body speed; with ``all_steps`` every solver step of one cycle.
    """
    T = case.motion.period
    dt = case.time.step
    all_steps = case.checks.all_steps if all_steps is None else all_steps
    if all_steps:
        return np.arange(case.steps_per_cycle) * dt
    base = np.arange(case.checks.phases) * T / case.checks.phases

    peaks = []
    for body in case.bodies:
        hull = _hull(np.asarray(body.surface.vertices))
        peaks.append(np.asarray(body.motion.peak_speed_times(hull), dtype=float).ravel())
    peaks = np.concatenate(peaks)
    # Align peaks to solver steps so every checked pair is a real pair of steps.
    t = np.concatenate([base, peaks])
    t = np.unique(np.round(np.mod(t, T) / dt) * dt)
    return t[t < T - 0.5 * dt] if t.size > 1 else t


def preflight(case: Case, *, all_steps: bool | None = None, workers: int = 1, scheduler: str | None = None,
              progress=None, limits: StencilLimits | None = None) -> Report:
    """Run every pre-flight check of a case over its cycle.

    Parameters
    ----------
    case : Case — from :func:`~ibprep.load_case`.
    all_steps : bool, optional — check every solver step of a cycle (default: the case's choice).
    workers : int — local processes for the stencil sweep (1 = serial).
    scheduler : str, optional — Dask scheduler address for the sweep.
    progress : callable, optional — ``progress(done, total)`` as step pairs finish.
    limits : StencilLimits, optional — stencil quality limits (default: the case's
        ``condition_max`` / ``weight_bound_max`` over the builder's defaults).

    Returns
    -------
    Report
    """
    from ..motion.kinematics import flow_numbers
    from .sweep import sweep

    if not isinstance(case, Case):
        raise InputError(f"preflight needs a Case from load_case, got {type(case).__name__}")
    figures: dict = {}
    c = case.chord
    motion = case.motion
    lengths = _demanding_lengths(case)

    env = swept_envelope(case.surfaces, case.motions, case.grid.finest_spacing)
    level = _body_level(case, env)
    grid = case.grid.levels[level]
    h = grid.spacing
    _memory_fits(grid, level, workers if scheduler in (None, "local") else 0)
    # A rigid body's point speed |v0 + w x r| is convex in r, so its maximum over the body
    # is reached at a vertex of the convex hull: the hull points give the exact peak.
    hull = _hull(np.asarray(case.surface.vertices))
    nums = flow_numbers(motion, c, case.flow.speed, case.flow.viscosity, te_point=case.te_point, surface_points=hull)
    figures["numbers"] = {
        "reynolds": nums.reynolds, "frequency_ratio_fc_U": nums.frequency_ratio, "k_chord": nums.k_chord,
        "k_half_chord": nums.k_half_chord, "plunge_ratio_h0_c": nums.plunge_ratio, "kh": nums.kh,
        "strouhal_2fh0_U": nums.strouhal, "strouhal_te": nums.strouhal_te,
        "alpha_eff_max_deg": math.degrees(nums.alpha_max), "feathering_chi": nums.feathering,
        "roll_amplitude_deg": math.degrees(getattr(motion, "roll_amplitude", 0.0)),
        "max_te_speed_U": nums.max_te_speed, "max_surface_speed_U": nums.max_surface_speed,
        "te_point_m": [float(x) for x in case.te_point],
    }
    figures["resolution"] = {"spacing_at_body_m": h, "level_at_body": level, "chord_m": c,
                             "le_radius_m": lengths.le_radius, "bl_thickness_m": lengths.bl_thickness,
                             "stokes_layer_m": lengths.stokes_layer}
    ng = case.grid
    figures["grid"] = {"levels": len(ng.levels), "spacing_m": [g.spacing for g in ng.levels],
                       "cells_per_level": list(ng.cells_per_level()), "total_cells": ng.total_cells,
                       "leaf_cells": ng.leaf_cells}

    checks: list[Check] = []
    checks += _surface_checks(case, h, figures)
    checks += _domain_checks(case, env, figures)
    checks += _resolution_checks(case, lengths, h)
    checks += _refine_checks(case, env, figures)
    checks += _time_checks(case, env, h, figures)
    if len(case.bodies) > 1:
        checks += _gap_checks(case, env, h, figures)

    if any(c_.status == "fail" for c_ in checks
           if c_.id in ("surface.closed", "surface.oriented", "domain.inside")):
        checks.append(Check("stencil.ok", "fail", None, None, "", "stencils were not checked: the body surface "
                            "or its place in the domain failed first", "fix the failures above and run again"))
        return Report(verdict="fail", checks=tuple(checks), figures=figures, title=case.title)

    limits = limits or StencilLimits()
    overrides = {}
    if case.checks.condition_max is not None:
        overrides["max_condition"] = case.checks.condition_max
    if case.checks.weight_bound_max is not None:
        overrides["max_weight_bound"] = case.checks.weight_bound_max
    if overrides:
        from dataclasses import replace

        limits = replace(limits, **overrides)
    instants = check_instants(case, all_steps=all_steps)
    steps = sweep(list(case.surfaces), list(case.motions), grid, instants, case.time.step, limits=limits, workers=workers,
                  scheduler=scheduler, progress=progress)
    checks += _stencil_checks(steps, limits, figures, h)
    mem = ng.memory_estimate(n_interface=max((s.n_interface for s in steps), default=0))
    figures["grid"]["memory_bytes"] = {"tags": mem.tags, "stencils": mem.stencils, "total": mem.total}
    return Report(verdict=_verdict(checks), checks=tuple(checks), figures=figures, title=case.title,
                  steps=tuple(steps))


# Bytes per cell of the level holding the body that one sweep task holds: the tags of the
# step before and after (one byte each) and the step's changed-cell workspace (about one).
SWEEP_BYTES_PER_CELL = 3


def _physical_memory() -> int | None:
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (AttributeError, ValueError, OSError):  # not a POSIX system: no estimate
        return None


def _memory_fits(grid, level: int, workers: int) -> None:
    """Refuse, before the sweep, a level that the local workers cannot hold in this machine's memory.

    ``workers`` is the number of local processes (0 when the sweep runs on a remote Dask cluster,
    whose workers' memory is not this machine's).
    """
    have = _physical_memory()
    if not workers or have is None:
        return
    need = SWEEP_BYTES_PER_CELL * grid.size * max(1, workers)
    if need > have:
        raise InputError(
            f"[grid] level {level}, which holds the body, has {grid.size:,} cells: checking it needs about "
            f"{need / 2**30:.3g} GiB ({SWEEP_BYTES_PER_CELL} bytes a cell x {max(1, workers)} worker(s)), more than "
            f"this machine's {have / 2**30:.3g} GiB; use a coarser spacing or a smaller finest box, fewer "
            "--workers, or a Dask cluster (--scheduler)"
        )


def _stencil_checks(steps, limits: StencilLimits, figures: dict, h: float) -> list[Check]:
    n_bad = sum(s.n_bad for s in steps)
    n_fresh = sum(s.n_fresh for s in steps)
    n_fresh_bad = sum(s.n_fresh_bad for s in steps)
    n_total = sum(s.n_stencils for s in steps)
    finite = [s for s in steps if s.n_stencils]
    wc = max(finite, key=lambda s: s.worst_condition, default=None)
    ww = max(finite, key=lambda s: s.worst_weight_bound, default=None)
    worst_bad = max(steps, key=lambda s: s.n_bad, default=None)
    figures["stencils"] = {
        "checked_steps": len(steps), "stencils_built": n_total,
        "max_interface_cells": max((s.n_interface for s in steps), default=0),
        "max_fresh_cells": max((s.n_fresh for s in steps), default=0),
        "worst": [
            {"what": "condition", "value": wc.worst_condition, "time_s": wc.time, "at_m": wc.worst_condition_at}
            if wc else {},
            {"what": "weight_bound", "value": ww.worst_weight_bound, "time_s": ww.time, "at_m": ww.worst_weight_bound_at}
            if ww else {},
        ],
        "bad_locations": [{"time_s": s.time, "at_m": list(s.bad_points)} for s in steps if s.n_bad][:10],
    }
    out = []
    if not steps or n_total == 0:
        out.append(Check("stencil.ok", "fail", 0, None, "stencils",
                         "no interface cells at any checked step: the body does not show on the grid",
                         "check that the body lies inside the grid level that should hold it and is thicker than a cell"))
        return out
    if n_bad:
        p = worst_bad.bad_points[0] if worst_bad.bad_points else ()
        out.append(Check("stencil.ok", "fail", float(n_bad), 0, "stencils",
                         f"{n_bad:,} of {n_total:,} stencils over {len(steps):,} checked steps are not ok; worst step "
                         f"t = {worst_bad.time:.4g} s with {worst_bad.n_bad}, e.g. at {_fmt_point(p)}",
                         "refine near the body (thin parts and tight gaps starve stencils) or relax [checks] limits "
                         "only with care"))
    else:
        out.append(Check("stencil.ok", "pass", 0.0, 0, "stencils",
                         f"all {n_total:,} stencils over {len(steps):,} checked steps are ok"))
    out.append(_above("stencil.condition", wc.worst_condition, limits.max_condition, limits.max_condition, "",
                      f"worst condition number (t = {wc.time:.4g} s at {_fmt_point(wc.worst_condition_at)})",
                      "refine near the body or widen the stencil support"))
    out.append(_above("stencil.weight_bound", ww.worst_weight_bound, limits.max_weight_bound,
                      limits.max_weight_bound, "",
                      f"worst weight bound sum|w| (t = {ww.time:.4g} s at {_fmt_point(ww.worst_weight_bound_at)})",
                      "refine near the body; large weights amplify errors"))
    if n_fresh_bad:
        out.append(Check("stencil.fresh", "fail", float(n_fresh_bad), 0, "cells",
                         f"{n_fresh_bad:,} of {n_fresh:,} fresh cells have no valid stencil",
                         "reduce the time step or refine near the body"))
    else:
        out.append(Check("stencil.fresh", "pass", 0.0, 0, "cells",
                         f"all {n_fresh:,} fresh cells over the checked steps have ok stencils"))
    return out


def _hull(points: np.ndarray) -> np.ndarray:
    """Vertices of the convex hull of (n, 3) points (all of them if the hull is degenerate)."""
    from scipy.spatial import ConvexHull, QhullError

    try:
        return points[ConvexHull(points).vertices]
    except (QhullError, ValueError):
        return points


def _demanding_lengths(case: Case):
    """Resolution lengths of the most demanding body (see :func:`~ibprep.checks.sizing.demanding_lengths`)."""
    return demanding_lengths(case)


def _gap_checks(case: Case, env, h: float, figures: dict) -> list[Check]:
    """resolution.gap: the narrowest gap between two bodies over the cycle, in cells, with where and when.

    Each body is sampled by surface markers at half a cell; at every envelope sample
    time (no point moves more than half a cell between them) the nearest markers of
    each pair of bodies are found with a k-d tree. The gap is accurate to about half a
    cell (marker spacing plus travel between samples); touching or overlapping bodies give
    a gap near zero and fail.
    """
    from scipy.spatial import cKDTree

    from ..geometry import surface_markers

    lim = case.checks
    markers = [surface_markers(b.surface, 0.5 * h)[0] for b in case.bodies]
    best = (np.inf, None, None, None)
    times = env.times
    for t in times:
        world = [b.motion.transform(p, float(t)) for b, p in zip(case.bodies, markers)]
        for i in range(len(world)):
            tree = cKDTree(world[i])
            for j in range(i + 1, len(world)):
                d, k = tree.query(world[j], k=1)
                m = int(np.argmin(d))
                if d[m] < best[0]:
                    best = (float(d[m]), float(t), 0.5 * (world[i][k[m]] + world[j][m]), (i, j))
    gap, t, where, (i, j) = best
    names = (case.bodies[i].name, case.bodies[j].name)
    figures["gap"] = {"min_gap_m": gap, "time_s": t, "at_m": where, "bodies": names}
    cells = gap / h
    what = f"narrowest gap between {names[0]} and {names[1]}: {gap:.3g} m at t = {t:.4g} s near {_fmt_point(where)}"
    hint = "move the bodies apart or refine there: a gap under about two cells starves the stencils between them"
    return [_below("resolution.gap", cells, lim.gap_cells_warn, lim.gap_cells_min, "cells", what, hint)]
