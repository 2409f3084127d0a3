"""Watertight triangle surfaces: build, load, check, save, sample and measure thickness.

This is the one module of ibprep that touches trimesh. Every mesh it builds or
returns is a ``trimesh.Trimesh`` made with ``process=False``, so trimesh never
merges vertices or drops faces behind the caller's back; the only merging done
is the explicit welding in :func:`load_surface`, with a tolerance relative to
the body size.

A surface passes the checks when it is

* finite: no NaN or infinite vertex;
* non-degenerate: no face with a repeated vertex or (numerically) zero area;
* closed: every edge is shared by exactly two faces (an edge used once is an
  open edge, more than twice a non-manifold edge);
* consistently oriented: the two faces at each edge traverse it in opposite
  directions;
* outward: every connected body encloses a positive signed volume.

Several disjoint closed bodies are allowed (a tandem pair of wings). A body
nested inside another (a cavity) is not supported: its negative volume reads as
an inverted body.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import IbprepWarning, InputError
from ..files import atomic_write

__all__ = [
    "SurfaceReport",
    "ThinRegions",
    "check_surface",
    "load_surface",
    "local_thickness",
    "mesh_from_arrays",
    "save_surface",
    "surface_markers",
    "thin_regions",
    "weld_vertices",
]

# A face is degenerate when twice its area is below this fraction of its longest
# edge squared (its height is below 1e-10 of its longest edge) or it repeats a vertex.
_DEGENERATE_RTOL = 1e-10
# Default welding distance as a fraction of the bounding-box diagonal: STL files
# store each triangle's corners separately, rounded to float32 (relative 6e-8).
_WELD_RTOL = 1e-7
# Ray hits closer than this fraction of the bounding-box diagonal to the ray start
# are the surface the ray leaves from, not the opposite side.
_SELF_HIT_RTOL = 1e-7
_READABLE = (".stl", ".obj", ".ply")


def _trimesh():
    import trimesh  # local: keeps `import ibprep` cheap

    return trimesh


def mesh_from_arrays(vertices, faces):
    """Wrap vertex and face arrays in a ``trimesh.Trimesh`` without any processing.

    Parameters
    ----------
    vertices : (n, 3) float — metres.
    faces : (m, 3) int — vertex indices, counter-clockwise seen from outside.

    Returns
    -------
    trimesh.Trimesh
        Built with ``process=False, validate=False``: vertices are never merged
        and faces never dropped. The arrays are copied.
    """
    v = np.array(vertices, dtype=np.float64)
    f = np.array(faces, dtype=np.int64)
    if v.ndim != 2 or v.shape[1] != 3:
        raise InputError(f"vertices must have shape (n, 3), got {v.shape}")
    if f.ndim != 2 or f.shape[1] != 3:
        raise InputError(f"faces must have shape (m, 3), got {f.shape}")
    if f.size and (f.min() < 0 or f.max() >= len(v)):
        raise InputError(f"face indices must lie in [0, {len(v)}), got [{f.min()}, {f.max()}]")
    return _trimesh().Trimesh(vertices=v, faces=f, process=False, validate=False)


# --------------------------------------------------------------------------- checks
@dataclass(frozen=True)
class SurfaceReport:
    """What :func:`check_surface` found. Lengths in the mesh's units (metres).

    Attributes
    ----------
    n_vertices, n_faces : int — counts in the mesh as given.
    nonfinite_vertices : int — vertices with a NaN or infinite coordinate.
    degenerate_faces : int — faces repeating a vertex or of (numerically) zero area.
    degenerate_location : (3,) float tuple or None — centroid of the first degenerate face.
    open_edges : int — edges used by exactly one face.
    open_edge_location : (3,) float tuple or None — midpoint of the first open edge.
    nonmanifold_edges : int — edges used by three or more faces.
    misoriented_edges : int — two-face edges traversed the same way by both faces.
    n_bodies : int — connected pieces (faces linked through shared vertices).
    body_volumes : tuple of float — signed volume of each body, m^3 (positive = outward).
    volume : float — total signed volume, m^3 (NaN if a vertex is not finite).
    area : float — total area, m^2.
    """

    n_vertices: int
    n_faces: int
    nonfinite_vertices: int
    degenerate_faces: int
    degenerate_location: tuple | None
    open_edges: int
    open_edge_location: tuple | None
    nonmanifold_edges: int
    misoriented_edges: int
    n_bodies: int
    body_volumes: tuple
    volume: float
    area: float

    @property
    def finite(self) -> bool:
        """No NaN or infinite vertex."""
        return self.nonfinite_vertices == 0

    @property
    def closed(self) -> bool:
        """Every edge is shared by exactly two faces (and there is at least one face)."""
        return self.n_faces > 0 and self.open_edges == 0 and self.nonmanifold_edges == 0

    @property
    def oriented(self) -> bool:
        """Closed and the two faces at every edge traverse it in opposite directions."""
        return self.closed and self.misoriented_edges == 0

    @property
    def outward(self) -> bool:
        """Oriented and every body encloses a positive volume (normals point out)."""
        return self.oriented and self.finite and all(v > 0 for v in self.body_volumes)

    @property
    def ok(self) -> bool:
        """Every check passes: finite, no degenerate face, closed, oriented, outward."""
        return self.finite and self.degenerate_faces == 0 and self.outward


def _edge_table(faces: np.ndarray):
    """Undirected edge ids, counts and orientation sums for a face array."""
    directed = np.concatenate([faces[:, [0, 1]], faces[:, [1, 2]], faces[:, [2, 0]]])
    lo = directed.min(axis=1)
    hi = directed.max(axis=1)
    forward = np.where(directed[:, 0] < directed[:, 1], 1, -1)
    n = int(faces.max()) + 1 if faces.size else 1
    key = lo * n + hi
    uniq, inverse, counts = np.unique(key, return_inverse=True, return_counts=True)
    direction_sum = np.bincount(inverse, weights=forward, minlength=len(uniq))
    return uniq, inverse, counts, direction_sum, lo, hi, n


def _body_labels(n_vertices: int, faces: np.ndarray) -> tuple[int, np.ndarray]:
    """Connected pieces of a face set: (count, label per face)."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    a = np.concatenate([faces[:, 0], faces[:, 1]])
    b = np.concatenate([faces[:, 1], faces[:, 2]])
    graph = coo_matrix((np.ones(len(a), dtype=np.int8), (a, b)), shape=(n_vertices, n_vertices))
    _, vertex_label = connected_components(graph, directed=False)
    face_label = vertex_label[faces[:, 0]]
    uniq, face_label = np.unique(face_label, return_inverse=True)
    return len(uniq), face_label


