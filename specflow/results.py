"""The FitResult schema: what one fitted specification leaves behind, as JSON.

Every number a table, figure or replication check shows comes from these models. They are
plain pydantic v2 models with no behaviour beyond (de)serialisation, so the collator can read
results without importing any fitting code.

Conventions
-----------
* Infinite bounds (an unbounded confidence set) are stored as ``None`` and the set's ``kind``
  says which shape it has; JSON never carries ``Infinity`` or ``NaN``.
* A statistic that cannot be computed is a :class:`Diagnostic` with ``applicable=False`` and a
  ``reason``, never a zero or a blank.
"""

from __future__ import annotations

import math
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_serializer

SCHEMA_VERSION = 1


def _clean(x: float | None) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=False)


class Term(_Model):
    """One coefficient of one regression."""

    name: str
    estimate: float | None
    se: float | None
    t: float | None
    p: float | None
    ci_low: float | None
    ci_high: float | None

    @field_serializer("estimate", "se", "t", "p", "ci_low", "ci_high")
    def _ser(self, v: float | None) -> float | None:
        return _clean(v)


class Regression(_Model):
    """One regression of the specification: the IV fit, OLS, a first stage or the reduced form."""

    role: Literal["iv", "ols", "first_stage", "reduced_form"]
    dependent: str
    estimator: str
    covariance: str
    terms: list[Term]
    nobs: int
    df_resid: int
    r2: float | None = None
    kappa: float | None = None  # k-class parameter (LIML/Fuller); None for OLS/2SLS/GMM

    @field_serializer("r2", "kappa")
    def _ser(self, v: float | None) -> float | None:
        return _clean(v)

    def term(self, name: str) -> Term | None:
        for t in self.terms:
            if t.name == name:
                return t
        return None


class Diagnostic(_Model):
    """The uniform record of one test or statistic.

    ``statistic`` is the value; ``distribution`` names the reference distribution of the test
    ("chi2(2)", "F(1,398)") or is None for a descriptive statistic; ``covariance`` is the
    covariance the statistic used ("unadjusted", "robust", "cluster", ...). ``extra`` holds
    named sub-values (critical values, per-instrument parts). When ``applicable`` is False,
    ``reason`` says why and the numbers are None.
    """

    name: str
    statistic: float | None = None
    pvalue: float | None = None
    distribution: str | None = None
    null: str | None = None
    covariance: str | None = None
    applicable: bool = True
    reason: str | None = None
    extra: dict[str, Any] = Field(default_factory=dict)

    @field_serializer("statistic", "pvalue")
    def _ser(self, v: float | None) -> float | None:
        return _clean(v)

    @field_serializer("extra")
    def _ser_extra(self, v: dict[str, Any]) -> dict[str, Any]:
        return _clean_tree(v)

    @classmethod
    def not_applicable(cls, name: str, reason: str, covariance: str | None = None) -> "Diagnostic":
        return cls(name=name, applicable=False, reason=reason, covariance=covariance)


