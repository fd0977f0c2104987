"""Connectivity of a triangulation: edges, incidences, boundary loops, components.

A `Connectivity` depends on the faces and the vertex count only, never on the
vertex positions, so a surface whose vertices move keeps it
(:meth:`Surface.copy_with`).  Every quantity is computed on first request and
kept, and the object is shared by everything that needs topology: the `Surface`
properties, repair, remeshing, geodesic patches, curvature and analysis.  Code
that works on plain ``(vertices, faces)`` arrays (repair, before a `Surface`
exists) builds one with ``Connectivity(faces, len(vertices))``.

Half-edge ``h`` is corner ``h % 3`` of face ``h // 3`` and runs from that corner
to the next one, ``faces[h // 3, h % 3] -> faces[h // 3, (h % 3 + 1) % 3]``.
"""
from __future__ import annotations

from functools import cached_property

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components


def _readonly(a):
    """Freeze a shared array, or the arrays of a shared sparse matrix."""
    for arr in (a.data, a.indices, a.indptr) if sp.issparse(a) else (a,):
        arr.setflags(write=False)
    return a


def row_keys(rows: np.ndarray) -> np.ndarray:
    """(r,) int64 key identifying each row of a non-negative int array (r, 2) or (r, 3).

    Rows are packed into one integer (mixed radix), which makes ``np.unique`` on
    rows a 1-D sort instead of a much slower row-wise one, and keys sort like the
    rows (lexicographically); arrays too large to pack fall back to dense ranks
    from a lexicographic sort.
    """
    rows = np.asarray(rows, dtype=np.int64)
    base = int(rows.max()) + 1 if rows.size else 1
    if base ** rows.shape[1] < 2**62:
        key = rows[:, 0].copy()
        for c in range(1, rows.shape[1]):
            key = key * base + rows[:, c]
        return key
    order = np.lexsort(rows.T[::-1])
    new = np.r_[True, np.any(rows[order][1:] != rows[order][:-1], axis=1)]
    key = np.empty(len(rows), dtype=np.int64)
    key[order] = np.cumsum(new) - 1
    return key


