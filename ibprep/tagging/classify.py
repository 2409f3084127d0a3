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
(``d`` much larger than ``e``: along x a crossing at the centre itself never
counts). For a box whose faces lie on planes of centres, the solid centres are those in
``(x0, x1] x [y0, y1) x [z0, z1)``; two face-adjacent boxes give the same tags as
the merged box. The crossing abscissa is compared with the centres exactly as
well: it is computed in floating point with a proven error bound, and the few
crossings within that bound of a centre are recomputed in exact rational
arithmetic, so every centre, on the surface or off it, is tagged as the rule says.

Cost
----
Work and transient memory are confined to the index box of the body: the crossing
enumeration (compiled; the numpy reference path holds a few hundred bytes per
candidate in chunks of at most about 80 MB) costs 25 bytes per lattice point
covered by a projected triangle's bounding box, the winding sum one byte per cell of
the box, the interface layer two more; the tag array itself is the only
whole-grid allocation. Winding numbers are summed in int8, which would wrap only
past 127 nested layers of surface along one row. The floating-point filter
assumes coordinates far from overflow and underflow (anything between about
1e-100 and 1e100 metres).

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
from dataclasses import dataclass, field
from enum import IntEnum
from fractions import Fraction

import numba
import numpy as np
from llvmlite import ir as _llvm_ir
from numba.core import types as _nb_types
from numba.extending import intrinsic as _nb_intrinsic

from ..errors import IbprepWarning, InputError
from ..grid import Grid, NestedGrid
from ..geometry.triangles import as_triangles

__all__ = ["CellTag", "Transition", "classify", "classify_levels", "label_bodies", "step_tags", "surface_components"]


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

# Safety factor on the first-order error bound of the crossing abscissa (second-order terms, and the
# rounding of the bound itself, are far below it).
_ABSCISSA_SAFETY = 2.0

# Lattice candidates handled per chunk: the enumeration holds about 200 bytes per
# candidate, so a chunk needs about 80 MB (a single triangle covering more lattice
# points than this is still one chunk).
_CANDIDATES_PER_CHUNK = 400_000


def _check_interface(interface) -> str:
    if interface not in INTERFACE_MODES:
        raise InputError(
            f"interface must be one of {INTERFACE_MODES}, got {interface!r}; "
            "'fluid-side' tags fluid cells next to the body, 'solid-side' solid cells next to the fluid"
        )
    return interface


def _check_grid(grid) -> Grid:
    if not isinstance(grid, Grid):
        hint = "; for refinement levels use classify_levels()" if isinstance(grid, NestedGrid) else ""
        raise InputError(
            f"grid must be an ibprep.Grid, got {type(grid).__name__}; build one with ibprep.Grid(...){hint}"
        )
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


def _abscissa_error_coefficients(e1x, e2x, dyab, dzab, e2y, e2z, n_x, ky, kz, bad):
    """(cy, cz): the crossing abscissa ``ax - (qy ky + qz kz)`` is within
    ``2 (|qy| cy + |qz| cz + eps (|qy ky + qz kz| + |x|))`` of the exact one; inf where no bound holds.

    First-order bound of the rounding of the edge differences (eps each), the normal's
    components (4 eps of the sum of their products' magnitudes), the slopes ky = n_y / n_x,
    kz = n_z / n_x, and the products with qy, qz. A triangle whose normal's x component is not
    well above its own error (nearly edge-on in projection) gets no bound: its crossings are all
    computed exactly. Works on arrays and, through the compiled twin, on scalars.
    """
    a = np.abs(dyab * e2z) + np.abs(dzab * e2y)
    b_y = np.abs(dzab * e2x) + np.abs(e1x * e2z)
    b_z = np.abs(e1x * e2y) + np.abs(dyab * e2x)
    dnx = 4.0 * _EPS * a
    denom = np.abs(n_x) - dnx
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        dky = (4.0 * _EPS * b_y + np.abs(ky) * dnx) / denom + 3.0 * _EPS * np.abs(ky)
        dkz = (4.0 * _EPS * b_z + np.abs(kz) * dnx) / denom + 3.0 * _EPS * np.abs(kz)
    none = bad | ~(denom > dnx) | ~np.isfinite(dky) | ~np.isfinite(dkz)
    return np.where(none, np.inf, dky), np.where(none, np.inf, dkz)


def _abscissa_sure(xs, i, x, qy, qz, s, cy, cz) -> np.ndarray:
    """Whether ``i = searchsorted(xs, x, 'right')`` is proven right for the exact abscissa (see above)."""
    err = _ABSCISSA_SAFETY * (np.abs(qy) * cy + np.abs(qz) * cz + _EPS * (np.abs(s) + np.abs(x)))
    n = xs.size
    with np.errstate(invalid="ignore"):
        above = np.where(i < n, xs[np.minimum(i, n - 1)] - x, np.inf) > err
        below = np.where(i > 0, x - xs[np.maximum(i - 1, 0)], np.inf) > err
    return above & below


def _exact_first_beyond(tri, py, pz, xs, guess) -> np.ndarray:
    """searchsorted(xs, x*, 'right') for the exact crossing abscissae x* (fractions.Fraction; few calls).

    tri : (n, 3, 3) float — the triangles' vertices; py, pz : (n,) float — the rows; guess : (n,) int.
    """
    F = Fraction
    out = np.empty(len(py), np.int64)
    n = xs.size
    for q, ((x0, y0, z0), (x1, y1, z1), (x2, y2, z2)) in enumerate(tri.tolist()):
        x0, y0, z0, x1, y1, z1, x2, y2, z2 = (F(c) for c in (x0, y0, z0, x1, y1, z1, x2, y2, z2))
        nx = (y1 - y0) * (z2 - z0) - (z1 - z0) * (y2 - y0)
        ny = (z1 - z0) * (x2 - x0) - (x1 - x0) * (z2 - z0)
        nz = (x1 - x0) * (y2 - y0) - (y1 - y0) * (x2 - x0)
        xc = x0 - (ny * (F(py[q]) - y0) + nz * (F(pz[q]) - z0)) / nx  # nx != 0: zero areas are never crossed
        i = int(guess[q])
        while i < n and F(float(xs[i])) <= xc:
            i += 1
        while i > 0 and F(float(xs[i - 1])) > xc:
            i -= 1
        out[q] = i
    return out


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
    row_sorted: bool = False


def _axes3(grid: Grid) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Centre coordinates along x, y, z; a 2-D grid is the plane z = 0."""
    ax = grid.axes()
    if grid.ndim == 2:
        return ax[0], ax[1], np.zeros(1)
    return ax


# Rows of the per-triangle table used by the enumeration (one gather per candidate).
_AY, _AZ, _BY, _BZ, _CY, _CZ, _DYAB, _DZAB, _DYBC, _DZBC, _DYCA, _DZCA, _AX, _KY, _KZ, _XLO, _XHI = range(17)
# Further rows: the vertices' x (for the exact fallback) and the abscissa's error coefficients.
_X0, _X1, _X2, _ECY, _ECZ = range(17, 22)


def _lattice_range(axis: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Index range [first, stop) of the sorted centre coordinates ``axis`` lying in [lo, hi].

    Same result as ``searchsorted(axis, lo, 'left')``, ``searchsorted(axis, hi,
    'right')`` (several times faster for many queries): an arithmetic guess from
    the uniform spacing, made exact by comparisons with the centre coordinates
    themselves (padded with -inf / +inf).
    """
    n = axis.size
    ext = np.concatenate([[-np.inf], axis, [np.inf]])
    h = axis[1] - axis[0] if n > 1 else 1.0
    first = np.ceil((lo - axis[0]) / h)
    np.clip(first, 0, n, out=first)
    first = first.astype(np.int64)
    stop = np.floor((hi - axis[0]) / h) + 1
    np.clip(stop, 0, n, out=stop)
    stop = stop.astype(np.int64)
    # The guess is off by at most one cell (its rounding is ~1e-16 of the index).
    first += ext[first + 1] < lo  # axis[first] < lo: move right
    first -= ext[first] >= lo  # axis[first - 1] >= lo: move left
    stop += ext[stop + 1] <= hi
    stop -= ext[stop] > hi
    return first, stop


