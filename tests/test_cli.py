"""The ``surfacekit`` command: exit codes, one-line errors, safe outputs, reproducibility.

Meshes are small synthetic kidneys (invented shapes from ``sk.synthetic``) so the
whole file runs in about a minute.  Reference values are named beside each check.
"""
from __future__ import annotations

import csv
import json
import os
import shlex
import subprocess
import sys
import zipfile
from pathlib import Path

import numpy as np
import pytest
from test_malformed import CASES, materialise

import surfacekit as sk
from surfacekit.app import cli, demo_data
from surfacekit.app import commands as cli_commands


def run(argv, capsys) -> tuple[int, str, str]:
    code = cli.main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.fixture(scope="module")
def meshes(tmp_path_factory):
    """A baseline kidney and a grown, moved follow-up with different triangulations (mm)."""
    d = tmp_path_factory.mktemp("meshes")
    base, _ = sk.synthetic.organ_surface("kidney", 700, seed=1)
    follow, _ = demo_data.followup_shape(800, 4.0, seed=5)
    sk.save(base, d / "base.ply")
    sk.save(follow, d / "follow.ply")
    return d


def one_error_line(err: str) -> str:
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, f"expected one line on stderr, got {lines!r}"
    assert "Traceback" not in err
    return lines[0]


# ------------------------------------------------------------------ help and parsing
@pytest.mark.parametrize("spec", cli_commands.COMMANDS, ids=lambda s: s.name)
def test_help_shows_a_runnable_example(spec, capsys):
    """Every subcommand's --help ends with an example that the parser accepts as written."""
    with pytest.raises(SystemExit) as info:
        cli.main([spec.name, "--help"])
    assert info.value.code == 0
    text = capsys.readouterr().out
    assert "example:" in text and spec.example in text
    for option in ("--json", "--quiet", "--seed", "--force", "--debug"):
        assert option in text
    argv = shlex.split(spec.example)
    assert argv[0] == "surfacekit" and argv[1] == spec.name
    args = cli.build_parser().parse_args(argv[1:])
    assert args.run is spec.run


def test_unknown_option_is_one_line_exit_2(capsys):
    code, out, err = run(["match", "a.ply"], capsys)
    assert code == 2
    assert out == ""
    assert "required" in one_error_line(err)


# ------------------------------------------------------------------ bad input
@pytest.mark.parametrize("case,name,data,expected", CASES, ids=[c[0] for c in CASES])
def test_malformed_mesh_exit_2_one_line_no_output(tmp_path, capsys, case, name, data, expected):
    """The I/O engineer's malformed corpus: every file gives exit 2, one line, nothing written."""
    bad = materialise(tmp_path, name, data)
    target = tmp_path / "out" / "quality.json"
    code, _, err = run(["inspect", bad, "-o", target], capsys)
    assert code == 2, err
    line = one_error_line(err)
    assert line.startswith("surfacekit: error:")
    assert not target.exists()
    assert [p.name for p in (tmp_path / "out").iterdir()] == []  # no staging left behind


@pytest.mark.parametrize("command", ["inspect", "prepare", "describe", "match", "change"])
def test_every_mesh_command_refuses_a_malformed_mesh(tmp_path, meshes, capsys, command):
    """Same corpus file (a PLY header promising more than the file holds) for each command."""
    bad = tmp_path / "bad.ply"
    bad.write_bytes(b"ply\nformat ascii 1.0\nelement vertex 9\nproperty float x\n"
                    b"property float y\nproperty float z\nend_header\n0 0 0\n")
    out = tmp_path / "out"
    argv = {"inspect": ["inspect", bad, "-o", out / "q.json"],
            "prepare": ["prepare", bad, "-o", out / "p.ply"],
            "describe": ["describe", bad, "-o", out / "d.npz"],
            "match": ["match", meshes / "base.ply", bad, "-o", out / "m.npz"],
            "change": ["change", bad, meshes / "follow.ply", "-o", out / "c"]}[command]
    code, _, err = run(argv, capsys)
    assert code == 2
    assert "bad.ply" in one_error_line(err)
    assert not out.exists() or list(out.iterdir()) == []


def test_malformed_mesh_through_the_installed_command(tmp_path, meshes):
    """The real console script: exit 2, one stderr line, no traceback, no output file."""
    bad = tmp_path / "broken.ply"
    bad.write_bytes(b"ply\nformat ascii 1.0\nelement vertex 3\nproperty float x\nend_header\n1 2\n")
    exe = Path(sys.executable).with_name("surfacekit")
    cmd = [str(exe)] if exe.exists() else [sys.executable, "-m", "surfacekit.app.cli"]
    proc = subprocess.run(cmd + ["match", str(meshes / "base.ply"), str(bad), "-o",
                                 str(tmp_path / "out.npz")], capture_output=True, text=True,
                          timeout=120, check=False)
    assert proc.returncode == 2
    assert "broken.ply" in one_error_line(proc.stderr)
    assert not (tmp_path / "out.npz").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["broken.ply"]


