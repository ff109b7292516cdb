"""One Specification + its prepared data -> FitResult.

Each fit runs four regressions on one estimation sample: OLS of the outcome on the
endogenous regressors and controls, each first stage, the reduced form, and the IV estimate
with the chosen estimator (2SLS, LIML, Fuller or two-step efficient GMM) and covariance. The
weak-instrument and validity diagnostics are then computed on the partialled-out design.

Conventions (what a paper usually reports; linearmodels' defaults differ, see DEVELOPERS.md):

* Estimation sample: the rows passing every sample filter, with listwise deletion of missing
  or infinite values in any column the specification uses, then (with fixed effects)
  iterative removal of singleton groups. Both counts are reported.
* Weights are analytic weights: every row is multiplied by the square root of its weight.
* Fixed effects are partialled out (Frisch-Waugh-Lovell) and their levels counted in ``k``
  (see :mod:`specflow.fe` for the count, and for effects nested in clusters).
* Small-sample corrections: see :mod:`specflow.kernels` (s^2 with n - k; HC1; cluster
  G/(G-1)(n-1)/(n-k); two-way Cameron-Gelbach-Miller).
* Intervals and p-values: the IV estimate (all estimators) uses the standard normal; OLS,
  first stages and the reduced form use Student's t with n - k degrees of freedom, or G - 1
  with clustered errors (G the smallest number of clusters).
* GMM: two steps; the weight matrix is the inverse of the (corrected) moment covariance at
  the 2SLS residuals; the reported covariance is the sandwich at the final residuals.
* LIML's kappa is the smallest root of det(Y'M_W Y - k Y'M_Q Y) = 0 with Y = [y, X];
  Fuller's is kappa - alpha / (n - K_Q - absorbed levels).
"""

from __future__ import annotations

import sys
import time
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import special

from . import __version__
from .errors import FitFailure
from .fe import Demeaner, absorbed_df, drop_singletons, nested_in, recode
from .grid import Specification
from .kernels import Clusters, lstsq, meat, psd_clip
from .results import ConfidenceSet, Diagnostic, FitResult, Regression, Term

TRANSFORMS = {
    "none": lambda v: v,
    "log": lambda v: np.log(np.where(v > 0, v, np.nan)),
    "log1p": lambda v: np.log1p(np.where(v > -1, v, np.nan)),
    "asinh": np.arcsinh,
}


# ---------------------------------------------------------------------------------------------
# Samples: shared between specifications of a batch that use the same rows


@dataclass
class Sample:
    """One estimation sample: rows, weights, clusters and the fixed-effect sweeper."""

    key: tuple
    rows: np.ndarray  # integer positions into the prepared frame
    n_dropped_missing: int
    n_dropped_singletons: int
    sw: np.ndarray | None  # sqrt of weights
    demean: Demeaner
    df_absorbed: int
    df_absorbed_cluster: int  # levels counted under cluster covariance
    clusters: Clusters | None
    warnings: list[str]
    _cols: dict[str, np.ndarray] = field(default_factory=dict)
    _wqr: dict[tuple, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)
    # columns the batch's specifications on this sample will use, and their _Design (shared)
    _want: set = field(default_factory=set)
    _design: list = field(default_factory=list)

    @property
    def n(self) -> int:
        return int(self.rows.size)


def _numbers_or_fail(s: pd.Series, name: str, role: str) -> np.ndarray:
    """A non-numeric column as floats if it holds only numbers (as Python objects), else a failure."""
    what = f"column '{name}' ({role})"
    if isinstance(s.dtype, pd.CategoricalDtype):
        raise FitFailure(f"{what} is categorical, not numeric")
    if pd.api.types.is_datetime64_any_dtype(s) or pd.api.types.is_timedelta64_dtype(s):
        raise FitFailure(f"{what} holds dates or times, not numbers")
    present = s[s.notna()]
    text = present[present.map(lambda v: isinstance(v, (str, bytes)))]
    if len(text):
        raise FitFailure(f"{what} is not numeric (e.g. text {str(text.iloc[0])[:40]!r})")
    converted = pd.to_numeric(present, errors="coerce")
    odd = present[converted.isna()]
    if len(odd):
        raise FitFailure(f"{what} is not numeric (e.g. value {str(odd.iloc[0])[:40]!r} "
                         f"of type {type(odd.iloc[0]).__name__})")
    return pd.to_numeric(s, errors="coerce").to_numpy(dtype="float64", na_value=np.nan)


_CODES_KEEP_MAX = 2_000_000  # integer code columns of larger frames are recomputed, not kept


