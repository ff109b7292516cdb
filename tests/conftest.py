"""Shared fixtures of the fit/grid/spec tests: write a study (spec TOML + data CSV) to tmp_path."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pandas as pd
import pytest


@pytest.fixture
def tmp_study(tmp_path: Path):
    """Factory: ``tmp_study(toml_text, data={"file.csv": frame}, name="study.toml") -> spec path``.

    The TOML text is dedented; each frame is written as CSV beside the spec (relative paths in
    the spec resolve against the spec's folder).
    """

    def make(toml_text: str, data: dict[str, pd.DataFrame] | None = None,
             name: str = "study.toml") -> Path:
        for fname, frame in (data or {}).items():
            target = tmp_path / fname
            target.parent.mkdir(parents=True, exist_ok=True)
            frame.to_csv(target, index=False)
        path = tmp_path / name
        path.write_text(textwrap.dedent(toml_text).lstrip("\n"), encoding="utf-8")
        return path

    return make
