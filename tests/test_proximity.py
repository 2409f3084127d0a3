"""Tests for ibprep.stencils.proximity: closest points, pseudo-normals, segment crossings."""

import igl
import numpy as np
import pytest
import trimesh

from ibprep import InputError
from ibprep.stencils.proximity import TriangleIndex, closest_point_on_triangles, segments_cross_triangles

# Distances agree with the reference to this (metres, bodies of size ~1): round-off only.
DIST_TOL = 1e-12


def _reference_distance(v, f, p):
    """Exact point-to-surface distances from libigl (igl.point_mesh_squared_distance, an AABB tree).

    Not trimesh.proximity.closest_point: on the slender triangles of a generated wing
    trimesh 5.2 returned distances too large by up to 1.8e-4 m for most points tried
    (checked against a brute-force minimum over every triangle).
    """
    d2, _, _ = igl.point_mesh_squared_distance(np.asarray(p, dtype=float), np.asarray(v, dtype=float),
                                               np.asarray(f, dtype=np.int64))
    return np.sqrt(d2)


def _annulus():
    # Non-convex, watertight: an annulus (thick ring) has concave inner walls.
    m = trimesh.creation.annulus(r_min=0.4, r_max=1.0, height=0.6, sections=24)
    assert m.is_watertight
    return m


def test_closest_point_matches_libigl():
    # Reference library: libigl igl.point_mesh_squared_distance (distances).
    m = _annulus()
    rng = np.random.default_rng(1)
    p = rng.uniform(-1.3, 1.3, (600, 3))
    idx = TriangleIndex(m.vertices, m.faces, bucket_size=0.15)
    cp = idx.closest(p)
    d_ref = _reference_distance(m.vertices, m.faces, p)
    assert cp.exact.all()
    np.testing.assert_allclose(cp.distance, d_ref, atol=DIST_TOL)
    np.testing.assert_allclose(np.linalg.norm(cp.point - p, axis=1), d_ref, atol=DIST_TOL)


def test_pseudo_normal_sign_matches_winding_number():
    # Bærentzen & Aanæs (2005): (p - closest) . pseudo-normal > 0 exactly outside, also when
    # the closest point is on an edge or a vertex. Reference: libigl igl.winding_number.
    m = _annulus()
    rng = np.random.default_rng(2)
    near_vertices = np.repeat(m.vertices, 4, axis=0) + rng.normal(scale=0.02, size=(4 * len(m.vertices), 3))
    edges = m.vertices[m.edges_unique].mean(axis=1)
    near_edges = edges + rng.normal(scale=0.02, size=edges.shape)
    p = np.vstack([near_vertices, near_edges])
    cp = TriangleIndex(m.vertices, m.faces, bucket_size=0.15).closest(p)
    side = np.einsum("ij,ij->i", p - cp.point, cp.normal)
    wn = igl.winding_number(m.vertices, m.faces.astype(np.int64), p)
    keep = np.abs(side) > 1e-12
    assert keep.mean() > 0.99
    np.testing.assert_array_equal(side[keep] > 0, wn[keep] < 0.5)
    np.testing.assert_allclose(np.linalg.norm(cp.normal, axis=1), 1.0, atol=1e-12)


def test_inward_oriented_mesh_still_gives_outward_normals():
    m = trimesh.creation.icosphere(subdivisions=2)
    idx = TriangleIndex(m.vertices, m.faces[:, ::-1], bucket_size=0.3)
    cp = idx.closest(np.array([[2.0, 0.1, 0.2]]))
    assert cp.normal[0, 0] > 0.9


def test_lower_bound_mode_never_exceeds_true_distance():
    m = _annulus()
    rng = np.random.default_rng(3)
    p = rng.uniform(-2.5, 2.5, (400, 3))
    idx = TriangleIndex(m.vertices, m.faces, bucket_size=0.1)
    exact = idx.closest(p).distance
    lb = idx.closest(p, max_distance=0.25)
    assert np.all(lb.distance <= exact + DIST_TOL)
    np.testing.assert_allclose(lb.distance[lb.exact], exact[lb.exact], atol=DIST_TOL)
    assert np.all(lb.distance[~lb.exact] >= 0.25 - DIST_TOL)


