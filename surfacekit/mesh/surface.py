"""The `Surface`: a read-only triangle mesh with cached derived geometry.

Vertices are float64 (millimetres when they come from medical images), faces are
int64 vertex indices.  Arrays are made read-only at construction, so every derived
quantity can be cached on the object and never goes stale.
"""
from __future__ import annotations

from functools import cached_property
from typing import Any

import numpy as np

from .connectivity import Connectivity
from .limits import DEGENERATE_AREA


class SurfaceError(ValueError):
    """Bad surface input: the message names the problem."""


def _readonly(a: np.ndarray) -> np.ndarray:
    a = np.ascontiguousarray(a)
    a.setflags(write=False)
    return a


class Surface:
    """A triangulated surface.

    Parameters
    ----------
    vertices : (n, 3) array_like of float
        Vertex positions (mm for medical data).
    faces : (m, 3) array_like of int
        Triangles as vertex indices, counter-clockwise seen from outside.
    metadata : dict, optional
        Free-form information such as ``{"units": "mm", "source": "scan.nii.gz"}``.

    Raises
    ------
    SurfaceError
        When the arrays have the wrong shape, non-finite coordinates, face
        indices out of range, or no faces.

    Examples
    --------
    >>> import surfacekit as sk
    >>> s = sk.Surface([[0, 0, 0], [1, 0, 0], [0, 1, 0]], [[0, 1, 2]])
    >>> round(s.area, 3)
    0.5
    """

    def __init__(self, vertices: Any, faces: Any, *, metadata: dict | None = None):
        try:
            v = np.asarray(vertices, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise SurfaceError(f"vertices are not numeric: {exc}") from None
        try:
            f_raw = np.asarray(faces)
        except (TypeError, ValueError) as exc:
            raise SurfaceError(f"faces are not an integer array: {exc}") from None
        if v.ndim != 2 or v.shape[1] != 3:
            raise SurfaceError(f"vertices must have shape (n, 3), got {v.shape}")
        if v.shape[0] == 0:
            raise SurfaceError("empty mesh: no vertices")
        if f_raw.size == 0:
            raise SurfaceError("mesh has no faces")
        if f_raw.ndim != 2 or f_raw.shape[1] != 3:
            raise SurfaceError(f"faces must have shape (m, 3) triangles, got {f_raw.shape}")
        if f_raw.dtype.kind == "f":
            if not np.all(np.isfinite(f_raw)) or np.any(f_raw != np.round(f_raw)):
                raise SurfaceError("face indices must be integers")
        elif f_raw.dtype.kind not in "iu":
            raise SurfaceError(f"face indices must be integers, got dtype {f_raw.dtype}")
        finite = np.isfinite(v)
        if not finite.all():
            bad = int(np.flatnonzero(~finite.all(axis=1))[0])
            kind = "NaN" if np.isnan(v[bad]).any() else "infinite"
            raise SurfaceError(f"{kind} vertex coordinates (first at vertex {bad})")
        # Coordinates so large that squared lengths overflow would give inf areas silently.
        if np.abs(v).max() > 1e150:
            raise SurfaceError("vertex coordinates overflow (|x| > 1e150)")
        if f_raw.dtype.kind == "u" and f_raw.max() > np.iinfo(np.int64).max:
            raise SurfaceError("face index out of range")
        f = f_raw.astype(np.int64)
        if f.min() < 0:
            raise SurfaceError(f"negative face index {int(f.min())}")
        if f.max() >= v.shape[0]:
            raise SurfaceError(
                f"face index {int(f.max())} out of range for {v.shape[0]} vertices"
            )
        self._vertices = _readonly(v)
        self._faces = _readonly(f)
        self.metadata: dict = dict(metadata or {})
        # Operators and eigenbases computed on this surface (laplacian.py, eigen.py).
        self.cache: dict = {}

    # ------------------------------------------------------------------ basics
    @classmethod
    def from_trimesh(cls, mesh, *, metadata: dict | None = None) -> Surface:
        """Build a Surface from a ``trimesh.Trimesh`` (no processing is applied)."""
        return cls(np.asarray(mesh.vertices), np.asarray(mesh.faces), metadata=metadata)

    def to_trimesh(self):
        """A ``trimesh.Trimesh`` copy, without trimesh's automatic processing."""
        import trimesh

        return trimesh.Trimesh(self.vertices.copy(), self.faces.copy(), process=False)

    def copy_with(self, vertices=None, faces=None, metadata=None) -> Surface:
        """A new Surface sharing what is not replaced.

        With the same faces and vertex count the new surface shares this one's
        `connectivity` object; derived geometry (areas, operators) is recomputed.
        """
        new = Surface(
            self._vertices if vertices is None else vertices,
            self._faces if faces is None else faces,
            metadata=dict(self.metadata if metadata is None else metadata),
        )
        same_faces = faces is None or faces is self._faces or (
            np.shape(faces) == self._faces.shape and np.array_equal(new._faces, self._faces))
        if same_faces and new.n_vertices == self.n_vertices:
            new.__dict__["connectivity"] = self.connectivity  # the cached_property's slot
        return new

    @property
    def vertices(self) -> np.ndarray:
        """(n, 3) float64, read-only."""
        return self._vertices

    @property
    def faces(self) -> np.ndarray:
        """(m, 3) int64, read-only."""
        return self._faces

    @property
    def n_vertices(self) -> int:
        """Number of vertices, unused ones included."""
        return int(self._vertices.shape[0])

    @property
    def n_faces(self) -> int:
        """Number of triangles."""
        return int(self._faces.shape[0])

    def __repr__(self) -> str:
        return f"Surface(n_vertices={self.n_vertices}, n_faces={self.n_faces})"

    # ---------------------------------------------------------- face geometry
    @cached_property
    def _face_cross(self) -> np.ndarray:
        v, f = self._vertices, self._faces
        return np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]])

    @cached_property
    def face_areas(self) -> np.ndarray:
        """(m,) triangle areas (mm²)."""
        return _readonly(0.5 * np.linalg.norm(self._face_cross, axis=1))

    @cached_property
    def face_normals(self) -> np.ndarray:
        """(m, 3) unit normals by the right-hand rule on the face winding (zero for degenerate faces)."""
        n = self._face_cross
        norm = np.linalg.norm(n, axis=1, keepdims=True)
        out = np.divide(n, norm, out=np.zeros_like(n), where=norm > 0)
        return _readonly(out)

    @cached_property
    def face_angles(self) -> np.ndarray:
        """(m, 3) interior angles (radians) at each face corner."""
        v, f = self._vertices, self._faces
        out = np.empty(f.shape, dtype=np.float64)
        for c in range(3):
            a = v[f[:, (c + 1) % 3]] - v[f[:, c]]
            b = v[f[:, (c + 2) % 3]] - v[f[:, c]]
            # atan2 of |a x b| and a.b is accurate for needle and cap triangles.
            out[:, c] = np.arctan2(np.linalg.norm(np.cross(a, b), axis=1), np.einsum("ij,ij->i", a, b))
        return _readonly(out)

    @cached_property
    def vertex_normals(self) -> np.ndarray:
        """(n, 3) unit vertex normals, area-weighted average of face normals."""
        n = np.zeros((self.n_vertices, 3))
        for c in range(3):
            np.add.at(n, self._faces[:, c], self._face_cross)
        norm = np.linalg.norm(n, axis=1, keepdims=True)
        return _readonly(np.divide(n, norm, out=np.zeros_like(n), where=norm > 0))

    # -------------------------------------------------------- vertex areas
    @cached_property
    def vertex_areas(self) -> np.ndarray:
        """(n,) barycentric vertex areas: a third of each adjacent face (mm²). Sums to `area`."""
        a = np.bincount(self._faces.ravel(), weights=np.repeat(self.face_areas / 3.0, 3),
                        minlength=self.n_vertices)
        return _readonly(a)

    @cached_property
    def voronoi_areas(self) -> np.ndarray:
        """(n,) mixed Voronoi vertex areas (Meyer, Desbrun, Schröder & Barr 2003). Sums to `area`.

        Voronoi regions inside non-obtuse triangles; for an obtuse triangle, half
        its area goes to the obtuse corner and a quarter to each other corner.
        """
        v, f = self._vertices, self._faces
        ang = self.face_angles
        fa = self.face_areas
        contrib = np.zeros(f.shape)
        for c in range(3):
            i, j, k = f[:, c], f[:, (c + 1) % 3], f[:, (c + 2) % 3]
            # Voronoi part at corner i: (|e_ij|² cot(angle at k) + |e_ik|² cot(angle at j)) / 8
            with np.errstate(divide="ignore", invalid="ignore"):
                cot_j = 1.0 / np.tan(ang[:, (c + 1) % 3])
                cot_k = 1.0 / np.tan(ang[:, (c + 2) % 3])
            lij = np.sum((v[j] - v[i]) ** 2, axis=1)
            lik = np.sum((v[k] - v[i]) ** 2, axis=1)
            contrib[:, c] = (lij * cot_k + lik * cot_j) / 8.0
        obtuse = ang > np.pi / 2
        any_obtuse = obtuse.any(axis=1)
        contrib[any_obtuse] = np.where(obtuse[any_obtuse], 0.5, 0.25) * fa[any_obtuse, None]
        contrib = np.nan_to_num(contrib, nan=0.0, posinf=0.0, neginf=0.0)
        return _readonly(np.bincount(f.ravel(), weights=contrib.ravel(), minlength=self.n_vertices))

    # ----------------------------------------------------------- topology
    @cached_property
    def connectivity(self) -> Connectivity:
        """Edges, incidences, boundary loops and components of the faces (built on request).

        Shared with every surface made from this one by :meth:`copy_with` with the
        same faces, so moving the vertices never rebuilds it.
        """
        return Connectivity(self._faces, self.n_vertices)

    # edges, edge_face_counts, boundary_loops, n_components, genus and the other
    # topological properties are read from `connectivity` (defined after the class)

    def component_areas(self) -> tuple[np.ndarray, np.ndarray]:
        """Vertex-component label of each face, (m,), and the area of each component, (c,) mm²."""
        labels = self.vertex_components[self._faces[:, 0]]
        return labels, np.bincount(labels, weights=self.face_areas,
                                   minlength=int(self.vertex_components.max()) + 1)

    @cached_property
    def edge_lengths(self) -> np.ndarray:
        """(e,) lengths of the unique edges (mm)."""
        e = self.edges
        return _readonly(np.linalg.norm(self._vertices[e[:, 0]] - self._vertices[e[:, 1]], axis=1))

    @property
    def mean_edge_length(self) -> float:
        return float(self.edge_lengths.mean())

    @cached_property
    def degenerate_faces(self) -> np.ndarray:
        """(m,) bool: faces with a repeated vertex or an area of at most
        ``DEGENERATE_AREA`` times the squared mean edge length (see `limits`)."""
        f = self._faces
        repeated = (f[:, 0] == f[:, 1]) | (f[:, 1] == f[:, 2]) | (f[:, 0] == f[:, 2])
        floor = DEGENERATE_AREA * max(self.mean_edge_length, np.finfo(float).tiny) ** 2
        return _readonly(repeated | (self.face_areas <= floor))

    # -------------------------------------------------------- global measures
    @cached_property
    def area(self) -> float:
        """Total surface area (mm²)."""
        return float(self.face_areas.sum())

    @cached_property
    def signed_volume(self) -> float:
        """Signed enclosed volume by the divergence theorem (mm³); positive for outward faces."""
        v, f = self._vertices, self._faces
        c = v.mean(axis=0)  # centring keeps round-off small far from the origin
        a, b, d = v[f[:, 0]] - c, v[f[:, 1]] - c, v[f[:, 2]] - c
        return float(np.einsum("ij,ij->i", a, np.cross(b, d)).sum() / 6.0)

    @property
    def volume(self) -> float:
        """Enclosed volume (mm³) of a closed surface; NaN when the surface has boundary."""
        if not self.is_closed:
            return float("nan")
        return abs(self.signed_volume)

    @cached_property
    def bounds(self) -> np.ndarray:
        """(2, 3) minimum and maximum corner of the bounding box."""
        return _readonly(np.stack([self._vertices.min(axis=0), self._vertices.max(axis=0)]))

    @property
    def centroid(self) -> np.ndarray:
        """Area-weighted centroid of the surface (mm)."""
        return self.vertex_areas @ self._vertices / max(self.area, np.finfo(float).tiny)


def _topology(name: str) -> property:
    """A read-only Surface property answered by its `Connectivity` (same name, same doc)."""
    return property(lambda self: getattr(self.connectivity, name),
                    doc=getattr(Connectivity, name).__doc__)


# Topology lives in the shared Connectivity; the Surface answers these from it.
for _name in ("edges", "edge_face_counts", "non_manifold_edges", "boundary_edges",
              "boundary_loops", "vertex_components", "n_components", "n_unreferenced_vertices",
              "is_closed", "is_edge_manifold", "euler_characteristic", "genus"):
    setattr(Surface, _name, _topology(_name))
del _name
