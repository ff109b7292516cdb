"""Absorbing fixed effects: singleton removal, (weighted) demeaning, degrees of freedom.

Sweeping out fixed effects replaces a column ``x`` by its residual from a (weighted) least-squares
fit on the effects' dummy variables (Frisch-Waugh-Lovell). Three ways, chosen per sample:

* **One effect**: subtract (weighted) group means. Exact, one pass.
* **Several effects whose smaller ones have few levels in total** (at most ``SCHUR_MAX_LEVELS``,
  e.g. a million firms and a thousand years): eliminate the largest effect exactly and solve
  for the others through their Schur complement ``S = D2' W M1 D2`` (``D1`` the largest
  effect's dummies, ``D2`` the others', ``M1`` the weighted annihilator of ``D1``), a small
  dense matrix factored once per sample. The residual is
  ``x - D1 a - D2 g`` with ``g`` solving ``S g = D2' W M1 x`` (least squares, because ``S`` is
  singular by the effects' redundancies) and ``a`` the group means of ``x - D2 g``. The
  alternating-projection criterion below then confirms the result (one sweep when the solve
  was exact to rounding; further sweeps from that close start if it was not).
* **Otherwise**: alternating projections (Gaure 2013): repeatedly subtract each effect's group
  means until the largest change in a sweep is below ``tol`` relative to the column's scale.

Group sums use ``numpy.bincount``, so each pass is O(n) whatever the number of levels; a sweep
works in place on one copy of the column, so memory is the column plus a few vectors the size
of the number of levels.

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

# Largest total number of levels of the smaller effects for the exact (Schur complement) sweep.
SCHUR_MAX_LEVELS = 3000


def codes_of(values: np.ndarray) -> tuple[np.ndarray, int]:
    """Integer codes 0..G-1 for the distinct values of a column."""
    _, inv = np.unique(values, return_inverse=True)
    inv = inv.astype(np.int64).ravel()
    return inv, int(inv.max()) + 1 if inv.size else 0


def drop_singletons(codes: list[np.ndarray]) -> np.ndarray:
    """Boolean mask of rows kept after iteratively removing singleton groups of any effect."""
    n = codes[0].shape[0] if codes else 0
    keep = np.ones(n, dtype=bool)
    sizes = [int(c.max()) + 1 if c.size else 0 for c in codes]
    changed = True
    while changed:
        changed = False
        for c, g in zip(codes, sizes):
            counts = np.bincount(c[keep], minlength=g)
            bad = keep & (counts[c] == 1)
            if bad.any():
                keep &= ~bad
                changed = True
    return keep


def recode(codes: list[np.ndarray]) -> list[tuple[np.ndarray, int]]:
    """Each non-negative integer code column renumbered 0..G-1 (in order), with its G.

    The same numbering as ``numpy.unique(c, return_inverse=True)``, in O(n) without sorting.
    """
    out = []
    for c in codes:
        c = np.asarray(c, dtype=np.int64).ravel()
        if c.size == 0:
            out.append((c.copy(), 0))
            continue
        present = np.bincount(c) > 0
        new = np.cumsum(present) - 1
        out.append((new[c], int(present.sum())))
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
        # the bipartite graph's (G1 + G2) nodes, one edge a row (connected_components with
        # directed=False treats each edge as undirected, so no transpose block is needed)
        graph = coo_matrix((np.ones(a.size, dtype=np.int8),
                            (a.astype(np.int32), (b + ga).astype(np.int32))),
                           shape=(ga + gb, ga + gb)).tocsr()
        ncomp, _ = connected_components(graph, directed=False)
        return total - ncomp
    return total - (len(codes) - 1)


def nested_in(fe: np.ndarray, cluster: np.ndarray) -> bool:
    """True if every level of ``fe`` lies within a single cluster."""
    if fe.size == 0:
        return True
    first = np.empty(int(fe.max()) + 1, dtype=cluster.dtype)
    first[fe] = cluster  # one row's cluster for each level (the last row's)
    return bool(np.all(first[fe] == cluster))


class Demeaner:
    """Sweeps fixed effects out of columns, for one sample (codes and weights fixed)."""

    def __init__(self, codes: list[tuple[np.ndarray, int]], weights: np.ndarray | None,
                 tol: float = 1e-12, max_iter: int = 10_000, method: str = "auto"):
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
        if method == "auto":
            small = sum(g for _, g in codes) - max((g for _, g in codes), default=0)
            method = "means" if len(codes) <= 1 else (
                "schur" if small <= SCHUR_MAX_LEVELS else "projections")
        self.method = method
        self._schur: tuple | None = None

    # one effect's (weighted) group means of x, gathered back to the rows, subtracted in place
    def _sweep_inplace(self, x: np.ndarray, j: int, buf: np.ndarray | None = None) -> np.ndarray:
        c, g = self.codes[j]
        means = self._means(x, j)
        if buf is None:
            x -= means[c]
        else:
            np.take(means, c, out=buf)
            x -= buf
        return means

    def _means(self, x: np.ndarray, j: int) -> np.ndarray:
        c, g = self.codes[j]
        if self.w is None:
            s = np.bincount(c, weights=x, minlength=g)
        else:
            s = np.bincount(c, weights=x * self.w, minlength=g)
        s /= self._den[j]
        return s

    def __call__(self, x: np.ndarray, inplace: bool = False) -> np.ndarray:
        """``x`` with the fixed effects swept out (a new array unless ``inplace``)."""
        x = np.asarray(x, dtype=float)
        out = x if inplace else x.copy()
        if not self.codes:
            return out
        if self.method == "means":
            self._sweep_inplace(out, 0)
            return out
        if self.method == "schur":
            return self._schur_sweep(out)
        return self._projections(out)

    # alternating projections ---------------------------------------------------------------
    def _projections(self, out: np.ndarray, scale: float | None = None, done: int = 0) -> np.ndarray:
        if scale is None:
            scale = max(float(np.abs(out).max(initial=0.0)), 1e-300)
        buf = np.empty_like(out)
        prev = np.empty_like(out)
        for it in range(1, self.max_iter + 1):
            prev[:] = out
            for j in range(len(self.codes)):
                self._sweep_inplace(out, j, buf)
            np.subtract(out, prev, out=buf)
            np.abs(buf, out=buf)
            if float(buf.max(initial=0.0)) <= self.tol * scale:
                self.iterations.append(done + it)
                return out
        self.iterations.append(done + self.max_iter)
        return out

    # exact: largest effect eliminated, the others through their Schur complement ----------
    def _setup_schur(self):
        from scipy.sparse import coo_matrix

        order = sorted(range(len(self.codes)), key=lambda j: -self.codes[j][1])
        big, rest = order[0], order[1:]
        c1, g1 = self.codes[big]
        offsets = np.cumsum([0] + [self.codes[j][1] for j in rest])
        g2 = int(offsets[-1])
        w = np.ones(c1.size) if self.w is None else self.w
        S = np.zeros((g2, g2))
        blocks = []
        for t, j in enumerate(rest):
            cj, gj = self.codes[j]
            # C_j = D1' W Dj (G1 x Gj, sparse), summed over rows
            blocks.append(coo_matrix((w, (c1.astype(np.int32), cj.astype(np.int32))),
                                     shape=(g1, gj)).tocsr())
        # S = D2' W D2 - C' diag(1 / n1) C, with D2' W D2 from the pairwise cross tables
        inv1 = 1.0 / self._den[big]
        for t, j in enumerate(rest):
            cj, gj = self.codes[j]
            a0, a1 = offsets[t], offsets[t + 1]
            for u, k in enumerate(rest):
                if u < t:
                    continue
                ck, gk = self.codes[k]
                b0, b1 = offsets[u], offsets[u + 1]
                if u == t:
                    S[a0:a1, a0:a1] += np.diag(np.bincount(cj, weights=self.w, minlength=gj))
                else:
                    cross = coo_matrix((w, (cj.astype(np.int32), ck.astype(np.int32))),
                                       shape=(gj, gk)).toarray()
                    S[a0:a1, b0:b1] += cross
                    S[b0:b1, a0:a1] += cross.T
                ctc = (blocks[t].T.multiply(inv1) @ blocks[u]).toarray()
                S[a0:a1, b0:b1] -= ctc
                if u != t:
                    S[b0:b1, a0:a1] -= ctc.T
        S = (S + S.T) / 2
        vals, vecs = np.linalg.eigh(S)
        keep = vals > 1e-10 * max(float(vals.max(initial=0.0)), 1e-300)
        pinv = (vecs[:, keep] / vals[keep]) @ vecs[:, keep].T
        self._schur = (big, rest, offsets, pinv)

    def _schur_pass(self, out: np.ndarray, buf: np.ndarray) -> None:
        big, rest, offsets, pinv = self._schur
        # r = M1 x; rhs = D2' W r; g = S^+ rhs; out = M1 (x - D2 g) = r - M1 D2 g
        self._sweep_inplace(out, big, buf)
        rhs = np.concatenate([
            np.bincount(self.codes[j][0], weights=out if self.w is None else out * self.w,
                        minlength=self.codes[j][1]) for j in rest])
        g = pinv @ rhs
        buf[:] = 0.0
        for t, j in enumerate(rest):
            buf += g[offsets[t]:offsets[t + 1]][self.codes[j][0]]
        out -= buf
        # add back the big effect's means of D2 g: out = M1 x - (D2 g - P1 D2 g)
        means = self._means(buf, big)
        np.take(means, self.codes[big][0], out=buf)
        out += buf

    def _schur_sweep(self, out: np.ndarray) -> np.ndarray:
        if self._schur is None:
            self._setup_schur()
        scale = max(float(np.abs(out).max(initial=0.0)), 1e-300)
        buf = np.empty_like(out)
        self._schur_pass(out, buf)
        del buf
        # the alternating-projection criterion confirms the result (one sweep when the solve
        # was exact to rounding; more, starting from a close point, if it was not)
        return self._projections(out, scale, done=1)
