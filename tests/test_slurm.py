"""The demo grid on a real single-node SLURM cluster, through specflow's shipped profile.

The test stands the cluster up itself, as root: a private MUNGE daemon (own key and socket),
``slurmctld`` and ``slurmd`` on free ports with state, spool and logs in a temporary folder,
and a minimal ``/etc/slurm/slurm.conf`` for this host (the jobs' nested ``srun`` only looks
there). It stops the daemons by the PIDs in their pid files and removes the config afterwards.
Without an accounting daemon ``sacct`` does not work, so the profile's status command is
``squeue`` and finished jobs stay visible for ``MinJobAge`` seconds.

The grid runs through ``specflow run --cluster`` (the shipped profile, with shorter status
intervals for the test) and again locally; the two runs' results must be equal. Skipped only
where the daemons cannot run (not root, packages missing, a real cluster's config present),
with the reason.
"""

from __future__ import annotations

import fcntl
import json
import math
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest
import yaml
from helpers import batch_results as results

ROOT = Path(__file__).resolve().parents[1]
SLURM_CONF = Path("/etc/slurm/slurm.conf")
MARKER = "# written by specflow's tests/test_slurm.py for a throwaway test cluster"
LOCK = Path("/tmp/specflow-slurm-test.lock")
DAEMONS = ("mungekey", "munged", "slurmctld", "slurmd", "sbatch", "squeue", "sinfo", "srun",
           "scontrol")

pytestmark = [pytest.mark.slurm, pytest.mark.slow]


def why_not() -> str | None:
    """Why this machine cannot run the test cluster (None: it can)."""
    if os.name != "posix" or os.geteuid() != 0:
        return "needs root to start munged, slurmctld and slurmd"
    missing = [d for d in DAEMONS if shutil.which(d) is None]
    if missing:
        return (f"{', '.join(missing)} not installed (Debian packages slurm-wlm and munge; "
                "scripts/sysdeps.sh installs them as root)")
    try:
        import snakemake_executor_plugin_slurm  # noqa: F401
    except ImportError:
        return "snakemake-executor-plugin-slurm is not installed (pip install 'specflow[slurm]')"
    if SLURM_CONF.exists() and MARKER not in SLURM_CONF.read_text(errors="replace"):
        return f"{SLURM_CONF} exists and is not the test's: not replacing a real cluster's config"
    return None


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def slurm_conf(base: Path, host: str) -> str:
    cpus = os.cpu_count() or 1
    with open("/proc/meminfo") as f:
        mem_mb = int(int(f.readline().split()[1]) / 1024 * 0.8)
    return "\n".join([
        MARKER,
        "ClusterName=specflowtest",
        f"SlurmctldHost={host}(127.0.0.1)",
        f"SlurmctldPort={free_port()}",
        f"SlurmdPort={free_port()}",
        "SlurmUser=root",
        "SlurmdUser=root",
        "AuthType=auth/munge",
        "CredType=cred/munge",
        f"AuthInfo=socket={base}/sock/munge.socket",
        f"StateSaveLocation={base}/state",
        f"SlurmdSpoolDir={base}/spool",
        f"SlurmctldPidFile={base}/slurmctld.pid",
        f"SlurmdPidFile={base}/slurmd.pid",
        f"SlurmctldLogFile={base}/log/slurmctld.log",
        f"SlurmdLogFile={base}/log/slurmd.log",
        "ProctrackType=proctrack/linuxproc",
        "TaskPlugin=task/none",
        "MpiDefault=none",
        "ReturnToService=2",
        "SchedulerType=sched/backfill",
        "SelectType=select/cons_tres",
        "SelectTypeParameters=CR_Core",
        "AccountingStorageType=accounting_storage/none",
        "JobAcctGatherType=jobacct_gather/none",
        "JobCompType=jobcomp/none",
        "MinJobAge=300",
        "SlurmctldTimeout=30",
        "SlurmdTimeout=30",
        "KillWait=5",
        f"NodeName={host} NodeAddr=127.0.0.1 CPUs={cpus} RealMemory={mem_mb} State=UNKNOWN",
        "PartitionName=debug Nodes=ALL Default=YES MaxTime=INFINITE State=UP",
        "",
    ])


