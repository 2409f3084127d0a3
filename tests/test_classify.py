"""Tests of ibprep.tagging.classify: exact tags, tie-breaking, interface layers, stepping, 2-D, levels."""

import warnings

import numpy as np
import pytest
from conftest import apply_pose, box_mesh, octahedron_mesh, rigid_pose, sphere_mesh, torus_mesh, wing_mesh, wing_section
from scipy import ndimage

from ibprep import CellTag, Grid, IbprepWarning, InputError, refine
from ibprep.tagging.classify import Transition, classify, classify_levels, label_bodies, step_tags, surface_components

# Centres closer to the surface than this many cell sizes may legitimately differ
# from an independent oracle (round-off in either code); 1e-9 h.
NEAR_SURFACE_H = 1e-9

# libigl's generalised winding number is 1 inside and 0 outside a closed mesh up to
# round-off; 0.5 separates the two.
WINDING_HALF = 0.5


def _solid(tags):
    return tags == CellTag.SOLID


def _centres(grid):
    c = grid.centres().reshape(-1, grid.ndim)
    if grid.ndim == 2:
        c = np.column_stack([c, np.zeros(c.shape[0])])
    return c


def _distance_to_mesh(points, v, f):
    """Distance of each point to a triangle mesh, without squaring (accurate to ~1e-16 m near the surface).

    Plane distance where the foot lies inside a triangle, else distance to the
    nearest edge; brute force over all triangles (only used for a few points).
    """
    tri = np.asarray(v, float)[np.asarray(f)]
    a, b, c = tri[:, 0], tri[:, 1], tri[:, 2]
    n = np.cross(b - a, c - a)
    nn = np.linalg.norm(n, axis=1)
    out = np.empty(len(points))
    for q, p in enumerate(points):
        ins = np.ones(len(tri), bool)
        for u, w in ((a, b), (b, c), (c, a)):
            ins &= np.einsum("ij,ij->i", np.cross(w - u, p - u), n) >= 0
        best = np.where(ins & (nn > 0), np.abs(np.einsum("ij,ij->i", n, p - a)) / np.where(nn > 0, nn, 1), np.inf)
        for u, w in ((a, b), (b, c), (c, a)):
            e = w - u
            ee = np.einsum("ij,ij->i", e, e)
            t = np.clip(np.einsum("ij,ij->i", p - u, e) / np.where(ee > 0, ee, 1), 0, 1)
            best = np.minimum(best, np.linalg.norm(p - (u + t[:, None] * e), axis=1))
        out[q] = best.min()
    return out


def _assert_matches_winding_number(tags, mesh, grid):
    """Oracle: libigl ``igl.winding_number`` (generalised winding number, Jacobson et al. 2013) [computed]."""
    import igl

    v, f = mesh
    P = _centres(grid)
    wn = igl.winding_number(np.asarray(v, float), np.asarray(f, np.int64), P)
    oracle = np.abs(wn) > WINDING_HALF
    ours = tags.reshape(-1) == CellTag.SOLID
    differ = np.flatnonzero(oracle != ours)
    if differ.size:
        assert differ.size < 5000, f"{differ.size} centres disagree with the winding number"
        d = _distance_to_mesh(P[differ], v, f)
        far = d > NEAR_SURFACE_H * grid.spacing
        assert not np.any(far), f"{int(far.sum())} centres off the surface disagree with the winding number"
    return int(oracle.sum())


# ---------------------------------------------------------------------------- exact counts
def test_aligned_box_follows_the_stated_tie_rule():
    # Box faces on planes of centres (dyadic, so exact). Rule of the module docstring:
    # solid centres are exactly (x0, x1] x [y0, y1) x [z0, z1). Oracle: counting by hand.
    h = 0.125
    grid = Grid(lower=(-1 - h / 2,) * 3, upper=(1 - h / 2,) * 3, spacing=h)  # centres at multiples of h
    lo, hi = np.array([-0.5, -0.25, -0.75]), np.array([0.5, 0.625, 0.25])
    tags = classify(box_mesh(lo, hi), grid)
    X, Y, Z = np.meshgrid(*grid.axes(), indexing="ij")
    expect = (X > lo[0]) & (X <= hi[0]) & (Y >= lo[1]) & (Y < hi[1]) & (Z >= lo[2]) & (Z < hi[2])
    np.testing.assert_array_equal(_solid(tags), expect)
    # hand count: 8 x 7 x 8 centres
    assert int(_solid(tags).sum()) == 8 * 7 * 8


