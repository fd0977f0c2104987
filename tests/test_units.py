"""Units of mesh files and the plausibility warnings, through the ``surfacekit`` command.

Meshes are small synthetic kidneys (invented shapes from ``sk.synthetic``) written
in millimetres, in metres (coordinates divided by 1000) and ten times too large
(as a surface in 0.1 mm voxel units would be).  Every warning must reach the
terminal (stderr), the JSON summary and the HTML report.
"""
from __future__ import annotations

import contextlib
import csv
import html
import io
import json

import numpy as np
import pytest

import surfacekit as sk
from surfacekit.analysis import plausibility
from surfacekit.app import cli, demo_data
from surfacekit.io.units import parse_units
from surfacekit.mesh.surface import SurfaceError


def run(*argv) -> tuple[int, dict | None, str]:
    """Run the command in-process; returns (exit code, parsed JSON summary, stderr)."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = cli.main([str(a) for a in argv])
    text = out.getvalue()
    return code, (json.loads(text) if text.strip() else None), err.getvalue()


def warning_lines(err: str) -> list[str]:
    return [line[len("surfacekit: warning: "):] for line in err.splitlines()
            if line.startswith("surfacekit: warning: ")]


@pytest.fixture(scope="module")
def meshes(tmp_path_factory):
    """The same baseline and grown follow-up in mm, in metres, and ten times too large."""
    d = tmp_path_factory.mktemp("units")
    base, _ = sk.synthetic.organ_surface("kidney", 400, seed=1)
    follow, _ = demo_data.followup_shape(450, 4.0, seed=5)
    for name, s in (("base", base), ("follow", follow)):
        sk.save(s, d / f"{name}.ply")
        sk.save(s.copy_with(vertices=s.vertices / 1000.0), d / f"{name}_m.ply")
        sk.save(s.copy_with(vertices=s.vertices * 10.0), d / f"{name}_x10.ply")
    return d


@pytest.fixture(scope="module")
def changes(meshes):
    """`change` runs: mm; metres with --units m; metres read as mm; mixed mm and metres."""
    runs = {}
    for key, files, extra in (("mm", ("base", "follow"), ()),
                              ("m_units", ("base_m", "follow_m"), ("--units", "m")),
                              ("m_as_mm", ("base_m", "follow_m"), ()),
                              ("mixed", ("base", "follow_m"), ())):
        out = meshes / f"change_{key}"
        code, summary, err = run("change", meshes / f"{files[0]}.ply", meshes / f"{files[1]}.ply",
                                 "-o", out, "--json", *extra)
        assert code == 0, err
        runs[key] = (summary, err, (out / "report.html").read_text("utf-8"), out)
    return runs


def assert_in_report(page: str, warnings: list[str]) -> None:
    """Every warning is in the report's warnings box, above the summary table."""
    assert "id='sk-warnings'" in page
    box = page[page.index("id='sk-warnings'"):page.index("</section>", page.index("id='sk-warnings'"))]
    assert page.index("id='sk-warnings'") < page.index("<h2>Summary</h2>")
    for w in warnings:
        assert html.escape(w, quote=True) in box


def close(a: float, b: float, scale: float) -> bool:
    return abs(a - b) <= 1e-6 * max(abs(a), abs(b)) + 1e-9 * scale


# ------------------------------------------------------------------ loading in units
def test_parse_units_names_numbers_and_errors():
    assert parse_units("mm") == ("mm", 1.0) and parse_units("M") == ("m", 1000.0)
    assert parse_units("cm") == ("cm", 10.0) and parse_units(0.5) == ("0.5", 0.5)
    assert parse_units("1000") == ("m", 1000.0)
    for bad in ("furlong", "-1", "0", "nan", True, None):
        with pytest.raises(SurfaceError):
            parse_units(bad)


def test_load_scales_to_mm_and_records_the_units(meshes):
    mm = sk.load(meshes / "base.ply")
    m = sk.load(meshes / "base_m.ply", units="m")
    np.testing.assert_allclose(m.vertices, mm.vertices, rtol=1e-12, atol=1e-12)
    assert m.metadata["units"] == "m" and m.metadata["mm_per_unit"] == 1000.0
    assert mm.metadata["units"] == "mm"
    s, _ = sk.io.load_with_fields(meshes / "base_m.ply", units=1000)
    assert s.metadata["units"] == "m" and np.isclose(s.area, mm.area, rtol=1e-9)


def test_inspect_units_m_gives_the_numbers_of_the_mm_file(meshes):
    _, mm, _ = run("inspect", meshes / "base.ply", "--json")
    code, m, err = run("inspect", meshes / "base_m.ply", "--units", "m", "--json")
    assert code == 0 and m["units"] == "m" and mm["units"] == "mm"
    assert not warning_lines(err) and m["warnings"] == mm["warnings"]
    for key in ("area_mm2", "volume_ml", "mean_edge_mm"):
        assert close(m[key], mm[key], mm[key]), key
    for key, value in mm["quality"].items():
        if isinstance(value, float):
            assert close(m["quality"][key], value, 1.0), key


def test_change_units_m_gives_the_numbers_of_the_mm_files(changes):
    (mm, _, _, out_mm), (m, err, page, out_m) = changes["mm"], changes["m_units"]
    assert m["units"] == {"baseline": "m", "follow-up": "m"} and not warning_lines(err)
    assert mm["warnings"] == [] and m["warnings"] == []  # a plausible pair: no warning
    assert "id='sk-warnings'" not in page and "<td>units</td><td>m,m</td>" in page
    scale = mm["baseline_area_mm2"]
    numbers = [k for k, v in mm.items() if isinstance(v, float)]
    assert len(numbers) > 15
    for key in numbers:
        assert close(m[key], mm[key], scale), (key, m[key], mm[key])
    with open(out_mm / "change.csv") as a, open(out_m / "change.csv") as b:
        rows_mm, rows_m = list(csv.DictReader(a)), list(csv.DictReader(b))
    assert len(rows_mm) == len(rows_m) == 1
    for key, value in rows_mm[0].items():  # written with 6 significant digits
        if key not in ("label", "name"):
            assert close(float(rows_m[0][key]), float(value), 1.0) or \
                np.isclose(float(rows_m[0][key]), float(value), rtol=2e-6), key


