"""Instrument-strength diagnostics: first-stage F, partial R², Cragg-Donald, Kleibergen-Paap,
Sanderson-Windmeijer, the effective F and the Stock-Yogo critical values.

Every function takes the precomputed :class:`~specflow.diag_core.Core` of one specification and
returns a :class:`~specflow.results.Diagnostic`; :func:`specflow.diagnostics.diagnose` calls them
inside a guard that turns numerical trouble into a "not applicable" record.
"""

from __future__ import annotations

import csv
from functools import lru_cache
from pathlib import Path

import numpy as np
from scipy import stats

from .diag_core import Core, Unavailable, chi2_sf, f_sf, finite, quad_form_inv
from .results import Diagnostic

_DATA = Path(__file__).with_name("data") / "stock_yogo.csv"


# -- first stage ------------------------------------------------------------------------------
def first_stage_f(c: Core, j: int) -> Diagnostic:
    r"""Conventional partial F statistic of the excluded instruments in the first stage of x_j.

    .. math:: F_j = \frac{x_j' P_Z x_j / L}{x_j' M_Z x_j / (n - k - L)} \sim F(L,\, n - k - L)

    with every array partialled of the ``k`` exogenous columns (Frisch-Waugh-Lovell).

    References
    ----------
    Staiger, D. and Stock, J. H. (1997), "Instrumental Variables Regression with Weak
    Instruments", Econometrica 65(3), 557-586.

    Notes
    -----
    Assumes homoskedastic, serially uncorrelated first-stage errors; uses the unadjusted
    variance ``s^2 = v'v/(n-k-L)`` whatever the specification's covariance.
    """
    name = c.names[j]
    ss_p, ss_m = c.YPY[j + 1, j + 1], c.YMY[j + 1, j + 1]
    if ss_m <= 0:
        raise Unavailable(f"{name} is an exact linear function of the instruments")
    F = finite((ss_p / c.L) / (ss_m / c.df_fs), "the first-stage F")
    return Diagnostic(
        name=f"first_stage_f:{name}", statistic=F, pvalue=f_sf(F, c.L, c.df_fs),
        distribution=f"F({c.L},{c.df_fs})", null=f"the excluded instruments do not enter the first stage of {name}",
        covariance="unadjusted")


def first_stage_f_robust(c: Core, j: int) -> Diagnostic:
    r"""First-stage F with the specification's covariance: the Wald statistic divided by L.

    .. math:: F^{r}_j = \hat\pi_j' \hat V(\hat\pi_j)^{-1} \hat\pi_j / L

    with :math:`\hat V` the robust / cluster / HAC covariance of the first-stage coefficients of
    the excluded instruments (specflow's small-sample factor with ``k = k_exog + L``). Its
    p-value uses ``F(L, n - k - L)``, or ``F(L, G - 1)`` when clustered.

    References
    ----------
    White, H. (1980), Econometrica 48(4), 817-838; Cameron, Gelbach and Miller (2011),
    "Robust Inference with Multiway Clustering", JBES 29(2), 238-249.

    Notes
    -----
    Under unadjusted covariance this is the conventional F (:func:`first_stage_f`). It does not
    assume homoskedasticity otherwise, but its size as a weak-instrument pretest is not
    controlled by the Stock-Yogo tables (use the effective F for one endogenous regressor).
    """
    name = c.names[j]
    if not c.robust:
        out = first_stage_f(c, j)
        out.name = f"first_stage_f_robust:{name}"
        out.extra = {"note": "Wald/L; under unadjusted covariance identical to the conventional F"}
        return out
    e = np.zeros(c.p + 1)
    e[j + 1] = 1.0
    wald = c.rf_wald(e, f"the first stage of {name}")
    F = finite(wald / c.L, "the robust first-stage F")
    df2 = c.df_denom(c.k + c.L)
    return Diagnostic(
        name=f"first_stage_f_robust:{name}", statistic=F, pvalue=f_sf(F, c.L, df2),
        distribution=f"F({c.L},{df2})", null=f"the excluded instruments do not enter the first stage of {name}",
        covariance=c.cov, extra={"note": "Wald/L with the specification's covariance", "wald": wald})


