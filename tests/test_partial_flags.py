"""Flags of the partial route: a flipped placement that fits almost as well (AmbiguousMatchWarning,
fixed by landmark pairs) and a part that is no part of the whole (NoMatchWarning, low_confidence).
Synthetic shapes with known truth (tests/groundtruth.py, tests/partialtruth.py)."""
from __future__ import annotations

import warnings

import numpy as np
import pytest
from groundtruth import make_pair
from partialtruth import crop_pair, partial_error
from scipy.spatial import cKDTree

import surfacekit as sk
from surfacekit.correspondence.mismatch import PARTIAL_AREA, PARTIAL_MISFIT, partial_check
from surfacekit.correspondence.partial import RIVAL_DEFORMED_WITHIN, RIVAL_WITHIN, _ambiguity
from surfacekit.mesh.sampling import farthest_points


def _match(source, target, options=None):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        corr = sk.match(source, target, options)
    return corr, {w.category for w in caught}


def _true_landmarks(p, n: int = 3) -> tuple:
    """`n` well-spread covered whole vertices and the part vertices nearest their true images."""
    covered = np.flatnonzero(p.covered)
    ids = covered[farthest_points(p.source.vertices[covered], n, seed=5)]
    face, bary = p.source_truth
    pts = np.einsum("nk,nkd->nd", bary[ids], p.whole_target.vertices[p.whole_target.faces[face[ids]]])
    return tuple(zip(ids.tolist(), cKDTree(p.target.vertices).query(pts)[1].tolist()))


def test_partial_check_thresholds():
    ok = partial_check(0.5 * PARTIAL_MISFIT, 0.7)
    assert not ok["low_confidence"] and ok["score"] == pytest.approx(0.5)
    assert partial_check(1.2 * PARTIAL_MISFIT, 0.7)["low_confidence"]
    small = partial_check(0.1 * PARTIAL_MISFIT, 0.5 * PARTIAL_AREA[0])
    assert small["low_confidence"] and small["score"] == pytest.approx(2.0)
    assert "area ratio" in small["note"]
    assert partial_check(0.1 * PARTIAL_MISFIT, 2.0 * PARTIAL_AREA[1])["low_confidence"]


def test_flip_verdict_thresholds():
    rival = {"energy_ratio": 0.5 * (RIVAL_WITHIN + RIVAL_DEFORMED_WITHIN), "angle_deg": 175.0}
    assert not _ambiguity(rival, 0, deformed=False)["ambiguous"]  # rigid misfits: the tight bound
    with pytest.warns(sk.AmbiguousMatchWarning, match="landmark pairs"):
        assert _ambiguity(rival, 0, deformed=True)["flip"]
    assert _ambiguity(rival, 3, deformed=True) is None  # landmark pairs fix the pose
    assert not _ambiguity(None, 0, deformed=True)["ambiguous"]


@pytest.fixture(scope="module")
def kidney_crop():
    pair = make_pair("kidney", "growth", n_source=1500, n_target=1800, seed=302)
    return crop_pair(pair, 0.3, seed=302)


def test_crop_of_the_same_organ_is_not_flagged(kidney_crop):
    corr, caught = _match(kidney_crop.source, kidney_crop.target)
    assert corr.info["route"] == "partial"
    assert not corr.low_confidence and sk.NoMatchWarning not in caught
    assert corr.info["match_check"]["score"] < 0.8
    assert partial_error(kidney_crop, corr.target_to_source, kidney_crop.source).mean() < 0.03


def test_crop_of_a_kidney_on_a_liver_is_flagged(kidney_crop):
    liver = make_pair("liver", "none", n_source=1500, n_target=1800, seed=310).source
    corr, caught = _match(liver, kidney_crop.target)
    assert corr.info["route"] == "partial"
    assert corr.low_confidence and sk.NoMatchWarning in caught
    assert "part of the whole" in corr.info["match_check"]["note"]


@pytest.mark.slow
def test_flipped_ventricle_crop_is_flagged_and_landmarks_fix_it():
    """The benchmark's cropped ventricle under anisotropic growth: its flipped placement fits
    almost as well, so the map is flagged; three true landmark pairs fix it."""
    pair = make_pair("ventricle", "anisotropic", n_source=3000, n_target=3600, seed=333)
    share = float(np.random.default_rng(333).uniform(0.1, 0.5))
    p = crop_pair(pair, share, 333)
    corr, caught = _match(p.source, p.target)
    assert corr.info["rotation_ambiguity"]["ambiguous"] and sk.AmbiguousMatchWarning in caught
    assert not corr.low_confidence
    assert partial_error(p, corr.target_to_source, p.source).mean() < 0.08
    fixed, caught = _match(p.source, p.target, sk.MatchOptions(landmarks=_true_landmarks(p)))
    assert fixed.info["rotation_ambiguity"] is None and sk.AmbiguousMatchWarning not in caught
    assert partial_error(p, fixed.target_to_source, p.source).mean() < 0.06
