"""Weak-instrument and validity diagnostics as pure functions on partialled-out arrays.

The fit hands every diagnostic the same :class:`Design`: the outcome, endogenous regressors and
excluded instruments after the exogenous controls, the constant and any absorbed fixed effects
have been partialled out (Frisch-Waugh-Lovell), with regression weights already applied to the
rows. ``diagnose(design)`` returns ``(dict[str, Diagnostic], list[ConfidenceSet])``.

The statistics live in three parts, each function with its formula, reference and assumptions
in its docstring:

* :mod:`specflow.diag_strength` -- first-stage F (conventional and with the chosen covariance),
  partial and Shea R², Cragg-Donald, Kleibergen-Paap, Sanderson-Windmeijer, the effective F,
  Stock-Yogo critical values;
* :mod:`specflow.diag_robust` -- Anderson-Rubin test and set, tF, conditional likelihood ratio;
* :mod:`specflow.diag_validity` -- Sargan, Basmann, Hansen J, C statistics, Durbin, Wu-Hausman,
  control function, complier characteristics.

Shared conventions (k, small-sample factors, degrees of freedom) are described in
:mod:`specflow.diag_core`. Nothing here raises for numerical trouble: a statistic that cannot be
computed is a ``Diagnostic.not_applicable`` record saying why.

Keys of the returned dict (``<x>`` an endogenous regressor, ``<z>`` an excluded instrument):
``first_stage_f:<x>``, ``first_stage_f_robust:<x>``, ``partial_r2:<x>``, ``shea_r2:<x>``,
``sw_f:<x>``, ``cragg_donald_f``, ``kp_rk_lm``, ``kp_rk_wald_f``, ``effective_f``, ``stock_yogo``,
``ar_test``, ``tf``, ``clr_test``, ``sargan``, ``basmann``, ``hansen_j``, ``c_stat:<z>``,
``durbin``, ``wu_hausman``, ``control_function``, ``complier``. Confidence sets (p = 1):
``anderson-rubin``, ``tF`` (L = 1), ``clr``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import diag_robust as rob
from . import diag_strength as st
from . import diag_validity as val
from .diag_core import Core, attempt, guard
from .kernels import Clusters
from .results import ConfidenceSet, Diagnostic


@dataclass(frozen=True)
class Design:
    """The partialled-out IV design of one specification (all arrays weighted)."""

    y: np.ndarray  # (n,)
    X: np.ndarray  # (n, p) endogenous regressors
    Z: np.ndarray  # (n, L) excluded instruments
    k_exog: int  # columns partialled out: constant + controls + counted fixed-effect levels
    covariance: str  # "unadjusted" | "robust" | "cluster" | "hac"
    clusters: Clusters | None
    endog_names: tuple[str, ...]
    instr_names: tuple[str, ...]
    beta: np.ndarray  # (p,) the IV estimate of the chosen estimator
    estimator: str  # "2sls" | "liml" | "fuller" | "gmm"
    hac_lags: int | None = None
    level: float = 0.95
    # For complier characteristics (binary treatment and binary instrument): raw, not partialled
    raw_d: np.ndarray | None = None
    raw_z: np.ndarray | None = None
    raw_controls: np.ndarray | None = None
    control_names: tuple[str, ...] = ()
    raw_weights: np.ndarray | None = None

    @property
    def n(self) -> int:
        return int(self.y.shape[0])


def _keys(names: tuple[str, ...], instr: tuple[str, ...]) -> list[str]:
    per_x = ("first_stage_f", "first_stage_f_robust", "partial_r2", "shea_r2", "sw_f")
    keys = [f"{k}:{x}" for x in names for k in per_x]
    keys += ["cragg_donald_f", "kp_rk_lm", "kp_rk_wald_f", "effective_f", "stock_yogo", "ar_test", "tf",
             "clr_test", "sargan", "basmann", "hansen_j"]
    keys += [f"c_stat:{z}" for z in instr]
    keys += ["durbin", "wu_hausman", "control_function", "complier"]
    return keys


def diagnose(design: Design) -> tuple[dict[str, Diagnostic], list[ConfidenceSet]]:
    """Every diagnostic and weak-instrument-robust confidence set of one specification.

    Returns ``(diagnostics, confidence_sets)``; see the module docstring for the keys. A
    diagnostic that does not apply (wrong number of regressors or instruments, a singular
    covariance, too few clusters, ...) is present with ``applicable=False`` and a reason; a
    confidence set that cannot be computed is left out and the reason is recorded in the
    ``set_note`` of its test (``ar_test``, ``clr_test``).
    """
    c = Core(design)
    cov = design.covariance
    if c.problem:
        names = tuple(design.endog_names) or ("x",)
        return {k: Diagnostic.not_applicable(k, c.problem, cov) for k in _keys(names, tuple(design.instr_names))}, []

    out: dict[str, Diagnostic] = {}
    sets: list[ConfidenceSet] = []

    def put(name: str, fn) -> Diagnostic:
        out[name] = guard(name, cov, fn)
        return out[name]

    def put_many(names: list[str], fn) -> None:
        """``fn`` returns several records at once; if it fails they all carry its reason."""
        res, reason = attempt(fn)
        for nm in names:
            out[nm] = res[nm] if res is not None else Diagnostic.not_applicable(nm, reason or "", cov)

    for j, x in enumerate(c.names):
        put(f"first_stage_f:{x}", lambda j=j: st.first_stage_f(c, j))
        put(f"first_stage_f_robust:{x}", lambda j=j: st.first_stage_f_robust(c, j))
        put(f"partial_r2:{x}", lambda j=j: st.partial_r2(c, j))
        put(f"shea_r2:{x}", lambda j=j: st.shea_r2(c, j))
        put(f"sw_f:{x}", lambda j=j: st.sanderson_windmeijer(c, j))
    cd = put("cragg_donald_f", lambda: st.cragg_donald(c))
    put_many(["kp_rk_lm", "kp_rk_wald_f"], lambda: dict(zip(["kp_rk_lm", "kp_rk_wald_f"], st.kleibergen_paap(c))))
    put("effective_f", lambda: st.effective_f(c))
    put("stock_yogo", lambda: st.stock_yogo(c, cd))

    put("ar_test", lambda: rob.ar_test(c))
    _add_set(sets, out["ar_test"], c.p == 1, lambda: rob.ar_set(c))
    fs = out[f"first_stage_f_robust:{c.names[0]}"]
    tf, reason = attempt(lambda: rob.tf(c, fs))
    if tf is None:
        out["tf"] = Diagnostic.not_applicable("tf", reason or "", cov)
    else:
        out["tf"] = tf[0]
        sets.append(tf[1])
    put("clr_test", lambda: rob.clr_test(c))
    _add_set(sets, out["clr_test"], c.p == 1, lambda: rob.clr_set(c))

    put("sargan", lambda: val.sargan(c))
    put("basmann", lambda: val.basmann(c))
    put("hansen_j", lambda: val.hansen_j(c))
    put_many([f"c_stat:{z}" for z in c.instr_names], lambda: val.c_stats(c))
    put("durbin", lambda: val.durbin(c))
    put("wu_hausman", lambda: val.wu_hausman(c))
    put("control_function", lambda: val.control_function(c))
    put("complier", lambda: val.complier(c))
    return out, sets


def _add_set(sets: list[ConfidenceSet], test: Diagnostic, wanted: bool, fn) -> None:
    """Append the set ``fn()`` returns; if it cannot be computed, say why in its test's extra."""
    if not wanted:
        return
    cs, reason = attempt(fn)
    if cs is not None:
        sets.append(cs)
    elif test.applicable:
        test.extra["set_note"] = f"no confidence set: {reason}"
