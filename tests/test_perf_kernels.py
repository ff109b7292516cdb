"""The fast paths of the fit and of fixed-effect sweeping equal the plain computations.

Correctness only (no timing). References, named beside each check:
* fixed effects: the residual of an explicit least-squares fit on the effects' dummy variables
  (``numpy.linalg.lstsq``), and the rank of the dummy matrix (``numpy.linalg.matrix_rank``) for
  the absorbed degrees of freedom; alternating projections with a tight tolerance;
* the fit: a plain implementation written here on the full n rows -- ``numpy.linalg.lstsq`` on
  the full design and the foundation's covariance kernel ``specflow.kernels.meat`` on full score
  arrays -- of specflow's documented conventions (fit.py docstring); and the fit with row
  compression switched off, in chunks, and without the dense matrix.
Invented data only (these are identities, not estimates of anything).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.linalg import eigh

from specflow import fe
from specflow import fit as F
from specflow.grid import Specification
from specflow.kernels import Clusters, meat, psd_clip

TOL = 1e-10


def _rel(a, b) -> float:
    a, b = np.asarray(a, float), np.asarray(b, float)
    return float(np.max(np.abs(a - b) / np.maximum(np.maximum(np.abs(a), np.abs(b)), 1e-12)))


# ---------------------------------------------------------------------------------------------
# fixed effects


def _dummy_resid(x, codes, w=None):
    D = np.column_stack([np.eye(g)[c] for c, g in codes])
    sw = np.ones_like(x) if w is None else np.sqrt(w)
    b = np.linalg.lstsq(D * sw[:, None], x * sw, rcond=None)[0]
    return x - D @ b, D


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("levels", [(150,), (150, 12), (150, 12, 5), (40, 30)])
def test_sweeps_equal_dummy_regression(levels, weighted):
    rng = np.random.default_rng(len(levels) * 10 + weighted)
    n = 1200
    codes = fe.recode([rng.integers(0, g, n) for g in levels])
    w = rng.uniform(0.5, 2.0, n) if weighted else None
    x = rng.normal(size=n) + codes[0][0] * 0.01
    ref, _ = _dummy_resid(x, codes, w)  # reference: explicit dummy-variable least squares
    for method in ("auto", "projections"):
        dm = fe.Demeaner(codes, w, tol=1e-14, method=method)
        assert np.max(np.abs(dm(x) - ref)) <= TOL * np.max(np.abs(x))
    auto = fe.Demeaner(codes, w)
    expected = "means" if len(levels) == 1 else "schur"
    assert auto.method == expected


def test_schur_sweep_with_disconnected_effects():
    # two effects whose bipartite graph has two components: S has a two-dimensional null space
    rng = np.random.default_rng(3)
    n = 800
    a = rng.integers(0, 60, n)
    b = np.where(a < 30, rng.integers(0, 5, n), rng.integers(5, 9, n))
    codes = fe.recode([a, b])
    x = rng.normal(size=n)
    ref, D = _dummy_resid(x, codes)  # reference: dummy-variable least squares
    assert np.max(np.abs(fe.Demeaner(codes, None)(x) - ref)) <= TOL
    # absorbed levels = rank of the dummy matrix (numpy.linalg.matrix_rank)
    assert fe.absorbed_df(codes) == np.linalg.matrix_rank(D)


def test_inplace_sweep_overwrites_and_returns_the_same_array():
    rng = np.random.default_rng(4)
    codes = fe.recode([rng.integers(0, 20, 300), rng.integers(0, 4, 300)])
    x = rng.normal(size=300)
    copy = fe.Demeaner(codes, None)(x)
    y = x.copy()
    out = fe.Demeaner(codes, None)(y, inplace=True)
    assert out is y and np.array_equal(out, copy)


def test_recode_numbers_like_unique():
    rng = np.random.default_rng(5)
    c = rng.choice([3, 9, 10, 57, 2], 500)
    (new, g), = fe.recode([c])
    _, inv = np.unique(c, return_inverse=True)  # reference: numpy.unique's numbering
    assert g == 5 and np.array_equal(new, inv)


def test_nested_in_matches_a_sort_based_check():
    rng = np.random.default_rng(6)
    firm = rng.integers(0, 50, 400)
    region_of_firm = rng.integers(0, 7, 50)
    nested = region_of_firm[firm]
    other = rng.integers(0, 7, 400)

    def by_sorting(f, c):  # reference: sort by level, compare neighbours
        o = np.lexsort((c, f))
        same = f[o][1:] == f[o][:-1]
        return bool(np.all(c[o][1:][same] == c[o][:-1][same]))

    for c in (nested, other):
        assert fe.nested_in(firm, c) == by_sorting(firm, c)
    assert fe.nested_in(firm, nested) and not fe.nested_in(firm, other)


# ---------------------------------------------------------------------------------------------
# the fit: a plain full-row implementation of the documented conventions


def _frame(n=900, seed=11):
    rng = np.random.default_rng(seed)
    g1 = rng.integers(0, 30, n)
    g2 = rng.integers(0, 12, n)
    z = rng.normal(size=(n, 3))
    x = rng.normal(size=(n, 2))
    u = rng.normal(size=n)
    d = z @ [0.8, 0.4, 0.2] + 0.3 * x[:, 0] + 0.5 * u + rng.normal(size=n)
    y = 0.7 * d + x @ [0.5, -0.3] + u + rng.normal(0, 0.3, 30)[g1] + rng.normal(size=n)
    return pd.DataFrame({"y": y, "d": d, "z1": z[:, 0], "z2": z[:, 1], "z3": z[:, 2],
                         "x1": x[:, 0], "x2": x[:, 1], "g1": g1, "g2": g2,
                         "t": rng.permutation(n), "w": rng.uniform(0.5, 2, n)})


def _spec(**kw) -> Specification:
    base = dict(id="s", dataset="d", dataset_path="d.csv", outcome="y", endogenous=("d",),
                instruments=("z1", "z2", "z3"), controls=("x1", "x2"))
    base.update(kw)
    return Specification(**base)


def _plain(sp: Specification, df: pd.DataFrame) -> dict:
    """OLS, first stage, reduced form and IV on the full rows (no fixed effects)."""
    rows = np.arange(len(df))
    if sp.hac_order:
        rows = np.argsort(df[sp.hac_order].to_numpy(), kind="stable")
    sw = np.sqrt(df[sp.weights].to_numpy()[rows]) if sp.weights else np.ones(rows.size)
    col = lambda c: df[c].to_numpy(dtype=float)[rows] * sw  # noqa: E731
    y = col(sp.outcome)
    Xe = np.column_stack([col(c) for c in sp.endogenous])
    Z = np.column_stack([col(c) for c in sp.instruments])
    W = np.column_stack([sw] + [col(c) for c in sp.controls])
    R, Q = np.column_stack([Xe, W]), np.column_stack([Z, W])
    n = y.size
    cl = Clusters.from_columns([df[c].to_numpy()[rows] for c in sp.cluster]) if sp.cluster else None
    lst = lambda a, b: np.linalg.lstsq(a, b, rcond=None)[0]  # noqa: E731

    def cov(bread, scores, k, e):
        if sp.covariance == "unadjusted":
            return (e @ e) / (n - k) * bread
        v = bread @ meat(scores, sp.covariance, cl, k=k, hac_lags=sp.hac_lags) @ bread
        return psd_clip(v)[0] if cl is not None and cl.ndim == 2 else v  # two-way: clipped

    def ols(v, X):
        b = lst(X, v)
        e = v - X @ b
        return b, cov(np.linalg.inv(X.T @ X), X * e[:, None], X.shape[1], e)

    def kclass(kappa):
        Rt = (1 - kappa) * R + kappa * (Q @ lst(Q, R)) if kappa != 1 else Q @ lst(Q, R)
        A = Rt.T @ R
        A = (A + A.T) / 2
        b = np.linalg.solve(A, Rt.T @ y)
        e = y - R @ b
        return b, cov(np.linalg.inv(A), Rt * e[:, None], R.shape[1], e)

    out = {"ols": ols(y, R), "first_stage": ols(Xe[:, 0], Q), "reduced_form": ols(y, Q)}
    k = R.shape[1]
    if sp.estimator == "2sls":
        out["iv"] = kclass(1.0)
    elif sp.estimator in ("liml", "fuller"):
        Y = np.column_stack([y, Xe])
        Yw, Yq = Y - W @ lst(W, Y), Y - Q @ lst(Q, Y)
        kappa = float(eigh(Yw.T @ Yw, Yq.T @ Yq, eigvals_only=True).min())
        if sp.estimator == "fuller":
            kappa -= sp.fuller_alpha / (n - Q.shape[1])
        out["iv"] = kclass(kappa)
        out["kappa"] = kappa
    else:
        b1 = kclass(1.0)[0]
        e1 = y - R @ b1
        S = ((e1 @ e1) / n * (Q.T @ Q) if sp.covariance == "unadjusted"
             else meat(Q * e1[:, None], sp.covariance, cl, k=k, hac_lags=sp.hac_lags))
        Wm = np.linalg.inv(S)
        RQ = R.T @ Q
        A = RQ @ Wm @ RQ.T
        A = (A + A.T) / 2
        b = np.linalg.solve(A, RQ @ Wm @ (Q.T @ y))
        e = y - R @ b
        S2 = ((e @ e) / (n - k) * (Q.T @ Q) if sp.covariance == "unadjusted"
              else meat(Q * e[:, None], sp.covariance, cl, k=k, hac_lags=sp.hac_lags))
        Ai = np.linalg.inv(A)
        G = RQ @ Wm
        v = Ai @ (G @ S2 @ G.T) @ Ai
        out["iv"] = (b, psd_clip(v)[0] if cl is not None and cl.ndim == 2 else v)
    return out


def _check_against_plain(r, ref):
    assert r.status == "ok", r.reason
    pairs = [(r.ols, ref["ols"]), (r.first_stages[0], ref["first_stage"]),
             (r.reduced_form, ref["reduced_form"]), (r.iv, ref["iv"])]
    for reg, (b, v) in pairs:
        est = [t.estimate for t in reg.terms]
        se = [t.se for t in reg.terms]
        assert _rel(est, b) <= TOL, reg.role
        assert _rel(se, np.sqrt(np.diag(v))) <= TOL, reg.role
    if "kappa" in ref:
        assert _rel(r.iv.kappa, ref["kappa"]) <= TOL


CASES = [
    dict(covariance="unadjusted"),
    dict(covariance="robust"),
    dict(covariance="robust", weights="w"),
    dict(covariance="cluster", cluster=("g1",)),
    dict(covariance="cluster", cluster=("g1",), weights="w"),
    dict(covariance="cluster", cluster=("g1", "g2")),
    dict(covariance="hac", hac_order="t", hac_lags=3),
]


@pytest.mark.parametrize("estimator", ["2sls", "liml", "fuller", "gmm"])
@pytest.mark.parametrize("case", CASES, ids=lambda c: "-".join(f"{v}" for v in c.values()))
def test_fit_equals_plain_full_row_computation(estimator, case):
    df = _frame()
    sp = _spec(estimator=estimator, **case)
    _check_against_plain(F.fit(sp, df, diagnose=False), _plain(sp, df))


def _numbers(r) -> list[float]:
    """Every number of a FitResult's regressions and diagnostics, in a fixed order."""
    out = []
    for reg in [r.ols, *r.first_stages, r.reduced_form, r.iv]:
        for t in reg.terms:
            out += [t.estimate, t.se, t.t, t.p, t.ci_low, t.ci_high]
        out += [reg.r2 or 0.0, reg.kappa or 0.0]
    for k in sorted(r.diagnostics):
        d = r.diagnostics[k]
        out += [d.statistic if d.statistic is not None else 0.0, d.pvalue if d.pvalue is not None else 0.0]
    return [float(x) if x is not None and np.isfinite(x) else 0.0 for x in out]


