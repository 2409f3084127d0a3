"""Step sweeps: serial, local processes and Dask give the same report; failures never pass."""

import json

import numpy as np
import pytest

from cases import SMALL_CASE
from ibprep import IbprepError, InputError, Motion, parse_case, preflight, sweep
from ibprep.checks.sweep import chunk_instants


def _report_json(**kw):
    rep = preflight(parse_case(SMALL_CASE), **kw)
    return json.loads(rep.to_json()), rep


@pytest.fixture(scope="module")
def serial():
    return _report_json()


def test_chunks_are_consecutive_and_cover_everything():
    t = np.arange(10) * 0.1
    parts = chunk_instants(t, 3)
    assert [first for first, _ in parts] == [0, 3, 7]
    np.testing.assert_array_equal(np.concatenate([p for _, p in parts]), t)
    assert len(chunk_instants(t, 50)) == 10


def test_split_into_chunks_gives_identical_steps(serial):
    # Each chunk restarts its incremental state with a full tagging: results must not change.
    _, rep = serial
    case = parse_case(SMALL_CASE)
    from ibprep.checks.preflight import check_instants

    t = check_instants(case)
    grid = case.grid.levels[rep.figures["resolution"]["level_at_body"]]
    one = sweep(case.surface, case.motion, grid, t, case.time.step)
    three = sweep(case.surface, case.motion, grid, t, case.time.step, chunks=3)
    assert one == three
    assert one == list(rep.steps)


@pytest.mark.slow
def test_processes_give_the_identical_report(serial):
    d, _ = serial
    d2, _ = _report_json(workers=2)
    assert d2 == d


@pytest.mark.slow
def test_dask_local_cluster_gives_the_identical_report(serial):
    pytest.importorskip("distributed")
    d, _ = serial
    d2, _ = _report_json(workers=2, scheduler="local")
    assert d2 == d


class _BrokenMotion(Motion):
    """A motion whose pose fails after a given time: stands in for a worker that breaks mid-sweep."""

    def pose(self, t):
        if np.max(t) > 1.0:
            raise RuntimeError("simulated worker failure")
        return super().pose(t)


def _broken_sweep(**kw):
    case = parse_case(SMALL_CASE)
    m = case.motion
    broken = _BrokenMotion(frequency=m.frequency, plunge_amplitude=m.plunge_amplitude,
                           pitch_amplitude=m.pitch_amplitude, phase=m.phase, pivot=m.pivot)
    t = np.linspace(0, 2.0, 6)
    return sweep(case.surface, broken, case.grid.finest, t, case.time.step, **kw)


def test_a_failing_step_is_an_error_naming_the_step_serial():
    # Instants 0, 0.4, ..., 2.0 s; the pose fails beyond 1 s, first at the pair (1.2, 1.202).
    with pytest.raises(IbprepError, match=r"step pair at t = 1\.2 s \(instant 3\) failed: .*simulated worker failure"):
        _broken_sweep()


class _DyingMotion(Motion):
    """A motion whose process dies outright past a given time: a killed worker."""

    def pose(self, t):
        if np.max(t) > 1.0:
            import os

            os._exit(3)
        return super().pose(t)


@pytest.mark.slow
def test_a_killed_process_worker_is_an_error_not_a_pass():
    case = parse_case(SMALL_CASE)
    m = case.motion
    dying = _DyingMotion(frequency=m.frequency, plunge_amplitude=m.plunge_amplitude,
                         pitch_amplitude=m.pitch_amplitude, phase=m.phase, pivot=m.pivot)
    with pytest.raises(IbprepError, match=r"sweep worker failed on the chunk starting at t = .* s"):
        sweep(case.surface, dying, case.grid.finest, np.linspace(0, 2.0, 6), case.time.step, workers=2)


@pytest.mark.slow
def test_a_failing_task_on_dask_is_an_error_not_a_pass():
    pytest.importorskip("distributed")
    from distributed import LocalCluster

    with LocalCluster(n_workers=1, processes=False, dashboard_address=None) as cluster:
        with pytest.raises(IbprepError, match=r"sweep worker failed on the chunk starting at t = .* s"):
            _broken_sweep(scheduler=cluster.scheduler_address, chunks=3)


def test_bad_engine_options_are_input_errors():
    case = parse_case(SMALL_CASE)
    with pytest.raises(InputError, match="workers must be a whole number >= 1"):
        sweep(case.surface, case.motion, case.grid.finest, [0.0], 0.002, workers=0)
    with pytest.raises(InputError, match="non-empty 1-D array"):
        sweep(case.surface, case.motion, case.grid.finest, [], 0.002)
    with pytest.raises(InputError, match="positive number of seconds"):
        sweep(case.surface, case.motion, case.grid.finest, [0.0], -1.0)


def test_default_chunks_report_progress_every_few_instants(monkeypatch):
    # A long serial sweep reports progress as chunks of at most _CHUNK_STEPS instants finish,
    # not once at the end; the steps are the same as in one chunk.
    import importlib

    sw = importlib.import_module("ibprep.checks.sweep")  # the module (ibprep.sweep is the function)
    monkeypatch.setattr(sw, "_CHUNK_STEPS", 4)
    case = parse_case(SMALL_CASE)
    t = np.arange(10) * case.time.step
    seen = []
    steps = sweep(case.surface, case.motion, case.grid.finest, t, case.time.step, progress=lambda d, n: seen.append((d, n)))
    assert [d for d, _ in seen] == [3, 7, 10] and {n for _, n in seen} == {10}
    assert steps == sweep(case.surface, case.motion, case.grid.finest, t, case.time.step, chunks=1)


_ORPHAN_SCRIPT = r"""
import concurrent.futures as cf, multiprocessing as mp, os, sys, time
from ibprep.checks.sweep import _watch_parent

if __name__ == "__main__":
    with cf.ProcessPoolExecutor(1, mp_context=mp.get_context("spawn"), initializer=_watch_parent,
                                initargs=(os.getpid(),)) as pool:
        print(pool.submit(os.getpid).result(), flush=True)
        pool.submit(time.sleep, 120)
        time.sleep(120)
"""


@pytest.mark.slow
def test_pool_workers_exit_when_the_run_is_killed(tmp_path):
    # A batch system's time limit kills the parent: its workers must not compute on for minutes.
    import os
    import signal
    import subprocess
    import sys
    import time

    script = tmp_path / "parent.py"
    script.write_text(_ORPHAN_SCRIPT)
    parent = subprocess.Popen([sys.executable, str(script)], stdout=subprocess.PIPE, text=True)
    worker = int(parent.stdout.readline())
    os.kill(parent.pid, signal.SIGKILL)
    parent.wait()
    def alive(pid):  # a zombie (exited, not yet reaped by an init that does not reap) is gone
        try:
            with open(f"/proc/{pid}/stat") as fh:
                return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
        except FileNotFoundError:
            return False
        except OSError:  # no /proc: ask the kernel
            try:
                os.kill(pid, 0)
            except ProcessLookupError:
                return False
            return True

    deadline = time.monotonic() + 30.0
    while time.monotonic() < deadline:
        if not alive(worker):
            break
        time.sleep(0.2)
    else:
        os.kill(worker, signal.SIGKILL)
        pytest.fail("the pool worker outlived its killed parent by 30 s")
