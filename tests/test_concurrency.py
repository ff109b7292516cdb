"""Runs that meet: a second ``specflow run`` on a study that is running, a lock left by a killed
run, and a data file rewritten while a run uses it.

Every test works on its own copy of the demo study (``specs/canal_yields.toml`` and its
invented data; the pinned checksum removed, since some tests rewrite the data) in a temporary
folder. Runs are subprocesses in their own session, so that the whole process group (specflow
and Snakemake's job processes) can be killed, or stopped with SIGSTOP while the test changes
the data and continued with SIGCONT: the order of events is then fixed by the test, not by
the machine's speed.

Outside references: the exhibits of the first, undisturbed run (every later run must give the
same bytes), the SHA-256 of the data file computed here with hashlib, and linearmodels'
IV2SLS on the rewritten data for the estimate a resumed run reports.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
import shlex
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from helpers import demo_out_dir as out_dir, run_command as command, run_to_end

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "specs" / "canal_yields.toml"
EXHIBIT_GLOBS = ("estimates.csv", "estimates.parquet", "exhibits.json", "report.html",
                 "tables/*", "figures/*")
CHANGED = re.compile(r"^error: .*data\.farms\.path: data file 'data/farms\.csv' \(dataset 'farms'\) "
                     r"changed while the run was going; .*: run again$")


def make_study(root: Path) -> Path:
    (root / "specs" / "data").mkdir(parents=True)
    shutil.copy2(ROOT / "specs" / "data" / "farms.csv", root / "specs" / "data" / "farms.csv")
    text = DEMO.read_text(encoding="utf-8")
    text, n = re.subn(r'(?m)^sha256 = "[0-9a-f]+"\n', "", text)  # the tests rewrite the data
    assert n == 1 and 'output = "../results/canal_yields"' in text
    spec = root / "specs" / "canal_yields.toml"
    spec.write_text(text, encoding="utf-8")
    return spec








class Background:
    """A command in its own session, its output collected in files."""

    def __init__(self, cmd: list[str], folder: Path, name: str):
        self.out_path, self.err_path = folder / f"{name}.out", folder / f"{name}.err"
        with open(self.out_path, "wb") as o, open(self.err_path, "wb") as e:
            self.proc = subprocess.Popen(cmd, stdout=o, stderr=e, stdin=subprocess.DEVNULL,
                                         start_new_session=True)
        self.pid = self.proc.pid

    def wait_for(self, cond, timeout: float = 120.0) -> None:
        deadline = time.monotonic() + timeout
        while not cond():
            assert self.proc.poll() is None, f"the run ended first:\n{self.output()}"
            assert time.monotonic() < deadline, "timed out"
            time.sleep(0.01)

    def signal(self, sig: int) -> None:
        os.killpg(self.pid, sig)

    def kill(self) -> None:
        try:
            self.signal(signal.SIGKILL)
        except ProcessLookupError:
            pass
        self.proc.wait(timeout=30)
        deadline = time.monotonic() + 30
        while True:  # job processes are reaped by init once their parent died
            try:
                os.killpg(self.pid, 0)
            except ProcessLookupError:
                return
            assert time.monotonic() < deadline, "a job process survived SIGKILL of its group"
            time.sleep(0.02)

    def finish(self, timeout: float = 300) -> int:
        return self.proc.wait(timeout=timeout)

    def stdout(self) -> str:
        return self.out_path.read_text(encoding="utf-8", errors="replace")

    def stderr(self) -> str:
        return self.err_path.read_text(encoding="utf-8", errors="replace")

    def output(self) -> str:
        return self.stdout() + self.stderr()


def exhibits(out: Path) -> dict[str, bytes]:
    files = {}
    for pattern in EXHIBIT_GLOBS:
        for p in sorted(out.glob(pattern)):
            if p.is_file():
                files[str(p.relative_to(out))] = p.read_bytes()
    return files


def lock_holder(out: Path) -> str:
    try:
        return (out / "logs" / "run.pid").read_text(encoding="ascii").strip()
    except FileNotFoundError:
        return ""


def snakemake_locked(out: Path) -> bool:
    d = out / ".snakemake" / "locks"
    return d.is_dir() and any(d.iterdir())


def fit_running(out: Path) -> bool:
    return any((out / "logs" / "progress").glob("*.json")) if (out / "logs" / "progress").is_dir() else False


def one_error_line(text: str) -> str:
    lines = [x for x in text.splitlines() if x.strip()]
    assert len(lines) == 1, f"expected one line, got:\n{text}"
    assert "Traceback" not in text
    return lines[0]


def rewrite_data(spec: Path) -> bytes:
    """Rewrite the data file in place, as an editor or a script would: 500 fewer farms."""
    path = spec.parent / "data" / "farms.csv"
    lines = path.read_bytes().splitlines(keepends=True)
    new = b"".join(lines[:-500])
    with open(path, "wb") as f:
        f.write(new)
    return new


# ---------------------------------------------------------------------------------------------
# a second run while the first runs


@pytest.fixture(scope="module")
def contested(tmp_path_factory):
    """Run A, and two more runs started while it runs: one as soon as A holds the output folder
    (before Snakemake has locked anything), one (a dry run) while A's fit jobs run. A's process
    group is stopped while each of them tries, so A is certainly still there."""
    root = tmp_path_factory.mktemp("contested")
    spec = make_study(root)
    out = out_dir(spec)
    a = Background(command(spec), root, "a")

    def meanwhile(*args: str) -> subprocess.CompletedProcess:
        a.signal(signal.SIGSTOP)  # A cannot end while the other run tries
        try:
            return run_to_end(spec, *args)
        finally:
            a.signal(signal.SIGCONT)

    try:
        a.wait_for(lambda: lock_holder(out) == str(a.pid))
        early = meanwhile()
        a.wait_for(lambda: fit_running(out) and snakemake_locked(out))
        during = meanwhile("--dry-run")
        code = a.finish()
    finally:
        if a.proc.poll() is None:
            a.kill()
    return {"spec": spec, "a": a, "code": code, "early": early, "during": during,
            "exhibits": exhibits(out)}


def test_second_run_is_refused_while_the_first_runs(contested):
    out = out_dir(contested["spec"])
    want = (f"error: another specflow run (pid {contested['a'].pid}) is using {out}; wait until "
            "it ends, then run again")
    for proc in (contested["early"], contested["during"]):
        assert proc.returncode == 2, proc.stdout + proc.stderr
        assert proc.stdout == ""
        assert one_error_line(proc.stderr) == want


def test_first_run_is_not_disturbed(contested):
    a, out = contested["a"], out_dir(contested["spec"])
    assert contested["code"] == 0, a.output()
    assert "note:" not in a.stdout() and a.stderr() == ""
    log = (out / "logs" / "snakemake.log").read_text(encoding="utf-8")
    assert log.count("=== specflow ") == 1 and "steps (100%) done" in log
    assert sorted(p.name for p in (out / "logs" / "progress").glob("*.json")) == ["farms-000.json"]
    assert lock_holder(out) == ""  # a clean end empties the pid file
    assert not snakemake_locked(out)
    assert json.loads((out / "run.json").read_text(encoding="utf-8"))["fitted"] == 44
    assert sorted(contested["exhibits"]) and "report.html" in contested["exhibits"]


# ---------------------------------------------------------------------------------------------
# locks left behind


def test_stale_lock_of_a_killed_run_is_removed_with_a_note(contested, tmp_path):
    spec = make_study(tmp_path)
    out = out_dir(spec)
    a = Background(command(spec), tmp_path, "a")
    try:
        a.wait_for(lambda: fit_running(out) and snakemake_locked(out))
    finally:
        a.kill()
    assert lock_holder(out) == str(a.pid) and snakemake_locked(out)  # what the kill left

    b = run_to_end(spec)
    assert b.returncode == 0, b.stdout + b.stderr
    assert b.stdout.startswith(f"note: the last run (pid {a.pid}) was interrupted; ")
    assert f"note: removed the Snakemake lock left by the interrupted run (pid {a.pid})\n" in b.stdout
    assert b.stderr == ""
    assert exhibits(out) == contested["exhibits"]
    assert lock_holder(out) == "" and not snakemake_locked(out)

    again = run_to_end(spec)  # the note is given once
    assert again.returncode == 0 and "note:" not in again.stdout
    assert again.stdout.startswith("nothing to do: 44 specifications")


def test_jobs_left_running_by_a_run_killed_alone(contested, tmp_path):
    """``kill -9`` of specflow's own pid only: its fit job goes on as an orphan. A new run
    while it works is refused (the job processes are stopped meanwhile, so they are certainly
    still there); once they have ended, a run completes the study."""
    spec = make_study(tmp_path)
    out = out_dir(spec)
    a = Background(command(spec), tmp_path, "a")
    try:
        a.wait_for(lambda: fit_running(out))
        os.kill(a.pid, signal.SIGKILL)
        a.proc.wait(timeout=30)
        a.signal(signal.SIGSTOP)  # the orphaned job processes (specflow itself is gone)
        try:
            refused = run_to_end(spec)
        finally:
            a.signal(signal.SIGCONT)
        deadline = time.monotonic() + 120
        while True:  # the orphans finish their job
            try:
                os.killpg(a.pid, 0)
            except ProcessLookupError:
                break
            assert time.monotonic() < deadline
            time.sleep(0.05)
    finally:
        a.kill()
    assert refused.returncode == 2, refused.stdout + refused.stderr
    line = one_error_line(refused.stderr)
    assert line == (f"error: job processes of an interrupted run are still working in {out} "
                    f"(they hold {out / 'logs' / 'jobs.lock'}); wait until they end, then run again")

    done = run_to_end(spec)
    assert done.returncode == 0, done.stdout + done.stderr
    assert exhibits(out) == contested["exhibits"]
    assert not [p for p in out.rglob("*") if ".tmp" in p.name]


def test_lock_of_a_snakemake_run_specflow_did_not_start(contested, tmp_path):
    """Snakemake run directly on the study and killed: specflow refuses, with the command that
    lifts the lock; after that command the run completes."""
    from specflow.workflow import snakefile

    spec = make_study(tmp_path)
    out = out_dir(spec)
    raw = Background([sys.executable, "-m", "snakemake", "-s", str(snakefile()), "--config",
                      f"spec={spec}", "--cores", "2"], tmp_path, "raw")
    try:
        raw.wait_for(lambda: snakemake_locked(out), timeout=180)
    finally:
        raw.kill()
    assert lock_holder(out) == ""

    refused = run_to_end(spec)
    assert refused.returncode == 2 and refused.stdout == ""
    line = one_error_line(refused.stderr)
    head = (f"error: {out} is locked by a Snakemake run that specflow did not start; if it is "
            "no longer running, unlock it with: ")
    assert line.startswith(head), line
    unlock = subprocess.run(shlex.split(line[len(head):]), capture_output=True, text=True,
                            timeout=120)
    assert unlock.returncode == 0, unlock.stdout + unlock.stderr
    assert not snakemake_locked(out)

    done = run_to_end(spec)
    assert done.returncode == 0, done.stdout + done.stderr
    assert exhibits(out) == contested["exhibits"]


# ---------------------------------------------------------------------------------------------
# data changed under a running job


def stopped_change(spec: Path, folder: Path, when) -> tuple[Background, bytes]:
    """Start a run, stop its whole process group when ``when(out)`` holds, rewrite the data,
    continue it, and let it end."""
    out = out_dir(spec)
    a = Background(command(spec), folder, "a")
    try:
        a.wait_for(lambda: when(out))
        a.signal(signal.SIGSTOP)
        try:
            state = {p: (out / p).exists() for p in ("logs/collate.log", "estimates.csv",
                                                      "report.html", "run.json")}
            new = rewrite_data(spec)
        finally:
            a.signal(signal.SIGCONT)
        a.finish()
    finally:
        if a.proc.poll() is None:
            a.kill()
    a.state = state
    return a, new


def test_data_rewritten_while_the_fits_run(tmp_path):
    """The fit jobs work on the data prepared before the change; collate finds the file's bytes
    no longer match and refuses to collate: one line naming the dataset and the file, exit 2,
    no exhibits. The next run works on the new data throughout."""
    spec = make_study(tmp_path)
    out = out_dir(spec)
    a, new = stopped_change(spec, tmp_path, fit_running)
    assert not a.state["logs/collate.log"], "collate had started before the data changed"
    assert a.proc.returncode == 2, a.output()
    line = one_error_line(a.stderr())
    assert CHANGED.match(line) and "nothing was collated" in line, line
    assert not [p for p in exhibits(out)], "exhibits were written from the old data"
    assert not (out / "run.json").exists() and not (out / "runs").exists()

    b = run_to_end(spec)
    assert b.returncode == 0, b.stdout + b.stderr
    record = json.loads((out / "run.json").read_text(encoding="utf-8"))
    assert record["datasets"]["farms"]["file_sha256"] == hashlib.sha256(new).hexdigest()
    assert record["fitted"] == 44  # the fits of the old data were not reused

    # the baseline estimate is linearmodels' 2SLS on the new data (linearmodels 7, an
    # independent implementation), with the absorbed survey round as dummies
    from linearmodels.iv import IV2SLS

    df = pd.read_csv(spec.parent / "data" / "farms.csv")
    assert len(df) == 4000 - 500
    with np.errstate(divide="ignore", invalid="ignore"):
        df = df[df["farm_ha"] > 0].assign(log_yield=np.log(df["yield_t_ha"]),
                                          log_farm_ha=np.log(df["farm_ha"]))
    cols = ["log_yield", "irrigated_share", "canal_km", "upstream_rain", "log_farm_ha",
            "soil_index", "survey_round"]
    d = df[cols].replace([np.inf, -np.inf], np.nan).dropna()  # listwise, as specflow reports
    exog = pd.concat([d[["log_farm_ha", "soil_index"]],
                      pd.get_dummies(d["survey_round"], prefix="r", dtype=float)], axis=1)
    ref = IV2SLS(d["log_yield"], exog, d["irrigated_share"], d[["canal_km", "upstream_rain"]]).fit()
    est = pd.read_csv(out / "estimates.csv")
    base = est[est["is_baseline"] & (est["term"] == "irrigated_share")]
    assert len(base) == 1 and int(base["nobs"].iloc[0]) == len(d)
    assert math.isclose(base["estimate"].iloc[0], ref.params["irrigated_share"], rel_tol=1e-8)


def test_data_rewritten_while_the_data_is_prepared(tmp_path):
    spec = make_study(tmp_path)
    out = out_dir(spec)
    a, _ = stopped_change(spec, tmp_path, lambda o: (o / "logs" / "prepare" / "farms.log").exists())
    assert a.proc.returncode == 2, a.output()
    line = one_error_line(a.stderr())
    # the prepare job catches it if it had not read the file yet, collate otherwise
    assert CHANGED.match(line) and ("it was not prepared" in line or "nothing was collated" in line)
    assert not exhibits(out) and not (out / "run.json").exists()


def test_data_rewritten_while_collating(contested, tmp_path):
    """Collate had checked the data and was writing the exhibits of the old data when the file
    changed: the run fails at its end and records nothing; the exhibits are whole and all of
    the old data (the undisturbed run's bytes), not a mix."""
    spec = make_study(tmp_path)
    out = out_dir(spec)
    a, _ = stopped_change(spec, tmp_path, lambda o: (o / "estimates.csv").exists())
    assert not a.state["run.json"]
    assert a.proc.returncode == 2, a.output()
    line = one_error_line(a.stderr())
    assert CHANGED.match(line) and "the outputs are of its earlier content" in line, line
    assert exhibits(out) == contested["exhibits"]
    assert not (out / "run.json").exists() and not (out / "runs").exists()