def test_describe_and_prepare_take_units(meshes, tmp_path):
    _, mm, _ = run("describe", meshes / "base.ply", "-o", tmp_path / "a.npz", "--eigenpairs", "8",
                   "--json")
    _, m, _ = run("describe", meshes / "base_m.ply", "-o", tmp_path / "b.npz", "--eigenpairs", "8",
                  "--units", "m", "--json")
    assert m["units"] == "m"
    for x, y in zip(m["first_eigenvalues_per_mm2"], mm["first_eigenvalues_per_mm2"]):
        assert close(x, y, mm["first_eigenvalues_per_mm2"][-1])
    code, p, _ = run("prepare", meshes / "base_m.ply", "-o", tmp_path / "p.ply", "--units", "m",
                       "--json")
    assert code == 0 and p["units"] == {"input": "m", "output": "mm"} and p["warnings"] == []
    assert np.isclose(sk.load(tmp_path / "p.ply").area, sk.load(meshes / "base.ply").area, rtol=1e-3)


@pytest.mark.parametrize("argv, message", [
    (("inspect", "{d}/base.ply", "--units", "furlong"), "unknown units 'furlong'"),
    (("inspect", "{d}/base.ply", "--units", "mm,m"), "one unit for all meshes or one per mesh"),
    (("change", "{d}/base.ply", "{d}/follow.ply", "-o", "{d}/x", "--units", "mm,m,cm"),
     "one per mesh (2: baseline, follow-up)"),
    (("prepare", "sample_meshes/demo/kidney_followup_seg.nii.gz", "-o", "{d}/x.ply", "--units", "cm"),
     "--units applies to mesh inputs"),
])
def test_bad_units_are_one_line_errors(meshes, argv, message):
    code, _, err = run(*(a.format(d=meshes) for a in argv))
    lines = [line for line in err.splitlines() if line.strip()]
    assert code == 2 and len(lines) == 1 and message in lines[0], err
    assert not (meshes / "x").exists() and not (meshes / "x.ply").exists()


# ------------------------------------------------------------------ warnings
def test_a_surface_in_metres_is_flagged_everywhere(changes, meshes):
    summary, err, page, _ = changes["m_as_mm"]
    size = [w for w in summary["warnings"] if "size implausible" in w]
    assert len(size) == 2 and all("--units m" in w and "0.05 ml" in w for w in size)
    assert warning_lines(err) == summary["warnings"]
    assert_in_report(page, summary["warnings"])
    code, one, err = run("inspect", meshes / "base_m.ply", "--json")
    assert code == 0 and any("--units m" in w for w in one["warnings"])
    assert any("size implausible" in w for w in warning_lines(err))


def test_a_pair_with_mixed_units_is_flagged_everywhere(changes):
    summary, err, page, _ = changes["mixed"]
    text = " ".join(summary["warnings"])
    assert "times larger than follow-up" in text and "suggests mm against m" in text
    assert "alignment residual" in text  # the follow-up is a speck: nothing aligns
    # the -100% volume change and the 10^-6 area ratio each carry their likely cause
    assert summary["volume_change_followup_minus_baseline_percent"] < -99.99
    assert any(w.startswith("volume change of -100%") and "units problem" in w
               for w in summary["warnings"])
    assert any(w.startswith("area change by a factor 1") and "units problem" in w
               for w in summary["warnings"])
    assert warning_lines(err) == summary["warnings"]
    assert_in_report(page, summary["warnings"])
    saved = sk.ChangeReport.load(changes["mixed"][3] / "change.npz")
    assert saved.summary()["warnings"] == summary["warnings"]


def test_an_implausibly_large_pair_is_flagged_everywhere(meshes):
    code, summary, err = run("match", meshes / "base_x10.ply", meshes / "follow_x10.ply",
                             "-o", meshes / "x10.npz", "--report", meshes / "x10.html", "--json")
    assert code == 0 and len(summary["warnings"]) == 2
    assert all("size implausible" in w and "voxel units" in w and "800 mm" in w
               for w in summary["warnings"])
    assert warning_lines(err) == summary["warnings"]
    assert_in_report((meshes / "x10.html").read_text("utf-8"), summary["warnings"])


def test_quiet_keeps_the_warnings_in_the_json(changes, meshes, tmp_path):
    code, summary, err = run("inspect", meshes / "base_m.ply", "--json", "-q")
    assert code == 0 and err == "" and any("size implausible" in w for w in summary["warnings"])


def test_thresholds_hold_on_plausible_organs():
    """The checks stay silent on the built-in organ shapes at their natural size."""
    for organ in ("kidney", "liver", "hippocampus", "ventricle"):
        s, _ = sk.synthetic.organ_surface(organ, 300, seed=2)
        assert plausibility.size_warnings(s) == [], organ
        assert plausibility.scale_warnings(s, s.copy_with(vertices=s.vertices * 2.5)) == []
        assert plausibility.scale_warnings(s, s.copy_with(vertices=s.vertices * 3.5)) != []
    assert plausibility.change_value_warnings(25.0, 10.0) == []
    assert len(plausibility.change_value_warnings(-100.0, 1e8)) == 2
