"""The collator: tidy estimates, table selection, determinism, restyling without refits, the CLI.

The shared helpers at the top (demo fits, collated output folders, crafted results) are used by
test_latex.py, test_markdown.py and test_report.py too; each is computed once per test run.

Where the numbers come from: every expected value below is read off the FitResults that
``specflow.fit`` produced (whose statistics are checked against Wooldridge and linearmodels in
test_fit_reference.py) and formatted in the test with Python's own format specs, independently
of the collator's formatting code. The crafted results exercise rendering paths (unbounded
sets, weak first stages, failures) with values chosen for the layout, not as statistics.
"""

from __future__ import annotations

import atexit
import functools
import json
import math
import shutil
import tempfile
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from specflow import collate
from specflow.results import Batch, ConfidenceSet, Diagnostic, FitResult

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "specs" / "canal_yields.toml"
DEMO_TABLES = ["default", "instruments", "controls_and_estimators"]

# ---------------------------------------------------------------------------------------------
# Shared helpers (imported by the other collator test files)


@functools.lru_cache(maxsize=None)
def scratch() -> Path:
    """One scratch folder for the whole test run (removed at exit)."""
    d = Path(tempfile.mkdtemp(prefix="specflow-collate-"))
    atexit.register(shutil.rmtree, d, True)
    return d


def diagnostics_ready() -> bool:
    from specflow import diagnostics

    return hasattr(diagnostics, "diagnose")


@functools.lru_cache(maxsize=None)
def demo_fit():
    """(loaded, specs, results) of the demo study, fitted once."""
    from specflow.cli import _load_checked
    from specflow.fit import fit_many

    loaded, specs, frames = _load_checked(str(DEMO))
    results = fit_many(specs, frames["farms"], diagnose=diagnostics_ready())
    return loaded, specs, results


def write_fits(out: Path, results: list[FitResult], per_batch: int = 10) -> None:
    """Write results as the fit step does: O/fits/<batch>.json, each a results.Batch."""
    (out / "fits").mkdir(parents=True, exist_ok=True)
    for i in range(0, len(results), per_batch):
        b = Batch(batch=f"b{i // per_batch:03d}", results=results[i:i + per_batch])
        (out / "fits" / f"{b.batch}.json").write_text(b.model_dump_json(indent=1))


@functools.lru_cache(maxsize=None)
def demo_out() -> Path:
    """The demo's collated output folder: fits written, then read back and collated."""
    loaded, specs, results = demo_fit()
    out = scratch() / "demo"
    write_fits(out, results)
    collate.build_all(loaded, specs, collate.load_results(out), out)
    return out


SYNTH_TOML = """
[study]
title = "Synthetic check study"
output = "out"

[data.d]
path = "d.csv"

[model]
outcome = "y"
endogenous = ["x"]
instruments = ["z1", "z2"]
controls = ["w"]
covariance = "robust"

[axes.instruments]
baseline = "strong pair"
[axes.instruments.variants."weak one"]
instruments = ["zw"]
[axes.instruments.variants.collinear]
instruments = ["zc"]

[axes.errors]
baseline = "robust"
[axes.errors.variants.unadjusted]
covariance = "unadjusted"
[axes.errors.variants.clustered]
covariance = "cluster"
cluster = ["g"]

[[table]]
name = "hostile"
title = "Labels with | pipes, *stars*, _under_scores_, & 50% #1 {x} ~ ^ \\\\ $"
across = "instruments"
panels = ["iv", "ols", "first_stage", "reduced_form"]
rows = ["se", "ci", "robust_ci", "pvalue", "first_stage_f", "first_stage_f_robust", "effective_f",
        "kp_rk_wald_f", "cragg_donald_f", "overid_p", "endogeneity_p", "ar_p", "nobs", "clusters",
        "indicators", "estimator", "covariance"]
labels = { x = "treat|ment *x* _1_ & 5% #", w = "w_{i}^2 ~ $" }
indicators = { "Control w_1 | yes" = ["w"] }
stars = true
digits = 4
notes = "Synthetic data: the true effect of x is 0.5."
"""