def _crossings_numpy(vertices: np.ndarray, faces: np.ndarray, xs, ys, zs) -> _Crossings:
    """All crossings of the centre rows (y_j, z_k) along x with the triangles (numpy reference of :func:`_crossings`)."""
    vt = np.ascontiguousarray(vertices.T)
    ft = np.ascontiguousarray(faces.T)
    y0, y1, y2 = vt[1][ft[0]], vt[1][ft[1]], vt[1][ft[2]]
    z0, z1, z2 = vt[2][ft[0]], vt[2][ft[1]], vt[2][ft[2]]
    j0, j1 = _lattice_range(ys, np.minimum(np.minimum(y0, y1), y2), np.maximum(np.maximum(y0, y1), y2))
    k0, k1 = _lattice_range(zs, np.minimum(np.minimum(z0, z1), z2), np.maximum(np.maximum(z0, z1), z2))
    nj = j1 - j0
    nk = k1 - k0
    hit = np.flatnonzero((nj > 0) & (nk > 0))
    empty = _Crossings(*(np.empty(0, np.int64) for _ in range(3)), np.empty(0, np.int8))
    if hit.size == 0:
        return empty
    y0, y1, y2, z0, z1, z2 = y0[hit], y1[hit], y2[hit], z0[hit], z1[hit], z2[hit]
    # Triangles with exactly zero projected area are never crossed by a moved row.
    nonzero = np.flatnonzero(_orient_sign(y0, z0, y1, z1, y2, z2) != 0)
    if nonzero.size == 0:
        return empty
    hit = hit[nonzero]
    y0, y1, y2, z0, z1, z2 = y0[nonzero], y1[nonzero], y2[nonzero], z0[nonzero], z1[nonzero], z2[nonzero]
    x0, x1, x2 = vt[0][ft[0][hit]], vt[0][ft[1][hit]], vt[0][ft[2][hit]]
    table = np.empty((22, hit.size))
    table[_AY], table[_AZ] = y0, z0
    table[_BY], table[_BZ] = y1, z1
    table[_CY], table[_CZ] = y2, z2
    table[_DYAB], table[_DZAB] = y1 - y0, z1 - z0
    table[_DYBC], table[_DZBC] = y2 - y1, z2 - z1
    table[_DYCA], table[_DZCA] = y0 - y2, z0 - z2
    # Crossing abscissa on the plane n . (q - a) = 0: x = ax - ky (py - ay) - kz (pz - az)
    # with ky = n_y / n_x, kz = n_z / n_x (n_x != 0: the projected area is not zero).
    e1x, e1y, e1z = x1 - x0, table[_DYAB], table[_DZAB]
    e2x, e2y, e2z = x2 - x0, y2 - y0, z2 - z0
    n_x = e1y * e2z - e1z * e2y
    n_y = e1z * e2x - e1x * e2z
    n_z = e1x * e2y - e1y * e2x
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ky = n_y / n_x
        kz = n_z / n_x
    bad = ~(np.isfinite(ky) & np.isfinite(kz))  # n_x underflowed: use the mid abscissa
    ky[bad] = 0.0
    kz[bad] = 0.0
    xlo = np.minimum(np.minimum(x0, x1), x2)
    xhi = np.maximum(np.maximum(x0, x1), x2)
    table[_AX] = np.where(bad, 0.5 * (xlo + xhi), x0)
    table[_KY], table[_KZ] = ky, kz
    table[_XLO] = xlo
    table[_XHI] = xhi
    table[_X0], table[_X1], table[_X2] = x0, x1, x2
    table[_ECY], table[_ECZ] = _abscissa_error_coefficients(e1x, e2x, e1y, e1z, e2y, e2z, n_x, ky, kz, bad)
    counts = (nj[hit] * nk[hit]).astype(np.int64)
    ends = np.cumsum(counts)
    starts = ends - counts
    # Chunk boundaries on whole triangles so each chunk enumerates at most about
    # _CANDIDATES_PER_CHUNK lattice candidates (a single huge triangle is its own chunk).
    cuts = [0]
    while cuts[-1] < hit.size:
        nxt = int(np.searchsorted(ends, starts[cuts[-1]] + _CANDIDATES_PER_CHUNK, side="right"))
        cuts.append(max(nxt, cuts[-1] + 1))
    jj0, kk0, nnk = j0[hit], k0[hit], nk[hit]
    parts = []
    for c0, c1 in zip(cuts[:-1], cuts[1:]):
        parts.append(
            _crossings_chunk(table[:, c0:c1], jj0[c0:c1], kk0[c0:c1], nnk[c0:c1], counts[c0:c1], xs, ys, zs)
        )
    return _Crossings(*(np.concatenate([p[n] for p in parts]) for n in range(4)))


def _side_filtered(ay, az, dy, dz, py, pz):
    """Left-of-edge flag and whether the floating-point sign is proven (Shewchuk's bound)."""
    left = py - ay  # qy
    right = pz - az  # qz
    right *= dy  # l = dy * qz
    left *= dz  # r = dz * qy
    det = right - left
    np.abs(right, out=right)
    np.abs(left, out=left)
    right += left
    right *= _CCW_ERRBOUND
    sure = np.abs(det) > right
    return det > 0, sure


def _crossings_chunk(T, j0, k0, nk, counts, xs, ys, zs):
    """Crossings of one chunk of triangles (columns of the per-triangle table T)."""
    total = int(counts.sum())
    owner = np.repeat(np.arange(counts.size), counts)
    local = np.arange(total, dtype=np.int64)
    local -= np.repeat(np.cumsum(counts) - counts, counts)
    nk_o = np.repeat(nk, counts)
    j = local // nk_o
    k = local - j * nk_o
    j += np.repeat(j0, counts)
    k += np.repeat(k0, counts)
    py = ys[j]
    pz = zs[k]
    G = np.repeat(T[:_AX], counts, axis=1)  # (12, n) edge data, rows contiguous
    l_ab, s_ab = _side_filtered(G[_AY], G[_AZ], G[_DYAB], G[_DZAB], py, pz)
    l_bc, s_bc = _side_filtered(G[_BY], G[_BZ], G[_DYBC], G[_DZBC], py, pz)
    l_ca, s_ca = _side_filtered(G[_CY], G[_CZ], G[_DYCA], G[_DZCA], py, pz)
    sure = s_ab & s_bc & s_ca
    inside = sure & (l_ab == l_bc) & (l_bc == l_ca)
    unsure = np.flatnonzero(~sure)
    if unsure.size:
        # Exact predicates with simulation-of-simplicity ties for the few candidates
        # the filter could not settle.
        g = G[:, unsure]
        qy, qz = py[unsure], pz[unsure]
        e_ab = _edge_side(g[_AY], g[_AZ], g[_BY], g[_BZ], qy, qz)
        e_bc = _edge_side(g[_BY], g[_BZ], g[_CY], g[_CZ], qy, qz)
        e_ca = _edge_side(g[_CY], g[_CZ], g[_AY], g[_AZ], qy, qz)
        inside[unsure] = (e_ab == e_bc) & (e_bc == e_ca)
        l_ab[unsure] = e_ab > 0
    keep = np.flatnonzero(inside)
    g = np.take(T[_AX:], owner[keep], axis=1)  # plane rows only
    py, pz = py[keep], pz[keep]
    row_y, row_z = py.copy(), pz.copy()
    py -= G[_AY][keep]
    pz -= G[_AZ][keep]
    qy, qz = py.copy(), pz.copy()
    py *= g[_KY - _AX]
    pz *= g[_KZ - _AX]
    py += pz
    x = g[0] - py
    np.clip(x, g[_XLO - _AX], g[_XHI - _AX], out=x)  # guards nearly edge-on triangles against rounding
    i = np.searchsorted(xs, x, side="right").astype(np.int64)
    # Crossings within rounding of a centre: the exact abscissa decides (the rule along x is exact too).
    unsure = np.flatnonzero(~_abscissa_sure(xs, i, x, qy, qz, py, g[_ECY - _AX], g[_ECZ - _AX]))
    if unsure.size:
        gu = g[:, unsure]
        tri = np.stack([np.stack([gu[_X0 - _AX], G[_AY][keep][unsure], G[_AZ][keep][unsure]], -1),
                        np.stack([gu[_X1 - _AX], G[_BY][keep][unsure], G[_BZ][keep][unsure]], -1),
                        np.stack([gu[_X2 - _AX], G[_CY][keep][unsure], G[_CZ][keep][unsure]], -1)], axis=1)
        i[unsure] = _exact_first_beyond(tri, row_y[unsure], row_z[unsure], xs, i[unsure])
    # All edges see the row on their left: counter-clockwise in (y, z), outward
    # normal towards +x, the row leaves the body (-1); else it enters (+1).
    w = np.where(l_ab[keep], -1, 1).astype(np.int8)
    return i, j[keep], k[keep], w


# --------------------------------------------------------------------------- compiled crossings
# The same enumeration as _crossings_numpy, one triangle and one lattice point at a
# time, with the same floating-point expressions in the same order (fastmath off, so
# no re-association or fused multiply-add): every crossing it reports is bit for bit
# the one the numpy path reports. A triangle needing exact arithmetic (a zero-area
# test or an edge test the floating-point filter cannot settle) is handed back whole
# to the numpy path, which owns the rational fallback and the simulation-of-simplicity
# ties.
_JIT = dict(cache=True, nogil=True, fastmath=False, error_model="numpy")


@numba.njit(**_JIT)
def _range_nb(axis, inv_h, lo, hi):
    """[first, stop) of the centres of ``axis`` in [lo, hi]; scalar twin of _lattice_range.

    The guess from the uniform spacing (``inv_h`` = 1 / spacing) is made exact by
    comparisons with the centre coordinates themselves.
    """
    n = axis.size
    g = (lo - axis[0]) * inv_h
    first = 0 if not g > 0.0 else (n if g >= n else int(g))
    g = (hi - axis[0]) * inv_h
    stop = 0 if not g >= 0.0 else (n if g >= n else int(g) + 1)
    while first < n and axis[first] < lo:
        first += 1
    while first > 0 and axis[first - 1] >= lo:
        first -= 1
    while stop < n and axis[stop] <= hi:
        stop += 1
    while stop > 0 and axis[stop - 1] > hi:
        stop -= 1
    return first, stop


@numba.njit(**_JIT)
def _point_range_nb(axis, inv_h, y):
    """``_range_nb(axis, inv_h, y, y)`` with one guess: [first, stop) of the centres equal to y (stop - first is 0 or 1)."""
    n = axis.size
    g = (y - axis[0]) * inv_h
    first = 0 if not g > 0.0 else (n if g >= n else int(g))
    while first < n and axis[first] < y:
        first += 1
    while first > 0 and axis[first - 1] >= y:
        first -= 1
    stop = first
    while stop < n and axis[stop] <= y:
        stop += 1
    return first, stop


@numba.njit(**_JIT)
def _first_beyond_nb(xs, inv_h, x):
    """searchsorted(xs, x, side='right') for uniformly spaced sorted xs (guess, then exact comparisons)."""
    n = xs.size
    g = (x - xs[0]) * inv_h
    i = 0 if not g >= 0.0 else (n if g >= n else int(g) + 1)
    while i < n and xs[i] <= x:
        i += 1
    while i > 0 and xs[i - 1] > x:
        i -= 1
    return i


