"""The ``ibprep`` command.

A thin layer: each subcommand has ``add_args(parser)`` and ``run(args) -> int``
and calls the public API. Exit codes: 0 every check passed (warnings allowed),
1 at least one check failed, 2 bad input or usage (one message on stderr, no
traceback; ``--debug`` shows it), 3 the run could not finish (an internal error,
which the message says is a bug, or a lost worker), 130 interrupted.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
from pathlib import Path

from .errors import IbprepError, InputError

__all__ = ["main"]

EXIT_OK, EXIT_FAILED, EXIT_INPUT, EXIT_INTERNAL, EXIT_INTERRUPTED = 0, 1, 2, 3, 130


class _Parser(argparse.ArgumentParser):
    """argparse that raises instead of exiting, so usage errors map to exit code 2 with one line."""

    def error(self, message):  # noqa: D401 - argparse API
        raise InputError(f"{self.prog}: {message} (see {self.prog} --help)")


class _HelpFormatter(argparse.HelpFormatter):
    """Shows each option's default in --help where it has a meaningful one."""

    def _get_help_string(self, action):
        help_ = action.help or ""
        if "%(default)" in help_ or action.default in (None, False, argparse.SUPPRESS) or not action.option_strings:
            return help_
        return help_ + " (default: %(default)s)"


# --------------------------------------------------------------------------- output paths
def _same_file(a: Path, b: Path) -> bool:
    try:
        return a.exists() and b.exists() and os.path.samefile(a, b)
    except OSError:
        return False


def _not_an_input(p: Path, inputs, option: str) -> None:
    for q in inputs:
        if q is not None and (_same_file(p, Path(q)) or p.resolve() == Path(q).resolve()):
            raise InputError(f"{option} {str(p)!r} names an input file ({q}); choose another name so it is not overwritten")


def _name_fits(p: Path, option: str) -> None:
    limit = 255
    for part in p.parts:
        if len(part.encode("utf-8", "surrogateescape")) > limit:
            raise InputError(f"{option}: the name {part[:40]!r}... is longer than the {limit} bytes a file name may have")
    if len(str(p.absolute()).encode("utf-8", "surrogateescape")) > 4000:
        raise InputError(f"{option}: the path is longer than the 4000 bytes a path may have here; choose a shorter one")


def _probe_folder(folder: Path, option: str) -> None:
    """Create and remove a file in ``folder``: the one test that also holds for root and read-only mounts."""
    import tempfile

    try:
        with tempfile.NamedTemporaryFile(dir=folder, prefix=".ibprep-probe-"):
            pass
    except OSError as exc:
        raise InputError(f"{option}: cannot write into {str(folder)!r}: {exc.strerror or exc}; "
                         "choose a folder you can write to") from None


def _output_file(path, inputs=(), option: str = "--json") -> Path:
    """Check, before any work, that ``path`` can be written as a file and names no input."""
    p = Path(path)
    _name_fits(p, option)
    if p.is_dir():
        raise InputError(f"{option} {str(p)!r} is a folder; give a file name")
    _not_an_input(p, inputs, option)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise InputError(f"{option}: cannot write {str(p)!r}: its folder does not exist")
    _probe_folder(parent, option)
    return p


def _output_folder(path, inputs=(), option: str = "--out") -> Path:
    """Check, before any work, that ``path`` is or can be made a writable folder; make it."""
    p = Path(path)
    _name_fits(p, option)
    if p.exists() and not p.is_dir():
        raise InputError(f"{option} {str(p)!r} exists and is not a folder")
    _not_an_input(p, inputs, option)
    try:
        p.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{option}: cannot make the folder {str(p)!r}: {exc.strerror or exc}; "
                         "choose a place you can write to") from None
    _probe_folder(p, option)
    return p


def _printable(text: str) -> str:
    """``text`` with control characters escaped, so a title cannot drive the terminal."""
    return "".join(ch if ch.isprintable() or ch == " " else ch.encode("unicode_escape").decode("ascii") for ch in text)