def synth_frame(n: int = 300, seed: int = 7) -> pd.DataFrame:
    """Invented data with a known effect of x on y (0.5) and an endogenous x."""
    rng = np.random.default_rng(seed)
    z1, z2, zw, w = rng.normal(size=(4, n))
    g = np.arange(n) % 25
    v = rng.normal(size=n)
    x = 0.8 * z1 + 0.5 * z2 + 0.02 * zw + 0.3 * w + v
    y = 0.5 * x + 0.2 * w + 0.6 * v + rng.normal(size=n)
    return pd.DataFrame(dict(y=y, x=x, z1=z1, z2=z2, zw=zw, zc=2.0 * w, w=w, g=g))


@functools.lru_cache(maxsize=None)
def synth_fit():
    """(loaded, specs, results) of the synthetic study; its 'collinear' variant fails."""
    from specflow.data import load_frames
    from specflow.fit import fit_many
    from specflow.grid import expand
    from specflow.spec import load_spec

    d = scratch() / "synth"
    d.mkdir(parents=True, exist_ok=True)
    synth_frame().to_csv(d / "d.csv", index=False)
    (d / "study.toml").write_text(textwrap.dedent(SYNTH_TOML).lstrip())
    loaded = load_spec(d / "study.toml")
    specs = expand(loaded)
    frames = load_frames(loaded, ["d"])
    return loaded, specs, fit_many(specs, frames["d"], diagnose=diagnostics_ready())


@functools.lru_cache(maxsize=None)
def synth_out() -> Path:
    loaded, specs, results = synth_fit()
    out = scratch() / "synth" / "out"
    collate.build_all(loaded, specs, list(results), out)
    return out


def craft(results: list[FitResult]) -> list[FitResult]:
    """Rendering fixtures: copies of real results given diagnostics and robust sets of every
    shape (interval, two rays, whole line, half-line) and weak/strong first stages. The
    attached numbers are made up for the layout, not statistics."""
    kinds = ["interval", "two-rays", "whole-line", "half-line"]
    out = []
    for i, r in enumerate(results):
        r = r.model_copy(deep=True)
        if r.status != "ok":
            out.append(r)
            continue
        x = r.endogenous[0]
        h = r.iv.term(x)
        weak = i % 3 == 1
        r.diagnostics = {k: v for k, v in r.diagnostics.items()}
        r.diagnostics[f"first_stage_f:{x}"] = Diagnostic(name="first_stage_f", statistic=4.25 if weak else 123.456)
        r.diagnostics[f"first_stage_f_robust:{x}"] = Diagnostic(name="first_stage_f_robust", statistic=3.5 if weak else 99.0)
        r.diagnostics["effective_f"] = Diagnostic(
            name="effective_f", statistic=3.75 if weak else 87.5,
            extra={"crit_tau10": 23.109, "crit_tau20": 15.06, "weak_tau10": weak})
        r.diagnostics["hansen_j"] = Diagnostic.not_applicable(
            "hansen_j", "the model is exactly identified, so there is nothing to test")
        r.diagnostics["sargan"] = Diagnostic(name="sargan", statistic=0.5, pvalue=0.4795)
        r.diagnostics["control_function"] = Diagnostic(name="control_function", statistic=9.0, pvalue=0.0027)
        r.diagnostics["ar_test"] = Diagnostic(name="ar_test", statistic=30.0, pvalue=0.00001)
        kind = kinds[i % 4]
        a, b = h.estimate - 2.5 * h.se, h.estimate + 2.5 * h.se
        pieces = {"interval": [(a, b)], "two-rays": [(None, a), (b, None)], "whole-line": [],
                  "half-line": [(a, None)]}[kind]
        r.confidence_sets = [cs for cs in r.confidence_sets if cs.method == "wald"] + [ConfidenceSet(
            method="anderson-rubin", term=x, level=0.95,
            kind="union" if kind == "half-line" else kind, pieces=pieces)]
        out.append(r)
    return out


@functools.lru_cache(maxsize=None)
def crafted_out() -> Path:
    loaded, specs, results = demo_fit()
    out = scratch() / "crafted"
    collate.build_all(loaded, specs, craft(list(results)), out)
    return out


