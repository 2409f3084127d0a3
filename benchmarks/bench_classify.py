"""Side-by-side timing of ibprep.classify against general-purpose inside/outside queries.

Run from the repository root::

    python benchmarks/bench_classify.py            # 64^3, 128^3, 256^3-class grids; 2k/20k/200k-triangle wings
    python benchmarks/bench_classify.py --quick    # small sizes only
    python benchmarks/bench_classify.py --steps-only   # the incremental-step table only (no peers)
    python benchmarks/bench_classify.py --out benchmarks/RESULTS-classify.md

Peers, all given only the cell centres inside the body's bounding box (ibprep
tags the whole grid, interface layer included):

* trimesh ``contains`` with its default ray backend (``trimesh.ray.ray_triangle``);
* trimesh ``contains`` with the Embree backend (``trimesh.ray.ray_pyembree``, needs
  ``pip install embreex``), skipped when not installed;
* libigl ``igl.fast_winding_number(V, F, Q)`` (solid where |w| > 1/2).

Each timing is the best of a few repeats, measured in one run on the same mesh and
grid, so machine load affects all alike; the ratios are the figures to read. A peer
predicted (linearly in points, from a measured smaller size) to take longer than
the time limit is skipped and its extrapolated time is labelled as such.
The wing is a straight extruded NACA-0012-like section with flat end caps (built in
``tests/conftest.py``), at rest and pitched by 20 degrees about the quarter chord.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import warnings

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)
sys.path.insert(0, os.path.join(ROOT, "tests"))

from conftest import sphere_mesh, wing_mesh  # noqa: E402

from ibprep import Grid  # noqa: E402
from ibprep.classify import CellTag, classify, step_tags  # noqa: E402

__all__ = ["grid_of_class", "wing_of_size", "main"]

# Peers predicted to run longer than this are skipped (seconds).
PEER_LIMIT_S = 60.0

WINGS = {"2k": (50, 10), "20k": (100, 50), "200k": (250, 200)}  # (n_section, n_span)
# Peers timed on a random subsample of SUBSAMPLE points only (tens of µs per point).
SUBSAMPLE = 1000
# Faster peers predicted past PEER_LIMIT_S are timed on this many points instead.
SUBSAMPLE_LARGE = 200_000
SUBSAMPLED = {"trimesh (rtree rays)"}
GRID_CLASSES = {"64^3": 64, "128^3": 128, "256^3": 256}


def grid_of_class(n: int) -> Grid:
    """A grid of about n^3 cells around a 3-chord-span wing: shape (n, 0.625 n, 1.6 n)."""
    h = 2.0 / n
    ny, nz = int(round(0.625 * n)), int(round(1.6015625 * n))
    return Grid(lower=(-0.5, -0.625, -0.1), upper=(-0.5 + n * h, -0.625 + ny * h, -0.1 + nz * h), spacing=h)


def wing_of_size(name: str):
    ns, nspan = WINGS[name]
    return wing_mesh(ns, nspan, chord=1.0, span=3.0, z0=0.0)


def pitched(mesh, deg: float, plunge: float = 0.0):
    v, f = mesh
    th = np.deg2rad(deg)
    R = np.array([[np.cos(th), np.sin(th), 0.0], [-np.sin(th), np.cos(th), 0.0], [0.0, 0.0, 1.0]])  # nose up
    pivot = np.array([0.25, 0.0, 0.0])
    return (v - pivot) @ R.T + pivot + [0.0, plunge, 0.0], f


def best_of(fn, repeats: int):
    best, out = np.inf, None
    for _ in range(repeats):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return best, out


def bbox_points(grid: Grid, mesh):
    v = mesh[0]
    sl = grid.index_box(v.min(axis=0), v.max(axis=0))
    axes = [a[s] for a, s in zip(grid.axes(), sl)]
    P = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    return sl, P


def peers():
    import trimesh

    out = {}

    def rt(mesh, P):
        m = trimesh.Trimesh(*mesh, process=False)
        return trimesh.ray.ray_triangle.RayMeshIntersector(m).contains_points(P)

    out["trimesh (rtree rays)"] = rt
    try:
        from trimesh.ray import ray_pyembree

        def emb(mesh, P):
            m = trimesh.Trimesh(*mesh, process=False)
            return ray_pyembree.RayMeshIntersector(m).contains_points(P)

        ray_pyembree.RayMeshIntersector  # noqa: B018
        import embreex  # noqa: F401

        out["trimesh (embree)"] = emb
    except Exception:  # embreex missing or broken: the peer is skipped
        pass
    try:
        import igl

        def fwn(mesh, P):
            return np.abs(igl.fast_winding_number(np.asarray(mesh[0], float), np.asarray(mesh[1], np.int64), P)) > 0.5

        out["libigl fast winding number"] = fwn
    except ImportError:
        pass
    return out


def distance_h(mesh, P, h):
    import igl

    d2, _, _ = igl.point_mesh_squared_distance(P, np.asarray(mesh[0], float), np.asarray(mesh[1], np.int64))
    return np.sqrt(d2) / h


def run(quick: bool, repeats: int, steps_only: bool = False):
    lines = []
    say = lines.append
    grid_names = ["64^3", "128^3"] if quick else list(GRID_CLASSES)
    wing_names = ["2k", "20k"] if quick else list(WINGS)
    peer_fns = peers()
    rate = {}  # peer -> seconds per point measured so far (for extrapolation)
    sampled = {}  # subsampled peer -> seconds per point, measured once per wing and pose
    say("| grid | cells | wing tris | pose | ibprep full [ms] | Mcells/s | bbox pts | peer | peer [s] | peer / ibprep | cells differing (max dist/h) |")
    say("|---|---|---|---|---|---|---|---|---|---|---|")
    steps = []
    for gname in grid_names:
        grid = grid_of_class(GRID_CLASSES[gname])
        for wname in wing_names:
            base = wing_of_size(wname)
            for pose, mesh in () if steps_only else (("rest", base), ("pitch 20°", pitched(base, 20.0, 0.05))):
                t_ib, tags = best_of(lambda: classify(mesh, grid), repeats)
                sl, P = bbox_points(grid, mesh)
                ours = (tags[sl] == CellTag.SOLID).reshape(-1)
                for pname, fn in peer_fns.items():
                    key = (pname, wname)
                    pred = rate.get(key, 0.0) * P.shape[0]
                    cells = f"| {gname} | {grid.size:,} | {len(mesh[1]):,} | {pose} | {t_ib * 1e3:.1f} | {grid.size / t_ib / 1e6:.0f} | {P.shape[0]:,} | {pname} "
                    if pname in SUBSAMPLED and (key, pose) in sampled:
                        # Rate measured on a smaller grid: extrapolate only.
                        t_all = sampled[(key, pose)] * P.shape[0]
                        say(cells + f"| ~{t_all:.0f} (extrapolated from the {grid_names[0]} sample) | ~{t_all / t_ib:,.0f} | — |")
                        print(lines[-1], flush=True)
                        continue
                    if pname in SUBSAMPLED or pred > PEER_LIMIT_S:
                        # Too slow to run on every point: time a seeded random subsample
                        # and extrapolate linearly in points (labelled as such).
                        rng = np.random.default_rng(0)
                        size = SUBSAMPLE if pname in SUBSAMPLED else SUBSAMPLE_LARGE  # amortise set-up costs
                        sub = np.sort(rng.choice(P.shape[0], size=min(size, P.shape[0]), replace=False))
                        t_p, solid = best_of(lambda: fn(mesh, P[sub]), 1)
                        t_all = t_p * P.shape[0] / sub.size
                        sampled[(key, pose)] = t_p / sub.size
                        differ = sub[np.flatnonzero(solid != ours[sub])]
                        dist = f"{differ.size} of {sub.size} sampled"
                        if differ.size:
                            dist += f" ({distance_h(mesh, P[differ], grid.spacing).max():.1e})"
                        say(cells + f"| ~{t_all:.1f} (extrapolated from {sub.size:,} points) | ~{t_all / t_ib:,.0f} | {dist} |")
                        print(lines[-1], flush=True)
                        continue
                    t_p, solid = best_of(lambda: fn(mesh, P), 1 if pred > 5 else repeats)
                    rate[key] = t_p / P.shape[0]
                    differ = np.flatnonzero(solid != ours)
                    dist = f"{differ.size}"
                    if differ.size:
                        dist += f" ({distance_h(mesh, P[differ[:2000]], grid.spacing).max():.1e})"
                    say(cells + f"| {t_p:.3f} | {t_p / t_ib:,.0f} | {dist} |")
                    print(lines[-1], flush=True)
        for wname in wing_names:
            base = wing_of_size(wname)
            # Incremental step in a time loop: pitch 20.0° -> 20.5° -> 21.0°, plunge
            # +0.25 h per step (the body moves less than one cell). The timed step
            # starts from the previous Transition (its crossings are reused).
            m0 = pitched(base, 20.0, 0.05)
            m1 = pitched(base, 20.5, 0.05 + 0.25 * grid.spacing)
            m2 = pitched(base, 21.0, 0.05 + 0.50 * grid.spacing)
            steps.append(step_row(gname, grid, f"wing pitched, {len(base[1]):,}", m0, m1, m2, 3 * repeats))
            print(steps[-1], flush=True)
    # A body whose index box fills much of the grid: a full tagging is then bound
    # by the cells of the box, a step by the surface.
    for gname in grid_names:
        grid = grid_of_class(GRID_CLASSES[gname])
        centre = np.array([0.5, 0.0, 1.5])
        sph0 = sphere_mesh(0.6, subdivisions=5, centre=centre)
        sph1 = (sph0[0] + [0.25 * grid.spacing, 0.1 * grid.spacing, 0.0], sph0[1])
        sph2 = (sph0[0] + [0.50 * grid.spacing, 0.2 * grid.spacing, 0.0], sph0[1])
        steps.append(step_row(gname, grid, f"sphere R 0.6, {len(sph0[1]):,}", sph0, sph1, sph2, 3 * repeats))
        print(steps[-1], flush=True)
    # The demo case's finest level and wing, two poses one solver time step apart
    # (the pair the sweep steps between).
    steps.append(demo_step_row(3 * repeats))
    print(steps[-1], flush=True)
    say("")
    say("Incremental step against a full tagging (`classify` on the same grid and pose), timed side by side "
        "in one loop (each repeat: full, step, step with `overwrite_previous=True`); best of the repeats, wall "
        "and CPU (process) time. Wings: pitch 20.5° → 21.0°, plunge +0.25 h, from the previous Transition; "
        "sphere: moved by (0.25, 0.1, 0) h. Every step result is checked equal to the full tagging:")
    say("")
    say("| grid | cells | body, triangles | full [ms] wall / CPU | step [ms] wall / CPU | step / full | "
        "step, overwrite [ms] wall / CPU | overwrite / full | full / step Gcells/s | fresh / covered |")
    say("|---|---|---|---|---|---|---|---|---|---|")
    lines.extend(steps)
    return lines


def time_step(grid, m0, m1, m2, repeats: int):
    """Best-of wall and CPU seconds of classify(m2), step_tags(previous, m2) and the same with overwrite_previous.

    ``previous`` is the Transition of the step m0 -> m1 (crossings cached), rebuilt
    untimed before each overwriting step, which spends it. The three are timed in
    turn inside each repeat, so machine load affects all alike.
    """
    tags0 = classify(m0, grid)
    tr1 = step_tags(tags0, m1, grid, previous_surface=m0)
    best = {name: [np.inf, np.inf] for name in ("full", "step", "overwrite")}
    out = {}
    for _ in range(repeats):
        spare = step_tags(tags0, m1, grid, previous_surface=m0)
        for name, fn in (
            ("full", lambda: classify(m2, grid)),
            ("step", lambda: step_tags(tr1, m2, grid)),
            ("overwrite", lambda: step_tags(spare, m2, grid, overwrite_previous=True)),
        ):
            w, c = time.perf_counter(), time.process_time()
            out[name] = fn()
            w, c = time.perf_counter() - w, time.process_time() - c
            best[name][0] = min(best[name][0], w)
            best[name][1] = min(best[name][1], c)
    full = out["full"]
    for name in ("step", "overwrite"):
        assert np.array_equal(out[name].tags, full), "stepping must equal a full tagging"
    return best, out["step"]


def step_row(gname, grid, body, m0, m1, m2, repeats):
    """One markdown row of the stepping table."""
    best, tr = time_step(grid, m0, m1, m2, repeats)
    (fw, fc), (sw, sc), (ow, oc) = best["full"], best["step"], best["overwrite"]
    return (f"| {gname} | {grid.size:,} | {body} | {fw * 1e3:.2f} / {fc * 1e3:.2f} | {sw * 1e3:.2f} / {sc * 1e3:.2f} | "
            f"**{sw / fw:.2f}** | {ow * 1e3:.2f} / {oc * 1e3:.2f} | **{ow / fw:.2f}** | "
            f"{grid.size / fw / 1e9:.1f} / {grid.size / sw / 1e9:.1f} | {tr.fresh.size:,} / {tr.covered.size:,} |")


def demo_step_row(repeats):
    """The stepping row of the demo case's finest level (21.8 M cells) and wing."""
    from ibprep.case import parse_case
    from ibprep.demo import DEMO_CASE

    case = parse_case(DEMO_CASE)
    grid = case.grid.finest
    dt = case.time.step
    t0 = 0.3 * case.motion.period
    m0, m1, m2 = (case.world_surface(t0 + n * dt) for n in range(3))
    return step_row("demo finest", grid, f"demo wing (t = 0.3 T, dt), {len(m0[1]):,}", m0, m1, m2, repeats)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes only")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--steps-only", action="store_true", help="only the incremental-step table (no peers)")
    ap.add_argument("--out", help="write the markdown table here")
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore")
    lines = run(args.quick, args.repeats, args.steps_only)
    text = "\n".join(lines)
    print(text)
    if args.out:
        with open(args.out, "w") as fh:
            fh.write(text + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
