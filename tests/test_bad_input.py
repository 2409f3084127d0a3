"""Bad input, attacked as a user's typo or a hostile file would: every one is refused with exit code 2,
one line on stderr, no traceback, before any long work, and nothing on disk is changed.

Each entry names the command, the case text (or file) and what the one line must say. The cases are made
from the small test wing; the values are chosen past each key's range, at the float extremes (1e300,
5e-324, 1.7e308) where arithmetic overflows, or as files that are not what they claim to be.
"""

import hashlib
import re

import pytest

from cases import SMALL_CASE, SMALL_CASE_2D, with_surface
from ibprep.cli import main


def _with(old, new, text=SMALL_CASE):
    assert old in text, old
    return text.replace(old, new)


#: (id, case text, pattern of the one line). Checked with check, size and export.
CASE_TEXTS = [
    ("nested-arrays", SMALL_CASE + "\nx = " + "[" * 5000 + "]" * 5000 + "\n", r"nests arrays or tables too deeply"),
    ("lower-1e300", _with("lower = [-0.12, -0.12, -0.06]", "lower = [-1e300, -0.12, -0.06]"), r"more than the .* cells a level may have"),
    ("upper-1.7e308", _with("upper = [0.36, 0.12, 0.18]", "upper = [1.7e308, 0.12, 0.18]"), r"holds inf cells"),
    ("spacing-1e300", _with("spacing = 0.006", "spacing = 1e300"), r"not a whole number of cells"),
    ("spacing-1e-300", _with("spacing = 0.006", "spacing = 1e-300"), r"more than the .* cells a level may have"),
    ("spacing-1e-6", _with("spacing = 0.006", "spacing = 1e-6"), r"\[grid\] grid of 480000 x 240000 x 240000"),
    ("step-5e-324", _with("step = 0.002", "step = 5e-324"), r"\[time\] step .* steps per period"),
    ("step-1e-300", _with("step = 0.002", "step = 1e-300"), r"\[time\] step .* more than the 1e\+08 allowed"),
    ("step-longer-than-period", _with("step = 0.002", "step = 5.0"), r"\[time\] step .* longer than one period"),
    ("frequency-1e-300", _with("frequency = 0.25", "frequency = 1e-300"), r"\[time\] step .* steps per period"),
    ("frequency-1e300", _with("frequency = 0.25", "frequency = 1e300"), r"longer than one period"),
    ("plunge-1e300", _with("plunge_amplitude = 0.03", "plunge_amplitude = 1e300"), r"\[motion\] plunge_amplitude .* 1000 chords"),
    ("pivot-1e300", _with("pivot = [0.02, 0.0, 0.0]", "pivot = [1e300, 0.0, 0.0]"), r"\[motion\] pivot .* 1000 chords"),
    ("sharpness-1e300", _with("phase_deg = 90", "phase_deg = 90\nplunge_sharpness = 1e300"), r"plunge_sharpness must be <= 100"),
    ("chord-1e300", _with("chord = 0.06", "chord = 1e300"), r"\[body\] chord must be <= 10000 m"),
    ("chord-1e-300", _with("chord = 0.06", "chord = 1e-300"), r"\[body\] chord must be >= 1e-06 m"),
    ("span-1e-300", _with("span = 0.12", "span = 1e-300"), r"\[body\] span .* between 0.01 and 1000 chords"),
    ("span-1e300", _with("span = 0.12", "span = 1e300"), r"\[body\] span .* between 0.01 and 1000 chords"),
    ("faces-1e12", _with("faces = 2000", "faces = 1000000000000"), r"\[body\] faces must be <= 2e\+06"),
    ("phases-1e9", _with("phases = 4", "phases = 1000000000"), r"\[checks\] phases must be <= 100000"),
    ("cycles-1e18", _with("cycles = 1", "cycles = 1000000000000000000"), r"\[time\] cycles must be <= 1e\+06"),
    ("target-spacing-1e-9", SMALL_CASE + "\n[sizing]\ntarget_spacing = 1e-9\n", r"\[sizing\] target_spacing .* finer than chord"),
    ("offset-far", _with("faces = 2000", "faces = 2000\noffset = [0, 1e200, 0]"), r"\[body\] offset .* 1000 chords"),
    ("roll-root-far", _with("phase_deg = 90", "phase_deg = 90\nroll_root = [0, 0, -1e9]"), r"\[motion\] roll_root .* 1000 chords"),
    ("box-1e300", _with("upper = [0.15, 0.06, 0.135]", "upper = [1e300, 0.06, 0.135]"), r"refinement box 0 reaches outside"),
    ("box-nan", _with("upper = [0.15, 0.06, 0.135]", "upper = [nan, 0.06, 0.135]"), r"must be finite"),
    ("speed-inf", _with("speed = 0.1", "speed = inf"), r"\[flow\] speed must be finite"),
    ("viscosity-negative", _with("viscosity = 6e-6", "viscosity = -6e-6"), r"\[flow\] viscosity must be > 0"),
    ("span-beside-surface", _with('section = "0012"', 'surface = "body.stl"'), r"\[body\] faces describes a wing .* remove faces, span, tips"),
    ("pivot-2-components-3d", _with("pivot = [0.02, 0.0, 0.0]", "pivot = [0.02, 0.0]"), r"\[motion\] pivot must be \[x, y, z\] .* in a 3-D case"),
    ("table-beside-amplitudes", _with("phase_deg = 90", 'phase_deg = 90\ntable = "wave.csv"'), r"\[motion\] phase_deg: the table gives h and theta"),
    ("table-system-file", with_surface(SMALL_CASE, "body.stl").replace(
        "plunge_amplitude = 0.03\npitch_amplitude_deg = 30\nphase_deg = 90\n", 'table = "/etc/passwd"\n'),
     r"/etc/passwd, line 1: expected 3 comma-separated values \(t, h, theta\), found \d+$"),
    ("table-not-utf8", with_surface(SMALL_CASE, "body.stl").replace(
        "plunge_amplitude = 0.03\npitch_amplitude_deg = 30\nphase_deg = 90\n", 'table = "latin.csv"\n'),
     r"latin.csv, line 2: not UTF-8 text"),
    ("table-frequency-disagrees", with_surface(SMALL_CASE, "body.stl").replace(
        "plunge_amplitude = 0.03\npitch_amplitude_deg = 30\nphase_deg = 90\n", 'table = "wave.csv"\n'),
     r"\[motion\] frequency \(0.25 Hz\) differs from the table's \(0.5 Hz"),
    ("no-frequency", _with("frequency = 0.25\n", ""), r"\[motion\] frequency is missing"),
    ("2d-span", _with("[body]\n", "[body]\nspan = 0.1\n", SMALL_CASE_2D), r"span has no meaning in a 2-D case"),
]

