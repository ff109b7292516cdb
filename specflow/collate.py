"""The collator: results on disk -> the exhibits of a paper.

``build_all`` reads only the spec and the fit results (``O/fits/*.json``), so restyling a table
never refits anything. It writes, under the study's output folder ``O``:

* ``estimates.csv`` / ``estimates.parquet`` -- the tidy results (:func:`tidy_frame`);
* ``tables/<name>.tex`` (a fragment for ``\\input``), ``tables/<name>.standalone.tex`` (a
  compilable document) and ``tables/<name>.md`` for the default table and each ``[[table]]``;
* ``figures/spec_curve.pdf|png`` and ``figures/coef_<table>.pdf|png``;
* ``exhibits.json`` -- which specifications each table and figure shows;
* ``report.html`` -- one self-contained page with all of it.

Every file is written atomically and deterministically: the same results give the same bytes.
"""

from __future__ import annotations

import io
import json
import math
import re
import unicodedata
from pathlib import Path

import pandas as pd

from .grid import Specification
from .results import Batch, FitResult
from .spec import LoadedSpec
from .tables import (
    NOT_RUN, TEST_NAMES, WEAK_MARK, Cell, TableData, build_table, diag, endogeneity_key, fmt_num,
    fmt_p, overid_key, set_pieces_text, tables_of, weak_first_stage,
)

# ---------------------------------------------------------------------------------------------
# Reading results


def load_results(out_dir: Path) -> list[FitResult]:
    """Every FitResult in ``out_dir/fits/*.json`` (each file a :class:`results.Batch`).

    Files are read in name order; a specification found in several files keeps its last
    result. A file that is not a valid batch raises :class:`RunError` naming it.
    """
    from .errors import RunError

    found: dict[str, FitResult] = {}
    for path in sorted((Path(out_dir) / "fits").glob("*.json")):
        try:
            batch = Batch.model_validate_json(path.read_bytes())
        except ValueError as exc:
            first = str(exc).splitlines()[0]
            raise RunError(f"{path}: not a specflow result batch ({first})") from None
        for r in batch.results:
            found[r.spec_id] = r
    return list(found.values())


def results_by_id(specs: list[Specification], results: list[FitResult]) -> dict[str, FitResult]:
    """The results of the current grid's specifications (stale results are ignored)."""
    ids = {sp.id for sp in specs}
    return {r.spec_id: r for r in results if r.spec_id in ids}


# ---------------------------------------------------------------------------------------------
# The tidy frame

AXIS_PREFIX = "axis_"


def _bounds(cs) -> tuple[float, float]:
    """Lower and upper bound of a set that is one piece (or the whole line); NaN otherwise."""
    if cs.kind == "whole-line":
        return -math.inf, math.inf
    if len(cs.pieces) == 1 and cs.kind in ("interval", "union"):
        lo, hi = cs.pieces[0]
        return (-math.inf if lo is None else lo), (math.inf if hi is None else hi)
    return math.nan, math.nan


def _diag_value(res: FitResult, key: str, attr: str, na: list[str], label: str) -> float | None:
    d = diag(res, key)
    if not d.applicable:
        na.append(f"{label}: {d.reason}")
        return None
    v = getattr(d, attr)
    if v is None:
        na.append(f"{label}: not available")
    return v


