"""Thresholds that decide when a triangle is too thin or too small to trust.

One home for them: the mesh quality report and the repair steps flag the same
triangles that make the Laplacian switch to its robust form, so a surface the
report calls clean is one the cotangent formula handles.
"""
from __future__ import annotations

import numpy as np

#: smallest trusted triangle angle (degrees).  Below it the cotangent weights
#: (Pinkall & Polthier 1993) become large enough to dominate their rows and the
#: Laplacian switches to the intrinsic-Delaunay one (Sharp & Crane, SGP 2020).  The
#: value is the one the correspondence solver was tuned with: raising it to 1 degree
#: (the former quality-report value) changed the Laplacian picked for 5 of the 13
#: surfaces of ``benchmarks/map_fingerprint.py``, and so the maps.
NEEDLE_ANGLE_DEGREES = 0.5
#: the same threshold in radians
NEEDLE_ANGLE = float(np.deg2rad(NEEDLE_ANGLE_DEGREES))

#: a face whose area is at most this fraction of the squared mean edge length is
#: degenerate (zero area up to round-off).  The area of a triangle with edges of
#: length l is computed with an absolute error of a few ``eps · l²`` (eps = 2.2e-16),
#: so 1e-12 is about 4500 round-off units: such a face has no reliable normal or
#: angles.  The repair steps collapse it; the Laplacian switches to its robust form.
DEGENERATE_AREA = 1e-12

#: coordinates closer than this fraction of the bounding-box diagonal count as one
#: point: 1e-4 mm on a 1 m scene, far below any scanner's resolution and just above
#: the rounding of coordinates stored as 32-bit floats (relative 6e-8).
MERGE_TOLERANCE = 1e-7
