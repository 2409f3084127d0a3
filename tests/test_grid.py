"""Tests for ibprep.grid: shapes, index maths, refinement boxes."""

import numpy as np
import pytest

from ibprep import Grid, InputError, refine
from ibprep.grid import stencil_bytes


def test_shape_from_extent_and_spacing():
    g = Grid(lower=(0.0, -1.0, 0.0), upper=(2.0, 1.0, 0.5), spacing=0.25)
    assert g.shape == (8, 8, 2)
    assert g.size == 128
    assert g.ndim == 3
    assert not g.is_planar


def test_extent_with_rounding_is_accepted():
    # 2 / (2/115) is 115.00000000000001 in floating point: still a whole number of cells.
    g = Grid(lower=(0, 0, 0), upper=(2, 2, 2), spacing=2 / 115)
    assert g.shape == (115, 115, 115)


def test_extent_not_whole_cells_says_what_fits():
    with pytest.raises(InputError, match=r"along y .*\(75\.5000 cells\).*0\.3 m or 0\.304 m"):
        Grid(lower=(0, 0, 0), upper=(0.3, 0.302, 0.3), spacing=0.004)


@pytest.mark.parametrize(
    "kwargs, pattern",
    [
        (dict(lower=(0, 0, 0), upper=(1, 1, 1), spacing=-0.1), "positive finite"),
        (dict(lower=(0, 0, 0), upper=(1, 1, 1), spacing=0.0), "positive finite"),
        (dict(lower=(0, 0, 0), upper=(1, 1, 1), spacing=float("nan")), "positive finite"),
        (dict(lower=(0, 0, 0), upper=(1, 1), spacing=0.1), "3 components but upper has 2"),
        (dict(lower=(0, 0, float("inf")), upper=(1, 1, 1), spacing=0.1), "finite"),
        (dict(lower=(0, 1, 0), upper=(1, 1, 1), spacing=0.1), "upper y .* must exceed lower y"),
        (dict(lower=(0,), upper=(1,), spacing=0.1), "2 or 3 numbers"),
    ],
)
def test_bad_grids_are_input_errors(kwargs, pattern):
    with pytest.raises(InputError, match=pattern):
        Grid(**kwargs)


def test_two_dimensional_grid():
    g = Grid(lower=(0, 0), upper=(1, 0.5), spacing=0.1)
    assert g.shape == (10, 5)
    assert g.is_planar
    c = g.centres()
    assert c.shape == (10, 5, 2)
    np.testing.assert_allclose(c[0, 0], [0.05, 0.05])


def test_single_layer_grid_is_planar():
    g = Grid(lower=(0, 0, -0.05), upper=(1, 1, 0.05), spacing=0.1)
    assert g.shape == (10, 10, 1) and g.is_planar


def test_centres_and_index_round_trip():
    g = Grid(lower=(-1.0, 0.0, 2.0), upper=(1.0, 1.0, 3.0), spacing=0.125)
    c = g.centres()
    assert c.shape == (*g.shape, 3)
    rng = np.random.default_rng(1)
    idx = np.column_stack([rng.integers(0, n, 50) for n in g.shape])
    pts = g.centre_of(idx)
    np.testing.assert_array_equal(g.cell_of(pts), idx)
    np.testing.assert_allclose(pts, c[idx[:, 0], idx[:, 1], idx[:, 2]])
    flat = g.flat_index(idx)
    np.testing.assert_array_equal(flat, np.ravel_multi_index(idx.T, g.shape))
    np.testing.assert_array_equal(g.unflat_index(flat), idx)
    assert np.all(g.contains_index(idx))
    assert not g.contains_index(np.array([[g.shape[0], 0, 0]]))[0]


def test_index_box_selects_centres_in_box():
    g = Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=0.1)
    sl = g.index_box((0.2, 0.0, 0.5), (0.44, 1.0, 0.55))
    c = g.centres()[sl]
    assert c[..., 0].min() >= 0.2 and c[..., 0].max() <= 0.44
    assert sl[0] == slice(2, 4) and sl[1] == slice(0, 10) and sl[2] == slice(5, 6)
    # A box between centres selects nothing along that axis.
    sl = g.index_box((0.51, 0, 0), (0.54, 1, 1))
    assert sl[0].stop == sl[0].start


def test_refinement_snaps_outward_and_halves():
    base = Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=0.1)
    ng = refine(base, [((0.25, 0.31, 0.4), (0.62, 0.7, 0.6)), ((0.4, 0.4, 0.45), (0.5, 0.5, 0.55))])
    l1, l2 = ng.levels[1], ng.levels[2]
    np.testing.assert_allclose(l1.lower, (0.2, 0.3, 0.4))
    np.testing.assert_allclose(l1.upper, (0.7, 0.7, 0.6))
    assert l1.spacing == pytest.approx(0.05) and l1.shape == (10, 8, 4)
    assert l2.spacing == pytest.approx(0.025)
    assert ng.finest is l2
    assert ng.cells_per_level() == (1000, 320, l2.size)
    # Leaf cells: the parent cells under a child box are not counted twice.
    assert ng.leaf_cells_per_level()[0] == 1000 - 320 // 8
    assert ng.total_cells == sum(ng.cells_per_level())
    assert ng.level_containing((0.42, 0.42, 0.46), (0.48, 0.48, 0.5)) == 2
    assert ng.level_containing((0.0, 0.0, 0.0), (0.9, 0.9, 0.9)) == 0


def test_refinement_box_outside_parent_is_an_input_error():
    base = Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=0.1)
    with pytest.raises(InputError, match="refinement box 0 reaches outside .* along x"):
        refine(base, [((-0.2, 0.1, 0.1), (0.5, 0.5, 0.5))])
    with pytest.raises(InputError, match="box 0 has 2/2 components but the grid is 3-D"):
        refine(base, [((0.1, 0.1), (0.5, 0.5))])


def test_memory_estimate_counts_bytes():
    base = Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=0.1)
    ng = refine(base, [((0.2, 0.2, 0.2), (0.6, 0.6, 0.6))])
    mem = ng.memory_estimate(n_interface=100, k=20)
    assert mem.tags == 1000 + 512
    assert mem.stencils == stencil_bytes(100, 20, 3) == 100 * (8 + 320 + 48 + 17)
    assert mem.total == mem.tags + mem.stencils