class SampleCache:
    """Builds and remembers samples and swept columns for one prepared frame."""

    def __init__(self, df: pd.DataFrame):
        self.df = df
        # A frame just read from Parquet leaves Arrow's allocator holding its decoded buffers
        # (about the frame's size again); hand them back before the fit allocates its own.
        pa = sys.modules.get("pyarrow")
        if pa is not None:
            pa.default_memory_pool().release_unused()
        self._filters: dict[tuple, np.ndarray] = {}
        self._samples: dict[tuple, Sample] = {}
        self._by_sig: dict[tuple, Sample] = {}
        self._numeric: dict[str, np.ndarray] = {}

    # raw columns ---------------------------------------------------------------------------
    def numeric(self, name: str, role: str) -> np.ndarray:
        if name in self._numeric:
            return self._numeric[name]
        s = self.df[name]
        if s.dtype == bool or str(s.dtype) == "boolean":
            v = s.astype("float64").to_numpy()
        elif pd.api.types.is_numeric_dtype(s):
            v = s.to_numpy(dtype="float64", na_value=np.nan)
        else:
            v = _numbers_or_fail(s, name, role)
        self._numeric[name] = v
        return v

    def outcome(self, name: str, transform: str) -> np.ndarray:
        key = f"{name}\0{transform}"
        if key not in self._numeric:
            v = self.numeric(name, "outcome")
            if transform == "standardize":
                ok = np.isfinite(v)
                sd = float(np.std(v[ok], ddof=1)) if ok.sum() > 1 else 0.0
                if not sd > 0:
                    raise FitFailure(f"outcome '{name}' has no variation, so it cannot be standardized")
                v = (v - np.mean(v[ok])) / sd
            else:
                with np.errstate(invalid="ignore", divide="ignore"):
                    v = TRANSFORMS[transform](v)
            self._numeric[key] = v
        return self._numeric[key]

    def filter_mask(self, filters: tuple[str, ...]) -> np.ndarray:
        if filters not in self._filters:
            mask = np.ones(len(self.df), dtype=bool)
            if filters:
                from . import expr
            for text in filters:
                try:
                    mask &= np.asarray(expr.parse(text).evaluate(self.df), dtype=bool)
                except expr.ExprError as exc:
                    raise FitFailure(str(exc)) from None
            self._filters[filters] = mask
        return self._filters[filters]

    # samples ------------------------------------------------------------------------------
    def sample(self, sp: Specification) -> Sample:
        # Specifications that read the same columns under the same filters, fixed effects,
        # weights and clusters have the same sample: found without rescanning the data.
        sig = (sp.filters, sp.outcome, sp.outcome_transform,
               frozenset((*sp.endogenous, *sp.instruments, *sp.controls)), sp.weights,
               sp.hac_order, sp.absorb, sp.cluster)
        hit = self._by_sig.get(sig)
        if hit is None:
            hit = self._by_sig[sig] = self._sample(sp)
        return hit

    def _sample(self, sp: Specification) -> Sample:
        mask = self.filter_mask(sp.filters).copy()
        n_filtered = int(mask.sum())
        if n_filtered == 0:
            for i in range(1, len(sp.filters) + 1):
                if not self.filter_mask(sp.filters[:i]).any():
                    raise FitFailure(f'filter "{sp.filters[i - 1]}" leaves no rows')
            raise FitFailure("the dataset has no rows")
        numeric_roles = [(sp.outcome, "outcome")] + [(c, "endogenous") for c in sp.endogenous] + \
            [(c, "instruments") for c in sp.instruments] + [(c, "controls") for c in sp.controls]
        if sp.weights:
            numeric_roles.append((sp.weights, "weights"))
        if sp.hac_order:
            numeric_roles.append((sp.hac_order, "hac_order"))
        ok = mask.copy()
        y = self.outcome(sp.outcome, sp.outcome_transform)
        present = [(sp.outcome, "outcome", np.isfinite(y))]
        present += [(name, role, np.isfinite(self.numeric(name, role))) for name, role in numeric_roles[1:]]
        present += [(name, role, self.df[name].notna().to_numpy())
                    for role, names in (("absorb", sp.absorb), ("cluster", sp.cluster)) for name in names]
        missing_by: dict[str, int] = {}
        for name, role, has in present:
            ok &= has
            lost = int((mask & ~has).sum())
            if lost == n_filtered:
                after = (f" after the {sp.outcome_transform} transform"
                         if role == "outcome" and sp.outcome_transform != "none" else "")
                raise FitFailure(f"column '{name}' ({role}) is missing or infinite in every row of "
                                 f"the sample{after}: no rows left")
            if lost:
                missing_by.setdefault(name, lost)
        warnings: list[str] = []
        n_missing = n_filtered - int(ok.sum())
        if n_missing:
            by = ", ".join(f"{c}: {k}" for c, k in missing_by.items())
            warnings.append(f"{n_missing} rows dropped for missing or infinite values ({by})")
        if sp.weights:
            w = self.numeric(sp.weights, "weights")
            if np.any(w[ok] < 0):
                raise FitFailure(f"weights column '{sp.weights}' has negative values")
            zero = ok & (w == 0)
            if zero.any():
                warnings.append(f"{int(zero.sum())} rows with zero weight in '{sp.weights}' dropped")
                ok &= ~zero
        rows = np.flatnonzero(ok)
        n_single = 0
        fe_codes: list[np.ndarray] = []
        if sp.absorb:
            raw = [recode([self._codes(c)[rows]])[0][0] for c in sp.absorb]
            keep = drop_singletons(raw)
            n_single = int((~keep).sum())
            if n_single:
                warnings.append(f"{n_single} rows in singleton groups of the fixed effects "
                                f"({', '.join(sp.absorb)}) dropped")
                rows = rows[keep]
                raw = [r[keep] for r in raw]  # renumbered below, as codes[rows] would be
            fe_codes = raw
            del raw
        if rows.size == 0:
            dropped = [what for what, k in (("missing values", n_missing),
                                            ("zero weights", n_filtered - n_missing - ok.sum()),
                                            ("singleton groups", n_single)) if k]
            raise FitFailure("no rows left after removing " + " and ".join(dropped))
        key = (sp.absorb, sp.weights, sp.cluster, sp.hac_order, hash(rows.tobytes()), rows.size)
        if key in self._samples:
            s = self._samples[key]
            return Sample(**{**s.__dict__, "n_dropped_missing": n_missing,
                             "n_dropped_singletons": n_single, "warnings": warnings})
        if sp.hac_order:
            order = np.argsort(self.numeric(sp.hac_order, "hac_order")[rows], kind="stable")
            rows = rows[order]
            fe_codes = [c[order] for c in fe_codes]
        codes = recode(fe_codes)
        del fe_codes
        sw = None
        wv = None
        if sp.weights:
            wv = self.numeric(sp.weights, "weights")[rows]
            sw = np.sqrt(wv)
        clusters = None
        if sp.cluster:
            # Clusters.from_columns numbers each column's distinct values in sorted order; the
            # columns here are integer codes already, which recode() renumbers alike in O(n)
            # (a cluster variable that is also absorbed shares the effect's codes: the same numbers)
            cc = [codes[sp.absorb.index(c)] if c in sp.absorb else recode([self._codes(c)[rows]])[0]
                  for c in sp.cluster]
            cmat = cc[0][0].reshape(-1, 1) if len(cc) == 1 else np.column_stack([c for c, _ in cc])
            clusters = Clusters(cmat, tuple(g for _, g in cc))
        dfa = absorbed_df(codes)
        dfa_c = dfa
        if clusters is not None and codes:
            kept = [(c, g) for c, g in codes
                    if not any(nested_in(c, clusters.codes[:, j]) for j in range(clusters.ndim))]
            dfa_c = absorbed_df(kept) if kept else 0
        s = Sample(key=key, rows=rows, n_dropped_missing=n_missing, n_dropped_singletons=n_single,
                   sw=sw, demean=Demeaner(codes, wv), df_absorbed=dfa, df_absorbed_cluster=dfa_c,
                   clusters=clusters, warnings=warnings)
        self._samples[key] = s
        return s

    def _codes(self, name: str) -> np.ndarray:
        key = f"\0codes\0{name}"
        if key not in self._numeric:
            s = self.df[name]
            vals = s.to_numpy()
            if vals.dtype.kind in "iu" and vals.size and 0 <= vals.min() and vals.max() < 4 * vals.size:
                # small non-negative integers: the same numbering as np.unique, without a sort;
                # cheap to redo, so not kept for large frames (memory)
                inv = recode([vals])[0][0]
                if vals.size > _CODES_KEEP_MAX:
                    return inv
            else:
                if vals.dtype.kind not in "biufmM":  # text, categories, nullable types: by label
                    vals = np.asarray(vals, dtype=object).astype(str)  # missing ones are dropped
                _, inv = np.unique(vals, return_inverse=True)
            self._numeric[key] = inv.astype(np.int64, copy=False).ravel()
        return self._numeric[key]

    def column(self, s: Sample, name: str, transform: str | None = None) -> np.ndarray:
        """A column on the sample's rows, fixed effects swept out, weights applied."""
        key = name if transform is None else f"{name}\0{transform}"
        if key not in s._cols:
            v = (self.outcome(name, transform) if transform is not None else self.numeric(name, "regressor"))[s.rows]
            v = s.demean(v, inplace=True)  # v is a fresh copy (fancy indexing)
            if s.sw is not None:
                v *= s.sw
            s._cols[key] = v
        return s._cols[key]

    def constant(self, s: Sample) -> np.ndarray:
        key = "\0const"
        if key not in s._cols:
            s._cols[key] = s.sw.copy() if s.sw is not None else np.ones(s.n)
        return s._cols[key]

    def plan(self, specs: list[Specification]) -> None:
        """Tell each sample which columns the coming specifications use (one _Design each).

        Optional: without it a sample's design is extended (rebuilt) whenever a specification
        needs a column it lacks. Samples that fail are reported by ``fit`` later.
        """
        for sp in specs:
            try:
                self.sample(sp)._want.update(_keys(sp))
            except FitFailure:
                pass

    def design(self, s: Sample, keys: list[tuple[str, str | None]]) -> "_Design":
        """The sample's :class:`_Design` over (at least) these columns, shared by the batch.

        ``keys`` are (column, transform) pairs, ``("\0const", None)`` for the constant. The
        design covers every column the batch's specifications on this sample asked for
        (``Sample._want``), so it is built once per sample.
        """
        if s._design and all(k in s._design[0].index for k in keys):
            return s._design[0]
        have = list(s._design[0].keys) if s._design else []
        union = list(dict.fromkeys([*have, *keys, *sorted(s._want, key=repr)]))
        cols = [self.constant(s) if name == "\0const" else self.column(s, name, tr)
                for name, tr in union]
        d = _Design(union, cols, s.clusters)
        s._design[:] = [d]
        return d


