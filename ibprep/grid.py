"""Cartesian background grids and nested refinement boxes.

A :class:`Grid` is a uniform, cell-centred Cartesian block in 2-D or 3-D:
``lower`` and ``upper`` are the outer faces, ``spacing`` is the cell size ``h``
(the same along every axis), and cell ``(i, j, k)`` has its centre at
``lower + (i + 1/2, j + 1/2, k + 1/2) h``. Flat cell indices are C order over
``Grid.shape`` (the last axis varies fastest), as ``numpy.ravel_multi_index``.

A :class:`NestedGrid` is a base grid plus a chain of refinement boxes; each box
is snapped outward to the cell faces of the level it sits in and halves its
spacing.

A grid with two-component bounds is 2-D. A 3-D grid whose shape has one cell
along z is a single-layer grid: :attr:`Grid.is_planar` is true for both, and
the stencil builder then fits in the x–y plane.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .errors import InputError

__all__ = ["Grid", "NestedGrid", "refine", "MemoryEstimate", "MAX_CELLS_PER_LEVEL"]

#: The most cells one grid level may have (2**40, about 1.1e12). Far beyond what
#: one machine can tag (a byte per cell is 1 TiB), and small enough that every
#: count and flat index stays exact in int64 and float64. A larger grid is bad
#: input, refused before anything is allocated.
MAX_CELLS_PER_LEVEL = 2**40

# An extent is a whole number of cells if it is within this relative distance of
# one; 2 / (2/115) = 115.00000000000001 passes, 75.5 cells does not.
_WHOLE_CELLS_RTOL = 1e-9

_AXES = "xyz"


def _as_bounds(value, name: str) -> tuple[float, ...]:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"grid {name} must be 2 or 3 numbers in metres, got {value!r}") from None
    if arr.ndim != 1 or arr.size not in (2, 3):
        raise InputError(f"grid {name} must be 2 or 3 numbers in metres, got {value!r}")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"grid {name} must be finite, got {value!r}")
    return tuple(float(v) for v in arr)


def _whole_cells(extent: float, spacing: float, axis: str) -> int:
    n_float = extent / spacing
    if not n_float <= MAX_CELLS_PER_LEVEL:  # also catches inf and nan: int() would overflow
        raise InputError(
            f"grid extent along {axis} ({extent:.6g} m) holds {n_float:.3g} cells of spacing {spacing:.6g} m, "
            f"more than the {MAX_CELLS_PER_LEVEL:.3g} cells a level may have; check the units of the bounds "
            "and the spacing"
        )
    n = int(round(n_float))
    if n < 1 or abs(n_float - n) > _WHOLE_CELLS_RTOL * max(1.0, n_float):
        lo = max(1, math.floor(n_float))
        hi = math.ceil(n_float)
        raise InputError(
            f"grid extent along {axis} ({extent:.6g} m) is not a whole number of cells of "
            f"spacing {spacing:.6g} m ({n_float:.4f} cells); make the extent "
            f"{lo * spacing:.6g} m or {hi * spacing:.6g} m, or choose a spacing that divides it"
        )
    return n


@dataclass(frozen=True)
class Grid:
    """A uniform cell-centred Cartesian grid.

    Parameters
    ----------
    lower, upper : (d,) float — metres, world frame; outer cell faces, d = 2 or 3.
    spacing : float — metres; cell size along every axis.

    Attributes
    ----------
    shape : (d,) tuple of int — cells along each axis.
    ndim : int — 2 or 3.

    Raises
    ------
    InputError
        Non-finite or mismatched bounds, a non-positive spacing, or an extent that
        is not a whole number of cells (the message says which sizes would fit).
    """

    lower: tuple[float, ...]
    upper: tuple[float, ...]
    spacing: float
    shape: tuple[int, ...] = field(init=False)

    def __post_init__(self) -> None:
        lower = _as_bounds(self.lower, "lower")
        upper = _as_bounds(self.upper, "upper")
        if len(lower) != len(upper):
            raise InputError(
                f"grid lower has {len(lower)} components but upper has {len(upper)}; give both in 2-D or both in 3-D"
            )
        try:
            h = float(self.spacing)
        except (TypeError, ValueError):
            raise InputError(f"grid spacing must be a number in metres, got {self.spacing!r}") from None
        if not math.isfinite(h) or h <= 0.0:
            raise InputError(f"grid spacing must be a positive finite length in metres, got {self.spacing!r}")
        shape = []
        for axis, lo, hi in zip(_AXES, lower, upper):
            if not hi > lo:
                raise InputError(f"grid upper {axis} ({hi:.6g}) must exceed lower {axis} ({lo:.6g})")
            shape.append(_whole_cells(hi - lo, h, axis))
        cells = math.prod(shape)  # Python ints: no wrap-around
        if cells > MAX_CELLS_PER_LEVEL:
            raise InputError(
                f"grid of {' x '.join(map(str, shape))} = {cells:.3g} cells at spacing {h:.6g} m is more than the "
                f"{MAX_CELLS_PER_LEVEL:.3g} cells a level may have ({cells / 2**40:.3g} TiB at one byte a cell); "
                "use a coarser spacing or a smaller domain"
            )
        object.__setattr__(self, "lower", lower)
        object.__setattr__(self, "upper", upper)
        object.__setattr__(self, "spacing", h)
        object.__setattr__(self, "shape", tuple(shape))

    # ------------------------------------------------------------------ sizes
    @property
    def ndim(self) -> int:
        """Number of axes, 2 or 3."""
        return len(self.shape)

    @property
    def size(self) -> int:
        """Number of cells (an exact Python int)."""
        return math.prod(self.shape)

    @property
    def is_planar(self) -> bool:
        """True for a 2-D grid or a 3-D grid one cell thick along z."""
        return self.ndim == 2 or self.shape[2] == 1

    @property
    def extent(self) -> tuple[float, ...]:
        """Lengths of the grid along each axis, metres."""
        return tuple(n * self.spacing for n in self.shape)

    # ------------------------------------------------------------ coordinates
    def axes(self) -> tuple[np.ndarray, ...]:
        """Cell-centre coordinates along each axis: d arrays of shape (n_axis,), metres."""
        h = self.spacing
        return tuple(lo + (np.arange(n) + 0.5) * h for lo, n in zip(self.lower, self.shape))

    def centres(self) -> np.ndarray:
        """All cell centres, shape (*shape, d), metres. Allocates 8·d bytes per cell."""
        return np.stack(np.meshgrid(*self.axes(), indexing="ij"), axis=-1)

    def centre_of(self, index) -> np.ndarray:
        """Centres of cells given by integer indices.

        Parameters
        ----------
        index : (n, d) int — cell indices.

        Returns
        -------
        (n, d) float — metres.
        """
        idx = np.asarray(index)
        return np.asarray(self.lower) + (idx + 0.5) * self.spacing

    def cell_of(self, points) -> np.ndarray:
        """Index of the cell containing each point (floor of the face coordinate).

        Parameters
        ----------
        points : (n, d) float — metres, world frame.

        Returns
        -------
        (n, d) int64 — indices; points outside the grid give indices outside
        ``[0, shape)``; use :meth:`contains_index` to test them.
        """
        p = np.asarray(points, dtype=float)
        if p.shape[-1] != self.ndim:
            raise InputError(f"points must have {self.ndim} components, got shape {p.shape}")
        return np.floor((p - np.asarray(self.lower)) / self.spacing).astype(np.int64)

    def contains_index(self, index) -> np.ndarray:
        """(n,) bool — which of the (n, d) integer indices lie inside the grid."""
        idx = np.asarray(index)
        return np.all((idx >= 0) & (idx < np.asarray(self.shape)), axis=-1)

    def flat_index(self, index) -> np.ndarray:
        """(n,) int64 — C-order flat indices of (n, d) in-range integer indices."""
        idx = np.asarray(index, dtype=np.int64)
        return np.ravel_multi_index(tuple(idx[..., a] for a in range(self.ndim)), self.shape).astype(np.int64)

    def unflat_index(self, flat) -> np.ndarray:
        """(n, d) int64 — integer indices of (n,) C-order flat indices."""
        return np.stack(np.unravel_index(np.asarray(flat, dtype=np.int64), self.shape), axis=-1).astype(np.int64)

    def index_box(self, lower, upper) -> tuple[slice, ...]:
        """Slices selecting the cells whose centres lie in the closed box [lower, upper].

        Parameters
        ----------
        lower, upper : (d,) float — metres.

        Returns
        -------
        tuple of d slices, possibly empty, clipped to the grid.
        """
        lo = np.asarray(lower, dtype=float) - np.asarray(self.lower)
        hi = np.asarray(upper, dtype=float) - np.asarray(self.lower)
        h = self.spacing
        start = np.maximum(np.ceil(lo / h - 0.5), 0).astype(np.int64)
        stop = np.minimum(np.floor(hi / h - 0.5) + 1, np.asarray(self.shape)).astype(np.int64)
        stop = np.maximum(stop, start)
        return tuple(slice(int(a), int(b)) for a, b in zip(start, stop))

    def contains_points(self, points) -> np.ndarray:
        """(n,) bool — which (n, d) points lie within the grid's outer faces."""
        p = np.asarray(points, dtype=float)
        return np.all((p >= np.asarray(self.lower)) & (p <= np.asarray(self.upper)), axis=-1)


