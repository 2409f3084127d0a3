"""Weighted-least-squares quadratic stencils for interface cells.

For each interface cell the builder finds the closest point on the surface
(the boundary point, where the boundary condition is imposed), gathers the
fluid cells around it that it can *see* (the straight segment from the cell to
the neighbour does not cross the surface), and fits a quadratic polynomial (6
terms in 2-D, 10 in 3-D) to the neighbour values and the boundary datum by
weighted least squares. The fit's value at the cell is a fixed linear
combination of the data: those coefficients are the stencil.

Reconstruction (the contract a solver reads)::

    phi[cells] ≈ (weights * phi_flat[neighbours]).sum(1) + boundary_weight * g

with ``g = phi(boundary_point)`` for ``bc="dirichlet"`` and
``g = grad(phi)(boundary_point) · boundary_normal`` for ``bc="neumann"``.
Padded entries have ``neighbours == -1`` and ``weights == 0``. Read literally the formula indexes
``phi_flat[-1]`` for them, and ``0 * nan`` is NaN: mask them out (as :meth:`Stencils.reconstruct`
does), ``np.where(neighbours >= 0, phi_flat[np.maximum(neighbours, 0)], 0.0)``.

Choices (documented defaults)
-----------------------------
* Neighbours: non-solid cells other than the cell itself. With fluid-side
  interface cells other interface cells are allowed (they are fluid; the solver
  couples them, or excludes them with ``interface_neighbours=False``). With
  solid-side interface cells (ghost cells, which are solid) only fluid cells
  are neighbours.
* Candidates come from integer offsets within a support radius of
  ``radius`` cells (default 2) around the cell, grown by half a cell until at
  least ``min_visible`` neighbours are visible (default twice the basis size:
  20 in 3-D, 12 in 2-D) or ``max_radius`` (default 4 cells) is reached; the
  nearest ``max_neighbours`` visible ones are kept (default three times the
  basis size).
* Visibility: the segment from the fitting origin to the neighbour centre must
  not meet the surface (fluid-side: from the cell centre; solid-side: from the
  boundary point nudged 1e-6 h into the fluid; image point: from the image
  point). Per stencil the triangle pieces near the origin are gathered once
  (and again for each grown round); a box screen, the side of each piece's
  plane and its bounding sphere pass only the segments that may cross it to
  the exact Möller–Trumbore test.
* The fit is made in coordinates centred on the fitting point and divided by
  the spacing (Mirzaei, Schaback & Dehghan 2012); weights are functions of
  that scaled distance ρ with support S = r + 1 cells (r the stencil's final
  radius): ``"gaussian"`` (default) exp(-(2ρ/S)²), ``"inverse-distance"``
  1/(ρ² + 1/16) (Shepard 1968, regularised at a sixteenth of a cell squared),
  ``"wendland"`` (1 - ρ/S)⁴ (4ρ/S + 1) (Wendland 1995, C²). The boundary
  datum is one more row of the fit, weighted the same way at its distance.
* The least-squares problem is solved through a Householder QR of the weighted
  design matrix, one small matrix per stencil; the condition number is the
  ratio of its extreme singular values, taken from the eigenvalues of R^T R
  (accurate to a few digits up to ~1e6; above ~1e7 it is reported as inf).
* Candidates, visibility and the fit run as one compiled pass over the cells
  (:func:`ibprep.stencils.kernels.stencil_fits`). ``_fit_arrays`` does the same with
  batched arrays over all stencils, calling the fan crossing test and the WLS
  solve as separate kernels (each held to its numpy/LAPACK twin); it is the
  reference the compiled pass's candidate selection, boundary points and row
  layout are tested against.
* 2-D grids: points and normals are (n, 3) with z = 0; single-layer 3-D grids
  (``grid.is_planar``) fit in the x–y plane with the 6-term basis and keep the
  cells' z.

Ghost cells through an image point (``method="image-point"``, solid-side only;
Tseng & Ferziger 2003; Mittal et al. 2008): the image point IP = 2 BI - G of the
ghost cell G through its boundary intercept BI is reconstructed by the same WLS
fit (fluid neighbours around IP plus the boundary row), then
``phi_G = 2 g - phi_IP`` (Dirichlet) or ``phi_G = phi_IP - |G - IP| g`` (Neumann).
The Dirichlet variant is second order (exact for fields linear along the
normal), not quadratic-exact like the direct fit; the Neumann variant is a
central difference about BI and measured third order on spheres. A ghost cell
whose image point falls inside the body (a body thinner than the ghost layer)
sees no fluid and is flagged not ok.

Figures per stencil: ``condition``; ``n_visible``; ``weight_bound`` =
Σ|w| + |w_b| (|w_b|/h for Neumann), a Lebesgue-type amplification factor;
``min_weight``, the most negative neighbour weight. ``ok`` applies
:class:`StencilLimits` (defaults justified in its docstring) to them.
"""

from __future__ import annotations

import math
import os
import threading
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..tagging.classify import CellTag
from ..errors import InputError
from ..files import atomic_write
from ..grid import Grid
from .kernels import closest as _closest, segments_cross_fan as _segments_cross_fan, stencil_fits as _stencil_fits
from .kernels import cells_tagged as _cells_tagged
from .kernels import wls_value_weights as _wls_kernel
from .proximity import TriangleIndex, median_edge_length
from ..geometry.triangles import _loops_from, as_triangles

__all__ = ["Stencils", "StencilLimits", "StencilSummary", "build_stencils", "load_stencils"]

_BCS = ("dirichlet", "neumann")
_INTERFACES = ("fluid-side", "solid-side")
_METHODS = ("direct", "image-point")
_WEIGHTS = ("gaussian", "inverse-distance", "wendland")

