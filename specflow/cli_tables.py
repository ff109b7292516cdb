"""``specflow tables SPEC``: rebuild tables, figures and the report from existing results.

Reads the spec (no data) and the fit results under the study's output folder; never refits.
"""

from __future__ import annotations

from pathlib import Path


def cmd_tables(args) -> int:
    from .collate import build_all, load_results
    from .errors import RunError
    from .grid import expand
    from .spec import load_spec

    loaded = load_spec(args.spec)
    specs = expand(loaded)
    out_dir = Path(args.out).resolve() if args.out else loaded.output_dir
    results = load_results(out_dir)
    ids = {sp.id for sp in specs}
    if not any(r.spec_id in ids for r in results):
        raise RunError(f"no results for this spec's specifications in {out_dir / 'fits'}; "
                       f"fit them first (specflow run {args.spec})")
    paths = build_all(loaded, specs, results, out_dir)
    fitted = sum(1 for r in results if r.spec_id in ids)
    missing = len(specs) - fitted
    print(f"wrote {len(paths)} files under {out_dir} from {fitted} results"
          + (f" ({missing} specifications have no result yet)" if missing else ""))
    if args.verbose:
        for p in paths:
            print(f"  {p.relative_to(out_dir)}")
    return 0


def register(subparsers) -> None:
    c = subparsers.add_parser(
        "tables", help="rebuild tables, figures and the report from existing results (no refit)")
    c.add_argument("spec")
    c.add_argument("--out", help="the study's output folder (default: study.output of the spec)")
    c.add_argument("-v", "--verbose", action="store_true", help="list the files written")
    c.set_defaults(func=cmd_tables)
