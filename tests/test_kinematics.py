"""Tests of ibprep.motion.kinematics: prescribed rigid motion and the case's non-dimensional numbers.

Reference values come from /work/shared/REFERENCES.md; each check names the
section and carries its confidence tag. Frames: body x along the chord from the
leading edge, y thickness, z span; world x downstream, y up.
"""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.spatial.transform import Rotation

from ibprep.errors import InputError
from ibprep.motion.kinematics import (
    FlowNumbers,
    Motion,
    Sine,
    SmoothSquareWave,
    Tabulated,
    WaveformTable,
    flow_numbers,
    load_waveform_table,
)

DEG = math.pi / 180.0

# A value printed to 6 significant digits (e.g. 1.05561) is matched to half a unit
# in its last digit.
PRINTED_6 = 5e-6
# Round-off of a few dozen flops on O(1) numbers.
ROUNDOFF = 1e-12
# Central differences: step FD_STEP periods; agreement to FD_RTOL of the peak value
# (truncation ~ (2 pi FD_STEP)^2 / 6 ~ 7e-10 for a sine, more for sharper waveforms;
# round-off ~ eps / (2 pi FD_STEP) ~ 2e-12).
FD_STEP = 1e-5
FD_RTOL = 1e-6
# A tabulated waveform's acceleration (the spline's second derivative) has kinks at the
# knots, where the central difference of the velocity errs by O(step): looser.
FD_RTOL_ACC = 1e-5
# Plain step in seconds for the worked example (omega ~ 1 rad/s).
DT_FD = 1e-4


def kd_motion(f_star=0.14, theta0_deg=75.0):
    """REFERENCES §5.2 / §2.6 layout: c = 1, U = 1, h0 = c, pivot c/3, pitch leading by 90 degrees."""
    return Motion(
        frequency=f_star,
        plunge_amplitude=1.0,
        pitch_amplitude=theta0_deg * DEG,
        phase=math.pi / 2,
        pivot=(1.0 / 3.0, 0.0, 0.0),
    )


