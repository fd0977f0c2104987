"""The demo scenario: an invented, synthetic kidney follow-up study (no person's data).

Everything is generated deterministically from :func:`surfacekit.synthetic.organ_surface`:

* ``kidney_baseline.ply`` — "scanner A": a clean 3000-vertex mesh of the kidney.
* ``kidney_followup.ply`` — "scanner B": a 4000-vertex mesh from a different
  triangulation, in another pose (rotated and shifted), with a slowly growing
  region of up to 4.5 mm on the lateral side of the upper pole.
* ``kidney_followup_seg.nii.gz`` — the same follow-up kidney as a label volume
  with anisotropic voxels (0.9 x 0.9 x 2.5 mm; label 1 = kidney, label 2 = a small
  invented neighbouring structure), so meshing it gives staircase artefacts.
* ``kidney_template.ply`` — a template kidney with a per-vertex ``region`` field
  (1 upper pole, 2 lower pole, 3 medial side, 4 lateral side).
* ``cohort/subject_XX.ply`` and ``demo_cohort.csv`` — 16 invented subjects in two
  groups ("control", "growth"); the growth group carries a regional bulge.

Sizes are scaled down by ``size="small"`` for quick tests.
"""
from __future__ import annotations

import gzip
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..io.files import atomic_path
from ..io.tables import write_csv
from ..mesh import synthetic
from ..mesh.surface import Surface

REGION_NAMES = {1: "upper pole", 2: "lower pole", 3: "medial side", 4: "lateral side"}
# Centre (on the parameter sphere) of the growing region: lateral side of the upper pole.
GROWTH_CENTRE = np.array([0.7, -0.65, 0.3]) / np.linalg.norm([0.7, -0.65, 0.3])
SCENARIO_TEXT = """Synthetic kidney follow-up study (invented for the surfacekit demo; no person's data).

A kidney is imaged twice on two different (imaginary) scanners. Scanner A gave a clean
baseline mesh of {baseline} vertices. Scanner B, at follow-up, gave a label volume with
{voxel} mm voxels (staircase artefacts) in a different patient pose, from which a mesh of
{followup} vertices is made; a clean follow-up mesh of the same shape is also provided.
Between the scans a region on the lateral side of the upper pole grew outward by up to
{growth} mm (true volume change {true_dv:.2f} ml). A template kidney carries four labelled
regions. A cohort of {n_subjects} invented subjects in two groups (control, growth) is
listed in demo_cohort.csv; the growth group has a bulge of about {cohort_growth} mm at the
same place. All numbers are invented. Research use only.
"""


@dataclass(frozen=True)
class DemoSizes:
    baseline: int = 3000
    followup: int = 4000
    template: int = 2500
    cohort: int = 2200
    n_subjects: int = 16
    voxel: tuple = (0.9, 0.9, 2.5)
    growth_mm: float = 4.5
    cohort_growth_mm: float = 3.0


SIZES = {"full": DemoSizes(),
         "small": DemoSizes(baseline=1200, followup=1500, template=1000, cohort=900,
                            n_subjects=8, voxel=(1.3, 1.3, 3.0))}


def regions(sphere_points: np.ndarray) -> np.ndarray:
    """Region labels 1..4 from the parameter-sphere position (the shape's ground truth)."""
    x, y = sphere_points[:, 0], sphere_points[:, 1]
    return np.where(x > 0.45, 1, np.where(x < -0.45, 2, np.where(y > 0.0, 3, 4))).astype(np.int64)


def bulge(surface: Surface, sphere_points: np.ndarray, amplitude_mm: float,
          centre: np.ndarray = GROWTH_CENTRE, width_rad: float = 0.45) -> Surface:
    """Push a smooth Gaussian-shaped region outward along the vertex normals (mm)."""
    angle = np.arccos(np.clip(sphere_points @ centre, -1.0, 1.0))
    w = np.exp(-((angle / width_rad) ** 2))
    return surface.copy_with(vertices=surface.vertices + amplitude_mm * w[:, None] * surface.vertex_normals)


def rigid(surface: Surface, rotation: np.ndarray, shift) -> Surface:
    return surface.copy_with(vertices=surface.vertices @ rotation.T + np.asarray(shift, float))


def rotation_about(axis, degrees: float) -> np.ndarray:
    from scipy.spatial.transform import Rotation

    axis = np.asarray(axis, float) / np.linalg.norm(axis)
    return Rotation.from_rotvec(np.radians(degrees) * axis).as_matrix()


FOLLOWUP_ROTATION = rotation_about([0.3, 1.0, 0.2], 28.0)
FOLLOWUP_SHIFT = (14.0, -9.0, 32.0)


