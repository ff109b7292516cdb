"""``specflow verify``: check a replication package and rerun it in a scratch folder.

Steps, in order (the package itself is never written to):

1. A zip is extracted into the scratch folder. Every member is checked before anything is
   written: absolute paths, ``..`` components, backslashes, drive letters, symlinks and
   duplicate names are refused, and each target must resolve inside the scratch folder.
2. The manifest: every file's SHA-256 and size against ``MANIFEST.sha256``; a changed, missing
   or extra file (or a symlink) is named and the verification fails there, without a rerun.
   A top-level ``.venv/`` (the environment step 1 of the README's instructions creates) is
   left out of the check and of the copy.
3. The package is copied into the scratch folder; its spec is loaded there and refused if its
   output folder or a dataset would lie outside the copy; the output folder is removed from
   the copy and the study is rerun with ``specflow run`` (the specflow of this environment;
   nothing from the package is executed: the spec is data and the workflow is specflow's own).
4. Every output the package lists is compared with the rerun's:

   * ``estimates.csv`` / ``estimates.parquet`` and ``fits/*.json``: every number within
     ``|rerun - package| <= atol + rtol x |package|`` (defaults 1e-9 and 1e-6), text exactly;
     the fits' timings are not compared;
   * tables (``.tex``, ``.md``), ``report.html``, ``exhibits.json``: every number as printed,
     digit for digit, and the surrounding text exactly;
   * figures: the image bytes. Their numbers are those of ``estimates.csv``: a figure whose
     bytes differ while the estimates reproduce is reported as "redrawn" (e.g. another
     matplotlib or font version), not as a difference.

The result is *full* (every exhibit reproduced), *partial* (some reproduced, some differ or
are missing) or *failed* (the manifest check failed, the workflow did not finish, or nothing
reproduced). Software versions that differ from the package's are warned about.
"""

from __future__ import annotations

import csv
import json
import os
import re
import shutil
import stat
import subprocess
import sys
import tempfile
import zipfile
from dataclasses import dataclass, field
from pathlib import Path

from .replicate import (
    INFO_NAME, MANIFEST_NAME, ManifestCheck, ReplicationError, check_manifest, environment,
    safe_relpath, version_differences,
)

DEFAULT_RTOL = 1e-6
DEFAULT_ATOL = 1e-9
IGNORED_TOP = ".venv"
SHOW = 8  # differing numbers shown per exhibit
NUMBER = re.compile(r"(?<![A-Za-z_])[-+]?(?:\d+\.\d*|\.\d+|\d+)(?:[eE][-+]?\d+)?")
TEXT_SUFFIXES = (".tex", ".md", ".html", ".htm", ".txt")
IMAGE_SUFFIXES = (".pdf", ".png", ".svg", ".jpg", ".jpeg")
NOT_COMPARED = ("run.json",)
FIT_IGNORED_KEYS = {"timing", "specflow_version"}
NOT_WRITTEN = "the rerun did not write it"


@dataclass
class ExhibitResult:
    path: str  # package-relative
    status: str  # reproduced | redrawn | differs | missing | extra
    details: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return self.status in ("reproduced", "redrawn")


@dataclass
class VerifyReport:
    package: Path
    manifest: ManifestCheck | None = None
    exhibits: list[ExhibitResult] = field(default_factory=list)
    version_warnings: list[str] = field(default_factory=list)
    run_exit: int | None = None
    run_log: Path | None = None
    run_tail: list[str] = field(default_factory=list)
    scratch: Path | None = None
    problem: str = ""  # why verification stopped early
    rtol: float = DEFAULT_RTOL
    atol: float = DEFAULT_ATOL
    manifest_only: bool = False

    @property
    def classification(self) -> str:
        """full, partial or failed; 'manifest ok' when only the manifest was checked."""
        if self.problem or self.manifest is None or not self.manifest.ok:
            return "failed"
        if self.manifest_only:
            return "manifest ok"
        if not self.exhibits:
            return "failed"
        good = sum(1 for e in self.exhibits if e.ok)
        if good == len(self.exhibits):
            return "full"
        return "partial" if good else "failed"

    @property
    def ok(self) -> bool:
        return self.classification in ("full", "manifest ok")


# ---------------------------------------------------------------------------------------------
# zips


