"""Length units of mesh files: every surface is analysed in millimetres.

A mesh file stores bare numbers; its unit is whatever the program that wrote it
used (millimetres for most medical imaging tools, metres for some engineering and
3D-print tools, voxel indices for some segmentation exports).  ``units`` names the
unit of the file so that loading scales the vertices to millimetres.
"""
from __future__ import annotations

import math

from ..mesh.surface import SurfaceError

#: millimetres per unit of the named length units
UNIT_SCALES = {"mm": 1.0, "cm": 10.0, "m": 1000.0}


def parse_units(units) -> tuple[str, float]:
    """The name and millimetres-per-unit factor of a length unit.

    Parameters
    ----------
    units : "mm", "cm", "m", or a positive number (the size in mm of one unit of the
        file, e.g. the voxel size for a surface stored in voxel units); a string
        holding a number is read as that number

    Returns
    -------
    (name, scale) : name is "mm", "cm", "m" or the number as text; scale in mm per unit

    Raises
    ------
    SurfaceError
        Unknown unit names and scales that are not finite and positive.
    """
    if isinstance(units, str):
        name = units.strip().lower()
        if name in UNIT_SCALES:
            return name, UNIT_SCALES[name]
        try:
            value = float(name)
        except ValueError:
            raise SurfaceError(f"unknown units {units!r} (use mm, cm, m, or the size of one "
                               "file unit in mm, e.g. 0.5)") from None
    elif isinstance(units, (int, float)) and not isinstance(units, bool):
        value = float(units)
    else:
        raise SurfaceError(f"units must be mm, cm, m or a number, got {units!r}")
    if not math.isfinite(value) or value <= 0:
        raise SurfaceError(f"units scale must be a positive number of mm per file unit, got {units!r}")
    for name, scale in UNIT_SCALES.items():
        if value == scale:
            return name, scale
    return f"{value:g}", value