def followup_shape(n_vertices: int, growth_mm: float, *, seed: int = 202):
    """Follow-up kidney in scanner B's pose, and its sphere parameters."""
    s, sp = synthetic.organ_surface("kidney", n_vertices, seed=seed)
    return rigid(bulge(s, sp, growth_mm), FOLLOWUP_ROTATION, FOLLOWUP_SHIFT), sp


def voxelize(surface: Surface, spacing, margin_mm: float = 6.0) -> tuple[np.ndarray, np.ndarray]:
    """Binary mask of the inside of a closed surface, sampled at voxel centres.

    Ray parity along the third axis (a point is inside when a ray from it
    crosses the surface an odd number of times; the even-odd rule, common
    practice), vectorised over triangles.  Returns ``(mask (nx, ny, nz) bool,
    affine (4, 4))`` with ``world = affine @ (i, j, k, 1)`` in mm.
    """
    spacing = np.asarray(spacing, dtype=float)
    lo = surface.vertices.min(axis=0) - margin_mm
    hi = surface.vertices.max(axis=0) + margin_mm
    shape = np.ceil((hi - lo) / spacing).astype(int) + 1
    # an irrational sub-voxel offset keeps rays off mesh vertices and edges
    origin = lo + spacing * np.array([0.1234567, 0.2718281, 0.0])
    tri = (surface.vertices[surface.faces] - origin) / spacing  # voxel-index units
    i_lo = np.ceil(tri[:, :, 0].min(axis=1)).astype(int)
    i_hi = np.floor(tri[:, :, 0].max(axis=1)).astype(int)
    j_lo = np.ceil(tri[:, :, 1].min(axis=1)).astype(int)
    j_hi = np.floor(tri[:, :, 1].max(axis=1)).astype(int)
    ni, nj = np.maximum(i_hi - i_lo + 1, 0), np.maximum(j_hi - j_lo + 1, 0)
    count = ni * nj
    t = np.repeat(np.arange(len(tri)), count)
    local = np.arange(count.sum()) - np.repeat(np.cumsum(count) - count, count)
    ci = i_lo[t] + local // nj[t]
    cj = j_lo[t] + local % nj[t]
    a, b, c = tri[t, 0], tri[t, 1], tri[t, 2]
    # 2-D barycentric coordinates of the column (ci, cj) in each candidate triangle
    det = (b[:, 0] - a[:, 0]) * (c[:, 1] - a[:, 1]) - (c[:, 0] - a[:, 0]) * (b[:, 1] - a[:, 1])
    ok = np.abs(det) > 1e-12
    det = np.where(ok, det, 1.0)
    u = ((ci - a[:, 0]) * (c[:, 1] - a[:, 1]) - (c[:, 0] - a[:, 0]) * (cj - a[:, 1])) / det
    v = ((b[:, 0] - a[:, 0]) * (cj - a[:, 1]) - (ci - a[:, 0]) * (b[:, 1] - a[:, 1])) / det
    inside = ok & (u >= 0) & (v >= 0) & (u + v <= 1)
    z = (a[:, 2] + u * (b[:, 2] - a[:, 2]) + v * (c[:, 2] - a[:, 2]))[inside]
    ci, cj = ci[inside], cj[inside]
    toggle = np.zeros((shape[0], shape[1], shape[2] + 1), dtype=np.int32)
    np.add.at(toggle, (ci, cj, np.clip(np.ceil(z).astype(int), 0, shape[2])), 1)
    mask = (np.cumsum(toggle, axis=2)[..., : shape[2]] % 2) == 1
    affine = np.eye(4)
    affine[:3, :3] = np.diag(spacing)
    affine[:3, 3] = origin
    return mask, affine


def write_nifti(path: Path, labels: np.ndarray, affine: np.ndarray) -> None:
    """A label volume as .nii.gz with a zero gzip time stamp (byte-reproducible)."""
    import nibabel as nib

    img = nib.Nifti1Image(labels.astype(np.uint8), affine)
    img.header.set_xyzt_units("mm")
    data = gzip.compress(img.to_bytes(), compresslevel=6, mtime=0)
    with atomic_path(path, suffix=".gz") as tmp:
        tmp.write_bytes(data)


def _save(surface: Surface, path: Path, fields: dict | None = None) -> None:
    from ..io.files import save

    save(surface, path, fields=fields)


