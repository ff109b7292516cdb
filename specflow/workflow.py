"""What the Snakemake rules call: plan the batches, prepare datasets, fit a batch, collate.

The workflow (``workflows/Snakefile``) holds no logic; every rule runs
``python -m specflow.workflow STEP ...``, which lands in one of the functions below.

Layout under the study's output folder ``O`` (it is also Snakemake's working directory, so
Snakemake's own metadata and lock live in ``O/.snakemake``)::

    O/data/<dataset>.fingerprint   what the prepared data depends on (one hex line; see below)
    O/data/<dataset>.parquet       the prepared dataset (read, derived, filtered, type-checked)
    O/fits/<batch>.json            one results.Batch: the FitResults of one batch
    O/fits/.reuse/<batch>.json     the same results with the keys they were fitted under
    O/estimates.csv ...            collate's outputs
    O/logs/snakemake.log           Snakemake's log (``specflow run``)
    O/logs/run.pid                 the pid of the specflow run holding the folder (locked)
    O/logs/jobs.lock               held (shared) by every running job, see :func:`hold_job_lock`
    O/logs/<step>/<name>.log       each job's own output
    O/logs/progress/<batch>.json   a fit job's running counts (read by the progress display)
    O/logs/crash/<job>.json        written when a job crashes: the specification and the error
    O/run.json                     the last run's summary (written by ``specflow run``)

Staleness by content
--------------------
Snakemake compares modification times; specflow makes the times follow the content. Before the
workflow starts (``specflow run``, or the Snakefile itself in Snakemake's main process) every
dataset's *fingerprint* is computed: the SHA-256 of the data file's bytes, its format, the
canonical text of its derivations and filter (:func:`specflow.data.fingerprint`) and a hash of
the code that prepares data. The fingerprint file is rewritten only when that text changes, so
a touched-but-unchanged data file leaves it alone and nothing reruns, whatever the file's size.
The prepare rule's input is the fingerprint file, never the data file itself.

Batches
-------
The specifications of one dataset are spread over a fixed number of buckets by their id
(a 12-hex content hash): bucket = int(id, 16) mod B. B is a power of two, enough for batches of
at most ``study.batch_size`` specifications (:func:`bucket_count`), so it only changes when
the grid's size crosses a power of two times the batch size. A batch is therefore stable: editing one
variant changes only the ids it touches, and only the batches those old and new ids fall in
rerun. Each fit rule carries its members (id and labels) and the fitting code's hash in its
params, so Snakemake reruns a batch exactly when its membership, a label or the code changes.
Within a batch, a result is reused from the batch's previous run when the spec id, the data
fingerprint and the fitting code's hash are all unchanged; only the rest is refitted.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import math
import os
import sys
import time
import traceback
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path

from .errors import Problem, RunError, SpecError, SpecflowError
from .grid import Specification, expand
from .spec import LoadedSpec, load_spec

AUTO_BATCH_SIZE = 250  # chosen with benchmarks/bench_grid.py (2 cores, 1,000 x 50,000)
AUTO_SPLIT_FROM = 100  # with the automatic size, grids this large get at least two batches
MAX_BUCKETS = 256
STORE_SCHEMA = 1
PROGRESS_EVERY = 0.5  # seconds between progress-file updates of a fit job

PACKAGE_DIR = Path(__file__).resolve().parent

# Which source files each step's results depend on (beyond specflow's version).
CODE_FILES = {
    "prepare": ("data.py", "expr.py"),
    "fit": ("fit.py", "kernels.py", "fe.py", "diagnostics.py", "diag_core.py", "diag_strength.py",
            "results.py", "expr.py"),
    "collate": ("collate.py", "tables.py", "figures.py", "report.py", "results.py", "templates"),
}


# ---------------------------------------------------------------------------------------------
# code versions


@lru_cache(maxsize=None)
def code_version(step: str) -> str:
    """specflow's version plus a short hash of the source files a step's results depend on
    (a folder stands for every file in it)."""
    from . import __version__

    files: list[Path] = []
    for name in CODE_FILES[step]:
        p = PACKAGE_DIR / name
        files += sorted(q for q in p.rglob("*") if q.is_file()) if p.is_dir() else [p]
    h = hashlib.sha256(__version__.encode())
    for p in files:
        h.update(str(p.relative_to(PACKAGE_DIR)).encode() + b"\0")
        h.update(p.read_bytes() if p.exists() else b"<missing>")
        h.update(b"\0")
    return f"{__version__}+{h.hexdigest()[:12]}"


def workflow_code_hash() -> str:
    """A hash of the Snakefile and its rule files (Snakemake reruns a rule whose code changed)."""
    h = hashlib.sha256()
    root = snakefile().parent
    for p in [snakefile(), *sorted((root / "rules").glob("*.smk"))]:
        h.update(p.name.encode() + b"\0" + p.read_bytes() + b"\0")
    return h.hexdigest()[:16]


def snakefile() -> Path:
    """The Snakefile: inside an installed package (specflow/workflows/), else the checkout's."""
    installed = PACKAGE_DIR / "workflows" / "Snakefile"
    return installed if installed.is_file() else PACKAGE_DIR.parent / "workflows" / "Snakefile"


