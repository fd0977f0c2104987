"""Is there anything to match?  A check that two surfaces can correspond at all.

A kidney matched against a liver still yields a map: every vertex gets a partner.
This check measures, after the solver has chosen its map, how far the two shapes
are from being the same organ deformed, and flags the result as low-confidence
when they are clearly not.
"""
from __future__ import annotations

import warnings

import numpy as np

from ..mesh.descriptors import spectrum_distance
from . import tuning


class NoMatchWarning(UserWarning):
    """The two surfaces differ more than deformed copies of the same organ do: the map may mean little."""


def spectrum_gap(values_s: np.ndarray, values_t: np.ndarray) -> float:
    """Distance between the area-normalised Laplace–Beltrami spectra of two surfaces
    (Reuter, Wolter & Peinecke, Computer-Aided Design 2006; :func:`surfacekit.spectrum_distance`),
    from the solver's unit-area eigenvalues (first, zero one dropped), over at most
    `tuning.MISMATCH_SPECTRUM_K` eigenvalues."""
    k = min(len(values_s), len(values_t), tuning.MISMATCH_SPECTRUM_K + 1)
    return spectrum_distance(values_s[1:k] / (4 * np.pi), values_t[1:k] / (4 * np.pi))


def match_check(energy: float, values_s: np.ndarray, values_t: np.ndarray) -> dict:
    """The no-match verdict of a finished match, JSON-able.

    `energy` is the unsupervised selection energy of the chosen candidate
    (:func:`~.candidates.energy`: robust rigid-pose misfit, round trip, descriptor
    disagreement; on a bent tube matched after straightening, of the straightened
    shapes), `values_s`/`values_t` the unit-area eigenvalues of both surfaces.  Each
    measure is divided by its threshold (constants in :mod:`.tuning`, calibrated on
    the benchmark pairs); ``score`` is the largest ratio and ``low_confidence`` is
    set when it reaches 1.  Entries: ``energy``, ``spectrum_distance``, ``score``,
    ``low_confidence`` and a plain ``note``.
    """
    spec = spectrum_gap(values_s, values_t)
    ratios = {"energy": float(energy) / tuning.MISMATCH_ENERGY,
              "spectrum distance": spec / tuning.MISMATCH_SPECTRUM}
    verdict = _verdict(ratios, "the surfaces differ more than two deformed copies of the same organ "
                               "do (map {worst} {ratio:.1f} times the level allowed between them)",
                       "the surfaces look like the same organ, deformed")
    return {"energy": float(energy), "spectrum_distance": spec, **verdict}


def _verdict(ratios: dict, low_note: str, ok_note: str) -> dict:
    """``score`` (the largest ratio of a measure to its threshold), ``low_confidence``
    (score >= 1) and the plain ``note``: `low_note` formatted with the worst measure
    and its ratio, plus what to do, or `ok_note`."""
    score = max(ratios.values())
    low = bool(score >= 1.0)
    worst = max(ratios, key=ratios.get)
    note = (low_note.format(worst=worst, ratio=ratios[worst])
            + ": the map may mean little; check that the right pair of surfaces was given"
            if low else ok_note)
    return {"score": float(score), "low_confidence": low, "note": note}


#: Partial route (a cropped part mapped into a whole): trimmed RMS point-to-plane misfit of the
#: deformed part (in RMS radii of the whole) at or above which the part fits nowhere on the
#: whole.  Measured at 3000/3600 vertices: 0.0009-0.0249 on the 24 cropped benchmark pairs
#: (scanner noise raises it most), 0.007-0.106 when a crop of one organ kind is placed on a
#: whole of another.
PARTIAL_MISFIT = 0.035
#: ... and the area ratio part / whole outside which the part cannot be a part of the whole:
#: 0.51-2.35 on the benchmark crops (10-50% cut away; scanner noise inflates the area), 0.01-42
#: between organ kinds.  Below a fifth of the whole's area, too little is left to place it.
PARTIAL_AREA = (0.2, 3.0)


def partial_check(misfit: float, area_ratio: float) -> dict:
    """The no-match verdict of a part mapped into a whole, JSON-able (keys as :func:`match_check`'s,
    with ``misfit`` and ``area_ratio`` instead of ``energy`` and ``spectrum_distance``)."""
    lo, hi = PARTIAL_AREA
    ratios = {"misfit": misfit / PARTIAL_MISFIT,
              "area ratio": max(area_ratio / hi, lo / max(area_ratio, 1e-300))}
    verdict = _verdict(ratios, "the part does not look like a part of the whole surface (its "
                               "{worst} is {ratio:.1f} times the level allowed for a cropped copy "
                               "of one organ)",
                       "the part looks like a cropped copy of the whole, deformed")
    rule = (f"poor >= 1: the larger of the deformed part's misfit / {PARTIAL_MISFIT:g} of the whole's "
            f"RMS radius and how far its area ratio to the whole lies outside {lo:g}-{hi:g}; cropped "
            "copies of one organ stay below 0.75 (benchmarks/bench_partial.py)")
    return {"misfit": float(misfit), "area_ratio": float(area_ratio), **verdict, "rule": rule}


def warn_no_match(check: dict) -> None:
    """Issue the NoMatchWarning that a low-confidence check calls for (stack level of match's caller)."""
    if check["low_confidence"]:
        warnings.warn(check["note"], NoMatchWarning, stacklevel=3)