def _arrays(mesh) -> tuple[np.ndarray, np.ndarray]:
    if hasattr(mesh, "vertices") and hasattr(mesh, "faces"):
        v, f = mesh.vertices, mesh.faces
    else:
        try:
            v, f = mesh
        except (TypeError, ValueError):
            raise InputError(
                f"a surface must be a trimesh.Trimesh or a (vertices, faces) pair, got {type(mesh).__name__}"
            ) from None
    v = np.asarray(v, dtype=np.float64)
    f = np.asarray(f, dtype=np.int64)
    if v.ndim != 2 or v.shape[1] != 3 or f.ndim != 2 or f.shape[1] != 3:
        raise InputError(f"a surface needs (n, 3) vertices and (m, 3) faces, got {v.shape} and {f.shape}")
    if f.size and (f.min() < 0 or f.max() >= len(v)):
        raise InputError(f"face indices must lie in [0, {len(v)}), got [{f.min()}, {f.max()}]")
    return v, f


def check_surface(mesh) -> SurfaceReport:
    """Check that a triangle surface is a closed, consistently oriented, outward body.

    Parameters
    ----------
    mesh : trimesh.Trimesh or (vertices, faces) pair — vertices (n, 3) float in
        metres, faces (m, 3) int.

    Returns
    -------
    SurfaceReport
        Counts and locations of every problem found; ``report.ok`` is True when
        all checks pass. This function never raises for a bad surface (only for
        arrays of the wrong shape) and never modifies the mesh; the pre-flight
        gate turns the report into verdicts.

    Notes
    -----
    Edges are counted on vertex indices, so coincident but unwelded vertices make
    open edges (load files through :func:`load_surface`, which welds). Volumes
    come from the divergence theorem, V = (1/6) sum v0 . (v1 x v2), taken about
    the bounding-box centre to limit round-off.
    """
    v, f = _arrays(mesh)
    n_faces = len(f)
    finite_rows = np.all(np.isfinite(v), axis=1)
    nonfinite = int(np.count_nonzero(~finite_rows))
    if n_faces == 0:
        return SurfaceReport(len(v), 0, nonfinite, 0, None, 0, None, 0, 0, 0, (), 0.0, 0.0)

    centre = 0.5 * (v[finite_rows].min(axis=0) + v[finite_rows].max(axis=0)) if finite_rows.any() else np.zeros(3)
    tri = v[f] - centre
    e01 = tri[:, 1] - tri[:, 0]
    e02 = tri[:, 2] - tri[:, 0]
    e12 = tri[:, 2] - tri[:, 1]
    cross = np.cross(e01, e02)
    twice_area = np.linalg.norm(cross, axis=1)
    longest2 = np.max([np.einsum("ij,ij->i", e, e) for e in (e01, e02, e12)], axis=0)
    repeated = (f[:, 0] == f[:, 1]) | (f[:, 1] == f[:, 2]) | (f[:, 0] == f[:, 2])
    with np.errstate(invalid="ignore"):
        degenerate = repeated | (twice_area <= _DEGENERATE_RTOL * longest2)
    degenerate &= np.all(np.isfinite(tri), axis=(1, 2))
    deg_loc = tuple(float(c) for c in (tri[np.argmax(degenerate)].mean(axis=0) + centre)) if degenerate.any() else None

    uniq, inverse, counts, direction_sum, lo, hi, nkey = _edge_table(f)
    open_mask = counts == 1
    n_open = int(np.count_nonzero(open_mask))
    open_loc = None
    if n_open:
        key = uniq[np.argmax(open_mask)]
        a, b = divmod(int(key), nkey)
        open_loc = tuple(float(c) for c in 0.5 * (v[a] + v[b]))
    nonmanifold = int(np.count_nonzero(counts > 2))
    misoriented = int(np.count_nonzero((counts == 2) & (direction_sum != 0)))

    n_bodies, label = _body_labels(len(v), f)
    signed6 = np.einsum("ij,ij->i", tri[:, 0], np.cross(tri[:, 1], tri[:, 2]))
    body_volumes = np.bincount(label, weights=signed6, minlength=n_bodies) / 6.0
    return SurfaceReport(
        n_vertices=len(v),
        n_faces=n_faces,
        nonfinite_vertices=nonfinite,
        degenerate_faces=int(np.count_nonzero(degenerate)),
        degenerate_location=deg_loc,
        open_edges=n_open,
        open_edge_location=open_loc,
        nonmanifold_edges=nonmanifold,
        misoriented_edges=misoriented,
        n_bodies=int(n_bodies),
        body_volumes=tuple(float(x) for x in body_volumes),
        volume=float(body_volumes.sum()),
        area=float(0.5 * twice_area[np.isfinite(twice_area)].sum()),
    )


