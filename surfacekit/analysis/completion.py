"""Completion of a cropped surface from a whole reference scan of the same organ.

A follow-up that covers only part of an organ has no volume.  :func:`complete`
borrows the missing part from a whole scan (the baseline, or a template): the
reference's region that the part does not cover is carried into the part's frame,
deformed smoothly so that its border follows the part's cut, and stitched to the
part along the cut.  The result is closed, so it has a volume, but that volume is
an estimate: the filled-in share came from the reference, not from the scan.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import spsolve
from scipy.spatial import cKDTree

from ..correspondence.result import Correspondence
from ..mesh.laplacian import cotangent_laplacian
from ..mesh.surface import Surface, SurfaceError


@dataclass
class Completion:
    """A cropped surface completed from a reference.

    Attributes
    ----------
    surface : Surface, closed: the part's vertices first (same order), then the
        reference's filled-in vertices
    filled : (n,) bool, True on the vertices that came from the reference
    volume_mm3 : the completed surface's volume, an estimate
    filled_volume_share : share of that volume on the filled side of the cut (the
        volume enclosed between the filled surface and the cut's centre)
    filled_area_share : share of the completed surface's area filled in
    info : dict of diagnostics (loops stitched, displacement of the filled region)
    """

    surface: Surface
    filled: np.ndarray
    volume_mm3: float
    filled_volume_share: float
    filled_area_share: float
    info: dict = field(default_factory=dict)

    @property
    def volume_ml(self) -> float:
        """The estimated volume in ml (1000 mm³)."""
        return self.volume_mm3 / 1000.0

    def summary(self) -> dict:
        """JSON-able summary; the volume is labelled as an estimate with its filled-in share."""
        return {"volume_estimate_ml": self.volume_ml,
                "filled_volume_share": self.filled_volume_share,
                "filled_area_share": self.filled_area_share,
                "volume_note": (f"estimate: {self.filled_volume_share:.1%} of this volume was "
                                "filled in from the reference surface, not measured"),
                **self.info}


def _sides(partial: Surface, reference: Surface, corr: Correspondence):
    """Maps part -> reference and reference -> part, the reference's covered mask, and the rigid
    pose bringing the reference into the part's frame."""
    if not isinstance(corr, Correspondence) or corr.rigid is None:
        raise SurfaceError("complete needs the correspondence made by sk.match between the "
                           "cropped surface and the reference (with its rigid pose)")
    sizes = (corr.n_source, corr.n_target)
    part_first = sizes == (partial.n_vertices, reference.n_vertices)
    part_second = sizes == (reference.n_vertices, partial.n_vertices)
    side = (corr.info.get("partial") or {}).get("side")  # decides when both have as many vertices
    if part_first and (side != "target" or not part_second):
        return corr.source_to_target, corr.target_to_source, corr.target_overlap, corr.rigid.inverse()
    if part_second:
        return corr.target_to_source, corr.source_to_target, corr.source_overlap, corr.rigid
    raise SurfaceError(f"the correspondence maps {corr.n_source} -> {corr.n_target} vertices; the "
                       f"surfaces have {partial.n_vertices} (cropped) and {reference.n_vertices} "
                       "(reference)")


def _harmonic_fill(s: Surface, fixed: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Harmonic extension of `values` (k, 3) given on the `fixed` vertices to all of `s`:
    ``L x = 0`` on the free vertices (cotangent Laplacian; Pinkall & Polthier 1993)."""
    L = sp.csr_matrix(cotangent_laplacian(s.vertices, s.faces))
    free = np.setdiff1d(np.arange(s.n_vertices), fixed)
    out = np.zeros((s.n_vertices, 3))
    out[fixed] = values
    if len(free):
        A = L[free][:, free] + 1e-12 * sp.identity(len(free))
        rhs = -(L[free][:, fixed] @ values)
        out[free] = np.column_stack([spsolve(A.tocsc(), rhs[:, c]) for c in range(3)])
    return out


def _strip(a: np.ndarray, b: np.ndarray, pa: np.ndarray, pb: np.ndarray) -> np.ndarray:
    """Triangles joining two closed loops a (m,) and b (n,) running the same way (vertex ids;
    positions pa, pb): at each step advance along the loop whose new diagonal is shorter
    (Christiansen & Sederberg, SIGGRAPH 1978).  b starts at the vertex nearest a[0]."""
    start = int(np.argmin(np.linalg.norm(pb - pa[0], axis=1)))
    b, pb = np.roll(b, -start), np.roll(pb, -start, axis=0)
    m, n = len(a), len(b)
    i = j = 0
    faces = []
    while i < m or j < n:
        ai, bj = i % m, j % n
        advance_a = j >= n or (i < m and np.linalg.norm(pa[(i + 1) % m] - pb[bj])
                               <= np.linalg.norm(pb[(j + 1) % n] - pa[ai]))
        if advance_a:
            faces.append((a[ai], a[(i + 1) % m], b[bj]))
            i += 1
        else:
            faces.append((a[ai], b[(j + 1) % n], b[bj]))
            j += 1
    return np.array(faces, dtype=np.int64)


def _region(reference: Surface, moved: np.ndarray, keep_face: np.ndarray) -> tuple[Surface, np.ndarray]:
    """The reference's kept faces as a surface at the `moved` positions, and its vertex ids."""
    faces = reference.faces[keep_face]
    ids = np.unique(faces)
    index = np.full(reference.n_vertices, -1, dtype=np.int64)
    index[ids] = np.arange(len(ids))
    region = Surface(moved[ids], index[faces])
    if region.n_components > 1:  # islands of the mask: keep the large pieces only
        labels, areas = region.component_areas()
        keep = areas[labels] >= 0.02 * areas.sum()
        return _region(reference, moved, _mask_of(keep_face, keep))
    return region, ids


def _mask_of(keep_face: np.ndarray, keep_sub: np.ndarray) -> np.ndarray:
    out = np.zeros_like(keep_face)
    out[np.flatnonzero(keep_face)[keep_sub]] = True
    return out


def _balanced(faces: np.ndarray) -> bool:
    """Whether every edge is crossed as often in one direction as in the other (the faces bound a
    volume, even where a cut touches itself at a vertex and the surface is not manifold there)."""
    e = np.concatenate([faces[:, [0, 1]], faces[:, [1, 2]], faces[:, [2, 0]]])
    n = int(faces.max()) + 1
    forward = np.sort(e[:, 0] * n + e[:, 1])
    backward = np.sort(e[:, 1] * n + e[:, 0])
    return bool(np.array_equal(forward, backward))


def _fan(loop: np.ndarray, centre: int, outer: bool) -> np.ndarray:
    """Triangles closing a boundary loop around the vertex `centre`, oriented to match the faces
    beside the loop (`outer`: the loop runs as in those faces)."""
    a, b = (np.roll(loop, -1), loop) if outer else (loop, np.roll(loop, -1))
    return np.column_stack([a, b, np.full(len(loop), centre)])


def _part_cuts(part: Surface) -> tuple[list, list]:
    """The part's boundary loops split into cuts (near-planar, not small; the longest loop when
    none is) and small holes."""
    from ..correspondence.partial import cut_loops

    loops = part.boundary_loops
    marked = [i for i, lp in enumerate(cut_loops(part)) if lp["cut"]]
    if not marked:
        marked = [int(np.argmax([len(lp) for lp in loops]))]
    return [loops[i] for i in marked], [lp for i, lp in enumerate(loops) if i not in marked]


def _close_holes(region: Surface, cut_centres: np.ndarray) -> Surface:
    """The region with every border loop beyond the cut count closed by a fan around its
    centroid: islands of the covered mask inside the region to fill (the loops farthest from
    the part's cuts)."""
    loops = region.boundary_loops
    extra = len(loops) - len(cut_centres)
    if extra <= 0:
        return region
    far = [float(np.min(np.linalg.norm(cut_centres - region.vertices[lp].mean(axis=0), axis=1)))
           for lp in loops]
    vertices, faces = [region.vertices], [region.faces]
    n = region.n_vertices
    for k in np.argsort(far)[::-1][:extra]:
        vertices.append(region.vertices[loops[k]].mean(axis=0)[None])
        faces.append(_fan(loops[k], n, True))
        n += 1
    return Surface(np.vstack(vertices), np.vstack(faces))


def _pair_loops(cuts: list, part: Surface, region: Surface) -> list[tuple[np.ndarray, np.ndarray]]:
    """Each cut loop of the part with the border loop of the filled region nearest to it."""
    loops_r = region.boundary_loops
    if len(cuts) != len(loops_r):
        raise SurfaceError(f"cannot complete: the cropped surface has {len(cuts)} cut(s), the "
                           f"region to fill in has {len(loops_r)} border loop(s); check the map")
    centres = np.array([region.vertices[lp].mean(axis=0) for lp in loops_r])
    pairs, used = [], set()
    for lp in cuts:
        order = np.argsort(np.linalg.norm(centres - part.vertices[lp].mean(axis=0), axis=1))
        k = next(int(i) for i in order if int(i) not in used)
        used.add(k)
        pairs.append((lp, loops_r[k]))
    return pairs


def complete(partial: Surface, reference: Surface, corr: Correspondence) -> Completion:
    """A closed surface: the cropped `partial` joined with the part of `reference` it lacks.

    Steps: the reference is brought into the part's frame by the map's rigid pose;
    its faces with no vertex in the covered region (``source_overlap`` /
    ``target_overlap`` of `corr`, from ``sk.match`` on a cropped surface) form the
    region to fill; each of the part's cut vertices carries the displacement from its
    matched reference point to itself, the fill region's border vertices take the
    displacement of the nearest cut vertex, and a harmonic extension (cotangent
    Laplacian, Pinkall & Polthier, Experimental Mathematics 1993) spreads it smoothly
    over the region; finally a strip of triangles joins each cut loop to the region's
    border (greedy shortest-diagonal stitching, Christiansen & Sederberg 1978).

    Parameters
    ----------
    partial : Surface, the cropped scan (open along its cut), mm
    reference : Surface, a whole scan of the same organ (closed), mm
    corr : Correspondence between them, in either direction (``sk.match(partial,
        reference)`` or ``sk.match(reference, partial)``)

    Returns
    -------
    Completion: the closed surface (the part's vertices first), which vertices were
    filled in, the volume (an estimate) and the share of it that was filled in.
    """
    p2r, _r2p, covered, to_part = _sides(partial, reference, corr)
    if partial.is_closed:
        raise SurfaceError("the cropped surface is closed: there is nothing to complete")
    if not reference.is_closed:
        raise SurfaceError("the reference surface is open: completion needs a whole (closed) scan")
    moved = to_part.apply(reference.vertices)
    fill = ~covered[reference.faces].any(axis=1)
    if not fill.any():
        raise SurfaceError("the map says the cropped surface covers all of the reference: nothing to fill")
    region, _ids = _region(reference, moved, fill)
    cuts, holes = _part_cuts(partial)
    region = _close_holes(region, np.array([partial.vertices[lp].mean(axis=0) for lp in cuts]))
    cut = np.concatenate(cuts)
    shift_cut = partial.vertices[cut] - moved[p2r[cut]]
    border = np.flatnonzero(region.connectivity.boundary_vertices)
    _, nearest = cKDTree(partial.vertices[cut]).query(region.vertices[border])
    filled = region.vertices + _harmonic_fill(region, border, shift_cut[nearest])
    n, m = partial.n_vertices, partial.n_vertices + region.n_vertices
    strips = [_strip(a, b[::-1] + n, partial.vertices[a], filled[b[::-1]])[:, ::-1]
              for a, b in _pair_loops(cuts, partial, region)]
    fans = [_fan(lp, m + k, True) for k, lp in enumerate(holes)]  # small holes of the scan
    faces = np.vstack([partial.faces, region.faces + n, *strips, *fans])
    out = Surface(np.vstack([partial.vertices, filled,
                             *[partial.vertices[lp].mean(axis=0)[None] for lp in holes]]),
                  faces, metadata=dict(partial.metadata))
    if not _balanced(faces):
        raise SurfaceError("cannot complete: stitching the cut did not give a closed, consistently "
                           "oriented surface")
    centre = np.mean([partial.vertices[lp].mean(axis=0) for lp in cuts], axis=0)
    tri = out.vertices[faces] - centre
    cone = np.einsum("ij,ij->i", tri[:, 0], np.cross(tri[:, 1], tri[:, 2])) / 6.0
    volume = float(cone.sum())
    is_filled = np.arange(out.n_vertices) >= n
    from_fill = np.arange(len(faces)) >= len(partial.faces)
    return Completion(out, is_filled, abs(volume), float(cone[from_fill].sum() / volume),
                      float(out.face_areas[from_fill].sum() / out.area),
                      {"loops_stitched": len(strips), "holes_closed": len(holes),
                       "closed_manifold": bool(out.is_closed),
                       "mean_fill_shift_mm": float(np.linalg.norm(shift_cut, axis=1).mean())})
