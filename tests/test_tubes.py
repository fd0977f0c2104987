"""Strongly bent tubular organs: the tube route of the solver (straightening, ends, gate).

The tube is invented (``sk.synthetic.organ_surface("tube")``); ground truth comes from the
shared sphere parameter (``groundtruth.tube_pair``), with seeds the solver was not tuned on.
"""
from __future__ import annotations

import warnings

import numpy as np
import pytest
from groundtruth import held_out, make_pair, tube_pair

import surfacekit as sk
from surfacekit.correspondence.options import MatchOptions
from surfacekit.correspondence.shapes import prepare_shape
from surfacekit.correspondence.tubes import straighten, transported_frames, tube_ends, tubularity


def test_straighten_inverts_an_exact_bend():
    """Points on a circular tube (radius 4) around a quarter circle (radius 40) come back to a
    straight tube: arc length along the axis and distance from it are kept, as for any curve
    framed by parallel transport (Bishop, "There is more than one way to frame a curve",
    American Mathematical Monthly 1975)."""
    R, r = 40.0, 4.0
    t = np.linspace(0.0, 0.5 * np.pi, 400)
    line = np.column_stack([R * np.sin(t), R * (1 - np.cos(t)), np.zeros_like(t)])
    rng = np.random.default_rng(0)
    s = rng.uniform(0.1, 0.5 * np.pi - 0.1, 300)  # angle along the bend
    a = rng.uniform(0.0, 2 * np.pi, 300)           # angle around the tube
    centre = np.column_stack([R * np.sin(s), R * (1 - np.cos(s)), np.zeros_like(s)])
    inward = np.column_stack([-np.sin(s), np.cos(s), np.zeros_like(s)])  # towards the bend's centre
    pts = centre + r * (np.cos(a)[:, None] * inward + np.sin(a)[:, None] * np.array([0, 0, 1.0]))
    flat = straighten(pts, line)
    np.testing.assert_allclose(flat[:, 0], R * s, atol=0.01)
    np.testing.assert_allclose(np.hypot(flat[:, 1], flat[:, 2]), r, atol=0.01)
    T, N, B = transported_frames(line)
    np.testing.assert_allclose(np.einsum("ij,ij->i", T, N), 0.0, atol=1e-12)
    np.testing.assert_allclose(np.linalg.norm(B, axis=1), 1.0, atol=1e-12)


def test_ends_are_the_tips_of_the_tube():
    tube, sphere = sk.synthetic.organ_surface("tube", 800, seed=5)
    state = prepare_shape(tube, MatchOptions(), 0, 0)
    ends = tube_ends(state)
    assert sorted(np.sign(sphere[[ends[0], ends[1]], 0])) == [-1.0, 1.0]
    assert np.all(np.abs(sphere[[ends[0], ends[1]], 0]) > 0.9)  # near the poles of the parameter
    assert tubularity(state, ends) > 1.3


def test_a_strongly_bent_tube_is_matched():
    (seed,) = held_out(412)
    pair = tube_pair(130.0, 20.0, n_source=900, n_target=1000, seed=seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", sk.AmbiguousMatchWarning)
        corr = sk.match(pair.source, pair.target)
    assert corr.info["tube"]["taken"] and corr.info["route"].endswith("+tube")
    assert corr.low_confidence is False
    idx = np.random.default_rng(0).choice(pair.source.n_vertices, 200, replace=False)
    face, bary = pair.source_truth
    err = sk.geodesic_error(pair.target, corr.source_to_target[idx], (face[idx], bary[idx]))
    assert err.mean() <= 0.04
    # the reported deformation carries the source onto the bent target (mm)
    moved = pair.source.vertices @ corr.affine[:3, :3].T + corr.affine[:3, 3] + corr.deformation
    gap = np.linalg.norm(moved - pair.target.vertices[corr.source_to_target], axis=1)
    assert np.median(gap) < 3.0


@pytest.mark.parametrize("kind", ["kidney", "liver"])
def test_compact_organs_skip_the_tube_route(kind):
    (seed,) = held_out(415)
    pair = make_pair(kind, "bend", n_source=500, n_target=600, seed=seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        corr = sk.match(pair.source, pair.target)
    assert corr.info["tube"]["taken"] is False and "+tube" not in corr.info["route"]