def fmt(x: float, d: int) -> str:
    """Reference formatting for the round-trip checks (Python's format spec, no '-0.000')."""
    s = f"{x:.{d}f}"
    return s[1:] if s.startswith("-") and float(s) == 0 else s


# ---------------------------------------------------------------------------------------------
# Tests


def test_estimates_csv_one_row_per_spec_and_term_matching_fit_results():
    loaded, specs, results = demo_fit()
    df = pd.read_csv(demo_out() / "estimates.csv", keep_default_na=False, na_values=[""])
    by_id = {r.spec_id: r for r in results}
    assert len(df) == sum(len(by_id[sp.id].iv.terms) for sp in specs)
    for axis in loaded.spec.axes:
        assert f"axis_{axis}" in df.columns
    for sp in specs:
        r = by_id[sp.id]
        rows = df[df.spec_id == sp.id]
        assert list(rows.term) == [t.name for t in r.iv.terms]
        for a, label in sp.labels.items():
            assert set(rows[f"axis_{a}"]) == {label}
        head = rows.iloc[0]
        assert head.term_role == "endogenous" and head.status == "ok"
        for t, (_, row) in zip(r.iv.terms, rows.iterrows()):
            # CSV floats are written in shortest round-trip form: equality is exact
            assert row.estimate == t.estimate and row.se == t.se and row.p == t.p
            assert row.ci_wald_low == t.ci_low and row.ci_wald_high == t.ci_high
        assert head.nobs == r.nobs
        if r.covariance == "cluster":  # cluster counts only where the SEs are clustered
            assert str(head.clusters) == "; ".join(map(str, r.n_clusters))
        else:
            assert pd.isna(head.clusters)
        assert head.estimator == sp.estimator and head.covariance == sp.covariance
        assert bool(head.is_baseline) == sp.is_baseline
        assert head.extra == (sp.extra_name or "") or (pd.isna(head.extra) and not sp.extra_name)


def test_parquet_holds_the_same_frame_as_the_csv():
    df_csv = pd.read_csv(demo_out() / "estimates.csv")
    df_pq = pd.read_parquet(demo_out() / "estimates.parquet")
    assert list(df_csv.columns) == list(df_pq.columns)
    for c in ["estimate", "se", "p", "ci_wald_low", "ci_wald_high"]:
        np.testing.assert_array_equal(df_csv[c].to_numpy(float), df_pq[c].to_numpy(float))
    assert df_pq["nobs"].dtype.name == "Int64"


def test_robust_sets_of_every_shape_are_written_honestly():
    _, specs, results = demo_fit()
    crafted = {r.spec_id: r for r in craft(list(results))}
    df = pd.read_csv(crafted_out() / "estimates.csv")
    head = df[df.term_role == "endogenous"].set_index("spec_id")
    seen = set()
    for sid, row in head.iterrows():
        cs = crafted[sid].robust_set()
        assert row.ci_robust_method == "anderson-rubin"
        assert row.ci_robust_text == cs.describe("{:.6g}")
        seen.add(row.ci_robust_kind)
        if cs.kind == "interval":
            assert row.ci_robust_low == cs.pieces[0][0] and row.ci_robust_high == cs.pieces[0][1]
        elif cs.kind == "whole-line":
            assert row.ci_robust_low == -math.inf and row.ci_robust_high == math.inf
            assert row.ci_robust_text == "(-inf, inf)"
        elif cs.kind == "two-rays":  # no single pair of bounds describes two rays
            assert math.isnan(row.ci_robust_low) and math.isnan(row.ci_robust_high)
            assert row.ci_robust_text.startswith("(-inf, ") and row.ci_robust_text.endswith(", inf)")
            assert " U " in row.ci_robust_text
        else:  # a half-line [a, inf)
            assert row.ci_robust_low == cs.pieces[0][0] and row.ci_robust_high == math.inf
    assert seen == {"interval", "two-rays", "whole-line", "union"}


