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

import time
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats

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

    @property
    def n(self) -> int:
        return int(self.rows.size)


class SampleCache:
    """Builds and remembers samples and swept columns for one prepared frame."""

    def __init__(self, df: pd.DataFrame):
        self.df = df
        self._filters: dict[tuple, np.ndarray] = {}
        self._samples: dict[tuple, Sample] = {}
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
            bad = s[pd.to_numeric(s, errors="coerce").isna() & s.notna()]
            example = repr(bad.iloc[0]) if len(bad) else "?"
            raise FitFailure(f"column '{name}' ({role}) is not numeric (e.g. value {example})")
        self._numeric[name] = v
        return v

    def outcome(self, name: str, transform: str) -> np.ndarray:
        key = f"{name}\0{transform}"
        if key not in self._numeric:
            v = self.numeric(name, "outcome")
            if transform == "standardize":
                ok = np.isfinite(v)
                v = (v - np.nanmean(v[ok])) / np.nanstd(v[ok], ddof=1)
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
        mask = self.filter_mask(sp.filters).copy()
        n_filtered = int(mask.sum())
        if n_filtered == 0:
            raise FitFailure("the sample filters leave no rows")
        numeric_roles = [(sp.outcome, "outcome")] + [(c, "endogenous") for c in sp.endogenous] + \
            [(c, "instruments") for c in sp.instruments] + [(c, "controls") for c in sp.controls]
        if sp.weights:
            numeric_roles.append((sp.weights, "weights"))
        if sp.hac_order:
            numeric_roles.append((sp.hac_order, "hac_order"))
        ok = mask.copy()
        y = self.outcome(sp.outcome, sp.outcome_transform)
        ok &= np.isfinite(y)
        for name, role in numeric_roles[1:]:
            ok &= np.isfinite(self.numeric(name, role))
        for name in (*sp.absorb, *sp.cluster):
            ok &= self.df[name].notna().to_numpy()
        warnings: list[str] = []
        if sp.weights:
            w = self.numeric(sp.weights, "weights")
            if np.any(w[ok] < 0):
                raise FitFailure(f"weights column '{sp.weights}' has negative values")
            zero = ok & (w == 0)
            if zero.any():
                warnings.append(f"{int(zero.sum())} rows with zero weight dropped")
                ok &= ~zero
        n_missing = n_filtered - int(ok.sum())
        if n_missing:
            warnings.append(f"{n_missing} rows dropped for missing or infinite values")
        rows = np.flatnonzero(ok)
        n_single = 0
        fe_codes: list[np.ndarray] = []
        if sp.absorb:
            raw = [recode([self._codes(c)[rows]])[0][0] for c in sp.absorb]
            keep = drop_singletons(raw)
            n_single = int((~keep).sum())
            if n_single:
                warnings.append(f"{n_single} singleton fixed-effect rows dropped")
                rows = rows[keep]
            fe_codes = [self._codes(c)[rows] for c in sp.absorb]
        if rows.size == 0:
            raise FitFailure("no rows left after removing missing values" +
                             (" and singleton groups" if n_single else ""))
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
        sw = None
        wv = None
        if sp.weights:
            wv = self.numeric(sp.weights, "weights")[rows]
            sw = np.sqrt(wv)
        clusters = None
        if sp.cluster:
            clusters = Clusters.from_columns([self._codes(c)[rows] for c in sp.cluster])
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
            _, inv = np.unique(vals.astype(str) if s.dtype == object else vals, return_inverse=True)
            self._numeric[key] = inv.astype(np.int64).ravel()
        return self._numeric[key]

    def column(self, s: Sample, name: str, transform: str | None = None) -> np.ndarray:
        """A column on the sample's rows, fixed effects swept out, weights applied."""
        key = name if transform is None else f"{name}\0{transform}"
        if key not in s._cols:
            v = (self.outcome(name, transform) if transform is not None else self.numeric(name, "regressor"))[s.rows]
            v = s.demean(v)
            if s.sw is not None:
                v = v * s.sw
            s._cols[key] = v
        return s._cols[key]

    def constant(self, s: Sample) -> np.ndarray:
        key = "\0const"
        if key not in s._cols:
            s._cols[key] = s.sw.copy() if s.sw is not None else np.ones(s.n)
        return s._cols[key]


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


@dataclass
class _Cov:
    kind: str
    clusters: Clusters | None
    k_extra: int  # absorbed levels counted
    hac_lags: int | None
    warnings: list[str]

    def sandwich(self, bread_inv: np.ndarray, scores: np.ndarray, k: int) -> np.ndarray:
        m = meat(scores, self.kind, self.clusters, k=k, hac_lags=self.hac_lags)
        v = bread_inv @ m @ bread_inv
        if self.clusters is not None and self.clusters.ndim == 2:
            v, clipped = psd_clip(v)
            if clipped and "two-way cluster covariance was not positive semi-definite; negative eigenvalues set to zero" not in self.warnings:
                self.warnings.append("two-way cluster covariance was not positive semi-definite; negative eigenvalues set to zero")
        return v