def partial_r2(c: Core, j: int) -> Diagnostic:
    r"""Partial R² of the excluded instruments for x_j: :math:`x_j'P_Z x_j / x_j'x_j`.

    Notes
    -----
    Descriptive (no test), computed on the partialled-out arrays; no covariance involved.
    """
    name = c.names[j]
    tot = float(c.YY[j + 1, j + 1])
    return Diagnostic(name=f"partial_r2:{name}", statistic=finite(c.YPY[j + 1, j + 1] / tot, "partial R2"))


def shea_r2(c: Core, j: int) -> Diagnostic:
    r"""Shea's (1997) partial R² for x_j, in Godfrey's (1999) form.

    .. math:: R^2_{S,j} = [(X'X)^{-1}]_{jj} \,/\, [(X'P_Z X)^{-1}]_{jj}

    the ratio of the OLS to the 2SLS variance factor of coefficient j.

    References
    ----------
    Shea, J. (1997), "Instrument Relevance in Multivariate Linear Models", REStat 79(2), 348-352;
    Godfrey, L. G. (1999), REStat 81(3), 550-552.

    Notes
    -----
    Descriptive; equals the partial R² when there is one endogenous regressor.
    """
    name = c.names[j]
    xx = c.YY[1:, 1:]
    xpx = c.YPY[1:, 1:]
    e = np.zeros(c.p)
    e[j] = 1.0
    a = np.linalg.solve(xx, e)[j]
    b = np.linalg.solve(xpx, e)[j]
    return Diagnostic(name=f"shea_r2:{name}", statistic=finite(a / b, "Shea's partial R2"))


# -- rank statistics --------------------------------------------------------------------------
def cragg_donald(c: Core) -> Diagnostic:
    r"""Cragg-Donald (1993) minimum-eigenvalue F statistic.

    .. math:: F_{CD} = \lambda_{\min}\!\left(\hat\Sigma_{VV}^{-1/2} X'P_Z X \hat\Sigma_{VV}^{-1/2}\right) / L,
              \qquad \hat\Sigma_{VV} = V'V/(n - k - L)

    with ``V`` the first-stage residuals. For one endogenous regressor it is the first-stage F.

    References
    ----------
    Cragg, J. G. and Donald, S. G. (1993), Econometric Theory 9(2), 222-240; Stock, J. H. and
    Yogo, M. (2005), "Testing for Weak Instruments in Linear IV Regression".

    Notes
    -----
    Assumes homoskedastic errors (the same for every covariance type). Compared with the
    Stock-Yogo critical values (key ``stock_yogo``); no p-value.
    """
    c.require_first_stage_noise()
    xpx = c.YPY[1:, 1:]
    svv = c.YMY[1:, 1:] / c.df_fs
    lc = np.linalg.cholesky(svv)
    li = np.linalg.inv(lc)
    lam = np.linalg.eigvalsh(li @ xpx @ li.T)
    F = finite(lam[0] / c.L, "the Cragg-Donald F")
    r2 = lam[0] / (lam[0] + c.df_fs)  # smallest squared canonical correlation
    return Diagnostic(name="cragg_donald_f", statistic=F, covariance="unadjusted",
                      extra={"min_canonical_corr2": float(r2), "note": "compare with stock_yogo"})


