"""Killed runs resume: ``specflow run`` killed with SIGKILL, then run again, ends where an
uninterrupted run ends.

The demo study (``specs/canal_yields.toml`` and its invented data) is copied into a temporary
folder with ``batch_size = 30`` (44 specifications in two batches, so a kill can land between
batches). One uninterrupted run is the reference. Each trial runs ``specflow run`` in a new
session (Snakemake's job processes share its process group), kills the whole group with
SIGKILL at a moment drawn from a seeded generator (or at a chosen step: while a dataset is
prepared, while collate writes the exhibits), and runs it again to completion. The rerun must
exit 0 and leave:

* exhibits byte-identical to the reference (estimates.csv/parquet, tables, figures,
  report.html, exhibits.json) and batch results equal to the reference's (timings aside);
* no half-written file: no ``*.tmp*`` file or folder anywhere in the output folder, every JSON,
  CSV and Parquet file readable, every batch file a whole batch of the planned specifications;
* no Snakemake lock, and a snapshot of the run's estimates under ``runs/``.

The reference is the independent check here: a run that was never interrupted. The trials'
moments and what each kill interrupted are printed (``pytest -s``).
"""

from __future__ import annotations

import json
import os
import random
import re
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest
from helpers import batch_results, demo_out_dir as out_dir, run_command as command, run_to_end

from specflow import workflow as sf
from specflow.results import Batch
from specflow.spec import load_spec

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "specs" / "canal_yields.toml"
SEED = 20261202
EXHIBIT_GLOBS = ("estimates.csv", "estimates.parquet", "exhibits.json", "report.html",
                 "tables/*", "figures/*")


def make_study(root: Path) -> Path:
    """The demo spec and data under root/specs; outputs go to root/results/canal_yields."""
    (root / "specs" / "data").mkdir(parents=True)
    shutil.copy2(ROOT / "specs" / "data" / "farms.csv", root / "specs" / "data" / "farms.csv")
    text = DEMO.read_text(encoding="utf-8")
    assert 'output = "../results/canal_yields"' in text
    text = text.replace('output = "../results/canal_yields"',
                        'output = "../results/canal_yields"\nbatch_size = 30')
    spec = root / "specs" / "canal_yields.toml"
    spec.write_text(text, encoding="utf-8")
    return spec








def start(spec: Path, log: Path, *args: str) -> subprocess.Popen:
    """``specflow run`` in a new session: its pid is also its process group's id."""
    f = open(log, "wb")
    try:
        return subprocess.Popen(command(spec, *args), stdout=f, stderr=subprocess.STDOUT,
                                stdin=subprocess.DEVNULL, start_new_session=True)
    finally:
        f.close()


