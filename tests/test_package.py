"""specflow package: contents, manifest, README sections and exhibit mapping, licences, wheel.

Outputs here come from real fits of the demo study (``specflow.fit.fit_many`` and
``specflow.collate.build_all``, the functions the workflow's jobs call), written in the
workflow's layout; the round trip through ``specflow run`` and ``specflow verify`` is in
tests/test_verify.py.
"""

from __future__ import annotations

import hashlib
import json
import re
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

from specflow.cli import main
from specflow.package import build_package, make_pdf
from specflow.replicate import (
    MANIFEST_NAME, ReplicationError, dependency_versions, read_manifest, runtime_bucket,
)
from specflow.spec import load_spec

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "specs" / "canal_yields.toml"
DEMO_DATA = ROOT / "specs" / "data" / "farms.csv"

# The section headings of the social-science data editors' template README (from memory of
# the template's structure: https://social-science-data-editors.github.io/template_README/).
TEMPLATE_SECTIONS = [
    "## Overview",
    "## Data Availability and Provenance Statements",
    "### Statement about Rights",
    "### License for Data",
    "### Summary of Availability",
    "### Details on each Data Source",
    "## Dataset list",
    "## Computational requirements",
    "### Software Requirements",
    "### Controlled Randomness",
    "### Memory, Runtime, Storage Requirements",
    "## Description of programs/code",
    "### License for Code",
    "## Instructions to Replicators",
    "## List of tables and programs",
    "## References",
]


def demo_study(folder: Path, edit=None) -> Path:
    """Copy the demo spec and data into ``folder`` (layout specs/, results/); return the spec."""
    (folder / "specs" / "data").mkdir(parents=True)
    shutil.copyfile(DEMO_DATA, folder / "specs" / "data" / "farms.csv")
    text = DEMO.read_text(encoding="utf-8")
    if edit:
        text = edit(text)
    spec = folder / "specs" / "canal_yields.toml"
    spec.write_text(text, encoding="utf-8")
    return spec


def fit_outputs(spec: Path, run_seconds: float | None = None) -> Path:
    """Fit every specification and write the workflow's outputs (fingerprints, fits, collate)."""
    from specflow import collate
    from specflow.cli import _load_checked
    from specflow.fit import fit_many
    from specflow.results import Batch
    from specflow.workflow import make_plan, refresh_fingerprints

    loaded, specs, frames = _load_checked(str(spec))
    out = loaded.output_dir
    plan = make_plan(loaded, specs)
    prints = refresh_fingerprints(plan)
    results = fit_many(specs, frames["farms"])
    by_id = {r.spec_id: r for r in results}
    for batch, members in plan.batches.items():
        p = out / "fits" / f"{batch}.json"
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(Batch(batch=batch, results=[by_id[m.id] for m in members]).model_dump_json(indent=1))
    collate.build_all(loaded, specs, results, out)
    # the fields of run.json (written by specflow.run) that the package and snapshots read
    record = {"cores": 2, "finished": "2026-12-02T10:00:00Z",
              "datasets": {n: {"file_sha256": p.file_sha256, "fingerprint": p.fingerprint}
                           for n, p in prints.items()}}
    if run_seconds is not None:
        record["runtime_seconds"] = run_seconds
    (out / "run.json").write_text(json.dumps(record))
    return out


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """The demo fitted once, and its package (no PDF: that has its own test)."""
    base = tmp_path_factory.mktemp("pkg")
    spec = demo_study(base / "study")
    out = fit_outputs(spec, run_seconds=754.0)
    res = build_package(load_spec(spec), base / "package", make_zip=True, pdf=False)
    return spec, out, res


