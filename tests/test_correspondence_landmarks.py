"""Landmark pairs in the correspondence solver, the rotation-ambiguity probe and landmark files.

Outside references: the heat kernel of the round sphere from the addition theorem
of spherical harmonics (DLMF §14.30.9, common practice); correspondence truth from
the sphere parameters of the synthetic organs (independent of the solver).

The probe's thresholds (``AMBIGUOUS_BELOW``, ``TURN_BELOW``, ``ROOM_ABOVE``,
``RIVAL_WITHIN``) and the solver's energy weights were tuned on the benchmark pairs
(``groundtruth.benchmark_pairs``, generator seeds ``100 s + 7 i + j``); every generator
pair here uses held-out seeds (``groundtruth.held_out`` refuses a tuning seed).
Landmark pairs are imposed on the map verbatim, so accuracy is always measured at
the vertices that are not landmarks.
"""
import json
import warnings

import numpy as np
import pytest
from groundtruth import held_out, make_pair
from scipy.spatial import cKDTree
from scipy.special import eval_legendre

import surfacekit as sk
from surfacekit.app import cli
from surfacekit.correspondence.fmap import SpectralShape, landmark_descriptors
from surfacekit.mesh.sampling import farthest_points


def true_partners(pair, source_ids):
    """Target vertex nearest to the true image of each source vertex (outside truth)."""
    face, bary = pair.source_truth
    truth = np.einsum("nk,nkd->nd", bary[source_ids], pair.target.vertices[pair.target.faces[face[source_ids]]])
    return cKDTree(pair.target.vertices).query(truth)[1]


def test_landmark_heat_kernels_match_the_sphere_series():
    """On the unit-area sphere, eigenvalues l(l+1)/r² with r² = 1/(4π), λ_1 = 2/r², so the
    column for time t is Σ_l (2l+1)/(4π r²) exp(-t l(l+1)/2) P_l(cos θ) (addition theorem,
    DLMF §14.30.9), truncated at l = 6 (49 eigenpairs = complete bands).  Compared after
    the same unit-norm scaling; tolerance 2% of the peak (discretisation, from the
    eigenvalue errors of ~0.5% at this resolution)."""
    s = sk.synthetic.icosphere(4)  # 2562 vertices, unit sphere
    basis = sk.eigenbasis(s, 49)
    shape = SpectralShape.from_basis(s, basis)
    landmark = 17
    times = (0.1, 0.4)
    d = landmark_descriptors(shape, np.array([landmark]), k=49, times=times)
    u = s.vertices / np.linalg.norm(s.vertices, axis=1, keepdims=True)
    cos = np.clip(u @ u[landmark], -1, 1)
    for c, t in enumerate(times):
        series = sum((2 * l + 1) * np.exp(-t * l * (l + 1) / 2) * eval_legendre(l, cos) for l in range(7))
        series /= np.sqrt(shape.mass @ series**2)
        assert np.max(np.abs(d[:, c] - series)) < 0.02 * series.max(), t


@pytest.fixture(scope="module")
def ventricle_pair():
    """The synthetic ventricle (round cross-section) after bending, local growth, anisotropic
    growth and noise: its roll about the long axis is hardly fixed by shape.  Seed 5 is
    the first held-out seed, not chosen for its result."""
    return make_pair("ventricle", "mixed", n_source=2000, n_target=2400, seed=held_out(5)[0])


def test_landmarks_fix_a_near_symmetric_ventricle(ventricle_pair):
    """Without landmarks the solver warns that a turn is undetermined; with three true
    pairs (outside truth) the map is imposed at the landmarks and, measured only at the
    other vertices against the sphere-parameter truth, clearly better than without
    (0.027 -> 0.016 of sqrt(area) measured)."""
    p = ventricle_pair
    with pytest.warns(sk.AmbiguousMatchWarning, match="landmark pairs"):
        plain = sk.match(p.source, p.target)
    assert plain.info["rotation_ambiguity"]["ambiguous"]
    ids = farthest_points(p.source.vertices, 3, seed=5)
    partners = true_partners(p, ids)
    opts = sk.MatchOptions(landmarks=tuple(zip(ids.tolist(), partners.tolist())))
    with warnings.catch_warnings():
        warnings.simplefilter("error", sk.AmbiguousMatchWarning)  # two or more pairs: no probe
        fixed = sk.match(p.source, p.target, opts)
    assert fixed.info["rotation_ambiguity"] is None
    np.testing.assert_array_equal(fixed.source_to_target[ids], partners)
    face, bary = p.source_truth
    idx = np.setdiff1d(np.arange(0, p.source.n_vertices, 10), ids)  # never a landmark
    err_fixed = sk.geodesic_error(p.target, fixed.source_to_target[idx], (face[idx], bary[idx])).mean()
    err_plain = sk.geodesic_error(p.target, plain.source_to_target[idx], (face[idx], bary[idx])).mean()
    assert err_fixed < 0.025, err_fixed
    assert err_fixed < 0.8 * err_plain, (err_fixed, err_plain)