def safe_extract(zip_path: Path, dest: Path) -> None:
    """Extract ``zip_path`` into ``dest``; refuse the whole archive if any member could write
    outside ``dest`` or is a symlink (checked before anything is written)."""
    dest = Path(dest).resolve()
    try:
        z = zipfile.ZipFile(zip_path)
    except (zipfile.BadZipFile, OSError) as exc:
        raise ReplicationError(f"{zip_path}: not a readable zip file ({exc})") from None
    with z:
        seen: set[str] = set()
        plan: list[tuple[zipfile.ZipInfo, Path]] = []
        for info in z.infolist():
            name = info.filename
            try:
                rel = safe_relpath(name.rstrip("/") if info.is_dir() else name)
            except ReplicationError as exc:
                raise ReplicationError(f"{zip_path}: {exc}; nothing was extracted") from None
            mode = info.external_attr >> 16
            if stat.S_ISLNK(mode):
                raise ReplicationError(f"{zip_path}: member '{name}' is a symbolic link; nothing was extracted")
            key = rel.as_posix().lower()
            if key in seen:
                raise ReplicationError(f"{zip_path}: member '{name}' appears twice; nothing was extracted")
            seen.add(key)
            target = (dest / rel).resolve()
            if not target.is_relative_to(dest):
                raise ReplicationError(f"{zip_path}: member '{name}' would be written outside "
                                       f"the scratch folder; nothing was extracted")
            plan.append((info, target))
        for info, target in plan:
            if info.is_dir():
                target.mkdir(parents=True, exist_ok=True)
                continue
            target.parent.mkdir(parents=True, exist_ok=True)
            with z.open(info) as src, open(target, "xb") as dst:
                shutil.copyfileobj(src, dst, 1 << 20)


def _package_root(folder: Path) -> Path:
    """The folder holding MANIFEST.sha256: ``folder`` itself or its one top-level folder."""
    if (folder / MANIFEST_NAME).is_file():
        return folder
    subs = [p for p in folder.iterdir() if p.is_dir()]
    files = [p for p in folder.iterdir() if not p.is_dir()]
    if len(subs) == 1 and not files and (subs[0] / MANIFEST_NAME).is_file():
        return subs[0]
    raise ReplicationError(f"{folder}: no {MANIFEST_NAME} at the top (or in a single top folder): "
                           "not a specflow replication package")


# ---------------------------------------------------------------------------------------------
# comparisons


def _num(v) -> float | None:
    if v is None or isinstance(v, bool):
        return None
    if isinstance(v, (int, float)):
        return float(v)
    try:
        return float(str(v).strip())
    except ValueError:
        return None


def _same(a, b, rtol: float, atol: float) -> bool:
    """Numbers within tolerance (NaN equals NaN; infinities must match), else text equal."""
    x, y = _num(a), _num(b)
    if x is not None and y is not None:
        if x != x or y != y:
            return x != x and y != y
        if x in (float("inf"), float("-inf")) or y in (float("inf"), float("-inf")):
            return x == y
        return abs(y - x) <= atol + rtol * abs(x)
    return ("" if a is None else str(a)) == ("" if b is None else str(b))


def _rows_csv(path: Path) -> tuple[list[str], list[dict]]:
    with open(path, newline="", encoding="utf-8") as f:
        r = csv.DictReader(f)
        return list(r.fieldnames or []), list(r)


def _rows_parquet(path: Path) -> tuple[list[str], list[dict]]:
    import pandas as pd

    df = pd.read_parquet(path)
    rows = []
    for rec in df.to_dict(orient="records"):
        rows.append({k: (None if (v is None or v is pd.NA or (isinstance(v, float) and v != v)) else v)
                     for k, v in rec.items()})
    return [str(c) for c in df.columns], rows


