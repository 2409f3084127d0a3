"""Finite-span wings: volumes against closed forms, topology, body frame, mesh quality."""

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.integrate import quad

from ibprep.errors import InputError
from ibprep.geometry.naca import naca4
from ibprep.geometry.surface import check_surface
from ibprep.geometry.wing import cap_volume, make_wing, wing_stations

ROUNDOFF_REL = 1e-12  # relative round-off of a divergence-theorem volume over ~1e5 faces


def _loop_area(loop):
    x, y = loop[:, 0], loop[:, 1]
    return 0.5 * np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y)


def _euler(mesh):
    f = mesh.faces
    e = np.sort(np.concatenate([f[:, [0, 1]], f[:, [1, 2]], f[:, [2, 0]]]), axis=1)
    n_edges = len(np.unique(e, axis=0))
    return len(np.unique(f)) - n_edges + len(f)


def _aspect(mesh):
    """Longest edge squared over twice the area (2/sqrt(3) = 1.155 for an equilateral triangle)."""
    t = mesh.vertices[mesh.faces]
    e = np.stack([t[:, 1] - t[:, 0], t[:, 2] - t[:, 1], t[:, 0] - t[:, 2]], axis=1)
    twice = np.linalg.norm(np.cross(e[:, 0], -e[:, 2]), axis=1)
    return (e**2).sum(axis=2).max(axis=1) / twice


def _assert_closed_outward(mesh):
    # Our own checker ...
    rep = check_surface(mesh)
    assert rep.ok, rep
    assert rep.n_bodies == 1
    # ... and trimesh as an independent reference (Trimesh.is_watertight,
    # is_winding_consistent, volume): common practice, no single source.
    assert mesh.is_watertight and mesh.is_winding_consistent and mesh.volume > 0
    # Closed genus-0 surface: V - E + F = 2 (REFERENCES §6.1, [memory: high]).
    assert _euler(mesh) == 2


# -- volumes -------------------------------------------------------------------------------
def test_flat_straight_wing_volume_is_loop_area_times_span():
    # V = A_sec * b for a straight extruded wing (REFERENCES §6.1, [memory: high]), with the
    # discretised section's polygon area: exact up to round-off.
    sec = naca4("0012")
    chord, span = 0.06, 0.18
    mesh = make_wing(sec, chord, span, tips="flat")
    layout = mesh.metadata["wing"]
    expected = _loop_area(layout.loop) * chord**2 * span
    assert mesh.volume == pytest.approx(expected, rel=ROUNDOFF_REL)
    assert check_surface(mesh).volume == pytest.approx(expected, rel=ROUNDOFF_REL)


@pytest.mark.parametrize("closed_te, coefficient", [(True, 2.04265 / 3), (False, 2.05525 / 3)])
def test_flat_wing_volume_converges_to_exact_area_times_span(closed_te, coefficient):
    # A = 0.680883 t (closed) / 0.685083 t (open), REFERENCES §1.6 [computed]; V = A b (§6.1).
    sec = naca4("0012", closed_te=closed_te)
    exact = coefficient * 0.12 * 4.0
    errors = []
    for k in (8, 16, 32, 64):
        m = make_wing(sec, 1.0, 4.0, n_chord=k, n_span=2)
        errors.append(abs(m.volume - exact) / exact)
    errors = np.array(errors)
    assert np.all(np.diff(errors) < 0), errors
    assert np.all(errors[:-1] / errors[1:] > 3.0), errors  # second order: ratio ~4 per doubling
    assert errors[2] < 2e-3 and errors[3] < 5e-4  # 0.2 % at 32 intervals, 0.05 % at 64


@pytest.mark.parametrize("taper, sweep", [(0.5, 0.0), (0.3, 0.4), (1.6, -0.3)])
def test_tapered_wing_volume_formula(taper, sweep):
    # V = A/c^2 * b (c_r^2 + c_r c_t + c_t^2)/3 (REFERENCES §6.1, [computed]); sweep shears
    # the sections without changing their area. Exact with the polygon area of the loop,
    # because every side quad of a linear taper is a planar trapezoid.
    sec = naca4("2412")
    c_r, b = 0.8, 2.5
    c_t = taper * c_r
    mesh = make_wing(sec, c_r, b, taper=taper, sweep=sweep, tips="flat")
    a_unit = _loop_area(mesh.metadata["wing"].loop)
    expected = a_unit * b * (c_r**2 + c_r * c_t + c_t**2) / 3
    assert mesh.volume == pytest.approx(expected, rel=ROUNDOFF_REL)
    _assert_closed_outward(mesh)


