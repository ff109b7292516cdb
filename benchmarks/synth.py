"""Synthetic data and spec files for the benchmarks (invented data with a known effect).

Two scenarios:

* ``grid``: ``n`` rows, one endogenous regressor ``d``, three instruments ``z1..z3`` of
  different strength, ten controls ``x1..x10``, a 40-group cluster ``g`` and a 5-level
  ``region``; the outcome ``y`` depends on ``d`` with true effect ``TRUE_EFFECT`` and on an
  unobserved confounder shared with ``d``. :func:`grid_spec` writes a spec TOML whose grid has
  exactly ``n_specs`` specifications: 4 estimators x 5 instrument sets x ``s`` samples x ``c``
  control sets (``n_specs = 20 * s * c`` with ``s <= 5``).
* ``hdfe``: ``n`` rows with two fixed effects (``firm``: ``g1`` levels, ``year``: ``g2``
  levels), instruments and controls, written as Parquet (see :func:`hdfe_frame`).

Run ``python benchmarks/synth.py grid OUT_DIR --rows 50000 --specs 1000`` to write
``OUT_DIR/data.parquet`` and ``OUT_DIR/study.toml``.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import pandas as pd

TRUE_EFFECT = 0.5
N_CONTROLS = 10
N_CLUSTERS = 40
ESTIMATORS = {"2SLS": "2sls", "LIML": "liml", "Fuller": "fuller", "GMM": "gmm"}
INSTRUMENT_SETS = {
    "z1": ["z1"],
    "z1 z2": ["z1", "z2"],
    "z1 z3": ["z1", "z3"],
    "z2 z3": ["z2", "z3"],
    "z1 z2 z3": ["z1", "z2", "z3"],
}
SAMPLES = {  # label -> extra filter (None: all rows)
    "all": None,
    "not region 1": "region != 1",
    "not region 2": "region != 2",
    "x1 above -1": "x1 > -1",
    "x2 below 1": "x2 < 1",
}

# the same filters as numpy masks, for the baselines
SAMPLE_MASKS = {
    "all": lambda a: np.ones(a["y"].shape[0], dtype=bool),
    "not region 1": lambda a: a["region"] != 1,
    "not region 2": lambda a: a["region"] != 2,
    "x1 above -1": lambda a: a["x1"] > -1,
    "x2 below 1": lambda a: a["x2"] < 1,
}


def grid_frame(n: int, seed: int = 7) -> pd.DataFrame:
    """The grid scenario's data: see the module docstring."""
    rng = np.random.default_rng(seed)
    g = rng.integers(0, N_CLUSTERS, n)
    region = rng.integers(1, 6, n)
    ge = rng.normal(0, 0.3, N_CLUSTERS)[g]  # cluster-level shock, so clustering matters
    X = rng.normal(0, 1, (n, N_CONTROLS))
    z = rng.normal(0, 1, (n, 3))
    u = rng.normal(0, 1, n)  # the confounder
    d = 0.6 * z[:, 0] + 0.25 * z[:, 1] + 0.08 * z[:, 2] + X[:, :5].sum(axis=1) * 0.1 + 0.5 * u \
        + rng.normal(0, 1, n)
    y = TRUE_EFFECT * d + X @ np.linspace(0.2, -0.2, N_CONTROLS) + 0.8 * u + ge \
        + rng.normal(0, 1, n) * (1 + 0.3 * np.abs(z[:, 0]))
    cols = {"y": y, "d": d, "z1": z[:, 0], "z2": z[:, 1], "z3": z[:, 2]}
    cols.update({f"x{j + 1}": X[:, j] for j in range(N_CONTROLS)})
    cols.update({"g": g.astype(np.int64), "region": region.astype(np.int64)})
    return pd.DataFrame(cols)


def _factor(n_specs: int) -> tuple[int, int]:
    """(samples, control sets) with 20 * samples * controls == n_specs."""
    if n_specs % 20:
        raise SystemExit(f"--specs must be a multiple of 20 (got {n_specs})")
    rest = n_specs // 20
    for s in (5, 4, 3, 2, 1):
        if rest % s == 0:
            return s, rest // s
    raise AssertionError


def control_sets(c: int) -> dict[str, list[str]]:
    """``c`` control sets: all ten, then each one dropped, then pairs dropped (deterministic)."""
    allc = [f"x{j + 1}" for j in range(N_CONTROLS)]
    out = {"all ten": allc}
    for j in range(N_CONTROLS):
        out[f"drop x{j + 1}"] = [x for x in allc if x != f"x{j + 1}"]
    for a in range(N_CONTROLS):
        for b in range(a + 1, N_CONTROLS):
            out[f"drop x{a + 1} x{b + 1}"] = [x for x in allc if x not in (f"x{a + 1}", f"x{b + 1}")]
    if c > len(out):
        raise SystemExit(f"at most {len(out)} control sets")
    return dict(list(out.items())[:c])


def _toml_list(xs: list[str]) -> str:
    return "[" + ", ".join(f'"{x}"' for x in xs) + "]"


