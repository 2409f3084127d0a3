"""The pre-flight gate: verdicts, and each family failing on the case that should fail it."""

import json

import numpy as np

import pytest

from cases import SMALL_CASE, SMALL_CASE_2D, TANDEM_CASE
from ibprep import parse_case, preflight


@pytest.fixture(scope="module")
def small_report():
    return preflight(parse_case(SMALL_CASE))


def _by_id(report):
    return {c.id: c for c in report.checks}


def test_small_case_passes_with_every_family_present(small_report):
    checks = _by_id(small_report)
    assert small_report.verdict in ("pass", "warn"), [c for c in small_report.checks if c.status == "fail"]
    families = {c.id.split(".")[0] for c in small_report.checks}
    assert families == {"surface", "domain", "resolution", "refine", "time", "stencil"}
    assert checks["stencil.ok"].status == "pass"
    assert checks["surface.closed"].status == "pass"
    # A sharp trailing edge is always thinner than two cells: said, not failed.
    assert checks["surface.thin"].status == "warn"
    st = small_report.figures["stencils"]
    assert st["checked_steps"] >= 4 and st["stencils_built"] > 0
    assert st["max_fresh_cells"] > 0  # consecutive step pairs expose real fresh cells


def test_report_json_has_the_contract_shape(small_report):
    d = json.loads(small_report.to_json())
    assert set(d) >= {"verdict", "checks", "figures", "caution"}
    for c in d["checks"]:
        assert set(c) == {"id", "status", "value", "limit", "unit", "message", "hint"}
        assert c["status"] in ("pass", "warn", "fail")
    assert "does not validate a simulation" in d["caution"]
    assert d["figures"]["numbers"]["reynolds"] == pytest.approx(1000)


def _variant(old, new):
    assert old in SMALL_CASE, old
    return parse_case(SMALL_CASE.replace(old, new))


def test_time_step_far_too_large_fails_time_family():
    # Limits: Courant number <= 1 (Courant, Friedrichs & Lewy 1928; REFERENCES §4.3 [memory: high]) and surface
    # travel below one cell per step (Udaykumar et al. 2001; Mittal et al. 2008; REFERENCES §3.2 [memory: medium]).
    # Here the body alone moves 0.2 s * 0.0565 m/s = 3.8 cells of 3 mm per step.
    rep = preflight(_variant("step = 0.002", "step = 0.2"))
    checks = _by_id(rep)
    assert rep.verdict == "fail"
    assert checks["time.cfl"].status == "fail" and checks["time.travel"].status == "fail"
    assert "reduce the time step" in checks["time.travel"].hint


def test_grid_too_coarse_fails_resolution():
    # Cells per chord against the [checks] limit (common practice, no single source; REFERENCES §4.4 [memory: low-medium]).
    rep = preflight(_variant("spacing = 0.006", "spacing = 0.024"))
    checks = _by_id(rep)
    assert checks["resolution.chord"].status == "fail"
    assert checks["resolution.chord"].value == pytest.approx(5.0)  # c / h = 0.06 / 0.012
    assert rep.verdict == "fail"


def test_refinement_box_missing_the_body_fails_refine():
    rep = preflight(_variant("lower = [-0.03, -0.06, -0.015]", "lower = [0.03, -0.06, -0.015]"))
    checks = _by_id(rep)
    assert checks["refine.envelope"].status == "fail"
    assert rep.verdict == "fail"


def test_domain_the_plunging_body_leaves_fails_domain():
    # Plunge 0.115 m in a domain of half-height 0.12 m: the wing's thickness alone reaches the faces (geometry).
    rep = preflight(_variant("plunge_amplitude = 0.03", "plunge_amplitude = 0.115"))
    checks = _by_id(rep)
    assert checks["domain.inside"].status == "fail"
    assert "face" in checks["domain.inside"].message
    assert rep.verdict == "fail"
    # Both y faces are too close, and one run names both (it used to name the nearest only).
    msg = checks["domain.inside"].message
    assert "lower y face" in msg and "upper y face" in msg, msg
    assert "lower y face by at least" in checks["domain.inside"].hint and "upper y face" in checks["domain.inside"].hint


def test_two_dimensional_section_case():
    case = parse_case(SMALL_CASE_2D)
    assert case.ndim == 2 and case.grid.finest.shape == (160, 100)
    rep = preflight(case)
    checks = _by_id(rep)
    assert "domain.spanwise" not in checks  # no span in 2-D
    assert checks["stencil.ok"].status == "pass", checks["stencil.ok"].message
    assert checks["resolution.chord"].value == pytest.approx(60.0)  # c / h = 0.06 / 0.001
    assert rep.verdict in ("pass", "warn")
    # The same section with a step far too large fails the time family.
    bad = preflight(parse_case(SMALL_CASE_2D.replace("step = 0.002", "step = 0.05")))
    assert _by_id(bad)["time.travel"].status == "fail"


