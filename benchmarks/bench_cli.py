"""Cold start of the command line: ``specflow --help`` and ``specflow check`` (and what they import).

Each command runs ``--repeat`` times in a fresh process; the figures are the median and the
fastest wall time. Also listed: the heavy libraries each command imports (from
``python -X importtime``), which should be none for ``--help``.
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import OUT, PY, SPECFLOW, machine, write_json  # noqa: E402

HEAVY = ("pandas", "scipy", "linearmodels", "matplotlib", "snakemake", "pydantic", "numpy",
         "pyarrow", "jinja2", "statsmodels")


def _time(cmd: list[str], repeat: int, cwd: Path | None = None) -> dict:
    walls = []
    for _ in range(repeat):
        t = time.perf_counter()
        p = subprocess.run(cmd, capture_output=True, cwd=cwd)
        walls.append(time.perf_counter() - t)
        if p.returncode != 0:
            raise SystemExit(f"{' '.join(cmd)} failed: {p.stderr.decode()[-1000:]}")
    return {"median_s": statistics.median(walls), "min_s": min(walls), "runs": repeat}


def _heavy_imports(args: list[str], cwd: Path | None = None) -> list[str]:
    code = "import sys; from specflow.cli import main; sys.argv = ['specflow'] + sys.argv[1:]; main()"
    p = subprocess.run([PY, "-X", "importtime", "-c", code, *args], capture_output=True,
                       text=True, cwd=cwd)
    seen = set()
    for line in p.stderr.splitlines():
        if "|" not in line:
            continue
        name = line.rsplit("|", 1)[1].strip()
        top = name.split(".")[0]
        if top in HEAVY:
            seen.add(top)
    return sorted(seen)


def run(repeat: int = 7, spec: Path | None = None) -> dict:
    fig: dict = {"machine": machine()}
    fig["help"] = _time([SPECFLOW, "--help"], repeat)
    fig["help"]["heavy_imports"] = _heavy_imports(["--help"])
    fig["version"] = _time([SPECFLOW, "--version"], repeat)
    if spec is None:
        from synth import write_grid

        spec = write_grid(OUT / "work" / "cli_check", 50_000, 1000)
    fig["check"] = _time([SPECFLOW, "check", str(spec)], max(3, repeat // 2))
    fig["check"]["spec"] = str(spec)
    fig["check"]["heavy_imports"] = _heavy_imports(["check", str(spec)])
    return fig


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=7)
    ap.add_argument("--spec", type=Path, help="spec for `specflow check` (default: the 1,000-spec grid)")
    args = ap.parse_args()
    fig = run(args.repeat, args.spec)
    write_json(OUT / "cli.json", fig)
    print(json.dumps(fig, indent=1, default=str))


if __name__ == "__main__":
    main()