@dataclass(frozen=True)
class MemoryEstimate:
    """Bytes needed to hold the per-cell and per-stencil arrays of a grid.

    Attributes
    ----------
    tags : int — one byte per cell (uint8 tag codes).
    stencils : int — the stencil tables for the estimated interface cells.
    total : int — the sum.
    """

    tags: int
    stencils: int

    @property
    def total(self) -> int:
        """Sum of all parts, bytes."""
        return self.tags + self.stencils


def stencil_bytes(n_interface: int, k: int, ndim: int = 3) -> int:
    """Bytes of a stencil table with ``n_interface`` rows of ``k`` neighbours.

    Per row: cell index (8), k neighbour indices and weights (16 k), boundary point
    and normal (16 d), boundary weight, condition number (16) and the ok flag (1).
    """
    return int(n_interface) * (8 + 16 * int(k) + 16 * int(ndim) + 16 + 1)


@dataclass(frozen=True)
class NestedGrid:
    """A base grid and a chain of nested refinement levels.

    Level 0 is the base grid; level ``l`` sits inside level ``l - 1``, its faces on
    that level's cell faces, with half its spacing. Build it with :func:`refine`.

    Attributes
    ----------
    levels : tuple of Grid — coarsest first.
    """

    levels: tuple[Grid, ...]

    def __post_init__(self) -> None:
        if not self.levels:
            raise InputError("a nested grid needs at least the base level")
        for lvl, (parent, child) in enumerate(zip(self.levels, self.levels[1:]), start=1):
            if not math.isclose(child.spacing * 2.0, parent.spacing, rel_tol=1e-12):
                raise InputError(f"refinement level {lvl} must halve the spacing of level {lvl - 1}")

    @property
    def base(self) -> Grid:
        """The coarsest level."""
        return self.levels[0]

    @property
    def finest(self) -> Grid:
        """The finest level."""
        return self.levels[-1]

    @property
    def finest_spacing(self) -> float:
        """Spacing of the finest level, metres."""
        return self.levels[-1].spacing

    def cells_per_level(self) -> tuple[int, ...]:
        """Cells in each level's whole box, coarsest first."""
        return tuple(g.size for g in self.levels)

    def leaf_cells_per_level(self) -> tuple[int, ...]:
        """Cells of each level not covered by the next finer level (the cells a solver updates)."""
        counts = []
        for lvl, g in enumerate(self.levels):
            n = g.size
            if lvl + 1 < len(self.levels):
                n -= self.levels[lvl + 1].size // (2 ** g.ndim)
            counts.append(n)
        return tuple(counts)

    @property
    def total_cells(self) -> int:
        """Cells of every level's whole box, summed."""
        return int(sum(self.cells_per_level()))

    @property
    def leaf_cells(self) -> int:
        """Cells not covered by a finer level, summed over levels."""
        return int(sum(self.leaf_cells_per_level()))

    def level_containing(self, lower, upper) -> int:
        """Index of the finest level whose box contains the box [lower, upper], or -1."""
        lo = np.asarray(lower, dtype=float)
        hi = np.asarray(upper, dtype=float)
        for lvl in range(len(self.levels) - 1, -1, -1):
            g = self.levels[lvl]
            if np.all(lo >= np.asarray(g.lower)) and np.all(hi <= np.asarray(g.upper)):
                return lvl
        return -1

    def memory_estimate(self, n_interface: int = 0, k: int = 27) -> MemoryEstimate:
        """Bytes for one tag array per level and a stencil table of ``n_interface`` rows.

        Parameters
        ----------
        n_interface : int — interface cells expected at one step (all levels).
        k : int — neighbours per stencil row.
        """
        return MemoryEstimate(tags=self.total_cells, stencils=stencil_bytes(n_interface, k, self.base.ndim))