def group_alive(pgid: int) -> bool:
    try:
        os.killpg(pgid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def kill_group(proc: subprocess.Popen) -> None:
    """SIGKILL specflow and every job process it started; wait until all are gone."""
    try:
        os.killpg(proc.pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    proc.wait(timeout=30)
    deadline = time.monotonic() + 30
    while group_alive(proc.pid):  # job processes are reaped by init once their parent died
        assert time.monotonic() < deadline, "a job process survived SIGKILL of its group"
        time.sleep(0.02)


def wait_for(cond, proc: subprocess.Popen, timeout: float = 120.0) -> bool:
    """Poll cond() every 10 ms until it holds (True) or the run ended (False)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if cond():
            return True
        if proc.poll() is not None:
            return bool(cond())
        time.sleep(0.01)
    raise AssertionError("timed out waiting for the run to reach the step")


def stage(out: Path) -> str:
    """What a run had done when it was killed (from the files it had written)."""
    fits = len(list((out / "fits").glob("*.json"))) if (out / "fits").is_dir() else 0
    jobs = []
    for step in ("prepare", "fit"):
        d = out / "logs" / step
        jobs += [f"{step}:{p.stem}" for p in d.glob("*.log")] if d.is_dir() else []
    parts = [f"parquet={'yes' if (out / 'data' / 'farms.parquet').exists() else 'no'}",
             f"batches={fits}/2",
             f"estimates={'yes' if (out / 'estimates.csv').exists() else 'no'}",
             f"report={'yes' if (out / 'report.html').exists() else 'no'}",
             f"run.json={'yes' if (out / 'run.json').exists() else 'no'}",
             f"snapshots={len(list((out / 'runs').glob('[0-9]*')))}" if (out / "runs").is_dir()
             else "snapshots=0",
             f"job logs={len(jobs)}"]
    return ", ".join(parts)


def exhibits(out: Path) -> dict[str, bytes]:
    files = {}
    for pattern in EXHIBIT_GLOBS:
        for p in sorted(out.glob(pattern)):
            if p.is_file():
                files[str(p.relative_to(out))] = p.read_bytes()
    return files




def check_whole(spec: Path, ref: dict) -> None:
    """The finished output folder equals the reference and holds no half-written file."""
    out = out_dir(spec)
    got = exhibits(out)
    assert sorted(got) == sorted(ref["exhibits"]), "the set of exhibit files differs"
    differ = [name for name in got if got[name] != ref["exhibits"][name]]
    assert not differ, f"exhibits differ from the uninterrupted run: {differ}"
    assert batch_results(out) == ref["batches"]

    leftovers = [str(p.relative_to(out)) for p in out.rglob("*") if ".tmp" in p.name
                 or p.name.startswith(".trash")]
    assert not leftovers, f"temporary files left behind: {leftovers}"
    for p in out.rglob("*"):
        if not p.is_file() or ".snakemake" in p.relative_to(out).parts:
            continue
        try:
            if p.suffix == ".json":
                json.loads(p.read_text(encoding="utf-8"))
            elif p.suffix == ".csv":
                pd.read_csv(p)
            elif p.suffix == ".parquet":
                pq.read_table(p)
        except Exception as exc:  # noqa: BLE001 - name the file
            raise AssertionError(f"{p.relative_to(out)} does not parse: {exc}") from None

    plan = sf.make_plan(load_spec(spec))
    assert sorted(p.name for p in (out / "fits").glob("*.json")) == sorted(
        Path(f).name for f in plan.batch_files())
    for b, members in plan.batches.items():
        batch = Batch.model_validate_json((out / "fits" / f"{b}.json").read_text(encoding="utf-8"))
        assert [r.spec_id for r in batch.results] == [sp.id for sp in members]

    for sub in ("locks", "incomplete"):
        d = out / ".snakemake" / sub
        left = sorted(p.name for p in d.iterdir()) if d.is_dir() else []
        assert not left, f"Snakemake's {sub} left behind: {left}"
    record = json.loads((out / "run.json").read_text(encoding="utf-8"))
    assert record["specifications"] == 44 and record["failed"] == 0
    runs = sorted(p for p in (out / "runs").iterdir() if re.fullmatch(r"\d{4}", p.name))
    assert runs, "no snapshot of the run's estimates"
    assert (runs[-1] / "estimates.csv").read_bytes() == ref["exhibits"]["estimates.csv"]


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """One uninterrupted run: its exhibits, batch results and wall time."""
    spec = make_study(tmp_path_factory.mktemp("reference"))
    t0 = time.monotonic()
    proc = run_to_end(spec)
    seconds = time.monotonic() - t0
    assert proc.returncode == 0, proc.stdout + proc.stderr
    out = out_dir(spec)
    assert sf.make_plan(load_spec(spec)).buckets == {"farms": 2}
    return {"exhibits": exhibits(out), "batches": batch_results(out), "seconds": seconds,
            "spec": spec}


def resume(spec: Path, ref: dict, what: str) -> None:
    proc = run_to_end(spec)
    assert proc.returncode == 0, f"{what}: rerun exit {proc.returncode}\n{proc.stdout}{proc.stderr}"
    assert "Traceback" not in proc.stdout + proc.stderr
    check_whole(spec, ref)
    again = run_to_end(spec)  # healed: the shortcut applies again
    assert again.returncode == 0 and again.stdout.startswith("nothing to do: 44 specifications"), (
        f"{what}: {again.stdout}{again.stderr}")


def test_kill_at_random_moments_then_resume(reference, tmp_path):
    """Four trials at seeded random moments; the last is killed twice (its first rerun too)."""
    rng = random.Random(SEED)
    span = reference["seconds"]
    trials = [[rng.uniform(0.05, 0.9) * span] for _ in range(3)]
    trials.append([rng.uniform(0.05, 0.9) * span, rng.uniform(0.05, 0.6) * span])
    report = []
    for i, moments in enumerate(trials):
        spec = make_study(tmp_path / f"trial{i}")
        out = out_dir(spec)
        for k, t in enumerate(moments):
            proc = start(spec, tmp_path / f"trial{i}-{k}.log")
            ended = False
            try:
                proc.wait(timeout=t)
                ended = True
            except subprocess.TimeoutExpired:
                pass
            seen = stage(out)
            kill_group(proc)
            report.append(f"trial {i} kill {k} at {t:.1f} s: "
                          + ("the run had already ended" if ended else seen))
        resume(spec, reference, f"trial {i}")
    print("\n" + "\n".join(report))


def test_kill_while_preparing_the_data(reference, tmp_path):
    spec = make_study(tmp_path / "s")
    out = out_dir(spec)
    proc = start(spec, tmp_path / "run.log")
    try:
        assert wait_for(lambda: (out / "logs" / "prepare" / "farms.log").exists(), proc)
        prepared = (out / "data" / "farms.parquet").exists()
    finally:
        kill_group(proc)
    assert not prepared, "the prepare job had already finished when it was killed"
    resume(spec, reference, "killed in prepare")


def test_kill_while_collating(reference, tmp_path):
    """Killed as soon as collate has written its first exhibit: estimates.csv is whole but
    the tables, figures and report are not written yet; the rerun must redo collate."""
    spec = make_study(tmp_path / "s")
    out = out_dir(spec)
    proc = start(spec, tmp_path / "run.log")
    try:
        assert wait_for(lambda: (out / "estimates.csv").exists(), proc)
        partial = not (out / "report.html").exists()
    finally:
        kill_group(proc)
    assert partial, "collate had already finished when it was killed"
    resume(spec, reference, "killed in collate")


def test_kill_forced_reruns_over_finished_outputs(reference, tmp_path):
    """A finished study rerun with --force (every job redone over existing outputs): killed
    once Snakemake has removed the old prepared data (prepare running), then again once it
    has removed the old batch files (fits running). Snakemake rebuilds a missing file only
    when something asks for it, so a plain rerun must still redo both."""
    spec = make_study(tmp_path / "s")
    out = out_dir(spec)
    shutil.copytree(out_dir(reference["spec"]), out, symlinks=True)
    shutil.rmtree(out / "logs" / "progress")  # so that a progress file means a fit job started
    steps = [lambda: not (out / "data" / "farms.parquet").exists(),
             lambda: any((out / "logs" / "progress").glob("*.json"))]
    for k, step in enumerate(steps):
        proc = start(spec, tmp_path / f"run{k}.log", "--force")
        try:
            assert wait_for(step, proc)
            running = proc.poll() is None
        finally:
            kill_group(proc)
        assert running
    assert len(list((out / "fits").glob("*.json"))) < 2  # a batch file is missing
    resume(spec, reference, "killed forced reruns")


def test_killed_between_the_run_record_and_the_snapshot(reference, tmp_path):
    """What a kill while the snapshot is written leaves (specflow.run._record): the record
    without the state the "nothing to do" shortcut compares, the snapshot's temporary folder,
    and the dead run's pid in the lock file. The window is milliseconds wide, so it is made
    here rather than hit: the rerun must say so, remove the folder, ask Snakemake, find
    nothing to do, keep the snapshot and complete the record."""
    spec = make_study(tmp_path / "s")
    out = out_dir(spec)
    shutil.copytree(out_dir(reference["spec"]), out, symlinks=True)
    record = json.loads((out / "run.json").read_text(encoding="utf-8"))
    record["state"] = None
    (out / "run.json").write_text(json.dumps(record), encoding="utf-8")
    shutil.rmtree(out / "runs")
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, check=True)
    pid = int(dead.stdout)  # a process that has ended
    (out / "runs" / f".tmp-{pid}-0123abcd").mkdir(parents=True)
    (out / "runs" / f".tmp-{pid}-0123abcd" / "estimates.csv").write_bytes(b"spec_id,sta")
    (out / "logs" / "run.pid").write_text(f"{pid}\n", encoding="ascii")

    proc = run_to_end(spec)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert proc.stdout.splitlines()[:2] == [
        f"note: the last run (pid {pid}) was interrupted; removed 1 half-written file(s); "
        "finished jobs are kept, the rest run again",
        "nothing to do (Snakemake): 44 specifications up to date; outputs in " + str(out)]
    check_whole(spec, reference)
    assert json.loads((out / "run.json").read_text(encoding="utf-8"))["state"]
    again = run_to_end(spec)
    assert again.returncode == 0 and again.stdout.startswith("nothing to do: 44 specifications")
