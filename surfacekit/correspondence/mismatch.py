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
    """The two surfaces do not look like the same organ: the map is unlikely to mean anything."""


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
    score = max(ratios.values())
    low = bool(score >= 1.0)
    worst = max(ratios, key=ratios.get)
    note = (f"the surfaces do not look like the same organ (map {worst} {ratios[worst]:.1f} times "
            "the level allowed between deformed copies of one organ): the map is unlikely to mean "
            "anything; check that the right pair of surfaces was given"
            if low else "the surfaces look like the same organ, deformed")
    return {"energy": float(energy), "spectrum_distance": spec, "score": float(score),
            "low_confidence": low, "note": note}


def warn_no_match(check: dict) -> None:
    """Issue the NoMatchWarning that a low-confidence check calls for (stack level of match's caller)."""
    if check["low_confidence"]:
        warnings.warn(check["note"], NoMatchWarning, stacklevel=3)
