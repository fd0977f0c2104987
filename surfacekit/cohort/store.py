"""A cohort's per-subject fields in one chunked Zarr store: one chunk per subject and field.

Layout of ``<name>.zarr`` (Zarr format 3, opens with plain ``zarr.open`` and
``dask.array.from_zarr(path, component=<field>)``)::

    zarr.json            group attributes: ``subjects`` (the row index: the subject
                         column of the cohort table, in its order), ``fields`` (name ->
                         row shape, e.g. [n_template] or [n_template, 3]), ``units``,
                         ``format`` and the research-use note
    <field>              float64 (subjects, *row shape), chunks (1, *row shape), NaN fill
    written              uint8 (subjects, fields) in the order of ``fields``, one chunk
                         per subject: 1 once that subject's chunk of that field is complete

A row is written by whichever process finished that subject (each worker writes
only its own chunks; Zarr's local store writes every chunk to a temporary file and
renames it into place), data chunks first and the ``written`` flags last, so an
interrupted run leaves either a complete, flagged row or a row the next run
writes again.  Chunks are compressed with Zstandard at a fixed level, so equal
inputs give equal bytes.  A row's data is meaningful only where ``written`` is 1:
a subject recomputed later has its flags cleared first (:meth:`FieldStore.clear_subject`).
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import uuid
from collections.abc import Mapping, Sequence
from pathlib import Path

import dask.array as da
import numpy as np
import zarr
from zarr.codecs import ZstdCodec

from ..io.tables import RESEARCH_NOTE

__all__ = ["STORE_FORMAT", "FieldStore", "create_field_store", "open_field_store"]

STORE_FORMAT = "surfacekit-field-store/1"
_WRITTEN = "written"
_CODEC_LEVEL = 3
ROWS_PER_TASK = 32  # subjects read by one Dask task of FieldStore.dask (5 MB at 20k vertices)


class _Rows:
    """Selected rows of a Zarr array, indexable like an array (the source of :meth:`FieldStore.dask`)."""

    def __init__(self, arr: zarr.Array, rows: np.ndarray):
        self.arr, self.rows = arr, rows
        self.shape = (len(rows), *arr.shape[1:])
        self.dtype = np.dtype(arr.dtype)
        self.ndim = len(self.shape)

    def __getitem__(self, key) -> np.ndarray:
        key = key if isinstance(key, tuple) else (key,)
        return self.arr.oindex[(self.rows[key[0]], *key[1:])]


def _clean_layout(fields: Mapping[str, Sequence[int]]) -> dict[str, tuple[int, ...]]:
    layout = {}
    for name, shape in fields.items():
        shape = (int(shape),) if np.isscalar(shape) else tuple(int(d) for d in shape)
        if not name or name == _WRITTEN or "/" in name or name.startswith((".", "_")):
            raise ValueError(f"field name {name!r} is not allowed in a field store")
        if not shape or min(shape) < 1:
            raise ValueError(f"field {name!r}: row shape must be positive, got {shape}")
        layout[str(name)] = shape
    if not layout:
        raise ValueError("a field store needs at least one field")
    return layout


class FieldStore:
    """Per-subject fields of a cohort, rows in the order of :attr:`subjects`.

    Use :func:`create_field_store` to make (or reuse) one and :func:`open_field_store`
    to read one; every process that writes rows opens it itself.
    """

    def __init__(self, path, group: zarr.Group):
        attrs = dict(group.attrs)
        if attrs.get("format") != STORE_FORMAT:
            raise ValueError(f"{path} is not a surfacekit field store")
        self.path = Path(path)
        self.group = group
        self.subjects: tuple[str, ...] = tuple(attrs["subjects"])
        self.fields: dict[str, tuple[int, ...]] = {k: tuple(v) for k, v in attrs["fields"].items()}
        self.units: dict[str, str] = dict(attrs.get("units", {}))
        self._position = {s: i for i, s in enumerate(self.subjects)}

    @property
    def n_subjects(self) -> int:
        return len(self.subjects)

    def row(self, subject: int | str) -> int:
        """Row index of a subject given by name or index."""
        if isinstance(subject, str):
            if subject not in self._position:
                raise KeyError(f"subject {subject!r} is not in the field store {self.path.name}")
            return self._position[subject]
        i = int(subject)
        if not 0 <= i < self.n_subjects:
            raise IndexError(f"row {i} outside the field store's {self.n_subjects} subjects")
        return i

    def _field(self, name: str) -> int:
        if name not in self.fields:
            raise KeyError(f"field {name!r} is not in the field store {self.path.name} "
                           f"(it has {', '.join(self.fields)})")
        return list(self.fields).index(name)

    def array(self, name: str) -> zarr.Array:
        """The Zarr array of one field, shape (subjects, *row shape)."""
        self._field(name)
        return self.group[name]

    def write_subject(self, subject: int | str, values: Mapping[str, object]) -> list[str]:
        """Write one subject's fields (one chunk each), then flag them written.

        Fields of the store absent from `values` are left as they are.  Returns the
        names written.  A value of the wrong size raises ValueError before anything
        is written.
        """
        i = self.row(subject)
        rows = {}
        for name, value in values.items():
            self._field(name)
            a = np.asarray(value, dtype=np.float64)
            if a.size != int(np.prod(self.fields[name])):
                raise ValueError(f"field {name!r} of {self.subjects[i]}: expected shape "
                                 f"{self.fields[name]}, got {a.shape}")
            rows[name] = a.reshape(self.fields[name])
        for name, a in rows.items():
            self.group[name][i] = a
        flags = self.group[_WRITTEN]
        row = np.asarray(flags[i])
        row[[self._field(name) for name in rows]] = 1
        flags[i] = row
        return list(rows)

    def clear_subject(self, subject: int | str) -> None:
        """Mark every field of a subject as not written (before it is computed again)."""
        i = self.row(subject)
        self.group[_WRITTEN][i, :] = 0

    def written(self, name: str | None = None) -> np.ndarray:
        """(subjects,) bool: rows whose `name` field is complete; without a name, rows whose
        every field is complete."""
        flags = np.asarray(self.group[_WRITTEN][:], dtype=bool)
        return flags[:, self._field(name)] if name is not None else flags.all(axis=1)

    def read(self, name: str, subject: int | str) -> np.ndarray:
        """One subject's row of a field (NaN where nothing was written)."""
        return np.asarray(self.array(name)[self.row(subject)])

    def dask(self, name: str, rows=None, *, rows_per_task: int = ROWS_PER_TASK) -> da.Array:
        """The field as a lazy Dask array; `rows` (indices or a boolean mask over subjects)
        selects and orders subjects.  Each Dask task reads `rows_per_task` selected subjects
        (their chunks concurrently, in one Zarr call), so a cohort makes few tasks."""
        arr = self.array(name)
        rows = np.arange(self.n_subjects) if rows is None else np.asarray(rows)
        if rows.dtype == bool:
            rows = np.flatnonzero(rows)
        rows = rows.astype(np.int64)
        # the task names name this store, field and selection (two stores never share them)
        token = hashlib.sha256(str(self.path.resolve()).encode() + rows.tobytes()).hexdigest()
        return da.from_array(_Rows(arr, rows), chunks=(max(1, int(rows_per_task)), *arr.shape[1:]),
                             name=f"field-store-{name}-{token[:20]}", asarray=True,
                             meta=np.empty((0,) * arr.ndim))

    def shapes(self, template_vertices, name: str = "displacement") -> da.Array:
        """(subjects, n, 3) corresponded positions ``template + displacement`` (lazy), the
        input of :func:`surfacekit.analysis.shape_model.shape_model`."""
        base = np.asarray(template_vertices, dtype=np.float64)
        if self.fields.get(name) != base.shape:
            raise ValueError(f"field {name!r} of shape {self.fields.get(name)} does not fit "
                             f"template vertices of shape {base.shape}")
        return self.dask(name) + base[None]


