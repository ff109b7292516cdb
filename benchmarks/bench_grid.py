"""Grid benchmark: ``specflow run`` end to end on N specifications over synthetic data of R rows.

Measures, on one machine in one run (figures, not a test):

* the wall time of ``specflow run`` from an empty output folder;
* the wall time of a no-op rerun (nothing changed: specflow's "nothing to do" shortcut);
* an incremental rerun after one variant of one axis is edited (how many specifications were
  refitted and how long it took);
* Snakemake's per-job overhead: each job's wall time as Snakemake recorded it (its metadata)
  minus the fitting time inside the job (the FitResults' own timings), i.e. process start-up,
  imports, reading the prepared data and writing results;
* for scale, the same fits in one process (``specflow.fit.fit_many`` on the prepared data).

Usage: ``python benchmarks/bench_grid.py --specs 200 --rows 20000 [--cores 2] [--batch-size 0]``
(N must be a multiple of 20; see benchmarks/synth.py for the data and the grid).
"""

from __future__ import annotations

import argparse
import base64
import json
import re
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from synth import write_grid  # noqa: E402


def timed(cmd: list[str]) -> tuple[float, subprocess.CompletedProcess]:
    t = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True)
    return time.perf_counter() - t, proc


def job_times(out: Path) -> list[dict]:
    """Each job's rule, output and wall time, from Snakemake's metadata records."""
    jobs = []
    for p in (out / ".snakemake" / "metadata").iterdir():
        if not p.is_file():
            continue
        try:
            rec = json.loads(p.read_text())
            target = base64.urlsafe_b64decode(p.name).decode(errors="replace")
        except (OSError, ValueError):
            continue
        if rec.get("starttime") and rec.get("endtime"):
            jobs.append({"rule": rec.get("rule"), "output": target,
                         "wall": rec["endtime"] - rec["starttime"]})
    return jobs


def fit_seconds(batch_file: Path) -> float:
    data = json.loads(batch_file.read_text())
    return sum((r.get("timing") or {}).get("total") or 0.0 for r in data["results"])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--specs", type=int, default=200, help="specifications (a multiple of 20)")
    ap.add_argument("--rows", type=int, default=20_000, help="rows of synthetic data")
    ap.add_argument("--cores", type=int, default=2)
    ap.add_argument("--batch-size", type=int, default=0, help="0: specflow's automatic choice")
    ap.add_argument("--no-inprocess", action="store_true", help="skip the in-process reference")
    ap.add_argument("--keep", type=Path, help="keep the study in this folder")
    a = ap.parse_args()

    specflow = [sys.executable, "-m", "specflow.cli", "run"]
    with tempfile.TemporaryDirectory(prefix="specflow-bench-") as tmp:
        root = a.keep or Path(tmp)
        spec = write_grid(root, a.rows, a.specs, batch_size=a.batch_size)
        out = root / "results"

        t_run, proc = timed(specflow + [str(spec), "--cores", str(a.cores)])
        if proc.returncode not in (0, 1):
            sys.exit(f"specflow run failed ({proc.returncode}):\n{proc.stdout}\n{proc.stderr}")
        record = json.loads((out / "run.json").read_text())

        noops = []
        for _ in range(3):
            t, p = timed(specflow + [str(spec), "--cores", str(a.cores)])
            if not p.stdout.startswith("nothing to do"):  # e.g. specflow's code changed meanwhile
                print(f"warning: the rerun was not a no-op: {p.stdout.splitlines()[0]}")
            noops.append(t)

        jobs = job_times(out)
        fits = [j for j in jobs if j["rule"] == "fit"]
        fit_work = {Path(j["output"]).name: fit_seconds(out / "fits" / Path(j["output"]).name)
                    for j in fits}
        overheads = [j["wall"] - fit_work[Path(j["output"]).name] for j in fits]
        others = {r: [j["wall"] for j in jobs if j["rule"] == r] for r in ("prepare", "collate")}

        # incremental: edit one variant of the instruments axis (one fifth of the grid)
        text = spec.read_text()
        edited = text.replace('[axes.instruments.variants."z1 z3"]\ninstruments = ["z1", "z3"]',
                              '[axes.instruments.variants."z1 z3"]\ninstruments = ["z3", "z1"]\n'
                              'add_controls = ["x1"]', 1)
        assert edited != text
        spec.write_text(edited)
        t_inc, p = timed(specflow + [str(spec), "--cores", str(a.cores)])
        m = re.search(r"(\d+) fitted, (\d+) reused", p.stdout)
        inc = (int(m.group(1)), int(m.group(2))) if m else (None, None)

        t_inproc = None
        if not a.no_inprocess:
            t0 = time.perf_counter()
            from specflow.data import prepare
            from specflow.fit import fit_many
            from specflow.grid import expand
            from specflow.spec import load_spec

            spec.write_text(text)
            loaded = load_spec(spec)
            df, _ = prepare(loaded, "main")
            fit_many(expand(loaded), df)
            t_inproc = time.perf_counter() - t0

    def mean(xs):
        return sum(xs) / len(xs) if xs else float("nan")

    figures = {
        "specifications": a.specs, "rows": a.rows, "cores": a.cores,
        "batches": record["batches"], "jobs": record["jobs"],
        "run_seconds": round(t_run, 2),
        "noop_seconds": [round(t, 3) for t in noops],
        "incremental_seconds": round(t_inc, 2),
        "incremental_fitted_reused": inc,
        "fit_job_wall_mean": round(mean([j["wall"] for j in fits]), 3),
        "fit_work_in_job_mean": round(mean(list(fit_work.values())), 3),
        "per_job_overhead_mean": round(mean(overheads), 3),
        "prepare_job_wall": [round(x, 3) for x in others["prepare"]],
        "collate_job_wall": [round(x, 3) for x in others["collate"]],
        "inprocess_fit_seconds": round(t_inproc, 2) if t_inproc else None,
    }
    print(f"grid benchmark: {a.specs} specifications x {a.rows} rows, {a.cores} cores, "
          f"{record['batches']} batches, jobs {record['jobs']}")
    print(f"  specflow run (empty output folder):  {t_run:8.2f} s")
    print(f"  no-op rerun (3 tries):               {', '.join(f'{t:.2f}' for t in noops)} s")
    print(f"  one variant edited:                  {t_inc:8.2f} s  ({inc[0]} fitted, {inc[1]} reused)")
    print(f"  fit job wall time, mean:             {figures['fit_job_wall_mean']:8.3f} s")
    print(f"    of which fitting:                  {figures['fit_work_in_job_mean']:8.3f} s")
    print(f"    per-job overhead (start-up, I/O):  {figures['per_job_overhead_mean']:8.3f} s")
    print(f"  prepare job(s): {figures['prepare_job_wall']} s; collate: {figures['collate_job_wall']} s")
    if t_inproc:
        print(f"  same fits in one process:            {t_inproc:8.2f} s  "
              f"(run / in-process = {t_run / t_inproc:.2f})")
    target = HERE / "out" / "bench_grid.json"
    target.parent.mkdir(exist_ok=True)
    target.write_text(json.dumps(figures, indent=1) + "\n")
    print(f"  figures written to {target}")


if __name__ == "__main__":
    main()
