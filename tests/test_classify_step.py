"""Tests of the compiled crossing enumeration and incremental stepping of ibprep.tagging.classify.

The compiled kernels are held to their numpy twins in the same module (the
project's own reference paths); the stepping results are held to two full
taggings and their set differences (common practice, no single source).
"""

import warnings

import numpy as np
import pytest
from conftest import apply_pose, box_mesh, rigid_pose, sphere_mesh, torus_mesh, wing_mesh

from ibprep import CellTag, Grid, IbprepWarning, InputError
from ibprep.tagging.classify import (
    _axes3,
    _changed_cells,
    _changed_runs,
    _Crossings,
    _crossings,
    _crossings_nb,
    _crossing_rows,
    _crossing_rows_nb,
    _crossings_numpy,
    _divmod_nb,
    _i_proto,
    _lattice_range,
    _point_range_nb,
    _row_sorted,
    _row_sorted_numpy,
    _solid_box,
    classify,
    step_tags,
)

GRID = Grid(lower=(-1.1, -1.0, -0.9), upper=(1.0, 1.125, 1.2), spacing=1 / 40)


def _key(cr):
    """Crossings as a (4, c) array in one canonical order (the enumeration order may differ)."""
    order = np.lexsort((cr.w, cr.i, cr.k, cr.j))
    return np.stack([cr.i[order], cr.j[order], cr.k[order], cr.w[order].astype(np.int64)])


def _mesh(name, seed):
    rng = np.random.default_rng(seed)
    base = {
        "sphere": lambda: sphere_mesh(0.7, 3),
        "torus": lambda: torus_mesh(0.6, 0.2, 32, 12),
        "wing": lambda: wing_mesh(40, 8, chord=1.2, span=1.4, z0=-0.7),
    }[name]()
    return apply_pose(rigid_pose(rng, 0.1), base)


def _snapped(mesh, h):
    """Vertices rounded to multiples of h / 2: rows through vertices and along edges (exact predicates needed)."""
    v, f = mesh
    return np.round(v / (h / 2)) * (h / 2), f


def _members(tags, interface):
    return tags == CellTag.SOLID if interface == "fluid-side" else tags != CellTag.FLUID


# ---------------------------------------------------------------------------- compiled twins
@pytest.mark.parametrize("seed", [0, 1])
@pytest.mark.parametrize("name", ["sphere", "torus", "wing"])
def test_compiled_crossings_equal_the_numpy_path(name, seed):
    axes = _axes3(GRID)
    mesh = _mesh(name, seed)
    got, ref = _crossings(*mesh, *axes), _crossings_numpy(*mesh, *axes)
    assert ref.i.size > 100
    np.testing.assert_array_equal(_key(got), _key(ref))


@pytest.mark.parametrize("name", ["sphere", "torus", "box"])
def test_compiled_crossings_hand_exact_cases_to_the_numpy_path(name):
    # Snapped vertices and an axis-aligned box put lattice points exactly on edges
    # and vertices in projection; the compiled filter must hand those triangles to
    # the exact numpy path, and the union must equal the numpy path.
    h = 1 / 16
    grid = Grid(lower=(-1 - h / 2,) * 3, upper=(1 - h / 2,) * 3, spacing=h)
    axes = _axes3(grid)
    if name == "box":
        mesh = box_mesh((-0.5, -0.5, -0.5), (0.5, 0.25, 0.375))
    else:
        mesh = _snapped(sphere_mesh(0.8, 2) if name == "sphere" else torus_mesh(0.55, 0.25, 24, 12), h)
    v, f = mesh
    vt, ft = np.ascontiguousarray(v.T), np.ascontiguousarray(f.T)
    exact = _crossings_nb(vt[0], vt[1], vt[2], ft[0], ft[1], ft[2], *axes)[5]
    assert exact.size > 0  # the fallback is exercised
    np.testing.assert_array_equal(_key(_crossings(*mesh, *axes)), _key(_crossings_numpy(*mesh, *axes)))