#: Files that are not case files: (id, name, bytes or None for a folder, pattern).
CASE_FILES = [
    ("binary", "bin.toml", b"\x00\xff\xfe" * 100, r"is not UTF-8 text"),
    ("nul-bytes", "nul.toml", b"title = 'a'\x00\n", r"NUL bytes: it is a binary file"),
    ("latin-1", "latin.toml", SMALL_CASE.replace("invented", "invent\xe9").encode("latin-1"), r"is not UTF-8 text \(byte \d+, line 3\)"),
    ("folder", "folder.toml", None, r"is a folder; give the TOML file inside it"),
    ("missing", "missing.toml", False, r"not found"),
    ("not-toml", "junk.toml", b"this is = = not toml", r"not valid TOML"),
]


def _snapshot(root):
    """Every file and folder under root with a hash of its bytes."""
    out = {}
    for p in sorted(root.rglob("*")):
        rel = str(p.relative_to(root))
        out[rel] = hashlib.sha256(p.read_bytes()).hexdigest() if p.is_file() else "dir"
    return out


def _refused(argv, capsys, tmp_path, pattern):
    before = _snapshot(tmp_path)
    rc = main(argv)
    cap = capsys.readouterr()
    err = cap.err
    assert rc == 2, (rc, err, cap.out[-500:])
    assert err.count("\n") == 1 and err.startswith("ibprep: error: "), err
    assert "Traceback" not in err
    assert re.search(pattern, err), err
    assert _snapshot(tmp_path) == before, "a refused run changed files on disk"