def _kp_rank_stat(c: Core, meat: np.ndarray) -> float:
    """Kleibergen-Paap rk statistic for rank(Pi) = p - 1, given the meat of the scores.

    ``meat`` is the (pL x pL) meat of the scores ``u_i (x) z_i`` (ordered by endogenous
    regressor, then instrument), on the scale of sums over observations.
    """
    L, p = c.L, c.p
    rx = np.linalg.cholesky(c.YY[1:, 1:]).T  # upper, rx' rx = X'X
    theta = np.linalg.solve(rx.T, c.QY[:, 1:].T).T  # (Z'Z)^{-1/2}' Z'X rx^{-1}: canonical
    u, s, vt = np.linalg.svd(theta, full_matrices=True)
    v_last = vt[p - 1]  # right singular vector of the smallest singular value
    u_perp = u[:, p - 1:]  # left singular vectors of the L - p + 1 smallest
    lam = u_perp.T @ theta @ v_last
    # vec(Theta) = (rx^{-T} (x) R^{-T}) vec(Pi-scores); select with (v' (x) U_perp')
    a = np.linalg.solve(rx, v_last)  # rx^{-1} v
    b = c.Rinv @ u_perp  # R^{-1} U_perp
    T = np.kron(a[:, None], b)  # (pL, L-p+1)
    omega = T.T @ meat @ T
    return quad_form_inv(omega, lam, "the Kleibergen-Paap statistic")


def kleibergen_paap(c: Core, kronecker: bool | None = None) -> tuple[Diagnostic, Diagnostic]:
    r"""Kleibergen-Paap (2006) rk LM and rk Wald F statistics of rank(Pi) = p - 1.

    With :math:`\hat\Theta = (Z'Z)^{-1/2\prime} Z'X (X'X)^{-1/2} = U S V'` (the canonical
    correlations), :math:`A_\perp, B_\perp` the singular vectors of the smallest singular values
    and :math:`\lambda = A_\perp'\hat\Theta B_\perp`,

    .. math:: rk = \lambda' \left[(B_\perp' \otimes A_\perp')\, \hat V_\Theta\,
              (B_\perp \otimes A_\perp)\right]^{-1} \lambda

    where :math:`\hat V_\Theta` is the covariance of :math:`vec(\hat\Theta)` implied by the meat of
    the scores. The **LM** form uses the scores :math:`x_i \otimes z_i` (the null-restricted
    residuals when Pi = 0) and the raw meat; it is :math:`\chi^2(L - p + 1)`. The **Wald** form
    uses the first-stage residuals :math:`v_i \otimes z_i` and specflow's small-sample meat
    (``k = k_exog + L``); the reported F is Wald / L.

    References
    ----------
    Kleibergen, F. and Paap, R. (2006), "Generalized Reduced Rank Tests Using the Singular Value
    Decomposition", Journal of Econometrics 133(1), 97-126.

    Notes
    -----
    Uses the specification's covariance (robust, one- or two-way cluster, HAC). Under unadjusted
    covariance the meats are Kronecker products and the statistics reduce to Anderson's
    :math:`n\,r^2_{\min}` and the Cragg-Donald F. ``kronecker=True`` forces that form (testing).
    """
    kron = (not c.robust) if kronecker is None else kronecker
    L, p = c.L, c.p
    c.require_first_stage_noise()
    if kron:
        meat_lm = np.kron(c.YY[1:, 1:] / c.n, c.ZZ)
        meat_w = np.kron(c.YMY[1:, 1:] / c.df_fs, c.ZZ)
        cov = "unadjusted"
    else:
        meat_lm = c.block("zx", None)
        meat_w = c.M_rf[L:, L:]
        cov = c.cov
    df = L - p + 1
    lm = finite(_kp_rank_stat(c, meat_lm), "the rk LM statistic")
    wald = finite(_kp_rank_stat(c, meat_w), "the rk Wald statistic")
    d_lm = Diagnostic(name="kp_rk_lm", statistic=lm, pvalue=chi2_sf(lm, df), distribution=f"chi2({df})",
                      null="the first-stage coefficient matrix has rank p - 1 (under-identified)",
                      covariance=cov)
    d_w = Diagnostic(name="kp_rk_wald_f", statistic=wald / L, covariance=cov,
                     extra={"wald": wald, "note": "rk Wald / L; compare with stock_yogo (a heuristic "
                            "outside homoskedasticity)"})
    return d_lm, d_w