@numba.njit(inline="always", **_JIT)
def _plane_abscissa_nb(x0, x1, x2, dyab, dzab, e2y, e2z):
    """(ax, ky, kz, xlo, xhi, cy, cz): the crossing of row (py, pz) is ax - ((py - y0) ky + (pz - z0) kz),
    clipped to [xlo, xhi]; the mid abscissa if the normal's x component underflowed. cy, cz: the
    error coefficients of :func:`_abscissa_error_coefficients` (inf: compute every crossing exactly)."""
    e1x = x1 - x0
    e2x = x2 - x0
    n_x = dyab * e2z - dzab * e2y
    n_y = dzab * e2x - e1x * e2z
    n_z = e1x * e2y - dyab * e2x
    ky = n_y / n_x
    kz = n_z / n_x
    xlo = min(min(x0, x1), x2)
    xhi = max(max(x0, x1), x2)
    ax = x0
    bad = not (np.isfinite(ky) and np.isfinite(kz))
    if bad:  # n_x underflowed: the mid abscissa
        ky = 0.0
        kz = 0.0
        ax = 0.5 * (xlo + xhi)
    a = abs(dyab * e2z) + abs(dzab * e2y)
    b_y = abs(dzab * e2x) + abs(e1x * e2z)
    b_z = abs(e1x * e2y) + abs(dyab * e2x)
    dnx = 4.0 * _EPS * a
    denom = abs(n_x) - dnx
    cy = np.inf
    cz = np.inf
    if not bad and denom > dnx:
        cy = (4.0 * _EPS * b_y + abs(ky) * dnx) / denom + 3.0 * _EPS * abs(ky)
        cz = (4.0 * _EPS * b_z + abs(kz) * dnx) / denom + 3.0 * _EPS * abs(kz)
        if not (np.isfinite(cy) and np.isfinite(cz)):
            cy = np.inf
            cz = np.inf
    return ax, ky, kz, xlo, xhi, cy, cz


@numba.njit(inline="always", **_JIT)
def _abscissa_sure_nb(xs, i, x, qy, qz, s, cy, cz):
    """Scalar twin of :func:`_abscissa_sure`: is centre index i proven right for the exact abscissa?"""
    err = _ABSCISSA_SAFETY * (abs(qy) * cy + abs(qz) * cz + _EPS * (abs(s) + abs(x)))
    n = xs.size
    if i < n and not (xs[i] - x > err):
        return False
    if i > 0 and not (x - xs[i - 1] > err):
        return False
    return True


@numba.njit(inline="always", **_JIT)
def _edge_sides_nb(py, pz, y0, z0, y1, z1, y2, z2, dyab, dzab, dybc, dzbc, dyca, dzca):
    """(sure, l_ab, l_bc, l_ca): :func:`_side_filtered` for the three edges, same expressions."""
    r = (pz - z0) * dyab
    s = (py - y0) * dzab
    d = r - s
    sure = abs(d) > (abs(r) + abs(s)) * _CCW_ERRBOUND
    l_ab = d > 0
    r = (pz - z1) * dybc
    s = (py - y1) * dzbc
    d = r - s
    sure = sure and abs(d) > (abs(r) + abs(s)) * _CCW_ERRBOUND
    l_bc = d > 0
    r = (pz - z2) * dyca
    s = (py - y2) * dzca
    d = r - s
    sure = sure and abs(d) > (abs(r) + abs(s)) * _CCW_ERRBOUND
    l_ca = d > 0
    return sure, l_ab, l_bc, l_ca


@numba.njit(**_JIT)
def _crossings_nb(vx, vy, vz, f0, f1, f2, xs, ys, zs):
    """Crossings of every triangle the filter settles; returns (i, j, k, w, count, exact).

    ``exact`` lists the triangles left to the numpy path (exact arithmetic needed).
    """
    m = f0.size
    inv_hx = 1.0 / (xs[1] - xs[0]) if xs.size > 1 else 1.0
    inv_hy = 1.0 / (ys[1] - ys[0]) if ys.size > 1 else 1.0
    inv_hz = 1.0 / (zs[1] - zs[0]) if zs.size > 1 else 1.0
    j0s = np.empty(m, np.int64)
    j1s = np.empty(m, np.int64)
    k0s = np.empty(m, np.int64)
    k1s = np.empty(m, np.int64)
    status = np.zeros(m, np.int8)  # 0 skip, 1 enumerate, 2 exact (numpy path)
    total = 0
    for t in range(m):
        a, b, c = f0[t], f1[t], f2[t]
        y0, y1, y2 = vy[a], vy[b], vy[c]
        z0, z1, z2 = vz[a], vz[b], vz[c]
        j0, j1 = _range_nb(ys, inv_hy, min(min(y0, y1), y2), max(max(y0, y1), y2))
        k0, k1 = _range_nb(zs, inv_hz, min(min(z0, z1), z2), max(max(z0, z1), z2))
        if j1 <= j0 or k1 <= k0:
            continue
        # Zero projected area (exactly) -> never crossed; _orient_sign's cases.
        dy = y1 - y0
        dz = z1 - z0
        qy = y2 - y0
        qz = z2 - z0
        left = dy * qz
        right = dz * qy
        det = left - right
        if not (abs(det) > _CCW_ERRBOUND * (abs(left) + abs(right))):
            if (y0 == y1 and z0 == z1) or (y1 == y2 and z1 == z2) or (y2 == y0 and z2 == z0):
                continue  # two vertices coincide in projection (an edge along x): exactly zero area
            left0 = dy == 0.0 or qz == 0.0
            right0 = dz == 0.0 or qy == 0.0
            if left0 and right0:
                continue  # exactly zero area
            if not (left0 or right0):
                status[t] = 2
                continue
        j0s[t], j1s[t], k0s[t], k1s[t] = j0, j1, k0, k1
        status[t] = 1
        total += (j1 - j0) * (k1 - k0)
    out_i = np.empty(total, np.int64)
    out_j = np.empty(total, np.int64)
    out_k = np.empty(total, np.int64)
    out_w = np.empty(total, np.int8)
    n = 0
    for t in range(m):
        if status[t] != 1:
            continue
        a, b, c = f0[t], f1[t], f2[t]
        x0, x1, x2 = vx[a], vx[b], vx[c]
        y0, y1, y2 = vy[a], vy[b], vy[c]
        z0, z1, z2 = vz[a], vz[b], vz[c]
        dyab, dzab = y1 - y0, z1 - z0
        dybc, dzbc = y2 - y1, z2 - z1
        dyca, dzca = y0 - y2, z0 - z2
        ax, ky, kz, xlo, xhi, cy, cz = _plane_abscissa_nb(x0, x1, x2, dyab, dzab, y2 - y0, z2 - z0)
        start = n
        for j in range(j0s[t], j1s[t]):
            py = ys[j]
            for k in range(k0s[t], k1s[t]):
                pz = zs[k]
                sure, l_ab, l_bc, l_ca = _edge_sides_nb(py, pz, y0, z0, y1, z1, y2, z2, dyab, dzab, dybc, dzbc,
                                                        dyca, dzca)
                if not sure:
                    status[t] = 2
                    break
                if l_ab != l_bc or l_bc != l_ca:
                    continue
                qy = py - y0
                qz = pz - z0
                s = qy * ky + qz * kz
                x = ax - s
                x = min(max(x, xlo), xhi)
                i = _first_beyond_nb(xs, inv_hx, x)
                if not _abscissa_sure_nb(xs, i, x, qy, qz, s, cy, cz):
                    status[t] = 2  # within rounding of a centre: the numpy path decides exactly
                    break
                out_i[n] = i
                out_j[n] = j
                out_k[n] = k
                out_w[n] = -1 if l_ab else 1
                n += 1
            if status[t] == 2:
                break
        if status[t] == 2:
            n = start  # drop this triangle's crossings: the numpy path redoes it
    exact = np.flatnonzero(status == 2)
    return out_i, out_j, out_k, out_w, n, exact


def _crossings(vertices: np.ndarray, faces: np.ndarray, xs, ys, zs) -> _Crossings:
    """All crossings of the centre rows (y_j, z_k) along x with the triangles.

    Compiled enumeration (:func:`_crossings_nb`); the few triangles that need exact
    arithmetic go through :func:`_crossings_numpy`. The crossings equal the numpy
    path's bit for bit (``tests/test_classify_step.py`` checks it); only their order
    may differ.
    """
    vt = np.ascontiguousarray(vertices.T, dtype=np.float64)
    ft = np.ascontiguousarray(faces.T, dtype=np.int64)
    i, j, k, w, n, exact = _crossings_nb(vt[0], vt[1], vt[2], ft[0], ft[1], ft[2], xs, ys, zs)
    i, j, k, w = i[:n], j[:n], k[:n], w[:n]
    if exact.size:
        rest = _crossings_numpy(vertices, faces[exact], xs, ys, zs)
        i, j, k, w = (np.concatenate([p, q]) for p, q in zip((i, j, k, w), (rest.i, rest.j, rest.k, rest.w)))
    return _Crossings(i, j, k, w)


# --------------------------------------------------------------------------- crossings grouped by row (stepping)
@dataclass(frozen=True)
class _Rows:
    """Crossings grouped by row of centres: the compact form a step keeps and compares.

    The rows ``(j, k)`` of the index box ``j0 <= j < j0 + nj``, ``k0 <= k < k0 + nk``
    are numbered ``r = (j - j0) * nk + (k - k0)`` (the order of ``j * nz + k``); the
    crossings of row ``r`` are ``i[start[r]:start[r + 1]]``, ascending, with their
    signs ``w[start[r]:start[r + 1]]``.

    start : (nj * nk + 1,) int64. i : (c,) int32 (int64 on a grid of 2**31 - 1 or
    more centres along x). w : (c,) int8, +1 entering, -1 leaving.
    """

    j0: int
    k0: int
    nj: int
    nk: int
    start: np.ndarray
    i: np.ndarray
    w: np.ndarray

    def expanded(self) -> _Crossings:
        """The same crossings as a row-sorted :class:`_Crossings` (int64 indices)."""
        r = np.repeat(np.arange(self.nj * self.nk, dtype=np.int64), np.diff(self.start))
        j, k = np.divmod(r, max(self.nk, 1))
        return _Crossings(self.i.astype(np.int64), j + self.j0, k + self.k0, self.w.copy(), row_sorted=True)


def _i_proto(nx: int) -> np.ndarray:
    """Empty array of the dtype that holds a centre index 0..nx along x (int32 unless the grid is huge)."""
    return np.empty(0, np.int32 if nx < 2**31 - 1 else np.int64)


