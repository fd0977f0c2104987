"""Rates of change along a series of scans: least-squares slopes per year with standard errors.

Each scan of a series is compared with the subject's baseline (a
:class:`~surfacekit.analysis.change.ChangeReport` per scan, on the baseline
vertices); the baseline itself contributes a zero change at time 0.  A rate is the
ordinary least-squares slope of a quantity against time in years, and its standard
error the textbook one, ``se = sqrt(RSS / (m - 2) / Σ(t - t̄)²)`` for m time points
(e.g. Draper & Smith, *Applied Regression Analysis*, 3rd ed., Wiley 1998, §1.4).
With two time points the slope is the difference quotient and its standard error is
undefined (NaN); with fewer, or all at one time, the slope is NaN too.  Standard errors
need three fitted points, so from three scans on they need a series of four.

The baseline's own point (zero change by definition) enters the fits of normal
displacement and log area ratio only when the series has two scans.  With three or
more, those fits use the follow-up scans alone and a free intercept: every comparison
of two differently meshed scans carries a constant offset that the baseline's
comparison with itself does not (the baseline's vertices lie on the smooth surface,
the other scan's triangles cut inside it by about h²κ/8 for edge length h and
curvature κ), and a free intercept absorbs it instead of tilting the slope.  With
two scans the rate is the difference quotient and carries that offset divided by the
time span.  Volumes are all measured on meshes, so the volume fit always uses every scan.

Sign conventions follow the change metrics (:mod:`surfacekit.analysis.metrics`):
normal displacement positive outward (mm/year), log area ratio ln(scan / baseline
area) positive for growth (1/year), volume scan minus baseline (ml/year).  Regional
and whole-surface rates are slopes of the area-weighted regional means of each scan
(the ``mean_*`` metrics of :func:`~surfacekit.analysis.metrics.change_metrics`);
as the mean is linear, this equals the area-weighted mean of the per-vertex slopes
where no value is missing.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

#: per-scan quantities fitted per region: (metric of change_metrics, rate column stem, unit)
REGIONAL_RATES = (
    ("mean_normal_displacement_outward_mm", "mean_normal_displacement_outward_rate",
     "mm_per_year"),
    ("mean_log_area_ratio_followup_over_baseline", "mean_log_area_ratio_scan_over_baseline_rate",
     "per_year"),
)


@dataclass
class RateFit:
    """Least-squares lines ``y = intercept + slope * t`` fitted column by column.

    Attributes
    ----------
    slope : (...) per year (the unit of y per year); NaN with fewer than two times
    stderr : (...) standard error of the slope; NaN with fewer than three times
    intercept : (...) value at t = 0
    n_used : (...) int, time points with a finite value
    """

    slope: np.ndarray
    stderr: np.ndarray
    intercept: np.ndarray
    n_used: np.ndarray


def fit_rates(times_years, values) -> RateFit:
    """Least-squares slope and its standard error for each column of `values`.

    Parameters
    ----------
    times_years : (m,) time of each scan (years); any origin
    values : (m,) or (m, k) values per scan; NaN values are left out of their column

    Returns
    -------
    RateFit with arrays of shape () or (k,)

    Examples
    --------
    >>> fit = fit_rates([0.0, 1.0, 3.0], [0.0, 1.0, 3.0])
    >>> float(fit.slope), float(fit.stderr)
    (1.0, 0.0)
    """
    t = np.asarray(times_years, dtype=np.float64)
    y = np.asarray(values, dtype=np.float64)
    if t.ndim != 1 or y.shape[:1] != t.shape:
        raise ValueError(f"values must have one row per time ({t.shape[0]}), got shape {y.shape}")
    if not np.all(np.isfinite(t)):
        raise ValueError("times_years must be finite")
    flat = y.reshape(len(t), -1)
    w = np.isfinite(flat).astype(np.float64)
    yz = np.where(w > 0, flat, 0.0)
    n = w.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        t_mean = (w * t[:, None]).sum(axis=0) / n
        y_mean = yz.sum(axis=0) / n
        dt = (t[:, None] - t_mean) * w
        sxx = (dt * dt).sum(axis=0)
        slope = (dt * (yz - y_mean)).sum(axis=0) / sxx
        slope = np.where((n >= 2) & (sxx > 0), slope, np.nan)
        intercept = y_mean - slope * t_mean
        resid = w * (yz - intercept - slope * t[:, None])
        rss = (resid * resid).sum(axis=0)
        stderr = np.where(n >= 3, np.sqrt(rss / np.maximum(n - 2, 1) / sxx), np.nan)
    stderr = np.where(np.isfinite(slope), stderr, np.nan)
    shape = y.shape[1:]
    return RateFit(slope.reshape(shape), stderr.reshape(shape), intercept.reshape(shape),
                   n.astype(np.int64).reshape(shape))


@dataclass
class SeriesRates:
    """Rates of one subject's series, on the baseline vertices.

    Attributes
    ----------
    times_years : (m,) time of each scan from the baseline (the baseline at 0)
    normal_displacement : RateFit of the normal displacement, (n,) mm/year, + outward
    log_area_ratio : RateFit of the log area ratio, (n,) 1/year, + growth
    trajectories : per scan, ``{"time_years", "volume_ml", "regions": {name: metrics}}``
        with the area-weighted regional means of each scan (the baseline: zeros)
    summary : rates of the whole surface and of each region, with standard errors
        (see :func:`series_rates`)
    """

    times_years: np.ndarray
    normal_displacement: RateFit
    log_area_ratio: RateFit
    trajectories: list = field(default_factory=list)
    summary: dict = field(default_factory=dict)

    def fields(self) -> dict:
        """Per-baseline-vertex rate fields (for ``sk.save(baseline, path, fields=...)``)."""
        return {"normal_displacement_outward_rate_mm_per_year": self.normal_displacement.slope,
                "normal_displacement_outward_rate_stderr_mm_per_year":
                    self.normal_displacement.stderr,
                "log_area_ratio_scan_over_baseline_rate_per_year": self.log_area_ratio.slope,
                "log_area_ratio_scan_over_baseline_rate_stderr_per_year":
                    self.log_area_ratio.stderr}


def _trajectory(reports, times: np.ndarray, baseline_volume_ml: float,
                labels, names) -> list[dict]:
    """Per scan: time, volume and the regional metrics (the baseline: zero change)."""
    out = [{"time_years": 0.0, "volume_ml": baseline_volume_ml, "regions": None}]
    for t, rep in zip(times[1:], reports):
        rows = rep.regional_table(labels, names)
        out.append({"time_years": float(t), "volume_ml": rep.followup_volume_mm3 / 1000.0,
                    "regions": {r["name"]: r for r in rows}})
    region_names = list(out[1]["regions"]) if len(out) > 1 else []
    out[0]["regions"] = {name: {metric: 0.0 for metric, _, _ in REGIONAL_RATES}
                         for name in region_names}
    return out


def change_rate(times_years, values) -> RateFit:
    """The rate of a change measured against the baseline, ``values[0]`` being the baseline's
    own zero: fitted without it from three scans on (see the module notes).

    Parameters
    ----------
    times_years : (m,) scan times, the baseline first
    values : (m,) or (m, k) change of each scan against the baseline (``values[0]`` = 0)
    """
    times = np.asarray(times_years, dtype=np.float64)
    values = np.asarray(values, dtype=np.float64)
    return fit_rates(times[1:], values[1:]) if len(times) >= 3 else fit_rates(times, values)


def _summary(times: np.ndarray, trajectories: list[dict], whole: list[dict]) -> dict:
    """Whole-surface and regional rates (+ standard errors) from the per-scan means."""
    vol = fit_rates(times, [s["volume_ml"] for s in trajectories])
    out = {"volume_rate_ml_per_year": float(vol.slope),
           "volume_rate_stderr_ml_per_year": float(vol.stderr)}
    for metric, stem, unit in REGIONAL_RATES:
        fit = change_rate(times, [0.0] + [w[metric] for w in whole])
        out[f"{stem}_{unit}"] = float(fit.slope)
        out[f"{stem}_stderr_{unit}"] = float(fit.stderr)
    regions = {}
    for name in trajectories[0]["regions"]:
        row = {}
        for metric, stem, unit in REGIONAL_RATES:
            fit = change_rate(times, [s["regions"][name][metric] for s in trajectories])
            row[f"{stem}_{unit}"] = float(fit.slope)
            row[f"{stem}_stderr_{unit}"] = float(fit.stderr)
        regions[name] = row
    out["regions"] = regions
    return out


def series_rates(times_years, reports, *, baseline_volume_ml: float = float("nan"),
                 labels=None, names: dict | None = None) -> SeriesRates:
    """Per-vertex, regional and whole-surface rates of a series of change reports.

    Parameters
    ----------
    times_years : (m,) scan times in years, the baseline first (shifted so it is 0)
    reports : m - 1 ChangeReports baseline -> scan i (i = 1 .. m-1), on the baseline vertices
    baseline_volume_ml : the baseline's enclosed volume (NaN for an open surface)
    labels : (n,) int region labels on the baseline, optional; names : {label: name}

    Returns
    -------
    SeriesRates.  ``summary`` holds ``volume_rate_ml_per_year``,
    ``mean_normal_displacement_outward_rate_mm_per_year`` (+ outward),
    ``mean_log_area_ratio_scan_over_baseline_rate_per_year`` (+ growth), each with a
    ``*_stderr_*`` partner, and ``regions`` with the two regional rates per region name.
    """
    times = np.asarray(times_years, dtype=np.float64)
    times = times - times[0]
    reports = list(reports)
    if len(reports) != len(times) - 1:
        raise ValueError(f"{len(times)} times need {len(times) - 1} change reports, "
                         f"got {len(reports)}")
    if not reports:
        raise ValueError("a series needs at least two scans for a rate")
    n = reports[0].normal_displacement.shape[0]
    nd = np.vstack([np.zeros(n)] + [r.normal_displacement for r in reports])
    lar = np.vstack([np.zeros(n)] + [r.log_area_ratio for r in reports])
    trajectories = _trajectory(reports, times, float(baseline_volume_ml), labels, names)
    summary = _summary(times, trajectories, [r.metrics() for r in reports])
    return SeriesRates(times, change_rate(times, nd), change_rate(times, lar), trajectories,
                       summary)
