"""Series of scans per subject: scan times and their checks (surfacekit/cohort/timeline.py),
least-squares rates (surfacekit/analysis/rates.py), maps synchronised through the baseline
(surfacekit/correspondence/synchronise.py, surfacekit/analysis/longitudinal.py), and series
manifests in a cohort run (surfacekit/cohort/series.py, series_tables.py)."""
from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

import surfacekit as sk
from surfacekit.analysis.longitudinal import compare_series
from surfacekit.analysis.rates import fit_rates
from surfacekit.app import cli
from surfacekit.cohort import series_tables
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


def test_series_refuses_another_organ_and_unordered_times():
    kidney, _ = synthetic.organ_surface("kidney", 300, seed=1)
    small, _ = synthetic.organ_surface("hippocampus", 300, seed=2)
    with pytest.raises(sk.mesh.surface.SurfaceError,
                       match="probably not the same organ as the baseline"):
        compare_series([kidney, small], [0.0, 1.0], scan_names=["baseline.ply", "later.ply"])
    with pytest.raises(ValueError, match="strictly increasing"):
        compare_series([kidney, kidney], [1.0, 1.0])
    with pytest.raises(ValueError, match="at least two scans|>= 2 scans"):
        compare_series([kidney], [0.0])


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
    weight = _region_weight(spheres[0])
    labels = (weight > 0.5).astype(int)
    result = compare_series(scans, times, labels=labels, names={0: "rest", 1: "grown"})
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
    # regional rates of the labelled regions: the planted rate averaged over each region
    for label, name in ((1, "grown"), (0, "rest")):
        m = labels == label
        planted = float(areas[m] @ weight[m] / areas[m].sum())
        found = result.rates.summary["regions"][name]
        rate = found["mean_normal_displacement_outward_rate_mm_per_year"]
        assert abs(rate - planted) <= 0.1 * max(planted, 1.0), (name, rate, planted)
        assert found["mean_normal_displacement_outward_rate_stderr_mm_per_year"] < 0.05
    se = result.rates.normal_displacement.stderr
    assert np.all(np.isfinite(se)) and float(np.median(se)) < 0.05
    assert result.rates.summary["volume_rate_ml_per_year"] > 0


# ------------------------------------------------------------------ series cohort
def _bump(years: float):
    """Outward growth of up to `years` mm around one pole (1 mm/year at its centre)."""
    def deform(q, p):
        return q + (years * np.exp(-((p[:, 0] - 1) ** 2 + p[:, 1] ** 2 + p[:, 2] ** 2))
                    )[:, None] * p
    return deform


def _years(date: str, first: str) -> float:
    return float((np.datetime64(date) - np.datetime64(first)).astype(float) / 365.25)


@pytest.fixture(scope="module")
def series_manifest(tmp_path_factory):
    """A template and six subjects: a grows over four dated scans (rows newest first and
    a bad date), f in a's group and b, e in the other have two scans and no growth (b also a
    repeated date), c has one scan, and d's follow-up is another organ."""
    folder = tmp_path_factory.mktemp("series")
    template, sphere = synthetic.organ_surface("kidney", 450, seed=100)
    pole = (sphere[:, 0] > 0.5).astype(np.int32)       # the +x pole, where subject a grows
    sk.save(template, folder / "template.ply", fields={"label": pole})
    (folder / "template.ply.regions.csv").write_text("label,name\n0,body\n1,upper pole\n")
    lines = ["subject,path,label,group,role,age,sex,date", "atlas,template.ply,,,template,,,"]
    plan = {"a": ("g1", ["2020-03-01", "2021-05-10", "2022-09-01", "2023-04-20"]),
            "f": ("g1", ["2019-01-01", "2020-07-01"]),
            "b": ("g2", ["2019-05-01", "2020-02-01"]), "e": ("g2", ["2018-01-01", "2019-06-01"]),
            "c": ("g2", ["2020-01-01"])}
    for sub, (group, dates) in plan.items():
        rows = []
        for k, d in enumerate(dates):
            s, _ = synthetic.organ_surface("kidney", 450, seed=10 * ord(sub) + k,
                                           deform=_bump(_years(d, dates[0])) if sub == "a"
                                           else None)
            sk.save(s, folder / f"{sub}{k}.ply")
            rows.append(f"{sub},{sub}{k}.ply,,{group},subject,50,F,{d}")
        lines += rows[::-1] if sub == "a" else rows          # a: newest first
    lines += ["a,a0.ply,,g1,subject,50,F,2020-13-01",       # no such month
              "b,b1.ply,,g2,subject,50,F,2019-05-01"]       # the date of b's first scan
    other, _ = synthetic.organ_surface("hippocampus", 450, seed=5)
    sk.save(other, folder / "d1.ply")
    kidney, _ = synthetic.organ_surface("kidney", 450, seed=77)
    sk.save(kidney, folder / "d0.ply")
    lines += ["d,d0.ply,,g2,subject,50,F,2020-01-01", "d,d1.ply,,g2,subject,50,F,2021-01-01"]
    (folder / "series.csv").write_text("\n".join(lines) + "\n")
    return folder / "series.csv"


# the command line's defaults, so that its run reuses what the API's run computed
SERIES_OPTIONS = {"target_vertices": 400, "n_permutations": 50, "progress": False}
TABLES = ("series.csv", "series_scans.csv", "cohort_summary.csv", "group_test_rates.csv")


