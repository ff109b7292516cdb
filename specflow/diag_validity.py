"""Over-identification and endogeneity tests, and complier characteristics.

These statistics test restrictions that the IV model imposes; passing them never shows that an
instrument satisfies the exclusion restriction, only that the data do not reject it.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from .diag_core import Core, Unavailable, chi2_sf, f_sf, finite, quad_form_inv, safe_solve
from .results import Diagnostic

JUST_IDENTIFIED = "just-identified: no overidentifying restrictions"


def _overid_df(c: Core) -> int:
    df = c.L - c.p
    if df <= 0:
        raise Unavailable(JUST_IDENTIFIED)
    return df


def _proj_resid(c: Core) -> tuple[float, float]:
    """(e'P_Z e, e'e) at the 2SLS residuals, from the Gram matrix."""
    c.require_structural_noise()
    b = c.beta_2sls
    ep = c.QY[:, 0] - c.QY[:, 1:] @ b
    return float(ep @ ep), c.ee(b)


def sargan(c: Core) -> Diagnostic:
    r"""Sargan's (1958) test of the over-identifying restrictions.

    .. math:: S = n\,\frac{\hat e'P_Z\hat e}{\hat e'\hat e} \sim \chi^2(L - p)

    with :math:`\hat e` the 2SLS residuals (n R² of the residuals on all instruments).

    References
    ----------
    Sargan, J. D. (1958), Econometrica 26(3), 393-415.

    Notes
    -----
    Assumes homoskedastic errors; the same for every covariance type. Always at the 2SLS
    estimate (computed here), whatever the specification's estimator.
    """
    df = _overid_df(c)
    pe, ee = _proj_resid(c)
    S = finite(c.n * pe / ee, "the Sargan statistic")
    return Diagnostic(name="sargan", statistic=S, pvalue=chi2_sf(S, df), distribution=f"chi2({df})",
                      null="the over-identifying restrictions hold", covariance="unadjusted")


def basmann(c: Core) -> Diagnostic:
    r"""Basmann's (1960) small-sample form of the Sargan test.

    .. math:: B = (n - k - L)\,\frac{\hat e'P_Z\hat e}{\hat e'M_Z\hat e} = \frac{S\,(n - k - L)}{n - S}
              \sim \chi^2(L - p)

    References
    ----------
    Basmann, R. L. (1960), JASA 55(292), 650-659.

    Notes
    -----
    Assumes homoskedastic errors; 2SLS residuals; the same for every covariance type.
    """
    df = _overid_df(c)
    pe, ee = _proj_resid(c)
    B = finite(c.df_fs * pe / (ee - pe), "the Basmann statistic")
    return Diagnostic(name="basmann", statistic=B, pvalue=chi2_sf(B, df), distribution=f"chi2({df})",
                      null="the over-identifying restrictions hold", covariance="unadjusted")


def _gmm(c: Core, cols: list[int], S: np.ndarray) -> tuple[np.ndarray, float]:
    """Efficient GMM with the instruments ``cols`` and moment covariance ``S``: (beta, J)."""
    zx, zy = c.ZY[cols, 1:], c.ZY[cols, 0]
    sx = safe_solve(S, zx, "the moment conditions")
    beta = np.linalg.solve(zx.T @ sx, sx.T @ zy)
    g = zy - zx @ beta  # Z_s'(y - X beta)
    return beta, quad_form_inv(S, g, "the moment conditions")


def _moment_cov(c: Core) -> tuple[np.ndarray, str]:
    """Moment covariance at the 2SLS residuals: raw robust/cluster/HAC meat, or s^2 Z'Z."""
    c.require_structural_noise()
    if not c.robust:
        return (c.ee(c.beta_2sls) / c.n) * c.ZZ, "unadjusted"
    return c.block("ze", None), c.cov


