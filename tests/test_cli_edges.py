"""The command line at its edges: outputs that cannot be written, closed pipes, every mesh
format of the library, region names, landmarks given as coordinates in mm.

Meshes are small synthetic kidneys (invented shapes from ``sk.synthetic``).
"""
from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import surfacekit as sk
from surfacekit.app import cli

REPO = Path(__file__).resolve().parents[1]


def run(argv, capsys) -> tuple[int, str, str]:
    code = cli.main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


def one_error_line(err: str) -> str:
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, f"expected one line on stderr, got {lines!r}"
    assert "Traceback" not in err
    return lines[0]


@pytest.fixture(scope="module")
def kidney(tmp_path_factory):
    d = tmp_path_factory.mktemp("edges")
    s, _ = sk.synthetic.organ_surface("kidney", 700, seed=1)
    sk.save(s, d / "base.ply")
    return d / "base.ply"


def _shell(script: str) -> subprocess.CompletedProcess:
    """Run a bash pipeline with ``surfacekit`` spelled as this interpreter's module."""
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    script = script.replace("surfacekit ", f"{sys.executable} -m surfacekit.app.cli ", 1)
    return subprocess.run(["bash", "-c", script], capture_output=True, text=True, timeout=120,
                          env=env, check=False)


# ------------------------------------------------------------------ unwritable outputs
@pytest.mark.parametrize("command", ["inspect", "prepare", "describe", "change", "demo"])
def test_output_below_an_existing_file_is_a_one_line_error(command, kidney, tmp_path, capsys):
    blocker = tmp_path / "notes.txt"
    blocker.write_text("a file, not a folder\n")
    out = blocker / "sub" / {"inspect": "q.json", "prepare": "p.ply", "describe": "d.npz",
                             "change": "change_out", "demo": "demo"}[command]
    argv = {"inspect": ["inspect", kidney, "-o", out], "prepare": ["prepare", kidney, "-o", out],
            "describe": ["describe", kidney, "-o", out],
            "change": ["change", kidney, kidney, "-o", out], "demo": ["demo", "-o", out]}[command]
    code, stdout, err = run(argv, capsys)
    assert code == 2 and stdout == ""
    assert one_error_line(err) == (f"surfacekit: error: cannot write output {out}: "
                                   f"{blocker} is a file, not a folder")
    assert blocker.read_text() == "a file, not a folder\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt"]


def test_cohort_output_below_a_file(tmp_path, capsys):
    (tmp_path / "m.csv").write_text("subject,path,label,group,role,age,sex\n")
    (tmp_path / "f").write_text("x")
    code, _, err = run(["cohort", tmp_path / "m.csv", "-o", tmp_path / "f" / "out"], capsys)
    assert code == 2
    assert one_error_line(err) == (f"surfacekit: error: cannot write output {tmp_path / 'f' / 'out'}: "
                                   f"{tmp_path / 'f'} is a file, not a folder")


def test_read_only_folder_is_a_one_line_error(kidney, tmp_path, capsys):
    if os.geteuid() == 0:  # root writes through permission bits; /sys refuses new entries
        folder = Path("/sys")
    else:
        folder = tmp_path / "locked"
        folder.mkdir()
        folder.chmod(0o555)
    out = folder / "quality.json"
    try:
        code, stdout, err = run(["inspect", kidney, "-o", out], capsys)
    finally:
        if folder != Path("/sys"):
            folder.chmod(0o755)
    assert code == 2 and stdout == ""
    assert one_error_line(err) == (f"surfacekit: error: cannot write output {out}: "
                                   f"no permission to write in {folder}")
    assert not out.exists()


def test_closed_pipe_ends_quietly_with_exit_0(kidney):
    """`surfacekit inspect x.ply --json | head -c 10`: the reader stops early; the command
    exits 0 without a message (its work was complete before the summary was printed)."""
    proc = _shell(f"set -o pipefail; surfacekit inspect {kidney} --json | head -c 10")
    assert proc.stdout == '{\n  "area_'
    assert proc.stderr == ""
    assert proc.returncode == 0


def test_reader_that_never_reads_is_not_an_error(kidney):
    """`| true` closes the pipe before anything is printed: the write fails for certain."""
    proc = _shell(f"surfacekit inspect {kidney} --json | true; echo \"${{PIPESTATUS[0]}}\"")
    assert proc.stdout == "0\n"
    assert proc.stderr == ""


