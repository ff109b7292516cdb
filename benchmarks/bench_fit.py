"""Per-specification cost of specflow against two baselines, measured in the same run.

The grid (``benchmarks/synth.py``): ``--rows`` rows, one endogenous regressor, up to three
instruments, ten controls, a 40-group cluster; ``--specs`` specifications (4 estimators x 5
instrument sets x samples x control sets), clustered covariance, full diagnostics.

1. **specflow end to end**: ``specflow run study.toml --cores 2`` in a fresh folder (Snakemake,
   prepare, batched fits, collate, tables and report), then the same command again with nothing
   changed (the no-op rerun).
2. **specflow in process**: ``specflow.fit.fit_many`` on the prepared frame (no workflow).
3. **numpy baseline**: a plain per-specification loop written here: select the rows, listwise
   deletion, OLS, first stage, reduced form and the IV estimate (2SLS, LIML, Fuller, two-step
   GMM) with cluster-robust covariance in numpy, with specflow's documented small-sample
   conventions; then the same diagnostics. The diagnostics are specflow's own pure functions
   (``specflow.diagnostics.diagnose``) called on the baseline's own partialled arrays, so both
   sides do the same diagnostic work; re-implementing thirty statistics here would time a
   different code base, not specflow's overhead.
4. **linearmodels directly**: what a researcher would otherwise write, per specification:
   ``IV2SLS``/``IVLIML``/``IVGMM.from_formula(...).fit(cov_type="clustered", debiased=True)``
   for the IV fit and the OLS comparison, then every built-in diagnostic (first-stage
   diagnostics, Cragg-Donald, Kleibergen-Paap, Sargan, Basmann, Durbin, Wu-Hausman, the
   Wooldridge tests, Anderson-Rubin; J and C statistics for GMM). Measured on a sample of
   ``--lm-sample`` specifications spread over the estimators and extrapolated to the grid.

Checks (every run): every coefficient and standard error of specflow's four regressions and every
diagnostic statistic and p-value equal the numpy baseline's to 1e-8 (relative); linearmodels' IV
coefficients equal the baseline's to 1e-8.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import (OUT, SPECFLOW, Comparison, Timer, machine, run_measured,  # noqa: E402
                    write_json)
from synth import SAMPLE_MASKS, write_grid  # noqa: E402


# ---------------------------------------------------------------------------------------------
# the numpy baseline


def _cluster_meat(U: np.ndarray, codes: np.ndarray, G: int, n: int, k: int) -> np.ndarray:
    S = np.column_stack([np.bincount(codes, weights=U[:, j], minlength=G) for j in range(U.shape[1])])
    return (G / (G - 1)) * ((n - 1) / (n - k)) * (S.T @ S)


def numpy_fit(arr: dict, sp, diagnose=None) -> dict:
    """One specification, plainly: see the module docstring (cluster covariance)."""
    from specflow.diagnostics import Design
    from specflow.kernels import Clusters

    m = SAMPLE_MASKS[sp.labels.get("sample", "all")](arr).copy()
    for c in (sp.outcome, *sp.endogenous, *sp.instruments, *sp.controls):
        m &= np.isfinite(arr[c])
    y = arr[sp.outcome][m]
    n = y.size
    Xe = np.column_stack([arr[c][m] for c in sp.endogenous])
    Z = np.column_stack([arr[c][m] for c in sp.instruments])
    W = np.column_stack([np.ones(n)] + [arr[c][m] for c in sp.controls])
    _, g = np.unique(arr[sp.cluster[0]][m], return_inverse=True)
    G = int(g.max()) + 1
    R = np.column_stack([Xe, W])
    Q = np.column_stack([Z, W])
    lst = lambda a, b: np.linalg.lstsq(a, b, rcond=None)[0]  # noqa: E731

    def ols(v, X):
        b = lst(X, v)
        e = v - X @ b
        Xi = np.linalg.inv(X.T @ X)
        V = Xi @ _cluster_meat(X * e[:, None], g, G, n, X.shape[1]) @ Xi
        return b, np.sqrt(np.diag(V))

    def kclass(kappa):
        Rhat = Q @ lst(Q, R)
        Rt = (1 - kappa) * R + kappa * Rhat if kappa != 1 else Rhat
        A = Rt.T @ R
        A = (A + A.T) / 2
        b = np.linalg.solve(A, Rt.T @ y)
        e = y - R @ b
        Ai = np.linalg.inv(A)
        V = Ai @ _cluster_meat(Rt * e[:, None], g, G, n, R.shape[1]) @ Ai
        return b, V

    out = {"ols": ols(y, R), "first_stage": [ols(Xe[:, j], Q) for j in range(Xe.shape[1])],
           "reduced_form": ols(y, Q)}
    k = R.shape[1]
    if sp.estimator == "2sls":
        b, V = kclass(1.0)
    elif sp.estimator in ("liml", "fuller"):
        from scipy.linalg import eigh

        Y = np.column_stack([y, Xe])
        Yw = Y - W @ lst(W, Y)
        Yq = Y - Q @ lst(Q, Y)
        kappa = float(eigh(Yw.T @ Yw, Yq.T @ Yq, eigvals_only=True).min())
        if sp.estimator == "fuller":
            kappa -= sp.fuller_alpha / (n - Q.shape[1])
        b, V = kclass(kappa)
    else:  # two-step GMM: weight = inverse cluster moment covariance at the 2SLS residuals
        b1, _ = kclass(1.0)
        e1 = y - R @ b1
        Wm = np.linalg.inv(_cluster_meat(Q * e1[:, None], g, G, n, k))
        RQ = R.T @ Q
        A = RQ @ Wm @ RQ.T
        A = (A + A.T) / 2
        b = np.linalg.solve(A, RQ @ Wm @ (Q.T @ y))
        e = y - R @ b
        Ai = np.linalg.inv(A)
        Gm = RQ @ Wm
        V = Ai @ (Gm @ _cluster_meat(Q * e[:, None], g, G, n, k) @ Gm.T) @ Ai
    out["iv"] = (b, np.sqrt(np.diag(V)))
    if diagnose is not None:
        Yall = np.column_stack([y, Xe, Z])
        part = Yall - W @ lst(W, Yall)
        p = Xe.shape[1]
        design = Design(y=part[:, 0], X=part[:, 1:1 + p], Z=part[:, 1 + p:], k_exog=W.shape[1],
                        covariance="cluster", clusters=Clusters.from_columns([g]),
                        endog_names=tuple(sp.endogenous), instr_names=tuple(sp.instruments),
                        beta=np.asarray(b[:p], dtype=float), estimator=sp.estimator,
                        level=sp.level)
        out["diagnostics"], out["sets"] = diagnose(design)
    return out


def compare_to_numpy(results: dict, base: dict, cmp: Comparison) -> None:
    """specflow's FitResults (by id, as JSON dicts) against the numpy baseline (by id)."""
    for sid, b in base.items():
        r = results.get(sid)
        if r is None or r["status"] != "ok":
            cmp.misses.append(f"{sid}: specflow result missing or failed ({r and r.get('reason')})")
            continue
        pairs = [("ols", r["ols"], b["ols"]), ("reduced_form", r["reduced_form"], b["reduced_form"]),
                 ("iv", r["iv"], b["iv"])]
        pairs += [(f"first_stage{j}", fs, bb) for j, (fs, bb) in enumerate(zip(r["first_stages"], b["first_stage"]))]
        for role, reg, (coef, se) in pairs:
            for t, bc, bs in zip(reg["terms"], coef, se):
                cmp.add(f"{sid} {role} {t['name']} estimate", t["estimate"], bc)
                cmp.add(f"{sid} {role} {t['name']} se", t["se"], bs)
        for name, d in b.get("diagnostics", {}).items():
            rd = r["diagnostics"].get(name)
            if rd is None:
                cmp.misses.append(f"{sid} diagnostic {name} missing")
                continue
            cmp.add(f"{sid} {name} statistic", rd.get("statistic"), d.statistic)
            cmp.add(f"{sid} {name} p-value", rd.get("pvalue"), d.pvalue)
        rsets = {s["method"]: s for s in r["confidence_sets"]}
        for s in b.get("sets", []):
            rs = rsets.get(s.method)
            if rs is None:
                cmp.misses.append(f"{sid} confidence set {s.method} missing")
                continue
            for (lo, hi), (blo, bhi) in zip(rs["pieces"], s.pieces):
                cmp.add(f"{sid} {s.method} lower", lo, blo)
                cmp.add(f"{sid} {s.method} upper", hi, bhi)