def test_twisted_wing_volume_converges_to_area_times_span():
    # Twist rotates each section about its quarter chord: area unchanged at every z, so
    # V -> A_loop b as the spanwise spacing shrinks (REFERENCES §6.1 [computed] plus rotation).
    sec = naca4("0015")
    errs = []
    for n_span in (2, 4, 8, 16):
        m = make_wing(sec, 1.0, 2.0, twist=-0.5, n_chord=24, n_span=n_span)
        expected = _loop_area(m.metadata["wing"].loop) * 2.0
        errs.append(abs(m.volume - expected) / expected)
    assert np.all(np.diff(errs) < 0) and errs[-1] < 2.5e-4, errs  # 0.025 % at 16 rows
    assert errs[-2] / errs[-1] > 3.5  # second order (diagonals alternate between rows)


def test_cap_volume_matches_the_revolution_integral():
    # (pi/2) c^3 int y_t^2 dx for a symmetric section; arc-length weighted for a cambered one
    # (half-disc sweep, curvature term integrates to zero): derivation in wing.py, [computed];
    # reference integral by scipy.integrate.quad.
    for code in ("0012", "4412"):
        sec = naca4(code, closed_te=False)
        f = lambda s: sec.thickness(np.array([s]))[0] ** 2 * math.sqrt(1 + sec.camber_slope(np.array([s]))[0] ** 2)
        ref = 0.5 * math.pi * 0.7**3 * quad(f, 0, 1, points=[0.4], epsabs=1e-15, epsrel=1e-12, limit=200)[0]
        assert cap_volume(sec, 0.7) == pytest.approx(ref, rel=1e-7)  # 4000-interval trapezoid rule
    # symmetric closed form: int y_t^2 dx from the polynomial (exact rational arithmetic)
    sec = naca4("0012")
    a = [0.2969, -0.1260, -0.3516, 0.2843, -0.1036]
    powers = [0.5, 1, 2, 3, 4]
    integral = sum(ai * aj / (pi + pj + 1) for ai, pi in zip(a, powers) for aj, pj in zip(a, powers))
    assert cap_volume(sec, 1.0) == pytest.approx(0.5 * math.pi * 25 * 0.12**2 * integral, rel=1e-7)


@pytest.mark.parametrize("code, closed_te", [("0012", True), ("0012", False), ("4412", False)])
def test_rounded_wing_volume_converges_to_straight_part_plus_caps(code, closed_te):
    # V = A (b - e_root - e_tip) + 2 V_cap, V_cap = (pi/2) c^3 int y_t^2 ds: REFERENCES §6.1 and
    # the half-body-of-revolution volume [computed].
    sec = naca4(code, closed_te=closed_te)
    chord, span = 1.0, 2.0
    errs = []
    for k in (12, 24, 48):
        m = make_wing(sec, chord, span, tips="round", n_chord=k)
        lay = m.metadata["wing"]
        exact = sec_area_exact(sec) * (lay.z_tip - lay.z_root) + 2 * cap_volume(sec, chord)
        errs.append(abs(m.volume - exact) / exact)
        _assert_closed_outward(m)
    assert errs[1] < errs[0] and errs[2] < errs[1], errs
    assert errs[-1] < 1e-3, errs  # 0.1 % at 48 chordwise intervals
    assert errs[-2] / errs[-1] > 3.5  # second order


def sec_area_exact(sec):
    """Exact section area: 2 int y_t sqrt(1 + yc'^2) dx (REFERENCES §1.6 identity, quad)."""
    f = lambda s: 2 * sec.thickness(np.array([s]))[0] * math.sqrt(1 + sec.camber_slope(np.array([s]))[0] ** 2)
    if sec.m == 0:
        return quad(f, 0, 1, epsabs=1e-14, epsrel=1e-13, limit=200)[0]
    return quad(f, 0, sec.p, epsabs=1e-14, epsrel=1e-13)[0] + quad(f, sec.p, 1, epsabs=1e-14, epsrel=1e-13)[0]


def test_cap_adds_its_volume():
    # Rounding one end instead of flattening it adds one cap on a straight part shortened
    # by the cap's reach; the discrete cap converges to (pi/2) c^3 int y_t^2 dx ([computed]).
    sec = naca4("0012")
    exact = cap_volume(sec, 1.0)
    errs = []
    for k in (24, 48, 96):
        one_round = make_wing(sec, 1.0, 3.0, tips="round", root="flat", n_chord=k)
        lay = one_round.metadata["wing"]
        straight = _loop_area(lay.loop) * (lay.z_tip - lay.z_root)
        errs.append(abs(one_round.volume - straight - exact) / exact)
    assert errs[1] < errs[0] and errs[2] < errs[1], errs
    assert errs[-1] < 3e-3, errs  # 0.3 % of the cap at 96 chordwise intervals