def tidy_frame(loaded: LoadedSpec, specs: list[Specification], results: list[FitResult]) -> pd.DataFrame:
    """One row per specification and IV term (endogenous regressors first, then controls).

    Specification-level statistics (N, clusters, effective F, test p-values) repeat on every
    row of a specification; first-stage F and the robust set belong to an endogenous term and
    are empty on control rows. A statistic that does not apply is empty and the column
    ``not_applicable`` says why. Failed or unfitted specifications have one row with their
    status and reason.
    """
    axes = list(loaded.spec.axes)
    by_id = results_by_id(specs, results)
    rows: list[dict] = []
    for sp in specs:
        res = by_id.get(sp.id)
        base = {"spec_id": sp.id}
        for a in axes:
            base[AXIS_PREFIX + a] = sp.labels.get(a, "")
        base.update(extra=sp.extra_name or "", is_baseline=sp.is_baseline,
                    status=res.status if res else "missing",
                    reason=(res.reason or "") if res else "no result on file (not fitted yet)",
                    dataset=sp.dataset, outcome=sp.outcome, estimator=sp.estimator,
                    covariance=sp.covariance, cluster_by="; ".join(sp.cluster), level=sp.level)
        if res is None or res.status != "ok" or res.iv is None:
            rows.append({**base, "term": sp.endogenous[0], "term_role": "endogenous",
                         "warnings": "; ".join(res.warnings) if res else ""})
            continue
        spec_na: list[str] = []
        eff = diag(res, "effective_f")
        eff_f = eff.statistic if eff.applicable else None
        crit = eff.extra.get("crit_tau10") if eff.applicable else None
        if not eff.applicable:
            spec_na.append(f"effective_f: {eff.reason}")
        weak = weak_first_stage(res)
        ok_key, en_key = overid_key(res), endogeneity_key(res)
        common = dict(
            nobs=res.nobs,
            clusters="; ".join(str(g) for g in res.n_clusters) if res.covariance == "cluster" else "",
            effective_f=eff_f,
            effective_f_crit10=crit if isinstance(crit, (int, float)) else None,
            weak_first_stage=weak,
            overid_test=TEST_NAMES[ok_key],
            overid_p=_diag_value(res, ok_key, "pvalue", spec_na, "overid_p"),
            endogeneity_test=TEST_NAMES[en_key],
            endogeneity_p=_diag_value(res, en_key, "pvalue", spec_na, "endogeneity_p"),
            ar_p=_diag_value(res, "ar_test", "pvalue", spec_na, "ar_p"),
            warnings="; ".join(res.warnings),
        )
        for t in res.iv.terms:
            na = list(spec_na)
            endog = t.name in res.endogenous
            row = {**base, **common, "term": t.name, "term_role": "endogenous" if endog else "exogenous",
                   "estimate": t.estimate, "se": t.se, "t": t.t, "p": t.p,
                   "ci_wald_low": t.ci_low, "ci_wald_high": t.ci_high}
            if endog:
                row["first_stage_f"] = _diag_value(res, f"first_stage_f:{t.name}", "statistic", na, "first_stage_f")
                row["first_stage_f_robust"] = _diag_value(
                    res, f"first_stage_f_robust:{t.name}", "statistic", na, "first_stage_f_robust")
                cs = res.robust_set(t.name)
                if cs is not None:
                    lo, hi = _bounds(cs)
                    row.update(ci_robust_method=cs.method, ci_robust_kind=cs.kind, ci_robust_low=lo,
                               ci_robust_high=hi, ci_robust_text=cs.describe("{:.6g}"))
                else:
                    row.update(ci_robust_kind="not computed", ci_robust_text="n.a.")
                    na.append("ci_robust: " + (NOT_RUN if not res.diagnostics
                                               else "no weak-instrument-robust set was computed"))
            row["not_applicable"] = "; ".join(na)
            rows.append(row)
    return _typed(pd.DataFrame(rows), axes)


_FLOATS = ["level", "estimate", "se", "t", "p", "ci_wald_low", "ci_wald_high", "ci_robust_low",
           "ci_robust_high", "first_stage_f", "first_stage_f_robust", "effective_f",
           "effective_f_crit10", "overid_p", "endogeneity_p", "ar_p"]
_STRINGS = ["extra", "status", "reason", "dataset", "outcome", "estimator", "covariance",
            "cluster_by", "term", "term_role", "ci_robust_method", "ci_robust_kind",
            "ci_robust_text", "clusters", "overid_test", "endogeneity_test", "not_applicable",
            "warnings"]
COLUMNS_HEAD = ["spec_id"]
COLUMNS_TAIL = ["extra", "is_baseline", "status", "reason", "term", "term_role", "dataset",
                "outcome", "estimator", "covariance", "cluster_by", "level", "estimate", "se",
                "t", "p", "ci_wald_low", "ci_wald_high", "ci_robust_method", "ci_robust_kind",
                "ci_robust_low", "ci_robust_high", "ci_robust_text", "nobs", "clusters",
                "first_stage_f", "first_stage_f_robust", "effective_f", "effective_f_crit10",
                "weak_first_stage", "overid_test", "overid_p", "endogeneity_test",
                "endogeneity_p", "ar_p", "not_applicable", "warnings"]


