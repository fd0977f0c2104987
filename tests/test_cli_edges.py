"""The command line at its edges: outputs that cannot be written, closed pipes, every mesh
format of the library, region names, landmarks given as coordinates in mm.

Meshes are small synthetic kidneys (invented shapes from ``sk.synthetic``).
"""
from __future__ import annotations

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