@pytest.mark.parametrize("axis", [0, 1, 2])
def test_face_adjacent_boxes_tag_like_the_merged_box(axis):
    # Two boxes sharing a face on a plane of centres: no double count, no gap.
    # Oracle: the merged box tagged by the same function (common practice, no single source).
    h = 0.25
    grid = Grid(lower=(-2 - h / 2,) * 3, upper=(2 - h / 2,) * 3, spacing=h)
    lo = np.array([-1.0, -1.0, -1.0])
    hi = np.array([1.0, 0.75, 0.5])
    mid = lo.copy()
    mid[axis] = 0.0
    hi_a = hi.copy()
    hi_a[axis] = 0.0
    va, fa = box_mesh(lo, hi_a)
    vb, fb = box_mesh(mid, hi)
    union = (np.vstack([va, vb]), np.vstack([fa, fb + len(va)]))
    merged = classify(box_mesh(lo, hi), grid)
    np.testing.assert_array_equal(classify(union, grid), merged)


def test_octahedron_vertices_on_centres_exact_count_and_rule():
    # Octahedron |x|+|y|+|z| <= r, vertices and edges through centres, faces through
    # many centres (dyadic coordinates: every predicate is exact). Strictly inside
    # count by hand formula; centres on the surface follow the rule of the module
    # docstring, which for this solid reduces to "solid iff x > 0" [computed].
    h = 0.125
    r = 1.0
    grid = Grid(lower=(-1.5 - h / 2,) * 3, upper=(1.5 - h / 2,) * 3, spacing=h)
    tags = classify(octahedron_mesh((0, 0, 0), r), grid)
    X, Y, Z = np.meshgrid(*grid.axes(), indexing="ij")
    f = np.abs(X) + np.abs(Y) + np.abs(Z)
    strictly = f < r
    on = f == r
    np.testing.assert_array_equal(_solid(tags), strictly | (on & (X > 0)))
    # Lattice points with |i|+|j|+|k| < 8 (n = 8 steps): sum over shells |.|_1 = s of
    # 4 s^2 + 2 points (s > 0), plus the origin.
    n = int(r / h)
    by_hand = 1 + sum(4 * s * s + 2 for s in range(1, n))
    assert int(strictly.sum()) == by_hand


def test_sphere_count_bracketed_by_exact_lattice_counts():
    # REFERENCES §6.3 [computed]: centre at a grid node, centres at (i+1/2)h, R/h = 8
    # -> 2176 centres inside the sphere. The icosphere is inscribed: every centre
    # strictly inside it is inside the sphere (upper bound 2176), and the ball of
    # the mesh's inradius lies inside the mesh (lower bound by direct count).
    h = 0.125
    R = 1.0
    v, fcs = sphere_mesh(R, subdivisions=4)
    grid = Grid(lower=(-1.25,) * 3, upper=(1.25,) * 3, spacing=h)
    tags = classify((v, fcs), grid)
    n = int(_solid(tags).sum())
    tri = v[fcs]
    normal = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    r_in = np.min(np.abs(np.einsum("ij,ij->i", normal, tri[:, 0])) / np.linalg.norm(normal, axis=1))
    c = grid.centres()
    r2 = np.sum(c**2, axis=-1)
    assert int(np.sum(r2 < R**2)) == 2176  # the tabulated count, recomputed
    assert int(np.sum(r2 < r_in**2)) <= n <= 2176
    _assert_matches_winding_number(tags, (v, fcs), grid)


def test_orientation_predicate_is_exact_on_near_degenerate_input():
    # Oracle: the same determinant in exact rational arithmetic (fractions.Fraction)
    # [computed]. Points are put on (or one ulp off) random lines, where the
    # floating-point determinant alone gets the sign wrong.
    from fractions import Fraction as F

    from ibprep.tagging.classify import _orient_sign

    rng = np.random.default_rng(3)
    n = 3000
    a = rng.uniform(-1, 1, (n, 2))
    b = rng.uniform(-1, 1, (n, 2))
    t = rng.uniform(-2, 3, n)
    p = a + t[:, None] * (b - a)
    p[::3] = np.nextafter(p[::3], 2.0)
    p[1::7] = a[1::7]  # exactly on a vertex
    got = _orient_sign(a[:, 0], a[:, 1], b[:, 0], b[:, 1], p[:, 0], p[:, 1])
    exact = []
    for (ay, az), (by, bz), (py, pz) in zip(a.tolist(), b.tolist(), p.tolist()):
        d = (F(by) - F(ay)) * (F(pz) - F(az)) - (F(bz) - F(az)) * (F(py) - F(ay))
        exact.append((d > 0) - (d < 0))
    np.testing.assert_array_equal(got, exact)
    naive = np.sign((b[:, 0] - a[:, 0]) * (p[:, 1] - a[:, 1]) - (b[:, 1] - a[:, 1]) * (p[:, 0] - a[:, 0]))
    assert np.any(naive != np.asarray(exact))  # the case is really near-degenerate