def _typed(df: pd.DataFrame, axes: list[str]) -> pd.DataFrame:
    cols = COLUMNS_HEAD + [AXIS_PREFIX + a for a in axes] + COLUMNS_TAIL
    for c in cols:
        if c not in df:
            df[c] = None
    df = df[cols].copy()
    for c in _FLOATS:
        df[c] = pd.to_numeric(df[c], errors="coerce").astype("float64")
    for c in _STRINGS + ["spec_id"] + [AXIS_PREFIX + a for a in axes]:
        df[c] = df[c].where(df[c].notna(), "").astype(str)
    df["nobs"] = pd.array(df["nobs"].tolist(), dtype="Int64")
    df["is_baseline"] = df["is_baseline"].astype(bool)
    df["weak_first_stage"] = pd.array(
        [None if (v is None or (isinstance(v, float) and math.isnan(v))) else bool(v)
         for v in df["weak_first_stage"]], dtype="boolean")
    return df.reset_index(drop=True)


def frame_csv(df: pd.DataFrame) -> str:
    """CSV text: floats in shortest round-trip form, infinities as 'inf'/'-inf', LF lines."""
    return df.to_csv(index=False, lineterminator="\n")


def frame_parquet(df: pd.DataFrame) -> bytes:
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.Table.from_pandas(df, preserve_index=False)
    buf = io.BytesIO()
    pq.write_table(table, buf, compression="zstd")
    return buf.getvalue()


# ---------------------------------------------------------------------------------------------
# LaTeX


_LATEX_ESC = {
    "\\": r"$\backslash$", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_",
    "{": r"\{", "}": r"\}", "~": r"\~{}", "^": r"\^{}",
    "<": r"$<$", ">": r"$>$", "|": r"$|$",
    WEAK_MARK: r"$\dagger$", "\u221e": r"$\infty$", "\u222a": r"$\cup$", "\u2264": r"$\leq$",
    "\u2265": r"$\geq$", "\u00d7": r"$\times$", "\u2212": "-", "\u2013": "--", "\u2014": "---",
    "\u03b1": r"$\alpha$", "\u03b2": r"$\beta$", "\u03c4": r"$\tau$", "\u2018": "`", "\u2019": "'",
    "\u201c": "``", "\u201d": "''",
}


def latex_escape(s: str) -> str:
    """Plain text -> LaTeX text (pdflatex with T1 fonts): specials escaped, Latin-1 kept,
    other characters transliterated (accents dropped) or replaced by '?'."""
    out = []
    for ch in str(s):
        if ch in _LATEX_ESC:
            out.append(_LATEX_ESC[ch])
        elif ord(ch) < 128 or 0xC0 <= ord(ch) <= 0xFF:
            out.append(ch if ch.isprintable() else " ")
        else:
            plain = unicodedata.normalize("NFKD", ch).encode("ascii", "ignore").decode()
            out.append(latex_escape(plain) if plain else "?")
    return "".join(out)


def _latex_mark(mark: str) -> str:
    if not mark:
        return ""
    return "{\\textsuperscript{" + mark.replace(WEAK_MARK, r"$\dagger$") + "}}"


def _latex_set(c: Cell) -> str:
    if c.cset.kind == "empty":
        return "empty"
    return "$" + set_pieces_text(c.cset, c.digits, r"\infty", r" \cup ") + "$"


def latex_cell(c: Cell) -> str:
    """A cell for an siunitx S column: numbers bare (aligned on the decimal marker), anything
    else in braces (set as text, centred)."""
    if c.kind == "num":
        return fmt_num(float(c.value), c.digits) + _latex_mark(c.mark)
    if c.kind == "int":
        return str(int(c.value))
    if c.kind == "se":
        return "{(}" + fmt_num(float(c.value), c.digits) + "{)}"
    if c.kind == "p":
        return "{$<$0.001}" if c.value < 0.001 else fmt_p(float(c.value))
    if c.kind == "set":
        return "{" + _latex_set(c) + "}"
    if c.kind == "text":
        return "{" + latex_escape(c.text_value) + "}"
    if c.kind == "na":
        return "{n.a.}"
    return ""


