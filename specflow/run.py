"""``specflow run``: the whole grid through the Snakemake workflow, with specflow's own view.

Order of a run:

0. Hold the output folder (:func:`hold_output_folder`: an exclusive lock on ``O/logs/run.pid``
   that the operating system releases however the process ends). A second run on the same
   folder is refused (exit 2). After a killed run, its half-written temporary files are
   removed and its Snakemake lock lifted, with a note; a Snakemake lock that no specflow run
   left is refused with the command that lifts it.
1. Load the spec, expand the grid, cut it into batches (:func:`specflow.workflow.make_plan`)
   and refresh the data fingerprints (rewritten only when the data's content changes).
2. **Nothing to do?** If the grid's batches, the fingerprints, the code versions and the
   workflow's own code all equal the last successful run's (``O/run.json``), and every file the
   workflow tracks still has the modification time that run left it with, and no job was left
   incomplete, Snakemake would find nothing to do either: say so and stop, without importing
   Snakemake (well under two seconds). Anything else goes to Snakemake, which decides.
3. Check the spec against the data (one line a problem, exit 2).
4. Ask Snakemake for its plan (a dry run) and then run it through ``snakemake.api``, locally on
   N cores or on a cluster through an executor plugin and a profile. Snakemake's log goes to
   ``O/logs/snakemake.log``; the terminal shows specflow's progress (specifications done,
   failed and left, elapsed time, estimate of time left) unless ``--verbose``.
5. Check that every data file still has the bytes the run began with (else exit 2: the
   outputs would be of data no longer on disk; collate checks the same before it writes).
   Summarise (fitted, reused, failed with reasons, where the outputs are), write
   ``O/run.json`` and keep a snapshot of the estimates (:func:`_record`).

Exit codes: see :data:`EXIT_CODES` (also in ``specflow run --help``).
"""

from __future__ import annotations

import json
import os
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

from .errors import RunError, SpecflowError
from .workflow import (
    JOB_LOCK, Plan, check_data_unchanged, code_version, crash_note_path, jobs_running, make_plan,
    progress_path, refresh_fingerprints, snakefile, workflow_code_hash,
)

EXIT_OK, EXIT_SOME_FAILED, EXIT_USER, EXIT_CRASH = 0, 1, 2, 3
from .cli_run import EXIT_CODES  # noqa: E402 - the text lives with the command


PROFILES_DIR = Path(__file__).resolve().parent / "profiles"
RUN_FILE = "run.json"


# ---------------------------------------------------------------------------------------------
# the state a run leaves behind, for the "nothing to do" decision


def _tracked_files(plan: Plan) -> list[str]:
    """Every file Snakemake's decisions depend on, relative to the output folder."""
    files = []
    for ds in plan.datasets:
        files += [f"data/{ds}.fingerprint", f"data/{ds}.parquet"]
    return files + plan.batch_files() + ["estimates.csv"]


def _mtimes(out_dir: Path, files: list[str]) -> dict[str, int | None]:
    out: dict[str, int | None] = {}
    for f in files:
        try:
            out[f] = (out_dir / f).stat().st_mtime_ns
        except FileNotFoundError:
            out[f] = None
    return out


def _state(plan: Plan, prints: dict) -> dict:
    from importlib.metadata import version

    return {
        "batches": {b: plan.members_digest(b) for b in plan.batches},
        "study": plan.study_digest(),
        "fingerprints": {n: p.fingerprint for n, p in prints.items()},
        "code": {s: code_version(s) for s in ("prepare", "fit", "collate")},
        "workflow": workflow_code_hash(),
        "snakemake": version("snakemake"),
    }


def _incomplete(out_dir: Path) -> bool:
    d = out_dir / ".snakemake" / "incomplete"
    return d.is_dir() and any(d.iterdir())


