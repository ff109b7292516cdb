"""``specflow package``: a replication package folder (and zip) that a data editor can rerun.

Layout of a package folder ``P`` (the study's files keep their places relative to each other,
so the spec runs unchanged and its specification ids stay the same)::

    P/README.md            sections of the data editors' template README (+ README.pdf when a
                           converter is available: pandoc, or chromium with markdown-it-py)
    P/LICENSE.txt          the licence chosen in [package] licence
    P/MANIFEST.sha256      SHA-256 and size of every other file (sha256sum -c reads it)
    P/replication.json     machine-readable record: environment, datasets, outputs, exhibits
    P/requirements.txt     every Python package pinned to the version used, then specflow's wheel
    P/software/            specflow's wheel, built from the running installation
    P/workflow/            a copy of the Snakemake workflow (the wheel holds the one that runs)
    P/<spec>               the spec file, at its path relative to the study's common folder
    P/<data files>         the redistributable data files (others: checksum + access notes)
    P/<output>/            the outputs of the last run, less prepared data, logs and snapshots

The "common folder" is the deepest folder holding the spec file, the data files and the output
folder. If a top-level name of the study would clash with the package's own files, the study
goes under ``P/study/`` instead.
"""

from __future__ import annotations

import base64
import csv
import hashlib
import json
import os
import shutil
import subprocess
import tempfile
import uuid
import zipfile
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath

from .replicate import (
    INFO_NAME, MANIFEST_NAME, RUNTIME_BUCKETS, SOFTWARE_DIR, ReplicationError,
    build_manifest, environment, human_bytes, python_command, runtime_bucket, sha256_and_size,
)

RESERVED = {"README.md", "README.pdf", "LICENSE.txt", MANIFEST_NAME, INFO_NAME, "requirements.txt",
            SOFTWARE_DIR, "workflow"}
# top-level folders of the output that a package leaves out: prepared data (it may hold data
# that is not redistributable, and the rerun rebuilds it), logs and the run snapshots
OUTPUT_SKIP = {"data", "logs", "runs"}
ZIP_DATE = (1980, 1, 1, 0, 0, 0)
INFO_FORMAT = 1
MAIN_PACKAGES = ("numpy", "pandas", "scipy", "linearmodels", "pydantic", "snakemake", "matplotlib",
                 "pyarrow", "jinja2")
LICENCE_FILES = {
    "MIT": "licence-MIT.txt.j2",
    "BSD-3-Clause": "licence-BSD-3-Clause.txt.j2",
    "Apache-2.0": "licence-Apache-2.0.txt",
    "CC-BY-4.0": "licence-CC-BY-4.0.txt",
    "CC0-1.0": "licence-CC0-1.0.txt",
}
LICENCE_NAMES = {
    "MIT": "the MIT License",
    "BSD-3-Clause": "the BSD 3-Clause License",
    "Apache-2.0": "the Apache License 2.0",
    "CC-BY-4.0": "the Creative Commons Attribution 4.0 International Public License (CC BY 4.0)",
    "CC0-1.0": "the Creative Commons CC0 1.0 Universal dedication",
}


@dataclass
class PackageResult:
    folder: Path
    zip_path: Path | None
    files: int
    size: int
    missing: list[str] = field(default_factory=list)  # what the README lacks
    notes: list[str] = field(default_factory=list)


# ---------------------------------------------------------------------------------------------
# What the package is made of


@dataclass
class Layout:
    root: Path  # the study's common folder on this machine
    prefix: PurePosixPath  # where it goes inside the package ("" or "study")
    spec: PurePosixPath  # package-relative paths
    output: PurePosixPath
    data: dict[str, tuple[Path, PurePosixPath]]  # dataset -> (file on disk, package path)

    def rel(self, placed: Path) -> PurePosixPath:
        return self.prefix / PurePosixPath(Path(os.path.relpath(placed, self.root)).as_posix())


def _placed(folder: Path, text: str) -> Path:
    """Where a path written in the spec points, without resolving symlinks."""
    return Path(os.path.normpath(folder / text))