def _progress(enabled: bool):
    """A progress(done, total) callback: a bar on a terminal, plain lines in a log file.

    A batch job's stderr is a file: it gets a line at each tenth of the steps (at most
    one every 5 s), and otherwise one a minute as long as chunks keep finishing, with the
    time elapsed and an estimate of the time left.
    """
    if not enabled:
        return None, lambda: None
    if not sys.stderr.isatty():
        return _log_progress(), lambda: None
    from tqdm import tqdm

    bar = tqdm(total=0, unit="step", file=sys.stderr, leave=False, desc="checking steps")

    def update(done, total):
        bar.total = total
        bar.n = done
        bar.refresh()

    return update, bar.close


def _clock() -> float:
    import time

    return time.monotonic()


def _log_progress():
    start = _clock()
    last = {"t": start, "tenth": 0}

    def update(done, total):
        now = _clock()
        frac = done / total if total else 1.0
        tenth = (10 * done) // total if total else 10  # whole tenths: no round-off at 30 %
        due = tenth > last["tenth"] and now - last["t"] >= 5.0
        if not (done >= total or due or now - last["t"] >= 60.0):
            return
        last["t"], last["tenth"] = now, tenth
        took = now - start
        left = f", about {_duration(took * (1 - frac) / frac)} to go" if 0 < frac < 1 else ""
        print(f"checking steps: {done}/{total} ({100 * frac:.0f} %), {_duration(took)} elapsed{left}",
              file=sys.stderr, flush=True)

    return update


def _duration(seconds: float) -> str:
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.1f} min"
    return f"{seconds / 3600:.1f} h"


# --------------------------------------------------------------------------- formatting
_MARK = {"pass": "ok  ", "warn": "WARN", "fail": "FAIL"}


def _limit_note(check) -> str:
    """' [limit 0.5]' on a passing row whose message does not already say its limit: the margin shows."""
    if check.status != "pass" or check.limit is None or not isinstance(check.limit, (int, float)):
        return ""
    if not math.isfinite(check.limit) or "limit" in check.message:
        return ""
    unit = f" {check.unit}" if check.unit and check.unit not in ("-", "area fraction") else ""
    return f"  [limit {check.limit:.4g}{unit}]"


