"""Figures: the specification curve of the whole grid and a coefficient plot per table.

Drawn with matplotlib's object API on the Agg canvas (no pyplot, no global state), and saved
deterministically: fixed fonts and sizes, no timestamps in PDF or PNG metadata, a fixed SVG
hash salt. Each figure is returned as (PDF bytes, PNG bytes).

The specification curve shows each fitted specification's IV estimate of the first endogenous
regressor, sorted, with its weak-instrument-robust set (Anderson-Rubin, else tF; the Wald
interval, dashed, where neither was computed). A set running past the plotted range -- an
unbounded one always does -- ends in an arrowhead at the plot's edge. Specifications whose
effective F is below its 10%-bias critical value are drawn in orange as open diamonds; the
baseline is black and shaded. The panel below marks which variant of each axis every
specification uses.
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass

from .grid import Specification
from .results import FitResult
from .spec import LoadedSpec
from .tables import WEAK_MARK, TableData, weak_first_stage

COLOR = "#2f5f98"
WEAK = "#d95f02"
BASE = "#000000"
SHADE = "#fff2b3"
GRID = "#d9d9d9"

RC = {
    "font.family": "DejaVu Sans",
    "font.size": 8.5,
    "axes.titlesize": 9.5,
    "axes.labelsize": 8.5,
    "svg.hashsalt": "specflow",
    "pdf.compression": 6,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "figure.dpi": 100,
}


def _new_figure(width: float, height: float):
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), layout="constrained")


def save(fig, dpi: int = 150) -> tuple[bytes, bytes]:
    """PDF and PNG bytes of a figure, with no timestamps or other run-dependent metadata."""
    pdf, png = io.BytesIO(), io.BytesIO()
    fig.savefig(pdf, format="pdf", metadata={"CreationDate": None, "ModDate": None})
    fig.savefig(png, format="png", dpi=dpi, metadata={"Software": None})
    return pdf.getvalue(), png.getvalue()


# ---------------------------------------------------------------------------------------------
# Points to draw


@dataclass
class Point:
    spec: Specification
    estimate: float
    pieces: list[tuple[float, float]]  # closed pieces, +-inf for unbounded ends
    robust: bool  # False: the Wald interval stands in
    weak: bool
    baseline: bool


def _point(sp: Specification, res: FitResult, term: str | None = None) -> Point | None:
    if res.status != "ok" or res.iv is None:
        return None
    term = term or (res.endogenous[0] if res.endogenous else None)
    t = res.iv.term(term) if term else None
    if t is None or t.estimate is None:
        return None
    cs = res.robust_set(term)
    if cs is not None:
        if cs.kind == "whole-line":
            pieces = [(-math.inf, math.inf)]
        else:
            pieces = [(-math.inf if lo is None else lo, math.inf if hi is None else hi) for lo, hi in cs.pieces]
        robust = True
    else:
        pieces = [(t.ci_low, t.ci_high)] if t.ci_low is not None and t.ci_high is not None else []
        robust = False
    return Point(sp, t.estimate, pieces, robust, bool(weak_first_stage(res)), sp.is_baseline)


def _limits(points: list[Point]) -> tuple[float, float]:
    """A value range covering the estimates and bounded intervals, but not blown up by a few
    very wide sets (those run past the edge and get arrowheads)."""
    core = [p.estimate for p in points]
    for p in points:
        for lo, hi in p.pieces:
            if not p.robust:
                core += [lo, hi]
    lo, hi = min(core), max(core)
    span = max(hi - lo, 1e-9, 0.1 * max(abs(lo), abs(hi)))
    wide_lo, wide_hi = lo - 1.5 * span, hi + 1.5 * span
    for p in points:
        for a, b in p.pieces:
            for v in (a, b):
                if math.isfinite(v) and wide_lo <= v <= wide_hi:
                    lo, hi = min(lo, v), max(hi, v)
    pad = 0.06 * (hi - lo or span)
    return lo - pad, hi + pad


def _draw_interval(ax, pos: float, a: float, b: float, lim: tuple[float, float], color: str,
                   vertical: bool, lw: float, dashed: bool) -> None:
    """One piece of a set from a to b, clipped to lim, with arrowheads where it runs past."""
    lo, hi = lim
    if b < lo or a > hi:  # entirely outside: an arrowhead at the side it lies on
        edge, marker = (hi, "^" if vertical else ">") if a > hi else (lo, "v" if vertical else "<")
        xy = (pos, edge) if vertical else (edge, pos)
        ax.plot(*xy, marker=marker, color=color, ms=4.5, clip_on=False, zorder=3)
        return
    ca, cb = max(a, lo), min(b, hi)
    xs, ys = ([pos, pos], [ca, cb]) if vertical else ([ca, cb], [pos, pos])
    ax.plot(xs, ys, color=color, lw=lw, ls="--" if dashed else "-", solid_capstyle="butt", zorder=2)
    for value, clipped, up in ((cb, b > hi, True), (ca, a < lo, False)):
        if clipped:
            marker = ("^" if up else "v") if vertical else (">" if up else "<")
            xy = (pos, value) if vertical else (value, pos)
            ax.plot(*xy, marker=marker, color=color, ms=4.5, clip_on=False, zorder=3)


def _style(p: Point) -> tuple[str, str, float, str]:
    """(colour, marker, size, face colour) of a point."""
    if p.baseline:
        return BASE, "o", 5.5, BASE
    if p.weak:
        return WEAK, "D", 4.5, "white"
    return COLOR, "o", 3.5, COLOR


# ---------------------------------------------------------------------------------------------
# The specification curve


def spec_curve(loaded: LoadedSpec, specs: list[Specification], results: list[FitResult]) -> tuple[bytes, bytes]:
    import matplotlib

    by_id = {r.spec_id: r for r in results}
    points = [p for p in (_point(sp, by_id[sp.id]) for sp in specs if sp.id in by_id) if p is not None]
    not_shown = len(specs) - len(points)
    order = sorted(range(len(points)), key=lambda i: (points[i].estimate, i))
    points = [points[i] for i in order]

    axes = list(loaded.spec.axes.items())
    rows: list[tuple[str, str, str]] = []  # (axis, label, tick text)
    for name, ax in axes:
        for label in [ax.baseline, *ax.variants]:
            rows.append((name, label, f"{name}: {label}"))
    extras = [sp.extra_name for sp in specs if sp.extra_name]
    for e in extras:
        rows.append(("extra", e, f"one-off: {e}"))

    with matplotlib.rc_context(RC):
        n = max(len(points), 1)
        width = min(max(6.5, 2.6 + 0.14 * n), 16.0)
        height = 3.4 + 0.16 * len(rows) + 0.5
        fig = _new_figure(width, height)
        gs = fig.add_gridspec(2, 1, height_ratios=[3.4, 0.16 * len(rows) + 0.3])
        top = fig.add_subplot(gs[0])
        bottom = fig.add_subplot(gs[1], sharex=top)
        outcome = specs[0].outcome if specs else ""
        term = specs[0].endogenous[0] if specs else ""
        title = f"{loaded.spec.study.title}: {len(points)} specifications"
        if not_shown:
            title += f" ({not_shown} without an estimate, not shown)"
        top.set_title(title, loc="left")
        top.set_ylabel(f"IV estimate of {term}\non {outcome}")
        if points:
            lim = _limits(points)
            top.set_ylim(*lim)
            for x, p in enumerate(points):
                color, marker, size, face = _style(p)
                if p.baseline:
                    top.axvspan(x - 0.5, x + 0.5, color=SHADE, zorder=0, lw=0)
                    bottom.axvspan(x - 0.5, x + 0.5, color=SHADE, zorder=0, lw=0)
                for a, b in p.pieces:
                    _draw_interval(top, x, a, b, lim, color, True, 1.1 if p.robust else 0.9, not p.robust)
                top.plot(x, p.estimate, marker=marker, ms=size, color=color, mfc=face, zorder=4, ls="none")
            if lim[0] < 0 < lim[1]:
                top.axhline(0.0, color="#808080", lw=0.8, ls=":", zorder=1)
        top.set_xlim(-0.6, n - 0.4)
        top.tick_params(axis="x", labelbottom=False, length=0)
        top.grid(axis="y", color=GRID, lw=0.5)

        # legend: proxies so that it does not depend on which kinds occur first
        handles = [
            top.plot([], [], color=COLOR, marker="o", ms=3.5, lw=1.1, label="estimate, robust 95% set")[0],
            top.plot([], [], color=WEAK, marker="D", ms=4.5, mfc="white", lw=1.1,
                     label="weak first stage (effective F below 10%-bias critical value)")[0],
            top.plot([], [], color=BASE, marker="o", ms=5.5, lw=1.1, label="baseline")[0],
        ]
        if any(not p.robust for p in points):
            handles.append(top.plot([], [], color=COLOR, lw=0.9, ls="--", label="Wald 95% interval (no robust set)")[0])
        handles.append(top.plot([], [], color="#555555", marker="^", ls="none", ms=4.5,
                                label="set runs past the plot (e.g. unbounded)")[0])
        fig.legend(handles=handles, loc="outside lower center", fontsize=7, frameon=False,
                   ncol=min(len(handles), 3))

        # which variants each specification uses
        ypos = {(a, lab): len(rows) - 1 - i for i, (a, lab, _) in enumerate(rows)}
        for x, p in enumerate(points):
            color, _, _, _ = _style(p)
            if p.spec.extra_name:
                keys = [("extra", p.spec.extra_name)]
            else:
                keys = [(a, p.spec.labels.get(a)) for a, _ in axes]
            for k in keys:
                if k in ypos:
                    bottom.plot(x, ypos[k], marker="s", ms=3.6, color=color, ls="none", zorder=3)
        bottom.set_yticks([len(rows) - 1 - i for i in range(len(rows))], [t for _, _, t in rows])
        bottom.set_ylim(-0.7, len(rows) - 0.3)
        boundary = 0
        for name, ax in axes[:-1] + ([axes[-1]] if extras and axes else []):
            boundary += 1 + len(ax.variants)
            bottom.axhline(len(rows) - boundary - 0.5, color=GRID, lw=0.6)
        bottom.set_xlabel("specifications, sorted by estimate")
        bottom.tick_params(axis="x", length=0, labelbottom=False)
        bottom.tick_params(axis="y", length=0)
        for side in ("left", "bottom"):
            bottom.spines[side].set_visible(False)
        return save(fig)


# ---------------------------------------------------------------------------------------------
# Coefficient plot of one table


def coef_plot(td: TableData) -> tuple[bytes, bytes]:
    """The IV estimates of a table's columns with robust sets (thick) and Wald intervals (thin);
    OLS estimates as open squares when the table has an OLS panel."""
    import matplotlib

    terms: list[str] = []
    for c in td.columns:
        if c.ok:
            for x in c.result.endogenous:
                if x not in terms:
                    terms.append(x)
    terms = terms or ["(none)"]
    ncol = len(td.columns)
    with matplotlib.rc_context(RC):
        fig = _new_figure(3.2 + 2.6 * len(terms), 1.2 + 0.38 * ncol)
        axs = fig.subplots(1, len(terms), sharey=True, squeeze=False)[0]
        labels = []
        for c in td.columns:
            lab = f"({c.number}) " + (f"{c.group}: " if c.group else "") + c.label
            if c.ok and weak_first_stage(c.result):
                lab += " " + WEAK_MARK
            if not c.ok:
                lab += f" [{c.status}]"
            labels.append(lab)
        show_ols = "ols" in td.panel_kinds
        for ax, term in zip(axs, terms):
            pts = []
            for i, c in enumerate(td.columns):
                p = _point(c.spec, c.result, term) if c.ok else None
                pts.append(p)
            drawn = [p for p in pts if p is not None]
            wald: list[tuple[int, float, float]] = []
            ols: list[tuple[int, float]] = []
            for i, c in enumerate(td.columns):
                if not c.ok:
                    continue
                t = c.result.iv.term(term)
                if t is not None and t.ci_low is not None and t.ci_high is not None:
                    wald.append((i, t.ci_low, t.ci_high))
                o = c.result.ols.term(term) if c.result.ols is not None else None
                if show_ols and o is not None and o.estimate is not None:
                    ols.append((i, o.estimate))
            if drawn:
                core = [p.estimate for p in drawn] + [v for _, a, b in wald for v in (a, b)] + [v for _, v in ols]
                lo, hi = min(core), max(core)
                span = max(hi - lo, 1e-9)
                for p in drawn:
                    for a, b in p.pieces:
                        for v in (a, b):
                            if math.isfinite(v) and lo - 1.5 * span <= v <= hi + 1.5 * span:
                                lo, hi = min(lo, v), max(hi, v)
                pad = 0.06 * (hi - lo or 1.0)
                lim = (lo - pad, hi + pad)
                ax.set_xlim(*lim)
                for i, p in enumerate(pts):
                    if p is None:
                        continue
                    y = ncol - 1 - i
                    color = WEAK if p.weak else (BASE if p.baseline else COLOR)
                    for a, b in p.pieces:
                        _draw_interval(ax, y, a, b, lim, color, False, 2.6 if p.robust else 1.2, not p.robust)
                    for j, a, b in wald:
                        if j == i and p.robust:
                            _draw_interval(ax, y - 0.22, a, b, lim, "#7f7f7f", False, 0.9, False)
                    ax.plot(p.estimate, y, marker="D" if p.weak else "o", color=color,
                            mfc="white" if p.weak else color, ms=5, ls="none", zorder=4)
                for j, v in ols:
                    ax.plot(v, ncol - 1 - j + 0.22, marker="s", mfc="white", color="#555555", ms=4,
                            ls="none", zorder=4)
                if lim[0] < 0 < lim[1]:
                    ax.axvline(0.0, color="#808080", lw=0.8, ls=":")
            ax.set_yticks([ncol - 1 - i for i in range(ncol)], labels)
            ax.set_ylim(-0.7, ncol - 0.3)
            ax.set_xlabel(f"estimate of {term}")
            ax.grid(axis="x", color=GRID, lw=0.5)
            ax.tick_params(axis="y", length=0)
        axs[0].set_title(td.title, loc="left")
        handles = [
            axs[0].plot([], [], color=COLOR, lw=2.6, marker="o", ms=5, label="IV estimate, robust 95% set")[0],
            axs[0].plot([], [], color="#7f7f7f", lw=0.9, label="Wald 95% interval")[0],
        ]
        if show_ols:
            handles.append(axs[0].plot([], [], color="#555555", marker="s", mfc="white", ls="none", ms=4, label="OLS")[0])
        handles.append(axs[0].plot([], [], color=WEAK, marker="D", mfc="white", ls="none", ms=5,
                                   label=f"weak first stage ({WEAK_MARK})")[0])
        fig.legend(handles=handles, loc="outside lower center", ncol=len(handles), fontsize=7, frameon=False)
        return save(fig)


def all_figures(loaded: LoadedSpec, specs: list[Specification], results: list[FitResult],
                tables: list[TableData]) -> dict[str, tuple[bytes, bytes]]:
    """{file stem: (pdf, png)} for the specification curve and each table's coefficient plot."""
    ids = {sp.id for sp in specs}
    current = [r for r in results if r.spec_id in ids]
    out = {"spec_curve": spec_curve(loaded, specs, current)}
    for td in tables:
        out[f"coef_{td.name}"] = coef_plot(td)
    return out
