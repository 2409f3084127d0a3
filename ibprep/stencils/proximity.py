"""Closest points, pseudo-normals and segment crossings on triangle surfaces.

These are the geometric kernels of the stencil builder, over plain
``(vertices, faces)`` arrays. A :class:`TriangleIndex` covers every triangle
with in-plane pieces about one bucket across (a long sliver becomes a row of
short pieces, each with a bounding sphere and a witness point on the
triangle) and buckets the pieces on a uniform hash grid (compressed-sparse-row
lists built with ``argsort``/``searchsorted``), so that every query only visits
a few nearby buckets. Cheap sphere screens discard most (query, piece) pairs;
the exact tests run on the parent triangles of the survivors. All per-pair work
is branch-free numpy over flat arrays of pairs.

* Closest point on a triangle: Ericson (2005), *Real-Time Collision
  Detection*, §5.1.5, evaluated for all Voronoi regions at once.
* Normals at the closest point: angle-weighted pseudo-normals (Bærentzen &
  Aanæs 2005, "Signed distance computation using the angle weighted
  pseudonormal", IEEE TVCG 11(3)): the face normal inside a face, the sum of
  the two face normals on an edge, the angle-weighted sum of the incident face
  normals at a vertex. With these, ``(p - closest) · normal`` has the sign of
  the side ``p`` lies on, also at edges and vertices.
* Segment–triangle crossing: Möller & Trumbore (1997), "Fast, minimum
  storage ray-triangle intersection", J. Graphics Tools 2(1).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numba
import numpy as np

from ..errors import InputError

__all__ = [
    "TriangleIndex",
    "ClosestPoints",
    "closest_point_on_triangles",
    "segments_cross_triangles",
]

# Region codes of closest_point_on_triangles (which feature holds the closest point).
_FACE, _VA, _VB, _VC, _EAB, _EBC, _ECA = range(7)

# Pairs evaluated per chunk: bounds the temporaries to a few hundred MB.
_PAIR_CHUNK = 2_000_000

# Barycentric slack of the crossing test, relative: a segment through an edge or a
# vertex counts as crossing (conservative for visibility).
_BARY_SLACK = 1e-12


def closest_point_on_triangles(p, a, b, c):
    """Closest point on each triangle to each point, pairwise.

    Parameters
    ----------
    p : (n, 3) float — query points, metres.
    a, b, c : (n, 3) float — triangle corners, metres (row i pairs with p[i]).

    Returns
    -------
    q : (n, 3) float — closest points, metres.
    region : (n,) int8 — 0 face, 1/2/3 corner a/b/c, 4/5/6 edge ab/bc/ca.

    Notes
    -----
    Ericson (2005), Real-Time Collision Detection, §5.1.5, with every test of the
    branching version evaluated for all rows and the first matching region kept.
    """
    p = np.asarray(p, dtype=float)
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    c = np.asarray(c, dtype=float)
    ab = b - a
    ac = c - a
    ap = p - a
    bp = p - b
    cp = p - c
    d1 = np.einsum("ij,ij->i", ab, ap)
    d2 = np.einsum("ij,ij->i", ac, ap)
    d3 = np.einsum("ij,ij->i", ab, bp)
    d4 = np.einsum("ij,ij->i", ac, bp)
    d5 = np.einsum("ij,ij->i", ab, cp)
    d6 = np.einsum("ij,ij->i", ac, cp)
    vc = d1 * d4 - d3 * d2
    vb = d5 * d2 - d1 * d6
    va = d3 * d6 - d5 * d4
    in_a = (d1 <= 0) & (d2 <= 0)
    in_b = (d3 >= 0) & (d4 <= d3)
    in_ab = (vc <= 0) & (d1 >= 0) & (d3 <= 0)
    in_c = (d6 >= 0) & (d5 <= d6)
    in_ca = (vb <= 0) & (d2 >= 0) & (d6 <= 0)
    in_bc = (va <= 0) & ((d4 - d3) >= 0) & ((d5 - d6) >= 0)
    # Later assignments win: apply in reverse order of Ericson's tests.
    region = np.full(p.shape[0], _FACE, dtype=np.int8)
    region[in_bc] = _EBC
    region[in_ca] = _ECA
    region[in_c] = _VC
    region[in_ab] = _EAB
    region[in_b] = _VB
    region[in_a] = _VA
    with np.errstate(divide="ignore", invalid="ignore"):
        denom = va + vb + vc
        v_face = np.where(denom != 0, vb / denom, 0.0)
        w_face = np.where(denom != 0, vc / denom, 0.0)
        t_ab = np.where(d1 - d3 != 0, d1 / (d1 - d3), 0.0)
        t_ca = np.where(d2 - d6 != 0, d2 / (d2 - d6), 0.0)
        e43 = d4 - d3
        e56 = d5 - d6
        t_bc = np.where(e43 + e56 != 0, e43 / (e43 + e56), 0.0)
    # Barycentric (v, w) of q = a + v ab + w ac for each region.
    v = np.select(
        [region == _VA, region == _VB, region == _VC, region == _EAB, region == _ECA, region == _EBC],
        [0.0, 1.0, 0.0, t_ab, 0.0, 1.0 - t_bc],
        default=v_face,
    )
    w = np.select(
        [region == _VA, region == _VB, region == _VC, region == _EAB, region == _ECA, region == _EBC],
        [0.0, 0.0, 1.0, 0.0, t_ca, t_bc],
        default=w_face,
    )
    q = a + v[:, None] * ab + w[:, None] * ac
    return q, region


def _cross(u, v):
    return np.stack(
        [u[:, 1] * v[:, 2] - u[:, 2] * v[:, 1], u[:, 2] * v[:, 0] - u[:, 0] * v[:, 2], u[:, 0] * v[:, 1] - u[:, 1] * v[:, 0]],
        axis=1,
    )


def segments_cross_triangles(p0, p1, a, b, c):
    """Whether each segment crosses its paired triangle (Möller–Trumbore).

    Parameters
    ----------
    p0, p1 : (n, 3) float — segment ends, metres.
    a, b, c : (n, 3) float — triangle corners, metres.

    Returns
    -------
    (n,) bool — true where the closed segment meets the closed triangle at one
    point (a segment through an edge or a corner counts; a segment lying in the
    triangle's plane does not).
    """
    p0 = np.asarray(p0, float)
    a = np.asarray(a, float)
    d = np.asarray(p1, float) - p0
    e1 = np.asarray(b, float) - a
    e2 = np.asarray(c, float) - a
    pv = _cross(d, e2)
    det = np.einsum("ij,ij->i", e1, pv)
    # |det| = |d . (e1 x e2)|: compare with |d| |e1 x e2| to reject near-parallel pairs.
    nrm = _cross(e1, e2)
    scale = np.sqrt(np.einsum("ij,ij->i", d, d) * np.einsum("ij,ij->i", nrm, nrm))
    good = np.abs(det) > 1e-14 * scale
    with np.errstate(divide="ignore", invalid="ignore"):
        inv = np.where(good, 1.0 / np.where(good, det, 1.0), 0.0)
        tv = p0 - a
        u = np.einsum("ij,ij->i", tv, pv) * inv
        qv = _cross(tv, e1)
        v = np.einsum("ij,ij->i", d, qv) * inv
        t = np.einsum("ij,ij->i", e2, qv) * inv
    s = _BARY_SLACK
    return good & (u >= -s) & (v >= -s) & (u + v <= 1 + s) & (t >= 0.0) & (t <= 1.0)


@dataclass(frozen=True)
class ClosestPoints:
    """Closest surface points of a batch of queries.

    Attributes
    ----------
    point : (n, 3) float — closest point on the surface, metres.
    distance : (n,) float — metres; a lower bound where ``exact`` is false.
    normal : (n, 3) float — unit outward pseudo-normal there (zeros where not exact).
    face : (n,) int64 — triangle holding the closest point, -1 where not exact.
    exact : (n,) bool — false where the search stopped at ``max_distance``
        before finding a triangle closer than that.
    """

    point: np.ndarray
    distance: np.ndarray
    normal: np.ndarray
    face: np.ndarray
    exact: np.ndarray


def _pieces(tri: np.ndarray, ids: np.ndarray, target: float):
    """Cover triangles ``ids`` with in-plane rectangles about ``target`` across.

    Returns parent (p,), centre (p, 3), radius (p,), lower (p, 3), upper (p, 3).
    In the frame of its longest edge ab (x along ab, y towards c) a triangle lies
    in [0, L] x [0, w]; that box is cut into ceil(L/target) x ceil(w/target)
    rectangles, each bounded by its circumscribed sphere and its box. A thin
    sliver thus becomes a row of short pieces, a small triangle stays one piece.
    """
    t = tri[ids]
    edges = np.stack([t[:, 1] - t[:, 0], t[:, 2] - t[:, 1], t[:, 0] - t[:, 2]], axis=1)
    k = np.argmax(np.linalg.norm(edges, axis=2), axis=1)  # longest edge starts at corner k
    rows = np.arange(t.shape[0])
    a = t[rows, k]
    b = t[rows, (k + 1) % 3]
    c = t[rows, (k + 2) % 3]
    ab = b - a
    L = np.linalg.norm(ab, axis=1)
    e1 = np.divide(ab, L[:, None], out=np.zeros_like(ab), where=L[:, None] > 0)
    ac = c - a
    perp = ac - np.einsum("ij,ij->i", ac, e1)[:, None] * e1
    w = np.linalg.norm(perp, axis=1)
    e2 = np.divide(perp, w[:, None], out=np.zeros_like(perp), where=w[:, None] > 0)
    q1 = np.clip(np.ceil(L / target).astype(np.int64), 1, 64)
    q2 = np.clip(np.ceil(w / target).astype(np.int64), 1, 64)
    cnt = q1 * q2
    owner, local = _expand_csr(rows, np.zeros_like(cnt), cnt)
    i = local // q2[owner]
    j = local % q2[owner]
    dx = (L / q1)[owner]
    dy = (w / q2)[owner]
    centre = a[owner] + ((i + 0.5) * dx)[:, None] * e1[owner] + ((j + 0.5) * dy)[:, None] * e2[owner]
    radius = 0.5 * np.sqrt(dx * dx + dy * dy) * (1 + 1e-12) + 1e-15 * np.maximum(L[owner], 1.0)
    half = np.abs(e1[owner]) * (0.5 * dx)[:, None] + np.abs(e2[owner]) * (0.5 * dy)[:, None]
    half = half * (1 + 1e-12) + 1e-15
    return ids[owner].astype(np.int64), centre, radius, centre - half, centre + half


# --------------------------------------------------------------- compiled index tables
# The same pieces, witnesses and buckets as the numpy construction in
# TriangleIndex.__post_init__, one piece at a time with the same floating-point
# expressions in the same order (fastmath off): the tables are equal bit for bit
# (tests/test_proximity.py). The numpy construction stays as the reference.
_JIT = dict(cache=True, nogil=True, fastmath=False, error_model="numpy")
_COMPILED_INDEX = True


@numba.njit(**_JIT)
def _dot3(ax, ay, az, bx, by, bz):
    # The order numpy's einsum("ij,ij->i") sums three products in on this build (two
    # SIMD lanes, the third term joining lane 0): (x + z) + y; no fused multiply-add.
    # tests/test_kernels.py::test_dot3_matches_einsum guards it.
    return (ax * bx + az * bz) + ay * by


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


@numba.njit(**_JIT)
def _pieces_nb(tri, ids, target, box_lo, box_hi):
    """:func:`_pieces`, the witnesses and the filter of the numpy construction, compiled.

    Returns parent (p,), centre (p, 3), radius (p,), lower (p, 3), upper (p, 3),
    witness (p, 3) of the pieces kept (box overlapping [box_lo, box_hi], witness
    inside the piece's sphere), in the numpy construction's order.
    """
    n = ids.size
    q1s = np.empty(n, np.int64)
    q2s = np.empty(n, np.int64)
    frame = np.empty((n, 11))  # a (3), e1 (3), e2 (3), L, w
    total = 0
    for r in range(n):
        t = tri[ids[r]]
        best = -1.0
        k = 0
        for e in range(3):
            f = (e + 1) % 3
            dx, dy, dz = t[f, 0] - t[e, 0], t[f, 1] - t[e, 1], t[f, 2] - t[e, 2]
            ln = math.sqrt(dx * dx + dy * dy + dz * dz)
            if ln > best:
                best, k = ln, e
        a0, a1, a2 = t[k, 0], t[k, 1], t[k, 2]
        b, c = (k + 1) % 3, (k + 2) % 3
        abx, aby, abz = t[b, 0] - a0, t[b, 1] - a1, t[b, 2] - a2
        L = math.sqrt(abx * abx + aby * aby + abz * abz)
        e1x, e1y, e1z = (abx / L, aby / L, abz / L) if L > 0 else (0.0, 0.0, 0.0)
        acx, acy, acz = t[c, 0] - a0, t[c, 1] - a1, t[c, 2] - a2
        pr = _dot3(acx, acy, acz, e1x, e1y, e1z)
        px, py, pz = acx - pr * e1x, acy - pr * e1y, acz - pr * e1z
        w = math.sqrt(px * px + py * py + pz * pz)
        e2x, e2y, e2z = (px / w, py / w, pz / w) if w > 0 else (0.0, 0.0, 0.0)
        q1 = min(max(int(math.ceil(L / target)), 1), 64)
        q2 = min(max(int(math.ceil(w / target)), 1), 64)
        q1s[r], q2s[r] = q1, q2
        fr = frame[r]
        fr[0], fr[1], fr[2], fr[3], fr[4], fr[5] = a0, a1, a2, e1x, e1y, e1z
        fr[6], fr[7], fr[8], fr[9], fr[10] = e2x, e2y, e2z, L, w
        total += q1 * q2
    parent = np.empty(total, np.int64)
    pc = np.empty((total, 3))
    prad = np.empty(total)
    plo = np.empty((total, 3))
    phi = np.empty((total, 3))
    wq = np.empty((total, 3))
    out = np.empty(3)
    m = 0
    for r in range(n):
        fr = frame[r]
        a0, a1, a2, e1x, e1y, e1z = fr[0], fr[1], fr[2], fr[3], fr[4], fr[5]
        e2x, e2y, e2z, L, w = fr[6], fr[7], fr[8], fr[9], fr[10]
        q1, q2 = q1s[r], q2s[r]
        dx = L / q1
        dy = w / q2
        rad = 0.5 * math.sqrt(dx * dx + dy * dy) * (1 + 1e-12) + 1e-15 * max(L, 1.0)
        hx = (abs(e1x) * (0.5 * dx) + abs(e2x) * (0.5 * dy)) * (1 + 1e-12) + 1e-15
        hy = (abs(e1y) * (0.5 * dx) + abs(e2y) * (0.5 * dy)) * (1 + 1e-12) + 1e-15
        hz = (abs(e1z) * (0.5 * dx) + abs(e2z) * (0.5 * dy)) * (1 + 1e-12) + 1e-15
        t = tri[ids[r]]
        for local in range(q1 * q2):
            i = local // q2
            j = local % q2
            si = (i + 0.5) * dx
            sj = (j + 0.5) * dy
            cx = a0 + si * e1x + sj * e2x
            cy = a1 + si * e1y + sj * e2y
            cz = a2 + si * e1z + sj * e2z
            lx, ly, lz = cx - hx, cy - hy, cz - hz
            ux, uy, uz = cx + hx, cy + hy, cz + hz
            if not (ux >= box_lo[0] and uy >= box_lo[1] and uz >= box_lo[2]
                    and lx <= box_hi[0] and ly <= box_hi[1] and lz <= box_hi[2]):
                continue
            _closest_on_triangle(cx, cy, cz, t, out)
            ddx, ddy, ddz = out[0] - cx, out[1] - cy, out[2] - cz
            if not (_dot3(ddx, ddy, ddz, ddx, ddy, ddz) <= rad * rad):
                continue
            parent[m] = ids[r]
            pc[m, 0], pc[m, 1], pc[m, 2] = cx, cy, cz
            prad[m] = rad
            plo[m, 0], plo[m, 1], plo[m, 2] = lx, ly, lz
            phi[m, 0], phi[m, 1], phi[m, 2] = ux, uy, uz
            wq[m, 0], wq[m, 1], wq[m, 2] = out[0], out[1], out[2]
            m += 1
    return parent[:m], pc[:m], prad[:m], plo[:m], phi[:m], wq[:m]


@numba.njit(**_JIT)
def _cell_of(x, lo, s, n):
    """Bucket index of coordinate x along one axis, clipped to [0, n - 1]."""
    return min(max(int(math.floor((x - lo) / s)), 0), n - 1)


@numba.njit(**_JIT)
def _starts_of(count):
    """Exclusive prefix sum: where each bucket's items start in a CSR list."""
    start = np.empty(count.size, np.int64)
    acc = 0
    for b in range(count.size):
        start[b] = acc
        acc += count[b]
    return start


@numba.njit(**_JIT)
def _buckets_nb(plo, phi, pc, box_lo, s, dims):
    """Both bucketings of the numpy construction by counting sorts.

    Returns (start, count, items) of the pieces by box overlap and (start, count,
    items) of the pieces by centre: CSR over the buckets in C order, pieces in
    increasing order within a bucket (as the stable argsort orders them).
    """
    d0, d1, d2 = dims[0], dims[1], dims[2]
    nb = d0 * d1 * d2
    npc = pc.shape[0]
    lo_b = np.empty((npc, 3), np.int64)
    hi_b = np.empty((npc, 3), np.int64)
    count = np.zeros(nb, np.int64)
    for p in range(npc):
        for a in range(3):
            lo_b[p, a] = _cell_of(plo[p, a], box_lo[a], s, dims[a])
            hi_b[p, a] = _cell_of(phi[p, a], box_lo[a], s, dims[a])
        for bx in range(lo_b[p, 0], hi_b[p, 0] + 1):
            for by in range(lo_b[p, 1], hi_b[p, 1] + 1):
                base = (bx * d1 + by) * d2
                for bz in range(lo_b[p, 2], hi_b[p, 2] + 1):
                    count[base + bz] += 1
    start = _starts_of(count)
    items = np.empty(start[nb - 1] + count[nb - 1] if nb else 0, np.int64)
    fill = start.copy()
    for p in range(npc):
        for bx in range(lo_b[p, 0], hi_b[p, 0] + 1):
            for by in range(lo_b[p, 1], hi_b[p, 1] + 1):
                base = (bx * d1 + by) * d2
                for bz in range(lo_b[p, 2], hi_b[p, 2] + 1):
                    items[fill[base + bz]] = p
                    fill[base + bz] += 1
    cbucket = np.empty(npc, np.int64)
    ccount = np.zeros(nb, np.int64)
    for p in range(npc):
        b = (_cell_of(pc[p, 0], box_lo[0], s, d0) * d1 + _cell_of(pc[p, 1], box_lo[1], s, d1)) * d2 \
            + _cell_of(pc[p, 2], box_lo[2], s, d2)
        cbucket[p] = b
        ccount[b] += 1
    cstart = _starts_of(ccount)
    citems = np.empty(npc, np.int64)
    fill = cstart.copy()
    for p in range(npc):
        citems[fill[cbucket[p]]] = p
        fill[cbucket[p]] += 1
    return start, count, items, cstart, ccount, citems


def _index_tables_numpy(tri, ids, s, box_lo, box_hi, dims):
    """Pieces of triangles ``ids``, their witnesses, and both bucketings (numpy reference).

    Returns parent, centre, radius, witness of the kept pieces, then (start, count,
    items) by box overlap and (start, count, items) by centre, all int64.
    """
    parent, pc, pr, plo, phi = _pieces(tri, ids, s)
    wq, _ = closest_point_on_triangles(pc, tri[parent, 0], tri[parent, 1], tri[parent, 2])
    inside = np.all((phi >= box_lo) & (plo <= box_hi), axis=1)
    inside &= np.einsum("ij,ij->i", wq - pc, wq - pc) <= pr * pr
    parent, pc, pr, plo, phi, wq = (x[inside] for x in (parent, pc, pr, plo, phi, wq))
    tid = np.arange(parent.size)
    i0 = np.clip(np.floor((plo - box_lo) / s).astype(np.int64), 0, dims - 1)
    i1 = np.clip(np.floor((phi - box_lo) / s).astype(np.int64), 0, dims - 1)
    ext = i1 - i0 + 1
    cnt = np.prod(ext, axis=1)
    owner, local = _expand_csr(tid, np.zeros_like(cnt), cnt)
    owner_row = np.repeat(np.arange(tid.size), cnt)
    ez = ext[owner_row, 2]
    ey = ext[owner_row, 1]
    bx = i0[owner_row, 0] + local // (ey * ez)
    by = i0[owner_row, 1] + (local // ez) % ey
    bz = i0[owner_row, 2] + local % ez
    bucket = (bx * dims[1] + by) * dims[2] + bz
    order = np.argsort(bucket, kind="stable")
    bucket = bucket[order]
    items = owner[order]
    nb = int(np.prod(dims))
    start = np.searchsorted(bucket, np.arange(nb, dtype=np.int64), side="left")
    stop = np.searchsorted(bucket, np.arange(nb, dtype=np.int64), side="right")
    cb = np.clip(np.floor((pc - box_lo) / s).astype(np.int64), 0, dims - 1)
    cflat = (cb[:, 0] * dims[1] + cb[:, 1]) * dims[2] + cb[:, 2]
    corder = np.argsort(cflat, kind="stable")
    cflat = cflat[corder]
    cstart = np.searchsorted(cflat, np.arange(nb, dtype=np.int64), side="left")
    cstop = np.searchsorted(cflat, np.arange(nb, dtype=np.int64), side="right")
    return (parent, pc, pr, wq, start.astype(np.int64), (stop - start).astype(np.int64), items.astype(np.int64),
            cstart.astype(np.int64), (cstop - cstart).astype(np.int64), corder.astype(np.int64))


def _index_tables_compiled(tri, ids, s, box_lo, box_hi, dims):
    """:func:`_index_tables_numpy` on the compiled kernels (equal tables)."""
    box_lo = np.ascontiguousarray(box_lo, dtype=float)
    box_hi = np.ascontiguousarray(box_hi, dtype=float)
    parent, pc, pr, plo, phi, wq = _pieces_nb(tri, ids.astype(np.int64), float(s), box_lo, box_hi)
    tables = _buckets_nb(plo, phi, pc, box_lo, float(s), np.asarray(dims, dtype=np.int64))
    return (parent, pc, pr, wq, *tables)


def _surface_tables_numpy(v, f, check_orientation):
    """Corners, unit face normals, edge and vertex pseudo-normals, per-face boxes (numpy reference).

    Returns tri (nf, 3, 3), fn (nf, 3), en (nf, 3, 3: edges ab, bc, ca), vn (nv, 3),
    lo and hi (nf, 3). Normals are flipped to point outward if check_orientation
    and the signed volume is negative.
    """
    tri = v[f]  # (nf, 3, 3)
    n = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    volume6 = float(np.einsum("ij,ij->", tri[:, 0], n))
    if check_orientation and volume6 < 0:
        n = -n
    nlen = np.linalg.norm(n, axis=1)
    fn = np.divide(n, nlen[:, None], out=np.zeros_like(n), where=nlen[:, None] > 0)
    # Vertex pseudo-normals: incident face normals weighted by the corner angle.
    ang = np.empty((f.shape[0], 3))
    for k in range(3):  # three corners, not a loop over triangles
        e1 = tri[:, (k + 1) % 3] - tri[:, k]
        e2 = tri[:, (k + 2) % 3] - tri[:, k]
        cosang = np.einsum("ij,ij->i", e1, e2) / np.maximum(
            np.linalg.norm(e1, axis=1) * np.linalg.norm(e2, axis=1), 1e-300
        )
        ang[:, k] = np.arccos(np.clip(cosang, -1.0, 1.0))
    # Sums per vertex by bincount (the same sequential sums as np.add.at, faster).
    contrib = (ang[:, :, None] * fn[:, None, :]).reshape(-1, 3)
    vn = np.stack([np.bincount(f.ravel(), weights=contrib[:, c], minlength=v.shape[0]) for c in range(3)], axis=1)
    vn /= np.maximum(np.linalg.norm(vn, axis=1), 1e-300)[:, None]
    # Edge pseudo-normals: sum of the face normals sharing the edge.
    ends = np.stack([f, np.roll(f, -1, axis=1)], axis=-1).reshape(-1, 2)  # edges ab, bc, ca per face
    key = np.sort(ends, axis=1)
    _, inverse = np.unique(key[:, 0] * (v.shape[0] + 1) + key[:, 1], return_inverse=True)
    fn3 = np.repeat(fn, 3, axis=0)
    en_sum = np.stack([np.bincount(inverse, weights=fn3[:, c]) for c in range(3)], axis=1)
    en = en_sum[inverse]
    en /= np.maximum(np.linalg.norm(en, axis=1), 1e-300)[:, None]
    en = en.reshape(-1, 3, 3)
    lo = tri.min(axis=1)
    hi = tri.max(axis=1)
    return tri, fn, en, vn, lo, hi


@numba.njit(**_JIT)
def _counting_order(key, order, n):
    """``order`` stably re-sorted by ``key[order]`` (integers in [0, n)): a counting sort."""
    count = np.zeros(n + 1, np.int64)
    for e in order:
        count[key[e] + 1] += 1
    for q in range(n):
        count[q + 1] += count[q]
    out = np.empty(order.size, np.int64)
    for e in order:
        out[count[key[e]]] = e
        count[key[e]] += 1
    return out


@numba.njit(**_JIT)
def _surface_tables_nb(v, f, check_orientation):
    """:func:`_surface_tables_numpy` in one compiled pass (equal to round-off)."""
    nf = f.shape[0]
    nv = v.shape[0]
    tri = np.empty((nf, 3, 3))
    n = np.empty((nf, 3))
    lo = np.empty((nf, 3))
    hi = np.empty((nf, 3))
    volume6 = 0.0
    for t in range(nf):
        for c in range(3):
            for k in range(3):
                tri[t, c, k] = v[f[t, c], k]
        ux, uy, uz = tri[t, 1, 0] - tri[t, 0, 0], tri[t, 1, 1] - tri[t, 0, 1], tri[t, 1, 2] - tri[t, 0, 2]
        wx, wy, wz = tri[t, 2, 0] - tri[t, 0, 0], tri[t, 2, 1] - tri[t, 0, 1], tri[t, 2, 2] - tri[t, 0, 2]
        n[t, 0] = uy * wz - uz * wy
        n[t, 1] = uz * wx - ux * wz
        n[t, 2] = ux * wy - uy * wx
        volume6 += tri[t, 0, 0] * n[t, 0] + tri[t, 0, 1] * n[t, 1] + tri[t, 0, 2] * n[t, 2]
        for k in range(3):
            lo[t, k] = min(tri[t, 0, k], tri[t, 1, k], tri[t, 2, k])
            hi[t, k] = max(tri[t, 0, k], tri[t, 1, k], tri[t, 2, k])
    sign = -1.0 if (check_orientation and volume6 < 0) else 1.0
    fn = np.zeros((nf, 3))
    vn = np.zeros((nv, 3))
    for t in range(nf):
        nx, ny, nz = sign * n[t, 0], sign * n[t, 1], sign * n[t, 2]
        nl = math.sqrt(nx * nx + ny * ny + nz * nz)
        if nl > 0:
            fn[t, 0], fn[t, 1], fn[t, 2] = nx / nl, ny / nl, nz / nl
        # Vertex pseudo-normals: incident face normals weighted by the corner angle.
        for c in range(3):
            a, b, d = tri[t, c], tri[t, (c + 1) % 3], tri[t, (c + 2) % 3]
            e1x, e1y, e1z = b[0] - a[0], b[1] - a[1], b[2] - a[2]
            e2x, e2y, e2z = d[0] - a[0], d[1] - a[1], d[2] - a[2]
            l12 = math.sqrt(e1x * e1x + e1y * e1y + e1z * e1z) * math.sqrt(e2x * e2x + e2y * e2y + e2z * e2z)
            cosang = (e1x * e2x + e1y * e2y + e1z * e2z) / max(l12, 1e-300)
            ang = math.acos(min(max(cosang, -1.0), 1.0))
            q = f[t, c]
            for k in range(3):
                vn[q, k] += ang * fn[t, k]
    for q in range(nv):
        ln = max(math.sqrt(vn[q, 0] * vn[q, 0] + vn[q, 1] * vn[q, 1] + vn[q, 2] * vn[q, 2]), 1e-300)
        for k in range(3):
            vn[q, k] /= ln
    # Edge pseudo-normals: the sum of the normals of the faces sharing the edge. Edges are
    # sorted by (lower, upper) vertex with two stable counting sorts (upper, then lower), so
    # an edge's copies are one run, in face order; linear in the edges whatever the degrees.
    ne = 3 * nf
    elo = np.empty(ne, np.int64)
    ehi = np.empty(ne, np.int64)
    for t in range(nf):
        for c in range(3):
            a, b = f[t, c], f[t, (c + 1) % 3]
            e = 3 * t + c
            elo[e], ehi[e] = min(a, b), max(a, b)
    by_hi = _counting_order(ehi, np.arange(ne), nv)
    by_both = _counting_order(elo, by_hi, nv)
    group = np.empty(ne, np.int64)  # first edge (in face order) of each edge's run
    first = -1
    for p in range(ne):
        e = by_both[p]
        if p == 0 or elo[e] != elo[first] or ehi[e] != ehi[first]:
            first = e
        group[e] = first
    esum = np.zeros((ne, 3))
    for e in range(ne):  # face order, as the numpy reference's bincount sums
        g = group[e]
        t = e // 3
        for k in range(3):
            esum[g, k] += fn[t, k]
    en = np.empty((nf, 3, 3))
    for e in range(ne):
        g = group[e]
        ln = max(math.sqrt(esum[g, 0] * esum[g, 0] + esum[g, 1] * esum[g, 1] + esum[g, 2] * esum[g, 2]), 1e-300)
        for k in range(3):
            en[e // 3, e % 3, k] = esum[g, k] / ln
    return tri, fn, en, vn, lo, hi


@numba.njit(**_JIT)
def _edge_lengths_nb(v, f):
    """Lengths of the edges ab, bc, ca of every face, flat (3 nf,)."""
    out = np.empty(3 * f.shape[0])
    for t in range(f.shape[0]):
        for c in range(3):
            a, b = f[t, c], f[t, (c + 1) % 3]
            dx, dy, dz = v[b, 0] - v[a, 0], v[b, 1] - v[a, 1], v[b, 2] - v[a, 2]
            out[3 * t + c] = math.sqrt(dx * dx + dy * dy + dz * dz)
    return out


def _checked_arrays(vertices, faces):
    """(nv, 3) float and (nf, 3) int64 contiguous arrays, faces indexing existing vertices.

    Raises InputError otherwise (the compiled kernels index without bounds checks).
    """
    v = np.ascontiguousarray(vertices, dtype=float)
    f = np.ascontiguousarray(faces, dtype=np.int64)
    if v.ndim != 2 or v.shape[1] != 3 or f.ndim != 2 or f.shape[1] != 3 or f.shape[0] == 0:
        raise InputError(f"a triangle surface needs (n, 3) vertices and (m, 3) faces, got {v.shape} and {f.shape}")
    if f.min() < 0 or f.max() >= v.shape[0]:
        raise InputError(f"face vertex indices must lie in 0..{v.shape[0] - 1} (there are {v.shape[0]} vertices), "
                         f"got {int(f.min())}..{int(f.max())}")
    return v, f


def median_edge_length(vertices, faces) -> float:
    """Median edge length of a triangle surface, metres (each shared edge counted per face)."""
    v, f = _checked_arrays(vertices, faces)
    return float(np.median(_edge_lengths_nb(v, f)))


def _surface_tables_compiled(v, f, check_orientation):
    """:func:`_surface_tables_numpy` on the compiled kernel."""
    return _surface_tables_nb(v, f, check_orientation)


def _expand_csr(owner, starts, counts):
    """Flatten CSR ranges: (owner of each item, item position) for ranges starts[i]:starts[i]+counts[i]."""
    total = int(counts.sum())
    rep_owner = np.repeat(owner, counts)
    first = np.cumsum(counts) - counts
    pos = np.arange(total, dtype=np.int64) - np.repeat(first - starts, counts)
    return rep_owner, pos


@dataclass(frozen=True, eq=False)
class TriangleIndex:
    """A closed triangle surface, cut into pieces and bucketed on a uniform hash grid.

    Parameters
    ----------
    vertices : (nv, 3) float — metres.
    faces : (nf, 3) int — vertex indices; orientation consistent (either way:
        normals are flipped to point outward if the signed volume is negative).
    bucket_size : float — metres; edge of the hash buckets (a few cell spacings
        or the typical triangle size).
    region_lower, region_upper : (3,) float, optional — metres; only the parts
        of the surface inside this box are bucketed, and queries see only those
        triangles. Choose a box that holds every triangle within the distances
        you ask about (e.g. the grid bounds grown by the stencil reach).
    check_orientation : bool — flip the normals if the signed volume is negative
        (default); pass False for an open surface already oriented outward.

    The lists by centre (``centre_start``, ``centre_count``, ``centre_items``) hold
    each piece once, bucket after bucket in flat (C) order: a run of buckets along
    the last axis is one contiguous range of ``centre_items`` (the stencil pass's
    gather walks them so).

    Raises
    ------
    InputError
        A non-positive bucket size or malformed arrays.
    """

    vertices: np.ndarray
    faces: np.ndarray
    bucket_size: float
    region_lower: tuple | None = None
    region_upper: tuple | None = None
    check_orientation: bool = True
    # Derived, filled in __post_init__.
    tri: np.ndarray = field(init=False, repr=False)
    face_normal: np.ndarray = field(init=False, repr=False)
    edge_normal: np.ndarray = field(init=False, repr=False)
    vertex_normal: np.ndarray = field(init=False, repr=False)
    origin: np.ndarray = field(init=False, repr=False)
    dims: tuple = field(init=False)
    bucket_start: np.ndarray = field(init=False, repr=False)
    bucket_count: np.ndarray = field(init=False, repr=False)
    bucket_items: np.ndarray = field(init=False, repr=False)
    piece_witness: np.ndarray = field(init=False, repr=False)
    piece_parent: np.ndarray = field(init=False, repr=False)
    piece_centre: np.ndarray = field(init=False, repr=False)
    piece_radius: np.ndarray = field(init=False, repr=False)
    centre_start: np.ndarray = field(init=False, repr=False)
    centre_count: np.ndarray = field(init=False, repr=False)
    centre_items: np.ndarray = field(init=False, repr=False)

    def __post_init__(self) -> None:
        v, f = _checked_arrays(self.vertices, self.faces)
        s = float(self.bucket_size)
        if not (math.isfinite(s) and s > 0):
            raise InputError(f"bucket_size must be a positive length in metres, got {self.bucket_size!r}")
        surface = _surface_tables_compiled if _COMPILED_INDEX else _surface_tables_numpy
        tri, fn, en, vn, lo, hi = surface(v, f, bool(self.check_orientation))
        box_lo = lo.min(axis=0)
        box_hi = hi.max(axis=0)
        if self.region_lower is not None:
            box_lo = np.maximum(box_lo, np.asarray(self.region_lower, float))
        if self.region_upper is not None:
            box_hi = np.minimum(box_hi, np.asarray(self.region_upper, float))
        box_hi = np.maximum(box_hi, box_lo)
        # Keep the bucket count moderate: grow the buckets if the box is huge.
        dims = np.floor((box_hi - box_lo) / s).astype(np.int64) + 1
        while np.prod(dims) > 8_000_000 + 16 * f.shape[0]:
            s *= 1.5
            dims = np.floor((box_hi - box_lo) / s).astype(np.int64) + 1
        keep = np.all((hi >= box_lo) & (lo <= box_hi), axis=1)
        # Triangles longer than a bucket are indexed as pieces (a uniform barycentric
        # split), each with its own box and bounding sphere; exact tests use the parent.
        # A witness per piece: the parent's point nearest the piece centre. Rectangles of
        # the cover that miss the triangle (witness outside the sphere) are dropped.
        # Pieces are bucketed by box overlap, and a second time each once by its
        # centre: ball queries then need no de-duplication (pieces are about a bucket
        # across, so their spheres are small).
        build = _index_tables_compiled if _COMPILED_INDEX else _index_tables_numpy
        (parent, pc, pr, wq, start, count, items, cstart, ccount, corder) = build(
            tri, np.flatnonzero(keep), s, box_lo, box_hi, dims)
        for name, value in (
            ("centre_start", cstart),
            ("centre_count", ccount),
            ("centre_items", corder),
            ("vertices", v),
            ("faces", f),
            ("bucket_size", s),
            ("tri", tri),
            ("face_normal", fn),
            ("edge_normal", en),
            ("vertex_normal", vn),
            ("origin", box_lo),
            ("dims", tuple(int(x) for x in dims)),
            ("bucket_start", start),
            ("bucket_count", count),
            ("bucket_items", items),
            ("piece_witness", wq),
            ("piece_parent", parent),
            ("piece_centre", pc),
            ("piece_radius", pr),
        ):
            object.__setattr__(self, name, value)

    # ----------------------------------------------------------------- helpers
    def _bucket_of(self, points: np.ndarray) -> np.ndarray:
        return np.floor((points - self.origin) / self.bucket_size).astype(np.int64)

    def _pairs_for_offsets(self, qidx, qbucket, offsets):
        """(query, triangle) pairs from the buckets qbucket + offsets, grouped by query."""
        dims = np.asarray(self.dims)
        b = qbucket[:, None, :] + offsets[None, :, :]  # (nq, no, 3)
        inside = np.all((b >= 0) & (b < dims), axis=2)
        qq = np.broadcast_to(qidx[:, None], inside.shape)[inside]
        bb = b[inside]
        flat = (bb[:, 0] * dims[1] + bb[:, 1]) * dims[2] + bb[:, 2]
        counts = self.bucket_count[flat]
        q_rep, pos = _expand_csr(qq, self.bucket_start[flat], counts)
        return q_rep, self.bucket_items[pos]

    # ----------------------------------------------------------------- queries
    def closest(self, points, *, max_distance: float = math.inf) -> ClosestPoints:
        """Closest surface point, distance and outward pseudo-normal of each point.

        Parameters
        ----------
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
        best_d2 = np.full(n, np.inf)
        best_face = np.full(n, -1, dtype=np.int64)
        best_q = np.zeros((n, 3))
        best_region = np.zeros(n, dtype=np.int8)
        exact = np.zeros(n, dtype=bool)
        lower = np.zeros(n)
        if n == 0:
            return ClosestPoints(best_q, lower, np.zeros((0, 3)), best_face, exact)
        s = self.bucket_size
        # Fast path: pieces whose spheres meet the ball of one bucket around each point;
        # exact wherever the best distance found is within that ball.
        first = min(float(max_distance), s)
        owner, piece = self.near_pairs(p, first)
        s0 = 0
        while s0 < owner.size:  # chunks of whole queries
            stop = min(owner.size, s0 + _PAIR_CHUNK)
            if stop < owner.size:
                stop = int(np.searchsorted(owner, owner[stop], side="left"))
                if stop <= s0:
                    stop = int(np.searchsorted(owner, owner[s0], side="right"))
            self._evaluate(p, owner[s0:stop], piece[s0:stop], best_d2, best_face, best_q, best_region)
            s0 = stop
        qb = self._bucket_of(p)
        q_max = int(max(self.dims)) + int(np.max(np.abs(qb - np.clip(qb, 0, np.asarray(self.dims) - 1)))) + 1
        fast = np.sqrt(best_d2) <= first
        exact[fast] = True
        lower[~fast & (first >= max_distance)] = first
        active = np.flatnonzero(~fast & (first < max_distance))
        ring = 0
        while active.size and ring <= q_max:
            if ring == 0:
                offsets = np.zeros((1, 3), dtype=np.int64)
            else:
                rng = np.arange(-ring, ring + 1)
                g = np.stack(np.meshgrid(rng, rng, rng, indexing="ij"), axis=-1).reshape(-1, 3)
                offsets = g[np.abs(g).max(axis=1) == ring]
            self._search(p, active, qb[active], offsets, best_d2, best_face, best_q, best_region)
            reach = ring * s  # every triangle closer than this has been seen
            d = np.sqrt(best_d2[active])
            done = d <= reach
            exact[active[done]] = True
            stop = ~done & (reach >= max_distance)
            lower[active[stop]] = min(reach, max_distance)
            active = active[~done & ~stop]
            ring += 1
        if active.size:  # the whole bucket grid was searched
            exact[active] = np.isfinite(best_d2[active])
        dist = np.sqrt(best_d2)
        dist = np.where(exact, dist, np.minimum(lower, dist))
        normal = np.zeros((n, 3))
        ok = exact & (best_face >= 0)
        fo = best_face[ok]
        reg = best_region[ok]
        nrm = self.face_normal[fo].copy()
        for r_code, corner in ((_VA, 0), (_VB, 1), (_VC, 2)):
            m = reg == r_code
            nrm[m] = self.vertex_normal[self.faces[fo[m], corner]]
        for r_code, edge in ((_EAB, 0), (_EBC, 1), (_ECA, 2)):
            m = reg == r_code
            nrm[m] = self.edge_normal[fo[m], edge]
        normal[ok] = nrm
        face = np.where(ok, best_face, -1)
        return ClosestPoints(point=best_q, distance=dist, normal=normal, face=face, exact=exact)

    def _search(self, p, qidx, qbucket, offsets, best_d2, best_face, best_q, best_region):
        """Update the running best for queries qidx from the buckets at the given offsets."""
        per_query = max(1.0, float(self.bucket_count.mean()) * offsets.shape[0] * 4)
        step = max(1, int(_PAIR_CHUNK / per_query))
        for s0 in range(0, qidx.size, step):  # chunks of many thousand queries
            q_rep, t_rep = self._pairs_for_offsets(qidx[s0 : s0 + step], qbucket[s0 : s0 + step], offsets)
            self._evaluate(p, q_rep, t_rep, best_d2, best_face, best_q, best_region)

    def _evaluate(self, p, q_rep, t_rep, best_d2, best_face, best_q, best_region):
        """Update the running best from (query, piece) pairs grouped by query.

        Pairs are first screened with the pieces' bounding spheres: a piece whose
        sphere lies farther than the nearest witness point (an upper bound on the
        distance) cannot hold the closest point, so Ericson's test runs on the few
        survivors, on the parent triangles.
        """
        if True:  # keeps the body's indentation of the pair loop it came from
            if q_rep.size == 0:
                return
            pq = p[q_rep]
            dc = pq - self.piece_centre[t_rep]
            dc = np.sqrt(np.einsum("ij,ij->i", dc, dc))
            # Upper bound on each query's distance: its nearest piece witness (a point on
            # the surface); lower bound per pair: distance to the piece's sphere.
            dg = pq - self.piece_witness[t_rep]
            dg = np.sqrt(np.einsum("ij,ij->i", dg, dg))
            starts = np.flatnonzero(np.r_[True, q_rep[1:] != q_rep[:-1]])
            groups = np.diff(np.r_[starts, q_rep.size])
            ub = np.minimum(np.minimum.reduceat(dg, starts), np.sqrt(best_d2[q_rep[starts]]))
            keep = dc - self.piece_radius[t_rep] <= np.repeat(ub, groups) * (1 + 1e-12)
            q_rep = q_rep[keep]
            t_rep = t_rep[keep]
            pq = pq[keep]
            if q_rep.size == 0:
                return
            t_rep = self.piece_parent[t_rep]
            tri = self.tri[t_rep]
            q, region = closest_point_on_triangles(pq, tri[:, 0], tri[:, 1], tri[:, 2])
            dq = q - pq
            d2 = np.einsum("ij,ij->i", dq, dq)
            starts = np.flatnonzero(np.r_[True, q_rep[1:] != q_rep[:-1]])
            groups = np.diff(np.r_[starts, q_rep.size])
            mins = np.minimum.reduceat(d2, starts)
            at_min = np.flatnonzero(d2 == np.repeat(mins, groups))
            first = at_min[np.r_[True, q_rep[at_min[1:]] != q_rep[at_min[:-1]]]]
            qw = q_rep[first]
            better = d2[first] < best_d2[qw]
            qw = qw[better]
            sel = first[better]
            best_d2[qw] = d2[sel]
            best_face[qw] = t_rep[sel]
            best_q[qw] = q[sel]
            best_region[qw] = region[sel]

    def near_pairs(self, points, radius: float):
        """Pieces whose bounding sphere meets the ball of ``radius`` around each point.

        Parameters
        ----------
        points : (n, 3) float — metres.
        radius : float — metres.

        Returns
        -------
        owner : (p,) int64 — point of each pair, non-decreasing.
        piece : (p,) int64 — indexed piece of each pair (each at most once per point);
            ``piece_parent`` maps it to its triangle.
        """
        p = np.ascontiguousarray(points, dtype=float).reshape(-1, 3)
        s = self.bucket_size
        dims = np.asarray(self.dims)
        reach = radius + float(self.piece_radius.max(initial=0.0))
        lo = np.clip(self._bucket_of(p - reach), 0, dims - 1)
        hi = np.clip(self._bucket_of(p + reach), 0, dims - 1)
        far = np.any((p + reach < self.origin) | (p - reach > self.origin + dims * s), axis=1)
        ext = hi - lo + 1
        cnt = np.where(far, 0, np.prod(ext, axis=1))
        owner, local = _expand_csr(np.arange(p.shape[0]), np.zeros_like(cnt), cnt)
        e = ext[owner]
        bx = lo[owner, 0] + local // (e[:, 1] * e[:, 2])
        by = lo[owner, 1] + (local // e[:, 2]) % e[:, 1]
        bz = lo[owner, 2] + local % e[:, 2]
        flat = (bx * dims[1] + by) * dims[2] + bz
        o_rep, pos = _expand_csr(owner, self.centre_start[flat], self.centre_count[flat])
        t_rep = self.centre_items[pos]
        dc = p[o_rep] - self.piece_centre[t_rep]
        keep = np.einsum("ij,ij->i", dc, dc) <= (radius + self.piece_radius[t_rep]) ** 2
        return o_rep[keep], t_rep[keep]

    def distance_lower_bound(self, points, max_distance: float) -> np.ndarray:
        """Cheap lower bounds on the distance to the surface, capped at ``max_distance``.

        Uses the triangles' bounding spheres: distance ≥ |p - centre| - radius.

        Parameters
        ----------
        points : (n, 3) float — metres.
        max_distance : float — metres; bounds above it are reported as it.

        Returns
        -------
        (n,) float — metres, 0 ≤ bound ≤ true distance.
        """
        p = np.ascontiguousarray(points, dtype=float).reshape(-1, 3)
        out = np.full(p.shape[0], float(max_distance))
        owner, tri = self.near_pairs(p, max_distance)
        if owner.size:
            dc = p[owner] - self.piece_centre[tri]
            lb = np.maximum(np.sqrt(np.einsum("ij,ij->i", dc, dc)) - self.piece_radius[tri], 0.0)
            np.minimum.at(out, owner, lb)
        return out

    def segments_cross_fan(self, origins, ends, valid, reach: float) -> np.ndarray:
        """Whether segments fanning out from one origin per row cross the surface.

        Parameters
        ----------
        origins : (n, 3) float — metres; one start per row.
        ends : (n, c, 3) float — metres; the ends of each row's segments.
        valid : (n, c) bool — which segments to test (others come back false).
        reach : float — metres; no segment is longer than this.

        Returns
        -------
        (n, c) bool — as :meth:`segments_cross`.

        Notes
        -----
        Per row, the triangles whose bounding sphere meets the ball of ``reach``
        around the origin are gathered once; a batched matrix product gives the
        signed heights of all segment ends over all those triangles' planes, and
        only (segment, triangle) pairs whose ends are not strictly on one side of
        the plane go to the exact Möller–Trumbore test.
        """
        o = np.ascontiguousarray(origins, dtype=float).reshape(-1, 3)
        e = np.asarray(ends, dtype=float)
        valid = np.asarray(valid, dtype=bool)
        n, c = valid.shape
        hit = np.zeros((n, c), dtype=bool)
        rows_used = np.flatnonzero(valid.any(axis=1))
        if rows_used.size == 0:
            return hit
        po, pt = self.near_pairs(o[rows_used], reach)
        if po.size == 0:
            return hit
        tcount = np.bincount(po, minlength=rows_used.size)
        tstart = np.cumsum(tcount) - tcount
        tmax = int(tcount.max())
        step = max(1, int(4_000_000 / max(1, c * tmax)))
        for s0 in range(0, rows_used.size, step):  # chunks of many thousand rows
            sl = slice(s0, s0 + step)
            rows = rows_used[sl]
            slot = np.arange(tmax)[None, :]
            have = slot < tcount[sl, None]
            TI = np.where(have, pt[np.minimum(tstart[sl, None] + slot, pt.size - 1)], 0)  # (nr, T)
            PT = self.piece_parent[TI]
            N = np.where(have[:, :, None], self.face_normal[PT], 0.0)
            A0 = self.tri[PT, 0]
            oo = o[rows]
            s_o = np.einsum("rtk,rtk->rt", oo[:, None, :] - A0, N)  # origin height over each plane
            D = e[rows] - oo[:, None, :]  # (nr, c, 3)
            # End heights over every plane, (nr, c, T), as three broadcast multiply-adds.
            s_j = D[:, :, 0, None] * N[:, None, :, 0]
            s_j += D[:, :, 1, None] * N[:, None, :, 1]
            s_j += D[:, :, 2, None] * N[:, None, :, 2]
            s_j += s_o[:, None, :]
            # Where the segment meets the plane, it must lie within the triangle's sphere:
            # tau = s_o / (s_o - s_j) in [0, 1]; |o + tau D - centre|^2 <= radius^2.
            C = self.piece_centre[TI] - oo[:, None, :]  # (nr, T, 3)
            dot = D[:, :, 0, None] * C[:, None, :, 0]
            dot += D[:, :, 1, None] * C[:, None, :, 1]
            dot += D[:, :, 2, None] * C[:, None, :, 2]
            dd = np.einsum("rck,rck->rc", D, D)[:, :, None]
            cc = np.einsum("rtk,rtk->rt", C, C)[:, None, :]
            with np.errstate(divide="ignore", invalid="ignore"):
                tau = s_o[:, None, :] / (s_o[:, None, :] - s_j)
            possible = (tau >= 0.0) & (tau <= 1.0)  # NaN (in-plane or degenerate) drops out
            tau = np.where(possible, tau, 0.0)
            # |o + tau D - centre|^2 = cc - 2 tau dot + tau^2 dd, in place.
            q = tau * dd
            q -= 2.0 * dot
            q *= tau
            q += cc
            possible &= q <= (self.piece_radius[TI] ** 2 * (1 + 1e-9))[:, None, :]
            possible &= valid[rows][:, :, None]
            possible &= have[:, None, :]
            r_i, c_i, t_i = np.nonzero(possible)
            if r_i.size == 0:
                continue
            tid = TI[r_i, t_i]  # piece, for the sphere screen
            tri = self.tri[self.piece_parent[tid]]
            crossing = segments_cross_triangles(oo[r_i], e[rows[r_i], c_i], tri[:, 0], tri[:, 1], tri[:, 2])
            hit[rows[r_i[crossing]], c_i[crossing]] = True
        return hit

    def segments_cross(self, starts, ends) -> np.ndarray:
        """Whether each straight segment crosses the surface.

        Parameters
        ----------
        starts, ends : (n, 3) float — metres, world frame.

        Returns
        -------
        (n,) bool — true where the closed segment meets any triangle (segments
        through an edge or a corner count as crossing).
        """
        p0 = np.ascontiguousarray(starts, dtype=float).reshape(-1, 3)
        p1 = np.ascontiguousarray(ends, dtype=float).reshape(-1, 3)
        n = p0.shape[0]
        hit = np.zeros(n, dtype=bool)
        if n == 0:
            return hit
        s = self.bucket_size
        dims = np.asarray(self.dims)
        lo = np.clip(self._bucket_of(np.minimum(p0, p1)), 0, dims - 1)
        hi = np.clip(self._bucket_of(np.maximum(p0, p1)), 0, dims - 1)
        outside = np.any((np.maximum(p0, p1) < self.origin) | (np.minimum(p0, p1) > self.origin + dims * s), axis=1)
        ext = hi - lo + 1
        cnt = np.where(outside, 0, np.prod(ext, axis=1))
        per_seg = max(1.0, float(cnt.mean()) * max(1.0, float(self.bucket_count.mean())))
        step = max(1, int(_PAIR_CHUNK / per_seg))
        half_diag = 0.5 * math.sqrt(3.0) * s
        for s0 in range(0, n, step):  # chunks of many thousand segments
            sl = slice(s0, s0 + step)
            seg = np.arange(s0, min(n, s0 + step))
            c = cnt[sl]
            owner, local = _expand_csr(seg, np.zeros_like(c), c)
            e = ext[owner]
            bx = lo[owner, 0] + local // (e[:, 1] * e[:, 2])
            by = lo[owner, 1] + (local // e[:, 2]) % e[:, 1]
            bz = lo[owner, 2] + local % e[:, 2]
            # Keep the buckets the segment can pass through: centre within half a diagonal.
            centre = self.origin + (np.stack([bx, by, bz], axis=1) + 0.5) * s
            a0 = p0[owner]
            dv = p1[owner] - a0
            tt = np.clip(
                np.einsum("ij,ij->i", centre - a0, dv) / np.maximum(np.einsum("ij,ij->i", dv, dv), 1e-300), 0, 1
            )
            near = np.linalg.norm(a0 + tt[:, None] * dv - centre, axis=1) <= half_diag * (1 + 1e-9)
            owner = owner[near]
            flat = ((bx * dims[1] + by) * dims[2] + bz)[near]
            s_rep, pos = _expand_csr(owner, self.bucket_start[flat], self.bucket_count[flat])
            if s_rep.size == 0:
                continue
            t_rep = self.bucket_items[pos]
            # Bounding-sphere screen: the segment must pass within the triangle's sphere.
            a0 = p0[s_rep]
            dv = p1[s_rep] - a0
            cv = self.piece_centre[t_rep] - a0
            tt = np.clip(np.einsum("ij,ij->i", cv, dv) / np.maximum(np.einsum("ij,ij->i", dv, dv), 1e-300), 0, 1)
            gap = cv - tt[:, None] * dv
            close = np.einsum("ij,ij->i", gap, gap) <= self.piece_radius[t_rep] ** 2
            s_rep = s_rep[close]
            t_rep = t_rep[close]
            tri = self.tri[self.piece_parent[t_rep]]
            crossing = segments_cross_triangles(p0[s_rep], p1[s_rep], tri[:, 0], tri[:, 1], tri[:, 2])
            hit[s_rep[crossing]] = True
        return hit