def format_report(report) -> str:
    """The report as an aligned plain-text table plus the key figures (no colour needed)."""
    rows = []
    w_id = max(len(c.id) for c in report.checks)
    for c in report.checks:
        rows.append(f"  {_MARK[c.status]}  {c.id:<{w_id}}  {c.message}{_limit_note(c)}")
        if c.status != "pass" and c.hint:
            rows.append(f"        {'':<{w_id}}  -> {c.hint}")
    f = report.figures
    n = f.get("numbers", {})
    g = f.get("grid", {})
    t = f.get("time", {})
    st = f.get("stencils", {})
    lines = [f"ibprep pre-flight: {report.title or 'case'}", "", "checks:"] + rows + ["", "figures:"]

    def fig(label, value, fmt="{:.4g}"):
        if value is None:
            return
        lines.append(f"  {label:<34} {fmt.format(value) if not isinstance(value, str) else value}")

    fig("Reynolds number U c / nu", n.get("reynolds"), "{:.5g}")
    fig("f c / U", n.get("frequency_ratio_fc_U"))
    fig("k = 2 pi f c / U (chord)", n.get("k_chord"))
    fig("h0 / c", n.get("plunge_ratio_h0_c"))
    fig("k h", n.get("kh"))
    fig("Strouhal 2 f h0 / U", n.get("strouhal_2fh0_U"))
    fig("Strouhal, TE excursion", n.get("strouhal_te"))
    # Quasi-steady from plunge and pitch: a roll stroke changes the angle along the span.
    rolls = bool(n.get("roll_amplitude_deg"))
    fig("max |alpha_eff| (deg" + (", no roll)" if rolls else ")"), n.get("alpha_eff_max_deg"), "{:.2f}")
    chi = n.get("feathering_chi")
    if chi is not None and not math.isfinite(chi):
        chi = "n/a (no plunge)"
    fig("feathering chi", chi)
    fig("peak TE speed / U", n.get("max_te_speed_U"))
    if n.get("te_point_m") is not None:  # where the TE figures are taken (placed body frame)
        fig("TE point used (m, body frame)", "(" + ", ".join(f"{x:.4g}" for x in n["te_point_m"]) + ")")
    fig("peak surface speed / U", n.get("max_surface_speed_U"))
    if g:
        fig("grid levels", g.get("levels"), "{}")
        fig("spacing per level (m)", ", ".join(f"{h:.4g}" for h in g.get("spacing_m", [])))
        fig("cells per level", ", ".join(f"{c:,}" for c in g.get("cells_per_level", [])))
        fig("cells in all levels", g.get("total_cells"), "{:,}")
    if t:
        fig("time step (s)", t.get("step_s"))
        fig("steps per cycle", t.get("steps_per_cycle"), "{:,}")
        fig("Courant number", t.get("courant"), "{:.3f}")
    if st:
        fig("checked step pairs", st.get("checked_steps"), "{}")
        fig("stencils built", st.get("stencils_built"), "{:,}")
        fig("max interface cells per step", st.get("max_interface_cells"), "{:,}")
        fig("max fresh cells per step", st.get("max_fresh_cells"), "{:,}")
    lines += ["", f"verdict: {report.verdict.upper()}", "", "caution: " + report.caution]
    # Titles and body names come from the case file: control characters in them are shown escaped.
    return "\n".join(_printable(line) for line in "\n".join(lines).split("\n"))


# --------------------------------------------------------------------------- check
def _check_add_args(p):
    p.add_argument("case", help="case file (TOML)")
    p.add_argument("--json", metavar="FILE", help="also write the report as JSON to FILE")
    p.add_argument("--plots", metavar="DIR", help="write the PNG plots into DIR")
    p.add_argument("--all-steps", action="store_true", help="check every solver step of one cycle")
    _engine_args(p)


def _engine_args(p):
    p.add_argument("--workers", type=int, default=1, metavar="N",
                   help="processes for the step sweep (with --scheduler local: Dask workers)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run the sweep on a Dask cluster: a scheduler address (tcp://host:8786) or 'local'")
    p.add_argument("--no-progress", action="store_true", help="no progress bar on stderr")


def _run_check(args) -> int:
    from .io.case import load_case
    from .io.export import write_json_report
    from .checks.preflight import preflight

    case = load_case(args.case)
    inputs = case.inputs
    if args.json:
        _output_file(args.json, inputs, "--json")
    if args.plots:
        _output_folder(args.plots, inputs, "--plots")
    _check_engine_args(args)
    report = _preflight(case, args, preflight)
    # The verdict first: a file that cannot be written must not lose it.
    print(format_report(report), flush=True)
    written = []
    if args.json:
        written.append(write_json_report(report, args.json))
    if args.plots:
        written += _write_plots(case, report, Path(args.plots))
    if written:
        print("")
        print("files written:")
        for f in written:
            print(f"  {f}")
    return EXIT_FAILED if report.verdict == "fail" else EXIT_OK


def _check_engine_args(args) -> None:
    """--workers and --scheduler checked before the sweep starts."""
    if args.workers < 1:
        raise InputError(f"--workers must be 1 or more, got {args.workers}")
    s = args.scheduler
    if s is not None and s != "local":
        scheme, sep, rest = s.partition("://")
        if not sep or scheme not in ("tcp", "tls") or not rest:
            raise InputError(f"--scheduler takes 'local' or a scheduler address such as tcp://host:8786, got {s!r}")