# Radius growth step, cells.
_RADIUS_STEP = 0.5
# Distance the visibility origin is moved off the surface for solid-side cells, cells.
_NUDGE = 1e-6
# Singular values below this fraction of the largest are treated as zero (rank loss).
_RANK_RTOL = 1e-13
# Eigenvalues of the Gram matrix below this fraction of the largest mean rank loss
# (condition above ~1e7, reported as inf).
_GRAM_RTOL = 1e-14
# Regularisation of the inverse-distance weight, cells squared.
_IDW_EPS2 = 1.0 / 16.0


@dataclass(frozen=True)
class StencilLimits:
    """Quality limits a stencil must meet to be ``ok``.

    Parameters
    ----------
    min_visible : int or None — fewest visible neighbours; None means 1.5 times
        the basis size (15 in 3-D, 9 in 2-D).
    max_condition : float — largest 2-norm condition number of the weighted,
        scaled design matrix.
    max_weight_bound : float — largest Σ|w| + |w_b| (for Neumann, |w_b|/h), the
        factor by which the stencil can amplify data errors.
    min_weight : float — most negative neighbour weight allowed.

    Notes
    -----
    The defaults come from the experiment ``python benchmarks/bench_stencils.py
    --limits`` (table in ``benchmarks/RESULTS-stencils.md``). Fluid-side direct
    fits and image-point ghost cells on spheres (R = 3-20 cells) and a straight
    NACA 0015 wing (c = 8-32 cells, sharp trailing edge) never exceed condition 17,
    weight bound 3.6 or a most negative weight of -0.41; direct solid-side
    Dirichlet fits, which extrapolate into the body, reach condition 110-484,
    weight bound 15-62 and weights down to -11 at the trailing edge; the degenerate
    blocks of REFERENCES §3.3 are rank deficient (condition inf). The limits sit at
    about six times (condition), 1.4 times (weight bound) and 2.5 times (negative
    weight) the worst well-behaved values, so that the extrapolating stencils
    are flagged and the well-behaved ones never are.

    Raises
    ------
    InputError
        Non-positive or NaN limits.
    """

    min_visible: int | None = None
    max_condition: float = 100.0
    max_weight_bound: float = 5.0
    min_weight: float = -1.0

    def __post_init__(self) -> None:
        if self.min_visible is not None:
            if not isinstance(self.min_visible, (int, np.integer)) or self.min_visible < 0:
                raise InputError(f"min_visible must be a non-negative integer or None, got {self.min_visible!r}")
        for name in ("max_condition", "max_weight_bound"):
            v = getattr(self, name)
            if not isinstance(v, (int, float)) or not v > 0:
                raise InputError(f"{name} must be a positive number, got {v!r}")
        if not isinstance(self.min_weight, (int, float)) or math.isnan(self.min_weight):
            raise InputError(f"min_weight must be a number, got {self.min_weight!r}")


@dataclass(frozen=True)
class StencilSummary:
    """Counts and worst values of a stencil table.

    Attributes
    ----------
    count, n_ok, n_bad : int — stencils, those passing and failing their limits.
    worst_condition : float — largest condition number (NaN if no stencils).
    worst_condition_cell : int — its flat cell index (-1 if none).
    worst_condition_centre : tuple of float — its cell centre, metres.
    worst_weight_bound : float; worst_weight_bound_cell : int; worst_weight_bound_centre : tuple.
    most_negative_weight : float; most_negative_weight_cell : int; most_negative_weight_centre : tuple.
    fewest_visible : int — smallest number of visible neighbours (-1 if none).
    """

    count: int
    n_ok: int
    n_bad: int
    worst_condition: float
    worst_condition_cell: int
    worst_condition_centre: tuple
    worst_weight_bound: float
    worst_weight_bound_cell: int
    worst_weight_bound_centre: tuple
    most_negative_weight: float
    most_negative_weight_cell: int
    most_negative_weight_centre: tuple
    fewest_visible: int

    def as_dict(self) -> dict:
        """The summary as a plain dict (JSON-ready)."""
        return {k: getattr(self, k) for k in self.__dataclass_fields__}

    def __str__(self) -> str:
        """A few aligned lines for a terminal: counts, then each worst value with where it is."""
        lines = [f"{self.count:,} stencils: {self.n_ok:,} ok, {self.n_bad:,} not ok"]
        if self.count == 0:
            return lines[0]

        def where(centre, cell):
            return "at (" + ", ".join(f"{c:.6g}" for c in centre) + f") m, cell {cell}"

        for label, value, centre, cell in (
            ("worst condition number", self.worst_condition, self.worst_condition_centre, self.worst_condition_cell),
            ("worst weight bound", self.worst_weight_bound, self.worst_weight_bound_centre,
             self.worst_weight_bound_cell),
            ("most negative weight", self.most_negative_weight, self.most_negative_weight_centre,
             self.most_negative_weight_cell),
        ):
            lines.append(f"  {label:<26} {value:<10.4g} {where(centre, cell)}")
        lines.append(f"  {'fewest visible neighbours':<26} {self.fewest_visible}")
        return "\n".join(lines)


# Set (per thread) while a Stencils is made from arrays nobody else holds.
_ADOPTING = threading.local()


def _adopted(**fields) -> "Stencils":
    """A :class:`Stencils` that takes over freshly made arrays instead of copying them.

    Only for arrays no caller can still write to (built here, or just read from a file).
    """
    _ADOPTING.on = True
    try:
        return Stencils(**fields)
    finally:
        _ADOPTING.on = False


_ARRAY_FIELDS = (
    "cells",
    "neighbours",
    "weights",
    "boundary_point",
    "boundary_normal",
    "boundary_weight",
    "condition",
    "ok",
    "n_visible",
    "weight_bound",
    "min_weight",
)