def test_rows_grazing_a_vertex_fan_count_once():
    # A closed fan-shaped double pyramid whose apex rows pass within one ulp of a
    # vertex shared by many triangles, with non-dyadic coordinates: every row must
    # cross the top and the bottom once each, so the solid run of the row through
    # the apex is exactly the centres between the two surfaces. Oracle: libigl
    # winding number off the surface [computed].
    h = 0.1
    grid = Grid(lower=(-1.05, -1.05, -1.05), upper=(1.05, 1.05, 1.05), spacing=h)
    ys, zs = grid.axes()[1], grid.axes()[2]
    apex_yz = np.array([ys[10], np.nextafter(zs[10], 1.0)])  # one ulp above a row of centres
    m = 13
    ang = 2 * np.pi * (np.arange(m) + 0.37) / m
    ring = np.column_stack([0.7 * np.cos(ang) + apex_yz[0], 0.7 * np.sin(ang) + apex_yz[1]])
    v = np.vstack([[[-0.6, *apex_yz]], [[0.55, *apex_yz]], np.column_stack([np.zeros(m) + 0.03, ring])])
    i = np.arange(m)
    j = (i + 1) % m
    f = np.concatenate([np.column_stack([np.zeros(m, int), 2 + j, 2 + i]), np.column_stack([np.ones(m, int), 2 + i, 2 + j])])
    tags = classify((v, f), grid)
    _assert_matches_winding_number(tags, (v, f), grid)
    assert _solid(tags)[:, 10, 10].sum() == np.sum((grid.axes()[0] > -0.6) & (grid.axes()[0] < 0.55))


# ---------------------------------------------------------------------------- oracle: libigl
@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("shape", ["sphere", "torus", "wing"])
def test_random_poses_match_libigl_winding_number(shape, seed):
    rng = np.random.default_rng(seed)
    mesh = {
        "sphere": lambda: sphere_mesh(0.7, subdivisions=3),
        "torus": lambda: torus_mesh(0.6, 0.2, 40, 16),
        "wing": lambda: wing_mesh(40, 6, chord=1.0, span=1.2, z0=-0.6),
    }[shape]()
    mesh = apply_pose(rigid_pose(rng), (mesh[0] - np.array([0.5, 0, 0]) * (shape == "wing"), mesh[1]))
    grid = Grid(lower=(-1.0, -1.0, -1.0), upper=(1.0, 1.0, 1.0), spacing=2.0 / 40)
    tags = classify(mesh, grid)
    n = _assert_matches_winding_number(tags, mesh, grid)
    assert n > 0


@pytest.mark.parametrize("shape", ["sphere", "torus"])
def test_vertices_snapped_onto_rows_of_centres_match_libigl(shape):
    # Vertices rounded to multiples of h/2 on a grid whose centres sit at multiples
    # of h: many rows pass exactly through vertices and along edges, and many centres
    # lie exactly on faces. Every centre off the surface must still match the
    # winding number (libigl igl.winding_number) [computed]; centres on the surface
    # are covered by the tie-rule tests.
    h = 1.0 / 16
    grid = Grid(lower=(-1 - h / 2,) * 3, upper=(1 - h / 2,) * 3, spacing=h)
    v, f = sphere_mesh(0.8, 2) if shape == "sphere" else torus_mesh(0.55, 0.25, 24, 12)
    v = np.round(v / (h / 2)) * (h / 2)
    on_rows = np.sum(np.all(np.isclose(np.round(v[:, 1:] / h) * h, v[:, 1:], rtol=0, atol=0), axis=1))
    assert on_rows > 20
    tags = classify((v, f), grid)
    assert _assert_matches_winding_number(tags, (v, f), grid) > 100