class ConfidenceSet(_Model):
    """A confidence set for one coefficient; possibly unbounded or disconnected.

    ``kind`` is one of:
      * ``interval``   -- one bounded interval ``[lo, hi]``;
      * ``two-rays``   -- ``(-inf, a] U [b, inf)``;
      * ``whole-line`` -- every value (the data carry no information at this level);
      * ``empty``      -- no value is accepted (possible for AR sets in over-identified models);
      * ``union``      -- any other finite union of intervals (pieces listed).
    ``pieces`` lists the closed pieces in increasing order, ``None`` standing for -inf / +inf.
    """

    method: str  # "wald", "anderson-rubin", "tF", "clr"
    term: str
    level: float
    kind: Literal["interval", "two-rays", "whole-line", "empty", "union"]
    pieces: list[tuple[float | None, float | None]] = Field(default_factory=list)
    covariance: str | None = None
    note: str | None = None

    @field_serializer("pieces")
    def _ser(self, v: list[tuple[float | None, float | None]]) -> list[list[float | None]]:
        return [[_clean(a), _clean(b)] for a, b in v]

    def describe(self, fmt: Any = "{:.3f}", inf: str = "inf", cup: str = " U ") -> str:
        """Text for the set: '[0.12, 0.40]', '(-inf, -1.2] U [0.3, inf)', '(-inf, inf)', 'empty'.

        ``fmt`` is a format string or a function of one number; ``inf`` and ``cup`` are the
        symbols for infinity and union (e.g. LaTeX's ``\\infty`` and ``\\cup``).
        """
        num = fmt.format if isinstance(fmt, str) else fmt
        if self.kind == "whole-line":
            return f"(-{inf}, {inf})"
        if self.kind == "empty":
            return "empty"
        parts = []
        for lo, hi in self.pieces:
            a = f"(-{inf}" if lo is None else "[" + num(lo)
            b = f"{inf})" if hi is None else num(hi) + "]"
            parts.append(f"{a}, {b}")
        return cup.join(parts)


class FitResult(_Model):
    """Everything one specification's fit produced.

    ``status`` is "ok" or "failed"; a failed result carries ``reason`` and whatever was
    computed before the failure (often nothing).
    """

    schema_version: int = SCHEMA_VERSION
    spec_id: str
    labels: dict[str, str] = Field(default_factory=dict)
    extra_name: str | None = None
    status: Literal["ok", "failed"] = "ok"
    reason: str | None = None
    warnings: list[str] = Field(default_factory=list)

    dataset: str = ""
    outcome: str = ""
    endogenous: list[str] = Field(default_factory=list)
    instruments: list[str] = Field(default_factory=list)
    controls: list[str] = Field(default_factory=list)
    absorb: list[str] = Field(default_factory=list)
    cluster: list[str] = Field(default_factory=list)
    weights: str | None = None
    estimator: str = ""
    covariance: str = ""

    nobs: int = 0
    n_dropped_missing: int = 0
    n_dropped_singletons: int = 0
    n_clusters: list[int] = Field(default_factory=list)
    df_absorbed: int = 0  # fixed-effect levels counted against the residual df

    iv: Regression | None = None
    ols: Regression | None = None
    first_stages: list[Regression] = Field(default_factory=list)
    reduced_form: Regression | None = None

    diagnostics: dict[str, Diagnostic] = Field(default_factory=dict)
    confidence_sets: list[ConfidenceSet] = Field(default_factory=list)

    timing: dict[str, float] = Field(default_factory=dict)
    specflow_version: str = ""

    @field_serializer("timing")
    def _ser_timing(self, v: dict[str, float]) -> dict[str, float | None]:
        return {k: _clean(x) for k, x in v.items()}

    # convenience ---------------------------------------------------------------------------
    def headline(self) -> Term | None:
        """The IV coefficient of the first endogenous regressor."""
        if self.iv is None or not self.endogenous:
            return None
        return self.iv.term(self.endogenous[0])

    def robust_set(self, term: str | None = None) -> ConfidenceSet | None:
        """The weak-instrument-robust set shown by default: AR if present, else tF."""
        term = term or (self.endogenous[0] if self.endogenous else None)
        for method in ("anderson-rubin", "tF"):
            for cs in self.confidence_sets:
                if cs.method == method and cs.term == term:
                    return cs
        return None


class Batch(_Model):
    """The content of one fit job's output file: the FitResults of one batch."""

    schema_version: int = SCHEMA_VERSION
    batch: str
    results: list[FitResult]


def _clean_tree(v: Any) -> Any:
    if isinstance(v, float):
        return _clean(v)
    if isinstance(v, dict):
        return {k: _clean_tree(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_clean_tree(x) for x in v]
    return v


def dump_results(results: list[FitResult]) -> str:
    import json

    return json.dumps([r.model_dump(mode="json") for r in results], indent=1, sort_keys=True)
