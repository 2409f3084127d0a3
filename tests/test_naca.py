"""NACA 4-digit sections: ordinates, areas, nose radius, outline invariants."""

import dataclasses
import pickle

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.optimize import brentq

from ibprep.errors import InputError
from ibprep.geometry.naca import Section, cosine_stations, naca4, parse_naca4

# Printed ordinates are in per cent of chord; tolerances below are in per cent of chord.
TOL_0012_PCT = 0.002  # 0012 table printed to 3 decimals (REFERENCES §1.7)
TOL_CAMBERED_PCT = 0.02  # 2412/4412 tables printed to 2 decimals, hand-faired (REFERENCES §1.7)
ROUNDOFF = 1e-12  # double-precision evaluation of closed-form expressions, chord units

STATIONS_PCT = np.array([1.25, 2.5, 5, 7.5, 10, 15, 20, 25, 30, 40, 50, 60, 70, 80, 90, 95, 100])

# Abbott & von Doenhoff (1959), Theory of Wing Sections, Appendix I, NACA 0012 (original, open TE).
# [memory: medium-high] via REFERENCES §1.7; the 20 %c entry is memory (5.737) while the
# equation gives 5.7375 -- both lie inside the tolerance.
NACA0012_PCT = np.array(
    [1.894, 2.615, 3.555, 4.200, 4.683, 5.345, 5.737, 5.941, 6.002, 5.803, 5.294, 4.563, 3.664,
     2.623, 1.448, 0.807, 0.126]
)
# Abbott & von Doenhoff (1959), Appendix I, NACA 2412 and 4412. [memory: medium] via REFERENCES §1.7.
NACA2412_UPPER = [2.15, 2.99, 4.13, 4.96, 5.63, 6.61, 7.26, 7.67, 7.88, 7.80, 7.24, 6.36, 5.18, 3.75, 2.08, 1.14, 0.13]
NACA2412_LOWER = [-1.65, -2.27, -3.01, -3.46, -3.75, -4.10, -4.23, -4.22, -4.12, -3.80, -3.34, -2.76, -2.14, -1.50, -0.82, -0.48, -0.13]
NACA4412_UPPER = [2.44, 3.39, 4.73, 5.76, 6.59, 7.89, 8.80, 9.41, 9.76, 9.80, 9.19, 8.14, 6.69, 4.89, 2.71, 1.47, 0.13]
NACA4412_LOWER = [-1.43, -1.95, -2.49, -2.74, -2.86, -2.88, -2.74, -2.50, -2.26, -1.80, -1.40, -1.00, -0.65, -0.39, -0.22, -0.16, -0.13]


def _surface_at_station(sec: Section, station: float, upper: bool) -> float:
    """Ordinate of a surface at chord position ``station``, solving x_U(x) = station.

    The upper surface dips ahead of x = 0 on cambered sections (REFERENCES §1.5), so
    the root is searched on the branch after that minimum.
    """
    fn = sec.upper if upper else sec.lower
    if station >= 1.0:
        return float(fn(np.array([1.0]))[1][0])
    lo = 0.01 * station if upper else 0.0
    x = brentq(lambda s: fn(np.array([s]))[0][0] - station, lo, 1.0, xtol=1e-15)
    return float(fn(np.array([x]))[1][0])


def _is_simple(x, y) -> bool:
    """True when no two non-adjacent edges of the closed polygon intersect (brute force, O(n^2))."""
    p = np.column_stack([x, y])
    q = np.roll(p, -1, axis=0)
    n = len(p)
    i, j = np.triu_indices(n, k=2)
    keep = ~((i == 0) & (j == n - 1))  # first and last edges share a vertex
    i, j = i[keep], j[keep]

    def orient(a, b, c):
        return np.sign((b[:, 0] - a[:, 0]) * (c[:, 1] - a[:, 1]) - (b[:, 1] - a[:, 1]) * (c[:, 0] - a[:, 0]))

    a, b, c, d = p[i], q[i], p[j], q[j]
    crossing = (orient(a, b, c) * orient(a, b, d) < 0) & (orient(c, d, a) * orient(c, d, b) < 0)
    return not crossing.any()


def _signed_area(x, y):
    return 0.5 * np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y)


# -- ordinates against the printed tables ------------------------------------------------------
def test_naca0012_ordinates_match_abbott_appendix_table():
    # Source: Abbott & von Doenhoff (1959), Appendix I, NACA 0012 [memory: medium-high].
    sec = naca4("0012", closed_te=False)
    y_pct = 100 * sec.thickness(STATIONS_PCT / 100)
    err = np.abs(y_pct - NACA0012_PCT)
    assert err.max() < TOL_0012_PCT, f"max error {err.max():.4g} %c at {STATIONS_PCT[err.argmax()]} %c"


