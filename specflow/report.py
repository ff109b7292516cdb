"""The single-file HTML report: the study, its grid, every table and figure, failures, cautions.

Everything is inline (CSS in the page, figures as base64 PNG), there is no script and nothing is
fetched, so the file opens anywhere without a network. No timestamps: the same results give
the same bytes.
"""

from __future__ import annotations

import base64

from . import __version__
from .grid import Specification
from .results import FitResult
from .spec import LoadedSpec
from .tables import TableData, WEAK_MARK, estimator_text, fmt_num, set_pieces_text, weak_first_stage

CAUTIONS = [
    ("Weak instruments",
     "Where the effective F falls below its critical value for a 10% worst-case bias, "
     "conventional (Wald) intervals can badly under-cover. The tables and figures mark those "
     f"specifications ({WEAK_MARK}, orange) and show weak-instrument-robust sets "
     "(Anderson-Rubin or tF) by default; an unbounded robust set means the data cannot rule out "
     "large effects of either sign."),
    ("Local to compliers",
     "With heterogeneous effects, an IV estimate is a weighted average effect for compliers, "
     "the units whose treatment the instruments shift. Different instrument sets can move "
     "different units, so estimates that differ across instrument sets need not contradict "
     "each other."),
    ("Exclusion restriction",
     "Every estimate here assumes that the instruments affect the outcome only through the "
     "endogenous regressor. No statistic in this report tests that assumption: an "
     "overidentification test only compares instruments with each other and can pass when all "
     "of them fail it in the same way."),
]


def _png_uri(png: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def _grid_rows(loaded: LoadedSpec, specs: list[Specification], by_id: dict[str, FitResult]) -> list[dict]:
    rows = []
    for sp in specs:
        r = by_id.get(sp.id)
        status = r.status if r else "missing"
        est = se = rset = eff = ""
        weak = False
        if r is not None and r.status == "ok" and r.headline() is not None:
            h = r.headline()
            est = fmt_num(h.estimate, 3) if h.estimate is not None else "n.a."
            se = fmt_num(h.se, 3) if h.se is not None else "n.a."
            cs = r.robust_set()
            rset = set_pieces_text(cs, 3) if cs is not None else "n.a."
            d = r.diagnostics.get("effective_f")
            eff = fmt_num(d.statistic, 2) if (d is not None and d.applicable and d.statistic is not None) else "n.a."
            weak = bool(weak_first_stage(r))
        rows.append(dict(
            id=sp.id, labels=[sp.labels.get(a, "") for a in loaded.spec.axes],
            extra=sp.extra_name or "", baseline=sp.is_baseline, estimator=estimator_text(r, sp),
            estimate=est, se=se, robust=rset, eff=eff, weak=weak, status=status,
            reason=(r.reason or "") if r else "no result on file (not fitted yet)",
        ))
    return rows


def render_report(loaded: LoadedSpec, specs: list[Specification], results: list[FitResult],
                  tables: list[TableData], pngs: dict[str, bytes]) -> str:
    from .collate import _env, results_by_id

    s = loaded.spec
    by_id = results_by_id(specs, results)
    grid = _grid_rows(loaded, specs, by_id)
    n_ok = sum(1 for g in grid if g["status"] == "ok")
    failed = [g for g in grid if g["status"] != "ok"]
    n_weak = sum(1 for g in grid if g["weak"])
    axes = [dict(name=a, baseline=ax.baseline, variants=list(ax.variants), description=ax.description)
            for a, ax in s.axes.items()]
    n_grid = sum(1 for sp in specs if not sp.extra_name)
    ctx = dict(
        title=s.study.title, description=s.study.description.strip(), authors=s.study.authors,
        n_specs=len(specs), n_grid=n_grid, n_extra=len(specs) - n_grid, n_ok=n_ok,
        n_failed=sum(1 for g in failed if g["status"] == "failed"),
        n_missing=sum(1 for g in failed if g["status"] == "missing"), n_weak=n_weak,
        axes=axes, axis_names=list(s.axes), outcome=s.model.outcome,
        endogenous=", ".join(s.model.endogenous), cautions=CAUTIONS,
        spec_curve=_png_uri(pngs["spec_curve"]) if "spec_curve" in pngs else None,
        tables=[dict(t=td, coef=_png_uri(pngs[f"coef_{td.name}"]) if f"coef_{td.name}" in pngs else None)
                for td in tables],
        failed=failed, grid=grid, version=__version__, weak_mark=WEAK_MARK,
    )
    return _env(latex=False).get_template("report.html.j2").render(**ctx)