# ---------------------------------------------------------------------------------------------
# linearmodels, as a researcher would call it


def linearmodels_fit(df, sp) -> tuple[float, dict]:
    """Fit one specification with linearmodels and ask for its built-in diagnostics."""
    import warnings

    from linearmodels.iv import IV2SLS, IVGMM, IVLIML

    t0 = time.perf_counter()
    data = df[SAMPLE_MASKS[sp.labels.get("sample", "all")]({c: df[c].to_numpy() for c in df})]
    exog = " + ".join(["1", *sp.controls])
    formula = f"{sp.outcome} ~ {exog} + [{' + '.join(sp.endogenous)} ~ {' + '.join(sp.instruments)}]"
    clusters = data[sp.cluster[0]]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if sp.estimator == "2sls":
            res = IV2SLS.from_formula(formula, data).fit(cov_type="clustered", clusters=clusters, debiased=True)
        elif sp.estimator == "liml":
            res = IVLIML.from_formula(formula, data).fit(cov_type="clustered", clusters=clusters, debiased=True)
        elif sp.estimator == "fuller":
            res = IVLIML.from_formula(formula, data, fuller=sp.fuller_alpha).fit(
                cov_type="clustered", clusters=clusters, debiased=True)
        else:
            res = IVGMM.from_formula(formula, data, weight_type="clustered", clusters=clusters).fit(
                cov_type="clustered", clusters=clusters, debiased=True)
        ols = IV2SLS.from_formula(f"{sp.outcome} ~ {exog} + {' + '.join(sp.endogenous)}", data).fit(
            cov_type="clustered", clusters=clusters, debiased=True)
        diag = {}
        fs = res.first_stage
        for name in ("diagnostics", "individual"):
            diag[name] = getattr(fs, name)
        for name in ("sargan", "basmann", "basmann_f", "wooldridge_regression",
                     "wooldridge_score", "wooldridge_overid", "anderson_rubin", "j_stat"):
            try:
                diag[name] = getattr(res, name)
            except Exception as exc:  # noqa: BLE001 - a statistic it refuses is still asked for
                diag[name] = exc
        for name in ("durbin", "wu_hausman", "c_stat"):
            fn = getattr(res, name, None)
            if fn is not None:
                try:
                    diag[name] = fn()
                except Exception as exc:  # noqa: BLE001
                    diag[name] = exc
        _ = (res.summary, ols.summary, fs.summary)  # the tables a researcher prints
    seconds = time.perf_counter() - t0
    return seconds, {"iv": res.params[list(sp.endogenous)].to_numpy(),
                     "ols": ols.params[list(sp.endogenous)].to_numpy()}


