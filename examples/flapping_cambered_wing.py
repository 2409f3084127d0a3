"""A cambered wing with a flapping (roll) stroke: sweep, time step and stencils for an insect-like motion.

Our own scenario with invented numbers: a NACA 4406 wing of 20 mm chord and 60 mm span, tapered to 0.6 at
the tip and rounded, flapping ±35° about its root chord line at 8 Hz while pitching ±40° about the quarter
chord, in air-like fluid at 1 m/s (a small flapping-wing vehicle). The script writes the case, runs
``ibprep size``-style sizing to report the boxes the stroke needs, runs the pre-flight and prints the peak
tip speed, the time-step figures and the verdict.

Run:  python examples/flapping_cambered_wing.py [--small] [--out DIR]
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import ibprep
from ibprep.checks.sizing import propose_boxes

CASE = """\
# Invented scenario: a flapping cambered wing of a small vehicle (numbers are ours).
[case]
title = "flapping cambered wing, NACA 4406 (invented example)"

[body]
section = "4406"
chord = 0.02
span = 0.06
taper = 0.6
tips = "round"
faces = {faces}

[motion]
frequency = 8.0
plunge_amplitude = 0.0
pitch_amplitude_deg = 40
phase_deg = 90
pivot = [0.005, 0.0, 0.0]
roll_amplitude_deg = 35       # flapping stroke about the body x axis through the root
roll_phase_deg = 0
roll_root = [0.0, 0.0, 0.0]

[flow]
speed = 1.0
viscosity = 1.5e-5

[grid]
lower = [-0.04, -0.08, -0.02]
upper = [0.12, 0.08, 0.1]
spacing = {spacing}
{boxes}
[time]
step = {step}
cycles = 3
{checks}"""

SMALL_CHECKS = """
[checks]
phases = 4
cells_per_chord_warn = 5
cells_per_chord_min = 2
le_radius_cells_warn = 0.01
le_radius_cells_min = 0.005
bl_cells_warn = 0.2
bl_cells_min = 0.1
stokes_cells_warn = 0.1
stokes_cells_min = 0.05
thin_fraction_max = 1.0
upstream_chords = 0.5
downstream_chords = 0.5
lateral_chords = 0.5
spanwise_chords = 0.5
"""


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small", action="store_true", help="coarse, relaxed configuration that runs in seconds")
    ap.add_argument("--out", default="example-flapping-wing", help="folder for the case file and report")
    a = ap.parse_args(argv)
    out = Path(a.out)
    out.mkdir(parents=True, exist_ok=True)
    spacing = 0.004 if a.small else 0.002
    fmt = dict(faces=2000 if a.small else 20000, spacing=spacing, checks=SMALL_CHECKS if a.small else "")
    draft = ibprep.parse_case(CASE.format(boxes="", step=1e-4, **fmt))

    # Boxes for the swept volume of the stroke: one level in the small configuration, two otherwise.
    target = spacing / (2 if a.small else 4)
    env = ibprep.swept_envelope(draft.surface, draft.motion, target)
    sized = propose_boxes(draft.grid.base, env, draft.chord, target, wake=0.5)
    boxes = "".join(f"[[grid.refine]]\nlower = {list(lo)}\nupper = {list(hi)}\n" for lo, hi in sized.boxes)
    step = 0.4 * sized.grid.finest_spacing / (draft.flow.speed + env.max_speed)
    path = out / "case.toml"
    path.write_text(CASE.format(boxes=boxes, step=f"{step:.3g}", **fmt))

    case = ibprep.load_case(path)
    report = ibprep.preflight(case)
    (out / "report.json").write_text(report.to_json())
    t = report.figures["time"]
    print(f"swept envelope {tuple(round(float(x), 4) for x in env.lower)} .. "
          f"{tuple(round(float(x), 4) for x in env.upper)} m")
    print(f"peak surface speed {t['max_body_speed_m_s']:.3g} m/s ({t['max_body_speed_m_s'] / case.flow.speed:.2f} U); "
          f"time step {t['step_s']:.3g} s, Courant {t['courant']:.2f}, {t['steps_per_cycle']} steps per cycle")
    for chk in report.checks:
        if chk.status != "pass":
            print(f"{chk.status.upper():4}  {chk.id}: {chk.message}")
    print(f"verdict: {report.verdict}")
    return 1 if report.verdict == "fail" else 0


if __name__ == "__main__":
    sys.exit(main())