def test_package_has_every_part(built):
    spec, out, res = built
    p = res.folder
    for rel in ["README.md", "LICENSE.txt", MANIFEST_NAME, "replication.json", "requirements.txt",
                "software/specflow-0.1.0-py3-none-any.whl", "workflow/Snakefile",
                "specs/canal_yields.toml", "specs/data/farms.csv",
                "results/canal_yields/estimates.csv", "results/canal_yields/exhibits.json"]:
        assert (p / rel).is_file(), rel
    # the spec and the data are byte-identical copies (so ids and checksums hold)
    assert (p / "specs/canal_yields.toml").read_bytes() == spec.read_bytes()
    assert (p / "specs/data/farms.csv").read_bytes() == DEMO_DATA.read_bytes()
    # every table and figure of the run is in the package; prepared data and logs are not
    for f in out.rglob("*"):
        rel = f.relative_to(out).as_posix()
        if f.is_file() and rel.split("/")[0] in ("tables", "figures", "fits"):
            assert (p / "results/canal_yields" / rel).read_bytes() == f.read_bytes(), rel
    assert not (p / "results/canal_yields/data").exists()
    assert not list(p.rglob("*.parquet.tmp*"))


def test_manifest_lists_every_file_with_sha256_and_size(built):
    _, _, res = built
    p = res.folder
    m = read_manifest(p)
    files = sorted(f.relative_to(p).as_posix() for f in p.rglob("*") if f.is_file())
    assert sorted(m.files) == [f for f in files if f != MANIFEST_NAME]
    for rel, (digest, size) in m.files.items():
        data = (p / rel).read_bytes()
        assert digest == hashlib.sha256(data).hexdigest() and size == len(data), rel  # hashlib
    # GNU coreutils reads the same file (an outside check of the format)
    if shutil.which("sha256sum"):
        r = subprocess.run(["sha256sum", "-c", "--strict", "--quiet", MANIFEST_NAME], cwd=p,
                           capture_output=True, text=True)
        assert r.returncode == 0, r.stdout + r.stderr


def test_readme_has_every_template_section_and_maps_every_exhibit(built):
    _, out, res = built
    text = (res.folder / "README.md").read_text()
    positions = [text.find(h + "\n") for h in TEMPLATE_SECTIONS]
    assert all(i >= 0 for i in positions), [h for h, i in zip(TEMPLATE_SECTIONS, positions) if i < 0]
    assert positions == sorted(positions), "sections out of the template's order"
    # the list of tables and programs names every table and figure file produced
    section = text[text.index("## List of tables and programs"):text.index("## References")]
    produced = [f.relative_to(out.parent.parent).as_posix() for f in out.rglob("*")
                if f.is_file() and f.relative_to(out).parts[0] in ("tables", "figures")]
    assert produced
    for rel in produced:
        assert f"`{rel}`" in section, rel
    # ... with the specification ids behind each table (from the collator's exhibits.json)
    exhibits = json.loads((out / "exhibits.json").read_text())
    for line in section.splitlines():
        m = re.search(r"`results/canal_yields/tables/(\w+)\.tex`", line)
        if m:
            ids = exhibits[f"tables/{m.group(1)}"]
            assert ids and all(f"`{i}`" in line for i in ids), m.group(1)
    # the two replicator commands, as a numbered list
    steps = re.findall(r"^(\d)\. `(.+)`$", text, flags=re.M)
    assert [s[0] for s in steps] == ["1", "2"]
    assert "pip install -r requirements.txt" in steps[0][1]
    assert steps[1][1].startswith(".venv/bin/specflow run specs/canal_yields.toml")
    # runtime 754 s is in the template's 10-60 minutes bucket; the seed and its line are named
    assert "- [x] 10-60 minutes" in text and "- [ ] < 10 minutes" in text
    assert "seed = 20261202" in text and "(line 10)" in text


def test_runtime_buckets_edges():
    # bucket bounds as the template lists them (<10 min, 10-60 min, 1-2 h, 2-8 h, 8-24 h, 1-3 d, 3-14 d)
    assert runtime_bucket(599.9) == "< 10 minutes"
    assert runtime_bucket(600) == "10-60 minutes"
    assert runtime_bucket(3600) == "1-2 hours"
    assert runtime_bucket(8 * 3600 - 1) == "2-8 hours"
    assert runtime_bucket(86400) == "1-3 days"
    assert runtime_bucket(14 * 86400) == "> 14 days"


