"""Partial-to-whole correspondence: a cropped surface mapped into the whole organ, change measured
on the overlap only, and completion of a cropped surface (synthetic shapes with known truth)."""
from __future__ import annotations

import warnings

import numpy as np
import pytest
from groundtruth import make_pair
from partialtruth import crop_pair, iou, make_partial, partial_error, swap

import surfacekit as sk
from surfacekit.correspondence.partial import cut_loops, detect_partial


@pytest.fixture(scope="module")
def hemisphere():
    """A sphere (1500 vertices) and a hemisphere cut from another triangulation of it (same frame)."""
    pair = make_pair("sphere", "none", n_source=1500, n_target=1800, seed=41, rotate=False)
    return crop_pair(pair, 0.5, seed=3)


@pytest.fixture(scope="module")
def hemisphere_match(hemisphere):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", sk.AmbiguousMatchWarning)
        return sk.match(hemisphere.source, hemisphere.target)


@pytest.fixture(scope="module")
def kidney_crop():
    """A kidney in a random pose with 30% of the follow-up's area cut away (no other change)."""
    return make_partial("kidney", "none", 0.3, n_source=1500, n_target=1800, seed=23)


@pytest.fixture(scope="module")
def kidney_match(kidney_crop):
    return sk.match(kidney_crop.source, kidney_crop.target)


def test_hemisphere_maps_into_the_sphere(hemisphere, hemisphere_match):
    corr = hemisphere_match
    assert corr.info["route"] == "partial"
    assert corr.info["partial"]["side"] == "target"
    assert corr.target_overlap.all()  # every vertex of the part has a partner
    assert iou(corr.source_overlap, hemisphere.covered) >= 0.95
    err = partial_error(hemisphere, corr.target_to_source, hemisphere.source)
    assert err.mean() <= 0.02


def test_hemisphere_as_the_source(hemisphere):
    """The other side partial: the cropped surface as the source maps into the whole target."""
    q = swap(hemisphere)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", sk.AmbiguousMatchWarning)
        corr = sk.match(q.source, q.target)
    assert corr.info["partial"]["side"] == "source"
    assert corr.source_overlap.all()
    assert iou(corr.target_overlap, hemisphere.covered) >= 0.95
    assert partial_error(hemisphere, corr.source_to_target, hemisphere.source).mean() <= 0.02


def test_slanted_diagonal_slope_is_the_area_ratio(hemisphere_match, kidney_match):
    """Rodolà, Cosmo, Bronstein, Torsello & Cremers, "Partial functional correspondence",
    Computer Graphics Forum 2017, §4: the functional map from a whole to its part lies along a
    slanted diagonal whose slope is the area ratio part / whole."""
    for corr in (hemisphere_match, kidney_match):
        info = corr.info["partial"]
        assert info["fmap_slope"] == pytest.approx(info["area_ratio"], rel=0.10)
        assert info["indicator_iou"] > 0.85  # the soft indicator agrees with the covered region


def test_cropped_kidney_in_a_random_pose(kidney_crop, kidney_match):
    corr = kidney_match
    assert iou(corr.source_overlap, kidney_crop.covered) >= 0.93
    assert partial_error(kidney_crop, corr.target_to_source, kidney_crop.source).mean() <= 0.025
    # the whole's vertices beyond the crop match nothing: no confidence there
    assert np.all(corr.confidence >= 0) and corr.source_confidence[~corr.source_overlap].max() == 0
    # the rigid pose is the applied motion (the follow-up was only moved and cropped)
    rms = np.sqrt(np.mean(np.sum((corr.rigid.apply(kidney_crop.source.vertices[kidney_crop.covered])
                                  - _true_points(kidney_crop)) ** 2, axis=1)))
    assert rms < 1.0  # mm, on a kidney of ~110 mm


def _true_points(p):
    """True positions on the uncropped follow-up of the covered source vertices."""
    from groundtruth import locate_on_sphere_mesh  # noqa: F401  (documentation of where truth comes from)

    pair = make_pair("kidney", "none", n_source=1500, n_target=1800, seed=23)
    face, bary = pair.source_truth
    v = pair.target.vertices[pair.target.faces[face]]
    return np.einsum("nk,nkd->nd", bary, v)[p.covered]


def test_whole_pairs_and_small_holes_stay_whole(hemisphere):
    whole = hemisphere.source
    assert detect_partial(whole, whole) is None
    assert detect_partial(hemisphere.target, whole, "no") is None
    forced = detect_partial(whole, whole.copy_with(vertices=whole.vertices * 0.5), "yes")
    assert forced["side"] == "target" and forced["forced"]
    # a small hole (a defect, not a crop) is not a cut
    holed = sk.Surface(whole.vertices, whole.faces[1:])
    assert not any(loop["cut"] for loop in cut_loops(holed))
    assert detect_partial(holed, whole) is None
    with pytest.raises(ValueError, match="partial must be"):
        sk.MatchOptions(partial="maybe").validate()


def test_forced_off_takes_the_whole_route(hemisphere):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        corr = sk.match(hemisphere.source, hemisphere.target, sk.MatchOptions(partial="no"))
    assert corr.info["route"] != "partial" and not corr.is_partial