def test_missing_input_and_label_volume_given_as_mesh(tmp_path, capsys):
    code, _, err = run(["describe", tmp_path / "nope.ply", "-o", tmp_path / "d.npz"], capsys)
    assert code == 2 and "not found" in one_error_line(err)
    vol = tmp_path / "seg.nii.gz"
    vol.write_bytes(b"")
    code, _, err = run(["inspect", vol], capsys)
    assert code == 2 and "surfacekit prepare" in one_error_line(err)


def test_bad_manifest_is_refused_quickly(tmp_path, capsys):
    m = tmp_path / "cohort.csv"
    m.write_text("name,file\na,b.ply\n")
    code, _, err = run(["cohort", m, "-o", tmp_path / "out"], capsys)
    assert code == 2 and "missing column" in one_error_line(err)
    assert not (tmp_path / "out").exists()


def test_existing_output_needs_force_and_failed_run_keeps_it(tmp_path, meshes, capsys):
    target = tmp_path / "quality.json"
    target.write_text("keep me")
    code, _, err = run(["inspect", meshes / "base.ply", "-o", target], capsys)
    assert code == 2 and "--force" in one_error_line(err)
    assert target.read_text() == "keep me"
    # a failing run with --force must not replace the existing output either
    code, _, err = run(["inspect", tmp_path / "absent.ply", "-o", target, "--force"], capsys)
    assert code == 2 and target.read_text() == "keep me"
    code, _, _ = run(["inspect", meshes / "base.ply", "-o", target, "--force", "--json"], capsys)
    assert code == 0
    assert json.loads(target.read_text())["vertices"] == 700
    assert sorted(p.name for p in tmp_path.iterdir()) == ["quality.json"]


def test_internal_error_exit_1_and_debug_traceback(tmp_path, meshes, capsys, monkeypatch):
    def broken(*a, **k):
        raise RuntimeError("solver exploded\nsecond line")

    monkeypatch.setattr(sk.correspondence.solver, "match", broken)
    argv = ["match", meshes / "base.ply", meshes / "follow.ply", "-o", tmp_path / "m.npz"]
    code, _, err = run(argv, capsys)
    assert code == 1
    assert "internal error" in one_error_line(err) and "solver exploded second line" in err
    code, _, err = run(argv + ["--debug"], capsys)
    assert code == 1 and "Traceback" in err
    assert not (tmp_path / "m.npz").exists()


# ------------------------------------------------------------------ real work
def test_inspect_json_matches_analytic_ellipsoid_volume(tmp_path, capsys):
    """Ellipsoid volume 4/3·π·a·b·c (any calculus handbook); a 4000-vertex mesh is within 0.5%."""
    s = sk.synthetic.ellipsoid((30.0, 20.0, 10.0), n=4000)
    sk.save(s, tmp_path / "e.ply")
    code, out, _ = run(["inspect", tmp_path / "e.ply", "--json"], capsys)
    assert code == 0
    facts = json.loads(out)
    exact = 4.0 / 3.0 * np.pi * 30 * 20 * 10 / 1000.0
    assert abs(facts["volume_ml"] - exact) / exact < 5e-3
    assert facts["closed"] and facts["genus"] == 0 and facts["vertices"] == 4000


def test_describe_sphere_spectrum(tmp_path, capsys):
    """Sphere of radius r: eigenvalues l(l+1)/r², first non-zero 2/r² ×3 (NIST DLMF §14.30)."""
    r = 10.0
    sk.save(sk.synthetic.icosphere(3, radius=r), tmp_path / "s.ply")
    code, _, _ = run(["describe", tmp_path / "s.ply", "-o", tmp_path / "d.npz", "--eigenpairs",
                      "10", "-q"], capsys)
    assert code == 0
    with np.load(tmp_path / "d.npz") as data:
        values, hks = data["eigenvalues"], data["hks"]
    assert abs(values[0]) < 1e-8
    np.testing.assert_allclose(values[1:4], 2.0 / r**2, rtol=0.02)
    np.testing.assert_allclose(values[4:9], 6.0 / r**2, rtol=0.03)
    assert hks.shape[0] == 642


def test_prepare_from_label_volume_keeps_mask_volume(tmp_path, capsys):
    """Mesh of a label volume encloses about voxel count × voxel volume (common practice)."""
    s, _ = sk.synthetic.organ_surface("kidney", 2000, seed=3)
    mask, affine = demo_data.voxelize(s, (1.0, 1.0, 2.0))
    demo_data.write_nifti(tmp_path / "seg.nii.gz", mask.astype(np.uint8) * 3, affine)
    code, _, err = run(["prepare", tmp_path / "seg.nii.gz", "--label", "3", "--target-vertices",
                          "1500", "-o", tmp_path / "k.ply", "-q"], capsys)
    assert code == 0, err
    k = sk.load(tmp_path / "k.ply")
    mask_ml = mask.sum() * 2.0 / 1000.0
    assert abs(k.volume / 1000.0 - mask_ml) / mask_ml < 0.03
    assert 1200 < k.n_vertices < 1800
    code, _, err = run(["prepare", tmp_path / "seg.nii.gz", "--label", "9", "-o",
                        tmp_path / "k9.ply"], capsys)
    assert code == 2 and not (tmp_path / "k9.ply").exists()


