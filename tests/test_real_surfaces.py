"""Real organ surfaces and open surfaces: inspect, prepare, describe, match and change.

The real meshes are the ten large-intestine surfaces of the Visible Human female and
male reference organ models in ``tests/data/real`` (attribution and licence in its
README): open tubes, each segment stored as two nested pieces (outer and inner wall).
The synthetic open surface is an ellipsoid with a cap cut off.  Vertex, piece and
boundary-loop counts below are read from the files themselves.
"""
from __future__ import annotations

import json
import math
import warnings
from pathlib import Path

import numpy as np
import pytest

import surfacekit as sk
from surfacekit.analysis.components import boundary_band, main_component
from surfacekit.app import cli
from surfacekit.mesh.surface import Surface, SurfaceError

REAL = Path(__file__).parent / "data" / "real"
FILES = sorted(REAL.glob("*.vtk"))
#: female/male files of the same segment (the male caecum file is spelled "Cecum")
PAIRS = [("Ascending", "Ascending"), ("Caecum", "Cecum"), ("Rectum", "Rectum"),
         ("Sigmoid", "Sigmoid")]
#: vertices, connected pieces and boundary loops of each file, counted in the files
COUNTS = {"VHF_large-intestine-Ascending": (879, 2, 4), "VHF_large-intestine-Caecum": (463, 2, 4),
          "VHF_large-intestine-Rectum": (965, 2, 2), "VHF_large-intestine-Sigmoid": (1477, 2, 5),
          "VHF_large-intestine": (10137, 1, 15), "VHM_large-intestine-Ascending": (2274, 2, 4),
          "VHM_large-intestine-Cecum": (1658, 2, 5), "VHM_large-intestine-Rectum": (966, 2, 2),
          "VHM_large-intestine-Sigmoid": (1883, 2, 4), "VHM_large-intestine": (15406, 18, 34)}


def run(argv, capsys) -> tuple[int, str, str]:
    code = cli.main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


def pair_files(female: str, male: str) -> tuple[Path, Path]:
    return REAL / f"VHF_large-intestine-{female}.vtk", REAL / f"VHM_large-intestine-{male}.vtk"


def open_piece(path: Path, n: int = 3000) -> Surface:
    """The largest piece of a real segment, resampled to about n vertices, holes left open."""
    surface, _ = sk.prepare(sk.load(path), target_vertices=n, max_hole_edges=0)
    return surface


def cut_cap(surface: Surface, z: float) -> Surface:
    """The faces of `surface` lying wholly below height z, as a new open surface."""
    keep = (surface.vertices[surface.faces][:, :, 2] < z).all(axis=1)
    faces = surface.faces[keep]
    used = np.unique(faces)
    index = np.full(surface.n_vertices, -1)
    index[used] = np.arange(len(used))
    return Surface(surface.vertices[used], index[faces])


#: the whole-to-whole route, where a test is about open surfaces rather than crops
WHOLE_ROUTE = sk.MatchOptions(partial="no")


