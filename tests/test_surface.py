"""Surfaces: checks, loading bad files, atomic saving, markers, local thickness."""

import math
import warnings

import numpy as np
import pytest
import trimesh

from ibprep.errors import IbprepWarning, InputError
from ibprep.geometry import surface as surface_mod
from ibprep.geometry.naca import naca4
from ibprep.geometry.surface import (
    check_surface,
    load_surface,
    local_thickness,
    mesh_from_arrays,
    save_surface,
    surface_markers,
    thin_regions,
    weld_vertices,
)
from ibprep.geometry.wing import make_wing

FLOAT32_REL = 2e-7  # STL stores float32 coordinates: relative rounding 6e-8 per coordinate
ROUNDOFF_REL = 1e-12  # double-precision sums over ~1e4 terms


def _box(extents=(1.0, 1.0, 1.0), centre=(0.0, 0.0, 0.0)):
    m = trimesh.creation.box(extents=extents)
    return mesh_from_arrays(m.vertices + np.asarray(centre), m.faces)


def _sphere(radius=1.0, subdivisions=3):
    m = trimesh.creation.icosphere(subdivisions=subdivisions, radius=radius)
    return mesh_from_arrays(m.vertices, m.faces)


def _write_stl(path, vertices, faces, ascii=True):
    mesh = trimesh.Trimesh(vertices=vertices, faces=faces, process=False, validate=False)
    data = trimesh.exchange.stl.export_stl_ascii(mesh) if ascii else trimesh.exchange.stl.export_stl(mesh)
    with open(path, "w" if ascii else "wb") as fh:
        fh.write(data)
    return path


# -- check_surface -------------------------------------------------------------------------
def test_report_for_a_good_box():
    # Unit cube: volume 1, area 6 (elementary geometry; common practice, no single source).
    rep = check_surface(_box())
    assert rep.ok and rep.closed and rep.oriented and rep.outward
    assert rep.n_bodies == 1 and rep.n_faces == 12
    assert rep.volume == pytest.approx(1.0, rel=ROUNDOFF_REL)
    assert rep.area == pytest.approx(6.0, rel=ROUNDOFF_REL)
    assert rep.open_edge_location is None and rep.degenerate_location is None


