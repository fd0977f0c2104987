"""Mesh quality measured as data: the flaws that make spectral and geodesic analysis wrong.

`quality_report` returns a `QualityReport` dataclass (``to_dict``/``to_json``) whose
``warnings`` name every flaw in plain words.  Topological flaws come from the
surface's `Connectivity`; the thresholds (needles, degenerate faces, coincident
vertices) from `surfacekit.mesh.limits`, shared with the Laplacian's choice.
"""
from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from ..mesh.connectivity import Connectivity
from ..mesh.limits import MERGE_TOLERANCE, NEEDLE_ANGLE_DEGREES
from ..mesh.surface import Surface


# ---------------------------------------------------------------- detection helpers
def coincident_vertex_map(vertices: np.ndarray, tolerance: float | None = None) -> np.ndarray:
    """(n,) index of the representative (lowest index) of each group of coincident vertices.

    Vertices within ``tolerance`` (mm; default ``MERGE_TOLERANCE`` x bounding-box
    diagonal, see `surfacekit.mesh.limits`) are grouped transitively through a k-d
    tree radius query.
    """
    v = np.asarray(vertices, dtype=np.float64)
    n = len(v)
    if tolerance is None:
        diag = float(np.linalg.norm(np.ptp(v, axis=0))) if n else 0.0
        tolerance = MERGE_TOLERANCE * max(diag, np.finfo(float).tiny)
    pairs = cKDTree(v).query_pairs(r=tolerance, output_type="ndarray")
    if len(pairs) == 0:
        return np.arange(n)
    return group_representatives(pairs, n)


def group_representatives(pairs: np.ndarray, n: int) -> np.ndarray:
    """(n,) lowest index of the group of each of n items, groups joined transitively by
    the (p, 2) index pairs (connected components of the pair graph)."""
    g = sp.coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n))
    _, labels = connected_components(g, directed=False)
    first = np.full(labels.max() + 1, n, dtype=np.int64)
    np.minimum.at(first, labels, np.arange(n))
    return first[labels]


def part_labels(faces: np.ndarray, n_vertices: int | None = None) -> np.ndarray:
    """(m,) part label of each face: connected components of faces sharing an edge.

    These are the parts a user sees: pieces that touch only at a vertex (a pinched
    vertex with several face fans) are separate parts, unlike vertex connectivity.
    """
    conn = Connectivity(faces, n_vertices)
    m = conn.n_faces
    if m == 0:
        return np.zeros(0, np.int64)
    g = sp.coo_matrix((np.ones(3 * m), (np.repeat(np.arange(m), 3), conn.half_edge_edge)),
                      shape=(m, len(conn.edges))).tocsr()
    return connected_components(g @ g.T, directed=False)[1]


