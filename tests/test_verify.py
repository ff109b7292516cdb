"""specflow verify: the package -> verify round trip, tampering, safe zips, number comparisons.

The round trip runs the real workflow twice (the authors' run, then verify's rerun in a
scratch folder); every other test here reuses that package and stops at the manifest check or
compares files directly, so no further rerun is needed.
"""

from __future__ import annotations

import shutil
import stat
import zipfile
from pathlib import Path

import pytest

from specflow.cli import main
from specflow.package import build_package
from specflow.replicate import ManifestCheck, ReplicationError, version_differences
from specflow.spec import load_spec
from specflow.verify import (
    VerifyReport, compare_outputs, compare_tables, compare_text, read_info, safe_extract, verify,
)
from test_package import demo_study


@pytest.fixture(scope="module")
def package(tmp_path_factory):
    """The demo run through `specflow run` and packaged (folder and zip)."""
    from specflow.run import run

    base = tmp_path_factory.mktemp("verify")
    spec = demo_study(base / "study")
    code = run(spec, cores=2)
    assert code == 0
    out = load_spec(spec).output_dir
    assert (out / "runs" / "0001" / "estimates.csv").read_bytes() == (out / "estimates.csv").read_bytes()
    res = build_package(load_spec(spec), base / "package", make_zip=True, pdf=False)
    res.study = spec.parent.parent
    return res


def _copy(package, dest: Path) -> Path:
    shutil.copytree(package.folder, dest)
    return dest


def test_round_trip_in_a_fresh_folder_is_a_full_reproduction(package, tmp_path, capsys):
    fresh = _copy(package, tmp_path / "deposit")
    before = {p: p.read_bytes() for p in fresh.rglob("*") if p.is_file()}
    code = main(["verify", str(fresh), "--cores", "2", "--scratch", str(tmp_path / "scratch")])
    text = capsys.readouterr().out
    assert code == 0, text
    assert "result: full reproduction" in text
    assert "manifest: ok" in text
    info = read_info(fresh)
    for rel in info["outputs"]:
        if not rel.endswith("run.json"):
            assert f"{rel}\n" in text  # every exhibit is reported
    assert " differs " not in text and " missing " not in text
    # the package itself was not touched
    after = {p: p.read_bytes() for p in fresh.rglob("*") if p.is_file()}
    assert after == before


