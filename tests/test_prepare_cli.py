"""`surfacekit prepare` part selection and volumetric options on small synthetic meshes."""
from __future__ import annotations

import json

import numpy as np
import pytest
from test_volumetric import _moebius_capped_sphere

import surfacekit as sk
from surfacekit.app import cli


def run(argv, capsys):
    code = cli.main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.fixture(scope="module")
def two_spheres(tmp_path_factory):
    """Radii 10 and 6 mm, 30 mm apart, in one PLY (4.19 ml and 0.90 ml as exact spheres)."""
    a = sk.synthetic.icosphere(3, radius=10.0)
    b = sk.synthetic.icosphere(3, radius=6.0)
    v = np.vstack([a.vertices, b.vertices + [30.0, 0.0, 0.0]])
    path = tmp_path_factory.mktemp("spheres") / "two.ply"
    sk.save(sk.Surface(v, np.vstack([a.faces, b.faces + len(a.vertices)])), path)
    return path, a.signed_volume, b.signed_volume


def _volume(path):
    return sk.load(path).signed_volume


def test_keep_index_gives_the_smaller_sphere(two_spheres, tmp_path, capsys):
    path, _, small = two_spheres
    code, out, err = run(["prepare", path, "-o", tmp_path / "b.ply", "--keep", "1",
                          "--no-smooth", "--json"], capsys)
    assert code == 0, err
    assert _volume(tmp_path / "b.ply") == pytest.approx(small, rel=1e-6)
    assert json.loads(out)["steps"]["part_index"] == 1


@pytest.mark.parametrize("ml, which", [(4.0, 0), (1.0, 1), (0.2, 1)])
def test_keep_volume_picks_the_nearest_part(two_spheres, tmp_path, capsys, ml, which):
    path, big, small = two_spheres
    code, _, err = run(["prepare", path, "-o", tmp_path / "v.ply", "--keep-volume", ml,
                        "--no-smooth"], capsys)
    assert code == 0, err
    assert _volume(tmp_path / "v.ply") == pytest.approx((big, small)[which], rel=1e-6)


def test_keep_volume_in_the_library(two_spheres):
    path, _, small = two_spheres
    out, report = sk.prepare(sk.load(path), keep="volume:0.9", smooth=False)
    assert out.signed_volume == pytest.approx(small, rel=1e-6) and report.part_index == 1
    with pytest.raises(ValueError, match="millilitres"):
        sk.prepare(sk.load(path), keep="volume:-1")


def test_keep_all_writes_one_file_per_part(two_spheres, tmp_path, capsys):
    path, big, small = two_spheres
    target = tmp_path / "organ.ply"
    code, out, err = run(["prepare", path, "-o", target, "--keep", "all", "--no-smooth",
                          "--json"], capsys)
    assert code == 0, err
    parts = [tmp_path / "organ_part0.ply", tmp_path / "organ_part1.ply"]
    assert json.loads(out)["outputs"] == [str(p) for p in parts]
    assert not target.exists()
    assert [_volume(p) for p in parts] == pytest.approx([big, small], rel=1e-6)
    code, _, err = run(["prepare", path, "-o", target, "--keep", "all"], capsys)
    assert code == 2 and "already exists" in err and len(err.strip().splitlines()) == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["organ_part0.ply", "organ_part1.ply"]
    code, _, err = run(["prepare", path, "-o", target, "--keep", "all", "--force"], capsys)
    assert code == 0, err


@pytest.mark.parametrize("args, words", [
    (["--keep", "5"], "2 parts"), (["--keep", "many"], "--keep"),
    (["--keep-volume", "0"], "--keep-volume"), (["--keep", "1", "--keep-volume", "1"], "either"),
    (["--voxel-mm", "-1"], "--voxel-mm")])
def test_bad_part_options_exit_2(two_spheres, tmp_path, capsys, args, words):
    code, _, err = run(["prepare", two_spheres[0], "-o", tmp_path / "x.ply", *args], capsys)
    assert code == 2 and words in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "x.ply").exists()


def test_no_volumetric_refuses_a_non_orientable_mesh(tmp_path, capsys):
    surface, _ = _moebius_capped_sphere(n_around=48, n_rings=24, rim_ring=4)
    sk.save(surface, tmp_path / "m.ply")
    code, _, err = run(["prepare", tmp_path / "m.ply", "-o", tmp_path / "o.ply",
                        "--no-volumetric"], capsys)
    assert code == 2 and "orientable" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "o.ply").exists()
    code, out, err = run(["prepare", tmp_path / "m.ply", "-o", tmp_path / "o.ply",
                          "--volumetric", "--voxel-mm", "1.0", "--json"], capsys)
    assert code == 0, err
    steps = json.loads(out)["steps"]
    assert steps["route"] == "rebuilt through a volume" and steps["voxel_mm"] == 1.0