@numba.njit(**_JIT)
def _group_rows_nb(r, i, w, nrows, i_proto):
    """Counting sort of crossings by row number ``r`` (0..nrows-1), ascending ``i`` within a row.

    Returns ``(start, si, sw)`` as :class:`_Rows` holds them. Each crossing is
    inserted in order into its row's bucket (rows hold a handful of crossings).
    """
    n = r.size
    start = np.zeros(nrows + 1, np.int64)
    for c in range(n):
        start[r[c] + 1] += 1
    for q in range(nrows):
        start[q + 1] += start[q]
    fill = start[:-1].copy()
    si = np.empty(n, i_proto.dtype)
    sw = np.empty(n, np.int8)
    for c in range(n):
        q = r[c]
        lo = start[q]
        p = fill[q]
        fill[q] = p + 1
        val = i[c]
        while p > lo and si[p - 1] > val:
            si[p] = si[p - 1]
            sw[p] = sw[p - 1]
            p -= 1
        si[p] = val
        sw[p] = w[c]
    return start, si, sw


def _row_sorted(cr, shape3) -> _Rows:
    """Crossings grouped by row (compiled; :func:`_row_sorted_numpy` is the reference order).

    A :class:`_Rows` is returned as is; a :class:`_Crossings` is grouped over the
    index box of its own rows.
    """
    if isinstance(cr, _Rows):
        return cr
    nx = shape3[0]
    if cr.i.size == 0:
        return _Rows(0, 0, 0, 0, np.zeros(1, np.int64), _i_proto(nx), np.empty(0, np.int8))
    j0, k0 = int(cr.j.min()), int(cr.k.min())
    nj, nk = int(cr.j.max()) - j0 + 1, int(cr.k.max()) - k0 + 1
    r = (cr.j - j0) * nk + (cr.k - k0)
    start, si, sw = _group_rows_nb(r, cr.i, cr.w, nj * nk, _i_proto(nx))
    return _Rows(j0, k0, nj, nk, start, si, sw)


@numba.njit(**_JIT)
def _crossing_rows_nb(v, f, xs, ys, zs, cap, i_proto):
    """:func:`_crossings_nb`'s crossings grouped by row, in one pass over the triangles.

    Same predicates and abscissae, same expressions (bit for bit). The rows are
    numbered over the index box of all vertices' (y, z) extents, which holds every
    triangle's lattice range; each triangle is enumerated as soon as it is set up,
    into buffers of ``cap`` crossings that grow by doubling, and each row's count
    is kept on the way for the counting sort at the end.

    ``v``: (n, 3) vertices, ``f``: (m, 3) faces, both C-contiguous (no transposed
    copies: a triangle's data are adjacent).

    Returns ``(j0, k0, nj, nk, start, i, w, exact)``: the :class:`_Rows` fields,
    and the triangles left to the numpy path (exact arithmetic needed), whose
    crossings are not included.
    """
    m = f.shape[0]
    inv_hx = 1.0 / (xs[1] - xs[0]) if xs.size > 1 else 1.0
    inv_hy = 1.0 / (ys[1] - ys[0]) if ys.size > 1 else 1.0
    inv_hz = 1.0 / (zs[1] - zs[0]) if zs.size > 1 else 1.0
    # Lattice range of each vertex: a triangle's range [first of its lowest
    # coordinate, stop of its highest) is the min of its vertices' firsts and the
    # max of their stops (both are monotone in the coordinate).
    nv = v.shape[0]
    vj = np.empty((nv, 2), np.int64)
    vk = np.empty((nv, 2), np.int64)
    jb, je, kb, ke = ys.size, 0, zs.size, 0
    for q in range(nv):
        j0, j1 = _point_range_nb(ys, inv_hy, v[q, 1])
        k0, k1 = _point_range_nb(zs, inv_hz, v[q, 2])
        vj[q, 0], vj[q, 1], vk[q, 0], vk[q, 1] = j0, j1, k0, k1
        jb, je, kb, ke = min(jb, j0), max(je, j1), min(kb, k0), max(ke, k1)
    nj = max(je - jb, 0)
    nk = max(ke - kb, 0)
    count = np.zeros(nj * nk + 1, np.int64)
    cap = max(cap, 16)
    out_r = np.empty(cap, np.int64)
    out_i = np.empty(cap, i_proto.dtype)
    out_w = np.empty(cap, np.int8)
    out_x = np.empty(cap, np.float64)  # crossing abscissae, until their centre index is found
    out_e = np.empty(cap, np.float64)  # and their error bounds
    exact = np.empty(m, np.int64)
    ne = 0
    n = 0
    for t in range(m):
        a, b, c = f[t, 0], f[t, 1], f[t, 2]
        j0 = min(min(vj[a, 0], vj[b, 0]), vj[c, 0])
        j1 = max(max(vj[a, 1], vj[b, 1]), vj[c, 1])
        if j1 <= j0:
            continue
        k0 = min(min(vk[a, 0], vk[b, 0]), vk[c, 0])
        k1 = max(max(vk[a, 1], vk[b, 1]), vk[c, 1])
        if k1 <= k0:
            continue
        y0, y1, y2 = v[a, 1], v[b, 1], v[c, 1]
        z0, z1, z2 = v[a, 2], v[b, 2], v[c, 2]
        # Zero projected area (exactly) -> never crossed; _orient_sign's cases.
        dyab = y1 - y0
        dzab = z1 - z0
        e2y = y2 - y0
        e2z = z2 - z0
        left = dyab * e2z
        right = dzab * e2y
        det = left - right
        if not (abs(det) > _CCW_ERRBOUND * (abs(left) + abs(right))):
            if (y0 == y1 and z0 == z1) or (y1 == y2 and z1 == z2) or (y2 == y0 and z2 == z0):
                continue  # two vertices coincide in projection (an edge along x): exactly zero area
            left0 = dyab == 0.0 or e2z == 0.0
            right0 = dzab == 0.0 or e2y == 0.0
            if left0 and right0:
                continue  # exactly zero area
            if not (left0 or right0):
                exact[ne] = t
                ne += 1
                continue
        need = n + (j1 - j0) * (k1 - k0)
        if need > out_r.size:
            grown = max(2 * out_r.size, need)
            r2 = np.empty(grown, np.int64)
            i2 = np.empty(grown, i_proto.dtype)
            w2 = np.empty(grown, np.int8)
            r2[:n] = out_r[:n]
            i2[:n] = out_i[:n]
            w2[:n] = out_w[:n]
            out_r, out_i, out_w = r2, i2, w2
            out_x = np.empty(grown, np.float64)  # holds only the current triangle's
            out_e = np.empty(grown, np.float64)
        x0, x1, x2 = v[a, 0], v[b, 0], v[c, 0]
        dybc, dzbc = y2 - y1, z2 - z1
        dyca, dzca = y0 - y2, z0 - z2
        ax, ky, kz, xlo, xhi, cy, cz = _plane_abscissa_nb(x0, x1, x2, dyab, dzab, e2y, e2z)
        first = n
        # Rows of at most 3 candidates (small triangles): the in/out branch would
        # mispredict often, so every candidate is written and kept by n += inside.
        # Longer rows keep the branch (it follows the row's one inside run).
        short = k1 - k0 <= 3
        unsure = False
        for j in range(j0, j1):
            py = ys[j]
            rj = (j - jb) * nk - kb
            for k in range(k0, k1):
                pz = zs[k]
                sure, l_ab, l_bc, l_ca = _edge_sides_nb(py, pz, y0, z0, y1, z1, y2, z2, dyab, dzab, dybc, dzbc,
                                                        dyca, dzca)
                if not sure:
                    unsure = True
                    break
                inside = (l_ab == l_bc) & (l_bc == l_ca)
                if inside | short:
                    qy = py - y0
                    qz = pz - z0
                    s = qy * ky + qz * kz
                    x = min(max(ax - s, xlo), xhi)
                    out_x[n] = x
                    out_e[n] = _ABSCISSA_SAFETY * (abs(qy) * cy + abs(qz) * cz + _EPS * (abs(s) + abs(x)))
                    out_r[n] = rj + k
                    out_w[n] = -1 if l_ab else 1
                    n += inside
            if unsure:
                break
        if unsure:
            n = first  # drop this triangle's crossings: the numpy path redoes it
            exact[ne] = t
            ne += 1
            continue
        for q in range(first, n):
            iq = _first_beyond_nb(xs, inv_hx, out_x[q])
            if (iq < xs.size and not (xs[iq] - out_x[q] > out_e[q])) or (iq > 0 and not (out_x[q] - xs[iq - 1] > out_e[q])):
                unsure = True  # within rounding of a centre: the numpy path decides exactly
                break
            out_i[q] = iq
        if unsure:
            n = first
            exact[ne] = t
            ne += 1
            continue
        for q in range(first, n):
            count[out_r[q] + 1] += 1
    # Counting sort by row; each crossing is inserted in order into its row's bucket.
    for q in range(nj * nk):
        count[q + 1] += count[q]
    fill = count[:-1].copy()
    si = np.empty(n, i_proto.dtype)
    sw = np.empty(n, np.int8)
    for c in range(n):
        q = out_r[c]
        lo = count[q]
        p = fill[q]
        fill[q] = p + 1
        val = out_i[c]
        while p > lo and si[p - 1] > val:
            si[p] = si[p - 1]
            sw[p] = sw[p - 1]
            p -= 1
        si[p] = val
        sw[p] = out_w[c]
    return jb, kb, nj, nk, count, si, sw, exact[:ne]