def sanderson_windmeijer(c: Core, j: int) -> Diagnostic:
    r"""Sanderson-Windmeijer (2016) conditional first-stage F for x_j (p >= 2).

    Regress x_j on the other endogenous regressors by 2SLS with instruments Z,
    :math:`\hat\delta = (X_{-j}'P_Z X_{-j})^{-1}X_{-j}'P_Z x_j`, :math:`\hat e = x_j - X_{-j}\hat\delta`, and

    .. math:: F_{j|-j} = \frac{\hat e' P_Z \hat e/(L - p + 1)}{\hat e' M_Z \hat e/(n - k - L)}
              \sim F(L - p + 1,\, n - k - L)

    References
    ----------
    Sanderson, E. and Windmeijer, F. (2016), "A Weak Instrument F-Test in Linear IV Models with
    Multiple Endogenous Variables", Journal of Econometrics 190(2), 212-221.

    Notes
    -----
    Unadjusted covariance: the formula above. Otherwise the Wald statistic of the coefficients of
    :math:`\hat e` on Z with the specification's covariance (residuals ``M_Z e``, k = k_exog + L),
    divided by ``L - p + 1``, treating :math:`\hat\delta` as known as SW do.
    """
    name = c.names[j]
    if c.p < 2:
        raise Unavailable("one endogenous regressor: the conditional F is the first-stage F")
    others = [i for i in range(c.p) if i != j]
    xpx = c.YPY[1:, 1:]
    delta = np.linalg.solve(xpx[np.ix_(others, others)], xpx[others, j])
    comb = np.zeros(c.p + 1)
    comb[j + 1] = 1.0
    comb[[i + 1 for i in others]] = -delta
    df1 = c.L - c.p + 1
    F = finite(c.rf_wald(comb, f"the conditional first stage of {name}") / df1, "the conditional F")
    df2 = c.df_fs if not c.robust else c.df_denom(c.k + c.L)
    return Diagnostic(
        name=f"sw_f:{name}", statistic=F, pvalue=f_sf(F, df1, df2), distribution=f"F({df1},{df2})",
        null=f"{name} is not identified given the other endogenous regressors", covariance=c.cov,
        extra={"delta": [float(x) for x in delta]})


# -- effective F --------------------------------------------------------------------------------
def _mop_blocks(c: Core) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """W1, W12, W2 of Montiel Olea-Pflueger in instrument coordinates with Z'Z = I."""
    L = c.L
    if not c.robust:
        om = c.omega
        eye = np.eye(L)
        return om[0, 0] * eye, om[0, 1] * eye, om[1, 1] * eye
    rinv = c.Rinv
    m = c.M_rf
    blk = lambda a, b: rinv.T @ m[a * L:(a + 1) * L, b * L:(b + 1) * L] @ rinv  # noqa: E731
    return blk(0, 0), blk(0, 1), blk(1, 1)


def _mop_crit(w2: np.ndarray, x: float, alpha: float = 0.05) -> tuple[float, float]:
    """Patnaik critical value of MOP: (c, K_eff) for the weak set mu^2/tr(W2) < x."""
    ev = np.linalg.eigvalsh((w2 + w2.T) / 2)
    tr = ev.sum()
    k_eff = tr**2 * (1 + 2 * x) / (np.sum(ev**2) + 2 * x * tr * ev.max())
    return float(stats.ncx2.ppf(1 - alpha, k_eff, x * k_eff) / k_eff), float(k_eff)