# ---------------------------------------------------------------------------------------------
# Regressions


def _collinear(mat: np.ndarray, names: list[str]) -> str | None:
    """The first column that is (numerically) a combination of earlier ones, or None."""
    norms = np.sqrt((mat * mat).sum(axis=0))
    for j, nm in enumerate(names):
        if norms[j] <= 1e-12 * max(1.0, float(norms.max(initial=0.0))):
            return nm
    scaled = mat / np.where(norms > 0, norms, 1.0)
    r = np.linalg.qr(scaled, mode="r")
    d = np.abs(np.diag(r))
    if d.size and np.all(d > 1e-9):
        return None
    for j in range(mat.shape[1]):
        if d[j] <= 1e-9:
            return names[j]
    return None


def _terms(names: list[str], b: np.ndarray, v: np.ndarray, dist, level: float) -> list[Term]:
    se = np.sqrt(np.clip(np.diag(v), 0, None))
    q = dist.ppf(0.5 + level / 2)
    out = []
    for nm, bi, si in zip(names, b, se):
        t = bi / si if si > 0 else np.nan
        p = 2 * dist.sf(abs(t)) if si > 0 else np.nan
        out.append(Term(name=nm, estimate=float(bi), se=float(si), t=float(t), p=float(p),
                        ci_low=float(bi - q * si), ci_high=float(bi + q * si)))
    return out