def _preflight(case, args, preflight):
    update, close = _progress(not args.no_progress)
    try:
        return preflight(case, all_steps=args.all_steps or None, workers=args.workers, scheduler=args.scheduler,
                         progress=update)
    finally:
        close()


class _WorstStep:
    """The worst checked step of a report, re-tagged once for the plots and the ParaView file.

    Attributes: step (StepResult), grid (the level holding the body), vertices and faces
    (world frame at that step), tags (grid.shape uint8), z (metres: the slice plane, through the
    worst stencil of that step) and note (why the slice is there).
    """

    def __init__(self, case, report):
        from .tagging.classify import classify

        self.step = max(report.steps, key=lambda s: (s.n_bad, s.worst_condition))
        self.grid = case.grid.levels[report.figures["resolution"]["level_at_body"]]
        self.vertices, self.faces = case.world_surface(self.step.time)
        self.tags = classify((self.vertices, self.faces), self.grid)
        v = self.vertices
        self.z, self.note = float(0.5 * (v[:, 2].min() + v[:, 2].max())), "mid-span"
        if self.grid.ndim == 3:
            if self.step.bad_points:
                self.z, self.note = float(self.step.bad_points[0][2]), "through a failed stencil"
            elif len(self.step.worst_condition_at) == 3:
                self.z, self.note = float(self.step.worst_condition_at[2]), "through the worst-conditioned stencil"


def _write_plots(case, report, folder: Path, worst: "_WorstStep | None" = None) -> list[Path]:
    from .io.export import plot_motion, plot_steps, plot_tags_slice

    out = [plot_motion(case.motion, case.chord, case.flow.speed, folder / "motion.png", title=case.title)]
    env = report.figures.get("envelope", {})
    envelope = (env["lower_m"], env["upper_m"]) if env else None
    if report.steps:
        limit = next((c.limit for c in report.checks if c.id == "stencil.condition"), None)
        out.append(plot_steps(report.steps, case.motion.period, folder / "steps.png", condition_limit=limit))
        worst = worst or _WorstStep(case, report)
        v = worst.vertices
        pad = 0.3 * case.chord
        zoom = ((v[:, 0].min() - pad, v[:, 1].min() - pad), (v[:, 0].max() + pad, v[:, 1].max() + pad))
        out.append(plot_tags_slice(worst.tags, worst.grid, worst.z, folder / "tags.png", nested=case.grid,
                                   envelope=envelope, bad_points=worst.step.bad_points,
                                   title=f"worst checked step t = {worst.step.time:.4g} s", zoom=zoom,
                                   slice_note=worst.note))
    else:
        # A blocking check stopped the run before the stencils: the domain and boxes against the swept
        # envelope are what show the problem.
        out.append(plot_tags_slice(None, case.grid.base, 0.0, folder / "boxes.png", nested=case.grid,
                                   envelope=envelope, title="the domain, its boxes and the swept envelope"))
    return out


# --------------------------------------------------------------------------- size
def _size_add_args(p):
    p.add_argument("case", help="case file (TOML)")


