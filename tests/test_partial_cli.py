"""``match`` and ``change`` on a cropped follow-up: --partial, the covered region in the summaries,
and the report's grey "not measured" region with its legend (synthetic kidney, invented shape)."""
from __future__ import annotations

import json

import numpy as np
import pytest
from partialtruth import make_partial

import surfacekit as sk
from surfacekit.app import cli


def run(argv, capsys) -> tuple[int, dict, str]:
    code = cli.main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, (json.loads(out.out) if code == 0 and out.out.strip() else {}), out.err


@pytest.fixture(scope="module")
def cropped(tmp_path_factory):
    """A kidney baseline and its follow-up with 30% of the area cut away, in another pose."""
    d = tmp_path_factory.mktemp("cropped")
    p = make_partial("kidney", "none", 0.3, n_source=900, n_target=1000, seed=29)
    sk.save(p.source, d / "base.ply")
    sk.save(p.target, d / "cropped.ply")
    return d, p


def test_match_reports_the_covered_region(cropped, capsys, tmp_path):
    d, p = cropped
    code, summary, err = run(["match", d / "base.ply", d / "cropped.ply", "-o", tmp_path / "map.npz",
                              "--report", tmp_path / "map.html", "--json"], capsys)
    assert code == 0, err
    assert summary["cropped_surface"] == "target"
    w = p.source.vertex_areas
    assert summary["covered_fraction_of_whole"] == pytest.approx(w[p.covered].sum() / w.sum(), abs=0.06)
    assert "covers only part" in summary["partial_note"]
    corr = sk.Correspondence.load(tmp_path / "map.npz")
    assert corr.is_partial and corr.target_overlap.all()
    html = (tmp_path / "map.html").read_text(encoding="utf-8")
    assert "covered region" in html and "covered by both scans" in html


def test_partial_no_forbids_the_partial_route(cropped, capsys, tmp_path):
    d, _ = cropped
    code, summary, err = run(["match", d / "base.ply", d / "cropped.ply", "-o", tmp_path / "map.npz",
                              "--partial", "no", "--json", "-q"], capsys)
    assert code == 0, err
    assert "cropped_surface" not in summary
    assert not sk.Correspondence.load(tmp_path / "map.npz").is_partial
    code, _, err = run(["match", d / "base.ply", d / "cropped.ply", "-o", tmp_path / "m2.npz",
                        "--partial", "maybe"], capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1


def test_change_measures_the_overlap_and_greys_the_rest(cropped, capsys, tmp_path):
    d, _ = cropped
    out = tmp_path / "change"
    code, summary, err = run(["change", d / "base.ply", d / "cropped.ply", "-o", out, "--json"], capsys)
    assert code == 0, err
    assert 0.6 < summary["overlap_area_fraction"] < 0.8
    assert summary["covered_area_fraction"] <= summary["overlap_area_fraction"]
    assert summary["cropped_surface"] == "target"
    assert "covers only part" in err  # the warning line on stderr
    fields = np.load(out / "change.npz")
    assert np.isnan(fields["normal_displacement"]).any()
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "not measured" in html and "covered region" in html