def test_flat_wing_tip_on_a_plane_of_centres():
    # Straight wing whose root and tip caps lie exactly on planes of centres. The
    # rule [z0, z1) makes the root layer solid and the tip layer fluid; every
    # layer in between is the same section. Oracle for one layer: libigl winding number.
    h = 1.0 / 32
    grid = Grid(lower=(-0.25 - h / 2, -0.25 - h / 2, -0.25 - h / 2), upper=(1.25 - h / 2, 0.25 - h / 2, 1.25 - h / 2), spacing=h)
    zs = grid.axes()[2]
    z_root, z_tip = 0.0, 1.0
    assert np.any(zs == z_root) and np.any(zs == z_tip)
    mesh = wing_mesh(60, 4, chord=1.0, span=z_tip - z_root, z0=z_root)
    tags = classify(mesh, grid)
    k0 = int(np.flatnonzero(zs == z_root)[0])
    k1 = int(np.flatnonzero(zs == z_tip)[0])
    solid = _solid(tags)
    layer = solid[:, :, k0 + 1]
    assert layer.sum() > 50
    for k in range(k0, k1):
        np.testing.assert_array_equal(solid[:, :, k], layer)
    assert not solid[:, :, k1].any() and not solid[:, :, : k0].any() and not solid[:, :, k1:].any()
    _assert_matches_winding_number(tags, mesh, grid)


def test_reversed_orientation_is_still_solid():
    # Winding number -1 is solid too (solid = winding != 0): an inside-out mesh tags alike.
    v, f = sphere_mesh(0.6, 2)
    grid = Grid(lower=(-1, -1, -1), upper=(1, 1, 1), spacing=0.1)
    np.testing.assert_array_equal(classify((v, f[:, ::-1]), grid), classify((v, f), grid))


def test_several_bodies_partly_outside():
    grid = Grid(lower=(0, 0, 0), upper=(2, 1, 1), spacing=1 / 32)
    a = sphere_mesh(0.3, 3, centre=(0.4, 0.5, 0.5))
    b = sphere_mesh(0.4, 3, centre=(1.9, 0.5, 0.1))  # pokes out of the x and z faces
    both = (np.vstack([a[0], b[0]]), np.vstack([a[1], b[1] + len(a[0])]))
    tags = classify(both, grid)
    _assert_matches_winding_number(tags, both, grid)
    np.testing.assert_array_equal(_solid(tags), _solid(classify(a, grid)) | _solid(classify(b, grid)))


def test_label_bodies_numbers_each_component():
    # Three disjoint bodies, one given as an unwelded triangle soup. Oracle: each
    # body classified on its own (common practice, no single source).
    grid = Grid(lower=(0, 0, 0), upper=(2, 1, 1), spacing=1 / 32)
    a = sphere_mesh(0.25, 2, centre=(0.4, 0.5, 0.5))
    b = box_mesh((1.0, 0.2, 0.2), (1.3, 0.7, 0.6))
    c = torus_mesh(0.25, 0.08, 24, 10)
    c = (c[0] + [1.65, 0.5, 0.5], c[1])
    soup_v = b[0][b[1]].reshape(-1, 3)
    soup = (soup_v, np.arange(soup_v.shape[0]).reshape(-1, 3))
    parts = [a, soup, c]
    v = np.vstack([p[0] for p in parts])
    offs = np.cumsum([0] + [len(p[0]) for p in parts])[:-1]
    f = np.vstack([p[1] + o for p, o in zip(parts, offs)])
    comp, count = surface_components((v, f))
    assert count == 3
    np.testing.assert_array_equal(np.unique(comp[: len(a[1])]), [0])
    labels, n = label_bodies((v, f), grid)
    assert n == 3 and labels.shape == grid.shape
    for k, p in enumerate(parts, start=1):
        np.testing.assert_array_equal(labels == k, _solid(classify(p, grid)))
    np.testing.assert_array_equal(labels > 0, _solid(classify((v, f), grid)))


@pytest.mark.parametrize("axis", [0, 1, 2])
@pytest.mark.parametrize("side", ["low", "high"])
def test_box_through_a_grid_face_is_solid_to_the_face(axis, side):
    # A box sticking out through one face of the grid: every row crosses the
    # surface only once inside the grid. Oracle: the box's own inequalities on the
    # centres (common practice, no single source); the box corners are off-lattice.
    grid = Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=1 / 20)
    lo = np.array([0.23, 0.31, 0.17])
    hi = np.array([0.61, 0.72, 0.58])
    if side == "low":
        lo[axis] = -0.4
    else:
        hi[axis] = 1.4
    tags = classify(box_mesh(lo, hi), grid)
    X, Y, Z = np.meshgrid(*grid.axes(), indexing="ij")
    expect = (X > lo[0]) & (X < hi[0]) & (Y > lo[1]) & (Y < hi[1]) & (Z > lo[2]) & (Z < hi[2])
    np.testing.assert_array_equal(_solid(tags), expect)


