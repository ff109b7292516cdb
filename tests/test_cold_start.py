"""`specflow --help` imports nothing heavy (the cold-start goal is measured in benchmarks/)."""

import subprocess
import sys

HEAVY = ("pandas", "numpy", "scipy", "linearmodels", "matplotlib", "snakemake", "pydantic", "pyarrow")


def test_help_imports_no_heavy_library():
    code = ("import sys, specflow.cli as c\n"
            "c.build_parser().format_help()\n"
            f"print(sorted(m for m in {HEAVY!r} if m in sys.modules))\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]", out.stdout


def test_check_imports_no_fitting_or_plotting_library():
    code = ("import sys, specflow.cli as c\n"
            "assert c.main(['check', 'specs/canal_yields.toml']) == 0\n"
            "print(sorted(m for m in ('scipy', 'linearmodels', 'matplotlib', 'snakemake') if m in sys.modules))\n")
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=root)
    assert out.stdout.strip().splitlines()[-1] == "[]", out.stdout