def _table_format(td: TableData) -> tuple[str, str]:
    """siunitx table-format covering every bare number of the table, and the mark space."""
    ints, decs, neg, marks = 1, 0, False, ""
    for row in [r for p in td.panels for r in p.rows] + td.stats:
        for c in row.cells:
            if c.kind in ("num", "se", "int") or (c.kind == "p" and c.value >= 0.001):
                s = fmt_num(float(c.value), 0 if c.kind == "int" else (c.digits if c.kind != "p" else 3))
                neg = neg or s.startswith("-")
                whole, _, frac = s.lstrip("-").partition(".")
                ints, decs = max(ints, len(whole)), max(decs, len(frac))
                if len(c.mark) > len(marks):
                    marks = c.mark
    fmt = ("-" if neg else "") + f"{ints}.{decs}"
    return fmt, marks


def _latex_header_label(label: str) -> str:
    """A column label, broken into short lines (a nested tabular) when it is long."""
    words, lines = label.split(), []
    for w in words:
        if lines and len(lines[-1]) + 1 + len(w) <= 14:
            lines[-1] += " " + w
        else:
            lines.append(w)
    if len(lines) <= 1:
        return "{" + latex_escape(label) + "}"
    body = r" \\ ".join(latex_escape(x) for x in lines)
    return r"\multicolumn{1}{c}{\begin{tabular}[b]{@{}c@{}}" + body + r"\end{tabular}}"


def latex_context(td: TableData) -> dict:
    n = len(td.columns)
    fmt, marks = _table_format(td)
    # the braces reserve room for the parentheses of SEs and for marks after the numbers
    after = _latex_mark(marks) if marks else "{)}"
    sis = [f"table-format={{(}}{fmt}{after}", "table-align-text-before=false",
           "table-align-text-after=false"]
    group_line, rules = "", ""
    if td.has_groups:
        cells, rule = [""], []
        for g, a, b in td.groups:
            span = b - a + 1
            cells.append(f"\\multicolumn{{{span}}}{{c}}{{{latex_escape(g)}}}")
            if g:
                rule.append(f"\\cmidrule(lr){{{a + 1}-{b + 1}}}")
        group_line = " & ".join(cells) + r" \\"
        rules = " ".join(rule)

    def row(r):
        return " & ".join([latex_escape(r.label)] + [latex_cell(c) for c in r.cells]) + r" \\"

    return dict(
        name=td.name, title=latex_escape(td.title), ncols=n, sisetup=", ".join(sis),
        group_line=group_line, group_rules=rules,
        labels=" & ".join([""] + [_latex_header_label(c.label) for c in td.columns]) + r" \\",
        numbers=" & ".join([""] + [f"{{({c.number})}}" for c in td.columns]) + r" \\",
        panels=[dict(title=latex_escape(p.title), rows=[row(r) for r in p.rows]) for p in td.panels],
        stats=[row(r) for r in td.stats],
        notes=[latex_escape(x) for x in td.notes],
        landscape=n > 6,
        paper_height=_paper_height(td, landscape=n > 6),
    )


