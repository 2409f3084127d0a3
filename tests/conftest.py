"""Test meshes built from our own arrays: boxes, octahedra, spheres, tori, a straight wing.

Every builder returns ``(vertices (n, 3) float64, faces (m, 3) int64)`` of a closed,
outward-oriented triangle surface. The benchmarks import these too.
"""

from __future__ import annotations

import numpy as np

__all__ = ["box_mesh", "octahedron_mesh", "sphere_mesh", "torus_mesh", "wing_mesh", "rigid_pose", "apply_pose"]


def box_mesh(lower, upper):
    """Axis-aligned box [lower, upper], 12 outward triangles."""
    lo = np.asarray(lower, float)
    hi = np.asarray(upper, float)
    corners = np.array([[(hi if (n >> a) & 1 else lo)[a] for a in range(3)] for n in range(8)])
    # corner n has bit a set when it sits on the upper face along axis a
    faces = np.array(
        [
            [0, 2, 6], [0, 6, 4],  # x = lo... (bit 0 clear): corners 0, 2, 4, 6
            [1, 5, 7], [1, 7, 3],  # x = hi
            [0, 4, 5], [0, 5, 1],  # y = lo: corners 0, 1, 4, 5
            [2, 3, 7], [2, 7, 6],  # y = hi
            [0, 1, 3], [0, 3, 2],  # z = lo: corners 0, 1, 2, 3
            [4, 6, 7], [4, 7, 5],  # z = hi
        ],
        dtype=np.int64,
    )
    return corners, faces[:, ::-1].copy()  # listed inward above; reversed to outward


def octahedron_mesh(centre, r):
    """Regular octahedron |x - c|_1 <= r, 8 outward triangles."""
    c = np.asarray(centre, float)
    v = c + r * np.array([[1, 0, 0], [-1, 0, 0], [0, 1, 0], [0, -1, 0], [0, 0, 1], [0, 0, -1]], float)
    faces = []
    for sx, ix in ((1, 0), (-1, 1)):
        for sy, iy in ((1, 2), (-1, 3)):
            for sz, iz in ((1, 4), (-1, 5)):
                tri = [ix, iy, iz]
                if sx * sy * sz < 0:
                    tri = [ix, iz, iy]
                faces.append(tri)
    return v, np.array(faces, dtype=np.int64)


def sphere_mesh(radius=1.0, subdivisions=3, centre=(0.0, 0.0, 0.0)):
    """Icosphere (trimesh.creation.icosphere) inscribed in a sphere, as arrays."""
    import trimesh

    m = trimesh.creation.icosphere(subdivisions=subdivisions, radius=radius)
    return np.asarray(m.vertices, float) + np.asarray(centre, float), np.asarray(m.faces, np.int64)


def torus_mesh(R=1.0, r=0.3, n_major=48, n_minor=24):
    """Torus about the z axis, centre-circle radius R and tube radius r."""
    u = 2 * np.pi * np.arange(n_major) / n_major
    v = 2 * np.pi * np.arange(n_minor) / n_minor
    U, V = np.meshgrid(u, v, indexing="ij")
    pts = np.stack([(R + r * np.cos(V)) * np.cos(U), (R + r * np.cos(V)) * np.sin(U), r * np.sin(V)], axis=-1)
    idx = np.arange(n_major * n_minor).reshape(n_major, n_minor)
    a = idx
    b = np.roll(idx, -1, axis=0)
    c = np.roll(np.roll(idx, -1, axis=0), -1, axis=1)
    d = np.roll(idx, -1, axis=1)
    faces = np.concatenate([np.stack([a, b, c], -1).reshape(-1, 3), np.stack([a, c, d], -1).reshape(-1, 3)])
    return pts.reshape(-1, 3), faces.astype(np.int64)


def wing_section(n=100, thickness=0.12, chord=1.0):
    """Closed symmetric NACA 00xx-like loop (closed trailing edge), counter-clockwise, (2n, 2)."""
    beta = np.linspace(0.0, np.pi, n + 1)
    x = 0.5 * (1 - np.cos(beta))  # 0 .. 1, cosine spacing
    yt = 5 * thickness * (0.2969 * np.sqrt(x) - 0.1260 * x - 0.3516 * x**2 + 0.2843 * x**3 - 0.1036 * x**4)
    yt[-1] = 0.0
    upper = np.column_stack([x[::-1], yt[::-1]])  # TE -> LE along the top
    lower = np.column_stack([x[1:-1], -yt[1:-1]])  # LE -> TE along the bottom
    return chord * np.vstack([upper, lower])


def wing_mesh(n_section=100, n_span=10, chord=1.0, span=3.0, thickness=0.12, z0=0.0):
    """Straight extruded wing along +z from z0 to z0 + span with flat end caps.

    Triangles: 2 * n_loop * n_span on the sides plus 2 * n_loop in the cap fans,
    n_loop = 2 * n_section.
    """
    loop = wing_section(n_section, thickness, chord)
    m = loop.shape[0]
    zs = z0 + np.linspace(0.0, span, n_span + 1)
    verts = np.concatenate([np.column_stack([loop, np.full(m, z)]) for z in zs])
    centre = np.array([0.3 * chord, 0.0])
    verts = np.vstack([verts, [*centre, zs[0]], [*centre, zs[-1]]])
    i = np.arange(m)
    j = (i + 1) % m
    side = []
    for s in range(n_span):
        lo, hi = s * m, (s + 1) * m
        side.append(np.column_stack([lo + i, lo + j, hi + j]))
        side.append(np.column_stack([lo + i, hi + j, hi + i]))
    cb, ct = verts.shape[0] - 2, verts.shape[0] - 1
    top = n_span * m
    caps = [np.column_stack([np.full(m, cb), j, i]), np.column_stack([np.full(m, ct), top + i, top + j])]
    return verts, np.concatenate(side + caps).astype(np.int64)


def rigid_pose(rng, translation_scale=0.1):
    """A random rotation (QR of a Gaussian matrix) and translation as a 4x4 transform."""
    q, r = np.linalg.qr(rng.normal(size=(3, 3)))
    q = q * np.sign(np.diag(r))
    if np.linalg.det(q) < 0:
        q[:, 0] = -q[:, 0]
    T = np.eye(4)
    T[:3, :3] = q
    T[:3, 3] = rng.normal(scale=translation_scale, size=3)
    return T


def apply_pose(T, mesh):
    """Mesh moved by a 4x4 rigid transform (a new vertex array)."""
    v, f = mesh
    return np.asarray(v) @ T[:3, :3].T + T[:3, 3], f