@pytest.mark.parametrize(
    "code, upper_table, lower_table",
    [("2412", NACA2412_UPPER, NACA2412_LOWER), ("4412", NACA4412_UPPER, NACA4412_LOWER)],
)
def test_cambered_ordinates_match_abbott_appendix_tables(code, upper_table, lower_table):
    # Source: Abbott & von Doenhoff (1959), Appendix I, NACA 2412 / 4412 [memory: medium];
    # surfaces interpolated at the nominal station as the printed tables are (REFERENCES §1.7).
    sec = naca4(code, closed_te=False)
    yu = [100 * _surface_at_station(sec, s / 100, True) for s in STATIONS_PCT]
    yl = [100 * _surface_at_station(sec, s / 100, False) for s in STATIONS_PCT]
    assert np.max(np.abs(np.subtract(yu, upper_table))) < TOL_CAMBERED_PCT
    assert np.max(np.abs(np.subtract(yl, lower_table))) < TOL_CAMBERED_PCT


def test_reproduced_4_decimal_2412_table_matches_equation():
    # Source: a reproduced 4-decimal NACA 2412 upper-surface table at nominal stations
    # [checked: a reproduced table on a secondary web page] via REFERENCES §1.7; printed to 1e-4 %c.
    table = [2.1606, 2.9863, 4.1304, 4.9677, 5.6291, 6.6073, 7.2607, 7.6695, 7.8785, 7.803, 7.2425,
             6.3506, 5.1778, 3.7497, 2.0711, 1.1341, 0.1275]
    sec = naca4("2412", closed_te=False)
    yu = [100 * _surface_at_station(sec, s / 100, True) for s in STATIONS_PCT]
    # 2e-3 %c: the generator behind that table interpolates near the nose and the trailing edge
    # slightly differently (largest gaps 6e-4 at 1.25 %c, 1.8e-3 at 100 %c); elsewhere < 2e-4.
    assert np.max(np.abs(np.subtract(yu, table))) < 2e-3


def test_exact_point_at_maximum_camber():
    # At x = p the camber slope is 0, so y_U = m + y_t(p) exactly: REFERENCES §1.7 [computed]
    # (2412: 2.000 + 5.803; 4412: 4.000 + 5.803 per cent of chord).
    for code, expected_pct in [("2412", 7.803), ("4412", 9.803)]:
        sec = naca4(code, closed_te=False)
        xu, yu = sec.upper(np.array([sec.p]))
        assert xu[0] == pytest.approx(sec.p, abs=ROUNDOFF)
        assert yu[0] == pytest.approx(sec.m + sec.thickness(np.array([sec.p]))[0], abs=ROUNDOFF)
        assert 100 * yu[0] == pytest.approx(expected_pct, abs=1e-3)  # table value to 3 decimals


def test_symmetric_surfaces_are_plus_minus_thickness():
    # Thickness perpendicular to a flat camber line reduces to y = +-y_t (REFERENCES §1.5) [computed].
    sec = naca4("0015")
    x = cosine_stations(40)
    xu, yu = sec.upper(x)
    xl, yl = sec.lower(x)
    np.testing.assert_array_equal(xu, x)
    np.testing.assert_array_equal(xl, x)
    np.testing.assert_allclose(yu, sec.thickness(x), atol=ROUNDOFF)
    np.testing.assert_allclose(yl, -sec.thickness(x), atol=ROUNDOFF)


def test_open_and_closed_thickness_differ_by_the_quartic_term():
    # Delta y_t = 5 t (0.1036 - 0.1015) x^4 = 0.0105 t x^4: REFERENCES §1.2 [computed].
    x = np.linspace(0, 1, 101)
    opened, closed = naca4("0012", closed_te=False), naca4("0012", closed_te=True)
    np.testing.assert_allclose(opened.thickness(x) - closed.thickness(x), 0.0105 * 0.12 * x**4, atol=ROUNDOFF)