def test_compiled_crossings_settle_triangles_with_an_edge_along_the_rows():
    # A sphere centred on the origin has mirror vertices (x, y, z), (-x, y, z), so
    # some triangles have an edge along x: two vertices coincide in projection and
    # the projected area is exactly zero (its floating-point value is an unsure
    # zero). The compiled filter settles them itself instead of handing them to the
    # exact numpy path (before: 16 of these 320 triangles went there); the crossings
    # still equal the numpy path's.
    v, f = sphere_mesh(0.7, 2)
    p = v[f][:, :, 1:]
    along_x = (p[:, 0] == p[:, 1]).all(1) | (p[:, 1] == p[:, 2]).all(1) | (p[:, 2] == p[:, 0]).all(1)
    assert along_x.sum() == 16
    axes = _axes3(GRID)
    vt, ft = np.ascontiguousarray(v.T), np.ascontiguousarray(f.T)
    assert _crossings_nb(vt[0], vt[1], vt[2], ft[0], ft[1], ft[2], *axes)[5].size == 0
    np.testing.assert_array_equal(_key(_crossings(v, f, *axes)), _key(_crossings_numpy(v, f, *axes)))


def test_compiled_crossings_on_a_2d_grid_equal_the_numpy_path():
    grid = Grid(lower=(0, 0), upper=(1, 1), spacing=1 / 50)
    th = np.linspace(0, 2 * np.pi, 41)[:-1]
    loop = np.column_stack([0.5 + 0.3 * np.cos(th), 0.45 + 0.2 * np.sin(th)])
    from ibprep.geometry.triangles import as_triangles

    v, f = as_triangles(loop)
    axes = _axes3(grid)
    ref = _crossings_numpy(v, f, *axes)
    assert ref.i.size > 10
    np.testing.assert_array_equal(_key(_crossings(v, f, *axes)), _key(ref))