def test_closed_pipe_after_writing_keeps_the_output(kidney, tmp_path):
    """With -o, the file is complete although the printed summary was cut off."""
    out = tmp_path / "q.json"
    proc = _shell(f"surfacekit inspect {kidney} -o {out} --json | head -c 1; echo \" ${{PIPESTATUS[0]}}\"")
    assert proc.stdout == "{ 0\n" and proc.stderr == ""
    assert json.loads(out.read_text())["vertices"] == sk.load(kidney).n_vertices


# ------------------------------------------------------------------ every mesh format
FORMATS = (".ply", ".obj", ".stl", ".off", ".gii", ".vtk", ".npz")


def test_command_line_formats_are_the_library_formats():
    from surfacekit.app.cli_util import MESH_SUFFIXES
    from surfacekit.io.files import MESH_SUFFIXES as LIBRARY

    assert set(MESH_SUFFIXES) == set(LIBRARY) == set(FORMATS)


@pytest.mark.parametrize("suffix", FORMATS)
def test_prepare_writes_every_format_that_load_reads(suffix, kidney, tmp_path, capsys):
    out = tmp_path / f"clean{suffix}"
    code, stdout, err = run(["prepare", kidney, "-o", out, "--target-vertices", "400", "--json", "-q"],
                            capsys)
    assert code == 0, err
    after = json.loads(stdout)["after"]
    back = sk.load(out)
    assert back.n_vertices == after["vertices"] and back.n_faces == after["faces"]
    assert back.area == pytest.approx(after["area_mm2"], rel=1e-5)  # float32 formats round


def test_npz_meshes_are_accepted_by_every_command(kidney, tmp_path, capsys):
    s = sk.load(kidney)
    mesh = tmp_path / "kidney.npz"
    sk.save(s, mesh)
    code, stdout, err = run(["inspect", mesh, "--json"], capsys)
    assert code == 0, err
    assert json.loads(stdout)["vertices"] == s.n_vertices
    code, _, err = run(["describe", mesh, "-o", tmp_path / "d.npz", "--eigenpairs", "10", "-q"], capsys)
    assert code == 0, err
    code, _, err = run(["match", mesh, kidney, "-o", tmp_path / "map.npz", "-q"], capsys)
    assert code == 0, err
    np.testing.assert_array_equal(sk.Correspondence.load(tmp_path / "map.npz").source_to_target,
                                  np.arange(s.n_vertices))  # the same mesh maps onto itself
    code, _, err = run(["change", mesh, kidney, "-o", tmp_path / "chg", "--no-report", "-q"], capsys)
    assert code == 0, err
    code, _, err = run(["inspect", tmp_path / "kidney.xyz"], capsys)
    assert code == 2
    assert one_error_line(err).startswith("surfacekit: error: ")


# ------------------------------------------------------------------ landmarks in mm
def _write_points_csv(path: Path, src_pts, tgt_pts) -> Path:
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["source_x", "source_y", "source_z", "target_x", "target_y", "target_z"])
        for p, q in zip(src_pts, tgt_pts):
            w.writerow([*(f"{x:.6f}" for x in p), *(f"{x:.6f}" for x in q)])
    return path


def test_load_landmarks_snaps_points_to_the_nearest_vertices(tmp_path):
    src, _ = sk.synthetic.organ_surface("kidney", 600, seed=1)
    tgt, _ = sk.synthetic.organ_surface("kidney", 900, seed=2)
    rng = np.random.default_rng(0)
    sp = src.vertices[[5, 100, 300]] + rng.normal(scale=0.1, size=(3, 3))
    tp = tgt.vertices[[50, 200, 800]] + rng.normal(scale=0.1, size=(3, 3))
    path = _write_points_csv(tmp_path / "lm.csv", sp, tp)
    with pytest.raises(ValueError, match="coordinates \\(mm\\); pass the source and target surfaces"):
        sk.load_landmarks(path)
    got = sk.load_landmarks(path, src, tgt)
    # brute-force nearest vertex (every distance computed) as the reference
    want = np.stack([np.linalg.norm(src.vertices[None] - sp[:, None], axis=2).argmin(1),
                     np.linalg.norm(tgt.vertices[None] - tp[:, None], axis=2).argmin(1)], axis=1)
    np.testing.assert_array_equal(got, want)
    # an exported file holds indices and points: with the surfaces, the points decide
    sk.save_landmarks({"source_index": np.array([0, 1, 2]), "target_index": np.array([3, 4, 5]),
                       "source_xyz": sp, "target_xyz": tp, "confidence": np.ones(3)},
                      tmp_path / "both.csv")
    np.testing.assert_array_equal(sk.load_landmarks(tmp_path / "both.csv"), [[0, 3], [1, 4], [2, 5]])
    np.testing.assert_array_equal(sk.load_landmarks(tmp_path / "both.csv", src, tgt), want)
    (tmp_path / "idx.csv").write_text("source_vertex,target_vertex\n3,5\n700,2\n")
    with pytest.raises(ValueError, match="source vertex 700 does not exist"):
        sk.load_landmarks(tmp_path / "idx.csv", src, tgt)


