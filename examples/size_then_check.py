"""Case-setup script: size the refinement boxes of a plunging–pitching wing, then gate it with the pre-flight.

Our own scenario with invented numbers: a NACA 0012 wing of 40 mm chord and 120 mm span with flat ends,
pitching 20° and plunging half a chord at 1 Hz in water (U = 0.2 m/s, nu = 1e-6 m²/s, Re = 8000) — a
thrust-producing flapping foil in a small flume. The script

1. asks ibprep what finest spacing the body needs and which nested boxes hold its swept envelope,
2. writes a case file with those boxes,
3. runs the pre-flight and exits with its code (0 pass/warn, 1 fail), as a job-submission gate would.

Run:  python examples/size_then_check.py [--small] [--out DIR]
``--small`` relaxes the resolution limits and coarsens the grid so the whole script runs in seconds (CI).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import ibprep
from ibprep.checks.sizing import propose_boxes, required_spacing, resolution_lengths

CASE = """\
# Invented scenario: a flapping NACA 0012 wing in a small water flume (numbers are ours).
[case]
title = "flapping NACA 0012 wing in a flume (invented example)"

[body]
section = "0012"
chord = 0.04
span = 0.12
tips = "flat"
faces = {faces}

[motion]
frequency = 1.0
plunge_amplitude = 0.02
pitch_amplitude_deg = 20
phase_deg = 90
pivot = [0.01, 0.0, 0.0]

[flow]
speed = 0.2
viscosity = 1e-6

[grid]
lower = [-0.08, -0.08, -0.04]
upper = [0.32, 0.08, 0.16]
spacing = {spacing}
{boxes}
[time]
step = {step}
cycles = 5
{checks}"""

SMALL_CHECKS = """
[checks]
phases = 4
cells_per_chord_warn = 10
cells_per_chord_min = 5
le_radius_cells_warn = 0.05
le_radius_cells_min = 0.01
bl_cells_warn = 0.5
bl_cells_min = 0.1
stokes_cells_warn = 0.5
stokes_cells_min = 0.1
thin_fraction_max = 1.0
"""


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small", action="store_true", help="coarse, relaxed configuration that runs in seconds")
    ap.add_argument("--out", default="example-size-then-check", help="folder for the case file and report")
    a = ap.parse_args(argv)
    out = Path(a.out)
    out.mkdir(parents=True, exist_ok=True)

    spacing = 0.008 if a.small else 0.004
    checks = SMALL_CHECKS if a.small else ""
    faces = 2000 if a.small else 20000
    draft = ibprep.parse_case(CASE.format(spacing=spacing, boxes="", step=0.001, checks=checks, faces=faces))

    # 1. What the body needs, and boxes that hold everything it sweeps plus one chord of wake.
    c = draft.chord
    lengths = resolution_lengths(c, draft.flow.speed, draft.flow.viscosity, draft.motion.frequency,
                                 draft.section.le_radius * c)
    target, rule, _ = required_spacing(lengths, draft.checks)
    if a.small:
        target = spacing / 2
    env = ibprep.swept_envelope(draft.surface, draft.motion, target)
    sized = propose_boxes(draft.grid.base, env, c, target, rule=rule)
    print(f"finest spacing {sized.grid.finest_spacing:.4g} m (c/{c / sized.grid.finest_spacing:.0f}); "
          f"{sized.grid.total_cells:,} cells in {len(sized.grid.levels)} levels")

    # 2. A case file with those boxes and a time step for a Courant number of 0.4 with U + body speed.
    boxes = "".join(f"[[grid.refine]]\nlower = {list(lo)}\nupper = {list(hi)}\n" for lo, hi in sized.boxes)
    step = 0.4 * sized.grid.finest_spacing / (draft.flow.speed + env.max_speed)
    text = CASE.format(spacing=spacing, boxes=boxes, step=f"{step:.3g}", checks=checks, faces=faces)
    case_path = out / "case.toml"
    case_path.write_text(text)

    # 3. The gate.
    report = ibprep.preflight(ibprep.load_case(case_path))
    (out / "report.json").write_text(report.to_json())
    for chk in report.checks:
        if chk.status != "pass":
            print(f"{chk.status.upper():4}  {chk.id}: {chk.message}")
    print(f"verdict: {report.verdict}  (report: {out / 'report.json'})")
    return 1 if report.verdict == "fail" else 0


if __name__ == "__main__":
    sys.exit(main())