@dataclass(frozen=True, eq=False)
class Stencils:
    """A table of interface-cell stencils, one row per interface cell.

    Attributes
    ----------
    cells : (n,) int64 — flat C-order index of each interface cell.
    neighbours : (n, k) int64 — flat indices of the cells used; -1 pads.
    weights : (n, k) float — weight of each neighbour value; 0 where padded.
    boundary_point : (n, 3) float — metres; closest point on the surface (z = 0 on 2-D grids).
    boundary_normal : (n, 3) float — unit surface normal there, pointing into the fluid.
    boundary_weight : (n,) float — weight of the boundary datum g (Neumann: metres).
    condition : (n,) float — 2-norm condition number of the weighted design
        matrix in coordinates scaled by the spacing (inf if rank deficient).
    ok : (n,) bool — passes the limits it was built with.
    n_visible : (n,) int64 — visible neighbours used.
    weight_bound : (n,) float — Σ|weights| + |boundary_weight| (Neumann: |boundary_weight| / h).
    min_weight : (n,) float — most negative neighbour weight (0 if none is negative).
    bc, interface, method : str — how the table was built.
    grid_lower : tuple of float — metres; grid_shape : tuple of int; spacing : float — metres.

    Raises
    ------
    InputError
        Arrays whose lengths or shapes disagree.
    """

    cells: np.ndarray
    neighbours: np.ndarray
    weights: np.ndarray
    boundary_point: np.ndarray
    boundary_normal: np.ndarray
    boundary_weight: np.ndarray
    condition: np.ndarray
    ok: np.ndarray
    n_visible: np.ndarray
    weight_bound: np.ndarray
    min_weight: np.ndarray
    bc: str = "dirichlet"
    interface: str = "fluid-side"
    method: str = "direct"
    grid_lower: tuple = ()
    grid_shape: tuple = ()
    spacing: float = 1.0

    def __post_init__(self) -> None:
        dtypes = {
            "cells": np.int64,
            "neighbours": np.int64,
            "ok": bool,
            "n_visible": np.int64,
        }
        arrays = {}
        # Copies, so the table stays as built whatever the caller does with its
        # arrays; not for arrays this module has just made and hands over (_adopted).
        copy = True if not getattr(_ADOPTING, "on", False) else None
        for name in _ARRAY_FIELDS:
            a = np.array(getattr(self, name), dtype=dtypes.get(name, np.float64), copy=copy)
            a.setflags(write=False)
            arrays[name] = a
        n = arrays["cells"].shape[0]
        expect = {
            "cells": (n,),
            "boundary_point": (n, 3),
            "boundary_normal": (n, 3),
            "boundary_weight": (n,),
            "condition": (n,),
            "ok": (n,),
            "n_visible": (n,),
            "weight_bound": (n,),
            "min_weight": (n,),
        }
        k = arrays["neighbours"].shape[1] if arrays["neighbours"].ndim == 2 else -1
        expect["neighbours"] = (n, k)
        expect["weights"] = (n, k)
        for name, shape in expect.items():
            if arrays[name].shape != shape:
                raise InputError(
                    f"stencil field {name} must have shape {shape} (one row per interface cell), "
                    f"got {arrays[name].shape}"
                )
        for name, a in arrays.items():
            object.__setattr__(self, name, a)
        if self.bc not in _BCS or self.interface not in _INTERFACES or self.method not in _METHODS:
            raise InputError(f"unknown stencil kind bc={self.bc!r}, interface={self.interface!r}, method={self.method!r}")
        object.__setattr__(self, "grid_lower", tuple(float(x) for x in self.grid_lower))
        object.__setattr__(self, "grid_shape", tuple(int(x) for x in self.grid_shape))
        object.__setattr__(self, "spacing", float(self.spacing))

    def __len__(self) -> int:
        return int(self.cells.shape[0])

    # --------------------------------------------------------------- figures
    def cell_centres(self, index=None) -> np.ndarray:
        """(n, d) float — metres; centres of ``cells`` (or of the given flat indices)."""
        flat = self.cells if index is None else np.asarray(index, dtype=np.int64)
        idx = np.stack(np.unravel_index(flat, self.grid_shape), axis=-1)
        return np.asarray(self.grid_lower) + (idx + 0.5) * self.spacing

    def summary(self) -> StencilSummary:
        """Counts ok / not ok and the worst values with the cell they occur at."""
        n = len(self)
        n_ok = int(np.count_nonzero(self.ok))

        def worst(values, pick):
            if n == 0:
                return math.nan, -1, ()
            i = int(pick(values))
            return float(values[i]), int(self.cells[i]), tuple(float(x) for x in self.cell_centres([self.cells[i]])[0])

        cond = np.where(np.isnan(self.condition), np.inf, self.condition)
        c = worst(cond, np.argmax)
        wb = worst(self.weight_bound, np.argmax)
        mw = worst(self.min_weight, np.argmin)
        return StencilSummary(
            count=n,
            n_ok=n_ok,
            n_bad=n - n_ok,
            worst_condition=c[0],
            worst_condition_cell=c[1],
            worst_condition_centre=c[2],
            worst_weight_bound=wb[0],
            worst_weight_bound_cell=wb[1],
            worst_weight_bound_centre=wb[2],
            most_negative_weight=mw[0],
            most_negative_weight_cell=mw[1],
            most_negative_weight_centre=mw[2],
            fewest_visible=int(self.n_visible.min()) if n else -1,
        )

    def reconstruct(self, phi, g) -> np.ndarray:
        """Apply the stencils: reconstructed values at ``cells``.

        Parameters
        ----------
        phi : array of grid.shape (or flat) float — field values at cell centres.
        g : (n,) float — boundary data (values for Dirichlet, normal derivatives for Neumann).

        Returns
        -------
        (n,) float.
        """
        flat = np.asarray(phi, dtype=float).ravel()
        used = self.neighbours >= 0
        # Padded entries contribute exactly nothing: never 0 * phi[-1] (or phi[0]), which a NaN there poisons.
        vals = np.where(used, flat[np.where(used, self.neighbours, 0)], 0.0)
        return (self.weights * vals).sum(axis=1) + self.boundary_weight * np.asarray(g, dtype=float)

    # ------------------------------------------------------------- save/load
    def save(self, path) -> Path:
        """Write the table to an NPZ file atomically (temp file in the same folder, then rename).

        Parameters
        ----------
        path : str or os.PathLike — destination ``.npz`` file; an existing file
            is replaced only once the new one is complete.

        Returns
        -------
        Path — the file written.
        """
        arrays = dict(
            **{name: getattr(self, name) for name in _ARRAY_FIELDS},
            bc=np.array(self.bc),
            interface=np.array(self.interface),
            method=np.array(self.method),
            grid_lower=np.asarray(self.grid_lower, dtype=float),
            grid_shape=np.asarray(self.grid_shape, dtype=np.int64),
            spacing=np.array(self.spacing),
            format_version=np.array(1),
        )

        def _write(tmp):
            with open(tmp, "wb") as fh:
                np.savez(fh, **arrays)

        return atomic_write(path, _write)


