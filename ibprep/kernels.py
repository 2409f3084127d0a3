"""Compiled (numba) equivalents of the stencil builder's hot geometric loops.

Each function here takes the same inputs and returns the same outputs as the
numpy method it stands in for, so a call site switches with a one-line change:

* :func:`segments_cross_fan` — :meth:`ibprep.proximity.TriangleIndex.segments_cross_fan`
* :func:`closest` — :meth:`ibprep.proximity.TriangleIndex.closest`
* :func:`wls_value_weights` — ``ibprep.stencils._wls_value_weights``

The kernels walk the index's compressed-sparse-row buckets one query at a
time (no pair arrays), apply the same screens with the same floating-point
expressions in the same order, and run the same exact tests (Möller & Trumbore
1997 for crossings; Ericson 2005, §5.1.5 for closest points). Results agree bit
for bit with the numpy path (see tests/test_kernels.py). They are compiled with
``fastmath`` off (no re-association, no fused multiply-add) and numpy's
floating-point error model (a division by zero gives inf/NaN, as in numpy).
The first call in a fresh environment compiles them (a few seconds, cached to
disk afterwards).
"""

from __future__ import annotations

import math

import numba
import numpy as np

from .proximity import ClosestPoints

__all__ = ["segments_cross_fan", "closest", "wls_value_weights"]

_JIT = dict(cache=True, nogil=True, fastmath=False, error_model="numpy")

# Same constants as ibprep.proximity / ibprep.stencils (kept equal by tests/test_kernels.py).
_BARY_SLACK = 1e-12
_FACE, _VA, _VB, _VC, _EAB, _EBC, _ECA = range(7)
_RANK_RTOL = 1e-13
_GRAM_RTOL = 1e-14


# ------------------------------------------------------------- exact tests
@numba.njit(**_JIT)
def _dot3(ax, ay, az, bx, by, bz):
    # The order numpy's einsum("ij,ij->i") sums three products in on this build (two
    # SIMD lanes, the third term joining lane 0): (x + z) + y; no fused multiply-add.
    # tests/test_kernels.py::test_dot3_matches_einsum guards it.
    return (ax * bx + az * bz) + ay * by


@numba.njit(**_JIT)
def _segment_crosses(p0, p1, tri):
    """Möller–Trumbore on one segment and one (3, 3) triangle; proximity.segments_cross_triangles."""
    ax, ay, az = tri[0, 0], tri[0, 1], tri[0, 2]
    dx, dy, dz = p1[0] - p0[0], p1[1] - p0[1], p1[2] - p0[2]
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
    tx, ty, tz = p0[0] - ax, p0[1] - ay, p0[2] - az
    u = _dot3(tx, ty, tz, pvx, pvy, pvz) * inv
    qx = ty * e1z - tz * e1y
    qy = tz * e1x - tx * e1z
    qz = tx * e1y - ty * e1x
    v = _dot3(dx, dy, dz, qx, qy, qz) * inv
    t = _dot3(e2x, e2y, e2z, qx, qy, qz) * inv
    s = _BARY_SLACK
    return (u >= -s) and (v >= -s) and (u + v <= 1 + s) and (t >= 0.0) and (t <= 1.0)


@numba.njit(**_JIT)
def _closest_on_triangle(px, py, pz, tri, out):
    """Ericson §5.1.5 on one point and one triangle, as proximity.closest_point_on_triangles.

    Writes the closest point to out[0:3] and returns the region code.
    """
    ax, ay, az = tri[0, 0], tri[0, 1], tri[0, 2]
    bx, by, bz = tri[1, 0], tri[1, 1], tri[1, 2]
    cx, cy, cz = tri[2, 0], tri[2, 1], tri[2, 2]
    abx, aby, abz = bx - ax, by - ay, bz - az
    acx, acy, acz = cx - ax, cy - ay, cz - az
    apx, apy, apz = px - ax, py - ay, pz - az
    bpx, bpy, bpz = px - bx, py - by, pz - bz
    cpx, cpy, cpz = px - cx, py - cy, pz - cz
    d1 = _dot3(abx, aby, abz, apx, apy, apz)
    d2 = _dot3(acx, acy, acz, apx, apy, apz)
    d3 = _dot3(abx, aby, abz, bpx, bpy, bpz)
    d4 = _dot3(acx, acy, acz, bpx, bpy, bpz)
    d5 = _dot3(abx, aby, abz, cpx, cpy, cpz)
    d6 = _dot3(acx, acy, acz, cpx, cpy, cpz)
    vc = d1 * d4 - d3 * d2
    vb = d5 * d2 - d1 * d6
    va = d3 * d6 - d5 * d4
    # Priority of the numpy version (its later assignments win).
    if (d1 <= 0) and (d2 <= 0):
        region = _VA
        v, w = 0.0, 0.0
    elif (d3 >= 0) and (d4 <= d3):
        region = _VB
        v, w = 1.0, 0.0
    elif (vc <= 0) and (d1 >= 0) and (d3 <= 0):
        region = _EAB
        v = d1 / (d1 - d3) if d1 - d3 != 0 else 0.0
        w = 0.0
    elif (d6 >= 0) and (d5 <= d6):
        region = _VC
        v, w = 0.0, 1.0
    elif (vb <= 0) and (d2 >= 0) and (d6 <= 0):
        region = _ECA
        v = 0.0
        w = d2 / (d2 - d6) if d2 - d6 != 0 else 0.0
    elif (va <= 0) and ((d4 - d3) >= 0) and ((d5 - d6) >= 0):
        region = _EBC
        e43 = d4 - d3
        e56 = d5 - d6
        t_bc = e43 / (e43 + e56) if e43 + e56 != 0 else 0.0
        v = 1.0 - t_bc
        w = t_bc
    else:
        region = _FACE
        denom = va + vb + vc
        v = vb / denom if denom != 0 else 0.0
        w = vc / denom if denom != 0 else 0.0
    out[0] = ax + v * abx + w * acx
    out[1] = ay + v * aby + w * acy
    out[2] = az + v * abz + w * acz
    return region


