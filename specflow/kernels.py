"""Numerical kernels shared by the fit and the diagnostics: plain numpy on small dense arrays.

Everything here works on arrays whose rows are observations and which already carry the
regression weights (each row multiplied by the square root of its weight), so that weighted
least squares is ordinary least squares on the transformed rows.

Covariance conventions (the small-sample corrections specflow reports; see DEVELOPERS.md):

* ``unadjusted``: ``s^2 = e'e / (n - k)``, the textbook variance estimate.
* ``robust``: White's sandwich with the HC1 factor ``n / (n - k)``.
* ``cluster`` (one-way): the sandwich summed over clusters with the factor
  ``G / (G - 1) * (n - 1) / (n - k)``.
* ``cluster`` (two-way, Cameron, Gelbach and Miller 2011): ``V1 + V2 - V12``, each part with
  its own factor computed from its own number of clusters, the intersection clustering for
  ``V12``; if the sum is not positive semi-definite the negative eigenvalues are set to zero
  (as CGM suggest) and a warning is recorded by the caller.

``k`` counts every estimated coefficient, including the constant and the absorbed
fixed-effect levels, except fixed effects nested within the clustering variable.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

COV_TYPES = ("unadjusted", "robust", "cluster", "hac")


@dataclass(frozen=True)
class Clusters:
    """Integer cluster codes, one column per clustering dimension (1 or 2 columns)."""

    codes: np.ndarray  # (n, d) int64, codes 0..G_j-1 in column j
    counts: tuple[int, ...]  # number of clusters per dimension

    @classmethod
    def from_columns(cls, cols: list[np.ndarray]) -> "Clusters":
        codes = []
        counts = []
        for c in cols:
            _, inv = np.unique(np.asarray(c), return_inverse=True)
            codes.append(inv.astype(np.int64))
            counts.append(int(inv.max()) + 1 if inv.size else 0)
        return cls(np.column_stack(codes), tuple(counts))

    @property
    def ndim(self) -> int:
        return self.codes.shape[1]

    @property
    def min_count(self) -> int:
        return min(self.counts)

    def intersection(self) -> np.ndarray:
        a, b = self.codes[:, 0], self.codes[:, 1]
        _, inv = np.unique(a * (int(b.max()) + 1) + b, return_inverse=True)
        return inv.astype(np.int64)


def group_sum(scores: np.ndarray, codes: np.ndarray, n_groups: int | None = None) -> np.ndarray:
    """Sum the rows of ``scores`` (n, m) within groups: returns (G, m)."""
    if n_groups is None:
        n_groups = int(codes.max()) + 1
    out = np.empty((n_groups, scores.shape[1]))
    for j in range(scores.shape[1]):  # bincount is several times faster than np.add.at
        out[:, j] = np.bincount(codes, weights=scores[:, j], minlength=n_groups)
    return out


def _meat_one(scores: np.ndarray, codes: np.ndarray) -> tuple[np.ndarray, int]:
    g = int(codes.max()) + 1
    s = group_sum(scores, codes, g)
    return s.T @ s, g


def meat(
    scores: np.ndarray,
    cov: str,
    clusters: Clusters | None = None,
    *,
    k: int,
    hac_lags: int | None = None,
) -> np.ndarray:
    """Small-sample-corrected 'meat' ``c * sum u_i u_i'`` of a sandwich, for score rows ``u_i``.

    ``scores`` is (n, m): row i is observation i's score (e.g. ``x_i * e_i``). ``k`` is the
    number of estimated coefficients used in the correction. Returns (m, m).
    For ``hac`` the rows are taken in their given order (the caller sorts by time) and the
    Bartlett kernel with ``hac_lags`` lags is used, with the factor ``n / (n - k)``.
    """
    n = scores.shape[0]
    if cov == "robust":
        return (n / (n - k)) * (scores.T @ scores)
    if cov == "hac":
        lags = int(hac_lags if hac_lags is not None else np.floor(4 * (n / 100) ** (2 / 9)))
        s = scores.T @ scores
        for j in range(1, lags + 1):
            w = 1.0 - j / (lags + 1.0)
            g = scores[j:].T @ scores[:-j]
            s += w * (g + g.T)
        return (n / (n - k)) * s
    if cov == "cluster":
        if clusters is None:
            raise ValueError("cluster covariance needs cluster codes")
        factor = lambda g: (g / (g - 1.0)) * ((n - 1.0) / (n - k))  # noqa: E731
        if clusters.ndim == 1:
            m, g = _meat_one(scores, clusters.codes[:, 0])
            return factor(g) * m
        m1, g1 = _meat_one(scores, clusters.codes[:, 0])
        m2, g2 = _meat_one(scores, clusters.codes[:, 1])
        m12, g12 = _meat_one(scores, clusters.intersection())
        return factor(g1) * m1 + factor(g2) * m2 - factor(g12) * m12
    raise ValueError(f"meat() is for robust, cluster or hac covariance, not {cov!r}")


def psd_clip(v: np.ndarray) -> tuple[np.ndarray, bool]:
    """Set negative eigenvalues of a symmetric matrix to zero; report whether any were."""
    v = (v + v.T) / 2
    w, q = np.linalg.eigh(v)
    if np.all(w >= -1e-12 * max(1.0, float(np.abs(w).max(initial=0.0)))):
        return v, False
    w = np.clip(w, 0.0, None)
    return (q * w) @ q.T, True


def lstsq(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Least-squares coefficients of ``b`` on ``a`` (b may be a matrix)."""
    return np.linalg.lstsq(a, b, rcond=None)[0]


def resid(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Residuals of ``b`` after projection on the columns of ``a`` (``a`` may have 0 columns)."""
    if a.shape[1] == 0:
        return b.copy()
    return b - a @ lstsq(a, b)


def rank(a: np.ndarray, tol: float = 1e-10) -> int:
    if a.size == 0:
        return 0
    s = np.linalg.svd(a, compute_uv=False)
    return int(np.sum(s > tol * s[0])) if s[0] > 0 else 0