def layout(loaded, dataset_names: list[str]) -> Layout:
    from .data import resolve_path

    data: dict[str, Path] = {}
    placed: dict[str, Path] = {}
    for name in dataset_names:
        ds = loaded.spec.data[name]
        if Path(ds.path).is_absolute():
            raise ReplicationError(f"[data.{name}] path '{ds.path}' is absolute; a package needs paths "
                                   "relative to the spec file")
        data[name] = resolve_path(loaded, name)
        placed[name] = _placed(loaded.folder, ds.path)
    if Path(loaded.spec.study.output).is_absolute():
        raise ReplicationError(f"[study] output '{loaded.spec.study.output}' is absolute; a package "
                               "needs an output folder relative to the spec file")
    out = _placed(loaded.folder, loaded.spec.study.output)
    spec = Path(os.path.normpath(loaded.path))
    root = Path(os.path.commonpath([spec.parent, out, *[p.parent for p in placed.values()]]))
    lay = Layout(root, PurePosixPath(), PurePosixPath(), PurePosixPath(), {})
    tops = {lay.rel(p).parts[0] for p in [spec, out, *placed.values()]}
    if tops & RESERVED:
        lay.prefix = PurePosixPath("study")
    lay.spec = lay.rel(spec)
    lay.output = lay.rel(out)
    lay.data = {n: (data[n], lay.rel(placed[n])) for n in dataset_names}
    return lay


def output_files(out_dir: Path) -> list[str]:
    """The output folder's files a package carries (POSIX paths relative to the folder)."""
    from .replicate import list_files

    files, odd = list_files(out_dir)
    keep = []
    for rel in files:
        parts = rel.split("/")
        if parts[0] in OUTPUT_SKIP or any(p.startswith(".") for p in parts) or ".tmp" in parts[-1]:
            continue
        keep.append(rel)
    return keep


def missing_metadata(loaded, dataset_names: list[str], run: dict, exhibit_keys: list[str]) -> list[str]:
    """What the README will lack, one line each, naming the spec key that would supply it."""
    s = loaded.spec
    out = []
    if not s.study.description:
        out.append("an overview of the study: set [study] description")
    if not s.study.authors:
        out.append("the authors: set [study] authors")
    if not s.package.holder:
        out.append("the copyright holder in LICENSE.txt: set [package] holder")
    if not s.package.contact:
        out.append("a contact for replicators: set [package] contact")
    if not s.package.references:
        out.append("references beyond the data citations: set [package] references")
    for name in dataset_names:
        ds = s.data[name]
        for key, what in (("source", "where the data come from"), ("citation", "a data citation"),
                          ("licence", "the data's licence or terms of use")):
            if not getattr(ds, key):
                out.append(f"{what} for dataset '{name}': set [data.{name}] {key}")
        if not ds.redistribute and not ds.access:
            out.append(f"how to obtain dataset '{name}' (it is not included): set [data.{name}] access")
    if run.get("partial_run"):
        fitted, total = run["partial_run"]
        out.append(f"the measured runtime: the last run fitted {fitted} of {total} specifications "
                   "(the rest were reused), so its time understates a replication; rerun with "
                   "`specflow run --force` before packaging")
    elif run.get("runtime_seconds") is None:
        out.append("the measured runtime: the output folder has no run.json with a runtime "
                   "(run the study with `specflow run`)")
    unnamed = [k for k in exhibit_keys if k not in s.package.exhibits]
    if unnamed:
        out.append(f"the paper's table or figure number of {len(unnamed)} exhibit(s) "
                   f"({', '.join(unnamed[:4])}{', ...' if len(unnamed) > 4 else ''}): "
                   "set [package] exhibits")
    for k in sorted(set(s.package.exhibits) - set(exhibit_keys)):
        out.append(f"[package] exhibits names '{k}', which the run did not produce "
                   f"(exhibits: {', '.join(exhibit_keys)})")
    return out


def read_run_record(out_dir: Path) -> dict:
    """The last run's record (``run.json``), reduced to what the README needs."""
    p = Path(out_dir) / "run.json"
    try:
        rec = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    if not isinstance(rec, dict):
        return {}
    out: dict = {"raw": rec}
    for key in ("runtime_seconds", "seconds", "elapsed_seconds", "runtime", "elapsed", "wall_seconds"):
        v = rec.get(key)
        if isinstance(v, (int, float)) and not isinstance(v, bool):
            out["runtime_seconds"] = float(v)
            break
    fitted, total = rec.get("fitted"), rec.get("specifications")
    full = rec.get("full_runtime_seconds")  # the last run that fitted every specification
    if isinstance(full, (int, float)) and not isinstance(full, bool):
        out["runtime_seconds"] = float(full)
    elif "runtime_seconds" in out and isinstance(fitted, int) and isinstance(total, int) and fitted < total:
        # a run that reused results says nothing about how long a replication takes
        out["partial_run"] = (fitted, total)
        del out["runtime_seconds"]
    for key in ("cores", "n_cores"):
        if isinstance(rec.get(key), int):
            out["cores"] = rec[key]
    for key in ("finished", "finished_at", "ended", "end", "started", "started_at"):
        v = rec.get(key)
        if isinstance(v, str) and len(v) >= 4 and v[:4].isdigit():
            out["year"] = int(v[:4])
            break
    hw = rec.get("hardware") or rec.get("machine") or rec.get("environment") or {}
    if isinstance(hw, dict):
        out["hardware"] = hw
    return out