# --------------------------------------------------------- fan crossings
@numba.njit(**_JIT)
def _fan_kernel(o, e, valid, reach, grid_origin, s, dims, cstart, ccount, citems, pcentre, pradius, pparent,
                tri, fnormal, rmax):
    n, c = valid.shape
    hit = np.zeros((n, c), dtype=np.bool_)
    breach = reach + rmax  # near_pairs: bucket range grown by the largest piece radius
    lo = np.empty(3, dtype=np.int64)
    hi = np.empty(3, dtype=np.int64)
    for r in range(n):
        nvalid = 0
        for j in range(c):
            if valid[r, j]:
                nvalid += 1
        if nvalid == 0:
            continue
        ox, oy, oz = o[r, 0], o[r, 1], o[r, 2]
        far = False
        for k in range(3):
            pk = o[r, k]
            if (pk + breach < grid_origin[k]) or (pk - breach > grid_origin[k] + dims[k] * s):
                far = True
            lo[k] = min(max(np.int64(math.floor(((pk - breach) - grid_origin[k]) / s)), 0), dims[k] - 1)
            hi[k] = min(max(np.int64(math.floor(((pk + breach) - grid_origin[k]) / s)), 0), dims[k] - 1)
        if far:
            continue
        left = nvalid
        for bx in range(lo[0], hi[0] + 1):
            for by in range(lo[1], hi[1] + 1):
                for bz in range(lo[2], hi[2] + 1):
                    flat = (bx * dims[1] + by) * dims[2] + bz
                    for pos in range(cstart[flat], cstart[flat] + ccount[flat]):
                        t = citems[pos]
                        # Ball screen of near_pairs: piece sphere meets the ball of reach.
                        dcx, dcy, dcz = ox - pcentre[t, 0], oy - pcentre[t, 1], oz - pcentre[t, 2]
                        rr = reach + pradius[t]
                        if not (_dot3(dcx, dcy, dcz, dcx, dcy, dcz) <= rr * rr):
                            continue
                        f = pparent[t]
                        nx, ny, nz = fnormal[f, 0], fnormal[f, 1], fnormal[f, 2]
                        s_o = _dot3(ox - tri[f, 0, 0], oy - tri[f, 0, 1], oz - tri[f, 0, 2], nx, ny, nz)
                        cx = pcentre[t, 0] - ox
                        cy = pcentre[t, 1] - oy
                        cz = pcentre[t, 2] - oz
                        cc = _dot3(cx, cy, cz, cx, cy, cz)
                        r2 = pradius[t] * pradius[t] * (1 + 1e-9)
                        for j in range(c):
                            if not valid[r, j] or hit[r, j]:
                                continue
                            dx, dy, dz = e[r, j, 0] - ox, e[r, j, 1] - oy, e[r, j, 2] - oz
                            s_j = dx * nx
                            s_j += dy * ny
                            s_j += dz * nz
                            s_j += s_o
                            # Plane-side screen: the segment reaches the plane within [0, 1].
                            tau = s_o / (s_o - s_j)
                            if not ((tau >= 0.0) and (tau <= 1.0)):
                                continue
                            dot = dx * cx
                            dot += dy * cy
                            dot += dz * cz
                            dd = _dot3(dx, dy, dz, dx, dy, dz)
                            q = tau * dd
                            q -= 2.0 * dot
                            q *= tau
                            q += cc
                            if not (q <= r2):
                                continue
                            if _segment_crosses(o[r], e[r, j], tri[f]):
                                hit[r, j] = True
                                left -= 1
                        if left == 0:
                            break
                    if left == 0:
                        break
                if left == 0:
                    break
            if left == 0:
                break
    return hit


def segments_cross_fan(index, origins, ends, valid, reach: float) -> np.ndarray:
    """Whether segments fanning out from one origin per row cross the surface.

    Compiled equivalent of :meth:`ibprep.proximity.TriangleIndex.segments_cross_fan`
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
        px, py, pz = p[i, 0], p[i, 1], p[i, 2]
        for k in range(3):
            qb[k] = np.int64(math.floor((p[i, k] - grid_origin[k]) / s))
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
        dist[i] = d if ex else min(lower, d)
        exact[i] = ex
        point[i, 0] = state[3]
        point[i, 1] = state[4]
        point[i, 2] = state[5]
        f = np.int64(state[1])
        if ex and f >= 0:
            face[i] = f
            reg = np.int64(state[2])
            if reg == _VA or reg == _VB or reg == _VC:
                vtx = faces[f, reg - _VA]
                for k in range(3):
                    normal[i, k] = vnormal[vtx, k]
            elif reg == _EAB or reg == _EBC or reg == _ECA:
                for k in range(3):
                    normal[i, k] = enormal[f, reg - _EAB, k]
            else:
                for k in range(3):
                    normal[i, k] = fnormal[f, k]
    return point, dist, normal, face, exact


def closest(index, points, *, max_distance: float = math.inf) -> ClosestPoints:
    """Closest surface point, distance and outward pseudo-normal of each point.

    Compiled equivalent of :meth:`ibprep.proximity.TriangleIndex.closest`: the
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
