"""Every malformed file is refused by ``sk.load`` with a one-line SurfaceError naming the problem.

The corpus lives in ``tests/malformed_corpus.py`` (generated in code).  Each case
also runs under tracemalloc (NumPy reports its buffers to it) to show that no
header-declared size is allocated before it is checked, and under a per-test
timeout (pytest-timeout) so a hang fails the test instead of stalling CI.
"""
from __future__ import annotations

import tracemalloc
from pathlib import Path

import nibabel.gifti  # noqa: F401  imported here so module imports do not count as loader memory
import numpy as np
import pytest
from malformed_corpus import corpus, stl_binary, tet_triangles

import surfacekit as sk

CASES = corpus()


def materialise(folder: Path, name: str, data: bytes | None) -> Path:
    """Write one corpus case; ``None`` data builds the special paths."""
    path = folder / name
    if name == "folder.ply":
        path.mkdir()
    elif name == "cutb.ply":
        s = sk.Surface(tet_triangles()[0], [[0, 1, 2]])
        sk.save(s, path)
        path.write_bytes(path.read_bytes()[:-7])
    elif data is not None:
        path.write_bytes(data)
    return path


@pytest.mark.timeout(20)
@pytest.mark.parametrize("case,name,data,expected", CASES, ids=[c[0] for c in CASES])
def test_malformed_file_is_refused(tmp_path, case, name, data, expected):
    path = materialise(tmp_path, name, data)
    tracemalloc.start()
    try:
        with pytest.raises(sk.SurfaceError) as info:
            sk.load(path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    message = str(info.value)
    assert expected in message
    assert "\n" not in message and len(message) < 300
    # Corpus files are < 10 kB; a refused file may cost little more than its own copies.
    assert peak < 8 << 20, f"{case}: peak {peak} bytes"


def test_random_bytes_name_the_format(tmp_path):
    """Random bytes get a message that names the file, not an internal traceback."""
    for case, name, data, _ in CASES:
        if case.startswith("random bytes"):
            with pytest.raises(sk.SurfaceError, match=name.replace(".", r"\.")):
                sk.load(materialise(tmp_path, name, data))


def test_binary_stl_exact_size_header_is_not_sniffed(tmp_path):
    """A valid binary STL whose free-form 80-byte header happens to start with gzip magic loads."""
    data = bytearray(stl_binary(tet_triangles()))
    data[:2] = b"\x1f\x8b"
    path = tmp_path / "odd_header.stl"
    path.write_bytes(bytes(data))
    s = sk.load(path)
    assert (s.n_vertices, s.n_faces) == (4, 4)
    assert np.isclose(s.volume, 1 / 6)  # unit right tetrahedron: volume 1/6 (analytic)

