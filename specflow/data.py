"""Datasets: safe paths, reading CSV/Parquet/Stata, fingerprints, derivations and filters.

A dataset is *prepared* once per run: read, its derived columns computed in order, its sample
filter applied, its columns type-checked. The workflow writes the prepared frame as Parquet
beside a fingerprint (the SHA-256 of the file's bytes and of the derivation text), so that a
touched-but-unchanged file triggers nothing and a changed one triggers its fits.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import numpy as np
import pandas as pd

from .files import sha256_and_size, sha256_file, write_atomic_bytes, write_atomic_text  # noqa: F401
from .errors import DataError, Problem, SpecError
from .spec import Dataset, LoadedSpec


def _shown(text: str, limit: int = 80) -> str:
    """A user's path for a one-line message: control characters escaped, long ones shortened."""
    s = "".join(c if c.isprintable() else c.encode("unicode_escape").decode("ascii") for c in text)
    return s if len(s) <= limit else s[: limit - 3] + "..."


def resolve_path(loaded: LoadedSpec, name: str) -> Path:
    """The dataset's file, resolved (symlinks too); refused outside the study folder unless allowed."""
    ds = loaded.spec.data[name]
    try:
        p = (loaded.folder / ds.path).resolve()
        root = loaded.folder.resolve()
    except (OSError, ValueError, RuntimeError) as exc:  # NUL byte, name too long, symlink loop
        reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
        raise SpecError([loaded.problem(("data", name, "path"),
                         f"path '{_shown(ds.path)}' is not a usable file name ({reason})")]) from None
    if not ds.allow_outside and not p.is_relative_to(root):
        raise SpecError([loaded.problem(("data", name, "path"),
                         f"path '{ds.path}' resolves outside the study folder {root} "
                         "(set allow_outside = true to permit it)")])
    return p


def read_parquet_lean(path: Path, columns: list[str] | None = None) -> pd.DataFrame:
    """Read Parquet into pandas holding each column once: Arrow's buffers are released as the
    columns are converted (split blocks, self-destruct), so the peak is about one copy."""
    import pyarrow.parquet as pq

    table = pq.read_table(path, columns=columns)
    df = table.to_pandas(split_blocks=True, self_destruct=True)
    del table
    return df


def read_table(path: Path, fmt: str, columns: list[str] | None = None) -> pd.DataFrame:
    """Read one data file; raise DataError with one line on any failure."""
    try:
        if fmt == "csv":
            return pd.read_csv(path, usecols=columns, low_memory=False)
        if fmt == "parquet":
            return read_parquet_lean(path, columns)
        if fmt == "dta":
            return pd.read_stata(path, columns=columns, convert_categoricals=False)
    except FileNotFoundError:
        raise DataError(f"{path}: data file not found") from None
    except ValueError as exc:  # usecols mismatch and parser errors
        raise DataError(f"{path}: cannot read as {fmt}: {str(exc).splitlines()[0]}") from None
    except Exception as exc:  # noqa: BLE001 - any reader failure is a data problem
        raise DataError(f"{path}: cannot read as {fmt}: {type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}") from None
    raise DataError(f"{path}: unknown format {fmt!r}")


def read_dataset(loaded: LoadedSpec, name: str, check_sha: bool = True) -> tuple[pd.DataFrame, str]:
    """Read a dataset's file (not yet derived or filtered) and its SHA-256."""
    ds = loaded.spec.data[name]
    path = resolve_path(loaded, name)
    where = ("data", name, "path")
    try:
        if not path.exists():
            raise SpecError([loaded.problem(where, f"data file '{_shown(ds.path)}' not found")])
        if not path.is_file():
            raise SpecError([loaded.problem(where, f"'{_shown(ds.path)}' is a folder, not a data file")])
        digest = sha256_file(path)
    except OSError as exc:
        raise SpecError([loaded.problem(where, f"cannot read data file '{_shown(ds.path)}': "
                                               f"{exc.strerror or exc}")]) from None
    if check_sha and ds.sha256 and digest.lower() != ds.sha256.lower():
        raise SpecError([loaded.problem(("data", name, "sha256"),
                         f"checksum mismatch for '{ds.path}': the file's SHA-256 is {digest}")])
    try:
        df = read_table(path, ds.file_format())
    except DataError as exc:
        msg = str(exc).removeprefix(f"{path}: ")
        raise SpecError([loaded.problem(where, f"data file '{_shown(ds.path)}': {msg}")]) from None
    dups = _duplicate_header(path) if ds.file_format() == "csv" else []
    if dups:
        raise SpecError([loaded.problem(where, f"data file '{_shown(ds.path)}' has more than one "
                                               f"column named {', '.join(repr(d) for d in dups)}")])
    df.columns = [str(c) for c in df.columns]
    return df, digest