def _check_current(loaded, specs, out_dir: Path) -> None:
    """Refuse outputs that do not belong to the spec and data as they are now."""
    from .workflow import compute_fingerprints, fingerprint_path, make_plan

    est = out_dir / "estimates.csv"
    if not est.is_file():
        raise ReplicationError(f"{est}: not found; run the study first (specflow run {loaded.path.name})")
    plan = make_plan(loaded, specs)
    for name, fp in compute_fingerprints(plan).items():
        f = fingerprint_path(out_dir, name)
        recorded = f.read_text(encoding="utf-8").strip() if f.is_file() else None
        if recorded != fp.fingerprint:
            raise ReplicationError(f"the outputs in {out_dir} are not from the current data or code of "
                                   f"dataset '{name}'; run the study again before packaging")
    with open(est, newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    have = {r.get("spec_id") for r in rows}
    want = {sp.id for sp in specs}
    if have != want:
        n = len(want - have) + len(have - want)
        raise ReplicationError(f"{est} does not match the spec's grid ({n} specification(s) differ); "
                               "run the study again before packaging")
    missing = [r["spec_id"] for r in rows if r.get("status") == "missing"]
    if missing:
        raise ReplicationError(f"{est}: {len(missing)} specification(s) have no result; run the study again")


# ---------------------------------------------------------------------------------------------
# specflow's own wheel


def _b64(digest: bytes) -> str:
    return base64.urlsafe_b64encode(digest).rstrip(b"=").decode("ascii")


def _tree_files(folder: Path, arc_prefix: str) -> list[tuple[str, Path]]:
    out = []
    for p in sorted(folder.rglob("*")):
        rel = p.relative_to(folder)
        if not p.is_file() or "__pycache__" in rel.parts or p.suffix in (".pyc", ".pyo"):
            continue
        if any(part.startswith(".") for part in rel.parts):
            continue
        out.append((f"{arc_prefix}/{rel.as_posix()}", p))
    return out


def workflow_folder() -> Path:
    from .workflow import snakefile

    return snakefile().parent


def wheel_members() -> list[tuple[str, Path]]:
    """The files of specflow's wheel: the package and, if it lives beside it, the workflow."""
    from .workflow import PACKAGE_DIR

    members = _tree_files(PACKAGE_DIR, "specflow")
    wf = workflow_folder()
    if not wf.resolve().is_relative_to(PACKAGE_DIR.resolve()):
        # installed as specflow/workflows/, where specflow.workflow.snakefile looks first
        members += _tree_files(wf, "specflow/workflows")
    return members


def build_wheel(dest: Path) -> Path:
    """A pure-Python wheel of the running specflow (deterministic: sorted, fixed timestamps)."""
    from importlib import metadata

    from . import __version__

    # an installed dist-info (METADATA) is preferred to a source tree's egg-info (PKG-INFO)
    found = [(d.read_text("METADATA"), d) for d in metadata.distributions(name="specflow")]
    found += [(d.read_text("PKG-INFO"), d) for d in metadata.distributions(name="specflow")]
    found = [(m, d) for m, d in found if m]
    if not found:
        raise ReplicationError("specflow is not installed as a distribution (pip install -e .); "
                               "a package needs its metadata to build the wheel")
    meta, dist = found[0]
    entry = dist.read_text("entry_points.txt") or "[console_scripts]\nspecflow = specflow.cli:main\n"
    info = f"specflow-{__version__}.dist-info"
    files: list[tuple[str, bytes]] = [(arc, p.read_bytes()) for arc, p in wheel_members()]
    files += [
        (f"{info}/METADATA", meta.encode("utf-8")),
        (f"{info}/WHEEL", b"Wheel-Version: 1.0\nGenerator: specflow package\n"
                          b"Root-Is-Purelib: true\nTag: py3-none-any\n"),
        (f"{info}/entry_points.txt", entry.encode("utf-8")),
    ]
    record = "".join(f"{arc},sha256={_b64(hashlib.sha256(b).digest())},{len(b)}\n" for arc, b in files)
    record += f"{info}/RECORD,,\n"
    files.append((f"{info}/RECORD", record.encode("utf-8")))
    dest.mkdir(parents=True, exist_ok=True)
    target = dest / f"specflow-{__version__}-py3-none-any.whl"
    with zipfile.ZipFile(target, "w", compression=zipfile.ZIP_DEFLATED) as z:
        for arc, data in files:
            zi = zipfile.ZipInfo(arc, date_time=ZIP_DATE)
            zi.external_attr = 0o100644 << 16
            zi.compress_type = zipfile.ZIP_DEFLATED
            z.writestr(zi, data)
    return target


def requirements_text(env: dict, wheel: PurePosixPath) -> str:
    lines = [
        "# Every Python package specflow used when this package was built, at its exact version,",
        f"# on Python {env['python']} ({env['platform']}). Install in the package folder with:",
        f"#   {python_command()} -m venv .venv && .venv/bin/pip install -r requirements.txt",
    ]
    lines += [f"{name}=={version}" for name, version in env["packages"].items()]
    lines.append(f"./{wheel.as_posix()}")
    return "\n".join(lines) + "\n"


# ---------------------------------------------------------------------------------------------
# README, licence, PDF


def _jinja():
    import jinja2

    return jinja2.Environment(loader=jinja2.PackageLoader("specflow", "templates"),
                              undefined=jinja2.StrictUndefined, keep_trailing_newline=True,
                              trim_blocks=True, lstrip_blocks=True, autoescape=False)


def licence_text(licence: str, holder: str, year: int) -> str:
    name = LICENCE_FILES[licence]
    if name.endswith(".j2"):
        return _jinja().get_template(name).render(year=year, holder=holder or "the authors")
    from importlib import resources

    return resources.files("specflow").joinpath("templates", name).read_text(encoding="utf-8")


def _md(s: str) -> str:
    """Text for a Markdown table cell."""
    return str(s).replace("|", "\\|").replace("\n", " ")


def _id_list(ids: list[str], listing: str, limit: int = 20) -> str:
    if not ids:
        return "none"
    if len(ids) > limit:
        return f"{len(ids)} specifications (listed in {listing})"
    return ", ".join(f"`{i}`" for i in ids)


def exhibit_rows(loaded, lay: Layout, outputs: list[str], exmap: dict[str, list[str]]) -> tuple[list[dict], list[str]]:
    """The README's table of exhibits, and the outputs that are no exhibit (by package path)."""
    from .tables import tables_of

    titles: dict[str, tuple[str, str]] = {}
    for index, t in tables_of(loaded):
        where = (f"`{lay.spec.as_posix()}` line {loaded.line_of(('table', index))}, `[[table]]` "
                 f"name = \"{t.name}\"" if index is not None and loaded.line_of(("table", index))
                 else f"`{lay.spec.as_posix()}`, `[model]` and `[axes]` (the default table)")
        titles[t.name] = (t.title or t.name, where)
    spec_ref = f"`{lay.spec.as_posix()}`"
    listing = f"`{(lay.output / 'exhibits.json').as_posix()}`"
    keys = dict(exmap)
    # files under tables/ and figures/ that exhibits.json does not name still get a row
    for rel in outputs:
        parts = rel.split("/")
        if parts[0] in ("tables", "figures") and len(parts) == 2:
            stem = parts[1].split(".")[0]
            keys.setdefault(f"{parts[0]}/{stem}", None)
    rows, covered = [], set()
    for key in sorted(keys, key=lambda k: (not k.startswith("tables/"), not k.startswith("figures/"), k)):
        files = [r for r in outputs if r.startswith(key + ".")]
        covered.update(files)
        kind, _, name = key.partition("/")
        if kind == "tables":
            title, where = titles.get(name, (name, spec_ref))
            desc = f"Table: {title}"
        elif kind == "figures" and name == "spec_curve":
            desc, where = "Figure: specification curve of the whole grid", f"{spec_ref} (every fitted specification)"
        elif kind == "figures" and name.startswith("coef_"):
            t = name[len("coef_"):]
            title, where = titles.get(t, (t, spec_ref))
            desc = f"Figure: coefficient plot of the table \"{title}\""
        elif key == "estimates":
            desc, where = "Every estimate and diagnostic (one row per specification and term)", spec_ref
        else:
            desc, where = key, spec_ref
        ids = keys[key]
        rows.append(dict(
            key=key, description=_md(desc), declared=_md(where),
            paper=_md(loaded.spec.package.exhibits.get(key, "not given (`[package] exhibits`)")),
            files=", ".join(f"`{(lay.output / f).as_posix()}`" for f in files) or "none written",
            file_list=[(lay.output / f).as_posix() for f in files],
            specs=_id_list(ids, listing) if ids is not None else "not recorded (no entry in exhibits.json)",
        ))
    others = [(lay.output / r).as_posix() for r in outputs if r not in covered]
    return rows, others


def _hardware_text(hw: dict) -> str:
    cpu = hw.get("cpu_count")
    mem = hw.get("memory_bytes")
    parts = [hw.get("platform") or hw.get("os") or "unknown system"]
    if cpu:
        parts.append(f"{cpu} logical CPUs")
    if mem:
        parts.append(f"{human_bytes(mem)} of memory")
    return ", ".join(str(p) for p in parts)


def _count(n: int, one: str, many: str | None = None) -> str:
    return f"{n} {one if n == 1 else (many or one + 's')}"


def _fmt_seconds(s: float) -> str:
    if s < 120:
        return f"{s:.0f} seconds"
    if s < 7200:
        return f"{s / 60:.1f} minutes"
    return f"{s / 3600:.1f} hours"


def render_readme(ctx: dict) -> str:
    return _jinja().get_template("package_README.md.j2").render(**ctx)


def make_pdf(readme: Path, pdf: Path, timeout: float = 120) -> str | None:
    """Write ``pdf`` from ``readme`` with pandoc, or chromium and markdown-it-py; return None on
    success or the reason it was skipped."""
    pandoc = shutil.which("pandoc")
    if pandoc:
        r = subprocess.run([pandoc, str(readme), "-o", str(pdf)], capture_output=True, text=True,
                           timeout=timeout, cwd=readme.parent)
        if r.returncode == 0 and pdf.is_file():
            return None
        reason = f"pandoc failed: {(r.stderr or r.stdout).strip().splitlines()[-1:] or ['']}"
    else:
        reason = "pandoc is not installed"
    browser = next((shutil.which(b) for b in ("chromium", "chromium-browser", "google-chrome")
                    if shutil.which(b)), None)
    try:
        from markdown_it import MarkdownIt
    except ImportError:
        return f"{reason}, and markdown-it-py (for chromium) is not installed"
    if not browser:
        return f"{reason}, and no chromium was found"
    html = MarkdownIt("commonmark").enable("table").render(readme.read_text(encoding="utf-8"))
    doc = ("<!doctype html><html><head><meta charset='utf-8'><style>body{font-family:sans-serif;"
           "font-size:10pt;max-width:48em;margin:2em auto}table{border-collapse:collapse;"
           "table-layout:fixed;width:100%}td,th{border:1px solid #999;padding:2px 6px;"
           "vertical-align:top;overflow-wrap:anywhere}code{font-size:8.5pt;overflow-wrap:anywhere}"
           "</style></head><body>" + html + "</body></html>")
    with tempfile.TemporaryDirectory() as tmp:
        page = Path(tmp) / "README.html"
        page.write_text(doc, encoding="utf-8")
        out = Path(tmp) / "README.pdf"
        cmd = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--no-pdf-header-footer",
               f"--user-data-dir={tmp}/profile", f"--print-to-pdf={out}", page.as_uri()]
        try:
            subprocess.run(cmd, capture_output=True, timeout=timeout)
        except subprocess.TimeoutExpired:
            return f"{reason}; chromium did not finish within {timeout:.0f} s"
        if not out.is_file() or out.stat().st_size == 0:
            return f"{reason}; chromium wrote no PDF"
        shutil.copyfile(out, pdf)
    return None


