"""Geometry timings as ratios against general-purpose peers measured side by side.

Run ``python benchmarks/bench_geometry.py`` from the repository root: each pair is
timed alternately in one process, best of several repeats, and the table gives
the ratio ours / peer (below 1 = faster). Absolute times on a shared machine are
noise; the ratios are the result.

The classes follow the ``setup()`` / ``time_*`` layout so an asv-style runner can
pick them up as well.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import trimesh  # noqa: E402
from trimesh.ray.ray_triangle import RayMeshIntersector  # noqa: E402

from ibprep.geometry import (  # noqa: E402
    check_surface,
    load_surface,
    local_thickness,
    make_wing,
    naca4,
    save_surface,
    surface_markers,
)

__all__ = ["WingBuild", "SurfaceCheck", "SurfaceLoad", "Thickness", "Markers", "main"]


class WingBuild:
    """make_wing (~200k faces) vs trimesh.creation.icosphere(7) (327,680 faces), per face."""

    def setup(self):
        self.section = naca4("0015")

    def time_make_wing(self):
        return make_wing(self.section, 0.06, 0.18, tips="round", faces=200_000)

    def time_peer_icosphere(self):
        return trimesh.creation.icosphere(subdivisions=7)


class SurfaceCheck:
    """check_surface vs trimesh's is_watertight + is_winding_consistent + volume on a fresh mesh."""

    def setup(self):
        self.wing = make_wing("0015", 0.06, 0.18, tips="round", faces=200_000)

    def time_check_surface(self):
        return check_surface(self.wing)

    def time_peer_trimesh_checks(self):
        m = trimesh.Trimesh(self.wing.vertices, self.wing.faces, process=False)
        return m.is_watertight, m.is_winding_consistent, m.volume


class SurfaceLoad:
    """load_surface (weld + checks) vs trimesh.load with its default processing, binary STL."""

    def setup(self):
        self.dir = tempfile.TemporaryDirectory()
        self.path = Path(self.dir.name) / "wing.stl"
        save_surface(make_wing("0015", 0.06, 0.18, tips="round", faces=200_000), self.path)

    def time_load_surface(self):
        return load_surface(self.path)

    def time_peer_trimesh_load(self):
        return trimesh.load(str(self.path), process=True)


class Thickness:
    """local_thickness vs trimesh.ray.ray_triangle.RayMeshIntersector (rtree), same rays."""

    def setup(self):
        self.wing = make_wing("0015", 0.06, 0.18, tips="round", faces=30_000)
        self.pts, self.nrm, _ = surface_markers(self.wing, 0.002)

    def time_local_thickness(self):
        return local_thickness(self.wing, self.pts, self.nrm)

    def time_peer_trimesh_rays(self):
        return RayMeshIntersector(self.wing).intersects_location(self.pts, -self.nrm, multiple_hits=True)


class Markers:
    """surface_markers vs trimesh.sample.sample_surface for the same number of points, per point."""

    def setup(self):
        self.wing = make_wing("0015", 0.06, 0.18, tips="round", faces=200_000)
        self.count = len(surface_markers(self.wing, 0.001)[0])

    def time_surface_markers(self):
        return surface_markers(self.wing, 0.001)

    def time_peer_sample_surface(self):
        return trimesh.sample.sample_surface(self.wing, self.count, seed=0)


def _best(fn, repeats):
    best = np.inf
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def main(repeats: int = 7) -> str:
    """Time every pair alternately and return a markdown table of ratios."""
    rows = []
    for cls in (WingBuild, SurfaceCheck, SurfaceLoad, Thickness, Markers):
        bench = cls()
        bench.setup()
        ours_name, peer_name = sorted(
            (n for n in dir(cls) if n.startswith("time_")), key=lambda n: n.startswith("time_peer")
        )
        ours, peer = getattr(bench, ours_name), getattr(bench, peer_name)
        ours(), peer()  # warm up (imports, caches)
        t_ours, t_peer = np.inf, np.inf
        for _ in range(repeats):  # alternate so both see the same machine load
            t_ours = min(t_ours, _best(ours, 1))
            t_peer = min(t_peer, _best(peer, 1))
        note = ""
        if cls is WingBuild:
            n_ours = len(ours().faces)
            n_peer = len(peer().faces)
            note = f"per face: {(t_ours / n_ours) / (t_peer / n_peer):.2f} ({n_ours} vs {n_peer} faces)"
        if cls is Markers:
            note = f"{bench.count} points each"
        if cls is Thickness:
            note = f"{len(bench.pts)} rays, {len(bench.wing.faces)} faces"
        rows.append(f"| {cls.__name__} | {ours_name[5:]} {t_ours * 1e3:.1f} ms | {peer_name[10:]} "
                    f"{t_peer * 1e3:.1f} ms | {t_ours / t_peer:.2f} | {note} |")
    head = "| benchmark | ours (best) | peer (best) | ratio ours/peer | note |\n|---|---|---|---|---|"
    return head + "\n" + "\n".join(rows)


if __name__ == "__main__":
    print(main())