class _Dist:
    """Student's t with ``df`` degrees of freedom, or the standard normal (``df`` None).

    The two calls the fit makes (``ppf``, ``sf``) go straight to :mod:`scipy.special`, the same
    functions ``scipy.stats.t`` and ``scipy.stats.norm`` evaluate, without their per-call
    argument checking (which cost more than a whole regression on a shared sample).
    """

    def __init__(self, df: float | None = None):
        self.df = df

    def ppf(self, q: float) -> float:
        return float(special.ndtri(q) if self.df is None else special.stdtrit(self.df, q))

    def sf(self, x: float) -> float:
        return float(special.ndtr(-x) if self.df is None else special.stdtr(self.df, -x))


# Regressions run on a _Design: the swept columns of one sample, reduced once.
#
# * ``tri`` is the m x m triangle R of a QR decomposition A = QR of the sample's n x m matrix of
#   swept columns (computed by chunks of rows, "tall-skinny QR"). Q has orthonormal columns, so
#   for any columns S and t, ||A_t - A_S b|| = ||R_t - R_S b||: every least-squares fit, residual
#   sum of squares and cross-product of the batch is computed on m rows, with the accuracy of a
#   QR on the full rows (no squared condition number, unlike normal equations).
# * A score of any of the fit's regressions is u_i = (a_i'M) (a_i'c) for a row a_i of A, a
#   matrix M and a coefficient vector c (e.g. M selects the regressors and c = e_y - E_S b).
#   Cluster sums of the u_i only need each cluster's cross-products A_g'A_g, which the stacked
#   triangles R_g of each cluster's rows reproduce exactly: with few clusters the cluster "meat"
#   is computed on those G x m rows instead of n. Robust and HAC meats use the full rows (by
#   chunks for robust, so memory stays small).
#
# COMPRESS_ROWS = False computes cluster meats on the full rows (the tests compare both).
COMPRESS_ROWS = True
_CHUNK = 1 << 16
_DENSE_MAX = 1 << 23  # keep the n x m matrix itself when it has at most this many entries


