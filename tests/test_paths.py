"""Paths: datasets stay inside the study folder (symlinks resolved) unless allowed; outputs stay
inside the output folder.

The rules (decided in specflow.spec and specflow.data):

* a dataset's path is resolved against the spec file's folder, symlinks included; a file that
  resolves outside that folder is refused unless the dataset says ``allow_outside = true``;
* the output folder may be anywhere (the demo writes to ``../results/...``) but may not contain
  the spec file (``.``, ``..``, ``""``) or any dataset, because specflow writes and prunes
  below it;
* every file name specflow builds below the output folder comes from a table name, an axis
  name or a dataset name (plain identifiers, checked on load) or a specification id (12 hex
  digits), so no name from a spec file can climb out of the output folder.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from specflow.data import read_dataset, resolve_path
from specflow.errors import SpecError
from specflow.grid import expand
from specflow.spec import NAME_RE, load_spec

ROOT = Path(__file__).resolve().parents[1]

FRAME = pd.DataFrame({"y": [1.0, 2.0, 3.0, 4.5], "x": [0.5, 1.0, 1.4, 2.2], "z": [0.1, 0.4, 0.2, 0.9]})


def spec_text(path: str, extra_data: str = "", output: str = "results", table: str = "main") -> str:
    return f"""
[study]
title = "paths"
output = {output!r}

[data.d]
path = {path!r}
{extra_data}

[model]
outcome = "y"
endogenous = ["x"]
instruments = ["z"]