def mop_tsls_bound(w1: np.ndarray, w12: np.ndarray, w2: np.ndarray) -> float:
    r"""Montiel Olea-Pflueger's worst-case TSLS Nagar bias relative to the benchmark, B(W).

    .. math:: B(W) = \sup_{\beta, \|\psi\|=1} \frac{|tr(S_{12}) - 2\psi'S_{12}\psi|}
              {tr(S_2)\sqrt{tr(S_1)/tr(S_2)}},\quad S_1 = W_1 - 2\beta W_{12} + \beta^2 W_2,\;
              S_{12} = W_{12} - \beta W_2,\; S_2 = W_2.

    The sup over psi is attained at an extreme eigenvalue of sym(S12); the sup over beta is taken
    on the projective line (beta = center + scale tan(phi), a grid then four zoomed grids).
    """
    w12 = (w12 + w12.T) / 2
    t1, t12, t2 = np.trace(w1), np.trace(w12), np.trace(w2)
    center, scale = t12 / t2, np.sqrt(max(t1 / t2 - (t12 / t2) ** 2, 1e-12 * max(t1 / t2, 1e-300)))

    def value(phi: np.ndarray) -> np.ndarray:
        # homogeneous coordinates (cos phi, beta cos phi) keep phi = +-pi/2 (beta = inf) finite
        cph, sph = np.cos(phi), np.sin(phi)
        bc = center * cph + scale * sph  # beta * cos(phi)
        s12 = cph[:, None, None] * w12 - bc[:, None, None] * w2
        s1 = (cph**2)[:, None, None] * w1 - 2 * (cph * bc)[:, None, None] * w12 + (bc**2)[:, None, None] * w2
        ev = np.linalg.eigvalsh(s12)
        tr12 = ev.sum(axis=1)
        num = np.maximum(np.abs(tr12 - 2 * ev[:, 0]), np.abs(tr12 - 2 * ev[:, -1]))
        tr1 = np.maximum(np.trace(s1, axis1=1, axis2=2), 1e-300)
        return num / (t2 * np.sqrt(tr1 / t2))

    grid = np.linspace(-np.pi / 2, np.pi / 2, 361)
    vals = value(grid)
    i = int(np.argmax(vals))
    best = vals[i]
    lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
    for _ in range(4):  # zoom in on the grid maximum
        g = np.linspace(lo, hi, 41)
        vg = value(g)
        j = int(np.argmax(vg))
        best = max(best, vg[j])
        lo, hi = g[max(j - 1, 0)], g[min(j + 1, g.size - 1)]
    return float(best)


def effective_f(c: Core) -> Diagnostic:
    r"""Montiel Olea-Pflueger (2013) effective F and its critical values (p = 1).

    .. math:: F_{eff} = \frac{x'P_Z x}{tr(\hat W_2)}, \qquad \hat W_2 = (Z'Z)^{-1/2\prime}\,
              \hat M_{vv}\,(Z'Z)^{-1/2}

    with :math:`\hat M_{vv}` the meat of the first-stage scores :math:`z_i v_i` (specflow's
    small-sample factor, ``k = k_exog + L``). Critical values at the 5% level for a worst-case
    TSLS Nagar bias of tau (10%, 20%) of the benchmark, by Patnaik's approximation:

    .. math:: c = \chi^2_{K_{eff},\,0.95}(x K_{eff}) / K_{eff}, \quad
              K_{eff} = \frac{tr(W_2)^2 (1 + 2x)}{tr(W_2'W_2) + 2x\, tr(W_2) \lambda_{\max}(W_2)}

    with ``x = 1/tau`` (simplified procedure) or ``x = B(W)/tau`` (generalized; see
    :func:`mop_tsls_bound`).

    References
    ----------
    Montiel Olea, J. L. and Pflueger, C. (2013), "A Robust Test for Weak Instruments", JBES 31(3),
    358-369.

    Notes
    -----
    Uses the specification's covariance (unadjusted: :math:`W = \Omega \otimes I`, F_eff = F).
    In a just-identified model F_eff equals the robust first-stage F and K_eff = 1. The
    verdict ``weak_tau10`` uses the simplified critical value.
    """
    if c.p != 1:
        raise Unavailable("the effective F is defined for one endogenous regressor")
    w1, w12, w2 = _mop_blocks(c)
    F = finite(c.YPY[1, 1] / np.trace(w2), "the effective F")
    extra: dict = {"method": "simplified"}
    for tau, key in ((0.10, "10"), (0.20, "20")):
        crit, keff = _mop_crit(w2, 1.0 / tau)
        extra[f"crit_tau{key}"] = crit
        extra[f"k_eff_tau{key}"] = keff
    try:
        b = mop_tsls_bound(w1, w12, w2)
        extra["b_tsls"] = b
        for tau, key in ((0.10, "10"), (0.20, "20")):
            extra[f"crit_tau{key}_generalized"] = _mop_crit(w2, b / tau)[0]
    except (ArithmeticError, ValueError, np.linalg.LinAlgError):
        extra["crit_tau10_generalized"] = None
        extra["crit_tau20_generalized"] = None
        extra["note"] = "generalized critical values could not be computed"
    extra["weak_tau10"] = bool(F < extra["crit_tau10"])
    return Diagnostic(name="effective_f", statistic=F, covariance=c.cov,
                      null="instruments are weak: TSLS Nagar bias above tau of the benchmark", extra=extra)


