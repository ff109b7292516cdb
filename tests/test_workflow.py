"""The Snakemake workflow through ``specflow run``: results, reruns, failures.

Every test works on a copy of the demo study (``specs/canal_yields.toml`` and its invented data)
in a temporary folder, with ``batch_size = 12`` so that the 45 specifications fall in four
batches, and one extra specification that fails numerically (a sample of one district, so the
clustered covariance has one cluster). The grid runs once per module; the rerun tests copy the
finished study (outputs, Snakemake metadata and modification times included) and edit the copy.
Rerun semantics are asserted on Snakemake's own plan (a dry run that never takes specflow's
"nothing to do" shortcut), and the shortcut is checked to agree with it.
"""

from __future__ import annotations

import json
import math
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from helpers import batch_results

import specflow.diagnostics
from specflow import workflow as sf
from specflow.data import prepare
from specflow.fit import fit
from specflow.grid import expand
from specflow.results import Batch
from specflow.run import nothing_to_do, plan_jobs
from specflow.spec import load_spec

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "specs" / "canal_yields.toml"
FAILING = '[extra."one district"]\nadd_filter = "district == 6"\n\n'
ROBUST = '[extra."heteroskedasticity-robust SEs"]\ncovariance = "robust"'

pytestmark = pytest.mark.skipif(
    not hasattr(specflow.diagnostics, "diagnose"),
    reason="specflow.diagnostics.diagnose is not written yet (fits need it)",
)


def study_text() -> str:
    text = DEMO.read_text(encoding="utf-8")
    text = text.replace('output = "../results/canal_yields"', 'output = "out"\nbatch_size = 12')
    # the tests edit the data, so the pinned checksum goes
    text = re.sub(r'(?m)^sha256 = "[0-9a-f]+"\n', "", text)
    assert ROBUST in text and "[[table]]" in text
    return text.replace("[[table]]", FAILING + "[[table]]", 1)


def run_cli(spec: Path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "specflow.cli", "run", str(spec), *args],
                          capture_output=True, text=True, timeout=600)


def jobs_of(plan: list[dict]) -> list[tuple[str, str]]:
    return sorted((j["rule"], " ".join(j["wildcards"].values())) for j in plan)


def shortcut(spec: Path) -> bool:
    plan = sf.make_plan(load_spec(spec))
    return nothing_to_do(plan, sf.refresh_fingerprints(plan)) is not None


def approx_equal(a, b, path="") -> None:
    """Recursive equality of two JSON trees, floats to 1e-10 relative."""
    if isinstance(a, float) and isinstance(b, float):
        assert math.isclose(a, b, rel_tol=1e-10, abs_tol=1e-12), f"{path}: {a} != {b}"
    elif isinstance(a, dict) and isinstance(b, dict):
        assert a.keys() == b.keys(), f"{path}: keys {sorted(a)} != {sorted(b)}"
        for k in a:
            approx_equal(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list) and isinstance(b, list):
        assert len(a) == len(b), f"{path}: lengths {len(a)} != {len(b)}"
        for i, (x, y) in enumerate(zip(a, b)):
            approx_equal(x, y, f"{path}[{i}]")
    else:
        assert a == b, f"{path}: {a!r} != {b!r}"




def direct_fits(spec: Path) -> dict[str, dict]:
    """Each specification fitted on its own with ``specflow.fit.fit`` (no workflow)."""
    loaded = load_spec(spec)
    df, _ = prepare(loaded, "farms")
    out = {}
    for sp in expand(loaded):
        d = fit(sp, df).model_dump(mode="json")
        d.pop("timing")
        out[sp.id] = d
    return out


@pytest.fixture(scope="module")
def done(tmp_path_factory):
    """The study, copied and run once through ``specflow run`` (the CLI, in a subprocess)."""
    root = tmp_path_factory.mktemp("study")
    shutil.copytree(ROOT / "specs" / "data", root / "data")
    spec = root / "canal_yields.toml"
    spec.write_text(study_text(), encoding="utf-8")
    proc = run_cli(spec, "--cores", "2")
    return spec, root / "out", proc


