"""Shared helpers of the benchmarks: timing, peak memory, the machine, comparisons."""

from __future__ import annotations

import json
import os
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
OUT = ROOT / "benchmarks" / "out"
PY = sys.executable
SPECFLOW = str(Path(PY).with_name("specflow"))
RTOL = 1e-8  # every benchmark checks its estimates against its baseline to this relative tolerance
ATOL = 1e-12  # ... and this absolute one, for values that are zero up to rounding


def machine() -> dict:
    """What the figures were measured on."""
    info = {"python": platform.python_version(), "platform": platform.platform(),
            "cpus": os.cpu_count()}
    try:
        with open("/proc/cpuinfo") as f:
            names = [ln.split(":", 1)[1].strip() for ln in f if ln.startswith("model name")]
        info["cpu"] = names[0] if names else platform.processor()
    except OSError:
        info["cpu"] = platform.processor()
    try:
        with open("/proc/meminfo") as f:
            kb = int(f.readline().split()[1])
        info["memory_gib"] = round(kb / 2**20, 1)
    except (OSError, ValueError, IndexError):
        pass
    try:
        info["load_average"] = [round(x, 2) for x in os.getloadavg()]
    except OSError:
        pass
    info["blas"] = blas_info()
    info["env"] = {k: os.environ[k] for k in ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE",
                                              "OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS")
                   if k in os.environ}
    return info


def blas_info() -> str:
    """The BLAS library, kernel and thread count numpy uses (threadpoolctl when installed)."""
    try:
        import numpy  # noqa: F401
        from threadpoolctl import threadpool_info
    except ImportError:
        return "unknown (threadpoolctl not installed)"
    parts = []
    for p in threadpool_info():
        if p.get("user_api") == "blas":
            parts.append(f"{p.get('internal_api')} {p.get('version')} kernel={p.get('architecture')} "
                         f"threads={p.get('num_threads')}")
    return "; ".join(parts) or "no BLAS found"


def peak_rss_mb() -> float:
    """Peak resident memory of this process (MB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def run_measured(cmd: list[str], cwd: Path | None = None, env: dict | None = None,
                 timeout: float | None = None) -> dict:
    """Run a command in a fresh helper process; wall time and the peak RSS of any descendant.

    The helper waits for the command, so ``RUSAGE_CHILDREN`` of the helper is the largest
    resident set of the command and every process it waited for (Snakemake's jobs included).
    """
    helper = ("import resource, subprocess, sys, time, json\n"
              "t = time.perf_counter()\n"
              "p = subprocess.run(sys.argv[1:], stdout=subprocess.PIPE, stderr=subprocess.STDOUT)\n"
              "w = time.perf_counter() - t\n"
              "r = resource.getrusage(resource.RUSAGE_CHILDREN)\n"
              "sys.stdout.write(json.dumps({'rc': p.returncode, 'wall': w, "
              "'peak_rss_mb': r.ru_maxrss / 1024, 'out': p.stdout.decode(errors='replace')[-4000:]}))\n")
    p = subprocess.run([PY, "-c", helper, *cmd], cwd=cwd, env=env, capture_output=True, text=True,
                       timeout=timeout)
    if p.returncode != 0:
        raise RuntimeError(f"helper failed: {p.stderr[-2000:]}")
    return json.loads(p.stdout)


class Timer:
    def __enter__(self):
        self.t0 = time.perf_counter()
        return self

    def __exit__(self, *exc):
        self.seconds = time.perf_counter() - self.t0


def close(a, b, rtol: float = RTOL, atol: float = ATOL) -> bool:
    if a is None or b is None:
        return a is None and b is None
    return abs(float(a) - float(b)) <= atol + rtol * max(abs(float(a)), abs(float(b)))


class Comparison:
    """Counts of compared numbers and the worst relative difference, with the first misses."""

    def __init__(self, name: str):
        self.name = name
        self.n = 0
        self.worst = 0.0
        self.misses: list[str] = []

    def add(self, what: str, a, b) -> None:
        if a is None and b is None:
            return
        self.n += 1
        if a is None or b is None:
            self.misses.append(f"{what}: {a} vs {b}")
            return
        d = abs(float(a) - float(b))
        rel = d / max(abs(float(a)), abs(float(b)), 1e-300)
        if max(abs(float(a)), abs(float(b))) > ATOL:
            self.worst = max(self.worst, rel)
        if not close(a, b):
            self.misses.append(f"{what}: {a!r} vs {b!r} (rel {rel:.2e})")

    @property
    def ok(self) -> bool:
        return self.n > 0 and not self.misses

    def line(self) -> str:
        state = "equal" if self.ok else f"{len(self.misses)} differ"
        return (f"{self.name}: {self.n} numbers compared, {state} to {RTOL:g} "
                f"(largest relative difference {self.worst:.1e})")


def write_json(path: Path, obj) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(path.suffix + ".tmp")
    tmp.write_text(json.dumps(obj, indent=1, default=str) + "\n")
    tmp.replace(path)
