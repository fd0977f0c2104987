"""Tests for surfacekit.geodesics: heat-method distances, sampling, polar patches."""
import numpy as np
import pytest

import surfacekit as sk


@pytest.fixture(scope="session")
def sphere40k():
    """Unit icosphere, 40962 vertices (the one large mesh of this file)."""
    return sk.synthetic.icosphere(6)


def _great_circle(v, i):
    """Great-circle distance on the unit sphere: arccos(p·q) (analytic)."""
    return np.arccos(np.clip(v @ v[i], -1.0, 1.0))


def test_heat_distance_matches_great_circles_40k(sphere40k):
    """Source: great-circle distance r·arccos(p·q/r²) (CHECKS.md); target <= 1% mean relative error."""
    s = sphere40k
    d = sk.geodesic_distance(s, 17)
    gc = _great_circle(s.vertices, 17)
    away = gc > 0.1  # away from the source, where the relative error is ill-conditioned
    rel = np.abs(d[away] - gc[away]) / gc[away]
    assert rel.mean() <= 0.01
    assert d[17] == 0.0


def test_multisource_is_minimum_of_single_sources():
    """Definition: distance to a set is the minimum over its members (heat method, Crane et al. 2013)."""
    s = sk.synthetic.icosphere(4)
    v = s.vertices
    src = [0, 100, 1500]
    d = sk.geodesic_distance(s, src)
    exact = np.min([_great_circle(v, i) for i in src], axis=0)
    far = exact > 0.15
    assert np.mean(np.abs(d[far] - exact[far]) / exact[far]) < 0.02
    assert np.all(d[src] == 0.0)


def test_solver_is_cached_and_reused():
    s = sk.synthetic.icosphere(3)
    sk.geodesic_distance(s, 0)
    solver = s.cache[("heat_solver", 1.0, True)]
    sk.geodesic_distance(s, 5)
    assert s.cache[("heat_solver", 1.0, True)] is solver
    assert sk.GeodesicSolver.for_surface(s) is solver


@pytest.mark.parametrize("bad", [[], [-1], [10**6], [0.5], "a"])
def test_bad_sources_raise_value_error(bad):
    s = sk.synthetic.icosphere(2)
    with pytest.raises(ValueError):
        sk.geodesic_distance(s, bad)