def test_body_wholly_outside_warns_and_is_all_fluid():
    grid = Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=0.1)
    mesh = sphere_mesh(0.3, 2, centre=(3.0, 0.5, 0.5))
    with pytest.warns(IbprepWarning, match="wholly outside"):
        tags = classify(mesh, grid)
    assert tags.dtype == np.uint8 and tags.shape == grid.shape and not tags.any()


def test_open_or_misoriented_surface_warns():
    # A box with one face missing, and a box with one face flipped: some rows cross
    # unevenly (the count is exact, so no tolerance is involved).
    grid = Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=1 / 16)
    v, f = box_mesh((0.2, 0.2, 0.2), (0.8, 0.7, 0.6))
    with pytest.warns(IbprepWarning, match="not closed or not consistently oriented"):
        classify((v, f[2:]), grid)  # the x = lo face removed
    flipped = f.copy()
    flipped[2:4] = flipped[2:4, ::-1]  # the x = hi face turned inwards
    with pytest.warns(IbprepWarning, match="rows of cell centres enter it"):
        classify((v, flipped), grid)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        classify((v, f), grid)  # closed: silent


def test_input_not_mutated_and_output_contract():
    v, f = sphere_mesh(0.5, 2)
    v0, f0 = v.copy(), f.copy()
    grid = Grid(lower=(-1, -1, -1), upper=(1, 1, 1), spacing=0.1)
    tags = classify((v, f), grid)
    np.testing.assert_array_equal(v, v0)
    np.testing.assert_array_equal(f, f0)
    assert tags.dtype == np.uint8 and tags.shape == grid.shape
    assert set(np.unique(tags)) == {0, 1, 2}


# ---------------------------------------------------------------------------- interface layers
@pytest.mark.parametrize("interface", ["fluid-side", "solid-side"])
def test_interface_layer_matches_binary_dilation(interface):
    # Oracle: scipy.ndimage.binary_dilation with the 6-neighbour cross; cells outside
    # the grid count as absent (border_value=0).
    grid = Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=1 / 24)
    mesh = torus_mesh(0.35, 0.12, 32, 12)
    mesh = (mesh[0] + 0.5 + np.array([0.0, 0.0, 0.45]), mesh[1])  # touches the top face
    tags = classify(mesh, grid, interface=interface)
    base = classify(mesh, grid)
    solid = _solid(base)
    cross = ndimage.generate_binary_structure(3, 1)
    if interface == "fluid-side":
        ring = ndimage.binary_dilation(solid, cross) & ~solid
        np.testing.assert_array_equal(_solid(tags), solid)
    else:
        ring = ndimage.binary_dilation(~solid, cross, border_value=0) & solid
        np.testing.assert_array_equal(tags != CellTag.FLUID, solid)
    np.testing.assert_array_equal(tags == CellTag.INTERFACE, ring)
    assert ring.any()


# ---------------------------------------------------------------------------- 2-D and levels
def test_polygon_on_2d_grid_matches_matplotlib_path():
    # Oracle: matplotlib.path.Path.contains_points on the centres, away from the edges.
    from matplotlib.path import Path

    loop = wing_section(50) @ np.array([[np.cos(0.3), np.sin(0.3)], [-np.sin(0.3), np.cos(0.3)]]) + [0.1, 0.2]
    grid = Grid(lower=(-0.2, -0.4), upper=(1.3, 0.6), spacing=1 / 128)
    tags = classify(loop, grid)
    assert tags.shape == grid.shape
    P = grid.centres().reshape(-1, 2)
    inside = Path(np.vstack([loop, loop[:1]])).contains_points(P)
    ours = _solid(tags).reshape(-1)
    diff = np.flatnonzero(inside != ours)
    # distance of differing centres to the polygon's edges
    a, b = loop, np.roll(loop, -1, axis=0)
    for p in P[diff]:
        t = np.clip(np.einsum("ij,ij->i", p - a, b - a) / np.einsum("ij,ij->i", b - a, b - a), 0, 1)
        assert np.min(np.linalg.norm(a + t[:, None] * (b - a) - p, axis=1)) < NEAR_SURFACE_H * grid.spacing
    assert ours.sum() > 100


