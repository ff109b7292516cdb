"""The study spec: pydantic v2 models of specflow's TOML format, and loading with good errors.

A spec file declares one IV study: metadata, named datasets, the baseline model's variable
roles, robustness axes (each a named list of variants, each variant a patch to the baseline),
grid rules, named one-off specifications, tables and packaging metadata. The models here are
the single source of truth: ``specflow schema`` writes their JSON Schema, and the reference
page of the format in DEVELOPERS.md is generated from them.

Loading reports every problem at once, one line each, with the TOML key path and line number.
Nothing in a spec file is ever executed: expressions go through :mod:`specflow.expr`.
"""

from __future__ import annotations

import difflib
import re
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from .errors import Problem, SpecError

Estimator = Literal["2sls", "liml", "fuller", "gmm"]
Covariance = Literal["unadjusted", "robust", "cluster", "hac"]
Transform = Literal["none", "log", "log1p", "asinh", "standardize"]
NAME_RE = r"^[A-Za-z_][A-Za-z0-9_]*$"


class Strict(BaseModel):
    # strict: TOML values are typed, so "yes" is not a boolean nor "3" a number; no inf/nan
    model_config = ConfigDict(extra="forbid", str_strip_whitespace=True, validate_default=True,
                              strict=True, allow_inf_nan=False)


def _as_list(v: Any) -> Any:
    if isinstance(v, str):
        return [v]
    return v


class StudyMeta(Strict):
    """[study]: what the study is and where its outputs go."""

    title: str = Field(min_length=1, description="Title of the study, shown on every exhibit.")
    output: str = Field("results", description="Output folder, relative to the spec file.")
    seed: int = Field(0, description="Random seed for anything stochastic (recorded in packages).")
    description: str = Field("", description="A paragraph on the question and the design.")
    authors: list[str] = Field(default_factory=list)
    batch_size: int = Field(
        0, ge=0, description="Specifications per fit job; 0 chooses automatically."
    )
    keep_runs: int = Field(10, ge=1, description="How many past runs' estimates to keep for diff.")


class Dataset(Strict):
    """[data.NAME]: one data file, its derived columns, sample filter and provenance."""

    path: str = Field(description="Path to the file, relative to the spec file.")
    format: Literal["csv", "parquet", "dta"] | None = Field(
        None, description="File format; inferred from the suffix when omitted."
    )
    sha256: str | None = Field(
        None, pattern=r"^[0-9a-fA-F]{64}$", description="Expected SHA-256 of the file's bytes."
    )
    derive: dict[str, str] = Field(
        default_factory=dict,
        description="Derived columns, in order: name = expression over earlier columns.",
    )
    filter: str | None = Field(None, description="Sample filter expression: rows where it is true.")
    allow_outside: bool = Field(
        False, description="Allow a path outside the spec file's folder (off by default)."
    )
    # provenance, for the replication package's README
    source: str | None = Field(None, description="Who produced the data and where it comes from.")
    citation: str | None = Field(None, description="How to cite the data.")
    licence: str | None = Field(None, description="Licence or terms of use of the data.")
    access: str | None = Field(None, description="How a replicator obtains the data.")
    redistribute: bool = Field(True, description="May the file be included in a package?")

    @field_validator("derive")
    @classmethod
    def _names(cls, v: dict[str, str]) -> dict[str, str]:
        for k in v:
            if not re.match(NAME_RE, k):
                raise ValueError(f"derived column name {k!r} must be a plain identifier")
        return v

    def file_format(self) -> str:
        if self.format:
            return self.format
        suf = Path(self.path).suffix.lower()
        return {".csv": "csv", ".parquet": "parquet", ".pq": "parquet", ".dta": "dta"}.get(
            suf, "csv"
        )


