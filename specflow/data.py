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

from .errors import DataError, Problem, SpecError
from .spec import Dataset, LoadedSpec


def resolve_path(loaded: LoadedSpec, name: str) -> Path:
    """The dataset's file, resolved (symlinks too); refused outside the study folder unless allowed."""
    ds = loaded.spec.data[name]
    p = (loaded.folder / ds.path).resolve()
    root = loaded.folder.resolve()
    if not ds.allow_outside and not p.is_relative_to(root):
        raise SpecError([loaded.problem(("data", name, "path"),
                         f"path '{ds.path}' resolves outside the study folder {root} "
                         "(set allow_outside = true to permit it)")])
    return p


def sha256_file(path: Path, chunk: int = 1 << 20) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while True:
            b = f.read(chunk)
            if not b:
                break
            h.update(b)
    return h.hexdigest()


def read_table(path: Path, fmt: str, columns: list[str] | None = None) -> pd.DataFrame:
    """Read one data file; raise DataError with one line on any failure."""
    try:
        if fmt == "csv":
            return pd.read_csv(path, usecols=columns, low_memory=False)
        if fmt == "parquet":
            return pd.read_parquet(path, columns=columns)
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
    if not path.exists():
        raise SpecError([loaded.problem(("data", name, "path"), f"data file '{ds.path}' not found")])
    digest = sha256_file(path)
    if check_sha and ds.sha256 and digest.lower() != ds.sha256.lower():
        raise SpecError([loaded.problem(("data", name, "sha256"),
                         f"checksum mismatch for '{ds.path}': the file's SHA-256 is {digest}")])
    try:
        df = read_table(path, ds.file_format())
    except DataError as exc:
        raise SpecError([loaded.problem(("data", name, "path"), str(exc))]) from None
    df.columns = [str(c) for c in df.columns]
    return df, digest


def derive_and_filter(loaded: LoadedSpec, name: str, df: pd.DataFrame) -> pd.DataFrame:
    """Apply a dataset's derived columns (in order) and its sample filter."""
    from . import expr

    ds: Dataset = loaded.spec.data[name]
    df = df.copy()
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


def write_atomic_bytes(path: Path, data: bytes) -> None:
    """Write a file so that readers see the old content or the whole new content, never half."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def write_atomic_text(path: Path, text: str) -> None:
    write_atomic_bytes(path, text.encode("utf-8"))


def write_parquet_atomic(df: pd.DataFrame, path: Path) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    df.to_parquet(tmp, index=False)
    os.replace(tmp, path)


def validate_against_data(loaded: LoadedSpec, specs: list, frames: dict[str, pd.DataFrame]) -> list[Problem]:
    """Check every specification against its prepared data: columns, roles, order condition, rows.

    Returns the problems (each naming the specification's labels and the column).
    """
    from . import expr

    problems: list[Problem] = []
    seen: set[tuple] = set()

    def add(sp, msg: str, key: tuple = ()) -> None:
        k = (msg, key)
        if k in seen:
            return
        seen.add(k)
        path = key or (("extra", sp.extra_name) if sp.extra_name else ("model",))
        where = f"specification {sp.id} ({sp.label_text()})"
        problems.append(loaded.problem(path, f"{where}: {msg}"))

    for sp in specs:
        df = frames[sp.dataset]
        cols = set(df.columns)
        roles = {
            "outcome": [sp.outcome], "endogenous": list(sp.endogenous),
            "instruments": list(sp.instruments), "controls": list(sp.controls),
            "absorb": list(sp.absorb), "cluster": list(sp.cluster),
            "weights": [sp.weights] if sp.weights else [],
        }
        for role, names in roles.items():
            for c in names:
                if c not in cols:
                    import difflib

                    close = difflib.get_close_matches(c, sorted(cols), n=1)
                    hint = f"; did you mean '{close[0]}'?" if close else ""
                    add(sp, f"column '{c}' ({role}) is not in dataset '{sp.dataset}'{hint}")
        owner: dict[str, str] = {}
        for role in ("outcome", "endogenous", "instruments", "controls", "weights"):
            for c in roles[role]:
                if c in owner and owner[c] != role:
                    add(sp, f"column '{c}' is both {owner[c]} and {role}")
                owner.setdefault(c, role)
        for c in roles["absorb"]:
            if c in owner and owner[c] in ("outcome", "endogenous", "instruments", "controls"):
                add(sp, f"column '{c}' is both {owner[c]} and absorbed")
        if len(sp.instruments) < len(sp.endogenous):
            add(sp, f"order condition fails: {len(sp.instruments)} instrument(s) for "
                    f"{len(sp.endogenous)} endogenous regressor(s)")
        if sp.covariance == "cluster" and not sp.cluster:
            add(sp, "covariance 'cluster' but no cluster variable")
        for text in sp.filters:
            e = expr.parse(text)
            missing = [c for c in e.columns() if c not in cols]
            if missing:
                add(sp, f"filter \"{text}\" uses column '{missing[0]}' not in dataset '{sp.dataset}'")
                continue
            try:
                mask = np.asarray(e.evaluate(df), dtype=bool)
            except expr.ExprError as exc:
                add(sp, str(exc))
                continue
            if not mask.any():
                add(sp, f"filter \"{text}\" leaves no rows")
        if len(df) == 0:
            add(sp, f"dataset '{sp.dataset}' has no rows after its filter", ("data", sp.dataset, "filter"))
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
