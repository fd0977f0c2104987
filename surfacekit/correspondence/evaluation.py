"""Map-quality measures, with and without ground truth."""
from __future__ import annotations

import numpy as np

from ..mesh.surface import Surface
from .result import Correspondence


def _truth_parts(truth, m: int):
    """(faces (m, 3) vertex ids, weights (m, 3)) for vertex or (face, barycentric) truth."""
    if isinstance(truth, tuple):
        face_idx, bary = truth
        bary = np.asarray(bary, dtype=np.float64)
        face_idx = np.asarray(face_idx, dtype=np.int64)
        if bary.shape != (m, 3) or face_idx.shape != (m,):
            raise ValueError(f"truth (face, barycentric) must have shapes ({m},), ({m}, 3)")
        return face_idx, bary
    t = np.asarray(truth)
    if t.shape != (m,) or not np.issubdtype(t.dtype, np.integer):
        raise ValueError(f"truth must be ({m},) vertex indices or a (face, barycentric) tuple")
    return None, t.astype(np.int64)


def geodesic_error(surface: Surface, predicted, truth, normalize: bool = True) -> np.ndarray:
    """Geodesic distance on `surface` between predicted and true points.

    The usual accuracy measure of shape correspondence, normalised by the square
    root of the surface area (Kim, Lipman & Funkhouser, SIGGRAPH 2011; common
    practice since).  Distances come from the heat method (Crane et al. 2013,
    :func:`surfacekit.geodesic_distance`) started at each distinct predicted vertex
    and, for true points inside triangles, interpolated linearly.

    Parameters
    ----------
    surface : Surface on which both points lie
    predicted : (m,) int vertex indices
    truth : (m,) int vertex indices, or ``(face_index (m,), barycentric (m, 3))``
    normalize : divide by sqrt(area) (dimensionless) instead of returning mm

    Returns
    -------
    (m,) errors, dimensionless or mm.
    """
    from ..mesh.geodesics import geodesic_distance

    pred = np.asarray(predicted)
    if pred.ndim != 1 or not np.issubdtype(pred.dtype, np.integer):
        raise ValueError(f"predicted must be 1-D vertex indices, got shape {pred.shape} dtype {pred.dtype}")
    m = len(pred)
    face_idx, t = _truth_parts(truth, m)
    if pred.size and (pred.min() < 0 or pred.max() >= surface.n_vertices):
        raise ValueError("predicted has vertex indices outside the surface")
    err = np.empty(m)
    order = np.argsort(pred, kind="stable")
    uniq, starts = np.unique(pred[order], return_index=True)
    bounds = np.append(starts, m)
    for u, a, b in zip(uniq, bounds[:-1], bounds[1:]):  # one heat solve per distinct vertex
        rows = order[a:b]
        d = geodesic_distance(surface, int(u))
        if face_idx is None:
            err[rows] = d[t[rows]]
        else:
            err[rows] = np.einsum("ij,ij->i", d[surface.faces[face_idx[rows]]], t[rows])
    return err / np.sqrt(surface.area) if normalize else err


def error_curve(errors: np.ndarray, thresholds=None) -> tuple[np.ndarray, np.ndarray]:
    """Cumulative error curve: fraction of points with error <= each threshold.

    Default thresholds: 0 to 0.25 in 26 steps (normalised geodesic error), as in
    the correspondence literature (Kim et al. 2011; common practice).
    """
    th = np.linspace(0.0, 0.25, 26) if thresholds is None else np.asarray(thresholds, float)
    e = np.sort(np.asarray(errors, float))
    return th, np.searchsorted(e, th, side="right") / max(len(e), 1)


def _frame_coords(p: np.ndarray) -> np.ndarray:
    """Triangle corners (t, 3, 3) -> edge vectors in a local 2-D frame (t, 2, 2)."""
    e1, e2 = p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]
    l1 = np.linalg.norm(e1, axis=1)
    x = e1 / np.maximum(l1, 1e-300)[:, None]
    n = np.cross(e1, e2)
    y = np.cross(n, x)
    y /= np.maximum(np.linalg.norm(y, axis=1), 1e-300)[:, None]
    return np.stack([np.stack([l1, np.zeros_like(l1)], 1),
                     np.stack([np.einsum("ij,ij->i", e2, x), np.einsum("ij,ij->i", e2, y)], 1)], 2)


