"""Comparison tables: a declared ``[[table]]`` + results -> a neutral table model.

A :class:`TableData` is what every output format renders (LaTeX, Markdown, HTML): columns
(one specification each), panels of coefficient rows, statistics rows below the panels and
notes. Cells keep their values and their kind, so each renderer formats the same numbers the
same way and the notes can say why a cell reads "n.a.".

Formatting rules (shared by every format, and by the round-trip tests):

* coefficients, standard errors and intervals: ``table.digits`` decimals (default 3);
* p-values: 3 decimals, "<0.001" below 0.001;
* F statistics and critical values: 2 decimals; counts: integers;
* a statistic that does not apply reads "n.a." and the notes give the reason;
* a cell for a variable a specification does not use is empty.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from .grid import Specification
from .results import ConfidenceSet, Diagnostic, FitResult
from .spec import LoadedSpec, Table

ESTIMATOR_NAMES = {"2sls": "2SLS", "liml": "LIML", "fuller": "Fuller", "gmm": "two-step GMM", "ols": "OLS"}
SET_METHOD_NAMES = {
    "anderson-rubin": "Anderson-Rubin",
    "tF": "tF-adjusted",
    "clr": "conditional likelihood ratio",
    "wald": "Wald",
}
STAR_LEVELS = ((0.01, "***"), (0.05, "**"), (0.10, "*"))  # (common practice)
WEAK_MARK = "\u2020"  # dagger
DEFAULT_TABLE = "default"
STAT_DIGITS = 2
P_DIGITS = 3


# ---------------------------------------------------------------------------------------------
# Cells


@dataclass(frozen=True)
class Cell:
    """One table cell.

    ``kind`` is one of ``num`` (a number with ``digits`` decimals), ``int``, ``se`` (a number
    in parentheses), ``p`` (a p-value), ``set`` (a confidence set), ``text``, ``na`` (does not
    apply; ``reason`` says why) or ``blank``. ``mark`` is appended to numbers (stars, dagger).
    """

    kind: str
    value: float | int | None = None
    digits: int = 3
    text_value: str = ""
    cset: ConfidenceSet | None = None
    mark: str = ""
    reason: str = ""

    @property
    def text(self) -> str:
        """The cell as plain text (Markdown, HTML and the tests read this)."""
        return cell_text(self)


def fmt_num(x: float, digits: int) -> str:
    s = f"{x:.{digits}f}"
    if s.startswith("-") and float(s) == 0.0:  # no "-0.000"
        s = s[1:]
    return s


def fmt_p(p: float) -> str:
    return "<0.001" if p < 0.001 else fmt_num(p, P_DIGITS)


def set_pieces_text(cs: ConfidenceSet, digits: int, inf: str = "\u221e", cup: str = " \u222a ") -> str:
    """A confidence set as text: '[0.120, 0.400]', '(-inf, -1.200] U [0.300, inf)', ..."""
    return cs.describe(lambda x: fmt_num(x, digits), inf, cup)


def cell_text(c: Cell) -> str:
    if c.kind == "num":
        return fmt_num(float(c.value), c.digits) + c.mark
    if c.kind == "int":
        return str(int(c.value))
    if c.kind == "se":
        return "(" + fmt_num(float(c.value), c.digits) + ")"
    if c.kind == "p":
        return fmt_p(float(c.value))
    if c.kind == "set":
        return set_pieces_text(c.cset, c.digits)
    if c.kind == "text":
        return c.text_value
    if c.kind == "na":
        return "n.a."
    return ""


def num(x: float | None, digits: int, mark: str = "", reason: str = "not computed") -> Cell:
    if x is None or not math.isfinite(x):
        return Cell("na", reason=reason)
    return Cell("num", value=float(x), digits=digits, mark=mark)


def text(s: str) -> Cell:
    return Cell("text", text_value=s)


BLANK = Cell("blank")


# ---------------------------------------------------------------------------------------------
# Reading statistics off a result (shared with the tidy frame and the figures)


NOT_RUN = "diagnostics were not computed for this specification"


def diag(res: FitResult, key: str) -> Diagnostic:
    """The diagnostic ``key`` of a result, or a not-applicable record saying it is missing."""
    d = res.diagnostics.get(key)
    if d is not None:
        return d
    if not res.diagnostics:
        return Diagnostic.not_applicable(key, NOT_RUN)
    return Diagnostic.not_applicable(key, f"'{key}' was not computed for this specification")


def overid_key(res: FitResult) -> str:
    """Hansen J under robust/cluster/HAC covariance, Sargan under unadjusted errors."""
    return "sargan" if res.covariance == "unadjusted" else "hansen_j"


def endogeneity_key(res: FitResult) -> str:
    """The control-function test, or Durbin (then Wu-Hausman) under unadjusted errors."""
    if res.covariance == "unadjusted":
        for k in ("durbin", "wu_hausman"):
            if k in res.diagnostics:
                return k
    return "control_function"


TEST_NAMES = {"sargan": "Sargan", "hansen_j": "Hansen J", "durbin": "Durbin",
              "wu_hausman": "Wu-Hausman", "control_function": "control function"}


def weak_first_stage(res: FitResult) -> bool | None:
    """True if the effective F is below its critical value for a 10% worst-case bias.

    None when that cannot be judged (no effective F, or it does not apply).
    """
    d = res.diagnostics.get("effective_f")
    if d is None or not d.applicable or d.statistic is None:
        return None
    flag = d.extra.get("weak_tau10")
    if isinstance(flag, bool):
        return flag
    crit = d.extra.get("crit_tau10")
    if isinstance(crit, (int, float)):
        return bool(d.statistic < crit)
    return None


def estimator_text(res: FitResult | None, sp: Specification | None) -> str:
    est = (res.estimator if res and res.estimator else (sp.estimator if sp else ""))
    name = ESTIMATOR_NAMES.get(est, est)
    if est == "fuller" and sp is not None:
        name += f" (alpha = {sp.fuller_alpha:g})"
    return name


def covariance_text(res: FitResult | None, sp: Specification | None, short: bool = False) -> str:
    cov = res.covariance if res and res.covariance else (sp.covariance if sp else "")
    cluster = (res.cluster if res else []) or (list(sp.cluster) if sp else [])
    if cov == "cluster":
        return ("cluster: " if short else "clustered by ") + " and ".join(cluster)
    if cov == "robust":
        return "robust" if short else "heteroskedasticity-robust"
    if cov == "hac":
        lags = sp.hac_lags if sp is not None else None
        return "HAC (Bartlett" + (f", {lags} lags)" if lags is not None else ")")
    if cov == "unadjusted":
        return "unadjusted (homoskedastic)"
    return cov


# ---------------------------------------------------------------------------------------------
# The table model


@dataclass
class Column:
    number: int
    label: str
    group: str
    spec: Specification
    result: FitResult | None

    @property
    def status(self) -> str:
        return self.result.status if self.result is not None else "missing"

    @property
    def ok(self) -> bool:
        return self.result is not None and self.result.status == "ok"


@dataclass
class Row:
    label: str
    cells: list[Cell]
    kind: str = "stat"  # coef | se | ci | stat


@dataclass
class Panel:
    title: str
    rows: list[Row]


@dataclass
class TableData:
    name: str
    title: str
    columns: list[Column]
    panels: list[Panel]
    stats: list[Row]
    notes: list[str] = field(default_factory=list)
    digits: int = 3
    stars: bool = False
    panel_kinds: list[str] = field(default_factory=list)

    @property
    def groups(self) -> list[tuple[str, int, int]]:
        """Runs of columns sharing a group header: (group, first number, last number)."""
        runs: list[tuple[str, int, int]] = []
        for c in self.columns:
            if runs and runs[-1][0] == c.group:
                runs[-1] = (c.group, runs[-1][1], c.number)
            else:
                runs.append((c.group, c.number, c.number))
        return runs

    @property
    def has_groups(self) -> bool:
        return any(g for g, _, _ in self.groups)

    def spec_ids(self) -> list[str]:
        return [c.spec.id for c in self.columns]


class TableError(Exception):
    """A table declaration selects no specification (carries the spec problem)."""


# ---------------------------------------------------------------------------------------------
# Columns


def default_table(loaded: LoadedSpec) -> Table:
    """The baseline plus one column per variant of each axis (other axes at their baseline)."""
    cols: list[dict[str, str]] = [{}]
    for aname, axis in loaded.spec.axes.items():
        cols += [{aname: label} for label in axis.variants]
    return Table(name=DEFAULT_TABLE, title="Baseline and one change at a time", columns=cols)


def tables_of(loaded: LoadedSpec) -> list[tuple[int | None, Table]]:
    """Every table to build: the default one (unless a declaration takes its name), then the
    declared ones; each with its index in the spec file (None for the default)."""
    declared = list(enumerate(loaded.spec.table))
    out: list[tuple[int | None, Table]] = []
    if not any(t.name == DEFAULT_TABLE for _, t in declared):
        out.append((None, default_table(loaded)))
    return out + [(i, t) for i, t in declared]


def _find_spec(specs: list[Specification], want: dict[str, str], extra: str | None) -> Specification | None:
    for sp in specs:
        if sp.extra_name != extra:
            continue
        if extra is not None or all(sp.labels.get(k) == v for k, v in want.items()):
            return sp
    return None


def select_columns(loaded: LoadedSpec, table: Table, index: int | None,
                   specs: list[Specification]) -> list[tuple[str, str, Specification]]:
    """The (label, group, specification) of each column; raises SpecError if one is absent."""
    from .errors import SpecError

    axes = loaded.spec.axes
    fixed = {a: ax.baseline for a, ax in axes.items()}
    fixed.update(table.where)
    wanted: list[tuple[str, str, dict[str, str], str | None]] = []
    if table.across:
        ax = axes[table.across]
        for label in [ax.baseline, *ax.variants]:
            wanted.append((label, table.across, {**fixed, table.across: label}, None))
    elif table.columns:
        for sel in table.columns:
            if "extra" in sel:
                wanted.append((sel["extra"], "one-off", {}, sel["extra"]))
            elif not sel:
                wanted.append(("baseline", "", dict(fixed), None))
            else:
                label = " / ".join(sel.values())
                group = next(iter(sel)) if len(sel) == 1 else ""
                wanted.append((label, group, {**fixed, **sel}, None))
    else:
        wanted.append(("baseline", "", dict(fixed), None))

    out, problems = [], []
    for label, group, want, extra in wanted:
        sp = _find_spec(specs, want, extra)
        if sp is None:
            if index is None:  # the default table skips combinations the grid rules removed
                continue
            sel = ", ".join(f"{k} = {v!r}" for k, v in want.items()) if extra is None else f"extra = {extra!r}"
            problems.append(loaded.problem(
                ("table", index, "columns" if table.columns else "across"),
                f"table '{table.name}': no specification of the grid has {sel} (excluded by the "
                "grid rules, or identical to another specification and listed under its labels)"))
            continue
        out.append((label, group, sp))
    if problems:
        raise SpecError(problems)
    return out


# ---------------------------------------------------------------------------------------------
# Building


def _ranges(numbers: list[int]) -> str:
    """[1, 2, 3, 5] -> 'columns 1-3 and 5'."""
    if not numbers:
        return ""
    runs: list[list[int]] = []
    for n in sorted(numbers):
        if runs and n == runs[-1][-1] + 1:
            runs[-1].append(n)
        else:
            runs.append([n])
    parts = [f"{r[0]}-{r[-1]}" if len(r) > 1 else str(r[0]) for r in runs]
    word = "column" if len(numbers) == 1 else "columns"
    return f"{word} " + (", ".join(parts[:-1]) + " and " + parts[-1] if len(parts) > 1 else parts[0])


def _by_column(values: dict[int, str]) -> str:
    """{1: 'a', 2: 'a', 3: 'b'} -> 'a in columns 1-2; b in column 3' (or just 'a')."""
    groups: dict[str, list[int]] = {}
    for n, v in values.items():
        groups.setdefault(v, []).append(n)
    if len(groups) == 1:
        return next(iter(groups))
    return "; ".join(f"{v} in {_ranges(ns)}" for v, ns in groups.items())


class _Builder:
    def __init__(self, loaded: LoadedSpec, table: Table, columns: list[Column]):
        self.loaded = loaded
        self.t = table
        self.cols = columns
        self.d = table.digits
        self.na_notes: dict[tuple[str, str], list[int]] = {}
        self.weak = {c.number: bool(c.ok and weak_first_stage(c.result)) for c in columns}

    def label(self, name: str) -> str:
        return self.t.labels.get(name, name)

    def note_na(self, row: str, cells: list[Cell]) -> None:
        for c, cell in zip(self.cols, cells):
            if cell.kind == "na":
                self.na_notes.setdefault((row, cell.reason), []).append(c.number)

    # panels ------------------------------------------------------------------------------
    def stars(self, p: float | None) -> str:
        if not self.t.stars or p is None:
            return ""
        for level, mark in STAR_LEVELS:
            if p < level:
                return mark
        return ""

    def term_rows(self, regs: list, terms: list[str], iv: bool) -> list[Row]:
        rows: list[Row] = []
        level = None
        for c in self.cols:
            if c.spec is not None:
                level = c.spec.level
                break
        pct = f"{(level or 0.95) * 100:g}%"
        # terms no estimated column has (e.g. the instrument of a failed column) get no rows
        used = [n for n in terms if any(c.ok and reg is not None and reg.term(n) is not None
                                        for c, reg in zip(self.cols, regs))]
        terms = used or terms[:1]
        first = True
        for name in terms:
            coef, se, ci, rci, pv = [], [], [], [], []
            for c, reg in zip(self.cols, regs):
                if not c.ok:
                    coef.append(text("failed" if c.status == "failed" else "no result") if first else BLANK)
                    se.append(BLANK), ci.append(BLANK), rci.append(BLANK), pv.append(BLANK)
                    continue
                term = reg.term(name) if reg is not None else None
                if term is None or term.estimate is None:
                    coef.append(BLANK), se.append(BLANK), ci.append(BLANK), rci.append(BLANK), pv.append(BLANK)
                    continue
                mark = self.stars(term.p) + (WEAK_MARK if iv and self.weak[c.number] else "")
                coef.append(num(term.estimate, self.d, mark))
                se.append(Cell("se", value=term.se, digits=self.d) if term.se is not None
                          else Cell("na", reason="the standard error could not be computed"))
                if term.ci_low is not None and term.ci_high is not None:
                    ci.append(Cell("set", digits=self.d, cset=ConfidenceSet(
                        method="wald", term=name, level=level or 0.95, kind="interval",
                        pieces=[(term.ci_low, term.ci_high)])))
                else:
                    ci.append(Cell("na", reason="the Wald interval could not be computed"))
                pv.append(Cell("p", value=term.p) if term.p is not None
                          else Cell("na", reason="the p-value could not be computed"))
                if iv:
                    cs = c.result.robust_set(name)
                    if cs is not None:
                        rci.append(Cell("set", digits=self.d, cset=cs))
                    elif name not in c.result.endogenous:
                        rci.append(BLANK)
                    elif not c.result.diagnostics:
                        rci.append(Cell("na", reason=NOT_RUN))
                    else:
                        rci.append(Cell("na", reason=f"no weak-instrument-robust set was computed for {name}"))
            first = False
            rows.append(Row(self.label(name), coef, "coef"))
            if "se" in self.t.rows:
                rows.append(Row("", se, "se"))
            if "ci" in self.t.rows:
                rows.append(Row(f"{pct} CI (Wald)", ci, "ci"))
                self.note_na(f"{pct} CI (Wald)", ci)
            if iv and "robust_ci" in self.t.rows:
                rows.append(Row(f"{pct} robust set", rci, "ci"))
                self.note_na(f"{pct} robust set", rci)
            if "pvalue" in self.t.rows:
                rows.append(Row("p-value", pv, "stat"))
        return rows

    def default_terms(self) -> list[str]:
        if self.t.terms:
            return list(self.t.terms)
        names: list[str] = []
        for c in self.cols:
            for x in (c.result.endogenous if c.result else list(c.spec.endogenous)):
                if x not in names:
                    names.append(x)
        return names

    def panels(self) -> list[Panel]:
        out: list[Panel] = []
        terms = self.default_terms()
        ests = {c.number: estimator_text(c.result, c.spec) for c in self.cols}
        endog = self.default_terms_endog()
        instruments: list[str] = []
        for c in self.cols:
            for z in c.spec.instruments:
                if z not in instruments:
                    instruments.append(z)
        for p in self.t.panels:
            if p == "iv":
                title = "IV estimate" + (f" ({next(iter(ests.values()))})" if len(set(ests.values())) == 1 else "")
                out.append(Panel(title, self.term_rows([c.result.iv if c.ok else None for c in self.cols], terms, True)))
            elif p == "ols":
                out.append(Panel("OLS", self.term_rows([c.result.ols if c.ok else None for c in self.cols], terms, False)))
            elif p == "first_stage":
                for x in endog:
                    regs = []
                    for c in self.cols:
                        fs = [r for r in c.result.first_stages if r.dependent == x] if c.ok else []
                        regs.append(fs[0] if fs else None)
                    out.append(Panel(f"First stage (dependent variable: {self.label(x)})",
                                     self.term_rows(regs, instruments, False)))
            elif p == "reduced_form":
                outcome = next((c.spec.outcome for c in self.cols), "")
                out.append(Panel(f"Reduced form (dependent variable: {self.label(outcome)})",
                                 self.term_rows([c.result.reduced_form if c.ok else None for c in self.cols],
                                                instruments, False)))
        return out

    def default_terms_endog(self) -> list[str]:
        names: list[str] = []
        for c in self.cols:
            for x in c.spec.endogenous:
                if x not in names:
                    names.append(x)
        return names

    # statistics rows ---------------------------------------------------------------------
    def diag_row(self, label: str, key_of, kind: str = "stat", digits: int = STAT_DIGITS,
                 extra_key: str | None = None, mark_weak: bool = False) -> Row:
        cells = []
        for c in self.cols:
            if not c.ok:
                cells.append(BLANK)
                continue
            key = key_of(c.result)
            if key is None:
                cells.append(Cell("na", reason="it applies to one endogenous regressor only"))
                continue
            d = diag(c.result, key)
            if not d.applicable:
                cells.append(Cell("na", reason=d.reason or "it does not apply here"))
                continue
            value = d.extra.get(extra_key) if extra_key else (d.pvalue if kind == "p" else d.statistic)
            if not isinstance(value, (int, float)) or isinstance(value, bool) or not math.isfinite(value):
                cells.append(Cell("na", reason=f"the {label.lower()} is not available"))
            elif kind == "p":
                cells.append(Cell("p", value=float(value)))
            else:
                mark = WEAK_MARK if mark_weak and self.weak[c.number] else ""
                cells.append(num(float(value), digits, mark))
        self.note_na(label, cells)
        return Row(label, cells)

    def stats(self) -> list[Row]:
        rows: list[Row] = []
        endog = self.default_terms_endog()
        indicators_done = False
        kinds = [k for k in self.t.rows if k not in ("se", "ci", "robust_ci", "pvalue")]
        if self.t.indicators and "indicators" not in kinds:
            kinds.append("indicators")
        for kind in kinds:
            if kind in ("first_stage_f", "first_stage_f_robust"):
                robust = kind.endswith("robust")
                for x in endog:
                    label = "First-stage F" + (" (robust)" if robust else "")
                    if len(endog) > 1:
                        label += f": {self.label(x)}"
                    rows.append(self.diag_row(label, lambda r, x=x: f"{kind}:{x}" if x in r.endogenous else None))
            elif kind == "effective_f":
                rows.append(self.diag_row("Effective F", lambda r: "effective_f", mark_weak=True))
                rows.append(self.diag_row("Critical value (10% bias)", lambda r: "effective_f",
                                          extra_key="crit_tau10"))
            elif kind == "kp_rk_wald_f":
                rows.append(self.diag_row("Kleibergen-Paap Wald F", lambda r: "kp_rk_wald_f"))
            elif kind == "cragg_donald_f":
                rows.append(self.diag_row("Cragg-Donald F", lambda r: "cragg_donald_f"))
            elif kind == "overid_p":
                names = {TEST_NAMES[overid_key(c.result)] for c in self.cols if c.ok}
                label = "Overidentification p" + (f" ({names.pop()})" if len(names) == 1 else "")
                rows.append(self.diag_row(label, overid_key, kind="p"))
            elif kind == "endogeneity_p":
                names = {TEST_NAMES[endogeneity_key(c.result)] for c in self.cols if c.ok}
                label = "Endogeneity p" + (f" ({names.pop()})" if len(names) == 1 else "")
                rows.append(self.diag_row(label, endogeneity_key, kind="p"))
            elif kind == "ar_p":
                rows.append(self.diag_row("Anderson-Rubin p", lambda r: "ar_test", kind="p"))
            elif kind == "nobs":
                rows.append(Row("Observations", [Cell("int", value=c.result.nobs) if c.ok else BLANK
                                                 for c in self.cols]))
            elif kind == "clusters":
                cells = []
                for c in self.cols:
                    if not c.ok:
                        cells.append(BLANK)
                    elif c.result.n_clusters and c.result.covariance == "cluster":
                        if len(c.result.n_clusters) == 1:
                            cells.append(Cell("int", value=c.result.n_clusters[0]))
                        else:
                            cells.append(text(" x ".join(str(g) for g in c.result.n_clusters)))
                    else:
                        cells.append(Cell("na", reason="the standard errors are not clustered"))
                self.note_na("Clusters", cells)
                rows.append(Row("Clusters", cells))
            elif kind == "indicators" and not indicators_done:
                indicators_done = True
                for label, names in self.t.indicators.items():
                    cells = []
                    for c in self.cols:
                        used = set(c.result.controls if c.result else c.spec.controls) | \
                            set(c.result.absorb if c.result else c.spec.absorb)
                        have = [n in used for n in names]
                        cells.append(text("Yes" if all(have) else ("No" if not any(have) else "Partly")))
                    rows.append(Row(label, cells))
            elif kind == "estimator":
                rows.append(Row("Estimator", [text(estimator_text(c.result, c.spec)) for c in self.cols]))
            elif kind == "covariance":
                rows.append(Row("Standard errors", [text(covariance_text(c.result, c.spec, short=True)) for c in self.cols]))
        return rows

    # notes -------------------------------------------------------------------------------
    def notes(self, panels: list[Panel]) -> list[str]:
        cols = self.cols
        notes: list[str] = []
        outcome = _by_column({c.number: self.label(c.spec.outcome) for c in cols})
        notes.append(f"Each column is one specification; dependent variable: {outcome}.")
        ests = _by_column({c.number: estimator_text(c.result, c.spec) for c in cols})
        covs = _by_column({c.number: covariance_text(c.result, c.spec) for c in cols})
        notes.append(f"IV estimator: {ests}. Standard errors in parentheses are {covs}"
                     + (", intervals in brackets." if ("robust_ci" in self.t.rows or "ci" in self.t.rows) else "."))
        if "robust_ci" in self.t.rows and "iv" in self.t.panels:
            methods: dict[int, str] = {}
            for c in cols:
                if c.ok:
                    cs = c.result.robust_set()
                    if cs is not None:
                        methods[c.number] = SET_METHOD_NAMES.get(cs.method, cs.method)
            if methods:
                notes.append(
                    "Robust set: the weak-instrument-robust confidence set ("
                    + _by_column(methods) + "); it can be unbounded (a half-line, two rays or the "
                    "whole line) when the instruments are weak, and is then shown as such.")
        if self.t.stars:
            notes.append("Stars mark two-sided Wald p-values of the coefficient: * p < 0.10, "
                         "** p < 0.05, *** p < 0.01.")
        else:
            notes.append("No significance stars are shown; read precision off the standard "
                         "errors and intervals.")
        weak = [n for n, w in self.weak.items() if w]
        if weak:
            notes.append(f"{WEAK_MARK} Weak first stage in {_ranges(weak)}: the effective F "
                         "(Montiel Olea and Pflueger 2013) is below its critical value for a 10% "
                         "worst-case bias, so the Wald interval is unreliable there; rely on the "
                         "robust set.")
        elif "effective_f" in self.t.rows and any(
                c.ok and diag(c.result, "effective_f").applicable for c in cols):
            notes.append("Effective F (Montiel Olea and Pflueger 2013) with its critical value "
                         "for a 10% worst-case bias; no column falls below it.")
        merged: dict[tuple[str, tuple[int, ...]], list[str]] = {}
        for (row, reason), numbers in self.na_notes.items():
            merged.setdefault((reason, tuple(numbers)), []).append(row)
        for (reason, numbers), rows in merged.items():
            notes.append(f"n.a. ({'; '.join(rows)}; {_ranges(list(numbers))}): {reason.rstrip('.')}.")
        for c in cols:
            if c.status == "failed":
                notes.append(f"Column {c.number} could not be estimated: {c.result.reason}.")
            elif c.status == "missing":
                notes.append(f"Column {c.number} has no result on file (specification {c.spec.id} "
                             "has not been fitted).")
        notes.append("IV estimates are local to compliers (the units whose treatment the "
                     "instruments shift) and rest on the exclusion restriction, which no "
                     "statistic in this table can test.")
        if self.t.notes:
            notes.append(self.t.notes.strip())
        return notes


def build_table(loaded: LoadedSpec, table: Table, index: int | None, specs: list[Specification],
                results: dict[str, FitResult]) -> TableData:
    """Resolve one table declaration against the grid and the results."""
    picked = select_columns(loaded, table, index, specs)
    cols = [Column(i + 1, label, group, sp, results.get(sp.id)) for i, (label, group, sp) in enumerate(picked)]
    b = _Builder(loaded, table, cols)
    panels = b.panels()
    stats = b.stats()
    notes = b.notes(panels)
    return TableData(name=table.name, title=table.title or table.name, columns=cols, panels=panels,
                     stats=stats, notes=notes, digits=table.digits, stars=table.stars,
                     panel_kinds=list(table.panels))
