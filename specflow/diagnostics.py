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
from .diag_core import Core, guard
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
    covariance, too few clusters, ...) is present with ``applicable=False`` and a reason.
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

    for j, x in enumerate(c.names):
        put(f"first_stage_f:{x}", lambda j=j: st.first_stage_f(c, j))
        put(f"first_stage_f_robust:{x}", lambda j=j: st.first_stage_f_robust(c, j))
        put(f"partial_r2:{x}", lambda j=j: st.partial_r2(c, j))
        put(f"shea_r2:{x}", lambda j=j: st.shea_r2(c, j))
        put(f"sw_f:{x}", lambda j=j: st.sanderson_windmeijer(c, j))
    cd = put("cragg_donald_f", lambda: st.cragg_donald(c))
    kp = guard("kp_rk_lm", cov, lambda: _pair(st.kleibergen_paap(c)))
    if isinstance(kp, Diagnostic):  # failed: the same reason for both
        out["kp_rk_lm"] = kp
        out["kp_rk_wald_f"] = Diagnostic.not_applicable("kp_rk_wald_f", kp.reason or "", cov)
    else:
        out["kp_rk_lm"], out["kp_rk_wald_f"] = kp.items
    put("effective_f", lambda: st.effective_f(c))
    put("stock_yogo", lambda: st.stock_yogo(c, cd))

    put("ar_test", lambda: rob.ar_test(c))
    _set(sets, cov, lambda: rob.ar_set(c))
    fs = out[f"first_stage_f_robust:{c.names[0]}"]
    tf = guard("tf", cov, lambda: _pair(rob.tf(c, fs)))
    if isinstance(tf, Diagnostic):
        out["tf"] = tf
    else:
        out["tf"], tf_set = tf.items
        sets.append(tf_set)
    put("clr_test", lambda: rob.clr_test(c))
    _set(sets, cov, lambda: rob.clr_set(c))

    put("sargan", lambda: val.sargan(c))
    put("basmann", lambda: val.basmann(c))
    put("hansen_j", lambda: val.hansen_j(c))
    cs = guard("c_stat", cov, lambda: _pair(val.c_stats(c)))
    if isinstance(cs, Diagnostic):
        for z in c.instr_names:
            out[f"c_stat:{z}"] = Diagnostic.not_applicable(f"c_stat:{z}", cs.reason or "", cov)
    else:
        out.update(cs.items)
    put("durbin", lambda: val.durbin(c))
    put("wu_hausman", lambda: val.wu_hausman(c))
    put("control_function", lambda: val.control_function(c))
    put("complier", lambda: val.complier(c))
    return out, sets


class _pair:
    """Carrier so that :func:`guard` can wrap functions returning several records."""

    applicable = True

    def __init__(self, items):
        self.items = items


def _set(sets: list[ConfidenceSet], cov: str, fn) -> None:
    """Append the set ``fn()`` returns; a set that cannot be computed is simply not reported."""
    res = guard("set", cov, lambda: _pair(fn()))
    if not isinstance(res, Diagnostic):
        sets.append(res.items)