def grid_spec(n_specs: int, data_name: str = "data.parquet", covariance: str = "cluster",
              batch_size: int = 0) -> str:
    """A spec TOML with exactly ``n_specs`` specifications over the grid scenario's data."""
    s, c = _factor(n_specs)
    ctrl = control_sets(c)
    samples = dict(list(SAMPLES.items())[:s])
    lines = [
        "# Benchmark study (invented data from benchmarks/synth.py)",
        "[study]",
        'title = "specflow benchmark grid"',
        'output = "results"',
        *( [f"batch_size = {batch_size}"] if batch_size else [] ),
        "",
        "[data.main]",
        f'path = "{data_name}"',
        "",
        "[model]",
        'outcome = "y"',
        'endogenous = ["d"]',
        'instruments = ["z1", "z2", "z3"]',
        f"controls = {_toml_list(ctrl['all ten'])}",
        'cluster = ["g"]',
        f'covariance = "{covariance}"',
        'estimator = "2sls"',
        "",
        "[axes.estimator]",
        'baseline = "2SLS"',
    ]
    for lab, est in list(ESTIMATORS.items())[1:]:
        lines += [f'[axes.estimator.variants."{lab}"]', f'estimator = "{est}"']
    lines += ["", "[axes.instruments]", 'baseline = "z1 z2 z3"']
    for lab, ins in INSTRUMENT_SETS.items():
        if lab != "z1 z2 z3":
            lines += [f'[axes.instruments.variants."{lab}"]', f"instruments = {_toml_list(ins)}"]
    if s > 1:
        lines += ["", "[axes.sample]", 'baseline = "all"']
        for lab, flt in list(samples.items())[1:]:
            lines += [f'[axes.sample.variants."{lab}"]', f'add_filter = "{flt}"']
    if c > 1:
        lines += ["", "[axes.controls]", 'baseline = "all ten"']
        for lab, cs in list(ctrl.items())[1:]:
            lines += [f'[axes.controls.variants."{lab}"]', f"controls = {_toml_list(cs)}"]
    lines += ["", "[[table]]", 'name = "main"', 'across = "instruments"', ""]
    return "\n".join(lines)


def grid_design(n_specs: int) -> list[dict]:
    """The same grid as :func:`grid_spec`, as plain dicts (for the baselines; same order)."""
    s, c = _factor(n_specs)
    ctrl = control_sets(c)
    out = []
    for est in ESTIMATORS.values():
        for ins in INSTRUMENT_SETS.values():
            for flt in list(SAMPLES.values())[:s]:
                for cs in ctrl.values():
                    out.append(dict(estimator=est, instruments=ins, controls=cs, filter=flt))
    return out


def write_grid(out: Path, rows: int, specs: int, covariance: str = "cluster",
               batch_size: int = 0) -> Path:
    out.mkdir(parents=True, exist_ok=True)
    grid_frame(rows).to_parquet(out / "data.parquet", index=False)
    path = out / "study.toml"
    path.write_text(grid_spec(specs, covariance=covariance, batch_size=batch_size))
    return path


def hdfe_frame(n: int, g1: int, g2: int, seed: int = 11) -> pd.DataFrame:
    """``n`` rows, fixed effects ``firm`` (``g1`` levels) and ``year`` (``g2`` levels).

    Numeric columns: y, d, z1, z2, x1, x2 (float64) and firm, year (int64): 8 columns of
    8 bytes, i.e. 64 bytes a row. The instruments are correlated with the firm effect, so a fit
    that does not absorb it is biased; true effect ``TRUE_EFFECT``.
    """
    rng = np.random.default_rng(seed)
    firm = rng.integers(0, g1, n).astype(np.int64)
    year = rng.integers(0, g2, n).astype(np.int64)
    a = rng.normal(0, 1, g1)[firm]
    b = rng.normal(0, 0.5, g2)[year]
    u = rng.normal(0, 1, n)
    z1 = rng.normal(0, 1, n) + 0.5 * a
    z2 = rng.normal(0, 1, n)
    x1 = rng.normal(0, 1, n) + 0.3 * b
    x2 = rng.normal(0, 1, n)
    d = 0.7 * z1 + 0.3 * z2 + 0.2 * x1 + a + 0.5 * u + rng.normal(0, 1, n)
    y = TRUE_EFFECT * d + 0.3 * x1 - 0.2 * x2 + a + b + 0.7 * u + rng.normal(0, 1, n)
    del a, b, u
    return pd.DataFrame({"y": y, "d": d, "z1": z1, "z2": z2, "x1": x1, "x2": x2,
                         "firm": firm, "year": year})


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("scenario", choices=["grid"])
    ap.add_argument("out", type=Path)
    ap.add_argument("--rows", type=int, default=50_000)
    ap.add_argument("--specs", type=int, default=1000)
    ap.add_argument("--covariance", default="cluster")
    args = ap.parse_args()
    print(write_grid(args.out, args.rows, args.specs, args.covariance))


if __name__ == "__main__":
    main()