def test_overlap_masks_are_saved_and_old_files_load(tmp_path, hemisphere_match):
    path = hemisphere_match.save(tmp_path / "map.npz")
    back = sk.Correspondence.load(path)
    assert np.array_equal(back.source_overlap, hemisphere_match.source_overlap)
    assert back.target_overlap.all() and back.is_partial
    assert back.options.partial == "auto"
    # a file without the masks (whole-to-whole, or written before they existed)
    old = sk.Correspondence(np.array([1, 0]), np.array([1, 0]))
    back = sk.Correspondence.load(old.save(tmp_path / "old.npz"))
    assert back.source_overlap.tolist() == [True, True] and not back.is_partial
    with np.load(tmp_path / "old.npz") as data:
        assert "source_overlap" not in data.files


# ------------------------------------------------------------------ completion
def test_completion_of_a_cut_sphere_has_the_sphere_volume(hemisphere, hemisphere_match):
    """Volume of a ball, 4/3 π r³ (r = 30 mm, the synthetic sphere of sk.synthetic)."""
    done = sk.complete(hemisphere.target, hemisphere.source, hemisphere_match)
    assert done.surface.is_closed
    assert done.volume_mm3 == pytest.approx(4.0 / 3.0 * np.pi * 30.0**3, rel=0.03)
    assert 0.4 < done.filled_volume_share < 0.6  # half the ball came from the reference
    assert done.filled[: hemisphere.target.n_vertices].sum() == 0
    np.testing.assert_array_equal(done.surface.vertices[: hemisphere.target.n_vertices],
                                  hemisphere.target.vertices)
    assert "estimate" in done.summary()["volume_note"]


def test_completion_of_a_cropped_kidney(kidney_crop, kidney_match):
    done = sk.complete(kidney_crop.target, kidney_crop.source, kidney_match)
    assert done.volume_mm3 == pytest.approx(kidney_crop.whole_target.volume, rel=0.05)
    with pytest.raises(sk.SurfaceError, match="nothing to complete"):
        sk.complete(kidney_crop.source, kidney_crop.source,
                    sk.Correspondence(np.arange(kidney_crop.source.n_vertices),
                                      np.arange(kidney_crop.source.n_vertices),
                                      rigid=kidney_match.rigid))


# ------------------------------------------------------------------ change on the overlap
def test_change_is_measured_on_the_overlap_only(kidney_crop, kidney_match):
    rep = sk.measure_change(kidney_crop.source, kidney_crop.target, kidney_match)
    nd = rep.normal_displacement
    assert np.all(np.isnan(nd[~kidney_match.source_overlap]))
    assert np.all(np.isnan(rep.log_area_ratio[~kidney_match.source_overlap]))
    measured = np.isfinite(nd)
    w = kidney_crop.source.vertex_areas
    # no change beyond the crop was applied: no false change where both scans have data
    assert w[measured & (np.abs(np.nan_to_num(nd)) < 0.5)].sum() >= 0.95 * w[measured].sum()
    summary = rep.summary()
    true_share = w[kidney_crop.covered].sum() / w.sum()
    assert summary["overlap_area_fraction"] == pytest.approx(true_share, abs=0.03)
    # measured: the overlap less the band along the cut where the map ends
    assert true_share - 0.12 < summary["covered_area_fraction"] <= summary["overlap_area_fraction"]
    assert np.isnan(summary["volume_change_followup_minus_baseline_ml"])
    assert "sk.complete" in summary["volume_note"]
    assert any("covers only part" in text for text in summary["warnings"])
    assert abs(summary["mean_normal_displacement_outward_mm"]) < 0.2
    assert abs(summary["area_change_followup_minus_baseline_percent"]) < 3.0
    rows = rep.regional_table(labels=(kidney_crop.source.vertices[:, 0] > 0).astype(int))
    assert all(np.isfinite(r["mean_normal_displacement_outward_mm"]) for r in rows if r["n_vertices"])


def test_map_trust_judges_a_partial_map_on_the_overlap(kidney_crop, kidney_match):
    """Coverage, round trip and distortion of a correct partial map are measured where both
    scans have data, so they read as a good map, not as a map that misses part of the whole."""
    from surfacekit.correspondence.evaluation import map_notes, quick_map_quality

    quality = quick_map_quality(kidney_crop.source, kidney_crop.target, kidney_match)
    verdicts = {n["measure"]: n["verdict"] for n in map_notes(quality, kidney_match.info)}
    assert verdicts["coverage"] == "good" and verdicts["round-trip error"] == "good"
    assert verdicts["collapsed area"] != "poor"


def test_a_cut_cap_is_mapped_as_a_part():
    """An ellipsoid with its cap cut off against a grown whole one: the part's route, and the
    change summary names the cropped side (the open-surface rule is tested in
    test_real_surfaces.py with the whole-to-whole route)."""
    base = sk.synthetic.ellipsoid((40.0, 30.0, 25.0), n=1500)
    from partialtruth import keep_faces

    cut, _ = keep_faces(base, base.vertices[base.faces].mean(axis=1)[:, 2] < 18.0)
    follow = sk.synthetic.ellipsoid((42.0, 31.0, 26.0), n=1500, seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", sk.AmbiguousMatchWarning)
        result = sk.compare(cut, follow)
    assert result.correspondence.info["route"] == "partial"
    assert result.correspondence.source_overlap.all()  # every vertex of the part has a partner
    assert any(w.startswith("the baseline covers only part") for w in result.warnings)