def _paper_height(td: TableData, landscape: bool) -> str:
    """Page height of the standalone document: A4, or taller when the table would overflow."""
    rows = sum(len(p.rows) + 1 for p in td.panels) + len(td.stats) + 3
    note_lines = sum(1 + len(x) // (150 if landscape else 100) for x in td.notes)
    need = 4.0 + 0.55 * rows + 0.42 * note_lines  # cm, 11pt text (common practice sizes)
    a4 = 21.0 if landscape else 29.7
    return f"{max(a4, need):.1f}cm"


# ---------------------------------------------------------------------------------------------
# Markdown


_MD_SPECIAL = re.compile(r"([\\|*_`]|<(?=[A-Za-z/!?]))")


def md_escape(s: str) -> str:
    """Escape text for a GFM table cell: backslash, |, *, _, `, a '<' that could open an HTML
    tag, and '](' so that no label turns into a link (interval brackets stay readable)."""
    return _MD_SPECIAL.sub(r"\\\1", str(s)).replace("](", "\\](").replace("\n", " ")


def markdown_context(td: TableData) -> dict:
    header = [""] + [f"({c.number}) {md_escape(c.label)}" for c in td.columns]
    align = [":---"] + [":---:"] * len(td.columns)

    def line(cells: list[str]) -> str:
        return "| " + " | ".join(cells) + " |"

    body: list[str] = []
    for p in td.panels:
        body.append(line([f"**{md_escape(p.title)}**"] + [""] * len(td.columns)))
        for r in p.rows:
            body.append(line([md_escape(r.label)] + [md_escape(c.text) for c in r.cells]))
    for r in td.stats:
        body.append(line([md_escape(r.label)] + [md_escape(c.text) for c in r.cells]))
    groups = [(g, a, b) for g, a, b in td.groups if g]
    group_text = "; ".join(f"({a})" + (f"-({b})" if b != a else "") + f" vary {md_escape(g)}"
                           for g, a, b in groups)
    return dict(title=md_escape(td.title), groups=group_text, header=line(header),
                align=line(align), body=body, notes=[md_escape(x) for x in td.notes])


# ---------------------------------------------------------------------------------------------
# Templates


def _env(latex: bool):
    import jinja2

    opts = dict(loader=jinja2.PackageLoader("specflow", "templates"), undefined=jinja2.StrictUndefined,
                keep_trailing_newline=True, trim_blocks=True, lstrip_blocks=True)
    if latex:  # LaTeX is full of braces: use other delimiters
        opts.update(block_start_string="<%", block_end_string="%>", variable_start_string="<<",
                    variable_end_string=">>", comment_start_string="<#", comment_end_string="#>",
                    autoescape=False)
    else:
        opts.update(autoescape=jinja2.select_autoescape(["html", "html.j2"]))
    return jinja2.Environment(**opts)


def render_latex(td: TableData) -> tuple[str, str]:
    """The table as a LaTeX fragment and as a standalone document."""
    env = _env(latex=True)
    ctx = latex_context(td)
    fragment = env.get_template("table.tex.j2").render(**ctx)
    standalone = env.get_template("standalone.tex.j2").render(body=fragment, **ctx)
    return fragment, standalone


def render_markdown(td: TableData) -> str:
    return _env(latex=False).get_template("table.md.j2").render(**markdown_context(td))


# ---------------------------------------------------------------------------------------------
# Everything


def build_tables(loaded: LoadedSpec, specs: list[Specification], results: list[FitResult]) -> list[TableData]:
    by_id = results_by_id(specs, results)
    return [build_table(loaded, t, i, specs, by_id) for i, t in tables_of(loaded)]


def exhibit_map(tables: list[TableData], specs: list[Specification], results: list[FitResult]) -> dict:
    """Which specifications each exhibit shows (for the replication package)."""
    by_id = results_by_id(specs, results)
    curve = [sp.id for sp in specs if sp.id in by_id and by_id[sp.id].status == "ok"]
    out = {"figures/spec_curve": curve, "estimates": [sp.id for sp in specs]}
    for td in tables:
        out[f"tables/{td.name}"] = td.spec_ids()
        out[f"figures/coef_{td.name}"] = td.spec_ids()
    return dict(sorted(out.items()))


def build_all(loaded: LoadedSpec, specs: list[Specification], results: list[FitResult],
              out_dir: Path) -> list[Path]:
    """Write every exhibit under ``out_dir`` (see the module docstring); return the paths."""
    from . import figures, report
    from .data import write_atomic_bytes, write_atomic_text

    out_dir = Path(out_dir)
    written: list[Path] = []

    def put(rel: str, data: str | bytes) -> None:
        path = out_dir / rel
        if isinstance(data, str):
            write_atomic_text(path, data)
        else:
            write_atomic_bytes(path, data)
        written.append(path)

    df = tidy_frame(loaded, specs, results)
    put("estimates.csv", frame_csv(df))
    put("estimates.parquet", frame_parquet(df))

    tables = build_tables(loaded, specs, results)
    for td in tables:
        fragment, standalone = render_latex(td)
        put(f"tables/{td.name}.tex", fragment)
        put(f"tables/{td.name}.standalone.tex", standalone)
        put(f"tables/{td.name}.md", render_markdown(td))

    figs = figures.all_figures(loaded, specs, results, tables)
    pngs: dict[str, bytes] = {}
    for stem, (pdf, png) in figs.items():
        put(f"figures/{stem}.pdf", pdf)
        put(f"figures/{stem}.png", png)
        pngs[stem] = png

    put("exhibits.json", json.dumps(exhibit_map(tables, specs, results), indent=1) + "\n")
    put("report.html", report.render_report(loaded, specs, results, tables, pngs))
    return written