def wait_for(check, seconds: float, what: str):
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        value = check()
        if value:
            return value
        time.sleep(0.3)
    raise TimeoutError(what)


def read_pid(path: Path) -> int | None:
    try:
        return int(path.read_text().strip())
    except (OSError, ValueError):
        return None


def stop(pid_files: list[Path]) -> None:
    """SIGTERM each daemon by its pid file (newest first), SIGKILL if it lingers."""
    for pf in reversed(pid_files):
        pid = read_pid(pf)
        if pid is None:
            continue
        try:
            os.kill(pid, signal.SIGTERM)
        except ProcessLookupError:
            continue
        end = time.monotonic() + 10
        while time.monotonic() < end:
            try:
                os.kill(pid, 0)
            except ProcessLookupError:
                break
            time.sleep(0.2)
        else:
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass


def last_lines(path: Path, n: int = 3) -> str:
    try:
        return " | ".join(path.read_text(errors="replace").strip().splitlines()[-n:])
    except OSError:
        return "(no log)"


@pytest.fixture(scope="module")
def cluster():
    reason = why_not()
    if reason:
        pytest.skip(reason)
    lock = open(LOCK, "w")
    try:
        wait_for(lambda: _try_lock(lock), 300, "lock")
    except TimeoutError:
        pytest.skip(f"another test cluster holds {LOCK}")
    base = Path(tempfile.mkdtemp(prefix="specflow-slurm-"))
    for sub, mode in (("sock", 0o755), ("key", 0o700), ("state", 0o700), ("spool", 0o755),
                      ("log", 0o755)):
        (base / sub).mkdir(mode=mode)
    base.chmod(0o755)  # munged wants every folder above its socket searchable by all
    pid_files = [base / "sock" / "munged.pid", base / "slurmctld.pid", base / "slurmd.pid"]
    wrote_conf = False
    host = socket.gethostname().split(".")[0]
    try:
        key = base / "key" / "munge.key"
        subprocess.run(["mungekey", "--create", f"--keyfile={key}"], check=True,
                       capture_output=True)
        key.chmod(0o400)
        subprocess.run(["munged", f"--socket={base}/sock/munge.socket", f"--key-file={key}",
                        f"--pid-file={pid_files[0]}", f"--log-file={base}/log/munged.log",
                        f"--seed-file={base}/key/munged.seed"], check=True, capture_output=True)
        SLURM_CONF.parent.mkdir(parents=True, exist_ok=True)
        SLURM_CONF.write_text(slurm_conf(base, host))
        wrote_conf = True
        for daemon in ("slurmctld", "slurmd"):
            subprocess.run([daemon, "-f", str(SLURM_CONF)], check=True, capture_output=True,
                           timeout=30)
        wait_for(lambda: all(read_pid(p) for p in pid_files), 15, "pid files")
        wait_for(lambda: subprocess.run(["sinfo", "-h", "-o", "%t"], capture_output=True,
                                        text=True).stdout.strip() == "idle", 30, "node idle")
    except (subprocess.CalledProcessError, subprocess.TimeoutExpired, TimeoutError) as exc:
        logs = "; ".join(f"{n}: {last_lines(base / 'log' / f'{n}.log')}"
                         for n in ("munged", "slurmctld", "slurmd"))
        stop(pid_files)
        if wrote_conf:
            SLURM_CONF.unlink(missing_ok=True)
        shutil.rmtree(base, ignore_errors=True)
        lock.close()
        pytest.skip(f"the SLURM daemons could not run here ({type(exc).__name__}): {logs}")
    try:
        yield base
    finally:
        stop(pid_files)
        if wrote_conf and MARKER in SLURM_CONF.read_text(errors="replace"):
            SLURM_CONF.unlink()
        shutil.rmtree(base, ignore_errors=True)
        lock.close()


