"""The corpus of bad specs: each file gets exactly its expected one-line messages and exit code 2.

Every ``tests/bad_specs/*.toml`` departs from the valid ``_base.toml`` by one fault and starts
with one ``# expect: ...`` comment per line that ``specflow check`` must print on stderr
(after ``error: ``), in order and nothing else. Placeholders: ``{file}`` is the spec path as
given on the command line, ``{dir}`` the corpus folder (resolved), ``{id}`` a specification id
(12 hex digits: ids hash the whole specification, so they are not spelled out here).

The expected lines were written by hand-checking each message against the fault the file
carries (key path, line number of that key in the file, the column or value named).
"""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest

from specflow import cli
from specflow.errors import SpecError

ROOT = Path(__file__).resolve().parents[1]
CORPUS = ROOT / "tests" / "bad_specs"
FILES = sorted(p for p in CORPUS.glob("*.toml") if not p.name.startswith("_"))

# Problems about the file as a whole carry no key path (and possibly no line).
FILE_LEVEL = re.compile(r"TOML syntax error: |spec file is not UTF-8 |required key '(study|data|model)' is missing$")


def expected_lines(path: Path) -> list[str]:
    out = []
    for raw in path.read_bytes().split(b"\n"):
        if not raw.startswith(b"# expect: "):
            break
        out.append(raw[len(b"# expect: "):].decode("utf-8"))
    return out


def as_pattern(template: str, shown: str) -> re.Pattern:
    text = re.escape(template)
    text = text.replace(re.escape("{file}"), re.escape(shown))
    text = text.replace(re.escape("{dir}"), re.escape(str(CORPUS.resolve())))
    text = text.replace(re.escape("{id}"), "[0-9a-f]{12}")
    return re.compile("error: " + text)


def run_check(argv: list[str], capsys) -> tuple[int, str, str]:
    rc = cli.main(argv)
    cap = capsys.readouterr()
    return rc, cap.out, cap.err


def test_corpus_is_large_enough():
    assert len(FILES) >= 50
    for p in FILES:
        assert expected_lines(p), f"{p.name} has no '# expect:' line"


def test_base_spec_checks_clean(monkeypatch, capsys):
    monkeypatch.chdir(ROOT)
    rc, out, err = run_check(["check", "tests/bad_specs/_base.toml"], capsys)
    assert (rc, err) == (0, "")
    assert "ok: 4 specifications" in out


def test_symlink_fixture_is_a_symlink():
    link = CORPUS / "data" / "outside_link.csv"
    assert link.is_symlink(), "the corpus needs data/outside_link.csv to be a symlink (git core.symlinks)"
    assert not link.resolve().is_relative_to(CORPUS.resolve())


@pytest.mark.parametrize("path", FILES, ids=[p.stem for p in FILES])
def test_bad_spec(path: Path, monkeypatch, capsys):
    monkeypatch.chdir(ROOT)
    shown = str(path.relative_to(ROOT))
    rc, out, err = run_check(["check", shown], capsys)
    assert "Traceback" not in err and "internal error" not in err
    assert rc == 2, err
    assert out == ""
    got = err.splitlines()
    want = expected_lines(path)
    assert len(got) == len(want), "\n".join(got)
    for line, template in zip(got, want):
        assert as_pattern(template, shown).fullmatch(line), f"\n got: {line}\nwant: error: {template}"
        # every message names a key path (and its line), unless it is about the whole file
        rest = line[len(f"error: {shown}"):]
        if not FILE_LEVEL.search(line):
            assert re.match(r"^:\d+: ([^ :\"]|\"[^\"]*\")+: ", rest), f"no line and key path in: {line}"


def test_messages_are_one_line_and_printable():
    for p in FILES:
        for line in expected_lines(p):
            assert line.isprintable(), p.name


def test_debug_flag_shows_the_exception(monkeypatch):
    monkeypatch.chdir(ROOT)
    with pytest.raises(SpecError):
        cli.main(["--debug", "check", "tests/bad_specs/column_outcome.toml"])


def test_spec_file_not_found(monkeypatch, capsys):
    monkeypatch.chdir(ROOT)
    rc, out, err = run_check(["check", "tests/bad_specs/no_such_spec.toml"], capsys)
    assert rc == 2
    assert err == "error: tests/bad_specs/no_such_spec.toml: spec file not found\n"


def test_spec_path_is_a_folder(monkeypatch, capsys):
    monkeypatch.chdir(ROOT)
    rc, out, err = run_check(["check", "tests/bad_specs/data"], capsys)
    assert rc == 2
    assert err.startswith("error: tests/bad_specs/data: cannot read spec file: ") and err.count("\n") == 1


def test_command_line_process_prints_no_traceback():
    # the installed entry point as a user runs it: one line, exit code 2
    proc = subprocess.run([sys.executable, "-m", "specflow.cli", "check", "tests/bad_specs/expr_import.toml"],
                          cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert proc.stderr.count("\n") == 1 and "'__import__' is not allowed" in proc.stderr
