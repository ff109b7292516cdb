"""Helpers shared by the workflow tests (imported as ``helpers``; tests/ is on sys.path)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

from specflow.results import Batch


def batch_results(out: Path) -> dict[str, dict]:
    """Every FitResult under ``out/fits`` as JSON data by spec id, without per-spec timing
    (which differs from run to run)."""
    got = {}
    for p in sorted((out / "fits").glob("*.json")):
        for r in Batch.model_validate_json(p.read_text(encoding="utf-8")).results:
            d = r.model_dump(mode="json")
            d.pop("timing")
            got[r.spec_id] = d
    return got


def demo_out_dir(spec: Path) -> Path:
    """The output folder of a copied demo spec (its output is ../results/canal_yields)."""
    return spec.parent.parent / "results" / "canal_yields"


def run_command(spec: Path, *args: str) -> list[str]:
    return [sys.executable, "-m", "specflow.cli", "run", str(spec), "--cores", "2", *args]


def run_to_end(spec: Path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run(run_command(spec, *args), capture_output=True, text=True, timeout=300,
                          stdin=subprocess.DEVNULL)
