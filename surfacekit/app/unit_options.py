"""The ``--units`` option of the commands that read meshes, and the printing of warnings.

Every surface is analysed in millimetres; ``--units`` names the unit of the mesh
files (mm, cm, m, or the size of one file unit in mm) so they are scaled on
loading.  Commands that read several meshes take one unit for all of them or
one per mesh, separated by commas, in the order the meshes are given.
"""
from __future__ import annotations

from collections.abc import Sequence

from ..io.units import parse_units
from ..mesh.surface import SurfaceError
from .context import Context, InputError

UNITS_HELP = ("length unit of the mesh file{s}: mm (default), cm, m, or the size of one file "
              "unit in mm (e.g. 0.5 for a surface in 0.5 mm voxel units); vertices are scaled "
              "to mm")


def add_units_option(p, names: Sequence[str] = ("mesh",)) -> None:
    """Add ``--units`` to a command whose mesh inputs are `names` (in command-line order)."""
    text = UNITS_HELP.format(s="s" if len(names) > 1 else "")
    if len(names) > 1:
        text += (f"; one value for all, or one per mesh separated by commas "
                 f"({', '.join(names)}), e.g. --units {','.join(['mm'] + ['m'] * (len(names) - 1))}")
    p.add_argument("--units", default="mm", metavar="UNITS", help=text)


def units_for(units: str, names: Sequence[str], *, optional_last: bool = False) -> list[str]:
    """One unit per mesh input from the ``--units`` text.

    `names` are the mesh inputs given; with `optional_last`, a list one shorter
    than `names` is accepted and the last mesh (e.g. a region template) takes the
    first mesh's unit.
    """
    parts = [u.strip() for u in str(units).split(",")]
    n = len(names)
    if len(parts) == 1:
        parts = parts * n
    elif optional_last and len(parts) == n - 1:
        parts = parts + [parts[0]]
    elif len(parts) != n:
        raise InputError(f"--units takes one unit for all meshes or one per mesh ({n}: "
                         f"{', '.join(names)}), got {len(parts)} values")
    try:
        return [parse_units(u)[0] for u in parts]
    except SurfaceError as exc:
        raise InputError(f"--units: {exc}") from None


def say_warnings(ctx: Context, warnings: Sequence[str]) -> None:
    """Print each warning as one line on stderr (silent with --quiet)."""
    for w in warnings:
        ctx.say(f"surfacekit: warning: {w}")