def _last_run(out_dir: Path) -> dict | None:
    try:
        return json.loads((out_dir / RUN_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def nothing_to_do(plan: Plan, prints: dict) -> dict | None:
    """The last run's record if it left exactly this state behind (see the module docstring)."""
    last = _last_run(plan.out_dir)
    if not last or last.get("state") != _state(plan, prints):
        return None
    files = _tracked_files(plan)
    now = _mtimes(plan.out_dir, files)
    if None in now.values() or last.get("files") != now or _incomplete(plan.out_dir):
        return None
    return last


# ---------------------------------------------------------------------------------------------
# cluster profiles


@dataclass
class Executor:
    name: str = "local"
    jobs: int | None = None
    settings: object = None  # the executor plugin's settings
    default_resources: dict = field(default_factory=dict)
    set_resources: dict = field(default_factory=dict)
    latency_wait: int = 5
    remote: dict = field(default_factory=dict)  # RemoteExecutionSettings fields
    profile: Path | None = None


def load_profile(name_or_path: str) -> Executor:
    """A Snakemake profile (a folder with config.yaml) -> executor settings.

    ``slurm`` names the profile shipped with specflow; anything else is a path to a profile
    folder or its config.yaml. On SLURM, the account and partition come from the environment
    variables ``SPECFLOW_SLURM_ACCOUNT`` and ``SPECFLOW_SLURM_PARTITION`` when set (without an
    account, jobs are submitted with none).
    """
    import yaml

    p = Path(name_or_path)
    if not p.exists() and (PROFILES_DIR / name_or_path).is_dir():
        p = PROFILES_DIR / name_or_path
    cfg_file = p / "config.yaml" if p.is_dir() else p
    if not cfg_file.is_file():
        known = ", ".join(sorted(d.name for d in PROFILES_DIR.iterdir() if d.is_dir()))
        raise RunError(f"cluster profile '{name_or_path}' not found (a folder with config.yaml, "
                       f"or one of: {known})")
    try:
        cfg = yaml.safe_load(cfg_file.read_text(encoding="utf-8")) or {}
    except yaml.YAMLError as exc:
        raise RunError(f"{cfg_file}: not valid YAML: {str(exc).splitlines()[0]}") from None
    if not isinstance(cfg, dict) or "executor" not in cfg:
        raise RunError(f"{cfg_file}: a cluster profile needs an 'executor' key")
    ex = Executor(name=str(cfg.pop("executor")), profile=cfg_file)
    from snakemake_interface_executor_plugins.registry import ExecutorPluginRegistry

    try:
        plugin = ExecutorPluginRegistry().get_plugin(ex.name)
    except Exception:  # noqa: BLE001 - the registry raises its own error types
        raise RunError(f"{cfg_file}: executor '{ex.name}' is not installed "
                       f"(pip install snakemake-executor-plugin-{ex.name})") from None
    plugin_kw: dict = {}
    prefix = ex.name + "-"

    def resources(v, key):
        if isinstance(v, list):
            v = dict(item.split("=", 1) for item in v)
        if not isinstance(v, dict):
            raise RunError(f"{cfg_file}: '{key}' must be a mapping of resource = value")
        return {str(k): _scalar(x) for k, x in v.items()}

    for key, value in cfg.items():
        if key == "jobs":
            ex.jobs = int(value)
        elif key == "default-resources":
            ex.default_resources = resources(value, key)
        elif key == "set-resources":
            ex.set_resources = {rule: resources(v, f"{key}.{rule}") for rule, v in value.items()}
        elif key == "latency-wait":
            ex.latency_wait = int(value)
        elif key in ("seconds-between-status-checks", "max-status-checks-per-second"):
            ex.remote[key.replace("-", "_")] = value
        elif key.startswith(prefix):
            plugin_kw[key[len(prefix):].replace("-", "_")] = value
        else:
            raise RunError(f"{cfg_file}: key '{key}' is not supported by specflow's profile reader")
    if ex.name == "slurm":
        account = os.environ.get("SPECFLOW_SLURM_ACCOUNT")
        partition = os.environ.get("SPECFLOW_SLURM_PARTITION")
        if account:
            ex.default_resources["slurm_account"] = account
            plugin_kw["no_account"] = False
        if partition:
            ex.default_resources["slurm_partition"] = partition
    cls = plugin.settings_cls
    if cls is not None:
        import dataclasses

        names = {f.name for f in dataclasses.fields(cls)}
        bad = sorted(set(plugin_kw) - names)
        if bad:
            raise RunError(f"{cfg_file}: executor '{ex.name}' has no setting '{bad[0]}'")
        ex.settings = cls(**plugin_kw)
    return ex


def _scalar(x):
    if isinstance(x, str):
        try:
            return int(x)
        except ValueError:
            return x.strip("'\"")
    return x


# ---------------------------------------------------------------------------------------------
# driving Snakemake


@dataclass
class Outcome:
    ok: bool
    jobs: list[dict] = field(default_factory=list)  # planned/started jobs: rule, wildcards, reason
    errors: list[dict] = field(default_factory=list)  # failed jobs: rule, log
    message: str = ""


def _handler_class():
    import logging

    from snakemake_interface_logger_plugins.common import LogEvent

    class Catcher(logging.Handler):
        """Collects Snakemake's job events (what would run, what failed)."""

        def __init__(self, outcome: Outcome):
            super().__init__(logging.DEBUG)
            self.outcome = outcome

        def emit(self, record):
            event = getattr(record, "event", None)
            if event == LogEvent.JOB_INFO:
                self.outcome.jobs.append({
                    "rule": record.rule_name, "wildcards": dict(record.wildcards or {}),
                    "reason": str(getattr(record, "reason", "")), "jobid": record.jobid})
            elif event == LogEvent.JOB_ERROR:
                self.outcome.errors.append({"rule": record.rule_name,
                                            "log": list(getattr(record, "log", []) or [])})

    return Catcher


BLAS_THREAD_VARS = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def snakemake(plan: Plan, *, dry_run: bool, cores: int | None, executor: Executor,
              force: bool = False, verbose: bool = False, log_file: Path | None = None) -> Outcome:
    """Run (or dry-run) the workflow for a plan through ``snakemake.api``; never raises for a
    failed job (see ``Outcome.ok``), raises RunError when the workflow cannot start."""
    import logging

    from snakemake.api import SnakemakeApi
    from snakemake.exceptions import LockException
    from snakemake.logging import DefaultFilter, DefaultFormatter
    from snakemake.settings.types import (
        ConfigSettings, DAGSettings, ExecutionSettings, OutputSettings, RemoteExecutionSettings,
        ResourceSettings,
    )
    from snakemake_interface_common.exceptions import WorkflowError

    outcome = Outcome(ok=False)
    if not dry_run:
        # Snakemake already runs one job per core: one BLAS thread per job avoids
        # oversubscription (measured: 2.5x faster fits on 2 cores); a user's setting wins.
        for var in BLAS_THREAD_VARS:
            os.environ.setdefault(var, "1")
    out_settings = OutputSettings(dryrun=dry_run, nocolor=True, enable_file_logging=False,
                                  verbose=False, show_failed_logs=False)
    config = {"spec": str(plan.spec_path), "fingerprints": "fresh", "reuse": "no" if force else "yes"}
    local = executor.name == "local"
    resource_kw: dict = {"cores": cores or os.cpu_count() or 1} if local else {
        "nodes": executor.jobs or 10, "cores": cores}
    if executor.default_resources:
        resource_kw["default_resources"] = dict(executor.default_resources)
    if executor.set_resources:
        resource_kw["overwrite_resources"] = executor.set_resources
    file_handler = None
    with SnakemakeApi(out_settings) as api:
        lg = api.logger_manager.logger
        for h in list(lg.handlers):
            if h.name == "DefaultStreamHandler" and not verbose:
                lg.removeHandler(h)
        lg.addHandler(_handler_class()(outcome))
        if log_file is not None:
            log_file.parent.mkdir(parents=True, exist_ok=True)
            file_handler = logging.FileHandler(log_file, mode="a", encoding="utf-8")
            file_handler.setFormatter(DefaultFormatter(None, True))
            file_handler.addFilter(DefaultFilter(None, False, verbose, dry_run, True))
            lg.addHandler(file_handler)
        try:
            wf = api.workflow(
                resource_settings=ResourceSettings(**resource_kw),
                config_settings=ConfigSettings(config=config),
                snakefile=snakefile(),
                workdir=plan.out_dir,
            )
            dag = wf.dag(DAGSettings(forceall=force, force_incomplete=True))
            dag.execute_workflow(
                executor="local" if local else executor.name,
                pseudo_executor="dryrun" if dry_run else None,
                execution_settings=ExecutionSettings(keep_going=True,
                                                     latency_wait=executor.latency_wait),
                remote_execution_settings=RemoteExecutionSettings(**executor.remote),
                executor_settings=executor.settings,
            )
            outcome.ok = True
        except LockException:
            raise _locked_error(plan) from None
        except WorkflowError as exc:
            outcome.message = str(exc).strip().splitlines()[-1] if str(exc).strip() else type(exc).__name__
        except Exception as exc:  # noqa: BLE001 - Snakemake raises many types; report, don't trace
            if isinstance(exc, SpecflowError):
                raise
            outcome.message = f"{type(exc).__name__}: {exc}"
        finally:
            if file_handler is not None:
                file_handler.close()
                lg.removeHandler(file_handler)
    return outcome


def plan_jobs(spec_path: str | Path, force: bool = False) -> list[dict]:
    """Snakemake's own plan for a spec (a dry run; never the fast path): the jobs that would run."""
    from .spec import load_spec

    plan = make_plan(load_spec(spec_path))
    refresh_fingerprints(plan)
    out = snakemake(plan, dry_run=True, cores=1, executor=Executor(), force=force)
    if not out.ok:
        raise RunError(f"Snakemake could not plan the run: {out.message}")
    return [j for j in out.jobs if j["rule"] != "all"]


# ---------------------------------------------------------------------------------------------
# progress display


def _clock(seconds: float) -> str:
    s = int(round(seconds))
    return f"{s // 3600}:{s // 60 % 60:02d}:{s % 60:02d}" if s >= 3600 else f"{s // 60}:{s % 60:02d}"


class Progress:
    """Specifications done / failed / total, elapsed and time left, from the fit jobs' files."""

    def __init__(self, plan: Plan, batches: list[str], stream, t0: float):
        self.plan, self.batches, self.stream, self.t0 = plan, batches, stream, t0
        self.total = len(plan.specs)
        self.to_check = sum(len(plan.batches[b]) for b in batches)
        self.unchanged = self.total - self.to_check
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._live = None
        self._last_line: tuple | None = None
        self._last_print = 0.0
        self.tty = hasattr(stream, "isatty") and stream.isatty()

    def counts(self) -> tuple[int, int]:
        done = failed = 0
        for b in self.batches:
            try:
                st = json.loads(progress_path(self.plan.out_dir, b).read_text(encoding="utf-8"))
            except (OSError, ValueError):
                continue
            done += st.get("fitted", 0) + st.get("reused", 0)
            failed += st.get("failed", 0)
        return done, failed

    def line(self) -> str:
        done, failed = self.counts()
        elapsed = time.monotonic() - self.t0
        left = "estimating time left"
        if max(2, self.to_check // 20) <= done < self.to_check:
            left = f"about {_clock(elapsed / done * (self.to_check - done))} left"
        elif done >= self.to_check:
            left = "collating"
        unchanged = f" ({self.unchanged} in unchanged batches)" if self.unchanged else ""
        return (f"[{_clock(elapsed)}] {self.unchanged + done}/{self.total} specifications done"
                f"{unchanged}, {failed} failed; {left}")

    def _loop(self) -> None:
        while not self._stop.wait(0.5):
            self.draw()

    def draw(self, final: bool = False) -> None:
        """Live: redraw the line. Plain lines: print when the counts moved (at most every two
        seconds), and at least every thirty seconds."""
        text, counts = self.line(), self.counts()
        if self._live is not None:
            self._live.update(self._task, completed=self.unchanged + counts[0], description=text)
            return
        now = time.monotonic()
        moved = counts != self._last_line and now - self._last_print >= 2.0
        if final or moved or now - self._last_print >= 30.0:
            print(text, file=self.stream, flush=True)
            self._last_line, self._last_print = counts, now

    def __enter__(self):
        if self.tty:
            from rich.console import Console
            from rich.progress import BarColumn, Progress as Bar, TextColumn

            self._live = Bar(BarColumn(bar_width=24), TextColumn("{task.description}"),
                             console=Console(file=self.stream), refresh_per_second=4,
                             transient=True)
            self._task = self._live.add_task(self.line(), total=max(1, self.total),
                                             completed=self.unchanged)
            self._live.__enter__()
        else:
            self.draw(final=True)
        self._thread = threading.Thread(target=self._loop, daemon=True)
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        if self._thread:
            self._thread.join()
        if self._live is not None:
            self._live.__exit__(None, None, None)
            self._live = None
        self.draw(final=True) if not self.tty else None
        return False


# ---------------------------------------------------------------------------------------------
# the run


def _job_counts(jobs: list[dict]) -> dict[str, int]:
    counts: dict[str, int] = {}
    for j in jobs:
        counts[j["rule"]] = counts.get(j["rule"], 0) + 1
    return counts


LOCK_FILE = Path("logs") / "run.pid"


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _read_pid(fd: int) -> int | None:
    try:
        return int(os.pread(fd, 32, 0).decode("ascii", "replace").strip())
    except (OSError, ValueError):
        return None


def hold_output_folder(out_dir: Path) -> tuple[int, int | None]:
    """Hold the output folder for this run: an exclusive lock on ``O/logs/run.pid``, which
    holds this run's pid while it lasts and is emptied when it ends.

    The operating system releases the lock when the process ends, killed or not, so a stale
    lock cannot block a later run; a pid still in the file then says that run was killed.
    Returns the file descriptor (for :func:`release_output_folder`) and that dead run's pid
    (None after a clean end). Raises RunError when another run holds the folder.
    """
    path = out_dir / LOCK_FILE
    path.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        import fcntl

        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        holder = _read_pid(fd)
        os.close(fd)
        who = f" (pid {holder})" if holder else ""
        raise RunError(f"another specflow run{who} is using {out_dir}; wait until it ends, "
                       "then run again") from None
    except (ImportError, OSError):
        # no file locks here (some network file systems): fall back on the recorded pid
        holder = _read_pid(fd)
        if holder and holder != os.getpid() and _pid_alive(holder):
            os.close(fd)
            raise RunError(f"another specflow run (pid {holder}) is using {out_dir}; wait "
                           "until it ends, then run again") from None
    previous = _read_pid(fd)
    os.ftruncate(fd, 0)
    os.pwrite(fd, f"{os.getpid()}\n".encode("ascii"), 0)
    return fd, previous if previous != os.getpid() else None


def release_output_folder(fd: int, keep_pid: bool = False) -> None:
    """Let the lock go; after a clean end (not ``keep_pid``) empty the pid file first."""
    try:
        if not keep_pid:
            os.ftruncate(fd, 0)
    finally:
        os.close(fd)


def _locked_error(plan: Plan) -> RunError:
    """Snakemake's lock on the folder without a specflow run behind it: say how to lift it."""
    import shlex

    exe = Path(sys.executable).parent / "snakemake"
    cmd = [str(exe) if exe.is_file() else "snakemake", "-s", str(snakefile()), "--config",
           f"spec={plan.spec_path}", "--unlock"]
    return RunError(f"{plan.out_dir} is locked by a Snakemake run that specflow did not start; "
                    f"if it is no longer running, unlock it with: {shlex.join(cmd)}")


def _snakemake_locked(out_dir: Path) -> bool:
    locks = out_dir / ".snakemake" / "locks"
    return locks.is_dir() and any(locks.iterdir())


def _sweep_temporaries(out_dir: Path) -> list[Path]:
    """Remove what a killed run left half-written: ``.<name>.tmp-<pid>`` files (atomic
    writes, see :func:`specflow.files.write_atomic_bytes`) and the snapshot folders
    ``runs/.tmp-<pid>-*`` and ``runs/.trash-*``, when the process named is gone."""
    import re
    import shutil

    pattern = re.compile(r"^\..+\.tmp-(\d+)$|^\.tmp-(\d+)-[0-9a-f]+$|^\.trash-\d+-[0-9a-f]+$")
    removed: list[Path] = []
    for root, dirs, files in os.walk(out_dir):
        if Path(root) == out_dir and ".snakemake" in dirs:
            dirs.remove(".snakemake")  # Snakemake's own metadata: not ours to touch
        for name in [*files, *dirs]:
            m = pattern.match(name)
            if not m:
                continue
            pid = m.group(1) or m.group(2)
            if pid and (int(pid) == os.getpid() or _pid_alive(int(pid))):
                continue
            p = Path(root) / name
            if p.is_dir() and not p.is_symlink():
                shutil.rmtree(p, ignore_errors=True)
                if name in dirs:
                    dirs.remove(name)
            else:
                p.unlink(missing_ok=True)
            removed.append(p)
    return removed


def _unlock(plan: Plan) -> None:
    from snakemake.api import SnakemakeApi
    from snakemake.settings.types import ConfigSettings, DAGSettings, OutputSettings, ResourceSettings

    with SnakemakeApi(OutputSettings(enable_file_logging=False, quiet=None)) as api:
        lg = api.logger_manager.logger
        for h in list(lg.handlers):
            lg.removeHandler(h)
        wf = api.workflow(resource_settings=ResourceSettings(cores=1),
                          config_settings=ConfigSettings(config={"spec": str(plan.spec_path),
                                                                 "fingerprints": "fresh"}),
                          snakefile=snakefile(), workdir=plan.out_dir)
        wf.dag(DAGSettings()).unlock()


def _summarise(plan: Plan, batches_run: list[str]) -> dict:
    from .workflow import read_batches

    fitted = reused_in_run = 0
    for b in batches_run:
        try:
            st = json.loads(progress_path(plan.out_dir, b).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            continue
        fitted += st.get("fitted", 0)
        reused_in_run += st.get("reused", 0)
    results = read_batches([plan.out_dir / f for f in plan.batch_files()])
    by_id = {sp.id: sp for sp in plan.specs}
    failures = [{"spec_id": r.spec_id, "labels": by_id[r.spec_id].label_text() if r.spec_id in by_id
                 else "", "reason": r.reason or "no reason recorded"}
                for r in results if r.status != "ok"]
    return {"specifications": len(plan.specs), "fitted": fitted,
            "reused": len(plan.specs) - fitted, "failed": len(failures), "failures": failures}


def _remove_stale_batches(plan: Plan) -> None:
    import re

    keep = {Path(f).name for f in plan.batch_files()}
    pat = re.compile(r"^(.+)-\d{3}\.json$")
    for p in (plan.out_dir / "fits").glob("*.json"):
        m = pat.match(p.name)
        if m and p.name not in keep and m.group(1) in plan.loaded.spec.data:
            p.unlink(missing_ok=True)


def _crash_report(plan: Plan, outcome: Outcome, log_file: Path) -> tuple[list[str], int]:
    """Lines explaining why the workflow failed, and the exit code."""
    lines: list[str] = []
    notes_dir = plan.out_dir / "logs" / "crash"
    notes = []
    for p in sorted(notes_dir.glob("*.json")) if notes_dir.is_dir() else []:
        try:
            notes.append(json.loads(p.read_text(encoding="utf-8")))
        except (OSError, ValueError):
            continue
    for n in notes:
        if n.get("kind") == "spec":
            lines += n.get("lines") or [n.get("error", "")]
        else:
            who = (f"specification {n['spec_id']} ({n['labels']})" if n.get("spec_id")
                   else f"job {n.get('job')}")
            lines.append(f"{who} crashed: {n.get('error')}; log: {n.get('log') or log_file}")
    code = EXIT_USER if notes and all(n.get("kind") == "spec" for n in notes) else EXIT_CRASH
    noted = {n.get("job") for n in notes}
    for e in outcome.errors:
        logs = [str((plan.out_dir / f).resolve()) for f in e["log"]]
        job = Path(e["log"][0]).stem if e["log"] else e["rule"]
        name = f"prepare-{job}" if e["rule"] == "prepare" else job
        if name in noted:
            continue
        lines.append(f"job {e['rule']} {job} failed without a report (killed?); log: "
                     f"{', '.join(logs) or log_file}")
        code = EXIT_CRASH
    if not lines:
        lines.append(f"the workflow failed: {outcome.message or 'see the log'}; log: {log_file}")
    return lines, code


def run(spec: str | Path, *, cores: int | None = None, cluster: str | None = None,
        dry_run: bool = False, force: bool = False, verbose: bool = False, stream=None) -> int:
    """``specflow run``; returns the exit code (see :data:`EXIT_CODES`)."""
    from .spec import load_spec

    stream = stream or sys.stdout
    t0 = time.monotonic()
    loaded = load_spec(spec)
    plan = make_plan(loaded)
    # held until this process ends; the fingerprints are not rewritten under a running run
    fd, killed = hold_output_folder(plan.out_dir)
    clean = False
    try:
        code = _run(loaded, plan, killed, t0, cores=cores, cluster=cluster, dry_run=dry_run,
                    force=force, verbose=verbose, stream=stream)
        clean = True
        return code
    except SpecflowError:
        clean = True
        raise
    finally:  # interrupted (Ctrl-C) or crashed: the pid stays, the next run treats it as killed
        release_output_folder(fd, keep_pid=not clean)


def _run(loaded, plan: Plan, killed: int | None, t0: float, *, cores: int | None,
         cluster: str | None, dry_run: bool, force: bool, verbose: bool, stream) -> int:
    from . import __version__

    out_dir = plan.out_dir
    say = lambda text="": print(text, file=stream, flush=True)  # noqa: E731
    swept = _sweep_temporaries(out_dir)
    if killed is not None:
        say(f"note: the last run (pid {killed}) was interrupted; "
            + (f"removed {len(swept)} half-written file(s); " if swept else "")
            + "finished jobs are kept, the rest run again")
    if _snakemake_locked(out_dir):
        if killed is None:
            raise _locked_error(plan)
        _unlock(plan)  # the killed run's; no specflow run can hold it now (we hold the folder)
        say(f"note: removed the Snakemake lock left by the interrupted run (pid {killed})")
    if jobs_running(out_dir):
        raise RunError(f"job processes of an interrupted run are still working in {out_dir} "
                       f"(they hold {out_dir / JOB_LOCK}); wait until they end, then run again")
    prints = refresh_fingerprints(plan)

    if not force:
        last = nothing_to_do(plan, prints)
        if last is not None:
            failed = last.get("failed", 0)
            say(f"nothing to do: {len(plan.specs)} specifications, data and code unchanged since the "
                f"last run ({last.get('finished', '?')}); outputs in {out_dir}")
            if failed:
                say(f"warning: {failed} specification(s) failed in that run; reasons in "
                    f"{out_dir / 'estimates.csv'} and {out_dir / RUN_FILE}")
            return EXIT_SOME_FAILED if failed else EXIT_OK

    executor = load_profile(cluster) if cluster else Executor()
    from .data import load_frames, validate_against_data
    from .errors import SpecError

    frames = load_frames(loaded, plan.datasets)
    problems = validate_against_data(loaded, plan.specs, frames)
    if problems:
        raise SpecError(problems)
    del frames

    log_file = out_dir / "logs" / "snakemake.log"
    pending = snakemake(plan, dry_run=True, cores=cores, executor=Executor(), force=force)
    if not pending.ok:
        raise RunError(f"Snakemake could not plan the run: {pending.message}; log: {log_file}")
    jobs = [j for j in pending.jobs if j["rule"] != "all"]
    batches = [j["wildcards"]["batch"] for j in jobs if j["rule"] == "fit"]
    if dry_run:
        _print_plan(say, plan, jobs, batches, force)
        return EXIT_OK
    if not jobs:
        say(f"nothing to do (Snakemake): {len(plan.specs)} specifications up to date; "
            f"outputs in {out_dir}")
        summary = _summarise(plan, [])
        _record(loaded, plan, prints, summary, t0, executor, jobs, cores)
        return EXIT_SOME_FAILED if summary["failed"] else EXIT_OK

    for sub in ("progress", "crash"):
        d = out_dir / "logs" / sub
        for p in d.glob("*.json") if d.is_dir() else []:
            p.unlink(missing_ok=True)
    log_file.parent.mkdir(parents=True, exist_ok=True)
    with open(log_file, "w", encoding="utf-8") as f:  # the log holds the last run
        f.write(f"\n=== specflow {__version__} run of {plan.spec_path} at "
                f"{time.strftime('%Y-%m-%d %H:%M:%S')} ===\n")
    counts = _job_counts(jobs)
    where = "locally" if executor.name == "local" else f"on {executor.name} ({executor.profile})"
    say(f"specflow: {len(plan.specs)} specifications in {len(plan.batches)} batches; running "
        f"{counts.get('prepare', 0)} prepare, {counts.get('fit', 0)} fit and "
        f"{counts.get('collate', 0)} collate job(s) {where}; log: {log_file}")
    if verbose:
        outcome = snakemake(plan, dry_run=False, cores=cores, executor=executor, force=force,
                            verbose=True, log_file=log_file)
    else:
        with Progress(plan, batches, stream, t0):
            outcome = snakemake(plan, dry_run=False, cores=cores, executor=executor,
                                force=force, log_file=log_file)

    if not outcome.ok:
        lines, code = _crash_report(plan, outcome, log_file)
        for line in lines:
            print(f"error: {line}", file=sys.stderr, flush=True)
        return code

    # the data must still be what the run began with, or the outputs are of data now gone
    check_data_unchanged(plan, {n: p.fingerprint for n, p in prints.items()},
                         consequence="the outputs are of its earlier content and this run is "
                                     "not recorded")
    summary = _summarise(plan, batches)
    _remove_stale_batches(plan)
    revision = _record(loaded, plan, prints, summary, t0, executor, jobs, cores)
    say(f"done in {_clock(time.monotonic() - t0)}: {summary['specifications']} specifications: "
        f"{summary['fitted']} fitted, {summary['reused']} reused, {summary['failed']} failed")
    for f in summary["failures"]:
        say(f"  failed {f['spec_id']} ({f['labels']}): {f['reason']}")
    say(f"outputs: {out_dir / 'estimates.csv'} (and the tables, figures and report beside it); "
        f"fits in {out_dir / 'fits'}; log: {log_file}")
    for line in revision.summary_lines():
        say(line)
    if summary["failed"]:
        say(f"warning: {summary['failed']} specification(s) failed; they are recorded with their "
            "reasons (exit code 1)")
        return EXIT_SOME_FAILED
    return EXIT_OK


def _print_plan(say, plan: Plan, jobs: list[dict], batches: list[str], force: bool) -> None:
    if not jobs:
        say(f"dry run: nothing to do; {len(plan.specs)} specifications up to date in {plan.out_dir}")
        return
    n = sum(len(plan.batches[b]) for b in batches)
    how = "all refitted, --force" if force else "unchanged results in them are reused, not refitted"
    say(f"dry run: {len(jobs)} job(s) would run; {n} of {len(plan.specs)} specifications are in "
        f"batches that would run ({how})")
    order = {"prepare": 0, "fit": 1, "collate": 2}
    for j in sorted(jobs, key=lambda j: (order.get(j["rule"], 3), sorted(j["wildcards"].items()))):
        what = " ".join(str(v) for v in j["wildcards"].values())
        say(f"  {j['rule']:<8} {what:<14} {j['reason']}")


def _record(loaded, plan: Plan, prints: dict, summary: dict, t0: float, executor: Executor,
            jobs: list[dict], cores: int | None):
    """Write ``run.json`` and keep the run's estimates as a snapshot (for ``specflow diff``),
    in an order a kill cannot break: run.json first without the state the "nothing to do"
    shortcut compares (the snapshot reads the data checksums from it), then the snapshot, then
    run.json whole. Killed before the end, the next run finds no state, asks Snakemake, and
    records again (a snapshot of the same estimates is not taken twice)."""
    from .revisions import snapshot

    _write_run_json(plan, prints, summary, t0, executor, jobs, cores, complete=False)
    revision = snapshot(loaded, plan.out_dir)
    _write_run_json(plan, prints, summary, t0, executor, jobs, cores)
    return revision


def _write_run_json(plan: Plan, prints: dict, summary: dict, t0: float, executor: Executor,
                    jobs: list[dict], cores: int | None, complete: bool = True) -> None:
    from datetime import datetime, timezone

    from . import __version__
    from .data import write_atomic_text

    runtime = round(time.monotonic() - t0, 3)
    if summary["specifications"] and summary["fitted"] == summary["specifications"]:
        full = runtime
    else:
        full = (_last_run(plan.out_dir) or {}).get("full_runtime_seconds")
    record = {
        "specflow_version": __version__,
        "finished": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "runtime_seconds": runtime,
        # the wall time of the last run that fitted every specification (None: none yet)
        "full_runtime_seconds": full,
        "spec": str(plan.spec_path),
        "executor": executor.name,
        "cores": cores or (os.cpu_count() if executor.name == "local" else None),
        **summary,
        "batches": len(plan.batches),
        "jobs": _job_counts(jobs),
        "datasets": {n: {"path": p.path, "file_sha256": p.file_sha256,
                         "data_fingerprint": p.data_fingerprint, "fingerprint": p.fingerprint}
                     for n, p in prints.items()},
        "state": _state(plan, prints) if complete else None,
        "files": _mtimes(plan.out_dir, _tracked_files(plan)),
    }
    write_atomic_text(plan.out_dir / RUN_FILE, json.dumps(record, indent=1, sort_keys=True) + "\n")
