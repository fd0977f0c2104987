"""Tests for surfacekit.mesh.geodesics: heat-method distances, sampling, polar patches."""
import numpy as np
import pytest

import surfacekit as sk


@pytest.fixture(scope="session")
def sphere40k():
    """Unit icosphere, 40962 vertices (the one large mesh of this file)."""
    return sk.synthetic.icosphere(6)


def _great_circle(v, i):
    """Great-circle distance on the unit sphere: arccos(p·q) (analytic)."""
    return np.arccos(np.clip(v @ v[i], -1.0, 1.0))


def test_heat_distance_matches_great_circles_40k(sphere40k):
    """Source: great-circle distance r·arccos(p·q/r²) (great circles are the geodesics of the sphere; do Carmo 1976, §4-4); target <= 1% mean relative error."""
    s = sphere40k
    d = sk.geodesic_distance(s, 17)
    gc = _great_circle(s.vertices, 17)
    away = gc > 0.1  # away from the source, where the relative error is ill-conditioned
    rel = np.abs(d[away] - gc[away]) / gc[away]
    assert rel.mean() <= 0.01
    assert d[17] == 0.0


def test_multisource_is_minimum_of_single_sources():
    """Definition: distance to a set is the minimum over its members (heat method, Crane et al. 2013)."""
    s = sk.synthetic.icosphere(4)
    v = s.vertices
    src = [0, 100, 1500]
    d = sk.geodesic_distance(s, src)
    exact = np.min([_great_circle(v, i) for i in src], axis=0)
    far = exact > 0.15
    assert np.mean(np.abs(d[far] - exact[far]) / exact[far]) < 0.02
    assert np.all(d[src] == 0.0)


def test_solver_is_cached_and_reused():
    s = sk.synthetic.icosphere(3)
    sk.geodesic_distance(s, 0)
    solver = s.cache[("heat_solver", 1.0, True)]
    sk.geodesic_distance(s, 5)
    assert s.cache[("heat_solver", 1.0, True)] is solver
    assert sk.GeodesicSolver.for_surface(s) is solver


@pytest.mark.parametrize("bad", [[], [-1], [10**6], [0.5], "a"])
def test_bad_sources_raise_value_error(bad):
    s = sk.synthetic.icosphere(2)
    with pytest.raises(ValueError):
        sk.geodesic_distance(s, bad)


def test_heat_distance_matches_exact_polyhedral_geodesics_on_ellipsoid(ellipsoid_mesh):
    """Source: pygeodesic, exact polyhedral geodesics (Mitchell, Mount & Papadimitriou 1987),
    a test-only reference library.  Target <= 3% mean relative error (measured 1.5% and 0.8%)."""
    geodesic = pytest.importorskip("pygeodesic.geodesic")
    s = ellipsoid_mesh
    exact_solver = geodesic.PyGeodesicAlgorithmExact(s.vertices, s.faces)
    for source in (0, 1234):
        exact, _ = exact_solver.geodesicDistances(np.array([source]), None)
        d = sk.geodesic_distance(s, source)
        away = exact > 0.1 * exact.max()
        assert np.mean(np.abs(d[away] - exact[away]) / exact[away]) <= 0.03


def test_farthest_point_sampling_spreads_and_is_deterministic():
    """Greedy farthest-point property (Eldar et al. 1997): each new sample is the vertex
    farthest from the previous ones, so the covering radius shrinks monotonically."""
    s = sk.synthetic.icosphere(3)
    a = sk.farthest_point_sampling(s, 12, seed=4)
    assert np.array_equal(a, sk.farthest_point_sampling(s, 12, seed=4))
    assert len(np.unique(a)) == 12
    # the second sample of a unit sphere is (nearly) the antipode of the first: distance π
    assert sk.geodesic_distance(s, a[0])[a[1]] == pytest.approx(np.pi, rel=0.02)
    samples, nearest = sk.farthest_point_sampling(s, 12, seed=4, return_distances=True)
    assert np.all(nearest[samples] == 0)
    # greedy farthest-point is a 2-approximation of the optimal covering radius (Gonzalez,
    # Theoretical Computer Science 1985); the optimum for 12 points on the unit sphere is
    # the icosahedron's vertex-to-face-centre angle, 0.6524 rad (from memory)
    assert nearest.max() <= 2 * 0.6524
    # and the samples are at least the final covering radius apart (greedy property)
    D = sk.geodesic_distance_matrix(s, samples)
    assert D[~np.eye(12, dtype=bool)].min() >= 0.98 * nearest.max()
    with pytest.raises(ValueError):
        sk.farthest_point_sampling(s, 0)


def test_distance_matrix_is_symmetric_and_matches_great_circles():
    """Source: great-circle distances arccos(p·q) on the unit sphere (analytic)."""
    s = sk.synthetic.icosphere(4)
    idx = sk.farthest_point_sampling(s, 8, seed=1)
    D = sk.geodesic_distance_matrix(s, idx)
    p = s.vertices[idx]
    exact = np.arccos(np.clip(p @ p.T, -1, 1))
    assert np.allclose(D, D.T) and np.all(np.diag(D) == 0)
    off = ~np.eye(8, dtype=bool)
    assert np.mean(np.abs(D[off] - exact[off]) / exact[off]) < 0.02