def _snap_box(parent: Grid, lower, upper, which: int) -> Grid:
    lo = _as_bounds(lower, f"refine[{which}].lower")
    hi = _as_bounds(upper, f"refine[{which}].upper")
    if len(lo) != parent.ndim or len(hi) != parent.ndim:
        raise InputError(
            f"refinement box {which} has {len(lo)}/{len(hi)} components but the grid is {parent.ndim}-D"
        )
    plo = np.asarray(parent.lower)
    h = parent.spacing
    # Snap outward to parent faces, with a tolerance of 1e-9 cells so that a box already
    # on a face does not grow by a cell through rounding.
    f0 = (np.asarray(lo) - plo) / h + 1e-9
    f1 = (np.asarray(hi) - plo) / h - 1e-9
    for a in range(parent.ndim):
        if not f1[a] > f0[a] - 2e-9:
            raise InputError(
                f"refinement box {which} is empty along {_AXES[a]} (lower {lo[a]!r} m, upper {hi[a]!r} m)"
            )
        # Compared as floats, before any cast to integers (a bound of 1e300 must not overflow).
        if not (f0[a] >= 0.0 and f1[a] <= parent.shape[a]):
            raise InputError(
                f"refinement box {which} reaches outside the level it sits in along {_AXES[a]} "
                f"([{lo[a]!r}, {hi[a]!r}] m against [{parent.lower[a]!r}, {parent.upper[a]!r}] m); "
                "shrink the box or enlarge the domain"
            )
    i0 = np.floor(f0).astype(np.int64)
    i1 = np.ceil(f1).astype(np.int64)
    for a in range(parent.ndim):
        if not i1[a] > i0[a]:
            raise InputError(
                f"refinement box {which} is empty along {_AXES[a]} (lower {lo[a]!r} m, upper {hi[a]!r} m)"
            )
    new_lo = tuple(float(v) for v in plo + i0 * h)
    new_hi = tuple(float(v) for v in plo + i1 * h)
    return Grid(lower=new_lo, upper=new_hi, spacing=h / 2.0)


def refine(base: Grid, boxes=()) -> NestedGrid:
    """Nest refinement boxes in a base grid, each inside the previous one.

    Parameters
    ----------
    base : Grid — the background grid (level 0).
    boxes : sequence of (lower, upper) pairs — metres; box ``l`` becomes level
        ``l + 1``. Each box is snapped outward to the cell faces of the level it
        sits in, and must lie inside that level.

    Returns
    -------
    NestedGrid

    Raises
    ------
    InputError
        A box with the wrong number of components, empty, or outside its parent.
    """
    levels = [base]
    for which, box in enumerate(boxes):
        try:
            lower, upper = box
        except (TypeError, ValueError):
            raise InputError(f"refinement box {which} must be a (lower, upper) pair, got {box!r}") from None
        levels.append(_snap_box(levels[-1], lower, upper, which))
    return NestedGrid(levels=tuple(levels))
