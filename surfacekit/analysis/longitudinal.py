"""A series of scans of one organ: maps synchronised through the baseline, change per scan,
rates per year.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from ..correspondence import solver
from ..correspondence.ambiguity import AmbiguousMatchWarning
from ..correspondence.mismatch import NoMatchWarning
from ..correspondence.options import MatchOptions
from ..correspondence.result import Correspondence
from ..correspondence.synchronise import cycle_errors, lift_map, synchronise
from ..mesh.surface import Surface, SurfaceError
from .change import ChangeReport, measure_change
from .plausibility import scale_warnings
from .rates import SeriesRates, series_rates


@dataclass
class SeriesComparison:
    """What :func:`compare_series` found for one subject.

    Attributes
    ----------
    times_years : (m,) scan times from the baseline (years)
    changes : m - 1 ChangeReports baseline -> scan i on the baseline vertices, from the
        synchronised maps
    correspondences : m - 1 synchronised Correspondences baseline -> scan i (vertex maps;
        each keeps the rigid pose of its direct match)
    rates : SeriesRates (per vertex, per region, whole surface)
    cycle_error : ``{"raw": [...], "synchronised": [...], "raw_mean", "synchronised_mean"}``,
        mean distance / sqrt(area) around each cycle 0 -> i -> i+1 (see
        :func:`surfacekit.correspondence.synchronise.cycle_errors`)
    agreement : per scan, the share of baseline vertices whose direct and chained estimates
        agreed and were averaged
    warnings : plain sentences (plausibility of each pair, a low agreement)
    """

    times_years: np.ndarray
    changes: list[ChangeReport]
    correspondences: list[Correspondence]
    rates: SeriesRates
    cycle_error: dict
    agreement: list[float]
    warnings: list[str] = field(default_factory=list)

    @property
    def covered_fraction(self) -> float:
        """Smallest share of the baseline area with a measured change over the scans."""
        shares = [float(c.info.get("covered_area_fraction", 1.0)) for c in self.changes]
        return min(shares) if shares else float("nan")


def _match(a: Surface, b: Surface, options: MatchOptions, seed: int) -> Correspondence:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AmbiguousMatchWarning)
        warnings.simplefilter("ignore", NoMatchWarning)  # a warning line of the series instead
        return solver.match(a, b, options, seed=seed)


def check_same_organ(surfaces: list[Surface], names: list[str]) -> None:
    """Raise SurfaceError when a scan differs from the baseline in linear size by more than
    the plausible factor of :func:`~surfacekit.analysis.plausibility.scale_warnings` (a
    different organ or other units)."""
    for s, name in zip(surfaces[1:], names[1:]):
        found = scale_warnings(surfaces[0], s, (names[0], name))
        if found:
            raise SurfaceError(f"{name} is probably not the same organ as the baseline "
                               f"({names[0]}), or is in other units: {found[0]}")


def compare_series(surfaces, times_years, *, options: MatchOptions | None = None,
                   seed: int = 0, labels=None, names: dict | None = None,
                   scan_names: list[str] | None = None) -> SeriesComparison:
    """Compare every scan of a series with its baseline through cycle-consistent maps.

    1. Match the baseline to each scan (0 -> i) and each scan to the next (i -> i+1)
       with ``sk.match`` (same options and seed).
    2. Synchronise the baseline maps through the neighbour maps
       (:mod:`surfacekit.correspondence.synchronise`; Huang & Guibas, SGP 2013; Huang,
       Wang & Guibas, ACM TOG 2014) and report the cycle error of the raw and the
       synchronised maps.
    3. Measure the change baseline -> scan i from the synchronised map
       (:func:`measure_change`, on the baseline vertices, with each direct match's rigid pose).
    4. Fit rates per vertex, per region and for the whole surface (:func:`series_rates`).

    Parameters
    ----------
    surfaces : m >= 2 Surfaces (mm) in time order, the baseline first
    times_years : (m,) increasing scan times (years)
    options, seed : of every match
    labels : (n_baseline,) int region labels, optional; names : {label: name}
    scan_names : how warnings name the scans (default "scan 0", "scan 1", ...)

    Raises
    ------
    ValueError for fewer than two scans or times not strictly increasing;
    SurfaceError when a scan is not plausibly the same organ (:func:`check_same_organ`).
    """
    options = MatchOptions() if options is None else options
    surfaces = list(surfaces)
    times = np.asarray(times_years, dtype=np.float64)
    if len(surfaces) < 2 or times.shape != (len(surfaces),):
        raise ValueError(f"a series needs >= 2 scans with one time each, got {len(surfaces)} "
                         f"scans and {times.shape[0] if times.ndim else 0} times")
    if not np.all(np.diff(times) > 0):
        raise ValueError("scan times must be strictly increasing")
    scan_names = scan_names or [f"scan {i}" for i in range(len(surfaces))]
    check_same_organ(surfaces, scan_names)
    m = len(surfaces)
    direct = [None] + [_match(surfaces[0], surfaces[i], options, seed) for i in range(1, m)]
    neighbours = [_match(surfaces[i], surfaces[i + 1], options, seed) for i in range(1, m - 1)]
    neighbours.append(None)
    neighbours.insert(0, None)      # neighbours[i]: scan i -> i+1 for i >= 1
    lifted = [None] + [lift_map(surfaces[0], surfaces[i], direct[i]) for i in range(1, m)]
    lifted_next = [None if c is None else lift_map(surfaces[i], surfaces[i + 1], c)
                   for i, c in enumerate(neighbours)]
    maps, agreement = synchronise(surfaces, lifted, lifted_next)
    errors = cycle_errors(surfaces, [None if c is None else c.source_to_target for c in direct],
                          [None if c is None else c.source_to_target for c in neighbours], maps)
    synced, changes = [], []
    notes = [f"{scan_names[i]}: its match with the baseline has low confidence (the two may not "
             "show one organ); check this scan" for i in range(1, m) if direct[i].low_confidence]
    for i in range(1, m):
        s2t = maps[i].vertex_map(surfaces[i])
        corr = Correspondence(s2t, direct[i].target_to_source,
                              source_confidence=direct[i].source_confidence,
                              rigid=direct[i].rigid, options=options, seed=seed,
                              info={"route": "synchronised through the baseline"})
        synced.append(corr)
        rep = measure_change(surfaces[0], surfaces[i], corr, labels=labels, names=names)
        changes.append(rep)
        notes += [f"{scan_names[i]}: {w}" for w in rep.info.get("warnings", [])]
    rates = series_rates(times, changes, baseline_volume_ml=(
        surfaces[0].volume / 1000.0 if surfaces[0].is_closed else float("nan")),
        labels=labels, names=names)
    return SeriesComparison(times - times[0], changes, synced, rates, errors, agreement, notes)