class Connectivity:
    """Topology of a triangle set.

    Parameters
    ----------
    faces : (m, 3) array_like of int
        Triangles as vertex indices (repeated indices are allowed: repair sees them).
    n_vertices : int, optional
        Number of vertices (default ``faces.max() + 1``); vertices used by no face
        are isolated.
    """

    def __init__(self, faces, n_vertices: int | None = None):
        f = np.asarray(faces, dtype=np.int64).reshape(-1, 3)
        self.faces = _readonly(f if not f.flags.writeable else f.copy())
        if n_vertices is None:
            n_vertices = int(f.max()) + 1 if f.size else 0
        self.n_vertices = int(n_vertices)

    @property
    def n_faces(self) -> int:
        return int(self.faces.shape[0])

    # ------------------------------------------------------------------ edges
    @cached_property
    def half_edges(self) -> np.ndarray:
        """(3m, 2) directed half-edges, in face order (see the module docstring)."""
        f = self.faces
        return _readonly(np.stack([f, np.roll(f, -1, axis=1)], axis=2).reshape(-1, 2))

    @cached_property
    def _edge_table(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        sorted_he = np.sort(self.half_edges, axis=1)
        _, first, inverse, counts = np.unique(row_keys(sorted_he), return_index=True,
                                              return_inverse=True, return_counts=True)
        return _readonly(sorted_he[first]), _readonly(inverse.ravel()), _readonly(counts)

    @property
    def edges(self) -> np.ndarray:
        """(e, 2) unique undirected edges, each sorted (i < j), rows in lexicographic order."""
        return self._edge_table[0]

    @property
    def half_edge_edge(self) -> np.ndarray:
        """(3m,) index into `edges` of each half-edge."""
        return self._edge_table[1]

    @property
    def edge_face_counts(self) -> np.ndarray:
        """(e,) faces on each edge: 1 boundary, 2 manifold interior, more than 2 non-manifold."""
        return self._edge_table[2]

    @cached_property
    def interior_pairs(self) -> tuple[np.ndarray, np.ndarray]:
        """Half-edge ids ``(a, b)`` of the two faces on every two-face edge, in edge order.

        The faces of edge ``k`` are ``a[k] // 3`` and ``b[k] // 3``; they are oriented
        consistently when the two half-edges run in opposite directions.
        """
        inverse = self.half_edge_edge
        ids = np.flatnonzero(self.edge_face_counts[inverse] == 2)
        ids = ids[np.argsort(inverse[ids], kind="stable")]
        return _readonly(ids[0::2]), _readonly(ids[1::2])

    def has_edges(self, pairs: np.ndarray) -> np.ndarray:
        """(p,) bool: whether each vertex pair (p, 2), in either order, is an edge."""
        n = np.int64(max(self.n_vertices, 1))
        pairs = np.sort(np.asarray(pairs, dtype=np.int64).reshape(-1, 2), axis=1)
        return np.isin(pairs[:, 0] * n + pairs[:, 1], self.edges[:, 0] * n + self.edges[:, 1])

    @property
    def non_manifold_edges(self) -> np.ndarray:
        """(k, 2) edges shared by more than two faces."""
        return self.edges[self.edge_face_counts > 2]

    @property
    def is_closed(self) -> bool:
        """True when every edge has exactly two faces (watertight, edge-manifold)."""
        return bool(np.all(self.edge_face_counts == 2))

    @property
    def is_edge_manifold(self) -> bool:
        """True when no edge has more than two faces."""
        return bool(np.all(self.edge_face_counts <= 2))

    @cached_property
    def n_inconsistent_edges(self) -> int:
        """Two-face edges whose faces traverse them in the same direction (flipped faces)."""
        a, b = self.interior_pairs
        return int(np.count_nonzero(self.half_edges[a, 0] == self.half_edges[b, 0]))

    @cached_property
    def duplicate_faces(self) -> np.ndarray:
        """(m,) bool: faces whose vertex set repeats an earlier face (either orientation)."""
        dup = np.ones(self.n_faces, bool)
        dup[np.unique(row_keys(np.sort(self.faces, axis=1)), return_index=True)[1]] = False
        return _readonly(dup)

    # ------------------------------------------------------- sparse incidences
    def edge_matrix(self, weights: np.ndarray) -> sp.csr_matrix:
        """(n, n) symmetric matrix holding ``weights[k]`` (e,) at both entries of edge k."""
        e, w = self.edges, np.asarray(weights, dtype=np.float64)
        return sp.coo_matrix((np.r_[w, w], (np.r_[e[:, 0], e[:, 1]], np.r_[e[:, 1], e[:, 0]])),
                             shape=(self.n_vertices,) * 2).tocsr()

    def vertex_adjacency(self, *, self_loops: bool = False) -> sp.csr_matrix:
        """(n, n) 0/1 vertex adjacency through edges (with the diagonal when `self_loops`).

        Cached and shared: the matrix is read-only.
        """
        key = "_adjacency_loops" if self_loops else "_adjacency"
        if key not in self.__dict__:
            a = self.edge_matrix(np.ones(len(self.edges)))
            if self_loops:
                a = a + sp.identity(self.n_vertices, format="csr")
            a.data[:] = 1.0
            self.__dict__[key] = _readonly(a)
        return self.__dict__[key]

    def vertex_face_matrix(self, face_weights: np.ndarray) -> sp.csr_matrix:
        """(n, m) matrix with ``face_weights[t]`` at (vertex, face t) for each corner of t."""
        m = self.n_faces
        return sp.csr_matrix((np.repeat(face_weights, 3),
                              (self.faces.ravel(), np.repeat(np.arange(m), 3))),
                             shape=(self.n_vertices, m))

    @cached_property
    def vertex_faces(self) -> sp.csr_matrix:
        """(n, m) 0/1 vertex-face incidence (read-only)."""
        return _readonly(self.vertex_face_matrix(np.ones(self.n_faces)))

    # ------------------------------------------------------------- components
    @cached_property
    def used_vertices(self) -> np.ndarray:
        """Sorted indices of the vertices used by at least one face."""
        return _readonly(np.unique(self.faces))

    @property
    def n_unreferenced_vertices(self) -> int:
        """Number of vertices used by no face."""
        return int(self.n_vertices - len(self.used_vertices))

    @cached_property
    def _components(self) -> tuple[int, np.ndarray]:
        return connected_components(self.vertex_adjacency(), directed=False)

    @property
    def vertex_components(self) -> np.ndarray:
        """(n,) component label of each vertex (isolated vertices get their own label)."""
        return self._components[1]

    @cached_property
    def n_components(self) -> int:
        """Number of connected components among vertices used by faces."""
        return len(np.unique(self._components[1][self.used_vertices]))

    @cached_property
    def face_components(self) -> np.ndarray:
        """(m,) component label of each face, faces joined across two-face edges only."""
        a, b = self.interior_pairs
        m = self.n_faces
        g = sp.coo_matrix((np.ones(len(a)), (a // 3, b // 3)), shape=(m, m))
        return _readonly(connected_components(g, directed=False)[1])

    @cached_property
    def euler_characteristic(self) -> int:
        """V - E + F over vertices used by faces."""
        return int(len(self.used_vertices) - len(self.edges) + self.n_faces)

    @cached_property
    def genus(self) -> int:
        """Genus from χ = 2c - 2g - b (c components, b boundary loops); meaningful for manifolds."""
        b = len(self.boundary_loops)
        return int(max(0, (2 * self.n_components - b - self.euler_characteristic) // 2))

    # --------------------------------------------------------------- boundary
    @cached_property
    def boundary_edges(self) -> np.ndarray:
        """(b, 2) directed boundary edges, oriented as in their single face."""
        on_boundary = self.edge_face_counts[self.half_edge_edge] == 1
        return _readonly(self.half_edges[on_boundary])

    @cached_property
    def boundary_vertices(self) -> np.ndarray:
        """(n,) bool: vertices on a boundary edge."""
        mask = np.zeros(self.n_vertices, dtype=bool)
        mask[self.boundary_edges.ravel()] = True
        return _readonly(mask)

    @cached_property
    def boundary_loops(self) -> list[np.ndarray]:
        """Boundary loops as arrays of vertex indices, in boundary-edge order.

        Loops are traced on directed boundary edges; where a vertex touches two
        boundary loops (non-manifold vertex) the tracing still terminates.
        """
        be = self.boundary_edges
        if len(be) == 0:
            return []
        order = np.argsort(be[:, 0], kind="stable")
        nxt_edge: dict[int, list[int]] = {}
        for idx in order:
            nxt_edge.setdefault(int(be[idx, 0]), []).append(int(idx))
        used = np.zeros(len(be), dtype=bool)
        loops = []
        for e0 in range(len(be)):
            if used[e0]:
                continue
            loop = []
            e = e0
            while e is not None and not used[e]:
                used[e] = True
                loop.append(int(be[e, 0]))
                candidates = [c for c in nxt_edge.get(int(be[e, 1]), []) if not used[c]]
                e = candidates[0] if candidates else None
            loops.append(_readonly(np.asarray(loop, dtype=np.int64)))
        return loops

    # ------------------------------------------------------------ vertex fans
    @cached_property
    def corner_fan_labels(self) -> np.ndarray:
        """(3m,) fan label of each face corner (corner ``3 t + c`` is vertex ``faces[t, c]``).

        Two corners at a vertex are in one fan when their faces share a two-face
        edge through that vertex.
        """
        m = self.n_faces
        if m == 0:
            return np.zeros(0, np.int64)
        he = self.half_edges
        a, b = self.interior_pairs
        end_a, end_b = 3 * (a // 3) + (a % 3 + 1) % 3, 3 * (b // 3) + (b % 3 + 1) % 3
        same = he[a, 0] == he[b, 0]  # same direction: start meets start
        rows = np.concatenate([a, end_a])
        cols = np.concatenate([np.where(same, b, end_b), np.where(same, end_b, b)])
        g = sp.coo_matrix((np.ones(len(rows)), (rows, cols)), shape=(3 * m, 3 * m))
        return _readonly(connected_components(g, directed=False)[1])

    @cached_property
    def vertex_fans(self) -> np.ndarray:
        """(n,) number of face fans around each vertex (0 unused, 1 manifold, >1 pinched)."""
        labels = self.corner_fan_labels
        if len(labels) == 0:
            return np.zeros(self.n_vertices, np.int64)
        pairs = np.unique(row_keys(np.stack([self.faces.ravel(), labels], axis=1)))
        base = max(int(self.faces.max()), int(labels.max())) + 1
        return _readonly(np.bincount(pairs // base, minlength=self.n_vertices))