def hansen_j(c: Core) -> Diagnostic:
    r"""Hansen's (1982) J test at the two-step efficient GMM estimate.

    .. math:: J = \hat g'\hat S^{-1}\hat g \sim \chi^2(L - p), \quad \hat g = Z'(y - X\hat\beta_{GMM}),
              \quad \hat S = \textstyle\sum_i z_i z_i'\tilde e_i^2

    with :math:`\tilde e` the 2SLS residuals (summed within clusters for cluster covariance,
    Bartlett-weighted for HAC) and :math:`\hat\beta_{GMM} = (X'Z\hat S^{-1}Z'X)^{-1}X'Z\hat S^{-1}Z'y`.

    References
    ----------
    Hansen, L. P. (1982), Econometrica 50(4), 1029-1054.

    Notes
    -----
    Robust to the specification's covariance structure (robust, cluster, HAC); the weight carries
    no small-sample factor. Not applicable under unadjusted covariance, where the homoskedastic
    tests are ``sargan`` and ``basmann``.
    """
    df = _overid_df(c)
    if not c.robust:
        raise Unavailable("unadjusted covariance: the homoskedastic overidentification tests are sargan and basmann")
    S, cov = _moment_cov(c)
    beta, J = _gmm(c, list(range(c.L)), S)
    J = finite(J, "the J statistic")
    return Diagnostic(name="hansen_j", statistic=J, pvalue=chi2_sf(J, df), distribution=f"chi2({df})",
                      null="the over-identifying restrictions hold", covariance=cov,
                      extra={"beta_gmm": [float(b) for b in beta]})


def c_stats(c: Core) -> dict[str, Diagnostic]:
    r"""Difference-in-J (C) statistics, dropping each excluded instrument in turn.

    .. math:: C_l = J(Z) - J(Z_{-l}) \sim \chi^2(1)

    both J's with the *same* moment covariance :math:`\hat S` of the full model (its sub-matrix
    for :math:`Z_{-l}`), which keeps C non-negative. Under unadjusted covariance
    :math:`\hat S = \hat\sigma^2 Z'Z` with :math:`\hat\sigma^2 = \tilde e'\tilde e/n` at the full
    2SLS residuals, so both estimates are 2SLS and J(Z) is the Sargan statistic.

    References
    ----------
    Eichenbaum, Hansen and Singleton (1988), QJE 103(1), 51-78; Hayashi, F. (2000), Econometrics,
    Section 3.6.

    Notes
    -----
    Needs L - 1 >= p. Tests the exclusion of instrument l given that the others satisfy it.
    """
    out: dict[str, Diagnostic] = {}
    names = c.instr_names
    keys = [f"c_stat:{z}" for z in names]
    if c.L - c.p <= 0:
        return {k: Diagnostic.not_applicable(k, JUST_IDENTIFIED) for k in keys}
    if c.L - 1 < c.p:
        return {k: Diagnostic.not_applicable(k, "dropping an instrument would leave the model under-identified")
                for k in keys}
    S, cov = _moment_cov(c)
    _, J_full = _gmm(c, list(range(c.L)), S)
    for l, key in enumerate(keys):
        cols = [i for i in range(c.L) if i != l]
        _, J_r = _gmm(c, cols, S[np.ix_(cols, cols)])
        C = max(J_full - J_r, 0.0)
        out[key] = Diagnostic(name=key, statistic=finite(C, "the C statistic"), pvalue=chi2_sf(C, 1),
                              distribution="chi2(1)", null=f"{names[l]} satisfies the exclusion restriction, "
                              "given the other instruments do", covariance=cov,
                              extra={"j_full": J_full, "j_restricted": J_r})
    return out


def _endog_delta(c: Core) -> tuple[float, float]:
    """delta = e0'P_[Z,X] e0 - e'P_Z e and e0'e0 (OLS residuals e0, 2SLS residuals e)."""
    p = c.p
    c.require_structural_noise()
    xx = c.YY[1:, 1:]
    bo = np.linalg.solve(xx, c.YY[1:, 0])
    ze0 = c.ZY[:, 0] - c.ZY[:, 1:] @ bo  # Z'e0; X'e0 = 0
    gzx = np.block([[c.ZZ, c.ZY[:, 1:]], [c.ZY[:, 1:].T, xx]])
    w = np.concatenate([ze0, np.zeros(p)])
    e1 = float(w @ safe_solve(gzx, w, "[Z, X]"))
    e2, _ = _proj_resid(c)
    return e1 - e2, c.ee(bo)


