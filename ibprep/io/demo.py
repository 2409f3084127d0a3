"""The demo case: a laboratory oscillating-foil energy harvester in a tow tank (ours; the data are invented).

NACA 0015 wing, chord 60 mm, span 180 mm, rounded tips; tow speed 0.1 m/s in a
glycerol–water mix of kinematic viscosity 6e-6 m²/s (Re = 1000); plunge one
chord, pitch 70° about the one-third-chord point, pitch leading plunge by 90°,
0.25 Hz (f c / U = 0.15). The refinement boxes are those ``ibprep size``
proposes for this case.
"""

from __future__ import annotations

__all__ = ["DEMO_CASE"]

#: The demo case file's text (TOML).
DEMO_CASE = """\
# ibprep demo case -- an invented scenario, not measured data:
# a laboratory-scale oscillating-foil energy harvester towed through a glycerol-water tank.
# Edit any value and rerun:  ibprep check case.toml

[case]
title = "oscillating-foil harvester, NACA 0015 wing, Re 1000 (invented demo data)"

[body]
section = "0015"          # NACA 4-digit code
chord = 0.06              # m
span = 0.18               # m, tip to tip
tips = "round"

[motion]
frequency = 0.25          # Hz  (f c / U = 0.15)
plunge_amplitude = 0.06   # m, one chord, along y
pitch_amplitude_deg = 70  # nose-up positive, about the span axis through the pivot
phase_deg = 90            # pitch leads plunge by a quarter period
pivot = [0.02, 0.0, 0.0]  # m, body frame: one third of the chord

[flow]
speed = 0.1               # m/s, tow speed (free stream along +x)
viscosity = 6e-6          # m^2/s, glycerol-water mix (Re = U c / nu = 1000)

[grid]
lower = [-0.12, -0.15, -0.03]   # m
upper = [0.42, 0.15, 0.21]      # m
spacing = 0.005                 # m, base cells (c/12)
# Three nested boxes, each halving the spacing: finest 0.625 mm (c/96).
[[grid.refine]]
lower = [-0.05, -0.125, -0.03]
upper = [0.155, 0.125, 0.21]
[[grid.refine]]
lower = [-0.0275, -0.1025, -0.0275]
upper = [0.1325, 0.1025, 0.2075]
[[grid.refine]]
lower = [-0.01625, -0.09125, -0.01625]
upper = [0.12125, 0.09125, 0.19625]

[time]
step = 0.001              # s  (4000 steps per cycle)
cycles = 10
"""