[[table]]
name = {table!r}
"""


def write(folder: Path, text: str, name: str = "study.toml") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    p = folder / name
    p.write_text(text.lstrip("\n"))
    return p


def messages(exc: pytest.ExceptionInfo) -> list[str]:
    return [p.message for p in exc.value.problems]


@pytest.fixture
def layout(tmp_path: Path) -> dict[str, Path]:
    """tmp/study (the spec's folder, with data/inside.csv) and tmp/elsewhere/outside.csv."""
    study, elsewhere = tmp_path / "study", tmp_path / "elsewhere"
    (study / "data").mkdir(parents=True)
    elsewhere.mkdir()
    FRAME.to_csv(study / "data" / "inside.csv", index=False)
    FRAME.to_csv(elsewhere / "outside.csv", index=False)
    return {"study": study, "elsewhere": elsewhere}


def test_path_inside_is_read(layout):
    loaded = load_spec(write(layout["study"], spec_text("data/inside.csv")))
    assert resolve_path(loaded, "d") == (layout["study"] / "data" / "inside.csv").resolve()
    df, _ = read_dataset(loaded, "d")
    assert list(df.columns) == ["y", "x", "z"]


def test_dotdot_that_stays_inside_is_fine(layout):
    loaded = load_spec(write(layout["study"], spec_text("data/../data/./inside.csv")))
    assert resolve_path(loaded, "d") == (layout["study"] / "data" / "inside.csv").resolve()


@pytest.mark.parametrize("kind", ["relative", "absolute"])
def test_path_outside_is_refused_unless_allowed(layout, kind):
    target = "../elsewhere/outside.csv" if kind == "relative" else str(layout["elsewhere"] / "outside.csv")
    loaded = load_spec(write(layout["study"], spec_text(target)))
    with pytest.raises(SpecError) as exc:
        read_dataset(loaded, "d")
    (problem,) = exc.value.problems
    assert problem.path == "data.d.path" and problem.line == 6
    assert "resolves outside the study folder" in problem.message and "allow_outside" in problem.message

    loaded = load_spec(write(layout["study"], spec_text(target, "allow_outside = true")))
    df, _ = read_dataset(loaded, "d")
    assert len(df) == len(FRAME)


def test_symlinked_file_pointing_outside_is_refused(layout):
    link = layout["study"] / "data" / "link.csv"
    os.symlink(layout["elsewhere"] / "outside.csv", link)
    loaded = load_spec(write(layout["study"], spec_text("data/link.csv")))
    with pytest.raises(SpecError) as exc:
        read_dataset(loaded, "d")
    assert "resolves outside the study folder" in messages(exc)[0]
    loaded = load_spec(write(layout["study"], spec_text("data/link.csv", "allow_outside = true")))
    assert resolve_path(loaded, "d") == (layout["elsewhere"] / "outside.csv").resolve()


def test_symlinked_folder_pointing_outside_is_refused(layout):
    os.symlink(layout["elsewhere"], layout["study"] / "mirror")
    loaded = load_spec(write(layout["study"], spec_text("mirror/outside.csv")))
    with pytest.raises(SpecError) as exc:
        read_dataset(loaded, "d")
    assert "resolves outside the study folder" in messages(exc)[0]


def test_symlink_that_stays_inside_is_fine(layout):
    os.symlink(layout["study"] / "data" / "inside.csv", layout["study"] / "alias.csv")
    loaded = load_spec(write(layout["study"], spec_text("alias.csv")))
    df, _ = read_dataset(loaded, "d")
    assert len(df) == len(FRAME)


def test_study_reached_through_a_symlinked_folder(layout, tmp_path):
    """A spec opened through a symlinked folder: its data still count as inside."""
    write(layout["study"], spec_text("data/inside.csv"))
    os.symlink(layout["study"], tmp_path / "shortcut")
    loaded = load_spec(tmp_path / "shortcut" / "study.toml")
    df, _ = read_dataset(loaded, "d")
    assert len(df) == len(FRAME)


def test_symlink_loop_is_one_line(layout):
    os.symlink("loop_b", layout["study"] / "loop_a")
    os.symlink("loop_a", layout["study"] / "loop_b")
    loaded = load_spec(write(layout["study"], spec_text("loop_a")))
    with pytest.raises(SpecError) as exc:
        read_dataset(loaded, "d")
    (problem,) = exc.value.problems
    assert problem.path == "data.d.path"
    assert "\n" not in problem.message


def test_unreadable_file_is_one_line(layout, monkeypatch):
    """A file the user may not read (simulated: the tests may run as root, who reads anything)."""
    import specflow.data

    def refuse(path, *a, **k):
        raise PermissionError(13, "Permission denied", str(path))

    monkeypatch.setattr(specflow.data, "sha256_file", refuse)
    loaded = load_spec(write(layout["study"], spec_text("data/inside.csv")))
    with pytest.raises(SpecError) as exc:
        read_dataset(loaded, "d")
    assert messages(exc) == ["cannot read data file 'data/inside.csv': Permission denied"]


# --- the output folder ------------------------------------------------------------------------


@pytest.mark.parametrize("output", [".", "..", "", "../..", "./", "data/..", "/"])
def test_output_folder_may_not_contain_the_spec(layout, output):
    with pytest.raises(SpecError) as exc:
        load_spec(write(layout["study"], spec_text("data/inside.csv", output=output)))
    (problem,) = exc.value.problems
    assert problem.path == "study.output" and problem.line == 3
    assert "would contain the spec file" in problem.message


@pytest.mark.parametrize("output", ["data", "data/", "./data"])
def test_output_folder_may_not_hold_data(layout, output):
    with pytest.raises(SpecError) as exc:
        load_spec(write(layout["study"], spec_text("data/inside.csv", output=output)))
    assert messages(exc) == [f"output folder '{output}' contains dataset 'd' ('data/inside.csv'); "
                             "keep outputs and data apart"]


@pytest.mark.parametrize("output", ["results", "out/run1", "../shared_results/paths", "/tmp/specflow-out"])
def test_output_folder_elsewhere_is_allowed(layout, output):
    loaded = load_spec(write(layout["study"], spec_text("data/inside.csv", output=output)))
    assert loaded.output_dir == (layout["study"] / output).resolve()


def test_output_folder_through_symlink_to_study_is_refused(layout):
    os.symlink(layout["study"], layout["study"] / "here")
    with pytest.raises(SpecError) as exc:
        load_spec(write(layout["study"], spec_text("data/inside.csv", output="here")))
    assert "would contain the spec file" in messages(exc)[0]


HOSTILE_NAMES = ["../escape", "a/b", "/abs", "a\\b", "..", ".", "", "x.tex", "a b", "ok\x00",
                 "~user", "$HOME", "1st", "tab\tle"]


@pytest.mark.parametrize("name", HOSTILE_NAMES)
def test_table_names_that_are_paths_are_refused(layout, name):
    with pytest.raises(SpecError) as exc:
        load_spec(write(layout["study"], spec_text("data/inside.csv", table=name)))
    (problem,) = exc.value.problems
    assert problem.path == "table[0].name" and "must be a plain identifier" in problem.message


def q(text: str) -> str:
    """A TOML basic string holding ``text`` exactly."""
    out = []
    for ch in text:
        if ch in '"\\':
            out.append("\\" + ch)
        elif ch.isprintable():
            out.append(ch)
        else:
            out.append(f"\\u{ord(ch):04x}" if ord(ch) <= 0xFFFF else f"\\U{ord(ch):08x}")
    return '"' + "".join(out) + '"'


@pytest.mark.parametrize("name", HOSTILE_NAMES)
def test_dataset_names_that_are_paths_are_refused(layout, name):
    text = spec_text("data/inside.csv").replace("[data.d]", f"[data.{q(name)}]")
    text = text.replace("[model]\n", f"[model]\ndata = {q(name)}\n")
    with pytest.raises(SpecError) as exc:
        load_spec(write(layout["study"], text))
    assert any("must be a plain identifier" in m for m in messages(exc))


@pytest.mark.parametrize("name", ["../escape", "a/b", "x.y", "id"])
def test_axis_names_that_are_paths_or_reserved_are_refused(layout, name):
    text = spec_text("data/inside.csv") + f'\n[axes."{name}"]\n[axes."{name}".variants.other]\ncovariance = "unadjusted"\n'
    with pytest.raises(SpecError) as exc:
        load_spec(write(layout["study"], text))
    assert any(m.startswith(f"axis name '{name}'") for m in messages(exc))


@settings(max_examples=150, deadline=None)
@given(name=st.text(max_size=12))
def test_any_accepted_table_name_stays_inside_the_output_folder(tmp_path_factory, name):
    """Whatever a table is called, if the spec loads, its files land inside the output folder."""
    folder = tmp_path_factory.mktemp("names")
    FRAME.to_csv(folder / "d.csv", index=False)
    text = spec_text("d.csv").replace("name = 'main'", f"name = {q(name)}")
    try:
        loaded = load_spec(write(folder, text))
    except SpecError:
        return
    (table,) = loaded.spec.table
    assert re.fullmatch(NAME_RE, table.name)
    for suffix in (".tex", ".standalone.tex", ".md", ".pdf"):
        target = (loaded.output_dir / "tables" / f"{table.name}{suffix}").resolve()
        assert target.is_relative_to(loaded.output_dir)


def test_specification_ids_are_hex_file_names():
    loaded = load_spec(ROOT / "specs" / "canal_yields.toml")
    specs = expand(loaded)
    assert specs
    for sp in specs:
        assert re.fullmatch(r"[0-9a-f]{12}", sp.id)
        assert all(re.fullmatch(NAME_RE, a) for a in sp.labels)