@pytest.fixture
def inputs(tmp_path):
    """A surface file and waveform tables beside the case files (made here, invented)."""
    import trimesh

    trimesh.creation.box(extents=(0.06, 0.01, 0.12)).export(tmp_path / "body.stl")
    (tmp_path / "wave.csv").write_text("t, h, theta_deg\n0, 0, 0\n0.5, 0.01, 10\n1, 0, 0\n1.5, -0.01, -10\n2, 0, 0\n")
    (tmp_path / "latin.csv").write_bytes(b"t,h,theta_deg\n0,0,\xff\n")
    return tmp_path


@pytest.mark.parametrize("command", ["check", "size", "export"])
@pytest.mark.parametrize("name, text, pattern", CASE_TEXTS, ids=[c[0] for c in CASE_TEXTS])
def test_bad_case_text_is_refused(inputs, capsys, command, name, text, pattern):
    case = inputs / f"{name}.toml"
    case.write_text(text)
    argv = [command, str(case)] + {"check": ["--no-progress"], "size": [], "export": ["--out", str(inputs / "out")]}[command]
    case_bytes = case.read_bytes()
    _refused(argv, capsys, inputs, pattern)
    assert case.read_bytes() == case_bytes


@pytest.mark.parametrize("command", ["check", "size", "export"])
@pytest.mark.parametrize("name, filename, data, pattern", CASE_FILES, ids=[c[0] for c in CASE_FILES])
def test_a_file_that_is_no_case_file_is_refused(tmp_path, capsys, command, name, filename, data, pattern):
    path = tmp_path / filename
    if data is None:
        path.mkdir()
    elif data is not False:
        path.write_bytes(data)
    argv = [command, str(path)] + (["--out", str(tmp_path / "out")] if command == "export" else [])
    _refused(argv, capsys, tmp_path, pattern)


@pytest.fixture
def good(tmp_path):
    case = tmp_path / "case.toml"
    case.write_text(SMALL_CASE)
    (tmp_path / "old.json").write_text('{"keep": true}')
    (tmp_path / "a-file").write_text("not a folder")
    return case


