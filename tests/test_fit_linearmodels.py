"""specflow's IV estimators against linearmodels 7.1 (an outside implementation) as oracle.

linearmodels is called through its array/DataFrame interface with ``debiased=True``:
``IV2SLS``, ``IVLIML`` (``fuller=alpha`` for Fuller) and ``IVGMM`` (two steps:
``iter_limit=2``, weight type matching the covariance). Estimates must agree to 1e-8 and
standard errors to 1e-6 (relative) wherever the two programs use the same convention.

Where the conventions differ, the difference is documented here from linearmodels' source
(``linearmodels/iv/covariance.py`` and ``linearmodels/iv/gmm.py`` of 7.1) and specflow is
checked against a formula of its own documented convention instead:

* k-class (LIML, Fuller) robust and clustered covariance. Both use the bread
  ``A = (1-kappa) X'X + kappa X'P_Z X``. linearmodels' scores are ``xhat_i e_i`` with the
  2SLS projection ``xhat = P_Z X`` whatever kappa (``HeteroskedasticCovariance.s`` and
  ``ClusteredCovariance.s`` compute ``z @ (pinvz @ x) * eps``); specflow's are
  ``xt_i e_i`` with the k-class regressors ``xt = (1-kappa) X + kappa P_Z X`` actually used
  by the estimator (``b = (xt'X)^{-1} xt'y``, so ``b - beta = A^{-1} xt'u``). The two agree
  when kappa = 1 and differ at order (kappa - 1). Unadjusted covariances coincide.
* GMM with homoskedastic (unadjusted) moments: linearmodels' ``HomoskedasticWeightMatrix``
  centres the residuals (``s2 = (eps - mean)'(eps - mean) / n``); specflow uses the
  uncentred ``e'e / (n - k)``. With a constant (or absorbed effects) among the instruments
  the residuals sum to zero and the two coincide; without a constant they differ.
* GMM two-way clustering: linearmodels' ``IVGMMCovariance`` has one-way clustering only.
* GMM with absorbed fixed effects (robust or clustered): specflow partials the effects out
  of every variable first (Frisch-Waugh-Lovell, as for all estimators) and runs GMM on the
  swept moments ``z~_i e_i``, counting the levels in k. linearmodels with the dummies as
  exogenous regressors has the dummies' moments in the weight matrix. The two-step estimates
  coincide (to rounding, checked below), but the two-step sandwich differs because its
  weight (from the 2SLS residuals) is not the inverse of the final moment covariance; so the
  SEs are checked against a from-scratch GMM on explicitly demeaned data.
* The clustered small-sample factor coincides: linearmodels 7.1 scales by
  ``n/(n-k) * G/(G-1) * (n-1)/n = G/(G-1) (n-1)/(n-k)`` (``ClusteredCovariance.s``,
  ``rescale``), the factor specflow documents; two-way uses each part's own G in both.
* Weights: linearmodels rescales the weights to mean one; covariances of analytic weights
  are invariant to that scale, so weighted fits compare directly.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from specflow.fit import fit
from specflow.grid import Specification

lm_iv = pytest.importorskip("linearmodels.iv")
IV2SLS, IVLIML, IVGMM = lm_iv.IV2SLS, lm_iv.IVLIML, lm_iv.IVGMM

RTOL_B = 1e-8
RTOL_SE = 1e-6

ESTIMATORS = [("2sls", None), ("liml", None), ("fuller", 1.0), ("fuller", 4.0), ("gmm", None)]
EST_IDS = ["2sls", "liml", "fuller1", "fuller4", "gmm"]
COVS = ["unadjusted", "robust", "cluster"]
LM_COV = {"unadjusted": "unadjusted", "robust": "robust", "cluster": "clustered"}


@pytest.fixture(scope="module")
def data() -> pd.DataFrame:
    """Seeded random over-identified IV data (invented): 3 instruments, heteroskedastic,
    clustered errors, one fixed effect not nested in the clusters."""
    rng = np.random.default_rng(20240607)
    n = 600
    g = rng.integers(0, 30, n)
    h = rng.integers(0, 6, n)
    fe = rng.integers(0, 7, n)
    z1, z2, z3, c1 = rng.normal(size=(4, n))
    u = rng.normal(size=n) * (0.5 + np.abs(z1)) + rng.normal(0, 0.5, 30)[g]
    x = 0.5 * z1 + 0.3 * z2 + 0.2 * z3 + 0.3 * c1 + 0.6 * u + rng.normal(size=n) + 0.1 * fe
    y = 1.0 + 0.7 * x + 0.2 * c1 - 0.1 * fe + u
    w = rng.uniform(0.3, 3.0, n)
    return pd.DataFrame(dict(y=y, x=x, z1=z1, z2=z2, z3=z3, c1=c1, g=g, h=h, fe=fe, w=w,
                             const=1.0))


def sf_fit(df, estimator, alpha, cov, *, absorb=(), weights=None, cluster=None, constant=True):
    cluster = cluster if cluster is not None else (("g",) if cov == "cluster" else ())
    sp = Specification(
        id="t", dataset="d", dataset_path="d.csv", outcome="y", endogenous=("x",),
        instruments=("z1", "z2", "z3"), controls=("c1",), absorb=absorb, cluster=cluster,
        weights=weights, estimator=estimator, fuller_alpha=alpha or 1.0, covariance=cov,
        constant=constant,
    )
    r = fit(sp, df, diagnose=False)
    assert r.status == "ok", r.reason
    return r


def lm_fit(df, estimator, alpha, cov, *, exog, weights=None, clusters=None):
    """The same model in linearmodels; ``exog``: DataFrame of exogenous regressors."""
    dep, endog, instr = df["y"], df[["x"]], df[["z1", "z2", "z3"]]
    wts = df[weights] if weights else None
    kw = {}
    if cov == "cluster":
        kw["clusters"] = df["g"] if clusters is None else clusters
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if estimator == "2sls":
            return IV2SLS(dep, exog, endog, instr, weights=wts).fit(
                cov_type=LM_COV[cov], debiased=True, **kw)
        if estimator == "liml":
            return IVLIML(dep, exog, endog, instr, weights=wts).fit(
                cov_type=LM_COV[cov], debiased=True, **kw)
        if estimator == "fuller":
            return IVLIML(dep, exog, endog, instr, weights=wts, fuller=alpha).fit(
                cov_type=LM_COV[cov], debiased=True, **kw)
        wkw = {"clusters": kw["clusters"]} if cov == "cluster" else {}
        return IVGMM(dep, exog, endog, instr, weights=wts, weight_type=LM_COV[cov], **wkw).fit(
            cov_type=LM_COV[cov], debiased=True, iter_limit=2, **kw)


def conventions_coincide(estimator, cov) -> bool:
    return estimator in ("2sls", "gmm") or cov == "unadjusted"


def kclass_own_se(df, kappa, cov, *, exog_cols, weights=None, cluster="g", extra_cols=()):
    """specflow's documented k-class covariance (module docstring above), from scratch:
    bread A = xt'X, scores xt_i e_i, xt = (1-kappa) X + kappa P_Z X; HC1 or one-way cluster
    factor G/(G-1)(n-1)/(n-k). Returns the SEs of [x] + exog_cols."""
    sw = np.sqrt(df[weights].to_numpy()) if weights else np.ones(len(df))
    X = np.column_stack([df["x"]] + [df[c] for c in exog_cols] + list(extra_cols)) * sw[:, None]
    Z = np.column_stack([df[c] for c in ("z1", "z2", "z3")] + [df[c] for c in exog_cols]
                        + list(extra_cols)) * sw[:, None]
    y = df["y"].to_numpy() * sw
    n, k = X.shape
    PX = Z @ np.linalg.lstsq(Z, X, rcond=None)[0]
    Xt = (1 - kappa) * X + kappa * PX
    A = Xt.T @ X
    b = np.linalg.solve(A, Xt.T @ y)
    e = y - X @ b
    s = Xt * e[:, None]
    if cov == "robust":
        meat = n / (n - k) * (s.T @ s)
    else:
        groups = df[cluster].to_numpy()
        sums = pd.DataFrame(s).groupby(groups).sum().to_numpy()
        G = sums.shape[0]
        meat = G / (G - 1) * (n - 1) / (n - k) * (sums.T @ sums)
    Ai = np.linalg.inv(A)
    V = Ai @ meat @ Ai.T
    return b[: 1 + len(exog_cols)], np.sqrt(np.diag(V))[: 1 + len(exog_cols)]


def compare(r, res, names, lm_names=None, se=True):
    lm_names = lm_names or names
    got = {t.name: t for t in r.iv.terms}
    np.testing.assert_allclose([got[n].estimate for n in names],
                               [res.params[m] for m in lm_names], rtol=RTOL_B, atol=0)
    if se:
        np.testing.assert_allclose([got[n].se for n in names],
                                   [res.std_errors[m] for m in lm_names], rtol=RTOL_SE, atol=0)


# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("cov", COVS)
@pytest.mark.parametrize("estimator,alpha", ESTIMATORS, ids=EST_IDS)
def test_against_linearmodels(data, estimator, alpha, cov):
    r = sf_fit(data, estimator, alpha, cov)
    res = lm_fit(data, estimator, alpha, cov, exog=data[["const", "c1"]])
    names = ["x", "const", "c1"]
    coincide = conventions_coincide(estimator, cov)
    compare(r, res, names, se=coincide)
    if not coincide:
        # k-class robust/clustered: specflow's convention, from scratch
        b, se = kclass_own_se(data, r.iv.kappa, cov, exog_cols=["const", "c1"])
        got = {t.name: t for t in r.iv.terms}
        np.testing.assert_allclose([got[n].estimate for n in names], b, rtol=RTOL_B, atol=0)
        np.testing.assert_allclose([got[n].se for n in names], se, rtol=1e-8, atol=0)
        # ... and the documented difference is real: linearmodels' SEs differ (at order kappa-1)
        lm_se = res.std_errors["x"]
        assert abs(got["x"].se / lm_se - 1) > 1e-6
        assert abs(got["x"].se / lm_se - 1) < 50 * abs(r.iv.kappa - 1)


@pytest.mark.parametrize("estimator,alpha", [e for e in ESTIMATORS if e[0] in ("liml", "fuller")],
                         ids=["liml", "fuller1", "fuller4"])
def test_kappa(data, estimator, alpha):
    r = sf_fit(data, estimator, alpha, "unadjusted")
    res = lm_fit(data, estimator, alpha, "unadjusted", exog=data[["const", "c1"]])
    assert r.iv.kappa == pytest.approx(float(res.kappa), rel=1e-10)
    assert r.iv.kappa > (1.0 if estimator == "liml" else 0.0)
    if estimator == "fuller":
        # Fuller (1977): kappa_LIML - alpha / (n - K), K = all instruments incl. exogenous
        # (here 3 + const + c1) (from memory); linearmodels' formula in IVLIML.fit (source)
        liml = sf_fit(data, "liml", None, "unadjusted").iv.kappa
        assert r.iv.kappa == pytest.approx(liml - alpha / (len(data) - 5), rel=1e-12)
        lm_liml = lm_fit(data, "liml", None, "unadjusted", exog=data[["const", "c1"]])
        assert float(lm_liml.kappa) == pytest.approx(liml, rel=1e-10)
    # 2SLS and GMM report no kappa
    assert sf_fit(data, "2sls", None, "unadjusted").iv.kappa is None


@pytest.mark.parametrize("cov", COVS)
@pytest.mark.parametrize("estimator,alpha", ESTIMATORS, ids=EST_IDS)
def test_weighted(data, estimator, alpha, cov):
    r = sf_fit(data, estimator, alpha, cov, weights="w")
    res = lm_fit(data, estimator, alpha, cov, exog=data[["const", "c1"]], weights="w")
    names = ["x", "const", "c1"]
    coincide = conventions_coincide(estimator, cov)
    compare(r, res, names, se=coincide)
    if not coincide:
        b, se = kclass_own_se(data, r.iv.kappa, cov, exog_cols=["const", "c1"], weights="w")
        np.testing.assert_allclose([t.se for t in r.iv.terms], se, rtol=1e-8, atol=0)


@pytest.mark.parametrize("cov", COVS)
@pytest.mark.parametrize("estimator,alpha", ESTIMATORS, ids=EST_IDS)
def test_absorbed_effect_equals_dummies(data, estimator, alpha, cov):
    """specflow absorbing 'fe' = linearmodels with its 7 dummies as exogenous regressors
    (linearmodels' k, and its Fuller K, then count the dummies as specflow's do). Estimates
    agree for every estimator; SEs where the conventions coincide, else the own formulas."""
    r = sf_fit(data, estimator, alpha, cov, absorb=("fe",))
    D = pd.get_dummies(data["fe"], prefix="fe", dtype=float)
    exog = pd.concat([data[["c1"]], D], axis=1)
    res = lm_fit(data, estimator, alpha, cov, exog=exog)
    assert r.df_absorbed == 7
    gmm_swept = estimator == "gmm" and cov != "unadjusted"  # see the module docstring
    coincide = conventions_coincide(estimator, cov) and not gmm_swept
    compare(r, res, ["x", "c1"], se=coincide)
    if estimator in ("liml", "fuller"):
        assert r.iv.kappa == pytest.approx(float(res.kappa), rel=1e-10)
    if estimator in ("liml", "fuller") and cov != "unadjusted":
        b, se = kclass_own_se(data, r.iv.kappa, cov, exog_cols=["c1"],
                              extra_cols=[D[c].to_numpy() for c in D.columns])
        np.testing.assert_allclose([t.se for t in r.iv.terms], se, rtol=1e-8, atol=0)
    if gmm_swept:
        b, se = _gmm_own(data, cov, clusters=("g",), absorb="fe")
        np.testing.assert_allclose([t.estimate for t in r.iv.terms], b, rtol=RTOL_B, atol=0)
        np.testing.assert_allclose([t.se for t in r.iv.terms], se, rtol=1e-8, atol=0)
        assert abs(r.iv.terms[0].se / res.std_errors["x"] - 1) > 1e-6  # the documented difference


def test_two_way_cluster_2sls(data):
    """Two-way (g, h) clustering of 2SLS: linearmodels' ClusteredCovariance with two columns
    (each part its own G, no eigenvalue clipping)."""
    r = sf_fit(data, "2sls", None, "cluster", cluster=("g", "h"))
    res = lm_fit(data, "2sls", None, "cluster", exog=data[["const", "c1"]],
                 clusters=data[["g", "h"]])
    # linearmodels' matrix is positive definite here, so specflow's clipping does not apply
    # to the IV covariance (it may apply to another regression of the fit)
    assert np.linalg.eigvalsh(res.cov.to_numpy()).min() > 0
    compare(r, res, ["x", "const", "c1"])
    assert r.n_clusters == [30, 6]


def _gmm_own(df, cov, *, clusters=(), constant=True, absorb=None):
    """specflow's documented two-step GMM (specflow/fit.py docstring), from scratch.

    Step 1: 2SLS. Weight: the inverse of the corrected moment covariance at the 2SLS
    residuals. Step 2: b = (X'Z W Z'X)^{-1} X'Z W Z'y. Covariance: the sandwich
    (X'ZWZ'X)^{-1} X'Z W S2 W Z'X (X'ZWZ'X)^{-1} with S2 the corrected moment covariance at
    the final residuals (unadjusted: e'e/(n-k) Z'Z, uncentred; cluster: each part's
    G/(G-1)(n-1)/(n-k), two-way CGM). ``absorb``: a column whose group means are subtracted
    from every variable first (no constant then), its levels counted in k."""
    extra_k = 0
    if absorb is not None:
        cols = ["y", "x", "z1", "z2", "z3", "c1"]
        df = df.copy()
        df[cols] = df[cols] - df.groupby(absorb)[cols].transform("mean")
        extra_k = df[absorb].nunique()
        constant = False
    ex = (["const"] if constant else []) + ["c1"]
    X = df[["x"] + ex].to_numpy()
    Z = df[["z1", "z2", "z3"] + ex].to_numpy()
    y = df["y"].to_numpy()
    n, k = X.shape
    k += extra_k

    def moment_cov(e):
        if cov == "unadjusted":
            return (e @ e) / (n - k) * (Z.T @ Z)
        s = Z * e[:, None]
        if cov == "robust":
            return n / (n - k) * (s.T @ s)

        def part(groups):
            sums = pd.DataFrame(s).groupby(groups).sum().to_numpy()
            G = sums.shape[0]
            return G / (G - 1) * (n - 1) / (n - k) * (sums.T @ sums)

        cols = [df[c].astype(str).to_numpy() for c in clusters]
        if len(cols) == 1:
            return part(cols[0])
        return part(cols[0]) + part(cols[1]) - part(np.char.add(np.char.add(cols[0], "|"), cols[1]))

    ZZi = np.linalg.inv(Z.T @ Z)
    b1 = np.linalg.solve(X.T @ Z @ ZZi @ Z.T @ X, X.T @ Z @ ZZi @ Z.T @ y)
    W = np.linalg.inv(moment_cov(y - X @ b1))
    M = X.T @ Z @ W @ Z.T @ X
    b = np.linalg.solve(M, X.T @ Z @ W @ Z.T @ y)
    S2 = moment_cov(y - X @ b)
    Mi = np.linalg.inv(M)
    V = Mi @ (X.T @ Z @ W @ S2 @ W @ Z.T @ X) @ Mi
    return b, np.sqrt(np.diag(V))


def test_gmm_two_way_cluster_own_formula(data):
    """linearmodels' GMM has no two-way clustering: specflow against its documented formula."""
    r = sf_fit(data, "gmm", None, "cluster", cluster=("g", "h"))
    b, se = _gmm_own(data, "cluster", clusters=("g", "h"))
    np.testing.assert_allclose([t.estimate for t in r.iv.terms], b, rtol=RTOL_B, atol=0)
    np.testing.assert_allclose([t.se for t in r.iv.terms], se, rtol=1e-8, atol=0)