def _layout_of(path: Path) -> tuple | None:
    """(subjects, fields) of an existing store, or None when `path` holds none."""
    meta = path / "zarr.json"
    if not meta.is_file():
        return None
    try:
        attrs = json.loads(meta.read_text()).get("attributes", {})
    except (OSError, ValueError):
        return None
    if attrs.get("format") != STORE_FORMAT:
        return None
    return list(attrs.get("subjects", [])), attrs.get("fields", {})


def create_field_store(path, subjects: Sequence[str], fields: Mapping[str, Sequence[int]],
                       *, units: Mapping[str, str] | None = None) -> FieldStore:
    """A field store with these subjects (rows, in order) and fields (name -> row shape).

    An existing store at `path` with the same subjects and fields is reused with
    its written rows (a resumed run); one with another layout is replaced.  A
    folder at `path` that is not a field store is refused (ValueError), never deleted.
    `units` (name -> unit text) is stored in the attributes.
    """
    path = Path(path)
    subjects = [str(s) for s in subjects]
    if len(set(subjects)) != len(subjects) or not subjects:
        raise ValueError("a field store needs at least one subject and unique subject names")
    layout = _clean_layout(fields)
    found = _layout_of(path)
    wanted = (subjects, {k: list(v) for k, v in layout.items()})
    if found is not None and found == wanted:
        return open_field_store(path, writable=True)
    if path.exists() and found is None:
        raise ValueError(f"{path} exists and is not a surfacekit field store (not replaced)")
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex[:8]}.part")
    try:
        group = zarr.open_group(tmp, mode="w", zarr_format=3)
        group.attrs.update({"format": STORE_FORMAT, "subjects": subjects,
                            "fields": wanted[1], "units": dict(sorted((units or {}).items())),
                            "index": "row i holds subject i of 'subjects' (the cohort table's "
                                     "order); a row is valid where 'written' is 1",
                            "note": RESEARCH_NOTE})
        codec = ZstdCodec(level=_CODEC_LEVEL)
        for name, shape in layout.items():
            group.create_array(name, shape=(len(subjects), *shape), chunks=(1, *shape),
                               dtype="float64", fill_value=np.nan, compressors=codec)
        group.create_array(_WRITTEN, shape=(len(subjects), len(layout)), chunks=(1, len(layout)),
                           dtype="uint8", fill_value=0, compressors=codec)
        if found is not None:
            shutil.rmtree(path)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
    return open_field_store(path, writable=True)


def open_field_store(path, *, writable: bool = False) -> FieldStore:
    """Open an existing field store (read-only unless `writable`)."""
    path = Path(path)
    if _layout_of(path) is None:
        raise ValueError(f"{path} is not a surfacekit field store")
    return FieldStore(path, zarr.open_group(path, mode="r+" if writable else "r",
                                            zarr_format=3))