def test_landmark_points_survive_prepare_resampling(tmp_path, capsys):
    """Points picked on the original meshes land on the same anatomy after `prepare`."""
    src, _ = sk.synthetic.organ_surface("kidney", 1500, seed=1)
    tgt, _ = sk.synthetic.organ_surface("kidney", 1500, seed=2)
    sk.save(src, tmp_path / "src.ply")
    sk.save(tgt, tmp_path / "tgt.ply")
    picks = [0, 700, 1400]
    lm = _write_points_csv(tmp_path / "lm.csv", src.vertices[picks], tgt.vertices[picks])
    for name in ("src", "tgt"):
        code, _, err = run(["prepare", tmp_path / f"{name}.ply", "-o", tmp_path / f"{name}_p.ply",
                            "--target-vertices", "600", "-q"], capsys)
        assert code == 0, err
    sp, tp = sk.load(tmp_path / "src_p.ply"), sk.load(tmp_path / "tgt_p.ply")
    pairs = sk.load_landmarks(lm, sp, tp)
    for side, (orig, prep) in enumerate(((src, sp), (tgt, tp))):
        moved = np.linalg.norm(prep.vertices[pairs[:, side]] - orig.vertices[picks], axis=1)
        assert np.all(moved < 1.0 * prep.mean_edge_length), moved
    code, out, err = run(["match", tmp_path / "src_p.ply", tmp_path / "tgt_p.ply", "--landmarks", lm,
                          "-o", tmp_path / "map.npz", "--json"], capsys)
    assert code == 0, err
    summary = json.loads(out)
    info = summary["landmarks"]
    assert info["pairs"] == 3 and info["given_as"].startswith("coordinates (mm)")
    assert 0 < info["source_snap_max_mm"] < 1.0 * sp.mean_edge_length
    assert "warnings" not in info and "landmark" not in err
    assert summary["landmark_pairs"] == 3  # the solver used them


def test_far_landmark_is_warned_about_and_bad_indices_are_refused(kidney, tmp_path, capsys):
    s = sk.load(kidney)
    far = s.vertices[[10, 20]] + [[0.0, 0.0, 0.0], [0.0, 0.0, 40.0]]
    lm = _write_points_csv(tmp_path / "lm.csv", s.vertices[[10, 20]], far)
    code, out, err = run(["change", kidney, kidney, "--landmarks", lm, "-o", tmp_path / "c",
                          "--no-report", "--json"], capsys)
    assert code == 0
    limit = 2 * s.mean_edge_length
    info = json.loads(out)["landmarks"]
    assert info["target_snap_max_mm"] > 20 and info["source_snap_max_mm"] == pytest.approx(0, abs=1e-5)
    assert len(info["warnings"]) == 1
    line = [x for x in err.splitlines() if "landmark" in x]
    assert line == [f"surfacekit: warning: {info['warnings'][0]}"]
    assert info["warnings"][0].startswith("landmark 2 lies ")
    assert f"more than 2 mean edge lengths ({limit:.3g} mm)" in info["warnings"][0]
    (tmp_path / "idx.csv").write_text("5,9\n3,99999\n")
    code, _, err = run(["match", kidney, kidney, "--landmarks", tmp_path / "idx.csv", "-o",
                        tmp_path / "m.npz"], capsys)
    assert code == 2
    assert one_error_line(err) == ("surfacekit: error: idx.csv: target vertex 99999 does not exist "
                                   f"(the target surface has {s.n_vertices} vertices)")
    assert not (tmp_path / "m.npz").exists()


# ------------------------------------------------------------------ region names
@pytest.fixture(scope="module")
def labelled(tmp_path_factory, kidney):
    """The kidney as its own template, with three regions along its longest axis."""
    d = tmp_path_factory.mktemp("regions")
    s = sk.load(kidney)
    x = s.vertices[:, int(np.argmax(np.ptp(s.vertices, axis=0)))]
    region = 1 + np.digitize(x, np.quantile(x, [1 / 3, 2 / 3])).astype(np.int32)
    sk.save(s, d / "template.ply", fields={"region": region})
    return d / "template.ply"


