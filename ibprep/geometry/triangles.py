"""Plain-array triangle surfaces: coercion, rigid transforms, extrusion of 2-D loops.

The classifier and the stencil builder work on ``(vertices, faces)`` arrays,
never on trimesh objects, so their hot loops stay in numpy. This module turns
whatever the caller holds (a ``trimesh.Trimesh``, a ``(vertices, faces)`` pair,
or for 2-D work a closed polygon) into those arrays.
"""

from __future__ import annotations

import os

import numpy as np

from ..errors import InputError

__all__ = ["as_triangles", "transform_points", "extrude_loops", "triangle_bounds"]

# Half-depth of the prism a 2-D loop is extruded into, as a multiple of the loop's
# in-plane size: the caps lie far from the z = 0 plane of a 2-D grid.
_EXTRUDE_HALF_DEPTH = 4.0


def _loops_from(surface) -> list[np.ndarray] | None:
    """Closed 2-D loops from a Section-like object or (m, 2) arrays, else None."""
    if hasattr(surface, "x") and hasattr(surface, "y") and not hasattr(surface, "faces"):
        return [np.column_stack([np.asarray(surface.x, float), np.asarray(surface.y, float)])]
    if isinstance(surface, np.ndarray) and surface.ndim == 2 and surface.shape[1] == 2:
        return [np.asarray(surface, float)]
    if isinstance(surface, (list, tuple)) and surface and all(
        isinstance(s, np.ndarray) and s.ndim == 2 and s.shape[1] == 2 for s in surface
    ):
        return [np.asarray(s, float) for s in surface]
    return None


def as_triangles(surface) -> tuple[np.ndarray, np.ndarray]:
    """Vertex and face arrays of a closed surface.

    Parameters
    ----------
    surface : trimesh.Trimesh, (vertices, faces) pair, or 2-D loops
        A triangle surface in metres; or, for 2-D grids, a closed polygon given as
        an object with ``x`` and ``y`` arrays (a :class:`~ibprep.Section`), an
        (m, 2) array, or a list of such arrays (several bodies). Polygons are
        extruded along z into prisms whose caps lie far from z = 0 (see
        :func:`extrude_loops`).

    Returns
    -------
    vertices : (n, 3) float64 — metres, C-contiguous.
    faces : (m, 3) int64 — vertex indices, counter-clockwise seen from outside.

    Raises
    ------
    InputError
        Wrong shapes, non-finite vertices, face indices out of range, or no faces.
    """
    loops = _loops_from(surface)
    if loops is not None:
        return extrude_loops(loops)
    if hasattr(surface, "vertices") and hasattr(surface, "faces"):
        vertices, faces = surface.vertices, surface.faces
    else:
        if isinstance(surface, (str, os.PathLike)):
            raise InputError(f"a surface must be loaded first: got the path {str(surface)!r}; "
                             "pass ibprep.load_surface(path) instead")
        try:
            vertices, faces = surface
        except (TypeError, ValueError):
            raise InputError(
                "a surface must be a trimesh.Trimesh, a (vertices, faces) pair or a closed 2-D loop, "
                f"got {type(surface).__name__}"
            ) from None
    v = np.ascontiguousarray(vertices, dtype=np.float64)
    f = np.ascontiguousarray(faces, dtype=np.int64)
    if v.ndim != 2 or v.shape[1] != 3:
        raise InputError(f"surface vertices must have shape (n, 3), got {v.shape}")
    if f.ndim != 2 or f.shape[1] != 3:
        raise InputError(f"surface faces must have shape (m, 3), got {f.shape}")
    if f.shape[0] == 0:
        raise InputError("the surface has no faces; give a closed triangle surface")
    if not np.all(np.isfinite(v)):
        bad = int(np.count_nonzero(~np.all(np.isfinite(v), axis=1)))
        raise InputError(f"the surface has {bad} vertices that are NaN or infinite; repair the mesh")
    if f.min() < 0 or f.max() >= v.shape[0]:
        raise InputError(
            f"surface face indices must lie in [0, {v.shape[0]}), got [{f.min()}, {f.max()}]"
        )
    return v, f