# ---------------------------------------------------------------------------------------------
# the plan: datasets and batches


def bucket_count(n: int, batch_size: int = 0) -> int:
    """How many buckets a dataset's n specifications get: the power of two that makes batches
    of at most ``batch_size`` (0: automatic, :data:`AUTO_BATCH_SIZE`, and at least two batches
    from :data:`AUTO_SPLIT_FROM` specifications so that two cores have work)."""
    size = batch_size or AUTO_BATCH_SIZE
    need = max(1, math.ceil(n / max(1, size)))
    if not batch_size and n >= AUTO_SPLIT_FROM:
        need = max(need, 2)
    return min(MAX_BUCKETS, 1 << (need - 1).bit_length())


def bucket_of(spec_id: str, buckets: int) -> int:
    return int(spec_id, 16) % buckets


def _check_name(loaded: LoadedSpec, name: str) -> None:
    ok = name and all(c.isalnum() or c in "_-." for c in name) and not name.startswith(".")
    if not ok:
        raise SpecError([loaded.problem(("data", name), f"dataset name '{name}' cannot be used as a "
                                        "file name (letters, digits, '_', '-' and '.' only)")])


@dataclass
class Plan:
    """The workflow's shape for one spec: its datasets and batches, in a fixed order."""

    loaded: LoadedSpec
    specs: list[Specification]
    buckets: dict[str, int]  # dataset -> B
    batches: dict[str, list[Specification]]  # batch name -> members, in grid order
    _by_batch: dict[str, str] = field(default_factory=dict)

    @property
    def out_dir(self) -> Path:
        return self.loaded.output_dir

    @property
    def spec_path(self) -> Path:
        return self.loaded.path

    @property
    def datasets(self) -> list[str]:
        return list(self.buckets)

    def dataset_of(self, batch: str) -> str:
        return self._by_batch[batch]

    def members(self, batch: str) -> list[str]:
        """The batch's members as Snakemake params: id and labels (a rename rewrites the batch)."""
        return [f"{sp.id} {sp.label_text()}" for sp in self.batches[batch]]

    def members_digest(self, batch: str) -> str:
        return hashlib.sha256("\n".join(self.members(batch)).encode()).hexdigest()[:16]

    def study_digest(self) -> str:
        """A hash of the parsed spec (not its text: comments and key order do not count)."""
        canon = json.dumps(self.loaded.spec.model_dump(mode="json"), sort_keys=True)
        return hashlib.sha256(canon.encode()).hexdigest()[:16]

    def pattern(self, names) -> str:
        """A wildcard constraint matching exactly these names."""
        import re

        return "|".join(re.escape(n) for n in names) or "(?!)"

    def batch_files(self) -> list[str]:
        return [f"fits/{b}.json" for b in self.batches]


def make_plan(loaded: LoadedSpec, specs: list[Specification] | None = None) -> Plan:
    """Expand the grid and cut it into batches (see the module docstring)."""
    specs = expand(loaded) if specs is None else specs
    size = loaded.spec.study.batch_size
    by_ds: dict[str, list[Specification]] = {}
    for sp in specs:
        by_ds.setdefault(sp.dataset, []).append(sp)
    buckets: dict[str, int] = {}
    batches: dict[str, list[Specification]] = {}
    by_batch: dict[str, str] = {}
    for ds in sorted(by_ds):
        _check_name(loaded, ds)
        b = bucket_count(len(by_ds[ds]), size)
        buckets[ds] = b
        groups: dict[int, list[Specification]] = {}
        for sp in by_ds[ds]:
            groups.setdefault(bucket_of(sp.id, b), []).append(sp)
        for i in sorted(groups):
            name = f"{ds}-{i:03d}"
            batches[name] = groups[i]
            by_batch[name] = ds
    return Plan(loaded, specs, buckets, batches, by_batch)


