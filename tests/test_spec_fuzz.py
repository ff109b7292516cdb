"""Fuzzing the spec loader and ``specflow check``: whatever the text, specflow's own error or success.

Two sources of documents:

* random TOML documents: nested tables of keys drawn from specflow's own vocabulary and from
  random names, with values of every TOML type (and expression-like strings), written out by
  the small dumper below (checked to round-trip through ``tomli``, so the documents reach the
  validation and are not merely TOML syntax errors);
* mutations of the demo spec's text: lines deleted, duplicated or swapped, characters swapped,
  deleted, replaced or inserted.

``load_spec`` must return or raise ``SpecError``; ``specflow check`` must exit 0 or 2, never 3
(an internal error) and never print a traceback.
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import math
import re
import shutil
from pathlib import Path

import pytest
import tomli
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from specflow import cli
from specflow.errors import SpecError
from specflow.spec import load_spec

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "specs" / "canal_yields.toml"
DEMO_DATA = ROOT / "specs" / "data" / "farms.csv"
DEMO_ROWS = 300  # the check runs on an extract of the demo data, to keep each example fast

FUZZ = settings(deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                     HealthCheck.too_slow], derandomize=True)

# ---------------------------------------------------------------------------------------------
# A small TOML writer (only what the generated documents need)

BARE = re.compile(r"^[A-Za-z0-9_-]+$")


def toml_key(k: str) -> str:
    return k if BARE.match(k) else toml_string(k)


def toml_string(s: str) -> str:
    out = []
    for ch in s:
        if ch == '"':
            out.append('\\"')
        elif ch == "\\":
            out.append("\\\\")
        elif ch == "\n":
            out.append("\\n")
        elif ch == "\t":
            out.append("\\t")
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return toml_string(v)
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{toml_key(k)} = {toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(type(v))


def dump_toml(doc: dict) -> str:
    """Scalars and inline values at the top, then one [header] per table (recursively)."""
    lines: list[str] = []

    def table(prefix: list[str], d: dict) -> None:
        subs = {k: v for k, v in d.items() if isinstance(v, dict) and v}
        for k, v in d.items():
            if k not in subs:
                lines.append(f"{toml_key(k)} = {toml_value(v)}")
        for k, v in subs.items():
            lines.append("")
            lines.append("[" + ".".join(toml_key(p) for p in prefix + [k]) + "]")
            table(prefix + [k], v)

    table([], doc)
    return "\n".join(lines) + "\n"


def same(a, b) -> bool:
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(same(a[k], b[k]) for k in a)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(same(x, y) for x, y in zip(a, b))
    return type(a) is type(b) and a == b


# ---------------------------------------------------------------------------------------------
# Random documents

VOCAB = [
    "study", "title", "output", "seed", "data", "farms", "path", "sha256", "derive", "filter",
    "allow_outside", "format", "model", "outcome", "endogenous", "instruments", "controls",
    "absorb", "cluster", "weights", "estimator", "covariance", "hac_lags", "hac_order", "level",
    "fuller_alpha", "axes", "variants", "baseline", "add_controls", "drop_instruments",
    "add_filter", "grid", "exclude", "only", "max_specifications", "extra", "table", "name",
    "across", "columns", "where", "panels", "rows", "digits", "package", "licence",
]
COLUMNS = ["y", "x", "z1", "z2", "w1", "g", "c", "log_yield", "irrigated_share", "canal_km"]
EXPRESSIONS = [
    "log(y)", "y > 0", "x ^ 1000", "__import__('os')", "x.real", "eval('1')", "((((x))))",
    "y > 0 and not x < 1", "region in ['a', 'b']", "1 / 0", "lambda: 0", "x[0]", "`a b` + 1",
    "if_else(y > 0, 1, 0)", "y >", "", "   ", "max(x, y, z1)", "round(x, 99)",
]

keys = st.one_of(st.sampled_from(VOCAB), st.from_regex(r"[A-Za-z_][A-Za-z0-9_ .\-]{0,8}", fullmatch=True),
                 st.text(max_size=6))
strings = st.one_of(st.sampled_from(COLUMNS), st.sampled_from(EXPRESSIONS),
                    st.sampled_from(["2sls", "liml", "gmm", "cluster", "robust", "hac", "../x.csv",
                                     "/etc/passwd", "data/farms.csv", "results", ".", ""]),
                    st.text(max_size=12))
scalars = st.one_of(st.booleans(), st.integers(-(2**70), 2**70), st.floats(allow_nan=True),
                    strings)
values = st.recursive(
    scalars,
    lambda inner: st.one_of(st.lists(inner, max_size=4), st.dictionaries(keys, inner, max_size=4)),
    max_leaves=12,
)
documents = st.dictionaries(keys, values, max_size=8)


def mostly(valid, invalid):
    """Valid values about nine times in ten, so that documents get past the first checks."""
    return st.integers(0, 9).flatmap(lambda i: invalid if i == 9 else valid)


@st.composite
def spec_like(draw) -> dict:
    """Documents shaped like a spec (so the deeper checks run), with random gaps and extras."""
    demo_cols = ["yield_t_ha", "irrigated_share", "canal_km", "upstream_rain", "farm_ha",
                 "soil_index", "district", "survey_round", "log_yield", "missing_col"]
    cols = st.sampled_from(demo_cols)
    roles = mostly(st.lists(cols, min_size=1, max_size=3), st.one_of(cols, scalars))
    role = mostly(cols, scalars)
    enum = lambda *v: mostly(st.sampled_from(v), strings)  # noqa: E731
    filters = st.sampled_from(["farm_ha > 1", "soil_index < 0 or farm_ha > 2", "district != 3",
                               "farm_ha > 1000"] + EXPRESSIONS)
    doc: dict = {"study": draw(st.fixed_dictionaries(
        {"title": mostly(st.just("t"), scalars)},
        optional={"output": mostly(st.just("out"), strings), "seed": mostly(st.integers(0, 99), scalars),
                  "batch_size": mostly(st.integers(0, 9), scalars)}))}
    if draw(st.integers(0, 9)):
        dsname = draw(mostly(st.just("farms"), st.sampled_from(["d", "../x", "a b", ""])))
        doc["data"] = {dsname: draw(st.fixed_dictionaries(
            {"path": mostly(st.just("data/farms.csv"),
                            st.sampled_from(["data/none.csv", "../farms.csv", "/etc/hostname", "data",
                                             "data/farms.csv\x00", ""]))},
            optional={"filter": filters, "sha256": mostly(st.just("0" * 64), strings), "allow_outside": mostly(st.booleans(), scalars),
                      "derive": st.dictionaries(st.sampled_from(["log_yield", "new", "a b", "farm_ha"]),
                                                st.sampled_from(["log(yield_t_ha)", "farm_ha ^ 2"] + EXPRESSIONS),
                                                max_size=3)}))}
    if draw(st.integers(0, 9)):
        doc["model"] = draw(st.fixed_dictionaries(
            {"outcome": role, "endogenous": roles, "instruments": roles},
            optional={"controls": roles, "absorb": roles, "cluster": roles,
                      "estimator": enum("2sls", "liml", "fuller", "gmm"),
                      "covariance": enum("unadjusted", "robust", "cluster", "hac"),
                      "level": mostly(st.floats(0.5, 1.0), scalars), "filter": filters,
                      "hac_lags": mostly(st.integers(0, 4), scalars), "weights": role, "hac_order": role}))
    if draw(st.booleans()):
        patch = st.dictionaries(st.sampled_from(["instruments", "add_controls", "drop_instruments",
                                                 "estimator", "covariance", "add_filter", "cluster",
                                                 "description", "endogenous", "fuller_alpha", "data"]),
                                st.one_of(roles, filters, st.sampled_from(["liml", "robust", "farms"])),
                                max_size=3)
        doc["axes"] = draw(st.dictionaries(mostly(st.sampled_from(["iv", "ctrl"]), st.sampled_from(["id", "x y"])),
                                           st.fixed_dictionaries({"variants": st.dictionaries(
                                               st.sampled_from(["a", "b", "baseline"]), patch, max_size=2)},
                                               optional={"baseline": strings}), max_size=2))
    if draw(st.booleans()):
        doc["grid"] = draw(st.fixed_dictionaries({}, optional={
            "exclude": st.lists(st.dictionaries(st.sampled_from(["iv", "ctrl"]),
                                                st.sampled_from(["a", "b", "baseline"])), max_size=2),
            "max_specifications": mostly(st.integers(1, 100), scalars)}))
    if draw(st.booleans()):
        doc["table"] = draw(st.lists(st.fixed_dictionaries({"name": mostly(st.just("t1"), strings)}, optional={
            "across": st.sampled_from(["iv", "ctrl", "nope"]), "panels": st.lists(strings, max_size=2),
            "digits": mostly(st.integers(0, 8), scalars)}), max_size=2))
    if draw(st.integers(0, 3)) == 0:
        doc.update(draw(st.dictionaries(keys, values, max_size=2)))
    return doc


any_document = st.one_of(documents, spec_like())

# ---------------------------------------------------------------------------------------------
# Mutations of the demo spec's text


@st.composite
def demo_mutation(draw) -> str:
    lines = DEMO.read_text().splitlines(keepends=True)
    for _ in range(draw(st.integers(1, 3))):
        if not lines:
            break
        kind = draw(st.sampled_from(["delete", "duplicate", "swap_lines", "swap_chars",
                                     "delete_char", "replace_char", "insert_char"]))
        i = draw(st.integers(0, len(lines) - 1))
        if kind == "delete":
            del lines[i]
        elif kind == "duplicate":
            lines.insert(i, lines[i])
        elif kind == "swap_lines":
            j = draw(st.integers(0, len(lines) - 1))
            lines[i], lines[j] = lines[j], lines[i]
        else:
            s = lines[i]
            if not s:
                continue
            k = draw(st.integers(0, len(s) - 1))
            if kind == "swap_chars" and k + 1 < len(s):
                s = s[:k] + s[k + 1] + s[k] + s[k + 2:]
            elif kind == "delete_char":
                s = s[:k] + s[k + 1:]
            elif kind in ("replace_char", "insert_char"):
                c = draw(st.one_of(st.sampled_from(list("[]{}=\"'.,#\\ _-0aZ\n\t")), st.characters()))
                s = s[:k] + c + s[k + (kind == "replace_char"):]
            lines[i] = s
    return "".join(lines)


# ---------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def study(tmp_path_factory) -> Path:
    """A study folder like specs/: the demo data (an extract) under data/, the spec written per example."""
    d = tmp_path_factory.mktemp("fuzz")
    (d / "data").mkdir()
    with open(DEMO_DATA) as f:
        head = [next(f) for _ in range(DEMO_ROWS + 1)]
    (d / "data" / "farms.csv").write_text("".join(head))
    return d


def demo_sha_for(study: Path) -> tuple[str, str]:
    """(the demo's checksum, the extract's), so mutations of the demo point at the extract."""
    text = DEMO.read_text()
    old = re.search(r'sha256 = "([0-9a-f]{64})"', text).group(1)
    new = hashlib.sha256((study / "data" / "farms.csv").read_bytes()).hexdigest()
    return old, new


def load_or_spec_error(path: Path) -> bool:
    try:
        load_spec(path)
    except SpecError as exc:
        assert exc.problems, "a SpecError carries at least one problem"
        for line in exc.lines():
            assert "\n" not in line
        return False
    return True


def check_exit(path: Path) -> tuple[int, str]:
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        rc = cli.main(["check", str(path)])
    text = err.getvalue()
    assert rc in (0, 2), text
    assert "Traceback" not in text and "internal error" not in text, text
    if rc == 2:
        assert text and all(line.startswith("error: ") for line in text.splitlines()), text
    return rc, text


def test_dumper_round_trips_a_spec():
    doc = tomli.loads(DEMO.read_text())
    assert same(tomli.loads(dump_toml(doc)), doc)


@settings(FUZZ, max_examples=300)
@given(doc=any_document)
def test_random_documents_load(study, doc):
    text = dump_toml(doc)
    assert same(tomli.loads(text), doc), "the generated TOML must be what was generated"
    path = study / "random.toml"
    path.write_text(text, encoding="utf-8")
    load_or_spec_error(path)


@settings(FUZZ, max_examples=100)
@given(doc=any_document)
def test_random_documents_check(study, doc):
    path = study / "random_check.toml"
    path.write_text(dump_toml(doc), encoding="utf-8")
    check_exit(path)


@settings(FUZZ, max_examples=300)
@given(text=demo_mutation())
def test_demo_mutations_load(study, text):
    old, new = demo_sha_for(study)
    path = study / "mutated.toml"
    path.write_text(text.replace(old, new), encoding="utf-8")
    load_or_spec_error(path)


@settings(FUZZ, max_examples=150)
@given(text=demo_mutation())
def test_demo_mutations_check(study, text):
    old, new = demo_sha_for(study)
    path = study / "mutated_check.toml"
    path.write_text(text.replace(old, new), encoding="utf-8")
    check_exit(path)


def test_unmutated_demo_checks_clean(study):
    old, new = demo_sha_for(study)
    path = study / "demo.toml"
    path.write_text(DEMO.read_text().replace(old, new), encoding="utf-8")
    rc, err = check_exit(path)
    assert (rc, err) == (0, "")


@pytest.mark.parametrize("text", [
    "a = " + "[" * 3000 + "]" * 3000 + "\n",  # arrays nested deeper than Python's recursion limit
    "a = " + "{ b = " * 3000 + "1" + " }" * 3000 + "\n",  # inline tables likewise
    "[study]\ntitle = \"" + "x" * 2_100_000 + "\"\n",  # larger than the 2 MB limit
    "\ufeff[study]\ntitle = \"bom\"\n",  # a byte-order mark
    "[study]\ntitle = \"t\"\n\x00\n",  # a NUL byte
    "[study]\r\ntitle = \"crlf\"\r\n",
    "[[study]]\ntitle = \"t\"\n",  # an array of tables where a table belongs
    "[data]\nfarms = 3\n[model]\noutcome = 1\n",
    "[study]\ntitle = 1979-05-27T07:32:00Z\n",  # a TOML datetime
])
def test_extreme_documents(study, text):
    path = study / "extreme.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SpecError):
        load_spec(path)
    check_exit(path)
