"""Compiled (numba) equivalents of the stencil builder's hot geometric loops.

Each function here takes the same inputs and returns the same outputs as the
numpy method it stands in for, so a call site switches with a one-line change:

* :func:`segments_cross_fan` — :meth:`ibprep.stencils.proximity.TriangleIndex.segments_cross_fan`
* :func:`closest` — :meth:`ibprep.stencils.proximity.TriangleIndex.closest`
* :func:`wls_value_weights` — ``ibprep.stencils.build._wls_value_weights``
* :func:`stencil_fits` — ``ibprep.stencils.build._fit_arrays``: candidates,
  visibility (the fan test's row function) and the WLS solve of every stencil
  in one pass, which the builder uses; the three above remain for the array
  pipeline and as tested building blocks.

The geometric kernels walk the index's compressed-sparse-row buckets one
query at a time (no pair arrays), apply the same screens with the same
floating-point expressions in the same order (plus, for crossings, a cheaper
conservative box screen in front), and run the same exact tests (Möller &
Trumbore 1997 for crossings; Ericson 2005, §5.1.5 for closest points): their
results equal the numpy path's bit for bit, ties included. The WLS kernel
factorises each stencil with its own Householder QR, so it agrees with the
LAPACK path to round-off (tests/test_kernels.py gives the tolerances). The
stencil pass solves a well-conditioned fit whose neighbour set it has met before
by a rank-one update of that set's factorisation instead (see ``_SET_COND_MAX``),
which agrees with the QR solve to round-off too.

All are compiled with ``fastmath`` off (no re-association, no fused
multiply-add), numpy's floating-point error model (a division by zero gives
inf/NaN, as in numpy), single-threaded and releasing the GIL. The first call in
a fresh environment compiles them (with the classifier's kernels, the demo's first
run takes about forty seconds longer than the next ones on the reference machine:
51-57 s against 10-12 s); numba caches the
machine code on disk (``__pycache__``), after which loading takes a few
hundredths of a second.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from .proximity import ClosestPoints, _closest_on_triangle, _dot3  # noqa: F401 (_dot3 used by kernels below)

__all__ = ["segments_cross_fan", "closest", "wls_value_weights", "stencil_fits", "cells_tagged"]

_JIT = dict(cache=True, nogil=True, fastmath=False, error_model="numpy")

# Same constants as ibprep.stencils.proximity / ibprep.stencils.build (kept equal by tests/test_kernels.py).
_BARY_SLACK = 1e-12
_FACE, _VA, _VB, _VC, _EAB, _EBC, _ECA = range(7)
_RANK_RTOL = 1e-13
_GRAM_RTOL = 1e-14


# ------------------------------------------------------------- exact tests
@numba.njit(**_JIT)
def _segment_crosses(p0x, p0y, p0z, p1x, p1y, p1z, tri):
    """Möller–Trumbore on one segment and one (3, 3) triangle; proximity.segments_cross_triangles."""
    ax, ay, az = tri[0, 0], tri[0, 1], tri[0, 2]
    dx, dy, dz = p1x - p0x, p1y - p0y, p1z - p0z
    e1x, e1y, e1z = tri[1, 0] - ax, tri[1, 1] - ay, tri[1, 2] - az
    e2x, e2y, e2z = tri[2, 0] - ax, tri[2, 1] - ay, tri[2, 2] - az
    pvx = dy * e2z - dz * e2y
    pvy = dz * e2x - dx * e2z
    pvz = dx * e2y - dy * e2x
    det = _dot3(e1x, e1y, e1z, pvx, pvy, pvz)
    nx = e1y * e2z - e1z * e2y
    ny = e1z * e2x - e1x * e2z
    nz = e1x * e2y - e1y * e2x
    scale = math.sqrt(_dot3(dx, dy, dz, dx, dy, dz) * _dot3(nx, ny, nz, nx, ny, nz))
    if not (abs(det) > 1e-14 * scale):
        return False
    inv = 1.0 / det
    tx, ty, tz = p0x - ax, p0y - ay, p0z - az
    u = _dot3(tx, ty, tz, pvx, pvy, pvz) * inv
    qx = ty * e1z - tz * e1y
    qy = tz * e1x - tx * e1z
    qz = tx * e1y - ty * e1x
    v = _dot3(dx, dy, dz, qx, qy, qz) * inv
    t = _dot3(e2x, e2y, e2z, qx, qy, qz) * inv
    s = _BARY_SLACK
    return (u >= -s) and (v >= -s) and (u + v <= 1 + s) and (t >= 0.0) and (t <= 1.0)


# --------------------------------------------------------- fan crossings
@numba.njit(**_JIT)
def _gather(ox, oy, oz, reach, grid_origin, s, dims, cstart, ccount, citems, pcentre, pradius, pparent, tri,
            fnormal, rmax, lo, hi, l_face, l_cx, l_cy, l_cz, l_box, l_so, l_cc, l_r2):
    """The pieces whose bounding sphere comes within reach of (ox, oy, oz), with their screens.

    Fills l_*[:m] (parent face, centre relative to the origin, box half-width,
    origin's side of the plane, squared centre distance, squared radius) and
    returns m. Every point of the surface within reach of the origin lies in the
    sphere of a gathered piece.
    """
    breach = reach + rmax  # near_pairs: bucket range grown by the largest piece radius
    o3 = (ox, oy, oz)
    for k in range(3):
        pk = o3[k]
        if (pk + breach < grid_origin[k]) or (pk - breach > grid_origin[k] + dims[k] * s):
            return 0
        lo[k] = min(max(np.int64(math.floor(((pk - breach) - grid_origin[k]) / s)), 0), dims[k] - 1)
        hi[k] = min(max(np.int64(math.floor(((pk + breach) - grid_origin[k]) / s)), 0), dims[k] - 1)
    # Gather: the ball screen of near_pairs, and per piece the quantities of its plane.
    m = 0
    for bx in range(lo[0], hi[0] + 1):
        for by in range(lo[1], hi[1] + 1):
            # Pieces are listed bucket after bucket in flat order: those of a run of buckets
            # along z are one contiguous range (no loop over short, mostly empty buckets).
            row = (bx * dims[1] + by) * dims[2]
            last = row + hi[2]
            for pos in range(cstart[row + lo[2]], cstart[last] + ccount[last]):
                t = citems[pos]
                cx = pcentre[t, 0] - ox
                cy = pcentre[t, 1] - oy
                cz = pcentre[t, 2] - oz
                cc = _dot3(cx, cy, cz, cx, cy, cz)
                pr = pradius[t]
                rr = reach + pr
                # Written unconditionally, kept if the sphere is within reach (no branch to mispredict).
                l_face[m] = t
                l_cx[m] = cx
                l_cy[m] = cy
                l_cz[m] = cz
                l_cc[m] = cc
                l_r2[m] = pr
                m += 1 if cc <= rr * rr else 0
    for k in range(m):
        t = l_face[k]
        f = pparent[t]
        l_face[k] = f
        pr = l_r2[k]
        l_so[k] = _dot3(ox - tri[f, 0, 0], oy - tri[f, 0, 1], oz - tri[f, 0, 2],
                        fnormal[f, 0], fnormal[f, 1], fnormal[f, 2])
        l_r2[k] = pr * pr * (1 + 1e-9)
        # Half-width of the box prefilter: the radius plus a margin far above the
        # round-off of the sphere screen below (~1e-8 (reach + radius)).
        l_box[k] = pr + 1e-6 * (pr + reach)
    return m


@numba.njit(**_JIT)
def _fan_test(ox, oy, oz, ex, ey, ez, nc, hit, m, tri, fnormal, l_face, l_cx, l_cy, l_cz, l_box, l_so, l_cc,
              l_r2, c_mx, c_my, c_mz, c_ok):
    """Crossings of the nc segments from the origin against the m gathered pieces: hit[j] set true."""
    # The segments as contiguous centre/half-extent arrays of their boxes.
    for jj in range(nc):
        c_mx[jj] = 0.5 * (ex[jj] - ox)
        c_my[jj] = 0.5 * (ey[jj] - oy)
        c_mz[jj] = 0.5 * (ez[jj] - oz)
    for i in range(m):
        w = l_box[i]
        px, py, pz = l_cx[i], l_cy[i], l_cz[i]
        # Conservative prefilter (not in the numpy path): the point of the segment the
        # sphere screen accepts lies in the segment's box, so the piece's sphere (grown
        # by the margin) must meet that box. Branch-free over the segments.
        for jj in range(nc):
            mx, my, mz = c_mx[jj], c_my[jj], c_mz[jj]
            c_ok[jj] = (abs(px - mx) <= w + abs(mx)) & (abs(py - my) <= w + abs(my)) & (abs(pz - mz) <= w + abs(mz))
        for jj in range(nc):
            if not c_ok[jj] or hit[jj]:
                continue
            dx, dy, dz = ex[jj] - ox, ey[jj] - oy, ez[jj] - oz
            dd = _dot3(dx, dy, dz, dx, dy, dz)
            f = l_face[i]
            s_o = l_so[i]
            s_j = dx * fnormal[f, 0]
            s_j += dy * fnormal[f, 1]
            s_j += dz * fnormal[f, 2]
            s_j += s_o
            # Plane-side screen: the segment reaches the plane within [0, 1].
            tau = s_o / (s_o - s_j)
            if not ((tau >= 0.0) and (tau <= 1.0)):
                continue
            dot = dx * l_cx[i]
            dot += dy * l_cy[i]
            dot += dz * l_cz[i]
            q = tau * dd
            q -= 2.0 * dot
            q *= tau
            q += l_cc[i]
            if not (q <= l_r2[i]):
                continue
            if _segment_crosses(ox, oy, oz, ex[jj], ey[jj], ez[jj], tri[f]):
                hit[jj] = True


@numba.njit(**_JIT)
def _fan_row(ox, oy, oz, ex, ey, ez, nc, hit, reach, grid_origin, s, dims, cstart, ccount, citems, pcentre,
             pradius, pparent, tri, fnormal, rmax, lo, hi, l_face, l_cx, l_cy, l_cz, l_box, l_so, l_cc, l_r2,
             c_mx, c_my, c_mz, c_ok):
    """Crossings of the nc segments from (ox, oy, oz) to (ex[j], ey[j], ez[j]): hit[j] set true.

    One row of segments_cross_fan; hit[:nc] must come in false. reach bounds the
    segments' lengths; the l_* and c_* arrays are scratch.
    """
    m = _gather(ox, oy, oz, reach, grid_origin, s, dims, cstart, ccount, citems, pcentre, pradius, pparent, tri,
                fnormal, rmax, lo, hi, l_face, l_cx, l_cy, l_cz, l_box, l_so, l_cc, l_r2)
    if m > 0:
        _fan_test(ox, oy, oz, ex, ey, ez, nc, hit, m, tri, fnormal, l_face, l_cx, l_cy, l_cz, l_box, l_so, l_cc,
                  l_r2, c_mx, c_my, c_mz, c_ok)


@numba.njit(**_JIT)
def _screened_fan_test(ox, oy, oz, ex, ey, ez, nc, hit, m, tri, fnormal, l_face, l_cx, l_cy, l_cz, l_box, l_so,
                       l_cc, l_r2, c_mx, c_my, c_mz, c_ok, bx0, by0, bz0, hx, hy, hz, seg_len, ex2, ey2, ez2, hit2,
                       idx2):
    """:func:`_fan_test` behind an exact height screen along the direction (hx, hy, hz) from (bx0, by0, bz0).

    No gathered triangle rises above ``top`` along that direction, so a segment
    whose two ends are both higher (by far more than round-off) meets none of them
    and needs no crossing test; the others are tested. With the boundary point and
    normal, near a convex patch that is every candidate on the fluid side.
    """
    top = -np.inf
    far = 0.0
    for k in range(m):
        f = l_face[k]
        for c3 in range(3):
            vx, vy, vz = tri[f, c3, 0] - bx0, tri[f, c3, 1] - by0, tri[f, c3, 2] - bz0
            top = max(top, vx * hx + vy * hy + vz * hz)
            far = max(far, abs(vx) + abs(vy) + abs(vz))
    top += 1e-9 * (far + seg_len)
    if not ((ox - bx0) * hx + (oy - by0) * hy + (oz - bz0) * hz > top):
        _fan_test(ox, oy, oz, ex, ey, ez, nc, hit, m, tri, fnormal, l_face, l_cx, l_cy, l_cz, l_box, l_so, l_cc,
                  l_r2, c_mx, c_my, c_mz, c_ok)
        return
    n2 = 0
    for jj in range(nc):
        if not ((ex[jj] - bx0) * hx + (ey[jj] - by0) * hy + (ez[jj] - bz0) * hz > top):
            idx2[n2] = jj
            ex2[n2], ey2[n2], ez2[n2] = ex[jj], ey[jj], ez[jj]
            hit2[n2] = False
            n2 += 1
    if n2 > 0:
        _fan_test(ox, oy, oz, ex2, ey2, ez2, n2, hit2, m, tri, fnormal, l_face, l_cx, l_cy, l_cz, l_box, l_so, l_cc,
                  l_r2, c_mx, c_my, c_mz, c_ok)
        for q in range(n2):
            hit[idx2[q]] = hit2[q]


@numba.njit(**_JIT)
def _fan_scratch(cap, c):
    """Scratch arrays of _fan_row for up to cap gathered pieces and c segments."""
    return (np.empty(3, dtype=np.int64), np.empty(3, dtype=np.int64), np.empty(cap, dtype=np.int64),
            np.empty(cap), np.empty(cap), np.empty(cap), np.empty(cap), np.empty(cap), np.empty(cap),
            np.empty(cap), np.empty(c), np.empty(c), np.empty(c), np.empty(c, dtype=np.bool_))


@numba.njit(**_JIT)
def _fan_kernel(o, e, valid, reach, grid_origin, s, dims, cstart, ccount, citems, pcentre, pradius, pparent,
                tri, fnormal, rmax):
    n, c = valid.shape
    hit = np.zeros((n, c), dtype=np.bool_)
    lo, hi, l_face, l_cx, l_cy, l_cz, l_box, l_so, l_cc, l_r2, c_mx, c_my, c_mz, c_ok = _fan_scratch(
        citems.shape[0], c)
    c_j = np.empty(c, dtype=np.int64)
    ex = np.empty(c)
    ey = np.empty(c)
    ez = np.empty(c)
    h_row = np.zeros(c, dtype=np.bool_)
    for r in range(n):
        nc = 0
        for j in range(c):
            if valid[r, j]:
                c_j[nc] = j
                ex[nc] = e[r, j, 0]
                ey[nc] = e[r, j, 1]
                ez[nc] = e[r, j, 2]
                h_row[nc] = False
                nc += 1
        if nc == 0:
            continue
        _fan_row(o[r, 0], o[r, 1], o[r, 2], ex, ey, ez, nc, h_row, reach, grid_origin, s, dims, cstart, ccount,
                 citems, pcentre, pradius, pparent, tri, fnormal, rmax, lo, hi, l_face, l_cx, l_cy, l_cz, l_box,
                 l_so, l_cc, l_r2, c_mx, c_my, c_mz, c_ok)
        for jj in range(nc):
            hit[r, c_j[jj]] = h_row[jj]
    return hit


def segments_cross_fan(index, origins, ends, valid, reach: float) -> np.ndarray:
    """Whether segments fanning out from one origin per row cross the surface.

    Compiled equivalent of :meth:`ibprep.stencils.proximity.TriangleIndex.segments_cross_fan`
    (same screens, same exact test, same result).

    Parameters
    ----------
    index : TriangleIndex — the bucketed surface.
    origins : (n, 3) float — metres; one start per row.
    ends : (n, c, 3) float — metres; the ends of each row's segments.
    valid : (n, c) bool — which segments to test (others come back false).
    reach : float — metres; no segment is longer than this.

    Returns
    -------
    (n, c) bool — true where the closed segment meets a closed triangle
    (through an edge or a corner counts; in the triangle's plane does not).
    """
    o = np.ascontiguousarray(origins, dtype=float).reshape(-1, 3)
    valid = np.ascontiguousarray(valid, dtype=bool)
    n, c = valid.shape
    e = np.ascontiguousarray(ends, dtype=float).reshape(n, c, 3)
    if n == 0 or c == 0:
        return np.zeros((n, c), dtype=bool)
    return _fan_kernel(
        o, e, valid, float(reach), np.asarray(index.origin, dtype=float), float(index.bucket_size),
        np.asarray(index.dims, dtype=np.int64), index.centre_start, index.centre_count, index.centre_items,
        index.piece_centre, index.piece_radius, index.piece_parent, index.tri, index.face_normal,
        float(index.piece_radius.max(initial=0.0)),
    )


# ---------------------------------------------------------- closest point
@numba.njit(**_JIT)
def _ring_pass(px, py, pz, qb, ring, dims, bstart, bcount, bitems, pcentre, pradius, pwitness, pparent, tri,
               ub_in, state, qbuf, first_pass):
    """Visit the pieces of the buckets in ring ``ring`` around qb, in numpy's offset order.

    First pass: returns min(witness distance) over the ring's pairs (inf if none).
    Second pass: screens with ub_in and updates state = [best_d2, face, region, qx, qy, qz].
    """
    ub = np.inf
    lo0, hi0 = max(qb[0] - ring, 0), min(qb[0] + ring, dims[0] - 1)
    lo1, hi1 = max(qb[1] - ring, 0), min(qb[1] + ring, dims[1] - 1)
    lo2, hi2 = max(qb[2] - ring, 0), min(qb[2] + ring, dims[2] - 1)
    lim = ub_in * (1 + 1e-12)
    for bx in range(lo0, hi0 + 1):
        shell_x = abs(bx - qb[0]) == ring
        for by in range(lo1, hi1 + 1):
            shell_xy = shell_x or abs(by - qb[1]) == ring
            # Lexicographic offsets on the shell: whole z-range on an x/y face, else z = ±ring.
            if shell_xy:
                zs0, zs1, zstep = lo2, hi2, 1
            else:
                zs0, zs1, zstep = qb[2] - ring, qb[2] + ring, 2 * ring
                if ring == 0:
                    zstep = 1
            bz = zs0
            while bz <= zs1:
                if bz >= lo2 and bz <= hi2:
                    flat = (bx * dims[1] + by) * dims[2] + bz
                    for pos in range(bstart[flat], bstart[flat] + bcount[flat]):
                        t = bitems[pos]
                        if first_pass:
                            gx, gy, gz = px - pwitness[t, 0], py - pwitness[t, 1], pz - pwitness[t, 2]
                            dg = math.sqrt(_dot3(gx, gy, gz, gx, gy, gz))
                            if dg < ub:
                                ub = dg
                        else:
                            cx, cy, cz = px - pcentre[t, 0], py - pcentre[t, 1], pz - pcentre[t, 2]
                            dc = math.sqrt(_dot3(cx, cy, cz, cx, cy, cz))
                            if not (dc - pradius[t] <= lim):
                                continue
                            f = pparent[t]
                            region = _closest_on_triangle(px, py, pz, tri[f], qbuf)
                            dx, dy, dz = qbuf[0] - px, qbuf[1] - py, qbuf[2] - pz
                            d2 = _dot3(dx, dy, dz, dx, dy, dz)
                            if d2 < state[0]:
                                state[0] = d2
                                state[1] = f
                                state[2] = region
                                state[3] = qbuf[0]
                                state[4] = qbuf[1]
                                state[5] = qbuf[2]
                bz += zstep
    return ub


@numba.njit(**_JIT)
def _closest_one(px, py, pz, qb, grid_origin, s, dims, q_max, max_distance, bstart, bcount, bitems, pcentre,
                 pradius, pwitness, pparent, tri, state, qbuf):
    """Ring-by-ring closest point of one point; state = [best_d2, face, region, qx, qy, qz].

    Returns (distance, exact), as proximity.TriangleIndex.closest for one query.
    """
    qb[0] = np.int64(math.floor((px - grid_origin[0]) / s))
    qb[1] = np.int64(math.floor((py - grid_origin[1]) / s))
    qb[2] = np.int64(math.floor((pz - grid_origin[2]) / s))
    state[0] = np.inf
    state[1] = -1.0
    state[2] = 0.0
    state[3] = 0.0
    state[4] = 0.0
    state[5] = 0.0
    lower = 0.0
    ex = False
    finished = False
    ring = 0
    while ring <= q_max:
        ub = _ring_pass(px, py, pz, qb, ring, dims, bstart, bcount, bitems, pcentre, pradius, pwitness,
                        pparent, tri, 0.0, state, qbuf, True)
        if ub < np.inf:  # the ring has pairs
            ub = min(ub, math.sqrt(state[0]))
            _ring_pass(px, py, pz, qb, ring, dims, bstart, bcount, bitems, pcentre, pradius, pwitness,
                       pparent, tri, ub, state, qbuf, False)
        reach = ring * s
        if math.sqrt(state[0]) <= reach:
            ex = True
            finished = True
            break
        if reach >= max_distance:
            lower = min(reach, max_distance)
            finished = True
            break
        ring += 1
    if not finished:  # the whole bucket grid was searched
        ex = state[0] < np.inf
    d = math.sqrt(state[0])
    return (d if ex else min(lower, d)), ex


@numba.njit(**_JIT)
def _pseudo_normal(f, reg, faces, fnormal, enormal, vnormal, out):
    """Outward pseudo-normal of face f's closest-point region reg (face, edge or vertex)."""
    if reg == _VA or reg == _VB or reg == _VC:
        vtx = faces[f, reg - _VA]
        for k in range(3):
            out[k] = vnormal[vtx, k]
    elif reg == _EAB or reg == _EBC or reg == _ECA:
        for k in range(3):
            out[k] = enormal[f, reg - _EAB, k]
    else:
        for k in range(3):
            out[k] = fnormal[f, k]


@numba.njit(**_JIT)
def _closest_kernel(p, grid_origin, s, dims, q_max, max_distance, bstart, bcount, bitems, pcentre, pradius,
                    pwitness, pparent, tri, faces, fnormal, enormal, vnormal):
    n = p.shape[0]
    point = np.zeros((n, 3))
    dist = np.zeros(n)
    normal = np.zeros((n, 3))
    face = np.full(n, -1, dtype=np.int64)
    exact = np.zeros(n, dtype=np.bool_)
    qb = np.empty(3, dtype=np.int64)
    state = np.empty(6)
    qbuf = np.empty(3)
    for i in range(n):
        d, ex = _closest_one(p[i, 0], p[i, 1], p[i, 2], qb, grid_origin, s, dims, q_max, max_distance, bstart,
                             bcount, bitems, pcentre, pradius, pwitness, pparent, tri, state, qbuf)
        dist[i] = d
        exact[i] = ex
        point[i, 0] = state[3]
        point[i, 1] = state[4]
        point[i, 2] = state[5]
        f = np.int64(state[1])
        if ex and f >= 0:
            face[i] = f
            _pseudo_normal(f, np.int64(state[2]), faces, fnormal, enormal, vnormal, normal[i])
    return point, dist, normal, face, exact


def closest(index, points, *, max_distance: float = math.inf) -> ClosestPoints:
    """Closest surface point, distance and outward pseudo-normal of each point.

    Compiled equivalent of :meth:`ibprep.stencils.proximity.TriangleIndex.closest`: the
    same ring-by-ring bucket search, witness/sphere screens, tie-breaking (the
    first closest triangle in bucket order) and lower-bound mode.

    Parameters
    ----------
    index : TriangleIndex — the bucketed surface.
    points : (n, 3) float — metres, world frame.
    max_distance : float — metres; the search stops once it has ruled out any
        triangle closer than this, and the answer is then a lower bound
        (``exact`` false). ``inf`` (default) searches until exact.

    Returns
    -------
    ClosestPoints
    """
    p = np.ascontiguousarray(points, dtype=float).reshape(-1, 3)
    n = p.shape[0]
    if n == 0:
        return ClosestPoints(np.zeros((0, 3)), np.zeros(0), np.zeros((0, 3)), np.full(0, -1, np.int64),
                             np.zeros(0, bool))
    dims = np.asarray(index.dims, dtype=np.int64)
    qb = np.floor((p - index.origin) / index.bucket_size).astype(np.int64)
    q_max = int(max(index.dims)) + int(np.max(np.abs(qb - np.clip(qb, 0, dims - 1)))) + 1
    # State keeps the face index in a float slot: exact below 2**53 faces.
    point, dist, normal, face, exact = _closest_kernel(
        p, np.asarray(index.origin, dtype=float), float(index.bucket_size), dims, q_max, float(max_distance),
        index.bucket_start, index.bucket_count, index.bucket_items, index.piece_centre, index.piece_radius,
        index.piece_witness, index.piece_parent, index.tri, index.faces, index.face_normal, index.edge_normal,
        index.vertex_normal,
    )
    return ClosestPoints(point=point, distance=dist, normal=normal, face=face, exact=exact)


# ------------------------------------------------------------- tag scans
_ONES8 = np.uint64(0x0101010101010101)
_HIGH8 = np.uint64(0x8080808080808080)


@numba.njit(**_JIT)
def _cells_tagged_nb(flat, code):
    """np.flatnonzero(flat == code) for a uint8 array, without a whole-grid temporary.

    Reads eight tags at a time and looks at the bytes of a word only when one of
    them may equal ``code`` (the zero-byte test of x ^ code * 0x0101..: Warren,
    Hacker's Delight, 2nd ed. 2012, §6-1).
    """
    n = flat.size
    nw = n // 8
    words = flat[: nw * 8].view(np.uint64)
    pat = np.uint64(code) * _ONES8
    count = 0
    for w in range(nw):
        x = words[w] ^ pat
        if (x - _ONES8) & ~x & _HIGH8:
            for b in range(8):
                count += flat[w * 8 + b] == code
    for i in range(nw * 8, n):
        count += flat[i] == code
    out = np.empty(count, np.int64)
    c = 0
    for w in range(nw):
        x = words[w] ^ pat
        if (x - _ONES8) & ~x & _HIGH8:
            for b in range(8):
                if flat[w * 8 + b] == code:
                    out[c] = w * 8 + b
                    c += 1
    for i in range(nw * 8, n):
        if flat[i] == code:
            out[c] = i
            c += 1
    return out


def cells_tagged(flat_tags: np.ndarray, code: int) -> np.ndarray:
    """Sorted flat indices (int64) of the cells of a contiguous 1-D uint8 tag array holding ``code``."""
    flat = np.ascontiguousarray(flat_tags, dtype=np.uint8).reshape(-1)
    return _cells_tagged_nb(flat, np.uint8(code))


# ------------------------------------------------------------- WLS solve
@numba.njit(**_JIT)
def _tridiagonal_ql(d, e, Z, vectors):
    """Eigenvalues (in d, unordered) of the symmetric tridiagonal matrix with diagonal d and
    sub-diagonal e[:-1] (e[-1] unused), by the implicit QL algorithm with Wilkinson-type
    shifts (Press et al., Numerical Recipes, 3rd ed. 2007, §11.4 routine tqli). With
    ``vectors``, each rotation is applied to the columns of Z (the eigenvectors, if Z
    held the reduction's orthogonal factor). Returns False if an eigenvalue took more
    than 60 iterations (it is then left as found)."""
    m = d.shape[0]
    converged = True
    for l in range(m):
        it = 0
        while True:
            mm = l
            while mm < m - 1:
                dd = abs(d[mm]) + abs(d[mm + 1])
                if abs(e[mm]) + dd == dd:
                    break
                mm += 1
            if mm == l:
                break
            if it >= 60:
                converged = False
                break
            it += 1
            g = (d[l + 1] - d[l]) / (2.0 * e[l])
            r = math.sqrt(g * g + 1.0)
            g = d[mm] - d[l] + e[l] / (g + (r if g >= 0.0 else -r))
            sn = 1.0
            cs = 1.0
            p = 0.0
            i = mm - 1
            underflow = False
            while i >= l:
                f = sn * e[i]
                b = cs * e[i]
                r = math.sqrt(f * f + g * g)  # entries are O(|G|): no overflow; underflow is handled below
                e[i + 1] = r
                if r == 0.0:
                    d[i + 1] -= p
                    e[mm] = 0.0
                    underflow = True
                    break
                sn = f / r
                cs = g / r
                g = d[i + 1] - p
                r = (d[i] - g) * sn + 2.0 * cs * b
                p = sn * r
                d[i + 1] = g + p
                g = cs * r - b
                if vectors:
                    for k in range(m):
                        t = Z[k, i + 1]
                        Z[k, i + 1] = sn * Z[k, i] + cs * t
                        Z[k, i] = cs * Z[k, i] - sn * t
                i -= 1
            if underflow:
                continue
            d[l] -= p
            e[l] = g
            e[mm] = 0.0
    return converged


@numba.njit(**_JIT)
def _tridiagonalize_lanes(G4, m, v4, p4, acc, alpha, beta):
    """The Householder reduction of :func:`_eigh_small` on every lane of G4 (m, m, L) at once.

    Each lane goes through the one-matrix operations in the same order (a lane
    whose column is already reduced, ``nrm == 0``, takes a no-op step: v = 0,
    beta = 0, its entries rewritten with themselves), so its tridiagonal form is
    bit for bit that of the one-matrix reduction on that lane alone.
    """
    L = _LANES
    for k in range(m - 2):
        for l in range(L):
            acc[l] = 0.0
        for j in range(k + 1, m):
            for l in range(L):
                acc[l] += G4[j, k, l] * G4[j, k, l]
        for l in range(L):
            nrm = math.sqrt(acc[l])
            if nrm == 0.0:
                alpha[l] = G4[k + 1, k, l]
                beta[l] = 0.0
            else:
                alpha[l] = -nrm if G4[k + 1, k, l] >= 0.0 else nrm
                beta[l] = 1.0
        for j in range(k + 1, m):
            for l in range(L):
                v4[j, l] = G4[j, k, l] if beta[l] != 0.0 else 0.0
        for l in range(L):
            if beta[l] != 0.0:
                v4[k + 1, l] -= alpha[l]
            acc[l] = 0.0
        for j in range(k + 1, m):
            for l in range(L):
                acc[l] += v4[j, l] * v4[j, l]
        for l in range(L):
            beta[l] = 2.0 / acc[l] if beta[l] != 0.0 else 0.0
        for i in range(k + 1, m):
            for l in range(L):
                p4[i, l] = 0.0
        for j in range(k + 1, m):
            for i in range(k + 1, m):
                for l in range(L):
                    p4[i, l] += G4[j, i, l] * v4[j, l]
        for l in range(L):
            acc[l] = 0.0
        for i in range(k + 1, m):
            for l in range(L):
                p4[i, l] = beta[l] * p4[i, l]
                acc[l] += p4[i, l] * v4[i, l]
        for l in range(L):
            acc[l] = 0.5 * beta[l] * acc[l]
        for i in range(k + 1, m):
            for l in range(L):
                p4[i, l] -= acc[l] * v4[i, l]
        for i in range(k + 1, m):
            for j in range(k + 1, m):
                for l in range(L):
                    G4[i, j, l] -= v4[i, l] * p4[j, l] + p4[i, l] * v4[j, l]
        for l in range(L):
            G4[k + 1, k, l] = alpha[l]
            G4[k, k + 1, l] = alpha[l]


# Stencils solved side by side: the QR's loops run over this many stencils at once in the
# innermost position, which vectorises without changing any stencil's order of operations.
_LANES = 4


@numba.njit(**_JIT)
def _lanes_scratch(r, m):
    """Scratch of _wls_lanes: Bt, V (m, r, L); beta (m, L); G4 (m, m, L); y (r, L); acc, alpha, vv (L,);
    G (m, 2L): the lane reduction's vectors; d, e2, v, p_ (m,); nk, cond (L,)."""
    L = _LANES
    return (np.zeros((m, r, L)), np.zeros((m, r, L)), np.zeros((m, L)), np.zeros((m, m, L)), np.zeros((r, L)),
            np.zeros(L), np.zeros(L), np.zeros(L), np.empty((m, 2 * L)), np.empty(m), np.empty(m), np.empty(m),
            np.empty(m), np.zeros(L, dtype=np.int64), np.zeros(L))


@numba.njit(**_JIT)
def _wls_lanes(Bt, nk, nl, m, V, beta, G4, y, acc, alpha, vv, G, d, e2, v, p_, cond):
    """Condition and value weights of nl weighted design matrices at once.

    Lane l of Bt (m, r, L) holds the transposed matrix of one stencil, rows
    [0, nk[l]) (overwritten); rows past nk[l] are zeroed here, which changes no
    sum. Each lane runs the operations of the one-stencil Householder QR (Golub &
    Van Loan §5.2.1) in the same order, so its results are those of one stencil
    alone. Sets cond[l] (inf if rank deficient or too few rows) and leaves in
    y[:nk[l], l] the vector z with c_0 = z . (sw f).
    """
    L = _LANES
    NK = 0
    for l in range(nl):
        NK = max(NK, nk[l])
    for l in range(L):
        top = nk[l] if l < nl else 0
        for k in range(m):
            for j in range(top, NK):
                Bt[k, j, l] = 0.0
    for k in range(m):
        for l in range(L):
            acc[l] = 0.0
        for j in range(k, NK):
            for l in range(L):
                acc[l] += Bt[k, j, l] * Bt[k, j, l]
        for l in range(L):
            nrm = math.sqrt(acc[l])
            alpha[l] = -nrm if Bt[k, k, l] >= 0.0 else nrm
            vv[l] = 0.0
        for j in range(k, NK):
            for l in range(L):
                V[k, j, l] = Bt[k, j, l]
        for l in range(L):
            V[k, k, l] -= alpha[l]
        for j in range(k, NK):
            for l in range(L):
                vv[l] += V[k, j, l] * V[k, j, l]
        for l in range(L):
            beta[k, l] = 2.0 / vv[l] if vv[l] > 0.0 else 0.0  # a zero column: no reflection
            Bt[k, k, l] = alpha[l]
        for j in range(k + 1, NK):
            for l in range(L):
                Bt[k, j, l] = 0.0
        for col in range(k + 1, m):
            for l in range(L):
                acc[l] = 0.0
            for j in range(k, NK):
                for l in range(L):
                    acc[l] += V[k, j, l] * Bt[col, j, l]
            for l in range(L):
                acc[l] *= beta[k, l]
            for j in range(k, NK):
                for l in range(L):
                    Bt[col, j, l] -= acc[l] * V[k, j, l]
    # Condition from the eigenvalues of R^T R (R[k, p] = Bt[p, k] for k <= p).
    for p in range(m):
        for q in range(p, m):
            for l in range(L):
                acc[l] = 0.0
            for k in range(p + 1):
                for l in range(L):
                    acc[l] += Bt[p, k, l] * Bt[q, k, l]
            for l in range(L):
                G4[p, q, l] = acc[l]
                G4[q, p, l] = acc[l]
    _tridiagonalize_lanes(G4, m, G[:, :L], G[:, L:], acc, alpha, vv)
    for l in range(nl):
        cond[l] = np.inf
        if nk[l] < m:
            continue  # fewer weighted rows than unknowns: rank deficient
        for i in range(m):
            d[i] = G4[i, i, l]
            e2[i] = G4[i + 1, i, l] if i < m - 1 else 0.0
        _tridiagonal_ql(d, e2, G, False)
        lmin = np.inf
        lmax = -np.inf
        for i in range(m):
            lmin = min(lmin, d[i])
            lmax = max(lmax, d[i])
        dmin = np.inf
        dmax = 0.0
        for k in range(m):
            rkk = abs(Bt[k, k, l])
            dmin = min(dmin, rkk)
            dmax = max(dmax, rkk)
        if (lmin > _GRAM_RTOL * lmax) and (dmin > _RANK_RTOL * dmax):
            cond[l] = math.sqrt(lmax / lmin)
    # z = Q y with R^T y = e_0: forward substitution, then the reflectors in reverse.
    for j in range(NK):
        for l in range(L):
            y[j, l] = 0.0
    for k in range(m):
        for l in range(L):
            acc[l] = 1.0 if k == 0 else 0.0
        for j in range(k):
            for l in range(L):
                acc[l] -= Bt[k, j, l] * y[j, l]
        for l in range(L):
            y[k, l] = acc[l] / Bt[k, k, l] if cond[l] < np.inf else 0.0
    for k in range(m - 1, -1, -1):
        for l in range(L):
            acc[l] = 0.0
        for j in range(k, NK):
            for l in range(L):
                acc[l] += V[k, j, l] * y[j, l]
        for l in range(L):
            acc[l] *= beta[k, l]
        for j in range(k, NK):
            for l in range(L):
                y[j, l] -= acc[l] * V[k, j, l]


@numba.njit(**_JIT)
def _wls_kernel(A, sw):
    n, r, m = A.shape
    a = np.zeros((n, r))
    cond = np.full(n, np.inf)
    Bt, V, beta, G4, y, acc, alpha, vv, G, d, e2, v, p_, nk, cl = _lanes_scratch(r, m)
    rows = np.empty((r, _LANES), dtype=np.int64)
    for i0 in range(0, n, _LANES):
        nl = min(_LANES, n - i0)
        for l in range(nl):
            i = i0 + l
            # Rows of zero weight (padding) change neither R nor the weights: drop them.
            c = 0
            for j in range(r):
                if sw[i, j] != 0.0:
                    rows[c, l] = j
                    for k in range(m):
                        Bt[k, c, l] = sw[i, j] * A[i, j, k]
                    c += 1
            nk[l] = c
        _wls_lanes(Bt, nk, nl, m, V, beta, G4, y, acc, alpha, vv, G, d, e2, v, p_, cl)
        for l in range(nl):
            if not (cl[l] < np.inf):
                continue
            i = i0 + l
            cond[i] = cl[l]
            for jj in range(nk[l]):
                j = rows[jj, l]
                a[i, j] = y[jj, l] * sw[i, j]
    return a, cond


def wls_value_weights(A, sw):
    """Weights of the data in the least-squares value at the origin, and the condition.

    Compiled equivalent of ``ibprep.stencils.build._wls_value_weights``: Householder QR
    of diag(sw) A per stencil, the value weights from R and the reflectors, the
    condition number from the extreme eigenvalues of R^T R (tridiagonal reduction and
    implicit QL) with the same
    rank tests. Agrees with LAPACK's results to round-off: weights to about
    1e-15 times the condition, the condition itself to about 1e-16 times its square.

    Parameters
    ----------
    A : (n, r, m) float — design matrix (basis at data rows); zero rows allowed.
    sw : (n, r) float — square roots of the row weights; 0 for padded rows.

    Returns
    -------
    a : (n, r) float — the fitted constant term c_0 = a · data.
    cond : (n,) float — 2-norm condition number of diag(sw) A (inf if rank deficient).
    """
    A = np.ascontiguousarray(A, dtype=float)
    sw = np.ascontiguousarray(sw, dtype=float)
    n, r, m = A.shape
    if r < m or n == 0:
        return np.zeros((n, r)), np.full(n, np.inf)
    return _wls_kernel(A, sw)


# ------------------------------------------------------- whole stencils
_WEIGHT_CODES = {"gaussian": 0, "inverse-distance": 1, "wendland": 2}
_IDW_EPS2 = 1.0 / 16.0  # as ibprep.stencils.build


@numba.njit(**_JIT)
def _weight_of(rho, support, kind):
    """As ibprep.stencils.build._weight, for one scaled distance."""
    if kind == 0:
        t = 2.0 * rho / support
        return math.exp(-(t * t))
    if kind == 1:
        return 1.0 / (rho * rho + _IDW_EPS2)
    r = min(max(rho / support, 0.0), 1.0)
    u = 1.0 - r
    return (u * u) * (u * u) * (4.0 * r + 1.0)


@numba.njit(**_JIT)
def _basis_row(x, y, z, planar, out):
    """Quadratic monomials at scaled (x, y, z), in the order of ibprep.stencils.build._basis."""
    out[0] = 1.0
    out[1] = x
    out[2] = y
    if planar:
        out[3] = x * x
        out[4] = x * y
        out[5] = y * y
    else:
        out[3] = z
        out[4] = x * x
        out[5] = y * y
        out[6] = z * z
        out[7] = x * y
        out[8] = y * z
        out[9] = z * x


@numba.njit(**_JIT)
def _normal_derivative_row(x, y, z, nx, ny, nz, planar, out):
    """Derivative of each monomial along n, in the order of ibprep.stencils.build._basis_normal_derivative."""
    out[0] = 0.0
    out[1] = nx
    out[2] = ny
    if planar:
        out[3] = 2 * x * nx
        out[4] = y * nx + x * ny
        out[5] = 2 * y * ny
    else:
        out[3] = nz
        out[4] = 2 * x * nx
        out[5] = 2 * y * ny
        out[6] = 2 * z * nz
        out[7] = y * nx + x * ny
        out[8] = z * ny + y * nz
        out[9] = x * nz + z * nx


@numba.njit(**_JIT)
def _boundary_point(i, ox, oy, oz, reach, m, l_face, l_cc, l_box, tri, qb, grid_origin, s, dims, q_max, bstart,
                    bcount, bitems, pcentre, pradius, pwitness, pparent, faces, fnormal, enormal, vnormal, two_d,
                    nudge, state, qbuf, nbuf, bpt, nrm, dist):
    """Closest surface point and pseudo-normal of the origin into bpt[i], nrm[i], dist[i].

    Searches the m gathered pieces (every surface point within reach of the origin
    lies in one of them). If none is that close, or two faces tie at the least
    distance with different points or normals (two walls equally near), it takes
    the ring search of closest() instead, so the answer is always closest()'s.
    On a 2-D grid the point and normal are put in the plane z = 0. Returns whether
    the origin lies on the surface (closer than nudge).
    """
    best = np.inf
    bf = -1
    breg = 0
    bx = by = bz = 0.0
    tie = False
    # The piece whose centre is nearest first: its distance then prunes most of the others.
    first = 0
    for k in range(1, m):
        if l_cc[k] < l_cc[first]:
            first = k
    for kk in range(m):
        k = first if kk == 0 else (kk - 1 if kk <= first else kk)
        r = math.sqrt(l_cc[k]) - l_box[k]  # no point of the piece is nearer than this
        if r > 0.0 and r * r > best:
            continue
        f = l_face[k]
        reg = _closest_on_triangle(ox, oy, oz, tri[f], qbuf)
        dx, dy, dz = qbuf[0] - ox, qbuf[1] - oy, qbuf[2] - oz
        d2 = _dot3(dx, dy, dz, dx, dy, dz)
        if d2 < best:
            best, bf, breg = d2, f, reg
            bx, by, bz = qbuf[0], qbuf[1], qbuf[2]
            tie = False
        elif d2 == best and f != bf and not tie:
            # Another face exactly as near: harmless if it gives the same point and normal
            # (a shared edge or corner), otherwise which one wins depends on the search order.
            _pseudo_normal(bf, breg, faces, fnormal, enormal, vnormal, nbuf[0])
            _pseudo_normal(f, reg, faces, fnormal, enormal, vnormal, nbuf[1])
            for q in range(3):
                if nbuf[0, q] != nbuf[1, q]:
                    tie = True
            tie = tie or qbuf[0] != bx or qbuf[1] != by or qbuf[2] != bz
    if tie or not (math.sqrt(best) <= reach * (1 - 1e-9)):
        _closest_one(ox, oy, oz, qb, grid_origin, s, dims, q_max, np.inf, bstart, bcount, bitems, pcentre, pradius,
                     pwitness, pparent, tri, state, qbuf)
        best, bf, breg = state[0], np.int64(state[1]), np.int64(state[2])
        bx, by, bz = state[3], state[4], state[5]
    dist[i] = math.sqrt(best)
    bpt[i, 0], bpt[i, 1], bpt[i, 2] = bx, by, bz
    if bf >= 0:
        _pseudo_normal(bf, breg, faces, fnormal, enormal, vnormal, nrm[i])
    if two_d:
        bpt[i, 2] = 0.0
        nrm[i, 2] = 0.0
        ln = max(math.sqrt(nrm[i, 0] * nrm[i, 0] + nrm[i, 1] * nrm[i, 1] + nrm[i, 2] * nrm[i, 2]), 1e-300)
        nrm[i, 0] /= ln
        nrm[i, 1] /= ln
    return dist[i] < nudge


# ------------------------------------------------------- recurring neighbour sets
# Stencils of one body share few neighbour sets: on a surface of smooth pieces
# the same half-balls of lattice offsets recur (1 459 sets among the 41 699
# stencils of the tapered-wing benchmark). For a fit centred on its own cell
# (the direct method) the weighted neighbour rows A_n depend on the set alone,
# so their Gram matrix G_n = A_n^T A_n is factorised once per set, as
# G_n = Q diag(lam) Q^T (_eigh_small), and each stencil adds its boundary row
# a_b as a rank-one update G = G_n + a_b a_b^T:
#   * the extreme eigenvalues of G from the secular equation
#     1 + sum_i z_i^2 / (lam_i - mu) = 0, z = Q^T a_b (Golub 1973, "Some modified
#     matrix eigenvalue problems", SIAM Rev. 15; Bunch, Nielsen & Sorensen 1978,
#     Numer. Math. 31), solved by their two-pole model steps kept inside the bracket;
#   * g = G^-1 e_0 by the Sherman-Morrison formula from G_n^-1 = Q diag(1/lam) Q^T,
#     and the value weights sw_j (a_j . g), as the QR solve defines them.
# Its rounding error grows like cond(A)^2 eps (against cond(A) eps for the QR
# solve), so the update is used only where both the set's and the stencil's
# condition are at most _SET_COND_MAX: there it agrees with the QR solve to a few
# 1e-13 of the largest weight (about 40^2 x 2.2e-16 = 3.5e-13 at the cap; measured
# up to 3.9e-13 with the cap at 50, so the cap is 40), against the 1e-12 the tests
# hold it to (tests/test_kernels.py). Any other stencil, and the image-point
# method, take the QR solve.
_SET_COND_MAX = 40.0


@numba.njit(**_JIT)
def _eigh_small(G, m, Z, lam, v, p_, e):
    """Eigenvalues (ascending, in lam) and orthonormal eigenvectors (columns of Z) of the
    symmetric (m, m) G (destroyed). Returns False if the QL iteration did not converge.

    Householder reduction to tridiagonal form with the reflectors accumulated
    (Golub & Van Loan, Matrix Computations, §8.3.1), then the implicit QL algorithm
    with the rotations applied to them (Press et al., Numerical Recipes, 3rd ed.
    2007, §11.3-11.4, routines tred2 / tqli): G = Z diag(lam) Z^T.
    """
    for i in range(m):
        for j in range(m):
            Z[i, j] = 1.0 if i == j else 0.0
    for k in range(m - 2):
        nrm2 = 0.0
        for j in range(k + 1, m):
            nrm2 += G[j, k] * G[j, k]
        nrm = math.sqrt(nrm2)
        if nrm == 0.0:
            continue
        alpha = -nrm if G[k + 1, k] >= 0.0 else nrm
        for j in range(k + 1, m):
            v[j] = G[j, k]
        v[k + 1] -= alpha
        vv = 0.0
        for j in range(k + 1, m):
            vv += v[j] * v[j]
        beta = 2.0 / vv
        for i in range(k + 1, m):
            p_[i] = 0.0
        for j in range(k + 1, m):
            vj = v[j]
            for i in range(k + 1, m):
                p_[i] += G[j, i] * vj
        pv = 0.0
        for i in range(k + 1, m):
            p_[i] = beta * p_[i]
            pv += p_[i] * v[i]
        half = 0.5 * beta * pv
        for i in range(k + 1, m):
            p_[i] -= half * v[i]
        for i in range(k + 1, m):
            for j in range(k + 1, m):
                G[i, j] -= v[i] * p_[j] + p_[i] * v[j]
        G[k + 1, k] = alpha
        G[k, k + 1] = alpha
        # Z <- Z (I - beta v v^T) on columns k+1..m-1.
        for r in range(m):
            acc = 0.0
            for j in range(k + 1, m):
                acc += Z[r, j] * v[j]
            acc *= beta
            for j in range(k + 1, m):
                Z[r, j] -= acc * v[j]
    for i in range(m):
        lam[i] = G[i, i]
        e[i] = G[i + 1, i] if i < m - 1 else 0.0
    if not _tridiagonal_ql(lam, e, Z, True):
        return False
    for i in range(1, m):  # ascending, vectors alongside
        j = i
        while j > 0 and lam[j - 1] > lam[j]:
            lam[j - 1], lam[j] = lam[j], lam[j - 1]
            for r in range(m):
                Z[r, j - 1], Z[r, j] = Z[r, j], Z[r, j - 1]
            j -= 1
    return True


@numba.njit(**_JIT)
def _secular_root(dl, z, m, use, pole, delta, hi):
    """The root in (0, hi] of f(t) = 1 + sum_{use} z_i^2 / (dl_i - t), increasing there.

    dl: the eigenvalues shifted so that the bracket's pole, index ``pole``, is at
    0; ``delta``: the nearest other pole (dl of a used index; NaN if none). Each
    step solves the model 1 + (rest at t_k) - z_p^2/t + s/(delta - t) matched in
    value and slope at t_k (Bunch, Nielsen & Sorensen 1978), falling back to
    Newton's step and to bisection whenever a step leaves the bracket.
    Returns (t, converged).
    """
    lo = 0.0
    zp = z[pole] * z[pole]
    rest = 1.0
    for i in range(m):
        if use[i] and i != pole:
            rest += z[i] * z[i] / dl[i]
    t = zp / rest if rest > 0.0 else 0.5 * hi
    if not (lo < t < hi):
        t = 0.5 * (lo + hi)
    for _ in range(100):
        psi = 0.0
        dpsi = 0.0
        size = 1.0
        for i in range(m):
            if use[i] and i != pole:
                r = 1.0 / (dl[i] - t)
                q = z[i] * z[i] * r
                psi += q
                dpsi += q * r
                size += abs(q)
        f = 1.0 - zp / t + psi
        # Stop once f is within its own rounding error (a bound of the kind LAPACK's dlaed4 uses).
        if abs(f) <= 16.0 * 2.220446049250313e-16 * (size + zp / t):
            return t, True
        if f > 0.0:
            hi = t
        else:
            lo = t
        tn = np.nan
        if delta == delta:  # two-pole model
            gap = delta - t
            sl = dpsi * gap * gap
            a = 1.0 + psi - sl / gap
            bq = a * delta + zp + sl
            cq = zp * delta
            disc = bq * bq - 4.0 * a * cq
            if disc >= 0.0:
                sq = math.sqrt(disc)
                r1 = 2.0 * cq / (bq + sq) if bq + sq != 0.0 else np.nan
                r2 = (bq + sq) / (2.0 * a) if a != 0.0 else np.nan
                if lo < r1 < hi:
                    tn = r1
                elif lo < r2 < hi:
                    tn = r2
        else:  # one pole: 1 + psi - zp / t = 0 with psi frozen
            a = 1.0 + psi
            if a > 0.0:
                tn = zp / a
        if not (lo < tn < hi):
            tn = t - f / (zp / (t * t) + dpsi)  # Newton
        if not (lo < tn < hi):
            tn = 0.5 * (lo + hi)
        if abs(tn - t) <= 4.0 * 2.220446049250313e-16 * abs(tn) or not (lo < tn < hi):
            return tn, True
        t = tn
    return t, False


@numba.njit(**_JIT)
def _rank_one_extremes(lam, z, m, dl, use):
    """Smallest and largest eigenvalues of diag(lam) + z z^T (lam ascending), and whether found.

    Components with |z_i| below 8 eps max(|lam|, |z|) leave lam_i an eigenvalue
    (deflation, as LAPACK's dlaed2); the rest give the secular equation's
    outermost roots.
    """
    zz = 0.0
    zmax = 0.0
    for i in range(m):
        zz += z[i] * z[i]
        zmax = max(zmax, abs(z[i]))
    tol = 8.0 * 2.220446049250313e-16 * max(abs(lam[m - 1]), zmax)
    first = -1
    last = -1
    for i in range(m):
        use[i] = abs(z[i]) > tol
        if use[i]:
            if first < 0:
                first = i
            last = i
    if first < 0:
        return lam[0], lam[m - 1], True
    # Smallest: lam[0] if z_0 was deflated, else the root right of lam[0] (or a deflated lam[1] below it).
    if first > 0:
        lmin = lam[0]
    else:
        nxt = -1
        for i in range(1, m):
            if use[i]:
                nxt = i
                break
        for i in range(m):
            dl[i] = lam[i] - lam[0]
        hi = dl[nxt] if nxt > 0 else zz
        t, ok = _secular_root(dl, z, m, use, 0, dl[nxt] if nxt > 0 else np.nan, hi)
        if not ok:
            return 0.0, 0.0, False
        lmin = lam[0] + t
        if m > 1 and not use[1]:
            lmin = min(lmin, lam[1])
    # Largest: the root right of the last pole, at most |z|^2 beyond it.
    prev = -1
    for i in range(last):
        if use[i]:
            prev = i
    for i in range(m):
        dl[i] = lam[i] - lam[last]
    t, ok = _secular_root(dl, z, m, use, last, dl[prev] if prev >= 0 else np.nan, zz)
    if not ok:
        return 0.0, 0.0, False
    lmax = max(lam[last] + t, lam[m - 1])
    return lmin, lmax, True


@numba.njit(**_JIT)
def _set_hash(rd, order, kept):
    """64-bit FNV-1a hash of a neighbour set: its round and offset indices in row order."""
    hsh = np.uint64(14695981039346656037)
    prime = np.uint64(1099511628211)
    hsh = (hsh ^ np.uint64(rd + 1)) * prime
    for q in range(kept):
        hsh = (hsh ^ np.uint64(order[q] + 2)) * prime
    return np.int64(hsh & np.uint64(0x7FFFFFFFFFFFFFFF))


# Lattice symmetry of the sets: a set and its image under a signed permutation T of the
# axes (the 48 symmetries of the cube; the 8 of the square on planar grids) share one
# factorisation. The basis rows of T o are a signed permutation P of those of o, so with
# the boundary row carried by T as well the Gram matrix becomes P G P^T: the same
# eigenvalues, and the same value weights (e_0, the constant term, is fixed by P). Each
# set is therefore factorised in a canonical frame chosen from the set itself: T flips
# the axes along which the sum of its offsets is negative and orders them by the sum's
# magnitude (ties by axis). Sets recur about six times more often so on a sphere.
_PERMS = ((0, 1, 2), (0, 2, 1), (1, 0, 2), (1, 2, 0), (2, 0, 1), (2, 1, 0))


def _symmetry_tables(offsets):
    """(48, no) index of T(offsets[c]) in offsets, (48, 3) axis taken and (48, 3) sign, per T.

    T has code 8 p + signs: output axis j is sign[j] * input axis _PERMS[p][j]; the
    sign bits flip input axes 0, 1, 2. A T that takes an offset out of the set
    (a planar grid's disc under an exchange with z) maps it to -1 and is never
    chosen; balls of lattice points are closed under all 48. Read-only tables,
    kept per offset set (they depend on nothing else).
    """
    offsets = np.ascontiguousarray(offsets, dtype=np.int64)
    key = (offsets.shape, offsets.tobytes())
    found = _SYMMETRY_TABLES.get(key)
    if found is None:
        r = int(np.abs(offsets).max(initial=0))
        where = np.full((2 * r + 1,) * 3, -1, dtype=np.int64)  # offset -> its index, over the cube of side 2r + 1
        where[tuple((offsets + r).T)] = np.arange(len(offsets))
        smap = np.empty((48, len(offsets)), dtype=np.int64)
        perm = np.empty((48, 3), dtype=np.int64)
        sign = np.empty((48, 3))
        for p, pp in enumerate(_PERMS):
            for bits in range(8):
                t = 8 * p + bits
                flip = np.array([-1 if bits >> k & 1 else 1 for k in range(3)])
                perm[t] = pp
                sign[t] = flip[list(pp)]
                img = (offsets * flip)[:, list(pp)]
                smap[t] = where[tuple((img + r).T)]
        for a in (smap, perm, sign):
            a.flags.writeable = False
        found = _SYMMETRY_TABLES[key] = (smap, perm, sign)
    return found


_SYMMETRY_TABLES: dict = {}


@numba.njit(**_JIT)
def _symmetry_code(sx, sy, sz, planar):
    """The canonical frame's T (see _symmetry_tables) of a set whose offsets sum to (sx, sy, sz)."""
    bits = (1 if sx < 0 else 0) + (2 if sy < 0 else 0) + (0 if planar or sz >= 0 else 4)
    ax, ay, az = abs(sx), abs(sy), abs(sz)
    if planar:
        return 8 * (0 if ax >= ay else 2) + bits
    # Axes by decreasing magnitude, ties by axis: the index of that order in _PERMS.
    if ax >= ay:
        if ay >= az:
            p = 0  # x y z
        elif ax >= az:
            p = 1  # x z y
        else:
            p = 4  # z x y
    else:
        if ax >= az:
            p = 2  # y x z
        elif ay >= az:
            p = 3  # y z x
        else:
            p = 5  # z y x
    return 8 * p + bits


@numba.njit(**_JIT)
def _set_factor(slot, rd, order, kept, offs, planar, m, support, weight_kind, s_rows, s_vecs, s_lam, s_gn, s_ok,
                s_rd, s_len, s_offs, gram, brow, bw, zw, ew):
    """Factorise the neighbour set of slot: rows sw_j^2 b_j, eigen-pairs of G_n and G_n^-1 e_0."""
    s_rd[slot] = rd
    s_len[slot] = kept
    for q in range(kept):
        s_offs[slot, q] = order[q]
    for a in range(m):
        for b in range(m):
            gram[a, b] = 0.0
    for q in range(kept):
        c = order[q]
        xs = float(offs[c, 0])
        ys = float(offs[c, 1])
        zs = 0.0 if planar else float(offs[c, 2])
        w = _weight_of(math.sqrt(xs * xs + ys * ys + zs * zs), support, weight_kind)
        _basis_row(xs, ys, zs, planar, brow)
        for a in range(m):
            s_rows[slot, q, a] = w * brow[a]
            for b in range(a, m):
                gram[a, b] += w * brow[a] * brow[b]
    for a in range(m):
        for b in range(a):
            gram[a, b] = gram[b, a]
    lam = s_lam[slot]
    ok = _eigh_small(gram, m, s_vecs[slot], lam, bw, zw, ew)
    ok = ok and lam[0] > 0.0 and lam[m - 1] <= _SET_COND_MAX * _SET_COND_MAX * lam[0]
    s_ok[slot] = ok
    if ok:
        vecs = s_vecs[slot]
        for a in range(m):
            acc = 0.0
            for k in range(m):
                acc += vecs[a, k] * (vecs[0, k] / lam[k])
            s_gn[slot, a] = acc


@numba.njit(**_JIT)
def _set_solve(slot, kept, ab, m, s_rows, s_vecs, s_lam, s_gn, z, y, g, dl, use, wts_row, out):
    """Weights of a stencil whose neighbour set is factorised in slot; its boundary row is ab.

    Writes the neighbour weights to wts_row and returns (cond, boundary weight
    before the row scale, ok); ok is False where the update is not to be used.
    """
    vecs = s_vecs[slot]
    lam = s_lam[slot]
    for k in range(m):
        acc = 0.0
        for a in range(m):
            acc += vecs[a, k] * ab[a]
        z[k] = acc
    lmin, lmax, found = _rank_one_extremes(lam, z, m, dl, use)
    if not found or not (lmin > _GRAM_RTOL * lmax) or lmax > _SET_COND_MAX * _SET_COND_MAX * lmin:
        return np.inf, 0.0, False
    gn = s_gn[slot]
    s1 = 0.0
    s2 = 1.0
    for a in range(m):
        acc = 0.0
        for k in range(m):
            acc += vecs[a, k] * (z[k] / lam[k])
        y[a] = acc
        s1 += ab[a] * gn[a]
    for a in range(m):
        s2 += ab[a] * y[a]
    ratio = s1 / s2
    for a in range(m):
        g[a] = gn[a] - y[a] * ratio
    rows = s_rows[slot]
    for q in range(kept):
        acc = 0.0
        for a in range(m):
            acc += rows[q, a] * g[a]
        wts_row[q] = acc
    acc = 0.0
    for a in range(m):
        acc += ab[a] * g[a]
    out[0] = acc
    return math.sqrt(lmax / lmin), acc, True


@numba.njit(**_JIT)
def _stencils_kernel(tags, shape3, lower3, h, cells, anchor, origin, centre, bpt, nrm, dist, allowed, offs,
                     round_n, round_r, min_visible, kmax, image, neumann, planar, weight_kind, find_boundary, two_d,
                     nudge, grid_origin, s, dims, cstart, ccount, citems, pcentre, pradius, pparent, tri, fnormal,
                     rmax, q_max, bstart, bcount, bitems, pwitness, faces, enormal, vnormal, sym_map, sym_perm,
                     sym_sign):
    n = cells.shape[0]
    m = 6 if planar else 10
    no = offs.shape[0]
    nb = np.full((n, kmax), -1, dtype=np.int64)
    nvis = np.zeros(n, dtype=np.int64)
    used_r = np.zeros(n)
    wts = np.zeros((n, kmax))
    wbnd = np.zeros(n)
    cond = np.full(n, np.inf)
    by_set = np.zeros(n, dtype=np.bool_)
    cflat = np.empty(no, dtype=np.int64)
    cvis = np.zeros(no, dtype=np.bool_)
    cidx = np.empty(no, dtype=np.int64)
    ex = np.empty(no)
    ey = np.empty(no)
    ez = np.empty(no)
    hit = np.zeros(no, dtype=np.bool_)
    ex2 = np.empty(no)
    ey2 = np.empty(no)
    ez2 = np.empty(no)
    hit2 = np.zeros(no, dtype=np.bool_)
    idx2 = np.empty(no, dtype=np.int64)
    order = np.empty(no, dtype=np.int64)
    key = np.empty(no)
    lo, hi, l_face, l_cx, l_cy, l_cz, l_box, l_so, l_cc, l_r2, c_mx, c_my, c_mz, c_ok = _fan_scratch(
        citems.shape[0], no)
    Bt, V, beta, G4, y, acc, alpha, vv, G, d, e2, v, p_, nk4, cl = _lanes_scratch(kmax + 1, m)
    sw = np.empty((kmax + 1, _LANES))
    row_of = np.empty((kmax + 1, _LANES), dtype=np.int64)
    who = np.empty(_LANES, dtype=np.int64)
    lane = 0
    brow = np.empty(m)
    brow2 = np.empty(m)
    ab = np.empty(m)
    # At most 8192 sets and about 160 MB of rows; none for the image point (never cell-centred).
    set_cap = 0 if image else min(n, 8192, max(1, 20_000_000 // (kmax * m)))
    # Factorised neighbour sets (see _SET_COND_MAX): hash -> slot, open addressing with linear
    # probing in a table at most half full (keys are non-negative; -1 marks a free entry).
    t_size = 1
    while t_size < 2 * set_cap:
        t_size *= 2
    t_mask = t_size - 1
    t_keys = np.full(t_size, -1, dtype=np.int64)
    t_vals = np.empty(t_size, dtype=np.int64)
    n_sets = 0
    s_rows = np.empty((set_cap, kmax, m))
    s_vecs = np.empty((set_cap, m, m))
    s_lam = np.empty((set_cap, m))
    s_gn = np.empty((set_cap, m))
    s_ok = np.zeros(set_cap, dtype=np.bool_)
    s_rd = np.empty(set_cap, dtype=np.int64)
    s_len = np.empty(set_cap, dtype=np.int64)
    s_offs = np.empty((set_cap, kmax), dtype=np.int64)
    gram = np.empty((m, m))
    bw = np.empty(m)
    zw = np.empty(m)
    ew = np.empty(m)
    abc = np.empty(m)  # the boundary row in a set's canonical frame
    zv = np.empty(m)
    yv = np.empty(m)
    gv = np.empty(m)
    dl = np.empty(m)
    use = np.empty(m, dtype=np.bool_)
    wrow = np.empty(kmax)
    bout = np.empty(1)
    canon = np.empty(kmax, dtype=np.int64)  # a set's offsets in its canonical frame, in offset order
    cmark = np.zeros(no, dtype=np.bool_)
    crank = np.empty(no, dtype=np.int64)
    v3 = np.empty(3)
    n3 = np.empty(3)
    rd_used = 0
    nrounds = round_n.shape[0]
    s1, s2 = shape3[1], shape3[2]
    qb = np.empty(3, dtype=np.int64)
    state = np.empty(6)
    qbuf = np.empty(3)
    nbuf = np.empty((2, 3))
    for i in range(n):
        ai, aj, ak = anchor[i, 0], anchor[i, 1], anchor[i, 2]
        ox, oy, oz = origin[i, 0], origin[i, 1], origin[i, 2]
        # Candidates round by round (offsets sorted by length; each round tests only its new ones).
        # A round whose candidates could not bring the count to min_visible even if all were
        # visible cannot be the last: its candidates are tested together with the next round's
        # (one gather and one fan test instead of two; the same visible set and stopping round).
        n_old = 0
        count = 0
        n_off = 0
        nc = 0
        longest = 0.0
        bnd_done = not find_boundary
        for rd in range(nrounds):
            n_off = round_n[rd]
            for c in range(n_old, n_off):
                cvis[c] = False
                ci, cj, ck = ai + offs[c, 0], aj + offs[c, 1], ak + offs[c, 2]
                if ci < 0 or cj < 0 or ck < 0 or ci >= shape3[0] or cj >= s1 or ck >= s2:
                    continue
                f = (ci * s1 + cj) * s2 + ck
                cflat[c] = f
                if not allowed[tags[f]] or f == cells[i]:
                    continue
                x = lower3[0] + (ci + 0.5) * h
                yy = lower3[1] + (cj + 0.5) * h
                z = lower3[2] + (ck + 0.5) * h
                cidx[nc] = c
                ex[nc] = x
                ey[nc] = yy
                ez[nc] = z
                hit[nc] = False
                dx, dy, dz = x - ox, yy - oy, z - oz
                longest = max(longest, dx * dx + dy * dy + dz * dz)
                nc += 1
            n_old = n_off
            if count + nc < min_visible and rd < nrounds - 1:
                continue
            if not bnd_done:
                bnd_done = True
                # The boundary point from the pieces gathered for the first tested segments.
                reach = math.sqrt(longest) * (1 + 1e-9)
                mg = _gather(ox, oy, oz, reach, grid_origin, s, dims, cstart, ccount, citems, pcentre, pradius,
                             pparent, tri, fnormal, rmax, lo, hi, l_face, l_cx, l_cy, l_cz, l_box, l_so, l_cc, l_r2)
                on_surface = _boundary_point(i, ox, oy, oz, reach, mg, l_face, l_cc, l_box, tri, qb, grid_origin, s,
                                             dims, q_max, bstart, bcount, bitems, pcentre, pradius, pwitness,
                                             pparent, faces, fnormal, enormal, vnormal, two_d, nudge, state, qbuf,
                                             nbuf, bpt, nrm, dist)
                if on_surface:
                    # A centre on the surface sees along it: look from just off it.
                    ox = bpt[i, 0] + nudge * nrm[i, 0]
                    oy = bpt[i, 1] + nudge * nrm[i, 1]
                    oz = bpt[i, 2] + nudge * nrm[i, 2]
                    origin[i, 0], origin[i, 1], origin[i, 2] = ox, oy, oz
                    longest = 0.0
                    for jj in range(nc):
                        dx, dy, dz = ex[jj] - ox, ey[jj] - oy, ez[jj] - oz
                        longest = max(longest, dx * dx + dy * dy + dz * dz)
                    mg = _gather(ox, oy, oz, math.sqrt(longest) * (1 + 1e-9), grid_origin, s, dims, cstart, ccount,
                                 citems, pcentre, pradius, pparent, tri, fnormal, rmax, lo, hi, l_face, l_cx, l_cy,
                                 l_cz, l_box, l_so, l_cc, l_r2)
                if nc > 0 and mg > 0:
                    _screened_fan_test(ox, oy, oz, ex, ey, ez, nc, hit, mg, tri, fnormal, l_face, l_cx, l_cy, l_cz,
                                       l_box, l_so, l_cc, l_r2, c_mx, c_my, c_mz, c_ok, bpt[i, 0], bpt[i, 1],
                                       bpt[i, 2], nrm[i, 0], nrm[i, 1], nrm[i, 2], math.sqrt(longest), ex2, ey2,
                                       ez2, hit2, idx2)
            elif nc > 0:
                mg = _gather(ox, oy, oz, math.sqrt(longest) * (1 + 1e-9), grid_origin, s, dims, cstart, ccount,
                             citems, pcentre, pradius, pparent, tri, fnormal, rmax, lo, hi, l_face, l_cx, l_cy, l_cz,
                             l_box, l_so, l_cc, l_r2)
                if mg > 0:
                    _screened_fan_test(ox, oy, oz, ex, ey, ez, nc, hit, mg, tri, fnormal, l_face, l_cx, l_cy, l_cz,
                                       l_box, l_so, l_cc, l_r2, c_mx, c_my, c_mz, c_ok, bpt[i, 0], bpt[i, 1],
                                       bpt[i, 2], nrm[i, 0], nrm[i, 1], nrm[i, 2], math.sqrt(longest), ex2, ey2,
                                       ez2, hit2, idx2)
            if nc > 0:
                for jj in range(nc):
                    if not hit[jj]:
                        cvis[cidx[jj]] = True
                        count += 1
            nc = 0
            longest = 0.0
            if count >= min_visible or rd == nrounds - 1:
                used_r[i] = round_r[rd]
                rd_used = rd
                break
        # Keep the nearest kmax visible ones.
        kept = min(count, kmax)
        nvis[i] = kept
        cx, cy, cz = centre[i, 0], centre[i, 1], centre[i, 2]
        if image:
            # Stable insertion sort of the visible candidates by distance to the fitting point.
            nv = 0
            for c in range(n_off):
                if not cvis[c]:
                    continue
                dx = (lower3[0] + (ai + offs[c, 0] + 0.5) * h) - cx
                dy = (lower3[1] + (aj + offs[c, 1] + 0.5) * h) - cy
                dz = (lower3[2] + (ak + offs[c, 2] + 0.5) * h) - cz
                kc = (dx * dx + dy * dy) + dz * dz
                p = nv
                while p > 0 and key[p - 1] > kc:
                    key[p] = key[p - 1]
                    order[p] = order[p - 1]
                    p -= 1
                key[p] = kc
                order[p] = c
                nv += 1
        else:
            # Offsets are sorted by length from the cell itself: column order is nearest first.
            nv = 0
            for c in range(n_off):
                if cvis[c] and nv < kmax:
                    order[nv] = c
                    nv += 1
        # Rows of the fit: the kept neighbours, then the boundary datum; zero weights dropped.
        support = used_r[i] + 1.0
        for q in range(kept):
            nb[i, q] = cflat[order[q]]
        xs = (bpt[i, 0] - cx) / h
        ys = (bpt[i, 1] - cy) / h
        zs = 0.0 if planar else (bpt[i, 2] - cz) / h
        wb = math.sqrt(_weight_of(math.sqrt(xs * xs + ys * ys + zs * zs), support, weight_kind))
        if neumann:
            _normal_derivative_row(xs, ys, zs, nrm[i, 0], nrm[i, 1], 0.0 if planar else nrm[i, 2], planar, brow)
        else:
            _basis_row(xs, ys, zs, planar, brow)
        for k in range(m):
            ab[k] = wb * brow[k]
        if not image and wb != 0.0 and kept > 0:
            # A recurring neighbour set: reuse its factorisation (see _SET_COND_MAX), in the
            # set's canonical frame (see _PERMS).
            sx = sy = sz = 0
            for q in range(kept):
                c = order[q]
                sx += offs[c, 0]
                sy += offs[c, 1]
                sz += offs[c, 2]
            t = _symmetry_code(sx, sy, sz, planar)
            for q in range(kept):
                cmark[sym_map[t, order[q]]] = True
            nv = 0
            for c in range(n_off):
                if cmark[c]:
                    cmark[c] = False
                    canon[nv] = c
                    crank[c] = nv
                    nv += 1
            hkey = _set_hash(rd_used, canon, kept)
            tp = hkey & t_mask
            while t_keys[tp] != -1 and t_keys[tp] != hkey:
                tp = (tp + 1) & t_mask
            slot = t_vals[tp] if t_keys[tp] == hkey else -1
            if slot >= 0:
                same = s_rd[slot] == rd_used and s_len[slot] == kept
                for q in range(kept):
                    same = same and s_offs[slot, q] == canon[q]
                if not same:
                    slot = -2  # a hash collision: solve this one by QR
            elif n_sets < set_cap:
                slot = n_sets
                n_sets += 1
                t_keys[tp] = hkey
                t_vals[tp] = slot
                _set_factor(slot, rd_used, canon, kept, offs, planar, m, support, weight_kind, s_rows, s_vecs,
                            s_lam, s_gn, s_ok, s_rd, s_len, s_offs, gram, brow2, bw, zw, ew)
            if slot >= 0 and s_ok[slot]:
                # The boundary row in the canonical frame: T applied to the point (and normal).
                v3[0], v3[1], v3[2] = (bpt[i, 0] - cx) / h, (bpt[i, 1] - cy) / h, 0.0 if planar else (bpt[i, 2] - cz) / h
                xt = sym_sign[t, 0] * v3[sym_perm[t, 0]]
                yt = sym_sign[t, 1] * v3[sym_perm[t, 1]]
                zt = sym_sign[t, 2] * v3[sym_perm[t, 2]]
                if neumann:
                    n3[0], n3[1], n3[2] = nrm[i, 0], nrm[i, 1], 0.0 if planar else nrm[i, 2]
                    _normal_derivative_row(xt, yt, zt, sym_sign[t, 0] * n3[sym_perm[t, 0]],
                                           sym_sign[t, 1] * n3[sym_perm[t, 1]], sym_sign[t, 2] * n3[sym_perm[t, 2]],
                                           planar, brow2)
                else:
                    _basis_row(xt, yt, zt, planar, brow2)
                for k in range(m):
                    abc[k] = wb * brow2[k]
                cnd, bval, done = _set_solve(slot, kept, abc, m, s_rows, s_vecs, s_lam, s_gn, zv, yv, gv, dl, use,
                                             wrow, bout)
                if done:
                    for q in range(kept):
                        wts[i, q] = wrow[crank[sym_map[t, order[q]]]]
                    wbnd[i] = bval * wb
                    cond[i] = cnd
                    by_set[i] = True
                    continue
        nk = 0
        for q in range(kept):
            c = order[q]
            if image:
                xs = ((lower3[0] + (ai + offs[c, 0] + 0.5) * h) - cx) / h
                ys = ((lower3[1] + (aj + offs[c, 1] + 0.5) * h) - cy) / h
                zs = ((lower3[2] + (ak + offs[c, 2] + 0.5) * h) - cz) / h
            else:  # the fit is centred on the cell: scaled coordinates are the offsets, exactly
                xs, ys, zs = float(offs[c, 0]), float(offs[c, 1]), float(offs[c, 2])
            if planar:
                zs = 0.0
            rho = math.sqrt(xs * xs + ys * ys + zs * zs)
            wq = math.sqrt(_weight_of(rho, support, weight_kind))
            if wq == 0.0:
                continue
            _basis_row(xs, ys, zs, planar, brow)
            for k in range(m):
                Bt[k, nk, lane] = wq * brow[k]
            sw[nk, lane] = wq
            row_of[nk, lane] = q
            nk += 1
        if wb != 0.0:
            for k in range(m):
                Bt[k, nk, lane] = ab[k]
            sw[nk, lane] = wb
            row_of[nk, lane] = -1
            nk += 1
        if nk < m:
            continue  # fewer weighted rows than unknowns: rank deficient
        # Solve the fits _LANES at a time.
        nk4[lane] = nk
        who[lane] = i
        lane += 1
        if lane == _LANES:
            _solve_lanes(lane, m, Bt, V, beta, G4, y, acc, alpha, vv, G, d, e2, v, p_, nk4, cl, sw, row_of, who, wts,
                         wbnd, cond)
            lane = 0
    if lane > 0:
        _solve_lanes(lane, m, Bt, V, beta, G4, y, acc, alpha, vv, G, d, e2, v, p_, nk4, cl, sw, row_of, who, wts,
                     wbnd, cond)
    return nb, nvis, used_r, wts, wbnd, cond, by_set


@numba.njit(**_JIT)
def _solve_lanes(nl, m, Bt, V, beta, G4, y, acc, alpha, vv, G, d, e2, v, p_, nk4, cl, sw, row_of, who, wts, wbnd,
                 cond):
    """Solve the nl fits gathered in the lanes and write their weights and condition."""
    _wls_lanes(Bt, nk4, nl, m, V, beta, G4, y, acc, alpha, vv, G, d, e2, v, p_, cl)
    for l in range(nl):
        if not (cl[l] < np.inf):
            continue
        i = who[l]
        cond[i] = cl[l]
        for jj in range(nk4[l]):
            q = row_of[jj, l]
            if q >= 0:
                wts[i, q] = y[jj, l] * sw[jj, l]
            else:
                wbnd[i] = y[jj, l] * sw[jj, l]


def stencil_fits(tags, shape3, lower3, h, cells, anchor, origin, centre, allowed, offsets, radii, min_visible,
                 kmax, *, image, neumann, planar, weight, index, boundary=None, two_d=False, nudge=0.0):
    """Neighbours, visibility and WLS fit of every stencil in one compiled pass.

    The whole middle of :func:`ibprep.stencils.build.build_stencils` for one cell at a
    time: the boundary point (unless given), candidate cells from the sorted
    offsets, round by round up to the radii; the segment test of
    :func:`segments_cross_fan` against the surface pieces near the origin; the
    nearest ``kmax`` visible kept; the weighted design matrix in scaled
    coordinates; and the QR solve of :func:`wls_value_weights`, or, for a
    well-conditioned fit centred on its cell whose neighbour set recurs, the
    rank-one update of that set's factorisation (see ``_SET_COND_MAX``). Agrees
    with the array pipeline it stands in for (tests/test_kernels.py): same
    neighbours and counts, weights to round-off.

    Parameters
    ----------
    tags : (N,) uint8 — flat CellTag codes over shape3.
    shape3 : (3,) int — grid shape (a 2-D grid with a last extent of 1).
    lower3 : (3,) float — metres; the grid's lower corner (2-D: z = -h/2).
    h : float — metres; the spacing.
    cells : (n,) int — flat indices of the interface cells.
    anchor : (n, 3) int — the cell the offsets start from.
    origin : (n, 3) float — metres; where visibility is tested from.
    centre : (n, 3) float — metres; the fitting point. Unless ``image``, it must be
        the centre of the anchor cell: the neighbour rows then use the exact
        index offsets from ``anchor``.
    allowed : (3,) bool — which tags may be neighbours.
    offsets : (no, 3) int — candidate offsets sorted by length.
    radii : sequence of float — cells; the rounds' radii, increasing.
    min_visible, kmax : int — growth stops at min_visible visible; kmax kept.
    image, neumann, planar : bool — image-point fit; Neumann boundary row; 6-term basis.
    weight : str — "gaussian", "inverse-distance" or "wendland".
    index : TriangleIndex — the bucketed surface.
    boundary : ((n, 3), (n, 3)) float, optional — boundary points (metres) and unit
        normals. If not given they are found here: the closest point of the
        origin (which must then be the fitting point) with its pseudo-normal,
        put in the plane z = 0 when ``two_d``; an origin closer to the surface
        than ``nudge`` metres is moved that far off it along the normal.
    two_d : bool — a 2-D grid (see boundary).
    nudge : float — metres (see boundary).

    Returns
    -------
    nb : (n, kmax) int — neighbours, -1 padded; nvis : (n,) int; used_radius : (n,)
    float; weights : (n, kmax) float; boundary : (n,) float — raw weight of the
    boundary row; cond : (n,) float — inf where the fit is rank deficient;
    by_set : (n,) bool — solved by updating a recurring neighbour set's factorisation;
    bpt, nrm : (n, 3) float — the boundary points and normals; dist : (n,) float —
    the origin's distance to the surface (zeros when ``boundary`` was given);
    origin : (n, 3) float — the origins used.
    """
    offsets = np.ascontiguousarray(offsets, dtype=np.int64)
    len2 = (offsets * offsets).sum(axis=1)
    radii = np.asarray(radii, dtype=float)
    round_n = np.array([np.count_nonzero(len2 <= r * r + 1e-9) for r in radii], dtype=np.int64)
    f64 = lambda a: np.array(a, dtype=float, order="C")  # noqa: E731 (copies: the kernel writes some)
    n = len(cells)
    find = boundary is None
    bpt, nrm = (np.zeros((n, 3)), np.zeros((n, 3))) if find else (f64(boundary[0]), f64(boundary[1]))
    dist = np.zeros(n)
    origin = f64(origin)
    dims = np.asarray(index.dims, dtype=np.int64)
    if find and n:
        qb = np.floor((origin - index.origin) / index.bucket_size).astype(np.int64)
        q_max = int(max(index.dims)) + int(np.max(np.abs(qb - np.clip(qb, 0, dims - 1)))) + 1
    else:
        q_max = 0
    offs = offsets[: round_n[-1]]
    sym_map, sym_perm, sym_sign = _symmetry_tables(offs)
    # The frames _symmetry_code can choose: all 48, or on planar grids the 8 that keep z.
    usable = sym_map if not planar else sym_map[[8 * p + b for p in (0, 2) for b in range(4)]]
    if (usable < 0).any():
        raise ValueError("stencil offsets must be closed under the grid's lattice symmetries (a ball or disc)")
    out = _stencils_kernel(
        np.ascontiguousarray(tags, dtype=np.uint8), np.asarray(shape3, dtype=np.int64), f64(lower3), float(h),
        np.ascontiguousarray(cells, dtype=np.int64), np.ascontiguousarray(anchor, dtype=np.int64), origin,
        f64(centre), bpt, nrm, dist, np.asarray(allowed, dtype=bool), offs, round_n, radii,
        int(min_visible), int(kmax), bool(image), bool(neumann), bool(planar), _WEIGHT_CODES[weight], find,
        bool(two_d), float(nudge), np.asarray(index.origin, dtype=float), float(index.bucket_size), dims,
        index.centre_start, index.centre_count, index.centre_items, index.piece_centre, index.piece_radius,
        index.piece_parent, index.tri, index.face_normal, float(index.piece_radius.max(initial=0.0)), q_max,
        index.bucket_start, index.bucket_count, index.bucket_items, index.piece_witness, index.faces,
        index.edge_normal, index.vertex_normal, sym_map, sym_perm, sym_sign,
    )
    return (*out, bpt, nrm, dist, origin)