# ---------------------------------------------------------------------------------------------
# fingerprints


@dataclass(frozen=True)
class DataPrint:
    dataset: str
    path: str  # the data file, resolved
    file_sha256: str
    data_fingerprint: str  # specflow.data.fingerprint: bytes, format, derivations, filter
    fingerprint: str  # the above plus the prepare code's hash: the fingerprint file's content


def fingerprint_path(out_dir: Path, dataset: str) -> Path:
    return out_dir / "data" / f"{dataset}.fingerprint"


def full_fingerprint(loaded: LoadedSpec, name: str, file_sha256: str) -> tuple[str, str]:
    """(data fingerprint, fingerprint-file content) of a dataset whose file has this SHA-256."""
    from .data import fingerprint

    data_fp = fingerprint(loaded, name, file_sha256)
    return data_fp, hashlib.sha256(f"{data_fp}\n{code_version('prepare')}".encode()).hexdigest()


def compute_fingerprints(plan: Plan, only: list[str] | None = None) -> dict[str, DataPrint]:
    """Hash every dataset the grid uses (reads each data file once; no pandas needed)."""
    from .data import resolve_path, sha256_file

    loaded = plan.loaded
    out: dict[str, DataPrint] = {}
    problems: list[Problem] = []
    for name in only or plan.datasets:
        ds = loaded.spec.data[name]
        path = resolve_path(loaded, name)
        if not path.is_file():
            problems.append(loaded.problem(("data", name, "path"), f"data file '{ds.path}' not found"))
            continue
        digest = sha256_file(path)
        if ds.sha256 and digest.lower() != ds.sha256.lower():
            problems.append(loaded.problem(("data", name, "sha256"),
                            f"checksum mismatch for '{ds.path}': the file's SHA-256 is {digest}"))
            continue
        data_fp, full = full_fingerprint(loaded, name, digest)
        out[name] = DataPrint(name, str(path), digest, data_fp, full)
    if problems:
        raise SpecError(problems)
    return out


def refresh_fingerprints(plan: Plan) -> dict[str, DataPrint]:
    """Compute the fingerprints and rewrite each file only when its content changes."""
    from .data import write_atomic_text

    prints = compute_fingerprints(plan)
    for name, fp in prints.items():
        target = fingerprint_path(plan.out_dir, name)
        text = fp.fingerprint + "\n"
        try:
            if target.read_text(encoding="utf-8") == text:
                continue
        except (FileNotFoundError, UnicodeDecodeError):
            pass
        write_atomic_text(target, text)
    return prints


def read_fingerprint(path: Path) -> str:
    try:
        return Path(path).read_text(encoding="utf-8").strip()
    except FileNotFoundError:
        raise RunError(f"{path}: fingerprint file missing (run 'specflow run' again)") from None


def _changed(plan: Plan, name: str, expected: str, consequence: str) -> Problem | None:
    """A problem if dataset ``name``'s file no longer gives the fingerprint ``expected``."""
    from .data import resolve_path, sha256_file

    try:
        now = full_fingerprint(plan.loaded, name, sha256_file(resolve_path(plan.loaded, name)))[1]
    except (OSError, SpecflowError):
        now = None  # gone or unreadable: changed as well
    if now == expected:
        return None
    path = plan.loaded.spec.data[name].path
    return plan.loaded.problem(("data", name, "path"), f"data file '{path}' (dataset '{name}') "
                               f"changed while the run was going; {consequence}: run again")


def check_data_unchanged(plan: Plan, expected: dict[str, str] | None = None,
                         consequence: str = "nothing was collated") -> None:
    """Refuse to go on with results of data that is no longer on disk.

    Every dataset's file must still give the fingerprint the run began with (``expected``:
    dataset -> fingerprint-file content; default: the fingerprint files, written before the
    workflow started), and every batch must have been fitted under that fingerprint (the
    ``data`` key its reuse store was written with). Raises SpecError, one line a dataset.
    """
    problems: list[Problem] = []
    for name in plan.datasets:
        want = (expected[name] if expected is not None
                else read_fingerprint(fingerprint_path(plan.out_dir, name)))
        p = _changed(plan, name, want, consequence)
        if p is None and expected is None:
            stale = [b for b in plan.batches if plan.dataset_of(b) == name
                     and _store_data(plan.out_dir / "fits" / ".reuse" / f"{b}.json") not in (None, want)]
            if stale:
                p = plan.loaded.problem(("data", name, "path"), f"batch {stale[0]} was fitted on "
                                        f"other data than dataset '{name}' holds now; {consequence}: "
                                        "run again")
        if p is not None:
            problems.append(p)
    if problems:
        raise SpecError(problems)


