"""Data revisions: run snapshots and ``specflow diff``.

The revision scenario: 5% of the demo's rows (200 of 4,000), all of them farms under 1 ha, are
dropped. Every specification whose sample keeps farms under 1 ha must move; the
specifications restricted to farms of 1 ha or more see the same rows and must not.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest

from specflow.cli import main
from specflow.grid import expand
from specflow.replicate import ReplicationError
from specflow.revisions import diff_estimates, list_runs, render_markdown, snapshot
from specflow.spec import load_spec
from test_package import demo_study, fit_outputs


def _no_checksum(text: str) -> str:
    # a revised file has another SHA-256; the spec's sha256 key (not part of any id) goes
    return re.sub(r'(?m)^sha256 = ".*"\n', "", text)


def _drop_small_farms(data_file, n=200, seed=7):
    df = pd.read_csv(data_file)
    rng = np.random.default_rng(seed)
    small = np.flatnonzero(df["farm_ha"].to_numpy() < 1)
    drop = rng.choice(small, size=n, replace=False)
    df.drop(index=drop).to_csv(data_file, index=False)
    return len(df), n


@pytest.fixture(scope="module")
def revised(tmp_path_factory):
    base = tmp_path_factory.mktemp("diff")
    spec = demo_study(base / "study", _no_checksum)
    loaded = load_spec(spec)
    out = fit_outputs(spec)
    first = snapshot(loaded, out)
    rows, dropped = _drop_small_farms(spec.parent / "data" / "farms.csv")
    assert dropped == rows * 0.05
    fit_outputs(spec)
    second = snapshot(loaded, out)
    return spec, out, first, second


def test_snapshots_number_runs_and_note_the_data_change(revised):
    spec, out, first, second = revised
    assert (first.run, first.created, first.previous) == (1, True, None)
    assert (second.run, second.created, second.previous) == (2, True, 1)
    assert list_runs(out) == [1, 2]
    assert (out / "runs/0002/estimates.csv").read_bytes() == (out / "estimates.csv").read_bytes()
    assert len(second.fingerprint_changes) == 1
    assert "dataset 'farms': the data file changed" in second.fingerprint_changes[0]
    assert any("data changed since run 0001" in x for x in second.summary_lines())


def test_diff_lists_the_moved_specifications_and_only_those(revised):
    spec, out, _, _ = revised
    res = diff_estimates(out / "runs/0001/estimates.csv", out / "runs/0002/estimates.csv")
    specs = expand(load_spec(spec))
    # independent expectation from the grid: a sample that keeps farms under 1 ha saw the drop
    keeps_small = {sp.id for sp in specs if "farm_ha >= 1" not in sp.filters}
    assert 0 < len(keeps_small) < len(specs)
    assert set(res.changed_spec_ids) == keeps_small
    assert res.compared == len(specs)  # one endogenous regressor: one row per specification
    assert not res.only_old and not res.only_new
    # the shift in SEs and the N, recomputed from the two files with pandas
    old = pd.read_csv(out / "runs/0001/estimates.csv").set_index(["spec_id", "term"])
    new = pd.read_csv(out / "runs/0002/estimates.csv").set_index(["spec_id", "term"])
    for c in res.changes:
        a, b = old.loc[(c.spec_id, c.term)], new.loc[(c.spec_id, c.term)]
        assert c.shift_se == pytest.approx((b["estimate"] - a["estimate"]) / a["se"], rel=1e-12)
        assert c.old_nobs - c.new_nobs > 0 and "N" in c.columns
        assert (f"moved > 0.5 SE" in c.flags) == (abs(c.shift_se) > 0.5)


def test_rerun_without_change_adds_no_snapshot(revised, tmp_path):
    spec, out, _, second = revised
    again = snapshot(load_spec(spec), out)
    assert (again.created, again.run) == (False, second.run)
    assert list_runs(out) == [1, 2]


def test_only_the_last_keep_runs_are_kept(tmp_path):
    spec = demo_study(tmp_path / "study", lambda t: t.replace(
        "seed = 20261202", "seed = 20261202\nkeep_runs = 2"))
    loaded = load_spec(spec)
    out = loaded.output_dir
    out.mkdir(parents=True)
    numbers = []
    for i in range(3):  # three different estimate files (invented numbers)
        _write(out / "estimates.csv", [dict(spec_id="s1", axis_instruments="z", extra="", term="d",
                                            term_role="endogenous", estimate=0.5 + i, se=0.1, p=0.01,
                                            nobs=100, effective_f=20.0, status="ok")])
        numbers.append(snapshot(loaded, out).run)
    assert numbers == [1, 2, 3]
    assert list_runs(out) == [2, 3]
    assert not [p for p in (out / "runs").iterdir() if p.name.startswith(".")]


def _write(path, rows):
    cols = ["spec_id", "axis_instruments", "extra", "term", "term_role", "estimate", "se", "p",
            "nobs", "effective_f", "status", "warnings"]
    pd.DataFrame(rows, columns=cols).to_csv(path, index=False)


def test_flags_on_invented_estimates(tmp_path):
    # invented numbers with known answers for each flag
    base = dict(axis_instruments="z", extra="", term="d", term_role="endogenous", nobs=1000, status="ok")
    old = [dict(base, spec_id="s1", estimate=0.50, se=0.10, p=0.001, effective_f=30.0),
           dict(base, spec_id="s2", estimate=0.50, se=0.10, p=0.001, effective_f=30.0),
           dict(base, spec_id="s3", estimate=0.05, se=0.10, p=0.600, effective_f=30.0),
           dict(base, spec_id="s4", estimate=0.20, se=0.10, p=0.040, effective_f=30.0),
           dict(base, spec_id="s5", estimate=0.50, se=0.10, p=0.001, effective_f=12.0),
           dict(base, spec_id="s6", estimate=0.50, se=0.10, p=0.001, effective_f=30.0),
           dict(base, spec_id="s7", estimate=0.50, se=0.10, p=0.001, effective_f=30.0),
           dict(base, spec_id="s6", term="w", term_role="exogenous", estimate=1.0, se=0.1, p=0.0,
                effective_f=30.0)]
    new = [dict(old[0], estimate=0.52),  # 0.2 SE: changed, not flagged
           dict(old[1], estimate=0.60, nobs=990),  # 1 SE
           dict(old[2], estimate=-0.02),  # sign (and 0.7 SE)
           dict(old[3], estimate=0.19, p=0.060),  # crossed 5%
           dict(old[4], effective_f=8.0),  # crossed F = 10
           dict(old[5], warnings="reworded warning"),  # same numbers: not a change
           dict(base, spec_id="s8", estimate=0.5, se=0.1, p=0.001, effective_f=30.0),
           dict(old[7], estimate=2.0)]  # a control's row: ignored unless all_terms
    _write(tmp_path / "old.csv", old)
    _write(tmp_path / "new.csv", new)
    res = diff_estimates(tmp_path / "old.csv", tmp_path / "new.csv")
    flags = {c.spec_id: c.flags for c in res.changes}
    assert set(flags) == {"s1", "s2", "s3", "s4", "s5"}
    assert flags["s1"] == []
    assert flags["s2"] == ["moved > 0.5 SE"]
    assert flags["s3"] == ["moved > 0.5 SE", "sign"]
    assert flags["s4"] == ["significance at 0.05"]
    assert flags["s5"] == ["weak IV (effective_f fell below 10)"]
    assert [x[0] for x in res.only_old] == ["s7"] and [x[0] for x in res.only_new] == ["s8"]
    assert {c.spec_id: c.columns for c in res.changes}["s2"] == ["estimate", "N"]
    assert "s6" in diff_estimates(tmp_path / "old.csv", tmp_path / "new.csv", all_terms=True).changed_spec_ids
    # a stricter threshold: s1 (0.2 SE) is flagged at 0.1
    strict = diff_estimates(tmp_path / "old.csv", tmp_path / "new.csv", se_fraction=0.1)
    assert {c.spec_id: c.flags for c in strict.changes}["s1"] == ["moved > 0.1 SE"]
    # with each row's own critical value (the collator's effective_f_crit10): 12 -> 8 against
    # a critical value of 7 crosses nothing; s1's 30 -> 30 against 23 -> 31 does
    for rows, crit in ((old, [23.0, 7, 7, 7, 7, 7, 7, 7]), (new, [31.0, 7, 7, 7, 7, 7, 7, 7])):
        for r, c in zip(rows, crit):
            r["effective_f_crit10"] = c
    pd.DataFrame(old).to_csv(tmp_path / "old.csv", index=False)
    pd.DataFrame(new).to_csv(tmp_path / "new.csv", index=False)
    own = {c.spec_id: c.flags for c in diff_estimates(tmp_path / "old.csv", tmp_path / "new.csv").changes}
    assert own["s5"] == []
    assert own["s1"] == ["weak IV (effective_f fell below its critical value for a 10% worst-case bias)"]
    # Markdown: a GitHub pipe table with one body row per change (parsed by markdown-it-py)
    from markdown_it import MarkdownIt

    tokens = MarkdownIt("commonmark").enable("table").parse(render_markdown(res))
    body_rows = [t for t in tokens if t.type == "tr_open"]
    assert len(body_rows) == 1 + len(res.changes)  # header row + changes


def test_diff_command(revised, capsys):
    spec, out, _, _ = revised
    assert main(["diff", str(spec)]) == 0
    text = capsys.readouterr().out
    assert text.startswith("run 0001 -> run 0002:")
    n = len(diff_estimates(out / "runs/0001/estimates.csv", out / "runs/0002/estimates.csv").changes)
    assert f"{n} changed" in text
    assert main(["diff", str(spec), "1", "2", "--markdown"]) == 0
    md = capsys.readouterr().out
    assert md.startswith("## Estimates: run 0001 -> run 0002")
    assert main(["diff", str(spec), "7"]) == 2
    assert "run 7 is not recorded" in capsys.readouterr().err


def test_diff_needs_two_runs(tmp_path):
    from specflow.revisions import resolve_estimates

    with pytest.raises(ReplicationError, match="0 runs recorded"):
        resolve_estimates(tmp_path, None, "previous")
