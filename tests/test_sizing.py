"""Swept envelope, resolution lengths and proposed refinement boxes."""

import math

import numpy as np
import pytest

from ibprep import Grid, Motion
from ibprep.io.case import CheckLimits
from ibprep.checks.sizing import propose_boxes, required_spacing, resolution_lengths, swept_envelope


def _box(lo, hi):
    """A closed, outward-oriented box as (vertices, faces)."""
    x0, y0, z0 = lo
    x1, y1, z1 = hi
    v = np.array([[x0, y0, z0], [x1, y0, z0], [x1, y1, z0], [x0, y1, z0],
                  [x0, y0, z1], [x1, y0, z1], [x1, y1, z1], [x0, y1, z1]], float)
    f = np.array([[0, 2, 1], [0, 3, 2], [4, 5, 6], [4, 6, 7], [0, 1, 5], [0, 5, 4],
                  [2, 3, 7], [2, 7, 6], [1, 2, 6], [1, 6, 5], [0, 4, 7], [0, 7, 3]])
    return v, f


def test_plunging_box_envelope_is_the_analytic_sweep():
    # A pure plunge h0 sin(2 pi f t) moves the box by +-h0 along y: the swept box is exact
    # up to the padding of at most one sample's travel (analytic, no outside source needed).
    body = _box((0, -0.01, 0), (0.1, 0.01, 0.3))
    m = Motion(frequency=0.5, plunge_amplitude=0.05)
    h = 0.002
    env = swept_envelope(body, m, h)
    pad_max = 1.1 * 2 * math.pi * 0.5 * 0.05 * m.period / len(env.times) * 1.0001
    assert env.lower[1] == pytest.approx(-0.06, abs=pad_max)
    assert env.upper[1] == pytest.approx(0.06, abs=pad_max)
    assert env.lower[1] <= -0.06 + 1e-12 and env.upper[1] >= 0.06 - 1e-12  # never smaller than the sweep
    assert env.lower[0] <= 0 and env.upper[2] >= 0.3
    # Samples close enough: at most half a cell of travel between two of them.
    assert env.max_speed * m.period / len(env.times) <= 0.5 * h * 1.0001
    assert env.max_speed == pytest.approx(2 * math.pi * 0.5 * 0.05, rel=1e-3)


def test_resolution_lengths_follow_blasius_and_stokes():
    # delta99 = 4.91 x / sqrt(Re_x) at x = c (Schlichting & Gersten, flat plate [memory: high];
    # REFERENCES §4.1 [computed] 4.9100); delta_s = sqrt(2 nu / omega) (Stokes' second problem [memory: high]).
    L = resolution_lengths(chord=0.06, speed=0.1, viscosity=6e-6, frequency=0.25, le_radius=1.1019 * 0.15**2 * 0.06)
    assert L.reynolds == pytest.approx(1000)
    assert L.bl_thickness == pytest.approx(4.91 * 0.06 / math.sqrt(1000))
    assert L.stokes_layer == pytest.approx(math.sqrt(2 * 6e-6 / (2 * math.pi * 0.25)))
    # REFERENCES §4.4 table [computed]: Re_c = 1000 -> delta99/c = 0.155, 64 cells/chord for 10 cells in delta99.
    assert L.bl_thickness / 0.06 == pytest.approx(0.155, abs=5e-4)
    h, rule, per = required_spacing(L, CheckLimits())
    assert rule == "Stokes layer" and h == pytest.approx(L.stokes_layer / 4)
    assert 0.06 / per["boundary layer"] == pytest.approx(64.4, abs=0.1)


def test_proposed_boxes_nest_reach_target_and_hold_the_envelope():
    body = _box((0, -0.005, 0), (0.06, 0.005, 0.18))
    m = Motion(frequency=0.25, plunge_amplitude=0.06, pitch_amplitude=math.radians(60), phase=math.pi / 2,
               pivot=(0.02, 0, 0))
    base = Grid(lower=(-0.12, -0.15, -0.03), upper=(0.42, 0.15, 0.21), spacing=0.005)
    env = swept_envelope(body, m, 0.0007)
    res = propose_boxes(base, env, 0.06, 0.0007)
    ng = res.grid
    assert ng.finest_spacing <= 0.0007 and ng.finest_spacing * 2 > 0.0007
    assert len(ng.levels) == 4
    fin = ng.finest
    assert np.all(np.asarray(fin.lower) <= env.lower) and np.all(np.asarray(fin.upper) >= env.upper)
    # Wake: at least one chord behind the envelope in the finest box (default margin).
    assert fin.upper[0] - env.upper[0] >= 0.06 - 1e-12
    for parent, child in zip(ng.levels, ng.levels[1:]):
        assert np.all(np.asarray(child.lower) >= np.asarray(parent.lower) - 1e-12)
        assert np.all(np.asarray(child.upper) <= np.asarray(parent.upper) + 1e-12)
