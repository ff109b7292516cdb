"""High-dimensional fixed effects: 10 million rows, a 1,000,000-level and a 1,000-level effect.

One specification (2SLS, two instruments, two controls, ``firm`` and ``year`` absorbed, errors
clustered by firm) through ``specflow run`` in a fresh folder, measuring the wall time and the
peak resident memory of every process of the run (Snakemake, prepare, fit, collate), against
the size of the data's numeric columns (8 columns x 8 bytes a row).

Also measured, each in its own process: the fit job's work alone (read the prepared Parquet,
``fit_many``), and a plain numpy baseline (singletons removed, alternating projections to
1e-14, 2SLS with the cluster-robust covariance and specflow's documented small-sample factor,
the year levels counted in k and the firm effect, nested in the firm clusters, not counted).
Check: the IV coefficients and standard errors equal the baseline's to 1e-8.
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import OUT, PY, SPECFLOW, Comparison, machine, run_measured, write_json  # noqa: E402

SPEC = """# Benchmark study (invented data from benchmarks/synth.py hdfe_frame)
[study]
title = "specflow benchmark: high-dimensional fixed effects"
output = "results"

[data.panel]
path = "data.parquet"

[model]
outcome = "y"
endogenous = ["d"]
instruments = ["z1", "z2"]
controls = ["x1", "x2"]
absorb = ["firm", "year"]
cluster = ["firm"]
covariance = "cluster"
estimator = "2sls"
"""

FIT_ALONE = r"""
import json, resource, sys, time
t0 = time.perf_counter()
import pandas as pd
from specflow.fit import fit_many
from specflow.grid import expand
from specflow.spec import load_spec
sp = expand(load_spec(sys.argv[1]))[0]
df = pd.read_parquet(sys.argv[2])
t1 = time.perf_counter()
r = fit_many([sp], df, diagnose=True)[0]
t2 = time.perf_counter()
iv = r.iv.terms if r.iv else []
print(json.dumps({"status": r.status, "reason": r.reason, "read_s": t1 - t0, "fit_s": t2 - t1,
                  "timing": r.timing, "nobs": r.nobs, "singletons": r.n_dropped_singletons,
                  "df_absorbed": r.df_absorbed,
                  "iv": [[t.name, t.estimate, t.se] for t in iv],
                  "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""

PREPARE_ALONE = r"""
import json, resource, sys, time
t0 = time.perf_counter()
from specflow.data import prepare, write_parquet_atomic
from specflow.spec import load_spec
from pathlib import Path
df, _ = prepare(load_spec(sys.argv[1]), "panel")
write_parquet_atomic(df, Path(sys.argv[2]))
print(json.dumps({"seconds": time.perf_counter() - t0,
                  "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""

BASELINE = r"""
import json, resource, sys, time
import numpy as np, pandas as pd
t0 = time.perf_counter()
df = pd.read_parquet(sys.argv[1])
y, d, z1, z2, x1, x2 = (df[c].to_numpy() for c in ("y", "d", "z1", "z2", "x1", "x2"))
firm, year = df["firm"].to_numpy(), df["year"].to_numpy()
keep = np.ones(y.size, bool)
while True:  # iterative singleton removal
    bad = np.zeros_like(keep)
    for c in (firm, year):
        cnt = np.bincount(c[keep], minlength=c.max() + 1)
        bad |= keep & (cnt[c] == 1)
    if not bad.any():
        break
    keep &= ~bad
_, f = np.unique(firm[keep], return_inverse=True)
_, t = np.unique(year[keep], return_inverse=True)
nf, nt = np.bincount(f), np.bincount(t)
def demean(v):
    v = v[keep].copy()
    scale = np.abs(v).max()
    for it in range(10000):
        old = v.copy()
        v -= (np.bincount(f, v) / nf)[f]
        v -= (np.bincount(t, v) / nt)[t]
        if np.abs(v - old).max() <= 1e-14 * scale:
            return v
    return v
cols = {c: demean(v) for c, v in (("y", y), ("d", d), ("z1", z1), ("z2", z2), ("x1", x1), ("x2", x2))}
n = cols["y"].size
R = np.column_stack([cols["d"], cols["x1"], cols["x2"]])
Q = np.column_stack([cols["z1"], cols["z2"], cols["x1"], cols["x2"]])
Rhat = Q @ np.linalg.lstsq(Q, R, rcond=None)[0]
A = Rhat.T @ R
A = (A + A.T) / 2
b = np.linalg.solve(A, Rhat.T @ cols["y"])
e = cols["y"] - R @ b
U = Rhat * e[:, None]
G = int(f.max()) + 1
S = np.column_stack([np.bincount(f, U[:, j], minlength=G) for j in range(U.shape[1])])
k = R.shape[1] + int(t.max()) + 1  # firm nested in the firm clusters: not counted
Ai = np.linalg.inv(A)
V = Ai @ ((G / (G - 1)) * ((n - 1) / (n - k)) * (S.T @ S)) @ Ai
print(json.dumps({"iv": [["d", b[0], float(np.sqrt(V[0, 0]))], ["x1", b[1], float(np.sqrt(V[1, 1]))],
                         ["x2", b[2], float(np.sqrt(V[2, 2]))]], "nobs": n, "seconds": time.perf_counter() - t0,
                  "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def _json_of(out: str) -> dict:
    return json.loads(out.strip().splitlines()[-1])


def run(rows: int = 10_000_000, g1: int = 1_000_000, g2: int = 1000, cores: int = 2,
        baseline: bool = True) -> dict:
    from synth import hdfe_frame

    work = OUT / "work" / f"hdfe_{rows}_{g1}_{g2}"
    data = work / "data.parquet"
    if not data.exists():
        work.mkdir(parents=True, exist_ok=True)
        hdfe_frame(rows, g1, g2).to_parquet(data, index=False)
    if (work / "results").exists():
        shutil.rmtree(work / "results")
    (work / "study.toml").write_text(SPEC)
    numeric_mb = rows * 8 * 8 / 2**20  # y, d, z1, z2, x1, x2 float64; firm, year int64
    fig: dict = {"rows": rows, "levels": [g1, g2], "numeric_columns_mb": numeric_mb,
                 "machine": machine()}

    r = run_measured([SPECFLOW, "run", str(work / "study.toml"), "--cores", str(cores)], cwd=work)
    fig["specflow_run_s"] = r["wall"]
    fig["specflow_run_peak_rss_mb"] = r["peak_rss_mb"]
    fig["specflow_run_rc"] = r["rc"]
    if r["rc"] != 0:
        fig["specflow_run_output"] = r["out"]
    fig["peak_over_data"] = r["peak_rss_mb"] / numeric_mb

    p = subprocess.run([PY, "-c", PREPARE_ALONE, str(work / "study.toml"), str(work / "prepared.tmp.parquet")],
                       capture_output=True, text=True)
    fig["prepare_job_alone"] = _json_of(p.stdout) if p.returncode == 0 else {"error": p.stderr[-2000:]}
    (work / "prepared.tmp.parquet").unlink(missing_ok=True)

    prepared = work / "results" / "data" / "panel.parquet"
    src = prepared if prepared.exists() else data
    p = subprocess.run([PY, "-c", FIT_ALONE, str(work / "study.toml"), str(src)],
                       capture_output=True, text=True)
    alone = _json_of(p.stdout) if p.returncode == 0 else {"error": p.stderr[-2000:]}
    fig["fit_job_alone"] = alone
    if "peak_rss_mb" in alone:
        fig["fit_job_peak_over_data"] = alone["peak_rss_mb"] / numeric_mb

    if baseline:
        p = subprocess.run([PY, "-c", BASELINE, str(data)], capture_output=True, text=True)
        base = _json_of(p.stdout) if p.returncode == 0 else {"error": p.stderr[-2000:]}
        fig["numpy_baseline"] = base
        cmp = Comparison("specflow (fit job) vs numpy baseline: IV coefficients and SEs")
        if "iv" in base and "iv" in alone:
            for (nm, b, s), (_, bb, bs) in zip(alone["iv"], base["iv"]):
                cmp.add(f"{nm} estimate", b, bb)
                cmp.add(f"{nm} se", s, bs)
            cmp.add("nobs", alone["nobs"], base["nobs"])
        fig["checks"] = [cmp.line()] + cmp.misses[:5]
        fig["checks_ok"] = cmp.ok
    return fig


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--levels", type=int, nargs=2, default=[1_000_000, 1000])
    ap.add_argument("--cores", type=int, default=2)
    ap.add_argument("--no-baseline", action="store_true")
    args = ap.parse_args()
    fig = run(args.rows, args.levels[0], args.levels[1], args.cores, not args.no_baseline)
    write_json(OUT / f"hdfe_{args.rows}.json", fig)
    print(json.dumps(fig, indent=1, default=str))
    if not fig.get("checks_ok", True) or fig["specflow_run_rc"] != 0:
        sys.exit(1)


if __name__ == "__main__":
    main()
