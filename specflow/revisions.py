"""Data revisions: a snapshot of every run's estimates, and what moved between two runs.

After each successful run :func:`snapshot` copies ``estimates.csv`` and the datasets'
fingerprints into ``<output>/runs/<NNNN>/`` (numbered from 0001; only the last
``[study] keep_runs`` are kept). A run whose estimates and fingerprints are byte-identical to
the latest snapshot adds none, so that reruns with nothing changed do not push real revisions
out of the history. ``specflow diff`` (:func:`diff_estimates`) compares two snapshots (by
default the last two) or any two ``estimates.csv`` files.

Which change is flagged (every one is listed):

* ``moved``: ``|new - old| > fraction x old SE`` (``--se-fraction``, default 0.5, a choice of
  ours, not a convention);
* ``sign``: the estimate changed sign;
* ``significance``: the p-value crossed the level ``--alpha`` (default 0.05) in either
  direction;
* ``weak IV``: the effective F crossed its Montiel Olea-Pflueger critical value for a 10%
  worst-case bias (column ``effective_f_crit10``, each run's own), or ``--weak-f`` when given;
  where the file has neither, 10, the rule of thumb of Staiger and Stock (1997) (common
  practice), applied to the effective or the first-stage F;
* ``status``: the specification's fit status changed (ok <-> failed).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import uuid
from dataclasses import dataclass, field
from pathlib import Path

from .replicate import ReplicationError

RUNS_DIR = "runs"
RUN_RE = re.compile(r"^\d{4,}$")
ESTIMATES = "estimates.csv"
FINGERPRINTS = "fingerprints.json"
SNAPSHOT_INFO = "snapshot.json"


# ---------------------------------------------------------------------------------------------
# Snapshots


@dataclass
class SnapshotInfo:
    """What :func:`snapshot` did, for the run summary."""

    run: int  # the snapshot that holds this run's estimates
    created: bool  # False: identical to the latest snapshot, none added
    previous: int | None  # the snapshot before this run's (None on the first run)
    path: Path
    fingerprint_changes: list[str] = field(default_factory=list)
    pruned: list[int] = field(default_factory=list)

    def summary_lines(self) -> list[str]:
        if not self.created:
            lines = [f"estimates unchanged since run {self.run:04d} (no new snapshot)"]
        else:
            lines = [f"estimates kept as run {self.run:04d} ({self.path})"]
        if self.fingerprint_changes:
            since = f"run {self.previous:04d}" if self.previous else "the last run"
            lines += [f"data changed since {since}: {c}" for c in self.fingerprint_changes]
            lines.append("see what moved: specflow diff SPEC")
        return lines


def runs_dir(out_dir: Path) -> Path:
    return Path(out_dir) / RUNS_DIR


def list_runs(out_dir: Path) -> list[int]:
    """The snapshot numbers under ``<out>/runs``, oldest first."""
    d = runs_dir(out_dir)
    if not d.is_dir():
        return []
    return sorted(int(p.name) for p in d.iterdir() if p.is_dir() and RUN_RE.match(p.name))


def _run_path(out_dir: Path, n: int) -> Path:
    return runs_dir(out_dir) / f"{n:04d}"


def read_fingerprints(loaded, out_dir: Path) -> dict[str, dict[str, str | None]]:
    """Each dataset's fingerprint file (``data/<name>.fingerprint``, written by the workflow)
    and, from the run record ``run.json``, the SHA-256 of its data file's bytes."""
    out_dir = Path(out_dir)
    try:
        run = json.loads((out_dir / "run.json").read_text(encoding="utf-8"))
        recorded = run.get("datasets", {}) if isinstance(run, dict) else {}
    except (OSError, ValueError):
        recorded = {}
    out: dict[str, dict[str, str | None]] = {}
    for name in sorted(loaded.spec.data):
        p = out_dir / "data" / f"{name}.fingerprint"
        if not p.is_file():
            continue
        fp = p.read_text(encoding="utf-8").strip()
        rec = recorded.get(name) if isinstance(recorded.get(name), dict) else {}
        sha = rec.get("file_sha256") if rec.get("fingerprint") == fp else None
        out[name] = {"fingerprint": fp, "file_sha256": sha}
    return out