class _Design:
    def __init__(self, keys: list[tuple[str, str | None]], cols: list[np.ndarray],
                 clusters: Clusters | None):
        self.keys = keys
        self.index = {k: j for j, k in enumerate(keys)}
        self.cols = cols
        self.m = len(cols)
        self.n = int(cols[0].shape[0])
        self.clusters = clusters
        self._compressed: tuple | None = None
        self.dense = None
        if self.n * self.m <= _DENSE_MAX:  # small: one F-ordered copy serves every product
            self.dense = np.empty((self.n, self.m), order="F")
            for j, c in enumerate(cols):
                self.dense[:, j] = c
        parts = [np.linalg.qr(self._block(a, min(a + _CHUNK, self.n)), mode="r")
                 for a in range(0, self.n, _CHUNK)]
        self.tri = parts[0] if len(parts) == 1 else np.linalg.qr(np.vstack(parts), mode="r")

    def _block(self, a: int, b: int) -> np.ndarray:
        if self.dense is not None:
            return self.dense[a:b]
        out = np.empty((b - a, self.m))
        for j, c in enumerate(self.cols):
            out[:, j] = c[a:b]
        return out

    def times(self, C: np.ndarray) -> np.ndarray:
        """A @ C on the full rows (n x q, columns contiguous)."""
        if self.dense is not None:
            return (C.T @ self.dense.T).T
        out = np.empty((self.n, C.shape[1]), order="F")
        for j in range(C.shape[1]):
            out[:, j] = self._combo(C[:, j])
        return out

    def _combo(self, v: np.ndarray) -> np.ndarray:
        """A @ v on the full rows, built column by column (memory: two n-vectors)."""
        out = np.zeros(self.n)
        tmp = np.empty(self.n)
        for j in np.flatnonzero(v):
            np.multiply(self.cols[j], v[j], out=tmp)
            out += tmp
        return out

    def sel(self, keys: list) -> list[int]:
        return [self.index[k] for k in keys]

    def unit(self, idx: list[int]) -> np.ndarray:
        """Selection matrix E (m x len(idx)): A @ E are those columns."""
        e = np.zeros((self.m, len(idx)))
        e[idx, np.arange(len(idx))] = 1.0
        return e

    # ---- meats -------------------------------------------------------------------------------
    def _cluster_rows(self):
        """(rows, [codes per dimension], [G per dimension], cell codes, G cells) or None."""
        if self._compressed is None:
            cl = self.clusters
            cells = cl.codes[:, 0] if cl.ndim == 1 else cl.intersection()
            ncell = int(cells.max()) + 1
            if not COMPRESS_ROWS or ncell * self.m * 2 > self.n:
                self._compressed = (False,)
                return None
            order = np.argsort(cells, kind="stable")
            bounds = np.concatenate([[0], np.cumsum(np.bincount(cells, minlength=ncell))])
            blocks, ids = [], []
            for g in range(ncell):
                take = order[bounds[g]:bounds[g + 1]]
                blk = np.empty((take.size, self.m))
                for j, c in enumerate(self.cols):
                    blk[:, j] = c[take]
                r = np.linalg.qr(blk, mode="r")
                blocks.append(r)
                ids.append(np.full(r.shape[0], g))
            rows = np.vstack(blocks)
            cell_of_row = np.concatenate(ids)
            first = order[bounds[:-1]]  # one row of each cell: its code in every dimension
            dims = [cl.codes[first, j][cell_of_row] for j in range(cl.ndim)]
            self._compressed = (True, rows, dims, cell_of_row, ncell)
        return self._compressed[1:] if self._compressed[0] else None

    def meat(self, M: np.ndarray, c: np.ndarray, kind: str, k: int, hac_lags: int | None) -> np.ndarray:
        """The corrected meat (see :func:`specflow.kernels.meat`) of the scores (A M) * (A c)."""
        n = self.n
        if kind == "robust":
            s = np.zeros((M.shape[1], M.shape[1]))
            for a in range(0, n, _CHUNK):
                blk = self._block(a, min(a + _CHUNK, n))
                u = (blk @ M) * (blk @ c)[:, None]
                s += u.T @ u
            return (n / (n - k)) * s
        if kind == "hac":
            blk = self._block(0, n)
            return meat((blk @ M) * (blk @ c)[:, None], "hac", None, k=k, hac_lags=hac_lags)
        if kind != "cluster" or self.clusters is None:
            raise ValueError(f"no meat for covariance {kind!r} without clusters")
        cl = self.clusters
        comp = self._cluster_rows()
        if comp is not None:
            rows, dims, cells, ncell = comp
            u = (rows @ M) * (rows @ c)[:, None]
            codes = dims if cl.ndim == 1 else [dims[0], dims[1], cells]
            sums = [_group_sums(u, cd, g) for cd, g in zip(codes, [*cl.counts[:cl.ndim], ncell])]
            counts = [*cl.counts[:cl.ndim], ncell]
        else:  # many clusters: sums over the full rows, one score column at a time
            codes = [cl.codes[:, j] for j in range(cl.ndim)]
            counts = list(cl.counts)
            if cl.ndim == 2:
                inter = cl.intersection()
                codes.append(inter)
                counts.append(int(inter.max()) + 1)
            sums = [np.empty((g, M.shape[1])) for g in counts]
            e = self._combo(c)
            for j in range(M.shape[1]):
                u = self._combo(M[:, j])
                u *= e
                for sm, cd, g in zip(sums, codes, counts):
                    sm[:, j] = np.bincount(cd, weights=u, minlength=g)
                del u
        factor = lambda g: (g / (g - 1.0)) * ((n - 1.0) / (n - k))  # noqa: E731
        parts = [factor(g) * (sm.T @ sm) for sm, g in zip(sums, counts)]
        return parts[0] if cl.ndim == 1 else parts[0] + parts[1] - parts[2]


def _group_sums(u: np.ndarray, codes: np.ndarray, g: int) -> np.ndarray:
    """Sums of the rows of ``u`` (r, q) within groups 0..g-1: (g, q)."""
    return np.stack([np.bincount(codes, weights=u[:, j], minlength=g) for j in range(u.shape[1])],
                    axis=1)


@dataclass
class _Cov:
    kind: str
    clusters: Clusters | None
    k_extra: int  # absorbed levels counted
    hac_lags: int | None
    warnings: list[str]

    def sandwich(self, bread_inv: np.ndarray, D: _Design, M: np.ndarray, c: np.ndarray,
                 k: int) -> np.ndarray:
        m = D.meat(M, c, self.kind, k, self.hac_lags)
        v = bread_inv @ m @ bread_inv
        return self.clip(v)

    def clip(self, v: np.ndarray) -> np.ndarray:
        """Two-way cluster covariance: clip negative eigenvalues, noting a warning once."""
        if self.clusters is not None and self.clusters.ndim == 2:
            v, clipped = psd_clip(v)
            if clipped and CLIP_WARNING not in self.warnings:
                self.warnings.append(CLIP_WARNING)
        return v


