"""The HTML report: one self-contained file; opened in headless Chromium without console errors;
it holds every table (with the FitResults' numbers), the figures, failures and cautions."""

from __future__ import annotations

import base64
import json
import re
import shutil
import subprocess
import tempfile
from html.parser import HTMLParser
from pathlib import Path

import pytest

from test_collate import DEMO_TABLES, demo_fit, demo_out, fmt, scratch, synth_fit, synth_out

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
needs_chromium = pytest.mark.skipif(
    CHROMIUM is None, reason="chromium is not installed (scripts/sysdeps.sh installs it)")
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--enable-logging=stderr", "--v=0"]


def chromium(page: Path, *extra: str) -> subprocess.CompletedProcess:
    with tempfile.TemporaryDirectory(prefix="specflow-chromium-") as profile:
        return subprocess.run([CHROMIUM, *FLAGS, f"--user-data-dir={profile}", *extra, page.as_uri()],
                              capture_output=True, text=True, timeout=120)


def console_lines(stderr: str) -> list[str]:
    """Messages the page wrote to the console or failed loads Chromium reported for it."""
    return [line for line in stderr.splitlines()
            if "CONSOLE" in line or "Failed to load resource" in line or "Uncaught" in line]


class Tables(HTMLParser):
    """Collect every <table id=...> as rows of cell texts."""

    def __init__(self):
        super().__init__()
        self.tables: dict[str, list[list[str]]] = {}
        self._id = None
        self._row = None
        self._cell = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "table" and a.get("id"):
            self._id = a["id"]
            self.tables[self._id] = []
        elif tag == "tr" and self._id:
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []
        elif tag == "br" and self._cell is not None:
            self._cell.append(" ")

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        elif tag == "tr" and self._row is not None:
            self.tables[self._id].append(self._row)
            self._row = None
        elif tag == "table":
            self._id = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def parse(html: str) -> dict[str, list[list[str]]]:
    p = Tables()
    p.feed(html)
    return p.tables


@needs_chromium
def test_console_check_catches_errors():
    """Positive control: the console scan does see a page's error."""
    page = scratch() / "control.html"
    page.write_text("<!DOCTYPE html><html><head><meta charset='utf-8'><title>c</title></head>"
                    "<body><script>console.error('specflow-control-message')</script></body></html>")
    proc = chromium(page, "--dump-dom")
    assert any("specflow-control-message" in line for line in console_lines(proc.stderr))


@needs_chromium
def test_report_opens_in_chromium_without_console_errors():
    shot = scratch() / "report.png"
    proc = chromium(demo_out() / "report.html", f"--screenshot={shot}", "--window-size=1280,3000")
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert console_lines(proc.stderr) == []
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


@needs_chromium
def test_rendered_page_has_every_table_with_the_fit_numbers():
    proc = chromium(demo_out() / "report.html", "--dump-dom")
    assert proc.returncode == 0
    assert console_lines(proc.stderr) == []
    tables = parse(proc.stdout)
    for name in DEMO_TABLES:
        assert f"table-{name}" in tables, f"table {name} missing from the rendered page"
    _, specs, results = demo_fit()
    by_id = {r.spec_id: r for r in results}
    exhibits = json.loads((demo_out() / "exhibits.json").read_text())
    for name in DEMO_TABLES:
        rows = tables[f"table-{name}"]
        labels = [r[0] for r in rows]
        x = results[0].endogenous[0]
        iv = rows[labels.index(x)]  # the first row labelled with the regressor: the IV panel
        se = rows[labels.index(x) + 1]
        for j, sid in enumerate(exhibits[f"tables/{name}"], start=1):
            h = by_id[sid].headline()
            assert iv[j].rstrip("\u2020") == fmt(h.estimate, 3)
            assert se[j] == f"({fmt(h.se, 3)})"
    grid = tables["all-specs"]
    assert len(grid) == 1 + len(specs)
    shown = {row[0]: row for row in grid[1:]}
    for sp in specs:
        row = shown[sp.id]
        assert fmt(by_id[sp.id].headline().estimate, 3) in row


def test_report_is_a_single_file_without_network():
    html = (demo_out() / "report.html").read_text()
    assert "<script" not in html.lower()
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:)?//""", html)
    assert "<link rel=\"stylesheet\"" not in html
    imgs = re.findall(r'<img src="data:image/png;base64,([A-Za-z0-9+/=]+)"', html)
    figs = sorted((demo_out() / "figures").glob("*.png"))
    assert len(imgs) == len(figs)
    decoded = {base64.b64decode(i) for i in imgs}
    assert decoded == {f.read_bytes() for f in figs}  # exactly the figures on disk


def test_report_states_the_grid_failures_and_cautions():
    loaded, specs, results = synth_fit()
    html = (synth_out() / "report.html").read_text()
    assert loaded.spec.study.title in html
    assert f"{len(specs)} specifications" in html
    failed = [r for r in results if r.status == "failed"]
    tables = parse(html)
    rows = tables["failed-specs"][1:]
    assert len(rows) == len(failed)
    from html import unescape

    for r in failed:
        assert any(row[0] == r.spec_id and unescape(row[-1]) == r.reason for row in rows)
    for caution in ["Weak instruments", "Local to compliers", "Exclusion restriction"]:
        assert caution in html
    assert "hostile" in "".join(tables)  # the declared table is there too


def test_html_escapes_labels():
    html = (synth_out() / "report.html").read_text()
    assert "treat|ment *x* _1_ &amp; 5% #" in html
    assert "<x>" not in html