def test_segments_cross_matches_parity_of_winding_numbers():
    # A segment between the two sides of a closed surface crosses it (odd count): reference
    # libigl igl.winding_number for the sides; same-side segments over a convex body never cross.
    m = trimesh.creation.icosphere(subdivisions=3)
    rng = np.random.default_rng(4)
    a = rng.uniform(-1.4, 1.4, (3000, 3))
    b = rng.uniform(-1.4, 1.4, (3000, 3))
    idx = TriangleIndex(m.vertices, m.faces, bucket_size=0.2)
    hit = idx.segments_cross(a, b)
    wa = igl.winding_number(m.vertices, m.faces.astype(np.int64), a) > 0.5
    wb = igl.winding_number(m.vertices, m.faces.astype(np.int64), b) > 0.5
    assert np.all(hit[wa != wb])
    # Both inside a convex body: no crossing.
    both_in = wa & wb
    assert both_in.sum() > 50 and not hit[both_in].any()


def test_long_triangles_are_indexed_in_pieces_without_changing_answers():
    # A plate of two huge triangles with small buckets: pieces must not change the
    # exact answers (reference: libigl igl.point_mesh_squared_distance).
    plate = trimesh.creation.box(bounds=[[0.0, -3, -3], [0.2, 3, 3]])
    idx = TriangleIndex(plate.vertices, plate.faces, bucket_size=0.25)
    assert idx.piece_parent.size > 10 * len(plate.faces)
    rng = np.random.default_rng(8)
    p = rng.uniform(-1.0, 1.0, (300, 3))
    cp = idx.closest(p)
    d_ref = _reference_distance(plate.vertices, plate.faces, p)
    np.testing.assert_allclose(cp.distance, d_ref, atol=DIST_TOL)
    assert set(np.unique(cp.face)) <= set(range(len(plate.faces)))
    hit = idx.segments_cross(p, p + [0.6, 0.0, 0.0])
    ref = (p[:, 0] < 0.0) & (p[:, 0] + 0.6 >= 0.0) | (p[:, 0] <= 0.2) & (p[:, 0] + 0.6 > 0.2)
    np.testing.assert_array_equal(hit, ref)


_TABLES = ("piece_parent", "piece_centre", "piece_radius", "piece_witness", "bucket_start", "bucket_count",
           "bucket_items", "centre_start", "centre_count", "centre_items")


