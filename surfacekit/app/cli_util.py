"""Helpers shared by the ``surfacekit`` subcommands and the demo: input checks and records."""
from __future__ import annotations

from pathlib import Path

import numpy as np

from ..io.files import MESH_SUFFIXES as LIBRARY_MESH_SUFFIXES
from ..io.images import VOLUME_SUFFIXES  # NIfTI, NRRD, MetaImage
from ..mesh.surface import SurfaceError
from .context import InputError

#: every mesh format the library reads and writes (``sk.load`` / ``sk.save``)
MESH_SUFFIXES = LIBRARY_MESH_SUFFIXES
#: where ``surfacekit demo -o surfacekit-demo`` writes its inputs: the help examples use them
DEMO_DATA = "surfacekit-demo/data"


def existing(path: str, what: str = "input") -> Path:
    p = Path(path)
    if not p.exists():
        raise InputError(f"{what} not found: {p}")
    if p.is_dir():
        raise InputError(f"{what} is a folder, expected a file: {p}")
    return p


def is_volume(path: Path) -> bool:
    return path.name.lower().endswith(VOLUME_SUFFIXES)


def load_surface(path: str, what: str = "mesh", units="mm"):
    """Load a mesh for a command, in `units` scaled to mm; bad files become one-line input errors."""
    from ..io.files import load

    p = existing(path, what)
    if is_volume(p):
        raise InputError(f"{p.name} is a label volume; run 'surfacekit prepare {p} -o mesh.ply' first")
    if not p.name.lower().endswith(MESH_SUFFIXES):
        raise InputError(f"unsupported {what} format: {p.name} (use {', '.join(MESH_SUFFIXES)})")
    try:
        return load(p, units)
    except SurfaceError as exc:
        raise InputError(f"cannot read {p.name}: {exc}") from None


def input_record(path: Path, surface=None) -> dict:
    import hashlib

    h = hashlib.sha256(path.read_bytes()).hexdigest()[:16] if path.is_file() else ""
    rec = {"file": path.name, "sha256 (first 16)": h}
    if surface is not None:
        rec.update(vertices=surface.n_vertices, faces=surface.n_faces,
                   units=surface.metadata.get("units", "mm"))
    return rec


def surface_facts(s) -> dict:
    """Basic geometric facts of a surface (mm, mm², ml); parts counted as a user sees them
    (pieces touching only at a vertex are separate parts)."""
    from ..preparation.mesh_quality import part_labels

    parts = part_labels(s.faces, s.n_vertices)
    return {"vertices": s.n_vertices, "faces": s.n_faces, "area_mm2": float(s.area),
            "volume_ml": float(s.volume) / 1000.0, "closed": bool(s.is_closed),
            "edge_manifold": bool(s.is_edge_manifold), "components": int(parts.max()) + 1 if len(parts) else 0,
            "genus": int(s.genus) if s.is_closed and s.is_edge_manifold else None,
            "mean_edge_mm": float(s.mean_edge_length)}


def without_timings(result):
    """Drop wall-clock timings from a result's ``info`` before it is saved.

    Saved files must be byte-identical for the same inputs and seed; timings
    belong in the printed summary and the report only.
    """
    def strip(value):
        if isinstance(value, dict):
            return {k: strip(v) for k, v in value.items() if "timing" not in str(k).lower()}
        if isinstance(value, list):
            return [strip(v) for v in value]
        return value

    info = getattr(result, "info", None)
    if isinstance(info, dict):
        timings = {k: v for k, v in info.items() if "timing" in str(k).lower()}
        result.info = strip(info)
        return timings
    return {}


#: a landmark farther than this many mean edge lengths from its nearest vertex is reported
LANDMARK_SNAP_LIMIT = 2.0


