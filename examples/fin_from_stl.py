"""A body from a surface file: an invented swept fin saved as STL, loaded back and checked.

Our own scenario with invented numbers: a caudal-fin-like plate with a NACA 0010 section, 40 mm root chord,
tapered to 0.5, swept back 30°, 60 mm span, pitching ±25° and heaving 15 mm at 2 Hz in water at 0.2 m/s.
The script stands in for a user with a CAD export: it generates the fin, writes it as ``fin.stl``, points a
case at the file (``[body] surface = "fin.stl"``), and runs the pre-flight, which loads and checks the STL
like any user file (closed, oriented, thin regions) before the motion checks.

Run:  python examples/fin_from_stl.py [--small] [--out DIR]
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import ibprep

CASE = """\
# Invented scenario: a swept fin from a surface file (numbers are ours).
[case]
title = "swept fin from an STL file (invented example)"

[body]
surface = "fin.stl"       # relative to this case file
chord = 0.04              # reference chord for the non-dimensional numbers and resolution rules

[motion]
frequency = 2.0
plunge_amplitude = 0.015
pitch_amplitude_deg = 25
phase_deg = 90
pivot = [0.01, 0.0, 0.0]

[flow]
speed = 0.2
viscosity = 1e-6

[grid]
lower = [-0.08, -0.08, -0.04]
upper = [0.24, 0.08, 0.12]
spacing = {spacing}
[[grid.refine]]
lower = [-0.02, -0.04, -0.01]
upper = [0.16, 0.04, 0.08]

[time]
step = {step}
cycles = 4
{checks}"""

SMALL_CHECKS = """
[checks]
phases = 4
cells_per_chord_warn = 5
cells_per_chord_min = 2
bl_cells_warn = 0.2
bl_cells_min = 0.1
stokes_cells_warn = 0.1
stokes_cells_min = 0.05
thin_fraction_max = 1.0
"""


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small", action="store_true", help="coarse, relaxed configuration that runs in seconds")
    ap.add_argument("--out", default="example-fin-from-stl", help="folder for the STL, case file and report")
    a = ap.parse_args(argv)
    out = Path(a.out)
    out.mkdir(parents=True, exist_ok=True)

    # The "user's" surface file: an invented swept, tapered fin.
    fin = ibprep.make_wing(ibprep.naca4("0010"), 0.04, 0.06, taper=0.5, sweep=math.radians(30), tips="round",
                           faces=2000 if a.small else 20000)
    stl = ibprep.save_surface(fin, out / "fin.stl")
    print(f"wrote {stl} ({len(fin.faces)} triangles, volume {fin.volume * 1e6:.2f} cm^3)")

    text = CASE.format(spacing=0.008 if a.small else 0.004, step=0.002 if a.small else 0.0005,
                       checks=SMALL_CHECKS if a.small else "")
    path = out / "case.toml"
    path.write_text(text)
    case = ibprep.load_case(path)
    report = ibprep.preflight(case)
    (out / "report.json").write_text(report.to_json())
    for chk in report.checks:
        if chk.id.startswith("surface.") or chk.status != "pass":
            print(f"{chk.status.upper():4}  {chk.id}: {chk.message}")
    print(f"verdict: {report.verdict}")
    return 1 if report.verdict == "fail" else 0


if __name__ == "__main__":
    sys.exit(main())