def _fingerprint_changes(old: dict, new: dict) -> list[str]:
    out = []
    for name in sorted(set(old) | set(new)):
        if name not in old:
            out.append(f"dataset '{name}' is new")
        elif name not in new:
            out.append(f"dataset '{name}' is no longer used")
        elif old[name].get("fingerprint") != new[name].get("fingerprint"):
            a, b = old[name].get("file_sha256"), new[name].get("file_sha256")
            if a and b and a != b:
                out.append(f"dataset '{name}': the data file changed (SHA-256 {a[:12]}... -> {b[:12]}...)")
            elif a and b:
                out.append(f"dataset '{name}': same file, but its derivations, filter or the "
                           "preparing code changed")
            else:
                out.append(f"dataset '{name}': fingerprint changed (data file, derivations, filter "
                           "or preparing code)")
    return out


def _fingerprints_text(fps: dict) -> str:
    return json.dumps(fps, indent=1, sort_keys=True) + "\n"


def snapshot(loaded, out_dir: Path | None = None) -> SnapshotInfo:
    """Keep this run's ``estimates.csv`` and data fingerprints as ``<out>/runs/<NNNN>/``.

    Call after a successful run. The new folder appears whole or not at all (written under a
    temporary name, then renamed). Snapshots beyond ``[study] keep_runs`` are removed, oldest
    first. Returns what was done and whether the data fingerprints changed since the latest
    snapshot. Raises ReplicationError if the run left no ``estimates.csv``.
    """
    out_dir = Path(out_dir) if out_dir is not None else loaded.output_dir
    est = out_dir / ESTIMATES
    if not est.is_file():
        raise ReplicationError(f"{est}: not found; a snapshot needs the estimates of a finished run")
    est_bytes = est.read_bytes()
    fps = read_fingerprints(loaded, out_dir)
    fps_text = _fingerprints_text(fps)
    runs = list_runs(out_dir)
    latest = runs[-1] if runs else None
    old_fps: dict = {}
    if latest is not None:
        lp = _run_path(out_dir, latest)
        try:
            old_fps = json.loads((lp / FINGERPRINTS).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            old_fps = {}
        if not isinstance(old_fps, dict):
            old_fps = {}
        same_est = (lp / ESTIMATES).is_file() and (lp / ESTIMATES).read_bytes() == est_bytes
        same_fps = ({k: v.get("fingerprint") for k, v in old_fps.items() if isinstance(v, dict)}
                    == {k: v["fingerprint"] for k, v in fps.items()})
        if same_est and same_fps:
            return SnapshotInfo(latest, False, runs[-2] if len(runs) > 1 else None, lp)
    changes = _fingerprint_changes(old_fps, fps) if latest is not None else []

    from datetime import datetime, timezone

    number = (latest or 0) + 1
    final = _run_path(out_dir, number)
    tmp = runs_dir(out_dir) / f".tmp-{os.getpid()}-{uuid.uuid4().hex[:8]}"
    tmp.mkdir(parents=True)
    try:
        (tmp / ESTIMATES).write_bytes(est_bytes)
        (tmp / FINGERPRINTS).write_text(fps_text, encoding="utf-8")
        info = {"run": number, "spec": loaded.path.name,
                "created": datetime.now(timezone.utc).isoformat(timespec="seconds")}
        (tmp / SNAPSHOT_INFO).write_text(json.dumps(info, indent=1) + "\n", encoding="utf-8")
        os.rename(tmp, final)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    pruned = _prune(out_dir, loaded.spec.study.keep_runs)
    return SnapshotInfo(number, True, latest, final, changes, pruned)


def _prune(out_dir: Path, keep: int) -> list[int]:
    runs = list_runs(out_dir)
    gone = runs[: max(0, len(runs) - keep)]
    for n in gone:
        p = _run_path(out_dir, n)
        trash = runs_dir(out_dir) / f".trash-{n:04d}-{uuid.uuid4().hex[:8]}"
        os.rename(p, trash)  # leaves the numbered name at once; removal may take a while
        shutil.rmtree(trash, ignore_errors=True)
    return gone


# ---------------------------------------------------------------------------------------------
# Diff

KEY = ("spec_id", "term")
AXIS_PREFIX = "axis_"
WEAK_F_RULE = 10.0  # Staiger and Stock (1997) rule of thumb (common practice)
# free text that follows the numbers or the code's wording, not the estimates
TEXT_IGNORED = {"warnings", "not_applicable", "ci_robust_text"}
NON_LABEL = {"spec_id", "term", "estimator", "covariance", "status", "reason", "dataset",
             "outcome", "panel", "role"}


@dataclass
class Change:
    """One (specification, term) whose numbers differ between two runs."""

    spec_id: str
    term: str
    labels: str
    columns: list[str]  # columns whose values changed
    old_estimate: float | None
    new_estimate: float | None
    old_se: float | None
    new_se: float | None
    old_nobs: float | None
    new_nobs: float | None
    shift_se: float | None  # (new - old) / old SE
    flags: list[str] = field(default_factory=list)


@dataclass
class DiffResult:
    old_label: str
    new_label: str
    compared: int
    changes: list[Change]
    only_old: list[tuple[str, str, str]]  # (spec_id, term, labels)
    only_new: list[tuple[str, str, str]]
    settings: dict

    @property
    def changed_spec_ids(self) -> list[str]:
        return sorted({c.spec_id for c in self.changes})


def resolve_estimates(out_dir: Path, ref: str | None, default: str) -> tuple[str, Path]:
    """``ref`` as (label, estimates.csv path): a run number, 'latest', 'previous', a file or folder."""
    ref = ref or default
    runs = list_runs(out_dir)
    word = ref.lower()
    if word in ("latest", "last", "previous", "prev"):
        need = 1 if word in ("latest", "last") else 2
        if len(runs) < need:
            have = f"{len(runs)} run" + ("" if len(runs) == 1 else "s")
            raise ReplicationError(f"{runs_dir(out_dir)}: {have} recorded; a diff needs two "
                                   "(run the study again after a change, or name a file)")
        n = runs[-need]
        return f"run {n:04d}", _run_path(out_dir, n) / ESTIMATES
    if re.fullmatch(r"\d+", ref):
        n = int(ref)
        if n not in runs:
            avail = ", ".join(f"{r:04d}" for r in runs) or "none"
            raise ReplicationError(f"run {ref} is not recorded (kept runs: {avail})")
        return f"run {n:04d}", _run_path(out_dir, n) / ESTIMATES
    p = Path(ref)
    if p.is_dir():
        p = p / ESTIMATES
    if not p.is_file():
        raise ReplicationError(f"{ref}: neither a recorded run number nor an estimates file")
    return str(ref), p


def read_estimates(path: Path):
    import pandas as pd

    try:
        df = pd.read_csv(path, dtype={"spec_id": str, "term": str}, keep_default_na=True)
    except Exception as exc:  # noqa: BLE001 - any reader failure: one line
        raise ReplicationError(f"{path}: cannot read as CSV: {exc}") from None
    missing = [k for k in KEY if k not in df.columns]
    if missing:
        raise ReplicationError(f"{path}: no column '{missing[0]}'; not a specflow estimates file")
    if df.duplicated(list(KEY)).any():
        raise ReplicationError(f"{path}: repeated (spec_id, term) rows")
    return df


def _num(v) -> float | None:
    try:
        x = float(v)
    except (TypeError, ValueError):
        return None
    return None if x != x else x


def _first(cols, *names) -> str | None:
    for n in names:
        if n in cols:
            return n
    return None


CATEGORIES = (
    ("estimate", ("estimate",)),
    ("SE", ("se", "std_error")),
    ("N", ("nobs", "n")),
    ("clusters", ("clusters",)),
    ("p", ("p", "t", "pvalue", "p_value")),
    ("CI", ("ci_",)),
    ("first-stage F", ("first_stage_f",)),
    ("effective F", ("effective_f", "weak_first_stage")),
    ("tests", ("overid_", "endogeneity_", "ar_p")),
    ("status", ("status", "reason")),
)


def _categories(columns: list[str]) -> list[str]:
    """Changed columns grouped for reading: estimate, SE, N, p, CI, F statistics, tests, ..."""
    out: list[str] = []
    for c in columns:
        name = c
        for label, keys in CATEGORIES:
            if any(c == k or (k.endswith("_") and c.startswith(k)) or
                   (k in ("first_stage_f", "effective_f") and c.startswith(k)) for k in keys):
                name = label
                break
        if name not in out:
            out.append(name)
    return out


def _close(a: float | None, b: float | None, rtol: float, atol: float) -> bool:
    if a is None or b is None:
        return a is None and b is None
    return abs(a - b) <= atol + rtol * abs(a)


def _labels(row, label_cols: list[str]) -> str:
    parts = []
    for c in label_cols:
        v = row.get(c)
        if v is None or (isinstance(v, float) and v != v) or str(v) == "":
            continue
        parts.append(f"{c.removeprefix(AXIS_PREFIX)}={v}")
    return ", ".join(parts)


def diff_estimates(old_path: Path, new_path: Path, *, old_label: str = "old", new_label: str = "new",
                   se_fraction: float = 0.5, alpha: float = 0.05, weak_f: float | None = None,
                   rtol: float = 1e-8, atol: float = 1e-12, all_terms: bool = False) -> DiffResult:
    """Compare two estimates files row by row (key: spec_id and term).

    By default only the endogenous regressors' rows are compared (``all_terms`` adds the
    controls'). A row is changed when a number differs by more than ``atol + rtol x |old|``
    or a text column (status, reason, robust set) differs.
    """
    import pandas as pd

    old = read_estimates(old_path)
    new = read_estimates(new_path)
    numeric = [c for c in old.columns if c in new.columns and c not in KEY
               and pd.api.types.is_numeric_dtype(old[c]) and pd.api.types.is_numeric_dtype(new[c])]
    textual = [c for c in old.columns if c in new.columns and c not in KEY and c not in numeric
               and c not in TEXT_IGNORED]
    label_cols = [c for c in new.columns if c.startswith(AXIS_PREFIX)] + (["extra"] if "extra" in new.columns else [])
    if not label_cols:  # an older layout: axis columns without prefix
        label_cols = [c for c in new.columns if c not in NON_LABEL and c not in numeric]
    if not all_terms and "term_role" in old.columns and "term_role" in new.columns:
        old = old[old["term_role"].astype(str) != "exogenous"]
        new = new[new["term_role"].astype(str) != "exogenous"]
    cols = set(numeric)
    est_c = _first(cols, "estimate")
    se_c = _first(cols, "se", "std_error")
    p_c = _first(cols, "p", "pvalue", "p_value")
    n_c = _first(cols, "nobs", "n")
    f_c = _first(cols, "effective_f", "first_stage_f", "first_stage_f_robust")
    crit_c = _first(cols, "effective_f_crit10") if f_c == "effective_f" else None
    if weak_f is None and crit_c:
        threshold_text = "its critical value for a 10% worst-case bias"
    else:
        threshold_text = f"{weak_f if weak_f is not None else WEAK_F_RULE:g}"

    o = old.set_index(list(KEY))
    n = new.set_index(list(KEY))
    both = [k for k in n.index if k in o.index]
    changes: list[Change] = []
    for key in both:
        a, b = o.loc[key], n.loc[key]
        changed = [c for c in numeric if not _close(_num(a[c]), _num(b[c]), rtol, atol)]
        changed += [c for c in textual if str(a[c]) != str(b[c]) and c not in label_cols]
        if not changed:
            continue
        changed = _categories(changed)
        g = lambda row, c: _num(row[c]) if c else None  # noqa: E731
        oe, ne, ose, nse = g(a, est_c), g(b, est_c), g(a, se_c), g(b, se_c)
        shift = (ne - oe) / ose if None not in (oe, ne, ose) and ose > 0 else None
        flags = []
        if shift is not None and abs(shift) > se_fraction:
            flags.append(f"moved > {se_fraction:g} SE")
        if oe is not None and ne is not None and oe * ne < 0:
            flags.append("sign")
        op, np_ = g(a, p_c), g(b, p_c)
        if op is not None and np_ is not None and (op < alpha) != (np_ < alpha):
            flags.append(f"significance at {alpha:g}")
        of, nf = g(a, f_c), g(b, f_c)
        if weak_f is None and crit_c:  # each run's own critical value
            oc, nc = g(a, crit_c), g(b, crit_c)
        else:
            oc = nc = weak_f if weak_f is not None else WEAK_F_RULE
        if None not in (of, nf, oc, nc) and (of >= oc) != (nf >= nc):
            flags.append(f"weak IV ({f_c} {'fell below' if nf < nc else 'rose above'} "
                         f"{threshold_text})")
        if "status" in textual and str(a["status"]) != str(b["status"]):
            flags.append(f"status {a['status']} -> {b['status']}")
        row = {**b.to_dict()}
        changes.append(Change(
            spec_id=key[0], term=key[1], labels=_labels(row, label_cols), columns=changed,
            old_estimate=oe, new_estimate=ne, old_se=ose, new_se=nse,
            old_nobs=g(a, n_c), new_nobs=g(b, n_c), shift_se=shift, flags=flags))

    def only(frame_idx, frame, other) -> list[tuple[str, str, str]]:
        out = []
        for key in frame_idx:
            if key not in other.index:
                out.append((key[0], key[1], _labels(frame.loc[key].to_dict(), label_cols)))
        return out

    return DiffResult(
        old_label=old_label, new_label=new_label, compared=len(both), changes=changes,
        only_old=only(o.index, o, n), only_new=only(n.index, n, o),
        settings={"se_fraction": se_fraction, "alpha": alpha, "weak_f_text": threshold_text,
                  "weak_f_column": f_c, "rtol": rtol, "atol": atol},
    )


# ---------------------------------------------------------------------------------------------
# Rendering


def _f(x: float | None, digits: int = 4) -> str:
    if x is None:
        return "n.a."
    if abs(x - round(x)) < 1e-12 and abs(x) >= 1:
        return f"{int(round(x))}"
    return f"{x:.{digits}f}"


def _rows(res: DiffResult) -> tuple[list[str], list[list[str]]]:
    header = ["spec_id", "specification", "term", "estimate old -> new", "SE old -> new",
              "N old -> new", "shift (SEs)", "changed", "flags"]
    rows = []
    for c in sorted(res.changes, key=lambda c: (not c.flags, -abs(c.shift_se or 0.0), c.spec_id, c.term)):
        rows.append([
            c.spec_id, c.labels or "-", c.term,
            f"{_f(c.old_estimate)} -> {_f(c.new_estimate)}",
            f"{_f(c.old_se)} -> {_f(c.new_se)}",
            f"{_f(c.old_nobs)} -> {_f(c.new_nobs)}",
            "n.a." if c.shift_se is None else f"{c.shift_se:+.2f}",
            ", ".join(c.columns),
            "; ".join(c.flags) or "-",
        ])
    return header, rows


def _intro(res: DiffResult) -> list[str]:
    s = res.settings
    flagged = sum(1 for c in res.changes if c.flags)
    lines = [
        f"{res.old_label} -> {res.new_label}: {res.compared} (specification, term) rows in both; "
        f"{len(res.changes)} changed in {len(res.changed_spec_ids)} specification(s), {flagged} flagged",
        f"flags: moved more than {s['se_fraction']:g} of the old SE; sign change; p crossed "
        f"{s['alpha']:g}; {s['weak_f_column'] or 'first-stage F'} crossed {s['weak_f_text']}; status change",
    ]
    return lines


def render_text(res: DiffResult) -> str:
    out = _intro(res)
    header, rows = _rows(res)
    if rows:
        widths = [max(len(r[i]) for r in rows + [header]) for i in range(len(header))]
        out.append("")
        out.append("  ".join(h.ljust(w) for h, w in zip(header, widths)).rstrip())
        out.append("  ".join("-" * w for w in widths))
        for r in rows:
            out.append("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip())
    else:
        out.append("no specification changed")
    for title, items in (("only in " + res.old_label, res.only_old), ("only in " + res.new_label, res.only_new)):
        if items:
            out.append("")
            out.append(f"{title} ({len(items)}):")
            out += [f"  {sid}  {term}  {labels}" for sid, term, labels in items]
    return "\n".join(out) + "\n"


def _md_cell(s: str) -> str:
    return s.replace("|", "\\|")


def render_markdown(res: DiffResult) -> str:
    out = [f"## Estimates: {res.old_label} -> {res.new_label}", ""]
    out += [f"- {line}" for line in _intro(res)]
    header, rows = _rows(res)
    out.append("")
    if rows:
        out.append("| " + " | ".join(header) + " |")
        out.append("|" + "|".join(" --- " for _ in header) + "|")
        for r in rows:
            out.append("| " + " | ".join(_md_cell(c) for c in r) + " |")
    else:
        out.append("No specification changed.")
    for title, items in (("Only in " + res.old_label, res.only_old), ("Only in " + res.new_label, res.only_new)):
        if items:
            out += ["", f"### {title}", ""]
            out += [f"- `{sid}` {term}: {_md_cell(labels)}" for sid, term, labels in items]
    return "\n".join(out) + "\n"