def test_2d_square_on_centres_follows_the_rule():
    # Square with edges on rows of centres: solid centres are (x0, x1] x [y0, y1) [computed by hand].
    h = 0.0625
    grid = Grid(lower=(-1 - h / 2, -1 - h / 2), upper=(1 - h / 2, 1 - h / 2), spacing=h)
    sq = np.array([[-0.5, -0.25], [0.5, -0.25], [0.5, 0.5], [-0.5, 0.5]])
    tags = classify(sq, grid)
    X, Y = np.meshgrid(*grid.axes(), indexing="ij")
    np.testing.assert_array_equal(_solid(tags), (X > -0.5) & (X <= 0.5) & (Y >= -0.25) & (Y < 0.5))


def test_single_layer_3d_grid_is_the_middle_slice():
    v, f = sphere_mesh(0.6, 3)
    full = Grid(lower=(-1, -1, -0.05), upper=(1, 1, 0.05), spacing=0.1)
    assert full.shape[2] == 1 and full.is_planar
    tags = classify((v, f), full, interface="fluid-side")
    _assert_matches_winding_number(tags, (v, f), full)
    solid = _solid(tags)[:, :, 0]
    ring = ndimage.binary_dilation(solid, ndimage.generate_binary_structure(2, 1)) & ~solid
    np.testing.assert_array_equal(tags[:, :, 0] == CellTag.INTERFACE, ring)


def test_classify_levels_equals_classify_per_level():
    base = Grid(lower=(-1, -1, -1), upper=(1, 1, 1), spacing=0.125)
    nested = refine(base, [((-0.7, -0.7, -0.7), (0.7, 0.7, 0.7)), ((-0.3, -0.3, -0.3), (0.3, 0.3, 0.3))])
    mesh = sphere_mesh(0.5, 3)
    levels = classify_levels(mesh, nested)
    assert len(levels) == 3
    for tags, g in zip(levels, nested.levels):
        np.testing.assert_array_equal(tags, classify(mesh, g))


# ---------------------------------------------------------------------------- stepping
@pytest.mark.parametrize("interface", ["fluid-side", "solid-side"])
def test_step_equals_full_tagging_and_set_differences(interface):
    # Oracle: two full taggings and their set differences (common practice, no single source).
    rng = np.random.default_rng(7)
    grid = Grid(lower=(-0.5, -0.6, -0.8), upper=(1.5, 0.6, 0.8), spacing=1 / 40)
    wing = wing_mesh(40, 6, span=1.2, z0=-0.6)
    pose_a = np.eye(4)
    prev_mesh = wing
    prev_tags = classify(prev_mesh, grid, interface=interface)
    for step in range(4):
        ang = 0.05 * (step + 1)
        T = np.eye(4)
        T[:2, :2] = [[np.cos(ang), -np.sin(ang)], [np.sin(ang), np.cos(ang)]]
        T[:3, 3] = [0.3 * h for h in rng.normal(size=3) * grid.spacing]
        now = apply_pose(T @ pose_a, wing)
        before = prev_tags.copy()
        tr = step_tags(prev_tags, now, grid, previous_surface=prev_mesh, interface=interface)
        np.testing.assert_array_equal(prev_tags, before)  # not mutated
        full = classify(now, grid, interface=interface)
        np.testing.assert_array_equal(tr.tags, full)
        solid_old = _solid(prev_tags) if interface == "fluid-side" else prev_tags != CellTag.FLUID
        solid_new = _solid(full) if interface == "fluid-side" else full != CellTag.FLUID
        np.testing.assert_array_equal(tr.fresh, np.flatnonzero(solid_old & ~solid_new))
        np.testing.assert_array_equal(tr.covered, np.flatnonzero(solid_new & ~solid_old))
        assert tr.fresh.size + tr.covered.size > 0 and not tr.body_outside
        changed = tr.tags != prev_tags
        outside_region = np.ones(grid.shape, bool)
        outside_region[tr.region] = False
        assert not np.any(changed & outside_region)
        prev_tags, prev_mesh = tr.tags, now