def test_tip_resolution_can_be_set():
    # The half circle of the thickest station is split into n_tip intervals; an inscribed
    # half polygon has area (n/2) sin(pi/n) r^2 of (pi/2) r^2, a deficit shrinking like
    # (pi/n)^2 / 6 (elementary geometry; common practice, no single source).
    sec = naca4("0012")
    exact = cap_volume(sec, 1.0)
    deficits = []
    for n_tip in (4, 8, 16):
        m = make_wing(sec, 1.0, 2.0, tips="round", root="flat", n_chord=48, n_tip=n_tip)
        lay = m.metadata["wing"]
        assert lay.n_tip == n_tip
        deficits.append(exact - (m.volume - _loop_area(lay.loop) * (lay.z_tip - lay.z_root)))
    deficits = np.array(deficits) / exact
    assert np.all(deficits > 0) and np.all(np.diff(deficits) < 0), deficits
    polygon = 1 - np.array([4, 8, 16]) / 2 * np.sin(np.pi / np.array([4, 8, 16])) / (np.pi / 2)
    # thinner stations get proportionally fewer intervals, so no ring beats the thickest one
    assert np.all(deficits >= polygon)
    assert deficits[1] / deficits[2] > 3.0, deficits  # second order in 1/n_tip


# -- body frame and conventions --------------------------------------------------------------
def test_body_frame_root_at_origin_span_along_z():
    # DESIGN.md §3: chord along +x from the LE at the origin, thickness +y, span +z from 0.
    m = make_wing("0012", 0.06, 0.18, tips="flat")
    lo, hi = m.bounds
    assert lo[2] == 0.0 and hi[2] == pytest.approx(0.18, rel=1e-14)
    assert lo[0] == pytest.approx(0.0, abs=1e-15) and hi[0] == pytest.approx(0.06, rel=1e-12)
    assert np.any(np.all(np.abs(m.vertices - [0, 0, 0]) < 1e-15, axis=1))  # root LE vertex
    # t/2 * c, sampled at the stations: y_t is flat at its maximum, so a station 0.03 c away
    # misses it by about y_t'' dx^2 / 2 = 0.2 %.
    assert hi[1] == pytest.approx(-lo[1]) and hi[1] == pytest.approx(0.06 * 0.06, rel=3e-3)


def test_centred_and_rounded_span_is_tip_to_tip():
    m = make_wing("0015", 0.06, 0.18, tips="round", centred=True, n_chord=40)
    lo, hi = m.bounds
    assert lo[2] == pytest.approx(-hi[2], abs=1e-15)
    # The cap apex reaches y_t,max c beyond the end section; its ring samples it within 0.2 %.
    assert hi[2] <= 0.09 * (1 + 1e-12) and hi[2] > 0.09 - 0.002 * 0.06


def test_sweep_and_twist_signs():
    span = 2.0
    swept = make_wing("0012", 1.0, span, sweep=math.radians(30), tips="flat", n_chord=16)
    tip = swept.vertices[np.isclose(swept.vertices[:, 2], span)]
    assert tip[:, 0].min() == pytest.approx(span * math.tan(math.radians(30)), rel=1e-12)  # LE aft
    # nose-up twist: tip LE up, tip TE down (pitch convention of DESIGN.md §3)
    twisted = make_wing("0012", 1.0, span, twist=math.radians(10), tips="flat", n_chord=16)
    tip = twisted.vertices[np.isclose(twisted.vertices[:, 2], span)]
    te = tip[tip[:, 0].argmax()]
    le = tip[tip[:, 0].argmin()]
    assert te[1] == pytest.approx(-0.75 * math.sin(math.radians(10)), abs=1e-9)
    assert le[1] > 0


def test_taper_scales_tip_chord():
    m = make_wing("0012", 1.0, 2.0, taper=0.4, tips="flat", n_chord=16)
    tip = m.vertices[np.isclose(m.vertices[:, 2], 2.0)]
    assert np.ptp(tip[:, 0]) == pytest.approx(0.4, rel=1e-12)


