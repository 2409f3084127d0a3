"""Tagging cell centres solid, fluid or interface for surfaces in world coordinates.

Tag codes are the :class:`CellTag` members, stored in ``uint8`` arrays of
``grid.shape``.

Method
------
Rows of cell centres run along x. Every triangle is projected onto the (y, z)
plane and the lattice points ``(y_j, z_k)`` of the centre rows inside its
projection are enumerated (vectorised, from the triangle's bounding box). At each
such point the row crosses the triangle once, at an x found from the triangle's
plane, entering the body where the outward normal points towards -x and leaving
it where it points towards +x. A +1 / -1 is scattered at the first centre
strictly beyond the crossing and a cumulative sum along x gives the winding
number of every centre; a centre is solid where the winding number is not zero.
This needs no parity rule, and overlapping or nested bodies and bodies reaching
outside the grid come out right.

Exactness and tie-breaking
--------------------------
Whether a lattice point lies inside a projected triangle is decided by the exact
sign of the three edge functions (orientation predicates): a floating-point
filter with a proven error bound (Shewchuk 1997) settles almost every case, the
few it cannot settle are evaluated in exact rational arithmetic. Exact zeros (a
row through a vertex or along an edge) are broken by simulation of simplicity:
the lattice point is treated as moved by ``(+e, +e**2)`` in ``(y, z)`` with ``e``
infinitesimal. Every edge is judged for the same moved point, so a row passing
through a shared edge or vertex is counted exactly once, never twice or not at
all. Triangles whose projection has zero area (faces parallel to x, such as the
side faces of a box, or a flat wing tip lying on a plane of centres) are never
crossed by a moved row and contribute nothing. Along x a crossing counts for a
centre only if it lies strictly before it.

The rule, in one line: a cell centre ``c`` lying exactly on the surface is
classified as the point ``c + (-d, +e, +e**2)`` with ``d``, ``e`` infinitesimal.
For a box whose faces lie on planes of centres, the solid centres are those in
``(x0, x1] x [y0, y1) x [z0, z1)``; two face-adjacent boxes give the same tags as
the merged box. Centres off the surface are tagged exactly as they lie, up to
the rounding of the crossing abscissa along x (about 1e-16 of the coordinates).

References
----------
J. R. Shewchuk (1997), "Adaptive precision floating-point arithmetic and fast
robust geometric predicates", Discrete Comput. Geom. 18:305-363 (orient2d error
bound ``(3 + 16 eps) eps``).
H. Edelsbrunner, E. P. Mücke (1990), "Simulation of simplicity", ACM Trans.
Graphics 9(1):66-104.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from enum import IntEnum
from fractions import Fraction

import numpy as np

from .errors import IbprepWarning, InputError
from .grid import Grid, NestedGrid
from .triangles import as_triangles

__all__ = ["CellTag", "Transition", "classify", "classify_levels", "step_tags"]


class CellTag(IntEnum):
    """Tag code of a cell, stored as ``uint8``.

    FLUID = 0, SOLID = 1, INTERFACE = 2. By default interface cells are
    fluid-side: fluid cells with at least one face neighbour that is solid.
    """

    FLUID = 0
    SOLID = 1
    INTERFACE = 2


INTERFACE_MODES = ("fluid-side", "solid-side")

# Shewchuk's orient2d filter: |det| > (3 + 16 eps) eps (|l| + |r|) proves the sign
# of det = l - r computed in double precision, eps = 2**-53.
_EPS = 2.0**-53
_CCW_ERRBOUND = (3.0 + 16.0 * _EPS) * _EPS

# Lattice candidates handled per chunk: bounds the transient memory of the
# enumeration to roughly 100 bytes x this many, about 0.2 GB.
_CANDIDATES_PER_CHUNK = 2_000_000


def _check_interface(interface) -> str:
    if interface not in INTERFACE_MODES:
        raise InputError(
            f"interface must be one of {INTERFACE_MODES}, got {interface!r}; "
            "'fluid-side' tags fluid cells next to the body, 'solid-side' solid cells next to the fluid"
        )
    return interface


def _check_grid(grid) -> Grid:
    if not isinstance(grid, Grid):
        raise InputError(f"grid must be an ibprep.Grid, got {type(grid).__name__}; build one with ibprep.Grid(...)")
    return grid


# --------------------------------------------------------------------------- exact predicates
def _exact_orient_sign(ay, az, by, bz, py, pz) -> np.ndarray:
    """Exact sign of (by-ay)(pz-az) - (bz-az)(py-ay), rational arithmetic (slow; few calls)."""
    out = np.empty(ay.shape[0], dtype=np.int8)
    F = Fraction
    for n, (a0, a1, b0, b1, p0, p1) in enumerate(zip(ay.tolist(), az.tolist(), by.tolist(), bz.tolist(), py.tolist(), pz.tolist())):
        d = (F(b0) - F(a0)) * (F(p1) - F(a1)) - (F(b1) - F(a1)) * (F(p0) - F(a0))
        out[n] = (d > 0) - (d < 0)
    return out


def _orient_sign(ay, az, by, bz, py, pz) -> np.ndarray:
    """Exact sign (-1, 0, +1) of the 2-D orientation of (a, b, p) in the (y, z) plane.

    Parameters
    ----------
    ay, az, by, bz, py, pz : (n,) float — metres.

    Returns
    -------
    (n,) int8 — sign of ``(by-ay)(pz-az) - (bz-az)(py-ay)``: +1 when p lies to the
    left of the directed line a→b (counter-clockwise in (y, z)).
    """
    dy = by - ay
    dz = bz - az
    qy = py - ay
    qz = pz - az
    left = dy * qz
    right = dz * qy
    det = left - right
    sign = np.sign(det).astype(np.int8)
    bound = _CCW_ERRBOUND * (np.abs(left) + np.abs(right))
    unsure = ~(np.abs(det) > bound)
    if np.any(unsure):
        # A rounded difference has the exact sign and is zero only for equal
        # operands, so a product with a zero factor is exactly zero and the sign of
        # the other product follows from the signs of its factors.
        left0 = (dy == 0.0) | (qz == 0.0)
        right0 = (dz == 0.0) | (qy == 0.0)
        both = unsure & left0 & right0
        sign[both] = 0
        only_l = unsure & left0 & ~right0
        sign[only_l] = (-np.sign(dz[only_l]) * np.sign(qy[only_l])).astype(np.int8)
        only_r = unsure & right0 & ~left0
        sign[only_r] = (np.sign(dy[only_r]) * np.sign(qz[only_r])).astype(np.int8)
        rest = np.flatnonzero(unsure & ~left0 & ~right0)
        if rest.size:
            sign[rest] = _exact_orient_sign(ay[rest], az[rest], by[rest], bz[rest], py[rest], pz[rest])
    return sign


def _edge_side(ay, az, by, bz, py, pz) -> np.ndarray:
    """Side (+1 left, -1 right) of the lattice point moved by (+e, +e**2) against edge a→b.

    Never zero: an exact zero is broken by the sign of ``(by-ay) e**2 - (bz-az) e``,
    i.e. ``-sign(bz-az)``, or ``sign(by-ay)`` when the edge is parallel to y. A
    degenerate edge (a == b in projection) gives +1; it only occurs in triangles of
    zero projected area, which are discarded before this call.
    """
    s = _orient_sign(ay, az, by, bz, py, pz)
    zero = s == 0
    if np.any(zero):
        dz = bz[zero] - az[zero]
        dy = by[zero] - ay[zero]
        tie = np.where(dz != 0.0, -np.sign(dz), np.sign(dy))
        tie[tie == 0] = 1
        s[zero] = tie.astype(np.int8)
    return s


# --------------------------------------------------------------------------- crossings
@dataclass(frozen=True)
class _Crossings:
    """Row crossings of a surface: centre index along x and lattice indices.

    i : (c,) int64 — index of the first centre strictly beyond the crossing, 0..nx.
    j, k : (c,) int64 — lattice indices of the row along y and z.
    w : (c,) int8 — +1 entering (outward normal towards -x), -1 leaving.
    """

    i: np.ndarray
    j: np.ndarray
    k: np.ndarray
    w: np.ndarray


def _axes3(grid: Grid) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Centre coordinates along x, y, z; a 2-D grid is the plane z = 0."""
    ax = grid.axes()
    if grid.ndim == 2:
        return ax[0], ax[1], np.zeros(1)
    return ax


