"""How the cost of a checked step grows with the work, and what parallel sweeps buy.

Run:  python benchmarks/bench_sweep.py [--quick] [--skip-demo]

1. Per-step cost against cell count (64³ → 256³-class grids around one wing) and
   against triangle count (2k → 200k) at a fixed grid: full tagging, incremental
   step, stencil build; fitted power-law exponents (least squares on log-log).
2. Peak transient memory of a step (tracemalloc, numpy allocations) per grid cell.
3. The demo case's pre-flight: serial against 2 local processes (wall time, speed-up),
   and the same with a local Dask cluster of 2 workers.
Results print as Markdown tables, ready for benchmarks/RESULTS.md.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import ibprep  # noqa: E402
from ibprep.geometry.triangles import transform_points  # noqa: E402


def best_of(fn, repeat=3):
    best = math.inf
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def wing(faces):
    return ibprep.make_wing(ibprep.naca4("0015"), 1.0, 3.0, tips="round", faces=faces)


def grid_around(n):
    """A cubic-cell grid of about n³ cells holding the wing (1 x 0.15 x 3) pitched by 20°."""
    lo = np.array([-0.2, -0.5, -0.1])
    hi = np.array([1.2, 0.5, 3.1])
    vol = np.prod(hi - lo)
    h = (vol / n**3) ** (1 / 3)
    shape = np.ceil((hi - lo) / h).astype(int)
    return ibprep.Grid(lower=tuple(lo), upper=tuple(lo + shape * h), spacing=h)


def step_costs(mesh, grid, repeat):
    m = ibprep.Motion(frequency=1.0, plunge_amplitude=0.2, pitch_amplitude=math.radians(20), phase=math.pi / 2,
                      pivot=(0.33, 0, 0))
    dt = 0.2 * grid.spacing / 1.5  # about a fifth of a cell of travel
    v0 = transform_points(m.pose(0.1), mesh.vertices)
    v1 = transform_points(m.pose(0.1 + dt), mesh.vertices)
    s0, s1 = (v0, mesh.faces), (v1, mesh.faces)
    t_full, tags0 = best_of(lambda: ibprep.classify(s0, grid), repeat)
    t_step, tr = best_of(lambda: ibprep.step_tags(tags0, s1, grid, previous_surface=s0), repeat)
    t_st, st = best_of(lambda: ibprep.build_stencils(tr.tags, grid, s1), 1)
    tracemalloc.start()
    ibprep.step_tags(tags0, s1, grid, previous_surface=s0)
    ibprep.build_stencils(tr.tags, grid, s1)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return dict(cells=grid.size, tris=len(mesh.faces), full=t_full, step=t_step, stencils=t_st,
                n_stencils=len(st.cells), peak=peak)


def fit(x, y):
    return float(np.polyfit(np.log(x), np.log(y), 1)[0])


def part_scaling(quick):
    sizes = [64, 128] if quick else [64, 128, 256]
    tris = [2000, 20000] if quick else [2000, 20000, 200000]
    print("## 1. Cost of one checked step against the work\n")
    print("Grid sweep (wing of ~20k triangles):\n")
    print("| cells | full tagging (s) | incremental step (s) | stencils | stencil build (s) | stencils/s | peak step memory (B/cell) |")
    print("|---|---|---|---|---|---|---|")
    mesh = wing(20000)
    rows = []
    for n in sizes:
        r = step_costs(mesh, grid_around(n), 1 if quick else 3)
        rows.append(r)
        print(f"| {r['cells']:,} | {r['full']:.4f} | {r['step']:.4f} | {r['n_stencils']:,} | {r['stencils']:.3f} | "
              f"{r['n_stencils'] / r['stencils']:,.0f} | {r['peak'] / r['cells']:.2f} |")
    c = [r["cells"] for r in rows]
    print(f"\nFitted exponents against cell count: full tagging {fit(c, [r['full'] for r in rows]):.2f}, "
          f"incremental step {fit(c, [r['step'] for r in rows]):.2f}, stencils {fit(c, [r['stencils'] for r in rows]):.2f}"
          " (interface cells grow like cells^(2/3)).\n")
    print("Triangle sweep (grid of 128³ class):\n")
    print("| triangles | full tagging (s) | incremental step (s) | stencil build (s) |")
    print("|---|---|---|---|")
    g = grid_around(128)
    rows = []
    for nt in tris:
        r = step_costs(wing(nt), g, 1 if quick else 3)
        rows.append(r)
        print(f"| {r['tris']:,} | {r['full']:.4f} | {r['step']:.4f} | {r['stencils']:.3f} |")
    t = [r["tris"] for r in rows]
    print(f"\nFitted exponents against triangle count: full tagging {fit(t, [r['full'] for r in rows]):.2f}, "
          f"incremental step {fit(t, [r['step'] for r in rows]):.2f}, stencils {fit(t, [r['stencils'] for r in rows]):.2f}.\n")


def part_demo(quick):
    from ibprep.io.demo import DEMO_CASE

    case = ibprep.parse_case(DEMO_CASE)
    if quick:
        case = ibprep.parse_case(DEMO_CASE.replace("[time]", "[checks]\nphases = 8\n\n[time]"))
    print("## 2. The demo case's pre-flight, serial and parallel\n")
    print("| engine | wall time (s) | speed-up | verdict |")
    print("|---|---|---|---|")
    _ = case.surface  # build the wing once, outside the timings
    t0 = time.perf_counter()
    r1 = ibprep.preflight(case)
    t_serial = time.perf_counter() - t0
    print(f"| serial | {t_serial:.1f} | 1.00 | {r1.verdict} |")
    t0 = time.perf_counter()
    r2 = ibprep.preflight(case, workers=2)
    t_proc = time.perf_counter() - t0
    print(f"| 2 local processes | {t_proc:.1f} | {t_serial / t_proc:.2f} | {r2.verdict} |")
    same = r1.to_json() == r2.to_json()
    try:
        t0 = time.perf_counter()
        r3 = ibprep.preflight(case, workers=2, scheduler="local")
        t_dask = time.perf_counter() - t0
        print(f"| local Dask cluster, 2 workers (start-up included) | {t_dask:.1f} | {t_serial / t_dask:.2f} | {r3.verdict} |")
        same = same and r1.to_json() == r3.to_json()
    except ibprep.InputError as exc:
        print(f"| local Dask cluster | skipped: {exc} | | |")
    print(f"\nReports identical across engines: {same}. Checked step pairs: {len(r1.steps)}; "
          f"stencils built: {r1.figures['stencils']['stencils_built']:,}.\n")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--skip-demo", action="store_true")
    ap.add_argument("--skip-scaling", action="store_true")
    a = ap.parse_args()
    if not a.skip_scaling:
        part_scaling(a.quick)
    if not a.skip_demo:
        part_demo(a.quick)


if __name__ == "__main__":
    main()