class Model(Strict):
    """[model]: the baseline specification's variable roles, estimator and covariance."""

    data: str | None = Field(None, description="Dataset name; may be omitted with one dataset.")
    outcome: str = Field(description="The dependent variable.")
    endogenous: list[str] = Field(min_length=1, description="Endogenous regressor(s).")
    instruments: list[str] = Field(min_length=1, description="Excluded instruments.")
    controls: list[str] = Field(default_factory=list, description="Exogenous controls.")
    absorb: list[str] = Field(default_factory=list, description="Fixed effects to absorb.")
    cluster: list[str] = Field(
        default_factory=list, max_length=2, description="Cluster variable(s): one- or two-way."
    )
    weights: str | None = Field(None, description="Column of regression weights.")
    filter: str | None = Field(None, description="Extra sample filter for this model.")
    outcome_transform: Transform = "none"
    constant: bool = Field(True, description="Include a constant (ignored with fixed effects).")
    estimator: Estimator = "2sls"
    fuller_alpha: float = Field(1.0, gt=0, description="Fuller's constant (estimator = 'fuller').")
    covariance: Covariance = "robust"
    hac_lags: int | None = Field(None, ge=0, description="Bartlett kernel lags (covariance 'hac').")
    hac_order: str | None = Field(None, description="Column giving time order (covariance 'hac').")
    level: float = Field(0.95, gt=0.5, lt=1.0, description="Confidence level of intervals.")

    _lists = field_validator("endogenous", "instruments", "controls", "absorb", "cluster", mode="before")(
        classmethod(lambda cls, v: _as_list(v))
    )


class Patch(Strict):
    """One variant: the changes it makes to the baseline model."""

    description: str = ""
    data: str | None = None
    outcome: str | None = None
    outcome_transform: Transform | None = None
    endogenous: list[str] | None = None
    instruments: list[str] | None = None
    add_instruments: list[str] | None = None
    drop_instruments: list[str] | None = None
    controls: list[str] | None = None
    add_controls: list[str] | None = None
    drop_controls: list[str] | None = None
    absorb: list[str] | None = None
    add_absorb: list[str] | None = None
    drop_absorb: list[str] | None = None
    cluster: list[str] | None = Field(None, max_length=2)
    weights: str | None = None
    no_weights: bool | None = None
    filter: str | None = Field(None, description="Replaces the model's sample filter.")
    add_filter: str | None = Field(None, description="Further restricts the sample (and).")
    estimator: Estimator | None = None
    fuller_alpha: float | None = Field(None, gt=0)
    covariance: Covariance | None = None
    hac_lags: int | None = Field(None, ge=0)
    hac_order: str | None = None

    _lists = field_validator(
        "endogenous", "instruments", "add_instruments", "drop_instruments", "controls",
        "add_controls", "drop_controls", "absorb", "add_absorb", "drop_absorb", "cluster",
        mode="before",
    )(classmethod(lambda cls, v: _as_list(v)))

    def changes(self) -> dict[str, Any]:
        return {k: v for k, v in self.model_dump(exclude={"description"}).items() if v is not None}


class Axis(Strict):
    """[axes.NAME]: one robustness axis: the baseline's label and the variants."""

    baseline: str = Field("baseline", min_length=1, description="Label of the baseline's value.")
    description: str = ""
    variants: dict[str, Patch] = Field(min_length=1, description="label = patch to the baseline")


class GridRules(Strict):
    """[grid]: which combinations of the axes' variants to fit."""

    exclude: list[dict[str, str]] = Field(
        default_factory=list,
        description="Drop every combination matching one of these {axis = label} sets.",
    )
    only: list[dict[str, str]] = Field(
        default_factory=list,
        description="If given, keep only combinations matching one of these {axis = label} sets.",
    )
    max_specifications: int = Field(20000, ge=1)


Panel = Literal["iv", "ols", "first_stage", "reduced_form"]
RowKind = Literal[
    "se", "ci", "robust_ci", "pvalue", "first_stage_f", "first_stage_f_robust", "effective_f",
    "kp_rk_wald_f", "cragg_donald_f", "overid_p", "endogeneity_p", "ar_p", "nobs", "clusters",
    "indicators", "estimator", "covariance",
]