def test_two_dimensional_case_rejects_three_dimensional_keys():
    from ibprep import InputError

    with pytest.raises(InputError, match=r"\[body\] span has no meaning in a 2-D case"):
        parse_case(SMALL_CASE_2D.replace("chord = 0.06", "chord = 0.06\nspan = 0.1"))


def test_tandem_pair_checks_both_bodies_and_their_gap():
    case = parse_case(TANDEM_CASE)
    assert [b.name for b in case.bodies] == ["fore", "aft"]
    # The aft body is placed 0.09 m downstream; its pivot moves with it.
    assert case.bodies[1].motion.pivot == pytest.approx((0.11, 0.0, 0.0))
    assert np.asarray(case.bodies[1].surface.vertices)[:, 0].min() == pytest.approx(0.09, abs=1e-9)
    rep = preflight(case)
    checks = _by_id(rep)
    assert checks["stencil.ok"].status == "pass", checks["stencil.ok"].message
    gap = checks["resolution.gap"]
    # At rest the gap is 0.09 - 0.06 = 0.03 m = 10 cells; pitching brings the edges closer, never farther apart
    # than the rest gap plus the edge excursions.
    assert 0 < gap.value < 10.5 and gap.status == "pass"
    assert "fore" in gap.message and "aft" in gap.message and "t = " in gap.message


def test_tandem_pair_too_close_fails_the_gap_check():
    # "A gap under about two cells starves stencils" (common practice, no single source): rest gap 3 mm = 1 cell.
    rep = preflight(parse_case(TANDEM_CASE.replace("offset = [0.09, 0.0, 0.0]", "offset = [0.063, 0.0, 0.0]")))
    gap = _by_id(rep)["resolution.gap"]
    assert gap.status == "fail" and gap.value < 2
    assert rep.verdict == "fail"


def test_a_value_just_past_its_limit_never_prints_as_the_limit():
    # A warning that read "1.99 -> '2' chords, below the common-practice 2" contradicted itself.
    from ibprep.checks.preflight import _above, _below, _near

    assert _near(1.9987, 2.0) == "1.999"
    assert _near(4.99996, 5.0) == "4.99996"
    assert _near(1.8, 2.0) == "1.8"
    assert _near(2.0, 2.0) == "2"
    chk = _above("time.cfl", 1.0004, 0.8, 1.0, "", "Courant number", "reduce the time step")
    assert chk.status == "fail" and "1.0004, above the maximum 1" in chk.message
    # Limits a user set with more digits: the value stays on its side of the limit as printed.
    assert "1.2344, above the maximum 1.2342" in _above("c", 1.2344, 0.5, 1.2342, "", "Courant number", "").message
    assert "1.23 cells, below the advised 1.2345" in _below("g", 1.2341, 1.2345, 0.1, "cells", "Cells", "").message
    assert "2.0000001, above the maximum 2.00000005" in _above("c", 2.0000001, 0.5, 2.00000005, "", "C", "").message


def test_one_chord_or_cell_is_singular():
    # A 2-D case of our own printed "the finest box reaches 1 chords behind the swept body".
    from ibprep.checks.preflight import _below, _counted

    assert _counted("1", "chords") == "1 chord"
    assert _counted("1.02", "chords") == "1.02 chords"
    assert _counted("1", "cells") == "1 cell"
    assert _counted("1", "s") == "1 s"
    assert "gap: 1 cell, below the advised 4" in _below("g", 1.0, 4.0, 0.5, "cells", "gap", "").message


def test_a_plain_naca_0012_wing_at_64_cells_per_chord_passes_the_thin_check_with_default_limits():
    # Its only thin part is the taper of its sharp trailing edge (about 11 % of the area at 64 cells per
    # chord [computed]); with the default thin_fraction_max (10 %) it used to fail. Now it warns, naming
    # the taper, and a plate the same grid cannot hold still fails.
    from ibprep.checks.preflight import _surface_checks

    text = SMALL_CASE.replace("thin_fraction_max = 0.95\n", "")
    case = parse_case(text)
    assert case.checks.thin_fraction_max == 0.10
    h = case.chord / 64
    thin = {c.id: c for c in _surface_checks(case, h, {})}["surface.thin"]
    assert thin.status == "warn", thin.message
    assert "taper of a sharp edge" in thin.message and thin.value == 0.0
    # The same wing at 16 cells per chord: its whole section is thinner than two cells (0.12 c < 2 c/16)
    # away from the edge too, and it fails.
    thin16 = {c.id: c for c in _surface_checks(case, case.chord / 16, {})}["surface.thin"]
    assert thin16.status == "fail", thin16.message
