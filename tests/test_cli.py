"""The command line, in process (main([...])) and once as a subprocess."""

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest

from cases import SMALL_CASE, with_surface
from ibprep.cli import main

ROOT = Path(__file__).resolve().parents[1]


def _case(tmp_path, text=SMALL_CASE, name="case.toml"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_check_passes_and_writes_json_and_plots(tmp_path, capsys):
    case = _case(tmp_path)
    out = tmp_path / "report.json"
    rc = main(["check", str(case), "--json", str(out), "--plots", str(tmp_path / "plots"), "--no-progress"])
    text = capsys.readouterr().out
    assert rc == 0, text
    assert "verdict: WARN" in text or "verdict: PASS" in text
    assert "does not validate a simulation" in text
    d = json.loads(out.read_text())
    assert d["verdict"] in ("pass", "warn")
    for png in ("motion.png", "steps.png", "tags.png"):
        data = (tmp_path / "plots" / png).read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n"


def test_failing_case_exits_1(tmp_path, capsys):
    case = _case(tmp_path, SMALL_CASE.replace("step = 0.002", "step = 0.2"))
    assert main(["check", str(case), "--no-progress"]) == 1
    out = capsys.readouterr().out
    assert "FAIL  time.cfl" in out and "verdict: FAIL" in out


@pytest.mark.parametrize(
    "edit, pattern",
    [
        (("frequency = 0.25", "frequncy = 0.25"), r"unknown key 'frequncy'; did you mean 'frequency'"),
        (("spacing = 0.006", "spacing = -0.006"), r"\[grid\] spacing must be > 0"),
        (("speed = 0.1", "speed = nan"), r"\[flow\] speed must be finite"),
        (('section = "0012"', 'surface = "missing.stl"'), r"surface: file .*missing.stl.* not found"),
    ],
)
def test_bad_input_exits_2_with_one_line_and_keeps_existing_json(tmp_path, capsys, edit, pattern):
    import re

    case = _case(tmp_path, SMALL_CASE.replace(*edit))
    existing = tmp_path / "old.json"
    existing.write_text('{"keep": true}')
    rc = main(["check", str(case), "--json", str(existing)])
    err = capsys.readouterr().err
    assert rc == 2
    assert err.count("\n") == 1 and "Traceback" not in err
    assert re.search(pattern, err), err
    assert existing.read_text() == '{"keep": true}'


def test_open_stl_exits_2(tmp_path, capsys):
    # A single triangle: an open surface.
    stl = tmp_path / "open.stl"
    stl.write_text("solid t\nfacet normal 0 0 1\nouter loop\nvertex 0 0 0\nvertex 1 0 0\nvertex 0 1 0\n"
                   "endloop\nendfacet\nendsolid t\n")
    case = _case(tmp_path, with_surface(SMALL_CASE, "open.stl"))
    assert main(["check", str(case)]) == 2
    err = capsys.readouterr().err
    assert "open" in err and "Traceback" not in err


def test_usage_errors_exit_2(capsys):
    assert main(["check"]) == 2
    assert main(["frobnicate"]) == 2
    assert main([]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err


def test_size_prints_a_pasteable_block(tmp_path, capsys):
    case = _case(tmp_path)
    assert main(["size", str(case)]) == 0
    out = capsys.readouterr().out
    assert "[[grid.refine]]" in out and "finest spacing" in out
    block = out[out.index("\n[[grid.refine]]") + 1:]
    # The pasted block is valid TOML for the case file.
    import tomllib

    boxes = tomllib.loads(block)["grid"]["refine"]
    assert len(boxes) >= 1 and all(len(b["lower"]) == 3 for b in boxes)


def _paste_refine(text: str, block: str) -> str:
    """The case text with its [[grid.refine]] blocks replaced by ``block`` (placed after [grid])."""
    import re

    text = re.sub(r"\[\[grid\.refine\]\]\nlower = \[[^\]]*\]\nupper = \[[^\]]*\]\n", "", text)
    head, tail = text.split("\n[time]", 1)
    return head.rstrip("\n") + "\n" + block.strip() + "\n\n[time]" + tail


@pytest.mark.parametrize("spacing, target", [("0.006", None), ("0.0075", 0.00046875)])
def test_size_block_pasted_into_the_case_gives_the_promised_cells(tmp_path, capsys, spacing, target):
    # The printed corners round-trip exactly: pasted back they snap to the same cells, never out of the
    # domain. With a finest spacing of 0.00046875 m the faces need 7 digits (0.1078125): printed to 6 they used to
    # snap outward by a cell or be refused as reaching outside the domain.
    import ibprep

    text = SMALL_CASE.replace("spacing = 0.006", f"spacing = {spacing}")
    if target is not None:
        text += f"\n[sizing]\ntarget_spacing = {target}\n"
    case = _case(tmp_path, text)
    assert main(["size", str(case)]) == 0
    out = capsys.readouterr().out
    promised = int(out[out.index("  total ") + 8:].split(" cells")[0].replace(",", ""))
    block = out[out.index("\n[[grid.refine]]") + 1:]
    pasted = _case(tmp_path, _paste_refine(text, block), "pasted.toml")
    assert ibprep.load_case(pasted).grid.total_cells == promised
    # And each printed corner is the level's face itself, to the last bit.
    import tomllib

    levels = ibprep.load_case(pasted).grid.levels[1:]
    boxes = tomllib.loads(block)["grid"]["refine"]
    assert [(tuple(b["lower"]), tuple(b["upper"])) for b in boxes] == [(g.lower, g.upper) for g in levels]


def test_size_sizes_for_the_most_demanding_body(tmp_path, capsys):
    # Two bodies, the second with half the chord: the finest spacing follows the smaller chord.
    from cases import TANDEM_CASE

    import ibprep

    text = TANDEM_CASE.replace('name = "aft"\nsection = "0012"\nchord = 0.06', 'name = "aft"\nsection = "0012"\nchord = 0.03')
    case = ibprep.parse_case(text)
    chords = sorted(b.chord for b in case.bodies)
    assert chords == [0.03, 0.06]
    p = _case(tmp_path, text)
    assert main(["size", str(p)]) == 0
    out = capsys.readouterr().out
    per_chord = float(out.split("cells per chord")[1].split("h <=")[1].split()[0])
    assert per_chord == pytest.approx(chords[0] / case.checks.cells_per_chord_warn, rel=1e-3)
    assert "most demanding" in out


def test_size_of_a_2d_case_speaks_in_two_components(tmp_path, capsys):
    from cases import SMALL_CASE_2D

    assert main(["size", str(_case(tmp_path, SMALL_CASE_2D))]) == 0
    out = capsys.readouterr().out
    env = out[out.index("swept envelope"):].splitlines()[1:3]
    # "  lower (x, y)": two numbers, no depth of the extruded prism.
    assert all(line.count(",") == 1 for line in env), env
    import tomllib

    boxes = tomllib.loads(out[out.index("\n[[grid.refine]]") + 1:])["grid"]["refine"]
    assert all(len(b["lower"]) == 2 and len(b["upper"]) == 2 for b in boxes)


def test_export_writes_files_that_read_back(tmp_path, capsys):
    import meshio
    import numpy as np

    from ibprep import load_stencils, load_surface

    case = _case(tmp_path)
    out = tmp_path / "exp"
    assert main(["export", str(case), "--out", str(out), "--count", "2"]) == 0
    body = load_surface(out / "body_step0000.stl")
    assert body.is_watertight
    m = meshio.read(out / "tags_step0001.vtu")
    assert set(np.unique(m.cell_data["tag"][0])) <= {1, 2}
    st = load_stencils(out / "stencils_step0000.npz")
    assert len(st.cells) > 0
    markers = np.loadtxt(out / "markers_body_frame.csv", delimiter=",", skiprows=1)
    assert markers.shape[1] == 7
    assert "step0001" in (out / "tags.pvd").read_text()
    # Which instant each stem stands for (the case's step is 0.002 s, its period 4 s).
    rows = (out / "instants.csv").read_text().splitlines()
    assert rows == ["stem,time_s,solver_step,solver_step_offset_s", "step0000,0,0,0", "step0001,2,1000,0"]
    assert main(["export", str(case), "--out", str(out), "--at", "0.5013", "--what", "stl"]) == 0
    assert (out / "instants.csv").read_text().splitlines()[1] == "step0000,0.5013,251,-0.0007"
    # Half-way instants go to the later step, both ways up (not to the even one).
    assert main(["export", str(case), "--out", str(out), "--at", "0.001", "0.003", "--what", "stl"]) == 0
    rows = (out / "instants.csv").read_text().splitlines()[1:]
    assert [r.split(",")[2] for r in rows] == ["1", "2"]


def test_subprocess_smoke(tmp_path):
    case = _case(tmp_path, SMALL_CASE.replace("frequency = 0.25", "frequency = -1"))
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    r = subprocess.run([sys.executable, "-m", "ibprep", "check", str(case)], capture_output=True, text=True,
                       env=env, timeout=120)
    assert r.returncode == 2
    assert "[motion] frequency must be > 0" in r.stderr and "Traceback" not in r.stderr


def test_two_dimensional_case_plots_and_exports(tmp_path, capsys):
    import meshio
    import numpy as np

    from cases import SMALL_CASE_2D

    case = _case(tmp_path, SMALL_CASE_2D)
    assert main(["check", str(case), "--plots", str(tmp_path / "plots"), "--no-progress"]) == 0
    for png in ("motion.png", "steps.png", "tags.png"):
        assert (tmp_path / "plots" / png).read_bytes()[:4] == b"\x89PNG"
    out = tmp_path / "exp"
    assert main(["export", str(case), "--out", str(out), "--count", "2", "--what", "tags,stencils"]) == 0
    m = meshio.read(out / "tags_step0000.vtu")
    # One layer of hexahedra in the plane: every cell's z extent is one spacing around z = 0.
    z = m.points[:, 2]
    assert np.isclose(z.min(), -z.max()) and set(np.unique(m.cell_data["tag"][0])) <= {1, 2}
    assert main(["export", str(case), "--out", str(out), "--what", "markers"]) == 2
    assert "markers are for 3-D bodies" in capsys.readouterr().err


def test_tandem_case_exports_one_marker_file_per_body(tmp_path, capsys):
    from cases import TANDEM_CASE

    case = _case(tmp_path, TANDEM_CASE)
    out = tmp_path / "exp"
    assert main(["export", str(case), "--out", str(out), "--count", "1", "--what", "stl,markers,tags"]) == 0
    assert (out / "markers_body_frame_fore.csv").exists() and (out / "markers_body_frame_aft.csv").exists()
    import meshio
    import numpy as np

    m = meshio.read(out / "tags_step0000.vtu")
    body = m.cell_data["body"][0]
    tag = m.cell_data["tag"][0]
    # Solid cells carry the number of the body that holds them; both bodies appear.
    assert set(np.unique(body[tag == 1])) == {1.0, 2.0}
    from ibprep import check_surface, load_surface

    both = load_surface(out / "body_step0000.stl")
    assert check_surface(both).n_bodies == 2 and check_surface(both).ok


def test_progress_goes_to_a_log_file_as_plain_lines(tmp_path, capsys):
    # A batch job's stderr is a file, not a terminal: progress arrives as lines, the last at 100 %.
    assert main(["check", str(_case(tmp_path))]) in (0, 1)
    err = capsys.readouterr().err.strip().splitlines()
    assert err and err[-1].startswith("checking steps: ") and "(100 %)" in err[-1], err
    assert "\r" not in "".join(err)
    assert main(["check", str(_case(tmp_path)), "--no-progress"]) in (0, 1)
    assert "checking steps" not in capsys.readouterr().err


def test_progress_lines_are_rate_limited(monkeypatch, capsys):
    from ibprep import cli

    clock = iter([0.0, 1.0, 2.0, 7.0, 8.0, 70.0, 80.0, 90.0, 100.0])
    monkeypatch.setattr(cli, "_clock", lambda: next(clock))
    update = cli._log_progress()  # start at t = 0
    update(5, 100)  # 1 s, 5 %: too soon and too little
    update(15, 100)  # 2 s, 15 %: a tenth more, but under 5 s since the start
    update(16, 100)  # 7 s: a tenth more and 5 s -> printed
    update(17, 100)  # 8 s: no
    update(18, 100)  # 70 s: a minute since the last line -> printed
    update(20, 100)  # 80 s: the next whole tenth -> printed
    update(3, 10)  # 90 s: exactly 30 % of ten chunks (0.2 + 0.1 is not 0.3 in floating point) -> printed
    update(100, 100)  # done -> printed
    lines = capsys.readouterr().err.strip().splitlines()
    assert [ln.split(" (")[0] for ln in lines] == ["checking steps: 16/100", "checking steps: 18/100",
                                                   "checking steps: 20/100", "checking steps: 3/10",
                                                   "checking steps: 100/100"]
    assert "about" in lines[0] and "to go" in lines[0] and "to go" not in lines[-1]


def test_figures_say_when_a_number_does_not_apply():
    # A rolling fin without plunge: the feathering parameter theta0 / atan(omega h0 / U)
    # is undefined (no plunge), and the quasi-steady alpha_eff leaves the roll stroke out.
    from types import SimpleNamespace

    from ibprep.cli import format_report

    from ibprep import Check

    check = Check("time.cfl", "pass", 0.3, 0.5, "-", "fine")
    numbers = {"alpha_eff_max_deg": 20.0, "feathering_chi": math.inf, "roll_amplitude_deg": 30.0,
               "te_point_m": [0.032, 0.0, 0.05]}
    report = SimpleNamespace(title="fin", checks=[check], figures={"numbers": numbers}, verdict="pass", caution="c")
    text = format_report(report)
    assert "feathering chi                     n/a (no plunge)" in text
    assert "max |alpha_eff| (deg, no roll)     20.00" in text
    assert "TE point used (m, body frame)      (0.032, 0, 0.05)" in text  # where the TE figures come from
    assert "time.cfl  fine  [limit 0.5]" in text  # a passing row shows its limit, so its margin shows
    numbers.update(feathering_chi=1.5, roll_amplitude_deg=0.0)
    text = format_report(report)
    assert "feathering chi                     1.5" in text
    assert "max |alpha_eff| (deg)              20.00" in text


def test_check_plots_of_a_blocked_run_show_the_boxes_and_list_the_files(tmp_path, capsys):
    # The body leaves the domain: the stencils are never built, and the box plot is the one that shows why.
    case = _case(tmp_path, SMALL_CASE.replace("plunge_amplitude = 0.03", "plunge_amplitude = 0.115"))
    plots = tmp_path / "plots"
    assert main(["check", str(case), "--plots", str(plots), "--json", str(tmp_path / "r.json"), "--no-progress"]) == 1
    out = capsys.readouterr().out
    assert (plots / "boxes.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    listed = out[out.index("files written:"):]
    for f in ("r.json", "motion.png", "boxes.png"):
        assert f in listed
    # The verdict comes before the list of files.
    assert out.index("verdict: FAIL") < out.index("files written:")
