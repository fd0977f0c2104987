"""Property-based fuzzing of the loaders and of Surface validation (hypothesis).

Valid files of every format are mutated (bit flips, byte changes, truncations,
insertions of troublesome tokens, deletions); random bytes are fed to every
suffix; random arrays are fed to ``Surface``.  The only exception allowed is
``SurfaceError``; whatever loads must satisfy the Surface invariants.  Bounds:
derandomized examples with a per-example deadline, a per-test timeout
(pytest-timeout) and an address-space limit (RLIMIT_AS) so a runaway allocation
fails as MemoryError (which the loaders do not swallow) instead of exhausting
the machine.  About 2300 cases in total.
"""
from __future__ import annotations

import os
import resource
import tempfile
from datetime import timedelta
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

import surfacekit as sk
from surfacekit.io import load_with_fields

# SURFACEKIT_FUZZ_SCALE=20 runs 20x more (random, not derandomized) examples for a deeper search.
SCALE = int(os.environ.get("SURFACEKIT_FUZZ_SCALE", "1"))
FUZZ = settings(max_examples=150 * SCALE, deadline=timedelta(seconds=5), derandomize=SCALE == 1,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
                database=None)
SEEDS = ["ply-bin", "ply-ascii", "vtk-bin", "vtk-ascii", "stl-bin", "stl-ascii", "obj", "off",
         "gii", "npz"]
NASTY = [b"nan", b"inf", b"-1", b"1e400", b"4294967295", b"99999999999999999999", b"\n", b" ",
         b"3.5", b"end_header\n", b"POINTS 1000000000000 float\n", b"\x00\x00\x00\x7f", b"#", b"/"]


@pytest.fixture(scope="module")
def seeds():
    """Small valid files (42 vertices, 80 faces, with fields) keyed by name -> (suffix, bytes)."""
    s = sk.synthetic.icosphere(1)
    n = s.n_vertices
    fields = {"t": np.linspace(0, 1, n), "lab": np.arange(n) % 3, "vec": np.ones((n, 3))}
    out = {}
    with tempfile.TemporaryDirectory() as tmp:
        for name in SEEDS:
            ext, _, mode = name.partition("-")
            path = Path(tmp) / f"seed.{ext}"
            sk.save(s, path, fields=fields if ext in ("ply", "vtk", "gii", "npz") else None,
                    binary=mode != "ascii")
            out[name] = (f".{ext}", path.read_bytes())
    return out


@pytest.fixture(scope="module")
def workdir():
    with tempfile.TemporaryDirectory() as tmp:
        yield Path(tmp)


@pytest.fixture(scope="module", autouse=True)
def bounded_memory():
    """Cap the address space at its current size + 2 GiB while fuzzing (restored after)."""
    soft, hard = resource.getrlimit(resource.RLIMIT_AS)
    with open("/proc/self/status") as fh:
        vm = next(int(line.split()[1]) * 1024 for line in fh if line.startswith("VmSize"))
    limit = vm + (2 << 30)
    if hard != resource.RLIM_INFINITY:
        limit = min(limit, hard)
    resource.setrlimit(resource.RLIMIT_AS, (limit, hard))
    yield
    resource.setrlimit(resource.RLIMIT_AS, (soft, hard))


def check_load(folder: Path, suffix: str, data: bytes) -> None:
    """Load `data` as a file; only SurfaceError may escape, and what loads must be valid."""
    path = folder / f"case{suffix}"
    path.write_bytes(data)
    try:
        surface, fields = load_with_fields(path)
    except sk.SurfaceError as exc:
        assert "\n" not in str(exc)
        return
    v, f = surface.vertices, surface.faces
    assert v.ndim == 2 and v.shape[1] == 3 and np.isfinite(v).all()
    assert f.ndim == 2 and f.shape[1] == 3 and f.min() >= 0 and f.max() < len(v)
    assert surface.face_areas.max() > 0
    assert all(len(a) == len(v) for a in fields.values())


mutation = st.tuples(
    st.sampled_from(["flip", "set", "truncate", "insert", "delete", "nasty"]),
    st.integers(0, 1 << 30), st.integers(0, 255), st.sampled_from(NASTY))


