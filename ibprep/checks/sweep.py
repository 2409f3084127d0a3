"""Classify and build stencils over many time steps of a moving body.

Each checked instant ``t`` is a pair of consecutive solver steps: the tags at
``t`` and at ``t + dt`` give the real fresh cells (solid at ``t``, not solid at
``t + dt``) and covered cells, and the stencils at ``t + dt`` are built for
every interface cell and every fresh cell. Work is split into chunks of
consecutive instants; each chunk keeps its own incremental tagging state, so
the result does not depend on how the instants are split or who runs them.

Engines: serial (the default), local processes (``workers=N``), or a Dask
distributed cluster (``scheduler=ADDRESS``, or ``"local"`` for a local Dask
cluster). Whatever runs them, the per-step results are identical and come
back in time order.

Memory per task: the body arrays, three ``uint8`` tag arrays of the grid level
(previous, current and a copy with fresh cells marked: 3 bytes per cell), the
transition's crossing lists (proportional to the surface, not the grid), and
one step's stencil tables (about ``(8 + 16 k + 65)`` bytes per interface cell
with ``k`` neighbours). Nothing grows with the number of steps: each step
returns a few figures only.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field

import numpy as np

from ..tagging.classify import CellTag, classify, step_tags
from ..errors import IbprepError, InputError
from ..grid import Grid
from ..stencils.build import StencilLimits, build_stencils
from ..geometry.triangles import as_triangles, transform_points

__all__ = ["StepResult", "SweepTask", "run_chunk", "sweep", "chunk_instants"]

# How many failed-stencil locations each step keeps for the report.
_KEEP_BAD = 20
# Longest run of consecutive instants in one default chunk.
_CHUNK_STEPS = 25


@dataclass(frozen=True)
class StepResult:
    """Figures of one checked step pair (t, t + dt); the step checked is t + dt.

    Attributes
    ----------
    index : int — position of the instant in the sweep.
    time : float — seconds; ``t + dt``.
    n_solid, n_interface, n_fresh, n_covered : int — cell counts at ``t + dt``.
    n_stencils : int — stencils built (interface cells and fresh cells).
    n_bad : int — stencils not ok. n_fresh_bad : int — fresh cells among them.
    worst_condition, worst_weight_bound, min_weight : float — over this step's stencils.
    worst_condition_at, worst_weight_bound_at : (3,) float tuple — cell centres, metres.
    bad_points : tuple of (3,) float tuples — up to 20 failed-stencil centres, metres.
    body_outside : bool — no cell centre was solid (body off the grid).
    """

    index: int
    time: float
    n_solid: int
    n_interface: int
    n_fresh: int
    n_covered: int
    n_stencils: int
    n_bad: int
    n_fresh_bad: int
    worst_condition: float
    worst_condition_at: tuple
    worst_weight_bound: float
    worst_weight_bound_at: tuple
    min_weight: float
    bad_points: tuple
    body_outside: bool


@dataclass(frozen=True)
class SweepTask:
    """Everything a worker needs for a chunk of instants (plain, picklable data).

    bodies : tuple of (vertices (n, 3) float, faces (m, 3) int, Motion) — each body in
        its placed body frame, metres. grid : Grid — the level the bodies sit in.
    dt : float — seconds.
    instants : (k,) float — the ``t`` of each pair, seconds, increasing.
    first_index : int — index of the first instant in the whole sweep.
    bc, interface : str — stencil options. limits : StencilLimits.
    """

    bodies: tuple
    grid: Grid
    dt: float
    instants: np.ndarray
    first_index: int = 0
    bc: str = "dirichlet"
    interface: str = "fluid-side"
    limits: StencilLimits = field(default_factory=StencilLimits)


def _centre(grid: Grid, flat: int) -> tuple:
    idx = grid.unflat_index(np.array([flat]))[0]
    c = grid.centre_of(idx[None, :])[0]
    return tuple(float(v) for v in c)


def _step_figures(index: int, time: float, grid: Grid, tr, stencils, fresh_mask_cells) -> StepResult:
    tags = tr.tags
    n_solid = int(np.count_nonzero(tags == np.uint8(CellTag.SOLID)))
    n_interface = int(np.count_nonzero(tags == np.uint8(CellTag.INTERFACE)))
    n = len(stencils.cells)
    bad = ~stencils.ok
    if n:
        ic = int(np.argmax(stencils.condition))
        iw = int(np.argmax(stencils.weight_bound))
        worst_c, worst_c_at = float(stencils.condition[ic]), _centre(grid, int(stencils.cells[ic]))
        worst_w, worst_w_at = float(stencils.weight_bound[iw]), _centre(grid, int(stencils.cells[iw]))
        min_w = float(stencils.min_weight.min())
    else:
        worst_c = worst_w = min_w = float("nan")
        worst_c_at = worst_w_at = ()
    bad_cells = stencils.cells[bad]
    pts = grid.centre_of(grid.unflat_index(bad_cells[:_KEEP_BAD])) if bad_cells.size else np.empty((0, grid.ndim))
    return StepResult(
        index=index, time=float(time), n_solid=n_solid, n_interface=n_interface,
        n_fresh=int(tr.fresh.size), n_covered=int(tr.covered.size), n_stencils=n,
        n_bad=int(np.count_nonzero(bad)), n_fresh_bad=int(np.count_nonzero(bad & fresh_mask_cells)),
        worst_condition=worst_c, worst_condition_at=worst_c_at, worst_weight_bound=worst_w,
        worst_weight_bound_at=worst_w_at, min_weight=min_w,
        bad_points=tuple(tuple(float(v) for v in p) for p in pts), body_outside=bool(tr.body_outside),
    )


def _world(task: SweepTask, t: float):
    """All bodies at time t as one (vertices, faces) surface, world frame."""
    if len(task.bodies) == 1:
        v, f, m = task.bodies[0]
        return transform_points(m.pose(t), v), f
    verts, faces, offset = [], [], 0
    for v, f, m in task.bodies:
        verts.append(transform_points(m.pose(t), v))
        faces.append(f + offset)
        offset += len(v)
    return np.vstack(verts), np.vstack(faces)


def _check_pair(task: SweepTask, grid: Grid, k: int, t: float, previous, prev_surface):
    """Tags at t (incrementally from the previous pair when there is one), then at t + dt, then stencils."""
    s0 = _world(task, t)
    # One tag array per chunk, updated in place from pose to pose: the previous
    # pair's Transition and the state at t are not used again.
    if previous is None:
        state = classify(s0, grid, interface=task.interface)
    else:
        state = step_tags(previous, s0, grid, previous_surface=prev_surface, interface=task.interface,
                          overwrite_previous=True)
    s1 = _world(task, t + task.dt)
    tr = step_tags(state, s1, grid, previous_surface=s0, interface=task.interface, overwrite_previous=True)
    tags = tr.tags
    if tr.fresh.size and task.interface == "fluid-side":
        # Fresh cells need a reconstruction too: build their stencils with the interface cells.
        tags = tags.copy()
        tags.reshape(-1)[tr.fresh] = CellTag.INTERFACE
    stencils = build_stencils(tags, grid, s1, bc=task.bc, interface=task.interface, limits=task.limits)
    fresh_mask = np.isin(stencils.cells, tr.fresh)
    return tr, _step_figures(task.first_index + k, t + task.dt, grid, tr, stencils, fresh_mask)


def run_chunk(task: SweepTask) -> list[StepResult]:
    """Check every instant of a chunk in order, keeping the incremental tagging state.

    Parameters
    ----------
    task : SweepTask

    Returns
    -------
    list of StepResult, one per instant, in order.
    """
    import warnings

    from ..errors import IbprepWarning

    grid = task.grid
    out = []
    previous = None
    prev_surface = None
    with warnings.catch_warnings():
        # An empty grid level is reported through StepResult.body_outside.
        warnings.simplefilter("ignore", IbprepWarning)
        for k, t in enumerate(np.asarray(task.instants, dtype=float)):
            try:
                tr, result = _check_pair(task, grid, k, float(t), previous, prev_surface)
            except IbprepError:
                raise
            except Exception as exc:  # say which step pair broke; never a silent pass
                raise IbprepError(
                    f"the step pair at t = {t:.6g} s (instant {task.first_index + k}) failed: "
                    f"{type(exc).__name__}: {exc}"
                ) from exc
            out.append(result)
            previous, prev_surface = tr, _world(task, t + task.dt)
    return out


def chunk_instants(instants, n_chunks: int) -> list[tuple[int, np.ndarray]]:
    """Split increasing instants into ``n_chunks`` runs of consecutive ones: (first index, times)."""
    instants = np.asarray(instants, dtype=float)
    n_chunks = max(1, min(int(n_chunks), len(instants)))
    bounds = np.linspace(0, len(instants), n_chunks + 1).round().astype(int)
    return [(int(a), instants[a:b]) for a, b in zip(bounds[:-1], bounds[1:]) if b > a]


def sweep(surface, motion, grid: Grid, instants, dt: float, *, bc: str = "dirichlet",
          interface: str = "fluid-side", limits: StencilLimits | None = None, workers: int = 1,
          scheduler: str | None = None, chunks: int | None = None, progress=None) -> list[StepResult]:
    """Check step pairs (t, t + dt) at the given instants; serial, local processes or Dask.

    Parameters
    ----------
    surface : closed surface, or a sequence of them — each body in its (placed) body frame, metres.
    motion : Motion, or a sequence of them, one per body.
    grid : Grid — the level the bodies sit in.
    instants : (k,) float — seconds, increasing.
    dt : float — seconds, the solver step.
    bc, interface : str — stencil options (see :func:`~ibprep.build_stencils`).
    limits : StencilLimits, optional.
    workers : int — local processes (1 = serial, in this process).
    scheduler : str, optional — address of a Dask distributed scheduler
        (``tcp://host:8786``), or ``"local"`` to start a local Dask cluster of
        ``workers`` single-threaded processes; needs ``pip install "ibprep[dask]"``.
    chunks : int, optional — number of chunks of consecutive instants (default: the
        number of workers, or two per Dask worker, and more where needed so that no
        chunk holds more than 25 instants).
    progress : callable, optional — called with (done, total) instants as chunks finish.

    Returns
    -------
    list of StepResult in instant order.

    Raises
    ------
    InputError
        Bad options, or Dask asked for but not installed.
    IbprepError
        A worker failed; the message names the first instant of its chunk.
    """
    if isinstance(motion, (list, tuple)):
        surfaces, motions = list(surface), list(motion)
        if len(surfaces) != len(motions) or not surfaces:
            raise InputError(f"give one motion per body: {len(surfaces)} surfaces, {len(motions)} motions")
    else:
        surfaces, motions = [surface], [motion]
    bodies = tuple((*as_triangles(s_), m_) for s_, m_ in zip(surfaces, motions))
    instants = np.asarray(instants, dtype=float)
    if instants.ndim != 1 or instants.size == 0:
        raise InputError("instants must be a non-empty 1-D array of times in seconds")
    if not (math.isfinite(dt) and dt > 0):
        raise InputError(f"the time step must be a positive number of seconds, got {dt!r}")
    if not isinstance(workers, int) or workers < 1:
        raise InputError(f"workers must be a whole number >= 1, got {workers!r}")
    limits = limits if limits is not None else StencilLimits()
    if scheduler is not None and not isinstance(scheduler, str):
        raise InputError(f"scheduler must be an address like tcp://host:8786 or 'local', got {scheduler!r}")
    if chunks is None:
        # At least one chunk per worker (two per Dask worker), and no chunk longer than
        # _CHUNK_STEPS instants, so progress is reported often, a killed run stops soon and
        # uneven chunks balance out. Each chunk starts with one full tagging (cheap beside
        # its stencils); the results do not depend on the chunking.
        per_worker = workers if scheduler is None else 2 * max(1, workers)
        n_chunks = max(per_worker, math.ceil(len(instants) / _CHUNK_STEPS))
    else:
        n_chunks = chunks
    parts = chunk_instants(instants, n_chunks)
    tasks = [SweepTask(bodies, grid, float(dt), times, first, bc, interface, limits) for first, times in parts]
    total = len(instants)
    results: list[StepResult] = []

    def _done(res):
        results.extend(res)
        if progress is not None:
            progress(len(results), total)

    if scheduler is not None:
        _run_dask(tasks, scheduler, workers, _done)
    elif workers == 1 or len(tasks) == 1:
        for task in tasks:
            _done(run_chunk(task))
    else:
        _run_processes(tasks, workers, _done)
    results.sort(key=lambda r: r.index)
    return results


def _failure(task: SweepTask, exc: BaseException) -> IbprepError:
    return IbprepError(
        f"a sweep worker failed on the chunk starting at t = {task.instants[0]:.6g} s "
        f"(instant {task.first_index}): {type(exc).__name__}: {exc}"
    )


def _run_processes(tasks, workers: int, done) -> None:
    import concurrent.futures as cf
    import multiprocessing as mp

    ctx = mp.get_context("spawn")
    with cf.ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_watch_parent,
                                initargs=(os.getpid(),)) as pool:
        futures = {pool.submit(run_chunk, t): t for t in tasks}
        for fut in cf.as_completed(futures):
            try:
                done(fut.result())
            except IbprepError:
                raise
            except Exception as exc:  # a worker died or raised: never a pass
                for other in futures:
                    other.cancel()
                raise _failure(futures[fut], exc) from exc


def _watch_parent(parent: int) -> None:
    """In a pool worker: exit as soon as the process that started it is gone.

    A run killed by a batch system's time limit (SIGTERM or SIGKILL to the
    parent) must not leave workers computing their chunks for minutes.
    """
    import threading
    import time

    def watch():
        while os.getppid() == parent:
            time.sleep(1.0)
        os._exit(1)

    threading.Thread(target=watch, name="ibprep-parent-watch", daemon=True).start()


def _run_dask(tasks, scheduler: str, workers: int, done) -> None:
    try:
        from distributed import Client, LocalCluster, as_completed
    except ImportError:
        raise InputError(
            'a Dask scheduler was asked for but dask.distributed is not installed; pip install "ibprep[dask]"'
        ) from None
    cluster = None
    try:
        if scheduler == "local":
            cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                   dashboard_address=None)
            client = Client(cluster)
        else:
            client = Client(scheduler, timeout="20s")
    except (OSError, TimeoutError) as exc:
        if cluster is not None:
            cluster.close()
        raise InputError(f"cannot reach the Dask scheduler at {scheduler!r}: {exc}") from None
    try:
        futures = client.map(run_chunk, tasks, pure=False)
        owner = {f.key: t for f, t in zip(futures, tasks)}
        for fut in as_completed(futures):
            try:
                res = fut.result()
            except Exception as exc:  # a task raised or its worker died: never a pass
                client.cancel(futures)
                raise _failure(owner[fut.key], exc) from exc
            done(res)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