def _crossing_rows(vertices: np.ndarray, faces: np.ndarray, xs, ys, zs, cap: int = 0) -> _Rows:
    """All crossings of the centre rows with the triangles, grouped by row (for stepping).

    Compiled (:func:`_crossing_rows_nb`); the few triangles that need exact
    arithmetic go through :func:`_crossings_numpy` and are merged in. Equal to
    ``_row_sorted_numpy(_crossings_numpy(...))`` (``tests/test_classify_step.py``
    checks it). ``cap``: expected number of crossings (the buffers grow past it).
    """
    v = np.ascontiguousarray(vertices, dtype=np.float64)
    f = np.ascontiguousarray(faces, dtype=np.int64)
    proto = _i_proto(xs.size)
    j0, k0, nj, nk, start, i, w, exact = _crossing_rows_nb(v, f, xs, ys, zs, max(int(cap), 2 * f.shape[0]), proto)
    if exact.size:
        rest = _crossings_numpy(vertices, faces[exact], xs, ys, zs)
        # Every triangle's lattice range lies in the box of all vertices.
        r = np.concatenate([np.repeat(np.arange(nj * nk, dtype=np.int64), np.diff(start)), (rest.j - j0) * nk + (rest.k - k0)])
        start, i, w = _group_rows_nb(r, np.concatenate([i, rest.i.astype(i.dtype)]), np.concatenate([w, rest.w]), nj * nk, proto)
    return _Rows(int(j0), int(k0), int(nj), int(nk), start, i, w)


# --------------------------------------------------------------------------- dense tagging
@numba.njit(**_JIT)
def _solid_box_nb(i, j, k, nx):
    """Index bounds of the crossings inside the grid along x: (i_lo, i_hi, j_lo, j_hi, k_lo, k_hi).

    ``i_hi`` is nx when some crossing lies past the last centre; ``j_hi``, ``k_hi``
    are exclusive. ``i_lo > i_hi`` when no crossing lies inside the grid.
    """
    big = np.iinfo(np.int64).max
    i_lo, i_hi, j_lo, j_hi, k_lo, k_hi = big, -1, big, -1, big, -1
    beyond = False
    for c in range(i.size):
        if i[c] >= nx:
            beyond = True
            continue
        i_lo = min(i_lo, i[c])
        i_hi = max(i_hi, i[c])
        j_lo = min(j_lo, j[c])
        j_hi = max(j_hi, j[c])
        k_lo = min(k_lo, k[c])
        k_hi = max(k_hi, k[c])
    if beyond and i_hi >= 0:
        i_hi = nx
    return i_lo, i_hi, j_lo, j_hi + 1, k_lo, k_hi + 1


@numba.njit(**_JIT)
def _rows_solid_box_nb(j0, k0, nk, start, i, nx):
    """:func:`_solid_box_nb` for crossings grouped by row (:class:`_Rows` fields)."""
    big = np.iinfo(np.int64).max
    i_lo, i_hi, j_lo, j_hi, k_lo, k_hi = big, -1, big, -1, big, -1
    beyond = False
    for r in range(start.size - 1):
        j = j0 + r // nk
        k = k0 + r % nk
        for c in range(start[r], start[r + 1]):
            if i[c] >= nx:
                beyond = True
                continue
            i_lo = min(i_lo, np.int64(i[c]))
            i_hi = max(i_hi, np.int64(i[c]))
            j_lo = min(j_lo, j)
            j_hi = max(j_hi, j)
            k_lo = min(k_lo, k)
            k_hi = max(k_hi, k)
    if beyond and i_hi >= 0:
        i_hi = nx
    return i_lo, i_hi, j_lo, j_hi + 1, k_lo, k_hi + 1


def _solid_box(cr, shape3) -> tuple[slice, slice, slice] | None:
    """Index box holding every solid centre of the crossings, plus a one-cell margin (None: no crossing in the grid).

    The margin holds the interface layer, so every cell a tagging leaves non-fluid
    lies in this box.
    """
    nx, ny, nz = shape3
    # Cells at or beyond the last crossing of their row have winding zero for a
    # closed surface, so the box ends before max(i) -- unless some row leaves the
    # body only past the grid's last centre: then the box runs to the grid's end.
    if isinstance(cr, _Rows):
        i_lo, i_hi, j_lo, j_hi, k_lo, k_hi = _rows_solid_box_nb(cr.j0, cr.k0, cr.nk, cr.start, cr.i, nx)
    else:
        i_lo, i_hi, j_lo, j_hi, k_lo, k_hi = _solid_box_nb(cr.i, cr.j, cr.k, nx)
    if i_lo > i_hi:
        return None
    return (
        slice(max(i_lo - 1, 0), min(i_hi + 1, nx)),
        slice(max(j_lo - 1, 0), min(j_hi + 1, ny)),
        slice(max(k_lo - 1, 0), min(k_hi + 1, nz)),
    )


def _solid_region(cr: _Crossings, shape3) -> tuple[tuple[slice, slice, slice], np.ndarray] | None:
    """Solid mask over the index box holding every solid centre, plus a one-cell margin.

    Returns ``(region, solid)`` with ``solid`` a bool array of the region's shape, or
    None when no row crosses the surface.
    """
    region = _solid_box(cr, shape3)
    if region is None:
        return None
    inside = cr.i < shape3[0]
    i, j, k, w = cr.i[inside], cr.j[inside], cr.k[inside], cr.w[inside]
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


def _classify3(vertices, faces, grid: Grid, interface: str) -> tuple[np.ndarray, _Crossings, bool]:
    """Tags of shape (nx, ny, nz) (nz = 1 for a 2-D grid), the crossings, and whether any centre is solid."""
    shape3 = grid.shape if grid.ndim == 3 else (*grid.shape, 1)
    cr = _crossings(vertices, faces, *_axes3(grid))
    tags = np.zeros(shape3, dtype=np.uint8)
    found = _solid_region(cr, shape3)
    any_solid = False
    if found is not None:
        region, solid = found
        tags[region] = _tags_from_solid(solid, interface)
        any_solid = bool(solid.any())
    return tags, cr, any_solid


def _warn_if_open(cr: _Crossings, shape3) -> int:
    """Warn (IbprepWarning) when some row crosses the surface unevenly; return the count of such rows.

    For a closed, consistently oriented surface every row enters the body as often
    as it leaves it (the predicates are exact, so this holds without tolerance).
    """
    if cr.i.size == 0:
        return 0
    _, ny, nz = shape3
    balance = np.bincount(cr.j * nz + cr.k, weights=cr.w, minlength=ny * nz)
    return _warn_open_rows(int(np.count_nonzero(balance)), stacklevel=4)


def _warn_open_rows(bad: int, stacklevel: int = 3) -> int:
    """Warn (IbprepWarning) when ``bad`` rows cross the surface unevenly; return ``bad``."""
    if bad:
        warnings.warn(
            f"the surface is not closed or not consistently oriented: {bad} rows of cell centres enter it "
            "more often than they leave it (or the reverse), so the tags along those rows are unreliable; "
            "give a watertight surface with outward (or uniformly inward) normals",
            IbprepWarning,
            stacklevel=stacklevel,
        )
    return bad


def _warn_if_empty(any_solid: bool, vertices: np.ndarray, grid: Grid, what: str = "grid") -> bool:
    """Warn (IbprepWarning) when no centre is solid; return True in that case."""
    if any_solid:
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
    surface_in_world : closed surface — anything :func:`ibprep.geometry.triangles.as_triangles`
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
        No cell centre is solid (the body is outside the grid or too small); or
        the surface is not closed: some row of centres enters it more often than
        it leaves it.

    Notes
    -----
    A centre is solid where the winding number of the surface about it is not
    zero. A centre exactly on the surface is tagged as if moved by
    ``(-d, +e, +e**2)``, ``d, e`` infinitesimal (see the module docstring), so
    shared edges and vertices are never counted twice.
    """
    interface = _check_interface(interface)
    grid = _check_grid(grid)
    vertices, faces = as_triangles(surface_in_world)
    tags, cr, any_solid = _classify3(vertices, faces, grid, interface)
    _warn_if_open(cr, tags.shape)
    _warn_if_empty(any_solid, vertices, grid)
    return tags.reshape(grid.shape)


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
    vertices, faces = as_triangles(surface_in_world)
    out, any_solid = [], False
    for g in nested_grid.levels:
        tags, cr, solid_here = _classify3(vertices, faces, g, interface)
        _warn_if_open(cr, tags.shape)
        out.append(tags.reshape(g.shape))
        any_solid |= solid_here
    _warn_if_empty(any_solid, vertices, nested_grid.base, what="nested grid")
    return tuple(out)


def surface_components(surface) -> tuple[np.ndarray, int]:
    """Connected components of a triangle surface (faces sharing a vertex position).

    Parameters
    ----------
    surface : closed surface — anything :func:`ibprep.geometry.triangles.as_triangles` accepts.

    Returns
    -------
    component : (m,) int64 — component number of each face, 0-based, numbered in
        order of each component's first face.
    count : int — number of components.

    Notes
    -----
    Vertices with bitwise-equal coordinates are merged first, so an unwelded
    triangle soup (as read from STL) is grouped correctly.
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    vertices, faces = as_triangles(surface)
    _, weld = np.unique(vertices, axis=0, return_inverse=True)
    f = weld.reshape(-1)[faces]
    n = int(weld.max()) + 1
    edges = np.concatenate([f[:, [0, 1]], f[:, [1, 2]]])
    graph = coo_matrix((np.ones(edges.shape[0], np.int8), (edges[:, 0], edges[:, 1])), shape=(n, n))
    _, vertex_label = connected_components(graph, directed=False)
    raw = vertex_label[f[:, 0]]
    # Renumber by first face.
    first = np.full(raw.max() + 1, faces.shape[0], dtype=np.int64)
    np.minimum.at(first, raw, np.arange(faces.shape[0]))
    used = np.flatnonzero(first < faces.shape[0])
    rank = np.empty(raw.max() + 1, dtype=np.int64)
    rank[used[np.argsort(first[used])]] = np.arange(used.size)
    return rank[raw], int(used.size)


