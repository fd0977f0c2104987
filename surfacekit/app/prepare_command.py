"""The ``surfacekit prepare`` command: a clean, closed mesh from a label volume or a mesh.

Options mirror :func:`surfacekit.preparation.prepare`: which part to keep (largest, all,
an index, or the part nearest a volume), and the volumetric rebuild route and its grid.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from .cli_util import MESH_SUFFIXES, existing, is_volume, load_surface, surface_facts
from .context import Context, InputError
from .unit_options import add_units_option, say_warnings, units_for


def prepare_args(p):
    p.add_argument("input", help="label volume (.nii .nii.gz; .nrrd .nhdr .mha .mhd with "
                                 "the itk extra) or mesh")
    p.add_argument("-o", "--output", required=True,
                   help="output mesh (.ply .obj .stl .off .gii .vtk .npz)")
    p.add_argument("--label", type=int, default=1, help="label to mesh in a volume (default 1)")
    p.add_argument("--target-vertices", type=int, default=None,
                   help="resample to about this many vertices (default: keep)")
    p.add_argument("--no-smooth", action="store_true", help="never smooth")
    p.add_argument("--keep", default="largest",
                   help="part to keep when the mesh holds several: largest (default), all "
                        "(one output per part, <stem>_part<k><suffix>, k=0 the largest) or an "
                        "index N (0 = largest)")
    p.add_argument("--keep-volume", type=float, default=None, metavar="ML",
                   help="keep the closed part whose enclosed volume is nearest ML millilitres")
    p.add_argument("--voxel-mm", type=float, default=None, metavar="MM",
                   help="grid spacing when the mesh is rebuilt through a volume (mm)")
    vol = p.add_mutually_exclusive_group()
    vol.add_argument("--volumetric", dest="volumetric", action="store_true", default=None,
                     help="always rebuild through a volume")
    vol.add_argument("--no-volumetric", dest="volumetric", action="store_false",
                     help="never rebuild through a volume (a non-orientable mesh is an error)")
    add_units_option(p)


def _keep_choice(a) -> str | int:
    """The ``keep`` argument of ``prepare`` from --keep / --keep-volume."""
    if a.keep_volume is not None:
        if a.keep != "largest":
            raise InputError("give either --keep or --keep-volume, not both")
        if not (np.isfinite(a.keep_volume) and a.keep_volume > 0):
            raise InputError(f"--keep-volume must be a positive number of ml, got {a.keep_volume}")
        return f"volume:{a.keep_volume!r}"
    if a.keep in ("largest", "all"):
        return a.keep
    if not a.keep.isdigit():
        raise InputError(f"--keep must be largest, all or a part index, got {a.keep!r}")
    return int(a.keep)


def _part_paths(output: str, n: int) -> list[Path]:
    """``<stem>_part<k><suffix>`` next to ``output`` (suffix may be double, e.g. .nii.gz)."""
    out = Path(output)
    suffix = next(s for s in MESH_SUFFIXES if out.name.lower().endswith(s))
    stem = out.name[:len(out.name) - len(suffix)]
    return [out.with_name(f"{stem}_part{k}{out.name[len(stem):]}") for k in range(n)]


def run_prepare(ctx: Context) -> dict:
    from ..analysis.plausibility import size_warnings
    from ..io import save
    from ..preparation import from_segmentation, prepare

    a = ctx.args
    if a.target_vertices is not None and a.target_vertices < 100:
        raise InputError(f"--target-vertices must be at least 100, got {a.target_vertices}")
    keep = _keep_choice(a)
    if a.voxel_mm is not None and not (np.isfinite(a.voxel_mm) and a.voxel_mm > 0):
        raise InputError(f"--voxel-mm must be a positive number of mm, got {a.voxel_mm}")
    if keep == "all":
        if not any(a.output.lower().endswith(x) for x in MESH_SUFFIXES):
            raise InputError(f"output {a.output} must end with one of {', '.join(MESH_SUFFIXES)}")
    else:
        target = ctx.outputs.claim(a.output, suffixes=MESH_SUFFIXES)
    src = existing(a.input)
    units = units_for(a.units, ["input"])[0]
    if is_volume(src) and units != "mm":
        raise InputError("--units applies to mesh inputs; a label volume is placed in mm by its "
                         "own voxel size and orientation")
    with ctx.progress(2, "prepare") as bar:
        if is_volume(src):
            surface = from_segmentation(src, a.label)
        else:
            surface = load_surface(a.input, units=units)
        bar.update()
        result = prepare(surface, target_vertices=a.target_vertices, keep=keep,
                         smooth=False if a.no_smooth else None,
                         volumetric=a.volumetric, voxel_mm=a.voxel_mm)
        bar.update()
    warnings = size_warnings(surface, src.name)
    say_warnings(ctx, warnings)
    summary = {"input": src.name, "output": str(a.output),
               "units": {"input": units, "output": "mm"}, "before": surface_facts(surface)}
    if keep != "all":
        prepared, report = result
        save(prepared, target)
        return {**summary, "after": surface_facts(prepared), "steps": report.to_dict(),
                "warnings": warnings}
    parts = []
    for path, (prepared, report) in zip(_part_paths(a.output, len(result)), result):
        save(prepared, ctx.outputs.claim(path, suffixes=MESH_SUFFIXES))
        parts.append({"output": str(path), "after": surface_facts(prepared),
                      "steps": report.to_dict()})
    return {**summary, "outputs": [p["output"] for p in parts], "parts": parts,
            "warnings": warnings}