def durbin(c: Core) -> Diagnostic:
    r"""Durbin's (1954) test that the endogenous regressors are exogenous.

    .. math:: D = \frac{\hat e_0'P_{[Z,X]}\hat e_0 - \hat e'P_Z\hat e}{\hat e_0'\hat e_0/n} \sim \chi^2(p)

    with :math:`\hat e_0` the OLS and :math:`\hat e` the 2SLS residuals.

    References
    ----------
    Durbin, J. (1954), Review of the International Statistical Institute 22, 23-32.

    Notes
    -----
    Assumes homoskedastic errors; the same for every covariance type.
    """
    delta, ss0 = _endog_delta(c)
    D = finite(delta / (ss0 / c.n), "the Durbin statistic")
    return Diagnostic(name="durbin", statistic=D, pvalue=chi2_sf(D, c.p), distribution=f"chi2({c.p})",
                      null="the endogenous regressors are exogenous", covariance="unadjusted")


def wu_hausman(c: Core) -> Diagnostic:
    r"""Wu-Hausman F test that the endogenous regressors are exogenous.

    .. math:: WH = \frac{\delta/p}{(\hat e_0'\hat e_0 - \delta)/(n - k - 2p)} \sim F(p, n - k - 2p)

    with :math:`\delta` as in :func:`durbin`.

    References
    ----------
    Wu, D.-M. (1973), Econometrica 41(4), 733-750; Hausman, J. A. (1978), Econometrica 46(6),
    1251-1271.

    Notes
    -----
    Assumes homoskedastic errors; equals the squared control-function t statistic under
    unadjusted covariance.
    """
    delta, ss0 = _endog_delta(c)
    df2 = c.n - c.k - 2 * c.p
    if df2 < 1:
        raise Unavailable("no residual degrees of freedom for the Wu-Hausman test")
    WH = finite((delta / c.p) / ((ss0 - delta) / df2), "the Wu-Hausman statistic")
    return Diagnostic(name="wu_hausman", statistic=WH, pvalue=f_sf(WH, c.p, df2), distribution=f"F({c.p},{df2})",
                      null="the endogenous regressors are exogenous", covariance="unadjusted")


def control_function(c: Core) -> Diagnostic:
    r"""Control-function (regression) test of exogeneity with the specification's covariance.

    Regress y on X and the first-stage residuals V (all partialled):
    :math:`y = X\beta + V\rho + u`, and test :math:`\rho = 0`. For p = 1 the statistic is the
    t ratio of rho, t(n - k - 2p) (t(G - 1) when clustered); for p >= 2 the Wald statistic / p,
    F(p, df).

    References
    ----------
    Hausman (1978); Wooldridge, J. M., Introductory Econometrics, Section 15.5.

    Notes
    -----
    Uses the specification's covariance (k = k_exog + 2p). Under H0 the generated regressor does
    not affect the null distribution.
    """
    p = c.p
    c.require_structural_noise()
    c.require_first_stage_noise()
    k_used = c.k + 2 * p
    if c.n - k_used < 1:
        raise Unavailable("no residual degrees of freedom for the control-function regression")
    xx, xmx = c.YY[1:, 1:], c.YMY[1:, 1:]
    aa = np.block([[xx, xmx], [xmx, xmx]])  # [X, V]'[X, V] with V = M_Z X
    ay = np.concatenate([c.YY[1:, 0], c.YMY[1:, 0]])
    coef = safe_solve(aa, ay, "the control-function regressors")
    bread = np.linalg.inv(aa)
    if not c.robust:
        uu = max(float(c.YY[0, 0] - coef @ ay), 0.0)
        V = bread * uu / (c.n - k_used)
    else:
        V = bread @ c.block("cf", k_used) @ bread
    idx = slice(c.p, 2 * c.p)
    rho, Vr = coef[idx], V[idx, idx]
    df2 = c.df_denom(k_used) if c.robust else c.n - k_used
    if c.p == 1:
        t = finite(rho[0] / np.sqrt(Vr[0, 0]), "the control-function t statistic")
        return Diagnostic(name="control_function", statistic=t, pvalue=float(2 * stats.t.sf(abs(t), df2)),
                          distribution=f"t({df2})", null="the endogenous regressor is exogenous", covariance=c.cov,
                          extra={"coefficient": float(rho[0]), "se": float(np.sqrt(Vr[0, 0]))})
    F = finite(quad_form_inv(Vr, rho, "the control-function coefficients") / c.p, "the control-function F")
    return Diagnostic(name="control_function", statistic=F, pvalue=f_sf(F, c.p, df2), distribution=f"F({c.p},{df2})",
                      null="the endogenous regressors are exogenous", covariance=c.cov,
                      extra={"coefficients": [float(r) for r in rho], "note": "Wald/p"})


