"""Stencil building speed against a general-tools peer, and the limits experiment.

Run from the repository root::

    python benchmarks/bench_stencils.py            # sphere of radius 48 cells
    python benchmarks/bench_stencils.py --quick    # radius 20 cells
    python benchmarks/bench_stencils.py --limits   # distributions behind StencilLimits
    python benchmarks/bench_stencils.py --accuracy # RMS error and observed order on spheres
    python benchmarks/bench_stencils.py --as-worded # also the peer with a closest-point call per stencil

The peer is what a user would write with general tools: a cKDTree over the
non-solid cell centres (scipy.spatial.cKDTree.query_ball_point), trimesh's
closest point (one batched trimesh.proximity.closest_point call, generous to
the peer) and one numpy.linalg.lstsq per stencil in a Python loop. The peer does
no visibility test; ibprep does. Both run side by side in one process on all the
interface cells of the case, so each side's fixed costs (ibprep's surface index;
the peer's tree over every non-solid cell, its mesh and the batched closest-point
call) are spread over the same stencils. The peer's linear algebra is held to one
BLAS thread, as ibprep's pass runs on one core: the ratio is one core against one.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

# One BLAS thread for the peer's lstsq (set before numpy loads): a second thread
# spinning on 10-column problems only adds CPU time. ibprep's pass uses no BLAS.
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import trimesh  # noqa: E402
from scipy import ndimage  # noqa: E402
from scipy.spatial import cKDTree  # noqa: E402

from ibprep import Grid, build_stencils  # noqa: E402
from ibprep.tagging.classify import CellTag  # noqa: E402
from ibprep.geometry.triangles import extrude_loops  # noqa: E402


def sphere_case(cells_per_radius: float, subdivisions: int = 5):
    R = 1.0
    h = R / cells_per_radius
    L = R + 6 * h
    grid = Grid(lower=(-L, -L, -L), upper=(L, L, L), spacing=h)
    m = trimesh.creation.icosphere(subdivisions=subdivisions, radius=R)
    import igl

    # Tags from the mesh itself (libigl winding number), so tags and surface agree.
    wn = igl.winding_number(m.vertices, m.faces.astype(np.int64), grid.centres().reshape(-1, 3))
    solid = (wn > 0.5).reshape(grid.shape)
    return grid, (m.vertices, m.faces), tags_from_solid(solid)


def wing_case(cells_per_chord: float, span_cells: int = 24, code_t: float = 0.15):
    """A NACA 00xx section extruded along z (a straight wing), on a 3-D grid around mid-span."""
    x = 0.5 * (1 - np.cos(np.linspace(0, np.pi, 121)))
    yt = 5 * code_t * (0.2969 * np.sqrt(x) - 0.1260 * x - 0.3516 * x**2 + 0.2843 * x**3 - 0.1036 * x**4)
    loop = np.vstack([np.column_stack([x, yt])[::-1], np.column_stack([x, -yt])[1:-1]])
    h = 1.0 / cells_per_chord
    zc = span_cells * h / 2
    v, f = extrude_loops([loop], half_depth=zc + 8 * h)  # span beyond the grid: a straight wing
    ny = int(np.ceil(0.1 / h)) + 6
    grid = Grid(lower=(-6 * h, -ny * h, -zc), upper=(1 + 6 * h, ny * h, zc), spacing=h)
    import igl

    c = grid.centres().reshape(-1, 3)
    solid = (igl.winding_number(v, f, c) > 0.5).reshape(grid.shape)
    return grid, (v, f), tags_from_solid(solid)


def tags_from_solid(solid):
    tags = np.full(solid.shape, CellTag.FLUID, np.uint8)
    tags[solid] = CellTag.SOLID
    st = ndimage.generate_binary_structure(solid.ndim, 1)
    tags[~solid & ndimage.binary_dilation(solid, st)] = CellTag.INTERFACE
    return tags


def peer_stencils(tags, grid, surface, cells, radius_cells=2.5, batched_closest=True):
    """Per-stencil loop with general tools: cKDTree neighbours, trimesh closest point, lstsq.

    With ``batched_closest`` (the default, generous to the peer) the closest points
    come from one trimesh call before the loop; without it, from one call per
    stencil inside the loop, as the issue words the peer.
    """
    v, f = surface
    mesh = trimesh.Trimesh(v, f, process=False)
    h = grid.spacing
    centres = grid.centres().reshape(-1, 3)
    flat = tags.ravel()
    pool = np.flatnonzero(flat != CellTag.SOLID)
    tree = cKDTree(centres[pool])
    x0 = centres[cells]
    if batched_closest:
        bpt, _, _ = trimesh.proximity.closest_point(mesh, x0)
    out = []
    for i, c in enumerate(cells):
        nb = pool[tree.query_ball_point(x0[i], radius_cells * h)]
        nb = nb[nb != c]
        xi = (centres[nb] - x0[i]) / h
        b = bpt[i] if batched_closest else trimesh.proximity.closest_point(mesh, x0[i : i + 1])[0][0]
        xb = (b - x0[i]) / h
        pts = np.vstack([xi, xb])
        X, Y, Z = pts.T
        A = np.column_stack([np.ones_like(X), X, Y, Z, X * X, Y * Y, Z * Z, X * Y, Y * Z, Z * X])
        w = np.exp(-((2 * np.linalg.norm(pts, axis=1) / (radius_cells + 1)) ** 2))
        sw = np.sqrt(w)
        pinv = np.linalg.lstsq(sw[:, None] * A, np.diag(sw), rcond=None)[0]
        out.append(pinv[0])
    return out


def best_of(fn, repeat):
    """Best wall time and best CPU time (process_time) over ``repeat`` runs, and the result."""
    best = np.inf
    best_cpu = np.inf
    result = None
    for _ in range(repeat):
        t = time.perf_counter()
        c = time.process_time()
        result = fn()
        best_cpu = min(best_cpu, time.process_time() - c)
        best = min(best, time.perf_counter() - t)
    return (best, best_cpu), result


def speed(quick: bool, as_worded: bool = False) -> str:
    rows = []
    worded = []
    cases = [("sphere R = 20 h", lambda: sphere_case(20, 4))]
    if not quick:
        cases = [("sphere R = 48 h", lambda: sphere_case(48, 5)), ("NACA 0015 wing, c = 64 h", lambda: wing_case(64))]
    for name, make in cases:
        grid, surf, tags = make()
        (t_ib, c_ib), st = best_of(lambda: build_stencils(tags, grid, surf), 2)
        n = len(st)
        # All the cells: a subset would load the peer's fixed costs (its tree is built over
        # every non-solid cell of the grid, about 0.4 s on the large sphere) onto fewer stencils.
        (t_peer, c_peer), _ = best_of(lambda: peer_stencils(tags, grid, surf, st.cells), 2)
        r_ib, r_peer = n / t_ib, n / t_peer
        q_ib, q_peer = n / c_ib, n / c_peer
        rows.append(
            f"| {name} | {n} | {r_ib:,.0f} | {r_peer:,.0f} | {r_ib / r_peer:.1f} | "
            f"{q_ib:,.0f} | {q_peer:,.0f} | {q_ib / q_peer:.1f} |"
        )
        if as_worded:
            # One run (about 3 ms per stencil): fixed costs are a small part of it.
            (_, c_w), _ = best_of(lambda: peer_stencils(tags, grid, surf, st.cells, batched_closest=False), 1)
            worded.append(f"| {name} | {n} | {q_ib:,.0f} | {n / c_w:,.0f} | {q_ib / (n / c_w):.1f} |")
    head = (
        "| case | interface cells | ibprep stencils/s (wall) | peer stencils/s (wall, same cells) | ratio "
        "| ibprep stencils/s (CPU) | peer stencils/s (CPU) | ratio (CPU) |\n"
        "|---|---|---|---|---|---|---|---|"
    )
    out = head + "\n" + "\n".join(rows)
    if worded:
        out += (
            "\n\nThe peer as the issue words it (trimesh's closest point called per stencil, in the loop):\n\n"
            "| case | interface cells | ibprep stencils/s (CPU) | peer stencils/s (CPU) | ratio (CPU) |\n"
            "|---|---|---|---|---|\n" + "\n".join(worded)
        )
    return out


def limits_experiment() -> str:
    """Distributions of the figures on resolved bodies versus degenerate ones."""
    lines = ["| case | method | n | cond p50 / p99 / max | weight bound p50 / p99 / max | min weight min | n_visible min |",
             "|---|---|---|---|---|---|---|"]

    def row(name, st):
        c = st.condition
        wb = st.weight_bound
        lines.append(
            f"| {name} | {st.bc} {st.interface} {st.method} | {len(st)} | "
            f"{np.median(c):.3g} / {np.percentile(c, 99):.3g} / {c.max():.3g} | "
            f"{np.median(wb):.3g} / {np.percentile(wb, 99):.3g} / {wb.max():.3g} | {st.min_weight.min():.3g} | {st.n_visible.min()} |"
        )

    for name, make in (
        ("sphere R = 10 h", lambda: sphere_case(10, 4)),
        ("sphere R = 20 h", lambda: sphere_case(20, 4)),
        ("NACA 0015 wing c = 32 h (sharp TE)", lambda: wing_case(32, 8)),
        ("sphere R = 3 h (under-resolved)", lambda: sphere_case(3, 3)),
        ("NACA 0015 wing c = 8 h (under-resolved)", lambda: wing_case(8, 6)),
    ):
        grid, surf, tags = make()
        for kw in (
            dict(bc="dirichlet"),
            dict(bc="neumann"),
        ):
            row(name, build_stencils(tags, grid, surf, **kw))
        if "sphere R = 10" in name or "wing c = 32" in name:
            solid = tags == CellTag.SOLID
            tags_s = np.full(solid.shape, CellTag.FLUID, np.uint8)
            tags_s[solid] = CellTag.SOLID
            tags_s[solid & ndimage.binary_dilation(~solid, ndimage.generate_binary_structure(3, 1))] = CellTag.INTERFACE
            for kw in (
                dict(bc="dirichlet", interface="solid-side"),
                dict(bc="neumann", interface="solid-side"),
                dict(bc="dirichlet", interface="solid-side", method="image-point"),
                dict(bc="neumann", interface="solid-side", method="image-point"),
            ):
                row(name, build_stencils(tags_s, grid, surf, **kw))
    # Degenerate: only a 2x2x2 block visible (REFERENCES §3.3).
    from ibprep import StencilLimits

    grid = Grid(lower=(0, 0, 0), upper=(8, 8, 8), spacing=1.0)
    tags = np.full(grid.shape, CellTag.SOLID, np.uint8)
    tags[3:5, 3:5, 3:5] = CellTag.FLUID
    tags[2, 3, 3] = CellTag.INTERFACE
    box = trimesh.creation.box(bounds=[(-10, -10, -10), (1.0, 20, 20)])
    row("2x2x2 block only", build_stencils(tags, grid, (box.vertices, box.faces), limits=StencilLimits(min_visible=0)))
    tags[3:5, 3:5, 3:6] = CellTag.FLUID
    row("2x2x3 block only", build_stencils(tags, grid, (box.vertices, box.faces), limits=StencilLimits(min_visible=0)))
    return "\n".join(lines)


def accuracy() -> str:
    """RMS reconstruction error of a smooth field over the interface cells of a sphere."""

    def field(x):
        X, Y, Z = x[..., 0], x[..., 1], x[..., 2]
        val = np.sin(2 * X) * np.cos(3 * Y) + np.exp(0.5 * Z)
        grad = np.stack(
            [2 * np.cos(2 * X) * np.cos(3 * Y), -3 * np.sin(2 * X) * np.sin(3 * Y), 0.5 * np.exp(0.5 * Z)], -1
        )
        return val, grad

    lines = ["| R/h | " + " | ".join(k for k in ("dirichlet", "neumann", "image-point dirichlet", "image-point neumann")) + " |",
             "|---|---|---|---|---|"]
    errs = {}
    for n in (8, 16, 32):
        grid, surf, tags = sphere_case(n, 4)
        solid = tags == CellTag.SOLID
        ghost = np.full(solid.shape, CellTag.FLUID, np.uint8)
        ghost[solid] = CellTag.SOLID
        ghost[solid & ndimage.binary_dilation(~solid, ndimage.generate_binary_structure(3, 1))] = CellTag.INTERFACE
        phi, _ = field(grid.centres().reshape(-1, 3))
        row = []
        for key, t, kw in (
            ("dirichlet", tags, dict(bc="dirichlet")),
            ("neumann", tags, dict(bc="neumann")),
            ("image-point dirichlet", ghost, dict(bc="dirichlet", interface="solid-side", method="image-point")),
            ("image-point neumann", ghost, dict(bc="neumann", interface="solid-side", method="image-point")),
        ):
            st = build_stencils(t, grid, surf, **kw)
            val, grad = field(st.boundary_point)
            g = val if st.bc == "dirichlet" else np.einsum("ij,ij->i", grad, st.boundary_normal)
            e = float(np.sqrt(np.mean((st.reconstruct(phi, g) - phi[st.cells]) ** 2)))
            errs.setdefault(key, []).append(e)
            row.append(f"{e:.3g}")
        lines.append(f"| {n} | " + " | ".join(row) + " |")
    orders = [np.log2(np.asarray(v[:-1]) / np.asarray(v[1:])) for v in errs.values()]
    lines.append("| observed order | " + " | ".join(" / ".join(f"{o:.2f}" for o in od) for od in orders) + " |")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small case, for a smoke run")
    ap.add_argument("--limits", action="store_true", help="run the limits experiment instead")
    ap.add_argument("--accuracy", action="store_true", help="convergence of the reconstruction on spheres instead")
    ap.add_argument("--as-worded", action="store_true",
                    help="also time the peer with trimesh's closest point called per stencil (slow: minutes)")
    args = ap.parse_args(argv)
    if args.limits:
        print(limits_experiment())
    elif args.accuracy:
        print(accuracy())
    else:
        print(speed(args.quick, args.as_worded))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
