"""The one CSV and JSON writer (surfacekit/io/tables.py): text form, atomic writes."""
from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from surfacekit.io import tables
from surfacekit.io.tables import RESEARCH_NOTE, format_value, json_default, write_csv, write_json


def test_format_value_rule():
    """Floats with 6 significant digits (C printf %g conversion, ISO C 7.21.6.1), NaN/None
    empty, -0 as 0, booleans 1/0, NumPy scalars like Python numbers."""
    values = (0.1 + 0.2, 1e-12, -0.0, float("nan"), None, 3, True, np.float32(0.5),
              np.int64(7), np.bool_(False), 123456789.0, float("inf"), "text")
    assert [format_value(v) for v in values] == \
        ["0.3", "1e-12", "0", "", "", "3", "1", "0.5", "7", "0", "1.23457e+08", "inf", "text"]


def test_write_csv_columns_and_round_trip(tmp_path):
    rows = [{"name": "a", "x": 1.0 / 3.0, "n": 2}, {"name": "b,c", "y": np.float64(2.5)}]
    path = write_csv(tmp_path / "t.csv", rows)
    text = path.read_bytes().decode()
    assert text == 'name,x,n,y\na,0.333333,2,\n"b,c",,,2.5\n'   # union of keys, first-seen order
    with open(path, newline="") as fh:
        back = list(csv.DictReader(fh))
    assert back[1]["name"] == "b,c" and float(back[1]["y"]) == 2.5
    # explicit columns fix the order and drop other keys
    write_csv(tmp_path / "u.csv", rows, columns=["y", "name"])
    assert (tmp_path / "u.csv").read_text() == 'y,name\n,a\n2.5,"b,c"\n'


def test_writers_are_atomic(tmp_path, monkeypatch):
    """A failing write leaves the old file untouched and no temporary file behind."""
    path = write_csv(tmp_path / "t.csv", [{"a": 1}])

    def boom(*args, **kwargs):
        raise RuntimeError("disk full")

    monkeypatch.setattr(tables.csv, "writer", boom)
    with pytest.raises(RuntimeError):
        write_csv(path, [{"a": 2}])
    assert path.read_text() == "a\n1\n"
    with pytest.raises(TypeError, match="object"):
        write_json(tmp_path / "r.json", {"x": object()})
    assert sorted(p.name for p in tmp_path.iterdir()) == ["t.csv"]


def test_write_json_numpy_paths_and_options(tmp_path):
    class Options:
        def to_dict(self):
            return {"k": 3}

    data = {"b": np.float32(1.5), "a": np.arange(3), "p": Path("x/y.ply"), "o": Options(),
            "i": np.int64(4)}
    path = write_json(tmp_path / "r.json", data)
    text = path.read_text()
    assert text.endswith("}\n") and text.index('"a"') < text.index('"b"')   # sorted keys
    assert json.loads(text) == {"a": [0, 1, 2], "b": 1.5, "i": 4, "o": {"k": 3}, "p": "x/y.ply"}
    assert json_default(np.bool_(True)) is True


def test_research_note_wording():
    assert RESEARCH_NOTE.startswith("For research use only; not for diagnosis or treatment")
    assert "qualified professional judgement" in RESEARCH_NOTE
