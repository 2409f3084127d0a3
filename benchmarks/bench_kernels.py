"""Compiled kernels (ibprep.stencils.kernels) against the numpy paths they replace, side by side.

Run from the repository root::

    python benchmarks/bench_kernels.py           # demo-size wing: ~21k triangles, 0.625 mm grid
    python benchmarks/bench_kernels.py --quick   # a coarser wing (1.25 mm grid)

One process builds the stencils of a finite wing with the numpy path while
recording the arguments of its hot calls (TriangleIndex.segments_cross_fan,
TriangleIndex.closest, stencils._wls_value_weights), then times each call with
the numpy method and with the kernel on the same inputs (best of a few runs,
CPU time), checks that the results agree, and finally times the whole
build_stencils with the kernels patched in at the call sites. Rates are given as
interface stencils per second (stencils of the build / seconds of that call).
The compile cost of a fresh environment is measured in a subprocess with an
empty numba cache.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import igl  # noqa: E402
from scipy import ndimage  # noqa: E402

from ibprep import Grid, build_stencils  # noqa: E402
from ibprep.stencils import build as stencils, kernels  # noqa: E402
from ibprep.tagging.classify import CellTag  # noqa: E402
from ibprep.stencils.proximity import TriangleIndex  # noqa: E402


def wing_mesh(chord=0.08, span=0.12, n_section=240, n_span=44, code_t=0.15, pitch=0.17, taper=0.6):
    """Closed tapered NACA 00xx wing, z along the span, pitched by ``pitch`` radians about z."""
    beta = np.linspace(0, np.pi, n_section // 2 + 1)
    x = 0.5 * (1 - np.cos(beta))
    yt = 5 * code_t * (0.2969 * np.sqrt(x) - 0.1260 * x - 0.3516 * x**2 + 0.2843 * x**3 - 0.1036 * x**4)
    sec = np.vstack([np.column_stack([x, yt])[::-1], np.column_stack([x, -yt])[1:-1]])  # (m, 2), ccw
    m = sec.shape[0]
    z = np.linspace(-0.5 * span, 0.5 * span, n_span)
    c = chord * (1 - (1 - taper) * np.abs(z) / (0.5 * span))
    v = np.concatenate([np.column_stack([(sec[:, 0] - 0.25) * ci, sec[:, 1] * ci, np.full(m, zi)]) for zi, ci in zip(z, c)])
    i = np.arange(m)
    j = (i + 1) % m
    faces = []
    for s in range(n_span - 1):  # a few dozen stations, not a loop over triangles
        a, b = s * m + i, s * m + j
        faces += [np.column_stack([a, b + m, b]), np.column_stack([a, a + m, b + m])]
    # Tip caps: fans to a centre vertex per tip.
    c0 = v.shape[0]
    v = np.vstack([v, [[0.0, 0.0, z[0]], [0.0, 0.0, z[-1]]]])
    faces += [np.column_stack([np.full(m, c0), j, i]), np.column_stack([np.full(m, c0 + 1), (n_span - 1) * m + i, (n_span - 1) * m + j])]
    f = np.vstack(faces).astype(np.int64)
    vol = np.einsum("ij,ij->", v[f[:, 0]], np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]]))
    if vol < 0:
        f = f[:, ::-1]
    cz, sz = np.cos(pitch), np.sin(pitch)
    rot = np.array([[cz, -sz, 0], [sz, cz, 0], [0, 0, 1.0]])
    return v @ rot.T, f


def wing_case(h):
    v, f = wing_mesh()
    n = 280 if h == 0.000625 else int(round(280 * 0.000625 / h))
    L = n * h / 2
    grid = Grid(lower=(-L, -L, -L), upper=(L, L, L), spacing=h)
    # Tags from the mesh (libigl fast winding number) inside the wing's box only.
    lo = np.floor((v.min(axis=0) - 2 * h + L) / h).astype(int)
    hi = np.ceil((v.max(axis=0) + 2 * h + L) / h).astype(int)
    sl = tuple(slice(a, b) for a, b in zip(lo, hi))
    ax = [(np.arange(a, b) + 0.5) * h - L for a, b in zip(lo, hi)]
    q = np.stack(np.meshgrid(*ax, indexing="ij"), -1).reshape(-1, 3)
    wn = igl.fast_winding_number(v, f, q)
    solid = np.zeros(grid.shape, bool)
    solid[sl] = (wn > 0.5).reshape(tuple(b - a for a, b in zip(lo, hi)))
    tags = np.full(grid.shape, CellTag.FLUID, np.uint8)
    tags[solid] = CellTag.SOLID
    sub = solid[sl]
    ring = ~sub & ndimage.binary_dilation(sub, ndimage.generate_binary_structure(3, 1))
    tags[sl][ring] = CellTag.INTERFACE
    return grid, (v, f), tags


def best_cpu(fn, repeat):
    best = np.inf
    out = None
    for _ in range(repeat):
        t = time.process_time()
        out = fn()
        best = min(best, time.process_time() - t)
    return best, out


_FAN0, _CLO0, _WLS0 = TriangleIndex.segments_cross_fan, TriangleIndex.closest, stencils._wls_value_weights


def _route(fan, clo, wls):
    """Point every call site build_stencils may use (before or after the wiring) at these functions."""
    TriangleIndex.segments_cross_fan = lambda self, *a: fan(self, *a)
    TriangleIndex.closest = lambda self, p, **kw: clo(self, p, **kw)
    stencils._wls_value_weights = wls
    for name, fn in (("_segments_cross_fan", fan), ("_closest", clo), ("_wls_kernel", wls)):
        if hasattr(stencils, name):
            setattr(stencils, name, fn)


def _numpy_fan(index, *a):
    return _FAN0(index, *a)


def _numpy_closest(index, p, **kw):
    return _CLO0(index, p, **kw)


def _restore():
    _route(_numpy_fan, _numpy_closest, _WLS0)
    TriangleIndex.segments_cross_fan, TriangleIndex.closest = _FAN0, _CLO0


def record_calls(tags, grid, surf):
    """The numpy build, recording the arguments of its hot calls."""
    calls = {"fan": [], "closest": [], "wls": []}

    def fan(index, *a):
        calls["fan"].append((index, a))
        return _FAN0(index, *a)

    def clo(index, p, **kw):
        calls["closest"].append((index, p, kw))
        return _CLO0(index, p, **kw)

    def wls(A, sw):
        calls["wls"].append((A, sw))
        return _WLS0(A, sw)

    _route(fan, clo, wls)
    try:
        t = time.process_time()
        st = build_stencils(tags, grid, surf)
        t_build = time.process_time() - t
    finally:
        _restore()
    return st, t_build, calls


def numpy_build(tags, grid, surf):
    _route(_numpy_fan, _numpy_closest, _WLS0)
    try:
        return build_stencils(tags, grid, surf)
    finally:
        _restore()


def patched_build(tags, grid, surf, with_wls):
    """build_stencils with the kernels at the call sites (what kernels-wiring.diff does)."""
    _route(kernels.segments_cross_fan, kernels.closest, kernels.wls_value_weights if with_wls else _WLS0)
    try:
        return build_stencils(tags, grid, surf)
    finally:
        _restore()


def compile_cost():
    """Seconds for the first calls in a fresh process: empty numba cache, then warm cache."""
    code = (
        "import time,sys; sys.path.insert(0, %r); import numpy as np, trimesh;"
        "from ibprep.stencils import kernels; from ibprep.stencils.proximity import TriangleIndex;"
        "m = trimesh.creation.icosphere(1); idx = TriangleIndex(m.vertices, m.faces, bucket_size=0.5);"
        "t = time.perf_counter(); kernels.segments_cross_fan(idx, np.zeros((1,3)), np.ones((1,1,3)), np.ones((1,1),bool), 2.0);"
        "a = time.perf_counter(); kernels.closest(idx, np.zeros((1,3))); b = time.perf_counter();"
        "kernels.wls_value_weights(np.random.default_rng(0).normal(size=(2,12,10)), np.ones((2,12))); c = time.perf_counter();"
        "print(a - t, b - a, c - b)"
    ) % str(ROOT)
    out = []
    with tempfile.TemporaryDirectory() as d:
        env = dict(os.environ, NUMBA_CACHE_DIR=d)
        for _ in range(2):  # cold, then warm (cache filled by the first run)
            r = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True)
            out.append([float(x) for x in r.stdout.split()])
    return out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    h = 0.00125 if args.quick else 0.000625
    grid, surf, tags = wing_case(h)
    ntri = surf[1].shape[0]
    ncell = int(np.prod(grid.shape))
    print(f"wing: {ntri} triangles, grid {grid.shape} = {ncell / 1e6:.1f}M cells, h = {h * 1e3:.3f} mm", flush=True)
    # Warm the kernels (compiled or loaded from cache) before timing.
    warm = TriangleIndex(surf[0], surf[1], bucket_size=0.01)
    kernels.segments_cross_fan(warm, np.zeros((1, 3)), np.ones((1, 1, 3)), np.ones((1, 1), bool), 2.0)
    kernels.closest(warm, np.zeros((1, 3)))
    kernels.wls_value_weights(np.random.default_rng(0).normal(size=(2, 12, 10)), np.ones((2, 12)))
    st, t_build, calls = record_calls(tags, grid, surf)
    n = len(st)
    print(f"{n} interface stencils; numpy build {t_build:.2f} s CPU ({n / t_build:,.0f} stencils/s)", flush=True)

    rows = []
    totals = {"numpy": 0.0, "kernel": 0.0}

    def compare(name, ref_fn, ker_fn, check):
        t_ref, r_ref = best_cpu(ref_fn, args.repeat)
        t_ker, r_ker = best_cpu(ker_fn, args.repeat)
        agree = check(r_ref, r_ker)
        totals["numpy"] += t_ref
        totals["kernel"] += t_ker
        rows.append(f"| {name} | {t_ref:.3f} | {t_ker:.3f} | {t_ref / t_ker:.1f} | {n / t_ker:,.0f} | {agree} |")
        print(rows[-1], flush=True)

    for idx, a in calls["fan"]:
        compare(
            f"segments_cross_fan {a[1].shape[0]}x{a[1].shape[1]}",
            lambda: _FAN0(idx, *a),
            lambda: kernels.segments_cross_fan(idx, *a),
            lambda x, y: "equal" if np.array_equal(x, y) else f"DIFFER in {(x != y).sum()}",
        )
    for idx, p, kw in calls["closest"]:
        compare(
            f"closest {p.shape[0]} points",
            lambda: _CLO0(idx, p, **kw),
            lambda: kernels.closest(idx, p, **kw),
            lambda x, y: "equal" if all(np.array_equal(getattr(x, k), getattr(y, k)) for k in ("point", "distance", "normal", "face", "exact")) else "DIFFER",
        )
    if hasattr(kernels, "wls_value_weights"):
        for A, sw in calls["wls"]:

            def chk(x, y):
                a0, c0 = x
                a1, c1 = y
                fin = np.isfinite(c0)
                ea = np.abs(a1 - a0).max() / np.abs(a0).max()
                ec = np.max(np.abs(c1[fin] - c0[fin]) / c0[fin]) if fin.any() else 0.0
                same_inf = np.array_equal(np.isfinite(c0), np.isfinite(c1))
                return f"weights rel {ea:.1e}, cond rel {ec:.1e}, deficient {'same' if same_inf else 'DIFFER'}"

            compare(
                f"_wls_value_weights {A.shape}",
                lambda: _WLS0(A, sw),
                lambda: kernels.wls_value_weights(A, sw),
                chk,
            )
    t_ref, st_ref = best_cpu(lambda: numpy_build(tags, grid, surf), 1)
    t_ker, st_ker = best_cpu(lambda: patched_build(tags, grid, surf, True), args.repeat)
    same = all(
        np.array_equal(getattr(st_ref, k), getattr(st_ker, k)) for k in ("cells", "neighbours", "n_visible", "ok", "boundary_point", "boundary_normal")
    )
    werr = np.abs(st_ker.weights - st_ref.weights).max()
    cold, warm = compile_cost()
    print(f"end-to-end numpy {t_ref:.2f} s, with kernels {t_ker:.2f} s", flush=True)

    out = [
        "# Compiled kernels against the numpy paths (benchmarks/bench_kernels.py)",
        "",
        f"Case: closed tapered NACA 0015 wing, {ntri} triangles; grid {grid.shape} = {ncell / 1e6:.1f}M cells, "
        f"h = {h * 1e3:.3f} mm; {n} interface cells (fluid-side, Dirichlet, defaults). 2-core machine shared with "
        f"other jobs: CPU times (process_time), best of {args.repeat}, both paths in one process on the same inputs.",
        "",
        "Rates: interface stencils of the whole build divided by the seconds of that call (stencils/s equivalents).",
        "",
        "| call (as made by build_stencils) | numpy s | kernel s | ratio | kernel stencils/s | results |",
        "|---|---|---|---|---|---|",
        *rows,
        f"| all hot calls | {totals['numpy']:.3f} | {totals['kernel']:.3f} | {totals['numpy'] / totals['kernel']:.1f} | "
        f"{n / totals['kernel']:,.0f} | |",
        "",
        f"End-to-end build_stencils: numpy {t_ref:.2f} s ({n / t_ref:,.0f} stencils/s); with the kernels at the call "
        f"sites {t_ker:.2f} s ({n / t_ker:,.0f} stencils/s), ratio {t_ref / t_ker:.1f}. Same cells, neighbours, "
        f"n_visible, ok, boundary points/normals: {same}; largest weight difference {werr:.1e}.",
        "",
        f"First call in a fresh environment (empty numba cache): fan {cold[0]:.1f} s, closest {cold[1]:.1f} s, "
        f"WLS {cold[2]:.1f} s to compile; with the on-disk cache: {warm[0]:.2f} s, {warm[1]:.2f} s, {warm[2]:.2f} s.",
    ]
    text = "\n".join(out) + "\n"
    (ROOT / "benchmarks" / ("RESULTS-kernels-quick.md" if args.quick else "RESULTS-kernels.md")).write_text(text)
    print(text)


if __name__ == "__main__":
    main()
