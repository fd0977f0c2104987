"""Series of scans per subject: scan times and their checks (surfacekit/cohort/timeline.py),
least-squares rates (surfacekit/analysis/rates.py), maps synchronised through the baseline
(surfacekit/correspondence/synchronise.py, surfacekit/analysis/longitudinal.py), and series
manifests in a cohort run (surfacekit/cohort/series.py, series_tables.py)."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy import stats

import surfacekit as sk
from surfacekit.analysis.longitudinal import compare_series
from surfacekit.analysis.rates import fit_rates
from surfacekit.cohort.manifest import ManifestEntry
from surfacekit.cohort.timeline import plan_series, scan_times
from surfacekit.mesh import synthetic


# ------------------------------------------------------------------ rates
def test_slope_and_standard_error_match_linregress():
    """Ordinary least squares slope and its standard error, checked against
    scipy.stats.linregress (the textbook formulas, e.g. Draper & Smith, Applied
    Regression Analysis, 3rd ed., 1998, §1.4)."""
    rng = np.random.default_rng(4)
    t = np.array([0.0, 0.7, 1.9, 3.2, 4.0])
    y = 0.3 + 1.7 * t[:, None] + rng.normal(0, 0.2, (5, 6))
    fit = fit_rates(t, y)
    for k in range(6):
        ref = stats.linregress(t, y[:, k])
        assert fit.slope[k] == pytest.approx(ref.slope, rel=1e-12)
        assert fit.stderr[k] == pytest.approx(ref.stderr, rel=1e-10)
        assert fit.intercept[k] == pytest.approx(ref.intercept, rel=1e-10)
    # a missing value leaves that time out of its column only
    y[2, 0] = np.nan
    fit = fit_rates(t, y)
    keep = np.arange(5) != 2
    assert fit.slope[0] == pytest.approx(stats.linregress(t[keep], y[keep, 0]).slope, rel=1e-12)
    assert fit.n_used.tolist() == [4, 5, 5, 5, 5, 5]


def test_two_times_give_a_slope_without_standard_error_and_one_time_nothing():
    fit = fit_rates([0.0, 2.0], [[0.0, 1.0], [3.0, np.nan]])
    assert fit.slope[0] == pytest.approx(1.5) and np.isnan(fit.stderr[0])
    assert np.isnan(fit.slope[1]) and np.isnan(fit.stderr[1])   # one usable time: no rate


# ------------------------------------------------------------------ scan times
def _entry(line, date="", years="", subject="s"):
    return ManifestEntry(subject=subject, path=Path(f"scan{line}.ply"), line=line, date=date,
                         time_years=years)


def test_scan_rows_bad_dates_same_date_and_order():
    rows = [_entry(2, "2021-06-01"), _entry(3, "2020-01-01"), _entry(4, "2020-02-30"),
            _entry(5, ""), _entry(6, "2021-06-01"), _entry(7, years="1.5"),
            _entry(8, "2023-01-01T10:30")]
    plan = plan_series(rows)
    assert [e.line for e, _ in plan.used] == [3, 2, 8]          # sorted by time
    assert plan.warnings == [("the manifest lists this subject's scans out of time order; they "
                             "were sorted by time")]
    notes = {r["line"]: r["note"] for r in plan.rows}
    assert notes[4] == "manifest line 4: date '2020-02-30' is not an ISO 8601 date (YYYY-MM-DD)"
    assert notes[5] == "manifest line 5: no date or time_years for this scan"
    assert notes[6].startswith("manifest line 6: same time as line 2 of this subject")
    assert "one subject's scans need one kind of time" in notes[7]
    assert [r["used"] for r in plan.rows] == [1, 1, 0, 0, 0, 0, 1]
    times = scan_times(plan)
    assert times[0] == 0.0
    assert times[1] == pytest.approx((np.datetime64("2021-06-01") - np.datetime64("2020-01-01"))
                                     .astype(float) / 365.25)


def test_time_years_rows():
    plan = plan_series([_entry(2, years="3"), _entry(3, years="x"), _entry(4, years="1.25")])
    assert scan_times(plan) == [0.0, 1.75]
    assert plan.rows[1]["note"] == "manifest line 3: time_years 'x' is not a number"


# ------------------------------------------------------------------ planted growth
CENTRE = np.array([0.8, 0.0, 0.6])   # a unit vector: the region centre on the sphere


def _region_weight(sphere: np.ndarray) -> np.ndarray:
    """1 within chord distance 0.35 of the region centre, 0 beyond 0.6, a cosine between."""
    d = np.linalg.norm(sphere - CENTRE, axis=1)
    ramp = 0.5 * (1 + np.cos(np.pi * (d - 0.35) / 0.25))
    return np.where(d < 0.35, 1.0, np.where(d > 0.6, 0.0, ramp))


def _smooth_normals(kind: str, sphere: np.ndarray, h: float = 1e-4) -> np.ndarray:
    """Unit normals of the smooth organ shape (central differences along two tangents)."""
    a = np.where(np.abs(sphere[:, :1]) < 0.9, [[1.0, 0.0, 0.0]], [[0.0, 1.0, 0.0]])
    e1 = np.cross(sphere, a)
    e1 /= np.linalg.norm(e1, axis=1, keepdims=True)
    e2 = np.cross(sphere, e1)

    def shape(p):
        return synthetic.organ_map(kind, p / np.linalg.norm(p, axis=1, keepdims=True))
    n = np.cross(shape(sphere + h * e1) - shape(sphere - h * e1),
                 shape(sphere + h * e2) - shape(sphere - h * e2))
    n /= np.linalg.norm(n, axis=1, keepdims=True)
    q = shape(sphere)
    return n * np.sign(np.einsum("ij,ij->i", n, q - q.mean(axis=0)))[:, None]


def planted_series(times, n_vertices: int = 2400, rate_mm_per_year: float = 1.0, seed: int = 11):
    """Scans of a kidney-like shape, each meshed independently (its own sphere
    triangulation) and posed at random, grown outward by `rate` mm/year in one region."""
    scans, spheres = [], []
    for i, t in enumerate(times):
        def grow(q, sphere, t=t):
            return q + (rate_mm_per_year * t * _region_weight(sphere))[:, None] \
                * _smooth_normals("kidney", sphere)
        s, sphere = synthetic.organ_surface("kidney", n_vertices + 150 * i, seed=seed + i,
                                            jitter=0.3, deform=grow)
        rotation = synthetic.random_rotation(40 + i)
        shift = np.random.default_rng(i).normal(0.0, 30.0, 3)
        scans.append(sk.Surface(s.vertices @ rotation.T + shift, s.faces))
        spheres.append(sphere)
    return scans, spheres


@pytest.mark.slow
def test_planted_regional_growth_rate_is_recovered():
    """4 scans at irregular times, 1.0 mm/year outward in one region and none elsewhere:
    the regional rate within 10%, the rest within ±0.1 mm/year, cycle error after
    synchronisation at most 0.01 of sqrt(area) and below the raw maps'."""
    times = [0.0, 0.8, 2.1, 3.4]
    scans, spheres = planted_series(times)
    result = compare_series(scans, times)
    weight = _region_weight(spheres[0])
    areas = scans[0].vertex_areas
    slope = result.rates.normal_displacement.slope
    inside, outside = weight >= 1.0, weight == 0.0
    region_rate = float(areas[inside] @ slope[inside] / areas[inside].sum())
    rest_rate = float(areas[outside] @ slope[outside] / areas[outside].sum())
    raw, synced = result.cycle_error["raw_mean"], result.cycle_error["synchronised_mean"]
    print(f"regional rate {region_rate:.4f} mm/year (planted 1.0), rest {rest_rate:+.4f} mm/year "
          f"(1st-99th percentile {np.percentile(slope[outside], 1):+.3f} .. "
          f"{np.percentile(slope[outside], 99):+.3f}); cycle error per sqrt(area): raw maps "
          f"{raw:.4f}, synchronised {synced:.5f}")
    assert abs(region_rate - 1.0) <= 0.1
    assert abs(rest_rate) <= 0.1
    assert np.all(np.abs(np.percentile(slope[outside], [1, 99])) <= 0.1)
    assert synced <= 0.01 and synced < raw
    se = result.rates.normal_displacement.stderr
    assert np.all(np.isfinite(se)) and float(np.median(se)) < 0.05
    assert result.rates.summary["volume_rate_ml_per_year"] > 0