@pytest.mark.parametrize("interface", ["fluid-side", "solid-side"])
def test_stepping_from_a_transition_chain_equals_full_taggings(interface):
    # A time loop passes each Transition to the next step (cached crossings). Oracle:
    # a full tagging at every step, and fresh / covered as set differences.
    grid = Grid(lower=(-1, -1, -1), upper=(1, 1, 1), spacing=1 / 32)
    torus = torus_mesh(0.5, 0.15, 40, 16)
    poses = []
    for n in range(5):
        T = np.eye(4)
        c, s_ = np.cos(0.04 * n), np.sin(0.04 * n)
        T[:3, :3] = [[1, 0, 0], [0, c, -s_], [0, s_, c]]
        T[:3, 3] = [0.4 * n * grid.spacing, 0.0, -0.3 * n * grid.spacing]
        poses.append(apply_pose(T, torus))
    tr = step_tags(classify(poses[0], grid, interface=interface), poses[1], grid, previous_surface=poses[0], interface=interface)
    for prev_mesh, mesh in zip(poses[1:], poses[2:]):
        before = tr.tags.copy()
        nxt = step_tags(tr, mesh, grid, interface=interface)
        np.testing.assert_array_equal(tr.tags, before)
        full = classify(mesh, grid, interface=interface)
        np.testing.assert_array_equal(nxt.tags, full)
        member = (lambda t: t == CellTag.SOLID) if interface == "fluid-side" else (lambda t: t != CellTag.FLUID)
        np.testing.assert_array_equal(nxt.fresh, np.flatnonzero(member(before) & ~member(full)))
        np.testing.assert_array_equal(nxt.covered, np.flatnonzero(member(full) & ~member(before)))
        tr = nxt
    with pytest.raises(InputError, match="another grid or interface option"):
        step_tags(tr, poses[0], Grid(lower=(-1, -1, -1), upper=(1, 1, 1), spacing=1 / 16), interface=interface)


def test_step_of_a_body_through_a_grid_face():
    # Rows that leave the body only past the grid's end. Oracle: full tagging.
    grid = Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=1 / 20)
    a = box_mesh((0.23, 0.31, 0.17), (1.4, 0.72, 0.58))
    b = box_mesh((0.05, 0.33, 0.2), (1.3, 0.75, 0.6))
    tr = step_tags(classify(a, grid), b, grid, previous_surface=a)
    np.testing.assert_array_equal(tr.tags, classify(b, grid))
    assert tr.covered.size > 0 and tr.fresh.size > 0


def test_step_2d_and_leaving_the_grid():
    grid = Grid(lower=(0, 0), upper=(1, 1), spacing=1 / 64)
    sq = np.array([[0.2, 0.2], [0.4, 0.2], [0.4, 0.45], [0.2, 0.45]])
    t0 = classify(sq, grid)
    tr = step_tags(t0, sq + [0.05, 0.01], grid, previous_surface=sq)
    assert isinstance(tr, Transition)
    np.testing.assert_array_equal(tr.tags, classify(sq + [0.05, 0.01], grid))
    with pytest.warns(IbprepWarning, match="wholly outside"):
        gone = step_tags(t0, sq + [2.0, 0.0], grid, previous_surface=sq)
    assert gone.body_outside and not gone.tags.any()
    np.testing.assert_array_equal(gone.fresh, np.flatnonzero(_solid(t0)))


# ---------------------------------------------------------------------------- bad input
def test_bad_interface_option_lists_the_choices():
    grid = Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=0.5)
    with pytest.raises(InputError, match=r"interface must be one of \('fluid-side', 'solid-side'\)"):
        classify(box_mesh((0, 0, 0), (1, 1, 1)), grid, interface="both")
    with pytest.raises(InputError, match="interface must be one of"):
        step_tags(np.zeros(grid.shape, np.uint8), box_mesh((0, 0, 0), (1, 1, 1)), grid,
                  previous_surface=box_mesh((0, 0, 0), (1, 1, 1)), interface="inside")


def test_bad_surfaces_raise_input_error():
    grid = Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=0.5)
    v, f = box_mesh((0, 0, 0), (1, 1, 1))
    bad = v.copy()
    bad[3, 1] = np.nan
    with pytest.raises(InputError, match="NaN or infinite"):
        classify((bad, f), grid)
    with pytest.raises(InputError, match="no faces"):
        classify((v, np.empty((0, 3), np.int64)), grid)
    with pytest.raises(InputError, match="must be an ibprep.Grid"):
        classify((v, f), "grid")
    with pytest.raises(InputError, match=r"got the path 'body.stl'; pass ibprep.load_surface\(path\)"):
        classify("body.stl", grid)
    with pytest.raises(InputError, match="previous_tags must be a uint8 array"):
        step_tags(np.zeros((3, 3, 3), np.uint8), (v, f), grid, previous_surface=(v, f))