def _run_size(args) -> int:
    from .io.case import load_case
    from .checks.sizing import size_case

    case = load_case(args.case)
    sz = size_case(case)
    res = sz.proposal
    env = res.envelope
    c = sz.lengths.chord
    ng = res.grid
    print(_printable(f"ibprep size: {case.title or args.case}"))
    print("")
    print("what the body needs" + (" (the most demanding of the bodies):" if len(case.bodies) > 1 else ":"))
    for name, h in sz.per_rule.items():
        print(f"  {name:<22} h <= {h:.4g} m  (c/{c / h:.0f})")
    print(f"  -> finest spacing {ng.finest_spacing:.4g} m (c/{c / ng.finest_spacing:.0f}), set by the {sz.rule} rule")
    print("")
    print("swept envelope over one cycle (m):")
    nd = case.grid.base.ndim  # a 2-D case's body is a prism: its depth is not part of the answer
    print(f"  lower {tuple(round(float(x), 5) for x in env.lower[:nd])}")
    print(f"  upper {tuple(round(float(x), 5) for x in env.upper[:nd])}")
    print("")
    print(f"  {'level':>5}  {'spacing (m)':>12}  {'cells':>14}  {'leaf cells':>14}  box")
    leaf = ng.leaf_cells_per_level()
    for lvl, g in enumerate(ng.levels):
        box = f"{tuple(round(x, 5) for x in g.lower)} .. {tuple(round(x, 5) for x in g.upper)}"
        print(f"  {lvl:>5}  {g.spacing:>12.5g}  {g.size:>14,}  {leaf[lvl]:>14,}  {box}")
    mem = ng.memory_estimate()
    print(f"  total {ng.total_cells:,} cells ({ng.leaf_cells:,} leaf); tags need {mem.tags / 2**20:.1f} MiB per step")
    if any(res.clipped):
        print("  note: some boxes were cut back to the domain; consider a larger domain")
    print("")
    print("paste into the case file, replacing the [[grid.refine]] blocks (exact values: pasted, they give")
    print("the cells above):")
    print("")
    for lo, hi in res.boxes:
        print("[[grid.refine]]")
        print(f"lower = [{', '.join(repr(float(x)) for x in lo)}]")
        print(f"upper = [{', '.join(repr(float(x)) for x in hi)}]")
    return EXIT_OK




# --------------------------------------------------------------------------- export
def _export_add_args(p):
    p.add_argument("case", help="case file (TOML)")
    p.add_argument("--out", required=True, metavar="DIR", help="folder for the files")
    p.add_argument("--at", type=float, nargs="+", metavar="T",
                   help="times in seconds (default: --count instants over one cycle)")
    p.add_argument("--count", type=int, default=8, metavar="N", help="instants over one cycle when --at is not given")
    p.add_argument("--what", default="stl,tags,stencils,markers",
                   help="comma-separated subset of stl,tags,stencils,markers")
    p.add_argument("--margin", type=float, default=0.25, metavar="CHORDS",
                   help="tags and stencils are kept in the body's box plus this margin")


# More instants than any cycle is checked at; a whole cycle is --at every step's time.
_MAX_EXPORT_COUNT = 100_000