def test_match_writes_a_loadable_map_and_is_byte_reproducible(tmp_path, meshes, capsys):
    outs = []
    for name in ("a.npz", "b.npz"):
        code, out, err = run(["match", meshes / "base.ply", meshes / "follow.ply", "-o",
                              tmp_path / name, "--seed", "3", "--json"], capsys)
        assert code == 0, err
        outs.append((tmp_path / name).read_bytes())
        summary = json.loads(out)
        assert 0.0 <= summary["mean_confidence"] <= 1.0
    assert outs[0] == outs[1]
    corr = sk.Correspondence.load(tmp_path / "a.npz")
    assert corr.source_to_target.shape == (700,) and corr.target_to_source.shape == (800,)
    with zipfile.ZipFile(tmp_path / "a.npz") as z:
        assert {i.date_time for i in z.infolist()} == {(1980, 1, 1, 0, 0, 0)}


def test_change_outputs_and_reproducible_tables(tmp_path, meshes, capsys):
    """Two runs of 'change' with the same seed give byte-identical CSV and NPZ files."""
    template, sp = sk.synthetic.organ_surface("kidney", 600, seed=9)
    sk.save(template, tmp_path / "t.ply", fields={"region": demo_data.regions(sp)})
    results = []
    for name in ("c1", "c2"):
        argv = ["change", meshes / "base.ply", meshes / "follow.ply", "--regions",
                tmp_path / "t.ply", "-o", tmp_path / name, "--json", "-q"]
        if name == "c2":
            argv.append("--no-report")
        code, out, err = run(argv, capsys)
        assert code == 0, err
        results.append(json.loads(out))
    files = ("change.csv", "change.npz", "map.npz", "baseline_change.ply")
    for f in files:
        assert (tmp_path / "c1" / f).read_bytes() == (tmp_path / "c2" / f).read_bytes(), f
    assert (tmp_path / "c1" / "report.html").is_file()
    assert len(list((tmp_path / "c1" / "figures").glob("*.png"))) >= 3
    # bulge of up to 4 mm outward: the measured volume grows and the peak is outward
    assert results[0]["volume_change_followup_minus_baseline_ml"] > 0
    assert results[0]["max_normal_displacement_outward_mm"] > 1.5
    umask = os.umask(0)
    os.umask(umask)
    assert os.stat(tmp_path / "c1").st_mode & 0o777 == 0o777 & ~umask  # not mkdtemp's 0700


def test_cohort_partial_failure_exit_code_and_resume(tmp_path, capsys):
    """A corrupt subject: exit 3, one line naming the count; a re-run reuses finished subjects."""
    import surfacekit as sk

    base, _ = sk.synthetic.organ_surface("kidney", 900, seed=3)
    sk.save(base, tmp_path / "template.ply")
    for i in range(2):
        moved = sk.Surface(base.vertices * (1.0 + 0.02 * i) + i, base.faces)
        sk.save(moved, tmp_path / f"s{i}.ply")
    (tmp_path / "broken.ply").write_bytes(b"ply\nformat ascii 1.0\nelement vertex 99\n")
    (tmp_path / "cohort.csv").write_text(
        "subject,path,label,group,role,age,sex\n"
        "tpl,template.ply,,,template,,\n"
        "a,s0.ply,,g1,subject,,\nb,s1.ply,,g2,subject,,\nc,broken.ply,,g2,subject,,\n")
    args = ["cohort", tmp_path / "cohort.csv", "-o", tmp_path / "out", "--permutations", "50",
            "--target-vertices", "800", "--quiet"]
    code, _, err = run(args, capsys)
    assert code == 3 and "1 of 3 subjects failed" in err
    with open(tmp_path / "out" / "cohort_summary.csv", newline="") as f:
        rows = {r["subject"]: r for r in csv.DictReader(f)}
    assert {k: r["status"] for k, r in rows.items()} == {"a": "ok", "b": "ok", "c": "failed"}
    assert rows["a"]["error"] == rows["b"]["error"] == ""
    assert rows["c"]["error"] == "SurfaceError: broken.ply: PLY header has no end_header line"
    assert rows["c"]["volume_ml"] == "" and float(rows["b"]["volume_ml"]) > 0  # no numbers for a failure
    code, out, _ = run(args + ["--json"], capsys)
    assert code == 3 and json.loads(out)["cached"] == 2