def _try_lock(f) -> bool:
    try:
        fcntl.flock(f, fcntl.LOCK_EX | fcntl.LOCK_NB)
        return True
    except BlockingIOError:
        return False


def copy_demo(target: Path) -> Path:
    shutil.copytree(ROOT / "specs" / "data", target / "data")
    text = (ROOT / "specs" / "canal_yields.toml").read_text(encoding="utf-8")
    text = text.replace('output = "../results/canal_yields"', 'output = "out"')
    spec = target / "canal_yields.toml"
    spec.write_text(text, encoding="utf-8")
    return spec




def same(a, b, path="") -> None:
    if isinstance(a, float) and isinstance(b, float):
        assert math.isclose(a, b, rel_tol=1e-10, abs_tol=1e-12), f"{path}: {a} != {b}"
    elif isinstance(a, dict) and isinstance(b, dict):
        assert a.keys() == b.keys(), path
        for k in a:
            same(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list) and isinstance(b, list):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b)):
            same(x, y, f"{path}[{i}]")
    else:
        assert a == b, f"{path}: {a!r} != {b!r}"


def test_cluster_runs_a_job(cluster):
    job = subprocess.run(["sbatch", "--parsable", f"--output={cluster}/log/smoke-%j.out",
                          "--wrap", "true"], capture_output=True,
                         text=True, check=True).stdout.strip().split(";")[0]
    state = wait_for(lambda: _state(job) in ("COMPLETED", "FAILED") and _state(job), 60,
                     "smoke job")
    assert state == "COMPLETED"


def _state(job: str) -> str:
    return subprocess.run(["squeue", "--states=all", "-h", "-j", job, "-o", "%T"],
                          capture_output=True, text=True).stdout.strip()


def test_demo_grid_on_slurm_equals_local_run(cluster, tmp_path):
    # the shipped profile, with status checks every few seconds instead of tens of seconds
    profile = yaml.safe_load((ROOT / "specflow" / "profiles" / "slurm" / "config.yaml").read_text())
    assert profile["executor"] == "slurm" and profile["slurm-status-command"] == "squeue"
    profile.update({"slurm-init-seconds-before-status-checks": 1,
                    "seconds-between-status-checks": 2, "latency-wait": 5})
    (tmp_path / "profile").mkdir()
    (tmp_path / "profile" / "config.yaml").write_text(yaml.safe_dump(profile))

    remote = copy_demo(tmp_path / "remote")
    proc = subprocess.run([sys.executable, "-m", "specflow.cli", "run", str(remote),
                           "--cluster", str(tmp_path / "profile")],
                          capture_output=True, text=True, timeout=600)
    out = remote.parent / "out"
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-2000:] + \
        last_lines(out / "logs" / "snakemake.log", 30)
    assert "on slurm" in proc.stdout
    # the prepare and fit jobs went through SLURM: Snakemake's log names their SLURM job ids,
    # and SLURM lists each as completed
    submitted = re.findall(r"submitted with SLURM jobid (\d+) \(log: \S*/rule_(\w+)/",
                           (out / "logs" / "snakemake.log").read_text())
    assert {rule for _, rule in submitted} == {"prepare", "fit"}
    for job, _ in submitted:
        assert _state(job) == "COMPLETED", job
    record = json.loads((out / "run.json").read_text())
    assert record["executor"] == "slurm" and record["failed"] == 0

    local = copy_demo(tmp_path / "local")
    proc = subprocess.run([sys.executable, "-m", "specflow.cli", "run", str(local), "--cores", "2"],
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-2000:]
    on_cluster, here = results(out), results(local.parent / "out")
    assert len(here) == 44 and on_cluster.keys() == here.keys()
    for sid in here:
        same(on_cluster[sid], here[sid], sid)
    assert (out / "estimates.csv").read_bytes() == (local.parent / "out" / "estimates.csv").read_bytes()
