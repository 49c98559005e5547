"""The ``twinring`` command: one subcommand per stage.

Each subcommand is one row of ``COMMANDS``: its name, one-line help, a function
adding its arguments and the dotted path of its handler (imported only when the
subcommand runs, so ``--help`` stays fast).  A handler takes the parsed
arguments and returns an exit status.  Bad input of any kind is an
:class:`~twinring.errors.InputError`, printed as one line on stderr with exit
status 2 and no traceback.  Ctrl-C (exit status 130) and SIGTERM (exit status
143, what batch schedulers send before killing a job) stop the worker
processes, keep every finished unit for resume and print one line.  ``~`` in
path arguments is expanded.
"""
from __future__ import annotations

import argparse
import importlib
import os
import sys
import time
import warnings


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


def _config_ref_args(p):
    p.add_argument("--defaults", nargs="?", const="-", metavar="FILE",
                   help="write a complete YAML config of every default, annotated (to FILE, or stdout)")
    p.add_argument("--section", action="append", metavar="NAME", help="only this section (repeatable)")


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
    ("config", "every config key with its default, type, allowed values and help (--defaults: a YAML of them)",
     _config_ref_args, "twinring.config_reference:cmd_config"),
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


class Terminated(KeyboardInterrupt):
    """SIGTERM (what batch schedulers send before killing a job), raised like Ctrl-C in the main thread."""


_SIGTERM_SEEN = []      # set by the handler: a worker killed by the same signal may raise first


def _on_sigterm(signum, frame):
    import signal

    signal.signal(signal.SIGTERM, signal.SIG_IGN)     # once: the cleanup that follows must not be cut short
    _SIGTERM_SEEN.append(time.time())
    raise Terminated()


def _sigterm_pending(wait=0.5):
    """Whether a SIGTERM arrives within ``wait`` seconds (it may trail a worker's death by a moment)."""
    end = time.time() + wait
    try:
        while time.time() < end and not _SIGTERM_SEEN:
            time.sleep(0.05)
    except Terminated:
        return True
    return bool(_SIGTERM_SEEN)


def _expand_paths(args):
    """``~`` in every path argument is the user's home (the shell leaves ``--out=~/x`` alone)."""
    for name in ("config", "out", "dir"):
        v = getattr(args, name, None)
        if isinstance(v, str):
            setattr(args, name, os.path.expanduser(v))
    if isinstance(getattr(args, "dirs", None), list):
        args.dirs = [os.path.expanduser(d) for d in args.dirs]


def _stop_workers():
    """Stop worker processes this process started (joblib/loky pool, multiprocessing children)."""
    loky = sys.modules.get("joblib.externals.loky.reusable_executor")
    ex = getattr(loky, "_executor", None) if loky is not None else None
    if ex is not None:
        try:
            ex.shutdown(wait=True, kill_workers=True)
        except Exception:   # noqa: BLE001  (best effort while exiting)
            pass
    if "multiprocessing" in sys.modules:
        import multiprocessing

        for child in multiprocessing.active_children():
            child.terminate()
        for child in multiprocessing.active_children():
            child.join(timeout=5)


def main(argv=None) -> int:
    # healpy's OpenMP transforms: one thread unless the user says otherwise, so that results do not
    # depend on the backend's process layout, and a loaded machine is not made to spin-wait
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    # loky's resource tracker (a child process that shares our stderr) warns about semaphores it
    # cleans up after a SIGTERM to the whole process group; the one line we print says it all
    os.environ.setdefault("PYTHONWARNINGS", "ignore::UserWarning:joblib.externals.loky.backend.resource_tracker")
    # loky replaces a worker whose memory grew (its leak guard) and says so; the unit is rerun and the
    # results are unaffected, so the console keeps to what the run itself reports
    warnings.filterwarnings("ignore", message="A worker stopped while some jobs were given", category=UserWarning)
    # on SIGTERM joblib cancels the units still running and warns about it; the one line twinring prints
    # ("terminated ... finished units are kept") already says what happened
    warnings.filterwarnings("ignore", message=r"\d+ tasks which were still being processed by the workers have been "
                            "cancelled", category=UserWarning)
    import signal

    from .config import InputError
    from . import rundir

    parser = build_parser()
    args = parser.parse_args(argv)
    _expand_paths(args)
    start = time.time()
    _SIGTERM_SEEN.clear()
    unset = object()
    previous = unset
    try:
        previous = signal.signal(signal.SIGTERM, _on_sigterm)
    except ValueError:        # not the main thread: leave signals alone
        pass
    try:
        try:
            status = _resolve(args._handler)(args)
        except InputError as exc:
            rundir.discard_pending()
            print(f"twinring: error: {exc}", file=sys.stderr)
            return 2
        except Terminated:
            _SIGTERM_SEEN.append(time.time())
            rundir.discard_pending()
            _stop_workers()
            print("twinring: terminated (SIGTERM); workers stopped, finished units are kept, rerun to resume",
                  file=sys.stderr)
            return 143
        except KeyboardInterrupt:
            rundir.discard_pending()
            _stop_workers()
            print("twinring: interrupted; finished units are kept, rerun to resume", file=sys.stderr)
            return 130
        except BaseException:
            rundir.discard_pending()
            if _SIGTERM_SEEN or (previous is not unset and _sigterm_pending()):
                # the whole process group got SIGTERM: a worker died of it and joblib reported that first
                _stop_workers()
                print("twinring: terminated (SIGTERM); workers stopped, finished units are kept, rerun to resume",
                      file=sys.stderr)
                return 143
            raise
        if int(status or 0) == 0:
            rundir.commit_pending()
        else:
            rundir.discard_pending()
    finally:
        if previous is not unset:
            signal.signal(signal.SIGTERM, signal.SIG_DFL if previous is None else previous)
    args._elapsed = time.time() - start
    return int(status or 0)


if __name__ == "__main__":
    sys.exit(main())