@pytest.mark.parametrize("case", ["annulus", "plate", "clipped", "sliver", "inward"])
def test_compiled_index_tables_equal_the_numpy_construction(case, monkeypatch):
    # Reference: the numpy construction (proximity._index_tables_numpy and
    # _surface_tables_numpy); the compiled one must give the same pieces, witnesses,
    # buckets and face and edge normals bit for bit, and the vertex pseudo-normals to
    # round-off (math.acos and numpy's arccos may differ in the last bit).
    from ibprep.stencils import proximity

    region = {}
    if case == "annulus":
        m = _annulus()
        v, f, size = m.vertices, m.faces, 0.15
    elif case == "plate":
        m = trimesh.creation.box(bounds=[[0.0, -3, -3], [0.2, 3, 3]])
        v, f, size = m.vertices, m.faces, 0.25
    elif case == "clipped":  # a region cutting through the surface drops pieces outside it
        m = _annulus()
        v, f, size = m.vertices, m.faces, 0.1
        region = dict(region_lower=(-0.3, -2.0, -0.1), region_upper=(2.0, 0.35, 2.0))
    elif case == "inward":  # faces wound inward: the normals must be flipped outward
        m = _annulus()
        v, f, size = m.vertices, m.faces[:, ::-1], 0.15
    else:  # long thin slivers of a twisted strip, pieces along their length
        rng = np.random.default_rng(3)
        m = trimesh.creation.icosphere(subdivisions=1)
        v = m.vertices * [3.0, 0.05, 0.05] + rng.normal(scale=1e-3, size=m.vertices.shape)
        f, size = m.faces, 0.07
    built = {}
    for compiled in (True, False):
        monkeypatch.setattr(proximity, "_COMPILED_INDEX", compiled)
        built[compiled] = TriangleIndex(v, f, bucket_size=size, **region)
    assert built[True].piece_parent.size > len(f)  # some triangles are cut into pieces
    for name in _TABLES:
        got, ref = getattr(built[True], name), getattr(built[False], name)
        assert got.dtype == ref.dtype, name
        np.testing.assert_array_equal(got, ref, err_msg=name)
    # The centre lists are contiguous in flat bucket order (kernels._gather walks runs of buckets as one range).
    idx = built[True]
    np.testing.assert_array_equal(idx.centre_start[1:], idx.centre_start[:-1] + idx.centre_count[:-1])
    assert idx.centre_start[0] == 0 and idx.centre_start[-1] + idx.centre_count[-1] == idx.centre_items.size
    for name in ("tri", "face_normal", "edge_normal"):
        np.testing.assert_array_equal(getattr(built[True], name), getattr(built[False], name), err_msg=name)
    np.testing.assert_allclose(built[True].vertex_normal, built[False].vertex_normal, rtol=0, atol=1e-15)
    # Outside check: unit face normals as trimesh computes them (Trimesh.face_normals),
    # pointing outward (the annulus is closed; trimesh orders the faces as given).
    if case in ("annulus", "inward"):
        ref = trimesh.Trimesh(v, f, process=False).face_normals * (-1.0 if case == "inward" else 1.0)
        np.testing.assert_allclose(built[True].face_normal, ref, atol=1e-12)


def test_segment_through_thin_plate_detected():
    plate = trimesh.creation.box(bounds=[[0.49, -5, -5], [0.51, 5, 5]])
    idx = TriangleIndex(plate.vertices, plate.faces, bucket_size=0.5)
    hit = idx.segments_cross(np.array([[0.0, 0, 0], [0.0, 0, 0]]), np.array([[1.0, 0.3, 0.2], [0.45, 2, 2]]))
    assert hit.tolist() == [True, False]


def test_pairwise_kernels_simple_cases():
    a = np.array([[0.0, 0, 0]] * 3)
    b = np.array([[1.0, 0, 0]] * 3)
    c = np.array([[0.0, 1, 0]] * 3)
    p = np.array([[0.2, 0.2, 1.0], [-1.0, -1.0, 0.0], [1.0, 1.0, 0.0]])
    q, region = closest_point_on_triangles(p, a, b, c)
    np.testing.assert_allclose(q, [[0.2, 0.2, 0.0], [0, 0, 0], [0.5, 0.5, 0]], atol=1e-15)
    assert region.tolist() == [0, 1, 5]
    hit = segments_cross_triangles(p, p - [0, 0, 2.0], a, b, c)
    assert hit.tolist() == [True, False, False]


def test_bad_index_input():
    with pytest.raises(InputError, match="bucket_size must be a positive length"):
        TriangleIndex(np.eye(3), np.array([[0, 1, 2]]), bucket_size=0.0)
    with pytest.raises(InputError, match=r"needs \(n, 3\) vertices"):
        TriangleIndex(np.eye(3)[:, :2], np.array([[0, 1, 2]]), bucket_size=1.0)


def test_cheap_distance_lower_bound_is_a_lower_bound():
    m = _annulus()
    rng = np.random.default_rng(5)
    p = rng.uniform(-1.5, 1.5, (500, 3))
    idx = TriangleIndex(m.vertices, m.faces, bucket_size=0.15)
    exact = idx.closest(p).distance
    lb = idx.distance_lower_bound(p, 0.3)
    assert np.all(lb <= np.minimum(exact, 0.3) + DIST_TOL)
    assert np.all(lb >= 0.0)
    # Tight where the sphere bound is: far points come back at the cap.
    assert np.all(lb[exact > 0.3 + 2 * idx.piece_radius.max()] == 0.3)


