"""The shared, precomputed pieces of every diagnostic (see :mod:`specflow.diagnostics`).

:class:`Core` is built once per specification from the :class:`~specflow.diagnostics.Design`
and holds what the individual statistics reuse: the Gram matrix of ``[y, X, Z]`` and a
Cholesky factor of ``Z'Z`` (every homoskedastic statistic is a function of these small
matrices), the 2SLS estimate and, for robust, cluster and HAC covariances, one stacked meat of
all the score series the robust statistics need (one pass over the data; each robust Wald
statistic reads its block). The numerical-trouble policy is here too: a statistic that cannot
be computed raises :class:`Unavailable` and becomes a "not applicable" record.

Conventions (those of :mod:`specflow.kernels`, so that the diagnostics agree with the fit):

* ``k_exog`` counts the partialled-out columns. A first stage or reduced form has
  ``k_exog + L`` coefficients, the structural equation ``k_exog + p``.
* Wald-type statistics use :func:`kernels.meat` with that ``k`` (HC1 ``n/(n-k)``; cluster
  ``G/(G-1)*(n-1)/(n-k)``; two-way Cameron-Gelbach-Miller, clipped to be PSD).
* Score (LM) statistics and the GMM weight matrix use the *raw* meat ``sum u_i u_i'``
  (summed within clusters), without a small-sample factor.
* F-type p-values use the denominator degrees of freedom ``n - k`` or, when clustered,
  ``G - 1`` with ``G`` the smallest number of clusters.
"""

from __future__ import annotations

from functools import cached_property
from typing import TYPE_CHECKING, Callable, TypeVar

import numpy as np
from scipy import special, stats

from . import kernels
from .results import Diagnostic

if TYPE_CHECKING:  # pragma: no cover
    from .diagnostics import Design

T = TypeVar("T")

# Errors that mean "this statistic cannot be computed here"; anything else is a bug.
NUMERICAL_ERRORS = (ArithmeticError, ValueError, np.linalg.LinAlgError)


class Unavailable(Exception):
    """Raised inside a diagnostic when it does not apply or cannot be computed."""


def attempt(fn: Callable[[], T]) -> tuple[T | None, str | None]:
    """Run ``fn``: ``(result, None)``, or ``(None, reason)`` if it does not apply or fails numerically."""
    try:
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            return fn(), None
    except Unavailable as exc:
        return None, str(exc)
    except NUMERICAL_ERRORS as exc:
        return None, f"numerical problem: {exc}"


def guard(name: str, covariance: str | None, fn: Callable[[], Diagnostic]) -> Diagnostic:
    """Run ``fn``; numerical trouble becomes ``Diagnostic.not_applicable(name, reason)``."""
    out, reason = attempt(fn)
    return out if out is not None else Diagnostic.not_applicable(name, reason or "not computed", covariance)


def finite(x: float, what: str) -> float:
    """``x`` as a float, or :class:`Unavailable` if it is not finite."""
    x = float(x)
    if not np.isfinite(x):
        raise Unavailable(f"{what} is not finite")
    return x


def safe_solve(a: np.ndarray, b: np.ndarray, what: str) -> np.ndarray:
    """Solve ``a x = b`` for a symmetric positive definite ``a``, refusing singular systems."""
    a = (a + a.T) / 2
    w = np.linalg.eigvalsh(a)
    if w.size == 0 or w[-1] <= 0 or w[0] <= 1e-12 * w[-1]:
        raise Unavailable(f"the covariance of {what} is singular")
    return np.linalg.solve(a, b)


def well_conditioned(a: np.ndarray, tol: float = 1e-12) -> bool:
    """Whether a symmetric PSD matrix is positive definite after scaling to unit diagonal."""
    d = np.diag(a)
    if not np.all(np.isfinite(a)) or np.any(d <= 0):
        return False
    w = np.linalg.eigvalsh(a / np.sqrt(np.outer(d, d)))
    return bool(w[0] > tol)


def quad_form_inv(a: np.ndarray, h: np.ndarray, what: str) -> float:
    """``h' a^{-1} h`` for a positive definite ``a``."""
    return float(h @ safe_solve(a, h, what))


def f_sf(stat: float, df1: float, df2: float) -> float:
    """Upper tail of F(df1, df2) (scipy.special directly: the stats wrappers are slow)."""
    return float(special.fdtrc(df1, df2, max(stat, 0.0)))


def chi2_sf(stat: float, df: float) -> float:
    return float(special.chdtrc(df, max(stat, 0.0)))


