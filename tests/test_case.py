"""The case file: keys, types, ranges, files and defaults."""

import math

import numpy as np
import pytest

from ibprep import InputError
from ibprep.io.case import KEYS, load_case, parse_case

GOOD = """
[body]
section = "0015"
chord = 0.06
span = 0.18
tips = "round"

[motion]
frequency = 0.25
plunge_amplitude = 0.06
pitch_amplitude_deg = 70
phase_deg = 90
pivot = [0.02, 0.0, 0.0]

[flow]
speed = 0.1
viscosity = 6e-6

[grid]
lower = [-0.12, -0.15, -0.03]
upper = [0.42, 0.15, 0.21]
spacing = 0.004
[[grid.refine]]
lower = [-0.05, -0.11, -0.01]
upper = [0.20, 0.11, 0.19]

[time]
step = 0.002
cycles = 1
"""


def test_good_case_reads_with_units_converted():
    case = parse_case(GOOD)
    assert case.chord == 0.06
    assert case.motion.pitch_amplitude == pytest.approx(math.radians(70))
    assert case.motion.phase == pytest.approx(math.pi / 2)
    assert case.motion.period == pytest.approx(4.0)
    assert case.grid.base.shape == (135, 75, 60)
    assert len(case.grid.levels) == 2 and case.grid.finest_spacing == pytest.approx(0.002)
    assert case.steps_per_cycle == 2000
    assert case.checks.phases == 32  # documented default


def _with(old, new):
    assert old in GOOD
    return GOOD.replace(old, new)


@pytest.mark.parametrize(
    "text, pattern",
    [
        (_with("frequency = 0.25", "frequncy = 0.25"), r"\[motion\] unknown key 'frequncy'; did you mean 'frequency'"),
        (_with("spacing = 0.004", "spacing = -0.004"), r"\[grid\] spacing must be > 0 m, got -0.004"),
        (_with("span = 0.18", "span = 0"), r"\[body\] span must be > 0 m, got 0.0; leave span out for a 2-D"),
        (_with("speed = 0.1", "speed = nan"), r"\[flow\] speed must be finite"),
        (_with("speed = 0.1", 'speed = "fast"'), r"\[flow\] speed must be a number in m/s"),
        (_with("cycles = 1", "cycles = 1.5"), r"\[time\] cycles must be a whole number"),
        (_with('tips = "round"', 'tips = "square"'), r"\[body\] tips must be one of 'flat', 'round'"),
        (_with("pitch_amplitude_deg = 70", "pitch_amplitude_deg = 95"), r"pitch_amplitude_deg must be <= 90"),
        (_with("pitch_amplitude_deg = 70", "pitch_amplitude_deg = 90"), r"pitch_amplitude_deg must be below 90"),
        (_with('section = "0015"', 'section = "0015"\nsurface = "x.stl"'), r"exactly one of section"),
        (_with('section = "0015"', 'surface = "missing.stl"'), r"surface: file .*missing.stl.* not found"),
        (_with("[time]", "[tme]"), r"unknown table \[tme\]; did you mean 'time'"),
        (_with("pivot = [0.02, 0.0, 0.0]", "pivot = [0.02, 0.0]\npivot2 = 1"), r"unknown key 'pivot2'"),
        (_with("pivot = [0.02, 0.0, 0.0]", 'pivot = ["a", 0, 0]'), r"\[motion\] pivot must be \[x, y, z\]"),
        (GOOD.replace("viscosity = 6e-6", ""), r"\[flow\] viscosity is missing"),
        (_with("upper = [0.42, 0.15, 0.21]", "upper = [0.421, 0.15, 0.21]"), r"\[grid\] .*not a whole number"),
        (_with("upper = [0.20, 0.11, 0.19]", "upper = [0.50, 0.11, 0.19]"), r"\[grid\] refinement box 0 reaches outside"),
        (GOOD + "\n[[bodies]]\nchord = 1\n", r"either one \[body\] with its \[motion\], or \[\[bodies\]\]"),
        ("this is = = not toml", r"not valid TOML"),
        (_with('section = "0015"', 'section = "00"'), r"NACA|section"),
    ],
)
def test_bad_input_names_the_key(text, pattern):
    with pytest.raises(InputError, match=pattern):
        parse_case(text)