def _run_export(args) -> int:
    import numpy as np

    from .io.case import load_case
    from .tagging.classify import classify, label_bodies
    from .io.export import write_instants_csv, write_markers_csv, write_tags_vtu, write_time_series
    from .geometry import save_surface, surface_markers
    from .geometry.surface import mesh_from_arrays
    from .checks.sizing import swept_envelope
    from .stencils.build import build_stencils

    allowed = {"stl", "tags", "stencils", "markers"}
    what = {w.strip() for w in args.what.split(",") if w.strip()}
    if not what or what - allowed:
        raise InputError(f"--what takes a comma-separated subset of {', '.join(sorted(allowed))}, got {args.what!r}")
    if not 1 <= args.count <= _MAX_EXPORT_COUNT:
        raise InputError(f"--count must be between 1 and {_MAX_EXPORT_COUNT}, got {args.count}")
    if not (math.isfinite(args.margin) and args.margin >= 0.0):
        raise InputError(f"--margin must be a finite number of chords, 0 or more, got {args.margin!r}")
    if args.at and not all(math.isfinite(t) and t >= 0.0 for t in args.at):
        bad = next(t for t in args.at if not (math.isfinite(t) and t >= 0.0))
        raise InputError(f"--at takes times in seconds from 0 on, got {bad!r}")
    case = load_case(args.case)
    out = _output_folder(args.out, case.inputs, "--out")
    T = case.motion.period
    times = np.asarray(args.at, float) if args.at else np.arange(args.count) * T / args.count
    env = swept_envelope(case.surfaces, case.motions, case.grid.finest_spacing)
    nd = case.ndim
    level = case.grid.level_containing(env.lower[:nd], env.upper[:nd])
    grid = case.grid.levels[max(level, 0)]
    if nd == 2 and "markers" in what:
        raise InputError("--what markers: surface markers are for 3-D bodies; leave markers out in a 2-D case")
    written = []
    series = []
    for i, t in enumerate(times):
        v, faces = case.world_surface(float(t))
        stem = f"step{i:04d}"
        if "stl" in what:
            written.append(save_surface(mesh_from_arrays(v, faces), out / f"body_{stem}.stl"))
        if what & {"tags", "stencils"}:
            tags = classify((v, faces), grid)
            m = args.margin * case.chord
            region = grid.index_box(v.min(axis=0)[:nd] - m, v.max(axis=0)[:nd] + m)
            if "stencils" in what:
                st = build_stencils(tags, grid, (v, faces))
                written.append(st.save(out / f"stencils_{stem}.npz"))
                cond = np.zeros(grid.shape)
                cond.reshape(-1)[st.cells] = st.condition
                okf = np.zeros(grid.shape)
                okf.reshape(-1)[st.cells] = st.ok
                data = {"condition": cond, "stencil_ok": okf}
            else:
                data = {}
            if len(case.bodies) > 1:
                # Which body each solid cell belongs to (0: none), numbered by surface component.
                data["body"] = label_bodies((v, faces), grid)[0]
            if "tags" in what:
                f = write_tags_vtu(tags, grid, out / f"tags_{stem}.vtu", region=region, cell_data=data or None)
                written.append(f)
                series.append((float(t), f))
        if "markers" in what and i == 0:
            for body in case.bodies:
                p, n, a = surface_markers(body.surface, grid.spacing)
                name = "" if len(case.bodies) == 1 else "_" + "".join(ch if ch.isalnum() else "-" for ch in body.name)
                written.append(write_markers_csv(p, n, a, out / f"markers_body_frame{name}.csv"))
    if series:
        written.append(write_time_series(series, out / "tags.pvd"))
    if what & {"stl", "tags", "stencils"}:
        written.append(write_instants_csv(times, case.time.step, out / "instants.csv"))
    print(f"ibprep export: wrote {len(written)} files into {out}")
    for f in written:
        print(f"  {f}")
    return EXIT_OK


# --------------------------------------------------------------------------- demo
def _demo_add_args(p):
    import os

    p.add_argument("--out", default="ibprep-demo", metavar="DIR", help="folder for the demo's files")
    p.add_argument("--force", action="store_true", help="write into an --out folder that already holds files")
    _engine_args(p)
    # The demo is a real case (about 2e7 cells at the finest level): use two cores where there are two.
    p.set_defaults(workers=min(2, os.cpu_count() or 1))


def _run_demo(args) -> int:
    from .io.case import load_case
    from .io.demo import DEMO_CASE
    from .io.export import write_json_report, write_tags_vtu
    from .files import atomic_write
    from .geometry import save_surface
    from .checks.preflight import preflight

    _check_engine_args(args)
    out = Path(args.out)
    if out.is_dir() and any(out.iterdir()) and not args.force:
        raise InputError(f"--out {str(out)!r} already holds files (an earlier demo?); give --force to overwrite "
                         "them, or choose another --out folder")
    out = _output_folder(out, (), "--out")
    case_path = atomic_write(out / "case.toml", lambda tmp: Path(tmp).write_text(DEMO_CASE, encoding="utf-8"))
    case = load_case(case_path)
    print(_printable(f"ibprep demo: {case.title}"))
    print(f"  (invented data; case file {case_path})", flush=True)
    args.all_steps = False
    report = _preflight(case, args, preflight)
    files = [case_path, write_json_report(report, out / "report.json")]
    worst = _WorstStep(case, report) if report.steps else None
    files += _write_plots(case, report, out, worst)
    from .geometry.surface import mesh_from_arrays

    files.append(save_surface(mesh_from_arrays(*case.world_surface(0.0)), out / "body.stl"))
    if worst is not None:
        # The tags of the worst checked step near the body, for ParaView.
        import numpy as np

        m = 0.1 * case.chord
        nd = case.ndim
        v = worst.vertices
        region = worst.grid.index_box(np.min(v, axis=0)[:nd] - m, np.max(v, axis=0)[:nd] + m)
        files.append(write_tags_vtu(worst.tags, worst.grid, out / "tags_worst_step.vtu", region=region))
    print(format_report(report))
    print("")
    print(f"files written into {out}:")
    for f in files:
        print(f"  {f}")
    print(f"edit {case_path} and rerun:  ibprep check {case_path}")
    return EXIT_FAILED if report.verdict == "fail" else EXIT_OK