@pytest.fixture(scope="module")
def series_runs(series_manifest, tmp_path_factory):
    """One uninterrupted run, and one interrupted during its second series and resumed."""
    whole = tmp_path_factory.mktemp("whole")
    full = sk.run_cohort(series_manifest, whole, **SERIES_OPTIONS)
    resumed = tmp_path_factory.mktemp("resumed")
    real, calls = series_tables.run_series, []

    def interrupted(task):
        calls.append(task.subject)
        if len(calls) == 2:
            raise KeyboardInterrupt   # as if the run were stopped here
        return real(task)

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(series_tables, "run_series", interrupted)
        with pytest.raises(KeyboardInterrupt):
            sk.run_cohort(series_manifest, resumed, **SERIES_OPTIONS)
    assert not (resumed / "series.csv").exists()
    # resumed from the command line: a series manifest needs no flag of its own
    code = cli.main(["cohort", str(series_manifest), "-o", str(resumed), "--target-vertices",
                     "400", "--permutations", "50", "--quiet"])
    return whole, full, resumed, code


def _csv(path) -> dict:
    with open(path, newline="") as fh:
        return {r["subject"]: r for r in csv.DictReader(fh)}


@pytest.mark.slow
@pytest.mark.filterwarnings("ignore:covariate")   # age and sex are the same for every subject
def test_series_cohort_rows_bad_input_and_resume(series_runs):
    whole, full, resumed, code = series_runs
    rows = _csv(whole / "series.csv")
    assert {k: r["status"] for k, r in rows.items()} == {
        "a": "ok", "f": "ok", "b": "ok", "e": "ok", "c": "no_rate", "d": "failed"}
    header = (whole / "series.csv").read_text().splitlines()[0].split(",")
    assert "mean_normal_displacement_outward_rate_mm_per_year" in header
    a = rows["a"]
    assert a["n_scans"] == "4" and a["n_manifest_rows"] == "5"
    assert float(a["time_span_years"]) == pytest.approx(_years("2023-04-20", "2020-03-01"),
                                                        rel=1e-5)
    assert "out of time order; they were sorted by time" in a["warnings"]
    assert "1 manifest row(s) of this subject left out" in a["warnings"]
    assert float(a["mean_normal_displacement_outward_rate_mm_per_year"]) > 0.1   # it grows
    assert float(a["cycle_error_synchronised_per_sqrt_area"]) < float(
        a["cycle_error_raw_per_sqrt_area"])
    assert a["mean_normal_displacement_outward_rate_stderr_mm_per_year"] != ""
    assert rows["b"]["mean_normal_displacement_outward_rate_stderr_mm_per_year"] == ""  # 2 scans
    c = rows["c"]   # one scan: no rate, with the reason; never zero
    assert c["error"] == "one scan with a valid time: a rate needs two or more"
    assert c["mean_normal_displacement_outward_rate_mm_per_year"] == ""
    assert "probably not the same organ as the baseline" in rows["d"]["error"]
    with open(whole / "series_scans.csv", newline="") as fh:
        scans = list(csv.DictReader(fh))
    notes = {(r["subject"], r["date"]): r["note"] for r in scans if r["used"] == "0"}
    assert notes[("a", "2020-13-01")].endswith("is not an ISO 8601 date (YYYY-MM-DD)")
    assert "same time as line" in notes[("b", "2019-05-01")]
    assert [s["status"] for s in full.series] == ["ok", "ok", "ok", "ok", "no_rate", "failed"]
    # the rate fields on the template, in the field store, as the group test's input
    import zarr
    group = zarr.open_group(whole / "series_fields.zarr", mode="r")
    rate = np.asarray(group["normal_displacement_outward_rate_mm_per_year"])
    assert rate.shape[0] == 6 and np.all(np.isfinite(rate[:4])) and np.all(np.isnan(rate[4:]))
    # a: up to 1 mm/year along the sphere direction at the bump's centre (less along the normal
    # of the bent shape, and smoothed over two edge lengths on these coarse meshes)
    assert 0.4 < np.max(rate[0]) < 1.3
    # f, b, e: no growth built in; their two-scan rates carry the meshing offset over the
    # time span (about 7 mm edges here: an inward offset of a few tenths of a mm)
    assert np.mean(rate[0]) > np.max(np.mean(rate[1:4], axis=1)) + 0.1
    assert np.all(np.abs(np.mean(rate[1:4], axis=1)) < 0.3)
    info = json.loads((whole / "group_test_rates.json").read_text())
    assert info["contrast"] == "g2 minus g1" and info["groups"] == {"g1": 2, "g2": 2}
    # regional rates on the template's regions (names from template.ply.regions.csv)
    pole = "region_upper_pole_mean_normal_displacement_outward_rate_mm_per_year"
    body = "region_body_mean_normal_displacement_outward_rate_mm_per_year"
    assert float(a[pole]) > float(a[body]) + 0.1 > 0.1   # the bump is centred on the pole
    assert rows["c"][pole] == ""
    # interrupted and resumed (from the command line): byte-identical tables, the finished
    # subjects and series reused; exit 3 because d's series failed; the report is written
    assert code == 3
    assert json.loads((resumed / "run_summary.json").read_text())["n_computed"] == 0
    html = (resumed / "series_report.html").read_text()
    assert "Trajectory of subject a" in html and "Rates on the cohort template" in html
    assert (resumed / "series_figures" / "trajectory_of_subject_a.png").is_file()
    for name in TABLES:
        assert (resumed / name).read_bytes() == (whole / name).read_bytes(), name