def _duplicate_header(path: Path) -> list[str]:
    """Names repeated in a CSV file's header (pandas would silently rename them 'name.1')."""
    import csv

    with open(path, newline="", encoding="utf-8", errors="replace") as f:
        header = next(csv.reader(f), [])
    seen: set[str] = set()
    return list(dict.fromkeys(c for c in header if c in seen or seen.add(c)))


def derive_and_filter(loaded: LoadedSpec, name: str, df: pd.DataFrame) -> pd.DataFrame:
    """Apply a dataset's derived columns (in order) and its sample filter.

    Works on ``df`` itself (the frame just read; no second copy of a large dataset).
    """
    from . import expr

    ds: Dataset = loaded.spec.data[name]
    for col, text in ds.derive.items():
        e = expr.parse(text)
        try:
            df[col] = e.evaluate(df)
        except expr.ExprError as exc:
            raise SpecError([loaded.problem(("data", name, "derive", col), str(exc))]) from None
    if ds.filter:
        e = expr.parse(ds.filter)
        try:
            mask = e.evaluate(df)
        except expr.ExprError as exc:
            raise SpecError([loaded.problem(("data", name, "filter"), str(exc))]) from None
        df = df.loc[np.asarray(mask, dtype=bool)].reset_index(drop=True)
    return df


def prepare(loaded: LoadedSpec, name: str) -> tuple[pd.DataFrame, str]:
    """Read, derive and filter one dataset; return the frame and the raw file's SHA-256."""
    df, digest = read_dataset(loaded, name)
    return derive_and_filter(loaded, name, df), digest


def fingerprint(loaded: LoadedSpec, name: str, file_sha: str) -> str:
    """What the prepared dataset depends on: the file's bytes, the derivations and the filter."""
    from . import expr
    from . import __version__

    ds = loaded.spec.data[name]
    parts = [file_sha, ds.file_format(), __version__]
    parts += [f"{k}={expr.parse(v).canonical()}" for k, v in ds.derive.items()]
    parts.append(expr.parse(ds.filter).canonical() if ds.filter else "")
    return hashlib.sha256("\n".join(parts).encode()).hexdigest()


def write_parquet_atomic(df: pd.DataFrame, path: Path) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    df.to_parquet(tmp, index=False)
    os.replace(tmp, path)


def _patches_of(loaded: LoadedSpec, sp) -> list[tuple[tuple, object]]:
    """The patches that made a specification, in the order they were applied, with key paths."""
    s = loaded.spec
    if sp.extra_name is not None:
        return [(("extra", sp.extra_name), s.extra[sp.extra_name])]
    out = []
    for aname, axis in s.axes.items():
        label = sp.labels.get(aname)
        if label is not None and label != axis.baseline and label in axis.variants:
            out.append((("axes", aname, "variants", label), axis.variants[label]))
    return out


def _role_key(loaded: LoadedSpec, sp, role: str, column: str | None = None) -> tuple:
    """The key path that gave a specification its value of a role (the last patch setting it)."""
    keys = (role, f"add_{role}") if role in ("instruments", "controls", "absorb") else (role,)
    for path, patch in reversed(_patches_of(loaded, sp)):
        ch = patch.changes()
        for key in keys:
            v = ch.get(key)
            if v is None:
                continue
            if column is None or v == column or (isinstance(v, list) and column in v):
                return path + (key,)
    return ("model", role)


def _filter_source(loaded: LoadedSpec, sp, canonical: str) -> tuple[tuple, str]:
    """Key path and original text of one of a specification's (canonical) filters."""
    from . import expr

    candidates = [(path + (key,), getattr(patch, key)) for path, patch in _patches_of(loaded, sp)
                  for key in ("filter", "add_filter")]
    candidates.append((("model", "filter"), loaded.spec.model.filter))
    for path, text in candidates:
        if text and expr.parse(text).canonical() == canonical:
            return path, text
    return ("model", "filter"), canonical


NUMERIC_ROLES = ("outcome", "endogenous", "instruments", "controls", "weights", "hac_order")


def _is_numeric(col: pd.Series) -> bool:
    return bool(pd.api.types.is_numeric_dtype(col) or pd.api.types.is_bool_dtype(col))