# ------------------------------------------------------------------------- welding
def _unique_rows(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Bitwise-equal rows merged, first occurrences kept in order: (unique rows, inverse)."""
    bits = np.ascontiguousarray(v + 0.0).view(np.int64)  # + 0.0 turns -0.0 into 0.0
    order = np.lexsort(bits.T[::-1])
    sorted_bits = bits[order]
    new_run = np.ones(len(v), dtype=bool)
    new_run[1:] = np.any(sorted_bits[1:] != sorted_bits[:-1], axis=1)
    run = np.cumsum(new_run) - 1
    first = np.full(run[-1] + 1, len(v), dtype=np.int64)
    np.minimum.at(first, run, order)
    keep = np.argsort(first)  # unique rows in order of first occurrence
    rank = np.empty_like(keep)
    rank[keep] = np.arange(len(keep))
    inverse = np.empty(len(v), dtype=np.int64)
    inverse[order] = rank[run]
    return v[first[keep]], inverse


def weld_vertices(vertices, faces, tolerance: float):
    """Merge vertices closer than ``tolerance`` and drop the unused ones.

    Parameters
    ----------
    vertices : (n, 3) float — metres (finite).
    faces : (m, 3) int — vertex indices.
    tolerance : float — metres; vertices within this distance (chains included)
        become one, placed at one of its members.

    Returns
    -------
    vertices : (k, 3) float, faces : (m, 3) int — new arrays; the face count and
    order are unchanged (a face may now repeat a vertex: that is reported as
    degenerate by :func:`check_surface`, never dropped here).
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components
    from scipy.spatial import cKDTree

    v = np.asarray(vertices, dtype=np.float64)
    f = np.asarray(faces, dtype=np.int64)
    if len(v) == 0:
        return v.copy(), f.copy()
    # Exact duplicates first (an STL repeats each corner bit for bit), then near ones.
    v, exact = _unique_rows(v)
    f = exact[f]
    n = len(v)
    pairs = cKDTree(v).query_pairs(float(tolerance), output_type="ndarray") if tolerance > 0 else np.empty((0, 2), int)
    if len(pairs):
        graph = coo_matrix((np.ones(len(pairs), np.int8), (pairs[:, 0], pairs[:, 1])), shape=(n, n))
        _, label = connected_components(graph, directed=False)
    else:
        label = np.arange(n)
    # representative = first vertex of each group
    first = np.full(label.max() + 1, n, dtype=np.int64)
    np.minimum.at(first, label, np.arange(n))
    rep = first[label]
    f2 = rep[f]
    used = np.zeros(n, dtype=bool)
    used[f2.ravel()] = True
    if used.all():
        return v.copy(), f2.astype(np.int64)
    new_id = np.cumsum(used) - 1  # compact: drop vertices no face uses
    return v[used].copy(), new_id[f2].astype(np.int64)


# ---------------------------------------------------------------- load and save
def _describe_problems(report: SurfaceReport, where: str) -> None:
    """Raise the InputError for the first failed check (in a fixed order)."""
    if report.n_faces == 0:
        raise InputError(f"{where} contains no triangles; export the body as a triangle surface")
    if not report.finite:
        raise InputError(
            f"{where} has {report.nonfinite_vertices} vertices with NaN or infinite coordinates; "
            "repair or re-export the surface"
        )
    if report.degenerate_faces:
        x, y, z = report.degenerate_location
        raise InputError(
            f"{where} has {report.degenerate_faces} degenerate triangles (zero area or a repeated "
            f"vertex after welding), e.g. near ({x:.6g}, {y:.6g}, {z:.6g}); remove them in a mesh "
            "editor or re-export with a finer tessellation"
        )
    if report.nonmanifold_edges:
        raise InputError(
            f"{where} has {report.nonmanifold_edges} non-manifold edges (shared by three or more "
            "triangles); the bodies touch or overlap: separate or merge them into one closed surface"
        )
    if report.open_edges:
        x, y, z = report.open_edge_location
        raise InputError(
            f"{where} is not closed: {report.open_edges} open edges (used by one triangle), e.g. "
            f"near ({x:.6g}, {y:.6g}, {z:.6g}); fill the holes in a mesh editor and export a "
            "watertight surface"
        )
    if report.misoriented_edges:
        raise InputError(
            f"{where} is not consistently oriented: at {report.misoriented_edges} edges both "
            "triangles run the same way; recompute the normals consistently (e.g. 'unify normals') "
            "and export again"
        )


def load_surface(path, *, scale: float = 1.0, weld_tolerance: float | None = None):
    """Read a closed triangle surface (STL ascii or binary, OBJ, PLY) and check it.

    Parameters
    ----------
    path : str or os.PathLike — file ending in .stl, .obj or .ply.
    scale : float — multiplies every coordinate (e.g. 0.001 for a file in mm).
    weld_tolerance : float, optional — relative to the bounding-box diagonal;
        vertices closer than this are merged (STL stores each triangle's corners
        separately). Default 1e-7.

    Returns
    -------
    trimesh.Trimesh
        Built with ``process=False``; closed, consistently oriented, outward.
        A body whose volume comes out negative (an inside-out file) is turned
        outward by reversing its faces, and an :class:`~ibprep.errors.IbprepWarning`
        says which file and how many bodies were flipped.

    Raises
    ------
    InputError
        Missing or unreadable file, unknown extension, bad ``scale``, no
        triangles, NaN/inf vertices, degenerate triangles, non-manifold edges,
        open edges (how many and where), inconsistent orientation. The message
        names the file and says what to do.
    """
    p = Path(path)
    where = f"surface file {str(p)!r}"
    if p.suffix.lower() not in _READABLE:
        raise InputError(f"{where}: unknown extension {p.suffix!r}; give an .stl, .obj or .ply file")
    if not p.is_file():
        raise InputError(f"{where} does not exist; check the path (relative paths are taken from the case file)")
    try:
        scale = float(scale)
    except (TypeError, ValueError):
        raise InputError(f"scale must be a positive number, got {scale!r}") from None
    if not (math.isfinite(scale) and scale > 0):
        raise InputError(f"scale must be a positive finite number, got {scale!r}")
    rtol = _WELD_RTOL if weld_tolerance is None else float(weld_tolerance)
    if not (math.isfinite(rtol) and rtol >= 0):
        raise InputError(f"weld_tolerance must be a non-negative number, got {weld_tolerance!r}")
    if p.stat().st_size == 0:
        raise InputError(f"{where} is empty (0 bytes); export the body again")
    trimesh = _trimesh()
    try:
        if p.suffix.lower() == ".stl":  # arrays straight from the reader, no mesh object
            from trimesh.exchange.stl import load_stl

            with open(p, "rb") as fh:
                loaded = load_stl(fh)
            v, f = loaded.get("vertices", np.empty((0, 3))), loaded.get("faces", np.empty((0, 3)))
        else:
            mesh = trimesh.load(str(p), force="mesh", process=False)
            v, f = getattr(mesh, "vertices", np.empty((0, 3))), getattr(mesh, "faces", np.empty((0, 3)))
    except Exception as exc:  # a file boundary: any parser failure is bad input
        raise InputError(f"{where} could not be read as {p.suffix[1:].upper()}: {exc}; check the file") from None
    v = np.asarray(v, dtype=np.float64).reshape(-1, 3)
    f = np.asarray(f, dtype=np.int64).reshape(-1, 3)
    if len(f) == 0:
        raise InputError(f"{where} contains no triangles; export the body as a triangle surface")
    bad = ~np.all(np.isfinite(v), axis=1)
    if bad.any():
        raise InputError(
            f"{where} has {int(bad.sum())} vertices with NaN or infinite coordinates; repair or re-export the surface"
        )
    v = v * scale
    diag = float(np.linalg.norm(v.max(axis=0) - v.min(axis=0)))
    v, f = weld_vertices(v, f, rtol * diag)
    report = check_surface((v, f))
    _describe_problems(report, where)
    inverted = np.array(report.body_volumes) <= 0
    if inverted.any():
        _, label = _body_labels(len(v), f)
        flip = inverted[label]
        f = f.copy()
        f[flip] = f[flip][:, ::-1]
        warnings.warn(
            f"{where}: {int(inverted.sum())} of {report.n_bodies} bodies were inside out (negative "
            "volume); their triangles were reversed so the normals point outward",
            IbprepWarning,
            stacklevel=2,
        )
    return mesh_from_arrays(v, f)


def _stl_payload(mesh, ascii: bool) -> bytes:
    """The STL file content for ``mesh`` (split out so a failing writer can be simulated)."""
    from trimesh.exchange.stl import export_stl, export_stl_ascii

    return export_stl_ascii(mesh).encode("ascii") if ascii else export_stl(mesh)


def save_surface(mesh, path, *, ascii: bool = False) -> Path:
    """Write a surface to an STL file atomically.

    The file is written to a temporary file in the target directory, flushed to
    disk and then renamed over ``path``, so a failure part-way never leaves a
    half-written file and never destroys an existing one.

    Parameters
    ----------
    mesh : trimesh.Trimesh or (vertices, faces) pair — metres.
    path : str or os.PathLike — ends in .stl; its directory must exist.
    ascii : bool — write ascii STL instead of binary (the default).

    Returns
    -------
    pathlib.Path — the path written.

    Raises
    ------
    InputError
        Wrong extension or missing directory.
    OSError
        The disk write itself failed (the previous file, if any, is intact).
    """
    p = Path(path)
    if p.suffix.lower() != ".stl":
        raise InputError(f"surfaces are saved as STL; give a path ending in .stl, got {str(p)!r}")
    directory = p.parent if str(p.parent) else Path(".")
    if not directory.is_dir():
        raise InputError(f"cannot save {str(p)!r}: directory {str(directory)!r} does not exist; create it first")
    if not hasattr(mesh, "faces"):
        mesh = mesh_from_arrays(*_arrays(mesh))
    payload = _stl_payload(mesh, ascii)
    atomic_write(p, lambda tmp: Path(tmp).write_bytes(payload))
    return p


# ------------------------------------------------------------------------ markers
def _subtriangle_barycentrics(m: int) -> np.ndarray:
    """(m*m, 3) barycentric centroids of the m*m sub-triangles of a regular split."""
    i, j = np.meshgrid(np.arange(m), np.arange(m), indexing="ij")
    up = i + j <= m - 1
    down = i + j <= m - 2
    a = np.concatenate([(i[up] + 1 / 3), (i[down] + 2 / 3)]) / m
    b = np.concatenate([(j[up] + 1 / 3), (j[down] + 2 / 3)]) / m
    return np.column_stack([1.0 - a - b, a, b])


def surface_markers(mesh, spacing: float):
    """Lagrangian markers over a surface at about the given spacing.

    Parameters
    ----------
    mesh : trimesh.Trimesh or (vertices, faces) pair — closed, outward; metres.
    spacing : float — metres; the wanted distance between markers.

    Returns
    -------
    points : (k, 3) float — metres; marker positions, on the mesh surface (the
        sample of each patch nearest to the patch's area-weighted centroid).
    normals : (k, 3) float — unit outward normals (area-weighted patch means).
    areas : (k,) float — m^2; patch areas, summing to the surface area up to round-off.

    Notes
    -----
    Each triangle is split regularly into ``q^2`` sub-triangles, ``q =
    ceil(longest edge / spacing)``; the sub-triangles are grouped into cubes of
    side ``spacing`` and, within a cube, by the dominant signed axis of their
    normal (so the two sides of a thin trailing edge never share a marker). Each
    group is one marker. Areas are exact sums of sub-triangle areas; normals are
    the area-weighted mean of the group's face normals.
    """
    try:
        h = float(spacing)
    except (TypeError, ValueError):
        raise InputError(f"marker spacing must be a positive length in metres, got {spacing!r}") from None
    if not (math.isfinite(h) and h > 0):
        raise InputError(f"marker spacing must be a positive length in metres, got {spacing!r}")
    v, f = _arrays(mesh)
    if len(f) == 0:
        raise InputError("the surface has no triangles; markers need a closed surface")
    tri = v[f]
    cross = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    twice = np.linalg.norm(cross, axis=1)
    keep = twice > 0
    tri, cross, twice = tri[keep], cross[keep], twice[keep]
    unit = cross / twice[:, None]
    edges = np.stack([tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 1], tri[:, 0] - tri[:, 2]], axis=1)
    longest = np.sqrt(np.einsum("ijk,ijk->ij", edges, edges).max(axis=1))
    q = np.maximum(1, np.ceil(longest / h).astype(np.int64))
    n_samples = int(np.sum(q * q))
    if n_samples > 50_000_000:
        raise InputError(
            f"marker spacing {h:.3g} m would need {n_samples} surface samples; give a larger spacing"
        )
    pts, nrm, area = [], [], []
    for qq in np.unique(q):  # few distinct subdivision levels
        sel = np.flatnonzero(q == qq)
        bary = _subtriangle_barycentrics(int(qq))
        pts.append(np.einsum("sk,tkd->tsd", bary, tri[sel]).reshape(-1, 3))
        nrm.append(np.repeat(unit[sel], len(bary), axis=0))
        area.append(np.repeat(0.5 * twice[sel] / len(bary), len(bary)))
    pts, nrm, area = np.concatenate(pts), np.concatenate(nrm), np.concatenate(area)
    cell = np.floor((pts - pts.min(axis=0)) / h).astype(np.int64)
    axis = np.abs(nrm).argmax(axis=1)
    side = 2 * axis + (nrm[np.arange(len(nrm)), axis] < 0)
    dims = cell.max(axis=0) + 1
    key = ((cell[:, 0] * dims[1] + cell[:, 1]) * dims[2] + cell[:, 2]) * 6 + side
    _, group = np.unique(key, return_inverse=True)
    group = group.ravel()
    k = group.max() + 1
    a = np.bincount(group, weights=area, minlength=k)
    centroid = np.column_stack([np.bincount(group, weights=area * pts[:, d], minlength=k) for d in range(3)]) / a[:, None]
    nsum = np.column_stack([np.bincount(group, weights=area * nrm[:, d], minlength=k) for d in range(3)])
    nsum /= np.linalg.norm(nsum, axis=1)[:, None]
    # The patch centroid sits off a curved surface; the marker is the patch's sample
    # nearest to it, which lies on the mesh.
    gap = np.einsum("ij,ij->i", pts - centroid[group], pts - centroid[group])
    nearest = np.lexsort((gap, group))
    first = np.concatenate([[True], group[nearest][1:] != group[nearest][:-1]])
    return pts[nearest[first]], nsum, a


