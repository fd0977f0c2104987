"""Vertex-wise group test (surfacekit.analysis.stats).

Outside references: scipy.stats.ttest_ind (pooled two-sample t),
the step-up adjusted p-values of Benjamini & Hochberg (J. R. Stat. Soc. B 1995, §3),
scipy.stats.permutation_test (per-vertex permutation p-value), scipy.stats.pearsonr
with the partial-correlation identity t = r·sqrt(df / (1 - r²)) (Fisher 1924;
textbook regression result) for the covariate-adjusted t.  Simulated data only.
"""
import numpy as np
import pytest
from scipy import stats

import surfacekit as sk


def _planted(seed=0, n_per_group=12, n_vertices=2000, fraction=0.05, effect_sd=3.0):
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((n_per_group, n_vertices))
    b = rng.standard_normal((n_per_group, n_vertices))
    hit = np.zeros(n_vertices, dtype=bool)
    hit[rng.choice(n_vertices, int(fraction * n_vertices), replace=False)] = True
    a[:, hit] += effect_sd
    return a, b, hit


def test_planted_effect_found_with_fwer_control():
    """Requirement: 3 SD at 5% of 2000 vertices, 12 per group."""
    a, b, hit = _planted()
    res = sk.vertexwise_group_test(a, b, n_permutations=5000, seed=1)
    assert np.mean(res.p_fwer[hit] < 0.05) >= 0.8
    assert np.mean(res.p_fwer[~hit] < 0.05) < 0.005
    # t equals the pooled-variance two-sample t (scipy.stats.ttest_ind)
    np.testing.assert_allclose(res.t, stats.ttest_ind(a, b).statistic, rtol=1e-10)
    # q-values are the Benjamini & Hochberg (1995, §3) step-up adjusted p-values,
    # q_(i) = min over j >= i of m p_(j) / j, capped at 1, and are monotone in p
    p_sorted = np.sort(res.p_uncorrected)
    m = len(p_sorted)
    step_up = np.minimum(np.minimum.accumulate((m * p_sorted / np.arange(1, m + 1))[::-1])[::-1], 1)
    order = np.argsort(res.p_uncorrected, kind="stable")
    np.testing.assert_allclose(res.q_fdr[order], step_up, rtol=1e-12)
    assert np.all(np.diff(res.q_fdr[order]) >= -1e-15)
    # max-T p is never below the uncorrected p (definition of the max statistic)
    assert np.all(res.p_fwer >= res.p_uncorrected - 1e-12)
    assert res.summary()["note"].startswith("For research use only")
    assert res.summary()["n_significant_fwer"] == int(np.sum(res.p_fwer < 0.05))
    assert all(v.shape == (2000,) for v in res.fields().values())


def test_uncorrected_p_matches_scipy_permutation_test():
    rng = np.random.default_rng(4)
    a = rng.standard_normal((9, 5)) + np.array([0, 0.5, 1.0, 1.5, -1.0])
    b = rng.standard_normal((10, 5))
    res = sk.vertexwise_group_test(a, b, n_permutations=5000, seed=3)

    def t_stat(x, y, axis):
        return stats.ttest_ind(x, y, axis=axis).statistic

    for j in range(5):
        ref = stats.permutation_test((a[:, j], b[:, j]), t_stat, vectorized=True,
                                     n_resamples=5000, random_state=j)
        # Monte Carlo error of two 5000-permutation estimates: SE <= 0.01 each
        assert res.p_uncorrected[j] == pytest.approx(ref.pvalue, abs=0.03)