def test_no_ambiguity_warning_on_a_distinctive_kidney():
    """The kidney's hilum and curvature fix every rotation: on three held-out generator
    seeds the probe's misfit ratio is well above its threshold 1.2 (1.6-2.0 measured)
    and nothing is warned."""
    for seed in held_out(5, 12, 19):
        p = make_pair("kidney", "growth", n_source=1500, n_target=1800, seed=seed)
        with warnings.catch_warnings():
            warnings.simplefilter("error", sk.AmbiguousMatchWarning)
            corr = sk.match(p.source, p.target)
        amb = corr.info["rotation_ambiguity"]
        assert not amb["ambiguous"] and amb["ratio"] > 1.3, (seed, amb["ratio"])


def test_landmark_files_round_trip_and_bad_files(tmp_path):
    s = sk.synthetic.icosphere(2)
    corr = sk.Correspondence(source_to_target=np.arange(s.n_vertices), target_to_source=np.arange(s.n_vertices))
    lm = corr.landmarks(s, s, 6)
    for name in ("lm.csv", "lm.npz"):
        sk.save_landmarks(lm, tmp_path / name)
        got = sk.load_landmarks(tmp_path / name)
        np.testing.assert_array_equal(got, np.stack([lm["source_index"], lm["target_index"]], axis=1))
    (tmp_path / "bare.csv").write_text("3,5\n7,11\n")
    np.testing.assert_array_equal(sk.load_landmarks(tmp_path / "bare.csv"), [[3, 5], [7, 11]])
    (tmp_path / "bad.csv").write_text("3,5\n7,x\n")
    with pytest.raises(ValueError, match="row 2 does not hold two vertex indices"):
        sk.load_landmarks(tmp_path / "bad.csv")
    (tmp_path / "head.csv").write_text("a,b\n1,2\n")
    with pytest.raises(ValueError, match="source_vertex"):
        sk.load_landmarks(tmp_path / "head.csv")
    (tmp_path / "neg.csv").write_text("-1,2\n")
    with pytest.raises(ValueError, match="non-negative"):
        sk.load_landmarks(tmp_path / "neg.csv")
    with pytest.raises(ValueError, match="no such landmark file"):
        sk.load_landmarks(tmp_path / "missing.csv")


def test_command_line_takes_landmarks(tmp_path, capsys):
    """'match --landmarks' hands the file's pairs to the solver: the written map is the
    library's map with those pairs, bit for bit, and differs from the map without them (the
    pairs here are arbitrary, so this checks the plumbing, not accuracy); a bad file is one
    error line, exit 2, and nothing is written."""
    a, _ = sk.synthetic.organ_surface("kidney", 700, seed=1)
    b, _ = sk.synthetic.organ_surface("kidney", 800, seed=2)
    sk.save(a, tmp_path / "a.ply")
    sk.save(b, tmp_path / "b.ply")
    (tmp_path / "pairs.csv").write_text("source_vertex,target_vertex\n0,5\n100,120\n300,333\n")
    code = cli.main([str(x) for x in ("match", tmp_path / "a.ply", tmp_path / "b.ply", "-o",
                                      tmp_path / "m.npz", "--landmarks", tmp_path / "pairs.csv", "--json")])
    out = capsys.readouterr()
    assert code == 0, out.err
    assert json.loads(out.out)["landmark_pairs"] == 3
    corr = sk.Correspondence.load(tmp_path / "m.npz")
    a, b = sk.load(tmp_path / "a.ply"), sk.load(tmp_path / "b.ply")
    pairs = sk.MatchOptions(landmarks=((0, 5), (100, 120), (300, 333)))
    library = sk.match(a, b, pairs, seed=0)
    np.testing.assert_array_equal(corr.source_to_target, library.source_to_target)
    np.testing.assert_array_equal(corr.target_to_source, library.target_to_source)
    assert not np.array_equal(corr.source_to_target, sk.match(a, b, seed=0).source_to_target)
    (tmp_path / "broken.csv").write_text("source_vertex,target_vertex\n0,zz\n")
    code = cli.main([str(x) for x in ("match", tmp_path / "a.ply", tmp_path / "b.ply", "-o",
                                      tmp_path / "m2.npz", "--landmarks", tmp_path / "broken.csv")])
    err = [line for line in capsys.readouterr().err.splitlines() if line.strip()]
    assert code == 2 and len(err) == 1 and "row 2" in err[0]
    assert not (tmp_path / "m2.npz").exists()