def _crossings(vertices: np.ndarray, faces: np.ndarray, xs, ys, zs) -> _Crossings:
    """All crossings of the centre rows (y_j, z_k) along x with the triangles."""
    tri = vertices[faces]  # (m, 3, 3)
    tri_y = tri[:, :, 1]
    tri_z = tri[:, :, 2]
    j0 = np.searchsorted(ys, tri_y.min(axis=1), side="left")
    j1 = np.searchsorted(ys, tri_y.max(axis=1), side="right")
    k0 = np.searchsorted(zs, tri_z.min(axis=1), side="left")
    k1 = np.searchsorted(zs, tri_z.max(axis=1), side="right")
    nj = j1 - j0
    nk = k1 - k0
    hit = np.flatnonzero((nj > 0) & (nk > 0))
    empty = _Crossings(*(np.empty(0, np.int64) for _ in range(3)), np.empty(0, np.int8))
    if hit.size == 0:
        return empty
    # Triangles with exactly zero projected area are never crossed by a moved row.
    t = tri[hit]
    area = _orient_sign(t[:, 0, 1], t[:, 0, 2], t[:, 1, 1], t[:, 1, 2], t[:, 2, 1], t[:, 2, 2])
    hit = hit[area != 0]
    if hit.size == 0:
        return empty
    counts = (nj[hit] * nk[hit]).astype(np.int64)
    ends = np.cumsum(counts)
    starts = ends - counts
    # Chunk boundaries on whole triangles so each chunk enumerates at most about
    # _CANDIDATES_PER_CHUNK lattice candidates (a single huge triangle is its own chunk).
    cuts = [0]
    while cuts[-1] < hit.size:
        nxt = int(np.searchsorted(ends, starts[cuts[-1]] + _CANDIDATES_PER_CHUNK, side="right"))
        cuts.append(max(nxt, cuts[-1] + 1))
    parts = []
    for c0, c1 in zip(cuts[:-1], cuts[1:]):
        parts.append(_crossings_chunk(tri, hit[c0:c1], j0, k0, nk, counts[c0:c1], xs, ys, zs))
    return _Crossings(*(np.concatenate([p[n] for p in parts]) for n in range(4)))


