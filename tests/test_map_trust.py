"""Plain notes on how far to trust a map: coverage, round trip, distortion, turn."""
from __future__ import annotations

import json

import numpy as np
import pytest
from groundtruth import held_out, make_pair

import surfacekit as sk
from surfacekit.app import cli
from surfacekit.correspondence.evaluation import (
    map_note_lines,
    map_notes,
    map_quality,
    quick_map_quality,
)


@pytest.fixture(scope="module")
def kidney():
    pair = make_pair("kidney", "growth", n_source=900, n_target=1000, seed=3)
    return pair, sk.match(pair.source, pair.target, seed=0)


def _verdicts(notes):
    return {n["measure"]: n["verdict"] for n in notes}


def test_matched_map_reads_good_and_random_map_poor(kidney):
    pair, corr = kidney
    good = _verdicts(map_notes(quick_map_quality(pair.source, pair.target, corr), corr.info))
    assert good["coverage"] == good["round-trip error"] == good["area distortion"] == "good"
    rng = np.random.default_rng(0)
    rand = sk.Correspondence(rng.integers(0, pair.target.n_vertices, pair.source.n_vertices),
                             rng.integers(0, pair.source.n_vertices, pair.target.n_vertices))
    bad = _verdicts(map_notes(quick_map_quality(pair.source, pair.target, rand)))
    assert bad["coverage"] == bad["round-trip error"] == bad["area distortion"] == "poor"


def test_quick_round_trip_agrees_with_the_geodesic_one(kidney):
    """For small errors the straight-line round trip is close to the geodesic one
    (same normalisation by sqrt(area)); coverage and distortion are the same numbers."""
    pair, corr = kidney
    quick = quick_map_quality(pair.source, pair.target, corr)
    full = map_quality(pair.source, pair.target, corr, n_samples=300)
    geo = max(full["round_trip_source_mean"], full["round_trip_target_mean"])
    assert quick["round_trip_mean"] == pytest.approx(geo, rel=0.6, abs=0.003)
    for key in ("coverage_target", "coverage_source", "collapsed_area_fraction"):
        assert quick[key] == pytest.approx(full[key], rel=1e-12)


def test_every_note_has_a_meaning_and_a_measured_rule(kidney):
    pair, corr = kidney
    notes = map_notes(quick_map_quality(pair.source, pair.target, corr), corr.info)
    assert [n["measure"] for n in notes] == ["turn or flip", "same organ", "coverage",
                                             "round-trip error", "area distortion", "collapsed area"]
    for n in notes[1:]:
        assert n["verdict"] in ("good", "fair", "poor") and "benchmark" in n["rule"]
    assert len(map_note_lines(notes)) == len(notes)


def test_change_carries_the_turn_note_and_the_map_notes(tmp_path, capsys):
    """On the round-sectioned ventricle the turn is open: `change` says so in its summary,
    its report and the terminal, beside the map-quality notes; `match` the same."""
    p = make_pair("ventricle", "growth", n_source=900, n_target=1000, seed=held_out(5)[0])
    a, b, out_dir = tmp_path / "a.ply", tmp_path / "b.ply", tmp_path / "out"
    for surface, path in ((p.source, a), (p.target, b)):
        sk.save(surface, path)
    assert cli.main(["change", str(a), str(b), "-o", str(out_dir), "--json"]) == 0
    out = capsys.readouterr()
    summary = json.loads(out.out)
    assert summary["rotation_ambiguous"] is True and "turned" in summary["rotation_note"]
    assert "landmark" in out.err
    measures = [n["measure"] for n in summary["map_notes"]]
    assert measures[0] == "turn or flip" and summary["map_notes"][0]["verdict"] == "check"
    assert {"coverage", "round-trip error", "collapsed area"} <= set(measures)
    assert len(summary["map_notes_text"]) == len(measures)
    html = (out_dir / "report.html").read_text()
    assert "the map may be turned" in html and "How far to trust the map" in html
    assert "rule of thumb" in html.lower()
    code = cli.main(["match", str(a), str(b), "-o", str(tmp_path / "m.npz"), "--json",
                     "--report", str(tmp_path / "m.html")])
    summary = json.loads(capsys.readouterr().out)
    assert code == 0 and summary["map_notes"][0]["verdict"] == "check"
    assert "How far to trust the map" in (tmp_path / "m.html").read_text()
