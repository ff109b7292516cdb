"""LaTeX tables: each compiles with pdflatex and its PDF shows the numbers of the FitResults.

Each .tex file is compiled once per test run (cached); SOURCE_DATE_EPOCH and FORCE_SOURCE_DATE
make the PDFs reproducible. Expected strings are formatted in the test from the FitResults with
Python's format spec (see test_collate.fmt), independently of the collator's formatter.
"""

from __future__ import annotations

import functools
import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from test_collate import (
    DEMO_TABLES, crafted_out, demo_fit, demo_out, fmt, scratch, synth_fit, synth_out,
)

PDFLATEX = shutil.which("pdflatex")
PDFTOTEXT = shutil.which("pdftotext")
needs_tex = pytest.mark.skipif(
    not (PDFLATEX and PDFTOTEXT),
    reason="pdflatex or pdftotext is not installed (scripts/sysdeps.sh installs TeX Live and poppler-utils)")

TEX_ENV = {"SOURCE_DATE_EPOCH": "1764633600", "FORCE_SOURCE_DATE": "1"}


@functools.lru_cache(maxsize=None)
def compile_tex(src: Path, where: str = "pdf") -> tuple[Path, str]:
    """Compile a .tex file (copied with its folder's .tex files into a scratch folder) once;
    return the PDF and its text (pdftotext -layout, with U+2212 minus read as '-')."""
    work = scratch() / where / src.parent.parent.name
    work.mkdir(parents=True, exist_ok=True)
    for f in src.parent.glob("*.tex"):
        shutil.copy(f, work / f.name)
    env = {**os.environ, **TEX_ENV}
    proc = subprocess.run(
        [PDFLATEX, "-interaction=nonstopmode", "-halt-on-error", "-no-shell-escape", src.name],
        cwd=work, env=env, capture_output=True, text=True, timeout=180)
    assert proc.returncode == 0, f"pdflatex failed on {src.name}:\n" + "\n".join(
        proc.stdout.splitlines()[-25:])
    pdf = work / src.with_suffix(".pdf").name
    text = subprocess.run([PDFTOTEXT, "-layout", str(pdf), "-"], capture_output=True, text=True,
                          check=True).stdout
    return pdf, text.replace("\u2212", "-")


def _expected_numbers(out: Path, name: str, results, digits: int = 3) -> list[str]:
    """The IV estimate, its SE and N of every column, formatted from the FitResults."""
    import json

    ids = json.loads((out / "exhibits.json").read_text())[f"tables/{name}"]
    by_id = {r.spec_id: r for r in results}
    want = []
    for sid in ids:
        r = by_id[sid]
        if r.status != "ok":
            continue
        h = r.headline()
        want += [fmt(h.estimate, digits), f"({fmt(h.se, digits)})", str(r.nobs)]
    return want


@needs_tex
@pytest.mark.parametrize("name", DEMO_TABLES)
def test_demo_table_compiles_and_shows_the_fit_numbers(name):
    _, _, results = demo_fit()
    _, text = compile_tex(demo_out() / "tables" / f"{name}.standalone.tex")
    flat = re.sub(r"\s+", " ", text)
    for s in _expected_numbers(demo_out(), name, results):
        assert s in flat, f"{s} missing from the PDF of table {name}"
    # first-stage coefficients of the instruments (first stage panel is on by default)
    import json

    ids = json.loads((demo_out() / "exhibits.json").read_text())[f"tables/{name}"]
    by_id = {r.spec_id: r for r in results}
    for sid in ids:
        r = by_id[sid]
        fs = r.first_stages[0]
        for z in r.instruments:
            assert fmt(fs.term(z).estimate, 3) in flat
        x = r.endogenous[0]
        if f"first_stage_f:{x}" in r.diagnostics:  # real diagnostics (specflow.diagnostics)
            assert fmt(r.diagnostics[f"first_stage_f:{x}"].statistic, 2) in flat
            eff = r.diagnostics["effective_f"]
            mark = "\u2020" if eff.extra.get("weak_tau10") else ""
            assert fmt(eff.statistic, 2) + mark in flat
            assert fmt(r.headline().estimate, 3) + mark in flat
            cs = r.robust_set()
            for lo, hi in cs.pieces:
                for v in (lo, hi):
                    if v is not None:
                        assert fmt(v, 3) in flat
            if cs.kind in ("whole-line", "two-rays"):
                assert "\u221e" in flat