def _store_data(path: Path) -> str | None:
    """The data fingerprint a batch's reuse store was written under (None: no readable store).

    fit_batch writes the store's keys in a fixed order with ``data`` among the first, so the
    head of the file is enough (a store of a large batch is megabytes)."""
    import re

    try:
        with open(path, "rb") as f:
            head = f.read(4096).decode("utf-8", "replace")
    except OSError:
        return None
    m = re.search(r'"data":"([0-9a-f]+)"', head)
    return m.group(1) if m else None


# ---------------------------------------------------------------------------------------------
# job helpers: crash notes and progress files


def crash_note_path(out_dir: Path, job: str) -> Path:
    return out_dir / "logs" / "crash" / f"{job}.json"


def progress_path(out_dir: Path, batch: str) -> Path:
    return out_dir / "logs" / "progress" / f"{batch}.json"


def _write_json(path: Path, obj) -> None:
    from .data import write_atomic_text

    write_atomic_text(path, json.dumps(obj, indent=1, sort_keys=True) + "\n")


def _crash(out_dir: Path, job: str, log: str, exc: BaseException, spec: Specification | None,
           kind: str) -> None:
    note = {
        "job": job, "kind": kind, "log": log,
        "spec_id": spec.id if spec else None, "labels": spec.label_text() if spec else None,
        "error": f"{type(exc).__name__}: {exc}" if kind == "bug" else str(exc),
        "lines": exc.lines() if isinstance(exc, SpecflowError) else [],
        "traceback": "".join(traceback.format_exception(exc)) if kind == "bug" else "",
    }
    _write_json(crash_note_path(out_dir, job), note)


# ---------------------------------------------------------------------------------------------
# the steps


def _plan_for(spec_path: str | Path) -> Plan:
    return make_plan(load_spec(spec_path))


def plan_from_config(config: dict) -> Plan:
    """The Snakefile's plan: ``--config spec=PATH`` names the study's spec file."""
    if not config.get("spec"):
        raise RunError("say which study to run: --config spec=path/to/study.toml")
    return _plan_for(Path(str(config["spec"])).resolve())


def prepare_dataset(spec_path: str | Path, dataset: str, fingerprint_file: Path, out: Path) -> None:
    """Read, derive, filter and type-check one dataset and write it as Parquet."""
    from .data import prepare, write_parquet_atomic

    plan = _plan_for(spec_path)
    expected = read_fingerprint(fingerprint_file)
    df, digest = prepare(plan.loaded, dataset)  # the SHA-256 of the bytes it read
    if full_fingerprint(plan.loaded, dataset, digest)[1] != expected:
        path = plan.loaded.spec.data[dataset].path
        raise SpecError([plan.loaded.problem(("data", dataset, "path"), f"data file '{path}' "
                         f"(dataset '{dataset}') changed while the run was going; it was not "
                         "prepared: run again")])
    write_parquet_atomic(df, Path(out))