def load_stencils(path) -> Stencils:
    """Read a stencil table written by :meth:`Stencils.save`.

    Parameters
    ----------
    path : str or os.PathLike — an ``.npz`` file.

    Returns
    -------
    Stencils

    Raises
    ------
    InputError
        The file is missing, not an NPZ archive, or lacks stencil fields.
    """
    path = os.fspath(path)
    try:
        data = np.load(path, allow_pickle=False)
    except (OSError, ValueError) as exc:
        raise InputError(f"cannot read stencil table {path!r}: {exc}; give a file written by Stencils.save") from None
    with data:
        missing = [k for k in (*_ARRAY_FIELDS, "bc", "interface", "method", "grid_shape") if k not in data.files]
        if missing:
            raise InputError(f"{path!r} is not a stencil table: missing {', '.join(missing)}; write it with Stencils.save")
        kw = {name: data[name] for name in _ARRAY_FIELDS}
        return _adopted(
            **kw,
            bc=str(data["bc"]),
            interface=str(data["interface"]),
            method=str(data["method"]),
            grid_lower=tuple(data["grid_lower"]),
            grid_shape=tuple(data["grid_shape"]),
            spacing=float(data["spacing"]),
        )


# ---------------------------------------------------------------------- fit
def _basis(xi: np.ndarray, planar: bool) -> np.ndarray:
    """Quadratic monomials of scaled local coordinates: (..., 6) or (..., 10).

    Built monomial-first (contiguous writes) and returned as a view with the monomial
    axis last.
    """
    x, y = xi[..., 0], xi[..., 1]
    out = np.empty(((6,) if planar else (10,)) + xi.shape[:-1])
    out[0] = 1.0
    out[1] = x
    out[2] = y
    if planar:
        np.multiply(x, x, out=out[3])
        np.multiply(x, y, out=out[4])
        np.multiply(y, y, out=out[5])
    else:
        z = xi[..., 2]
        out[3] = z
        np.multiply(x, x, out=out[4])
        np.multiply(y, y, out=out[5])
        np.multiply(z, z, out=out[6])
        np.multiply(x, y, out=out[7])
        np.multiply(y, z, out=out[8])
        np.multiply(z, x, out=out[9])
    return np.moveaxis(out, 0, -1)


def _basis_normal_derivative(xi: np.ndarray, n: np.ndarray, planar: bool) -> np.ndarray:
    """Derivative of each monomial along n at xi (scaled coordinates): (..., 6) or (..., 10)."""
    x, y = xi[..., 0], xi[..., 1]
    nx, ny = n[..., 0], n[..., 1]
    zero = np.zeros_like(x)
    if planar:
        return np.stack([zero, nx, ny, 2 * x * nx, y * nx + x * ny, 2 * y * ny], axis=-1)
    z, nz = xi[..., 2], n[..., 2]
    return np.stack(
        [zero, nx, ny, nz, 2 * x * nx, 2 * y * ny, 2 * z * nz, y * nx + x * ny, z * ny + y * nz, x * nz + z * nx],
        axis=-1,
    )


def _weight(rho: np.ndarray, support: np.ndarray, kind: str) -> np.ndarray:
    """Weight of a point at scaled distance rho (cells) for a support radius (cells)."""
    if kind == "gaussian":
        return np.exp(-((2.0 * rho / support) ** 2))
    if kind == "inverse-distance":
        return 1.0 / (rho * rho + _IDW_EPS2)
    r = np.clip(rho / support, 0.0, 1.0)
    return (1.0 - r) ** 4 * (4.0 * r + 1.0)