def test_runtime_comes_from_a_full_run(tmp_path):
    from specflow.package import read_run_record

    rec = tmp_path / "run.json"
    # the fields specflow.run writes: runtime of this run, of the last full run, and the counts
    rec.write_text(json.dumps({"runtime_seconds": 4.1, "full_runtime_seconds": 754.0,
                               "fitted": 0, "specifications": 44}))
    assert read_run_record(tmp_path)["runtime_seconds"] == 754.0
    rec.write_text(json.dumps({"runtime_seconds": 4.1, "fitted": 3, "specifications": 44}))
    got = read_run_record(tmp_path)
    assert "runtime_seconds" not in got and got["partial_run"] == (3, 44)


def test_requirements_pin_the_running_versions(built):
    from importlib.metadata import version

    _, _, res = built
    lines = [x for x in (res.folder / "requirements.txt").read_text().splitlines()
             if x and not x.startswith("#")]
    pins = dict(x.split("==") for x in lines[:-1])
    assert lines[-1] == "./software/specflow-0.1.0-py3-none-any.whl"
    for name in ("numpy", "pandas", "scipy", "linearmodels", "pydantic", "snakemake", "jinja2"):
        assert pins[name] == version(name), name
    assert pins == dependency_versions()
    assert "pytest" not in pins  # test extras are not part of the run's environment