NAMES = {1: "lower pole", 2: "mid zone", 3: "upper pole"}


def _change_with_regions(kidney, labelled, out, capsys, *extra):
    code, stdout, err = run(["change", kidney, kidney, "--regions", labelled, "-o", out, "--json",
                             *extra], capsys)
    return code, (json.loads(stdout) if code == 0 else None), err


def test_region_names_from_a_csv_reach_table_report_and_summary(kidney, labelled, tmp_path, capsys):
    from surfacekit.app.cli_util import write_region_names

    names_csv = write_region_names(tmp_path / "names.csv", NAMES)
    assert names_csv.read_text() == "label,name\n1,lower pole\n2,mid zone\n3,upper pole\n"
    code, summary, err = _change_with_regions(kidney, labelled, tmp_path / "out", capsys,
                                              "--region-names", names_csv)
    assert code == 0, err
    with open(tmp_path / "out" / "change.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [(int(r["label"]), r["name"]) for r in rows] == sorted(NAMES.items())
    assert summary["region_names_from"] == "names.csv"
    assert sorted(summary["region_mean_normal_displacement_outward_mm"]) == sorted(NAMES.values())
    # the same surface on both sides: no displacement anywhere (to rounding)
    assert max(abs(v) for v in summary["region_mean_normal_displacement_outward_mm"].values()) < 1e-6
    html = (tmp_path / "out" / "report.html").read_text(encoding="utf-8")
    for name in NAMES.values():
        assert name in html
    assert "region_1" not in html


def test_region_names_from_the_template_sidecar(kidney, labelled, tmp_path, capsys):
    from surfacekit.app.cli_util import region_names_sidecar, write_region_names

    code, summary, _ = _change_with_regions(kidney, labelled, tmp_path / "plain", capsys, "--no-report")
    assert code == 0 and summary["region_names_from"] == "none"
    assert sorted(summary["region_mean_normal_displacement_outward_mm"]) == ["region_1", "region_2", "region_3"]
    side = region_names_sidecar(labelled)
    assert side.name == "template.ply.regions.csv"
    write_region_names(side, {1: "lower pole", 2: "mid zone"})  # one region left unnamed
    try:
        code, summary, err = _change_with_regions(kidney, labelled, tmp_path / "named", capsys,
                                                  "--no-report")
    finally:
        side.unlink()
    assert code == 0
    assert summary["region_names_from"] == "template.ply.regions.csv"
    assert sorted(summary["region_mean_normal_displacement_outward_mm"]) == ["lower pole", "mid zone", "region_3"]
    assert ("surfacekit: warning: template.ply.regions.csv gives no name for region label(s) 3; "
            "they are called region_<label>") in err.splitlines()


@pytest.mark.parametrize(("content", "message"), [
    ("label,name\n7,left\n8,right\n", "names.csv names labels 7, 8 but the template's regions are 1, 2, 3"),
    ("label,name\n1,a\n1,b\n", "names.csv: label 1 is named twice (rows naming it: 'a', 'b')"),
    ("id,title\n1,a\n", "names.csv: region names CSV needs a header with 'label' and 'name' columns"),
    ("label,name\none,a\n", "names.csv: row 2 does not hold an integer label and a name"),
    ("label,name\n1,\n", "names.csv: row 2 has an empty name"),
])
def test_bad_region_names_are_one_line_errors(content, message, kidney, labelled, tmp_path, capsys):
    (tmp_path / "names.csv").write_text(content)
    code, _, err = _change_with_regions(kidney, labelled, tmp_path / "out", capsys,
                                        "--region-names", tmp_path / "names.csv")
    assert code == 2
    assert one_error_line(err) == f"surfacekit: error: {message}"
    assert not (tmp_path / "out").exists()


def test_region_names_need_a_template(kidney, tmp_path, capsys):
    (tmp_path / "names.csv").write_text("label,name\n1,a\n")
    code, _, err = run(["change", kidney, kidney, "--region-names", tmp_path / "names.csv", "-o",
                        tmp_path / "out"], capsys)
    assert code == 2
    assert one_error_line(err) == ("surfacekit: error: --region-names needs --regions "
                                   "(the labelled template they name)")