def _wls_value_weights(A: np.ndarray, sw: np.ndarray):
    """Weights of the data in the least-squares value at the origin, and the condition.

    Parameters
    ----------
    A : (n, r, m) float — design matrix (basis at data rows); zero rows allowed.
    sw : (n, r) float — square roots of the row weights; 0 for padded rows.

    Returns
    -------
    a : (n, r) float — the fitted constant term c_0 = a · data.
    cond : (n,) float — 2-norm condition number of diag(sw) A (inf if rank deficient).
    """
    n, r, m = A.shape
    B = sw[:, :, None] * A
    if r < m:
        return np.zeros((n, r)), np.full(n, np.inf)
    # Column equilibration is not applied: the scaled coordinates already make the
    # columns comparable, and the condition reported is that of diag(sw) A itself.
    Q, R = np.linalg.qr(B)  # batched LAPACK Householder QR, (n, r, m) and (n, m, m)
    # Condition from the eigenvalues of R^T R = B^T B: the squared singular values. Only
    # this figure goes through the Gram matrix (the weights do not); it is accurate to a
    # few digits up to ~1e6 and saturates to inf beyond ~1e7.
    lam = np.linalg.eigvalsh(np.swapaxes(R, 1, 2) @ R)
    lmax = lam[:, -1]
    lmin = lam[:, 0]
    diag = np.abs(np.diagonal(R, axis1=1, axis2=2))
    deficient = ~(lmin > _GRAM_RTOL * lmax) | ~(diag.min(axis=1) > _RANK_RTOL * diag.max(axis=1))
    with np.errstate(divide="ignore", invalid="ignore"):
        cond = np.where(deficient, np.inf, np.sqrt(lmax / lmin))
    # c = R^-1 Q^T (sw * f): c_0 = (Q y) . (sw f) with R^T y = e_0.
    Rs = np.where(deficient[:, None, None], np.eye(m), R)
    e0 = np.zeros((n, m, 1))
    e0[:, 0, 0] = 1.0
    y = np.linalg.solve(np.swapaxes(Rs, 1, 2), e0)  # (n, m, 1)
    z = (Q @ y)[:, :, 0]
    a = z * sw
    a[deficient] = 0.0
    return a, cond


# -------------------------------------------------------------- neighbours
def _offsets(radius: float, planar: bool) -> np.ndarray:
    """Integer offsets within ``radius`` cells, sorted by length (stable)."""
    rr = int(math.floor(radius))
    rng = np.arange(-rr, rr + 1)
    if planar:
        g = np.stack(np.meshgrid(rng, rng, [0], indexing="ij"), axis=-1).reshape(-1, 3)
    else:
        g = np.stack(np.meshgrid(rng, rng, rng, indexing="ij"), axis=-1).reshape(-1, 3)
    l2 = (g * g).sum(axis=1)
    g = g[l2 <= radius * radius + 1e-9]
    l2 = (g * g).sum(axis=1)
    return g[np.argsort(l2, kind="stable")]


@dataclass(frozen=True)
class _Options:
    bc: str
    interface: str
    method: str
    weight: str
    radius: float
    max_radius: float
    min_visible: int
    max_neighbours: int
    interface_neighbours: bool
    limits: StencilLimits

    def __post_init__(self) -> None:
        for name, allowed in (("bc", _BCS), ("interface", _INTERFACES), ("method", _METHODS), ("weight", _WEIGHTS)):
            if getattr(self, name) not in allowed:
                raise InputError(
                    f"{name} must be one of {', '.join(repr(a) for a in allowed)}, got {getattr(self, name)!r}"
                )
        if self.method == "image-point" and self.interface != "solid-side":
            raise InputError(
                "method='image-point' reconstructs ghost cells and needs interface='solid-side', "
                f"got interface={self.interface!r}"
            )
        if not (math.isfinite(self.radius) and self.radius >= 1.0):
            raise InputError(f"radius must be at least 1 cell, got {self.radius!r}")
        if not (math.isfinite(self.max_radius) and self.max_radius >= self.radius):
            raise InputError(
                f"max_radius must be a finite number of cells no smaller than radius ({self.radius}), "
                f"got {self.max_radius!r}"
            )
        if self.max_radius > 8:
            raise InputError(f"max_radius above 8 cells is not supported (got {self.max_radius}); refine the grid instead")
        if self.min_visible < 1 or self.max_neighbours < 1:
            raise InputError(
                f"min_visible and max_neighbours must be positive, got {self.min_visible} and {self.max_neighbours}"
            )
        if not isinstance(self.limits, StencilLimits):
            raise InputError(f"limits must be a StencilLimits, got {type(self.limits).__name__}")


def _check_tags(tags, grid: Grid) -> np.ndarray:
    if not isinstance(grid, Grid):
        raise InputError(f"grid must be an ibprep.Grid, got {type(grid).__name__}")
    t = np.asarray(tags)
    if t.shape != grid.shape:
        raise InputError(f"tags must have the grid's shape {grid.shape}, got {t.shape}; classify on the same grid")
    if not np.issubdtype(t.dtype, np.integer):
        raise InputError(f"tags must be an integer (uint8) array of CellTag codes, got dtype {t.dtype}")
    if t.size and (t.min() < 0 or t.max() > int(CellTag.INTERFACE)):
        raise InputError(
            f"tags must hold CellTag codes 0 (fluid), 1 (solid), 2 (interface), got values in [{t.min()}, {t.max()}]"
        )
    return t.reshape(-1)