def test_requirements_resolve_without_an_index(built):
    """pip itself reads the file: every pin is satisfiable here and the wheel installs."""
    _, _, res = built
    r = subprocess.run([sys.executable, "-m", "pip", "install", "--dry-run", "--no-index",
                        "--quiet", "--report", "-", "-r", "requirements.txt"],
                       cwd=res.folder, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr[-2000:]
    report = json.loads(r.stdout)
    names = {i["metadata"]["name"] for i in report["install"]}
    assert names == {"specflow"}, names  # everything else is already at the pinned version


def test_wheel_is_complete_and_installable(built, tmp_path):
    _, _, res = built
    wheel = res.folder / "software" / "specflow-0.1.0-py3-none-any.whl"
    target = tmp_path / "site"
    r = subprocess.run([sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", "--no-index",
                        "--target", str(target), str(wheel)], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    code = ("import specflow, specflow.workflow as w, specflow.cli as c; "
            "print(specflow.__file__); print(w.snakefile().is_file()); "
            "import importlib.resources as r; "
            "print(r.files('specflow').joinpath('templates', 'package_README.md.j2').is_file())")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                       env={"PYTHONPATH": str(target), "PATH": "/usr/bin:/bin"}, cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    where, snakefile, template = r.stdout.split()
    assert where.startswith(str(target)) and snakefile == "True" and template == "True"
    with zipfile.ZipFile(wheel) as z:
        names = z.namelist()
        record = z.read("specflow-0.1.0.dist-info/RECORD").decode()
    assert "specflow-0.1.0.dist-info/METADATA" in names
    assert all(n in record for n in names)


def test_zip_is_deterministic_and_holds_the_folder(built, tmp_path):
    from specflow.package import write_zip

    spec, _, res = built
    with zipfile.ZipFile(res.zip_path) as z:
        names = z.namelist()
        assert all(n.startswith("package/") for n in names)
        assert sorted(n[len("package/"):] for n in names) == sorted(
            f.relative_to(res.folder).as_posix() for f in res.folder.rglob("*") if f.is_file())
        assert z.testzip() is None
    write_zip(res.folder, tmp_path / "again.zip")
    assert (tmp_path / "again.zip").read_bytes() == res.zip_path.read_bytes()
    # a second build gives the same files (the wheel aside: it is built from the live source)
    again = build_package(load_spec(spec), tmp_path / "package", pdf=False)
    strip = lambda p: re.sub(r"# size \d+\n\w+  software/.*\n", "", (p / MANIFEST_NAME).read_text())  # noqa: E731
    assert strip(again.folder) == strip(res.folder)


def test_refuses_outputs_older_than_the_data(built, tmp_path):
    spec, out, _ = built
    study = tmp_path / "study"
    shutil.copytree(spec.parent.parent, study)
    data = study / "specs" / "data" / "farms.csv"
    text = (study / "specs" / "canal_yields.toml").read_text()
    (study / "specs" / "canal_yields.toml").write_text(re.sub(r'(?m)^sha256 = ".*"\n', "", text))
    lines = data.read_text().splitlines(keepends=True)
    data.write_text("".join(lines[:-3]))  # three rows fewer: the outputs no longer belong to it
    with pytest.raises(ReplicationError, match="not from the current data"):
        build_package(load_spec(study / "specs" / "canal_yields.toml"), tmp_path / "p", pdf=False)
    with pytest.raises(ReplicationError, match="inside the output folder"):
        build_package(load_spec(spec), out / "pkg", pdf=False)


def test_missing_metadata_is_reported_not_blank(built, tmp_path, capsys):
    def strip(text):
        for key in ("source", "citation", "licence", "access", "description"):
            text = re.sub(rf'(?ms)^{key} = """.*?"""\n', "", text)
            text = re.sub(rf'(?m)^{key} = ".*"\n', "", text)
        return text.replace("redistribute = true", "redistribute = false")

    # metadata is in no specification id or data fingerprint: the fitted outputs still belong
    study = tmp_path / "study"
    shutil.copytree(built[0].parent.parent, study)
    spec = study / "specs" / "canal_yields.toml"
    spec.write_text(strip(spec.read_text()))
    (study / "results/canal_yields/run.json").unlink()
    code = main(["package", str(spec), "--out", str(tmp_path / "p"), "--no-pdf"])
    assert code == 0
    err = capsys.readouterr().err
    for key in ("[study] description", "[data.farms] source", "[data.farms] citation",
                "[data.farms] licence", "[data.farms] access", "[package] contact",
                "[package] exhibits", "measured runtime"):
        assert key in err, key
    readme = (tmp_path / "p" / "README.md").read_text()
    assert "not given in the spec (`[data.farms] citation`)" in readme
    assert "No data file may be redistributed" in readme
    # the data file stays out; the manifest keeps its checksum for a replicator's copy
    assert not (tmp_path / "p" / "specs" / "data" / "farms.csv").exists()
    m = read_manifest(tmp_path / "p")
    digest = hashlib.sha256(DEMO_DATA.read_bytes()).hexdigest()
    assert m.not_included == {"specs/data/farms.csv": (digest, DEMO_DATA.stat().st_size)}


# SHA-256 of the official plain-text licences (from memory: the files published at
# apache.org/licenses/LICENSE-2.0.txt and creativecommons.org/{publicdomain/zero/1.0,
# licenses/by/4.0}/legalcode.txt; Debian ships the same bytes in /usr/share/common-licenses).
OFFICIAL_SHA256 = {
    "Apache-2.0": "cfc7749b96f63bd31c3c42b5c471bf756814053e847c10f3eb003417bc523d30",
    "CC-BY-4.0": "9ba9550ad48438d0836ddab3da480b3b69ffa0aac7b7878b5a0039e7ab429411",
    "CC0-1.0": "a2010f343487d3f7618affe54f789f5487602331c0a8d03f49e9a7c547cf0499",
}


@pytest.mark.parametrize("licence", ["MIT", "BSD-3-Clause", "Apache-2.0", "CC-BY-4.0", "CC0-1.0"])
def test_licence_texts(licence):
    from specflow.package import licence_text

    text = licence_text(licence, "A. Author", 2026)
    if licence in OFFICIAL_SHA256:
        assert hashlib.sha256(text.encode()).hexdigest() == OFFICIAL_SHA256[licence]
        common = Path("/usr/share/common-licenses") / licence
        if common.is_file():  # Debian's copy (outside the project)
            assert common.read_text() == text
    else:
        assert "Copyright (c) 2026" in text and "A. Author" in text
        # fixed phrases of the SPDX texts (spdx.org/licenses/MIT, /BSD-3-Clause)
        phrase = {"MIT": "Permission is hereby granted, free of charge, to any person obtaining a copy",
                  "BSD-3-Clause": "Neither the name of the copyright holder nor the names of its"}[licence]
        assert phrase in text


def test_readme_pdf_when_a_converter_exists(built, tmp_path):
    _, _, res = built
    pdf = tmp_path / "README.pdf"
    why = make_pdf(res.folder / "README.md", pdf, timeout=90)
    if why:
        pytest.skip(f"no converter: {why}")
    assert pdf.read_bytes()[:5] == b"%PDF-"