def test_diagnostic_columns_and_not_applicable_reasons():
    _, specs, results = demo_fit()
    crafted = {r.spec_id: r for r in craft(list(results))}
    df = pd.read_csv(crafted_out() / "estimates.csv")
    head = df[df.term_role == "endogenous"].set_index("spec_id")
    for sid, row in head.iterrows():
        r = crafted[sid]
        x = r.endogenous[0]
        assert row.first_stage_f == r.diagnostics[f"first_stage_f:{x}"].statistic
        assert row.effective_f == r.diagnostics["effective_f"].statistic
        assert row.effective_f_crit10 == 23.109
        assert bool(row.weak_first_stage) == r.diagnostics["effective_f"].extra["weak_tau10"]
        assert row.endogeneity_p == 0.0027 and row.endogeneity_test == "control function"
        assert row.ar_p == 0.00001
        if r.covariance == "unadjusted":  # Sargan under homoskedastic errors
            assert row.overid_test == "Sargan" and row.overid_p == 0.4795
        else:  # Hansen J otherwise; here not applicable, so empty with the reason
            assert row.overid_test == "Hansen J" and math.isnan(row.overid_p)
            assert "overid_p: the model is exactly identified" in row.not_applicable


def test_failed_specifications_keep_a_row_with_their_reason():
    loaded, specs, results = synth_fit()
    failed = [r for r in results if r.status == "failed"]
    assert failed, "the synthetic study's 'collinear' variant should fail"
    df = pd.read_csv(synth_out() / "estimates.csv", keep_default_na=False)
    for r in failed:
        rows = df[df.spec_id == r.spec_id]
        assert len(rows) == 1
        assert rows.iloc[0].status == "failed" and rows.iloc[0].reason == r.reason
        assert rows.iloc[0].estimate == ""  # no number is made up for a failed fit


def test_unfitted_specifications_are_reported_missing():
    loaded, specs, results = demo_fit()
    out = scratch() / "partial"
    write_fits(out, list(results[:5]))
    got = collate.load_results(out)
    df = collate.tidy_frame(loaded, specs, got)
    assert (df.drop_duplicates("spec_id").status == "missing").sum() == len(specs) - 5
    tables = {td.name: td for td in collate.build_tables(loaded, specs, got)}
    md = collate.render_markdown(tables["instruments"])
    assert "no result" in md and "has not been fitted" in md


def test_load_results_reads_every_batch_and_rejects_a_bad_file():
    from specflow.errors import RunError

    _, _, results = demo_fit()
    got = collate.load_results(demo_out())
    assert sorted(r.spec_id for r in got) == sorted(r.spec_id for r in results)
    bad = scratch() / "bad"
    (bad / "fits").mkdir(parents=True, exist_ok=True)
    (bad / "fits" / "b000.json").write_text('{"batch": 1}')
    with pytest.raises(RunError, match="b000.json: not a specflow result batch"):
        collate.load_results(bad)
    assert collate.load_results(scratch() / "nothing-here") == []


def test_rerun_is_byte_identical():
    loaded, specs, results = demo_fit()
    again = scratch() / "demo-again"
    write_fits(again, list(results))
    paths = collate.build_all(loaded, specs, collate.load_results(again), again)
    first = demo_out()
    assert len(paths) == 3 + 3 * len(DEMO_TABLES) + 2 * (1 + len(DEMO_TABLES)) + 1
    for p in paths:
        rel = p.relative_to(again)
        assert p.read_bytes() == (first / rel).read_bytes(), f"{rel} differs between runs"
    # and in place, over existing files
    collate.build_all(loaded, specs, collate.load_results(again), again)
    for p in paths:
        assert p.read_bytes() == (first / p.relative_to(again)).read_bytes()