def degenerate_faces(vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(m,) bool: :attr:`Surface.degenerate_faces` (repeated vertex, zero area) on plain arrays."""
    if len(faces) == 0:
        return np.zeros(0, bool)
    return Surface(vertices, faces).degenerate_faces


def enclosed_centroid(surface: Surface) -> np.ndarray:
    """(3,) centroid of the solid enclosed by a closed, oriented surface (mm).

    Sum over the tetrahedra (c, a, b, d) spanned by each face and a reference point
    c of signed volume times tetrahedron centroid (divergence theorem).
    """
    v, f = surface.vertices, surface.faces
    c = v.mean(axis=0)
    a, b, d = v[f[:, 0]] - c, v[f[:, 1]] - c, v[f[:, 2]] - c
    vol = np.einsum("ij,ij->i", a, np.cross(b, d)) / 6.0
    total = vol.sum()
    if abs(total) < np.finfo(float).tiny:
        return surface.centroid
    return c + (vol[:, None] * (a + b + d) / 4.0).sum(axis=0) / total


# ---------------------------------------------------------------- the report
@dataclass
class QualityReport:
    """Measured quality of a triangle mesh (lengths mm, areas mm², volumes mm³, angles degrees).

    ``warnings`` lists each flaw found, in plain words; an analysis-ready closed
    organ surface has none.  ``to_dict()`` / ``to_json()`` give plain data.
    """

    n_vertices: int
    n_faces: int
    n_components: int
    n_boundary_loops: int
    n_boundary_edges: int
    n_non_manifold_edges: int
    n_non_manifold_vertices: int
    n_duplicate_vertices: int
    n_duplicate_faces: int
    n_degenerate_faces: int
    n_unreferenced_vertices: int
    n_inconsistent_edges: int
    is_watertight: bool
    is_consistently_oriented: bool
    is_outward: bool | None
    euler_characteristic: int
    genus: int | None
    area_mm2: float
    volume_mm3: float | None
    edge_length_min_mm: float
    edge_length_mean_mm: float
    edge_length_max_mm: float
    edge_length_std_mm: float
    min_angle_deg: float
    mean_min_angle_deg: float
    warnings: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        """True when no flaw was found."""
        return not self.warnings

    def to_dict(self) -> dict:
        return asdict(self)

    def to_json(self, **kwargs) -> str:
        return json.dumps(self.to_dict(), **kwargs)

    def format(self) -> str:
        """Human-readable multi-line summary (what the command line prints)."""
        d = self.to_dict()
        warnings = d.pop("warnings")
        width = max(len(k) for k in d)
        lines = [f"{k:<{width}}  {_fmt(v)}" for k, v in d.items()]
        lines += ["warnings:"] + [f"  - {w}" for w in warnings] if warnings else ["warnings: none"]
        return "\n".join(lines)

    __str__ = format


def _fmt(v) -> str:
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)


def _plural(n: int, word: str, plural: str | None = None) -> str:
    return f"{n} {word if n == 1 else (plural or word + 's')}"


def quality_report(surface: Surface) -> QualityReport:
    """Measure the flaws and shape quality of a surface.

    Counts components (parts joined through edges, so pieces touching only at a
    vertex are separate, see :func:`part_labels`), boundary loops (holes), non-manifold edges (more than two
    faces) and vertices (several face fans), coincident vertices, duplicated and
    degenerate faces, unreferenced vertices, and edges whose two faces are
    oriented inconsistently; genus from the Euler characteristic
    ``χ = V - E + F = 2c - 2g - b`` (manifold meshes only); area (mm²), enclosed
    volume (mm³, closed meshes only), edge-length statistics (mm) and the minimum
    and mean per-triangle minimum angle (degrees; 60 for equilateral triangles).

    Parameters
    ----------
    surface : Surface

    Returns
    -------
    QualityReport
    """
    s = surface
    f, v, conn = s.faces, s.vertices, s.connectivity
    rep_map = coincident_vertex_map(v)
    n_dup_v = int(np.count_nonzero(rep_map != np.arange(s.n_vertices)))
    n_dup_f = int(conn.duplicate_faces.sum())
    n_degen = int(s.degenerate_faces.sum())
    n_nm_edges = len(s.non_manifold_edges)
    n_nm_vertices = int(np.count_nonzero(conn.vertex_fans > 1))
    n_incons = conn.n_inconsistent_edges
    loops = s.boundary_loops
    watertight = s.is_closed
    oriented = n_incons == 0 and n_nm_edges == 0
    signed = s.signed_volume
    outward = bool(signed > 0) if (watertight and oriented) else None
    manifold = n_nm_edges == 0 and n_nm_vertices == 0
    genus = s.genus if manifold else None
    angles = np.rad2deg(s.face_angles.min(axis=1))
    angles = angles[np.isfinite(angles)]
    el = s.edge_lengths
    parts = part_labels(f, s.n_vertices)
    n_parts = int(parts.max()) + 1 if len(parts) else 0
    if n_parts > 1:
        largest = np.argmax(np.bincount(parts, weights=s.face_areas))
        extra = len(np.setdiff1d(np.unique(f[parts != largest]), f[parts == largest]))

    warnings: list[str] = []
    if n_parts > 1:
        note = "; pieces touching only at a vertex count as separate" if n_nm_vertices else ""
        warnings.append(f"{_plural(n_parts - 1, 'extra component')} besides the largest "
                        f"({_plural(extra, 'vertex', 'vertices')}{note})")
    if loops:
        warnings.append(f"{_plural(len(loops), 'hole')} (boundary loops with "
                        f"{_plural(len(s.boundary_edges), 'edge')}); the surface is not watertight")
    if n_incons:
        warnings.append(f"{_plural(n_incons, 'edge')} between faces of opposite orientation "
                        "(flipped faces)")
    if outward is False:
        warnings.append("faces point inward (negative enclosed volume)")
    if n_dup_f:
        warnings.append(f"{_plural(n_dup_f, 'duplicated face')}")
    if n_dup_v:
        warnings.append(f"{_plural(n_dup_v, 'duplicated vertex', 'duplicated vertices')} "
                        "(same position as another vertex)")
    if n_degen:
        warnings.append(f"{_plural(n_degen, 'degenerate face')} (zero area or repeated vertex)")
    if n_nm_edges:
        warnings.append(f"{_plural(n_nm_edges, 'non-manifold edge')} (shared by more than two faces)")
    if n_nm_vertices:
        warnings.append(f"{_plural(n_nm_vertices, 'non-manifold vertex', 'non-manifold vertices')}"
                        " (surface pinched at a point)")
    if s.n_unreferenced_vertices:
        warnings.append(f"{_plural(s.n_unreferenced_vertices, 'unreferenced vertex', 'unreferenced vertices')}")
    if len(angles) and angles.min() < NEEDLE_ANGLE_DEGREES:
        warnings.append(f"needle triangles (smallest angle {angles.min():.2g} degrees)")
    if genus is not None and genus > 0 and watertight:
        warnings.append(f"genus {genus}: the surface has {_plural(genus, 'handle')} "
                        "(a sphere-like organ has none)")

    return QualityReport(
        n_vertices=s.n_vertices, n_faces=s.n_faces, n_components=n_parts,
        n_boundary_loops=len(loops), n_boundary_edges=len(s.boundary_edges),
        n_non_manifold_edges=n_nm_edges, n_non_manifold_vertices=n_nm_vertices,
        n_duplicate_vertices=n_dup_v, n_duplicate_faces=n_dup_f, n_degenerate_faces=n_degen,
        n_unreferenced_vertices=int(s.n_unreferenced_vertices), n_inconsistent_edges=n_incons,
        is_watertight=bool(watertight), is_consistently_oriented=bool(oriented),
        is_outward=outward, euler_characteristic=int(s.euler_characteristic), genus=genus,
        area_mm2=float(s.area), volume_mm3=float(abs(signed)) if (watertight and oriented) else None,
        edge_length_min_mm=float(el.min()), edge_length_mean_mm=float(el.mean()),
        edge_length_max_mm=float(el.max()), edge_length_std_mm=float(el.std()),
        min_angle_deg=float(angles.min()) if len(angles) else 0.0,
        mean_min_angle_deg=float(angles.mean()) if len(angles) else 0.0,
        warnings=warnings,
    )