@pytest.mark.parametrize("cov", COVS)
def test_gmm_own_formula_agrees(data, cov):
    """The from-scratch GMM reproduces specflow, the estimate also linearmodels' (a check of
    the reference itself)."""
    r = sf_fit(data, "gmm", None, cov)
    b, se = _gmm_own(data, cov, clusters=("g",))
    np.testing.assert_allclose([t.estimate for t in r.iv.terms], b, rtol=RTOL_B, atol=0)
    np.testing.assert_allclose([t.se for t in r.iv.terms], se, rtol=1e-8, atol=0)


def test_gmm_unadjusted_without_constant_centring_difference(data):
    """Without a constant the 2SLS/GMM residuals need not sum to zero: linearmodels centres
    the homoskedastic moment covariance, specflow does not (documented above). specflow must
    equal the uncentred formula; the estimate (2SLS, whatever the scalar) equals linearmodels'."""
    r = sf_fit(data, "gmm", None, "unadjusted", constant=False)
    assert [t.name for t in r.iv.terms] == ["x", "c1"]
    b, se = _gmm_own(data, "unadjusted", constant=False)
    np.testing.assert_allclose([t.estimate for t in r.iv.terms], b, rtol=RTOL_B, atol=0)
    np.testing.assert_allclose([t.se for t in r.iv.terms], se, rtol=1e-8, atol=0)
    res = lm_fit(data, "gmm", None, "unadjusted", exog=data[["c1"]])
    compare(r, res, ["x", "c1"], se=False)
    assert abs(r.iv.terms[0].se / res.std_errors["x"] - 1) > 1e-6  # the documented difference