# ---------------------------------------------------------------------- thickness
class _VoxelIndex:
    """Triangles binned into a uniform grid of cubes: a vectorised broad phase for rays.

    Each triangle is listed in every cube its bounding box overlaps; the lists are
    stored CSR-style (``start``, ``tri``) over flat cube keys.
    """

    # Cube side as a multiple of the median longest triangle edge: long rays (whole-body
    # thickness) march faster through larger cubes, short capped searches test fewer
    # triangles in smaller ones (measured on a sphere and the demo wing).
    _SIDE_PER_EDGE = 1.0
    _SIDE_PER_EDGE_SHORT = 0.5
    # Cap on (triangle, cube) pairs per triangle on average; the side grows past it.
    _PAIRS_PER_TRIANGLE = 24

    def __init__(self, tri: np.ndarray, short: bool = False):
        self.tri = tri
        lo_t, hi_t = tri.min(axis=1), tri.max(axis=1)
        self.lower = lo_t.min(axis=0)
        upper = hi_t.max(axis=0)
        span = np.maximum(upper - self.lower, 1e-300)
        edges = np.linalg.norm(tri - np.roll(tri, 1, axis=1), axis=2).max(axis=1)
        factor = self._SIDE_PER_EDGE_SHORT if short else self._SIDE_PER_EDGE
        side = max(factor * float(np.median(edges)), float(span.max()) / 512)
        while True:
            dims = np.maximum(1, np.ceil(span / side).astype(np.int64))
            a = np.clip(np.floor((lo_t - self.lower) / side).astype(np.int64), 0, dims - 1)
            b = np.clip(np.floor((hi_t - self.lower) / side).astype(np.int64), 0, dims - 1)
            ext = b - a + 1
            counts = ext.prod(axis=1)
            if counts.sum() <= self._PAIRS_PER_TRIANGLE * len(tri) or side >= span.max():
                break
            side *= 1.5
        self.side, self.dims = side, dims
        owner = np.repeat(np.arange(len(tri)), counts)
        local = np.arange(owner.size) - np.repeat(np.cumsum(counts) - counts, counts)
        e = ext[owner]
        ix = a[owner, 0] + local // (e[:, 1] * e[:, 2])
        iy = a[owner, 1] + (local // e[:, 2]) % e[:, 1]
        iz = a[owner, 2] + local % e[:, 2]
        key = (ix * dims[1] + iy) * dims[2] + iz
        order = np.argsort(key, kind="stable")
        self.tri_of = owner[order]
        self.start = np.searchsorted(key[order], np.arange(int(dims.prod()) + 1))

    def candidates(self, lo: np.ndarray, hi: np.ndarray):
        """(query, triangle) pairs whose cubes overlap the query boxes ``lo``..``hi`` (k, 3)."""
        dims = self.dims
        a = np.clip(np.floor((lo - self.lower) / self.side).astype(np.int64), 0, dims - 1)
        b = np.clip(np.floor((hi - self.lower) / self.side).astype(np.int64), 0, dims - 1)
        ext = b - a + 1
        counts = ext.prod(axis=1)
        q = np.repeat(np.arange(len(lo)), counts)
        local = np.arange(q.size) - np.repeat(np.cumsum(counts) - counts, counts)
        e = ext[q]
        key = ((a[q, 0] + local // (e[:, 1] * e[:, 2])) * dims[1] + a[q, 1] + (local // e[:, 2]) % e[:, 1]) * dims[
            2
        ] + a[q, 2] + local % e[:, 2]
        n_in = self.start[key + 1] - self.start[key]
        q2 = np.repeat(q, n_in)
        pos = np.arange(q2.size) - np.repeat(np.cumsum(n_in) - n_in, n_in) + np.repeat(self.start[key], n_in)
        return q2, self.tri_of[pos]


def _ray_triangle(orig, dirs, v0, e1, e2, eps=1e-12):
    """Moeller-Trumbore: distance along each ray to where it leaves through its paired triangle.

    ``v0`` is each paired triangle's first corner, ``e1``, ``e2`` its edges from it
    (all (m, 3)). Only exits count (the ray runs along the triangle's outward
    normal, det < 0 for a counter-clockwise face); an entry or a miss gives NaN.
    """
    pvec = np.cross(dirs, e2)
    det = np.einsum("ij,ij->i", e1, pvec)
    ok = det < -1e-300
    inv = np.where(ok, 1.0 / np.where(ok, det, -1.0), 0.0)
    tvec = orig - v0
    u = np.einsum("ij,ij->i", tvec, pvec) * inv
    qvec = np.cross(tvec, e1)
    v = np.einsum("ij,ij->i", dirs, qvec) * inv
    t = np.einsum("ij,ij->i", e2, qvec) * inv
    hit = ok & (u >= -eps) & (v >= -eps) & (u + v <= 1 + eps)
    return np.where(hit, t, np.nan)


def _first_hits(v, f, origins, dirs, skip: float, max_distance: float = np.inf) -> np.ndarray:
    """Distance from each origin along its unit direction to the first exit beyond ``skip``.

    Rays stop marching past ``max_distance`` (their result stays ``inf``).

    Rays march through the cube grid of a :class:`_VoxelIndex` one cube length at a
    time, all rays together; a ray stops at its first piece with a hit (the first
    hit overall, since each piece only accepts hits inside itself).
    """
    tri = v[f]
    index = _VoxelIndex(tri, short=bool(np.isfinite(max_distance)))
    v0, e1, e2 = tri[:, 0], tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]
    h = index.side
    piece = min(h, max_distance)  # short searches test fewer cubes
    out = np.full(len(origins), np.inf)
    lower, upper = index.lower - h, index.lower + index.dims * h + h
    active = np.arange(len(origins))
    step = 0
    while active.size and step * piece < max_distance:
        t0, t1 = step * piece, (step + 1) * piece
        p0 = origins[active] + t0 * dirs[active]
        p1 = origins[active] + t1 * dirs[active]
        inside = np.all((np.minimum(p0, p1) <= upper) & (np.maximum(p0, p1) >= lower), axis=1)
        active, p0, p1 = active[inside], p0[inside], p1[inside]
        if not active.size:
            break
        q, t_id = index.candidates(np.minimum(p0, p1), np.maximum(p0, p1))
        ray = active[q]
        t = _ray_triangle(origins[ray], dirs[ray], v0[t_id], e1[t_id], e2[t_id])
        good = (t > skip) & (t >= t0 - 1e-9 * piece) & (t <= t1 + 1e-9 * piece) & (t <= max_distance)
        if good.any():
            np.minimum.at(out, ray[good], t[good])
        active = active[~np.isfinite(out[active])]
        step += 1
    return out


def local_thickness(mesh, points, normals, *, max_distance: float | None = None) -> np.ndarray:
    """Distance through the body from surface points along their inward normals.

    Parameters
    ----------
    mesh : trimesh.Trimesh or (vertices, faces) pair — closed, outward; metres.
    points : (k, 3) float — metres; points on the surface.
    normals : (k, 3) float — outward normals at those points (need not be unit).
    max_distance : float, optional — metres; stop looking beyond this distance
        (those points get ``inf``). Much faster when only thin places matter.

    Returns
    -------
    (k,) float — metres; distance from each point along ``-normal`` to where the
    ray leaves the body (the first crossing of a face whose outward normal points
    along the ray); ``inf`` where there is none within ``max_distance``. Counting
    exits only makes the answer robust for points a little off the surface (marker
    centroids on a curved patch): an entry through the point's own face is skipped.

    Notes
    -----
    Rays are cast in double precision with the Moeller-Trumbore test (Moeller &
    Trumbore 1997, "Fast, minimum storage ray-triangle intersection", J. Graphics
    Tools 2(1)), over a uniform cube grid of the triangles that all rays march
    through together. Exits within 1e-7 of the bounding-box diagonal of the start
    are ignored as well. The surface must be closed and outward (see
    :func:`check_surface`).
    """
    v, f = _arrays(mesh)
    pts = np.asarray(points, dtype=np.float64)
    nrm = np.asarray(normals, dtype=np.float64)
    if pts.ndim != 2 or pts.shape[1] != 3 or nrm.shape != pts.shape:
        raise InputError(f"points and normals must both have shape (k, 3), got {pts.shape} and {nrm.shape}")
    length = np.linalg.norm(nrm, axis=1)
    if np.any(~np.isfinite(length)) or np.any(length == 0):
        raise InputError("every normal must be a finite non-zero vector")
    if len(pts) == 0 or len(f) == 0:
        return np.full(len(pts), np.inf)
    direction = -nrm / length[:, None]
    diag = float(np.linalg.norm(v.max(axis=0) - v.min(axis=0)))
    if max_distance is None:
        reach = np.inf
    else:
        reach = float(max_distance)
        if not reach > 0:
            raise InputError(f"max_distance must be a positive length in metres, got {max_distance!r}")
    return _first_hits(v, f, pts, direction, _SELF_HIT_RTOL * diag, reach)


@dataclass(frozen=True)
class ThinRegions:
    """Where a body is thinner than a limit (from :func:`thin_regions`).

    Attributes
    ----------
    points : (k, 3) float — metres; markers where the local thickness is below the limit.
    thickness : (k,) float — metres; local thickness there.
    area : float — m^2; surface area those markers stand for.
    min_thickness : float — metres; smallest thickness found (``inf`` when no
        marker is below the limit: rays are not followed past it).
    limit : float — metres; the limit asked for.
    examined_area : float — m^2; area of all the markers examined (the whole
        surface, or the band of side walls with ``planar_band``): ``area /
        examined_area`` is the thin fraction.
    """

    points: np.ndarray
    thickness: np.ndarray
    area: float
    min_thickness: float
    limit: float
    examined_area: float
    edge_taper: np.ndarray = None
    taper_area: float = 0.0

    @property
    def count(self) -> int:
        """Number of markers below the limit."""
        return int(len(self.thickness))

    @property
    def other_area(self) -> float:
        """m^2; thin area not explained by the taper of a sharp edge (see :func:`thin_regions`)."""
        return self.area - self.taper_area


def thin_regions(mesh, min_thickness: float, *, spacing: float | None = None,
                 planar_band: float | None = None) -> ThinRegions:
    """Surface markers where the body is thinner than ``min_thickness``.

    Parameters
    ----------
    mesh : trimesh.Trimesh or (vertices, faces) pair — closed, outward; metres.
    min_thickness : float — metres; e.g. two grid cells.
    spacing : float, optional — metres; marker spacing (default ``min_thickness``).
    planar_band : float, optional — metres; for the prism of a 2-D section
        (extruded along z about z = 0): examine only its side walls within
        ``|z| <= planar_band``, so the cost follows the section's perimeter and
        not the prism's depth, and the fraction is one of the perimeter.

    Returns
    -------
    ThinRegions — the markers below the limit, their thickness and area.
    """
    limit = float(min_thickness)
    if not (math.isfinite(limit) and limit > 0):
        raise InputError(f"min_thickness must be a positive length in metres, got {min_thickness!r}")
    if planar_band is not None:
        band = float(planar_band)
        if not (math.isfinite(band) and band > 0):
            raise InputError(f"planar_band must be a positive half-width in metres, got {planar_band!r}")
        mesh = _side_band(mesh, band)
    pts, nrm, area = surface_markers(mesh, limit if spacing is None else spacing)
    if planar_band is not None:
        side = np.abs(nrm[:, 2]) < 0.5  # the band has no caps; this drops none but slivers at its rims
        pts, nrm, area = pts[side], nrm[side], area[side]
    thick = local_thickness(mesh, pts, nrm, max_distance=limit)
    thin = thick < limit
    taper = _sharp_edge_taper(mesh, pts[thin], thick[thin], limit)
    return ThinRegions(
        points=pts[thin],
        thickness=thick[thin],
        area=float(area[thin].sum()),
        min_thickness=float(thick.min()) if len(thick) else float("inf"),
        limit=limit,
        examined_area=float(area.sum()),
        edge_taper=taper,
        taper_area=float(area[thin][taper].sum()),
    )


# A mesh edge is a sharp (wedge) edge when its two faces fold back on each other: the angle between their
# outward normals is above this, i.e. the wedge angle there is below 60 degrees.
_FOLD_MIN_DEG = 120.0
# A thin marker is the taper of a sharp edge when it lies no further from the edge than a wedge of the
# edge's own angle would be that thin, with this much slack for a curved (cambered, rounded) taper.
_TAPER_SLACK = 1.5


def _sharp_edge_taper(mesh, points: np.ndarray, thickness: np.ndarray, limit: float) -> np.ndarray:
    """(k,) bool: which thin markers are explained by the taper of a sharp edge (a trailing edge).

    A wedge of full angle phi is thinner than ``t`` within ``t / (2 tan(phi / 2))`` of its edge, whatever
    the grid: the thin strip along a sharp trailing edge is as wide, in cells, at every resolution. Such a
    marker is expected. A marker that is thin further from any sharp edge than that (a thin plate or fin, a
    flap, a thin wall) is not: it is the part of the body the grid may lose. Sharp edges are the mesh edges
    whose faces fold back on each other (normals more than 120 degrees apart).
    """
    k = len(points)
    if k == 0:
        return np.zeros(0, dtype=bool)
    v, f = _arrays(mesh)
    fn = np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]])
    fn /= np.maximum(np.linalg.norm(fn, axis=1, keepdims=True), 1e-300)
    edges = np.sort(np.concatenate([f[:, [0, 1]], f[:, [1, 2]], f[:, [2, 0]]]), axis=1)
    owner = np.tile(np.arange(len(f)), 3)
    order = np.lexsort((edges[:, 1], edges[:, 0]))
    e, o = edges[order], owner[order]
    pair = np.flatnonzero((e[1:] == e[:-1]).all(axis=1))  # consecutive equal edges: the two faces
    cos = np.einsum("ij,ij->i", fn[o[pair]], fn[o[pair + 1]])
    fold = cos < math.cos(math.radians(_FOLD_MIN_DEG))
    if not fold.any():
        return np.zeros(k, dtype=bool)
    ends = e[pair[fold]]
    # Full wedge angle phi = pi - (angle between the normals); slope of the wedge's thickness 2 tan(phi / 2).
    phi = math.pi - np.arccos(np.clip(cos[fold], -1.0, 1.0))
    slope = 2.0 * np.tan(0.5 * phi)
    a, b = v[ends[:, 0]], v[ends[:, 1]]
    # Sample each sharp edge finely (a quarter of the limit) and take the nearest sample.
    from scipy.spatial import cKDTree

    n_s = np.maximum(1, np.ceil(np.linalg.norm(b - a, axis=1) / (0.25 * limit)).astype(np.int64))
    idx = np.repeat(np.arange(len(a)), n_s + 1)
    frac = np.concatenate([np.linspace(0.0, 1.0, n + 1) for n in n_s])
    samples = a[idx] + frac[:, None] * (b - a)[idx]
    dist, near = cKDTree(samples).query(points)
    reach = _TAPER_SLACK * thickness / np.maximum(slope[idx[near]], 1e-12) + 0.25 * limit
    return dist <= reach


def _side_band(mesh, half: float):
    """The part of a surface with |z| <= half, open where it was cut (trimesh's plane slicing)."""
    from trimesh.intersections import slice_faces_plane

    v, f = _arrays(mesh)
    v, f = slice_faces_plane(v, f, plane_normal=np.array([0.0, 0.0, 1.0]), plane_origin=np.array([0.0, 0.0, -half]))[:2]
    if len(f):
        v, f = slice_faces_plane(v, f, plane_normal=np.array([0.0, 0.0, -1.0]),
                                 plane_origin=np.array([0.0, 0.0, half]))[:2]
    if len(f) == 0:
        raise InputError(f"the surface does not reach the plane z = 0 within {half:.3g} m; "
                         "a 2-D body is a prism about z = 0")
    return np.asarray(v, dtype=float), np.asarray(f, dtype=np.int64)