def test_fan_crossing_agrees_with_plain_crossing():
    # Two implementations of the same predicate (Möller & Trumbore 1997) must agree.
    m = _annulus()
    rng = np.random.default_rng(6)
    o = rng.uniform(-1.2, 1.2, (200, 3))
    ends = o[:, None, :] + rng.uniform(-0.4, 0.4, (200, 7, 3))
    valid = rng.random((200, 7)) < 0.8
    idx = TriangleIndex(m.vertices, m.faces, bucket_size=0.15)
    fan = idx.segments_cross_fan(o, ends, valid, reach=0.7)
    plain = idx.segments_cross(np.repeat(o, 7, axis=0), ends.reshape(-1, 3)).reshape(200, 7) & valid
    np.testing.assert_array_equal(fan, plain)
    assert plain.sum() > 20


@pytest.mark.parametrize("bad", [-1, 10_000])
def test_face_indices_out_of_range_are_refused(bad):
    # The compiled surface kernels index without bounds checks: bad faces must be refused first.
    from ibprep.stencils.proximity import median_edge_length

    m = trimesh.creation.icosphere(subdivisions=1)
    f = m.faces.copy()
    f[3, 1] = bad
    with pytest.raises(InputError, match="face vertex indices"):
        TriangleIndex(m.vertices, f, bucket_size=0.3)
    with pytest.raises(InputError, match="face vertex indices"):
        median_edge_length(m.vertices, f)


def test_surface_tables_at_a_vertex_of_high_degree(monkeypatch):
    # A closed double cone whose two apexes each touch 3000 faces (fan caps of a fine
    # cylinder look alike). Reference: the numpy construction (_surface_tables_numpy);
    # the edge grouping must stay exact (and linear: it is a pair of counting sorts).
    from ibprep.stencils import proximity

    n = 3000
    a = np.linspace(0, 2 * np.pi, n, endpoint=False)
    ring = np.column_stack([np.cos(a), np.sin(a), np.zeros(n)])
    v = np.vstack([ring, [[0, 0, 1.0], [0, 0, -1.0]]])
    k = np.arange(n)
    f = np.vstack([np.column_stack([k, (k + 1) % n, np.full(n, n)]),
                   np.column_stack([(k + 1) % n, k, np.full(n, n + 1)])])
    got = proximity._surface_tables_compiled(v, f.astype(np.int64), True)
    ref = proximity._surface_tables_numpy(v, f.astype(np.int64), True)
    for name, g, r in zip(("tri", "fn", "en", "vn", "lo", "hi"), got, ref):
        np.testing.assert_allclose(g, r, rtol=0, atol=1e-12, err_msg=name)
    np.testing.assert_allclose(got[3][n], [0, 0, 1.0], atol=1e-12)  # the apex's pseudo-normal points up


def test_closest_point_on_a_generated_tapered_wing_matches_libigl():
    # The slender triangles of make_wing (a tapered NACA 0012 fin, 40 mm root chord), where
    # trimesh 5.2's closest point errs for most of these points. References: libigl
    # igl.point_mesh_squared_distance, and for ten random points a brute-force minimum
    # over every triangle.
    from ibprep import make_wing, naca4

    m = make_wing(naca4("0012"), chord=0.04, span=0.1, taper=0.6, tips="flat")
    v, f = np.asarray(m.vertices), np.asarray(m.faces)
    rng = np.random.default_rng(0)
    p = v[rng.integers(0, len(v), 2000)] + rng.normal(scale=3e-4, size=(2000, 3))
    cp = TriangleIndex(v, f, bucket_size=0.002).closest(p)
    d_ref = _reference_distance(v, f, p)
    np.testing.assert_allclose(cp.distance, d_ref, atol=DIST_TOL * 0.04)
    tri = v[f]
    for j in rng.choice(len(p), 10, replace=False):
        q, _ = closest_point_on_triangles(np.repeat(p[j][None], len(f), 0), tri[:, 0], tri[:, 1], tri[:, 2])
        assert cp.distance[j] == pytest.approx(np.linalg.norm(q - p[j], axis=1).min(), abs=DIST_TOL * 0.04)