def quiet_compare(*args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", sk.AmbiguousMatchWarning)
        return sk.compare(*args, **kwargs)


# ------------------------------------------------------------------ the files
def test_all_ten_real_files_ship_with_their_attribution():
    assert sorted(p.stem for p in FILES) == sorted(COUNTS)
    text = " ".join((REAL / "README.md").read_text().split())
    for needed in ("CC BY 4.0", "doi:10.1186/s12911-023-02111-9", "renamed only",
                   "Towards a clinically-based common coordinate framework"):
        assert needed in text


@pytest.mark.parametrize("path", FILES, ids=lambda p: p.stem)
def test_inspect_reports_each_real_surface_as_open(path, capsys, tmp_path):
    code, _, err = run(["inspect", path, "-o", tmp_path / "q.json", "-q"], capsys)
    assert code == 0, err
    summary = json.loads((tmp_path / "q.json").read_text())
    n_vertices, pieces, loops = COUNTS[path.stem]
    assert summary["vertices"] == n_vertices
    assert summary["closed"] is False and not math.isfinite(summary["volume_ml"] or math.nan)
    assert summary["quality"]["n_boundary_loops"] == loops
    assert summary["components"] >= pieces


@pytest.mark.parametrize("path", FILES, ids=lambda p: p.stem)
def test_prepare_gives_one_closed_piece_at_the_vertex_target(path):
    prepared, _ = sk.prepare(sk.load(path), target_vertices=3000)
    assert prepared.n_components == 1 and prepared.is_closed
    assert abs(prepared.n_vertices - 3000) <= 90  # within 3%
    assert math.isfinite(prepared.volume) and prepared.volume > 0


def test_prepare_on_the_command_line_keeps_the_largest_of_18_pieces(capsys, tmp_path):
    out = tmp_path / "male.ply"
    code, stdout, err = run(["prepare", REAL / "VHM_large-intestine.vtk", "-o", out,
                             "--target-vertices", 3000, "--json"], capsys)
    assert code == 0, err
    summary = json.loads(stdout)
    assert summary["before"]["components"] >= 18 and summary["after"]["components"] == 1
    assert sk.load(out).is_closed


@pytest.mark.parametrize("path", FILES, ids=lambda p: p.stem)
def test_describe_runs_on_each_raw_real_surface(path, capsys, tmp_path):
    code, _, err = run(["describe", path, "-o", tmp_path / "d.npz", "--eigenpairs", 20, "-q"],
                       capsys)
    assert code == 0, err
    arrays = sk.load_fields(tmp_path / "d.npz")
    n_vertices, pieces, _ = COUNTS[path.stem]
    assert arrays["hks"].shape[0] == n_vertices and np.all(np.isfinite(arrays["hks"]))
    # one zero eigenvalue per connected piece (the constants on each piece)
    values = np.asarray(arrays["eigenvalues"])
    assert np.sum(values < 1e-6 * values[-1]) >= min(pieces, 20)


# ------------------------------------------------------------------ pieces
def test_match_refuses_two_large_pieces_in_one_line(capsys, tmp_path):
    female, male = pair_files("Caecum", "Cecum")
    code, _, err = run(["match", female, male, "-o", tmp_path / "m.npz"], capsys)
    assert code == 2
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and "Traceback" not in err
    assert "2 large connected pieces" in lines[0] and "prepare" in lines[0]
    assert not (tmp_path / "m.npz").exists()


def _with_speck(surface: Surface, radius: float) -> tuple[Surface, int]:
    """`surface` with a small sphere far away, whose vertices come first."""
    speck = sk.synthetic.icosphere(1, radius=radius)
    v = np.vstack([speck.vertices + [0.0, 0.0, 500.0], surface.vertices])
    f = np.vstack([speck.faces, surface.faces + speck.n_vertices])
    return Surface(v, f), speck.n_vertices


@pytest.fixture(scope="module")
def kidneys():
    base, _ = sk.synthetic.organ_surface("kidney", 900, seed=1)
    follow, _ = sk.synthetic.organ_surface("kidney", 1000, seed=4)
    return base, follow


def test_compare_drops_a_small_piece_and_renumbers_landmarks(kidneys):
    base, follow = kidneys
    noisy, shift = _with_speck(base, 3.0)
    landmarks = ((0, 0), (400, 500), (800, 900))
    clean = quiet_compare(base, follow, options=sk.MatchOptions(landmarks=landmarks))
    shifted = tuple((a + shift, b) for a, b in landmarks)
    result = quiet_compare(noisy, follow, options=sk.MatchOptions(landmarks=shifted))
    speck_share = 4 * math.pi * 9.0 / (4 * math.pi * 9.0 + base.area)  # about, icosphere < sphere
    (message,) = [w for w in result.warnings if "dropped" in w]
    assert "baseline: kept the largest connected piece and dropped 1 small piece" in message
    share = float(message.split("(")[1].split("%")[0]) / 100
    assert 0.5 * speck_share < share < speck_share
    assert result.surfaces[0].n_vertices == base.n_vertices
    np.testing.assert_array_equal(result.correspondence.source_to_target,
                                  clean.correspondence.source_to_target)
    np.testing.assert_array_equal(result.change.normal_displacement,
                                  clean.change.normal_displacement)


def test_main_component_refuses_two_large_pieces():
    a = sk.synthetic.icosphere(2, radius=10.0)
    v = np.vstack([a.vertices, a.vertices + 50.0])
    two = Surface(v, np.vstack([a.faces, a.faces + a.n_vertices]))
    with pytest.raises(SurfaceError, match="2 large connected pieces"):
        main_component(two, "pair")
    piece, kept, notes = main_component(a)
    assert piece is a and notes == [] and len(kept) == a.n_vertices


# ------------------------------------------------------------------ open surfaces
@pytest.fixture(scope="module")
def ellipsoids():
    """A baseline ellipsoid, the same with its top cap cut off, and a grown follow-up."""
    base = sk.synthetic.ellipsoid((40.0, 30.0, 25.0), n=2500)
    follow = sk.synthetic.ellipsoid((42.0, 31.0, 26.0), n=2500, seed=1)
    return base, cut_cap(base, 18.0), follow


def test_open_baseline_leaves_out_the_cut_and_says_so(ellipsoids):
    base, cut, follow = ellipsoids
    closed = quiet_compare(base, follow).change
    # the open-surface rule itself (a cut cap is also a crop, which sk.match would map as a
    # part of the whole: tests/test_partial.py)
    result = quiet_compare(cut, follow, options=WHOLE_ROUTE).change
    summary = result.summary()
    # volume: not reported, with the reason
    assert math.isnan(summary["volume_change_followup_minus_baseline_percent"]) and math.isnan(summary["baseline_volume_ml"])
    assert summary["volume_note"].startswith("volume not reported: the baseline is open: 1 boundary loop")
    (message,) = summary["warnings"]
    assert message.startswith("the baseline is open: 1 boundary loop, ")
    # the follow-up is closed, so exactly the first ring along the baseline's cut is NaN
    band = boundary_band(cut)
    assert band.any()
    np.testing.assert_array_equal(np.isnan(result.normal_displacement), band)
    np.testing.assert_array_equal(np.isnan(result.log_area_ratio), band)
    # metrics count only measured vertices, weighted by their areas
    metrics = result.metrics()
    assert metrics["n_vertices"] == int((~band).sum())
    assert metrics["area_mm2"] == pytest.approx(float(cut.vertex_areas[~band].sum()))
    assert math.isfinite(metrics["mean_normal_displacement_outward_mm"])
    # area change over the covered region: far nearer the closed pair's than whole areas are
    naive = 100 * (follow.area / cut.area - 1)
    assert abs(summary["area_change_followup_minus_baseline_percent"] - closed.area_change_percent) < 8
    assert abs(naive - closed.area_change_percent) > 20
    assert 0.9 < summary["covered_area_fraction"] < 1.0


def test_open_follow_up_is_named_and_closed_pair_is_untouched(ellipsoids):
    base, cut, follow = ellipsoids
    result = quiet_compare(follow, cut, options=WHOLE_ROUTE).change
    assert result.summary()["warnings"][0].startswith("the follow-up is open: 1 boundary loop")
    closed = quiet_compare(base, follow).change
    summary = closed.summary()
    assert summary["warnings"] == [] and "volume_note" not in summary
    assert summary["area_change_followup_minus_baseline_percent"] == pytest.approx(100 * (follow.area / base.area - 1))
    assert not np.isnan(closed.normal_displacement).any()


def test_regions_inside_the_left_out_band_give_empty_rows(ellipsoids, tmp_path):
    _, cut, follow = ellipsoids
    result = quiet_compare(cut, follow, options=WHOLE_ROUTE).change
    labels = boundary_band(cut).astype(int)  # region 1 = the band along the cut
    rows = {r["label"]: r for r in result.regional_table(labels, {0: "inner", 1: "cut ring"})}
    assert rows[1]["n_vertices"] == 0 and rows[1]["area_mm2"] == 0
    assert math.isnan(rows[1]["mean_normal_displacement_outward_mm"])
    assert rows[0]["n_vertices"] == int((labels == 0).sum())
    result.save(tmp_path / "c.npz")
    again = sk.ChangeReport.load(tmp_path / "c.npz")
    assert again.area_change_percent == result.area_change_percent


def _check_real_pair(female: str, male: str):
    base, follow = (open_piece(p) for p in pair_files(female, male))
    assert len(base.boundary_loops) >= 1 and len(follow.boundary_loops) >= 1
    result = quiet_compare(base, follow).change
    summary = result.summary()
    assert [w.split(":")[0] for w in summary["warnings"][:2]] == ["the baseline is open",
                                                                   "the follow-up is open"]
    assert math.isnan(summary["volume_change_followup_minus_baseline_percent"])
    assert math.isfinite(summary["area_change_followup_minus_baseline_percent"])
    assert math.isfinite(summary["mean_normal_displacement_outward_mm"])
    measured = ~np.isnan(result.normal_displacement)
    assert 0.8 < measured.mean() < 1.0


def test_real_caecum_pair_is_compared_as_open_surfaces():
    _check_real_pair("Caecum", "Cecum")


@pytest.mark.slow
@pytest.mark.parametrize("female,male", [p for p in PAIRS if p[0] != "Caecum"],
                         ids=lambda s: s if isinstance(s, str) else None)
def test_other_real_pairs_are_compared_as_open_surfaces(female, male):
    _check_real_pair(female, male)


def test_change_command_on_a_real_open_pair_warns_everywhere(capsys, tmp_path):
    paths = []
    for name, path in zip(("female.ply", "male.ply"), pair_files("Rectum", "Rectum")):
        sk.save(open_piece(path), tmp_path / name)
        paths.append(tmp_path / name)
    out = tmp_path / "change"
    code, stdout, err = run(["change", *paths, "-o", out, "--json"], capsys)
    assert code == 0, err
    summary = json.loads(stdout)
    open_lines = [w for w in summary["warnings"] if " is open: " in w]
    assert len(open_lines) == 2
    for line in open_lines:
        assert f"surfacekit: warning: {line}" in err
    report = (out / "report.html").read_text()
    assert "the baseline is open" in report and "the follow-up is open" in report
    assert math.isnan(summary["volume_change_followup_minus_baseline_percent"])


def test_prepared_real_pair_goes_through_match_and_change(capsys, tmp_path):
    female, male = pair_files("Sigmoid", "Sigmoid")
    for src, name in ((female, "f.ply"), (male, "m.ply")):
        code, _, err = run(["prepare", src, "-o", tmp_path / name, "--target-vertices", 3000,
                            "-q"], capsys)
        assert code == 0, err
    code, stdout, err = run(["match", tmp_path / "f.ply", tmp_path / "m.ply",
                             "-o", tmp_path / "map.npz", "--json"], capsys)
    assert code == 0, err
    assert json.loads(stdout)["seconds"] < 60
    code, stdout, err = run(["change", tmp_path / "f.ply", tmp_path / "m.ply", "--map",
                             tmp_path / "map.npz", "-o", tmp_path / "c", "--no-report", "--json"],
                            capsys)
    assert code == 0, err
    summary = json.loads(stdout)
    assert math.isfinite(summary["volume_change_followup_minus_baseline_percent"])  # prepared: closed
    assert not any(" is open: " in w for w in summary["warnings"])