def build_stencils(
    tags,
    grid: Grid,
    surface_in_world,
    *,
    bc: str = "dirichlet",
    interface: str = "fluid-side",
    method: str = "direct",
    weight: str = "gaussian",
    radius: float = 2.0,
    max_radius: float = 4.0,
    min_visible: int | None = None,
    max_neighbours: int | None = None,
    interface_neighbours: bool = True,
    limits: StencilLimits | None = None,
) -> Stencils:
    """WLS quadratic stencils for every interface cell.

    Parameters
    ----------
    tags : array of grid.shape, uint8 — CellTag codes (FLUID, SOLID, INTERFACE).
    grid : Grid — the grid the tags live on (2-D, 3-D or single-layer 3-D).
    surface_in_world : trimesh.Trimesh, (vertices, faces) or 2-D loops — the
        closed body surface in world coordinates, metres (see
        :func:`ibprep.geometry.triangles.as_triangles`).
    bc : {"dirichlet", "neumann"} — the boundary condition imposed at the boundary point.
    interface : {"fluid-side", "solid-side"} — whether interface cells are fluid
        (fluid cells next to solid) or solid (ghost cells next to fluid).
    method : {"direct", "image-point"} — fit at the cell itself, or (solid-side
        only) reconstruct the ghost value through its image point.
    weight : {"gaussian", "inverse-distance", "wendland"} — WLS weight function.
    radius : float — cells; initial support radius of the candidate offsets.
    max_radius : float — cells; the support grows in half cells up to this.
    min_visible : int, optional — visible neighbours wanted before growth stops
        (default twice the basis size: 20 in 3-D, 12 in 2-D).
    max_neighbours : int, optional — the nearest visible neighbours kept per
        stencil (default three times the basis size).
    interface_neighbours : bool — allow other interface cells as neighbours
        (fluid-side only; default True).
    limits : StencilLimits, optional — quality limits for ``ok``.

    Returns
    -------
    Stencils — one row per interface cell, in increasing flat index.

    Raises
    ------
    InputError
        Unknown options, tags not matching the grid, or a bad surface.
    """
    if not isinstance(grid, Grid):
        raise InputError(f"grid must be an ibprep.Grid, got {type(grid).__name__}")
    m = 6 if grid.is_planar else 10
    opts = _Options(
        bc=bc,
        interface=interface,
        method=method,
        weight=weight,
        radius=float(radius),
        max_radius=float(max_radius),
        min_visible=int(2 * m if min_visible is None else min_visible),
        max_neighbours=int(3 * m if max_neighbours is None else max_neighbours),
        interface_neighbours=bool(interface_neighbours),
        limits=StencilLimits() if limits is None else limits,
    )
    flat_tags = _check_tags(tags, grid)
    vertices, faces = as_triangles(surface_in_world)
    h = grid.spacing
    planar = grid.is_planar
    loops = _loops_from(surface_in_world) if planar else None
    two_d = grid.ndim == 2
    shape3 = np.array(grid.shape + ((1,) if two_d else ()), dtype=np.int64)
    lower3 = np.array(grid.lower + ((0.0,) if two_d else ()), dtype=float)
    if two_d:
        lower3[2] = -0.5 * h  # the single layer's centre sits at z = 0

    cells = _cells_tagged(flat_tags, CellTag.INTERFACE)  # = np.flatnonzero(flat_tags == INTERFACE), no temporary
    n = cells.size
    lim = opts.limits
    min_ok_visible = lim.min_visible if lim.min_visible is not None else int(math.ceil(1.5 * m))
    meta = dict(bc=bc, interface=interface, method=method, grid_lower=grid.lower, grid_shape=grid.shape, spacing=h)
    if n == 0:
        z = np.zeros(0)
        return Stencils(
            cells=cells, neighbours=np.zeros((0, 0), np.int64), weights=np.zeros((0, 0)),
            boundary_point=np.zeros((0, 3)), boundary_normal=np.zeros((0, 3)), boundary_weight=z,
            condition=z, ok=np.zeros(0, bool), n_visible=np.zeros(0, np.int64), weight_bound=z,
            min_weight=z, **meta,
        )

    # Only the surface near the grid matters: bucket the part within the stencil reach.
    reach = (opts.max_radius + 3.0) * h
    oriented = True
    if loops is not None:
        # A polygon on a planar grid: index only a band of its side walls around the
        # layer, in slices about a cell high, so no triangle is much taller than a cell.
        vertices, faces = _side_band(loops, lower3[2] + 0.5 * h, reach, h)
        oriented = False
    index = TriangleIndex(
        vertices,
        faces,
        bucket_size=_bucket_size(vertices, faces, h),
        region_lower=tuple(lower3 - reach),
        region_upper=tuple(lower3 + shape3 * h + reach),
        check_orientation=oriented,
    )

    plane = int(shape3[1] * shape3[2])

    def centres_of(flat):
        # C-order unravel by integer arithmetic (cheaper than unravel_index + stack).
        flat = np.asarray(flat, dtype=np.int64)
        ijk = np.empty(flat.shape + (3,), dtype=np.int64)
        ijk[..., 0], rem = np.divmod(flat, plane)
        ijk[..., 1], ijk[..., 2] = np.divmod(rem, shape3[2])
        return lower3 + (ijk + 0.5) * h, ijk

    x0, ijk0 = centres_of(cells)
    # Fluid-side cells are their own fitting point and visibility origin: the compiled pass
    # finds their boundary points from the pieces it gathers for the segments anyway.
    fused = _COMPILED and interface == "fluid-side"
    if fused:
        bpt = nrm = None
        centre, anchor, origin = x0, ijk0, x0
    else:
        cp = _closest(index, x0)
        bpt = cp.point.copy()
        nrm = cp.normal.copy()
        if two_d:
            bpt[:, 2] = 0.0
            nrm[:, 2] = 0.0
            nrm /= np.maximum(np.linalg.norm(nrm, axis=1), 1e-300)[:, None]

        # Fitting point, visibility origin and the cell the candidate offsets start from.
        if method == "image-point":
            centre = 2.0 * bpt - x0
            if planar:
                centre[:, 2] = x0[:, 2]
            anchor = np.clip(np.floor((centre - lower3) / h).astype(np.int64), 0, shape3 - 1)
            origin = centre
        elif interface == "solid-side":
            centre = x0
            anchor = ijk0
            origin = bpt + _NUDGE * h * nrm
        else:
            centre = x0
            anchor = ijk0
            # A cell centre lying on the surface sees along the surface: look from just off it.
            on_surface = cp.distance < _NUDGE * h
            origin = np.where(on_surface[:, None], bpt + _NUDGE * h * nrm, x0)

    # Which tags may serve as neighbours.
    allowed = np.zeros(3, dtype=bool)
    allowed[CellTag.FLUID] = True
    if interface == "fluid-side" and opts.interface_neighbours:
        allowed[CellTag.INTERFACE] = True

    radii = [opts.radius]
    while radii[-1] < opts.max_radius - 1e-9:
        radii.append(min(radii[-1] + _RADIUS_STEP, opts.max_radius))
    fit = _fit_compiled if _COMPILED else _fit_arrays
    nb, nvis, used_radius, wn, ab, cond, bpt, nrm = fit(
        flat_tags, shape3, lower3, h, cells, anchor, origin, centre, bpt, nrm, allowed, radii, opts, planar,
        two_d, index, centres_of,
    )
    k = int(max(1, nvis.max()))
    nb = np.ascontiguousarray(nb[:, :k])
    wn = np.ascontiguousarray(wn[:, :k])  # compact: the table keeps no wider buffer alive
    pad = nb < 0
    ab = ab * (h if bc == "neumann" else 1.0)  # Neumann row was scaled by h
    if method == "image-point":
        gap = np.linalg.norm(x0 - centre, axis=1)
        if bc == "dirichlet":
            wn, ab = -wn, 2.0 - ab
        else:
            ab = ab - gap
    wn[pad] = 0.0  # in place: wn is this call's own array (a new one would cost page faults)
    bound = np.abs(wn).sum(axis=1) + np.abs(ab) / (h if bc == "neumann" else 1.0)
    bound[~np.isfinite(cond)] = np.inf  # no fit: unbounded
    minw = np.minimum(wn.min(axis=1), 0.0)
    ok = (
        (nvis >= min_ok_visible)
        & np.isfinite(cond)
        & (cond <= lim.max_condition)
        & (bound <= lim.max_weight_bound)
        & (minw >= lim.min_weight)
    )
    # On 2-D grids flat indices over (nx, ny, 1) equal those over (nx, ny).
    return _adopted(
        cells=cells,
        neighbours=nb,
        weights=wn,
        boundary_point=bpt,
        boundary_normal=nrm,
        boundary_weight=ab,
        condition=cond,
        ok=ok,
        n_visible=nvis,
        weight_bound=bound,
        min_weight=minw,
        **meta,
    )


