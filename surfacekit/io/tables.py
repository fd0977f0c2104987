"""The one CSV writer and the one JSON writer of the package, and the research-use note.

Every table and record surfacekit writes goes through :func:`write_csv` or
:func:`write_json`: atomically (a temporary file renamed into place) and with
one deterministic text form, so the same results give byte-identical files on
every engine and platform.
"""
from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Iterable, Sequence
from pathlib import Path

import numpy as np

from .files import atomic_path

RESEARCH_NOTE = ("For research use only; not for diagnosis or treatment decisions. Clinical use "
                 "must follow local regulations and qualified professional judgement.")


def format_value(value) -> str:
    """The CSV text of one value: floats as ``%.6g``, NaN and None as an empty cell.

    Six significant digits (the C printf ``%g`` rule) print the same text for the
    same float everywhere, keep small p-values that fixed decimals would round to
    0, and hide last-bit noise.  ``-0`` prints as ``0``; booleans as ``1``/``0``;
    NumPy scalars like the Python numbers they hold; anything else through ``str``.
    """
    if isinstance(value, np.generic):
        value = value.item()
    if value is None:
        return ""
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return ""
        text = f"{value:.6g}"
        return "0" if text == "-0" else text
    return str(value)


def table_columns(rows: Iterable[dict]) -> list[str]:
    """Column names of dict rows: every key, in order of first appearance."""
    return list(dict.fromkeys(key for row in rows for key in row))


def write_csv(path, rows: Sequence[dict], columns: Sequence[str] | None = None) -> Path:
    """Write dict rows as CSV, atomically, with :func:`format_value` text and ``\\n`` line ends.

    Parameters
    ----------
    path : destination file (its folder must exist)
    rows : one dict per row; a key missing from a row gives an empty cell
    columns : column order of the header; default :func:`table_columns` of `rows`.
        Keys outside `columns` are not written.

    Returns
    -------
    Path of the written file.
    """
    path = Path(path)
    header = list(columns) if columns is not None else table_columns(rows)
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    if header:
        writer.writerow(header)
    writer.writerows([format_value(row.get(c)) for c in header] for row in rows)
    with atomic_path(path, suffix=".csv") as tmp:
        tmp.write_text(buf.getvalue(), encoding="utf-8")
    return path


def json_default(value):
    """``default=`` hook of :func:`json.dumps` for NumPy values, paths and option objects.

    NumPy scalars become Python numbers, arrays nested lists, paths strings, and
    objects with a ``to_dict()`` method (e.g. ``MatchOptions``) that dict.  Anything
    else raises TypeError rather than being written in a form that cannot be read back.
    """
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    if callable(getattr(value, "to_dict", None)):
        return value.to_dict()
    raise TypeError(f"value of type {type(value).__name__} is not JSON-serialisable")


def write_json(path, data) -> Path:
    """Write `data` as JSON (sorted keys, 2-space indent, final newline), atomically."""
    path = Path(path)
    text = json.dumps(data, indent=2, sort_keys=True, default=json_default) + "\n"
    with atomic_path(path, suffix=".json") as tmp:
        tmp.write_text(text, encoding="utf-8")
    return path