def compare_tables(a_cols, a_rows, b_cols, b_rows, rtol: float, atol: float) -> list[str]:
    """Differences between two tidy tables keyed by (spec_id, term) (or by row number)."""
    out: list[str] = []
    if a_cols != b_cols:
        gone = [c for c in a_cols if c not in b_cols]
        new = [c for c in b_cols if c not in a_cols]
        out.append(f"columns differ (missing in rerun: {gone or 'none'}; new in rerun: {new or 'none'})")
    keyed = all(k in a_cols and k in b_cols for k in ("spec_id", "term"))

    def key(i, r):
        return (str(r.get("spec_id")), str(r.get("term"))) if keyed else (str(i),)

    a = {key(i, r): r for i, r in enumerate(a_rows)}
    b = {key(i, r): r for i, r in enumerate(b_rows)}
    for k in a:
        if k not in b:
            out.append(f"row {'/'.join(k)}: missing in the rerun")
    for k in b:
        if k not in a:
            out.append(f"row {'/'.join(k)}: new in the rerun")
    cols = [c for c in a_cols if c in b_cols]
    for k, ra in a.items():
        rb = b.get(k)
        if rb is None:
            continue
        for c in cols:
            if not _same(ra.get(c), rb.get(c), rtol, atol):
                out.append(f"{'/'.join(k)} {c}: package {ra.get(c)!r}, rerun {rb.get(c)!r}")
    return out


def _walk_json(a, b, path: str, rtol: float, atol: float, out: list[str]) -> None:
    if isinstance(a, dict) and isinstance(b, dict):
        for k in sorted(set(a) | set(b)):
            if k in FIT_IGNORED_KEYS:
                continue
            p = f"{path}.{k}" if path else str(k)
            if k not in b:
                out.append(f"{p}: missing in the rerun")
            elif k not in a:
                out.append(f"{p}: new in the rerun")
            else:
                _walk_json(a[k], b[k], p, rtol, atol, out)
    elif isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            out.append(f"{path}: {len(a)} items in the package, {len(b)} in the rerun")
        for i, (x, y) in enumerate(zip(a, b)):
            _walk_json(x, y, f"{path}[{i}]", rtol, atol, out)
    elif isinstance(a, bool) or isinstance(b, bool) or isinstance(a, str) or isinstance(b, str) \
            or a is None or b is None:
        if a != b:
            out.append(f"{path}: package {a!r}, rerun {b!r}")
    elif not _same(a, b, rtol, atol):
        out.append(f"{path}: package {a!r}, rerun {b!r}")