def test_camber_line_facts():
    # y_c(0) = y_c(1) = 0, max m at p, slopes 2m/p and -2m/(1-p) at the ends: REFERENCES §1.4
    # [computed] (2412: +0.1000 / -0.0667).
    sec = naca4("2412")
    assert sec.camber(np.array([0.0, 1.0])) == pytest.approx([0.0, 0.0], abs=ROUNDOFF)
    x = np.linspace(0, 1, 100001)
    assert sec.camber(x).max() == pytest.approx(0.02, abs=ROUNDOFF)
    assert x[sec.camber(x).argmax()] == pytest.approx(0.4, abs=1e-5)
    assert sec.camber_slope(np.array([0.0, 1.0])) == pytest.approx([0.1, -0.04 / 0.6], abs=ROUNDOFF)
    # slope continuous at p (both branches 0)
    assert sec.camber_slope(np.array([0.4 - 1e-12, 0.4 + 1e-12])) == pytest.approx([0, 0], abs=1e-10)


# -- areas -----------------------------------------------------------------------------------
@pytest.mark.parametrize("closed_te, coefficient", [(False, 2.05525 / 3), (True, 2.04265 / 3)])
def test_symmetric_area_converges_to_the_exact_integral(closed_te, coefficient):
    # A = 2 int y_t dx = 0.685083 t (open) / 0.680883 t (closed): REFERENCES §1.6 [computed].
    t = 0.12
    exact = coefficient * t
    ns = [81, 161, 321, 641, 1281]
    errors = np.array([exact - naca4("0012", n=n, closed_te=closed_te).area for n in ns])
    # The section is convex, so the inscribed polygon lies inside it: a one-sided bound.
    assert np.all(errors > 0)
    # Second-order convergence in the number of points (ratio -> 4 per doubling).
    ratios = errors[:-1] / errors[1:]
    assert np.all(ratios > 3.5) and np.all(ratios < 4.5), ratios
    assert errors[-1] / exact < 2e-5  # 2e-5 relative at n = 1281
    assert errors[1] / exact < 3e-4  # 3e-4 relative at the default n = 161


@pytest.mark.parametrize("code, table_area", [("2412", 0.0822821), ("4412", 0.0824974)])
def test_cambered_area_identity(code, table_area):
    # A = 2 int y_t sqrt(1 + yc'^2) dx: REFERENCES §1.6 identity (the compiler's derivation,
    # [computed]); reference integral by scipy.integrate.quad.
    sec = naca4(code, closed_te=False)
    integrand = lambda s: 2 * sec.thickness(np.array([s]))[0] * np.sqrt(1 + sec.camber_slope(np.array([s]))[0] ** 2)
    exact = quad(integrand, 0, sec.p, epsabs=1e-14, epsrel=1e-13)[0] + quad(integrand, sec.p, 1, epsabs=1e-14, epsrel=1e-13)[0]
    assert exact == pytest.approx(table_area, abs=1e-7)  # REFERENCES §1.6 table, 7 decimals
    fine = naca4(code, n=4001, closed_te=False).area
    assert fine == pytest.approx(exact, rel=2e-6)  # polygon error ~ C/n^2 at n = 4001
    assert exact > naca4("0012", n=4001, closed_te=False).area  # cambered area exceeds the symmetric one


# -- nose radius and trailing edge ------------------------------------------------------------
def test_leading_edge_radius():
    # r = 1.1019 t^2: Abbott & von Doenhoff (1959) four-digit section [memory: high];
    # NACA 0012 table L.E. radius 1.58 %c [checked: secondary drafting page quoting the table].
    for code in ["0006", "0012", "2412", "0024"]:
        sec = naca4(code)
        assert sec.le_radius == pytest.approx(1.1019 * sec.t**2, rel=5e-5)  # 1.10187 vs 1.1019
        # Osculating circle of the equation: y_t^2 -> 2 r x as x -> 0 (REFERENCES §1.3, [computed]).
        x = np.array([1e-12])
        assert sec.thickness(x)[0] ** 2 / (2 * x[0]) == pytest.approx(sec.le_radius, rel=1e-5)
    assert 100 * naca4("0012").le_radius == pytest.approx(1.58, abs=0.01)  # table rounds 1.587 down


@pytest.mark.parametrize("code", ["0012", "2412", "4412"])
def test_trailing_edge_thickness(code):
    # Open TE: full thickness 0.021 t; closed TE: 0 (REFERENCES §1.1, §1.2 [computed]).
    opened = naca4(code, closed_te=False)
    gap = np.hypot(opened.x[0] - opened.x[-1], opened.y[0] - opened.y[-1])
    assert gap == pytest.approx(0.021 * opened.t, abs=ROUNDOFF)
    assert opened.te_thickness == pytest.approx(0.021 * opened.t, abs=ROUNDOFF)
    closed = naca4(code, closed_te=True)
    assert closed.te_thickness == 0.0 and closed.te_thickness >= 0.0  # exactly, not -7e-17 (documented 0)
    assert closed.x[0] == pytest.approx(1.0, abs=ROUNDOFF) and closed.y[0] == pytest.approx(0.0, abs=ROUNDOFF)
    assert np.count_nonzero(closed.x > 1 - 1e-12) == 1  # one trailing-edge point