def face_distortion(source: Surface, target: Surface, source_to_target: np.ndarray,
                    areas: tuple[float, float] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Singular values of the piecewise-linear map source -> target on every source face.

    Each source triangle is sent to the triangle spanned by the images of its
    corners (both surfaces scaled to unit area, so a change of size is no
    distortion).  Returns ``(sigma (n_faces, 2), weights (n_faces,))``: the singular
    values σ1 >= σ2 of the 2x2 Jacobian in local frames (NaN on degenerate source
    faces) and each face's share of the source area (0 on degenerate faces).  `areas`
    (source, target) replaces the surfaces' areas in the scaling (a cropped scan: the
    areas of the region both cover).
    """
    f = source.faces
    area_s, area_t = (source.area, target.area) if areas is None else areas
    ps = source.vertices[f] / np.sqrt(area_s)
    pt = target.vertices[np.asarray(source_to_target)[f]] / np.sqrt(area_t)
    A, B = _frame_coords(ps), _frame_coords(pt)
    ok = np.abs(np.linalg.det(A)) > 1e-14
    J = B[ok] @ np.linalg.inv(A[ok])
    sigma = np.full((len(f), 2), np.nan)
    sigma[ok] = np.linalg.svd(J, compute_uv=False)
    weights = np.zeros(len(f))
    weights[ok] = source.face_areas[ok] / source.face_areas[ok].sum()
    return sigma, weights


def distortion(source: Surface, target: Surface, source_to_target: np.ndarray,
               faces: np.ndarray | None = None, areas: tuple[float, float] | None = None) -> dict:
    """Area and conformal distortion of the piecewise-linear map source -> target.

    From the singular values σ1 >= σ2 of :func:`face_distortion`: area ratio σ1σ2
    and conformal (quasi-conformal) distortion σ1/σ2 (Ahlfors 1966; common
    practice in parameterisation).  Collapsed images (σ2 ~ 0) are counted, not averaged.
    `faces` (bool, per source face) and `areas` restrict the measures to the region both
    surfaces cover when one is a cropped scan.
    """
    sigma, weights = face_distortion(source, target, source_to_target, areas)
    ok = np.isfinite(sigma[:, 0])
    if faces is not None:
        ok &= faces
        weights = weights / max(weights[ok].sum(), 1e-300)
    sv, w = sigma[ok], weights[ok]
    collapsed = sv[:, 1] < 1e-6 * np.maximum(sv[:, 0], 1e-300)
    good = ~collapsed
    log_area = np.log(sv[good, 0] * sv[good, 1])
    conf = sv[good, 0] / sv[good, 1]
    wg = w[good] / max(w[good].sum(), 1e-300)
    return {
        "collapsed_area_fraction": float(w[collapsed].sum()),
        "mean_abs_log_area_ratio": float(wg @ np.abs(log_area)) if good.any() else float("nan"),
        "median_conformal_distortion": float(np.median(conf)) if good.any() else float("nan"),
    }


def map_coverage(source: Surface, target: Surface, corr: Correspondence) -> dict:
    """Area share of each surface hit by the map (``coverage_source``, ``coverage_target``),
    after checking that the surfaces are the ones the correspondence was made for."""
    if source.n_vertices != corr.n_source or target.n_vertices != corr.n_target:
        raise ValueError(
            f"surfaces have {source.n_vertices}/{target.n_vertices} vertices, the correspondence "
            f"expects {corr.n_source}/{corr.n_target}")
    out = {}
    for name, surf, hit_by, over in (("target", target, corr.source_to_target, corr.target_overlap),
                                     ("source", source, corr.target_to_source, corr.source_overlap)):
        hit = np.zeros(surf.n_vertices, bool)
        hit[hit_by] = True
        if corr.is_partial:  # a cropped scan: the share of the region both cover
            out[f"coverage_{name}"] = float(surf.vertex_areas[hit & over].sum()
                                            / surf.vertex_areas[over].sum())
            continue
        out[f"coverage_{name}"] = float(surf.vertex_areas[hit].sum() / surf.area)
    return out


def map_quality(source: Surface, target: Surface, corr: Correspondence, ground_truth=None, *,
                n_samples: int = 200, seed: int = 0) -> dict:
    """Quality measures of a correspondence; with `ground_truth`, also its accuracy.

    Without ground truth: area fraction of each surface hit by the map (coverage),
    round-trip (bijectivity) geodesic error ``d(x, T_ts(T_st(x)))`` on a sample of
    source and target vertices, and area / conformal distortion (:func:`distortion`).

    With ``ground_truth`` = the true source point of each target vertex, either
    (n_target,) source vertex ids or ``(face (n_target,), barycentric (n_target, 3))``
    on the source: geodesic error of ``target_to_source`` on the source, normalised
    by sqrt(source area), on `n_samples` target vertices: mean, median, p95, max
    and the cumulative curve.

    Returns a JSON-able dict.
    """
    out = map_coverage(source, target, corr)
    rng = np.random.default_rng(seed)
    s2t, t2s = corr.source_to_target, corr.target_to_source
    for name, surf, there, back in (("source", source, s2t, t2s), ("target", target, t2s, s2t)):
        idx = rng.choice(surf.n_vertices, size=min(n_samples, surf.n_vertices), replace=False)
        rt = geodesic_error(surf, back[there[idx]], idx)
        out[f"round_trip_{name}_mean"] = float(rt.mean())
        out[f"round_trip_{name}_p95"] = float(np.percentile(rt, 95))
    out.update(distortion(source, target, s2t))
    if ground_truth is not None:
        idx = rng.choice(target.n_vertices, size=min(n_samples, target.n_vertices), replace=False)
        if isinstance(ground_truth, tuple):
            truth = (np.asarray(ground_truth[0])[idx], np.asarray(ground_truth[1])[idx])
        else:
            truth = np.asarray(ground_truth)[idx]
        err = geodesic_error(source, t2s[idx], truth)
        th, frac = error_curve(err)
        out.update({
            "geodesic_error_mean": float(err.mean()),
            "geodesic_error_median": float(np.median(err)),
            "geodesic_error_p95": float(np.percentile(err, 95)),
            "geodesic_error_max": float(err.max()),
            "error_curve": {"thresholds": th.tolist(), "fraction": frac.tolist()},
        })
    return out


def quick_map_quality(source: Surface, target: Surface, corr: Correspondence) -> dict:
    """The map-quality measures that need no geodesics, cheap enough for every run.

    Coverage (area share of each surface hit by the map), round-trip error
    ``|x - T_ts(T_st(x))|`` as a straight-line distance, area-weighted mean over
    all vertices, worst of the two directions, divided by sqrt(area) (the
    normalisation of Kim, Lipman & Funkhouser 2011) and in mm, and the
    distortion of :func:`distortion`.  ``source_vertices_per_target_vertex`` lets
    :func:`map_notes` judge the coverage (a nearest-vertex map from a coarser
    surface cannot hit every vertex).  Returns a JSON-able dict.
    """
    out = map_coverage(source, target, corr)
    s2t, t2s = corr.source_to_target, corr.target_to_source
    rt, rt_mm = [], []
    for surf, there, back, over in ((source, s2t, t2s, corr.source_overlap),
                                    (target, t2s, s2t, corr.target_overlap)):
        d = np.linalg.norm(surf.vertices[back[there]] - surf.vertices, axis=1)
        if corr.is_partial:  # a cropped scan: over the region both cover
            w = surf.vertex_areas * over
            rt_mm.append(float(w @ d / w.sum()))
            rt.append(rt_mm[-1] / float(np.sqrt(w.sum())))
            continue
        rt_mm.append(float(surf.vertex_areas @ d / surf.area))
        rt.append(rt_mm[-1] / float(np.sqrt(surf.area)))
    out["round_trip_mean"] = max(rt)
    out["round_trip_mean_mm"] = max(rt_mm)
    out["source_vertices_per_target_vertex"] = source.n_vertices / target.n_vertices
    if corr.is_partial:  # vertices of the region both cover; distortion there
        out["source_vertices_per_target_vertex"] = (int(corr.source_overlap.sum())
                                                    / int(corr.target_overlap.sum()))
        faces = corr.source_overlap[source.faces].all(axis=1)
        areas = (float(source.face_areas[faces].sum()),
                 float(target.vertex_areas[corr.target_overlap].sum()))
        out.update(distortion(source, target, s2t, faces, areas))
    else:
        out.update(distortion(source, target, s2t))
    return out


# Rules of thumb, measured with quick_map_quality on the five ground-truth pairs of
# benchmarks/map_fingerprint.py (1500 -> 1800 vertices) and the demo pair
# (3000 -> 4000): matched maps / a random map of the same pair.
#   coverage_target            0.63-0.67 (demo 0.62)   / 0.55   (at most 0.83, demo 0.75)
#   round_trip_mean            0.003-0.008 (demo 0.006) / 0.38-0.46
#   mean_abs_log_area_ratio    0.46-0.56 (demo 0.48)    / 4.5-4.6
#   collapsed_area_fraction    0.13-0.18 (demo 0.13)    / 0.001
MEASURED_ON = ("the five benchmark pairs (benchmarks/map_fingerprint.py) and the demo pair, "
               "measured with surfacekit.correspondence.evaluation.quick_map_quality")


def turn_note(info: dict | None) -> str | None:
    """The plain note that the shapes leave a turn (or a flip) of the map open, or None."""
    amb = (info or {}).get("rotation_ambiguity")
    if not amb or not amb.get("ambiguous"):
        return None
    axis = ("longest", "middle", "shortest")[amb["axis"]]
    if amb.get("flip"):
        what = f"a map turned by {amb['rival']['angle_deg']:.0f} degrees fits almost as well"
    else:
        what = f"the shapes barely fix a turn about the target's {axis} axis"
    return f"{what}; the map may be turned: give 2-3 landmark pairs (--landmarks)"


def _coverage_note(q: dict) -> dict:
    ratio = float(q.get("source_vertices_per_target_vertex", 1.0))
    ideal, scatter = min(1.0, ratio), 1.0 - np.exp(-ratio)  # scatter: a random map's expected hits
    v = q["coverage_target"]
    verdict = "good" if v >= 0.72 * ideal else "poor" if v <= scatter + 0.02 else "fair"
    return {"measure": "coverage", "value": v, "verdict": verdict,
            "meaning": "share of the second surface's area the map lands on; low values mean "
                       "parts of it receive nothing (squeezed or missed)",
            "rule": f"good >= {0.72 * ideal:.2f} (72% of the {ideal:.2f} a nearest-vertex map can "
                    f"reach with {ratio:.2f} first-surface vertices per second-surface vertex); "
                    f"poor <= {scatter + 0.02:.2f} (a random map reaches {scatter:.2f}); matched "
                    "maps reach 76-83% of the maximum on " + MEASURED_ON}


# measure: (good at most, poor above, meaning, measured levels)
_GRADED = {
    "round-trip error": (
        0.02, 0.05, ("how far a point lands from where it started after going to the other surface "
        "and back, per sqrt(surface area); large values mean the two directions disagree"),
        "matched maps 0.003-0.008, random maps 0.38-0.46"),
    "area distortion": (
        0.7, 1.5, ("mean |log| of how much the map stretches or shrinks each triangle (both "
        "surfaces scaled to the same area); 0 = no stretch"),
        "matched maps 0.46-0.56, random maps 4.5-4.6"),
    "collapsed area": (
        0.2, 0.3, ("share of the first surface whose triangles land on fewer than three distinct "
        "points; a vertex-to-vertex map does this routinely, large values mean a region is "
        "squeezed to a point"), "poor is about twice the matched level; matched maps 0.13-0.18"),
}


def _same_organ_note(check: dict) -> dict:
    from . import tuning

    rule = check.get("rule") or (
        f"poor >= 1: the larger of the map's selection energy / {tuning.MISMATCH_ENERGY:g} "
        f"and the Laplace spectrum distance / {tuning.MISMATCH_SPECTRUM:g}; deformed copies of "
        "one organ stay below 0.9 on the benchmark pairs (one of 56 held-out pairs with strong "
        "anisotropic growth reached 1.1), different synthetic organs reach 1.0-4")
    return {"measure": "same organ", "value": float(check["score"]),
            "verdict": "poor" if check["low_confidence"] else "good", "meaning": check["note"],
            "rule": rule}


def map_notes(quality: dict, info: dict | None = None) -> list[dict]:
    """Plain notes on how far to trust a map: one entry per measure.

    ``quality`` is :func:`quick_map_quality` (or :func:`map_quality`, whose sampled
    geodesic round trip is used when ``round_trip_mean`` is absent), ``info`` the
    map's ``info`` (for the turn/flip ambiguity).  Each entry has ``measure``,
    ``value``, ``verdict`` (good / fair / poor, or check for an open turn),
    ``meaning`` (one line) and ``rule`` (the threshold and where it comes from).
    None of these proves a map right: a consistently turned map has small
    round-trip error and distortion, which is why the turn note comes first.
    """
    notes = []
    turn = turn_note(info)
    notes.append({"measure": "turn or flip", "value": "ambiguous" if turn else "fixed",
                  "verdict": "check" if turn else "good",
                  "meaning": turn or "the shapes fix the map's orientation (no rival turn or "
                                     "flip fits almost as well)",
                  "rule": "a rival turn whose fit is nearly as good is flagged (the test of "
                          "surfacekit.correspondence.ambiguity)"})
    check = (info or {}).get("match_check")
    if check:
        notes.append(_same_organ_note(check))
    if "coverage_target" in quality:
        notes.append(_coverage_note(quality))
    rt = quality.get("round_trip_mean")
    if rt is None and "round_trip_source_mean" in quality:
        rt = max(quality["round_trip_source_mean"], quality["round_trip_target_mean"])
    values = {"round-trip error": rt, "area distortion": quality.get("mean_abs_log_area_ratio"),
              "collapsed area": quality.get("collapsed_area_fraction")}
    for measure, (good, poor, meaning, rule) in _GRADED.items():
        v = values[measure]
        if v is not None and np.isfinite(v):
            notes.append({"measure": measure, "value": float(v),
                          "verdict": "good" if v <= good else "poor" if v > poor else "fair",
                          "meaning": meaning,
                          "rule": f"good <= {good:g}, poor > {poor:g}; {rule} on {MEASURED_ON}"})
    return notes


def map_note_lines(notes: list[dict]) -> list[str]:
    """One plain sentence per note of :func:`map_notes`."""
    out = []
    for n in notes:
        value = n["value"] if isinstance(n["value"], str) else f"{n['value']:.3g}"
        out.append(f"{n['measure']}: {value} ({n['verdict']}) - {n['meaning']}.")
    return out
