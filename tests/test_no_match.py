"""Nothing to match: two surfaces that cannot correspond get a warning and a low-confidence flag.

The shapes are invented (``sk.synthetic``); the thresholds come from the benchmark pairs
(``surfacekit.correspondence.tuning``), and these tests use other seeds.
"""
from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from groundtruth import held_out, make_pair

import surfacekit as sk
from surfacekit.app import cli
from surfacekit.app.views import map_trust, trust_report_parts
from surfacekit.correspondence.mismatch import match_check, spectrum_gap


def matched(a, b):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        corr = sk.match(a, b)
    return corr, [w for w in caught if issubclass(w.category, sk.NoMatchWarning)]


@pytest.fixture(scope="module")
def kidney_liver():
    kidney, _ = sk.synthetic.organ_surface("kidney", 700, seed=31)
    liver, _ = sk.synthetic.organ_surface("liver", 800, seed=32)
    liver = sk.Surface(liver.vertices @ sk.synthetic.random_rotation(33).T, liver.faces)
    return kidney, liver, *matched(kidney, liver)


def test_kidney_against_liver_is_flagged(kidney_liver, tmp_path):
    kidney, liver, corr, caught = kidney_liver
    assert corr.low_confidence is True
    assert len(caught) == 1 and "same organ" in str(caught[0].message)
    check = corr.info["match_check"]
    assert check["low_confidence"] and check["score"] >= 1.0
    corr.save(tmp_path / "m.npz")
    assert sk.Correspondence.load(tmp_path / "m.npz").low_confidence is True
    trust = map_trust(corr, kidney, liver)  # what the match summary and report show
    assert trust["low_confidence"] is True and "same organ" in trust["low_confidence_note"]
    summary, tables = trust_report_parts(trust)
    assert summary["low_confidence"] is True
    assert any(row["measure"] == "same organ" and row["verdict"] == "poor"
               for rows in tables.values() for row in rows)


def test_a_deformed_pair_of_one_organ_is_not_flagged(tmp_path):
    (seed,) = held_out(407)
    pair = make_pair("kidney", "mixed", n_source=700, n_target=800, seed=seed)
    corr, caught = matched(pair.source, pair.target)
    assert corr.low_confidence is False and not caught
    assert corr.info["match_check"]["score"] < 1.0
    corr.save(tmp_path / "m.npz")
    with np.load(tmp_path / "m.npz") as z:
        assert "low_confidence" not in z.files  # files of confident maps keep their old layout
    assert sk.Correspondence.load(tmp_path / "m.npz").low_confidence is False


def test_older_files_load_as_confident(tmp_path):
    corr = sk.Correspondence(np.array([1, 0]), np.array([1, 0]))
    assert corr.low_confidence is False
    corr.save(tmp_path / "old.npz")
    assert sk.Correspondence.load(tmp_path / "old.npz").low_confidence is False


def test_spectrum_gap_is_the_published_shape_dna_distance():
    """From the solver's unit-area eigenvalues it equals sk.spectrum_distance on the surfaces
    (the area-normalised spectrum of Reuter, Wolter & Peinecke, Computer-Aided Design 2006)."""
    a, _ = sk.synthetic.organ_surface("kidney", 400, seed=3)
    b, _ = sk.synthetic.organ_surface("ventricle", 400, seed=4)
    vals = []
    for s in (a, b):
        basis = sk.eigenbasis(s, 45)
        vals.append(np.asarray(basis.values) * float(basis.mass.sum()))
    assert spectrum_gap(*vals) == pytest.approx(sk.spectrum_distance(a, b, 40), rel=1e-9)
    assert spectrum_gap(vals[0], vals[0]) == 0.0
    assert match_check(0.0, vals[0], vals[0])["low_confidence"] is False


def test_match_command_summary_carries_the_flag(kidney_liver, tmp_path, capsys):
    kidney, liver, _, _ = kidney_liver
    sk.save(kidney, tmp_path / "kidney.ply")
    sk.save(liver, tmp_path / "liver.ply")
    code = cli.main(["match", str(tmp_path / "kidney.ply"), str(tmp_path / "liver.ply"), "-o",
                     str(tmp_path / "m.npz"), "--report", str(tmp_path / "m.html"), "--json"])
    out = capsys.readouterr()
    assert code == 0, out.err
    summary = json.loads(out.out)
    assert summary["low_confidence"] is True and summary["low_confidence_note"]
    html = (tmp_path / "m.html").read_text()
    assert "<td>Low confidence</td><td>yes</td>" in html
    assert "same organ" in html
