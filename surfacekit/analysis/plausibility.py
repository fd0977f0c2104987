"""Plausibility checks of organ surfaces: size, scale of a pair, alignment residual.

A mesh file stores bare numbers, so a surface in metres, centimetres or voxel
units loads without error and gives numbers that are wrong by powers of ten.
These checks turn such cases into plain-sentence warnings; they never change a
result.  The ranges are broad on purpose (they catch unit mistakes, not unusual
anatomy) and come from common practice and anatomical reference values, quoted
from memory rather than from one cited table:

* enclosed volume from :data:`VOLUME_RANGE_ML` — about 0.05 ml (small structures
  such as the pituitary gland or a small lymph node) to 8 litres (both lungs at
  full inspiration, about 6–7 l, with room to spare; a large liver is 2–3 l);
* bounding-box diagonal from :data:`DIAGONAL_RANGE_MM` — 5 mm (a small lymph node)
  to 800 mm (a whole large intestine: 566 mm for the large intestine of the
  Visible Human male reference model);
* two scans of one organ differ in size by a factor above :data:`SCALE_RATIO_LIMIT`
  (ratio of sqrt(area)) only when the units differ: growth or atrophy changes
  the linear size by tens of percent, not threefold;
* the rigid alignment residual (root mean square, mm) above
  :data:`ALIGNMENT_LIMIT` times the radius of the sphere of equal area,
  sqrt(area / 4π).  On this library's synthetic benchmark pairs (growth,
  anisotropic scaling, bending, noise) and the demo pair the residual is
  0.005–0.067 of that radius; 0.15 leaves more than twice that margin.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

import math

import numpy as np

from ..mesh.surface import Surface

#: enclosed volume (ml) expected of an organ surface (see the module notes)
VOLUME_RANGE_ML = (0.05, 8000.0)
#: bounding-box diagonal (mm) expected of an organ surface
DIAGONAL_RANGE_MM = (5.0, 800.0)
#: largest plausible ratio of sqrt(area) between two scans of one organ
SCALE_RATIO_LIMIT = 3.0
#: largest plausible rigid alignment residual, as a fraction of sqrt(area / 4π)
ALIGNMENT_LIMIT = 0.15
#: where the ranges come from, as said in the warnings
RANGE_SOURCE = ("volume 0.05 ml (a pituitary gland or small lymph node) to 8 l (both lungs), "
                "bounding-box diagonal 5 mm (a small lymph node) to 800 mm (a whole large "
                "intestine); common practice and anatomical reference values, from memory")
_UNITS = (("cm", 10.0), ("m", 1000.0))


def diagonal_mm(surface: Surface) -> float:
    """Length of the bounding-box diagonal (mm)."""
    lo, hi = surface.bounds
    return float(np.linalg.norm(hi - lo))


def _volume_ml(surface: Surface) -> float:
    return float(surface.volume) / 1000.0 if surface.is_closed else float("nan")


def _plausible(diagonal: float, volume_ml: float) -> bool:
    ok = DIAGONAL_RANGE_MM[0] <= diagonal <= DIAGONAL_RANGE_MM[1]
    if math.isfinite(volume_ml):
        ok = ok and VOLUME_RANGE_ML[0] <= volume_ml <= VOLUME_RANGE_ML[1]
    return ok


def _remedy(diagonal: float, volume_ml: float) -> str:
    """Which unit of the file would make the size plausible, as a clause."""
    fits = [f"in {'centimetres' if u == 'cm' else 'metres'} (--units {u})" for u, k in _UNITS
            if _plausible(diagonal * k, volume_ml * k ** 3)]
    if fits:
        return "it would be plausible if the file is " + " or ".join(fits)
    if diagonal > DIAGONAL_RANGE_MM[1] or volume_ml > VOLUME_RANGE_ML[1]:
        return ("if the file is in voxel units or micrometres, give the size of one unit in mm "
                "(e.g. --units 0.5 for 0.5 mm voxels); or it holds more than one organ")
    return ("if the file is in other units, give the size of one unit in mm "
            "(e.g. --units 25.4 for inches)")


def size_warnings(surface: Surface, name: str = "surface") -> list[str]:
    """A warning when a surface's size (in mm) is implausible for an organ, else nothing.

    Parameters
    ----------
    surface : Surface in mm (as loaded with its ``units``)
    name : how the warning names the surface (e.g. its file name)

    Returns
    -------
    list of plain sentences (empty when the size is plausible)
    """
    diagonal, volume = diagonal_mm(surface), _volume_ml(surface)
    if _plausible(diagonal, volume):
        return []
    size = f"bounding-box diagonal {diagonal:.3g} mm"
    if math.isfinite(volume):
        size += f", enclosed volume {volume:.3g} ml"
    units = surface.metadata.get("units", "mm")
    return [(f"{name}: size implausible for an organ ({size}, read as {units}; expected "
             f"{RANGE_SOURCE}); {_remedy(diagonal, volume)}")]


def scale_ratio(a: Surface, b: Surface) -> float:
    """Ratio of the linear sizes of two surfaces, sqrt(area of b / area of a)."""
    return math.sqrt(float(b.area) / float(a.area)) if a.area > 0 else float("inf")


def scale_warnings(a: Surface, b: Surface, names=("baseline", "follow-up")) -> list[str]:
    """A warning when two scans of one organ differ in linear size by more than 3x."""
    ratio = scale_ratio(a, b)
    if 1.0 / SCALE_RATIO_LIMIT <= ratio <= SCALE_RATIO_LIMIT:
        return []
    big, small = (names[1], names[0]) if ratio > 1 else names
    factor = ratio if ratio > 1 else 1.0 / ratio
    guess = ""
    for unit, k in (("mm against cm", 10.0), ("cm against m", 100.0), ("mm against m", 1000.0)):
        if abs(math.log(factor / k)) < math.log(1.5):
            guess = f"; a factor near {k:g} suggests {unit}"
    return [(f"{big} is {factor:.4g} times larger than {small} in linear size (sqrt of area)"
             f"{guess}; two scans of one organ differ far less, so the inputs are probably in "
             "different units: give each file its units (--units, e.g. --units mm,m)")]


def alignment_warnings(rms_mm: float, a: Surface, b: Surface) -> list[str]:
    """A warning when the rigid alignment residual is large for the organ's size."""
    radius = max(math.sqrt(float(s.area) / (4 * math.pi)) for s in (a, b))
    if not math.isfinite(rms_mm) or rms_mm <= ALIGNMENT_LIMIT * radius:
        return []
    return [(f"alignment residual {rms_mm:.3g} mm is {rms_mm / radius:.0%} of the organ's radius "
             f"(sqrt(area/4π) = {radius:.3g} mm; above {ALIGNMENT_LIMIT:.0%} is unusual for two "
             "scans of one organ): the shapes differ a lot, the units differ, or the map is poor; "
             "check the views in the report before using the change values")]


