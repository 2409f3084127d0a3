"""Side-by-side timing of ibprep.tagging.classify against general-purpose inside/outside queries.

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
from ibprep.tagging.classify import CellTag, classify, step_tags  # noqa: E402

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
            # Incremental steps in a time loop: pitch 20° + 0.5° n, plunge + 0.25 h n
            # (the body moves less than one cell per step).
            pose = lambda n, base=base, h=grid.spacing: pitched(base, 20.0 + 0.5 * n, 0.05 + 0.25 * h * n)  # noqa: E731
            steps.append(step_row(gname, grid, f"wing pitched, {len(base[1]):,}", pose, 3 * repeats))
            print(steps[-1], flush=True)
    # A body whose index box fills much of the grid: a full tagging is then bound
    # by the cells of the box, a step by the surface.
    for gname in grid_names:
        grid = grid_of_class(GRID_CLASSES[gname])
        centre = np.array([0.5, 0.0, 1.5])
        sph0 = sphere_mesh(0.6, subdivisions=5, centre=centre)
        pose = lambda n, sph0=sph0, h=grid.spacing: (sph0[0] + [0.25 * h * n, 0.1 * h * n, 0.0], sph0[1])  # noqa: E731
        steps.append(step_row(gname, grid, f"sphere R 0.6, {len(sph0[1]):,}", pose, 3 * repeats))
        print(steps[-1], flush=True)
    # The demo case's finest level and wing, two poses one solver time step apart
    # (the pair the sweep steps between).
    steps.append(demo_step_row(3 * repeats))
    print(steps[-1], flush=True)
    say("")
    say("Incremental step against a full tagging (`classify` on the same grid and pose), timed side by side "
        "in one time loop: at every instant a full tagging, a step from the previous Transition (new tag array) "
        "and a step with `overwrite_previous=True` (one array updated in place) are timed in turn; medians over "
        f"{3 * repeats} instants, wall and CPU (process) time. Wings: pitch 20° + 0.5° per step, plunge +0.25 h "
        "per step; sphere: moved by (0.25, 0.1, 0) h per step; demo: one solver time step per step. Every step "
        "result is checked equal to the full tagging:")
    say("")
    say("| grid | cells | body, triangles | full [ms] wall / CPU | step [ms] wall / CPU | step / full | "
        "step, overwrite [ms] wall / CPU | overwrite / full | full / step Gcells/s | fresh / covered |")
    say("|---|---|---|---|---|---|---|---|---|---|")
    lines.extend(steps)
    return lines


def time_step(grid, pose, steps: int):
    """Median wall and CPU seconds per instant of a full tagging, a step, and an overwriting step.

    A time loop over the poses ``pose(0)``, ``pose(1)``, … ``pose(steps + 1)``: at
    every instant n >= 2, ``classify(pose(n))`` (full), ``step_tags`` from the
    chain's previous Transition (step, a new tag array each time) and the same on
    a second chain with ``overwrite_previous=True`` (one tag array updated in
    place, as a solver's time loop keeps only the latest step) are timed in turn,
    so machine load affects all alike. Every step is checked equal to the full
    tagging. Returns ``({name: (wall, cpu)}, last Transition)`` with medians over the
    instants.
    """
    m0, m1 = pose(0), pose(1)
    tags0 = classify(m0, grid)
    chain = {"step": step_tags(tags0, m1, grid, previous_surface=m0),
             "overwrite": step_tags(tags0.copy(), m1, grid, previous_surface=m0)}
    times = {name: [] for name in ("full", "step", "overwrite")}
    for n in range(2, steps + 2):
        m = pose(n)
        out = {}
        for name, fn in (
            ("full", lambda: classify(m, grid)),
            ("step", lambda: step_tags(chain["step"], m, grid)),
            ("overwrite", lambda: step_tags(chain["overwrite"], m, grid, overwrite_previous=True)),
        ):
            w, c = time.perf_counter(), time.process_time()
            out[name] = fn()
            times[name].append((time.perf_counter() - w, time.process_time() - c))
        for name in ("step", "overwrite"):
            assert np.array_equal(out[name].tags, out["full"]), "stepping must equal a full tagging"
            chain[name] = out[name]
    med = {name: tuple(np.median(np.array(v), axis=0)) for name, v in times.items()}
    return med, chain["step"]


def step_row(gname, grid, body, pose, steps):
    """One markdown row of the stepping table."""
    med, tr = time_step(grid, pose, steps)
    (fw, fc), (sw, sc), (ow, oc) = med["full"], med["step"], med["overwrite"]
    return (f"| {gname} | {grid.size:,} | {body} | {fw * 1e3:.2f} / {fc * 1e3:.2f} | {sw * 1e3:.2f} / {sc * 1e3:.2f} | "
            f"**{sw / fw:.2f}** | {ow * 1e3:.2f} / {oc * 1e3:.2f} | **{ow / fw:.2f}** | "
            f"{grid.size / fw / 1e9:.1f} / {grid.size / sw / 1e9:.1f} | {tr.fresh.size:,} / {tr.covered.size:,} |")


def demo_step_row(steps):
    """The stepping row of the demo case's finest level (21.8 M cells) and wing."""
    from ibprep.io.case import parse_case
    from ibprep.io.demo import DEMO_CASE

    case = parse_case(DEMO_CASE)
    grid = case.grid.finest
    dt = case.time.step
    t0 = 0.3 * case.motion.period
    pose = lambda n: case.world_surface(t0 + n * dt)  # noqa: E731
    return step_row("demo finest", grid, f"demo wing (from t = 0.3 T, dt), {len(pose(0)[1]):,}", pose, steps)


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
