"""Files a person or a solver reads: JSON report, PNG plots, body STL, cell tags for ParaView, stencil tables, markers.

Every file is written to a temporary name in the target folder and renamed into
place, so a failed run never half-writes a file or destroys an existing one.
matplotlib and meshio are imported inside the functions that need them.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from ..tagging.classify import CellTag
from ..errors import InputError
from ..files import atomic_write

__all__ = [
    "write_json_report",
    "plot_motion",
    "plot_steps",
    "plot_tags_slice",
    "write_tags_vtu",
    "write_time_series",
    "write_markers_csv",
    "write_instants_csv",
]


def write_json_report(report, path) -> Path:
    """Write a :class:`~ibprep.Report` as JSON (DESIGN §5 object), atomically."""
    text = report.to_json()

    def _w(tmp):
        Path(tmp).write_text(text + "\n", encoding="utf-8")

    return atomic_write(path, _w)


def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=True)
    # Titles come from the case file: '$' is a dollar sign there, never mathtext.
    matplotlib.rcParams["text.parse_math"] = False
    import matplotlib.pyplot as plt

    return plt


def _save_figure(fig, path) -> Path:
    plt = _pyplot()
    try:
        return atomic_write(path, lambda tmp: fig.savefig(tmp, dpi=110, format="png"))
    finally:
        plt.close(fig)


def plot_motion(motion, chord: float, speed: float, path, *, title: str = "") -> Path:
    """PNG of one cycle against t/T: plunge h/c; pitch θ, effective angle of attack α_eff and, with a
    roll stroke, the roll angle φ (degrees)."""
    plt = _pyplot()
    T = motion.period
    t = np.linspace(0.0, T, 721)
    h = np.asarray(motion.plunge(t)) / chord
    th = np.degrees(np.asarray(motion.pitch(t)))
    al = np.degrees(np.asarray(motion.effective_angle(t, speed)))
    fig, ax = plt.subplots(2, 1, figsize=(7.5, 5.2), sharex=True)
    ax[0].plot(t / T, h, color="tab:blue", label="plunge h/c")
    ax[0].set_ylabel("h / c")
    ax[0].grid(alpha=0.3)
    ax[0].legend(loc="upper right", fontsize=8)
    ax[1].plot(t / T, th, color="tab:orange", label="pitch θ (nose-up +)")
    ax[1].plot(t / T, al, color="tab:green", linestyle="--", label="α_eff = θ − atan((dh/dt)/U)")
    if getattr(motion, "roll_amplitude", 0.0):
        ax[1].plot(t / T, np.degrees(np.asarray(motion.roll(t))), color="tab:purple", label="roll φ")
    ax[1].set_ylabel("degrees")
    ax[1].set_xlabel("t / T")
    ax[1].grid(alpha=0.3)
    ax[1].legend(loc="upper right", fontsize=8)
    fig.suptitle(title or "prescribed motion over one cycle", fontsize=10)
    fig.tight_layout()
    return _save_figure(fig, path)


def plot_steps(steps, period: float, path, *, condition_limit: float | None = None) -> Path:
    """PNG of per-step figures against phase: interface and fresh cell counts, worst condition number."""
    plt = _pyplot()
    if not steps:
        raise InputError("no checked steps to plot")
    ph = np.array([(s.time % period) / period for s in steps])
    order = np.argsort(ph)
    ph = ph[order]
    n_int = np.array([s.n_interface for s in steps])[order]
    n_fr = np.array([s.n_fresh for s in steps])[order]
    cond = np.array([s.worst_condition for s in steps])[order]
    bad = np.array([s.n_bad for s in steps])[order]
    fig, ax = plt.subplots(3, 1, figsize=(7.5, 6.4), sharex=True)
    ax[0].plot(ph, n_int, "o-", ms=3, label="interface cells")
    ax[0].set_ylabel("cells")
    ax[0].legend(fontsize=8)
    ax[1].plot(ph, n_fr, "o-", ms=3, color="tab:purple", label="fresh cells (solid → fluid)")
    ax[1].set_ylabel("cells")
    ax[1].legend(fontsize=8)
    ax[2].semilogy(ph, cond, "o-", ms=3, color="tab:red", label="worst stencil condition number")
    if condition_limit:
        ax[2].axhline(condition_limit, color="k", ls="--", lw=0.8, label="limit")
    if bad.any():
        ax[2].plot(ph[bad > 0], cond[bad > 0], "kx", ms=7, label="steps with failed stencils")
    ax[2].set_xlabel("phase t / T of the checked step")
    ax[2].legend(fontsize=8)
    for a in ax:
        a.grid(alpha=0.3)
    fig.suptitle("per-step figures over the checked cycle", fontsize=10)
    fig.tight_layout()
    return _save_figure(fig, path)


def plot_tags_slice(tags, grid, z: float, path, *, nested=None, envelope=None, bad_points=(), title: str = "",
                    zoom=None, slice_note: str = "") -> Path:
    """PNG of the domain and its boxes (x–y, and x–z for 3-D) and a z-slice of the tags near the body.

    Parameters
    ----------
    tags : grid.shape uint8 — CellTag codes of ``grid``; None draws the boxes only.
    grid : Grid — the level the tags belong to (3-D or 2-D).
    z : float — metres; the slice plane (ignored for 2-D).
    nested : NestedGrid, optional — its levels are drawn, the domain (level 0) included.
    envelope : (lower, upper) pair, optional — swept envelope, drawn dashed.
    bad_points : (k, 3) float — metres; cells whose stencil failed (marked ×).
    zoom : (lower, upper) of (2,) float, optional — the x–y window of the tags panel.
    slice_note : str — why the slice is where it is (e.g. "through the worst stencil").
    """
    plt = _pyplot()
    from matplotlib.colors import ListedColormap
    from matplotlib.patches import Rectangle

    three_d = grid.ndim == 3
    views = [(0, 1)] + ([(0, 2)] if three_d and nested is not None else [])
    ncols = len(views) + (tags is not None)
    fig, axes = plt.subplots(1, ncols, figsize=(5.5 * ncols, 4.8), squeeze=False)
    axes = list(axes[0])
    for ax, (a, b_) in zip(axes, views):
        if nested is not None:
            for lvl, g in enumerate(nested.levels):
                what = "domain" if lvl == 0 else "box"
                ax.add_patch(Rectangle((g.lower[a], g.lower[b_]), g.extent[a], g.extent[b_], fill=False,
                                       lw=1.2 if lvl == 0 else 1.0,
                                       color="k" if lvl == 0 else plt.cm.viridis(lvl / max(1, len(nested.levels))),
                                       label=f"level {lvl} ({what}), h = {g.spacing:.3g} m"))
            base = nested.base
            ax.set_xlim(base.lower[a], base.upper[a])
            ax.set_ylim(base.lower[b_], base.upper[b_])
        if envelope is not None:
            lo, hi = envelope
            ax.add_patch(Rectangle((lo[a], lo[b_]), hi[a] - lo[a], hi[b_] - lo[b_], fill=False, ls="--",
                                   color="tab:red", label="swept envelope"))
        ax.set_aspect("equal")
        ax.set_xlabel(f"{'xyz'[a]} (m)")
        ax.set_ylabel(f"{'xyz'[b_]} (m)")
        ax.set_title(f"domain and refinement boxes, {'xyz'[a]}–{'xyz'[b_]} view", fontsize=9)
        ax.legend(fontsize=7, loc="upper right")
    if tags is not None:
        tags = np.asarray(tags)
        if three_d:
            k = int(np.clip(np.floor((z - grid.lower[2]) / grid.spacing), 0, grid.shape[2] - 1))
            sl = tags[:, :, k]
        else:
            sl = tags
        ax = axes[-1]
        cmap = ListedColormap(["#dbe9f6", "#555555", "#f0a030"])
        extent = (grid.lower[0], grid.upper[0], grid.lower[1], grid.upper[1])
        ax.imshow(sl.T, origin="lower", extent=extent, cmap=cmap, vmin=0, vmax=2, interpolation="nearest")
        bp = np.asarray(bad_points, dtype=float).reshape(-1, grid.ndim if grid.ndim == 2 else 3)
        if bp.size:
            near = np.abs(bp[:, 2] - z) <= grid.spacing if bp.shape[1] == 3 else np.ones(len(bp), bool)
            ax.plot(bp[near, 0], bp[near, 1], "x", color="red", ms=6, label="failed stencil")
            ax.legend(fontsize=7, loc="upper right")
        if zoom is not None:
            ax.set_xlim(zoom[0][0], zoom[1][0])
            ax.set_ylim(zoom[0][1], zoom[1][1])
        ax.set_aspect("equal")
        ax.set_xlabel("x (m)")
        ax.set_ylabel("y (m)")
        where = f"slice z = {z:.4g} m" if three_d else "the x–y plane"
        note = f" ({slice_note})" if slice_note else ""
        ax.set_title(f"tags, {where}{note}:\nfluid (light), solid (grey), interface (orange)", fontsize=9)
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    return _save_figure(fig, path)


def write_tags_vtu(tags, grid, path, *, region=None, cell_data=None) -> Path:
    """Write the non-fluid cells of a region (solid and interface) as hexahedra in a VTU file (ParaView).

    Parameters
    ----------
    tags : grid.shape uint8 — CellTag codes.
    grid : Grid — 3-D (a 2-D grid is written as one layer of unit thickness h).
    path : str or Path — ``.vtu``.
    region : tuple of slices, optional — index box to export (default: the whole grid);
        only its solid and interface cells are written, so a file is proportional
        to the body's cells, not to the grid.
    cell_data : dict of name -> grid.shape array, optional — per-cell figures to add.

    Returns
    -------
    Path
    """
    import meshio

    tags = np.asarray(tags)
    if tags.shape != grid.shape:
        raise InputError(f"tags must have the grid's shape {grid.shape}, got {tags.shape}")
    shape3 = grid.shape if grid.ndim == 3 else (*grid.shape, 1)
    t3 = tags.reshape(shape3)
    region = tuple(region) if region is not None else tuple(slice(0, n) for n in shape3)
    if len(region) == 2:
        region = (*region, slice(0, 1))
    sub = t3[region]
    keep = np.argwhere(sub != CellTag.FLUID)
    offset = np.array([r.start or 0 for r in region])
    idx = keep + offset
    h = grid.spacing
    lower = np.array([*grid.lower, *(() if grid.ndim == 3 else (-0.5 * h,))], dtype=float)
    corners = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0], [0, 0, 1], [1, 0, 1], [1, 1, 1], [0, 1, 1]])
    # Corners are shared between neighbouring cells: number each lattice node once.
    node = (idx[:, None, :] + corners[None]).reshape(-1, 3)
    dims = np.asarray(shape3, dtype=np.int64) + 1
    key = (node[:, 0] * dims[1] + node[:, 1]) * dims[2] + node[:, 2]
    uniq, inverse = np.unique(key, return_inverse=True)
    ijk = np.stack(np.unravel_index(uniq, tuple(dims)), axis=-1)
    pts = lower + ijk * h
    cells = inverse.reshape(-1, 8)
    data = {"tag": [t3[tuple(idx.T)].astype(np.int32)]}
    for name, arr in (cell_data or {}).items():
        a = np.asarray(arr).reshape(shape3)
        data[name] = [a[tuple(idx.T)].astype(np.float64)]
    mesh = meshio.Mesh(points=pts, cells=[("hexahedron", cells)], cell_data=data)
    return atomic_write(path, lambda tmp: meshio.write(tmp, mesh, file_format="vtu", binary=True))


def write_time_series(entries, path) -> Path:
    """Write a ParaView collection (``.pvd``) listing (time, file) pairs, atomically."""
    lines = ['<?xml version="1.0"?>', '<VTKFile type="Collection" version="0.1">', "  <Collection>"]
    for t, f in entries:
        lines.append(f'    <DataSet timestep="{float(t):.9g}" part="0" file="{Path(f).name}"/>')
    lines += ["  </Collection>", "</VTKFile>", ""]
    text = "\n".join(lines)
    return atomic_write(path, lambda tmp: Path(tmp).write_text(text, encoding="utf-8"))


def write_instants_csv(times, step, path) -> Path:
    """Write which instant each exported file stem stands for, atomically.

    Columns: stem (``step0000``, ... in the order of the instants), time_s, and
    solver_step, the nearest multiple of the time step ``step`` (s; an instant
    half-way between two goes to the later), with solver_step_offset_s, how far
    the instant lies from it.
    """
    lines = ["stem,time_s,solver_step,solver_step_offset_s"]
    for i, t in enumerate(np.asarray(times, float)):
        n = math.floor(t / step + 0.5)
        lines.append(f"step{i:04d},{t:.12g},{n},{t - n * step:.3g}")
    text = "\n".join(lines) + "\n"
    return atomic_write(path, lambda tmp: Path(tmp).write_text(text, encoding="utf-8"))


def write_markers_csv(points, normals, areas, path) -> Path:
    """Write surface markers as CSV: x, y, z (m), nx, ny, nz (unit, outward), area (m²)."""
    p = np.asarray(points, float)
    n = np.asarray(normals, float)
    a = np.asarray(areas, float).reshape(-1, 1)
    if p.shape != n.shape or p.shape[0] != a.shape[0]:
        raise InputError(f"markers need matching shapes, got points {p.shape}, normals {n.shape}, areas {a.shape}")
    table = np.hstack([p, n, a])

    def _w(tmp):
        np.savetxt(tmp, table, delimiter=",", header="x_m,y_m,z_m,nx,ny,nz,area_m2", comments="", fmt="%.9g")

    return atomic_write(path, _w)

