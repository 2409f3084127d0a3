"""Tests for ibprep.stencils: WLS quadratic stencils for interface cells.

Tags are built here by an independent helper (libigl winding number at the cell
centres, interface = cells of the chosen side with a face neighbour on the other
side, scipy.ndimage), so these tests do not depend on ibprep.classify.
"""

import math

import igl
import numpy as np
import pytest
import trimesh
from scipy import ndimage

from ibprep import Grid, InputError
from ibprep.classify import CellTag
from ibprep.stencils import StencilLimits, Stencils, build_stencils, load_stencils

# Round-off tolerance of quadratic reproduction: values are O(1), stencils have
# ~30 weights of O(0.1-1) and condition numbers below ~20, so 1e-12 leaves three
# orders of magnitude of room over double-precision round-off (~1e-15).
REPRO_TOL = 1e-12


# ------------------------------------------------------------------ helpers
def _tags_from_surface(grid, vertices, faces, interface="fluid-side"):
    """uint8 tags: solid where the libigl winding number of the centre is > 1/2."""
    c = grid.centres().reshape(-1, grid.ndim)
    if grid.ndim == 2:
        c = np.column_stack([c, np.zeros(len(c))])
    wn = igl.winding_number(np.asarray(vertices, float), np.asarray(faces, np.int64), c)
    solid = (wn > 0.5).reshape(grid.shape)
    return _tags_from_solid(solid, interface)


def _tags_from_solid(solid, interface="fluid-side"):
    st = ndimage.generate_binary_structure(solid.ndim, 1)
    tags = np.full(solid.shape, CellTag.FLUID, dtype=np.uint8)
    tags[solid] = CellTag.SOLID
    if interface == "fluid-side":
        iface = ~solid & ndimage.binary_dilation(solid, st)
    else:
        iface = solid & ndimage.binary_dilation(~solid, st)
    tags[iface] = CellTag.INTERFACE
    return tags


def _sphere(radius=1.0, subdivisions=3, centre=(0.0, 0.0, 0.0)):
    m = trimesh.creation.icosphere(subdivisions=subdivisions, radius=radius)
    return m.vertices + np.asarray(centre), m.faces


def _sphere_case(cells_per_radius, interface="fluid-side", subdivisions=3):
    R = 1.0
    h = R / cells_per_radius
    L = R + 6 * h
    grid = Grid(lower=(-L, -L, -L), upper=(L, L, L), spacing=h)
    v, f = _sphere(R, subdivisions)
    return grid, (v, f), _tags_from_surface(grid, v, f, interface)


def _quadratic(x):
    """A full quadratic in 3-D (every monomial present) and its gradient."""
    X, Y, Z = x[..., 0], x[..., 1], x[..., 2]
    val = 0.7 + 1.3 * X - 0.4 * Y + 0.9 * Z + 2.1 * X * X - 1.7 * Y * Y + 0.6 * Z * Z + 1.1 * X * Y - 0.8 * Y * Z + 0.5 * Z * X
    grad = np.stack(
        [1.3 + 4.2 * X + 1.1 * Y + 0.5 * Z, -0.4 - 3.4 * Y + 1.1 * X - 0.8 * Z, 0.9 + 1.2 * Z - 0.8 * Y + 0.5 * X],
        axis=-1,
    )
    return val, grad


def _smooth(x):
    """A smooth non-polynomial field and its gradient."""
    X, Y, Z = x[..., 0], x[..., 1], x[..., 2]
    val = np.sin(2 * X) * np.cos(3 * Y) + np.exp(0.5 * Z)
    grad = np.stack([2 * np.cos(2 * X) * np.cos(3 * Y), -3 * np.sin(2 * X) * np.sin(3 * Y), 0.5 * np.exp(0.5 * Z)], -1)
    return val, grad


def _centres3(grid):
    c = grid.centres().reshape(-1, grid.ndim)
    if grid.ndim == 2:
        c = np.column_stack([c, np.zeros(len(c))])
    return c


def _reconstruction_error(st, grid, field):
    phi, _ = field(_centres3(grid))
    val, grad = field(st.boundary_point)
    g = val if st.bc == "dirichlet" else np.einsum("ij,ij->i", grad, st.boundary_normal)
    return st.reconstruct(phi, g) - phi[st.cells]


# ------------------------------------------------------- reproduction, 3-D
@pytest.mark.parametrize("bc", ["dirichlet", "neumann"])
@pytest.mark.parametrize("interface", ["fluid-side", "solid-side"])
def test_quadratic_reproduced_to_round_off_3d(bc, interface):
    # Lancaster & Salkauskas (1981); Levin (1998): WLS with a full quadratic basis and a
    # full-rank design reproduces every quadratic exactly (REFERENCES §6.4 [memory: high]).
    grid, surf, tags = _sphere_case(5, interface)
    st = build_stencils(tags, grid, surf, bc=bc, interface=interface)
    assert len(st) > 100
    assert st.ok.all()
    err = _reconstruction_error(st, grid, _quadratic)
    assert np.abs(err).max() < REPRO_TOL


def test_well_resolved_sphere_every_stencil_ok():
    # Common practice, no single source: a sphere of radius 10 cells is well resolved;
    # every direct quadratic stencil must pass the default limits.
    grid, surf, tags = _sphere_case(10, subdivisions=3)
    st = build_stencils(tags, grid, surf)
    assert st.ok.all(), st.summary()
    assert (st.n_visible >= 20).all()
