"""A 2-D section study: how the pre-flight verdict changes as the plunge amplitude grows.

Our own scenario with invented numbers: a NACA 0015 section of 0.1 m chord in a 2-D grid, pitching 30°
about the third-chord point with pitch leading plunge by 90°, at 0.5 Hz at 0.25 m/s in a water–glycerol mix (Re = 2500),
with the plunge amplitude swept from 0.25 to 2 chords on a fixed grid and time step. Larger plunge means a
faster body: the Courant number and the surface travel per step grow, and at some amplitude the body
leaves the refinement box or the domain. The script prints one line per amplitude: the verdict, the
Courant number and the checks that did not pass.

Run:  python examples/plunge_amplitude_study_2d.py [--small] [--out DIR]
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import ibprep

CASE = """\
# Invented scenario: a 2-D foil plunge-amplitude study (numbers are ours).
[case]
title = "2-D NACA 0015 section, plunge {h:.2f} c (invented example)"

[body]
section = "0015"
chord = 0.1

[motion]
frequency = 0.5
plunge_amplitude = {h0}
pitch_amplitude_deg = 30
phase_deg = 90
pivot = [0.0333, 0.0, 0.0]

[flow]
speed = 0.25
viscosity = 1e-5

[grid]
lower = [-0.4, -0.4]
upper = [1.2, 0.4]
spacing = 0.02
[[grid.refine]]
lower = [-0.2, -0.3]
upper = [0.8, 0.3]
[[grid.refine]]
lower = [-0.1, -0.2]
upper = [0.5, 0.2]
{finest}
[time]
step = 0.004
cycles = 5
{checks}"""

FINEST = """[[grid.refine]]
lower = [-0.05, -0.16]
upper = [0.3, 0.16]
"""

CHECKS = """
[checks]
phases = {phases}
cells_per_chord_warn = 30
cells_per_chord_min = 15
thin_fraction_max = 0.5
le_radius_cells_warn = 0.5
le_radius_cells_min = 0.2
bl_cells_warn = 2
bl_cells_min = 1
stokes_cells_warn = 1
stokes_cells_min = 0.5
"""


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small", action="store_true", help="fewer amplitudes, coarser grid: runs in seconds")
    ap.add_argument("--out", default="example-plunge-study-2d", help="folder for the case files")
    a = ap.parse_args(argv)
    out = Path(a.out)
    out.mkdir(parents=True, exist_ok=True)
    ratios = [0.25, 1.0, 2.0] if a.small else [0.25, 0.5, 0.75, 1.0, 1.25, 1.5, 2.0]
    finest = "" if a.small else FINEST  # c/20 in the small configuration, c/40 otherwise
    checks = CHECKS.format(phases=8 if a.small else 32)
    print(f"{'h0/c':>6}  {'verdict':>7}  {'Courant':>7}  {'travel':>7}  checks not passed")
    verdicts = []
    for r in ratios:
        text = CASE.format(h=r, h0=round(r * 0.1, 6), finest=finest, checks=checks)
        path = out / f"case_h{r:.2f}.toml"
        path.write_text(text)
        rep = ibprep.preflight(ibprep.load_case(path))
        t = rep.figures["time"]
        bad = ", ".join(f"{c.id} ({c.status})" for c in rep.checks if c.status != "pass") or "-"
        print(f"{r:>6.2f}  {rep.verdict:>7}  {t['courant']:>7.3f}  {t['travel_cells_per_step']:>7.3f}  {bad}")
        verdicts.append(rep.verdict)
    # The study itself is the output; the script fails only if it could not run.
    return 0 if verdicts else 1


if __name__ == "__main__":
    sys.exit(main())