# ---------------------------------------------------------------------------------------------


def _read_results(out_dir: Path) -> dict:
    res = {}
    for p in sorted((out_dir / "fits").glob("*.json")):
        for r in json.loads(p.read_text())["results"]:
            res[r["spec_id"]] = r
    return res


def run(rows: int = 50_000, specs: int = 1000, lm_sample: int = 20, cores: int = 2,
        baseline_every: int = 1) -> dict:
    import pandas as pd

    from specflow.diagnostics import diagnose
    from specflow.fit import fit_many
    from specflow.grid import expand
    from specflow.spec import load_spec

    work = OUT / "work" / f"grid_{rows}_{specs}"
    if work.exists():
        shutil.rmtree(work)
    study = write_grid(work, rows, specs)
    loaded = load_spec(study)
    grid = expand(loaded)
    df = pd.read_parquet(work / "data.parquet")
    arr = {c: df[c].to_numpy() for c in df.columns}
    fig: dict = {"rows": rows, "specs": len(grid), "machine": machine()}

    # numpy baseline (estimates + the same diagnostics), every spec (or every k-th)
    sub = grid[::baseline_every]
    with Timer() as t:
        base = {sp.id: numpy_fit(arr, sp, diagnose) for sp in sub}
    fig["numpy_s"] = t.seconds * len(grid) / len(sub)
    fig["numpy_per_spec_ms"] = 1000 * t.seconds / len(sub)
    with Timer() as t:
        for sp in sub:
            numpy_fit(arr, sp, None)
    fig["numpy_estimates_only_per_spec_ms"] = 1000 * t.seconds / len(sub)

    # specflow end to end, then the no-op rerun
    cmd = [SPECFLOW, "run", str(study), "--cores", str(cores)]
    r1 = run_measured(cmd, cwd=work)
    if r1["rc"] != 0:
        raise SystemExit(f"specflow run failed (exit {r1['rc']}):\n{r1['out']}")
    r2 = run_measured(cmd, cwd=work)
    fig["specflow_run_s"] = r1["wall"]
    fig["specflow_run_peak_rss_mb"] = r1["peak_rss_mb"]
    fig["noop_rerun_s"] = r2["wall"]
    fig["noop_rerun_says"] = r2["out"].strip().splitlines()[-1][:200] if r2["out"].strip() else ""
    results = _read_results(work / "results")
    fits = [r for r in results.values()]
    fig["fit_seconds_in_results"] = sum(r["timing"].get("total", 0.0) for r in fits)
    fig["diagnostics_seconds_in_results"] = sum(r["timing"].get("diagnostics", 0.0) for r in fits)

    # specflow in process (no workflow)
    with Timer() as t:
        inproc = fit_many(grid, df)
    fig["specflow_inprocess_s"] = t.seconds

    cmp = Comparison("specflow run vs numpy baseline")
    compare_to_numpy(results, base, cmp)
    cmp2 = Comparison("specflow in process vs numpy baseline")
    compare_to_numpy({r.spec_id: r.model_dump(mode="json") for r in inproc}, base, cmp2)

    # linearmodels on a sample spread over the grid, extrapolated
    step = max(1, len(grid) // lm_sample)
    lm_specs = grid[::step][:lm_sample]
    lm_times = []
    cmp3 = Comparison("linearmodels IV coefficients vs numpy baseline")
    for sp in lm_specs:
        secs, est = linearmodels_fit(df, sp)
        lm_times.append(secs)
        b = numpy_fit(arr, sp, None)
        for j, x in enumerate(sp.endogenous):
            cmp3.add(f"{sp.id} iv {x}", est["iv"][j], b["iv"][0][j])
            cmp3.add(f"{sp.id} ols {x}", est["ols"][j], b["ols"][0][j])
    fig["linearmodels_per_spec_s"] = float(np.mean(lm_times))
    fig["linearmodels_sampled_specs"] = len(lm_specs)
    fig["linearmodels_extrapolated_s"] = float(np.mean(lm_times)) * len(grid)

    fig["ratio_run_vs_numpy"] = fig["specflow_run_s"] / fig["numpy_s"]
    fig["ratio_inprocess_vs_numpy"] = fig["specflow_inprocess_s"] / fig["numpy_s"]
    fig["speedup_run_vs_linearmodels"] = fig["linearmodels_extrapolated_s"] / fig["specflow_run_s"]
    fig["checks"] = [c.line() for c in (cmp, cmp2, cmp3)]
    fig["checks_ok"] = all(c.ok for c in (cmp, cmp2, cmp3))
    fig["check_misses"] = (cmp.misses + cmp2.misses + cmp3.misses)[:20]
    return fig


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=50_000)
    ap.add_argument("--specs", type=int, default=1000)
    ap.add_argument("--lm-sample", type=int, default=20)
    ap.add_argument("--cores", type=int, default=2)
    args = ap.parse_args()
    fig = run(args.rows, args.specs, args.lm_sample, args.cores)
    write_json(OUT / f"fit_{args.rows}_{args.specs}.json", fig)
    print(json.dumps(fig, indent=1, default=str))
    if not fig["checks_ok"]:
        sys.exit(1)


if __name__ == "__main__":
    main()
