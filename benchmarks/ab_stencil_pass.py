"""The compiled stencil pass of a git revision against the working tree's, alternately in one process.

Run from the repository root::

    python benchmarks/ab_stencil_pass.py                 # sphere R = 48 h, against HEAD
    python benchmarks/ab_stencil_pass.py --case wing --rev 98c3484

Absolute timings on a shared machine drift (by 1.5x within an hour here), so a
change to ``ibprep/stencils/kernels.py`` is judged by running the old and the new pass
alternately on the same inputs (those of one ``build_stencils`` call) and
comparing their best times. The outputs are compared too: a change meant to keep
results should show zero differences. Both versions are compiled without the
kernel cache (about a minute each).
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import time
import types
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

import ibprep.stencils.build as _stencils  # noqa: E402


def _inputs(case: str):
    """The positional and keyword arguments of the stencil pass for one build_stencils call."""
    if case == "sphere":
        from bench_stencils import sphere_case

        grid, surf, tags = sphere_case(48, 5)
    elif case == "straight-wing":  # bench_stencils' extruded NACA 0015, 3 024 cells
        from bench_stencils import wing_case

        grid, surf, tags = wing_case(64)
    else:  # bench_kernels' tapered wing, 41 699 cells
        from bench_kernels import wing_case

        grid, surf, tags = wing_case(0.000625)
    calls = []
    original = _stencils._stencil_fits

    def recording(*args, **kwargs):
        calls.append((args, kwargs))
        return original(*args, **kwargs)

    _stencils._stencil_fits = recording
    try:
        _stencils.build_stencils(tags, grid, surf)
    finally:
        _stencils._stencil_fits = original
    return calls[0]


def _module(source: str, name: str):
    """ibprep.stencils.kernels compiled from source, without the on-disk cache."""
    source = source.replace("cache=True", "cache=False").replace("from .", "from ibprep.stencils.")
    mod = types.ModuleType(name)
    exec(compile(source, name, "exec"), mod.__dict__)
    return mod


def _source_at(rev: str) -> str:
    """The kernels module's source at a revision (it lived at ibprep/kernels.py before the subpackages)."""
    for path in ("ibprep/stencils/kernels.py", "ibprep/kernels.py"):
        try:
            src = subprocess.check_output(["git", "-C", str(ROOT), "show", f"{rev}:{path}"], text=True,
                                          stderr=subprocess.DEVNULL)
        except subprocess.CalledProcessError:
            continue
        # Both layouts keep proximity beside the kernels, so their relative imports resolve alike.
        return src
    raise SystemExit(f"ab_stencil_pass: no kernels module at revision {rev}")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--case", choices=("sphere", "wing", "straight-wing"), default="sphere",
                    help="sphere R = 48 h (24 384 stencils), the tapered wing (41 699) or bench_stencils' straight wing (3 024)")
    ap.add_argument("--rev", default="HEAD", help="the git revision to compare with (default HEAD)")
    ap.add_argument("--repeat", type=int, default=7, help="alternating timed runs of each (default 7)")
    args = ap.parse_args(argv)
    old_src = _source_at(args.rev)
    new_src = (ROOT / "ibprep" / "stencils" / "kernels.py").read_text()
    a, kw = _inputs(args.case)
    old, new = _module(old_src, "kernels_old"), _module(new_src, "kernels_new")
    out_old, out_new = old.stencil_fits(*a, **kw), new.stencil_fits(*a, **kw)
    names = ("neighbours", "n_visible", "used_radius", "weights", "boundary_weight", "condition", "by_set",
             "boundary_point", "boundary_normal", "distance", "origin")
    for name, x, y in zip(names, out_old, out_new):
        x, y = np.asarray(x), np.asarray(y)
        if x.dtype.kind == "f":
            both = np.isfinite(x) & np.isfinite(y)
            diff = float(np.abs(x[both] - y[both]).max(initial=0.0))
            same_inf = bool((np.isfinite(x) == np.isfinite(y)).all())
            print(f"{name:16s} largest difference {diff:.3g}" + ("" if same_inf else "  (finite where not before!)"))
        else:
            print(f"{name:16s} {'equal' if np.array_equal(x, y) else 'DIFFERENT'}")
    t_old, t_new = [], []
    for _ in range(args.repeat):
        for fn, times in ((old.stencil_fits, t_old), (new.stencil_fits, t_new)):
            t = time.process_time()
            fn(*a, **kw)
            times.append(time.process_time() - t)
    n = len(a[4])
    print(f"{n} stencils; CPU per stencil, best (median) of {args.repeat}: "
          f"{args.rev} {min(t_old) / n * 1e6:.2f} ({np.median(t_old) / n * 1e6:.2f}) us, "
          f"working tree {min(t_new) / n * 1e6:.2f} ({np.median(t_new) / n * 1e6:.2f}) us")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