#: Options that are wrong whatever the case: (id, argv after the case path, pattern). For check unless said.
OPTIONS = [
    ("json-is-the-case", lambda d: ["check", str(d / "case.toml"), "--json", str(d / "case.toml")], r"--json .* names an input file"),
    ("json-is-a-folder", lambda d: ["check", str(d / "case.toml"), "--json", str(d)], r"--json .* is a folder"),
    ("json-folder-missing", lambda d: ["check", str(d / "case.toml"), "--json", str(d / "no" / "r.json")], r"its folder does not exist"),
    ("json-name-too-long", lambda d: ["check", str(d / "case.toml"), "--json", str(d / ("x" * 300))], r"longer than the 255 bytes"),
    ("json-path-too-long", lambda d: ["check", str(d / "case.toml"), "--json", "/x" * 3000], r"longer than the 4000 bytes"),
    ("json-read-only-place", lambda d: ["check", str(d / "case.toml"), "--json", "/proc/r.json"], r"--json: cannot write into '/proc'"),
    ("plots-is-a-file", lambda d: ["check", str(d / "case.toml"), "--plots", str(d / "a-file")], r"--plots .* exists and is not a folder"),
    ("plots-under-read-only", lambda d: ["check", str(d / "case.toml"), "--plots", "/proc/ibprep/plots"], r"--plots: cannot make the folder"),
    ("plots-is-the-case", lambda d: ["check", str(d / "case.toml"), "--plots", str(d / "case.toml")], r"exists and is not a folder"),
    ("workers-0", lambda d: ["check", str(d / "case.toml"), "--workers", "0"], r"--workers must be 1 or more"),
    ("scheduler-word", lambda d: ["check", str(d / "case.toml"), "--scheduler", "foo"], r"--scheduler takes 'local' or a scheduler address"),
    ("scheduler-inproc", lambda d: ["check", str(d / "case.toml"), "--scheduler", "inproc://x"], r"--scheduler takes"),
    ("scheduler-no-host", lambda d: ["check", str(d / "case.toml"), "--scheduler", "tcp://"], r"--scheduler takes"),
    ("export-margin-nan", lambda d: ["export", str(d / "case.toml"), "--out", str(d / "o"), "--margin", "nan"], r"--margin must be a finite number"),
    ("export-margin-negative", lambda d: ["export", str(d / "case.toml"), "--out", str(d / "o"), "--margin", "-1"], r"--margin must be"),
    ("export-at-negative", lambda d: ["export", str(d / "case.toml"), "--out", str(d / "o"), "--at", "-1"], r"--at takes times in seconds from 0 on"),
    ("export-at-inf", lambda d: ["export", str(d / "case.toml"), "--out", str(d / "o"), "--at", "inf"], r"--at takes times"),
    ("export-count-huge", lambda d: ["export", str(d / "case.toml"), "--out", str(d / "o"), "--count", "1000000000000"], r"--count must be between 1 and"),
    ("export-count-float", lambda d: ["export", str(d / "case.toml"), "--out", str(d / "o"), "--count", "1e12"], r"invalid int value"),
    ("export-what-unknown", lambda d: ["export", str(d / "case.toml"), "--out", str(d / "o"), "--what", "pdf"], r"--what takes"),
    ("export-out-is-a-file", lambda d: ["export", str(d / "case.toml"), "--out", str(d / "a-file")], r"--out .* exists and is not a folder"),
    ("export-out-is-the-case", lambda d: ["export", str(d / "case.toml"), "--out", str(d / "case.toml")], r"exists and is not a folder"),
    ("demo-out-is-a-file", lambda d: ["demo", "--out", str(d / "a-file")], r"--out .* exists and is not a folder"),
    ("demo-out-holds-files", lambda d: ["demo", "--out", str(d)], r"already holds files .* --force"),
    ("demo-out-read-only", lambda d: ["demo", "--out", "/proc/ibprep-demo"], r"--out: cannot make the folder"),
    ("demo-workers-0", lambda d: ["demo", "--out", str(d / "new"), "--workers", "0"], r"--workers must be 1 or more"),
    ("demo-scheduler-bad", lambda d: ["demo", "--out", str(d / "new"), "--scheduler", "udp://x"], r"--scheduler takes"),
    ("no-command", lambda d: [], r"give a command: demo, check"),
    ("unknown-command", lambda d: ["frobnicate"], r"invalid choice"),
    ("check-no-case", lambda d: ["check"], r"required: case"),
]


@pytest.mark.parametrize("name, argv, pattern", OPTIONS, ids=[o[0] for o in OPTIONS])
def test_bad_options_are_refused_before_any_work(good, capsys, name, argv, pattern):
    _refused(argv(good.parent), capsys, good.parent, pattern)


def test_a_level_too_large_for_this_machine_is_refused_before_the_sweep(tmp_path, capsys, monkeypatch):
    # 1.6e10 cells at 3 bytes a cell is 45 GiB; the machine is told to have 4 GiB, so the refusal does not
    # depend on the test machine's memory.
    import ibprep.checks.preflight as pf

    monkeypatch.setattr(pf, "_physical_memory", lambda: 4 * 2**30)
    text = _with("spacing = 0.006", "spacing = 0.00012").replace(
        "[[grid.refine]]\nlower = [-0.03, -0.06, -0.015]\nupper = [0.15, 0.06, 0.135]\n", "")
    case = tmp_path / "huge.toml"
    case.write_text(text)
    _refused(["check", str(case), "--no-progress"], capsys, tmp_path,
             r"\[grid\] level 0, which holds the body, has 16,000,000,000 cells: .* 44.7 GiB .* this machine's 4 GiB")


def test_the_zoo_is_large():
    # At least 60 bad inputs across check, size, export and demo (each case text runs under three commands).
    assert 3 * len(CASE_TEXTS) + 3 * len(CASE_FILES) + len(OPTIONS) >= 60