def label_bodies(surface_in_world, grid: Grid) -> tuple[np.ndarray, int]:
    """Number the solid cells by the body (connected surface component) holding them.

    Parameters
    ----------
    surface_in_world : closed surface — as for :func:`classify`; each connected
        component of the surface is one body.
    grid : Grid — 2-D or 3-D.

    Returns
    -------
    labels : grid.shape uint16 (int32 beyond 65535 bodies) — 0 for cells outside
        every body, ``b + 1`` for cells inside body ``b`` (the numbering of
        :func:`surface_components`); where bodies overlap, the higher number wins.
    count : int — number of bodies.

    Notes
    -----
    Each body is tagged on its own with the rule of :func:`classify`, so cells
    with a non-zero label are exactly the solid cells of :func:`classify` when the
    bodies do not overlap. Costs one tagging per body; :func:`classify` does not
    pay for it.
    """
    grid = _check_grid(grid)
    vertices, faces = as_triangles(surface_in_world)
    comp, count = surface_components((vertices, faces))
    shape3 = grid.shape if grid.ndim == 3 else (*grid.shape, 1)
    labels = np.zeros(shape3, dtype=np.uint16 if count < 65535 else np.int32)
    axes = _axes3(grid)
    order = np.argsort(comp, kind="stable")
    bounds = np.searchsorted(comp[order], np.arange(count + 1))
    for b in range(count):  # one pass per body, not per triangle
        found = _solid_region(_crossings(vertices, faces[order[bounds[b] : bounds[b + 1]]], *axes), shape3)
        if found is not None:
            region, solid = found
            labels[region][solid] = b + 1
    return labels.reshape(grid.shape), count


