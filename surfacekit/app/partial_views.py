"""What the command line and the reports say about a cropped surface: the covered region,
its share, and a view layer showing it (grey where the other scan has no data)."""
from __future__ import annotations

import numpy as np

from .panels import ReportLayer

COVERED_NAMES = {0: "not covered: the other scan has no surface here",
                 1: "covered by both scans"}


def partial_summary(corr) -> dict:
    """Summary entries of a map between a part and a whole (empty for whole-to-whole maps).

    ``cropped_surface`` (source or target), ``covered_fraction_of_whole`` (area share of
    the whole surface that the part covers), ``part_to_whole_area_ratio``, and a plain
    ``partial_note``; ``partial_rule`` when the user forced the route.
    """
    info = (getattr(corr, "info", None) or {}).get("partial")
    if not info:
        return {}
    share = float(info["covered_fraction_of_whole"])
    whole = "target" if info["side"] == "source" else "source"
    out = {"cropped_surface": info["side"],
           "covered_fraction_of_whole": share,
           "part_to_whole_area_ratio": float(info["area_ratio"]),
           "partial_note": (f"the {info['side']} covers only part of the {whole} (open along "
                            f"{sum(lp['cut'] for lp in info['loops'])} cut(s)): it was mapped into "
                            f"the {whole}, which it covers over {share:.1%} of its area; the rest "
                            "of the " + whole + " matches nothing")}
    if info.get("forced"):
        out["partial_rule"] = "forced with --partial yes"
    return out


def covered_layer(corr) -> ReportLayer | None:
    """A two-colour layer (grey: not covered, blue: covered) on both surfaces of a partial map."""
    if corr is None or not getattr(corr, "is_partial", False):
        return None
    return ReportLayer("covered region",
                       [np.asarray(corr.source_overlap, dtype=np.int64),
                        np.asarray(corr.target_overlap, dtype=np.int64)],
                       kind="labels", label_names=COVERED_NAMES,
                       description="Where both scans have surface. One scan covers only part of "
                                   "the other (a cropped scan); change is measured only where "
                                   "both have data, and the grey region is left out.")
