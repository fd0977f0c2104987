"""One comparison, matching only what must be matched (surfacekit.analysis.workflow.compare),
and the ``surfacekit change`` command built on it.

Every call of the correspondence solver is counted by wrapping
``surfacekit.correspondence.solver.match``, through which the pipeline matches.
Shapes are small synthetic kidneys (invented; ``sk.synthetic`` and the demo scenario).
"""
from __future__ import annotations

import json

import numpy as np
import pytest

import surfacekit as sk
from surfacekit.app import cli, demo_data
from surfacekit.correspondence import solver


@pytest.fixture(scope="module")
def shapes():
    base, _ = sk.synthetic.organ_surface("kidney", 700, seed=1)
    follow, _ = demo_data.followup_shape(800, 4.0, seed=5)
    template, sp_t = sk.synthetic.organ_surface("kidney", 600, seed=9)
    return base, follow, template, demo_data.regions(sp_t)


@pytest.fixture
def matches(monkeypatch):
    """The (n_source, n_target, options, seed) of every match run while the test runs."""
    seen = []
    real = solver.match

    def counting(source, target, options=None, *, seed=0):
        seen.append((source.n_vertices, target.n_vertices, options, seed))
        return real(source, target, options, seed=seed)

    monkeypatch.setattr(solver, "match", counting)
    return seen


def test_compare_matches_once_with_the_callers_options_and_seed(shapes, matches):
    base, follow, _, _ = shapes
    options = sk.MatchOptions(same_orientation=False)
    timings = {}
    result = sk.compare(base, follow, options=options, seed=4, timings=timings)
    assert matches == [(700, 800, options, 4)]
    assert isinstance(result, sk.Comparison)
    assert result.correspondence.seed == 4 and result.correspondence.options == options
    assert result.labels is None and result.label_confidence is None
    assert result.template_correspondence is None
    assert set(timings) == {"match", "labels", "change"}
    # the change is measured from that correspondence and its own pose
    np.testing.assert_allclose(result.change.rigid, result.correspondence.rigid.inverse().matrix)


def test_compare_reuses_a_given_map_and_labels_on_the_same_triangulation(shapes, matches):
    base, follow, _, _ = shapes
    corr = solver.match(base, follow, seed=2)
    matches.clear()
    labels = (base.vertices[:, 0] > base.centroid[0]).astype(np.int64) + 1
    template = base.copy_with(vertices=base.vertices + 50.0)  # same triangles, other pose
    result = sk.compare(base, follow, correspondence=corr, template=template,
                        template_labels=labels, region_names={1: "left", 2: "right"})
    assert matches == []
    assert result.correspondence is corr and result.template_correspondence is None
    np.testing.assert_array_equal(result.labels, labels)
    assert [r["name"] for r in result.change.regional_table()] == ["left", "right"]
    assert np.all((result.label_confidence > 0) & (result.label_confidence <= 1))


def test_compare_with_a_template_matches_each_pair_once(shapes, matches):
    base, follow, template, t_labels = shapes
    options = sk.MatchOptions(same_orientation=True, landmarks=((0, 0), (5, 7)))
    result = sk.compare(base, follow, options=options, seed=6, template=template,
                        template_labels=t_labels)
    assert [(m[0], m[1], m[3]) for m in matches] == [(700, 800, 6), (600, 700, 6)]
    assert matches[0][2] == options
    # the landmark pairs index baseline and follow-up vertices: not given to the template match
    assert matches[1][2].same_orientation is True and matches[1][2].landmarks == ()
    assert result.template_correspondence.n_source == 600
    assert set(np.unique(result.labels)) <= {1, 2, 3, 4}
    np.testing.assert_array_equal(result.change.labels, result.labels)
    with pytest.raises(ValueError, match="template_labels"):
        sk.compare(base, follow, correspondence=result.correspondence, template=template)


# ------------------------------------------------------------------ the change command
@pytest.fixture(scope="module")
def files(shapes, tmp_path_factory):
    base, follow, template, t_labels = shapes
    d = tmp_path_factory.mktemp("workflow")
    sk.save(base, d / "base.ply")
    sk.save(follow, d / "follow.ply")
    sk.save(template, d / "template.ply", fields={"region": t_labels})
    same = (base.vertices[:, 2] > base.centroid[2]).astype(np.int64) + 1
    sk.save(base, d / "labelled_base.ply", fields={"region": same})
    return d


def _change(argv, capsys) -> dict:
    code = cli.main([str(a) for a in ["change", *argv, "--json", "-q", "--no-report"]])
    out = capsys.readouterr()
    assert code == 0, out.err
    return json.loads(out.out)


def test_change_without_regions_runs_exactly_one_match(files, matches, tmp_path, capsys):
    _change([files / "base.ply", files / "follow.ply", "-o", tmp_path / "c", "--seed", "3",
             "--pose", "same"], capsys)
    assert [(m[0], m[1], m[3]) for m in matches] == [(700, 800, 3)]
    assert matches[0][2].same_orientation is True


def test_change_with_map_and_regions_on_the_baseline_mesh_runs_no_match(files, matches,
                                                                         tmp_path, capsys):
    code = cli.main([str(a) for a in ["match", files / "base.ply", files / "follow.ply",
                                      "-o", tmp_path / "map.npz", "--seed", "3", "-q"]])
    assert code == 0
    matches.clear()
    _change([files / "base.ply", files / "follow.ply", "-o", tmp_path / "c", "--seed", "3",
             "--map", tmp_path / "map.npz", "--regions", files / "labelled_base.ply"], capsys)
    assert matches == []
    rows = (tmp_path / "c" / "change.csv").read_text().splitlines()
    assert [r.split(",")[1] for r in rows[1:]] == ["region_1", "region_2"]


def test_change_with_a_separate_template_runs_one_match_per_pair(files, matches, tmp_path,
                                                                  capsys):
    _change([files / "base.ply", files / "follow.ply", "-o", tmp_path / "c", "--seed", "5",
             "--pose", "any", "--regions", files / "template.ply"], capsys)
    assert [(m[0], m[1], m[3]) for m in matches] == [(700, 800, 5), (600, 700, 5)]
    assert all(m[2].same_orientation is False for m in matches)
