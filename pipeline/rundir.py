"""Run directories: the resolved config, the log, progress bars and the closing summary.

A run directory belongs to one config.  ``open_run`` writes the resolved
config as ``config.yaml`` on first use and refuses a directory whose
``config.yaml`` came from a different config (hash of every section) unless
``force`` is given.  Nothing already in the directory is removed.  With
``force``, the new ``config.yaml`` replaces the old one only when the stage
succeeds (:meth:`Run.finish`, or :func:`commit_pending` called by the CLI
after a handler returns): a forced run that fails leaves the old config beside
the old tables.  ``~`` in the output directory is the user's home.
"""
from __future__ import annotations

import json
import logging
import os
import resource
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import yaml

from .config import InputError, RunConfig, dump_config
from .results import write_text

CONFIG_NAME = "config.yaml"
LOG_NAME = "twinring.log"


def peak_memory_mb() -> float:
    """Peak resident memory of this process and its finished children (MB)."""
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    return max(own, kids) / 1024.0


@dataclass
class Run:
    dir: Path
    cfg: RunConfig
    stage: str
    logger: logging.Logger
    started: float = field(default_factory=time.time)
    pending_config: str | None = None     # a forced run's config.yaml text, written when the stage succeeds
    _logged: set = field(default_factory=set, repr=False)

    def commit(self):
        """Write the config.yaml held back by a forced run (the stage succeeded)."""
        if self.pending_config is not None:
            write_text(self.dir / CONFIG_NAME, self.pending_config)
            self.pending_config = None
        _PENDING[:] = [r for r in _PENDING if r is not self]

    def log(self, msg, *args):
        """Log a line (every call; the text is remembered for :meth:`log_summary`)."""
        text = (msg % args) if args else str(msg)
        self._logged.add(text)
        self.logger.info("%s", text)

    def log_summary(self, lines):
        """Log a stage's closing lines, leaving out those its work already logged (unit statistics)."""
        for line in lines:
            if str(line) not in self._logged:
                self.log(line)

    def progress(self, iterable, desc="", unit="it", total=None):
        """A progress bar with ETA on stderr (hidden when stderr is not a terminal or progress is off)."""
        from tqdm.auto import tqdm

        if not self.cfg.compute.progress or not _is_terminal(sys.stderr):
            return tqdm(iterable, desc=desc, unit=unit, total=total, disable=True)
        width = _terminal_columns(sys.stderr)
        return tqdm(iterable, desc=desc, unit=unit, total=total, file=sys.stderr, leave=False,
                    dynamic_ncols=width is None, ncols=width)

    def elapsed(self):
        return time.time() - self.started

    def finish(self, lines: list[str], extra: dict | None = None):
        """Print the closing summary and log it."""
        self.commit()
        lines = list(lines) + [f"wall time {self.elapsed():.1f} s, peak memory {peak_memory_mb():.0f} MB",
                               f"results in {self.dir}"]
        self.log_summary(lines)
        for line in lines:
            print(line)


def _is_terminal(stream) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):
        return False


def _terminal_columns(stream):
    """None when the terminal reports its width; 100 when it reports 0 columns (a pseudo-terminal
    without a size, e.g. under `script` or some IDE consoles), where a width-following bar is empty."""
    import os

    try:
        cols = os.get_terminal_size(stream.fileno()).columns
    except (AttributeError, ValueError, OSError):
        return 100
    return None if cols > 0 else 100


def _logger(run_dir: Path, stage: str):
    logger = logging.getLogger(f"twinring.{run_dir.resolve()}.{stage}")
    logger.setLevel(logging.INFO)
    logger.propagate = False
    for h in list(logger.handlers):
        logger.removeHandler(h)
        h.close()
    fh = logging.FileHandler(run_dir / LOG_NAME)
    fh.setFormatter(logging.Formatter("%(asctime)s " + stage + ": %(message)s", "%Y-%m-%d %H:%M:%S"))
    logger.addHandler(fh)
    return logger


_PENDING: list = []      # forced runs of this process whose config.yaml waits for the stage to succeed


def commit_pending():
    """Write every held-back config.yaml (called by the CLI when a handler succeeded)."""
    for run in list(_PENDING):
        run.commit()


def discard_pending():
    """Forget held-back config.yaml texts (the stage failed: the old config stays)."""
    for run in list(_PENDING):
        run.pending_config = None
    _PENDING.clear()


def resolve_out(cfg: RunConfig, out_override=None) -> Path:
    """The output directory: ``--out`` or ``output.dir``, with ``~`` expanded."""
    return Path(os.path.expanduser(str(out_override or cfg.output.dir)))


def open_run(cfg: RunConfig, out_override=None, force=False, stage="") -> Run:
    out = resolve_out(cfg, out_override)
    if out.exists() and not out.is_dir():
        raise InputError(f"{out}: output.dir is a file; allowed: a directory")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{out}: output.dir cannot be created ({exc.strerror or exc}); allowed: a writable directory")
    probe = out / ".twinring-write-test"
    try:
        probe.write_text("")
        probe.unlink()
    except OSError as exc:
        raise InputError(f"{out}: output.dir is not writable ({exc.strerror or exc}); allowed: a writable directory")
    stored = out / CONFIG_NAME
    text = "# resolved twinring config; config_hash: " + cfg.hash() + "\n" + dump_config(cfg)
    if stored.exists():
        old_hash = _stored_hash(stored)
        if old_hash != cfg.hash() and not force:
            raise InputError(
                f"{out}: output directory holds results of another config (hash {old_hash}, this one {cfg.hash()});"
                " allowed: a new --out directory, or --force"
            )
    pending = None
    if not stored.exists():
        write_text(stored, text)
    elif force and _stored_hash(stored) != cfg.hash():
        pending = text            # written by Run.commit once the stage succeeds
    run = Run(out, cfg, stage, _logger(out, stage), pending_config=pending)
    if pending is not None:
        _PENDING[:] = [r for r in _PENDING if r.dir.resolve() != out.resolve()]
        _PENDING.append(run)
    return run


def _stored_hash(path: Path) -> str:
    first = path.read_text().splitlines()[:1]
    if first and "config_hash:" in first[0]:
        return first[0].split("config_hash:")[1].strip()
    return "unknown"


def write_json(path, data: dict):
    write_text(path, json.dumps(data, indent=2, sort_keys=True, default=str) + "\n")


def read_yaml(path):
    """A YAML file, safe-loaded with duplicate keys refused (:func:`twinring.config.safe_load_unique`)."""
    from .config import safe_load_unique

    return safe_load_unique(Path(path).read_text())