def validate_against_data(loaded: LoadedSpec, specs: list, frames: dict[str, pd.DataFrame]) -> list[Problem]:
    """Check every specification against its prepared data: columns, roles, order condition, rows.

    Each problem points at the key that caused it (the baseline's role or the variant that set
    it) and is reported once, however many specifications share it; problems that arise from a
    combination of variants name the first specification showing them.
    """
    import difflib

    from . import expr

    problems: list[Problem] = []
    seen: set[tuple] = set()

    def add(key: tuple, msg: str, sp=None) -> None:
        if (key, msg) in seen:
            return
        seen.add((key, msg))
        where = f"specification {sp.id} ({sp.label_text()}): " if sp is not None else ""
        problems.append(loaded.problem(key, where + msg))

    empty = set()
    for name in sorted({sp.dataset for sp in specs}):
        if len(frames[name]) == 0:
            empty.add(name)
            ds = loaded.spec.data[name]
            key = ("data", name, "filter") if ds.filter else ("data", name, "path")
            add(key, f"dataset '{name}' has no rows" + (" after its filter" if ds.filter else ""))

    for sp in specs:
        if sp.dataset in empty:
            continue
        df = frames[sp.dataset]
        cols = set(df.columns)
        roles = {
            "outcome": [sp.outcome], "endogenous": list(sp.endogenous),
            "instruments": list(sp.instruments), "controls": list(sp.controls),
            "absorb": list(sp.absorb), "cluster": list(sp.cluster),
            "weights": [sp.weights] if sp.weights else [],
            "hac_order": [sp.hac_order] if sp.hac_order else [],
        }
        for role, names in roles.items():
            for c in names:
                if c not in cols:
                    close = difflib.get_close_matches(c, sorted(cols), n=1)
                    hint = f"; did you mean '{close[0]}'?" if close else ""
                    add(_role_key(loaded, sp, role, c),
                        f"column '{c}' ({role}) is not in dataset '{sp.dataset}'{hint}")
                elif role in NUMERIC_ROLES and not _is_numeric(df[c]):
                    bad = df[c][pd.to_numeric(df[c], errors="coerce").isna() & df[c].notna()]
                    example = f" (e.g. value {bad.iloc[0]!r})" if len(bad) else ""
                    add(_role_key(loaded, sp, role, c),
                        f"column '{c}' ({role}) is not numeric{example}")
        owner: dict[str, str] = {}
        for role in ("outcome", "endogenous", "instruments", "controls", "weights"):
            for c in roles[role]:
                if c in owner and owner[c] != role:
                    add(_role_key(loaded, sp, role, c), f"column '{c}' is both {owner[c]} and {role}", sp)
                owner.setdefault(c, role)
        for c in roles["absorb"]:
            if c in owner and owner[c] in ("outcome", "endogenous", "instruments", "controls"):
                add(_role_key(loaded, sp, "absorb", c), f"column '{c}' is both {owner[c]} and absorbed", sp)
        if len(sp.instruments) < len(sp.endogenous):
            key = _role_key(loaded, sp, "instruments")
            if key[0] == "model":
                key = _role_key(loaded, sp, "endogenous")
            add(key, f"order condition fails: {len(sp.instruments)} instrument(s) for "
                     f"{len(sp.endogenous)} endogenous regressor(s)", sp)
        if sp.covariance == "cluster" and not sp.cluster:
            add(_role_key(loaded, sp, "covariance"), "covariance 'cluster' but no cluster variable", sp)
        combined = np.ones(len(df), dtype=bool)
        usable = True
        for text in sp.filters:
            key, shown = _filter_source(loaded, sp, text)
            e = expr.parse(text)
            missing = [c for c in e.columns() if c not in cols]
            if missing:
                close = difflib.get_close_matches(missing[0], sorted(cols), n=1)
                hint = f"; did you mean '{close[0]}'?" if close else ""
                add(key, f"filter \"{shown}\" uses column '{missing[0]}' not in dataset "
                         f"'{sp.dataset}'{hint}")
                usable = False
                continue
            try:
                mask = np.asarray(e.evaluate(df), dtype=bool)
            except expr.ExprError as exc:
                add(key, str(exc))
                usable = False
                continue
            if not mask.any():
                add(key, f"filter \"{shown}\" leaves no rows of dataset '{sp.dataset}'")
                usable = False
            combined &= mask
        if usable and len(sp.filters) > 1 and not combined.any():
            add(_filter_source(loaded, sp, sp.filters[-1])[0],
                "the sample filters together leave no rows", sp)
    return problems


def load_frames(loaded: LoadedSpec, names: list[str]) -> dict[str, pd.DataFrame]:
    problems: list[Problem] = []
    frames: dict[str, pd.DataFrame] = {}
    for n in names:
        try:
            frames[n] = prepare(loaded, n)[0]
        except SpecError as exc:
            problems.extend(exc.problems)
    if problems:
        raise SpecError(problems)
    return frames
