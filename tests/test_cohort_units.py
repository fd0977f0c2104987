"""Cohort runs read each mesh in its own length unit (manifest ``units`` column, ``--units``)."""
from __future__ import annotations

import csv
import json

import numpy as np
import pytest

import surfacekit as sk
from surfacekit.app import cli
from surfacekit.cohort.manifest import read_manifest

HEADER = "subject,path,label,group,role,age,sex,units\n"


def _ellipsoid(scale=1.0):
    s = sk.synthetic.icosphere(3, radius=1.0)
    return sk.Surface(s.vertices * np.array([30.0, 20.0, 15.0]) * scale, s.faces)


@pytest.fixture(scope="module")
def cohort(tmp_path_factory):
    """A template, one subject in mm and the same subject stored in metres."""
    d = tmp_path_factory.mktemp("units")
    sk.save(sk.synthetic.icosphere(3, radius=20.0), d / "template.ply")
    sk.save(_ellipsoid(), d / "a_mm.ply")
    sk.save(_ellipsoid(1e-3), d / "b_m.ply")
    (d / "manifest.csv").write_text(HEADER + "tpl,template.ply,,,template,,,mm\n"
                                    "a,a_mm.ply,,A,subject,50,F,\n"
                                    "b,b_m.ply,,B,subject,60,M,m\n")
    return d


def test_units_column_is_not_a_covariate(cohort):
    man = read_manifest(cohort / "manifest.csv", units="cm")
    assert "units" not in man.covariate_names
    assert [e.units for e in man.subjects] == ["cm", "m"] and man.template.units == "mm"
    assert all("units" not in e.covariates for e in man.subjects)


def test_metre_file_gives_the_same_volume(cohort, capsys):
    out = cohort / "out"
    code = cli.main(["cohort", str(cohort / "manifest.csv"), "-o", str(out),
                     "--target-vertices", "300", "--permutations", "10", "--quiet"])
    assert code == 0, capsys.readouterr().err
    with open(out / "cohort_summary.csv", newline="") as fh:
        rows = {r["subject"]: r for r in csv.DictReader(fh)}
    exact = 4.0 / 3.0 * np.pi * 30 * 20 * 15 / 1000.0  # ml, inscribed mesh is a little smaller
    a, b = float(rows["a"]["volume_ml"]), float(rows["b"]["volume_ml"])
    assert a == pytest.approx(b, rel=1e-9) and a == pytest.approx(exact, rel=0.05)
    summary = json.loads((out / "run_summary.json").read_text())
    assert summary["units"]["subjects"] == {"a": "mm", "b": "m"}
    assert json.loads((out / "subjects" / "b" / "row.json").read_text())["units"] == "m"
    # the units enter the cache key: a new default recomputes only the subject that takes it
    keys = {s: json.loads((out / "subjects" / s / "row.json").read_text())["key"] for s in "ab"}
    code = cli.main(["cohort", str(cohort / "manifest.csv"), "-o", str(out), "--units", "cm",
                     "--target-vertices", "300", "--permutations", "10", "--quiet"])
    assert code == 0, capsys.readouterr().err
    new = {s: json.loads((out / "subjects" / s / "row.json").read_text())["key"] for s in "ab"}
    assert new["b"] == keys["b"] and new["a"] != keys["a"]
    with open(out / "cohort_summary.csv", newline="") as fh:
        rows = {r["subject"]: r for r in csv.DictReader(fh)}
    assert float(rows["a"]["volume_ml"]) == pytest.approx(1000.0 * a, rel=1e-9)


def test_bad_units_exit_2(cohort, capsys):
    bad = cohort / "bad.csv"
    bad.write_text(HEADER + "tpl,template.ply,,,template,,,\na,a_mm.ply,,A,subject,,,feet\n")
    assert cli.main(["cohort", str(bad), "-o", str(cohort / "bad_out")]) == 2
    err = capsys.readouterr().err
    assert "line 3" in err and "feet" in err and len(err.strip().splitlines()) == 1
    assert cli.main(["cohort", str(cohort / "manifest.csv"), "-o", str(cohort / "x"),
                     "--units", "0"]) == 2
    assert "--units" in capsys.readouterr().err