# --------------------------------------------------------------------------- main
_COMMANDS = {
    "demo": (_demo_add_args, _run_demo, "build the demo case, run the pre-flight, write its outputs"),
    "check": (_check_add_args, _run_check, "the pre-flight gate: exit 0 pass/warn, 1 fail, 2 bad input"),
    "size": (_size_add_args, _run_size, "refinement boxes and cell counts from the swept envelope"),
    "export": (_export_add_args, _run_export, "body STL, tags (VTU), stencil tables (NPZ) and markers at chosen times"),
}


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``ibprep`` command."""
    from ._version import __version__

    parser = _Parser(prog="ibprep", description="Prepare and check moving-body cases for sharp-interface "
                     "immersed-boundary solvers.", formatter_class=_HelpFormatter)
    parser.add_argument("--debug", action="store_true", help="show full tracebacks")
    parser.add_argument("--version", action="version", version=f"ibprep {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, (add_args, run, help_) in _COMMANDS.items():
        p = sub.add_parser(name, help=help_, description=help_, formatter_class=_HelpFormatter)
        add_args(p)
        p.set_defaults(run=run)
    return parser


def _say(message: str) -> None:
    print(f"ibprep: {_printable(message)}", file=sys.stderr, flush=True)


def main(argv=None) -> int:
    """Run the ``ibprep`` command; returns the exit code.

    0 every check passed (warnings allowed), 1 at least one check failed, 2 bad input
    or usage, 3 the run could not finish (an internal error or a lost worker),
    130 interrupted.
    """
    argv = sys.argv[1:] if argv is None else list(argv)
    debug = "--debug" in argv
    try:
        parser = build_parser()
        if argv in (["-h"], ["--help"]):
            parser.print_help()
            return EXIT_OK
        if not argv:
            raise InputError(f"give a command: {', '.join(_COMMANDS)} (see ibprep --help)")
        args = parser.parse_args(argv)
        if getattr(args, "command", None) is None:
            raise InputError(f"give a command: {', '.join(_COMMANDS)} (see ibprep --help)")
        return args.run(args)
    except InputError as exc:
        if debug:
            raise
        _say(f"error: {exc}")
        return EXIT_INPUT
    except IbprepError as exc:  # the run could not finish: a failed or lost worker
        if debug:
            raise
        _say(f"error: {exc}")
        return EXIT_INTERNAL
    except SystemExit as exc:  # argparse's --help and --version
        return int(exc.code or 0)
    except KeyboardInterrupt:
        _say("interrupted")
        return EXIT_INTERRUPTED
    except MemoryError:
        if debug:
            raise
        _say("error: ran out of memory; use a coarser grid, fewer --workers or a machine with more memory "
             "(rerun with --debug for the traceback)")
        return EXIT_INTERNAL
    except Exception as exc:  # noqa: BLE001 - the last resort: a bug, said so
        if debug:
            raise
        _say(f"internal error (a bug in ibprep): {type(exc).__name__}: {exc}; rerun with --debug for the "
             "traceback and report it")
        return EXIT_INTERNAL