def test_covariate_t_matches_partial_correlation_and_controls_confound():
    rng = np.random.default_rng(7)
    n_a = n_b = 15
    age = np.r_[rng.normal(70, 5, n_a), rng.normal(55, 5, n_b)]  # groups differ in age
    y = 0.2 * age[:, None] + rng.standard_normal((n_a + n_b, 300))  # age effect only
    a, b = y[:n_a], y[n_a:]
    naive = sk.vertexwise_group_test(a, b, n_permutations=500, seed=0)
    adjusted = sk.vertexwise_group_test(a, b, n_permutations=500, seed=0, covariates=age)
    assert naive.significant().mean() > 0.5           # the confound fools the plain test
    assert adjusted.significant().mean() < 0.05       # Freedman & Lane (1983) removes it
    g = np.r_[np.ones(n_a), np.zeros(n_b)]
    z = np.column_stack([np.ones(n_a + n_b), age])

    def resid(m):
        return m - z @ np.linalg.lstsq(z, m, rcond=None)[0]

    df = n_a + n_b - 3
    for j in range(4):
        r = stats.pearsonr(resid(g), resid(y[:, j])).statistic
        assert adjusted.t[j] == pytest.approx(r * np.sqrt(df / (1 - r * r)), rel=1e-9)
    assert adjusted.df == df


def test_family_wise_error_rate_under_the_null():
    # Nichols & Holmes (2002): the max-statistic test controls FWER at alpha; with 60
    # null data sets the count of any-rejection sets is Binomial(60, 0.05) (mean 3).
    rejected = 0
    for k in range(60):
        rng = np.random.default_rng(100 + k)
        y = rng.standard_normal((16, 150))
        res = sk.vertexwise_group_test(y[:8], y[8:], n_permutations=200, seed=k)
        rejected += bool(np.any(res.p_fwer < 0.05))
    assert rejected <= 9  # P(Binomial(60, 0.05) > 9) < 0.2%


def test_save_and_load(tmp_path):
    a, b, _ = _planted(seed=3, n_vertices=50)
    res = sk.vertexwise_group_test(a, b, n_permutations=99, seed=2, covariates=np.arange(24.0))
    res.save(tmp_path / "test.npz")
    back = sk.GroupTestResult.load(tmp_path / "test.npz")
    np.testing.assert_array_equal(back.p_fwer, res.p_fwer)
    assert back.summary() == res.summary()
    with pytest.raises(ValueError, match="not a saved"):
        sk.GroupTestResult.load(tmp_path / "missing.npz")


def test_deterministic_one_sided_and_chunking():
    a, b, hit = _planted(seed=2, n_vertices=300)
    r1 = sk.vertexwise_group_test(a, b, n_permutations=300, seed=5, chunk_size=7)
    r2 = sk.vertexwise_group_test(a, b, n_permutations=300, seed=5, chunk_size=300)
    # the same permutations whatever the chunking (BLAS blocking may change the last bit)
    np.testing.assert_allclose(r1.max_null, r2.max_null, rtol=1e-12)
    np.testing.assert_array_equal(r1.p_fwer, r2.p_fwer)
    less = sk.vertexwise_group_test(a, b, n_permutations=300, seed=5, alternative="less")
    assert not np.any(less.p_fwer[hit] < 0.05)  # the effect is A > B
    greater = sk.vertexwise_group_test(a, b, n_permutations=300, seed=5, alternative="greater")
    assert np.mean(greater.p_fwer[hit] < 0.05) > 0.8


def test_bad_input():
    y = np.zeros((5, 10))
    with pytest.raises(ValueError, match="vertex counts"):
        sk.vertexwise_group_test(y, np.zeros((5, 11)))
    with pytest.raises(ValueError, match="at least 2"):
        sk.vertexwise_group_test(y[:1], y)
    with pytest.raises(ValueError, match="covariates"):
        sk.vertexwise_group_test(y, y, covariates=np.zeros(3))
    with pytest.raises(ValueError, match="rank deficient"):
        sk.vertexwise_group_test(y, y, covariates=np.r_[np.ones(5), np.zeros(5)])
    with pytest.raises(ValueError, match="NaN"):
        sk.vertexwise_group_test(np.full((3, 4), np.nan), np.zeros((3, 4)))