# If false, build_stencils uses the array pipeline below instead of the compiled pass
# (the reference the compiled pass is tested against; tests switch it).
_COMPILED = True


def _fit_compiled(flat_tags, shape3, lower3, h, cells, anchor, origin, centre, bpt, nrm, allowed, radii, opts,
                  planar, two_d, index, centres_of):
    """Neighbours and fit of every stencil in one compiled pass (ibprep.stencils.kernels.stencil_fits).

    With bpt and nrm None the pass finds the boundary points too (fluid-side cells,
    whose origin is the centre unless it lies on the surface).
    """
    nb, nvis, used_radius, wn, ab, cond, _, bpt, nrm, _, _ = _stencil_fits(
        flat_tags, shape3, lower3, h, cells, anchor, origin, centre, allowed,
        _offsets(opts.max_radius, planar), radii, opts.min_visible, opts.max_neighbours,
        image=opts.method == "image-point", neumann=opts.bc == "neumann", planar=planar, weight=opts.weight,
        index=index, boundary=None if bpt is None else (bpt, nrm), two_d=two_d, nudge=_NUDGE * h,
    )
    return nb, nvis, used_radius, wn, ab, cond, bpt, nrm


def _fit_arrays(flat_tags, shape3, lower3, h, cells, anchor, origin, centre, bpt, nrm, allowed, radii, opts,
                planar, two_d, index, centres_of):
    """The same as _fit_compiled with batched array operations over all stencils.

    Returns nb (n, kmax) int, nvis (n,), used_radius (n,), weights (n, kmax), the
    boundary row's raw weight (n,), the condition (n,), and bpt and nrm as given.
    """
    nfit = nrm
    n = cells.size
    method = opts.method
    weight = opts.weight
    m = 6 if planar else 10
    kmax = opts.max_neighbours
    nb = np.full((n, kmax), -1, dtype=np.int64)
    nvis = np.zeros(n, dtype=np.int64)
    used_radius = np.zeros(n)
    active = np.arange(n)
    # Offsets sorted by length: each round's candidates are a prefix of this list, so a
    # grown round only tests the new offsets and keeps the earlier answers.
    all_offs = _offsets(opts.max_radius, planar)
    all_len2 = (all_offs * all_offs).sum(axis=1)
    prev_vis = np.zeros((n, 0), dtype=bool)
    for round_no, r in enumerate(radii):
        if not active.size:
            break
        last = round_no == len(radii) - 1
        n_off = int(np.count_nonzero(all_len2 <= r * r + 1e-9))
        offs = all_offs[:n_off]
        cand = anchor[active, None, :] + offs[None, :, :]  # (na, no, 3)
        inside = np.all((cand >= 0) & (cand < shape3), axis=2)
        cflat = np.ravel_multi_index(tuple(np.clip(cand, 0, shape3 - 1).transpose(2, 0, 1)), tuple(shape3))
        good = inside & allowed[flat_tags[cflat]] & (cflat != cells[active, None])
        n_old = prev_vis.shape[1]
        vis_new = _visible(index, good[:, n_old:], cflat[:, n_old:], origin[active], centres_of)
        vis = np.concatenate([prev_vis, vis_new], axis=1)
        count = vis.sum(axis=1)
        done = (count >= opts.min_visible) | last
        rows = active[done]
        if rows.size:
            v = vis[done]
            cf = cflat[done]
            # Nearest first from the fitting point; keep at most kmax.
            if method == "image-point":
                xc, _ = centres_of(cf.reshape(-1))
                d2 = ((xc.reshape(cf.shape + (3,)) - centre[rows, None, :]) ** 2).sum(axis=2)
                d2 = np.where(v, d2, np.inf)
                order = np.argsort(d2, axis=1, kind="stable")[:, :kmax]
                take = np.take_along_axis(v, order, axis=1)
                ids = np.where(take, np.take_along_axis(cf, order, axis=1), -1)
                nb[rows, : ids.shape[1]] = ids
                nvis[rows] = take.sum(axis=1)
            else:
                # The fitting point is the anchor cell's centre and the offsets are sorted by
                # length, so the visible candidates in column order are already nearest first
                # (ties in the same order a stable sort by distance gives).
                slot = np.cumsum(v, axis=1) - 1
                keep = v & (slot < kmax)
                r_idx = np.broadcast_to(rows[:, None], v.shape)[keep]
                nb[r_idx, slot[keep]] = cf[keep]
                nvis[rows] = np.minimum(v.sum(axis=1), kmax)
            used_radius[rows] = r
        active = active[~done]
        prev_vis = vis[~done]

    k = int(max(1, nvis.max()))
    nb = nb[:, :k]
    pad = nb < 0
    xn, ijk_n = centres_of(np.where(pad, 0, nb).reshape(-1))
    if opts.method == "image-point":
        xi = (xn.reshape(n, k, 3) - centre[:, None, :]) / h
    else:  # the fit is centred on the cell: scaled coordinates are the index offsets, exactly
        xi = (ijk_n.reshape(n, k, 3) - anchor[:, None, :]).astype(float)
    xb = (bpt - centre) / h
    if planar:
        xi = xi[..., :2]
        xb = xb[..., :2]
        nfit = nfit[:, :2]
    support = used_radius + 1.0
    rho = np.linalg.norm(xi, axis=2)
    w = np.where(pad, 0.0, _weight(rho, support[:, None], weight))
    wb = _weight(np.linalg.norm(xb, axis=1), support, weight)
    A = np.empty((n, k + 1, m))
    A[:, :k] = _basis(xi, planar) * (~pad)[:, :, None]
    if opts.bc == "dirichlet":
        A[:, k] = _basis(xb, planar)
    else:
        A[:, k] = _basis_normal_derivative(xb, nfit, planar)
    sw = np.sqrt(np.concatenate([w, wb[:, None]], axis=1))
    a, cond = _wls_kernel(A, sw)
    wts = np.zeros((n, opts.max_neighbours))
    wts[:, :k] = a[:, :k]
    nb = np.pad(nb, ((0, 0), (0, opts.max_neighbours - k)), constant_values=-1)
    return nb, nvis, used_radius, wts, a[:, k], cond, bpt, nrm


