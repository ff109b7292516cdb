"""Malformed specs: `specflow check` exits 2 and prints exactly one line per problem.

Each case is a small inline spec (the well-formed BASE with one fault) written into tmp_path with
its data. Every expected line was written from the fault: the file, the line of the key at
fault (computed from the text: the line holding the given needle), the dotted key path and
the message. Nothing may show a traceback.
"""

from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest

from specflow import cli

BASE = """\
[study]
title = "spec errors"
seed = 3

[data.d]
path = "d.csv"

[data.d.derive]
lx = "log(x + 10)"

[model]
data = "d"
outcome = "y"
endogenous = ["x"]
instruments = ["z1", "z2"]
controls = ["c1"]
cluster = ["g"]
estimator = "2sls"
covariance = "robust"

[axes.instruments]
baseline = "both"
[axes.instruments.variants.z1only]
instruments = ["z1"]
"""

ID = "{id}"  # placeholder for a specification id (12 hex digits) in expected messages


def frame() -> pd.DataFrame:
    rng = np.random.default_rng(0)
    n = 60
    df = pd.DataFrame({c: rng.normal(size=n) for c in ("y", "x", "x2", "z1", "z2", "c1")})
    df["g"] = rng.integers(0, 5, n)
    df["txt"] = ["a", "b"] * (n // 2)
    return df


def edit(old: str, new: str, text: str = BASE) -> str:
    assert text.count(old) == 1, old
    return text.replace(old, new)


def line_of(text: str, needle: str) -> int:
    for i, ln in enumerate(text.splitlines(), start=1):
        if needle in ln:
            return i
    raise AssertionError(f"{needle!r} not in the spec text")


# (case id, spec text, [(needle of the line at fault or None, key path, message), ...])
CASES = [
    ("toml syntax error",
     edit('outcome = "y"', 'outcome = "y'),
     [('outcome = "y', "", "TOML syntax error: Illegal character '\\n'")]),
    ("duplicate key",
     edit("seed = 3", "seed = 3\nseed = 4"),
     [("seed = 4", "", "TOML syntax error: Cannot overwrite a value")]),
    ("unknown key in a variant",
     edit('[axes.instruments.variants.z1only]\ninstruments = ["z1"]',
          '[axes.instruments.variants.z1only]\ninstrumnts = ["z1"]'),
     [("instrumnts", "axes.instruments.variants.z1only.instrumnts",
       "unknown key 'instrumnts'; did you mean 'instruments'?")]),
    ("unknown key in the model",
     edit('controls = ["c1"]', 'control = ["c1"]'),
     [("control = ", "model.control", "unknown key 'control'; did you mean 'controls'?")]),
    ("unknown table",
     BASE + '\n[tabel]\nname = "x"\n',
     [("[tabel]", "tabel", "unknown key 'tabel'; did you mean 'table'?")]),
    ("wrong type: text for an integer",
     edit("seed = 3", 'seed = "three"'),
     [("seed =", "study.seed", "Input should be a valid integer (got 'three')")]),
    ("wrong type: number for a list",
     edit('endogenous = ["x"]', "endogenous = 5"),
     [("endogenous =", "model.endogenous", "Input should be a valid list (got 5)")]),
    ("value out of range",
     edit('covariance = "robust"', 'covariance = "robust"\nlevel = 1.5'),
     [("level =", "model.level", "Input should be less than 1 (got 1.5)")]),
    ("empty instrument list",
     edit('instruments = ["z1", "z2"]', "instruments = []"),
     [("instruments = []", "model.instruments",
       "List should have at least 1 item after validation, not 0")]),
    ("missing required key (points at its table)",
     edit('outcome = "y"\n', ""),
     [("[model]", "model.outcome", "required key 'outcome' is missing")]),
    ("missing study title",
     edit('title = "spec errors"\n', ""),
     [("[study]", "study.title", "required key 'title' is missing")]),
    ("unknown estimator",
     edit('estimator = "2sls"', 'estimator = "ols"'),
     [("estimator =", "model.estimator",
       "'ols' is not allowed; expected one of '2sls', 'liml', 'fuller' or 'gmm'")]),
    ("unknown dataset reference",
     edit('data = "d"', 'data = "dd"'),
     [('data = "dd"', "model.data", "unknown dataset 'dd'; did you mean 'd'?")]),
    ("unknown dataset in a variant",
     edit('instruments = ["z1"]\n', 'instruments = ["z1"]\ndata = "e"\n'),
     [('data = "e"', "axes.instruments.variants.z1only.data", "unknown dataset 'e'")]),
    ("grid rule with an unknown axis",
     BASE + '\n[grid]\nexclude = [{ instrument = "z1only" }]\n',
     [("exclude =", "grid.exclude[0]", "unknown axis 'instrument'; did you mean 'instruments'?")]),
    ("grid rule with an unknown label",
     BASE + '\n[grid]\nonly = [{ instruments = "z1_only" }]\n',
     [("only =", "grid.only[0]",
       "axis 'instruments' has no variant 'z1_only'; did you mean 'z1only'?")]),
    ("variant that changes nothing",
     BASE + '\n[axes.sample]\n[axes.sample.variants.same]\ndescription = "nothing"\n',
     [("[axes.sample.variants.same]", "axes.sample.variants.same",
       "variant 'same' of axis 'sample' changes nothing")]),
    ("variant that repeats the baseline",
     BASE + '\n[axes.est]\n[axes.est.variants.again]\nestimator = "2sls"\n',
     [("[axes.est.variants.again]", "axes.est.variants.again",
       "variant 'again' of axis 'est' only repeats the baseline's values (estimator)")]),
    ("filter that is not boolean",
     edit('covariance = "robust"', 'covariance = "robust"\nfilter = "x + 1"'),
     [("filter =", "model.filter", 'filter "x + 1" is not a true/false condition')]),
    ("expression with an unknown function",
     edit('lx = "log(x + 10)"', 'lx = "logg(x + 10)"'),
     [("lx =", "data.d.derive.lx",
       'expression "logg(x + 10)": unknown function \'logg\' at position 1 (allowed: abs, '
       "asinh, between, ceil, clip, exp, fill_missing, floor, if_else, is_missing, log, log1p, "
       "lower, max, min, not_missing, round, sqrt, square, standardize, upper; did you mean "
       "'log'?)")]),
    ("covariance cluster without a cluster variable",
     edit('cluster = ["g"]\n', "", edit('covariance = "robust"', 'covariance = "cluster"')),
     [("covariance =", "model.covariance", "covariance 'cluster' needs model.cluster")]),
    ("two problems at once, in file order",
     edit("seed = 3", 'seed = "x"', edit('estimator = "2sls"', 'estimator = "ols"')),
     [("seed =", "study.seed", "Input should be a valid integer (got 'x')"),
      ("estimator =", "model.estimator",
       "'ols' is not allowed; expected one of '2sls', 'liml', 'fuller' or 'gmm'")]),
    # -- problems found against the data (specflow check reads it)
    ("column not in the data",
     edit('controls = ["c1"]', 'controls = ["cc1"]'),
     [("controls =", "model.controls",
       "column 'cc1' (controls) is not in dataset 'd'; did you mean 'c1'?")]),
    ("column set by a variant not in the data",
     edit('instruments = ["z1"]\n', 'instruments = ["z7"]\n'),
     [('instruments = ["z7"]', "axes.instruments.variants.z1only.instruments",
       "column 'z7' (instruments) is not in dataset 'd'")]),
    ("data file not found",
     edit('path = "d.csv"', 'path = "missing.csv"'),
     [("path =", "data.d.path", "data file 'missing.csv' not found")]),
    ("overlapping roles: instrument also a control",
     edit('controls = ["c1"]', 'controls = ["c1", "z1"]'),
     [("controls =", "model.controls",
       f"specification {ID} (instruments=both): column 'z1' is both instruments and controls")]),
    ("overlapping roles: control also absorbed",
     edit('controls = ["c1"]', 'controls = ["c1"]\nabsorb = ["c1"]'),
     [("absorb =", "model.absorb",
       f"specification {ID} (instruments=both): column 'c1' is both controls and absorbed")]),
    ("order condition fails in a variant",
     edit('endogenous = ["x"]', 'endogenous = ["x", "x2"]'),
     [('instruments = ["z1"]', "axes.instruments.variants.z1only.instruments",
       f"specification {ID} (instruments=z1only): order condition fails: 1 instrument(s) for "
       "2 endogenous regressor(s)")]),
    ("filter leaving no rows",
     edit('covariance = "robust"', 'covariance = "robust"\nfilter = "y > 1000"'),
     [("filter =", "model.filter", "filter \"y > 1000\" leaves no rows of dataset 'd'")]),
    ("filter naming a column not in the data",
     edit('covariance = "robust"', 'covariance = "robust"\nfilter = "yy > 0"'),
     [("filter =", "model.filter",
       "filter \"yy > 0\" uses column 'yy' not in dataset 'd'; did you mean 'y'?")]),
    ("dataset filter leaving no rows",
     edit('path = "d.csv"', 'path = "d.csv"\nfilter = "y > 1000"'),
     [('filter = "y > 1000"', "data.d.filter", "dataset 'd' has no rows after its filter")]),
]


def expected_pattern(file: str, text: str, needle: str | None, path: str, message: str) -> str:
    where = file + (f":{line_of(text, needle)}" if needle else "")
    key = f" {path}:" if path else ""
    pat = re.escape(f"error: {where}:{key} {message}")
    return "^" + pat.replace(re.escape(ID), "[0-9a-f]{12}") + "$"


@pytest.mark.parametrize("case,text,expected", CASES, ids=[c[0] for c in CASES])
def test_check_reports_each_problem_on_one_line(tmp_study, capsys, case, text, expected):
    path = tmp_study(text, data={"d.csv": frame()}).resolve()
    rc = cli.main(["check", str(path)])
    out, err = capsys.readouterr()
    assert rc == 2, (out, err)
    assert "Traceback" not in err and "internal error" not in err
    lines = err.splitlines()
    assert len(lines) == len(expected), err
    for got, (needle, key, message) in zip(lines, expected):
        assert re.match(expected_pattern(str(path), text, needle, key, message), got), got
    assert out == ""


def test_cases_are_many():
    assert len(CASES) >= 15


def test_base_spec_is_fine(tmp_study, capsys):
    path = tmp_study(BASE, data={"d.csv": frame()})
    assert cli.main(["check", str(path)]) == 0
    out, err = capsys.readouterr()
    assert err == ""
    assert out.strip() == "study.toml: ok: 2 specifications over 1 axes; data: d (60 rows)"


def test_spec_file_not_found(tmp_path, capsys):
    path = tmp_path / "nope.toml"
    assert cli.main(["check", str(path)]) == 2
    assert capsys.readouterr().err == f"error: {path}: spec file not found\n"


def test_text_column_in_a_numeric_role_is_caught_by_check(tmp_study, capsys):
    text = edit('controls = ["c1"]', 'controls = ["txt"]')
    path = tmp_study(text, data={"d.csv": frame()}).resolve()
    rc = cli.main(["check", str(path)])
    err = capsys.readouterr().err
    assert rc == 2
    assert f"{path}:{line_of(text, 'controls =')}: model.controls:" in err
    assert "'txt'" in err and "numeric" in err


def test_schema_is_json_with_the_top_level_tables(capsys):
    assert cli.main(["schema"]) == 0
    schema = json.loads(capsys.readouterr().out)
    assert {"study", "data", "model", "axes"} <= set(schema["properties"])
    assert set(schema["required"]) >= {"study", "data", "model"}


def test_schema_out_file(tmp_path, capsys):
    target = tmp_path / "schema.json"
    assert cli.main(["schema", "--out", str(target)]) == 0
    schema = json.loads(target.read_text(encoding="utf-8"))
    assert {"study", "data", "model", "axes"} <= set(schema["properties"])
    assert capsys.readouterr().out.strip() == f"wrote {target}"