@pytest.mark.parametrize("cluster", [("g1",), ("g1", "g2")])
@pytest.mark.parametrize("estimator", ["2sls", "liml", "gmm"])
def test_compressed_cluster_rows_equal_full_rows(monkeypatch, estimator, cluster):
    df = _frame(n=2000)
    sp = _spec(estimator=estimator, covariance="cluster", cluster=cluster)
    fast = F.fit(sp, df, diagnose=False)
    monkeypatch.setattr(F, "COMPRESS_ROWS", False)  # the plain path: sums over all n rows
    plain = F.fit(sp, df, diagnose=False)
    assert _rel(_numbers(fast), _numbers(plain)) <= TOL


def test_chunked_and_column_wise_designs_equal_the_dense_one(monkeypatch):
    df = _frame(n=1500)
    specs = [_spec(covariance=c, cluster=("g1",), estimator=e)
             for c in ("robust", "cluster") for e in ("2sls", "liml")]
    dense = [_numbers(F.fit(sp, df, diagnose=False)) for sp in specs]
    monkeypatch.setattr(F, "_CHUNK", 128)  # tall-skinny QR over 12 chunks of rows
    monkeypatch.setattr(F, "_DENSE_MAX", 0)  # products column by column
    chunked = [_numbers(F.fit(sp, df, diagnose=False)) for sp in specs]
    for a, b in zip(dense, chunked):
        assert _rel(a, b) <= TOL


