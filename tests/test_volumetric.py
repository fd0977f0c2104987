"""Surfaces that cannot be repaired in place, rebuilt through an inside/outside grid
(surfacekit.preparation.volumetric), the choice of part to keep, and part counting.

Grids are small (spacing 0.4-0.5 mm over about 40 mm); each test runs in a few seconds."""
import numpy as np
import pytest

import surfacekit as sk
from surfacekit.mesh.surface import SurfaceError
from surfacekit.preparation import repair, volumetric


def _cap(r, h):
    """Volume of a spherical cap of height h on a ball of radius r: V = π h² (3r − h) / 3
    (Zwillinger, CRC Standard Mathematical Tables and Formulae, 31st ed., §4.7, spherical
    cap; from memory)."""
    return np.pi * h * h * (3.0 * r - h) / 3.0


def _union_of_balls(r1, r2, d):
    """Union of two overlapping balls: V1 + V2 − lens, the lens being two caps whose
    heights follow from the plane of the intersection circle at x = (d² + r1² − r2²) / 2d."""
    x = (d * d + r1 * r1 - r2 * r2) / (2.0 * d)
    lens = _cap(r1, r1 - x) + _cap(r2, r2 - (d - x))
    return 4.0 / 3.0 * np.pi * (r1 ** 3 + r2 ** 3) - lens


def _two_spheres():
    """Two separate closed meshes in one surface: radii 10 and 8 mm, centres 12 mm apart."""
    a = sk.synthetic.icosphere(4, radius=10.0)
    b = sk.synthetic.icosphere(4, radius=8.0)
    v = np.vstack([a.vertices, b.vertices + [12.0, 0.0, 0.0]])
    return sk.Surface(v, np.vstack([a.faces, b.faces + len(a.vertices)]))


def _moebius_capped_sphere(radius=10.0, n_around=96, n_rings=48, rim_ring=8):
    """A sphere (UV grid) whose north cap is cut off at ring ``rim_ring`` and replaced by a
    Möbius band spanning the rim: a closed, edge-manifold, self-intersecting surface with
    Euler characteristic 1 (a projective plane, so no consistent orientation exists).

    The band joins rim vertex i to the opposite rim vertex i + n/2 and its last row
    reconnects with top and bottom swapped (the half twist); all its triangles lie in the
    plane of the rim, so the solid is the ball truncated by that plane."""
    th = np.pi * np.arange(1, n_rings) / n_rings
    ph = 2 * np.pi * np.arange(n_around) / n_around
    rings = radius * np.stack([np.outer(np.sin(th), np.cos(ph)), np.outer(np.sin(th), np.sin(ph)),
                               np.outer(np.cos(th), np.ones_like(ph))], -1)
    idx = np.arange((n_rings - 1) * n_around).reshape(n_rings - 1, n_around)
    v = np.vstack([rings.reshape(-1, 3), [[0.0, 0.0, -radius]]])
    faces = []
    for j in range(rim_ring, n_rings - 2):
        a, b = idx[j], idx[j + 1]
        faces += [np.stack([a, b, np.roll(b, -1)], 1), np.stack([a, np.roll(b, -1), np.roll(a, -1)], 1)]
    last = idx[-1]
    faces.append(np.stack([last, np.full(n_around, len(v) - 1), np.roll(last, -1)], 1))
    half = n_around // 2
    top, bot, i = idx[rim_ring][:half], idx[rim_ring][half:], np.arange(half - 1)
    faces += [np.stack([top[i], bot[i], top[i + 1]], 1), np.stack([top[i + 1], bot[i], bot[i + 1]], 1),
              [[top[-1], bot[-1], bot[0]], [bot[0], bot[-1], top[0]]]]
    v, f, _ = repair.compact(v, np.vstack(faces))
    height = radius - radius * np.cos(th[rim_ring])
    return sk.Surface(v, f), 4.0 / 3.0 * np.pi * radius ** 3 - _cap(radius, height)


def _cube(lo, size=1.0):
    """Closed outward cube, 12 triangles."""
    c = np.array([[x, y, z] for x in (0, 1) for y in (0, 1) for z in (0, 1)], float) * size + lo
    f = [[0, 1, 3], [0, 3, 2], [4, 6, 7], [4, 7, 5], [0, 4, 5], [0, 5, 1],
         [2, 3, 7], [2, 7, 6], [0, 2, 6], [0, 6, 4], [1, 5, 7], [1, 7, 3]]
    return c, np.array(f)


def _assert_closed_outward(out):
    q = sk.quality_report(out)
    assert q.is_watertight and q.is_consistently_oriented and q.is_outward
    assert q.n_components == 1 and q.n_non_manifold_edges == 0 and q.n_non_manifold_vertices == 0


def test_winding_numbers_count_overlap_twice():
    s = _two_spheres()
    w = volumetric.winding_numbers([[0, 0, 0], [9, 0, 0], [14, 0, 0], [30, 0, 0]], s.vertices, s.faces)
    assert np.allclose(w, [1, 2, 1, 0], atol=1e-9)