def test_turn_probe_escapes_the_pose_pulled_off_by_anisotropic_growth():
    """A liver grown 15% / -8% / 5% along random axes: the rigid pose search can stop off
    the true pose, and adopting the probe's better-fitting turned pose improves the map
    (truth from the sphere parameters).  The probe's thresholds were tuned on the
    benchmark pairs; seeds 37 and 48 are the held-out seeds among 26-62 on which the
    probe turns the pose at all (found by scanning them; measured error without the
    turn 0.058 and 0.059 of sqrt(area), with it 0.046 and 0.043)."""
    for seed in held_out(37, 48):
        p = make_pair("liver", "anisotropic", n_source=2000, n_target=2400, seed=seed)
        face, bary = p.source_truth
        idx = np.arange(0, p.source.n_vertices, 10)

        def error(corr, p=p, idx=idx, face=face, bary=bary):
            return sk.geodesic_error(p.target, corr.source_to_target[idx], (face[idx], bary[idx])).mean()

        stuck = sk.match(p.source, p.target, sk.MatchOptions(max_turns=0))
        turned = sk.match(p.source, p.target)
        assert turned.info["rotation_ambiguity"]["turns"] >= 1, seed
        assert error(turned) < 0.05 and error(turned) < 0.85 * error(stuck), (seed, error(stuck), error(turned))
        assert not turned.info["rotation_ambiguity"]["ambiguous"], seed


def test_curvature_patch_descriptors_are_rigid_and_order_invariant():
    """Patch descriptors of mean curvature on a rotated, vertex-permuted copy equal the
    original's, vertex by vertex (intrinsic quantities; common practice)."""
    from surfacekit.correspondence.fmap import curvature_patch_descriptors

    a, _ = sk.synthetic.organ_surface("kidney", 800, seed=2)
    rng = np.random.default_rng(0)
    perm = rng.permutation(a.n_vertices)
    inv = np.empty_like(perm)
    inv[perm] = np.arange(len(perm))
    b = sk.Surface(a.vertices[perm] @ sk.synthetic.random_rotation(4).T + 7.0, inv[a.faces])
    da = curvature_patch_descriptors(SpectralShape.from_basis(a, sk.eigenbasis(a, 10)))
    db = curvature_patch_descriptors(SpectralShape.from_basis(b, sk.eigenbasis(b, 10)))
    assert da.shape == (a.n_vertices, 12) and np.all(np.isfinite(da))
    np.testing.assert_allclose(db, da[perm], atol=1e-8 * np.abs(da).max())
    corr = sk.match(a, b, sk.MatchOptions(patch_descriptors=True, check_ambiguity=False))
    assert np.mean(corr.source_to_target[perm] == np.arange(a.n_vertices)) > 0.95


def test_command_line_reports_an_undetermined_turn(tmp_path, capsys):
    """On the round-sectioned ventricle the command warns in one stderr line and says so
    in its summary; the map is still written."""
    p = make_pair("ventricle", "growth", n_source=900, n_target=1000, seed=held_out(5)[0])
    sk.save(p.source, tmp_path / "a.ply")
    sk.save(p.target, tmp_path / "b.ply")
    code = cli.main([str(x) for x in ("match", tmp_path / "a.ply", tmp_path / "b.ply", "-o",
                                      tmp_path / "m.npz", "--json")])
    out = capsys.readouterr()
    assert code == 0 and (tmp_path / "m.npz").exists()
    summary = json.loads(out.out)
    assert summary["rotation_ambiguous"] is True and "--landmarks" in summary["rotation_note"]
    warn = [line for line in out.err.splitlines() if line.strip()]
    assert len(warn) == 1 and warn[0].startswith("surfacekit: warning:") and "landmark" in warn[0]


def test_exact_symmetry_of_an_ellipsoid_is_reported_as_a_possible_flip():
    """A triaxial ellipsoid is carried onto itself by the 180-degree turns about its axes
    (elementary geometry), so a remeshed, rotated copy has several equally good maps: the
    flipped finalist's energy ties with the winner's and the solver warns."""
    a = sk.synthetic.ellipsoid((50, 30, 20), 1500, seed=1, jitter=0.3)
    b = sk.synthetic.ellipsoid((50, 30, 20), 1800, seed=2, jitter=0.3)
    b = sk.Surface(b.vertices @ sk.synthetic.random_rotation(5).T, b.faces)
    with pytest.warns(sk.AmbiguousMatchWarning, match="flipped"):
        corr = sk.match(a, b)
    amb = corr.info["rotation_ambiguity"]
    assert amb["ambiguous"] and amb["turns"] == 0
    assert amb["rival"]["angle_deg"] > 170 and amb["rival"]["energy_ratio"] < 1.05