def test_grid_results_equal_fit_of_each_specification(done):
    spec, out, proc = done
    assert proc.returncode == 1, proc.stderr  # one specification fails: documented exit code 1
    got = batch_results(out)
    specs = expand(load_spec(spec))
    assert len(specs) == 45 and sorted(got) == sorted(sp.id for sp in specs)
    want = direct_fits(spec)
    for sid in want:
        approx_equal(got[sid], want[sid], sid)
    # batches are what the plan says: by dataset and id bucket
    plan = sf.make_plan(load_spec(spec))
    assert plan.buckets == {"farms": 4}
    for b, members in plan.batches.items():
        ids = [r.spec_id for r in Batch.model_validate_json((out / "fits" / f"{b}.json").read_text()).results]
        assert ids == [sp.id for sp in members]
        assert all(sf.bucket_of(i, 4) == int(b.rsplit("-", 1)[1]) for i in ids)


def test_baseline_estimate_against_linearmodels(done):
    """The baseline's 2SLS estimate from the workflow equals linearmodels' IV2SLS on the same
    sample, with the absorbed survey round as dummies (linearmodels 7, an independent
    implementation; point estimates do not depend on the covariance convention)."""
    from linearmodels.iv import IV2SLS

    spec, out, _ = done
    loaded = load_spec(spec)
    base = next(sp for sp in expand(loaded) if sp.is_baseline)
    got = batch_results(out)[base.id]["iv"]["terms"][0]
    df, _ = prepare(loaded, "farms")
    cols = ["log_yield", "irrigated_share", "canal_km", "upstream_rain", "log_farm_ha",
            "soil_index", "survey_round"]
    d = df[cols].replace([np.inf, -np.inf], np.nan).dropna()
    exog = pd.concat([d[["log_farm_ha", "soil_index"]],
                      pd.get_dummies(d["survey_round"], prefix="r", dtype=float)], axis=1)
    ref = IV2SLS(d["log_yield"], exog, d["irrigated_share"], d[["canal_km", "upstream_rain"]]).fit()
    assert got["name"] == "irrigated_share"
    assert math.isclose(got["estimate"], ref.params["irrigated_share"], rel_tol=1e-8)
    assert batch_results(out)[base.id]["nobs"] == len(d)


def test_failed_specification_in_summary_and_estimates(done):
    spec, out, proc = done
    sp = next(s for s in expand(load_spec(spec)) if s.extra_name == "one district")
    reason = batch_results(out)[sp.id]["reason"]
    assert "only 1 level" in reason
    assert "45 specifications: 45 fitted, 0 reused, 1 failed" in proc.stdout
    assert f"failed {sp.id} (one district): {reason}" in proc.stdout
    assert "warning: 1 specification(s) failed" in proc.stdout
    est = pd.read_csv(out / "estimates.csv")
    rows = est[est["spec_id"] == sp.id]
    assert len(rows) >= 1 and (rows["status"] == "failed").all()
    assert (rows["reason"] == reason).all()
    assert est["spec_id"].nunique() == 45
    record = json.loads((out / "run.json").read_text())
    assert record["failed"] == 1 and record["fitted"] == 45 and record["specifications"] == 45
    assert record["failures"][0]["spec_id"] == sp.id
    assert record["runtime_seconds"] > 0 and record["full_runtime_seconds"] == record["runtime_seconds"]
    assert (out / "logs" / "snakemake.log").stat().st_size > 0