class Core:
    """Precomputed projections of one partialled-out design (arrays already weighted).

    Everything homoskedastic is read from the Gram matrix of ``[y, X, Z]``; everything robust
    from one stacked meat of all the score series any diagnostic needs (:attr:`meats`).
    ``problem`` is None when the design can be diagnosed at all, else the reason why not
    (then every diagnostic is "not applicable" with that reason).
    """

    def __init__(self, d: "Design"):
        self.d = d
        self.cov = d.covariance
        self.level = float(d.level)
        self.alpha = 1.0 - self.level
        self.problem: str | None = None
        try:
            y = np.asarray(d.y, dtype=float).reshape(-1)
            n = y.shape[0]
            X = np.asarray(d.X, dtype=float).reshape(n, -1)
            Z = np.asarray(d.Z, dtype=float).reshape(n, -1)
        except (TypeError, ValueError) as exc:
            self.problem = f"the design arrays do not have matching rows ({exc})"
            return
        self.y, self.X, self.Z = y, X, Z
        self.n, self.p, self.L = n, X.shape[1], Z.shape[1]
        self.k = int(d.k_exog)
        self.problem = self._check()
        if self.problem:
            return
        p, L = self.p, self.L
        blocks = (y[:, None], X, Z)  # the Gram matrix of [y X Z] without stacking n rows again
        G = np.block([[a.T @ b for b in blocks] for a in blocks])
        if not np.all(np.isfinite(G)):  # a missing or infinite value anywhere reaches G
            self.problem = "the design contains missing or infinite values"
            return
        if np.any(np.diag(G)[1:] <= 0):
            self.problem = "a regressor or instrument has no variation once the controls are partialled out"
            return
        if G[0, 0] <= 0:
            self.problem = "the outcome has no variation once the controls are partialled out"
            return
        self.G = G
        zz = G[p + 1:, p + 1:]
        self.ZZ = zz
        self.ZY = G[p + 1:, :p + 1]  # Z'[y X]
        self.YY = G[:p + 1, :p + 1]  # [y X]'[y X]
        scale = np.sqrt(np.diag(zz))
        gs = zz / np.outer(scale, scale)
        ev = np.linalg.eigvalsh(gs)
        if ev[0] <= 1e-12 * ev[-1]:
            self.problem = "the excluded instruments are collinear once the controls are partialled out"
            return
        self.R = np.linalg.cholesky(gs).T * scale  # upper triangular, R'R = Z'Z
        self.Rinv = np.linalg.inv(self.R)
        self.QY = self.Rinv.T @ self.ZY  # (L, p+1): [y X] in an orthonormal basis of span(Z)
        self.df_fs = n - self.k - L  # residual df of a first stage / reduced form
        self.df_iv = n - self.k - p  # residual df of the structural equation

    # -- validation --------------------------------------------------------------------------
    def _check(self) -> str | None:
        d, n, p, L = self.d, self.n, self.p, self.L
        if p < 1:
            return "there is no endogenous regressor"
        if L < 1:
            return "there is no excluded instrument"
        if L < p:
            return f"under-identified: {L} instrument(s) for {p} endogenous regressor(s)"
        if d.covariance not in kernels.COV_TYPES:
            return f"unknown covariance type {d.covariance!r}"
        if d.covariance == "cluster" and d.clusters is None:
            return "cluster covariance requested but no cluster codes were given"
        if d.covariance == "cluster" and d.clusters.codes.shape[0] != n:
            return "the cluster codes do not have one row per observation"
        if d.covariance == "cluster" and d.clusters.min_count < 2:
            return "fewer than two clusters"
        if n - self.k - L < 1:
            return f"no residual degrees of freedom (n = {n}, {self.k} partialled-out columns, {L} instruments)"
        return None

    # -- small helpers -----------------------------------------------------------------------
    @property
    def names(self) -> tuple[str, ...]:
        names = tuple(self.d.endog_names)
        return names if len(names) == self.p else tuple(f"x{j + 1}" for j in range(self.p))

    @property
    def instr_names(self) -> tuple[str, ...]:
        names = tuple(self.d.instr_names)
        return names if len(names) == self.L else tuple(f"z{j + 1}" for j in range(self.L))

    @property
    def robust(self) -> bool:
        return self.cov != "unadjusted"

    def df_denom(self, k_used: int) -> int:
        """Denominator degrees of freedom for an F reference distribution."""
        if self.cov == "cluster":
            return int(self.d.clusters.min_count) - 1
        return self.n - k_used

    def fcrit(self, df1: float, df2: float) -> float:
        return float(stats.f.ppf(self.level, df1, df2))

    # -- homoskedastic pieces ----------------------------------------------------------------
    @cached_property
    def YPY(self) -> np.ndarray:
        """``[y X]' P_Z [y X]``, (p+1) x (p+1)."""
        return self.QY.T @ self.QY

    @cached_property
    def YMY(self) -> np.ndarray:
        """``[y X]' M_Z [y X]``, (p+1) x (p+1)."""
        m = self.YY - self.YPY
        return (m + m.T) / 2

    @cached_property
    def omega(self) -> np.ndarray:
        """Homoskedastic reduced-form error covariance ``E'E / (n - k - L)``."""
        return self.YMY / self.df_fs

    @cached_property
    def Pi(self) -> np.ndarray:
        """Coefficients of ``[y X]`` on ``Z``, (L, p+1)."""
        return self.Rinv @ self.QY

    @cached_property
    def E(self) -> np.ndarray:
        """Reduced-form / first-stage residuals ``[e_y, V]``, (n, p+1)."""
        return np.column_stack([self.y, self.X]) - self.Z @ self.Pi

    @cached_property
    def beta_2sls(self) -> np.ndarray:
        """The 2SLS estimate computed here (Sargan, Durbin, tF, C use 2SLS by definition)."""
        return safe_solve(self.YPY[1:, 1:], self.YPY[1:, 0], "the projected endogenous regressors")

    @cached_property
    def e_2sls(self) -> np.ndarray:
        return self.y - self.X @ self.beta_2sls

    def require_structural_noise(self) -> None:
        """Refuse statistics of the structural residuals when they are (numerically) zero."""
        if self.ee(self.beta_2sls) <= 1e-13 * self.YY[0, 0]:
            raise Unavailable("the outcome is an exact linear function of the endogenous regressors")

    def require_first_stage_noise(self) -> None:
        """Refuse statistics that divide by the first-stage residual covariance when it is singular."""
        scale = np.sqrt(np.diag(self.YY[1:, 1:]))  # relative to X'X: 1 - largest canonical correlation
        if np.linalg.eigvalsh(self.YMY[1:, 1:] / np.outer(scale, scale))[0] <= 1e-12:
            raise Unavailable("an endogenous regressor is an exact linear function of the instruments")

    def ee(self, beta: np.ndarray) -> float:
        """``(y - X beta)'(y - X beta)`` from the Gram matrix."""
        v = np.concatenate([[1.0], -np.asarray(beta, dtype=float)])
        return float(v @ self.YY @ v)

    # -- robust pieces -----------------------------------------------------------------------
    @cached_property
    def cf(self) -> tuple[np.ndarray, np.ndarray]:
        """Control-function regression of y on [X, V]: (coefficients, residuals)."""
        A = np.column_stack([self.X, self.E[:, 1:]])
        coef = safe_solve(A.T @ A, A.T @ self.y, "the control-function regressors")
        return coef, self.y - A @ coef

    @cached_property
    def _score_blocks(self) -> tuple[list[tuple[np.ndarray, np.ndarray]], dict[str, slice], int]:
        """Every score series a robust diagnostic uses, as (left, right) factors: the scores of
        a block are ``left * right[:, None]``, stacked column-wise in the order listed.

        ``rf``: ``z*e_y, z*v_1, ..., z*v_p`` (reduced form; blocks by column of [y, X]);
        ``zx``: ``z*x_1, ..., z*x_p`` (the Kleibergen-Paap LM scores); ``ze``: ``z*e`` at the
        2SLS residuals (GMM weight, C statistics and, as ``xhat*e = Pi'(z*e)``, the 2SLS SE);
        ``cf``: ``[X, V]*u`` of the control-function regression.
        Returns (factors, column slice of each block, total width).
        """
        p = self.p
        Z, E = self.Z, self.E
        parts: list[tuple[str, np.ndarray, np.ndarray]] = []  # (name, left, right)
        parts += [("rf", Z, E[:, a]) for a in range(p + 1)]
        parts += [("zx", Z, self.X[:, j]) for j in range(p)]
        try:
            e = self.e_2sls
            parts += [("ze", Z, e)]
        except Unavailable:
            pass
        try:
            _, u = self.cf
            parts += [("cf", np.column_stack([self.X, E[:, 1:]]), u)]
        except Unavailable:
            pass
        index: dict[str, slice] = {}
        at = 0
        for name, left, _ in parts:
            w = left.shape[1]
            start = index[name].start if name in index else at
            index[name] = slice(start, at + w)
            at += w
        return [(left, right) for _, left, right in parts], index, at

    def _scores(self, rows: slice) -> np.ndarray:
        """The stacked score matrix on a range of rows."""
        factors, _, width = self._score_blocks
        lo, hi, _ = rows.indices(self.n)
        S = np.empty((hi - lo, width))
        at = 0
        for left, right in factors:
            w = left.shape[1]
            np.multiply(left[rows], right[rows, None], out=S[:, at:at + w])
            at += w
        return S

    CHUNK = 262_144  # rows of scores held at once (robust and cluster meats are sums over rows)

    @cached_property
    def meats(self) -> tuple[np.ndarray, np.ndarray]:
        """(meat with k = 0 by :func:`kernels.meat`, raw meat) of the stacked scores.

        Robust and clustered meats are accumulated over row chunks, so the n x m score matrix
        is never held whole; the HAC meat needs neighbouring rows and is formed in one piece.
        """
        cl, n = self.d.clusters, self.n
        if self.cov == "hac" or (self.cov == "cluster" and cl is None):
            S = self._scores(slice(0, n))
            m0 = kernels.meat(S, self.cov, cl, k=0, hac_lags=self.d.hac_lags)
            return m0, m0
        chunks = [slice(i, min(i + self.CHUNK, n)) for i in range(0, n, self.CHUNK)]
        if self.cov == "cluster":
            groups = [cl.codes[:, j] for j in range(cl.ndim)]
            if cl.ndim == 2:
                groups.append(cl.intersection())
            sizes = [int(codes.max()) + 1 for codes in groups]
            sums = [None] * len(groups)
            for rows in chunks:
                S = self._scores(rows)
                for i, codes in enumerate(groups):
                    g = kernels.group_sum(S, codes[rows], sizes[i])
                    sums[i] = g if sums[i] is None else sums[i] + g
            parts = [(s.T @ s, s.shape[0]) for s in sums]
            if cl.ndim == 1:
                raw = parts[0][0]
            else:
                raw = parts[0][0] + parts[1][0] - parts[2][0]
            factor = lambda g: (g / (g - 1.0)) * ((n - 1.0) / n)  # noqa: E731 - kernels' with k = 0
            signs = (1.0, 1.0, -1.0)
            m0 = sum(sign * factor(gc) * m for sign, (m, gc) in zip(signs, parts))
            return m0, raw
        raw = None  # robust: kernels' factor n/(n - 0) = 1
        for rows in chunks:
            S = self._scores(rows)
            raw = S.T @ S if raw is None else raw + S.T @ S
        return raw, raw

    def block(self, a: str, k: int | None, b: str | None = None) -> np.ndarray:
        """Meat between score blocks ``a`` and ``b`` (default ``a``).

        ``k`` given: specflow's small-sample factor for k coefficients (kernels' factor with
        k = 0 times ``n / (n - k)``, which is its factor with k for every covariance type);
        ``k`` None: the raw meat. Two-way cluster blocks are clipped to be PSD.
        """
        _, index, _ = self._score_blocks
        if a not in index or (b is not None and b not in index):
            raise Unavailable("the scores of this statistic could not be formed")
        ia, ib = index[a], index[b or a]
        m0, raw = self.meats
        m = raw[ia, ib] if k is None else m0[ia, ib] * (self.n / (self.n - k))
        if b is None:
            m = (m + m.T) / 2
            if self.cov == "cluster" and self.d.clusters.ndim == 2:
                m, _ = kernels.psd_clip(m)
        return m

    @cached_property
    def M_rf(self) -> np.ndarray:
        """Meat of the reduced-form scores ``[z*e_y, z*v_1, ..., z*v_p]`` with k = k_exog + L.

        Shape ``(p+1)L x (p+1)L``; block ``(a, b)`` is the meat between column ``a`` and ``b`` of
        ``[y, X]``. Only for robust, cluster and hac covariance.
        """
        return self.block("rf", self.k + self.L)

    def rf_meat(self, c: np.ndarray) -> np.ndarray:
        """Meat (L x L) of the scores ``z_i * (E_i c)`` for a combination ``c`` of ``[y, X]``."""
        P1, L = self.p + 1, self.L
        m = self.M_rf.reshape(P1, L, P1, L)
        return np.einsum("a,aibj,b->ij", c, m, c)

    def rf_wald(self, c: np.ndarray, what: str) -> float:
        """Wald statistic that the coefficients of ``[y X] c`` on ``Z`` are all zero.

        Unadjusted: ``c'[Y'P_Z Y]c / (c' Omega c)``; otherwise ``h' M(c)^{-1} h`` with
        ``h = Z'[y X]c`` and ``M(c)`` the meat of its reduced-form scores.
        """
        c = np.asarray(c, dtype=float)
        if not self.robust:
            den = float(c @ self.omega @ c)
            if den <= 0:
                raise Unavailable(f"the residual variance of {what} is zero")
            return float(c @ self.YPY @ c) / den
        h = self.ZY @ c
        return quad_form_inv(self.rf_meat(c), h, what)