class Table(Strict):
    """[[table]]: one comparison table built from result files.

    Columns come from ``across`` (the baseline label of that axis, then its variants, other
    axes fixed by ``where`` or at their baseline) or from ``columns`` (explicit selections; an
    empty selection ``{}`` is the baseline). Without either the table has the baseline only.
    """

    name: str = Field(pattern=NAME_RE, description="File stem of the table's outputs.")
    title: str = Field("", description="Caption of the table (default: the name).")
    across: str | None = Field(
        None, description="An axis whose variants form the columns (others at their baseline)."
    )
    columns: list[dict[str, str]] = Field(
        default_factory=list,
        description="Explicit columns: each an {axis = label} selection (or {extra = NAME}).",
    )
    where: dict[str, str] = Field(
        default_factory=dict, description="Fix other axes to these labels (default: baseline)."
    )
    panels: list[Panel] = Field(
        default_factory=lambda: ["iv", "ols", "first_stage"], min_length=1,
        description="Blocks of coefficients, in order: iv, ols, first_stage, reduced_form.",
    )
    terms: list[str] = Field(
        default_factory=list,
        description="Terms shown in the iv and ols panels (default: the endogenous regressors).",
    )
    rows: list[RowKind] = Field(
        default_factory=lambda: ["se", "robust_ci", "first_stage_f", "effective_f", "nobs", "clusters"],
        description="Rows under each coefficient (se, ci, robust_ci, pvalue) and statistics "
                    "rows below the panels, in order.",
    )
    indicators: dict[str, list[str]] = Field(
        default_factory=dict, description="Yes/no rows: label = controls or fixed effects."
    )
    labels: dict[str, str] = Field(
        default_factory=dict, description="Display names of variables: name = label."
    )
    digits: int = Field(3, ge=0, le=8, description="Decimals of coefficients, SEs and intervals.")
    stars: bool = Field(False, description="Mark coefficients with significance stars.")
    notes: str = Field("", description="Extra text for the table's notes.")


class PackageMeta(Strict):
    """[package]: what the replication package needs beyond the datasets' provenance."""

    licence: Literal["MIT", "BSD-3-Clause", "Apache-2.0", "CC-BY-4.0", "CC0-1.0"] = "MIT"
    holder: str = Field("", description="Copyright holder named in LICENSE.txt.")
    references: list[str] = Field(default_factory=list, description="References for the README.")
    contact: str = Field("", description="Who answers a replicator's questions (name, e-mail).")
    exhibits: dict[str, str] = Field(
        default_factory=dict,
        description="The paper's name of each exhibit, e.g. \"tables/instruments\" = \"Table 2\".",
    )


class Spec(Strict):
    """A whole spec file."""

    study: StudyMeta
    data: dict[str, Dataset] = Field(min_length=1)
    model: Model
    axes: dict[str, Axis] = Field(default_factory=dict)
    grid: GridRules = Field(default_factory=GridRules)
    extra: dict[str, Patch] = Field(
        default_factory=dict, description="Named one-off specifications: name = patch."
    )
    table: list[Table] = Field(default_factory=list)
    package: PackageMeta = Field(default_factory=PackageMeta)

    @model_validator(mode="after")
    def _default_data(self) -> "Spec":
        if self.model.data is None and len(self.data) == 1:
            self.model.data = next(iter(self.data))
        return self


# ---------------------------------------------------------------------------------------------
# Loading


class LoadedSpec:
    """A validated spec plus where it came from (for paths and error messages)."""

    def __init__(self, spec: Spec, path: Path, text: str, lines: dict[tuple, int],
                 shown: str | None = None):
        self.spec = spec
        self.path = path
        self.text = text
        self._lines = lines
        self.shown = shown or str(path)  # the path as the user gave it, for messages
        self.duplicates: list[tuple[str, str]] = []  # set by grid.expand: (dropped, kept)

    @property
    def folder(self) -> Path:
        return self.path.parent

    @property
    def output_dir(self) -> Path:
        return (self.folder / self.spec.study.output).resolve()

    def line_of(self, path: tuple) -> int | None:
        return _line_for(self._lines, path)

    def problem(self, path: tuple, message: str) -> Problem:
        return Problem(_one_line(message), _dotted(path), self.line_of(path), self.shown)