def test_report_counts_the_problems_and_says_where():
    box = _box()
    f = box.faces
    # drop a face: 3 open edges, located on that face
    rep = check_surface((box.vertices, f[1:]))
    assert not rep.closed and rep.open_edges == 3
    tri = box.vertices[f[0]]
    assert np.min(np.linalg.norm(tri - np.array(rep.open_edge_location), axis=1)) <= 0.5 * math.sqrt(2) + 1e-12
    # reverse one face: its three edges are traversed the same way twice
    bad = f.copy()
    bad[0] = bad[0, ::-1]
    rep = check_surface((box.vertices, bad))
    assert rep.closed and not rep.oriented and rep.misoriented_edges == 3
    # reverse all faces: oriented but inside out
    rep = check_surface((box.vertices, f[:, ::-1]))
    assert rep.oriented and not rep.outward and rep.volume == pytest.approx(-1.0)
    # extra face on an existing edge: non-manifold
    v = np.vstack([box.vertices, [[5.0, 5.0, 5.0]]])
    extra = np.array([[f[0, 0], f[0, 1], len(v) - 1]])
    rep = check_surface((v, np.vstack([f, extra])))
    assert rep.nonmanifold_edges >= 1 and not rep.closed
    # a zero-area face
    v = np.vstack([box.vertices, [[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [2.0, 0.0, 0.0]]])
    rep = check_surface((v, np.vstack([f, [[8, 9, 10]]])))
    assert rep.degenerate_faces == 1 and rep.degenerate_location == pytest.approx((1.0, 0.0, 0.0))
    # non-finite vertex
    v = box.vertices.copy()
    v[0, 1] = np.nan
    rep = check_surface((v, f))
    assert rep.nonfinite_vertices == 1 and not rep.ok


def test_several_disjoint_bodies_are_allowed():
    two = trimesh.util.concatenate([_box(), _box(centre=(3.0, 0, 0))])
    rep = check_surface(two)
    assert rep.ok and rep.n_bodies == 2
    assert rep.body_volumes == pytest.approx((1.0, 1.0), rel=ROUNDOFF_REL)


def test_check_does_not_modify_the_mesh():
    box = _box()
    v0, f0 = box.vertices.copy(), box.faces.copy()
    check_surface(box)
    np.testing.assert_array_equal(box.vertices, v0)
    np.testing.assert_array_equal(box.faces, f0)


def test_volume_is_origin_independent():
    # Divergence-theorem volume of a closed outward surface does not depend on the origin
    # (REFERENCES §6.1, [memory: high]).
    w = make_wing("2412", 1.0, 2.0, tips="round", n_chord=16)
    far = mesh_from_arrays(w.vertices + [1e3, -2e3, 5e2], w.faces)
    assert check_surface(far).volume == pytest.approx(check_surface(w).volume, rel=1e-9)


# -- loading -------------------------------------------------------------------------------
@pytest.mark.parametrize("ascii", [False, True])
def test_stl_round_trip_keeps_volume(tmp_path, ascii):
    wing = make_wing("0015", 0.06, 0.18, tips="round")
    path = save_surface(wing, tmp_path / "wing.stl", ascii=ascii)
    with open(path, "rb") as fh:
        head = fh.read(5)
    assert (head == b"solid") == ascii
    back = load_surface(path)
    assert len(back.vertices) == len(wing.vertices)  # welding restored the shared vertices
    assert len(back.faces) == len(wing.faces)
    assert back.volume == pytest.approx(wing.volume, rel=10 * FLOAT32_REL)
    assert check_surface(back).ok


@pytest.mark.parametrize("suffix", [".obj", ".ply", ".stl"])
def test_other_formats_and_scale(tmp_path, suffix):
    path = tmp_path / f"box{suffix}"
    trimesh.creation.box(extents=(10.0, 20.0, 30.0)).export(path)
    mesh = load_surface(path, scale=1e-3)  # file in mm
    assert mesh.volume == pytest.approx(6000e-9, rel=1e-6)


def test_inverted_file_is_flipped_and_said(tmp_path):
    s = _sphere()
    path = _write_stl(tmp_path / "inside_out.stl", s.vertices, s.faces[:, ::-1], ascii=False)
    with pytest.warns(IbprepWarning, match=r"inside_out\.stl.*1 of 1 bodies were inside out"):
        mesh = load_surface(path)
    assert mesh.volume > 0 and check_surface(mesh).ok
    assert mesh.volume == pytest.approx(s.volume, rel=10 * FLOAT32_REL)


def test_one_inverted_body_of_two(tmp_path):
    a, b = _box(), _box(centre=(3.0, 0, 0))
    v = np.vstack([a.vertices, b.vertices])
    f = np.vstack([a.faces, b.faces[:, ::-1] + len(a.vertices)])
    path = _write_stl(tmp_path / "pair.stl", v, f)
    with pytest.warns(IbprepWarning, match="1 of 2 bodies"):
        mesh = load_surface(path)
    assert check_surface(mesh).body_volumes == pytest.approx((1.0, 1.0), rel=10 * FLOAT32_REL)


def test_good_file_raises_no_warning(tmp_path):
    path = save_surface(_box(), tmp_path / "box.stl")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        load_surface(path)


def test_bad_files(tmp_path):
    box = _box()
    f = box.faces
    cases = []
    cases.append((_write_stl(tmp_path / "open.stl", box.vertices, f[1:]), r"open\.stl.* not closed: 3 open edges.*near \("))
    flipped = f.copy()
    flipped[0] = flipped[0, ::-1]
    cases.append((_write_stl(tmp_path / "twisted.stl", box.vertices, flipped), r"twisted\.stl.* not consistently oriented"))
    v = np.vstack([box.vertices, [[5.0, 5.0, 5.0]]])
    cases.append((_write_stl(tmp_path / "fin.stl", v, np.vstack([f, [[f[0, 0], f[0, 1], 8]]])), r"fin\.stl.*non-manifold"))
    v = np.vstack([box.vertices, [[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [2.0, 0.0, 0.0]]])
    cases.append((_write_stl(tmp_path / "flat.stl", v, np.vstack([f, [[8, 9, 10]]])), r"flat\.stl.* 1 degenerate"))
    nan_path = tmp_path / "nan.stl"
    nan_path.write_text(
        "solid x\nfacet normal 0 0 1\nouter loop\nvertex 0 0 0\nvertex nan 0 0\nvertex 0 1 0\n"
        "endloop\nendfacet\nendsolid x\n"
    )
    cases.append((nan_path, r"nan\.stl.* NaN or infinite"))
    empty = tmp_path / "empty.stl"
    empty.write_bytes(b"")
    cases.append((empty, r"empty\.stl.* is empty"))
    no_facets = tmp_path / "none.stl"
    no_facets.write_text("solid x\nendsolid x\n")
    cases.append((no_facets, r"none\.stl.* no triangles"))
    cases.append((tmp_path / "missing.stl", r"missing\.stl.* does not exist"))
    (tmp_path / "body.step").write_text("x")
    cases.append((tmp_path / "body.step", r"unknown extension '\.step'"))
    for path, match in cases:
        with pytest.raises(InputError, match=match):
            load_surface(path)


@pytest.mark.parametrize("scale", [0.0, -1.0, float("inf"), "big"])
def test_bad_scale(tmp_path, scale):
    path = save_surface(_box(), tmp_path / "box.stl")
    with pytest.raises(InputError, match="scale must be a positive"):
        load_surface(path, scale=scale)


def test_weld_merges_only_close_vertices():
    v = np.array([[0, 0, 0], [1e-9, 0, 0], [1, 0, 0], [0, 1, 0]], float)
    f = np.array([[0, 2, 3], [1, 3, 2]])
    v2, f2 = weld_vertices(v, f, 1e-6)
    assert len(v2) == 3 and f2.tolist() == [[0, 1, 2], [0, 2, 1]]
    v3, _ = weld_vertices(v, f, 1e-12)
    assert len(v3) == 4
    # bitwise duplicates (and -0.0 == 0.0) merge even with zero tolerance, order kept
    v4 = np.array([[1, 0, 0], [0, 0, 0], [1, 0, 0], [-0.0, 0, 0], [0, 1, 0]], float)
    f4 = np.array([[0, 1, 4], [2, 4, 3]])
    v5, f5 = weld_vertices(v4, f4, 0.0)
    np.testing.assert_array_equal(v5, [[1, 0, 0], [0, 0, 0], [0, 1, 0]])
    assert f5.tolist() == [[0, 1, 2], [0, 2, 1]]


# -- saving --------------------------------------------------------------------------------
def test_failed_save_keeps_the_existing_file(tmp_path, monkeypatch):
    path = tmp_path / "body.stl"
    save_surface(_box(), path)
    before = path.read_bytes()

    def broken(mesh, ascii):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(surface_mod, "_stl_payload", broken)
    with pytest.raises(OSError, match="disk full"):
        save_surface(_sphere(), path)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["body.stl"]  # no temporary file left


def test_save_replaces_and_rejects_bad_paths(tmp_path):
    path = tmp_path / "body.stl"
    save_surface(_box(), path)
    save_surface(_box(extents=(2, 2, 2)), path)
    assert load_surface(path).volume == pytest.approx(8.0, rel=10 * FLOAT32_REL)
    with pytest.raises(InputError, match="ending in .stl"):
        save_surface(_box(), tmp_path / "body.obj")
    with pytest.raises(InputError, match="does not exist"):
        save_surface(_box(), tmp_path / "nowhere" / "body.stl")


# -- markers -------------------------------------------------------------------------------
@pytest.mark.parametrize("spacing", [0.05, 0.2, 0.5])
def test_markers_on_a_sphere(spacing):
    # Sphere facts (REFERENCES §6.2 [memory: high]): normals radial; closed surface so
    # sum n dA = 0 (divergence theorem, common practice, no single source).
    R = 1.0
    s = _sphere(R, subdivisions=4)
    pts, nrm, area = surface_markers(s, spacing)
    # areas sum to the mesh area exactly (up to round-off)
    assert area.sum() == pytest.approx(s.area, rel=ROUNDOFF_REL)
    assert np.all(area > 0)
    np.testing.assert_allclose(np.linalg.norm(nrm, axis=1), 1.0, atol=1e-12)
    # outward normals on a sphere point along the position vector (1 - cos 5 deg)
    radial = pts / np.linalg.norm(pts, axis=1)[:, None]
    assert np.min(np.einsum("ij,ij->i", radial, nrm)) > math.cos(math.radians(5 + 60 * spacing))
    # points lie on the mesh (reference library: trimesh.proximity.closest_point) and so
    # within the polyhedron's sag of the sphere
    _, dist, _ = trimesh.proximity.closest_point(s, pts)
    assert dist.max() < 1e-12
    r = np.linalg.norm(pts, axis=1)
    assert np.all(r <= R + 1e-12) and np.all(r > R - 0.01)
    # about one marker per spacing^2 of area (within a factor of 3 either way)
    assert s.area / spacing**2 / 3 < len(pts) < 3 * s.area / spacing**2
    # closed surface: sum of n dA = 0 (divergence theorem), up to the patch averaging
    assert np.linalg.norm((area[:, None] * nrm).sum(axis=0)) < 0.01 * s.area


def test_markers_keep_thin_sides_apart():
    # A slab thinner than the spacing: each marker is on one side, normals exactly +-y.
    slab = _box(extents=(1.0, 0.01, 1.0))
    pts, nrm, area = surface_markers(slab, 0.1)
    big = np.abs(nrm[:, 1]) > 0.5
    np.testing.assert_allclose(np.abs(pts[big, 1]), 0.005, atol=1e-15)
    np.testing.assert_allclose(np.abs(nrm[big, 1]), 1.0, atol=1e-15)
    assert area.sum() == pytest.approx(slab.area, rel=ROUNDOFF_REL)


@pytest.mark.parametrize("spacing", [0.0, -1.0, float("nan"), "x"])
def test_markers_bad_spacing(spacing):
    with pytest.raises(InputError, match="marker spacing must be a positive length"):
        surface_markers(_box(), spacing)


# -- local thickness -----------------------------------------------------------------------
def test_thickness_of_a_sphere_is_its_diameter():
    # A chord through the centre of a sphere is a diameter, 2R (elementary geometry, REFERENCES
    # §6.2 sphere [memory: high]). The
    # icosphere is centrally symmetric with vertices on the sphere, so the antipodal vertex
    # is hit exactly.
    R = 0.7
    s = _sphere(R, subdivisions=2)
    normals = s.vertices / np.linalg.norm(s.vertices, axis=1)[:, None]
    thick = local_thickness(s, s.vertices, normals)
    np.testing.assert_allclose(thick, 2 * R, rtol=1e-9)


def test_thickness_of_a_slab_and_its_thin_regions():
    # A slab of thickness d: rays through the big faces travel exactly d (elementary geometry;
    # common practice, no single source).
    d = 0.02
    slab = _box(extents=(1.0, d, 0.5))
    pts, nrm, _ = surface_markers(slab, 0.05)
    thick = local_thickness(slab, pts, nrm)
    big = np.abs(nrm[:, 1]) > 0.5
    np.testing.assert_allclose(thick[big], d, rtol=1e-9)
    assert np.all(thick[~big] > 0.4)  # through the length or width
    flagged = thin_regions(slab, 2 * d, spacing=0.05)
    assert flagged.count == int(big.sum()) and flagged.min_thickness == pytest.approx(d, rel=1e-9)
    assert flagged.area == pytest.approx(2 * 1.0 * 0.5, rel=ROUNDOFF_REL)
    assert thin_regions(slab, 0.5 * d, spacing=0.05).count == 0


@pytest.mark.parametrize("code", ["0012", "4412"])
def test_a_sharp_trailing_edge_is_thin_only_as_its_taper(code):
    # A closed-TE NACA 4-digit wing at 64 cells per chord: the strip thinner than two cells along the
    # trailing edge is about 11 % of the area, and all of it is the wedge's taper, so none counts as a thin
    # part the grid may lose. The taper length follows the thickness equation of Jacobs, Ward & Pinkerton
    # (1933, NACA Report 460; Abbott & von Doenhoff 1959, Ch. 6) [memory: high]: full TE slope 0.28 for
    # 12 % thickness, so 2 h / 0.28 = 7 cells of chord, 0.11 c [computed].
    import ibprep

    h = 1.0 / 64
    wing = ibprep.make_wing(ibprep.naca4(code), 1.0, 2.0, tips="flat")
    thin = thin_regions(wing, 2 * h, spacing=h)
    assert 0.08 < thin.area / thin.examined_area < 0.14
    assert thin.edge_taper.all() and thin.other_area == 0.0


def test_a_thin_plate_is_thin_away_from_its_edges():
    # A plate 1.5 cells thick with a knife (wedge) edge along one side: the wedge's taper is expected,
    # the rest of the plate is not (elementary geometry; common practice, no single source).
    from ibprep.geometry.triangles import extrude_loops

    h = 1.0 / 64
    d = 1.5 * h
    loop = np.array([[0.0, 0.0], [0.05, -d / 2], [1.0, -d / 2], [1.0, d / 2], [0.05, d / 2]])
    plate = extrude_loops([loop], half_depth=1.0)
    thin = thin_regions(plate, 2 * h, spacing=h)
    assert thin.area / thin.examined_area > 0.9
    assert thin.other_area / thin.examined_area > 0.8
    assert thin.edge_taper.any()  # the wedge itself
    # No sharp edge at all (a square-edged plate): nothing is a taper.
    box = _box(extents=(1.0, d, 2.0))
    assert not thin_regions(box, 2 * h, spacing=h).edge_taper.any()


def test_thin_band_of_a_2d_prism_measures_the_section_perimeter():
    # A 2-D strip section L x t extruded deep along z: its long sides are t thick, its ends L
    # (elementary geometry; common practice, no single source). Examining a band of the walls
    # about z = 0 gives the thin fraction of the perimeter, 2L / (2L + 2t), and the exact
    # thickness; the deep caps never count.
    from ibprep.geometry.triangles import extrude_loops

    L, t, limit = 1.0, 0.02, 0.05
    strip = np.array([[0.0, -t / 2], [L, -t / 2], [L, t / 2], [0.0, t / 2]])
    prism = extrude_loops([strip], half_depth=2.0)
    band = thin_regions(prism, limit, spacing=0.025, planar_band=0.05)
    assert band.count > 0 and band.min_thickness == pytest.approx(t, rel=1e-9)
    np.testing.assert_allclose(band.thickness, t, rtol=1e-9)
    assert band.area / band.examined_area == pytest.approx(2 * L / (2 * L + 2 * t), rel=1e-6)
    assert np.all(np.abs(band.points[:, 2]) <= 0.05 + 1e-12)
    # the band is about a fortieth of the walls' depth: far fewer markers for the same answer
    whole = thin_regions(prism, limit, spacing=0.025)
    assert whole.count > 20 * band.count
    assert whole.area / whole.examined_area < band.area / band.examined_area  # diluted by the caps
    v, f = extrude_loops([strip], half_depth=0.1)
    with pytest.raises(InputError, match="does not reach the plane z = 0"):
        thin_regions((v + [0.0, 0.0, 5.0], f), limit, planar_band=0.05)
    with pytest.raises(InputError, match="planar_band must be a positive"):
        thin_regions(prism, limit, planar_band=0.0)


def test_wing_is_thin_only_near_the_trailing_edge():
    # NACA 0012 flat-ended wing: y_t < 0.01 c only aft of about x = 0.95 c (REFERENCES §1.7 [computed]:
    # 95 %c ordinate 0.807 %c) — near the nose the inward normal crosses the whole section.
    wing = make_wing(naca4("0012"), 1.0, 1.0, tips="flat", n_chord=32)
    thin = thin_regions(wing, 0.02, spacing=0.05)
    assert thin.count > 0
    assert np.all(thin.points[:, 0] > 0.85)
    # the ray crosses the section almost vertically: thickness ~ 2 y_t(x), equation of §1.1
    # (closed TE, [computed]); 15 % allows the ray tilt and the marker lying off the station.
    expected = 2 * naca4("0012").thickness(np.clip(thin.points[:, 0], 0, 1))
    np.testing.assert_allclose(thin.thickness, expected, rtol=0.15)


def test_thickness_bad_input():
    with pytest.raises(InputError, match=r"shape \(k, 3\)"):
        local_thickness(_box(), np.zeros((3, 3)), np.zeros((2, 3)))
    with pytest.raises(InputError, match="finite non-zero"):
        local_thickness(_box(), np.zeros((1, 3)), np.zeros((1, 3)))
    with pytest.raises(InputError, match="min_thickness must be a positive"):
        thin_regions(_box(), 0.0)


def test_thickness_agrees_with_trimesh_ray_casting():
    # Reference library: trimesh.ray.ray_triangle.RayMeshIntersector.intersects_location [computed]
    # (multiple hits, nearest beyond the start), on a cambered wing with rounded ends.
    from trimesh.ray.ray_triangle import RayMeshIntersector

    wing = make_wing("4412", 1.0, 1.5, tips="round", n_chord=20, taper=0.6, sweep=0.3, twist=-0.2)
    pts, nrm, _ = surface_markers(wing, 0.08)
    ours = local_thickness(wing, pts, nrm)
    loc, ray, tri = RayMeshIntersector(wing).intersects_location(pts, -nrm, multiple_hits=True)
    dist = np.einsum("ij,ij->i", loc - pts[ray], -nrm[ray])
    ref = np.full(len(pts), np.inf)
    # exits only: the hit face's outward normal points along the ray (see local_thickness)
    exits = np.einsum("ij,ij->i", wing.face_normals[tri], -nrm[ray]) > 0
    keep = exits & (dist > 1e-7 * np.linalg.norm(np.ptp(wing.vertices, axis=0)))
    np.minimum.at(ref, ray[keep], dist[keep])
    assert np.all(np.isfinite(ours))
    np.testing.assert_allclose(ours, ref, rtol=1e-9, atol=1e-12)


def test_points_slightly_off_the_surface_still_see_the_far_side():
    # A marker a hair outside its own face must not report that face as the opposite side:
    # only exits count. Slab of thickness d (elementary geometry; common practice, no single source).
    d = 0.02
    slab = _box(extents=(1.0, d, 0.5))
    pts = np.array([[0.1, 0.5 * d + 1e-6, 0.1], [0.1, 0.5 * d - 1e-6, 0.1]])
    nrm = np.array([[0, 1.0, 0], [0, 1.0, 0]])
    np.testing.assert_allclose(local_thickness(slab, pts, nrm), [d + 1e-6, d - 1e-6], rtol=1e-9)
    # capped search: beyond max_distance nothing is reported
    assert np.all(np.isinf(local_thickness(slab, pts, nrm, max_distance=0.5 * d)))


def test_demo_wing_thin_regions_are_at_the_trailing_edge_and_tips():
    # Demo wing of DESIGN.md §6 (NACA 0015, c 60 mm, span 180 mm, rounded tips) at a
    # 1.25 mm limit: thin only where 2 y_t c < 1.25 mm, i.e. aft of about 0.96 c
    # (equation of REFERENCES §1.1, [computed]), or within the rounded tips.
    wing = make_wing("0015", 0.06, 0.18, tips="round")
    thin = thin_regions(wing, 1.25e-3, spacing=1.25e-3)
    assert thin.count > 0 and thin.min_thickness > 1e-5  # no self hits
    lay = wing.metadata["wing"]
    in_tips = (thin.points[:, 2] < lay.z_root) | (thin.points[:, 2] > lay.z_tip)
    assert np.all((thin.points[:, 0] > 0.9 * 0.06) | in_tips)


def test_thickness_does_not_modify_inputs():
    s = _sphere(1.0, subdivisions=1)
    pts = s.vertices.copy()
    nrm = pts.copy()
    local_thickness(s, pts, nrm)
    np.testing.assert_array_equal(pts, s.vertices)
    np.testing.assert_array_equal(nrm, s.vertices)
