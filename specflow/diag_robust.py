"""Weak-instrument-robust inference: the Anderson-Rubin test and set, the tF procedure and the
conditional likelihood-ratio test and set.

The confidence sets are found by exact inversion: the acceptance region of the AR test is the
set where a polynomial in beta0 is non-negative (found from the roots of a quadratic
eigenvalue problem), the tF set is an interval or the whole line, and the CLR set is bracketed
on a coarse grid of the projective line and its end points refined by Brent's method.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy import linalg, optimize, special, stats

from .diag_core import Core, Unavailable, f_sf, finite, well_conditioned
from .results import ConfidenceSet, Diagnostic


# -- Anderson-Rubin -----------------------------------------------------------------------------
def ar_statistic(c: Core, beta0: np.ndarray) -> tuple[float, int]:
    r"""The Anderson-Rubin statistic (F form) of H0: beta = beta0 and its denominator df.

    Unadjusted: :math:`AR = \frac{\tilde y' P_Z \tilde y / L}{\tilde y' M_Z \tilde y / (n-k-L)}`,
    :math:`\tilde y = y - X\beta_0`. Otherwise the Wald statistic that the coefficients of
    :math:`\tilde y` on Z are zero, with the specification's covariance, divided by L.
    """
    comb = np.concatenate([[1.0], -np.asarray(beta0, dtype=float).reshape(-1)])
    wald = c.rf_wald(comb, "the Anderson-Rubin regression")
    return wald / c.L, (c.df_fs if not c.robust else c.df_denom(c.k + c.L))


def ar_test(c: Core, beta0: np.ndarray | None = None) -> Diagnostic:
    r"""Anderson-Rubin (1949) test of H0: beta = beta0 (all coefficients jointly when p >= 2).

    .. math:: AR(\beta_0) = \frac{1}{L}\,\hat\gamma(\beta_0)'\hat V(\hat\gamma)^{-1}\hat\gamma(\beta_0)
              \sim F(L, \mathrm{df})

    where :math:`\hat\gamma(\beta_0)` are the coefficients of :math:`y - X\beta_0` on Z. With
    unadjusted covariance this is the classical F form, df = n - k - L; otherwise the Wald
    statistic with the robust / cluster / HAC covariance (k = k_exog + L) divided by L, referred
    to F(L, n - k - L), or F(L, G - 1) when clustered.

    References
    ----------
    Anderson, T. W. and Rubin, H. (1949), Annals of Mathematical Statistics 20(1), 46-63.

    Notes
    -----
    Valid however weak the instruments; it tests the coefficients and the exclusion
    restrictions jointly. ``beta0`` defaults to zero.
    """
    b0 = np.zeros(c.p) if beta0 is None else np.asarray(beta0, dtype=float).reshape(-1)
    F, df2 = ar_statistic(c, b0)
    F = finite(F, "the Anderson-Rubin statistic")
    null = "all endogenous coefficients are 0" if c.p > 1 else f"the coefficient of {c.names[0]} is {b0[0]:g}"
    note = ("F form (unadjusted)" if not c.robust
            else "Wald statistic with the specification's covariance of the reduced-form coefficients, / L, "
                 "referred to an F distribution")
    return Diagnostic(name="ar_test", statistic=F, pvalue=f_sf(F, c.L, df2), distribution=f"F({c.L},{df2})",
                      null=null, covariance=c.cov, extra={"beta0": [float(x) for x in b0], "note": note})


def _real_roots(a0: np.ndarray, a1: np.ndarray, a2: np.ndarray) -> np.ndarray:
    """Real roots t of det(A0 + t A1 + t^2 A2) = 0 (A's are L x L), via a 2L linearisation."""
    L = a0.shape[0]
    if L == 1:
        coefs = np.array([a2[0, 0], a1[0, 0], a0[0, 0]])
        nz = np.flatnonzero(np.abs(coefs) > 1e-14 * np.abs(coefs).max(initial=0.0))
        roots = np.roots(coefs[nz[0]:]) if nz.size else np.array([])
    else:
        eye, zero = np.eye(L), np.zeros((L, L))
        if np.linalg.cond(a2) < 1e10:  # companion matrix of the monic matrix polynomial
            a2i = np.linalg.inv(a2)
            roots = np.linalg.eigvals(np.block([[zero, eye], [-a2i @ a0, -a2i @ a1]]))
        else:  # leading coefficient (near) singular: generalized problem, infinite roots dropped
            roots = linalg.eigvals(np.block([[zero, eye], [-a0, -a1]]), np.block([[eye, zero], [zero, a2]]))
        roots = roots[np.isfinite(roots)]
    keep = np.abs(roots.imag) <= 1e-7 * (1.0 + np.abs(roots.real))
    return np.unique(np.round(np.sort(roots[keep].real), 12))


def _pieces_from_roots(roots: np.ndarray, accept) -> list[tuple[float | None, float | None]]:
    """Accepted pieces of the line cut at ``roots``; ``accept(t)`` is tested once per segment."""
    pts = [-np.inf, *roots.tolist(), np.inf]
    out: list[list[float]] = []
    for lo, hi in zip(pts[:-1], pts[1:]):
        if np.isinf(lo) and np.isinf(hi):
            t = 0.0
        elif np.isinf(lo):
            t = hi - max(1.0, abs(hi))
        elif np.isinf(hi):
            t = lo + max(1.0, abs(lo))
        else:
            t = 0.5 * (lo + hi)
        if accept(t):
            if out and out[-1][1] == lo:
                out[-1][1] = hi
            else:
                out.append([lo, hi])
    return [(None if np.isinf(a) else float(a), None if np.isinf(b) else float(b)) for a, b in out]


def set_kind(pieces: list[tuple[float | None, float | None]]) -> str:
    if not pieces:
        return "empty"
    if len(pieces) == 1 and pieces[0] == (None, None):
        return "whole-line"
    if len(pieces) == 1 and None not in pieces[0]:
        return "interval"
    if len(pieces) == 2 and pieces[0][0] is None and pieces[1][1] is None and pieces[0][1] is not None \
            and pieces[1][0] is not None:
        return "two-rays"
    return "union"


def ar_set(c: Core, crit: float | None = None) -> ConfidenceSet:
    r"""The Anderson-Rubin confidence set for one endogenous coefficient, by exact inversion.

    Accept beta0 when :math:`L \cdot AR(\beta_0) \le w`, :math:`w = L\,F_{1-\alpha}(L, \mathrm{df})`.
    Write :math:`h(\beta) = Z'(y - x\beta)` and :math:`M(\beta) = M_{yy} - \beta(M_{yx} + M_{xy}) +
    \beta^2 M_{xx}` for the meat of its scores; as :math:`M \succ 0`,
    :math:`h'M^{-1}h \le w \iff \det(w M(\beta) - h h') \ge 0`, a polynomial of degree 2L whose real
    roots are the eigenvalues of a 2L x 2L linearisation. Unadjusted covariance gives the scalar
    quadratic :math:`c\,\tilde y'M_Z\tilde y - \tilde y'P_Z\tilde y \ge 0`, c = w/(n-k-L).
    Each segment between roots is tested once.

    References
    ----------
    Anderson and Rubin (1949); Dufour, J.-M. (1997), Econometrica 65(6), 1365-1387 (unbounded sets);
    Mikusheva, A. (2010), "Robust Confidence Sets in the Presence of Weak Instruments", Journal of
    Econometrics (inversion by quadratic inequalities).

    Notes
    -----
    Uses the specification's covariance. The set can be an interval, two rays, the whole line,
    or empty (when the over-identifying restrictions are rejected at every beta0).
    ``crit`` overrides w (e.g. a chi2 critical value, for comparisons).
    """
    if c.p != 1:
        raise Unavailable("the AR set is computed for one endogenous regressor")
    c.require_structural_noise()
    L, df2 = c.L, (c.df_fs if not c.robust else c.df_denom(c.k + c.L))
    w = L * c.fcrit(L, df2) if crit is None else float(crit)
    b2 = c.beta_2sls[0]
    yp, ym = c.YPY, c.YMY
    scale = np.sqrt(max(ym[0, 0] - 2 * b2 * ym[0, 1] + b2**2 * ym[1, 1], 1e-300) / max(yp[1, 1], 1e-300))
    if not c.robust:
        cc = w / c.df_fs

        def quad(mat: np.ndarray) -> tuple[float, float, float]:  # coefficients of t in y~'A y~
            a, b, d = mat[0, 0], mat[0, 1], mat[1, 1]
            # y~ = (y - x b2) - scale t x
            return (a - 2 * b2 * b + b2**2 * d, -2 * scale * (b - b2 * d), scale**2 * d)

        qm, qp = quad(ym), quad(yp)
        a0, a1, a2 = (np.array([[cc * m - p]]) for m, p in zip(qm, qp))

        def accept(t: float) -> bool:
            v = np.array([1.0, -(b2 + scale * t)])
            return float(v @ yp @ v) <= cc * float(v @ ym @ v)
    else:
        hy, hx = c.ZY[:, 0], c.ZY[:, 1]
        blk = c.M_rf
        if not well_conditioned(blk, 1e-10):  # some M(beta) would be singular (e.g. too few clusters)
            raise Unavailable("the covariance of the Anderson-Rubin regression is singular")
        myy, myx, mxx = blk[:L, :L], blk[:L, L:], blk[L:, L:]
        # centre at the 2SLS estimate: beta = b2 + scale t
        h0, h1 = hy - b2 * hx, -scale * hx
        m0 = myy - b2 * (myx + myx.T) + b2**2 * mxx
        m1 = -scale * (myx + myx.T) + 2 * b2 * scale * mxx
        m2 = scale**2 * mxx
        a0 = w * m0 - np.outer(h0, h0)
        a1 = w * m1 - (np.outer(h0, h1) + np.outer(h1, h0))
        a2 = w * m2 - np.outer(h1, h1)
        norm = max(np.abs(a0).max(), np.abs(a1).max(), np.abs(a2).max(), 1e-300)
        a0, a1, a2 = a0 / norm, a1 / norm, a2 / norm

        def accept(t: float) -> bool:
            h = h0 + t * h1
            m = m0 + t * m1 + t * t * m2
            return float(h @ np.linalg.solve(m, h)) <= w
    roots = _real_roots(a0, a1, a2)
    pieces_t = _pieces_from_roots(roots, accept)
    pieces = [(None if a is None else b2 + scale * a, None if b is None else b2 + scale * b) for a, b in pieces_t]
    kind = set_kind(pieces)
    note = {"whole-line": "the instruments carry no information at this level",
            "empty": "no value is accepted: the over-identifying restrictions are rejected"}.get(kind)
    return ConfidenceSet(method="anderson-rubin", term=c.names[0], level=c.level, kind=kind, pieces=pieces,
                         covariance=c.cov, note=note)


# -- tF -----------------------------------------------------------------------------------------
def _tf_rejection(kappa: float, cval: float, f0: np.ndarray) -> np.ndarray:
    """P(F > kappa and |t| > c) at rho = 1: f ~ N(f0, 1), F = f^2, t = f (f - f0) / f0."""
    k = np.sqrt(kappa)
    d1 = np.sqrt(f0 * f0 + 4 * cval * f0)
    a1, a2 = (f0 - d1) / 2, (f0 + d1) / 2
    ndtr = special.ndtr
    p = ndtr(np.minimum(a1, -k) - f0) + ndtr(f0 - np.maximum(a2, k))
    disc = f0 * f0 - 4 * cval * f0
    inner = disc > 0
    if np.any(inner):
        d2 = np.sqrt(np.where(inner, disc, 0.0))
        b1, b2 = (f0 - d2) / 2, (f0 + d2) / 2
        add = ndtr(b2 - f0) - ndtr(np.maximum(b1, k) - f0)
        p = p + np.where(inner & (b2 > np.maximum(b1, k)), add, 0.0)
    return p


_TF_GRID = np.geomspace(1e-3, 1e3, 161)


def _tf_size(kappa: float, cval: float) -> float:
    """sup over f0 of the rejection probability of 'F > kappa and |t| > c' (rho = 1).

    The rejection probability is smooth in f0 except at kinks where an end point of the
    t-region crosses +-sqrt(kappa) (f0 = kappa/(c + k), kappa/|c - k|, k = sqrt(kappa)) or the
    inner region opens (f0 = 4c); the sup is the larger of the kink values and of a grid
    maximum refined by four rounds of zooming in.
    """
    k = np.sqrt(kappa)
    f0 = _TF_GRID
    r = _tf_rejection(kappa, cval, f0)
    i = int(np.argmax(r))
    best = r[i]
    lo, hi = f0[max(i - 1, 0)], f0[min(i + 1, f0.size - 1)]
    for _ in range(4):  # zoom in on the grid maximum
        g = np.linspace(lo, hi, 41)
        rg = _tf_rejection(kappa, cval, g)
        j = int(np.argmax(rg))
        best = max(best, rg[j])
        lo, hi = g[max(j - 1, 0)], g[min(j + 1, g.size - 1)]
    kinks = [kappa / (cval + k), 4 * cval]
    if abs(cval - k) > 1e-12:
        kinks.append(kappa / abs(cval - k))
    rk = _tf_rejection(kappa, cval, np.array(kinks))
    limit = 2 * special.ndtr(-cval)  # f0 -> infinity: the t-ratio is standard normal
    return float(max(best, rk.max(), limit))


@lru_cache(maxsize=4096)
def tf_critical_value(F: float, alpha: float = 0.05) -> float:
    r"""The tF critical value function c_alpha(F) of Lee, McCrary, Moreira and Porter (2022).

    For each F, :math:`c_\alpha(F)` is the smallest c such that the test "reject when the
    first-stage F exceeds F and |t| > c" has asymptotic size alpha:

    .. math:: \sup_{f_0} P_{f \sim N(f_0, 1)}\big(f^2 > F,\; |f(f - f_0)/f_0| > c\big) = \alpha

    evaluated at the worst-case endogeneity :math:`|\rho| = 1`, where the 2SLS t-ratio is
    :math:`t = f(f - f_0)/f_0` and ``f`` is the first-stage t-statistic. It is infinite for
    :math:`F \le z_{1-\alpha/2}^2` and equals :math:`z_{1-\alpha/2}` beyond about F = 104.7 (5%).
    The sup over f0 is a log grid then a bounded refinement; c by Brent's method.
    """
    z = float(stats.norm.ppf(1 - alpha / 2))
    if not F > z * z:
        return float("inf")
    if _tf_size(F, z) <= alpha:
        return z
    hi = 2 * z
    while _tf_size(F, hi) > alpha:
        hi *= 2
        if hi > 1e8:
            return float("inf")
    return float(optimize.brentq(lambda cv: _tf_size(F, cv) - alpha, z, hi, xtol=1e-8))


def iv_se(c: Core) -> float:
    """SE of the 2SLS estimate (p = 1) with the specification's covariance (k = k_exog + p)."""
    xpx = c.YPY[1, 1]
    if not c.robust:
        return float(np.sqrt(c.ee(c.beta_2sls) / c.df_iv / xpx))
    pi = c.Pi[:, 1]
    m = pi @ c.block("ze", c.k + c.p) @ pi  # meat of xhat_i e_i, xhat = Z pi
    return float(np.sqrt(m) / xpx)


def tf(c: Core, first_stage: Diagnostic) -> tuple[Diagnostic, ConfidenceSet]:
    r"""The tF procedure of Lee, McCrary, Moreira and Porter (2022) for one instrument.

    Reject H0: beta = 0 when :math:`|\hat\beta/se| > c_\alpha(F)`, with F the first-stage F
    computed with the specification's covariance (``first_stage``, the
    ``first_stage_f_robust`` record); the set is
    :math:`\hat\beta \pm c_\alpha(F)\, se`, unbounded (the whole line) when
    :math:`F \le z^2_{1-\alpha/2}` (3.8416 at 5%).

    References
    ----------
    Lee, D. S., McCrary, J., Moreira, M. J. and Porter, J. (2022), "Valid t-Ratio Inference for
    IV", American Economic Review 112(10), 3260-3290.

    Notes
    -----
    Defined for the just-identified 2SLS estimator (computed here; LIML and GMM coincide with it
    when L = 1, Fuller does not) and its SE with the specification's covariance. The record's
    ``statistic`` is the critical value c(F) (None when infinite); ``extra`` holds the t ratio
    for beta = 0, the SE, the adjusted SE ``se * c(F) / z`` and the decision.
    """
    if c.p != 1 or c.L != 1:
        raise Unavailable("tF is defined for one endogenous regressor and one instrument")
    if not first_stage.applicable or first_stage.statistic is None:
        raise Unavailable(f"the first-stage F is not available ({first_stage.reason})")
    c.require_structural_noise()
    first_stage_F = float(first_stage.statistic)
    b = float(c.beta_2sls[0])
    se = finite(iv_se(c), "the 2SLS standard error")
    cval = tf_critical_value(float(first_stage_F), c.alpha)
    z = float(stats.norm.ppf(1 - c.alpha / 2))
    t = b / se
    finite_c = bool(np.isfinite(cval))
    extra = {"critical_value": cval if finite_c else None, "first_stage_f": float(first_stage_F),
             "t": t, "se": se, "adjusted_se": se * cval / z if finite_c else None,
             "reject": bool(finite_c and abs(t) > cval), "estimate": b}
    if c.d.estimator == "fuller":
        extra["estimator_note"] = "tF uses the 2SLS estimate; the Fuller estimate of the fit differs"
    if finite_c:
        cs = ConfidenceSet(method="tF", term=c.names[0], level=c.level, kind="interval",
                           pieces=[(b - cval * se, b + cval * se)], covariance=c.cov)
    else:
        extra["note"] = f"first-stage F <= {z * z:.4f}: the tF set is unbounded"
        cs = ConfidenceSet(method="tF", term=c.names[0], level=c.level, kind="whole-line", pieces=[],
                           covariance=c.cov, note=extra["note"])
    d = Diagnostic(name="tf", statistic=cval if finite_c else None, covariance=c.cov,
                   null=f"the coefficient of {c.names[0]} is 0 (reject when |t| > statistic)", extra=extra)
    return d, cs


# -- CLR ----------------------------------------------------------------------------------------
_GL_X, _GL_W = np.polynomial.legendre.leggauss(64)
_GL_TH = (_GL_X + 1) * np.pi / 4
_GL_W = _GL_W * np.pi / 4


def clr_pvalue(lr: np.ndarray, qt: np.ndarray, L: int) -> np.ndarray:
    r"""P(LR > lr | Q_T = qt) under H0, by the Andrews-Moreira-Stock (2007) integral.

    .. math:: 1 - 2K \int_0^{\pi/2} F_{\chi^2_L}\!\Big(\frac{q_T + m}{1 + q_T \sin^2\theta / m}\Big)
              \cos^{L-2}\theta\, d\theta, \qquad K = \frac{\Gamma(L/2)}{\sqrt\pi\,\Gamma((L-1)/2)}

    (64-point Gauss-Legendre); for L = 1, LR = Q_S ~ chi2(1).
    """
    lr = np.atleast_1d(np.asarray(lr, dtype=float))
    qt = np.atleast_1d(np.asarray(qt, dtype=float))
    if L == 1:
        return special.chdtrc(1, np.maximum(lr, 0.0))
    m = np.maximum(lr, 1e-300)[:, None]
    arg = (qt[:, None] + m) / (1 + qt[:, None] * np.sin(_GL_TH) ** 2 / m)
    k4 = special.gamma(L / 2) / (np.sqrt(np.pi) * special.gamma((L - 1) / 2))
    integral = (special.gammainc(L / 2, arg / 2) * (np.cos(_GL_TH) ** (L - 2) * _GL_W)).sum(axis=1)
    return np.where(lr <= 0, 1.0, np.clip(1 - 2 * k4 * integral, 0.0, 1.0))


def _clr_parts(c: Core, b: np.ndarray, a: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """LR, Q_S, Q_T for homogeneous b0 = b (2, m) and a0 = a (2, m) columns."""
    om = c.omega
    c.require_structural_noise()
    if not well_conditioned(om):
        raise Unavailable("the reduced-form error covariance is singular")
    omi = np.linalg.inv(om)
    G = c.QY  # (L, 2): Z-coordinates of [y, x]
    S = (G @ b) / np.sqrt(np.einsum("im,ij,jm->m", b, om, b))
    T = (G @ (omi @ a)) / np.sqrt(np.einsum("im,ij,jm->m", a, omi, a))
    qs, qt, qst = (S * S).sum(0), (T * T).sum(0), (S * T).sum(0)
    lr = 0.5 * (qs - qt + np.sqrt(np.maximum((qs + qt) ** 2 - 4 * (qs * qt - qst**2), 0.0)))
    return lr, qs, qt


def clr_test(c: Core, beta0: float = 0.0) -> Diagnostic:
    r"""Moreira's (2003) conditional likelihood-ratio test of H0: beta = beta0 (p = 1).

    With :math:`\hat\Omega` the reduced-form error covariance of ``[y, x]``,
    :math:`b_0 = (1, -\beta_0)'`, :math:`a_0 = (\beta_0, 1)'`,
    :math:`S = (Z'Z)^{-1/2}Z'Yb_0/\sqrt{b_0'\hat\Omega b_0}`,
    :math:`T = (Z'Z)^{-1/2}Z'Y\hat\Omega^{-1}a_0/\sqrt{a_0'\hat\Omega^{-1}a_0}`,

    .. math:: LR = \tfrac12\Big(Q_S - Q_T + \sqrt{(Q_S + Q_T)^2 - 4(Q_S Q_T - Q_{ST}^2)}\Big)

    and the p-value is conditional on :math:`Q_T` (:func:`clr_pvalue`). For L = 1, LR = Q_S = AR
    in chi2 form.

    References
    ----------
    Moreira, M. J. (2003), "A Conditional Likelihood Ratio Test for Structural Models",
    Econometrica 71(4), 1027-1048; Andrews, D. W. K., Moreira, M. J. and Stock, J. H. (2007),
    "Performance of Conditional Wald Tests in IV Regression with Weak Instruments", Journal of
    Econometrics 139(1), 116-132 (the closed form of the conditional p-value).

    Notes
    -----
    Assumes homoskedastic errors (Omega = E'E/(n-k-L)) whatever the specification's covariance.
    """
    if c.p != 1:
        raise Unavailable("the CLR test is computed for one endogenous regressor")
    b = np.array([[1.0], [-beta0]])
    a = np.array([[beta0], [1.0]])
    lr, qs, qt = _clr_parts(c, b, a)
    p = float(clr_pvalue(lr, qt, c.L)[0])
    return Diagnostic(name="clr_test", statistic=finite(lr[0], "the CLR statistic"), pvalue=p,
                      distribution="LR | Q_T (conditional)", null=f"the coefficient of {c.names[0]} is {beta0:g}",
                      covariance="unadjusted",
                      extra={"q_s": float(qs[0]), "q_t": float(qt[0]),
                             "note": "assumes homoskedastic errors; p-value conditional on Q_T"})


def clr_set(c: Core, n_grid: int = 257) -> ConfidenceSet:
    r"""The CLR confidence set: {beta0 : CLR p-value(beta0) > alpha}.

    beta0 runs over the projective line as :math:`\beta_0 = \hat\beta + s\tan\varphi`,
    :math:`\varphi \in [-\pi/2, \pi/2]` (homogeneous coordinates make beta0 = +-inf a regular
    point). The p-value minus alpha is evaluated on ``n_grid`` points of phi, every sign change
    is refined by Brent's method, and the accepted phi-intervals are mapped back.

    Notes
    -----
    Homoskedastic (as :func:`clr_test`). A piece narrower than the grid spacing (pi/256 in phi)
    could be missed; under homoskedasticity the CLR set is an interval, two rays or the whole
    line (Mikusheva 2010), which this bracketing resolves.
    """
    if c.p != 1:
        raise Unavailable("the CLR set is computed for one endogenous regressor")
    bh = float(c.beta_2sls[0])
    s = float(np.sqrt(max(c.ee(c.beta_2sls) / c.df_iv, 1e-300) / max(c.YPY[1, 1], 1e-300)))

    def g(phi: np.ndarray) -> np.ndarray:
        phi = np.atleast_1d(phi)
        cph, sph = np.cos(phi), np.sin(phi)
        bc = bh * cph + s * sph  # beta0 * cos(phi)
        b = np.vstack([cph, -bc])
        a = np.vstack([bc, cph])
        lr, _, qt = _clr_parts(c, b, a)
        return clr_pvalue(lr, qt, c.L) - c.alpha

    grid = np.linspace(-np.pi / 2, np.pi / 2, n_grid)
    vals = g(grid)
    acc = vals > 0
    cuts = [float(grid[0])]
    states = [bool(acc[0])]
    for i in range(n_grid - 1):
        if acc[i] != acc[i + 1]:
            r = optimize.brentq(lambda t: g(np.array([t]))[0], grid[i], grid[i + 1], xtol=1e-13)
            cuts.append(float(r))
            states.append(bool(acc[i + 1]))
    cuts.append(float(grid[-1]))
    to_beta = lambda ph: None if abs(abs(ph) - np.pi / 2) < 1e-15 else bh + s * np.tan(ph)  # noqa: E731
    segs = [(cuts[i], cuts[i + 1]) for i in range(len(states)) if states[i]]
    pieces = [(to_beta(lo), to_beta(hi)) for lo, hi in segs]
    kind = set_kind(pieces)
    note = "homoskedastic CLR; " + ("the instruments carry no information at this level" if kind == "whole-line"
                                    else "end points by Brent's method on a bracketing grid")
    return ConfidenceSet(method="clr", term=c.names[0], level=c.level, kind=kind, pieces=pieces,
                         covariance="unadjusted", note=note)
