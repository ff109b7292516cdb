"""Absorbing fixed effects: singleton removal, (weighted) demeaning, degrees of freedom.

One fixed effect is swept out exactly by subtracting group means. Several are swept out by
alternating projections (the method of alternating projections, Gaure 2013): repeatedly
subtract each effect's group means until the largest change is below ``tol`` relative to the
column's scale. Group sums use ``numpy.bincount``, so each sweep is O(n) whatever the number
of levels; memory is a few vectors of length n.

Degrees of freedom absorbed (counted in ``k`` for small-sample corrections): the number of
levels of each effect, less the redundancies between effects: for two effects the number of
connected components of their bipartite graph minus one is added back
(``G1 + G2 - components``); for three or more, ``sum(G_j) - (J - 1)`` (exact when the
effects' graphs are connected, conservative otherwise). An effect nested within a cluster
variable is not counted under cluster covariance (its levels do not reduce the number of
independent clusters' information).
"""

from __future__ import annotations

import numpy as np


def codes_of(values: np.ndarray) -> tuple[np.ndarray, int]:
    """Integer codes 0..G-1 for the distinct values of a column."""
    _, inv = np.unique(values, return_inverse=True)
    inv = inv.astype(np.int64).ravel()
    return inv, int(inv.max()) + 1 if inv.size else 0


def drop_singletons(codes: list[np.ndarray]) -> np.ndarray:
    """Boolean mask of rows kept after iteratively removing singleton groups of any effect."""
    n = codes[0].shape[0] if codes else 0
    keep = np.ones(n, dtype=bool)
    changed = True
    while changed:
        changed = False
        for c in codes:
            counts = np.bincount(c[keep], minlength=int(c.max()) + 1 if c.size else 0)
            bad = keep & (counts[c] == 1)
            if bad.any():
                keep &= ~bad
                changed = True
    return keep


def recode(codes: list[np.ndarray]) -> list[tuple[np.ndarray, int]]:
    out = []
    for c in codes:
        u, inv = np.unique(c, return_inverse=True)
        out.append((inv.astype(np.int64).ravel(), int(u.size)))
    return out


def absorbed_df(codes: list[tuple[np.ndarray, int]]) -> int:
    """Levels absorbed by the fixed effects (see module docstring)."""
    if not codes:
        return 0
    total = sum(g for _, g in codes)
    if len(codes) == 1:
        return total
    if len(codes) == 2:
        from scipy.sparse import coo_matrix
        from scipy.sparse.csgraph import connected_components

        (a, ga), (b, gb) = codes
        m = coo_matrix((np.ones(a.size), (a, b + 0)), shape=(ga, gb)).tocsr()
        from scipy.sparse import bmat

        graph = bmat([[None, m], [m.T, None]])
        ncomp, _ = connected_components(graph, directed=False)
        return total - ncomp
    return total - (len(codes) - 1)


def nested_in(fe: np.ndarray, cluster: np.ndarray) -> bool:
    """True if every level of ``fe`` lies within a single cluster."""
    if fe.size == 0:
        return True
    order = np.lexsort((cluster, fe))
    f, c = fe[order], cluster[order]
    same_f = f[1:] == f[:-1]
    return bool(np.all(c[1:][same_f] == c[:-1][same_f]))


class Demeaner:
    """Sweeps fixed effects out of columns, for one sample (codes and weights fixed)."""

    def __init__(self, codes: list[tuple[np.ndarray, int]], weights: np.ndarray | None,
                 tol: float = 1e-12, max_iter: int = 10_000):
        self.codes = codes
        self.w = weights
        self.tol = tol
        self.max_iter = max_iter
        self.iterations: list[int] = []
        self._den = []
        for c, g in codes:
            den = np.bincount(c, weights=weights, minlength=g)
            den[den == 0] = 1.0
            self._den.append(den)

    def _sweep(self, x: np.ndarray, j: int) -> np.ndarray:
        c, g = self.codes[j]
        xw = x if self.w is None else x * self.w
        means = np.bincount(c, weights=xw, minlength=g) / self._den[j]
        return x - means[c]

    def __call__(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        if not self.codes:
            return x.copy()
        if len(self.codes) == 1:
            return self._sweep(x, 0)
        scale = max(float(np.abs(x).max(initial=0.0)), 1e-300)
        out = x.copy()
        for it in range(1, self.max_iter + 1):
            prev = out
            for j in range(len(self.codes)):
                out = self._sweep(out, j)
            if float(np.abs(out - prev).max(initial=0.0)) <= self.tol * scale:
                self.iterations.append(it)
                return out
        self.iterations.append(self.max_iter)
        return out
