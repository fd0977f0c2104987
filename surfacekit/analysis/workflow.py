"""One comparison of two scans, matching only what must be matched: the pipeline behind
the command line's ``change``, the demo and the cohort worker.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

import dataclasses
import time
from dataclasses import dataclass

import numpy as np

from ..correspondence import solver
from ..correspondence.options import MatchOptions
from ..correspondence.result import Correspondence
from ..mesh.surface import Surface, SurfaceError
from .change import ChangeReport, measure_change
from .components import main_component
from .labels import transfer_labels
from .plausibility import scale_warnings


@dataclass
class Comparison:
    """Everything one comparison of a baseline and a follow-up produced.

    Attributes
    ----------
    correspondence : Correspondence baseline -> follow-up (with its rigid pose)
    change : ChangeReport on the baseline vertices
    labels : (n_baseline,) int region labels on the baseline, or None
    label_confidence : (n_baseline,) in [0, 1], or None
    template_correspondence : Correspondence template -> baseline when a template
        was matched; None without a template, or when the template shares the
        baseline's triangulation (its labels are then used as they are)
    surfaces : (baseline, follow-up) as compared: the inputs, or their largest
        connected pieces when small pieces were dropped (the change fields and the
        labels belong to this baseline's vertices)
    """

    correspondence: Correspondence
    change: ChangeReport
    labels: np.ndarray | None = None
    label_confidence: np.ndarray | None = None
    template_correspondence: Correspondence | None = None
    surfaces: tuple | None = None

    @property
    def warnings(self) -> list[str]:
        """Plain-sentence warnings about the inputs and the result (implausible sizes, mixed
        units, a large alignment residual), as in ``change.summary()["warnings"]``."""
        return list(self.change.info.get("warnings", []))


def same_triangulation(a: Surface, b: Surface) -> bool:
    """True when two surfaces have the same triangles (vertex i of one is vertex i of the other)."""
    return (a.n_vertices == b.n_vertices and a.faces.shape == b.faces.shape
            and bool(np.array_equal(a.faces, b.faces)))


def main_pieces(baseline: Surface, followup: Surface, options: MatchOptions,
                names=("baseline", "follow-up")) -> tuple[Surface, Surface, MatchOptions, list[str]]:
    """The largest connected piece of each input when the other pieces are small (< 5% of the
    area, :func:`main_component`), the landmark pairs renumbered to the kept vertices, and
    a warning per input naming what was dropped.  Raises SurfaceError for two large pieces
    or a landmark on a dropped piece."""
    base, kept_b, warn_b = main_component(baseline, names[0])
    follow, kept_f, warn_f = main_component(followup, names[1])
    if (warn_b or warn_f) and options.landmarks:
        new = []
        for a, b in options.landmarks:
            ia, ib = np.searchsorted(kept_b, a), np.searchsorted(kept_f, b)
            if ia >= len(kept_b) or kept_b[ia] != a or ib >= len(kept_f) or kept_f[ib] != b:
                raise SurfaceError(f"landmark pair ({a}, {b}) lies on a dropped small piece")
            new.append((int(ia), int(ib)))
        options = dataclasses.replace(options, landmarks=tuple(new))
    return base, follow, options, warn_b + warn_f


def _tick(timings: dict | None, name: str, start: float) -> float:
    now = time.perf_counter()
    if timings is not None:
        timings[name] = now - start
    return now


def _regions(baseline: Surface, template: Surface, template_labels, options: MatchOptions,
             seed: int) -> tuple[np.ndarray, np.ndarray, Correspondence | None]:
    """Labels on the baseline from the template: carried as they are, or through one match."""
    if not isinstance(template, Surface):
        raise SurfaceError("template must be a Surface")
    if template_labels is None:
        raise ValueError("a template needs its labels (template_labels)")
    if same_triangulation(template, baseline):
        identity = np.arange(baseline.n_vertices)
        labels, confidence = transfer_labels(template, template_labels, baseline,
                                             Correspondence(identity, identity))
        return labels, confidence, None
    corr = solver.match(template, baseline, options, seed=seed)
    labels, confidence = transfer_labels(template, template_labels, baseline, corr)
    return labels, confidence, corr


def compare(baseline: Surface, followup: Surface, *, options: MatchOptions | None = None,
            seed: int = 0, correspondence: Correspondence | None = None, template=None,
            template_labels=None, region_names: dict | None = None,
            timings: dict | None = None) -> Comparison:
    """Compare a baseline and a follow-up scan: correspondence, change and, with a template, regions.

    At most one match per pair of surfaces, each with the caller's `options` and
    `seed`: baseline -> follow-up (skipped when `correspondence` is given), and
    template -> baseline when a template is given whose triangulation differs from
    the baseline's (with the same triangles, vertex i of the template is vertex i
    of the baseline, and its labels are used as they are).  Landmark pairs in
    `options` index the baseline and follow-up vertices, so they are left out of
    the template match.  The change is then measured from the correspondence
    (:func:`measure_change`) and the labels carried by :func:`transfer_labels`.
    An input made of several connected pieces is reduced to its largest piece when
    the others hold less than 5% of its area (a warning names what was dropped, and
    ``Comparison.surfaces`` holds the pieces compared); with two large pieces it is
    refused (keep one first, e.g. with ``sk.prepare``).

    Parameters
    ----------
    baseline, followup : Surface (mm)
    options : MatchOptions of every match (default ``MatchOptions()``)
    seed : random seed of every match
    correspondence : a baseline -> follow-up Correspondence to reuse instead of matching
    template : Surface carrying region labels, optional
    template_labels : (template.n_vertices,) int region labels (with `template`)
    region_names : {label: name} for the regional table
    timings : dict that receives the seconds spent in "match", "labels" and "change"

    Returns
    -------
    Comparison
    """
    options = MatchOptions() if options is None else options
    if not isinstance(baseline, Surface) or not isinstance(followup, Surface):
        raise SurfaceError("baseline and followup must be Surface objects")
    baseline, followup, options, piece_warnings = main_pieces(baseline, followup, options)
    start = time.perf_counter()
    corr = correspondence
    if corr is None:
        corr = solver.match(baseline, followup, options, seed=seed)
    start = _tick(timings, "match", start)
    labels = confidence = template_corr = None
    if template is not None:
        template_options = dataclasses.replace(options, landmarks=())
        labels, confidence, template_corr = _regions(baseline, template, template_labels,
                                                     template_options, seed)
    elif template_labels is not None:
        raise ValueError("template_labels were given without their template")
    start = _tick(timings, "labels", start)
    change = measure_change(baseline, followup, corr, labels=labels, names=region_names)
    if template is not None:  # a template in other units than the baseline
        change.info["warnings"] += scale_warnings(baseline, template, ("baseline", "region template"))
    change.info["warnings"][:0] = piece_warnings
    _tick(timings, "change", start)
    return Comparison(corr, change, labels, confidence, template_corr, (baseline, followup))
