"""``specflow package``, ``specflow verify`` and ``specflow diff``: the replication commands.

Heavy modules (pandas, the workflow) are imported inside the command functions.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

VERIFY_EXIT = """exit codes:
  0  full reproduction: the manifest holds and every exhibit reproduced (or, with
     --manifest-only, the manifest holds)
  1  partial or failed reproduction: a file differs from the manifest, the workflow did not
     finish, or some number differs
  2  not a package, an unsafe zip, or a bad option"""


def cmd_package(args) -> int:
    from .package import build_package
    from .spec import load_spec

    loaded = load_spec(args.spec)
    res = build_package(loaded, Path(args.out), make_zip=args.zip, pdf=not args.no_pdf, force=args.force)
    for line in res.missing:
        print(f"warning: README will lack {line}", file=sys.stderr)
    for line in res.notes:
        print(f"note: {line}", file=sys.stderr)
    print(f"wrote {res.folder}: {res.files} files, {res.size:,} bytes, checksums in MANIFEST.sha256")
    if res.zip_path:
        print(f"wrote {res.zip_path} (for your archive; deposit the folder)")
    print(f"check it as a data editor would: specflow verify {res.folder}")
    return 0


def cmd_verify(args) -> int:
    from .verify import render, verify

    rep = verify(Path(args.package), rtol=args.tolerance, atol=args.atol, cores=args.cores,
                 manifest_only=args.manifest_only, scratch=Path(args.scratch) if args.scratch else None,
                 keep=args.keep)
    sys.stdout.write(render(rep))
    return 0 if rep.ok else 1


def cmd_diff(args) -> int:
    from .revisions import diff_estimates, render_markdown, render_text, resolve_estimates
    from .spec import load_spec

    loaded = load_spec(args.spec)
    out_dir = loaded.output_dir
    if args.new is None:
        old_ref, new_ref = args.old or "previous", "latest"
    else:
        old_ref, new_ref = args.old, args.new
    old_label, old_path = resolve_estimates(out_dir, old_ref, "previous")
    new_label, new_path = resolve_estimates(out_dir, new_ref, "latest")
    res = diff_estimates(old_path, new_path, old_label=old_label, new_label=new_label,
                         se_fraction=args.se_fraction, alpha=args.alpha, weak_f=args.weak_f,
                         all_terms=args.all_terms)
    text = render_markdown(res) if args.markdown else render_text(res)
    if args.out:
        from .data import write_atomic_text

        write_atomic_text(Path(args.out), text)
        print(f"wrote {args.out}")
    else:
        sys.stdout.write(text)
    return 0


def _positive(x: str) -> float:
    v = float(x)
    if not v >= 0:
        raise argparse.ArgumentTypeError(f"must be a number >= 0 (got {x})")
    return v


def register(sub) -> None:
    from .verify import DEFAULT_ATOL, DEFAULT_RTOL

    c = sub.add_parser("package", help="build a replication package folder (and zip) from the last run",
                       description="Build a replication package: README (data editors' template "
                                   "sections), spec, workflow, pinned requirements, specflow's wheel, "
                                   "data, outputs, LICENSE.txt and MANIFEST.sha256.")
    c.add_argument("spec", help="the study's spec file (TOML)")
    c.add_argument("--out", required=True, metavar="DIR", help="the package folder to create")
    c.add_argument("--zip", action="store_true", help="also write DIR.zip (for your own archive)")
    c.add_argument("--no-pdf", action="store_true", help="do not try to write README.pdf")
    c.add_argument("--force", action="store_true", help="replace an earlier package at DIR")
    c.set_defaults(func=cmd_package)

    c = sub.add_parser("verify", help="check a package's manifest, rerun it and compare every number",
                       epilog=VERIFY_EXIT, formatter_class=argparse.RawDescriptionHelpFormatter)
    c.add_argument("package", help="a package folder or its zip")
    c.add_argument("--tolerance", type=_positive, default=DEFAULT_RTOL, metavar="REL",
                   help=f"relative tolerance for estimates and fits (default {DEFAULT_RTOL:g})")
    c.add_argument("--atol", type=_positive, default=DEFAULT_ATOL, metavar="ABS",
                   help=f"absolute tolerance for estimates and fits (default {DEFAULT_ATOL:g})")
    c.add_argument("--cores", type=int, metavar="N", help="cores for the rerun (default: the package's)")
    c.add_argument("--manifest-only", action="store_true", help="check the manifest, do not rerun")
    c.add_argument("--scratch", metavar="DIR", help="an empty folder for the rerun (default: a temporary one)")
    c.add_argument("--keep", action="store_true", help="keep the scratch folder")
    c.set_defaults(func=cmd_verify)

    c = sub.add_parser("diff", help="what moved between two runs' estimates (default: the last two)")
    c.add_argument("spec", help="the study's spec file (TOML)")
    c.add_argument("old", nargs="?", help="run number, 'previous', or an estimates.csv (or its folder)")
    c.add_argument("new", nargs="?", help="run number, 'latest', or an estimates.csv (or its folder)")
    c.add_argument("--markdown", action="store_true", help="write Markdown instead of a terminal table")
    c.add_argument("--out", metavar="FILE", help="write to FILE instead of the terminal")
    c.add_argument("--se-fraction", type=_positive, default=0.5, metavar="F",
                   help="flag estimates that moved by more than F old standard errors (default 0.5)")
    c.add_argument("--alpha", type=_positive, default=0.05,
                   help="flag p-values that crossed this level (default 0.05)")
    c.add_argument("--weak-f", type=_positive, default=None, metavar="F",
                   help="flag effective F statistics that crossed F (default: each one's critical "
                        "value for a 10%% worst-case bias, or 10 where the file has none)")
    c.add_argument("--all-terms", action="store_true", help="compare the controls' rows too")
    c.set_defaults(func=cmd_diff)
