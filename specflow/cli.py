"""The specflow command line. Thin: each command parses its options and calls into the package.

Heavy libraries (pandas, scipy, linearmodels, matplotlib, snakemake) are imported inside the
commands that need them, so ``specflow --help`` starts quickly.

Exit codes: 0 success; 1 the run finished but some specifications failed (``run`` only, see
DEVELOPERS.md); 2 a problem with the spec, the data or the arguments (one line each, no
traceback; ``--debug`` shows one); 3 an internal error (a bug: please report it).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

EXIT_OK, EXIT_SOME_FAILED, EXIT_USER, EXIT_BUG = 0, 1, 2, 3


def _load(path: str):
    from .spec import load_spec

    return load_spec(path)


def _load_checked(path: str):
    """Load the spec, expand its grid and validate every specification against the data."""
    from .data import load_frames, validate_against_data
    from .errors import SpecError
    from .grid import expand

    loaded = _load(path)
    specs = expand(loaded)
    frames = load_frames(loaded, sorted({sp.dataset for sp in specs}))
    problems = validate_against_data(loaded, specs, frames)
    if problems:
        raise SpecError(problems)
    return loaded, specs, frames


def cmd_check(args) -> int:
    loaded, specs, frames = _load_checked(args.spec)
    rows = {k: len(v) for k, v in frames.items()}
    data = ", ".join(f"{k} ({n} rows)" for k, n in rows.items())
    print(f"{loaded.path.name}: ok: {len(specs)} specifications over {len(loaded.spec.axes)} axes; data: {data}")
    for dropped, kept in loaded.duplicates:
        print(f"note: '{dropped}' is the same specification as '{kept}' and is fitted once")
    return EXIT_OK


def cmd_grid(args) -> int:
    from .grid import expand

    loaded = _load(args.spec)
    specs = expand(loaded)
    if args.json:
        import json

        print(json.dumps([sp.model_dump(mode="json") for sp in specs], indent=1))
        return EXIT_OK
    axes = list(loaded.spec.axes)
    header = ["id"] + axes + ["[est.]", "[cov.]", "[instruments]", "[controls]"]
    rows = []
    for sp in specs:
        labels = [sp.labels.get(a, "") for a in axes]
        if sp.extra_name:
            labels = [f"[{sp.extra_name}]"] + [""] * (len(axes) - 1) if axes else []
        rows.append([sp.id] + labels + [sp.estimator, sp.covariance, " ".join(sp.instruments),
                                       " ".join(sp.controls) or "-"])
    widths = [max(len(str(r[i])) for r in rows + [header]) for i in range(len(header))]
    print("  ".join(h.ljust(w) for h, w in zip(header, widths)))
    for r in rows:
        print("  ".join(str(c).ljust(w) for c, w in zip(r, widths)))
    print(f"{len(specs)} specifications")
    return EXIT_OK


def cmd_fit(args) -> int:
    from .fit import fit
    from .grid import baseline, find
    from .summary import describe_fit

    loaded, specs, frames = _load_checked(args.spec)
    sp = find(specs, args.id) if args.id else baseline(specs)
    res = fit(sp, frames[sp.dataset])
    if args.json:
        print(res.model_dump_json(indent=1))
    else:
        print(describe_fit(sp, res))
    return EXIT_OK if res.status == "ok" else EXIT_SOME_FAILED


def cmd_schema(args) -> int:
    import json

    from .spec import json_schema

    text = json.dumps(json_schema(), indent=2, sort_keys=True) + "\n"
    if args.out:
        from .data import write_atomic_text

        write_atomic_text(Path(args.out), text)
        print(f"wrote {args.out}")
    else:
        sys.stdout.write(text)
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    from . import __version__

    p = argparse.ArgumentParser(
        prog="specflow",
        description="Declare an instrumental-variables study once in TOML; fit, diagnose and "
                    "tabulate its whole robustness grid.",
    )
    p.add_argument("--version", action="version", version=f"specflow {__version__}")
    p.add_argument("--debug", action="store_true", help="show a traceback on errors")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    c = sub.add_parser("check", help="validate a spec file and its data")
    c.add_argument("spec")
    c.set_defaults(func=cmd_check)

    c = sub.add_parser("grid", help="list the expanded specifications")
    c.add_argument("spec")
    c.add_argument("--json", action="store_true", help="print the resolved specifications as JSON")
    c.set_defaults(func=cmd_grid)

    c = sub.add_parser("fit", help="fit one specification and print a readable summary")
    c.add_argument("spec")
    c.add_argument("--id", help="specification id or unique prefix (default: the baseline)")
    c.add_argument("--json", action="store_true", help="print the FitResult as JSON")
    c.set_defaults(func=cmd_fit)

    c = sub.add_parser("schema", help="write the JSON Schema of the spec format")
    c.add_argument("--out", help="file to write (default: standard output)")
    c.set_defaults(func=cmd_schema)

    _add_more(sub)
    return p


# Modules that add commands: each has ``register(subparsers)`` and imports heavy libraries only
# inside its command functions.
COMMAND_MODULES: tuple[str, ...] = ("cli_tables", "cli_run", "cli_replicate")


def _add_more(sub) -> None:
    import importlib

    for name in COMMAND_MODULES:
        importlib.import_module(f"specflow.{name}").register(sub)


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_USER
    from .errors import SpecflowError

    try:
        return int(args.func(args) or 0)
    except SpecflowError as exc:
        if args.debug:
            raise
        for line in exc.lines():
            print(f"error: {line}", file=sys.stderr)
        return getattr(exc, "exit_code", EXIT_USER)
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into head & co.
        sys.stderr.close()
        return EXIT_OK
    except Exception as exc:  # noqa: BLE001 - last line of defence: one line, not a traceback
        if args.debug:
            raise
        print(f"internal error: {type(exc).__name__}: {exc} (rerun with --debug for a traceback; "
              "this is a bug in specflow)", file=sys.stderr)
        return EXIT_BUG


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