def test_shared_design_in_a_batch_equals_one_spec_at_a_time():
    df = _frame(n=1000)
    specs = [_spec(instruments=ins, controls=ctl, estimator=est, covariance="cluster", cluster=("g1",))
             for ins in (("z1",), ("z1", "z2"), ("z2", "z3")) for ctl in ((), ("x1",), ("x1", "x2"))
             for est in ("2sls", "gmm")]
    together = F.fit_many(specs, df)  # one _Design over every column of the shared sample
    for sp, r in zip(specs, together):
        alone = F.fit(sp, df)  # a design of this specification's columns only
        assert _rel(_numbers(r), _numbers(alone)) <= TOL


def test_absorbed_effects_schur_equals_projections(monkeypatch):
    df = _frame(n=1200)
    df["f1"] = np.random.default_rng(1).integers(0, 200, len(df))
    sp = _spec(absorb=("f1", "g2"), covariance="cluster", cluster=("g1",), estimator="liml")
    fast = F.fit(sp, df)
    monkeypatch.setattr(fe, "SCHUR_MAX_LEVELS", -1)  # force alternating projections
    plain = F.fit(sp, df)
    assert fast.df_absorbed == plain.df_absorbed
    # C statistics are differences of two J statistics (here J about 0.1, C about 5e-7), so
    # their relative error is the J's rounding (1e-16) divided by C: compare those absolutely.
    c_keys = {k for k in fast.diagnostics if k.startswith("c_stat:")}
    keep = {k: v for k, v in fast.diagnostics.items() if k not in c_keys}
    keep_plain = {k: v for k, v in plain.diagnostics.items() if k not in c_keys}
    assert _rel(_numbers(fast.model_copy(update={"diagnostics": keep})),
                _numbers(plain.model_copy(update={"diagnostics": keep_plain}))) <= TOL
    for k in c_keys:
        assert abs(fast.diagnostics[k].statistic - plain.diagnostics[k].statistic) <= 1e-12
        j_scale = fast.diagnostics[k].extra["j_full"]
        assert abs(fast.diagnostics[k].extra["j_full"] - plain.diagnostics[k].extra["j_full"]) <= TOL * j_scale