CLIP_WARNING = ("two-way cluster covariance was not positive semi-definite; negative "
                "eigenvalues set to zero")


def _ols(D: _Design, yi: int, xi: list[int], cov: _Cov):
    """OLS of column ``yi`` on columns ``xi``: (b, V, e'e, c) with residual e = A c."""
    n, kx = D.n, len(xi)
    k = kx + cov.k_extra
    TX, Ty = D.tri[:, xi], D.tri[:, yi]
    b = lstsq(TX, Ty)
    r = Ty - TX @ b
    ee = float(r @ r)
    E = D.unit(xi)
    c = -(E @ b)
    c[yi] += 1.0
    xtx_inv = np.linalg.inv(TX.T @ TX)
    if cov.kind == "unadjusted":
        v = ee / (n - k) * xtx_inv
    else:
        v = cov.sandwich(xtx_inv, D, E, c, k)
    return b, v, ee, c


def _kclass(D: _Design, yi: int, ri: list[int], qi: list[int], kappa: float, cov: _Cov):
    """k-class estimate with regressors ``ri``, instruments ``qi`` (kappa = 1: 2SLS)."""
    n, kr = D.n, len(ri)
    k = kr + cov.k_extra
    TR, TQ, Ty = D.tri[:, ri], D.tri[:, qi], D.tri[:, yi]
    ER, EQ = D.unit(ri), D.unit(qi)
    Pi = lstsq(TQ, TR)  # Rhat = Q Pi
    M = EQ @ Pi if kappa == 1 else (1 - kappa) * ER + kappa * (EQ @ Pi)  # Rt = A M
    TRt = D.tri @ M
    A = TRt.T @ TR
    A = (A + A.T) / 2
    b = np.linalg.solve(A, TRt.T @ Ty)
    c = -(ER @ b)
    c[yi] += 1.0
    r = D.tri @ c
    ee = float(r @ r)
    Ainv = np.linalg.inv(A)
    if cov.kind == "unadjusted":
        v = ee / (n - k) * Ainv
    else:
        v = cov.sandwich(Ainv, D, M, c, k)
    return b, v, ee, c


def _resid_gram(D: _Design, yi: list[int], wi: list[int]) -> np.ndarray:
    """(Y - W lstsq(W, Y))' (Y - W lstsq(W, Y)) for columns Y = ``yi``, W = ``wi``."""
    TY = D.tri[:, yi]
    if wi:
        TW = D.tri[:, wi]
        TY = TY - TW @ lstsq(TW, TY)
    return TY.T @ TY


def _liml_kappa(D: _Design, yi: int, xei: list[int], wi: list[int], qi: list[int]) -> float:
    from scipy.linalg import eigh

    A = _resid_gram(D, [yi, *xei], wi)
    B = _resid_gram(D, [yi, *xei], qi)
    vals = eigh(A, B, eigvals_only=True)
    return float(vals.min())


def _gmm(D: _Design, yi: int, ri: list[int], qi: list[int], cov: _Cov):
    n, kr = D.n, len(ri)
    k = kr + cov.k_extra
    _, _, ee1, c1 = _kclass(D, yi, ri, qi, 1.0, _Cov("unadjusted", None, cov.k_extra, None, []))
    TR, TQ, Ty = D.tri[:, ri], D.tri[:, qi], D.tri[:, yi]
    EQ, ER = D.unit(qi), D.unit(ri)
    QQ = TQ.T @ TQ
    if cov.kind == "unadjusted":
        S = ee1 / n * QQ
    else:
        S = D.meat(EQ, c1, cov.kind, k, cov.hac_lags)
    Wm = np.linalg.inv(S)
    RQ = TR.T @ TQ
    A = RQ @ Wm @ RQ.T
    A = (A + A.T) / 2
    b = np.linalg.solve(A, RQ @ Wm @ (TQ.T @ Ty))
    c = -(ER @ b)
    c[yi] += 1.0
    r = D.tri @ c
    ee = float(r @ r)
    Ainv = np.linalg.inv(A)
    if cov.kind == "unadjusted":
        S2 = ee / (n - k) * QQ
    else:
        S2 = D.meat(EQ, c, cov.kind, k, cov.hac_lags)
    G = RQ @ Wm
    v = Ainv @ (G @ S2 @ G.T) @ Ainv
    if cov.clusters is not None and cov.clusters.ndim == 2:
        v = cov.clip(v)
    return b, v, ee, c


# ---------------------------------------------------------------------------------------------


def _fail(sp: Specification, reason: str, t0: float, warnings: list[str] | None = None) -> FitResult:
    r = _base_result(sp)
    r.status = "failed"
    r.reason = reason
    r.warnings = list(warnings or [])
    r.timing = {"total": time.perf_counter() - t0}
    return r


def _base_result(sp: Specification) -> FitResult:
    return FitResult(
        spec_id=sp.id, labels=dict(sp.labels), extra_name=sp.extra_name, dataset=sp.dataset,
        outcome=sp.outcome, endogenous=list(sp.endogenous), instruments=list(sp.instruments),
        controls=list(sp.controls), absorb=list(sp.absorb), cluster=list(sp.cluster),
        weights=sp.weights, estimator=sp.estimator, covariance=sp.covariance,
        specflow_version=__version__,
    )