def transform_points(pose, points) -> np.ndarray:
    """Apply a 4×4 rigid transform to points.

    Parameters
    ----------
    pose : (4, 4) float — homogeneous transform, body frame → world frame.
    points : (n, 3) float — metres.

    Returns
    -------
    (n, 3) float — metres; the input is not modified.
    """
    T = np.asarray(pose, dtype=float)
    if T.shape != (4, 4):
        raise InputError(f"a pose must be a (4, 4) transform, got shape {T.shape}")
    p = np.asarray(points, dtype=float)
    return p @ T[:3, :3].T + T[:3, 3]


def triangle_bounds(vertices, faces) -> tuple[np.ndarray, np.ndarray]:
    """Per-triangle axis-aligned bounds: two (m, 3) arrays (lower, upper), metres."""
    tri = np.asarray(vertices)[np.asarray(faces)]
    return tri.min(axis=1), tri.max(axis=1)


def extrude_loops(loops, half_depth: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Extrude closed 2-D polygons along z into closed prisms.

    A 2-D grid is treated as the plane z = 0 of a 3-D problem: each loop becomes a
    prism from ``-half_depth`` to ``+half_depth``, so classification and closest
    points at z = 0 are those of the polygon.

    Parameters
    ----------
    loops : list of (m, 2) float — metres; closed polygons without a repeated
        closing point, counter-clockwise (a clockwise loop is reversed).
    half_depth : float, optional — metres; default four times the largest loop size.

    Returns
    -------
    vertices : (n, 3) float64; faces : (k, 3) int64 — outward oriented.
    """
    verts, faces = [], []
    offset = 0
    sizes = [float(np.ptp(np.asarray(l, float), axis=0).max()) for l in loops]
    depth = float(half_depth) if half_depth is not None else _EXTRUDE_HALF_DEPTH * max(max(sizes, default=1.0), 1e-12)
    for loop in loops:
        p = np.asarray(loop, dtype=float)
        if p.ndim != 2 or p.shape[1] != 2 or p.shape[0] < 3:
            raise InputError(f"a 2-D loop must be an (m, 2) array with m >= 3, got shape {p.shape}")
        if not np.all(np.isfinite(p)):
            raise InputError("a 2-D loop has NaN or infinite coordinates")
        if np.allclose(p[0], p[-1]):
            p = p[:-1]
        x, y = p[:, 0], p[:, 1]
        signed_area = 0.5 * np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y)
        if signed_area == 0.0:
            raise InputError("a 2-D loop encloses no area")
        if signed_area < 0:
            p = p[::-1]
        m = p.shape[0]
        bottom = np.column_stack([p, np.full(m, -depth)])
        top = np.column_stack([p, np.full(m, depth)])
        centre_b = np.array([[*p.mean(axis=0), -depth]])
        centre_t = np.array([[*p.mean(axis=0), depth]])
        v = np.vstack([bottom, top, centre_b, centre_t])
        i = np.arange(m)
        j = (i + 1) % m
        # Side quads (i, j) split into two triangles, outward for a CCW loop.
        side = np.concatenate([np.column_stack([i, j, m + j]), np.column_stack([i, m + j, m + i])])
        cb, ct = 2 * m, 2 * m + 1
        # Caps as fans: fine for the star-shaped sections used here; the caps lie far
        # from the z = 0 plane, so their triangulation never touches a 2-D answer.
        cap_b = np.column_stack([np.full(m, cb), j, i])
        cap_t = np.column_stack([np.full(m, ct), m + i, m + j])
        verts.append(v)
        faces.append(np.concatenate([side, cap_b, cap_t]) + offset)
        offset += v.shape[0]
    return np.ascontiguousarray(np.vstack(verts)), np.ascontiguousarray(np.vstack(faces), dtype=np.int64)