def _ols(y: np.ndarray, X: np.ndarray, cov: _Cov) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    n, kx = X.shape
    k = kx + cov.k_extra
    b = lstsq(X, y)
    e = y - X @ b
    xtx_inv = np.linalg.inv(X.T @ X)
    if cov.kind == "unadjusted":
        v = (e @ e) / (n - k) * xtx_inv
    else:
        v = cov.sandwich(xtx_inv, X * e[:, None], k)
    return b, v, e


def _kclass(y, R, Q, kappa: float, cov: _Cov):
    """k-class estimate with regressors R, instruments Q (kappa = 1: 2SLS)."""
    n, kr = R.shape
    k = kr + cov.k_extra
    Rhat = Q @ lstsq(Q, R)
    Rt = (1 - kappa) * R + kappa * Rhat if kappa != 1 else Rhat
    A = Rt.T @ R
    A = (A + A.T) / 2
    b = np.linalg.solve(A, Rt.T @ y)
    e = y - R @ b
    Ainv = np.linalg.inv(A)
    if cov.kind == "unadjusted":
        v = (e @ e) / (n - k) * Ainv
    else:
        v = cov.sandwich(Ainv, Rt * e[:, None], k)
    return b, v, e


def _liml_kappa(y, Xe, W, Q) -> float:
    from scipy.linalg import eigh

    Y = np.column_stack([y, Xe])
    Yw = Y - W @ lstsq(W, Y) if W.shape[1] else Y
    Yq = Y - Q @ lstsq(Q, Y)
    A = Yw.T @ Yw
    B = Yq.T @ Yq
    vals = eigh(A, B, eigvals_only=True)
    return float(vals.min())


