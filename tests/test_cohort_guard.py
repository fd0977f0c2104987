"""Cohort runs that cannot succeed say so: an unguarded script with worker processes, and a
run in which every subject failed.

The guard rule is the one of the Python documentation, ``multiprocessing``,
"Programming guidelines: safe importing of main module": with the "spawn" start
method every worker imports the main script again, so work started at its top
level must sit under ``if __name__ == "__main__":``.
"""
from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

import surfacekit as sk
from surfacekit.app import cli
from surfacekit.cohort.engines import guarded_lines
from surfacekit.cohort.run import CohortFailedError

REPO = Path(__file__).resolve().parents[1]


def _small_cohort(folder: Path) -> Path:
    """A template and two synthetic kidneys (invented shapes), 400 vertices each."""
    folder.mkdir(parents=True, exist_ok=True)
    for name, seed in (("template", 10), ("a", 1), ("b", 2)):
        s, _ = sk.synthetic.organ_surface("kidney", 400, seed=seed)
        sk.save(s, folder / f"{name}.ply")
    rows = ["subject,path,label,group,role,age,sex", "atlas,template.ply,,,template,,",
            "a,a.ply,,control,subject,,", "b,b.ply,,case,subject,,"]
    (folder / "cohort.csv").write_text("\n".join(rows) + "\n")
    return folder / "cohort.csv"


SCRIPT = """\
import surfacekit as sk

result = sk.run_cohort({manifest!r}, {out!r}, workers=2, target_vertices=300,
                       n_eigenvalues=20, n_permutations=20, progress=False)
print("finished", result.n_failed)
"""


def _run_script(path: Path, text: str) -> subprocess.CompletedProcess:
    path.write_text(text)
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    return subprocess.run([sys.executable, str(path)], check=False, capture_output=True, text=True,
                          timeout=300, cwd=path.parent, env=env)


def test_unguarded_script_with_workers_raises_a_clear_error(tmp_path):
    manifest = _small_cohort(tmp_path / "data")
    out = tmp_path / "out"
    proc = _run_script(tmp_path / "tour.py", SCRIPT.format(manifest=str(manifest), out=str(out)))
    assert proc.returncode != 0
    assert "finished" not in proc.stdout
    last = proc.stderr.strip().splitlines()[-1]
    assert last.startswith("surfacekit.cohort.engines.UnguardedScriptError: run_cohort(workers=2) "
                           "is called at the top level of tour.py (line 3)"), last
    assert "if __name__ == \"__main__\":" in last
    assert "BrokenProcessPool" not in proc.stderr
    assert not (out / "subjects").exists()  # refused before any work


@pytest.mark.slow
def test_guarded_script_with_workers_runs(tmp_path):
    """The same call under the guard runs both subjects in two worker processes."""
    manifest = _small_cohort(tmp_path / "data")
    body = SCRIPT.format(manifest=str(manifest), out=str(tmp_path / "out"))
    lines = body.splitlines()
    text = lines[0] + "\n\nif __name__ == \"__main__\":\n" + textwrap.indent("\n".join(lines[1:]), "    ")
    proc = _run_script(tmp_path / "guarded.py", text + "\n")
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert proc.stdout.strip() == "finished 0"


def test_guard_detection_reads_the_script_syntax():
    src = textwrap.dedent("""\
        import x
        x.run()
        if __name__ == "__main__":
            x.run()
            x.more()
        if "__main__" == __name__:
            x.run()
        if __name__ != "__main__":
            x.run()
        """)
    assert guarded_lines(src) == [(4, 5), (7, 7)]


def test_every_subject_failed_raises_and_the_command_exits_2(tmp_path, capsys):
    folder = tmp_path / "data"
    folder.mkdir()
    s, _ = sk.synthetic.organ_surface("kidney", 400, seed=10)
    sk.save(s, folder / "template.ply")
    (folder / "bad.ply").write_bytes(b"ply\nformat binary_little_endian 1.0\n\x00\x13garbage")
    rows = ["subject,path,label,group,role,age,sex", "atlas,template.ply,,,template,,",
            "bad,bad.ply,,control,subject,,", "gone,missing.ply,,case,subject,,"]
    manifest = folder / "cohort.csv"
    manifest.write_text("\n".join(rows) + "\n")
    with pytest.raises(CohortFailedError) as info:
        sk.run_cohort(manifest, tmp_path / "api", target_vertices=300, n_eigenvalues=20,
                      n_permutations=20, progress=False)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith("every one of the 2 cohort subjects failed; first: bad: ")
    assert isinstance(info.value, RuntimeError) and info.value.result.n_failed == 2
    assert (tmp_path / "api" / "cohort_summary.csv").is_file()  # the errors stay readable

    code = cli.main(["cohort", str(manifest), "-o", str(tmp_path / "cli"), "--target-vertices",
                     "300", "--permutations", "20"])
    err = capsys.readouterr().err
    lines = [line for line in err.splitlines() if line.strip()]
    assert code == 2 and len(lines) == 1, err
    assert lines[0].startswith("surfacekit: error: every one of the 2 cohort subjects failed")