def test_build_all_writes_the_contract_files():
    out = demo_out()
    for rel in ["estimates.csv", "estimates.parquet", "report.html", "figures/spec_curve.pdf",
                "figures/spec_curve.png", "exhibits.json"]:
        assert (out / rel).is_file(), rel
    for name in DEMO_TABLES:
        for suffix in [".tex", ".standalone.tex", ".md"]:
            assert (out / "tables" / f"{name}{suffix}").is_file()
        assert (out / "figures" / f"coef_{name}.pdf").read_bytes()[:5] == b"%PDF-"
        assert (out / "figures" / f"coef_{name}.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert not list(out.rglob(".*.tmp-*")), "no temporary files left behind"


def test_figure_metadata_carries_no_timestamp():
    pdf = (demo_out() / "figures" / "spec_curve.pdf").read_bytes()
    assert b"/CreationDate" not in pdf and b"/ModDate" not in pdf


def test_exhibit_map_names_the_specifications_behind_each_exhibit():
    loaded, specs, results = demo_fit()
    m = json.loads((demo_out() / "exhibits.json").read_text())
    by_labels = {tuple(sorted(sp.labels.items())): sp.id for sp in specs if not sp.extra_name}
    base = {a: ax.baseline for a, ax in loaded.spec.axes.items()}
    want = [by_labels[tuple(sorted({**base, "instruments": lab}.items()))]
            for lab in ["canal + rain", "canal only", "rain only"]]
    assert m["tables/instruments"] == want
    assert m["figures/coef_instruments"] == want
    assert sorted(m["figures/spec_curve"]) == sorted(r.spec_id for r in results if r.status == "ok")
    # default table: the baseline, then each variant of each axis with the others at baseline
    n_variants = sum(len(ax.variants) for ax in loaded.spec.axes.values())
    assert len(m["tables/default"]) == 1 + n_variants
    assert m["tables/default"][0] == next(sp.id for sp in specs if sp.is_baseline)


def test_restyling_a_table_needs_no_refit():
    """Change a table's digits in the spec: tables change, estimates.csv does not."""
    from specflow.grid import expand
    from specflow.spec import load_spec_text

    _, _, results = demo_fit()
    text = DEMO.read_text().replace('name = "instruments"', 'name = "instruments"\ndigits = 5')
    loaded2 = load_spec_text(text, DEMO)
    specs2 = expand(loaded2)
    assert collate.frame_csv(collate.tidy_frame(loaded2, specs2, list(results))).encode() == \
        (demo_out() / "estimates.csv").read_bytes()
    tables = {td.name: td for td in collate.build_tables(loaded2, specs2, list(results))}
    base = next(r for r in results if r.spec_id == specs2[0].id)
    md = collate.render_markdown(tables["instruments"])
    assert fmt(base.headline().estimate, 5) in md
    assert md != (demo_out() / "tables" / "instruments.md").read_text()


def test_a_table_selecting_an_excluded_combination_is_a_spec_error(tmp_path):
    from specflow.errors import SpecError
    from specflow.grid import expand
    from specflow.spec import load_spec_text

    _, _, results = demo_fit()
    text = DEMO.read_text() + textwrap.dedent("""
        [[table]]
        name = "impossible"
        columns = [{ instruments = "rain only", estimator = "GMM" }]
        """)
    loaded2 = load_spec_text(text, DEMO)
    with pytest.raises(SpecError) as exc:
        collate.build_all(loaded2, expand(loaded2), list(results), tmp_path)
    (line,) = exc.value.lines()
    assert "table[2].columns" in line and "table 'impossible'" in line and "excluded" in line


def test_cli_tables_rebuilds_from_results(tmp_path, capsys):
    from specflow.cli import main

    _, _, results = demo_fit()
    write_fits(tmp_path, list(results))
    assert main(["tables", str(DEMO), "--out", str(tmp_path)]) == 0
    assert "wrote 21 files" in capsys.readouterr().out
    assert (tmp_path / "tables" / "default.tex").read_bytes() == (demo_out() / "tables" / "default.tex").read_bytes()
    empty = tmp_path / "empty"
    empty.mkdir()
    assert main(["tables", str(DEMO), "--out", str(empty)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no results" in err[0]


def test_overid_and_endogeneity_tests_follow_the_covariance():
    from specflow.tables import endogeneity_key, overid_key

    r = FitResult(spec_id="a", covariance="unadjusted",
                  diagnostics={"durbin": Diagnostic(name="durbin", statistic=1.0, pvalue=0.3)})
    assert overid_key(r) == "sargan" and endogeneity_key(r) == "durbin"
    for cov in ("robust", "cluster", "hac"):
        r = FitResult(spec_id="a", covariance=cov)
        assert overid_key(r) == "hansen_j" and endogeneity_key(r) == "control_function"


@pytest.mark.skipif(not diagnostics_ready(), reason="specflow.diagnostics.diagnose is not written yet")
def test_real_diagnostics_flow_into_the_tidy_frame():
    """With real diagnostics every endogenous row has a robust set and an effective F or a reason."""
    _, specs, results = demo_fit()
    df = pd.read_csv(demo_out() / "estimates.csv", keep_default_na=False)
    head = df[df.term_role == "endogenous"]
    by_id = {r.spec_id: r for r in results}
    for _, row in head.iterrows():
        r = by_id[row.spec_id]
        cs = r.robust_set()
        assert (cs is None) == (row.ci_robust_text == "n.a.")
        d = r.diagnostics.get("effective_f")
        if d is not None and d.applicable:
            assert float(row.effective_f) == d.statistic
        else:
            assert row.effective_f == "" and "effective_f" in row.not_applicable


TWO_ENDOG_TOML = """
[study]
title = "Two endogenous regressors"
output = "out"
[data.d]
path = "d.csv"
[model]
outcome = "y"
endogenous = ["x1", "x2"]
instruments = ["z1", "z2", "z3"]
covariance = "unadjusted"
[axes.est]
baseline = "2SLS"
[axes.est.variants.LIML]
estimator = "liml"
[[table]]
name = "t"
across = "est"
rows = ["se", "robust_ci", "first_stage_f", "effective_f", "overid_p", "endogeneity_p", "nobs"]
"""


def test_two_endogenous_regressors_get_rows_each_and_honest_gaps():
    """Invented data with known effects (0.5, -0.3); checks layout, not the estimates."""
    from specflow.data import load_frames
    from specflow.fit import fit_many
    from specflow.grid import expand
    from specflow.spec import load_spec

    d = scratch() / "two-endog"
    d.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(3)
    z1, z2, z3, v1, v2, e = rng.normal(size=(6, 300))
    x1, x2 = z1 + 0.5 * z3 + v1, z2 + 0.3 * z3 + v2
    pd.DataFrame(dict(y=0.5 * x1 - 0.3 * x2 + 0.5 * v1 + e, x1=x1, x2=x2, z1=z1, z2=z2, z3=z3)
                 ).to_csv(d / "d.csv", index=False)
    (d / "s.toml").write_text(textwrap.dedent(TWO_ENDOG_TOML).lstrip())
    loaded = load_spec(d / "s.toml")
    specs = expand(loaded)
    results = fit_many(specs, load_frames(loaded, ["d"])["d"], diagnose=diagnostics_ready())
    (td,) = [t for t in collate.build_tables(loaded, specs, results) if t.name == "t"]
    iv = td.panels[0]
    labels = [r.label for r in iv.rows]
    assert labels.count("x1") == 1 and labels.count("x2") == 1
    for j, r in enumerate(results):
        for x in ("x1", "x2"):
            row = iv.rows[labels.index(x)]
            assert row.cells[j].text == fmt(r.iv.term(x).estimate, 3)
    stat = {r.label: r for r in td.stats}
    assert "First-stage F: x1" in stat and "First-stage F: x2" in stat
    assert [p.title for p in td.panels[2:]] == ["First stage (dependent variable: x1)",
                                                "First stage (dependent variable: x2)"]
    if diagnostics_ready():
        for j, r in enumerate(results):
            assert stat["First-stage F: x2"].cells[j].text == fmt(r.diagnostics["first_stage_f:x2"].statistic, 2)
            eff = r.diagnostics["effective_f"]
            if not eff.applicable:  # Montiel Olea-Pflueger is for one endogenous regressor
                assert stat["Effective F"].cells[j].text == "n.a."
                assert any(eff.reason.rstrip(".") in n for n in td.notes)
    md = collate.render_markdown(td)
    assert "Overidentification p (Sargan)" in md  # unadjusted errors: Sargan