def compare_json(a_path: Path, b_path: Path, rtol: float, atol: float) -> list[str]:
    try:
        a = json.loads(a_path.read_text(encoding="utf-8"))
        b = json.loads(b_path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        return [f"cannot read as JSON: {exc}"]
    out: list[str] = []
    _walk_json(a, b, "", rtol, atol, out)
    return out


def compare_text(a_path: Path, b_path: Path) -> list[str]:
    """Printed numbers compared digit for digit, line by line; then the text around them."""
    a = a_path.read_text(encoding="utf-8", errors="replace").splitlines()
    b = b_path.read_text(encoding="utf-8", errors="replace").splitlines()
    out: list[str] = []
    if len(a) != len(b):
        out.append(f"{len(a)} lines in the package, {len(b)} in the rerun")
    for i, (x, y) in enumerate(zip(a, b), start=1):
        if x == y:
            continue
        nx, ny = NUMBER.findall(x), NUMBER.findall(y)
        if nx != ny:
            pairs = [(p, q) for p, q in zip(nx, ny) if p != q]
            if len(nx) != len(ny):
                out.append(f"line {i}: {len(nx)} numbers in the package, {len(ny)} in the rerun")
            out += [f"line {i}: package {p}, rerun {q}" for p, q in pairs]
        else:
            out.append(f"line {i}: same numbers, different text")
    return out


def compare_file(rel: str, a: Path, b: Path, rtol: float, atol: float) -> tuple[str, list[str]]:
    """(status, details) for one output of the package (``a``) and the rerun (``b``)."""
    if not b.is_file():
        return "missing", [NOT_WRITTEN]
    name = a.name.lower()
    if a.read_bytes() == b.read_bytes():
        return "reproduced", []
    if name.endswith(".csv"):
        diffs = compare_tables(*_rows_csv(a), *_rows_csv(b), rtol, atol)
    elif name.endswith(".parquet"):
        diffs = compare_tables(*_rows_parquet(a), *_rows_parquet(b), rtol, atol)
    elif name.endswith(".json"):
        diffs = compare_json(a, b, rtol, atol)
    elif name.endswith(IMAGE_SUFFIXES):
        return "redrawn", ["image bytes differ; its numbers are compared in estimates.csv"]
    elif name.endswith(TEXT_SUFFIXES):
        diffs = compare_text(a, b)
    else:
        diffs = ["bytes differ"]
    if not diffs:
        return "reproduced", ["equal within tolerance (not byte-identical)"]
    extra = [f"... and {len(diffs) - SHOW} more"] if len(diffs) > SHOW else []
    return "differs", diffs[:SHOW] + extra


# ---------------------------------------------------------------------------------------------
# the rerun


def _copy_package(src: Path, dst: Path) -> None:
    def ignore(folder, names):
        return [IGNORED_TOP] if Path(folder) == src and IGNORED_TOP in names else []

    shutil.copytree(src, dst, symlinks=True, ignore=ignore)


def rerun(work: Path, info: dict, cores: int, log: Path, timeout: float | None = None) -> tuple[int, list[str]]:
    """Run the package's spec in ``work`` with this environment's specflow; (exit code, last lines)."""
    spec = work / safe_relpath(info["spec"])
    out = work / safe_relpath(info["output"])
    if out.exists():
        shutil.rmtree(out)
    cmd = [sys.executable, "-m", "specflow.cli", "run", str(spec), "--cores", str(cores)]
    with open(log, "w", encoding="utf-8") as f:
        try:
            r = subprocess.run(cmd, cwd=work, stdout=f, stderr=subprocess.STDOUT, timeout=timeout,
                               env={**os.environ, "PYTHONHASHSEED": "0"})
            code = r.returncode
        except subprocess.TimeoutExpired:
            code = -1
            f.write(f"\nverify: the run did not finish within {timeout} seconds\n")
    tail = log.read_text(encoding="utf-8", errors="replace").splitlines()[-6:]
    return code, tail


def read_info(root: Path) -> dict:
    try:
        info = json.loads((root / INFO_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise ReplicationError(f"{root}: cannot read {INFO_NAME}: {exc}") from None
    for key in ("spec", "output", "outputs"):
        if key not in info:
            raise ReplicationError(f"{root / INFO_NAME}: no '{key}'; not a specflow package record")
    return info


def verify(package: Path, *, rtol: float = DEFAULT_RTOL, atol: float = DEFAULT_ATOL,
           cores: int | None = None, manifest_only: bool = False, scratch: Path | None = None,
           keep: bool = False, timeout: float | None = None) -> VerifyReport:
    """Verify a package folder or zip (see the module docstring)."""
    package = Path(package)
    if not package.exists():
        raise ReplicationError(f"{package}: no such file or folder")
    own_scratch = scratch is None
    base = Path(tempfile.mkdtemp(prefix="specflow-verify-")) if own_scratch else Path(scratch)
    base.mkdir(parents=True, exist_ok=True)
    if not own_scratch and any(base.iterdir()):
        raise ReplicationError(f"--scratch {base} is not empty")
    report = VerifyReport(package=package, scratch=base, rtol=rtol, atol=atol, manifest_only=manifest_only)
    try:
        if package.is_file():
            unpacked = base / "unpacked"
            unpacked.mkdir()
            safe_extract(package, unpacked)
            root = _package_root(unpacked)
        else:
            root = _package_root(package)
        report.manifest = _manifest(root)
        if not report.manifest.ok:
            return report
        info = read_info(root)
        report.version_warnings = version_differences(info.get("environment", {}), environment())
        if report.manifest.restricted_absent:
            report.problem = ("data not included in the package must be obtained first (see README.md): "
                              + ", ".join(report.manifest.restricted_absent))
            return report
        if manifest_only:
            return report
        work = base / "rerun"
        _copy_package(root, work)
        report.problem = _outside(work, info)
        if report.problem:
            return report
        report.run_log = base / "rerun.log"
        n = cores or int(info.get("cores") or 0) or (os.cpu_count() or 1)
        report.run_exit, report.run_tail = rerun(work, info, n, report.run_log, timeout)
        if report.run_exit not in (0, 1):  # 1: finished, some specifications failed (as recorded)
            report.problem = f"the workflow did not finish (specflow run exit code {report.run_exit})"
        report.exhibits = compare_outputs(root, work, info, rtol, atol)
        return report
    finally:
        done_ok = report.ok
        if own_scratch and not keep and (done_ok or manifest_only or report.run_exit is None):
            shutil.rmtree(base, ignore_errors=True)
            report.scratch = None


def _outside(work: Path, info: dict) -> str:
    """Why the package's spec would read or write outside its own folder ('' if it does not)."""
    from .data import resolve_path
    from .errors import SpecflowError
    from .spec import load_spec

    top = work.resolve()
    try:
        loaded = load_spec(work / safe_relpath(info["spec"]))
    except SpecflowError as exc:
        return f"the package's spec does not load: {exc.lines()[0]}"
    if loaded.output_dir != (work / safe_relpath(info["output"])).resolve():
        return "the spec's output folder is not the one replication.json names"
    if not loaded.output_dir.is_relative_to(top):
        return "the spec's output folder lies outside the package; refusing to run it"
    for name in loaded.spec.data:
        try:
            path = resolve_path(loaded, name)
        except SpecflowError as exc:
            return exc.lines()[0]
        if not path.is_relative_to(top):
            return f"dataset '{name}' lies outside the package; refusing to run it"
    return ""


def _manifest(root: Path) -> ManifestCheck:
    check = check_manifest(root)
    prefix = IGNORED_TOP + "/"
    check.extra = [p for p in check.extra if not p.startswith(prefix)]
    check.not_regular = [p for p in check.not_regular if p != IGNORED_TOP and not p.startswith(prefix)]
    return check


def compare_outputs(root: Path, work: Path, info: dict, rtol: float, atol: float) -> list[ExhibitResult]:
    out = []
    listed = [p for p in info["outputs"] if Path(p).name not in NOT_COMPARED]
    for rel in listed:
        status, details = compare_file(rel, root / safe_relpath(rel), work / safe_relpath(rel), rtol, atol)
        out.append(ExhibitResult(rel, status, details))
    # figures are "redrawn" only if the numbers they show reproduced
    numbers_ok = all(e.status == "reproduced" for e in out if Path(e.path).name.startswith("estimates."))
    if not numbers_ok:
        for e in out:
            if e.status == "redrawn":
                e.status = "differs"
                e.details = ["image bytes differ, and so do the estimates it shows"]
    # exhibits the rerun wrote that the package lacks
    odir = work / safe_relpath(info["output"])
    from .package import output_files

    have = set(info["outputs"])
    prefix = info["output"].rstrip("/") + "/"
    for rel in output_files(odir) if odir.is_dir() else []:
        full = prefix + rel
        if full not in have and Path(rel).name not in NOT_COMPARED:
            out.append(ExhibitResult(full, "extra", ["written by the rerun but not in the package"]))
    return out


# ---------------------------------------------------------------------------------------------
# the report


def render(report: VerifyReport) -> str:
    lines = [f"verify {report.package}"]
    m = report.manifest
    if m is not None:
        if m.ok:
            lines.append(f"manifest: ok ({m.checked} files, SHA-256 and size)")
        else:
            lines.append(f"manifest: FAILED ({len(m.lines())} problem(s))")
            lines += [f"  {x}" for x in m.lines()]
        for p in m.restricted_present:
            lines.append(f"  obtained data file matches the authors' copy: {p}")
        for p in m.restricted_absent:
            lines.append(f"  data file not included (obtain it as README.md says): {p}")
    for w in report.version_warnings:
        lines.append(f"warning: software differs: {w}")
    if report.run_exit is not None:
        lines.append(f"rerun: specflow run exit code {report.run_exit} (log: {report.run_log})")
        if report.run_exit not in (0, 1):
            lines += [f"  | {t}" for t in report.run_tail]
    if report.exhibits:
        lines.append(f"exhibits (numbers within |rerun - package| <= {report.atol:g} + {report.rtol:g} x "
                     "|package| in estimates and fits, digit for digit in tables; missing: the "
                     "rerun did not write it):")
        for e in report.exhibits:
            lines.append(f"  {e.status:<10} {e.path}")
            if e.details != [NOT_WRITTEN]:  # the status says it all
                lines += [f"             {d}" for d in e.details]
    if report.problem:
        lines.append(f"stopped: {report.problem}")
    counts: dict[str, int] = {}
    for e in report.exhibits:
        counts[e.status] = counts.get(e.status, 0) + 1
    tally = ", ".join(f"{n} {s}" for s, n in sorted(counts.items()))
    if report.classification == "manifest ok":
        lines.append("result: manifest ok (no rerun: --manifest-only)")
    else:
        lines.append(f"result: {report.classification} reproduction" + (f" ({tally})" if tally else ""))
    if report.scratch is not None:
        lines.append(f"scratch folder kept: {report.scratch}")
    return "\n".join(lines) + "\n"