# -- Stock-Yogo ---------------------------------------------------------------------------------
@lru_cache(maxsize=1)
def stock_yogo_table() -> dict[tuple[str, int, int], dict[str, float]]:
    """The shipped Stock-Yogo (2005) critical values: (table, n_endog, K2) -> {level: value}."""
    out: dict[tuple[str, int, int], dict[str, float]] = {}
    with open(_DATA, newline="") as fh:
        for row in csv.DictReader(fh):
            key = (row["table"], int(row["n_endog"]), int(row["k2"]))
            out.setdefault(key, {})[row["level"]] = float(row["critical_value"])
    return out


_SY_LABELS = {"size_2sls": "2SLS size", "bias_2sls": "2SLS bias", "size_liml": "LIML size"}


def stock_yogo(c: Core, cd: Diagnostic) -> Diagnostic:
    r"""Which Stock-Yogo (2005) weak-instrument thresholds the Cragg-Donald F exceeds.

    The critical values (shipped in ``specflow/data/stock_yogo.csv``) are for the 5% test of the
    null that the worst-case size of a nominal 5% Wald test exceeds r (2SLS and LIML), or that
    the 2SLS bias exceeds b of the OLS bias (needs L >= p + 2), for p = 1, 2 and L = 1..30.

    References
    ----------
    Stock, J. H. and Yogo, M. (2005), "Testing for Weak Instruments in Linear IV Regression", in
    Andrews and Stock (eds.), Identification and Inference for Econometric Models, 80-108.

    Notes
    -----
    The tables assume homoskedastic errors; the statistic compared is the Cragg-Donald F
    whatever the covariance (comparing a robust F with them is a heuristic).
    """
    if not cd.applicable or cd.statistic is None:
        raise Unavailable("the Cragg-Donald F is not available")
    if c.p > 2:
        raise Unavailable("the shipped Stock-Yogo tables cover one and two endogenous regressors")
    if c.L > 30:
        raise Unavailable("the Stock-Yogo tables stop at 30 instruments")
    tab = stock_yogo_table()
    extra: dict = {}
    passes = []
    for table in ("size_2sls", "bias_2sls", "size_liml"):
        vals = tab.get((table, c.p, c.L), {})
        extra[table] = dict(vals)
        for level, crit in vals.items():
            if cd.statistic > crit:
                passes.append(f"{_SY_LABELS[table]} {level}")
    if not any(extra.values()):
        raise Unavailable(f"no Stock-Yogo critical values for {c.p} endogenous and {c.L} instruments")
    extra["passes"] = passes
    if not extra["bias_2sls"]:
        extra["note"] = "the relative-bias table needs at least p + 2 instruments"
    return Diagnostic(name="stock_yogo", statistic=cd.statistic, covariance="unadjusted",
                      null="instruments are weak (Stock-Yogo)", extra=extra)
