"""The piece of a surface that a comparison works on, and what open surfaces leave out.

Real organ meshes often hold small extra pieces (a scrap cut off with a segment,
a floating island of a segmentation) and are often open (an organ cut out of a
larger model).  A comparison keeps the largest connected piece when the others
are small, says what it dropped, and refuses when two pieces are large, since
then no single piece is clearly "the organ".  Boundaries are found here too, so
that the change analysis can leave out the band along a cut.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

import numpy as np

from ..mesh.surface import Surface, SurfaceError

#: largest area share of the pieces a comparison drops without asking
SMALL_PIECE_SHARE = 0.05


def main_component(surface: Surface, name: str = "surface",
                   limit: float = SMALL_PIECE_SHARE) -> tuple[Surface, np.ndarray, list[str]]:
    """The largest connected piece of `surface` when every other piece is small.

    Parameters
    ----------
    surface : Surface
    name : how messages name the surface (e.g. its file name)
    limit : largest area share of all dropped pieces together (default 5%)

    Returns
    -------
    (piece, kept, warnings): the piece as a new Surface (the same object when the
    surface is one piece), the indices of the kept vertices in `surface`, and a
    warning naming the dropped pieces (count and area share), if any.

    Raises
    ------
    SurfaceError when the pieces other than the largest hold more than `limit`
    of the area (two large pieces: the user must choose one).
    """
    if surface.n_components <= 1:
        return surface, np.arange(surface.n_vertices), []
    face_label, areas = surface.component_areas()
    total = float(areas.sum())
    best = int(np.argmax(areas))
    others = areas > 0
    others[best] = False
    dropped = float(areas[others].sum()) / total if total > 0 else 1.0
    n_dropped = int(others.sum())
    if dropped > limit:
        raise SurfaceError(
            f"{name} has {n_dropped + 1} large connected pieces (the largest holds "
            f"{areas[best] / total:.0%} of the area); keep one first, e.g. "
            "'surfacekit prepare' (keeps the largest piece) or sk.prepare(surface)")
    faces = surface.faces[face_label == best]
    kept = np.unique(faces)
    index = np.full(surface.n_vertices, -1, dtype=np.int64)
    index[kept] = np.arange(len(kept))
    piece = Surface(surface.vertices[kept], index[faces], metadata=dict(surface.metadata))
    warning = (f"{name}: kept the largest connected piece and dropped {n_dropped} small "
               f"{'piece' if n_dropped == 1 else 'pieces'} ({dropped:.2%} of the area, "
               f"{surface.n_vertices - len(kept)} vertices)")
    return piece, kept, [warning]


def boundary_band(surface: Surface) -> np.ndarray:
    """(n,) bool: vertices on a boundary or one edge away from one (the first ring)."""
    on = np.asarray(surface.connectivity.boundary_vertices, dtype=bool)
    if not on.any():
        return on
    adjacency = surface.connectivity.vertex_adjacency(self_loops=True)
    return np.asarray(adjacency @ on.astype(np.float64) > 0).ravel()


def open_note(surface: Surface, name: str) -> str | None:
    """"the follow-up is open: 3 boundary loops, 1.2% of its area within one ring of a
    boundary", or None for a closed surface."""
    loops = len(surface.boundary_loops)
    if surface.is_closed or loops == 0:
        return None
    share = float(surface.vertex_areas[boundary_band(surface)].sum()) / float(surface.area)
    return (f"the {name} is open: {loops} boundary {'loop' if loops == 1 else 'loops'}, "
            f"{share:.1%} of its area within one ring of a boundary")