def random_motions(seed=20261202, n=4):
    """Seeded motions exercising every option: waveforms, roll stroke, off-axis pivot and root."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        tab_tau = np.linspace(0.0, 2 * math.pi, 41)
        tab_vals = np.sin(tab_tau) + 0.3 * np.sin(2 * tab_tau + 0.4)
        waves = [Sine(), SmoothSquareWave(sharpness=float(rng.uniform(0.5, 4.0))), Tabulated(tab_tau, tab_vals)]
        out.append(
            Motion(
                frequency=float(rng.uniform(0.2, 3.0)),
                plunge_amplitude=float(rng.uniform(0.1, 1.5)),
                pitch_amplitude=float(rng.uniform(5, 80)) * DEG,
                phase=float(rng.uniform(0, 2 * math.pi)),
                pivot=tuple(rng.uniform(-0.5, 1.0, 3)),
                plunge_waveform=waves[i % 3],
                pitch_waveform=waves[(i + 1) % 3],
                roll_amplitude=float(rng.uniform(10, 70)) * DEG if i % 2 else 0.0,
                roll_phase=float(rng.uniform(0, 2 * math.pi)),
                roll_root=tuple(rng.uniform(-0.3, 0.3, 3)),
                roll_waveform=waves[(i + 2) % 3],
            )
        )
    return out


MOTIONS = random_motions()


def body_points(seed=7, m=25):
    return np.random.default_rng(seed).uniform(-1.0, 2.0, (m, 3))


# ---------------------------------------------------------------------------- shapes and contract
def test_output_shapes_follow_time_and_point_shapes():
    mot = MOTIONS[1]
    pts = body_points(m=5)
    t = np.linspace(0.0, 1.0, 7)
    assert mot.pose(0.3).shape == (4, 4)
    assert mot.pose(t).shape == (7, 4, 4)
    assert mot.velocity(pts, 0.3).shape == (5, 3)
    assert mot.velocity(pts, t).shape == (7, 5, 3)
    assert mot.acceleration(pts, t).shape == (7, 5, 3)
    assert mot.transform(pts, t).shape == (7, 5, 3)
    assert mot.angular_velocity(0.3).shape == (3,)
    assert mot.angular_velocity(t).shape == (7, 3)
    assert mot.plunge(t).shape == mot.pitch(t).shape == mot.roll(t).shape == (7,)


@pytest.mark.parametrize("mot", MOTIONS)
def test_vectorised_times_agree_with_scalar_times(mot):
    pts = body_points(m=4)
    t = np.array([0.0, 0.17, 0.5, 2.3])
    vec = mot.velocity(pts, t)
    poses = mot.pose(t)
    for i, ti in enumerate(t):
        np.testing.assert_allclose(vec[i], mot.velocity(pts, float(ti)), rtol=0, atol=ROUNDOFF)
        np.testing.assert_allclose(poses[i], mot.pose(float(ti)), rtol=0, atol=ROUNDOFF)


def test_pose_is_the_contract_formula_without_roll():
    # DESIGN.md §3: x_world = R(theta)(x - pivot) + pivot + (0, h, 0), R a rotation about z by -theta.
    # Reference library: scipy.spatial.transform.Rotation.from_rotvec.
    mot = Motion(frequency=0.7, plunge_amplitude=0.4, pitch_amplitude=50 * DEG, phase=1.1, pivot=(0.25, 0.05, 0.1))
    pts = body_points(m=6)
    t = np.linspace(0.0, 2.0, 9)
    h = 0.4 * np.sin(2 * math.pi * 0.7 * t)
    th = 50 * DEG * np.sin(2 * math.pi * 0.7 * t + 1.1)
    world = mot.transform(pts, t)
    p = np.array(mot.pivot)
    for i in range(t.size):
        rot = Rotation.from_rotvec([0.0, 0.0, -th[i]]).as_matrix()
        expect = (pts - p) @ rot.T + p + [0.0, h[i], 0.0]
        np.testing.assert_allclose(world[i], expect, rtol=0, atol=ROUNDOFF)
        np.testing.assert_allclose(mot.pose(t[i])[:3, :3], rot, rtol=0, atol=ROUNDOFF)
    np.testing.assert_allclose(mot.plunge(t), h, atol=ROUNDOFF)
    np.testing.assert_allclose(mot.pitch(t), th, atol=ROUNDOFF)


def test_nose_up_pitch_raises_the_leading_edge():
    # Sign convention of REFERENCES §2.1 / DESIGN.md §3: nose-up positive, flow along +x.
    mot = Motion(frequency=1.0, pitch_amplitude=20 * DEG, pivot=(0.3, 0.0, 0.0))
    le_te = mot.transform([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0]], 0.25)  # theta = +20 deg at t = T/4
    assert le_te[0, 1] > 0.0 > le_te[1, 1]
    slope = (le_te[1, 1] - le_te[0, 1]) / (le_te[1, 0] - le_te[0, 0])
    assert slope == pytest.approx(-math.tan(20 * DEG), abs=ROUNDOFF)


@pytest.mark.parametrize("mot", MOTIONS)
def test_pose_is_a_proper_rigid_transform(mot):
    # Common practice, no single source: R^T R = I, det R = +1, last row (0, 0, 0, 1).
    T = mot.pose(np.linspace(0.0, 2 * mot.period, 50))
    R = T[:, :3, :3]
    np.testing.assert_allclose(R.transpose(0, 2, 1) @ R, np.broadcast_to(np.eye(3), R.shape), atol=ROUNDOFF)
    np.testing.assert_allclose(np.linalg.det(R), 1.0, atol=ROUNDOFF)
    np.testing.assert_array_equal(T[:, 3, :], np.broadcast_to([0.0, 0.0, 0.0, 1.0], (50, 4)))
    # distances between body points are preserved
    pts = body_points(m=8)
    w = mot.transform(pts, 0.37 * mot.period)
    d_body = np.linalg.norm(pts[:, None] - pts[None], axis=-1)
    d_world = np.linalg.norm(w[:, None] - w[None], axis=-1)
    np.testing.assert_allclose(d_world, d_body, atol=1e-11)


@pytest.mark.parametrize("mot", MOTIONS)
def test_pose_is_periodic(mot):
    t = np.linspace(0.0, mot.period, 17)
    for k in (1, 3):
        np.testing.assert_allclose(mot.pose(t + k * mot.period), mot.pose(t), atol=1e-10)


# ---------------------------------------------------------------------------- derivatives
@pytest.mark.parametrize("mot", MOTIONS)
def test_velocity_and_acceleration_are_derivatives_of_the_pose(mot):
    # Common practice, no single source: central differences (see FD_STEP, FD_RTOL, FD_RTOL_ACC).
    pts = body_points(m=10)
    t = np.linspace(0.0, mot.period, 13)
    dt = FD_STEP * mot.period
    v = mot.velocity(pts, t)
    dx = (mot.transform(pts, t + dt) - mot.transform(pts, t - dt)) / (2 * dt)
    np.testing.assert_allclose(v, dx, rtol=0, atol=FD_RTOL * np.abs(v).max())
    a = mot.acceleration(pts, t)
    dv = (mot.velocity(pts, t + dt) - mot.velocity(pts, t - dt)) / (2 * dt)
    np.testing.assert_allclose(a, dv, rtol=0, atol=FD_RTOL_ACC * np.abs(a).max())


@pytest.mark.parametrize("mot", MOTIONS)
def test_angular_velocity_is_the_rigid_body_rate(mot):
    # Standard rigid-body kinematics (REFERENCES §5.1 [memory: high]): dR/dt R^T = [Omega]x and
    # v(x) = v(x_ref) + Omega x (x_world - x_ref_world) for every body point.
    t = np.linspace(0.0, mot.period, 11)
    dt = FD_STEP * mot.period
    R = mot.pose(t)[:, :3, :3]
    dR = (mot.pose(t + dt)[:, :3, :3] - mot.pose(t - dt)[:, :3, :3]) / (2 * dt)
    W = dR @ R.transpose(0, 2, 1)
    om = mot.angular_velocity(t)
    scale = mot.angular_frequency
    np.testing.assert_allclose(np.stack([W[:, 2, 1], W[:, 0, 2], W[:, 1, 0]], -1), om, atol=FD_RTOL * np.abs(om).max())
    pts = body_points(m=6)
    v = mot.velocity(pts, t)
    xw = mot.transform(pts, t)
    rigid = v[:, :1] + np.cross(om[:, None, :], xw - xw[:, :1])
    np.testing.assert_allclose(v, rigid, atol=1e-10 * scale)


def test_plunge_pitch_velocity_matches_the_planar_formula():
    # REFERENCES §5.1 [memory: high; standard kinematics]: with D = r - r_p,
    # v = (theta_dot D_y, h_dot - theta_dot D_x) in the plane.
    mot = Motion(frequency=0.4, plunge_amplitude=0.8, pitch_amplitude=60 * DEG, phase=0.5, pivot=(0.3, 0.0, 0.0))
    t = np.linspace(0.0, mot.period, 23)
    w = mot.angular_frequency
    hd = 0.8 * w * np.cos(w * t)
    thd = 60 * DEG * w * np.cos(w * t + 0.5)
    pts = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.5], [0.5, 0.06, 0.0]])
    D = mot.transform(pts, t) - (np.array(mot.pivot) + np.stack([0 * t, mot.plunge(t), 0 * t], -1))[:, None]
    expect = np.stack([thd[:, None] * D[..., 1], hd[:, None] - thd[:, None] * D[..., 0], 0 * D[..., 0]], -1)
    np.testing.assert_allclose(mot.velocity(pts, t), expect, atol=ROUNDOFF)


# ---------------------------------------------------------------------------- §5.2 worked example
@pytest.mark.parametrize(
    "f_star, te_peak, le_peak, te_rel_peak",
    [(0.14, 1.05561, 0.88717, 1.47757), (0.15, 1.13101, 0.95054, 1.51671)],
)
def test_worked_example_peak_speeds(f_star, te_peak, le_peak, te_rel_peak):
    # REFERENCES §5.2 [computed]: h0 = c, theta0 = 75 deg, pivot c/3, phi = 90 deg, U = 1;
    # peak |v_TE| at omega t = 53.95 deg (and +180 deg).
    mot = kd_motion(f_star)
    num = flow_numbers(mot, 1.0, 1.0, 1e-3, surface_points=[[0.0, 0.0, 0.0]])
    assert num.max_te_speed == pytest.approx(te_peak, abs=PRINTED_6)
    assert num.max_surface_speed == pytest.approx(le_peak, abs=PRINTED_6)
    assert num.max_te_speed_relative == pytest.approx(te_rel_peak, abs=PRINTED_6)
    assert num.max_te_speed_phase / DEG == pytest.approx(53.95, abs=0.005)
    # REFERENCES §5.1 bounds [computed]: max(omega h0, omega r theta0) <= max <= omega (h0 + r theta0)
    w, r_te, th0 = mot.angular_frequency, 2.0 / 3.0, 75 * DEG
    assert max(w, w * r_te * th0) <= num.max_te_speed <= w * (1.0 + r_te * th0)


def test_worked_example_kinsey_dumas_pitch():
    # REFERENCES §5.2 [computed]: f c/U = 0.14, theta0 = 76.3 deg -> peak |v_TE| 1.06301 U.
    num = flow_numbers(kd_motion(0.14, 76.3), 1.0, 1.0, 1e-3)
    assert num.max_te_speed == pytest.approx(1.06301, abs=PRINTED_6)


@pytest.mark.parametrize("f_star", [0.14, 0.15])
def test_worked_example_exact_instants(f_star):
    # REFERENCES §5.1/5.2 [computed]: |v_TE| = omega h0 at tau = 0 and omega r_TE theta0 at tau = 90 deg.
    mot = kd_motion(f_star)
    w = mot.angular_frequency
    te = np.array([[1.0, 0.0, 0.0]])
    speeds = np.linalg.norm(mot.velocity(te, np.array([0.0, 0.25 * mot.period])), axis=-1)[:, 0]
    assert speeds[0] == pytest.approx(w * 1.0, rel=ROUNDOFF)
    assert speeds[1] == pytest.approx(w * (2.0 / 3.0) * 75 * DEG, rel=ROUNDOFF)


def test_worked_example_closed_form_and_optimiser_accuracy():
    # REFERENCES §5.1 [computed]: |v_TE|^2/omega^2 = h0^2 cos^2 + r^2 th0^2 sin^2 + 2 h0 r th0 sin cos cos(th0 cos).
    # The refined maximum must agree with a brute-force maximum of the closed form over 2e6 phases
    # (sampling error <= |f''| dtau^2 / 8 ~ 1e-12 relative), i.e. the optimiser is good to ~1e-9 or better.
    mot = kd_motion(0.14)
    w, r, th0 = mot.angular_frequency, 2.0 / 3.0, 75 * DEG
    tau = np.linspace(0.0, 2 * math.pi, 2_000_001)
    s, c = np.sin(tau), np.cos(tau)
    closed = w * np.sqrt(c**2 + r**2 * th0**2 * s**2 + 2 * r * th0 * s * c * np.cos(th0 * c))
    t = tau[::997] / w
    np.testing.assert_allclose(
        np.linalg.norm(mot.velocity([[1.0, 0.0, 0.0]], t)[:, 0], axis=-1), closed[::997], rtol=ROUNDOFF
    )
    num = flow_numbers(mot, 1.0, 1.0, 1e-3)
    assert num.max_te_speed == pytest.approx(closed.max(), rel=1e-10)
    assert num.max_te_speed >= closed.max() * (1 - ROUNDOFF)


def test_peak_speed_times_of_the_worked_example():
    # REFERENCES §5.2 [computed]: the TE speed peaks at omega t = 53.95 deg and 53.95 + 180 deg.
    mot = kd_motion(0.14)
    te = [[1.0, 0.0, 0.0]]
    times = mot.peak_speed_times(te)
    phases = np.sort(times[:2] * mot.angular_frequency / DEG)
    np.testing.assert_allclose(phases, [53.95, 233.95], atol=0.005)
    assert times[0] < times[1]  # a tie is reported earliest first
    t_ext, s_ext = mot.speed_extrema(te)
    assert s_ext.max() == pytest.approx(1.05561, abs=PRINTED_6)
    # each reported instant is a stationary point of the speed (refined, not just sampled)
    for ti in times[:2]:
        sp = np.linalg.norm(mot.velocity(te, np.array([ti - DT_FD, ti, ti + DT_FD]))[:, 0], axis=-1)
        assert sp[1] >= sp[0] and sp[1] >= sp[2]


def test_peak_speed_times_over_many_points_are_the_envelope_peaks():
    # Common practice, no single source: the envelope maximum equals the largest per-point maximum.
    mot = MOTIONS[3]
    pts = body_points(m=300)
    times, speeds = mot.speed_extrema(pts)
    tt = np.linspace(0.0, mot.period, 20001)
    dense = np.linalg.norm(mot.velocity(pts, tt), axis=-1).max(axis=1).max()
    assert speeds.max() >= dense * (1 - ROUNDOFF)
    assert speeds.max() == pytest.approx(dense, rel=1e-6)  # dense grid spacing 5e-5 T
    assert np.all((times >= 0.0) & (times < mot.period))


# ---------------------------------------------------------------------------- non-dimensional numbers
def test_strouhal_is_kh_over_pi_and_frequency_conventions():
    # REFERENCES §2.3 [computed]: St = kh/pi, St = 2 f* h; §2.2: k_chord = 2 k_half = 2 pi f*.
    rng = np.random.default_rng(3)
    for _ in range(5):
        f, h0, c, U = rng.uniform(0.1, 3.0, 4)
        num = flow_numbers(Motion(frequency=f, plunge_amplitude=h0), c, U, 1e-6)
        assert num.strouhal == pytest.approx(num.kh / math.pi, rel=ROUNDOFF)
        assert num.strouhal == pytest.approx(2 * num.frequency_ratio * num.plunge_ratio, rel=ROUNDOFF)
        assert num.k_chord == pytest.approx(2 * num.k_half_chord, rel=ROUNDOFF)
        assert num.k_chord == pytest.approx(2 * math.pi * num.frequency_ratio, rel=ROUNDOFF)
        assert num.reynolds == pytest.approx(U * c / 1e-6, rel=ROUNDOFF)
        # pure plunge: the TE moves with the body, so its Strouhal number is St itself
        assert num.strouhal_te == pytest.approx(num.strouhal, rel=1e-9)


def test_strouhal_st_03_heave_angle():
    # REFERENCES §2.3 [computed]: St = 0.3 -> kh = 0.9425, arctan(kh) = 43.30 deg.
    num = flow_numbers(Motion(frequency=0.2, plunge_amplitude=0.75), 1.0, 1.0, 1e-3)
    assert num.strouhal == pytest.approx(0.3, rel=ROUNDOFF)
    assert num.kh == pytest.approx(0.9425, abs=5e-5)
    assert math.atan(num.kh) / DEG == pytest.approx(43.30, abs=5e-3)


@pytest.mark.parametrize(
    "strouhal, theta0_deg, alpha_max_deg, at_deg",
    [(0.30, 23.304, 20.000, 0.0), (0.45, 34.726, 20.743, 144.7), (0.60, 42.053, 23.453, 48.4)],
)
def test_effective_angle_of_attack_table(strouhal, theta0_deg, alpha_max_deg, at_deg):
    # REFERENCES §2.4 [computed]: h0 = 0.75 c, phi = 90 deg, nominal alpha_max = 20 deg.
    # theta0 is printed to 3 decimals, which moves alpha by < 5e-4 deg; the printed max to 3 decimals.
    f = strouhal / (2 * 0.75)
    mot = Motion(frequency=f, plunge_amplitude=0.75, pitch_amplitude=theta0_deg * DEG, phase=math.pi / 2)
    num = flow_numbers(mot, 1.0, 1.0, 1e-3)
    assert num.alpha_nominal / DEG == pytest.approx(-20.0, abs=1e-3)
    assert num.alpha_max / DEG == pytest.approx(alpha_max_deg, abs=1e-3)
    # alpha = F(cos tau) with F odd, so |alpha| peaks at +-tau*, pi +- tau*; the table prints one of
    # them (to 0.1 deg): compare |cos|.
    assert abs(math.cos(num.alpha_max_phase)) == pytest.approx(abs(math.cos(at_deg * DEG)), abs=2e-3)
    # the time series: mid-stroke (tau = 0, moving up fastest, theta = theta0) gives the nominal angle
    alpha = mot.effective_angle(np.array([0.0, num.alpha_max_phase / mot.angular_frequency]), 1.0)
    assert alpha[0] == pytest.approx(num.alpha_nominal, abs=ROUNDOFF)
    assert abs(alpha[1]) == pytest.approx(num.alpha_max, rel=ROUNDOFF)


def test_kinsey_dumas_point_derived_numbers():
    # REFERENCES §2.6 [computed from memory-sourced inputs, memory: medium-high]: Re 1100, f* = 0.14,
    # h0 = c, theta0 = 76.3 deg -> omega h0/U = 0.8796, arctan 41.34 deg, nominal alpha 34.96 deg,
    # chi = 1.846 (chi = theta0 / arctan(omega h0/U), §2.4), St = 0.28.
    num = flow_numbers(kd_motion(0.14, 76.3), 1.0, 1.0, 1.0 / 1100)
    assert num.reynolds == pytest.approx(1100.0, rel=ROUNDOFF)
    assert num.kh == pytest.approx(0.8796, abs=5e-5)
    assert num.alpha_nominal / DEG == pytest.approx(34.96, abs=5e-3)
    assert num.feathering == pytest.approx(1.846, abs=5e-4)
    assert num.strouhal == pytest.approx(0.28, abs=ROUNDOFF)
    # the small-angle form is theta0 / kh (documented alternative)
    assert num.feathering_linear == pytest.approx(76.3 * DEG / num.kh, rel=ROUNDOFF)
    # phi = 90 deg and chi > 1: the extreme angle is reached at mid-stroke (omega t = 0 or 180 deg)
    assert num.alpha_max == pytest.approx(abs(num.alpha_nominal), rel=1e-9)


def test_te_strouhal_against_a_dense_sample():
    # [computed] y_TE(tau) = h0 sin tau - r sin(theta0 cos tau) for pivot on the chord line, phi = 90 deg;
    # brute force over 1e6 phases, sampling error ~ (pi/1e6)^2 relative.
    mot = kd_motion(0.14)
    tau = np.linspace(0.0, 2 * math.pi, 1_000_001)
    y = np.sin(tau) - (2.0 / 3.0) * np.sin(75 * DEG * np.cos(tau))
    num = flow_numbers(mot, 1.0, 1.0, 1e-3)
    assert num.strouhal_te == pytest.approx(0.14 * np.ptp(y), rel=1e-10)
    assert num.strouhal_te > num.strouhal  # pitching adds to the TE excursion here


def test_flow_numbers_is_a_frozen_dataclass():
    num = flow_numbers(kd_motion(), 1.0, 1.0, 1e-3)
    assert isinstance(num, FlowNumbers)
    assert num.max_surface_speed is None
    with pytest.raises(AttributeError, match="cannot assign"):
        num.reynolds = 3.0


# ---------------------------------------------------------------------------- waveforms
def test_smooth_square_wave_is_the_sine_at_zero_sharpness():
    tau = np.linspace(-7.0, 7.0, 1001)
    for a, b in zip(SmoothSquareWave(0.0).evaluate(tau), Sine().evaluate(tau)):
        np.testing.assert_array_equal(a, b)
    # and the family tends to it continuously: g = sin tau (1 + beta^2 cos^2 tau / 3 + O(beta^4))
    for beta in (1e-2, 1e-4):
        g, dg, _ = SmoothSquareWave(beta).evaluate(tau)
        assert np.max(np.abs(g - np.sin(tau))) <= beta**2 / 3 * 1.01 + ROUNDOFF
        assert np.max(np.abs(dg - np.cos(tau))) <= 2 * beta**2 + ROUNDOFF


@pytest.mark.parametrize("beta", [0.5, 2.0, 8.0])
def test_smooth_square_wave_is_c1_with_unit_peak(beta):
    # Common practice, no single source: analytic derivatives agree with central differences, and the
    # derivative changes by no more than max|g''| per step (so it is continuous).
    wave = SmoothSquareWave(beta)
    tau = np.linspace(0.0, 2 * math.pi, 20001)
    g, dg, ddg = wave.evaluate(tau)
    dtau = 1e-5
    gp, gm = wave.evaluate(tau + dtau), wave.evaluate(tau - dtau)
    np.testing.assert_allclose(dg, (gp[0] - gm[0]) / (2 * dtau), atol=1e-8 * beta**2 + 1e-9)
    np.testing.assert_allclose(ddg, (gp[1] - gm[1]) / (2 * dtau), atol=1e-8 * beta**3 + 1e-9)
    step = tau[1] - tau[0]
    assert np.max(np.abs(np.diff(dg))) <= np.max(np.abs(ddg)) * step * 1.001
    assert np.max(np.abs(g)) <= 1.0 + ROUNDOFF
    assert wave.evaluate(np.array([math.pi / 2]))[0][0] == pytest.approx(1.0, rel=ROUNDOFF)


def test_smooth_square_wave_approaches_a_square():
    # tanh(8 sin tau)/tanh 8 exceeds 0.99 wherever sin tau > atanh(0.99)/8 = 0.331: 78 % of the half period.
    g = SmoothSquareWave(8.0).evaluate(np.linspace(0.0, math.pi, 10001))[0]
    assert np.mean(g > 0.99) > 0.77


def test_tabulated_sine_reproduces_the_sine_to_spline_accuracy():
    # Periodic cubic spline interpolation error: |f - s| <= (5/384) h^4 max|f''''| and
    # |f' - s'| <= (1/24) h^3 max|f''''| (Hall & Meyer 1976, J. Approx. Theory 16:105-122, Theorem 1)
    # [memory: high for the 5/384 constant, medium for 1/24]; also check the O(h^4)/O(h^3) orders.
    tau = np.linspace(0.0, 2 * math.pi, 5001)
    errs, derrs = [], []
    for n in (16, 32, 64):
        knots = np.linspace(0.0, 2 * math.pi, n + 1)
        h = knots[1] - knots[0]
        g, dg, _ = Tabulated(knots, np.sin(knots)).evaluate(tau)
        errs.append(np.max(np.abs(g - np.sin(tau))))
        derrs.append(np.max(np.abs(dg - np.cos(tau))))
        assert errs[-1] <= 5 / 384 * h**4
        assert derrs[-1] <= h**3 / 24
    assert math.log2(errs[0] / errs[2]) / 2 == pytest.approx(4.0, abs=0.1)
    assert math.log2(derrs[0] / derrs[2]) / 2 == pytest.approx(3.0, abs=0.15)


def test_tabulated_motion_reproduces_the_sine_motion():
    # A table sampled from the sine motion gives the same poses and velocities to spline accuracy.
    ref = Motion(frequency=0.5, plunge_amplitude=0.3, pitch_amplitude=40 * DEG, phase=math.pi / 2, pivot=(0.25, 0, 0))
    t = np.linspace(0.0, 2.0, 129)
    table = WaveformTable(t=t, h=ref.plunge(t), theta=ref.pitch(t))
    mot = Motion.from_table(table, pivot=(0.25, 0, 0))
    assert mot.period == pytest.approx(2.0, rel=ROUNDOFF)
    # the spline's peak is within its interpolation error of the sampled sine's amplitude
    assert mot.plunge_amplitude == pytest.approx(0.3, rel=1e-6)
    assert mot.pitch_amplitude == pytest.approx(40 * DEG, rel=1e-6)
    pts = body_points(m=6)
    tt = np.linspace(0.0, 4.0, 301)
    h = 2 * math.pi / 128  # knot spacing in phase
    tol_x = 5 / 384 * h**4 * 2.0  # per unit amplitude, amplitudes and lever arms ~ 1-2
    tol_v = h**3 / 24 * ref.angular_frequency * 2.0
    np.testing.assert_allclose(mot.transform(pts, tt), ref.transform(pts, tt), atol=tol_x)
    np.testing.assert_allclose(mot.velocity(pts, tt), ref.velocity(pts, tt), atol=tol_v)


def test_tabulated_waveform_needs_a_closed_increasing_period():
    knots = np.linspace(0.0, 2 * math.pi, 9)
    with pytest.raises(InputError, match="not periodic"):
        Tabulated(knots, np.cos(knots) + knots)
    with pytest.raises(InputError, match="increase strictly"):
        Tabulated(knots[::-1], np.sin(knots))
    with pytest.raises(InputError, match="exactly one period"):
        Tabulated(knots * 0.5, np.sin(knots))


# ---------------------------------------------------------------------------- CSV tables
def write(tmp_path, text, name="wave.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_load_waveform_table_round_trip(tmp_path):
    t = np.linspace(0.0, 4.0, 33)
    h = 0.1 * np.sin(math.pi * t / 2)
    th = 0.5 * np.cos(math.pi * t / 2)
    rows = "\n".join(f"{float(a)!r}, {float(b)!r}, {float(c)!r}" for a, b, c in zip(t, h, th))
    table = load_waveform_table(write(tmp_path, "# one period\nt,h,theta\n\n" + rows + "\n"))
    assert table.period == pytest.approx(4.0, rel=ROUNDOFF)
    np.testing.assert_array_equal(table.h, h[:-1].tolist() + [h[0]])
    deg = load_waveform_table(
        write(tmp_path, "t,h,theta_deg\n" + "\n".join(f"{float(a)!r},{float(b)!r},{math.degrees(c)!r}" for a, b, c in zip(t, h, th)), "d.csv")
    )
    np.testing.assert_allclose(deg.theta, table.theta, atol=ROUNDOFF)
    mot = Motion.from_table(table)
    assert mot.frequency == pytest.approx(0.25, rel=ROUNDOFF)


def test_load_waveform_table_errors_name_file_and_line(tmp_path):
    good = ["0, 0, 0", "1, 1, 0.1", "2, 0, 0", "3, -1, -0.1", "4, 0, 0"]
    p = write(tmp_path, "\n".join(good[:2] + ["2, zero, 0"] + good[3:]))
    with pytest.raises(InputError, match=r"wave\.csv, line 3: value 2 is not a number; expected numbers"):
        load_waveform_table(p)
    p = write(tmp_path, "\n".join(good[:2] + ["2, 0"] + good[3:]))
    with pytest.raises(InputError, match=r"line 3: expected 3 comma-separated values"):
        load_waveform_table(p)
    p = write(tmp_path, "t,h,theta\n" + "\n".join(good[:2] + ["0.5, 0, 0"] + good[3:]))
    with pytest.raises(InputError, match=r"line 4\) has 0.5 after 1.0"):
        load_waveform_table(p)
    p = write(tmp_path, "\n".join(good[:-1] + ["4, 0.2, 0"]))
    with pytest.raises(InputError, match=r"column h is not periodic: the last sample \(line 5\)"):
        load_waveform_table(p)
    p = write(tmp_path, "\n".join(good[:2] + ["2, nan, 0"] + good[3:]))
    with pytest.raises(InputError, match=r"column h is not finite at sample 2 \(line 3\)"):
        load_waveform_table(p)
    p = write(tmp_path, "t,h,theta\n")
    with pytest.raises(InputError, match="no data rows"):
        load_waveform_table(p)
    with pytest.raises(InputError, match="cannot read waveform table"):
        load_waveform_table(tmp_path / "missing.csv")
    p = write(tmp_path, "\n".join(["0, 0, 0", "1, 0, 1.7", "2, 0, 0", "3, 0, -1.7", "4, 0, 0"]))
    with pytest.raises(InputError, match="tabulated pitch reaches .* below 90 deg"):
        Motion.from_table(load_waveform_table(p))


def test_waveform_table_from_arrays_validates_and_does_not_mutate():
    t = np.linspace(0.0, 1.0, 9)
    h = np.sin(2 * math.pi * t)
    th = 0.2 * np.cos(2 * math.pi * t)
    h_copy, th_copy = h.copy(), th.copy()
    WaveformTable(t=t, h=h, theta=th)
    np.testing.assert_array_equal(h, h_copy)
    np.testing.assert_array_equal(th, th_copy)
    with pytest.raises(InputError, match="at least 4 samples"):
        WaveformTable(t=t[:3], h=h[:3], theta=th[:3])
    with pytest.raises(InputError, match="column theta has shape"):
        WaveformTable(t=t, h=h, theta=th[:-1])


# ---------------------------------------------------------------------------- flapping stroke
def test_roll_axis_points_do_not_move_under_roll_only():
    # Common practice, no single source: points on a rotation axis are fixed.
    root = (0.1, -0.05, 0.2)
    mot = Motion(frequency=2.0, roll_amplitude=60 * DEG, roll_root=root)
    axis_pts = np.array(root) + np.outer(np.linspace(-1.0, 2.0, 7), [1.0, 0.0, 0.0])
    t = np.linspace(0.0, mot.period, 21)
    np.testing.assert_allclose(mot.transform(axis_pts, t), np.broadcast_to(axis_pts, (21, 7, 3)), atol=ROUNDOFF)
    np.testing.assert_allclose(mot.velocity(axis_pts, t), 0.0, atol=ROUNDOFF)
    np.testing.assert_allclose(mot.acceleration(axis_pts, t), 0.0, atol=ROUNDOFF)
    # off-axis points stay at their distance from the axis
    tip = np.array([[0.3, -0.05, 1.2]])
    r = mot.transform(tip, t)[:, 0] - np.array(root)
    np.testing.assert_allclose(np.hypot(r[:, 1], r[:, 2]), 1.0, atol=ROUNDOFF)


def test_positive_roll_raises_a_tip_at_plus_z():
    mot = Motion(frequency=1.0, roll_amplitude=30 * DEG)
    tip = mot.transform([[0.0, 0.0, 1.0]], 0.25)[0]  # phi = +30 deg
    np.testing.assert_allclose(tip, [0.0, math.sin(30 * DEG), math.cos(30 * DEG)], atol=ROUNDOFF)


def test_composition_order_roll_then_pitch_then_plunge():
    # Reference library: scipy.spatial.transform.Rotation builds each factor; the documented order is
    # x_w = R_pitch [R_roll (x - q) + q - p] + p + h e_y.
    q, p = np.array([0.2, 0.0, 0.1]), np.array([0.33, 0.02, 0.0])
    mot = Motion(
        frequency=0.8, plunge_amplitude=0.5, pitch_amplitude=35 * DEG, phase=0.7, pivot=p,
        roll_amplitude=50 * DEG, roll_phase=-0.4, roll_root=q,
    )
    pts = body_points(m=9)
    t = np.linspace(0.0, mot.period, 8)
    world = mot.transform(pts, t)
    flipped = np.empty_like(world)
    for i, ti in enumerate(t):
        h, th, ph = float(mot.plunge(ti)), float(mot.pitch(ti)), float(mot.roll(ti))
        r_pitch = Rotation.from_rotvec([0.0, 0.0, -th]).as_matrix()
        r_roll = Rotation.from_rotvec([-ph, 0.0, 0.0]).as_matrix()
        expect = ((pts - q) @ r_roll.T + q - p) @ r_pitch.T + p + [0.0, h, 0.0]
        np.testing.assert_allclose(world[i], expect, atol=ROUNDOFF)
        # the other order (pitch first, then roll about the pitched root) is a different motion
        flipped[i] = ((pts - p) @ r_pitch.T + p - q) @ r_roll.T + q + [0.0, h, 0.0]
    assert np.max(np.abs(world - flipped)) > 0.05


# ---------------------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    "kwargs, message",
    [
        (dict(frequency=0.0), "frequency must be > 0"),
        (dict(frequency=-1.0), "frequency must be > 0"),
        (dict(frequency=float("nan")), "frequency must be finite"),
        (dict(frequency="fast"), "frequency must be a number"),
        (dict(frequency=1.0, plunge_amplitude=float("nan")), "plunge_amplitude must be finite"),
        (dict(frequency=1.0, plunge_amplitude=-0.1), "plunge_amplitude must be >= 0"),
        (dict(frequency=1.0, pitch_amplitude=math.pi / 2), r"pitch_amplitude must be in \[0, pi/2\)"),
        (dict(frequency=1.0, pitch_amplitude=75.0), r"\(4297.18 deg\); give radians"),
        (dict(frequency=1.0, phase=float("inf")), "phase must be finite"),
        (dict(frequency=1.0, pivot=(0.3, 0.0)), "pivot must be 3 numbers"),
        (dict(frequency=1.0, pivot=(0.3, float("nan"), 0.0)), "pivot must be finite"),
        (dict(frequency=1.0, pivot="centre"), "pivot must be 3 numbers"),
        (dict(frequency=1.0, roll_amplitude=4.0), r"roll_amplitude must be in \[0, pi\)"),
        (dict(frequency=1.0, roll_root=[0, 0]), "roll_root must be 3 numbers"),
        (dict(frequency=1.0, pitch_waveform="square"), "pitch_waveform must be a Waveform"),
    ],
)
def test_bad_motion_input(kwargs, message):
    with pytest.raises(InputError, match=message):
        Motion(**kwargs)


def test_bad_call_input():
    mot = kd_motion()
    with pytest.raises(InputError, match=r"points must be an \(m, 3\) array .* got shape \(3,\)"):
        mot.velocity([1.0, 0.0, 0.0], 0.0)
    with pytest.raises(InputError, match="times must be finite"):
        mot.pose([0.0, float("nan")])
    with pytest.raises(InputError, match="speed must be > 0"):
        flow_numbers(mot, 1.0, 0.0, 1e-3)
    with pytest.raises(InputError, match="speed must be > 0"):
        mot.effective_angle(0.0, -1.0)
    with pytest.raises(InputError, match="viscosity must be finite"):
        flow_numbers(mot, 1.0, 1.0, float("nan"))
    with pytest.raises(InputError, match="te_point must be 3 numbers"):
        flow_numbers(mot, 1.0, 1.0, 1e-3, te_point=(1.0, 0.0))
    with pytest.raises(InputError, match="sharpness must be >= 0"):
        SmoothSquareWave(-1.0)
    with pytest.raises(InputError, match="needs a WaveformTable"):
        Motion.from_table(np.zeros((5, 3)))


def test_inputs_are_not_mutated():
    mot = MOTIONS[1]
    pts = body_points(m=5)
    t = np.linspace(0.0, 1.0, 4)
    pts_copy, t_copy = pts.copy(), t.copy()
    mot.velocity(pts, t)
    mot.acceleration(pts, t)
    mot.pose(t)
    mot.speed_extrema(pts)
    np.testing.assert_array_equal(pts, pts_copy)
    np.testing.assert_array_equal(t, t_copy)


def test_motion_is_frozen_and_replaceable():
    import dataclasses

    mot = kd_motion()
    with pytest.raises(dataclasses.FrozenInstanceError, match="cannot assign"):
        mot.frequency = 2.0
    faster = dataclasses.replace(mot, frequency=0.28)
    assert faster.period == pytest.approx(mot.period / 2, rel=ROUNDOFF)
    with pytest.raises(InputError, match="frequency must be > 0"):
        dataclasses.replace(mot, frequency=0.0)


# ---------------------------------------------------------------------------- more properties
def test_roll_only_tip_speed_is_omega_phi0_times_the_lever():
    # [computed] phi = phi0 sin(omega t): a point at distance L from the roll axis moves at L |phi_dot|,
    # peak L phi0 omega at phi = 0, in the y-z plane.
    mot = Motion(frequency=3.0, roll_amplitude=70 * DEG)
    tip = np.array([[0.4, 0.0, 0.25]])
    times, speeds = mot.speed_extrema(tip)
    assert speeds.max() == pytest.approx(0.25 * 70 * DEG * mot.angular_frequency, rel=1e-10)
    v = mot.velocity(tip, np.linspace(0.0, mot.period, 9))[:, 0]
    np.testing.assert_allclose(v[:, 0], 0.0, atol=ROUNDOFF)


def test_static_body_has_zero_speeds_and_undefined_feathering():
    mot = Motion(frequency=1.0)
    num = flow_numbers(mot, 1.0, 1.0, 1e-3, surface_points=body_points(m=3))
    assert num.max_te_speed == 0.0 and num.max_surface_speed == 0.0
    assert num.max_te_speed_relative == pytest.approx(1.0, rel=ROUNDOFF)  # the stream passes a still body
    assert num.strouhal == num.strouhal_te == num.alpha_max == 0.0
    assert math.isnan(num.feathering)
    pitching = flow_numbers(Motion(frequency=1.0, pitch_amplitude=0.2), 1.0, 1.0, 1e-3)
    assert pitching.feathering == math.inf


def test_speed_extrema_needs_enough_samples():
    with pytest.raises(InputError, match="samples must be >= 16"):
        kd_motion().speed_extrema([[1.0, 0.0, 0.0]], samples=4)


@settings(max_examples=40, deadline=None, derandomize=True)
@given(
    f=st.floats(0.05, 20.0),
    h0=st.floats(0.0, 2.0),
    th0=st.floats(0.0, 1.5),
    phase=st.floats(-7.0, 7.0),
    ph0=st.floats(0.0, 3.0),
    pivot=st.tuples(*[st.floats(-1.0, 1.0)] * 3),
    root=st.tuples(*[st.floats(-1.0, 1.0)] * 3),
    frac=st.floats(0.0, 1.0),
)
def test_any_motion_is_rigid_with_a_consistent_rate(f, h0, th0, phase, ph0, pivot, root, frac):
    # Common practice, no single source: R orthonormal with det +1 and v = v_ref + Omega x (x - x_ref).
    mot = Motion(
        frequency=f, plunge_amplitude=h0, pitch_amplitude=th0, phase=phase, pivot=pivot,
        roll_amplitude=ph0, roll_phase=-phase, roll_root=root,
    )
    t = frac * mot.period
    R = mot.pose(t)[:3, :3]
    np.testing.assert_allclose(R.T @ R, np.eye(3), atol=ROUNDOFF)
    assert np.linalg.det(R) == pytest.approx(1.0, abs=ROUNDOFF)
    pts = body_points(m=4)
    v, x = mot.velocity(pts, t), mot.transform(pts, t)
    om = mot.angular_velocity(t)
    scale = 1.0 + np.abs(v).max()
    np.testing.assert_allclose(v, v[:1] + np.cross(om, x - x[:1]), atol=1e-12 * scale)
