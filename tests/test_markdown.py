"""Markdown tables: GitHub-flavoured pipe tables that parse (markdown-it-py's table rule) with
the expected rows and cells, escape | * _, and carry the FitResults' numbers.

Expected strings are formatted from the FitResults in the test (test_collate.fmt).
"""

from __future__ import annotations

import json
import re

import pytest

from test_collate import DEMO_TABLES, crafted_out, demo_fit, demo_out, fmt, synth_fit, synth_out

markdown_it = pytest.importorskip("markdown_it", reason="markdown-it-py is not installed")


def parse_tables(text: str) -> list[list[list[str]]]:
    """Every table in a Markdown text as rows of cells (plain text, escapes resolved)."""
    md = markdown_it.MarkdownIt("commonmark").enable("table")
    tables, rows, row = [], None, None
    for tok in md.parse(text):
        if tok.type == "table_open":
            rows = []
        elif tok.type == "table_close":
            tables.append(rows)
            rows = None
        elif tok.type == "tr_open":
            row = []
        elif tok.type == "tr_close":
            rows.append(row)
        elif tok.type == "inline" and rows is not None:
            row.append("".join(c.content for c in tok.children or []))
    return tables


def table_lines(text: str) -> list[str]:
    return [line for line in text.splitlines() if line.startswith("|")]


def cell_count(line: str) -> int:
    """Cells of a pipe-table source line: unescaped pipes minus one."""
    return len(re.findall(r"(?<!\\)\|", line)) - 1


def _columns(out, name, results):
    ids = json.loads((out / "exhibits.json").read_text())[f"tables/{name}"]
    by_id = {r.spec_id: r for r in results}
    return [by_id.get(i) for i in ids]


@pytest.mark.parametrize("name", DEMO_TABLES)
def test_demo_markdown_parses_as_one_table_with_the_fit_numbers(name):
    _, _, results = demo_fit()
    text = (demo_out() / "tables" / f"{name}.md").read_text()
    tables = parse_tables(text)
    assert len(tables) == 1
    (rows,) = tables
    cols = _columns(demo_out(), name, results)
    header = rows[0]
    assert len(header) == 1 + len(cols)
    assert all(len(r) == len(header) for r in rows)
    lines = table_lines(text)
    assert len(lines) == len(rows) + 1  # + the alignment row
    for line in lines:
        assert cell_count(line) == len(header), line
    # row labels in order: the IV panel heading, the coefficient, its SE, ...
    labels = [r[0] for r in rows[1:]]
    x = cols[0].endogenous[0]
    assert labels[0].startswith("IV estimate") and labels[1] == x and labels[2] == ""
    assert "Observations" in labels and "Clusters" in labels
    iv_row = rows[2]
    se_row = rows[3]
    n_row = rows[1 + labels.index("Observations")]
    for j, r in enumerate(cols, start=1):
        h = r.headline()
        weak = bool(r.diagnostics.get("effective_f") and r.diagnostics["effective_f"].extra.get("weak_tau10"))
        assert iv_row[j] == fmt(h.estimate, 3) + ("\u2020" if weak else "")
        assert se_row[j] == f"({fmt(h.se, 3)})"
        assert n_row[j] == str(r.nobs)
        if "effective_f" in r.diagnostics and r.diagnostics["effective_f"].applicable:
            eff_row = rows[1 + labels.index("Effective F")]
            assert eff_row[j].rstrip("\u2020") == fmt(r.diagnostics["effective_f"].statistic, 2)


def test_markdown_escapes_pipes_stars_and_underscores():
    loaded, specs, results = synth_fit()
    text = (synth_out() / "tables" / "hostile.md").read_text()
    lines = table_lines(text)
    header_cells = cell_count(lines[0])
    assert all(cell_count(line) == header_cells for line in lines)
    (rows,) = parse_tables(text)
    labels = [r[0] for r in rows]
    # the labels come back exactly as declared: nothing was taken for markup or a cell break
    assert "treat|ment *x* _1_ & 5% #" in labels
    assert "Control w_1 | yes" in labels
    assert "treat\\|ment \\*x\\* \\_1\\_" in text
    title = loaded.spec.table[0].title
    md = markdown_it.MarkdownIt("commonmark").enable("table")
    heading = next(t for t in md.parse(text) if t.type == "inline")
    assert "".join(c.content for c in heading.children) == title
    # stars switched on: appended to coefficients (escaped in the source)
    assert any(c.endswith("***") for r in rows for c in r)
    assert "\\*\\*\\*" in text


def test_failed_and_unbounded_cells_say_so():
    _, _, results = synth_fit()
    (rows,) = parse_tables((synth_out() / "tables" / "hostile.md").read_text())
    assert rows[2][3] == "failed"  # the collinear variant's IV coefficient cell
    _, _, demo_results = demo_fit()
    from test_collate import craft

    crafted = craft(list(demo_results))
    cols = _columns(crafted_out(), "default", crafted)
    (rows,) = parse_tables((crafted_out() / "tables" / "default.md").read_text())
    robust = next(r for r in rows if r[0].endswith("robust set"))
    for j, r in enumerate(cols, start=1):
        cs = r.robust_set()
        if cs.kind == "whole-line":
            assert robust[j] == "(-\u221e, \u221e)"
        elif cs.kind == "two-rays":
            (lo, a), (b, hi) = cs.pieces
            assert robust[j] == f"(-\u221e, {fmt(a, 3)}] \u222a [{fmt(b, 3)}, \u221e)"
        elif cs.kind == "union":  # the half-line [a, inf)
            assert robust[j] == f"[{fmt(cs.pieces[0][0], 3)}, \u221e)"
        else:
            assert robust[j] == f"[{fmt(cs.pieces[0][0], 3)}, {fmt(cs.pieces[0][1], 3)}]"


def test_md_escape():
    from specflow.collate import md_escape

    assert md_escape("a|b*c_d") == "a\\|b\\*c\\_d"
    assert md_escape("x\\y") == "x\\\\y"
    assert md_escape("<b>") == "\\<b>"


def test_labels_never_become_links_or_markup():
    from specflow.collate import md_escape

    label = "[see](http://example.org) *a* _b_ | <i>c</i> [0.1, 0.2]"
    md = markdown_it.MarkdownIt("commonmark").enable("table")
    toks = md.parse(f"| h |\n| --- |\n| {md_escape(label)} |\n")
    inline = [t for t in toks if t.type == "inline"][-1]
    assert {c.type for c in inline.children} <= {"text", "text_special"}
    assert "".join(c.content for c in inline.children) == label