@needs_tex
def test_crafted_table_shows_robust_sets_weak_marks_and_reasons():
    """Unbounded sets, the weak-first-stage dagger and n.a. reasons survive compilation."""
    from test_collate import craft

    _, _, results = demo_fit()
    crafted = {r.spec_id: r for r in craft(list(results))}
    out = crafted_out()
    _, text = compile_tex(out / "tables" / "default.standalone.tex", where="pdf-crafted")
    flat = re.sub(r"\s+", " ", text)
    import json

    ids = json.loads((out / "exhibits.json").read_text())["tables/default"]
    for n, sid in enumerate(ids, start=1):
        r = crafted[sid]
        h = r.headline()
        weak = r.diagnostics["effective_f"].extra["weak_tau10"]
        assert fmt(h.estimate, 3) + ("\u2020" if weak else "") in flat
        cs = r.robust_set()
        for lo, hi in cs.pieces:
            for v in (lo, hi):
                if v is not None:
                    assert fmt(v, 3) in flat
        if cs.kind in ("two-rays", "whole-line"):
            assert "\u221e" in flat  # infinity is written, not dropped
    assert "Weak first stage in column" in flat
    # a test that does not apply reads n.a., and the notes say why
    _, text = compile_tex(out / "tables" / "instruments.standalone.tex", where="pdf-crafted")
    flat = re.sub(r"\s+", " ", text)
    assert "n.a." in flat and "exactly identified, so there is nothing to test" in flat


@needs_tex
def test_hostile_labels_stars_and_every_row_kind_compile():
    loaded, specs, results = synth_fit()
    _, text = compile_tex(synth_out() / "tables" / "hostile.standalone.tex", where="pdf-synth")
    flat = re.sub(r"\s+", " ", text)
    assert "pipes, *stars*" in flat and "& 50% #1 {x}" in flat and "treat|ment *x*" in flat
    ok = [r for r in results if r.status == "ok" and r.labels.get("errors") == "robust"]
    for r in ok:
        h = r.headline()
        assert fmt(h.estimate, 4) in flat
        assert fmt(r.ols.term("x").estimate, 4) in flat
        assert fmt(r.reduced_form.terms[0].estimate, 4) in flat
    assert "***" in flat and "* p < 0.10" in flat  # stars switched on, and explained
    assert "could not be estimated" in flat  # the collinear variant's column


@needs_tex
def test_fragments_input_into_a_document():
    """The fragments are for \\input: a document loading the three packages takes them all."""
    work = scratch() / "input-doc"
    work.mkdir(parents=True, exist_ok=True)
    for name in DEMO_TABLES:
        shutil.copy(demo_out() / "tables" / f"{name}.tex", work / f"{name}.tex")
    body = "\n".join(f"\\input{{{n}}}\n\\clearpage" for n in DEMO_TABLES)
    (work / "paper.tex").write_text(
        "\\documentclass{article}\n\\usepackage[a4paper,margin=1cm,landscape]{geometry}\n"
        "\\usepackage{booktabs}\n\\usepackage{siunitx}\n\\usepackage{threeparttable}\n"
        f"\\begin{{document}}\n{body}\n\\end{{document}}\n")
    _, text = compile_tex(work / "paper.tex", where="pdf-input")
    loaded, _, _ = demo_fit()
    titles = [t.title for t in loaded.spec.table] + ["Baseline and one change at a time"]
    for t in titles:
        assert t in text


@needs_tex
def test_recompiling_gives_an_identical_pdf():
    src = demo_out() / "tables" / "instruments.standalone.tex"
    a, _ = compile_tex(src)
    b, _ = compile_tex(src, where="pdf-again")
    assert a.read_bytes() == b.read_bytes()


def test_latex_structure_and_notes():
    text = (demo_out() / "tables" / "instruments.tex").read_text()
    for piece in ["\\toprule", "\\midrule", "\\bottomrule", "\\begin{threeparttable}",
                  "\\begin{tablenotes}", "{S}", "table-format=", "\\label{tab:instruments}"]:
        assert piece in text
    assert "\\documentclass" not in text  # a fragment
    notes = text[text.index("\\begin{tablenotes}"):]
    assert "IV estimator: 2SLS" in notes
    assert "clustered by district" in notes
    assert "No significance stars" in notes
    assert "local to compliers" in notes and "exclusion restriction" in notes
    assert "\\textsuperscript{*" not in text  # stars are off by default
    standalone = (demo_out() / "tables" / "instruments.standalone.tex").read_text()
    assert standalone.startswith("% specflow") and "\\documentclass" in standalone
    assert text.strip() in standalone


def test_latex_escape_neutralises_specials():
    from specflow.collate import latex_escape

    assert latex_escape("a_b & c%") == r"a\_b \& c\%"
    assert latex_escape("#$") == r"\#\$"
    assert latex_escape("{x}") == r"\{x\}"
    assert latex_escape("\\input{x}") == r"$\backslash$input\{x\}"
    assert latex_escape("\u2020") == r"$\dagger$"
    assert latex_escape("caf\u00e9") == "caf\u00e9"  # Latin-1 kept
    assert latex_escape("\u0142\u00f3d\u017a") == "?\u00f3dz"  # transliterated or '?'


def test_no_output_calls_a_specification_valid():
    for out in (demo_out(), crafted_out(), synth_out()):
        for p in list((out / "tables").iterdir()) + [out / "report.html"]:
            assert not re.search(r"\bvalid\b", p.read_text(), re.IGNORECASE), p