def _gmm(y, R, Q, cov: _Cov):
    n, kr = R.shape
    k = kr + cov.k_extra
    b1, _, e1 = _kclass(y, R, Q, 1.0, _Cov("unadjusted", None, cov.k_extra, None, []))
    if cov.kind == "unadjusted":
        S = (e1 @ e1) / n * (Q.T @ Q)
    else:
        S = meat(Q * e1[:, None], cov.kind, cov.clusters, k=k, hac_lags=cov.hac_lags)
    Wm = np.linalg.inv(S)
    RQ = R.T @ Q
    A = RQ @ Wm @ RQ.T
    A = (A + A.T) / 2
    b = np.linalg.solve(A, RQ @ Wm @ (Q.T @ y))
    e = y - R @ b
    Ainv = np.linalg.inv(A)
    if cov.kind == "unadjusted":
        S2 = (e @ e) / (n - k) * (Q.T @ Q)
    else:
        S2 = meat(Q * e[:, None], cov.kind, cov.clusters, k=k, hac_lags=cov.hac_lags)
    G = RQ @ Wm
    v = Ainv @ (G @ S2 @ G.T) @ Ainv
    if cov.clusters is not None and cov.clusters.ndim == 2:
        v, _ = psd_clip(v)
    return b, v, e


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
    return [fit(sp, df, cache, diagnose) for sp in specs]


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
    ctrl_cols = ([cache.constant(s)] if use_const else []) + [cache.column(s, c) for c in sp.controls]
    W = np.column_stack(ctrl_cols) if ctrl_cols else np.zeros((n, 0))
    y = cache.column(s, sp.outcome, sp.outcome_transform)
    Xe = np.column_stack([cache.column(s, c) for c in sp.endogenous])
    Z = np.column_stack([cache.column(s, c) for c in sp.instruments])

    k_extra = s.df_absorbed_cluster if sp.covariance == "cluster" else s.df_absorbed
    R = np.column_stack([Xe, W])
    Q = np.column_stack([Z, W])
    k_iv = R.shape[1] + k_extra
    if n - k_iv <= 0 or n - Q.shape[1] - k_extra <= 0:
        raise FitFailure(f"too few observations ({n}) for {Q.shape[1] + k_extra} parameters")
    if float(np.ptp(y)) == 0.0 if y.size else True:
        raise FitFailure(f"outcome '{sp.outcome}' has no variation in the sample")
    bad = _collinear(W, ctrl_names) if W.shape[1] else None
    if bad:
        raise FitFailure(f"control '{bad}' is collinear with the other controls or the fixed effects")
    bad = _collinear(R, list(sp.endogenous) + ctrl_names)
    if bad:
        raise FitFailure(f"endogenous regressor '{bad}' has no variation independent of the controls")
    bad = _collinear(Q, list(sp.instruments) + ctrl_names)
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

    small = stats.t(df=(min(s.clusters.counts) - 1) if (s.clusters is not None and sp.covariance == "cluster") else n - k_iv)
    normal = stats.norm()

    def reg(role, dep, b, v, e, names_, dist, est, kappa=None, yv=None):
        # R-squared: centred with a constant, within (swept) with fixed effects, else uncentred
        if use_const:
            c = cache.constant(s)
            tss = float(((yv - c * (c @ yv) / (c @ c)) ** 2).sum())
        else:
            tss = float(yv @ yv)
        r2 = 1 - float(e @ e) / tss if tss > 0 else None
        return Regression(role=role, dependent=dep, estimator=est, covariance=sp.covariance,
                          terms=_terms(names_, b, v, dist, sp.level), nobs=n,
                          df_resid=int(n - len(names_) - k_extra), r2=r2, kappa=kappa)

    timing: dict[str, float] = {}
    t1 = time.perf_counter()
    # OLS
    b, v, e = _ols(y, R, cov)
    small_ols = small if sp.covariance == "cluster" else stats.t(df=n - k_iv)
    res.ols = reg("ols", sp.outcome, b, v, e, names, small_ols, "ols", yv=y)
    # first stages and reduced form
    qnames = list(sp.instruments) + ctrl_names
    small_q = small if sp.covariance == "cluster" else stats.t(df=n - Q.shape[1] - k_extra)
    for j, x in enumerate(sp.endogenous):
        bj, vj, ej = _ols(Xe[:, j], Q, cov)
        res.first_stages.append(reg("first_stage", x, bj, vj, ej, qnames, small_q, "ols", yv=Xe[:, j]))
    br, vr, er = _ols(y, Q, cov)
    res.reduced_form = reg("reduced_form", sp.outcome, br, vr, er, qnames, small_q, "ols", yv=y)
    # IV
    kappa = None
    if sp.estimator == "2sls":
        b, v, e = _kclass(y, R, Q, 1.0, cov)
    elif sp.estimator in ("liml", "fuller"):
        kappa = _liml_kappa(y, Xe, W, Q)
        if sp.estimator == "fuller":
            kappa = kappa - sp.fuller_alpha / (n - Q.shape[1] - k_extra)
        b, v, e = _kclass(y, R, Q, kappa, cov)
    elif sp.estimator == "gmm":
        b, v, e = _gmm(y, R, Q, cov)
    else:  # pragma: no cover - the spec model allows only the four
        raise FitFailure(f"unknown estimator {sp.estimator!r}")
    if not np.all(np.isfinite(b)) or not np.all(np.isfinite(np.diag(v))):
        raise FitFailure("the IV estimate is not finite (near-singular design)")
    res.iv = reg("iv", sp.outcome, b, v, e, names, normal, sp.estimator, kappa=kappa, yv=y)
    timing["regressions"] = time.perf_counter() - t1

    head = res.iv.terms[0]
    q = normal.ppf(0.5 + sp.level / 2)
    res.confidence_sets.append(ConfidenceSet(
        method="wald", term=sp.endogenous[0], level=sp.level, kind="interval",
        pieces=[(head.estimate - q * head.se, head.estimate + q * head.se)], covariance=sp.covariance,
        note="estimate +/- normal critical value x SE; not robust to weak instruments"))

    if diagnose:
        t2 = time.perf_counter()
        diags, sets = _diagnose(sp, cache, s, y, Xe, Z, W, b[:p], k_extra, ctrl_names)
        res.diagnostics.update(diags)
        res.confidence_sets.extend(sets)
        timing["diagnostics"] = time.perf_counter() - t2
    res.warnings = warnings
    timing["total"] = time.perf_counter() - t0
    res.timing = timing
    return res


def _diagnose(sp, cache, s, y, Xe, Z, W, beta, k_extra, ctrl_names):
    from .diagnostics import Design, diagnose

    if W.shape[1]:
        qw, _ = np.linalg.qr(W)
        part = lambda a: a - qw @ (qw.T @ a)  # noqa: E731
    else:
        part = lambda a: a  # noqa: E731
    raw = {}
    if len(sp.endogenous) == 1 and len(sp.instruments) == 1:
        d = cache.numeric(sp.endogenous[0], "endogenous")[s.rows]
        z = cache.numeric(sp.instruments[0], "instruments")[s.rows]
        if set(np.unique(d)) <= {0.0, 1.0} and set(np.unique(z)) <= {0.0, 1.0}:
            raw = dict(
                raw_d=d, raw_z=z,
                raw_controls=np.column_stack([cache.numeric(c, "controls")[s.rows] for c in sp.controls]) if sp.controls else None,
                control_names=tuple(sp.controls),
                raw_weights=(s.sw ** 2) if s.sw is not None else None,
            )
    design = Design(
        y=part(y), X=part(Xe), Z=part(Z), k_exog=W.shape[1] + k_extra, covariance=sp.covariance,
        clusters=s.clusters, endog_names=tuple(sp.endogenous), instr_names=tuple(sp.instruments),
        beta=np.asarray(beta, dtype=float), estimator=sp.estimator, hac_lags=sp.hac_lags,
        level=sp.level, **raw,
    )
    return diagnose(design)


__all__ = ["fit", "fit_many", "SampleCache", "Diagnostic"]
