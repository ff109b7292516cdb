"""The ``specflow run`` command: the whole grid through the Snakemake workflow.

Registered by :mod:`specflow.cli` (``COMMAND_MODULES``); Snakemake and pandas are imported only
when the command runs.
"""

from __future__ import annotations

import argparse

EXIT_CODES = """exit codes:
  0  every specification was fitted or reused without failure (or there was nothing to do)
  1  the run finished, but some specifications failed numerically; each is recorded with its
     reason in the summary and in estimates.csv
  2  a problem with the spec, the data, the options or the cluster profile, or the output
     folder is in use by another run
  3  a job crashed (an error in specflow, or the job was killed): the message names the
     specification and the log file"""

DESCRIPTION = """Run every specification of the study through specflow's Snakemake workflow:
prepare each dataset once, fit the specifications in batches, collate the estimates and tables.
Only what changed is redone: a data file whose bytes changed, the specifications an edit
touched, or everything after a new specflow version. Outputs go to the study's output folder;
Snakemake's own log to <output>/logs/snakemake.log."""


def cmd_run(args) -> int:
    from .run import run

    return run(args.spec, cores=args.cores, cluster=args.cluster, dry_run=args.dry_run,
               force=args.force, verbose=args.verbose)


def register(sub) -> None:
    c = sub.add_parser("run", help="run the whole grid through the Snakemake workflow",
                       description=DESCRIPTION, epilog=EXIT_CODES,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    c.add_argument("spec", help="the study's spec file (TOML)")
    c.add_argument("--cores", type=int, metavar="N",
                   help="cores to use locally (default: all); with --cluster, the cores a job may use")
    c.add_argument("--cluster", metavar="PROFILE",
                   help="run the jobs on a cluster: 'slurm' (the profile shipped with specflow; "
                        "account and partition from SPECFLOW_SLURM_ACCOUNT and "
                        "SPECFLOW_SLURM_PARTITION) or the path of a Snakemake profile folder")
    c.add_argument("--dry-run", action="store_true",
                   help="show the jobs that would run, run nothing")
    c.add_argument("--force", action="store_true",
                   help="redo everything: prepare every dataset and refit every specification")
    c.add_argument("--verbose", action="store_true",
                   help="show Snakemake's own output instead of specflow's progress display")
    c.set_defaults(func=cmd_run)
