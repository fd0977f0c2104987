"""Rough edges of real meshes: vertices used by no face, patch radii below the edge
length, and resampling to a requested vertex count."""
from __future__ import annotations

import numpy as np
import pytest

import surfacekit as sk
from surfacekit.app import cli
from surfacekit.mesh.surface import SurfaceError


def _with_unused(n_extra: int = 3) -> sk.Surface:
    s = sk.synthetic.icosphere(3, radius=10.0)
    extra = 20.0 + np.arange(3 * n_extra, dtype=float).reshape(n_extra, 3)
    return sk.Surface(np.vstack([s.vertices, extra]), s.faces)


# ------------------------------------------------------------ unused vertices
@pytest.mark.parametrize("compute", [
    lambda s: sk.laplacian(s),
    lambda s: sk.eigenbasis(s, 10),
    lambda s: sk.heat_kernel_signature(s, k=10),
    lambda s: sk.laplace_spectrum(s, k=10),
], ids=["laplacian", "eigenbasis", "hks", "spectrum"])
def test_unused_vertices_named_with_the_fix(compute):
    with pytest.raises(SurfaceError, match=r"^3 vertices are used by no face; sk\.prepare"):
        compute(_with_unused(3))


def test_unused_vertices_singular_wording():
    with pytest.raises(SurfaceError, match=r"^1 vertex is used by no face"):
        sk.eigenbasis(_with_unused(1), 10)


def test_prepare_drops_unused_vertices_so_the_basis_works():
    prepared, _ = sk.prepare(_with_unused(3))
    assert prepared.n_unreferenced_vertices == 0
    assert sk.eigenbasis(prepared, 10).values[0] < 1e-8


def test_describe_command_one_line_error_no_output(tmp_path, capsys):
    sk.save(_with_unused(2), tmp_path / "u.ply")
    out = tmp_path / "d.npz"
    code = cli.main(["describe", str(tmp_path / "u.ply"), "-o", str(out), "-q"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and "2 vertices are used by no face" in err[0]
    assert "Traceback" not in err[0] and not out.exists()


# ------------------------------------------------- polar coordinates radius
def test_polar_radius_below_edge_length_raises():
    s = sk.synthetic.icosphere(3, radius=10.0)
    shortest = min(np.linalg.norm(s.vertices[e[0]] - s.vertices[e[1]])
                   for e in s.edges if 5 in e)
    with pytest.raises(ValueError, match=r"radius 0\.1 mm is below the local edge length at vertex 5"):
        sk.geodesic_polar_coordinates(s, 5, 0.1)
    with pytest.raises(ValueError, match="local edge length"):
        sk.geodesic_polar_coordinates(s, 5, 0.99 * shortest)
    # at the edge length the ring of nearest neighbours is in
    idx, _, _ = sk.geodesic_polar_coordinates(s, 5, 1.5 * shortest)
    assert len(idx) > 1 and 5 in idx


def test_polar_center_out_of_range_raises():
    s = sk.synthetic.icosphere(2)
    with pytest.raises(ValueError, match="not a vertex index"):
        sk.geodesic_polar_coordinates(s, s.n_vertices, 0.5)


# ------------------------------------------------------- vertex-count target
SHAPES = {
    "ellipsoid": lambda: sk.synthetic.ellipsoid((40.0, 25.0, 18.0), n=5000, seed=2, jitter=0.2),
    "kidney": lambda: sk.synthetic.organ_surface("kidney", n_vertices=2000, seed=1)[0],
}


@pytest.mark.parametrize("shape", sorted(SHAPES))
@pytest.mark.parametrize("target", [1000, 3000, 8000])
def test_prepare_hits_the_vertex_target_within_3_percent(shape, target):
    # 8000 from the 2000-vertex kidney needs a subdivision first, whose later short-edge
    # collapses made the count fall 15% short before the target was corrected
    prepared, report = sk.prepare(SHAPES[shape](), target_vertices=target)
    assert abs(prepared.n_vertices / target - 1) <= 0.03
    assert report.after.is_watertight and report.after.min_angle_deg > 10
