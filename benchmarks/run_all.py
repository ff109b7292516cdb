"""The standard benchmark set (``make bench``): prints a table of figures, writes benchmarks/out/latest.md.

1. CLI cold start: ``specflow --help`` and ``specflow check`` (bench_cli.py);
2. the grid: 1,000 specifications on 50,000 rows through ``specflow run``, beside a plain numpy
   loop and linearmodels called directly (bench_fit.py), and the no-op rerun;
3. high-dimensional fixed effects: 10 million rows, effects of 1,000,000 and 1,000 levels
   (bench_hdfe.py).

Every part checks its estimates against its baseline to 1e-8 and the run fails if one differs.
``--quick`` runs small sizes (a smoke test of the benchmarks themselves, not the goals).
These are benchmarks, not tests: nothing here runs in CI.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_cli  # noqa: E402
import bench_fit  # noqa: E402
import bench_hdfe  # noqa: E402
from common import OUT, machine, write_json  # noqa: E402

GOALS = {
    "help": ("`specflow --help`", "< 0.3 s"),
    "ratio": ("grid through `specflow run` / numpy baseline", "<= 3x"),
    "lm": ("linearmodels directly / `specflow run`", ">= 15x"),
    "noop": ("no-op rerun", "< 2 s"),
    "hdfe": ("HDFE peak RSS / numeric data", "< 4x"),
}


def _fmt_s(x: float) -> str:
    return f"{x:.2f} s" if x < 100 else f"{x:.0f} s"


def table(cli: dict, grid: dict, hdfe: dict | None) -> list[tuple[str, str, str, str]]:
    rows = [
        ("`specflow --help` (median of runs)", _fmt_s(cli["help"]["median_s"]), GOALS["help"][1],
         "heavy imports: " + (", ".join(cli["help"]["heavy_imports"]) or "none")),
        ("`specflow check` on the grid (median)", _fmt_s(cli["check"]["median_s"]), "",
         "imports: " + ", ".join(cli["check"]["heavy_imports"])),
        (f"grid: {grid['specs']} specs x {grid['rows']:,} rows, `specflow run`",
         _fmt_s(grid["specflow_run_s"]), "", f"peak RSS {grid['specflow_run_peak_rss_mb']:.0f} MB"),
        ("grid: numpy baseline (estimates + same diagnostics)", _fmt_s(grid["numpy_s"]), "",
         f"{grid['numpy_per_spec_ms']:.1f} ms/spec ({grid['numpy_estimates_only_per_spec_ms']:.1f} without diagnostics)"),
        ("grid: specflow in process (`fit_many`, no workflow)", _fmt_s(grid["specflow_inprocess_s"]), "",
         f"{1000 * grid['specflow_inprocess_s'] / grid['specs']:.1f} ms/spec"),
        ("grid: linearmodels directly (extrapolated)", _fmt_s(grid["linearmodels_extrapolated_s"]), "",
         f"{grid['linearmodels_per_spec_s']:.2f} s/spec measured on {grid['linearmodels_sampled_specs']} specs"),
        ("ratio `specflow run` / numpy", f"{grid['ratio_run_vs_numpy']:.2f}x", GOALS["ratio"][1], ""),
        ("speed-up `specflow run` vs linearmodels", f"{grid['speedup_run_vs_linearmodels']:.0f}x",
         GOALS["lm"][1], ""),
        ("no-op rerun", _fmt_s(grid["noop_rerun_s"]), GOALS["noop"][1], grid.get("noop_rerun_says", "")[:90]),
    ]
    if hdfe:
        alone = hdfe.get("fit_job_alone", {})
        rows += [
            (f"{hdfe['rows']:,} rows, FE {hdfe['levels'][0]:,} + {hdfe['levels'][1]:,} levels: `specflow run`",
             _fmt_s(hdfe["specflow_run_s"]), "completes",
             f"exit {hdfe['specflow_run_rc']}; fit job alone {alone.get('fit_s', float('nan')):.1f} s "
             f"(diagnostics {alone.get('timing', {}).get('diagnostics', float('nan')):.1f} s)"),
            ("HDFE: peak RSS of the run / numeric data",
             f"{hdfe['peak_over_data']:.2f}x", GOALS["hdfe"][1],
             f"{hdfe['specflow_run_peak_rss_mb']:.0f} MB vs {hdfe['numeric_columns_mb']:.0f} MB"),
        ]
        if "fit_job_peak_over_data" in hdfe:
            rows.append(("HDFE: peak RSS of the fit job alone / numeric data",
                         f"{hdfe['fit_job_peak_over_data']:.2f}x", "",
                         f"{alone.get('peak_rss_mb', 0):.0f} MB"))
        prep = hdfe.get("prepare_job_alone", {})
        if "peak_rss_mb" in prep:
            rows.append(("HDFE: peak RSS of the prepare job alone / numeric data",
                         f"{prep['peak_rss_mb'] / hdfe['numeric_columns_mb']:.2f}x", "",
                         f"{prep['peak_rss_mb']:.0f} MB, {prep['seconds']:.1f} s"))
        if "numpy_baseline" in hdfe and "seconds" in hdfe["numpy_baseline"]:
            rows.append(("HDFE: numpy baseline (AP demeaning + 2SLS)",
                         _fmt_s(hdfe["numpy_baseline"]["seconds"]), "",
                         f"peak RSS {hdfe['numpy_baseline']['peak_rss_mb']:.0f} MB"))
    return rows


def markdown(rows, checks: list[str], mach: dict, started: str) -> str:
    out = [f"# specflow benchmarks ({started})", "",
           f"Machine: {mach.get('cpu')}, {mach.get('cpus')} cores, {mach.get('memory_gib')} GiB, "
           f"Python {mach.get('python')}; BLAS: {mach.get('blas')}; "
           f"load average at start {mach.get('load_average')}; "
           f"BLAS environment: {mach.get('env') or 'defaults'}.", "",
           "| measure | value | goal | notes |", "| --- | --- | --- | --- |"]
    out += [f"| {a} | {b} | {c} | {d} |" for a, b, c, d in rows]
    out += ["", "Checks (estimates against the baselines):", ""]
    out += [f"- {c}" for c in checks]
    return "\n".join(out) + "\n"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes: check the benchmarks run")
    ap.add_argument("--skip-hdfe", action="store_true", help="leave out the 10M-row benchmark")
    args = ap.parse_args()
    started = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())
    mach = machine()
    rows_, specs, lm, hd = (50_000, 1000, 20, (10_000_000, 1_000_000, 1000))
    if args.quick:
        rows_, specs, lm, hd = (5_000, 40, 2, (200_000, 20_000, 50))
    cli = bench_cli.run(repeat=3 if args.quick else 7)
    grid = bench_fit.run(rows_, specs, lm)
    hdfe = None if args.skip_hdfe else bench_hdfe.run(*hd)
    checks = list(grid["checks"]) + (list(hdfe["checks"]) if hdfe else [])
    ok = grid["checks_ok"] and (hdfe is None or (hdfe.get("checks_ok") and hdfe["specflow_run_rc"] == 0))
    rows = table(cli, grid, hdfe)
    text = markdown(rows, checks, mach, started)
    write_json(OUT / "latest.json", {"cli": cli, "grid": grid, "hdfe": hdfe, "machine": mach})
    (OUT / "latest.md").write_text(text)
    print(text)
    print(f"written: {OUT / 'latest.md'}")
    if not ok:
        print("a check against a baseline failed: see above", file=sys.stderr)
        sys.exit(1)


if __name__ == "__main__":
    main()