def _flat_disk(n_rings=30):
    """Unit disk in the plane z = 0 from concentric rings, faces CCW seen from +z."""
    from scipy.spatial import Delaunay

    pts = [np.zeros((1, 2))]
    for k in range(1, n_rings + 1):
        a = np.arange(6 * k) * 2 * np.pi / (6 * k) + 0.1 * k
        pts.append(k / n_rings * np.c_[np.cos(a), np.sin(a)])
    p = np.concatenate(pts)
    tri = Delaunay(p).simplices
    e1, e2 = p[tri[:, 1]] - p[tri[:, 0]], p[tri[:, 2]] - p[tri[:, 0]]
    clockwise = e1[:, 0] * e2[:, 1] - e1[:, 1] * e2[:, 0] < 0
    tri[clockwise] = tri[clockwise][:, ::-1]
    return sk.Surface(np.c_[p, np.zeros(len(p))], tri)


def _rotation_residual(theta, theta_exact):
    """Largest angle deviation after removing the best constant rotation (radians)."""
    diff = np.angle(np.exp(1j * (theta - theta_exact)))
    offset = np.angle(np.mean(np.exp(1j * diff)))
    return np.abs(np.angle(np.exp(1j * (diff - offset)))).max()


def test_polar_coordinates_on_flat_disk_are_euclidean_polar():
    """Source: on a plane the log map is the identity, so geodesic polar = Euclidean polar
    coordinates (definition).  Targets: r within 2% of the radius, theta within 0.05 rad
    up to one constant rotation; counter-clockwise seen from +z (the face normals)."""
    s = _flat_disk()
    assert np.all(s.face_normals[:, 2] > 0)
    radius = 0.8
    for center in (0, 40):
        idx, r, theta = sk.geodesic_polar_coordinates(s, center, radius)
        rel = s.vertices[idx, :2] - s.vertices[center, :2]
        r_exact = np.hypot(rel[:, 0], rel[:, 1])
        assert np.abs(r - r_exact).max() <= 0.02 * radius
        keep = r_exact > 0.05
        assert _rotation_residual(theta[keep], np.arctan2(rel[keep, 1], rel[keep, 0])) <= 0.05
        if center == 0:
            inside = np.flatnonzero(np.hypot(*s.vertices[:, :2].T) <= radius * 0.98)
            assert np.isin(inside, idx).all()
    # the local (vectorised) polar coordinates used by patch descriptors are exact on a plane
    from surfacekit.mesh.patches import local_polar_coordinates

    _, nbr, r, theta = local_polar_coordinates(s, radius, [0])
    rel = s.vertices[nbr, :2]
    assert np.allclose(r, np.hypot(rel[:, 0], rel[:, 1]), atol=1e-12)
    keep = r > 0
    assert _rotation_residual(theta[keep], np.arctan2(rel[keep, 1], rel[keep, 0])) < 1e-9


def _ccw_sign_agreement(s, center, idx, theta):
    """Fraction of neighbour pairs whose angle order matches the right-hand rule about
    the outward normal: sign sin(θ_k - θ_j) = sign n·((p_j - c) × (p_k - c))."""
    c, n = s.vertices[center], s.vertex_normals[center]
    d = s.vertices[idx] - c
    j, k = np.triu_indices(len(idx), 1)
    geometric = np.einsum("ij,j->i", np.cross(d[j], d[k]), n)
    polar = np.sin(theta[k] - theta[j])
    clear = (np.abs(geometric) > 1e-3 * np.abs(geometric).max()) & (np.abs(polar) > 0.05)
    return np.mean(np.sign(geometric[clear]) == np.sign(polar[clear]))


def test_theta_is_counter_clockwise_about_the_outward_normal():
    """Right-hand rule on the face winding (the convention this library documents): on an outward sphere theta
    turns CCW about the outward normal; reversing the winding reverses it."""
    s = sk.synthetic.icosphere(4)
    idx, r, theta = sk.geodesic_polar_coordinates(s, 7, 0.4)
    assert _ccw_sign_agreement(s, 7, idx[r > 0], theta[r > 0]) > 0.99
    flipped = sk.Surface(s.vertices, s.faces[:, ::-1])
    idx2, r2, theta2 = sk.geodesic_polar_coordinates(flipped, 7, 0.4)
    assert _ccw_sign_agreement(flipped, 7, idx2[r2 > 0], theta2[r2 > 0]) > 0.99