def cohort_rows(sizes: DemoSizes, seed: int) -> list[dict]:
    """Invented subjects: id, group, age, sex and shape parameters (deterministic)."""
    rng = np.random.default_rng(seed + 5000)
    rows = []
    for k in range(sizes.n_subjects):
        group = "control" if k < sizes.n_subjects // 2 else "growth"
        rows.append({"subject": f"subject_{k + 1:02d}", "group": group,
                     "age": int(rng.integers(45, 76)), "sex": "F" if rng.random() < 0.5 else "M",
                     # modest size variation, so the regional effect stands out (invented)
                     "scale": float(1.0 + 0.015 * rng.standard_normal()),
                     "stretch": float(1.0 + 0.015 * rng.standard_normal()),
                     "growth": (float(sizes.cohort_growth_mm * (1 + 0.15 * rng.standard_normal()))
                                if group == "growth" else 0.0),
                     "angle": float(rng.uniform(-15, 15)), "axis": rng.standard_normal(3),
                     "shift": rng.uniform(-20, 20, 3), "mesh_seed": int(1000 + seed + k)})
    return rows


def write_scenario(folder, size: str = "full", seed: int = 0) -> dict:
    """Write every input file of the demo into `folder`; returns paths and true values."""
    sizes = SIZES[size]
    folder = Path(folder)
    (folder / "cohort").mkdir(parents=True, exist_ok=True)
    paths = {}
    base, base_sp = synthetic.organ_surface("kidney", sizes.baseline, seed=1 + seed)
    paths["baseline"] = folder / "kidney_baseline.ply"
    _save(base, paths["baseline"])
    follow, follow_sp = followup_shape(sizes.followup, sizes.growth_mm, seed=202 + seed)
    paths["followup"] = folder / "kidney_followup.ply"
    _save(follow, paths["followup"])
    # label volume of the follow-up as scanner B would give it, plus a small neighbour (label 2)
    fine, _ = followup_shape(4 * sizes.followup, sizes.growth_mm, seed=303 + seed)
    mask, affine = voxelize(fine, sizes.voxel, margin_mm=20.0)
    labels = mask.astype(np.uint8)
    centre_vox = np.array(mask.shape) * np.array([0.15, 0.15, 0.5])
    ijk = np.indices(mask.shape).reshape(3, -1).T
    blob = (np.linalg.norm((ijk - centre_vox) * np.asarray(sizes.voxel), axis=1) < 7.0)
    labels.reshape(-1)[blob & ~mask.reshape(-1)] = 2
    paths["followup_seg"] = folder / "kidney_followup_seg.nii.gz"
    write_nifti(paths["followup_seg"], labels, affine)
    template, template_sp = synthetic.organ_surface("kidney", sizes.template, seed=7 + seed)
    paths["template"] = folder / "kidney_template.ply"
    _save(template, paths["template"], fields={"region": regions(template_sp)})
    # region names beside the template, where `change --regions` looks for them
    paths["template_names"] = folder / "kidney_template.ply.regions.csv"
    write_csv(paths["template_names"], [{"label": k, "name": v} for k, v in sorted(REGION_NAMES.items())],
              columns=("label", "name"))
    # truth built into the scenario: volume change of the bulge on a fine mesh (same pose-free shape)
    fine_base, fine_sp = synthetic.organ_surface("kidney", 20000, seed=99, jitter=0.0)
    true_dv = (bulge(fine_base, fine_sp, sizes.growth_mm).volume - fine_base.volume) / 1000.0
    # cohort
    manifest_rows = [{"subject": "template", "path": "kidney_template.ply", "label": "",
                      "group": "", "role": "template", "age": "", "sex": ""}]
    for r in cohort_rows(sizes, seed):
        def shape(q, sp, r=r):
            return q * np.array([r["stretch"], 1.0, 1.0]) * r["scale"]
        s, sp = synthetic.organ_surface("kidney", sizes.cohort, seed=r["mesh_seed"], deform=shape)
        if r["growth"]:
            s = bulge(s, sp, r["growth"])
        s = rigid(s, rotation_about(r["axis"], r["angle"]), r["shift"])
        rel = f"cohort/{r['subject']}.ply"
        _save(s, folder / rel)
        manifest_rows.append({"subject": r["subject"], "path": rel, "label": "",
                              "group": r["group"], "role": "subject", "age": r["age"],
                              "sex": r["sex"]})
    paths["manifest"] = folder / "demo_cohort.csv"
    write_csv(paths["manifest"], manifest_rows)
    text = SCENARIO_TEXT.format(baseline=sizes.baseline, followup=sizes.followup,
                                voxel=" x ".join(f"{v:g}" for v in sizes.voxel),
                                growth=sizes.growth_mm, true_dv=true_dv,
                                n_subjects=sizes.n_subjects, cohort_growth=sizes.cohort_growth_mm)
    paths["readme"] = folder / "SCENARIO.txt"
    paths["readme"].write_text(text)
    truth = {"true_volume_change_ml": true_dv, "growth_mm": sizes.growth_mm,
             "voxel_mm": list(sizes.voxel), "baseline_sphere": base_sp, "followup_sphere": follow_sp}
    return {"paths": paths, "truth": truth, "sizes": sizes}