def _load_reuse(store_dir: Path, batch: str, dataset: str, buckets: int, data_fp: str,
                code: str) -> dict[str, dict]:
    """Results fitted under the same data fingerprint and code, by spec id (plain dicts).

    The batch's own store file is enough while the bucket count is unchanged; after it changed
    every store file of the dataset is searched.
    """
    own = store_dir / f"{batch}.json"
    candidates = [own]
    try:
        head = json.loads(own.read_text(encoding="utf-8"))
        if head.get("buckets") != buckets:
            raise ValueError
    except (OSError, ValueError):
        candidates = sorted(store_dir.glob(f"{dataset}-*.json"))
    pool: dict[str, dict] = {}
    for p in candidates:
        try:
            store = json.loads(p.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            continue
        if (store.get("schema") != STORE_SCHEMA or store.get("data") != data_fp
                or store.get("fit_code") != code):
            continue
        for r in store.get("results", []):
            pool.setdefault(r.get("spec_id"), r)
    return pool


class _Progress:
    """Writes a fit job's running counts for ``specflow run``'s display, at most twice a second."""

    def __init__(self, path: Path, batch: str, total: int):
        self.path, self.last = path, 0.0
        self.state = {"batch": batch, "total": total, "fitted": 0, "reused": 0, "failed": 0,
                      "finished": False}

    def add(self, key: str, n: int = 1, failed: int = 0, force: bool = False) -> None:
        self.state[key] += n
        self.state["failed"] += failed
        now = time.monotonic()
        if force or now - self.last >= PROGRESS_EVERY:
            self.last = now
            _write_json(self.path, self.state)

    def finish(self) -> None:
        self.state["finished"] = True
        _write_json(self.path, self.state)


def fit_batch(spec_path: str | Path, batch: str, digest: str, data_file: Path,
              fingerprint_file: Path, out: Path, reuse: bool = True, log: str = "") -> None:
    """Fit one batch: reuse unchanged results, fit the rest, write the Batch file.

    A specification that fails numerically becomes a failed FitResult (the batch goes on); any
    other exception is a crash: it is recorded in ``logs/crash/<batch>.json`` with the
    specification's id and re-raised.
    """
    import pandas as pd

    from .data import read_parquet_lean, validate_against_data
    from .fit import SampleCache, fit
    from .results import Batch, FitResult

    plan = _plan_for(spec_path)
    out_dir = plan.out_dir
    if batch not in plan.batches or plan.members_digest(batch) != digest:
        raise RunError(f"the spec file changed while the workflow ran (batch {batch}); run it again")
    members = plan.batches[batch]
    dataset = plan.dataset_of(batch)
    data_fp = read_fingerprint(fingerprint_file)
    code = code_version("fit")
    store_dir = out_dir / "fits" / ".reuse"
    pool = _load_reuse(store_dir, batch, dataset, plan.buckets[dataset], data_fp, code) if reuse else {}

    progress = _Progress(progress_path(out_dir, batch), batch, len(members))
    results: dict[str, FitResult] = {}
    for sp in members:
        if sp.id in pool:
            try:
                r = FitResult.model_validate(pool[sp.id])
            except ValueError:  # pydantic's ValidationError: an unreadable old record, refit
                continue
            r.labels, r.extra_name = dict(sp.labels), sp.extra_name
            results[sp.id] = r
            progress.add("reused", failed=int(r.status == "failed"))
    todo = [sp for sp in members if sp.id not in results]
    progress.add("fitted", 0, force=True)
    if todo:
        df = read_parquet_lean(data_file)
        problems = validate_against_data(plan.loaded, todo, {dataset: df})
        if problems:
            raise SpecError(problems)
        cache = SampleCache(df)
        cache.plan(todo)  # one design per sample for the whole batch
        current = None
        try:
            for sp in todo:
                current = sp
                r = fit(sp, df, cache)
                results[sp.id] = r
                progress.add("fitted", failed=int(r.status == "failed"))
        except Exception as exc:  # noqa: BLE001 - a crash: name the specification, then re-raise
            _crash(out_dir, batch, log, exc, current, "bug")
            err = RunError(f"specification {current.id} ({current.label_text()}) crashed in batch "
                           f"{batch}: {type(exc).__name__}: {exc}; see {log or 'the job log'}")
            err.noted = True
            raise err from exc

    ordered = [results[sp.id] for sp in members]
    text = Batch(batch=batch, results=ordered).model_dump_json(indent=1) + "\n"
    store = {"schema": STORE_SCHEMA, "batch": batch, "buckets": plan.buckets[dataset],
             "data": data_fp, "fit_code": code,
             "results": [r.model_dump(mode="json") for r in ordered]}
    from .data import write_atomic_text

    write_atomic_text(store_dir / f"{batch}.json", json.dumps(store, separators=(",", ":")))
    write_atomic_text(Path(out), text)
    progress.finish()


def read_batches(paths: list[Path]) -> list:
    from .results import Batch

    results = []
    for p in paths:
        results.extend(Batch.model_validate_json(Path(p).read_text(encoding="utf-8")).results)
    return results


def collate(spec_path: str | Path, out_dir: Path) -> list[Path]:
    """Read every batch file of the plan and write the collated outputs (estimates, tables,
    figures, report) through :func:`specflow.collate.build_all`."""
    from .collate import build_all

    plan = _plan_for(spec_path)
    out_dir = Path(out_dir).resolve()
    results = read_batches([out_dir / f for f in plan.batch_files()])
    check_data_unchanged(plan)  # after reading: the results collated are the ones checked
    return build_all(plan.loaded, plan.specs, results, out_dir)


# ---------------------------------------------------------------------------------------------
# command line of the jobs: python -m specflow.workflow STEP ...

JOB_LOCK = Path("logs") / "jobs.lock"
_JOB_LOCK: list[int] = []  # the job's lock descriptor, open until the process ends


def hold_job_lock(out_dir: Path) -> int | None:
    """A shared lock on ``O/logs/jobs.lock`` for as long as this job process lives.

    Killing only ``specflow run`` leaves its job processes running; they still hold this lock,
    so the next run can tell (:func:`jobs_running`) and wait rather than run the same jobs
    beside them. None where the file system has no locks."""
    path = Path(out_dir) / JOB_LOCK
    try:
        import fcntl

        path.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        fcntl.flock(fd, fcntl.LOCK_SH)
        return fd
    except (ImportError, OSError):
        return None


def jobs_running(out_dir: Path) -> bool:
    """True while some job process holds ``O/logs/jobs.lock`` (see :func:`hold_job_lock`)."""
    path = Path(out_dir) / JOB_LOCK
    try:
        import fcntl

        fd = os.open(path, os.O_RDONLY)
    except (ImportError, OSError):
        return False
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        fcntl.flock(fd, fcntl.LOCK_UN)
        return False
    except BlockingIOError:
        return True
    except OSError:
        return False
    finally:
        os.close(fd)


def _job_main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m specflow.workflow",
                                description="The steps of specflow's Snakemake workflow.")
    sub = p.add_subparsers(dest="step", required=True)
    c = sub.add_parser("prepare")
    c.add_argument("--spec", required=True)
    c.add_argument("--dataset", required=True)
    c.add_argument("--fingerprint", required=True)
    c.add_argument("--out", required=True)
    c.add_argument("--log", default="")
    c = sub.add_parser("fit")
    c.add_argument("--spec", required=True)
    c.add_argument("--batch", required=True)
    c.add_argument("--members", required=True, help="digest of the batch's members")
    c.add_argument("--data", required=True)
    c.add_argument("--fingerprint", required=True)
    c.add_argument("--out", required=True)
    c.add_argument("--reuse", choices=["yes", "no"], default="yes")
    c.add_argument("--log", default="")
    c = sub.add_parser("collate")
    c.add_argument("--spec", required=True)
    c.add_argument("--out-dir", required=True)
    c.add_argument("--log", default="")
    a = p.parse_args(argv)
    a.log = str(Path(a.log).resolve()) if a.log else ""

    job = {"prepare": f"prepare-{a.dataset}" if a.step == "prepare" else "",
           "fit": getattr(a, "batch", ""), "collate": "collate"}[a.step]
    try:
        out_dir: Path | None = load_spec(a.spec).output_dir
        crash_note_path(out_dir, job).unlink(missing_ok=True)
        _JOB_LOCK.append(hold_job_lock(out_dir))
    except SpecflowError:
        out_dir = None
    t0 = time.perf_counter()
    try:
        if a.step == "prepare":
            prepare_dataset(a.spec, a.dataset, Path(a.fingerprint), Path(a.out))
        elif a.step == "fit":
            fit_batch(a.spec, a.batch, a.members, Path(a.data), Path(a.fingerprint), Path(a.out),
                      reuse=a.reuse == "yes", log=a.log)
        else:
            for path in collate(a.spec, Path(a.out_dir)):
                print(f"wrote {path}")
    except Exception as exc:  # noqa: BLE001 - leave a note for `specflow run`, then fail
        # a SpecflowError of its own is a problem with the spec or data (exit 2); anything
        # else, or a SpecflowError wrapping a crash, is a bug (exit 3)
        kind = "spec" if isinstance(exc, SpecflowError) and exc.__cause__ is None else "bug"
        if out_dir is not None and not getattr(exc, "noted", False):
            _crash(out_dir, job, a.log, exc, None, kind)
        if kind == "bug":
            traceback.print_exc()
        lines = exc.lines() if isinstance(exc, SpecflowError) else [f"{type(exc).__name__}: {exc}"]
        for line in lines:
            print(f"error: {line}", file=sys.stderr)
        return 2 if kind == "spec" else 3
    print(f"{a.step} {job}: done in {time.perf_counter() - t0:.2f} s")
    return 0


if __name__ == "__main__":
    sys.exit(_job_main())