def mutate(data: bytes, ops) -> bytes:
    buf = bytearray(data)
    for op, pos, byte, nasty in ops:
        if not buf:
            break
        i = pos % len(buf)
        if op == "flip":
            buf[i] ^= 1 << (byte % 8)
        elif op == "set":
            buf[i] = byte
        elif op == "truncate":
            del buf[i:]
        elif op == "insert":
            buf[i:i] = bytes([byte]) * (1 + byte % 7)
        elif op == "delete":
            del buf[i: i + 1 + byte % 16]
        else:
            buf[i:i] = nasty
    return bytes(buf)


@pytest.mark.timeout(300)
@pytest.mark.parametrize("seed", SEEDS)
def test_mutated_valid_files(seed, seeds, workdir):
    """150 mutated versions of each of 10 valid files (1500 cases)."""
    suffix, data = seeds[seed]

    @FUZZ
    @given(st.lists(mutation, min_size=1, max_size=4))
    def run(ops):
        check_load(workdir, suffix, mutate(data, ops))

    run()


@pytest.mark.timeout(300)
@pytest.mark.parametrize("suffix", [".ply", ".obj", ".stl", ".off", ".gii", ".vtk", ".npz"])
def test_random_bytes(suffix, workdir):
    """Random bytes, alone and behind a valid magic line (7 x 60 cases)."""
    magic = {".ply": b"ply\nformat ascii 1.0\n", ".obj": b"v 0 0 0\n", ".stl": b"solid x\n",
             ".off": b"OFF\n", ".gii": b"<?xml version='1.0'?><GIFTI>", ".vtk":
             b"# vtk DataFile Version 3.0\nx\nASCII\nDATASET POLYDATA\n", ".npz": b"PK\x03\x04"}

    @settings(FUZZ, max_examples=60 * SCALE)
    @given(st.binary(max_size=600), st.booleans())
    def run(data, with_magic):
        check_load(workdir, suffix, (magic[suffix] if with_magic else b"") + data)

    run()


@pytest.mark.timeout(300)
@FUZZ
@given(
    vertices=hnp.arrays(np.float64, st.tuples(st.integers(0, 12), st.integers(2, 4)),
                        elements=st.floats(allow_nan=True, allow_infinity=True, width=64)),
    faces=hnp.arrays(np.int64, st.tuples(st.integers(0, 6), st.integers(2, 4)),
                     elements=st.integers(-3, 15)),
    dtype=st.sampled_from([np.int64, np.int32, np.uint32, np.float64]),
)
def test_surface_validation(vertices, faces, dtype):
    """Surface accepts exactly the well-formed arrays and raises SurfaceError otherwise (150 cases)."""
    faces = faces.astype(dtype)  # negative values wrap to huge ones as uint32
    try:
        s = sk.Surface(vertices, faces)
    except sk.SurfaceError:
        ok = (vertices.ndim == 2 and vertices.shape[1] == 3 and len(vertices) > 0
              and np.isfinite(vertices).all() and np.abs(vertices).max() <= 1e150
              and faces.size > 0 and faces.shape[1] == 3
              and faces.min() >= 0 and faces.max() < len(vertices))
        assert not ok, "a well-formed surface was refused"
        return
    assert s.vertices.shape[1] == 3 and np.isfinite(s.vertices).all()
    assert s.faces.shape[1] == 3 and 0 <= s.faces.min() and s.faces.max() < s.n_vertices


@pytest.mark.timeout(300)
@pytest.mark.parametrize("seed", ["ply-ascii", "vtk-ascii", "obj", "off", "stl-ascii"])
def test_token_replacement_in_text_files(seed, seeds, workdir):
    """Replace whole numbers in text files with troublesome tokens (5 x 50 cases)."""
    suffix, data = seeds[seed]
    lines = data.split(b"\n")

    @settings(FUZZ, max_examples=50 * SCALE)
    @given(st.lists(st.tuples(st.integers(0, len(lines) - 1), st.integers(0, 8),
                              st.sampled_from(NASTY + [b"0", b"-0", b"1e-400", b"abc"])),
                    min_size=1, max_size=3))
    def run(edits):
        new = list(lines)
        for line_no, tok_no, token in edits:
            toks = new[line_no].split(b" ")
            toks[tok_no % len(toks)] = token
            new[line_no] = b" ".join(toks)
        check_load(workdir, suffix, b"\n".join(new))

    run()