def _side_band(loops, z0: float, half: float, h: float):
    """Outward side walls of the prisms over 2-D loops, z in [z0 - half, z0 + half], in slices of about h.

    The walls are open at top and bottom: every query and segment of a planar grid
    stays in the plane z = z0, farther than ``half`` from those rims.
    """
    layers = max(2, int(math.ceil(2.0 * half / h)))
    zs = z0 + np.linspace(-half, half, layers + 1)
    verts, faces = [], []
    offset = 0
    for loop in loops:
        p = np.asarray(loop, dtype=float)
        if np.allclose(p[0], p[-1]):
            p = p[:-1]
        area2 = np.sum(p[:, 0] * np.roll(p[:, 1], -1) - np.roll(p[:, 0], -1) * p[:, 1])
        if area2 < 0:
            p = p[::-1]
        mpts = p.shape[0]
        v = np.column_stack([np.tile(p, (layers + 1, 1)), np.repeat(zs, mpts)])
        i = np.arange(mpts)
        j = (i + 1) % mpts
        lvl = np.arange(layers)[:, None] * mpts
        a, b = (lvl + i).ravel(), (lvl + j).ravel()
        c, d = a + mpts, b + mpts
        f = np.concatenate([np.column_stack([a, b, d]), np.column_stack([a, d, c])])
        verts.append(v)
        faces.append(f + offset)
        offset += v.shape[0]
    return np.vstack(verts), np.vstack(faces).astype(np.int64)


def _bucket_size(vertices: np.ndarray, faces: np.ndarray, h: float) -> float:
    """Hash bucket edge: twice the median triangle edge, kept between one and two cells.

    Long triangles are indexed in bucket-sized pieces, so the bucket follows the
    grid (the stencil reach is a few cells) more than the mesh.
    """
    return float(np.clip(2.0 * median_edge_length(vertices, faces), h, 2.0 * h))


def _visible(index, good, cflat, origin, centres_of):
    """(na, no) bool: candidate is allowed and its segment from the origin does not cross the surface."""
    vis = good.copy()
    rows, cols = np.nonzero(good)
    if rows.size == 0:
        return vis
    ids = cflat[rows, cols]
    uniq, inv = np.unique(ids, return_inverse=True)
    xu, _ = centres_of(uniq)
    xj = xu[inv]
    seg_len = np.linalg.norm(xj - origin[rows], axis=1)
    longest = float(seg_len.max())
    # Pack each row's allowed candidates to the left so the dense screens stay narrow.
    slot = np.arange(rows.size) - np.searchsorted(rows, rows)  # rank within its row
    width = int(slot.max()) + 1
    valid = np.zeros((good.shape[0], width), dtype=bool)
    valid[rows, slot] = True
    ends = np.zeros((good.shape[0], width, 3))
    ends[rows, slot] = xj
    packed = _segments_cross_fan(index, origin, ends, valid, longest * (1 + 1e-9))
    cross = np.zeros(good.shape, dtype=bool)
    cross[rows, cols] = packed[rows, slot]
    vis &= ~cross
    return vis
