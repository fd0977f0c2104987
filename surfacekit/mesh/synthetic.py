"""Synthetic surfaces for tests, benchmarks and the demo (all invented, not patient data).

Every organ-like shape here is the image of the unit sphere under a smooth map,
so two meshes of the same shape made from different sphere triangulations have a
known ground-truth correspondence: points with the same sphere parameter.
"""
from __future__ import annotations

import numpy as np
from scipy.spatial import ConvexHull
from scipy.spatial.transform import Rotation

from .surface import Surface


def icosphere(subdivisions: int = 3, radius: float = 1.0) -> Surface:
    """Subdivided icosahedron projected to a sphere (Delaunay, near-uniform)."""
    import trimesh

    m = trimesh.creation.icosphere(subdivisions=subdivisions, radius=radius)
    return Surface(m.vertices, m.faces, metadata={"synthetic": "icosphere"})


def fibonacci_sphere(n: int, *, jitter: float = 0.0, seed: int = 0) -> Surface:
    """Unit sphere triangulated as the convex hull of n Fibonacci-lattice points.

    ``jitter`` (in units of the mean spacing) perturbs the points tangentially, so
    two calls with different seeds give different, irregular triangulations.
    """
    i = np.arange(n) + 0.5
    z = 1.0 - 2.0 * i / n
    phi = np.pi * (1.0 + 5.0**0.5) * i
    r = np.sqrt(1.0 - z * z)
    p = np.stack([r * np.cos(phi), r * np.sin(phi), z], axis=1)
    if jitter > 0:
        rng = np.random.default_rng(seed)
        p = p + jitter * np.sqrt(4 * np.pi / n) * rng.standard_normal(p.shape)
        p /= np.linalg.norm(p, axis=1, keepdims=True)
    hull = ConvexHull(p)
    f = hull.simplices.copy()
    # orient outward: the hull of a sphere contains the origin
    c = p[f].mean(axis=1)
    nrm = np.cross(p[f[:, 1]] - p[f[:, 0]], p[f[:, 2]] - p[f[:, 0]])
    flip = np.einsum("ij,ij->i", nrm, c) < 0
    f[flip] = f[flip][:, ::-1]
    return Surface(p, f, metadata={"synthetic": "fibonacci_sphere"})


def ellipsoid(axes=(1.0, 1.0, 1.0), n: int = 5000, *, seed: int = 0, jitter: float = 0.0) -> Surface:
    """Ellipsoid with semi-axes ``axes`` from a Fibonacci sphere of n vertices."""
    s = fibonacci_sphere(n, jitter=jitter, seed=seed)
    return Surface(s.vertices * np.asarray(axes, dtype=float), s.faces,
                   metadata={"synthetic": "ellipsoid", "axes": list(map(float, axes))})


# ------------------------------------------------------------- organ shapes
def _bend(p: np.ndarray, curvature: float, axis: int = 0, toward: int = 1) -> np.ndarray:
    """Bend points along `axis` into an arc of the given curvature (1/mm), isometric on the axis."""
    if curvature == 0:
        return p
    q = p.copy()
    s = p[:, axis]
    R = 1.0 / curvature
    h = p[:, toward]
    q[:, axis] = (R - h) * np.sin(s / R)
    q[:, toward] = R - (R - h) * np.cos(s / R)
    return q


def _tube(p: np.ndarray, length: float = 130.0, radius: float = 9.0) -> np.ndarray:
    """Unit-sphere points to a straight tube along x with hemispherical closed ends (mm).

    Latitude (the angle from the sphere's equator towards ±x) runs along the tube:
    the middle latitudes map linearly to the cylindrical part, the outer ones to
    the end caps.  The radius varies along the tube (wider towards -x, a waist
    near +x) and three pouches of different sizes bulge out at different places
    and on different sides (like the sacculations of a bowel segment), so neither
    the two ends nor the turns about the axis are alike.
    """
    lat = np.arcsin(np.clip(p[:, 0], -1.0, 1.0))
    around = np.arctan2(p[:, 2], p[:, 1])
    cap_lat = 0.3 * np.pi  # latitudes beyond this form the caps
    half = 0.5 * length - radius  # half length of the cylindrical part
    u = np.clip(lat / cap_lat, -1.0, 1.0)  # -1 .. 1 along the cylindrical part
    profile = 1.0 + (0.45 - 0.3 * u) * np.sin(0.5 * np.pi * (u + 1.0)) ** 2 * (1.0 - 0.6 * np.exp(-((u - 0.55) / 0.2) ** 2))
    r = radius * profile
    along = half * u
    cap = np.abs(lat) > cap_lat
    a = 0.5 * np.pi * (np.abs(lat[cap]) - cap_lat) / (0.5 * np.pi - cap_lat)  # 0 .. pi/2 over the cap
    along[cap] = np.sign(lat[cap]) * (half + radius * np.sin(a))
    r[cap] = radius * np.cos(a)
    for centre, angle, height in ((-0.55, 0.0, 6.0), (0.05, 2.2, 4.5), (0.6, 4.1, 3.5)):
        pouch = height * np.exp(-((along - centre * half) / 11.0) ** 2)
        r = r + pouch * (r / radius) * np.clip(np.cos(around - angle), 0, None) ** 2
    return np.stack([along, r * np.cos(around), r * np.sin(around)], axis=1)