def test_degenerate_grids_never_reach_classify():
    with pytest.raises(InputError, match="spacing must be a positive"):
        Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=0.0)
    with pytest.raises(InputError, match="must exceed lower"):
        Grid(lower=(0, 0, 0), upper=(0, 1, 1), spacing=0.1)


# ---------------------------------------------------------------------------- exact rational reference
def _exact_solid(v, f, grid):
    """Solid centres by the documented rule in exact rational arithmetic (fractions.Fraction), written apart
    from the library: a centre c is classified as c + (-d, +e, +e**2), d >> e infinitesimal. A row (y, z)
    moved by (+e, +e**2) is inside a triangle's projection when it is on the same side of its three edges,
    an exact zero of an edge function being broken by -sign(dz), or sign(dy) for an edge along y
    (Edelsbrunner & Mücke 1990, simulation of simplicity); the crossing counts for c when it lies strictly
    before c along x (the -d), entering (+1) where the outward normal points to -x, else leaving (-1).
    """
    from bisect import bisect_right
    from fractions import Fraction as F

    xs, ys, zs = grid.axes()
    fx = [F(x) for x in xs.tolist()]
    solid = np.zeros(grid.shape, bool)
    tri = np.asarray(v, float)[np.asarray(f)]

    def side(ay, az, by, bz, py, pz):
        d = (by - ay) * (pz - az) - (bz - az) * (py - ay)
        if d != 0:
            return 1 if d > 0 else -1
        dz, dy = bz - az, by - ay
        return (-1 if dz > 0 else 1) if dz != 0 else (1 if dy >= 0 else -1)

    lo, hi = tri.min(axis=1), tri.max(axis=1)
    for j, y in enumerate(ys.tolist()):
        for k, z in enumerate(zs.tolist()):
            cand = np.flatnonzero((lo[:, 1] <= y) & (hi[:, 1] >= y) & (lo[:, 2] <= z) & (hi[:, 2] >= z))
            if cand.size == 0:
                continue
            wind = np.zeros(len(xs) + 1, np.int64)
            py, pz = F(y), F(z)
            for t in cand:
                (x0, y0, z0), (x1, y1, z1), (x2, y2, z2) = ([F(c) for c in p] for p in tri[t].tolist())
                nx = (y1 - y0) * (z2 - z0) - (z1 - z0) * (y2 - y0)
                if nx == 0:
                    continue  # zero projected area: never crossed by a moved row
                s = [side(y0, z0, y1, z1, py, pz), side(y1, z1, y2, z2, py, pz), side(y2, z2, y0, z0, py, pz)]
                if not (s[0] == s[1] == s[2]):
                    continue
                ny = (z1 - z0) * (x2 - x0) - (x1 - x0) * (z2 - z0)
                nz = (x1 - x0) * (y2 - y0) - (y1 - y0) * (x2 - x0)
                xc = x0 - (ny * (py - y0) + nz * (pz - z0)) / nx
                wind[bisect_right(fx, xc)] += -1 if nx > 0 else 1
            solid[:, j, k] = np.cumsum(wind)[:-1] != 0
    return solid


@pytest.mark.parametrize("shape", ["sphere", "torus"])
def test_vertices_snapped_onto_centres_follow_the_rule_exactly(shape):
    # Every vertex moved onto a cell centre: centres lie exactly on vertices and edges of tilted triangles,
    # where the crossing abscissa must be compared exactly, not after rounding. Oracle: the rule evaluated
    # in exact rational arithmetic (_exact_solid above) [computed]; every centre must agree.
    # Centres at coordinates that are not dyadic (spacing 0.07, corner -1.013), so the plane's
    # arithmetic rounds; each vertex becomes the nearest centre itself (the same float).
    h = 0.07
    grid = Grid(lower=(-1.013,) * 3, upper=(-1.013 + 29 * h,) * 3, spacing=h)
    v, f = sphere_mesh(0.8, 3) if shape == "sphere" else torus_mesh(0.6, 0.3, 36, 18)
    axes = grid.axes()
    idx = [np.clip(np.round((v[:, a] - grid.lower[a]) / h - 0.5).astype(int), 0, grid.shape[a] - 1) for a in range(3)]
    v = np.column_stack([axes[a][idx[a]] for a in range(3)])
    tags = classify((v, f), grid)
    ref = _exact_solid(v, f, grid)
    assert ref.sum() > 500
    differ = np.argwhere(_solid(tags) != ref)
    assert differ.size == 0, f"{len(differ)} centres differ from the exact rule, e.g. {differ[:5].tolist()}"