@pytest.mark.parametrize("tamper, expect", [
    ("data_byte", "changed: specs/data/farms.csv"),
    ("table_number", "changed: results/canal_yields/tables/instruments.md"),
    ("delete_output", "missing: results/canal_yields/figures/spec_curve.pdf"),
    ("stray_file", "extra (not in the manifest): results/canal_yields/tables/notes.txt"),
])
def test_tampering_is_named_and_fails_before_any_rerun(package, tmp_path, capsys, tamper, expect):
    p = _copy(package, tmp_path / "deposit")
    if tamper == "data_byte":
        f = p / "specs/data/farms.csv"
        b = bytearray(f.read_bytes())
        b[len(b) // 2] ^= 0x01  # one bit of one byte in the middle of the file
        f.write_bytes(bytes(b))
    elif tamper == "table_number":
        f = p / "results/canal_yields/tables/instruments.md"
        text = f.read_text()
        import re

        m = re.search(r"\d\.\d{3}", text)
        digit = text[m.end() - 1]
        f.write_text(text[:m.end() - 1] + str((int(digit) + 1) % 10) + text[m.end():])
    elif tamper == "delete_output":
        (p / "results/canal_yields/figures/spec_curve.pdf").unlink()
    else:
        (p / "results/canal_yields/tables/notes.txt").write_text("a stray file\n")
    scratch = tmp_path / "scratch"
    code = main(["verify", str(p), "--scratch", str(scratch), "--keep"])
    text = capsys.readouterr().out
    assert code == 1
    assert expect in text
    assert "result: failed reproduction" in text
    assert not (scratch / "rerun").exists()  # stopped at the manifest: no rerun


def test_symlink_in_a_package_is_refused(package, tmp_path):
    p = _copy(package, tmp_path / "deposit")
    (p / "results/canal_yields/link.csv").symlink_to("/etc/hostname")
    rep = verify(p, manifest_only=True)
    assert not rep.ok and "results/canal_yields/link.csv" in rep.manifest.not_regular


def test_data_that_is_not_included_is_checked_once_obtained(package, tmp_path):
    study = tmp_path / "study"
    shutil.copytree(package.study, study)
    spec = study / "specs" / "canal_yields.toml"
    spec.write_text(spec.read_text().replace("redistribute = true", "redistribute = false"))
    p = build_package(load_spec(spec), tmp_path / "deposit", pdf=False).folder
    rep = verify(p)  # stops before a rerun: the data must be obtained first
    assert rep.classification == "failed" and rep.run_exit is None
    assert "specs/data/farms.csv" in rep.problem
    assert not (p / "specs/data").exists()
    (p / "specs/data").mkdir()
    shutil.copyfile(study / "specs/data/farms.csv", p / "specs/data/farms.csv")
    rep = verify(p, manifest_only=True)
    assert rep.ok and rep.manifest.restricted_present == ["specs/data/farms.csv"]
    (p / "specs/data/farms.csv").write_text("farm_id\n1\n")  # not the authors' file
    rep = verify(p, manifest_only=True)
    assert not rep.ok and rep.manifest.changed[0][0] == "specs/data/farms.csv"


def test_a_spec_that_would_write_outside_is_not_run(package, tmp_path):
    import json
    import re

    from specflow.replicate import MANIFEST_NAME, build_manifest

    p = _copy(package, tmp_path / "deposit")
    spec = p / "specs/canal_yields.toml"
    spec.write_text(re.sub(r'(?m)^output = ".*"$', 'output = "../../escaped"', spec.read_text()))
    info = json.loads((p / "replication.json").read_text())
    info["output"] = "../escaped"  # replication.json must not point outside either
    (p / "replication.json").write_text(json.dumps(info))
    (p / MANIFEST_NAME).write_text(build_manifest(p).text())  # a consistent, hostile package
    with pytest.raises(ReplicationError, match="'..' would leave the folder"):
        verify(p)
    info["output"] = "results/canal_yields"
    (p / "replication.json").write_text(json.dumps(info))
    (p / MANIFEST_NAME).write_text(build_manifest(p).text())
    rep = verify(p, keep=True)
    assert rep.classification == "failed" and rep.run_exit is None
    assert "output folder" in rep.problem
    assert not (tmp_path / "escaped").exists() and not (rep.scratch.parent / "escaped").exists()
    shutil.rmtree(rep.scratch)


def test_zip_of_the_package_checks_out(package, tmp_path, capsys):
    code = main(["verify", str(package.zip_path), "--manifest-only"])
    text = capsys.readouterr().out
    assert code == 0 and "manifest: ok" in text


def _zip(path: Path, members: list[tuple[str, bytes, int | None]]) -> Path:
    with zipfile.ZipFile(path, "w") as z:
        for name, data, mode in members:
            zi = zipfile.ZipInfo(name)
            if mode is not None:
                zi.external_attr = mode << 16
            z.writestr(zi, data)
    return path


@pytest.mark.parametrize("name, mode", [
    ("../evil.txt", None),
    ("pkg/../../evil.txt", None),
    ("/tmp/evil.txt", None),
    ("..\\evil.txt", None),
    ("C:/evil.txt", None),
    ("pkg/link", stat.S_IFLNK | 0o777),
])
def test_unsafe_zips_are_refused_whole(tmp_path, name, mode):
    z = _zip(tmp_path / "bad.zip", [("pkg/README.md", b"fine\n", None), (name, b"/etc/passwd", mode)])
    dest = tmp_path / "scratch" / "unpacked"
    dest.mkdir(parents=True)
    with pytest.raises(ReplicationError, match="nothing was extracted"):
        safe_extract(z, dest)
    assert not any(dest.iterdir())  # the safe member was not written either
    assert not (tmp_path / "evil.txt").exists() and not (tmp_path / "scratch" / "evil.txt").exists()


def test_unsafe_zip_on_the_command_line_is_one_line(tmp_path, capsys):
    z = _zip(tmp_path / "bad.zip", [("../evil.txt", b"x", None)])
    assert main(["verify", str(z)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "'..' would leave the folder" in err[0]


def test_changed_numbers_are_named_and_classified_partial(package, tmp_path):
    """compare_outputs on a copy standing in for a rerun (no workflow run needed)."""
    root = package.folder
    work = _copy(package, tmp_path / "rerun")
    t = work / "results/canal_yields/tables/instruments.tex"
    lines = t.read_text().splitlines(keepends=True)
    i = next(k for k, line in enumerate(lines) if "0." in line and "&" in line)
    lines[i] = lines[i].replace("0.", "9.", 1)
    t.write_text("".join(lines))
    (work / "results/canal_yields/tables/default.md").unlink()
    info = read_info(root)
    exhibits = compare_outputs(root, work, info, 1e-6, 1e-9)
    by = {e.path: e for e in exhibits}
    changed = by["results/canal_yields/tables/instruments.tex"]
    assert changed.status == "differs"
    assert any(d.startswith(f"line {i + 1}: package 0.") and ", rerun 9." in d for d in changed.details)
    assert by["results/canal_yields/tables/default.md"].status == "missing"
    assert by["results/canal_yields/estimates.csv"].status == "reproduced"
    rep = VerifyReport(package=root, manifest=ManifestCheck(), exhibits=exhibits, run_exit=0)
    assert rep.classification == "partial" and not rep.ok


def test_estimates_within_tolerance_and_beyond():
    cols = ["spec_id", "term", "estimate", "se", "status"]
    a = [{"spec_id": "a1", "term": "x", "estimate": "0.6", "se": "0.05", "status": "ok"},
         {"spec_id": "a2", "term": "x", "estimate": "", "se": "", "status": "failed"}]
    near = [dict(a[0], estimate=repr(0.6 * (1 + 5e-7))), a[1]]  # within rtol 1e-6
    far = [dict(a[0], estimate=repr(0.6 * (1 + 5e-6))), a[1]]
    assert compare_tables(cols, a, cols, near, 1e-6, 1e-9) == []
    diffs = compare_tables(cols, a, cols, far, 1e-6, 1e-9)
    assert len(diffs) == 1 and diffs[0].startswith("a1/x estimate: package '0.6'")
    gone = compare_tables(cols, a, cols, a[:1], 1e-6, 1e-9)
    assert gone == ["row a2/x: missing in the rerun"]


def test_printed_digits_must_match_exactly(tmp_path):
    a, b = tmp_path / "a.md", tmp_path / "b.md"
    a.write_text("| x | 0.612 | (0.051) |\n| N | 4000 |\n")
    b.write_text("| x | 0.613 | (0.051) |\n| N | 4000 |\n")
    assert compare_text(a, b) == ["line 1: package 0.612, rerun 0.613"]
    b.write_text("| y | 0.612 | (0.051) |\n| N | 4000 |\n")
    assert compare_text(a, b) == ["line 1: same numbers, different text"]


def test_version_differences_are_named():
    rec = {"python": "3.11.7", "specflow": "0.1.0", "packages": {"numpy": "2.4.6", "scipy": "1.17.1"}}
    cur = {"python": "3.12.1", "specflow": "0.1.0", "packages": {"numpy": "2.4.6", "scipy": "1.18.0"}}
    assert version_differences(rec, cur) == [
        "python: package built with 3.11.7, this environment has 3.12.1",
        "scipy: package built with 1.17.1, this environment has 1.18.0",
    ]