def test_local_polar_coordinates_agree_with_vector_heat_log_map(ellipsoid_mesh):
    """Reference: the vector heat log map (Sharp, Soliman & Crane 2019, potpourri3d).
    Measured on a (3,2,1) ellipsoid with the default radius (0.56, about 0.6 of the smallest
    curvature radius there): r within 1.2% of the radius, theta within 0.061 rad (worst
    centre, where K = 1.23); at K <= 0.24 within 0.018 rad."""
    from surfacekit.mesh.patches import default_patch_radius, local_polar_coordinates

    s = ellipsoid_mesh
    radius = default_patch_radius(s)
    centers = [0, 1500, 3000, 4500]
    indptr, nbr, r, theta = local_polar_coordinates(s, radius, centers)
    for i, center in enumerate(centers):
        idx, r_ref, theta_ref = sk.geodesic_polar_coordinates(s, center, radius)
        sl = slice(indptr[i], indptr[i + 1])
        both, a, b = np.intersect1d(idx, nbr[sl], return_indices=True)
        assert len(both) >= 0.95 * max(len(idx), indptr[i + 1] - indptr[i])
        assert np.abs(r_ref[a] - r[sl][b]).max() <= 0.02 * radius
        far = r_ref[a] > 0.3 * radius
        assert _rotation_residual(theta[sl][b][far], theta_ref[a][far]) <= 0.08
        assert _ccw_sign_agreement(s, center, both[r[sl][b] > 0], theta[sl][b][r[sl][b] > 0]) > 0.99


def test_patch_descriptors_invariant_to_rigid_motion_and_zero_direction():
    """Definition: modulus of the angular Fourier transform is invariant to the zero direction
    (Kokkinos et al. 2012); a rigid motion changes every tangent frame's zero direction."""
    s = sk.synthetic.organ_surface("kidney", 1500, seed=2)[0]
    signal = np.c_[sk.mean_curvature(s), s.vertices[:, 2] - s.vertices[:, 2].mean()]
    R = sk.synthetic.random_rotation(5)
    moved = sk.Surface(s.vertices @ R.T + 3.0, s.faces)
    d1 = sk.patch_descriptors(s, signal)
    d2 = sk.patch_descriptors(moved, signal)
    assert d1.shape == (s.n_vertices, 2 * 4 * 3)
    assert np.abs(d1 - d2).max() <= 1e-6 * np.abs(d1).max()
    sub = sk.patch_descriptors(s, signal, centers=[5, 17])
    assert np.allclose(sub, d1[[5, 17]])


def test_patch_descriptor_of_linear_field_on_plane():
    """Analytic: for f = g·x on a plane, ring means at the disk centre are f(0) = 0 by symmetry,
    the first angular harmonic is proportional to |g| and the second vanishes (f has
    only the harmonic cos θ)."""
    s = _flat_disk()
    x = s.vertices[:, 0]
    d1 = sk.patch_descriptors(s, x, radius=0.5, centers=[0]).reshape(4, 3)
    d3 = sk.patch_descriptors(s, 3 * x, radius=0.5, centers=[0]).reshape(4, 3)
    assert np.abs(d1[:, 0]).max() < 1e-3
    assert np.allclose(d3[:, 1], 3 * d1[:, 1])
    assert np.all(d1[:, 1] > 0.01) and np.all(d1[:, 2] < 0.05 * d1[:, 1])
    with pytest.raises(ValueError):
        sk.patch_descriptors(s, x[:-1])
    # non-finite values (curvature on the disk's rim is NaN) are left out of the pooling:
    # a signal equal to 1 except NaN on the rim pools to exactly 1 near the rim
    near_rim = int(np.argmin(np.linalg.norm(s.vertices - [0.8, 0, 0], axis=1)))
    ones = np.where(np.isnan(sk.mean_curvature(s)), np.nan, 1.0)
    assert np.isnan(ones).sum() == 180  # the 6·30 rim vertices
    d = sk.patch_descriptors(s, np.c_[x, ones], radius=0.5, centers=[near_rim]).reshape(2, 4, 3)
    assert np.allclose(d[0], sk.patch_descriptors(s, x, radius=0.5, centers=[near_rim]).reshape(4, 3))
    assert np.allclose(d[1, :, 0], 1.0)


def test_other_components_are_unreachable():
    """Definition: no path joins two connected components, so the distance is infinite."""
    a = sk.synthetic.icosphere(2)
    s = sk.Surface(np.r_[a.vertices, a.vertices + 5], np.r_[a.faces, a.faces + a.n_vertices])
    d = sk.geodesic_distance(s, 0)
    assert np.all(np.isinf(d[a.n_vertices:])) and np.all(np.isfinite(d[: a.n_vertices]))
    samples = sk.farthest_point_sampling(s, 2, seed=0)
    assert len(set(s.vertex_components[samples])) == 2  # one sample per component
    idx, r, _ = sk.geodesic_polar_coordinates(s, 0, 10.0)
    assert idx.max() < a.n_vertices and r.max() < np.pi + 0.1


def test_vertices_of_no_face_are_skipped():
    """A vertex used by no face is unreachable (inf), never sampled, and not a valid source."""
    a = sk.synthetic.icosphere(2)
    s = sk.Surface(np.r_[[[5.0, 5.0, 5.0]], a.vertices], a.faces + 1)
    d = sk.geodesic_distance(s, 1)
    assert np.isinf(d[0]) and np.allclose(d[1:], sk.geodesic_distance(a, 0))
    assert 0 not in sk.farthest_point_sampling(s, 20, seed=3)
    with pytest.raises(ValueError, match="no face"):
        sk.geodesic_distance(s, 0)