def fit(sp: Specification, df: pd.DataFrame, cache: SampleCache | None = None,
        diagnose: bool = True) -> FitResult:
    """Fit one specification on its prepared dataset. Numerical trouble -> a failed result."""
    t0 = time.perf_counter()
    cache = cache or SampleCache(df)
    try:
        return _fit(sp, cache, t0, diagnose)
    except FitFailure as exc:
        return _fail(sp, str(exc), t0)
    except np.linalg.LinAlgError as exc:
        return _fail(sp, f"linear algebra failure: {exc}", t0)


def fit_many(specs: list[Specification], df: pd.DataFrame, diagnose: bool = True) -> list[FitResult]:
    """Fit specifications sharing one prepared dataset; samples and swept columns are shared."""
    cache = SampleCache(df)
    cache.plan(specs)
    return [fit(sp, df, cache, diagnose) for sp in specs]


def _keys(sp: Specification) -> list[tuple[str, str | None]]:
    """The (column, transform) pairs of a specification's design, in the fit's order."""
    const = [("\0const", None)] if sp.constant and not sp.absorb else []
    return [(sp.outcome, sp.outcome_transform), *((c, None) for c in sp.endogenous),
            *((c, None) for c in sp.instruments), *const, *((c, None) for c in sp.controls)]


def _fit(sp: Specification, cache: SampleCache, t0: float, diagnose: bool) -> FitResult:
    s = cache.sample(sp)
    warnings = list(s.warnings)
    n = s.n
    p, L = len(sp.endogenous), len(sp.instruments)
    if L < p:
        raise FitFailure(f"order condition fails: {L} instrument(s) for {p} endogenous regressor(s)")
    if s.clusters is not None:
        for name, g in zip(sp.cluster, s.clusters.counts):
            if g < 2:
                raise FitFailure(f"cluster variable '{name}' has only {g} level in the sample")
            if g < 20:
                warnings.append(f"only {g} clusters in '{name}'; cluster-robust inference may be unreliable with few clusters (common practice: 30 or more)")
    if sp.covariance == "cluster" and s.clusters is None:
        raise FitFailure("covariance 'cluster' needs a cluster variable")

    use_const = sp.constant and not sp.absorb
    ctrl_names = (["const"] if use_const else []) + list(sp.controls)
    D = cache.design(s, _keys(sp))
    const_key = [("\0const", None)] if use_const else []
    yi = D.index[(sp.outcome, sp.outcome_transform)]
    xei = D.sel([(c, None) for c in sp.endogenous])
    zi = D.sel([(c, None) for c in sp.instruments])
    wi = D.sel(const_key + [(c, None) for c in sp.controls])
    y = D.cols[yi]

    k_extra = s.df_absorbed_cluster if sp.covariance == "cluster" else s.df_absorbed
    ri = xei + wi
    qi = zi + wi
    k_iv = len(ri) + k_extra
    if n - k_iv <= 0 or n - len(qi) - k_extra <= 0:
        raise FitFailure(f"too few observations ({n}) for {len(qi) + k_extra} parameters")
    if float(np.ptp(y)) == 0.0 if y.size else True:
        raise FitFailure(f"outcome '{sp.outcome}' has no variation in the sample")
    bad = _collinear(D.tri[:, wi], ctrl_names) if wi else None
    if bad:
        raise FitFailure(f"control '{bad}' is collinear with the other controls or the fixed effects")
    # controls first (already of full rank), so the column named is the endogenous one
    bad = _collinear(D.tri[:, wi + xei], ctrl_names + list(sp.endogenous))
    if bad:
        raise FitFailure(f"endogenous regressor '{bad}' has no variation independent of the controls")
    bad = _collinear(D.tri[:, wi + zi], ctrl_names + list(sp.instruments))
    if bad:
        raise FitFailure(f"instrument '{bad}' is collinear with the other instruments or the controls")

    cov = _Cov(sp.covariance, s.clusters, k_extra, sp.hac_lags, warnings)
    names = list(sp.endogenous) + ctrl_names
    res = _base_result(sp)
    res.nobs = n
    res.n_dropped_missing = s.n_dropped_missing
    res.n_dropped_singletons = s.n_dropped_singletons
    res.n_clusters = list(s.clusters.counts) if s.clusters is not None else []
    res.df_absorbed = k_extra

    small = _Dist((min(s.clusters.counts) - 1) if (s.clusters is not None and sp.covariance == "cluster") else n - k_iv)
    normal = _Dist()

    def reg(role, dep, b, v, ee, names_, dist, est, kappa=None, yv=None):
        # R-squared: centred with a constant, within (swept) with fixed effects, else uncentred
        tv = D.tri[:, yv]
        if use_const:
            tc = D.tri[:, D.index[("\0const", None)]]
            r = tv - tc * ((tc @ tv) / (tc @ tc))
            tss = float(r @ r)
        else:
            tss = float(tv @ tv)
        r2 = 1 - ee / tss if tss > 0 else None
        return Regression(role=role, dependent=dep, estimator=est, covariance=sp.covariance,
                          terms=_terms(names_, b, v, dist, sp.level), nobs=n,
                          df_resid=int(n - len(names_) - k_extra), r2=r2, kappa=kappa)

    timing: dict[str, float] = {}
    t1 = time.perf_counter()
    # OLS
    b, v, ee, _ = _ols(D, yi, ri, cov)
    small_ols = small if sp.covariance == "cluster" else _Dist(n - k_iv)
    res.ols = reg("ols", sp.outcome, b, v, ee, names, small_ols, "ols", yv=yi)
    # first stages and reduced form
    qnames = list(sp.instruments) + ctrl_names
    small_q = small if sp.covariance == "cluster" else _Dist(n - len(qi) - k_extra)
    for j, x in enumerate(sp.endogenous):
        bj, vj, eej, _ = _ols(D, xei[j], qi, cov)
        res.first_stages.append(reg("first_stage", x, bj, vj, eej, qnames, small_q, "ols", yv=xei[j]))
    br, vr, eer, _ = _ols(D, yi, qi, cov)
    res.reduced_form = reg("reduced_form", sp.outcome, br, vr, eer, qnames, small_q, "ols", yv=yi)
    # IV
    kappa = None
    if sp.estimator == "2sls":
        b, v, ee, _ = _kclass(D, yi, ri, qi, 1.0, cov)
    elif sp.estimator in ("liml", "fuller"):
        kappa = _liml_kappa(D, yi, xei, wi, qi)
        if sp.estimator == "fuller":
            kappa = kappa - sp.fuller_alpha / (n - len(qi) - k_extra)
        b, v, ee, _ = _kclass(D, yi, ri, qi, kappa, cov)
    elif sp.estimator == "gmm":
        b, v, ee, _ = _gmm(D, yi, ri, qi, cov)
    else:  # pragma: no cover - the spec model allows only the four
        raise FitFailure(f"unknown estimator {sp.estimator!r}")
    if not np.all(np.isfinite(b)) or not np.all(np.isfinite(np.diag(v))):
        raise FitFailure("the IV estimate is not finite (near-singular design)")
    res.iv = reg("iv", sp.outcome, b, v, ee, names, normal, sp.estimator, kappa=kappa, yv=yi)
    timing["regressions"] = time.perf_counter() - t1

    head = res.iv.terms[0]
    q = normal.ppf(0.5 + sp.level / 2)
    res.confidence_sets.append(ConfidenceSet(
        method="wald", term=sp.endogenous[0], level=sp.level, kind="interval",
        pieces=[(head.estimate - q * head.se, head.estimate + q * head.se)], covariance=sp.covariance,
        note="estimate +/- normal critical value x SE; not robust to weak instruments"))

    if diagnose:
        t2 = time.perf_counter()
        diags, sets = _diagnose(sp, cache, s, D, yi, xei, zi, wi, b[:p], k_extra)
        res.diagnostics.update(diags)
        res.confidence_sets.extend(sets)
        timing["diagnostics"] = time.perf_counter() - t2
    res.warnings = warnings
    timing["total"] = time.perf_counter() - t0
    res.timing = timing
    return res