def test_overlapping_spheres_become_their_union():
    s = _two_spheres()
    pieces = sk.prepare(s, keep="all", volumetric=False)  # in place: two separate spheres
    assert len(pieces) == 2
    out, report = sk.prepare(s, voxel_mm=0.5)
    _assert_closed_outward(out)
    assert report.route == "rebuilt through a volume" and "cross each other" in report.route_reason
    assert report.voxel_mm == 0.5 and "0.5 mm grid" in report.actions[0]
    assert "winding number" in report.actions[0]
    union = _union_of_balls(10.0, 8.0, 12.0)
    assert abs(out.signed_volume / union - 1) < 0.03
    assert abs(out.signed_volume / report.reference_volume_mm3 - 1) < 0.03
    again, _ = sk.prepare(s, voxel_mm=0.5)
    assert np.array_equal(again.vertices, out.vertices)  # deterministic


def test_moebius_band_closing_a_sphere_is_rebuilt():
    s, truncated_ball = _moebius_capped_sphere()
    q = sk.quality_report(s)
    assert q.is_watertight and not q.is_consistently_oriented and q.euler_characteristic == 1
    with pytest.raises(SurfaceError, match="not orientable"):
        sk.prepare(s, volumetric=False)
    band = sk.Surface(s.vertices, s.faces[-96:])  # the Möbius band alone: open, no volume
    with pytest.raises(SurfaceError, match="not orientable.*encloses no volume"):
        sk.prepare(band)
    out, report = sk.prepare(s, voxel_mm=0.4)
    _assert_closed_outward(out)
    assert "not orientable" in report.route_reason and "parity vote" in report.actions[0]
    assert abs(out.signed_volume / truncated_ball - 1) < 0.03
    assert abs(report.reference_volume_mm3 / truncated_ball - 1) < 0.03


def test_everything_at_once_is_one_closed_surface():
    """Möbius-capped sphere overlapping a ball, which overlaps another ball: one solid.

    Independent reference: the union of the analytic solids (two balls and the ball
    truncated by the rim plane) integrated on a 0.2 mm grid of points."""
    mob, _ = _moebius_capped_sphere()
    a, b = sk.synthetic.icosphere(4, radius=8.0), sk.synthetic.icosphere(3, radius=6.0)
    parts = [(mob.vertices, mob.faces), (a.vertices + [14, 0, 0], a.faces),
             (b.vertices + [14, 10, 0], b.faces)]
    cube_v, cube_f = _cube(np.array([14.0, 10.0, 8.0]), 3.0)  # 2 mm away: dropped
    parts.append((cube_v, cube_f))
    offsets = np.cumsum([0] + [len(p[0]) for p in parts])
    s = sk.Surface(np.vstack([p[0] for p in parts]),
                   np.vstack([p[1] + o for p, o in zip(parts, offsets)]))
    out, report = sk.prepare(s, voxel_mm=0.5)
    _assert_closed_outward(out)
    assert report.n_parts == 2 and "winding number and parity vote" in report.actions[0]
    g = np.mgrid[-10.5:22.5:0.2, -10.5:16.5:0.2, -10.5:10.5:0.2].reshape(3, -1).T + 0.1
    rim = 10.0 * np.cos(np.pi * 9 / 48)
    inside = ((np.linalg.norm(g, axis=1) < 10) & (g[:, 2] < rim)) \
        | (np.linalg.norm(g - [14, 0, 0], axis=1) < 8) | (np.linalg.norm(g - [14, 10, 0], axis=1) < 6)
    reference = inside.sum() * 0.2 ** 3
    assert abs(out.signed_volume / reference - 1) < 0.03


def test_pieces_joined_at_a_vertex_are_two_parts():
    va, fa = _cube(np.zeros(3))
    vb, fb = _cube(np.ones(3))  # its corner (1, 1, 1) is cube a's corner
    s = sk.Surface(np.vstack([va, vb]), np.vstack([fa, fb + 8]))
    s = sk.Surface(*repair.compact(*repair.merge_duplicate_vertices(s.vertices, s.faces)[:2])[:2])
    q = sk.quality_report(s)
    assert q.n_components == 2 and q.n_non_manifold_vertices == 1
    assert "pieces touching only at a vertex" in q.warnings[0]
    both = sk.prepare(s, keep="all")
    assert len(both) == 2 and all(r.n_parts == 2 for _, r in both)
    assert [abs(o.signed_volume) for o, _ in both] == pytest.approx([1.0, 1.0])
    second, report = sk.prepare(s, keep=1)
    assert report.part_index == 1 and second.vertices.min(axis=0) == pytest.approx([1, 1, 1])
    with pytest.raises(ValueError, match="2 parts"):
        sk.prepare(s, keep=2)
    with pytest.raises(ValueError, match="keep must be"):
        sk.prepare(s, keep="biggest")


def test_grid_spacing_is_capped_and_validated():
    big = sk.synthetic.icosphere(3, radius=1000.0)
    h = volumetric.choose_spacing(big.vertices, big.faces, voxel_mm=0.1)
    assert np.prod(np.ceil(2000.0 / h) + 5) <= volumetric.MAX_CELLS and h > 0.1
    small = sk.synthetic.icosphere(3, radius=10.0)
    assert volumetric.choose_spacing(small.vertices, small.faces) == pytest.approx(20.0 / 64, rel=0.01)
    with pytest.raises(ValueError, match="voxel_mm"):
        volumetric.choose_spacing(small.vertices, small.faces, voxel_mm=-1)
