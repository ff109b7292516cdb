"""The grid: baseline x axes -> frozen, fully resolved Specifications with content-hash ids.

Order is deterministic: the baseline first, then the Cartesian product of the axes in the
order the spec file lists them (each axis: its baseline label, then its variants in file
order), then the named one-off specifications. Patches of several axes apply in axis order.

A specification's id is the first 12 hex digits of the SHA-256 of its canonical content:
every value that can change its numbers (roles, estimator, covariance, sample filters, the
dataset's path, derivations and filter), and nothing else (not its labels, not key order in
the TOML file, not comments). The data's bytes are tracked separately by fingerprints.
"""

from __future__ import annotations

import hashlib
import itertools
import json
from typing import Any

from pydantic import BaseModel, ConfigDict, Field

from .errors import Problem, SpecError
from .spec import LoadedSpec, Patch

ID_LENGTH = 12


class Specification(BaseModel):
    """One fully resolved specification of the grid."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    id: str
    labels: dict[str, str] = Field(default_factory=dict)
    extra_name: str | None = None
    is_baseline: bool = False

    dataset: str
    dataset_path: str
    dataset_derive: tuple[tuple[str, str], ...] = ()
    dataset_filter: str | None = None

    outcome: str
    outcome_transform: str = "none"
    endogenous: tuple[str, ...]
    instruments: tuple[str, ...]
    controls: tuple[str, ...] = ()
    absorb: tuple[str, ...] = ()
    cluster: tuple[str, ...] = ()
    weights: str | None = None
    filters: tuple[str, ...] = ()
    constant: bool = True
    estimator: str = "2sls"
    fuller_alpha: float = 1.0
    covariance: str = "robust"
    hac_lags: int | None = None
    hac_order: str | None = None
    level: float = 0.95

    def content(self) -> dict[str, Any]:
        """The canonical content the id hashes."""
        d = self.model_dump(exclude={"id", "labels", "extra_name", "is_baseline"})
        if d["estimator"] != "fuller":
            d.pop("fuller_alpha")
        if d["covariance"] != "hac":
            d.pop("hac_lags")
            d.pop("hac_order")
        return d

    def label_text(self) -> str:
        if self.extra_name:
            return self.extra_name
        return ", ".join(f"{k}={v}" for k, v in self.labels.items()) or "baseline"

    def columns(self) -> list[str]:
        """Every data column this specification reads (roles only, before filters)."""
        cols = [self.outcome, *self.endogenous, *self.instruments, *self.controls, *self.absorb, *self.cluster]
        if self.weights:
            cols.append(self.weights)
        if self.hac_order:
            cols.append(self.hac_order)
        return list(dict.fromkeys(cols))


def spec_id(content: dict[str, Any]) -> str:
    canon = json.dumps(content, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    return hashlib.sha256(canon.encode()).hexdigest()[:ID_LENGTH]


def _canon_expr(text: str | None) -> str | None:
    if text is None:
        return None
    from . import expr

    return expr.parse(text).canonical()


def _apply(base: dict[str, Any], patch: Patch) -> dict[str, Any]:
    d = dict(base)
    ch = patch.changes()
    for key in ("data", "outcome", "outcome_transform", "estimator", "fuller_alpha", "covariance",
                "hac_lags", "hac_order", "weights"):
        if key in ch:
            d[key] = ch[key]
    if ch.get("no_weights"):
        d["weights"] = None
    for role in ("endogenous", "instruments", "controls", "absorb", "cluster"):
        if role in ch:
            d[role] = list(ch[role])
    for role in ("instruments", "controls", "absorb"):
        add, drop = ch.get(f"add_{role}"), ch.get(f"drop_{role}")
        if drop:
            d[role] = [c for c in d[role] if c not in drop]
        if add:
            d[role] = list(d[role]) + [c for c in add if c not in d[role]]
    if "filter" in ch:
        d["filters"] = [ch["filter"]]
    if ch.get("add_filter"):
        d["filters"] = list(d["filters"]) + [ch["add_filter"]]
    return d


def _resolve(loaded: LoadedSpec, d: dict[str, Any], labels: dict[str, str], extra: str | None,
             is_baseline: bool) -> Specification:
    s = loaded.spec
    ds = s.data[d["data"]]
    body = dict(
        labels=labels,
        extra_name=extra,
        is_baseline=is_baseline,
        dataset=d["data"],
        dataset_path=ds.path,
        dataset_derive=tuple((k, _canon_expr(v)) for k, v in ds.derive.items()),
        dataset_filter=_canon_expr(ds.filter),
        outcome=d["outcome"],
        outcome_transform=d["outcome_transform"],
        endogenous=tuple(d["endogenous"]),
        instruments=tuple(d["instruments"]),
        controls=tuple(d["controls"]),
        absorb=tuple(d["absorb"]),
        cluster=tuple(d["cluster"]),
        weights=d["weights"],
        filters=tuple(_canon_expr(f) for f in d["filters"] if f),
        constant=d["constant"],
        estimator=d["estimator"],
        fuller_alpha=float(d["fuller_alpha"]),
        covariance=d["covariance"],
        hac_lags=d["hac_lags"],
        hac_order=d["hac_order"],
        level=float(d["level"]),
    )
    tmp = Specification(id="", **body)
    return Specification(id=spec_id(tmp.content()), **body)


def _matches(rule: dict[str, str], labels: dict[str, str]) -> bool:
    return all(labels.get(k) == v for k, v in rule.items())


def expand(loaded: LoadedSpec) -> list[Specification]:
    """Every specification of the study, in deterministic order, duplicates removed."""
    s = loaded.spec
    m = s.model
    base = dict(
        data=m.data, outcome=m.outcome, outcome_transform=m.outcome_transform,
        endogenous=list(m.endogenous), instruments=list(m.instruments), controls=list(m.controls),
        absorb=list(m.absorb), cluster=list(m.cluster), weights=m.weights,
        filters=[m.filter] if m.filter else [], constant=m.constant, estimator=m.estimator,
        fuller_alpha=m.fuller_alpha, covariance=m.covariance, hac_lags=m.hac_lags,
        hac_order=m.hac_order, level=m.level,
    )
    axes = list(s.axes.items())
    choices = [[(a.baseline, None)] + list(a.variants.items()) for _, a in axes]
    out: list[Specification] = []
    seen: dict[str, Specification] = {}
    duplicates: list[tuple[str, str]] = []  # (dropped, the identical one kept)
    problems: list[Problem] = []
    count = 0
    for combo in itertools.product(*choices):
        labels = {name: lab for (name, _), (lab, _) in zip(axes, combo)}
        if s.grid.only and not any(_matches(r, labels) for r in s.grid.only):
            continue
        if any(_matches(r, labels) for r in s.grid.exclude):
            continue
        count += 1
        if count > s.grid.max_specifications:
            raise SpecError([loaded.problem(("grid", "max_specifications"),
                             f"the grid has more than {s.grid.max_specifications} specifications; "
                             "raise grid.max_specifications or add exclusions")])
        d = base
        for _, patch in combo:
            if patch is not None:
                d = _apply(d, patch)
        is_base = all(p is None for _, p in combo)
        sp = _resolve(loaded, d, labels, None, is_base)
        if sp.id in seen:
            duplicates.append((sp.label_text(), seen[sp.id].label_text()))
            continue
        seen[sp.id] = sp
        out.append(sp)
    if not out:
        problems.append(loaded.problem(("grid",), "the grid is empty after the include/exclude rules"))
    baseline_labels = {name: a.baseline for name, a in axes}
    for name, patch in s.extra.items():
        sp = _resolve(loaded, _apply(base, patch), dict(baseline_labels), name, False)
        if sp.id in seen:
            duplicates.append((name, seen[sp.id].label_text()))
            continue
        seen[sp.id] = sp
        out.append(sp)
    if problems:
        raise SpecError(problems)
    loaded.duplicates = duplicates
    return out


def baseline(specs: list[Specification]) -> Specification | None:
    for sp in specs:
        if sp.is_baseline:
            return sp
    return specs[0] if specs else None


def find(specs: list[Specification], ident: str) -> Specification:
    """A specification by id (or unique id prefix)."""
    hits = [sp for sp in specs if sp.id.startswith(ident)]
    if len(hits) == 1:
        return hits[0]
    from .errors import SpecflowError

    if not hits:
        raise SpecflowError(f"no specification has id '{ident}' (run 'specflow grid' to list them)")
    raise SpecflowError(f"id prefix '{ident}' matches {len(hits)} specifications; give more digits")
