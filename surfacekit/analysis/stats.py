"""Vertex-wise group comparison with permutation inference.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field

import numpy as np
from scipy.stats import false_discovery_control

from ..io.tables import RESEARCH_NOTE
from .chunked import BLOCK_BYTES, column_width, is_chunked, loaded


@dataclass
class GroupTestResult:
    """Result of :func:`vertexwise_group_test`.

    Attributes
    ----------
    t : (v,) t statistic of the group effect (group A minus group B) per vertex
    p_fwer : (v,) family-wise-error corrected p-values (permutation max-statistic)
    q_fdr : (v,) Benjamini–Hochberg q-values of `p_uncorrected`
    p_uncorrected : (v,) per-vertex permutation p-values
    effect : (v,) group difference A - B (covariate-adjusted), units of the input
    max_null : (n_permutations,) null distribution of the maximum statistic
    n_permutations, alternative, df : test settings; df = n - p of the linear model
    """

    t: np.ndarray
    p_fwer: np.ndarray
    q_fdr: np.ndarray
    p_uncorrected: np.ndarray
    effect: np.ndarray
    max_null: np.ndarray
    n_permutations: int
    alternative: str
    df: int
    info: dict = field(default_factory=dict)

    def significant(self, alpha: float = 0.05, *, correction: str = "fwer") -> np.ndarray:
        """(v,) bool mask of vertices with corrected p (``"fwer"``) or q (``"fdr"``) below alpha."""
        if correction == "fwer":
            return self.p_fwer < alpha
        if correction == "fdr":
            return self.q_fdr < alpha
        raise ValueError(f"correction must be 'fwer' or 'fdr', got {correction!r}")

    def fields(self) -> dict:
        """Per-vertex arrays for ``sk.save(template, path, fields=...)``."""
        return {"t": self.t, "p_fwer": self.p_fwer, "q_fdr": self.q_fdr,
                "p_uncorrected": self.p_uncorrected, "effect": self.effect}

    def save(self, path):
        """Save to NPZ (arrays plus JSON settings, no pickle); reload with :meth:`load`."""
        from ..io.files import save_fields

        meta = {"n_permutations": self.n_permutations, "alternative": self.alternative,
                "df": self.df, "info": self.info, "note": RESEARCH_NOTE}
        return save_fields(path, **self.fields(), max_null=self.max_null,
                           meta=np.array(json.dumps(meta, sort_keys=True)))

    @classmethod
    def load(cls, path) -> GroupTestResult:
        from ..io.files import load_fields

        try:
            a = load_fields(path)
            meta = json.loads(str(a["meta"]))
            return cls(a["t"], a["p_fwer"], a["q_fdr"], a["p_uncorrected"], a["effect"],
                       a["max_null"], meta["n_permutations"], meta["alternative"], meta["df"],
                       meta["info"])
        except (KeyError, ValueError, OSError) as exc:
            raise ValueError(f"{path} is not a saved GroupTestResult: {exc}") from None

    def summary(self, alpha: float = 0.05) -> dict:
        return {"n_vertices": int(self.t.shape[0]), "n_permutations": self.n_permutations,
                "alternative": self.alternative, "df": self.df, "alpha": alpha,
                "n_significant_fwer": int(self.significant(alpha).sum()),
                "n_significant_fdr": int(self.significant(alpha, correction="fdr").sum()),
                "max_abs_t": float(np.abs(self.t).max()), "note": RESEARCH_NOTE}


def _as_matrix(x, name: str) -> np.ndarray:
    a = np.asarray(x, dtype=np.float64)
    if a.ndim == 1:
        a = a[:, None]
    if a.ndim != 2:
        raise ValueError(f"{name} must have shape (subjects, vertices), got {np.shape(x)}")
    if not np.all(np.isfinite(a)):
        raise ValueError(f"{name} contains NaN or infinite values")
    return a


def _covariate_matrix(covariates, n: int) -> np.ndarray:
    if covariates is None:
        return np.zeros((n, 0))
    c = np.asarray(covariates, dtype=np.float64)
    if c.ndim == 1:
        c = c[:, None]
    if c.ndim != 2 or c.shape[0] != n:
        raise ValueError(f"covariates must have shape ({n}, c) (group A rows then group B), "
                         f"got {np.shape(covariates)}")
    if not np.all(np.isfinite(c)):
        raise ValueError("covariates contain NaN or infinite values")
    return c


def _group_input(x, name: str):
    """A numpy (n, v) matrix checked at once, or a chunked (n, v) array checked block by block."""
    if not is_chunked(x):
        return _as_matrix(x, name)
    if len(x.shape) != 2:
        raise ValueError(f"{name} must have shape (subjects, vertices), got {tuple(x.shape)}")
    return x


def _columns(x, start: int, stop: int, name: str) -> np.ndarray:
    """Columns start:stop of a group as float64, computed now when `x` is chunked."""
    return _as_matrix(loaded(x[:, start:stop]), name)


def _permutations(rng, n_permutations: int, n: int, chunk: int) -> np.ndarray:
    """(n_permutations, n) random permutations as int32, drawn `chunk` rows at a time (the
    same stream as one draw, without its (n_permutations, n) float64 temporary)."""
    perms = np.empty((n_permutations, n), dtype=np.int32)
    for start in range(0, n_permutations, chunk):
        stop = min(start + chunk, n_permutations)
        perms[start:stop] = np.argsort(rng.random((stop - start, n)), axis=1)
    return perms


def _vertex_block(n: int, n_vertices: int, vertex_block) -> int:
    """Vertices read per block: the data of n subjects holds at most ~64 MB (fewer, larger
    reads of a chunked input), whatever the number of vertices."""
    if vertex_block is not None:
        if int(vertex_block) < 1:
            raise ValueError(f"vertex_block must be >= 1, got {vertex_block}")
        return min(int(vertex_block), n_vertices)
    return min(n_vertices, column_width(n, 2 * BLOCK_BYTES))


def vertexwise_group_test(group_a, group_b, n_permutations: int = 5000, seed: int = 0,
                          covariates=None, *, alternative: str = "two-sided",
                          chunk_size: int = 250, vertex_block: int | None = None) -> GroupTestResult:
    """Vertex-wise two-group test with permutation FWER control and FDR q-values.

    Model per vertex: ``y = β0 + β1·g + Zγ + ε`` with g = 1 for group A, 0 for B
    and Z the optional covariates (e.g. age, sex coded 0/1).  The statistic is
    the ordinary least-squares t of β1 (without covariates: the pooled-variance
    two-sample t).  Null distribution by permutation of the residuals of the
    reduced model ``y = β0 + Zγ`` (Freedman & Lane, J. Bus. Econ. Stat. 1983;
    without covariates this equals permuting group labels), and family-wise
    error control by the maximum statistic over vertices (Nichols & Holmes, Hum.
    Brain Mapp. 2002): ``p_fwer = (1 + #{max_perm >= stat}) / (1 + n_permutations)``.
    q-values: Benjamini & Hochberg (J. R. Stat. Soc. B 1995) applied to the per-vertex
    permutation p-values (same +1 rule), by ``scipy.stats.false_discovery_control``.
    Vectorised: each chunk of permutations is one matrix product ``(chunk·p, n) @ (n, b)``
    over a block of b vertices.  Vertices are independent except for the maximum over
    them, so the test runs block by block and keeps only per-vertex results and the
    running maximum per permutation: memory is set by the block, not by the number of
    subjects times vertices.

    Parameters
    ----------
    group_a, group_b : (n_a, v), (n_b, v) per-vertex values (e.g. normal displacement, mm):
        numpy arrays, or chunked arrays (a Dask array such as a cohort field store's
        rows, a Zarr array) that are read one vertex block at a time
    n_permutations : number of random permutations (>= 1)
    seed : random seed (the result is deterministic for a seed)
    covariates : (n_a + n_b, c), rows in the order group A then group B, optional
    alternative : "two-sided" (|t|), "greater" (A > B) or "less" (A < B)
    chunk_size : permutations per matrix product (over at most ~32 MB of projections)
    vertex_block : vertices read per block (default: about 64 MB of data per block);
        results agree across block sizes to rounding

    Returns
    -------
    GroupTestResult
    """
    a = _group_input(group_a, "group_a")
    b = _group_input(group_b, "group_b")
    if a.shape[1] != b.shape[1]:
        raise ValueError(f"groups have different vertex counts: {a.shape[1]} and {b.shape[1]}")
    if a.shape[0] < 2 or b.shape[0] < 2:
        raise ValueError(f"each group needs at least 2 subjects, got {a.shape[0]} and {b.shape[0]}")
    if alternative not in ("two-sided", "greater", "less"):
        raise ValueError(f"alternative must be 'two-sided', 'greater' or 'less', got {alternative!r}")
    if int(n_permutations) < 1:
        raise ValueError(f"n_permutations must be >= 1, got {n_permutations}")
    n_permutations = int(n_permutations)
    n, n_vertices = a.shape[0] + b.shape[0], int(a.shape[1])
    g = np.r_[np.ones(a.shape[0]), np.zeros(b.shape[0])]
    z = np.column_stack([np.ones(n), _covariate_matrix(covariates, n)])
    x = np.column_stack([g, z])  # full design; column 0 is the effect of interest
    p = x.shape[1]
    if n - p < 1 or np.linalg.matrix_rank(x) < p:
        raise ValueError("design is rank deficient (a covariate duplicates the groups or "
                         "the intercept, or too few subjects)")
    model = _Model(x, z, chunk_size)
    perms = _permutations(np.random.default_rng(seed), n_permutations, n, chunk_size)
    sign = {"two-sided": None, "greater": 1.0, "less": -1.0}[alternative]
    width = _vertex_block(n, n_vertices, vertex_block)
    t_obs, effect = np.empty(n_vertices), np.empty(n_vertices)
    exceed = np.zeros(n_vertices, dtype=np.int64)
    max_null = np.full(n_permutations, -np.inf)
    for v0 in range(0, n_vertices, width):
        v1 = min(v0 + width, n_vertices)
        y = np.vstack([_columns(a, v0, v1, "group_a"), _columns(b, v0, v1, "group_b")])
        t_obs[v0:v1], effect[v0:v1] = model.observed(y)
        exceed[v0:v1] = model.null(y, perms, sign, t_obs[v0:v1], max_null)
    sorted_max = np.sort(max_null)
    stat_obs = np.abs(t_obs) if sign is None else sign * t_obs
    n_ge = n_permutations - np.searchsorted(sorted_max, stat_obs - 1e-12, side="left")
    p_fwer = (1.0 + n_ge) / (1.0 + n_permutations)
    p_unc = (1.0 + exceed) / (1.0 + n_permutations)
    return GroupTestResult(
        t=t_obs, p_fwer=p_fwer, q_fdr=false_discovery_control(p_unc), p_uncorrected=p_unc,
        effect=effect, max_null=max_null, n_permutations=n_permutations,
        alternative=alternative, df=int(n - p),
        info={"method": "Freedman-Lane permutation of reduced-model residuals, max-T",
              "n_covariates": int(p - 2), "seed": int(seed)})


class _Model:
    """The fixed design of :func:`vertexwise_group_test`, applied to one vertex block at a time."""

    def __init__(self, x: np.ndarray, z: np.ndarray, chunk_size: int):
        n, self.p = x.shape
        self.df = n - self.p
        self.chunk_size = int(chunk_size)
        self.qx, _ = np.linalg.qr(x)                    # (n, p) orthonormal basis of the design
        self.contrast_w = np.linalg.pinv(x)[0]          # β1 = w · y
        self.var_factor = float(self.contrast_w @ self.contrast_w)  # (XᵀX)⁻¹ entry of β1
        self.contrast_in_q = self.qx.T @ self.contrast_w  # w lies in span(X): w = Qx a
        self.qz, _ = np.linalg.qr(z)
        # vertices per permutation product: the projections (chunk·(p+1) rows) hold ~32 MB
        self.width = column_width(self.chunk_size * (self.p + 1))

    def _prepare(self, y: np.ndarray) -> None:
        self.resid_z = y - self.qz @ (self.qz.T @ y)    # reduced-model residuals (Freedman–Lane)
        self.ss_total = np.einsum("ij,ij->j", self.resid_z, self.resid_z)

    def t_stats(self, perms: np.ndarray, cols: slice = slice(None)) -> np.ndarray:
        # Data y* = Ẑ + P r: the Z-fitted part lies in span(X), so it leaves both
        # β1 and the full-model residuals unchanged; only P r matters.
        # Rows of Qxᵀ P (one (p, n) block per permutation), one matrix product for all.
        c, n = perms.shape
        p = self.p
        qp = np.empty((c, p, n))
        qp[np.arange(c)[:, None, None], np.arange(p)[None, :, None], perms[:, None, :]] = self.qx.T
        proj = (qp.reshape(c * p, n) @ self.resid_z[:, cols]).reshape(c, p, -1)
        beta = np.einsum("k,ckv->cv", self.contrast_in_q, proj)  # β1 = wᵀ P r with w = Qx a
        rss = np.maximum(self.ss_total[cols] - np.einsum("cpv,cpv->cv", proj, proj), 0.0)
        se = np.sqrt(rss / self.df * self.var_factor)
        return np.divide(beta, se, out=np.zeros_like(beta), where=se > 0)

    def observed(self, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """t and effect of one vertex block (n, b)."""
        self._prepare(y)
        identity = np.arange(y.shape[0])[None, :]
        return self.t_stats(identity)[0], self.contrast_w @ y

    def null(self, y: np.ndarray, perms: np.ndarray, sign, t_obs: np.ndarray,
             max_null: np.ndarray) -> np.ndarray:
        """Exceedance counts of the block; raises `max_null` to the block's maxima in place."""
        stat_obs = np.abs(t_obs) if sign is None else sign * t_obs
        exceed = np.zeros(y.shape[1], dtype=np.int64)
        for c0 in range(0, y.shape[1], self.width):
            cols = slice(c0, c0 + self.width)
            for start in range(0, perms.shape[0], self.chunk_size):
                t_perm = self.t_stats(perms[start:start + self.chunk_size], cols)
                stat = np.abs(t_perm) if sign is None else sign * t_perm
                chunk = max_null[start:start + len(stat)]
                np.maximum(chunk, stat.max(axis=1), out=chunk)
                exceed[cols] += (stat >= stat_obs[cols] - 1e-12).sum(axis=0)
        self.resid_z = self.ss_total = None
        return exceed
