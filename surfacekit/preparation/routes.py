"""The two routes of `surfacekit.prepare` up to smoothing: repair in place, or rebuild
through an inside/outside grid (:mod:`surfacekit.preparation.volumetric`), and the choice of
which part(s) to keep."""
from __future__ import annotations

import numpy as np

from ..mesh.connectivity import Connectivity
from ..mesh.surface import Surface, SurfaceError
from . import repair
from . import volumetric as vol
from .mesh_quality import part_labels

__all__ = ["prepare_pieces", "repair_chain", "select_parts"]


def _vertices_word(n: int) -> str:
    return f"{n} {'vertex' if n == 1 else 'vertices'}"


def repair_chain(v: np.ndarray, f: np.ndarray, *, keep_largest: bool, max_hole_edges: int,
            merge_tolerance: float | None) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """The topological repair chain; returns arrays and the actions in plain words."""
    actions = []
    v, f, n = repair.merge_duplicate_vertices(v, f, merge_tolerance)
    if n:
        actions.append(f"merged {_vertices_word(n)} duplicated at the same position")
    v, f, n = repair.remove_degenerate_faces(v, f)
    if n:
        actions.append(f"removed {n} degenerate faces (zero area or repeated vertex)")
    v, f, n = repair.remove_duplicate_faces(v, f)
    if n:
        actions.append(f"removed {n} duplicated faces")
    v, f, n = repair.remove_non_manifold_edges(v, f)
    if n:
        actions.append(f"removed {n} faces attached along non-manifold edges")
    if len(f) == 0:
        raise SurfaceError("no valid faces left after removing degenerate and non-manifold faces")
    v, f, n = repair.split_non_manifold_vertices(v, f)
    if n:
        actions.append(f"split {n} non-manifold (pinched) {'vertex' if n == 1 else 'vertices'}")
    if keep_largest:
        v, f, nc, nv = repair.keep_largest_component(v, f)
        if nc:
            actions.append(f"removed {nc} small component{'s' if nc > 1 else ''} "
                           f"({_vertices_word(nv)}), kept the largest by area")
    f, n = repair.orient_consistently(f)
    if n:
        actions.append(f"flipped {n} faces to make the orientation consistent")
    v, f, n, left = repair.fill_holes(v, f, max_hole_edges)
    if n:
        actions.append(f"filled {n} hole{'s' if n > 1 else ''} (up to {max_hole_edges} edges; "
                       "patches follow the surrounding curvature)")
    if left:
        actions.append(f"left {left} boundary loop{'s' if left > 1 else ''} open "
                       f"(longer than {max_hole_edges} edges or not simple)")
    v, f, _ = repair.compact(v, f)
    s = Surface(v, f)  # only the signed volume is needed
    if s.signed_volume < 0:
        f = f[:, ::-1].copy()
        actions.append("reversed all faces so that normals point outward")
    return v, f, actions


def prepare_pieces(surface: Surface, keep, keep_largest: bool, volumetric: bool | None,
                   voxel_mm: float | None, opts: dict):
    """Repair in place, or rebuild through the inside grid when that is needed or asked for.

    Returns ``(pieces, route)``: pieces ``(v, f, actions, reference_mm3, spacing)`` largest
    first, and a dict with the route taken, its reason, the grid spacing and info."""
    v0, f0 = np.array(surface.vertices), np.array(surface.faces)
    reason = "volumetric=True was asked for" if volumetric else None
    if volumetric is None and surface.n_faces and part_labels(f0, len(v0)).max() > 0:
        n = vol.count_crossing_pieces(v0, f0)
        if n:
            reason = (f"{n} pair{'s' if n > 1 else ''} of pieces cross each other "
                      "(overlapping or intersecting parts)")
    if reason is None:
        one = keep == "largest"
        try:
            v, f, actions = repair_chain(v0, f0, **{**opts, "keep_largest": one and keep_largest})
        except SurfaceError as exc:
            if volumetric is False or "not orientable" not in str(exc):
                raise
            reason = str(exc).replace("surface is", "the surface is", 1)
            n_open = _open_edges(v0, f0)
            if volumetric is None and n_open[0] > 0.1 * n_open[1]:
                raise SurfaceError(f"{exc}; it is also open ({n_open[0]} boundary edges), so it "
                                   "encloses no volume to rebuild it from") from None
        else:
            groups = [np.arange(len(f))] if one else vol.split_parts(v, f)
            pieces = [in_place_piece(v, f[g], actions) for g in groups]
            n_parts = len(groups) if not one else int(part_labels(f0, len(v0)).max()) + 1
            return pieces, {"route": "repaired in place", "reason": None, "voxel_mm": None,
                            "n_parts": n_parts}
    parts, info = vol.volumetric_parts(surface, voxel_mm)
    h = info["voxel_mm"]
    intro = (f"rebuilt through a {h:.3g} mm grid ({'x'.join(map(str, info['grid_shape']))} cells; "
             f"inside by {info['inside_test']}; {len(parts)} part{'s' if len(parts) > 1 else ''} "
             f"inside, {info['inside_volume_mm3']:.1f} mm³): {reason}")
    if keep == "largest":
        parts = parts[:1]
    pieces = []
    for part, inside_volume in parts:
        v, f, actions = repair_chain(np.array(part.vertices), np.array(part.faces), **opts)
        pieces.append((v, f, [intro, *actions], inside_volume, [h, h, h]))
    route = {"route": "rebuilt through a volume", "reason": reason, "voxel_mm": h,
             "n_parts": info["n_parts"]}
    return pieces, route


def _open_edges(v: np.ndarray, f: np.ndarray) -> tuple[int, int]:
    """(boundary edges, edges) after merging coincident vertices."""
    _, f, _ = repair.merge_duplicate_vertices(v, f)
    counts = Connectivity(f, len(v)).edge_face_counts
    return int(np.count_nonzero(counts == 1)), len(counts)


def in_place_piece(v: np.ndarray, f: np.ndarray, actions: list[str]):
    """One repaired piece with its enclosed volume (None when open) as the reference."""
    v, f, _ = repair.compact(v, f)
    closed = Surface(v, f).is_closed
    return v, f, list(actions), (Surface(v, f).signed_volume if closed else None), None


def select_parts(pieces: list, keep) -> list:
    """The pieces ``keep`` asks for ("largest", "all" or an index, largest first)."""
    if keep in ("largest", "all"):
        return pieces if keep == "all" else pieces[:1]
    if not -len(pieces) <= keep < len(pieces):
        raise ValueError(f"keep={keep} but the surface has {len(pieces)} "
                         f"part{'s' if len(pieces) > 1 else ''} (numbered from 0, largest first)")
    return [pieces[keep]]