def test_reruns_follow_content(done, tmp_path, monkeypatch):
    src_spec, _, _ = done
    shutil.copytree(src_spec.parent, tmp_path / "s", symlinks=True)
    spec = tmp_path / "s" / "canal_yields.toml"
    data = tmp_path / "s" / "data" / "farms.csv"
    all_fits = [("fit", b) for b in sf.make_plan(load_spec(spec)).batches]

    # no change: Snakemake plans nothing; the shortcut agrees, and the CLI says so (exit 1:
    # the results hold one failed specification)
    assert plan_jobs(spec) == []
    assert shortcut(spec)
    proc = run_cli(spec)
    assert proc.returncode == 1 and proc.stdout.startswith("nothing to do"), proc.stdout + proc.stderr

    # touched data file, same bytes: nothing
    st = data.stat()
    os.utime(data, ns=(st.st_atime_ns, st.st_mtime_ns + 10**11))
    assert plan_jobs(spec) == []
    assert shortcut(spec)

    # comments and blank lines only: nothing
    spec.write_text("# an added comment\n\n" + spec.read_text().replace("\n[model]\n", "\n# more\n[model]\n"))
    assert plan_jobs(spec) == []
    assert shortcut(spec)

    # new fitting code: every fit batch and collate, but not prepare
    real = sf.code_version
    monkeypatch.setattr(sf, "code_version", lambda step: real(step) + ("-new" if step == "fit" else ""))
    assert jobs_of(plan_jobs(spec)) == sorted(all_fits + [("collate", "")])
    monkeypatch.setattr(sf, "code_version", real)
    assert plan_jobs(spec) == []

    # one variant edited: only the batches of its old and new id, then collate
    before = {sp.extra_name: sp.id for sp in expand(load_spec(spec)) if sp.extra_name}
    spec.write_text(spec.read_text().replace(ROBUST, ROBUST.replace('"robust"', '"unadjusted"')))
    after = {sp.extra_name: sp.id for sp in expand(load_spec(spec)) if sp.extra_name}
    name = "heteroskedasticity-robust SEs"
    old, new = before[name], after[name]
    assert old != new and {k: v for k, v in before.items() if k != name} == \
        {k: v for k, v in after.items() if k != name}
    expect = {("fit", f"farms-{sf.bucket_of(i, 4):03d}") for i in (old, new)}
    assert jobs_of(plan_jobs(spec)) == sorted(expect | {("collate", "")})
    assert not shortcut(spec)
    proc = run_cli(spec, "--cores", "2")
    assert proc.returncode == 1, proc.stderr
    assert "45 specifications: 1 fitted, 44 reused, 1 failed" in proc.stdout
    got = batch_results(tmp_path / "s" / "out")
    approx_equal(got[new], direct_fits(spec)[new], new)
    assert old not in got
    assert plan_jobs(spec) == []
    assert shortcut(spec)

    # new data content: prepare, every fit batch, collate
    original = data.read_bytes()
    lines = original.decode().splitlines(keepends=True)
    cells = lines[1].split(",")
    cells[3] = f"{float(cells[3]) + 0.5:.4f}"  # one farm's yield
    lines[1] = ",".join(cells)
    data.write_bytes("".join(lines).encode())
    assert jobs_of(plan_jobs(spec)) == sorted(all_fits + [("collate", ""), ("prepare", "farms")])
    assert not shortcut(spec)

    # the old bytes back: the fingerprint returns to what the outputs were made from
    data.write_bytes(original)
    assert plan_jobs(spec) == []


def test_plain_snakemake_command_sees_the_same_plan(done):
    spec, out, _ = done
    proc = subprocess.run(
        [str(Path(sys.executable).parent / "snakemake"), "-s", str(ROOT / "workflows" / "Snakefile"),
         "--config", f"spec={spec}", "--cores", "2", "--dry-run"],
        capture_output=True, text=True, timeout=300, cwd=spec.parent)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert "Nothing to be done" in proc.stdout + proc.stderr