def complier(c: Core) -> Diagnostic:
    r"""Complier share and complier means of the controls (binary treatment and instrument).

    Share: :math:`\pi = E[D|Z=1] - E[D|Z=0]`. Complier mean of a control X by Abadie's (2003)
    kappa weights,

    .. math:: \kappa = 1 - \frac{D(1-Z)}{1-q} - \frac{(1-D)Z}{q},\quad q = P(Z = 1),\qquad
              E[X \mid \text{complier}] = E[\kappa X]/E[\kappa]

    (weighted by the regression weights; raw, not partialled, variables).

    References
    ----------
    Abadie, A. (2003), "Semiparametric Instrumental Variable Estimation of Treatment Response
    Models", Journal of Econometrics 113(2), 231-263; Angrist and Pischke (2009), Section 4.4.4.

    Notes
    -----
    Assumes monotonicity and an instrument as good as randomly assigned unconditionally (q does
    not depend on the controls). The IV estimate is an average effect for these compliers only.
    """
    d = c.d
    if c.p != 1 or c.L != 1 or d.raw_d is None or d.raw_z is None:
        raise Unavailable("needs one binary endogenous treatment and one binary instrument")
    D = np.asarray(d.raw_d, dtype=float).reshape(-1)
    Zr = np.asarray(d.raw_z, dtype=float).reshape(-1)
    w = np.ones_like(D) if d.raw_weights is None else np.asarray(d.raw_weights, dtype=float).reshape(-1)
    if D.shape != Zr.shape or D.shape != w.shape:
        raise Unavailable("the raw treatment, instrument and weights do not have matching rows")
    if not (set(np.unique(D)) <= {0.0, 1.0} and set(np.unique(Zr)) <= {0.0, 1.0}):
        raise Unavailable("the treatment or the instrument is not binary (0/1)")
    wz1, wz0 = w[Zr == 1].sum(), w[Zr == 0].sum()
    if wz1 <= 0 or wz0 <= 0:
        raise Unavailable("the instrument takes only one value")
    q = wz1 / w.sum()
    share = float((w * D)[Zr == 1].sum() / wz1 - (w * D)[Zr == 0].sum() / wz0)
    if abs(share) < 1e-12:
        raise Unavailable("the instrument does not move the treatment: no compliers")
    kappa = 1 - D * (1 - Zr) / (1 - q) - (1 - D) * Zr / q
    ek = float(np.sum(w * kappa) / w.sum())
    extra: dict = {"complier_share": share, "p_z": float(q), "complier_means": {}, "sample_means": {}}
    if d.raw_controls is not None:
        Xc = np.asarray(d.raw_controls, dtype=float).reshape(D.shape[0], -1)
        names = tuple(d.control_names) if len(d.control_names) == Xc.shape[1] \
            else tuple(f"control{j + 1}" for j in range(Xc.shape[1]))
        for j, nm in enumerate(names):
            extra["complier_means"][nm] = float(np.sum(w * kappa * Xc[:, j]) / w.sum() / ek)
            extra["sample_means"][nm] = float(np.sum(w * Xc[:, j]) / w.sum())
    if share < 0:
        extra["note"] = "negative first stage: the instrument lowers take-up (monotonicity in reverse)"
    return Diagnostic(name="complier", statistic=share, extra=extra)