@pytest.mark.parametrize("b", [1, 3, 410, 160 * 410, 2**20 + 7])
def test_divmod_from_a_floating_point_guess_equals_divmod(b):
    rng = np.random.default_rng(b)
    a = np.concatenate([np.arange(0, 3 * b + 3), [k * b + d for k in (10**6, 2**31 // b, 2**40 // b) for d in (-1, 0, 1)],
                        rng.integers(0, 2**45, 1000)])
    a = a[a >= 0]
    got = np.array([_divmod_nb(int(x), b, 1.0 / b) for x in a]).T
    np.testing.assert_array_equal(got, np.divmod(a, b))  # oracle: numpy's integer divmod


def test_point_range_equals_the_lattice_range():
    # A vertex's lattice range [first, stop): the centres lying exactly at y.
    for axis in _axes3(GRID)[1:]:
        h = axis[1] - axis[0]
        y = np.concatenate([axis, np.nextafter(axis, -np.inf), np.nextafter(axis, np.inf), axis + h / 2, [axis[0] - 3, axis[-1] + 3]])
        got = np.array([_point_range_nb(axis, 1.0 / h, v) for v in y]).T
        # Oracles: the numpy reference path (_lattice_range) and numpy's searchsorted.
        np.testing.assert_array_equal(got, np.array(_lattice_range(axis, y, y)))
        np.testing.assert_array_equal(got, [np.searchsorted(axis, y, "left"), np.searchsorted(axis, y, "right")])
        assert np.count_nonzero(got[1] - got[0]) == axis.size  # the centres themselves


def _assert_rows_equal(rows, ref, nz):
    """A _Rows equals row-sorted _Crossings: same row and position sequence, same crossings."""
    got = rows.expanded()
    assert np.all(np.diff(rows.start) >= 0) and rows.start[-1] == rows.i.size
    np.testing.assert_array_equal(np.stack([got.j * nz + got.k, got.i]), np.stack([ref.j * nz + ref.k, ref.i]))
    np.testing.assert_array_equal(_key(got), _key(ref))


@pytest.mark.parametrize("seed", [0, 1])
@pytest.mark.parametrize("name", ["sphere", "torus", "wing"])
def test_crossings_grouped_by_row_equal_the_numpy_path(name, seed):
    axes, shape3 = _axes3(GRID), GRID.shape
    mesh = _mesh(name, seed)
    # Oracle: the numpy reference path (_crossings_numpy), ordered by _row_sorted_numpy.
    ref = _row_sorted_numpy(_crossings_numpy(*mesh, *axes), shape3)
    assert ref.i.size > 100
    rows = _crossing_rows(*mesh, *axes)
    _assert_rows_equal(rows, ref, shape3[2])
    # The box of the solid centres, from the rows and from the numpy crossings.
    assert _solid_box(rows, shape3) == _solid_box(ref, shape3)
    # Buffers that must grow many times (capacity 1) give the same rows.
    small = _crossing_rows_nb(*mesh, *axes, 1, _i_proto(shape3[0]))
    np.testing.assert_array_equal(small[4], rows.start)
    np.testing.assert_array_equal(small[5], rows.i)
    np.testing.assert_array_equal(small[6], rows.w)


@pytest.mark.parametrize("name", ["sphere", "torus", "box"])
def test_crossings_grouped_by_row_merge_the_exact_cases(name):
    # As test_compiled_crossings_hand_exact_cases_to_the_numpy_path: the triangles
    # needing exact arithmetic are merged into the rows from the numpy path.
    h = 1 / 16
    grid = Grid(lower=(-1 - h / 2,) * 3, upper=(1 - h / 2,) * 3, spacing=h)
    axes, shape3 = _axes3(grid), grid.shape
    if name == "box":
        mesh = box_mesh((-0.5, -0.5, -0.5), (0.5, 0.25, 0.375))
    else:
        mesh = _snapped(sphere_mesh(0.8, 2) if name == "sphere" else torus_mesh(0.55, 0.25, 24, 12), h)
    assert _crossing_rows_nb(*mesh, *axes, 0, _i_proto(shape3[0]))[7].size > 0
    # Oracle: the numpy reference path.
    ref = _row_sorted_numpy(_crossings_numpy(*mesh, *axes), shape3)
    rows = _crossing_rows(*mesh, *axes)
    _assert_rows_equal(rows, ref, shape3[2])
    assert _solid_box(rows, shape3) == _solid_box(ref, shape3)


def test_crossings_grouped_by_row_on_a_2d_grid_and_off_the_grid():
    grid = Grid(lower=(0, 0), upper=(1, 1), spacing=1 / 50)
    th = np.linspace(0, 2 * np.pi, 41)[:-1]
    loop = np.column_stack([0.5 + 0.3 * np.cos(th), 0.45 + 0.2 * np.sin(th)])
    from ibprep.geometry.triangles import as_triangles

    v, f = as_triangles(loop)
    axes, shape3 = _axes3(grid), (*grid.shape, 1)
    ref = _row_sorted_numpy(_crossings_numpy(v, f, *axes), shape3)  # oracle: the numpy reference path
    assert ref.i.size > 10
    _assert_rows_equal(_crossing_rows(v, f, *axes), ref, 1)
    far = _crossing_rows(v + [0.0, 5.0, 0.0], f, *axes)  # wholly outside the grid along y: no rows
    assert far.i.size == 0 and _solid_box(far, shape3) is None


@pytest.mark.parametrize("name", ["torus", "wing"])
def test_changed_cells_of_grouped_rows_equal_the_numpy_path(name):
    axes, shape3 = _axes3(GRID), GRID.shape
    a = _mesh(name, 2)
    b = (a[0] + [0.02, -0.015, 0.03], a[1])
    got = _changed_cells(_crossing_rows(*b, *axes), _crossing_rows(*a, *axes), shape3, with_box=True)
    # Oracle: the numpy reference path (_changed_runs on _crossings_numpy).
    ref = _changed_runs(_crossings_numpy(*b, *axes), _crossings_numpy(*a, *axes), shape3)
    assert ref[0].size and ref[1].size
    np.testing.assert_array_equal(got[0], ref[0])
    np.testing.assert_array_equal(got[1], ref[1])
    assert got[2] == ref[2] and got[3] == 0
    # Against the body moved far along y (boxes overlapping only in part), and against no crossings at all.
    far = (a[0] + [0.0, 0.9, 0.0], a[1])
    for new, old in ((a, far), (far, a)):
        got = _changed_cells(_crossing_rows(*new, *axes), _crossing_rows(*old, *axes), shape3)
        ref = _changed_runs(_crossings_numpy(*new, *axes), _crossings_numpy(*old, *axes), shape3)
        np.testing.assert_array_equal(got[0], ref[0])
        np.testing.assert_array_equal(got[1], ref[1])
    empty = _row_sorted(_Crossings(*(np.empty(0, np.int64) for _ in range(3)), np.empty(0, np.int8)), shape3)
    got = _changed_cells(empty, _crossing_rows(*a, *axes), shape3)
    ref = _changed_runs(_crossings_numpy(a[0] + 9.0, a[1], *axes), _crossings_numpy(*a, *axes), shape3)
    np.testing.assert_array_equal(got[0], ref[0])
    assert got[1].size == 0 and not got[2]


def _random_crossings(rng, shape3, n):
    """Arbitrary crossing sets, rows left open and crossings at the grid's end included."""
    nx, ny, nz = shape3
    return _Crossings(
        rng.integers(0, nx + 1, n), rng.integers(0, ny, n), rng.integers(0, nz, n), rng.choice(np.array([-1, 1], np.int8), n)
    )


@pytest.mark.parametrize("seed", range(4))
def test_row_sort_and_changed_cells_equal_the_numpy_paths(seed):
    rng = np.random.default_rng(seed)
    shape3 = (9, 5, 4) if seed % 2 else (30, 3, 1)
    new, old = _random_crossings(rng, shape3, 60), _random_crossings(rng, shape3, 50)
    s, r = _row_sorted(new, shape3).expanded(), _row_sorted_numpy(new, shape3)
    nz = shape3[2]
    np.testing.assert_array_equal(np.stack([s.j * nz + s.k, s.i]), np.stack([r.j * nz + r.k, r.i]))
    np.testing.assert_array_equal(_key(s), _key(r))
    fresh, covered, any_solid, open_rows = _changed_cells(new, old, shape3)
    ref_fresh, ref_covered, ref_any = _changed_runs(new, old, shape3)
    np.testing.assert_array_equal(fresh, ref_fresh)
    np.testing.assert_array_equal(covered, ref_covered)
    assert any_solid == ref_any
    balance = np.bincount(new.j * nz + new.k, weights=new.w, minlength=shape3[1] * nz)
    assert open_rows == np.count_nonzero(balance) > 0
    assert fresh.size + covered.size > 0
    # The kernel's box of the changed cells bounds exactly the cells it returned.
    box = _changed_cells(new, old, shape3, with_box=True)[4]
    ijk = np.unravel_index(np.concatenate([fresh, covered]), shape3)
    np.testing.assert_array_equal(box, [b for c in ijk for b in (c.min(), c.max())])


# ---------------------------------------------------------------------------- stepping
def _pose_chain(rng, n, spacing):
    """Poses one small step apart: a slow rotation about a random axis and a drift of about h / 3 per step."""
    axis = rng.normal(size=3)
    axis /= np.linalg.norm(axis)
    drift = rng.normal(size=3) * spacing / 3
    out = []
    for s in range(n):
        ang = 0.01 * s
        K = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
        T = np.eye(4)
        T[:3, :3] = np.eye(3) + np.sin(ang) * K + (1 - np.cos(ang)) * K @ K
        T[:3, 3] = drift * s
        out.append(T)
    return out


def _several_bodies():
    a = sphere_mesh(0.35, 3, centre=(-0.45, 0.1, 0.0))
    b = torus_mesh(0.3, 0.1, 24, 10)
    b = (b[0] + [0.5, -0.2, 0.3], b[1])
    c = box_mesh((0.1, 0.35, -0.6), (0.7, 0.8, -0.25))
    verts = [a[0], b[0], c[0]]
    offsets = np.cumsum([0] + [len(v) for v in verts[:-1]])
    return np.vstack(verts), np.vstack([f + o for f, o in zip((a[1], b[1], c[1]), offsets)])


@pytest.mark.parametrize("overwrite", [False, True])
@pytest.mark.parametrize("interface", ["fluid-side", "solid-side"])
def test_step_chain_of_several_bodies_equals_full_taggings(interface, overwrite):
    rng = np.random.default_rng(11)
    grid = Grid(lower=(-1, -1, -1), upper=(1, 1, 1), spacing=1 / 20)
    bodies = _several_bodies()
    poses = [apply_pose(T, bodies) for T in _pose_chain(rng, 6, grid.spacing)]
    previous = classify(poses[0], grid, interface=interface)
    tr = step_tags(previous, poses[1], grid, previous_surface=poses[0], interface=interface)
    for mesh in poses[2:]:
        before = tr.tags.copy()
        nxt = step_tags(tr, mesh, grid, interface=interface, overwrite_previous=overwrite)
        full = classify(mesh, grid, interface=interface)
        np.testing.assert_array_equal(nxt.tags, full)
        np.testing.assert_array_equal(nxt.fresh, np.flatnonzero(_members(before, interface) & ~_members(full, interface)))
        np.testing.assert_array_equal(nxt.covered, np.flatnonzero(_members(full, interface) & ~_members(before, interface)))
        assert nxt.fresh.size + nxt.covered.size > 0
        if overwrite:
            assert nxt.tags is tr.tags or np.shares_memory(nxt.tags, tr.tags)
        else:
            np.testing.assert_array_equal(tr.tags, before)  # not modified
        tr = nxt


@pytest.mark.parametrize("interface", ["fluid-side", "solid-side"])
def test_step_bodies_leaving_and_reentering_the_grid(interface):
    # The body crosses the grid's x = upper face, leaves it wholly, and comes back.
    grid = Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=1 / 24)
    base = sphere_mesh(0.2, 3, centre=(0.7, 0.5, 0.45))
    shifts = [0.0, 0.15, 0.3, 0.6, 0.25, 0.05]
    meshes = [(base[0] + [s, 0.01 * n, 0.0], base[1]) for n, s in enumerate(shifts)]
    tr = classify(meshes[0], grid, interface=interface)
    prev_mesh = meshes[0]
    left_grid = False
    for mesh in meshes[1:]:
        before = tr.tags.copy() if hasattr(tr, "tags") else tr.copy()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", IbprepWarning)
            tr = step_tags(tr, mesh, grid, previous_surface=prev_mesh, interface=interface)
            full = classify(mesh, grid, interface=interface)
        np.testing.assert_array_equal(tr.tags, full)
        np.testing.assert_array_equal(tr.fresh, np.flatnonzero(_members(before, interface) & ~_members(full, interface)))
        np.testing.assert_array_equal(tr.covered, np.flatnonzero(_members(full, interface) & ~_members(before, interface)))
        assert tr.body_outside == (not full.any())
        left_grid |= tr.body_outside
        prev_mesh = mesh
    assert left_grid


@pytest.mark.parametrize("overwrite", [False, True])
def test_step_chain_through_exact_cases_equals_full_taggings(overwrite):
    # Vertices on multiples of h / 2 and moves of h / 2: rows through vertices and
    # along edges at every pose, so the steps merge triangles from the exact numpy
    # path into the compiled rows. Oracle: full taggings and their set differences.
    h = 1 / 16
    grid = Grid(lower=(-1 - h / 2,) * 3, upper=(1 - h / 2,) * 3, spacing=h)
    axes, shape3 = _axes3(grid), grid.shape
    base = _snapped(torus_mesh(0.55, 0.25, 24, 12), h)
    poses = [(base[0] + np.array([0.5, 0.0, -0.5]) * h * n, base[1]) for n in range(5)]
    prev = classify(poses[0], grid)
    tr = step_tags(prev.copy(), poses[1], grid, previous_surface=poses[0], overwrite_previous=overwrite)
    for mesh in poses[2:]:
        assert _crossing_rows_nb(*mesh, *axes, 0, _i_proto(shape3[0]))[7].size > 0  # the fallback is exercised
        before = tr.tags.copy()
        tr = step_tags(tr, mesh, grid, overwrite_previous=overwrite)
        full = classify(mesh, grid)
        np.testing.assert_array_equal(tr.tags, full)
        np.testing.assert_array_equal(tr.fresh, np.flatnonzero(_members(before, "fluid-side") & ~_members(full, "fluid-side")))
        np.testing.assert_array_equal(tr.covered, np.flatnonzero(_members(full, "fluid-side") & ~_members(before, "fluid-side")))
        assert tr.fresh.size + tr.covered.size > 0


def test_step_2d_chain_equals_full_taggings():
    grid = Grid(lower=(0, 0), upper=(1, 1), spacing=1 / 64)
    th = np.linspace(0, 2 * np.pi, 33)[:-1]
    loop = np.column_stack([0.45 + 0.25 * np.cos(th), 0.5 + 0.1 * np.sin(th)])
    prev = loop
    tr = classify(loop, grid)
    for n in range(1, 5):
        c, s_ = np.cos(0.03 * n), np.sin(0.03 * n)
        now = (loop - [0.45, 0.5]) @ np.array([[c, s_], [-s_, c]]) + [0.45 + 0.004 * n, 0.5]
        before = tr.tags.copy() if hasattr(tr, "tags") else tr.copy()
        tr = step_tags(tr, now, grid, previous_surface=prev)
        full = classify(now, grid)
        np.testing.assert_array_equal(tr.tags, full)
        np.testing.assert_array_equal(tr.covered, np.flatnonzero(_members(full, "fluid-side") & ~_members(before, "fluid-side")))
        prev = now


def test_overwrite_previous_spends_the_transition_and_checks_the_array():
    grid = Grid(lower=(-1, -1, -1), upper=(1, 1, 1), spacing=1 / 16)
    a = sphere_mesh(0.5, 2)
    b = (a[0] + [0.02, 0.0, 0.01], a[1])
    c = (a[0] + [0.04, 0.01, 0.01], a[1])
    tags = classify(a, grid)
    tr = step_tags(tags, b, grid, previous_surface=a, overwrite_previous=True)
    assert np.shares_memory(tr.tags, tags)  # the caller's array was updated in place
    np.testing.assert_array_equal(tags, classify(b, grid))
    nxt = step_tags(tr, c, grid, overwrite_previous=True)
    np.testing.assert_array_equal(nxt.tags, classify(c, grid))
    with pytest.raises(InputError, match="overwritten by step_tags"):
        step_tags(tr, a, grid)
    frozen = classify(a, grid)
    frozen.flags.writeable = False
    with pytest.raises(InputError, match="writeable, C-contiguous"):
        step_tags(frozen, b, grid, previous_surface=a, overwrite_previous=True)
    strided = np.asfortranarray(classify(a, grid))
    with pytest.raises(InputError, match="writeable, C-contiguous"):
        step_tags(strided, b, grid, previous_surface=a, overwrite_previous=True)


def test_step_of_an_open_surface_warns_like_classify():
    grid = Grid(lower=(-1, -1, -1), upper=(1, 1, 1), spacing=1 / 16)
    v, f = sphere_mesh(0.5, 2)
    tags = classify((v, f), grid)
    with pytest.warns(IbprepWarning, match="not closed"):
        step_tags(tags, (v + 0.01, f[1:]), grid, previous_surface=(v, f))


@pytest.mark.parametrize("interface", ["fluid-side", "solid-side"])
def test_compiled_retag_equals_the_numpy_path(interface):
    from ibprep.tagging.classify import _retag, _retag_compiled

    grid = Grid(lower=(-1, -1, -1), upper=(1, 1, 1), spacing=1 / 20)
    a = _mesh("torus", 3)
    b = (a[0] + [0.03, -0.02, 0.04], a[1])
    axes, shape3 = _axes3(grid), grid.shape
    fresh, covered, _, _ = _changed_cells(_crossings(*b, *axes), _crossings(*a, *axes), shape3)
    assert fresh.size and covered.size
    start = classify(a, grid, interface=interface).reshape(-1)
    start[covered] = CellTag.SOLID
    start[fresh] = CellTag.FLUID
    ref, got = start.copy(), start.copy()
    region = _retag(ref, fresh, covered, shape3, interface)
    assert _retag_compiled(got, fresh, covered, shape3, interface) == region
    box = _changed_cells(_crossings(*b, *axes), _crossings(*a, *axes), shape3, with_box=True)[4]
    again = start.copy()
    assert _retag_compiled(again, fresh, covered, shape3, interface, box) == region
    np.testing.assert_array_equal(again, ref)
    np.testing.assert_array_equal(got, ref)
    np.testing.assert_array_equal(got.reshape(shape3), classify(b, grid, interface=interface))
    # The kernel setting the members itself, from the tags of the previous pose.
    # Oracle: the numpy reference path (_retag, members set beforehand).
    unset = classify(a, grid, interface=interface).reshape(-1)
    assert not np.array_equal(unset, start)
    assert _retag_compiled(unset, fresh, covered, shape3, interface, box, set_members=True) == region
    np.testing.assert_array_equal(unset, ref)
