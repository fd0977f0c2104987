import os

# One BLAS thread per test process: on a 2-core machine, multithreaded OpenBLAS
# under load from other processes spins and slows small dense solves by 10-50x.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np
import pytest

import surfacekit as sk


@pytest.fixture(scope="session")
def sphere10k():
    """Unit icosphere, 10242 vertices (intrinsic Delaunay, near-uniform)."""
    return sk.synthetic.icosphere(5)


@pytest.fixture(scope="session")
def ellipsoid_mesh():
    return sk.synthetic.ellipsoid((3.0, 2.0, 1.0), n=6000)


@pytest.fixture
def rng():
    return np.random.default_rng(1234)