def organ_map(kind: str, sphere_points: np.ndarray, *, scale: float = 1.0) -> np.ndarray:
    """Map unit-sphere points to an organ-like shape in mm (invented, synthetic).

    Kinds: ``"kidney"`` (a bean with a hilum indentation, ~110 x 60 x 45 mm),
    ``"liver"`` (a wedge-shaped lobe, ~200 x 150 x 120 mm), ``"hippocampus"`` (a
    bent, tapering tube, ~45 x 12 x 15 mm), ``"ventricle"`` (a bullet shape with a
    rounded apex, ~90 x 55 x 55 mm), ``"sphere"`` (radius 30 mm).
    """
    p = np.asarray(sphere_points, dtype=float)
    x, y, z = p[:, 0], p[:, 1], p[:, 2]
    if kind == "sphere":
        q = 30.0 * p
    elif kind == "kidney":
        q = p * np.array([55.0, 30.0, 22.0])
        # hilum: an indentation on the medial (+y) side, near the middle
        dent = np.exp(-((x / 0.45) ** 2 + (z / 0.6) ** 2)) * np.clip(y, 0, None) ** 2
        q[:, 1] -= 14.0 * dent
        q = _bend(q, 1.0 / 120.0, axis=0, toward=1)
        q[:, 2] += 4.0 * x * np.clip(z, 0, None)  # mild asymmetry between poles
    elif kind == "liver":
        q = p * np.array([100.0, 75.0, 60.0])
        q[:, 2] *= 0.55 + 0.45 * (1 - x) / 2 + 0.25 * (1 - x) / 2  # taller on the right lobe
        q[:, 1] += 25.0 * (x**2) * (z > 0)
        q[:, 2] -= 18.0 * np.exp(-((x - 0.2) ** 2 + (y + 0.2) ** 2) / 0.15) * (z < 0)  # visceral dent
    elif kind == "hippocampus":
        taper = 1.0 - 0.45 * (x + 1) / 2
        q = np.stack([22.5 * x, 6.0 * y * taper, 7.5 * z * taper], axis=1)
        q[:, 2] += 3.0 * np.exp(-((x + 0.8) / 0.25) ** 2) * (1 + z)  # head
        q = _bend(q, 1.0 / 25.0, axis=0, toward=1)
    elif kind == "tube":
        q = _tube(p)
    elif kind == "ventricle":
        # rounded base at +z, tapering towards a blunt apex at -z
        taper = 1.0 - 0.45 * np.clip(-z, 0, None) ** 1.5
        q = np.stack([27.0 * x * taper, 24.0 * y * taper, 45.0 * z], axis=1)
        q[:, 0] += 6.0 * np.clip(x, 0, None) * np.clip(z, 0, None)  # outflow bulge at the base
    else:
        raise ValueError(f"unknown organ kind {kind!r}")
    return scale * q


def organ_surface(kind: str = "kidney", n_vertices: int = 4000, *, seed: int = 0,
                  jitter: float = 0.3, deform=None) -> tuple[Surface, np.ndarray]:
    """An organ-like synthetic surface and its sphere parameters.

    Parameters
    ----------
    kind : see :func:`organ_map`
    n_vertices : vertex count of the (Fibonacci) sphere triangulation
    seed, jitter : seed and amount of tangential jitter: different seeds give
        different triangulations of the same shape
    deform : optional callable ``(points (n,3) mm, sphere_points (n,3)) -> points`` applied last

    Returns
    -------
    surface : Surface (mm)
    sphere_points : (n, 3) unit-sphere parameter of each vertex (the ground truth)
    """
    base = fibonacci_sphere(n_vertices, jitter=jitter, seed=seed)
    sp_pts = base.vertices.copy()
    q = organ_map(kind, sp_pts)
    if deform is not None:
        q = deform(q, sp_pts)
    return (Surface(q, base.faces, metadata={"synthetic": kind, "units": "mm", "seed": seed}),
            sp_pts)


def random_rotation(seed: int = 0) -> np.ndarray:
    """A uniformly random 3x3 rotation matrix (deterministic for a seed)."""
    return Rotation.random(random_state=seed).as_matrix()
