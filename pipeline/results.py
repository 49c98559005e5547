"""Tables and provenance: ECSV with a FITS binary-table twin, atomic writes.

Every file the tool writes goes through :func:`atomic_path`: the content is
written to a temporary file in the same directory and renamed into place, so a
final name never holds a half-written file and an earlier result survives a
failed write.
"""
from __future__ import annotations

import contextlib
import datetime as _dt
import hashlib
import os
import tempfile
import warnings
from pathlib import Path

import numpy as np
from astropy.table import Table

from .config import InputError

from . import __version__ as TOOL_VERSION


@contextlib.contextmanager
def atomic_path(path):
    """Yield a temporary path beside ``path``; rename it onto ``path`` on success."""
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{path.parent}: cannot create output directory ({exc.strerror or exc})")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    except OSError as exc:
        raise InputError(f"{path.parent}: output directory is not writable ({exc.strerror or exc})")
    os.close(fd)
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o666 & ~umask)   # mkstemp makes 0600 files; results are meant to be shared
    try:
        yield Path(tmp)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        _unlink(tmp)
        raise InputError(f"{path}: write failed ({exc.strerror or exc}); allowed: a writable place with free space "
                         "(earlier contents left in place)")
    except BaseException:
        _unlink(tmp)
        raise


def _unlink(p):
    try:
        os.unlink(p)
    except OSError:
        pass


def write_text(path, text: str):
    with atomic_path(path) as tmp:
        Path(tmp).write_text(text)


def file_checksum(path) -> str:
    """sha256 of a file (first 16 hex digits), for provenance."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()[:16]


def provenance(cfg=None, inputs=None, stage: str = "") -> dict:
    """Provenance keywords: tool version, config hash, input checksums, date."""
    meta = {
        "tool": "twinring",
        "tool_version": TOOL_VERSION,
        "stage": stage,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
    }
    if cfg is not None:
        meta["config_hash"] = cfg.hash()
        meta["config_file"] = cfg.source
        meta.update(_map_description(cfg))
    for name, p in (inputs or {}).items():
        if p is not None and Path(p).exists():
            meta[f"input_{name}"] = str(p)
            meta[f"sha256_{name}"] = file_checksum(p)
    return meta


def _map_description(cfg) -> dict:
    """The data map's unit, ordering, frame and column as read from its header (twinring.skymap)."""
    from .skymap import input_provenance

    try:
        return input_provenance(cfg.map)
    except InputError:          # a bad map stops its stage with its own message; provenance never does
        return {}


def write_table(table: Table, path, meta: dict | None = None, fits_twin: bool = True):
    """Write ``table`` as ECSV (and ``.fits`` twin) atomically, with ``meta`` attached."""
    path = Path(path)
    t = table.copy(copy_data=False)
    t.meta.update(meta or {})
    with atomic_path(path) as tmp:
        t.write(tmp, format="ascii.ecsv", overwrite=True)
    if fits_twin:
        ft = t.copy(copy_data=False)
        ft.meta = {k.upper(): _fits_value(v) for k, v in t.meta.items()}  # long keys become HIERARCH cards
        for col in ft.colnames:
            if ft[col].dtype == bool:
                ft[col] = ft[col].astype(np.uint8)
        with atomic_path(path.with_suffix(".fits")) as tmp, warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ft.write(tmp, format="fits", overwrite=True)
    return path


def _fits_value(v):
    if isinstance(v, (bool, int, float, np.integer, np.floating)):
        return v
    s = str(v)
    return s[:68]


def read_table(path, what="table") -> Table:
    p = Path(path)
    if not p.exists():
        raise InputError(f"{p}: {what} not found")
    try:
        return Table.read(p, format="ascii.ecsv" if p.suffix == ".ecsv" else None)
    except Exception as exc:
        raise InputError(f"{p}: cannot read {what} ({exc.__class__.__name__}); allowed: an ECSV or FITS table")
