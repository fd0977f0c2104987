"""group_test.csv / group_test.json: the sign convention in the header and the covariates
used or dropped (with the reason), without running a whole cohort."""
from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

import surfacekit as sk
from surfacekit.cohort.manifest import Manifest, ManifestEntry
from surfacekit.cohort.run import covariate_lines
from surfacekit.cohort.tables import write_group_test

N_VERTICES = 30


def _setup(tmp_path, covariates):
    """Eight subjects, control first in the manifest; the case group lies 1 mm further
    outward on the first ten vertices."""
    rng = np.random.default_rng(0)
    groups = ["control", "case"] * 4
    nd = rng.normal(0.0, 0.3, (8, N_VERTICES))
    nd[[g == "case" for g in groups], :10] += 1.0
    entries = tuple(ManifestEntry(f"s{i}", Path(f"s{i}.ply"), group=g, covariates=covariates(i))
                    for i, g in enumerate(groups))
    manifest = Manifest(tmp_path / "m.csv", entries, None, tuple(covariates(0)))
    fields = tmp_path / "fields.npz"
    np.savez(fields, normal_displacement=nd, ok=np.ones(8, bool), groups=np.array(groups))
    rows = [{"status": "ok"}] * 8
    return manifest, rows, fields, nd, np.array(groups)


def test_t_column_names_its_direction_and_matches_the_library(tmp_path):
    """t_case_minus_control is the library's t of group_a=case, group_b=control."""
    manifest, rows, fields, nd, groups = _setup(tmp_path, lambda i: {"age": str(40 + 3 * i % 7)})
    path, info = write_group_test(tmp_path / "group_test.csv", manifest, rows, fields,
                                  n_permutations=99, seed=1)
    with open(path, newline="") as fh:
        table = list(csv.DictReader(fh))
    assert list(table[0]) == ["vertex", "mean_control_outward_mm", "mean_case_outward_mm", "t_case_minus_control",
                              "p_uncorrected", "p_fwer", "q_fdr"]
    t = np.array([float(r["t_case_minus_control"]) for r in table])
    assert np.all(t[:10] > 0)                          # case lies further outward there
    age = np.array([40 + 3 * i % 7 for i in range(8)], float)
    case, control = groups == "case", groups == "control"
    ref = sk.vertexwise_group_test(nd[case], nd[control], n_permutations=99, seed=1,
                                   covariates=np.r_[age[case], age[control]])
    np.testing.assert_allclose(t, ref.t, rtol=1e-5)
    assert info["contrast"] == "case minus control" and info["covariates_used"] == ["age"]
    assert json.loads((tmp_path / "group_test.json").read_text()) == info
    assert covariate_lines(info) == [("group test: t_case_minus_control (case minus control); "
                                     "covariates used: age")]


def test_covariates_dropped_are_recorded_with_the_reason_and_warned(tmp_path):
    """A covariate equal to the group coding makes the design rank deficient: the test runs
    without covariates, and says which were dropped and why; a constant one is named too."""
    arm = {"control": "0", "case": "1"}
    manifest, rows, fields, _, _ = _setup(
        tmp_path, lambda i: {"arm": arm[["control", "case"][i % 2]], "age": str(40 + i),
                             "site": "A"})
    with pytest.warns(UserWarning) as caught:
        _, info = write_group_test(tmp_path / "group_test.csv", manifest, rows, fields,
                                   n_permutations=49, seed=0)
    assert info["covariates_used"] == []
    reasons = {d["name"]: d["reason"] for d in info["covariates_dropped"]}
    assert set(reasons) == {"arm", "age", "site"}
    assert "could not be fitted" in reasons["arm"] and "rank deficient" in reasons["arm"]
    assert reasons["site"] == "the same value for every subject tested"
    assert "not used: site, arm, age" in covariate_lines(info)[0]
    warned = [str(w.message) for w in caught if "not used in the group test" in str(w.message)]
    assert len(warned) == 3 and any("'arm'" in w and "could not be fitted" in w for w in warned)


@pytest.mark.slow
def test_cohort_command_prints_a_warning_line_per_dropped_covariate(tmp_path, capsys):
    from surfacekit.app import cli

    template, _ = sk.synthetic.organ_surface("kidney", 400, seed=100)
    sk.save(template, tmp_path / "template.ply")
    rows = ["subject,path,label,group,role,age,sex", "atlas,template.ply,,,template,,"]
    for i in range(4):
        s, _ = sk.synthetic.organ_surface("kidney", 400, seed=i + 1)
        sk.save(s, tmp_path / f"k{i}.ply")
        rows.append(f"k{i},k{i}.ply,,{('control', 'case')[i % 2]},subject,{50 + i},F")
    (tmp_path / "m.csv").write_text("\n".join(rows) + "\n")
    code = cli.main(["cohort", str(tmp_path / "m.csv"), "-o", str(tmp_path / "out"),
                     "--target-vertices", "400", "--permutations", "49"])
    err = capsys.readouterr().err
    assert code == 0
    assert "surfacekit: warning: covariate 'sex' not used in the group test: the same value" in err
    assert "covariates used: age; not used: sex" in err
    summary = json.loads((tmp_path / "out" / "run_summary.json").read_text())
    assert summary["group_test"]["covariates_dropped"][0]["name"] == "sex"