# -- topology and quality ---------------------------------------------------------------------
@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=True)
@given(
    m=st.integers(0, 6),
    p=st.integers(2, 7),
    t=st.integers(6, 24),
    closed_te=st.booleans(),
    taper=st.floats(0.3, 1.5),
    sweep=st.floats(-0.6, 0.6),
    twist=st.floats(-0.5, 0.5),
    tips=st.sampled_from(["flat", "round"]),
    root=st.sampled_from([None, "flat", "round"]),
    centred=st.booleans(),
    n_chord=st.integers(4, 24),
    n_span=st.integers(1, 6),
)
def test_every_option_gives_a_closed_outward_surface(m, p, t, closed_te, taper, sweep, twist, tips, root, centred, n_chord, n_span):
    code = f"{m}{p if m else 0}{t:02d}"
    mesh = make_wing(naca4(code, closed_te=closed_te), 1.0, 3.0, taper=taper, sweep=sweep, twist=twist,
                     tips=tips, root=root, centred=centred, n_chord=n_chord, n_span=n_span)
    _assert_closed_outward(mesh)
    assert check_surface(mesh).degenerate_faces == 0
    # Flat ends are planar caps whose triangles all face out along the span (no folds).
    z0 = -1.5 if centred else 0.0
    for z_end, sign, style in ((z0, -1, root or tips), (z0 + 3.0, 1, tips)):
        if style != "flat":
            continue
        on_end = np.all(np.isclose(mesh.vertices[mesh.faces][:, :, 2], z_end, atol=1e-12), axis=1)
        assert on_end.any()
        assert np.all(sign * mesh.face_normals[on_end, 2] > 1 - 1e-9)


def test_triangles_are_compact():
    # Common practice, no single source: bounded aspect ratio keeps ray casts and closest
    # points well conditioned. Measured worst: 6 (flat nose fan, 0012), 12 (same, 0024),
    # 5.6 (open-TE base); median 3.2 (right triangles with legs 1 : 2.8).
    for code, closed_te in (("0012", True), ("0015", False), ("4412", False), ("0024", True)):
        for tips in ("round", "flat"):
            ar = _aspect(make_wing(naca4(code, closed_te=closed_te), 1.0, 3.0, tips=tips))
            assert np.median(ar) < 4.0  # right triangle with legs 1 : 2.8 gives 3.2
            assert ar.max() < 15.0


@pytest.mark.parametrize("target", [5_000, 20_000, 200_000])
def test_face_count_target(target):
    m = make_wing("0015", 0.06, 0.18, tips="round", faces=target)
    assert 0.75 * target < len(m.faces) < 1.25 * target


def test_wing_stations_are_graded():
    sec = naca4("0012")
    x = wing_stations(sec, 40)
    assert x[0] == 0 and x[-1] == 1 and np.all(np.diff(x) > 0)
    xu, yu = sec.upper(x)
    ds = np.hypot(np.diff(xu), np.diff(yu))
    # finest (nose) spacing is about 1/8 of the flat-part spacing, never less than 1/10
    assert 5 < ds.max() / ds.min() < 10


# -- input handling ----------------------------------------------------------------------------
@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(chord=0.0), "chord must be a positive"),
        (dict(span=-1.0), "span must be a positive"),
        (dict(taper=0.0), "taper must be a positive"),
        (dict(sweep=2.0), "sweep must be an angle"),
        (dict(twist=float("nan")), "twist must be an angle"),
        (dict(tips="pointy"), "tips must be one of"),
        (dict(root="open"), "root must be one of"),
        (dict(n_chord=2), "n_chord must be an integer >= 4"),
        (dict(n_span=0), "n_span must be an integer >= 1"),
        (dict(faces=10), "faces must be an integer >= 200"),
        (dict(span=0.1, tips="round"), "no straight part"),
    ],
)
def test_bad_wing_inputs(kwargs, match):
    args = dict(section=naca4("0012"), chord=1.0, span=3.0) | kwargs
    with pytest.raises(InputError, match=match):
        make_wing(**args)


def test_folding_sections_are_refused():
    # Offsets perpendicular to a camber line cross where y_t exceeds its radius of curvature
    # (elementary differential geometry of offset curves; common practice, no single source).
    assert naca4("0012").fold_ratio == 0.0
    assert naca4("6224").fold_ratio < 0.4
    assert naca4("7124").fold_ratio > 1.0
    with pytest.raises(InputError, match=r"NACA 7124 is thicker than its camber line's radius"):
        make_wing("7124", 1.0, 3.0)
    make_wing("4412", 1.0, 3.0)  # ordinary sections pass


def test_bad_section_type():
    with pytest.raises(InputError, match="section must be a Section"):
        make_wing(12, 1.0, 1.0)