def test_missing_case_file(tmp_path):
    with pytest.raises(InputError, match=r"case file .*nope.toml.* not found"):
        load_case(tmp_path / "nope.toml")


def test_relative_surface_path_is_relative_to_the_case_file(tmp_path):
    (tmp_path / "sub").mkdir()
    text = _with('section = "0015"', 'surface = "body.stl"')
    (tmp_path / "sub" / "case.toml").write_text(text)
    with pytest.raises(InputError, match=r"case.toml: \[body\] surface: file .*sub/body.stl"):
        load_case(tmp_path / "sub" / "case.toml")


def test_warn_limit_must_come_before_fail_limit():
    with pytest.raises(InputError, match=r"\[checks\] cfl_warn \(2\) must not be above cfl_max"):
        parse_case(GOOD + "\n[checks]\ncfl_warn = 2.0\n")


def test_every_key_is_documented():
    for table, keys in KEYS.items():
        for name, spec in keys.items():
            assert spec.doc, f"[{table}] {name} needs a line of documentation"


@pytest.mark.parametrize(
    "extra, mid_span",
    [
        ("", True),
        ("taper = 0.6", True),
        ("taper = 0.5\nsweep_deg = 20\ntwist_deg = -8", True),
        ('taper = 0.5\ntwist_deg = -8\ntips = "round"', True),
        ('taper = 0.7\ntips = "round"\ncentred = true', True),
        # Spans shorter than the rounded ends' bulge: mid-span lies on an end cap.
        ('taper = 3\ntips = "round"\nspan = 0.02', False),
        ('taper = 0.2\nsweep_deg = 30\ntips = "round"\ncentred = true\nspan = 0.006', False),
    ],
)
def test_te_point_lies_on_the_trailing_edge(extra, mid_span):
    # Reference: libigl's point_mesh_squared_distance (an independent closest-point code):
    # the point must lie on the generated surface, within the facets' departure from the
    # smooth twisted shape between spanwise stations (~1e-8 m here). It must also be the
    # furthest-aft point (largest x) of the surface's cut by the plane z = te_z.
    import igl

    text = GOOD.replace('tips = "round"\n', "")
    if "span = " in extra:
        text = text.replace("span = 0.18\n", "")
    if "tips" not in extra:
        extra += '\ntips = "flat"'
    text = text.replace("[body]\n", "[body]\n" + extra + "\n", 1)
    case = parse_case(text)
    body = case.bodies[0]
    te = np.array(body.te_point)
    v = np.asarray(body.surface.vertices)
    f = np.asarray(body.surface.faces, dtype=np.int64)
    d2, _, _ = igl.point_mesh_squared_distance(te[None], v, f)
    assert math.sqrt(d2[0]) < 2e-6 * case.chord
    if mid_span:
        assert te[2] == pytest.approx(0.0 if "centred" in extra else 0.09, abs=1e-15)
    # The section cut at te_z: intersect the surface's edges with that plane.
    z0 = te[2]
    e = np.asarray(body.surface.edges_unique)
    za, zb = v[e[:, 0], 2], v[e[:, 1], 2]
    cut = (za - z0) * (zb - z0) < 0
    s = (z0 - za[cut]) / (zb[cut] - za[cut])
    pts = v[e[cut, 0]] + s[:, None] * (v[e[cut, 1]] - v[e[cut, 0]])
    pts = np.vstack([pts, v[np.abs(v[:, 2] - z0) <= 1e-15]])  # a station may lie in the plane
    assert te[0] >= pts[:, 0].max() - 2e-6 * case.chord
    if not extra.startswith("taper"):
        assert np.allclose(te, (0.06, 0.0, 0.09), atol=1e-15)