# ---------------------------------------------------------------------------------------------
# Building


def _copy(src: Path, dst: Path) -> None:
    dst.parent.mkdir(parents=True, exist_ok=True)
    shutil.copyfile(src, dst)


def _rows_of(parquet: Path) -> int | None:
    try:
        import pyarrow.parquet as pq

        return int(pq.ParquetFile(parquet).metadata.num_rows)
    except Exception:  # noqa: BLE001 - the row count is a nicety
        return None


def build_package(loaded, out: Path, *, make_zip: bool = False, pdf: bool = True,
                  force: bool = False) -> PackageResult:
    """Build the package folder ``out`` (and ``out.zip``); see the module docstring."""
    from .grid import expand

    out = Path(out).absolute()
    out_dir = loaded.output_dir
    specs = expand(loaded)
    names = sorted({sp.dataset for sp in specs})
    _check_current(loaded, specs, out_dir)
    lay = layout(loaded, names)
    if out.resolve().is_relative_to(out_dir.resolve()):
        raise ReplicationError(f"--out {out} is inside the output folder {out_dir}; choose another folder")
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        if not (force and (out / INFO_NAME).is_file()):
            raise ReplicationError(f"{out} exists and is not empty (use --force to replace an earlier package)")

    run = read_run_record(out_dir)
    env = environment()
    outputs = output_files(out_dir)
    exfile = out_dir / "exhibits.json"
    if exfile.is_file():
        exmap = {k: list(v) for k, v in json.loads(exfile.read_text(encoding="utf-8")).items()}
    else:
        exmap = {"estimates": [sp.id for sp in specs]}
    rows, others = exhibit_rows(loaded, lay, outputs, exmap)
    missing = missing_metadata(loaded, names, run, [r["key"] for r in rows])
    notes: list[str] = []

    tmp = out.parent / f".{out.name}.tmp-{uuid.uuid4().hex[:8]}"
    tmp.mkdir(parents=True)
    try:
        _copy(loaded.path, tmp / lay.spec)
        not_included: dict[str, tuple[str, int]] = {}
        datasets = []
        for name in names:
            ds = loaded.spec.data[name]
            src, rel = lay.data[name]
            digest, size = sha256_and_size(src)
            if ds.redistribute:
                _copy(src, tmp / rel)
            else:
                not_included[rel.as_posix()] = (digest, size)
            datasets.append(dict(
                name=name, path=rel.as_posix(), included=ds.redistribute, sha256=digest, size=size,
                size_text=human_bytes(size), rows=_rows_of(out_dir / "data" / f"{name}.parquet"),
                source=ds.source or "", citation=ds.citation or "", licence=ds.licence or "",
                access=ds.access or "",
                source_cell=_md(ds.source) if ds.source else "not given",
                derive=", ".join(f"`{k} = {v}`" for k, v in ds.derive.items()),
                filter=ds.filter or "",
            ))
        for rel in outputs:
            _copy(out_dir / rel, tmp / lay.output / rel)
        wf = workflow_folder()
        wf_files = _tree_files(wf, "workflow")
        for arc, p in wf_files:
            _copy(p, tmp / arc)
        wheel = build_wheel(tmp / SOFTWARE_DIR)
        wheel_rel = PurePosixPath(SOFTWARE_DIR) / wheel.name
        (tmp / "requirements.txt").write_text(requirements_text(env, wheel_rel), encoding="utf-8")

        from datetime import date

        year = run.get("year") or date.today().year
        pk = loaded.spec.package
        (tmp / "LICENSE.txt").write_text(licence_text(pk.licence, pk.holder, year), encoding="utf-8")

        runtime = run.get("runtime_seconds")
        hw = run.get("hardware") or {}
        build_hw = _hardware_text(env)
        cores = run.get("cores") or 2
        seed_line = loaded.line_of(("study", "seed"))
        info = {
            "format": INFO_FORMAT,
            "spec": lay.spec.as_posix(),
            "output": lay.output.as_posix(),
            "wheel": wheel_rel.as_posix(),
            "cores": cores,
            "environment": env,
            "runtime_seconds": runtime,
            "datasets": [{k: d[k] for k in ("name", "path", "included", "sha256", "size")} for d in datasets],
            "outputs": [(lay.output / r).as_posix() for r in outputs],
            "exhibits": {r["key"]: r["file_list"] for r in rows},
        }
        (tmp / INFO_NAME).write_text(json.dumps(info, indent=1, sort_keys=True) + "\n", encoding="utf-8")
        payload = sum(sha256_and_size(p)[1] for p in tmp.rglob("*") if p.is_file())
        n_tab = sum(1 for r in rows if r["key"].startswith("tables/"))
        n_fig = sum(1 for r in rows if r["key"].startswith("figures/"))
        n_ax, n_ex = len(loaded.spec.axes), len(loaded.spec.extra)
        scope = (f"It fits {_count(len(specs), 'specification')} (the baseline, "
                 f"{_count(n_ax, 'robustness axis', 'robustness axes')}"
                 + (f" and {_count(n_ex, 'one-off specification')}" if n_ex else "")
                 + f") on {_count(len(datasets), 'dataset')} and writes {_count(n_tab, 'table')}, "
                 f"{_count(n_fig, 'figure')} and a file of every estimate with its diagnostics.")
        ctx = dict(
            title=loaded.spec.study.title, authors=", ".join(loaded.spec.study.authors),
            contact=pk.contact, description=loaded.spec.study.description.strip(),
            spec_path=lay.spec.as_posix(), output=lay.output.as_posix(), env=env,
            scope_text=scope,
            datasets=datasets, restricted=[d["name"] for d in datasets if not d["included"]],
            wheel=wheel_rel.as_posix(), n_pins=len(env["packages"]),
            main_packages=[(n, env["packages"][n]) for n in MAIN_PACKAGES if n in env["packages"]],
            workflow_rules=any(a.startswith("workflow/rules/") for a, _ in wf_files),
            seed=loaded.spec.study.seed,
            seed_where=f"line {seed_line}" if seed_line else "not written in the file: the default",
            runtime_buckets=[label for label, _ in RUNTIME_BUCKETS],
            runtime_bucket=runtime_bucket(runtime) if runtime is not None else None,
            runtime_seconds=runtime,
            runtime_text=_fmt_seconds(runtime) if runtime is not None else "an unrecorded time",
            partial_run=run.get("partial_run"),
            run_sentence=(f"a full run took {_fmt_seconds(runtime)} on the authors' machine"
                          if runtime is not None else "the time of a full run is not recorded"),
            run_cores=f"{cores} core{'s' if cores != 1 else ''}",
            hardware_text=_hardware_text(hw) if hw else build_hw + " (the machine the package was built on)",
            build_hardware_text=build_hw,
            storage_text=human_bytes(payload),
            licence=LICENCE_NAMES[pk.licence], holder=pk.holder, year=year,
            command_install=f"{python_command()} -m venv .venv && .venv/bin/pip install -r requirements.txt",
            command_run=f".venv/bin/specflow run {lay.spec.as_posix()} --cores {cores}",
            exhibits=rows, other_outputs=", ".join(f"`{o}`" for o in others) or "none",
            references=list(pk.references), cited=any(d["citation"] for d in datasets),
        )
        readme = tmp / "README.md"
        readme.write_text(render_readme(ctx), encoding="utf-8")
        if pdf:
            why = make_pdf(readme, tmp / "README.pdf")
            if why:
                notes.append(f"no README.pdf: {why}")
        manifest = build_manifest(tmp, not_included)
        (tmp / MANIFEST_NAME).write_text(manifest.text(), encoding="utf-8")
        if out.exists():
            shutil.rmtree(out)
        os.rename(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise

    zip_path = None
    if make_zip:
        zip_path = out.with_name(out.name + ".zip")
        write_zip(out, zip_path)
    size = sum(s for _, s in manifest.files.values())
    return PackageResult(out, zip_path, len(manifest.files) + 1, size, missing, notes)


def write_zip(folder: Path, target: Path) -> None:
    """Zip ``folder`` deterministically: entries ``<folder name>/<path>``, sorted, fixed dates."""
    from .replicate import list_files

    files, odd = list_files(folder)
    if odd:
        raise ReplicationError(f"{folder}: not a regular file: {odd[0]}")
    tmp = target.with_name(f".{target.name}.tmp-{uuid.uuid4().hex[:8]}")
    try:
        with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as z:
            for rel in files:
                zi = zipfile.ZipInfo(f"{folder.name}/{rel}", date_time=ZIP_DATE)
                zi.external_attr = 0o100644 << 16
                zi.compress_type = zipfile.ZIP_DEFLATED
                with open(folder / rel, "rb") as src, z.open(zi, "w") as dst:
                    shutil.copyfileobj(src, dst, 1 << 20)
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


__all__ = ["build_package", "build_wheel", "write_zip", "PackageResult"]
