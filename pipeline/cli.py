"""The ``twinring`` command: one subcommand per stage.

Each subcommand is one row of ``COMMANDS``: its name, one-line help, a function
adding its arguments and the dotted path of its handler (imported only when the
subcommand runs, so ``--help`` stays fast).  A handler takes the parsed
arguments and returns an exit status.  Bad input of any kind is an
:class:`~twinring.config.InputError`, printed as one line on stderr with exit
status 2 and no traceback.
"""
from __future__ import annotations

import argparse
import importlib
import os
import sys
import time


def _config_arg(p):
    p.add_argument("config", help="YAML run config")
    p.add_argument("--out", metavar="DIR", help="output directory (overrides output.dir)")
    p.add_argument("--force", action="store_true", help="reuse an output directory made by a different config")


def _shard_args(p):
    _config_arg(p)
    p.add_argument("--shard", metavar="K/N", help="run only shard K of N (K = 0 .. N-1) of the work units")


def _merge_args(p):
    p.add_argument("dirs", nargs="+", metavar="DIR", help="shard output directories")
    p.add_argument("--out", metavar="DIR", required=True, help="directory for the merged results")
    p.add_argument("--force", action="store_true", help="reuse an output directory made by a different config")


def _report_args(p):
    p.add_argument("dir", metavar="DIR", help="a run directory")


COMMANDS = [
    ("search", "scan a map for matched circle pairs -> candidates.ecsv, peaks.ecsv", _shard_args,
     "twinring.stages:cmd_search"),
    ("merge", "combine the output dirs of `search --shard K/N` or `calibrate --shard K/N` runs into one run", _merge_args,
     "twinring.stages:cmd_merge"),
    ("prepare", "prepare a map (dipole removal, band limit, beam) -> prepared.fits", _config_arg,
     "twinring.stages:cmd_prepare"),
    ("predict", "circle pairs a flat topology must show -> circles.ecsv", _config_arg,
     "twinring.topology.stages:cmd_predict"),
    ("sky", "a synthetic sky of a flat topology -> sky.fits (uK), mask.fits, circles.ecsv", _config_arg,
     "twinring.topology.stages:cmd_sky"),
    ("calibrate", "isotropic Gaussian skies through the same search -> thresholds.ecsv, p-values", _shard_args, "twinring.calibrate:cmd_calibrate"),
    ("inject", "injection-recovery campaign of a space family -> recovery.ecsv", _config_arg, "twinring.inject:cmd_inject"),
    ("bound", "smallest detectable radius -> lower bound on the size of space -> bound.ecsv", _config_arg, "twinring.bound:cmd_bound"),
    ("exclude", "which lengths, angles and observer positions of a flat space the data exclude -> exclusion.ecsv",
     _config_arg, "twinring.exclude:cmd_exclude"),
    ("report", "figures (PNG) and summary.md / summary.json of a run directory", _report_args, "twinring.report:cmd_report"),
    ("run", "every configured stage in order into one directory (unchanged stages skipped)", _config_arg, "twinring.workflow:cmd_run"),
]


def build_parser():
    parser = argparse.ArgumentParser(
        prog="twinring",
        description="Matched-circle tests of the topology of space on HEALPix CMB maps.",
    )
    from . import results

    parser.add_argument("--version", action="version", version=f"twinring {results.TOOL_VERSION}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for name, help_text, add_args, handler in COMMANDS:
        p = sub.add_parser(name, help=help_text, description=help_text)
        add_args(p)
        p.set_defaults(_handler=handler)
    return parser


def _resolve(dotted):
    mod, _, fn = dotted.partition(":")
    return getattr(importlib.import_module(mod), fn)


def main(argv=None) -> int:
    # healpy's OpenMP transforms: one thread unless the user says otherwise, so that results do not
    # depend on the backend's process layout, and a loaded machine is not made to spin-wait
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    from .config import InputError

    parser = build_parser()
    args = parser.parse_args(argv)
    start = time.time()
    try:
        status = _resolve(args._handler)(args)
    except InputError as exc:
        print(f"twinring: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("twinring: interrupted; finished chunks are kept, rerun to resume", file=sys.stderr)
        return 130
    args._elapsed = time.time() - start
    return int(status or 0)


if __name__ == "__main__":
    sys.exit(main())