def test_crash_names_the_specification_and_log(done, tmp_path, monkeypatch):
    """A crash inside the fitting code (not a numerical failure) stops the batch, names the
    specification and the log, and leaves a note that ``specflow run`` reports."""
    import specflow.fit
    from specflow.errors import RunError
    from specflow.run import Outcome, _crash_report

    src_spec, _, _ = done
    shutil.copytree(src_spec.parent, tmp_path / "s")
    spec = tmp_path / "s" / "canal_yields.toml"
    plan = sf.make_plan(load_spec(spec))
    batch = next(iter(plan.batches))
    victim = plan.batches[batch][0]

    def broken(sp, df, cache=None, diagnose=True):
        raise ZeroDivisionError("simulated bug")

    monkeypatch.setattr(specflow.fit, "fit", broken)
    out = plan.out_dir
    log = str(out / "logs" / "fit" / f"{batch}.log")
    with pytest.raises(RunError) as err:
        sf.fit_batch(spec, batch, plan.members_digest(batch), out / "data" / "farms.parquet",
                     out / "data" / "farms.fingerprint", out / "fits" / f"{batch}.json",
                     reuse=False, log=log)
    msg = str(err.value)
    assert victim.id in msg and log in msg and "ZeroDivisionError: simulated bug" in msg
    note = json.loads(sf.crash_note_path(out, batch).read_text())
    assert note["spec_id"] == victim.id and note["kind"] == "bug"
    lines, code = _crash_report(plan, Outcome(ok=False), out / "logs" / "snakemake.log")
    assert code == 3 and any(victim.id in line and log in line for line in lines)


def test_batches_are_stable_when_the_grid_grows():
    """Adding a specification moves no other specification to another batch (same bucket
    count), and the bucket count is a power of two near N / batch_size."""
    loaded = load_spec(DEMO)
    specs = expand(loaded)
    plan = sf.make_plan(loaded, specs)
    assert plan.buckets == {"farms": 1}  # 44 specifications, automatic size
    assert [sf.bucket_count(n, 100) for n in (1, 100, 101, 250, 1000, 10**6)] == [1, 1, 2, 4, 16, 256]
    assert [sf.bucket_count(n) for n in (44, 99, 100, 500, 501, 1000, 5000)] == [1, 1, 2, 2, 4, 4, 32]
    where = {sp.id: sf.bucket_of(sp.id, 8) for sp in specs}
    fewer = {sp.id: sf.bucket_of(sp.id, 8) for sp in specs[:-1]}
    assert all(where[i] == b for i, b in fewer.items())


def test_fingerprint_file_rewritten_only_when_content_changes(tmp_path):
    shutil.copytree(ROOT / "specs" / "data", tmp_path / "data")
    spec = tmp_path / "s.toml"
    spec.write_text(study_text())
    plan = sf.make_plan(load_spec(spec))
    fp = sf.fingerprint_path(plan.out_dir, "farms")
    first = sf.refresh_fingerprints(plan)["farms"]
    m0 = fp.stat().st_mtime_ns
    os.utime(tmp_path / "data" / "farms.csv")
    assert sf.refresh_fingerprints(plan)["farms"] == first and fp.stat().st_mtime_ns == m0
    with open(tmp_path / "data" / "farms.csv", "a") as f:
        f.write("99999,1,1,5.0,0.5,3.0,0.1,2.0,0.5,300.0\n")
    second = sf.refresh_fingerprints(plan)["farms"]
    assert second.fingerprint != first.fingerprint
    assert fp.read_text().strip() == second.fingerprint


def test_slurm_profile_settings(monkeypatch, tmp_path):
    from specflow.errors import RunError
    from specflow.run import load_profile

    monkeypatch.delenv("SPECFLOW_SLURM_ACCOUNT", raising=False)
    monkeypatch.delenv("SPECFLOW_SLURM_PARTITION", raising=False)
    ex = load_profile("slurm")
    assert ex.name == "slurm" and ex.settings.status_command == "squeue" and ex.settings.no_account
    monkeypatch.setenv("SPECFLOW_SLURM_ACCOUNT", "econ123")
    monkeypatch.setenv("SPECFLOW_SLURM_PARTITION", "short")
    ex = load_profile("slurm")
    assert not ex.settings.no_account
    assert ex.default_resources["slurm_account"] == "econ123"
    assert ex.default_resources["slurm_partition"] == "short"
    (tmp_path / "config.yaml").write_text("executor: slurm\nslurm-no-such-thing: 1\n")
    with pytest.raises(RunError, match="no setting 'no_such_thing'"):
        load_profile(str(tmp_path))
    with pytest.raises(RunError, match="not found"):
        load_profile(str(tmp_path / "missing"))
