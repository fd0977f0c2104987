"""Helpers shared by the ``surfacekit`` subcommands and the demo: input checks and records."""
from __future__ import annotations

from pathlib import Path

import numpy as np

from ..io.files import MESH_SUFFIXES as LIBRARY_MESH_SUFFIXES
from ..mesh.surface import SurfaceError
from .context import InputError

VOLUME_SUFFIXES = (".nii", ".nii.gz")
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
    """Basic geometric facts of a surface (mm, mm², ml)."""
    return {"vertices": s.n_vertices, "faces": s.n_faces, "area_mm2": float(s.area),
            "volume_ml": float(s.volume) / 1000.0, "closed": bool(s.is_closed),
            "edge_manifold": bool(s.is_edge_manifold), "components": int(s.n_components),
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
