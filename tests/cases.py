"""Small cases that run the whole pre-flight in seconds (imported by the pre-flight and CLI tests)."""

#: A small wing case on a coarse grid, with resolution limits relaxed so that it passes;
#: variants of it must fail in the right check family. Invented numbers.
SMALL_CASE = """
[case]
title = "small test wing (invented)"

[body]
section = "0012"
chord = 0.06
span = 0.12
tips = "flat"
faces = 2000

[motion]
frequency = 0.25
plunge_amplitude = 0.03
pitch_amplitude_deg = 30
phase_deg = 90
pivot = [0.02, 0.0, 0.0]

[flow]
speed = 0.1
viscosity = 6e-6

[grid]
lower = [-0.12, -0.12, -0.06]
upper = [0.36, 0.12, 0.18]
spacing = 0.006
[[grid.refine]]
lower = [-0.03, -0.06, -0.015]
upper = [0.15, 0.06, 0.135]

[time]
step = 0.002
cycles = 1

[checks]
phases = 4
cells_per_chord_warn = 15
cells_per_chord_min = 10
le_radius_cells_warn = 0.1
le_radius_cells_min = 0.05
bl_cells_warn = 2
bl_cells_min = 1
stokes_cells_warn = 0.5
stokes_cells_min = 0.2
upstream_chords = 1
downstream_chords = 1
lateral_chords = 0.5
spanwise_chords = 0.5
thin_fraction_max = 0.95
"""


#: A 2-D section case: a NACA 0012 section plunging and pitching in a 2-D grid. Invented numbers.
SMALL_CASE_2D = """
[case]
title = "small 2-D section (invented)"

[body]
section = "0012"
chord = 0.06

[motion]
frequency = 0.25
plunge_amplitude = 0.03
pitch_amplitude_deg = 30
phase_deg = 90
pivot = [0.02, 0.0, 0.0]

[flow]
speed = 0.1
viscosity = 6e-6

[grid]
lower = [-0.12, -0.12]
upper = [0.36, 0.12]
spacing = 0.004
[[grid.refine]]
lower = [-0.03, -0.06]
upper = [0.15, 0.06]
[[grid.refine]]
lower = [-0.02, -0.05]
upper = [0.14, 0.05]

[time]
step = 0.002
cycles = 1

[checks]
phases = 8
le_radius_cells_warn = 0.8
le_radius_cells_min = 0.5
stokes_cells_warn = 2
stokes_cells_min = 1
upstream_chords = 1
downstream_chords = 1
lateral_chords = 0.5
# 60 cells per chord: the sharp trailing edge's last 12 % of the perimeter is under two cells.
thin_fraction_max = 0.2
"""


#: Two plunging foils in tandem, the aft one a chord and a half behind and half a period later. Invented numbers.
TANDEM_CASE = """
[case]
title = "tandem pair of plunging wings (invented)"

[[bodies]]
name = "fore"
section = "0012"
chord = 0.06
span = 0.12
tips = "flat"
faces = 2000
[bodies.motion]
frequency = 0.25
plunge_amplitude = 0.02
pitch_amplitude_deg = 10
phase_deg = 90
pivot = [0.02, 0.0, 0.0]

[[bodies]]
name = "aft"
section = "0012"
chord = 0.06
span = 0.12
tips = "flat"
faces = 2000
offset = [0.09, 0.0, 0.0]
[bodies.motion]
frequency = 0.25
plunge_amplitude = 0.02
pitch_amplitude_deg = 10
phase_deg = 270
pivot = [0.02, 0.0, 0.0]

[flow]
speed = 0.1
viscosity = 6e-6

[grid]
lower = [-0.12, -0.12, -0.06]
upper = [0.48, 0.12, 0.18]
spacing = 0.006
[[grid.refine]]
lower = [-0.03, -0.06, -0.015]
upper = [0.24, 0.06, 0.135]

[time]
step = 0.002
cycles = 1

[checks]
phases = 4
cells_per_chord_warn = 15
cells_per_chord_min = 10
le_radius_cells_warn = 0.1
le_radius_cells_min = 0.05
bl_cells_warn = 2
bl_cells_min = 1
stokes_cells_warn = 0.5
stokes_cells_min = 0.2
upstream_chords = 1
downstream_chords = 1
lateral_chords = 0.5
spanwise_chords = 0.5
thin_fraction_max = 0.95
"""


def with_surface(text: str, path: str) -> str:
    """A case text whose body is the surface file ``path`` instead of a NACA wing (wing-only keys removed)."""
    import re

    text = re.sub(r'^section = "[^"]*"$', f'surface = "{path}"', text, count=1, flags=re.M)
    return re.sub(r"^(span|tips|faces|taper|sweep_deg|twist_deg|closed_te|centred) = .*\n", "", text, flags=re.M)