_HEADER = re.compile(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
_KEY = re.compile(r"""^\s*((?:"[^"]*"|'[^']*'|[A-Za-z0-9_\-]+)(?:\s*\.\s*(?:"[^"]*"|'[^']*'|[A-Za-z0-9_\-]+))*)\s*=""")
_INLINE_KEY = re.compile(r"""(?:[{,]\s*)("[^"]*"|'[^']*'|[A-Za-z0-9_\-]+)\s*=""")


def _split_key(k: str) -> list[str]:
    parts = re.findall(r""""[^"]*"|'[^']*'|[A-Za-z0-9_\-]+""", k)
    return [p[1:-1] if p[:1] in "\"'" else p for p in parts]


def toml_lines(text: str) -> dict[tuple, int]:
    """Map TOML key paths to the line that defines them (best effort; for error messages).

    Array-of-tables headers ``[[a]]`` get an index per occurrence, so ``("table", 1, "name")``
    points into the second ``[[table]]``. Keys of inline tables map to their line.
    """
    out: dict[tuple, int] = {}
    current: tuple = ()
    counters: dict[tuple, int] = {}
    for i, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        m = _HEADER.match(line)
        if m and not _KEY.match(line):
            keys = tuple(_split_key(m.group(2)))
            if m.group(1) == "[[":
                idx = counters.get(keys, 0)
                counters[keys] = idx + 1
                current = keys + (idx,)
            else:
                current = keys
            out.setdefault(current, i)
            for j in range(1, len(current)):
                out.setdefault(current[:j], i)
            continue
        m = _KEY.match(line)
        if m:
            keys = current + tuple(_split_key(m.group(1)))
            out.setdefault(keys, i)
            rest = line[m.end():]
            for km in _INLINE_KEY.finditer(rest):
                out.setdefault(keys + (_split_key(km.group(1))[0],), i)
    return out


def _line_for(lines: dict[tuple, int], path: tuple) -> int | None:
    p = tuple(path)
    while p:
        if p in lines:
            return lines[p]
        # an index inside an inline array: fall back to the key
        p = p[:-1]
    return None


def _dotted(path: tuple) -> str:
    out = ""
    for p in path:
        if isinstance(p, int):
            out += f"[{p}]"
        else:
            s = str(p)
            if not re.match(r"^[A-Za-z0-9_\-]+$", s):
                s = f'"{_one_line(s)}"'
            out += ("." if out else "") + s
    return out


def _one_line(text: str) -> str:
    """Text for a one-line message: control and other unprintable characters escaped."""
    return "".join(c if c.isprintable() else c.encode("unicode_escape").decode("ascii") for c in text)


def _classify(ann: Any) -> Any:
    """A field annotation as a model class, ("dict"|"list", inner), or None for plain values."""
    import typing

    if isinstance(ann, type) and issubclass(ann, BaseModel):
        return ann
    origin, args = typing.get_origin(ann), typing.get_args(ann)
    if origin is dict and len(args) == 2:
        inner = _classify(args[1])
        return ("dict", inner) if inner is not None else None
    if origin is list and args:
        inner = _classify(args[0])
        return ("list", inner) if inner is not None else None
    for a in args:
        c = _classify(a)
        if c is not None:
            return c
    return None


def _model_at(path: tuple) -> type[BaseModel] | None:
    """The pydantic model class found at a key path (None if the path leads elsewhere)."""
    node: Any = Spec
    for p in path:
        if isinstance(node, tuple):
            node = node[1]  # a dict key or a list index selects the inner type
            continue
        if not (isinstance(node, type) and issubclass(node, BaseModel)):
            return None
        field = node.model_fields.get(p) if isinstance(p, str) else None
        if field is None:
            return None
        node = _classify(field.annotation)
    return node if isinstance(node, type) and issubclass(node, BaseModel) else None


def _suggest(word: str, choices: list[str]) -> str:
    close = difflib.get_close_matches(word, choices, n=1, cutoff=0.6)
    return f"; did you mean '{close[0]}'?" if close else ""


_PATTERN_WORDS = {
    NAME_RE: "must be a plain identifier (letters, digits and _, not starting with a digit)",
    r"^[0-9a-fA-F]{64}$": "is not a SHA-256 (64 hexadecimal digits)",
}


def _toml_type(v: Any) -> str:
    if isinstance(v, bool):
        return f"true/false ({str(v).lower()})"
    if isinstance(v, (int, float)):
        return f"a number ({v!r})"
    if isinstance(v, str):
        return f"a string ({v!r})"
    if isinstance(v, list):
        return "a list"
    return type(v).__name__


def _pydantic_problems(err: ValidationError, lines: dict[tuple, int], file: str) -> list[Problem]:
    problems = []
    for e in err.errors():
        loc = tuple(x for x in e["loc"] if not (isinstance(x, str) and x.startswith("function-")))
        # pydantic puts union/literal branch names into loc; drop non-key parts
        loc = tuple(x for x in loc if x not in ("str", "list[str]", "int", "float", "bool"))
        typ = e["type"]
        if typ == "extra_forbidden":
            parent = _model_at(loc[:-1])
            choices = list(parent.model_fields) if parent else []
            msg = f"unknown key '{loc[-1]}'" + _suggest(str(loc[-1]), choices)
        elif typ == "missing":
            msg = f"required key '{loc[-1]}' is missing"
            loc_line = _line_for(lines, loc[:-1])
            problems.append(Problem(_one_line(msg), _dotted(loc), loc_line, file))
            continue
        elif typ == "literal_error":
            expected = e.get("ctx", {}).get("expected", "")
            msg = f"{e['input']!r} is not allowed; expected one of {expected}"
        elif typ == "value_error":  # our own validators: their message, without pydantic's prefix
            msg = str(e.get("ctx", {}).get("error", e["msg"]))
        elif typ == "string_pattern_mismatch":
            pattern = e.get("ctx", {}).get("pattern", "")
            what = _PATTERN_WORDS.get(pattern, f"must match the pattern {pattern}")
            msg = f"{e['input']!r} {what}"
        elif typ in ("model_type", "model_attributes_type", "dict_type"):
            msg = f"expected a table, got {_toml_type(e.get('input'))}"
        else:
            msg = e["msg"]
            if "input" in e and not isinstance(e["input"], (dict, list)):
                msg += f" (got {e['input']!r})"
        problems.append(Problem(_one_line(msg), _dotted(loc), _line_for(lines, loc), file))
    return problems


def parse_toml(text: str, file: str = "spec") -> dict:
    import tomli

    try:
        return tomli.loads(text)
    except tomli.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        line = int(m.group(1)) if m else None
        msg = re.sub(r"\s*\(at line \d+, column \d+\)", "", msg).strip()
        raise SpecError([Problem(f"TOML syntax error: {msg}", "", line, file)]) from None
    except RecursionError:
        raise SpecError([Problem("TOML nesting is too deep", "", None, file)]) from None


MAX_SPEC_BYTES = 2_000_000
MAX_COMBINATIONS = 1_000_000  # axis combinations enumerated before the grid rules
MAX_RULE_CHECKS = 20_000_000  # combinations x grid rules


def load_spec(path: str | Path) -> LoadedSpec:
    """Read, parse and validate a spec file; raise SpecError with every problem found."""
    path = Path(path)
    file = str(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise SpecError([Problem("spec file not found", "", None, file)]) from None
    except OSError as exc:
        raise SpecError([Problem(f"cannot read spec file: {exc.strerror}", "", None, file)]) from None
    if len(raw) > MAX_SPEC_BYTES:
        raise SpecError([Problem("spec file is larger than 2 MB", "", None, file)])
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        column = exc.start - (raw.rfind(b"\n", 0, exc.start) + 1) + 1
        raise SpecError([Problem(f"spec file is not UTF-8 (byte 0x{raw[exc.start]:02x} at column "
                                 f"{column})", "", line, file)]) from None
    return load_spec_text(text, path)


def load_spec_text(text: str, path: Path) -> LoadedSpec:
    file = str(path)
    doc = parse_toml(text, file)
    lines = toml_lines(text)
    try:
        spec = Spec.model_validate(doc)
    except ValidationError as err:
        raise SpecError(_pydantic_problems(err, lines, file)) from None
    except RecursionError:
        raise SpecError([Problem("spec nesting is too deep", "", None, file)]) from None
    loaded = LoadedSpec(spec, path.resolve() if path.exists() else path, text, lines, file)
    problems = semantic_problems(loaded)
    if problems:
        raise SpecError(problems)
    return loaded


def _exprs(loaded: LoadedSpec) -> list[tuple[tuple, str, bool]]:
    """Every expression in the spec: (key path, text, must be boolean).

    An empty string is an expression too (and refused as one), not a missing key.
    """
    s = loaded.spec
    out: list[tuple[tuple, str, bool]] = []
    for name, ds in s.data.items():
        for col, e in ds.derive.items():
            out.append((("data", name, "derive", col), e, False))
        if ds.filter is not None:
            out.append((("data", name, "filter"), ds.filter, True))
    if s.model.filter is not None:
        out.append((("model", "filter"), s.model.filter, True))
    for aname, axis in s.axes.items():
        for label, patch in axis.variants.items():
            for key in ("filter", "add_filter"):
                v = getattr(patch, key)
                if v is not None:
                    out.append((("axes", aname, "variants", label, key), v, True))
    for name, patch in s.extra.items():
        for key in ("filter", "add_filter"):
            v = getattr(patch, key)
            if v is not None:
                out.append((("extra", name, key), v, True))
    return out


def _output_problems(loaded: LoadedSpec) -> list[Problem]:
    """The output folder may be anywhere, but must not hold the study's own inputs.

    Everything specflow writes goes below it (file names are identifiers and ids), and old runs
    are pruned inside it, so it must not be the spec's folder, one of its parents, or a folder
    holding a dataset.
    """
    out_text = loaded.spec.study.output
    path = ("study", "output")
    try:
        out = (loaded.folder / out_text).resolve()
        root = loaded.folder.resolve()
    except (OSError, ValueError, RuntimeError) as exc:  # NUL byte, name too long, symlink loop
        return [loaded.problem(path, f"output folder '{out_text}' is not a usable path ({exc})")]
    if root.is_relative_to(out):
        return [loaded.problem(path, f"output folder '{out_text}' would contain the spec file; "
                               "use a subfolder such as 'results'")]
    for name, ds in loaded.spec.data.items():
        try:
            inside = (loaded.folder / ds.path).resolve().is_relative_to(out)
        except (OSError, ValueError, RuntimeError):
            continue  # reported with the dataset
        if inside:
            return [loaded.problem(path, f"output folder '{out_text}' contains dataset '{name}' "
                                   f"('{ds.path}'); keep outputs and data apart")]
    return []


def _noop_patch(m: Model, patch: Patch) -> bool:
    """True if applying the patch to the baseline model changes none of its values."""
    ch = patch.changes()
    est = ch.get("estimator", m.estimator)
    cov = ch.get("covariance", m.covariance)
    for key, v in ch.items():
        if key in ("add_instruments", "add_controls", "add_absorb"):
            if not set(v) <= set(getattr(m, key[4:])):
                return False
        elif key in ("drop_instruments", "drop_controls", "drop_absorb"):
            if set(v) & set(getattr(m, key[5:])):
                return False
        elif key == "no_weights":
            if v and m.weights is not None:
                return False
        elif key == "add_filter":
            return False
        elif key == "fuller_alpha":
            if est == "fuller" and v != m.fuller_alpha:
                return False
        elif key in ("hac_lags", "hac_order"):
            if cov == "hac" and v != getattr(m, key):
                return False
        elif v != getattr(m, key):
            return False
    return bool(ch)


def semantic_problems(loaded: LoadedSpec) -> list[Problem]:
    """Checks that need the whole spec but not the data."""
    from . import expr as expr_mod

    s = loaded.spec
    P = loaded.problem
    problems: list[Problem] = []
    datasets = list(s.data)

    def check_data_ref(path: tuple, name: str | None) -> None:
        if name is not None and name not in s.data:
            problems.append(P(path, f"unknown dataset '{name}'" + _suggest(name, datasets)))

    for name in datasets:
        if not re.match(NAME_RE, name):
            problems.append(P(("data", name), f"dataset name '{name}' must be a plain identifier"))
    problems.extend(_output_problems(loaded))
    if s.model.data is None:
        problems.append(P(("model",), f"key 'data' is required with several datasets ({', '.join(datasets)})"))
    check_data_ref(("model", "data"), s.model.data)

    for path, text, boolean in _exprs(loaded):
        try:
            e = expr_mod.parse(text)
        except expr_mod.ExprError as exc:
            problems.append(P(path, str(exc)))
            continue
        if boolean and not e.is_boolean():
            problems.append(P(path, f'filter "{text}" is not a true/false condition'))

    # roles of the baseline that are statically inconsistent
    m = s.model
    if m.covariance == "cluster" and not m.cluster:
        problems.append(P(("model", "covariance"), "covariance 'cluster' needs model.cluster"))
    if m.covariance == "hac" and m.cluster:
        problems.append(P(("model", "covariance"), "covariance 'hac' cannot be combined with cluster"))

    labels_by_axis: dict[str, set[str]] = {}
    for aname, axis in s.axes.items():
        if not re.match(NAME_RE, aname):
            problems.append(P(("axes", aname), f"axis name '{aname}' must be a plain identifier"))
        if aname in ("extra", "id", "spec_id", "term"):
            problems.append(P(("axes", aname), f"axis name '{aname}' is reserved"))
        labels = {axis.baseline}
        for label, patch in axis.variants.items():
            ppath = ("axes", aname, "variants", label)
            if label == axis.baseline:
                problems.append(P(ppath, f"variant label '{label}' repeats the axis's baseline label"))
            labels.add(label)
            if not patch.changes():
                problems.append(P(ppath, f"variant '{label}' of axis '{aname}' changes nothing"))
            elif _noop_patch(m, patch):
                problems.append(P(ppath, f"variant '{label}' of axis '{aname}' only repeats the "
                                  f"baseline's values ({', '.join(patch.changes())})"))
            check_data_ref(ppath + ("data",), patch.data)
        labels_by_axis[aname] = labels
    # the grid is enumerated combination by combination before its rules apply: bound the work
    combos = 1
    for axis in s.axes.values():
        combos *= 1 + len(axis.variants)
    n_rules = len(s.grid.exclude) + len(s.grid.only)
    if combos > MAX_COMBINATIONS:
        problems.append(P(("axes",), f"the axes make {combos:,} combinations before the grid rules "
                          f"(at most {MAX_COMBINATIONS:,}); use fewer axes or variants, or split the study"))
    elif combos * max(n_rules, 1) > MAX_RULE_CHECKS:
        problems.append(P(("grid",), f"{n_rules:,} grid rules over {combos:,} combinations are more "
                          f"than specflow checks ({MAX_RULE_CHECKS:,}); use fewer rules"))
    for name, patch in s.extra.items():
        if not patch.changes():
            problems.append(P(("extra", name), f"one-off specification '{name}' changes nothing"))
        elif _noop_patch(m, patch):
            problems.append(P(("extra", name), f"one-off specification '{name}' only repeats the "
                              f"baseline's values ({', '.join(patch.changes())})"))
        check_data_ref(("extra", name, "data"), patch.data)

    for rule_kind in ("exclude", "only"):
        for i, rule in enumerate(getattr(s.grid, rule_kind)):
            path = ("grid", rule_kind, i)
            if not rule:
                problems.append(P(path, "an empty rule matches everything"))
            for aname, label in rule.items():
                if aname not in labels_by_axis:
                    problems.append(P(path, f"unknown axis '{aname}'" + _suggest(aname, list(labels_by_axis))))
                elif label not in labels_by_axis[aname]:
                    problems.append(
                        P(path, f"axis '{aname}' has no variant '{label}'" + _suggest(label, sorted(labels_by_axis[aname])))
                    )

    names = set()
    for i, t in enumerate(s.table):
        path = ("table", i)
        if t.name in names:
            problems.append(P(path + ("name",), f"duplicate table name '{t.name}'"))
        names.add(t.name)
        if t.across and t.across not in labels_by_axis:
            problems.append(P(path + ("across",), f"unknown axis '{t.across}'" + _suggest(t.across, list(labels_by_axis))))
        selections = [(("columns", j), c) for j, c in enumerate(t.columns)] + [(("where",), t.where)]
        for key, sel in selections:
            for aname, label in sel.items():
                if aname == "extra":
                    if label not in s.extra:
                        problems.append(P(path + key, f"unknown one-off specification '{label}'"
                                          + _suggest(label, list(s.extra))))
                elif aname not in labels_by_axis:
                    problems.append(P(path + key, f"unknown axis '{aname}'" + _suggest(aname, list(labels_by_axis))))
                elif label not in labels_by_axis[aname]:
                    problems.append(P(path + key, f"axis '{aname}' has no variant '{label}'"
                                      + _suggest(label, sorted(labels_by_axis[aname]))))
    return problems


def json_schema() -> dict:
    """The JSON Schema of the spec format (for editor completion)."""
    schema = Spec.model_json_schema()
    schema["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    schema["title"] = "specflow study spec"
    return schema