def change_value_warnings(volume_change_percent: float, area_change_percent: float) -> list[str]:
    """Say why a volume change near -100% or a huge area change is probably a units problem.

    The limits are those of :data:`SCALE_RATIO_LIMIT`: a volume ratio beyond 3³ = 27 (or
    below 1/27) and an area ratio beyond 3² = 9 (or below 1/9).
    """
    out = []
    limit = SCALE_RATIO_LIMIT
    vol, area = volume_change_percent, area_change_percent
    if math.isfinite(vol) and not 1 / limit ** 3 <= 1 + vol / 100 <= limit ** 3:
        out.append(f"volume change of {vol:.4g}% is far beyond what an organ does between two "
                   "scans; it is probably a units problem (one surface in m or cm, the other in "
                   "mm): load both in the same units (--units)")
    if math.isfinite(area) and not 1 / limit ** 2 <= 1 + area / 100 <= limit ** 2:
        out.append(f"area change by a factor {1 + area / 100:.3g} is far beyond what an organ does "
                   "between two scans; it is probably a units problem (a factor 100 in area is cm "
                   "against mm, 10^6 is m against mm): load both in the same units (--units)")
    return out


def pair_warnings(a: Surface, b: Surface, rms_mm: float | None = None,
                  names=("baseline", "follow-up")) -> list[str]:
    """All warnings about a pair of scans: the size of each, their scale ratio, the residual."""
    out = size_warnings(a, names[0]) + size_warnings(b, names[1]) + scale_warnings(a, b, names)
    if rms_mm is not None:
        out += alignment_warnings(float(rms_mm), a, b)
    return out