def _partialled(D: _Design, idx: list[int], wi: list[int]) -> np.ndarray:
    """Columns ``idx`` (full rows) less their projection on columns ``wi`` (n x len(idx)).

    The projection coefficients come from the design's triangle; the full rows are then
    formed column by column, so memory stays at the output's size.
    """
    C = D.unit(idx)
    if wi:
        C -= D.unit(wi) @ lstsq(D.tri[:, wi], D.tri[:, idx])
    return D.times(C)


def _binary(v: np.ndarray) -> bool:
    return bool(np.all((v == 0.0) | (v == 1.0)))


def _diagnose(sp, cache, s, D, yi, xei, zi, wi, beta, k_extra):
    from .diagnostics import Design, diagnose

    raw = {}
    if len(sp.endogenous) == 1 and len(sp.instruments) == 1:
        d = cache.numeric(sp.endogenous[0], "endogenous")[s.rows]
        z = cache.numeric(sp.instruments[0], "instruments")[s.rows]
        if _binary(d) and _binary(z):
            raw = dict(
                raw_d=d, raw_z=z,
                raw_controls=np.column_stack([cache.numeric(c, "controls")[s.rows] for c in sp.controls]) if sp.controls else None,
                control_names=tuple(sp.controls),
                raw_weights=(s.sw ** 2) if s.sw is not None else None,
            )
    full = _partialled(D, [yi, *xei, *zi], wi)
    p = len(xei)
    design = Design(
        y=full[:, 0], X=full[:, 1:1 + p], Z=full[:, 1 + p:], k_exog=len(wi) + k_extra,
        covariance=sp.covariance,
        clusters=s.clusters, endog_names=tuple(sp.endogenous), instr_names=tuple(sp.instruments),
        beta=np.asarray(beta, dtype=float), estimator=sp.estimator, hac_lags=sp.hac_lags,
        level=sp.level, **raw,
    )
    return diagnose(design)


__all__ = ["fit", "fit_many", "SampleCache", "Diagnostic"]