# -- the outline loop ------------------------------------------------------------------------
@pytest.mark.parametrize("code", ["0012", "2412", "4412", "6409", "0030"])
@pytest.mark.parametrize("closed_te", [True, False])
@pytest.mark.parametrize("n", [5, 6, 160, 161])
def test_loop_is_ccw_with_n_distinct_points(code, closed_te, n):
    # Common practice, no single source: a simple polygon, counter-clockwise, not repeating its start.
    sec = naca4(code, n=n, closed_te=closed_te)
    assert sec.x.shape == sec.y.shape == (n,)
    assert _signed_area(sec.x, sec.y) > 0
    pts = sec.loop
    assert len(np.unique(pts.round(14), axis=0)) == n
    seg = np.hypot(np.diff(sec.x, append=sec.x[0]), np.diff(sec.y, append=sec.y[0]))
    assert seg.min() > 0
    # the leading edge (0, 0) is a point of every loop
    assert np.min(np.hypot(sec.x, sec.y)) == 0.0
    assert _is_simple(sec.x, sec.y)


def test_loop_points_are_on_the_equations():
    # Internal consistency: every loop point is an upper or lower surface point of the equations.
    sec = naca4("4412", n=101, closed_te=False)
    ku = sec.upper_segments
    xs = cosine_stations(ku)
    xu, yu = sec.upper(xs)
    np.testing.assert_array_equal(sec.x[: ku + 1], xu[::-1])
    np.testing.assert_array_equal(sec.y[: ku + 1], yu[::-1])


def test_cosine_stations_cluster_at_both_edges():
    x = cosine_stations(80)
    dx = np.diff(x)
    assert x[0] == 0.0 and x[-1] == 1.0 and np.all(dx > 0)
    assert dx[0] == pytest.approx(dx[-1], rel=1e-9) and dx[0] < dx[40] / 40


def test_section_is_frozen_and_arrays_read_only():
    sec = naca4("0012")
    back = pickle.loads(pickle.dumps(sec))
    assert back == sec and not back.x.flags.writeable
    np.testing.assert_array_equal(back.y, sec.y)
    assert dataclasses.replace(sec, n=41).x.shape == (41,)
    with pytest.raises(dataclasses.FrozenInstanceError, match="cannot assign"):
        sec.t = 0.2
    with pytest.raises(ValueError, match="read-only"):
        sec.x[0] = 3.0


# -- input handling --------------------------------------------------------------------------
@pytest.mark.parametrize("code", ["0012", "NACA 0012", "naca0012", "NACA-0012", " Naca_0012 "])
def test_accepted_spellings(code):
    assert naca4(code).code == "0012"
    assert parse_naca4(code) == ("0012", 0.0, 0.0, 0.12)


@pytest.mark.parametrize(
    "code, match",
    [
        ("12", "not a NACA 4-digit code"),
        ("00120", "not a NACA 4-digit code"),
        ("NACA 23012", "not a NACA 4-digit code"),
        ("00x2", "not a NACA 4-digit code"),
        ("", "not a NACA 4-digit code"),
        ("0000", "zero thickness"),
        ("2012", "position digit is 0"),
        ("0412", "zero camber"),
        (12, "must be a string"),
        (None, "must be a string"),
    ],
)
def test_rejected_codes(code, match):
    with pytest.raises(InputError, match=match):
        naca4(code)


@pytest.mark.parametrize("n", [4, 0, -3, 2.5, True, "161"])
def test_rejected_point_counts(n):
    with pytest.raises(InputError, match="number of points"):
        naca4("0012", n=n)


def test_rejected_stations():
    with pytest.raises(InputError, match=r"in \[0, 1\]"):
        naca4("0012").thickness(np.array([-0.1, 0.5]))


def test_simplicity_helper_sees_a_crossing():
    # The bow-tie (0,0) (1,1) (1,0) (0,1) crosses itself; a square does not.
    assert not _is_simple(np.array([0, 1, 1, 0.0]), np.array([0, 1, 0, 1.0]))
    assert _is_simple(np.array([0, 1, 1, 0.0]), np.array([0, 0, 1, 1.0]))
