"""Surface validation and derived geometry, checked against closed forms."""
import numpy as np
import pytest
from scipy.special import ellipeinc, ellipkinc

import surfacekit as sk


def ellipsoid_area(a, b, c):
    """Legendre's form with incomplete elliptic integrals, a >= b >= c (DLMF §19.33.2)."""
    phi = np.arccos(c / a)
    k2 = a**2 * (b**2 - c**2) / (b**2 * (a**2 - c**2))
    F, E = ellipkinc(phi, k2), ellipeinc(phi, k2)
    return 2 * np.pi * c**2 + 2 * np.pi * a * b / np.sin(phi) * (E * np.sin(phi) ** 2 + F * np.cos(phi) ** 2)


def test_ellipsoid_volume_and_area_against_closed_forms():
    # volume 4/3 π a b c (any calculus handbook); area: DLMF §19.33.2. A 40k-vertex
    # inscribed polyhedron under-estimates both by O(h²): about 1e-4 relative here.
    s = sk.synthetic.ellipsoid((3.0, 2.0, 1.0), n=40000)
    assert s.volume == pytest.approx(4 / 3 * np.pi * 6.0, rel=2e-3)
    assert s.area == pytest.approx(ellipsoid_area(3.0, 2.0, 1.0), rel=2e-3)
    assert s.signed_volume > 0  # outward faces


def test_topology_of_sphere_and_open_patch(sphere10k):
    assert sphere10k.euler_characteristic == 2 and sphere10k.genus == 0
    assert sphere10k.is_closed and sphere10k.n_components == 1
    assert sphere10k.boundary_loops == []
    # cut a cap off: one boundary loop, volume undefined
    keep = sphere10k.vertices[sphere10k.faces].mean(axis=1)[:, 2] < 0.5
    cap = sk.Surface(sphere10k.vertices, sphere10k.faces[keep])
    assert len(cap.boundary_loops) == 1 and not cap.is_closed
    assert np.isnan(cap.volume)
    assert cap.genus == 0


def test_torus_genus_one():
    import trimesh

    t = trimesh.creation.torus(major_radius=2.0, minor_radius=0.5)
    s = sk.Surface.from_trimesh(t)
    assert s.euler_characteristic == 0 and s.genus == 1


def test_gauss_bonnet_total_angle_defect(ellipsoid_mesh):
    # Gauss–Bonnet (do Carmo 1976): Σ (2π - Σ angles) = 2π χ = 4π for a sphere-like surface.
    s = ellipsoid_mesh
    angle_sum = np.bincount(s.faces.ravel(), weights=s.face_angles.ravel(), minlength=s.n_vertices)
    assert np.sum(2 * np.pi - angle_sum) == pytest.approx(4 * np.pi, rel=1e-9)


def test_vertex_areas_sum_to_area(ellipsoid_mesh):
    s = ellipsoid_mesh
    assert s.vertex_areas.sum() == pytest.approx(s.area, rel=1e-12)
    # mixed Voronoi areas (Meyer et al. 2003) also tile the surface exactly
    assert s.voronoi_areas.sum() == pytest.approx(s.area, rel=1e-12)
    assert np.all(s.voronoi_areas > 0)


def test_arrays_are_read_only(sphere10k):
    with pytest.raises(ValueError):
        sphere10k.vertices[0, 0] = 5.0
    with pytest.raises(ValueError):
        sphere10k.faces[0, 0] = 1


@pytest.mark.parametrize(
    "vertices, faces, words",
    [
        (np.zeros((3, 2)), [[0, 1, 2]], "shape (n, 3)"),
        (np.zeros((0, 3)), np.zeros((0, 3), int), "empty mesh"),
        (np.eye(3), np.zeros((0, 3), int), "no faces"),
        ([[0, 0, 0], [1, 0, 0], [np.nan, 1, 0]], [[0, 1, 2]], "NaN"),
        ([[0, 0, 0], [1, 0, 0], [np.inf, 1, 0]], [[0, 1, 2]], "infinite"),
        ([[0, 0, 0], [1, 0, 0], [1e300, 1, 0]], [[0, 1, 2]], "overflow"),
        (np.eye(3), [[0, 1, 3]], "out of range"),
        (np.eye(3), [[0, 1, -1]], "negative face index"),
        (np.eye(3), [[0, 1]], "triangles"),
        (np.eye(3), [[0, 1, 1.5]], "integers"),
        ([["a", "b", "c"]], [[0, 0, 0]], "not numeric"),
    ],
)
def test_bad_input_names_the_problem(vertices, faces, words):
    with pytest.raises(sk.SurfaceError, match=words.replace("(", r"\(").replace(")", r"\)")):
        sk.Surface(vertices, faces)
    assert issubclass(sk.SurfaceError, ValueError)


def test_from_trimesh_round_trip():
    import trimesh

    m = trimesh.creation.box()
    s = sk.Surface.from_trimesh(m)
    back = s.to_trimesh()
    assert np.array_equal(back.faces, m.faces) and np.allclose(back.vertices, m.vertices)
    assert s.volume == pytest.approx(1.0)
