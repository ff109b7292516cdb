"""Readable plain-text summaries of one fit (``specflow fit``)."""

from __future__ import annotations

from .grid import Specification
from .results import FitResult, Regression

CAUTION = ("Cautions: the IV estimate is a local average effect for compliers (units whose "
           "treatment the instruments move); it rests on the exclusion restriction, which no "
           "statistic here can test.")


def _num(x: float | None, digits: int = 4) -> str:
    if x is None:
        return "n/a"
    if abs(x) >= 1e5 or (0 < abs(x) < 1e-4):
        return f"{x:.{digits}g}"
    return f"{x:.{digits}f}"


def _reg_block(reg: Regression, title: str) -> list[str]:
    lines = [f"{title}  (dependent: {reg.dependent}; N = {reg.nobs}; covariance: {reg.covariance})"]
    w = max([len(t.name) for t in reg.terms] + [4])
    lines.append(f"  {'term'.ljust(w)}  {'estimate':>11} {'SE':>10} {'t':>8} {'p':>7}   95% CI")
    for t in reg.terms:
        lines.append(f"  {t.name.ljust(w)}  {_num(t.estimate):>11} {_num(t.se):>10} {_num(t.t, 2):>8} "
                     f"{_num(t.p, 3):>7}   [{_num(t.ci_low)}, {_num(t.ci_high)}]")
    if reg.kappa is not None:
        lines.append(f"  k-class kappa = {_num(reg.kappa, 6)}")
    return lines


GROUPS = [
    ("Instrument strength", ("first_stage_f", "partial_r2", "shea_r2", "sw_f", "cragg_donald_f",
                             "kp_rk", "effective_f", "stock_yogo")),
    ("Weak-instrument-robust tests", ("ar_test", "tf", "clr_test")),
    ("Overidentification (tests of the instruments' mutual consistency, not of their exclusion)",
     ("sargan", "basmann", "hansen_j", "c_stat")),
    ("Endogeneity", ("durbin", "wu_hausman", "control_function")),
]


def _groups(diags: dict) -> list[tuple[str, list[str]]]:
    out, used = [], set()
    for title, prefixes in GROUPS:
        keys = [k for k in diags if k.split(":")[0].startswith(prefixes) and k not in used]
        used.update(keys)
        if keys:
            out.append((title, keys))
    rest = [k for k in diags if k not in used]
    if rest:
        out.append(("Other", rest))
    return out


def _value(v) -> str:
    if isinstance(v, float):
        return _num(v)
    if isinstance(v, (list, tuple)):
        return ", ".join(_value(x) for x in v) or "none"
    if isinstance(v, dict):
        return "; ".join(f"{k} {_value(x)}" for k, x in v.items()) or "none"
    return str(v)


def _diag_lines(key: str, d, w: int) -> list[str]:
    if not d.applicable:
        return [f"  {key.ljust(w)}  not applicable: {d.reason}"]
    pv = f"  p = {_num(d.pvalue, 4)}" if d.pvalue is not None else ""
    dist = f"  ~ {d.distribution}" if d.distribution else ""
    cov = f"  [{d.covariance}]" if d.covariance else ""
    out = [f"  {key.ljust(w)}  {_num(d.statistic)}{dist}{pv}{cov}"]
    for k, v in d.extra.items():
        if k != "note" and v is not None:
            out.append(f"  {''.ljust(w)}    {k}: {_value(v)}")
    return out


def describe_fit(sp: Specification, res: FitResult) -> str:
    lines = [f"specification {sp.id}: {sp.label_text()}",
             f"  estimator {sp.estimator}, covariance {sp.covariance}"
             + (f" (clusters: {', '.join(f'{c} = {g}' for c, g in zip(sp.cluster, res.n_clusters))})" if res.n_clusters else ""),
             f"  outcome {sp.outcome}; endogenous {', '.join(sp.endogenous)}; instruments {', '.join(sp.instruments)}",
             f"  controls {', '.join(sp.controls) or '-'}; absorbed {', '.join(sp.absorb) or '-'}"]
    if res.status != "ok":
        lines.append(f"FAILED: {res.reason}")
        lines += [f"  warning: {w}" for w in res.warnings]
        return "\n".join(lines)
    lines.append(f"  N = {res.nobs}; dropped for missing values {res.n_dropped_missing}; "
                 f"singletons {res.n_dropped_singletons}; absorbed levels counted {res.df_absorbed}")
    lines.append("")
    lines += _reg_block(res.iv, f"IV ({sp.estimator.upper()})")
    lines.append("")
    lines += _reg_block(res.ols, "OLS")
    for fs in res.first_stages:
        lines.append("")
        lines += _reg_block(fs, "First stage")
    lines.append("")
    lines += _reg_block(res.reduced_form, "Reduced form")
    if res.confidence_sets:
        lines += ["", "Confidence sets for the endogenous coefficient(s):"]
        for cs in res.confidence_sets:
            lines.append(f"  {cs.method:<15} {cs.term}: {cs.describe()}  ({cs.level:.0%}, {cs.covariance or ''})")
    if res.diagnostics:
        w = max(len(k) for k in res.diagnostics)
        for title, keys in _groups(res.diagnostics):
            lines += ["", f"{title}:"]
            for key in keys:
                lines += _diag_lines(key, res.diagnostics[key], w)
    ef = res.diagnostics.get("effective_f")
    if ef is not None and ef.applicable and ef.extra.get("weak_tau10"):
        lines += ["", "WEAK INSTRUMENTS: the effective F is below its critical value for a 10% "
                  "worst-case bias; rely on the weak-instrument-robust sets above, not the Wald interval."]
    if res.warnings:
        lines += [""] + [f"warning: {x}" for x in res.warnings]
    lines += ["", CAUTION]
    return "\n".join(lines)