def landmark_pairs(path: str | None, source, target) -> tuple[tuple, dict]:
    """Landmark vertex pairs for a command, and what the summary says about them.

    Points in mm are snapped to the nearest vertex of each surface; the largest
    snapping distance per side is reported, and a point farther than
    :data:`LANDMARK_SNAP_LIMIT` mean edge lengths from its surface is warned about
    (it probably has the wrong coordinates, units or side).
    """
    import warnings

    from ..correspondence.landmark_files import (
        check_landmark_indices,
        read_landmark_file,
        snap_landmarks,
    )

    if path is None:
        return (), {}
    p = existing(path, "landmark file")
    try:
        pairs, points = read_landmark_file(p)
        if points is None:
            check_landmark_indices(pairs, source, target, p.name)
            info = {"pairs": len(pairs), "given_as": "vertex indices"}
            return tuple(map(tuple, pairs.tolist())), {"landmarks": info}
    except ValueError as exc:
        raise InputError(str(exc)) from None
    pairs, dist = snap_landmarks(points, source, target)
    info = {"pairs": len(pairs), "given_as": "coordinates (mm), snapped to the nearest vertex"}
    notes = []
    for side, (surface, which) in enumerate(((source, "source"), (target, "target"))):
        limit = LANDMARK_SNAP_LIMIT * float(surface.mean_edge_length)
        info[f"{which}_snap_max_mm"] = float(dist[:, side].max())
        info[f"{which}_snap_mean_mm"] = float(dist[:, side].mean())
        notes += [f"landmark {k + 1} lies {dist[k, side]:.3g} mm from the {which} surface's nearest "
                  f"vertex, more than {LANDMARK_SNAP_LIMIT:g} mean edge lengths ({limit:.3g} mm): "
                  "check its coordinates and units" for k in np.flatnonzero(dist[:, side] > limit)]
    for note in notes:
        warnings.warn(note, stacklevel=2)
    if notes:
        info["warnings"] = notes
    return tuple(map(tuple, pairs.tolist())), {"landmarks": info}


def region_names_sidecar(template) -> Path:
    """Where a template's region names live beside it: ``<template file>.regions.csv``."""
    template = Path(template)
    return template.with_name(template.name + ".regions.csv")


def write_region_names(path, names: dict) -> Path:
    """Write ``{label: name}`` as the CSV that ``--region-names`` reads (columns ``label,name``)."""
    from ..io.tables import write_csv

    rows = [{"label": int(k), "name": str(v)} for k, v in sorted(names.items())]
    return write_csv(path, rows, columns=("label", "name"))


def read_region_names(path) -> dict[int, str]:
    """``{label: name}`` from a CSV with columns ``label,name``; bad files are one-line InputErrors."""
    import csv

    p = existing(str(path), "region names file")
    try:
        rows = list(csv.reader(p.read_text(encoding="utf-8").splitlines()))
    except UnicodeDecodeError:
        raise InputError(f"{p.name}: region names file is not a text CSV") from None
    rows = [r for r in rows if r and any(c.strip() for c in r)]
    head = [c.strip().lower() for c in rows[0]] if rows else []
    if "label" not in head or "name" not in head:
        raise InputError(f"{p.name}: region names CSV needs a header with 'label' and 'name' columns")
    li, ni = head.index("label"), head.index("name")
    names: dict[int, str] = {}
    for n, r in enumerate(rows[1:], start=2):
        try:
            label, name = int(r[li]), r[ni].strip()
        except (ValueError, IndexError):
            raise InputError(f"{p.name}: row {n} does not hold an integer label and a name") from None
        if not name:
            raise InputError(f"{p.name}: row {n} has an empty name")
        if label in names:
            raise InputError(f"{p.name}: label {label} is named twice (rows naming it: "
                             f"{names[label]!r}, {name!r})")
        names[label] = name
    if not names:
        raise InputError(f"{p.name}: no region names")
    return names


def region_names_for(names_file, template_file, labels: np.ndarray) -> tuple[dict[int, str], str]:
    """Names of the template's regions, and where they came from.

    From `names_file` when given, else from the template's ``.regions.csv``
    sidecar (:func:`region_names_sidecar`), else none (regions are then called
    ``region_<label>``).  Names for labels the template lacks are an error when
    none matches (probably the wrong file); unnamed labels are warned about.
    """
    import warnings

    if template_file is None:
        if names_file is not None:
            raise InputError("--region-names needs --regions (the labelled template they name)")
        return {}, "none"
    side = region_names_sidecar(template_file)
    if names_file is None and not side.is_file():
        return {}, "none"
    source = Path(names_file) if names_file is not None else side
    names = read_region_names(source)
    present = {int(v) for v in np.unique(labels)}
    if not present & set(names):
        raise InputError(f"{source.name} names labels {', '.join(map(str, sorted(names)))} but the "
                         f"template's regions are {', '.join(map(str, sorted(present)))}")
    unnamed = sorted(present - set(names))
    if unnamed:
        warnings.warn(f"{source.name} gives no name for region label(s) "
                      f"{', '.join(map(str, unnamed))}; they are called region_<label>", stacklevel=2)
    return {k: v for k, v in names.items() if k in present}, source.name


def region_summary(change, names_from: str) -> dict:
    """The summary's view of the regions: mean normal displacement (mm) per region name."""
    if change.labels is None:
        return {}
    rows = change.regional_table()
    return {"region_names_from": names_from,
            "region_mean_normal_displacement_outward_mm": {r["name"]: r["mean_normal_displacement_outward_mm"]
                                                   for r in rows}}