def _crossings_chunk(tri, ids, j0, k0, nk, counts, xs, ys, zs):
    total = int(counts.sum())
    owner = np.repeat(np.arange(ids.size), counts)
    local = np.arange(total, dtype=np.int64) - np.repeat(np.cumsum(counts) - counts, counts)
    t_id = ids[owner]
    nk_t = nk[t_id]
    j = j0[t_id] + local // nk_t
    k = k0[t_id] + local % nk_t
    py = ys[j]
    pz = zs[k]
    a = tri[t_id, 0]
    b = tri[t_id, 1]
    c = tri[t_id, 2]
    s_ab = _edge_side(a[:, 1], a[:, 2], b[:, 1], b[:, 2], py, pz)
    s_bc = _edge_side(b[:, 1], b[:, 2], c[:, 1], c[:, 2], py, pz)
    inside = s_ab == s_bc
    s_ca = _edge_side(c[inside, 1], c[inside, 2], a[inside, 1], a[inside, 2], py[inside], pz[inside])
    keep = np.flatnonzero(inside)[s_ca == s_ab[inside]]
    a, b, c, py, pz, j, k = a[keep], b[keep], c[keep], py[keep], pz[keep], j[keep], k[keep]
    side = s_ab[keep]  # +1: triangle counter-clockwise in (y, z), outward normal towards +x
    # Crossing abscissa on the triangle's plane n . (q - a) = 0, clamped to the
    # triangle's x range (guards nearly edge-on triangles against rounding).
    e1 = b - a
    e2 = c - a
    n_x = e1[:, 1] * e2[:, 2] - e1[:, 2] * e2[:, 1]
    n_y = e1[:, 2] * e2[:, 0] - e1[:, 0] * e2[:, 2]
    n_z = e1[:, 0] * e2[:, 1] - e1[:, 1] * e2[:, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        x = a[:, 0] - (n_y * (py - a[:, 1]) + n_z * (pz - a[:, 2])) / n_x
    lo = np.minimum(np.minimum(a[:, 0], b[:, 0]), c[:, 0])
    hi = np.maximum(np.maximum(a[:, 0], b[:, 0]), c[:, 0])
    x = np.where(np.isfinite(x), np.clip(x, lo, hi), 0.5 * (lo + hi))
    i = np.searchsorted(xs, x, side="right").astype(np.int64)
    return i, j, k, (-side).astype(np.int8)


# --------------------------------------------------------------------------- dense tagging
def _solid_region(cr: _Crossings, shape3) -> tuple[tuple[slice, slice, slice], np.ndarray] | None:
    """Solid mask over the index box holding every solid centre, plus a one-cell margin.

    Returns ``(region, solid)`` with ``solid`` a bool array of the region's shape, or
    None when no row crosses the surface.
    """
    nx, ny, nz = shape3
    inside = cr.i < nx
    if not np.any(inside):
        return None
    i, j, k, w = cr.i[inside], cr.j[inside], cr.k[inside], cr.w[inside]
    # Cells at or beyond the last crossing of their row have winding zero for a
    # closed surface, so the box ends before max(i).
    i_lo, i_hi = int(i.min()), int(i.max())
    j_lo, j_hi = int(j.min()), int(j.max()) + 1
    k_lo, k_hi = int(k.min()), int(k.max()) + 1
    region = (
        slice(max(i_lo - 1, 0), min(i_hi + 1, nx)),
        slice(max(j_lo - 1, 0), min(j_hi + 1, ny)),
        slice(max(k_lo - 1, 0), min(k_hi + 1, nz)),
    )
    rshape = tuple(s.stop - s.start for s in region)
    d = np.zeros(rshape, dtype=np.int8)
    flat = ((i - region[0].start) * rshape[1] + (j - region[1].start)) * rshape[2] + (k - region[2].start)
    np.add.at(d.reshape(-1), flat, w)
    # Winding number: cumulative sum along x, one plane of rows at a time (numpy's
    # cumsum along the first axis is an order of magnitude slower).
    for p in range(1, rshape[0]):
        np.add(d[p], d[p - 1], out=d[p])
    return region, d != 0


def _neighbour_any(mask: np.ndarray) -> np.ndarray:
    """Cells with at least one face neighbour (inside the array) set in ``mask``."""
    out = np.zeros_like(mask)
    for ax in range(mask.ndim):
        if mask.shape[ax] < 2:
            continue
        lo = [slice(None)] * mask.ndim
        hi = [slice(None)] * mask.ndim
        lo[ax] = slice(0, -1)
        hi[ax] = slice(1, None)
        out[tuple(lo)] |= mask[tuple(hi)]
        out[tuple(hi)] |= mask[tuple(lo)]
    return out


def _tags_from_solid(solid: np.ndarray, interface: str) -> np.ndarray:
    """uint8 tags of a region from its solid mask (neighbours outside the region count as absent)."""
    tags = solid.view(np.uint8).copy()
    if interface == "fluid-side":
        ring = _neighbour_any(solid)
        ring &= ~solid
    else:
        ring = _neighbour_any(~solid)
        ring &= solid
        tags -= ring.view(np.uint8)
    tags += ring.view(np.uint8) << 1
    return tags


def _surface_arrays(surface) -> tuple[np.ndarray, np.ndarray]:
    return as_triangles(surface)


def _classify3(vertices, faces, grid: Grid, interface: str) -> tuple[np.ndarray, _Crossings]:
    shape3 = grid.shape if grid.ndim == 3 else (*grid.shape, 1)
    cr = _crossings(vertices, faces, *_axes3(grid))
    tags = np.zeros(shape3, dtype=np.uint8)
    found = _solid_region(cr, shape3)
    if found is not None:
        region, solid = found
        tags[region] = _tags_from_solid(solid, interface)
    return tags, cr


def _warn_if_empty(tags: np.ndarray, vertices: np.ndarray, grid: Grid, what: str = "grid") -> bool:
    """Warn (IbprepWarning) when no centre is solid; return True in that case."""
    if np.any(tags):
        return False
    lo = vertices.min(axis=0)[: grid.ndim]
    hi = vertices.max(axis=0)[: grid.ndim]
    outside = bool(np.any(hi < np.asarray(grid.lower)) or np.any(lo > np.asarray(grid.upper)))
    if outside:
        msg = (
            f"the body (bounds {np.round(lo, 6).tolist()} to {np.round(hi, 6).tolist()} m) lies wholly outside "
            f"the {what} ({list(grid.lower)} to {list(grid.upper)} m): every cell is fluid"
        )
    else:
        msg = (
            f"the body overlaps the {what} but contains no cell centre (spacing {grid.spacing:.6g} m): "
            "every cell is fluid; refine the grid or check the body's size"
        )
    warnings.warn(msg, IbprepWarning, stacklevel=3)
    return True


def classify(surface_in_world, grid: Grid, *, interface: str = "fluid-side") -> np.ndarray:
    """Tag every cell of a grid fluid, solid or interface.

    Parameters
    ----------
    surface_in_world : closed surface — anything :func:`ibprep.triangles.as_triangles`
        accepts (a ``trimesh.Trimesh``, a ``(vertices, faces)`` pair in metres, world
        frame; for a 2-D grid also a closed polygon, treated in the plane z = 0).
        Several disjoint or overlapping closed bodies may be given as one surface.
    grid : Grid — 2-D or 3-D.
    interface : {"fluid-side", "solid-side"}
        ``"fluid-side"``: fluid cells with a solid face neighbour are INTERFACE;
        ``"solid-side"``: solid cells with a fluid face neighbour are INTERFACE.
        Only neighbours inside the grid count.

    Returns
    -------
    tags : grid.shape uint8 — :class:`CellTag` codes.

    Raises
    ------
    InputError
        An unknown ``interface`` option, or a surface that is empty, non-finite or
        malformed.

    Warns
    -----
    IbprepWarning
        No cell centre is solid (the body is outside the grid or too small).

    Notes
    -----
    A centre is solid where the winding number of the surface about it is not
    zero. A centre exactly on the surface is tagged as if moved by
    ``(-d, +e, +e**2)``, ``d, e`` infinitesimal (see the module docstring), so
    shared edges and vertices are never counted twice.
    """
    interface = _check_interface(interface)
    grid = _check_grid(grid)
    vertices, faces = _surface_arrays(surface_in_world)
    tags, _ = _classify3(vertices, faces, grid, interface)
    tags = tags.reshape(grid.shape)
    _warn_if_empty(tags, vertices, grid)
    return tags


def classify_levels(surface_in_world, nested_grid: NestedGrid, *, interface: str = "fluid-side") -> tuple[np.ndarray, ...]:
    """Tag every level of a nested grid.

    Parameters
    ----------
    surface_in_world : closed surface — as for :func:`classify`.
    nested_grid : NestedGrid — base grid and refinement levels.
    interface : {"fluid-side", "solid-side"} — as for :func:`classify`.

    Returns
    -------
    tuple of uint8 arrays — one per level, coarsest first, each of that level's
    ``shape``; each level is tagged on its own (a refinement box that misses the
    body is all fluid).

    Warns
    -----
    IbprepWarning
        No centre of any level is solid.
    """
    interface = _check_interface(interface)
    if not isinstance(nested_grid, NestedGrid):
        raise InputError(
            f"nested_grid must be an ibprep.NestedGrid, got {type(nested_grid).__name__}; build one with ibprep.refine(...)"
        )
    vertices, faces = _surface_arrays(surface_in_world)
    out = tuple(_classify3(vertices, faces, g, interface)[0].reshape(g.shape) for g in nested_grid.levels)
    if not any(np.any(t) for t in out):
        _warn_if_empty(out[0], vertices, nested_grid.base, what="nested grid")
    return out


# --------------------------------------------------------------------------- moving bodies
@dataclass(frozen=True)
class Transition:
    """Tags after a body moved, and the cells whose solid membership changed.

    Attributes
    ----------
    tags : grid.shape uint8 — :class:`CellTag` codes at the new pose (a new array).
    fresh : (n,) int64 — sorted C-order flat indices of cells solid before and not
        solid now (fluid cells without a time history).
    covered : (m,) int64 — sorted flat indices of cells not solid before and solid now.
    region : tuple of slices — index box holding every cell whose tag may have
        changed (empty slices when nothing changed).
    body_outside : bool — no cell centre is solid at the new pose.
    """

    tags: np.ndarray
    fresh: np.ndarray
    covered: np.ndarray
    region: tuple[slice, ...]
    body_outside: bool

    def __post_init__(self) -> None:
        if self.tags.dtype != np.uint8:
            raise InputError(f"Transition.tags must be uint8, got {self.tags.dtype}")
        for name in ("fresh", "covered"):
            arr = getattr(self, name)
            if arr.ndim != 1 or arr.dtype != np.int64:
                raise InputError(f"Transition.{name} must be a 1-D int64 array, got {arr.dtype} of shape {arr.shape}")
        if len(self.region) != self.tags.ndim:
            raise InputError(f"Transition.region needs {self.tags.ndim} slices, got {len(self.region)}")


def _changed_runs(new: _Crossings, old: _Crossings, shape3):
    """Runs of cells whose solid membership differs between two crossing sets.

    Returns ``(fresh_flat, covered_flat)``, (n,) int64 C-order flat indices over
    ``shape3``, each sorted.
    """
    nx, ny, nz = shape3
    row = np.concatenate([new.j * nz + new.k, old.j * nz + old.k])
    pos = np.concatenate([new.i, old.i])
    wn = np.concatenate([new.w, np.zeros_like(old.w)]).astype(np.int32)
    wo = np.concatenate([np.zeros_like(new.w), old.w]).astype(np.int32)
    if row.size == 0:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    order = np.argsort(row * (nx + 1) + pos, kind="stable")
    row, pos, wn, wo = row[order], pos[order], wn[order], wo[order]
    cn = np.cumsum(wn)
    co = np.cumsum(wo)
    # Reset the running sums at each row's first event.
    first = np.ones(row.size, dtype=bool)
    first[1:] = row[1:] != row[:-1]
    start = np.maximum.accumulate(np.where(first, np.arange(row.size), 0))
    base_n = np.where(start > 0, cn[start - 1], 0)
    base_o = np.where(start > 0, co[start - 1], 0)
    solid_n = (cn - base_n) != 0
    solid_o = (co - base_o) != 0
    nxt = np.empty_like(pos)
    nxt[:-1] = pos[1:]
    last = np.ones(row.size, dtype=bool)
    last[:-1] = row[1:] != row[:-1]
    nxt[last] = nx
    run = (nxt > pos) & (solid_n != solid_o)
    out = []
    for which in (solid_o & ~solid_n, solid_n & ~solid_o):
        sel = np.flatnonzero(run & which)
        length = (np.minimum(nxt[sel], nx) - pos[sel]).astype(np.int64)
        length = np.maximum(length, 0)
        total = int(length.sum())
        rep = np.repeat(np.arange(sel.size), length)
        i = pos[sel][rep] + (np.arange(total, dtype=np.int64) - np.repeat(np.cumsum(length) - length, length))
        flat = i * (ny * nz) + row[sel][rep]
        out.append(np.sort(flat))
    return out[0], out[1]


def _neighbours_flat(flat: np.ndarray, shape3) -> np.ndarray:
    """Flat indices of the cells and their in-grid face neighbours (with repeats)."""
    idx = np.stack(np.unravel_index(flat, shape3), axis=-1)
    out = [flat]
    for ax in range(3):
        if shape3[ax] < 2:
            continue
        for step in (-1, 1):
            nb = idx.copy()
            nb[:, ax] += step
            ok = (nb[:, ax] >= 0) & (nb[:, ax] < shape3[ax])
            out.append(np.ravel_multi_index(tuple(nb[ok].T), shape3))
    return np.concatenate(out)


def step_tags(previous_tags, surface_now, grid: Grid, *, previous_surface, interface: str = "fluid-side") -> Transition:
    """Tags at a new pose from the previous step's tags, and the fresh and covered cells.

    Only the cells between the previous and the current surface along each row of
    centres are re-tagged (plus their face neighbours for the interface layer), so
    a step costs a copy of the tag array and work proportional to the surface
    rather than to the grid.

    Parameters
    ----------
    previous_tags : grid.shape uint8 — the tags of ``previous_surface`` on ``grid``
        with the same ``interface`` option, as returned by :func:`classify` or a
        previous :func:`step_tags` (not modified).
    surface_now : closed surface — the body at the new pose, world frame (as for
        :func:`classify`).
    grid : Grid
    previous_surface : closed surface — the body at the previous pose, world frame.
    interface : {"fluid-side", "solid-side"}

    Returns
    -------
    Transition
        Its ``tags`` equal ``classify(surface_now, grid, interface=interface)``.

    Raises
    ------
    InputError
        Bad ``interface``, a malformed surface, or ``previous_tags`` of the wrong
        shape or dtype.

    Warns
    -----
    IbprepWarning
        No cell centre is solid at the new pose (``Transition.body_outside``).
    """
    interface = _check_interface(interface)
    grid = _check_grid(grid)
    prev = np.asarray(previous_tags)
    if prev.shape != grid.shape or prev.dtype != np.uint8:
        raise InputError(
            f"previous_tags must be a uint8 array of the grid's shape {grid.shape}, got {prev.dtype} of shape {prev.shape}; "
            "pass the tags returned by classify() or step_tags() for this grid"
        )
    v_now, f_now = _surface_arrays(surface_now)
    v_old, f_old = _surface_arrays(previous_surface)
    shape3 = grid.shape if grid.ndim == 3 else (*grid.shape, 1)
    axes = _axes3(grid)
    new = _crossings(v_now, f_now, *axes)
    old = _crossings(v_old, f_old, *axes)
    fresh, covered = _changed_runs(new, old, shape3)
    tags = prev.copy()
    flat_tags = tags.reshape(-1)
    flat_tags[covered] = CellTag.SOLID
    flat_tags[fresh] = CellTag.FLUID
    changed = np.concatenate([fresh, covered])
    if changed.size:
        cand = np.unique(_neighbours_flat(changed, shape3))
        if interface == "fluid-side":
            is_solid = flat_tags == CellTag.SOLID
        else:
            is_solid = flat_tags != CellTag.FLUID
        # Recompute the tags of the candidates from solid membership alone.
        nbr = np.stack(np.unravel_index(cand, shape3), axis=-1)
        solid_c = is_solid[cand]
        # fluid-side: does a neighbour hold solid? solid-side: does a neighbour hold fluid?
        want = interface == "fluid-side"
        any_other = np.zeros(cand.size, dtype=bool)
        for ax in range(3):
            if shape3[ax] < 2:
                continue
            for step in (-1, 1):
                nb = nbr.copy()
                nb[:, ax] += step
                ok = (nb[:, ax] >= 0) & (nb[:, ax] < shape3[ax])
                fl = np.ravel_multi_index(tuple(np.where(ok[:, None], nb, 0).T), shape3)
                any_other |= ok & (is_solid[fl] == want)
        new_tag = solid_c.astype(np.uint8)
        if interface == "fluid-side":
            new_tag[~solid_c & any_other] = CellTag.INTERFACE
        else:
            new_tag[solid_c & any_other] = CellTag.INTERFACE
        flat_tags[cand] = new_tag
        box = nbr.min(axis=0), nbr.max(axis=0) + 1
        region3 = tuple(slice(int(a), int(b)) for a, b in zip(*box))
    else:
        region3 = (slice(0, 0),) * 3
    region = region3[: grid.ndim]
    outside = not np.any(flat_tags)
    if outside:
        _warn_if_empty(flat_tags, v_now, grid)
    return Transition(tags=tags, fresh=fresh, covered=covered, region=region, body_outside=outside)