# --------------------------------------------------------------------------- moving bodies
@dataclass(frozen=True, eq=False)
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

    A Transition can be passed back to :func:`step_tags` as ``previous``: it keeps
    the row crossings of its surface (private), so the next step does not
    recompute them.
    """

    tags: np.ndarray
    fresh: np.ndarray
    covered: np.ndarray
    region: tuple[slice, ...]
    body_outside: bool
    _crossings: _Rows | None = field(default=None, repr=False, compare=False)
    _grid: Grid | None = field(default=None, repr=False, compare=False)
    _interface: str | None = field(default=None, repr=False, compare=False)
    _axes: tuple | None = field(default=None, repr=False, compare=False)
    _spent: bool = field(default=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if not isinstance(self.tags, np.ndarray) or self.tags.dtype != np.uint8:
            raise InputError(f"Transition.tags must be a uint8 array, got {getattr(self.tags, 'dtype', type(self.tags))}")
        for name in ("fresh", "covered"):
            arr = getattr(self, name)
            if not isinstance(arr, np.ndarray) or arr.ndim != 1 or arr.dtype != np.int64:
                raise InputError(f"Transition.{name} must be a 1-D int64 array, got {arr!r:.60}")
        if len(self.region) != self.tags.ndim:
            raise InputError(f"Transition.region needs {self.tags.ndim} slices, got {len(self.region)}")


def _row_sorted_numpy(cr: _Crossings, shape3) -> _Crossings:
    """The crossings ordered by row, then by position along the row (numpy reference of :func:`_row_sorted`)."""
    if cr.row_sorted:
        return cr
    nx, ny, nz = shape3
    order = np.argsort((cr.j * nz + cr.k) * (nx + 1) + cr.i)
    return _Crossings(cr.i[order], cr.j[order], cr.k[order], cr.w[order], row_sorted=True)


def _changed_runs(new: _Crossings, old: _Crossings, shape3):
    """Runs of cells whose solid membership differs between two crossing sets (numpy reference of :func:`_changed_cells`).

    Returns ``(fresh_flat, covered_flat, any_solid_now)``: sorted (n,) int64 C-order
    flat indices over ``shape3``, and whether any centre is solid for ``new``.
    """
    nx, ny, nz = shape3
    new, old = _row_sorted_numpy(new, shape3), _row_sorted_numpy(old, shape3)
    row = np.concatenate([new.j * nz + new.k, old.j * nz + old.k])
    pos = np.concatenate([new.i, old.i])
    if row.size == 0:
        return np.empty(0, np.int64), np.empty(0, np.int64), False
    wn = np.concatenate([new.w, np.zeros_like(old.w)]).astype(np.int32)
    wo = np.concatenate([np.zeros_like(new.w), old.w]).astype(np.int32)
    # Two sorted runs: the stable sort (timsort for integers) merges them in linear time.
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
    nxt = np.minimum(nxt, nx)
    nonempty = nxt > pos
    any_solid_now = bool(np.any(solid_n & nonempty))
    run = nonempty & (solid_n != solid_o)
    out = []
    for which in (solid_o & ~solid_n, solid_n & ~solid_o):
        sel = np.flatnonzero(run & which)
        length = (nxt[sel] - pos[sel]).astype(np.int64)
        total = int(length.sum())
        rep = np.repeat(np.arange(sel.size), length)
        i = pos[sel][rep] + (np.arange(total, dtype=np.int64) - np.repeat(np.cumsum(length) - length, length))
        out.append(np.sort(i * (ny * nz) + row[sel][rep]))
    return out[0], out[1], any_solid_now


@numba.njit(**_JIT)
def _changed_nb(nj0, nk0, nnj, nnk, ns, ni, nw, oj0, ok0, onj, onk, os_, oi, ow, nx, ny, nz):
    """Walk two crossing sets grouped by row (:class:`_Rows` fields, new then old); cells whose solid membership differs.

    Rows are visited in increasing ``j * nz + k`` over the union of the two boxes.
    Returns ``(fresh, covered, any_solid_new, open_rows_new, box)``: sorted C-order
    flat indices, whether any centre is solid for the new set, the number of rows
    whose new crossings do not sum to zero (as :func:`_warn_if_open` counts them),
    and the inclusive index bounds ``(i_lo, i_hi, j_lo, j_hi, k_lo, k_hi)`` of the
    changed cells (``i_lo > i_hi`` when none changed).
    """
    nn, no = ni.size, oi.size
    nyz = ny * nz
    # An empty box takes no part in the union.
    if nn == 0:
        nnj = 0
    if no == 0:
        onj = 0
    jlo = min(nj0 if nnj > 0 else ny, oj0 if onj > 0 else ny)
    jhi = max(nj0 + nnj if nnj > 0 else 0, oj0 + onj if onj > 0 else 0)
    klo = min(nk0 if nnj > 0 else nz, ok0 if onj > 0 else nz)
    khi = max(nk0 + nnk if nnj > 0 else 0, ok0 + onk if onj > 0 else 0)
    # Runs of changed cells [lo, hi) along a row, fresh (f) and covered (c) apart;
    # each event ends at most one run. diff_*: +1 at a run's start, -1 at its stop.
    f_lo = np.empty(nn + no, np.int64)
    f_hi = np.empty(nn + no, np.int64)
    f_row = np.empty(nn + no, np.int64)
    c_lo = np.empty(nn + no, np.int64)
    c_hi = np.empty(nn + no, np.int64)
    c_row = np.empty(nn + no, np.int64)
    diff_f = np.zeros(nx + 1, np.int64)
    diff_c = np.zeros(nx + 1, np.int64)
    nf = 0
    nc = 0
    any_solid = False
    open_rows = 0
    # Bounds of the rows holding a run (j, k inclusive).
    jmin, jmax, kmin, kmax = ny, -1, nz, -1
    for j in range(jlo, jhi):
        in_n = nnj > 0 and nj0 <= j < nj0 + nnj
        in_o = onj > 0 and oj0 <= j < oj0 + onj
        if not (in_n or in_o):
            continue
        for k in range(klo, khi):
            a = a1 = b = b1 = 0
            if in_n and nk0 <= k < nk0 + nnk:
                q = (j - nj0) * nnk + (k - nk0)
                a, a1 = ns[q], ns[q + 1]
            if in_o and ok0 <= k < ok0 + onk:
                q = (j - oj0) * onk + (k - ok0)
                b, b1 = os_[q], os_[q + 1]
            if a == a1 and b == b1:
                continue
            row = j * nz + k
            nf0, nc0 = nf, nc
            if a1 - a == 2 and b1 - b == 2 and nw[a] + nw[a + 1] == 0 and ow[b] + ow[b + 1] == 0:
                # The common row: one solid interval [p0, p1) now, [q0, q1) before
                # (a closed row crossing twice; i <= nx).
                p0, p1 = np.int64(ni[a]), np.int64(ni[a + 1])
                q0, q1 = np.int64(oi[b]), np.int64(oi[b + 1])
                any_solid |= p1 > p0
                if p0 == q0 and p1 == q1:
                    continue
                # covered = [p0, p1) minus [q0, q1); fresh = [q0, q1) minus [p0, p1).
                hi = min(p1, q0)
                if hi > p0:
                    c_lo[nc], c_hi[nc], c_row[nc] = p0, hi, row
                    nc += 1
                lo = max(p0, q1)
                if p1 > lo:
                    c_lo[nc], c_hi[nc], c_row[nc] = lo, p1, row
                    nc += 1
                hi = min(q1, p0)
                if hi > q0:
                    f_lo[nf], f_hi[nf], f_row[nf] = q0, hi, row
                    nf += 1
                lo = max(q0, p1)
                if q1 > lo:
                    f_lo[nf], f_hi[nf], f_row[nf] = lo, q1, row
                    nf += 1
            else:
                total = 0
                for c in range(a, a1):
                    total += nw[c]
                open_rows += total != 0
                same = (a1 - a) == (b1 - b)
                if same:
                    for c in range(a1 - a):
                        if ni[a + c] != oi[b + c] or nw[a + c] != ow[b + c]:
                            same = False
                            break
                if same and any_solid:
                    continue
                cn = 0
                co = 0
                while a < a1 or b < b1:
                    if b >= b1 or (a < a1 and ni[a] <= oi[b]):
                        p = np.int64(ni[a])
                        cn += nw[a]
                        a += 1
                    else:
                        p = np.int64(oi[b])
                        co += ow[b]
                        b += 1
                    q = np.int64(nx)
                    if a < a1:
                        q = min(q, np.int64(ni[a]))
                    if b < b1:
                        q = min(q, np.int64(oi[b]))
                    if q <= p:
                        continue
                    any_solid |= cn != 0
                    if cn != 0 and co == 0:
                        c_lo[nc], c_hi[nc], c_row[nc] = p, q, row
                        nc += 1
                    elif co != 0 and cn == 0:
                        f_lo[nf], f_hi[nf], f_row[nf] = p, q, row
                        nf += 1
            if nf > nf0 or nc > nc0:
                jmin, jmax = min(jmin, j), max(jmax, j)
                kmin, kmax = min(kmin, k), max(kmax, k)
    # Counting sort by the cell's position along the row (the slowest C-order
    # index): rows are visited in increasing order, so each bucket fills sorted
    # and the output is in C order without a comparison sort. Bucket sizes come
    # from the runs' ends (a difference array), not cell by cell.
    ilo, ihi = nx, -1
    for r in range(nf):
        diff_f[f_lo[r]] += 1
        diff_f[f_hi[r]] -= 1
        ilo, ihi = min(ilo, f_lo[r]), max(ihi, f_hi[r] - 1)
    for r in range(nc):
        diff_c[c_lo[r]] += 1
        diff_c[c_hi[r]] -= 1
        ilo, ihi = min(ilo, c_lo[r]), max(ihi, c_hi[r] - 1)
    # diff -> bucket starts: running count of open runs = cells at c; their prefix sum.
    open_f = 0
    open_c = 0
    sum_f = 0
    sum_c = 0
    for c in range(nx + 1):
        open_f += diff_f[c]
        open_c += diff_c[c]
        diff_f[c] = sum_f
        diff_c[c] = sum_c
        sum_f += open_f
        sum_c += open_c
    fresh = np.empty(sum_f, np.int64)
    covered = np.empty(sum_c, np.int64)
    for r in range(nf):
        row = f_row[r]
        for c in range(f_lo[r], f_hi[r]):
            fresh[diff_f[c]] = c * nyz + row
            diff_f[c] += 1
    for r in range(nc):
        row = c_row[r]
        for c in range(c_lo[r], c_hi[r]):
            covered[diff_c[c]] = c * nyz + row
            diff_c[c] += 1
    box = np.array([ilo, ihi, jmin, jmax, kmin, kmax], np.int64)
    if ihi < 0:
        box[:] = np.array([nx, -1, ny, -1, nz, -1], np.int64)
    return fresh, covered, any_solid, open_rows, box


def _changed_cells(new, old, shape3, with_box: bool = False):
    """Cells whose solid membership differs between two crossing sets (compiled twin of :func:`_changed_runs`).

    ``new``, ``old``: :class:`_Crossings` or :class:`_Rows`. Returns
    ``(fresh_flat, covered_flat, any_solid_now)`` as :func:`_changed_runs` does, and
    the number of rows crossing ``new`` unevenly (see :func:`_warn_if_open`); with
    ``with_box``, also the inclusive index bounds of the changed cells.
    """
    nx, ny, nz = shape3
    n, o = _row_sorted(new, shape3), _row_sorted(old, shape3)
    fresh, covered, any_solid, open_rows, box = _changed_nb(
        n.j0, n.k0, n.nj, n.nk, n.start, n.i, n.w, o.j0, o.k0, o.nj, o.nk, o.start, o.i, o.w, nx, ny, nz
    )
    if with_box:
        return fresh, covered, bool(any_solid), int(open_rows), box
    return fresh, covered, bool(any_solid), int(open_rows)


def _neighbours(flat: np.ndarray, shape3) -> list[tuple[np.ndarray, np.ndarray]]:
    """For each of the 6 face directions: (neighbour flat index, in-grid flag) of each cell."""
    nx, ny, nz = shape3
    i, rem = np.divmod(flat, ny * nz)
    j, k = np.divmod(rem, nz)
    out = []
    for coord, n, stride in ((i, nx, ny * nz), (j, ny, nz), (k, nz, 1)):
        if n < 2:
            continue
        out.append((flat - stride, coord > 0))
        out.append((flat + stride, coord < n - 1))
    return out


def _retag(flat_tags: np.ndarray, fresh: np.ndarray, covered: np.ndarray, shape3, interface: str) -> tuple[slice, ...]:
    """Update, in place, the interface layer around the cells whose membership changed.

    ``flat_tags`` already holds SOLID at ``covered`` and FLUID at ``fresh``. Cells
    next to a cell that joined the interface's partner side are set directly; cells
    that may have lost their only partner neighbour are re-checked. Only these
    cells and their neighbours are read. Returns the index box of the cells that
    may have changed.
    """
    if interface == "fluid-side":
        # Interface = non-solid cells with a solid neighbour.
        joined, left, partner, plain = covered, fresh, CellTag.SOLID, CellTag.FLUID
    else:
        # Interface = solid cells with a fluid neighbour.
        joined, left, partner, plain = fresh, covered, CellTag.FLUID, CellTag.SOLID
    # Neighbours of cells that joined the partner side become interface unless they
    # are partner cells themselves.
    for nb, ok in _neighbours(joined, shape3):
        nb = nb[ok]
        flat_tags[nb[flat_tags[nb] != partner]] = CellTag.INTERFACE
    # Cells that left the partner side, and interface neighbours of theirs, are re-checked.
    near = [left]
    for nb, ok in _neighbours(left, shape3):
        nb = nb[ok]
        near.append(nb[flat_tags[nb] == CellTag.INTERFACE])
    check = np.concatenate(near)
    # `left` cells now hold the non-partner code; re-checked cells are all non-partner.
    has_partner = np.zeros(check.size, dtype=bool)
    for nb, ok in _neighbours(check, shape3):
        has_partner |= ok & (flat_tags[np.where(ok, nb, check)] == partner)
    flat_tags[check] = np.where(has_partner, np.uint8(CellTag.INTERFACE), np.uint8(plain))
    nx, ny, nz = shape3
    changed = np.concatenate([fresh, covered])
    i, rem = np.divmod(changed, ny * nz)
    j, k = np.divmod(rem, nz)
    return tuple(
        slice(max(int(c.min()) - 1, 0), min(int(c.max()) + 2, n)) for c, n in ((i, nx), (j, ny), (k, nz))
    )


@numba.njit(**_JIT)
def _set_interface_nb(flat_tags, cell, i, j, k, partner, plain, nx, ny, nz):
    """Tag non-partner cell (i, j, k) INTERFACE if a face neighbour in the grid is a partner cell, else ``plain``."""
    nyz = ny * nz
    found = (
        (i > 0 and flat_tags[cell - nyz] == partner)
        or (i < nx - 1 and flat_tags[cell + nyz] == partner)
        or (j > 0 and flat_tags[cell - nz] == partner)
        or (j < ny - 1 and flat_tags[cell + nz] == partner)
        or (k > 0 and flat_tags[cell - 1] == partner)
        or (k < nz - 1 and flat_tags[cell + 1] == partner)
    )
    flat_tags[cell] = 2 if found else plain  # 2 = CellTag.INTERFACE


@numba.njit(**_JIT)
def _recheck_nb(flat_tags, cell, i, j, k, partner, plain, nx, ny, nz):
    """Re-check cell (i, j, k) that left the partner side, then its interface face neighbours."""
    nyz = ny * nz
    _set_interface_nb(flat_tags, cell, i, j, k, partner, plain, nx, ny, nz)
    if i > 0 and flat_tags[cell - nyz] == 2:
        _set_interface_nb(flat_tags, cell - nyz, i - 1, j, k, partner, plain, nx, ny, nz)
    if i < nx - 1 and flat_tags[cell + nyz] == 2:
        _set_interface_nb(flat_tags, cell + nyz, i + 1, j, k, partner, plain, nx, ny, nz)
    if j > 0 and flat_tags[cell - nz] == 2:
        _set_interface_nb(flat_tags, cell - nz, i, j - 1, k, partner, plain, nx, ny, nz)
    if j < ny - 1 and flat_tags[cell + nz] == 2:
        _set_interface_nb(flat_tags, cell + nz, i, j + 1, k, partner, plain, nx, ny, nz)
    if k > 0 and flat_tags[cell - 1] == 2:
        _set_interface_nb(flat_tags, cell - 1, i, j, k - 1, partner, plain, nx, ny, nz)
    if k < nz - 1 and flat_tags[cell + 1] == 2:
        _set_interface_nb(flat_tags, cell + 1, i, j, k + 1, partner, plain, nx, ny, nz)


@_nb_intrinsic
def _prefetch_nb(typingctx, arr, idx):
    """Hint the cache line holding ``arr[idx]`` in, for writing (LLVM's prefetch; never faults, so no bounds check)."""
    if not isinstance(arr, _nb_types.Array) or not isinstance(idx, _nb_types.Integer):
        return None

    def codegen(context, builder, signature, args):
        aryty, idxty = signature.args
        data = context.make_array(aryty)(context, builder, args[0]).data
        ptr = builder.gep(data, [context.cast(builder, args[1], idxty, _nb_types.intp)])
        i8p = builder.bitcast(ptr, _llvm_ir.IntType(8).as_pointer())
        i32 = _llvm_ir.IntType(32)
        fnty = _llvm_ir.FunctionType(_llvm_ir.VoidType(), [i8p.type, i32, i32, i32])
        fn = builder.module.declare_intrinsic("llvm.prefetch", [i8p.type], fnty)
        builder.call(fn, [i8p, i32(1), i32(3), i32(1)])  # write, keep in all levels, data
        return context.get_dummy_value()

    return _nb_types.void(arr, idx), codegen


# Cells ahead whose neighbours' cache lines the retag kernel asks for: the cells
# are sparse in a large array, so each neighbour is a miss, and prefetching lets
# many misses be in flight at once.
_PREFETCH_AHEAD = 16


@numba.njit(**_JIT)
def _divmod_nb(a, b, inv_b):
    """``divmod(a, b)`` for 0 <= a < 2**52, b > 0, ``inv_b = 1.0 / b``: a floating-point guess, corrected once.

    The guess is off by at most one (its relative error is about 1e-16), and
    integer divisions by a divisor only known at run time are slow.
    """
    q = np.int64(a * inv_b)
    r = a - q * b
    if r < 0:
        q -= 1
        r += b
    elif r >= b:
        q += 1
        r -= b
    return q, r


@numba.njit(**_JIT)
def _retag_nb(flat_tags, joined, left, partner, plain, nx, ny, nz, set_members):
    """Compiled twin of :func:`_retag`'s updates (same rules, one cell at a time).

    Each cell's (i, j, k) is found once; its neighbours' follow by offsets. With
    ``set_members``, first give the ``joined`` cells the partner code and the
    ``left`` cells the plain one (what :func:`_retag` expects done already). The
    cache lines of the face neighbours along i and j of the cell
    ``_PREFETCH_AHEAD`` places on are prefetched (those along k share lines).
    """
    nyz = ny * nz
    inv_nyz = 1.0 / nyz
    inv_nz = 1.0 / nz
    if set_members:
        for cell in joined:
            flat_tags[cell] = partner
        for cell in left:
            flat_tags[cell] = plain
    nj = joined.size
    for q in range(nj):
        if q + _PREFETCH_AHEAD < nj:
            ahead = joined[q + _PREFETCH_AHEAD]
            _prefetch_nb(flat_tags, ahead - nyz)
            _prefetch_nb(flat_tags, ahead + nyz)
            _prefetch_nb(flat_tags, ahead - nz)
            _prefetch_nb(flat_tags, ahead + nz)
        cell = joined[q]
        i, rem = _divmod_nb(cell, nyz, inv_nyz)
        j, k = _divmod_nb(rem, nz, inv_nz)
        if i > 0 and flat_tags[cell - nyz] != partner:
            flat_tags[cell - nyz] = 2
        if i < nx - 1 and flat_tags[cell + nyz] != partner:
            flat_tags[cell + nyz] = 2
        if j > 0 and flat_tags[cell - nz] != partner:
            flat_tags[cell - nz] = 2
        if j < ny - 1 and flat_tags[cell + nz] != partner:
            flat_tags[cell + nz] = 2
        if k > 0 and flat_tags[cell - 1] != partner:
            flat_tags[cell - 1] = 2
        if k < nz - 1 and flat_tags[cell + 1] != partner:
            flat_tags[cell + 1] = 2
    nl = left.size
    for q in range(nl):
        if q + _PREFETCH_AHEAD < nl:
            ahead = left[q + _PREFETCH_AHEAD]
            _prefetch_nb(flat_tags, ahead)
            _prefetch_nb(flat_tags, ahead - nyz)
            _prefetch_nb(flat_tags, ahead + nyz)
            _prefetch_nb(flat_tags, ahead - nz)
            _prefetch_nb(flat_tags, ahead + nz)
        cell = left[q]
        i, rem = _divmod_nb(cell, nyz, inv_nyz)
        j, k = _divmod_nb(rem, nz, inv_nz)
        _recheck_nb(flat_tags, cell, i, j, k, partner, plain, nx, ny, nz)


def _retag_compiled(
    flat_tags: np.ndarray, fresh: np.ndarray, covered: np.ndarray, shape3, interface: str, box=None, set_members=False
) -> tuple[slice, ...]:
    """:func:`_retag` (same arguments, same updates in place, same returned box) on the compiled kernel.

    ``box``: the inclusive index bounds of the changed cells when the caller has
    them (as :func:`_changed_nb` returns them); found from the cells otherwise.
    ``set_members``: ``flat_tags`` does not yet hold SOLID at ``covered`` and FLUID
    at ``fresh``; the kernel sets them first.
    """
    if interface == "fluid-side":
        joined, left, partner, plain = covered, fresh, CellTag.SOLID, CellTag.FLUID
    else:
        joined, left, partner, plain = fresh, covered, CellTag.FLUID, CellTag.SOLID
    nx, ny, nz = shape3
    _retag_nb(flat_tags, joined, left, np.uint8(partner), np.uint8(plain), nx, ny, nz, set_members)
    if box is None:
        ends = [a[[0, -1]] for a in (fresh, covered) if a.size]  # sorted: first and last cell only bound i
        rem = np.concatenate([fresh, covered]) % (ny * nz)
        j, k = np.divmod(rem, nz)
        box = (
            min(int(e[0]) for e in ends) // (ny * nz), max(int(e[1]) for e in ends) // (ny * nz),
            int(j.min()), int(j.max()), int(k.min()), int(k.max()),
        )
    return tuple(
        slice(max(int(lo) - 1, 0), min(int(hi) + 2, n)) for lo, hi, n in zip(box[0::2], box[1::2], shape3)
    )


def step_tags(
    previous,
    surface_now,
    grid: Grid,
    *,
    previous_surface=None,
    interface: str = "fluid-side",
    overwrite_previous: bool = False,
) -> Transition:
    """Tags at a new pose from the previous step's tags, and the fresh and covered cells.

    Only the cells between the previous and the current surface along each row of
    centres are re-tagged (plus their face neighbours for the interface layer), so
    a step costs work proportional to the surface and to the cells it swept, plus
    a new tag array into which the index box of the new pose's solid cells is
    copied from the previous tags (no new array with ``overwrite_previous``).

    Parameters
    ----------
    previous : Transition or grid.shape uint8 array
        The previous step: a :class:`Transition` from the last call (its crossings
        are reused), or the tags of ``previous_surface`` on ``grid`` with the same
        ``interface`` option, as returned by :func:`classify`. Not modified unless
        ``overwrite_previous``.
    surface_now : closed surface — the body at the new pose, world frame (as for
        :func:`classify`).
    grid : Grid
    previous_surface : closed surface, optional — the body at the previous pose,
        world frame; required when ``previous`` is a tag array.
    interface : {"fluid-side", "solid-side"}
    overwrite_previous : bool, default False
        Update the previous tag array (``previous.tags``, or ``previous`` itself)
        in place and return it as the new ``tags`` instead of allocating a new
        array: for a time loop that keeps only the latest step. The previous
        array then holds the new pose's tags; a Transition passed this way is
        marked spent and a further ``step_tags`` call refuses it (pass the
        returned Transition instead). The array must be writeable and
        C-contiguous.

    Returns
    -------
    Transition
        Its ``tags`` equal ``classify(surface_now, grid, interface=interface)``.

    Raises
    ------
    InputError
        Bad ``interface``; a malformed surface; previous tags of the wrong shape or
        dtype; a tag array without ``previous_surface``; a Transition made for
        another grid or interface option, or already spent by
        ``overwrite_previous``; ``overwrite_previous`` with a read-only or
        non-contiguous array.

    Warns
    -----
    IbprepWarning
        No cell centre is solid at the new pose (``Transition.body_outside``); or
        the surface at the new pose is not closed (as for :func:`classify`).

    Notes
    -----
    A tagging leaves every cell outside the index box of its solid cells (plus a
    one-cell margin for the interface layer) fluid. The new array is therefore
    zero outside the new pose's box, and the previous tags are read only inside
    it and next to the changed cells; tags outside the previous pose's box are
    taken as fluid, which is what :func:`classify` and earlier steps produce.
    """
    interface = _check_interface(interface)
    grid = _check_grid(grid)
    shape3 = grid.shape if grid.ndim == 3 else (*grid.shape, 1)
    axes = None
    if isinstance(previous, Transition) and previous._spent:
        raise InputError(
            "this Transition's tags were overwritten by step_tags(..., overwrite_previous=True); "
            "pass the Transition that call returned"
        )
    if isinstance(previous, Transition) and previous._crossings is not None:
        if previous._grid != grid or previous._interface != interface:
            raise InputError(
                "the previous Transition was made for another grid or interface option "
                f"({previous._interface!r}); pass the tags and previous_surface instead"
            )
        prev = previous.tags
        old = previous._crossings
        axes = previous._axes if previous._axes is not None else _axes3(grid)
    else:
        prev = previous.tags if isinstance(previous, Transition) else previous
        if not overwrite_previous:
            prev = np.asarray(prev)
        if not isinstance(prev, np.ndarray) or prev.shape != grid.shape or prev.dtype != np.uint8:
            raise InputError(
                f"previous_tags must be a uint8 array of the grid's shape {grid.shape}, got "
                f"{getattr(prev, 'dtype', type(prev).__name__)} of shape {getattr(prev, 'shape', '?')}; "
                "pass the tags returned by classify() or step_tags() for this grid"
            )
        if previous_surface is None:
            raise InputError("previous_surface is required when previous is a tag array; pass the body at the previous pose")
        v_old, f_old = as_triangles(previous_surface)
        axes = _axes3(grid)
        old = _crossings(v_old, f_old, *axes)
    if overwrite_previous and not (prev.flags.writeable and prev.flags.c_contiguous):
        raise InputError(
            "overwrite_previous=True needs a writeable, C-contiguous previous tag array; "
            "pass a copy (np.ascontiguousarray) or leave overwrite_previous False"
        )
    v_now, f_now = as_triangles(surface_now)
    new = _crossing_rows(v_now, f_now, *axes, cap=old.i.size + old.i.size // 4)  # kept for the next step
    fresh, covered, any_solid, open_rows, changed_box = _changed_cells(new, old, shape3, with_box=True)
    _warn_open_rows(open_rows)
    if overwrite_previous:
        tags = prev.reshape(shape3)
        if isinstance(previous, Transition):
            object.__setattr__(previous, "_spent", True)
    else:
        # A tagging leaves every cell outside the box of its solid cells (plus the
        # interface margin) fluid, so the new tags are zeros (FLUID) outside the new
        # pose's box, and only that box is copied from the previous tags. Cells the
        # body left outside it are already at their final value; the updates below
        # (fresh cells set fluid, their neighbours re-checked) agree with that.
        tags = np.zeros(shape3, dtype=np.uint8)
        box = _solid_box(new, shape3)
        if box is not None:
            tags[box] = prev.reshape(shape3)[box]
    flat_tags = tags.reshape(-1)
    if fresh.size or covered.size:
        # Sets SOLID at covered, FLUID at fresh, then the interface layer around them.
        region3 = _retag_compiled(flat_tags, fresh, covered, shape3, interface, changed_box, set_members=True)
    else:
        region3 = (slice(0, 0),) * 3
    outside = not any_solid
    if outside:
        _warn_if_empty(False, v_now, grid)
    return Transition(
        tags=tags.reshape(grid.shape),
        fresh=fresh,
        covered=covered,
        region=region3[: grid.ndim],
        body_outside=outside,
        _crossings=new,
        _grid=grid,
        _interface=interface,
        _axes=axes,
    )
